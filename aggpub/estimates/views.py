"""Views: contact counts between the values of an attribute, optionally per layer.

A *view* of attribute ``X`` (values coded ``0 .. K-1``) is the table
``n(a, b) = #{contacts {u, v} : {X(u), X(v)} = {a, b}}`` over every unordered
pair ``a <= b`` of values, the diagonal included, zeros included: ``K (K + 1) / 2``
cells, in the row-major upper-triangle order of :func:`aggpub.cells.all_cells`.
A view of a combination of attributes is the view of their combined code
(:func:`combine_codes`). With *layers* (the setting of a contact: household,
school, ...; each contact in exactly one layer, :func:`one_layer_per_contact`) a
view is one such table per layer.

The weighted variant replaces each contact's 1 by its clipped integer weight
(:func:`clip_weights`), giving totals such as minutes of contact between groups.

Sensitivities (``docs/contact-matrices.md``): one contact is in exactly one cell
of a view, and in exactly one layer, so under unit ``edge`` the L1 sensitivity
of a view -- all of its layers together -- is 1 (``w_max`` weighted); under unit
``person`` with contact cap ``D`` it is ``D`` (``D * w_max``). See
:func:`view_sensitivity`.

Everything here is vectorised numpy over the edge arrays; the functions that
compute true tables read private data and belong to the counting stage, the
release helper adds the noise.
"""

from __future__ import annotations

__all__ = ["view_cell_count", "view_cells", "view_cell_index", "combine_codes", "clip_weights",
           "one_layer_per_contact", "true_view_table", "view_sensitivity", "release_view", "view_table",
           "listed_views"]

import numpy as np
import pyarrow as pa

from ..cells import all_cells, cell_index
from ..noise.mechanisms import GeometricMechanism


def view_cell_count(n_values: int) -> int:
    """Number of cells of a view over ``n_values`` values: ``K (K + 1) / 2``."""
    n_values = int(n_values)
    return n_values * (n_values + 1) // 2


def view_cells(n_values: int):
    """Value pairs ``(a, b)``, ``a <= b``, of every cell in table order (row-major upper triangle)."""
    return all_cells(int(n_values))


def view_cell_index(x, y, n_values: int) -> np.ndarray:
    """Cell of the unordered value pair ``{x, y}`` (either order) in a view over ``n_values`` values."""
    x = np.asarray(x, dtype=np.int64)
    y = np.asarray(y, dtype=np.int64)
    return cell_index(np.minimum(x, y), np.maximum(x, y), int(n_values))


def combine_codes(codes, sizes):
    """Combined code of several attributes (mixed radix, first attribute most significant).

    Parameters
    ----------
    codes : sequence of array_like of int
        One code array per attribute (same length), ``0 <= codes[j] < sizes[j]``.
    sizes : sequence of int
        Number of values of each attribute.

    Returns
    -------
    combined : numpy.ndarray of int64
    n_values : int
        ``prod(sizes)``.
    """
    codes = [np.asarray(c, dtype=np.int64) for c in codes]
    sizes = [int(s) for s in sizes]
    if len(codes) != len(sizes) or not codes:
        raise ValueError("'codes' and 'sizes' must be non-empty and of the same length")
    out = np.zeros(len(codes[0]), dtype=np.int64)
    for c, s in zip(codes, sizes):
        if len(c) != len(out):
            raise ValueError("every code array must have the same length")
        if len(c) and (c.min() < 0 or c.max() >= s):
            raise ValueError(f"codes must lie in 0..{s - 1}")
        out = out * s + c
    return out, int(np.prod(sizes))


def clip_weights(weights, clip: int) -> np.ndarray:
    """Weights clipped to ``[0, clip]`` and rounded half away from zero to integers (int64).

    The same rule as the engine's ``round(least(greatest(w, 0), clip))`` in DuckDB
    (which rounds halves away from zero; numpy's ``rint`` would round them to even).
    """
    w = np.asarray(weights, dtype=np.float64)
    if not np.isfinite(w).all():
        raise ValueError("'weights' must be finite")
    return np.floor(np.clip(w, 0.0, float(clip)) + 0.5).astype(np.int64)


def one_layer_per_contact(u, v, layer, n_layers: int):
    """One layer per distinct contact: the first in the declared layer order.

    A pair of people recorded in several layers (met at home and at school) is
    one contact; it is given the layer with the smallest code, i.e. the first in
    the policy's declared order. The rule reads only the pair's own records, so
    adding or removing one contact (with all its records) changes exactly one
    contact of exactly one layer.

    Parameters
    ----------
    u, v : array_like of int
        Endpoints of each record (any order; self-loops are dropped).
    layer : array_like of int
        Layer code of each record, ``0 <= layer < n_layers``.
    n_layers : int

    Returns
    -------
    u, v, layer : numpy.ndarray of int64
        One row per distinct unordered pair, ``u < v``, sorted by ``(u, v)``.
    """
    u = np.asarray(u, dtype=np.int64)
    v = np.asarray(v, dtype=np.int64)
    layer = np.asarray(layer, dtype=np.int64)
    if not (len(u) == len(v) == len(layer)):
        raise ValueError("'u', 'v' and 'layer' must have the same length")
    if len(layer) and (layer.min() < 0 or layer.max() >= n_layers):
        raise ValueError(f"layer codes must lie in 0..{n_layers - 1}")
    keep = u != v
    lo, hi, layer = np.minimum(u, v)[keep], np.maximum(u, v)[keep], layer[keep]
    order = np.lexsort((layer, hi, lo))  # by pair, then by layer: the first row of a pair has its first layer
    lo, hi, layer = lo[order], hi[order], layer[order]
    first = np.ones(len(lo), dtype=bool)
    first[1:] = (lo[1:] != lo[:-1]) | (hi[1:] != hi[:-1])
    return lo[first], hi[first], layer[first]


def true_view_table(codes, u, v, n_values: int, *, layer=None, n_layers: int = 1, weights=None) -> np.ndarray:
    """True view table: contacts (or weight totals) between every unordered pair of values, per layer.

    Confidential (reads the edges); the counting stage's reference. Each contact
    is counted once, in the cell of ``{codes[u], codes[v]}``.

    Parameters
    ----------
    codes : array_like of int
        Value code of every person, ``0 <= codes[i] < n_values`` (a combined code
        for a view of several attributes, :func:`combine_codes`).
    u, v : array_like of int
        Endpoints of every contact (person indices), one row per distinct contact
        (:func:`one_layer_per_contact` when the input has several rows per pair).
    n_values : int
        Number of values (the public domain, not the values seen in the data).
    layer : array_like of int, optional
        Layer code of every contact, ``0 <= layer < n_layers``.
    n_layers : int, default 1
    weights : array_like of int, optional
        Integer (already clipped, :func:`clip_weights`) weight of every contact;
        default 1 (counts).

    Returns
    -------
    numpy.ndarray of int64, shape ``(n_layers, K (K + 1) / 2)``
        Row ``l`` is layer ``l`` (a single row without layers), columns in the
        order of :func:`view_cells`.
    """
    codes = np.asarray(codes, dtype=np.int64)
    u = np.asarray(u, dtype=np.int64)
    v = np.asarray(v, dtype=np.int64)
    n_values = int(n_values)
    n_layers = int(n_layers)
    if len(u) != len(v):
        raise ValueError("'u' and 'v' must have the same length")
    if len(codes) and (codes.min() < 0 or codes.max() >= n_values):
        raise ValueError(f"value codes must lie in 0..{n_values - 1}")
    n_cells = view_cell_count(n_values)
    cell = view_cell_index(codes[u], codes[v], n_values)
    if layer is not None:
        layer = np.asarray(layer, dtype=np.int64)
        if len(layer) != len(u):
            raise ValueError("'layer' must have one entry per contact")
        if len(layer) and (layer.min() < 0 or layer.max() >= n_layers):
            raise ValueError(f"layer codes must lie in 0..{n_layers - 1}")
        cell = cell + layer * n_cells
    elif n_layers != 1:
        raise ValueError("'n_layers' > 1 needs 'layer'")
    w = None
    if weights is not None:
        w = np.asarray(weights)
        if len(w) != len(u):
            raise ValueError("'weights' must have one entry per contact")
        if not np.issubdtype(w.dtype, np.integer):
            raise ValueError("'weights' must be integers (clip them first with clip_weights)")
        w = w.astype(np.float64)
    total = np.bincount(cell, weights=w, minlength=n_layers * n_cells)
    return np.rint(total).astype(np.int64).reshape(n_layers, n_cells)


def view_sensitivity(unit: str, *, max_contacts=None, clip=None) -> float:
    """L1 sensitivity of one view, all of its layers together (``docs/contact-matrices.md``).

    ========  ==========  =============
    unit      counts      weight totals
    ========  ==========  =============
    edge      1           ``w_max``
    person    ``D``       ``D * w_max``
    ========  ==========  =============

    Parameters
    ----------
    unit : {"edge", "person"}
    max_contacts : int, optional
        The contact cap ``D`` (needed under ``person``).
    clip : int, optional
        ``w_max`` of a weighted view; ``None`` for counts.
    """
    if unit not in ("edge", "person"):
        raise ValueError(f"'unit' must be 'edge' or 'person', got {unit!r}")
    per_contact = 1.0 if clip is None else float(int(clip))
    if clip is not None and per_contact < 1:
        raise ValueError(f"'clip' must be an integer >= 1, got {clip!r}")
    if unit == "edge":
        return per_contact
    if max_contacts is None or int(max_contacts) < 1:
        raise ValueError("unit 'person' needs 'max_contacts' (the contact cap D) >= 1")
    return float(int(max_contacts)) * per_contact


def release_view(true_table, epsilon: float, sensitivity: float, source):
    """Discrete Laplace noise on every cell of a view (all layers, zeros included).

    Returns
    -------
    noisy : numpy.ndarray of int64
        Same shape as ``true_table``; unbiased (not clamped).
    mechanism : GeometricMechanism

    References
    ----------
    A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally utility-maximizing
    privacy mechanisms", STOC 2009.
    """
    mech = GeometricMechanism(epsilon=epsilon, sensitivity=sensitivity)
    return mech.randomise(np.asarray(true_table, dtype=np.int64), source), mech


def view_table(name: str, values, noisy, scale: float, layers=None, *, column: str = "contacts") -> pa.Table:
    """A released view as an Arrow table (one row per value pair and layer).

    Columns: ``view``, ``layer`` (null without layers), ``value_a``, ``value_b``,
    ``<column>`` (clamped at 0, post-processing), ``<column>_unclamped`` (the
    mechanism's output, unbiased), ``noise_scale``.

    Parameters
    ----------
    name : str
        The view's name (the attribute, or attributes joined by ``,``).
    values : sequence of str
        The value names in code order (for a combined code, names joined by ``|``).
    noisy : array_like of int, shape ``(n_layers, K (K + 1) / 2)``
    scale : float
    layers : sequence of str, optional
        Layer names in code order; required when ``noisy`` has several rows.
    column : str
        ``contacts`` or ``weight_total``.
    """
    noisy = np.atleast_2d(np.asarray(noisy, dtype=np.int64))
    values = [str(x) for x in values]
    k = len(values)
    if noisy.shape[1] != view_cell_count(k):
        raise ValueError(f"'noisy' has {noisy.shape[1]} cells per layer, a view of {k} values has "
                         f"{view_cell_count(k)}")
    if layers is None and noisy.shape[0] != 1:
        raise ValueError("a layered view needs the layer names")
    if layers is not None and len(layers) != noisy.shape[0]:
        raise ValueError("one layer name per row of 'noisy'")
    a, b = view_cells(k)
    n_l = noisy.shape[0]
    # the string columns gathered by Arrow from the few names (no Python string per row)
    vals = pa.array(values, pa.string())
    layer_col = (pa.array([str(x) for x in layers], pa.string()).take(np.repeat(np.arange(n_l), len(a)))
                 if layers is not None else pa.nulls(n_l * len(a), pa.string()))
    flat = noisy.reshape(-1)
    return pa.table({
        "view": pa.array([name], pa.string()).take(np.zeros(len(flat), dtype=np.int64)),
        "layer": layer_col,
        "value_a": vals.take(np.tile(a, n_l)),
        "value_b": vals.take(np.tile(b, n_l)),
        column: pa.array(np.maximum(flat, 0)),
        f"{column}_unclamped": pa.array(flat),
        "noise_scale": pa.array(np.full(len(flat), float(scale))),
    })


def listed_views(table: pa.Table) -> list:
    """The names in a view table's ``view`` column, each once, in order of first appearance.

    The same list as ``list(dict.fromkeys(table.column("view").to_pylist()))``, read from the column's runs
    (``pyarrow.compute.run_end_encode``: a view's rows are consecutive) instead of a Python string per row.
    """
    import pyarrow.compute as pc

    names = []
    for chunk in pc.run_end_encode(table.column("view")).chunks:
        names.extend(chunk.values.to_pylist())
    return list(dict.fromkeys(names))
