"""Figure of a population inference: population ellipses over per-source regions, posterior of rho.

Built as a :class:`matplotlib.figure.Figure` without pyplot state, so many
figures can be made in one process without piling up open windows.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure
from numpy.typing import ArrayLike

if TYPE_CHECKING:
    from .result import PopulationResult

__all__ = ["R68", "R95", "ellipse_points", "population_figure"]

#: Radius (in sd) of the 2-D Gaussian region holding 68.3 % / 95.4 %: sqrt(-2 ln(1 - q))
#: (the chi^2 distribution with 2 degrees of freedom; exact analytic solution).
R68 = float(np.sqrt(-2.0 * np.log(1.0 - 0.6827)))
R95 = float(np.sqrt(-2.0 * np.log(1.0 - 0.9545)))
_N_POINTS = 65


def ellipse_points(mean: ArrayLike, cov: ArrayLike, radius: float | np.ndarray,
                   n_points: int = _N_POINTS) -> np.ndarray:
    """Points (..., n_points, 2) of the ellipses (x - mean)^T cov^-1 (x - mean) = radius^2.

    ``mean`` (..., 2), ``cov`` (..., 2, 2), broadcast together.
    """
    t = np.linspace(0.0, 2.0 * np.pi, n_points)
    circle = np.stack([np.cos(t), np.sin(t)])  # (2, n_points)
    chol = np.linalg.cholesky(np.asarray(cov, float))
    return np.asarray(mean, float)[..., None, :] + radius * np.swapaxes(chol @ circle, -1, -2)


def _source_ellipses(x, valid, max_sources):
    """Mean and covariance of each source's draws (n, 2), (n, 2, 2); sources with < 3 draws dropped."""
    keep = np.flatnonzero(valid.sum(axis=1) >= 3)[:max_sources]
    xs = np.where(valid[keep, :, None], x[keep], np.nan)
    mean = np.nanmean(xs, axis=1)
    d = np.nan_to_num(xs - mean[:, None, :])
    cov = np.einsum("nmi,nmj->nij", d, d) / (valid[keep].sum(axis=1)[:, None, None] - 1)
    cov += np.eye(2) * 1e-12 * np.trace(cov, axis1=1, axis2=2)[:, None, None]  # degenerate draws
    return mean, cov


def population_figure(result: PopulationResult, *, fig: Figure | None = None, max_sources: int = 2000) -> Figure:
    """Inferred population over the per-source 68 % regions, and the posterior of rho.

    Parameters
    ----------
    result : PopulationResult
    fig : matplotlib.figure.Figure, optional, keyword-only
        Figure to draw into (cleared); default a new one.
    max_sources : int, keyword-only
        At most this many per-source ellipses are drawn.

    Returns
    -------
    matplotlib.figure.Figure
        Axes 0: T (K) vs beta, grey per-source 68 % ellipses (Gaussian
        approximation of each source's draws), the population's 68 % and 95 %
        ellipses at the posterior-median hyper-parameters (one pair per
        mixture component). Axes 1: histogram of the rho draws (the mixture's
        overall rho) with its median. Axes 2, when ``result.heated`` is set:
        the heated fraction's posterior.
    """
    fig = Figure(figsize=(11 if result.heated is not None else 8, 4)) if fig is None else fig
    fig.clear()
    n_ax = 3 if result.heated is not None else 2
    axes = fig.subplots(1, n_ax, gridspec_kw={"width_ratios": [1.6] + [1] * (n_ax - 1)})
    ax = axes[0]
    mean, cov = _source_ellipses(result._draws, result._valid & result.usable[:, None], max_sources)
    ax.add_collection(LineCollection(ellipse_points(mean, cov, R68), colors="0.6", linewidths=0.6,
                                     label="sources (68 %)"))
    med = np.median(result.samples, axis=0)
    for k, (w, m, c) in enumerate(result.model.components(med)):
        for r, style in ((R68, "-"), (R95, "--")):
            pts = ellipse_points(m, c, r)
            ax.plot(pts[:, 0], pts[:, 1], style, color=f"C{k}", lw=1.8,
                    label=f"population{'' if len(result.model.components(med)) == 1 else f' {k + 1} (w={w:.2f})'}"
                    f" {'68' if r == R68 else '95'} %")
    ax.autoscale_view()
    ax.set_xlabel("T (K)")
    ax.set_ylabel("beta")
    ax.legend(fontsize="small")
    rho = result.draws()["rho"]
    axes[1].hist(rho, bins=40, range=(-1, 1), color="C0", alpha=0.7)
    axes[1].axvline(np.median(rho), color="k", lw=1)
    axes[1].set_xlabel("rho (population T-beta correlation)")
    axes[1].set_ylabel("posterior draws")
    if result.heated is not None:
        f = result.heated.samples[:, 0]
        axes[2].hist(f, bins=40, range=(0, 1), color="C3", alpha=0.7)
        axes[2].axvline(result.heated.fraction, color="k", lw=1)
        axes[2].set_xlabel("heated fraction")
    fig.tight_layout()
    return fig
