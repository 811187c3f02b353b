"""The degree-corrected block sampler with affinity blocks: the core of the one synthetic-network sampler.

Input (all public: a release after post-processing, or, for the confidential audit's
"grouping alone" row, the true aggregate): supernode sizes, an integer count ``m_c``
for every superedge cell, a target degree for every synthetic person (the estimated
sorted sequence of their supernode), and the strength ``rho`` of the affinity blocks
(:func:`aggpub.synthesis.fit_affinity` fits it to a released triangle count).

Phase 1, affinity blocks (the first phase of BTER, Seshadhri, Kolda, Pinar, PRE 85,
2012, adapted to the block structure). Each person of supernode ``A`` draws a type:
a cell ``(A, B)`` with probability ``omega_AB / kappa_A`` (:func:`block_types`). People
of one type, in order of target degree, are cut into blocks so that a run of people of
degree ``d`` forms blocks of ``d + 1`` people. Every pair inside a block becomes a
contact with probability ``min(rho, m_c / expected block pairs of cell c)`` times
``min(1, min(d_i, d_j) / (b - 1))``: within each cell's count, and nobody's expected
block degree above ``rho`` times their target; a random surplus beyond a cell's count
is dropped. Dense small blocks of people of similar degree give a node of degree ``d``
a local clustering near ``rho^3`` (BTER; Newman, PRL 103, 2009, and Miller, PRE 80,
2009, make the same point with explicit triangles).

Phase 2, degree-corrected block model (Karrer, Newman, PRE 83, 2011), realised as a
simple graph. Each person's excess degree (target minus phase-1 degree, at least 0)
becomes stubs, dealt to the cells and matched at random (:func:`_stub_pairs`); cell
``(A, B)`` gets its remaining count ``m'_AB`` (its count minus its phase-1 contacts) of
distinct contacts. Self-pairs and repeated pairs are redrawn with endpoint
probabilities proportional to what each person still lacks (Chung-Lu inside blocks,
plus a small floor) until the cell has exactly ``m'_AB`` distinct contacts. In the Poisson multigraph version of this model
(:func:`karrer_newman_expected`), person ``i`` in ``A`` has expected degree
``theta_i kappa_A / sum_A theta`` with ``kappa_A = 2 m_AA + sum_{B != A} m_AB``, which
equals the target degree whenever the targets of ``A`` add up to ``kappa_A`` (the
consistency step of :mod:`aggpub.estimates.counts` makes them); the simple-graph draw lowers
the heaviest people slightly (a repeated pair counts once) and never changes a cell's
total. A cell whose weighted draws keep failing (weight on too few people) is
completed with uniform draws after ``UNIFORM_AFTER`` rounds.

Everything is vectorised over cells and pairs (numpy); the only Python loops are over
rounds of redraws.

References
----------
B. Karrer, M. E. J. Newman, "Stochastic blockmodels and community structure in
networks", Physical Review E 83, 016107, 2011.

F. Chung, L. Lu, "Connected components in random graphs with given expected degree
sequences", Annals of Combinatorics 6, 2002.

C. Seshadhri, T. G. Kolda, A. Pinar, "Community structure and scale-free collections
of Erdos-Renyi graphs", Physical Review E 85, 056109, 2012.

M. E. J. Newman, "Random graphs with clustering", Physical Review Letters 103,
058701, 2009. J. C. Miller, "Percolation and epidemics in random clustered networks",
Physical Review E 80, 020901, 2009.
"""

from __future__ import annotations

__all__ = ["karrer_newman_expected", "round_counts", "block_types", "affinity_blocks", "sample_degree_corrected",
           "UNIFORM_AFTER", "MAX_ROUNDS"]

import numpy as np

from ..cells import cell_index, n_cells, unrank_pairs

UNIFORM_AFTER = 60
MAX_ROUNDS = 200


def _run_heads(x: np.ndarray) -> np.ndarray:
    """Where each run of equal values of ``x`` begins (``x`` not empty)."""
    new = np.empty(len(x), bool)
    new[0] = True
    np.not_equal(x[1:], x[:-1], out=new[1:])
    return np.flatnonzero(new)


def _run_starts(x: np.ndarray) -> np.ndarray:
    """For a non-decreasing array, the position of the first element equal to each element.

    The same as ``np.searchsorted(x, x, side="left")`` in one linear pass.
    """
    n = len(x)
    if n == 0:
        return np.zeros(0, np.int64)
    heads = _run_heads(x)
    return np.repeat(heads, np.diff(np.append(heads, n)))


#: Largest packed sort key :func:`_shuffled_order` builds (beyond it, :func:`numpy.lexsort`).
_PACK_LIMIT = 2 ** 62


def _shuffled_order(n: int, rng, *keys) -> np.ndarray:
    """The order sorting ``n`` items by ``keys`` (non-negative integer arrays, most significant first), ties in
    uniformly random order.

    One random permutation breaks the ties. The keys and the permutation are packed into one int64 key
    when their ranges allow (one quicksort, several times faster than :func:`numpy.lexsort`); the
    order is the same either way (the packed keys are distinct).
    """
    perm = rng.permutation(n)
    packed, span = perm.astype(np.int64), n
    for k in reversed(keys):
        top = int(k.max()) + 1 if n else 1
        if span * top >= _PACK_LIMIT:
            return np.lexsort((perm,) + tuple(reversed(keys)))
        packed += np.asarray(k, np.int64) * span
        span *= top
    return np.argsort(packed)


def karrer_newman_expected(theta, group, omega):
    """Expected degrees and block totals of the Karrer-Newman degree-corrected model.

    ``theta`` normalised to sum 1 in every group; ``omega[r, s]`` the expected number
    of edge ends between groups (``omega[r, r]`` twice the edges inside ``r``).
    Returns ``(expected degree of each node, expected edges between each pair of groups
    (r, s) with r <= s, as a matrix)`` for the multigraph model
    ``A_ij ~ Poisson(theta_i theta_j omega_{g_i g_j})`` (self-loops ``~ Poisson(theta_i^2 omega / 2)``
    counted twice in the degree).
    """
    theta = np.asarray(theta, np.float64)
    omega = np.asarray(omega, np.float64)
    P = np.outer(theta, theta) * omega[np.ix_(group, group)]   # E[A_ij], i != j
    loops = np.diag(P) / 2.0                                      # E[self-loops of i]
    np.fill_diagonal(P, 0.0)
    deg = P.sum(axis=1) + 2.0 * loops                             # a self-loop adds 2 to the degree
    k = omega.shape[0]
    H = np.zeros((len(group), k))
    np.add.at(H.T, group, P)                                      # H[i, s] = sum_{j in s} E[A_ij]
    E = np.zeros((k, k))
    np.add.at(E, group, H)                                        # E[r, s] = sum_{i in r, j in s} E[A_ij]
    within = np.diag(E) / 2.0 + np.bincount(group, weights=loops, minlength=k)
    upper = np.triu(E, 1) + np.diag(within)
    return deg, upper


def round_counts(m, cap, rng):
    """Unbiased integer rounding of non-negative cell targets (floor + Bernoulli of the fraction)."""
    m = np.clip(np.asarray(m, np.float64), 0.0, cap)
    f = np.floor(m)
    return np.minimum((f + (rng.random(len(m)) < (m - f))).astype(np.int64), np.asarray(cap, np.int64))


def block_types(group, a, b, counts, rng, cross=True):
    """Affinity type of every slot: the cell it builds its block in.

    A member of supernode ``A`` picks a partner supernode ``B`` with probability
    ``omega_AB / kappa_A`` (``omega_AA = 2 m_AA``, ``omega_AB = m_AB``), the share of
    ``A``'s contact ends that lie in cell ``(A, B)``; its type is the cell ``(A, B)``.
    Blocks are then built among people of the same type, so a block of type
    ``(A, B)`` mixes members of ``A`` and ``B`` in proportion to how the cell's
    contacts are spread, and its contacts fall in cells ``(A, A)``, ``(A, B)``,
    ``(B, B)``. With ``cross=False`` every type is the diagonal cell (blocks inside
    supernodes, as in the first version).
    """
    nG = int(group.max()) + 1
    C = len(a)
    if not cross:
        return cell_index(group, group, nG)
    w = np.where(a == b, 2.0 * counts, counts).astype(np.float64)
    # for each supernode, its incident cells (two entries per off-diagonal cell)
    diag = a == b
    cells = np.arange(C)
    inc_g = np.concatenate([a, b[~diag]])
    inc_c = np.concatenate([cells, cells[~diag]])
    inc_w = np.concatenate([w, w[~diag]])
    order = np.argsort(inc_g * C + inc_c)  # (supernode, cell) order; the pairs are distinct
    inc_g, inc_c, inc_w = inc_g[order], inc_c[order], inc_w[order]
    cum = np.cumsum(inc_w)
    start = np.searchsorted(inc_g, np.arange(nG), side="left")
    stop = np.searchsorted(inc_g, np.arange(nG), side="right")
    base = np.concatenate([[0.0], cum])
    lo, hi = base[start], base[stop]
    draw = lo[group] + rng.random(len(group)) * (hi[group] - lo[group])
    pos = np.clip(np.searchsorted(cum, draw, side="right"), start[group], np.maximum(stop[group] - 1, start[group]))
    t = inc_c[pos]
    no_weight = hi[group] <= lo[group]
    return np.where(no_weight, cell_index(group, group, nG), t)


def affinity_blocks(target, btype, rng):
    """Blocks: people of one type, in order of target degree, ``d + 1`` people of degree ``d`` per block.

    Returns ``(members sorted by block, block of each of them)``.
    """
    d = np.maximum(np.rint(target), 0.0)
    order = _shuffled_order(len(d), rng, btype, d.astype(np.int64))
    bt, w = btype[order], 1.0 / (d[order] + 1.0)
    cs = np.cumsum(w)
    first = _run_starts(bt)
    start_cs = np.concatenate([[0.0], cs])[first]
    local = np.floor(cs - w - start_cs + 1e-9).astype(np.int64)
    key = bt.astype(np.int64) * (len(d) + 1) + local  # non-decreasing along ``order``
    new = np.concatenate([[True], key[1:] != key[:-1]]) if len(key) else np.zeros(0, bool)
    return order, np.cumsum(new) - 1


def _phase1(target, group, a, b, counts, rho, rng, cross=True):
    """Affinity-block contacts: ``(keys u * N + v, their cells)``, each cell within its count."""
    N = len(target)
    nG = int(group.max()) + 1 if N else 0
    if rho <= 0 or N == 0:
        return np.empty(0, np.int64), np.empty(0, np.int64)
    btype = block_types(group, a, b, counts, rng, cross)
    members, block = affinity_blocks(target, btype, rng)
    bsize = np.bincount(block)
    bstart = np.concatenate([[0], np.cumsum(bsize)[:-1]])
    bpairs = bsize * (bsize - 1) // 2
    total = int(bpairs.sum())
    if total == 0:
        return np.empty(0, np.int64), np.empty(0, np.int64)
    owner = np.repeat(np.arange(len(bsize)), bpairs)
    first = np.concatenate([[0], np.cumsum(bpairs)[:-1]])
    r = np.arange(total, dtype=np.int64) - np.repeat(first, bpairs)
    i, j = unrank_pairs(r)
    pi, pj = members[bstart[owner] + i], members[bstart[owner] + j]
    gi, gj = group[pi], group[pj]
    cell = cell_index(np.minimum(gi, gj), np.maximum(gi, gj), nG)
    # a pair's chance is rho times the smaller of its ends' (target degree / (block size - 1)), at most 1:
    # nobody's expected block degree exceeds rho times their target degree (BTER keeps rho (d) <= d the same way)
    d = np.maximum(target, 0.0)
    room = bsize[owner] - 1.0
    w_pair = np.minimum(1.0, np.minimum(d[pi], d[pj]) / room)
    pairs_c = np.bincount(cell, weights=w_pair, minlength=len(a))
    p_c = np.where(pairs_c > 0, np.minimum(rho, counts / np.maximum(pairs_c, 1e-12)), 0.0)
    keep = rng.random(total) < p_c[cell] * w_pair
    u, v = np.minimum(pi, pj)[keep], np.maximum(pi, pj)[keep]
    return u * N + v, cell[keep]


def _cell_of(keys, N, group, a, b):
    nG = int(group.max()) + 1
    gi, gj = group[keys // N], group[keys % N]
    return cell_index(np.minimum(gi, gj), np.maximum(gi, gj), nG)


def _trim_to(keys, cell, limit, rng):
    """Keep a uniformly random ``limit[c]`` of the keys of each cell ``c`` (all when fewer); sorted keys."""
    if not len(keys):
        return keys
    order = _shuffled_order(len(keys), rng, cell)
    keys, cell = keys[order], cell[order]
    rank = np.arange(len(cell)) - _run_starts(cell)
    keys = keys[rank < np.asarray(limit)[cell]]
    return np.sort(keys)


def _weighted_pairs(a, b, need, theta, cum, lo, hi, offset, sizes, rng, uniform):
    """One round of candidate pairs for the cells in ``(a, b)`` (keys ``min * N + max`` and cell)."""
    N = len(theta)
    k = np.ceil(need * 1.3 + 2).astype(np.int64)
    cell = np.repeat(np.arange(len(a)), k)
    A, B = a[cell], b[cell]
    if uniform:
        i = offset[A] + (rng.random(len(cell)) * sizes[A]).astype(np.int64)
        j = offset[B] + (rng.random(len(cell)) * sizes[B]).astype(np.int64)
    else:
        i = np.searchsorted(cum, lo[A] + rng.random(len(cell)) * (hi[A] - lo[A]), side="right")
        j = np.searchsorted(cum, lo[B] + rng.random(len(cell)) * (hi[B] - lo[B]), side="right")
        i = np.clip(i, offset[A], offset[A] + sizes[A] - 1)
        j = np.clip(j, offset[B], offset[B] + sizes[B] - 1)
    ok = i != j
    lo_ij = np.minimum(i, j)[ok]
    hi_ij = np.maximum(i, j)[ok]
    return lo_ij * N + hi_ij, cell[ok]


def _stub_pairs(a, b, rem, excess, group, rng):
    """Configuration-model candidates: every person's excess degree as stubs, dealt to cells, matched.

    Each person ``i`` gets ``round(excess_i)`` stubs (unbiased rounding). The stubs of
    supernode ``A`` are shuffled and dealt, in order, to the cell sides incident to
    ``A`` (``2 m'_AA`` stubs for the diagonal, ``m'_AB`` for each other cell): every
    person's stubs are spread over the cells like a draw without replacement
    (multivariate hypergeometric). Inside a cell, the ``k``-th stub of side ``A`` is
    matched with the ``k``-th stub of side ``B`` (diagonal: ``k`` with ``k + m'``),
    a uniform random matching. Self-pairs are dropped here; repeated pairs by the caller.
    """
    N = len(excess)
    C = len(a)
    fl = np.floor(excess)
    e = (fl + (rng.random(N) < excess - fl)).astype(np.int64)
    diag = a == b
    cells = np.arange(C)
    seg_group = np.concatenate([a, b[~diag]])
    seg_cell = np.concatenate([cells, cells[~diag]])
    seg_len = np.concatenate([np.where(diag, 2 * rem, rem), rem[~diag]]).astype(np.int64)
    order = np.argsort(seg_group, kind="stable")
    seg_group, seg_cell, seg_len = seg_group[order], seg_cell[order], seg_len[order]
    seg_off = np.concatenate([[0], np.cumsum(seg_len)[:-1]])
    nG = int(group.max()) + 1 if N else 0
    group_seg_base = np.concatenate([[0], np.cumsum(np.bincount(seg_group, weights=seg_len, minlength=nG))])
    group_seg_base = group_seg_base.astype(np.int64)
    idx = np.int32 if N < 2 ** 31 else np.int64  # half the memory traffic on the large arrays below
    stubs = np.repeat(np.arange(N, dtype=idx), e)
    sg = np.repeat(group, e)  # non-decreasing: people are numbered supernode by supernode
    # a uniform shuffle inside each supernode: sort by supernode, then by a random key (one float sort,
    # about 7x faster than a lexsort of the two keys on tens of millions of stubs)
    perm = np.argsort(sg + rng.random(len(stubs)))
    stubs = stubs[perm]  # sg is already in supernode order and stays as it is
    sg_start = np.concatenate([[0], np.cumsum(np.bincount(sg, minlength=nG))[:-1]])
    q = np.arange(len(stubs)) - sg_start[sg]   # position inside the supernode
    ok = q < np.diff(group_seg_base)[sg]
    filled = np.full(int(seg_len.sum()), -1, idx)
    filled[group_seg_base[sg[ok]] + q[ok]] = stubs[ok]
    # the two sides of each cell: position of the segment of each side
    first_side = np.full(C, -1, np.int64)
    second_side = np.full(C, -1, np.int64)
    is_first = order < C  # the first concatenated part holds side a (the smaller supernode) of every cell
    first_side[seg_cell[is_first]] = seg_off[is_first]
    second_side[seg_cell[~is_first]] = seg_off[~is_first]
    k = np.repeat(rem, 1).astype(np.int64)
    cell = np.repeat(cells, k)
    within = np.arange(len(cell)) - np.repeat(np.concatenate([[0], np.cumsum(k)[:-1]]), k)
    ia = first_side[cell] + within
    ib = np.where(diag, first_side + k, second_side)[cell] + within
    i, j = filled[ia], filled[ib]
    good = (i >= 0) & (j >= 0) & (i != j)
    i, j, cell = i[good].astype(np.int64), j[good].astype(np.int64), cell[good]
    return np.minimum(i, j) * N + np.maximum(i, j), cell


def _merge(a, b):
    """The sorted union of two sorted arrays with no key in common.

    numpy's stable sort of integers is a merge sort of the runs it finds (timsort): on two sorted runs it
    is one merge, about 5x faster than ``np.insert`` at the positions ``np.searchsorted`` finds (which
    builds a mask and copies through it), with the same result.
    """
    return np.sort(np.concatenate([a, b]), kind="stable")


def _member(keys, sorted_keys):
    """Whether each key is in the sorted array ``sorted_keys``."""
    if not len(sorted_keys) or not len(keys):
        return np.zeros(len(keys), bool)
    pos = np.minimum(np.searchsorted(sorted_keys, keys), len(sorted_keys) - 1)
    return sorted_keys[pos] == keys


def _new_first_occurrences(keys, cell, *present):
    """The first occurrence (in draw order) of every key that is in none of the sorted arrays ``present``.

    Returns the kept ``(keys, cell)`` in draw order. One unstable sort of the keys, the
    earliest position of each run of equal keys (a minimum over the run), and the
    membership test on the distinct keys in sorted order (a cache-friendly search);
    the same result as dropping the present keys and keeping first occurrences with a
    stable sort, several times faster.
    """
    if not len(keys):
        return keys, cell
    order = np.argsort(keys)
    sk = keys[order]
    heads = _run_heads(sk)
    first = np.minimum.reduceat(order, heads)
    distinct = sk[heads]
    seen = np.zeros(len(distinct), bool)
    for sorted_keys in present:
        seen |= _member(distinct, sorted_keys)
    first = np.sort(first[~seen])
    return keys[first], cell[first]


def sample_degree_corrected(sizes, a, b, counts, target, rho, rng, *, stubs=True, cross=True,
                            return_stats=False):
    """Draw one synthetic network.

    Parameters
    ----------
    sizes : int array (supernodes)
    a, b : int arrays (cells, ``a <= b``)
    counts : int array (cells): exact number of contacts of each cell (see :func:`round_counts`)
    target : float array (people, supernode by supernode): target degrees
    rho : float in [0, 1]: affinity-block density
    rng : numpy.random.Generator

    Returns
    -------
    (u, v) int arrays with ``u < v``; with ``return_stats`` also a dict (phase-1 contacts, shortfall).
    """
    sizes = np.asarray(sizes, np.int64)
    N = int(sizes.sum())
    nG = len(sizes)
    a = np.asarray(a, np.int64)
    b = np.asarray(b, np.int64)
    if len(a) != n_cells(nG) or not np.array_equal(cell_index(a, b, nG), np.arange(len(a))):
        raise ValueError("the degree-corrected sampler needs every cell of the table, in row order")
    group = np.repeat(np.arange(nG), sizes)
    offset = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    counts = np.asarray(counts, np.int64)
    keys1, cell1 = _phase1(np.asarray(target, np.float64), group, a, b, counts, rho, rng, cross)
    keys1 = _trim_to(keys1, cell1, counts, rng)  # sorted
    # remaining counts and weights
    rem = counts - np.bincount(_cell_of(keys1, N, group, a, b), minlength=len(a))
    deg1 = np.bincount(keys1 // N, minlength=N) + np.bincount(keys1 % N, minlength=N)
    theta = np.maximum(np.asarray(target, np.float64) - deg1, 0.0)
    wsum = np.bincount(group, weights=theta, minlength=nG)
    theta = np.where(wsum[group] > 0, theta, 1.0)  # a supernode with no weight left: uniform
    cum = np.cumsum(theta)
    lo = np.concatenate([[0.0], cum])[offset]
    hi = cum[offset + sizes - 1]
    chosen = keys1  # sorted: phase 1 and the first round
    extra = np.empty(0, np.int64)  # sorted: the later (small) rounds, merged into ``chosen`` at the end
    got = deg1.astype(np.float64)  # contacts each person has so far, kept up to date round by round
    need = rem.copy()
    active = np.flatnonzero(need > 0)
    rounds = 0
    while len(active) and rounds < MAX_ROUNDS:
        if rounds == 0 and stubs:
            keys, cell = _stub_pairs(a, b, need, theta, group, rng)
        else:
            if stubs and rounds > 0:  # weights: what each person still lacks (a floor keeps everyone drawable)
                theta = np.maximum(np.asarray(target, np.float64) - got, 0.0) + 0.05
                cum = np.cumsum(theta)
                lo = np.concatenate([[0.0], cum])[offset]
                hi = cum[offset + sizes - 1]
            keys, cell_local = _weighted_pairs(a[active], b[active], need[active], theta, cum, lo, hi, offset,
                                               sizes, rng, uniform=rounds >= UNIFORM_AFTER)
            cell = active[cell_local]
        # drop keys already present, keep the first occurrence of each new key (draw order)
        keys, cell = _new_first_occurrences(keys, cell, chosen, extra)
        order = np.argsort(cell, kind="stable")
        keys, cell = keys[order], cell[order]
        rank = np.arange(len(cell)) - _run_starts(cell)
        take = rank < need[cell]
        keys, cell = keys[take], cell[take]
        need -= np.bincount(cell, minlength=len(need))
        keys = np.sort(keys)
        if rounds == 0:
            chosen = _merge(chosen, keys)
        else:  # later rounds add few contacts: keep them apart, so a round costs what it adds
            extra = _merge(extra, keys)
        got += np.bincount(keys // N, minlength=N) + np.bincount(keys % N, minlength=N)
        active = np.flatnonzero(need > 0)
        rounds += 1
    if len(extra):
        chosen = _merge(chosen, extra)
    u, v = chosen // N, chosen % N
    if return_stats:
        return u, v, {"phase1": len(keys1), "shortfall": int(need.sum()), "rounds": rounds, "cross": cross}
    return u, v
