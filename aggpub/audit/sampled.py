"""Synthetic networks for the audit's structure section, one side at a time, in this process or a helper.

The structure section compares the true network with networks drawn by the one
sampler (:mod:`aggpub.synthesis`) from two sets of inputs: the release's public
tables and the true aggregate ("grouping alone"). The two sides are independent:
each has its own generator (seeded from the audit's, so a seeded audit gives the
same figures whichever way it runs), its own affinity fit and its own draws. On
networks large enough to pay for starting an interpreter, the release's side runs
in a helper process (a fresh interpreter that imports only what it needs; nothing is
inherited from the engine's threads) while this process audits the rest; the figures are the same as
in process, and any failure of the helper falls back to computing them here.

Confidential: every figure describes the true network or synthetic networks set
against it; they go into the board's report only.
"""

from __future__ import annotations

__all__ = ["PARALLEL_MIN_CONTACTS", "SideJob", "side_figures", "start_side"]

import os
from dataclasses import dataclass

import numpy as np

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
    """A side computed here, when its figures are asked for."""

    def __init__(self, job: SideJob):
        self.job = job

    def result(self) -> dict:
        return side_figures(self.job)

    def close(self) -> None:
        pass


class _Helper:
    """A side computed in a helper process (falls back to this process if the helper fails).

    The helper is a fresh interpreter running only this module (``python -c``), given the
    pickled job on its standard input and answering on its standard output: unlike
    :mod:`multiprocessing`, it never imports the caller's ``__main__`` again, so a
    steward's script without a ``__main__`` guard is not run twice. A thread feeds it and
    reads its answer while this process carries on.
    """

    def __init__(self, job: SideJob):
        import pickle
        import subprocess
        import sys
        import threading

        self.job = job
        self.answer: dict = {}
        self.proc = subprocess.Popen([sys.executable, "-c", _CHILD], stdin=subprocess.PIPE,
                                     stdout=subprocess.PIPE, stderr=subprocess.DEVNULL)
        data = pickle.dumps(job, protocol=pickle.HIGHEST_PROTOCOL)

        def talk():
            try:
                out, _ = self.proc.communicate(data)
                if self.proc.returncode == 0:
                    self.answer["figures"] = pickle.loads(out)
            except Exception:  # noqa: BLE001 - any failure: the caller computes the side itself
                pass

        self.thread = threading.Thread(target=talk, name="aggpub-audit-side", daemon=True)
        self.thread.start()

    def result(self) -> dict:
        self.thread.join()
        if "figures" in self.answer:
            return self.answer["figures"]
        return side_figures(self.job)  # the helper failed (killed, out of memory, not importable): do it here

    def close(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
        self.thread.join()


#: What the helper interpreter runs: read a pickled job, write the pickled figures.
_CHILD = ("import pickle, sys; from aggpub.audit.sampled import side_figures; "
          "job = pickle.load(sys.stdin.buffer); "
          "sys.stdout.buffer.write(pickle.dumps(side_figures(job), protocol=pickle.HIGHEST_PROTOCOL))")


def start_side(job: SideJob, contacts: int, parallel: bool | None = None):
    """Start computing one side: in a helper process when worth it, else lazily here.

    Parameters
    ----------
    job : SideJob
    contacts : int
        Contacts of the true network (the size of the work).
    parallel : bool, optional
        Force the choice (tests); default: a helper when the machine has two cores or
        more and the network has at least :data:`PARALLEL_MIN_CONTACTS` contacts.

    Returns
    -------
    An object with ``result()`` (the :func:`side_figures` dict) and ``close()``.
    """
    if parallel is None:
        parallel = (os.cpu_count() or 1) >= 2 and contacts >= PARALLEL_MIN_CONTACTS
    if not parallel:
        return _InProcess(job)
    try:
        return _Helper(job)
    except Exception:  # noqa: BLE001 - no process could be started here: compute in this process
        return _InProcess(job)
