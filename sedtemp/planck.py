"""The Planck function and its frequency integrals.

All internal work is in SI: frequency in Hz, temperature in K, specific
intensity in W m^-2 Hz^-1 sr^-1. The public :func:`planck_nu` accepts astropy
Quantities; hot loops call :func:`_planck_nu_si` directly.
"""

from __future__ import annotations

import astropy.constants as const
import astropy.units as u
import numpy as np
from numpy.typing import ArrayLike
from scipy.special import gamma, zeta

from ._units import to_hz, to_kelvin

__all__ = [
    "planck_nu",
    "planck_integral",
    "planck_mean_powerlaw",
    "powerlaw_planck_integral",
    "wien_peak_x",
    "H_PLANCK",
    "K_BOLTZMANN",
    "C_LIGHT",
    "SIGMA_SB",
    "WIEN_X_NU",
]

H_PLANCK = const.h.si.value
K_BOLTZMANN = const.k_B.si.value
C_LIGHT = const.c.si.value
SIGMA_SB = const.sigma_sb.si.value
#: Root of x = 3 (1 - e^-x): peak of B_nu in x = h nu / k T (Wien's law in frequency).
WIEN_X_NU = 2.8214393721220787

_INTENSITY_UNIT = u.W / u.m**2 / u.Hz / u.sr
_H_OVER_K = H_PLANCK / K_BOLTZMANN
_PREFACTOR = 2.0 * H_PLANCK / C_LIGHT**2


def _planck_nu_si(nu_hz, t_k):
    """B_nu(T) in W m^-2 Hz^-1 sr^-1 for broadcastable float arrays (Hz, K).

    Written as 2 h nu^3 / c^2 / expm1(x) with x = h nu / k T: one
    transcendental call per element (this is the MCMC hot path), full
    precision for small x, and for x > ~709 expm1 overflows to inf, which is
    silenced here and gives exactly 0 (so x up to 1e4 and beyond returns 0
    without a warning). T = 0 gives 0; nu = 0 gives 0.
    """
    nu = np.asarray(nu_hz, dtype=float)
    t = np.asarray(t_k, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore", under="ignore"):
        x = _H_OVER_K * nu / t
        out = (_PREFACTOR * nu**3) / np.expm1(x)
    # nu = 0 or T = 0 produce 0/0 or inf*0: both limits are 0.
    return np.where(np.isfinite(out), out, 0.0)


def planck_nu(nu: u.Quantity | ArrayLike, temperature: u.Quantity | ArrayLike) -> u.Quantity:
    """Planck specific intensity B_nu(T).

    Parameters
    ----------
    nu : Quantity or array_like
        Frequency, or wavelength (any unit convertible via ``u.spectral()``).
        A bare number is a wavelength in micrometres.
    temperature : Quantity or array_like
        Temperature; a bare number is in K. Broadcasts against ``nu``.

    Returns
    -------
    Quantity
        B_nu in W m^-2 Hz^-1 sr^-1, shape ``broadcast(nu, temperature)``.

    Notes
    -----
    B_nu(T) = 2 h nu^3 / c^2 / (exp(h nu / k T) - 1), evaluated in the
    overflow-safe form described in :func:`_planck_nu_si`.

    Examples
    --------
    >>> import astropy.units as u
    >>> b = planck_nu(250 * u.um, 20 * u.K)
    >>> b.unit == u.W / u.m**2 / u.Hz / u.sr
    True
    """
    nu_hz = to_hz(nu, name="nu")
    t_k = to_kelvin(temperature)
    return _planck_nu_si(nu_hz, t_k) * _INTENSITY_UNIT


def planck_integral(temperature: u.Quantity | ArrayLike) -> u.Quantity:
    """Frequency-integrated Planck intensity, int B_nu dnu = sigma T^4 / pi.

    Parameters
    ----------
    temperature : Quantity or array_like
        Temperature (bare number in K).

    Returns
    -------
    Quantity
        W m^-2 sr^-1.

    References
    ----------
    Stefan-Boltzmann law (exact analytic integral of the Planck function).
    """
    t_k = to_kelvin(temperature)
    return SIGMA_SB * t_k**4 / np.pi * (u.W / u.m**2 / u.sr)


def _powerlaw_planck_integral_si(t_k, beta, nu0_hz):
    """int (nu/nu0)^beta B_nu(T) dnu in W m^-2 sr^-1 (SI floats, broadcasting).

    Exact: 2 h / c^2 (k T / h)^(4+beta) nu0^-beta Gamma(4+beta) zeta(4+beta),
    valid for beta > -3 (convergence of the integral).
    """
    t = np.asarray(t_k, dtype=float)
    b = np.asarray(beta, dtype=float)
    s = 4.0 + b
    kt_h = t / _H_OVER_K
    return _PREFACTOR * kt_h**s * np.asarray(nu0_hz, float) ** (-b) * gamma(s) * zeta(s)


def powerlaw_planck_integral(temperature: u.Quantity | ArrayLike, beta: ArrayLike, nu0: u.Quantity | ArrayLike) -> u.Quantity:
    """Integral of a power law times the Planck function, int (nu/nu0)^beta B_nu(T) dnu.

    Parameters
    ----------
    temperature : Quantity or array_like
        Temperature (bare number in K).
    beta : array_like
        Power-law index, > -3. Broadcasts with ``temperature``.
    nu0 : Quantity or float
        Reference frequency or wavelength; a bare number is a frequency in Hz
        (as ``nu0`` of :class:`sedtemp.opacity.PowerLawOpacity`).

    Returns
    -------
    Quantity
        W m^-2 sr^-1.

    Notes
    -----
    Exact: 2 h / c^2 (k T / h)^(4+beta) nu0^-beta Gamma(4+beta) zeta(4+beta);
    for beta = 0 this is sigma T^4 / pi.
    """
    return _powerlaw_planck_integral_si(
        to_kelvin(temperature), beta, to_hz(nu0, default_unit=u.Hz, name="nu0")
    ) * (u.W / u.m**2 / u.sr)


def planck_mean_powerlaw(temperature: u.Quantity | ArrayLike, beta: ArrayLike, nu0: u.Quantity | ArrayLike) -> np.ndarray:
    """Planck mean of (nu/nu0)^beta: int (nu/nu0)^beta B_nu dnu / int B_nu dnu.

    Parameters
    ----------
    temperature : Quantity or array_like
        Temperature (bare number in K).
    beta : array_like
        Power-law index, > -3.
    nu0 : Quantity or float
        Reference frequency or wavelength; a bare number is a frequency in Hz.

    Returns
    -------
    ndarray
        Dimensionless Planck mean. Multiply by kappa0 for the Planck-mean
        opacity of ``kappa0 (nu/nu0)^beta``.

    Notes
    -----
    (k T / h nu0)^beta Gamma(4+beta) zeta(4+beta) / (Gamma(4) zeta(4)),
    exact for a power law.
    """
    t_k = to_kelvin(temperature)
    nu0_hz = to_hz(nu0, default_unit=u.Hz, name="nu0")
    return _powerlaw_planck_integral_si(t_k, beta, nu0_hz) / (SIGMA_SB * t_k**4 / np.pi)


def wien_peak_x(beta: float = 0.0) -> float:
    """x = h nu_peak / k T at the peak of nu^beta B_nu(T), from x = (3+beta)(1 - e^-x).

    Parameters
    ----------
    beta : float
        Emissivity index (> -3).

    Returns
    -------
    float
        The positive root (brentq to 1e-15); 2.821439... for beta = 0.
    """
    from scipy.optimize import brentq

    n = 3.0 + float(beta)
    return brentq(lambda x: x - n * (-np.expm1(-x)), 1e-6, n + 1.0, xtol=1e-15)
