"""The uniform block sampler: exact counts per cell, contacts uniform within each cell.

The fallback of the one sampler (:mod:`aggpub.synthesis.sampler`) for releases
without degree sequences (and for older bundles).

References
----------
M. Hay, G. Miklau, D. Jensen, D. Towsley, P. Weis, "Resisting structural
re-identification in anonymized social networks", PVLDB 1(1), 2008.
"""

from __future__ import annotations

__all__ = ["sample_block_network"]

import numpy as np

from ..cells import possible_pairs, unrank_pairs
from ._distinct import distinct_per_cell


def sample_block_network(a, b, count, sizes, rng):
    """One synthetic network with exactly ``count`` distinct contacts in every cell (uniform within each cell).

    Inputs already validated: cells ``a <= b`` over ``len(sizes)`` supernodes, ``0 <=
    count <= possible pairs``. Synthetic person ``offset[g] + i`` (``offset`` the running
    total of ``sizes``) is member ``i`` of supernode ``g``.

    Returns
    -------
    u, v : numpy.ndarray of int64
        Contacts ``u < v``, sorted by cell.

    References
    ----------
    M. Hay, G. Miklau, D. Jensen, D. Towsley, P. Weis, "Resisting structural
    re-identification in anonymized social networks", PVLDB 1(1), 2008.
    """
    a = np.asarray(a, dtype=np.int64)
    b = np.asarray(b, dtype=np.int64)
    count = np.asarray(count, dtype=np.int64)
    sizes = np.asarray(sizes, dtype=np.int64)
    n = len(sizes)
    space = possible_pairs(sizes, a, b)
    offset = np.zeros(n, dtype=np.int64)
    np.cumsum(sizes[:-1], out=offset[1:])
    # _distinct returns exactly count[c] values per cell, in cell order: cell attributes by np.repeat.
    _, r = distinct_per_cell(space, count, rng)
    on_diag = a == b
    # off the diagonal, pair index r = i * size_b + j; fixed below for the diagonal cells
    src, tgt = np.divmod(r, np.repeat(np.maximum(sizes[b], 1), count))
    src += np.repeat(offset[a], count)
    tgt += np.repeat(offset[b], count)
    if on_diag.any():
        d = np.flatnonzero(np.repeat(on_diag, count))
        i, j = unrank_pairs(r[d])
        base_d = np.repeat(offset[a[on_diag]], count[on_diag])
        src[d] = base_d + i
        tgt[d] = base_d + j
    return src, tgt
