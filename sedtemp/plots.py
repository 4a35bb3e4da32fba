"""Publication figures: posterior corner plot, SED, comparison, population and trace plots.

Every function builds a :class:`matplotlib.figure.Figure` directly (no pyplot
state, so thousands of figures made in a pipeline do not pile up), draws on
an empty ``fig=`` when one is given, returns the figure and never shows it.
:func:`save_figure` writes it as PDF (vector) and PNG; every plotting
function also takes ``save_to=`` to do that in one call.

The house style (sizes for a journal's single column, inward ticks, a serif
font with matching mathtext) is applied with :func:`matplotlib.rc_context`
while a figure is built and saved, so the user's global ``rcParams`` are never
changed. Colours come from the palette of Okabe & Ito (2008), which stays
distinguishable for the common colour-vision deficiencies; every category
also has its own marker, and the model bands of the SED plot are one hue in
steps of lightness, so the figures survive greyscale printing.

References
----------
Okabe, M. & Ito, K. 2008, "Color Universal Design (CUD): how to make figures
and presentations that are friendly to colorblind people" (palette hex
values from memory).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING

import astropy.constants as const
import astropy.units as u
import matplotlib as mpl
import numpy as np
from matplotlib.collections import LineCollection, PolyCollection
from matplotlib.figure import Figure, FigureBase
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter
from scipy.ndimage import gaussian_filter, map_coordinates

from ._units import to_kelvin
from .errors import InputError

if TYPE_CHECKING:  # annotations only
    from astropy.table import Table

    from .fit import FitResult

__all__ = [
    "corner_plot",
    "sed_plot",
    "comparison_plot",
    "population_plot",
    "trace_plot",
    "save_figure",
    "FLAG_STYLES",
    "SINGLE_COLUMN_IN",
    "DOUBLE_COLUMN_IN",
]

#: Figure widths in inches: A&A's column (88 mm) and a two-column page (~7 in).
SINGLE_COLUMN_IN = 3.46
DOUBLE_COLUMN_IN = 7.0

_OKABE_ITO = {  # Okabe & Ito (2008), from memory
    "black": "#000000", "orange": "#E69F00", "sky_blue": "#56B4E9", "green": "#009E73",
    "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00", "purple": "#CC79A7",
}
_GREY = "#808080"
#: SED model: one hue (blue) at three lightness steps, so the bands stay ordered in greyscale.
_SED_COLOURS = {"band95": "#c6dbef", "band68": "#6baed6", "median": "#08306b"}

#: Comparison flag -> (colour, marker, legend text in plain words).
FLAG_STYLES = {
    "consistent": (_OKABE_ITO["blue"], "o", "consistent with radiative equilibrium"),
    "extra_heating": (_OKABE_ITO["vermillion"], "^", "warmer than equilibrium: extra heating"),
    "shielded": (_OKABE_ITO["sky_blue"], "v", "colder than equilibrium: shielded"),
    "non_equilibrium": (_OKABE_ITO["purple"], "D", "small grains, not in equilibrium"),
    "unconstrained": (_GREY, "s", "temperature not constrained by the data"),
}

_STYLE = {
    "font.family": "serif",
    "font.serif": ["STIXGeneral", "DejaVu Serif"],
    "mathtext.fontset": "stix",
    "font.size": 8.0,
    "axes.labelsize": 8.0,
    "axes.titlesize": 8.0,
    "legend.fontsize": 7.0,
    "xtick.labelsize": 7.0,
    "ytick.labelsize": 7.0,
    "axes.linewidth": 0.6,
    "lines.linewidth": 1.0,
    "lines.markersize": 4.0,
    "legend.frameon": False,
    "axes.formatter.use_mathtext": True,
    "savefig.bbox": "tight",
    "savefig.pad_inches": 0.02,
}
_TICKS = {"direction": "in", "labelsize": 7.0, "width": 0.6}
_PNG_DPI = 300
#: Posterior mass enclosed by the population plot's per-source regions.
_REGION_MASS = 0.68
_C_UM_GHZ = const.c.to_value(u.um * u.GHz)  # lambda [um] * nu [GHz]


# ----------------------------------------------------------------- helpers
def _style():
    return mpl.rc_context(_STYLE)


def _ticks(ax):
    """Inward ticks on all four sides (stored on the axes, so later draws keep them)."""
    ax.minorticks_on()
    ax.tick_params(which="both", top=True, right=True, **_TICKS)
    ax.tick_params(which="major", length=3.5)
    ax.tick_params(which="minor", length=2.0)


def _new_figure(fig, size):
    if fig is None:
        return Figure(figsize=size, layout=None)
    if not isinstance(fig, FigureBase):
        raise InputError(f"fig must be a matplotlib Figure or SubFigure, got {type(fig).__name__}")
    if fig.axes:
        raise InputError(f"fig already has {len(fig.axes)} axes; pass an empty Figure or SubFigure")
    return fig


def _finish(fig, save_to):
    if save_to is not None:
        save_figure(fig, save_to)
    return fig


def _unit_tex(unit):
    """Mathtext (without $) for an astropy unit string; "" for dimensionless."""
    if not unit:
        return ""
    return u.Unit(unit).to_string("latex_inline").strip("$")


_SYMBOLS = {"T": r"T_\mathrm{d}", "beta": r"\beta", "log10_N_H2": r"\log_{10} N_{\mathrm{H}_2}",
            "log10_tau0": r"\log_{10} \tau_0"}


def _param_label(name, unit, model=None):
    """Axis label of a parameter, e.g. ``$\\log_{10} M_\\mathrm{d}\\ [\\mathrm{M_{\\odot}}]$``."""
    base, comp = (name, "")
    for key in ("log10_mass", "log10_N_H2", "log10_tau0", "T"):
        if name.startswith(key + "_"):
            base, comp = key, name[len(key) + 1:]
            break
    if base == "log10_mass":
        comp_model = getattr(model, "cold", model)  # a two-temperature model: its components
        per = getattr(getattr(comp_model, "opacity", None), "per", "dust")
        sym = r"\log_{10} M_\mathrm{gas}" if per == "gas" else r"\log_{10} M_\mathrm{d}"
    elif base == "T" and comp:
        sym, comp = rf"T_\mathrm{{{comp}}}", ""
    else:
        sym = _SYMBOLS.get(base, r"\mathrm{" + name.replace("_", r"\_") + "}")
    if comp:
        sym += rf"^\mathrm{{{comp}}}"
    ut = _unit_tex(unit)
    return f"${sym}\\ [{ut}]$" if ut else f"${sym}$"


def _column(table, name, what, *, kelvin=False):
    try:
        col = table[name]
    except (KeyError, ValueError, IndexError):
        raise InputError(f"{what}: the table has no column {name!r}") from None
    if hasattr(col, "filled") and getattr(col, "mask", None) is not None:
        col = col.filled(np.nan)  # a masked cell (a skipped source read back from a file) is no value
    if kelvin:
        return np.atleast_1d(to_kelvin(col if getattr(col, "unit", None) is None
                                       else u.Quantity(col), name=name)).astype(float)
    return np.atleast_1d(np.asarray(col, dtype=float))


def _has(table, name):
    names = getattr(table, "colnames", None) or (list(table.keys()) if hasattr(table, "keys") else [])
    return name in names


def _interval(table, p, what, *, kelvin):
    """median, lower and upper error (>= 0) from <p>_median, <p>_p16, <p>_p84."""
    med, lo, hi = (_column(table, f"{p}_{s}", what, kelvin=kelvin) for s in ("median", "p16", "p84"))
    bad = np.flatnonzero((lo > med) | (med > hi))
    if bad.size:
        i = bad[0]
        raise InputError(f"{what}: row {i} has {p}_p16 = {lo[i]:g}, {p}_median = {med[i]:g}, "
                         f"{p}_p84 = {hi[i]:g}, not in increasing order")
    return med, med - lo, hi - med


def _flags(table, what):
    if not _has(table, "flag"):
        return None
    col = table["flag"]
    if hasattr(col, "filled") and getattr(col, "mask", None) is not None:
        col = col.filled("")  # masked: a source with no comparison (skipped, failed)
    flags = np.asarray([str(f) for f in np.atleast_1d(np.asarray(col))])
    flags[np.isin(flags, _NO_FLAG)] = ""  # not drawn
    unknown = sorted(set(flags.tolist()) - set(FLAG_STYLES) - {""})
    if unknown:
        raise InputError(f"{what}: unknown flag value(s) {unknown} in column 'flag'; "
                         f"expected one of {list(FLAG_STYLES)}")
    return flags


#: Values of the ``flag`` column meaning "no comparison" (a skipped or failed source): not drawn.
_NO_FLAG = ("", "none", "--")


def _draws_matrix(result, n_draws):
    """(n_draws, n_params) posterior draws, evenly spaced through the stored samples.

    The samples are in chain order, so even spacing thins the whole chain
    (deterministic: the same result always gives the same draws).
    """
    names = tuple(result.param_names)
    n = len(result.samples[names[0]])
    if isinstance(n_draws, bool) or not isinstance(n_draws, (int, np.integer)) or n_draws < 2:
        raise InputError(f"n_draws must be an integer >= 2, got {n_draws!r}")
    idx = np.unique(np.linspace(0, n - 1, min(int(n_draws), n)).round().astype(int))
    return np.column_stack([np.asarray(result.samples[p], float)[idx] for p in names])


# ------------------------------------------------------------ save_figure
def save_figure(fig: FigureBase, path_stem: str | Path, formats: Sequence[str] = ("pdf", "png"), *,
                dpi: float = _PNG_DPI) -> list[Path]:
    """Write a figure once per format, as ``<path_stem>.<format>``.

    Parameters
    ----------
    fig : Figure or SubFigure
        The figure (a SubFigure saves its whole parent figure).
    path_stem : str or Path
        File name without extension; missing parent directories are created.
    formats : sequence of str, optional
        Matplotlib output formats, default ``("pdf", "png")``: PDF is vector,
        PNG is rendered at ``dpi``.
    dpi : float, keyword-only
        Resolution of raster formats, default 300 (common practice for print).

    Returns
    -------
    list of Path
        The files written, in the order of ``formats``.

    Raises
    ------
    InputError
        If ``fig`` is not a figure or a format is unknown to matplotlib.
    """
    if not isinstance(fig, FigureBase):
        raise InputError(f"save_figure needs a matplotlib Figure, got {type(fig).__name__}")
    root = fig.figure  # a SubFigure's root Figure; a Figure itself
    if isinstance(formats, str):
        formats = (formats,)
    known = root.canvas.get_supported_filetypes()
    bad = [f for f in formats if f not in known]
    if bad:
        raise InputError(f"unknown figure format(s) {bad}; choose from {sorted(known)}")
    stem = Path(path_stem)
    stem.parent.mkdir(parents=True, exist_ok=True)
    paths = []
    with _style():
        for fmt in formats:
            path = stem.with_name(f"{stem.name}.{fmt}")
            root.savefig(path, format=fmt, dpi=dpi)
            paths.append(path)
    return paths


# ------------------------------------------------------------ corner plot
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


def corner_plot(result: FitResult, *, T_eq=None, truths: Mapping | Sequence | None = None,
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
    import corner  # imported here: it loads pyplot, which plots.py itself never uses

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
        from ._units import did_you_mean

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
    for x, y in zip(lam_band[arr], arrow_at[arr]):  # a handful of bands, not a frequency grid
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
def comparison_plot(table: Table | Mapping, *, fig: FigureBase | None = None,
                    save_to: str | Path | None = None) -> FigureBase:
    """Fitted against equilibrium temperature for a catalogue, coloured by flag.

    Parameters
    ----------
    table : astropy Table or mapping of columns
        Needs ``T_median``, ``T_p16``, ``T_p84`` (fit) and ``T_eq_median``,
        ``T_eq_p16``, ``T_eq_p84`` (prediction), in K (bare or with a unit);
        an optional ``flag`` column with values in :data:`FLAG_STYLES`.
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
        A missing column, quantiles out of order, or an unknown flag.
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
        has_flag = _has(table, "flag")
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
        correlation coefficient of T and beta), ``flag`` (colours as in
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
        Missing columns, quantiles out of order, |T_beta_corr| >= 1, an
        unknown flag, or ``draws`` for an id that is not in the table.

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
                colour, marker, text = FLAG_STYLES[flag or "consistent"]
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
    n_steps, n_walkers, k = chain.shape
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
