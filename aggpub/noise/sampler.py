"""Bulk sampling of integer (discrete Laplace) noise.

Two pieces live here:

* **random sources** -- objects that hand out float64 uniforms strictly inside
  ``(0, 1)``.  Releases use :class:`SystemRandomSource` (the operating
  system's entropy source); :class:`SeededRandomSource` exists so tests can be
  deterministic and must never be used for a real release.
* :func:`sample_discrete_laplace` -- vectorised, chunked sampling of the
  two-sided geometric distribution from any random source.

Nothing in this module reads the environment: a seed only ever arrives as an
explicit argument of :func:`make_random_source`.
"""

from __future__ import annotations

__all__ = [
    "RandomSource",
    "SystemRandomSource",
    "SeededRandomSource",
    "make_random_source",
    "sample_discrete_laplace",
    "DEFAULT_CHUNK_SIZE",
]

import abc
import math
import numbers
import os

import numpy as np

#: Number of noise values produced per chunk (bounds the temporary memory to a
#: few tens of MiB whatever the requested size).
DEFAULT_CHUNK_SIZE = 1 << 20

# Uniforms are built from the top 52 bits of each 64-bit word, k in [0, 2**52),
# as u = (k + 0.5) * 2**-52.  Every such value is exactly representable in
# binary64 (2k + 1 < 2**53), the smallest is 2**-53 and the largest 1 - 2**-53,
# and the grid is symmetric (u and 1 - u are both on it).
#
# A 53-bit version, (k + 0.5) * 2**-53 with k in [0, 2**53), is NOT safe: for
# k = 2**53 - 1 the sum 2**53 - 0.5 needs 54 significant bits, rounds (ties to
# even) to 2**53, and the result is exactly 1.0.  Dropping one bit is what makes
# "0 and 1 never occur" true.
_UNIFORM_BITS = 52
_UNIFORM_SHIFT = np.uint64(64 - _UNIFORM_BITS)
_UNIFORM_STEP = 2.0 ** -_UNIFORM_BITS

# Largest |value| any single geometric draw may take before conversion to
# int64; keeps the difference of two draws (and a count added to it) well
# inside the int64 range.
_MAX_GEOMETRIC = float(2 ** 61)
# -log of the smallest uniform the sources can produce (2**-53).
_MAX_NEG_LOG_U = (_UNIFORM_BITS + 1) * math.log(2.0)


def _bits_to_open_unit(bits: np.ndarray) -> np.ndarray:
    """Map uint64 words to float64 uniforms strictly inside ``(0, 1)``.

    Parameters
    ----------
    bits : numpy.ndarray of uint64
        Independent, uniformly distributed 64-bit words.

    Returns
    -------
    numpy.ndarray of float64
        ``((bits >> 12) + 0.5) * 2**-52``: values on the grid
        ``{(k + 0.5) / 2**52 : 0 <= k < 2**52}``, between ``2**-53`` and
        ``1 - 2**-53`` inclusive; every step is exact in binary64.
    """
    bits = np.asarray(bits, dtype=np.uint64)
    out = np.right_shift(bits, _UNIFORM_SHIFT).astype(np.float64)
    out += 0.5
    out *= _UNIFORM_STEP
    return out


def _check_count(n, what: str = "n") -> int:
    if isinstance(n, (bool, np.bool_)) or not isinstance(n, numbers.Integral):
        raise TypeError(f"'{what}' must be a non-negative integer, got {n!r}")
    n = int(n)
    if n < 0:
        raise ValueError(f"'{what}' must be a non-negative integer, got {n}")
    return n


class RandomSource(abc.ABC):
    """Source of float64 uniforms strictly inside the open interval ``(0, 1)``.

    Subclasses implement :meth:`uniform`, :attr:`seeded` and
    :attr:`description`.  The noise samplers rely on the open interval: a
    uniform equal to 0 would make ``log(u)`` infinite.
    """

    @abc.abstractmethod
    def uniform(self, n: int) -> np.ndarray:
        """Return ``n`` independent uniforms, float64, each strictly in ``(0, 1)``."""

    @property
    @abc.abstractmethod
    def seeded(self) -> bool:
        """True when the stream is reproducible from a seed (tests only)."""

    @property
    @abc.abstractmethod
    def description(self) -> str:
        """Short human-readable statement of where the randomness comes from."""

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self.description!r})"


class SystemRandomSource(RandomSource):
    """Uniforms from ``os.urandom``, the operating system's entropy source.

    The bytes are read in one call per request and converted in bulk with
    numpy (52 bits per uniform, see :func:`_bits_to_open_unit`).  The stream
    cannot be replayed, which is what a release needs.
    """

    @property
    def seeded(self) -> bool:
        return False

    @property
    def description(self) -> str:
        return "operating-system entropy (os.urandom), 52-bit uniforms in (0, 1)"

    def uniform(self, n: int) -> np.ndarray:
        n = _check_count(n)
        if n == 0:
            return np.empty(0, dtype=np.float64)
        bits = np.frombuffer(os.urandom(8 * n), dtype="<u8")
        return _bits_to_open_unit(bits)


class SeededRandomSource(RandomSource):
    """Reproducible uniforms from ``numpy.random.Generator(PCG64(seed))``.

    For tests and benchmarks only: anyone who knows the seed can regenerate
    the noise and strip it off a release.  Raw 64-bit outputs of the bit
    generator go through the same conversion as :class:`SystemRandomSource`,
    so this source also never yields 0 or 1.

    Parameters
    ----------
    seed : int
        Non-negative integer seed.

    References
    ----------
    .. [1] M. E. O'Neill, "PCG: A family of simple fast space-efficient
       statistically good algorithms for random number generation",
       Technical report HMC-CS-2014-0905, Harvey Mudd College, 2014
       (citation recalled from memory).
    """

    def __init__(self, seed: int):
        if isinstance(seed, (bool, np.bool_)) or not isinstance(seed, numbers.Integral):
            raise TypeError(f"'seed' must be a non-negative integer, got {seed!r}")
        if seed < 0:
            raise ValueError(f"'seed' must be a non-negative integer, got {seed}")
        self._seed = int(seed)
        self._generator = np.random.Generator(np.random.PCG64(self._seed))

    @property
    def seed(self) -> int:
        return self._seed

    @property
    def seeded(self) -> bool:
        return True

    @property
    def description(self) -> str:
        return f"numpy PCG64 seeded with {self._seed} (reproducible; tests only, never for a release)"

    def uniform(self, n: int) -> np.ndarray:
        n = _check_count(n)
        if n == 0:
            return np.empty(0, dtype=np.float64)
        bits = self._generator.bit_generator.random_raw(n)
        return _bits_to_open_unit(np.asarray(bits, dtype=np.uint64))


def make_random_source(seed: int | None) -> RandomSource:
    """Return the random source for ``seed``.

    Parameters
    ----------
    seed : int or None
        ``None`` (the only value a release should use) gives a
        :class:`SystemRandomSource`; an integer gives a
        :class:`SeededRandomSource`.  The environment is never consulted.

    Returns
    -------
    RandomSource
    """
    if seed is None:
        return SystemRandomSource()
    return SeededRandomSource(seed)


def _check_alpha(alpha) -> float:
    if isinstance(alpha, (bool, np.bool_)) or not isinstance(alpha, numbers.Real):
        raise TypeError(f"'alpha' must be a real number in (0, 1), got {alpha!r}")
    alpha = float(alpha)
    if not (0.0 < alpha < 1.0):  # also rejects NaN
        raise ValueError(
            f"'alpha' must satisfy 0 < alpha < 1, got {alpha!r} "
            "(alpha = exp(-epsilon/sensitivity); 'no noise' is not a valid request)"
        )
    return alpha


def _geometric_chunk(log_alpha: float, m: int, source: RandomSource) -> np.ndarray:
    """``m`` draws of floor(log(U) / log(alpha)), as int64."""
    u = source.uniform(m)
    if not isinstance(u, np.ndarray) or u.shape != (m,):
        raise RuntimeError(f"{type(source).__name__}.uniform({m}) did not return an array of shape ({m},)")
    u = np.asarray(u, dtype=np.float64)
    if not bool(np.all((u > 0.0) & (u < 1.0))):  # also catches NaN
        raise RuntimeError(f"{type(source).__name__}.uniform returned values outside the open interval (0, 1)")
    u = np.log(u)        # strictly negative and finite
    u /= log_alpha       # strictly positive: both operands negative
    np.floor(u, out=u)
    return u.astype(np.int64)


def _sample_log_alpha(log_alpha: float, size: int, source: RandomSource,
                      chunk_size: int = DEFAULT_CHUNK_SIZE) -> np.ndarray:
    """Discrete Laplace draws given ``log(alpha) = -epsilon/sensitivity`` directly.

    Passing the logarithm avoids rounding ``alpha`` to a double when it is very
    close to 1 (tiny epsilon) or underflowing it to 0 (huge epsilon).
    """
    log_alpha = float(log_alpha)
    # NaN fails the comparison; -inf would mean alpha == 0 (a point mass at 0,
    # i.e. no noise), which is refused here as it is for alpha itself.
    if not (log_alpha < 0.0) or math.isinf(log_alpha):
        raise ValueError(f"'log_alpha' must be a finite negative number, got {log_alpha!r}")
    if _MAX_NEG_LOG_U / -log_alpha > _MAX_GEOMETRIC:
        raise ValueError(
            f"noise scale too large: -log(alpha) = {-log_alpha!r} could give draws beyond "
            f"{_MAX_GEOMETRIC:.3g}, outside the int64 range used for counts"
        )
    size = _check_count(size, "size")
    chunk_size = _check_count(chunk_size, "chunk_size")
    if chunk_size == 0:
        raise ValueError("'chunk_size' must be positive, got 0")
    if not isinstance(source, RandomSource):
        raise TypeError(f"'source' must be a RandomSource, got {type(source).__name__}")

    out = np.empty(size, dtype=np.int64)
    for start in range(0, size, chunk_size):
        m = min(chunk_size, size - start)
        positive = _geometric_chunk(log_alpha, m, source)
        negative = _geometric_chunk(log_alpha, m, source)
        np.subtract(positive, negative, out=out[start:start + m])
    return out


def sample_discrete_laplace(alpha: float, size: int, source: RandomSource, *,
                            chunk_size: int = DEFAULT_CHUNK_SIZE) -> np.ndarray:
    r"""Draw ``size`` values from the discrete Laplace (two-sided geometric) law.

    The probability mass function is

    .. math:: P(Z = z) = \frac{1 - \alpha}{1 + \alpha}\, \alpha^{|z|},
              \qquad z \in \mathbb{Z},

    with :math:`\alpha = e^{-\varepsilon / \Delta}` for privacy parameter
    :math:`\varepsilon` and L1 sensitivity :math:`\Delta`.  Adding such a
    draw to an integer query of sensitivity :math:`\Delta` is the geometric
    mechanism of Ghosh, Roughgarden and Sundararajan [1]_ and gives
    :math:`\varepsilon`-differential privacy.

    Each value is the difference :math:`G_1 - G_2` of two independent
    geometric variables on :math:`\{0, 1, 2, \dots\}` with success
    probability :math:`1 - \alpha` (so :math:`P(G \ge k) = \alpha^k`); that
    difference has exactly the pmf above.  Each geometric is drawn by inversion
    [2]_, :math:`G = \lfloor \log U / \log \alpha \rfloor` with ``U`` uniform in
    ``(0, 1)``, all in numpy, ``chunk_size`` values at a time so memory stays
    bounded for sizes of ``10**7`` and more.

    Parameters
    ----------
    alpha : float
        :math:`e^{-\varepsilon/\Delta}`; must satisfy ``0 < alpha < 1``.  The
        degenerate ``alpha == 0`` ("no noise") is rejected rather than
        silently returning zeros.
    size : int
        Number of values, ``>= 0``.
    source : RandomSource
        Where the uniforms come from; use :class:`SystemRandomSource` for a
        release.
    chunk_size : int, optional
        Values produced per internal batch (default ``2**20``).

    Returns
    -------
    numpy.ndarray of int64, shape ``(size,)``

    Raises
    ------
    ValueError
        If ``alpha`` is not in ``(0, 1)`` or so close to 1 that draws could
        leave the int64 range, or if ``size`` is negative.

    Notes
    -----
    Floating-point caveats.  The inversion runs on binary64 doubles, so the
    output law is the ideal one only up to rounding:

    * The output is an integer.  Continuous Laplace noise computed in floating
      point leaks the true value through the pattern of low-order bits of the
      result (Mironov [3]_); an integer-valued mechanism added to an integer
      count has no such bit pattern to exploit, which is the reason to use it
      here.
    * The uniforms are on a grid of spacing :math:`2^{-52}` and never below
      :math:`2^{-53}`, so each geometric is bounded by
      :math:`53 \ln 2 / (-\ln \alpha)`: tail events of probability below about
      :math:`2^{-53}` are truncated (never produced), and every individual
      probability is realised only to within about :math:`2^{-52}`.
    * ``log`` and the division are each correctly rounded to within an ulp or
      so; at the rare integer boundaries ``log U / log alpha = k`` this can
      move a draw by one.  The effect on any probability is of the order of
      :math:`2^{-52}` and is not a privacy leak of the low-bit kind above, but
      the guarantee is therefore :math:`\varepsilon`-DP up to an additive
      error of that order rather than exact.
    * For ``alpha`` within a few ulps of 1 the rounding of ``alpha`` itself
      dominates; callers that know :math:`\varepsilon/\Delta` should go through
      :class:`aggpub.noise.mechanisms.GeometricMechanism`, which passes the
      exact logarithm.  For tiny ``alpha`` (e.g. ``1e-300``) the draws are
      correctly almost always 0.

    References
    ----------
    .. [1] A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally
       utility-maximizing privacy mechanisms", Proceedings of the 41st ACM
       Symposium on Theory of Computing (STOC), 2009.
    .. [2] L. Devroye, "Non-Uniform Random Variate Generation", Springer,
       1986, chapter on discrete distributions (citation recalled from memory).
    .. [3] I. Mironov, "On significance of the least significant bits for
       differential privacy", Proceedings of the ACM Conference on Computer
       and Communications Security (CCS), 2012.
    """
    alpha = _check_alpha(alpha)
    return _sample_log_alpha(math.log(alpha), size, source, chunk_size=chunk_size)
