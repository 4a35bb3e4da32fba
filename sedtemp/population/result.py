"""Result of a population inference: hyper-parameter draws, summaries, shrinkage, diagnostics."""

from __future__ import annotations

from dataclasses import dataclass, field

import astropy.units as u
import numpy as np
from astropy.table import Table
from numpy.typing import ArrayLike

from ._core import (
    ImportanceLikelihood,
    importance_weights,
    interim_log_density,
    prepare_samples,
    thin_for_weights,
    weighted_quantiles,
)

__all__ = ["FLAG_FEW_DRAWS", "FLAG_NO_DRAWS", "QUANTILE_COLUMNS", "PopulationResult", "summary_table"]

#: Summary columns and the quantiles (fractions) they hold.
QUANTILE_COLUMNS = {"median": 0.5, "p2_5": 0.025, "p16": 0.16, "p84": 0.84, "p97_5": 0.975}
#: Per-source flag: the importance weights' ESS is below ``min_ess``.
FLAG_FEW_DRAWS = "few_effective_draws"
#: Per-source flag: no finite draw (e.g. a failed fit); the source is left out.
FLAG_NO_DRAWS = "no_draws"
#: Units of the hyper-parameters that carry one.
_UNITS = {"T": "K"}


def summary_table(columns: dict) -> Table:
    """Table with a ``parameter`` column and the :data:`QUANTILE_COLUMNS` of each draw array."""
    names = list(columns)
    q = np.array([np.quantile(np.asarray(columns[n], float), list(QUANTILE_COLUMNS.values())) for n in names])
    tab = Table({"parameter": np.array(names, dtype=str)})
    for j, col in enumerate(QUANTILE_COLUMNS):
        tab[col] = q[:, j]
    tab["unit"] = np.array([_UNITS.get(n.split("_")[0], "") if "_sd" in n or "_mean" in n else ""
                            for n in names], dtype=str)
    return tab


@dataclass
class PopulationResult:
    """Posterior of population hyper-parameters from :func:`~sedtemp.population.infer_population`.

    Attributes
    ----------
    model : population model object
        ``model.param_names`` names the columns of ``samples``.
    samples : ndarray, shape (n_samples, n_params)
        Hyper-parameter draws after burn-in (all walkers); T in K.
    chain, log_prob : ndarray
        The full emcee chain (n_steps, n_walkers, n_params) and its log posterior.
    burn : int
        Steps dropped as burn-in.
    tau : ndarray (n_params,)
        Integrated autocorrelation times (steps).
    acceptance_fraction : ndarray (n_walkers,)
    converged : bool
        Chain longer than 20 tau after burn-in.
    ess : ndarray (n_sources,)
        Effective sample size of each source's importance weights (NaN: no draws).
    flags : ndarray of str (n_sources,)
        "" or ``few_effective_draws`` or ``no_draws``.
    usable : ndarray of bool (n_sources,)
        Sources that entered the likelihood.
    source_ids : list
    interim, box
        The interim prior as given, and the (low, high) box of the hyper-prior.
    heated : HeatedFractionResult or None
        Attached by :func:`~sedtemp.population.population_from_results` when ratio draws are given.
    """

    model: object
    samples: np.ndarray
    chain: np.ndarray
    log_prob: np.ndarray
    burn: int
    tau: np.ndarray
    acceptance_fraction: np.ndarray
    converged: bool
    ess: np.ndarray
    flags: np.ndarray
    usable: np.ndarray
    source_ids: list
    interim: object
    box: tuple
    heated: object = None
    _likelihood: ImportanceLikelihood | None = field(default=None, repr=False)
    _draws: np.ndarray | None = field(default=None, repr=False)
    _valid: np.ndarray | None = field(default=None, repr=False)
    _weights: np.ndarray | None = field(default=None, repr=False)

    @property
    def param_names(self) -> tuple:
        return tuple(self.model.param_names)

    def draws(self) -> dict:
        """Hyper-parameter draws by name, the model's derived quantities first (mixture moments)."""
        out = {k: np.asarray(v) for k, v in self.model.derived(self.samples).items()}
        out.update({n: self.samples[:, j] for j, n in enumerate(self.param_names)})
        return out

    def summary(self) -> Table:
        """Quantiles of every hyper-parameter: columns parameter, median, p2_5, p16, p84, p97_5, unit.

        Rows ``T_mean, beta_mean, T_sd, beta_sd, rho`` (for the mixture: its
        overall moments) and then the mixture's own parameters.
        """
        tab = summary_table(self.draws())
        tab.meta.update(self.meta())
        return tab

    def meta(self) -> dict:
        """Run facts recorded with the summary."""
        return {"population_model": self.model.name, "n_sources": int(self.usable.sum()),
                "n_few_effective_draws": int(np.sum(self.flags == FLAG_FEW_DRAWS)),
                "n_no_draws": int(np.sum(self.flags == FLAG_NO_DRAWS)), "n_walkers": int(self.chain.shape[1]),
                "n_steps": int(self.chain.shape[0]), "burn": int(self.burn),
                "tau_max": float(np.max(self.tau)), "converged": bool(self.converged)}

    def median(self) -> dict:
        """Posterior median of each hyper-parameter (and derived quantity)."""
        return {k: float(np.median(v)) for k, v in self.draws().items()}

    def shrinkage_weights(self, samples: ArrayLike | None = None) -> np.ndarray:
        """Per-draw weights (n_sources, n_draws), rows summing to one, of each source's posterior
        under the population prior averaged over the hyper-parameter posterior.

        ``samples`` (n_sources, n_draws, 2): draws under the same interim prior
        (default the draws the inference used). Rows of unusable sources are NaN.
        """
        if samples is None:
            w = np.full(self._valid.shape, np.nan)
            w[self.usable] = self._weights
            return w
        x, valid, usable = prepare_samples(samples, 2)
        log_int, _, _ = interim_log_density(self.interim, x, valid)
        like = ImportanceLikelihood(self.model, x[usable], np.where(valid, -log_int, -np.inf)[usable])
        w = np.full(valid.shape, np.nan)
        w[usable] = importance_weights(like, thin_for_weights(self.samples))[0]
        return w

    def shrunk(self, samples: ArrayLike | None = None, *, n_draws: int | None = None,
               seed: int = 0) -> np.ndarray:
        """Per-source draws resampled with the population weights (the shrinkage estimates).

        Parameters
        ----------
        samples : array_like (n_sources, n_draws, 2), optional
            Draws under the same interim prior; default those of the inference.
        n_draws : int, optional, keyword-only
            Draws returned per source (default as many as given).
        seed : int, keyword-only

        Returns
        -------
        ndarray, shape (n_sources, n_draws, 2)
            (T [K], beta) draws from each source's population-informed
            posterior; NaN for sources without draws.
        """
        x = self._draws if samples is None else prepare_samples(samples, 2)[0]
        w = self.shrinkage_weights(samples)
        n, m = w.shape
        k = m if n_draws is None else int(n_draws)
        ok = np.all(np.isfinite(w), axis=1)
        cw = np.cumsum(np.where(ok[:, None], w, 1.0 / m), axis=1)
        cw /= cw[:, -1:]
        u01 = np.random.default_rng(seed).random((n, k))
        rows = np.arange(n)[:, None]
        # inverse CDF of every row at once: offset row i by i so one sorted array serves all rows
        idx = np.searchsorted((cw + rows).ravel(), (u01 + rows).ravel()).reshape(n, k) - rows * m
        idx = np.clip(idx, 0, m - 1)
        out = np.take_along_axis(x, idx[..., None], axis=1)
        out[~ok] = np.nan
        return out

    def source_table(self, id_name: str = "id") -> Table:
        """One row per source: id, ``population_ess``, ``population_flag`` and shrunk quantiles of T, beta."""
        w = self.shrinkage_weights()
        x = self._draws
        tab = Table({id_name: self.source_ids})
        tab["population_ess"] = self.ess
        tab["population_flag"] = np.asarray(self.flags, dtype=str)
        ok = np.all(np.isfinite(w), axis=1)
        qs = (0.16, 0.5, 0.84)
        for j, (name, unit) in enumerate((("T", u.K), ("beta", None))):
            q = np.full((3, x.shape[0]), np.nan)
            q[:, ok] = weighted_quantiles(x[ok, :, j], w[ok], qs)
            for qi, lab in enumerate(("p16", "median", "p84")):
                col = f"{name}_shrunk_{lab}"
                tab[col] = q[qi] * unit if unit is not None else q[qi]
        return tab
