"""The auditor: true network against the release (confidential).

Inputs already validated: ``release`` comes from :func:`aggpub.pipeline.build_release`.
"""

from __future__ import annotations

import math
import os
from datetime import datetime, timezone

import numpy as np

from ..cells import cell_index, possible_pairs
from ..released import dense_truth, release_degree_histograms
from . import degrees as deg
from . import queries as qw
from . import network_stats as struct
from ..synthesis import sample_block_network
from ..progress import silent
from .metrics import DEFAULT_SANITY_FRACTION, distribution_distances, error_summary

#: Largest network (contacts) whose structure the audit computes in memory.
MAX_STRUCTURE_EDGES = 500_000  # above this the sampled-structure comparison is skipped (too slow for a release)
#: Largest number of superedge cells the audit expands into a dense table.
MAX_AUDIT_CELLS = 30_000_000
#: Above this many cells the Monte Carlo runs one draw at a time (each draw holds a few copies of the table).
MC_PARALLEL_MAX_CELLS = 5_000_000
#: Monte Carlo draws when none are asked for: as many as fit ``MC_DEFAULT_VALUES`` values
#: (draws x cells), between ``MC_DEFAULT_MIN`` and ``MC_DEFAULT_MAX``.
MC_DEFAULT_MAX = 20
MC_DEFAULT_MIN = 3
MC_DEFAULT_VALUES = 6_000_000
RESIDUAL = "*"


def _col(table, name):
    return np.asarray(table.column(name).to_numpy(zero_copy_only=False))


def _released_cells(release, n_groups, column="edge_count"):
    """Released ``column`` of every cell in :func:`aggpub.components.all_cells` order (absent cells: 0)."""
    t = release.tables["superedges"]
    if column not in t.column_names:
        return None
    a, b = _col(t, "supernode_a").astype(np.int64), _col(t, "supernode_b").astype(np.int64)
    out = np.zeros(n_groups * (n_groups + 1) // 2, dtype=np.int64)
    out[cell_index(np.minimum(a, b), np.maximum(a, b), n_groups)] = _col(t, column)
    return out


def _label_columns(release):
    labels = release.grouping.labels
    return [c for c in labels.column_names if c not in ("supernode", "size")]


def _map_draws(one_draw, draws: int, n_cells: int, source):
    """``one_draw(i, source_i)`` for ``i < draws``, in order, on up to two worker threads.

    Each draw gets its own generator, seeded from ``source`` (so a seeded audit
    stays reproducible and the draws stay independent); the work of a draw is
    numpy on whole tables, which runs outside Python's global interpreter lock,
    so two draws proceed at once on a two-core machine. Tables above
    :data:`MC_PARALLEL_MAX_CELLS` cells run one draw at a time to bound memory.
    """
    from concurrent.futures import ThreadPoolExecutor

    from ..noise.sampler import SeededRandomSource

    seeds = np.floor(source.uniform(draws) * 2.0 ** 53).astype(np.int64)
    sources = [SeededRandomSource(int(x)) for x in seeds]
    workers = 1 if n_cells > MC_PARALLEL_MAX_CELLS else max(1, min(2, os.cpu_count() or 1, draws))
    if workers == 1:
        return [one_draw(i, src) for i, src in enumerate(sources)]
    with ThreadPoolExecutor(max_workers=workers, thread_name_prefix="aggpub-audit") as pool:
        return list(pool.map(one_draw, range(draws), sources))


def _post_process(noisy, cap, threshold=None):
    """A noisy table post-processed as the release is.

    ``clip(noisy, 0, cap)`` on every cell; with a sparse ``threshold``, cells
    whose noisy value is below it are absent (read as 0), which is the law the
    sparse release samples (noise every cell, then threshold).
    """
    out = np.clip(noisy, 0, cap)
    if threshold is not None:
        out = np.where(noisy >= threshold, out, 0)
    return out


def default_monte_carlo(n_cells: int) -> int:
    """Monte Carlo draws the audit makes by default on a table of ``n_cells`` cells.

    20 draws up to 300,000 cells; fewer above (each draw costs a pass over every
    cell and every workload), never fewer than 3. An error figure that averages
    over millions of cells varies little from draw to draw, so a few draws show
    its spread; the expected errors beside it are exact.
    """
    per = MC_DEFAULT_VALUES // max(int(n_cells), 1)
    return int(min(MC_DEFAULT_MAX, max(MC_DEFAULT_MIN, per)))


def _audit_source():
    """Randomness for the audit's Monte Carlo: PCG64 seeded from the operating system's entropy.

    The re-drawn tables are never published (only error figures computed from
    them go into the confidential report), so a fast generator seeded once from
    the operating system serves; reading the operating system's source for each
    of millions of values costs seconds on large tables.
    """
    import secrets

    from ..noise.sampler import SeededRandomSource

    return SeededRandomSource(secrets.randbits(63))


def _mc_errors(true, estimate, sanity_bound: float) -> tuple[float, float, float]:
    """Mean absolute, median relative and p90 relative error (the Monte Carlo's figures).

    The same definitions as :func:`aggpub.audit.metrics.error_summary`, without
    the figures the Monte Carlo does not keep.
    """
    abs_err = np.abs(estimate - true)
    p50, p90 = np.percentile(abs_err / np.maximum(true, sanity_bound), [50, 90])
    return float(abs_err.mean()), float(p50), float(p90)


def _spread(values) -> dict:
    v = np.asarray(values, dtype=np.float64)
    return {"mean": float(v.mean()), "sd": float(v.std(ddof=1)) if len(v) > 1 else 0.0,
            "p05": float(np.percentile(v, 5)), "p95": float(np.percentile(v, 95)), "draws": int(len(v))}


def _expected_abs(mech, var_q, single_cell: bool):
    """Expected absolute error per query before clamping.

    A single cell: ``E|Z| = 2 alpha / (1 - alpha^2)`` for the discrete Laplace
    law (from its pmf, Ghosh, Roughgarden, Sundararajan, STOC 2009). Sums of
    cells: normal approximation ``sqrt(2 var / pi)``.
    """
    if single_cell:
        al = mech.alpha
        return np.full(len(var_q), 2 * al / (1 - al * al))
    return np.sqrt(2 * np.asarray(var_q) / math.pi)


def audit_release(release, *, monte_carlo: int | None = None, source=None, structure_samples: int = 3,
                  n_cut_queries: int = 200, sanity_bound: float | None = None, seed: int | None = None,
                  progress=None) -> dict:
    """Audit a built release against the true network it came from.

    Parameters
    ----------
    release : aggpub.pipeline.Release
        From :func:`aggpub.pipeline.build_release` (holds the confidential truth).
    monte_carlo : int, optional
        Number of fresh noise draws on the true table for the spread of each
        error figure (0: none; default :func:`default_monte_carlo` of the number
        of superedge cells: 20 on small tables, at least 3 on large ones).
    source : aggpub.noise.RandomSource, optional
        Randomness for the Monte Carlo noise (default: PCG64 seeded from the
        operating system's entropy, see :func:`_audit_source`). Separate from the
        release's own noise; the re-drawn tables are never published.
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

    Returns
    -------
    dict
        JSON-ready figures (keys ``degree_distribution``, ``queries``, ``error_split``,
        ``structure``, ``budget``, ``grouping``, ``network``, ``gate`` ...); keys
        starting with ``_`` hold arrays for the plots and are not written to ``audit.json``.

    References
    ----------
    X. Xiao, G. Wang, J. Gehrke, "Differential privacy via wavelet transforms", ICDE 2010.
    M. Hay, G. Miklau, D. Jensen, D. Towsley, P. Weis, "Resisting structural
    re-identification in anonymized social networks", PVLDB 1(1), 2008.
    """
    from .gate import evaluate_gate

    progress = progress or silent
    source = source or _audit_source()
    rng = np.random.default_rng(seed)
    network, grouping, policy = release.network, release.grouping, release.policy
    n_groups = grouping.n_supernodes
    if monte_carlo is None:
        monte_carlo = default_monte_carlo(n_groups * (n_groups + 1) // 2)
    true_sizes = np.asarray(release.truth["sizes"], dtype=np.int64)
    pub_sizes = _col(release.tables["supernodes"], "size").astype(np.int64)
    n_edges = int(network.n_edges)
    s_bound = float(sanity_bound) if sanity_bound else max(1.0, DEFAULT_SANITY_FRACTION * n_edges)
    label_cols = _label_columns(release)
    labels = {c: [str(x) for x in grouping.labels.column(c).to_pylist()] for c in label_cols}

    out = {
        "confidential": True,
        "what": "utility audit of a release against the true network; holds unprotected statistics",
        "created_utc": datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "title": release.manifest.get("title"),
        "seeded_release": bool(release.manifest.get("seeded")),
        "network": {"people": int(network.n_people), "contacts": n_edges},
        "settings": {"monte_carlo_draws": int(monte_carlo), "structure_samples": int(structure_samples),
                     "sanity_bound": s_bound,
                     "sanity_bound_rule": "0.1% of the number of contacts, at least 1 (Xiao, Wang, Gehrke, "
                                          "ICDE 2010; fraction recalled from memory)"
                                          if not sanity_bound else "given"},
        "notes": [],
    }
    plot = {}

    # ------------------------------------------------------------ grouping and budget
    out["grouping"] = _grouping_summary(release, true_sizes, labels)
    plot["sizes"] = true_sizes
    m = release.manifest
    out["budget"] = {"epsilon_total": m.get("epsilon_total"), "epsilon_spent": m.get("epsilon_spent"),
                     "privacy_unit": m.get("privacy_unit"), "components": m.get("components", [])}

    # ------------------------------------------------------------ degrees
    progress("audit: degree distribution (true against released)")
    true_deg = network.engine.degrees(network.n_people)
    true_hist = deg.true_degree_histogram(true_deg)
    st = release.truth.get("superedges")
    have_edges = st is not None and "superedges" in release.tables
    threshold = None
    if have_edges and not getattr(st, "complete", True):
        n_cells = n_groups * (n_groups + 1) // 2
        threshold = release.manifest.get("superedges_sparse_threshold")
        if n_cells > MAX_AUDIT_CELLS:
            have_edges = False
            out["notes"].append(f"sparse superedge release over {n_cells:,} cells: more than the audit expands "
                                f"({MAX_AUDIT_CELLS:,}); superedge workloads and the block-model degree "
                                "distribution were left out")
        else:
            st = dense_truth(n_groups, st.a, st.b, st.count)
            out["notes"].append(f"sparse superedge release: cells whose noisy count fell below {threshold} are "
                                "absent and read as 0 (the Monte Carlo applies the same threshold)")
    mech = release.mechanisms.get("superedge_counts")
    deg_mc = None
    dd = {"true_mean_degree": float(true_deg.mean()), "true_max_degree": int(true_deg.max())}
    plot["true_pmf"] = true_hist / true_hist.sum()
    if have_edges:
        rel_cells = _released_cells(release, n_groups)
        cap_true = possible_pairs(true_sizes, st.a, st.b)
        cap_pub = possible_pairs(pub_sizes, st.a, st.b)
        group_pmf, method = deg.implied_degree_pmf(st.a, st.b, st.count, true_sizes)
        block_pmf, _ = deg.implied_degree_pmf(st.a, st.b, rel_cells, pub_sizes, method=method)
        plot["grouping_pmf"], plot["block_pmf"] = group_pmf, block_pmf
        dd["block_model_method"] = method
        dd["grouping_only"] = distribution_distances(true_hist, group_pmf)
        dd["block_model_released"] = distribution_distances(true_hist, block_pmf)
        dd["noise_only_block_model"] = distribution_distances(group_pmf, block_pmf)
    if "degree_histograms" in release.tables:
        rh = deg.released_histogram_degrees(release.tables["degree_histograms"])
        top = len(rh) - 1
        true_capped = np.bincount(np.minimum(true_deg, top), minlength=top + 1).astype(np.float64)
        dd.update(distribution_distances(true_capped, rh))
        dd["basis"] = (f"released per-supernode degree histograms (bins 0..{top - 1} and '{top} or more'); "
                       "true degrees capped the same way")
        dd["grouping_loss"] = {"ks": 0.0, "wasserstein1": 0.0, "l1": 0.0,
                               "note": "histograms summed over supernodes are exact without noise"}
        plot["released_pmf"] = rh / rh.sum()
        plot["released_basis"] = "released degree histograms"
        hist_mech = release.mechanisms.get("degree_histograms")
        if monte_carlo and hist_mech is not None:
            th = release.truth.get("degree_histograms")
            if th is None:
                th = network.engine.degree_histograms(grouping.assignment, n_groups, top)
            th = np.asarray(th, dtype=np.int64)
            ks, w1, l1 = [], [], []
            for _ in range(int(monte_carlo)):
                # the component's own release function: the same noise and post-processing
                table, _, _ = release_degree_histograms(th, pub_sizes, hist_mech.epsilon,
                                                             hist_mech.sensitivity, source)
                d = distribution_distances(true_capped, deg.released_histogram_degrees(table, top + 1))
                ks.append(d["ks"])
                w1.append(d["wasserstein1"])
                l1.append(d["l1"])
            dd["monte_carlo"] = {"ks": _spread(ks), "wasserstein1": _spread(w1), "l1": _spread(l1),
                                 "note": "fresh noise on the true histograms, post-processed as released"}
    elif have_edges:
        dd.update(dd["block_model_released"])
        dd["basis"] = ("block model implied by the released superedge counts and sizes (degree of a member "
                       f"of supernode a: sum over b of Binomial contacts; {method} computation)")
        dd["grouping_loss"] = dict(dd["grouping_only"])
        plot["released_pmf"] = block_pmf
        plot["released_basis"] = "block model of the released superedges"
        if monte_carlo and mech is not None:
            # filled by the Monte Carlo of the query workloads below, from its first draws
            deg_mc = {"draws": int(min(monte_carlo, 5)),  # each draw recomputes the block-model mixture
                      "terms": deg.block_model_terms(st.a, st.b, true_sizes), "ks": [], "wasserstein1": [],
                      "l1": []}
    else:
        dd["basis"] = "not measurable: the release has neither superedge counts nor degree histograms"
        out["notes"].append(dd["basis"])
    if "ks" in dd:
        dd["noise_added"] = {k: dd[k] - dd["grouping_loss"][k] for k in ("ks", "wasserstein1", "l1")}
    out["degree_distribution"] = dd

    # ------------------------------------------------------------ query workloads
    out["queries"] = {}
    plot["rel_errors"] = {}
    if have_edges:
        progress("audit: query workloads (cells, contact matrices, cuts, degree totals)")
        workloads = [qw.superedge_cells_workload(len(st.count))]
        for c in label_cols:
            workloads.append(qw.contact_matrix_workload(st.a, st.b, labels[c], c))
        workloads.append(qw.cut_workload(st.a, st.b, n_groups, n_cut_queries, rng))
        workloads.append(qw.degree_totals_workload(st.a, st.b, n_groups))
        true_t = st.count.astype(np.float64)
        rel_unclamped = None if threshold is not None else _released_cells(release, n_groups,
                                                                            "edge_count_unclamped")
        if rel_unclamped is not None:
            rel_unclamped = rel_unclamped.astype(np.float64)
        mc_stats = {w.name: {"mean_absolute_error": [], "median_relative_error": [], "p90_relative_error": []}
                    for w in workloads}
        true_answers = {w.name: w.answer(true_t) for w in workloads}
        if monte_carlo and mech is not None:
            progress(f"audit: {int(monte_carlo)} fresh noise draws on the true table (Monte Carlo)")

            def one_draw(i, draw_source):
                """Figures of fresh noise draw ``i`` (inputs already validated; runs in a worker thread)."""
                noisy = st.count + mech.noise(len(st.count), draw_source)
                degree = None
                if deg_mc is not None and i < deg_mc["draws"]:  # the degree distribution's spread
                    pmf, _ = deg.implied_degree_pmf(st.a, st.b, _post_process(noisy, cap_true, threshold),
                                                    true_sizes, method=method, terms=deg_mc["terms"])
                    degree = distribution_distances(true_hist, pmf)
                table = _post_process(noisy, cap_pub, threshold).astype(np.float64)
                del noisy
                return degree, {w.name: _mc_errors(true_answers[w.name], w.answer(table), s_bound) for w in workloads}

            for degree, errors in _map_draws(one_draw, int(monte_carlo), len(st.count), source):
                if degree is not None:
                    for k, v in degree.items():
                        deg_mc[k].append(v)
                for name, (mae, p50, p90) in errors.items():
                    mc_stats[name]["mean_absolute_error"].append(mae)
                    mc_stats[name]["median_relative_error"].append(p50)
                    mc_stats[name]["p90_relative_error"].append(p90)
            if deg_mc is not None:
                dd["monte_carlo"] = {k: _spread(deg_mc[k]) for k in ("ks", "wasserstein1", "l1")}
                dd["monte_carlo"]["note"] = (f"{deg_mc['draws']} fresh noise draws on the true superedge table "
                                             "(the first draws of the query workloads' Monte Carlo)")
        for w in workloads:
            tru = true_answers[w.name]
            est = w.answer(rel_cells)
            summ = error_summary(tru, est, s_bound)
            if rel_unclamped is not None:
                # what a researcher gets by summing edge_count_unclamped, as the data card advises
                summ["from_unclamped_counts"] = error_summary(tru, w.answer(rel_unclamped), s_bound)
            summ["grouping_loss_mean_absolute_error"] = 0.0
            summ["grouping_loss_note"] = "an exact sum of superedge cells: grouping alone loses nothing"
            if mech is not None:
                var_q = w.noise_variance(mech.variance())
                summ["expected_rmse"] = float(np.sqrt(var_q.mean()))
                summ["expected_mean_absolute_error"] = float(
                    _expected_abs(mech, var_q, w.single_cell).mean())
                summ["expected_note"] = ("from the mechanism's variance before clamping at 0 and at the possible "
                                         "pairs" + ("" if w.single_cell else
                                                    "; mean absolute error by normal approximation"))
            if mc_stats[w.name]["mean_absolute_error"]:
                summ["monte_carlo"] = {k: _spread(v) for k, v in mc_stats[w.name].items()}
            if w.notes:
                summ["notes"] = w.notes
            if w.name.startswith("contact_matrix:"):
                summ["true_total"] = float(tru.sum())
            out["queries"][w.name] = summ
            plot["rel_errors"][w.name] = np.abs(est - tru) / np.maximum(tru, s_bound)
        # relative error with s = 1, for reading per-cell errors against small counts
        cells = out["queries"]["superedge_cells"]
        r1 = np.abs(rel_cells - true_t) / np.maximum(true_t, 1.0)
        cells["median_relative_error_s1"] = float(np.median(r1))
        cells["p90_relative_error_s1"] = float(np.percentile(r1, 90))
        cells["zero_cells_true"] = int((st.count == 0).sum())
        cells["zero_cells_released"] = int((rel_cells == 0).sum())
        # clamping at 0 lifts the empty cells: the bias every sum of many cells inherits
        cells["released_total_minus_true_total"] = float(rel_cells.sum() - true_t.sum())

    # ------------------------------------------------------------ structure
    out["structure"] = _structure(release, st if have_edges else None,
                                  rel_cells if have_edges else None, true_sizes, pub_sizes, labels,
                                  structure_samples, rng, progress)

    # ------------------------------------------------------------ split summary
    if "ks" in dd:
        out["error_split"] = {
            "degree_ks": {"total": dd["ks"], "grouping": dd["grouping_loss"]["ks"],
                          "noise_added": dd["noise_added"]["ks"]},
            "degree_wasserstein1": {"total": dd["wasserstein1"], "grouping": dd["grouping_loss"]["wasserstein1"],
                                    "noise_added": dd["noise_added"]["wasserstein1"]},
            "note": "grouping: the aggregate without noise against the true network; noise_added: total minus "
                    "grouping (distances are not additive, so this is a difference, not a component)",
        }
        for name, w in out["queries"].items():
            out["error_split"][f"{name}:mean_absolute_error"] = {
                "total": w["mean_absolute_error"], "grouping": 0.0, "noise_added": w["mean_absolute_error"]}
    out["gate"] = evaluate_gate(policy, out)
    out["_plot"] = plot
    return out


def _grouping_summary(release, sizes, labels) -> dict:
    grouping = release.grouping
    people = release.network.people
    attrs = {}
    for c, vals in labels.items():
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


def _structure(release, st, rel_cells, true_sizes, pub_sizes, labels, samples, rng, progress) -> dict:
    network = release.network
    if st is None:
        return {"skipped": "no superedge counts in the release"}
    if not samples:
        return {"skipped": "structure_samples = 0"}
    if network.n_edges > MAX_STRUCTURE_EDGES:
        return {"skipped": f"network has more than {MAX_STRUCTURE_EDGES:,} contacts; structure comparison "
                           "is done in memory and was left out"}
    progress(f"audit: structure of the true network and of {samples} + {samples} sampled networks")
    codes = {}
    for c, vals in labels.items():
        _, codes[c] = np.unique(np.asarray(vals, dtype=str), return_inverse=True)
    if not hasattr(network.engine, "edge_arrays"):
        return {"skipped": f"the {network.engine.name} engine does not hand edges to the audit"}
    u, v = network.engine.edge_arrays()
    assignment = release.grouping.assignment
    true_stats = struct.structure_statistics(u, v, network.n_people,
                                             {c: code[assignment] for c, code in codes.items()})

    def sampled(counts, sizes):
        runs = []
        for _ in range(samples):
            su, sv = sample_block_network(st.a, st.b, counts, sizes, rng)
            cats = {c: np.repeat(code, sizes) for c, code in codes.items()}
            runs.append(struct.structure_statistics(su, sv, int(sizes.sum()), cats))
        keys = runs[0].keys()
        return {k: _spread([r[k] for r in runs]) for k in keys if k != "people"}

    return {
        "true": true_stats,
        "sampled_from_release": sampled(rel_cells, pub_sizes),
        "sampled_from_true_aggregate": sampled(st.count, true_sizes),
        "sampler": "aggpub.synthesis.sample_block_network: uniform distinct pairs within each cell "
                   "(Hay, Miklau, Jensen, Towsley, Weis, PVLDB 2008)",
        "note": "sampled_from_true_aggregate shows what grouping alone loses; the difference to "
                "sampled_from_release is what noise adds",
    }
