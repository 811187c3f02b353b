"""Shared helpers for the bad-input, fault, tamper and fuzz tests (issue 7).

A small valid scenario whose person ids and attribute values all contain the
planted marker :data:`MARK`, so a test can prove that no private value from the
input reaches an error message or a log line.
"""

from __future__ import annotations

import csv
import hashlib
import io
import os
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

#: planted in every person id and attribute value; must never appear in a message without --debug
MARK = "Zq8Plnt"
N_PEOPLE = 60
AGES = [f"{MARK}young", f"{MARK}mid", f"{MARK}old"]
DISTRICTS = [f"{MARK}north", f"{MARK}south"]

POLICY_TEXT = """\
[privacy]
unit = "edge"
epsilon = 1.0

[grouping]
method = "attributes"
attributes = ["age_band", "district"]
min_size = 5
"""


def person_id(i: int) -> str:
    return f"{MARK}{i:03d}"


def people_rows():
    return [[person_id(i), AGES[i % 3], DISTRICTS[i % 2]] for i in range(N_PEOPLE)]


def edge_rows():
    """200 contacts without self-loops, deterministic, with an integer weight."""
    rows = []
    for k in range(200):
        a = (7 * k) % N_PEOPLE
        b = (a + 1 + (k * 13) % (N_PEOPLE - 1)) % N_PEOPLE
        rows.append([person_id(a), person_id(b), str(1 + k % 30)])
    return rows


def csv_bytes(header, rows, delimiter=",", newline="\n") -> bytes:
    buf = io.StringIO()
    w = csv.writer(buf, delimiter=delimiter, lineterminator=newline)
    if header is not None:
        w.writerow(header)
    w.writerows(rows)
    return buf.getvalue().encode("utf-8")


class Scenario:
    """Input files in ``root/in``, the policy in ``root/policy``, the bundle target ``root/out/bundle``."""

    def __init__(self, root: Path):
        self.root = Path(root)
        (self.root / "in").mkdir(parents=True, exist_ok=True)
        (self.root / "policy").mkdir(exist_ok=True)
        (self.root / "out").mkdir(exist_ok=True)
        self.edges = self.root / "in" / "edges.csv"
        self.people = self.root / "in" / "people.csv"
        self.policy = self.root / "policy" / "policy.toml"
        self.out = self.root / "out" / "bundle"
        self.extra: list[str] = []
        self.edges.write_bytes(csv_bytes(["source", "target", "weight"], edge_rows()))
        self.people.write_bytes(csv_bytes(["node", "age_band", "district"], people_rows()))
        self.policy.write_text(POLICY_TEXT, encoding="utf-8")

    def argv(self) -> list[str]:
        return ["release", "--policy", str(self.policy), "--edges", str(self.edges), "--nodes",
                str(self.people), "--out", str(self.out), *self.extra]

    # --- writers used by the cases
    def write_edges(self, rows, header=("source", "target", "weight"), name="edges.csv", **kw) -> Path:
        self.edges = self.root / "in" / name
        self.edges.write_bytes(csv_bytes(list(header) if header is not None else None, rows, **kw))
        return self.edges

    def write_people(self, rows, header=("node", "age_band", "district"), name="people.csv", **kw) -> Path:
        self.people = self.root / "in" / name
        self.people.write_bytes(csv_bytes(list(header) if header is not None else None, rows, **kw))
        return self.people

    def write_policy(self, text: str) -> Path:
        self.policy.write_text(text, encoding="utf-8")
        return self.policy

    def edges_parquet(self, table: pa.Table, name="edges.parquet") -> Path:
        self.edges = self.root / "in" / name
        pq.write_table(table, self.edges)
        return self.edges

    def people_parquet(self, table: pa.Table, name="people.parquet") -> Path:
        self.people = self.root / "in" / name
        pq.write_table(table, self.people)
        return self.people


def edges_table() -> pa.Table:
    rows = edge_rows()
    return pa.table({"source": [r[0] for r in rows], "target": [r[1] for r in rows],
                     "weight": [int(r[2]) for r in rows]})


def people_table() -> pa.Table:
    rows = people_rows()
    return pa.table({"node": [r[0] for r in rows], "age_band": [r[1] for r in rows],
                     "district": [r[2] for r in rows]})


def tree_snapshot(root: Path) -> dict:
    """Every file and folder under ``root`` (hidden ones included) with the SHA-256 of each file."""
    snap = {}
    root = Path(root)
    for dirpath, dirnames, filenames in os.walk(root):
        for d in dirnames:
            snap[os.path.relpath(os.path.join(dirpath, d), root)] = "dir"
        for f in filenames:
            p = os.path.join(dirpath, f)
            with open(p, "rb") as fh:
                snap[os.path.relpath(p, root)] = hashlib.sha256(fh.read()).hexdigest()
    return snap


def error_lines(err: str) -> list[str]:
    return [line for line in err.splitlines() if line.startswith("aggpub: ")]


import pytest  # noqa: E402


@pytest.fixture(autouse=False)
def no_plots(monkeypatch):
    """Skip drawing the PNG figures of the confidential audit report (seconds per release with
    matplotlib); every other step of the release, the audit and the report writer runs for real."""
    import aggpub.audit.report as report

    monkeypatch.setattr(report, "_plots", lambda audit: {})
