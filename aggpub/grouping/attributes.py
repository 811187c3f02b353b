"""Supernodes from public attributes, small cells generalised up declared hierarchies.

People sharing the same tuple of attribute values form a candidate supernode
(a cell). While a cell has fewer than ``min_size`` members, its values climb the
declared generalisation hierarchies, one attribute at a time in the policy's
``merge_order``; cells that reach the same generalised tuple merge. Cells still
too small after every hierarchy is climbed join one residual supernode (its
differing attributes shown as ``*``); a residual that is itself too small joins
the smallest released supernode. Every released supernode thus has at least
``min_size`` members, as k-anonymity requires of each released group.

This is local recoding in the sense of k-anonymity: a large cell keeps its fine
values while its small siblings are generalised, so the labels of two supernodes
may overlap (``0-9`` next to ``5-9``); a supernode stands for exactly the people
assigned to it.

References
----------
L. Sweeney, "k-anonymity: a model for protecting privacy", International Journal
of Uncertainty, Fuzziness and Knowledge-Based Systems 10(5), 2002.

M. Hay, G. Miklau, D. Jensen, D. Towsley, P. Weis, "Resisting structural
re-identification in anonymized social networks", PVLDB 1(1), 2008.
"""

from __future__ import annotations

__all__ = ["group_by_attributes", "RESIDUAL"]

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import InputError, PolicyError, PrivacyError, closest_name
from ._common import Grouping

RESIDUAL = "*"
#: Largest number of possible attribute combinations counted with a dense table (8 bytes each).
DENSE_KEY_MAX = 1 << 24


def _encode(people: pa.Table, attributes):
    """Fine cells: (labels as tuples, counts, person -> cell index)."""
    codes, dictionaries = [], []
    for a in attributes:
        col = people.column(a).combine_chunks()
        enc = pc.dictionary_encode(col) if not pa.types.is_dictionary(col.type) else col
        codes.append(np.asarray(enc.indices.to_numpy(zero_copy_only=False), dtype=np.int64))
        dictionaries.append(enc.dictionary.to_pylist())
    radix = [max(1, len(d)) for d in dictionaries]
    if float(np.prod([float(r) for r in radix])) < 2.0 ** 62:
        key = np.zeros(people.num_rows, dtype=np.int64)
        for c, r in zip(codes, radix):
            key = key * r + c
        n_keys = int(np.prod(radix))
        if n_keys <= DENSE_KEY_MAX:  # a counting pass instead of sorting every person (np.unique)
            full = np.bincount(key, minlength=n_keys)
            uniq = np.flatnonzero(full)
            counts = full[uniq]
            position = np.zeros(n_keys, dtype=np.int64)
            position[uniq] = np.arange(len(uniq))
            inverse = position[key]
        else:
            uniq, inverse, counts = np.unique(key, return_inverse=True, return_counts=True)
        cell_codes = []
        rest = uniq.copy()
        for r in reversed(radix):
            cell_codes.append(rest % r)
            rest //= r
        cell_codes = np.stack(list(reversed(cell_codes)), axis=1)
    else:  # pragma: no cover - needs astronomically many attribute values
        uniq, inverse, counts = np.unique(np.stack(codes, axis=1), axis=0, return_inverse=True,
                                          return_counts=True)
        cell_codes = uniq
    labels = [tuple(dictionaries[j][cell_codes[i, j]] for j in range(len(attributes)))
              for i in range(len(cell_codes))]
    return labels, counts.astype(np.float64), inverse.reshape(-1)


def group_by_attributes(people: pa.Table, attributes, min_size: int, hierarchies=None, merge_order=None,
                        cell_counts=None) -> Grouping:
    """Group people by attribute tuples into supernodes of at least ``min_size`` members.

    Parameters
    ----------
    people : pyarrow.Table
        One row per person with the attribute columns (strings).
    attributes : sequence of str
        Grouping attributes, in label order.
    min_size : int
        Minimum number of members of every supernode (k).
    hierarchies : mapping, optional
        ``attribute -> [level0, level1, ...]``, each level a mapping value -> coarser value.
    merge_order : sequence of str, optional
        Attributes in the order their hierarchies are climbed (default: reverse of ``attributes``).
    cell_counts : callable, optional
        ``cell_counts(true_counts) -> counts`` used for every size decision, for a
        privacy unit under which the sizes are private (the pipeline passes noisy
        counts). Default: the true counts (sizes public).

    Returns
    -------
    Grouping

    Raises
    ------
    PolicyError
        An attribute value is not covered by a declared hierarchy.
    PrivacyError
        No grouping can give every supernode ``min_size`` members.
    """
    attributes = list(attributes)
    hierarchies = dict(hierarchies or {})
    merge_order = list(merge_order) if merge_order else list(reversed(attributes))
    for a in attributes:
        if a not in people.column_names:
            raise InputError(f"person table: no attribute column '{a}'"
                             f"{closest_name(a, people.column_names)}")
    n = people.num_rows
    if n < min_size and cell_counts is None:  # with private sizes only the noisy counts may decide
        raise PrivacyError(f"'grouping.min_size' = {min_size} is larger than the population ({n} people): "
                           "no supernode can have that many members")
    labels, true_counts, inverse = _encode(people, attributes)
    counts = np.asarray(cell_counts(true_counts.astype(np.int64)), dtype=np.float64) \
        if cell_counts is not None else true_counts
    n_cells = len(labels)
    current = [list(t) for t in labels]
    level = np.zeros((n_cells, len(attributes)), dtype=np.int64)
    col = {a: j for j, a in enumerate(attributes)}
    generalised_cells = 0

    def group_totals():
        groups = {}
        for i, lab in enumerate(current):
            groups.setdefault(tuple(lab), []).append(i)
        totals = {g: counts[idx].sum() for g, idx in groups.items()}
        return groups, totals

    for attr in merge_order:
        j = col[attr]
        for step, mapping in enumerate(hierarchies.get(attr, ())):
            groups, totals = group_totals()
            small = [g for g, t in totals.items() if t < min_size]
            if not small:
                break
            uncovered = set()
            for g in small:
                for i in groups[g]:
                    if level[i, j] != step:
                        continue
                    value = current[i][j]
                    if value not in mapping:
                        uncovered.add(value)
                        continue
                    current[i][j] = mapping[value]
                    level[i, j] += 1
                    generalised_cells += 1
            if uncovered:
                raise PolicyError(f"'grouping.hierarchies.{attr}.levels[{step}]' does not cover "
                                  f"{len(uncovered)} value(s) of attribute '{attr}' found in small cells")

    groups, totals = group_totals()
    released = {g: idx for g, idx in groups.items() if totals[g] >= min_size}
    leftover = [i for g, idx in groups.items() if totals[g] < min_size for i in idx]
    notes = []
    if generalised_cells:
        notes.append(f"{generalised_cells} attribute value(s) of small cells generalised up their hierarchies")
    if leftover:
        leftover_total = counts[leftover].sum()
        if leftover_total >= min_size or not released:
            if leftover_total < min_size:
                raise PrivacyError(f"cannot form supernodes of at least {min_size} people: "
                                   + ("the noisy cell counts add up to fewer" if cell_counts is not None else
                                      f"only {int(true_counts.sum())} people in all"))
            lab = _common_label([current[i] for i in leftover])
            released.setdefault(lab, [])
            released[lab] = released[lab] + leftover
            notes.append(f"{len(leftover)} small cell(s) merged into a residual supernode")
        else:
            smallest = min(released, key=lambda g: (counts[released[g]].sum(), g))
            members = released.pop(smallest) + leftover
            lab = _common_label([current[i] for i in members])
            released[lab] = released.get(lab, []) + members
            notes.append(f"{len(leftover)} small cell(s) too few for a residual; merged into the smallest "
                         "supernode")
    order = sorted(released, key=lambda g: tuple((v == RESIDUAL, v) for v in g))
    cell_to_group = np.empty(n_cells, dtype=np.int32)
    for gid, g in enumerate(order):
        cell_to_group[released[g]] = gid
    assignment = cell_to_group[inverse]
    table = {"supernode": pa.array(np.arange(len(order), dtype=np.int64))}
    for j, a in enumerate(attributes):
        table[a] = pa.array([g[j] for g in order], type=pa.string())
    noisy = None
    if cell_counts is not None:
        noisy = np.array([counts[released[g]].sum() for g in order])
    return Grouping(assignment=assignment, labels=pa.table(table), method="attributes", notes=notes,
                    public=cell_counts is None, noisy_cell_sizes=noisy,
                    noisy_fine_cells=None if cell_counts is None else (labels, counts.copy()))


def _common_label(labels):
    out = []
    for j in range(len(labels[0])):
        values = {lab[j] for lab in labels}
        out.append(values.pop() if len(values) == 1 else RESIDUAL)
    return tuple(out)
