r"""Consistent contact matrices from the supernode table and the views.

A release may hold, for the same contacts, the noisy supernode table (contacts
between every pair of supernodes) and noisy *views* (contacts between every
pair of values of an attribute, or of a combination of attributes, optionally
per layer). They are noisy measurements of one set of true counts, so they can
be combined into one consistent set of estimates by generalised least squares
with the known noise variances (Hay, Rastogi, Miklau, Suciu, PVLDB 2010): the
estimate of every view cell and every supernode cell is the best linear
unbiased estimate (BLUE) given all the released tables, and the tables agree
with each other. Everything here is post-processing of released values and
public labels: it reads no private data and costs no budget.

The model (derivation in ``docs/contact-matrices.md``)
------------------------------------------------------
*Atoms* are the pairs (supernode, tuple of values of the viewed attributes)
that the public labels allow. The unknowns are the true numbers of contacts
between two atoms in a layer. Every released table is a known 0/1 linear map of
them: a supernode cell sums every atom pair of its two supernodes over all
layers; a view cell sums every atom pair whose values fall in the cell, in its
layer (or over all layers). The noise is independent discrete Laplace, of
variance :math:`v = 2\alpha/(1-\alpha)^2`, :math:`\alpha = e^{-1/\mathrm{scale}}`,
per table.

The system is underdetermined (a supernode whose label is generalised cannot be
split into values by its own cell), but every view cell and every supernode cell
is *identified* (measured directly), and for identified quantities every
least-squares solution gives the same, unbiased, estimate. It is computed in
closed form in the space of view cells: with :math:`D_V` the view variances,
:math:`Z` a basis of the directions of view space that no supernode cell can
tell apart (the null space of the within-cell differences of the view-cell
indicators), :math:`p_g` the view-cell indicator of the supernode cells of group
:math:`g` (:math:`n_g` cells, noisy sum :math:`Y_g`, variance :math:`v_F` each),

.. math::

    H = Z^\top (D_V + v_F \textstyle\sum_g n_g p_g p_g^\top) Z,\quad
    \mu = H^{-1} Z^\top (y_V - \textstyle\sum_g Y_g p_g),\quad
    \hat u = y_V - D_V Z \mu,\quad
    \hat f_c = y_c + v_F\, p_{g(c)}^\top Z \mu,

and :math:`\operatorname{Cov}(\hat u) = D_V - D_V Z H^{-1} Z^\top D_V`. Without a
supernode table the same formulas hold with :math:`v_F = 0` and the extra
constraint that :math:`Z` be orthogonal to every :math:`p_g`. The work is a
pass over the supernode cells (grouping them by the kinds of their two
supernodes) and dense algebra in the (small) space of view cells.

Intervals: the estimate's error is a fixed linear combination of independent
discrete Laplace draws (and of sums of ``n`` i.i.d. draws, which are differences
of two negative binomial variables). Where all weights are integers (a raw view,
a sum of raw cells) its law is computed exactly on the integer grid
(:func:`aggpub.estimates.intervals.sum_noise_pmf`); for the least-squares estimates the
weights are real, and the interval is the Monte Carlo quantile of the known
noise law (post-processing: it draws from the *known* law and reads no data);
with very many groups of supernode cells the least important ones are drawn as
one Gaussian vector of the same covariance (:meth:`ConsistentEstimate.noise_draws`).

References
----------
M. Hay, V. Rastogi, G. Miklau, D. Suciu, "Boosting the accuracy of
differentially private histograms through consistency", PVLDB 3(1), 2010.

A. C. Aitken, "On least squares and linear combination of observations",
Proceedings of the Royal Society of Edinburgh 55, 1935 (generalised least squares).

J. Mossong et al., "Social contacts and mixing patterns relevant to the spread
of infectious diseases", PLoS Medicine 5(3), 2008 (contact matrices).

A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally utility-maximizing
privacy mechanisms", STOC 2009 (the discrete Laplace noise).
"""

from __future__ import annotations

__all__ = ["FineTable", "ViewRelease", "ConsistentEstimate", "consistent_estimates", "possible_values_from_labels",
           "possible_values_from_people", "contact_matrix", "contact_matrix_square", "view_values", "RESIDUAL",
           "MAX_VIEW_CELLS", "MAX_BLOCK_ATOMS", "MAX_EXACT_GROUPS", "MAX_GROUP_DIRECTIONS"]

import math
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import scipy.linalg as sla
from scipy import sparse
from scipy.sparse.csgraph import connected_components

from ..cells import all_cells
from .views import listed_views, view_cell_count, view_cells

RESIDUAL = "*"
#: Largest total number of view cells (all views and layers) solved densely.
MAX_VIEW_CELLS = 6000
#: Largest number of atoms of one block of attributes (their pairs are enumerated once).
MAX_BLOCK_ATOMS = 6000
#: Groups of supernode cells whose noise sums the Monte Carlo draws exactly (the rest: Gaussian).
MAX_EXACT_GROUPS = 2000
#: Largest (groups of supernode cells) x (view directions) combined with the supernode table (dense
#: arrays of that size are built: 20 million doubles, 160 MB); above, only the views are combined.
MAX_GROUP_DIRECTIONS = 20_000_000


def _dl_variance(scale: float) -> float:
    """Variance ``2a / (1 - a)^2`` of a discrete Laplace draw of scale ``scale`` (``a = exp(-1/scale)``)."""
    if scale <= 0:
        return 0.0
    la = -1.0 / float(scale)
    return 2.0 * math.exp(la) / math.expm1(la) ** 2


def _log_dl_variance(scale: float) -> float:
    """``log`` of :func:`_dl_variance`, finite even when the variance underflows (tiny scales)."""
    la = -1.0 / float(scale)
    return math.log(2.0) + la - 2.0 * math.log(-math.expm1(la))


#: Relative variance below which a table counts as exact (weights are relative; see consistent_estimates).
_MIN_RELATIVE_VARIANCE = 1e-30


# --------------------------------------------------------------------------- possible values


def possible_values_from_labels(labels, domain, hierarchy=None) -> np.ndarray:
    """Which values of an attribute each supernode may contain, from its public label.

    A label is an exact value of the domain, a generalised value (a value some
    level of the hierarchy maps a domain value to), or ``*`` (any value).
    Reads only public inputs (labels, the declared domain and hierarchy), so it
    holds under every privacy unit.

    Parameters
    ----------
    labels : sequence of str
        The attribute's value in each supernode's label. (An attribute outside
        the grouping allows every value: ``np.ones((G, K), bool)``.)
    domain : sequence of str
        The attribute's values, in code order.
    hierarchy : sequence of mapping, optional
        Generalisation levels as in the policy: level 0 maps domain values to
        level-1 values, level 1 maps those to level-2 values, ...

    Returns
    -------
    numpy.ndarray of bool, shape ``(n_supernodes, len(domain))``
    """
    domain = [str(x) for x in domain]
    k = len(domain)
    labels = [str(x) for x in labels]
    cover = {v: {i} for i, v in enumerate(domain)}
    current = list(domain)
    for step, level in enumerate(hierarchy or ()):
        nxt = []
        for i, value in enumerate(current):
            if value not in level:
                raise ValueError(f"hierarchy level {step} does not cover the value {value!r}")
            nxt.append(str(level[value]))
        current = nxt
        for i, value in enumerate(current):
            cover.setdefault(value, set()).add(i)
    out = np.zeros((len(labels), k), dtype=bool)
    for s, lab in enumerate(labels):
        if lab == RESIDUAL:
            out[s] = True
            continue
        if lab not in cover:
            raise ValueError(f"label value {lab!r} is neither a domain value, a generalised value nor '*'")
        out[s, sorted(cover[lab])] = True
    return out


def possible_values_from_people(assignment, codes, n_supernodes: int, n_values: int) -> np.ndarray:
    """Values present in each supernode, from the person table.

    Only under unit ``edge``, where the person table is public; under ``person``
    the values present are private (use :func:`possible_values_from_labels`).
    """
    assignment = np.asarray(assignment, dtype=np.int64)
    codes = np.asarray(codes, dtype=np.int64)
    flat = np.bincount(assignment * int(n_values) + codes, minlength=int(n_supernodes) * int(n_values))
    return flat.reshape(int(n_supernodes), int(n_values)) > 0


# --------------------------------------------------------------------------- inputs


@dataclass(frozen=True)
class FineTable:
    """The noisy supernode table: every cell ``a <= b`` (dense), unbiased values, one noise scale."""

    a: np.ndarray
    b: np.ndarray
    noisy: np.ndarray
    scale: float


@dataclass(frozen=True)
class ViewRelease:
    """One noisy view: ``noisy`` has shape ``(n_layers, n_cells)`` (layered) or ``(1, n_cells)``.

    ``attributes`` names the attributes of the view (one, or several for a
    combination, combined in that order with the first most significant).
    """

    attributes: tuple
    noisy: np.ndarray
    scale: float

    @property
    def layered(self) -> bool:
        return self.noisy.shape[0] > 1


# --------------------------------------------------------------------------- the structure


def _unique_inverse(keys: np.ndarray):
    """Sorted unique keys, the inverse map and the first position of each (stable)."""
    order = np.argsort(keys, kind="stable")
    sk = keys[order]
    new = np.ones(len(sk), dtype=bool)
    new[1:] = sk[1:] != sk[:-1]
    uniq = sk[new]
    rank = np.cumsum(new) - 1
    inverse = np.empty(len(keys), dtype=np.int64)
    inverse[order] = rank
    first = order[new]
    return uniq, inverse, first


def _compact_rows(mat: np.ndarray):
    """Unique rows of an integer matrix: (inverse, first position of each unique row)."""
    if mat.shape[1] == 0:
        return np.zeros(len(mat), dtype=np.int64), np.zeros(1 if len(mat) else 0, dtype=np.int64)
    key = np.zeros(len(mat), dtype=np.int64)
    for j in range(mat.shape[1]):
        col = mat[:, j].astype(np.int64)
        _, key_c, _ = _unique_inverse(key * (int(col.max()) + 1 if len(col) else 1) + col)
        key = key_c
    _, inverse, first = _unique_inverse(key)
    return inverse, first


@dataclass
class _Block:
    """Attributes joined by combination views, their views, kinds and tuples."""

    attributes: list
    views: list
    kind: np.ndarray = None          # supernode -> kind
    n_kinds: int = 0
    base: np.ndarray = None          # kind pair code -> base tuple (index into tuple_cells)
    tuple_cells: np.ndarray = None   # tuple index -> cell of each view of the block (n_tuples, n_views)
    diff_pairs: np.ndarray = None    # (m, 2) tuple index pairs (t, base) to constrain


def _blocks(views):
    """Union of attributes over views (attributes in one combination view are in one block)."""
    parent = {}

    def find(x):
        while parent[x] != x:
            parent[x] = parent[parent[x]]
            x = parent[x]
        return x

    for v in views:
        for a in v.attributes:
            parent.setdefault(a, a)
        for a in v.attributes[1:]:
            ra, rb = find(v.attributes[0]), find(a)
            if ra != rb:
                parent[rb] = ra
    order = []
    for v in views:
        for a in v.attributes:
            if a not in order:
                order.append(a)
    blocks = {}
    for a in order:
        blocks.setdefault(find(a), _Block(attributes=[], views=[])).attributes.append(a)
    for i, v in enumerate(views):
        blocks[find(v.attributes[0])].views.append(i)
    return list(blocks.values())


def _block_structure(block: _Block, views, possible, sizes):
    """Kinds of supernodes, and the view-cell tuples each pair of kinds can reach (inputs validated)."""
    attrs = block.attributes
    stacked = np.concatenate([possible[a] for a in attrs], axis=1)
    kinds, kind = np.unique(stacked, axis=0, return_inverse=True)
    block.kind = kind.reshape(-1).astype(np.int64)
    nk = len(kinds)
    block.n_kinds = nk
    # atoms of every kind: the product of its per-attribute possible sets
    offsets = np.cumsum([0] + [sizes[a] for a in attrs])
    atom_codes, atom_kind = [], []
    for k in range(nk):  # a loop over kinds of supernode (at most the number of supernodes), not over cells
        sets = [np.flatnonzero(kinds[k, offsets[j]:offsets[j + 1]]) for j in range(len(attrs))]
        grid = np.stack([g.reshape(-1) for g in np.meshgrid(*sets, indexing="ij")], axis=1)
        atom_codes.append(grid)
        atom_kind.append(np.full(len(grid), k, dtype=np.int64))
    atom_codes = np.concatenate(atom_codes)
    atom_kind = np.concatenate(atom_kind)
    n_atoms = len(atom_kind)
    if n_atoms > MAX_BLOCK_ATOMS:
        raise ValueError(f"the attributes {attrs} allow {n_atoms} (supernode kind, values) atoms, more than "
                         f"{MAX_BLOCK_ATOMS}: declare finer labels or fewer combination views")
    iu, ju = np.triu_indices(n_atoms)
    kp = atom_kind[iu] * nk + atom_kind[ju]  # atoms are sorted by kind, so kind[iu] <= kind[ju]
    # the cell of every view of the block for every atom pair
    cells = []
    for vi in block.views:
        v = views[vi]
        cols = [attrs.index(a) for a in v.attributes]
        code = np.zeros(n_atoms, dtype=np.int64)
        k = 1
        for c in cols:
            code = code * sizes[attrs[c]] + atom_codes[:, c]
            k *= sizes[attrs[c]]
        x, y = code[iu], code[ju]
        lo, hi = np.minimum(x, y), np.maximum(x, y)
        cells.append(lo * k - (lo * (lo - 1)) // 2 + (hi - lo))
    cells = np.stack(cells, axis=1)
    t_inv, t_first = _compact_rows(cells)
    block.tuple_cells = cells[t_first]
    n_t = len(t_first)
    pair_key = kp * n_t + t_inv
    uniq, _, _ = _unique_inverse(pair_key)
    u_kp, u_t = uniq // n_t, uniq % n_t
    # base tuple of every kind pair: its smallest tuple index
    base = np.full(nk * nk, -1, dtype=np.int64)
    first_of_kp = np.ones(len(u_kp), dtype=bool)
    first_of_kp[1:] = u_kp[1:] != u_kp[:-1]
    base[u_kp[first_of_kp]] = u_t[first_of_kp]
    block.base = base
    other = u_t != base[u_kp]
    pairs = np.stack([u_t[other], base[u_kp[other]]], axis=1)
    if len(pairs):
        pinv, pfirst = _compact_rows(pairs)
        pairs = pairs[pfirst]
    block.diff_pairs = pairs


class _Layout:
    """Coordinates of the stacked view cells: view ``i`` layer ``l`` cell ``c``."""

    def __init__(self, views, n_layers):
        self.n_cells = [v.noisy.shape[1] for v in views]
        self.layered = [v.layered for v in views]
        self.n_layers = n_layers
        rows = [n_layers if lay else 1 for lay in self.layered]
        self.offset = np.cumsum([0] + [r * c for r, c in zip(rows, self.n_cells)])
        self.size = int(self.offset[-1])

    def coord(self, i, cell, layer):
        cell = np.asarray(cell, dtype=np.int64)
        lay = layer if self.layered[i] else 0
        return self.offset[i] + lay * self.n_cells[i] + cell


class ConsistentEstimate:
    """Consistent (least-squares) estimates of every view cell, with their noise law.

    Built by :func:`consistent_estimates`; read the estimates with :meth:`view`,
    the supernode cells with :meth:`fine`, variances with :meth:`variance` and
    intervals with :meth:`half_widths` (or draws of the noise with
    :meth:`noise_draws`). Queries are sparse matrices over the stacked view
    cells (:meth:`query_matrix`).

    Attributes
    ----------
    estimate : numpy.ndarray
        Every view cell, views stacked in input order, layers within a view.
    dim_free : int
        Dimension of the null space ``Z`` (directions the supernode table cannot tell apart).
    n_groups : int
        Groups of interchangeable supernode cells.
    draw_info : dict
        After :meth:`noise_draws`: groups drawn exactly / as a Gaussian and the
        largest share of a query's supernode-noise sd carried by a Gaussian-treated group.
    """

    def __init__(self, **kw):
        self.__dict__.update(kw)

    # ---------------------------------------------------------------- estimates
    def view(self, i: int) -> np.ndarray:
        """Estimates of view ``i``, shape ``(n_layers or 1, n_cells)`` (unbiased, real-valued)."""
        lay = self.layout
        rows = lay.n_layers if lay.layered[i] else 1
        return self.estimate[lay.offset[i]:lay.offset[i + 1]].reshape(rows, lay.n_cells[i])

    def fine(self) -> np.ndarray | None:
        """Consistent estimates of the supernode cells (order of the input table), or ``None``."""
        if self.fine_noisy is None:
            return None
        per_group = self.lambda_v[self.group_coords].sum(axis=1) * self.fine_var  # both relative: unit cancels
        return self.fine_noisy + per_group[self.fine_group]

    def query_matrix(self, i: int, by_layer: bool = True) -> sparse.csr_matrix:
        """The queries of view ``i``: its cells per layer, or summed over layers (rows x stacked cells)."""
        lay = self.layout
        n_c = lay.n_cells[i]
        rows = lay.n_layers if lay.layered[i] else 1
        idx = lay.offset[i] + np.arange(rows * n_c)
        if by_layer or rows == 1:
            return sparse.csr_matrix((np.ones(len(idx)), (np.arange(len(idx)), idx)), shape=(len(idx), lay.size))
        return sparse.csr_matrix((np.ones(len(idx)), (np.tile(np.arange(n_c), rows), idx)),
                                 shape=(n_c, lay.size))

    # ---------------------------------------------------------------- noise law
    def _b_matrix(self, q: sparse.csr_matrix) -> np.ndarray:
        """``H^{-1} Z^T D_V Q^T`` (dim Z x queries)."""
        dq = sparse.csr_matrix(q.multiply(self.var_v[None, :]))   # q x V (Q D_V)
        return sla.cho_solve(self.h_chol, (dq @ self.z).T)

    def variance(self, q) -> np.ndarray:
        """Exact noise variance of each query ``q @ estimate`` (``q``: queries x stacked cells)."""
        q = sparse.csr_matrix(q)
        raw = np.asarray(q.multiply(q).multiply(self.var_v[None, :]).sum(axis=1)).ravel()
        if self.dim_free:
            w = (sparse.csr_matrix(q.multiply(self.var_v[None, :])) @ self.z).T
            raw = raw - np.einsum("iq,iq->q", w, sla.cho_solve(self.h_chol, w))
        return np.maximum(raw, 0.0) * self.var_unit

    def noise_draws(self, q, draws: int, rng: np.random.Generator, *, batch: int = 500,
                    max_exact_groups: int = MAX_EXACT_GROUPS) -> np.ndarray:
        """Draws of the noise of ``q @ estimate`` (draws x queries).

        The noise is ``Q e_V - B^T Z^T (U^T e_V - P^T E)``: ``e_V`` the view
        draws (discrete Laplace, one per cell, always drawn exactly) and ``E`` the
        sums of the supernode-cell draws of each group of cells (a sum of ``n``
        i.i.d. discrete Laplace draws is the difference of two negative
        binomial ``(n, 1 - a)`` variables, drawn as such).

        When there are more than ``max_exact_groups`` groups, the groups that
        matter most to some query (largest ``|weight| * sd`` relative to that
        query's supernode-noise sd) are drawn exactly and the rest together
        as a Gaussian vector with their exact covariance (a sum of many
        independent terms, each small for every query). ``self.draw_info``
        records how many groups were drawn each way and ``max_gaussian_share``,
        the largest share of any query's supernode-noise sd carried by one
        Gaussian-treated group (by the Berry-Esseen inequality the Gaussian
        part's distribution function is then off by at most about
        ``0.56 * share * rho``, ``rho`` the ratio of the third absolute moment
        to the cubed sd of one group's noise).
        """
        q = sparse.csr_matrix(q)
        n_q = q.shape[0]
        b = self._b_matrix(q) if self.dim_free else None
        out = np.empty((draws, n_q))
        alpha_v = np.exp(-1.0 / self.scale_v)
        exact_p = gauss_l = None
        info = {"exact_groups": 0, "gaussian_groups": 0, "max_gaussian_share": 0.0}
        if b is not None and self.merged_n is not None and len(self.merged_n):
            fine_sd = math.sqrt(_dl_variance(self.fine_scale))
            k0 = self.k0
            n_m = self.merged_n
            if len(n_m) <= max_exact_groups:
                exact = np.arange(len(n_m))
                share = None
            else:  # each group's largest share of some query's supernode-noise sd, in chunks of groups
                b0 = b[:k0]
                # sd of each query's supernode noise: b0^T (Z0^T P^T diag(n) P Z0) b0, in closed form
                s0 = self.z0.T @ (self.merged_p.T @ sparse.diags(n_m) @ self.merged_p) @ self.z0
                sd_q = np.sqrt(np.maximum(np.einsum("kq,kq->q", b0, s0 @ b0), 0.0)) * fine_sd
                b_scaled = b0 / np.where(sd_q > 0, sd_q, np.inf)[None, :]
                share = np.empty(len(n_m))
                step = max(1, 20_000_000 // max(n_q, 1))
                for lo in range(0, len(n_m), step):
                    c = np.abs((self.merged_p[lo:lo + step] @ self.z0) @ b_scaled).max(axis=1)
                    share[lo:lo + step] = c * np.sqrt(n_m[lo:lo + step]) * fine_sd
                exact = np.sort(np.argsort(-share, kind="stable")[:max_exact_groups])
            rest = np.setdiff1d(np.arange(len(n_m)), exact)
            exact_p, exact_n = self.merged_p[exact], n_m[exact]
            if len(rest):
                pr = self.merged_p[rest]
                cov0 = (self.z0.T @ (pr.T @ sparse.diags(n_m[rest] * fine_sd ** 2) @ pr) @ self.z0)
                ev, evec = np.linalg.eigh(cov0)
                gauss_l = evec * np.sqrt(np.clip(ev, 0.0, None))[None, :]        # k0 x k0
                info["max_gaussian_share"] = float(share[rest].max())
            info["exact_groups"], info["gaussian_groups"] = int(len(exact)), int(len(rest))
            p_fine = 1.0 - math.exp(-1.0 / self.fine_scale)
        for lo in range(0, draws, batch):
            r = min(batch, draws - lo)
            ev_draw = (rng.geometric(1.0 - alpha_v, size=(r, len(alpha_v)))
                       - rng.geometric(1.0 - alpha_v, size=(r, len(alpha_v)))).astype(np.float64)
            noise = (q @ ev_draw.T).T
            if b is not None:
                zc = ev_draw @ self.z                                   # r x dim Z: Z^T e_V
                if exact_p is not None and len(exact_n):
                    n = np.broadcast_to(exact_n, (r, len(exact_n)))
                    em = (rng.negative_binomial(n, p_fine) - rng.negative_binomial(n, p_fine)).astype(np.float64)
                    zc[:, :self.k0] -= (exact_p.T @ em.T).T @ self.z0
                if gauss_l is not None:
                    zc[:, :self.k0] -= rng.standard_normal((r, gauss_l.shape[1])) @ gauss_l.T
                noise = noise - zc @ b
            out[lo:lo + r] = noise
        self.draw_info = info
        return out

    def half_widths(self, q, confidence: float = 0.95, *, draws: int = 2000, seed=None) -> np.ndarray:
        """Half-widths ``t`` with ``P(|noise| <= t) ~= confidence`` for each query (Monte Carlo, exact law)."""
        rng = np.random.default_rng(seed)
        noise = self.noise_draws(q, int(draws), rng)
        return np.quantile(np.abs(noise), confidence, axis=0, method="higher")


def consistent_estimates(possible, views, fine: FineTable | None = None, n_layers: int = 1) -> ConsistentEstimate:
    r"""Best linear unbiased estimates of every view cell from the views and the supernode table.

    Parameters
    ----------
    possible : mapping of str to numpy.ndarray of bool
        For every attribute used by a view: ``(n_supernodes, n_values)``, which
        values each supernode may contain (:func:`possible_values_from_labels`,
        or :func:`possible_values_from_people` under unit ``edge``). A superset
        of the truth keeps the estimates unbiased; a tighter set makes them
        more precise.
    views : sequence of ViewRelease
        The released views (unbiased, unclamped values).
    fine : FineTable, optional
        The supernode table over every cell ``a <= b`` (unbiased, unclamped
        values). Without it the views are made consistent with each other only.
        A sparse release (cells below a threshold dropped) must not be passed:
        its kept cells are biased.
    n_layers : int
        Number of layers of the layered views.

    Returns
    -------
    ConsistentEstimate

    Notes
    -----
    Cost: one pass over the supernode cells (``O(G^2)`` for ``G`` supernodes,
    vectorised), the pairs of atoms of each block of attributes, and dense
    algebra of order ``V^3`` in the number ``V`` of view cells (all views and
    layers; at most :data:`MAX_VIEW_CELLS`), independent of the number of people
    and contacts.

    References
    ----------
    M. Hay, V. Rastogi, G. Miklau, D. Suciu, "Boosting the accuracy of
    differentially private histograms through consistency", PVLDB 3(1), 2010.
    """
    views = list(views)
    if not views:
        raise ValueError("at least one view is needed")
    n_layers = int(n_layers)
    possible, sizes, n_groups = _checked_possible(possible, views, n_layers)
    lay = _Layout(views, n_layers)
    if lay.size > MAX_VIEW_CELLS:
        raise ValueError(f"{lay.size} view cells in all (views x layers), more than {MAX_VIEW_CELLS}")
    y_v = np.concatenate([np.asarray(v.noisy, dtype=np.float64).reshape(-1) for v in views])
    scale_v = np.concatenate([np.full(v.noisy.size, float(v.scale)) for v in views])
    _check_scales(views, fine)
    rel, var_unit = _relative_variance(views, fine)
    var_v = np.concatenate([np.full(v.noisy.size, rel(v.scale)) for v in views])

    blocks = _blocks(views)
    for blk in blocks:
        _block_structure(blk, views, possible, sizes)
    base = _BaseCoordinates(lay)
    base_rows, delta_rows = _difference_rows(blocks, lay, base)
    groups = _cell_groups(blocks, fine, n_groups, lay, base)
    layered = bool(base.layered_views) and n_layers > 1
    if layered:  # the supernode table sums the layers: sum over layered views of delta = 0
        coup = np.stack([base.offd[i] + groups.cells[:, i] for i in base.layered_views], axis=1)
        _, first = _compact_rows(coup)
        delta_rows.add(coup[first], None)
    if fine is None:  # no supernode measurement: the views' common directions must vanish
        _, first = _compact_rows(groups.base)
        base_rows.add(groups.base[first], None)

    z0, comp0 = _null_space(base.n_base, base_rows)
    zd, _ = _null_space(base.n_delta, delta_rows) if layered else (np.zeros((0, 0)), None)
    z = _stacked_null_space(z0, zd, lay, base)
    k0 = z0.shape[1]

    # ---- H = Z^T (D_V + v_F sum_g n_g p_g p_g^T) Z and the right-hand side
    h = (z.T * var_v) @ z
    rhs = z.T @ y_v
    merged_n = merged_p = None
    fine_var = 0.0
    fine_noisy = fine_group = None
    if fine is not None:
        fine_var = rel(fine.scale)
        merged_n, merged_p, fine_noisy = _add_supernode_table(h, rhs, fine, fine_var, groups, z0, comp0, base.n_base)
        fine_group = groups.cell_group
    if z.shape[1]:
        h_chol = sla.cho_factor(h, lower=True)
        mu = sla.cho_solve(h_chol, rhs)
        lambda_v = z @ mu
    else:
        h_chol = None
        lambda_v = np.zeros(lay.size)
    estimate = y_v - var_v * lambda_v
    return ConsistentEstimate(
        views=views, layout=lay, estimate=estimate, y_v=y_v, var_v=var_v, scale_v=scale_v, z=z, k0=k0, z0=z0,
        h_chol=h_chol, lambda_v=lambda_v, group_coords=groups.coords, fine_var=fine_var,
        fine_scale=(fine.scale if fine is not None else None), fine_noisy=fine_noisy, fine_group=fine_group,
        merged_n=merged_n, merged_p=merged_p, var_unit=var_unit, n_groups=len(groups.first),
        dim_free=z.shape[1])


# ---------------------------------------------------------------- the steps of consistent_estimates
def _checked_possible(possible, views, n_layers: int):
    """Validate the possible-value matrices and the views' shapes (in that order).

    Returns the matrices as boolean arrays, the number of values of each
    attribute and the number of supernodes.
    """
    sizes = {}
    n_groups = None
    for name, arr in possible.items():
        arr = np.asarray(arr, dtype=bool)
        if arr.ndim != 2:
            raise ValueError(f"possible[{name!r}] must be (n_supernodes, n_values)")
        if not arr.any(axis=1).all():
            raise ValueError(f"possible[{name!r}]: a supernode has no possible value")
        n_groups = arr.shape[0] if n_groups is None else n_groups
        if arr.shape[0] != n_groups:
            raise ValueError("every possible-value matrix must have one row per supernode")
        sizes[name] = arr.shape[1]
    possible = {k: np.asarray(v, dtype=bool) for k, v in possible.items()}
    for v in views:
        for a in v.attributes:
            if a not in possible:
                raise ValueError(f"no possible values given for attribute {a!r}")
        k = int(np.prod([sizes[a] for a in v.attributes]))
        if v.noisy.ndim != 2 or v.noisy.shape[1] != view_cell_count(k):
            raise ValueError(f"view {v.attributes}: expected shape (layers, {view_cell_count(k)})")
        if v.noisy.shape[0] not in (1, n_layers):
            raise ValueError(f"view {v.attributes}: {v.noisy.shape[0]} layer rows, expected 1 or {n_layers}")
    return possible, sizes, n_groups


def _check_scales(views, fine) -> None:
    """Every noise scale finite and positive."""
    for v in views:
        if not (v.scale > 0 and math.isfinite(v.scale)):
            raise ValueError(f"view {v.attributes}: noise scale must be finite and > 0")
    if fine is not None and not (fine.scale > 0 and math.isfinite(fine.scale)):
        raise ValueError("supernode table: noise scale must be finite and > 0")


def _relative_variance(views, fine):
    """``(rel, var_unit)``: ``rel(scale)`` is a table's noise variance relative to the largest one, ``var_unit``.

    Only relative variances enter the estimate; they are taken relative to the
    largest one (in the log domain) so that a nearly noiseless table (huge
    epsilon, variance underflowing to 0) stays usable.
    """
    logs = [_log_dl_variance(v.scale) for v in views] + ([_log_dl_variance(fine.scale)] if fine is not None else [])
    log_unit = max(logs)
    var_unit = math.exp(log_unit) if log_unit > -700 else 0.0

    def rel(scale):
        return max(math.exp(_log_dl_variance(scale) - log_unit), _MIN_RELATIVE_VARIANCE)

    return rel, var_unit


class _BaseCoordinates:
    """Base coordinates (every view's cells once, ``off0``) and delta coordinates (the layered views' cells
    once, ``offd``) of the view space.

    Directions of view space that no supernode cell can tell apart (the null space Z). On the layered
    views every layer obeys the same constraints, so with d(l) = d(0) + delta_l the null space splits
    into that of d(0) (base coordinates) and that of delta_l (delta coordinates), the same for every
    l >= 1: two small problems instead of one L times larger.
    """

    def __init__(self, lay: _Layout):
        self.off0 = np.cumsum([0] + lay.n_cells)
        self.layered_views = [i for i in range(len(lay.n_cells)) if lay.layered[i]]
        self.offd = {}
        acc = 0
        for i in self.layered_views:
            self.offd[i] = acc
            acc += lay.n_cells[i]
        self.n_base, self.n_delta = int(self.off0[-1]), acc


def _difference_rows(blocks, lay: _Layout, base: _BaseCoordinates):
    """The constraints of the pairs of atom tuples that no supernode cell tells apart, in base and delta
    coordinates."""
    base_rows = _Rows()
    delta_rows = _Rows()
    off0, offd = base.off0, base.offd
    for blk in blocks:
        if not len(blk.diff_pairs):
            continue
        t, t0 = blk.diff_pairs[:, 0], blk.diff_pairs[:, 1]
        base_rows.add(np.stack([off0[i] + blk.tuple_cells[t, j] for j, i in enumerate(blk.views)], axis=1),
                      np.stack([off0[i] + blk.tuple_cells[t0, j] for j, i in enumerate(blk.views)], axis=1))
        lv = [(j, i) for j, i in enumerate(blk.views) if lay.layered[i]]
        if lv and lay.n_layers > 1:
            delta_rows.add(np.stack([offd[i] + blk.tuple_cells[t, j] for j, i in lv], axis=1),
                           np.stack([offd[i] + blk.tuple_cells[t0, j] for j, i in lv], axis=1))
    return base_rows, delta_rows


class _CellGroups:
    """Groups of supernode cells: the combination of the kind pairs of their two supernodes in every block.

    ``cell_group`` (group of each cell), ``first`` (first cell of each group),
    ``cells`` (the group's base tuple's cell in each view), ``base`` (the same in
    base coordinates) and ``coords`` (in stacked view coordinates, layer 0).
    """

    def __init__(self, **kw):
        self.__dict__.update(kw)


def _cell_groups(blocks, fine, n_groups, lay: _Layout, base: _BaseCoordinates) -> _CellGroups:
    """Group the supernode cells (every cell ``a <= b``, in the order of ``fine`` when given)."""
    n_views = len(lay.n_cells)
    if fine is not None:
        ca = np.asarray(fine.a, dtype=np.int64)
        cb = np.asarray(fine.b, dtype=np.int64)
        if len(ca) != n_groups * (n_groups + 1) // 2:
            raise ValueError("'fine' must hold every cell of the supernode table (a dense release)")
    else:
        ca, cb = all_cells(n_groups)
    key = np.zeros(len(ca), dtype=np.int64)
    for blk in blocks:
        ka, kb = blk.kind[ca], blk.kind[cb]
        kp = np.minimum(ka, kb) * blk.n_kinds + np.maximum(ka, kb)
        _, key, _ = _unique_inverse(key * (blk.n_kinds ** 2) + kp)
    _, cell_group, group_first = _unique_inverse(key)
    rep_a, rep_b = ca[group_first], cb[group_first]
    group_cells = np.empty((len(group_first), n_views), dtype=np.int64)  # base tuple's cell in each view
    for blk in blocks:
        ka, kb = blk.kind[rep_a], blk.kind[rep_b]
        t0 = blk.base[np.minimum(ka, kb) * blk.n_kinds + np.maximum(ka, kb)]
        for j, i in enumerate(blk.views):
            group_cells[:, i] = blk.tuple_cells[t0, j]
    group_base = group_cells + base.off0[:-1][None, :]                # base coordinates
    group_coords = np.stack([lay.coord(i, group_cells[:, i], 0) for i in range(n_views)], axis=1)
    return _CellGroups(cell_group=cell_group, first=group_first, cells=group_cells, base=group_base,
                       coords=group_coords)


def _stacked_null_space(z0, zd, lay: _Layout, base: _BaseCoordinates) -> np.ndarray:
    """The null space Z over the stacked view cells from its base (``z0``) and delta (``zd``) parts."""
    n_layers, n_cells_v, off0, offd = lay.n_layers, lay.n_cells, base.off0, base.offd
    k0, kd = z0.shape[1], zd.shape[1]
    v_size = lay.size
    full_base = np.empty(v_size, dtype=np.int64)
    full_layer = np.zeros(v_size, dtype=np.int64)
    for i in range(len(n_cells_v)):
        rows = n_layers if lay.layered[i] else 1
        full_base[lay.offset[i]:lay.offset[i + 1]] = np.tile(off0[i] + np.arange(n_cells_v[i]), rows)
        full_layer[lay.offset[i]:lay.offset[i + 1]] = np.repeat(np.arange(rows), n_cells_v[i])
    z = np.zeros((v_size, k0 + (n_layers - 1) * kd if base.layered_views else k0))
    z[:, :k0] = z0[full_base]
    for i in base.layered_views:
        for layer in range(1, n_layers):
            idx = lay.offset[i] + layer * n_cells_v[i] + np.arange(n_cells_v[i])
            z[idx, k0 + (layer - 1) * kd:k0 + layer * kd] = zd[offd[i] + np.arange(n_cells_v[i])]
    return z


def _add_supernode_table(h, rhs, fine, fine_var: float, groups: _CellGroups, z0, comp0, n_base: int):
    """Add the supernode table's term to ``h`` and ``rhs`` (in place): ``(merged_n, merged_p, fine_noisy)``."""
    k0 = z0.shape[1]
    y_f = np.asarray(fine.noisy, dtype=np.float64)
    n_g = np.bincount(groups.cell_group, minlength=len(groups.first)).astype(np.float64)
    y_g = np.bincount(groups.cell_group, weights=y_f, minlength=len(groups.first))
    # groups whose base coordinates fall in the same components have the same Z^T p_g: merge them
    m_inv, m_first = _compact_rows(np.sort(comp0[groups.base], axis=1))
    n_m = np.bincount(m_inv, weights=n_g)
    y_m = np.bincount(m_inv, weights=y_g)
    mb = groups.base[m_first]
    if len(mb) * max(k0, 1) > MAX_GROUP_DIRECTIONS:  # dense (groups x directions) arrays below
        raise ValueError(f"{len(mb):,} groups of supernode cells x {k0:,} view directions is more than "
                         f"{MAX_GROUP_DIRECTIONS:,}: combine the views without the supernode table")
    merged_p = sparse.csr_matrix((np.ones(mb.size), (np.repeat(np.arange(len(mb)), mb.shape[1]),
                                                     mb.reshape(-1))), shape=(len(mb), n_base))
    pz = (merged_p @ z0) if k0 else np.zeros((len(mb), 0))    # groups x k0
    h[:k0, :k0] += fine_var * ((pz.T * n_m) @ pz)
    rhs[:k0] -= pz.T @ y_m
    return n_m, merged_p, y_f


class _Rows:
    """Constraint rows ``sum_j e[plus[:, j]] - sum_j e[minus[:, j]]`` collected by kind."""

    def __init__(self):
        self.eq_a, self.eq_b, self.pins, self.cols, self.vals = [], [], [], [], []

    def add(self, plus, minus):
        if not len(plus):
            return
        if minus is None:
            if plus.shape[1] == 1:
                self.pins.append(plus[:, 0])
            else:
                self.cols.append(plus)
                self.vals.append(np.ones(plus.shape))
        elif plus.shape[1] == 1 and minus.shape[1] == 1:
            self.eq_a.append(plus[:, 0])
            self.eq_b.append(minus[:, 0])
        else:
            self.cols.append(np.concatenate([plus, minus], axis=1))
            self.vals.append(np.concatenate([np.ones(plus.shape), -np.ones(minus.shape)], axis=1))


def _null_space(n: int, rows: _Rows):
    """A basis (n x k, dense) of the vectors satisfying every row, and the union-find components.

    Equalities ``d_i = d_j`` are merged combinatorially (connected components),
    pins ``d_i = 0`` remove their component, and the other rows go through an
    eigen-decomposition of their Gram matrix in the space of the remaining
    components (small integer entries; the gap between the null and the other
    eigenvalues is checked).
    """
    if rows.eq_a:
        ea, eb = np.concatenate(rows.eq_a), np.concatenate(rows.eq_b)
        graph = sparse.coo_matrix((np.ones(len(ea)), (ea, eb)), shape=(n, n))
        n_comp, comp = connected_components(graph, directed=False)
    else:
        n_comp, comp = n, np.arange(n)
    comp = comp.astype(np.int64)
    pinned = np.zeros(n_comp, dtype=bool)
    if rows.pins:
        pinned[comp[np.concatenate(rows.pins)]] = True
    free = np.full(n_comp, -1, dtype=np.int64)
    free[~pinned] = np.arange(int((~pinned).sum()))
    n_free = int((~pinned).sum())
    zp = np.eye(n_free)
    if rows.cols and n_free:
        cols = free[comp[np.concatenate([c.reshape(-1) for c in rows.cols])]]
        vals = np.concatenate([v.reshape(-1) for v in rows.vals])
        r_idx = np.concatenate([np.repeat(np.arange(len(c)) + off, c.shape[1]) for c, off in
                                zip(rows.cols, np.cumsum([0] + [len(c) for c in rows.cols[:-1]]))])
        keep = cols >= 0  # entries on pinned components are zero
        r_mat = sparse.csr_matrix((vals[keep], (r_idx[keep], cols[keep])), shape=(int(r_idx.max()) + 1, n_free))
        gram = (r_mat.T @ r_mat).toarray()
        ev, evec = np.linalg.eigh(gram)
        top = max(float(ev[-1]), 1.0)
        tol = top * n_free * 1e-13
        null = ev <= tol
        above = ev[~null]
        if len(above) and above[0] < 1e3 * tol:
            raise ArithmeticError("the consistency constraints are numerically ambiguous (eigenvalue gap "
                                  f"{above[0]:.3g} vs tolerance {tol:.3g})")
        zp = evec[:, null]
    z = np.zeros((n, zp.shape[1]))
    ok = free[comp] >= 0
    z[ok] = zp[free[comp[ok]]]
    return z, comp


# --------------------------------------------------------------------------- contact matrices (Arrow)

_QUANTITY = {
    "contacts": {"superedges": "edge_count_unclamped", "views": "contacts_unclamped",
                 "per_person": "contacts_per_person"},
    "weight_total": {"superedges": "weight_total_unclamped", "views": "weight_total_unclamped",
                     "per_person": "weight_per_person"},
}


def _exact_half_width(scale: float, count: int, confidence: float) -> float:
    """Smallest ``t`` with ``P(|S| <= t) >= confidence``, ``S`` a sum of ``count`` discrete Laplace draws."""
    from .intervals import sum_noise_pmf

    if count <= 0 or scale <= 0:
        return 0.0
    pmf = sum_noise_pmf([float(scale)], [int(count)], max_grid=1 << 26)
    if pmf is None:  # pragma: no cover - needs enormous scales
        raise ValueError("the noise is too wide for the exact grid")
    cover = np.cumsum(np.concatenate([pmf[:1], 2.0 * pmf[1:]]))
    return float(min(int(np.searchsorted(cover, confidence - 1e-12, side="left")), len(pmf) - 1))


def view_values(name: str, domains) -> list:
    """Value names of a view (combined with ``|`` for a combination of attributes)."""
    attrs = name.split(",")
    lists = [[str(x) for x in domains[a]] for a in attrs]
    out = [""]
    for lst in lists:
        out = [f"{p}|{x}" if p else x for p in out for x in lst]
    return out


def _codes_in(column, values):
    """Position of every entry of an Arrow column in ``values`` (numpy int64); the first entry not in
    ``values`` is raised as ``KeyError(entry)``."""
    col = column.cast(pa.string()) if column.type != pa.string() else column
    idx = pc.index_in(col, value_set=pa.array([str(v) for v in values], pa.string()))
    if idx.null_count:
        first = int(np.argmax(np.asarray(idx.is_null(), dtype=bool)))
        raise KeyError(col[first].as_py())
    return np.asarray(idx.to_numpy(zero_copy_only=False), dtype=np.int64)


def _read_views(views: pa.Table, names, domains, layers, column):
    """Dense arrays of the named views from the Arrow view table (inputs validated here).

    Arrow compute throughout (a filter per view, ``index_in`` for the value and layer codes, a
    ``bincount`` for the every-cell-once check): no Python object per row.
    """
    need = {"view", "layer", "value_a", "value_b", column, "noise_scale"}
    missing = need - set(views.column_names)
    if missing:
        raise ValueError(f"view table: missing column(s) {sorted(missing)}")
    out = []
    for name in names:
        mask = pc.equal(views.column("view"), name)
        sub = views if mask.null_count == 0 and pc.all(mask).as_py() else views.filter(mask)  # one view: no copy
        if not sub.num_rows:
            raise ValueError(f"view table: no view named {name!r}")
        values = view_values(name, domains)
        k = len(values)
        try:
            a = _codes_in(sub.column("value_a"), values)
            b = _codes_in(sub.column("value_b"), values)
        except KeyError as exc:
            raise ValueError(f"view {name!r}: value {exc.args[0]!r} is not in the declared domain") from None
        lay = sub.column("layer")
        if lay.null_count < len(lay):  # some row names a layer
            if layers is None:
                raise ValueError(f"view {name!r} is layered: pass the declared 'layers'")
            try:
                li = _codes_in(lay, layers)
            except KeyError:
                raise ValueError(f"view {name!r}: a layer is not in the declared layers") from None
            n_l = len(layers)
        else:
            li = np.zeros(len(a), dtype=np.int64)
            n_l = 1
        n_c = view_cell_count(k)
        lo, hi = np.minimum(a, b), np.maximum(a, b)
        flat = li * n_c + lo * k - (lo * (lo - 1)) // 2 + (hi - lo)
        if len(flat) != n_l * n_c or np.bincount(flat, minlength=n_l * n_c).max(initial=0) > 1:
            raise ValueError(f"view {name!r}: expected every one of the {n_l * n_c} cells exactly once")
        noisy = np.zeros(n_l * n_c)
        noisy[flat] = np.asarray(sub.column(column).to_numpy(zero_copy_only=False), dtype=np.float64)
        mm = pc.min_max(sub.column("noise_scale").cast(pa.float64()))
        if mm["min"].as_py() != mm["max"].as_py():
            raise ValueError(f"view {name!r}: one noise scale per view expected")
        out.append(ViewRelease(tuple(name.split(",")), noisy.reshape(n_l, n_c), float(mm["min"].as_py())))
    return out


def _read_fine(superedges: pa.Table, n_groups: int, column: str):
    from ..cells import cell_index

    for c in ("supernode_a", "supernode_b", column, "noise_scale"):
        if c not in superedges.column_names:
            raise ValueError(f"superedges table: missing column {c!r}")
    a = np.asarray(superedges.column("supernode_a").to_numpy(), dtype=np.int64)
    b = np.asarray(superedges.column("supernode_b").to_numpy(), dtype=np.int64)
    n_cells = n_groups * (n_groups + 1) // 2
    if len(a) != n_cells:
        raise ValueError("superedges table: not every cell is present (a sparse release cannot be combined "
                         "without bias; leave it out)")
    idx = cell_index(np.minimum(a, b), np.maximum(a, b), n_groups)
    y = np.zeros(n_cells)
    y[idx] = np.asarray(superedges.column(column).to_numpy(), dtype=np.float64)
    scales = np.unique(np.asarray(superedges.column("noise_scale").to_numpy(), dtype=np.float64))
    if len(scales) != 1:
        raise ValueError("superedges table: one noise scale expected")
    ca, cb = all_cells(n_groups)
    return FineTable(ca, cb, y, float(scales[0]))


def _people(people, name: str, values):
    """``(counts, noise_scale, noise_terms)`` of the named attribute in value order."""
    if isinstance(people, dict):
        counts, scale, terms = people[name]
        return (np.asarray(counts, dtype=np.float64), np.full(len(values), float(scale)),
                np.asarray(np.broadcast_to(terms, (len(values),)), dtype=np.int64))
    sub = people.filter(pc.equal(people.column("attribute"), name))
    got = {v: i for i, v in enumerate(sub.column("value").to_pylist())}
    if set(got) != set(values):
        raise ValueError(f"people table: attribute {name!r} must list every value of the domain once")
    order = np.array([got[v] for v in values])
    counts = np.asarray(sub.column("people").to_numpy(), dtype=np.float64)[order]
    scale = (np.asarray(sub.column("noise_scale").to_numpy(), dtype=np.float64)[order]
             if "noise_scale" in sub.column_names else np.zeros(len(values)))
    terms = (np.asarray(sub.column("noise_terms").to_numpy(), dtype=np.int64)[order]
             if "noise_terms" in sub.column_names else np.ones(len(values), dtype=np.int64))
    return counts, scale, terms


def contact_matrix(supernodes: pa.Table, superedges, views, attribute: str, *, domains, layers=None,
                   hierarchies=None, possible=None, people=None, method: str = "consistent",
                   by_layer: bool = False, per_person: bool = False, quantity: str = "contacts",
                   confidence: float = 0.95, draws: int = 2000, seed=None, use_views=None) -> pa.Table:
    r"""The contact matrix of an attribute with intervals, from the pieces of a release.

    Parameters
    ----------
    supernodes : pyarrow.Table
        ``supernode`` (0..G-1 in order) and the label columns of the grouping.
    superedges : pyarrow.Table or None
        Every cell ``supernode_a <= supernode_b`` with the unbiased column
        (``edge_count_unclamped``; ``weight_total_unclamped`` for weights) and
        ``noise_scale``. ``None`` for the views alone.
    views : pyarrow.Table or None
        Released views: ``view`` (attribute, or attributes joined by ``,``),
        ``layer`` (null when unlayered), ``value_a``, ``value_b``,
        ``contacts_unclamped`` (``weight_total_unclamped``), ``noise_scale``
        (:func:`aggpub.estimates.view_table` writes it).
    attribute : str
        The view to report (an attribute, or attributes joined by ``,``).
    domains : mapping of str to sequence of str
        The declared values of every attribute of a view, in code order.
    layers : sequence of str, optional
        The declared layers, in code order (needed for layered views).
    hierarchies : mapping, optional
        Generalisation levels of the grouping attributes (to read generalised labels).
    possible : mapping of str to numpy.ndarray of bool, optional
        Values each supernode may contain, overriding what the labels say
        (:func:`possible_values_from_people` under unit ``edge``).
    people : pyarrow.Table or mapping, optional
        People per value (for ``per_person``): columns ``attribute``, ``value``,
        ``people``, ``noise_scale`` (0 when exact), ``noise_terms`` (number of
        noisy counts summed); or ``{attribute: (counts, scale, terms)}``.
    method : {"consistent", "view", "supernodes"}
        ``consistent``: least squares over the supernode table and every view
        (or ``use_views``); ``view``: the raw view alone; ``supernodes``: the
        supernode table summed by the attribute's label values (generalised and
        ``*`` labels stay their own rows; no layers, no people).
    by_layer : bool
        One row per layer (layered views) instead of the sum over layers.
    per_person : bool
        Add per-person rates and their intervals.
    quantity : {"contacts", "weight_total"}
        Counts, or clipped weight totals (weighted views and superedge weight totals).
    confidence : float
    draws : int
        Monte Carlo draws of the noise law (``consistent`` only).
    seed : int, optional
        For the Monte Carlo draws only (post-processing; OS entropy by default).
    use_views : sequence of str, optional
        Views to combine (default: every view of the table).

    Returns
    -------
    pyarrow.Table
        One row per unordered pair ``value_a <= value_b`` (and layer): ``value_a``,
        ``value_b``, [``layer``], ``<quantity>`` (unbiased estimate),
        ``<quantity>_clamped`` (at least 0), ``lower``, ``upper``, ``noise_sd``;
        with ``per_person``: ``people_a``, ``people_b``, ``<rate>_a``,
        ``<rate>_a_lower``, ``<rate>_a_upper``, ``<rate>_b``, ... where ``<rate>_a``
        is the number per person of group ``a`` with group ``b`` (twice the count
        over ``people_a`` on the diagonal: both ends are in ``a``). The schema
        metadata records the method, the interval method, confidence and draws.

    Notes
    -----
    Counts are symmetric (one cell per unordered pair); rates are not: row ``a``
    of the rate matrix is what an average member of ``a`` has, as in the
    contact matrices of Mossong et al. (PLoS Medicine 2008). With exact people
    counts (unit ``edge``) a rate interval is the count interval divided by
    ``people_a``; with noisy counts (unit ``person``) it is
    ``[lower_count / upper_people, upper_count / lower_people]`` from two
    intervals at level ``1 - (1 - confidence) / 2`` each, which covers with
    probability at least ``confidence`` (Bonferroni).

    References
    ----------
    J. Mossong et al., "Social contacts and mixing patterns relevant to the
    spread of infectious diseases", PLoS Medicine 5(3), 2008.

    M. Hay, V. Rastogi, G. Miklau, D. Suciu, "Boosting the accuracy of
    differentially private histograms through consistency", PVLDB 3(1), 2010.
    """
    _check_matrix_request(supernodes, method, quantity, confidence, per_person, people)
    cols = _QUANTITY[quantity]
    if method == "supernodes":
        return _by_labels(supernodes, superedges, attribute, cols, quantity, confidence)

    values = view_values(attribute, domains)
    noisy_people = False
    level = confidence
    if per_person:
        p_counts, p_scale, p_terms = _people(people, attribute, values)
        noisy_people = bool((p_scale > 0).any())
        level = 1.0 - (1.0 - confidence) / 2.0 if noisy_people else confidence
    names = _view_names(attribute, method, views, use_views)
    rel = _read_views(views, names, domains, layers, cols["views"])
    target = rel[names.index(attribute)]
    if by_layer and target.noisy.shape[0] == 1:
        raise ValueError(f"view {attribute!r} has no layers")
    if method == "view":
        est, var, hw, hw_level = _raw_view(target, by_layer, confidence, level)
        interval_method = "exact"
    else:
        poss = _possible_for_views(rel, supernodes, domains, hierarchies, possible)
        fine = _read_fine(superedges, supernodes.num_rows, cols["superedges"]) if superedges is not None else None
        ce = consistent_estimates(poss, rel, fine, n_layers=len(layers) if layers is not None else 1)
        est, var, hw, hw_level = _combined_view(ce, names.index(attribute), len(values), by_layer, confidence,
                                                level, draws, seed)
        interval_method = "monte_carlo"
    out = _matrix_columns(values, est, var, hw, quantity, layers if by_layer else None)
    if per_person:
        out.update(_rate_columns(len(values), est, hw_level, (p_counts, p_scale, p_terms), noisy_people, level,
                                 cols["per_person"]))
    meta = {"method": method, "interval_method": interval_method, "confidence": str(confidence),
            "draws": str(int(draws)) if interval_method == "monte_carlo" else "",
            "views": ",".join(names), "people": "noisy (Bonferroni)" if noisy_people else
            ("exact" if per_person else "")}
    return pa.table(out).replace_schema_metadata({k_: str(v_) for k_, v_ in meta.items()})


def _view_names(attribute: str, method: str, views, use_views) -> list:
    """The views to read, the reported one first when it is not among them."""
    names = [attribute] if method == "view" else (list(use_views) if use_views is not None else
                                                  listed_views(views))
    if attribute not in names:
        names = [attribute] + names
    return names


# ---------------------------------------------------------------- the steps of contact_matrix
def _check_matrix_request(supernodes, method, quantity, confidence, per_person, people) -> None:
    """Refuse a request :func:`contact_matrix` cannot answer (in the order the checks are documented)."""
    if quantity not in _QUANTITY:
        raise ValueError(f"'quantity' must be 'contacts' or 'weight_total', got {quantity!r}")
    if method not in ("consistent", "view", "supernodes"):
        raise ValueError(f"'method' must be 'consistent', 'view' or 'supernodes', got {method!r}")
    if not 0 < confidence < 1:
        raise ValueError(f"'confidence' must be in (0, 1), got {confidence!r}")
    n_groups = supernodes.num_rows
    if not np.array_equal(np.asarray(supernodes.column("supernode").to_numpy()), np.arange(n_groups)):
        raise ValueError("supernodes table: 'supernode' must be 0..G-1 in order")
    if per_person:
        if method == "supernodes":
            raise ValueError("per_person needs a view ('consistent' or 'view')")
        if people is None:
            raise ValueError("per_person needs the people per value ('people')")


def _raw_view(target: ViewRelease, by_layer: bool, confidence: float, level: float):
    """``(estimate, variance, half-width, half-width at level)`` of a view alone (exact intervals)."""
    est = target.noisy if by_layer else target.noisy.sum(axis=0, keepdims=True)
    terms = 1 if by_layer else target.noisy.shape[0]
    var = np.full(est.shape, terms * _dl_variance(target.scale))
    hw = np.full(est.shape, _exact_half_width(target.scale, terms, confidence))
    hw_level = hw if level == confidence else np.full(est.shape, _exact_half_width(target.scale, terms, level))
    return est, var, hw, hw_level


def _possible_for_views(rel, supernodes, domains, hierarchies, possible) -> dict:
    """Values each supernode may contain, for every attribute of the views: given, else read from the labels,
    else every value."""
    n_groups = supernodes.num_rows
    attrs = list(dict.fromkeys(a for v in rel for a in v.attributes))
    poss = {}
    for a in attrs:
        if possible is not None and a in possible:
            poss[a] = np.asarray(possible[a], dtype=bool)
        elif a in supernodes.column_names:
            poss[a] = possible_values_from_labels(supernodes.column(a).to_pylist(), domains[a],
                                                  (hierarchies or {}).get(a))
        else:
            poss[a] = np.ones((n_groups, len(domains[a])), dtype=bool)
    return poss


def _combined_view(ce: ConsistentEstimate, i: int, k: int, by_layer: bool, confidence: float, level: float,
                   draws: int, seed):
    """``(estimate, variance, half-width, half-width at level)`` of view ``i`` of the consistent estimates
    (Monte Carlo intervals over the exact noise law)."""
    q = ce.query_matrix(i, by_layer=by_layer)
    est = (q @ ce.estimate).reshape(-1 if by_layer else 1, view_cell_count(k))
    var = ce.variance(q).reshape(est.shape)
    noise = np.abs(ce.noise_draws(q, int(draws), np.random.default_rng(seed)))
    hw = np.quantile(noise, confidence, axis=0, method="higher").reshape(est.shape)
    hw_level = hw if level == confidence else \
        np.quantile(noise, level, axis=0, method="higher").reshape(est.shape)
    return est, var, hw, hw_level


def _matrix_columns(values, est, var, hw, quantity: str, layers=None) -> dict:
    """The count columns of the matrix table: one row per pair ``a <= b`` (per layer when ``layers``)."""
    k = len(values)
    a_idx, b_idx = view_cells(k)
    rows = est.shape[0]
    vals = pa.array([str(v) for v in values], pa.string())
    flat = est.reshape(-1)
    out = {  # Arrow gathers the value names: no Python string per row
        "value_a": vals.take(pa.array(np.tile(a_idx, rows))),
        "value_b": vals.take(pa.array(np.tile(b_idx, rows))),
    }
    if layers is not None:
        out["layer"] = pa.array(np.repeat(np.asarray(layers, dtype=object), len(a_idx)), pa.string())
    out[quantity] = pa.array(flat)
    out[f"{quantity}_clamped"] = pa.array(np.maximum(flat, 0.0))
    out["lower"] = pa.array(np.maximum(flat - hw.reshape(-1), 0.0))
    out["upper"] = pa.array(np.maximum(flat + hw.reshape(-1), 0.0))  # the truth is >= 0: never an empty interval
    out["noise_sd"] = pa.array(np.sqrt(np.maximum(var.reshape(-1), 0.0)))
    return out


def _rate_columns(k: int, est, hw_level, people, noisy_people: bool, level: float, rate: str) -> dict:
    """The per-person columns: people of each side and the rate per person of each side, with bounds
    (count bounds at ``level`` over people bounds at ``level``; ``people`` from :func:`_people`)."""
    p_counts, p_scale, p_terms = people
    if noisy_people:
        p_hw = np.array([_exact_half_width(s, t, level) for s, t in zip(p_scale, p_terms)])
    else:
        p_hw = np.zeros(k)
    a_idx, b_idx = view_cells(k)
    rows = est.shape[0]
    flat = est.reshape(-1)
    lo_c = np.maximum(flat - hw_level.reshape(-1), 0.0)
    hi_c = np.maximum(flat + hw_level.reshape(-1), 0.0)
    diag = np.tile(np.where(a_idx == b_idx, 2.0, 1.0), rows)
    out = {}
    for side, idx in (("a", np.tile(a_idx, rows)), ("b", np.tile(b_idx, rows))):
        n = p_counts[idx]
        n_lo = np.maximum(n - p_hw[idx], 0.0)
        n_hi = n + p_hw[idx]
        with np.errstate(divide="ignore", invalid="ignore"):
            out[f"people_{side}"] = pa.array(n)
            out[f"{rate}_{side}"] = pa.array(np.where(n > 0, diag * flat / n, np.nan))
            out[f"{rate}_{side}_lower"] = pa.array(np.where(n_hi > 0, diag * lo_c / n_hi, 0.0))
            out[f"{rate}_{side}_upper"] = pa.array(np.where(n_lo > 0, diag * hi_c / n_lo, np.inf))
    return out


def _by_labels(supernodes, superedges, attribute, cols, quantity, confidence):
    """The supernode table summed by the label values of ``attribute`` (exact intervals)."""
    if superedges is None:
        raise ValueError("method 'supernodes' needs the superedges table")
    n_groups = supernodes.num_rows
    fine = _read_fine(superedges, n_groups, cols["superedges"])
    labels = np.asarray([str(x) for x in supernodes.column(attribute).to_pylist()], dtype=object)
    cats, code = np.unique(labels, return_inverse=True)
    k = len(cats)
    ca, cb = code[fine.a], code[fine.b]
    lo, hi = np.minimum(ca, cb), np.maximum(ca, cb)
    pair = lo * k - (lo * (lo - 1)) // 2 + (hi - lo)
    n_c = view_cell_count(k)
    est = np.bincount(pair, weights=fine.noisy, minlength=n_c)
    n_cells = np.bincount(pair, minlength=n_c)
    a_idx, b_idx = view_cells(k)
    keep = n_cells > 0
    hw = np.array([_exact_half_width(fine.scale, int(m), confidence) for m in n_cells[keep]])
    est = est[keep]
    out = {"value_a": pa.array(cats[a_idx[keep]].astype(object), pa.string()),
           "value_b": pa.array(cats[b_idx[keep]].astype(object), pa.string()),
           quantity: pa.array(est), f"{quantity}_clamped": pa.array(np.maximum(est, 0.0)),
           "lower": pa.array(np.maximum(est - hw, 0.0)), "upper": pa.array(np.maximum(est + hw, 0.0)),
           "noise_sd": pa.array(np.sqrt(n_cells[keep] * _dl_variance(fine.scale)))}
    meta = {"method": "supernodes", "interval_method": "exact", "confidence": str(confidence)}
    return pa.table(out).replace_schema_metadata(meta)


def contact_matrix_square(table: pa.Table, column: str = "contacts", values=None):
    """A contact-matrix table as a square array (row ``a``, column ``b``).

    For a symmetric column (counts, intervals of counts) both ``[a, b]`` and
    ``[b, a]`` get the pair's value. For a per-person column named without its
    side (``contacts_per_person``, ``weight_per_person``; add ``_lower`` /
    ``_upper`` for the bounds), ``[a, b]`` is the rate per person of ``a`` and
    ``[b, a]`` the rate per person of ``b``: not symmetric.

    Returns
    -------
    values : list of str
    matrix : numpy.ndarray, shape (K, K)
    """
    va = table.column("value_a").to_pylist()
    vb = table.column("value_b").to_pylist()
    if "layer" in table.column_names and len(set(table.column("layer").to_pylist())) > 1:
        raise ValueError("several layers: filter one layer first")
    if values is None:
        values = list(dict.fromkeys(va + vb))
    pos = {v: i for i, v in enumerate(values)}
    k = len(values)
    m = np.full((k, k), np.nan)
    ia = np.array([pos[x] for x in va])
    ib = np.array([pos[x] for x in vb])
    stem, _, bound = column.partition("_per_person")
    if bound or column.endswith("_per_person"):
        name = f"{stem}_per_person"
        suffix = column[len(name):]
        m[ia, ib] = np.asarray(table.column(f"{name}_a{suffix}").to_numpy())
        m[ib, ia] = np.asarray(table.column(f"{name}_b{suffix}").to_numpy())
    else:
        x = np.asarray(table.column(column).to_numpy())
        m[ia, ib] = x
        m[ib, ia] = x
    return values, m
