"""``aggpub.pages.small_pages``: numpy's huge-page advice off around the post-processing and the audit, restored after.

A speed measure only (see its docstring); these tests check that it restores what was there, also when
two audits overlap or one fails, and that it does nothing when numpy has no such switch.
"""

from __future__ import annotations

import threading

import pytest

from aggpub import pages as run


class _Switch:
    def __init__(self, value=True):
        self.value, self.calls = value, []

    def __call__(self, enabled):
        self.calls.append(bool(enabled))
        before, self.value = self.value, bool(enabled)
        return before


def test_off_inside_and_restored_after(monkeypatch):
    sw = _Switch(True)
    monkeypatch.setattr(run, "_huge_page_setter", lambda: sw)
    with run.small_pages():
        assert sw.value is False
    assert sw.value is True
    sw.value = False  # a user who switched it off keeps it off
    with run.small_pages():
        assert sw.value is False
    assert sw.value is False


def test_overlapping_audits_restore_once_the_last_ends(monkeypatch):
    sw = _Switch(True)
    monkeypatch.setattr(run, "_huge_page_setter", lambda: sw)
    inside, leave = threading.Event(), threading.Event()

    def other():
        with run.small_pages():
            inside.set()
            leave.wait(5)

    t = threading.Thread(target=other)
    with run.small_pages():
        t.start()
        inside.wait(5)
    assert sw.value is False  # the other audit still runs
    leave.set()
    t.join(5)
    assert sw.value is True
    assert sw.calls == [False, True]


def test_restored_when_the_audit_fails(monkeypatch):
    sw = _Switch(True)
    monkeypatch.setattr(run, "_huge_page_setter", lambda: sw)
    with pytest.raises(ZeroDivisionError):
        with run.small_pages():
            1 / 0
    assert sw.value is True


def test_without_the_switch_nothing_happens(monkeypatch):
    monkeypatch.setattr(run, "_huge_page_setter", lambda: None)
    with run.small_pages():
        pass


def test_numpy_has_the_switch():
    # numpy 2.4 (the version this was measured with) has it; it returns the previous setting
    setter = run._huge_page_setter()
    assert setter is not None
    before = setter(False)
    try:
        assert setter(False) is False
    finally:
        setter(before)


# ------------------------------------------------------------------ the command: no huge pages for the process

def _probe_huge_pages(**extra) -> dict:
    """A fresh interpreter calls ``no_huge_pages`` and asks the kernel, for itself and for a child it starts."""
    from .conftest import fresh_interpreter_json

    probe = ("import json, subprocess, sys\n"
             "import aggpub.pages as p\n"
             "before = p.huge_pages_disabled()\n"
             "applied = p.no_huge_pages()\n"
             "child = subprocess.run([sys.executable, '-c', 'import aggpub.pages as p; "
             "print(p.huge_pages_disabled())'], capture_output=True, text=True).stdout.strip()\n"
             "print(json.dumps({'before': before, 'applied': applied, 'after': p.huge_pages_disabled(), "
             "'child': child}))\n")
    return fresh_interpreter_json(probe, drop=(run.HUGE_PAGES_VARIABLE,), **extra)


@pytest.mark.skipif(run.huge_pages_disabled() is None, reason="the kernel cannot be asked (not Linux)")
def test_the_command_switches_huge_pages_off_for_itself_and_its_helpers():
    got = _probe_huge_pages()
    assert got["applied"] is True and got["after"] is True and got["child"] == "True"


def test_a_users_keep_is_kept():
    got = _probe_huge_pages(**{run.HUGE_PAGES_VARIABLE: "keep"})
    assert got["applied"] is False and got["after"] == got["before"]


def test_the_console_script_calls_it(monkeypatch):
    import aggpub.cli as cli

    calls = []
    monkeypatch.setattr(run, "no_huge_pages", lambda: calls.append("pages") or True)
    monkeypatch.setattr(cli, "one_blas_thread", lambda: calls.append("blas") or True)
    monkeypatch.setattr(cli, "system_arrow_memory", lambda: calls.append("arrow") or True)
    monkeypatch.setattr(cli, "main", lambda: 2)
    with pytest.raises(SystemExit):
        cli.run()
    assert calls == ["pages", "blas", "arrow"]


def test_nothing_is_asked_of_the_kernel_off_linux(monkeypatch):
    monkeypatch.setattr(run.sys, "platform", "darwin")
    monkeypatch.delenv(run.HUGE_PAGES_VARIABLE, raising=False)
    assert run.no_huge_pages() is False and run.huge_pages_disabled() is None
