"""Distances between degree distributions and summaries of query errors.

Everything here is a pure function of numpy arrays: no release, no file.

Distributions on the non-negative integers are given as histograms (counts or
probabilities, index = degree). Two histograms of different lengths are padded
with zeros. On an integer support with unit spacing:

* KS distance ``max_k |F(k) - G(k)|`` (the two-sample Kolmogorov-Smirnov
  statistic when ``F`` and ``G`` are empirical CDFs),
* Wasserstein-1 ``sum_k |F(k) - G(k)|`` (the area between the CDFs),
* L1 ``sum_k |p_k - q_k|`` between the normalised histograms (twice the total
  variation distance).

Query errors use the relative error with a sanity bound of Xiao, Wang and
Gehrke: ``|x_hat - x| / max(x, s)``.

References
----------
X. Xiao, G. Wang, J. Gehrke, "Differential privacy via wavelet transforms",
Proceedings of the 26th IEEE International Conference on Data Engineering
(ICDE), 2010.

L. V. Kantorovich's transport distance on the line as the area between two
CDFs: C. Villani, *Optimal Transport: Old and New*, Springer, 2009 (common
practice for distributions on the real line).
"""

from __future__ import annotations

__all__ = [
    "normalise_histogram",
    "ks_distance",
    "wasserstein1_distance",
    "l1_distance",
    "distribution_distances",
    "histogram_from_values",
    "relative_errors",
    "percentiles",
    "error_summary",
    "DEFAULT_SANITY_FRACTION",
]

import numpy as np

#: Sanity bound as a fraction of the number of contacts in the network. Xiao, Wang
#: and Gehrke (ICDE 2010) set s to 0.1% of the number of tuples (recalled from memory).
DEFAULT_SANITY_FRACTION = 0.001


def _pad(p, q):
    p = np.asarray(p, dtype=np.float64).ravel()
    q = np.asarray(q, dtype=np.float64).ravel()
    n = max(len(p), len(q))
    return np.pad(p, (0, n - len(p))), np.pad(q, (0, n - len(q)))


def normalise_histogram(h) -> np.ndarray:
    """Histogram divided by its total (negative entries are clamped to 0 first).

    Raises
    ------
    ValueError
        When the histogram has no positive mass.
    """
    h = np.clip(np.asarray(h, dtype=np.float64).ravel(), 0.0, None)
    total = h.sum()
    if not total > 0:
        raise ValueError("'histogram' has no positive mass; cannot normalise it")
    return h / total


def histogram_from_values(values, minlength: int = 0) -> np.ndarray:
    """Counts of each non-negative integer value (``numpy.bincount``)."""
    return np.bincount(np.asarray(values, dtype=np.int64), minlength=minlength).astype(np.float64)


def ks_distance(p, q) -> float:
    """Kolmogorov-Smirnov distance between two distributions on 0, 1, 2, ...

    Parameters
    ----------
    p, q : array_like
        Histograms (counts or probabilities); each is normalised.

    Returns
    -------
    float
        ``max_k |F_p(k) - F_q(k)|``, in [0, 1].
    """
    p, q = _pad(normalise_histogram(p), normalise_histogram(q))
    return float(np.max(np.abs(np.cumsum(p) - np.cumsum(q))))


def wasserstein1_distance(p, q) -> float:
    """Wasserstein-1 (earth mover's) distance between two distributions on 0, 1, 2, ...

    Returns
    -------
    float
        ``sum_k |F_p(k) - F_q(k)|``, in degree units.
    """
    p, q = _pad(normalise_histogram(p), normalise_histogram(q))
    return float(np.sum(np.abs(np.cumsum(p) - np.cumsum(q))))


def l1_distance(p, q) -> float:
    """L1 distance between the normalised histograms, in [0, 2]."""
    p, q = _pad(normalise_histogram(p), normalise_histogram(q))
    return float(np.sum(np.abs(p - q)))


def distribution_distances(p, q) -> dict:
    """``{"ks", "wasserstein1", "l1"}`` between two histograms."""
    return {"ks": ks_distance(p, q), "wasserstein1": wasserstein1_distance(p, q), "l1": l1_distance(p, q)}


def relative_errors(true, estimate, sanity_bound: float) -> np.ndarray:
    """``|estimate - true| / max(true, s)`` elementwise (Xiao, Wang, Gehrke, ICDE 2010).

    Parameters
    ----------
    true, estimate : array_like
        True and released query answers (any shape, broadcast together).
    sanity_bound : float
        ``s > 0``; keeps queries with tiny true answers from dominating.
    """
    if not sanity_bound > 0:
        raise ValueError(f"'sanity_bound' must be > 0, got {sanity_bound!r}")
    true = np.asarray(true, dtype=np.float64)
    estimate = np.asarray(estimate, dtype=np.float64)
    return np.abs(estimate - true) / np.maximum(true, sanity_bound)


def percentiles(values, q, *, overwrite: bool = False) -> np.ndarray:
    """``numpy.percentile(values, q)`` (linear interpolation), the same numbers, faster on millions of values.

    A percentile is a function of the order statistics alone, so it is the same whether numpy selects
    them from the values or from the values sorted; numpy's sort of floating-point values is several times
    faster than its selection of a few order statistics, and the selection on sorted values is cheap.

    Parameters
    ----------
    values : array_like
        Any shape (flattened).
    q : float or sequence of float
        Percentiles in ``[0, 100]``.
    overwrite : bool
        Sort ``values`` itself when it is a float64 array (the caller's array is reordered).
    """
    x = np.asarray(values, dtype=np.float64)
    x = x.ravel() if overwrite else x.flatten()
    x.sort()
    return sorted_percentiles(x, q)


def sorted_percentiles(x: np.ndarray, q) -> np.ndarray:
    """:func:`percentiles` of a 1-D float64 array already in ascending order (left as it is)."""
    out = np.asarray(np.percentile(x.view(_Ascending), q, overwrite_input=True))
    return out[()] if out.ndim == 0 else out


class _Ascending(np.ndarray):
    """A view of values already sorted in ascending order, given to :func:`numpy.percentile`.

    numpy selects the order statistics it needs with ``partition``, a pass over every value that leaves a
    sorted array as it is: here it is skipped. numpy does the rest (indexes, interpolation, NaN), so the
    numbers stay numpy's own; were numpy to select some other way, the values would be the same and only
    the time lost.
    """

    def partition(self, kth, axis=-1, kind="introselect", order=None):  # noqa: ARG002 - numpy's signature
        return None


def error_summary(true, estimate, sanity_bound: float) -> dict:
    """Absolute and relative error figures of one query workload.

    Returns
    -------
    dict
        ``n_queries``, ``mean_absolute_error``, ``mean_signed_error`` (bias), ``rmse``, ``median_absolute_error``,
        ``p90_absolute_error``, ``max_absolute_error``, ``mean_relative_error``,
        ``median_relative_error`` (p50), ``p90_relative_error``,
        ``p99_relative_error``, ``sanity_bound``.
    """
    true = np.asarray(true, dtype=np.float64).ravel()
    estimate = np.asarray(estimate, dtype=np.float64).ravel()
    if len(true) == 0:
        raise ValueError("an empty query workload has no error summary")
    if not sanity_bound > 0:
        raise ValueError(f"'sanity_bound' must be > 0, got {sanity_bound!r}")
    # every figure is numpy's own on the arrays of the definitions; the arrays are made once and reused in
    # place (each pass over millions of values, and each fresh array, costs as much as a sum)
    abs_err = estimate - true
    mean_signed = float(np.mean(abs_err))
    np.abs(abs_err, out=abs_err)
    rel = np.maximum(true, sanity_bound)
    np.divide(abs_err, rel, out=rel)  # relative_errors, without computing abs_err again
    # the sums first: the quantiles below reorder both arrays in place (they are ours; no copy of each)
    mean_abs, max_abs, mean_rel = float(abs_err.mean()), float(abs_err.max()), float(rel.mean())
    all_below = float(true.max()) <= sanity_bound
    # the squares in the relative errors' place when those are made again below from the sorted errors
    rmse = float(np.sqrt(np.mean(np.square(abs_err, out=rel if all_below else None))))
    if all_below:
        # every divisor is the sanity bound itself (true values at most s, as for most cells of a large
        # table): the relative errors in ascending order are the sorted absolute errors divided by s, the
        # very same numbers as sorting them, for one sort instead of two
        abs_err.sort()
        a50, a90 = sorted_percentiles(abs_err, [50, 90])
        p50, p90, p99 = sorted_percentiles(np.divide(abs_err, sanity_bound, out=rel), [50, 90, 99])
    else:
        p50, p90, p99 = percentiles(rel, [50, 90, 99], overwrite=True)
        a50, a90 = percentiles(abs_err, [50, 90], overwrite=True)
    return {
        "n_queries": int(len(true)),
        "mean_absolute_error": mean_abs,
        "mean_signed_error": mean_signed,
        "rmse": rmse,
        "median_absolute_error": float(a50),
        "p90_absolute_error": float(a90),
        "max_absolute_error": max_abs,
        "mean_relative_error": mean_rel,
        "median_relative_error": float(p50),
        "p90_relative_error": float(p90),
        "p99_relative_error": float(p99),
        "sanity_bound": float(sanity_bound),
    }
