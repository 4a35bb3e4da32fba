"""Simulation-based calibration and interval coverage of the grid posterior.

Reference: Talts et al. (2018, arXiv:1804.06788), Algorithm 1: with truths
drawn from the fitter's own prior and data from its own likelihood, the rank
of each truth among L independent posterior draws is uniform on {0..L}, and
central q intervals cover the truth with probability q.
"""

import numpy as np
import pytest

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
    cols, draws, flags = C.grid_fit(pop, bands, model, prior, calibration=cal, chunk=50,
                                    T_nodes=FINE_T, beta_nodes=FINE_BETA, seed=1)
    assert np.mean(["grid_too_coarse" in f for f in flags]) < 0.01
    _coverage_checks(pop, cols)


@pytest.mark.parametrize("n_bands,snr", [(4, 5.0), (7, 20.0)])
def test_grid_sbc_ranks_uniform_constant_depth(n_bands, snr):
    # Constant-depth noise: the error bars do not depend on the truth, so SBC is exact.
    model, prior, bands = C.make_model(), C.make_prior(), C.make_bands(n_bands)
    cal = C.make_calibration(bands)
    pop = C.simulate(model, bands, prior, 800, snr, np.random.default_rng([12, n_bands, int(snr)]),
                     calibration=cal, noise="depth")
    _, draws, flags = C.grid_fit(pop, bands, model, prior, calibration=cal, chunk=50,
                                 T_nodes=FINE_T, beta_nodes=FINE_BETA, seed=2)
    # The brightest sources of a fixed-depth survey reach S/N of thousands, narrower
    # than any fixed grid: they are flagged 'grid_too_coarse' and left out here.
    keep = ~np.array(["grid_too_coarse" in f for f in flags])
    assert keep.mean() > 0.6
    for j, k in ((1, "T"), (2, "beta")):
        p, _ = C.rank_uniformity_pvalue(C.sbc_ranks(pop.theta[keep, j], draws[k][keep]), draws[k].shape[1])
        assert p > P_MIN, (k, p)


def test_sources_not_flagged_coarse_are_calibrated_on_default_grid():
    # With the package default grid (100 x 60) at S/N 100 and 7 bands a large share of
    # posteriors is narrower than a cell; those are flagged 'grid_too_coarse', and the
    # unflagged ones must still be calibrated (the flag is the user's guard).
    model, prior, bands = C.make_model(), C.make_prior(), C.make_bands(7)
    cal = C.make_calibration(bands)
    pop = C.simulate(model, bands, prior, 800, 100.0, np.random.default_rng(13), calibration=cal)
    cols, _, flags = C.grid_fit(pop, bands, model, prior, calibration=cal, seed=3)
    coarse = np.array(["grid_too_coarse" in f for f in flags])
    assert coarse.mean() > 0.05  # the regime where the default grid is too coarse (report: ~27 %)
    keep = ~coarse
    _coverage_checks(pop.subset(keep), {k: v[keep] for k, v in cols.items()})
