"""The ladder mechanism: a count with no useful global sensitivity, released through rungs of local ones.

A count ``q`` whose global sensitivity is useless (the number of triangles: one
contact can close ``n - 2`` of them) is released with the ladder mechanism of
Zhang, Cormode, Procopiuc, Srivastava and Xiao (SIGMOD 2015). The caller supplies
the *ladder widths* ``I_0, I_1, ...`` of the true network: non-negative integers
with

* ``I_0(G) >= |q(G) - q(G')|`` for every neighbour ``G'`` of ``G``, and
* ``I_{t+1}(G) >= I_t(G')`` for every neighbour ``G'`` (the ladder property).

With ``B_0 = 0`` and ``B_t = I_0 + ... + I_{t-1}``, an integer ``k`` is on rung
``rung_G(k) = min {t >= 0 : |k - q(G)| <= B_t}``: rung 0 is ``q`` itself, rung
``t >= 1`` holds the ``2 I_{t-1}`` integers at a distance in ``(B_{t-1}, B_t]``. The
mechanism outputs ``k`` with probability proportional to ``exp(-epsilon rung_G(k) / 2)``.

Why this is epsilon-DP (Zhang et al., Theorem 4.2, in our notation): for neighbours
``G ~ G'`` and ``t = rung_G'(k)``, ``|k - q(G)| <= |k - q(G')| + |q(G') - q(G)|
<= B_t(G') + I_0(G) = I_0(G) + sum_{s<t} I_s(G') <= I_0(G) + sum_{s<t} I_{s+1}(G)
= B_{t+1}(G)``, so ``rung_G(k) <= rung_G'(k) + 1`` and symmetrically: the score
``-rung`` has sensitivity 1 (:attr:`LadderMechanism.sensitivity`), and the
exponential mechanism (McSherry, Talwar, FOCS 2007) with weight
``exp(epsilon * score / 2)`` is epsilon-DP. The normaliser is finite when the widths
are bounded (rung ``t`` holds at most ``2 * max I`` values).

The widths are computed from the private network: they shape the output law, which
the proof covers, and are never published (the manifest records epsilon, the
mechanism's name, the score sensitivity 1 and the rung scale ``2 / epsilon`` only).

Sampling (:meth:`LadderMechanism.sample`) is exact, from the random bytes of a
:class:`~aggpub.noise.sampler.RandomSource` and integer arithmetic only, like the
discrete Laplace sampler (:mod:`aggpub.noise.sampler`). The weight ``exp(-epsilon/2)``
per rung is used through the dyadic rate ``r = s / 2**k``, the largest such number
at most ``epsilon / 2`` (:func:`~aggpub.noise.sampler.dyadic_rate`); a lower rate only
adds noise, so the release is ``2 r``-DP with ``2 r <= epsilon``. The rung is drawn by
rejection (von Neumann 1951; Devroye, *Non-Uniform Random Variate Generation*, 1986,
section II.3; citations recalled from memory): a proposal ``t`` with
``P(t) = (1 - e^-r) e^(-r t)``, ``t >= 0`` (the exact geometric sampler), accepted with
probability ``N_t / N_max``, where ``N_t`` is the number of values on rung ``t``
(1, then ``2 I_{t-1}``) and ``N_max = max(1, 2 * max_width)`` is public, by comparing an
exact uniform integer below ``N_max`` with ``N_t``. Accepted rungs have probability
proportional to ``N_t e^(-r t)``, the ladder law, with no rung left out. The value
inside the rung is ``B_{t-1} + 1 + j`` with ``j`` uniform in ``[0, I_{t-1})`` and a
fair sign (:meth:`RandomSource.integers`). The number of proposals (a running time)
depends on the widths; timing is outside the guarantee, as everywhere.

References
----------
J. Zhang, G. Cormode, C. M. Procopiuc, D. Srivastava, X. Xiao, "Private release of
graph statistics using ladder functions", SIGMOD 2015.

F. McSherry, K. Talwar, "Mechanism design via differential privacy", FOCS 2007.

K. Nissim, S. Raskhodnikova, A. Smith, "Smooth sensitivity and sampling in private
data analysis", STOC 2007.
"""

from __future__ import annotations

__all__ = ["LadderMechanism", "rungs_needed", "TAIL_BITS"]

import math
from dataclasses import dataclass, field
from fractions import Fraction
from typing import Callable, ClassVar

import numpy as np

from .sampler import ByteStream, RandomSource, dyadic_rate, geometric_exact

#: :func:`rungs_needed` leaves out at most ``2**-TAIL_BITS`` of the mass (tables of the law, for tests).
TAIL_BITS = 60


def rungs_needed(max_width: int, epsilon: float) -> int:
    """Rungs that hold all but ``2**-60`` of the law's mass (public inputs only; for tables of the law).

    Every rung ``t > T`` holds at most ``2 * max_width`` values of weight
    ``exp(-epsilon t / 2)``: the mass beyond ``T`` is at most
    ``2 max_width exp(-epsilon (T + 1) / 2) / (1 - exp(-epsilon / 2))``, and the total
    is at least 1 (rung 0). ``T`` is the smallest integer making that bound at most
    ``2**-60``. The sampler needs no such bound: it draws from the whole law.

    Parameters
    ----------
    max_width : int
        A public upper bound on every width (for triangles, ``n - 2``).
    epsilon : float
    """
    if max_width <= 0:
        return 1
    g = -math.expm1(-epsilon / 2.0)  # 1 - exp(-epsilon / 2)
    limit = -TAIL_BITS * math.log(2.0)

    def log_tail(T):  # log of the bound on the mass beyond rung T
        return math.log(2.0 * max_width / g) - epsilon * (T + 1) / 2.0

    T = max(1, int(math.ceil(2.0 * (math.log(2.0 * max_width / g) - limit) / epsilon)) - 1)
    while T > 1 and log_tail(T - 1) <= limit:  # the closed form, corrected for rounding either way
        T -= 1
    while log_tail(T) > limit:
        T += 1
    return T


@dataclass(frozen=True)
class LadderMechanism:
    """The ladder mechanism with epsilon ``epsilon`` (widths supplied per release).

    Attributes
    ----------
    name : str
        ``"ladder"`` (the manifest's ``mechanism`` field).
    sensitivity : float
        1: the sensitivity of the rung score (not of the count, which has none that helps).
    scale : float
        ``2 / epsilon``: the output's weight falls by ``e`` every ``2 / epsilon`` rungs.
    rate : fractions.Fraction
        The dyadic rate per rung actually used, at most ``epsilon / 2``.
    """

    epsilon: float
    name: ClassVar[str] = "ladder"
    _rate_sk: tuple = field(default=(1, 0), init=False, repr=False, compare=False)

    def __post_init__(self):
        e = float(self.epsilon)
        if not math.isfinite(e) or e <= 0.0:
            raise ValueError(f"'epsilon' must be a finite number > 0, got {self.epsilon!r}")
        object.__setattr__(self, "epsilon", e)
        object.__setattr__(self, "_rate_sk", dyadic_rate(Fraction(e) / 2))

    @property
    def sensitivity(self) -> float:
        return 1.0

    @property
    def scale(self) -> float:
        return 2.0 / self.epsilon

    @property
    def rate(self) -> Fraction:
        s, k = self._rate_sk
        return Fraction(s, 1 << k)

    @property
    def effective_epsilon(self) -> float:
        """``2 * rate`` (rounded down to a float): the epsilon the draws give, at most ``epsilon``."""
        exact = 2 * self.rate
        f = float(exact)
        return f if Fraction(f) <= exact else math.nextafter(f, 0.0)

    # ------------------------------------------------------------------ the law
    def rung_weights(self, widths) -> np.ndarray:
        """Unnormalised mass of rungs ``0 .. len(widths)``: ``1`` and ``2 I_{t-1} exp(-rate t)``."""
        widths = np.asarray(widths, dtype=np.float64)
        t = np.arange(1, len(widths) + 1, dtype=np.float64)
        return np.concatenate([[1.0], 2.0 * widths * np.exp(-float(self.rate) * t)])

    def rung_of(self, k, q: int, widths) -> np.ndarray:
        """Rung of each output ``k`` given the true count ``q`` (``-1`` beyond the rungs listed)."""
        bounds = np.concatenate([[0], np.cumsum(np.asarray(widths, dtype=np.int64))])
        dist = np.abs(np.asarray(k, dtype=np.int64) - int(q))
        rung = np.searchsorted(bounds, dist, side="left")
        return np.where(rung < len(bounds), rung, -1)

    def pmf(self, k, q: int, widths) -> np.ndarray:
        """Probability of each output ``k`` under the law, with the mass normalised over the rungs listed
        (list :func:`rungs_needed` of them and the rest is below ``2**-60``); the reference of the tests."""
        w = self.rung_weights(widths)
        rung = self.rung_of(k, q, widths)
        out = np.exp(-float(self.rate) * np.maximum(rung, 0)) / w.sum()
        return np.where(rung >= 0, out, 0.0)

    # ------------------------------------------------------------------ sampling
    def sample(self, q: int, width: Callable, max_width: int, source: RandomSource) -> int:
        """One output of the mechanism for the true count ``q`` (exact; see the module docstring).

        Parameters
        ----------
        q : int
            The true count.
        width : callable
            ``width(t)`` gives ``I_t`` for an int64 array of rungs ``t`` (private; never published).
        max_width : int
            A public bound on every ``I_t``.
        source : RandomSource

        Returns
        -------
        int
        """
        n_max = max(1, 2 * int(max_width))
        s, k = self._rate_sk
        # batch size from the expected acceptance (float, for the batch size only)
        look = np.arange(min(rungs_needed(max(1, int(max_width)), float(2 * self.rate)), 1 << 16))
        w = self.rung_weights(np.minimum(np.asarray(width(look), dtype=np.int64), max_width)[:-1])
        p_accept = float(w.sum() * -math.expm1(-float(self.rate))) / n_max
        batch = int(min(1 << 20, 2.0 / max(p_accept, 1e-9))) + 16
        rung = None
        while rung is None:  # each round is a few whole-array draws
            stream = ByteStream(source, 16 * batch)
            t = geometric_exact(stream, s, k, batch)
            n_t = np.where(t == 0, 1, 2 * np.asarray(width(np.maximum(t - 1, 0)), dtype=np.int64))
            if (n_t > n_max).any():
                raise ValueError("a ladder width is above its declared public bound")
            ok = np.flatnonzero(source.integers(n_max, size=batch) < n_t)
            if ok.size:
                rung = int(t[ok[0]])
        if rung == 0:
            return int(q)
        widths = np.asarray(width(np.arange(rung)), dtype=np.int64)
        offset = int(widths[:-1].sum()) + 1 + int(source.integers(int(widths[-1]))[0])
        return int(q) + (offset if int(source.integers(2)[0]) == 1 else -offset)
