"""Per-supernode degree histograms: every bin noised, then made consistent with the sizes."""

from __future__ import annotations

__all__ = ["release_degree_histograms"]

import numpy as np
import pyarrow as pa

from ..budget import Spend
from ..noise.mechanisms import GeometricMechanism


def release_degree_histograms(truth, sizes, epsilon: float, sens: float, source, *,
                              consistency: str = "simplex", confidence: float = 0.95,
                              max_possible_degree: int | None = None):
    """Noisy per-supernode degree histograms, every bin released, made consistent.

    Discrete Laplace noise with scale ``sens / epsilon`` on every bin of every
    supernode (zeros included); then, by post-processing only, each supernode's
    bins are made non-negative integers adding up to its released size
    (:func:`aggpub.estimates.consistency.consistent_histograms`).

    Parameters
    ----------
    truth : numpy.ndarray of int, shape (n_supernodes, cap + 1)
        True counts of people by supernode and degree bin (bin ``cap``: ``cap`` or more).
    sizes : array_like of int
        Public or already-released supernode sizes (the totals to match).
    epsilon, sens : float
        Epsilon share and L1 sensitivity (:data:`SENSITIVITY`).
    source : RandomSource
    max_possible_degree : int, optional
        A public bound on every degree (unit ``person``: the promised cap D). Bins
        above it are known to be empty and are set to 0 before the others are made
        consistent (post-processing with public knowledge).

    Returns
    -------
    table : pyarrow.Table
        ``supernode``, ``degree_bin``, ``people`` (consistent), ``people_noisy`` (before
        post-processing, unbiased), ``noise_scale``, ``ci95_half_width`` (of ``people_noisy``).
    spend : Spend
    mechanism : GeometricMechanism

    References
    ----------
    M. Hay, V. Rastogi, G. Miklau, D. Suciu, "Boosting the accuracy of
    differentially private histograms through consistency", PVLDB 3(1), 2010.
    """
    from ..estimates.consistency import consistent_histograms

    truth = np.asarray(truth, dtype=np.int64)
    g, b = truth.shape
    mech = GeometricMechanism(epsilon=epsilon, sensitivity=sens)
    noisy = mech.randomise(truth, source)
    possible = b if max_possible_degree is None else min(b, int(max_possible_degree) + 1)
    people = np.zeros((g, b), dtype=np.int64)
    people[:, :possible] = consistent_histograms(noisy[:, :possible], np.asarray(sizes, dtype=np.int64),
                                                 method=consistency)
    n = g * b
    table = pa.table({
        "supernode": pa.array(np.repeat(np.arange(g, dtype=np.int64), b)),
        "degree_bin": pa.array(np.tile(np.arange(b, dtype=np.int64), g)),
        "people": pa.array(people.reshape(-1).astype(np.int64)),
        "people_noisy": pa.array(noisy.reshape(-1).astype(np.int64)),
        "noise_scale": pa.array(np.full(n, mech.scale)),
        "ci95_half_width": pa.array(np.full(n, mech.interval_half_width(confidence), dtype=np.int64)),
    })
    spend = Spend.of("degree_histograms", mech)
    return table, spend, mech
