"""Fit defaults shared by the Python API and the workflow (one place for each number).

``sedtemp.config`` imports these, so a workflow with no ``[fit]`` options and
a call of :func:`~sedtemp.fit.fit_source` / :func:`~sedtemp.fit.grid_posterior`
with no options fit the same way.
"""

from __future__ import annotations

__all__ = [
           "CHECK_EVERY",
           "CHUNK_SIZE",
           "ESS_TARGET",
           "MAX_STEPS",
           "N_BETA",
           "N_DRAWS",
           "N_PPP",
           "N_T",
           "N_WALKERS",
]

#: emcee walkers. The log posterior is vectorised over walkers, so more walkers
#: cost little per step while the chain-length rule (50 tau) fixes the steps.
N_WALKERS = 32
#: Effective sample size (rank-normalised bulk ESS, Vehtari et al. 2021) of T
#: and beta at which the chain stops.
ESS_TARGET = 400
#: Posterior draws kept per source (grid and MCMC results, the comparison's input).
N_DRAWS = 400
#: Posterior draws used for the posterior predictive p-value on the grid.
N_PPP = 100
#: Cap on MCMC steps; a run that hits it is flagged ``not_converged``.
MAX_STEPS = 20000
#: Steps between MCMC convergence checks.
CHECK_EVERY = 100
#: Default grid nodes: log-spaced in T, linear in beta, across the prior support.
N_T = 100
N_BETA = 60
#: Sources per vectorised block of the grid fitter (keeps work arrays in cache).
CHUNK_SIZE = 32
