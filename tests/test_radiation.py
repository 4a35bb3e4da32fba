"""Tests of sedtemp.radiation: ISRF, blackbodies, stars, CMB, tables, sums, attenuation."""

import astropy.constants as const
import astropy.units as u
import numpy as np
import pytest
from astropy.modeling.physical_models import BlackBody
from astropy.table import Table
from scipy.integrate import quad

from sedtemp.errors import InputError
from sedtemp.radiation import (
    CMB,
    CMB_T0,
    ISRF,
    NU_LYMAN,
    AttenuatedField,
    Blackbody,
    ExtinctionCurve,
    G0_to_U,
    Star,
    SumField,
    Tabulated,
    U_to_G0,
)

A_RAD = 4 * const.sigma_sb.si.value / const.c.si.value  # radiation constant a = 4 sigma / c
NU = np.geomspace(1e9, 3e15, 7)
NU_REF = np.geomspace(1e9, 1e13, 7)  # astropy BlackBody overflows (warns) at h nu / k T > 709


def _lam_um(nu):
    return const.c.si.value / nu * 1e6


def test_mmp83_uv_segments_join():
    # Mathis, Mezger & Panagia (1983): the published UV segments join at 0.110 and
    # 0.134 um to the rounding of their 4-digit coefficients (0.7 % at 0.134 um).
    f = ISRF()
    nu = lambda lam: const.c.si.value / (lam * 1e-6)  # noqa: E731
    for edge in (0.110, 0.134):
        below, above = f.mean_intensity_si(nu(edge * (1 - 1e-9))), f.mean_intensity_si(nu(edge * (1 + 1e-9)))
        assert below == pytest.approx(above, rel=0.01)
    # zero shortward of the Lyman limit (MMP83 field stops at 912 A)
    assert f.mean_intensity_si(1.01 * NU_LYMAN) == 0.0


def test_isrf_energy_density_exact_and_published():
    # Exact analytic value of the same parametrisation: UV power laws integrated in
    # closed form, plus sum W_i a T_i^4 times the fraction of B_lambda longward of
    # 0.246 um (scipy quad of the Planck function).
    uv = sum(c / (p + 1) * (hi ** (p + 1) - lo ** (p + 1)) for (c, p), lo, hi in
             [((38.57, 3.4172), 0.0912, 0.110), ((2.045e-2, 0.0), 0.110, 0.134),
              ((7.115e-4, -1.6678), 0.134, 0.246)]) * 1e-3 / const.c.si.value
    bb = 0.0
    for t, w in ((7500.0, 1e-14), (4000.0, 1e-13), (3000.0, 4e-13)):
        x0 = const.h.si.value * const.c.si.value / (0.246e-6 * const.k_B.si.value * t)
        frac = quad(lambda x: x**3 / np.expm1(x), 1e-8, x0)[0] / (np.pi**4 / 15)
        bb += w * A_RAD * t**4 * frac
    u_si = ISRF().energy_density(nu_min=1e11 * u.Hz).to_value(u.J / u.m**3)
    assert u_si == pytest.approx(uv + bb, rel=2e-4)  # trapezoid, 20001 nodes; 1e11 Hz cut ~1e-7
    # Eddington (1926, The Internal Constitution of the Stars, sec. 256): starlight
    # energy density 7.67e-13 erg cm^-3; a rough estimate, so within 10 %.
    assert ISRF().energy_density().to_value(u.erg / u.cm**3) == pytest.approx(7.67e-13, rel=0.10)
    # U scales it linearly (exact)
    assert ISRF(3.0).energy_density().value == pytest.approx(3.0 * u_si, rel=1e-6)


def test_isrf_G0_against_draine():
    # Draine (2011, Physics of the ISM, sec. 12.5; from memory): MMP83 has G0 = 1.14.
    # 2 %: the flux form (1.6e-3 erg cm^-2 s^-1) and the energy-density form
    # (5.29e-14 erg cm^-3) of the Habing unit differ by 1 %.
    assert pytest.approx(1.14, rel=0.02) == ISRF().G0
    # numerical 6-13.6 eV integral agrees with the closed form (trapezoid, 4001 nodes)
    assert ISRF(2.0).habing_G0() == pytest.approx(ISRF(2.0).G0, rel=1e-4)
    assert G0_to_U(U_to_G0(np.array([0.5, 7.0]))) == pytest.approx([0.5, 7.0], rel=1e-14)
    assert pytest.approx(10.0, rel=1e-14) == ISRF.from_G0(10.0).G0


def test_blackbody_matches_astropy_and_stefan_boltzmann():
    # reference library: astropy BlackBody (per steradian)
    ref = BlackBody(temperature=40 * u.K)(NU_REF * u.Hz).to_value(u.W / u.m**2 / u.Hz / u.sr)
    np.testing.assert_allclose(Blackbody(40 * u.K, dilution=0.3).mean_intensity_si(NU_REF), 0.3 * ref, rtol=1e-10)
    # exact: u = a T^4 for an isotropic blackbody (grid 1e9-1e15 Hz holds all but 1e-8 at 300 K)
    e = Blackbody(300.0).energy_density(nu_min=1e9, nu_max=3e14).to_value(u.J / u.m**3)
    assert e == pytest.approx(A_RAD * 300.0**4, rel=1e-6)


def test_star_radius_and_dilution_iau2015_sun():
    # IAU 2015 Resolution B3 nominal solar values: L = 3.828e26 W, T_eff = 5772 K,
    # R = 6.957e8 m (mutually consistent to 1e-6 via L = 4 pi R^2 sigma T^4).
    sun = Star(5772 * u.K, luminosity=3.828e26 * u.W, distance=1 * u.au)
    assert sun.radius_m == pytest.approx(6.957e8, rel=1e-5)
    # exact: W = (1 - sqrt(1 - (R/d)^2)) / 2 -> (R / 2 d)^2 for R << d
    assert sun.dilution == pytest.approx((6.957e8 / 2 / const.au.si.value) ** 2, rel=1e-4)
    by_r = Star(teff=5772, radius=1.0, distance=1 * u.au)  # bare: K, R_sun (R_sun is IAU 2015 nominal)
    assert by_r.dilution == pytest.approx(sun.dilution, rel=1e-5)
    np.testing.assert_allclose(sun.dilution_at([1.0, 2.0] * u.au), sun.dilution * np.array([1, 0.25]),
                               rtol=1e-5)  # exact W departs from 1/d^2 by ~(R/d)^2 / 4 = 5e-6


def test_cmb_temperature():
    # Fixsen (2009, ApJ 707, 916): T0 = 2.72548 K; T(z) = T0 (1 + z) exact
    assert CMB_T0 == 2.72548
    assert CMB(2.0).temperature_k == pytest.approx(3 * 2.72548, rel=1e-15)
    ref = BlackBody(temperature=3 * 2.72548 * u.K)(NU_REF * u.Hz).to_value(u.W / u.m**2 / u.Hz / u.sr)
    np.testing.assert_allclose(CMB(2.0).mean_intensity_si(NU_REF), ref, rtol=1e-10)


def test_sum_scale_components():
    isrf, cmb = ISRF(2.0), CMB()
    tot = isrf + cmb
    assert isinstance(tot, SumField) and tot.components == [isrf, cmb]
    np.testing.assert_allclose(tot.mean_intensity_si(NU), isrf.mean_intensity_si(NU) + cmb.mean_intensity_si(NU))
    assert (3 * isrf).U == 6.0 and isrf.scaled(0.5).U == 1.0  # ISRF carries U
    np.testing.assert_allclose((tot * 2).mean_intensity_si(NU), 2 * tot.mean_intensity_si(NU), rtol=1e-14)
    assert len((tot + Blackbody(10.0)).components) == 3
    with pytest.raises(InputError, match="scaled by a finite number >= 0"):
        isrf.scaled(-1.0)


def test_tabulated_from_arrays_units_and_file(tmp_path):
    # a table of a 5000 K blackbody given as J_lambda in erg/s/cm2/um/sr reproduces
    # the blackbody (astropy BlackBody per wavelength as the reference library) at
    # its nodes, and a power law exactly in between (log-log interpolation).
    lam = np.geomspace(0.1, 10.0, 201) * u.um
    bl = BlackBody(5000 * u.K, scale=1.0 * u.erg / u.s / u.cm**2 / u.um / u.sr)(lam)
    tab = Tabulated(lam, bl)
    nu_nodes = lam.to_value(u.Hz, equivalencies=u.spectral())
    np.testing.assert_allclose(tab.mean_intensity_si(nu_nodes), Blackbody(5000).mean_intensity_si(nu_nodes),
                               rtol=1e-10)
    assert tab.mean_intensity_si(1e9) == 0.0  # zero outside the table
    nu = np.array([1e12, 1e13])
    pl = Tabulated(nu * u.Hz, 1e-20 * (nu / 1e12) ** -1.5 * u.W / u.m**2 / u.Hz / u.sr)
    assert pl.mean_intensity_si(3e12) == pytest.approx(1e-20 * 3**-1.5, rel=1e-12)
    path = tmp_path / "field.ecsv"
    Table({"wavelength": lam, "J": bl}).write(path)
    np.testing.assert_allclose(Tabulated.from_file(path).mean_intensity_si(nu_nodes),
                               tab.mean_intensity_si(nu_nodes), rtol=1e-12)
    assert Tabulated(str(path)).scaled(2.0).mean_intensity_si(nu_nodes[5]) == pytest.approx(
        2 * tab.mean_intensity_si(nu_nodes[5]), rel=1e-12)


def test_tabulated_errors(tmp_path):
    with pytest.raises(InputError, match="not a mean intensity"):
        Tabulated([1.0, 2.0] * u.um, [1.0, 2.0] * u.Jy)
    with pytest.raises(InputError, match="J finite and >= 0"):
        Tabulated([1.0, 2.0] * u.um, [1.0, -2.0])
    Table({"a": [1.0, 2.0], "b": [1.0, 1.0]}).write(tmp_path / "bare.ecsv")
    with pytest.raises(InputError, match="has no unit"):
        Tabulated.from_file(tmp_path / "bare.ecsv")


def test_attenuation_uses_dust_extinction_and_extrapolates():
    from dust_extinction.parameter_averages import G23

    law = G23(Rv=3.1)  # reference library: the published Gordon et al. (2023) curve
    f = ISRF().attenuated(2.0)
    assert isinstance(f, AttenuatedField)
    lam = np.array([0.15, 0.55, 2.2])
    nu = const.c.si.value / (lam * 1e-6)
    expect = 10 ** (-0.4 * 2.0 * law(lam * u.um))
    np.testing.assert_allclose(f.mean_intensity_si(nu) / ISRF().mean_intensity_si(nu), expect, rtol=1e-10)
    # beyond 32 um: A_lambda/A_V continues as lambda^-2 from the law's last point (exact by construction)
    curve = ExtinctionCurve("G23")
    a_end = float(law(1.0 / curve._xmin * u.um))
    nu_100 = const.c.si.value / 100e-6
    assert curve.a_over_av(nu_100) == pytest.approx(a_end * (32.0 / 100.0) ** 2, rel=1e-9)
    # a sum is attenuated term by term, so its components stay separable
    s = (ISRF() + CMB()).attenuated(1.0, law="CCM89")
    assert len(s.components) == 2 and all(isinstance(c, AttenuatedField) for c in s.components)
    assert s.scaled(2.0).components[0].field.U == 2.0


def test_field_errors():
    with pytest.raises(InputError, match="unknown extinction law 'XYZ'"):
        ISRF().attenuated(1.0, law="XYZ")
    with pytest.raises(InputError, match="A_V must be a finite number >= 0"):
        ISRF().attenuated(-1.0)
    with pytest.raises(InputError, match="U must be a finite number >= 0"):
        ISRF(-2.0)
    with pytest.raises(InputError, match="exactly one of luminosity"):
        Star(5000, distance=1.0)
    with pytest.raises(InputError, match="distance .* is required"):
        Star(5000, radius=1.0)
    with pytest.raises(InputError, match="must exceed the stellar radius"):
        Star(5000, radius=1.0, distance=1e5 * u.m)
    with pytest.raises(InputError, match="redshift must be a finite number >= 0"):
        CMB(-1.0)
    with pytest.raises(InputError, match="dilution must be a finite number >= 0"):
        Blackbody(10.0, dilution=-1)
