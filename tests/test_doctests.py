"""The Examples sections of the public API's docstrings run, as networkx checks its own (issue 14.7)."""

from __future__ import annotations

import doctest
import importlib

import pytest

MODULES = ["aggpub.policy", "aggpub.pipeline", "aggpub.bundle.read", "aggpub.bundle.check",
           "aggpub.estimates.intervals", "aggpub.estimates.supergraph"]


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples_run(name):
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0, f"{name} has no example"
    assert result.failed == 0
