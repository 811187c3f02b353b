"""What every grouping method returns."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa


@dataclass
class Grouping:
    """People mapped to supernodes.

    Attributes
    ----------
    assignment : numpy.ndarray
        ``assignment[i]`` is the supernode (0..n-1) of person ``i``.
    labels : pyarrow.Table
        One row per supernode in id order: ``supernode`` and descriptive columns
        (the possibly generalised attribute values, or a tier), all public.
    method : str
        The grouping method.
    spends : list of Spend
        Budget the grouping spent (empty for a public grouping).
    notes : list of str
        Plain-language notes on what the grouping did (counts only).
    public : bool
        True when the grouping is a function of public data only.
    """

    assignment: np.ndarray
    labels: pa.Table
    method: str
    spends: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    public: bool = True
    noisy_cell_sizes: np.ndarray | None = None  # person unit: noisy sizes the grouping decided on
    #: person unit (issue 13): the fine attribute cells (tuples of values, in the grouping attributes'
    #: order) and their noisy counts, from which people per value are summed (post-processing)
    noisy_fine_cells: tuple | None = None

    @property
    def n_supernodes(self) -> int:
        return self.labels.num_rows

    def sizes(self) -> np.ndarray:
        """True number of people in each supernode (int64)."""
        return np.bincount(self.assignment, minlength=self.n_supernodes).astype(np.int64)
