"""Whole ``aggpub release`` runs (audit and report included) on every real network and the demo town.

For each network of ``benchmarks/fidelity.py`` (the six real contact and social networks under
``../shared/real-networks``, skipped when absent, and the invented demo town), the plainest
policy (attribute grouping on the network's attributes, unit edge, epsilon 1, min_size 10 under
500 people and 20 above) is released by one or two installations (``--python-before``), as whole
processes, interleaved run by run; the table gives each one's minimum and median wall time and
median CPU time (the child and its helper together), and the ratio of the medians. These are the
releases where the audit's structure section (synthetic networks from both sides and the true
network's figures) is most of the work.

Usage (from the repository)::

    python benchmarks/bench_real_releases.py --repeat 6
    python benchmarks/bench_real_releases.py --python-before /path/to/other/venv/bin/python --repeat 6 \\
        --out benchmarks/results/real-releases-<date>.txt
"""

from __future__ import annotations

import argparse
import datetime
import json
import os
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from _procs import child_env, run_child  # noqa: E402
from bench_scale import WRITE_DEMO  # noqa: E402  (writes the demo town's inputs with each installation's own module)
from fidelity import NETWORKS, REAL, min_size_rule  # noqa: E402


def real_inputs(name: str, work: Path):
    """``(contacts.csv, people.csv, policy.toml)`` of a real network (the policy written into ``work``), or None."""
    folder, attrs = NETWORKS[name]
    d = REAL / folder
    if not (d / "people.csv").is_file():
        return None
    n_people = sum(1 for _ in open(d / "people.csv", encoding="utf-8")) - 1
    policy = work / f"policy-{name}.toml"
    policy.write_text(
        '[privacy]\nunit = "edge"\nepsilon = 1.0\n\n[grouping]\nmethod = "attributes"\n'
        f"attributes = {json.dumps(list(attrs))}\n"  # a JSON list of strings is a TOML array
        f"min_size = {min_size_rule(n_people)}\n\n"
        '[input]\nsource = "source"\ntarget = "target"\nnode = "node"\n', encoding="utf-8")
    return d / "contacts.csv", d / "people.csv", policy


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="whole aggpub releases of the real networks and the demo town")
    ap.add_argument("--python", default=sys.executable, help="Python of the installation called 'after'")
    ap.add_argument("--python-before", default=None, help="Python of a second installation, called 'before'")
    ap.add_argument("--repeat", type=int, default=4, help="interleaved runs of every row")
    ap.add_argument("--networks", default=",".join(NETWORKS), help="comma-separated names (default: all)")
    ap.add_argument("--out", type=Path, help="also write the report to this file")
    args = ap.parse_args(argv)

    installs = ([("before", args.python_before)] if args.python_before else []) + [("after", args.python)]
    names = [n.strip() for n in args.networks.split(",") if n.strip()]
    unknown = sorted(set(names) - set(NETWORKS))
    if unknown:
        ap.error(f"unknown network(s) {unknown}; known: {', '.join(NETWORKS)}")
    started = datetime.datetime.now().astimezone()
    load_start = os.getloadavg()
    work = Path(tempfile.mkdtemp(prefix="aggpub-bench-real-"))  # children run here, outside any checkout
    inputs, skipped = {}, []
    for name in names:
        if name == "town":
            for lab, py in installs:
                d = work / f"town-{lab}"
                subprocess.run([py, "-c", WRITE_DEMO, str(d)], check=True, cwd=work, env=child_env())
                inputs[(name, lab)] = (d / "contacts.csv", d / "people.csv", d / "policy.toml")
            continue
        found = real_inputs(name, work)
        if found is None:
            skipped.append(name)
            continue
        for lab, _ in installs:
            inputs[(name, lab)] = found
    runs: dict = {}
    for rep in range(args.repeat + 1):  # the first round is an untimed warm-up (bytecode, file cache)
        order = installs if rep % 2 == 0 else installs[::-1]
        for name in names:
            for lab, py in order:
                if (name, lab) not in inputs:
                    continue
                edges, people, policy = inputs[(name, lab)]
                out = work / f"out-{name}-{lab}"
                cmd = [py, "-m", "aggpub", "release", "--policy", str(policy), "--edges", str(edges),
                       "--nodes", str(people), "--out", str(out), "--overwrite", "--quiet"]
                seconds, _, _, code, _, stderr = run_child(cmd, cwd=work)
                if code != 0:
                    print(f"{name} {lab}: failed ({code}): {stderr.strip()[-300:]}", file=sys.stderr)
                    return 1
                if rep:
                    runs.setdefault((name, lab), []).append((seconds, run_child.cpu_seconds))
                    print(f"  {name:<11} {lab:<7} {seconds:6.2f} s  cpu {run_child.cpu_seconds:6.2f} s",
                          file=sys.stderr, flush=True)

    lines = [f"# whole `aggpub release` of the real networks and the demo town, {started:%Y-%m-%d %H:%M %Z}",
             "", f"command: {' '.join([Path(sys.argv[0]).name] + (argv if argv is not None else sys.argv[1:]))}",
             f"load average at the start: {load_start[0]:.2f}; {args.repeat} timed runs each, interleaved, "
             "after one untimed round", ""]
    for lab, py in installs:
        lines.append(f"{lab}: {py}")
    lines += ["", "| network | " + " | ".join(f"{lab}: wall min / median, cpu median" for lab, _ in installs)
              + (" | median after / before |" if len(installs) > 1 else " |"),
              "|---|" + "---|" * (len(installs) + (1 if len(installs) > 1 else 0))]
    for name in names:
        cells, medians = [], []
        for lab, _ in installs:
            xs = runs.get((name, lab))
            if not xs:
                cells.append("skipped")
                continue
            walls = [w for w, _ in xs]
            medians.append(statistics.median(walls))
            cells.append(f"{min(walls):.2f} / {statistics.median(walls):.2f} s, "
                         f"{statistics.median(c for _, c in xs):.2f} s")
        ratio = [f"{medians[-1] / medians[0]:.2f}"] if len(installs) > 1 and len(medians) == 2 else []
        lines.append(f"| {name} | " + " | ".join(cells + ratio) + " |")
    if skipped:
        lines += ["", f"skipped (folder absent): {', '.join(skipped)}"]
    text = "\n".join(lines) + "\n"
    print(text)
    if args.out:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text(text, encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
