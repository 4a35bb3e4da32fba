"""Sphinx configuration: the API reference, built from the numpydoc docstrings.

Build (warnings are errors, as in CI)::

    python -m sphinx -W --keep-going -b html docs docs/_build/html
"""

from sedtemp._version import __version__

project = "sedtemp"
author = "The sedtemp developers"
copyright = "2026, The sedtemp developers"
version = release = __version__

extensions = [
    "sphinx.ext.autodoc",
    "sphinx.ext.autosummary",
    "sphinx.ext.mathjax",
    "numpydoc",
]
templates_path = ["_templates"]
exclude_patterns = ["_build"]

# The API pages are generated from the package tree on every build (api.rst asks for
# `sedtemp`, recursively), so modules that move or appear need no edit here.
autosummary_generate = True
autosummary_imported_members = False
autodoc_member_order = "bysource"
autodoc_typehints = "none"  # numpydoc's Parameters sections carry the types and units
# A method without a docstring shows none, rather than its base class's (e.g. the
# standard library's Executor.submit, whose text is not reST).
autodoc_inherit_docstrings = False

# numpydoc: no per-member stub pages (autodoc documents the members in place).
numpydoc_show_class_members = False
numpydoc_class_members_toctree = False
numpydoc_xref_param_type = False

html_theme = "alabaster"
html_title = f"sedtemp {release}"
