"""The confidential report for the governance board: ``report.html`` and ``audit.json``.

The folder holds true (unprotected) statistics of the private network. It is
written outside the public bundle, atomically (a temporary sibling folder,
synced, then renamed), and every page says CONFIDENTIAL.
"""

from __future__ import annotations

__all__ = ["write_report", "render_html", "audit_to_json", "check_report_target", "default_report_path",
           "views_figure",
           "REPORT_HTML", "AUDIT_JSON"]

import base64
import html
import json
import math
import os
from pathlib import Path

import numpy as np

from ..outputs import write_folder, write_synced
from . import _svg as svg
from ..bundle.guide import CAUTIONS
from ..errors import OutputError

REPORT_HTML = "report.html"
AUDIT_JSON = "audit.json"
CONFIDENTIAL = ("CONFIDENTIAL: this report holds unprotected statistics of the private network. "
                "For the governance board and the data steward only. Do not publish it, do not give it to "
                "researchers, do not put it in the bundle.")
GATE_BASIS_NOTE = ("The gate reads only the released values and the known law of their noise (and, before "
                   "any noise, the policy and public inputs): its decision would be the same for any true "
                   "network that gave this release. The true-against-released figures below are for the "
                   "board's information; they decided nothing.")
DEFERENCE = ("This report supports a decision; it does not make one. Whether the release may leave the "
             "organisation is for its data-protection officer and ethics board to decide, under the law that "
             "applies (for example GDPR or HIPAA).")


def default_report_path(bundle: Path) -> Path:
    """The default report folder: a sibling of the bundle, ``<bundle>.report``."""
    bundle = Path(bundle).absolute()
    return bundle.parent / f"{bundle.name}.report"


def check_report_target(target: Path, overwrite: bool, bundle: Path | None = None) -> None:
    """Refuse a report folder that exists (unless ``overwrite`` and it is a report), or sits inside the bundle."""
    target = Path(target).absolute()
    if bundle is not None:
        b = Path(bundle).absolute()
        if target == b or b in target.parents:
            raise OutputError(f"{target}: the confidential report must not be written inside the public bundle "
                              f"{b}")
        if target in b.parents:
            raise OutputError(f"{target}: the report folder must not contain the bundle {b}")
    if target.exists() or target.is_symlink():
        if not target.is_dir():
            raise OutputError(f"{target}: report path exists and is not a folder")
        if not overwrite:
            raise OutputError(f"{target}: report folder already exists (use --overwrite to replace it)")
        if any(target.iterdir()) and not (target / AUDIT_JSON).exists():
            raise OutputError(f"{target}: refusing to replace a non-empty folder that is not an aggpub report")
    if not target.parent.exists():
        raise OutputError(f"{target.parent}: parent folder of the report does not exist")
    if not os.access(target.parent, os.W_OK | os.X_OK):
        raise OutputError(f"{target.parent}: report folder is not writable")


# ---------------------------------------------------------------------- JSON


def _clean(obj):
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items() if not str(k).startswith("_")}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [_clean(v) for v in obj.tolist()]
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        f = float(obj)
        return f if math.isfinite(f) else None
    if isinstance(obj, np.bool_):
        return bool(obj)
    return obj


def audit_to_json(audit: dict) -> str:
    """``audit.json`` text: every figure of the audit plus the plotted curves (NaN written as null)."""
    body = _clean(audit)
    plot = audit.get("_plot", {})
    curves = {}
    for key in ("true_pmf", "grouping_pmf", "block_pmf", "released_pmf"):
        if key in plot:
            curves[key] = [float(x) for x in np.asarray(plot[key])]
    if curves:
        body.setdefault("degree_distribution", {})["curves"] = curves
    return json.dumps(body, indent=2, sort_keys=False, allow_nan=False) + "\n"


# ---------------------------------------------------------------------- plots


#: Points drawn of an error distribution curve (about two per pixel of the figure's width).
ECDF_POINTS = 1000
#: Largest side of a contact-matrix heat map in cells; a view with more values is drawn in blocks of values.
HEATMAP_MAX_SIDE = 100


def _plots(audit: dict) -> dict:
    """Every figure of the report as SVG text (:mod:`aggpub.audit._svg`), by key."""
    plot = audit.get("_plot", {})
    out = {}
    if "true_pmf" in plot and "released_pmf" in plot:
        out["degrees"] = _degree_figure(plot)
    if plot.get("rel_errors"):
        out["errors"] = _error_figure(plot["rel_errors"])
    comps = audit.get("budget", {}).get("components") or []
    if comps:
        out["budget"] = _budget_figure(comps, audit["budget"].get("epsilon_total"))
    if plot.get("views"):
        # drawn on the audit's views thread when the audit was asked to (audit_release(draw_figures=True))
        drawn = plot.get("figures", {}).get("views")
        out["views"] = drawn if drawn is not None else views_figure(plot["views"])
    if "sizes" in plot:
        out["sizes"] = svg.histogram(plot["sizes"], bins=min(40, max(5, len(plot["sizes"]) // 4)),
                                     marker=audit["grouping"]["min_size_policy"], marker_label="min_size",
                                     title="supernode sizes", xlabel="people in the supernode",
                                     ylabel="supernodes")
    return out


def _degree_figure(plot) -> str:
    """Degree distributions on log axes: the share with degree k, and the share above k."""
    series = [("true network", plot["true_pmf"], "", "#222222"),
              (plot.get("released_basis", "released"), plot["released_pmf"], "6,3", "#c0392b")]
    if "grouping_pmf" in plot:
        series.append(("aggregate without noise", plot["grouping_pmf"], "2,2", "#2471a3"))
    pmfs, ccdfs = [], []
    for name, pmf, dash, colour in series:
        pmf = np.asarray(pmf, dtype=float)
        k = np.arange(len(pmf))
        keep = (k >= 1) & (pmf > 1e-9)
        pmfs.append((name, k[keep], pmf[keep], colour, dash))
        ccdf = 1 - np.cumsum(pmf)
        keep2 = (k >= 1) & (ccdf > 1e-9)
        ccdfs.append((name, k[keep2], ccdf[keep2], colour, dash))
    xlabel = "degree k (log scale; degree 0 in the table)"
    left = svg.line_chart(pmfs, xlog=True, ylog=True, title="share of people with degree k", xlabel=xlabel,
                          legend="bottom left")
    right = svg.line_chart(ccdfs, xlog=True, ylog=True, title="share with degree above k", xlabel=xlabel,
                           legend="")
    return svg.side_by_side([left, right], [500, 500], 330)


def _ecdf(r, floor: float):
    """Sorted values (at least ``floor``) and their cumulative shares, at most :data:`ECDF_POINTS` of them."""
    r = np.sort(np.maximum(np.asarray(r, dtype=float), floor))
    share = np.arange(1, len(r) + 1) / len(r)
    if len(r) > ECDF_POINTS:  # the curve at the figure's resolution: evenly spaced shares
        pick = np.unique(np.linspace(0, len(r) - 1, ECDF_POINTS).astype(np.int64))
        r, share = r[pick], share[pick]
    return r, share


def _error_figure(rel) -> str:
    """The distribution of relative errors of each workload (log x axis)."""
    floor = 1e-4
    series = []
    done = {}  # workloads answered by the table's own cells share one array of errors: one curve computed
    for i, (name, r) in enumerate(rel.items()):
        if id(r) not in done:
            done[id(r)] = (r, _ecdf(r, floor))
        x, share = done[id(r)][1]
        series.append((name, x, share, svg.COLOURS[(i + 2) % len(svg.COLOURS)], ""))
    return svg.line_chart(series, width=700, height=340, xlog=True,
                          title="error distribution of each query workload",
                          xlabel=f"relative error |released - true| / max(true, s) (below {floor:g} drawn at {floor:g})",
                          ylabel="share of queries at or below", legend="bottom right")


def _budget_figure(comps, total) -> str:
    """The release's epsilon by component, and what is left unspent."""
    eps = [c["epsilon"] for c in comps]
    total = total or sum(eps)
    colours = ["#2471a3", "#c0392b", "#239b56", "#b9770e", "#7d3c98", "#566573"]
    segments = [(f"{c['name']}: {c['epsilon']:.3g}", c["epsilon"], colours[i % len(colours)])
                for i, c in enumerate(comps)]
    unspent = max(0.0, total - sum(eps))
    if unspent > 1e-12:
        segments.append((f"unspent: {unspent:.3g}", unspent, "#d5d8dc"))
    return svg.stacked_bar(segments, total=total, title=f"privacy budget of this release (total epsilon {total:g})",
                           xlabel="epsilon")


def _block_matrix(values, ia, ib, data, side: int):
    """The symmetric matrix of one view in blocks of ``ceil(k / side)`` consecutive values (sums per block).

    Returns the matrix and the block size (1: every value its own row). ``data`` may be a list of arrays
    over the same cells: then a list of matrices (the block positions are worked out once).
    """
    several = isinstance(data, list)
    datas = [np.asarray(d, dtype=np.float64) for d in (data if several else [data])]
    k = len(values)
    block = max(1, -(-k // side))
    n = -(-k // block)
    ba, bb = np.asarray(ia) // block, np.asarray(ib) // block
    out = []
    if np.any(ba > bb):  # not the cell order of a contact matrix: the sums could meet, add in numpy's way
        off = ba != bb
        for d in datas:
            m = np.zeros((n, n))
            np.add.at(m, (ba, bb), d)
            np.add.at(m, (bb[off], ba[off]), d[off])
            out.append(m)
    else:
        # cells a <= b land on or above the diagonal; bincount adds each block's cells in order as
        # numpy.add.at would (many times faster). The blocks below the diagonal hold the mirror images of
        # those above it, the very same sums: one pass over the cells, then the transpose
        upper = ba * n + bb
        for d in datas:
            m = np.bincount(upper, weights=d, minlength=n * n).reshape(n, n)
            out.append(m + np.triu(m, 1).T)
    return (out if several else out[0]), block


def views_figure(views: dict) -> str:
    """True against released contact matrices of (at most) the first two views, all layers together.

    A view with more than :data:`HEATMAP_MAX_SIDE` values is drawn in blocks of consecutive values
    (contacts summed per block; the title says so): the figure has fewer pixels than cells anyway.
    """
    rows = []
    for name, (values, ia, ib, true, est) in list(views.items())[:2]:
        (t, e), block = _block_matrix(values, ia, ib, [true, est], HEATMAP_MAX_SIDE)
        labels = [str(v) for v in values[::block]]
        top = float(np.nanmax(np.abs(t))) or 1.0
        diff = e - t
        m = float(np.nanmax(np.abs(diff))) or 1.0
        what = f" (blocks of {block} values)" if block > 1 else ""
        panels = [svg.heatmap(t, labels, vmin=0.0, vmax=top, title=f"true contacts by {name}{what}"),
                  svg.heatmap(e, labels, vmin=0.0, vmax=top, title="released estimate (aggpub matrix)"),
                  svg.heatmap(diff, labels, vmin=-m, vmax=m, diverging=True, title="released minus true")]
        rows.append(svg.side_by_side(panels, [476] * 3, 434))
    return svg.stack(rows, 3 * 476, 434)


def _views_html(views: dict, plots: dict) -> list:
    """Section 3b: the released views against the true contact matrices (issue 13)."""
    parts = ["<h2>3b. Contact matrices by attribute (views)</h2>"]
    rows = []
    for name, entry in views.items():
        for method, label in (("consistent", "least squares (what researchers get)"), ("view", "raw view")):
            w = entry.get(method, {})
            if "skipped" in w or not w:
                rows.append([html.escape(name), label, "all", html.escape(w.get("skipped", "n/a")), "", "", ""])
                continue
            rows.append([html.escape(name), label, "all", _fmt(w["mean_absolute_error"]), _fmt(w["rmse"]),
                         _fmt(w["median_relative_error"]), _fmt(w["coverage"])])
            for lay, lw in (w.get("per_layer") or {}).items():
                rows.append([html.escape(name), label, html.escape(lay), _fmt(lw["mean_absolute_error"]),
                             _fmt(lw["rmse"]), _fmt(lw["median_relative_error"]), _fmt(lw["coverage"])])
    parts.append(_table(["view", "estimate", "layer", "mean abs. error", "RMSE", "median rel. error",
                         "share of cells inside their 95% interval"], rows))
    placed = {n: e["contacts_placed_by_supernode_labels"] for n, e in views.items()
              if "contacts_placed_by_supernode_labels" in e}
    if placed:
        parts.append('<p class="note">Share of the true contacts whose two supernodes are both labelled with an '
                     "exact value (the rest touch a generalised or <code>*</code> label and cannot be placed by the "
                     "supernode table alone; the views place them all): "
                     + ", ".join(f"{html.escape(n)} {_fmt(v)}" for n, v in placed.items()) + ".</p>")
    parts.append(_img("views", plots, "true and released contact matrices"))
    return parts


# ---------------------------------------------------------------------- HTML


def _fmt(x, digits=4):
    if x is None:
        return "n/a"
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, (int, np.integer)):
        return f"{int(x):,}"
    if isinstance(x, (float, np.floating)):
        if not math.isfinite(float(x)):
            return "n/a"
        return f"{float(x):.{digits}g}"
    return html.escape(str(x))


def _table(header, rows, cls="") -> str:
    head = "".join(f"<th>{html.escape(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{c}</td>" for c in r) + "</tr>" for r in rows)
    return f'<table class="{cls}"><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>'


def _img(key, plots, alt) -> str:
    if key not in plots:
        return ""
    data = base64.b64encode(plots[key].encode("utf-8")).decode("ascii")
    return f'<figure><img class="plot" alt="{html.escape(alt)}" src="data:image/svg+xml;base64,{data}"></figure>'


def _spread_text(mc):
    if not mc:
        return "n/a"
    return f"{_fmt(mc['mean'])} &plusmn; {_fmt(mc['sd'], 2)} [{_fmt(mc['p05'])}, {_fmt(mc['p95'])}]"


_CSS = """
body { font-family: Georgia, 'DejaVu Serif', serif; margin: 0; color: #1b1b1b; background: #fbfbf8; }
main { max-width: 1000px; margin: 0 auto; padding: 4.5em 1.5em 5em; }
.mark { background: #7b241c; color: #fff; font: bold 13px/1.4 'DejaVu Sans', Arial, sans-serif;
        padding: 6px 14px; text-align: center; letter-spacing: 0.02em; }
.mark.top { position: fixed; top: 0; left: 0; right: 0; z-index: 10; }
.mark.bottom { position: fixed; bottom: 0; left: 0; right: 0; z-index: 10; }
h1 { font-size: 1.6em; margin-bottom: 0.2em; } h2 { border-bottom: 2px solid #7b241c; padding-bottom: 3px;
     margin-top: 2em; font-size: 1.25em; }
table { border-collapse: collapse; margin: 0.8em 0; font: 13px 'DejaVu Sans', Arial, sans-serif; }
th, td { border: 1px solid #c8c8c0; padding: 4px 8px; text-align: right; vertical-align: top; }
th { background: #ecebe4; } td:first-child, th:first-child { text-align: left; }
.pass { color: #1e6b34; font-weight: bold; } .fail { color: #a11b1b; font-weight: bold; }
.verdict { font-size: 1.2em; padding: 0.6em 1em; border-left: 6px solid; background: #fff; }
.verdict.pass { border-color: #1e6b34; } .verdict.fail { border-color: #a11b1b; }
.note { color: #555; font-size: 0.92em; } img.plot { max-width: 100%; border: 1px solid #ddd; background: #fff; }
.caution { background: #fff7e6; border: 1px solid #e0b050; padding: 0.8em 1em; }
@media print {
  .mark.top, .mark.bottom { position: fixed; -webkit-print-color-adjust: exact; print-color-adjust: exact; }
  main { padding-top: 3em; padding-bottom: 3em; } h2 { break-after: avoid; } figure { break-inside: avoid; }
}
"""

_SCRIPT = """
<script>
window.addEventListener('load', function () {
  var imgs = document.querySelectorAll('img.plot'), ok = 0;
  imgs.forEach(function (im) {
    var good = im.complete && im.naturalWidth > 0;
    im.setAttribute('data-loaded', good ? 'yes' : 'no');
    if (good) { ok += 1; }
  });
  var p = document.getElementById('image-check');
  p.setAttribute('data-images', String(imgs.length));
  p.setAttribute('data-images-loaded', String(ok));
  p.textContent = 'Figures shown: ' + ok + ' of ' + imgs.length + '.';
});
</script>
"""


def render_html(audit: dict) -> str:
    """The board report as one self-contained HTML page (figures embedded as SVG images)."""
    plots = _plots(audit)
    parts = _title_parts(audit)
    parts += _gate_parts(audit)
    parts += _degree_parts(audit, plots)
    parts += _query_parts(audit, plots)
    if audit.get("contact_views"):  # issue 13
        parts += _views_html(audit["contact_views"], plots)
    parts += _structure_parts(audit)
    parts += _budget_parts(audit, plots)
    parts += _grouping_parts(audit, plots)
    parts += _caution_parts(audit)
    return _page(audit, parts)


def _title_parts(audit: dict) -> list:
    """The title and what the report was made from."""
    parts = []
    title = audit.get("title") or "release"
    parts.append(f"<h1>Utility audit: {html.escape(str(title))}</h1>")
    parts.append(f'<p class="note">Made {html.escape(str(audit.get("created_utc")))} from the true network '
                 f'({_fmt(audit["network"]["people"])} people, {_fmt(audit["network"]["contacts"])} contacts) '
                 "and the release built from it, before publication.</p>")
    if audit.get("seeded_release"):
        parts.append('<p class="verdict fail">This release was built with a fixed noise seed (tests only): '
                     "it is NOT private and must not be published.</p>")
    return parts


def _gate_parts(audit: dict) -> list:
    """Section 1: the gate's decision, from released values only."""
    parts = []
    gate = audit.get("gate", {"passed": True, "checked": []})
    parts.append("<h2>1. Gate decision (from released values only)</h2>")
    parts.append(f'<p class="note">{html.escape(GATE_BASIS_NOTE)}</p>')
    if gate.get("checked"):
        verdict = "passed: the release may be published" if gate["passed"] else \
            "FAILED: the release was refused and no bundle was written"
        parts.append(f'<p class="verdict {"pass" if gate["passed"] else "fail"}">Gate {verdict}.</p>')
        rows = []
        for key in gate["checked"]:
            e = gate[key]
            what = e["measures"] + (f" ({html.escape(e['attribute'])})" if e.get("attribute") else "")
            res = '<span class="pass">pass</span>' if e["passed"] else '<span class="fail">fail</span>'
            val = _fmt(e["value"]) if e["value"] is not None else html.escape(e.get("reason", "n/a"))
            pre = (audit.get("preflight") or {}).get(key) or {}
            predicted = _fmt(pre["value"]) if pre.get("value") is not None else "not predicted"
            rows.append([f"<code>{key}</code>", what, _fmt(e["allowed"]), predicted, val, res])
        parts.append(_table(["threshold", "measures", "allowed", "predicted before noise",
                             "estimated from the release", "result"], rows))
        if not gate["passed"]:
            parts.append('<p class="note">The noise of this attempt was drawn on the private data, so its '
                         "privacy budget counts as spent even though nothing was published.</p>")
    else:
        parts.append('<p class="verdict pass">The policy sets no gate thresholds; nothing was checked.</p>')
    parts.append(f'<p class="note">{html.escape(audit.get("decides", ""))}</p>')
    return parts



def _degree_parts(audit: dict, plots: dict) -> list:
    """Section 2: the degree distribution, true against released."""
    parts = []
    dd = audit.get("degree_distribution", {})
    parts.append("<h2>2. Degree distribution</h2>")
    if "ks" in dd:
        parts.append(f'<p class="note">Released side: {html.escape(dd.get("basis", ""))}. True mean degree '
                     f'{_fmt(dd.get("true_mean_degree"))}, largest degree {_fmt(dd.get("true_max_degree"))}.</p>')
        parts.append(_img("degrees", plots, "degree distribution, true against released, log axes"))
        rows = []
        for label, key in (("release against true network", None), ("grouping alone (no noise)", "grouping_loss"),
                           ("added by noise (difference)", "noise_added")):
            src = dd if key is None else dd.get(key, {})
            rows.append([label, _fmt(src.get("ks")), _fmt(src.get("wasserstein1")), _fmt(src.get("l1"))])
        mc = dd.get("monte_carlo")
        if mc:
            rows.append(["fresh noise draws: mean &plusmn; sd [5%, 95%]", _spread_text(mc.get("ks")),
                         _spread_text(mc.get("wasserstein1")), _spread_text(mc.get("l1"))])
        seq = dd.get("from_degree_sequences")
        if seq:
            rows.append(["released degree sequences (their estimates) against true network", _fmt(seq.get("ks")),
                         _fmt(seq.get("wasserstein1")), _fmt(seq.get("l1"))])
        parts.append(_table(["", "KS distance", "Wasserstein-1", "L1"], rows))
        parts.append('<p class="note">KS: largest gap between the two cumulative distributions. Wasserstein-1: '
                     "area between them, in contacts per person. L1: sum of absolute differences of the shares. "
                     "Distances do not add up, so the noise row is a difference of two distances.</p>")
    else:
        parts.append(f"<p>{html.escape(dd.get('basis', 'not measured'))}</p>")
    return parts



def _query_parts(audit: dict, plots: dict) -> list:
    """Section 3: the error of each query workload."""
    parts = []
    parts.append("<h2>3. Query error</h2>")
    q = audit.get("queries", {})
    if q:
        rows = []
        for name, w in q.items():
            mc = w.get("monte_carlo", {})
            rows.append([html.escape(name), _fmt(w["n_queries"]), _fmt(w["mean_absolute_error"]),
                         _fmt(w.get("expected_mean_absolute_error")), _fmt(w["mean_signed_error"]),
                         _fmt(w["rmse"]), _fmt(w.get("expected_rmse")), _fmt(w["median_relative_error"]),
                         _fmt(w["p90_relative_error"]), _fmt(w["p99_relative_error"]),
                         _spread_text(mc.get("mean_absolute_error"))])
        parts.append(_table(["workload", "queries", "mean abs. error", "expected (variance)", "mean signed error",
                             "RMSE", "expected RMSE", "median rel. error", "p90 rel. error", "p99 rel. error",
                             "mean abs. error, fresh draws: mean ± sd [5%, 95%]"], rows))
        s = audit["settings"]["sanity_bound"]
        parts.append(f'<p class="note">Relative error is |released &minus; true| / max(true, s) with sanity bound '
                     f"s = {_fmt(s)} ({html.escape(audit['settings']['sanity_bound_rule'])}). Expected figures "
                     "come from each mechanism's variance before clamping; clamping noisy counts at 0 pushes the "
                     "many empty cells up, which shows as a positive mean signed error and makes sums of cells "
                     "err more than the variance alone predicts. The spread column re-draws the noise on the "
                     "true table. Every workload here is an exact sum of superedge cells, so grouping alone "
                     "loses nothing on it; all of its error is noise.</p>")
        urows = [[html.escape(name), _fmt(w["from_unclamped_counts"]["mean_absolute_error"]),
                  _fmt(w["from_unclamped_counts"]["median_relative_error"]),
                  _fmt(w["from_unclamped_counts"]["p90_relative_error"])]
                 for name, w in q.items() if "from_unclamped_counts" in w]
        erows = [[html.escape(name), _fmt(w["from_estimates"]["mean_absolute_error"]),
                  _fmt(w["from_estimates"]["median_relative_error"]),
                  _fmt(w["from_estimates"]["p90_relative_error"])]
                 for name, w in q.items() if "from_estimates" in w]
        if urows:
            parts.append('<p class="note">The same workloads answered by summing <code>edge_count_unclamped</code> '
                         "(the noisy counts before clamping, also in the bundle, unbiased), as the bundle's "
                         "reader's guide advises for sums:</p>")
            parts.append(_table(["workload", "mean abs. error", "median rel. error", "p90 rel. error"], urows))
        if erows:
            parts.append('<p class="note">And by summing <code>edge_count_estimate</code> (the consistent '
                         "non-negative estimates that the synthetic networks, the supergraph and the reader's guide "
                         "use):</p>")
            parts.append(_table(["workload", "mean abs. error", "median rel. error", "p90 rel. error"], erows))
        cells = q.get("superedge_cells", {})
        if "released_total_minus_true_total" in cells:
            diff = cells["released_total_minus_true_total"]
            parts.append(f'<p class="note">All released cells together hold {_fmt(int(abs(diff)))} contacts '
                         f'{"more" if diff >= 0 else "fewer"} than the true network '
                         f'({_fmt(cells.get("zero_cells_true"))} of {_fmt(cells["n_queries"])} cells are truly '
                         "empty). Researchers summing many cells inherit this bias.</p>")
        for name, w in q.items():
            for n in w.get("notes", []):
                parts.append(f'<p class="note"><b>{html.escape(name)}</b>: {html.escape(n)}</p>')
        parts.append(_img("errors", plots, "cumulative distribution of relative errors per workload"))
    else:
        parts.append("<p>No superedge counts were released; no query workload was measured.</p>")

    return parts



def _structure_parts(audit: dict) -> list:
    """Section 4: structure of the networks sampled from the release."""
    parts = []
    parts.append("<h2>4. Structure of networks sampled from the release</h2>")
    st = audit.get("structure", {})
    if "true" in st:
        keys = [k for k in st["true"] if k != "people"]
        rows = []
        for k in keys:
            rows.append([html.escape(k), _fmt(st["true"][k]),
                         _spread_text(st["sampled_from_true_aggregate"].get(k)),
                         _spread_text(st["sampled_from_release"].get(k))])
        parts.append(_table(["statistic", "true network", "sampled from the aggregate without noise "
                             "(mean ± sd [5%, 95%])", "sampled from the release"], rows))
        parts.append(f'<p class="note">{html.escape(st["note"])}. Sampler: {html.escape(st["sampler"])}. '
                     "Assortativity by an attribute uses the attribute as the supernode labels state it.</p>")
        parts += _fidelity_parts(st.get("fidelity"))
    else:
        parts.append(f"<p>Skipped: {html.escape(str(st.get('skipped', 'not run')))}.</p>")
    return parts



def _budget_parts(audit: dict, plots: dict) -> list:
    """Section 5: the privacy budget."""
    parts = []
    parts.append("<h2>5. Privacy budget</h2>")
    b = audit.get("budget", {})
    parts.append(f"<p>Privacy unit <b>{html.escape(str(b.get('privacy_unit')))}</b>, total epsilon "
                 f"<b>{_fmt(b.get('epsilon_total'))}</b>, spent {_fmt(b.get('epsilon_spent'))}.</p>")
    parts.append(_img("budget", plots, "privacy budget by component"))
    rows = [[html.escape(c["name"]), _fmt(c["epsilon"]), _fmt(c["sensitivity"]), html.escape(c["mechanism"]),
             _fmt(c["scale"])] for c in b.get("components", [])]
    if rows:
        parts.append(_table(["component", "epsilon", "sensitivity", "mechanism", "noise scale"], rows))
    return parts



def _grouping_parts(audit: dict, plots: dict) -> list:
    """Section 6: the grouping."""
    parts = []
    parts.append("<h2>6. Grouping</h2>")
    g = audit.get("grouping", {})
    parts.append(f"<p>Method <b>{html.escape(str(g.get('method')))}</b> "
                 f"({'public data only' if g.get('public') else 'uses private data; budget charged'}): "
                 f"{_fmt(g.get('supernodes'))} supernodes of {_fmt(g.get('size_min'))} to {_fmt(g.get('size_max'))} "
                 f"people (median {_fmt(g.get('size_median'))}; policy minimum {_fmt(g.get('min_size_policy'))}).</p>")
    parts.append(_img("sizes", plots, "histogram of supernode sizes"))
    rows = []
    for attr, info in g.get("attributes", {}).items():
        rows.append([html.escape(attr)] + [f"{_fmt(info[k]['supernodes'])} / {_fmt(info[k]['people'])}"
                                           for k in ("exact", "generalised", "residual")]
                    + [_fmt(info["distinct_label_values"])])
    if rows:
        parts.append(_table(["attribute", "exact value (supernodes / people)", "generalised value",
                             "left open (*)", "distinct label values"], rows))
    for n in g.get("notes", []):
        parts.append(f'<p class="note">{html.escape(n)}</p>')
    return parts



def _caution_parts(audit: dict) -> list:
    """Section 7: cautions and the audit's notes."""
    parts = []
    parts.append("<h2>7. Cautions</h2>")
    parts.append(f'<div class="caution"><p>{html.escape(CAUTIONS)}</p><p>{html.escape(DEFERENCE)}</p></div>')
    for n in audit.get("notes", []):
        parts.append(f'<p class="note">{html.escape(n)}</p>')
    parts.append('<p id="image-check" class="note">Figures: not yet checked.</p>')
    return parts


def _page(audit: dict, parts: list) -> str:
    """The sections in the page, with the CONFIDENTIAL marks, the style and the figure check."""
    title = audit.get("title") or "release"
    body = "\n".join(parts)
    mark = html.escape(CONFIDENTIAL)
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<meta name="robots" content="noindex">
<title>CONFIDENTIAL utility audit: {html.escape(str(title))}</title>
<style>{_CSS}</style></head>
<body>
<div class="mark top">{mark}</div>
<main>
{body}
</main>
<div class="mark bottom">{mark}</div>
{_SCRIPT}
</body></html>
"""


# ---------------------------------------------------------------------- writing


def write_report(directory, audit: dict, *, overwrite: bool = False, bundle=None) -> Path:
    """Write ``report.html`` and ``audit.json`` into a new folder, atomically.

    Parameters
    ----------
    directory : path
        Report folder to create (must not be inside the bundle).
    audit : dict
        From :func:`aggpub.audit.audit_release`.
    overwrite : bool
        Replace an existing report folder.
    bundle : path, optional
        The bundle it belongs to (the report is refused inside it).

    Returns
    -------
    pathlib.Path
        The report folder.
    """
    target = Path(directory).absolute()
    check_report_target(target, overwrite, bundle)
    json_text = audit_to_json(audit)
    html_text = render_html(audit)

    def fill(tmp):
        write_synced(tmp / AUDIT_JSON, json_text)
        write_synced(tmp / REPORT_HTML, html_text)

    return write_folder(target, fill, overwrite=overwrite, what="report", own_files=(AUDIT_JSON, REPORT_HTML),
                        check=lambda: check_report_target(target, overwrite, bundle))


#: The fidelity figures in the report's words (``aggpub.audit.fidelity.FIGURES``).
_FIDELITY_LABELS = {
    "contacts_ratio": "contacts (synthetic / true)",
    "degree_ks": "degree distribution, KS distance (lower is better)",
    "largest_degree_ratio": "largest degree (synthetic / true)",
    "clustering_ratio": "average clustering (synthetic / true)",
    "final_size_ratio": "epidemic final size (synthetic / true)",
}


def _fidelity_parts(fidelity) -> list:
    """Section 4's table of fidelity figures: grouping alone against the release (CONFIDENTIAL figures)."""
    if not fidelity:
        return []
    rows = []
    for key, label in _FIDELITY_LABELS.items():
        cells = []
        for which in ("grouping_alone", "release"):
            f = fidelity.get(which, {}).get(key, {})
            cells.append(f"{_fmt(f.get('mean'))} ± {_fmt(f.get('sd'))}" if f else "")
        rows.append([html.escape(label), *cells])
    out = ["<h3>Can researchers simulate on the synthetic networks?</h3>",
           _table(["figure", "grouping alone (true aggregate, no noise)", "the release"], rows)]
    t = fidelity.get("true", {})
    out.append(f'<p class="note">{html.escape(fidelity.get("note", ""))}. True network: '
               f'{_fmt(t.get("contacts"))} contacts, largest degree {_fmt(t.get("largest_degree"))}, average '
               f'clustering {_fmt(t.get("average_clustering"))}, final size {_fmt(t.get("final_size"))} at '
               f'transmissibility {_fmt(t.get("transmissibility"))}.</p>')
    return out

