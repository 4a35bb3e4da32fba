"""T-beta correlation across a population simulated with independent T and beta.

Reference: Shetty et al. (2009, ApJ 696, 676) and Kelly et al. (2012, ApJ 752,
55): chi^2 (least-squares) fits of noisy photometry produce a spurious T-beta
anticorrelation across a population. The posterior medians must reproduce
the population's true correlation, within its sampling sd 1/sqrt(n) (exact
for the Pearson r of independent variables), better than least squares.
"""

import numpy as np
import pytest

from . import common as C

pytestmark = pytest.mark.slow


def test_posterior_medians_do_not_manufacture_anticorrelation():
    model, prior, bands = C.make_model(), C.make_prior(), C.make_bands(4)
    cal = C.make_calibration(bands)
    n = 400
    pop = C.simulate(model, bands, prior, n, 5.0, np.random.default_rng(31), calibration=cal)
    cols, _, _ = C.grid_fit(pop, bands, model, prior, calibration=cal, n_draws=20, seed=4)
    lsq = C.least_squares_fit(pop, bands, model)
    ok = np.all(np.isfinite(lsq), axis=1)
    assert ok.mean() > 0.95
    r_true = np.corrcoef(pop.theta[:, 1], pop.theta[:, 2])[0, 1]
    r_post = np.corrcoef(cols["T_median"], cols["beta_median"])[0, 1]
    r_lsq = np.corrcoef(lsq[ok, 1], lsq[ok, 2])[0, 1]
    # posterior medians: the true population r within 3 / sqrt(n)
    assert abs(r_post - r_true) < 3 / np.sqrt(n)
    # least squares is pulled towards anticorrelation (the published effect)
    assert r_lsq < r_post
