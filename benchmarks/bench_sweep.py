"""Benchmark: the trade-off sweep against one release of the same input, in the same run.

Writes the invented demo town (default 30,000 residents) and its policy to a temporary
folder, then times, interleaved:

* one release as ``aggpub release`` runs it (``aggpub.run_release``: read, group, count,
  noise, audit, confidential report, bundle), and
* one sweep over an epsilon x min_size grid (``aggpub.sweep.run_sweep`` from the same files,
  plus writing its folder).

The figure of merit is the sweep's time per grid point divided by one release's time:
below 1 means a grid point costs less than a release, because the truth is computed
once per grouping.

Run:  /work/venv/bin/python benchmarks/bench_sweep.py [--people 30000] [--epsilons 0.25,0.5,1,2]
      [--min-sizes 10,20,40] [--draws 3] [--repeat 2]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

from aggpub.demo import write_demo_inputs
from aggpub.pipeline import run_release
from aggpub.sweep import parse_grid, run_sweep, write_sweep


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--people", type=int, default=30_000)
    ap.add_argument("--epsilons", default="0.25,0.5,1,2")
    ap.add_argument("--min-sizes", default="10,20,40")
    ap.add_argument("--draws", type=int, default=3)
    ap.add_argument("--repeat", type=int, default=2)
    args = ap.parse_args()
    eps = parse_grid(args.epsilons, float, "--epsilons")
    ks = parse_grid(args.min_sizes, int, "--min-sizes")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        paths = write_demo_inputs(tmp / "in", n_people=args.people)
        rel_t, sw_t = [], []
        for r in range(args.repeat):
            t0 = time.perf_counter()
            run_release(paths["policy"], paths["edges"], paths["people"], tmp / f"bundle{r}", seed=r,
                        report=tmp / f"report{r}")
            rel_t.append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            res = run_sweep(paths["policy"], paths["edges"], paths["people"], epsilons=eps, min_sizes=ks,
                            draws=args.draws, seed=r)
            write_sweep(res, tmp / f"sweep{r}")
            sw_t.append(time.perf_counter() - t0)
        points = len(eps) * len(ks)
        rel, sw = min(rel_t), min(sw_t)
        print(f"demo town: {args.people:,} residents; grid {len(eps)} epsilons x {len(ks)} min sizes = {points} "
              f"points, {args.draws} noise draws each")
        print(f"one release (aggpub release path, with audit): best {rel:.2f} s of {args.repeat}")
        print(f"one sweep ({points} points, written): best {sw:.2f} s of {args.repeat}  "
              f"(truth {res.timings['truth_seconds']:.2f} s for {res.timings['groupings']} groupings, noise and "
              f"metrics {res.timings['noise_and_metrics_seconds']:.2f} s)")
        print(f"sweep / release: {sw / rel:.2f}x for the whole grid; per grid point {sw / points / rel:.3f}x "
              f"of a release")


if __name__ == "__main__":
    main()
