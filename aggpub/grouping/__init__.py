"""Grouping people into supernodes of at least ``min_size`` members."""

from __future__ import annotations

__all__ = ["Grouping", "Spend", "group_by_attributes", "RESIDUAL"]

from ._common import Grouping, Spend
from .attributes import RESIDUAL, group_by_attributes
