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
    """True superedge counts on every cell (confidential; never written to a bundle)."""

    a: np.ndarray
    b: np.ndarray
    count: np.ndarray


def dense_truth(n_groups: int, nz_a, nz_b, nz_count) -> SuperedgeTruth:
    """Scatter non-zero counts into the full table of cells."""
    a, b = all_cells(n_groups)
    count = np.zeros(len(a), dtype=np.int64)
    if len(nz_a):
        count[cell_index(nz_a, nz_b, n_groups)] = nz_count
    return SuperedgeTruth(a=a, b=b, count=count)


def release_superedge_counts(truth: SuperedgeTruth, public_sizes, epsilon: float, sens: float, source,
                             confidence: float = 0.95):
    """Noisy superedge counts on every cell, zeros included.

    Discrete Laplace noise with scale ``sens / epsilon`` on every cell, then
    post-processing: clamp to ``[0, possible pairs]`` (the possible pairs come
    from public or already-released sizes) and keep integers.

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
    noisy = mech.randomise(truth.count, source)
    cap = possible_pairs(public_sizes, truth.a, truth.b)
    released = np.clip(noisy, 0, cap).astype(np.int64)
    n = len(released)
    table = pa.table({
        "supernode_a": pa.array(truth.a),
        "supernode_b": pa.array(truth.b),
        "edge_count": pa.array(released),
        "possible_pairs": pa.array(cap.astype(np.int64)),
        "noise_scale": pa.array(np.full(n, mech.scale)),
        "ci95_half_width": pa.array(np.full(n, mech.interval_half_width(confidence), dtype=np.int64)),
    })
    spend = Spend(name="superedge_counts", epsilon=epsilon, sensitivity=sens, mechanism=mech.name,
                  scale=mech.scale)
    return table, spend, mech
