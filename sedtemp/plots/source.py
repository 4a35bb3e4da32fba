"""Figures of one fitted source: corner, SED and trace plots."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING

import astropy.units as u
import numpy as np
from matplotlib.collections import LineCollection
from matplotlib.figure import FigureBase
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

from .._units import to_kelvin
from ..errors import InputError
from ._style import (
    _C_UM_GHZ,
    _GREY,
    _OKABE_ITO,
    _SED_COLOURS,
    _TICKS,
    DOUBLE_COLUMN_IN,
    SINGLE_COLUMN_IN,
    _draws_matrix,
    _finish,
    _new_figure,
    _param_label,
    _style,
    _ticks,
    _unit_tex,
)

if TYPE_CHECKING:  # annotations only
    from numpy.typing import ArrayLike

    from ..compare import Comparison
    from ..fit import FitResult

__all__ = ["corner_plot", "sed_plot", "trace_plot"]


def _corner_order(names):
    temps = [n for n in names if n == "T" or n.startswith("T_")]
    beta = [n for n in names if n == "beta"]
    return temps + beta + [n for n in names if n not in temps and n not in beta]


def _as_values(values, names, order, what):
    """A mapping name -> value or a sequence in ``names`` order -> array in ``order``."""
    if isinstance(values, Mapping):
        unknown = sorted(set(values) - set(names))
        if unknown:
            raise InputError(f"{what}: unknown parameter(s) {unknown}; parameters are {list(names)}")
        return np.array([float(values[n]) if n in values else np.nan for n in order])
    arr = np.atleast_1d(np.asarray(values, dtype=float))
    if arr.shape != (len(names),):
        raise InputError(f"{what}: got {arr.size} values but the model has {len(names)} "
                         f"parameters {list(names)}; pass a dict or one value per parameter")
    return arr[[list(names).index(n) for n in order]]


def _t_eq_interval(T_eq):
    """(low, high, median or NaN) in K from a pair, draws, or an object with ``.T_eq`` draws."""
    T_eq = getattr(T_eq, "T_eq", T_eq)
    t = np.atleast_1d(to_kelvin(T_eq, name="T_eq")).astype(float).ravel()
    t = t[np.isfinite(t)]
    if t.size == 2:
        lo, hi = np.sort(t)
        return lo, hi, np.nan
    if t.size < 2:
        raise InputError(f"T_eq: give a (low, high) pair in K or >= 3 draws, got {t.size} finite value(s)")
    lo, med, hi = np.quantile(t, [0.16, 0.5, 0.84])
    return lo, hi, med


def _corner_marks(axes, vals, kind):
    """MAP (points and dashed lines) or truths (solid lines) on every panel."""
    colour = _OKABE_ITO["vermillion"] if kind == "map" else _OKABE_ITO["black"]
    ls = "--" if kind == "map" else "-"
    k = len(vals)
    for i in range(k):
        for j in range(i + 1):
            ax = axes[i, j]
            if np.isfinite(vals[j]):
                ax.axvline(vals[j], color=colour, ls=ls, lw=0.8, gid=f"{kind}_v")
            if i == j:
                continue
            if kind == "truth" and np.isfinite(vals[i]):
                ax.axhline(vals[i], color=colour, ls=ls, lw=0.8, gid=f"{kind}_h")
            if kind == "map":
                ax.plot(vals[j], vals[i], marker="X", color=colour, ms=5, mec="white", mew=0.4,
                        ls="none", gid="map_point")


def corner_plot(result: FitResult, *, T_eq: u.Quantity | ArrayLike | Comparison | None = None,
                truths: Mapping | Sequence | None = None,
                fig: FigureBase | None = None, save_to: str | Path | None = None,
                corner_options: Mapping | None = None) -> FigureBase:
    """Corner plot of one source's posterior: T, beta and the amplitude.

    Parameters
    ----------
    result : FitResult
        From :func:`sedtemp.fit.fit_source`. Temperatures come first, then
        beta, then the log10 amplitude in its physical unit (from
        ``result.units``, e.g. ``log10 M_d [M_sun]``).
    T_eq : pair, array_like, Quantity or Comparison, optional, keyword-only
        Predicted radiative-equilibrium temperature, drawn as a shaded band
        across every panel with T on an axis: a (low, high) pair in K, or
        three or more draws (the band is their 16-84 % range, with a line at
        their median), or an object with a ``T_eq`` attribute holding draws.
    truths : mapping or sequence, optional, keyword-only
        True parameter values (name -> value, or one value per parameter in
        ``result.param_names`` order), drawn as solid black lines.
    fig : Figure or SubFigure, optional, keyword-only
        An empty figure to draw on; default one of single-column width.
    save_to : str or Path, optional, keyword-only
        If given, also :func:`save_figure` to ``<save_to>.pdf`` and ``.png``.
    corner_options : mapping, optional, keyword-only
        Keyword arguments of :func:`corner.corner` itself, passed through
        as given and taking precedence over ours (e.g. ``{"bins": 50,
        "smooth": None, "quantiles": [0.16, 0.5, 0.84],
        "show_titles": True}``). ``fig``, ``labels`` and ``truths`` are
        set through this function's own arguments and refused here.

    Returns
    -------
    Figure

    Raises
    ------
    InputError
        Unknown parameter in ``truths``, a wrong number of values, ``T_eq``
        without a ``T`` parameter, a non-empty ``fig``, or
        ``corner_options`` that is not a mapping or names a reserved key.

    Notes
    -----
    The 2-D contours enclose 68 % and 95 % of the posterior mass (not the
    1-D "sigma" levels). The MAP is the highest-posterior draw
    (``result.map_params``).
    """
    import corner  # imported here: it loads pyplot, which sedtemp.plots itself never uses

    names = tuple(result.param_names)
    order = _corner_order(names)
    k = len(order)
    data = np.column_stack([np.asarray(result.samples[n], float) for n in order])
    labels = [_param_label(n, result.units.get(n, ""), result.model) for n in order]
    extra = _corner_options(corner_options)
    t_eq = None
    if T_eq is not None:
        if "T" not in order:
            raise InputError(f"T_eq is drawn on the parameter 'T', which this model lacks: {list(names)}")
        t_eq = _t_eq_interval(T_eq)
    with _style():
        fig = _new_figure(fig, (SINGLE_COLUMN_IN, SINGLE_COLUMN_IN))
        options = {"bins": 30, "smooth": 1.0, "levels": (0.68, 0.95), "color": _SED_COLOURS["median"],
                   "plot_datapoints": False, "fill_contours": True, "max_n_ticks": 3, "labelpad": 0.05,
                   "label_kwargs": {"fontsize": 8.0}, "hist_kwargs": {"lw": 0.9}}
        options.update(extra)
        corner.corner(data, fig=fig, labels=labels, **options)
        axes = np.array(fig.axes).reshape(k, k)
        for ax in fig.axes:
            ax.tick_params(which="both", **_TICKS)
        fig.subplots_adjust(left=0.2, bottom=0.2, right=0.97, top=0.97, wspace=0.06, hspace=0.06)
        handles = [Patch(color=_SED_COLOURS["median"], alpha=0.5, label="posterior (68 %, 95 %)")]
        if t_eq is not None:
            _corner_t_eq(axes, order.index("T"), t_eq)
            handles.append(Patch(color=_OKABE_ITO["orange"], alpha=0.35,
                                 label=r"$T_\mathrm{eq}$ predicted (68 %)"))
        map_vals = np.array([result.map_params[n] for n in order], float)
        _corner_marks(axes, map_vals, "map")
        handles.append(Line2D([], [], color=_OKABE_ITO["vermillion"], ls="--", marker="X", ms=5,
                              label="maximum a posteriori"))
        if truths is not None:
            _corner_marks(axes, _as_values(truths, names, order, "truths"), "truth")
            handles.append(Line2D([], [], color="k", ls="-", label="true value"))
        fig.legend(handles=handles, loc="upper right", bbox_to_anchor=(0.97, 0.97), fontsize=7.0)
    return _finish(fig, save_to)


#: corner.corner arguments set through corner_plot's own arguments, never through corner_options.
_CORNER_RESERVED = ("fig", "labels", "truths", "data", "xs")


def _corner_options(options):
    """A checked copy of ``corner_options`` (an explicit mapping, so a typo cannot pass unseen)."""
    if options is None:
        return {}
    if not isinstance(options, Mapping):
        raise InputError(f"corner_options must be a mapping of corner.corner arguments, got {type(options).__name__}")
    bad = [k for k in options if k in _CORNER_RESERVED]
    if bad:
        raise InputError(f"corner_options: {bad[0]!r} is set by corner_plot itself; use its own argument "
                         "(fig=, truths=) instead")
    known = _corner_arguments()
    unknown = [k for k in options if k not in known]
    if unknown:
        from .._units import did_you_mean

        raise InputError(f"corner_options: {unknown[0]!r} is not an argument of corner.corner"
                         f"{did_you_mean(unknown[0], sorted(known))}")
    return dict(options)


def _corner_arguments() -> set:
    """Names corner.corner accepts: its own parameters and those of corner.hist2d it forwards."""
    import inspect

    import corner

    names = set()
    for fn in (corner.corner, corner.hist2d, getattr(getattr(corner, "core", None), "corner_impl", None)):
        if fn is not None:
            names |= {n for n, p in inspect.signature(fn).parameters.items()
                      if p.kind not in (p.VAR_KEYWORD, p.VAR_POSITIONAL)}
    return names - set(_CORNER_RESERVED) - {"x", "y", "ax", "new_fig"}  # hist2d's own, set per panel


def _corner_t_eq(axes, it, t_eq):
    lo, hi, med = t_eq
    style = {"color": _OKABE_ITO["orange"], "alpha": 0.35, "lw": 0, "zorder": 0}
    k = axes.shape[0]
    for i in range(k):
        for j in range(i + 1):
            if j == it:
                axes[i, j].axvspan(lo, hi, gid="T_eq_band", **style)
                if np.isfinite(med):
                    axes[i, j].axvline(med, color=_OKABE_ITO["orange"], lw=0.8, gid="T_eq_median")
            if i == it and j != i:
                axes[i, j].axhspan(lo, hi, gid="T_eq_band", **style)
    # widen the T range so the whole band and the posterior both show: the
    # distance between them is what the figure is for
    t_lo, t_hi = axes[it, it].get_xlim()
    new_lo, new_hi = min(t_lo, lo), max(t_hi, hi)
    pad = 0.05 * (new_hi - new_lo) * np.array([new_lo < t_lo, new_hi > t_hi])
    new = (new_lo - pad[0], new_hi + pad[1])
    for i in range(it, k):
        axes[i, it].set_xlim(new)
    for j in range(it):
        axes[it, j].set_ylim(new)


# --------------------------------------------------------------- SED plot
def _fine_grid(bands, n):
    """Log wavelength grid (um) from half the shortest to twice the longest band wavelength."""
    lam = _C_UM_GHZ / (np.concatenate([bands.nu_grid_hz, bands.nu_ref_hz]) / 1e9)
    return np.geomspace(0.5 * lam.min(), 2.0 * lam.max(), n)


def _sed_data(ax, result, lam_band, conv):
    """Detections with error bars; limits and non-positive fluxes as downward arrows."""
    f, e = np.asarray(result.flux_si, float) * conv, np.asarray(result.err_si, float) * conv
    lim = (np.zeros(f.shape, bool) if result.limit_only is None
           else np.asarray(result.limit_only, bool))
    seen = np.isfinite(e)
    det = seen & ~lim & (f > 0)
    # a measured flux <= 0 cannot sit on a log axis: show it as a limit at flux + 2 sigma
    arrow_at = np.where(lim, f, np.maximum(f, 0.0) + 2.0 * e)
    arr = seen & (lim | (f <= 0)) & (arrow_at > 0)
    # a lower bar reaching <= 0 would vanish on the log axis: stop it just above zero
    lower = np.minimum(e[det], 0.999 * f[det])
    bars = ax.errorbar(lam_band[det], f[det], yerr=(lower, e[det]), fmt="o", color="k", ms=3.5,
                       elinewidth=0.8, capsize=1.5, zorder=5, label="measured")
    bars.lines[0].set_gid("data")
    for x, y in zip(lam_band[arr], arrow_at[arr], strict=True):  # a handful of bands, not a frequency grid
        ax.annotate("", xy=(x, y / 2.5), xytext=(x, y), zorder=5, gid="upper_limit",
                    arrowprops={"arrowstyle": "-|>", "color": "k", "lw": 0.8, "shrinkA": 0,
                                "shrinkB": 0, "mutation_scale": 6})
    if arr.any():
        ax.plot(lam_band[arr], arrow_at[arr], ls="none", marker="_", color="k", ms=6,
                label="upper limit", gid="limits")
    return np.concatenate([f[det] + e[det], f[det], arrow_at[arr] / 2.5])


def _param_text(result):
    parts = []
    for p, sym, unit in (("T", r"T_\mathrm{d}", r"\,\mathrm{K}"), ("beta", r"\beta", "")):
        if p in result.samples:
            lo, med, hi = np.quantile(result.samples[p], [0.16, 0.5, 0.84])
            parts.append(rf"${sym} = {med:.2f}^{{+{hi - med:.2f}}}_{{-{med - lo:.2f}}}{unit}$")
    return "\n".join(parts)


def sed_plot(result: FitResult, *, n_draws: int = 400, n_grid: int = 300, flux_unit: u.UnitBase | str = u.Jy,
             fig: FigureBase | None = None, save_to: str | Path | None = None) -> FigureBase:
    """Measured SED with the posterior model: median and 68 % / 95 % bands.

    Parameters
    ----------
    result : FitResult
        From :func:`sedtemp.fit.fit_source` (needs ``model``, ``bands``,
        ``flux_si``, ``err_si``).
    n_draws : int, keyword-only
        Posterior draws used for the model bands (evenly spaced through the
        chain-ordered samples; all of them if there are fewer). Default 400.
    n_grid : int, keyword-only
        Points of the log-spaced wavelength grid, from half the shortest to
        twice the longest band wavelength. Default 300.
    flux_unit : astropy unit or str, keyword-only
        Flux-density unit of the vertical axis. Default Jy.
    fig : Figure or SubFigure, optional, keyword-only
        An empty figure to draw on; default one of single-column width.
    save_to : str or Path, optional, keyword-only
        If given, also :func:`save_figure` there.

    Returns
    -------
    Figure
        One axes: wavelength (um) at the bottom, frequency (GHz) on the top
        axis, flux density in ``flux_unit``; both axes logarithmic.

    Raises
    ------
    InputError
        A result without model or bands, a bad ``n_draws`` or a unit that is
        not a flux density.

    Notes
    -----
    For the draws theta_k, S_k(nu) = ``model.sed_si(nu, theta_k)`` is
    evaluated on the grid in one call and the lines are the pointwise
    quantiles 2.5, 16, 50, 84, 97.5 % over k. The pointwise median is not the
    model at the median parameters (the map theta -> S is non-linear); both
    agree to a few per cent where the data constrain the SED. Open squares
    are the model's band fluxes (response-weighted, as fitted), medians over
    the same draws. Upper limits are arrows down from the limit; a measured
    flux <= 0, which a log axis cannot show, is an arrow from flux + 2 sigma.
    """
    if result.model is None or result.bands is None or result.flux_si is None:
        raise InputError("sed_plot needs a FitResult with model, bands and fluxes "
                         "(from fit_source); this one has none")
    try:
        conv = (1.0 * u.W / u.m**2 / u.Hz).to_value(flux_unit)
    except (u.UnitConversionError, ValueError, TypeError) as err:
        raise InputError(f"flux_unit {flux_unit!r} is not a flux density (use e.g. 'Jy' or 'mJy')") from err
    theta = _draws_matrix(result, n_draws)
    bands = result.bands
    lam = _fine_grid(bands, int(n_grid))
    nu = _C_UM_GHZ / lam * 1e9
    q = np.quantile(result.model.sed_si(nu, theta) * conv, [0.025, 0.16, 0.5, 0.84, 0.975], axis=0)
    model_bands = np.median(bands.band_fluxes(result.model.sed_si(bands.nu_grid_hz, theta)), axis=0) * conv
    lam_band = _C_UM_GHZ / (np.asarray(bands.nu_ref_hz) / 1e9)
    with _style():
        fig = _new_figure(fig, (SINGLE_COLUMN_IN, 0.8 * SINGLE_COLUMN_IN))
        ax = fig.add_subplot()
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.fill_between(lam, q[0], q[4], color=_SED_COLOURS["band95"], lw=0, label="95 % model range",
                        gid="band95")
        ax.fill_between(lam, q[1], q[3], color=_SED_COLOURS["band68"], lw=0, label="68 % model range",
                        gid="band68")
        ax.plot(lam, q[2], color=_SED_COLOURS["median"], lw=1.0, label="posterior median model",
                gid="median_model")
        ax.plot(lam_band, model_bands, ls="none", marker="s", mfc="white", mec=_SED_COLOURS["median"],
                ms=4.5, mew=0.8, zorder=4, label="model in band", gid="model_band_fluxes")
        ys = _sed_data(ax, result, lam_band, conv)
        top = 3.0 * np.max(np.concatenate([ys, q[2]]))
        bottom = max(0.3 * np.min(np.concatenate([ys[ys > 0], q[2][q[2] > 0]])), 1e-5 * top)
        ax.set_xlim(lam[0], lam[-1])
        ax.set_ylim(bottom, top)
        ax.set_xlabel(r"$\lambda\ [\mathrm{\mu m}]$")
        ax.set_ylabel(rf"$S_\nu\ [{_unit_tex(u.Unit(flux_unit).to_string())}]$")
        top_ax = ax.secondary_xaxis("top", functions=(_um_ghz, _um_ghz))
        top_ax.set_xlabel(r"$\nu\ [\mathrm{GHz}]$")
        top_ax.tick_params(which="both", **_TICKS)
        top_ax.xaxis.set_major_locator(LogLocator(subs=(1.0, 3.0)))
        top_ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
        top_ax.xaxis.set_minor_formatter(NullFormatter())
        _ticks(ax)
        ax.tick_params(which="both", top=False)
        ax.text(0.97, 0.96, _param_text(result), transform=ax.transAxes, ha="right", va="top")
        ax.legend(loc="lower center", fontsize=7.0, ncols=2)
    return _finish(fig, save_to)


def _um_ghz(x):
    """um <-> GHz (the map is its own inverse)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return _C_UM_GHZ / np.asarray(x, dtype=float)


# -------------------------------------------------------- comparison plot


def _autocorr_function(x):
    """Normalised autocorrelation along axis 0, averaged over axis 1: (n_steps, n_walkers, k) -> (n_steps, k).

    FFT with zero padding to >= 2 n (no wrap-around), as in Sokal (1997).
    """
    n = x.shape[0]
    m = 1 << int(np.ceil(np.log2(2 * n)))
    d = x - x.mean(axis=0)
    f = np.fft.rfft(d, n=m, axis=0)
    acf = np.fft.irfft(f * np.conj(f), n=m, axis=0)[:n]
    with np.errstate(invalid="ignore", divide="ignore"):
        acf = acf / acf[:1]
    return np.nanmean(acf, axis=1)


def trace_plot(result: FitResult, *, fig: FigureBase | None = None,
               save_to: str | Path | None = None) -> FigureBase:
    """Walker traces and autocorrelation functions of one MCMC run.

    Parameters
    ----------
    result : FitResult
        From :func:`sedtemp.fit.fit_source`, with its stored ``chain``
        (n_steps, n_walkers, n_params).
    fig : Figure or SubFigure, optional, keyword-only
        An empty figure to draw on; default one of double-column width.
    save_to : str or Path, optional, keyword-only
        If given, also :func:`save_figure` there.

    Returns
    -------
    Figure
        One row per parameter: on the left every walker's trace with the
        discarded burn-in shaded; on the right the walker-averaged
        autocorrelation function rho(lag) of the kept chain with the
        integrated autocorrelation time tau marked.

    Raises
    ------
    InputError
        If the result has no chain (a grid result).

    Notes
    -----
    rho_k(l) = sum_t (x_t - x_bar)(x_{t+l} - x_bar) / sum_t (x_t - x_bar)^2
    per walker k, averaged over walkers (the estimator emcee uses for tau).
    A trustworthy chain is more than ~50 tau long (emcee documentation,
    common practice) and its traces show no drift after the burn-in.

    References
    ----------
    Sokal, A. 1997, in Functional Integration (Springer), 131.
    Foreman-Mackey, D., et al. 2013, PASP, 125, 306.
    """
    chain = getattr(result, "chain", None)
    if chain is None or np.ndim(chain) != 3:
        raise InputError("trace_plot needs an MCMC FitResult with a stored chain "
                         f"(method={getattr(result, 'method', None)!r} has none)")
    chain = np.asarray(chain, float)
    n_steps, _, k = chain.shape
    burn = int(result.burn)
    acf = _autocorr_function(chain[burn:])
    steps = np.arange(n_steps)
    with _style():
        fig = _new_figure(fig, (DOUBLE_COLUMN_IN, 1.3 * k + 0.4))
        grid = fig.add_gridspec(k, 2, width_ratios=(3, 1), hspace=0.12, wspace=0.25)
        for j, name in enumerate(result.param_names):
            _trace_row(fig, grid[j, 0], grid[j, 1], steps, chain[:, :, j], acf[:, j], result, name,
                       burn, last=j == k - 1)
        fig.subplots_adjust(left=0.09, right=0.98, bottom=0.45 / (1.3 * k + 0.4) + 0.04, top=0.97)
    return _finish(fig, save_to)


def _trace_row(fig, cell_t, cell_a, steps, x, acf, result, name, burn, last):
    ax = fig.add_subplot(cell_t)
    segs = np.stack([np.broadcast_to(steps[:, None], x.shape), x], axis=-1).transpose(1, 0, 2)
    # rasterized: tens of walkers x thousands of steps as vectors make a slow, heavy PDF
    ax.add_collection(LineCollection(segs, colors="k", linewidths=0.3, alpha=0.25, gid="walkers",
                                     rasterized=True))
    ax.axvspan(0, burn, color=_OKABE_ITO["orange"], alpha=0.25, lw=0, gid="burn_in",
               label="burn-in (discarded)")
    ax.set_xlim(0, steps[-1])
    ax.set_ylim(np.min(x), np.max(x))
    ax.set_ylabel(_param_label(name, result.units.get(name, ""), result.model))
    tau = float(result.tau.get(name, np.nan))
    ax.text(0.99, 0.93, rf"$\tau = {tau:.1f}$ steps, chain $= {len(steps) / tau:.0f}\,\tau$, "
            rf"ESS $= {float(result.ess.get(name, np.nan)):.0f}$", transform=ax.transAxes,
            ha="right", va="top", fontsize=7.0, bbox={"fc": "white", "ec": "none", "alpha": 0.8})
    _ticks(ax)
    ax_a = fig.add_subplot(cell_a)
    n_lag = max(2, min(acf.size, int(np.ceil(5 * tau)) if np.isfinite(tau) else acf.size))
    ax_a.plot(np.arange(n_lag), acf[:n_lag], color=_SED_COLOURS["median"], gid="acf")
    ax_a.axhline(0.0, color=_GREY, lw=0.5)
    if np.isfinite(tau):
        ax_a.axvline(tau, color=_OKABE_ITO["vermillion"], ls="--", lw=0.8, gid="tau")
    ax_a.set_xlim(0, n_lag - 1)
    ax_a.set_ylim(-0.3, 1.05)
    ax_a.set_ylabel("autocorrelation")
    _ticks(ax_a)
    if last:
        ax.set_xlabel("step")
        ax_a.set_xlabel("lag [steps]")
        ax.legend(loc="lower right", fontsize=7.0)
    else:
        ax.tick_params(labelbottom=False)
        ax_a.tick_params(labelbottom=False)
