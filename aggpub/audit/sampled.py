"""Networks for the audit's structure section, in this process or a helper: the true one and the synthetic ones.

The structure section compares the true network with networks drawn by the one
sampler (:mod:`aggpub.synthesis`) from two sets of inputs: the release's public
tables and the true aggregate ("grouping alone"). The two sides are independent:
each has its own generator (seeded from the audit's, so a seeded audit gives the
same figures whichever way it runs), its own affinity fit and its own draws; so are
the true network's own figures (:class:`TrueJob`, its own generator for the
percolations). On networks large enough to pay for starting an interpreter, the
release's side and the true network's figures run in a helper process (a fresh
interpreter that imports only what it needs; nothing is inherited from the engine's
threads) while this process audits the rest and draws the other side; the figures are
the same as in process, and any failure of the helper falls back to computing them here.
The helper can be started ahead (:func:`start_spare`), so that its start-up overlaps
the release's own work.

Confidential: every figure describes the true network or synthetic networks set
against it; they go into the board's report only.
"""

from __future__ import annotations

__all__ = ["MAX_STRUCTURE_EDGES", "PARALLEL_MIN_CONTACTS", "SideJob", "TrueJob", "side_figures", "start_jobs",
           "start_spare", "discard_spare"]

import os
from dataclasses import dataclass

import numpy as np

#: Largest network (contacts) whose structure the audit computes in memory (above, the sampled-structure
#: comparison is skipped: too slow for a release).
MAX_STRUCTURE_EDGES = 500_000
#: Contacts from which the release's side of the structure comparison runs in a helper process (below,
#: starting an interpreter costs more than the work it takes over).
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
        Seeds this side's generator.
    """

    inputs: object
    codes: dict
    samples: int
    transmissibility: float
    percolations: int
    seed: int

    def run(self) -> dict:
        return side_figures(self)


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
        from .fidelity import network_figures
        from .network_stats import structure_statistics

        stats = structure_statistics(self.u, self.v, self.n, self.categories)
        figure = network_figures(self.u, self.v, self.n, self.transmissibility, np.random.default_rng(self.seed),
                                 self.percolations, average_clustering=stats["average_clustering"])
        return {"stats": stats, "figure": figure}


def side_figures(job: SideJob) -> dict:
    """Structure statistics and fidelity figures (not yet compared) of ``job.samples`` synthetic networks.

    Returns
    -------
    dict
        ``runs``: :func:`aggpub.audit.network_stats.structure_statistics` of each network;
        ``figures``: :func:`aggpub.audit.fidelity.network_figures` of each (degrees included).
    """
    from ..synthesis import draw_network, fit_affinity
    from .fidelity import network_figures
    from .network_stats import structure_statistics

    rng = np.random.default_rng(job.seed)
    inputs = job.inputs
    n = int(inputs.sizes.sum())
    rho = fit_affinity(inputs)
    cats = {c: np.repeat(code, inputs.sizes) for c, code in job.codes.items()}
    runs, figures = [], []
    for _ in range(int(job.samples)):
        su, sv = draw_network(inputs, rng, rho)
        runs.append(structure_statistics(su, sv, n, cats))
        figures.append(network_figures(su, sv, n, job.transmissibility, rng, job.percolations,
                                       average_clustering=runs[-1]["average_clustering"]))
    return {"runs": runs, "figures": figures}


class _InProcess:
    """Jobs computed here, when their figures are asked for."""

    def __init__(self, jobs: tuple):
        self.jobs = jobs

    def result(self) -> list:
        return [job.run() for job in self.jobs]

    def close(self) -> None:
        pass


class _Helper:
    """Jobs computed in a helper process, in turn (falls back to this process if the helper fails).

    The helper is a fresh interpreter running only this module (``python -c``), given the
    pickled jobs on its standard input and answering on its standard output: unlike
    :mod:`multiprocessing`, it never imports the caller's ``__main__`` again, so a
    steward's script without a ``__main__`` guard is not run twice. A thread feeds it and
    reads its answer while this process carries on.
    """

    def __init__(self, jobs: tuple, proc=None):
        import pickle
        import threading

        self.jobs = jobs
        self.answer: dict = {}
        self.proc = proc if proc is not None else _spawn()
        data = pickle.dumps(jobs, protocol=pickle.HIGHEST_PROTOCOL)

        def talk():
            try:
                out, _ = self.proc.communicate(data)
                if self.proc.returncode == 0:
                    self.answer["figures"] = pickle.loads(out)
            except Exception:  # noqa: BLE001 - any failure: the caller computes the side itself
                pass

        self.thread = threading.Thread(target=talk, name="aggpub-audit-side", daemon=True)
        self.thread.start()

    def result(self) -> list:
        self.thread.join()
        if "figures" in self.answer:
            return self.answer["figures"]
        return [job.run() for job in self.jobs]  # the helper failed (killed, out of memory, not importable)

    def close(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
        self.thread.join()


#: What the helper interpreter runs: import what the jobs need, then read the pickled jobs, write their figures.
_CHILD = ("import pickle, sys; from aggpub.audit.sampled import _import_side; _import_side(); "
          "jobs = pickle.load(sys.stdin.buffer); "
          "sys.stdout.buffer.write(pickle.dumps([job.run() for job in jobs], protocol=pickle.HIGHEST_PROTOCOL))")


def _import_side() -> None:
    """Import the modules the jobs use (the helper does it before its jobs arrive)."""
    from .. import synthesis  # noqa: F401
    from . import fidelity, network_stats  # noqa: F401


def _spawn():
    import subprocess
    import sys

    return subprocess.Popen([sys.executable, "-c", _CHILD], stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                            stderr=subprocess.DEVNULL)


#: A helper interpreter started ahead of its job (:func:`start_spare`), taken by the next :func:`start_jobs`.
_SPARE: list = []


def _worth_a_helper(contacts: int) -> bool:
    return (os.cpu_count() or 1) >= 2 and contacts >= PARALLEL_MIN_CONTACTS


def start_spare(contacts: int) -> None:
    """Start the helper interpreter now, so that its start-up and imports (about 0.3 s) overlap this process's work.

    Called by :func:`aggpub.pipeline.run_release` once the network is read, when the audit's
    structure section will run with a helper (``contacts`` in ``[PARALLEL_MIN_CONTACTS,
    MAX_STRUCTURE_EDGES]``, two cores or more). The helper imports, then waits for its job;
    :func:`start_jobs` hands it its jobs. :func:`discard_spare` ends a spare that was not used.
    Decided from the public machine and the number of contacts, which is not released and
    decides nothing released (docs/privacy.md, section 10).
    """
    if _SPARE or not _worth_a_helper(contacts) or contacts > MAX_STRUCTURE_EDGES:
        return
    try:
        _SPARE.append(_spawn())
    except Exception:  # noqa: BLE001 - no process could be started: start_jobs computes in this process
        pass


def discard_spare() -> None:
    """End the spare helper if no side took it."""
    while _SPARE:
        _end(_SPARE.pop())


def _take_spare():
    """The spare helper if it is still waiting for its jobs (one that died is ended), else ``None``."""
    while _SPARE:
        proc = _SPARE.pop()
        if proc.poll() is None:
            return proc
        _end(proc)
    return None


def _end(proc) -> None:
    if proc.poll() is None:
        proc.kill()
    proc.wait()
    for stream in (proc.stdin, proc.stdout):
        if stream is not None:
            stream.close()


def start_jobs(jobs: tuple, contacts: int, parallel: bool | None = None):
    """Start computing jobs (:class:`SideJob`, :class:`TrueJob`): in a helper process when worth it, else lazily here.

    Parameters
    ----------
    jobs : tuple
    contacts : int
        Contacts of the true network (the size of the work).
    parallel : bool, optional
        Force the choice (tests); default: a helper when the machine has two cores or
        more and the network has at least :data:`PARALLEL_MIN_CONTACTS` contacts.

    Returns
    -------
    An object with ``result()`` (the list of each job's ``run()``) and ``close()``. A helper
    started ahead by :func:`start_spare` is used when there is one.
    """
    jobs = tuple(jobs)
    if parallel is None:
        parallel = _worth_a_helper(contacts)
    if not parallel:
        discard_spare()
        return _InProcess(jobs)
    spare = _take_spare()
    try:
        return _Helper(jobs, spare)
    except Exception:  # noqa: BLE001 - no process could be started here: compute in this process
        if spare is not None:
            _SPARE.append(spare)
            discard_spare()
        return _InProcess(jobs)
