"""Supernode sizes: public under unit ``edge``, noisy fine-cell counts under unit ``person``."""

from __future__ import annotations

__all__ = ["release_cell_counts", "released_sizes", "checked_sizes"]

import numpy as np

from ..budget import Spend
from ..errors import PrivacyError
from ..noise.mechanisms import GeometricMechanism


def release_cell_counts(true_counts, epsilon: float, source, sens: float = 1.0):
    """Noisy counts of the fine attribute cells (unit ``person``: supernode sizes are private).

    One person is in exactly one fine cell, so adding or removing a person changes
    the vector of cell counts by 1 in L1. The supernode sizes released are sums of
    these noisy counts (post-processing).

    Returns
    -------
    noisy : numpy.ndarray of int64
    spend : Spend
        Named ``supernode_sizes``.
    mechanism : GeometricMechanism

    References
    ----------
    A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally utility-maximizing
    privacy mechanisms", STOC 2009.
    """
    mech = GeometricMechanism(epsilon=epsilon, sensitivity=sens)
    noisy = mech.randomise(np.asarray(true_counts, dtype=np.int64), source)
    spend = Spend.of("supernode_sizes", mech)
    return noisy, spend, mech


def released_sizes(grouping) -> np.ndarray:
    """The supernode sizes a release publishes (int64).

    The true sizes for a public grouping; under a private size release the sums
    of the noisy fine-cell counts the grouping decided on, floored at 0
    (post-processing).
    """
    if grouping.noisy_cell_sizes is None:
        return grouping.sizes()
    return np.maximum(np.rint(np.asarray(grouping.noisy_cell_sizes, dtype=np.float64)), 0).astype(np.int64)


def checked_sizes(grouping, min_size: int, progress) -> tuple[np.ndarray, bool]:
    """The sizes every later step of a release uses (caps, histogram totals), and whether they are exact.

    Public sizes, or released ones (:func:`released_sizes`, post-processing).
    Exact sizes below ``min_size`` would be a bug in the grouping: refused. The
    progress line names the smallest and largest size published.
    """
    sizes_exact = grouping.noisy_cell_sizes is None
    sizes = released_sizes(grouping)
    if sizes_exact and (sizes < min_size).any():
        raise PrivacyError("internal check failed: a supernode is below min_size")  # pragma: no cover
    progress(f"{grouping.n_supernodes:,} supernodes of {int(sizes.min()):,} to {int(sizes.max()):,} people"
             + ("" if sizes_exact else " (noisy sizes)"))
    return sizes, sizes_exact
