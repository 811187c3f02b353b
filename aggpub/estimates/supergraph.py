"""The release as a networkx graph of supernodes (post-processing of the public outputs)."""

from __future__ import annotations

__all__ = ["supergraph"]

import numpy as np

from ..bundle.read import public_tables as _public_tables
from ..bundle.read import table_column as _col


def supergraph(release, *, include_zero: bool = False):
    """The release as a networkx graph of supernodes.

    Nodes are supernode ids with attributes ``size`` and every label column of
    the supernodes table; edges are the superedge cells with attributes
    ``edge_count_estimate`` (the consistent, non-negative estimate whose sums are
    unbiased; the one to weight with), ``edge_count`` (clamped), ``possible_pairs``
    and ``noise_scale``. A cell on the diagonal (contacts inside one supernode) is a
    self-loop. Older bundles without estimates have no ``edge_count_estimate``.

    Parameters
    ----------
    release : Bundle or Release
    include_zero : bool, default False
        Also add cells whose estimate (older bundles: released count) is 0.

    Returns
    -------
    networkx.Graph

    Examples
    --------
    >>> import networkx as nx, pyarrow as pa
    >>> import aggpub
    >>> G = nx.karate_club_graph()  # Zachary's karate club, as networkx ships it
    >>> edges = pa.table({"source": [str(u) for u, v in G.edges()], "target": [str(v) for u, v in G.edges()]})
    >>> people = pa.table({"node": [str(n) for n in G], "club": [G.nodes[n]["club"] for n in G]})
    >>> policy = {"privacy": {"unit": "edge", "epsilon": 1.0},
    ...           "grouping": {"method": "attributes", "attributes": ["club"], "min_size": 5}}
    >>> g = aggpub.supergraph(aggpub.release_tables(edges, people, policy, seed=1), include_zero=True)
    >>> sorted(g.nodes(data="club"))
    [(0, 'Mr. Hi'), (1, 'Officer')]
    >>> g.number_of_edges()  # two cells inside the clubs (self-loops) and one between them
    3
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
        est = _col(superedges, "edge_count_estimate", np.float64) \
            if "edge_count_estimate" in superedges.column_names else None
        lead = c if est is None else est
        keep = np.flatnonzero(lead > 0) if not include_zero else np.arange(len(c))
        g.add_edges_from((int(a[i]), int(b[i]), {"edge_count": int(c[i]), "possible_pairs": int(cap[i]),
                                                 "noise_scale": float(sc[i]),
                                                 **({} if est is None else {"edge_count_estimate": float(est[i])})})
                         for i in keep)
    return g
