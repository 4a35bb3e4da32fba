"""Tests of sedtemp.emission: the one emitted-power table, its inversion, its cache."""

import pickle

import astropy.units as u
import numpy as np
import pytest
from scipy.integrate import quad

from sedtemp.emission import (
    BETA_RANGE,
    EmissionTable,
    emission_table,
    powerlaw_emitted_power,
    register_table,
)
from sedtemp.errors import InputError
from sedtemp.opacity import PowerLawOpacity, SaturatedPowerLawOpacity, TabulatedOpacity
from sedtemp.planck import _planck_nu_si

PL = PowerLawOpacity(10.0, 1e12, 2.0)
BIG = SaturatedPowerLawOpacity(10.0, 1e12, 2.0, grain_radius=0.1 * u.um)
TAB = TabulatedOpacity(np.array([0.1, 1.0, 10.0, 100.0, 1000.0]) * u.um,
                       np.array([3e4, 1e4, 8e2, 30.0, 0.4]) * u.cm**2 / u.g)


def _quad_power(opacity, t, beta):
    """4 pi int kappa B dnu by scipy.integrate.quad in ln nu (reference library)."""
    def f(x):
        nu = np.exp(x)
        return 4 * np.pi * float(opacity.kappa_si(nu, beta)) * float(_planck_nu_si(nu, t)) * nu
    lo, hi = np.log(1e7), np.log(3e16)
    pts = np.log(np.array([1e11, 1e12, 1e13, 1e14, 1e15]))
    return quad(f, lo, hi, points=pts, limit=400, epsabs=0.0, epsrel=1e-11)[0]


def test_power_law_table_matches_the_exact_result():
    # exact analytic solution: 4 pi kappa0 nu0^-beta (2h/c^2)(kT/h)^(4+beta) Gamma zeta;
    # table (bicubic in ln T, beta) to 1e-7, inverted T to 1e-8, over T 2-2000 K, beta 0-5
    rng = np.random.default_rng(3)
    t = np.exp(rng.uniform(np.log(2.0), np.log(2000.0), 2000))
    b = rng.uniform(*BETA_RANGE, 2000)
    exact = powerlaw_emitted_power(t, b, PL.kappa0_si, PL.nu0_hz)
    tab = emission_table(PL)
    np.testing.assert_allclose(tab.power(t, b), exact, rtol=1e-7)
    np.testing.assert_allclose(tab.temperature(exact, b), t, rtol=1e-8)


@pytest.mark.parametrize("opacity", [BIG, TAB], ids=["saturated", "table"])
@pytest.mark.parametrize("t, beta", [(4.0, 1.0), (15.0, 1.8), (40.0, 2.5), (300.0, 0.5), (1500.0, 2.0)])
def test_table_matches_quad_and_inverts_to_1e5(opacity, t, beta):
    # reference: scipy.integrate.quad of the same integrand; the table's trapezoid
    # rule and spline agree to 1e-5 in P (kinks of the UV cap and of the table's
    # log-log interpolation limit the trapezoid rule), so T to 1e-5 / (4 + beta)
    ref = _quad_power(opacity, t, beta)
    tab = emission_table(opacity)
    assert float(tab.power(t, beta)) == pytest.approx(ref, rel=1e-5)
    assert float(tab.temperature(ref, beta)) == pytest.approx(t, rel=1e-5)


def test_cache_is_keyed_on_parameters_and_ships_by_pickle():
    # equal parameters -> the same table object (built once per process); beta is not in the key
    assert emission_table(PowerLawOpacity(10.0, 1e12, 1.5)) is emission_table(PL)
    assert emission_table(PowerLawOpacity(11.0, 1e12, 2.0)) is not emission_table(PL)
    tab = emission_table(BIG)
    blob = pickle.dumps(tab)
    assert len(blob) < 1_000_000  # grid only, the spline is rebuilt on arrival
    back = pickle.loads(blob)
    assert isinstance(back, EmissionTable) and back.key == tab.key
    np.testing.assert_array_equal(back.power([10.0, 30.0], [1.5, 2.0]), tab.power([10.0, 30.0], [1.5, 2.0]))
    register_table(back)
    assert emission_table(BIG) is back
    with pytest.raises(InputError, match="register_table needs an EmissionTable"):
        register_table({"key": 1})


def test_zero_power_is_zero_kelvin_and_outside_the_table_stays_a_power_law():
    tab = emission_table(PL)
    assert tab.temperature(0.0, 2.0) == 0.0
    # below 0.5 K the table continues linearly in ln T: exact for a power law
    exact = powerlaw_emitted_power(0.2, 2.0, PL.kappa0_si, PL.nu0_hz)
    assert float(tab.temperature(exact, 2.0)) == pytest.approx(0.2, rel=1e-8)


BREAK = SaturatedPowerLawOpacity(10.0, 1e12, 2.0, break_wavelength=10.0 * u.um)
SMALL = SaturatedPowerLawOpacity(10.0, 1e12, 2.0, grain_radius=0.01 * u.um)


@pytest.mark.parametrize("opacity", [BIG, SMALL, BREAK, TAB], ids=["cap-0.1um", "cap-0.01um", "break", "table"])
def test_inverted_temperature_matches_quad_to_1e5_up_to_5000_k(opacity):
    # reference: scipy.integrate.quad of 4 pi int kappa B_nu(T) dnu (_quad_power). The stated
    # accuracy of the inversion is 1e-5 relative in T over the whole table (0.5-5000 K) and
    # BETA_RANGE, betas off the table's nodes included. Hot UV-capped dust (T > 2000 K, the Planck
    # peak crossing the cap's break) is where ln P bends most in beta: (4990 K, 1.1729) missed
    # 1e-5 (1.5e-5) with beta nodes 0.05 apart; measured worst now ~1e-6.
    rng = np.random.default_rng(11)
    t = np.concatenate([[4990.0, 4000.0, 2500.0, 2100.0], rng.uniform(2000.0, 5000.0, 6),
                        np.exp(rng.uniform(np.log(2.0), np.log(2000.0), 6))])
    b = np.concatenate([[1.1729, 1.23, 1.4245, 0.77], rng.uniform(*BETA_RANGE, 12)])
    ref = np.array([_quad_power(opacity, ti, bi) for ti, bi in zip(t, b, strict=True)])
    np.testing.assert_allclose(emission_table(opacity).temperature(ref, b), t, rtol=1e-5)


@pytest.mark.parametrize("opacity", [PL, BIG, SMALL, TAB], ids=["power-law", "cap-0.1um", "cap-0.01um", "table"])
def test_inversion_is_the_root_of_the_forward_spline(opacity):
    # the cheap inverse (per beta node, linear) is only a first guess: the Newton polish on the
    # forward spline must give its root to the 1e-10 in ln T the docstring states (2e-10 allows
    # for rounding), inside the table, across its edges (0.5 K, 5000 K) and beyond them
    tab = emission_table(opacity)
    rng = np.random.default_rng(12)
    lnt = np.concatenate([rng.uniform(np.log(0.01), np.log(2e4), 20000),
                          np.log(rng.uniform(4990.0, 5010.0, 500)), np.log(rng.uniform(0.49, 0.51, 500))])
    b = rng.uniform(*BETA_RANGE, lnt.size)
    got = np.log(tab.temperature(tab.power(np.exp(lnt), b), b))
    np.testing.assert_allclose(got, lnt, rtol=0, atol=2e-10)
