"""Tiles of pixels: the unit of work of a map fit, with atomic checkpoints and resume.

The matched inputs (intensity, noise and auxiliary maps on the output grid)
are written once to ``.npy`` files in the work folder and every tile task
opens them memory-mapped, so a task holds one tile in memory, never the
whole map. A finished tile is written atomically to
``tiles/tile-<y0>-<x0>.npz`` (:mod:`sedtemp._io`); a run started again
with the same inputs and settings skips the tiles already there. Every
pixel has its own seeds (``source_seed(seed, "y:x")``), so the results do
not depend on the tile size, the executor or the number of workers.
"""

from __future__ import annotations

import json
import logging
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from .._io import atomic_write_text, atomic_write_with, remove_stale_temporaries
from ..errors import InputError
from ..seeds import source_seed
from .field import compare_pixels, pixel_fields

if TYPE_CHECKING:
    import concurrent.futures as cf

__all__ = ["FLAG_BITS", "SKIP_CODES", "TileTask", "prepare_folder", "run_tile", "run_tiles", "tile_origins"]

log = logging.getLogger(__name__)

#: Reason a pixel was not fitted (SKIP_REASON map); 0 = fitted.
SKIP_CODES = {"fitted": 0, "no_data": 1, "too_few_bands": 2, "below_snr_floor": 3}
#: Bit of each fit trust flag in the FIT_FLAGS bitmask (``other`` for any flag not listed).
FLAG_BITS = {"T_at_prior_low": 0, "T_at_prior_high": 1, "T_prior_dominated": 2, "beta_at_prior_low": 3,
             "beta_at_prior_high": 4, "beta_prior_dominated": 5, "grid_too_coarse": 6, "poor_fit": 7,
             "no_valid_grid_node": 8, "other": 9}
#: Pixels per vectorised block of the grid fitter (as for catalogues: cache-sized work arrays).
_BLOCK = 128
_TILES = "tiles"
_STATE = "maps-state.json"


@dataclass
class TileTask:
    """Everything one tile needs; picklable, small (the data stay in the memory-mapped files)."""

    y0: int
    x0: int
    ny: int
    nx: int
    inputs: str          # path of the (2 n_bands, NY, NX) intensity + noise array (.npy)
    aux: str | None      # path of the (n_aux, NY, NX) auxiliary maps, or None
    aux_keys: tuple
    grid: object         # GridPosterior
    omega_sr: float
    seed: int
    snr_floor: float
    min_bands: int
    n_draws: int
    field: object = None  # FieldSpec or None
    wcs_header: str = ""
    compare: object = compare_pixels


def tile_origins(shape: tuple[int, ...], size: int) -> list[tuple[int, int]]:
    """Top-left corners of the tiles covering ``shape`` (row-major).

    Examples
    --------
    >>> tile_origins((5, 3), 2)
    [(0, 0), (0, 2), (2, 0), (2, 2), (4, 0), (4, 2)]
    """
    return [(y, x) for y in range(0, shape[0], size) for x in range(0, shape[1], size)]


def _selection(I, S, snr_floor, min_bands):
    """Per pixel: skip code (n,), usable-band mask (n, nb)."""
    usable = np.isfinite(I) & np.isfinite(S) & (S > 0)
    n_use = usable.sum(axis=1)
    n_det = np.sum(usable & (snr_floor * np.where(usable, S, 1.0) <= I), axis=1)
    code = np.full(I.shape[0], SKIP_CODES["fitted"], np.int16)
    code[n_det < min_bands] = SKIP_CODES["below_snr_floor"]
    code[n_use < min_bands] = SKIP_CODES["too_few_bands"]
    code[n_use == 0] = SKIP_CODES["no_data"]
    return code, usable


def _bitmask(flags):
    out = np.zeros(len(flags), np.int32)
    for k, fl in enumerate(flags):
        for f in fl:
            out[k] |= 1 << FLAG_BITS.get(f, FLAG_BITS["other"])
    return out


def _fit_pixels(task, I, S, usable, ys, xs):
    """Grid fits of the selected pixels in blocks; (columns, draws, flags)."""
    grid = task.grid
    keys = [f"{y}:{x}" for y, x in zip(ys, xs, strict=True)]
    seqs = [source_seed(task.seed, k).spawn(2) for k in keys]
    flux = np.where(usable, I, 0.0) * task.omega_sr
    err = np.where(usable, S * task.omega_sr, np.inf)
    lim = np.zeros_like(usable)
    cols, draws, flags = {}, {"T": [], "beta": []}, []
    for s in range(0, len(keys), _BLOCK):
        sl = slice(s, s + _BLOCK)
        c, e = grid.summarise(flux[sl], err[sl], lim[sl], n_draws=task.n_draws,
                              rng=[np.random.default_rng(q[0]) for q in seqs[sl]], keep_draws=True)
        for k, v in c.items():
            cols.setdefault(k, []).append(v)
        draws["T"].append(e["draws"]["T"][:, :task.n_draws])
        draws["beta"].append(e["draws"]["beta"][:, :task.n_draws])
        flags.extend(e["flags"])
    cols = {k: np.concatenate(v) for k, v in cols.items()}
    draws = {k: np.concatenate(v) for k, v in draws.items()}
    cmp_seeds = [int(q[1].generate_state(1)[0]) for q in seqs]
    return cols, draws, flags, cmp_seeds


def run_tile(task: TileTask) -> dict:
    """Fit (and compare) every pixel of one tile; arrays of shape (ny, nx) by output name."""
    cube = np.load(task.inputs, mmap_mode="r")
    nb = cube.shape[0] // 2
    sl = (slice(task.y0, task.y0 + task.ny), slice(task.x0, task.x0 + task.nx))
    I = np.asarray(cube[(slice(0, nb), *sl)], float).reshape(nb, -1).T
    S = np.asarray(cube[(slice(nb, 2 * nb), *sl)], float).reshape(nb, -1).T
    code, usable = _selection(I, S, task.snr_floor, task.min_bands)
    yy, xx = np.mgrid[sl]
    yy, xx = yy.ravel(), xx.ravel()
    sel = np.flatnonzero(code == 0)
    n = I.shape[0]
    out = {"skip": code, "n_bands": usable.sum(axis=1).astype(np.int16), "flags": np.zeros(n, np.int32)}
    if sel.size:
        cols, draws, flags, cmp_seeds = _fit_pixels(task, I[sel], S[sel], usable[sel], yy[sel], xx[sel])
        for k, v in cols.items():
            full = np.full(n, np.nan)
            full[sel] = v
            out[k] = full
        out["flags"][sel] = _bitmask(flags)
        if task.field is not None:
            out.update(_compare_tile(task, sel, yy, xx, sl, draws, flags, cmp_seeds, n))
    return {k: v.reshape(task.ny, task.nx) for k, v in out.items()}


def _compare_tile(task, sel, yy, xx, sl, draws, flags, cmp_seeds, n):
    from astropy.io import fits
    from astropy.wcs import WCS

    aux = {}
    if task.aux is not None:
        a = np.load(task.aux, mmap_mode="r")
        for j, key in enumerate(task.aux_keys):
            aux[key] = np.asarray(a[(j, *sl)], float).ravel()[sel]
    wcs = WCS(fits.Header.fromstring(task.wcs_header))
    spec = task.field
    flds = pixel_fields(spec, wcs, yy[sel], xx[sel], aux)
    res = task.compare(draws["T"], draws["beta"], flds, task.grid.model.opacity,
                       field_uncertainty=spec.uncertainty or None, projected=spec.projected,
                       thresholds=spec.thresholds, fit_flags=flags, seeds=cmp_seeds)
    out = {}
    for k, v in res.items():
        full = np.zeros(n, np.int16) if k == "flag" else np.full(n, np.nan)
        full[sel] = v
        out[f"cmp_{k}"] = full
    return out


# ------------------------------------------------------------------ checkpoints
def _tile_path(folder: Path, y0, x0) -> Path:
    return folder / _TILES / f"tile-{y0:05d}-{x0:05d}.npz"


def _write_tile(folder: Path, y0, x0, arrays) -> None:
    atomic_write_with(_tile_path(folder, y0, x0), lambda tmp: np.savez(tmp, **arrays))


def _read_tile(path: Path) -> dict:
    with np.load(path) as z:
        return {k: z[k] for k in z.files}


def prepare_folder(folder: Path, digest: str, restart: bool) -> None:
    """Make ``folder`` ready: remove stale temporaries; refuse tiles of other inputs unless ``restart``.

    Raises
    ------
    InputError
        The folder holds tiles of a run with other inputs or settings.
    """
    tiles = folder / _TILES
    tiles.mkdir(parents=True, exist_ok=True)
    remove_stale_temporaries(tiles)
    remove_stale_temporaries(folder)
    state = folder / _STATE
    if restart:
        for p in tiles.glob("tile-*.npz"):
            p.unlink()
    elif state.is_file() and json.loads(state.read_text()).get("digest") != digest:
        raise InputError(f"{folder}: holds tiles of a map run with other inputs or settings; "
                         "pass restart=True (sedtemp map --restart) or choose another folder")
    atomic_write_text(state, json.dumps({"digest": digest}))


def run_tiles(tasks: list[TileTask], folder: Path, executor: cf.Executor, *, n_workers: int | None = None,
              progress: bool = False) -> tuple[dict, int]:
    """Run the tasks whose tile is not checkpointed yet; (results by origin, number resumed)."""
    import concurrent.futures as cf

    from tqdm.auto import tqdm

    results, todo = {}, []
    for t in tasks:
        p = _tile_path(folder, t.y0, t.x0)
        if p.is_file():
            results[(t.y0, t.x0)] = _read_tile(p)
        else:
            todo.append(t)
    n_resumed = len(results)
    limit = max(1, 3 * (n_workers or 1))
    bar = tqdm(total=len(tasks), initial=n_resumed, unit="tile", disable=not progress, desc="sedtemp map")
    pending, queue = {}, list(reversed(todo))
    try:
        while queue or pending:
            while queue and len(pending) < limit:
                t = queue.pop()
                pending[executor.submit(run_tile, t)] = t
            done, _ = cf.wait(pending, return_when=cf.FIRST_COMPLETED)
            for fut in done:
                t = pending.pop(fut)
                arrays = fut.result()
                _write_tile(folder, t.y0, t.x0, arrays)
                results[(t.y0, t.x0)] = arrays
                bar.update(1)
    finally:
        bar.close()
    log.info("map: %d tiles fitted, %d resumed", len(todo), n_resumed)
    return results, n_resumed
