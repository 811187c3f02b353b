"""Non-negative, consistent, unbiased-in-sum estimates of the superedge counts (post-processing).

Inputs (all released or public): the noisy counts before clamping ``y_c = x_c + Z_c``
on every cell ``c = (A, B)``, ``A <= B`` (``edge_count_unclamped``, noise variance
``v_s``), the possible pairs of each cell, and optionally a second unbiased
measurement of each supernode's *degree total* ``(M x)_A = 2 x_AA + sum_{B != A} x_AB``:
the sum ``z_A`` of its noisy sorted degree sequence (variance ``m_A v_d``).

Step 1, best linear unbiased estimate (generalised least squares):

    x_blue = y + v_s M^T (v_s M M^T + V_z)^{-1} (z - M y),

the minimiser of ``|y - x|^2 / v_s + (z - M x)^T V_z^{-1} (z - M x)``: the
constrained inference of Hay, Rastogi, Miklau and Suciu (PVLDB 2010) for a two-level
hierarchy (cells, and their per-supernode sums measured a second time). For the full
table of cells ``M M^T = (n + 2) I + J`` (every supernode meets every other in one
cell and itself in its diagonal cell, counted twice), so the ``n x n`` system is a
diagonal plus a rank-one matrix, solved exactly in ``O(n)`` (Sherman-Morrison).
``x_blue``, its per-supernode sums ``r = M x_blue`` and its whole-table sum are
unbiased. Without ``z`` it is ``y`` itself.

Step 2, non-negativity with the sums kept: the least-squares projection of ``x_blue``
onto ``{x : 0 <= x <= possible pairs, M x = r}``. Its dual is a concave piecewise
quadratic function of one multiplier per supernode, ``x(lambda) = clip(x_blue -
M^T lambda, 0, cap)``, maximised here by a semismooth Newton method with a
backtracking line search (Qi and Sun, "A nonsmooth version of Newton's method",
Mathematical Programming 58, 1993; citation recalled from memory), each Newton
system solved by conjugate gradients over the cells (no dense matrix). The
per-supernode sums (and so the whole-table sum ``sum_A r_A / 2``) stay the unbiased
ones; only the split between the cells of a supernode moves. When a supernode's
total lies outside what its cells can hold it is first moved to the nearest possible
value; when the totals cannot all hold at once the result is the best the iterations
reach (:attr:`ProjectionResult.max_violation` says by how much).

Without noise (``y = x``, ``z = M x``) both steps return ``x`` exactly.

Everything here reads released values and public sizes only: post-processing, no
budget (Dwork and Roth 2014, Proposition 2.1).

References
----------
M. Hay, V. Rastogi, G. Miklau, D. Suciu, "Boosting the accuracy of differentially
private histograms through consistency", PVLDB 3(1), 2010.

J. Lee, Y. Wang, D. Kifer, "Maximum likelihood postprocessing for differential
privacy under consistency constraints", KDD 2015.

C. Dwork, A. Roth, "The Algorithmic Foundations of Differential Privacy",
Foundations and Trends in Theoretical Computer Science 9(3-4), 2014.
"""

from __future__ import annotations

__all__ = ["ProjectionResult", "degree_totals", "blue_cells", "project_cells", "consistent_counts"]

from dataclasses import dataclass

import numpy as np

from ..cells import CellRows


def degree_totals(x, a, b, n: int) -> np.ndarray:
    """``M x``: each supernode's degree total (``2 x_AA + sum_{B != A} x_AB``) from cell values ``x``."""
    x = np.asarray(x, dtype=np.float64)
    return np.bincount(a, weights=x, minlength=n) + np.bincount(b, weights=x, minlength=n)


def blue_cells(y, v_s: float, a, b, n: int, z=None, v_z=None) -> np.ndarray:
    """Best linear unbiased estimate of every cell from ``y`` and per-supernode totals ``z`` (full table).

    Inputs already validated: ``(a, b)`` are all ``n (n + 1) / 2`` cells; ``v_s > 0``;
    ``v_z`` positive, one per supernode. Without ``z`` returns ``y`` (as float).
    """
    y = np.asarray(y, dtype=np.float64)
    if z is None or not v_s > 0.0:  # no second measurement, or cells without noise (their variance underflows)
        return y.copy()
    z = np.asarray(z, dtype=np.float64)
    d = v_s * (n + 2) + np.asarray(v_z, dtype=np.float64)  # S = diag(d) + v_s 1 1^T
    rows = CellRows(a, b, n)
    resid = z - rows.totals(y)
    dinv_r = resid / d
    dinv_1 = 1.0 / d
    u = dinv_r - dinv_1 * (v_s * dinv_r.sum() / (1.0 + v_s * dinv_1.sum()))  # S^{-1} resid
    return y + v_s * rows.spread(u)


@dataclass(frozen=True)
class ProjectionResult:
    """Cells of :func:`project_cells`, their totals ``M x`` and how far they are from the targets."""

    x: np.ndarray
    totals: np.ndarray
    max_violation: float
    newton_steps: int


def _cg(matvec, rhs, precond, tol: float, max_iter: int) -> np.ndarray:
    """Preconditioned conjugate gradients for a symmetric positive (semi)definite system."""
    x = np.zeros_like(rhs)
    r = rhs.copy()
    zv = precond * r
    p = zv.copy()
    rz = float(r @ zv)
    stop = tol * float(np.sqrt(rhs @ rhs))
    for _ in range(max_iter):
        if float(np.sqrt(r @ r)) <= stop:
            break
        hp = matvec(p)
        php = float(p @ hp)
        if php <= 0:
            break
        alpha = rz / php
        x += alpha * p
        r -= alpha * hp
        zv = precond * r
        rz_new = float(r @ zv)
        p = zv + (rz_new / rz) * p
        rz = rz_new
    return x


def project_cells(x0, a, b, n: int, r, cap, *, full_table: bool = True, tol: float = 1e-9,
                  max_newton: int = 100) -> ProjectionResult:
    """Least-squares projection of ``x0`` on ``{0 <= x <= cap, M x = r}`` (see the module docstring).

    Inputs already validated: cells ``(a, b)``, ``a <= b``, over ``n`` supernodes;
    ``full_table`` when they are all ``n (n + 1) / 2`` cells (a faster Newton system).
    ``r`` is first moved into ``[0, M cap]``.
    """
    x0 = np.asarray(x0, dtype=np.float64)
    cap = np.asarray(cap, dtype=np.float64)
    rows = CellRows(a, b, n)
    r = np.clip(np.asarray(r, dtype=np.float64), 0.0, rows.totals(cap))
    scale = max(1.0, float(np.abs(r).max()) if n else 1.0)
    goal = tol * scale
    diag_cell = a == b
    lam = np.zeros(n)

    def primal(lam):
        z = x0 - rows.spread(lam)
        return z, np.clip(z, 0.0, cap)

    def dual(lam, x, f):
        diff = x - x0
        return 0.5 * float(diff @ diff) + float(lam @ f)

    z, x = primal(lam)
    f = rows.totals(x) - r
    g = dual(lam, x, f)
    steps = 0
    for steps in range(1, max_newton + 1):
        if not len(f) or float(np.abs(f).max()) <= goal:
            steps -= 1
            break
        active = (z > 0.0) & (z < cap)
        w_act = np.where(diag_cell, 2.0, 1.0) * active
        h_diag = rows.totals(w_act)
        # a supernode with no free cell gets the curvature of a full row (a quasi-Newton step; the line
        # search keeps every step an ascent of the dual)
        reg = np.where(h_diag > 0, 1e-9 * max(float(h_diag.max()), 1.0), n + 3.0)
        inactive = ~active
        use_inactive = full_table and inactive.sum() < active.sum()
        if use_inactive:
            ia, ib = a[inactive], b[inactive]

            def matvec(v):  # (M M^T - M D_inactive M^T) v with M M^T = (n + 2) I + J
                t = v[ia] + v[ib]
                return (n + 2.0) * v + v.sum() - (np.bincount(ia, weights=t, minlength=n)
                                                   + np.bincount(ib, weights=t, minlength=n)) + reg * v
        else:
            aa, bb = a[active], b[active]

            def matvec(v):
                t = v[aa] + v[bb]
                return np.bincount(aa, weights=t, minlength=n) + np.bincount(bb, weights=t, minlength=n) + reg * v
        d = _cg(matvec, f, 1.0 / (h_diag + reg), 1e-10, 500)
        slope = float(f @ d)
        if slope <= 0:
            d, slope = f / (h_diag + reg), float(f @ (f / (h_diag + reg)))
        t = 1.0
        # the dual is a sum over every cell: differences below this are its rounding, not its change
        rounding = 1e-12 * max(1.0, abs(g))
        worst = float(np.abs(f).max())
        while True:
            lam_new = lam + t * d
            z_new, x_new = primal(lam_new)
            f_new = rows.totals(x_new) - r
            g_new = dual(lam_new, x_new, f_new)
            # Armijo (enough ascent); or, when the ascent asked for is below the dual's rounding, a smaller
            # largest violation decides
            taken = g_new >= g + 1e-4 * t * slope or (1e-4 * t * slope <= rounding
                                                      and float(np.abs(f_new).max()) < worst)
            if taken or t < 1e-12:
                break
            t *= 0.5
        if not taken:
            break  # no step the dual or the violation can tell apart: the constraints hold as well as they can
        lam, z, x, f, g = lam_new, z_new, x_new, f_new, g_new
    totals = rows.totals(x)
    viol = float(np.abs(totals - r).max()) if n else 0.0
    return ProjectionResult(x=x, totals=totals, max_violation=viol, newton_steps=int(steps))


def consistent_counts(y, sizes, v_s: float, a, b, *, z=None, v_z=None, cap=None) -> ProjectionResult:
    """Non-negative cells whose per-supernode and whole-table sums are the unbiased (GLS) ones.

    Parameters
    ----------
    y : array of float
        Noisy counts before clamping (``edge_count_unclamped``) on every cell ``(a, b)`` of the
        full table, in :func:`aggpub.cells.all_cells` order.
    sizes : array of int
        Public or released supernode sizes.
    v_s : float
        Noise variance of each cell.
    z, v_z : arrays, optional
        Second unbiased measurement of the per-supernode degree totals and its variances.
    cap : array, optional
        Possible pairs of each cell (default: from ``sizes``).

    Returns
    -------
    ProjectionResult
        ``x`` in ``[0, cap]``; ``totals`` equal to ``M x_blue`` up to ``max_violation``.
    """
    from ..cells import possible_pairs

    sizes = np.asarray(sizes, dtype=np.int64)
    n = len(sizes)
    a = np.asarray(a, dtype=np.int64)
    b = np.asarray(b, dtype=np.int64)
    cap = possible_pairs(sizes, a, b) if cap is None else np.asarray(cap)
    xb = blue_cells(y, v_s, a, b, n, z, v_z)
    r = CellRows(a, b, n).totals(xb)
    return project_cells(xb, a, b, n, r, cap, full_table=len(a) == n * (n + 1) // 2)
