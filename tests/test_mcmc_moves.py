"""The independence Metropolis-Hastings move of the MCMC fitter keeps its target invariant.

Reference: an exact analytic target (a correlated 2-D Gaussian, whose mean and
covariance are known), sampled with a proposal that is deliberately off
(shifted by 0.4 sd in both axes, against the anticorrelation, and 20 % too
narrow in beta): a wrong proposal ratio in the
Hastings factor would bias the draws towards the proposal.
"""

import emcee
import numpy as np
import pytest

from sedtemp.fit.mcmc import _independence_move, _moves

MEAN = np.array([20.0, 1.8])
COV = np.array([[4.0, -0.3], [-0.3, 0.04]])  # T-beta anticorrelation, correlation -0.75
ICOV = np.linalg.inv(COV)


def _log_gauss(x):
    d = x - MEAN
    return -0.5 * np.einsum("ij,jk,ik->i", d, ICOV, d)


def _off_draws(rng, n=256):
    sd = np.sqrt(np.diag(COV))
    x = rng.multivariate_normal(MEAN, COV, n)
    return MEAN + (x - MEAN) * np.array([1.0, 0.8]) + 0.4 * sd


def test_independence_move_alone_samples_the_exact_gaussian():
    rng = np.random.default_rng(3)
    move = _independence_move(_off_draws(rng))
    p0 = rng.multivariate_normal(MEAN, COV, 32)
    sampler = emcee.EnsembleSampler(32, 2, _log_gauss, vectorize=True, moves=[(move, 1.0)])
    sampler.run_mcmc(emcee.State(p0, random_state=np.random.RandomState(4).get_state()), 4000)
    x = sampler.get_chain(discard=200, flat=True)
    tau = np.max(emcee.autocorr.integrated_time(sampler.get_chain(discard=200), quiet=True))
    n_eff = x.shape[0] / tau
    sd = np.sqrt(np.diag(COV))
    # Monte Carlo error of a mean: sd / sqrt(n_eff); 5 of them as tolerance
    assert np.all(np.abs(x.mean(axis=0) - MEAN) < 5 * sd / np.sqrt(n_eff))
    # variance: relative MC error ~ sqrt(2 / n_eff); 5 of them
    assert np.all(np.abs(x.var(axis=0) / np.diag(COV) - 1) < 5 * np.sqrt(2 / n_eff))
    r = np.corrcoef(x.T)[0, 1]
    assert r == pytest.approx(-0.75, abs=5 * (1 - 0.75**2) / np.sqrt(n_eff))
    assert 0.2 < np.mean(sampler.acceptance_fraction) < 1.0  # it moves


def test_log_ratio_is_the_proposal_density_ratio():
    # for an independence proposal q, the Hastings factor is ln q(x0) - ln q(x1)
    rng = np.random.default_rng(8)
    draws = rng.multivariate_normal(MEAN, COV, 500)
    move = _independence_move(draws)
    x0 = rng.multivariate_normal(MEAN, COV, 10)
    x1, factor = move.get_proposal(x0, np.random.RandomState(1))
    x1b, factor_swapped = move.get_proposal(x1, np.random.RandomState(1))
    np.testing.assert_allclose(x1b, x1, rtol=0, atol=0)  # same random state, same proposal
    # the factor of (x1 -> x1) is zero; of (x0 -> x1) it is antisymmetric in the pair
    np.testing.assert_allclose(factor_swapped, 0.0, atol=1e-12)
    assert np.all(np.isfinite(factor)) and np.any(np.abs(factor) > 1e-3)


def test_moves_use_the_independence_proposal_only_with_draws():
    assert all(not isinstance(m, emcee.moves.MHMove) for m, _ in _moves())
    moves = _moves(np.random.default_rng(0).normal(size=(64, 2)))
    assert isinstance(moves[0][0], emcee.moves.MHMove)
    assert sum(w for _, w in moves) == pytest.approx(1.0, abs=1e-12)
