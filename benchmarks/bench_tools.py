"""Tool comparison at scale (issue 6, and the performance part of issue 2).

This was ``bench_scale.py`` until issue 15 (``benchmarks/results/scale-2026-12-02.txt``
is its output); ``bench_scale.py`` now reproduces issue 15's table, and this script
keeps the comparison with other tools and with the Spark engine.

Times whole processes, each in its own subprocess, on generated graphs of 1M,
10M and 100M edges (people = edges / 10, about 2,000 attribute cells; see
``gen_graph.py``), all read from Parquet:

``release``     ``aggpub release`` (the CLI, DuckDB engine), including its confidential audit
                and report; ``release-core`` is the same run without the audit and report
                stages (from the progress timestamps): ingest, grouping, counting, noise,
                bundle, process start and exit
``duckdb``      a bare DuckDB query of the same true counts: dedupe the contacts, join
                both ends to the people, GROUP BY the pair of attribute cells (the baseline)
``pandas``      pandas merge + groupby of the same counts (skipped when pandas is missing;
                pandas is not a dependency of aggpub)
``networkx``    ``networkx.quotient_graph`` over the attribute cells (1M only; stopped
                after ``--networkx-timeout`` seconds)
``spark``       ``aggpub release --engine spark`` (Spark local mode)

and, in this process, bulk discrete Laplace noise on 2M cells (``aggpub.noise``)
against a loop over diffprivlib's ``Geometric`` mechanism.

It prints a table of wall times, ratios to the bare DuckDB query of the same size
(same run, so machine load affects both), peak resident memory of each child
(``ru_maxrss`` from ``wait4``, and the sampled total over the child's process
tree, which matters for Spark's JVM), the release's stage times, and the
scaling exponent of each tool (least-squares slope of log time against log
edges). Both releases use ``--seed 1`` (a seeded bundle is marked non-private;
fine for timing) so the DuckDB and Spark bundles can be compared cell by cell.

Usage::

    python benchmarks/bench_tools.py --sizes 1M,10M
    python benchmarks/bench_tools.py --sizes 1M,10M,100M --memory-limit 2500MB --spark-max 10M
"""

from __future__ import annotations

import argparse
import json
import math
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from _procs import progress_lines, run_child  # noqa: E402
from gen_graph import generate, parse_size, size_label  # noqa: E402

BARE_DUCKDB = r"""
import sys, duckdb
edges, people, limit = sys.argv[1], sys.argv[2], sys.argv[3]
con = duckdb.connect()
if limit:
    con.execute(f"SET memory_limit='{limit}'")
    con.execute(f"SET temp_directory='{sys.argv[4]}'")
r = con.execute(f'''
    WITH p AS (SELECT node, region || '|' || band AS g FROM read_parquet('{people}')),
         e AS (SELECT DISTINCT least(source, target) AS u, greatest(source, target) AS v
               FROM read_parquet('{edges}') WHERE source <> target)
    SELECT least(pa.g, pb.g) AS a, greatest(pa.g, pb.g) AS b, count(*) AS c
    FROM e JOIN p pa ON e.u = pa.node JOIN p pb ON e.v = pb.node GROUP BY ALL''').fetchnumpy()
print(f"cells={len(r['c'])} edges={int(r['c'].sum())}")
"""

PANDAS = r"""
import sys, pandas as pd
edges, people = sys.argv[1], sys.argv[2]
p = pd.read_parquet(people)
p["g"] = p["region"] + "|" + p["band"]
p = p[["node", "g"]]
e = pd.read_parquet(edges)
e = e[e["source"] != e["target"]]
u = e[["source", "target"]].min(axis=1)
v = e[["source", "target"]].max(axis=1)
e = pd.DataFrame({"u": u, "v": v}).drop_duplicates()
e = e.merge(p.rename(columns={"node": "u", "g": "ga"}), on="u").merge(p.rename(columns={"node": "v", "g": "gb"}), on="v")
a = e[["ga", "gb"]].min(axis=1)
b = e[["ga", "gb"]].max(axis=1)
c = pd.DataFrame({"a": a, "b": b}).groupby(["a", "b"]).size()
print(f"cells={len(c)} edges={int(c.sum())}")
"""

NETWORKX = r"""
import sys, networkx as nx, pyarrow.parquet as pq
edges, people = sys.argv[1], sys.argv[2]
p = pq.read_table(people).to_pydict()
e = pq.read_table(edges).to_pydict()
G = nx.Graph()
G.add_nodes_from(p["node"])
G.add_edges_from((u, v) for u, v in zip(e["source"], e["target"]) if u != v)
blocks = {}
for n, r, b in zip(p["node"], p["region"], p["band"]):
    blocks.setdefault((r, b), set()).add(n)
Q = nx.quotient_graph(G, list(blocks.values()), relabel=True)
print(f"cells={Q.number_of_edges() + Q.number_of_nodes()}")
"""


def run_median(cmd, repeat: int, **kw):
    """:func:`run_child` ``repeat`` times (alternating with nothing else); the run of median time.

    Peak memory and spill are the largest over the runs. A failed run is returned at once.
    """
    runs, spill = [], 0.0
    for _ in range(max(1, repeat)):
        res = run_child(cmd, **kw)
        spill = max(spill, run_child.spill_peak_mb)
        if res[3] != 0:
            run_child.spill_peak_mb = spill
            return res
        runs.append(res)
    runs.sort(key=lambda r: r[0])
    mid = runs[len(runs) // 2]
    run_child.spill_peak_mb = spill
    return (mid[0], max(r[1] for r in runs), max(r[2] for r in runs)) + mid[3:]


STAGES = (("reading edges", "ingest"), ("grouping people", "grouping"), ("counting", "counting"),
          ("adding noise", "noise"), ("auditing", "audit"), ("drawing the figures", "report"),
          ("writing bundle", "bundle"))


def stage_times(stderr: str):
    """Seconds per release stage, from the progress lines (either format, see ``_procs.progress_lines``).

    A stage runs from its first message to the next stage's first message; the
    last one (writing the bundle) is left out (its end has no timestamp).
    """
    starts = []
    for t, msg in progress_lines(stderr):
        for prefix, name in STAGES:
            if msg.startswith(prefix) and (not starts or starts[-1][1] != name):
                starts.append((t, name))
    stages = {}
    for (t, name), (t_next, _) in zip(starts, starts[1:]):
        stages[name] = stages.get(name, 0.0) + (t_next - t)
    return stages


def bench_noise(cells: int, loop_cells: int):
    """Seconds for bulk noise on ``cells`` cells, and for a diffprivlib loop (extrapolated if shorter)."""
    import numpy as np

    from aggpub.noise.mechanisms import GeometricMechanism
    from aggpub.noise.sampler import make_random_source

    values = np.zeros(cells, dtype=np.int64)
    mech = GeometricMechanism(epsilon=1.0, sensitivity=1.0)
    source = make_random_source(None)
    t = time.perf_counter()
    mech.randomise(values, source)
    bulk = time.perf_counter() - t
    from diffprivlib.mechanisms import Geometric

    ref = Geometric(epsilon=1.0, sensitivity=1)
    t = time.perf_counter()
    for _ in range(loop_cells):
        ref.randomise(0)
    loop = (time.perf_counter() - t) * cells / loop_cells
    return bulk, loop


def _bundles_equal(a: Path, b: Path) -> str:
    import pyarrow.parquet as pq

    try:
        for name in ("supernodes.parquet", "superedges.parquet"):
            if not pq.read_table(a / name).equals(pq.read_table(b / name)):
                return f"DIFFER ({name})"
    except OSError as exc:
        return f"cannot compare ({exc})"
    return "identical"


def main(argv=None):
    ap = argparse.ArgumentParser(description="aggpub against other tools at scale (whole processes)")
    ap.add_argument("--sizes", default="1M,10M", help="edge counts, e.g. 1M,10M,100M (default 1M,10M)")
    ap.add_argument("--data", type=Path, default=HERE.parent / "bench-data", help="graph cache folder")
    ap.add_argument("--tools", default="release,duckdb,pandas,networkx,spark,noise",
                    help="comma list of release,duckdb,pandas,networkx,spark,noise (default: all)")
    ap.add_argument("--memory-limit", default="",
                    help="memory limit for aggpub release, the bare DuckDB query and the Spark driver "
                         "(default: each tool's own)")
    ap.add_argument("--spark-max", default="10M", help="largest size run with Spark (default 10M)")
    ap.add_argument("--pandas-max", default="10M", help="largest size run with pandas (default 10M)")
    ap.add_argument("--pandas-python", default=sys.executable,
                    help="Python interpreter with pandas for the pandas row (default: this one). Keep pandas out "
                         "of aggpub's environment: pyarrow imports pandas when one is installed, which would "
                         "charge aggpub's release for an import it does not need")
    ap.add_argument("--networkx-timeout", type=float, default=120.0, help="seconds before networkx is stopped")
    ap.add_argument("--noise-cells", default="2M", help="cells for the bulk-noise comparison (default 2M)")
    ap.add_argument("--noise-loop-cells", default="2M",
                    help="cells actually drawn by the diffprivlib loop (time scaled to --noise-cells)")
    ap.add_argument("--repeat", type=int, default=3,
                    help="runs of the release, the bare query and pandas per size; the median time is kept "
                         "(default 3)")
    ap.add_argument("--repeat-max", default="10M", help="largest size run --repeat times; larger ones run once")
    ap.add_argument("--json", type=Path, help="also write the results as JSON here")
    args = ap.parse_args(argv)

    sizes = [parse_size(s) for s in args.sizes.split(",")]
    tools = [t.strip() for t in args.tools.split(",") if t.strip()]
    py = sys.executable
    work = Path(tempfile.mkdtemp(prefix="aggpub-bench-", dir=args.data.parent if args.data.parent.exists()
                                 else None))
    rows, results = [], []
    try:
        have_pandas = subprocess.run([args.pandas_python, "-c", "import pandas"], capture_output=True).returncode == 0
        have_spark = subprocess.run([py, "-c", "import pyspark"], capture_output=True).returncode == 0
        for m in sizes:
            lab = size_label(m)
            edges, people = generate(args.data, m, log=lambda msg: print(msg, file=sys.stderr))
            policy = args.data / "policy.toml"
            base = None
            per_size = {}

            def record(tool, res, note=""):
                seconds, maxrss, tree, code, stdout, stderr = res
                ok = code == 0
                if not ok and not note:
                    note = f"exit {code}: " + (stderr.strip().splitlines() or [""])[-1][:80]
                per_size[tool] = dict(size=m, tool=tool, seconds=seconds, ru_maxrss_mb=maxrss,
                                      tree_peak_mb=tree, ok=ok, note=note, stdout=stdout.strip()[-200:])
                print(f"  {lab:>5} {tool:<9} {seconds:8.1f}s  maxrss {maxrss:7.0f} MB  tree {tree:7.0f} MB  "
                      f"{'ok' if ok else 'FAILED'} {note}", file=sys.stderr, flush=True)

            release_cmd = [py, "-m", "aggpub", "release", "--policy", str(policy), "--edges", str(edges),
                           "--nodes", str(people), "--seed", "1"]
            if args.memory_limit:
                release_cmd += ["--memory-limit", args.memory_limit]
            if "duckdb" in tools:
                record("duckdb", run_median([py, "-c", BARE_DUCKDB, str(edges), str(people), args.memory_limit,
                                             str(work / "spill")], args.repeat if m <= parse_size(args.repeat_max)
                                            else 1))
            if "release" in tools:
                res = run_median(release_cmd + ["--out", str(work / f"release-{lab}"), "--overwrite"],
                                 args.repeat if m <= parse_size(args.repeat_max) else 1, spill_dir=work)
                record("release", res)
                per_size["release"]["stages"] = stage_times(res[5])
                per_size["release"]["spill_peak_mb"] = run_child.spill_peak_mb
                if run_child.spill_peak_mb:
                    per_size["release"]["note"] = (per_size["release"]["note"] + " " if per_size["release"]["note"]
                                                   else "") + f"DuckDB spilled up to {run_child.spill_peak_mb:,.0f} MB"
            if "pandas" in tools:
                if not have_pandas:
                    per_size["pandas"] = dict(size=m, tool="pandas", seconds=None, ok=False,
                                              note="skipped: pandas not installed")
                elif m > parse_size(args.pandas_max):
                    per_size["pandas"] = dict(size=m, tool="pandas", seconds=None, ok=False,
                                              note=f"skipped above --pandas-max {args.pandas_max}")
                else:
                    record("pandas", run_median([args.pandas_python, "-c", PANDAS, str(edges), str(people)],
                                                args.repeat if m <= parse_size(args.repeat_max) else 1))
            if "networkx" in tools and m == 10**6:
                res = run_child([py, "-c", NETWORKX, str(edges), str(people)], timeout=args.networkx_timeout)
                record("networkx", res, note=f"stopped after {args.networkx_timeout:.0f}s (lower bound)"
                       if res[3] == "timeout" else "")
            if "spark" in tools:
                if not have_spark:
                    per_size["spark"] = dict(size=m, tool="spark", seconds=None, ok=False,
                                             note="skipped: pyspark not installed")
                elif m > parse_size(args.spark_max):
                    per_size["spark"] = dict(size=m, tool="spark", seconds=None, ok=False,
                                             note=f"skipped above --spark-max {args.spark_max}")
                else:
                    res = run_child(release_cmd + ["--engine", "spark", "--out", str(work / f"spark-{lab}")])
                    record("spark", res)
                    if res[3] == 0 and "release" in per_size and per_size["release"]["ok"]:
                        per_size["spark"]["note"] = "bundle vs DuckDB release: " + _bundles_equal(
                            work / f"release-{lab}", work / f"spark-{lab}")
            rel = per_size.get("release")
            if rel and rel.get("ok") and rel.get("stages"):
                audit = rel["stages"].get("audit", 0.0) + rel["stages"].get("report", 0.0)
                per_size["release-core"] = dict(
                    size=m, tool="release-core", seconds=rel["seconds"] - audit, ok=True,
                    ru_maxrss_mb=None, tree_peak_mb=None,
                    note=f"same run as 'release' minus its audit + report stages ({audit:.1f}s)")
            base = per_size.get("duckdb", {}).get("seconds") if per_size.get("duckdb", {}).get("ok") else None
            for r in per_size.values():
                r["ratio"] = (r["seconds"] / base) if (base and r.get("seconds")) else None
                results.append(r)
            for d in work.glob("*-" + lab):
                shutil.rmtree(d, ignore_errors=True)

        noise = None
        if "noise" in tools:
            cells, loop_cells = parse_size(args.noise_cells), parse_size(args.noise_loop_cells)
            bulk, loop = bench_noise(cells, loop_cells)
            noise = dict(cells=cells, loop_cells=loop_cells, bulk_seconds=bulk, loop_seconds=loop,
                         speedup=loop / bulk)
    finally:
        shutil.rmtree(work, ignore_errors=True)

    # ---- report
    print()
    print(f"{'edges':>6} {'tool':<9} {'time s':>9} {'x duckdb':>9} {'maxrss MB':>10} {'tree MB':>8}  note")
    for r in results:
        t = f"{r['seconds']:9.1f}" if r.get("seconds") is not None else f"{'-':>9}"
        x = f"{r['ratio']:9.2f}" if r.get("ratio") is not None else f"{'-':>9}"
        mr = f"{r['ru_maxrss_mb']:10.0f}" if r.get("ru_maxrss_mb") is not None else f"{'-':>10}"
        tr = f"{r['tree_peak_mb']:8.0f}" if r.get("tree_peak_mb") is not None else f"{'-':>8}"
        note = r.get("note", "") if r.get("ok") or r.get("seconds") is None else "FAILED " + r.get("note", "")
        print(f"{size_label(r['size']):>6} {r['tool']:<9} {t} {x} {mr} {tr}  {note}")
    print()
    for r in results:
        if r["tool"] == "release" and r.get("stages"):
            st = ", ".join(f"{k} {v:.1f}s" for k, v in r["stages"].items())
            print(f"release stages at {size_label(r['size'])}: {st}")
    exps = {}
    for tool in ("release", "release-core", "duckdb", "pandas", "spark"):
        pts = [(math.log(r["size"]), math.log(r["seconds"])) for r in results
               if r["tool"] == tool and r.get("ok") and r.get("seconds")]
        if len(pts) >= 2:
            mx = sum(p[0] for p in pts) / len(pts)
            my = sum(p[1] for p in pts) / len(pts)
            slope = sum((x - mx) * (y - my) for x, y in pts) / sum((x - mx) ** 2 for x, _ in pts)
            exps[tool] = slope
            line = f"scaling exponent {tool}: {slope:.2f} (log time vs log edges over {len(pts)} sizes)"
            if len(pts) >= 3:  # fixed costs (start-up, imports, the audit's table) weigh on the small sizes
                (x1, y1), (x2, y2) = sorted(pts)[-2:]
                top = (y2 - y1) / (x2 - x1)
                exps[tool + " (two largest sizes)"] = top
                line += f"; {top:.2f} between the two largest sizes"
            print(line)
    if noise:
        print(f"noise on {noise['cells']:,} cells: bulk {noise['bulk_seconds']:.3f}s, diffprivlib loop "
              f"{noise['loop_seconds']:.1f}s"
              + (f" (measured on {noise['loop_cells']:,} cells, scaled)" if noise["loop_cells"] != noise["cells"]
                 else "") + f": {noise['speedup']:.0f}x faster")
    if args.json:
        args.json.write_text(json.dumps(dict(results=results, exponents=exps, noise=noise,
                                             memory_limit=args.memory_limit), indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
