"""Compatibility alias: this module moved to :mod:`sedtemp.pipeline.catalog` (version 0.2).

Kept so that callers of version 0.1 (``from sedtemp.catalog import ...``) keep working;
new code imports from :mod:`sedtemp.pipeline`.
"""

from .pipeline.catalog import *
from .pipeline.catalog import __all__  # noqa: F401
