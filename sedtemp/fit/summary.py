"""Posterior summaries and trust flags shared by the grid and MCMC fitters.

The flat column names defined here (``T_median``, ``T_p16``, ...) are the
ones the results table, the catalogue pipeline and the plots rely on.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from numpy.typing import ArrayLike

__all__ = [
    "EDGE_FRACTION",
    "EDGE_MASS",
    "POOR_FIT_PPP",
    "PRIOR_WIDTH_RATIO",
    "QUANTILES",
    "quantile_columns",
]

#: Posterior quantiles reported for every parameter: column suffix -> probability.
QUANTILES = {"p2_5": 0.025, "p16": 0.16, "median": 0.5, "p84": 0.84, "p97_5": 0.975}

#: Width of the strip at each end of the prior range that counts as its edge.
EDGE_FRACTION = 0.02
#: Posterior mass in an edge strip above which the fit is flagged as piled on that edge.
#: A flat posterior puts EDGE_FRACTION there; 2.5x that means real pile-up.
EDGE_MASS = 0.05
#: Posterior sd / prior sd above which a parameter is flagged as prior-dominated.
#: (A posterior that is the prior has ratio 1; 0.6 means the data narrowed it by < 40 %.)
PRIOR_WIDTH_RATIO = 0.6


#: Posterior predictive p-value below which the fit is flagged 'poor_fit': the
#: model does not describe the data (wrong model, underestimated errors, a
#: blended or multi-temperature source). 1 % is common practice.
POOR_FIT_PPP = 0.01


def quantile_columns(name: str) -> list[str]:
    """Column names of the quantile summary of parameter ``name``."""
    return [f"{name}_{k}" for k in QUANTILES]


def weighted_quantiles(x: np.ndarray, w: np.ndarray, probs: Sequence[float]) -> np.ndarray:
    """Quantiles of weighted samples along the last axis (w >= 0, any normalisation)."""
    order = np.argsort(x, axis=-1)
    xs = np.take_along_axis(x, order, axis=-1)
    ws = np.take_along_axis(w, order, axis=-1)
    c = np.cumsum(ws, axis=-1)
    c = (c - 0.5 * ws) / c[..., -1:]
    out = np.empty((*x.shape[:-1], len(probs)))
    for k, p in enumerate(probs):  # a handful of probabilities
        idx = np.clip(np.sum(c < p, axis=-1), 1, x.shape[-1] - 1)
        c0 = np.take_along_axis(c, idx[..., None] - 1, -1)[..., 0]
        c1 = np.take_along_axis(c, idx[..., None], -1)[..., 0]
        x0 = np.take_along_axis(xs, idx[..., None] - 1, -1)[..., 0]
        x1 = np.take_along_axis(xs, idx[..., None], -1)[..., 0]
        t = np.clip((p - c0) / np.where(c1 > c0, c1 - c0, 1.0), 0.0, 1.0)
        out[..., k] = x0 + t * (x1 - x0)
    return out


def trust_masks(name: str, x: ArrayLike, w: ArrayLike, low: float, high: float,
                prior_sd: float) -> dict[str, np.ndarray]:
    """Trust flags of one parameter from weighted draws along the last axis, as boolean masks.

    Returns
    -------
    dict flag name -> ndarray of bool (x.shape[:-1]), in reporting order:
    edge pile-up (``{name}_at_prior_low``, ``{name}_at_prior_high``) and
    prior domination (``{name}_prior_dominated``).
    """
    x = np.asarray(x, float)
    w = np.broadcast_to(w, x.shape)
    w = w / w.sum(axis=-1, keepdims=True)
    out = {}
    if np.isfinite(low) and np.isfinite(high):
        strip = EDGE_FRACTION * (high - low)
        out[f"{name}_at_prior_low"] = np.sum(np.where(x <= low + strip, w, 0.0), axis=-1) > EDGE_MASS
        out[f"{name}_at_prior_high"] = np.sum(np.where(x >= high - strip, w, 0.0), axis=-1) > EDGE_MASS
    mean = np.sum(w * x, axis=-1, keepdims=True)
    sd = np.sqrt(np.sum(w * (x - mean) ** 2, axis=-1))
    wide = np.isfinite(prior_sd) and prior_sd > 0
    out[f"{name}_prior_dominated"] = (sd > PRIOR_WIDTH_RATIO * prior_sd) if wide else np.zeros(sd.shape, bool)
    return out


def trust_flags(name: str, x: ArrayLike, w: ArrayLike, low: float, high: float, prior_sd: float) -> list[str]:
    """Flags for one parameter from weighted draws (1-D): edge pile-up, prior domination."""
    return [k for k, v in trust_masks(name, x, w, low, high, prior_sd).items() if v]
