"""MCMC diagnostics: rank-normalised effective sample size and split R-hat (Vehtari et al. 2021).

numpy/scipy only (arviz is optional; the tests check these against it).

References
----------
Vehtari, A., Gelman, A., Simpson, D., Carpenter, B., & Buerkner, P.-C. 2021,
Bayesian Analysis 16, 667: "Rank-normalization, folding, and localization:
an improved R-hat for assessing convergence of MCMC" (eqs. for split R-hat,
rank normalisation, bulk and tail ESS; Geyer's initial monotone sequence).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike
from scipy.special import ndtri
from scipy.stats import rankdata

__all__ = ["ess_basic", "ess_bulk", "ess_bulk_and_rhat", "ess_tail", "rhat", "split_rhat"]


def _split(x):
    """(n_chains, n_draws) -> (2 n_chains, n_draws // 2): each chain cut in halves."""
    x = np.asarray(x, float)
    n = x.shape[1] // 2
    return np.concatenate([x[:, :n], x[:, x.shape[1] - n:]], axis=0)


def _rank_normalise(x):
    """z = Phi^-1((r - 3/8) / (S + 1/4)) of the pooled ranks r (ties averaged)."""
    r = rankdata(x, method="average").reshape(x.shape)
    return ndtri((r - 0.375) / (x.size + 0.25))


def _autocov(x):
    """Biased autocovariance of each chain (rows) by FFT, lags 0..n-1."""
    n = x.shape[1]
    xc = x - x.mean(axis=1, keepdims=True)
    m = 1 << int(np.ceil(np.log2(2 * n)))
    f = np.fft.rfft(xc, n=m, axis=1)
    return np.fft.irfft(f * np.conj(f), n=m, axis=1)[:, :n] / n


def ess_basic(x: ArrayLike) -> float:
    """ESS of chains (n_chains, n_draws) with Geyer's initial monotone sequence (no split, no ranks)."""
    x = np.asarray(x, float)
    m, n = x.shape
    if n < 4 or not np.all(np.isfinite(x)):
        return float("nan")
    acov = _autocov(x)
    mean_var = acov[:, 0].mean() * n / (n - 1.0)
    var_plus = mean_var * (n - 1.0) / n
    if m > 1:
        var_plus += np.var(x.mean(axis=1), ddof=1)
    if var_plus <= 0:
        return float(m * n)
    rho = 1.0 - (mean_var - acov.mean(axis=0)) / var_plus
    rho[0] = 1.0
    n_pairs = (n - 1) // 2
    pairs = rho[: 2 * n_pairs].reshape(n_pairs, 2).sum(axis=1)
    # initial positive sequence: pairs up to the first negative one
    neg = np.flatnonzero(pairs < 0)
    k = neg[0] if neg.size else n_pairs
    pairs = np.minimum.accumulate(pairs[:k])  # initial monotone sequence
    tau = -1.0 + 2.0 * pairs.sum()
    tau = max(tau, 1.0 / np.log10(m * n))
    return float(m * n / tau)


def ess_bulk(x: ArrayLike) -> float:
    """Bulk ESS: ESS of the rank-normalised split chains, x of shape (n_chains, n_draws)."""
    s = _split(x)
    return ess_basic(_rank_normalise(s))


def ess_tail(x: ArrayLike) -> float:
    """Tail ESS: the smaller ESS of the indicators of the 5 % and 95 % quantiles (split chains)."""
    s = _split(x)
    q05, q95 = np.quantile(s, [0.05, 0.95])
    return min(ess_basic((s <= q05).astype(float)), ess_basic((s <= q95).astype(float)))


def _rhat_basic(s):
    n = s.shape[1]
    means = s.mean(axis=1)
    w = s.var(axis=1, ddof=1).mean()
    b = n * means.var(ddof=1)
    var_hat = (n - 1.0) / n * w + b / n
    return float(np.sqrt(var_hat / w)) if w > 0 else float("nan")


def split_rhat(x: ArrayLike) -> float:
    """Split R-hat of the raw values (no rank normalisation), x (n_chains, n_draws): a cheap pre-check."""
    return _rhat_basic(_split(x))


def ess_bulk_and_rhat(x: ArrayLike) -> tuple[float, float]:
    """(:func:`ess_bulk`, :func:`rhat`) of x (n_chains, n_draws), sharing the rank normalisation."""
    s = _split(x)
    z = _rank_normalise(s)
    folded = np.abs(s - np.median(s))
    return ess_basic(z), max(_rhat_basic(z), _rhat_basic(_rank_normalise(folded)))


def rhat(x: ArrayLike) -> float:
    """Rank-normalised split R-hat: the larger of bulk and folded-tail R-hat, x (n_chains, n_draws).

    Examples
    --------
    >>> x = np.random.default_rng(0).standard_normal((4, 1000))
    >>> bool(rhat(x) < 1.01)
    True
    """
    s = _split(x)
    bulk = _rhat_basic(_rank_normalise(s))
    folded = np.abs(s - np.median(s))
    return max(bulk, _rhat_basic(_rank_normalise(folded)))
