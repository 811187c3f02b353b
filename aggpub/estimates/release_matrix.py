"""Contact matrices from a bundle (issue 13): the researcher's entry point, post-processing only.

:func:`contact_matrix` reads a bundle (or an in-process release): the released
views (``contact_views.parquet``, ``contact_view_weights.parquet``), the people per
value (``view_people.parquet``), the supernode labels and, when the superedge
table is dense, its unbiased column, and returns the contact matrix of one view
with intervals -- by default the least-squares consistent estimate over every
released table (:func:`aggpub.estimates.matrix.contact_matrix`), the most precise
unbiased estimate the release allows. :func:`plot_contact_matrix` draws it.
Nothing here reads private data or spends budget.
"""

from __future__ import annotations

__all__ = ["contact_matrix", "plot_contact_matrix", "write_matrix_csv", "matrix_layers"]

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import BundleError, UsageError


def _tables(release):
    tables = getattr(release, "tables", None)
    manifest = getattr(release, "manifest", None)
    if not isinstance(tables, dict) or not isinstance(manifest, dict):
        raise UsageError(f"expected a Bundle (aggpub.read_bundle) or a Release, got {type(release).__name__}")
    return tables, manifest


def matrix_layers(release) -> list:
    """The declared layers of a release's views (empty without layers)."""
    _, manifest = _tables(release)
    lay = manifest.get("layers") or {}
    return list(lay.get("values") or [])


def _complete_levels(domain, levels):
    """Hierarchy levels extended with identity entries for values a level leaves out (never generalised)."""
    current = list(domain)
    out = []
    for level in levels or ():
        level = dict(level)
        for v in current:
            level.setdefault(v, v)
        out.append(level)
        current = list(dict.fromkeys(level[v] for v in current))
    return out


def contact_matrix(release, by: str, *, layer: str | None = None, per_person: bool = False, weight: bool = False,
                   confidence: float = 0.95, method: str = "consistent", draws: int = 2000,
                   seed=None, every_layer: bool = False) -> pa.Table:
    """The contact matrix of a released view, with intervals.

    Parameters
    ----------
    release : Bundle or Release
        From :func:`aggpub.read_bundle` (or :func:`aggpub.build_release`).
    by : str
        The view: an attribute (``"age_band"``), or a combination of attributes joined by commas as the
        policy named it (``"age_band,neighbourhood"``).
    layer : str, optional
        One declared layer (``"school"``); by default the sum over every layer.
    per_person : bool
        Add the people of each value and the mean contacts per person with intervals. Row ``a`` of the rate
        matrix reads "per person of value ``a``, contacts with value ``b``": ``contacts_per_person_a`` is
        ``n(a, b) / N_a`` (twice the count on the diagonal, where both ends are in ``a``) and
        ``contacts_per_person_b`` is ``n(a, b) / N_b``.
    weight : bool
        Totals of the clipped contact weights (e.g. minutes) instead of counts (a weighted release).
    confidence : float
        Level of the intervals (default 0.95).
    method : {"consistent", "view"}
        ``consistent``: least squares over the supernode table and every released view (Hay, Rastogi,
        Miklau, Suciu, PVLDB 2010), Monte Carlo intervals from the known noise law; falls back to the raw
        view, with a note in the metadata, when the release is too large for it. ``view``: the raw view,
        exact intervals.
    draws : int
        Monte Carlo draws of the noise law (``consistent``).
    seed : int, optional
        For the Monte Carlo draws only (post-processing; OS entropy by default).
    every_layer : bool
        One row per value pair and layer, every layer at once (instead of ``layer``).

    Returns
    -------
    pyarrow.Table
        One row per unordered pair ``value_a <= value_b`` in the declared order: ``value_a``, ``value_b``,
        ``layer`` (the layer, or ``all``), ``contacts`` (``weight_total``; unbiased), ``*_clamped`` (at least
        0), ``lower``, ``upper`` (an interval at ``confidence``), ``noise_sd``; with ``per_person`` the
        columns ``people_a``, ``people_b``, ``contacts_per_person_a`` (``weight_per_person_a``) with
        ``_lower`` and ``_upper``, and the same for ``b``. The schema metadata records the method.

    References
    ----------
    J. Mossong et al., "Social contacts and mixing patterns relevant to the spread of infectious
    diseases", PLoS Medicine 5(3), 2008.

    M. Hay, V. Rastogi, G. Miklau, D. Suciu, "Boosting the accuracy of differentially private histograms
    through consistency", PVLDB 3(1), 2010.
    """
    from .matrix import contact_matrix as _matrix
    from .views import listed_views

    tables, manifest = _tables(release)
    if method not in ("consistent", "view"):
        raise UsageError(f"'method' must be 'consistent' or 'view', got {method!r}")
    if not 0 < confidence < 1:
        raise UsageError(f"'confidence' must be in (0, 1), got {confidence!r}")
    name = ",".join(x.strip() for x in str(by).split(","))
    views_key = "contact_view_weights" if weight else "contact_views"
    views = tables.get(views_key)
    if views is None:
        if weight:
            raise BundleError("the release has no weighted views (components.contact_views.weighted was off)")
        raise BundleError("the release has no contact views (components.contact_views was off)")
    released = listed_views(views)
    if name not in released:
        raise UsageError(f"no view '{by}' in the release; released views: {', '.join(released)}")
    domains = manifest.get("view_domains") or {}
    layers = matrix_layers(release) or None
    if every_layer and (layer is not None or layers is None):
        raise UsageError("'every_layer' needs a layered release and no 'layer'")
    if layer is not None and (layers is None or layer not in layers):
        raise UsageError(f"no layer '{layer}' in the release; layers: {', '.join(layers or ['(none)'])}")
    supernodes = tables["supernodes"]
    superedges, fine_note = _fine_table(tables, manifest, weight)
    policy = manifest.get("policy") or {}
    hierarchies = {a: _complete_levels(domains[a], lv) for a, lv in
                   ((policy.get("grouping") or {}).get("hierarchies") or {}).items() if a in domains}
    people = _people(tables.get("view_people"), name) if per_person else None
    if per_person and people is None:
        raise BundleError(f"the release has no people per value of view '{name}' (a combination with an attribute "
                          "outside the grouping under unit 'person'): per-person rates are not available")
    quantity = "weight_total" if weight else "contacts"
    kw = dict(domains=domains, layers=layers, hierarchies=hierarchies, people=people,
              by_layer=layer is not None or every_layer,
              per_person=per_person, quantity=quantity, confidence=confidence, draws=draws, seed=seed)
    note = fine_note
    if method == "consistent":  # public sizes decide how much of the least squares is affordable
        plan = _plan(supernodes, superedges, released, domains, hierarchies)
        if plan == "views" and superedges is not None:
            superedges, note = None, ("the supernode table was left out of the least squares (too many groups of "
                                      "supernode cells for the dense solver); the views alone")
        elif plan == "raw":
            method, note = "view", ("least squares not run (more than "
                                    f"{MAX_LS_SUPERNODE_CELLS:,} supernode cells); the raw view")
    try:
        out = _matrix(supernodes, superedges if method == "consistent" else None, views, name, method=method,
                      **kw)
    except ValueError as exc:  # too large for the dense least squares (sizes of public tables and labels)
        if method != "consistent":
            raise BundleError(f"view '{name}': {exc}") from None
        try:  # the views alone (consistent with each other), then the raw view
            if superedges is None:
                raise
            out = _matrix(supernodes, None, views, name, method="consistent", **kw)
            note = f"the supernode table was left out of the least squares ({exc}); the views alone"
        except ValueError as exc2:
            out = _matrix(supernodes, None, views, name, method="view", **kw)
            note = f"least squares not run ({exc2}); the raw view"
    if layer is not None:
        out = out.filter(pc.equal(out.column("layer"), layer))
    elif not every_layer:
        out = out.add_column(2, "layer", pa.repeat(pa.scalar("all", pa.string()), out.num_rows))
    meta = {k.decode(): v.decode() for k, v in (out.schema.metadata or {}).items()}
    meta.update(view=name, note=note or "", quantity=quantity, privacy_unit=str(manifest.get("privacy_unit")),
                epsilon_total=str(manifest.get("epsilon_total")), seeded=str(bool(manifest.get("seeded"))))
    return out.replace_schema_metadata(meta)


#: Above this many supernode cells whose groups are too many to combine, the raw view is read (least squares
#: over the views alone still scans every cell).
MAX_LS_SUPERNODE_CELLS = 1_000_000


def _plan(supernodes, superedges, views, domains, hierarchies) -> str:
    """``full``, ``views`` (leave the supernode table out) or ``raw``, from public sizes only.

    The least squares builds dense arrays of (groups of interchangeable supernode cells) x (view
    directions); the groups are at most the product over the viewed attributes of the pairs of supernode
    *kinds* (distinct sets of allowed values, from the labels), and at most the number of cells.
    """
    from .matrix import MAX_GROUP_DIRECTIONS, possible_values_from_labels

    g = supernodes.num_rows
    cells = g * (g + 1) // 2
    attrs = list(dict.fromkeys(a for v in views for a in v.split(",")))
    bound, directions = 1.0, 0
    for v in views:
        k = 1
        for a in v.split(","):
            k *= len(domains.get(a, ()))
        directions += k * (k + 1) // 2
    for a in attrs:
        if a in supernodes.column_names:
            poss = possible_values_from_labels(supernodes.column(a).to_pylist(), domains[a], hierarchies.get(a))
            kinds = _distinct_rows(poss)
        else:
            kinds = 1
        bound *= kinds * (kinds + 1) / 2
    groups = min(float(cells), bound)
    if groups * max(directions, 1) <= MAX_GROUP_DIRECTIONS:
        return "full"
    return "raw" if cells > MAX_LS_SUPERNODE_CELLS else "views"


def _distinct_rows(rows) -> int:
    """Number of distinct rows of a boolean matrix (``len(numpy.unique(rows, axis=0))``, faster).

    Each row is packed into bytes (``numpy.packbits``, one-to-one for rows of one length) and the rows are
    compared as single opaque values: a thousandth of the bytes ``numpy.unique(..., axis=0)`` sorts.
    """
    rows = np.asarray(rows, dtype=bool)
    if rows.ndim != 2 or rows.shape[1] == 0 or rows.shape[0] == 0:
        return len(np.unique(rows, axis=0))
    packed = np.ascontiguousarray(np.packbits(rows, axis=1))
    return len(np.unique(packed.view(np.dtype((np.void, packed.shape[1]))).ravel()))


def _fine_table(tables, manifest, weight):
    """The dense superedge table to combine (or ``None`` with the reason)."""
    if manifest.get("superedges_sparse"):
        return None, "sparse superedge release: the views alone (a sparse table cannot be combined unbiased)"
    if weight:
        wt = tables.get("weight_totals")
        comps = (manifest.get("policy") or {}).get("components") or {}
        same_clip = (comps.get("weight_totals") or {}).get("clip") == (comps.get("contact_views") or {}).get("clip")
        if wt is None or "weight_total_unclamped" not in wt.column_names or not same_clip:
            return None, ""
        return wt, ""
    se = tables.get("superedges")
    if se is None or "edge_count_unclamped" not in se.column_names:
        return None, ""
    return se, ""


def _people(table, name):
    """``{name: (counts, scale, terms)}`` from ``view_people`` (None when the view has none)."""
    if table is None:
        return None
    sub = table.filter(pc.equal(table.column("view"), name))
    if not sub.num_rows:
        return None
    scale = np.unique(np.asarray(sub.column("noise_scale").to_numpy(), dtype=np.float64))
    terms = np.unique(np.asarray(sub.column("noise_terms").to_numpy(), dtype=np.int64))
    if len(scale) != 1 or len(terms) != 1:
        raise BundleError(f"view_people.parquet: view '{name}' must have one noise scale and one number of terms")
    t = pa.table({"attribute": sub.column("view"), "value": sub.column("value"), "people": sub.column("people"),
                  "noise_scale": sub.column("noise_scale"), "noise_terms": sub.column("noise_terms")})
    return t


def write_matrix_csv(table: pa.Table, out, *, overwrite: bool = False):
    """Write a contact-matrix table as CSV, atomically (:func:`aggpub.outputs.write_file`)."""
    import pyarrow.csv as pacsv

    from ..outputs import write_file

    return write_file(out, lambda tmp: pacsv.write_csv(table, tmp), overwrite=overwrite, what="contact matrix")


def plot_contact_matrix(table: pa.Table, out, *, column: str | None = None, title: str | None = None,
                        overwrite: bool = False):
    """Draw a contact matrix as a heat map (PNG, matplotlib's Agg backend), written atomically.

    ``column`` defaults to the per-person rate of the row's value when the table has rates (row ``a``:
    contacts per person of ``a`` with ``b``), else the counts. The interval half-widths are shown as a
    second panel.
    """
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    from ..outputs import write_file
    from .matrix import contact_matrix_square

    names = table.column_names
    quantity = "weight_total" if "weight_total" in names else "contacts"
    if column is None:
        rate = "weight_per_person" if quantity == "weight_total" else "contacts_per_person"
        column = rate if f"{rate}_a" in names else quantity
    layers = set(table.column("layer").to_pylist()) if "layer" in names else set()
    if len(layers) > 1:
        raise UsageError("several layers in the table: plot one layer")
    values, m = contact_matrix_square(table, column)
    _, lo = contact_matrix_square(table, f"{column}_lower" if column.endswith("_per_person") else "lower")
    _, hi = contact_matrix_square(table, f"{column}_upper" if column.endswith("_per_person") else "upper")
    k = len(values)
    size = min(16.0, 3.0 + 0.42 * k)
    fig, (ax, ax2) = plt.subplots(1, 2, figsize=(2 * size, size * 0.85))
    meta = {kk.decode(): vv.decode() for kk, vv in (table.schema.metadata or {}).items()}
    for axis, data, label in ((ax, m, column.replace("_", " ")),
                              (ax2, (hi - lo) / 2.0, f"interval half-width ({meta.get('confidence', '0.95')})")):
        im = axis.imshow(np.where(np.isfinite(data), data, np.nan), cmap="viridis", origin="upper")
        axis.set_xticks(range(k))
        axis.set_yticks(range(k))
        axis.set_xticklabels(values, rotation=90, fontsize=8)
        axis.set_yticklabels(values, fontsize=8)
        axis.set_xlabel("contact's value (b)")
        axis.set_ylabel("person's value (a)" if column.endswith("_per_person") else "value a")
        fig.colorbar(im, ax=axis, fraction=0.046, pad=0.04, label=label)
    layer = next(iter(layers)) if layers else "all"
    fig.suptitle(title or f"contact matrix by {meta.get('view', '?')} (layer: {layer}; method "
                          f"{meta.get('method', '?')}, epsilon {meta.get('epsilon_total', '?')})", fontsize=11)
    fig.tight_layout()

    def write(tmp):
        fig.savefig(tmp, format="png", dpi=90)

    try:
        return write_file(out, write, overwrite=overwrite, what="plot")
    finally:
        plt.close(fig)
