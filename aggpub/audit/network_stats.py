"""Structural statistics of a network (clustering, components, assortativity), for the audit.

The audit compares them between the true network and networks drawn from the
release by the one sampler (:mod:`aggpub.synthesis`), as in the evaluation of
Hay, Miklau, Jensen, Towsley and Weis (PVLDB 2008).

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

__all__ = ["structure_statistics", "attribute_assortativity", "degree_assortativity",
           "clustering", "clustering_from", "triangles_per_node", "node_triangles", "oriented",
           "largest_component_fraction", "adjacency"]

import numpy as np
from scipy import sparse
from scipy.sparse import csgraph

from ..graph_counts import degree_rank



def adjacency(u, v, n: int) -> sparse.csr_matrix:
    """Symmetric 0/1 adjacency matrix of an undirected simple graph."""
    u = np.asarray(u, dtype=np.int64)
    v = np.asarray(v, dtype=np.int64)
    data = np.ones(2 * len(u), dtype=np.float64)
    m = sparse.csr_matrix((data, (np.concatenate([u, v]), np.concatenate([v, u]))), shape=(n, n))
    m.sum_duplicates()
    m.data[:] = 1.0
    return m


def triangles_per_node(adj: sparse.csr_matrix) -> np.ndarray:
    """Number of triangles through each node of a symmetric 0/1 adjacency matrix (see :func:`oriented`)."""
    coo = sparse.triu(adj, k=1, format="coo")
    return node_triangles(oriented(coo.row, coo.col, adj.shape[0], np.diff(adj.indptr)))


def oriented(u, v, n: int, deg) -> sparse.csr_matrix:
    """The degree-ordered orientation ``L`` of a simple undirected graph: each contact points from its end of
    lower degree rank to its end of higher rank (ties by node number), built straight from the contacts.

    ``deg`` holds each node's degree. :func:`node_triangles` counts triangles on it, and
    ``connected_components(L, directed=False)`` finds the graph's components (each contact once is enough).
    """
    u = np.asarray(u, dtype=np.int64)
    v = np.asarray(v, dtype=np.int64)
    rank = degree_rank(deg)
    up = rank[u] < rank[v]
    return sparse.csr_matrix((np.ones(len(u)), (np.where(up, u, v), np.where(up, v, u))), shape=(n, n))


def node_triangles(L: sparse.csr_matrix) -> np.ndarray:
    """Number of triangles through each node, from the degree-ordered orientation ``L`` (:func:`oriented`).

    With ``L`` oriented by degree rank, a triangle ``a < b < c`` (by rank) is the entry ``(a, c)`` of
    ``(L @ L) .* L`` (counted for ``a`` and ``c``) and the entry ``(b, c)`` of ``(L' @ L) .* L`` (counted
    for ``b``), each once; the ordering keeps the sparse products small.

    References
    ----------
    T. Schank, D. Wagner, "Finding, counting and listing all triangles in large
    graphs, an experimental study", WEA 2005 (degree ordering).
    """
    ends = (L @ L).multiply(L).tocsr()    # (a, c): triangles a < b < c, counted at a and at c
    middle = (L.T @ L).multiply(L).tocsr()  # (b, c): the same triangles, counted at b
    return (np.asarray(ends.sum(axis=1)).ravel() + np.asarray(ends.sum(axis=0)).ravel()
            + np.asarray(middle.sum(axis=1)).ravel())


def clustering(adj: sparse.csr_matrix) -> tuple[float, float]:
    """Average local clustering coefficient (nodes of degree < 2 count 0) and transitivity."""
    return clustering_from(np.diff(adj.indptr), triangles_per_node(adj))


def clustering_from(deg, triangles) -> tuple[float, float]:
    """:func:`clustering` from each node's degree and number of triangles."""
    deg = np.asarray(deg, dtype=np.float64)
    tri2 = 2.0 * np.asarray(triangles, dtype=np.float64)  # 2 x triangles at each node
    pairs = deg * (deg - 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        local = np.where(pairs > 0, tri2 / np.where(pairs > 0, pairs, 1), 0.0)
    avg = float(local.mean()) if len(local) else 0.0
    trans = float(tri2.sum() / pairs.sum()) if pairs.sum() > 0 else 0.0
    return avg, trans


def largest_component_fraction(adj: sparse.csr_matrix) -> float:
    """Share of people in the largest connected component (``adj``: the adjacency, or any matrix with each
    contact in one direction at least, such as :func:`oriented`)."""
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


def degree_assortativity(u, v, n: int, deg=None) -> float:
    """Pearson correlation of the degrees at the two ends of each edge (Newman 2003); ``deg``: the degrees, when
    known."""
    u = np.asarray(u, dtype=np.int64)
    v = np.asarray(v, dtype=np.int64)
    if deg is None:
        deg = np.bincount(u, minlength=n) + np.bincount(v, minlength=n)
    deg = np.asarray(deg, dtype=np.float64)
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
    u = np.asarray(u, dtype=np.int64)
    v = np.asarray(v, dtype=np.int64)
    deg = np.bincount(u, minlength=n) + np.bincount(v, minlength=n)
    L = oriented(u, v, n, deg)  # no symmetric adjacency: the orientation serves triangles and components
    avg, trans = clustering_from(deg, node_triangles(L))
    out = {
        "people": int(n),
        "contacts": int(len(u)),
        "mean_degree": float(2 * len(u) / n) if n else 0.0,
        "average_clustering": avg,
        "transitivity": trans,
        "largest_component_fraction": largest_component_fraction(L),
        "degree_assortativity": degree_assortativity(u, v, n, deg),
    }
    for name, cat in (categories or {}).items():
        out[f"assortativity:{name}"] = attribute_assortativity(u, v, cat)
    return out
