"""Fraction of a catalogue heated beyond radiative equilibrium, from per-draw ln(T_fit / T_eq)."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from astropy.table import Table
from numpy.typing import ArrayLike

from ..errors import InputError
from ._core import MAX_CELLS, importance_weights, prepare_samples, thin_for_weights
from .infer import DEFAULT_MIN_ESS, DEFAULT_N_STEPS, sample_population, source_flags
from .models import HeatedMixture
from .result import QUANTILE_COLUMNS, summary_table

__all__ = ["INTERIM_PRIORS", "HeatedFractionResult", "heated_fraction"]

#: Interim priors of y = ln(T_fit / T_eq) by name (log-densities up to a constant).
#: "uniform_T": the fit's prior was uniform in T (the grid default), so p0(ln T) ~ T ~ exp(y)
#: for a T_eq that does not depend on the prior; "uniform_log_ratio": uniform in y.
INTERIM_PRIORS: dict[str, Callable] = {"uniform_T": lambda y: y, "uniform_log_ratio": np.zeros_like}


@dataclass
class HeatedFractionResult:
    """Posterior of the heated fraction (see :func:`heated_fraction`).

    Attributes
    ----------
    samples : ndarray (n_samples, 3)
        Draws of ``fraction``, ``heated_mean``, ``heated_sd`` (ln units).
    fraction : float
        Posterior median of the heated fraction.
    interval : tuple of float
        Its central 95 % interval (p2_5, p97_5).
    p_heated : ndarray (n_sources,)
        Posterior probability that each source belongs to the heated component.
    ess, flags, usable : per-source importance-weight ESS, flags, used sources.
    tau, converged : chain diagnostics.
    equilibrium_scatter : float
    """

    samples: np.ndarray
    fraction: float
    interval: tuple
    p_heated: np.ndarray
    ess: np.ndarray
    flags: np.ndarray
    usable: np.ndarray
    tau: np.ndarray
    converged: bool
    equilibrium_scatter: float
    source_ids: list

    param_names = HeatedMixture.param_names

    def summary(self) -> Table:
        """Rows ``fraction``, ``heated_mean``, ``heated_sd``; columns as :meth:`PopulationResult.summary`."""
        tab = summary_table({n: self.samples[:, j] for j, n in enumerate(self.param_names)})
        tab.meta.update({"equilibrium_scatter": self.equilibrium_scatter, "converged": bool(self.converged),
                         "tau_max": float(np.max(self.tau)), "n_sources": int(self.usable.sum())})
        return tab


def _interim_of_y(interim_prior, y, valid):
    if interim_prior is None:
        interim_prior = "uniform_T"
    if isinstance(interim_prior, str):
        if interim_prior not in INTERIM_PRIORS:
            raise InputError(f"heated_fraction: interim_prior {interim_prior!r} is unknown; choose one of "
                             f"{sorted(INTERIM_PRIORS)} or pass a callable y -> log p0(y)")
        interim_prior = INTERIM_PRIORS[interim_prior]
    if not callable(interim_prior):
        raise InputError(f"heated_fraction: interim_prior must be a name or a callable, got {interim_prior!r}")
    lp = np.asarray(interim_prior(y), float)
    if lp.shape != y.shape or np.any(valid & ~np.isfinite(lp)):
        raise InputError("heated_fraction: interim_prior must return a finite log-density per draw, "
                         f"shape {y.shape}")
    return lp


def _p_heated(model, like, hyper):
    """Posterior heated-membership probability of each used source, averaged over hyper draws."""
    hyper = thin_for_weights(hyper)
    n, m = like.base.shape
    step = max(1, MAX_CELLS // (n * m))
    total = np.zeros(n)
    for a in range(0, hyper.shape[0], step):  # chunks of hyper-parameter draws bound the memory
        h = hyper[a:a + step]
        r = like.log_ratio(h)  # (S, n, m)
        w = np.nan_to_num(np.exp(r - np.max(r, axis=-1, keepdims=True)))
        w /= np.maximum(w.sum(axis=-1, keepdims=True), np.finfo(float).tiny)
        total += np.sum(w * np.exp(model.log_responsibility(h, like.x)), axis=(0, 2))
    return total / hyper.shape[0]


def heated_fraction(log_ratio_draws: ArrayLike, *, equilibrium_scatter: float,
                    interim_prior: str | Callable[[np.ndarray], np.ndarray] | None = None, seed: int | None = 0,
                    n_walkers: int = 16, n_steps: int = DEFAULT_N_STEPS, min_ess: float = DEFAULT_MIN_ESS,
                    source_ids: Sequence | None = None) -> HeatedFractionResult:
    """Fraction of sources heated beyond equilibrium, with its interval.

    Parameters
    ----------
    log_ratio_draws : array_like, shape (n_sources, n_draws)
        Per-draw y = ln(T_fit / T_eq) of each source (natural log; NaN: missing draw).
    equilibrium_scatter : float, keyword-only
        sd of y among sources in equilibrium: the field's scatter in ln T_eq
        not already in the draws (e.g. ln(field factor) / (4 + beta) for a
        field strength known to a factor; T ~ U^(1/(4+beta))).
    interim_prior : {"uniform_T", "uniform_log_ratio"} or callable, keyword-only
        Prior of y under which the draws were made (default "uniform_T", the
        grid fitter's uniform prior on T); a callable ``y -> log p0(y)``.
    seed, n_walkers, n_steps, min_ess, source_ids : keyword-only
        As in :func:`~sedtemp.population.infer_population`.

    Returns
    -------
    HeatedFractionResult

    Raises
    ------
    InputError
        Wrong shape, bad scatter, no draw above twice the scatter, bad interim prior.

    Notes
    -----
    Population of y: (1 - f) N(0, s_eq^2) + f N(mu_h, s_h^2), with
    f ~ U(0, 1), mu_h ~ U(2 s_eq, y_max) and s_h ~ U(s_eq / 4, mu_h / 2)
    (:class:`~sedtemp.population.models.HeatedMixture`); the likelihood is the
    importance-sampling one of Hogg, Myers & Bovy (2010, eq. 9).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> y = (np.r_[np.zeros(80), np.full(20, 0.3)] + rng.normal(0, 0.05, 100))[:, None]
    >>> draws = y + rng.normal(0, 0.05, (100, 200))
    >>> res = heated_fraction(draws, equilibrium_scatter=0.05, interim_prior="uniform_log_ratio",
    ...                       n_steps=400)  # doctest: +SKIP
    >>> 0.1 < res.fraction < 0.3  # doctest: +SKIP
    True
    """
    y3, valid, usable = prepare_samples(np.asarray(log_ratio_draws, float)[..., None], 1)
    y = y3[..., 0]
    log_int = _interim_of_y(interim_prior, y, valid)
    model = HeatedMixture(equilibrium_scatter, float(np.max(y[valid])))
    like, chain, _lp, _acc, tau, conv, burn = sample_population(
        model, y3[usable], valid[usable], log_int[usable], seed=seed, n_walkers=n_walkers, n_steps=n_steps)
    hyper = chain[burn:].reshape(-1, chain.shape[-1])
    _, ess_used = importance_weights(like, thin_for_weights(hyper))
    ess = np.full(y.shape[0], np.nan)
    ess[usable] = ess_used
    p_hot = np.full(y.shape[0], np.nan)
    p_hot[usable] = _p_heated(model, like, hyper)
    flags = source_flags(np.nan_to_num(ess, nan=np.inf), usable, float(min_ess), "heated_fraction")
    q = np.quantile(hyper[:, 0], [QUANTILE_COLUMNS["median"], QUANTILE_COLUMNS["p2_5"], QUANTILE_COLUMNS["p97_5"]])
    ids = list(range(y.shape[0])) if source_ids is None else list(source_ids)
    return HeatedFractionResult(samples=hyper, fraction=float(q[0]), interval=(float(q[1]), float(q[2])),
                                p_heated=p_hot, ess=ess, flags=flags, usable=usable, tau=tau, converged=conv,
                                equilibrium_scatter=float(equilibrium_scatter), source_ids=ids)

