"""Figures of a whole catalogue: T_fit against T_eq, and the T-beta population."""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
from matplotlib.collections import PolyCollection
from matplotlib.figure import FigureBase
from matplotlib.lines import Line2D
from scipy.ndimage import gaussian_filter, map_coordinates

from ..errors import InputError
from ._style import (
    _GREY,
    _REGION_MASS,
    _SED_COLOURS,
    CLASS_COLUMN,
    FLAG_STYLES,
    SINGLE_COLUMN_IN,
    _column,
    _finish,
    _flags,
    _has,
    _interval,
    _new_figure,
    _param_label,
    _style,
    _ticks,
)

if TYPE_CHECKING:  # annotations only
    from astropy.table import Table

__all__ = ["comparison_plot", "population_plot"]


def comparison_plot(table: Table | Mapping, *, fig: FigureBase | None = None,
                    save_to: str | Path | None = None) -> FigureBase:
    """Fitted against equilibrium temperature for a catalogue, coloured by heating class.

    Parameters
    ----------
    table : astropy Table or mapping of columns
        Needs ``T_median``, ``T_p16``, ``T_p84`` (fit) and ``T_eq_median``,
        ``T_eq_p16``, ``T_eq_p84`` (prediction), in K (bare or with a unit);
        an optional ``heating_class`` column with values in :data:`FLAG_STYLES`.
    fig : Figure or SubFigure, optional, keyword-only
        An empty figure to draw on; default a square one of single-column width.
    save_to : str or Path, optional, keyword-only
        If given, also :func:`save_figure` there.

    Returns
    -------
    Figure
        One axes: ``T_eq`` horizontal, ``T_fit`` vertical, equal ranges, the
        1:1 line, error bars from the 16th to the 84th percentile.

    Raises
    ------
    InputError
        A missing column, quantiles out of order, or an unknown heating class.
    """
    what = "comparison_plot"
    t_fit, fit_lo, fit_hi = _interval(table, "T", what, kelvin=True)
    t_eq, eq_lo, eq_hi = _interval(table, "T_eq", what, kelvin=True)
    flags = _flags(table, what)
    flags = np.full(t_fit.size, "consistent") if flags is None else flags
    with _style():
        fig = _new_figure(fig, (SINGLE_COLUMN_IN, 1.26 * SINGLE_COLUMN_IN))
        ax = fig.add_subplot()
        ends = np.concatenate([t_fit - fit_lo, t_fit + fit_hi, t_eq - eq_lo, t_eq + eq_hi])
        ends = ends[np.isfinite(ends)]
        lo, hi = ends.min(), ends.max()
        pad = 0.05 * (hi - lo) if hi > lo else 1.0
        lim = (max(lo - pad, 0.0), hi + pad)
        ax.plot(lim, lim, color="k", ls="--", lw=0.8, label="equal temperatures (1:1)", gid="one_to_one")
        has_flag = _has(table, CLASS_COLUMN)
        for flag, (colour, marker, text) in FLAG_STYLES.items():  # a few categories
            s = flags == flag
            if not s.any():
                continue
            ax.errorbar(t_eq[s], t_fit[s], xerr=(eq_lo[s], eq_hi[s]), yerr=(fit_lo[s], fit_hi[s]),
                        fmt=marker, color=colour, mec="k", mew=0.4, ms=4, elinewidth=0.6, capsize=0,
                        label=text if has_flag else "sources", gid=f"flag_{flag}")
        ax.set_xlim(lim)
        ax.set_ylim(lim)
        ax.set_aspect("equal", adjustable="box")
        ax.set_xlabel(r"$T_\mathrm{eq}\ [\mathrm{K}]$ (radiative equilibrium)")
        ax.set_ylabel(r"$T_\mathrm{fit}\ [\mathrm{K}]$ (SED fit)")
        _ticks(ax)
        # below the axes, never on the data: with many sources no corner of the plot is empty
        fig.subplots_adjust(left=0.16, right=0.97, top=0.98, bottom=0.32)
        handles, labels = ax.get_legend_handles_labels()
        fig.legend(handles, labels, loc="lower center", bbox_to_anchor=(0.5, 0.005), ncols=1, fontsize=7.0)
    return _finish(fig, save_to)


# -------------------------------------------------------- population plot
#: Radius (in sigma) of the 2-D Gaussian region enclosing _REGION_MASS:
#: the chi^2 CDF with 2 dof is 1 - exp(-r^2 / 2) (exact).
_REGION_RADIUS = float(np.sqrt(-2.0 * np.log1p(-_REGION_MASS)))


def _ellipses(t, beta, s_t, s_b, rho, n_vertices=64):
    """Boundaries (n_sources, n_vertices, 2) of the 68 % regions of 2-D Gaussians."""
    phi = np.linspace(0.0, 2.0 * np.pi, n_vertices)
    c, s = np.cos(phi), np.sin(phi)
    # Cholesky factor of [[s_t^2, rho s_t s_b], [rho s_t s_b, s_b^2]] applied to the unit circle
    dx = _REGION_RADIUS * s_t[:, None] * c
    dy = _REGION_RADIUS * s_b[:, None] * (rho[:, None] * c + np.sqrt(1.0 - rho[:, None] ** 2) * s)
    return np.stack([t[:, None] + dx, beta[:, None] + dy], axis=-1)


def _draw_contour(ax, t, b, colour, *, bins=36, half_width=4.5):
    """68 % highest-density contour of one source's (T, beta) draws.

    The draws are whitened with their own covariance (Cholesky factor L), so
    the histogram has the same resolution, 0.25 sigma per bin, along every
    direction of a narrow, tilted T-beta ridge; it is smoothed by one bin and
    drawn back in (T, beta) on the mapped grid. The level is the 32nd
    percentile of the smoothed density at the draws themselves, so the region
    holds 68 % of the draws whatever the smoothing does to the density.
    """
    t, b = np.asarray(t, float), np.asarray(b, float)
    if t.shape != b.shape or t.ndim != 1 or t.size < 10:
        raise InputError(f"draws: each entry must be two 1-D arrays (T, beta) of equal length >= 10, "
                         f"got shapes {t.shape} and {b.shape}")
    xy = np.column_stack([t, b])
    mean = xy.mean(axis=0)
    try:
        chol = np.linalg.cholesky(np.cov(xy.T))
    except np.linalg.LinAlgError:
        raise InputError("draws: the T and beta draws of a source are constant or perfectly "
                         "correlated; no 2-D region can be drawn") from None
    w = np.linalg.solve(chol, (xy - mean).T)
    edges = np.linspace(-half_width, half_width, bins + 1)
    h = gaussian_filter(np.histogram2d(w[0], w[1], bins=(edges, edges))[0], 1.0)
    centres = 0.5 * (edges[1:] + edges[:-1])
    pos = (w - centres[0]) / (centres[1] - centres[0])  # fractional bin index of each draw
    density = map_coordinates(h, pos, order=1, cval=0.0)
    level = np.quantile(density, 1.0 - _REGION_MASS)
    u0, u1 = np.meshgrid(centres, centres, indexing="ij")
    gx = mean[0] + chol[0, 0] * u0
    gy = mean[1] + chol[1, 0] * u0 + chol[1, 1] * u1
    return ax.contour(gx, gy, h, levels=[level], colors=[colour], linewidths=0.7)


def population_plot(table: Table | Mapping, *, draws: Mapping | None = None, fig: FigureBase | None = None,
                    save_to: str | Path | None = None) -> FigureBase:
    """T against beta for a catalogue, with each source's 68 % posterior region.

    Fits of noisy photometry scatter along a curved T-beta ridge even when T
    and beta are unrelated (Shetty et al. 2009); drawing each source's own
    joint posterior region lets a reader see that degeneracy instead of
    reading the scatter as a physical anticorrelation.

    Parameters
    ----------
    table : astropy Table or mapping of columns
        ``T_median``, ``T_p16``, ``T_p84`` (K), ``beta_median``,
        ``beta_p16``, ``beta_p84``; optional ``T_beta_corr`` (posterior
        correlation coefficient of T and beta), ``heating_class`` (colours as in
        :func:`comparison_plot`) and ``id`` (needed with ``draws``).
    draws : mapping, optional, keyword-only
        Source id -> (T draws in K, beta draws): those sources get a contour
        of the 68 % highest-density region of their draws instead of an ellipse.
    fig : Figure or SubFigure, optional, keyword-only
        An empty figure to draw on; default one of single-column width.
    save_to : str or Path, optional, keyword-only
        If given, also :func:`save_figure` there.

    Returns
    -------
    Figure
        One axes: T (K) horizontal, beta vertical.

    Raises
    ------
    InputError
        Missing columns, quantiles out of order, ``|T_beta_corr|`` >= 1, an
        unknown heating class, or ``draws`` for an id that is not in the table.

    Notes
    -----
    Ellipses are the regions enclosing 68 % of a 2-D Gaussian with
    sigma_T = (T_p84 - T_p16) / 2, sigma_beta likewise, and correlation rho =
    ``T_beta_corr``: (x - mu)^T C^-1 (x - mu) = -2 ln(1 - 0.68). **Without a
    ``T_beta_corr`` column rho = 0**: the ellipses are axis-aligned and hide
    the degeneracy, so pass ``draws`` (or add the column) for a figure meant
    to show it. Contours from draws enclose 68 % of the draws (see
    ``_draw_contour``).

    References
    ----------
    Shetty, R., Kauffmann, J., Schnee, S., Goodman, A. A. 2009, ApJ, 696, 676.
    """
    what = "population_plot"
    t, t_lo, t_hi = _interval(table, "T", what, kelvin=True)
    b, b_lo, b_hi = _interval(table, "beta", what, kelvin=False)
    rho = _column(table, "T_beta_corr", what) if _has(table, "T_beta_corr") else np.zeros_like(t)
    if np.any(np.abs(rho) >= 1):
        raise InputError(f"{what}: column 'T_beta_corr' must lie in (-1, 1), got {rho[np.abs(rho) >= 1][0]:g}")
    flags = _flags(table, what)
    colours = (np.array([FLAG_STYLES[f][0] for f in flags]) if flags is not None
               else np.full(t.size, _SED_COLOURS["median"]))
    draws = {} if draws is None else {str(key): v for key, v in dict(draws).items()}
    if draws and not _has(table, "id"):
        raise InputError(f"{what}: draws are matched to sources by the table's 'id' column, which it lacks")
    ids = [str(i) for i in np.atleast_1d(np.asarray(table["id"]))] if draws else []
    unknown = sorted(set(draws) - set(ids))
    if unknown:
        raise InputError(f"{what}: draws given for id(s) {unknown[:5]} not in the table's 'id' column")
    with_draws = np.isin(ids, list(draws)) if draws else np.zeros(t.size, bool)
    with _style():
        fig = _new_figure(fig, (SINGLE_COLUMN_IN, 0.85 * SINGLE_COLUMN_IN))
        ax = fig.add_subplot()
        e = ~with_draws
        if e.any():
            polys = _ellipses(t[e], b[e], 0.5 * (t_lo[e] + t_hi[e]), 0.5 * (b_lo[e] + b_hi[e]), rho[e])
            ax.add_collection(PolyCollection(polys, facecolors="none", edgecolors=colours[e],
                                             linewidths=0.6, alpha=0.8, gid="ellipses"))
        for key, (dt, db) in draws.items():  # per-source contours: one loop over sources
            _draw_contour(ax, dt, db, colours[ids.index(key)]).set_gid(f"contour_{key}")
        for flag in (FLAG_STYLES if flags is not None else [None]):
            s = np.ones(t.size, bool) if flag is None else flags == flag
            if s.any():
                _, marker, text = FLAG_STYLES[flag or "consistent"]
                ax.plot(t[s], b[s], ls="none", marker=marker, ms=3, color=colours[s][0], mec="k",
                        mew=0.3, label=text if flag else "posterior median", gid=f"points_{flag}")
        ax.autoscale_view()
        ax.set_xlabel(_param_label("T", "K"))
        ax.set_ylabel(_param_label("beta", ""))
        _ticks(ax)
        handles, _ = ax.get_legend_handles_labels()
        handles.append(Line2D([], [], color=_GREY, lw=0.7, label="68 % posterior region of each source"))
        ax.legend(handles=handles, loc="best", fontsize=7.0)
    return _finish(fig, save_to)


# ------------------------------------------------------------- trace plot
