"""The command line: help, exit codes, one-line errors, the check command (issue 7 item 1, issue 2 item 9)."""

from __future__ import annotations

import pytest

from aggpub import errors
from aggpub.cli import EXIT_CODES_HELP, main
from tests._badinput import POLICY_TEXT, Scenario, error_lines, no_plots  # noqa: F401

pytestmark = pytest.mark.usefixtures("no_plots")

DOCUMENTED = {0: "success", 1: "check found problems", 2: "usage error", 3: "input error", 4: "policy error",
              5: "privacy/budget error", 6: "gate failed", 7: "output error", 8: "bundle error",
              9: "internal error", 130: "interrupted (nothing published)"}


def test_exit_code_table_matches_the_error_classes():
    for code, text in DOCUMENTED.items():
        assert f"{code} {text}" in EXIT_CODES_HELP
    by_class = {errors.UsageError: 2, errors.InputError: 3, errors.PolicyError: 4, errors.PrivacyError: 5,
                errors.BudgetError: 5, errors.GateError: 6, errors.OutputError: 7, errors.BundleError: 8,
                errors.AggpubError: 9}
    for cls, code in by_class.items():
        assert cls.exit_code == code


@pytest.mark.parametrize("command", ["release", "check", "demo"])
def test_every_command_has_help_with_the_exit_codes(command, capsys):
    with pytest.raises(SystemExit) as exc:
        main([command, "--help"])
    assert exc.value.code == 0
    out = capsys.readouterr().out
    assert "exit codes:" in out and "3 input error" in out and "--debug" in out


def test_top_level_help_and_version(capsys):
    with pytest.raises(SystemExit):
        main(["--help"])
    assert "exit codes:" in capsys.readouterr().out
    with pytest.raises(SystemExit) as exc:
        main(["--version"])
    assert exc.value.code == 0 and capsys.readouterr().out.startswith("aggpub ")


def test_release_then_check(tmp_path, capsys):
    s = Scenario(tmp_path)
    assert main(s.argv() + ["--quiet", "--seed", "1"]) == 0
    out = capsys.readouterr().out
    assert str(s.out) in out and "seeded" in out.lower()
    assert main(["check", str(s.out)]) == 0
    captured = capsys.readouterr()
    assert "bundle verified" in captured.out and "seeded bundle" in captured.err


def test_check_a_folder_that_is_not_a_bundle(tmp_path, capsys):
    (tmp_path / "x.txt").write_text("x")
    assert main(["check", str(tmp_path)]) == 1
    assert "manifest.json: missing" in capsys.readouterr().out


def test_check_a_missing_path(tmp_path, capsys):
    assert main(["check", str(tmp_path / "nothing")]) == 1
    assert "not a folder" in capsys.readouterr().out


def test_usage_errors_are_one_line(capsys):
    assert main(["release"]) == 2
    err = capsys.readouterr().err
    assert len(error_lines(err)) == 1 and "usage error" in err
    assert main(["frobnicate"]) == 2
    assert len(error_lines(capsys.readouterr().err)) == 1


def test_debug_reraises(tmp_path):
    s = Scenario(tmp_path)
    s.people.write_bytes(b"")
    with pytest.raises(errors.InputError):
        main(s.argv() + ["--debug"])


def test_keyboard_interrupt_is_one_line(tmp_path, capsys, monkeypatch):
    import aggpub.ingest as ingest_mod

    def interrupted(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(ingest_mod, "load_network", interrupted)
    s = Scenario(tmp_path)
    assert main(s.argv()) == 130
    err = capsys.readouterr().err
    assert error_lines(err) == ["aggpub: interrupted; nothing was published"]
    assert not s.out.exists()


@pytest.mark.heavy
def test_the_command_ends_cleanly_after_a_release(tmp_path):
    """`python -m aggpub release` (run() ends a successful release without interpreter teardown):
    exit 0, the whole summary printed, the bundle verifies, no spill folder left beside it.
    A refused release exits the ordinary way with its code."""
    import subprocess
    import sys

    s = Scenario(tmp_path)
    proc = subprocess.run([sys.executable, "-m", "aggpub", *s.argv(), "--seed", "1"], capture_output=True,
                          text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.rstrip().splitlines()[-1].startswith("CONFIDENTIAL audit report")
    assert not list(s.out.parent.glob(".aggpub-spill-*"))
    check = subprocess.run([sys.executable, "-m", "aggpub", "check", str(s.out)], capture_output=True, text=True,
                           timeout=300)
    assert check.returncode == 0 and "bundle verified" in check.stdout
    s.write_policy(POLICY_TEXT_GATED)
    refused = subprocess.run([sys.executable, "-m", "aggpub", *s.argv(), "--overwrite"], capture_output=True,
                             text=True, timeout=300)
    assert refused.returncode == 6 and "max_degree_ks" in refused.stderr


POLICY_TEXT_GATED = POLICY_TEXT + """
[gate]
max_degree_ks = 0.0
"""


def test_help_names_the_environment_variables_the_command_sets(capsys):
    from aggpub.cli import ARROW_POOL_VARIABLE
    from aggpub.pages import HUGE_PAGES_VARIABLE

    with pytest.raises(SystemExit):
        main(["--help"])
    out = capsys.readouterr().out
    assert f"{HUGE_PAGES_VARIABLE}=keep" in out and ARROW_POOL_VARIABLE in out and "OPENBLAS_NUM_THREADS" in out


def test_release_summary_names_both_degree_figures_when_sequences_are_released(capsys):
    # the block model of the superedge counts and the released degree sequences can disagree widely (small
    # supernodes, most cells near zero: clamping lifts every empty cell); the one-line summary shows both
    from aggpub.cli import _print_audit

    dd = {"ks": 0.9993, "wasserstein1": 51.3, "from_degree_sequences": {"ks": 0.0282, "wasserstein1": 0.522}}
    _print_audit({"degree_distribution": dd}, "report")
    out = capsys.readouterr().out
    assert "from the superedge counts KS 0.9993, Wasserstein-1 51.3000" in out
    assert "from the released degree sequences KS 0.0282, Wasserstein-1 0.5220" in out
    _print_audit({"degree_distribution": {"ks": 0.1, "wasserstein1": 1.5}}, "report")  # no sequences released
    assert "degree distribution KS 0.1000, Wasserstein-1 1.5000" in capsys.readouterr().out
