"""Grouping people into supernodes of at least ``min_size`` members."""

from __future__ import annotations

__all__ = ["Grouping", "Spend", "group_by_attributes", "RESIDUAL", "group_by_structure", "group_by_map",
           "read_group_map", "group_at_random"]

from ._common import Grouping, Spend
from .attributes import RESIDUAL, group_by_attributes
from .given import group_by_map, read_group_map
from .random_groups import group_at_random
from .structure import group_by_structure
