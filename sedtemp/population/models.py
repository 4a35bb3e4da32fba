"""Population models: densities of per-source parameters given hyper-parameters.

Each model is a small object (a strategy, resolved once from a registered
name) with

- ``param_names``: names of its hyper-parameters, in column order;
- ``log_prior(theta)``: the hyper-prior, ``(W, p) -> (W,)``, ``-inf`` outside;
- ``log_density(theta, x)``: the population log-density of the per-source
  values ``x`` (n, m, d) under every walker's hyper-parameters, ``(W, p) ->
  (W, n, m)``, never NaN;
- ``initial(x, rng, n_walkers)``: a starting ensemble inside the hyper-prior;
- ``derived(theta)``: named derived quantities (the mixture's overall moments).

The hyper-priors are uniform over the box the interim prior supports (the
means), uniform on (0, box width] for standard deviations (Gelman 2006
recommends a uniform prior on a hierarchical standard deviation) and uniform
on (-RHO_MAX, RHO_MAX) for correlations.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from ..errors import InputError

__all__ = [
    "MODELS",
    "RHO_MAX",
    "GaussianPopulation",
    "HeatedMixture",
    "MixturePopulation",
    "population_model",
]

#: Largest ``|rho|`` the hyper-prior allows: beyond it the Gaussian is numerically singular.
RHO_MAX = 0.99
_LOG_2PI = np.log(2.0 * np.pi)


def _bivariate_log_normal(x, mT, mb, sT, sb, rho):
    """log N2(x; means, sds, rho); hyper-parameters (W,) broadcast against x (n, m, 2) -> (W, n, m)."""
    e = (slice(None), None, None)
    zT = (x[None, ..., 0] - mT[e]) / sT[e]
    zb = (x[None, ..., 1] - mb[e]) / sb[e]
    one_m = 1.0 - rho**2
    q = (zT * zT - 2.0 * rho[e] * zT * zb + zb * zb) / one_m[e]
    return -(_LOG_2PI + np.log(sT * sb) + 0.5 * np.log(one_m))[e] - 0.5 * q


def _log_normal_1d(y, mu, s):
    """log N(y; mu, s^2) for walkers (W,) against y (n, m) -> (W, n, m)."""
    e = (slice(None), None, None)
    z = (y[None] - mu[e]) / s[e]
    return -(0.5 * _LOG_2PI + np.log(s))[e] - 0.5 * z * z


class _Box:
    """Support of the interim prior per axis: (low, high) arrays of shape (d,)."""

    def __init__(self, low, high):
        self.low, self.high = np.asarray(low, float), np.asarray(high, float)
        if not np.all(self.high > self.low):
            raise InputError(f"population box: every high must exceed its low, got low={self.low}, high={self.high}")
        self.width = self.high - self.low


def _start_moments(x):
    """Mean, sd and correlation of the per-source medians (a starting point)."""
    med = np.nanmedian(x, axis=1)
    med = med[np.all(np.isfinite(med), axis=1)]
    mean, sd = med.mean(axis=0), med.std(axis=0)
    rho = np.corrcoef(med.T)[0, 1] if med.shape[0] > 2 and np.all(sd > 0) else 0.0
    return mean, sd, float(np.clip(np.nan_to_num(rho), -0.5, 0.5)), med


class GaussianPopulation:
    """Bivariate Gaussian population of (T, beta): ``T_mean, beta_mean, T_sd, beta_sd, rho``.

    Parameters
    ----------
    low, high : array_like, shape (2,)
        Support of the interim prior in (T [K], beta): the hyper-prior of the
        means is uniform on it, that of the sds uniform on (0, high - low].
    """

    name = "gaussian"
    param_names = ("T_mean", "beta_mean", "T_sd", "beta_sd", "rho")

    def __init__(self, low: ArrayLike, high: ArrayLike) -> None:
        self.box = _Box(low, high)

    def log_prior(self, theta: np.ndarray) -> np.ndarray:
        b = self.box
        m, s, rho = theta[:, 0:2], theta[:, 2:4], theta[:, 4]
        ok = (np.all((m >= b.low) & (m <= b.high), axis=1) & np.all((s > 0) & (s <= b.width), axis=1)
              & (np.abs(rho) < RHO_MAX))
        return np.where(ok, 0.0, -np.inf)

    def log_density(self, theta: np.ndarray, x: np.ndarray) -> np.ndarray:
        return _bivariate_log_normal(x, *theta.T)

    def initial(self, x: np.ndarray, rng: np.random.Generator, n_walkers: int) -> np.ndarray:
        mean, sd, rho, _ = _start_moments(x)
        sd = np.clip(sd, 0.05 * self.box.width, 0.9 * self.box.width)
        centre = np.array([*mean, *sd, rho])
        jitter = np.array([*(0.1 * sd), *(0.1 * sd), 0.05])
        p0 = centre + jitter * rng.standard_normal((n_walkers, 5))
        p0[:, 2:4] = np.abs(p0[:, 2:4])
        return p0

    def derived(self, theta: np.ndarray) -> dict[str, np.ndarray]:
        """No derived quantities: the parameters are the population moments."""
        return {}

    def components(self, theta: np.ndarray) -> list[tuple[float, np.ndarray, np.ndarray]]:
        """[(weight, mean (2,), covariance (2, 2))] of one hyper-parameter vector."""
        mT, mb, sT, sb, rho = theta
        cov = np.array([[sT**2, rho * sT * sb], [rho * sT * sb, sb**2]])
        return [(1.0, np.array([mT, mb]), cov)]


class MixturePopulation:
    """Mixture of two bivariate Gaussians; component 1 is the one with the lower T mean.

    Hyper-parameters ``fraction_2`` (weight of component 2, uniform on (0, 1))
    and ``T_mean_k, beta_mean_k, T_sd_k, beta_sd_k, rho_k`` for k = 1, 2, with
    the hyper-priors of :class:`GaussianPopulation` and ``T_mean_1 <=
    T_mean_2`` (removes the label switching). :meth:`derived` gives the
    mixture's overall ``T_mean, beta_mean, T_sd, beta_sd, rho``.
    """

    name = "mixture"
    param_names = ("fraction_2", *tuple(f"{p}_{k}" for k in (1, 2) for p in GaussianPopulation.param_names))

    def __init__(self, low: ArrayLike, high: ArrayLike) -> None:
        self._one = GaussianPopulation(low, high)
        self.box = self._one.box

    def log_prior(self, theta: np.ndarray) -> np.ndarray:
        f = theta[:, 0]
        ok = (f > 0) & (f < 1) & (theta[:, 1] <= theta[:, 6])
        lp = self._one.log_prior(theta[:, 1:6]) + self._one.log_prior(theta[:, 6:11])
        # the ordering halves the support: a constant, irrelevant to the sampler
        return np.where(ok, lp, -np.inf)

    def log_density(self, theta: np.ndarray, x: np.ndarray) -> np.ndarray:
        f = theta[:, 0][:, None, None]
        a = _bivariate_log_normal(x, *theta[:, 1:6].T) + np.log1p(-f)
        b = _bivariate_log_normal(x, *theta[:, 6:11].T) + np.log(f)
        return np.logaddexp(a, b)

    def initial(self, x: np.ndarray, rng: np.random.Generator, n_walkers: int) -> np.ndarray:
        _mean, sd, _rho, med = _start_moments(x)
        cut = np.median(med[:, 0])
        parts = []
        for sel in (med[:, 0] <= cut, med[:, 0] > cut):
            sub = med[sel] if sel.sum() > 2 else med
            s = np.clip(sub.std(axis=0), 0.05 * self.box.width, 0.9 * self.box.width)
            parts.append(np.array([*sub.mean(axis=0), *s, 0.0]))
        centre = np.concatenate([[0.5], parts[0], parts[1]])
        jitter = np.concatenate([[0.05], 0.05 * np.r_[sd, sd, 0.5], 0.05 * np.r_[sd, sd, 0.5]])
        p0 = centre + jitter * rng.standard_normal((n_walkers, 11))
        p0[:, [3, 4, 8, 9]] = np.abs(p0[:, [3, 4, 8, 9]])
        p0[:, 0] = np.clip(p0[:, 0], 0.05, 0.95)
        lo, hi = np.minimum(p0[:, 1], p0[:, 6]), np.maximum(p0[:, 1], p0[:, 6])
        p0[:, 1], p0[:, 6] = lo, hi
        return p0

    def derived(self, theta: np.ndarray) -> dict[str, np.ndarray]:
        """Overall mean, sds and correlation of the mixture, each (N,)."""
        f = theta[:, 0]
        w = np.stack([1.0 - f, f])  # (2, N)
        m = np.stack([theta[:, 1:3], theta[:, 6:8]])  # (2, N, 2)
        s = np.stack([theta[:, 3:5], theta[:, 8:10]])
        r = np.stack([theta[:, 5], theta[:, 10]])
        mean = np.einsum("kn,kni->ni", w, m)
        d = m - mean[None]
        var = np.einsum("kni,kn->ni", s**2 + d**2, w)
        cov = np.einsum("kn,kn->n", w, r * s[..., 0] * s[..., 1] + d[..., 0] * d[..., 1])
        sd = np.sqrt(var)
        return {"T_mean": mean[:, 0], "beta_mean": mean[:, 1], "T_sd": sd[:, 0], "beta_sd": sd[:, 1],
                "rho": cov / (sd[:, 0] * sd[:, 1])}

    def components(self, theta: np.ndarray) -> list[tuple[float, np.ndarray, np.ndarray]]:
        """[(weight, mean, covariance)] of both components of one hyper-parameter vector."""
        f = float(theta[0])
        c1 = self._one.components(theta[1:6])[0]
        c2 = self._one.components(theta[6:11])[0]
        return [(1.0 - f, c1[1], c1[2]), (f, c2[1], c2[2])]


class HeatedMixture:
    """Equilibrium plus heated components in y = ln(T_fit / T_eq), one value per source.

    The equilibrium component is N(0, s_eq^2), s_eq the field's scatter in
    ln T_eq (given, not fitted). The heated component is N(mu_h, s_h^2) with
    ``2 s_eq <= mu_h <= y_high`` and ``s_eq / 4 <= s_h <= mu_h / 2``, so that
    it lies above the equilibrium one (97.7 % of it above y = 0). Hyper-parameters
    ``fraction`` (heated weight, uniform on (0, 1)), ``heated_mean`` (uniform),
    ``heated_sd`` (uniform given ``heated_mean``; its normaliser is included).

    Parameters
    ----------
    equilibrium_scatter : float
        s_eq, natural-log units.
    y_high : float
        Upper end of the hyper-prior of ``heated_mean`` (the top of the draws' span).
    """

    name = "heated"
    param_names = ("fraction", "heated_mean", "heated_sd")

    def __init__(self, equilibrium_scatter: float, y_high: float) -> None:
        s = float(equilibrium_scatter)
        if not (np.isfinite(s) and s > 0):
            raise InputError(f"heated_fraction: equilibrium_scatter must be a positive number (ln units), got {s!r}")
        if not y_high > 2 * s:
            raise InputError(f"heated_fraction: no draw of ln(T_fit/T_eq) reaches 2 x equilibrium_scatter "
                             f"= {2 * s:.3g} (highest {y_high:.3g}); there is nothing to call heated")
        self.s_eq, self.y_high = s, float(y_high)

    def log_prior(self, theta: np.ndarray) -> np.ndarray:
        f, mu, s = theta.T
        ok = (f > 0) & (f < 1) & (mu >= 2 * self.s_eq) & (mu <= self.y_high) & (s >= self.s_eq / 4) & (s <= mu / 2)
        with np.errstate(invalid="ignore", divide="ignore"):
            lp = -np.log(np.where(ok, mu / 2 - self.s_eq / 4, 1.0))
        return np.where(ok, lp, -np.inf)

    def log_density(self, theta: np.ndarray, x: np.ndarray) -> np.ndarray:
        f, mu, s = theta.T
        y = x[..., 0]
        eq = _log_normal_1d(y, np.zeros_like(mu), np.full_like(s, self.s_eq)) + np.log1p(-f)[:, None, None]
        hot = _log_normal_1d(y, mu, s) + np.log(f)[:, None, None]
        return np.logaddexp(eq, hot)

    def log_responsibility(self, theta: np.ndarray, x: np.ndarray) -> np.ndarray:
        """log P(heated component | y) per walker and draw, (W, n, m)."""
        f, mu, s = theta.T
        y = x[..., 0]
        eq = _log_normal_1d(y, np.zeros_like(mu), np.full_like(s, self.s_eq)) + np.log1p(-f)[:, None, None]
        hot = _log_normal_1d(y, mu, s) + np.log(f)[:, None, None]
        return hot - np.logaddexp(eq, hot)

    def initial(self, x: np.ndarray, rng: np.random.Generator, n_walkers: int) -> np.ndarray:
        mu0 = min(max(3 * self.s_eq, 0.5 * self.y_high), 0.9 * self.y_high)
        mu0 = max(mu0, 2 * self.s_eq * 1.01)
        f = rng.uniform(0.05, 0.5, n_walkers)
        mu = np.clip(mu0 * (1 + 0.05 * rng.standard_normal(n_walkers)), 2 * self.s_eq, self.y_high)
        s = np.clip(self.s_eq * (1 + 0.1 * rng.standard_normal(n_walkers)), self.s_eq / 4, mu / 2)
        return np.column_stack([f, mu, s])

    def derived(self, theta: np.ndarray) -> dict[str, np.ndarray]:
        return {}


#: Registered population models of (T, beta).
MODELS = {"gaussian": GaussianPopulation, "mixture": MixturePopulation}


def population_model(model: str | Any, low: ArrayLike, high: ArrayLike) -> Any:
    """Resolve a registered name (``"gaussian"``, ``"mixture"``) or pass a model object through."""
    if isinstance(model, str):
        if model not in MODELS:
            raise InputError(f"population model {model!r} is unknown; choose one of {sorted(MODELS)}")
        return MODELS[model](low, high)
    if all(hasattr(model, a) for a in ("param_names", "log_prior", "log_density", "initial")):
        return model
    raise InputError(f"population model must be one of {sorted(MODELS)} or a model object, got {model!r}")
