"""House style, shared helpers and :func:`save_figure` of the plotting package."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import astropy.constants as const
import astropy.units as u
import matplotlib as mpl
import numpy as np
from matplotlib.figure import Figure, FigureBase

from .._units import to_kelvin
from ..errors import InputError

__all__ = ["save_figure", "FLAG_STYLES", "SINGLE_COLUMN_IN", "DOUBLE_COLUMN_IN"]

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

#: Heating class -> (colour, marker, legend text in plain words).
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


#: The results column of the comparison's heating class (``flag`` before version 0.2).
CLASS_COLUMN = "heating_class"


def _flags(table, what):
    if not _has(table, CLASS_COLUMN):
        return None
    col = table[CLASS_COLUMN]
    if hasattr(col, "filled") and getattr(col, "mask", None) is not None:
        col = col.filled("")  # masked: a source with no comparison (skipped, failed)
    flags = np.asarray([str(f) for f in np.atleast_1d(np.asarray(col))])
    flags[np.isin(flags, _NO_FLAG)] = ""  # not drawn
    unknown = sorted(set(flags.tolist()) - set(FLAG_STYLES) - {""})
    if unknown:
        raise InputError(f"{what}: unknown heating class value(s) {unknown} in column "
                         f"{CLASS_COLUMN!r}; "
                         f"expected one of {list(FLAG_STYLES)}")
    return flags


#: Values of the ``heating_class`` column meaning "no comparison" (a skipped or failed source): not drawn.
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
