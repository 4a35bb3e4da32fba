"""Grains and gas-dust media: heat capacity, heating and cooling times, stochastic heating.

A :class:`Grain` carries the Draine & Li (2001) heat capacity; a
:class:`GasDustMedium` the thermal energy of thermally coupled gas. The
stochastic-heating check asks whether single photons of the absorbed
spectrum carry more energy than the grain holds at T_eq, in which case the
grain's temperature spikes and T_eq does not describe it.
"""

from __future__ import annotations

from dataclasses import dataclass

import astropy.constants as const
import astropy.units as u
import numpy as np
from numpy.typing import ArrayLike

from ._units import to_kelvin, to_si
from .absorption import frequency_grid
from .constants import DEFAULT_GAS_TO_DUST, DEFAULT_GRAIN_DENSITY, M_HYDROGEN
from .emission import check_beta
from .equilibrium import absorbed_power, emitted_power, temperature_for_power
from .errors import InputError
from .opacity import Opacity
from .planck import H_PLANCK, K_BOLTZMANN
from .radiation import RadiationField

__all__ = [
    "HARD_POWER_FRACTION",
    "GasDustMedium",
    "Grain",
    "StochasticCheck",
    "cooling_timescale",
    "heating_timescale",
    "stochastic_heating_check",
]

_AMU = const.u.si.value
#: A grain is stochastically heated when more than this fraction of its
#: absorbed power arrives in photons each carrying more energy than the grain
#: holds at T_eq (a choice of this package; see :func:`stochastic_heating_check`).
HARD_POWER_FRACTION = 0.1


# ------------------------------------------------------------ heat capacity
def _debye_energy(t, theta, n, n_nodes=48):
    """Energy of an n-dimensional Debye mode set per degree of freedom / k (K): int_0^T f_n(T'/theta) dT'.

    E_n = n theta int_0^1 y^n / (exp(y theta / T) - 1) dy, whose T-derivative is
    the f_n of Draine & Li (2001, eq. 10). Gauss-Legendre on [0, y_max] with
    y_max = min(1, 60 T/theta) so low temperatures stay resolved.
    """
    x, wts = np.polynomial.legendre.leggauss(n_nodes)
    t = np.asarray(t, float)[..., None]
    ymax = np.minimum(1.0, 60.0 * t / theta)
    y = (x + 1) / 2 * ymax
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        g = y**n / np.expm1(y * theta / t)
    g = np.where(np.isfinite(g), g, 0.0)
    return n * theta * np.sum(wts * g, axis=-1) * ymax[..., 0] / 2


def _debye_f(x, n, n_nodes=48):
    """f_n(x) = n int_0^1 y^(n+1) e^(y/x) / (e^(y/x) - 1)^2 dy / x^2 (Draine & Li 2001, eq. 10)."""
    g_x, wts = np.polynomial.legendre.leggauss(n_nodes)
    x = np.asarray(x, float)[..., None]
    ymax = np.minimum(1.0, 60.0 * x)
    y = (g_x + 1) / 2 * ymax
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        e = np.exp(-y / x)
        g = y ** (n + 1) * e / (-np.expm1(-y / x)) ** 2 / x**2
    g = np.where(np.isfinite(g), g, 0.0)
    return n * np.sum(wts * g, axis=-1) * ymax[..., 0] / 2


#: Draine & Li (2001, ApJ 551, 807, eqs. 9 and 11, from memory): heat capacity
#: C = (N - 2) k sum_i c_i f_{n_i}(T / theta_i); (c, n, theta) per material,
#: with the material density and mean atomic mass (g cm^-3, amu).
_MATERIALS = {
    "silicate": {"modes": ((2.0, 2, 500.0), (1.0, 3, 1500.0)), "atom_mass": 172.2 / 7},
    "graphite": {"modes": ((1.0, 2, 863.0), (2.0, 2, 2504.0)), "atom_mass": 12.011},
}


class Grain:
    """A spherical grain with the Draine & Li (2001) heat capacity.

    Parameters
    ----------
    radius : Quantity or float
        Grain radius; a bare number is in micrometres.
    material : {"silicate", "graphite"}, keyword-only
        Heat-capacity law (Draine & Li 2001 eq. 11 for silicate, eq. 9 for
        graphite) and mean atomic mass (MgFeSiO4: 24.6 amu; carbon: 12.011 amu).
    density : Quantity or float, keyword-only
        Material density; a bare number is in g cm^-3. Default
        :data:`sedtemp.constants.DEFAULT_GRAIN_DENSITY` (3 g cm^-3), the
        density the UV cap of :class:`~sedtemp.opacity.SaturatedPowerLawOpacity`
        assumes, so a grain and the opacity of its size agree.

    Notes
    -----
    C(T) = (N_a - 2) k [2 f_2(T/500 K) + f_3(T/1500 K)] (silicate),
    C(T) = (N_C - 2) k [f_2(T/863 K) + 2 f_2(T/2504 K)] (graphite); C ->
    3 (N - 2) k at high T (Dulong-Petit).

    References
    ----------
    Draine, B. T., & Li, A. 2001, ApJ, 551, 807 (equations quoted from memory).
    """

    def __init__(self, radius: u.Quantity | float, *, material: str = "silicate",
                 density: u.Quantity | float | None = None) -> None:
        if material not in _MATERIALS:
            raise InputError(f"Grain: material must be one of {sorted(_MATERIALS)}, got {material!r}")
        spec = _MATERIALS[material]
        self.material = material
        self.radius_m = float(to_si(radius, u.m, default_unit=u.um, name="radius"))
        rho = DEFAULT_GRAIN_DENSITY if density is None else float(
            to_si(density, u.kg / u.m**3, default_unit=u.g / u.cm**3, name="density"))
        if not (self.radius_m > 0 and rho > 0):
            raise InputError(f"Grain: radius and density must be positive, got {radius!r} and {density!r}")
        self.density_si = rho
        self.mass_kg = 4.0 / 3.0 * np.pi * self.radius_m**3 * rho
        self.n_atoms = self.mass_kg / (spec["atom_mass"] * _AMU)
        self._modes = spec["modes"]

    def heat_capacity_si(self, temperature: u.Quantity | ArrayLike) -> np.ndarray:
        """C(T) in J K^-1 (bare temperatures in K)."""
        t = np.asarray(to_kelvin(temperature), float)
        c = sum(ci * _debye_f(t / th, n) for ci, n, th in self._modes)
        return max(self.n_atoms - 2.0, 0.0) * K_BOLTZMANN * c

    def thermal_energy_si(self, temperature: u.Quantity | ArrayLike) -> np.ndarray:
        """E(T) = int_0^T C dT' in J."""
        t = np.asarray(to_kelvin(temperature), float)
        e = sum(ci * _debye_energy(t, th, n) for ci, n, th in self._modes)
        return max(self.n_atoms - 2.0, 0.0) * K_BOLTZMANN * e

    def dust_mass_si(self, opacity: Opacity) -> float:
        """Mass the opacity refers to, per grain (kg); needs ``per="dust"``."""
        if opacity.per != "dust":
            raise InputError("grain timescales need an opacity per dust mass (per='dust'); "
                             f"got per={opacity.per!r}")
        return self.mass_kg

    def __repr__(self) -> str:
        return f"Grain(radius={self.radius_m * 1e6:.4g} um, material={self.material!r})"


class GasDustMedium:
    """Thermally coupled gas and dust with energy 3/2 n k T per unit volume.

    Parameters
    ----------
    density : Quantity or float
        Number density n of gas particles; a bare number is in cm^-3.
    mu : float, keyword-only
        Mean particle mass in units of m_H (default 2.37, molecular gas with
        helium; common practice).
    gas_to_dust : float, keyword-only
        Gas-to-dust mass ratio (default 100, common practice).
    """

    def __init__(self, density: u.Quantity | float, *, mu: float = 2.37,
                 gas_to_dust: float = DEFAULT_GAS_TO_DUST) -> None:
        self.n_si = float(to_si(density, u.m**-3, default_unit=u.cm**-3, name="density"))
        self.mu, self.gas_to_dust = float(mu), float(gas_to_dust)
        if not (self.n_si > 0 and self.mu > 0 and self.gas_to_dust > 0):
            raise InputError("GasDustMedium: density, mu and gas_to_dust must be positive")
        self.gas_density_si = self.n_si * self.mu * M_HYDROGEN

    def thermal_energy_si(self, temperature: u.Quantity | ArrayLike) -> np.ndarray:
        """3/2 n k T in J m^-3."""
        return 1.5 * self.n_si * K_BOLTZMANN * np.asarray(to_kelvin(temperature), float)

    def dust_mass_si(self, opacity: Opacity) -> float:
        """Mass per m^3 that the opacity refers to (gas or dust), kg m^-3."""
        return self.gas_density_si if opacity.per == "gas" else self.gas_density_si / self.gas_to_dust

    def __repr__(self) -> str:
        return f"GasDustMedium(n={self.n_si * 1e-6:.4g} cm-3, mu={self.mu:g})"


def _check_body(body):
    if not hasattr(body, "thermal_energy_si") or not hasattr(body, "dust_mass_si"):
        raise InputError(f"body must be a Grain or GasDustMedium, got {type(body).__name__}")


def heating_timescale(field: RadiationField, opacity: Opacity, body: Grain | GasDustMedium, *,
                      scale: ArrayLike | None = None, beta: ArrayLike | None = None,
                      nu_grid: ArrayLike | None = None) -> u.Quantity:
    """Time to absorb the thermal energy held at T_eq: t_heat = E(T_eq) / P_abs, a Quantity in s.

    Parameters
    ----------
    field : RadiationField
    opacity : Opacity
    body : Grain or GasDustMedium
        A single grain (energy from its heat capacity) or a coupled medium
        (energy 3/2 n k T per m^3).
    scale, beta, nu_grid : keyword-only
        As in :func:`equilibrium_temperature`.
    """
    _check_body(body)
    b = check_beta(opacity.beta if beta is None else beta, "heating_timescale")
    p = absorbed_power(field, opacity, beta=b, nu_grid=nu_grid)
    p = p if scale is None else p * np.asarray(scale, float)
    t_eq = temperature_for_power(p, opacity, beta=b)
    with np.errstate(divide="ignore"):
        return body.thermal_energy_si(t_eq) / (p * body.dust_mass_si(opacity)) * u.s


def cooling_timescale(temperature: u.Quantity | ArrayLike, opacity: Opacity, body: Grain | GasDustMedium, *,
                      beta: ArrayLike | None = None) -> u.Quantity:
    """Radiative cooling time t_cool = E(T) / P_emit(T), a Quantity in s.

    Parameters
    ----------
    temperature : Quantity or array_like
        Dust temperature (bare numbers in K).
    opacity : Opacity
    body : Grain or GasDustMedium
    beta : array_like, keyword-only
    """
    _check_body(body)
    t = np.asarray(to_kelvin(temperature), float)
    if np.any(~(t > 0)):
        raise InputError("cooling_timescale: temperature must be positive (K)")
    p = emitted_power(t, opacity, beta=beta) * body.dust_mass_si(opacity)
    return body.thermal_energy_si(t) / p * u.s



# -------------------------------------------------------- stochastic heating
@dataclass(frozen=True)
class StochasticCheck:
    """Result of :func:`stochastic_heating_check` (arrays of the broadcast shape).

    Attributes
    ----------
    T_eq : Quantity (K)
    thermal_energy : Quantity (eV)
        E(T_eq), the grain's energy content at T_eq.
    hard_photon_energy : Quantity (eV)
        The photon energy above which :data:`HARD_POWER_FRACTION` of the
        absorbed power arrives.
    hard_power_fraction : ndarray
        Fraction of the absorbed power in photons with h nu > E(T_eq).
    stochastic : ndarray of bool
        hard_power_fraction > HARD_POWER_FRACTION, the same as
        thermal_energy < hard_photon_energy.
    """

    T_eq: u.Quantity
    thermal_energy: u.Quantity
    hard_photon_energy: u.Quantity
    hard_power_fraction: np.ndarray
    stochastic: np.ndarray


def _cumulative_from_top(field, opacity, b_uniq, nu, w):
    """(n_uniq, n_nu): fraction of the absorbed power above each grid frequency, per beta."""
    j = field.mean_intensity_si(nu)
    dp = opacity.kappa_si(nu[None, :], b_uniq[:, None]) * (w * j)[None, :]
    tot = dp.sum(axis=1, keepdims=True)
    if not np.all(tot > 0):
        raise InputError(f"stochastic_heating_check: the field {field!r} is not absorbed at all")
    return np.cumsum(dp[:, ::-1], axis=1)[:, ::-1] / tot


def stochastic_heating_check(field: RadiationField, opacity: Opacity, grain: Grain, *,
                             scale: ArrayLike | None = None, beta: ArrayLike | None = None,
                             nu_grid: ArrayLike | None = None) -> StochasticCheck:
    """Flag grains that are stochastically heated rather than in equilibrium.

    Parameters
    ----------
    field : RadiationField
    opacity : Opacity
        Per dust mass.
    grain : Grain
    scale, beta, nu_grid : keyword-only
        As in :func:`sedtemp.equilibrium.equilibrium_temperature` (any shapes
        that broadcast).

    Returns
    -------
    StochasticCheck

    Raises
    ------
    InputError
        Not a Grain, an opacity per gas mass, or a field that is not absorbed.

    Notes
    -----
    One criterion: a grain is stochastically heated when more than
    :data:`HARD_POWER_FRACTION` (10 %) of its absorbed power arrives in
    photons of energy h nu > E(T_eq), each of which heats the grain far above
    T_eq on its own. Equivalently E(T_eq) is below the photon energy above
    which 10 % of the power arrives (~10 eV in the interstellar field).
    Draine & Li (2001) and Draine (2003, ARA&A 41, 241, sec. 7) find grains
    below ~50-100 A transiently heated in the solar-neighbourhood field
    (from memory); this criterion flags a 50 A silicate grain in the ISRF
    and passes a 0.1 um one (tests/test_grains.py). The spectral shape is
    the field's; ``scale`` changes T_eq only.

    References
    ----------
    Draine, B. T., & Li, A. 2001, ApJ, 551, 807; Draine, B. T. 2003, ARA&A,
    41, 241 (both from memory).
    """
    if not isinstance(grain, Grain):
        raise InputError(f"stochastic_heating_check needs a Grain, got {type(grain).__name__}")
    if not isinstance(field, RadiationField):
        raise InputError(f"stochastic_heating_check: field must be a radiation field, got {field!r}")
    grain.dust_mass_si(opacity)  # refuses an opacity per gas mass
    b = check_beta(opacity.beta if beta is None else beta, "stochastic_heating_check")
    s = 1.0 if scale is None else np.asarray(scale, float)
    p = absorbed_power(field, opacity, beta=b, nu_grid=nu_grid) * s
    t_eq = temperature_for_power(p, opacity, beta=b)
    energy = grain.thermal_energy_si(t_eq)
    b, energy = np.broadcast_arrays(b, energy)
    nu, w = frequency_grid(nu_grid)
    uniq, inv = np.unique(b, return_inverse=True)
    above = _cumulative_from_top(field, opacity, uniq, nu, w)  # few distinct betas, not sources
    lnu = np.log(nu)
    x = np.log(np.maximum(energy.ravel(), 1e-300) / H_PLANCK)
    k = np.clip(np.searchsorted(lnu, x) - 1, 0, nu.size - 2)
    f = np.clip((x - lnu[k]) / (lnu[k + 1] - lnu[k]), 0.0, 1.0)
    rows = inv.ravel()
    frac = (1 - f) * above[rows, k] + f * above[rows, k + 1]
    frac = np.where(x < lnu[0], 1.0, np.where(x > lnu[-1], 0.0, frac)).reshape(b.shape)
    hard = np.array([np.interp(HARD_POWER_FRACTION, a[::-1], nu[::-1]) for a in above])[inv].reshape(b.shape)
    ev = u.J.to(u.eV)
    return StochasticCheck(np.broadcast_to(t_eq, b.shape) * u.K, energy * ev * u.eV,
                           hard * H_PLANCK * ev * u.eV, frac, frac > HARD_POWER_FRACTION)
