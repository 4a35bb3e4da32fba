"""Reading band images, their units and beams, and matching them to one beam and one grid.

Every band image is turned into a surface brightness in SI (W m^-2 Hz^-1
sr^-1) from its ``BUNIT``, convolved to the coarsest beam with a Gaussian
kernel of FWHM sqrt(theta^2 - theta_i^2) on its own pixel grid, and
reprojected onto the output grid. The noise map goes through the same
steps: its variance is convolved with the square of the kernel (the exact
variance of a weighted sum of independent pixels), then reprojected like
the image.
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import astropy.units as u
import numpy as np
from astropy.convolution import Gaussian2DKernel, convolve_fft
from astropy.io import fits
from astropy.wcs import WCS

from ..errors import InputError

if TYPE_CHECKING:
    from typing import TypeAlias

    #: An image as the map functions accept it: an HDU with a celestial WCS, or a FITS file.
    ImageLike: TypeAlias = "fits.ImageHDU | fits.PrimaryHDU | str | Path"

__all__ = [
    "FWHM_TO_SIGMA",
    "BandImage",
    "beam_area_sr",
    "convolve_to_beam",
    "independent_beams",
    "match_images",
    "read_image",
    "read_noise",
    "reproject_plain",
]

#: Gaussian sigma = FWHM * FWHM_TO_SIGMA (exact: 1 / (2 sqrt(2 ln 2))).
FWHM_TO_SIGMA = 1.0 / (2.0 * np.sqrt(2.0 * np.log(2.0)))
_SI_INTENSITY = u.W / u.m**2 / u.Hz / u.sr
#: A convolved pixel keeps a value only if at least this fraction of its (corner pixels: 1/4)
#: kernel weight falls on valid input pixels (edges and blanked regions).
_MIN_KERNEL_WEIGHT = 0.2
#: Kernel sigma (pixels) below which the beams count as equal: the kernel
#: would be a delta function on the pixel grid.
_MIN_KERNEL_SIGMA_PIX = 0.05
#: Samples per pixel side when a Gaussian kernel is integrated over its pixels.
_OVERSAMPLE = 10


@dataclass
class BandImage:
    """One band's image in SI surface brightness with its noise, WCS and beam.

    Attributes
    ----------
    name : str
    data, noise : ndarray (ny, nx)
        Intensity and 1-sigma noise, W m^-2 Hz^-1 sr^-1 (NaN: no data).
    wcs : astropy.wcs.WCS
        Celestial WCS of the pixel grid.
    beam_fwhm_deg : float
        FWHM of the (circular Gaussian) beam, deg.
    source : str
        File name or ``"<HDU>"`` for messages.
    history : list of str
        What was done to the image (header HISTORY records).
    """

    name: str
    data: np.ndarray
    noise: np.ndarray
    wcs: WCS
    beam_fwhm_deg: float
    source: str = "<HDU>"
    history: list = field(default_factory=list)

    @property
    def pixel_scale_deg(self) -> float:
        """Geometric-mean pixel side, deg."""
        return float(np.sqrt(abs(np.linalg.det(self.wcs.celestial.pixel_scale_matrix))))


def _open(image, what):
    """(data float64 array, header, source name) of an HDU or a FITS path (memory-mapped)."""
    if isinstance(image, (fits.PrimaryHDU, fits.ImageHDU, fits.CompImageHDU)):
        return np.asarray(image.data, dtype=float), image.header, f"<{what} HDU>"
    if isinstance(image, (str, os.PathLike)):
        path = Path(image)
        if not path.is_file():
            raise InputError(f"{what}: image file {str(path)!r} does not exist")
        with fits.open(path, memmap=True) as hdul:
            hdu = next((h for h in hdul if h.data is not None and h.data.ndim >= 2), None)
            if hdu is None:
                raise InputError(f"{what}: {path.name} has no image extension")
            return np.array(hdu.data, dtype=float), hdu.header.copy(), path.name
    raise InputError(f"{what}: expected an ImageHDU, PrimaryHDU or FITS path, got {type(image).__name__}")


def _squeeze(data, header, src):  # noqa: ARG001 - kept for a uniform call signature
    if data.ndim > 2:
        if any(s != 1 for s in data.shape[:-2]):
            raise InputError(f"{src}: image has shape {data.shape}; give a 2-D image (one plane per band)")
        data = data.reshape(data.shape[-2:])
    return data


def _beam(header, beam, src, name):
    """Beam FWHM in deg: the given one, else BMAJ/BMIN of the header (deg)."""
    if beam is not None:
        q = beam if isinstance(beam, u.Quantity) else float(beam) * u.arcsec
        fwhm = float(q.to_value(u.deg))
    elif "BMAJ" in header:
        bmaj, bmin = float(header["BMAJ"]), float(header.get("BMIN", header["BMAJ"]))
        if abs(bmaj - bmin) > 0.02 * bmaj:
            raise InputError(f"{src} (band {name!r}): elliptical beam BMAJ={bmaj:g} BMIN={bmin:g} deg; "
                             "only circular Gaussian beams are matched; give beams={...} to override")
        fwhm = np.sqrt(bmaj * bmin)
    else:
        raise InputError(f"{src} (band {name!r}): no beam: the header has no BMAJ; "
                         f"give beams={{{name!r}: <FWHM, e.g. 18 * u.arcsec>}}")
    if not (np.isfinite(fwhm) and fwhm > 0):
        raise InputError(f"{src} (band {name!r}): beam FWHM must be positive, got {beam!r}")
    return fwhm


def beam_area_sr(fwhm_deg: float) -> float:
    """Solid angle of a circular Gaussian beam, pi theta^2 / (4 ln 2), sr (exact).

    Examples
    --------
    >>> round(beam_area_sr(36 / 3600) * 1e8, 4)  # a 36 arcsec beam
    3.4516
    """
    theta = np.deg2rad(fwhm_deg)
    return float(np.pi * theta**2 / (4.0 * np.log(2.0)))


def _to_si_factor(bunit, src, name, fwhm_deg):
    """Factor turning values in ``bunit`` into W m^-2 Hz^-1 sr^-1 (per-beam units via the beam area)."""
    if bunit is None or not str(bunit).strip():
        raise InputError(f"{src} (band {name!r}): the header has no BUNIT; set it to 'MJy/sr', "
                         "'Jy/sr' or 'Jy/beam' so the surface brightness is known")
    try:
        unit = u.Unit(str(bunit).strip())
    except ValueError:
        unit = None
    if unit is not None and unit.is_equivalent(_SI_INTENSITY):
        return float((1.0 * unit).to_value(_SI_INTENSITY))
    if unit is not None and unit.is_equivalent(u.Jy / u.beam):
        jy = float((1.0 * unit).to_value(u.Jy / u.beam))
        return jy * float((1 * u.Jy).to_value(u.W / u.m**2 / u.Hz)) / beam_area_sr(fwhm_deg)
    raise InputError(f"{src} (band {name!r}): unknown BUNIT {bunit!r}; use a surface brightness "
                     "such as 'MJy/sr', 'Jy/sr' or 'Jy/beam'")


def read_image(image: ImageLike, name: str, *,
               beam: u.Quantity | float | None = None) -> tuple[np.ndarray, WCS, float, float, str]:
    """An image in SI surface brightness: (data, celestial WCS, beam FWHM deg, unit factor, source).

    Parameters
    ----------
    image : ImageHDU, PrimaryHDU or path
    name : str
        Band name (for messages).
    beam : Quantity or float, optional, keyword-only
        Beam FWHM (bare: arcsec); default the header's BMAJ.

    Raises
    ------
    InputError
        Missing file, no image, missing or unknown BUNIT, no beam, no celestial WCS.
    """
    data, header, src = _open(image, f"band {name!r}")
    data = _squeeze(data, header, src)
    fwhm = _beam(header, beam, src, name)
    factor = _to_si_factor(header.get("BUNIT"), src, name, fwhm)
    wcs = WCS(header).celestial
    if wcs.naxis != 2 or not wcs.has_celestial:
        raise InputError(f"{src} (band {name!r}): the header has no celestial WCS (CTYPE1/2, CRVAL, CDELT)")
    return data * factor, wcs, fwhm, factor, src


def read_noise(noise: ImageLike | u.Quantity | float, name: str, shape: tuple[int, ...], factor: float,
               fwhm_deg: float) -> np.ndarray:
    """The 1-sigma noise map in SI: an image, or a constant Quantity or number.

    A noise image is read with its own BUNIT (the band image's when it has
    none); a constant is a Quantity per steradian (MJy/sr, Jy/sr) or per beam
    (Jy/beam, converted with the beam area), or a bare number in the unit of
    the band image.

    Raises
    ------
    InputError
        Wrong shape or unit, or a non-positive noise value.
    """
    jy_si = float((1 * u.Jy).to_value(u.W / u.m**2 / u.Hz))
    if isinstance(noise, u.Quantity):
        if noise.unit.is_equivalent(_SI_INTENSITY):
            sig = np.full(shape, float(noise.to_value(_SI_INTENSITY)))
        elif noise.unit.is_equivalent(u.Jy / u.beam):
            sig = np.full(shape, float(noise.to_value(u.Jy / u.beam)) * jy_si / beam_area_sr(fwhm_deg))
        else:
            raise InputError(f"noise of band {name!r}: unit {noise.unit} is not a surface brightness; "
                             "use e.g. 0.5 * u.MJy / u.sr or 2 * u.mJy / u.beam")
    elif isinstance(noise, (int, float, np.floating)) and not isinstance(noise, bool):
        sig = np.full(shape, float(noise) * factor)
    else:
        data, header, src = _open(noise, f"noise of band {name!r}")
        data = _squeeze(data, header, src)
        if data.shape != tuple(shape):
            raise InputError(f"{src}: noise map of band {name!r} has shape {data.shape}, "
                             f"its image {tuple(shape)}; give a noise map on the image's grid")
        bunit = header.get("BUNIT")
        sig = data * (factor if bunit is None else _to_si_factor(bunit, src, name, fwhm_deg))
    finite = np.isfinite(sig)
    if np.any(sig[finite] <= 0):
        raise InputError(f"noise of band {name!r}: every noise value must be positive "
                         "(NaN marks a pixel without data)")
    return sig


def _kernel(sigma_pix):
    return Gaussian2DKernel(sigma_pix, mode="oversample", factor=_OVERSAMPLE).array


def convolve_to_beam(img: BandImage, target_fwhm_deg: float) -> BandImage:
    """``img`` convolved to a circular Gaussian beam of ``target_fwhm_deg``, noise propagated.

    The kernel is a Gaussian of FWHM sqrt(theta^2 - theta_i^2) on the
    image's own pixels (normalised to unit sum: surface brightness is kept).
    Around blanked pixels and edges the kernel is renormalised over the
    valid pixels; a pixel with under a fifth of the kernel weight on valid
    pixels becomes NaN. The noise variance is the exact one of the weighted
    sum, sum_j w_j^2 sigma_j^2, for independent input pixels; the output
    pixels are then correlated on the beam scale.

    Raises
    ------
    InputError
        The target beam is smaller than the image's.
    """
    dfwhm2 = target_fwhm_deg**2 - img.beam_fwhm_deg**2
    if dfwhm2 < -1e-12 * target_fwhm_deg**2:
        raise InputError(f"band {img.name!r}: beam {img.beam_fwhm_deg * 3600:.4g} arcsec is larger than the "
                         f"target beam {target_fwhm_deg * 3600:.4g} arcsec; images can only be smoothed")
    sigma_pix = np.sqrt(max(dfwhm2, 0.0)) * FWHM_TO_SIGMA / img.pixel_scale_deg
    if sigma_pix < _MIN_KERNEL_SIGMA_PIX:
        return img
    k = _kernel(sigma_pix)
    valid = np.isfinite(img.data) & np.isfinite(img.noise)
    opts = {"normalize_kernel": False, "boundary": "fill", "fill_value": 0.0, "nan_treatment": "fill",
            "allow_huge": True}
    w = convolve_fft(valid.astype(float), k, **opts)
    num = convolve_fft(np.where(valid, img.data, 0.0), k, **opts)
    var = convolve_fft(np.where(valid, img.noise, 0.0) ** 2, k * k, **opts)
    keep = valid & (w >= _MIN_KERNEL_WEIGHT)
    with np.errstate(invalid="ignore", divide="ignore"):
        data = np.where(keep, num / w, np.nan)
        noise = np.where(keep, np.sqrt(np.maximum(var, 0.0)) / w, np.nan)
    hist = [*img.history, f"band {img.name}: convolved with a Gaussian of FWHM " f"{np.sqrt(max(dfwhm2, 0.0)) * 3600:.4g} arcsec to a " f"{target_fwhm_deg * 3600:.4g} arcsec beam"]
    return BandImage(img.name, data, noise, img.wcs, target_fwhm_deg, img.source, hist)


def _reproject(img: BandImage, wcs_out: WCS, shape_out) -> BandImage:
    from reproject import reproject_interp

    same = img.data.shape == tuple(shape_out) and img.wcs.wcs.compare(wcs_out.wcs, tolerance=1e-10)
    if same:
        return img
    data, _ = reproject_interp((img.data, img.wcs), wcs_out, shape_out=shape_out, order="bilinear")
    noise, _ = reproject_interp((img.noise, img.wcs), wcs_out, shape_out=shape_out, order="bilinear")
    hist = [*img.history, f"band {img.name}: reprojected (bilinear, reproject_interp) onto the output grid"]
    return BandImage(img.name, data, noise, wcs_out, img.beam_fwhm_deg, img.source, hist)


def reproject_plain(image: ImageLike, wcs_out: WCS, shape_out: tuple[int, int], *,
                    what: str = "map") -> np.ndarray:
    """Any image (HDU or path) with a celestial WCS, reprojected (bilinear) onto the output grid.

    No unit conversion: for auxiliary maps such as A_V or the ISRF strength U.
    """
    from reproject import reproject_interp

    data, header, src = _open(image, what)
    data = _squeeze(data, header, src)
    wcs = WCS(header).celestial
    if not wcs.has_celestial:
        raise InputError(f"{src} ({what}): the header has no celestial WCS")
    out, _ = reproject_interp((data, wcs), wcs_out, shape_out=tuple(shape_out), order="bilinear")
    return out


def independent_beams(n_pixels: int, pixel_scale_deg: float, fwhm_deg: float) -> float:
    """Number of independent beams covering ``n_pixels`` pixels: N pix area / beam area."""
    return float(n_pixels * np.deg2rad(pixel_scale_deg) ** 2 / beam_area_sr(fwhm_deg))


def match_images(images: Mapping, errors: Mapping, bands: Sequence[str], *,
                 beams: Mapping[str, u.Quantity | float] | None = None,
                 target_wcs: WCS | fits.Header | None = None,
                 target_shape: tuple[int, int] | None = None) -> tuple[dict, WCS, float, list]:
    """Read, convolve to the coarsest beam and reproject every band image onto one grid.

    Parameters
    ----------
    images, errors : mapping band name -> image (HDU or path); errors may be a constant
    bands : sequence of str
        Band names, in fit order.
    beams : mapping band name -> FWHM, optional
    target_wcs : WCS or Header, optional
        Output grid; default the grid of the image with the coarsest beam.
    target_shape : (ny, nx), optional
        Needed with ``target_wcs`` unless it carries NAXIS1/2 (a Header).

    Returns
    -------
    (matched, wcs, fwhm_deg, history)
        ``matched``: band name -> BandImage on the output grid.

    Raises
    ------
    InputError
        A band without an image or noise, and the errors of :func:`read_image`.
    """
    beams = dict(beams or {})
    raw = {}
    for name in bands:
        if name not in images:
            raise InputError(f"band {name!r} has no image; give images[{name!r}]")
        if name not in errors:
            raise InputError(f"band {name!r} has no noise; give errors[{name!r}] (a map or a constant "
                             "such as 0.5 * u.MJy / u.sr)")
        data, wcs, fwhm, factor, src = read_image(images[name], name, beam=beams.get(name))
        noise = read_noise(errors[name], name, data.shape, factor, fwhm)
        raw[name] = BandImage(name, data, noise, wcs, fwhm, src, [f"band {name}: read from {src}"])
    coarsest = max(raw.values(), key=lambda b: b.beam_fwhm_deg)
    fwhm = coarsest.beam_fwhm_deg
    wcs_out, shape_out = _target(target_wcs, target_shape, coarsest)
    matched, history = {}, []
    for name, img in raw.items():
        out = _reproject(convolve_to_beam(img, fwhm), wcs_out, shape_out)
        matched[name] = out
        history.extend(out.history)
    return matched, wcs_out, fwhm, history


def _target(target_wcs, target_shape, coarsest):
    if target_wcs is None:
        return coarsest.wcs, coarsest.data.shape
    if isinstance(target_wcs, fits.Header):
        hdr = target_wcs
        wcs = WCS(hdr).celestial
        if target_shape is None and "NAXIS1" in hdr and "NAXIS2" in hdr:
            target_shape = (int(hdr["NAXIS2"]), int(hdr["NAXIS1"]))
    else:
        wcs = target_wcs.celestial
        if target_shape is None and wcs.pixel_shape is not None:
            target_shape = tuple(wcs.pixel_shape[::-1])
    if target_shape is None:
        raise InputError("target_wcs has no image size; give target_shape=(ny, nx) or a WCS with pixel_shape")
    return wcs, tuple(int(s) for s in target_shape)
