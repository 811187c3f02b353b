"""Networks for the audit's structure section, shared between this process and a helper: the true one and the
synthetic ones.

The structure section compares the true network with networks drawn by the one
sampler (:mod:`aggpub.synthesis`) from two sets of inputs: the release's public
tables and the true aggregate ("grouping alone"). The work is cut into small tasks
(:class:`StructureWork`): each side's affinity fit, then each synthetic network of that
side, and the true network's own figures (:class:`TrueJob`). Every network draws from
its own generator (a child of its side's seed, itself drawn from the audit's), so a
seeded audit gives the same figures whoever computes which task. On networks large
enough to pay for starting an interpreter, a helper process (a fresh interpreter that
imports only what it needs; nothing is inherited from the engine's threads) takes
tasks one at a time from the moment the audit starts, while this process audits the
rest and then takes tasks too: neither waits long for the other, whichever side needs
more affinity trials. Any failure of the helper hands its task back to this process.
The helper can be started ahead (:func:`start_spare`), so that its start-up overlaps
the release's own work.

Confidential: every figure describes the true network or synthetic networks set
against it; they go into the board's report only.
"""

from __future__ import annotations

__all__ = ["MAX_STRUCTURE_EDGES", "PARALLEL_MIN_CONTACTS", "SideJob", "TrueJob", "StructureWork", "network_figures_of",
           "run_task", "start_spare", "start_spare_for", "contact_rows_estimate", "discard_spare", "start_work"]

import os
from dataclasses import dataclass

# numpy is imported where it is used: ``aggpub release`` imports this module to start the helper
# (start_spare_for) before it imports anything heavy

#: Largest network (contacts) whose structure the audit computes in memory (above, the sampled-structure
#: comparison is skipped: too slow for a release).
MAX_STRUCTURE_EDGES = 500_000
#: Contacts from which a helper process shares the structure comparison's work (below, starting an
#: interpreter costs more than the work it takes over).
PARALLEL_MIN_CONTACTS = 50_000


@dataclass(frozen=True)
class SideJob:
    """One side of the structure comparison: what to draw from and how (plain values: it crosses processes).

    Attributes
    ----------
    inputs : aggpub.synthesis.SynthesisInputs
        The sampler's inputs (the release's, or the true aggregate's).
    codes : dict
        ``{attribute: integer code of each supernode's label}`` for attribute assortativity.
    samples : int
        Synthetic networks to draw.
    transmissibility : float
        The epidemic's ``T`` (chosen on the true network).
    percolations : int
        Bond percolations per network for the final size.
    seed : int
        The side's seed: network ``i`` draws from its ``i``-th child (:func:`network_figures_of`).
    """

    inputs: object
    codes: dict
    samples: int
    transmissibility: float
    percolations: int
    seed: int


@dataclass(frozen=True)
class TrueJob:
    """The true network's own structure statistics and fidelity figures (what the sides are compared with).

    Attributes
    ----------
    u, v : numpy.ndarray
        The true contacts, in ``(u, v)`` order (the percolations draw per contact).
    n : int
        People.
    categories : dict
        ``{attribute: integer code of each person}`` for attribute assortativity.
    transmissibility, percolations, seed
        As in :class:`SideJob`.
    """

    u: object
    v: object
    n: int
    categories: dict
    transmissibility: float
    percolations: int
    seed: int

    def run(self) -> dict:
        """``{"stats": structure statistics, "figure": network figures}`` of the true network."""
        import numpy as np

        from .fidelity import network_figures
        from .network_stats import structure_statistics

        stats = structure_statistics(self.u, self.v, self.n, self.categories)
        figure = network_figures(self.u, self.v, self.n, self.transmissibility, np.random.default_rng(self.seed),
                                 self.percolations, average_clustering=stats["average_clustering"])
        return {"stats": stats, "figure": figure}


def network_figures_of(job: SideJob, index: int, rho: float) -> tuple[dict, dict]:
    """Structure statistics and fidelity figures (not yet compared) of the side's network number ``index``.

    The network and its percolations draw from the ``index``-th child of ``job.seed``
    (:meth:`numpy.random.SeedSequence.spawn`): every network has its own stream, so the
    figures do not depend on which thread draws it or in which order.
    """
    import numpy as np

    from ..synthesis import draw_network
    from .fidelity import network_figures
    from .network_stats import structure_statistics

    rng = np.random.default_rng(np.random.SeedSequence(job.seed).spawn(int(job.samples))[index])
    inputs = job.inputs
    n = int(inputs.sizes.sum())
    cats = {c: np.repeat(code, inputs.sizes) for c, code in job.codes.items()}
    su, sv = draw_network(inputs, rng, rho)
    stats = structure_statistics(su, sv, n, cats)
    figure = network_figures(su, sv, n, job.transmissibility, rng, job.percolations,
                             average_clustering=stats["average_clustering"])
    return stats, figure


def run_task(sides: dict, true_job: TrueJob, task: tuple):
    """Do one task of the structure section (here or in the helper).

    ``("fit", side)`` returns the side's affinity ``rho`` (:func:`aggpub.synthesis.fit_affinity`);
    ``("network", side, index, rho)`` returns ``(structure statistics, fidelity figures)`` of
    that network (:func:`network_figures_of`); ``("true",)`` returns :meth:`TrueJob.run`.
    """
    kind = task[0]
    if kind == "fit":
        from ..synthesis import fit_affinity

        return fit_affinity(sides[task[1]].inputs)
    if kind == "network":
        _, name, index, rho = task
        return network_figures_of(sides[name], index, rho)
    if kind == "true":
        return true_job.run()
    raise ValueError(f"unknown structure task {task!r}")


class StructureWork:
    """The structure section's work as small tasks, shared between a helper process and this one.

    Tasks: each side's affinity fit (which, once done, queues one task per network of
    that side with the fitted ``rho``) and the true network's figures. With a helper
    (:func:`start_work`), a feeding thread hands the helper one task at a time from the
    start, while this process audits the rest; :meth:`result` makes this process take
    tasks too until none is left, so neither waits long for the other (the work is
    split network by network, not side by side). Without, this process does every
    task in :meth:`result`. Each network draws from its own generator
    (:func:`network_figures_of`), so the figures do not depend on who computes what.
    A helper that fails (killed, out of memory, not importable) hands its task back
    and this process does the rest.

    Parameters
    ----------
    sides : dict
        ``{side name: SideJob}``.
    true_job : TrueJob
    proc : subprocess.Popen, optional
        The helper (a fresh interpreter running :func:`_serve`); ``None``: no helper.
    """

    def __init__(self, sides: dict, true_job: TrueJob, proc=None):
        import threading
        from collections import deque

        self.sides = dict(sides)
        self.true_job = true_job
        self.proc = proc
        self._cond = threading.Condition()
        self._tasks: deque = deque([("fit", name) for name in self.sides] + [("true",)])
        self._busy = 0  # tasks taken and not finished (a fit adds tasks when it ends)
        self._done: dict = {}
        self._error: BaseException | None = None
        self._closed = False
        self.helper_tasks = 0  # tasks the helper answered
        self.thread = None
        if proc is not None:
            self.thread = threading.Thread(target=self._feed, name="aggpub-audit-structure", daemon=True)
            self.thread.start()

    def _take(self):
        """The next task (``None``: nothing left, or stop)."""
        with self._cond:
            while not self._tasks and self._busy and self._error is None and not self._closed:
                self._cond.wait()
            if not self._tasks or self._error is not None or self._closed:
                return None
            self._busy += 1
            return self._tasks.popleft()

    def _finish(self, task, value=None, error: BaseException | None = None, again: bool = False) -> None:
        """Record a task's value (a fit queues its networks), its error, or hand it back (``again``)."""
        with self._cond:
            self._busy -= 1
            if again:
                self._tasks.appendleft(task)
            elif error is not None:
                self._error = self._error or error
            else:
                self._done[task[:3]] = value  # a network by (kind, side, index): its rho is not part of the key
                if task[0] == "fit":
                    name = task[1]
                    self._tasks.extend(("network", name, i, value) for i in range(int(self.sides[name].samples)))
            self._cond.notify_all()

    def _work_here(self) -> None:
        while (task := self._take()) is not None:
            try:
                value = run_task(self.sides, self.true_job, task)
            except BaseException as exc:  # noqa: BLE001 - raised by result()
                self._finish(task, error=exc)
            else:
                self._finish(task, value)

    def _feed(self) -> None:
        """The feeding thread: the helper's definitions once, then one task at a time, each answer recorded.

        Waiting on the pipe does not hold the interpreter's lock, so this thread costs this
        process almost nothing while the helper works.
        """
        import pickle

        proc = self.proc
        try:
            pickle.dump(("define", self.sides, self.true_job), proc.stdin, protocol=pickle.HIGHEST_PROTOCOL)
            proc.stdin.flush()
        except Exception:  # noqa: BLE001 - the helper is gone: this process does every task
            return
        while (task := self._take()) is not None:
            try:
                pickle.dump(task, proc.stdin, protocol=pickle.HIGHEST_PROTOCOL)
                proc.stdin.flush()
                status, value = pickle.load(proc.stdout)
            except Exception:  # noqa: BLE001 - the helper died: its task goes back to the queue
                self._finish(task, again=True)
                return
            if status != "ok":  # the task failed in the helper: this process does it (and reports any error)
                self._finish(task, again=True)
                return
            self.helper_tasks += 1
            self._finish(task, value)

    def result(self) -> dict:
        """``{side name: {"runs": [...], "figures": [...]}, ..., "true": TrueJob.run()}``, once every task is done."""
        self._work_here()  # returns once no task is queued or taken: a task the helper hands back is done here
        if self.thread is not None:
            self.thread.join()
        if self._error is not None:
            raise self._error
        out = {}
        for name, job in self.sides.items():
            pairs = [self._done[("network", name, i)] for i in range(int(job.samples))]
            out[name] = {"runs": [p[0] for p in pairs], "figures": [p[1] for p in pairs]}
        out["true"] = self._done[("true",)]
        return out

    def close(self) -> None:
        """Stop taking tasks and end the helper (also after :meth:`result`)."""
        with self._cond:
            self._closed = True
            self._tasks.clear()
            self._cond.notify_all()
        if self.proc is not None:
            _end(self.proc)
        if self.thread is not None:
            self.thread.join()


#: What the helper interpreter runs.
_CHILD = "from aggpub.audit.sampled import _serve; _serve()"


def _serve() -> None:
    """The helper's loop: import what the tasks need, read the definitions, then answer tasks until the input ends.

    Each answer is ``("ok", value)`` or ``("failed", None)`` (the caller then does the task itself).
    """
    import pickle
    import sys

    _import_side()
    stdin, stdout = sys.stdin.buffer, sys.stdout.buffer
    try:
        _, sides, true_job = pickle.load(stdin)
    except EOFError:
        return
    while True:
        try:
            task = pickle.load(stdin)
        except EOFError:
            return
        try:
            answer = ("ok", run_task(sides, true_job, task))
        except Exception:  # noqa: BLE001 - reported as failed; the caller computes it and raises what it raises
            answer = ("failed", None)
        pickle.dump(answer, stdout, protocol=pickle.HIGHEST_PROTOCOL)
        stdout.flush()


def _import_side() -> None:
    """Import the modules the tasks use (the helper does it before its tasks arrive)."""
    from .. import synthesis  # noqa: F401
    from . import fidelity, network_stats  # noqa: F401


def _spawn():
    """The helper: a fresh interpreter running only this module (``python -c``). Unlike :mod:`multiprocessing`, it
    never imports the caller's ``__main__`` again, so a steward's script without a ``__main__`` guard is not run
    twice."""
    import subprocess
    import sys

    return subprocess.Popen([sys.executable, "-c", _CHILD], stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                            stderr=subprocess.DEVNULL)


#: A helper interpreter started ahead of its tasks (:func:`start_spare`), taken by the next :func:`start_work`.
_SPARE: list = []
#: Whether :func:`discard_spare` is registered to run at exit.
_AT_EXIT: list = []


def _worth_a_helper(contacts: int) -> bool:
    return (os.cpu_count() or 1) >= 2 and contacts >= PARALLEL_MIN_CONTACTS


def start_spare(contacts: int) -> None:
    """Start the helper interpreter now, so that its start-up and imports (about 0.5 CPU-s) overlap this process's
    work; end a spare when ``contacts`` say none is needed.

    Called by :func:`aggpub.pipeline.run_release` once the network is read, when the audit's
    structure section will run with a helper (``contacts`` in ``[PARALLEL_MIN_CONTACTS,
    MAX_STRUCTURE_EDGES]``, two cores or more); a spare started earlier from an estimate
    (:func:`start_spare_for`) is kept then, or ended when the true count is outside that range.
    The helper imports, then waits for its tasks; :func:`start_work` hands it its tasks.
    :func:`discard_spare` ends a spare that was not used. Decided from the public machine and
    the number of contacts, which is not released and decides nothing released
    (docs/privacy.md, section 10).
    """
    if not _worth_a_helper(contacts) or contacts > MAX_STRUCTURE_EDGES:
        discard_spare()
        return
    if _SPARE:
        return
    try:
        _SPARE.append(_spawn())
    except Exception:  # noqa: BLE001 - no process could be started: start_work computes in this process
        return
    if not _AT_EXIT:  # once per process: a command that stops before run_release ends its spare too
        import atexit

        atexit.register(discard_spare)
        _AT_EXIT.append(True)


def start_spare_for(edges) -> None:
    """Start the helper before the release has imported or read anything, from an estimate of the contact rows
    (:func:`contact_rows_estimate`): its start-up then runs beside this process's own imports and reading,
    when the second core is mostly idle, instead of beside the release's work.

    ``aggpub release`` calls it first thing (and :func:`aggpub.pipeline.run_release` on entry); once the
    network is read, :func:`start_spare` keeps the spare or ends it from the true count. A wrong
    estimate costs only time: a spare ended unused, or a helper started after reading as before.
    """
    if _SPARE:  # already started (``aggpub release`` calls this before run_release does): nothing read again
        return
    rows = contact_rows_estimate(edges)
    if rows is not None and _worth_a_helper(rows) and rows <= MAX_STRUCTURE_EDGES:
        start_spare(rows)


#: Bytes of a text file read to estimate its rows.
ESTIMATE_BYTES = 1 << 20


def contact_rows_estimate(edges) -> int | None:
    """About how many rows the contact input holds, read cheaply: an Arrow table's rows, a Parquet file's row
    count (its footer), a text file's lines (counted in its first MiB and scaled to its size, less a
    header); ``None`` when it cannot tell (no such file, compressed text, anything else).

    Only for :func:`start_spare_for`: it decides when a helper starts, nothing else.
    """
    rows = getattr(edges, "num_rows", None)
    if isinstance(rows, int):
        return rows
    try:
        path = os.fspath(edges)
        size = os.path.getsize(path)
        with open(path, "rb") as fh:
            head = fh.read(4)
            if head != b"PAR1":  # text: its first MiB (a Parquet file needs only its footer)
                head += fh.read(ESTIMATE_BYTES - 4)
    except (TypeError, OSError):
        return None
    if head == b"PAR1":
        try:
            import pyarrow.parquet as pq

            return int(pq.ParquetFile(path).metadata.num_rows)
        except Exception:  # noqa: BLE001 - unreadable here: the release reports it when it reads the file
            return None
    if not head or head[:2] == b"\x1f\x8b" or b"\0" in head:  # empty, gzip or another binary format
        return None
    lines = head.count(b"\n") + (not head.endswith(b"\n") and len(head) == size)
    if len(head) < size:
        lines = lines * size // len(head)
    return max(lines - 1, 0)  # the header line


def discard_spare() -> None:
    """End the spare helper if nothing took it."""
    while _SPARE:
        _end(_SPARE.pop())


def _take_spare():
    """The spare helper if it is still waiting (one that died is ended), else ``None``."""
    while _SPARE:
        proc = _SPARE.pop()
        if proc.poll() is None:
            return proc
        _end(proc)
    return None


def _end(proc) -> None:
    """End a helper: killed first (a thread reading its answer then sees the end of its output), then its pipes."""
    if proc.poll() is None:
        proc.kill()
    proc.wait()
    for stream in (proc.stdin, proc.stdout):
        if stream is not None:
            try:
                stream.close()
            except OSError:  # a buffered request the dead helper never read
                pass


def start_work(sides: dict, true_job: TrueJob, contacts: int, parallel: bool | None = None) -> StructureWork:
    """Start the structure section's work (:class:`StructureWork`): shared with a helper process when worth it.

    Parameters
    ----------
    sides : dict
        ``{side name: SideJob}``.
    true_job : TrueJob
    contacts : int
        Contacts of the true network (the size of the work).
    parallel : bool, optional
        Force the choice (tests); default: a helper when the machine has two cores or
        more and the network has at least :data:`PARALLEL_MIN_CONTACTS` contacts. A helper
        started ahead by :func:`start_spare` is used when there is one.
    """
    if parallel is None:
        parallel = _worth_a_helper(contacts)
    if not parallel:
        discard_spare()
        return StructureWork(sides, true_job)
    proc = _take_spare()
    if proc is None:
        try:
            proc = _spawn()
        except Exception:  # noqa: BLE001 - no process could be started here: compute in this process
            proc = None
    return StructureWork(sides, true_job, proc)
