"""Simulation-based calibration of the emcee fitter (Talts et al. 2018, Algorithm 1).

Draws thinned by the autocorrelation time (Talts et al. 2018, Sect. 5.1) so
that the ranks use nearly independent draws.
"""

import numpy as np
import pytest

from . import common as C

pytestmark = pytest.mark.slow

N_SOURCES = 40
#: 3.5 binomial sd (false-alarm rate 5e-4 per check); with 40 sources this is ~26 pp at 68 %.
N_SD = 3.5


def test_mcmc_sbc_and_coverage_7_bands_snr20():
    model, prior, bands = C.make_model(), C.make_prior(), C.make_bands(7)
    cal = C.make_calibration(bands)
    pop = C.simulate(model, bands, prior, N_SOURCES, 20.0, np.random.default_rng(21), calibration=cal)
    summ, draws, conv = [], [], []
    for i in range(pop.n):  # one MCMC per source
        s, d, c = C.mcmc_fit(pop.flux[i], pop.err[i], bands, model, prior, calibration=cal, seed=i,
                             n_keep=50, ess_target=300)
        summ.append(s)
        draws.append(d)
        conv.append(c)
    assert np.mean(conv) > 0.7
    for j, k in ((1, "T"), (2, "beta")):
        t = pop.theta[:, j]
        d = np.array([x[k][:50] for x in draws])
        p, _ = C.rank_uniformity_pvalue(C.sbc_ranks(t, d), d.shape[1], n_bins=5)
        assert p > 1e-3, (k, p)
        for lo, hi, nominal in (("p16", "p84", 0.68), ("p2_5", "p97_5", 0.95)):
            cov, _ = C.interval_coverage([s[f"{k}_{lo}"] for s in summ], [s[f"{k}_{hi}"] for s in summ], t)
            assert abs(cov - nominal) < N_SD * C.binomial_sd(nominal, pop.n), (k, nominal, cov)
