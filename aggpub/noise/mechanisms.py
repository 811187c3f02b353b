"""Noise mechanisms: parameters, closed-form properties and randomisation.

:class:`GeometricMechanism` is the one mechanism used for superedge counts. It
holds the privacy parameter and the sensitivity, answers questions about the
noise law (variance, pmf, confidence half-widths) in closed form, and adds
noise drawn by :mod:`aggpub.noise.sampler`.
"""

from __future__ import annotations

__all__ = ["GeometricMechanism"]

import math
import numbers
from dataclasses import dataclass
from fractions import Fraction
from typing import ClassVar

import numpy as np

from aggpub.noise.sampler import (
    DEFAULT_CHUNK_SIZE,
    RandomSource,
    sample_dyadic,
    dyadic_rate,
)


def _positive_finite(name: str, value) -> float:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real):
        raise ValueError(f"'{name}' must be a finite number > 0, got {value!r} ({type(value).__name__})")
    as_float = float(value)
    if not math.isfinite(as_float) or as_float <= 0.0:
        raise ValueError(f"'{name}' must be a finite number > 0, got {value!r}")
    return as_float


@dataclass(frozen=True)
class GeometricMechanism:
    r"""The geometric (discrete Laplace) mechanism for integer-valued queries.

    Adds to each integer value an independent draw :math:`Z` with

    .. math:: P(Z = z) = \frac{1 - \alpha}{1 + \alpha}\, \alpha^{|z|},
              \qquad \alpha = e^{-\varepsilon/\Delta},

    which makes a query of L1 sensitivity :math:`\Delta` satisfy
    :math:`\varepsilon`-differential privacy [1]_.  For integer counts it is
    the natural replacement for continuous Laplace noise, whose floating-point
    implementations leak through the low-order bits [2]_.

    Parameters
    ----------
    epsilon : float
        Privacy parameter, finite and ``> 0``.
    sensitivity : float
        L1 sensitivity of the query, finite and ``> 0``.

    Attributes
    ----------
    name : str
        ``"discrete_laplace"``; the value written to the manifest
        ``mechanism`` field.

    Notes
    -----
    Noise is drawn exactly (integer arithmetic and random bytes only, no
    floating point, unbounded tails) by the method of Canonne, Kamath and
    Steinke [3]_ in :mod:`aggpub.noise.sampler`.  The rate it uses is
    :attr:`rate`, the largest dyadic rational ``s / 2**k`` (``k, log2(s) <=
    62``) not above the exact rational ``epsilon / sensitivity`` (both floats
    are exact dyadic rationals): equal to it when that ratio is itself such a
    dyadic (e.g. ``epsilon = 0.1`` with sensitivity 1, 2 or 4), else below it
    by a relative amount under ``max(2**-61, scale * 2**-62)``.  A lower rate
    means more noise, so the release is :attr:`effective_epsilon`-DP, which
    is never above :attr:`epsilon`.  The closed forms (:meth:`variance`,
    :meth:`pmf`, ...) use ``epsilon / sensitivity`` in binary64; they differ
    from the law of :attr:`rate` by that relative amount.

    References
    ----------
    .. [1] A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally
       utility-maximizing privacy mechanisms", Proceedings of the 41st ACM
       Symposium on Theory of Computing (STOC), 2009.
    .. [2] I. Mironov, "On significance of the least significant bits for
       differential privacy", Proceedings of the ACM Conference on Computer
       and Communications Security (CCS), 2012.
    .. [3] C. L. Canonne, G. Kamath, T. Steinke, "The Discrete Gaussian for
       Differential Privacy", NeurIPS 2020.
    """

    epsilon: float
    sensitivity: float
    name: ClassVar[str] = "discrete_laplace"

    def __post_init__(self) -> None:
        epsilon = _positive_finite("epsilon", self.epsilon)
        sensitivity = _positive_finite("sensitivity", self.sensitivity)
        ratio = epsilon / sensitivity
        if ratio == 0.0:
            raise ValueError(
                f"'epsilon' / 'sensitivity' underflows to 0 (epsilon={epsilon!r}, "
                f"sensitivity={sensitivity!r}): the noise would be unbounded"
            )
        try:
            s, k = dyadic_rate(Fraction(epsilon) / Fraction(sensitivity))  # exact rational ratio
        except ValueError:
            raise ValueError(
                f"noise scale sensitivity/epsilon = {sensitivity / epsilon!r} is too large "
                f"(epsilon={epsilon!r}, sensitivity={sensitivity!r}): draws could leave the int64 range"
            ) from None
        object.__setattr__(self, "epsilon", epsilon)
        object.__setattr__(self, "sensitivity", sensitivity)
        object.__setattr__(self, "_rate_sk", (s, k))

    # ----------------------------------------------------------------- params
    @property
    def rate(self) -> Fraction:
        r"""The exact rate ``s / 2**k`` of the noise drawn: :math:`\alpha = e^{-\mathrm{rate}}`.

        The largest dyadic rational with ``k <= 62`` and ``s <= 2**62`` not
        above ``Fraction(epsilon) / Fraction(sensitivity)``; see the class notes.
        """
        s, k = self._rate_sk
        return Fraction(s, 1 << k)

    @property
    def rate_is_exact(self) -> bool:
        """True when :attr:`rate` equals ``epsilon / sensitivity`` exactly (as rationals)."""
        return self.rate == Fraction(self.epsilon) / Fraction(self.sensitivity)

    @property
    def effective_epsilon(self) -> float:
        """``rate * sensitivity`` rounded down to a float: the epsilon the noise drawn gives (``<= epsilon``)."""
        exact = self.rate * Fraction(self.sensitivity)
        out = float(exact)
        if Fraction(out) > exact:
            out = math.nextafter(out, 0.0)
        return min(out, self.epsilon)

    @property
    def log_alpha(self) -> float:
        r""":math:`\log\alpha = -\varepsilon/\Delta`, exact to one rounding."""
        return -self.epsilon / self.sensitivity

    @property
    def alpha(self) -> float:
        r""":math:`\alpha = e^{-\varepsilon/\Delta}` (may underflow to 0.0 for huge epsilon)."""
        return math.exp(self.log_alpha)

    @property
    def scale(self) -> float:
        r"""Scale :math:`\Delta/\varepsilon` (``alpha = exp(-1/scale)``)."""
        return self.sensitivity / self.epsilon

    # ------------------------------------------------------- noise properties
    def variance(self) -> float:
        r"""Variance :math:`2\alpha/(1-\alpha)^2` of one noise draw.

        Computed as ``2 * alpha / expm1(log_alpha)**2`` so it stays accurate
        when :math:`\alpha` is close to 1.
        """
        la = self.log_alpha
        return 2.0 * math.exp(la) / math.expm1(la) ** 2

    def expected_abs(self) -> float:
        r"""Mean absolute noise :math:`E|Z| = 2\alpha / (1 - \alpha^2)` of one draw (from the pmf).

        Written as ``2 alpha / ((1 - alpha)(1 + alpha))`` with ``1 - alpha = -expm1(log_alpha)``,
        accurate when :math:`\alpha` is close to 1.
        """
        la = self.log_alpha
        a = math.exp(la)
        return 2.0 * a / (-math.expm1(la) * (1.0 + a))

    def expected_abs_sum(self, m) -> np.ndarray:
        r"""Mean absolute value of the sum of ``m`` independent draws, for each entry of ``m``.

        Exact (up to double rounding) from the law of the sum, computed once per
        distinct ``m`` by :func:`aggpub.estimates.intervals.sum_noise_pmf`; the
        normal approximation :math:`\sqrt{2 m \operatorname{Var} Z / \pi}` where that
        law's grid would be too large. ``m = 0`` gives 0.
        """
        from ..estimates.intervals import sum_noise_pmf

        m = np.asarray(m, dtype=np.int64)
        out = np.zeros(m.shape, dtype=np.float64)
        for mv in np.unique(m):
            if mv <= 0:
                continue
            if mv == 1:
                val = self.expected_abs()
            else:
                pmf = sum_noise_pmf([self.scale], [int(mv)])
                val = (math.sqrt(2.0 * mv * self.variance() / math.pi) if pmf is None
                       else 2.0 * float(np.dot(np.arange(len(pmf)), pmf)))
            out[m == mv] = val
        return out

    def _mass_at_zero(self) -> float:
        # (1 - a) / (1 + a) == tanh(epsilon / (2 sensitivity)), accurate for a near 1.
        return math.tanh(-self.log_alpha / 2.0)

    def pmf(self, z) -> np.ndarray:
        r"""Probability :math:`P(Z = z)`; 0 for non-integer ``z``.

        Parameters
        ----------
        z : array_like
            Points at which to evaluate.

        Returns
        -------
        numpy.ndarray of float64
            Same shape as ``z`` (a numpy scalar for scalar input).
        """
        z = np.asarray(z, dtype=np.float64)
        integral = np.isfinite(z) & (z == np.floor(z))
        absz = np.where(integral, np.abs(z), 0.0)
        out = self._mass_at_zero() * np.exp(absz * self.log_alpha)
        out = np.where(integral, out, 0.0)
        return out[()]

    def tail_abs(self, t) -> np.ndarray:
        r"""Two-sided tail :math:`P(|Z| > t) = 2\alpha^{\lfloor t\rfloor+1}/(1+\alpha)` for ``t >= 0``.

        Returns 1 for ``t < 0``.  Computed directly (not as ``1 - cdf``) so
        small tails keep their relative accuracy.
        """
        t = np.asarray(t, dtype=np.float64)
        if np.any(np.isnan(t)):
            raise ValueError("'t' must not contain NaN")
        la = self.log_alpha
        n = np.floor(np.maximum(t, 0.0)) + 1.0
        tail = 2.0 * np.exp(n * la) / (1.0 + math.exp(la))
        out = np.where(t < 0, 1.0, tail)
        return out[()]

    def cdf_abs(self, t) -> np.ndarray:
        r"""Probability :math:`P(|Z| \le t)`; 0 for ``t < 0``.

        Parameters
        ----------
        t : array_like
            Thresholds (real; only :math:`\lfloor t \rfloor` matters).

        Returns
        -------
        numpy.ndarray of float64
            Same shape as ``t`` (a numpy scalar for scalar input).
        """
        return (1.0 - np.asarray(self.tail_abs(t)))[()]

    def interval_half_width(self, confidence: float = 0.95) -> int:
        r"""Smallest integer :math:`t \ge 0` with :math:`P(|Z| \le t) \ge` ``confidence``.

        From :math:`P(|Z| > t) = 2\alpha^{t+1}/(1+\alpha)` the closed form is
        :math:`t = \lceil \log\big((1-c)(1+\alpha)/2\big) / \log\alpha \rceil - 1`
        (clamped at 0); the result is then checked against :meth:`cdf_abs` and
        nudged by one if rounding put it off by one.

        Parameters
        ----------
        confidence : float, default 0.95
            Coverage probability, strictly between 0 and 1.

        Returns
        -------
        int
        """
        if isinstance(confidence, (bool, np.bool_)) or not isinstance(confidence, numbers.Real):
            raise ValueError(f"'confidence' must be a number in (0, 1), got {confidence!r}")
        c = float(confidence)
        if not (0.0 < c < 1.0):
            raise ValueError(f"'confidence' must be a number in (0, 1), got {confidence!r}")
        la = self.log_alpha
        target = math.log((1.0 - c) * (1.0 + math.exp(la)) / 2.0)  # < 0
        t = max(0, math.ceil(target / la) - 1)
        while t > 0 and float(self.cdf_abs(t - 1)) >= c:
            t -= 1
        while float(self.cdf_abs(t)) < c:
            t += 1
        return int(t)

    # --------------------------------------------------------------- sampling
    def noise(self, size, source: RandomSource, *, chunk_size: int = DEFAULT_CHUNK_SIZE) -> np.ndarray:
        """Draw noise values.

        Parameters
        ----------
        size : int or tuple of int
            Number (or shape) of values.
        source : RandomSource
            Randomness; :class:`aggpub.noise.sampler.SystemRandomSource` for a release.
        chunk_size : int, optional
            Values produced per internal batch.

        Returns
        -------
        numpy.ndarray of int64
        """
        if isinstance(size, tuple):
            shape = tuple(int(s) for s in size)
            if any(s < 0 for s in shape):
                raise ValueError(f"'size' must not contain negative dimensions, got {size!r}")
            count = math.prod(shape)
        else:
            shape = None
            count = size
        if not isinstance(source, RandomSource):
            raise TypeError(f"'source' must be a RandomSource, got {type(source).__name__}")
        s, k = self._rate_sk
        out = sample_dyadic(s, k, count, source, chunk_size=chunk_size)
        return out.reshape(shape) if shape is not None else out

    def randomise(self, values, source: RandomSource, *, chunk_size: int = DEFAULT_CHUNK_SIZE) -> np.ndarray:
        """Return ``values`` plus independent noise, as int64 of the same shape.

        Parameters
        ----------
        values : array_like of int
            Integer counts (floats are accepted only if every one is an integer).
        source : RandomSource
            Randomness; :class:`aggpub.noise.sampler.SystemRandomSource` for a release.
        chunk_size : int, optional
            Values produced per internal batch.

        Returns
        -------
        numpy.ndarray of int64

        Raises
        ------
        ValueError
            If ``values`` are not integers.
        OverflowError
            If a noisy value would not fit in int64.
        """
        arr = np.asarray(values)
        if arr.dtype == np.bool_ or not (np.issubdtype(arr.dtype, np.integer) or np.issubdtype(arr.dtype, np.floating)):
            raise ValueError(f"'values' must be integer counts, got an array of dtype {arr.dtype}")
        if np.issubdtype(arr.dtype, np.floating):
            if not bool(np.all(np.isfinite(arr) & (arr == np.floor(arr)))):
                raise ValueError("'values' must be integer counts; got non-integer or non-finite floats")
            if arr.size and float(np.max(np.abs(arr))) >= 2.0 ** 62:
                raise OverflowError("'values' are too large for int64 noisy counts")
        elif arr.dtype == np.uint64 and arr.size and int(arr.max()) > np.iinfo(np.int64).max:
            raise OverflowError("'values' are too large for int64 noisy counts")
        base = arr.astype(np.int64)
        noise = self.noise(base.size, source, chunk_size=chunk_size).reshape(base.shape)
        out = base + noise
        # Signed overflow happened iff both operands differ in sign from the result.
        if bool(np.any(((base ^ out) & (noise ^ out)) < 0)):
            raise OverflowError("a noisy value does not fit in int64")
        return out
