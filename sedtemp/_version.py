"""The version of sedtemp, defined here and nowhere else.

Every module that records or prints the version imports it from here (not
from the package root, which would import the whole package and, from the
pipeline layer, close an import circle). ``pyproject.toml`` reads it too
(``[tool.setuptools.dynamic] version``).
"""

__all__ = ["__version__"]

__version__ = "0.2.0"
