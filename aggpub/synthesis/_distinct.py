"""Uniform sets of distinct values, for many cells at once (the core of the synthetic-network sampler)."""

from __future__ import annotations

__all__ = ["distinct_per_cell"]

import numpy as np


def _expected_draws(space: np.ndarray, have: np.ndarray, need: np.ndarray) -> np.ndarray:
    """Uniform draws from ``space`` values expected to add ``need`` new values to ``have`` distinct ones.

    ``E[new] = (space - have) (1 - (1 - 1/space)^d)``, solved for ``d`` and rounded up. No
    extra margin: a shortfall costs a small further round, a surplus a small removal.
    """
    space = space.astype(np.float64)
    frac = np.minimum(need / np.maximum(space - have, 1.0), 1.0 - 1e-12)
    with np.errstate(divide="ignore"):
        d = np.log1p(-frac) / np.log1p(-1.0 / np.maximum(space, 2.0))
    d = np.where(space <= 1, need, d)
    return np.maximum(np.ceil(d - 1e-9), need).astype(np.int64)


def _distinct_sparse(space: np.ndarray, k: np.ndarray, rng, depth: int = 0):
    """For each cell ``c`` a uniformly random set of ``k[c]`` distinct values in ``[0, space[c])``.

    Inputs already validated: ``0 < k <= space / 2`` (dense cells go through the complement).
    Returns ``(cell, value)`` sorted by cell then value.

    Uniform draws are repeated for the cells still short of ``k`` distinct values; the
    set of distinct values reached this way, given its size, is a uniform subset (the
    stopping rule only looks at the number of distinct values, so it is invariant under
    relabelling the values). The surplus is then removed by choosing, uniformly and by
    the same procedure, which positions to drop.
    """
    if depth > 200:  # pragma: no cover - the surplus shrinks geometrically
        raise RuntimeError("distinct sampling did not converge")
    n = len(space)
    base = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(space, out=base[1:])
    finished = []
    active = np.arange(n, dtype=np.int64)
    pool = np.empty(0, dtype=np.int64)  # sorted distinct keys of the active cells
    have = np.zeros(n, dtype=np.int64)
    while len(active):
        d = _expected_draws(space[active], have[active], k[active] - have[active])
        draws = rng.integers(0, np.repeat(space[active], d))
        draws += np.repeat(base[active], d)
        pool = np.concatenate([pool, draws])
        pool.sort()
        # Keys of a cell lie in [base[c], base[c+1]): after the sort each active cell holds a known
        # stretch of have + d positions, in cell order, so no search is needed to find it.
        bounds = np.zeros(len(active) + 1, dtype=np.int64)
        np.cumsum(have[active] + d, out=bounds[1:])
        keep = np.empty(len(pool), dtype=bool)
        keep[:1] = True
        np.not_equal(pool[1:], pool[:-1], out=keep[1:])
        dup_at = np.flatnonzero(~keep)  # few: repeats are rare by the choice of the number of draws
        dups = np.bincount(np.searchsorted(bounds, dup_at, side="right") - 1, minlength=len(active))
        got = np.diff(bounds) - dups
        pool = pool[keep]
        have[active] = got
        done = got >= k[active]
        if done.any():
            move = np.repeat(done, got)
            finished.append(pool[move])
            pool = pool[~move]
            active = active[~done]
    pool = np.concatenate(finished) if len(finished) > 1 else finished[0]
    pool.sort()
    starts = np.zeros(n, dtype=np.int64)  # each cell now holds exactly have[c] keys, in cell order
    np.cumsum(have[:-1], out=starts[1:])
    surplus = have - k
    over = np.flatnonzero(surplus > 0)
    if len(over):
        dcell, dpos = distinct_per_cell(have[over], surplus[over], rng, depth + 1)
        keep = np.ones(len(pool), dtype=bool)
        keep[starts[over][dcell] + dpos] = False
        pool = pool[keep]
    cell = np.repeat(np.arange(n, dtype=np.int64), k)
    return cell, pool - base[cell]


def distinct_per_cell(space: np.ndarray, k: np.ndarray, rng, depth: int = 0):
    """For each cell a uniformly random set of exactly ``k[c]`` distinct values in ``[0, space[c])``.

    Cells asking for more than half their values are served by drawing the values to
    leave out. Returns ``(cell, value)`` sorted by cell then value.
    """
    space = np.asarray(space, dtype=np.int64)
    k = np.asarray(k, dtype=np.int64)
    dense = 2 * k > space
    sparse_cells = np.flatnonzero(~dense & (k > 0))
    dense_cells = np.flatnonzero(dense)
    parts_cell, parts_val = [], []
    if len(sparse_cells):
        c, v = _distinct_sparse(space[sparse_cells], k[sparse_cells], rng, depth)
        parts_cell.append(sparse_cells[c])
        parts_val.append(v)
    if len(dense_cells):
        sp = space[dense_cells]
        leave = sp - k[dense_cells]
        base = np.zeros(len(sp) + 1, dtype=np.int64)
        np.cumsum(sp, out=base[1:])
        keep = np.ones(int(base[-1]), dtype=bool)
        has = np.flatnonzero(leave > 0)
        if len(has):
            c, v = _distinct_sparse(sp[has], leave[has], rng, depth)
            keep[base[has][c] + v] = False
        flat = np.flatnonzero(keep)
        cell = np.searchsorted(base, flat, side="right") - 1
        parts_cell.append(dense_cells[cell])
        parts_val.append(flat - base[cell])
    if not parts_cell:
        return np.empty(0, dtype=np.int64), np.empty(0, dtype=np.int64)
    cell = np.concatenate(parts_cell)
    val = np.concatenate(parts_val)
    if len(parts_cell) > 1:
        order = np.lexsort((val, cell))
        cell, val = cell[order], val[order]
    return cell, val
