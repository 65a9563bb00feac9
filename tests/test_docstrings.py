"""The examples in the public docstrings run and print what they claim (doctest)."""

from __future__ import annotations

import doctest
import importlib

import pytest

MODULES = ["orthoccp.data", "orthoccp.model", "orthoccp.results", "orthoccp.estimate", "orthoccp._numeric", "orthoccp._options"]


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name: str) -> None:
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0


def test_no_source_string_has_an_invalid_escape() -> None:
    # A docstring's ":math:`\theta`" in a non-raw string is a TAB followed by "heta", and
    # "\L" an invalid escape (a SyntaxWarning from Python 3.12): formulas must be written
    # with doubled backslashes or in raw strings. Python's own compiler is the check.
    import ast
    import warnings
    from pathlib import Path

    import orthoccp

    root = Path(orthoccp.__file__).parent
    for path in sorted(root.rglob("*.py")):
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            tree = compile(path.read_text(encoding="utf-8"), str(path), "exec", ast.PyCF_ONLY_AST)
        # "\theta" and "\tau" in a non-raw docstring compile silently, as a TAB
        owners = (ast.Module, ast.ClassDef, ast.FunctionDef, ast.AsyncFunctionDef)
        tabs = [getattr(node, "name", "module") for node in ast.walk(tree)
                if isinstance(node, owners) and "\t" in (ast.get_docstring(node, clean=False) or "")]
        assert not tabs, f"{path.name}: TAB in the docstring of {tabs} (a lost backslash?)"
