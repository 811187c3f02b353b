"""The researcher view of a release: error bars, the supergraph, synthetic networks.

Everything here is post-processing of the public outputs (a bundle read with
:func:`aggpub.read_bundle`, or an in-memory :class:`aggpub.Release`): it reads
only the released tables and manifest, never the true network, so it costs no
privacy budget and may be seeded freely.

* :func:`interval` -- a confidence interval for any sum of superedge cells,
  from the exact law of a sum of independent discrete Laplace draws.
* :func:`supergraph` -- the release as a :class:`networkx.Graph` of supernodes.
* :func:`sample_network` -- synthetic person-level networks consistent with the
  release: every superedge cell gets exactly its released number of distinct
  contacts, drawn uniformly among the cell's possible pairs (the block-model
  sampling used to measure utility in Hay et al. 2008).

References
----------
M. Hay, G. Miklau, D. Jensen, D. Towsley, P. Weis, "Resisting structural
re-identification in anonymized social networks", PVLDB 1(1), 2008.

A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally utility-maximizing
privacy mechanisms", STOC 2009.
"""

from __future__ import annotations

__all__ = ["SumInterval", "interval", "cell_mask", "supergraph", "sample_network", "synthetic_people",
           "sum_noise_pmf", "write_sample"]

import json
import math
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa

from .errors import BundleError, OutputError, UsageError

#: Largest FFT grid used for the exact law of a sum (beyond it: normal approximation).
MAX_EXACT_GRID = 1 << 22

CLAMP_NOTE = ("released counts were clamped to [0, possible pairs] after the noise was added; for cells whose "
              "true count is within a few noise scales of 0 (or of the number of possible pairs) the released "
              "value is biased and this interval is only approximate")

UNCLAMPED_NOTE = ("summed the unclamped noisy counts (edge_count_unclamped): true counts plus independent "
                  "zero-mean noise, so the estimate is unbiased and the interval holds for the noise exactly")


# --------------------------------------------------------------------------- access to the public tables


def _public_tables(release):
    """``(supernodes, superedges, manifest)`` of a Bundle or a Release (or any object with ``tables``)."""
    tables = getattr(release, "tables", None)
    manifest = getattr(release, "manifest", None)
    if not isinstance(tables, dict) or not isinstance(manifest, dict):
        raise UsageError(f"expected a Bundle (aggpub.read_bundle) or a Release, got {type(release).__name__}")
    supernodes = tables.get("supernodes")
    if supernodes is None:
        raise BundleError("the release has no supernodes table")
    return supernodes, tables.get("superedges"), manifest


def _superedges(release):
    supernodes, superedges, manifest = _public_tables(release)
    if superedges is None:
        raise BundleError("the release has no superedge counts (components.superedge_counts was disabled)")
    return supernodes, superedges, manifest


def _col(table: pa.Table, name: str, dtype=np.int64) -> np.ndarray:
    if name not in table.column_names:
        raise BundleError(f"superedges table: missing column '{name}'")
    return np.asarray(table.column(name).to_numpy(), dtype=dtype)


# --------------------------------------------------------------------------- intervals


def _alpha_terms(scale: float):
    """``alpha`` and ``1 - alpha`` for noise scale ``scale`` (``alpha = exp(-1/scale)``), accurate near 1."""
    return math.exp(-1.0 / scale), -math.expm1(-1.0 / scale)


def _variance(scale: float) -> float:
    a, one_minus_a = _alpha_terms(scale)
    return 2.0 * a / one_minus_a ** 2


def sum_noise_pmf(scales, counts=None, *, max_grid: int = MAX_EXACT_GRID):
    r"""Exact law of a sum of independent discrete Laplace draws.

    The sum of ``counts[i]`` draws of scale ``scales[i]`` (``alpha = exp(-1/scale)``)
    has characteristic function

    .. math:: \varphi(t) = \prod_i \left(\frac{(1-\alpha_i)^2}
              {1 - 2\alpha_i\cos t + \alpha_i^2}\right)^{m_i},

    since one draw is the difference of two geometric variables with generating
    function :math:`(1-\alpha)/(1-\alpha z)`. The pmf is recovered on a grid of
    ``N`` integers by an inverse real FFT of :math:`\varphi` at the ``N``-th roots
    of unity; ``N`` is chosen so that the mass beyond ``N/2`` (which would alias)
    is far below double precision (12 standard deviations plus 50 of the largest
    scale). The cost does not grow with the number of draws.

    Parameters
    ----------
    scales : array_like of float
        Noise scale of each group of draws.
    counts : array_like of int, optional
        Number of draws of each scale (default one each).
    max_grid : int
        Refuse (return ``None``) when the grid would be larger.

    Returns
    -------
    pmf : numpy.ndarray or None
        ``pmf[k]`` is ``P(S = k)`` for ``k = 0 .. N/2 - 1``; by symmetry
        ``P(S = -k) = P(S = k)``. ``None`` when the grid would exceed ``max_grid``.
    """
    scales = np.atleast_1d(np.asarray(scales, dtype=np.float64))
    counts = np.ones(len(scales), dtype=np.int64) if counts is None else \
        np.atleast_1d(np.asarray(counts, dtype=np.int64))
    if len(scales) != len(counts) or (scales <= 0).any() or not np.isfinite(scales).all() or (counts < 0).any():
        raise ValueError("'scales' must be finite and > 0 and 'counts' non-negative, of the same length")
    keep = counts > 0
    scales, counts = scales[keep], counts[keep]
    if not len(scales):
        return np.ones(1)
    sd = math.sqrt(sum(m * _variance(s) for s, m in zip(scales, counts)))
    half = int(math.ceil(12.0 * sd + 50.0 * scales.max())) + 2
    n = 1 << max(4, (2 * half).bit_length())
    if n > max_grid:
        return None
    t = 2.0 * np.pi * np.arange(n // 2 + 1) / n
    log_phi = np.zeros(len(t))
    for s, m in zip(scales, counts):
        a, one_minus_a = _alpha_terms(float(s))
        # 1 - 2a cos t + a^2 = (1-a)^2 + 2a(1 - cos t) = (1-a)^2 + 4a sin^2(t/2), no cancellation.
        denom = one_minus_a ** 2 + 4.0 * a * np.sin(t / 2.0) ** 2
        log_phi += float(m) * (2.0 * math.log(one_minus_a) - np.log(denom))
    pmf = np.fft.irfft(np.exp(log_phi), n=n)
    return np.clip(pmf[: n // 2], 0.0, None)


def _exact_half_width(pmf: np.ndarray, confidence: float) -> int:
    """Smallest ``t`` with ``P(|S| <= t) >= confidence`` for a symmetric pmf on ``0..``."""
    cover = np.cumsum(np.concatenate([pmf[:1], 2.0 * pmf[1:]]))
    idx = int(np.searchsorted(cover, confidence - 1e-12, side="left"))
    return min(idx, len(pmf) - 1)


@dataclass(frozen=True)
class SumInterval:
    """A confidence interval for the true value of a sum of superedge cells.

    Attributes
    ----------
    estimate : int
        Sum of the released (noisy, clamped) counts of the cells.
    low, high : int
        Interval for the true sum: ``estimate -/+ half_width``, cut to ``[0, possible pairs]``.
    half_width : int
        Smallest ``t`` with ``P(|noise sum| <= t) >= confidence``.
    confidence : float
    cells : int
        Number of released cells summed.
    omitted_cells : int
        Requested cells absent from a sparse release (counted as 0; their thresholding is not covered).
    method : str
        ``"exact"`` (characteristic function and inverse FFT) or ``"normal"`` (central limit approximation).
    note : str
        What the interval does not account for.
    """

    estimate: int
    low: int
    high: int
    half_width: int
    confidence: float
    cells: int
    omitted_cells: int
    method: str
    note: str

    def as_dict(self) -> dict:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}


def _select_rows(superedges: pa.Table, n_supernodes: int, cells, sparse: bool):
    """Row positions of the requested cells, and how many requested cells are absent (sparse only)."""
    rows = superedges.num_rows
    arr = cells
    if isinstance(cells, pa.ChunkedArray) or isinstance(cells, pa.Array):
        arr = cells.to_numpy(zero_copy_only=False)
    arr = np.asarray(arr)
    if arr.dtype == np.bool_:
        if arr.shape != (rows,):
            raise UsageError(f"'cells': a boolean mask must have one entry per superedge row ({rows}), "
                             f"got shape {arr.shape}")
        return np.flatnonzero(arr), 0
    if arr.ndim == 1 and (arr.size == 0 or np.issubdtype(arr.dtype, np.integer)):
        arr = arr.astype(np.int64)
        if arr.size and (arr.min() < 0 or arr.max() >= rows):
            raise UsageError(f"'cells': row positions must lie in 0..{rows - 1}")
        if len(np.unique(arr)) != len(arr):
            raise UsageError("'cells': a row position is listed twice")
        return arr, 0
    if arr.ndim == 2 and arr.shape[1] == 2 and np.issubdtype(arr.dtype, np.integer):
        a = np.minimum(arr[:, 0], arr[:, 1]).astype(np.int64)
        b = np.maximum(arr[:, 0], arr[:, 1]).astype(np.int64)
        if a.size and (a.min() < 0 or b.max() >= n_supernodes):
            raise UsageError(f"'cells': supernode ids must lie in 0..{n_supernodes - 1}")
        want = a * n_supernodes + b
        if len(np.unique(want)) != len(want):
            raise UsageError("'cells': a supernode pair is listed twice")
        ta = _col(superedges, "supernode_a")
        tb = _col(superedges, "supernode_b")
        if not sparse and len(ta) == n_supernodes * (n_supernodes + 1) // 2:
            from .cells import all_cells, cell_index

            ca, cb = all_cells(n_supernodes)
            if np.array_equal(ca, ta) and np.array_equal(cb, tb):  # the dense release's own order
                return cell_index(a, b, n_supernodes), 0
        have = ta * n_supernodes + tb
        order = np.argsort(have, kind="stable")
        pos = np.searchsorted(have[order], want)
        pos = np.minimum(pos, max(len(have) - 1, 0))
        found = (have[order][pos] == want) if len(have) else np.zeros(len(want), bool)
        missing = int((~found).sum())
        if missing and not sparse:
            raise BundleError(f"{missing} requested cell(s) are missing from a dense release")
        return order[pos[found]], missing
    raise UsageError("'cells' must be a boolean mask over the superedge rows, an array of row positions, "
                     "or an (m, 2) integer array of supernode pairs")


def interval(release, cells, confidence: float = 0.95, *, method: str = "auto") -> SumInterval:
    r"""Confidence interval for the true sum of some superedge cells.

    The noise on each released cell is an independent discrete Laplace draw of
    the cell's ``noise_scale`` (``alpha = exp(-1/scale)``, variance
    :math:`2\alpha/(1-\alpha)^2`). The noise of the sum therefore has the law
    of a sum of independent discrete Laplace draws, which is symmetric about 0;
    the interval is ``estimate -/+ t`` with ``t`` the smallest integer such that
    ``P(|noise sum| <= t) >= confidence``, cut to the feasible range
    ``[0, total possible pairs]``.

    ``method="exact"`` computes that law exactly (up to double rounding) by
    inverting its characteristic function with an FFT (:func:`sum_noise_pmf`);
    its cost does not depend on the number of cells. ``method="normal"`` uses
    the central limit approximation, variance :math:`\sum 2\alpha/(1-\alpha)^2`.
    ``"auto"`` (default) uses the exact law unless its grid would exceed
    :data:`MAX_EXACT_GRID` points (very large noise scales), then the normal one.

    Clamping makes the interval approximate: the release clamps each noisy count
    to ``[0, possible pairs]``. For cells whose true count is far from those
    bounds this changes nothing; for tiny cells (true count within a few noise
    scales of 0) the released value is biased upward, so a sum over many tiny
    cells is biased and the interval can miss. ``SumInterval.note`` says so.

    Parameters
    ----------
    release : Bundle or Release
    cells : array_like
        A boolean mask over the rows of the superedges table, an array of row
        positions, or an ``(m, 2)`` integer array of supernode pairs (either
        order). See also :func:`cell_mask`.
    confidence : float, default 0.95
    method : {"auto", "exact", "normal"}

    Returns
    -------
    SumInterval

    References
    ----------
    A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally utility-maximizing
    privacy mechanisms", STOC 2009 (the geometric mechanism and its pmf).
    """
    if isinstance(confidence, bool) or not isinstance(confidence, (int, float)) or not 0 < confidence < 1:
        raise UsageError(f"'confidence' must be a number in (0, 1), got {confidence!r}")
    if method not in ("auto", "exact", "normal"):
        raise UsageError(f"'method' must be 'auto', 'exact' or 'normal', got {method!r}")
    supernodes, superedges, manifest = _superedges(release)
    sparse = bool(manifest.get("superedges_sparse", False))
    rows, omitted = _select_rows(superedges, supernodes.num_rows, cells, sparse)
    # Sum the unclamped noisy counts when the bundle has them: clamping at zero biases sums upwards,
    # the unclamped values are unbiased (true count + zero-mean noise), so the interval is exact for them.
    column = "edge_count_unclamped" if "edge_count_unclamped" in superedges.column_names else "edge_count"
    count = _col(superedges, column)[rows]
    cap = _col(superedges, "possible_pairs")[rows]
    scale = _col(superedges, "noise_scale", np.float64)[rows]
    estimate = int(count.sum())
    uniq, per = np.unique(scale, return_counts=True) if len(scale) else (np.empty(0), np.empty(0, np.int64))
    used = method
    half = 0
    if len(rows):
        pmf = None
        if method in ("auto", "exact"):
            pmf = sum_noise_pmf(uniq, per, max_grid=MAX_EXACT_GRID if method == "auto" else 1 << 28)
            if pmf is None and method == "exact":  # pragma: no cover - needs scales of many thousands
                raise UsageError("'method' = 'exact': the noise is too wide for the exact grid; use 'normal'")
        if pmf is not None:
            half, used = _exact_half_width(pmf, confidence), "exact"
        else:
            from scipy.stats import norm

            sd = math.sqrt(float(sum(m * _variance(float(s)) for s, m in zip(uniq, per))))
            half, used = int(math.ceil(norm.ppf(0.5 + confidence / 2.0) * sd)), "normal"
    else:
        used = "exact"
    note = CLAMP_NOTE if column == "edge_count" else UNCLAMPED_NOTE
    if sparse:
        note += ("; in a sparse release the listed cells were kept because their noisy count reached the "
                 "threshold, which biases small kept cells upward")
    if omitted:
        note += f"; {omitted} requested cell(s) are absent from this sparse release and counted as 0 " \
                "(the sparse threshold is not covered by the interval)"
    return SumInterval(estimate=estimate, low=max(0, estimate - half), high=min(int(cap.sum()), estimate + half),
                       half_width=int(half), confidence=float(confidence), cells=int(len(rows)),
                       omitted_cells=omitted, method=used, note=note)


def cell_mask(release, left, right=None) -> np.ndarray:
    """Boolean mask of the superedge rows between two sets of supernodes (a cut query).

    Parameters
    ----------
    release : Bundle or Release
    left : array_like
        Supernode ids, or a boolean mask over the supernodes.
    right : array_like, optional
        The other side (default: ``left``, i.e. the cells inside ``left``, diagonal included).
        A cell ``(a, b)`` is selected when one end is in ``left`` and the other in ``right``.

    Returns
    -------
    numpy.ndarray of bool, one entry per superedge row
    """
    supernodes, superedges, _ = _superedges(release)
    n = supernodes.num_rows

    def member(x):
        x = np.asarray(x)
        if x.dtype == np.bool_:
            if x.shape != (n,):
                raise UsageError(f"a supernode mask must have {n} entries, got shape {x.shape}")
            return x
        m = np.zeros(n, dtype=bool)
        x = x.astype(np.int64)
        if x.size and (x.min() < 0 or x.max() >= n):
            raise UsageError(f"supernode ids must lie in 0..{n - 1}")
        m[x] = True
        return m

    lm = member(left)
    rm = lm if right is None else member(right)
    a = _col(superedges, "supernode_a")
    b = _col(superedges, "supernode_b")
    return (lm[a] & rm[b]) | (lm[b] & rm[a])


# --------------------------------------------------------------------------- supergraph


def supergraph(release, *, include_zero: bool = False):
    """The release as a networkx graph of supernodes.

    Nodes are supernode ids with attributes ``size`` and every label column of
    the supernodes table; edges are the superedge cells with attributes
    ``edge_count``, ``possible_pairs`` and ``noise_scale``. A cell on the
    diagonal (contacts inside one supernode) is a self-loop.

    Parameters
    ----------
    release : Bundle or Release
    include_zero : bool, default False
        Also add cells whose released count is 0.

    Returns
    -------
    networkx.Graph
    """
    import networkx as nx

    supernodes, superedges, manifest = _public_tables(release)
    g = nx.Graph()
    g.graph.update({k: manifest.get(k) for k in ("privacy_unit", "epsilon_total", "min_size", "seeded")})
    cols = {c: supernodes.column(c).to_pylist() for c in supernodes.column_names}
    ids = cols.pop("supernode")
    names = list(cols)
    g.add_nodes_from((ids[i], {c: cols[c][i] for c in names}) for i in range(len(ids)))
    if superedges is not None:
        a = _col(superedges, "supernode_a")
        b = _col(superedges, "supernode_b")
        c = _col(superedges, "edge_count")
        cap = _col(superedges, "possible_pairs")
        sc = _col(superedges, "noise_scale", np.float64)
        keep = np.flatnonzero(c > 0) if not include_zero else np.arange(len(c))
        g.add_edges_from((int(a[i]), int(b[i]), {"edge_count": int(c[i]), "possible_pairs": int(cap[i]),
                                                 "noise_scale": float(sc[i])}) for i in keep)
    return g


# --------------------------------------------------------------------------- synthetic networks


def _rng(seed):
    if isinstance(seed, np.random.Generator):
        return seed
    if seed is not None and (isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0):
        raise UsageError(f"'seed' must be a non-negative integer or None, got {seed!r}")
    return np.random.default_rng(seed)  # None: fresh entropy from the operating system


def _expected_draws(space: np.ndarray, have: np.ndarray, need: np.ndarray) -> np.ndarray:
    """Uniform draws from ``space`` values expected to add ``need`` new values to ``have`` distinct ones.

    ``E[new] = (space - have) (1 - (1 - 1/space)^d)``, solved for ``d`` and rounded up. No
    extra margin: a shortfall costs a small further round, a surplus a small removal.
    """
    space = space.astype(np.float64)
    frac = np.minimum(need / np.maximum(space - have, 1.0), 1.0 - 1e-12)
    with np.errstate(divide="ignore"):
        d = np.log1p(-frac) / np.log1p(-1.0 / np.maximum(space, 2.0))
    d = np.where(space <= 1, need, d)
    return np.maximum(np.ceil(d - 1e-9), need).astype(np.int64)


def _distinct_sparse(space: np.ndarray, k: np.ndarray, rng, depth: int = 0):
    """For each cell ``c`` a uniformly random set of ``k[c]`` distinct values in ``[0, space[c])``.

    Inputs already validated: ``0 < k <= space / 2`` (dense cells go through the complement).
    Returns ``(cell, value)`` sorted by cell then value.

    Uniform draws are repeated for the cells still short of ``k`` distinct values; the
    set of distinct values reached this way, given its size, is a uniform subset (the
    stopping rule only looks at the number of distinct values, so it is invariant under
    relabelling the values). The surplus is then removed by choosing, uniformly and by
    the same procedure, which positions to drop.
    """
    if depth > 200:  # pragma: no cover - the surplus shrinks geometrically
        raise RuntimeError("distinct sampling did not converge")
    n = len(space)
    base = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(space, out=base[1:])
    finished = []
    active = np.arange(n, dtype=np.int64)
    pool = np.empty(0, dtype=np.int64)  # sorted distinct keys of the active cells
    have = np.zeros(n, dtype=np.int64)
    while len(active):
        d = _expected_draws(space[active], have[active], k[active] - have[active])
        draws = rng.integers(0, np.repeat(space[active], d))
        draws += np.repeat(base[active], d)
        pool = np.concatenate([pool, draws])
        pool.sort()
        # Keys of a cell lie in [base[c], base[c+1]): after the sort each active cell holds a known
        # stretch of have + d positions, in cell order, so no search is needed to find it.
        bounds = np.zeros(len(active) + 1, dtype=np.int64)
        np.cumsum(have[active] + d, out=bounds[1:])
        keep = np.empty(len(pool), dtype=bool)
        keep[:1] = True
        np.not_equal(pool[1:], pool[:-1], out=keep[1:])
        dup_at = np.flatnonzero(~keep)  # few: repeats are rare by the choice of the number of draws
        dups = np.bincount(np.searchsorted(bounds, dup_at, side="right") - 1, minlength=len(active))
        got = np.diff(bounds) - dups
        pool = pool[keep]
        have[active] = got
        done = got >= k[active]
        if done.any():
            move = np.repeat(done, got)
            finished.append(pool[move])
            pool = pool[~move]
            active = active[~done]
    pool = np.concatenate(finished) if len(finished) > 1 else finished[0]
    pool.sort()
    starts = np.zeros(n, dtype=np.int64)  # each cell now holds exactly have[c] keys, in cell order
    np.cumsum(have[:-1], out=starts[1:])
    surplus = have - k
    over = np.flatnonzero(surplus > 0)
    if len(over):
        dcell, dpos = _distinct(have[over], surplus[over], rng, depth + 1)
        keep = np.ones(len(pool), dtype=bool)
        keep[starts[over][dcell] + dpos] = False
        pool = pool[keep]
    cell = np.repeat(np.arange(n, dtype=np.int64), k)
    return cell, pool - base[cell]


def _distinct(space: np.ndarray, k: np.ndarray, rng, depth: int = 0):
    """For each cell a uniformly random set of exactly ``k[c]`` distinct values in ``[0, space[c])``.

    Cells asking for more than half their values are served by drawing the values to
    leave out. Returns ``(cell, value)`` sorted by cell then value.
    """
    space = np.asarray(space, dtype=np.int64)
    k = np.asarray(k, dtype=np.int64)
    dense = 2 * k > space
    sparse_cells = np.flatnonzero(~dense & (k > 0))
    dense_cells = np.flatnonzero(dense)
    parts_cell, parts_val = [], []
    if len(sparse_cells):
        c, v = _distinct_sparse(space[sparse_cells], k[sparse_cells], rng, depth)
        parts_cell.append(sparse_cells[c])
        parts_val.append(v)
    if len(dense_cells):
        sp = space[dense_cells]
        leave = sp - k[dense_cells]
        base = np.zeros(len(sp) + 1, dtype=np.int64)
        np.cumsum(sp, out=base[1:])
        keep = np.ones(int(base[-1]), dtype=bool)
        has = np.flatnonzero(leave > 0)
        if len(has):
            c, v = _distinct_sparse(sp[has], leave[has], rng, depth)
            keep[base[has][c] + v] = False
        flat = np.flatnonzero(keep)
        cell = np.searchsorted(base, flat, side="right") - 1
        parts_cell.append(dense_cells[cell])
        parts_val.append(flat - base[cell])
    if not parts_cell:
        return np.empty(0, dtype=np.int64), np.empty(0, dtype=np.int64)
    cell = np.concatenate(parts_cell)
    val = np.concatenate(parts_val)
    if len(parts_cell) > 1:
        order = np.lexsort((val, cell))
        cell, val = cell[order], val[order]
    return cell, val


def _unrank_pairs(r: np.ndarray):
    """Pair index ``r`` -> ``(i, j)`` with ``i < j``, where ``r = j (j - 1) / 2 + i``."""
    j = np.floor((1.0 + np.sqrt(1.0 + 8.0 * r.astype(np.float64))) / 2.0).astype(np.int64)
    j = np.where(j * (j - 1) // 2 > r, j - 1, j)  # correct a float rounding either way
    j = np.where((j + 1) * j // 2 <= r, j + 1, j)
    return r - j * (j - 1) // 2, j


def synthetic_people(release) -> pa.Table:
    """Person ids of the synthetic networks and their supernodes.

    Person ids are dense: supernode ``s`` holds ids ``offset[s] .. offset[s] + size[s] - 1``
    with ``offset`` the running total of the released sizes. They number invented
    people; they have nothing to do with the ids of the real network.

    Returns
    -------
    pyarrow.Table
        ``person`` (int64) and ``supernode`` (int64).
    """
    sizes = _sizes(_public_tables(release)[0])
    supernode = np.repeat(np.arange(len(sizes), dtype=np.int64), sizes)
    return pa.table({"person": np.arange(len(supernode), dtype=np.int64), "supernode": supernode})


def _sizes(supernodes: pa.Table) -> np.ndarray:
    sizes = np.asarray(supernodes.column("size").to_numpy(), dtype=np.int64)
    return np.maximum(sizes, 0)


def sample_network(release, seed=None) -> pa.Table:
    """Draw a synthetic contact network consistent with the release.

    For every superedge cell ``(a, b)`` exactly ``edge_count`` distinct contacts
    are drawn uniformly among the cell's possible pairs: the ``size_a * size_b``
    pairs between the two supernodes, or the ``size_a (size_a - 1) / 2`` unordered
    pairs of distinct people inside supernode ``a`` on the diagonal. This is the
    block-model sampling of Hay et al. (2008): every network consistent with the
    released counts is equally likely. Cells absent from a sparse release
    (manifest ``superedges_sparse``) get no contacts.

    All cells are sampled together with numpy (no Python loop over contacts):
    pair indices are drawn with a margin, deduplicated by sorting and topped up
    where short, and the surplus dropped by a uniform choice; a cell asking for
    more than half its pairs draws the pairs to leave out instead.

    Sampling is post-processing of the public release: a seed costs no privacy.

    Parameters
    ----------
    release : Bundle or Release
    seed : int or numpy.random.Generator, optional
        ``None`` draws fresh entropy from the operating system.

    Returns
    -------
    pyarrow.Table
        ``source``, ``target`` (int64 person ids, ``source < target``, sorted by
        cell); see :func:`synthetic_people` for the person -> supernode map.

    References
    ----------
    M. Hay, G. Miklau, D. Jensen, D. Towsley, P. Weis, "Resisting structural
    re-identification in anonymized social networks", PVLDB 1(1), 2008.
    """
    rng = _rng(seed)
    supernodes, superedges, manifest = _superedges(release)
    sizes = _sizes(supernodes)
    n = len(sizes)
    a = _col(superedges, "supernode_a")
    b = _col(superedges, "supernode_b")
    count = _col(superedges, "edge_count")
    if len(a) and (a.min() < 0 or b.max() >= n or (a > b).any()):
        raise BundleError("superedges table: supernode ids out of range or not ordered a <= b")
    space = np.where(a == b, sizes[a] * (sizes[a] - 1) // 2, sizes[a] * sizes[b])
    if (count < 0).any() or (count > space).any():
        raise BundleError("superedges table: an edge_count is negative or above the possible pairs of its "
                          "supernodes' released sizes")
    offset = np.zeros(n, dtype=np.int64)
    np.cumsum(sizes[:-1], out=offset[1:])
    # _distinct returns exactly count[c] values per cell, in cell order: cell attributes by np.repeat.
    _, r = _distinct(space, count, rng)
    on_diag = a == b
    # off the diagonal, pair index r = i * size_b + j; fixed below for the diagonal cells
    src, tgt = np.divmod(r, np.repeat(np.maximum(sizes[b], 1), count))
    src += np.repeat(offset[a], count)
    tgt += np.repeat(offset[b], count)
    if on_diag.any():
        d = np.flatnonzero(np.repeat(on_diag, count))
        i, j = _unrank_pairs(r[d])
        base_d = np.repeat(offset[a[on_diag]], count[on_diag])
        src[d] = base_d + i
        tgt[d] = base_d + j
    meta = {"synthetic": True, "people": int(sizes.sum()), "seed": seed if isinstance(seed, int) else None,
            "release_manifest_sha256": manifest.get("manifest_sha256"),
            "note": "synthetic network sampled from a release (block model); invented people, not real contacts"}
    return pa.table({"source": src, "target": tgt}).replace_schema_metadata(
        {b"aggpub.sample": json.dumps(meta, sort_keys=True).encode()})


def write_sample(table: pa.Table, out, *, overwrite: bool = False) -> Path:
    """Write a sampled network as Parquet atomically (temporary file beside the target, fsync, rename).

    Raises
    ------
    OutputError
        ``out`` exists (and ``overwrite`` is false), is a folder, or its folder is missing or not writable.
    """
    import pyarrow.parquet as pq

    from .bundle._files import fsync_path, temp_sibling

    out = Path(out).absolute()
    if out.is_dir():
        raise OutputError(f"{out}: output path is a folder")
    if (out.exists() or out.is_symlink()) and not overwrite:
        raise OutputError(f"{out}: output file already exists (use --overwrite to replace it)")
    if not out.parent.is_dir():
        raise OutputError(f"{out.parent}: folder of the output does not exist")
    if not os.access(out.parent, os.W_OK | os.X_OK):
        raise OutputError(f"{out.parent}: output folder is not writable")
    tmp = temp_sibling(out, "tmp")
    try:
        pq.write_table(table, tmp)
        fsync_path(tmp)
        if overwrite:
            os.replace(tmp, out)
        else:
            os.link(tmp, out)  # fails if ``out`` appeared meanwhile: never replaces a file silently
        fsync_path(out.parent)
    except FileExistsError:
        raise OutputError(f"{out}: output file already exists (use --overwrite to replace it)") from None
    except OSError as exc:
        raise OutputError(f"{out}: cannot write the sample ({exc.strerror})") from None
    finally:
        if tmp.exists():
            tmp.unlink()
    return out
