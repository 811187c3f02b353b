"""Superedge counts: contacts within and between supernodes, every cell noised (or the sparse release)."""

from __future__ import annotations

__all__ = ["SuperedgeTruth", "dense_truth", "superedge_sparse_threshold", "release_superedge_counts"]

from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from ..budget import Spend
from .. import cells as _cells
from ..cells import cell_index, flat_to_pair, n_cells, possible_pairs
from ..estimates.consistency import clamp
from ..noise.mechanisms import GeometricMechanism


@dataclass
class SuperedgeTruth:
    """True superedge counts on every cell (confidential; never written to a bundle).

    ``complete`` is False for the sparse release: then only the non-zero cells are
    listed (every other cell of the ``n (n + 1) / 2`` is zero).
    """

    a: np.ndarray
    b: np.ndarray
    count: np.ndarray
    complete: bool = True


def dense_truth(n_groups: int, nz_a, nz_b, nz_count) -> SuperedgeTruth:
    """Scatter non-zero counts into the full table of cells."""
    a, b = _cells.all_cells(n_groups)
    count = np.zeros(len(a), dtype=np.int64)
    if len(nz_a):
        count[cell_index(nz_a, nz_b, n_groups)] = nz_count
    return SuperedgeTruth(a=a, b=b, count=count)


def superedge_sparse_threshold(cp, n_groups: int, epsilon: float, sens: float):
    """The sparse threshold to use for superedge counts, or ``None`` for the dense release.

    ``cp`` is the policy's ``components.superedge_counts``: method ``sparse``, or
    ``auto`` with at least ``sparse_above_cells`` cells, gives the sparse release with
    ``ceil(sparse_threshold)`` (noisy values are integers) or, when unset, the default
    of :func:`aggpub.noise.sparse.default_threshold`. Depends on public values only.
    """
    from ..noise.sparse import choose_method, default_threshold

    cells = n_cells(n_groups)
    if choose_method(cp.method, cells, cp.sparse_above_cells) == "dense":
        return None
    if cp.sparse_threshold is not None:
        return max(1, int(np.ceil(cp.sparse_threshold)))
    return default_threshold(cells, n_groups, -epsilon / sens)


def release_superedge_counts(truth: SuperedgeTruth, public_sizes, epsilon: float, sens: float, source,
                             confidence: float = 0.95, *, sparse_threshold=None, n_groups=None):
    """Noisy superedge counts on every cell, zeros included (or the sparse release).

    Discrete Laplace noise with scale ``sens / epsilon`` on every cell, then
    post-processing: clamp to ``[0, possible pairs]`` (the possible pairs come
    from public or already-released sizes) and keep integers.

    With ``sparse_threshold`` (an integer >= 1) ``truth`` lists only the non-zero
    cells of the ``n_groups (n_groups + 1) / 2`` and the table holds only the cells
    whose noisy value is at least the threshold, drawn without building the dense
    table: the distribution of noising every cell and then thresholding (Cormode,
    Procopiuc, Srivastava, Tran, ICDT 2012; see :mod:`aggpub.noise.sparse`).

    Returns
    -------
    table : pyarrow.Table
        ``supernode_a``, ``supernode_b``, ``edge_count``, ``possible_pairs``,
        ``noise_scale``, ``ci95_half_width``.
    spend : Spend
    mechanism : GeometricMechanism

    References
    ----------
    A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally utility-maximizing
    privacy mechanisms", STOC 2009.
    """
    mech = GeometricMechanism(epsilon=epsilon, sensitivity=sens)
    if sparse_threshold is not None:
        from ..noise.sparse import sparse_threshold_release

        kept = sparse_threshold_release(cell_index(truth.a, truth.b, n_groups), truth.count,
                                        n_cells(n_groups), mech, sparse_threshold, source)
        out_a, out_b = flat_to_pair(kept.flat, n_groups)
        noisy = kept.value
    else:
        out_a, out_b = truth.a, truth.b
        noisy = mech.randomise(truth.count, source)
    cap = possible_pairs(public_sizes, out_a, out_b)
    released = clamp(noisy, 0, cap)
    n = len(released)
    table = pa.table({
        "supernode_a": pa.array(out_a),
        "supernode_b": pa.array(out_b),
        "edge_count": pa.array(released),
        # the noisy value before clamping (may be negative): unbiased, so sums of it are unbiased too
        "edge_count_unclamped": pa.array(np.asarray(noisy, dtype=np.int64)),
        "possible_pairs": pa.array(cap.astype(np.int64)),
        "noise_scale": pa.array(np.full(n, mech.scale)),
        "ci95_half_width": pa.array(np.full(n, mech.interval_half_width(confidence), dtype=np.int64)),
    })
    spend = Spend.of("superedge_counts", mech)
    return table, spend, mech
