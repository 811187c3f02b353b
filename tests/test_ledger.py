"""The lifetime ledger (:mod:`aggpub.budget.ledger`): cap, crash, concurrency, damage, tampering, listing.

The network used for whole releases is Zachary's karate club as shipped by
networkx (W. W. Zachary, "An information flow model for conflict and fission
in small groups", Journal of Anthropological Research 33(4), 1977: 34 people,
78 contacts), grouped by its public ``club`` attribute.

Sequential composition (Dwork and Roth, "The Algorithmic Foundations of
Differential Privacy", 2014, Theorem 3.14) is what makes the cap meaningful:
the epsilons of releases of the same people add up, so the ledger's total is
the plain sum of the charges.
"""

from __future__ import annotations

import json
import multiprocessing as mp
import sqlite3
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import networkx as nx
import pyarrow.csv as pacsv
import pytest

from aggpub import pipeline
from aggpub.bundle import check_bundle
from aggpub.cli import main
from aggpub.errors import BudgetError, InputError
from aggpub.noise import sampler
from aggpub.budget.ledger import ChargeOnFirstDraw, Ledger, LEDGER_APPLICATION
from aggpub.pipeline import run_release

from .conftest import graph_tables

PYTHON = sys.executable
REPO = Path(__file__).resolve().parents[1]


def _policy_text(epsilon=1.0, cap=3.0, path="town.ledger", dataset="karate-1977"):
    return textwrap.dedent(f"""
        title = "karate club test release"
        [privacy]
        unit = "edge"
        epsilon = {epsilon}
        [grouping]
        method = "attributes"
        attributes = ["club"]
        min_size = 5
        [ledger]
        path = "{path}"
        dataset = "{dataset}"
        lifetime_epsilon = {cap}
        """)


@pytest.fixture
def setup(tmp_path):
    """Karate club inputs and a policy with a ledger beside it (ledger path relative)."""
    G = nx.karate_club_graph()
    edges, people = graph_tables(G, {"club": nx.get_node_attributes(G, "club")})
    data = tmp_path / "data"
    data.mkdir()
    pacsv.write_csv(edges, data / "contacts.csv")
    pacsv.write_csv(people, data / "people.csv")
    conf = tmp_path / "conf"
    conf.mkdir()

    def make(**kw):
        p = conf / "policy.toml"
        p.write_text(_policy_text(**kw))
        return p

    make()
    return {"dir": tmp_path, "edges": data / "contacts.csv", "people": data / "people.csv",
            "policy": conf / "policy.toml", "ledger": conf / "town.ledger", "make_policy": make}


def _release(s, name, **kw):
    return run_release(s["policy"], s["edges"], s["people"], s["dir"] / name, seed=kw.pop("seed", 1), **kw)


def _leftovers(folder: Path):
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


# ----------------------------------------------------------------------------- the cap


def test_cap_refuses_the_release_that_would_exceed_it(setup):
    s = setup
    for i in range(3):  # 3 x 1.0 fits a cap of 3.0 exactly
        release, path = _release(s, f"b{i}")
        assert check_bundle(path).ok
        assert release.manifest["ledger"]["spent_after"] == pytest.approx(i + 1.0)
    with pytest.raises(BudgetError, match=r"spent 3 of its lifetime epsilon 3 .* needs 1 but only 0 is left"):
        _release(s, "b3")
    assert not (s["dir"] / "b3").exists() and _leftovers(s["dir"]) == []
    led = Ledger(s["ledger"], create=False)
    assert [r.status for r in led.spends()] == ["published"] * 3
    assert led.spent("karate-1977") == 3.0


def test_refusal_under_the_lock_draws_no_noise(setup, monkeypatch):
    """The authoritative check is the one inside the charge: skip the early read-only check and
    let another writer use the budget in between; the release must stop before any uniform is drawn."""
    s = setup
    s["make_policy"](epsilon=1.0, cap=1.5)
    draws = []
    real_uniform = sampler.SeededRandomSource.uniform
    monkeypatch.setattr(sampler.SeededRandomSource, "uniform",
                        lambda self, n: draws.append(n) or real_uniform(self, n))
    monkeypatch.setattr(Ledger, "check", lambda self, *a: None)
    Ledger(s["ledger"]).charge("karate-1977", 1.5, 1.0)  # a concurrent release took 1.0 of 1.5
    with pytest.raises(BudgetError, match="only 0.5 is left"):
        _release(s, "late")
    assert draws == []
    assert not (s["dir"] / "late").exists()
    assert len(Ledger(s["ledger"]).spends()) == 1


def test_charge_on_first_draw_runs_before_the_first_uniform():
    events = []

    class Src(sampler.SeededRandomSource):
        def uniform(self, n):
            events.append("draw")
            return super().uniform(n)

    guarded = ChargeOnFirstDraw(Src(3), lambda: events.append("charge"))
    guarded.uniform(2)
    guarded.uniform(2)
    assert events == ["charge", "draw", "draw"]
    assert guarded.seeded and "PCG64" in guarded.description

    def refuse():
        raise BudgetError("no budget")

    events.clear()
    with pytest.raises(BudgetError):
        ChargeOnFirstDraw(Src(3), refuse).uniform(2)
    assert events == []


def test_cap_is_fixed_by_the_first_charge(setup):
    s = setup
    _release(s, "b0")
    s["make_policy"](cap=30.0)  # raising the cap by editing the policy is refused
    with pytest.raises(BudgetError, match="cannot be changed by editing the policy"):
        _release(s, "b1")
    assert not (s["dir"] / "b1").exists()


def test_datasets_are_budgeted_separately(tmp_path):
    led = Ledger(tmp_path / "l.ledger")
    led.charge("a", 1.0, 1.0)
    led.charge("b", 2.0, 2.0)
    with pytest.raises(BudgetError):
        led.charge("a", 1.0, 0.01)
    assert led.datasets() == {"a": (1.0, 1.0), "b": (2.0, 2.0)}


def test_decimal_epsilons_sum_to_the_cap(tmp_path):
    """Ten charges of 0.1 fill a cap of 1.0 (the float sum is 0.9999999999999999); an eleventh does not fit."""
    led = Ledger(tmp_path / "l.ledger")
    for _ in range(10):
        led.charge("d", 1.0, 0.1)
    with pytest.raises(BudgetError):
        led.charge("d", 1.0, 0.1)


# ----------------------------------------------------------------------------- crashes


def test_failure_while_writing_the_bundle_keeps_the_charge(setup, monkeypatch):
    s = setup
    real_write = pipeline.write_bundle

    def faulty(*a, **k):
        def fault(stage):
            if stage == "before publish":
                raise RuntimeError("disk pulled out")
        return real_write(*a, **k, **{"_fault": fault})

    monkeypatch.setattr(pipeline, "write_bundle", lambda *a, _fault=None, **k: faulty(*a, **k))
    with pytest.raises(RuntimeError, match="disk pulled out"):
        _release(s, "crashed")
    assert not (s["dir"] / "crashed").exists() and _leftovers(s["dir"]) == []
    (row,) = Ledger(s["ledger"]).spends()
    assert row.status == "failed" and row.epsilon == 1.0
    # issue 13: half of epsilon on the view of the grouping attribute, by default
    assert row.components == {"superedge_counts": 0.5, "contact_views": 0.5}
    assert row.bundle_path == str(s["dir"] / "crashed") and row.policy_title == "karate club test release"


@pytest.mark.heavy
def test_process_killed_after_noise_still_charged(setup):
    """A real crash: the process dies (os._exit) while writing the bundle, after the noise exists."""
    s = setup
    code = textwrap.dedent(f"""
        import os
        from aggpub import pipeline
        real = pipeline.write_bundle
        def fault(stage):
            if stage.startswith("wrote"):
                os._exit(17)
        pipeline.write_bundle = lambda *a, _fault=None, **k: real(*a, _fault=fault, **k)
        pipeline.run_release({str(s['policy'])!r}, {str(s['edges'])!r}, {str(s['people'])!r},
                             {str(s['dir'] / 'killed')!r})
    """)
    res = subprocess.run([PYTHON, "-c", code], capture_output=True, text=True, timeout=120)
    assert res.returncode == 17, res.stderr
    assert not (s["dir"] / "killed").exists()
    (row,) = Ledger(s["ledger"]).spends()
    assert row.status == "charged"  # never marked, still counted
    assert Ledger(s["ledger"]).spent("karate-1977") == 1.0


# ----------------------------------------------------------------------------- concurrency


def _race_worker(path, barrier, results, naive):
    led = _NaiveLedger(path) if naive else Ledger(path)
    barrier.wait()
    try:
        led.charge("d", 1.5, 1.0)
        results.put("charged")
    except BudgetError:
        results.put("refused")


class _NaiveLedger(Ledger):
    """A deliberately wrong ledger: checks, waits, then charges without re-checking under the lock."""

    _skip = False

    def charge(self, *a, **k):
        self.check(*a[:3])
        time.sleep(0.3)
        self._skip = True
        return super().charge(*a, **k)

    def _check_fit(self, dataset, lifetime_epsilon, epsilon, rows):
        if self._skip:
            return sum(r.epsilon for r in rows)
        return super()._check_fit(dataset, lifetime_epsilon, epsilon, rows)


def _race(path, naive):
    ctx = mp.get_context("fork")
    Ledger(path)  # create first so both processes open the same file
    barrier, results = ctx.Barrier(2), ctx.Queue()
    procs = [ctx.Process(target=_race_worker, args=(path, barrier, results, naive)) for _ in range(2)]
    for p in procs:
        p.start()
    for p in procs:
        p.join(60)
    outcomes = sorted(results.get(timeout=5) for _ in procs)
    return outcomes, Ledger(path).spent("d")


@pytest.mark.heavy
@pytest.mark.parametrize("round_", range(3))
def test_two_processes_cannot_both_slip_under_the_cap(tmp_path, round_):
    outcomes, spent = _race(tmp_path / "race.ledger", naive=False)
    assert outcomes == ["charged", "refused"]
    assert spent == 1.0


@pytest.mark.heavy
def test_race_harness_catches_a_non_atomic_ledger(tmp_path):
    """Power check of the race test: check-then-charge outside one transaction overspends."""
    outcomes, spent = _race(tmp_path / "naive.ledger", naive=True)
    assert outcomes == ["charged", "charged"] and spent == 2.0 > 1.5


@pytest.mark.heavy
def test_two_concurrent_cli_releases(setup):
    """Two `aggpub release` processes on one ledger with room for one release: one bundle, one refusal."""
    s = setup
    s["make_policy"](epsilon=1.0, cap=1.5)
    cmds = [[PYTHON, "-m", "aggpub", "release", "--policy", str(s["policy"]), "--edges", str(s["edges"]),
             "--nodes", str(s["people"]), "--out", str(s["dir"] / f"cli{i}"), "--quiet"] for i in range(2)]
    procs = [subprocess.Popen(c, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for c in cmds]
    codes = sorted(p.wait(timeout=120) for p in procs)
    assert codes == [0, 5], [p.stderr.read() for p in procs]
    made = [i for i in range(2) if (s["dir"] / f"cli{i}").exists()]
    assert len(made) == 1
    assert Ledger(s["ledger"]).spent("karate-1977") == 1.0
    assert check_bundle(s["dir"] / f"cli{made[0]}").ok


# ----------------------------------------------------------------------------- damage and tampering


def _filled(tmp_path, n=3):
    path = tmp_path / "l.ledger"
    led = Ledger(path)
    for i in range(n):
        led.charge("d", 10.0, 1.0 + i, components={"superedge_counts": 1.0 + i}, bundle_path=f"/b{i}")
    return path


def _sql(path, *statements):
    con = sqlite3.connect(path)
    for st in statements:
        con.execute(st)
    con.commit()
    con.close()


def _truncate(path):
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])


def _flip_page_bytes(path):
    data = bytearray(path.read_bytes())
    for i in range(1100, min(len(data), 4000)):  # inside the schema / first table pages
        data[i] ^= 0x5A
    path.write_bytes(bytes(data))


DAMAGE = {
    "not sqlite": (lambda p: p.write_bytes(b"id,epsilon\n1,0.5\n"), "not a SQLite file"),
    "empty": (lambda p: p.write_bytes(b""), "empty"),
    "truncated": (_truncate, "damaged ledger"),
    "scrambled pages": (_flip_page_bytes, "damaged ledger"),
    "missing table": (lambda p: _sql(p, "DROP TABLE spends"), "table 'spends' is missing"),
    "schema version": (lambda p: _sql(p, "UPDATE meta SET value = '99' WHERE key = 'schema_version'"),
                       "schema version '99'"),
    "foreign sqlite": (lambda p: (p.unlink(), _sql(p, "CREATE TABLE t(x)")), "table 'meta' is missing"),
    "wrong application": (lambda p: _sql(p, "UPDATE meta SET value = 'x' WHERE key = 'application'"),
                          "not an aggpub ledger"),
}

TAMPER = {
    "edited epsilon": ("UPDATE spends SET epsilon = 0.5 WHERE id = 2", "spend 2: the row was edited"),
    "edited cap": ("UPDATE spends SET lifetime_epsilon = 100 WHERE id = 1", "spend 1: the row was edited"),
    "edited dataset": ("UPDATE spends SET dataset = 'other' WHERE id = 3", "spend 3: the row was edited"),
    "deleted middle row": ("DELETE FROM spends WHERE id = 2", "a row was deleted"),
    "deleted last row": ("DELETE FROM spends WHERE id = 3", "rows were added or removed"),
    "deleted all rows": ("DELETE FROM spends", "rows were added or removed"),
    "bad status": ("UPDATE spends SET status = 'refunded' WHERE id = 1", "damaged ledger"),
    "copied row": ("INSERT INTO spends SELECT 4, dataset, epsilon, lifetime_epsilon, components, created_utc, "
                   "bundle_path, tool_version, policy_title, prev_sha256, row_sha256, status FROM spends "
                   "WHERE id = 3", "hash chain broken at spend 4"),
}


@pytest.mark.parametrize("name", sorted(DAMAGE))
def test_damaged_ledger_is_refused_and_left_alone(tmp_path, name):
    path = _filled(tmp_path)
    damage, message = DAMAGE[name]
    damage(path)
    before = path.read_bytes()
    with pytest.raises(InputError, match=message):
        Ledger(path)
    with pytest.raises(InputError):
        Ledger(path).charge("d", 10.0, 0.1)
    assert path.read_bytes() == before  # never reset or repaired


@pytest.mark.parametrize("name", sorted(TAMPER))
def test_tampered_rows_break_the_chain(tmp_path, name):
    path = _filled(tmp_path)
    statement, message = TAMPER[name]
    if name == "bad status":  # the CHECK constraint forbids it; a tamperer can drop the constraint
        con = sqlite3.connect(path)
        con.execute("PRAGMA writable_schema = ON")
        con.execute("UPDATE sqlite_master SET sql = replace(sql, 'CHECK (status IN', 'CHECK (1 OR status IN') "
                    "WHERE name = 'spends'")
        con.commit()
        con.close()
    _sql(path, statement)
    with pytest.raises(InputError, match=message):
        Ledger(path).spends()


def test_untouched_ledger_verifies(tmp_path):
    path = _filled(tmp_path)
    rows = Ledger(path).spends()
    assert [r.id for r in rows] == [1, 2, 3]
    assert [r.prev_sha256 for r in rows[1:]] == [r.row_sha256 for r in rows[:-1]]


def test_release_with_damaged_ledger_publishes_nothing(setup):
    s = setup
    _release(s, "b0")
    _sql(s["ledger"], "UPDATE spends SET epsilon = 0.01")
    with pytest.raises(InputError, match="damaged ledger"):
        _release(s, "b1")
    assert not (s["dir"] / "b1").exists()


# ----------------------------------------------------------------------------- manifest, listing, paths


def test_manifest_records_the_charge(setup):
    s = setup
    release, path = _release(s, "b0")
    (row,) = Ledger(s["ledger"]).spends()
    manifest = json.loads((path / "manifest.json").read_text())
    assert manifest["ledger"] == {"dataset": "karate-1977", "spend_id": 1, "epsilon": 1.0,
                                  "lifetime_epsilon": 3.0, "spent_after": 1.0, "row_sha256": row.row_sha256}
    assert row.tool_version == manifest["tool_version"]
    assert check_bundle(path).ok


def test_ledger_listing(setup, capsys):
    s = setup
    _release(s, "b0")
    Ledger(s["ledger"]).charge("second-set", 2.0, 0.25)
    assert main(["ledger", str(s["ledger"])]) == 0
    out = capsys.readouterr().out
    lines = out.splitlines()
    assert lines[0].split() == ["id", "time", "(UTC)", "dataset", "epsilon", "status", "bundle"]
    assert lines[1].split()[2:] == ["karate-1977", "1", "published", str(s["dir"] / "b0")]
    assert lines[2].split()[2:] == ["second-set", "0.25", "charged"]
    assert "dataset 'karate-1977': spent 1 of lifetime epsilon 3, 2 left" in out
    assert "dataset 'second-set': spent 0.25 of lifetime epsilon 2, 1.75 left" in out
    assert main(["ledger", str(s["ledger"]), "--dataset", "second-set"]) == 0
    out = capsys.readouterr().out
    assert "karate-1977" not in out.split("ledger verified")[0] and "1.75 left" in out


def test_ledger_listing_refuses_damage_and_missing_file(setup, capsys):
    s = setup
    assert main(["ledger", str(s["ledger"])]) == 3  # no release yet: the file does not exist
    assert "ledger file not found" in capsys.readouterr().err
    assert not s["ledger"].exists()  # listing never creates a ledger
    _release(s, "b0")
    _sql(s["ledger"], "DELETE FROM spends")
    assert main(["ledger", str(s["ledger"])]) == 3
    assert "damaged ledger" in capsys.readouterr().err


def test_ledger_path_is_relative_to_the_policy_file(setup, monkeypatch, tmp_path):
    s = setup
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    _release(s, "b0")
    assert s["ledger"].is_file() and not (elsewhere / "town.ledger").exists()
    con = sqlite3.connect(s["ledger"])
    assert dict(con.execute("SELECT key, value FROM meta").fetchall())["application"] == LEDGER_APPLICATION
    con.close()


def test_missing_ledger_folder_is_an_input_error(setup):
    s = setup
    s["make_policy"](path="no/such/folder/town.ledger")
    with pytest.raises(InputError, match="does not exist"):
        _release(s, "b0")
