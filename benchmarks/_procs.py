"""Helpers shared by the whole-process benchmarks: run a child, read aggpub's progress lines.

:func:`run_child` runs one command in its own session and returns its wall time,
``ru_maxrss`` (from ``wait4``, the child itself) and the resident memory summed
over its process tree (sampled every 0.25 s from ``/proc``; counts a JVM
started by Spark). :func:`progress_lines` reads both progress formats aggpub
has printed on stderr, and :func:`release_stages` cuts a release's progress
into stages.
"""

from __future__ import annotations

import os
import re
import subprocess
import tempfile
import threading
import time
from pathlib import Path


def child_env() -> dict:
    """This environment without ``PYTHONDONTWRITEBYTECODE``: children cache their bytecode as a user's would.

    With it set (some sandboxes do), every child compiles aggpub's modules again (the
    editable install has no ``__pycache__`` otherwise), a cost no installed release pays.
    """
    env = dict(os.environ)
    env.pop("PYTHONDONTWRITEBYTECODE", None)
    return env


def _tree_rss_kb(pid: int) -> int:
    """Resident memory (kB) summed over a process and its descendants, from /proc."""
    total, stack, seen = 0, [pid], set()
    while stack:
        p = stack.pop()
        if p in seen:
            continue
        seen.add(p)
        try:
            with open(f"/proc/{p}/status") as fh:
                for line in fh:
                    if line.startswith("VmRSS:"):
                        total += int(line.split()[1])
                        break
            for task in os.listdir(f"/proc/{p}/task"):
                with open(f"/proc/{p}/task/{task}/children") as fh:
                    stack.extend(int(x) for x in fh.read().split())
        except (OSError, ValueError):
            continue
    return total


def _spill_bytes(folder) -> int:
    """Bytes in the engines' spill folders (``.aggpub-spill-*``) directly under ``folder``."""
    total = 0
    if folder is None:
        return 0
    for spill in Path(folder).glob(".aggpub-spill-*"):
        for root, _, files in os.walk(spill):
            for f in files:
                try:
                    total += os.path.getsize(os.path.join(root, f))
                except OSError:
                    pass
    return total


def run_child(cmd, *, timeout=None, env=None, spill_dir=None, cwd=None):
    """Run ``cmd``; return (seconds, ru_maxrss MB, sampled tree peak MB, exit code, stdout, stderr).

    Run a second installation's Python with ``cwd`` outside any checkout: ``python -c`` and
    ``python -m`` put the working folder first on ``sys.path``, so a child started in a
    checkout imports that checkout's ``aggpub``, whichever venv it belongs to.

    ``env`` defaults to :func:`child_env`. The child's CPU seconds (user + system, from ``wait4``)
    are kept in ``run_child.cpu_seconds``, the system part alone in ``run_child.system_seconds``. The exit code is ``"timeout"`` when the child was stopped
    after ``timeout`` seconds. With
    ``spill_dir``, the peak size of the spill folders there is kept in ``run_child.spill_peak_mb``.
    """
    out = tempfile.TemporaryFile()
    err = tempfile.TemporaryFile()
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=out, stderr=err, env=child_env() if env is None else env, cwd=cwd,
                            start_new_session=True)
    peak = [0]
    spill = [0]
    done = threading.Event()

    def sample():
        while not done.is_set():
            peak[0] = max(peak[0], _tree_rss_kb(proc.pid))
            if spill_dir is not None:
                spill[0] = max(spill[0], _spill_bytes(spill_dir))
            done.wait(0.25)

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    timed_out = False
    deadline = None if timeout is None else t0 + timeout
    while True:
        pid, status, usage = os.wait4(proc.pid, os.WNOHANG)
        if pid:
            break
        if deadline is not None and time.perf_counter() > deadline:
            timed_out = True
            os.killpg(proc.pid, 9)
            pid, status, usage = os.wait4(proc.pid, 0)
            break
        time.sleep(0.02)
    seconds = time.perf_counter() - t0
    done.set()
    sampler.join()
    proc.returncode = os.waitstatus_to_exitcode(status)
    try:  # leftover grandchildren (a JVM) of this session
        os.killpg(proc.pid, 9)
    except OSError:
        pass
    out.seek(0)
    err.seek(0)
    stdout, stderr = out.read().decode(errors="replace"), err.read().decode(errors="replace")
    code = "timeout" if timed_out else proc.returncode
    run_child.spill_peak_mb = spill[0] / 2**20
    # CPU seconds of the child and its waited-for descendants (user + system): steadier than wall time
    # on a loaded machine, though it counts DuckDB's threads all together
    run_child.cpu_seconds = usage.ru_utime + usage.ru_stime
    run_child.system_seconds = usage.ru_stime  # the kernel's share (page faults, compaction of memory)
    return seconds, usage.ru_maxrss / 1024, peak[0] / 1024, code, stdout, stderr


#: ``progress: <message> (<seconds> s in)`` (main from 2026-12-02) and ``[  <seconds>s] <message>`` (before).
_NEW_RE = re.compile(r"^progress: (.*) \(([\d.]+) s in\)$")
_OLD_RE = re.compile(r"^\[\s*([\d.]+)s\] (.*)$")
_CONFIDENTIAL_RE = re.compile(r"^CONFIDENTIAL \([^)]*\): ")


def progress_lines(stderr: str):
    """``[(seconds, message)]`` from a command's stderr, in either progress format.

    A ``CONFIDENTIAL (...):`` prefix (the ingest's true counts) is removed from the message.
    """
    lines = []
    for line in stderr.splitlines():
        m = _NEW_RE.match(line)
        if m:
            t, msg = float(m.group(2)), m.group(1)
        else:
            m = _OLD_RE.match(line)
            if not m:
                continue
            t, msg = float(m.group(1)), m.group(2)
        lines.append((t, _CONFIDENTIAL_RE.sub("", msg)))
    return lines


#: Progress messages that open a stage of ``aggpub release`` (prefix -> stage name), in pipeline order.
RELEASE_MARKERS = (
    ("reading edges", "ingest"),
    ("pre-flight", "pre-flight gate"),
    ("grouping people", "grouping"),
    ("counting superedges", "counting"),
    ("counting", "counting"),
    ("adding noise", "noise, manifest, gate metrics (main)"),
    ("auditing", "audit: true tables and workloads"),
    ("audit: degree distribution", "audit: degree distribution"),
    ("audit: query workloads", "audit: query workloads"),
    ("audit: contact views", "audit: contact views (researchers' contact matrices)"),
    ("audit: structure", "audit: structure (true and sampled networks)"),
    ("drawing the figures", "report: figures and files"),
    ("confidential report written", "report written to bundle start"),
    ("writing bundle", "bundle write"),
)
_INGEST_REPORT = re.compile(r"^(read|kept|collapsed|dropped|ignored|found) ")


def _stage_of(msg: str):
    if msg.startswith("audit: ") and "noise draws" in msg:
        return "audit: Monte Carlo and error figures"
    for prefix, name in RELEASE_MARKERS:
        if msg.startswith(prefix):
            return name
    return None


def release_stages(stderr: str) -> dict:
    """Seconds per stage of one ``aggpub release``, from its progress lines.

    A stage runs from the message that opens it to the message that opens the
    next one. ``ingest`` ends at its last report line ("read ... rows", "kept ...
    contacts", "collapsed ... duplicates"), and the time from there to the next
    stage is ``after ingest (set-up)``. The last stage (the bundle write) has no
    end time in the output and is left out; it is in the process's wall time.
    Derived totals: ``audit + report`` (from "auditing" to "writing bundle", or
    to the report when there is no bundle line) and ``audit`` (without the
    figures), the issue's two rows.
    """
    lines = progress_lines(stderr)
    opens = []  # (t, name, index)
    for i, (t, msg) in enumerate(lines):
        name = _stage_of(msg)
        if name is not None and (not opens or opens[-1][1] != name):
            opens.append((t, name, i))
    stages: dict[str, float] = {}
    for (t, name, i), (t_next, _, j) in zip(opens, opens[1:]):
        if name == "ingest":
            last = max((lines[k][0] for k in range(i + 1, j) if _INGEST_REPORT.match(lines[k][1])), default=None)
            if last is not None:
                stages["ingest"] = stages.get("ingest", 0.0) + (last - t)
                stages["after ingest (set-up)"] = stages.get("after ingest (set-up)", 0.0) + (t_next - last)
                continue
        stages[name] = stages.get(name, 0.0) + (t_next - t)
    times = {name: t for t, name, _ in opens}
    if "audit: true tables and workloads" in times:
        end = times.get("bundle write", times.get("report written to bundle start"))
        if end is not None:
            stages["audit + report"] = end - times["audit: true tables and workloads"]
        if "report: figures and files" in times:
            stages["audit"] = times["report: figures and files"] - times["audit: true tables and workloads"]
    if lines:
        stages["last progress line"] = lines[-1][0]
    return stages
