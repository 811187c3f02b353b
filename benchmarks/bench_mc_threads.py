"""The audit's Monte Carlo on one thread or two: which is faster, by table size (whole releases).

``aggpub.audit.draws.map_draws`` runs the Monte Carlo's fresh noise draws on two worker threads up to
``MC_PARALLEL_MAX_CELLS`` cells and one at a time above. This script measures both ways on the same
inputs, as whole ``aggpub release`` processes: each child sets the constant before running the command
(two threads: the limit raised past the table; one: lowered to 0), nothing else changes. The Monte
Carlo's phase is read from the child's progress lines, stamped as they arrive (the lines' own times have a
tenth of a second): from "fresh noise draws" to the next progress line (the contact views, or the
structure section, whichever comes first), which also holds the workloads' error figures and the wait for
the views section on its own thread -- what the release waits for.

Usage::

    .venv/bin/python benchmarks/bench_mc_threads.py --repeat 3 \\
        --case 10M:<grp>/policy_grp.toml:<grp>/contacts_grp_10M.parquet:<grp>/people_grp_10M.parquet \\
        --case demo:<demo>/policy.toml:<demo>/contacts.csv:<demo>/people.csv

Mid-sized tables for the same 1M contacts: ``--coarsen K`` adds, for every case whose people file has the
benchmark's ``grp`` attribute, a case ``<name>/K`` with ``grp`` folded onto ``K`` values (the ``i``-th value
in sorted order becomes ``h{i mod K}``; a copy of the people file and of the policy in a scratch folder),
so ``K (K + 1) / 2`` cells.

Each case runs ``--repeat`` times in both ways, interleaved; the minimum of each is printed with every
run. Quote the ratio: the machines are shared and noisy.
"""

from __future__ import annotations

import argparse
import re
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _procs import child_env  # noqa: E402

CHILD = ("import sys; import aggpub.audit.draws as d; d.MC_PARALLEL_MAX_CELLS = int(sys.argv.pop(1)); "
         "from aggpub import cli; sys.argv[0] = 'aggpub'; cli.run()")


def run_once(python: str, limit: int, policy: str, edges: str, nodes: str, out: Path) -> dict:
    """One release; the stamped progress lines give the Monte Carlo phase."""
    cmd = [python, "-c", CHILD, str(limit), "release", "--policy", policy, "--edges", edges, "--nodes", nodes,
           "--out", str(out), "--overwrite"]
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, env=child_env(),
                            cwd=out.parent)
    stamped = []

    def read():
        for line in proc.stderr:
            stamped.append((time.perf_counter() - t0, line.strip()))

    reader = threading.Thread(target=read)
    reader.start()
    proc.wait()
    reader.join()
    wall = time.perf_counter() - t0
    if proc.returncode:
        raise SystemExit(f"release failed ({proc.returncode}): {' '.join(cmd)}\n" + "\n".join(s for _, s in stamped))
    start = next(i for i, (_, s) in enumerate(stamped) if "fresh noise draws" in s)
    draws = int(re.search(r"audit: (\d+) fresh noise draws", stamped[start][1]).group(1))
    end = next(i for i in range(start + 1, len(stamped)) if stamped[i][1].startswith("progress:"))
    cells = re.search(r"adding noise to ([\d,]+) superedge cells", "\n".join(s for _, s in stamped))
    return {"wall": wall, "mc": stamped[end][0] - stamped[start][0], "draws": draws,
            "cells": int(cells.group(1).replace(",", "")) if cells else None}


def coarsened(name: str, policy: str, nodes: str, k: int, folder: Path) -> tuple:
    """A case with ``grp`` folded onto ``k`` values (see the module docstring)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    people = pq.read_table(nodes)
    values = people.column("grp").to_pylist()
    code = {v: i for i, v in enumerate(sorted(set(values)))}
    people = people.set_column(people.schema.get_field_index("grp"), "grp",
                               pa.array([f"h{code[v] % k}" for v in values]))
    new_nodes, new_policy = folder / f"people_{name}_{k}.parquet", folder / f"policy_{name}_{k}.toml"
    pq.write_table(people, new_nodes)
    new_policy.write_text(Path(policy).read_text())
    return f"{name}/{k}", str(new_policy), str(new_nodes)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--case", action="append", required=True, help="name:policy:edges:nodes (repeatable)")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--python", default=sys.executable)
    ap.add_argument("--coarsen", default="", help="comma-separated K: add cases with grp folded onto K values")
    args = ap.parse_args(argv)
    print(f"{'case':>8} {'cells':>10} {'draws':>5} {'MC 2 threads':>13} {'MC 1 thread':>12} {'1/2':>6} "
          f"{'whole 2':>8} {'whole 1':>8}  every run (MC phase s, 2 threads | 1 thread)")
    with tempfile.TemporaryDirectory(prefix="aggpub-mc-") as tmp:
        cases = []
        for case in args.case:
            name, policy, edges, nodes = case.split(":")
            cases.append((name, policy, edges, nodes))
            if args.coarsen and nodes.endswith(".parquet"):
                for k in (int(x) for x in args.coarsen.split(",")):
                    cname, cpolicy, cnodes = coarsened(name, policy, nodes, k, Path(tmp))
                    cases.append((cname, cpolicy, edges, cnodes))
        for name, policy, edges, nodes in cases:
            runs = {2: [], 1: []}
            for _ in range(args.repeat):
                for threads, limit in ((2, 1 << 62), (1, 0)):
                    runs[threads].append(run_once(args.python, limit, policy, edges, nodes, Path(tmp) / "bundle"))
            best = {k: min(r["mc"] for r in v) for k, v in runs.items()}
            whole = {k: min(r["wall"] for r in v) for k, v in runs.items()}
            every = " ".join(f"{r['mc']:.2f}" for r in runs[2]) + " | " + " ".join(f"{r['mc']:.2f}" for r in runs[1])
            r0 = runs[2][0]
            print(f"{name:>8} {r0['cells'] or 0:>10,} {r0['draws']:>5} {best[2]:>12.2f}s {best[1]:>11.2f}s "
                  f"{best[1] / best[2]:>6.2f} {whole[2]:>7.2f}s {whole[1]:>7.2f}s  {every}")


if __name__ == "__main__":
    main()
