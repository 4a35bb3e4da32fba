"""Radiative-equilibrium dust temperature: absorbed power, emitted power, and their balance.

Dust in a radiation field J_nu reaches the temperature at which absorbed and
emitted power balance,

    4 pi int kappa_nu J_nu dnu = 4 pi int kappa_nu B_nu(T) dnu.

Absorbed power is linear in the field: each shared spectrum is integrated
once (:mod:`sedtemp.absorption`) and scaled per source. Emitted power is a
table of the opacity alone, built once per process (:mod:`sedtemp.emission`),
and inverted by interpolation. :func:`predict_chunk` does a whole chunk of
sources with array operations only. Grain heat capacities, timescales and
the stochastic-heating check are in :mod:`sedtemp.grains`.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

import astropy.units as u
import numpy as np
from astropy.table import Table
from numpy.typing import ArrayLike

from ._units import to_kelvin, to_si
from .absorption import (
    DEFAULT_NU_GRID_HZ,
    absorbed_power_chunk,
    frequency_grid,
    warn_extrapolated,
)
from .emission import check_beta, emission_table
from .errors import InputError
from .planck import SIGMA_SB
from .radiation import HABING_FLUX, ISRF, NU_6EV, NU_LYMAN, RadiationField, Star

if TYPE_CHECKING:
    from .opacity import Opacity

__all__ = [
    "DEFAULT_NU_GRID_HZ",
    "absorbed_power",
    "absorption_mean_opacity",
    "emission_mean_opacity",
    "emitted_power",
    "equilibrium_temperature",
    "implied_U",
    "predict_chunk",
    "predict_table",
    "temperature_for_power",
]

_KAPPA_SI = u.m**2 / u.kg


def _beta_array(beta, opacity, who):
    return check_beta(opacity.beta if beta is None else beta, who)


def _absorbed(field, opacity, b, nu_grid, who):
    """(per-component power (b.shape + (k,)), extrapolated fraction (b.shape)) for one field."""
    if not isinstance(field, RadiationField):
        raise InputError(f"{who}: field must be a sedtemp.radiation field, got {type(field).__name__}")
    p, px = absorbed_power_chunk([field], opacity, b.reshape(1, -1), nu_grid=nu_grid, extrapolated=True)
    tot = p.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(tot > 0, px.sum(axis=-1) / tot, 0.0)
    return p.reshape(b.shape + p.shape[-1:]), frac.reshape(b.shape)


def absorbed_power(field: RadiationField, opacity: Opacity, *, beta: ArrayLike | None = None,
                   nu_grid: u.Quantity | ArrayLike | None = None,
                   per_component: bool = False) -> np.ndarray:
    """Absorbed power per unit mass, 4 pi int kappa_nu J_nu dnu, in W kg^-1.

    Parameters
    ----------
    field : RadiationField
        The heating field (a sum, a single field, attenuated or not).
    opacity : Opacity
        Mass absorption coefficient (per dust or per gas mass: the power is per
        unit of the same mass).
    beta : array_like, keyword-only
        Emissivity index (any shape), within :data:`sedtemp.emission.BETA_RANGE`;
        default the opacity's own.
    nu_grid : Quantity or array_like, keyword-only
        Increasing frequency grid (bare numbers in Hz); default
        :data:`DEFAULT_NU_GRID_HZ` (1e9 Hz to 13.6 eV, 4001 log-spaced nodes).
    per_component : bool, keyword-only
        If True, return one value per entry of ``field.components`` on a last
        axis, so callers can rescale components independently.

    Returns
    -------
    ndarray
        Shape ``beta.shape`` (plus ``(n_components,)`` if ``per_component``).

    Raises
    ------
    InputError
        Not a field, a bad grid, or beta outside its range.

    Notes
    -----
    Trapezoid rule in ln nu on the grid; no loop over frequencies. Up to 16
    distinct betas are integrated directly, more are interpolated in beta
    (:func:`sedtemp.absorption.absorbed_power_chunk`, ~1e-9 relative).
    """
    b = _beta_array(beta, opacity, "absorbed_power")
    p, _ = _absorbed(field, opacity, b, nu_grid, "absorbed_power")
    return p if per_component else p.sum(axis=-1)


def emitted_power(temperature: u.Quantity | ArrayLike, opacity: Opacity, *,
                  beta: ArrayLike | None = None) -> np.ndarray:
    """Emitted power per unit mass, 4 pi int kappa_nu B_nu(T) dnu, in W kg^-1.

    Parameters
    ----------
    temperature : Quantity or array_like
        Dust temperature (bare numbers in K), >= 0.
    opacity : Opacity
    beta : array_like, keyword-only
        Broadcasts against ``temperature``; default the opacity's own.

    Returns
    -------
    ndarray
        Shape ``broadcast(temperature, beta)``.

    Notes
    -----
    From the opacity's emission table (:func:`sedtemp.emission.emission_table`,
    built once per process; < 1e-7 relative from direct integration). For a
    power law the exact value is :func:`sedtemp.emission.powerlaw_emitted_power`.
    """
    t = np.asarray(to_kelvin(temperature), float)
    if np.any(~np.isfinite(t)) or np.any(t < 0):
        raise InputError("emitted_power: temperature must be finite and >= 0 (K)")
    b = _beta_array(beta, opacity, "emitted_power")
    return emission_table(opacity).power(t, b)


def temperature_for_power(power_per_mass: ArrayLike, opacity: Opacity, *,
                          beta: ArrayLike | None = None) -> np.ndarray:
    """The temperature T (K) at which 4 pi int kappa_nu B_nu(T) dnu equals the given power.

    Parameters
    ----------
    power_per_mass : array_like
        Power per unit mass in W kg^-1 (per the opacity's ``per`` mass), >= 0.
    opacity : Opacity
    beta : array_like, keyword-only
        Broadcasts against ``power_per_mass``; default the opacity's own.

    Returns
    -------
    ndarray
        T in K, shape ``broadcast(power_per_mass, beta)``; 0 where the power is 0.

    Raises
    ------
    InputError
        Negative or non-finite power, or beta outside its range.

    Notes
    -----
    Newton's method on the emission table's spline: relative error in T
    below 1e-5 against direct integration (tests/test_emission.py).
    """
    p = np.asarray(power_per_mass, dtype=float)
    if np.any(~np.isfinite(p)) or np.any(p < 0):
        raise InputError("temperature_for_power: power_per_mass must be finite and >= 0 (W/kg)")
    b = _beta_array(beta, opacity, "temperature_for_power")
    return emission_table(opacity).temperature(p, b)


def _check_scale(scale, who):
    s = np.asarray(scale, dtype=float)
    if np.any(~np.isfinite(s)) or np.any(s < 0):
        raise InputError(f"{who}: scale must be finite and >= 0")
    return s


def equilibrium_temperature(field: RadiationField, opacity: Opacity, *, scale: ArrayLike | None = None,
                            beta: ArrayLike | None = None,
                            nu_grid: u.Quantity | ArrayLike | None = None) -> u.Quantity:
    """Radiative-equilibrium dust temperature in ``field``, as a Quantity in K.

    Parameters
    ----------
    field : RadiationField
    opacity : Opacity
    scale : array_like, keyword-only
        Factors multiplying the whole field (e.g. many U for an ``ISRF(1)``, or
        dilution ratios (d_ref/d)^2 for a star); any shape. Default 1.
    beta : array_like, keyword-only
        Emissivity index; broadcasts against ``scale``.
    nu_grid : keyword-only
        Absorption grid, see :func:`absorbed_power`.

    Returns
    -------
    Quantity
        T_eq in K, shape ``broadcast(scale, beta)``.

    Raises
    ------
    InputError
        Bad field, negative scale, beta outside [0, 5].

    Warns
    -----
    OpacityExtrapolationWarning
        More than 1 % of the absorbed power comes from where the opacity law
        is an extrapolation (a bare far-IR power law under starlight).

    Notes
    -----
    int kappa_nu J_nu dnu = int kappa_nu B_nu(T) dnu; for kappa ~ nu^beta,
    T_eq ~ scale^(1/(4+beta)). Accurate to ~1e-5 relative on the default
    grid for fields that are zero or negligible above 13.6 eV.

    Examples
    --------
    >>> from sedtemp.radiation import ISRF
    >>> from sedtemp.opacity import SaturatedPowerLawOpacity
    >>> kap = SaturatedPowerLawOpacity(10, 1e12, 2.0, grain_radius=0.1)
    >>> t = equilibrium_temperature(ISRF(), kap, scale=[1, 10, 100])
    >>> t.shape
    (3,)
    """
    b = _beta_array(beta, opacity, "equilibrium_temperature")
    p, frac = _absorbed(field, opacity, b, nu_grid, "equilibrium_temperature")
    warn_extrapolated(frac, opacity, "equilibrium_temperature")
    p = p.sum(axis=-1)
    if scale is not None:
        p = p * _check_scale(scale, "equilibrium_temperature")
    return temperature_for_power(p, opacity, beta=b) * u.K


def predict_chunk(fields: Sequence[RadiationField], opacity: Opacity, beta: ArrayLike, *,
                  nu_grid: u.Quantity | ArrayLike | None = None,
                  details: bool = False) -> np.ndarray | dict[str, np.ndarray]:
    """Equilibrium temperatures of a chunk of sources, one field each, in K (floats).

    Parameters
    ----------
    fields : sequence of RadiationField, length n
        Per-source fields as :func:`sedtemp.fields.build_field` returns them.
    opacity : Opacity
    beta : ndarray (n,)
        Emissivity index of each source.
    nu_grid : keyword-only
        Absorption grid, see :func:`absorbed_power`.
    details : bool, keyword-only
        Return a dict with ``T_eq`` (K), ``P_abs`` (W kg^-1) and
        ``opacity_extrapolated_fraction`` (fraction of P_abs from where the
        opacity is extrapolated) instead of the bare T_eq array.

    Returns
    -------
    ndarray (n,) or dict of ndarray (n,)

    Raises
    ------
    InputError
        A field that is not a field, beta of the wrong shape or range.

    Warns
    -----
    OpacityExtrapolationWarning
        As :func:`equilibrium_temperature`, once for the chunk.

    Notes
    -----
    Shared spectra are integrated once per beta node, per-source A_V in one
    matrix product (:func:`sedtemp.absorption.absorbed_power_chunk`); agrees
    with :func:`equilibrium_temperature` per source to 1e-8 relative (the
    interpolation in beta; tests/test_equilibrium.py).
    """
    b = check_beta(beta, "predict_chunk")
    if b.shape != (len(fields),):
        raise InputError(f"predict_chunk: beta must have shape ({len(fields)},), got {b.shape}")
    p, px = absorbed_power_chunk(fields, opacity, b, nu_grid=nu_grid, extrapolated=True)
    tot = p.sum(axis=-1)[:, 0]
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(tot > 0, px.sum(axis=-1)[:, 0] / tot, 0.0)
    warn_extrapolated(frac, opacity, "predict_chunk")
    t = emission_table(opacity).temperature(tot, b)
    if details:
        return {"T_eq": t, "P_abs": tot, "opacity_extrapolated_fraction": frac}
    return t


# ------------------------------------------------------- mean opacities
def absorption_mean_opacity(field: RadiationField, opacity: Opacity, *, beta: ArrayLike | None = None,
                            nu_grid: u.Quantity | ArrayLike | None = None) -> u.Quantity:
    """Field-weighted mean opacity int kappa J dnu / int J dnu, a Quantity in cm^2 g^-1."""
    nu, w = frequency_grid(nu_grid)
    j_tot = float(w @ field.mean_intensity_si(nu))
    if not j_tot > 0:
        raise InputError("absorption_mean_opacity: the field is zero on the frequency grid")
    p = absorbed_power(field, opacity, beta=beta, nu_grid=nu_grid) / (4 * np.pi)
    return (p / j_tot * _KAPPA_SI).to(u.cm**2 / u.g)


def emission_mean_opacity(temperature: u.Quantity | ArrayLike, opacity: Opacity, *,
                          beta: ArrayLike | None = None) -> u.Quantity:
    """Planck-mean opacity int kappa B_nu(T) dnu / int B_nu(T) dnu, a Quantity in cm^2 g^-1.

    Notes
    -----
    int B_nu dnu = sigma T^4 / pi (Stefan-Boltzmann). Then T_eq^4 =
    (pi / sigma) kappa_abs int J dnu / kappa_P(T_eq).
    """
    t = np.asarray(to_kelvin(temperature), float)
    if np.any(~(t > 0)):
        raise InputError("emission_mean_opacity: temperature must be positive")
    k = emitted_power(t, opacity, beta=beta) / (4 * np.pi) / (SIGMA_SB * t**4 / np.pi)
    return (k * _KAPPA_SI).to(u.cm**2 / u.g)


def implied_U(temperature: u.Quantity | ArrayLike, opacity: Opacity, base: RadiationField | None = None, *,
              beta: ArrayLike | None = None, fixed: RadiationField | None = None,
              nu_grid: u.Quantity | ArrayLike | None = None) -> np.ndarray:
    """The strength U of ``base`` that would heat the dust to ``temperature``.

    Parameters
    ----------
    temperature : Quantity or array_like
        Observed dust temperature (bare numbers in K).
    opacity : Opacity
    base : RadiationField, optional
        Field shape; default ``ISRF(U=1)``. If ``base`` is an :class:`ISRF`,
        the result is its U times the factor (so it is a U for any base U);
        otherwise it is the factor multiplying ``base``.
    beta : array_like, keyword-only
        Broadcasts against ``temperature``.
    fixed : RadiationField, keyword-only
        A field held fixed (e.g. the CMB) whose heating is subtracted first.

    Returns
    -------
    ndarray
        U (dimensionless); NaN where the fixed field alone already heats the
        dust above ``temperature``.

    Notes
    -----
    U = [P_emit(T) - P_abs(fixed)] / P_abs(base), exact because absorbed power
    is linear in the field.
    """
    base = ISRF() if base is None else base
    b = _beta_array(beta, opacity, "implied_U")
    need = emitted_power(temperature, opacity, beta=b)
    if fixed is not None:
        need = need - absorbed_power(fixed, opacity, beta=b, nu_grid=nu_grid)
    p1 = absorbed_power(base, opacity, beta=b, nu_grid=nu_grid)
    if np.any(~(p1 > 0)):
        raise InputError("implied_U: the base field is not absorbed at all; check the field and grid")
    factor = need / p1 * (base.U if isinstance(base, ISRF) else 1.0)
    return np.where(need > 0, factor, np.nan)


# ------------------------------------------------------------ catalogues
def _column(table, name, unit, what):
    if name not in table.colnames:
        raise InputError(f"predict_table: no column {name!r} for {what}; columns are {table.colnames}")
    col = table[name]
    if unit is not None and getattr(col, "unit", None) is None:
        raise InputError(f"predict_table: column {name!r} ({what}) has no unit; give it one "
                         f"(e.g. table[{name!r}].unit = 'pc')")
    vals = u.Quantity(col) if getattr(col, "unit", None) is not None else np.asarray(col, float)
    out = to_si(vals, unit, name=f"column {name!r}") if unit is not None else np.asarray(vals, float)
    if np.any(~np.isfinite(out)) or np.any(out < 0):
        raise InputError(f"predict_table: column {name!r} ({what}) must be finite and >= 0")
    return out


class _HabingBand:
    """kappa = 1 m^2/kg between 6 and 13.6 eV, 0 elsewhere: its 'absorbed power' is the band flux."""

    beta = 0.0
    extrapolated_above_hz = None

    def kappa_si(self, nu_hz, beta=None):
        nu = np.asarray(nu_hz, float)
        return np.where((nu >= NU_6EV) & (nu <= NU_LYMAN), 1.0, 0.0) + 0.0 * np.asarray(0.0 if beta is None else beta)


def _row_fields(table, n, U_column, star, star_distance_column, A_V_column, extra, law, R_V):
    scales = {}
    if U_column is not None:
        scales["U"] = _column(table, U_column, None, "ISRF strength U")
    if star is not None:
        if not isinstance(star, Star):
            raise InputError(f"predict_table: star must be a sedtemp.radiation.Star, got {star!r}")
        scales["star"] = (np.ones(n) if star_distance_column is None else star.dilution_at(
            _column(table, star_distance_column, u.m, "star distance") * u.m) / star.dilution)
    if not scales and extra is None:
        raise InputError("predict_table: no field; give U_column, star or extra")
    av = np.zeros(n) if A_V_column is None else _column(table, A_V_column, None, "A_V (mag)")
    fields = []
    for i in range(n):  # builds objects only; the numerics are vectorised in predict_chunk
        parts = ([ISRF(scales["U"][i])] if "U" in scales else []) + (
            [star.scaled(scales["star"][i])] if "star" in scales else []) + ([extra] if extra is not None else [])
        fld = sum(parts[1:], parts[0])
        fields.append(fld.attenuated(av[i], law=law, R_V=R_V) if av[i] > 0 else fld)
    return fields


def predict_table(table: Table, opacity: Opacity, *, U_column: str | None = None, star: Star | None = None,
                  star_distance_column: str | None = None, A_V_column: str | None = None,
                  extra: RadiationField | None = None, beta: float | None = None,
                  beta_column: str | None = None, law: str | Any = "G23", R_V: float = 3.1,
                  nu_grid: u.Quantity | ArrayLike | None = None) -> Table:
    """Equilibrium temperatures for a catalogue with per-source field parameters.

    The field of row i is ``U_i ISRF(1) + star(d_i) + extra``, all attenuated
    by ``A_V_i`` with one extinction curve. Each parameter comes from a column
    or is absent.

    Parameters
    ----------
    table : astropy.table.Table
        One row per source.
    opacity : Opacity
    U_column : str, keyword-only
        Column of ISRF strengths U (dimensionless). Without it there is no ISRF
        term (put a fixed one in ``extra``).
    star : Star, keyword-only
        The heating star; with ``star_distance_column`` its separation per row
        (a column with a length unit), else at its own distance.
    A_V_column : str, keyword-only
        Column of visual extinctions (mag) applied to the whole field.
    extra : RadiationField, keyword-only
        Fixed field added to every row (e.g. ``CMB()``).
    beta : float, keyword-only / beta_column : str, keyword-only
        One emissivity index, or a column of them; default the opacity's own.
    law, R_V : keyword-only
        Extinction curve (see :meth:`sedtemp.radiation.RadiationField.attenuated`).
    nu_grid : keyword-only
        Absorption grid (see :func:`absorbed_power`).

    Returns
    -------
    astropy.table.Table
        A copy of ``table`` with ``T_eq`` (K), ``P_abs`` (absorbed power per
        unit mass, W kg^-1, per the opacity's mass), ``U_equiv`` (the
        unattenuated ISRF strength that would give the same heating),
        ``G0_local`` (Habing G0 of the attenuated field), ``beta_used`` and
        ``opacity_extrapolated_fraction``.

    Raises
    ------
    InputError
        Missing column, column without a needed unit, negative values, or no
        field term at all.

    Examples
    --------
    >>> from astropy.table import Table
    >>> from sedtemp.opacity import SaturatedPowerLawOpacity
    >>> tab = Table({"U": [1.0, 10.0], "av": [0.0, 5.0]})
    >>> kap = SaturatedPowerLawOpacity(10, 1e12, 2.0, grain_radius=0.1)
    >>> out = predict_table(tab, kap, U_column="U", A_V_column="av")
    >>> len(out)
    2
    """
    n = len(table)
    fields = _row_fields(table, n, U_column, star, star_distance_column, A_V_column, extra, law, R_V)
    b = (np.full(n, float(opacity.beta if beta is None else beta)) if beta_column is None
         else _column(table, beta_column, None, "beta"))
    got = predict_chunk(fields, opacity, b, nu_grid=nu_grid, details=True)
    g0 = absorbed_power_chunk(fields, _HabingBand(), np.zeros(n), nu_grid=nu_grid).sum(axis=-1)[:, 0]
    p_isrf = absorbed_power(ISRF(1.0), opacity, beta=b, nu_grid=nu_grid)
    out = Table(table, copy=True)
    out["T_eq"] = got["T_eq"] * u.K
    out["P_abs"] = got["P_abs"] * (u.W / u.kg)
    out["U_equiv"] = got["P_abs"] / p_isrf
    out["G0_local"] = g0 / HABING_FLUX  # 4 pi int J dnu over 6-13.6 eV / F_Habing
    out["beta_used"] = b
    out["opacity_extrapolated_fraction"] = got["opacity_extrapolated_fraction"]
    return out
