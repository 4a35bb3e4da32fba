"""Hierarchical population inference from per-source posterior draws (importance sampling).

For source k with draws x_kj (j = 1..m_k) from its posterior under an interim
prior p0, the marginal likelihood of population hyper-parameters alpha is,
up to a constant (Hogg, Myers & Bovy 2010, ApJ 725, 2166, eq. 9),

    L_k(alpha) ~ (1 / m_k) sum_j p(x_kj | alpha) / p0(x_kj),

and log L(alpha) = sum_k log L_k(alpha). It is evaluated for every walker,
source and draw at once, sampled with emcee. The estimate is only as good as
the draws: where the population is much narrower than a source's posterior,
few draws carry the weight, which the effective sample size (ESS) of the
importance weights measures per source.

emcee is imported here and in ``fit/mcmc.py`` only (tests/test_layering.py).
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING, Any

import emcee
import numpy as np
from numpy.typing import ArrayLike

from ..errors import ConvergenceWarning, InputError, PopulationWarning
from ..seeds import resolve_seed
from ._core import (
    ImportanceLikelihood,
    importance_weights,
    interim_log_density,
    prepare_samples,
    thin_for_weights,
)
from .models import population_model
from .result import FLAG_FEW_DRAWS, FLAG_NO_DRAWS, PopulationResult

if TYPE_CHECKING:
    from ..priors import Prior

__all__ = [
    "DEFAULT_MIN_ESS",
    "DEFAULT_N_STEPS",
    "infer_population",
    "run_ensemble",
    "sample_population",
    "source_flags",
]

#: Sources whose importance weights have an ESS below this are flagged (rule of thumb:
#: ten effective draws give the per-source integral a relative error of order 30 %).
DEFAULT_MIN_ESS = 10.0
#: Default chain length per walker; the first third is dropped as burn-in.
DEFAULT_N_STEPS = 2000
#: The chain must be this many autocorrelation times long after burn-in (common practice:
#: emcee's documentation advises 50; 20 is the least we accept without a warning).
_TAU_LENGTH = 20


def run_ensemble(log_post: Callable[[np.ndarray], np.ndarray], p0: np.ndarray, seed: int,
                 n_steps: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """emcee run from ``p0`` (W, p): chain (n_steps, W, p), log-probabilities, acceptance, tau."""
    nw, nd = p0.shape
    sampler = emcee.EnsembleSampler(nw, nd, log_post, vectorize=True,
                                    moves=[(emcee.moves.DEMove(), 0.8), (emcee.moves.StretchMove(), 0.2)])
    state = emcee.State(p0, random_state=np.random.RandomState(seed).get_state())
    sampler.run_mcmc(state, n_steps, progress=False)
    chain = sampler.get_chain()
    with np.errstate(invalid="ignore", divide="ignore"):  # a walker-frozen parameter gives NaN
        tau = emcee.autocorr.integrated_time(chain[n_steps // 3:], tol=0)
    tau = np.where(np.isfinite(tau), tau, np.inf)
    return chain, sampler.get_log_prob(), sampler.acceptance_fraction, tau


def start_ensemble(model: Any, log_post: Callable[[np.ndarray], np.ndarray], x: np.ndarray,
                   rng: np.random.Generator, n_walkers: int) -> np.ndarray:
    """Walkers inside the hyper-prior with finite posterior (retries with more jitter)."""
    p0 = model.initial(x, rng, 4 * n_walkers)
    ok = np.isfinite(log_post(p0))
    if ok.sum() < n_walkers:
        raise InputError(f"population: could not place {n_walkers} walkers inside the hyper-prior "
                         f"({int(ok.sum())} of {4 * n_walkers} starting points valid); the draws may not overlap "
                         "the population model's support")
    return p0[ok][:n_walkers]


def sample_population(model: Any, x: np.ndarray, valid: np.ndarray, log_interim: np.ndarray, *,
                      seed: int | None, n_walkers: int, n_steps: int
                      ) -> tuple[ImportanceLikelihood, np.ndarray, np.ndarray, np.ndarray, np.ndarray, bool, int]:
    """Run the sampler; returns (likelihood, chain, log_prob, acceptance, tau, converged, burn)."""
    if n_walkers < 2 * len(model.param_names):
        raise InputError(f"n_walkers must be at least twice the number of hyper-parameters "
                         f"({2 * len(model.param_names)} for model {model.name!r}), got {n_walkers}")
    if n_steps < 30:
        raise InputError(f"n_steps must be at least 30, got {n_steps}")
    base = np.where(valid, -log_interim, -np.inf)
    like = ImportanceLikelihood(model, x, base)
    seed = resolve_seed(seed)
    p0 = start_ensemble(model, like, x, np.random.default_rng(seed), n_walkers)
    chain, lp, acc, tau = run_ensemble(like, p0, seed, n_steps)
    burn = n_steps // 3
    converged = bool(n_steps - burn >= _TAU_LENGTH * np.max(tau))
    if not converged:
        warnings.warn(f"population chain of {n_steps} steps is shorter than {_TAU_LENGTH} autocorrelation "
                      f"times after burn-in (tau up to {np.max(tau):.0f}); raise n_steps",
                      ConvergenceWarning, stacklevel=3)
    return like, chain, lp, acc, tau, converged, burn


def source_flags(ess: np.ndarray, usable: np.ndarray, min_ess: float, what: str) -> np.ndarray:
    """Per-source flag strings and one categorised warning when any source is flagged."""
    flags = np.where(~usable, FLAG_NO_DRAWS, np.where(ess < min_ess, FLAG_FEW_DRAWS, "")).astype(str)
    few = int(np.sum(flags == FLAG_FEW_DRAWS))
    if few:
        warnings.warn(f"{what}: {few} of {int(usable.sum())} sources have an importance-weight ESS below "
                      f"{min_ess:g} (flag '{FLAG_FEW_DRAWS}'); their draws are too few to represent the "
                      "population: keep more draws per source (e.g. [output] n_keep)", PopulationWarning,
                      stacklevel=3)
    return flags


def infer_population(samples: ArrayLike, *,
                     interim_prior: Prior | Sequence[Any] | Callable[..., np.ndarray] | None = None,
                     model: str | Any = "gaussian", seed: int | None = 0,
                     n_walkers: int = 32, n_steps: int = DEFAULT_N_STEPS, min_ess: float = DEFAULT_MIN_ESS,
                     source_ids: Sequence | None = None) -> PopulationResult:
    """Posterior of the (T, beta) population from every source's posterior draws.

    Parameters
    ----------
    samples : array_like, shape (n_sources, n_draws, 2)
        Posterior draws of (T [K], beta) per source, obtained under the
        interim prior. NaN rows are missing draws (sources may have fewer);
        a source without any finite draw is left out (flag ``no_draws``).
    interim_prior : None, Prior, pair of 1-D priors or callable, keyword-only
        The prior the draws were obtained under. None: uniform in T and beta
        over the range the draws span (the grid fitter's default priors are
        uniform). A :class:`sedtemp.priors.Prior` with ``"T"`` and ``"beta"``
        entries, a pair ``(prior_T, prior_beta)``, or a callable ``(T, beta)
        -> log density`` (arrays (n, m)). The hyper-prior of the means is
        uniform over its support (the draws' span where unbounded).
    model : {"gaussian", "mixture"} or model object, keyword-only
        Bivariate Gaussian (``T_mean, beta_mean, T_sd, beta_sd, rho``) or a
        mixture of two (see :mod:`sedtemp.population.models` for the hyper-priors).
    seed : int, optional, keyword-only
        Seeds the walkers' start and emcee; the same seed gives the same chain.
    n_walkers, n_steps : int, keyword-only
        emcee walkers and steps per walker; the first third is burn-in.
    min_ess : float, keyword-only
        Sources whose importance-weight ESS is below it get the flag
        ``few_effective_draws`` and a :class:`~sedtemp.errors.PopulationWarning`.
    source_ids : sequence, optional, keyword-only
        Source names for messages and tables (default the row index).

    Returns
    -------
    PopulationResult

    Raises
    ------
    InputError
        Wrong shape, fewer than two sources with draws, an interim prior that
        is zero at a draw, an unknown model, too few walkers or steps.

    Warns
    -----
    PopulationWarning
        Sources with too few effective draws.
    ConvergenceWarning
        The chain is shorter than 20 autocorrelation times after burn-in.

    Notes
    -----
    log L(alpha) = sum_k log[(1/m_k) sum_j p(x_kj | alpha) / p0(x_kj)]
    (Hogg, Myers & Bovy 2010, eq. 9). The ESS of source k is
    (sum_j w_j)^2 / sum_j w_j^2 with w_j = p(x_kj | alpha) / p0(x_kj), the
    median over posterior draws of alpha. The estimate assumes each source's
    likelihood is negligible outside the interim prior's support.

    References
    ----------
    Hogg, D. W., Myers, A. D. & Bovy, J. 2010, ApJ 725, 2166.
    Kelly, B. C. et al. 2012, ApJ 752, 55 (hierarchical T-beta inference).

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> truth = rng.normal([20.0, 1.8], [2.0, 0.2], size=(60, 2))
    >>> draws = truth[:, None, :] + rng.normal(0, [0.5, 0.05], size=(60, 100, 2))
    >>> res = infer_population(draws, n_steps=300, seed=2, min_ess=0)  # doctest: +SKIP
    >>> res.summary()["parameter"][0]  # doctest: +SKIP
    'T_mean'
    """
    x, valid, usable = prepare_samples(samples, 2)
    log_int, lo, hi = interim_log_density(interim_prior, x, valid)
    pm = population_model(model, lo, hi)
    xs, vs, ls = x[usable], valid[usable], log_int[usable]
    like, chain, lp, acc, tau, conv, burn = sample_population(pm, xs, vs, ls, seed=seed,
                                                              n_walkers=n_walkers, n_steps=n_steps)
    hyper = chain[burn:].reshape(-1, chain.shape[-1])
    weights, ess_used = importance_weights(like, thin_for_weights(hyper))
    ess = np.full(x.shape[0], np.nan)
    ess[usable] = ess_used
    flags = source_flags(np.nan_to_num(ess, nan=np.inf), usable, float(min_ess), "infer_population")
    ids = list(range(x.shape[0])) if source_ids is None else list(source_ids)
    if len(ids) != x.shape[0]:
        raise InputError(f"source_ids has {len(ids)} entries for {x.shape[0]} sources")
    return PopulationResult(model=pm, samples=hyper, chain=chain, log_prob=lp, burn=burn, tau=tau,
                            acceptance_fraction=acc, converged=conv, ess=ess, flags=flags, usable=usable,
                            source_ids=ids, interim=interim_prior, box=(lo, hi), _likelihood=like,
                            _draws=x, _valid=valid, _weights=weights)
