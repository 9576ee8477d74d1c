"""Sphinx configuration: the Markdown pages through MyST, the API reference from the numpydoc docstrings.

Build with ``python -m sphinx -b html docs docs/_build/html`` after ``pip install ".[docs]"``.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

# a checkout builds its own source, installed or not
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
os.environ.setdefault("MPLBACKEND", "Agg")

import hierchoice  # noqa: E402

project = "hierchoice"
author = "the hierchoice developers"
copyright = "the hierchoice developers"
release = hierchoice.__version__
version = release

extensions = [
    "myst_parser",           # the Markdown pages
    "sphinx.ext.autodoc",    # the API reference, from the docstrings
    "sphinx.ext.napoleon",   # numpydoc-style sections (Parameters, Returns, ...)
    "sphinx.ext.mathjax",    # $...$ in the pages and .. math:: in the docstrings
]
source_suffix = {".md": "markdown", ".rst": "restructuredtext"}
root_doc = "index"
exclude_patterns = ["_build", "Thumbs.db", ".DS_Store"]

# MyST: $...$ and $$...$$ maths (docs/model.md), anchors for the ## headings so pages can link to sections
myst_enable_extensions = ["dollarmath"]
myst_heading_anchors = 3

# numpydoc docstrings only
napoleon_google_docstring = False
napoleon_numpy_docstring = True
napoleon_use_rtype = False

autodoc_member_order = "bysource"
autodoc_typehints = "description"
autodoc_default_options = {"members": True, "show-inheritance": True}

html_theme = "alabaster"
html_title = f"hierchoice {release}"
