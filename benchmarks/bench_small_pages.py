"""numpy's huge-page advice and the release's time: on, off during the post-processing and audit, off throughout.

On Linux numpy asks the kernel for transparent huge pages for arrays of 4 MiB or more; with the kernel's
``defrag = madvise`` each such allocation may first compact memory. ``aggpub.pages.small_pages``
switches the advice off while the post-processing and the audit with its report run. This script times whole ``aggpub release``
processes three ways, interleaved:

``on``      the advice left on (``small_pages`` replaced by a no-op where the release uses it)
``audit``   the default: off during the post-processing and the audit with its report
``off``     off for the whole process (``NUMPY_MADVISE_HUGEPAGE=0``, and ``small_pages`` a no-op)

(Until 448d9af the default switched it off around the audit alone; ``results/small-pages-2026-12-03.txt``
was measured then.)

and prints the minimum and median wall time, the median system time and the largest peak (``ru_maxrss``)
of each. The kernel's settings are printed too: the effect depends on them and on how fragmented the
machine's memory is at the time (other jobs), so compare the ways within one run.

Usage::

    .venv/bin/python benchmarks/bench_small_pages.py --repeat 5 -- \\
        --policy <grp>/policy_grp.toml --edges <grp>/contacts_grp_10M.parquet \\
        --nodes <grp>/people_grp_10M.parquet
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _procs import child_env, run_child  # noqa: E402

CHILD = ("import sys, contextlib\n"
         "if sys.argv.pop(1) != 'audit':\n"
         "    import aggpub.audit.run as r, aggpub.released as p\n"
         "    r.small_pages = p.small_pages = contextlib.nullcontext\n"
         "from aggpub import cli; sys.argv[0] = 'aggpub'; cli.run()\n")


def run_once(python: str, way: str, release_args: list, out: Path) -> tuple:
    """One release the given way: (wall seconds, user seconds, system seconds, peak GB)."""
    env = child_env()
    if way == "off":
        env["NUMPY_MADVISE_HUGEPAGE"] = "0"
    else:
        env.pop("NUMPY_MADVISE_HUGEPAGE", None)
    cmd = [python, "-c", CHILD, way, "release", *release_args, "--out", str(out), "--overwrite", "--quiet"]
    wall, maxrss_mb, _, code, _, err = run_child(cmd, env=env, cwd=out.parent)
    if code != 0:
        raise SystemExit(f"release failed ({code}): {' '.join(cmd)}\n{err}")
    system = run_child.system_seconds
    return wall, run_child.cpu_seconds - system, system, maxrss_mb / 1024


def kernel_setting(name: str) -> str:
    try:
        return Path(f"/sys/kernel/mm/transparent_hugepage/{name}").read_text().strip()
    except OSError:
        return "unknown"


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--python", default=sys.executable)
    ap.add_argument("release_args", nargs=argparse.REMAINDER, help="-- then aggpub release's --policy/--edges/--nodes")
    args = ap.parse_args(argv)
    release_args = [a for a in args.release_args if a != "--"]
    print(f"transparent huge pages: enabled {kernel_setting('enabled')}; defrag {kernel_setting('defrag')}")
    runs = {"on": [], "audit": [], "off": []}
    with tempfile.TemporaryDirectory(prefix="aggpub-pages-") as tmp:
        for i in range(args.repeat):
            for way in runs:
                r = run_once(args.python, way, release_args, Path(tmp) / "bundle")
                runs[way].append(r)
                print(f"run {i + 1} {way:>5}: {r[0]:6.2f} s wall, {r[1]:5.2f} s user, {r[2]:5.2f} s system, "
                      f"peak {r[3]:.2f} GB", flush=True)
    print()
    for way, rs in runs.items():
        walls = [r[0] for r in rs]
        print(f"{way:>5}: wall min {min(walls):.2f} s, median {statistics.median(walls):.2f} s; system median "
              f"{statistics.median(r[2] for r in rs):.2f} s; peak max {max(r[3] for r in rs):.2f} GB")


if __name__ == "__main__":
    main()
