"""Quick-look figures of fitted maps on WCS axes (astropy.visualization.wcsaxes).

Each function builds a :class:`matplotlib.figure.Figure` without pyplot
state (no figure is left open in a long run), accepts ``fig=`` and returns
the Figure; it never calls ``show()``.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.wcs import WCS
from matplotlib.figure import Figure

from .field import COMPARE_CODES

__all__ = ["map_panels", "quicklook_figure", "save_quicklook"]


def _wcs_of(hdu) -> WCS:
    return WCS(hdu.header).celestial


def _panel(fig, pos, hdu, title, label, *, cmap="inferno", vmin=None, vmax=None):
    ax = fig.add_subplot(*pos, projection=_wcs_of(hdu))
    data = np.asarray(hdu.data, float)
    finite = data[np.isfinite(data)]
    if finite.size and vmin is None:
        vmin, vmax = np.percentile(finite, [1, 99])
    im = ax.imshow(data, origin="lower", cmap=cmap, vmin=vmin, vmax=vmax)
    ax.set_title(title)
    ax.coords[0].set_axislabel("RA")
    ax.coords[1].set_axislabel("Dec")
    fig.colorbar(im, ax=ax, label=label, fraction=0.046, pad=0.04)
    return ax


def map_panels(hdul: fits.HDUList) -> list[tuple[str, str, str]]:
    """The panels :func:`quicklook_figure` draws: (extension, title, colour-bar label)."""
    amp = next((h.name[:-len("_MEDIAN")] for h in hdul[1:] if h.name.endswith("_MEDIAN")
                and h.name not in ("T_MEDIAN", "BETA_MEDIAN", "T_EQ_MEDIAN")), None)
    panels = [("T_MEDIAN", "dust temperature", "T (K)")]
    if "BETA_MEDIAN" in hdul:
        panels.append(("BETA_MEDIAN", "emissivity index", "beta"))
    if amp is not None:
        label = "log10 N(H2) (cm^-2)" if amp == "LOG10_N_H2" else amp.lower()
        panels.append((f"{amp}_MEDIAN", "column density" if amp == "LOG10_N_H2" else amp.lower(), label))
    if "T_EQ_MEDIAN" in hdul:
        panels.append(("T_RATIO", "T / T_eq, contours: comparison flag", "T_fit / T_eq"))
    return panels


def quicklook_figure(hdul: fits.HDUList, *, fig: Figure | None = None) -> Figure:
    """T, beta, N(H2) and (with a field) T / T_eq maps on WCS axes, in one Figure.

    The T / T_eq panel carries contours of the comparison flag: the
    boundaries of the ``extra_heating`` (red) and ``shielded`` (blue)
    regions.

    Parameters
    ----------
    hdul : HDUList
        The output of :func:`sedtemp.maps.fit_maps`.
    fig : Figure, optional, keyword-only

    Returns
    -------
    matplotlib.figure.Figure
    """
    panels = map_panels(hdul)
    fig = Figure(figsize=(4.6 * len(panels), 4.4)) if fig is None else fig
    for k, (ext, title, label) in enumerate(panels):
        if ext == "T_RATIO":
            ax = _panel(fig, (1, len(panels), k + 1), hdul[ext], title, label, cmap="RdBu_r", vmin=0.5, vmax=1.5)
            flag = np.asarray(hdul["COMPARE_FLAG"].data)
            for name, colour in (("extra_heating", "darkred"), ("shielded", "navy")):
                mask = (flag == COMPARE_CODES[name]).astype(float)
                if mask.any() and not mask.all():
                    ax.contour(mask, levels=[0.5], colors=colour, linewidths=1.2)
        else:
            _panel(fig, (1, len(panels), k + 1), hdul[ext], title, label,
                   cmap="viridis" if ext.startswith("BETA") else "inferno")
    fig.subplots_adjust(wspace=0.6, left=0.06, right=0.96)
    return fig


def save_quicklook(hdul: fits.HDUList, path: str | Path, *, dpi: int = 110) -> Path:
    """Write :func:`quicklook_figure` to ``path`` (PNG or PDF by suffix); the path written."""
    from .._io import atomic_path

    path = Path(path)
    fig = quicklook_figure(hdul)
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=dpi, format=path.suffix.lstrip(".") or "png")
    return path
