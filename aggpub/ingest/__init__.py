"""Ingest: edges and person attributes into a :class:`Network` with dense integer ids.

Edge files (CSV, TSV or Parquet) have two id columns (default ``source`` and
``target``) and optionally a weight column. Person files (CSV or Parquet) have an
id column (default ``node``) plus attribute columns. Ids may be integers or
strings; each person is mapped once to a dense integer (its row in the person
table). The network is undirected: self-loops are dropped and counted, duplicate
pairs are collapsed (their weights summed) and counted. An edge naming a person
missing from the person table is an error, or is dropped and counted when
``drop_unknown`` is set.

The edges never leave the counting engine; only the person table (attributes)
comes back to Python as an Arrow table.

What is accepted and what is refused (each refusal is an :class:`InputError`
naming the file and the row, line or column, never a value from the file):

* CSV must be comma-separated, TSV tab-separated, UTF-8; a UTF-8 byte-order mark
  is accepted and dropped. The header must have distinct, non-empty names. A
  ragged row, an unclosed quote or non-UTF-8 bytes are refused with the line number.
* Ids are text. CSV ids are read verbatim, never re-typed (``007`` stays ``007``;
  ids beyond 64 bits are fine). Parquet/Arrow id columns must be integers (any
  width, signed or unsigned) or strings; floats, decimals, booleans, dates and
  nested types are refused. An empty id, or one spelling a missing value
  (:data:`MISSING_ID_SPELLINGS`), is refused.
* Weights must be finite and non-negative numbers; text weights are parsed.
* A missing column names the columns found when they are column names (a
  Parquet or Arrow schema, a CSV first line that reads as a header); a CSV first
  line that may be data (a file without a header) is never quoted.

Where the rules live: ``_files`` (file checks, format, CSV header, the missing-id
spellings, the engine's :class:`~aggpub.engines.interface.Source`), ``_columns``
(missing columns, id and weight types), ``_people`` (person checks and the dense
ids, in Python over Arrow), ``_edges`` (edge checks and counts). The engine
(:class:`aggpub.engines.Engine`) only reads, maps and counts in its own SQL: this
package hands it plain values and words every message, the same for every engine.
"""

from __future__ import annotations

__all__ = ["Network", "IngestReport", "load_network", "load_people", "load_policy_inputs", "policy_attributes",
           "policy_weight_column", "file_format", "csv_header", "MISSING_ID_SPELLINGS"]

import pyarrow as pa

from ..engines import make_engine
from ..errors import PolicyError
from ..network import IngestReport, Network
from ._edges import read_edges
from ._files import MISSING_ID_SPELLINGS, check_input_path, csv_header, file_format, input_source
from ._people import read_people


def load_network(edges, people, *, source="source", target="target", node="node", weight=None,
                 drop_unknown=False, attributes=None, engine=None, debug=False, show_counts=True, layer=None,
                 layer_values=(), on_refusal=None) -> Network:
    """Read edges and person attributes into a :class:`Network`.

    Parameters
    ----------
    edges : str, Path or pyarrow.Table
        Edge list: a CSV/TSV/Parquet file or an Arrow table.
    people : str, Path or pyarrow.Table
        Person attributes: a CSV/Parquet file or an Arrow table.
    source, target, node, weight : str
        Column names (``weight`` optional).
    drop_unknown : bool
        Drop edges naming people missing from the person table instead of failing.
    attributes : sequence of str, optional
        Attribute columns to keep (default: all but the id column).
    engine : aggpub.engines.Engine, optional
        A counting engine (default: a new embedded DuckDB engine). It keeps the
        contacts; an earlier load's are replaced.
    debug : bool
        Allow private values (ids) in error messages.
    show_counts : bool
        Count the offending rows in refusals (off under unit ``person``, where the
        number of people or contacts in any condition is a private figure); refusals
        that depend on the contacts then say no figure, and ``on_refusal()`` runs before
        them (the pipeline charges the ledger).
    layer : str, optional
        The edge column holding each contact's layer; ``layer_values`` its declared values in the order
        of the one-layer rule (issue 13).

    Returns
    -------
    Network
    """
    edges = edges if isinstance(edges, pa.Table) else check_input_path(edges, "edge")
    people = people if isinstance(people, pa.Table) else check_input_path(people, "person")
    if engine is None:
        engine = make_engine("duckdb")
    people_src = input_source(people, "person", debug)
    persons = read_people(engine, people_src, node, attributes, show_counts)
    counts = read_edges(engine, input_source(edges, "edge", debug), source_col=source, target_col=target,
                        weight=weight, ids=persons.id_table, drop_unknown=drop_unknown, people_label=people_src.label,
                        show_counts=show_counts, layer=layer, layer_values=layer_values, on_refusal=on_refusal)
    n_people = len(persons.ids)
    report = IngestReport(edge_rows=counts.rows, edges=counts.edges, self_loops_dropped=counts.self_loops,
                          duplicate_rows_collapsed=counts.duplicates,
                          unknown_person_rows_dropped=counts.unknown_person, person_rows=persons.rows,
                          people=n_people, duplicate_person_rows_collapsed=persons.rows - n_people)
    return Network(people=persons.attributes, n_people=n_people, n_edges=counts.edges, engine=engine, report=report,
                   weighted=bool(weight), ids=persons.ids, layers=tuple(layer_values) if layer else ())


def load_people(people, *, node="node", attributes=None, engine=None, debug=False) -> pa.Table:
    """Read the person table alone (no edge is read): one row per person, attribute columns as text.

    For the pre-flight under unit ``edge``, where the person table is public. The
    same rules as :func:`load_network` (ids, repeated rows, conflicts).
    """
    people = people if isinstance(people, pa.Table) else check_input_path(people, "person")
    own = engine is None
    engine = engine or make_engine("duckdb")
    try:
        return read_people(engine, input_source(people, "person", debug), node, attributes).attributes
    finally:
        if own:
            engine.close()


def policy_weight_column(policy, given=None):
    """The edge weight column to read: ``components.weight_totals.column`` when weight totals are on."""
    wt = policy.components.weight_totals
    cv = policy.components.contact_views
    if cv.enabled and cv.weighted:  # issue 13: weighted views read the weight column too
        if given and given != cv.column:
            raise PolicyError(f"'components.contact_views.column' = '{cv.column}' differs from the weight column "
                              f"given for input ('{given}'); name one column")
        if wt.enabled and wt.column != cv.column:
            raise PolicyError(f"'components.contact_views.column' = '{cv.column}' differs from "
                              f"'components.weight_totals.column' = '{wt.column}'; name one column")
        given = cv.column
    if not wt.enabled:
        return given
    if given and given != wt.column:
        raise PolicyError(f"'components.weight_totals.column' = '{wt.column}' differs from the weight column "
                          f"given for input ('{given}'); name one column")
    return wt.column


def policy_attributes(policy) -> list:
    """The person attributes a policy reads: its grouping attributes and the gate's contact-matrix attribute."""
    attrs = list(policy.grouping.attributes)
    gate_attr = policy.gate.contact_matrix_attribute
    if gate_attr and gate_attr not in attrs:
        attrs.append(gate_attr)
    from ..policy import view_attributes

    attrs += [a for a in view_attributes(policy) if a not in attrs]  # issue 13: the views' attributes
    return attrs


def load_policy_inputs(policy, edges, people, *, source=None, target=None, node=None, weight=None,
                       drop_unknown=None, engine=None, debug=False, on_refusal=None) -> Network:
    """Read the inputs of a release, sweep or plan the way ``policy`` says.

    Column options left as ``None`` come from the policy's ``[input]`` section;
    the weight column from ``components.weight_totals`` when weight totals are
    released; only the attributes the policy uses are kept.

    Returns
    -------
    Network
    """
    inp = policy.input
    return load_network(edges, people, source=source or inp.source, target=target or inp.target,
                        node=node or inp.node, weight=policy_weight_column(policy, weight or inp.weight),
                        drop_unknown=inp.drop_unknown if drop_unknown is None else drop_unknown,
                        attributes=policy_attributes(policy), engine=engine, debug=debug,
                        show_counts=debug or policy.privacy.unit != "person", layer=policy.layers.column,
                        layer_values=policy.layers.values, on_refusal=on_refusal)
