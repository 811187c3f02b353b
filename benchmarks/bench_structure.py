"""Scale benchmark for structure-aware grouping (issue 5).

Generates (and caches) a random contact graph with numpy -- ``n`` people, ``m``
edges, heavy-tailed degrees (Chung-Lu style: both ends of each edge drawn with
probability proportional to a Pareto weight) -- as Parquet, then runs each
measured step in a fresh subprocess and reports wall time and peak resident
memory (``resource.getrusage(RUSAGE_SELF).ru_maxrss`` of that subprocess):

* ``ingest``            load_network (the baseline every other figure is divided by)
* ``attributes``        ingest + attribute grouping (public baseline)
* ``structure``         ingest + noisy degrees + degree tiers
* ``structure_r1``      ingest + noisy degrees + tiers + one noisy-profile round (k-means)
* ``release_structure`` ingest + the whole release (structure grouping, noisy superedges), no file written

Usage::

    python benchmarks/bench_structure.py --people 1000000 --edges 10000000 --out bench-data

Timings are machine-dependent; quote them as ratios to ``ingest`` from the same run.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from pathlib import Path

STEPS = ("ingest", "attributes", "structure", "structure_r1", "release_structure")


def generate(out: Path, n: int, m: int, seed: int = 5) -> tuple[Path, Path]:
    """Write ``people_<n>.parquet`` (node, region) and ``edges_<m>.parquet`` (source, target) unless cached."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    out.mkdir(parents=True, exist_ok=True)
    people = out / f"structure_people_{n}.parquet"
    edges = out / f"structure_edges_{n}_{m}.parquet"
    rng = np.random.default_rng(seed)
    if not people.exists():
        region = rng.integers(0, 50, size=n)
        pq.write_table(pa.table({"node": np.arange(n, dtype=np.int64),
                                 "region": pa.array([f"r{i:02d}" for i in range(50)]).take(pa.array(region))}),
                       people)
    if not edges.exists():
        w = rng.pareto(2.5, size=n) + 1.0  # heavy-tailed expected degrees
        cdf = np.cumsum(w)
        cdf /= cdf[-1]
        writer = None
        chunk = 2_000_000
        for start in range(0, m, chunk):
            k = min(chunk, m - start)
            s = np.searchsorted(cdf, rng.random(k), side="right").astype(np.int64)
            t = np.searchsorted(cdf, rng.random(k), side="right").astype(np.int64)
            table = pa.table({"source": np.minimum(s, n - 1), "target": np.minimum(t, n - 1)})
            if writer is None:
                writer = pq.ParquetWriter(edges, table.schema)
            writer.write_table(table)
        writer.close()
    return edges, people


def _child(step: str, edges: str, people: str) -> dict:
    """Run one step in this (fresh) process; return timings and peak RSS."""
    import resource

    from aggpub.ingest import load_network
    from aggpub.noise.sampler import make_random_source

    out = {"step": step}
    t0 = time.perf_counter()
    net = load_network(edges, people, attributes=["region"])
    out["ingest_s"] = time.perf_counter() - t0
    out["people"], out["edges"] = net.n_people, net.n_edges
    t1 = time.perf_counter()
    if step == "attributes":
        from aggpub.grouping import group_by_attributes

        g = group_by_attributes(net.people, ["region"], 20)
        out["supernodes"] = g.n_supernodes
    elif step in ("structure", "structure_r1"):
        from aggpub.grouping.structure import group_by_structure

        g = group_by_structure(net, 20, 0.3, make_random_source(None), tiers=8,
                               rounds=1 if step == "structure_r1" else 0)
        out["supernodes"] = g.n_supernodes
        out["min_size_seen"] = int(g.sizes().min())
    elif step == "release_structure":
        from aggpub.pipeline import build_release
        from aggpub.policy import parse_policy

        policy = parse_policy({"privacy": {"unit": "edge", "epsilon": 1.0},
                               "grouping": {"method": "structure", "min_size": 20, "tiers": 8, "rounds": 1}})
        r = build_release(net, policy)
        out["supernodes"] = r.grouping.n_supernodes
    out["step_s"] = time.perf_counter() - t1
    out["total_s"] = time.perf_counter() - t0
    out["peak_rss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--people", type=int, default=1_000_000)
    ap.add_argument("--edges", type=int, default=10_000_000)
    ap.add_argument("--out", type=Path, default=Path(__file__).resolve().parent.parent / "bench-data")
    ap.add_argument("--steps", default=",".join(STEPS))
    ap.add_argument("--child", nargs=3, metavar=("STEP", "EDGES", "PEOPLE"), help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        print(json.dumps(_child(*args.child)))
        return 0
    t = time.perf_counter()
    edges, people = generate(args.out, args.people, args.edges)
    print(f"graph ready in {time.perf_counter() - t:.1f}s: {edges}", file=sys.stderr)
    rows = []
    for step in args.steps.split(","):
        res = subprocess.run([sys.executable, __file__, "--child", step, str(edges), str(people)],
                             capture_output=True, text=True, check=True)
        rows.append(json.loads(res.stdout.strip().splitlines()[-1]))
        print(json.dumps(rows[-1]), file=sys.stderr)
    base = next((r for r in rows if r["step"] == "ingest"), rows[0])
    print("| step | people | edges | supernodes | step time (s) | step / own ingest | total (s) | "
          "total / ingest run | peak RSS (MB) |")
    print("|---|---|---|---|---|---|---|---|---|")
    for r in rows:
        print(f"| {r['step']} | {r['people']:,} | {r['edges']:,} | {r.get('supernodes', '-')} | "
              f"{r['step_s']:.1f} | {r['step_s'] / r['ingest_s']:.2f} | {r['total_s']:.1f} | {r['total_s'] / base['total_s']:.2f} | "
              f"{r['peak_rss_mb']:.0f} |")
    return 0


if __name__ == "__main__":
    sys.exit(main())
