"""Grouping people into supernodes of at least ``min_size`` members (the grouping stage)."""

from __future__ import annotations

__all__ = ["Grouping", "make_grouping", "group_by_attributes", "RESIDUAL", "group_by_structure", "group_by_map",
           "read_group_map", "group_at_random", "group_by_noisy_cells", "public_domain"]

from ._common import Grouping
from ._dispatch import make_grouping
from .attributes import RESIDUAL, group_by_attributes
from .given import group_by_map, read_group_map
from .noisy_cells import group_by_noisy_cells, public_domain
from .random_groups import group_at_random
from .structure import group_by_structure
