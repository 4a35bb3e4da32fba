"""An invented map scenario with known truth: the fictional Tamsin cloud.

A cloud with a warm rim facing an invented hot star (the "Vey star", just
outside the field) and a cold, dense, shielded filament across it, observed
in five invented bands (d100 ... d500) with different beams and pixel grids.
Each band image is the modified-blackbody intensity of the truth maps on its
own pixel grid, smoothed to its own beam, plus white noise; the noise maps
are given as images. The truth (T, beta, N(H2)) is returned on the grid of
the coarsest band, the default output grid of :func:`sedtemp.maps.fit_maps`.

Nothing here describes a real object, instrument or sky region.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import astropy.units as u
import numpy as np
from astropy.coordinates import SkyCoord
from astropy.io import fits
from astropy.wcs import WCS
from numpy.typing import ArrayLike

from ..bands import Band, BandSet
from .fitting import default_map_model
from .images import BandImage, convolve_to_beam

if TYPE_CHECKING:
    from pathlib import Path

__all__ = [
    "DEMO_BANDS",
    "DEMO_CENTER",
    "DEMO_DISTANCE_PC",
    "demo_field",
    "demo_wcs",
    "make_map_demo",
    "pull_statistics",
    "run_map_demo",
    "truth_maps",
]

#: Invented bands: name -> (wavelength um, beam FWHM arcsec, pixel arcsec, noise MJy/sr per pixel).
DEMO_BANDS = {
    "d100": (100.0, 9.0, 3.0, 12.0),
    "d160": (160.0, 13.0, 4.0, 10.0),
    "d250": (250.0, 18.0, 6.0, 5.0),
    "d350": (350.0, 25.0, 8.0, 3.0),
    "d500": (500.0, 36.0, 12.0, 1.5),
}
#: Invented field centre (deg, ICRS) and distance of the cloud (pc).
DEMO_CENTER = (131.70, 27.40)
DEMO_DISTANCE_PC = 450.0
#: The invented star: offset from the centre (arcmin, east/north), T_eff (K), L (L_sun).
_STAR_OFFSET = (-5.5, 0.5)
_STAR = {"teff": 20000.0, "luminosity": 8.0e2}
_FIELD_ARCMIN = 9.6


def demo_wcs(pixel_arcsec: float, n: int) -> WCS:
    """A TAN grid of n x n pixels of ``pixel_arcsec`` centred on :data:`DEMO_CENTER`."""
    w = WCS(naxis=2)
    w.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    w.wcs.crval = list(DEMO_CENTER)
    w.wcs.crpix = [(n + 1) / 2.0, (n + 1) / 2.0]
    w.wcs.cdelt = [-pixel_arcsec / 3600.0, pixel_arcsec / 3600.0]
    w.wcs.cunit = ["deg", "deg"]
    w.pixel_shape = (n, n)
    return w


def _offsets(wcs):
    """Sky offsets (arcmin; east, north) of every pixel centre from the field centre."""
    ny, nx = wcs.pixel_shape[::-1]
    yy, xx = np.mgrid[0:ny, 0:nx]
    sky = wcs.pixel_to_world(xx, yy)
    c0 = SkyCoord(*DEMO_CENTER, unit="deg")
    dlon, dlat = c0.spherical_offsets_to(sky)
    return dlon.to_value(u.arcmin), dlat.to_value(u.arcmin)


def truth_maps(wcs: WCS, *, smooth: bool = False) -> dict:
    """The truth on a grid: ``T`` (K), ``beta``, ``log10_N_H2`` (cm^-2) per pixel.

    ``smooth``: a gentler version (no sharp rim, broad filament) whose
    structures are several coarsest beams wide, for statistical checks
    in which the beam smoothing of the truth must stay negligible.
    """
    x, y = _offsets(wcs)
    ds = np.hypot(x - _STAR_OFFSET[0], y - _STAR_OFFSET[1])
    r_fil = np.abs(0.45 * x + y - 0.8) / np.hypot(0.45, 1.0)  # distance to the filament axis
    if smooth:
        fil = np.exp(-0.5 * (r_fil / 2.0) ** 2)
        T = 15.0 + 8.0 * np.exp(-ds / 5.0) - 3.0 * fil
        n = 3e21 + 1.2e22 * fil
    else:
        fil = np.exp(-0.5 * (r_fil / 0.7) ** 2)
        rim = np.exp(-ds / 1.6)
        T = 19.0 + 12.0 * rim - 7.0 * fil
        n = 2e21 * (1 + 3 * rim) + 3e22 * fil
    beta = 1.75 + 0.05 * (y / (_FIELD_ARCMIN / 2))
    return {"T": T, "beta": beta, "log10_N_H2": np.log10(n)}


def _intensity(model, band, truth):
    shape = truth["T"].shape
    names = model.param_names
    theta = np.column_stack([truth[p].ravel() for p in names])
    bs = BandSet([band])
    return bs.band_fluxes(model.sed_si(bs.nu_grid_hz, theta))[:, 0].reshape(shape)


def demo_field(*, U: float = 1.0) -> dict:
    """The demo's modelled field: ISRF(U) + the Vey star at its sky position, for fit_maps(field=...)."""
    c0 = SkyCoord(*DEMO_CENTER, unit="deg")
    star = c0.spherical_offsets_by(_STAR_OFFSET[0] * u.arcmin, _STAR_OFFSET[1] * u.arcmin)
    return {"components": [{"kind": "isrf", "U": U},
                           {"kind": "star", "teff": _STAR["teff"] * u.K, "luminosity": _STAR["luminosity"] * u.L_sun,
                            "position": {"ra": float(star.ra.deg), "dec": float(star.dec.deg)}}],
            "distance": DEMO_DISTANCE_PC * u.pc, "uncertainty": 0.2}


def make_map_demo(*, seed: int = 0, scale: float = 1.0, smooth: bool = False, noise_factor: float = 1.0) -> dict:
    """Synthetic images of the Tamsin cloud in the five demo bands, with truth.

    Parameters
    ----------
    seed : int, keyword-only
        Seed of the noise.
    scale : float, keyword-only
        Pixel scale factor (2: pixels twice as large, a quarter of the pixels;
        the beams stay), for quick runs.
    smooth : bool, keyword-only
        The smooth truth of :func:`truth_maps`.
    noise_factor : float, keyword-only
        Multiplies every band's noise.

    Returns
    -------
    dict
        ``images``, ``errors`` (band -> ImageHDU, BUNIT MJy/sr, BMAJ set),
        ``bands`` (BandSet of monochromatic bands), ``beams`` (band -> arcsec
        Quantity), ``truth`` (maps on the coarsest band's grid), ``wcs``
        (that grid), ``field`` (:func:`demo_field`).
    """
    rng = np.random.default_rng(seed)
    model = default_map_model()
    images, errors, beams, bands = {}, {}, {}, []
    mjy = float((1 * u.MJy / u.sr).to_value(u.W / u.m**2 / u.Hz / u.sr))
    out_wcs = None
    for name, (lam, fwhm, pix, sig) in DEMO_BANDS.items():
        pix = pix * scale  # noqa: PLW2901 - the loop value is normalised in place
        n = round(_FIELD_ARCMIN * 60 / pix)
        wcs = demo_wcs(pix, n)
        band = Band.monochromatic(name, lam * u.um)
        bands.append(band)
        inten = _intensity(model, band, truth_maps(wcs, smooth=smooth)) / mjy
        # the sky seen through this band's beam (a beam of zero width would be the truth itself)
        smoothed = convolve_to_beam(BandImage(name, inten, np.ones_like(inten), wcs, 1e-9), fwhm / 3600.0).data
        # white noise of sd sig (MJy/sr) per pixel of the band's own grid
        noise = sig * noise_factor * np.ones_like(inten)
        data = smoothed + noise * rng.standard_normal(inten.shape)
        hdr = wcs.to_header()
        hdr["BUNIT"] = "MJy/sr"
        hdr["BMAJ"] = fwhm / 3600.0
        hdr["BMIN"] = fwhm / 3600.0
        images[name] = fits.ImageHDU(data.astype(np.float32), header=hdr, name=name.upper())
        errors[name] = fits.ImageHDU(noise.astype(np.float32), header=hdr, name=name.upper() + "_ERR")
        beams[name] = fwhm * u.arcsec
        out_wcs = wcs  # the last band has the coarsest beam
    return {"images": images, "errors": errors, "bands": BandSet(bands), "beams": beams,
            "truth": truth_maps(out_wcs, smooth=smooth), "wcs": out_wcs, "field": demo_field()}


# ------------------------------------------------------------------ the demo run
def pull_statistics(T_median: ArrayLike, T_p16: ArrayLike, T_p84: ArrayLike, T_true: ArrayLike) -> dict:
    """Pulls (T_median - T_true) / sigma, sigma = (T_p84 - T_p16) / 2, over the finite pixels.

    Returns
    -------
    dict
        ``n``, ``median_pull``, ``robust_sd`` (1.4826 x the median absolute
        deviation), ``median_abs_dT`` (K), ``frac_within_1sigma``.
    """
    sig = 0.5 * (np.asarray(T_p84) - np.asarray(T_p16))
    d = np.asarray(T_median) - np.asarray(T_true)
    ok = np.isfinite(d) & np.isfinite(sig) & (sig > 0)
    p = d[ok] / sig[ok]
    if p.size == 0:
        return {"n": 0, "median_pull": float("nan"), "robust_sd": float("nan"), "median_abs_dT": float("nan"),
                "frac_within_1sigma": float("nan")}
    med = float(np.median(p))
    return {"n": int(p.size), "median_pull": med, "robust_sd": float(1.4826 * np.median(np.abs(p - med))),
            "median_abs_dT": float(np.median(np.abs(d[ok]))), "frac_within_1sigma": float(np.mean(np.abs(p) < 1))}


def _toml_value(v):
    if isinstance(v, u.Quantity):
        return f'"{v.value:g} {v.unit.to_string()}"'
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{k} = {_toml_value(x)}" for k, x in v.items()) + " }"
    if isinstance(v, str):
        return f'"{v}"'
    return repr(v)


def _write_demo_inputs(demo: dict, folder) -> str:
    """Write the band images, noise maps and truth to ``folder``; the text of the demo workflow."""
    from pathlib import Path

    folder = Path(folder)
    (folder / "images").mkdir(parents=True, exist_ok=True)
    lines = ["# Map demo of the invented Tamsin cloud (sedtemp.maps.demo); paths relative to this file.",
             "[run]", "executor = \"serial\"", "seed = 11", "", "[maps]", "directory = \"results\"",
             f"distance = \"{DEMO_DISTANCE_PC:g} pc\"", "n_draws = 150", ""]
    for name, (lam, fwhm, _pix, _sig) in DEMO_BANDS.items():
        demo["images"][name].writeto(folder / "images" / f"{name}.fits", overwrite=True)
        demo["errors"][name].writeto(folder / "images" / f"{name}_err.fits", overwrite=True)
        lines += [f"[maps.bands.{name}]", f"image = \"images/{name}.fits\"", f"error = \"images/{name}_err.fits\"",
                  f"beam = \"{fwhm:g} arcsec\"", f"wavelength = \"{lam:g} um\"", ""]
    fld = demo["field"]
    lines += ["[field]", f"uncertainty = {fld['uncertainty']}", ""]
    for comp in fld["components"]:
        lines.append("[[field.components]]")
        lines += [f"{k} = {_toml_value(v)}" for k, v in comp.items()]
        lines.append("")
    hdr = demo["wcs"].to_header()
    truth = fits.HDUList([fits.PrimaryHDU()] + [fits.ImageHDU(v, header=hdr, name=f"TRUE_{k.upper()}")
                                                 for k, v in demo["truth"].items()])
    truth.writeto(folder / "truth.fits", overwrite=True)
    text = "\n".join(lines)
    (folder / "map-demo.toml").write_text(text, encoding="utf-8")
    return text


def run_map_demo(output_dir: str | Path, *, seed: int = 0, scale: float = 2.0,
                 progress: bool = False) -> dict:
    """Build the invented cloud's images, fit them through a map workflow and compare T with the truth.

    Parameters
    ----------
    output_dir : path
        Receives ``images/``, ``truth.fits``, ``map-demo.toml`` and the
        results folder ``results/`` (maps, quick-look figure, report).
    seed : int, keyword-only
        Seed of the image noise.
    scale : float, keyword-only
        Pixel scale factor of :func:`make_map_demo` (default 2: a 24 x 24
        output grid, about a minute on one core with the per-pixel comparison).
    progress : bool, keyword-only

    Returns
    -------
    dict
        The run report of :func:`sedtemp.maps.run_map_workflow` plus
        ``workflow`` (path) and ``truth_comparison`` (:func:`pull_statistics`
        of the T map against the truth).
    """
    from pathlib import Path

    from .workflow import run_map_workflow

    out = Path(output_dir)
    demo = make_map_demo(seed=seed, scale=scale)
    _write_demo_inputs(demo, out)
    report = run_map_workflow(out / "map-demo.toml", progress=progress)
    hdul = report.pop("hdul")
    report["workflow"] = str(out / "map-demo.toml")
    report["truth_comparison"] = pull_statistics(hdul["T_MEDIAN"].data, hdul["T_P16"].data, hdul["T_P84"].data,
                                                 demo["truth"]["T"])
    return report
