"""Benchmark: sampling synthetic networks from a release (aggpub.synthesis.sample_network).

Builds a public release-like table in memory (no private data involved: random sizes and
counts), samples about 10 million distinct contacts from it, and compares the time with
a baseline measured in the same run: numpy drawing the same number of random integer
pairs (``Generator.integers(0, n_people, size=(2, m))``, which makes no effort to keep
pairs distinct or inside cells). Figures are ratios against that baseline.

With ``--degree-corrected`` the release also carries consistent estimates and a sorted degree sequence
per supernode (Pareto-tailed degrees adding up to each supernode's contacts), so ``sample_network`` runs
the degree-corrected sampler (no triangle count: no affinity blocks); the uniform block sampler is then
timed on the same cells too.

Run:  /work/venv/bin/python benchmarks/bench_sample.py [--edges 10000000] [--supernodes 1000] [--repeat 3]
          [--degree-corrected]
"""

from __future__ import annotations

import argparse
import time
import types

import numpy as np
import pyarrow as pa

from aggpub import cells as comp
from aggpub.synthesis import sample_network


def make_release(n_supernodes: int, edges: int, dense_share: float, seed: int = 0, degree_corrected=False):
    rng = np.random.default_rng(seed)
    sizes = rng.integers(200, 4000, size=n_supernodes)
    a, b = comp.all_cells(n_supernodes)
    cap = comp.possible_pairs(sizes, a, b)
    counts = rng.poisson(edges * (1 - dense_share) / len(a), size=len(a))
    # a few cells asking for most of their pairs (the complement path)
    dense = rng.choice(np.flatnonzero(a == b), size=max(1, n_supernodes // 20), replace=False)
    want = edges * dense_share / len(dense)
    counts[dense] = np.minimum(cap[dense], (0.8 * cap[dense]).astype(np.int64))
    counts[dense] = np.minimum(counts[dense], int(want))
    counts = np.minimum(counts, cap)
    tables = {"supernodes": pa.table({"supernode": np.arange(n_supernodes), "size": sizes}),
              "superedges": pa.table({"supernode_a": a, "supernode_b": b, "edge_count": counts,
                                      "possible_pairs": cap, "noise_scale": np.ones(len(a))})}
    manifest = {}
    if degree_corrected:
        tables["superedges"] = tables["superedges"].append_column("edge_count_estimate",
                                                                  pa.array(counts.astype(np.float64)))
        group = np.repeat(np.arange(n_supernodes), sizes)
        totals = np.bincount(a, weights=counts, minlength=n_supernodes) + \
            np.bincount(b, weights=counts, minlength=n_supernodes)
        w = rng.pareto(2.5, len(group)) + 1.0
        order = np.lexsort((w, group))
        w = w[order]
        target = w * (totals / np.bincount(group, weights=w, minlength=n_supernodes))[group]
        starts = np.concatenate([[0], np.cumsum(sizes)[:-1]])
        tables["degree_sequences"] = pa.table({"supernode": group, "position": np.arange(len(group)) - starts[group],
                                               "degree_estimate": target})
        manifest = {"superedge_estimates": "benchmark"}
    return types.SimpleNamespace(tables=tables, manifest=manifest), int(sizes.sum()), int(counts.sum())


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--edges", type=int, default=10_000_000)
    ap.add_argument("--supernodes", type=int, default=1000)
    ap.add_argument("--dense-share", type=float, default=0.05, help="share of edges in near-full cells")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--degree-corrected", action="store_true", help="release with degree sequences (see above)")
    args = ap.parse_args()
    rel, n_people, m = make_release(args.supernodes, args.edges, args.dense_share,
                                    degree_corrected=args.degree_corrected)
    cells = rel.tables["superedges"].num_rows
    print(f"release: {args.supernodes:,} supernodes, {n_people:,} people, {cells:,} cells, {m:,} contacts")
    base_t, samp_t = [], []
    for r in range(args.repeat):  # interleaved, so machine load affects both alike
        rng = np.random.default_rng(r)
        t0 = time.perf_counter()
        rng.integers(0, n_people, size=(2, m))
        base_t.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        out = sample_network(rel, seed=r)
        samp_t.append(time.perf_counter() - t0)
        assert out.num_rows == m
    b, s = min(base_t), min(samp_t)
    kind = "degree-corrected" if args.degree_corrected else "uniform block"
    print(f"baseline numpy integers(2 x {m:,}): best {b:.3f} s")
    print(f"sample_network, {kind} ({m:,} distinct contacts): best {s:.3f} s  (median {np.median(samp_t):.3f} s)")
    print(f"ratio sample / baseline: {s / b:.1f}x   ({m / s / 1e6:.2f} M contacts/s)")
    if args.degree_corrected:
        from aggpub.synthesis import SynthesisInputs, draw_network, inputs_from_release

        inputs = inputs_from_release(rel)
        uniform = SynthesisInputs(**{**inputs.__dict__, "degrees": None, "sampler": "uniform_block"})
        t0 = time.perf_counter()
        draw_network(uniform, np.random.default_rng(0), 0.0)
        u = time.perf_counter() - t0
        print(f"uniform block sampler on the same cells: {u:.3f} s; degree-corrected / uniform {s / u:.1f}x")


if __name__ == "__main__":
    main()
