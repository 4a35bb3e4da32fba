"""Planck function and its integrals against astropy and exact results."""

import astropy.units as u
import numpy as np
import pytest
from astropy.modeling.physical_models import BlackBody

from sedtemp.errors import InputError
from sedtemp.planck import (
    SIGMA_SB,
    WIEN_X_NU,
    _planck_nu_si,
    planck_integral,
    planck_mean_powerlaw,
    planck_nu,
    powerlaw_planck_integral,
    wien_peak_x,
)


def test_planck_matches_astropy_blackbody():
    # Reference: astropy.modeling.physical_models.BlackBody. Both evaluate the
    # same closed form in double precision, so agreement to 1e-10 is expected.
    wav = np.geomspace(10, 5000, 200) * u.um
    for t in (2.725, 10.0, 20.0, 100.0, 1500.0):
        ref = BlackBody(temperature=t * u.K)(wav).to(u.W / u.m**2 / u.Hz / u.sr)
        got = planck_nu(wav, t * u.K)
        np.testing.assert_allclose(got.value, ref.value, rtol=1e-10)


def test_planck_broadcasts_and_accepts_frequency():
    nu = np.geomspace(1e10, 1e14, 7) * u.Hz
    t = np.array([5.0, 20.0, 80.0])[:, None] * u.K
    b = planck_nu(nu, t)
    assert b.shape == (3, 7)
    with np.errstate(over="ignore"):  # astropy's own expm1 overflows at x ~ 960; ours must not
        ref = BlackBody(temperature=t)(nu).to(u.W / u.m**2 / u.Hz / u.sr)  # astropy reference
    np.testing.assert_allclose(b.value, ref.value, rtol=1e-10)


def test_planck_no_overflow_warning_and_zero_at_large_x():
    # x = h nu / k T up to 1e4 must give 0 silently (pytest turns warnings into errors).
    t = 1.0
    nu = np.array([1e4, 1e3, 700.0]) * 1.380649e-23 * t / 6.62607015e-34
    b = _planck_nu_si(nu, t)
    assert b[0] == 0.0
    assert np.all(np.isfinite(b)) and np.all(b >= 0)
    # T = 0 and nu = 0 are limits equal to zero, not NaN.
    assert _planck_nu_si(1e12, 0.0) == 0.0
    assert _planck_nu_si(0.0, 20.0) == 0.0


def test_planck_rejects_wrong_unit():
    with pytest.raises(InputError, match="nu: unit kg is neither a frequency nor a wavelength"):
        planck_nu(3 * u.kg, 20 * u.K)
    with pytest.raises(InputError, match="temperature: unit m is not a temperature"):
        planck_nu(250 * u.um, 3 * u.m)


def test_integral_is_stefan_boltzmann():
    # Reference: Stefan-Boltzmann law, int B_nu dnu = sigma T^4 / pi (exact), with
    # sigma from astropy.constants; checked against numerical quadrature of B_nu.
    for t in (3.0, 17.0, 300.0):
        nu = np.geomspace(1e6, 1e17, 200001)
        numeric = np.trapezoid(_planck_nu_si(nu, t), nu)
        exact = planck_integral(t * u.K).value
        assert exact == pytest.approx(SIGMA_SB * t**4 / np.pi, rel=1e-14)
        # 2e5 log-spaced trapezoid nodes over 11 decades: error ~1e-8 relative
        assert numeric == pytest.approx(exact, rel=1e-6)


@pytest.mark.parametrize("beta", [-1.0, 0.0, 1.0, 1.8, 2.5])
def test_powerlaw_planck_integral_quadrature(beta):
    # Exact analytic: int nu^(3+beta)/(e^x-1) = Gamma(4+beta) zeta(4+beta) (kT/h)^(4+beta)
    # (standard Bose-Einstein integral); compared with numerical quadrature.
    t, nu0 = 25.0, 1e12
    nu = np.geomspace(1e7, 1e16, 400001)
    numeric = np.trapezoid((nu / nu0) ** beta * _planck_nu_si(nu, t), nu)
    exact = powerlaw_planck_integral(t, beta, nu0 * u.Hz).value
    assert numeric == pytest.approx(exact, rel=1e-6)
    pm = planck_mean_powerlaw(t, beta, nu0 * u.Hz)
    assert pm == pytest.approx(exact / (SIGMA_SB * t**4 / np.pi), rel=1e-12)


@pytest.mark.parametrize("beta", [0.0, 1.0, 1.5, 2.0])
def test_peak_matches_wien_condition(beta):
    # Reference: Wien displacement condition for nu^beta B_nu, x = (3+beta)(1-e^-x)
    # (exact analytic, from d/dnu = 0). Peak located on a fine grid.
    x_root = wien_peak_x(beta)
    assert x_root == pytest.approx((3 + beta) * (1 - np.exp(-x_root)), rel=1e-13)
    t = 30.0
    nu = np.linspace(1e11, 1e13, 2_000_001)
    s = nu**beta * _planck_nu_si(nu, t)
    x_peak = 6.62607015e-34 * nu[np.argmax(s)] / (1.380649e-23 * t)
    # grid step 5e6 Hz -> x step ~8e-6
    assert x_peak == pytest.approx(x_root, abs=2e-5)
    if beta == 0.0:
        assert x_root == pytest.approx(WIEN_X_NU, rel=1e-12)


def test_bare_nu0_is_hz_as_in_the_opacity():
    # one rule for a bare reference frequency: Hz in planck and in PowerLawOpacity alike (exact)
    from sedtemp.planck import planck_mean_powerlaw, powerlaw_planck_integral

    assert powerlaw_planck_integral(20.0, 2.0, 1e12).value == powerlaw_planck_integral(20.0, 2.0, 1e12 * u.Hz).value
    assert planck_mean_powerlaw(20.0, 2.0, 1e12) == planck_mean_powerlaw(20.0, 2.0, 1e12 * u.Hz)
