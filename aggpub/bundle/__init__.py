"""Release bundles: write (atomic), read, check."""

from __future__ import annotations

__all__ = ["Bundle", "read_bundle", "write_bundle", "check_bundle", "CheckResult"]

from .check import CheckResult, check_bundle
from .read import Bundle, read_bundle
from .write import write_bundle
