"""Every policy shipped in ``policies/`` releases the demo town and passes its own gate.

The policies are written for the invented town of ``aggpub demo``
(:mod:`aggpub.demo`): same columns, the demo's generalisation hierarchies.
For each file (found by glob, so a new policy is covered without touching this
test):

* its hierarchies are the ones the demo generates (``AGE_HIERARCHY``,
  ``NEIGHBOURHOOD_HIERARCHY``), so it groups the demo town as written;
* ``aggpub plan`` on the demo town predicts a pass (or the policy sets no
  thresholds), exit code 0;
* ``aggpub release`` of the full demo town (30,000 residents; seeded, so the
  bundle is a non-private test bundle) exits 0, its pre-flight and its gate on the
  released values both pass, and ``aggpub check`` verifies the bundle.

Each policy is copied into a temporary folder first: its ``[ledger]`` path is
relative to the policy file, so the test charges a throw-away ledger, never one
beside the repository's policies.
"""

from __future__ import annotations

import json
import pathlib
import shutil
import tomllib

import pytest

from aggpub.cli import main
from aggpub.demo import AGE_HIERARCHY, NEIGHBOURHOOD_HIERARCHY, write_demo_inputs
from aggpub.plan import run_plan

ROOT = pathlib.Path(__file__).resolve().parent.parent
POLICIES = sorted((ROOT / "policies").glob("*.toml"))
DEMO_HIERARCHIES = {"age_band": AGE_HIERARCHY, "neighbourhood": NEIGHBOURHOOD_HIERARCHY}


def test_policies_are_found():
    assert len(POLICIES) >= 3, POLICIES  # open research, research enclave, internal planning (at least)


@pytest.mark.parametrize("policy_file", POLICIES, ids=lambda p: p.stem)
def test_shipped_policy_uses_the_demo_hierarchies(policy_file):
    with open(policy_file, "rb") as fh:
        policy = tomllib.load(fh)
    hierarchies = policy.get("grouping", {}).get("hierarchies", {})
    for attr in policy["grouping"].get("attributes", []):
        if attr in DEMO_HIERARCHIES:
            assert hierarchies[attr]["levels"] == DEMO_HIERARCHIES[attr], (policy_file.name, attr)


@pytest.fixture(scope="module")
def town(tmp_path_factory):
    """The demo town as ``aggpub demo`` writes it (default size and seed)."""
    return write_demo_inputs(tmp_path_factory.mktemp("shipped-town"))


@pytest.mark.heavy
@pytest.mark.parametrize("policy_file", POLICIES, ids=lambda p: p.stem)
def test_shipped_policy_plans_a_pass_and_passes_its_gate_on_the_demo_town(policy_file, town, tmp_path, capsys):
    policy = tmp_path / policy_file.name
    shutil.copyfile(policy_file, policy)

    plan = run_plan(policy, town["people"])
    assert [r.verdict for r in plan.rows] in (["expected to pass"], ["no thresholds"]), plan.as_dict()
    assert main(["plan", "--policy", str(policy), "--nodes", str(town["people"]), "--quiet"]) == 0

    out = tmp_path / "bundle"
    code = main(["release", "--policy", str(policy), "--edges", str(town["edges"]), "--nodes", str(town["people"]),
                 "--out", str(out), "--seed", "20261202", "--audit-draws", "3", "--quiet"])
    printed = capsys.readouterr()
    assert code == 0, printed.err
    audit = json.loads((tmp_path / "bundle.report" / "audit.json").read_text(encoding="utf-8"))
    assert audit["preflight"]["passed"], audit["preflight"]
    assert audit["gate"]["passed"], audit["gate"]
    assert audit["gate"]["checked"] == plan.rows[0].gate["checked"]
    for key in audit["gate"]["checked"]:  # every threshold judged on a released figure, none left unknown
        entry = audit["gate"][key]
        assert entry["value"] is not None and entry["value"] <= entry["allowed"], (key, entry)
    assert main(["check", str(out)]) == 0
