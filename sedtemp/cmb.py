"""Cosmic microwave background heating and contrast of dust at redshift z (da Cunha et al. 2013).

At redshift z the CMB (T_CMB(z) = T_CMB0 (1 + z)) heats optically thin dust
and is the background the dust is observed against; both effects lower the
flux a fit at z would otherwise attribute to the dust.

References
----------
da Cunha, E., et al. 2013, ApJ, 766, 13 (eqs. 12 and 18; equation numbers
from memory).
"""

from __future__ import annotations

import astropy.units as u
import numpy as np
from numpy.typing import ArrayLike

from ._units import to_hz, to_kelvin
from .constants import T_CMB0
from .errors import InputError
from .planck import _planck_nu_si

__all__ = ["cmb_contrast_factor", "cmb_heated_temperature", "cmb_temperature"]


def _cmb_heated_si(t_k, beta, redshift):
    """da Cunha et al. (2013) eq. 12: dust temperature heated by the CMB at z."""
    if redshift == 0.0:
        return t_k  # (1+z)^(4+beta) - 1 = 0: the identity, without rounding
    p = 4.0 + beta
    # beta <= -4 or T < 0 (rows that valid() rejects) give NaN quietly.
    with np.errstate(invalid="ignore", divide="ignore"):
        return (t_k**p + T_CMB0**p * ((1.0 + redshift) ** p - 1.0)) ** (1.0 / p)


def _emission_si(nu_rest_hz, t_dust_k, redshift, contrast):
    """B_nu(T_d), or B_nu(T_d) - B_nu(T_CMB(z)) seen against the CMB.

    The difference is da Cunha et al. (2013) eq. 18 times B_nu(T_d), written
    without the division so that B_nu(T_d) = 0 (deep Wien tail) gives 0.
    """
    b = _planck_nu_si(nu_rest_hz, t_dust_k)
    if contrast:
        b = b - _planck_nu_si(nu_rest_hz, T_CMB0 * (1.0 + redshift))
    return b


def cmb_temperature(redshift: ArrayLike) -> u.Quantity:
    """CMB temperature T_CMB(z) = T_CMB0 (1 + z), as a Quantity in K."""
    return T_CMB0 * (1.0 + np.asarray(redshift, dtype=float)) * u.K


def cmb_heated_temperature(temperature: u.Quantity | ArrayLike, beta: ArrayLike, redshift: ArrayLike) -> u.Quantity:
    """Dust temperature at redshift z including heating by the CMB.

    Parameters
    ----------
    temperature : Quantity or array_like
        Temperature the dust would have at z = 0, i.e. in the present-day CMB
        (bare: K). Dust heated by nothing but the CMB has T = T_CMB0.
    beta : float or array_like
        Emissivity index (> -4); broadcasts against ``temperature``.
    redshift : float
        Redshift z >= 0.

    Returns
    -------
    Quantity
        T_d(z) in K.

    Notes
    -----
    T_d(z) = [T^(4+beta) + T_CMB0^(4+beta) ((1+z)^(4+beta) - 1)]^(1/(4+beta)),
    i.e. the power an optically thin grain with kappa ~ nu^beta absorbs from
    the CMB at z, beyond what the present-day CMB supplies, adds to the power
    it absorbs at z = 0. T = T_CMB0 gives T_d = T_CMB(z); T below T_CMB0 is
    unphysical in this parametrisation.

    References
    ----------
    da Cunha, E., et al. 2013, ApJ, 766, 13, eq. 12 (equation number from
    memory).
    """
    t = to_kelvin(temperature)
    z = _check_redshift(redshift)
    b = np.asarray(beta, dtype=float)
    return _cmb_heated_si(t, b, z) * u.K


def cmb_contrast_factor(nu_rest: u.Quantity | ArrayLike, dust_temperature: u.Quantity | ArrayLike, redshift: ArrayLike) -> np.ndarray:
    """Fraction of the dust emission observed against the CMB.

    Parameters
    ----------
    nu_rest : Quantity or array_like
        Rest-frame frequency or wavelength (bare: um).
    dust_temperature : Quantity or array_like
        Dust temperature T_d(z) (bare: K); broadcasts against ``nu_rest``.
    redshift : float
        Redshift z >= 0.

    Returns
    -------
    ndarray
        1 - B_nu(T_CMB(z)) / B_nu(T_d); NaN where B_nu(T_d) = 0.

    References
    ----------
    da Cunha, E., et al. 2013, ApJ, 766, 13, eq. 18 (equation number from
    memory).
    """
    nu = to_hz(nu_rest, name="nu_rest")
    t = to_kelvin(dust_temperature, name="dust_temperature")
    z = _check_redshift(redshift)
    b_dust = _planck_nu_si(nu, t)
    b_cmb = _planck_nu_si(nu, T_CMB0 * (1.0 + z))
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(b_dust > 0, 1.0 - b_cmb / np.where(b_dust > 0, b_dust, 1.0), np.nan)


def _check_redshift(redshift):
    z = float(redshift)
    if not (np.isfinite(z) and z >= 0.0):
        raise InputError(f"redshift must be a finite number >= 0, got {redshift!r}")
    return z
