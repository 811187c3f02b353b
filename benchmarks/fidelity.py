"""Fidelity of synthetic networks sampled from a release (issue 12).

For the demo town and every real network under ``../shared/real-networks/`` (a folder
that is absent is skipped), at each epsilon, with the plainest policy (unit ``edge``,
attribute grouping, ``min_size`` 10 under 500 people and 20 above), this script
releases the network several times, samples synthetic networks from each release and
compares them with the true network:

``contacts``        synthetic contacts / true contacts,
``degree KS``       two-sample Kolmogorov-Smirnov distance of the degree distributions,
``largest degree``  largest synthetic degree / largest true degree,
``clustering``      average local clustering (networkx definition: nodes of degree < 2
                    count 0) synthetic / true,
``final size``      epidemic final size synthetic / true (defined below).

Each figure is the mean over ``--releases`` releases x ``--samples`` networks per
release. Two rows per network and epsilon:

``grouping``  the true aggregate (no noise): what the sampler can do at best;
``release``   the noisy release, as a researcher gets it.

Epidemic final size (Newman 2002): an SIR epidemic with transmissibility ``T`` has
the final size of bond percolation with occupation probability ``T``. ``T`` is chosen
once per network so that the TRUE network has ``R = T (<k^2> - <k>) / <k> = 1.5``
(capped at 1), and the same ``T`` is used on every synthetic network. The figure
is the expected final size of a major outbreak: the largest connected cluster
of the percolated graph as a fraction of all people, averaged over ``--percolations``
independent percolations of each graph. The figures are computed by
``aggpub.audit.fidelity``, the same code as the confidential audit's.

Methods (``--method``):

``before``    the release as it was before degree sequences and the triangle count:
              superedge counts only (the whole epsilon), synthetic networks drawn
              uniformly within each cell from the clamped ``edge_count``
              (``aggpub.synthesis.sample_block_network``);
``after``     today's defaults through the public API: ``aggpub.release_tables`` and
              ``aggpub.sample_network`` (consistent estimates, degree sequences, the
              triangle count when the network has at most 100,000 people, the
              degree-corrected sampler with affinity blocks);
``sequences`` the defaults without the triangle count (what a network of more than
              100,000 people gets unless the steward asks for it): no affinity blocks.

The "grouping" rows draw, with the same sampler, from the true aggregate
(``aggpub.synthesis.inputs_from_truth``, the confidential audit's "grouping alone").

Grouping attributes per network (the attributes that carry the network's own
organisation, as its publication describes it; ``class`` alone in the high school
because crossing it with ``gender`` leaves 7 of 27 cells below 10 people, merged into
one mixed residual supernode; ``household`` alone in Kenya for the same reason):

==================================  ===================  ========
network                             attributes           min_size
==================================  ===================  ========
demo town (30,000)                  age_band,            20
                                    neighbourhood (with
                                    the demo hierarchies)
sociopatterns_hospital_ward_2010    role                 10
sociopatterns_kenya_households_2012 household            10
sociopatterns_workplace_2015        department           10
sociopatterns_high_school_2013      class                10
snap_email_eu_core                  department           20
snap_facebook_combined              gender, locale       20
==================================  ===================  ========

Usage::

    .venv/bin/python benchmarks/fidelity.py                       # every method, all networks, eps 0.5 1 2
    .venv/bin/python benchmarks/fidelity.py --method after --json out.json
    .venv/bin/python benchmarks/fidelity.py --networks hospital kenya --epsilons 1

Data sets (cite beside any figure): Vanhems et al., PLoS ONE 8(9) 2013 (hospital);
Kiti et al., EPJ Data Science 5 2016 (Kenya); Genois, Barrat, EPJ Data Science 7 2018
(workplace); Mastrandrea, Fournet, Barrat, PLoS ONE 10(9) 2015 (high school);
Leskovec, Kleinberg, Faloutsos, ACM TKDD 2007 and Yin et al., KDD 2017 (e-mail);
McAuley, Leskovec, NIPS 2012 (Facebook).

Nothing here reaches into an engine's internals: the true contacts come from
``release.network.engine.edge_arrays()``.

References
----------
M. E. J. Newman, "Spread of epidemic disease on networks", Physical Review E 66,
016128, 2002.

M. Hay, G. Miklau, D. Jensen, D. Towsley, P. Weis, "Resisting structural
re-identification in anonymized social networks", PVLDB 1(1), 2008.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pcsv

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import aggpub  # noqa: E402
from aggpub.audit import fidelity as fid  # noqa: E402
from aggpub.synthesis import SynthesisInputs, draw_network, inputs_from_release, inputs_from_truth  # noqa: E402

REAL = ROOT.parent / "shared" / "real-networks"
if not REAL.is_dir():
    REAL = Path("/work/shared/real-networks")

#: network short name -> (folder, grouping attributes)
NETWORKS = {
    "hospital": ("sociopatterns_hospital_ward_2010", ["role"]),
    "kenya": ("sociopatterns_kenya_households_2012", ["household"]),
    "workplace": ("sociopatterns_workplace_2015", ["department"]),
    "highschool": ("sociopatterns_high_school_2013", ["class"]),
    "email": ("snap_email_eu_core", ["department"]),
    "facebook": ("snap_facebook_combined", ["gender", "locale"]),
    "town": (None, None),
}

KINDS = ("grouping", "release")
METHODS = ("before", "after", "sequences")


# --------------------------------------------------------------------------- loading


def min_size_rule(n_people: int) -> int:
    """10 under 500 people, 20 above (the range of the issue)."""
    return 10 if n_people < 500 else 20


def load(name: str):
    """``(edges, people, policy_dict)`` of a network, or ``None`` when its folder is absent."""
    folder, attrs = NETWORKS[name]
    if name == "town":
        import tomllib

        from aggpub.demo import demo_policy_text, generate_town

        edges, people = generate_town()
        policy = tomllib.loads(demo_policy_text())
        policy.pop("input", None)
        policy.pop("title", None)
        keep = ["source", "target"] + (["setting"] if "layers" in policy else [])  # the demo's contact settings
        return edges.select(keep), people, policy
    d = REAL / folder
    if not (d / "people.csv").is_file():
        return None
    people = pcsv.read_csv(d / "people.csv", convert_options=pcsv.ConvertOptions(
        column_types={"node": pa.string()}, strings_can_be_null=False))
    people = pa.table({c: people.column(c).cast(pa.string()) for c in people.column_names})
    edges = pcsv.read_csv(d / "contacts.csv", convert_options=pcsv.ConvertOptions(
        column_types={"source": pa.string(), "target": pa.string()}))
    policy = {"privacy": {"unit": "edge", "epsilon": 1.0},
              "grouping": {"method": "attributes", "attributes": list(attrs),
                           "min_size": min_size_rule(people.num_rows)}}
    return edges.select(["source", "target"]), people, policy


SHARES = None  # --shares: explicit split (superedges, degree sequences, triangles) for method "after"
VIEW_SHARE = None  # --view-share: with --shares, the contact views' share (else the views are off)


def policy_for(policy: dict, eps: float, method: str) -> dict:
    """The plainest policy at ``eps``; ``before`` switches the new components off (superedges take all)."""
    p = json.loads(json.dumps(policy))
    if method == "after" and SHARES is not None:
        p["components"] = {name: {"share": float(s)} for name, s in
                           zip(("superedge_counts", "degree_sequences", "triangle_count"), SHARES)}
        if VIEW_SHARE is not None:
            p["components"]["contact_views"] = {"share": float(VIEW_SHARE)}
    p.setdefault("privacy", {})["epsilon"] = float(eps)
    p["privacy"]["unit"] = "edge"
    if method == "before":
        p["components"] = {"degree_sequences": {"enabled": False}, "triangle_count": {"enabled": False}}
    if method == "sequences":
        p["components"] = {"triangle_count": {"enabled": False}}
    return p


def before_inputs(release) -> SynthesisInputs:
    """The sampler as it was: the clamped ``edge_count``, uniform within each cell."""
    se = release.tables["superedges"]
    return SynthesisInputs(
        sizes=np.asarray(release.tables["supernodes"].column("size").to_numpy(), dtype=np.int64),
        a=se.column("supernode_a").to_numpy(), b=se.column("supernode_b").to_numpy(),
        cells=se.column("edge_count").to_numpy().astype(np.float64), degrees=None, triangles=None,
        sampler="uniform_block")


def synthetic_networks(release, method: str, kind: str, rng, count: int):
    """``count`` synthetic networks ``(u, v, n)`` of one release (``kind`` grouping: its true aggregate)."""
    if method == "before":
        inputs = before_inputs(release)
        if kind == "grouping":
            inputs = inputs_from_truth(release, like=inputs)
        n = int(inputs.sizes.sum())
        return [(*draw_network(inputs, rng, 0.0), n) for _ in range(count)]
    if kind == "grouping":
        inputs = inputs_from_truth(release, like=inputs_from_release(release))
        n = int(inputs.sizes.sum())
        return [(*draw_network(inputs, rng), n) for _ in range(count)]
    n = int(release.tables["supernodes"].column("size").to_numpy().sum())
    out = []
    for _ in range(count):
        t = aggpub.sample_network(release, seed=int(rng.integers(2 ** 62)))
        out.append((t.column("source").to_numpy(), t.column("target").to_numpy(), n))
    return out


# --------------------------------------------------------------------------- driver


def run(names, epsilons, methods, kinds, n_releases, n_samples, draws, seed, out_json=None, log=print):
    rng = np.random.default_rng(seed)
    rows = []
    for name in names:
        loaded = load(name)
        if loaded is None:
            log(f"# {name}: folder absent, skipped")
            continue
        edges, people, policy = loaded
        t0 = time.perf_counter()
        first = aggpub.release_tables(edges, people, policy_for(policy, 1.0, "after"),
                                      seed=int(rng.integers(2 ** 31)))
        u, v = first.network.engine.edge_arrays()
        n = first.network.n_people
        truth = fid.network_figures(u, v, n, 0.0, rng, 1)
        T = fid.transmissibility(truth["degrees"])
        truth = fid.network_figures(u, v, n, T, rng, max(draws, 20))
        log(f"# {name}: {n} people, {len(u)} contacts, {first.tables['supernodes'].num_rows} supernodes, "
            f"kmax {truth['largest_degree']}, clustering {truth['average_clustering']:.3f}, T {T:.3f}, "
            f"final size {truth['final_size']:.3f}")
        for eps in epsilons:
            for method in methods:
                releases = [aggpub.release_tables(edges, people, policy_for(policy, eps, method),
                                                  seed=int(rng.integers(2 ** 31))) for _ in range(n_releases)]
                for kind in kinds:
                    comps = []
                    use = releases[:1] if kind == "grouping" else releases
                    per = n_samples * (n_releases if kind == "grouping" else 1)
                    for rel in use:
                        for su, sv, sn in synthetic_networks(rel, method, kind, rng, per):
                            comps.append(fid.compare_figures(truth, fid.network_figures(su, sv, sn, T, rng, draws)))
                    summ = fid.summarise(comps)
                    row = {"network": name, "people": n, "epsilon": eps, "method": method, "kind": kind,
                           "graphs": len(comps), **{k: summ[k]["mean"] for k in fid.FIGURES},
                           **{k + "_sd": summ[k]["sd"] for k in fid.FIGURES},
                           "components": [c["name"] for c in releases[0].manifest["components"]]}
                    rows.append(row)
                    log(fmt_row(row))
        log(f"# {name}: {time.perf_counter() - t0:.0f} s")
    if out_json:
        Path(out_json).write_text(json.dumps(rows, indent=1))
    return rows


HEADER = ("| network | eps | method | kind | contacts | degree KS | largest degree | clustering | final size |\n"
          "|---|---|---|---|---|---|---|---|---|")


def fmt_row(r):
    return (f"| {r['network']} | {r['epsilon']:g} | {r['method']} | {r['kind']} | {r['contacts_ratio']:.3f} | "
            f"{r['degree_ks']:.3f} | {r['largest_degree_ratio']:.2f} | {r['clustering_ratio']:.2f} | "
            f"{r['final_size_ratio']:.2f} |")


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--networks", nargs="*", default=list(NETWORKS), choices=list(NETWORKS))
    p.add_argument("--epsilons", nargs="*", type=float, default=[0.5, 1.0, 2.0])
    p.add_argument("--method", choices=[*METHODS, "all"], default="all")
    p.add_argument("--kinds", nargs="*", default=list(KINDS), choices=list(KINDS))
    p.add_argument("--releases", type=int, default=3, help="noisy releases per network, epsilon and method")
    p.add_argument("--samples", type=int, default=2, help="synthetic networks per release")
    p.add_argument("--percolations", type=int, default=10, help="percolation draws per graph")
    p.add_argument("--seed", type=int, default=12, help="benchmark seed (the releases are seeded: not private)")
    p.add_argument("--json", help="write every row (with spreads) to this JSON file")
    p.add_argument("--shares", nargs=3, type=float, metavar=("SUPEREDGES", "DEGREES", "TRIANGLES"),
                   help="method 'after' with this explicit split of epsilon instead of the default (the "
                        "contact views are then off unless --view-share gives them a share)")
    p.add_argument("--view-share", type=float, help="with --shares: the contact views' share")
    a = p.parse_args(argv)
    global SHARES, VIEW_SHARE
    SHARES = tuple(a.shares) if a.shares else None
    VIEW_SHARE = a.view_share
    methods = list(METHODS) if a.method == "all" else [a.method]
    print(HEADER)
    run(a.networks, a.epsilons, methods, a.kinds, a.releases, a.samples, a.percolations, a.seed, a.json,
        log=lambda s: print(s, flush=True))


if __name__ == "__main__":
    main()
