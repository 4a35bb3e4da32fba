"""Benchmark of sedtemp.maps.fit_maps: wall time and peak memory for an N x N map in five bands.

    python benchmarks/maps.py            # 1000 x 1000 pixels (issue 17 target: < 10 min on 2 cores, < 2 GB)
    python benchmarks/maps.py --quick    # 200 x 200 pixels
    python benchmarks/maps.py --size 500 --workers 2

The five invented bands (sedtemp.maps.demo) are made directly on the output
grid with their own beams, so the run includes the convolution to the
coarsest beam; reprojection is then the identity for the coarsest band only.
The baseline, measured in the same run, is the bare grid fitter
(GridPosterior.summarise) on 4096 pixels of the matched (convolved) images,
in blocks of the tiles' size: the printed ratio
is the cost of the map machinery (reading, matching, tiles, checkpoints,
seeds) per pixel relative to the fit alone. No comparison stage (field).
"""

from __future__ import annotations

import argparse
import concurrent.futures as cf
import multiprocessing
import resource
import tempfile
import time
import warnings

import astropy.units as u
import numpy as np
from astropy.io import fits

from sedtemp.bands import Band, BandSet
from sedtemp.maps import default_map_model, fit_maps
from sedtemp.maps.demo import DEMO_BANDS, demo_wcs, truth_maps
from sedtemp.maps.fitting import _grid
from sedtemp.maps.images import match_images
from sedtemp.maps.tiles import _BLOCK
from sedtemp.simulate import simulate_photometry

_PIX_ARCSEC = 12.0 * 48 / 1000  # the demo field, 1000 pixels across at 1000 x 1000


def _images(n, seed):
    rng = np.random.default_rng(seed)
    pix = _PIX_ARCSEC * 1000 / n
    wcs = demo_wcs(pix, n)
    truth = truth_maps(wcs, smooth=True)
    model = default_map_model()
    theta = np.column_stack([truth[p].ravel() for p in model.param_names])
    images, errors, bands = {}, {}, []
    for name, (lam, fwhm, _pix, sig) in DEMO_BANDS.items():
        band = Band.monochromatic(name, lam * u.um)
        # the pixels as sources of one band: intensity (MJy/sr) plus white noise of sd sig
        inten, _, _ = simulate_photometry(BandSet([band]), model, theta, sigma=sig, seed=rng, unit_si=1e-20)
        hdr = wcs.to_header()
        hdr["BUNIT"] = "MJy/sr"
        hdr["BMAJ"] = hdr["BMIN"] = max(fwhm, 2.5 * pix) / 3600.0
        images[name] = fits.ImageHDU(inten[:, 0].reshape(n, n).astype(np.float32), header=hdr)
        errors[name] = sig * u.MJy / u.sr
        bands.append(band)
    return images, errors, BandSet(bands)


def _peak_mb():
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    kids = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    return own, kids


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="200 x 200 pixels")
    ap.add_argument("--size", type=int, default=None, help="pixels per side (default 1000)")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--tile", type=int, default=100)
    args = ap.parse_args(argv)
    n = args.size or (200 if args.quick else 1000)
    images, errors, bands = _images(n, seed=1)
    # baseline: the bare grid fitter on 4096 random pixels of the matched (convolved, so
    # higher S/N) images the map fits, per pixel, in blocks as the tiles use them
    grid = _grid(bands, default_map_model(), None, None, 60, 40)
    matched = match_images(images, errors, bands.names)[0]
    pick = np.random.default_rng(0).choice(n * n, 4096, replace=False)
    flux = np.column_stack([matched[b].data.ravel()[pick] for b in bands.names]).astype(float)
    err = np.column_stack([np.broadcast_to(matched[b].noise, (n, n)).ravel()[pick] for b in bands.names])
    del matched
    block = _BLOCK
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the bright pixels' grid_too_coarse warnings
        t0 = time.perf_counter()
        for s in range(0, 4096, block):
            grid.summarise(flux[s:s + block], err[s:s + block], np.zeros((block, 5), bool)[:len(flux[s:s + block])],
                           n_draws=200, rng=[np.random.default_rng(i) for i in range(s, min(s + block, 4096))],
                           keep_draws=True)
        per_pixel = (time.perf_counter() - t0) / 4096
    ctx = multiprocessing.get_context("forkserver")
    with tempfile.TemporaryDirectory() as tmp, cf.ProcessPoolExecutor(args.workers, mp_context=ctx) as ex:
        t0 = time.perf_counter()
        hdul = fit_maps(images, errors, bands, executor=ex, n_workers=args.workers, tile_size=args.tile,
                        checkpoint_dir=tmp, seed=1)
        wall = time.perf_counter() - t0
    fitted = int(np.sum(hdul["SKIP_REASON"].data == 0))
    own, kids = _peak_mb()
    print(f"map {n} x {n}, 5 bands, {args.workers} workers, tiles of {args.tile}^2: {wall:.1f} s "
          f"({fitted} pixels fitted)")
    print(f"peak memory: main process {own:.0f} MB, largest worker {kids:.0f} MB")
    print(f"bare grid fitter (baseline, this run): {per_pixel * 1e3:.3f} ms/pixel on one core")
    print(f"map wall time / (baseline x pixels / workers): {wall / (per_pixel * n * n / args.workers):.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
