"""Released components: true values from the engine, noise, post-processing.

Each ``release_*`` function takes the true statistic (computed by the engine),
the epsilon of its share and a random source, and returns the public table plus
the :class:`~aggpub.grouping.Spend` to record. Sensitivities are derived in
``docs/privacy.md``; the constants here must match that table and the
brute-force neighbour tests in ``tests/test_sensitivity.py``.
"""

from __future__ import annotations

__all__ = ["SENSITIVITY", "sensitivity", "cell_index", "all_cells", "possible_pairs",
           "release_superedge_counts", "SuperedgeTruth", "release_cell_counts", "released_sizes",
           "release_degree_histograms", "release_weight_totals", "check_contact_cap"]

from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from .errors import PrivacyError
from .grouping import Spend
from .noise.mechanisms import GeometricMechanism

#: L1 sensitivity of each component under each privacy unit, derived in ``docs/privacy.md``
#: and checked by brute force in ``tests/test_sensitivity.py`` (``None`` or missing: not
#: released under that unit). Symbols: ``D`` the policy's contact cap
#: (``privacy.max_contacts``), ``w_max`` the weight clip bound (``components.weight_totals.clip``).
#: Under ``person`` the supernode sizes are the fine attribute cells' counts (the released
#: supernode sizes are sums of them); the degree-histogram bound holds for any top-bin cap >= 1.
SENSITIVITY = {
    ("edge", "superedge_counts"): 1,
    ("edge", "degree_histograms"): 4,
    ("edge", "supernode_sizes"): 0,
    ("edge", "weight_totals"): "w_max",
    ("person", "supernode_sizes"): 1,
    ("person", "superedge_counts"): "D",
    ("person", "degree_histograms"): "2D+1",
    ("person", "weight_totals"): "D*w_max",
}


def sensitivity(unit: str, component: str, max_contacts=None, clip=None) -> float:
    """The L1 sensitivity of ``component`` under ``unit`` (see ``docs/privacy.md``).

    Parameters
    ----------
    unit : str
        ``"edge"`` or ``"person"``.
    component : str
        ``supernode_sizes``, ``superedge_counts``, ``degree_histograms`` or ``weight_totals``.
    max_contacts : int, optional
        ``D``, needed under ``person``.
    clip : int, optional
        ``w_max``, needed for ``weight_totals``.

    Raises
    ------
    PrivacyError
        No sensitivity is derived for the combination, or a needed bound is missing.
    """
    value = SENSITIVITY.get((unit, component))
    if value is None:
        raise PrivacyError(f"component '{component}' has no derived sensitivity under privacy unit "
                           f"'{unit}'; disable it in [components] or change the unit")
    if isinstance(value, str):
        if "D" in value and max_contacts is None:
            raise PrivacyError(f"component '{component}' under unit '{unit}' needs 'privacy.max_contacts'")
        if "w_max" in value and clip is None:
            raise PrivacyError(f"component '{component}' needs 'components.weight_totals.clip'")
        d = None if max_contacts is None else int(max_contacts)
        w = None if clip is None else int(clip)
        formulas = {"D": lambda: d, "w_max": lambda: w, "2D+1": lambda: 2 * d + 1, "D*w_max": lambda: d * w}
        return float(formulas[value]())
    return float(value)


def check_contact_cap(degrees, max_contacts: int) -> None:
    """Refuse a network in which anyone has more than ``max_contacts`` contacts (unit ``person``).

    The bound is the data steward's promise; the input is never truncated to meet
    it, because no published sensitivity bound covers the counts after
    truncation. The message gives only how many people exceed the cap.

    Raises
    ------
    PrivacyError
    """
    degrees = np.asarray(degrees)
    over = int((degrees > max_contacts).sum())
    if over:
        raise PrivacyError(f"'privacy.max_contacts' = {max_contacts}: {over:,} person(s) have more contacts "
                           "than the cap; unit 'person' refuses such input (it is never truncated). Raise "
                           "the cap or use unit 'edge'")


def all_cells(n: int):
    """Every unordered pair ``a <= b`` of ``n`` supernodes, row-major upper triangle."""
    a, b = np.triu_indices(n)
    return a.astype(np.int64), b.astype(np.int64)


def cell_index(a, b, n: int):
    """Position of pair ``(a, b)``, ``a <= b``, in the order of :func:`all_cells`."""
    a = np.asarray(a, dtype=np.int64)
    b = np.asarray(b, dtype=np.int64)
    return a * n - (a * (a - 1)) // 2 + (b - a)


def possible_pairs(sizes, a, b):
    """Number of possible contacts in each cell: ``s_a s_b``, or ``s_a (s_a - 1) / 2`` on the diagonal."""
    sizes = np.maximum(np.asarray(sizes, dtype=np.int64), 0)
    sa, sb = sizes[a], sizes[b]
    return np.where(a == b, sa * (sa - 1) // 2, sa * sb)


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
    a, b = all_cells(n_groups)
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
    from .noise.sparse import choose_method, default_threshold

    n_cells = n_groups * (n_groups + 1) // 2
    if choose_method(cp.method, n_cells, cp.sparse_above_cells) == "dense":
        return None
    if cp.sparse_threshold is not None:
        return max(1, int(np.ceil(cp.sparse_threshold)))
    return default_threshold(n_cells, n_groups, -epsilon / sens)


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
        from .noise.sparse import flat_to_pair, sparse_threshold_release

        cells = sparse_threshold_release(cell_index(truth.a, truth.b, n_groups), truth.count,
                                         n_groups * (n_groups + 1) // 2, mech, sparse_threshold, source)
        out_a, out_b = flat_to_pair(cells.flat, n_groups)
        noisy = cells.value
    else:
        out_a, out_b = truth.a, truth.b
        noisy = mech.randomise(truth.count, source)
    cap = possible_pairs(public_sizes, out_a, out_b)
    released = np.clip(noisy, 0, cap).astype(np.int64)
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


# --------------------------------------------------------------------------- other components


def release_cell_counts(true_counts, epsilon: float, source, sens: float = 1.0):
    """Noisy counts of the fine attribute cells (unit ``person``: supernode sizes are private).

    One person is in exactly one fine cell, so adding or removing a person changes
    the vector of cell counts by 1 in L1. The supernode sizes released are sums of
    these noisy counts (post-processing).

    Returns
    -------
    noisy : numpy.ndarray of int64
    spend : Spend
        Named ``supernode_sizes``.
    mechanism : GeometricMechanism

    References
    ----------
    A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally utility-maximizing
    privacy mechanisms", STOC 2009.
    """
    mech = GeometricMechanism(epsilon=epsilon, sensitivity=sens)
    noisy = mech.randomise(np.asarray(true_counts, dtype=np.int64), source)
    spend = Spend.of("supernode_sizes", mech)
    return noisy, spend, mech


def released_sizes(grouping) -> np.ndarray:
    """The supernode sizes a release publishes (int64).

    The true sizes for a public grouping; under a private size release the sums
    of the noisy fine-cell counts the grouping decided on, floored at 0
    (post-processing).
    """
    if grouping.noisy_cell_sizes is None:
        return grouping.sizes()
    return np.maximum(np.rint(np.asarray(grouping.noisy_cell_sizes, dtype=np.float64)), 0).astype(np.int64)


def release_degree_histograms(truth, sizes, epsilon: float, sens: float, source, *,
                              consistency: str = "simplex", confidence: float = 0.95,
                              max_possible_degree: int | None = None):
    """Noisy per-supernode degree histograms, every bin released, made consistent.

    Discrete Laplace noise with scale ``sens / epsilon`` on every bin of every
    supernode (zeros included); then, by post-processing only, each supernode's
    bins are made non-negative integers adding up to its released size
    (:func:`aggpub.noise.consistency.consistent_histograms`).

    Parameters
    ----------
    truth : numpy.ndarray of int, shape (n_supernodes, cap + 1)
        True counts of people by supernode and degree bin (bin ``cap``: ``cap`` or more).
    sizes : array_like of int
        Public or already-released supernode sizes (the totals to match).
    epsilon, sens : float
        Epsilon share and L1 sensitivity (:data:`SENSITIVITY`).
    source : RandomSource
    max_possible_degree : int, optional
        A public bound on every degree (unit ``person``: the promised cap D). Bins
        above it are known to be empty and are set to 0 before the others are made
        consistent (post-processing with public knowledge).

    Returns
    -------
    table : pyarrow.Table
        ``supernode``, ``degree_bin``, ``people`` (consistent), ``people_noisy`` (before
        post-processing, unbiased), ``noise_scale``, ``ci95_half_width`` (of ``people_noisy``).
    spend : Spend
    mechanism : GeometricMechanism

    References
    ----------
    M. Hay, V. Rastogi, G. Miklau, D. Suciu, "Boosting the accuracy of
    differentially private histograms through consistency", PVLDB 3(1), 2010.
    """
    from .noise.consistency import consistent_histograms

    truth = np.asarray(truth, dtype=np.int64)
    g, b = truth.shape
    mech = GeometricMechanism(epsilon=epsilon, sensitivity=sens)
    noisy = mech.randomise(truth, source)
    possible = b if max_possible_degree is None else min(b, int(max_possible_degree) + 1)
    people = np.zeros((g, b), dtype=np.int64)
    people[:, :possible] = consistent_histograms(noisy[:, :possible], np.asarray(sizes, dtype=np.int64),
                                                 method=consistency)
    n = g * b
    table = pa.table({
        "supernode": pa.array(np.repeat(np.arange(g, dtype=np.int64), b)),
        "degree_bin": pa.array(np.tile(np.arange(b, dtype=np.int64), g)),
        "people": pa.array(people.reshape(-1).astype(np.int64)),
        "people_noisy": pa.array(noisy.reshape(-1).astype(np.int64)),
        "noise_scale": pa.array(np.full(n, mech.scale)),
        "ci95_half_width": pa.array(np.full(n, mech.interval_half_width(confidence), dtype=np.int64)),
    })
    spend = Spend.of("degree_histograms", mech)
    return table, spend, mech


def release_weight_totals(truth: SuperedgeTruth, public_sizes, clip: int, epsilon: float, sens: float,
                          source, confidence: float = 0.95):
    """Noisy totals of clipped integer weights on every superedge cell, zeros included.

    ``truth.count`` holds the true totals of ``round(min(max(w, 0), clip))`` per
    cell. Discrete Laplace noise with scale ``sens / epsilon``, then
    post-processing: clamp to ``[0, clip * possible pairs]``.

    Returns
    -------
    table : pyarrow.Table
        ``supernode_a``, ``supernode_b``, ``weight_total``, ``max_weight_total``,
        ``noise_scale``, ``ci95_half_width``.
    spend : Spend
    mechanism : GeometricMechanism
    """
    mech = GeometricMechanism(epsilon=epsilon, sensitivity=sens)
    noisy = mech.randomise(truth.count, source)
    cap = possible_pairs(public_sizes, truth.a, truth.b) * int(clip)
    released = np.clip(noisy, 0, cap).astype(np.int64)
    n = len(released)
    table = pa.table({
        "supernode_a": pa.array(truth.a),
        "supernode_b": pa.array(truth.b),
        "weight_total": pa.array(released),
        "max_weight_total": pa.array(cap.astype(np.int64)),
        "noise_scale": pa.array(np.full(n, mech.scale)),
        "ci95_half_width": pa.array(np.full(n, mech.interval_half_width(confidence), dtype=np.int64)),
    })
    spend = Spend.of("weight_totals", mech)
    return table, spend, mech
