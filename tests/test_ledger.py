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
    # issue 13: the view of the grouping attribute by default; issue 12: degree sequences and the triangle count
    # (weights 2, 2, 2, 1 beside the superedge counts)
    assert row.components == pytest.approx({"superedge_counts": 2 / 7, "contact_views": 2 / 7,
                                            "degree_sequences": 2 / 7, "triangle_count": 1 / 7})
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
                   "bundle_path, tool_version, policy_title, prev_sha256, row_sha256, status, row_version, "
                   "privacy_unit, input_fingerprint, declared_new FROM spends WHERE id = 3",
                   "hash chain broken at spend 4"),
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
                                  "lifetime_epsilon": 3.0, "spent_after": 1.0, "row_sha256": row.row_sha256,
                                  "privacy_unit": "edge"}
    assert row.tool_version == manifest["tool_version"]
    assert check_bundle(path).ok


def test_ledger_listing(setup, capsys):
    s = setup
    _release(s, "b0")
    Ledger(s["ledger"]).charge("second-set", 2.0, 0.25)
    assert main(["ledger", str(s["ledger"])]) == 0
    out = capsys.readouterr().out
    lines = out.splitlines()
    assert lines[0].split() == ["id", "time", "(UTC)", "dataset", "epsilon", "unit", "new", "status", "bundle"]
    assert lines[1].split()[2:] == ["karate-1977", "1", "edge", "no", "published", str(s["dir"] / "b0")]
    assert lines[2].split()[2:] == ["second-set", "0.25", "-", "no", "charged"]
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


# ----------------------------------------------------------------------------- schema 2: who was charged
#
# The input fingerprint is HMAC-SHA256 (Bellare, Canetti and Krawczyk, "Keying Hash Functions for Message
# Authentication", CRYPTO 1996; RFC 2104, 1997) under a per-ledger key, of the canonical form documented in
# aggpub.budget.ledger. The reference below rebuilds that form id by id with the standard library's hmac
# (its RFC 2104 implementation), independently of the vectorised Arrow-buffer code under test.

import hashlib  # noqa: E402
import hmac  # noqa: E402
import struct  # noqa: E402

import numpy as np  # noqa: E402
import pyarrow as pa  # noqa: E402

from aggpub.budget.ledger import Charge, ReleaseLedger  # noqa: E402
from aggpub.policy import read_policy  # noqa: E402


def _reference_fingerprint(key: bytes, ids: list[str]) -> str:
    """The documented canonical form, built one id at a time (sorted distinct UTF-8 byte strings)."""
    items = sorted({i.encode("utf-8") for i in ids})
    body = b"aggpub person-id set 1\x00" + struct.pack("<Q", len(items))
    body += b"".join(struct.pack("<Q", len(b)) for b in items) + b"".join(items)
    return hmac.new(key, body, hashlib.sha256).hexdigest()


def _meta(path) -> dict:
    con = sqlite3.connect(path)
    try:
        return dict(con.execute("SELECT key, value FROM meta").fetchall())
    finally:
        con.close()


def _people(n=50, prefix="p"):
    return [f"{prefix}{i:03d}" for i in range(n)]


def test_new_ledger_has_schema_2_and_its_own_key(tmp_path):
    a, b = Ledger(tmp_path / "a.ledger"), Ledger(tmp_path / "b.ledger")
    assert a.schema_version == "2"
    ma, mb = _meta(a.path), _meta(b.path)
    assert ma["schema_version"] == "2" and ma["v1_spends"] == "0"
    assert len(bytes.fromhex(ma["fingerprint_key"])) == 32
    assert ma["fingerprint_key"] != mb["fingerprint_key"]


def test_fingerprint_matches_the_documented_canonical_form(tmp_path):
    led = Ledger(tmp_path / "l.ledger")
    key = bytes.fromhex(_meta(led.path)["fingerprint_key"])
    ids = ["zoe", "Ämélie", "b", "", "a", "ab", "名前", "b"]  # multi-byte UTF-8, an empty id, a repeat
    assert led.fingerprint(pa.array(ids)) == _reference_fingerprint(key, ids)
    # A slice (non-zero offset into the buffers), a chunked array, a dictionary array, large_string.
    big = pa.array(_people(40))
    assert led.fingerprint(big.slice(7, 20)) == _reference_fingerprint(key, _people(40)[7:27])
    chunked = pa.chunked_array([pa.array(ids[:3]), pa.array(ids[3:])])
    assert led.fingerprint(chunked) == _reference_fingerprint(key, ids)
    assert led.fingerprint(pa.array(ids).dictionary_encode()) == _reference_fingerprint(key, ids)
    assert led.fingerprint(pa.array(ids, pa.large_string())) == _reference_fingerprint(key, ids)


def test_fingerprint_is_the_same_in_any_order_and_differs_otherwise(tmp_path):
    led, other = Ledger(tmp_path / "l.ledger"), Ledger(tmp_path / "o.ledger")
    ids = _people(200)
    fp = led.fingerprint(pa.array(ids))
    rng = np.random.default_rng(11)
    for _ in range(5):
        assert led.fingerprint(pa.array(list(rng.permutation(ids)))) == fp
    assert led.fingerprint(pa.array(ids + ids[:10])) == fp  # a repeated id counts once: a set of people
    changed = ids[:-1] + ["p999"]
    assert led.fingerprint(pa.array(changed)) != fp  # one person replaced
    assert led.fingerprint(pa.array(ids[:-1])) != fp  # one person fewer
    assert led.fingerprint(pa.array(["ab", "c"])) != led.fingerprint(pa.array(["a", "bc"]))  # same bytes joined
    assert led.fingerprint(pa.array(["a", "b"])) != led.fingerprint(pa.array(["ab"]))
    assert other.fingerprint(pa.array(ids)) != fp  # another ledger's key
    assert len(fp) == 64 and int(fp, 16) >= 0


@pytest.mark.parametrize("bad, error", [
    (pa.array([1, 2, 3]), TypeError),
    (["a", "b"], TypeError),
    (pa.array(["a", None]), ValueError),
    (pa.array([], pa.string()), ValueError),
])
def test_fingerprint_refuses_what_is_not_a_set_of_ids(tmp_path, bad, error):
    with pytest.raises(error):
        Ledger(tmp_path / "l.ledger").fingerprint(bad)


def test_renamed_dataset_is_refused_and_names_the_old_id(tmp_path):
    led = Ledger(tmp_path / "l.ledger")
    fp = led.fingerprint(pa.array(_people()))
    led.charge("town-2026", 3.0, 1.0, privacy_unit="edge", fingerprint=fp)
    led.charge("town-2026", 3.0, 0.5, privacy_unit="edge", fingerprint=fp)  # repeated release: normal
    before = led.path.read_bytes()
    with pytest.raises(BudgetError) as err:
        led.charge("town-2026-renamed", 3.0, 1.0, privacy_unit="edge", fingerprint=fp)
    msg = str(err.value)
    assert "already charged under another dataset id: 'town-2026' (spent 1.5 of lifetime epsilon 3)" in msg
    assert "Renaming a dataset does not reset its budget" in msg
    assert "--new-dataset" in msg and "new_dataset=True" in msg
    assert fp not in msg and fp[:12] not in msg
    assert led.path.read_bytes() == before  # nothing recorded
    assert [r.dataset for r in led.spends()] == ["town-2026", "town-2026"]
    # Other people under another id, and a charge without a fingerprint, go through.
    led.charge("harbour-2026", 3.0, 1.0, fingerprint=led.fingerprint(pa.array(_people(prefix="h"))))
    led.charge("town-2026-renamed", 3.0, 1.0)
    assert len(led.spends()) == 4


def test_declared_new_dataset_goes_through_is_recorded_and_chained(tmp_path):
    led = Ledger(tmp_path / "l.ledger")
    fp = led.fingerprint(pa.array(_people()))
    led.charge("survey-wave-1", 2.0, 1.0, privacy_unit="person", fingerprint=fp)
    charge = led.charge("survey-wave-2", 2.0, 1.0, privacy_unit="person", fingerprint=fp, new_dataset=True)
    assert charge.declared_new
    first, second = led.spends()
    assert (first.declared_new, second.declared_new) == (False, True)
    assert second.input_fingerprint == first.input_fingerprint == fp
    # Once both ids hold these people, each releases them again without a declaration ...
    led.charge("survey-wave-1", 2.0, 0.5, fingerprint=fp)
    led.charge("survey-wave-2", 2.0, 0.5, fingerprint=fp)
    # ... but a third id must declare, and the refusal names both.
    with pytest.raises(BudgetError, match=r"'survey-wave-1' \(spent 1.5 .*'survey-wave-2' \(spent 1.5"):
        led.charge("survey-wave-3", 2.0, 0.5, fingerprint=fp)
    # The declaration is chained: withdrawing it (or adding one) breaks the chain.
    _sql(led.path, "UPDATE spends SET declared_new = 0 WHERE id = 2")
    with pytest.raises(InputError, match="spend 2: the row was edited"):
        led.spends()
    _sql(led.path, "UPDATE spends SET declared_new = 1 WHERE id = 2", "UPDATE spends SET declared_new = 1 WHERE id = 1")
    with pytest.raises(InputError, match="spend 1: the row was edited"):
        led.spends()


@pytest.mark.parametrize("column, value", [("privacy_unit", "'edge'"), ("input_fingerprint", "''"),
                                           ("row_version", "1")])
def test_new_fields_are_chained(tmp_path, column, value):
    led = Ledger(tmp_path / "l.ledger")
    fp = led.fingerprint(pa.array(_people()))
    for _ in range(2):
        led.charge("d", 5.0, 1.0, privacy_unit="person", fingerprint=fp)
    _sql(led.path, f"UPDATE spends SET {column} = {value} WHERE id = 2")
    with pytest.raises(InputError, match="spend 2"):
        led.spends()


def test_unit_is_recorded_and_both_units_allowed(tmp_path):
    led = Ledger(tmp_path / "l.ledger")
    fp = led.fingerprint(pa.array(_people()))
    a = led.charge("d", 3.0, 1.0, privacy_unit="edge", fingerprint=fp)
    b = led.charge("d", 3.0, 1.0, privacy_unit="person", fingerprint=fp)
    assert [r.privacy_unit for r in led.spends()] == ["edge", "person"]
    assert [r.row_version for r in led.spends()] == [2, 2]
    assert (a.privacy_unit, b.privacy_unit) == ("edge", "person")
    assert b.as_dict()["privacy_unit"] == "person"


def test_charge_record_holds_no_fingerprint_and_no_path(tmp_path):
    led = Ledger(tmp_path / "l.ledger")
    fp = led.fingerprint(pa.array(_people()))
    charge = led.charge("d", 3.0, 1.0, privacy_unit="edge", fingerprint=fp, bundle_path="/secret/place/b0",
                        new_dataset=True)
    record = charge.as_dict()
    assert set(record) == {"dataset", "spend_id", "epsilon", "lifetime_epsilon", "spent_after", "row_sha256",
                           "privacy_unit"}
    text = json.dumps(record) + repr(charge) + repr(led.spends())
    assert fp not in text and fp[:16] not in text and "/secret/place" not in json.dumps(record)
    assert "input_fingerprint" not in {f for f in Charge.__dataclass_fields__}
    with pytest.raises(ValueError, match="must come from Ledger.fingerprint"):
        led.charge("d", 3.0, 0.1, fingerprint="not-a-fingerprint")


# ----------------------------------------------------------------------------- the release side


def _policy(tmp_path, dataset, unit="edge"):
    extra = "max_contacts = 40\n" if unit == "person" else ""
    path = tmp_path / f"{dataset}.toml"
    path.write_text(textwrap.dedent(f"""
        title = "release of {dataset}"
        [privacy]
        unit = "{unit}"
        epsilon = 1.0
        """) + extra + textwrap.dedent(f"""
        [grouping]
        method = "attributes"
        attributes = ["club"]
        min_size = 5
        [ledger]
        path = "town.ledger"
        dataset = "{dataset}"
        lifetime_epsilon = 3.0
        """))
    return read_policy(path)


def test_release_ledger_attaches_the_input_and_refuses_a_rename(tmp_path):
    ids = pa.array([str(v) for v in nx.karate_club_graph().nodes])
    first = ReleaseLedger(_policy(tmp_path, "karate-1977"), tmp_path / "b0")
    first.attach_input(ids)
    assert first.input_attached
    charge = first.charge()
    assert first.finish(True)
    (row,) = Ledger(tmp_path / "town.ledger").spends()
    assert row.privacy_unit == "edge" and row.input_fingerprint and not row.declared_new
    assert row.policy_title == "release of karate-1977" and charge.as_dict()["privacy_unit"] == "edge"
    assert row.input_fingerprint not in json.dumps(charge.as_dict())
    with pytest.raises(RuntimeError, match="after the ledger charge"):
        first.attach_input(ids)

    renamed = ReleaseLedger(_policy(tmp_path, "karate-club"), tmp_path / "b1")
    renamed.attach_input(pa.array(list(reversed(ids.to_pylist()))))  # same people, another order
    with pytest.raises(BudgetError, match="already charged under another dataset id: 'karate-1977'"):
        renamed.charge()
    assert renamed.charged is None and renamed.finish(False)  # nothing charged, nothing to mark

    declared = ReleaseLedger(_policy(tmp_path, "karate-club", unit="person"), tmp_path / "b2", new_dataset=True)
    declared.attach_input(ids)
    declared.charge()
    rows = Ledger(tmp_path / "town.ledger").spends()
    assert [(r.dataset, r.privacy_unit, r.declared_new) for r in rows] == [
        ("karate-1977", "edge", False), ("karate-club", "person", True)]


def test_listing_shows_unit_and_declaration_but_no_fingerprint(tmp_path, capsys):
    led = Ledger(tmp_path / "l.ledger")
    fp = led.fingerprint(pa.array(_people()))
    led.charge("wave-1", 2.0, 1.0, privacy_unit="edge", fingerprint=fp)
    led.charge("wave-2", 2.0, 1.0, privacy_unit="person", fingerprint=fp, new_dataset=True)
    assert main(["ledger", str(led.path)]) == 0
    out = capsys.readouterr().out
    lines = out.splitlines()
    assert lines[1].split()[2:6] == ["wave-1", "1", "edge", "no"]
    assert lines[2].split()[2:6] == ["wave-2", "1", "person", "yes"]
    assert fp not in out and fp[:8] not in out
    assert "schema version 1" not in out


# ----------------------------------------------------------------------------- upgrading version-1 ledgers

#: A ledger written by the version-1 code (aggpub at commit 9f03c21, before schema version 2), as the SQL
#: dump of ``sqlite3.Connection.iterdump``: three charges, two datasets, statuses published/failed/charged.
V1_LEDGER_DUMP = r"""
BEGIN TRANSACTION;
CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
INSERT INTO "meta" VALUES('application','aggpub lifetime ledger');
INSERT INTO "meta" VALUES('schema_version','1');
INSERT INTO "meta" VALUES('created_utc','2026-12-02T15:12:49.307794Z');
INSERT INTO "meta" VALUES('genesis_sha256','710829d3c9ed65e96412c7eac8eec2a2cc981834ee56f79919c6163fd2e468a1');
INSERT INTO "meta" VALUES('head_sha256','f8be0964a3ccb4aaa62f617a1f976caee3e6fac29a3888e64d2860e5c4e0076a');
INSERT INTO "meta" VALUES('n_spends','3');
CREATE TABLE spends (
    id INTEGER PRIMARY KEY,
    dataset TEXT NOT NULL,
    epsilon REAL NOT NULL CHECK (epsilon > 0),
    lifetime_epsilon REAL NOT NULL CHECK (lifetime_epsilon > 0),
    components TEXT NOT NULL,
    created_utc TEXT NOT NULL,
    bundle_path TEXT NOT NULL,
    tool_version TEXT NOT NULL,
    policy_title TEXT NOT NULL,
    prev_sha256 TEXT NOT NULL,
    row_sha256 TEXT NOT NULL,
    status TEXT NOT NULL CHECK (status IN ('charged', 'published', 'failed'))
);
INSERT INTO "spends" VALUES(1,'karate-1977',1.0,3.0,'{"superedge_counts":1.0}','2026-12-02T15:12:49.309858Z','/releases/b0','0.1.0','karate club test release','710829d3c9ed65e96412c7eac8eec2a2cc981834ee56f79919c6163fd2e468a1','e1370d14b284f83245aed2e09a681b496169e12a49b7afb37dd30bb122b6a9f2','published');
INSERT INTO "spends" VALUES(2,'karate-1977',0.5,3.0,'{"superedge_counts":0.5}','2026-12-02T15:12:49.328262Z','/releases/b1','0.1.0','karate club test release','e1370d14b284f83245aed2e09a681b496169e12a49b7afb37dd30bb122b6a9f2','bb12535f6a4953718efa235363dc15ad0d9008b67b15488cc5f96c93acb1b8f5','failed');
INSERT INTO "spends" VALUES(3,'second-set',0.25,2.0,'{"superedge_counts":0.25}','2026-12-02T15:12:49.332681Z','/releases/c0','0.1.0','other','bb12535f6a4953718efa235363dc15ad0d9008b67b15488cc5f96c93acb1b8f5','f8be0964a3ccb4aaa62f617a1f976caee3e6fac29a3888e64d2860e5c4e0076a','charged');
COMMIT;
"""
V1_DIGESTS = ["e1370d14b284f83245aed2e09a681b496169e12a49b7afb37dd30bb122b6a9f2",
              "bb12535f6a4953718efa235363dc15ad0d9008b67b15488cc5f96c93acb1b8f5",
              "f8be0964a3ccb4aaa62f617a1f976caee3e6fac29a3888e64d2860e5c4e0076a"]


def _v1_ledger(tmp_path, name="old.ledger"):
    path = tmp_path / name
    con = sqlite3.connect(path)
    con.executescript(V1_LEDGER_DUMP)
    con.close()
    return path


def _v1_rows(path):
    con = sqlite3.connect(path)
    try:
        return con.execute("SELECT id, dataset, epsilon, lifetime_epsilon, components, created_utc, bundle_path, "
                           "tool_version, policy_title, prev_sha256, row_sha256, status FROM spends "
                           "ORDER BY id").fetchall()
    finally:
        con.close()


def test_v1_fixture_follows_the_v1_digest_formula(tmp_path):
    """The fixture's first digest, recomputed by hand: SHA-256(genesis || '\\n' || JSON of the 9 v1 fields)."""
    row = _v1_rows(_v1_ledger(tmp_path))[0]
    body = json.dumps(list(row[:9]), separators=(",", ":"), ensure_ascii=False)
    assert hashlib.sha256(row[9].encode() + b"\n" + body.encode()).hexdigest() == row[10] == V1_DIGESTS[0]


def test_v1_ledger_is_read_without_writing(tmp_path, capsys):
    path = _v1_ledger(tmp_path)
    before = path.read_bytes()
    led = Ledger(path)
    assert led.schema_version == "1"
    rows = led.spends()
    assert [r.row_sha256 for r in rows] == V1_DIGESTS
    assert [(r.row_version, r.privacy_unit, r.input_fingerprint, r.declared_new) for r in rows] == [
        (1, "", "", False)] * 3
    assert led.datasets() == {"karate-1977": (1.5, 3.0), "second-set": (0.25, 2.0)}
    led.check("karate-1977", 3.0, 1.5)
    assert main(["ledger", str(path)]) == 0
    out = capsys.readouterr().out
    assert out.splitlines()[1].split()[2:6] == ["karate-1977", "1", "-", "-"]
    assert "ledger schema version 1; upgraded in place to version 2" in out
    assert "written by ledger schema version 1" in out
    assert path.read_bytes() == before


def test_v1_ledger_is_upgraded_by_the_first_charge(tmp_path, capsys):
    path = _v1_ledger(tmp_path)
    old_rows = _v1_rows(path)
    led = Ledger(path)
    fp_people = pa.array(_people())
    charge = led.charge("karate-1977", 3.0, 1.0, privacy_unit="edge", policy_title="after the upgrade")
    assert led.schema_version == "2"
    meta = _meta(path)
    assert meta["schema_version"] == "2" and meta["v1_spends"] == "3" and "upgraded_utc" in meta
    assert len(bytes.fromhex(meta["fingerprint_key"])) == 32
    assert _v1_rows(path)[:3] == old_rows  # every old value and digest kept byte for byte
    rows = Ledger(path).spends()
    assert [r.row_version for r in rows] == [1, 1, 1, 2]
    assert rows[3].prev_sha256 == V1_DIGESTS[2] and rows[3].row_sha256 == charge.row_sha256 == meta["head_sha256"]
    assert charge.spent_after == 2.5  # the old spends still count
    # The key made at the upgrade works for the rename check from then on.
    fp = led.fingerprint(fp_people)
    led.charge("karate-1977", 3.0, 0.25, fingerprint=fp)
    with pytest.raises(BudgetError, match="'karate-1977'"):
        led.charge("second-set", 2.0, 0.25, fingerprint=fp)
    assert main(["ledger", str(path)]) == 0
    out = capsys.readouterr().out
    assert "schema version 1; upgraded" not in out and "ledger verified (5 spend(s), hash chain intact)" in out
    assert [line.split()[4:6] for line in out.splitlines()[1:6]] == [["-", "-"]] * 3 + [["edge", "no"], ["-", "no"]]


def test_refused_charge_leaves_a_v1_ledger_as_it_was(tmp_path):
    path = _v1_ledger(tmp_path)
    before = path.read_bytes()
    with pytest.raises(BudgetError, match="only 1.5 is left"):
        Ledger(path).charge("karate-1977", 3.0, 2.0)
    assert path.read_bytes() == before and _meta(path)["schema_version"] == "1"


def test_fingerprint_and_upgrade_upgrade_a_v1_ledger_once(tmp_path):
    path = _v1_ledger(tmp_path)
    led = Ledger(path)
    fp = led.fingerprint(pa.array(_people()))
    key = _meta(path)["fingerprint_key"]
    assert led.schema_version == "2" and _meta(path)["v1_spends"] == "3"
    assert led.upgrade() is False and _meta(path)["fingerprint_key"] == key  # the key is made once
    assert led.fingerprint(pa.array(_people())) == fp
    assert Ledger(_v1_ledger(tmp_path, "other.ledger")).upgrade() is True


V1_TAMPER = {
    "edited epsilon": ("UPDATE spends SET epsilon = 0.1 WHERE id = 1", "spend 1: the row was edited"),
    "edited dataset": ("UPDATE spends SET dataset = 'fresh' WHERE id = 2", "spend 2: the row was edited"),
    "deleted last row": ("DELETE FROM spends WHERE id = 3", "rows were added or removed"),
    "deleted middle row": ("DELETE FROM spends WHERE id = 2", "a row was deleted"),
    "head": ("UPDATE meta SET value = '2' WHERE key = 'n_spends'", "the chain head does not match"),
}


@pytest.mark.parametrize("name", sorted(V1_TAMPER))
def test_tampered_v1_ledger_is_refused_and_not_upgraded(tmp_path, name):
    path = _v1_ledger(tmp_path)
    statement, message = V1_TAMPER[name]
    _sql(path, statement)
    before = path.read_bytes()
    with pytest.raises(InputError, match=message):
        Ledger(path)
    led = object.__new__(Ledger)  # bypass the opening check, as a process that opened it earlier would
    led.path, led._version = path, "1"
    for attempt in (lambda: led.charge("karate-1977", 3.0, 0.1), led.upgrade,
                    lambda: led.fingerprint(pa.array(["a"]))):
        with pytest.raises(InputError, match=message):
            attempt()
    assert path.read_bytes() == before and _meta(path)["schema_version"] == "1"


UPGRADED_TAMPER = {
    "v1 row gains a unit": ("UPDATE spends SET privacy_unit = 'person' WHERE id = 2",
                            "spend 2 is a version-1 row with a value in 'privacy_unit'"),
    "v1 row gains a fingerprint": ("UPDATE spends SET input_fingerprint = 'ab' WHERE id = 1",
                                   "spend 1 is a version-1 row with a value in 'input_fingerprint'"),
    "v1 row claims version 2": ("UPDATE spends SET row_version = 2 WHERE id = 3", "spend 3: the row was edited"),
    "v2 row claims version 1": ("UPDATE spends SET row_version = 1 WHERE id = 4", "spend 4"),
    "v1 count": ("UPDATE meta SET value = '2' WHERE key = 'v1_spends'", "meta 'v1_spends' says 2"),
    "key removed": ("DELETE FROM meta WHERE key = 'fingerprint_key'", "meta 'fingerprint_key' is missing"),
    "downgraded": ("UPDATE meta SET value = '1' WHERE key = 'schema_version'",
                   "expected columns of schema version 1"),
}


@pytest.mark.parametrize("name", sorted(UPGRADED_TAMPER))
def test_tampering_with_an_upgraded_ledger_is_caught(tmp_path, name):
    path = _v1_ledger(tmp_path)
    Ledger(path).charge("karate-1977", 3.0, 1.0, privacy_unit="edge")
    statement, message = UPGRADED_TAMPER[name]
    _sql(path, statement)
    with pytest.raises(InputError, match=message):
        Ledger(path).spends()


@pytest.mark.heavy
def test_two_processes_racing_on_a_v1_ledger_upgrade_once(tmp_path):
    """Both processes find version 1; the lock serialises the upgrade and the charge (cap 1.5, 2 x 1.0)."""
    path = tmp_path / "race.ledger"
    con = sqlite3.connect(path)
    con.executescript(V1_LEDGER_DUMP)
    con.close()
    ctx = mp.get_context("fork")
    barrier, results = ctx.Barrier(2), ctx.Queue()
    procs = [ctx.Process(target=_race_worker, args=(path, barrier, results, False)) for _ in range(2)]
    for p in procs:
        p.start()
    for p in procs:
        p.join(60)
    assert sorted(results.get(timeout=5) for _ in procs) == ["charged", "refused"]
    led = Ledger(path)
    assert led.schema_version == "2" and led.spent("d") == 1.0
    assert [r.row_version for r in led.spends()] == [1, 1, 1, 2]
    assert _meta(path)["v1_spends"] == "3"
