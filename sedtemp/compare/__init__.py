"""Comparison stage: the fitted dust temperature against the radiative-equilibrium prediction.

Modules, one idea each:

- :mod:`~sedtemp.compare.thresholds`: flag names and decision thresholds;
- :mod:`~sedtemp.compare.uncertainty`: field and opacity uncertainty (shared or per source);
- :mod:`~sedtemp.compare.flags`: classification, verdict text, catalogue-level counts;
- :mod:`~sedtemp.compare.core`: :class:`Comparison`, :func:`compare_draws`, :func:`compare`;
- :mod:`~sedtemp.compare.chunk`: :func:`compare_chunk`, a chunk of sources as arrays;
- :mod:`~sedtemp.compare.table`: :func:`compare_table`, :func:`row_seed`.

``sedtemp.compare.compare`` is the function comparing one fit; the package
itself stays reachable as ``sys.modules["sedtemp.compare"]`` and through
``import sedtemp.compare.core``.
"""

from .chunk import DRAWN, W_PER_KG_IN_LSUN_PER_MSUN, column_names, compare_chunk
from .core import Comparison, compare, compare_draws
from .flags import catalogue_counts, classify, verdict
from .table import compare_table, row_seed
from .thresholds import FLAGS, UNTRUSTED_FIT_FLAGS, Thresholds
from .uncertainty import (
    DEFAULT_OPACITY_UNCERTAINTY,
    DistanceUncertainty,
    FieldUncertainty,
    ProjectedDistance,
    ScaleUncertainty,
)

__all__ = [
    "DEFAULT_OPACITY_UNCERTAINTY",
    "DRAWN",
    "FLAGS",
    "UNTRUSTED_FIT_FLAGS",
    "W_PER_KG_IN_LSUN_PER_MSUN",
    "Comparison",
    "DistanceUncertainty",
    "FieldUncertainty",
    "ProjectedDistance",
    "ScaleUncertainty",
    "Thresholds",
    "catalogue_counts",
    "classify",
    "column_names",
    "compare",
    "compare_chunk",
    "compare_draws",
    "compare_table",
    "row_seed",
    "verdict",
]
