"""Sparse vs dense release of superedge counts on a 10^7-cell table: time and peak memory, as ratios.

Usage::

    /work/venv/bin/python benchmarks/bench_sparse.py [--groups 4472] [--nonzero 100000] [--repeats 3]
    /work/venv/bin/python benchmarks/bench_sparse.py --sparse-only --groups 44721   # 10^9 cells

4,472 supernodes give 4472 * 4473 / 2 = 10,001,628 cells. The true table has
``--nonzero`` non-zero cells (default 100,000, 1% of the cells: each supernode
meets about 45 others) with geometric counts (mean 5). Both methods run the
release step exactly as the pipeline does, from the engine's list of non-zero
cells to the public Arrow table, with operating-system entropy:

* dense: ``components.dense_truth`` (scatter into all cells) and
  ``components.release_superedge_counts``;
* sparse: ``components.release_superedge_counts(..., sparse_threshold=t)`` on
  the non-zero cells only, ``t`` the default threshold.

Each (method, repeat) runs in a fresh Python process so the memory figures do
not mix: ``peak_traced`` is the tracemalloc peak (numpy buffers are traced)
and ``peak_rss`` the growth of the resident set's high-water mark
(``resource.getrusage``) over the process state just before the step.
Figures are medians over the repeats; quote the ratios (dense / sparse), which
do not depend on the machine's speed.
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys

CHILD = r"""
import json, resource, sys, time, tracemalloc
import numpy as np
from aggpub import released as comp
from aggpub.noise.sampler import SystemRandomSource
from aggpub.noise.sparse import default_threshold

method, n, nnz = sys.argv[1], int(sys.argv[2]), int(sys.argv[3])
n_cells = n * (n + 1) // 2
rng = np.random.default_rng(12345)          # benchmark data only; the noise uses os.urandom
flat = np.unique(rng.integers(0, n_cells, int(nnz * 1.05)))[:nnz]
rng.shuffle(flat)                             # the engine returns cells in no particular order
from aggpub.noise.sparse import flat_to_pair
nz_a, nz_b = flat_to_pair(flat, n)
nz_c = rng.geometric(0.2, len(flat)).astype(np.int64)
sizes = np.full(n, 45, dtype=np.int64)
eps, sens = 1.0, 1.0
src = SystemRandomSource()
src.uniform(16)                               # warm the entropy path
rss0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
tracemalloc.start()
t0 = time.perf_counter()
if method == "dense":
    st = comp.dense_truth(n, nz_a, nz_b, nz_c)
    table, spend, mech = comp.release_superedge_counts(st, sizes, eps, sens, src)
    threshold = None
else:
    threshold = default_threshold(n_cells, n, -eps / sens)
    st = comp.SuperedgeTruth(a=nz_a, b=nz_b, count=nz_c, complete=False)
    table, spend, mech = comp.release_superedge_counts(st, sizes, eps, sens, src,
                                                       sparse_threshold=threshold, n_groups=n)
elapsed = time.perf_counter() - t0
_, peak = tracemalloc.get_traced_memory()
tracemalloc.stop()
rss1 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(json.dumps({"method": method, "seconds": elapsed, "peak_traced_mib": peak / 2**20,
                  "peak_rss_mib": (rss1 - rss0) / 1024, "rows": table.num_rows, "cells": n_cells,
                  "threshold": threshold}))
"""


def run_one(method: str, groups: int, nonzero: int) -> dict:
    res = subprocess.run([sys.executable, "-c", CHILD, method, str(groups), str(nonzero)], capture_output=True,
                         text=True, check=True)
    return json.loads(res.stdout.strip().splitlines()[-1])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--groups", type=int, default=4472, help="supernodes (default 4472: 10,001,628 cells)")
    ap.add_argument("--nonzero", type=int, default=100_000, help="non-zero true cells (default 100000)")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--sparse-only", action="store_true",
                    help="time the sparse path alone (for tables too large for the dense one)")
    args = ap.parse_args(argv)
    methods = ("sparse",) if args.sparse_only else ("sparse", "dense")
    results = {m: [] for m in methods}
    for _ in range(args.repeats):
        for method in methods:  # interleaved, so load changes hit both
            results[method].append(run_one(method, args.groups, args.nonzero))
    if args.sparse_only:
        r = results["sparse"]
        print(f"sparse only: {args.groups:,} supernodes, {r[0]['cells']:,} cells, {args.nonzero:,} non-zero, "
              f"threshold {r[0]['threshold']}: median {statistics.median(x['seconds'] for x in r):.3f} s, "
              f"peak traced {statistics.median(x['peak_traced_mib'] for x in r):.1f} MiB, "
              f"{statistics.median(x['rows'] for x in r):,.0f} rows")
        return 0
    summary = {}
    for method, runs in results.items():
        summary[method] = {k: statistics.median(r[k] for r in runs)
                           for k in ("seconds", "peak_traced_mib", "peak_rss_mib", "rows")}
    d, s = summary["dense"], summary["sparse"]
    cells = results["dense"][0]["cells"]
    print(f"table: {args.groups:,} supernodes, {cells:,} cells, {args.nonzero:,} non-zero; "
          f"sparse threshold {results['sparse'][0]['threshold']}; median of {args.repeats} runs")
    print(f"{'':8}{'seconds':>10}{'peak traced MiB':>18}{'peak RSS MiB':>15}{'rows':>12}")
    for name, m in (("dense", d), ("sparse", s)):
        print(f"{name:8}{m['seconds']:>10.3f}{m['peak_traced_mib']:>18.1f}{m['peak_rss_mib']:>15.1f}"
              f"{int(m['rows']):>12,}")
    print(f"ratios dense/sparse: time {d['seconds'] / s['seconds']:.1f}x, "
          f"traced memory {d['peak_traced_mib'] / s['peak_traced_mib']:.1f}x, "
          f"RSS growth {d['peak_rss_mib'] / max(s['peak_rss_mib'], 0.1):.1f}x, "
          f"rows {d['rows'] / s['rows']:.1f}x")
    print(json.dumps({"summary": summary, "runs": results}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
