"""The manifest tells the truth about the run: the policy as applied (command-line overrides included),
the dataset id of the ledger, and no internal file path (issue 14.6)."""

from __future__ import annotations

import json

from aggpub.cli import main
from aggpub.demo import write_demo_inputs


def test_manifest_records_what_was_applied_and_no_internal_path(tmp_path, capsys):
    town = write_demo_inputs(tmp_path / "inputs", n_people=2000)
    # rename the edge columns in the file, then name them on the command line (overriding the policy)
    text = (tmp_path / "inputs" / "contacts.csv").read_text(encoding="utf-8").split("\n", 1)
    header = text[0].replace("source", "person_a").replace("target", "person_b")
    (tmp_path / "inputs" / "contacts.csv").write_text(header + "\n" + text[1], encoding="utf-8")
    policy = tmp_path / "inputs" / "policy.toml"
    policy.write_text(policy.read_text(encoding="utf-8") + '\n[ledger]\npath = "ledgers/town.ledger"\n'
                      'dataset = "quennet-vale-demo"\nlifetime_epsilon = 4.0\n', encoding="utf-8")
    (tmp_path / "inputs" / "ledgers").mkdir()
    out = tmp_path / "inputs" / "release"
    code = main(["release", "--policy", str(policy), "--edges", str(town["edges"]), "--nodes", str(town["people"]),
                 "--out", str(out), "--source-column", "person_a", "--target-column", "person_b", "--quiet"])
    assert code == 0, capsys.readouterr().err
    raw = (out / "manifest.json").read_text(encoding="utf-8")
    manifest = json.loads(raw)
    assert manifest["policy"]["input"]["source"] == "person_a"
    assert manifest["policy"]["input"]["target"] == "person_b"
    assert manifest["policy"]["ledger"] == {"dataset": "quennet-vale-demo", "lifetime_epsilon": 4.0}
    assert manifest["ledger"]["dataset"] == "quennet-vale-demo"
    assert str(tmp_path) not in raw and "town.ledger" not in raw
