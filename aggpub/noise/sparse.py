r"""Sparse release of a large table of counts without touching every zero cell.

The target distribution is the one of the plain dense mechanism followed by a
threshold: add independent discrete Laplace noise :math:`Z` to **every** cell
of the table (zeros included), then keep only the cells whose noisy value is at
least the integer threshold :math:`\theta \ge 1`. Keeping a cell or not is a
function of the noisy table only, so the result is post-processing of an
:math:`\varepsilon`-DP release and is itself :math:`\varepsilon`-DP, with the
same epsilon and sensitivity as the dense release.

Cormode, Procopiuc, Srivastava and Tran [1]_ observe that this output can be
sampled in time and memory proportional to the non-zero cells plus the cells
kept, because every zero cell follows the same law:

* **Non-zero cells** (the engine's sparse list): noise is added and the
  threshold applied directly.
* **Zero cells** pass independently, each with probability
  :math:`p = P(Z \ge \theta) = \alpha^\theta / (1 + \alpha)` for
  :math:`\theta \ge 1` (sum of the pmf :math:`\frac{1-\alpha}{1+\alpha}\alpha^{z}`
  over :math:`z \ge \theta`). So the number that pass is
  :math:`\mathrm{Binomial}(n_0, p)` and, given that number, the passing cells are
  a uniform random subset of the zero cells [1]_. This module draws that same
  set exactly, without touching the other zero cells, in two steps:

  1. *candidates by geometric skips* [2]_: each zero cell is a candidate with
     probability :math:`1 - e^{-\lambda}`, for a dyadic rational
     :math:`\lambda` chosen so that :math:`1 - e^{-\lambda} \ge p` (checked with
     rigorous rational bounds). Walking the zero cells in order, the gap before
     the next candidate is geometric with :math:`P(\mathrm{gap} \ge g) =
     e^{-\lambda g}`, which the exact sampler of :mod:`aggpub.noise.sampler`
     draws with integer arithmetic only; positions are cumulative sums of the
     gaps (exact int64 sums);
  2. *thinning*: each candidate is kept with probability
     :math:`\rho = p / (1 - e^{-\lambda}) \le 1` (close to 1), by comparing a
     uniform revealed 64 bits at a time with rigorous rational bounds on
     :math:`\rho` that are tightened until the comparison is certain.

  Each zero cell then passes independently with probability exactly
  :math:`(1 - e^{-\lambda})\rho = p`, hence the Binomial count and the uniform
  subset. The expected number of gaps drawn is about :math:`n_0 p + 1`.
* **Values of passing zero cells** follow :math:`Z` conditioned on
  :math:`Z \ge \theta`: :math:`P(Z = \theta + j \mid Z \ge \theta) =
  (1 - \alpha)\alpha^{j}`, i.e. :math:`\theta + G` with :math:`G` geometric
  on :math:`\{0, 1, \dots\}`, :math:`P(G \ge k) = \alpha^k` (memorylessness of
  the geometric tail), drawn by the same exact geometric sampler.

The rank of a passing cell among the zero cells is turned into its position in
the whole table with one ``searchsorted`` over the sorted non-zero positions,
so the zero cells are never enumerated.

Exactness: every law above is the one of the mechanism's
:attr:`~aggpub.noise.mechanisms.GeometricMechanism.rate` (:math:`\alpha =
e^{-\mathrm{rate}}`), the same for zero and non-zero cells, and every random
decision is made from the caller's
:class:`~aggpub.noise.sampler.RandomSource` bytes (``os.urandom`` for a
release) with exact integer or rational arithmetic; no floating-point value
enters a decision (floats only size the batches). Nothing is truncated: a
passing zero cell can take any value :math:`\ge \theta`, and a gap longer than
the table simply ends the walk. Tables are limited to :math:`2^{53} - 1` cells
(positions and cumulative sums stay far inside int64).

References
----------
.. [1] G. Cormode, C. Procopiuc, D. Srivastava, T. T. L. Tran, "Differentially
   private summaries for sparse data", Proceedings of the 15th International
   Conference on Database Theory (ICDT), 2012.
.. [2] L. Devroye, "Non-Uniform Random Variate Generation", Springer, 1986
   (sequential sampling with geometric jumps; citation recalled from memory).
.. [3] A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally
   utility-maximizing privacy mechanisms", STOC 2009 (the discrete Laplace pmf).
"""

from __future__ import annotations

__all__ = ["SparseCells", "pass_probability", "default_threshold", "sparse_threshold_release",
           "choose_method", "flat_to_pair", "MAX_CELLS"]

import functools
import math
from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from .mechanisms import GeometricMechanism
from .sampler import (
    MIN_RATE,
    RandomSource,
    bernoulli_bounded,
    ByteStream,
    exp_neg_bounds,
    geometric_exact,
    one_minus_exp_neg_bounds,
    dyadic_rate,
)

#: Largest table handled: positions must be exact integers in binary64.
MAX_CELLS = 2 ** 53 - 1
_MIN_BATCH = 256


@dataclass
class SparseCells:
    """The kept cells of a sparse release: flat positions (sorted) and noisy values (all ``>= threshold``)."""

    flat: np.ndarray
    value: np.ndarray
    threshold: int
    n_cells: int
    n_zero_kept: int


def pass_probability(threshold: int, log_alpha: float) -> float:
    r""":math:`P(Z \ge \theta) = \alpha^\theta / (1 + \alpha)` for discrete Laplace :math:`Z`, :math:`\theta \ge 1`."""
    if threshold < 1:
        raise ValueError(f"'threshold' must be an integer >= 1, got {threshold!r}")
    return math.exp(threshold * log_alpha) / (1.0 + math.exp(log_alpha))


def default_threshold(n_cells: int, n_groups: int, log_alpha: float) -> int:
    r"""The default threshold: smallest integer :math:`\theta \ge 1` with
    :math:`N \cdot P(Z \ge \theta) \le n`.

    ``N`` is the number of cells and ``n`` the number of supernodes, both
    public, so the choice does not depend on private data (a threshold tuned to
    the true number of non-zero cells would itself leak). The expected number of
    zero cells kept by chance is then at most ``n``, about one per supernode:
    of the order of the non-zero cells of a sparse contact table (each
    supernode meeting a few others), and never of the order of ``N``. Smaller
    thresholds keep more true cells and more false ones; set
    ``components.superedge_counts.sparse_threshold`` to choose.
    """
    if n_cells <= 0:
        return 1
    target = max(int(n_groups), 1) / n_cells
    log_p1 = log_alpha - math.log1p(math.exp(log_alpha))  # log P(Z >= 1)
    if log_p1 <= math.log(target):
        return 1
    # log P(Z >= t) = log_p1 + (t - 1) log_alpha <= log(target)
    t = 1 + math.ceil((math.log(target) - log_p1) / log_alpha)
    while t > 1 and n_cells * pass_probability(t - 1, log_alpha) <= n_groups:
        t -= 1
    while n_cells * pass_probability(t, log_alpha) > n_groups:
        t += 1
    return int(t)


def choose_method(method: str, n_cells: int, sparse_above_cells: int) -> str:
    """``"dense"`` or ``"sparse"`` from the policy's ``method`` (``auto`` switches at ``sparse_above_cells``)."""
    if method == "auto":
        return "sparse" if n_cells >= sparse_above_cells else "dense"
    if method not in ("dense", "sparse"):
        raise ValueError(f"'method' must be auto, dense or sparse, got {method!r}")
    return method


def flat_to_pair(flat, n: int):
    """Inverse of :func:`aggpub.components.cell_index`: flat upper-triangle positions -> ``(a, b)``, ``a <= b``."""
    flat = np.asarray(flat, dtype=np.int64)
    rows = np.arange(n, dtype=np.int64)
    starts = rows * n - (rows * (rows - 1)) // 2
    a = np.searchsorted(starts, flat, side="right") - 1
    b = flat - starts[a] + a
    return a.astype(np.int64), b.astype(np.int64)


@functools.lru_cache(maxsize=256)
def _pass_probability_bounds(threshold: int, s: int, k: int, bits: int) -> tuple[Fraction, Fraction]:
    r"""Rigorous rational bounds on :math:`p = P(Z \ge \theta) = a^\theta / (1 + a)`, :math:`a = e^{-s/2^k}`.

    This is the pass probability of a zero cell under the law the sampler
    actually draws (the mechanism's :attr:`~aggpub.noise.mechanisms.GeometricMechanism.rate`),
    so that zero and non-zero cells see the same noise law.
    """
    rate = Fraction(s, 1 << k)
    top_lo, top_hi = exp_neg_bounds(threshold * rate, bits + 4)
    a_lo, a_hi = exp_neg_bounds(rate, bits + 4)
    return top_lo / (1 + a_hi), top_hi / (1 + a_lo)


@functools.lru_cache(maxsize=64)
def _candidate_rate(threshold: int, s: int, k: int, bounds_fn) -> tuple[int, int]:
    """A dyadic ``lam = s / 2**k >= MIN_RATE`` with ``1 - exp(-lam) >= p`` for sure.

    ``p`` is bounded by ``bounds_fn(threshold, s, k, bits)`` (passed explicitly
    so that the cache never mixes bound functions).

    Starts just above ``-log(1 - p)`` (binary64) and steps up by ``2**-k`` until
    the rigorous bounds confirm it; the thinning factor ``p / (1 - exp(-lam))``
    is then at most 1 and, for ``lam`` near its target, close to 1.
    """
    _, p_hi = bounds_fn(threshold, s, k, 64)
    guess = -math.log1p(-min(float(p_hi), 0.75)) * (1.0 + 2.0 ** -30)
    lam_s, lam_k = dyadic_rate(max(Fraction(guess), MIN_RATE))
    while one_minus_exp_neg_bounds(Fraction(lam_s, 1 << lam_k), 64)[0] < p_hi:
        lam_s += 1
    return lam_s, lam_k


@dataclass(frozen=True)
class _ZeroCellLaw:
    """What decides a zero cell's fate: the threshold and the sampled rate ``s / 2**k``."""

    threshold: int
    s: int
    k: int


def _zero_cell_ranks(n_zero: int, law: _ZeroCellLaw, source: RandomSource) -> np.ndarray:
    r"""Ranks (0-based, increasing) of the zero cells that pass: each independently with probability ``p``.

    ``p = P(Z >= threshold)`` for the discrete Laplace law with
    :math:`a = e^{-s/2^k}` (``law``).  Exact, in two steps:

    1. *Candidates*: each zero cell is a candidate independently with
       probability :math:`1 - e^{-\lambda}` for a dyadic :math:`\lambda` chosen
       with :math:`1 - e^{-\lambda} \ge p` (:func:`_candidate_rate`).  The gap
       before the next candidate is then geometric with
       :math:`P(\mathrm{gap} \ge g) = e^{-\lambda g}`, a rate of the form the exact
       sampler draws (:func:`aggpub.noise.sampler.geometric_exact`), so the
       candidates are walked with exact skips.
    2. *Thinning*: each candidate is kept with probability
       :math:`\rho = p / (1 - e^{-\lambda}) \le 1`, by an exact Bernoulli
       against rigorous rational bounds on :math:`\rho`
       (:func:`aggpub.noise.sampler.bernoulli_bounded`).

    A cell passes with probability :math:`(1 - e^{-\lambda})\rho = p`,
    independently of the others (independent thinning of independent
    Bernoulli trials).
    """
    if n_zero == 0:
        return np.empty(0, dtype=np.int64)
    threshold, s, k = law.threshold, law.s, law.k
    bounds_fn = _pass_probability_bounds
    p_bounds = lambda bits: bounds_fn(threshold, s, k, bits)  # noqa: E731
    lam_s, lam_k = _candidate_rate(threshold, s, k, bounds_fn)
    lam = Fraction(lam_s, 1 << lam_k)
    q_bounds = lambda bits: one_minus_exp_neg_bounds(lam, bits)  # noqa: E731

    def rho_bounds(bits):
        p_lo, p_hi = p_bounds(bits + 8)
        q_lo, q_hi = q_bounds(bits + 8)
        return p_lo / q_hi, min(Fraction(1), p_hi / q_lo)

    p_candidate = -math.expm1(-float(lam))
    stream = ByteStream(source, 4096)
    out = []
    pos = -1  # rank of the last candidate found so far
    while True:
        expected_left = (n_zero - 1 - pos) * p_candidate
        m = int(min(max(_MIN_BATCH, 1.1 * expected_left + 6.0 * math.sqrt(expected_left + 1.0)), 1 << 22,
                    n_zero - pos))  # never more gaps than the cells left, plus one to leave the table
        steps = geometric_exact(stream, lam_s, lam_k, m, cap=n_zero) + 1  # any gap >= n_zero ends the walk
        # Exact int64 cumulative sums on a prefix that provably stays far from overflow: cut at the
        # first step where the (float, relative error < 2**-30) running sum passes 2 * n_zero + 2.
        cut = int(np.searchsorted(np.cumsum(steps, dtype=np.float64), 2.0 * n_zero + 2.0, side="left"))
        ranks = pos + np.cumsum(steps[:cut + 1])
        n_in = int(np.count_nonzero(ranks < n_zero))  # ranks increase, so the inside ones are a prefix
        if n_in == ranks.size < m:  # the float cut is off by more than its proven error: cannot happen
            raise RuntimeError("skip walk: prefix cut before leaving the table")
        out.append(ranks[:n_in])
        if n_in < m:
            break
        pos = int(ranks[-1])
    candidates = np.concatenate(out) if len(out) > 1 else out[0]
    keep = bernoulli_bounded(stream, rho_bounds, candidates.size)
    return candidates[keep]


def _zero_cell_values(threshold: int, rate: tuple[int, int], count: int, source: RandomSource) -> np.ndarray:
    """Values of passing zero cells: ``threshold + G``, ``G`` exactly geometric, ``P(G >= j) = a**j``."""
    s, k = rate
    return threshold + geometric_exact(ByteStream(source, 64 * max(count, 1)), s, k, count)


def sparse_threshold_release(nz_flat, nz_count, n_cells: int, mechanism: GeometricMechanism, threshold: int,
                             source: RandomSource) -> SparseCells:
    r"""Noisy table, thresholded at ``threshold``, sampled from the non-zero cells only.

    Same distribution as: ``noisy = count + Z`` on all ``n_cells`` cells (zeros
    included, ``Z`` discrete Laplace of ``mechanism``), keep cells with
    ``noisy >= threshold``. See the module docstring for the method [1]_.

    Parameters
    ----------
    nz_flat : array_like of int
        Flat positions (``0 <= . < n_cells``, distinct) of the cells whose true count is not zero.
    nz_count : array_like of int
        Their true counts (non-zero).
    n_cells : int
        Number of cells in the whole table (public).
    mechanism : GeometricMechanism
        The noise law (epsilon and sensitivity).
    threshold : int
        Keep cells with noisy value ``>= threshold``; integer ``>= 1``.
    source : RandomSource

    Returns
    -------
    SparseCells
        Inputs already validated by the caller except where noted; memory and
        time grow with ``len(nz_flat)`` plus the number of cells kept.

    References
    ----------
    .. [1] G. Cormode, C. Procopiuc, D. Srivastava, T. T. L. Tran, "Differentially
       private summaries for sparse data", ICDT 2012.
    """
    threshold = int(threshold)
    if threshold < 1:
        raise ValueError(f"'threshold' must be an integer >= 1, got {threshold}")
    n_cells = int(n_cells)
    if not (0 <= n_cells <= MAX_CELLS):
        raise ValueError(f"'n_cells' must be between 0 and 2**53 - 1, got {n_cells}")
    nz_flat = np.asarray(nz_flat, dtype=np.int64)
    nz_count = np.asarray(nz_count, dtype=np.int64)
    order = np.argsort(nz_flat, kind="stable")
    nz_flat, nz_count = nz_flat[order], nz_count[order]
    if len(nz_flat) and (nz_flat[0] < 0 or nz_flat[-1] >= n_cells or bool(np.any(np.diff(nz_flat) == 0))):
        raise ValueError("'nz_flat' must hold distinct positions in [0, n_cells)")

    # Non-zero cells: the plain mechanism, then the threshold.
    noisy = mechanism.randomise(nz_count, source)
    keep = noisy >= threshold
    kept_flat, kept_value = nz_flat[keep], noisy[keep]

    # Zero cells: exact independent Bernoulli(p) selection (candidates by exact geometric skips, then
    # exact thinning), values from the conditional tail; all under the rate the sampler draws.
    n_zero = n_cells - len(nz_flat)
    rate = mechanism.rate
    rate_sk = (rate.numerator, rate.denominator.bit_length() - 1)
    ranks = _zero_cell_ranks(n_zero, _ZeroCellLaw(threshold, *rate_sk), source)
    k = len(ranks)
    if k:
        zeros_before = nz_flat - np.arange(len(nz_flat), dtype=np.int64)  # zero cells before each non-zero cell
        zero_flat = ranks + np.searchsorted(zeros_before, ranks, side="right")
        zero_value = _zero_cell_values(threshold, rate_sk, k, source)
        flat = np.concatenate([kept_flat, zero_flat])
        value = np.concatenate([kept_value, zero_value])
        order = np.argsort(flat, kind="stable")
        flat, value = flat[order], value[order]
    else:
        flat, value = kept_flat, kept_value
    return SparseCells(flat=flat, value=value.astype(np.int64), threshold=threshold, n_cells=n_cells,
                       n_zero_kept=k)
