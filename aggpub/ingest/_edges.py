"""The edge table: its checks, mapped through the id table and collapsed by the engine."""

from __future__ import annotations

__all__ = ["read_edges", "refuse_bad_edges", "refuse_undeclared_layers"]

import pyarrow as pa

from ..engines.interface import EdgeColumns, EdgeCounts, RowCondition, Source
from ..errors import InputError
from ._columns import missing_column_error, require_id_type, require_weight_type
from ._files import MISSING_ID_SPELLINGS


def read_edges(engine, source: Source, *, source_col: str, target_col: str, weight: str | None, ids: pa.Table,
               drop_unknown: bool, people_label: str, show_counts: bool = True, layer: str | None = None,
               layer_values=(), on_refusal=None) -> EdgeCounts:
    """Check the edge input's columns, have ``engine`` map and collapse the edges, refuse bad rows, keep the rest.

    Parameters
    ----------
    engine : aggpub.engines.Engine
    source : Source
    source_col, target_col : str
        The id columns of the two ends.
    weight : str or None
        The weight column.
    ids : pyarrow.Table
        The id table (dense id contract, :mod:`aggpub.engines.interface`).
    drop_unknown : bool
        Drop rows naming people absent from the person table instead of refusing them.
    people_label : str
        How messages name the person input.
    layer : str, optional
        The layer column (issue 13); ``layer_values`` the declared layers, in the order of the
        one-layer rule.
    private_counts : bool
        Refusals that depend on the contacts say no figure (unit ``person``); ``on_refusal()`` runs
        before such a refusal (the pipeline charges the ledger).

    Returns
    -------
    EdgeCounts
        The engine's counts; the contacts are published in the engine.

    Raises
    ------
    InputError
        A missing column, an id column of another type than integers or text,
        a weight column that is not numeric, or anything :func:`refuse_bad_edges` refuses.
    """
    columns = engine.describe(source)
    expected = [source_col, target_col] + ([weight] if weight else []) + ([layer] if layer else [])
    options = {source_col: "--source-column or [input] source", target_col: "--target-column or [input] target",
               weight: "--weight-column or [input] weight", layer: "--layer-column or [layers] column"}
    for c in expected:
        if c not in columns:
            raise missing_column_error(source, c, columns, expected, "column", options.get(c, ""))
    for c in (source_col, target_col):
        require_id_type(source, c, columns[c])
    if weight:
        require_weight_type(source, weight, columns[weight])
    spec = EdgeColumns(source=source_col, target=target_col, weight=weight, source_type=columns[source_col],
                       target_type=columns[target_col], weight_type=columns[weight] if weight else None,
                       missing_spellings=MISSING_ID_SPELLINGS, layer=layer or None,
                       layer_values=tuple(layer_values) if layer else ())
    counts = engine.stage_edges(source, spec, ids)
    try:
        refuse_bad_edges(engine, source.label, spec, counts, drop_unknown=drop_unknown, people_label=people_label,
                         show_counts=show_counts)
        refuse_undeclared_layers(engine, source.label, spec, counts, private_counts=not show_counts,
                                 on_refusal=on_refusal, debug=source.debug)
    except InputError:
        engine.discard_staged_edges()
        raise
    engine.publish_staged_edges()
    return counts


def refuse_bad_edges(engine, label: str, spec: EdgeColumns, counts: EdgeCounts, *, drop_unknown: bool,
                     people_label: str, show_counts: bool = True) -> None:
    """Refuse an edge input without rows, with missing ids, unknown people, bad weights, or no contact left.

    Each message names the first offending row (asked of the engine only on this
    error path), never a value, and counts the rows unless ``show_counts`` is off
    (unit ``person``, where such a count is a private figure).
    """
    def many(n):
        return f"{n:,} " if show_counts else "some "

    def first(condition):
        row = engine.first_staged_row(condition)
        return f" (first at data row {row})" if row else ""

    if counts.rows == 0:
        raise InputError(f"{label}: the edge table has no rows")
    if counts.missing_id:
        raise InputError(f"{label}: {many(counts.missing_id)}edge row(s) have an empty '{spec.source}' or "
                         f"'{spec.target}' (or an id spelling a missing value: NaN, NA, null)"
                         f"{first(RowCondition.MISSING_ID)}")
    if counts.unknown_person and not drop_unknown:
        raise InputError(f"{label}: {many(counts.unknown_person)}edge row(s) name people missing from {people_label}"
                         f"{first(RowCondition.UNKNOWN_PERSON)} (use --drop-unknown to drop them)")
    if spec.weight and counts.bad_weight:
        raise InputError(f"{label}: {many(counts.bad_weight)}edge row(s) have an empty, unparseable, NaN, infinite "
                         f"or negative '{spec.weight}'{first(RowCondition.BAD_WEIGHT)}")
    if counts.edges == 0:
        raise InputError(f"{label}: no contacts left after dropping self-loops"
                         + (" and unknown people" if counts.unknown_person else ""))


def refuse_undeclared_layers(engine, label: str, spec: EdgeColumns, counts: EdgeCounts, *, private_counts: bool,
                             on_refusal=None, debug: bool = False) -> None:
    """Refuse edge rows whose layer is empty or not one of the declared layers (issue 13).

    Under unit ``edge`` the message counts the rows and names the first, like the other edge refusals.
    Under unit ``person`` whether any contact has an undeclared layer is a private fact, so the message
    gives no figure and no row (``--debug`` shows them), and ``on_refusal()`` runs first: the pipeline
    charges the lifetime ledger, as for a broken contact cap (``docs/privacy.md``, data-dependent decisions).
    """
    if not spec.layer or not counts.bad_layer:
        return
    declared = "'layers.values'"
    if private_counts and not debug:
        if on_refusal is not None:
            on_refusal()
        raise InputError(f"{label}: the layer column '{spec.layer}' holds a value that is empty or not one of "
                         f"{declared}; how many rows do is private under unit 'person' and is not shown. Declare "
                         "every layer the study design allows, from the design, never from this data; this "
                         "refusal is charged to the lifetime ledger like a release")
    row = engine.first_staged_row(RowCondition.BAD_LAYER)
    if private_counts and on_refusal is not None:
        on_refusal()
    raise InputError(f"{label}: {counts.bad_layer:,} edge row(s) have an empty layer or one not listed in "
                     f"{declared} (column '{spec.layer}'){f' (first at data row {row})' if row else ''}")
