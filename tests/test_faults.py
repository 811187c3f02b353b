"""Atomic outputs under faults (issue 7, item 3).

Faults injected: an exception in every stage of a release (in process, through
the CLI), a full disk (simulated by ``ENOSPC`` from the Parquet writer and the
file writer, and for real on a tiny tmpfs when the tests run as root), and the
process killed by ``SIGKILL`` at every step of the bundle write and at random
moments during repeated releases. After every fault there is either no bundle or
the previous one, byte-identical and verifying; never a partial bundle. A killed
writer can leave its ``.NAME.tmp-PID-RANDOM`` folder: ``check`` ignores it (with
a warning) and the next release to the same path removes it. With a lifetime
ledger, a release that drew noise is recorded exactly once whatever happens.
"""

from __future__ import annotations

import errno
import os
import random
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pyarrow.parquet as pq
import pytest

import aggpub.outputs as outputs_mod
import aggpub.bundle.write as write_mod
import aggpub.audit as audit_mod
import aggpub.audit.report as report_mod
import aggpub.ingest as ingest_mod
import aggpub.released as released_mod
import aggpub.pipeline as pipeline
from aggpub.bundle import check_bundle
from aggpub.outputs import stale_temp_siblings
from aggpub.cli import main
from aggpub.engines._duckdb import DuckDBEngine
from tests._badinput import MARK, POLICY_TEXT, Scenario, error_lines, no_plots, tree_snapshot


pytestmark = pytest.mark.usefixtures("no_plots")


def _siblings(target: Path) -> list[str]:
    """Every hidden sibling of the bundle (temporary folders of any writer)."""
    return sorted(p.name for p in target.parent.iterdir() if p.name.startswith(f".{target.name}."))


def _make_bundle(s: Scenario, seed=1) -> dict:
    assert main(s.argv() + ["--quiet", "--seed", str(seed)]) == 0
    assert check_bundle(s.out).ok
    return tree_snapshot(s.out)


def _boom(*a, **k):
    raise RuntimeError(f"injected fault {MARK}")


def _enospc(*a, **k):
    raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))


def _interrupt(*a, **k):
    raise KeyboardInterrupt


# (name, object, attribute, replacement, expected exit code)
STAGE_FAULTS = [
    ("ingest", ingest_mod, "load_network", _boom, 9),
    ("grouping", pipeline, "make_grouping", _boom, 9),
    ("counting", DuckDBEngine, "superedge_counts", _boom, 9),
    ("noise", released_mod, "release_superedge_counts", _boom, 9),
    ("audit", audit_mod, "audit_release", _boom, 9),
    ("report_write", report_mod, "write_report", _boom, 9),
    ("guide", pipeline, "render_guide", _boom, 9),
    ("parquet_write", pq, "write_table", _boom, 9),
    ("checksum", write_mod, "sha256_file", _boom, 9),
    ("manifest_write", write_mod, "write_synced", _boom, 9),
    ("fsync", write_mod, "fsync_path", _boom, 9),
    ("publish", write_mod, "publish_directory", _boom, 9),
    ("rename_exchange", outputs_mod, "_rename_exchange", _boom, 9),
    ("rename", os, "rename", _boom, 9),
    ("disk_full_parquet", pq, "write_table", _enospc, 7),
    ("disk_full_manifest", write_mod, "write_synced", _enospc, 7),
    ("disk_full_checksum_read", write_mod, "sha256_file", _enospc, 7),
    ("interrupt_during_write", pq, "write_table", _interrupt, 130),
    ("interrupt_during_counting", DuckDBEngine, "superedge_counts", _interrupt, 130),
]


# a new bundle is published by rename, a replacement by the exchange: each fault only on its own path
STAGE_CASES = [(f, o) for f in STAGE_FAULTS for o in (False, True)
               if not (f[0] == "rename_exchange" and not o) and not (f[0] == "rename" and o)]


@pytest.mark.parametrize("fault,overwrite", STAGE_CASES,
                         ids=[f"{f[0]}-{'overwrite' if o else 'new'}" for f, o in STAGE_CASES])
def test_fault_in_a_stage(fault, overwrite, tmp_path, capsys, monkeypatch):
    name, obj, attr, repl, code = fault
    s = Scenario(tmp_path)
    old = _make_bundle(s) if overwrite else None
    if overwrite:
        s.extra.append("--overwrite")
    inputs = {p: tree_snapshot(p.parent)[p.name] for p in (s.edges, s.people, s.policy)}
    capsys.readouterr()
    monkeypatch.setattr(obj, attr, repl)
    rc = main(s.argv() + ["--seed", "2"])
    monkeypatch.undo()
    err = capsys.readouterr().err
    assert rc == code, err
    assert len(error_lines(err)) == 1 and "Traceback" not in err and MARK not in err
    if overwrite:
        assert tree_snapshot(s.out) == old, "the previous bundle changed"
        assert check_bundle(s.out).ok
    else:
        assert not s.out.exists(), "a bundle appeared after a failed release"
    assert _siblings(s.out) == [], "temporary folders left behind"
    assert {p: tree_snapshot(p.parent)[p.name] for p in (s.edges, s.people, s.policy)} == inputs


def test_fault_after_the_exchange_leaves_the_new_bundle(tmp_path, capsys):
    """An error after the atomic swap: the new bundle is in place and whole; no temp folder stays."""
    s = Scenario(tmp_path)
    _make_bundle(s)
    network = ingest_mod.load_network(s.edges, s.people, attributes=["age_band", "district"])
    release = pipeline.build_release(network, pipeline.read_policy(s.policy), seed=5)

    def fault(stage):
        if stage == "after exchange":
            raise OSError(errno.EIO, "injected")

    with pytest.raises(Exception):
        pipeline.publish(release, s.out, overwrite=True, _fault=fault)
    assert check_bundle(s.out).ok
    assert _siblings(s.out) == []


# --------------------------------------------------------------------------- a real full disk


def _mount_tmpfs(path: Path, size: str) -> bool:
    path.mkdir()
    if os.geteuid() != 0:
        return False
    return subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(path)],
                          capture_output=True).returncode == 0


def _fill(folder: Path) -> None:
    try:
        with open(folder / f"filler-{len(os.listdir(folder))}", "wb") as fh:
            while True:
                fh.write(b"\0" * 4096)
                fh.flush()
    except OSError:
        pass


def test_real_disk_full_on_tmpfs(tmp_path, capsys):
    """A 192 KB tmpfs: the old bundle fits, then the disk is filled and the overwrite must fail cleanly.
    (96 KB before issue 12's degree sequences and fidelity figures made a bundle and its report larger.)"""
    mnt = tmp_path / "small"
    if not _mount_tmpfs(mnt, "192k"):
        pytest.skip("cannot mount a tmpfs here (needs root)")
    try:
        s = Scenario(tmp_path / "case")
        s.out = mnt / "bundle"
        old = _make_bundle(s)
        _fill(mnt)
        capsys.readouterr()
        rc = main(s.argv() + ["--overwrite", "--seed", "9"])
        err = capsys.readouterr().err
        assert rc == 7, err
        assert "No space left" in error_lines(err)[0]
        assert tree_snapshot(s.out) == old and check_bundle(s.out).ok
        assert _siblings(s.out) == []
        for f in mnt.glob("filler-*"):
            f.unlink()
        # and a new bundle on a full disk: nothing appears
        _fill(mnt)
        s.out = mnt / "second"
        capsys.readouterr()
        assert main(s.argv() + ["--seed", "9"]) == 7
        assert not s.out.exists() and _siblings(s.out) == []
    finally:
        subprocess.run(["umount", str(mnt)], check=False)


# --------------------------------------------------------------------------- killed processes

KILLER = textwrap.dedent("""
    import os, signal, sys
    import aggpub.audit.report as r
    import aggpub.pipeline as p
    r._plots = lambda audit: {}  # skip the report's PNG figures (speed), as the in-process tests do
    policy, edges, people, out, stage, overwrite = sys.argv[1:7]
    real = p.write_bundle

    def write_bundle(*a, **k):
        def fault(name):
            if name == stage:
                os.kill(os.getpid(), signal.SIGKILL)
        k["_fault"] = fault
        return real(*a, **k)

    p.write_bundle = write_bundle
    p.run_release(policy, edges, people, out, seed=7, overwrite=overwrite == "1")
    print("finished without the fault")
""")


def _run_killer(s: Scenario, stage: str, overwrite: bool):
    return subprocess.run([sys.executable, "-c", KILLER, str(s.policy), str(s.edges), str(s.people),
                           str(s.out), stage, "1" if overwrite else "0"], capture_output=True, text=True,
                          timeout=120)


# (stage, overwrite): every step of a new write, and of a replacement including the instant after the
# atomic exchange (a new bundle is published by one rename, so it has no such step). These start a
# Python process each (a few seconds: most of it importing diffprivlib/scikit-learn).
KILL_CASES = [("wrote supernodes.parquet", False), ("before publish", False),
              ("wrote supernodes.parquet", True), ("wrote superedges.parquet", True), ("before publish", True),
              ("after exchange", True)]


@pytest.mark.heavy
@pytest.mark.parametrize("stage,overwrite", KILL_CASES,
                         ids=[f"{'overwrite' if o else 'new'}-{st}" for st, o in KILL_CASES])
def test_sigkill_during_write(stage, overwrite, tmp_path, capsys):
    s = Scenario(tmp_path)
    old = _make_bundle(s) if overwrite else None
    proc = _run_killer(s, stage, overwrite)
    assert proc.returncode == -signal.SIGKILL, proc.stderr
    if stage == "after exchange":
        assert check_bundle(s.out).ok and tree_snapshot(s.out) != old  # the new bundle, whole
    elif overwrite:
        assert tree_snapshot(s.out) == old and check_bundle(s.out).ok  # the old bundle, untouched
    else:
        assert not s.out.exists()  # no bundle at all
    stale = _siblings(s.out)
    assert len(stale) == 1 and stale[0].startswith(f".{s.out.name}.tmp-")
    if s.out.exists():
        res = check_bundle(s.out)
        assert res.ok and any(".tmp-" in w and "interrupted write" in w for w in res.warnings)
    # the next release to the same path removes the abandoned folder (--overwrite: the confidential
    # report of the killed run, written before the bundle, is already in place)
    s.extra.append("--overwrite")
    assert main(s.argv() + ["--quiet", "--seed", "8"]) == 0
    assert _siblings(s.out) == [] and check_bundle(s.out).ok


def test_live_writers_folder_is_kept(tmp_path):
    """A temp folder whose writer still runs (this process) is not treated as stale."""
    target = tmp_path / "bundle"
    live = tmp_path / f".bundle.tmp-{os.getpid()}-0123abcd"
    live.mkdir()
    dead = tmp_path / ".bundle.tmp-999999999-0123abcd"
    dead.mkdir()
    assert stale_temp_siblings(target) == [dead]
    outputs_mod.remove_stale_temp_siblings(target)
    assert live.exists() and not dead.exists()


RELEASE_LOOP = textwrap.dedent("""
    import sys
    import aggpub.audit.report as r
    import aggpub.pipeline as p
    r._plots = lambda audit: {}
    policy, edges, people, out = sys.argv[1:5]
    seed = 100
    while True:
        p.run_release(policy, edges, people, out, seed=seed, overwrite=True)
        seed += 1
        print("published", flush=True)
""")


@pytest.mark.heavy
def test_sigkill_at_random_moments(tmp_path):
    """Kill a process that releases over and over at random moments: the bundle always verifies."""
    s = Scenario(tmp_path)
    _make_bundle(s)
    rng = random.Random(20261201)
    for _ in range(3):
        proc = subprocess.Popen([sys.executable, "-c", RELEASE_LOOP, str(s.policy), str(s.edges), str(s.people),
                                 str(s.out)], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        proc.stdout.readline()  # imports done and at least one release published
        time.sleep(rng.uniform(0.0, 0.4))
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=60)
        proc.stdout.close()
        proc.stderr.close()
        res = check_bundle(s.out)
        assert res.ok, res.problems
        # at most an abandoned bundle folder and an abandoned report folder, both named as temporary
        assert all(".tmp-" in n for n in _siblings(s.out)) and len(_siblings(s.out)) <= 2
    assert main(s.argv() + ["--quiet", "--seed", "3", "--overwrite"]) == 0
    assert _siblings(s.out) == [] and check_bundle(s.out).ok


# --------------------------------------------------------------------------- the lifetime ledger

LEDGER_POLICY = POLICY_TEXT + """
[ledger]
path = "ledger.sqlite"
dataset = "quennet-vale-contacts"
lifetime_epsilon = 10.0
"""


def _ledger_rows(s: Scenario):
    from aggpub.budget.ledger import Ledger

    path = s.policy.parent / "ledger.sqlite"
    return [] if not path.exists() else Ledger(path).spends("quennet-vale-contacts")


def test_ledger_bad_input_records_nothing(tmp_path, capsys):
    s = Scenario(tmp_path)
    s.write_policy(LEDGER_POLICY)
    s.people.write_bytes(b"node,age_band,district\n")
    assert main(s.argv()) == 3
    assert _ledger_rows(s) == []


@pytest.mark.parametrize("name,obj,attr,repl,code",
                         [f for f in STAGE_FAULTS if f[0] in ("noise", "parquet_write", "disk_full_manifest",
                                                             "publish", "interrupt_during_write")],
                         ids=["noise", "parquet_write", "disk_full_manifest", "publish", "interrupt"])
def test_ledger_fault_records_the_spend_once(name, obj, attr, repl, code, tmp_path, capsys, monkeypatch):
    """A fault after the charge: one row, status failed, epsilon counted; no bundle."""
    s = Scenario(tmp_path)
    s.write_policy(LEDGER_POLICY)
    monkeypatch.setattr(obj, attr, repl)
    rc = main(s.argv() + ["--seed", "4"])
    monkeypatch.undo()
    assert rc == code
    rows = _ledger_rows(s)
    assert not s.out.exists() and _siblings(s.out) == []
    if name == "noise":
        # the fault replaces the superedge release before its first noise draw; the ledger charges on
        # the first draw, so nothing was spent and nothing is recorded
        assert rows == []
    else:
        assert len(rows) == 1 and rows[0].status == "failed" and rows[0].epsilon == 1.0
    # the next, successful release adds exactly one more row
    assert main(s.argv() + ["--seed", "4", "--quiet", "--overwrite"]) == 0
    statuses = [r.status for r in _ledger_rows(s)]
    assert statuses == (["published"] if name == "noise" else ["failed", "published"])


@pytest.mark.heavy
def test_ledger_sigkill_during_write_records_the_spend_once(tmp_path):
    s = Scenario(tmp_path)
    s.write_policy(LEDGER_POLICY)
    proc = _run_killer(s, "before publish", False)
    assert proc.returncode == -signal.SIGKILL, proc.stderr
    rows = _ledger_rows(s)
    assert len(rows) == 1 and rows[0].status == "charged" and not s.out.exists()
    assert main(s.argv() + ["--seed", "4", "--quiet", "--overwrite"]) == 0
    assert [r.status for r in _ledger_rows(s)] == ["charged", "published"]
    assert _siblings(s.out) == []


def test_fallback_without_exchange_restores_the_old_bundle(tmp_path, capsys, monkeypatch):
    """Where renameat2 is missing, a failed second rename puts the previous bundle back."""
    s = Scenario(tmp_path)
    old = _make_bundle(s)
    real_rename = os.rename
    calls = []

    def rename(a, b):
        calls.append((Path(a).name, Path(b).name))
        if Path(a).name.startswith(".bundle.tmp-") and Path(b) == s.out:  # the new bundle's move into place
            raise OSError(errno.EIO, "injected")
        return real_rename(a, b)

    monkeypatch.setattr(outputs_mod, "_rename_exchange", lambda a, b: False)
    monkeypatch.setattr(os, "rename", rename)
    rc = main(s.argv() + ["--overwrite", "--seed", "6", "--report", str(tmp_path / "rep")])
    monkeypatch.undo()
    assert rc == 7
    moved = [c for c in calls if c[0] == "bundle" and c[1].startswith(".bundle.old-")]
    assert len(moved) == 1 and ("bundle" in [c[1] for c in calls if c[0] == moved[0][1]])  # aside, then back
    assert tree_snapshot(s.out) == old and check_bundle(s.out).ok
    assert _siblings(s.out) == []


def test_fallback_without_exchange_replaces(tmp_path, capsys, monkeypatch):
    s = Scenario(tmp_path)
    old = _make_bundle(s)
    monkeypatch.setattr(outputs_mod, "_rename_exchange", lambda a, b: False)
    assert main(s.argv() + ["--overwrite", "--seed", "6", "--quiet"]) == 0
    assert tree_snapshot(s.out) != old and check_bundle(s.out).ok and _siblings(s.out) == []
