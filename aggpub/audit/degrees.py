"""Degree distributions: the true one, and the ones a release implies.

A release without degree histograms still implies a degree distribution: read
the supergraph as a block model (Hay, Miklau, Jensen, Towsley, Weis, PVLDB
2008, sample graphs uniformly from the aggregate). A member of supernode ``a``
then has a number of contacts in supernode ``b`` that is approximately
``Binomial(m_ab, p_ab)`` with ``m_ab = s_b`` (``s_a - 1`` inside ``a``) and
``p_ab = count_ab / possible_pairs_ab``; its degree is the sum over ``b`` of
independent binomials (exactly hypergeometric per cell when ``count_ab`` edges
are placed on distinct pairs; the binomial is the usual approximation). The
degree distribution of the release is the mixture over supernodes weighted by
size.

The sum of binomials is computed exactly through its characteristic function
on an FFT grid; for very many supernodes the Poisson approximation
``Poisson(sum_b count_ab / s_a)`` (diagonal counted twice) is used instead.
"""

from __future__ import annotations

__all__ = ["block_model_terms", "cell_matrix", "implied_degree_pmf", "released_histogram_degrees", "true_degree_histogram"]

import numpy as np
from scipy import special

from ..cells import CellRows, possible_pairs

#: Above this many (supernode x supernode x grid) terms, use the Poisson approximation.
MAX_EXACT_TERMS = 60_000_000


def cell_matrix(a, b, count, n: int) -> np.ndarray:
    """Symmetric dense ``n x n`` matrix of per-cell counts from upper-triangle cells."""
    m = np.zeros((n, n), dtype=np.float64)
    m[a, b] = count
    m[b, a] = count
    return m


def true_degree_histogram(degrees) -> np.ndarray:
    """Number of people with each degree, index = degree."""
    return np.bincount(np.asarray(degrees, dtype=np.int64)).astype(np.float64)


def _per_member_rates(a, b, count, sizes, rows=None):
    """Expected contacts of one member of each supernode (block model).

    ``rows`` (:class:`aggpub.cells.CellRows` of the cells, kept by :func:`block_model_terms`) sums each
    supernode's run of cells when they are in row order: several times faster than a weighted
    ``bincount`` on millions of cells, the same sums of whole numbers.
    """
    sizes = np.asarray(sizes, dtype=np.float64)
    count = np.asarray(count, dtype=np.float64)
    if rows is not None:
        ends = rows.totals(count)
    else:
        ends = np.bincount(a, weights=count, minlength=len(sizes)) + np.bincount(b, weights=count,
                                                                                 minlength=len(sizes))
    return ends / np.maximum(sizes, 1.0)


def _poisson_pmf(k, lam):
    """Poisson pmf ``lam^k e^-lam / k!`` in log space (``0^0 = 1``, so rate 0 puts all mass on 0).

    Written out with :mod:`scipy.special` instead of calling ``scipy.stats.poisson``,
    whose import costs most of a second; the test suite checks it against
    ``scipy.stats.poisson.pmf``.
    """
    return np.exp(special.xlogy(k, lam) - lam - special.gammaln(k + 1.0))


def block_model_terms(a, b, sizes) -> dict:
    """The parts of :func:`implied_degree_pmf` that depend only on the cells and the sizes.

    Computed once and passed as ``terms`` when many tables over the same cells
    are read (the audit's Monte Carlo).
    """
    a = np.asarray(a, dtype=np.int64)
    b = np.asarray(b, dtype=np.int64)
    sizes = np.asarray(sizes, dtype=np.int64)
    return {"a": a, "b": b, "sizes": sizes, "cap": possible_pairs(sizes, a, b).astype(np.float64),
            "rows": CellRows(a, b, len(sizes))}


def _trials(terms: dict) -> np.ndarray:
    """Bernoulli trials of every cell for a member of each end: ``m_ab`` (a member of ``a`` towards ``b``;
    ``s_a - 1`` inside ``a``) for every cell, then ``m_ba`` (``0`` inside ``a``). Only the exact (binomial)
    law reads them: made when first asked for and kept in ``terms``."""
    if "trials" not in terms:
        a, b, sizes = terms["a"], terms["b"], terms["sizes"]
        diag = a == b
        m_ab = np.where(diag, sizes[a] - 1.0, sizes[b].astype(np.float64))
        m_ba = np.where(diag, 0.0, sizes[a].astype(np.float64))
        terms["trials"] = np.concatenate([m_ab, m_ba])
    return terms["trials"]


def implied_degree_pmf(a, b, count, sizes, *, method: str = "auto", terms: dict | None = None
                       ) -> tuple[np.ndarray, str]:
    """Degree distribution implied by superedge counts read as a block model.

    Parameters
    ----------
    a, b : array_like of int
        Cells ``a <= b`` (every cell, or only non-zero ones).
    count : array_like
        Edges in each cell (true or released; clamped to ``[0, possible pairs]``).
    sizes : array_like of int
        Members of each supernode.
    method : {"auto", "binomial", "poisson"}
        ``binomial``: exact sum of per-cell binomials (FFT); ``poisson``: the
        Poisson approximation; ``auto``: binomial unless too large.
    terms : dict, optional
        :func:`block_model_terms` of the same ``a``, ``b``, ``sizes`` (inputs
        already validated; saves recomputing them for every table).

    Returns
    -------
    pmf : numpy.ndarray
        Probability of each degree ``0..K`` for a person drawn uniformly.
    method : str
        The method used.

    References
    ----------
    M. Hay, G. Miklau, D. Jensen, D. Towsley, P. Weis, "Resisting structural
    re-identification in anonymized social networks", PVLDB 1(1), 2008.
    """
    if terms is None:
        terms = block_model_terms(a, b, sizes)
    a, b, sizes, cap = terms["a"], terms["b"], terms["sizes"], terms["cap"]
    n = len(sizes)
    count = np.clip(np.asarray(count, dtype=np.float64), 0.0, cap)
    weights = sizes / sizes.sum()
    lam = _per_member_rates(a, b, count, sizes, terms.get("rows"))
    # support: the mean plus 12 standard deviations (and 20). A member's variance sum_b m_ab p (1 - p) is at
    # most its mean sum_b m_ab p = lam, so the Poisson's sqrt(lam) bounds both laws' deviations
    top = int(np.ceil(np.max(lam + 12 * np.sqrt(lam) + 20))) if n else 1
    grid = 1 << max(4, int(np.ceil(np.log2(top + 1))))
    if method == "auto":
        method = "binomial" if n * n * grid <= MAX_EXACT_TERMS else "poisson"
    if method == "poisson":
        k = np.arange(top + 1)
        pmf = np.zeros(top + 1)
        for lo in range(0, n, 256):  # chunks of supernodes; bounded memory
            hi = min(n, lo + 256)
            pmf += weights[lo:hi] @ _poisson_pmf(k[None, :], lam[lo:hi, None])
        return pmf, "poisson"
    if method != "binomial":
        raise ValueError(f"'method' must be 'auto', 'binomial' or 'poisson', got {method!r}")
    with np.errstate(divide="ignore", invalid="ignore"):
        p_cell = np.where(cap > 0, count / np.where(cap > 0, cap, 1.0), 0.0)
    # log characteristic function of each member's degree on the FFT grid
    # Hermitian symmetry phi(-theta) = conj(phi(theta)): half the grid suffices. With
    # z = 1 - p + p e^{i theta}: log|z| = log1p(-2 p (1 - p) (1 - cos theta)) / 2 and
    # arg z = atan2(p sin theta, 1 - p + p cos theta), in real arithmetic. Both are computed once
    # per cell (not per ordered pair of supernodes) and summed into the members' rows with their
    # trials by a sparse product: a member of a sees m_ab trials of cell (a, b), a member of b m_ba.
    from scipy import sparse

    theta = 2 * np.pi * np.arange(grid // 2 + 1) / grid
    cells = np.arange(len(a))
    rows = np.concatenate([a, b])
    trials = _trials(terms)
    live = (trials > 0) & (np.concatenate([p_cell, p_cell]) > 0)  # a cell with no trials or p = 0 adds 0
    spread_rows = sparse.csr_matrix((trials[live], (rows[live], np.concatenate([cells, cells])[live])),
                                    shape=(n, len(a)))
    used = np.flatnonzero(np.bincount(spread_rows.indices, minlength=len(a)))
    spread_rows = spread_rows[:, used]
    pu = p_cell[used, None]
    log_abs = np.empty((len(used), len(theta)))
    arg = np.empty((len(used), len(theta)))
    step = max(1, MAX_EXACT_TERMS // (8 * max(len(used), 1)))  # grid columns per chunk (bounded memory)
    for lo in range(0, len(theta), step):
        t = theta[lo:lo + step]
        with np.errstate(divide="ignore"):  # z = 0 (log -inf) only at p = 1/2, theta = pi
            log_abs[:, lo:lo + step] = 0.5 * np.log1p(-2 * pu * (1 - pu) * (1 - np.cos(t)))
        arg[:, lo:lo + step] = np.arctan2(pu * np.sin(t), 1 - pu + pu * np.cos(t))
    re = spread_rows @ log_abs
    im = spread_rows @ arg
    phi = np.exp(re) * (np.cos(im) + 1j * np.sin(im))
    # phi_j = E[exp(i theta_j D)] -> p_k = (1/L) sum_j phi_j exp(-i theta_j k) = irfft(conj(phi))_k
    pmf_sum = weights @ np.fft.irfft(np.conj(phi), n=grid, axis=1)
    pmf = np.clip(pmf_sum[: top + 1], 0.0, None)
    return pmf / pmf.sum(), "binomial"


def released_histogram_degrees(table, n_bins: int | None = None) -> np.ndarray:
    """Total released people per degree bin from a ``degree_histograms`` table.

    The released counts are noisy; negative sums are clamped to 0. The last bin
    counts people with ``cap`` or more contacts.
    """
    bins = np.asarray(table.column("degree_bin").to_numpy(zero_copy_only=False), dtype=np.int64)
    people = np.asarray(table.column("people").to_numpy(zero_copy_only=False), dtype=np.float64)
    n_bins = n_bins or int(bins.max()) + 1
    return np.clip(np.bincount(bins, weights=people, minlength=n_bins), 0.0, None)
