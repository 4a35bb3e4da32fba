"""Population inference (sedtemp.population): seeded simulations with known populations.

Simulator: true (T, beta) drawn from a bivariate Gaussian population; each
source has a Gaussian likelihood with a T-beta anticorrelated noise ellipse
(correlation -0.85, the shape of the T-beta degeneracy), whose size does not
depend on the truth; its posterior under a flat interim prior is then exactly
N(observed, Sigma_k), from which the draws are taken. For a Gaussian
population the marginal likelihood is exactly N(observed; mu, C + Sigma_k)
(exact analytic solution: the convolution of two Gaussians), which the
importance-sampling estimate is checked against.
"""

import warnings

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure
from scipy import stats

from sedtemp.errors import ConvergenceWarning, InputError, PopulationWarning
from sedtemp.population import (
    heated_fraction,
    infer_population,
    population_figure,
    population_from_results,
    write_population,
)
from sedtemp.population._core import (
    ImportanceLikelihood,
    interim_log_density,
    prepare_samples,
)
from sedtemp.population.figure import R68
from sedtemp.population.models import GaussianPopulation
from sedtemp.priors import Gaussian, Prior, Uniform

MU, SD = np.array([20.0, 1.8]), np.array([3.0, 0.25])
NOISE_RHO = -0.85


def _cov(sd, rho):
    return np.array([[sd[0] ** 2, rho * sd[0] * sd[1]], [rho * sd[0] * sd[1], sd[1] ** 2]])


def simulate(n, m, rho, seed, *, scale=1.0, interim_T=None):
    """Truths (n, 2), observations (n, 2), noise covariances (n, 2, 2), draws (n, m, 2).

    ``interim_T``: a (mean, sd) Gaussian interim prior on T; the draws are then
    from the exact posterior under it (Gaussian conjugacy), else under a flat one.
    """
    rng = np.random.default_rng(seed)
    truth = rng.multivariate_normal(MU, _cov(SD, rho), n)
    f = rng.uniform(0.5, 1.5, n) * scale
    S = np.einsum("n,ij->nij", f**2, _cov(np.array([3.0, 0.3]), NOISE_RHO))
    obs = truth + np.einsum("nij,nj->ni", np.linalg.cholesky(S), rng.standard_normal((n, 2)))
    mean, post = obs, S
    if interim_T is not None:
        P = np.linalg.inv(S) + np.diag([1.0 / interim_T[1] ** 2, 0.0])
        post = np.linalg.inv(P)
        mean = np.einsum("nij,nj->ni", post, np.einsum("nij,nj->ni", np.linalg.inv(S), obs)
                         + np.array([interim_T[0] / interim_T[1] ** 2, 0.0]))
    draws = mean[:, None, :] + np.einsum("nij,nmj->nmi", np.linalg.cholesky(post), rng.standard_normal((n, m, 2)))
    return truth, obs, S, draws


def _quiet(fn, *args, **kw):
    with warnings.catch_warnings():
        # both checked in their own tests; the short chains here exist to test other things
        warnings.simplefilter("ignore", PopulationWarning)
        warnings.simplefilter("ignore", ConvergenceWarning)
        return fn(*args, **kw)


@pytest.fixture(scope="module")
def fitted():
    truth, obs, S, draws = simulate(100, 60, -0.5, 11)
    return truth, obs, S, draws, _quiet(infer_population, draws, n_steps=700, seed=3)


def test_importance_likelihood_matches_exact_gaussian_convolution():
    _truth, obs, S, draws = simulate(30, 4000, 0.0, 5)
    x, valid, _ = prepare_samples(draws, 2)
    log_int, lo, hi = interim_log_density(None, x, valid)
    like = ImportanceLikelihood(GaussianPopulation(lo, hi), x, -log_int)
    thetas = np.array([[20.0, 1.8, 3.0, 0.25, 0.0], [21.0, 1.7, 2.0, 0.3, -0.4], [19.0, 1.9, 4.0, 0.2, 0.5]])
    got = like.log_likelihood(thetas)
    exact = np.array([sum(stats.multivariate_normal(t[:2], _cov(t[2:4], t[4]) + S[k]).logpdf(obs[k])
                          for k in range(30)) for t in thetas])
    # The constant (flat interim density over the draws' span) cancels in differences. The Monte
    # Carlo error of each source's term is ~ 1/sqrt(ESS) with ESS >~ 1000 of 4000 draws here, so
    # the sum of 30 terms is good to ~ sqrt(30 / 1000) = 0.17: tolerance 0.5 (3 sigma).
    assert np.allclose(got - got[0], exact - exact[0], atol=0.5)


@pytest.mark.parametrize("rho", [-0.5, 0.0])
def test_recovers_population_where_medians_correlation_is_biased(rho):
    _truth, _obs, _S, draws = simulate(120, 60, rho, 21)
    r_med = np.corrcoef(np.median(draws, axis=1).T)[0, 1]
    assert r_med < rho - 0.15  # the noise ellipse drags the medians' correlation down (Kelly et al. 2012)
    res = _quiet(infer_population, draws, n_steps=700, seed=1)
    tab = res.summary()
    true = {"T_mean": MU[0], "beta_mean": MU[1], "T_sd": SD[0], "beta_sd": SD[1], "rho": rho}
    for row in tab:
        # each 95 % interval covers its truth (the seeds were not chosen; a 5 % miss per
        # parameter is expected across many seeds, the slow suite checks coverage)
        assert row["p2_5"] < true[row["parameter"]] < row["p97_5"], row["parameter"]
    assert res.converged


def test_summary_rows_columns_and_meta(fitted):
    res = fitted[-1]
    tab = res.summary()
    assert list(tab["parameter"]) == ["T_mean", "beta_mean", "T_sd", "beta_sd", "rho"]
    assert tab.colnames == ["parameter", "median", "p2_5", "p16", "p84", "p97_5", "unit"]
    assert list(tab["unit"]) == ["K", "", "K", "", ""]
    assert np.all(tab["p2_5"] < tab["p16"]) and np.all(tab["p84"] < tab["p97_5"])
    assert tab.meta["n_sources"] == 100 and tab.meta["population_model"] == "gaussian"
    assert res.samples.shape == ((700 - 700 // 3) * 32, 5)
    assert np.median(res.samples[:, 4]) == pytest.approx(tab["median"][4])


def test_same_seed_same_chain_other_seed_differs():
    _, _, _, draws = simulate(30, 30, 0.0, 2)
    a = _quiet(infer_population, draws, n_steps=60, seed=4)
    b = _quiet(infer_population, draws, n_steps=60, seed=4)
    c = _quiet(infer_population, draws, n_steps=60, seed=5)
    assert np.array_equal(a.chain, b.chain)
    assert not np.array_equal(a.chain, c.chain)


def test_shrunk_draws_match_the_analytic_shrinkage(fitted):
    truth, obs, S, draws, res = fitted
    med = res.median()
    C = _cov(np.array([med["T_sd"], med["beta_sd"]]), med["rho"])
    mu = np.array([med["T_mean"], med["beta_mean"]])
    # exact: posterior of source k under the population N(mu, C) is N(m_k, (C^-1 + S^-1)^-1),
    # m_k = C (C + S)^-1 obs + S (C + S)^-1 mu (exact analytic solution, Gaussian conjugacy)
    inv = np.linalg.inv(C + S)
    m_exact = np.einsum("ij,njk,nk->ni", C, inv, obs) + np.einsum("nij,njk,k->ni", S, inv, mu)
    shrunk = res.shrunk(n_draws=400, seed=1)
    assert shrunk.shape == (100, 400, 2)
    got = shrunk.mean(axis=1)
    post_sd = np.sqrt(np.diagonal(np.linalg.inv(np.linalg.inv(C) + np.linalg.inv(S)), axis1=1, axis2=2))
    # 60 raw draws reweighted: importance-sampling error of a mean ~ sd / sqrt(ESS), ESS >~ 10,
    # plus the hyper-parameter uncertainty: 0.5 posterior sd, in the root mean square over sources
    assert np.sqrt(np.mean(((got - m_exact) / post_sd) ** 2, axis=0)).max() < 0.5
    # shrinkage pulls estimates to the population: closer to the truths than the raw medians
    raw = np.median(draws, axis=1)
    assert np.all(np.mean((got - truth) ** 2, axis=0) < np.mean((raw - truth) ** 2, axis=0))
    w = res.shrinkage_weights()
    assert np.allclose(w.sum(axis=1), 1.0)
    assert np.allclose(res.shrinkage_weights(draws), w)


def test_source_table_columns(fitted):
    tab = fitted[-1].source_table()
    assert tab.colnames[:3] == ["id", "population_ess", "population_flag"]
    assert tab["T_shrunk_median"].unit == u.K and len(tab) == 100
    assert np.all(tab["T_shrunk_p16"] <= tab["T_shrunk_median"])
    assert np.all(tab["population_ess"] >= 1) and np.all(tab["population_ess"] <= 60)


def test_too_few_draws_warn_and_flag():
    # a narrow population (sd 0.3 K) seen through broad posteriors (sd ~ 3 K) with 8 draws each:
    # ~ 8 x 0.3 / 3 < 1 effective draw per source, the known failure of the method
    rng = np.random.default_rng(0)
    truth = rng.normal([20.0, 1.8], [0.3, 0.03], (40, 2))
    draws = truth[:, None, :] + rng.normal(0, [3.0, 0.3], (40, 8, 2))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # a short chain: not what is tested
        with pytest.warns(PopulationWarning, match=r"sources have an importance-weight ESS below 10 .*n_keep"):
            res = infer_population(draws, n_steps=60, seed=0)
    assert np.sum(res.flags == "few_effective_draws") > 20
    assert res.summary().meta["n_few_effective_draws"] == np.sum(res.flags == "few_effective_draws")


def test_short_chain_warns():
    _, _, _, draws = simulate(30, 30, 0.0, 2)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PopulationWarning)  # few draws: not what is tested
        with pytest.warns(ConvergenceWarning, match=r"population chain of 30 steps is shorter than 20 autocorr"):
            res = infer_population(draws, n_steps=30, seed=0)
    assert not res.converged and not res.summary().meta["converged"]


def test_missing_draws_are_padding_and_empty_sources_are_flagged():
    _, _, _, draws = simulate(40, 30, 0.0, 8)
    draws[3] = np.nan
    draws[5, 10:] = np.nan
    res = _quiet(infer_population, draws, n_steps=60, seed=0)
    assert res.flags[3] == "no_draws" and not res.usable[3] and np.isnan(res.ess[3])
    assert res.usable[5] and res.ess[5] <= 10
    assert np.all(np.isnan(res.shrunk(seed=0)[3]))
    assert not np.isnan(res.shrunk(seed=0)[5]).any()


def test_interim_prior_is_divided_out():
    # draws made under a Gaussian interim prior on T (20 +- 2 K) look narrower than the
    # population; declaring the interim prior recovers the true T_sd, ignoring it does not
    _truth, _obs, _S, draws = simulate(100, 50, 0.0, 4, interim_T=(20.0, 2.0))
    box = Prior({"T": Gaussian(20.0, 2.0), "beta": Uniform(0.0, 4.0)})
    right = _quiet(infer_population, draws, interim_prior=box, n_steps=400, seed=2).summary()
    wrong = _quiet(infer_population, draws, n_steps=400, seed=2).summary()
    assert right["p2_5"][2] < SD[0] < right["p97_5"][2]
    assert wrong["p97_5"][2] < SD[0]
    # the three ways of giving the same interim prior give the same chain (log-densities
    # differ by constants only)
    ref = _quiet(infer_population, draws, interim_prior=box, n_steps=40, seed=2).chain
    pair = _quiet(infer_population, draws, interim_prior=(box["T"], box["beta"]), n_steps=40, seed=2).chain
    fn = _quiet(infer_population, draws, n_steps=40, seed=2, interim_prior=lambda T, beta: box["T"].logpdf(T)).chain
    assert np.array_equal(pair, ref)
    assert np.allclose(fn, ref, rtol=1e-9)


def test_mixture_of_two_gaussians_recovers_the_weight():
    rng = np.random.default_rng(3)
    n, m = 100, 40
    hot = rng.uniform(size=n) < 0.3
    truth = np.where(hot[:, None], rng.normal([32, 1.5], [2, 0.15], (n, 2)), rng.normal([16, 2.0], [1.5, 0.15], (n, 2)))
    obs = truth + rng.normal(0, [1.0, 0.1], (n, 2))
    draws = obs[:, None, :] + rng.normal(0, [1.0, 0.1], (n, m, 2))
    res = _quiet(infer_population, draws, model="mixture", n_steps=500, seed=0)
    tab = res.summary()
    assert list(tab["parameter"][:6]) == ["T_mean", "beta_mean", "T_sd", "beta_sd", "rho", "fraction_2"]
    row = {r["parameter"]: r for r in tab}
    assert row["fraction_2"]["p2_5"] < hot.mean() < row["fraction_2"]["p97_5"]
    # component means within 1 K of the simulated ones (population sds 1.5-2 K over ~30-70 sources)
    assert abs(row["T_mean_1"]["median"] - 16) < 1 and abs(row["T_mean_2"]["median"] - 32) < 1
    # the overall moments are those of the mixture: the mean of the truths within 1 K
    assert abs(row["T_mean"]["median"] - truth[:, 0].mean()) < 1


def _heated_draws(frac, seed, n=200, m=50, s_eq=0.07):
    """y = ln(T_fit/T_eq) draws: equilibrium N(0, s_eq), heated N(0.3, 0.05); Gaussian errors
    0.05-0.12; draws from the exact posterior under a prior uniform in T (p0(y) ~ e^y), which is
    N(y_obs + sigma^2, sigma^2) (exact analytic solution)."""
    rng = np.random.default_rng(seed)
    hot = rng.uniform(size=n) < frac
    y = np.where(hot, rng.normal(0.3, 0.05, n), rng.normal(0.0, s_eq, n))
    sig = rng.uniform(0.05, 0.12, n)
    obs = y + sig * rng.standard_normal(n)
    return hot, (obs + sig**2)[:, None] + sig[:, None] * rng.standard_normal((n, m))


def test_heated_fraction_recovers_a_known_fraction():
    hot, draws = _heated_draws(0.3, 1)
    res = _quiet(heated_fraction, draws, equilibrium_scatter=0.07, n_steps=400, seed=0)
    assert res.interval[0] < hot.mean() < res.interval[1]
    assert res.interval[1] - res.interval[0] < 0.25
    # membership: heated sources are mostly assigned to the heated component
    assert res.p_heated[hot].mean() > 0.7 and res.p_heated[~hot].mean() < 0.15
    assert list(res.summary()["parameter"]) == ["fraction", "heated_mean", "heated_sd"]


def test_heated_fraction_of_an_equilibrium_catalogue_is_small():
    _, draws = _heated_draws(0.0, 2)
    res = _quiet(heated_fraction, draws, equilibrium_scatter=0.07, n_steps=400, seed=0)
    assert res.interval[1] < 0.15


def test_population_from_results_and_files(tmp_path):
    _truth, _obs, _S, draws = simulate(40, 30, 0.0, 9)
    draws[2] = np.nan  # a failed fit
    tab = Table({"id": [f"src{i}" for i in range(40)]})
    tab["draws_T"] = draws[..., 0] * u.K
    tab["draws_beta"] = draws[..., 1]
    _hot, ydraws = _heated_draws(0.3, 3, n=40, m=30)
    res = _quiet(population_from_results, tab, n_steps=80, seed=0, ratio_draws=np.exp(ydraws),
                 equilibrium_scatter=0.07)
    assert res.source_ids[2] == "src2" and res.flags[2] == "no_draws"
    assert res.heated is not None and 0 <= res.heated.fraction <= 1
    paths = write_population(res, tmp_path / "out", version="0.0test")
    assert [p.name for p in paths] == ["population.ecsv", "population_sources.ecsv",
                                       "population_posterior.png", "population_posterior.pdf"]
    summ = Table.read(paths[0], format="ascii.ecsv")
    assert list(summ["parameter"]) == ["T_mean", "beta_mean", "T_sd", "beta_sd", "rho", "fraction",
                                       "heated_mean", "heated_sd"]
    assert summ.meta["sedtemp_version"] == "0.0test" and summ.meta["n_no_draws"] == 1
    src = Table.read(paths[1], format="ascii.ecsv")
    assert list(src["id"][:3]) == ["src0", "src1", "src2"] and src["population_flag"][2] == "no_draws"
    assert "p_heated" in src.colnames
    assert paths[2].read_bytes()[:4] == b"\x89PNG" and paths[3].read_bytes()[:4] == b"%PDF"
    assert not [p for p in (tmp_path / "out").iterdir() if p.name.startswith(".tmp-")]


def test_figure_structure(fitted):
    res = fitted[-1]
    fig = population_figure(res)
    assert isinstance(fig, Figure) and len(fig.axes) == 2
    ax = fig.axes[0]
    assert ax.get_xlabel() == "T (K)" and ax.get_ylabel() == "beta"
    segs = next(c for c in ax.collections if isinstance(c, LineCollection)).get_segments()
    assert len(segs) == 100
    # the population's 68 % line is the ellipse (x - mu)^T C^-1 (x - mu) = R68^2 (independent evaluation)
    med = np.median(res.samples, axis=0)
    C = _cov(med[2:4], med[4])
    line = ax.get_lines()[0].get_xydata() - med[:2]
    assert np.allclose(np.einsum("ni,ij,nj->n", line, np.linalg.inv(C), line), R68**2)
    assert fig.axes[1].get_xlabel().startswith("rho")
    again = population_figure(res, fig=fig)
    assert again is fig and len(fig.axes) == 2


@pytest.mark.parametrize("bad, match", [
    (np.zeros((5, 10)), r"samples must have shape \(n_sources, n_draws, 2\), got \(5, 10\)"),
    (np.full((3, 4, 2), np.nan), r"only 0 source\(s\) have finite draws"),
])
def test_bad_samples_are_refused(bad, match):
    with pytest.raises(InputError, match=match):
        infer_population(bad)


def test_bad_options_are_refused():
    _, _, _, draws = simulate(10, 10, 0.0, 1)
    with pytest.raises(InputError, match=r"population model 'lognormal' is unknown; choose one of"):
        infer_population(draws, model="lognormal")
    with pytest.raises(InputError, match=r"n_walkers must be at least twice .* \(10 for model 'gaussian'\), got 6"):
        infer_population(draws, n_walkers=6)
    with pytest.raises(InputError, match=r"n_steps must be at least 30, got 5"):
        infer_population(draws, n_steps=5)
    with pytest.raises(InputError, match=r"interim_prior gives zero density to draws of source 0"):
        infer_population(draws, interim_prior=Prior({"T": Uniform(100, 200), "beta": Uniform(0, 4)}))
    with pytest.raises(InputError, match=r"interim_prior must be None .* got 'flat'"):
        infer_population(draws, interim_prior="flat")
    with pytest.raises(InputError, match=r"interim_prior callable must return log-densities of shape \(10, 10\)"):
        infer_population(draws, interim_prior=lambda T, b: np.zeros(3))
    with pytest.raises(InputError, match=r"source_ids has 2 entries for 10 sources"):
        _quiet(infer_population, draws, n_steps=30, source_ids=["a", "b"])


def test_heated_fraction_bad_inputs():
    _, draws = _heated_draws(0.2, 0, n=20, m=10)
    with pytest.raises(InputError, match=r"equilibrium_scatter must be a positive number"):
        heated_fraction(draws, equilibrium_scatter=0.0)
    with pytest.raises(InputError, match=r"no draw of ln\(T_fit/T_eq\) reaches 2 x equilibrium_scatter"):
        heated_fraction(draws, equilibrium_scatter=5.0)
    with pytest.raises(InputError, match=r"interim_prior 'flat' is unknown; choose one of"):
        heated_fraction(draws, equilibrium_scatter=0.07, interim_prior="flat")


def test_population_from_results_refuses_missing_draws():
    tab = Table({"id": ["a", "b"], "T_median": [10.0, 12.0] * u.K})
    with pytest.raises(InputError, match=r"no \['draws_T', 'draws_beta'\] column\(s\); keep posterior draws"):
        population_from_results(tab)
    with pytest.raises(InputError, match=r"draws must be a mapping with 'T' and 'beta'"):
        population_from_results(tab, draws=np.zeros((2, 3)))
    tab["draws_T"] = np.full((2, 5), 20.0) * u.K
    tab["draws_beta"] = np.full((2, 5), 1.8)
    with pytest.raises(InputError, match=r"ratio draws given but no equilibrium_scatter"):
        _quiet(population_from_results, tab, ratio_draws=np.ones((2, 5)), n_steps=30,
               interim_prior=Prior({"T": Uniform(5, 50), "beta": Uniform(0, 4)}))
