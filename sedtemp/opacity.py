"""Dust opacity laws: power law, power law with UV/optical saturation, tabulated.

An opacity is a mass absorption coefficient kappa_nu in m^2 kg^-1 internally,
stated per unit *dust* mass or per unit *gas* mass (attribute ``per``); the
two differ by the gas-to-dust ratio, and models that take a dust mass need
``per="dust"`` while column-density models take ``per="gas"``.
"""

from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Any

import astropy.units as u
import numpy as np
from numpy.typing import ArrayLike

from ._units import read_two_columns, to_hz, to_si
from .constants import DEFAULT_GAS_TO_DUST, DEFAULT_GRAIN_DENSITY
from .errors import InputError

__all__ = [
    "DEFAULT_FIR_LAW_SHORTEST_UM",
    "DEFAULT_TABLE_BREAK_UM",
    "Opacity",
    "PowerLawOpacity",
    "SaturatedPowerLawOpacity",
    "TabulatedOpacity",
]

_KAPPA_SI = u.m**2 / u.kg
_KAPPA_PUBLIC = u.cm**2 / u.g
_PER_CHOICES = ("dust", "gas")
#: Shortest wavelength (um) at which a bare far-infrared power law is taken as
#: measured; at shorter wavelengths it is an extrapolation (common practice:
#: far-IR opacity laws are fitted longward of ~30 um).
DEFAULT_FIR_LAW_SHORTEST_UM = 30.0
#: Default break wavelength (um) of :class:`TabulatedOpacity`: beta changes the
#: slope only longward of it (common practice: the far-IR slope of grain
#: models is quoted beyond ~100 um).
DEFAULT_TABLE_BREAK_UM = 100.0
_C_UM_HZ = 2.99792458e14  # c in um Hz


def _check_per(per):
    if per not in _PER_CHOICES:
        raise InputError(f"per must be 'dust' or 'gas' (mass the opacity refers to), got {per!r}")
    return per


class Opacity:
    """Base class: a mass absorption coefficient kappa_nu.

    Subclasses implement :meth:`kappa_si`. ``beta`` is the far-infrared slope
    d ln kappa / d ln nu that fits vary; ``with_beta`` returns a copy with
    another slope.
    """

    per: str = "dust"
    beta: float = 0.0

    def kappa_si(self, nu_hz: ArrayLike, beta: ArrayLike | None = None) -> np.ndarray:  # pragma: no cover - abstract
        """kappa_nu in m^2 kg^-1 at ``nu_hz``; ``beta`` broadcasts against ``nu_hz``."""
        raise NotImplementedError

    def __call__(self, nu: u.Quantity | ArrayLike) -> u.Quantity:
        """kappa_nu as a Quantity in cm^2 g^-1 (``nu``: Quantity, or bare um)."""
        return (self.kappa_si(to_hz(nu, name="nu")) * _KAPPA_SI).to(_KAPPA_PUBLIC)

    def cache_key(self) -> tuple:
        """Hashable description of the law *except its beta* (tables are shared across beta).

        Two opacities with equal keys have equal ``kappa_si(nu, beta)`` for every
        beta. The default is the object's identity (never shared).
        """
        return ("object", id(self))

    @property
    def extrapolated_above_hz(self) -> float | None:
        """Frequency (Hz) above which the law is an extrapolation (None: valid everywhere)."""
        return None

    @property
    def pivot_hz(self) -> float:
        """Frequency (Hz) about which a change of beta tilts the law (kappa fixed there)."""
        raise NotImplementedError


class PowerLawOpacity(Opacity):
    """Power-law opacity kappa_nu = kappa0 (nu / nu0)^beta.

    Parameters
    ----------
    kappa0 : Quantity or float
        Opacity at ``nu0``; a bare number is in cm^2 g^-1.
    nu0 : Quantity or float
        Reference frequency or wavelength; a bare number is a frequency in Hz.
    beta : float, optional
        Emissivity index. Default 0 (grey).
    per : {"dust", "gas"}, keyword-only
        Whether ``kappa0`` is per unit dust mass or per unit gas mass.

    Examples
    --------
    >>> import astropy.units as u
    >>> kap = PowerLawOpacity(0.1 * u.cm**2 / u.g, 1 * u.THz, beta=2.0, per="gas")
    """

    def __init__(self, kappa0: u.Quantity | float, nu0: u.Quantity | float, beta: float = 0.0, *,
                 per: str = "dust") -> None:
        self.kappa0_si = float(to_si(kappa0, _KAPPA_SI, default_unit=_KAPPA_PUBLIC, name="kappa0"))
        self.nu0_hz = float(to_hz(nu0, default_unit=u.Hz, name="nu0"))
        if not self.kappa0_si > 0:
            raise InputError(f"kappa0 must be positive, got {kappa0!r}")
        if not self.nu0_hz > 0:
            raise InputError(f"nu0 must be positive, got {nu0!r}")
        self.beta = float(beta)
        self.per = _check_per(per)

    def kappa_si(self, nu_hz: ArrayLike, beta: ArrayLike | None = None) -> np.ndarray:
        b = self.beta if beta is None else np.asarray(beta, dtype=float)
        return self.kappa0_si * (np.asarray(nu_hz, dtype=float) / self.nu0_hz) ** b

    def with_beta(self, beta: float) -> PowerLawOpacity:
        """Copy of this opacity with another emissivity index."""
        return PowerLawOpacity(self.kappa0_si * _KAPPA_SI, self.nu0_hz * u.Hz, beta, per=self.per)

    def cache_key(self) -> tuple:
        return ("powerlaw", self.kappa0_si, self.nu0_hz, self.per)

    @property
    def pivot_hz(self) -> float:
        """The reference frequency nu0: beta tilts the law about it."""
        return self.nu0_hz

    @property
    def extrapolated_above_hz(self) -> float | None:
        """A bare far-IR law is extrapolated shortward of :data:`DEFAULT_FIR_LAW_SHORTEST_UM`."""
        return _C_UM_HZ / DEFAULT_FIR_LAW_SHORTEST_UM

    def __repr__(self) -> str:
        k = (self.kappa0_si * _KAPPA_SI).to_value(_KAPPA_PUBLIC)
        return (f"PowerLawOpacity(kappa0={k:.4g} cm2/g, nu0={self.nu0_hz:.4g} Hz, "
                f"beta={self.beta:g}, per={self.per!r})")


class TabulatedOpacity(Opacity):
    """Opacity interpolated (log-log) in a table of kappa against frequency or wavelength.

    Outside the table, kappa is extrapolated as a power law with the slope of
    the two end points. ``beta`` changes the far-infrared slope only: longward
    of the break wavelength lambda_b the table is tilted as
    (nu / nu_b)^(beta - beta_table); at and shortward of lambda_b (the UV,
    optical and mid-IR, which set the absorbed power) the table is used as
    given, whatever beta.

    Parameters
    ----------
    nu_or_wavelength : Quantity
        Table abscissa, frequency or wavelength (strictly positive).
    kappa : Quantity
        Opacity, convertible to cm^2 g^-1.
    per : {"dust", "gas"}, keyword-only
    break_wavelength : Quantity or float, keyword-only
        lambda_b; a bare number is in um. Default
        :data:`DEFAULT_TABLE_BREAK_UM` (100 um).

    Attributes
    ----------
    beta : float
        The table's own mean log-log slope longward of the break (between
        lambda_b and the longest tabulated wavelength; the end slope when the
        whole table lies longward of the break).
    break_nu_hz : float
        nu_b = c / lambda_b in Hz, the pivot of beta.

    Raises
    ------
    InputError
        Bad table, or a non-positive break wavelength.

    Examples
    --------
    >>> import astropy.units as u
    >>> tab = TabulatedOpacity([0.1, 1.0, 100.0, 1000.0] * u.um, [3e4, 1e4, 30.0, 0.4] * u.cm**2 / u.g)
    >>> bool(tab.kappa_si(3e15, beta=1.0) == tab.kappa_si(3e15, beta=2.5))
    True
    """

    def __init__(self, nu_or_wavelength: u.Quantity | ArrayLike, kappa: u.Quantity | ArrayLike, *,
                 per: str = "dust", break_wavelength: u.Quantity | float | None = None) -> None:
        nu = to_hz(nu_or_wavelength, name="table abscissa")
        k = to_si(kappa, _KAPPA_SI, default_unit=_KAPPA_PUBLIC, name="kappa")
        if nu.ndim != 1 or nu.shape != k.shape or nu.size < 2:
            raise InputError("opacity table needs two 1-D columns of equal length >= 2")
        if not (np.all(np.isfinite(nu)) and np.all(nu > 0) and np.all(np.isfinite(k)) and np.all(k > 0)):
            raise InputError("opacity table: frequencies and opacities must be finite and positive")
        order = np.argsort(nu)
        self._lnu = np.log(nu[order])
        self._lk = np.log(k[order])
        if np.any(np.diff(self._lnu) == 0):
            raise InputError("opacity table: repeated frequency or wavelength")
        self.per = _check_per(per)
        lam_b = DEFAULT_TABLE_BREAK_UM if break_wavelength is None else break_wavelength
        self.break_nu_hz = float(to_hz(lam_b, name="break_wavelength"))
        if not (np.isfinite(self.break_nu_hz) and self.break_nu_hz > 0):
            raise InputError(f"TabulatedOpacity: break_wavelength must be positive, got {break_wavelength!r}")
        self._lnb = np.log(self.break_nu_hz)
        lk_b = float(self._table(np.array(self._lnb)))
        if self._lnu[0] < self._lnb:
            self.beta = float((lk_b - self._lk[0]) / (self._lnb - self._lnu[0]))
        else:
            self.beta = float((self._lk[1] - self._lk[0]) / (self._lnu[1] - self._lnu[0]))

    @classmethod
    def from_file(cls, path: str | Path, *, per: str = "dust", format: str | None = None,
                  break_wavelength: u.Quantity | float | None = None) -> TabulatedOpacity:
        """Read a two-column table (ECSV, or ASCII with units in the column metadata).

        The first column is frequency or wavelength, the second kappa; both
        must carry units (e.g. an ECSV header). A column without a unit is an
        error, never a guess.
        """
        nu, kappa = read_two_columns(path, what="opacity table", example_units="um and cm2 / g",
                                     format=format)
        return cls(nu, kappa, per=per, break_wavelength=break_wavelength)

    def _table(self, lnu):
        lk = np.interp(lnu, self._lnu, self._lk)
        s_lo = (self._lk[1] - self._lk[0]) / (self._lnu[1] - self._lnu[0])
        s_hi = (self._lk[-1] - self._lk[-2]) / (self._lnu[-1] - self._lnu[-2])
        lk = np.where(lnu < self._lnu[0], self._lk[0] + s_lo * (lnu - self._lnu[0]), lk)
        return np.where(lnu > self._lnu[-1], self._lk[-1] + s_hi * (lnu - self._lnu[-1]), lk)

    def kappa_si(self, nu_hz: ArrayLike, beta: ArrayLike | None = None) -> np.ndarray:
        lnu = np.log(np.asarray(nu_hz, dtype=float))
        lk = self._table(lnu)
        if beta is not None:
            # tilt only longward of the break: exactly the table at nu >= nu_b
            lk = lk + (np.asarray(beta, float) - self.beta) * np.minimum(lnu - self._lnb, 0.0)
        return np.exp(lk)

    def cache_key(self) -> tuple:
        h = hashlib.blake2b(self._lnu.tobytes() + self._lk.tobytes(), digest_size=16).hexdigest()
        return ("table", h, self.break_nu_hz, self.per)

    @property
    def pivot_hz(self) -> float:
        """The break frequency: beta tilts the table about it."""
        return self.break_nu_hz

    @property
    def extrapolated_above_hz(self) -> float | None:
        """Above the highest tabulated frequency kappa is an extrapolation."""
        return float(np.exp(self._lnu[-1]))

    def __repr__(self) -> str:
        return (f"TabulatedOpacity({self._lnu.size} nodes, break at {_C_UM_HZ / self.break_nu_hz:.4g} um, "
                f"beta={self.beta:.4g}, per={self.per!r})")


class SaturatedPowerLawOpacity(Opacity):
    """Power law kappa0 (nu/nu0)^beta capped at a UV/optical saturation level.

    A grain cannot absorb more than its geometric cross-section (absorption
    efficiency Q_abs <= ~1 once 2 pi a / lambda > 1), so the far-infrared power
    law, extended to starlight, must flatten. Two parametrisations (give exactly
    one):

    * ``grain_radius``: the cap is the geometric cross-section per unit mass,
      kappa_sat = 3 / (4 a rho) (per dust mass; divided by ``gas_to_dust`` when
      ``per="gas"``). The cap does not depend on beta; the break frequency is
      where the power law reaches it.
    * ``break_wavelength``: the law is flat above nu_b = c / lambda_b,
      kappa = kappa0 (min(nu, nu_b) / nu0)^beta, so the cap follows beta.

    Parameters
    ----------
    kappa0 : Quantity or float
        Far-infrared opacity at ``nu0``; a bare number is in cm^2 g^-1.
    nu0 : Quantity or float
        Reference frequency or wavelength; a bare number is a frequency in Hz.
    beta : float, optional
        Far-infrared emissivity index (default 0).
    grain_radius : Quantity or float, keyword-only
        Grain radius a; a bare number is in micrometres.
    grain_density : Quantity or float, keyword-only
        Material density rho; a bare number is in g cm^-3. Default
        :data:`sedtemp.constants.DEFAULT_GRAIN_DENSITY` (3 g cm^-3).
    break_wavelength : Quantity or float, keyword-only
        Wavelength (or frequency) of the break; a bare number is in micrometres.
    per : {"dust", "gas"}, keyword-only
    gas_to_dust : float, keyword-only
        Gas-to-dust mass ratio, used only with ``grain_radius`` and
        ``per="gas"``. Default 100.

    Raises
    ------
    InputError
        Neither or both of ``grain_radius`` and ``break_wavelength``; a
        non-positive radius, density, wavelength or gas-to-dust ratio.

    Notes
    -----
    kappa_nu = min(kappa0 (nu/nu0)^beta, kappa_sat), kappa_sat = 3 Q / (4 a rho)
    with Q = 1 (geometric optics limit of a sphere: cross-section pi a^2 over
    mass 4/3 pi a^3 rho).

    References
    ----------
    Draine, B. T. 2011, Physics of the Interstellar and Intergalactic Medium
    (Princeton), ch. 22 (Q_abs -> 1 for 2 pi a >> lambda).

    Examples
    --------
    >>> import astropy.units as u
    >>> kap = SaturatedPowerLawOpacity(10 * u.cm**2 / u.g, 1 * u.THz, 2.0,
    ...                                grain_radius=0.1 * u.um)
    """

    def __init__(self, kappa0: u.Quantity | float, nu0: u.Quantity | float, beta: float = 0.0, *,
                 grain_radius: u.Quantity | float | None = None,
                 grain_density: u.Quantity | float | None = None,
                 break_wavelength: u.Quantity | float | None = None, per: str = "dust",
                 gas_to_dust: float = DEFAULT_GAS_TO_DUST) -> None:
        self._law = PowerLawOpacity(kappa0, nu0, beta, per=per)
        self.kappa0_si, self.nu0_hz = self._law.kappa0_si, self._law.nu0_hz
        self.beta, self.per = self._law.beta, self._law.per
        if (grain_radius is None) == (break_wavelength is None):
            raise InputError("SaturatedPowerLawOpacity: give exactly one of grain_radius "
                             "(e.g. 0.1 * u.um) or break_wavelength (e.g. 10 * u.um)")
        self.gas_to_dust = float(gas_to_dust)
        if not self.gas_to_dust > 0:
            raise InputError(f"gas_to_dust must be positive, got {gas_to_dust!r}")
        self.grain_radius_m = self.grain_density_si = self.break_nu_hz = None
        if grain_radius is not None:
            a = float(to_si(grain_radius, u.m, default_unit=u.um, name="grain_radius"))
            rho = DEFAULT_GRAIN_DENSITY if grain_density is None else float(
                to_si(grain_density, u.kg / u.m**3, default_unit=u.g / u.cm**3, name="grain_density"))
            if not (a > 0 and rho > 0):
                raise InputError(f"grain_radius and grain_density must be positive, "
                                 f"got {grain_radius!r} and {grain_density!r}")
            self.grain_radius_m, self.grain_density_si = a, rho
            sat = 3.0 / (4.0 * a * rho)
            self._kappa_sat_si = sat / self.gas_to_dust if self.per == "gas" else sat
        else:
            nub = float(to_hz(break_wavelength, name="break_wavelength"))
            if not nub > 0:
                raise InputError(f"break_wavelength must be positive, got {break_wavelength!r}")
            self.break_nu_hz = nub

    def kappa_si(self, nu_hz: ArrayLike, beta: ArrayLike | None = None) -> np.ndarray:
        nu = np.asarray(nu_hz, dtype=float)
        if self.break_nu_hz is not None:
            return self._law.kappa_si(np.minimum(nu, self.break_nu_hz), beta)
        return np.minimum(self._law.kappa_si(nu, beta), self._kappa_sat_si)

    def saturation_si(self, beta: ArrayLike | None = None) -> np.ndarray:
        """The cap kappa_sat in m^2 kg^-1 (an array if ``beta`` is, for ``break_wavelength``)."""
        if self.break_nu_hz is not None:
            return self._law.kappa_si(self.break_nu_hz, beta)
        return self._kappa_sat_si + 0.0 * np.asarray(0.0 if beta is None else beta, float)

    def with_beta(self, beta: float) -> SaturatedPowerLawOpacity:
        """Copy of this opacity with another far-infrared emissivity index."""
        kw: dict[str, Any] = dict(per=self.per, gas_to_dust=self.gas_to_dust)
        if self.break_nu_hz is not None:
            kw["break_wavelength"] = self.break_nu_hz * u.Hz
        else:
            kw.update(grain_radius=self.grain_radius_m * u.m,
                      grain_density=self.grain_density_si * u.kg / u.m**3)
        return SaturatedPowerLawOpacity(self.kappa0_si * _KAPPA_SI, self.nu0_hz * u.Hz, beta, **kw)

    def cache_key(self) -> tuple:
        cap = ("break", self.break_nu_hz) if self.break_nu_hz is not None else (
            "grain", self.grain_radius_m, self.grain_density_si, self.gas_to_dust)
        return ("saturated", self.kappa0_si, self.nu0_hz, self.per, *cap)

    @property
    def pivot_hz(self) -> float:
        """The reference frequency nu0 of the far-IR law."""
        return self.nu0_hz

    def __repr__(self) -> str:
        k = (self.kappa0_si * _KAPPA_SI).to_value(_KAPPA_PUBLIC)
        cap = (f"break at {self.break_nu_hz:.4g} Hz" if self.break_nu_hz is not None
               else f"grain_radius={self.grain_radius_m * 1e6:.4g} um")
        return (f"SaturatedPowerLawOpacity(kappa0={k:.4g} cm2/g, nu0={self.nu0_hz:.4g} Hz, "
                f"beta={self.beta:g}, {cap}, per={self.per!r})")
