"""sedtemp: dust temperature posteriors and radiative-equilibrium diagnosis.

Fit (T, beta, amplitude) posteriors to far-IR/submm photometry, predict the
radiative-equilibrium temperature of the dust in a modelled radiation field,
and compare the two.
"""

from ._version import __version__
from .bands import Band, BandSet
from .compare import Comparison, compare_draws, compare_table
from .compare import compare as compare_fit
from .equilibrium import equilibrium_temperature, implied_U
from .errors import (
    CatalogError,
    ConfigError,
    ConvergenceWarning,
    InputError,
    SedtempError,
    SedtempWarning,
)
from .fit import FitResult, fit_source, grid_posterior
from .likelihood import Calibration
from .models import ModifiedBlackbody, ThickModifiedBlackbody, TwoTemperatureModel, get_model
from .opacity import PowerLawOpacity, SaturatedPowerLawOpacity, TabulatedOpacity
from .planck import planck_nu
from .priors import Gaussian, LogUniform, LogUniformAmplitude, Prior, Uniform, UniformAmplitude
from .radiation import CMB, ISRF, Blackbody, Star, Tabulated
from .simulate import simulate_photometry

__all__ = [
    "__version__",
    "Band",
    "BandSet",
    "Calibration",
    "FitResult",
    "fit_source",
    "grid_posterior",
    "ModifiedBlackbody",
    "ThickModifiedBlackbody",
    "TwoTemperatureModel",
    "PowerLawOpacity",
    "SaturatedPowerLawOpacity",
    "TabulatedOpacity",
    "ISRF",
    "Star",
    "CMB",
    "Blackbody",
    "Tabulated",
    "equilibrium_temperature",
    "compare_fit",
    "compare_draws",
    "compare_table",
    "Comparison",
    "implied_U",
    "planck_nu",
    "Prior",
    "Uniform",
    "LogUniform",
    "Gaussian",
    "UniformAmplitude",
    "LogUniformAmplitude",
    "simulate_photometry",
    "get_model",
    "SedtempError",
    "InputError",
    "CatalogError",
    "ConfigError",
    "SedtempWarning",
    "ConvergenceWarning",
]
