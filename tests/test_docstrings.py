"""The examples in the public docstrings run and print what they claim (doctest)."""

from __future__ import annotations

import doctest
import importlib

import pytest

MODULES = ["orthoccp.data", "orthoccp.model", "orthoccp.results", "orthoccp.estimate"]


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name: str) -> None:
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0
