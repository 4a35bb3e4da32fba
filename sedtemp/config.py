"""Compatibility alias: this module moved to :mod:`sedtemp.pipeline.config` (version 0.2).

Kept so that callers of version 0.1 (``from sedtemp.config import ...``) keep working;
new code imports from :mod:`sedtemp.pipeline`.
"""

from .pipeline.config import *
from .pipeline.config import __all__  # noqa: F401
