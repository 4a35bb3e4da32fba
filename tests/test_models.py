"""SED models against astropy, exact limits and published CMB formulae."""

import astropy.constants as const
import astropy.units as u
import numpy as np
import pytest
from astropy.cosmology import Planck18
from astropy.modeling.physical_models import BlackBody
from scipy import integrate

from sedtemp.errors import InputError
from sedtemp.models import (
    MODELS,
    T_CMB0,
    ModifiedBlackbody,
    ThickModifiedBlackbody,
    TwoTemperatureModel,
    cmb_contrast_factor,
    cmb_heated_temperature,
    cmb_temperature,
    get_model,
)
from sedtemp.opacity import PowerLawOpacity, TabulatedOpacity
from sedtemp.priors import Prior

FLUX_SI = u.W / u.m**2 / u.Hz
WAV = np.geomspace(60, 3000, 40) * u.um
NU = WAV.to_value(u.Hz, equivalencies=u.spectral())
KAPPA_DUST = PowerLawOpacity(10 * u.cm**2 / u.g, 1 * u.THz, per="dust")
KAPPA_GAS = PowerLawOpacity(0.1 * u.cm**2 / u.g, 1 * u.THz, per="gas")
BEAM = 1.1331 * (36 * u.arcsec) ** 2  # ~ Gaussian beam of 36" FWHM


def _bb(t_k, nu_q):
    """Reference B_nu (astropy BlackBody) per steradian, as a Quantity."""
    return BlackBody(temperature=t_k * u.K)(nu_q).to(u.W / u.m**2 / u.Hz / u.sr) * u.sr


def _kappa(kappa0, nu0, beta, nu_q):
    return kappa0 * (nu_q / nu0).to_value(u.one) ** beta


# ------------------------------------------------------------- thin, astropy
@pytest.mark.parametrize("t, beta", [(8.0, 1.0), (20.0, 1.8), (60.0, 2.5)])
def test_thin_mass_matches_astropy(t, beta):
    # Reference: astropy BlackBody and astropy units, S = M kappa B / D^2
    # (Hildebrand 1983). Same closed forms in double precision: rtol 1e-10.
    m = ModifiedBlackbody(KAPPA_DUST, distance=140 * u.pc)
    mass, dist = 0.3 * u.M_sun, 140 * u.pc
    ref = (mass * _kappa(10 * u.cm**2 / u.g, 1 * u.THz, beta, WAV.to(u.Hz, u.spectral()))
           * _bb(t, WAV) / dist**2).to(u.Jy)
    got = m.sed(WAV, [np.log10(0.3), t, beta])
    assert got.shape == (1, WAV.size) and got.unit == u.Jy
    np.testing.assert_allclose(got.value[0], ref.value, rtol=1e-10)


def test_bare_wavelength_is_micrometres_and_distance_parsec():
    m_q = ModifiedBlackbody(KAPPA_DUST, distance=1 * u.kpc)
    m_b = ModifiedBlackbody(KAPPA_DUST, distance=1000.0)  # bare distance: pc
    th = [0.0, 15.0, 2.0]
    # Exact: the same SI numbers after unit conversion (rtol 1e-14 for the
    # kpc -> m vs pc -> m rounding).
    np.testing.assert_allclose(m_b.sed(WAV.value, th).value, m_q.sed(WAV, th).value, rtol=1e-14)


def test_column_form_matches_astropy_constants():
    # Reference: I = mu_H2 m_H N(H2) kappa_gas B (per beam), astropy constants;
    # m_H = 1.00782503 u, the 1H atomic mass (from memory). The model uses
    # m_p + m_e (binding energy neglected, 1.5e-8 relative): rtol 1e-7.
    m = ModifiedBlackbody(KAPPA_GAS, amplitude="column", solid_angle=BEAM, mean_molecular_weight=2.8)
    n_h2, t, beta = 3e22 / u.cm**2, 14.0, 1.7
    m_h = 1.00782503 * const.u
    nu_q = WAV.to(u.Hz, u.spectral())
    ref = (BEAM.to(u.sr) * 2.8 * m_h * n_h2 * _kappa(0.1 * u.cm**2 / u.g, 1 * u.THz, beta, nu_q)
           * _bb(t, WAV) / u.sr).to(u.Jy)
    got = m.sed(WAV, [np.log10(3e22), t, beta])
    np.testing.assert_allclose(got.value[0], ref.value, rtol=1e-7)
    assert m.param_names == ("log10_N_H2", "T", "beta")
    assert m.param_units["log10_N_H2"] == "cm-2"


def test_default_opacity_for_column_is_per_gas():
    # Beckwith et al. (1990) law, 0.1 cm^2/g (nu / 1 THz)^beta per gas mass
    # (from memory): the default column model equals one built with it.
    th = [21.0, 18.0, 1.9]
    a = ModifiedBlackbody(amplitude="column", solid_angle=BEAM)
    b = ModifiedBlackbody(KAPPA_GAS, amplitude="column", solid_angle=BEAM)
    np.testing.assert_allclose(a.sed_si(NU, th), b.sed_si(NU, th), rtol=1e-14)
    assert a.opacity.per == "gas"
    assert ModifiedBlackbody(distance=1).opacity.per == "dust"


def test_tau_form_matches_astropy():
    # Reference: S = Omega tau0 (nu/nu0)^beta B (thin limit), astropy BlackBody.
    # rtol 1e-12: kappa(nu)/kappa(nu0) vs (nu/nu0)^beta differ by rounding only.
    m = ModifiedBlackbody(KAPPA_DUST, amplitude="tau", solid_angle=BEAM)
    tau0, t, beta = 2e-4, 25.0, 1.5
    nu_q = WAV.to(u.Hz, u.spectral())
    ref = (BEAM.to(u.sr) * tau0 * (nu_q / u.THz).to_value(u.one) ** beta * _bb(t, WAV) / u.sr).to(u.Jy)
    got = m.sed(WAV, [np.log10(tau0), t, beta])
    np.testing.assert_allclose(got.value[0], ref.value, rtol=1e-12)


def test_tau_form_with_tabulated_opacity_needs_nu0():
    tab = TabulatedOpacity([100.0, 1000.0] * u.um, [50.0, 0.5] * u.cm**2 / u.g)
    with pytest.raises(InputError, match="TabulatedOpacity has no reference frequency nu0; give nu0="):
        ModifiedBlackbody(tab, amplitude="tau", solid_angle=BEAM)
    m = ModifiedBlackbody(tab, amplitude="tau", solid_angle=BEAM, nu0=1e12)
    # The table is a power law with slope 2 (kappa ~ lambda^-2), so with beta
    # fixed at the table's own slope the tau form is Omega tau0 (nu/nu0)^2 B
    # (exact analytic; rtol 1e-10 for the log-log interpolation rounding).
    th = np.array([[-3.0, 20.0, 2.0]])
    nu_q = WAV.to(u.Hz, u.spectral())
    ref = (BEAM.to(u.sr) * 1e-3 * (nu_q / u.THz).to_value(u.one) ** 2 * _bb(20.0, WAV) / u.sr).to(u.Jy)
    np.testing.assert_allclose(m.sed(WAV, th).value[0], ref.value, rtol=1e-10)


# --------------------------------------------------------- thick: exact limits
def test_thick_tends_to_thin_for_small_tau():
    # Exact analytic: 1 - exp(-tau) = tau (1 - tau/2 + ...). Here tau <=
    # 1e-11 (60 um / 5 THz)^2 = 2.5e-10, so the relative difference is
    # < 1.3e-10 (-expm1 keeps it; 1 - exp(-tau) would lose 6 digits).
    thick = ThickModifiedBlackbody(KAPPA_DUST, solid_angle=BEAM)
    thin = ModifiedBlackbody(KAPPA_DUST, amplitude="tau", solid_angle=BEAM)
    th = np.array([[-11.0, 20.0, 2.0], [-12.0, 40.0, 1.2]])
    np.testing.assert_allclose(thick.sed_si(NU, th), thin.sed_si(NU, th), rtol=1e-9)
    assert thick.amplitude_name is None


def test_thick_tends_to_blackbody_for_large_tau():
    # Exact analytic: for tau >= 1e6 (nu/nu0)^2 >~ 4e3, exp(-tau) underflows to
    # 0 and S = Omega B exactly; reference astropy BlackBody (rtol 1e-10).
    thick = ThickModifiedBlackbody(KAPPA_DUST, solid_angle=BEAM)
    th = [6.0, 30.0, 2.0]
    ref = (BEAM.to(u.sr) * _bb(30.0, WAV) / u.sr).to(u.Jy)
    np.testing.assert_allclose(thick.sed(WAV, th).value[0], ref.value, rtol=1e-10)
    tau = thick.optical_depth(NU, th)
    assert np.all(tau > 1e3)


def test_thick_blackbody_limit_at_redshift_is_dimmed_by_1_plus_z_cubed():
    # Exact analytic: I_nu / nu^3 is invariant, so a blackbody surface of
    # observed solid angle Omega gives S = Omega B(nu (1+z), T) / (1+z)^3.
    z = 1.5
    thick = ThickModifiedBlackbody(KAPPA_DUST, solid_angle=BEAM, redshift=z,
                                   cmb_heating=False, cmb_contrast=False)
    nu_rest = WAV.to(u.Hz, u.spectral()) * (1 + z)
    ref = (BEAM.to(u.sr) * _bb(30.0, nu_rest) / u.sr / (1 + z) ** 3).to(u.Jy)
    np.testing.assert_allclose(thick.sed(WAV, [6.0, 30.0, 2.0]).value[0], ref.value, rtol=1e-10)


# ------------------------------------------------------------ two temperatures
def test_two_temperature_is_sum_of_parts():
    # Exact: the model is cold + warm; same floating-point operations.
    cold = ModifiedBlackbody(KAPPA_DUST, distance=2 * u.Mpc)
    warm = ModifiedBlackbody(KAPPA_DUST, distance=2 * u.Mpc)
    two = TwoTemperatureModel(cold, warm)
    assert two.param_names == ("log10_mass_cold", "T_cold", "log10_mass_warm", "T_warm", "beta")
    assert two.amplitude_name is None
    th = np.array([[7.0, 15.0, 5.0, 45.0, 1.8], [6.5, 20.0, 4.0, 60.0, 2.2]])
    expect = cold.sed_si(NU, th[:, [0, 1, 4]]) + warm.sed_si(NU, th[:, [2, 3, 4]])
    np.testing.assert_array_equal(two.sed_si(NU, th), expect)


def test_two_temperature_fixed_beta_on_one_component():
    cold = ModifiedBlackbody(KAPPA_DUST, distance=2 * u.Mpc)
    warm = ModifiedBlackbody(KAPPA_DUST, distance=2 * u.Mpc, beta=1.5)
    two = TwoTemperatureModel(cold, warm)
    th = np.array([7.0, 15.0, 5.0, 45.0, 2.0])
    expect = cold.sed_si(NU, [7.0, 15.0, 2.0]) + warm.sed_si(NU, [5.0, 45.0])
    np.testing.assert_array_equal(two.sed_si(NU, th), expect)
    both_fixed = TwoTemperatureModel(ModifiedBlackbody(distance=1, beta=2.0),
                                     ModifiedBlackbody(distance=1, beta=2.0))
    assert both_fixed.param_names == ("log10_mass_cold", "T_cold", "log10_mass_warm", "T_warm")


def test_two_temperature_valid_orders_temperatures():
    two = TwoTemperatureModel(ModifiedBlackbody(distance=1), ModifiedBlackbody(distance=1))
    th = np.array([[0, 15, 0, 45, 2], [0, 45, 0, 15, 2], [0, 20, 0, 20, 2], [0, -1, 0, 20, 2],
                   [0, 10, np.nan, 20, 2]], dtype=float)
    np.testing.assert_array_equal(two.valid(th), [True, False, False, False, False])
    prior = two.default_prior()
    assert isinstance(prior, Prior) and tuple(prior) == two.param_names


def test_two_temperature_column_kind_names():
    c = ModifiedBlackbody(amplitude="column", solid_angle=BEAM)
    two = TwoTemperatureModel(c, c)
    assert two.param_names[0] == "log10_N_H2_cold"
    assert two.param_units["log10_N_H2_warm"] == "cm-2"


# ---------------------------------------------------------- CMB (da Cunha 2013)
def test_cmb_heating_identity_at_z0():
    # da Cunha et al. (2013) eq. 12 at z = 0: (1+z)^(4+beta) - 1 = 0, T_d = T (exact).
    t = np.array([3.0, 17.3, 90.0])
    np.testing.assert_array_equal(cmb_heated_temperature(t, 1.8, 0.0).value, t)
    m = ModifiedBlackbody(distance=1, cmb_heating=True)
    np.testing.assert_array_equal(m.dust_temperature([[0, 17.3, 1.8]]).value, [17.3])


@pytest.mark.parametrize("z, beta", [(0.5, 1.5), (4.0, 2.0), (8.0, 1.0)])
def test_cmb_heating_of_cmb_only_dust_gives_cmb_temperature(z, beta):
    # Exact analytic: in eq. 12 T is the z = 0 temperature, which includes the
    # present-day CMB, so dust heated by nothing else has T = T_CMB0 and then
    # T_d(z) = T_CMB0 (1+z) = T_CMB(z). rtol 1e-14: rounding of the power.
    td = cmb_heated_temperature(T_CMB0, beta, z)
    np.testing.assert_allclose(td.value, T_CMB0 * (1 + z), rtol=1e-14)
    # T -> 0 (no heating at all, even at z = 0) gives
    # [T_CMB(z)^(4+b) - T_CMB0^(4+b)]^(1/(4+b)), just below T_CMB(z).
    p = 4 + beta
    t0 = cmb_heated_temperature(0.0, beta, z).value
    np.testing.assert_allclose(t0, ((T_CMB0 * (1 + z)) ** p - T_CMB0**p) ** (1 / p), rtol=1e-14)
    np.testing.assert_allclose(cmb_temperature(z).value, T_CMB0 * (1 + z), rtol=0)


def test_cmb_heating_is_energy_balance():
    # Physics behind da Cunha et al. (2013) eq. 12: with kappa ~ nu^beta the
    # extra power a thin grain absorbs from the CMB at z (over z = 0) equals the
    # extra power it emits: int nu^b [B(T_d) - B(T)] = int nu^b [B(T_CMB(z)) - B(T_CMB0)].
    # Integrals by scipy.integrate.quad in x = h nu / k T_ref; rtol 1e-8 (quad).
    t, beta, z = 12.0, 1.7, 5.0
    td = cmb_heated_temperature(t, beta, z).value

    def power(temp):
        f = lambda nu: nu**beta * _bb(temp, nu * u.Hz).value  # noqa: E731
        # astropy's BlackBody overflows (with a warning) at h nu / k T >~ 700,
        # where the integrand is 0 anyway.
        with np.errstate(over="ignore"):
            return integrate.quad(f, 0, 1e14, epsabs=0, epsrel=1e-11, limit=400,
                                  points=[1e11, 1e12])[0]

    lhs = power(td) - power(t)
    rhs = power(T_CMB0 * (1 + z)) - power(T_CMB0)
    np.testing.assert_allclose(lhs, rhs, rtol=1e-8)


def test_contrast_factor_vanishes_at_cmb_temperature():
    # da Cunha et al. (2013) eq. 18: 1 - B(T_CMB(z)) / B(T_d) = 0 when T_d = T_CMB(z) (exact).
    z = 3.0
    f = cmb_contrast_factor(WAV / (1 + z), T_CMB0 * (1 + z), z)
    np.testing.assert_array_equal(f, 0.0)
    # A model seen against the CMB, without heating, at T = T_CMB(z): zero flux (exact).
    m = ModifiedBlackbody(redshift=z, cmb_heating=False, cmb_contrast=True)
    np.testing.assert_array_equal(m.sed_si(NU, [8.0, T_CMB0 * (1 + z), 1.8]), 0.0)


def test_contrast_applies_eq18_to_heated_dust():
    # S(contrast on) = S(contrast off) x [1 - B(T_CMB(z)) / B(T_d)] (eq. 18),
    # at the rest frequency; rtol 1e-12 (difference vs ratio rounding).
    z = 6.0
    on = ModifiedBlackbody(redshift=z)
    off = ModifiedBlackbody(redshift=z, cmb_contrast=False)
    assert on.cmb_heating and on.cmb_contrast and off.cmb_heating
    th = np.array([[8.0, 25.0, 1.8]])
    td = on.dust_temperature(th)
    factor = cmb_contrast_factor(NU * (1 + z) * u.Hz, td[0], z)
    np.testing.assert_allclose(on.sed_si(NU, th)[0], off.sed_si(NU, th)[0] * factor, rtol=1e-12)


def test_cmb_defaults_off_at_z0_on_at_z_positive():
    m0 = ModifiedBlackbody(distance=1)
    mz = ModifiedBlackbody(redshift=0.1)
    assert (m0.cmb_heating, m0.cmb_contrast) == (False, False)
    assert (mz.cmb_heating, mz.cmb_contrast) == (True, True)
    m_off = ModifiedBlackbody(redshift=0.1, cmb_heating=False, cmb_contrast=False)
    assert (m_off.cmb_heating, m_off.cmb_contrast) == (False, False)
    np.testing.assert_array_equal(m_off.dust_temperature([0, 20, 2]).value, [20.0])


# ----------------------------------------------------------- redshift, D_L
def test_luminosity_distance_planck18_and_redshifted_flux():
    # Reference: astropy.cosmology.Planck18; S = (1+z) M kappa(nu_rest) B(nu_rest) / D_L^2.
    z = 2.0
    m = ModifiedBlackbody(KAPPA_DUST, redshift=z, cmb_heating=False, cmb_contrast=False)
    d_l = Planck18.luminosity_distance(z)
    np.testing.assert_allclose(m.distance_m, d_l.to_value(u.m), rtol=1e-12)
    nu_rest = WAV.to(u.Hz, u.spectral()) * (1 + z)
    mass, t, beta = 1e8 * u.M_sun, 35.0, 1.9
    ref = ((1 + z) * mass * _kappa(10 * u.cm**2 / u.g, 1 * u.THz, beta, nu_rest)
           * _bb(t, nu_rest) / d_l**2).to(u.Jy)
    np.testing.assert_allclose(m.sed(WAV, [8.0, t, beta]).value[0], ref.value, rtol=1e-10)
    # A user distance overrides the cosmology.
    m2 = ModifiedBlackbody(KAPPA_DUST, redshift=z, distance=1 * u.Gpc)
    np.testing.assert_allclose(m2.distance_m, (1 * u.Gpc).to_value(u.m), rtol=1e-14)


def test_mass_and_column_forms_agree_at_redshift():
    # Exact analytic (Etherington reciprocity D_A = D_L / (1+z)^2): a region of
    # observed solid angle Omega has area Omega D_A^2 and gas mass
    # mu m_H N Omega D_A^2; both forms give the same flux. rtol 1e-12.
    z = 1.0
    col = ModifiedBlackbody(KAPPA_GAS, amplitude="column", solid_angle=BEAM, redshift=z)
    mass = ModifiedBlackbody(KAPPA_GAS, amplitude="mass", redshift=z)
    d_a = mass.distance_m / (1 + z) ** 2
    n_h2 = 1e22 * 1e4  # m^-2
    m_gas = 2.8 * (const.m_p + const.m_e).si.value * n_h2 * BEAM.to_value(u.sr) * d_a**2
    th_col = [22.0, 30.0, 1.8]
    th_mass = [np.log10(m_gas / const.M_sun.si.value), 30.0, 1.8]
    np.testing.assert_allclose(col.sed_si(NU, th_col), mass.sed_si(NU, th_mass), rtol=1e-12)


# ------------------------------------------------ parameters, vectorisation
def test_fixed_beta_equals_free_beta_column():
    free = ModifiedBlackbody(KAPPA_DUST, distance=100)
    fixed = ModifiedBlackbody(KAPPA_DUST, distance=100, beta=1.7)
    assert fixed.param_names == ("log10_mass", "T")
    assert "beta" not in fixed.param_units and "beta" not in fixed.default_prior()
    th = np.array([[-2.0, 12.0], [-1.0, 30.0]])
    th_free = np.column_stack([th, [1.7, 1.7]])
    # Exact: the same expression with beta from a column or a constant.
    np.testing.assert_allclose(fixed.sed_si(NU, th), free.sed_si(NU, th_free), rtol=1e-15)


@pytest.mark.parametrize("make", [
    lambda: ModifiedBlackbody(KAPPA_DUST, distance=100),
    lambda: ModifiedBlackbody(KAPPA_DUST, redshift=3.0),
    lambda: ThickModifiedBlackbody(KAPPA_DUST, solid_angle=BEAM, redshift=1.0),
    lambda: TwoTemperatureModel(ModifiedBlackbody(distance=100), ModifiedBlackbody(distance=100)),
])
def test_vectorised_equals_one_at_a_time(make):
    model = make()
    rng = np.random.default_rng(7)
    prior = model.default_prior()
    th = prior.sample(rng, 48, model.param_names)
    nu = np.geomspace(1e11, 5e12, 300)
    many = model.sed_si(nu, th)
    assert many.shape == (48, 300)
    one = np.vstack([model.sed_si(nu, row) for row in th])  # 1-D theta = one vector
    # Same elementwise operations; rtol 1e-14 allows for SIMD rounding paths.
    np.testing.assert_allclose(many, one, rtol=1e-14, atol=0)


def test_template_times_amplitude_is_sed():
    for m in (ModifiedBlackbody(distance=50), ModifiedBlackbody(amplitude="tau", solid_angle=BEAM),
              ModifiedBlackbody(amplitude="column", solid_angle=BEAM, redshift=0.5)):
        th = np.array([[1.3, 22.0, 1.6], [-0.4, 9.0, 2.4]])
        tmpl = m.template_si(NU, np.column_stack([np.full(2, 99.0), th[:, 1:]]))  # amplitude ignored
        # Contract in DEVELOPERS.md: sed = 10**amp * template; rtol 1e-15.
        np.testing.assert_allclose(m.sed_si(NU, th), 10 ** th[:, :1] * tmpl, rtol=1e-15)


def test_valid_and_default_priors():
    m = ModifiedBlackbody(distance=1)
    th = np.array([[0, 20, 2], [0, 0, 2], [0, -5, 2], [np.inf, 20, 2]], dtype=float)
    np.testing.assert_array_equal(m.valid(th), [True, False, False, False])
    hot = ModifiedBlackbody(redshift=2)  # heating needs 4 + beta > 0
    np.testing.assert_array_equal(hot.valid([[0, 20, 2], [0, 20, -4.5]]), [True, False])
    for model in (m, ThickModifiedBlackbody(solid_angle=BEAM)):
        p = model.default_prior()
        p.check_names(model.param_names)
        assert (p["T"].low, p["T"].high) == (3.0, 150.0)
    assert ModifiedBlackbody(amplitude="column", solid_angle=BEAM).default_prior()["log10_N_H2"].low == 18.0


def test_repr_and_registry():
    m = get_model("thin")(distance=140 * u.pc, beta=2.0)
    assert isinstance(m, ModifiedBlackbody) and m.beta == 2.0
    assert "distance=140 pc" in repr(m) and "beta=2" in repr(m)
    t = get_model("thick")(solid_angle=BEAM)
    assert "ThickModifiedBlackbody(solid_angle=" in repr(t)
    assert set(MODELS) == {"thin", "thick", "two_temperature"}
    two = get_model("two_temperature")(cold=m, warm=m)
    assert repr(two).startswith("TwoTemperatureModel(cold=ModifiedBlackbody(")


def test_two_temperature_model_builds_from_workflow_style_options():
    # regression: the workflow passes redshift= (and the component options), never cold/warm
    two = TwoTemperatureModel(redshift=0.5, beta=1.8, distance=1 * u.Gpc)
    assert two.redshift == 0.5 and two.cold.beta == 1.8 and two.param_names == (
        "log10_mass_cold", "T_cold", "log10_mass_warm", "T_warm")
    # exact: the sum of the two components evaluated alone
    th = np.array([[0.0, 15.0, -2.0, 40.0]])
    np.testing.assert_allclose(two.sed_si(NU, th), two.cold.sed_si(NU, th[:, :2]) + two.warm.sed_si(NU, th[:, 2:]),
                               rtol=1e-15)
    a = ModifiedBlackbody(distance=1)
    with pytest.raises(InputError, match=r"redshift=2 differs from the components' 0"):
        TwoTemperatureModel(a, a, redshift=2)
    with pytest.raises(InputError, match="give both cold= and warm= components, or neither"):
        TwoTemperatureModel(a)


# ------------------------------------------------------------------ errors
def test_error_messages():
    with pytest.raises(InputError, match=r"amplitude='mass' at redshift 0 needs distance"):
        ModifiedBlackbody()
    with pytest.raises(InputError, match=r"amplitude='column' needs solid_angle"):
        ModifiedBlackbody(KAPPA_GAS, amplitude="column")
    with pytest.raises(InputError, match=r"amplitude='tau' needs solid_angle"):
        ModifiedBlackbody(amplitude="tau")
    with pytest.raises(TypeError, match="solid_angle"):  # Python: required keyword argument
        ThickModifiedBlackbody()
    with pytest.raises(InputError, match=r"ThickModifiedBlackbody needs solid_angle"):
        ThickModifiedBlackbody(solid_angle=None)
    with pytest.raises(InputError, match=r"needs an opacity per gas mass \(per='gas'\), got one per dust"):
        ModifiedBlackbody(KAPPA_DUST, amplitude="column", solid_angle=BEAM)
    with pytest.raises(InputError, match=r"amplitude must be one of \['mass', 'column', 'tau'\], got 'flux'"):
        ModifiedBlackbody(amplitude="flux")
    with pytest.raises(InputError, match="distance is used only with amplitude='mass'"):
        ModifiedBlackbody(amplitude="tau", solid_angle=BEAM, distance=100)
    with pytest.raises(InputError, match="solid_angle is used only with amplitude='column' or 'tau'"):
        ModifiedBlackbody(distance=100, solid_angle=BEAM)
    with pytest.raises(InputError, match="distance must be a single positive value"):
        ModifiedBlackbody(distance=-3)
    with pytest.raises(InputError, match="redshift must be a finite number >= 0, got -1"):
        ModifiedBlackbody(distance=1, redshift=-1)
    with pytest.raises(InputError, match="beta must be None"):
        ModifiedBlackbody(distance=1, beta=np.nan)
    with pytest.raises(InputError, match=r"CMB heating needs beta > -4 \(the power 4 \+ beta\), got beta=-5"):
        ModifiedBlackbody(redshift=1, beta=-5.0)
    with pytest.raises(InputError, match="mean_molecular_weight must be positive"):
        ModifiedBlackbody(amplitude="column", solid_angle=BEAM, mean_molecular_weight=0)
    with pytest.raises(InputError, match="solid_angle: unit pc cannot be converted to sr"):
        ModifiedBlackbody(amplitude="tau", solid_angle=3 * u.pc)


def test_theta_width_error():
    m = ModifiedBlackbody(distance=1)
    with pytest.raises(InputError, match=r"theta has shape \(4, 2\) but ModifiedBlackbody has 3 "
                                         r"parameters \('log10_mass', 'T', 'beta'\); pass an array of shape \(n, 3\)"):
        m.sed_si(NU, np.zeros((4, 2)))
    with pytest.raises(InputError, match=r"theta has shape \(2,\)"):
        m.valid([0.0, 20.0])


def test_two_temperature_errors():
    a = ModifiedBlackbody(distance=1)
    with pytest.raises(InputError, match="different amplitude kinds"):
        TwoTemperatureModel(a, ModifiedBlackbody(amplitude="tau", solid_angle=BEAM))
    with pytest.raises(InputError, match="different redshifts"):
        TwoTemperatureModel(a, ModifiedBlackbody(redshift=1))
    with pytest.raises(InputError, match="warm must be a ModifiedBlackbody"):
        TwoTemperatureModel(a, ThickModifiedBlackbody(solid_angle=BEAM))


def test_model_name_errors():
    with pytest.raises(InputError, match=r"unknown model 'thinn'; choose one of \['thick', 'thin', 'two_temperature'\]"):
        get_model("thinn")


def test_default_opacity_gives_diffuse_ism_temperature_in_the_isrf():
    # Reference: big grains in the solar-neighbourhood field sit at ~17-20 K
    # (Planck Collaboration 2014, A&A 571, A11: mean all-sky T ~ 19.7 K; from
    # memory). The UV cap of the default opacity is what makes this true: the
    # bare power law extrapolated to the UV gives ~36 K.
    import astropy.units as u

    from sedtemp.equilibrium import equilibrium_temperature
    from sedtemp.models import default_opacity
    from sedtemp.radiation import ISRF

    t = equilibrium_temperature(ISRF(1.0), default_opacity(), beta=1.8).to_value(u.K)
    assert 15.0 < t < 22.0
    # far-IR values are the plain Beckwith et al. (1990) law: the cap is shortward of 5 um
    kap = default_opacity()
    nu = np.geomspace(3e11, 6e13, 50)
    np.testing.assert_allclose(kap.kappa_si(nu, beta=1.8), 1.0 * (nu / 1e12) ** 1.8, rtol=1e-12)
