"""Newton steps and time of the consistent-estimates projection over many noise draws of one table.

The release's post-processing (``aggpub.estimates.counts.consistent_counts``) projects the noisy superedge
counts onto non-negative cells with the best linear unbiased per-supernode totals. Its Newton iterations
depend on the noise drawn; a rare draw once made the line search crawl through all 100 steps (64 s on
2,001,000 cells instead of 0.6). This script re-draws the noise many times on the counts of a released
bundle (its clamped ``edge_count_unclamped`` stand in for true counts; the same mechanisms as the bundle's
manifest: the superedge counts' and the degree sequences' discrete Laplace), runs the projection on each,
and prints the distribution of its Newton steps and times, and every draw slower than ``--slow`` seconds.

Usage::

    .venv/bin/python -m aggpub release --policy <grp>/policy_grp.toml --edges <grp>/contacts_grp_10M.parquet \\
        --nodes <grp>/people_grp_10M.parquet --out /tmp/r10 --overwrite
    .venv/bin/python benchmarks/projection_steps.py --bundle /tmp/r10 --draws 120 --seed 1

The noise comes from ``aggpub.audit.draws.draw_noise`` (the same law as the release's, numpy's generator,
so a seed reproduces a draw).
"""

from __future__ import annotations

import argparse
import json
import statistics
import time
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq

from aggpub.audit.draws import draw_noise
from aggpub.estimates.counts import consistent_counts
from aggpub.noise.mechanisms import GeometricMechanism


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--bundle", type=Path, required=True, help="a full-table release with degree sequences")
    ap.add_argument("--draws", type=int, default=100)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--slow", type=float, default=3.0, help="list draws slower than this (seconds)")
    args = ap.parse_args(argv)
    manifest = json.loads((args.bundle / "manifest.json").read_text())
    mech = {c["name"]: c for c in manifest["components"] if "sensitivity" in c}
    se = pq.read_table(args.bundle / "superedges.parquet")
    sizes = pq.read_table(args.bundle / "supernodes.parquet").column("size").to_numpy().astype(np.int64)
    seq = pq.read_table(args.bundle / "degree_sequences.parquet")
    n = len(sizes)
    a = se.column("supernode_a").to_numpy().astype(np.int64)
    b = se.column("supernode_b").to_numpy().astype(np.int64)
    cap = se.column("possible_pairs").to_numpy().astype(np.int64)
    base = np.clip(se.column("edge_count_unclamped").to_numpy().astype(np.float64), 0, cap)
    group = seq.column("supernode").to_numpy().astype(np.int64)
    z_base = np.bincount(group, weights=seq.column("degree_noisy").to_numpy().astype(np.float64), minlength=n)
    ms = GeometricMechanism(mech["superedge_counts"]["epsilon"], mech["superedge_counts"]["sensitivity"])
    md = GeometricMechanism(mech["degree_sequences"]["epsilon"], mech["degree_sequences"]["sensitivity"])
    rng = np.random.default_rng(args.seed)
    steps, times = [], []
    print(f"{len(a):,} cells, {n:,} supernodes; superedge noise variance {ms.variance():.3g}, "
          f"degree noise variance {md.variance():.3g}; {args.draws} draws, seed {args.seed}")
    for i in range(args.draws):
        y = base + draw_noise(ms, len(base), rng)
        z = z_base + np.bincount(group, weights=draw_noise(md, len(group), rng), minlength=n)
        t0 = time.perf_counter()
        res = consistent_counts(y, sizes, ms.variance(), a, b, z=z, v_z=np.maximum(sizes, 1) * md.variance(),
                                cap=cap)
        dt = time.perf_counter() - t0
        steps.append(res.newton_steps)
        times.append(dt)
        if dt > args.slow:
            print(f"draw {i}: {dt:.2f} s, {res.newton_steps} Newton steps, largest total gap {res.max_violation:.3g}",
                  flush=True)
    counts = {s: steps.count(s) for s in sorted(set(steps))}
    print(f"Newton steps: {counts}; time median {statistics.median(times):.2f} s, max {max(times):.2f} s")


if __name__ == "__main__":
    main()
