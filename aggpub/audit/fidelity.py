"""How well synthetic networks behave like the true one: the figures a researcher who simulates cares about.

For a true network and synthetic networks drawn by the one sampler
(:mod:`aggpub.synthesis`), each figure is a ratio or a distance (CONFIDENTIAL when
the true network is private: the audit's report only):

``contacts_ratio``            synthetic contacts / true contacts;
``degree_ks``                 two-sample Kolmogorov-Smirnov distance of the degree distributions
                              (lower is better; the statistic of ``scipy.stats.ks_2samp``,
                              computed here with numpy: :func:`ks_statistic`);
``largest_degree_ratio``      largest synthetic degree / largest true degree;
``clustering_ratio``          average local clustering (networkx's definition: people with fewer
                              than two contacts count 0) synthetic / true;
``final_size_ratio``          expected final size of an epidemic, synthetic / true.

The epidemic (Newman 2002): an SIR epidemic with transmissibility ``T`` has the final
size of bond percolation with occupation probability ``T``. ``T`` is chosen once, on
the true network, so that ``R = T (<k^2> - <k>) / <k> = 1.5`` (at most 1); the same
``T`` is used on every synthetic network. The final size of a major outbreak is the
largest connected cluster of the percolated network as a share of all people, the
mean over independent percolations.

References
----------
M. E. J. Newman, "Spread of epidemic disease on networks", Physical Review E 66,
016128, 2002.

D. J. Watts, S. H. Strogatz, "Collective dynamics of 'small-world' networks", Nature
393, 1998 (clustering coefficient).
"""

from __future__ import annotations

__all__ = ["TARGET_R", "FIGURES", "transmissibility", "final_size", "network_figures", "compare_figures", "ks_statistic",
           "summarise"]

import numpy as np
from scipy import sparse
from scipy.sparse import csgraph

from .network_stats import adjacency

#: The reproduction number the epidemic's transmissibility gives the true network.
TARGET_R = 1.5
#: The figures of :func:`compare_figures`, in report order.
FIGURES = ("contacts_ratio", "degree_ks", "largest_degree_ratio", "clustering_ratio", "final_size_ratio")


def transmissibility(degrees) -> float:
    """``T`` with ``T (<k^2> - <k>) / <k> = 1.5`` on the given (true) degrees, at most 1 (Newman 2002)."""
    k = np.asarray(degrees, dtype=np.float64)
    k1 = float(k.mean()) if len(k) else 0.0
    k2 = float((k ** 2).mean()) if len(k) else 0.0
    if k2 - k1 <= 0:
        return 1.0
    return float(min(1.0, TARGET_R * k1 / (k2 - k1)))


def final_size(u, v, n: int, T: float, rng, draws: int) -> float:
    """Mean over ``draws`` bond percolations (each contact kept with probability ``T``) of the largest cluster's share."""
    u = np.asarray(u, dtype=np.int64)
    v = np.asarray(v, dtype=np.int64)
    if n == 0:
        return 0.0
    out = []
    for _ in range(int(draws)):  # a few whole-network passes
        keep = rng.random(len(u)) < T
        g = sparse.coo_matrix((np.ones(int(keep.sum())), (u[keep], v[keep])), shape=(n, n)).tocsr()
        _, lab = csgraph.connected_components(g, directed=False)
        out.append(np.bincount(lab).max() / n)
    return float(np.mean(out))


def network_figures(u, v, n: int, T: float, rng, draws: int = 10, average_clustering: float | None = None) -> dict:
    """Contacts, degrees, largest degree, average clustering and final size of one network.

    ``u, v``: a simple undirected network (no self-loop, each contact once), as the engine's
    contacts and the sampler's draws are. ``average_clustering`` may be passed when already
    computed (the audit's structure statistics have it), which spares the sparse product that
    finds the triangles (and the adjacency matrix it needs).
    """
    u = np.asarray(u, dtype=np.int64)
    v = np.asarray(v, dtype=np.int64)
    deg = np.bincount(u, minlength=n) + np.bincount(v, minlength=n)
    if average_clustering is None:
        adj = adjacency(u, v, n)
        tri2 = np.asarray((adj @ adj).multiply(adj).sum(axis=1)).ravel()
        pairs = deg * (deg - 1.0)
        local = np.divide(tri2, pairs, out=np.zeros(len(deg)), where=pairs > 0)
        average_clustering = float(local.mean()) if n else 0.0
    return {"contacts": int(len(u)), "degrees": deg, "largest_degree": int(deg.max()) if n else 0,
            "average_clustering": float(average_clustering), "final_size": final_size(u, v, n, T, rng, draws)}


def ks_statistic(x, y) -> float:
    """The two-sample Kolmogorov-Smirnov statistic ``max |F_x - F_y|`` over the pooled sample.

    The empirical distribution functions are evaluated at every observed value (right-continuous),
    as ``scipy.stats.ks_2samp`` does; numpy only, so that the audit does not load scipy.stats
    (about a second of imports) for one statistic.

    References
    ----------
    N. Smirnov, "Table for estimating the goodness of fit of empirical distributions", Annals of
    Mathematical Statistics 19(2), 1948.
    """
    x = np.sort(np.asarray(x, dtype=np.float64))
    y = np.sort(np.asarray(y, dtype=np.float64))
    pooled = np.concatenate([x, y])
    fx = np.searchsorted(x, pooled, side="right") / len(x)
    fy = np.searchsorted(y, pooled, side="right") / len(y)
    return float(np.max(np.abs(fx - fy)))


def compare_figures(true: dict, synthetic: dict) -> dict:
    """The figures of :data:`FIGURES` for one synthetic network against the true one."""
    def ratio(x, y):
        return float(x / y) if y else float("nan")

    return {"contacts_ratio": ratio(synthetic["contacts"], true["contacts"]),
            "degree_ks": ks_statistic(true["degrees"], synthetic["degrees"]),
            "largest_degree_ratio": ratio(synthetic["largest_degree"], true["largest_degree"]),
            "clustering_ratio": ratio(synthetic["average_clustering"], true["average_clustering"]),
            "final_size_ratio": ratio(synthetic["final_size"], true["final_size"])}


def summarise(rows) -> dict:
    """Mean and standard deviation of each figure over synthetic networks."""
    out = {}
    for k in FIGURES:
        v = np.array([r[k] for r in rows], dtype=np.float64)
        v = v[np.isfinite(v)]
        out[k] = {"mean": float(v.mean()) if len(v) else float("nan"),
                  "sd": float(v.std(ddof=1)) if len(v) > 1 else 0.0, "networks": int(len(v))}
    return out
