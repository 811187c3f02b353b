"""What the contact views cost at scale (issue 13): the same release with and without its default views.

On the generated graph of ``gen_graph.py`` (default 10M edges, 1M people, attributes ``region`` (40 values)
and ``band`` (50 values), about 2,000 supernodes), it times, each in its own subprocess so that every run
starts cold and alternating the variants so that machine load hits both:

``duckdb``          the bare DuckDB GROUP BY of the true supernode-pair counts (the baseline of issue 6:
                    dedupe the contacts, join both ends, GROUP BY the pair of attribute cells)
``release``         ``aggpub release`` of the benchmark policy, whose default now includes a view of each
                    grouping attribute (``contact_views:region``, ``contact_views:band``), with its audit
``release-noviews`` the same with ``[components.contact_views] enabled = false``

and reports the stage times from the progress lines (``counting contact views`` ... its noise, and the
audit's view section). Quote ratios against the same run's baseline (shared, noisy machines).

Usage::

    python benchmarks/bench_views_cost.py [--size 10M] [--repeats 2] [--memory-limit 2500MB]
"""

from __future__ import annotations

import argparse
import re
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from bench_scale import BARE_DUCKDB  # noqa: E402
from gen_graph import POLICY, generate, parse_size, size_label  # noqa: E402

NO_VIEWS = POLICY + "\n[components.contact_views]\nenabled = false\n"


def _run(cmd, env=None):
    t = time.perf_counter()
    res = subprocess.run(cmd, capture_output=True, text=True, env=env)
    took = time.perf_counter() - t
    if res.returncode != 0:
        raise RuntimeError(f"{cmd[:3]} failed ({res.returncode}): {res.stderr[-2000:]}")
    return took, res.stdout + res.stderr


#: Progress lines (their start) -> stage name; a stage lasts until the next progress line.
STAGES = (("reading edges", "ingest"), ("grouping people", "grouping"), ("counting superedges", "count superedges"),
          ("adding noise to 2,", "noise superedges"), ("counting contact views", "count views"),
          ("adding noise to 2 contact", "noise views, manifest, gate"), ("auditing the release", "audit start"),
          ("audit: degree", "audit degrees"), ("audit: query", "audit workloads"), ("audit: 3 fresh", "audit MC"),
          ("audit: contact views", "audit views"), ("audit: structure", "audit structure"),
          ("drawing the figures", "report"), ("confidential report written", "report written"),
          ("writing bundle", "bundle"))


def _stages(log: str) -> dict:
    """Seconds between progress lines (the Progress printer stamps each line with its elapsed time)."""
    stamps = [(float(m.group(1)), m.group(2)) for m in re.finditer(r"^\[\s*([\d.]+)s\]\s*(.*)$", log, flags=re.M)]
    out = {}
    for (t0, what), (t1, _) in zip(stamps, stamps[1:]):
        for pattern, key in STAGES:
            if what.startswith(pattern):
                out[key] = out.get(key, 0.0) + (t1 - t0)
                break
    if not ("adding noise to 2 contact" in log):  # without views the gate follows the superedges' noise
        pass
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", default="10M")
    ap.add_argument("--repeats", type=int, default=2)
    ap.add_argument("--data", type=Path, default=HERE.parent / "bench-data")
    ap.add_argument("--memory-limit", default="")
    args = ap.parse_args(argv)
    m = parse_size(args.size)
    edges, people = generate(args.data / size_label(m), m)
    exe = str(Path(sys.executable).with_name("aggpub"))
    results = {"duckdb": [], "release": [], "release-noviews": []}
    stages = {"release": [], "release-noviews": []}
    with tempfile.TemporaryDirectory(dir=args.data) as tmp:
        tmp = Path(tmp)
        (tmp / "views.toml").write_text(POLICY, encoding="utf-8")
        (tmp / "noviews.toml").write_text(NO_VIEWS, encoding="utf-8")
        for r in range(args.repeats):
            took, _ = _run([sys.executable, "-c", BARE_DUCKDB, str(edges), str(people), args.memory_limit,
                            str(tmp / "spill")])
            results["duckdb"].append(took)
            for name, pol in (("release", "views.toml"), ("release-noviews", "noviews.toml")):
                out = tmp / f"{name}-{r}"
                cmd = [exe, "release", "--policy", str(tmp / pol), "--edges", str(edges), "--nodes", str(people),
                       "--out", str(out), "--seed", "1"]
                if args.memory_limit:
                    cmd += ["--memory-limit", args.memory_limit]
                took, log = _run(cmd)
                results[name].append(took)
                stages[name].append(_stages(log))
            print(f"repeat {r + 1}: " + ", ".join(f"{k} {v[-1]:.1f}s" for k, v in results.items()), flush=True)
    base = min(results["duckdb"])
    print(f"\n{size_label(m)} edges, {max(100, m // 10):,} people; best of {args.repeats} (seconds, x bare DuckDB)")
    for name, times in results.items():
        print(f"  {name:16s} {min(times):7.1f}  {min(times) / base:5.2f}x")
    added = min(results["release"]) - min(results["release-noviews"])
    print(f"  views add {added:.1f} s to the whole release ({added / base:.2f}x the bare GROUP BY)")
    print("  stages (best of runs, seconds):      with views   without")
    for _, key in STAGES:
        a = [s.get(key) for s in stages["release"] if s.get(key) is not None]
        b = [s.get(key) for s in stages["release-noviews"] if s.get(key) is not None]
        if a or b:
            print(f"    {key:32s} {min(a) if a else float('nan'):10.1f} {min(b) if b else float('nan'):9.1f}")


if __name__ == "__main__":
    main()
