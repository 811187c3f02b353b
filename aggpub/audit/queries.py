"""Query workloads over the superedge table, as sparse linear maps on cells.

Every workload is a matrix ``W`` (queries x cells) so that the answers are
``W @ counts`` for the true and for the released table alike, and the noise
variance of query ``q`` is ``var * sum_j W[q, j]**2`` (independent noise of
variance ``var`` on every cell, before clamping). Building the matrices needs
only public labels and sizes; evaluating them on the true table is the
confidential part.

Workloads
---------
``superedge_cells``
    Every cell of the table (zeros included).
``contact_matrix:<attribute>``
    Cells summed by the value the attribute takes in each supernode's label:
    one query per unordered pair of values. Rows and columns are the values as
    the labels state them: a generalised value (``0-9`` beside ``5-9``) is its
    own row, and ``*`` collects the supernodes whose label leaves the
    attribute open. Each supernode is in exactly one row, so the query is a sum
    of released cells and grouping loses nothing on it; what it cannot do is
    split a generalised supernode into finer values.
``cut_queries``
    Edges between two random disjoint sets of supernodes (each supernode goes
    to the first set, the second set or neither with probability 1/3).
``supernode_degree_totals``
    Sum of the degrees of each supernode's members (cells touching the
    supernode, the diagonal cell counted twice).
"""

from __future__ import annotations

__all__ = ["PairLabels", "superedge_cells_workload", "contact_matrix_workload", "cut_workload", "degree_totals_workload",
           "Workload", "CutWorkload", "RowTotalsWorkload"]

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy import sparse

from ..cells import CellRows, cell_index


class PairLabels(Sequence):
    """The ``(value_a, value_b)`` label of each contact-matrix query, built when read.

    A workload over thousands of values has millions of queries; their labels
    are read by nobody on the release's path, so they are kept as the value
    names and the pair codes of each query and made into tuples only on access.
    """

    def __init__(self, cats, first, second):
        self._cats = np.asarray(cats)
        self._first = np.asarray(first, dtype=np.int64)
        self._second = np.asarray(second, dtype=np.int64)

    def __len__(self) -> int:
        return len(self._first)

    def __getitem__(self, i):
        if isinstance(i, slice):
            return [self[j] for j in range(*i.indices(len(self)))]
        return (str(self._cats[self._first[i]]), str(self._cats[self._second[i]]))

    def __iter__(self):
        cats = [str(c) for c in self._cats]
        return ((cats[x], cats[y]) for x, y in zip(self._first.tolist(), self._second.tolist()))


@dataclass
class Workload:
    """A named set of linear queries on the cells (``matrix`` is ``None`` for the identity).

    ``matrix`` is CSR or CSC (a workload built column by column stays CSC: no conversion). Both formats
    add the terms of each query in increasing cell order, so the answers are the same numbers.
    """

    name: str
    matrix: sparse.csr_matrix | sparse.csc_matrix | None
    n_cells: int
    labels: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    #: ``matrix`` is the identity (query ``i`` is cell ``i``, with weight 1): its answers are the cells themselves
    cell_by_cell: bool = False

    def answer(self, cells: np.ndarray, whole: bool = False) -> np.ndarray:
        """Answers for one table (``cells``: 1-D) or many (2-D: draws x cells -> draws x queries).

        For the identity (``matrix`` ``None`` or ``cell_by_cell``) the cells themselves (the same
        array: the product would give the same numbers, each answer being one cell times 1).
        ``whole``: the caller knows every value is a whole number (cut queries use it; see
        :meth:`CutWorkload.answer`).
        """
        cells = np.asarray(cells, dtype=np.float64)
        if self.matrix is None or self.cell_by_cell:
            return cells
        if cells.ndim == 1:
            return self.matrix @ cells
        return np.asarray((self.matrix @ cells.T).T)

    def noise_variance(self, cell_variance: float) -> np.ndarray:
        """Variance of each query answer from independent cell noise (before clamping)."""
        if self.matrix is None or self.cell_by_cell:  # one cell of weight 1 a query
            return np.full(self.n_cells, float(cell_variance))
        m = self.matrix  # row sums of the squared entries, without a squared copy of the matrix
        rows = m.indices if m.format == "csc" else np.repeat(np.arange(m.shape[0]), np.diff(m.indptr))
        return np.bincount(rows, weights=np.square(m.data), minlength=m.shape[0]) * float(cell_variance)

    @property
    def n_queries(self) -> int:
        return self.n_cells if self.matrix is None else self.matrix.shape[0]

    @property
    def single_cell(self) -> bool:
        """Whether every query is one cell (the identity workload)."""
        return self.matrix is None


@dataclass
class CutWorkload(Workload):
    """Cut queries answered through the dense supernode x supernode matrix of each table.

    For sets ``S`` and ``T`` (disjoint) the cut is ``1_S' M 1_T`` with ``M`` the
    symmetric matrix of cell counts; all queries of a table cost one matrix
    product (see :meth:`answer`), with nothing built in advance. Used up to
    :data:`DENSE_CUT_MAX_GROUPS` supernodes (the matrix takes ``8 n^2`` bytes).
    """

    a: np.ndarray | None = None
    b: np.ndarray | None = None
    sides: np.ndarray | None = None  # queries x supernodes: 0 first set, 1 second set, 2 neither

    def answer(self, cells: np.ndarray, whole: bool = False) -> np.ndarray:
        """Answers for one table or many (see :meth:`Workload.answer`), one symmetric product per table.

        A table the caller knows to hold whole numbers (``whole``: counts, released counts, the Monte
        Carlo's clamped draws; not the fractional estimates) whose absolute values add up to less than
        ``2**24`` is multiplied in single precision: every partial sum is then a whole number below
        ``2**24``, exact in float32, so the answers are the very numbers of double precision, at about
        twice the speed.

        Single precision uses BLAS's symmetric product (``ssymm``, which reads only the triangle the cells
        fill; about twice as fast here as numpy's general product). Double precision uses numpy's product
        of the matrix with both triangles filled: as fast as ``dsymm`` and, unlike scipy's BLAS wrappers,
        it lets other threads run Python meanwhile (the audit's threads beside it waited for the lock while
        a product took 30 ms or more).
        """
        from scipy.linalg import blas

        cells = np.asarray(cells, dtype=np.float64)
        rows = cells[None, :] if cells.ndim == 1 else cells
        n = self.sides.shape[1]
        layout = self._layout()
        upper = layout[2]
        out = np.empty((len(rows), len(self.sides)))
        complete = self._complete()  # every entry of the upper triangle is written below
        square = {}  # one square matrix per precision, made when first needed
        for i, row in enumerate(rows):
            single = bool(whole) and float(np.abs(row).sum()) < 2.0 ** 24
            dtype = np.float32 if single else np.float64
            m = square.get(dtype)
            if m is None:
                m = square[dtype] = (np.empty if complete else np.zeros)(n * n, dtype=dtype)
            elif not complete:
                m.fill(0.0)
            m[upper] = row  # the upper triangle (row-major cells: one pass in order)
            if single:
                # BLAS's symmetric product reads that triangle alone. ``m`` seen as Fortran-ordered is the
                # transpose, whose lower triangle it is; ``first.T`` is Fortran-ordered as it stands: no copy
                # of either. The result is ``(first @ M).T``.
                first, second = layout[3:5]
                product = blas.ssymm(1.0, m.reshape(n, n).T, first.T, side=0, lower=1)
                out[i] = np.einsum("qi,qi->q", product.T, second)
            else:
                m[layout[5]] = row  # the lower triangle too: numpy's product reads the whole matrix
                first, second = layout[:2]
                out[i] = np.einsum("qi,qi->q", first @ m.reshape(n, n), second)
        return out[0] if cells.ndim == 1 else out

    def _complete(self) -> bool:
        n = self.sides.shape[1]
        return len(self.a) == n * (n + 1) // 2

    def _layout(self):
        """Indicators of the two sets (double, then single precision) and the flat position of every cell in
        the square matrix's upper and lower triangles (made once)."""
        cached = getattr(self, "_cached_layout", None)
        if cached is None:
            n = self.sides.shape[1]
            first, second = (self.sides == 0).astype(np.float64), (self.sides == 1).astype(np.float64)
            cached = (first, second, self.a * n + self.b, first.astype(np.float32), second.astype(np.float32),
                      self.b * n + self.a)
            self._cached_layout = cached
        return cached

    def noise_variance(self, cell_variance: float) -> np.ndarray:
        # each query sums the cells that cross it, once each: as many as its answer on a table of ones;
        # on the whole table that is |S| |T| (one cell per pair of a supernode of each set; disjoint sets)
        if self._complete():
            first, second = self._layout()[:2]
            crossing = first.sum(axis=1) * second.sum(axis=1)
        else:
            crossing = self.answer(np.ones(self.n_cells))
        return crossing * float(cell_variance)

    @property
    def n_queries(self) -> int:
        return len(self.sides)

    @property
    def single_cell(self) -> bool:
        return False


#: Largest number of supernodes for which cut queries use the dense matrix (8 n^2 bytes: 128 MiB).
DENSE_CUT_MAX_GROUPS = 4096


def superedge_cells_workload(n_cells: int) -> Workload:
    """Every cell on its own."""
    return Workload("superedge_cells", None, n_cells)


def contact_matrix_workload(a, b, values, attribute: str) -> Workload:
    """Cells summed by the (unordered) pair of label values of ``attribute``.

    Parameters
    ----------
    a, b : numpy.ndarray
        Supernodes of every cell (``a <= b``).
    values : sequence of str
        The attribute's value in each supernode's label.
    """
    values = np.asarray(values, dtype=object)
    cats, code = np.unique(values.astype(str), return_inverse=True)
    k = len(cats)
    n_cells = len(a)
    # every supernode holding its own value, in the order of the values: a cell's pair of values is the
    # cell itself (a <= b), so its upper-triangle index is the cell's own; when the cells are the whole
    # table in row order, every pair occurs, in order, and each query is one cell
    q = None
    if k == len(values) and n_cells == k * (k + 1) // 2 and np.array_equal(code, np.arange(k)):
        pair = cell_index(a, b, k)
        if np.array_equal(pair, np.arange(n_cells)):
            used = q = pair
    if q is None:
        ca, cb = code[a], code[b]
        lo, hi = np.minimum(ca, cb), np.maximum(ca, cb)
        pair = lo * k - (lo * (lo - 1)) // 2 + (hi - lo)  # upper-triangle index of (lo, hi)
        # the pairs that occur, in increasing order, and each cell's row among them (a counting pass over
        # the k (k + 1) / 2 possible pairs instead of sorting every cell)
        used = np.flatnonzero(np.bincount(pair, minlength=k * (k + 1) // 2))
        row_of = np.full(k * (k + 1) // 2, -1, dtype=np.int64)
        row_of[used] = np.arange(len(used))
        q = row_of[pair]
    # one entry per column: built as CSC without sorting
    mat = sparse.csc_matrix((np.ones(n_cells), q, np.arange(n_cells + 1)), shape=(len(used), n_cells))
    if used is pair:  # each query is its own cell: its pair of values is the cell's pair of supernodes
        first, second = a, b
    else:  # the value pair of upper-triangle index u, without the k x k index arrays of numpy.triu_indices
        first = np.searchsorted(np.cumsum(np.arange(k, 0, -1)), used, side="right")
        second = used - (first * k - (first * (first - 1)) // 2) + first
    labels = PairLabels(cats, first, second)
    generalised = int(sum(1 for c in cats if c == "*"))
    notes = [f"{k} value(s) of '{attribute}' as stated in the supernode labels"
             + (" (including '*' for supernodes that leave it open)" if generalised else "")]
    # every supernode holding its own value, in the order of the values: each query is one cell, in cell order
    cell_by_cell = len(used) == n_cells and bool(np.array_equal(q, np.arange(n_cells)))
    return Workload(f"contact_matrix:{attribute}", mat, n_cells, labels=labels, notes=notes,
                    cell_by_cell=cell_by_cell)


def cut_workload(a, b, n_groups: int, n_queries: int, rng: np.random.Generator,
                 max_entries: int = 50_000_000) -> Workload:
    """Random cut queries: edges between two random disjoint sets of supernodes."""
    n_cells = len(a)
    dense = n_groups <= DENSE_CUT_MAX_GROUPS
    # with many supernodes a sparse matrix holds the cells that cross each cut: as many cuts as fit
    n_queries = int(max(1, n_queries if dense else min(n_queries, max_entries // max(n_cells, 1))))
    side = rng.integers(0, 3, size=(n_queries, n_groups))  # 0: first set, 1: second, 2: neither
    notes = [f"{n_queries} random cuts; each supernode joins set 1, set 2 or neither with probability 1/3"]
    if dense:
        return CutWorkload("cut_queries", None, n_cells, notes=notes, a=np.asarray(a, dtype=np.int64),
                           b=np.asarray(b, dtype=np.int64), sides=side.astype(np.int8))
    # a cell (a, b) crosses the cut when one end is in set 1 and the other in set 2: with
    # code = 3 side[a] + side[b], exactly when code is 1 (0, 1) or 3 (1, 0)
    crosses = np.zeros(9, dtype=bool)
    crosses[[1, 3]] = True
    side8 = side.astype(np.int8)
    side3 = side8 * np.int8(3)
    indptr = [np.zeros(1, dtype=np.int64)]
    cols = []
    step = max(1, 20_000_000 // max(n_cells, 1))
    for lo in range(0, n_queries, step):
        code = side3[lo:lo + step][:, a]
        code += side8[lo:lo + step][:, b]
        inc = crosses[code]
        flat = np.flatnonzero(inc)  # row-major: already in CSR order
        indptr.append(np.cumsum(np.count_nonzero(inc, axis=1), dtype=np.int64) + indptr[-1][-1])
        cols.append((flat % n_cells).astype(np.int32 if n_cells < 2**31 else np.int64))
    cols = np.concatenate(cols)
    mat = sparse.csr_matrix((np.ones(len(cols)), cols, np.concatenate(indptr)), shape=(n_queries, n_cells))
    return Workload("cut_queries", mat, n_cells, notes=notes)


def degree_totals_workload(a, b, n_groups: int) -> Workload:
    """Sum of member degrees per supernode: every cell touching it, the diagonal cell twice."""
    a = np.asarray(a, dtype=np.int64)
    b = np.asarray(b, dtype=np.int64)
    return RowTotalsWorkload("supernode_degree_totals", None, len(a), rows=CellRows(a, b, n_groups),
                             diagonal=np.bincount(a[a == b], minlength=n_groups))


@dataclass
class RowTotalsWorkload(Workload):
    """Per-supernode totals ``2 x_AA + sum_{B != A} x_AB`` answered by sums over the cells
    (:class:`aggpub.cells.CellRows`: runs of cells in row order), no matrix built.

    The noise variance of a total is the sum of its squared weights times the cell variance: 1 for every
    cell touching the supernode, 4 for its diagonal cell (weight 2).
    """

    rows: CellRows | None = None
    diagonal: np.ndarray | None = None  # diagonal cells of each supernode (0 or 1)

    def answer(self, cells: np.ndarray, whole: bool = False) -> np.ndarray:
        cells = np.asarray(cells, dtype=np.float64)
        if cells.ndim == 1:
            return self.rows.totals(cells)
        return np.vstack([self.rows.totals(row) for row in cells])

    def noise_variance(self, cell_variance: float) -> np.ndarray:
        weights = self.rows.totals(np.ones(self.n_cells)) + 2.0 * self.diagonal  # 1 + 1 ... + 4 on the diagonal
        return weights * float(cell_variance)

    @property
    def n_queries(self) -> int:
        return self.rows.n

    @property
    def single_cell(self) -> bool:
        return False
