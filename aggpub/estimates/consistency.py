"""Consistency of noisy releases by post-processing only.

Everything here is a function of already-released (noisy) values and of public
parameters: it reads no true statistic, so by the post-processing property of
differential privacy it costs no budget (Dwork and Roth 2014, Proposition 2.1).

What is enforced:

* **non-negativity and upper bounds** (:func:`clamp`): a count lies in
  ``[0, cap]``;
* **totals** (:func:`project_to_simplex`, :func:`round_preserving_sum`): the
  bins of one supernode's degree histogram are non-negative integers that add
  up to the supernode's (public or released) size;
* **order** (:func:`isotonic_regression`, :func:`cumulative_isotonic_histograms`):
  where a sequence is known to be sorted -- the cumulative degree counts of a
  supernode never decrease -- the noisy sequence is replaced by its
  least-squares isotonic fit (pool adjacent violators), as proposed for private
  histograms and degree sequences by Hay, Rastogi, Miklau and Suciu.

References
----------
M. Hay, V. Rastogi, G. Miklau, D. Suciu, "Boosting the accuracy of
differentially private histograms through consistency", PVLDB 3(1), 2010.

M. Ayer, H. D. Brunk, G. M. Ewing, W. T. Reid, E. Silverman, "An empirical
distribution function for sampling with incomplete information", Annals of
Mathematical Statistics 26(4), 1955 (pool adjacent violators).

M. Held, P. Wolfe, H. P. Crowder, "Validation of subgradient optimization",
Mathematical Programming 6, 1974; J. Duchi, S. Shalev-Shwartz, Y. Singer,
T. Chandra, "Efficient projections onto the l1-ball for learning in high
dimensions", ICML 2008 (Euclidean projection onto the simplex).

C. Dwork, A. Roth, "The Algorithmic Foundations of Differential Privacy",
Foundations and Trends in Theoretical Computer Science 9(3-4), 2014.
"""

from __future__ import annotations

__all__ = [
    "clamp",
    "isotonic_regression",
    "project_to_simplex",
    "round_preserving_sum",
    "simplex_histograms",
    "cumulative_isotonic_histograms",
    "consistent_histograms",
    "HISTOGRAM_METHODS",
]

import numpy as np

HISTOGRAM_METHODS = ("simplex", "cumulative_isotonic")


def clamp(values, lower, upper) -> np.ndarray:
    """Integer values clamped to ``[lower, upper]`` (element-wise, int64)."""
    lower = np.asarray(lower, dtype=np.int64)
    upper = np.maximum(np.asarray(upper, dtype=np.int64), lower)
    return np.clip(np.asarray(values, dtype=np.int64), lower, upper)


def isotonic_regression(y, weights=None, increasing: bool = True) -> np.ndarray:
    r"""Least-squares isotonic fit of a 1-D sequence (pool adjacent violators).

    Solves :math:`\min_x \sum_i w_i (x_i - y_i)^2` subject to
    :math:`x_1 \le x_2 \le \dots` (or ``>=`` when ``increasing`` is false).

    Parameters
    ----------
    y : array_like, shape (n,)
        The noisy sequence.
    weights : array_like, shape (n,), optional
        Positive weights (default 1).
    increasing : bool, default True

    Returns
    -------
    numpy.ndarray of float64, shape (n,)

    References
    ----------
    M. Ayer, H. D. Brunk, G. M. Ewing, W. T. Reid, E. Silverman, Annals of
    Mathematical Statistics 26(4), 1955.
    """
    y = np.asarray(y, dtype=np.float64)
    if y.ndim != 1:
        raise ValueError(f"'y' must be one-dimensional, got shape {y.shape}")
    w = np.ones_like(y) if weights is None else np.asarray(weights, dtype=np.float64)
    if w.shape != y.shape or not np.all(w > 0):
        raise ValueError("'weights' must be positive and have the shape of 'y'")
    if not increasing:
        return -isotonic_regression(-y, w, True)
    means: list[float] = []
    wsum: list[float] = []
    lens: list[int] = []
    for v, wi in zip(y.tolist(), w.tolist()):
        m, ww, n = v, wi, 1
        while means and means[-1] > m:  # the new block violates the order: pool it
            pm, pw, pn = means.pop(), wsum.pop(), lens.pop()
            m = (pm * pw + m * ww) / (pw + ww)
            ww += pw
            n += pn
        means.append(m)
        wsum.append(ww)
        lens.append(n)
    return np.repeat(np.asarray(means), lens)


def project_to_simplex(y, total) -> np.ndarray:
    r"""Euclidean projection of each row of ``y`` onto :math:`\{x \ge 0, \sum_j x_j = t\}`.

    Parameters
    ----------
    y : array_like, shape (g, b)
        Noisy rows (one histogram per row).
    total : array_like, shape (g,)
        Target total ``t >= 0`` of each row.

    Returns
    -------
    numpy.ndarray of float64, shape (g, b)
        ``max(y - theta, 0)`` with the row's threshold ``theta`` chosen so the row
        sums to its total (Held, Wolfe and Crowder 1974; Duchi et al. 2008).
    """
    y = np.atleast_2d(np.asarray(y, dtype=np.float64))
    g, b = y.shape
    total = np.broadcast_to(np.asarray(total, dtype=np.float64), (g,))
    if np.any(total < 0):
        raise ValueError("'total' must be >= 0")
    if b == 0:
        return y.copy()
    u = -np.sort(-y, axis=1)
    css = np.cumsum(u, axis=1) - total[:, None]
    j = np.arange(1, b + 1, dtype=np.float64)
    cond = u - css / j > 0
    last = b - 1 - np.argmax(cond[:, ::-1], axis=1)
    rho = np.where(cond.any(axis=1), last, 0)  # total 0: theta = max(y), the zero row
    theta = css[np.arange(g), rho] / (rho + 1)
    return np.maximum(y - theta[:, None], 0.0)


def round_preserving_sum(x, total) -> np.ndarray:
    """Round non-negative rows to integers that add up to ``total`` (largest remainders).

    Each value is floored, then the missing units go to the largest fractional
    parts (ties to the lower index). For a row already summing to its total this
    is a closest integer point of the same total in the L2 sense.

    Parameters
    ----------
    x : array_like, shape (g, b)
        Non-negative rows summing (up to rounding) to ``total``.
    total : array_like of int, shape (g,)

    Returns
    -------
    numpy.ndarray of int64, shape (g, b)
    """
    x = np.atleast_2d(np.asarray(x, dtype=np.float64))
    g, b = x.shape
    total = np.broadcast_to(np.asarray(total, dtype=np.int64), (g,))
    base = np.floor(np.maximum(x, 0.0))
    frac = np.maximum(x, 0.0) - base
    base = base.astype(np.int64)
    missing = np.clip(total - base.sum(axis=1), 0, b)
    order = np.argsort(-frac, axis=1, kind="stable")
    rank = np.empty_like(order)
    np.put_along_axis(rank, order, np.arange(b)[None, :].repeat(g, axis=0), axis=1)
    out = base + (rank < missing[:, None]).astype(np.int64)
    excess = out.sum(axis=1) - total  # only from floating-point error: take units off the largest bins
    for i in np.flatnonzero(excess > 0):  # pragma: no cover - needs a rounding accident
        for _ in range(int(excess[i])):
            out[i, int(np.argmax(out[i]))] -= 1
    return out


def simplex_histograms(noisy, totals) -> np.ndarray:
    """Noisy histograms made non-negative integers with the given row totals.

    Euclidean projection onto the scaled simplex (:func:`project_to_simplex`),
    then :func:`round_preserving_sum`.
    """
    totals = np.maximum(np.asarray(totals, dtype=np.int64), 0)
    return round_preserving_sum(project_to_simplex(noisy, totals), totals)


def cumulative_isotonic_histograms(noisy, totals) -> np.ndarray:
    """Histograms from the isotonic fit of their noisy cumulative counts.

    For each row, the cumulative counts ``C_k = h_0 + ... + h_k`` of a true
    histogram never decrease and end at the total. The noisy cumulative sequence
    is fitted by isotonic regression, clipped to ``[0, total]`` (for least squares
    with constant bounds the clipped isotonic fit is the bounded fit), pinned to
    the total in the last bin, rounded (a monotone map, so order is kept) and
    differenced back into bins (Hay, Rastogi, Miklau, Suciu 2010).

    Returns
    -------
    numpy.ndarray of int64
        Non-negative, each row summing to its total.
    """
    noisy = np.atleast_2d(np.asarray(noisy, dtype=np.float64))
    g, b = noisy.shape
    totals = np.maximum(np.asarray(totals, dtype=np.int64), 0)
    totals = np.broadcast_to(totals, (g,))
    cum = np.cumsum(noisy, axis=1)
    fitted = np.empty((g, b), dtype=np.float64)
    for i in range(g):  # one supernode at a time; b bins each (not a loop over edges)
        row = isotonic_regression(cum[i, :-1]) if b > 1 else np.empty(0)
        fitted[i, :-1] = np.clip(row, 0.0, float(totals[i]))
        fitted[i, -1] = totals[i]
    rounded = np.floor(fitted + 0.5).astype(np.int64)
    rounded[:, -1] = totals
    return np.diff(rounded, axis=1, prepend=0)


def consistent_histograms(noisy, totals, method: str = "simplex") -> np.ndarray:
    """Dispatch to :func:`simplex_histograms` or :func:`cumulative_isotonic_histograms`."""
    if method == "simplex":
        return simplex_histograms(noisy, totals)
    if method == "cumulative_isotonic":
        return cumulative_isotonic_histograms(noisy, totals)
    raise ValueError(f"'method' must be one of {HISTOGRAM_METHODS}, got {method!r}")
