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
  set with *geometric skips* [2]_: walking the zero cells in order, the gap
  before the next passing cell is :math:`\mathrm{Geometric}(p)` (failures before
  a success), so the positions of the passing cells are cumulative sums of
  independent gaps. This is exactly independent Bernoulli(p) selection of each
  zero cell, hence the Binomial count and the uniform subset hold by
  construction, with no rejection loop and no separate binomial sampler (exact
  binomial sampling from uniforms is much harder than a geometric by
  inversion). The expected number of draws is :math:`n_0 p + 1`.
* **Values of passing zero cells** follow :math:`Z` conditioned on
  :math:`Z \ge \theta`: :math:`P(Z = \theta + j \mid Z \ge \theta) =
  (1 - \alpha)\alpha^{j}`, i.e. :math:`\theta + G` with :math:`G` geometric
  on :math:`\{0, 1, \dots\}`, :math:`P(G \ge k) = \alpha^k` (memorylessness of
  the geometric tail).

The rank of a passing cell among the zero cells is turned into its position in
the whole table with one ``searchsorted`` over the sorted non-zero positions,
so the zero cells are never enumerated.

Randomness: every draw is a uniform of the caller's
:class:`~aggpub.noise.sampler.RandomSource` (``os.urandom`` for a release),
turned into geometrics by inversion, :math:`\lfloor \log U / \log q \rfloor`,
exactly as in :func:`aggpub.noise.sampler.sample_discrete_laplace`; no
pseudo-random generator is seeded from the source. The floating-point caveats
of that sampler apply unchanged (events of probability below about
:math:`2^{-52}` are truncated). The gaps are computed in binary64, which is
exact for integer positions below :math:`2^{53}`; tables above that are
refused. When :math:`p` underflows to 0 (below about :math:`10^{-308}`), no
zero cell is kept.

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

import math
from dataclasses import dataclass

import numpy as np

from .mechanisms import GeometricMechanism
from .sampler import RandomSource, _geometric_chunk

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


def _zero_cell_ranks(n_zero: int, p: float, source: RandomSource) -> np.ndarray:
    """Ranks (0-based, increasing) of the zero cells that pass: each independently with probability ``p``.

    Geometric skips: gap = failures before the next success, ``floor(log U / log(1 - p))``.
    """
    if n_zero == 0 or p <= 0.0:
        return np.empty(0, dtype=np.int64)
    log_q = math.log1p(-p)  # < 0 since 0 < p < 1/2 (log1p keeps it accurate for tiny p)
    out = []
    pos = -1.0  # rank of the last passing cell found so far
    limit = float(n_zero)
    while True:
        expected_left = (limit - pos) * p
        m = int(min(max(_MIN_BATCH, 1.1 * expected_left + 6.0 * math.sqrt(expected_left + 1.0)), 1 << 22))
        u = source.uniform(m)
        u = np.asarray(u, dtype=np.float64)
        if u.shape != (m,) or not bool(np.all((u > 0.0) & (u < 1.0))):
            raise RuntimeError(f"{type(source).__name__}.uniform returned values outside the open interval (0, 1)")
        gaps = np.floor(np.log(u) / log_q)
        np.minimum(gaps, limit, out=gaps)  # any gap >= n_zero ends the walk; keeps sums finite and exact
        gaps += 1.0
        ranks = pos + np.cumsum(gaps)
        inside = ranks < limit
        n_in = int(np.count_nonzero(inside))  # ranks increase, so the inside ones are a prefix
        out.append(ranks[:n_in].astype(np.int64))
        if n_in < m:
            break
        pos = float(ranks[-1])
    return np.concatenate(out) if len(out) > 1 else out[0]


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

    # Zero cells: independent Bernoulli(p) selection by geometric skips, values from the conditional tail.
    n_zero = n_cells - len(nz_flat)
    p = pass_probability(threshold, mechanism.log_alpha)
    ranks = _zero_cell_ranks(n_zero, p, source)
    k = len(ranks)
    if k:
        zeros_before = nz_flat - np.arange(len(nz_flat), dtype=np.int64)  # zero cells before each non-zero cell
        zero_flat = ranks + np.searchsorted(zeros_before, ranks, side="right")
        zero_value = threshold + _geometric_chunk(mechanism.log_alpha, k, source)
        flat = np.concatenate([kept_flat, zero_flat])
        value = np.concatenate([kept_value, zero_value])
        order = np.argsort(flat, kind="stable")
        flat, value = flat[order], value[order]
    else:
        flat, value = kept_flat, kept_value
    return SparseCells(flat=flat, value=value.astype(np.int64), threshold=threshold, n_cells=n_cells,
                       n_zero_kept=k)
