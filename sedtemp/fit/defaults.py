"""Fit defaults shared by the Python API and the workflow (one place for each number).

``sedtemp.pipeline.config`` imports these, so a workflow with no ``[fit]`` options and
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

#: emcee walkers. The log posterior is vectorised over walkers, so a step of 64
#: walkers costs about what a step of 32 does: 64 gave ~1.9x the effective
#: samples per second of 32 (fit_source, six bands with calibration; loaded machine).
N_WALKERS = 64
#: Effective sample size (rank-normalised bulk ESS, Vehtari et al. 2021) of T
#: and beta at which the chain stops (with split R-hat < 1.01).
ESS_TARGET = 1000
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
