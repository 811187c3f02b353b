"""Degree estimates from the noisy sorted degree sequences (post-processing).

Input: the released vector ``y`` of noisy sorted degrees (supernode by supernode,
positions ascending; :mod:`aggpub.released.degree_sequences`), the law of its noise
(discrete Laplace, variance ``v_d``), the public sizes and, when the superedge
counts are released too, each supernode's consistent degree total ``r_A``
(:mod:`aggpub.estimates.counts`).

1. **Isotonic fit.** Per supernode, the least-squares non-decreasing sequence nearest
   to the noisy one (pool adjacent violators): the true sequence is sorted, so this
   only removes noise (Hay, Li, Miklau, Jensen, ICDM 2009, "constrained inference").
   All supernodes are fitted in one call of :func:`scipy.optimize.isotonic_regression`,
   each stretch lifted above the previous one so that no block pools across supernodes.
2. **Bias correction of the top.** The last value of an isotonic fit is the largest
   mean of a suffix of noisy values, biased upwards on short sequences; this inflates
   the largest degrees when there are many small supernodes. The bias is estimated by a
   parametric bootstrap (fresh noise of the released law added to the fit, refitted,
   ``R`` times; Efron, Tibshirani, *An Introduction to the Bootstrap*, 1993, chapter 10)
   and subtracted, then the sequence is refitted. ``R`` is 20 up to 100,000 people and
   falls to 2 at a million (:func:`bootstrap_replicates`, from the public number of
   people), so the step costs at most about 2 million fits of one value.
3. **Shrinkage of the tops.** Each supernode's top pooled block (``h`` values, noise
   variance about ``v_d / h``) moves toward the median top by the factor
   ``1 - (v_d / h) / tau^2`` (at least 0), with ``tau^2`` the spread of the tops across
   supernodes less their mean noise variance (method of moments; Efron, Morris, JASA 68,
   1973), never below the supernode's next block and never upward. With few supernodes
   or tops far apart (heavy tails) nothing moves.
4. **Clip and rescale.** Clipped to ``[0, N - 1]``, then each supernode's sequence is
   rescaled to its consistent degree total ``r_A`` (so the estimates and the superedge
   estimates agree on every supernode's contacts); a supernode whose fit is all zero
   gets ``r_A / m_A`` for everyone.

The bootstrap's random numbers are post-processing (they never touch private data);
they come from a generator seeded with a SHA-256 digest of the released values, so
the same release always gives the same estimates.

References
----------
M. Hay, C. Li, G. Miklau, D. Jensen, "Accurate estimation of the degree distribution
of private networks", ICDM 2009.

B. Efron, R. J. Tibshirani, "An Introduction to the Bootstrap", Chapman & Hall, 1993.

B. Efron, C. Morris, "Stein's estimation rule and its competitors: an empirical Bayes
approach", Journal of the American Statistical Association 68(341), 1973.
"""

from __future__ import annotations

__all__ = ["isotonic_by_group", "shrink_tops", "bootstrap_replicates", "fit_sorted_degrees", "degree_targets"]

import hashlib
import math

import numpy as np

#: Bootstrap replicates on small releases, and the work (replicates x people) allowed on large ones.
BOOTSTRAP_MAX = 20
BOOTSTRAP_WORK = 2_000_000


def bootstrap_replicates(n_people: int) -> int:
    """Replicates of the bias correction: 20, fewer above 100,000 people, at least 2 (public input)."""
    return int(min(BOOTSTRAP_MAX, max(2, BOOTSTRAP_WORK // max(int(n_people), 1))))


def isotonic_by_group(values, group) -> np.ndarray:
    """Least-squares non-decreasing fit of each supernode's stretch (``group`` non-decreasing)."""
    from scipy.optimize import isotonic_regression

    values = np.asarray(values, dtype=np.float64)
    if not len(values):
        return values.copy()
    span = 2.0 * float(np.abs(values).max()) + 1.0
    lift = np.asarray(group, dtype=np.float64) * span
    return isotonic_regression(values + lift).x - lift


def _runs(fit, group):
    """``(last index of each supernode, first index of its top block)``: the top block is the run of
    equal values ending at the supernode's last position."""
    last = np.flatnonzero(np.concatenate([group[1:] != group[:-1], [True]]))
    same_prev = np.concatenate([[False], (fit[1:] == fit[:-1]) & (group[1:] == group[:-1])])
    run_id = np.cumsum(~same_prev) - 1
    run_start = np.flatnonzero(~same_prev)
    top_start = run_start[run_id[last]]
    return last, top_start


def shrink_tops(fit, group, variance_d: float) -> np.ndarray:
    """Empirical-Bayes shrinkage of every supernode's top pooled block (step 3 of the module docstring)."""
    fit = np.asarray(fit, dtype=np.float64).copy()
    group = np.asarray(group)
    if not len(fit):
        return fit
    last, top_start = _runs(fit, group)
    if len(last) < 3:
        return fit
    tops = fit[last]
    h = (last - top_start + 1).astype(np.float64)
    noise = variance_d / h
    tau2 = max(float(np.var(tops)) - float(noise.mean()), 1e-9)
    lam = np.clip(1.0 - noise / tau2, 0.0, 1.0)
    med = float(np.median(tops))
    new_top = med + lam * (tops - med)
    before = np.maximum(top_start - 1, 0)
    prev = np.where((top_start > 0) & (group[before] == group[last]), fit[before], -np.inf)
    new_top = np.minimum(np.maximum(new_top, prev), tops)  # only lower a top, never below the next block
    length = last - top_start + 1
    owner = np.repeat(np.arange(len(last)), length)
    positions = np.arange(int(length.sum())) + np.repeat(top_start - (np.cumsum(length) - length), length)
    fit[positions] = new_top[owner]
    return fit


def _seeded_generator(noisy, group) -> np.random.Generator:
    h = hashlib.sha256()
    h.update(np.ascontiguousarray(noisy, dtype=np.float64).tobytes())
    h.update(np.ascontiguousarray(group, dtype=np.int64).tobytes())
    return np.random.default_rng(int.from_bytes(h.digest()[:16], "little"))


def fit_sorted_degrees(noisy, group, n_people: int, variance_d: float, *, replicates: int | None = None,
                       shrink: bool = True) -> np.ndarray:
    """Steps 1-3 and the clip of step 4: the fitted sorted degrees (before rescaling).

    Parameters
    ----------
    noisy : array of float
        The released noisy sorted degrees (``degree_noisy``), supernode by supernode.
    group : array of int
        Supernode of each entry (non-decreasing).
    n_people : int
        ``N`` (degrees lie in ``[0, N - 1]``).
    variance_d : float
        Noise variance of one entry (``2a / (1 - a)^2``).
    replicates : int, optional
        Bootstrap replicates (default :func:`bootstrap_replicates`; 0: no bias correction).
    """
    noisy = np.asarray(noisy, dtype=np.float64)
    group = np.asarray(group, dtype=np.int64)
    fit = isotonic_by_group(noisy, group)
    reps = bootstrap_replicates(len(noisy)) if replicates is None else int(replicates)
    if reps > 0 and variance_d > 0 and len(fit):
        rng = _seeded_generator(noisy, group)
        # the released law: discrete Laplace with variance v = 2a / (1 - a)^2, i.e.
        # a = (v + 1 - sqrt(2v + 1)) / v = v / (v + 1 + sqrt(2v + 1)) (the second form has no cancellation)
        v = float(variance_d)
        a = v / (v + 1.0 + math.sqrt(2.0 * v + 1.0))
        boot = np.zeros_like(fit)
        for _ in range(reps):  # a few whole-vector passes, no loop over people
            z = rng.geometric(1.0 - a, len(fit)) - rng.geometric(1.0 - a, len(fit))
            boot += isotonic_by_group(fit + z, group)
        fit = isotonic_by_group(2.0 * fit - boot / reps, group)
    if shrink and variance_d > 0:
        fit = shrink_tops(fit, group, float(variance_d))
    return np.clip(fit, 0.0, max(int(n_people) - 1, 0))


def degree_targets(fit, group, sizes, totals=None, cap: float | None = None) -> np.ndarray:
    """Step 4: each supernode's fitted sequence rescaled to its degree total ``totals[A]``.

    Without ``totals`` the fit is returned as is. A supernode whose fit sums to 0
    gives every member ``totals[A] / size[A]``. With ``cap`` (``N - 1``, the most
    contacts anyone can have) the rescaling is capped: members whose scaled value
    would pass the cap get the cap and the rest of the total is spread over the
    others in proportion to their fit (repeated until nobody passes it); what
    cannot be placed that way (every member with a positive fit at the cap) is
    shared equally by the members with a fit of 0. The sum stays the total
    whenever the total is possible (at most ``size * cap``, which the consistent
    totals are) and the order is kept.
    """
    fit = np.asarray(fit, dtype=np.float64)
    if totals is None:
        return fit.copy() if cap is None else np.minimum(fit, cap)
    group = np.asarray(group, dtype=np.int64)
    sizes = np.asarray(sizes, dtype=np.int64)
    totals = np.maximum(np.asarray(totals, dtype=np.float64), 0.0)
    n = len(sizes)
    s = np.bincount(group, weights=fit, minlength=n)
    flat = np.divide(totals, sizes, out=np.zeros(n), where=sizes > 0)
    at_cap = np.zeros(len(fit), dtype=bool)
    for _ in range(64):  # a few passes: each one caps the members the previous scale pushed over
        free = np.bincount(group, weights=np.where(at_cap, 0.0, fit), minlength=n)
        capped = 0.0 if cap is None else np.bincount(group, weights=at_cap * float(cap), minlength=n)
        factor = np.divide(np.maximum(totals - capped, 0.0), free, out=np.zeros(n), where=free > 0)
        out = np.where(at_cap, cap if cap is not None else 0.0, fit * factor[group])
        if cap is None:
            break
        over = ~at_cap & (out > cap)
        if not over.any():
            break
        at_cap |= over
    if cap is not None:
        # members with a fit of 0 take what the capped ones could not, equally (they are the lowest of their
        # supernode, so the order holds)
        free = np.bincount(group, weights=np.where(at_cap, 0.0, fit), minlength=n)
        left = totals - np.bincount(group, weights=np.minimum(out, cap), minlength=n)
        room = np.bincount(group, weights=(~at_cap) & (fit == 0), minlength=n)
        spread = np.divide(left, room, out=np.zeros(n), where=(free == 0) & (left > 0) & (room > 0))
        out = np.where(~at_cap & (fit == 0), out + spread[group], out)
    out = np.where(s[group] > 0, out, flat[group])
    return out if cap is None else np.minimum(out, cap)
