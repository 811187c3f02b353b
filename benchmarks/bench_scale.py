"""Issue 15's table: the whole ``aggpub release`` against a bare DuckDB count, before and after, in one run.

Graph (``gen_graph.generate_grp``, cached as Parquet under ``--data``): ``m`` contacts drawn as
``numpy.random.default_rng(1).integers(0, n, size=(m, 2))`` over ``n = m / 10`` people (self-pairs
dropped), people with one string attribute ``grp`` of 2,000 values; at 10M this is exactly the
issue's graph (10,000,000 pairs over 1,000,000 people). Policy: unit edge, epsilon 1, grouping by
``grp``, min_size 20 (``policy_grp.toml``).

Rows, each a whole fresh process (wall time from outside, ``ru_maxrss`` from ``wait4``: a child's
peak starts at its parent's resident size, so this script keeps itself small and writes the graphs from a
child):

``bare``      the baseline, the issue's query verbatim in a fresh Python process:
              ``select least(a.grp,b.grp), greatest(a.grp,b.grp), count(*) from edges e join people a
              on e.source=a.node join people b on e.target=b.node group by all``, ``fetchnumpy()``,
              with ``edges`` and ``people`` views over the Parquet files
``distinct``  the same with ``DISTINCT`` on the unordered pairs first (what a release must do)
``bare-small-pages``  (``--small-pages-baseline``) the bare query in a process with transparent huge
              pages off (``prctl(PR_SET_THP_DISABLE)``), as ``aggpub`` runs since 2026-12-03
              (``aggpub.pages.no_huge_pages``): on a virtual machine whose host takes back free
              memory, huge-page faults can triple a process's time, so the release is also compared
              with a baseline that runs the way it does
``release``   ``python -m aggpub release`` (the console script's code: audit, report, bundle,
              exit) of each installation, default memory settings, no seed (OS entropy, as a real
              release); its stages come from its progress lines (both formats: ``progress: <message>
              (<s> s in)`` and the older ``[  <s>s] <message>``): reading and de-duplicating
              (``ingest``), the confidential audit and its report, and their parts
``release-same``  (sizes whose default policy releases the triangle count: 1M) the release with
              ``[components.triangle_count] enabled = false``, so that the scaling fit compares the same
              kinds of work at every size (the default counts triangles only on networks of at most
              ``aggpub.policy.TRIANGLE_AUTO_MAX_PEOPLE`` people; ``--no-same-work`` leaves it out)
``demo``      ``aggpub release`` of the demo town (30,000 people, about 170,000 contacts; the files
              written by each installation's own ``aggpub.demo.write_demo_inputs``, released with
              its policy), beside ``demo-bare``, a DuckDB DISTINCT + join + GROUP BY of the same CSVs
              in a fresh process as this run's reference for it

Children run in a scratch folder (started inside a checkout, ``python -m aggpub`` would import that
checkout's aggpub whatever the venv), with bytecode caching on (``PYTHONDONTWRITEBYTECODE`` removed from
their environment, as on a user's machine), after one untimed demo release per installation (the
warm-up: bytecode caches written, files cached). Each row runs ``--repeat`` times (default 2;
``--large-repeat`` above 10M), interleaved: every row once, then every row again, before and after in
alternating order; the minimum is kept (every run is listed too). Ratios are to the bare query's minimum
at the same size in the same run: the machines are shared and noisy. Beside each wall time, the child's
CPU seconds (user + system from ``wait4``, its minimum over the runs): steadier under other sessions'
load, though it adds up DuckDB's threads.

Scaling in contacts, with two sizes or more: the raw exponent (least-squares slope of log t against
log m, and between neighbouring sizes) and, with three sizes or more, the exponent once fixed costs
are subtracted: the least-squares fit of ``t = a + b * m^k`` (k on a grid of 0.001, a and b linear
for each k). ``a`` is the fixed cost (start-up, imports, the work on the 2,001,000-cell table, exit);
with sizes 1M, 10M, 100M the fit is exact and ``k = log10((t100 - t10) / (t10 - t1))``. The same on
CPU seconds, and on the release's contact stages alone (ingest + grouping + counting, from its progress
lines). A tiny graph cannot stand for the fixed costs: the audit compares sampled network structure
only up to 500,000 contacts, so a graph below that does work the large ones do not.

Usage::

    python benchmarks/bench_scale.py                                   # 10M and the demo, this installation
    python benchmarks/bench_scale.py --sizes 1M,10M,100M \\
        --python-before ../wt-before/.venv/bin/python --out benchmarks/results/scale-before-after.txt

``--python`` (default: this interpreter) is the installation called "after"; ``--python-before``
another one (its venv's python), measured in the same run. The bare queries run with ``--python``.
"""

from __future__ import annotations

import argparse
import datetime
import json
import math
import os
import re
import shlex
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from _procs import child_env, progress_lines, release_stages, run_child  # noqa: E402
from gen_graph import grp_paths, parse_size, size_label  # noqa: E402

#: The issue's baseline query, verbatim.
ISSUE_QUERY = ("select least(a.grp,b.grp), greatest(a.grp,b.grp), count(*) from edges e join people a "
               "on e.source=a.node join people b on e.target=b.node group by all")
#: The same with DISTINCT on the unordered pairs first.
DISTINCT_QUERY = ("with pairs as (select distinct least(source, target) as source, greatest(source, target) "
                  "as target from edges where source <> target) "
                  "select least(a.grp,b.grp), greatest(a.grp,b.grp), count(*) from pairs e join people a "
                  "on e.source=a.node join people b on e.target=b.node group by all")

BARE = r"""
import sys, time
if len(sys.argv) > 4 and sys.argv[4] == "no-huge-pages":  # as `aggpub` runs (aggpub.pages.no_huge_pages)
    import ctypes
    assert ctypes.CDLL(None).prctl(41, 1, 0, 0, 0) == 0
t0 = time.perf_counter()
import duckdb
edges_path, people_path, query = sys.argv[1], sys.argv[2], sys.argv[3]
duckdb.sql(f"create view edges as select * from read_parquet('{edges_path}')")
duckdb.sql(f"create view people as select * from read_parquet('{people_path}')")
t1 = time.perf_counter()
r = duckdb.sql(query).fetchnumpy()
t2 = time.perf_counter()
c = list(r.values())[2]
print(f"cells={len(c)} contacts={int(c.sum())} import_s={t1 - t0:.3f} query_s={t2 - t1:.3f}")
"""

DEMO_BARE = r"""
import sys, time
t0 = time.perf_counter()
import duckdb
d = sys.argv[1]
t1 = time.perf_counter()
r = duckdb.sql(f'''
    with pairs as (select distinct least(source, target) as source, greatest(source, target) as target
                   from read_csv('{d}/contacts.csv') where source <> target),
         people as (select node, age_band || '|' || neighbourhood as grp from read_csv('{d}/people.csv'))
    select least(a.grp,b.grp), greatest(a.grp,b.grp), count(*) from pairs e join people a on e.source=a.node
    join people b on e.target=b.node group by all''').fetchnumpy()
t2 = time.perf_counter()
c = list(r.values())[2]
print(f"cells={len(c)} contacts={int(c.sum())} import_s={t1 - t0:.3f} query_s={t2 - t1:.3f}")
"""

INFO = r"""
import json, os, subprocess, sys
import aggpub, duckdb, numpy, pyarrow
root = os.path.dirname(os.path.dirname(os.path.abspath(aggpub.__file__)))
def git(*a):
    try:
        return subprocess.run(["git", "-C", root, *a], capture_output=True, text=True, timeout=20).stdout.strip()
    except Exception:
        return ""
try:
    from aggpub.policy import TRIANGLE_AUTO_MAX_PEOPLE as tri_max
except ImportError:
    tri_max = None
print(json.dumps(dict(python=sys.version.split()[0], aggpub=root, commit=git("rev-parse", "--short", "HEAD"),
                      triangle_auto_max_people=tri_max,
                      changed_files_in_aggpub=len(git("status", "--porcelain", "--", "aggpub").splitlines()),
                      duckdb=duckdb.__version__, numpy=numpy.__version__, pyarrow=pyarrow.__version__)))
"""

WRITE_DEMO = "import sys; from aggpub.demo import write_demo_inputs; write_demo_inputs(sys.argv[1])"

ROW_TITLES = {
    "bare": "bare DuckDB join + GROUP BY (issue's query, fresh Python process): the baseline",
    "bare-small-pages": "the same bare query with transparent huge pages off (prctl, as `aggpub` runs)",
    "distinct": "the same with DISTINCT on the unordered pairs first (fresh process)",
    "release": "`aggpub release` (whole process, audit and report included)",
    "demo-bare": "reference: DuckDB DISTINCT + join + GROUP BY of the demo CSVs (fresh process)",
    "demo": "`aggpub release` of the demo town (whole process, report included)",
}


def _kv(stdout: str) -> dict:
    """``key=value`` pairs of a child's last line (numbers as float)."""
    out = {}
    for tok in (stdout.strip().splitlines() or [""])[-1].split():
        if "=" in tok:
            k, v = tok.split("=", 1)
            try:
                out[k] = float(v)
            except ValueError:
                out[k] = v
    return out


def _meminfo_gb() -> float:
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemTotal:"):
                    return int(line.split()[1]) / 2**20
    except OSError:
        pass
    return float("nan")


def _fit_power(ms, ts):
    """``t = a + b * m^k`` by least squares: k on a grid of 0.001 in [0.2, 2.5], a and b linear; (a, b, k)."""
    import numpy as np

    ms = np.asarray(ms, float) / 1e6
    ts = np.asarray(ts, float)
    best = None
    for k in np.arange(0.2, 2.5005, 0.001):
        X = np.column_stack([np.ones_like(ms), ms ** k])
        coef, *_ = np.linalg.lstsq(X, ts, rcond=None)
        res = float(((X @ coef - ts) ** 2).sum())
        if best is None or res < best[0] - 1e-12:
            best = (res, coef[0], coef[1], k)
    _, a, b, k = best
    return a, b, k


def _slope(xs, ys):
    mx, my = sum(xs) / len(xs), sum(ys) / len(ys)
    return sum((x - mx) * (y - my) for x, y in zip(xs, ys)) / sum((x - mx) ** 2 for x in xs)


class Runs:
    """Every run, keyed by (scenario, row, installation label or ``None`` for the shared rows)."""

    def __init__(self):
        self.runs: dict[tuple, list[dict]] = {}

    def add(self, key, run):
        self.runs.setdefault(key, []).append(run)

    def best(self, key):
        """The fastest successful run, or ``None`` (or the first failure when every run failed)."""
        runs = self.runs.get(key, [])
        ok = [r for r in runs if r["ok"]]
        if ok:
            return min(ok, key=lambda r: r["seconds"])
        return runs[0] if runs else None

    def min_cpu(self, key):
        """The least CPU seconds over the successful runs (the minimum of its own, like the wall time's)."""
        vals = [r["cpu_s"] for r in self.runs.get(key, []) if r["ok"] and r.get("cpu_s") is not None]
        return min(vals) if vals else None

    def peak(self, key, field="ru_maxrss_mb"):
        vals = [r[field] for r in self.runs.get(key, []) if r.get(field) is not None]
        return max(vals) if vals else None


def main(argv=None):
    ap = argparse.ArgumentParser(description="issue 15: whole aggpub release against a bare DuckDB count")
    ap.add_argument("--sizes", default="10M", help="contact counts, e.g. 1M,10M,100M (default 10M)")
    ap.add_argument("--python", default=sys.executable,
                    help="Python of the installation called 'after' (default: this one); it also runs the "
                         "bare queries")
    ap.add_argument("--python-before", default=None,
                    help="Python of a second aggpub installation (its venv's python), called 'before'")
    ap.add_argument("--repeat", type=int, default=2, help="interleaved runs of every row; the minimum is kept")
    ap.add_argument("--large-repeat", type=int, default=None,
                    help="runs of every row for sizes above 10M (default: --repeat)")
    ap.add_argument("--no-demo", action="store_true", help="leave out the demo town rows")
    ap.add_argument("--no-same-work", action="store_true",
                    help="leave out the 'release-same' row (sizes where the default policy releases the triangle "
                         "count, released again without it, for an exponent on the same work at every size)")
    ap.add_argument("--small-pages-baseline", action="store_true",
                    help="also time the bare query with transparent huge pages off, as `aggpub` runs since "
                         "2026-12-03 (aggpub.pages.no_huge_pages); the release's ratio to it is reported too")
    ap.add_argument("--no-warm-up", action="store_true",
                    help="skip the untimed demo release of each installation before the timed runs (it writes "
                         "the bytecode caches and warms the file cache)")
    ap.add_argument("--data", type=Path, default=HERE.parent / "bench-data" / "grp", help="graph cache folder")
    ap.add_argument("--timeout", type=float, default=3600.0, help="seconds before a child is stopped")
    ap.add_argument("--out", type=Path, help="also write the report to this file")
    ap.add_argument("--json", type=Path, help="also write every run as JSON here")
    args = ap.parse_args(argv)

    log = lambda msg: print(msg, file=sys.stderr, flush=True)  # noqa: E731
    sizes = sorted(parse_size(s) for s in args.sizes.split(",") if s.strip())
    installs = ([("before", args.python_before)] if args.python_before else []) + [("after", args.python)]
    labels = [lab for lab, _ in installs]
    started = datetime.datetime.now().astimezone()
    load_start = os.getloadavg()
    args.data.mkdir(parents=True, exist_ok=True)
    # Every child runs in this scratch folder: started in a checkout, `python -c` / `-m` would import
    # that checkout's aggpub whatever its venv.
    work = Path(tempfile.mkdtemp(prefix="aggpub-bench-", dir=args.data.parent))
    info = {}
    for lab, py in installs:
        res = subprocess.run([py, "-c", INFO], capture_output=True, text=True, cwd=work, env=child_env())
        if res.returncode:
            ap.error(f"{py}: cannot import aggpub, duckdb, numpy and pyarrow: {res.stderr.strip()[-200:]}")
        info[lab] = json.loads(res.stdout)
        info[lab]["interpreter"] = py

    # Graphs are written by a child: Linux carries a process's peak resident size over fork and exec, so
    # a parent grown by generating 10^8 pairs would raise every later child's ru_maxrss to its own.
    subprocess.run([sys.executable, str(HERE / "gen_graph.py"), "--kind", "grp", "--out", str(args.data),
                    "--sizes", ",".join(size_label(m) for m in sizes)], check=True, env=child_env())
    graphs = {size_label(m): (m,) + grp_paths(args.data, size_label(m)) for m in sizes}
    policy = args.data / "policy_grp.toml"
    # the same policy without the triangle count, which the default releases on small networks only
    same_work_policy = work / "policy_grp_same_work.toml"
    same_work_policy.write_text(policy.read_text() + SAME_WORK_EXTRA)
    runs = Runs()

    def do(key, cmd, *, spill_dir=None):
        scen, row, lab = key
        res = run_child(cmd, timeout=args.timeout, spill_dir=spill_dir, cwd=work)
        seconds, maxrss, tree, code, stdout, stderr = res
        run = dict(seconds=seconds, cpu_s=run_child.cpu_seconds, ru_maxrss_mb=maxrss, tree_peak_mb=tree,
                   ok=code == 0, code=code, child=_kv(stdout))
        if row in ("release", "demo"):
            run["stages"] = release_stages(stderr)
            run["spill_peak_mb"] = run_child.spill_peak_mb
            kept = [msg for _, msg in progress_lines(stderr) if msg.startswith("kept ")]
            run["kept_line"] = kept[-1] if kept else ""
        if code != 0:
            run["error"] = (stderr.strip().splitlines() or [""])[-1][:160]
        runs.add(key, run)
        log(f"  {scen:>6} {row:<9} {lab or '':<7} {seconds:8.2f}s  cpu {run['cpu_s']:8.2f}s  maxrss {maxrss:7.0f} MB"
            + ("" if code == 0 else f"  FAILED ({code}): {run['error']}"))

    def release_cmd(py, edges, people, pol, out):
        return [py, "-m", "aggpub", "release", "--policy", str(pol), "--edges", str(edges), "--nodes",
                str(people), "--out", str(out), "--overwrite"]

    try:
        demo_dirs = {}
        if not (args.no_demo and args.no_warm_up):
            for lab, py in installs:
                d = work / f"demo-inputs-{lab}"
                subprocess.run([py, "-c", WRITE_DEMO, str(d)], check=True, cwd=work, env=child_env())
                demo_dirs[lab] = d
        if not args.no_warm_up:
            for lab, py in installs:
                d, out = demo_dirs[lab], work / f"warm-up-{lab}"
                res = run_child(release_cmd(py, d / "contacts.csv", d / "people.csv", d / "policy.toml", out),
                                cwd=work, timeout=args.timeout)
                log(f"warm-up: demo release of {lab} in {res[0]:.1f}s (untimed)")
                if res[3] != 0:
                    raise SystemExit(f"{lab}: the warm-up release failed: {res[5].strip()[-300:]}")
        for scen, (m, edges, people) in graphs.items():
            log(f"{scen}: {edges.name}, {people.name}")
            repeat = args.repeat if m <= 10**7 or args.large_repeat is None else args.large_repeat
            for rep in range(repeat):
                order = installs if rep % 2 == 0 else installs[::-1]
                do((scen, "bare", None), [args.python, "-c", BARE, str(edges), str(people), ISSUE_QUERY])
                if args.small_pages_baseline:
                    do((scen, "bare-small-pages", None),
                       [args.python, "-c", BARE, str(edges), str(people), ISSUE_QUERY, "no-huge-pages"])
                do((scen, "distinct", None), [args.python, "-c", BARE, str(edges), str(people), DISTINCT_QUERY])
                for lab, py in order:
                    out = work / f"release-{scen}-{lab}"
                    do((scen, "release", lab), release_cmd(py, edges, people, policy, out), spill_dir=work)
                    shutil.rmtree(out, ignore_errors=True)
                    shutil.rmtree(Path(str(out) + ".report"), ignore_errors=True)
                    if _triangles_by_default(info[lab], m) and not args.no_same_work:
                        do((scen, "release-same", lab), release_cmd(py, edges, people, same_work_policy, out),
                           spill_dir=work)
                        shutil.rmtree(out, ignore_errors=True)
                        shutil.rmtree(Path(str(out) + ".report"), ignore_errors=True)
        if not args.no_demo:
            log("demo town")
            for rep in range(args.repeat):
                order = installs if rep % 2 == 0 else installs[::-1]
                do(("demo", "demo-bare", None), [args.python, "-c", DEMO_BARE, str(demo_dirs[labels[-1]])])
                for lab, py in order:
                    d = demo_dirs[lab]
                    out = work / f"demo-release-{lab}"
                    do(("demo", "demo", lab),
                       release_cmd(py, d / "contacts.csv", d / "people.csv", d / "policy.toml", out))
                    shutil.rmtree(out, ignore_errors=True)
                    shutil.rmtree(Path(str(out) + ".report"), ignore_errors=True)
    finally:
        shutil.rmtree(work, ignore_errors=True)

    text = report(args, argv, sizes, graphs, installs, info, runs, started, load_start)
    print(text)
    if args.out:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text(text, encoding="utf-8")
    if args.json:
        args.json.write_text(json.dumps({f"{s}|{r}|{lab}": v for (s, r, lab), v in runs.runs.items()}, indent=1))
    return 0


#: What ``release-same`` adds to the benchmark policy: the default releases the triangle count only on networks of at
#: most ``aggpub.policy.TRIANGLE_AUTO_MAX_PEOPLE`` people (100,000: the 1M graph), so the 1M release does work the
#: larger ones do not (counting triangles, about 0.35 s), which the fit a + b m^k would read as growth.
SAME_WORK_EXTRA = "\n# the same components at every size (bench_scale.py's release-same row)\n" \
                  "[components.triangle_count]\nenabled = false\n"


def _triangles_by_default(info: dict, m: int) -> bool:
    """Whether the installation's default policy releases the triangle count on the graph of ``m`` contacts
    (``m / 10`` people, ``gen_graph.generate_grp``)."""
    limit = info.get("triangle_auto_max_people")
    return limit is not None and m // 10 <= limit


# ---------------------------------------------------------------------------------------------- report

def _fmt_s(x):
    return "-" if x is None else (f"{x:.2f} s" if x < 100 else f"{x:.0f} s")


def _fmt_mb(x):
    return "-" if x is None else f"{x / 1024:.2f} GB"


def _kept_check(release_run, distinct_run) -> str:
    """Whether the release's "kept N undirected contacts" equals the DISTINCT query's total."""
    m = re.search(r"kept ([\d,]+) undirected", release_run.get("kept_line", ""))
    if not m or not distinct_run or not distinct_run["ok"] or "contacts" not in distinct_run["child"]:
        return ""
    kept, dist = int(m.group(1).replace(",", "")), int(distinct_run["child"]["contacts"])
    return (" (= the DISTINCT query's total)" if kept == dist
            else f" (DIFFERS from the DISTINCT query's total {dist:,})")


def report(args, argv, sizes, graphs, installs, info, runs, started, load_start) -> str:
    labels = [lab for lab, _ in installs]
    L = []
    cmd = " ".join(shlex.quote(a) for a in [sys.executable, "benchmarks/bench_scale.py"]
                   + list(sys.argv[1:] if argv is None else argv))
    L.append("# aggpub scale benchmark (issue 15): whole release against a bare DuckDB count")
    L.append("")
    L.append(f"command: {cmd}")
    L.append(f"started {started:%Y-%m-%d %H:%M %Z}, finished {datetime.datetime.now().astimezone():%H:%M %Z}; "
             f"{os.cpu_count()} cores, {_meminfo_gb():.0f} GB; load average at start "
             f"{load_start[0]:.1f}, at end {os.getloadavg()[0]:.1f} (shared machine: compare ratios)")
    for lab in labels:
        i = info[lab]
        L.append(f"{lab}: aggpub at {i['aggpub']} (commit {i['commit'] or '?'}"
                 + (f", {i['changed_files_in_aggpub']} changed files in aggpub/"
                    if i["changed_files_in_aggpub"] else "")
                 + f"), Python {i['python']}, duckdb {i['duckdb']}, numpy {i['numpy']}, pyarrow {i['pyarrow']}")
    L.append("children: in a scratch folder, bytecode caching on, after "
             + ("no warm-up" if args.no_warm_up else "an untimed demo release of each installation (warm-up)"))
    L.append("cpu: user + system seconds of the child (wait4), all its threads together; steadier than wall "
             "time on a loaded machine, and the minimum over the runs on its own")
    L.append(f"every row: minimum of {args.repeat} runs"
             + (f" ({args.large_repeat} above 10M contacts)" if args.large_repeat not in (None, args.repeat) else "")
             + ", interleaved (all rows once, then again; before and "
             "after in alternating order); x = ratio to the bare query of the same graph in this run")
    L.append("")

    def cell(key, base, *, mem=True, base_cpu=None):
        r = runs.best(key)
        if r is None:
            return "-"
        if not r["ok"]:
            return f"FAILED ({r['code']}): {r.get('error', '')}"
        s = _fmt_s(r["seconds"])
        if base:
            s += f", {r['seconds'] / base:.2f}x"
        cpu = runs.min_cpu(key)
        if cpu is not None:
            s += f" (cpu {_fmt_s(cpu)}" + (f", {cpu / base_cpu:.2f}x" if base_cpu else "") + ")"
        if mem:
            s += f", peak {_fmt_mb(runs.peak(key))}"
        return s

    def row(title, cells):
        L.append(f"| {title} | " + " | ".join(cells) + " |")

    for scen, (m, edges, people) in graphs.items():
        base_run = runs.best((scen, "bare", None))
        base = base_run["seconds"] if base_run and base_run["ok"] else None
        base_cpu = runs.min_cpu((scen, "bare", None))
        dist_run = runs.best((scen, "distinct", None))
        n = max(40_000, m // 10)
        L.append(f"## {m:,} contacts over {n:,} people, 2,000 groups ({edges.name}, {people.name})")
        L.append("")
        L.append("| what | " + " | ".join(labels) + " |")
        L.append("|---|" + "---|" * len(labels))
        for rname in ("bare", "bare-small-pages", "distinct"):
            if (scen, rname, None) not in runs.runs:
                continue
            r = runs.best((scen, rname, None))
            extra = ""
            if r and r["ok"] and "query_s" in r["child"]:
                extra = (f" (query {r['child']['query_s']:.2f} s in-process; {int(r['child']['cells']):,} cells, "
                         f"{int(r['child']['contacts']):,} contacts)")
            row(ROW_TITLES[rname] + (", shared" if len(labels) > 1 else ""),
                [cell((scen, rname, None), base, base_cpu=base_cpu) + extra] + ["same row"] * (len(labels) - 1))
        row(ROW_TITLES["release"], [cell((scen, "release", lab), base, base_cpu=base_cpu) for lab in labels])
        small = runs.best((scen, "bare-small-pages", None))
        if small and small["ok"]:
            ratios = []
            for lab in labels:
                r = runs.best((scen, "release", lab))
                ratios.append(f"{r['seconds'] / small['seconds']:.2f}x" if r and r["ok"] else "-")
            row("`aggpub release` against the bare query with huge pages off", ratios)
        stage_cells = {k: [] for k in ("ingest", "audit", "rest")}
        for lab in labels:
            r = runs.best((scen, "release", lab))
            st = r.get("stages", {}) if r and r["ok"] else {}
            if "ingest" in st:
                c = f"{st['ingest']:.1f} s"
                if base:
                    c += f", {st['ingest'] / base:.2f}x"
                if dist_run and dist_run["ok"] and "query_s" in dist_run["child"]:
                    c += f", {st['ingest'] / dist_run['child']['query_s']:.2f}x the in-process DISTINCT query"
                stage_cells["ingest"].append(c)
            else:
                stage_cells["ingest"].append("-")
            if "audit + report" in st:
                parts = [(k.split(": ", 1)[1], v) for k, v in st.items()
                         if k.startswith("audit: ")]
                parts.append(("figures and report files", st.get("report: figures and files", 0.0)))
                share = 100 * st["audit + report"] / r["seconds"]
                stage_cells["audit"].append(f"{st['audit + report']:.1f} s = {share:.0f}%"
                                            " of the release (" + ", ".join(f"{k} {v:.1f}" for k, v in parts) + ")")
                stage_cells["rest"].append(f"{r['seconds'] - st['audit + report'] - st.get('ingest', 0.0):.1f} s")
            else:
                stage_cells["audit"].append("-")
                stage_cells["rest"].append("-")
        row("of which: reading edges and people, collapsing duplicates (progress lines)", stage_cells["ingest"])
        row("of which: the confidential audit and its report (progress lines)", stage_cells["audit"])
        row("of which: the rest (start-up, imports, set-up, grouping, counting, noise, gate, bundle write, exit)",
            stage_cells["rest"])
        L.append("")
        for lab in labels:
            r = runs.best((scen, "release", lab))
            if r and r["ok"]:
                st = {k: v for k, v in r.get("stages", {}).items()
                      if k not in ("audit + report", "audit", "last progress line")}
                L.append(f"{lab} release stages (fastest run): " + ", ".join(f"{k} {v:.1f}" for k, v in st.items())
                         + f"; last progress line at {r['stages'].get('last progress line', 0):.1f} s of "
                         f"{r['seconds']:.1f} s; tree peak {_fmt_mb(runs.peak((scen, 'release', lab), 'tree_peak_mb'))}"
                         + (f"; DuckDB spilled up to {r['spill_peak_mb']:,.0f} MB" if r.get("spill_peak_mb") else "")
                         + (f"; {r['kept_line']}" if r.get("kept_line") else "")
                         + _kept_check(r, dist_run))
        L.append("")

    if ("demo", "demo", labels[-1]) in runs.runs:
        ref = runs.best(("demo", "demo-bare", None))
        base = ref["seconds"] if ref and ref["ok"] else None
        base_cpu = runs.min_cpu(("demo", "demo-bare", None))
        L.append("## demo town (30,000 people; files from each installation's aggpub.demo.write_demo_inputs)")
        L.append("")
        L.append("| what | " + " | ".join(labels) + " |")
        L.append("|---|" + "---|" * len(labels))
        row(ROW_TITLES["demo-bare"] + (", shared" if len(labels) > 1 else ""),
            [cell(("demo", "demo-bare", None), base, base_cpu=base_cpu)] + ["same row"] * (len(labels) - 1))
        row(ROW_TITLES["demo"], [cell(("demo", "demo", lab), base, base_cpu=base_cpu) for lab in labels])
        cells_i, cells_a = [], []
        for lab in labels:
            r = runs.best(("demo", "demo", lab))
            st = r.get("stages", {}) if r and r["ok"] else {}
            cells_i.append(f"{st['ingest']:.1f} s" if "ingest" in st else "-")
            cells_a.append(f"{st['audit + report']:.1f} s" if "audit + report" in st else "-")
        row("of which: reading and de-duplicating", cells_i)
        row("of which: the confidential audit and its report", cells_a)
        L.append("")
        for lab in labels:
            r = runs.best(("demo", "demo", lab))
            if r and r["ok"]:
                st = {k: v for k, v in r.get("stages", {}).items()
                      if k not in ("audit + report", "audit", "last progress line")}
                L.append(f"{lab} demo release stages (fastest run): "
                         + ", ".join(f"{k} {v:.1f}" for k, v in st.items())
                         + f"; last progress line at {r['stages'].get('last progress line', 0):.1f} s of "
                         f"{r['seconds']:.1f} s")
        L.append("")

    # ---- scaling
    exps = {}
    if len(sizes) >= 2:
        L.append("## scaling in contacts")
        L.append("")
        L.append("k_raw: least-squares slope of log t against log m (start-up, imports and the 2,001,000-cell "
                 "table weigh on it), and between neighbouring sizes. With 3 sizes or more, k: the exponent once "
                 "fixed costs are subtracted, from the least-squares fit t = a + b m^k (m in millions; exact "
                 "for 1M, 10M, 100M: k = log10((t100 - t10) / (t10 - t1))); a is the fixed cost. The same on "
                 "CPU seconds, and on the release's contact stages alone (ingest + grouping + counting, from "
                 "its progress lines: the stages whose work grows with the contacts).")
        L.append("")

        def scaling_line(name, pts, unit="s"):
            if len(pts) < 2 or any(t <= 0 for _, t in pts):
                return None, None
            k_raw = _slope([math.log(m) for m, _ in pts], [math.log(t) for _, t in pts])
            pair = [math.log(b[1] / a[1]) / math.log(b[0] / a[0]) for a, b in zip(pts, pts[1:])]
            line = (f"{name:<34} " + ", ".join(f"{size_label(m)} {t:.1f} {unit}" for m, t in pts)
                    + f"; k_raw {k_raw:.2f} (" + ", ".join(f"{size_label(a[0])}-{size_label(b[0])} {p:.2f}"
                                                            for a, b, p in zip(pts, pts[1:], pair)) + ")")
            k = None
            if len(pts) >= 3:
                a, b, k = _fit_power([m for m, _ in pts], [t for _, t in pts])
                line += f"; fit {a:.1f} + {b:.3f} m^{k:.2f}: k {k:.2f}"
                if k <= 0.201 or k >= 2.499:
                    line += " (at the grid's edge: the times do not follow a + b m^k)"
            return line, k

        tools = [("bare", None), ("distinct", None)] + [("release", lab) for lab in labels]
        for rname, lab in tools:
            name = rname if lab is None else f"release {lab}"
            best = [(m, runs.best((size_label(m), rname, lab))) for m in sizes]
            pts = [(m, r["seconds"]) for m, r in best if r and r["ok"]]
            line, k = scaling_line(name + " (wall)", pts)
            if line:
                L.append(line)
                if k is not None:
                    exps[name] = k
            cpts = [(m, runs.min_cpu((size_label(m), rname, lab))) for m in sizes]
            line, k = scaling_line(name + " (cpu)", [(m, c) for m, c in cpts if c is not None], "cpu s")
            if line:
                L.append(line)
                if k is not None:
                    exps[name + " cpu"] = k
            if lab is not None:
                spts = []
                for m, r in best:
                    st = r.get("stages", {}) if r and r["ok"] else {}
                    if "ingest" in st:
                        spts.append((m, st["ingest"] + st.get("grouping", 0.0) + st.get("counting", 0.0)))
                line, k = scaling_line(name + " contact stages (wall)", spts)
                if line:
                    L.append(line)
                    if k is not None:
                        exps[name + " contact stages"] = k
                # the same components at every size: release-same where it ran, the default release elsewhere
                same = [(m, runs.best((size_label(m), "release-same", lab)) or r) for m, r in best]
                if any(runs.best((size_label(m), "release-same", lab)) for m in sizes):
                    for unit, value in (("wall", lambda m, r: r["seconds"]),
                                        ("cpu", lambda m, r: runs.min_cpu((size_label(m), "release-same", lab))
                                         or runs.min_cpu((size_label(m), "release", lab)))):
                        pts = [(m, value(m, r)) for m, r in same if r and r["ok"]]
                        line, k = scaling_line(f"{name}, same work ({unit})", pts, "s" if unit == "wall" else "cpu s")
                        if line:
                            L.append(line)
                            if k is not None:
                                exps[f"{name} same work{'' if unit == 'wall' else ' cpu'}"] = k
        if any(rname == "release-same" for (_, rname, _) in runs.runs):
            L.append("")
            L.append("same work: at sizes where the default policy releases the triangle count (networks of at most "
                     "aggpub.policy.TRIANGLE_AUTO_MAX_PEOPLE people), the release-same row (the policy with "
                     "[components.triangle_count] enabled = false) stands for the release, so that every size does "
                     "the same kinds of work and a is a fixed cost.")
        L.append("")

    # ---- goals
    L.append("## issue 15's goals, per installation (from the figures above)")
    L.append("")
    ten = size_label(10**7)
    for lab in labels:
        goals = []
        b10, r10, d10 = (runs.best((ten, "bare", None)), runs.best((ten, "release", lab)),
                         runs.best((ten, "distinct", None)))
        if b10 and r10 and b10["ok"] and r10["ok"]:
            x = r10["seconds"] / b10["seconds"]
            c_r, c_b = runs.min_cpu((ten, "release", lab)), runs.min_cpu((ten, "bare", None))
            goals.append(f"release at 10M {x:.2f}x the bare query (goal <= 2): {'met' if x <= 2 else 'not met'}"
                         + (f" (cpu {c_r / c_b:.2f}x)" if c_r and c_b else ""))
            st = r10.get("stages", {})
            if "ingest" in st and d10 and d10["ok"] and "query_s" in d10["child"]:
                y = st["ingest"] / d10["child"]["query_s"]
                goals.append(f"reading + de-duplicating {y:.2f}x DuckDB's DISTINCT + join + GROUP BY in-process "
                             f"(goal <= 1.3): {'met' if y <= 1.3 else 'not met'}")
            if "audit + report" in st:
                z = st["audit + report"] / r10["seconds"]
                goals.append(f"audit and report {100 * z:.0f}% of the release at 10M (goal <= 20%): "
                             f"{'met' if z <= 0.2 else 'not met'}")
        dm = runs.best(("demo", "demo", lab))
        if dm and dm["ok"]:
            goals.append(f"demo town {dm['seconds']:.2f} s as a whole process (goal <= 1.5 s, absolute: on this "
                         f"loaded machine): {'met' if dm['seconds'] <= 1.5 else 'not met'}")
        hundred = size_label(10**8)
        b100, r100 = runs.best((hundred, "bare", None)), runs.best((hundred, "release", lab))
        if b100 and r100 and b100["ok"] and r100["ok"]:
            x = r100["seconds"] / b100["seconds"]
            pk = runs.peak((hundred, "release", lab))
            c_r, c_b = runs.min_cpu((hundred, "release", lab)), runs.min_cpu((hundred, "bare", None))
            goals.append(f"100M: peak {_fmt_mb(pk)} (goal < 4 GB): {'met' if pk < 4096 else 'not met'}; "
                         f"{x:.2f}x the bare query (goal <= 2): {'met' if x <= 2 else 'not met'}"
                         + (f" (cpu {c_r / c_b:.2f}x)" if c_r and c_b else ""))
        if f"release {lab}" in exps:
            goals.append(f"exponent once fixed costs are subtracted (fit a + b m^k): wall {exps[f'release {lab}']:.2f}"
                         + (f", cpu {exps[f'release {lab} cpu']:.2f}" if f"release {lab} cpu" in exps else "")
                         + (f", contact stages alone {exps[f'release {lab} contact stages']:.2f}"
                            if f"release {lab} contact stages" in exps else "")
                         + (f"; the same work at every size (no triangle count at 1M): wall "
                            f"{exps[f'release {lab} same work']:.2f}"
                            + (f", cpu {exps[f'release {lab} same work cpu']:.2f}"
                               if f"release {lab} same work cpu" in exps else "")
                            if f"release {lab} same work" in exps else "") + " (goal: linear, 1)")
        L.append(f"{lab}:")
        L.extend(f"  - {g}" for g in goals or ["(nothing measured)"])
    L.append("")

    # ---- every run
    L.append("## every run (seconds, in run order; * = failed)")
    L.append("")
    for (scen, rname, lab), rs in runs.runs.items():
        L.append(f"{scen:>6} {rname:<9} {lab or 'shared':<7} "
                 + "  ".join(f"{r['seconds']:.2f}" + ("" if r["ok"] else "*")
                             + (f" (cpu {r['cpu_s']:.1f})" if r.get("cpu_s") is not None else "") for r in rs)
                 + "   peak " + _fmt_mb(runs.peak((scen, rname, lab))))
    return "\n".join(L) + "\n"


if __name__ == "__main__":
    sys.exit(main())
