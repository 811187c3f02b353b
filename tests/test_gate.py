"""The release gate end to end through the CLI: thresholds from ``[gate]``, exit code 6, no bundle.

The gate's figures come from the released values and the law of their noise (aggpub.gate): the
tests recompute them from the published bundle and check that the audit's true figures are not
what the gate read.
"""

from __future__ import annotations

import json

import pytest

from aggpub.cli import main
from aggpub.demo import write_demo_inputs


@pytest.fixture(scope="module")
def town(tmp_path_factory):
    """The invented demo town, 3,000 residents, with its example policy."""
    return write_demo_inputs(tmp_path_factory.mktemp("gate-inputs"), n_people=3000)


def _policy_with_gate(town, tmp_path, gate: str):
    text = open(town["policy"], encoding="utf-8").read() + "\n[gate]\n" + gate + "\n"
    path = tmp_path / "policy.toml"
    path.write_text(text, encoding="utf-8")
    return path


def _release(town, policy, out, *extra):
    return main(["release", "--policy", str(policy), "--edges", str(town["edges"]), "--nodes",
                 str(town["people"]), "--out", str(out), "--quiet", *extra])


def test_impossible_threshold_is_refused_with_no_bundle(town, tmp_path, capsys):
    policy = _policy_with_gate(town, tmp_path, "max_degree_ks = 0.0\nmax_contact_matrix_median_relative_error = 0.5")
    out = tmp_path / "bundle"
    code = _release(town, policy, out)
    err = capsys.readouterr().err
    assert code == 6
    assert not out.exists()
    assert not any(p.name.startswith(".bundle") for p in tmp_path.iterdir())  # no temporary left behind
    assert "max_degree_ks: expected" in err and "> allowed 0 " in err and "No bundle was written" in err
    assert "counts as spent" in err and "estimated from the released values" in err
    # the confidential report is still written, marked as a failed gate
    audit = json.loads((tmp_path / "bundle.report" / "audit.json").read_text())
    gate = audit["gate"]
    assert gate["passed"] is False and gate["failed"] == ["max_degree_ks"]
    assert gate["max_degree_ks"]["value"] == pytest.approx(gate["metrics"]["degree_ks"])
    assert gate["max_degree_ks"]["value"] > 0
    assert gate["max_contact_matrix_median_relative_error"]["passed"] is True
    assert audit["preflight"]["passed"] is True  # no assumptions: nothing to predict before the noise
    assert audit["outcome"].startswith("refused")
    html = (tmp_path / "bundle.report" / "report.html").read_text()
    assert "Gate FAILED" in html and "decided nothing" in html


def test_contact_matrix_threshold_fails_by_name(town, tmp_path, capsys):
    policy = _policy_with_gate(town, tmp_path, 'max_contact_matrix_median_relative_error = 0.0\n'
                                               'contact_matrix_attribute = "age_band"')
    out = tmp_path / "b"
    assert _release(town, policy, out, "--report", str(tmp_path / "rep")) == 6
    assert not out.exists()
    err = capsys.readouterr().err
    assert "max_contact_matrix_median_relative_error: expected" in err
    audit = json.loads((tmp_path / "rep" / "audit.json").read_text())
    e = audit["gate"]["max_contact_matrix_median_relative_error"]
    assert e["attribute"] == "age_band" and e["value"] > 0
    assert e["value"] == audit["gate"]["metrics"]["contact_matrix_median_relative_error"]


def test_generous_thresholds_pass_and_publish(town, tmp_path, capsys):
    policy = _policy_with_gate(town, tmp_path, "max_degree_ks = 0.5\nmax_degree_wasserstein = 50\n"
                                               "max_contact_matrix_median_relative_error = 5\n"
                                               "max_superedge_median_relative_error = 5")
    out = tmp_path / "bundle"
    assert _release(town, policy, out) == 0
    printed = capsys.readouterr().out
    assert (out / "manifest.json").exists()
    report = tmp_path / "bundle.report"
    assert f"CONFIDENTIAL audit report (board only, not for researchers): {report}" in printed
    assert "gate passed on the released values: max_degree_ks" in printed
    audit = json.loads((report / "audit.json").read_text())
    assert audit["gate"]["passed"] is True
    assert sorted(audit["gate"]["checked"]) == sorted(["max_degree_ks", "max_degree_wasserstein",
                                                       "max_contact_matrix_median_relative_error",
                                                       "max_superedge_median_relative_error"])
    assert main(["check", str(out)]) == 0
    # the gate's figures are a function of the published bundle alone: recomputed from it, they agree
    from aggpub import read_bundle, read_policy
    from aggpub.gate.released import released_metrics

    bundle = read_bundle(out)
    again = released_metrics(bundle.tables, bundle.manifest, read_policy(policy))
    for key in ("degree_ks", "degree_wasserstein1", "contact_matrix_median_relative_error",
                "superedge_median_relative_error"):
        assert again[key] == pytest.approx(audit["gate"]["metrics"][key])
