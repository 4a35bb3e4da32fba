"""Fitters: exact grid posterior for catalogues and per-source MCMC."""

from .grid import GridPosterior, grid_posterior
from .mcmc import LogPosterior, fit_source
from .result import FitResult

__all__ = ["FitResult", "GridPosterior", "LogPosterior", "fit_source", "grid_posterior"]
