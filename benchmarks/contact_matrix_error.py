"""Error and interval coverage of contact matrices from views (issue 13; not a timing benchmark first).

For the invented demo town (age-band and neighbourhood matrices, overall and per setting; the policy's
grouping by age band and neighbourhood, minimum size 20) and one attribute of each real
network under ``/work/shared/real-networks`` (skipped when absent), simulated releases at epsilon
0.5, 1 and 2 (unit ``edge``) are compared with the truth:

``supernodes``
    today's release: the supernode table (all of epsilon) summed by the attribute's label values;
    only cells between exactly labelled supernodes can be read as exact values, the rest is lost
    (``lost``: share of contacts touching a generalised or ``*`` label; those cells read 0).
``view``
    the raw view of the attribute (no consistency).
``view+LS``
    the same release, least squares over the supernode table and the view.
``views``
    every view released (their share split equally), the raw view of the attribute.
``views+LS``
    the same release, least squares over the supernode table and all views.

Epsilon split of the releases with views: supernode table epsilon/2, views epsilon/2 split equally
among the views released. Figures: median relative error ``|est - true| / max(true, s)`` over the
matrix's cells (Xiao, Wang, Gehrke, ICDE 2010; sanity bound ``s`` = 0.1% of the contacts, at least 1,
as the audit uses), pooled over releases; the root mean squared error over cells and releases (what
least squares minimises); ``cov95``, the share of cells whose 95% interval covers the truth (target
0.95). Real networks: supernodes from all their listed attributes, minimum size 5, no layers.
The release is simulated in numpy (``aggpub.simulated_release``) with the project's discrete
Laplace mechanism; the pipeline wiring is separate.

Timing: the least-squares step plus its Monte Carlo intervals (2,000 draws, layered age matrix) on the
demo town and on a 100,000-person town grouped by age band and an invented street (~1,700
supernodes), as a ratio to counting the three true views in numpy (the baseline, same run).

Run: ``.venv/bin/python benchmarks/contact_matrix_error.py [--releases 20] [--draws 1000] [--json F]``

``--pipeline`` measures the same through the real pipeline instead of the simulation (issue 13's closing
note): releases built by ``aggpub.build_release`` from the policy (fresh OS-entropy noise), matrices from
``aggpub.contact_matrix``; the reported attribute's view alone, the default views (one per grouping
attribute) and the default plus extra views (the attributes outside the grouping), each
read raw and by least squares, overall and per layer, at epsilon 0.5, 1 and 2; and the default views'
share of epsilon against the superedge table's (0.25, 0.5, 0.75) on the demo town.
"""

from __future__ import annotations

import argparse
import csv
import json
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv  # noqa: F401  (pa.csv)

from aggpub.demo import (AGE_BANDS, AGE_HIERARCHY, NEIGHBOURHOOD_HIERARCHY, NEIGHBOURHOODS, ROLES, SETTINGS,
                         generate_town)
from aggpub.estimates.matrix import contact_matrix
from aggpub.estimates.views import one_layer_per_contact
from aggpub.simulated_release import simulate_release
from aggpub.noise.sampler import make_random_source

REAL = Path("/work/shared/real-networks")
#: (folder, attribute reported, grouping attributes, extra views, publication named beside the figures)
REAL_NETWORKS = [
    ("sociopatterns_high_school_2013", "class", ["class", "gender"], ["gender"],
     "Mastrandrea, Fournet, Barrat, PLoS ONE 2015"),
    ("sociopatterns_hospital_ward_2010", "role", ["role"], [], "Vanhems et al., PLoS ONE 2013"),
    ("sociopatterns_workplace_2015", "department", ["department"], [], "SocioPatterns workplace 2015"),
    ("sociopatterns_kenya_households_2012", "household", ["household", "age_group", "sex"], ["age_group", "sex"],
     "SocioPatterns Kenya households 2012"),
    ("snap_email_eu_core", "department", ["department"], [], "Leskovec, Kleinberg, Faloutsos, TKDD 2007"),
    ("snap_facebook_combined", "gender", ["gender", "locale"], ["locale"], "McAuley, Leskovec, NIPS 2012"),
]
EPSILONS = (0.5, 1.0, 2.0)
#: Minimum supernode size for the real networks (75 to 4,039 people); the demo town uses its policy's 20.
REAL_MIN_SIZE = 5


def _rel_error(est, true, sanity):
    return np.abs(np.asarray(est, dtype=float) - true) / np.maximum(true, sanity)


def _score(table, truth, sanity):
    est = np.asarray(table.column("contacts"))
    lo, hi = np.asarray(table.column("lower")), np.asarray(table.column("upper"))
    return _rel_error(est, truth, sanity), (lo <= truth) & (truth <= hi), (est - truth) ** 2


def _supernode_only(people, u, v, grouping, attribute, domain, epsilon, seed, hierarchies, merge_order, min_size):
    """Today's release: the supernode table with all of epsilon, read by exact labels."""
    sim = simulate_release(people, u, v, grouping, [attribute], min_size=min_size, hierarchies=hierarchies,
                           merge_order=merge_order, epsilon_fine=epsilon, epsilon_views=epsilon,
                           source=make_random_source(seed), domains={attribute: domain})
    t = contact_matrix(sim.supernodes, sim.superedges, None, attribute, domains=sim.domains, method="supernodes")
    pos = {x: i for i, x in enumerate(domain)}
    k = len(domain)
    est = np.zeros(k * (k + 1) // 2)
    lo = np.zeros_like(est)
    hi = np.zeros_like(est)
    for a, b, c, low, up in zip(*(t.column(x).to_pylist() for x in ("value_a", "value_b", "contacts", "lower",
                                                                     "upper"))):
        if a in pos and b in pos:  # only exactly labelled supernodes give exact-value cells
            i, j = sorted((pos[a], pos[b]))
            cell = i * k - (i * (i - 1)) // 2 + (j - i)
            est[cell], lo[cell], hi[cell] = c, low, up
    # contacts the supernode table cannot place by exact value: those touching a generalised or '*' label
    g = sim.assignment
    labels = np.asarray(sim.supernodes.column(attribute).to_pylist(), dtype=object)
    exact = np.array([x in pos for x in labels])
    lost = float(np.mean(~(exact[g[u]] & exact[g[v]]))) if len(u) else 0.0
    return sim, est, lo, hi, lost


def run_network(name, people, u, v, attribute, grouping, extra, *, domains, releases, layer=None, layers=None,
                hierarchies=None, merge_order=None, min_size=10, seed0=0, draws=1000):
    rows = []
    n_contacts = len(u)
    sanity = max(1.0, 0.001 * n_contacts)
    for eps in EPSILONS:
        acc = {key: ([], [], []) for key in ("supernodes", "view", "view+LS", "views", "views+LS")}
        acc_layer = {key: ([], [], []) for key in ("view", "view+LS", "views", "views+LS")}
        lost = []
        for r in range(releases):
            seed = seed0 + 1000 * r + int(eps * 10)
            sim0, est, lo, hi, lost_share = _supernode_only(people, u, v, grouping, attribute, domains[attribute],
                                                            eps, seed, hierarchies, merge_order, min_size)
            truth = sim0.true_views[attribute][0]
            acc["supernodes"][0].append(_rel_error(est, truth, sanity))
            acc["supernodes"][1].append((lo <= truth) & (truth <= hi))
            acc["supernodes"][2].append((est - truth) ** 2)
            lost.append(lost_share)
            for key, names in (("view", [attribute]), ("views", [attribute] + extra)):
                if key == "views" and not extra:
                    continue
                sim = simulate_release(people, u, v, grouping, names, min_size=min_size, hierarchies=hierarchies,
                                       merge_order=merge_order, layer=layer, layers=layers, epsilon_fine=eps / 2,
                                       epsilon_views=eps / 2, source=make_random_source(seed + 7),
                                       domains=domains)
                kw = dict(domains=sim.domains, layers=sim.layers, hierarchies=hierarchies, draws=draws, seed=seed)
                true_all = sim.true_views[attribute].sum(axis=0)
                for method, tag in (("view", key), ("consistent", key + "+LS")):
                    t = contact_matrix(sim.supernodes, sim.superedges, sim.views, attribute, method=method, **kw)
                    for part, x in zip(acc[tag], _score(t, true_all, sanity)):
                        part.append(x)
                    if layer is not None:
                        t = contact_matrix(sim.supernodes, sim.superedges, sim.views, attribute, method=method,
                                           by_layer=True, **kw)
                        for part, x in zip(acc_layer[tag], _score(t, sim.true_views[attribute].reshape(-1), sanity)):
                            part.append(x)
        for scope, table in (("overall", acc), ("per layer", acc_layer if layer is not None else {})):
            for tag, (errs, covs, sq) in table.items():
                if not errs:
                    continue
                rows.append({"network": name, "attribute": attribute, "scope": scope, "epsilon": eps,
                             "method": tag, "median_relative_error": float(np.median(np.concatenate(errs))),
                             "root_mean_squared_error": float(np.sqrt(np.mean(np.concatenate(sq)))),
                             "coverage_95": float(np.mean(np.concatenate(covs))),
                             "lost_contacts_share": float(np.mean(lost)) if tag == "supernodes" else None})
    return rows


def _town(n_people, streets=False):
    edges, people = generate_town(n_people)
    if streets:  # an invented finer area (10 streets per neighbourhood) for a grouping of ~1,700 supernodes
        rng = np.random.default_rng(1)
        people = people.append_column("street", pa.array(
            [f"{x}/s{int(rng.integers(10))}" for x in people.column("neighbourhood").to_pylist()]))
    su = pc.index_in(edges.column("source"), people.column("node")).to_numpy()
    sv = pc.index_in(edges.column("target"), people.column("node")).to_numpy()
    sl = pc.index_in(edges.column("setting"), pa.array(list(SETTINGS))).to_numpy()
    u, v, layer = one_layer_per_contact(su, sv, sl, len(SETTINGS))
    return people, u, v, layer


HIER = {"age_band": AGE_HIERARCHY, "neighbourhood": NEIGHBOURHOOD_HIERARCHY}
DOMS = {"age_band": list(AGE_BANDS), "neighbourhood": list(NEIGHBOURHOODS), "role": list(ROLES)}
#: (people, minimum supernode size): the demo policy, and a smaller town where generalisation binds
DEMO_CONFIGS = ((30_000, 20), (10_000, 50))


def demo_rows(releases, draws, configs=DEMO_CONFIGS):
    rows = []
    for n_people, min_size in configs:
        people, u, v, layer = _town(n_people)
        for attribute, extra in (("age_band", ["neighbourhood", "role"]), ("neighbourhood", ["age_band", "role"])):
            rows += run_network(f"demo town {n_people // 1000}k, min size {min_size}", people, u, v, attribute,
                                ["age_band", "neighbourhood"], extra, domains=DOMS, releases=releases, layer=layer,
                                layers=list(SETTINGS), hierarchies=HIER, merge_order=["neighbourhood", "age_band"],
                                min_size=min_size, draws=draws)
    return rows


def real_rows(releases, draws):
    rows = []
    for folder, attribute, grouping, extra, source in REAL_NETWORKS:
        path = REAL / folder
        with open(path / "people.csv", newline="") as f:
            recs = list(csv.DictReader(f))
        people = pa.table({k: [r[k] for r in recs] for k in recs[0]})
        pos = {r["node"]: i for i, r in enumerate(recs)}
        with open(path / "contacts.csv", newline="") as f:
            pairs = [(pos[r["source"]], pos[r["target"]]) for r in csv.DictReader(f)]
        su = np.array([p[0] for p in pairs])
        sv = np.array([p[1] for p in pairs])
        u, v, _ = one_layer_per_contact(su, sv, np.zeros(len(su), dtype=np.int64), 1)
        doms = {a: sorted(set(people.column(a).to_pylist())) for a in [attribute] + extra}
        out = run_network(f"{folder} ({source})", people, u, v, attribute, grouping, extra, domains=doms,
                          releases=releases, min_size=REAL_MIN_SIZE, draws=draws)
        rows += out
        print(f"  done {folder}", file=sys.stderr)
    return rows


def timing(n_people, streets, repeats=3):
    """Least squares and its intervals against counting the true views (the baseline, same run)."""
    from aggpub.estimates.matrix import possible_values_from_people
    from aggpub.estimates.views import true_view_table

    people, u, v, layer = _town(n_people, streets)
    grouping = ["age_band", "street"] if streets else ["age_band", "neighbourhood"]
    sim = simulate_release(people, u, v, grouping, ["age_band", "neighbourhood", "role"], min_size=20,
                           hierarchies={"age_band": AGE_HIERARCHY, **({} if streets else HIER)},
                           merge_order=list(reversed(grouping)), layer=layer, layers=list(SETTINGS),
                           epsilon_fine=0.5, epsilon_views=0.5, source=make_random_source(1), domains=DOMS)
    n = sim.supernodes.num_rows
    poss = {a: possible_values_from_people(sim.assignment, sim.codes[a], n, len(DOMS[a])) for a in DOMS}
    base, ls = [], []
    for _ in range(repeats):
        t0 = time.perf_counter()
        for a in DOMS:
            true_view_table(sim.codes[a], u, v, len(DOMS[a]), layer=layer, n_layers=len(SETTINGS))
        base.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        contact_matrix(sim.supernodes, sim.superedges, sim.views, "age_band", domains=sim.domains,
                       layers=sim.layers, possible=poss, by_layer=True, draws=2000)
        ls.append(time.perf_counter() - t0)
    return {"people": n_people, "contacts": int(len(u)), "supernodes": n, "supernode_cells": n * (n + 1) // 2,
            "view_cells": int(sim.views.num_rows), "baseline_count_views_seconds": float(np.median(base)),
            "least_squares_with_intervals_seconds": float(np.median(ls)), "ratio": float(np.median(ls) / np.median(base))}


def print_rows(rows):
    print(f"{'network':44s} {'attribute':13s} {'scope':9s} {'eps':>4s} {'method':10s} {'med rel err':>11s} {'rmse':>8s} "
          f"{'cov95':>6s} {'lost':>5s}")
    for r in rows:
        lost = f"{r['lost_contacts_share']:.2f}" if r["lost_contacts_share"] is not None else ""
        print(f"{r['network'][:44]:44s} {r['attribute'][:13]:13s} {r['scope']:9s} {r['epsilon']:4g} {r['method']:10s} "
              f"{r['median_relative_error']:11.3f} {r['root_mean_squared_error']:8.2f} {r['coverage_95']:6.3f} "
              f"{lost:>5s}")


# --------------------------------------------------------------------------- through the real pipeline (issue 13)

#: View sets measured through the pipeline: the reported attribute's view alone, the default (one view per
#: grouping attribute), and the default with extra views (attributes outside the grouping).
PIPELINE_CONFIGS = ("own view only", "default views", "default + extra views")


def _pipeline_policy(grouping, attribute, config, *, epsilon, min_size, layers=None, hierarchies=None,
                     extra=(), view_share=None):
    from aggpub.policy import parse_policy

    views = {"own view only": {"attributes": [attribute]},
             "default views": {},
             "default + extra views": {"attributes": list(grouping) + [a for a in extra if a not in grouping]}}[config]
    if view_share is not None:
        views = dict(views, share=view_share)
    pol = {"privacy": {"epsilon": epsilon},
           "grouping": {"attributes": list(grouping), "min_size": min_size,
                        "hierarchies": {a: {"levels": lv} for a, lv in (hierarchies or {}).items()},
                        "merge_order": list(reversed(grouping))},
           "components": {"contact_views": views}}
    if view_share is not None:
        pol["components"]["superedge_counts"] = {"share": 1.0 - view_share}
    if layers:
        pol["layers"] = {"column": "setting", "values": list(layers)}
    return parse_policy(pol)


def _score_matrix(est_table, true, sanity):
    est = np.asarray(est_table.column("contacts").to_numpy(), dtype=float)
    lo = np.asarray(est_table.column("lower").to_numpy(), dtype=float)
    hi = np.asarray(est_table.column("upper").to_numpy(), dtype=float)
    true = np.asarray(true, dtype=float).reshape(-1)
    return _rel_error(est, true, sanity), (lo <= true) & (true <= hi)


def pipeline_network(label, network, grouping, attribute, *, releases, draws, min_size, layers=None,
                     hierarchies=None, extra=(), epsilons=EPSILONS, configs=PIPELINE_CONFIGS):
    """Median relative error and 95% coverage of ``attribute``'s matrix from real releases (build_release)."""
    from aggpub.estimates.release_matrix import contact_matrix as bundle_matrix
    from aggpub.pipeline import build_release

    rows = []
    sanity = max(1.0, 0.001 * network.n_edges)
    from aggpub.policy import view_names

    for eps in epsilons:
        seen = set()
        for config in configs:
            pol = _pipeline_policy(grouping, attribute, config, epsilon=eps, min_size=min_size, layers=layers,
                                   hierarchies=hierarchies, extra=extra)
            names = tuple(view_names(pol.components.contact_views))
            if names in seen:  # the same views as a configuration measured already (no extra attribute)
                continue
            seen.add(names)
            acc = {(m, scope): ([], []) for m in ("view", "consistent") for scope in ("overall", "per layer")}
            n_views = 0
            t0 = time.perf_counter()
            for r in range(releases):
                rel = build_release(network, pol)  # OS entropy: fresh noise
                truth = rel.truth["contact_views"]["counts"][attribute]
                n_views = len(rel.truth["contact_views"]["counts"])
                for method in ("view", "consistent"):
                    m = bundle_matrix(rel, attribute, method=method, draws=draws, seed=r)
                    for part, x in zip(acc[(method, "overall")], _score_matrix(m, truth.sum(axis=0), sanity)):
                        part.append(x)
                    if layers:
                        m = bundle_matrix(rel, attribute, method=method, draws=draws, seed=r, every_layer=True)
                        for part, x in zip(acc[(method, "per layer")], _score_matrix(m, truth, sanity)):
                            part.append(x)
            seconds = (time.perf_counter() - t0) / releases
            for (method, scope), (errs, covs) in acc.items():
                if errs:
                    rows.append({"network": label, "attribute": attribute, "epsilon": eps, "views": config,
                                 "n_views": n_views, "estimate": "raw view" if method == "view" else "least squares",
                                 "scope": scope, "median_relative_error": float(np.median(np.concatenate(errs))),
                                 "coverage_95": float(np.mean(np.concatenate(covs))), "releases": releases,
                                 "seconds_per_release": seconds})
            print(f"  {label} eps {eps:g} {config}: done", file=sys.stderr)
    return rows


def share_rows(network, *, releases, draws, layers, hierarchies, shares=(0.25, 0.5, 0.75), epsilon=1.0):
    """The default views' share against the superedge table's: age-band matrix and superedge cell errors."""
    from aggpub.estimates.release_matrix import contact_matrix as bundle_matrix
    from aggpub.pipeline import build_release

    rows = []
    sanity = max(1.0, 0.001 * network.n_edges)
    for share in shares:
        pol = _pipeline_policy(["age_band", "neighbourhood"], "age_band", "default views", epsilon=epsilon,
                               min_size=20, layers=layers, hierarchies=hierarchies, view_share=share)
        errs, covs, cell_errs, cell_abs, sq = [], [], [], [], []
        for r in range(releases):
            rel = build_release(network, pol)
            truth = rel.truth["contact_views"]["counts"]["age_band"].sum(axis=0)
            m = bundle_matrix(rel, "age_band", draws=draws, seed=r)
            e, c = _score_matrix(m, truth, sanity)
            errs.append(e)
            covs.append(c)
            sq.append((np.asarray(m.column("contacts").to_numpy(), dtype=float) - truth) ** 2)
            st = rel.truth["superedges"]
            est = np.asarray(rel.tables["superedges"].column("edge_count").to_numpy(), dtype=float)
            cell_errs.append(_rel_error(est, st.count.astype(float), sanity))
            cell_abs.append(np.abs(est - st.count))
        rows.append({"view_share": share, "epsilon": epsilon,
                     "age_matrix_median_relative_error": float(np.median(np.concatenate(errs))),
                     "age_matrix_coverage_95": float(np.mean(np.concatenate(covs))),
                     "age_matrix_rmse": float(np.sqrt(np.mean(np.concatenate(sq)))),
                     "superedge_cell_mean_absolute_error": float(np.mean(np.concatenate(cell_abs))),
                     "superedge_cell_median_relative_error": float(np.median(np.concatenate(cell_errs))),
                     "superedge_cell_mean_relative_error": float(np.mean(np.concatenate(cell_errs)))})
        print(f"  share {share}: done", file=sys.stderr)
    return rows


def pipeline_main(releases, draws, out_json=None):
    """Every figure of the closing note of issue 13, through ``aggpub.build_release`` (the real pipeline)."""
    from aggpub.demo import generate_town
    from aggpub.ingest import load_network

    t_start = time.perf_counter()
    edges, people = generate_town(30_000)
    net = load_network(edges, people, attributes=["age_band", "neighbourhood", "role"], layer="setting",
                       layer_values=SETTINGS)
    rows = pipeline_network("demo town 30k, min size 20", net, ["age_band", "neighbourhood"], "age_band",
                            releases=releases, draws=draws, min_size=20, layers=SETTINGS, hierarchies=HIER,
                            extra=["role"])
    shares = share_rows(net, releases=releases, draws=draws, layers=SETTINGS, hierarchies=HIER)
    net.engine.close()
    if REAL.is_dir():
        for folder, attribute, grouping, extra, source in REAL_NETWORKS:
            path = REAL / folder
            people_t = pa.csv.read_csv(path / "people.csv", convert_options=pa.csv.ConvertOptions(
                column_types={c: pa.string() for c in ["node"] + grouping + extra}))
            edges_t = pa.csv.read_csv(path / "contacts.csv", convert_options=pa.csv.ConvertOptions(
                column_types={"source": pa.string(), "target": pa.string()}))
            grouping_all = list(dict.fromkeys(grouping))
            net = load_network(edges_t.select(["source", "target"]), people_t,
                               attributes=list(dict.fromkeys(grouping_all + extra)))
            rows += pipeline_network(f"{folder} ({source})", net, grouping_all, attribute, releases=releases,
                                     draws=draws, min_size=REAL_MIN_SIZE, extra=extra)
            net.engine.close()
    else:
        print(f"(no {REAL}: real networks skipped)")
    _print_pipeline(rows, shares)
    print(f"total {time.perf_counter() - t_start:.0f} s")
    if out_json:
        Path(out_json).write_text(json.dumps({"rows": rows, "shares": shares}, indent=1))


def _print_pipeline(rows, shares):
    print(f"{'network':50s} {'eps':>4s} {'views':22s} {'n':>2s} {'estimate':14s} {'scope':9s} "
          f"{'med rel err':>11s} {'cov95':>6s} {'s/rel':>6s}")
    for r in rows:
        print(f"{r['network'][:50]:50s} {r['epsilon']:4g} {r['views']:22s} {r['n_views']:2d} {r['estimate']:14s} "
              f"{r['scope']:9s} {r['median_relative_error']:11.4f} {r['coverage_95']:6.3f} "
              f"{r['seconds_per_release']:6.2f}")
    print()
    print("default views' share (demo town 30k, age band and neighbourhood views, epsilon 1):")
    print(f"{'view share':>10s} {'age matrix med rel err':>23s} {'rmse':>7s} {'cov95':>6s} "
          f"{'superedge cell mean abs err':>28s} {'mean rel err':>13s}")
    for r in shares:
        print(f"{r['view_share']:10g} {r['age_matrix_median_relative_error']:23.4f} {r['age_matrix_rmse']:7.2f} "
              f"{r['age_matrix_coverage_95']:6.3f} {r['superedge_cell_mean_absolute_error']:28.3f} "
              f"{r['superedge_cell_mean_relative_error']:13.4f}")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--releases", type=int, default=20)
    ap.add_argument("--draws", type=int, default=1000)
    ap.add_argument("--json")
    ap.add_argument("--pipeline", action="store_true",
                    help="measure through the real pipeline (aggpub.build_release and aggpub.contact_matrix)")
    args = ap.parse_args(argv)
    if args.pipeline:
        pipeline_main(args.releases, args.draws, args.json)
        return
    rows = demo_rows(args.releases, args.draws)
    print_rows(rows)
    if REAL.is_dir():
        real = real_rows(args.releases, args.draws)
        print_rows(real)
        rows += real
    else:
        print(f"(no {REAL}: real networks skipped)")
    times = [timing(30_000, False), timing(100_000, True)]
    for t in times:
        print(f"timing: {t['people']:,} people, {t['contacts']:,} contacts, {t['supernodes']:,} supernodes "
              f"({t['supernode_cells']:,} cells), {t['view_cells']} view cells (3 layered views): least squares + "
              f"2,000-draw intervals of the layered age matrix {t['least_squares_with_intervals_seconds']:.2f} s = "
              f"{t['ratio']:.1f}x counting the three true views in numpy ({t['baseline_count_views_seconds']:.3f} s)")
    if args.json:
        Path(args.json).write_text(json.dumps({"rows": rows, "timing": times}, indent=1))


if __name__ == "__main__":
    main()
