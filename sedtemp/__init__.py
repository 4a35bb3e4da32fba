"""sedtemp: dust temperature posteriors and radiative-equilibrium diagnosis."""

from importlib.metadata import PackageNotFoundError, version

from .errors import (
    CatalogError,
    ConfigError,
    ConvergenceWarning,
    InputError,
    SedtempError,
    SedtempWarning,
)
from .planck import planck_nu

try:
    __version__ = version("sedtemp")
except PackageNotFoundError:  # running from a source tree without install
    __version__ = "0+unknown"

__all__ = [
    "__version__",
    "planck_nu",
    "SedtempError",
    "InputError",
    "CatalogError",
    "ConfigError",
    "SedtempWarning",
    "ConvergenceWarning",
]
