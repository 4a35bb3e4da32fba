"""Tests of sedtemp.opacity: power law, saturated power law, tabulated."""

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table

from sedtemp.errors import InputError
from sedtemp.opacity import PowerLawOpacity, SaturatedPowerLawOpacity, TabulatedOpacity


def test_power_law_value_and_units():
    # exact: kappa0 (nu/nu0)^beta, 0.1 cm2/g = 0.01 m2/kg
    kap = PowerLawOpacity(0.1 * u.cm**2 / u.g, 1 * u.THz, beta=2.0, per="gas")
    assert kap.kappa_si(2e12) == pytest.approx(0.01 * 4.0, rel=1e-14)
    assert kap(300 * u.um).unit == u.cm**2 / u.g
    # beta array (n, 1) broadcasts against nu (n_nu,)
    k = kap.kappa_si(np.array([1e12, 2e12]), beta=np.array([[0.0], [1.0]]))
    np.testing.assert_allclose(k, [[0.01, 0.01], [0.01, 0.02]], rtol=1e-14)


def test_power_law_errors():
    with pytest.raises(InputError, match="kappa0 must be positive"):
        PowerLawOpacity(-1.0, 1e12)
    with pytest.raises(InputError, match="per must be 'dust' or 'gas'"):
        PowerLawOpacity(1.0, 1e12, per="stars")


def test_saturated_grain_radius_caps_at_geometric_cross_section():
    # exact: pi a^2 / (4/3 pi a^3 rho) = 3 / (4 a rho); a = 0.1 um, rho = 3 g/cm3 -> 2500 m2/kg
    kap = SaturatedPowerLawOpacity(10.0, 1e12, 2.0, grain_radius=0.1 * u.um, grain_density=3.0)
    assert kap.kappa_si(3e15) == pytest.approx(2500.0, rel=1e-12)
    # far-infrared unchanged: 10 cm2/g = 1 m2/kg at 1 THz (exact power law)
    assert kap.kappa_si(5e11) == pytest.approx(0.25, rel=1e-14)
    # per gas mass: divided by the gas-to-dust ratio (exact)
    gas = SaturatedPowerLawOpacity(0.1, 1e12, 2.0, grain_radius=0.1, per="gas", gas_to_dust=100)
    assert gas.kappa_si(3e15) == pytest.approx(25.0, rel=1e-12)


def test_saturated_break_wavelength_flat_above_break():
    # exact: kappa0 (min(nu, nu_b)/nu0)^beta, break at 30 um = 9.993e12 Hz
    kap = SaturatedPowerLawOpacity(10.0, 1e12, 2.0, break_wavelength=30 * u.um)
    nub = (30 * u.um).to_value(u.Hz, equivalencies=u.spectral())
    assert kap.kappa_si(1e15) == pytest.approx(1.0 * (nub / 1e12) ** 2, rel=1e-12)
    assert kap.with_beta(1.0).kappa_si(1e15) == pytest.approx(nub / 1e12, rel=1e-12)


def test_saturated_errors():
    with pytest.raises(InputError, match="exactly one of grain_radius"):
        SaturatedPowerLawOpacity(10.0, 1e12, 2.0)
    with pytest.raises(InputError, match="exactly one of grain_radius"):
        SaturatedPowerLawOpacity(10.0, 1e12, 2.0, grain_radius=0.1, break_wavelength=10)
    with pytest.raises(InputError, match="grain_radius and grain_density must be positive"):
        SaturatedPowerLawOpacity(10.0, 1e12, 2.0, grain_radius=-0.1)


def test_tabulated_reproduces_power_law_and_reads_file(tmp_path):
    # exact: log-log interpolation of a power law is the power law, also when extrapolated
    lam = np.array([10.0, 100.0, 1000.0]) * u.um
    kap = 5.0 * (lam / (100 * u.um)).value ** -1.7 * u.cm**2 / u.g
    tab = TabulatedOpacity(lam, kap)
    nu = (np.array([3.0, 50.0, 2000.0]) * u.um).to_value(u.Hz, equivalencies=u.spectral())
    expect = 0.5 * (np.array([3.0, 50.0, 2000.0]) / 100.0) ** -1.7
    np.testing.assert_allclose(tab.kappa_si(nu), expect, rtol=1e-12)
    assert tab.beta == pytest.approx(1.7, rel=1e-12)
    path = tmp_path / "kappa.ecsv"
    Table({"wavelength": lam, "kappa": kap}).write(path)
    np.testing.assert_allclose(TabulatedOpacity.from_file(path).kappa_si(nu), expect, rtol=1e-12)
    Table({"wavelength": lam.value, "kappa": kap.value}).write(tmp_path / "bare.ecsv")
    with pytest.raises(InputError, match="has no unit"):
        TabulatedOpacity.from_file(tmp_path / "bare.ecsv")
