"""Exception and warning classes used throughout sedtemp."""

from __future__ import annotations

__all__ = [
    "SedtempError",
    "InputError",
    "CatalogError",
    "ConfigError",
    "NotFittedError",
    "SedtempWarning",
    "ConvergenceWarning",
    "PriorEdgeWarning",
    "GridWarning",
    "OpacityExtrapolationWarning",
    "PopulationWarning",
]


class SedtempError(Exception):
    """Base class of every error raised by sedtemp."""


class InputError(SedtempError, ValueError):
    """Bad scientific input: wrong unit, NaN, non-positive error, too few bands."""


class CatalogError(SedtempError, ValueError):
    """A catalogue cannot be read or mapped (missing column, no unit, duplicate id)."""


class ConfigError(SedtempError, ValueError):
    """A workflow file is malformed: unknown key, wrong type, missing value."""


class NotFittedError(SedtempError, RuntimeError):
    """A result was asked for before the fit that produces it ran."""


class SedtempWarning(UserWarning):
    """Base class of sedtemp's warnings. Anything that could mislead is also a flag."""


class ConvergenceWarning(SedtempWarning):
    """An MCMC chain did not reach its convergence criteria."""


class PriorEdgeWarning(SedtempWarning):
    """Posterior mass piles up against a prior boundary."""


class GridWarning(SedtempWarning):
    """A grid posterior touches the grid edge or is narrower than a grid cell."""


class OpacityExtrapolationWarning(SedtempWarning):
    """An opacity law is used where it is an extrapolation (e.g. a bare far-IR power law in the UV).

    The fraction of the absorbed power that comes from there is also a result
    column (``opacity_extrapolated_fraction``), so the pipeline can flag it.
    """


class PopulationWarning(SedtempWarning):
    """A population inference may mislead: sources with too few effective draws, or a short chain."""
