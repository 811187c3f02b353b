"""Exact counts on a simple contact list, shared by the release and the synthetic-network sampler.

numpy and scipy only: the audit's helper process fits the sampler's affinity with :func:`count_triangles`
without importing pyarrow or the release's statistics. The triangle count's privacy (the ladder mechanism
and its widths) is in :mod:`aggpub.released.triangles`; this module only counts.
"""

from __future__ import annotations

__all__ = ["count_triangles", "degree_rank", "ROW_BATCH"]

import numpy as np

#: Rows of the oriented adjacency multiplied at once (bounds the temporary memory).
ROW_BATCH = 65_536


def degree_rank(deg) -> np.ndarray:
    """Each node's rank by degree, ties by node number (the orientation that keeps triangle counting small).

    References
    ----------
    T. Schank, D. Wagner, "Finding, counting and listing all triangles in large graphs, an experimental
    study", WEA 2005 (degree ordering).
    """
    n = len(deg)
    rank = np.empty(n, dtype=np.int64)
    rank[np.lexsort((np.arange(n), deg))] = np.arange(n)
    return rank


def count_triangles(u, v, n: int) -> int:
    """Exact number of triangles of the simple undirected graph with contacts ``(u, v)`` on ``n`` people.

    Inputs already validated: no self-loop, no repeated contact. Degree-ordered
    orientation, then ``sum((L @ L) .* L)`` over batches of rows of the oriented
    adjacency ``L`` (every triangle is counted once, at its lowest-ranked corner).
    """
    from scipy import sparse  # here, not at import: the release's start (reading the files) does not need it

    u = np.asarray(u, dtype=np.int64)
    v = np.asarray(v, dtype=np.int64)
    if len(u) < 3 or n < 3:
        return 0
    rank = degree_rank(np.bincount(u, minlength=n) + np.bincount(v, minlength=n))
    ru, rv = rank[u], rank[v]
    lo, hi = np.minimum(ru, rv), np.maximum(ru, rv)
    L = sparse.csr_matrix((np.ones(len(lo), dtype=np.float64), (lo, hi)), shape=(n, n))
    total = 0.0
    for start in range(0, n, ROW_BATCH):
        rows = L[start:start + ROW_BATCH]
        if rows.nnz == 0:
            continue
        total += (rows @ L).multiply(rows).sum()
    return int(round(total))
