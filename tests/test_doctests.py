"""The examples in the public API's docstrings run as written."""

from __future__ import annotations

import doctest
import importlib

import pytest

MODULES = ["trainguard.core.capture", "trainguard.core.meta", "trainguard.core.comparison",
           "trainguard.core.tolerance", "trainguard.core.text", "trainguard.core.store"]


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    result = doctest.testmod(importlib.import_module(name), optionflags=doctest.ELLIPSIS)
    assert result.failed == 0
