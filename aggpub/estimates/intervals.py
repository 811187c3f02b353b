"""Error bars for sums of released cells, and the cells of a cut query.

Post-processing of the public outputs only (a bundle read with
:func:`aggpub.read_bundle`, or an in-memory :class:`aggpub.Release`): nothing
here reads the true network, so it costs no privacy budget.

References
----------
A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally utility-maximizing
privacy mechanisms", STOC 2009.
"""

from __future__ import annotations

__all__ = ["SumInterval", "interval", "cell_mask", "sum_noise_pmf", "MAX_EXACT_GRID"]

import math
from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from ..bundle.read import require_superedges
from ..bundle.read import table_column as _col
from ..errors import BundleError, UsageError

#: Largest FFT grid used for the exact law of a sum (beyond it: normal approximation).
MAX_EXACT_GRID = 1 << 22

CLAMP_NOTE = ("released counts were clamped to [0, possible pairs] after the noise was added; for cells whose "
              "true count is within a few noise scales of 0 (or of the number of possible pairs) the released "
              "value is biased and this interval is only approximate")

UNCLAMPED_NOTE = ("summed the unclamped noisy counts (edge_count_unclamped): true counts plus independent "
                  "zero-mean noise, so the estimate is unbiased and the interval holds for the noise exactly")



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
            from ..cells import all_cells, cell_index

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

    Examples
    --------
    >>> import networkx as nx, pyarrow as pa
    >>> import aggpub
    >>> G = nx.karate_club_graph()  # Zachary's karate club, as networkx ships it
    >>> edges = pa.table({"source": [str(u) for u, v in G.edges()], "target": [str(v) for u, v in G.edges()]})
    >>> people = pa.table({"node": [str(n) for n in G], "club": [G.nodes[n]["club"] for n in G]})
    >>> policy = {"privacy": {"unit": "edge", "epsilon": 1.0},
    ...           "grouping": {"method": "attributes", "attributes": ["club"], "min_size": 5}}
    >>> release = aggpub.release_tables(edges, people, policy, seed=1)
    >>> every_cell = aggpub.cell_mask(release, [0, 1])  # both clubs: all contacts
    >>> total = aggpub.interval(release, every_cell)
    >>> total.low <= G.number_of_edges() <= total.high  # 78 true contacts, inside the 95% interval here
    True
    >>> total.cells, total.method, total.confidence
    (3, 'exact', 0.95)
    """
    if isinstance(confidence, bool) or not isinstance(confidence, (int, float)) or not 0 < confidence < 1:
        raise UsageError(f"'confidence' must be a number in (0, 1), got {confidence!r}")
    if method not in ("auto", "exact", "normal"):
        raise UsageError(f"'method' must be 'auto', 'exact' or 'normal', got {method!r}")
    supernodes, superedges, manifest = require_superedges(release)
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
    supernodes, superedges, _ = require_superedges(release)
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
