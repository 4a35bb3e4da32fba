"""FitResult: posterior draws of one source, their summaries and diagnostics."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
from astropy.table import Table

from .summary import QUANTILES

if TYPE_CHECKING:
    from arviz import InferenceData

__all__ = ["FitResult"]


@dataclass
class FitResult:
    """Posterior of one source's SED parameters, with the diagnostics that say whether to trust it.

    Attributes
    ----------
    samples : dict of str -> ndarray
        Posterior draws per parameter (``"T"`` in K, ``"beta"``, the log10
        amplitude in the unit of ``units``), equally weighted, 1-D.
    log_prob : ndarray
        Log posterior of each draw.
    param_names : tuple of str
    units : dict of str -> str
    ess, tau : dict of str -> float
        Rank-normalised bulk effective sample size (Vehtari et al. 2021) and
        integrated autocorrelation time (steps, = draws / ESS) per parameter.
    rhat : dict of str -> float
        Rank-normalised split R-hat per parameter (walkers as chains).
    acceptance_fraction : float
        Mean acceptance fraction over walkers.
    converged : bool
        True when T and beta reached the ESS target with R-hat < 1.01 and the
        kept chain is > 10 tau long.
    flags : tuple of str
        Warnings that also went out as Python warnings (see README, "Flags").
    map_params : dict of str -> float
        Highest-posterior draw.
    chi2_map, dof, ppp : float
        chi^2 at the MAP (calibration covariance included), degrees of
        freedom (usable bands - free parameters) and the posterior predictive
        p-value of chi^2.
    """

    samples: dict
    log_prob: np.ndarray
    param_names: tuple
    units: dict
    ess: dict
    tau: dict
    acceptance_fraction: float
    converged: bool
    flags: tuple
    map_params: dict
    chi2_map: float
    dof: int
    ppp: float
    n_bands_used: int
    method: str = "mcmc"
    model: object = None
    bands: object = None
    flux_si: np.ndarray | None = None
    err_si: np.ndarray | None = None
    limit_only: np.ndarray | None = None
    chain: np.ndarray | None = field(default=None, repr=False)
    n_steps: int = 0
    n_walkers: int = 0
    burn: int = 0
    seed: object = None
    rhat: dict = field(default_factory=dict)
    log_prob_chain: np.ndarray | None = field(default=None, repr=False)
    sampled: tuple = ()

    def get_chain(self, flat: bool = False, discard: int = 0, thin: int = 1) -> np.ndarray:
        """The stored chain, like emcee's ``get_chain``: (steps, walkers, n_params) or flattened.

        Columns in ``param_names`` order (with the marginal sampler the
        amplitude column holds draws from its conditional at every step).

        Raises
        ------
        InputError
            When the result holds no chain (grid results).
        """
        from ..errors import InputError

        if self.chain is None:
            raise InputError("this FitResult holds no chain (grid fit); refit with fit_source for a chain")
        c = self.chain[int(discard)::int(thin)]
        return c.reshape(-1, c.shape[-1]) if flat else c

    def to_arviz(self) -> InferenceData:
        """The chain as an ``arviz.InferenceData`` (walkers as chains, burn-in discarded).

        Raises
        ------
        ImportError
            If arviz is not installed (``pip install "sedtemp[arviz]"``).
        """
        try:
            import arviz as az
        except ImportError as err:
            raise ImportError('FitResult.to_arviz needs arviz: pip install "sedtemp[arviz]"') from err
        c = self.get_chain(discard=self.burn)
        post = {n: np.swapaxes(c[..., j], 0, 1) for j, n in enumerate(self.param_names)}
        stats = None
        if self.log_prob_chain is not None:
            stats = {"lp": np.swapaxes(self.log_prob_chain[self.burn:], 0, 1)}
        return az.from_dict(posterior=post, sample_stats=stats)

    @property
    def chi2_reduced(self) -> float:
        return self.chi2_map / self.dof if self.dof > 0 else float("nan")

    def summary(self) -> dict:
        """Flat summary: ``<p>_{p2_5,p16,median,p84,p97_5,map}`` per parameter, then diagnostics."""
        out = {}
        for name in self.param_names:
            q = np.quantile(self.samples[name], list(QUANTILES.values()))
            out.update({f"{name}_{k}": float(v) for k, v in zip(QUANTILES, q, strict=True)})
            out[f"{name}_map"] = float(self.map_params[name])
        if "T" in self.samples and "beta" in self.samples:
            out["T_beta_corr"] = float(np.corrcoef(self.samples["T"], self.samples["beta"])[0, 1])
        for name in self.param_names:
            out[f"{name}_ess"] = float(self.ess[name])
            if name in self.rhat:
                out[f"{name}_rhat"] = float(self.rhat[name])
        out.update(
            chi2_map=float(self.chi2_map), dof=int(self.dof), chi2_reduced=float(self.chi2_reduced),
            ppp=float(self.ppp), n_bands_used=int(self.n_bands_used),
            acceptance_fraction=float(self.acceptance_fraction),
            converged=bool(self.converged), flags=",".join(self.flags),
        )
        return out

    def summary_table(self) -> Table:
        """One row per parameter: median, 68 % and 95 % intervals, MAP, ESS, unit."""
        rows = []
        for name in self.param_names:
            q = np.quantile(self.samples[name], list(QUANTILES.values()))
            rows.append((name, *q, self.map_params[name], self.ess[name], self.units.get(name, "")))
        tab = Table(rows=rows, names=("parameter", *QUANTILES, "map", "ess", "unit"))
        for col in (*QUANTILES, "map"):
            tab[col].format = ".4g"
        tab["ess"].format = ".0f"
        return tab

    def __repr__(self):
        s = self.summary()
        t = f"T = {s['T_median']:.2f} (+{s['T_p84'] - s['T_median']:.2f} -{s['T_median'] - s['T_p16']:.2f}) K"
        if "beta" in self.param_names:
            t += f", beta = {s['beta_median']:.2f} (+{s['beta_p84'] - s['beta_median']:.2f} -{s['beta_median'] - s['beta_p16']:.2f})"
        conv = "converged" if self.converged else "NOT converged"
        fl = f", flags: {', '.join(self.flags)}" if self.flags else ""
        return f"<FitResult {t}; {conv}, chi2_red = {s['chi2_reduced']:.2f}{fl}>"
