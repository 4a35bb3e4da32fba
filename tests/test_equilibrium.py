"""Tests of sedtemp.equilibrium: T_eq, mean opacities, implied U, timescales, tables."""

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table
from scipy.integrate import quad
from scipy.optimize import brentq

from sedtemp.equilibrium import (
    absorbed_power,
    absorption_mean_opacity,
    emission_mean_opacity,
    emitted_power,
    equilibrium_temperature,
    implied_U,
    predict_table,
    temperature_for_power,
)
from sedtemp.errors import InputError
from sedtemp.opacity import PowerLawOpacity, SaturatedPowerLawOpacity, TabulatedOpacity
from sedtemp.planck import _planck_nu_si
from sedtemp.radiation import CMB, CMB_T0, ISRF, Blackbody, Star

GREY = PowerLawOpacity(1.0, 1e12, beta=0)  # PowerLawOpacity(kappa0, nu0, beta=0) is grey
PL2 = PowerLawOpacity(10.0, 1e12, beta=2.0)
#: big grain: a = 0.1 um, Beckwith et al. (1990) far-IR law per dust mass (from memory)
BIG = SaturatedPowerLawOpacity(10.0, 1e12, 2.0, grain_radius=0.1 * u.um)
TAB = TabulatedOpacity(np.array([0.1, 1.0, 10.0, 100.0, 1000.0]) * u.um,
                       np.array([3e4, 1e4, 8e2, 30.0, 0.4]) * u.cm**2 / u.g)
WIDE = np.geomspace(1e8, 1e17, 8001)  # Hz; holds a 30 000 K blackbody to 1e-9


@pytest.mark.filterwarnings("ignore::sedtemp.errors.OpacityExtrapolationWarning")  # bare laws on purpose
@pytest.mark.parametrize("opacity", [GREY, PL2, BIG, TAB], ids=["grey", "beta2", "saturated", "table"])
def test_isotropic_blackbody_gives_its_temperature(opacity):
    # exact (Kirchhoff): J = B(T_rad) gives T_eq = T_rad for any kappa_nu.
    # 1e-4: the accuracy target; absorption on the 8001-node grid, emission analytic or tabulated.
    for t_rad in (8.0, 60.0, 900.0):
        t = equilibrium_temperature(Blackbody(t_rad), opacity, nu_grid=WIDE)
        assert t.to_value(u.K) == pytest.approx(t_rad, rel=1e-4)


@pytest.mark.filterwarnings("ignore::sedtemp.errors.OpacityExtrapolationWarning")  # bare laws on purpose
@pytest.mark.parametrize("beta", [0.0, 1.0, 1.8, 2.5])
def test_diluted_blackbody_power_law(beta):
    # exact: J = W B(T*), kappa ~ nu^beta  ->  T_eq = W^(1/(4+beta)) T*
    kap = PL2.with_beta(beta)
    t = equilibrium_temperature(Blackbody(6000.0, dilution=1e-12), kap, nu_grid=WIDE)
    assert t.to_value(u.K) == pytest.approx(1e-12 ** (1 / (4 + beta)) * 6000.0, rel=1e-4)


@pytest.mark.filterwarnings("ignore::sedtemp.errors.OpacityExtrapolationWarning")  # bare laws on purpose
def test_perfect_absorber_at_one_au():
    # Textbook value (e.g. T = 278.3 K (L/L_sun)^(1/4) (d/au)^(-1/2); common practice),
    # computed here from the IAU 2015 nominal solar values: T = T_eff sqrt(R_sun / 2 au).
    sun = Star(teff=5772 * u.K, luminosity=1 * u.L_sun, distance=1 * u.au)
    t = equilibrium_temperature(sun, GREY).to_value(u.K)
    assert t == pytest.approx(5772 * np.sqrt(6.957e8 / (2 * 1.495978707e11)), rel=1e-4)
    assert t == pytest.approx(278.3, abs=0.1)


@pytest.mark.filterwarnings("ignore::sedtemp.errors.OpacityExtrapolationWarning")  # bare laws on purpose
def test_U_scaling_vectorised_over_U_and_beta():
    # exact for a power law: T ~ U^(1/(4+beta)), absorbed power is linear in U
    U = np.geomspace(0.1, 1e4, 5)
    beta = np.array([[1.5], [2.0]])
    t = equilibrium_temperature(ISRF(), PL2, scale=U, beta=beta).to_value(u.K)
    assert t.shape == (2, 5)
    t1 = equilibrium_temperature(ISRF(), PL2, beta=beta).to_value(u.K)
    np.testing.assert_allclose(t, t1 * U ** (1 / (4 + beta)), rtol=1e-12)
    # scaling the field object or the scale factor is the same (exact)
    assert equilibrium_temperature(ISRF(7.0), BIG).value == pytest.approx(
        equilibrium_temperature(ISRF(), BIG, scale=7.0).value, rel=1e-12)


def test_cmb_only():
    # exact: the CMB is a blackbody of T0 (1+z) (Fixsen 2009 T0), so T_eq = T0 (1+z)
    for z in (0.0, 4.0):
        for kap in (PL2, BIG):
            assert equilibrium_temperature(CMB(z), kap).to_value(u.K) == pytest.approx(CMB_T0 * (1 + z), rel=1e-4)


def _dense_t_eq(field, kap, beta):
    """Independent T_eq: 40001-node trapezoid integrals in ln nu and scipy brentq (no tables)."""
    nu = np.geomspace(1e9, 3.2885e15, 40001)  # to 13.6 eV, as the package's absorption grid
    p_abs = np.trapezoid(4 * np.pi * kap.kappa_si(nu, beta) * field.mean_intensity_si(nu) * nu, np.log(nu))
    nu_e = np.geomspace(1e8, 1e16, 40001)
    emit = lambda t: np.trapezoid(4 * np.pi * kap.kappa_si(nu_e, beta) * _planck_nu_si(nu_e, t) * nu_e,  # noqa: E731
                                  np.log(nu_e)) - p_abs
    return brentq(emit, 1.0, 300.0, xtol=1e-12)


@pytest.mark.parametrize("beta, expect", [(2.0, 17.61), (1.6, 18.32)])
def test_big_grain_in_isrf_pinned(beta, expect):
    # Pinned value (0.01 K) and an independent dense-grid calculation (2e-5 relative:
    # the package's 4001-node trapezoid rule across the jumps of the MMP83 field at its
    # joints errs by ~1e-5 in T; the tables add < 1e-7). Consistent with the diffuse-ISM dust
    # temperature of 17.5 K for beta = 2 (Boulanger et al. 1996, A&A 312, 256; from memory).
    fld = ISRF(1.0) + CMB()
    t = equilibrium_temperature(fld, BIG, beta=beta).to_value(u.K)
    assert t == pytest.approx(_dense_t_eq(fld, BIG, beta), rel=2e-5)
    assert t == pytest.approx(expect, abs=0.01)


def test_temperature_for_power_inverts_emission():
    # reference: scipy brentq on a direct 40001-node integral of kappa B; 1e-4 target
    nu = np.geomspace(1e7, 2e16, 40001)

    def emit(t, b):
        return 4 * np.pi * np.trapezoid(BIG.kappa_si(nu, b) * _planck_nu_si(nu, t) * nu, np.log(nu))

    p = np.array([1e-3, 0.3, 20.0, 3e3, 1e6])
    b = np.array([1.1, 1.37, 1.92, 2.33, 2.0])  # off the 0.05 beta nodes
    t = temperature_for_power(p, BIG, beta=b)
    ref = [brentq(lambda x: emit(x, bb) - pp, 0.6, 4000, rtol=1e-12) for pp, bb in zip(p, b, strict=True)]
    np.testing.assert_allclose(t, ref, rtol=1e-4)
    np.testing.assert_allclose(emitted_power(ref, BIG, beta=b), p, rtol=1e-4)
    # power law: analytic, exact against scipy quad of nu^beta B
    val = quad(lambda x: 4 * np.pi * 1.0 * (x / 1e12) ** 1.5 * _planck_nu_si(x, 20.0), 1e8, 1e15, limit=200)[0]
    assert emitted_power(20.0, PL2, beta=1.5) == pytest.approx(val, rel=1e-8)
    assert temperature_for_power(0.0, PL2) == 0.0


def test_mean_opacities_reproduce_teq():
    # exact identity: T_eq^4 = (pi / sigma) kappa_abs int J dnu / kappa_P(T_eq)
    from sedtemp.planck import SIGMA_SB

    fld = ISRF(3.0)
    t = equilibrium_temperature(fld, BIG).to_value(u.K)
    k_abs = absorption_mean_opacity(fld, BIG).to_value(u.m**2 / u.kg)
    k_p = emission_mean_opacity(t, BIG).to_value(u.m**2 / u.kg)
    j_int = fld.energy_density(n=4001).to_value(u.J / u.m**3) * 2.99792458e8 / (4 * np.pi)
    assert t**4 == pytest.approx(np.pi / SIGMA_SB * k_abs * j_int / k_p, rel=1e-5)
    # for starlight the saturated opacity absorbs at its geometric cap, 3/(4 a rho) = 2500 m2/kg
    assert k_abs == pytest.approx(2500.0, rel=0.01)


@pytest.mark.filterwarnings("ignore::sedtemp.errors.OpacityExtrapolationWarning")  # bare laws on purpose
def test_implied_U_inverts_teq():
    # exact: absorbed power is linear in U
    for kap in (PL2, BIG):
        t = equilibrium_temperature(ISRF(), kap, scale=[0.3, 40.0])
        np.testing.assert_allclose(implied_U(t, kap), [0.3, 40.0], rtol=1e-4)
        np.testing.assert_allclose(implied_U(t, kap, base=ISRF(2.0)), [0.3, 40.0], rtol=1e-4)
    t = equilibrium_temperature(ISRF(5.0) + CMB(), BIG)
    assert implied_U(t, BIG, fixed=CMB()) == pytest.approx(5.0, rel=1e-4)
    assert np.isnan(implied_U(2.0, BIG, fixed=CMB()))  # colder than the CMB alone allows


def test_absorbed_power_per_component_and_many_betas():
    fld = ISRF(2.0) + Star(20000 * u.K, luminosity=1e4 * u.L_sun, distance=1 * u.pc)
    parts = absorbed_power(fld, BIG, per_component=True)
    assert parts.shape == (2,)
    assert parts.sum() == pytest.approx(absorbed_power(fld, BIG), rel=1e-12)  # linearity, exact
    # 600 distinct betas use a spline over 256 nodes; direct evaluation is the reference
    b = np.linspace(1.0, 2.5, 600)
    direct = np.array([absorbed_power(ISRF(), PL2, beta=x) for x in b[::50]])
    np.testing.assert_allclose(absorbed_power(ISRF(), PL2, beta=b)[::50], direct, rtol=1e-7)


def test_predict_table_columns():
    star = Star(20000 * u.K, luminosity=1e4 * u.L_sun, distance=1 * u.pc)
    tab = Table({"name": ["a", "b", "c"], "U": [1.0, 1.0, 10.0], "d": [1.0, 2.0, 1.0] * u.pc,
                 "av": [0.0, 0.0, 3.0]})
    out = predict_table(tab, BIG, U_column="U", star=star, star_distance_column="d", A_V_column="av")
    # each row against an independent field built by hand (exact same integrals)
    for i, d in enumerate([1.0, 2.0, 1.0]):
        s = Star(20000 * u.K, luminosity=1e4 * u.L_sun, distance=d * u.pc)
        f = ISRF(tab["U"][i]) + s
        f = f.attenuated(tab["av"][i]) if tab["av"][i] > 0 else f
        assert out["T_eq"][i] == pytest.approx(equilibrium_temperature(f, BIG).value, rel=1e-9)
    assert out["T_eq"].unit == u.K and list(out["name"]) == ["a", "b", "c"]
    assert out["G0_local"][0] > out["G0_local"][2]
    with pytest.raises(InputError, match="has no unit"):
        predict_table(Table({"d": [1.0]}), BIG, star=star, star_distance_column="d")
    with pytest.raises(InputError, match="no column 'U'"):
        predict_table(Table({"x": [1.0]}), BIG, U_column="U")
    with pytest.raises(InputError, match="no field"):
        predict_table(tab, BIG)


@pytest.mark.filterwarnings("ignore::sedtemp.errors.OpacityExtrapolationWarning")  # bare laws on purpose
def test_input_errors():
    with pytest.raises(InputError, match="power_per_mass must be finite and >= 0"):
        temperature_for_power(-1.0, PL2)
    with pytest.raises(InputError, match="scale must be finite and >= 0"):
        equilibrium_temperature(ISRF(), PL2, scale=[-1.0])
    with pytest.raises(InputError, match="nu_grid must be a 1-D increasing array"):
        equilibrium_temperature(ISRF(), PL2, nu_grid=[3.0, 2.0, 1.0])
    with pytest.raises(InputError, match="must be a sedtemp.radiation field"):
        absorbed_power("isrf", PL2)
    # non-physical beta is refused, not turned into a temperature (issue 14: beta = -1 gave 0.28 K)
    for call in (lambda: equilibrium_temperature(ISRF(), BIG, beta=-1.0),
                 lambda: emitted_power(20.0, BIG, beta=7.0),
                 lambda: temperature_for_power(1e-3, BIG, beta=np.nan)):
        with pytest.raises(InputError, match=r"beta must be finite and within \[0, 5\]"):
            call()


def test_absorbed_power_for_many_betas_matches_direct_integration():
    # Many distinct betas go through a cubic spline in beta (nodes 0.02 apart);
    # reference: the same trapezoid integral done for each beta alone (exact
    # within the module), agreement 1e-6 relative (spline error ~1e-7).
    import astropy.units as u

    from sedtemp.opacity import SaturatedPowerLawOpacity
    from sedtemp.radiation import ISRF, Star

    kap = SaturatedPowerLawOpacity(10 * u.cm**2 / u.g, 1 * u.THz, 1.8, grain_radius=0.1 * u.um)
    field = ISRF(2.0) + Star(2e4 * u.K, luminosity=1e3 * u.L_sun, distance=0.5 * u.pc)
    b = np.random.default_rng(8).uniform(0.5, 3.5, 400)
    many = absorbed_power(field, kap, beta=b, per_component=True)
    for i in (0, 17, 399):
        one = absorbed_power(field, kap, beta=b[i], per_component=True)
        # 2e-5: where the UV cap's break crosses the jumps of the MMP83 field (beta ~ 1.1,
        # row 0) ln P(beta) is only once differentiable and the cubic in beta errs by ~6e-6;
        # elsewhere the agreement is ~1e-9. In T that is (2e-5)/(4 + beta) < 5e-6.
        np.testing.assert_allclose(many[i], one, rtol=2e-5)
    np.testing.assert_allclose(many[17], absorbed_power(field, kap, beta=b[17], per_component=True), rtol=1e-8)


def test_predict_chunk_equals_equilibrium_temperature_per_source():
    # per-source attenuated fields (one matrix product for the A_V values), many betas
    # (interpolated in beta): agreement with the one-field path to 1e-6 relative in T
    # (the beta interpolation's error, < 6e-6 in P, divided by 4 + beta)
    from sedtemp.equilibrium import predict_chunk
    from sedtemp.fields import build_field

    rng = np.random.default_rng(2)
    n = 40
    fields = [build_field([{"kind": "isrf", "U": float(U)},
                           {"kind": "star", "teff": 2e4, "luminosity": 1e4, "distance": float(d)},
                           {"kind": "cmb"}], A_V=float(av))
              for U, d, av in zip(np.exp(rng.uniform(-1, 2, n)), rng.uniform(0.5, 3, n), rng.uniform(0, 10, n), strict=True)]
    b = rng.uniform(1.0, 2.6, n)
    got = predict_chunk(fields, BIG, b, details=True)
    ref = np.array([equilibrium_temperature(f, BIG, beta=bi).to_value(u.K) for f, bi in zip(fields, b, strict=True)])
    np.testing.assert_allclose(got["T_eq"], ref, rtol=1e-6)
    assert np.all(got["opacity_extrapolated_fraction"] == 0.0)
    with pytest.raises(InputError, match=r"predict_chunk: beta must have shape \(40,\)"):
        predict_chunk(fields, BIG, b[:3])


def test_bare_power_law_warning_says_how_much_power_is_extrapolated():
    from sedtemp.equilibrium import predict_chunk
    from sedtemp.errors import OpacityExtrapolationWarning

    with pytest.warns(OpacityExtrapolationWarning, match=r"1 of 2 sources/draws, up to \d+ % of the absorbed power"):
        got = predict_chunk([ISRF(1.0), CMB()], PL2, np.array([2.0, 2.0]), details=True)
    frac = got["opacity_extrapolated_fraction"]
    assert frac[0] > 0.9 and frac[1] < 1e-30  # the CMB has no photons shortward of 30 um


@pytest.mark.filterwarnings("ignore::sedtemp.errors.OpacityExtrapolationWarning")  # table ends at 0.1 um
def test_tabulated_beta_changes_only_the_far_infrared():
    # exact: at and shortward of the break (100 um default) kappa is the table for any beta
    nu_uv = np.geomspace(3e12, 3e15, 50)  # 100 um .. 0.1 um
    for b in (1.0, 1.5, 2.1, 3.0):
        np.testing.assert_array_equal(TAB.kappa_si(nu_uv, b), TAB.kappa_si(nu_uv))
    # longward of the break the slope is beta: kappa(1 mm) / kappa(100 um) = 10^-beta (exact)
    k = TAB.kappa_si(np.array([3e11, 2.99792458e12]), 2.4)
    assert k[0] / k[1] == pytest.approx(10 ** -2.4 * (3e11 / 2.99792458e11) ** 2.4, rel=1e-12)
    # so the UV-heated T_eq changes with beta only through the far-IR emission: a steeper
    # law emits less longward of 100 um, the dust is a little warmer (5 %, not the 72 %
    # of a tilt about the longest node, issue 13)
    t = equilibrium_temperature(ISRF(), TAB, beta=np.array([1.5, 2.1])).to_value(u.K)
    assert 1.0 < t[1] / t[0] < 1.08
