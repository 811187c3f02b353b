"""Synthetic networks drawn from a release: the one sampler, used by researchers and by the audit.

Sampling is post-processing of the public release: it reads only the released
tables, never the true network, so it costs no privacy budget and may be seeded.

References
----------
M. Hay, G. Miklau, D. Jensen, D. Towsley, P. Weis, "Resisting structural
re-identification in anonymized social networks", PVLDB 1(1), 2008.
"""

from __future__ import annotations

__all__ = ["sample_block_network", "sample_network", "synthetic_people", "write_sample"]

import json
from pathlib import Path

import numpy as np
import pyarrow as pa

from ..bundle.read import public_tables as _public_tables
from ..bundle.read import require_superedges as _superedges
from ..bundle.read import table_column as _col
from ..cells import possible_pairs, unrank_pairs
from ..errors import BundleError
from ..outputs import write_file
from ..randomness import make_generator
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
    rng = make_generator(seed)
    supernodes, superedges, manifest = _superedges(release)
    sizes = _sizes(supernodes)
    n = len(sizes)
    a = _col(superedges, "supernode_a")
    b = _col(superedges, "supernode_b")
    count = _col(superedges, "edge_count")
    if len(a) and (a.min() < 0 or b.max() >= n or (a > b).any()):
        raise BundleError("superedges table: supernode ids out of range or not ordered a <= b")
    if (count < 0).any() or (count > possible_pairs(sizes, a, b)).any():
        raise BundleError("superedges table: an edge_count is negative or above the possible pairs of its "
                          "supernodes' released sizes")
    src, tgt = sample_block_network(a, b, count, sizes, rng)
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

    return write_file(out, lambda tmp: pq.write_table(table, tmp), overwrite=overwrite, what="sample")
