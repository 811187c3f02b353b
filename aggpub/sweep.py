"""The trade-off explorer: expected and observed errors over a grid of epsilon x min_size (x unit).

An internal planning aid for the data steward. For every grid point it reports
the errors a release at that setting would have -- analytic expectations from
the mechanism's variance beside a few real noise draws -- and names the cheapest
setting (smallest epsilon) that meets the policy's ``[gate]`` thresholds.

Why it is fast: the true statistics depend on the grouping only, not on epsilon.
People are grouped once per ``(unit, min_size)`` (once per grid point only when
the grouping itself is noisy, e.g. unit ``person``, whose sizes are private) and
the engine counts superedges once per grouping; each epsilon then costs only a
few vectorised noise draws on those counts.

It is confidential and not a release: choosing parameters by looking at errors
measured on the private data is itself a data-dependent step that no epsilon
covers, and the final release draws fresh noise. Nothing here is written to a
bundle, charged to a ledger, or meant to leave the steward's desk.

References
----------
A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally utility-maximizing
privacy mechanisms", STOC 2009 (discrete Laplace noise, its variance and E|Z|).

X. Xiao, G. Wang, J. Gehrke, "Differential privacy via wavelet transforms",
ICDE 2010 (relative error with a sanity bound).

M. Hay, G. Miklau, D. Jensen, D. Towsley, P. Weis, "Resisting structural
re-identification in anonymized social networks", PVLDB 1(1), 2008 (degree
distribution implied by a supergraph read as a block model).
"""

from __future__ import annotations

__all__ = ["SweepResult", "run_sweep", "write_sweep", "parse_grid", "PLANNING_NOTE", "SWEEP_COLUMNS"]

import csv
import dataclasses
import io
import json
import math
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa

from .budget import ReleaseBudget, check_contact_cap, sensitivity
from .errors import PolicyError, PrivacyError, UsageError
from .gate import evaluate_gate, gate_attribute
from .gate.released import released_metrics
from .noise.mechanisms import GeometricMechanism
from .noise.sampler import make_random_source
from .policy import PRIVACY_UNITS, ReleasePolicy, epsilon_shares, read_policy
from .progress import silent
from .released import release_degree_histograms, release_superedge_counts, superedge_sparse_threshold
from .audit.degrees import implied_degree_pmf, released_histogram_degrees
from .audit.metrics import distribution_distances, error_summary
from .audit.truth import truth_of_grouping

PLANNING_NOTE = (
    "INTERNAL PLANNING AID - CONFIDENTIAL, NOT A RELEASE. These figures were measured on the private data. "
    "Choosing parameters from them is itself a data-dependent step that no epsilon covers, and the final "
    "release draws fresh noise, so its errors will differ from these. Do not publish or share this folder.")

#: Marker line of a sweep folder's README.txt (lets --overwrite replace only a sweep folder).
_MARKER = "aggpub trade-off sweep"

SWEEP_COLUMNS = [
    ("unit", "privacy unit"),
    ("min_size", "minimum supernode size (k)"),
    ("epsilon", "total epsilon of the release"),
    ("supernodes", "number of supernodes of the grouping"),
    ("cells", "superedge cells released"),
    ("superedge_epsilon", "epsilon share of the superedge counts"),
    ("noise_scale", "discrete Laplace scale of each superedge cell (sensitivity / epsilon share)"),
    ("expected_superedge_mean_absolute_error", "analytic E|Z| per cell, 2a/(1-a^2), before clamping"),
    ("expected_superedge_mean_absolute_error_clamped",
     "analytic mean over cells of E|clip(T+Z, 0, cap) - T| (exact law of the clamped error)"),
    ("sparse_threshold", "sparse release: noisy cells below it are dropped (empty: dense release)"),
    ("superedge_mean_absolute_error", "observed, mean over the noise draws (clamped as released)"),
    ("superedge_mean_absolute_error_sd", "spread over the draws"),
    ("superedge_median_relative_error", "observed, mean over draws; relative error with sanity bound"),
    ("contact_matrix_attribute", "attribute of the contact matrix (the gate's)"),
    ("expected_contact_matrix_median_relative_error_unclamped",
     "median over contact-matrix cells of E|noise sum| / max(true, s), exact law, before clamping"),
    ("expected_contact_matrix_median_relative_error",
     "the same with clamping: exact per-cell bias and variance of the clamped error, sum by normal law"),
    ("contact_matrix_median_relative_error", "observed, mean over draws"),
    ("contact_matrix_median_relative_error_max", "observed, worst draw"),
    ("contact_matrix_p90_relative_error", "observed, mean over draws"),
    ("degree_ks", "degree-distribution KS distance, observed, mean over draws"),
    ("degree_ks_max", "worst draw"),
    ("degree_wasserstein1", "degree-distribution Wasserstein-1, observed, mean over draws"),
    ("degree_wasserstein1_max", "worst draw"),
    ("degree_ks_grouping_only", "KS of the aggregate without noise (what grouping alone loses)"),
    ("degree_wasserstein1_grouping_only", "Wasserstein-1 of the aggregate without noise"),
    ("degree_basis", "block_model (from superedges) or histograms (released degree histograms)"),
    ("gate_degree_ks", "the gate's degree KS figure, estimated from each simulated release's values, mean"),
    ("gate_degree_wasserstein1", "the gate's degree Wasserstein-1 figure (released values), mean"),
    ("gate_contact_matrix_median_relative_error", "the gate's contact-matrix figure (released values), mean"),
    ("gate_superedge_median_relative_error", "the gate's superedge-cell figure (released values), mean"),
    ("gate_pass_rate", "share of the simulated releases the gate (on released values) lets through"),
    ("gate_passed", "the gate let every simulated release through"),
    ("gate_failed", "thresholds failed by at least one simulated release"),
    ("draws", "noise draws at this grid point"),
]


def parse_grid(text: str, kind, name: str) -> list:
    """``"0.5,1,2"`` -> ``[0.5, 1.0, 2.0]`` (sorted, unique), naming the option on error."""
    items = [t.strip() for t in str(text).split(",") if t.strip()]
    if not items:
        raise UsageError(f"'{name}': give a comma-separated list, got {text!r}")
    out = []
    for t in items:
        try:
            v = kind(t)
        except ValueError:
            raise UsageError(f"'{name}': {t!r} is not a valid {kind.__name__}") from None
        if kind is float and (not math.isfinite(v) or v <= 0):
            raise UsageError(f"'{name}': every epsilon must be a finite number > 0, got {t!r}")
        if kind is int and v < 1:
            raise UsageError(f"'{name}': every minimum size must be an integer >= 1, got {t!r}")
        if kind is str and v not in PRIVACY_UNITS:
            raise UsageError(f"'{name}': unknown privacy unit {t!r} (choose from {', '.join(PRIVACY_UNITS)})")
        out.append(v)
    return sorted(set(out), key=out.index) if kind is str else sorted(set(out))


@dataclass
class SweepResult:
    """Rows of the sweep (one dict per grid point), the cheapest passing setting and notes."""

    rows: list
    cheapest: dict | None
    thresholds: dict
    notes: list = field(default_factory=list)
    timings: dict = field(default_factory=dict)
    network: dict = field(default_factory=dict)

    def as_dict(self) -> dict:
        return {"planning_note": PLANNING_NOTE, "rows": self.rows, "cheapest": self.cheapest,
                "thresholds": self.thresholds, "notes": self.notes, "timings": self.timings,
                "network": self.network}


def _policy_at(policy: ReleasePolicy, unit: str, epsilon: float, min_size: int, max_contacts) -> ReleasePolicy:
    privacy = dataclasses.replace(policy.privacy, unit=unit, epsilon=float(epsilon),
                                  max_contacts=max_contacts if unit == "person" else None)
    grouping = dataclasses.replace(policy.grouping, min_size=int(min_size))
    return policy.replace(privacy=privacy, grouping=grouping, ledger=None)


def _clamped_error_moments(scale: float, true, cap, chunk_values: int = 4_000_000):
    """Per cell: mean, variance and mean absolute value of ``clip(T + Z, 0, cap) - T``.

    ``Z`` is discrete Laplace of ``scale``; the error equals ``clip(Z, -T, cap - T)``,
    whose law depends on ``(T, cap - T)`` only through their values up to ``L``, the
    point beyond which the noise has mass ``2 alpha^(L+1) / (1 + alpha) < e^-40``. The
    moments are computed once per distinct pair ``(min(T, L), min(cap - T, L))`` on the
    grid ``-L..L`` (vectorised over the pairs, in chunks).
    """
    alpha = math.exp(-1.0 / scale)
    L = int(math.ceil(40.0 * scale)) + 2
    true = np.asarray(true, dtype=np.int64)
    lo = np.clip(true, 0, L)
    hi = np.clip(np.asarray(cap, dtype=np.int64) - true, 0, L)
    key = lo * (L + 1) + hi
    present = np.zeros((L + 1) ** 2, dtype=bool)
    present[key] = True
    ids = np.flatnonzero(present)
    z = np.arange(-L, L + 1, dtype=np.float64)
    pmf = alpha ** np.abs(z)
    pmf /= pmf.sum()
    mean = np.empty(len(ids))
    second = np.empty(len(ids))
    absm = np.empty(len(ids))
    step = max(1, chunk_values // len(z))
    for s in range(0, len(ids), step):
        part = ids[s:s + step]
        e = np.clip(z[None, :], -(part // (L + 1))[:, None], (part % (L + 1))[:, None])
        mean[s:s + step] = e @ pmf
        second[s:s + step] = (e * e) @ pmf
        absm[s:s + step] = np.abs(e) @ pmf
    where = np.searchsorted(ids, key)
    m = mean[where]
    return m, np.maximum(second[where] - m * m, 0.0), absm[where]


def _normal_abs_mean(mu, var):
    """``E|X|`` for ``X ~ Normal(mu, var)`` (folded normal mean)."""
    from scipy.stats import norm

    sd = np.sqrt(np.maximum(var, 1e-300))
    return sd * math.sqrt(2 / math.pi) * np.exp(-mu * mu / (2 * sd * sd)) + mu * (1 - 2 * norm.cdf(-mu / sd))


def _grouping_truth(network, grouping, hp, s_bound):
    """True tables of one grouping for every epsilon of the grid (computed once)."""
    truth = truth_of_grouping(network, grouping, hist_cap=hp.max_degree if hp.enabled else None,
                              sanity_bound=s_bound, contact_matrices_only=True)
    truth.grouping_labels = grouping.labels.add_column(1, "size", pa.array(truth.pub_sizes))
    truth.cm_cells = {w.name.split(":", 1)[1]: np.asarray(w.matrix.sum(axis=1)).ravel().astype(np.int64)
                      for w in truth.workloads}
    if truth.hist_truth is not None:  # degree histograms released: the sweep compares those
        truth.grouping_only = {"ks": 0.0, "wasserstein1": 0.0}
        truth.deg_method = None
    else:
        pmf, truth.deg_method = implied_degree_pmf(truth.st.a, truth.st.b, truth.st.count, truth.true_sizes)
        truth.grouping_only = distribution_distances(truth.true_hist, pmf)
    return truth


def run_sweep(policy, edges=None, people=None, *, epsilons, min_sizes, units=None, max_contacts=None,
              draws: int = 3, seed: int | None = None, progress=None, network=None, engine: str = "duckdb",
              source_column=None, target_column=None, node_column=None, drop_unknown=None,
              sanity_bound: float | None = None, memory_limit: str | None = None,
              debug: bool = False) -> SweepResult:
    """Expected and observed errors of a release over a grid of settings (confidential planning aid).

    At each grid point ``draws`` releases are simulated on the true tables (the
    statistics' own release functions), each judged by the real gate on its
    released values (:func:`aggpub.gate.run.release_gate`'s figures) and compared
    with the truth for the board.

    Parameters
    ----------
    policy : ReleasePolicy or path
        The base policy; each grid point replaces its epsilon, min_size and unit.
    edges, people : path or pyarrow.Table
        The private inputs (not needed when ``network`` is given).
    epsilons : sequence of float
        Total epsilon of the release at each grid point.
    min_sizes : sequence of int
    units : sequence of str, optional
        Privacy units to try (default: the policy's). ``person`` needs ``max_contacts``
        (from the policy or the argument).
    max_contacts : int, optional
        Contact cap for unit ``person`` (default: the policy's).
    draws : int, default 3
        Simulated releases per grid point (vectorised over cells).
    seed : int, optional
        Seed of the planning draws (they are never published either way).
    progress : callable, optional
        Stage messages (the CLI prints them on stderr).
    network : aggpub.Network, optional
        An already ingested network (then ``edges`` and ``people`` are ignored, and it is not closed).
    sanity_bound : float, optional
        ``s`` of the true relative errors (default as the auditor: 0.1% of the contacts, at least 1).
    memory_limit : str, optional
        Memory cap of the counting engine (e.g. ``"4GB"``).

    Returns
    -------
    SweepResult
    """
    progress = progress or silent
    t_start = time.perf_counter()
    if not isinstance(policy, ReleasePolicy):
        policy = read_policy(policy)
    grid = _check_grid(policy, epsilons, min_sizes, units, draws, max_contacts)
    notes = []
    if policy.components.weight_totals.enabled:
        notes.append("weight totals are not measured by the sweep (their share of epsilon is still "
                     "taken from the budget at every grid point)")
        progress(f"note: {notes[-1]}")
    opened = network is None
    if opened:
        network = _read_once(policy, edges, people, progress, engine=engine, memory_limit=memory_limit,
                             debug=debug, source=source_column, target=target_column, node=node_column,
                             drop_unknown=drop_unknown)
    try:
        rows, timings = _sweep_grid(network, policy, grid, draws, make_random_source(seed), sanity_bound,
                                    notes, progress)
    finally:
        if opened:
            network.engine.close()
    timings.update(total_seconds=time.perf_counter() - t_start, grid_points=len(rows))
    passing = [r for r in rows if r["gate_passed"]]
    cheapest = None
    if passing:  # smallest epsilon; then the larger min_size and the stronger unit
        cheapest = min(passing, key=lambda r: (r["epsilon"], -r["min_size"], 0 if r["unit"] == "person" else 1))
    thresholds = {k: getattr(policy.gate, k) for k in GATE_KEYS if getattr(policy.gate, k) is not None}
    if not thresholds:
        notes.append("the policy sets no [gate] thresholds: every setting passes, the cheapest is the smallest "
                     "epsilon")
    notes.append("gate_* columns: the real gate, judged on the released values of each simulated release (as "
                 "a release is judged); expected_* columns are analytic, from the noise law; the other columns "
                 "compare simulated releases with the truth (confidential)")
    if any(r.get("sparse_threshold") is not None for r in rows):
        notes.append("sparse superedge releases (method 'sparse' or 'auto' on very many cells) are modelled "
                     "with their threshold, cells below it read as 0")
    return SweepResult(rows=rows, cheapest=cheapest, thresholds=thresholds, notes=notes, timings=timings,
                       network={"people": int(network.n_people), "contacts": int(network.n_edges),
                                "sanity_bound": _s_bound(network, sanity_bound)})


GATE_KEYS = ("max_degree_ks", "max_degree_wasserstein", "max_contact_matrix_median_relative_error",
             "max_superedge_median_relative_error")


def _s_bound(network, sanity_bound) -> float:
    from .audit.metrics import DEFAULT_SANITY_FRACTION

    return float(sanity_bound) if sanity_bound else max(1.0, DEFAULT_SANITY_FRACTION * network.n_edges)


def _check_grid(policy, epsilons, min_sizes, units, draws, max_contacts) -> dict:
    epsilons = sorted(set(float(e) for e in epsilons))
    min_sizes = sorted(set(int(k) for k in min_sizes))
    units = list(units) if units else [policy.privacy.unit]
    if not epsilons or not min_sizes:
        raise UsageError("the sweep needs at least one epsilon and one minimum size")
    if isinstance(draws, bool) or not isinstance(draws, int) or draws < 1:
        raise UsageError(f"'draws' must be an integer >= 1, got {draws!r}")
    D = max_contacts if max_contacts is not None else policy.privacy.max_contacts
    if "person" in units and D is None:
        raise PolicyError("unit 'person' needs the promised contact cap: set 'privacy.max_contacts' in the "
                          "policy (with unit = 'person') or pass --max-contacts")
    if not policy.components.superedge_counts.enabled:
        raise PolicyError("'components.superedge_counts.enabled' is false: the sweep measures superedge counts")
    return {"epsilons": epsilons, "min_sizes": min_sizes, "units": units, "D": D}


def _read_once(policy, edges, people, progress, *, engine, memory_limit, debug, source, target, node,
               drop_unknown):
    from .engines import make_engine
    from .ingest import load_policy_inputs

    progress("reading edges and people (once for the whole sweep)")
    unweighted = policy.replace(components=dataclasses.replace(
        policy.components, weight_totals=dataclasses.replace(policy.components.weight_totals, enabled=False,
                                                             share=None)))
    return load_policy_inputs(unweighted, edges, people, source=source, target=target, node=node,
                              drop_unknown=drop_unknown, debug=debug,
                              engine=make_engine(engine, **({"memory_limit": memory_limit} if memory_limit else {})))


def _sweep_grid(network, policy, grid, draws, source, sanity_bound, notes, progress):
    """Every grid point: the grouping (once per unit and min_size when public), then each epsilon."""
    from .grouping import make_grouping

    s_bound = _s_bound(network, sanity_bound)
    hp = policy.components.degree_histograms
    rows, cache = [], {}
    timings = {"groupings": 0, "truth_seconds": 0.0, "noise_and_metrics_seconds": 0.0}
    D = grid["D"]
    for unit in grid["units"]:
        if unit == "person":
            check_contact_cap(network.engine.degrees(network.n_people), D)
        for k in grid["min_sizes"]:
            for eps in grid["epsilons"]:
                pol = _policy_at(policy, unit, eps, k, D)
                shares = epsilon_shares(pol, network.n_people if unit == "edge" else None)
                truth = cache.get((unit, k))
                if truth is None:
                    t1 = time.perf_counter()
                    try:
                        grouping = make_grouping(network, pol, ReleaseBudget(pol.privacy.epsilon), source, shares)
                    except PrivacyError as exc:
                        notes.append(f"unit {unit}, min_size {k}: no grouping ({exc})")
                        progress(f"unit {unit}, min_size {k}: skipped ({exc})")
                        break
                    truth = _grouping_truth(network, grouping, hp, s_bound)
                    timings["groupings"] += 1
                    timings["truth_seconds"] += time.perf_counter() - t1
                    if grouping.public:
                        cache[(unit, k)] = truth
                    progress(f"unit {unit}, min_size {k}: {truth.n_groups:,} supernodes, true counts computed"
                             + ("" if grouping.public else f" (noisy grouping at epsilon {eps:g})"))
                t1 = time.perf_counter()
                row = _grid_point(truth, pol, shares, unit, k, eps, D, draws, source)
                timings["noise_and_metrics_seconds"] += time.perf_counter() - t1
                rows.append(row)
                cm = row["contact_matrix_median_relative_error"]
                progress(f"unit {unit}, min_size {k}, epsilon {eps:g}: contact matrix median relative error "
                         f"{cm if cm is None else format(cm, '.4g')}, degree KS {row['degree_ks']:.4g}"
                         + (", gate passed" if row["gate_passed"] else ", gate failed"))
    return rows, timings


def _analytic(truth, mech, cm_attr, row) -> None:
    """Expected errors of one setting from the noise law (no draw)."""
    st = truth.st
    row["expected_superedge_mean_absolute_error"] = mech.expected_abs()
    c_mean, c_var, c_abs = _clamped_error_moments(mech.scale, st.count, truth.cap_pub)
    row["expected_superedge_mean_absolute_error_clamped"] = float(c_abs.mean())
    if cm_attr is not None:
        w = truth.workload(f"contact_matrix:{cm_attr}")
        tru = truth.true_answers[w.name]
        denom = np.maximum(tru, truth.s_bound)
        e_abs = mech.expected_abs_sum(truth.cm_cells[cm_attr])
        row["expected_contact_matrix_median_relative_error_unclamped"] = float(np.median(e_abs / denom))
        e_clamped = _normal_abs_mean(w.answer(c_mean), w.answer(c_var))
        row["expected_contact_matrix_median_relative_error"] = float(np.median(e_clamped / denom))


def _simulated_release(truth, pol, shares, unit, D, mech, threshold, source):
    """One release simulated on the true tables: its public tables and manifest (components only)."""
    st = truth.st
    tables = {"supernodes": truth.grouping_labels}
    table, spend, _ = release_superedge_counts(st if threshold is None else _nonzero(st), truth.pub_sizes,
                                               mech.epsilon, mech.sensitivity, source, sparse_threshold=threshold,
                                               n_groups=truth.n_groups)
    tables["superedges"] = table
    spends = [spend.as_dict()]
    if truth.hist_truth is not None:
        table, spend, _ = release_degree_histograms(truth.hist_truth, truth.pub_sizes, shares["degree_histograms"],
                                                    sensitivity(unit, "degree_histograms", D), source,
                                                    max_possible_degree=D if unit == "person" else None)
        tables["degree_histograms"] = table
        spends.append(spend.as_dict())
    return tables, {"components": spends, "max_contacts": D if unit == "person" else None}


def _nonzero(st):
    from .released import SuperedgeTruth

    nz = st.count != 0
    return SuperedgeTruth(a=st.a[nz], b=st.b[nz], count=st.count[nz], complete=False)


def _true_errors(truth, tables, cm_attr, hp, figs) -> None:
    """The simulated release against the truth (confidential columns)."""
    from .cells import scatter_cells

    se = tables["superedges"]
    col = lambda name: np.asarray(se.column(name).to_numpy())  # noqa: E731
    rel = scatter_cells(truth.n_groups, col("supernode_a"), col("supernode_b"), col("edge_count")).astype(np.float64)
    e = error_summary(truth.st.count.astype(np.float64), rel, truth.s_bound)
    figs["se_mae"].append(e["mean_absolute_error"])
    figs["se_mre"].append(e["median_relative_error"])
    if cm_attr is not None:
        w = truth.workload(f"contact_matrix:{cm_attr}")
        e = error_summary(truth.true_answers[w.name], w.answer(rel), truth.s_bound)
        figs["cm_mre"].append(e["median_relative_error"])
        figs["cm_p90"].append(e["p90_relative_error"])
    if truth.hist_truth is not None:
        d = distribution_distances(truth.true_capped(hp.max_degree),
                                   released_histogram_degrees(tables["degree_histograms"], hp.max_degree + 1))
    else:
        pmf, _ = implied_degree_pmf(truth.st.a, truth.st.b, rel, truth.pub_sizes, method=truth.deg_method)
        d = distribution_distances(truth.true_hist, pmf)
    figs["ks"].append(d["ks"])
    figs["w1"].append(d["wasserstein1"])


def _grid_point(truth, pol, shares, unit, k, eps, D, draws, source) -> dict:
    """Analytic expectations, and ``draws`` simulated releases judged by the real gate and against the truth."""
    hp = pol.components.degree_histograms
    sens = sensitivity(unit, "superedge_counts", D)
    eps_se = shares["superedge_counts"]
    mech = GeometricMechanism(epsilon=eps_se, sensitivity=sens)
    threshold = superedge_sparse_threshold(pol.components.superedge_counts, truth.n_groups, eps_se, sens)
    gate_attr = gate_attribute(pol)
    cm_attr = gate_attr if gate_attr in truth.labels else next(iter(truth.labels), None)
    row = {"unit": unit, "min_size": k, "epsilon": eps, "supernodes": truth.n_groups, "cells": len(truth.st.count),
           "superedge_epsilon": eps_se, "noise_scale": mech.scale, "sparse_threshold": threshold,
           "contact_matrix_attribute": cm_attr}
    _analytic(truth, mech, cm_attr, row)
    figs = {n: [] for n in ("se_mae", "se_mre", "cm_mre", "cm_p90", "ks", "w1")}
    gates = []
    gated = any(getattr(pol.gate, key) is not None for key in GATE_KEYS)
    for _ in range(draws):
        tables, manifest = _simulated_release(truth, pol, shares, unit, D, mech, threshold, source)
        _true_errors(truth, tables, cm_attr, hp, figs)
        metrics = released_metrics(tables, manifest, pol) if gated else {}
        gates.append(evaluate_gate(pol, metrics, basis="simulated release"))
    mean = {n: float(np.mean(v)) if v else None for n, v in figs.items()}
    row.update({
        "superedge_mean_absolute_error": mean["se_mae"],
        "superedge_mean_absolute_error_sd": float(np.std(figs["se_mae"], ddof=1)) if draws > 1 else 0.0,
        "superedge_median_relative_error": mean["se_mre"],
        "contact_matrix_median_relative_error": mean["cm_mre"],
        "contact_matrix_median_relative_error_max": float(np.max(figs["cm_mre"])) if figs["cm_mre"] else None,
        "contact_matrix_p90_relative_error": mean["cm_p90"],
        "degree_ks": mean["ks"], "degree_ks_max": float(np.max(figs["ks"])),
        "degree_wasserstein1": mean["w1"], "degree_wasserstein1_max": float(np.max(figs["w1"])),
        "degree_ks_grouping_only": float(truth.grouping_only["ks"]),
        "degree_wasserstein1_grouping_only": float(truth.grouping_only["wasserstein1"]),
        "degree_basis": "histograms" if truth.hist_truth is not None else "block_model",
        "draws": int(draws),
    })
    for key in GATE_KEYS:
        vals = [g[key]["value"] for g in gates if key in g and g[key]["value"] is not None]
        row[f"gate_{GATE_METRIC_COLUMN[key]}"] = float(np.mean(vals)) if vals else None
    row["gate_pass_rate"] = float(np.mean([g["passed"] for g in gates]))
    row["gate_passed"] = bool(all(g["passed"] for g in gates))
    row["gate_failed"] = ";".join(sorted({f for g in gates for f in g["failed"]}))
    return row


#: Gate key -> the column (``gate_<metric>``) holding its figure, mean over the simulated releases.
GATE_METRIC_COLUMN = {"max_degree_ks": "degree_ks", "max_degree_wasserstein": "degree_wasserstein1",
                      "max_contact_matrix_median_relative_error": "contact_matrix_median_relative_error",
                      "max_superedge_median_relative_error": "superedge_median_relative_error"}


# --------------------------------------------------------------------------- output


def _csv_text(rows) -> str:
    buf = io.StringIO()
    names = [c for c, _ in SWEEP_COLUMNS]
    w = csv.DictWriter(buf, fieldnames=names, extrasaction="ignore", lineterminator="\n")
    w.writeheader()
    for r in rows:
        w.writerow({k: ("" if r.get(k) is None else (f"{r[k]:.6g}" if isinstance(r.get(k), float) else r[k]))
                    for k in names})
    return buf.getvalue()


def _readme(result: SweepResult) -> str:
    lines = [f"{_MARKER} (confidential)", "", PLANNING_NOTE, "",
             f"network: {result.network.get('people', 0):,} people, {result.network.get('contacts', 0):,} "
             f"contacts; relative errors use the sanity bound s = {result.network.get('sanity_bound', 1):g}",
             ""]
    if result.cheapest:
        c = result.cheapest
        lines.append(f"cheapest setting meeting the policy's [gate]: unit {c['unit']}, epsilon {c['epsilon']:g}, "
                     f"min_size {c['min_size']} (the gate, judged on released values, let all {c['draws']} "
                     "simulated releases through)")
    else:
        lines.append("no setting of the grid meets the policy's [gate] thresholds")
    lines.append("thresholds: " + (", ".join(f"{k} = {v:g}" for k, v in result.thresholds.items()) or "none"))
    lines += ["", "files:", "  sweep.csv    one row per grid point (columns below)",
              "  sweep.json   the same figures, the notes and the timings",
              "  errors_vs_epsilon.png   key errors against epsilon, one line per (unit, min_size)", "",
              "columns of sweep.csv:"]
    lines += [f"  {c:<48} {d}" for c, d in SWEEP_COLUMNS]
    lines += ["", "notes:"] + [f"  - {n}" for n in result.notes]
    return "\n".join(lines) + "\n"


def _plot(result: SweepResult, path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib import ticker

    panels = [("degree_ks", None, "degree_ks_max", "degree distribution KS", "max_degree_ks"),
              ("degree_wasserstein1", None, "degree_wasserstein1_max", "degree distribution Wasserstein-1",
               "max_degree_wasserstein"),
              ("contact_matrix_median_relative_error", "expected_contact_matrix_median_relative_error",
               "contact_matrix_median_relative_error_max", "contact matrix median relative error",
               "max_contact_matrix_median_relative_error"),
              ("superedge_mean_absolute_error", "expected_superedge_mean_absolute_error_clamped", None,
               "superedge cell mean absolute error", None)]
    fig, axes = plt.subplots(2, 2, figsize=(11, 8))
    series = sorted({(r["unit"], r["min_size"]) for r in result.rows})
    eps_ticks = sorted({r["epsilon"] for r in result.rows})
    for ax, (col, exp_col, max_col, title, gate_key) in zip(axes.ravel(), panels):
        for i, (unit, k) in enumerate(series):
            rs = sorted((r for r in result.rows if r["unit"] == unit and r["min_size"] == k),
                        key=lambda r: r["epsilon"])
            x = [r["epsilon"] for r in rs]
            y = [r[col] for r in rs]
            color = f"C{i % 10}"
            ax.plot(x, y, "o-", color=color, label=f"{unit}, min_size {k} (observed)")
            if max_col:
                ax.plot(x, [r[max_col] for r in rs], "v", color=color, alpha=0.5, markersize=4)
            if exp_col and all(r.get(exp_col) is not None for r in rs):
                ax.plot(x, [r[exp_col] for r in rs], "--", color=color, alpha=0.8)
        if gate_key and gate_key in result.thresholds:
            ax.axhline(result.thresholds[gate_key], color="k", linestyle=":", label="gate threshold")
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xticks(eps_ticks)
        ax.xaxis.set_major_formatter(ticker.FuncFormatter(lambda v, _: f"{v:g}"))
        ax.xaxis.set_minor_formatter(ticker.NullFormatter())
        ax.yaxis.set_major_formatter(ticker.LogFormatter())
        ax.yaxis.set_minor_formatter(ticker.LogFormatter(labelOnlyBase=False, minor_thresholds=(2, 0.4)))
        ax.set_xlabel("epsilon")
        ax.set_title(title, fontsize=10)
        ax.grid(True, which="both", alpha=0.3)
    axes[0, 0].legend(fontsize=7)
    fig.suptitle("INTERNAL PLANNING AID - confidential, not a release\n"
                 "solid: observed (mean of draws; triangles worst draw), dashed: analytic expectation",
                 fontsize=10, color="darkred")
    fig.subplots_adjust(left=0.07, right=0.98, bottom=0.07, top=0.88, wspace=0.22, hspace=0.32)
    fig.savefig(path, format="png", dpi=90)
    plt.close(fig)


def write_sweep(result: SweepResult, out, *, overwrite: bool = False) -> Path:
    """Write the sweep folder (``README.txt``, ``sweep.csv``, ``sweep.json``, ``errors_vs_epsilon.png``).

    Written into a temporary folder beside ``out`` and moved into place; an existing
    ``out`` is replaced only with ``overwrite`` and only if it is a sweep folder.
    """
    from .outputs import check_folder_target, write_folder

    out = Path(out).absolute()

    def is_sweep(folder):
        readme = folder / "README.txt"
        return readme.is_file() and readme.read_text("utf-8", "replace").startswith(_MARKER)

    def fill(tmp):
        (tmp / "README.txt").write_text(_readme(result), encoding="utf-8")
        (tmp / "sweep.csv").write_text(_csv_text(result.rows), encoding="utf-8")
        (tmp / "sweep.json").write_text(json.dumps(result.as_dict(), indent=1, default=float), encoding="utf-8")
        _plot(result, tmp / "errors_vs_epsilon.png")

    return write_folder(out, fill, overwrite=overwrite, what="sweep",
                        check=lambda: check_folder_target(out, overwrite, kind="a sweep folder", is_kind=is_sweep))
