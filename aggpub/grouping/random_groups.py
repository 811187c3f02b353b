"""Random supernodes: the audit baseline.

People are put in a uniformly random order and dealt round-robin into
``n_people // min_size`` supernodes, so supernode sizes differ by at most one
and are all at least ``min_size``. The permutation reads no private data (only the number of people,
public under unit ``edge``), so the grouping costs no budget. It keeps no
structure at all and is the floor any structure-aware grouping should beat, as
the random partition is used as a baseline for LouvainDP.

References
----------
H. H. Nguyen, A. Imine, M. Rusinowitch, "Detecting communities under
differential privacy", ACM Workshop on Privacy in the Electronic Society
(WPES), 2016.
"""

from __future__ import annotations

__all__ = ["group_at_random"]

import numpy as np
import pyarrow as pa

from ..errors import PrivacyError
from ._common import Grouping


def group_at_random(n_people: int, min_size: int, source) -> Grouping:
    """A uniformly random partition into supernodes of at least ``min_size`` people.

    Parameters
    ----------
    n_people : int
        Number of people (public under unit ``edge``).
    min_size : int
        Minimum members per supernode; ``n_people // min_size`` supernodes are made.
    source : RandomSource
        Randomness for the permutation (independent of the data).

    Returns
    -------
    Grouping
        ``public = True``, no spends; labels hold only ``supernode``.

    References
    ----------
    H. H. Nguyen, A. Imine, M. Rusinowitch, "Detecting communities under
    differential privacy", WPES 2016.
    """
    n_people, min_size = int(n_people), int(min_size)
    if min_size < 1 or n_people < min_size:
        raise PrivacyError(f"'grouping.min_size' = {min_size} is larger than the population "
                           f"({n_people} people): no supernode can have that many members")
    n_groups = n_people // min_size
    order = np.argsort(source.uniform(n_people), kind="stable")  # a uniformly random permutation
    assignment = np.empty(n_people, dtype=np.int32)
    assignment[order] = (np.arange(n_people) % n_groups).astype(np.int32)
    labels = pa.table({"supernode": pa.array(np.arange(n_groups, dtype=np.int64))})
    notes = [f"people dealt at random into {n_groups} supernode(s) (audit baseline; reads no private data)"]
    return Grouping(assignment=assignment, labels=labels, method="random", notes=notes, public=True)
