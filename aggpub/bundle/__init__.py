"""Release bundles: write (atomic), read, check."""

from __future__ import annotations

__all__ = ["Bundle", "read_bundle", "write_bundle", "check_bundle", "CheckResult"]

from typing import TYPE_CHECKING

from .._lazy import lazy_attributes

_LAZY = {"CheckResult": ".check", "check_bundle": ".check", "Bundle": ".read", "read_bundle": ".read",
         "write_bundle": ".write"}
__getattr__, __dir__ = lazy_attributes(__name__, globals(), _LAZY)

if TYPE_CHECKING:  # the same names, eagerly, for type checkers and editors
    from .check import CheckResult, check_bundle
    from .read import Bundle, read_bundle
    from .write import write_bundle
