"""Structure of the true network against networks sampled from a release.

Sampling follows the evaluation of Hay, Miklau, Jensen, Towsley and Weis
(PVLDB 2008): a synthetic network is drawn uniformly among the graphs
consistent with the aggregate (every supernode of the stated size, exactly
``edge_count`` distinct contacts in every cell), and statistics of the sampled
networks are compared with those of the original.

The statistics are computed with scipy sparse matrices (no Python loop over
edges or nodes); the tests check each against networkx on networkx's own
example graphs.

References
----------
M. Hay, G. Miklau, D. Jensen, D. Towsley, P. Weis, "Resisting structural
re-identification in anonymized social networks", PVLDB 1(1), 2008.

M. E. J. Newman, "Mixing patterns in networks", Physical Review E 67, 026126,
2003 (assortativity coefficient).

D. J. Watts, S. H. Strogatz, "Collective dynamics of 'small-world' networks",
Nature 393, 1998 (clustering coefficient).
"""

from __future__ import annotations

__all__ = ["sample_block_network", "structure_statistics", "attribute_assortativity", "degree_assortativity",
           "clustering", "largest_component_fraction", "adjacency"]

import numpy as np
from scipy import sparse
from scipy.sparse import csgraph

from ..cells import possible_pairs


def _sorted_unique(x):
    """Sorted distinct values (sort + compare; faster here than numpy's hash-based unique)."""
    x = np.sort(x)
    if len(x) == 0:
        return x
    return x[np.concatenate([[True], x[1:] != x[:-1]])]


def _distinct_per_cell(k, P, rng):
    """For each cell ``i`` draw ``k[i]`` distinct integers from ``range(P[i])`` (requires ``k <= P``).

    Rejection with replacement for cells with ``k <= P/2``; for denser cells the
    complement is drawn and the kept values materialised (at most ``2 k``
    values per such cell). Returns ``(cell, value)`` arrays.
    """
    k = np.asarray(k, dtype=np.int64)
    P = np.asarray(P, dtype=np.int64)
    dense = 2 * k > P
    draw_k = np.where(dense, P - k, k)

    offsets = np.concatenate([[0], np.cumsum(P)[:-1]])
    keys = np.empty(0, dtype=np.int64)
    have = np.zeros(len(P), dtype=np.int64)
    # Draw with replacement (oversampled for the expected repeats), keep the
    # distinct values, and trim cells with too many by random priority. The
    # distinct values of a cell are exchangeable, so any uniformly chosen
    # subset of them is a uniform subset of range(P); cells still short repeat.
    while True:
        need = draw_k - have
        if need.sum() == 0:
            break
        free = np.maximum(P - have, 1)
        m = np.where(need > 0, np.ceil(need * (P / free) * 1.2).astype(np.int64) + 2, 0)
        cells = np.repeat(np.arange(len(P)), m)
        vals = np.minimum(np.floor(rng.random(len(cells)) * P[cells]).astype(np.int64), P[cells] - 1)
        keys = _sorted_unique(np.concatenate([keys, offsets[cells] + vals]))
        cell_of = np.searchsorted(offsets, keys, side="right") - 1
        have = np.bincount(cell_of, minlength=len(P))
        if (have > draw_k).any():
            order = np.lexsort((rng.random(len(keys)), cell_of))
            starts = np.concatenate([[0], np.cumsum(have)[:-1]])
            rank = np.arange(len(keys)) - starts[cell_of[order]]
            keys = np.sort(keys[order[rank < draw_k[cell_of[order]]]])
            have = np.minimum(have, draw_k)
    cell = np.searchsorted(offsets, keys, side="right") - 1
    val = keys - offsets[cell]
    if not dense.any():
        return cell, val
    keep = ~dense[cell]
    out_cell, out_val = [cell[keep]], [val[keep]]
    # dense cells: every value minus the drawn complement (offsets keep the keys distinct)
    dcells = np.nonzero(dense)[0]
    lens = P[dcells]
    all_cell = np.repeat(dcells, lens)
    starts = np.concatenate([[0], np.cumsum(lens)[:-1]])
    all_val = np.arange(lens.sum()) - np.repeat(starts, lens)
    mask = ~np.isin(offsets[all_cell] + all_val, keys[~keep])
    out_cell.append(all_cell[mask])
    out_val.append(all_val[mask])
    return np.concatenate(out_cell), np.concatenate(out_val)


def sample_block_network(a, b, count, sizes, rng: np.random.Generator):
    """One synthetic network consistent with a supergraph (uniform within each cell).

    Parameters
    ----------
    a, b : array_like of int
        Cells ``a <= b``.
    count : array_like of int
        Edges in each cell (clamped to ``[0, possible pairs]``).
    sizes : array_like of int
        Members of each supernode; synthetic people ``offsets[g] .. offsets[g] + sizes[g] - 1``
        belong to supernode ``g``.
    rng : numpy.random.Generator

    Returns
    -------
    u, v : numpy.ndarray of int64
        Edges ``u < v`` on ``sum(sizes)`` synthetic people.
    """
    a = np.asarray(a, dtype=np.int64)
    b = np.asarray(b, dtype=np.int64)
    sizes = np.asarray(sizes, dtype=np.int64)
    P = possible_pairs(sizes, a, b)
    k = np.clip(np.asarray(count, dtype=np.int64), 0, P)
    nz = k > 0
    cells = np.nonzero(nz)[0]
    if len(cells) == 0:
        return np.empty(0, np.int64), np.empty(0, np.int64)
    c_local, idx = _distinct_per_cell(k[nz], P[nz], rng)
    ca, cb = a[cells[c_local]], b[cells[c_local]]
    offsets = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    diag = ca == cb
    u = np.empty(len(idx), dtype=np.int64)
    v = np.empty(len(idx), dtype=np.int64)
    # off-diagonal: idx = i * s_b + j
    sb = sizes[cb[~diag]]
    u[~diag] = offsets[ca[~diag]] + idx[~diag] // sb
    v[~diag] = offsets[cb[~diag]] + idx[~diag] % sb
    # diagonal: idx = i (i - 1) / 2 + j with j < i (lower-triangle rank)
    t = idx[diag]
    i = np.floor((1 + np.sqrt(1 + 8 * t.astype(np.float64))) / 2).astype(np.int64)
    i -= (i * (i - 1) // 2 > t).astype(np.int64)
    i += ((i + 1) * i // 2 <= t).astype(np.int64)
    j = t - i * (i - 1) // 2
    u[diag] = offsets[ca[diag]] + j
    v[diag] = offsets[ca[diag]] + i
    return np.minimum(u, v), np.maximum(u, v)


def adjacency(u, v, n: int) -> sparse.csr_matrix:
    """Symmetric 0/1 adjacency matrix of an undirected simple graph."""
    u = np.asarray(u, dtype=np.int64)
    v = np.asarray(v, dtype=np.int64)
    data = np.ones(2 * len(u), dtype=np.float64)
    m = sparse.csr_matrix((data, (np.concatenate([u, v]), np.concatenate([v, u]))), shape=(n, n))
    m.sum_duplicates()
    m.data[:] = 1.0
    return m


def clustering(adj: sparse.csr_matrix) -> tuple[float, float]:
    """Average local clustering coefficient (nodes of degree < 2 count 0) and transitivity."""
    deg = np.asarray(adj.sum(axis=1)).ravel()
    tri2 = np.asarray((adj @ adj).multiply(adj).sum(axis=1)).ravel()  # 2 x triangles at each node
    pairs = deg * (deg - 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        local = np.where(pairs > 0, tri2 / np.where(pairs > 0, pairs, 1), 0.0)
    avg = float(local.mean()) if len(local) else 0.0
    trans = float(tri2.sum() / pairs.sum()) if pairs.sum() > 0 else 0.0
    return avg, trans


def largest_component_fraction(adj: sparse.csr_matrix) -> float:
    """Share of people in the largest connected component."""
    n_comp, lab = csgraph.connected_components(adj, directed=False)
    return float(np.bincount(lab).max() / adj.shape[0])


def attribute_assortativity(u, v, category) -> float:
    """Newman's assortativity coefficient of a categorical node attribute (undirected edges)."""
    category = np.asarray(category, dtype=np.int64)
    k = int(category.max()) + 1 if len(category) else 1
    cu, cv = category[np.asarray(u)], category[np.asarray(v)]
    m = np.bincount(cu * k + cv, minlength=k * k).reshape(k, k).astype(np.float64)
    m = m + m.T
    e = m / m.sum()
    ab = float(np.sum(e.sum(axis=0) * e.sum(axis=1)))
    if ab >= 1.0:
        return float("nan")
    return float((np.trace(e) - ab) / (1.0 - ab))


def degree_assortativity(u, v, n: int) -> float:
    """Pearson correlation of the degrees at the two ends of each edge (Newman 2003)."""
    u = np.asarray(u, dtype=np.int64)
    v = np.asarray(v, dtype=np.int64)
    deg = np.bincount(np.concatenate([u, v]), minlength=n).astype(np.float64)
    x = np.concatenate([deg[u], deg[v]])
    y = np.concatenate([deg[v], deg[u]])
    if x.std() == 0:
        return float("nan")
    return float(np.corrcoef(x, y)[0, 1])


def structure_statistics(u, v, n: int, categories: dict | None = None) -> dict:
    """Clustering, assortativity and component figures of one network.

    Parameters
    ----------
    u, v : array_like of int
        Undirected edges (no self-loops, no duplicates).
    n : int
        Number of people.
    categories : dict, optional
        ``{attribute: integer code of each person}`` for attribute assortativity.
    """
    adj = adjacency(u, v, n)
    avg, trans = clustering(adj)
    out = {
        "people": int(n),
        "contacts": int(len(u)),
        "mean_degree": float(2 * len(u) / n) if n else 0.0,
        "average_clustering": avg,
        "transitivity": trans,
        "largest_component_fraction": largest_component_fraction(adj),
        "degree_assortativity": degree_assortativity(u, v, n),
    }
    for name, cat in (categories or {}).items():
        out[f"assortativity:{name}"] = attribute_assortativity(u, v, cat)
    return out
