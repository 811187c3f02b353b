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

Sampling (:meth:`LadderMechanism.sample`) uses three uniforms of a
:class:`~aggpub.noise.sampler.RandomSource`: the rung by inversion of the cumulative
rung weights (Devroye, *Non-Uniform Random Variate Generation*, 1986, section III.2;
citation recalled from memory), the distance inside the rung as
``B_{t-1} + 1 + floor(u * I_{t-1})``, and the sign by ``u < 1/2``. Rungs are
enumerated up to :func:`rungs_needed`, a number computed from public values only
(the largest possible width and epsilon) beyond which the left-out mass is below
``2^-60`` of the total: the output law differs from the ideal one by at most that in
total variation, below the ``2^-52`` grid of the uniforms (the same floating-point
caveat as the discrete Laplace sampler, ``docs/privacy.md`` section 2).

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
from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from .sampler import RandomSource

#: The rungs left out carry at most ``2**-TAIL_BITS`` of the mass.
TAIL_BITS = 60


def rungs_needed(max_width: int, epsilon: float) -> int:
    """Rungs to enumerate so that the rest carries at most ``2**-60`` of the mass (public inputs only).

    Every rung ``t > T`` holds at most ``2 * max_width`` values of weight
    ``exp(-epsilon t / 2)``: the mass beyond ``T`` is at most
    ``2 max_width exp(-epsilon (T + 1) / 2) / (1 - exp(-epsilon / 2))``, and the total
    is at least 1 (rung 0). ``T`` is the smallest integer making that bound at most
    ``2**-60``.

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
    """

    epsilon: float
    name: ClassVar[str] = "ladder"

    def __post_init__(self):
        e = float(self.epsilon)
        if not math.isfinite(e) or e <= 0.0:
            raise ValueError(f"'epsilon' must be a finite number > 0, got {self.epsilon!r}")
        object.__setattr__(self, "epsilon", e)

    @property
    def sensitivity(self) -> float:
        return 1.0

    @property
    def scale(self) -> float:
        return 2.0 / self.epsilon

    # ------------------------------------------------------------------ the law
    def rung_weights(self, widths) -> np.ndarray:
        """Unnormalised mass of rungs ``0 .. len(widths)``: ``1`` and ``2 I_{t-1} exp(-epsilon t / 2)``."""
        widths = np.asarray(widths, dtype=np.float64)
        t = np.arange(1, len(widths) + 1, dtype=np.float64)
        return np.concatenate([[1.0], 2.0 * widths * np.exp(-self.epsilon * t / 2.0)])

    def rung_of(self, k, q: int, widths) -> np.ndarray:
        """Rung of each output ``k`` given the true count ``q`` (``-1`` beyond the enumerated rungs)."""
        bounds = np.concatenate([[0], np.cumsum(np.asarray(widths, dtype=np.int64))])
        dist = np.abs(np.asarray(k, dtype=np.int64) - int(q))
        rung = np.searchsorted(bounds, dist, side="left")
        return np.where(rung < len(bounds), rung, -1)

    def pmf(self, k, q: int, widths) -> np.ndarray:
        """Exact probability of each output ``k`` under the (enumerated) law; the reference of the tests."""
        w = self.rung_weights(widths)
        rung = self.rung_of(k, q, widths)
        out = np.exp(-self.epsilon * np.maximum(rung, 0) / 2.0) / w.sum()
        return np.where(rung >= 0, out, 0.0)

    # ------------------------------------------------------------------ sampling
    def sample(self, q: int, widths, source: RandomSource) -> int:
        """One output of the mechanism for true count ``q`` and the private ``widths`` (never published).

        Parameters
        ----------
        q : int
            The true count.
        widths : array_like of int
            ``I_0 .. I_{T-1}`` with ``T`` from :func:`rungs_needed` (public inputs).
        source : RandomSource

        Returns
        -------
        int
        """
        widths = np.asarray(widths, dtype=np.int64)
        if (widths < 0).any():
            raise ValueError("ladder widths must be non-negative")
        u = source.uniform(3)
        w = self.rung_weights(widths)
        cum = np.cumsum(w)
        rung = int(np.searchsorted(cum, u[0] * cum[-1], side="right"))
        rung = min(rung, len(w) - 1)
        while rung > 0 and widths[rung - 1] == 0:  # a rung of no values has no weight; only rounding lands here
            rung -= 1
        if rung == 0:
            return int(q)
        start = int(widths[: rung - 1].sum())
        offset = start + 1 + min(int(u[1] * widths[rung - 1]), int(widths[rung - 1]) - 1)
        return int(q) + (offset if u[2] < 0.5 else -offset)
