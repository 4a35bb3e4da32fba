"""Tests of the field decomposition used for many sources at once (sedtemp.fields, sedtemp.absorption)."""

import astropy.units as u
import numpy as np
import pytest

from sedtemp.absorption import absorbed_power_chunk, decompose
from sedtemp.fields import build_field
from sedtemp.opacity import SaturatedPowerLawOpacity
from sedtemp.radiation import CMB, ISRF, Blackbody, Star, Tabulated

KAP = SaturatedPowerLawOpacity(10.0, 1e12, 2.0, grain_radius=0.1)


def test_components_decompose_into_a_shared_unit_spectrum_and_a_scale():
    # exact: J = scale x unit J, and equal spectra share the key
    nu = np.geomspace(1e10, 3e15, 200)
    star = Star(2e4 * u.K, luminosity=1e4 * u.L_sun, distance=2 * u.pc)
    cases = [ISRF(3.0), star, CMB(1.0), Blackbody(50.0, 1e-3), 2.5 * ISRF(2.0),
             Tabulated(np.array([1.0, 10.0, 100.0]) * u.um, np.array([1e-18, 3e-18, 1e-19]))]
    for c in cases:
        _, unit, scale = c.unit_spectrum()
        np.testing.assert_allclose(scale * unit.mean_intensity_si(nu), c.mean_intensity_si(nu), rtol=1e-14)
    assert ISRF(3.0).unit_spectrum()[0] == ISRF(0.2).unit_spectrum()[0]
    assert star.unit_spectrum()[0] == Blackbody(2e4).unit_spectrum()[0]  # a star is a diluted B_nu(T_eff)
    assert CMB(0.0).unit_spectrum()[0] != CMB(1.0).unit_spectrum()[0]


def test_build_field_attenuation_shares_one_curve_and_decomposes():
    a = build_field([{"kind": "isrf", "U": 2.0}, {"kind": "cmb"}], A_V=3.0)
    b = build_field([{"kind": "isrf", "U": 5.0}, {"kind": "cmb"}], A_V=1.0)
    ta, tb = decompose(a.components[0]), decompose(b.components[0])
    assert ta.key == tb.key and ta.curve is tb.curve  # the curve is built once per process
    assert (ta.scale, ta.A_V, tb.scale, tb.A_V) == (2.0, 3.0, 5.0, 1.0)


def test_chunk_absorbed_power_equals_one_field_at_a_time():
    # the A_V matrix product and the shared unit spectra reproduce the one-field sums (1e-12)
    fields = [build_field([{"kind": "isrf", "U": U}, {"kind": "star", "teff": 3e4, "luminosity": 1e5,
                                                          "distance": d}], A_V=av)
              for U, d, av in ((1.0, 1.0, 0.0), (3.0, 2.0, 2.0), (0.5, 0.7, 5.0))]
    beta = np.array([1.8, 1.8, 1.8])
    many = absorbed_power_chunk(fields, KAP, beta)
    for i, f in enumerate(fields):
        one = absorbed_power_chunk([f], KAP, beta[i:i + 1])
        np.testing.assert_allclose(many[i], one[0], rtol=1e-12)
    # and against the field's own spectrum summed by hand on the same grid
    from sedtemp.absorption import frequency_grid

    nu, w = frequency_grid()
    direct = 4 * np.pi * np.sum(w * KAP.kappa_si(nu, 1.8) * fields[1].mean_intensity_si(nu))
    assert many[1, 0].sum() == pytest.approx(direct, rel=1e-12)


def test_cached_opacity_rows_and_spectra_give_the_uncached_result():
    # exact behaviour: the per-process caches of kappa rows and unit spectra change no number
    from sedtemp import absorption

    rng = np.random.default_rng(3)
    fields = [build_field([{"kind": "isrf", "U": float(U)}, {"kind": "cmb"}], A_V=float(av))
              for U, av in zip(rng.uniform(0.5, 5, 20), rng.uniform(0, 3, 20), strict=True)]
    beta = rng.uniform(1.2, 2.4, (20, 30))  # > 16 distinct betas: Lagrange nodes
    absorption._KW_CACHE.clear(), absorption._KW_MATRICES.clear(), absorption._J_CACHE.clear()
    cold = absorbed_power_chunk(fields, KAP, beta)
    assert absorption._KW_CACHE and absorption._J_CACHE
    warm = absorbed_power_chunk(fields, KAP, beta)
    absorption._KW_MATRICES.clear()
    rows_only = absorbed_power_chunk(fields, KAP, beta)
    np.testing.assert_array_equal(warm, cold)
    np.testing.assert_array_equal(rows_only, cold)
