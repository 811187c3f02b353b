"""What both engines compute the same way in numpy (one value per person, never per edge)."""

from __future__ import annotations

__all__ = ["degree_histograms_from_degrees"]

import numpy as np


def degree_histograms_from_degrees(degrees: np.ndarray, assignment: np.ndarray, n_groups: int,
                                   cap: int) -> np.ndarray:
    """People by (supernode, degree bin) from each person's degree (see :meth:`Engine.degree_histograms`).

    Inputs already validated: ``degrees`` and ``assignment`` have one value per person.
    """
    bins = np.minimum(degrees, cap)
    flat = np.asarray(assignment, dtype=np.int64) * (cap + 1) + bins
    return np.bincount(flat, minlength=n_groups * (cap + 1)).reshape(n_groups, cap + 1)
