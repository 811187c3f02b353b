"""Where the time of one ``aggpub release`` goes: a sampling profile of the whole process, or cProfile.

Two ways, both on the same command line as ``aggpub release`` (everything after ``--``):

``--how spy`` (default)
    Runs ``python -m aggpub release ...`` under py-spy (``pip install py-spy`` into the
    venv: a developer tool, not an aggpub dependency) with ``--idle``, so the main thread
    is sampled while it waits in DuckDB or in a system call too, and the samples cover
    the whole process: interpreter start, imports, every stage, up to ``os._exit``.
    Printed: the phases (each sample goes to the heavy library being imported when an
    import is on its stack, else to the deepest aggpub module on it), then the
    functions with the most samples on their stack (inclusive) and as the leaf (self).
``--how cprofile``
    Runs ``aggpub.cli.main(argv)`` in this process under cProfile (the console script's
    ``os._exit`` would lose the profile; ``main`` returns normally) and prints the top of
    ``pstats`` by cumulative and by own time. Imports done before ``main`` (``aggpub.cli``
    itself) are outside it; interpreter start and exit too.

Usage::

    .venv/bin/python benchmarks/profile_release.py --how spy -- \\
        --policy bench-data/grp/policy_grp.toml --edges bench-data/grp/contacts_grp_10M.parquet \\
        --nodes bench-data/grp/people_grp_10M.parquet --out /tmp/prof-release --overwrite
    .venv/bin/python benchmarks/profile_release.py --how cprofile -- <the same>
"""

from __future__ import annotations

import argparse
import collections
import re
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _procs import child_env  # noqa: E402

FRAME_RE = re.compile(r"^(.*) \((.*?)(?::(\d+))?\)$")

#: aggpub modules -> phase (first match of the deepest aggpub frame's file).
PHASES = (
    ("aggpub/ingest", "ingest"), ("aggpub/engines", "engine (ingest, counting, degrees)"),
    ("aggpub/grouping", "grouping"), ("aggpub/released", "released components (counting, noise)"),
    ("aggpub/noise", "noise"), ("aggpub/budget", "budget"), ("aggpub/audit/report", "report: figures, HTML"),
    ("aggpub/audit/draws", "audit: Monte Carlo"), ("aggpub/audit/queries", "audit: query workloads"),
    ("aggpub/audit/network_stats", "audit: structure"), ("aggpub/audit/degrees", "audit: degrees"),
    ("aggpub/audit/truth", "audit: true tables"), ("aggpub/audit", "audit: other"),
    ("aggpub/estimates", "estimates"), ("aggpub/synthesis", "synthesis (sampled networks)"),
    ("aggpub/gate", "gate"), ("aggpub/bundle", "bundle write"), ("aggpub/outputs", "outputs"),
    ("aggpub/policy", "policy"), ("aggpub/pipeline", "pipeline (own code)"), ("aggpub/cli", "cli"),
    ("aggpub/", "aggpub other"),
)


def _frames(stack: str):
    out = []
    for f in stack.split(";"):
        m = FRAME_RE.match(f)
        out.append((m.group(1), m.group(2)) if m else (f, ""))
    return out


def _phase(frames) -> str:
    for i, (func, path) in enumerate(frames):
        if func == "_find_and_load":
            for func2, path2 in frames[i + 1:]:
                if func2 == "<module>" and not path2.startswith("aggpub/") and "frozen" not in path2:
                    return "import " + path2.split("/")[0].split(".")[0]
            continue
    deepest = None
    for func, path in frames:
        if path.startswith("aggpub/"):
            deepest = path
    if deepest is None:
        if frames and frames[0][0] in ("<module>", "_run_module_as_main"):
            return "interpreter (start-up, runpy)"
        return "other"
    for prefix, name in PHASES:
        if deepest.startswith(prefix):
            return name
    return "aggpub other"


PATH_OPTIONS = ("--policy", "--edges", "--nodes", "--out", "--report")


def _absolute(release_args):
    """The release options with every file or folder made absolute (py-spy runs it elsewhere)."""
    out = list(release_args)
    for i, a in enumerate(out[:-1]):
        if a in PATH_OPTIONS:
            out[i + 1] = str(Path(out[i + 1]).absolute())
    return out


def spy(py: str, release_args, rate: int, top: int):
    release_args = _absolute(release_args)
    tmp = Path(tempfile.mkdtemp(prefix="aggpub-prof-"))
    raw = tmp / "profile.raw"
    spy_bin = Path(py).parent / "py-spy"
    cmd = [str(spy_bin), "record", "--idle", "--threads", "--rate", str(rate), "--format", "raw", "-o", str(raw),
           "--", py, "-m", "aggpub", "release", *release_args, "--quiet"]
    print("$ " + " ".join(cmd))
    t = time.perf_counter()
    res = subprocess.run(cmd, capture_output=True, text=True, cwd=tmp, env=child_env())
    wall = time.perf_counter() - t
    if res.returncode or not raw.exists():
        print(res.stdout[-2000:], res.stderr[-2000:])
        raise SystemExit(1)
    stacks = []
    for line in raw.read_text().splitlines():
        stack, _, count = line.rpartition(" ")
        frames = _frames(stack)
        if frames and frames[0][0].startswith("thread"):
            frames = frames[1:]
        if not frames or frames[0][0] not in ("<module>", "_run_module_as_main"):
            continue  # not the main thread (the progress watcher)
        stacks.append((frames, int(count)))
    total = sum(c for _, c in stacks)
    print(f"wall {wall:.1f} s under py-spy (sampling slows the process a little); {total} samples of the main "
          f"thread at {rate} Hz = {total / rate:.1f} s\n")
    phases = collections.Counter()
    incl, own = collections.Counter(), collections.Counter()
    for frames, c in stacks:
        phases[_phase(frames)] += c
        seen = set()
        for func, path in frames:
            key = f"{func} ({re.sub(r'^.*site-packages/', '', path)})"
            if key not in seen:
                incl[key] += c
                seen.add(key)
        func, path = frames[-1]
        via = [f for f, p in frames if p.startswith("aggpub/")]
        own[f"{func} ({re.sub(r'^.*site-packages/', '', path)})" + (f" <- {via[-1]}" if via else "")] += c
    print("phases (seconds, share of the main thread's samples):")
    for name, c in phases.most_common():
        print(f"  {c / rate:7.2f} s {100 * c / total:5.1f}%  {name}")
    print(f"\ntop {top} functions by inclusive samples (on the stack):")
    for key, c in incl.most_common(top):
        print(f"  {c / rate:7.2f} s {100 * c / total:5.1f}%  {key}")
    print(f"\ntop {top} aggpub functions by inclusive samples:")
    for key, c in [(k, c) for k, c in incl.most_common() if "(aggpub/" in k and not k.startswith(
            ("<module>", "run (", "main (", "cmd_release ("))][:top]:
        print(f"  {c / rate:7.2f} s {100 * c / total:5.1f}%  {key}")
    print(f"\ntop {top} functions by own samples (leaf of the stack; <- the deepest aggpub function above it):")
    for key, c in own.most_common(top):
        print(f"  {c / rate:7.2f} s {100 * c / total:5.1f}%  {key}")
    shutil.rmtree(tmp, ignore_errors=True)


def cprofile(release_args, top: int):
    import cProfile
    import io
    import pstats

    t = time.perf_counter()
    from aggpub import cli

    t_import = time.perf_counter() - t
    prof = cProfile.Profile()
    t = time.perf_counter()
    prof.enable()
    code = cli.main(["release", *release_args, "--quiet"])
    prof.disable()
    wall = time.perf_counter() - t
    print(f"import aggpub.cli {t_import:.2f} s (outside the profile); cli.main {wall:.2f} s, exit code {code}\n")
    for key in ("cumulative", "tottime"):
        s = io.StringIO()
        pstats.Stats(prof, stream=s).strip_dirs().sort_stats(key).print_stats(top)
        text = s.getvalue()
        print(f"--- top {top} by {key}")
        print(text[text.index("ncalls"):] if "ncalls" in text else text)


def main(argv=None):
    argv = sys.argv[1:] if argv is None else argv
    if "--" not in argv:
        raise SystemExit("usage: profile_release.py [--how spy|cprofile] [--rate HZ] [--top N] -- <release options>")
    i = argv.index("--")
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--how", choices=("spy", "cprofile"), default="spy")
    ap.add_argument("--python", default=sys.executable, help="interpreter of the installation (spy only)")
    ap.add_argument("--rate", type=int, default=100, help="py-spy samples per second")
    ap.add_argument("--top", type=int, default=25)
    args = ap.parse_args(argv[:i])
    if args.how == "spy":
        spy(args.python, argv[i + 1:], args.rate, args.top)
    else:
        cprofile(argv[i + 1:], args.top)
    return 0


if __name__ == "__main__":
    sys.exit(main())
