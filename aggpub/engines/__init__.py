"""Counting engines: DuckDB embedded (default) and Spark (clusters), same results."""

from __future__ import annotations

__all__ = ["make_engine", "ENGINES"]

ENGINES = ("duckdb", "spark")


def make_engine(name: str = "duckdb", **options):
    """Create a counting engine by name."""
    from ..errors import UsageError

    if name == "duckdb":
        from ._duckdb import DuckDBEngine

        return DuckDBEngine(**options)
    if name == "spark":
        from ._spark import SparkEngine

        return SparkEngine(**options)
    raise UsageError(f"unknown engine {name!r}; choose one of {', '.join(ENGINES)}")
