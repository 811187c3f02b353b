"""The release gate end to end through the CLI: thresholds from ``[gate]``, exit code 6, no bundle."""

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
    assert "max_degree_ks: measured" in err and "> allowed 0 " in err and "No bundle was written" in err
    assert "counts as spent" in err
    # the confidential report is still written, marked as a failed gate
    audit = json.loads((tmp_path / "bundle.report" / "audit.json").read_text())
    gate = audit["gate"]
    assert gate["passed"] is False and gate["failed"] == ["max_degree_ks"]
    assert gate["max_degree_ks"]["measured"] == pytest.approx(audit["degree_distribution"]["ks"])
    assert gate["max_degree_ks"]["measured"] > 0
    assert gate["max_contact_matrix_median_relative_error"]["passed"] is True
    assert audit["outcome"].startswith("refused")
    html = (tmp_path / "bundle.report" / "report.html").read_text()
    assert "Gate FAILED" in html


def test_contact_matrix_threshold_fails_by_name(town, tmp_path, capsys):
    policy = _policy_with_gate(town, tmp_path, 'max_contact_matrix_median_relative_error = 0.0\n'
                                               'contact_matrix_attribute = "age_band"')
    out = tmp_path / "b"
    assert _release(town, policy, out, "--report", str(tmp_path / "rep")) == 6
    assert not out.exists()
    err = capsys.readouterr().err
    assert "max_contact_matrix_median_relative_error: measured" in err
    audit = json.loads((tmp_path / "rep" / "audit.json").read_text())
    e = audit["gate"]["max_contact_matrix_median_relative_error"]
    assert e["attribute"] == "age_band"
    assert e["measured"] == audit["queries"]["contact_matrix:age_band"]["median_relative_error"]


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
    assert "gate passed: max_degree_ks" in printed
    audit = json.loads((report / "audit.json").read_text())
    assert audit["gate"]["passed"] is True
    assert sorted(audit["gate"]["checked"]) == sorted(["max_degree_ks", "max_degree_wasserstein",
                                                       "max_contact_matrix_median_relative_error",
                                                       "max_superedge_median_relative_error"])
    assert main(["check", str(out)]) == 0
