"""The true tables of a grouping, computed once for the audit and the sweep (confidential).

Everything here is an unprotected statistic of the private network: it goes
into the board's report, never into a bundle, and never into a decision.
"""

from __future__ import annotations

__all__ = ["AuditTruth", "MAX_AUDIT_CELLS", "truth_of_release", "truth_of_grouping"]

from dataclasses import dataclass, field

import numpy as np

from ..cells import n_cells, possible_pairs, scatter_cells
from ..released import dense_truth, released_sizes
from . import degrees as deg
from . import queries as qw
from .metrics import DEFAULT_SANITY_FRACTION

#: Largest number of superedge cells the audit expands into a dense table.
MAX_AUDIT_CELLS = 30_000_000


@dataclass
class AuditTruth:
    """The true statistics one grouping's audit (or sweep grid point) compares with.

    ``st`` is the dense superedge truth (``None`` when the release has no
    superedge counts, or a sparse one too large to expand); ``workloads`` are
    the query workloads over its cells and ``true_answers`` their true answers;
    ``hist_truth`` the true per-supernode degree histograms when they are released.
    """

    n_groups: int
    true_sizes: np.ndarray
    pub_sizes: np.ndarray
    n_edges: int
    s_bound: float
    labels: dict
    true_deg: np.ndarray
    true_hist: np.ndarray
    st: object = None
    threshold: int | None = None
    cap_true: np.ndarray | None = None
    cap_pub: np.ndarray | None = None
    workloads: list = field(default_factory=list)
    true_answers: dict = field(default_factory=dict)
    hist_truth: np.ndarray | None = None
    notes: list = field(default_factory=list)
    #: builds ``workloads`` and ``true_answers`` when they were deferred (see :func:`truth_of_release`)
    pending: object = None

    def finish_workloads(self) -> None:
        """Build the deferred workloads and their true answers (nothing when they are built already)."""
        if self.pending is not None:
            build, self.pending = self.pending, None
            build()

    def true_capped(self, top: int) -> np.ndarray:
        """The true degree histogram with bins ``0..top-1`` and a top bin ``top or more``."""
        return np.bincount(np.minimum(self.true_deg, top), minlength=top + 1).astype(np.float64)

    def workload(self, name: str):
        return next((w for w in self.workloads if w.name == name), None)


def _labels(grouping) -> dict:
    cols = [c for c in grouping.labels.column_names if c not in ("supernode", "size")]
    return {c: [str(x) for x in grouping.labels.column(c).to_pylist()] for c in cols}


def _add_workloads(truth: AuditTruth, *, cuts: int, rng, contact_matrices_only: bool = False,
                   defer: bool = False) -> None:
    """The query workloads and their true answers; with ``defer``, only the cuts now (the one use of ``rng``,
    so the generator's later draws do not depend on when the rest is built) and the rest at
    :meth:`AuditTruth.finish_workloads`."""
    st = truth.st
    cut = None if contact_matrices_only else qw.cut_workload(st.a, st.b, truth.n_groups, cuts, rng)

    def build():
        workloads = [] if contact_matrices_only else [qw.superedge_cells_workload(len(st.count))]
        for c, values in truth.labels.items():
            workloads.append(qw.contact_matrix_workload(st.a, st.b, values, c))
        if not contact_matrices_only:
            workloads.append(cut)
            workloads.append(qw.degree_totals_workload(st.a, st.b, truth.n_groups))
        truth.workloads = workloads
        true_t = st.count.astype(np.float64)
        truth.true_answers = {w.name: w.answer(true_t, whole=True) for w in workloads}  # true counts

    if defer:
        truth.pending = build
    else:
        build()


def truth_of_grouping(network, grouping, *, superedges=None, hist_cap=None, sanity_bound=None, cuts=200,
                      rng=None, contact_matrices_only=False, defer_workloads=False) -> AuditTruth:
    """True tables of ``grouping`` on ``network`` (counted by the engine when not given).

    Parameters
    ----------
    superedges : SuperedgeTruth, optional
        The superedge truth already counted (the release's own); counted here when
        ``None`` (the sweep), or left out when ``False``.
    hist_cap : int, optional
        Count the true per-supernode degree histograms with this top bin.
    sanity_bound : float, optional
        ``s`` of the relative errors (default 0.1% of the contacts, at least 1).
    cuts : int
        Random cut queries.
    contact_matrices_only : bool
        Only the contact-matrix workloads (the sweep needs no others).
    defer_workloads : bool
        Build the workloads (but the random cuts) at :meth:`AuditTruth.finish_workloads`.
    """
    n_groups = grouping.n_supernodes
    true_deg = network.engine.degrees(network.n_people)
    truth = AuditTruth(
        n_groups=n_groups, true_sizes=grouping.sizes(), pub_sizes=released_sizes(grouping),
        n_edges=int(network.n_edges),
        s_bound=float(sanity_bound) if sanity_bound else max(1.0, DEFAULT_SANITY_FRACTION * network.n_edges),
        labels=_labels(grouping), true_deg=true_deg, true_hist=deg.true_degree_histogram(true_deg))
    if superedges is None:
        superedges = dense_truth(n_groups, *network.engine.superedge_counts(grouping.assignment))
    if superedges is not False:
        _set_superedges(truth, superedges)
    if truth.st is not None:
        _add_workloads(truth, cuts=cuts, rng=rng if rng is not None else np.random.default_rng(),
                       contact_matrices_only=contact_matrices_only, defer=defer_workloads)
    if hist_cap is not None:
        truth.hist_truth = np.asarray(network.engine.degree_histograms(grouping.assignment, n_groups, hist_cap),
                                      dtype=np.int64)
    return truth


def _set_superedges(truth: AuditTruth, st) -> None:
    """Expand a sparse truth to every cell when it fits (noting what the audit leaves out otherwise)."""
    if not getattr(st, "complete", True):
        cells = n_cells(truth.n_groups)
        if cells > MAX_AUDIT_CELLS:
            truth.notes.append(f"sparse superedge release over {cells:,} cells: more than the audit expands "
                               f"({MAX_AUDIT_CELLS:,}); superedge workloads and the block-model degree "
                               "distribution were left out")
            return
        st = dense_truth(truth.n_groups, st.a, st.b, st.count)
    truth.st = st
    truth.cap_true = possible_pairs(truth.true_sizes, st.a, st.b)
    # the same array when the public sizes are the true ones (unit edge): computed once, and the audit's
    # Monte Carlo then clamps each draw once
    truth.cap_pub = (truth.cap_true if np.array_equal(truth.pub_sizes, truth.true_sizes)
                     else possible_pairs(truth.pub_sizes, st.a, st.b))


def truth_of_release(release, *, sanity_bound=None, cuts=200, rng=None, defer_workloads=False) -> AuditTruth:
    """True tables of a built release (its own counted truth, nothing counted twice).

    With ``defer_workloads`` the query workloads are built at :meth:`AuditTruth.finish_workloads`
    (the audit starts its views section on a second thread first).
    """
    hp = release.policy.components.degree_histograms
    st = release.truth.get("superedges")
    have = st is not None and "superedges" in release.tables
    truth = truth_of_grouping(release.network, release.grouping, superedges=st if have else False,
                              sanity_bound=sanity_bound, cuts=cuts, rng=rng, defer_workloads=defer_workloads)
    if have and not getattr(st, "complete", True):
        truth.threshold = release.manifest.get("superedges_sparse_threshold")
        if truth.st is not None:
            truth.notes.append(f"sparse superedge release: cells whose noisy count fell below {truth.threshold} "
                               "are absent and read as 0 (the Monte Carlo applies the same threshold)")
    if "degree_histograms" in release.tables:
        th = release.truth.get("degree_histograms")
        truth.hist_truth = np.asarray(th if th is not None else release.network.engine.degree_histograms(
            release.grouping.assignment, truth.n_groups, hp.max_degree), dtype=np.int64)
    return truth


def released_cells(release, n_groups: int, column: str = "edge_count", cells=None):
    """Released ``column`` of every cell in :func:`aggpub.cells.all_cells` order (absent cells: 0).

    ``cells``, when given, is ``all_cells(n_groups)`` (e.g. the audit truth's ``st.a``, ``st.b``): a table
    listing exactly those cells in that order (a dense bundle) is then copied instead of scattered.
    """
    t = release.tables["superedges"]
    if column not in t.column_names:
        return None
    col = lambda name: np.asarray(t.column(name).to_numpy(zero_copy_only=False))  # noqa: E731
    values = col(column)
    dtype = np.float64 if np.issubdtype(values.dtype, np.floating) else np.int64
    a, b = col("supernode_a"), col("supernode_b")
    if cells is not None and len(a) == n_cells(n_groups) and np.array_equal(a, cells[0]) \
            and np.array_equal(b, cells[1]):
        return np.array(values, dtype=dtype)  # the scatter would be the identity
    return scatter_cells(n_groups, a, b, values, dtype=dtype)
