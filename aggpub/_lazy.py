"""Package attributes imported on first use (PEP 562), so that a part of aggpub loads only what it needs.

``import aggpub`` stays cheap, and the audit's helper process (which needs the sampler and
the network statistics only) does not import the engines, the policy reader, the bundle
checker and the report. ``from aggpub import X`` and ``aggpub.X`` work as with eager
imports; the first use imports X's module.
"""

from __future__ import annotations

import importlib


def lazy_attributes(package: str, namespace: dict, table: dict[str, str]):
    """``(__getattr__, __dir__)`` for a package whose names in ``table`` (``name -> ".module"``) load lazily."""

    def __getattr__(name: str):
        where = table.get(name)
        if where is None:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        value = getattr(importlib.import_module(where, package), name)
        namespace[name] = value  # later lookups find it directly
        return value

    def __dir__():
        return sorted(set(namespace) | set(table))

    return __getattr__, __dir__
