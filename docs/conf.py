"""Sphinx configuration of the orthoccp documentation.

Build (the CI step, warnings are errors)::

    pip install -e ".[docs]"
    python -m sphinx -W --keep-going -b html docs docs/_build/html

The pages are Markdown (MyST) except the API reference, which autodoc and numpydoc generate
from the docstrings. The built-in ``alabaster`` theme needs no network.
"""

from __future__ import annotations

import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
# Build from the working tree even when orthoccp is not installed in editable mode.
sys.path.insert(0, str(ROOT / "src"))

import orthoccp  # noqa: E402

project = "orthoccp"
author = "orthoccp developers"
copyright = "orthoccp developers"
version = release = orthoccp.__version__

extensions = [
    "sphinx.ext.autodoc",
    "sphinx.ext.mathjax",
    "sphinx.ext.viewcode",
    "numpydoc",
    "myst_parser",
]

source_suffix = {".rst": "restructuredtext", ".md": "markdown"}
root_doc = "index"
exclude_patterns = ["_build", "Thumbs.db", ".DS_Store"]
templates_path: list[str] = []

# MyST: anchors for ## and ### headings, so that pages can link to sections
# ([text](page.md#section)). The pages write formulas in plain Unicode, which needs no
# network to display; the docstrings' ".. math::" blocks use MathJax when it can load.
myst_enable_extensions = ["deflist"]
myst_heading_anchors = 3

# autodoc + numpydoc: members are listed where the API page asks for them; numpydoc does not
# build its own member tables (they would duplicate autodoc's and need autosummary stubs).
autodoc_member_order = "bysource"
autodoc_typehints = "none"  # the numpydoc "Parameters" sections carry the types
numpydoc_show_class_members = False
numpydoc_class_members_toctree = False
numpydoc_xref_param_type = False

html_theme = "alabaster"
html_title = f"orthoccp {release}"
html_static_path: list[str] = []
html_theme_options = {
    "description": "Cross-fitted, Neyman-orthogonal CCP estimation",
    "fixed_sidebar": False,
    "page_width": "1100px",
}
