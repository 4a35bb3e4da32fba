"""Simulation-based calibration and interval coverage of the grid posterior.

Reference: Talts et al. (2018, arXiv:1804.06788), Algorithm 1: with truths
drawn from the fitter's own prior and data from its own likelihood, the rank
of each truth among L independent posterior draws is uniform on {0..L}, and
central q intervals cover the truth with probability q.
"""

import warnings

import numpy as np
import pytest

from sedtemp.errors import SedtempWarning
from sedtemp.fit.grid import GridPosterior

from . import common as C

pytestmark = pytest.mark.slow

#: Grid fine enough that no posterior at S/N <= 100 is narrower than 0.3 cells
#: (the report shows 0.0-0.3 % flagged with 300 x 200 nodes).
FINE_T = np.geomspace(8.0, 60.0, 240)
FINE_BETA = np.linspace(0.8, 2.8, 160)
#: Coverage tolerance: 3.5 binomial sd (two-sided false-alarm rate 5e-4 per check,
#: < 1 % over the checks of this module; the seeds are fixed, so it is deterministic).
N_SD = 3.5
#: SBC uniformity: chi-square p-value floor (false-alarm rate 1e-3 per check).
P_MIN = 1e-3


def _coverage_checks(pop, cols, names=("T", "beta")):
    for j, k in ((1, "T"), (2, "beta")):
        if k not in names:
            continue
        for lo, hi, nominal in (("p16", "p84", 0.68), ("p2_5", "p97_5", 0.95)):
            cov, _ = C.interval_coverage(cols[f"{k}_{lo}"], cols[f"{k}_{hi}"], pop.theta[:, j])
            sd = C.binomial_sd(nominal, pop.n)
            assert abs(cov - nominal) < N_SD * sd, (k, nominal, cov)


@pytest.mark.parametrize("n_bands", [4, 7])
@pytest.mark.parametrize("snr", [5.0, 20.0, 100.0])
def test_grid_coverage_fixed_snr(n_bands, snr):
    # 800 sources; per-band S/N fixed (sigma = true flux / snr), calibration groups on.
    model, prior, bands = C.make_model(), C.make_prior(), C.make_bands(n_bands)
    cal = C.make_calibration(bands)
    pop = C.simulate(model, bands, prior, 800, snr, np.random.default_rng([11, n_bands, int(snr)]), calibration=cal)
    cols, _draws, flags = C.grid_fit(pop, bands, model, prior, calibration=cal, chunk=50,
                                    T_nodes=FINE_T, beta_nodes=FINE_BETA, seed=1)
    assert np.mean(["grid_too_coarse" in f for f in flags]) < 0.01
    _coverage_checks(pop, cols)


def _depth_population(n_bands, snr):
    model, prior, bands = C.make_model(), C.make_prior(), C.make_bands(n_bands)
    cal = C.make_calibration(bands)
    pop = C.simulate(model, bands, prior, 800, snr, np.random.default_rng([12, n_bands, int(snr)]),
                     calibration=cal, noise="depth")
    _, draws, flags = C.grid_fit(pop, bands, model, prior, calibration=cal, chunk=50,
                                 T_nodes=FINE_T, beta_nodes=FINE_BETA, seed=2)
    # selection on the *observed* S/N (a function of the data) keeps SBC exact;
    # selecting on the true flux would not
    peak_snr = np.nanmax(pop.flux / pop.err, axis=1)
    return pop, draws, flags, peak_snr


#: Brightest band S/N below which the constant-depth SBC must pass: above it the
#: known high-S/N limitation (README, Validation) applies.
_SNR_VALIDATED = 300.0


@pytest.mark.parametrize("n_bands,snr", [(4, 5.0), (7, 20.0)])
def test_grid_sbc_ranks_uniform_constant_depth(n_bands, snr):
    # Constant-depth noise: the error bars do not depend on the truth, so SBC is exact.
    # The brightest sources of a fixed-depth survey reach S/N of thousands; sources
    # whose brightest band exceeds S/N 300 are tested separately below.
    pop, draws, flags, peak_snr = _depth_population(n_bands, snr)
    keep = ~np.array(["grid_too_coarse" in f for f in flags]) & (peak_snr < _SNR_VALIDATED)
    assert keep.mean() > 0.3
    for j, k in ((1, "T"), (2, "beta")):
        p, _ = C.rank_uniformity_pvalue(C.sbc_ranks(pop.theta[keep, j], draws[k][keep]), draws[k].shape[1])
        assert p > P_MIN, (k, p)


def test_grid_sbc_ranks_uniform_for_very_bright_sources():
    # Was a strict xfail (the "known limitation" of README): fixed by the zoom that
    # re-centres on a local optimum and widens until the mode is interior.
    pop, draws, _flags, peak_snr = _depth_population(7, 20.0)
    keep = peak_snr >= _SNR_VALIDATED
    assert keep.sum() > 50
    for j, k in ((1, "T"), (2, "beta")):
        p, _ = C.rank_uniformity_pvalue(C.sbc_ranks(pop.theta[keep, j], draws[k][keep]), draws[k].shape[1])
        assert p > P_MIN, (k, p)


@pytest.mark.parametrize("n_bands", [4, 7])
def test_default_grid_with_zoom_is_calibrated_at_snr100(n_bands):
    # The package default grid (100 x 60 nodes) at S/N 100: most posteriors are narrower
    # than a cell and are zoomed onto a finer grid (GridPosterior.zoomed). Before the
    # zoom the beta 68 % coverage here was 56.5 % (previous report); now every source,
    # none left out, must be calibrated, and none may stay 'grid_too_coarse'.
    model, prior, bands = C.make_model(), C.make_prior(), C.make_bands(n_bands)
    cal = C.make_calibration(bands)
    pop = C.simulate(model, bands, prior, 800, 100.0, np.random.default_rng([13, n_bands]), calibration=cal)
    cols, _, flags = C.grid_fit(pop, bands, model, prior, calibration=cal, seed=3)
    assert np.mean(["grid_too_coarse" in f for f in flags]) < 0.01
    _coverage_checks(pop, cols)


def test_default_grid_zooms_at_the_lower_T_prior_edge():
    # Exact behaviour: a narrow posterior at the lower T prior edge (T = 8.1 K, prior
    # 8-60 K, S/N 100) on the package's own default nodes must be summarised (zoomed)
    # without error and its interval must stay inside the prior. The zoom window is
    # clipped at log(T_low) and exp(log(8.0)) = 7.999999999999998 < 8.
    model, prior, bands = C.make_model(), C.make_prior(), C.make_bands(7)
    pop = C.simulate(model, bands, prior, 1, 100.0, np.random.default_rng(14), theta=np.array([[0.0, 8.1, 1.8]]))
    grid = GridPosterior(bands, model=model, prior=prior)  # default nodes, not C.default_nodes
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SedtempWarning)  # prior-edge warnings are expected here
        cols, _ = grid.summarise(pop.flux * C.JY, pop.err * C.JY, np.zeros((1, 7), bool), n_draws=50, rng=0)
    assert 8.0 <= cols["T_p2_5"][0] < cols["T_p97_5"][0] <= 60.0
