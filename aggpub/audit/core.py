"""The auditor: the true network against the release, for the board (confidential; decides nothing).

Inputs already validated: ``release`` comes from :func:`aggpub.pipeline.build_release`.
The true tables are computed once (:mod:`aggpub.audit.truth`); each section
below reads them and the released tables. The figures go into the confidential
report only: the gate never reads them (:mod:`aggpub.gate`), and acting on them
(refusing or retrying because the truth looked bad) is a data-dependent choice
outside the guarantee.
"""

from __future__ import annotations

__all__ = ["audit_release", "MAX_STRUCTURE_EDGES", "RESIDUAL"]

import copy
import math
from datetime import datetime, timezone

import numpy as np

from ..progress import silent
from ..released import release_degree_histograms
from . import degrees as deg
from .draws import audit_source, default_monte_carlo, draw_noise, map_draws, mc_errors, post_process, spread
from .sampled import MAX_STRUCTURE_EDGES
from .metrics import distribution_distances, error_summary
from .truth import released_cells, truth_of_release

RESIDUAL = "*"
CONFIDENTIAL_NOTE = ("CONFIDENTIAL: true-against-released figures for the board. They decide nothing by "
                     "themselves; refusing or retrying a release because the truth looked bad is a "
                     "data-dependent choice that no epsilon covers.")


def _expected_abs(mech, var_q, single_cell: bool):
    """Expected absolute error per query before clamping.

    A single cell: ``E|Z| = 2 alpha / (1 - alpha^2)`` for the discrete Laplace
    law (from its pmf, Ghosh, Roughgarden, Sundararajan, STOC 2009). Sums of
    cells: normal approximation ``sqrt(2 var / pi)``.
    """
    if single_cell:
        return np.full(len(var_q), mech.expected_abs())
    return np.sqrt(2 * np.asarray(var_q) / math.pi)


def audit_release(release, *, monte_carlo: int | None = None, source=None, structure_samples: int = 3,
                  n_cut_queries: int = 200, sanity_bound: float | None = None, seed: int | None = None,
                  progress=None, parallel_structure: bool | None = None, draw_figures: bool = False) -> dict:
    """Audit a built release against the true network it came from.

    Parameters
    ----------
    release : aggpub.pipeline.Release
        From :func:`aggpub.pipeline.build_release` (holds the confidential truth).
    monte_carlo : int, optional
        Number of fresh noise draws on the true table for the spread of each
        error figure (0: none; default :func:`aggpub.audit.draws.default_monte_carlo`
        of the number of superedge cells: 20 on small tables, at least 3 on large ones).
    source : aggpub.noise.RandomSource, optional
        Randomness for the Monte Carlo noise (default: PCG64 seeded from the
        operating system's entropy). Separate from the release's own noise; the
        re-drawn tables are never published.
    structure_samples : int
        Synthetic networks sampled from the release (and as many from the true
        aggregate) for the structure comparison (0: skip).
    n_cut_queries : int
        Random cut queries.
    sanity_bound : float, optional
        ``s`` of the relative error; default 0.1% of the number of contacts (at least 1).
    seed : int, optional
        Seed for the choice of cut queries and the synthetic networks (audit-internal).
    progress : callable, optional
    parallel_structure : bool, optional
        Share the structure section's tasks with a helper process, which starts on them
        while the other sections run (default: on networks of
        :data:`aggpub.audit.sampled.PARALLEL_MIN_CONTACTS` contacts or more, with two cores or
        more); the figures are the same either way.
    draw_figures : bool
        Also draw the report's contact-view heat maps (:func:`aggpub.audit.report.views_figure`) on the
        thread that computes the views section, as soon as it is done, while the other sections run;
        kept in ``_plot["figures"]``, where :func:`aggpub.audit.report.write_report` takes them (the same
        figure it would draw itself). For callers that write the report.

    Returns
    -------
    dict
        JSON-ready figures (keys ``degree_distribution``, ``queries``, ``error_split``,
        ``structure``, ``budget``, ``grouping``, ``network`` ...); keys starting with
        ``_`` hold arrays for the plots and are not written to ``audit.json``.

    References
    ----------
    X. Xiao, G. Wang, J. Gehrke, "Differential privacy via wavelet transforms", ICDE 2010.
    M. Hay, G. Miklau, D. Jensen, D. Towsley, P. Weis, "Resisting structural
    re-identification in anonymized social networks", PVLDB 1(1), 2008.
    """
    progress = progress or silent
    source = source or audit_source()
    rng = np.random.default_rng(seed)
    # the workloads are built once the views section has started on its thread (it does not read them)
    truth = truth_of_release(release, sanity_bound=sanity_bound, cuts=n_cut_queries, rng=rng, defer_workloads=True)
    # the structure section's tasks start now (shared with a helper process on large networks) while the rest runs
    structure = _start_structure(release, truth, structure_samples, rng, parallel_structure)
    try:
        return _audit_sections(release, truth, structure, monte_carlo, source, sanity_bound,
                               structure_samples, progress, draw_figures)
    finally:
        if "beside" in structure:
            structure["beside"].close()


def _audit_sections(release, truth, structure, monte_carlo, source, sanity_bound, structure_samples,
                    progress, draw_figures: bool = False) -> dict:
    """The audit's sections in turn (see :func:`audit_release`)."""
    if monte_carlo is None:
        monte_carlo = default_monte_carlo(truth.n_groups * (truth.n_groups + 1) // 2)
    m = release.manifest
    out = {
        "confidential": True,
        "what": "utility audit of a release against the true network; holds unprotected statistics",
        "decides": CONFIDENTIAL_NOTE,
        "created_utc": datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "title": m.get("title"),
        "seeded_release": bool(m.get("seeded")),
        "network": {"people": int(release.network.n_people), "contacts": truth.n_edges},
        "settings": {"monte_carlo_draws": int(monte_carlo), "structure_samples": int(structure_samples),
                     "sanity_bound": truth.s_bound,
                     "sanity_bound_rule": "0.1% of the number of contacts, at least 1 (Xiao, Wang, Gehrke, "
                                          "ICDE 2010; fraction recalled from memory)"
                                          if not sanity_bound else "given"},
        "notes": list(truth.notes),
        "grouping": _grouping_summary(release, truth),
        "budget": {"epsilon_total": m.get("epsilon_total"), "epsilon_spent": m.get("epsilon_spent"),
                   "privacy_unit": m.get("privacy_unit"), "components": m.get("components", [])},
    }
    plot = {"sizes": truth.true_sizes, "true_pmf": truth.true_hist / truth.true_hist.sum(), "rel_errors": {}}
    from concurrent.futures import ThreadPoolExecutor

    # a worker thread beside this one: it builds the query workloads while this thread measures the degree
    # distribution (which does not read them), then runs the query section's Monte Carlo
    with _ViewsBeside(release, truth, draw_figures) as views, \
            ThreadPoolExecutor(max_workers=1, thread_name_prefix="aggpub-audit-mc") as worker:
        workloads = worker.submit(truth.finish_workloads)
        progress("audit: degree distribution (true against released)")
        dd, deg_mc = _degree_section(release, truth, monte_carlo, source, plot, out["notes"])
        workloads.result()
        out["degree_distribution"] = dd
        out["queries"] = {}
        if truth.st is not None and "superedges" in release.tables:
            progress("audit: query workloads (cells, contact matrices, cuts, degree totals)")
            out["queries"] = _query_section(release, truth, monte_carlo, source, deg_mc, plot, progress, worker)
            if deg_mc is not None and deg_mc["ks"]:
                dd["monte_carlo"] = {k: spread(deg_mc[k]) for k in ("ks", "wasserstein1", "l1")}
                dd["monte_carlo"]["note"] = (f"{deg_mc['draws']} fresh noise draws on the true superedge table "
                                             "(the first draws of the query workloads' Monte Carlo)")
        if views.job is not None:
            progress("audit: contact views (true matrices against the released estimates)")
            out["contact_views"] = views.result(plot)
    out["structure"] = _structure_section(structure, progress)
    if "ks" in dd:
        out["error_split"] = _error_split(dd, out["queries"])
    out["_plot"] = plot
    return out


class _ViewsBeside:
    """The views section (:func:`_views_section`) computed on a second thread while the degree and query
    sections run: it reads only the release and the truth, and writes its own figures, so the result is
    the same as computed after them (numpy and Arrow release the GIL: it runs on the second core). With
    ``draw``, the same thread then draws the section's heat maps for the report (the thread is done well
    before the query section on large tables, so the figure no longer waits for the end of the audit)."""

    def __init__(self, release, truth, draw: bool = False):
        self.release, self.truth, self.job, self.pool, self.plot = release, truth, None, None, {}
        self.draw = draw

    def __enter__(self):
        if "contact_views" in self.release.tables and "contact_views" in self.release.truth:
            from concurrent.futures import ThreadPoolExecutor

            self.pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="aggpub-audit-views")
            self.job = self.pool.submit(self._run)
        return self

    def _run(self) -> dict:
        out = _views_section(self.release, self.truth, self.plot)
        if self.draw and self.plot.get("views"):
            from .report import views_figure

            self.plot["figures"] = {"views": views_figure(self.plot["views"])}
        return out

    def result(self, plot) -> dict:
        """The section's figures; its plot data added to ``plot`` (as the section itself would add them)."""
        out = self.job.result()
        plot.update(self.plot)
        return out

    def __exit__(self, *exc):
        if self.pool is not None:
            self.pool.shutdown(wait=True, cancel_futures=True)
        return False


def _grouping_summary(release, truth) -> dict:
    grouping, sizes = release.grouping, truth.true_sizes
    people = release.network.people
    attrs = {}
    for c, vals in truth.labels.items():
        if c not in release.policy.grouping.attributes or c not in people.column_names:
            continue  # a label column that is not a person attribute (e.g. a tier of a structural grouping)
        fine = set(str(x) for x in people.column(c).unique().to_pylist())
        kind = np.array(["residual" if v == RESIDUAL else ("exact" if v in fine else "generalised") for v in vals])
        attrs[c] = {k: {"supernodes": int((kind == k).sum()), "people": int(sizes[kind == k].sum())}
                    for k in ("exact", "generalised", "residual")}
        attrs[c]["distinct_label_values"] = int(len(set(vals)))
    return {
        "method": grouping.method,
        "public": bool(grouping.public),
        "supernodes": int(grouping.n_supernodes),
        "min_size_policy": int(release.policy.grouping.min_size),
        "size_min": int(sizes.min()), "size_median": float(np.median(sizes)), "size_max": int(sizes.max()),
        "attributes": attrs,
        "notes": list(grouping.notes),
    }


def _histogram_degrees(release, truth, monte_carlo, source, dd, plot) -> None:
    """Degree distribution from the released per-supernode histograms (and their Monte Carlo)."""
    rh = deg.released_histogram_degrees(release.tables["degree_histograms"])
    top = len(rh) - 1
    true_capped = truth.true_capped(top)
    dd.update(distribution_distances(true_capped, rh))
    dd["basis"] = (f"released per-supernode degree histograms (bins 0..{top - 1} and '{top} or more'); "
                   "true degrees capped the same way")
    dd["grouping_loss"] = {"ks": 0.0, "wasserstein1": 0.0, "l1": 0.0,
                           "note": "histograms summed over supernodes are exact without noise"}
    plot["released_pmf"] = rh / rh.sum()
    plot["released_basis"] = "released degree histograms"
    hist_mech = release.mechanisms.get("degree_histograms")
    if monte_carlo and hist_mech is not None:
        runs = []
        for _ in range(int(monte_carlo)):
            # the statistic's own release function: the same noise and post-processing
            table, _, _ = release_degree_histograms(truth.hist_truth, truth.pub_sizes, hist_mech.epsilon,
                                                    hist_mech.sensitivity, source)
            runs.append(distribution_distances(true_capped, deg.released_histogram_degrees(table, top + 1)))
        dd["monte_carlo"] = {k: spread([r[k] for r in runs]) for k in ("ks", "wasserstein1", "l1")}
        dd["monte_carlo"]["note"] = "fresh noise on the true histograms, post-processed as released"


def _degree_section(release, truth, monte_carlo, source, plot, notes):
    """The degree distribution, true against released; returns it and the block model's Monte Carlo state."""
    st = truth.st
    dd = {"true_mean_degree": float(truth.true_deg.mean()), "true_max_degree": int(truth.true_deg.max())}
    deg_mc = None
    have_edges = st is not None and "superedges" in release.tables
    if have_edges:
        rel = released_cells(release, truth.n_groups, cells=(st.a, st.b))
        # the block model's fixed parts once per set of sizes (the released sizes are the true ones under edge)
        true_terms = deg.block_model_terms(st.a, st.b, truth.true_sizes)
        pub_terms = (true_terms if np.array_equal(truth.pub_sizes, truth.true_sizes)
                     else deg.block_model_terms(st.a, st.b, truth.pub_sizes))
        group_pmf, method = deg.implied_degree_pmf(st.a, st.b, st.count, truth.true_sizes, terms=true_terms)
        block_pmf, _ = deg.implied_degree_pmf(st.a, st.b, rel, truth.pub_sizes, method=method, terms=pub_terms)
        plot["grouping_pmf"], plot["block_pmf"] = group_pmf, block_pmf
        dd["block_model_method"] = method
        dd["grouping_only"] = distribution_distances(truth.true_hist, group_pmf)
        dd["block_model_released"] = distribution_distances(truth.true_hist, block_pmf)
        dd["noise_only_block_model"] = distribution_distances(group_pmf, block_pmf)
    if "degree_sequences" in release.tables:
        # the degree distribution the released sequences give (their estimates, rounded), beside the main basis
        est = release.tables["degree_sequences"].column("degree_estimate").to_numpy()
        seq_hist = deg.true_degree_histogram(np.rint(est))
        dd["from_degree_sequences"] = distribution_distances(truth.true_hist, seq_hist)
        dd["from_degree_sequences"]["note"] = ("the released degree estimates (degree_sequences.degree_estimate, "
                                               "rounded) against the true degrees; without noise they are exact")
    if "degree_histograms" in release.tables:
        _histogram_degrees(release, truth, monte_carlo, source, dd, plot)
    elif have_edges:
        dd.update(dd["block_model_released"])
        dd["basis"] = ("block model implied by the released superedge counts and sizes (degree of a member "
                       f"of supernode a: sum over b of Binomial contacts; {method} computation)")
        dd["grouping_loss"] = dict(dd["grouping_only"])
        plot["released_pmf"] = block_pmf
        plot["released_basis"] = "block model of the released superedges"
        if monte_carlo and release.mechanisms.get("superedge_counts") is not None:
            # filled by the Monte Carlo of the query workloads, from its first draws
            deg_mc = {"draws": int(min(monte_carlo, 5)), "method": method,  # each recomputes the mixture
                      "terms": true_terms, "ks": [], "wasserstein1": [],
                      "l1": []}
    else:
        dd["basis"] = "not measurable: the release has neither superedge counts nor degree histograms"
        notes.append(dd["basis"])
    if "ks" in dd:
        dd["noise_added"] = {k: dd[k] - dd["grouping_loss"][k] for k in ("ks", "wasserstein1", "l1")}
    return dd, deg_mc


def _monte_carlo(truth, mech, monte_carlo, source, deg_mc):
    """Fresh noise draws on the true table: error figures per workload (and the degree spread)."""
    st = truth.st
    mc = {w.name: {"mean_absolute_error": [], "median_relative_error": [], "p90_relative_error": []}
          for w in truth.workloads}

    def one_draw(i, rng):
        """Figures of fresh noise draw ``i`` (inputs already validated; runs in a worker thread)."""
        noisy = draw_noise(mech, len(st.count), rng, as_float=True)  # whole numbers in float64
        noisy += st.count
        degree = table = None
        if deg_mc is not None and i < deg_mc["draws"]:  # the degree distribution's spread
            clamped = post_process(noisy, truth.cap_true, truth.threshold)
            pmf, _ = deg.implied_degree_pmf(st.a, st.b, clamped, truth.true_sizes, method=deg_mc["method"],
                                            terms=deg_mc["terms"])
            degree = distribution_distances(truth.true_hist, pmf)
            if truth.cap_pub is truth.cap_true:  # public sizes are the true ones: the same table (read only)
                table = clamped
        if table is None:
            table = post_process(noisy, truth.cap_pub, truth.threshold)
        table = np.asarray(table, dtype=np.float64)
        del noisy
        errors = _Once(mc_errors)  # workloads whose answers are the cells themselves share one computation
        # the clamped draw holds whole numbers (counts plus two-sided geometric noise, clamped at whole bounds)
        return degree, {w.name: errors(truth.true_answers[w.name], w.answer(table, whole=True), truth.s_bound)
                        for w in truth.workloads}

    for degree, errors in map_draws(one_draw, int(monte_carlo), len(st.count), source):
        if degree is not None:
            for k, v in degree.items():
                deg_mc[k].append(v)
        for name, (mae, p50, p90) in errors.items():
            mc[name]["mean_absolute_error"].append(mae)
            mc[name]["median_relative_error"].append(p50)
            mc[name]["p90_relative_error"].append(p90)
    return mc


class _Once:
    """``f(true, estimate, s)`` computed once for the same two arrays (the same objects) and ``s``.

    Workloads whose answers are the cells themselves (the superedge cells, and a contact matrix when every
    supernode holds its own value) get the very arrays of the table: their error figures are the same
    numbers, computed once and copied. Keys hold the arrays, so an ``id`` is never reused while cached.
    """

    def __init__(self, f):
        self.f, self.done = f, {}

    def __call__(self, true, estimate, s):
        key = (id(true), id(estimate), s)
        if key not in self.done:
            self.done[key] = (true, estimate, self.f(true, estimate, s))
        return copy.deepcopy(self.done[key][2])


def _workload_summary(w, tru, est, est_unclamped, mech, s_bound, mc, est_consistent=None,
                      error_summary=error_summary) -> dict:
    summ = error_summary(tru, est, s_bound)
    if est_unclamped is not None:
        # what a researcher gets by summing edge_count_unclamped, as the reader's guide advises
        summ["from_unclamped_counts"] = error_summary(tru, est_unclamped, s_bound)
    if est_consistent is not None:
        # the consistent non-negative estimates (edge_count_estimate) every derived view reads
        summ["from_estimates"] = error_summary(tru, est_consistent, s_bound)
    summ["grouping_loss_mean_absolute_error"] = 0.0
    summ["grouping_loss_note"] = "an exact sum of superedge cells: grouping alone loses nothing"
    if mech is not None:
        var_q = w.noise_variance(mech.variance())
        summ["expected_rmse"] = float(np.sqrt(var_q.mean()))
        summ["expected_mean_absolute_error"] = float(_expected_abs(mech, var_q, w.single_cell).mean())
        summ["expected_note"] = ("from the mechanism's variance before clamping at 0 and at the possible "
                                 "pairs" + ("" if w.single_cell else "; mean absolute error by normal approximation"))
    if mc is None:  # the Monte Carlo is still running: its place is kept (see _add_monte_carlo)
        summ["monte_carlo"] = None
    elif mc[w.name]["mean_absolute_error"]:
        summ["monte_carlo"] = {k: spread(v) for k, v in mc[w.name].items()}
    if w.notes:
        summ["notes"] = w.notes
    if w.name.startswith("contact_matrix:"):
        summ["true_total"] = float(tru.sum())
    return summ


def _query_section(release, truth, monte_carlo, source, deg_mc, plot, progress, worker) -> dict:
    st = truth.st
    mech = release.mechanisms.get("superedge_counts")
    order = (st.a, st.b)  # every cell, in table order
    rel = released_cells(release, truth.n_groups, cells=order)
    unclamped = None if truth.threshold is not None else released_cells(release, truth.n_groups,
                                                                        "edge_count_unclamped", cells=order)
    consistent = released_cells(release, truth.n_groups, "edge_count_estimate", cells=order)
    mc_job = None
    if monte_carlo and mech is not None:
        # the Monte Carlo on the worker thread while this one computes the figures of the released tables (both
        # are numpy on whole tables, outside the GIL; they share only read-only arrays); its spread is added
        # to each workload's figures at the end, in the place it has always had
        progress(f"audit: {int(monte_carlo)} fresh noise draws on the true table (Monte Carlo)")
        mc_job = worker.submit(_monte_carlo, truth, mech, monte_carlo, source, deg_mc)
    out = _released_figures(truth, st, mech, rel, unclamped, consistent, None, plot)
    mc = mc_job.result() if mc_job is not None else {}
    for w in truth.workloads:
        _add_monte_carlo(out[w.name], mc.get(w.name))
    return out


def _add_monte_carlo(summ: dict, runs: dict | None) -> None:
    """Fill the place :func:`_workload_summary` kept for the Monte Carlo's spread (or drop it: no draws)."""
    if runs and runs["mean_absolute_error"]:
        summ["monte_carlo"] = {k: spread(v) for k, v in runs.items()}
    else:
        del summ["monte_carlo"]


def _released_figures(truth, st, mech, rel, unclamped, consistent, mc, plot) -> dict:
    """The query workloads' figures of the released tables (without the Monte Carlo's spread)."""
    out = {}
    # released counts are whole numbers (an integer column), the estimates fractional: cut queries use it
    whole_rel = np.issubdtype(np.asarray(rel).dtype, np.integer)
    whole_unclamped = unclamped is not None and np.issubdtype(unclamped.dtype, np.integer)
    rel = np.asarray(rel, dtype=np.float64)  # as every workload reads it (one array: see _Once)
    unclamped = None if unclamped is None else unclamped.astype(np.float64)
    consistent = None if consistent is None else np.asarray(consistent, dtype=np.float64)  # float already: no copy
    summaries = _Once(error_summary)
    relative = _Once(lambda t, e, s: np.abs(e - t) / np.maximum(t, s))
    for w in truth.workloads:
        tru = truth.true_answers[w.name]
        est = w.answer(rel, whole=whole_rel)
        est_u = None if unclamped is None else w.answer(unclamped, whole=whole_unclamped)
        est_c = None if consistent is None else w.answer(consistent)
        out[w.name] = _workload_summary(w, tru, est, est_u, mech, truth.s_bound, mc, est_c, summaries)
        plot["rel_errors"][w.name] = relative(tru, est, truth.s_bound)
    # relative error with s = 1, for reading per-cell errors against small counts
    cells = out["superedge_cells"]
    true_t = st.count.astype(np.float64)
    r1 = np.abs(rel - true_t) / np.maximum(true_t, 1.0)
    r1.sort()  # numpy's sort beats its selection on millions of values; the order statistics are the same
    cells["median_relative_error_s1"] = float(np.median(r1, overwrite_input=True))
    cells["p90_relative_error_s1"] = float(np.percentile(r1, 90, overwrite_input=True))
    cells["zero_cells_true"] = int((st.count == 0).sum())
    cells["zero_cells_released"] = int((rel == 0).sum())
    # clamping at 0 lifts the empty cells: the bias every sum of many cells inherits
    cells["released_total_minus_true_total"] = float(rel.sum() - true_t.sum())
    return out


def _error_split(dd, queries) -> dict:
    split = {
        "degree_ks": {"total": dd["ks"], "grouping": dd["grouping_loss"]["ks"], "noise_added": dd["noise_added"]["ks"]},
        "degree_wasserstein1": {"total": dd["wasserstein1"], "grouping": dd["grouping_loss"]["wasserstein1"],
                                "noise_added": dd["noise_added"]["wasserstein1"]},
        "note": "grouping: the aggregate without noise against the true network; noise_added: total minus "
                "grouping (distances are not additive, so this is a difference, not a component)",
    }
    for name, w in queries.items():
        split[f"{name}:mean_absolute_error"] = {"total": w["mean_absolute_error"], "grouping": 0.0,
                                                "noise_added": w["mean_absolute_error"]}
    return split


def _start_structure(release, truth, samples, rng, parallel=None) -> dict:
    """Check what the structure section can do; start its tasks (shared with a helper process if worth it).

    Returns ``{"skipped": reason}`` or the plan :func:`_structure_section` finishes. Each
    side's seed, and the true network's percolations', is drawn here from the audit's
    generator, so the figures do not depend on where they are computed.
    """
    network, st = release.network, truth.st
    if st is None or "superedges" not in release.tables:
        return {"skipped": "no superedge counts in the release"}
    if not samples:
        return {"skipped": "structure_samples = 0"}
    if network.n_edges > MAX_STRUCTURE_EDGES:
        return {"skipped": f"network has more than {MAX_STRUCTURE_EDGES:,} contacts; structure comparison "
                           "is done in memory and was left out"}
    from ..synthesis import inputs_from_release, inputs_from_truth
    from . import fidelity as fid
    from .sampled import SideJob, TrueJob, start_work

    codes = {c: np.unique(np.asarray(vals, dtype=str), return_inverse=True)[1] for c, vals in truth.labels.items()}
    T = fid.transmissibility(truth.true_deg)
    seeds = rng.integers(0, 2 ** 63 - 1, size=3)
    released_inputs = inputs_from_release(release)
    jobs = {side: SideJob(inputs=inputs, codes=codes, samples=int(samples), transmissibility=T,
                          percolations=FIDELITY_PERCOLATIONS, seed=int(seed))
            for side, inputs, seed in (("release", released_inputs, seeds[0]),
                                       ("grouping_alone", inputs_from_truth(release, like=released_inputs),
                                        seeds[1]))}
    u, v = network.engine.edge_arrays()
    # one order whatever order the engine returns the rows in (a parallel scan's varies from run to run): the
    # percolations draw per edge in this order, so a seeded audit gives the same figures every time
    order = np.lexsort((v, u))
    assignment = release.grouping.assignment
    true_job = TrueJob(u=u[order], v=v[order], n=int(network.n_people),
                       categories={c: code[assignment] for c, code in codes.items()}, transmissibility=T,
                       percolations=FIDELITY_PERCOLATIONS, seed=int(seeds[2]))
    # both sides and the true network's figures (a helper process starts on them at once on large networks; this
    # process takes tasks too once the other sections are done)
    return {"codes": codes, "T": T, "jobs": jobs, "samples": int(samples),
            "beside": start_work(jobs, true_job, int(network.n_edges), parallel)}


def _structure_section(plan, progress) -> dict:
    """Networks drawn by the one sampler (the researcher's) from the release and from the true aggregate.

    Structure statistics of each, and the fidelity figures of :mod:`aggpub.audit.fidelity`
    (contacts, degree KS, largest degree, clustering, epidemic final size) against the
    true network, for "grouping alone" (the sampler fed the true aggregate) and for
    "the release". ``plan`` comes from :func:`_start_structure`.
    """
    if "skipped" in plan:
        return plan
    from . import fidelity as fid
    samples = plan["samples"]
    progress(f"audit: structure of the true network and of {samples} + {samples} sampled networks")
    done = plan["beside"].result()
    alone, release_side, true = done["grouping_alone"], done["release"], done["true"]
    true_stats, true_fig = true["stats"], true["figure"]

    def summary(side):
        runs = side["runs"]
        figures = [fid.compare_figures(true_fig, f) for f in side["figures"]]
        return {k: spread([r[k] for r in runs]) for k in runs[0] if k != "people"}, fid.summarise(figures)

    from_alone, fid_alone = summary(alone)
    from_release, fid_release = summary(release_side)
    released_inputs = plan["jobs"]["release"].inputs
    what = SAMPLER_TEXT[released_inputs.sampler]
    if released_inputs.sampler == "degree_corrected":
        what += (" with affinity blocks fitted to the released triangle count" if released_inputs.triangles
                 is not None else " (no triangle count released: no affinity blocks)")
    return {
        "true": true_stats,
        "sampled_from_release": from_release,
        "sampled_from_true_aggregate": from_alone,
        "fidelity": {
            "grouping_alone": fid_alone, "release": fid_release,
            "true": {"contacts": true_fig["contacts"], "largest_degree": true_fig["largest_degree"],
                     "average_clustering": true_fig["average_clustering"], "final_size": true_fig["final_size"],
                     "transmissibility": plan["T"]},
            "note": ("synthetic / true, mean over the sampled networks (degree KS: a distance, lower is better). "
                     "Epidemic: bond percolation at the transmissibility that gives the true network R = 1.5 "
                     f"(Newman, Phys. Rev. E 66, 2002), largest cluster, mean of {FIDELITY_PERCOLATIONS} "
                     "percolations"),
        },
        "sampler": f"aggpub.synthesis (the researchers' sampler, as `aggpub sample` runs it): {what}",
        "note": "sampled_from_true_aggregate shows what grouping alone loses; the difference to "
                "sampled_from_release is what noise adds",
    }


#: Percolations per network for the epidemic final size.
FIDELITY_PERCOLATIONS = 10
SAMPLER_TEXT = {
    "degree_corrected": "degree-corrected block model (Karrer, Newman, Phys. Rev. E 83, 2011) on the consistent "
                        "superedge estimates and the estimated degree sequences",
    "uniform_block": "exact counts per cell, contacts uniform within each cell (Hay, Miklau, Jensen, Towsley, "
                     "Weis, PVLDB 2008)",
}
#: Monte Carlo draws of the noise law behind the audit's view intervals (post-processing of released values).
VIEW_AUDIT_DRAWS = 500


def _views_section(release, truth, plot) -> dict:
    """Every released view, true against released (issue 13): the estimate ``aggpub matrix`` gives researchers
    (least squares over every released table), overall and per layer, and the raw view; the share of
    contacts the supernode labels alone cannot place by exact value (generalised or ``*`` labels).

    When the least squares falls back to the raw view (a release too large for it, decided from public
    sizes), the raw view's figures are the same table and are not computed twice.
    """
    true_views = release.truth["contact_views"]["counts"]
    out = {}
    plot["views"] = {}
    for name, true in true_views.items():
        entry = {}
        for method in ("consistent", "view"):
            m = _view_matrix(release, name, method, entry)
            if m is None:
                continue
            summ, tm, est = _view_figures(release, truth, name, method, true, m)
            entry[method] = summ
            if method == "consistent":
                plot["views"][name] = _view_plot_data(m, tm, est, release.manifest.get("view_domains", {}), name)
                if summ["method_used"] == "view":  # the fallback: the raw view is this very table
                    entry["view"] = {k: v for k, v in summ.items() if k != "per_layer"}
                    break
        attr = name.split(",")[0]
        if "," not in name and attr in truth.labels:  # what the supernode table alone could place exactly
            domain = set(release.manifest.get("view_domains", {}).get(attr, []))
            exact = np.array([v in domain for v in truth.labels[attr]])
            if truth.st is not None:
                both = exact[truth.st.a] & exact[truth.st.b]
                entry["contacts_placed_by_supernode_labels"] = float(truth.st.count[both].sum() /
                                                                     max(truth.st.count.sum(), 1))
        out[name] = entry
    return out


def _view_matrix(release, name, method, entry):
    """The researcher's contact matrix of one view (or ``None``, the reason recorded in ``entry``)."""
    from ..estimates.release_matrix import contact_matrix

    try:
        return contact_matrix(release, name, method=method, draws=VIEW_AUDIT_DRAWS, seed=0)
    except Exception as exc:  # the audit reports what it cannot compute; it never stops the release
        entry[method] = {"skipped": f"{type(exc).__name__}: {exc}"}
        return None


def _view_figures(release, truth, name, method, true, m):
    """Error figures and interval coverage of one estimate of a view (overall, and per layer)."""
    from ..estimates.release_matrix import contact_matrix

    layers = list(release.network.layers)
    tm = true.sum(axis=0).astype(np.float64)
    est = np.asarray(m.column("contacts").to_numpy(), dtype=np.float64)
    lo, hi = (np.asarray(m.column(c).to_numpy(), dtype=np.float64) for c in ("lower", "upper"))
    summ = error_summary(tm, est, truth.s_bound)
    summ["coverage"] = float(np.mean((lo <= tm) & (tm <= hi)))
    summ["confidence"] = 0.95
    summ["method_used"] = dict((m.schema.metadata or {}).items()).get(b"method", b"").decode()
    if layers and method == "consistent":
        ml = contact_matrix(release, name, method=method, draws=VIEW_AUDIT_DRAWS, seed=0, every_layer=True)
        el = np.asarray(ml.column("contacts").to_numpy(), dtype=np.float64).reshape(len(layers), -1)
        llo = np.asarray(ml.column("lower").to_numpy()).reshape(len(layers), -1)
        lhi = np.asarray(ml.column("upper").to_numpy()).reshape(len(layers), -1)
        summ["per_layer"] = {
            lay: {**{k: v for k, v in error_summary(true[i], el[i], truth.s_bound).items()
                     if k in ("mean_absolute_error", "median_relative_error", "rmse")},
                  "coverage": float(np.mean((llo[i] <= true[i]) & (true[i] <= lhi[i])))}
            for i, lay in enumerate(layers)}
    return summ, tm, est


def _view_plot_data(m, tm, est, domains, name):
    """``(values, code_a, code_b, true, estimate)`` of a view for the report's heat maps (integer codes,
    not a Python string per cell).

    The matrix of the whole view lists its cells in the view's cell order (``view_cells``), the order its
    error figures already compare ``est`` with ``tm`` in: the codes are those cells. A table of another
    length is read by its value names.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    from ..estimates.matrix import view_values
    from ..estimates.views import view_cells

    try:
        values = view_values(name, domains)
    except KeyError:  # an attribute without a declared domain: read the names
        values = None
    if values is not None and m.num_rows == len(tm) == len(values) * (len(values) + 1) // 2:
        ia, ib = view_cells(len(values))
        return values, ia, ib, tm, est
    values = pc.unique(m.column("value_a")).to_pylist()  # in order of first appearance: the declared order
    value_set = pa.array(values, pa.string())
    ia = np.asarray(pc.index_in(m.column("value_a"), value_set=value_set).to_numpy(zero_copy_only=False))
    ib = np.asarray(pc.index_in(m.column("value_b"), value_set=value_set).to_numpy(zero_copy_only=False))
    return values, ia.astype(np.int64), ib.astype(np.int64), tm, est
