"""Radiation fields that heat dust: interstellar field, stars, CMB, tables, sums.

A field is an object whose :meth:`RadiationField.mean_intensity_si` returns the
mean intensity J_nu = (1/4 pi) int I_nu dOmega in W m^-2 Hz^-1 sr^-1 on any
frequency grid (Hz). Fields add with ``+`` (a :class:`SumField` keeps its
terms in ``components``), scale with ``*`` or :meth:`~RadiationField.scaled`,
and dim with :meth:`~RadiationField.attenuated` (an extinction curve from the
``dust_extinction`` package).
"""

from __future__ import annotations

import functools
import hashlib
from collections.abc import Iterable
from pathlib import Path
from typing import Any

import astropy.constants as const
import astropy.units as u
import numpy as np
from numpy.typing import ArrayLike

from ._units import read_two_columns, to_hz, to_kelvin, to_si
from .constants import NU_LYMAN, T_CMB0
from .errors import InputError
from .planck import C_LIGHT, H_PLANCK, SIGMA_SB, _planck_nu_si

__all__ = [
    "CMB",
    "CMB_T0",
    "HABING_FLUX",
    "ISRF",
    "NU_6EV",
    "NU_LYMAN",
    "AttenuatedField",
    "Blackbody",
    "ExtinctionCurve",
    "G0_to_U",
    "RadiationField",
    "ScaledField",
    "Star",
    "SumField",
    "Tabulated",
    "U_to_G0",
    "extinction_curve",
]

_J_UNIT = u.W / u.m**2 / u.Hz / u.sr
_EV = const.e.si.value
#: Lower edge of the Habing band, 6 eV, in Hz.
NU_6EV = 6.0 * _EV / H_PLANCK
#: Old name of :data:`sedtemp.constants.T_CMB0` (kept importable; same object).
CMB_T0 = T_CMB0
#: Habing (1968) field: 4 pi int J_nu dnu over 6-13.6 eV = 1.6e-3 erg cm^-2 s^-1
#: (the usual G0 = 1 normalisation; Habing 1968, BAN 19, 421), in W m^-2.
HABING_FLUX = 1.6e-6
#: ln(10) / 2.5: optical depth per magnitude of extinction.
_TAU_PER_MAG = np.log(10.0) / 2.5

# Mathis, Mezger & Panagia (1983, A&A 128, 212), solar neighbourhood (D_G = 10 kpc).
# UV: 4 pi J_lambda = c_k lambda^p_k in erg cm^-2 s^-1 um^-1 (lambda in um) on
# [edge_k, edge_k+1); coefficients from memory, checked to join continuously at
# 0.110 and 0.134 um (tests/test_radiation.py). Longward of 0.246 um: three
# diluted blackbodies W_i B(T_i).
_MMP_EDGES_UM = (0.0912, 0.110, 0.134, 0.246)
_MMP_UV = ((38.57, 3.4172), (2.045e-2, 0.0), (7.115e-4, -1.6678))
_MMP_BB = ((7500.0, 1.0e-14), (4000.0, 1.0e-13), (3000.0, 4.0e-13))
_MMP_UV_TO_SI = 1e-3 * 1e6  # erg cm^-2 s^-1 um^-1 -> W m^-2 m^-1


def _mmp83_si(nu_hz):
    """J_nu of the MMP83 field (U = 1) in SI; zero shortward of the Lyman limit."""
    nu = np.asarray(nu_hz, dtype=float)
    with np.errstate(divide="ignore"):
        lam_um = C_LIGHT / nu * 1e6
    j = np.zeros(np.broadcast(nu).shape)
    for (c, p), lo, hi in zip(_MMP_UV, _MMP_EDGES_UM[:-1], _MMP_EDGES_UM[1:], strict=True):
        inside = (lam_um >= lo) & (lam_um < hi)
        # 4 pi J_lambda -> J_nu = J_lambda lambda^2 / c (lambda in m)
        jl = np.where(inside, c * np.where(inside, lam_um, 1.0) ** p, 0.0) * _MMP_UV_TO_SI / (4 * np.pi)
        j = j + jl * (lam_um * 1e-6) ** 2 / C_LIGHT * inside
    vis = lam_um >= _MMP_EDGES_UM[-1]
    for t, w in _MMP_BB:
        j = j + np.where(vis, w * _planck_nu_si(nu, t), 0.0)
    return j


def _mmp83_uv_flux_si(lam_lo_um, lam_hi_um):
    """Exact 4 pi int J dnu (W m^-2) of the MMP83 UV power laws between two wavelengths (um)."""
    total = 0.0
    for (c, p), lo, hi in zip(_MMP_UV, _MMP_EDGES_UM[:-1], _MMP_EDGES_UM[1:], strict=True):
        a, b = max(lo, lam_lo_um), min(hi, lam_hi_um)
        if b > a:
            total += c / (p + 1.0) * (b ** (p + 1.0) - a ** (p + 1.0))
    return total * 1e-3  # erg cm^-2 s^-1 -> W m^-2


#: G0 of the MMP83 field at U = 1: its 6-13.6 eV flux over the Habing flux
#: (exact integral of the UV power laws; the blackbodies start at 0.246 um).
_G0_PER_U = _mmp83_uv_flux_si(C_LIGHT / NU_LYMAN * 1e6, C_LIGHT / NU_6EV * 1e6) / HABING_FLUX


def U_to_G0(U: ArrayLike) -> np.ndarray:
    """Habing G0 of an MMP83-shaped field of strength ``U`` (dimensionless, array_like).

    Notes
    -----
    G0 = U F(6-13.6 eV) / F_Habing, where F is 4 pi int J_nu dnu of the
    Mathis, Mezger & Panagia (1983) field and F_Habing = 1.6e-3 erg cm^-2 s^-1
    (Habing 1968). The factor is G0/U = 1.13 (Draine 2011, sec. 12.5, quotes
    1.14 for the energy-density form of the Habing normalisation).
    """
    return np.asarray(U, dtype=float) * _G0_PER_U


def G0_to_U(G0: ArrayLike) -> np.ndarray:
    """Inverse of :func:`U_to_G0`: the MMP83 scale factor U giving Habing ``G0``."""
    return np.asarray(G0, dtype=float) / _G0_PER_U


class RadiationField:
    """Base class: an isotropic (angle-averaged) radiation field J_nu.

    Subclasses implement :meth:`mean_intensity_si`. ``components`` is the list
    of additive terms (``[self]`` for a single field).
    """

    def mean_intensity_si(self, nu_hz: ArrayLike) -> np.ndarray:  # pragma: no cover - abstract
        """J_nu in W m^-2 Hz^-1 sr^-1 at ``nu_hz`` (Hz, any shape)."""
        raise NotImplementedError

    @property
    def components(self) -> list[RadiationField]:
        """Additive terms of the field (a list; ``[self]`` unless this is a sum)."""
        return [self]

    def unit_spectrum(self) -> tuple[tuple[Any, ...], RadiationField, float]:
        """``(key, unit_field, scale)`` with J_nu = scale x unit_field's J_nu.

        Fields whose spectra differ only by a factor return equal, hashable
        keys and the same unit spectrum, so the absorbed power of many sources
        is integrated once per spectrum and multiplied by ``scale`` afterwards
        (:mod:`sedtemp.absorption`). The default is the field itself with
        scale 1, keyed by identity (never shared).
        """
        return ("object", id(self)), self, 1.0

    def mean_intensity(self, nu: u.Quantity | ArrayLike) -> u.Quantity:
        """J_nu as a Quantity in W m^-2 Hz^-1 sr^-1 (``nu``: Quantity, or bare um)."""
        return self.mean_intensity_si(to_hz(nu, name="nu")) * _J_UNIT

    def scaled(self, factor: float) -> RadiationField:
        """This field multiplied by ``factor`` (a non-negative number)."""
        return ScaledField(self, factor)

    def __mul__(self, factor: float) -> RadiationField:
        if isinstance(factor, RadiationField):
            return NotImplemented
        return self.scaled(factor)

    __rmul__ = __mul__

    def __add__(self, other: object) -> RadiationField:
        if not isinstance(other, RadiationField):
            return NotImplemented
        return SumField([*self.components, *other.components])

    __radd__ = __add__

    def attenuated(self, A_V: float, *, law: str = "G23", R_V: float = 3.1) -> RadiationField:
        """This field seen behind ``A_V`` magnitudes of visual extinction.

        Parameters
        ----------
        A_V : float
            Visual extinction in mag (>= 0).
        law : str or dust_extinction model, keyword-only
            Extinction curve: a class name of ``dust_extinction.parameter_averages``
            (``"G23"``, ``"F19"``, ``"CCM89"``, ...) or of
            ``dust_extinction.averages`` (``"G21_MWAvg"``, ...), or a model
            instance. Default ``"G23"`` (Gordon et al. 2023).
        R_V : float, keyword-only
            R_V for parameter-dependent curves (default 3.1).

        Returns
        -------
        AttenuatedField
            J_nu exp(-tau_nu), tau_nu = A_V (ln 10 / 2.5) A(lambda)/A(V); see
            :class:`ExtinctionCurve` for the extrapolation outside the curve.
        """
        return AttenuatedField(self, A_V, curve=extinction_curve(law, R_V=R_V))

    def energy_density(self, *, nu_min: u.Quantity | float | None = None,
                       nu_max: u.Quantity | float | None = None, n: int = 20001) -> u.Quantity:
        """Energy density u = (4 pi / c) int J_nu dnu, as a Quantity in J m^-3.

        Parameters
        ----------
        nu_min, nu_max : Quantity or float, keyword-only
            Integration limits (bare numbers in Hz); default 1e9 Hz to the
            Lyman limit 13.6 eV.
        n : int, keyword-only
            Number of log-spaced nodes (trapezoid in ln nu).
        """
        lo = 1e9 if nu_min is None else float(to_hz(nu_min, default_unit=u.Hz, name="nu_min"))
        hi = NU_LYMAN if nu_max is None else float(to_hz(nu_max, default_unit=u.Hz, name="nu_max"))
        if not 0 < lo < hi:
            raise InputError(f"energy_density: need 0 < nu_min < nu_max, got {lo:g} and {hi:g} Hz")
        nu = np.geomspace(lo, hi, int(n))
        f = self.mean_intensity_si(nu) * nu
        return 4 * np.pi / C_LIGHT * np.trapezoid(f, np.log(nu)) * u.J / u.m**3

    def habing_G0(self, *, n: int = 4001) -> float:
        """G0: 4 pi int J_nu dnu over 6-13.6 eV divided by the Habing (1968) flux."""
        nu = np.geomspace(NU_6EV, NU_LYMAN, int(n))
        flux = 4 * np.pi * np.trapezoid(self.mean_intensity_si(nu) * nu, np.log(nu))
        return float(flux / HABING_FLUX)


class ISRF(RadiationField):
    """Solar-neighbourhood interstellar radiation field of Mathis, Mezger & Panagia (1983), times U.

    Parameters
    ----------
    U : float, optional
        Dimensionless scale factor (default 1).

    Notes
    -----
    With lambda in um and 4 pi J_lambda in erg cm^-2 s^-1 um^-1:
    0 below 0.0912 um; 38.57 lambda^3.4172 (0.0912-0.110 um); 2.045e-2
    (0.110-0.134 um); 7.115e-4 lambda^-1.6678 (0.134-0.246 um); longward of
    0.246 um, 4 pi sum W_i B_lambda(T_i) with (T, W) = (7500 K, 1e-14),
    (4000 K, 1e-13), (3000 K, 4e-13). The CMB and the dust re-emission are
    not included (add :class:`CMB` for the former). The 6-13.6 eV flux is
    G0 = 1.13 U Habing fields (:func:`U_to_G0`).

    References
    ----------
    Mathis, J. S., Mezger, P. G., & Panagia, N. 1983, A&A, 128, 212
    (coefficients quoted from memory; the blackbody weights are also listed
    by Zucconi et al. 2001, A&A, 376, 650).
    """

    def __init__(self, U: float = 1.0) -> None:
        self.U = float(U)
        if not (np.isfinite(self.U) and self.U >= 0):
            raise InputError(f"ISRF: U must be a finite number >= 0, got {U!r}")

    def mean_intensity_si(self, nu_hz: ArrayLike) -> np.ndarray:
        return self.U * _mmp83_si(nu_hz)

    def scaled(self, factor: float) -> RadiationField:
        return ISRF(self.U * _check_factor(factor))

    def unit_spectrum(self) -> tuple[tuple[Any, ...], RadiationField, float]:
        return ("isrf",), _ISRF1, self.U

    @property
    def G0(self) -> float:
        """Habing G0 of this field (exact integral of the MMP83 UV laws)."""
        return float(U_to_G0(self.U))

    @classmethod
    def from_G0(cls, G0: float) -> ISRF:
        """The MMP83 field whose 6-13.6 eV flux is ``G0`` Habing fields."""
        return cls(float(G0_to_U(G0)))

    def __repr__(self) -> str:
        return f"ISRF(U={self.U:g})"


_ISRF1 = ISRF(1.0)


class Blackbody(RadiationField):
    """Isotropic or diluted blackbody field, J_nu = W B_nu(T).

    Parameters
    ----------
    temperature : Quantity or float
        Radiation temperature; a bare number is in K.
    dilution : float, optional
        Dilution factor W >= 0 (1: isotropic blackbody; the fraction of the sky
        filled by the source for a star).
    """

    def __init__(self, temperature: u.Quantity | float, dilution: float = 1.0) -> None:
        self.temperature_k = float(to_kelvin(temperature, name="temperature"))
        self.dilution = float(dilution)
        if not self.temperature_k > 0:
            raise InputError(f"Blackbody: temperature must be positive, got {temperature!r}")
        if not (np.isfinite(self.dilution) and self.dilution >= 0):
            raise InputError(f"Blackbody: dilution must be a finite number >= 0, got {dilution!r}")

    def mean_intensity_si(self, nu_hz: ArrayLike) -> np.ndarray:
        return self.dilution * _planck_nu_si(nu_hz, self.temperature_k)

    def scaled(self, factor: float) -> RadiationField:
        return Blackbody(self.temperature_k, self.dilution * _check_factor(factor))

    def unit_spectrum(self) -> tuple[tuple[Any, ...], RadiationField, float]:
        # a star, the CMB and a diluted blackbody of one temperature share B_nu(T)
        return ("blackbody", self.temperature_k), Blackbody(self.temperature_k), self.dilution

    def __repr__(self) -> str:
        return f"Blackbody({self.temperature_k:g} K, dilution={self.dilution:.4g})"


def _dilution(radius_m, distance_m):
    """W = (1 - sqrt(1 - (R/d)^2)) / 2, the sphere's solid angle over 4 pi (stable form)."""
    x = (radius_m / distance_m) ** 2
    return x / (2.0 * (1.0 + np.sqrt(1.0 - x)))


class Star(Blackbody):
    """A star seen from ``distance`` as a diluted blackbody of its effective temperature.

    Parameters
    ----------
    teff : Quantity or float
        Effective temperature; bare number in K.
    luminosity : Quantity or float, optional
        Bolometric luminosity; bare number in L_sun. Gives the radius
        R = sqrt(L / (4 pi sigma T_eff^4)) when ``radius`` is not given.
    radius : Quantity or float, optional
        Stellar radius; bare number in R_sun.
    distance : Quantity or float, keyword-only
        Star-dust separation (> radius); bare number in pc.

    Raises
    ------
    InputError
        Neither or both of luminosity and radius; distance missing or not larger
        than the radius.

    Notes
    -----
    J_nu = W B_nu(T_eff), W = (1 - sqrt(1 - (R/d)^2)) / 2 ~ (R / 2d)^2. Photons
    above 13.6 eV are dropped by the default frequency grid of
    :mod:`sedtemp.equilibrium` (they ionise hydrogen before reaching neutral
    dust); pass a wider grid for dust inside an H II region.
    """

    def __init__(self, teff: u.Quantity | float, luminosity: u.Quantity | float | None = None,
                 radius: u.Quantity | float | None = None, *,
                 distance: u.Quantity | float | None = None) -> None:
        t = float(to_kelvin(teff, name="teff"))
        if not t > 0:
            raise InputError(f"Star: teff must be positive, got {teff!r}")
        if (luminosity is None) == (radius is None):
            raise InputError("Star: give exactly one of luminosity (e.g. 1e4 * u.L_sun) or "
                             "radius (e.g. 5 * u.R_sun)")
        if distance is None:
            raise InputError("Star: distance (star-dust separation, e.g. 1 * u.pc) is required")
        if radius is None:
            lum = float(to_si(luminosity, u.W, default_unit=u.L_sun, name="luminosity"))
            if not lum > 0:
                raise InputError(f"Star: luminosity must be positive, got {luminosity!r}")
            r = np.sqrt(lum / (4 * np.pi * SIGMA_SB * t**4))
        else:
            r = float(to_si(radius, u.m, default_unit=u.R_sun, name="radius"))
            if not r > 0:
                raise InputError(f"Star: radius must be positive, got {radius!r}")
        d = float(to_si(distance, u.m, default_unit=u.pc, name="distance"))
        if not d > r:
            raise InputError(f"Star: distance {d:.4g} m must exceed the stellar radius {r:.4g} m")
        self.teff_k, self.radius_m, self.distance_m = t, r, d
        self.luminosity_w = 4 * np.pi * r**2 * SIGMA_SB * t**4
        super().__init__(t, _dilution(r, d))

    def dilution_at(self, distance: u.Quantity | ArrayLike) -> np.ndarray:
        """Dilution factor at other separations (Quantity, or bare pc; array_like)."""
        d = to_si(distance, u.m, default_unit=u.pc, name="distance")
        if np.any(~(d > self.radius_m)):
            raise InputError("Star.dilution_at: every distance must exceed the stellar radius "
                             f"({self.radius_m:.4g} m)")
        return _dilution(self.radius_m, d)

    def __repr__(self) -> str:
        return (f"Star(teff={self.teff_k:g} K, radius={self.radius_m / const.R_sun.si.value:.4g} R_sun, "
                f"distance={self.distance_m / const.pc.si.value:.4g} pc)")


class CMB(Blackbody):
    """Cosmic microwave background at redshift z: a blackbody of T0 (1 + z).

    Parameters
    ----------
    redshift : float, optional
        Redshift z >= 0 (default 0).

    References
    ----------
    Fixsen, D. J. 2009, ApJ, 707, 916: T0 = 2.72548 +- 0.00057 K.
    """

    def __init__(self, redshift: float = 0.0) -> None:
        z = float(redshift)
        if not (np.isfinite(z) and z >= 0):
            raise InputError(f"CMB: redshift must be a finite number >= 0, got {redshift!r}")
        self.redshift = z
        super().__init__(CMB_T0 * (1.0 + z))

    def __repr__(self) -> str:
        return f"CMB(redshift={self.redshift:g})"


class Tabulated(RadiationField):
    """A user table of J_nu (or J_lambda), interpolated log-log; zero outside the table.

    Parameters
    ----------
    nu_or_wavelength : Quantity or array_like, or str or Path
        Table abscissa, frequency or wavelength (bare numbers: um). A path
        reads a two-column table instead (see :meth:`from_file`).
    J : Quantity or array_like
        Mean intensity per unit frequency (W m^-2 Hz^-1 sr^-1, erg s^-1
        cm^-2 Hz^-1 sr^-1, ...) or per unit wavelength (e.g. erg s^-1
        cm^-2 um^-1 sr^-1); bare numbers are W m^-2 Hz^-1 sr^-1. Non-negative.
    path : str or Path, keyword-only
        Alternative to the two arrays.
    """

    def __init__(self, nu_or_wavelength: u.Quantity | ArrayLike | str | Path | None = None,
                 J: u.Quantity | ArrayLike | None = None, *, path: str | Path | None = None) -> None:
        if isinstance(nu_or_wavelength, (str, Path)) and J is None:
            nu_or_wavelength, path = None, nu_or_wavelength
        if path is not None:
            nu_or_wavelength, J = _read_two_columns(path)
        if nu_or_wavelength is None or J is None:
            raise InputError("Tabulated: give the abscissa and J arrays, or path= of a two-column file")
        x = nu_or_wavelength if isinstance(nu_or_wavelength, u.Quantity) else np.asarray(
            nu_or_wavelength, float) * u.um
        nu = to_hz(x, name="table abscissa")
        jq = J if isinstance(J, u.Quantity) else np.asarray(J, float) * _J_UNIT
        try:
            j = np.asarray((jq * u.sr).to_value(_J_UNIT * u.sr, equivalencies=u.spectral_density(x)))
        except u.UnitConversionError as err:
            raise InputError(f"Tabulated: J has unit {jq.unit}, not a mean intensity per unit "
                             "frequency or wavelength per steradian (e.g. W m-2 Hz-1 sr-1)") from err
        if nu.ndim != 1 or nu.shape != j.shape or nu.size < 2:
            raise InputError("Tabulated: abscissa and J must be 1-D of equal length >= 2")
        if not (np.all(np.isfinite(nu) & (nu > 0)) and np.all(np.isfinite(j) & (j >= 0))):
            raise InputError("Tabulated: frequencies must be finite and positive, J finite and >= 0")
        order = np.argsort(nu)
        self._lnu = np.log(nu[order])
        if np.any(np.diff(self._lnu) == 0):
            raise InputError("Tabulated: repeated frequency or wavelength in the table")
        self._j = j[order]
        with np.errstate(divide="ignore"):
            # zeros become exp(-745) ~ 0 so the log-log interpolation stays finite
            self._lj = np.maximum(np.log(self._j), -745.0)

    @classmethod
    def from_file(cls, path: str | Path) -> Tabulated:
        """Read a two-column table (ECSV or any astropy-readable format with units)."""
        return cls(path=path)

    def mean_intensity_si(self, nu_hz: ArrayLike) -> np.ndarray:
        lnu = np.log(np.asarray(nu_hz, dtype=float))
        out = np.exp(np.interp(lnu, self._lnu, self._lj))
        inside = (lnu >= self._lnu[0]) & (lnu <= self._lnu[-1])
        return np.where(inside & (out > 1e-320), out, 0.0)

    def unit_spectrum(self) -> tuple[tuple[Any, ...], RadiationField, float]:
        h = hashlib.blake2b(self._lnu.tobytes() + self._j.tobytes(), digest_size=16).hexdigest()
        return ("table", h), self, 1.0

    def scaled(self, factor: float) -> RadiationField:
        new = object.__new__(Tabulated)
        f = _check_factor(factor)
        new._lnu, new._j = self._lnu, self._j * f
        with np.errstate(divide="ignore"):
            new._lj = np.maximum(np.log(new._j), -745.0)
        return new

    def __repr__(self) -> str:
        return f"Tabulated({self._lnu.size} nodes, {np.exp(self._lnu[0]):.3g}-{np.exp(self._lnu[-1]):.3g} Hz)"


def _read_two_columns(path):
    return read_two_columns(path, what="radiation-field table", example_units="um and W / (m2 Hz sr)")


def _check_factor(factor):
    f = float(factor)
    if not (np.isfinite(f) and f >= 0):
        raise InputError(f"a field can only be scaled by a finite number >= 0, got {factor!r}")
    return f


class ScaledField(RadiationField):
    """``factor`` times another field (what ``*`` returns for fields without their own scale)."""

    def __init__(self, field: RadiationField, factor: float) -> None:
        self.field = field
        self.factor = _check_factor(factor)

    def mean_intensity_si(self, nu_hz: ArrayLike) -> np.ndarray:
        return self.factor * self.field.mean_intensity_si(nu_hz)

    def scaled(self, factor: float) -> RadiationField:
        return ScaledField(self.field, self.factor * _check_factor(factor))

    def unit_spectrum(self) -> tuple[tuple[Any, ...], RadiationField, float]:
        key, unit, scale = self.field.unit_spectrum()
        return key, unit, scale * self.factor

    def __repr__(self) -> str:
        return f"{self.factor:g} * {self.field!r}"


class SumField(RadiationField):
    """Sum of fields; ``components`` lists the terms (flattened)."""

    def __init__(self, components: Iterable[RadiationField]) -> None:
        comps = []
        for c in components:
            if not isinstance(c, RadiationField):
                raise InputError(f"SumField: {c!r} is not a radiation field")
            comps.extend(c.components)
        if not comps:
            raise InputError("SumField needs at least one component")
        self._components = comps

    @property
    def components(self) -> list[RadiationField]:
        return list(self._components)

    def mean_intensity_si(self, nu_hz: ArrayLike) -> np.ndarray:
        # sum() is typed as possibly its start value 0; __init__ ensures >= 1 component
        return sum(c.mean_intensity_si(nu_hz) for c in self._components)  # type: ignore[return-value]

    def scaled(self, factor: float) -> RadiationField:
        return SumField([c.scaled(factor) for c in self._components])

    def attenuated(self, A_V: float, *, law: str = "G23", R_V: float = 3.1) -> RadiationField:
        """Each component attenuated by the same A_V (so ``components`` stay separable)."""
        curve = extinction_curve(law, R_V=R_V)
        return SumField([AttenuatedField(c, A_V, curve=curve) for c in self._components])

    def __repr__(self) -> str:
        return " + ".join(repr(c) for c in self._components)


class ExtinctionCurve:
    """A(lambda)/A(V) from a ``dust_extinction`` model, extended to all wavelengths.

    Parameters
    ----------
    law : str or dust_extinction model
        Class name in ``dust_extinction.parameter_averages`` (called with
        ``Rv=R_V``) or ``dust_extinction.averages``, or a model instance with
        ``x_range`` (inverse microns).
    R_V : float, keyword-only
        Total-to-selective extinction for parameter-dependent curves.

    Notes
    -----
    Inside the model's range the model is used as published. Longward of it,
    A(lambda)/A(V) continues as lambda^-2 from the last point (the far-infrared
    emissivity slope of big grains, common practice); shortward (only reached
    with a grid beyond 13.6 eV for curves that stop at 912 A, or curves such
    as CCM89 that stop at 0.1 um) it is held at the value at the short end.

    References
    ----------
    Gordon, K. D. 2024, JOSS, 9, 7023 (dust_extinction); Gordon, K. D., et al.
    2023, ApJ, 950, 86 (G23, the default curve).
    """

    def __init__(self, law: str | Any = "G23", *, R_V: float = 3.1) -> None:
        from dust_extinction import averages, parameter_averages

        if isinstance(law, str):
            if hasattr(parameter_averages, law) and law not in ("Drude1D", "Polynomial1D", "PowerLaw1D"):
                cls = getattr(parameter_averages, law)
                try:
                    model = cls(Rv=float(R_V))
                except Exception as err:  # dust_extinction raises InputParameterError/ValueError
                    raise InputError(f"extinction law {law!r}: R_V = {R_V!r} rejected ({err})") from err
            elif hasattr(averages, law):
                model = getattr(averages, law)()
            else:
                raise InputError(f"unknown extinction law {law!r}; use a dust_extinction class name "
                                 "such as 'G23', 'F19', 'CCM89' or 'G21_MWAvg'")
        else:
            model = law
        if not hasattr(model, "x_range"):
            raise InputError(f"extinction law {law!r} has no x_range; pass a dust_extinction model")
        self.model = model
        self.name = law if isinstance(law, str) else type(law).__name__
        #: hashable identity of the curve: (name, R_V) for a named law, else the model object
        self.key = (self.name, float(R_V)) if isinstance(law, str) else ("model", id(model))
        self._xmin, self._xmax = (float(v) for v in model.x_range)
        self._a_min = float(model(self._xmin / u.micron))
        self._a_max = float(model(self._xmax / u.micron))

    def a_over_av(self, nu_hz: ArrayLike) -> np.ndarray:
        """A(lambda)/A(V) at ``nu_hz`` (Hz, 1-D or any shape)."""
        nu = np.asarray(nu_hz, dtype=float)
        x = nu / C_LIGHT * 1e-6  # inverse microns
        xin = np.clip(x, self._xmin, self._xmax)
        inside = self.model(xin.ravel() / u.micron)
        a = np.asarray(inside, float).reshape(x.shape)
        a = np.where(x < self._xmin, self._a_min * (x / self._xmin) ** 2, a)
        return np.where(x > self._xmax, self._a_max, a)

    def tau_per_av(self, nu_hz: ArrayLike) -> np.ndarray:
        """Optical depth per magnitude of A_V, (ln 10 / 2.5) A(lambda)/A(V)."""
        return _TAU_PER_MAG * self.a_over_av(nu_hz)

    def __repr__(self) -> str:
        return f"ExtinctionCurve({self.name!r})"


@functools.lru_cache(maxsize=64)
def _named_curve(law: str, R_V: float) -> ExtinctionCurve:
    return ExtinctionCurve(law, R_V=R_V)


def extinction_curve(law: str | Any = "G23", *, R_V: float = 3.1) -> ExtinctionCurve:
    """An :class:`ExtinctionCurve`, shared (built once per process) for a named law and R_V."""
    if isinstance(law, str):
        return _named_curve(law, float(R_V))
    return ExtinctionCurve(law, R_V=R_V)


class AttenuatedField(RadiationField):
    """A field dimmed by exp(-tau_nu), tau_nu = A_V (ln 10 / 2.5) A(lambda)/A(V).

    Built by :meth:`RadiationField.attenuated`. Scattering is treated as loss
    (extinction, not absorption), the usual screen approximation for the field
    inside a cloud.
    """

    def __init__(self, field: RadiationField, A_V: float, *, curve: ExtinctionCurve) -> None:
        self.field = field
        self.A_V = float(A_V)
        if not (np.isfinite(self.A_V) and self.A_V >= 0):
            raise InputError(f"attenuated: A_V must be a finite number >= 0 (mag), got {A_V!r}")
        self.curve = curve

    def mean_intensity_si(self, nu_hz: ArrayLike) -> np.ndarray:
        return self.field.mean_intensity_si(nu_hz) * np.exp(-self.A_V * self.curve.tau_per_av(nu_hz))

    def scaled(self, factor: float) -> RadiationField:
        return AttenuatedField(self.field.scaled(factor), self.A_V, curve=self.curve)

    def __repr__(self) -> str:
        return f"({self.field!r}).attenuated(A_V={self.A_V:g}, law={self.curve.name!r})"
