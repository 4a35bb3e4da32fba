"""The ``[maps]`` section of a workflow file and the ``sedtemp map`` run.

A map workflow is a workflow file whose bands live under ``[maps.bands.NAME]``
(one table per band: ``image``, ``error`` (a noise map) or ``noise`` (a
constant such as ``"0.5 MJy/sr"``), ``beam`` (FWHM, e.g. ``"18 arcsec"``;
default the image's BMAJ) and the band keys used for catalogues:
``wavelength`` | ``tophat`` | ``response``, ``detector``, ``reference``,
``calibration``). ``[maps]`` itself holds the run options (see
:data:`MAPS_KEYS`). ``[run]``, ``[model]``, ``[priors]``, ``[calibration]``,
``[field]`` and ``[compare]`` mean what they mean for catalogues and are
validated by :mod:`sedtemp.pipeline.config`; ``[model]`` defaults to an N(H2)
amplitude per steradian here.
"""

from __future__ import annotations

import json
import time
from collections import Counter
from pathlib import Path
from typing import TYPE_CHECKING

import astropy.units as u
import numpy as np

from .._io import atomic_write_text, atomic_write_with
from ..errors import ConfigError, InputError
from ..fields import argument_value
from ..pipeline.config import Workflow, parse_quantity, parse_workflow, read_toml
from .field import COMPARE_CODES
from .fitting import fit_maps
from .tiles import FLAG_BITS, SKIP_CODES

if TYPE_CHECKING:
    from ..models import SEDModel

__all__ = ["MAPS_KEYS", "MAP_BAND_KEYS", "MapWorkflow", "load_map_workflow", "parse_map_workflow",
           "run_map_workflow"]

#: ``[maps]`` keys -> (types, default).
MAPS_KEYS = {"directory": (str, "sedtemp-maps"), "name": (str, "maps"), "snr_floor": ((int, float), 3.0),
             "min_bands": (int, None), "tile_size": (int, 64), "n_T": (int, 60), "n_beta": (int, 40),
             "n_draws": (int, 200), "target": (str, None), "distance": ((str, int, float), None),
             "A_V_map": (str, None), "figures": (bool, True), "bands": (dict, None)}
#: ``[maps.bands.NAME]`` keys of the images; the other keys are the catalogue band keys.
MAP_BAND_KEYS = {"image": str, "error": str, "noise": (str, int, float), "beam": (str, int, float)}
_CATALOG_BAND_KEYS = ("wavelength", "tophat", "response", "detector", "reference", "calibration")
_OUT_FILE = "{name}.fits"
_REPORT = "map-report.json"
_FIGURE = "{name}-quicklook.png"


class MapWorkflow:
    """A validated map workflow: the ``[maps]`` options, the band images and the shared sections.

    Attributes
    ----------
    maps : dict
        ``[maps]`` options with defaults filled.
    images : dict of str -> dict
        Band name -> ``{"image", "error" or "noise", "beam"}``.
    wf : sedtemp.pipeline.Workflow
        The shared sections (bands, model, priors, calibration, field, run).
    """

    def __init__(self, maps: dict, images: dict, wf: Workflow) -> None:
        self.maps, self.images, self.wf = maps, images, wf

    @property
    def output_dir(self) -> Path:
        return self.wf.path(self.maps["directory"])

    def model(self) -> SEDModel:
        return self.wf.build_model()

    def field_spec(self) -> dict | None:
        """The field of ``[field]`` for :func:`fit_maps`, or None without components."""
        f = self.wf.field
        if not f["components"]:
            return None
        comps = []
        for comp in f["components"]:
            out = {}
            for key, value in comp.items():
                if key.endswith("_map"):
                    out[key] = str(self.wf.path(value))
                elif key in ("kind", "position"):
                    out[key] = value
                else:
                    out[key] = argument_value(value)
            comps.append(out)
        spec = {"components": comps, "uncertainty": f["uncertainty"],
                "thresholds": self.wf.compare["thresholds"] or None}
        if self.wf.raw.get("field", {}).get("projected") is not None:
            spec["projected"] = f["projected"]
        if self.maps["A_V_map"] is not None:
            spec["A_V"] = str(self.wf.path(self.maps["A_V_map"]))
        else:
            spec["A_V"] = f["A_V"]
        if self.maps["distance"] is not None:
            spec["distance"] = parse_quantity(self.maps["distance"], "pc", "[maps] distance")
        return spec




def _check(table, types_of, section, source):
    """The table with every key known and of its type (``types_of``: key -> type or tuple)."""
    if not isinstance(table, dict):
        raise ConfigError(f"{source}: [{section}] must be a table")
    for key, value in table.items():
        if key not in types_of:
            raise ConfigError(f"{source}: [{section}] unknown key {key!r}; known keys are {sorted(types_of)}")
        types = types_of[key] if isinstance(types_of[key], tuple) else (types_of[key],)
        if (isinstance(value, bool) and bool not in types) or not isinstance(value, types):
            raise ConfigError(f"{source}: [{section}] {key} must be of type "
                              f"{' or '.join(t.__name__ for t in types)}, got {value!r}")
    return dict(table)


def parse_map_workflow(data: dict, *, base_dir: str | Path = ".",
                       source: str = "<workflow>") -> MapWorkflow:
    """Validate a parsed TOML map workflow.

    Raises
    ------
    ConfigError
        No ``[maps]`` or no band table, an unknown key or a wrong type, a
        band without ``image`` or without exactly one of ``error`` / ``noise``,
        and everything :func:`sedtemp.pipeline.parse_workflow` refuses.
    """
    if "maps" not in data:
        raise ConfigError(f"{source}: a map workflow needs a [maps] section with [maps.bands.NAME] tables")
    given = _check(data["maps"], {k: t for k, (t, _) in MAPS_KEYS.items()}, "maps", source)
    maps = {k: given.get(k, d) for k, (_, d) in MAPS_KEYS.items()}
    bands = maps.pop("bands") or {}
    if not bands:
        raise ConfigError(f"{source}: [maps] needs at least one [maps.bands.NAME] table (image, error, beam, "
                          "wavelength)")
    images, cat_bands = {}, {}
    for name, spec in bands.items():
        sec = f"maps.bands.{name}"
        if not isinstance(spec, dict):
            raise ConfigError(f"{source}: [{sec}] must be a table")
        img = {k: v for k, v in spec.items() if k in MAP_BAND_KEYS}
        _check(img, MAP_BAND_KEYS, sec, source)
        if "image" not in img:
            raise ConfigError(f"{source}: [{sec}] needs image = \"path/to/{name}.fits\"")
        if ("error" in img) == ("noise" in img):
            raise ConfigError(f"{source}: [{sec}] give exactly one of error (a noise map) or noise "
                              "(a constant, e.g. \"0.5 MJy/sr\")")
        images[name] = img
        rest = {k: v for k, v in spec.items() if k not in MAP_BAND_KEYS}
        cat_bands[name] = {"flux": "-", "error": "-", **rest}
    shared = {k: v for k, v in data.items() if k not in ("maps", "bands", "catalog", "output", "fit")}
    model = dict(shared.get("model", {}))
    model.setdefault("amplitude", "column")
    if model["amplitude"] != "mass":
        model.setdefault("solid_angle", "1 sr")
    shared["model"] = model
    doc = {**shared, "catalog": {"path": "<maps>", "id_column": "pixel"}, "bands": cat_bands}
    try:
        wf = parse_workflow(doc, base_dir=base_dir, source=source)
    except ConfigError as err:
        raise ConfigError(str(err).replace("[bands.", "[maps.bands.")) from err
    if maps["target"] is not None and maps["target"] not in images:
        raise ConfigError(f"{source}: [maps] target {maps['target']!r} is not a band; choose one of {sorted(images)}")
    for key in ("tile_size", "n_T", "n_beta", "n_draws"):
        if maps[key] < (3 if key in ("n_T", "n_beta") else 1):
            raise ConfigError(f"{source}: [maps] {key} is too small: {maps[key]}")
    return MapWorkflow(maps, images, wf)


def load_map_workflow(path: str | Path) -> MapWorkflow:
    """Read and validate a map workflow TOML file (see :func:`parse_map_workflow`).

    Raises
    ------
    ConfigError
        Unreadable file, invalid TOML, or an invalid map workflow.
    """
    path = Path(path)
    data, _ = read_toml(path)
    return parse_map_workflow(data, base_dir=path.resolve().parent, source=path.name)


def _inputs(mw: MapWorkflow):
    images, errors, beams = {}, {}, {}
    for name, spec in mw.images.items():
        images[name] = mw.wf.path(spec["image"])
        if "error" in spec:
            errors[name] = mw.wf.path(spec["error"])
        else:
            n = spec["noise"]
            errors[name] = u.Quantity(n) if isinstance(n, str) else float(n)
        if "beam" in spec:
            beams[name] = parse_quantity(spec["beam"], "arcsec", f"[maps.bands.{name}] beam")
    return images, errors, beams


def _target(mw, images):
    if mw.maps["target"] is None:
        return None
    from astropy.io import fits

    with fits.open(images[mw.maps["target"]]) as hdul:
        hdu = next(h for h in hdul if h.data is not None)
        return hdu.header.copy()


def _summary(hdul) -> dict:
    skip = np.asarray(hdul["SKIP_REASON"].data)
    names = {v: k for k, v in SKIP_CODES.items()}
    out = {"n_pixels": int(skip.size), "skipped": {names[c]: int(n) for c, n in Counter(skip.ravel()).items()}}
    flags = np.asarray(hdul["FIT_FLAGS"].data)
    out["fit_flags"] = {name: int(np.sum((flags >> bit) & 1)) for name, bit in FLAG_BITS.items()
                        if np.any((flags >> bit) & 1)}
    out["n_beams"] = float(hdul[0].header["NBEAMS"])
    if "COMPARE_FLAG" in hdul:
        cf = np.asarray(hdul["COMPARE_FLAG"].data)
        names = {v: k for k, v in COMPARE_CODES.items()} | {0: "not_compared"}
        out["compare_flags"] = {names[int(c)]: int(n) for c, n in Counter(cf.ravel()).items()}
    return out


def run_map_workflow(path: str | Path, *, output_dir: str | Path | None = None,
                     restart: bool = False, progress: bool = False) -> dict:
    """Run a map workflow: fit the maps, write them (FITS), the quick-look figure and a report.

    Parameters
    ----------
    path : path
        The workflow TOML file.
    output_dir : path, optional, keyword-only
        Overrides ``[maps] directory``.
    restart : bool, keyword-only
        Discard the tile checkpoints of an earlier run in this folder.
    progress : bool, keyword-only
        Show a progress bar.

    Returns
    -------
    dict
        The report (also written to ``map-report.json``): ``maps``,
        ``figure``, ``n_pixels``, ``skipped``, ``fit_flags``,
        ``compare_flags``, ``n_beams``, ``tiles_resumed``, ``seconds``;
        and ``hdul``, the maps as an HDUList (not in the JSON file).

    Raises
    ------
    ConfigError
        Invalid workflow; InputError from :func:`fit_maps` is re-raised as
        ConfigError naming the workflow.
    """
    from ..pipeline import open_executor

    mw = load_map_workflow(path)
    out = Path(output_dir) if output_dir is not None else mw.output_dir
    out.mkdir(parents=True, exist_ok=True)
    images, errors, beams = _inputs(mw)
    m = mw.maps
    t0 = time.perf_counter()
    try:
        with open_executor(mw.wf.run) as (ex, n_workers):
            hdul = fit_maps(images, errors, mw.wf.bandset(), model=mw.model(), prior=mw.wf.build_prior(),
                            calibration=mw.wf.calibration_groups(), field=mw.field_spec(), beams=beams,
                            target_wcs=_target(mw, images), snr_floor=m["snr_floor"], min_bands=m["min_bands"],
                            n_T=m["n_T"], n_beta=m["n_beta"], n_draws=m["n_draws"], tile_size=m["tile_size"],
                            executor=ex, n_workers=n_workers, checkpoint_dir=out / "checkpoints",
                            restart=restart, seed=mw.wf.run["seed"], progress=progress)
    except InputError as err:
        raise ConfigError(f"{Path(path).name}: {err}") from err
    seconds = time.perf_counter() - t0
    fits_path = out / _OUT_FILE.format(name=m["name"])
    atomic_write_with(fits_path, lambda tmp: hdul.writeto(tmp, overwrite=True))
    report = {"maps": str(fits_path), **_summary(hdul), "tiles_resumed": int(hdul[0].header["NRESUMED"]),
              "seconds": round(seconds, 2)}
    if m["figures"]:
        from .figures import save_quicklook

        report["figure"] = str(save_quicklook(hdul, out / _FIGURE.format(name=m["name"])))
    atomic_write_text(out / _REPORT, json.dumps(report, indent=2) + "\n")
    report["hdul"] = hdul
    return report
