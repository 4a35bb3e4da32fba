"""Compatibility alias: this module moved to :mod:`sedtemp.pipeline.batch` (version 0.2).

Kept so that callers of version 0.1 (``from sedtemp.batch import ...``) keep working;
new code imports from :mod:`sedtemp.pipeline`.
"""

from .pipeline.batch import *
from .pipeline.batch import __all__  # noqa: F401
