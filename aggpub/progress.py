"""Progress on stderr: stage messages, and long engine work reported while it runs.

:class:`Progress` prints one line per stage (silent when quiet); :func:`silent`
is the printer that prints nothing.

A statement inside DuckDB or Spark can run for minutes on 10^8 edges and gives
Python no chance to print anything. :class:`LongStep` watches it from a helper
thread: after ``every`` seconds, and every ``every`` seconds after that, it asks
the engine how far the work is (DuckDB's ``query_progress``, Spark's status
tracker) and reports one line. Work that ends sooner prints nothing.
Loops over batches in Python report through :meth:`LongStep.tick` instead.
"""

from __future__ import annotations

__all__ = ["Progress", "silent", "LongStep", "PROGRESS_EVERY"]

import sys
import threading
import time


class Progress:
    """Stage messages on stderr (silent when ``quiet``): ``progress: <message> (<seconds> s in)``.

    The time since the command started comes last, after the message, so the
    message reads first; every command prints progress the same way.
    """

    def __init__(self, quiet: bool = False, stream=None):
        self.quiet = quiet
        self.stream = stream or sys.stderr
        self.t0 = time.perf_counter()

    def __call__(self, message: str) -> None:
        if not self.quiet:
            print(f"progress: {message} ({time.perf_counter() - self.t0:.1f} s in)", file=self.stream, flush=True)


def silent(message: str) -> None:
    """A progress printer that prints nothing."""

#: Seconds before a long step first reports, and between its reports.
PROGRESS_EVERY = 15.0


class LongStep:
    """Context manager that reports a long step's progress while it runs.

    Parameters
    ----------
    report : callable or None
        Takes one message (the release's progress printer). ``None``: silent.
    what : str
        The step, as the message names it ("reading edges").
    poll : callable, optional
        Returns the engine's own estimate as text ("42%"), or ``None`` when it
        has none; called from the helper thread.
    every : float
        Seconds between reports.
    """

    def __init__(self, report, what: str, poll=None, every: float | None = None):
        self.report = report
        self.what = what
        self.poll = poll
        self.every = PROGRESS_EVERY if every is None else float(every)
        self._stop = threading.Event()
        self._thread = None
        self._t0 = self._last_tick = time.monotonic()

    def __enter__(self):
        self._t0 = self._last_tick = time.monotonic()
        if self.report is not None and self.poll is not None:
            self._thread = threading.Thread(target=self._watch, name="aggpub-progress", daemon=True)
            self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        if self._thread is not None:
            self._thread.join()
        return False

    def _message(self, detail) -> str:
        elapsed = time.monotonic() - self._t0
        return f"{self.what}: {detail + ', ' if detail else ''}{elapsed:.0f} s so far"

    def _watch(self) -> None:
        while not self._stop.wait(self.every):
            try:
                detail = self.poll()
            except Exception:  # noqa: BLE001 - an estimate that cannot be had is left out, never fatal
                detail = None
            if self._stop.is_set():
                break
            self.report(self._message(detail))

    def tick(self, detail: str) -> None:
        """From a loop in this thread: report ``detail`` if ``every`` seconds passed since the last report."""
        now = time.monotonic()
        if self.report is not None and now - self._last_tick >= self.every:
            self._last_tick = now
            self.report(self._message(detail))
