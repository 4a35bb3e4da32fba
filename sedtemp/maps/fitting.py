"""Pixel-by-pixel fits of band images: T, beta and column-density maps with their uncertainties.

:func:`fit_maps` reads the band images and noise maps (:mod:`.images`),
matches them to the coarsest beam and one pixel grid, fits every pixel with
the exact grid posterior (:class:`sedtemp.fit.grid.GridPosterior`) in tiles
(:mod:`.tiles`) on any ``concurrent.futures.Executor``, optionally compares
each pixel with the equilibrium temperature of its own modelled field
(:mod:`.field`), and returns an HDUList with one image extension per
quantity, each with the output celestial WCS.
"""

from __future__ import annotations

import contextlib
import hashlib
import tempfile
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import astropy.units as u
import numpy as np
from astropy.io import fits

from .. import __version__
from .._io import atomic_write_with
from ..bands import BandSet
from ..errors import InputError
from ..fit.grid import GridPosterior
from ..fit.summary import POOR_FIT_PPP
from ..models import ModifiedBlackbody
from ..seeds import resolve_seed
from .field import COMPARE_CODES, FieldSpec
from .images import independent_beams, match_images, reproject_plain
from .tiles import (
    FLAG_BITS,
    SKIP_CODES,
    TileTask,
    prepare_folder,
    run_tiles,
    tile_origins,
)

if TYPE_CHECKING:
    import concurrent.futures as cf

    from astropy.wcs import WCS

    from ..bands import Band
    from ..likelihood import Calibration
    from ..models import SEDModel

__all__ = ["QUANTITY_EXTENSIONS", "default_map_model", "fit_maps"]

#: Summary column suffixes written as maps, and their extension suffixes.
_QUANTS = {"median": "MEDIAN", "p16": "P16", "p84": "P84"}
#: Fit-quality maps besides the parameter quantiles: column -> extension.
QUANTITY_EXTENSIONS = {"chi2_reduced": "CHI2_REDUCED", "ppp": "PPP"}
_DEFAULT_N_T = 60
_DEFAULT_N_BETA = 40
_DEFAULT_SNR_FLOOR = 3.0
_DEFAULT_TILE = 64


def default_map_model() -> ModifiedBlackbody:
    """The default map model: an optically thin modified blackbody whose amplitude is N(H2).

    Amplitude ``log10_N_H2`` (cm^-2) per pixel for an intensity per
    steradian (``solid_angle = 1 sr``), with the default opacity per gas
    mass, kappa = 0.1 cm^2 g^-1 (nu / 1 THz)^beta (Beckwith et al. 1990, from
    memory; :func:`sedtemp.models.default_opacity`), and mu_H2 = 2.8.

    Examples
    --------
    >>> default_map_model().param_names
    ('log10_N_H2', 'T', 'beta')
    """
    return ModifiedBlackbody(amplitude="column", solid_angle=1.0 * u.sr)


def _bandset(bands) -> BandSet:
    if isinstance(bands, BandSet):
        return bands
    try:
        return BandSet(list(bands))
    except TypeError as err:
        raise InputError(f"bands must be a BandSet or a sequence of Band, got {type(bands).__name__}") from err


def _omega(model) -> float:
    omega = getattr(model, "solid_angle_sr", None)
    if omega is None:
        raise InputError(f"maps are fitted as intensities per steradian; {type(model).__name__} has no solid "
                         "angle: give a model with amplitude='column' or 'tau' and a solid_angle "
                         "(e.g. ModifiedBlackbody(amplitude='column', solid_angle=1 * u.sr))")
    return float(omega)


def _grid(bandset, model, prior, calibration, n_T, n_beta):
    pr = model.default_prior().updated(dict(prior or {}))
    t_nodes = np.geomspace(pr["T"].low, pr["T"].high, int(n_T))
    b_nodes = np.linspace(pr["beta"].low, pr["beta"].high, int(n_beta)) if "beta" in model.param_names else None
    return GridPosterior(bandset, model=model, prior=pr, calibration=calibration, T_nodes=t_nodes,
                         beta_nodes=b_nodes)


def _save_npy(path: Path, array: np.ndarray) -> None:
    atomic_write_with(path, lambda tmp: np.save(tmp, array))


def _digest(cube, aux, settings) -> str:
    h = hashlib.sha256()
    h.update(np.ascontiguousarray(cube).view(np.uint8))
    if aux is not None:
        h.update(np.ascontiguousarray(aux).view(np.uint8))
    h.update(repr(settings).encode())
    return h.hexdigest()


def fit_maps(images: Mapping, errors: Mapping, bands: BandSet | Sequence[Band], *, model: SEDModel | None = None,
             prior: Mapping[str, Any] | None = None, calibration: Calibration | Mapping | None = None,
             field: Mapping | None = None, beams: Mapping[str, u.Quantity | float] | None = None,
             target_wcs: WCS | fits.Header | None = None, target_shape: tuple[int, int] | None = None,
             snr_floor: float = _DEFAULT_SNR_FLOOR,
             min_bands: int | None = None, n_T: int = _DEFAULT_N_T, n_beta: int = _DEFAULT_N_BETA,
             n_draws: int = 200, tile_size: int = _DEFAULT_TILE, executor: cf.Executor | None = None,
             n_workers: int | None = None, checkpoint_dir: str | Path | None = None, restart: bool = False,
             seed: int | None = None, progress: bool = False) -> fits.HDUList:
    """Fit T, beta and the amplitude pixel by pixel to band images; maps with uncertainties.

    Parameters
    ----------
    images : mapping of str -> ImageHDU, PrimaryHDU or path
        One image per band name of ``bands``, with BUNIT (MJy/sr, Jy/sr, or
        Jy/beam, converted with the beam area) and a celestial WCS.
    errors : mapping of str -> image, path, Quantity or float
        1-sigma noise per band: a map on the image's grid, or a constant
        (Quantity per sr or per beam; bare: the image's unit).
    bands : BandSet or sequence of Band
    model : SEDModel, optional, keyword-only
        Default :func:`default_map_model` (N(H2) per pixel). Any model with
        a linear amplitude and a ``solid_angle``; the data are intensities
        times that solid angle.
    prior : mapping, optional, keyword-only
        Priors overriding the model's defaults (parameter -> prior).
    calibration : Calibration or mapping, optional, keyword-only
    field : mapping, optional, keyword-only
        The modelled heating field (see :class:`sedtemp.maps.field.FieldSpec`);
        adds the T_EQ_*, P_WARMER and COMPARE_FLAG maps.
    beams : mapping of str -> Quantity or float, optional, keyword-only
        Beam FWHM per band (bare: arcsec), overriding the headers' BMAJ.
    target_wcs, target_shape : keyword-only
        Output grid (WCS or Header, and (ny, nx)); default the grid of the
        image with the coarsest beam.
    snr_floor : float, keyword-only
        A pixel is fitted only if at least ``min_bands`` bands have
        I / sigma >= snr_floor (default 3).
    min_bands : int, optional, keyword-only
        Default: the number of free parameters.
    n_T, n_beta, n_draws : int, keyword-only
        Grid nodes (log-spaced T, linear beta, across the prior) and
        posterior draws per pixel (for the amplitude and the comparison).
    tile_size : int, keyword-only
        Tile side in pixels: the unit of work and of memory.
    executor : concurrent.futures.Executor, optional, keyword-only
        Default: in this process.
    n_workers : int, optional, keyword-only
        Workers of ``executor`` (tasks kept in flight: 3 per worker).
    checkpoint_dir : path, optional, keyword-only
        Folder for the memory-mapped inputs and the tile checkpoints; a
        run with the same inputs resumes there. Default: a temporary folder.
    restart : bool, keyword-only
        Discard the tiles in ``checkpoint_dir`` first.
    seed : int, optional, keyword-only
        Run seed (None: 0); pixel (y, x) draws from ``source_seed(seed, "y:x")``.
    progress : bool, keyword-only
        Show a progress bar over tiles.

    Returns
    -------
    astropy.io.fits.HDUList
        Primary HDU (what was done, in HISTORY; the beam; NBEAMS, the number
        of independent beams), then image extensions ``T_MEDIAN``, ``T_P16``,
        ``T_P84``, ``BETA_*``, ``<AMPLITUDE>_*`` (e.g. ``LOG10_N_H2_MEDIAN``),
        ``CHI2_REDUCED``, ``PPP``, ``FIT_FLAGS`` (bitmask, legend in its
        header), ``SKIP_REASON`` (why a pixel is NaN), ``N_BANDS``; with a
        field ``T_EQ_MEDIAN``, ``T_EQ_P16``, ``T_EQ_P84``, ``P_WARMER``,
        ``COMPARE_FLAG`` (legend in its header). Each with the output WCS.

    Raises
    ------
    InputError
        Missing image or noise, missing or unknown BUNIT (naming the file),
        no beam or WCS, a model without a solid angle, bad field.

    Notes
    -----
    After convolution neighbouring pixels are correlated on the beam scale:
    the per-pixel uncertainties are right, but the pixels are not independent
    measurements (the primary header's NBEAMS gives the number of
    independent beams).
    """
    bandset = _bandset(bands)
    model = default_map_model() if model is None else model
    omega = _omega(model)
    grid = _grid(bandset, model, prior, calibration, n_T, n_beta)
    n_free = len(grid.names)
    min_bands = n_free if min_bands is None else int(min_bands)
    spec = None if field is None else (field if isinstance(field, FieldSpec) else FieldSpec(field))
    matched, wcs, fwhm, history = match_images(images, errors, bandset.names, beams=beams,
                                               target_wcs=target_wcs, target_shape=target_shape)
    shape = matched[bandset.names[0]].data.shape
    cube = np.stack([matched[b].data for b in bandset.names] + [matched[b].noise for b in bandset.names])
    aux_keys, aux = (), None
    if spec is not None and spec.map_inputs():
        inputs = spec.map_inputs()
        aux_keys = tuple(inputs)
        aux = np.stack([reproject_plain(inputs[k], wcs, shape, what=f"field map {k!r}") for k in aux_keys])
    run_seed = resolve_seed(seed)
    settings = (bandset.names, repr(model), repr(grid.prior), n_T, n_beta, snr_floor, min_bands, n_draws,
                run_seed, None if spec is None else (repr(spec.constant), repr(spec.positions), spec.A_V,
                                                     spec.distance_m, spec.uncertainty, spec.projected,
                                                     repr(spec.thresholds)))
    with contextlib.ExitStack() as stack:
        if checkpoint_dir is None:
            folder = Path(stack.enter_context(tempfile.TemporaryDirectory(prefix="sedtemp-map-")))
        else:
            folder = Path(checkpoint_dir)
        prepare_folder(folder, _digest(cube, aux, settings), restart)
        _save_npy(folder / "inputs.npy", cube)
        if aux is not None:
            _save_npy(folder / "aux.npy", aux)
        del cube
        header_text = wcs.to_header().tostring()
        tasks = [TileTask(y0, x0, min(tile_size, shape[0] - y0), min(tile_size, shape[1] - x0),
                          str(folder / "inputs.npy"), None if aux is None else str(folder / "aux.npy"), aux_keys,
                          grid, omega, run_seed, float(snr_floor), min_bands, int(n_draws), spec, header_text)
                 for y0, x0 in tile_origins(shape, int(tile_size))]
        if executor is None:
            from ..pipeline import InlineExecutor

            executor = InlineExecutor()
        results, n_resumed = run_tiles(tasks, folder, executor, n_workers=n_workers, progress=progress)
    maps = _assemble(results, tasks, shape)
    meta = {"fwhm_deg": fwhm, "history": history, "n_resumed": n_resumed, "snr_floor": snr_floor,
            "min_bands": min_bands, "seed": run_seed, "model": model, "bands": bandset.names,
            "grid": grid, "n_draws": n_draws, "tile_size": tile_size}
    return _hdulist(maps, wcs, meta, with_field=spec is not None)


def _assemble(results, tasks, shape) -> dict:
    maps = {}
    for t in tasks:
        for key, arr in results[(t.y0, t.x0)].items():
            if key not in maps:
                maps[key] = np.full(shape, 0 if arr.dtype.kind in "iu" else np.nan, dtype=arr.dtype)
            maps[key][t.y0:t.y0 + t.ny, t.x0:t.x0 + t.nx] = arr
    return maps


def _image(name, data, wcs, bunit, comment):
    hdu = fits.ImageHDU(np.asarray(data), header=wcs.to_header(), name=name)
    hdu.header["BUNIT"] = (bunit, comment)
    return hdu


def _primary(meta, wcs, n_valid):
    hdr = fits.Header()
    fwhm = meta["fwhm_deg"]
    pix = float(np.sqrt(abs(np.linalg.det(wcs.pixel_scale_matrix))))
    hdr["ORIGIN"] = ("sedtemp " + __version__, "software that made the maps")
    hdr["BANDS"] = (",".join(meta["bands"]), "bands fitted, in order")
    hdr["BMAJ"] = (fwhm, "[deg] common beam FWHM of the matched images")
    hdr["BMIN"] = (fwhm, "[deg] common beam FWHM of the matched images")
    hdr["NBEAMS"] = (independent_beams(n_valid, pix, fwhm), "independent beams over the fitted pixels")
    hdr["PIXBEAM"] = (float(np.deg2rad(pix) ** 2 / _beam_sr(fwhm)), "pixel area / beam area")
    hdr["SNRFLOOR"] = (float(meta["snr_floor"]), "bands need I/sigma >= this to count")
    hdr["MINBANDS"] = (int(meta["min_bands"]), "bands above SNRFLOOR needed to fit a pixel")
    hdr["NDRAWS"] = (int(meta["n_draws"]), "posterior draws per pixel")
    hdr["SEED"] = (int(meta["seed"]), "run seed (pixel seeds: source_seed)")
    hdr["GRIDT"] = (meta["grid"].T_nodes.size, "grid nodes in T (log-spaced)")
    hdr["GRIDBETA"] = (meta["grid"].beta_nodes.size, "grid nodes in beta")
    hdr["NRESUMED"] = (int(meta["n_resumed"]), "tiles read back from checkpoints")
    hdr["MODEL"] = repr(meta["model"])
    for line in meta["history"]:
        hdr.add_history(line)
    hdr.add_comment("Neighbouring pixels are correlated on the beam scale (FWHM BMAJ): the maps hold "
                    "about NBEAMS independent measurements, not one per pixel.")
    hdr.add_comment(f"Noise maps were propagated through the convolution (variance convolved with the "
                    f"squared kernel) and the reprojection (bilinear); poor_fit means PPP < {POOR_FIT_PPP}.")
    return fits.PrimaryHDU(header=hdr)


def _beam_sr(fwhm):
    from .images import beam_area_sr

    return beam_area_sr(fwhm)


def _get(maps, key, fill=np.nan):
    """A map, or one filled with ``fill`` when no tile produced it (nothing fitted)."""
    if key in maps:
        return maps[key]
    return np.full(maps["skip"].shape, fill, dtype=np.int16 if fill == 0 else float)


def _hdulist(maps, wcs, meta, *, with_field) -> fits.HDUList:
    grid = meta["grid"]
    n_valid = int(np.sum(maps["skip"] == 0))
    hdul = fits.HDUList([_primary(meta, wcs, n_valid)])
    params = [("T", "K", "dust temperature")]
    if grid.has_beta:
        params.append(("beta", "", "emissivity index"))
    amp_unit = grid.model.param_units.get(grid.amp_name, "")
    params.append((grid.amp_name, "", f"log10 of the amplitude in {amp_unit or 'its unit'}"))
    for name, unit, what in params:
        for q, ext in _QUANTS.items():
            hdul.append(_image(f"{name.upper()}_{ext}", _get(maps, f"{name}_{q}"), wcs, unit, f"{what}, posterior {q}"))
    for col, ext in QUANTITY_EXTENSIONS.items():
        hdul.append(_image(ext, _get(maps, col), wcs, "",
                           col.replace("_", " ")))
    flags = _image("FIT_FLAGS", maps["flags"], wcs, "", "bitmask of fit trust flags")
    for name, bit in FLAG_BITS.items():
        flags.header[f"FLAGB{bit}"] = (name, f"bit {bit} (value {1 << bit})")
    hdul.append(flags)
    skip = _image("SKIP_REASON", maps["skip"], wcs, "", "why a pixel was not fitted (0: fitted)")
    for name, code in SKIP_CODES.items():
        skip.header[f"SKIP{code}"] = (name, f"code {code}")
    hdul.append(skip)
    hdul.append(_image("N_BANDS", maps["n_bands"], wcs, "", "bands with data and noise"))
    if with_field:
        for q in ("median", "p16", "p84"):
            hdul.append(_image(f"T_EQ_{_QUANTS[q]}", _get(maps, f"cmp_T_eq_{q}"), wcs, "K",
                               f"T_eq of the modelled field, {q}"))
        hdul.append(_image("P_WARMER", _get(maps, "cmp_p_warmer"), wcs, "", "P(T_fit > T_eq)"))
        hdul.append(_image("T_RATIO", _get(maps, "cmp_ratio_median"), wcs, "", "median of T_fit / T_eq"))
        cf = _image("COMPARE_FLAG", _get(maps, "cmp_flag", 0), wcs, "", "comparison flag code (0: not compared)")
        cf.header["CFLAG0"] = ("not_compared", "code 0")
        for name, code in COMPARE_CODES.items():
            cf.header[f"CFLAG{code}"] = (name, f"code {code}")
        hdul.append(cf)
    return hdul
