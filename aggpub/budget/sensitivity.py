"""Every L1 sensitivity the code uses, in one table.

Each entry is derived in ``docs/privacy.md`` (released components) or
``docs/privacy-grouping.md`` (the private grouping's steps) and checked by
brute force in ``tests/test_sensitivity.py`` and ``tests/test_grouping_structure.py``:
a constant here that is wrong makes those tests fail.
"""

from __future__ import annotations

__all__ = ["SENSITIVITY", "sensitivity", "check_contact_cap"]

import numpy as np

from ..errors import PrivacyError

#: L1 sensitivity of each released statistic under each privacy unit (``None`` or missing: not
#: released under that unit). Symbols: ``D`` the policy's contact cap (``privacy.max_contacts``),
#: ``w_max`` the weight clip bound (``components.weight_totals.clip``). Under ``person`` the
#: supernode sizes are the fine attribute cells' counts (the released supernode sizes are sums of
#: them); the degree-histogram bound holds for any top-bin cap >= 1. ``grouping_degrees`` and
#: ``grouping_profiles`` are the private structural grouping's noisy degree vector and
#: person x supernode contact profiles (``docs/privacy-grouping.md``). ``degree_sequences`` is the
#: vector of every supernode's sorted degrees. ``triangle_count`` has no useful bound of its own (one
#: contact closes up to ``n - 2`` triangles): it is released by the ladder mechanism, and its entry is
#: the sensitivity of that mechanism's rung score, 1 (``docs/privacy.md`` section 3.4;
#: :mod:`aggpub.noise.ladder`). Neither has a bound under ``person``; the policy refuses them there.
SENSITIVITY = {
    ("edge", "superedge_counts"): 1,
    ("edge", "degree_histograms"): 4,
    ("edge", "degree_sequences"): 2,
    ("edge", "triangle_count"): 1,
    ("edge", "supernode_sizes"): 0,
    ("edge", "weight_totals"): "w_max",
    ("edge", "grouping_degrees"): 2,
    ("edge", "grouping_profiles"): 2,
    ("person", "supernode_sizes"): 1,
    ("person", "superedge_counts"): "D",
    ("person", "degree_histograms"): "2D+1",
    ("person", "weight_totals"): "D*w_max",
    # contact views (issue 13; docs/privacy.md section 3.3): one view, all of its layers together (each
    # contact in one layer: parallel composition); weighted views with their own clip bound w_max;
    # people per value of an attribute outside the grouping under unit person (one person, one value)
    ("edge", "contact_views"): 1,
    ("edge", "contact_view_weights"): "w_max",
    ("edge", "view_people"): 0,
    ("person", "contact_views"): "D",
    ("person", "contact_view_weights"): "D*w_max",
    ("person", "view_people"): 1,
}


def sensitivity(unit: str, component: str, max_contacts=None, clip=None) -> float:
    """The L1 sensitivity of ``component`` under ``unit`` (see ``docs/privacy.md``).

    Parameters
    ----------
    unit : str
        ``"edge"`` or ``"person"``.
    component : str
        A key of :data:`SENSITIVITY` (``supernode_sizes``, ``superedge_counts``,
        ``degree_histograms``, ``weight_totals``, ``degree_sequences``, ``triangle_count``,
        ``grouping_degrees``, ``grouping_profiles``).
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


def check_contact_cap(degrees, max_contacts: int, on_refusal=None) -> None:
    """Refuse a network in which anyone has more than ``max_contacts`` contacts (unit ``person``).

    The cap is the data steward's promise, the premise of the person unit's
    guarantee (neighbouring networks both keep it). Input is never truncated to
    meet it: no published sensitivity bound covers the counts after truncation.
    Whether the data break the promise is private, so the refusal says neither
    how many people nor by how much, and ``on_refusal()`` runs first (the
    pipeline charges the lifetime ledger: probing the cap costs budget).

    Raises
    ------
    PrivacyError
    """
    if bool((np.asarray(degrees) > max_contacts).any()):
        if on_refusal is not None:
            on_refusal()
        raise PrivacyError(f"'privacy.max_contacts' = {max_contacts}: the input breaks the promised cap on contacts "
                           "per person, so unit 'person' refuses it (it is never truncated). Choose the cap from "
                           "public facts (the most contacts the survey form can record, the study design), never "
                           "from this data; this refusal is charged to the lifetime ledger like a release")
