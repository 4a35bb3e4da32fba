"""Tests of sedtemp.compare: flags on simulated sources, field uncertainty, projected distances, tables.

Simulated sources: the field's T_eq is computed with the source's true beta
by the forward module (sedtemp.equilibrium), band fluxes of a thin modified
blackbody at that T are simulated with Gaussian noise (tests/conftest.py) and
fitted with the exact grid posterior (many realisations at once) or emcee.
"""

from collections import Counter

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table
from invented import simulate

from sedtemp.bands import Band, BandSet
from sedtemp.compare import (
    FLAGS,
    W_PER_KG_IN_LSUN_PER_MSUN,
    Comparison,
    DistanceUncertainty,
    ProjectedDistance,
    ScaleUncertainty,
    Thresholds,
    compare,
    compare_draws,
    compare_table,
    row_seed,
)
from sedtemp.compare.chunk import column_names
from sedtemp.compare.core import CLASS_COLUMN
from sedtemp.equilibrium import (
    absorbed_power,
    emitted_power,
    equilibrium_temperature,
    implied_U,
)
from sedtemp.errors import GridWarning, InputError
from sedtemp.fit import GridPosterior, fit_source
from sedtemp.grains import Grain
from sedtemp.models import ModifiedBlackbody
from sedtemp.opacity import PowerLawOpacity, SaturatedPowerLawOpacity
from sedtemp.radiation import ISRF, Star

#: Beckwith et al. (1990) far-IR law per dust mass (from memory), saturated at the
#: geometric cross-section of a = 0.1 um grains so starlight is absorbed physically.
OPACITY = SaturatedPowerLawOpacity(10 * u.cm**2 / u.g, 1 * u.THz, 1.8, grain_radius=0.1 * u.um)
BETA_TRUE = 1.8
STAR = Star(2e4 * u.K, luminosity=1e4 * u.L_sun, distance=1.0 * u.pc)
FIELD = ISRF(3.0) + STAR
N_REAL = 200  # noise realisations per statistical test


@pytest.fixture(scope="module")
def model():
    return ModifiedBlackbody(OPACITY, distance=300 * u.pc)


@pytest.fixture(scope="module")
def grid(bands, model):
    return GridPosterior(bands, model=model)


def _t_eq(field, beta=BETA_TRUE):
    return float(equilibrium_temperature(field, OPACITY, beta=beta).to_value(u.K))


def _realisations(grid, model, bands, T, n, snr, seed, beta=BETA_TRUE):
    """n noise realisations of one source (1 M_sun of dust at 300 pc), grid-fitted; (draws, flags)."""
    theta = np.tile([0.0, T, beta] if model.beta is None else [0.0, T], (n, 1))
    f, e, _ = simulate(model, bands, theta, snr, np.random.default_rng(seed))
    _, extra = grid.summarise(f * 1e-26, e * 1e-26, np.zeros(f.shape, bool), n_draws=400, rng=seed,
                              keep_draws=True)
    return extra["draws"], [",".join(fl) for fl in extra["flags"]]


def _table(flags):
    return Table({"id": np.arange(len(flags)), "flags": flags})


# ------------------------------------------------------- flags on simulations
@pytest.mark.parametrize("uncertainty", [None, {0: ScaleUncertainty(2.0), 1: DistanceUncertainty(0.2)}],
                         ids=["exact_field", "uncertain_field"])
def test_source_in_its_own_field_is_consistent(grid, model, bands, uncertainty):
    # 200 realisations at S/N 20 (seed 2024) of a source at the T_eq of its field.
    # The issue asks for >= 90 % consistent. With a calibrated posterior P(T_fit > T_eq)
    # is ~uniform over realisations, so each of extra_heating / shielded needs a 1 %
    # tail *and* a 10 % offset: the false-positive rate must be <= 5 % (design target;
    # off-line, 5 x 200 realisations of five fields gave 0-1.5 %).
    draws, flags = _realisations(grid, model, bands, _t_eq(FIELD), N_REAL, 20.0, 2024)
    out = compare_table(_table(flags), FIELD, OPACITY, draws=draws, field_uncertainty=uncertainty, seed=1)
    counts = Counter(out["heating_class"])
    assert counts["consistent"] / N_REAL >= 0.90
    assert (counts["extra_heating"] + counts["shielded"]) / N_REAL <= 0.05
    assert set(counts) <= set(FLAGS)


def test_warmer_source_is_extra_heating_and_its_power_is_recovered(grid, model, bands):
    # Injected: T = 1.5 T_eq(beta_true); the power beyond the field is
    # P_emit(1.5 T_eq) - P_abs (forward module, per dust mass). 200 realisations at
    # S/N 20 (seed 7): all must be extra_heating (ratio 1.5 +- ~0.03), and the
    # 68 % interval of the recovered extra power must cover the injected value in
    # 68 % of them, within 3 binomial sd (3 sqrt(0.68 0.32 / 200) = 0.099).
    t_hot = 1.5 * _t_eq(FIELD)
    p_inj = float(emitted_power(t_hot, OPACITY, beta=BETA_TRUE) - absorbed_power(FIELD, OPACITY, beta=BETA_TRUE))
    draws, flags = _realisations(grid, model, bands, t_hot, N_REAL, 20.0, 7)
    out = compare_table(_table(flags), FIELD, OPACITY, draws=draws, seed=2)
    assert np.all(out["heating_class"] == "extra_heating")
    lo, hi = (u.Quantity(out[c]).to_value(u.W / u.kg) for c in ("extra_power_p16", "extra_power_p84"))
    assert np.mean((lo < p_inj) & (p_inj < hi)) == pytest.approx(0.68, abs=0.099)
    # the ratio of the medians over realisations is the injected 1.5: single-realisation
    # medians scatter by ~5 % at this T-beta degeneracy, their median by ~0.5 %; allow 3 %
    assert np.median(out["ratio_median"]) == pytest.approx(1.5, rel=0.03)


def test_extra_heating_from_an_mcmc_fit_with_mass(bands, model):
    # One source fitted by emcee; the injected power per mass and luminosity
    # (P_inj x 1 M_sun, the simulated dust mass) must lie inside the 95 % intervals.
    t_hot = 1.5 * _t_eq(FIELD)
    f, e, _ = simulate(model, bands, np.array([[0.0, t_hot, BETA_TRUE]]), 20.0, np.random.default_rng(31))
    fit = fit_source(f[0] * u.Jy, e[0] * u.Jy, bands, model=model, seed=5)
    comp = compare(fit, FIELD)
    p_inj = float(emitted_power(t_hot, OPACITY, beta=BETA_TRUE) - absorbed_power(FIELD, OPACITY, beta=BETA_TRUE))
    cols = comp.columns()
    assert comp.flag == "extra_heating" and comp.p_warmer > 0.99
    assert cols["extra_power_p2_5"] < p_inj < cols["extra_power_p97_5"]
    l_inj = (p_inj * u.W / u.kg * u.solMass).to_value(u.L_sun)
    assert cols["extra_luminosity_p2_5"] < l_inj < cols["extra_luminosity_p97_5"]
    # L_sun / M_sun column: the W/kg one times the astropy conversion (IAU 2015 nominal values)
    assert cols["extra_power_solar_median"] == pytest.approx(cols["extra_power_median"] * W_PER_KG_IN_LSUN_PER_MSUN)
    assert "extra_heating" in comp.verdict and "L_sun" in comp.verdict


def test_source_behind_AV20_is_shielded(grid, model, bands):
    # Simulated at the T_eq of ISRF(3) behind A_V = 20 (G23 curve), compared with
    # the unattenuated ISRF(3): 200 realisations at S/N 20 (seed 11) must all be
    # shielded, and the median ratio must be T_eq(attenuated) / T_eq(open), both
    # from the forward module, within 3 % (the fit's T error at S/N 20 is ~1 %).
    t_att, t_open = _t_eq(ISRF(3.0).attenuated(20.0)), _t_eq(ISRF(3.0))
    draws, flags = _realisations(grid, model, bands, t_att, N_REAL, 20.0, 11)
    out = compare_table(_table(flags), ISRF(3.0), OPACITY, draws=draws, seed=3)
    assert np.all(out["heating_class"] == "shielded")
    assert np.median(out["ratio_median"]) == pytest.approx(t_att / t_open, rel=0.03)


def test_two_band_low_snr_posterior_is_unconstrained():
    # Two bands (250, 500 um), fixed beta, S/N 3: 200 realisations (seed 5). The T
    # posterior is broad or piled on the 3 K prior edge (the uniform prior in the
    # linear mass favours cold, massive solutions); every row must be unconstrained.
    two = BandSet([Band.tophat(f"b{w}", w * u.um, 0.3) for w in (250, 500)])
    fixed = ModifiedBlackbody(OPACITY, distance=300 * u.pc, beta=BETA_TRUE)
    g2 = GridPosterior(two, model=fixed)
    with pytest.warns(GridWarning, match="piled against the grid/prior edge"):
        draws, flags = _realisations(g2, fixed, two, _t_eq(ISRF(3.0)), N_REAL, 3.0, 5)
    out = compare_table(_table(flags), ISRF(3.0), OPACITY, draws=draws, seed=4)
    assert np.all(out["heating_class"] == "unconstrained")
    prior_set = np.array(["prior" in f for f in flags])
    assert all("set by its prior" in v for v in out["verdict"][prior_set])


def test_broad_draws_are_unconstrained_by_width():
    # Without fit flags: draws with ln T ~ Normal(ln T_eq, 0.4) give a ratio 16-84 %
    # interval of exp(+-0.4), width 0.82 x median > 0.5 (exact for a log-normal).
    t0 = _t_eq(ISRF(1.0))
    t = t0 * np.exp(0.4 * np.random.default_rng(9).standard_normal(2000))
    comp = compare_draws(t, BETA_TRUE, ISRF(1.0), OPACITY)
    assert comp.flag == "unconstrained"
    assert "wider than 0.5 times its median" in comp.verdict
    # same draws, a looser threshold: consistent
    assert compare_draws(t, BETA_TRUE, ISRF(1.0), OPACITY, thresholds={"max_ratio_width": 1.0}).flag == "consistent"


# -------------------------------------------------------- projected distances
def test_projected_distance_gives_an_upper_bound_not_shielding(grid, model, bands):
    # A star at projected 0.3 pc, truly at 0.9 pc: the dust is colder than the
    # bound. Projected -> consistent, T_eq flagged as an upper bound, and the verdict
    # says why; the same draws with the distance taken as true -> shielded.
    star_proj = Star(2e4 * u.K, luminosity=1e4 * u.L_sun, distance=0.3 * u.pc)
    field = ISRF(1.0) + star_proj
    t_true = _t_eq(ISRF(1.0) + Star(2e4 * u.K, luminosity=1e4 * u.L_sun, distance=0.9 * u.pc))
    draws, flags = _realisations(grid, model, bands, t_true, 50, 20.0, 13)
    proj = compare_table(_table(flags), field, OPACITY, draws=draws, projected=True, seed=5, opacity_uncertainty=0)
    assert np.all(proj["heating_class"] == "consistent") and np.all(proj["T_eq_is_upper_bound"])
    assert all("upper bound" in v and "cannot show shielding" in v for v in proj["verdict"])
    taken = compare_table(_table(flags), field, OPACITY, draws=draws, projected=False, seed=5, opacity_uncertainty=0)
    assert np.all(taken["heating_class"] == "shielded") and not np.any(taken["T_eq_is_upper_bound"])
    # keyed by the component object: the same rule
    one = {k: v[0] for k, v in draws.items()}
    by_obj = compare_draws(one["T"], one["beta"], field, OPACITY, field_uncertainty={star_proj: ProjectedDistance()}, opacity_uncertainty=0)
    assert by_obj.flag == "consistent" and by_obj.T_eq_is_upper_bound


def test_projected_distance_still_allows_extra_heating_and_floor_shielding():
    # extra_heating against the bound is robust (the true T_eq is lower still);
    # shielding is decided against the field without the star (T_eq_floor).
    field = ISRF(1.0) + Star(2e4 * u.K, luminosity=1e4 * u.L_sun, distance=0.3 * u.pc)
    rng = np.random.default_rng(17)
    hot = 1.5 * _t_eq(field) * (1 + 0.01 * rng.standard_normal(500))
    assert compare_draws(hot, BETA_TRUE, field, OPACITY, projected=True, opacity_uncertainty=0).flag == "extra_heating"
    cold = 0.6 * _t_eq(ISRF(1.0)) * (1 + 0.01 * rng.standard_normal(500))
    comp = compare_draws(cold, BETA_TRUE, field, OPACITY, projected=True, opacity_uncertainty=0)
    assert comp.flag == "shielded" and "without the projected star" in comp.verdict
    # the floor is T_eq of the ISRF alone (forward module, same beta): rel 1e-6
    assert comp.T_eq_floor.to_value(u.K) == pytest.approx(np.full(500, _t_eq(ISRF(1.0))), rel=1e-6)


def test_isotropic_orientation_factor_has_mean_two_thirds():
    # Exact: cos i uniform on [0, 1) -> E[sin^2 i] = 2/3, sd sqrt(8/15 - 4/9) = 0.298;
    # far from the star W(r) / W(r0) = (r0 / r)^2 = sin^2 i (to (R/d)^2 ~ 1e-15).
    # 20000 draws: 4 standard errors = 0.0084.
    f = ProjectedDistance(isotropic=True).factors(STAR, 20000, np.random.default_rng(3))
    assert np.mean(f) == pytest.approx(2 / 3, abs=0.0084)
    assert np.all((f > 0) & (f <= 1))


# ---------------------------------------------------------- field uncertainty
def test_scale_and_distance_uncertainty_quantiles():
    # Exact quantiles under a monotone map: ScaleUncertainty(2): ln s ~ N(0, ln 2), so
    # the 16/84 % points are 1/2 and 2 (to Phi(1) = 0.8413 vs 0.84: 0.3 %);
    # DistanceUncertainty(0.2): d/d0 ~ N(1, 0.2), factor (d0/d)^2, 84 % point 1/0.8^2,
    # 16 % point 1/1.2^2. 40000 draws: quantile standard error ~1 %; allow 3 %.
    rng = np.random.default_rng(21)
    s = ScaleUncertainty(2.0).factors(None, 40000, rng)
    assert np.quantile(s, [0.1587, 0.8413]) == pytest.approx([0.5, 2.0], rel=0.03)
    d = DistanceUncertainty(0.2).factors(STAR, 40000, rng)
    assert np.quantile(d, [0.1587, 0.8413]) == pytest.approx([1 / 1.2**2, 1 / 0.8**2], rel=0.03)


@pytest.mark.filterwarnings("ignore::sedtemp.errors.OpacityExtrapolationWarning")  # a bare law on purpose
def test_power_law_T_eq_follows_the_field_scale():
    # Exact for kappa ~ nu^beta: T_eq ~ s^(1/(4+beta)), so (4+beta) ln(T_eq/T_eq(1)) = ln s,
    # whose sd is ln 2 for ScaleUncertainty(2); 4000 draws: sd of the sd ~ ln2 / sqrt(8000),
    # allow 4 of them (0.031).
    pl = PowerLawOpacity(10.0, 1e12, beta=2.0)
    t0 = float(equilibrium_temperature(ISRF(2.0), pl).to_value(u.K))
    comp = compare_draws(np.full(4000, t0), 2.0, ISRF(2.0), pl, field_uncertainty=1.0, seed=8, opacity_uncertainty=0)  # 1 + 1.0: factor 2
    ln_s = 6.0 * np.log(comp.T_eq.to_value(u.K) / t0)
    assert np.std(ln_s) == pytest.approx(np.log(2.0), abs=0.031)
    # the implied scale of the drawn field is 1/s exactly (same T): field_scale * s = 1
    assert comp.field_scale * np.exp(ln_s) == pytest.approx(np.ones(4000), rel=1e-9)


def test_draws_agree_with_the_forward_module():
    # Without field uncertainty each T_eq draw is equilibrium_temperature at that draw's
    # beta, U_implied is implied_U, and the extra power is P_emit - P_abs (forward
    # module). 1e-4: the forward module's T tables are good to ~1e-5 and its nodes in
    # beta depend on the spread of the betas passed in, which differs between the calls.
    rng = np.random.default_rng(4)
    b = rng.uniform(1.4, 2.2, 600)
    t = rng.uniform(15, 40, 600)
    comp = compare_draws(t * u.K, b, ISRF(5.0), OPACITY, mass_draws=np.full(600, 2.0) * u.solMass, opacity_uncertainty=0)
    ref = equilibrium_temperature(ISRF(5.0), OPACITY, beta=b[:50]).to_value(u.K)
    assert comp.T_eq.to_value(u.K)[:50] == pytest.approx(ref, rel=1e-4)
    assert comp.U_implied[:50] == pytest.approx(implied_U(t[:50], OPACITY, beta=b[:50]), rel=1e-6)
    assert comp.field_scale == pytest.approx(comp.U_implied / 5.0, rel=1e-12)  # linear in the field
    # emitted power over 600 draws comes from a cubic table in (ln T, beta), absorbed
    # power from a spline in beta: each good to ~1e-7 of its own size, so the
    # difference is compared within 1e-6 of the terms (it can cancel to far less).
    p_emit = emitted_power(t[:50], OPACITY, beta=b[:50])
    p_abs = absorbed_power(ISRF(5.0), OPACITY, beta=b[:50])
    assert comp.extra_power_per_mass.to_value(u.W / u.kg)[:50] == pytest.approx(p_emit - p_abs, abs=1e-6 * p_abs.max())
    # sign convention: extra power > 0 exactly when T_fit > T_eq
    assert comp.p_warmer == np.mean(comp.extra_power_per_mass.value > 0)
    assert comp.extra_luminosity.to_value(u.L_sun) == pytest.approx(
        (comp.extra_power_per_mass * 2 * u.solMass).to_value(u.L_sun))


def test_small_grains_are_non_equilibrium():
    # Draine & Li (2001, from memory): grains below ~50 A are stochastically heated in
    # the ISRF, 0.1 um grains are in equilibrium; the forward module's check decides.
    t = _t_eq(ISRF(1.0)) * np.linspace(0.99, 1.01, 20)
    small = compare_draws(t, BETA_TRUE, ISRF(1.0), OPACITY, grain=Grain(5e-4 * u.um))
    assert small.flag == "non_equilibrium" and small.stochastic_fraction == 1.0
    assert "stochastic-heating" in small.verdict
    big = compare_draws(t, BETA_TRUE, ISRF(1.0), OPACITY, grain=Grain(0.1 * u.um))
    assert big.flag == "consistent" and big.stochastic_fraction == 0.0


# ------------------------------------------------------------------- tables
def test_table_rows_equal_compare_draws_with_their_row_seed():
    # per-row fields (callable), per-row seeds: row i == compare_draws(seed=row_seed(seed, id))
    rng = np.random.default_rng(6)
    tab = Table({"id": ["a", "b", "c"], "U": [1.0, 3.0, 10.0]})
    draws = {k: (rng.uniform(15, 25, 300), rng.uniform(1.6, 2.0, 300), np.full(300, 0.5)) for k in ("a", "b")}
    unc = {0: ScaleUncertainty(1.5)}
    out = compare_table(tab, lambda r: ISRF(r["U"]), OPACITY, draws=draws, field_uncertainty=unc, seed=99)
    for i, key in enumerate(("a", "b")):
        t, b, m = draws[key]
        one = compare_draws(t, b, ISRF(tab["U"][i]), OPACITY, mass_draws=m, field_uncertainty=unc,
                            seed=row_seed(99, key))
        cols = one.columns()
        assert out["heating_class"][i] == one.flag and out["p_warmer"][i] == one.p_warmer
        for name in ("T_eq_median", "ratio_p84", "extra_power_median", "extra_luminosity_p16"):
            assert float(out[name][i]) == pytest.approx(cols[name], rel=1e-12)
    assert out["heating_class"][2] == "" and out["verdict"][2] == "not compared: no posterior draws for id 'c'"
    assert np.isnan(out["T_eq_median"][2])
    assert out["T_eq_median"].unit == u.K and out["extra_luminosity_median"].unit == u.L_sun


def test_table_reads_draws_columns_and_bad_rows_get_a_reason():
    rng = np.random.default_rng(12)
    t = rng.uniform(17, 19, (2, 100))
    t[1, 50:] = np.nan  # NaN padding, as in pipeline tables
    tab = Table({"id": [1, 2], "draws_T": t * u.K, "draws_beta": np.full((2, 100), 1.8),
                 "draws_log10_mass": np.zeros((2, 100))})
    out = compare_table(tab, ISRF(1.0), OPACITY, seed=0)
    assert list(out["heating_class"]) == ["consistent", "consistent"]
    # 1 M_sun of dust (log10_mass = 0): L in L_sun equals the power in L_sun / M_sun
    assert out["extra_luminosity_median"][0] == pytest.approx(out["extra_power_solar_median"][0], rel=1e-12)
    bad = compare_table(tab, ISRF(1.0), OPACITY, field_uncertainty={3: ScaleUncertainty(2)}, seed=0)
    assert bad["verdict"][0].startswith("not compared: InputError: field_uncertainty: component index 3")


def test_columns_contract():
    comp = compare_draws(np.linspace(17, 19, 50), 1.8, ISRF(1.0), OPACITY)
    cols = comp.columns()
    for key in ("T_eq_median", "T_eq_p16", "T_eq_p84", "ratio_median", "U_implied_median", "extra_power_median",
                "extra_luminosity_median", "p_warmer", "heating_class", "verdict", "T_eq_is_upper_bound"):
        assert key in cols
    assert "flag" not in cols and cols["heating_class"] == comp.flag  # the pipeline's column name
    assert list(cols) == [CLASS_COLUMN if k == "flag" else k for k in column_names()]  # compare_chunk's order
    assert np.isnan(cols["extra_luminosity_median"]) and comp.extra_luminosity is None
    assert isinstance(comp, Comparison) and repr(comp).startswith("<Comparison consistent")


# ------------------------------------------------------------------- errors
@pytest.mark.parametrize("kwargs, match", [
    (dict(T_draws=[20.0]), r"T_draws must be a 1-D array of >= 2 finite, positive temperatures"),
    (dict(beta_draws=[1.8, 1.8, 1.8]), r"beta_draws must be a scalar or a finite array shaped like T_draws"),
    (dict(mass_draws=[1.0, -1.0]), r"mass_draws must be finite, positive masses \(solMass\)"),
    (dict(field="isrf"), r"field must be a sedtemp.radiation field, got str"),
    (dict(field_uncertainty={0: DistanceUncertainty(0.2)}), r"DistanceUncertainty applies to a Star component"),
    (dict(field_uncertainty={0: 2.0}), r"field_uncertainty\[0\]: 2.0 is not a FieldUncertainty"),
    (dict(field_uncertainty=-0.1), r"a number is the fractional 1-sigma of the field strength and must be >= 0"),
    (dict(field_uncertainty={ISRF(2.0): ScaleUncertainty(2)}), r"is not a component of the field"),
    (dict(field_uncertainty="2x"), r"field_uncertainty must be None, a number, a FieldUncertainty or a mapping"),
    (dict(projected=True), r"projected=True but the field .* has no Star component"),
    (dict(thresholds={"p_decde": 0.9}), r"thresholds: unknown key\(s\) \['p_decde'\]"),
    (dict(thresholds={"p_decide": 1.5}), r"Thresholds: p_decide = 1.5 is out of range"),
])
def test_error_messages(kwargs, match):
    args = dict(T_draws=[18.0, 19.0], beta_draws=1.8, field=ISRF(1.0), opacity=OPACITY)
    args.update(kwargs)
    pos = [args.pop(k) for k in ("T_draws", "beta_draws", "field", "opacity")]
    with pytest.raises(InputError, match=match):
        compare_draws(*pos, **args)


def test_more_error_messages():
    with pytest.raises(InputError, match=r"applies to one component of a field of 2; pass a mapping"):
        compare_draws([18.0, 19.0], 1.8, FIELD, OPACITY, field_uncertainty=DistanceUncertainty(0.2))
    with pytest.raises(InputError, match=r"ScaleUncertainty: factor must be a number >= 1"):
        ScaleUncertainty(0.5)
    with pytest.raises(InputError, match=r"fit_result must be a FitResult with posterior samples of 'T'"):
        compare({"T": [1.0]}, ISRF(1.0))
    with pytest.raises(InputError, match=r"no draws given and no 'draws_T' column"):
        compare_table(Table({"id": [1]}), ISRF(1.0), OPACITY)
    with pytest.raises(InputError, match=r"component index 2 is out of range for a field of 2"):
        compare_draws([18.0, 19.0], 1.8, FIELD, OPACITY, field_uncertainty={2: ScaleUncertainty(2)})
    assert Thresholds.from_any({"ratio_high": 1.2}).ratio_high == 1.2


def test_broad_beta_alone_does_not_make_a_cold_core_unconstrained():
    # A cold core seen only at long wavelengths: T bounded (11 +- 1 K), beta broad
    # (the fit flags beta_prior_dominated). T_eq in the U = 1 field is ~18 K for
    # any beta in [1, 3] (forward module), so the core is shielded; a prior flag
    # on T itself would make it unconstrained.
    rng = np.random.default_rng(12)
    t = rng.normal(11.0, 1.0, 2000) * u.K
    b = rng.uniform(1.0, 3.0, 2000)
    comp = compare_draws(t, b, ISRF(1.0), OPACITY, fit_flags="beta_prior_dominated", seed=1)
    assert comp.flag == "shielded"
    comp_t = compare_draws(t, b, ISRF(1.0), OPACITY, fit_flags="T_at_prior_low", seed=1)
    assert comp_t.flag == "unconstrained"


# ------------------------------------------------------------ chunk API
def _demo_fields(n, rng):
    """Per-source fields as the pipeline builds them: ISRF(U_i) + star at d_i + CMB, some attenuated."""
    from sedtemp.fields import build_field

    U = np.exp(rng.uniform(-1, 2, n))
    d = rng.uniform(0.5, 3.0, n)
    av = np.where(rng.uniform(size=n) < 0.5, 0.0, rng.uniform(0.5, 8.0, n))
    def comps(i):
        return [{"kind": "isrf", "U": U[i]},
                           {"kind": "star", "teff": 3.3e4 * u.K, "luminosity": 1.2e5 * u.L_sun, "distance": d[i] * u.pc},
                           {"kind": "cmb"}]
    return [build_field(comps(i), A_V=av[i]) for i in range(n)]


def test_compare_chunk_equals_compare_draws_per_source():
    # identical random draws (one stream per source) and the same tables: every
    # numeric column agrees to 1e-10 relative, flags and verdicts exactly
    from sedtemp.compare import compare_chunk

    rng = np.random.default_rng(21)
    n, m = 12, 150
    fields = _demo_fields(n, rng)
    T = rng.uniform(15, 40, (n, m))
    b = rng.uniform(1.2, 2.4, (n, m))
    mass = np.exp(rng.normal(0, 1, (n, m)))
    seeds = [row_seed(7, f"S{i}") for i in range(n)]
    kw = dict(field_uncertainty={0: ScaleUncertainty(1.3), 1: DistanceUncertainty(0.2)}, opacity_uncertainty=0.3)
    got = compare_chunk(T, b, fields, OPACITY, mass_draws=mass, seeds=seeds, keep_draws=True, **kw)
    for i in range(n):
        one = compare_draws(T[i], b[i], fields[i], OPACITY, mass_draws=mass[i], seed=row_seed(7, f"S{i}"), **kw)
        for name, val in one.columns().items():
            chunk_name = "flag" if name == "heating_class" else name  # compare_chunk's naming
            if isinstance(val, str):
                assert got[chunk_name][i] == val, name
            else:
                np.testing.assert_allclose(got[chunk_name][i], val, rtol=1e-10, atol=0, err_msg=name)
        np.testing.assert_allclose(got["draws_T_eq"][i], one.T_eq.to_value(u.K), rtol=1e-10)
    assert set(got) - {"draws_T_eq", "draws_ratio"} == {"flag" if k == "heating_class" else k for k in one.columns()}


def test_shared_uncertainty_is_common_to_every_source_whatever_the_chunk():
    # shared=True: draw j of every source has the same factor (exact), independent of
    # the source's own seed and of how the catalogue is chunked
    from sedtemp.compare import compare_chunk

    rng = np.random.default_rng(5)
    n, m = 6, 400
    fields = [ISRF(float(U)) for U in np.exp(rng.uniform(0, 2, n))]
    T = np.full((n, m), 20.0)
    b = np.full((n, m), 1.8)
    seeds = [row_seed(3, i) for i in range(n)]
    kw = dict(field_uncertainty=ScaleUncertainty(2.0, shared=True), opacity_uncertainty=0, run_seed=11,
              keep_draws=True)
    whole = compare_chunk(T, b, fields, OPACITY, seeds=seeds, **kw)
    parts = [compare_chunk(T[s], b[s], fields[s], OPACITY, seeds=seeds[s], **kw) for s in (slice(0, 2), slice(2, 6))]
    np.testing.assert_allclose(np.vstack([p["draws_T_eq"] for p in parts]), whole["draws_T_eq"], rtol=1e-12)
    # T_eq / T_eq(nominal) is the same factor for every source: s_j^(1/(4+beta)) up to the UV cap
    rel = whole["draws_T_eq"] / np.median(whole["draws_T_eq"], axis=1, keepdims=True)
    np.testing.assert_allclose(rel, np.broadcast_to(rel[0], rel.shape), rtol=2e-3)
    # an independent uncertainty does not do that
    ind = compare_chunk(T, b, fields, OPACITY, seeds=seeds, field_uncertainty=1.0, opacity_uncertainty=0,
                        keep_draws=True)
    rel_i = ind["draws_T_eq"] / np.median(ind["draws_T_eq"], axis=1, keepdims=True)
    assert abs(np.corrcoef(rel_i[0], rel_i[1])[0, 1]) < 0.2


def test_catalogue_counts_widen_with_a_shared_field_error():
    # 200 sources exactly at equilibrium: with an independent factor 2 the per-draw
    # count of "heated" is binomial-narrow; with a shared one it swings with the draw
    from sedtemp.compare import catalogue_counts, compare_chunk

    n, m = 200, 300
    fields = [ISRF(1.0)] * n
    t_eq = float(equilibrium_temperature(ISRF(1.0), OPACITY).to_value(u.K))
    T = np.full((n, m), t_eq)
    b = np.full((n, m), BETA_TRUE)
    seeds = [row_seed(0, i) for i in range(n)]
    out = {}
    for shared in (False, True):
        got = compare_chunk(T, b, fields, OPACITY, seeds=seeds, opacity_uncertainty=0, keep_draws=True,
                            field_uncertainty=ScaleUncertainty(2.0, shared=shared))
        _, lo, hi = catalogue_counts(got["draws_ratio"])["extra_heating"]
        out[shared] = hi - lo
    # independent: sd of a binomial(200, p~0.24) ~ 6, 68 % width ~ 12; shared: all or nothing (~200)
    assert out[False] < 25 and out[True] > 150


def test_opacity_uncertainty_spreads_T_eq_by_its_factor():
    # ln T_eq spread = ln(1 + x) / (4 + beta) at far-IR temperatures (T_eq ~ P^(1/(4+beta))
    # while the emission is all on the power-law part); 4000 draws: 4 sd of the sd
    t = np.full(4000, 20.0)
    comp = compare_draws(t, 2.0, ISRF(1.0), OPACITY, field_uncertainty=None, opacity_uncertainty=1.0, seed=4)
    sd = np.std(np.log(comp.T_eq.to_value(u.K)))
    assert sd == pytest.approx(np.log(2.0) / 6.0, abs=4 * np.log(2.0) / 6.0 / np.sqrt(8000))
    with pytest.raises(InputError, match="opacity_uncertainty must be None, a number >= 0"):
        compare_draws(t[:5], 2.0, ISRF(1.0), OPACITY, opacity_uncertainty=-0.1)


def test_bare_power_law_under_starlight_warns_and_reports_the_fraction():
    from sedtemp.errors import OpacityExtrapolationWarning

    pl = PowerLawOpacity(10.0, 1e12, 1.8)
    t = np.linspace(30, 40, 50)
    with pytest.warns(OpacityExtrapolationWarning, match=r"% of the absorbed power comes from wavelengths shortward of 30 um"):
        comp = compare_draws(t, 1.8, ISRF(1.0), pl, opacity_uncertainty=0)
    assert comp.columns()["opacity_extrapolated_fraction"] > 0.9  # MMP83 starlight: nearly all of it
    capped = compare_draws(t, 1.8, ISRF(1.0), OPACITY, opacity_uncertainty=0)
    assert capped.columns()["opacity_extrapolated_fraction"] == 0.0  # a capped law is never extrapolated


def test_row_seed_is_the_source_seed():
    from sedtemp.seeds import source_seed

    a, b = row_seed(5, "SRC-1"), source_seed(5, "SRC-1")
    assert np.array_equal(a.generate_state(4), b.generate_state(4))
