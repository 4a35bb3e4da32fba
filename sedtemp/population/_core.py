"""Numerical core of the population inference: draws, interim priors, importance weights.

No sampler here (that is :mod:`sedtemp.population.infer`), so the result
classes can recompute weights for new draws without an import cycle.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from ..errors import InputError

__all__ = [
    "MAX_CELLS",
    "ImportanceLikelihood",
    "importance_weights",
    "interim_log_density",
    "prepare_samples",
    "thin_for_weights",
    "weighted_quantiles",
]

#: Walker x source x draw cells per vectorised evaluation (bounds the memory to ~100 MB).
MAX_CELLS = 2_000_000
#: Hyper-parameter draws used for the importance-weight ESS and the shrinkage weights.
_N_WEIGHT_DRAWS = 200


def _logsumexp_last(a):
    """log sum exp over the last axis; -inf where every entry is -inf, without warnings."""
    top = np.max(a, axis=-1, keepdims=True)
    top = np.where(np.isfinite(top), top, 0.0)
    with np.errstate(divide="ignore", under="ignore"):
        return np.log(np.sum(np.exp(a - top), axis=-1)) + top[..., 0]


class ImportanceLikelihood:
    """Population log posterior ``(W, p) -> (W,)``, vectorised and picklable; never NaN.

    Parameters
    ----------
    model : population model (see :mod:`sedtemp.population.models`)
    x : ndarray, shape (n, m, d)
        Draws (missing ones replaced by any finite value).
    base : ndarray, shape (n, m)
        ``-log p0(x)``, ``-inf`` for missing draws.
    """

    def __init__(self, model, x, base):
        self.model, self.x, self.base = model, x, base
        self.log_m = np.log(np.sum(np.isfinite(base), axis=1))

    def log_ratio(self, theta):
        """log p(x | alpha) - log p0(x), shape (W, n, m)."""
        with np.errstate(divide="ignore", over="ignore", invalid="ignore", under="ignore"):
            r = self.model.log_density(theta, self.x) + self.base[None]
        return np.where(np.isnan(r), -np.inf, r)

    def log_likelihood(self, theta):
        """sum_k log L_k for each row of theta (W,)."""
        n, m = self.base.shape
        step = max(1, MAX_CELLS // (n * m))
        out = np.empty(theta.shape[0])
        for a in range(0, theta.shape[0], step):  # chunks of walkers bound the memory
            out[a:a + step] = np.sum(_logsumexp_last(self.log_ratio(theta[a:a + step])) - self.log_m, axis=1)
        return out

    def __call__(self, theta):
        theta = np.atleast_2d(theta)
        out = np.asarray(self.model.log_prior(theta), float).copy()
        good = np.isfinite(out)
        if good.any():
            ll = self.log_likelihood(theta[good])
            out[good] = np.where(np.isfinite(ll), out[good] + ll, -np.inf)
        return np.where(np.isnan(out), -np.inf, out)


def prepare_samples(samples, d):
    x = np.asarray(samples, dtype=float)
    if x.ndim != 3 or x.shape[2] != d:
        raise InputError(f"samples must have shape (n_sources, n_draws, {d}), got {x.shape}")
    valid = np.all(np.isfinite(x), axis=2)
    usable = valid.any(axis=1)
    if usable.sum() < 2:
        raise InputError(f"samples: only {int(usable.sum())} source(s) have finite draws of every parameter "
                         "(a fixed-beta fit has no beta draws); a population needs at least 2")
    fill = np.nanmedian(np.where(valid[..., None], x, np.nan)[usable].reshape(-1, d), axis=0)
    x = np.where(valid[..., None], x, fill)
    return x, valid, usable


def _interim_1d(priors, x):
    lp = sum(p.logpdf(x[..., j]) for j, p in enumerate(priors))
    lo = np.array([p.low for p in priors])
    hi = np.array([p.high for p in priors])
    return lp, lo, hi


def interim_log_density(interim_prior, x, valid):
    """(log p0 at the draws (n, m), box low (2,), box high (2,))."""
    pts = x[valid]
    span_lo, span_hi = pts.min(axis=0), pts.max(axis=0)
    if interim_prior is None:
        lo, hi = span_lo, span_hi
        if not np.all(hi > lo):
            raise InputError("samples: every draw has the same T or the same beta; no population to infer")
        return np.full(valid.shape, -np.sum(np.log(hi - lo))), lo, hi
    if isinstance(interim_prior, Mapping) and "T" in interim_prior and "beta" in interim_prior:
        lp, lo, hi = _interim_1d((interim_prior["T"], interim_prior["beta"]), x)
    elif isinstance(interim_prior, Sequence) and len(interim_prior) == 2 \
            and all(hasattr(p, "logpdf") and hasattr(p, "low") for p in interim_prior):
        lp, lo, hi = _interim_1d(tuple(interim_prior), x)
    elif callable(interim_prior):
        lp = np.asarray(interim_prior(x[..., 0], x[..., 1]), float)
        if lp.shape != valid.shape:
            raise InputError(f"interim_prior callable must return log-densities of shape {valid.shape} "
                             f"(one per draw), got {lp.shape}")
        lo, hi = span_lo, span_hi
    else:
        raise InputError("interim_prior must be None (uniform over the draws' span), a sedtemp.priors.Prior "
                         f"with 'T' and 'beta', a pair of 1-D priors, or a callable (T, beta) -> log p; got {interim_prior!r}")
    lo = np.where(np.isfinite(lo), lo, span_lo)
    hi = np.where(np.isfinite(hi), hi, span_hi)
    bad = valid & ~np.isfinite(lp)
    if bad.any():
        k = int(np.argmax(bad.any(axis=1)))
        raise InputError(f"interim_prior gives zero density to draws of source {k} (row {k} of samples); "
                         "the draws must come from a posterior under that prior")
    return lp, lo, hi


def importance_weights(like, hyper):
    """Shrinkage weights (n, m) averaged over hyper draws, and the median ESS per source (n,)."""
    n, m = like.base.shape
    step = max(1, MAX_CELLS // (n * m))
    wsum = np.zeros((n, m))
    ess = []
    for a in range(0, hyper.shape[0], step):  # chunks of hyper-parameter draws bound the memory
        r = like.log_ratio(hyper[a:a + step])
        w = np.exp(r - _logsumexp_last(r)[..., None])
        w = np.nan_to_num(w)
        wsum += w.sum(axis=0)
        ess.append(1.0 / np.maximum(np.sum(w * w, axis=-1), 1.0 / m))
    return wsum / hyper.shape[0], np.median(np.concatenate(ess), axis=0)


def thin_for_weights(samples, n=_N_WEIGHT_DRAWS):
    """``n`` hyper-parameter draws spread evenly over the kept chain."""
    idx = np.linspace(0, samples.shape[0] - 1, min(n, samples.shape[0])).astype(int)
    return samples[idx]




def weighted_quantiles(values, weights, qs):
    """Quantiles ``qs`` (fractions) of each row of ``values`` (n, m) under ``weights`` (n, m) -> (len(qs), n)."""
    order = np.argsort(values, axis=1)
    v = np.take_along_axis(values, order, axis=1)
    cw = np.cumsum(np.take_along_axis(weights, order, axis=1), axis=1)
    total = cw[:, -1:]
    with np.errstate(invalid="ignore", divide="ignore"):
        cw = cw / total
    out = np.empty((len(qs), values.shape[0]))
    for i, q in enumerate(qs):  # a handful of quantiles
        idx = np.minimum(np.argmax(cw >= q, axis=1), values.shape[1] - 1)
        out[i] = v[np.arange(values.shape[0]), idx]
    out[:, ~(total[:, 0] > 0)] = np.nan
    return out
