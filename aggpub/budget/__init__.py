"""Privacy bookkeeping in one place: spends, the budget of one release and its split, every
sensitivity constant, and the lifetime ledger across releases."""

from __future__ import annotations

__all__ = ["Spend", "ReleaseBudget", "split_epsilon", "equal_split", "SENSITIVITY", "sensitivity",
           "check_contact_cap"]

from .sensitivity import SENSITIVITY, check_contact_cap, sensitivity
from .spends import ReleaseBudget, Spend, equal_split, split_epsilon
