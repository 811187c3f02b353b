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
