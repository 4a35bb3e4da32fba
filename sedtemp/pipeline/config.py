"""Workflow files: the TOML schema, its validation, and the objects it describes.

A workflow file says which catalogue to read, which columns are which bands,
which SED model and priors to fit, what radiation field each source sits in,
how to compare, where results go and how to run. It is read with the standard
library's :mod:`tomllib`; every key is checked against the schema below, and
an unknown key or a wrong type is a :class:`~sedtemp.errors.ConfigError` that
names the key and, where it can be found, the line of the file.

Schema
------
Paths are relative to the workflow file. Quantities are strings with a unit
(``"520 pc"``, ``"160 um"``, ``"3.2e4 K"``); a bare number is in the unit
named here.

``[run]``
    ``seed`` (int, default 0): workflow seed; source ``id`` gets the seed
    :func:`sedtemp.seeds.source_seed` (``SeedSequence([seed, blake2b(id)])``),
    so results do not depend on the chunking or the number of workers.
    ``executor`` ("process" | "dask" | "mpi" | "serial", default "process").
    ``workers`` (int, default 0 = all cores, at most 1024; Dask local cluster size).
    ``chunk_size`` (int, default 64): sources per task and per checkpoint file.
    ``scheduler`` (str, default ""): Dask scheduler address; empty with
    ``executor = "dask"`` starts a local Dask cluster.
``[catalog]``
    ``path`` (str, required), ``format`` (astropy format, default: guessed),
    ``id_column`` (str, required), ``min_bands`` (int, default: number of
    free parameters), ``distance`` (quantity, bare pc) or ``distance_column``,
    ``redshift`` (float, default 0) or ``redshift_column``, ``ra_column`` /
    ``dec_column`` (sky position, needed for a star placed by ``position``),
    ``units`` (table column -> unit, for columns stored without one).
``[bands.NAME]`` (one table per band; the order of the tables is the band order)
    ``flux``, ``error`` (column names, required); ``limit`` (bool column:
    True where ``flux`` is an upper limit and ``error`` its 1-sigma);
    ``unit`` (unit of ``flux`` and ``error`` when the columns have none);
    ``calibration`` (name of a group in ``[calibration]``); the response:
    exactly one of ``wavelength`` (monochromatic), ``tophat = {center, width}``
    (width = dnu / nu) or ``response`` (a two-column table file);
    ``detector`` ("energy" | "photon"), ``reference`` ("nu_fnu" | "fnu" | float);
    ``beam`` (Gaussian FWHM, bare arcsec, or the beam area as a solid angle)
    and ``solid_angle`` (bare arcsec^2): needed for columns in a surface
    brightness (``MJy/sr``: flux = I x solid_angle, else x beam area) or per
    beam (``Jy/beam``: x beam area, or per beam scaled to ``solid_angle``).
``[calibration]``
    ``GROUP = fraction``: bands naming a group share that fractional,
    fully correlated calibration error.
``[model]``
    ``name`` ("thin", "thick", "two_temperature" or a name registered in the
    entry-point group ``sedtemp.models``), ``amplitude`` ("mass" | "column" |
    "tau"), ``beta`` (float: fix beta), ``solid_angle`` (quantity, bare
    arcsec^2), ``opacity = {kappa0, nu0, beta, per}`` (power law), plus
    ``grain_radius`` (and ``grain_density``) or ``break_wavelength`` for a
    power law saturated in the UV/optical, which the prediction needs for a
    physical absorption of starlight. The same opacity is used to fit and to
    predict.
``[priors.PARAM]``
    ``kind`` ("uniform" | "loguniform" | "gaussian" | "uniform_amplitude" |
    "log_uniform_amplitude"; the default amplitude prior is log-uniform),
    ``low``, ``high``, ``mean``, ``sigma``.
``[fit]``
    ``method`` ("grid" | "mcmc", default "grid"), ``mcmc_sources`` (ids also
    fitted by MCMC), ``n_T`` (100), ``n_beta`` (60), ``n_draws`` (400),
    ``n_walkers`` (64), ``ess_target`` (1000), ``max_steps`` (20000): the
    defaults of :func:`sedtemp.fit.fit_source` (:mod:`sedtemp.fit.defaults`).
``[field]``
    ``A_V`` (float, mag) or ``A_V_column``; ``uncertainty`` (fractional
    1-sigma of the field strength, default 0); ``uncertainty_shared``
    (bool, default false: true draws that factor once per draw index for the
    whole catalogue, e.g. the U of one cloud, so catalogue counts carry it
    as a common error); ``projected`` (bool: star
    separations are projected, i.e. lower limits on the true distance).
    ``[[field.components]]`` tables with ``kind`` ("isrf", "star", "cmb",
    "blackbody", "table" or a name in the entry-point group
    ``sedtemp.fields``) and the keyword arguments of that field; any
    numeric argument ``X`` may instead be read per source from a column,
    ``X_column = "col"``. A star also takes ``position = {ra, dec}`` (deg):
    its separation from each source is then the angular separation of the
    catalogue's ``ra_column``/``dec_column`` times the catalogue distance.
``[compare]``
    ``enabled`` (bool, default true), ``thresholds`` (table passed to
    :func:`sedtemp.compare.compare_draws`), ``opacity_uncertainty``
    (fractional 1-sigma of kappa_FIR / kappa_abs propagated into T_eq,
    default 0.3; 0 switches it off).
``[output]``
    ``directory`` (default "sedtemp-results"), ``name`` (default "results"),
    ``format`` ("ecsv" | "fits" | "votable" | "csv"), ``keep_draws`` (bool:
    posterior draws in HDF5, needs the extra ``sedtemp[hdf5]``), ``n_keep``
    (draws kept per source, 200), ``plots`` (bool, default true: the
    catalogue plots, population and comparison), ``source_plots`` ("none" |
    "flagged" | "all", default "flagged": corner, SED and trace plots per
    source in ``<directory>/sources``; "flagged" = a comparison flag other
    than ``consistent``, or any fit flag when there is no comparison),
    ``max_source_plots`` (int >= 0, default 20: at most this many sources
    get per-source plots, in catalogue order), ``keep_columns`` (list of
    catalogue columns copied into the results, e.g. positions and names).
``[population]``
    ``enabled`` (bool, default false: after the catalogue, infer the
    population distribution of (T, beta) from the kept draws, needs
    ``[output] n_keep`` > 0), ``model`` ("gaussian" | "mixture"),
    ``n_walkers`` (32), ``n_steps`` (2000), ``min_ess`` (10: importance-weight
    ESS below which a source is flagged), ``equilibrium_scatter`` (optional:
    the log-scatter of T_fit / T_eq in equilibrium; given, the comparison
    keeps its per-draw T_fit / T_eq as ``draws_ratio`` and the heated
    fraction is inferred too: rows ``fraction``, ``heated_mean``,
    ``heated_sd`` of population.ecsv). See :mod:`sedtemp.population`.

Keys that do not change results (and all of ``[population]``): ``[run] workers``, ``executor``,
``chunk_size``, ``scheduler`` and ``[output] directory``, ``name``,
``format``, ``plots``, ``source_plots``, ``max_source_plots``
(:data:`NON_RESULT_KEYS`). A resumed run may change them; any other change
is refused (:meth:`Workflow.results_digest`).
"""

from __future__ import annotations

import copy
import functools
import hashlib
import re
import tomllib
from dataclasses import dataclass, field
from importlib.metadata import entry_points
from pathlib import Path
from typing import TYPE_CHECKING

import astropy.units as u

from .._units import beam_solid_angle, did_you_mean
from ..errors import ConfigError, InputError
from ..fields import FIELD_GROUP, field_kinds  # the entry-point group of field kinds, defined once
from ..fit import defaults as FIT_DEFAULTS
from .checks import MAX_WORKERS, check_far_ir, check_sections

if TYPE_CHECKING:
    from ..bands import BandSet
    from ..likelihood import Calibration
    from ..models import SEDModel
    from ..opacity import Opacity
    from ..priors import _Prior1D

__all__ = [
    "FIELD_GROUP",
    "MAX_WORKERS",
    "MODEL_GROUP",
    "NON_RESULT_KEYS",
    "OUTPUT_FORMATS",
    "SOURCE_PLOT_CHOICES",
    "Workflow",
    "band_solid_angle",
    "load_workflow",
    "read_toml",
    "lookup_model",
    "parse_quantity",
    "parse_workflow",
]

#: Entry-point group under which other packages register SED model classes.
MODEL_GROUP = "sedtemp.models"
#: ``[output] source_plots`` values: which sources get corner, SED and trace plots.
SOURCE_PLOT_CHOICES = ("none", "flagged", "all")
#: (section, key) pairs that do not change any result value: a resumed run may change them.
NON_RESULT_KEYS = frozenset({("run", "workers"), ("run", "executor"), ("run", "chunk_size"),
                             ("run", "scheduler"), ("output", "directory"), ("output", "name"),
                             ("output", "format"), ("output", "plots"), ("output", "source_plots"),
                             ("output", "max_source_plots"),
                             # the population stage reads the finished results: no row depends on it
                             ("population", "enabled"), ("population", "model"), ("population", "n_walkers"),
                             ("population", "n_steps"), ("population", "min_ess"),
                             ("population", "equilibrium_scatter")})
#: Output format keyword -> (astropy writer, file suffix).
OUTPUT_FORMATS = {
    "ecsv": ("ascii.ecsv", ".ecsv"),
    "fits": ("fits", ".fits"),
    "votable": ("votable", ".xml"),
    "csv": ("ascii.csv", ".csv"),
}

_REQ = object()  # marks a required key
_NUM = (int, float)

# section -> {key: (allowed types, default)}; None default = optional and absent
_SCHEMA: dict[str, dict[str, tuple]] = {
    "run": {"seed": (int, 0), "executor": (str, "process"), "workers": (int, 0),
            "chunk_size": (int, 64), "scheduler": (str, "")},
    "catalog": {"path": (str, _REQ), "format": (str, None), "id_column": (str, _REQ),
                "min_bands": (int, None), "distance": ((str, *_NUM), None),
                "distance_column": (str, None), "redshift": (_NUM, 0.0),
                "redshift_column": (str, None), "ra_column": (str, None),
                "dec_column": (str, None), "units": (dict, {})},
    "model": {"name": (str, "thin"), "amplitude": (str, "mass"), "beta": (_NUM, None),
              "solid_angle": ((str, *_NUM), None), "opacity": (dict, None)},
    # the same defaults as the Python API (one place: sedtemp.fit.defaults)
    "fit": {"method": (str, "grid"), "mcmc_sources": (list, []), "n_T": (int, FIT_DEFAULTS.N_T),
            "n_beta": (int, FIT_DEFAULTS.N_BETA), "n_draws": (int, FIT_DEFAULTS.N_DRAWS),
            "n_walkers": (int, FIT_DEFAULTS.N_WALKERS), "ess_target": (_NUM, FIT_DEFAULTS.ESS_TARGET),
            "max_steps": (int, FIT_DEFAULTS.MAX_STEPS)},
    "field": {"A_V": (_NUM, 0.0), "A_V_column": (str, None), "uncertainty": (_NUM, 0.0),
              "uncertainty_shared": (bool, False), "projected": (bool, False), "components": (list, [])},
    "compare": {"enabled": (bool, True), "thresholds": (dict, {}), "opacity_uncertainty": (_NUM, 0.3)},
    "output": {"directory": (str, "sedtemp-results"), "name": (str, "results"),
               "format": (str, "ecsv"), "keep_draws": (bool, False), "n_keep": (int, 200),
               "plots": (bool, True), "source_plots": (str, "flagged"), "max_source_plots": (int, 20),
               "keep_columns": (list, [])},
    "population": {"enabled": (bool, False), "model": (str, "gaussian"), "n_walkers": (int, 32),
                   "n_steps": (int, 2000), "min_ess": (_NUM, 10.0), "equilibrium_scatter": (_NUM, None)},
}
_BAND_KEYS = {"flux": (str, _REQ), "error": (str, _REQ), "limit": (str, None),
              "unit": (str, None), "calibration": (str, None), "wavelength": ((str, *_NUM), None),
              "tophat": (dict, None), "response": (str, None), "detector": (str, "energy"),
              "reference": ((str, *_NUM), "nu_fnu"), "beam": ((str, *_NUM), None),
              "solid_angle": ((str, *_NUM), None)}
_PRIOR_KEYS = {"kind": (str, _REQ), "low": (_NUM, None), "high": (_NUM, None),
               "mean": (_NUM, None), "sigma": (_NUM, None)}
_CHOICES = {("run", "executor"): ("process", "dask", "mpi", "serial"),
            ("fit", "method"): ("grid", "mcmc"),
            ("output", "format"): tuple(OUTPUT_FORMATS),
            ("output", "source_plots"): SOURCE_PLOT_CHOICES}
_TOP = set(_SCHEMA) | {"bands", "calibration", "priors", "workflow"}


def _type_name(types) -> str:
    types = types if isinstance(types, tuple) else (types,)
    names = {int: "integer", float: "number", str: "string", bool: "true/false",
             dict: "table", list: "array"}
    return " or ".join(dict.fromkeys(names[t] for t in types))


class _Where:
    """Finds the line of a dotted key in the TOML text, for error messages."""

    _HEADER = re.compile(r"^\s*\[\[?\s*([^\]]+?)\s*\]\]?\s*(#.*)?$")

    def __init__(self, text: str | None, source: str):
        self.source = source
        self.lines = text.splitlines() if text else []

    def line(self, section: str, key: str | None = None) -> int | None:
        current = ""
        for n, raw in enumerate(self.lines, 1):
            m = self._HEADER.match(raw)
            if m:
                current = m.group(1).replace('"', "").replace(" ", "")
                if key is None and current == section:
                    return n
                continue
            if key is not None and current == section and re.match(rf'^\s*"?{re.escape(key)}"?\s*=', raw):
                return n
        return None

    def matching(self, pattern: str) -> int | None:
        """The first line matching ``pattern`` (1-based), or None."""
        rx = re.compile(pattern)
        return next((n for n, raw in enumerate(self.lines, 1) if rx.match(raw)), None)

    def error(self, section, key, message) -> ConfigError:
        n = self.line(section, key)
        at = f"{self.source} line {n}" if n else self.source
        where = f"[{section}] {key!r}" if key else f"[{section}]"
        return ConfigError(f"{at}: {where}: {message}")


def _check_table(data, schema, section, where) -> dict:
    """Typed copy of ``data`` with defaults filled; unknown keys and wrong types raise."""
    if not isinstance(data, dict):
        raise where.error(section, None, f"must be a table, got {type(data).__name__}")
    unknown = [k for k in data if k not in schema]
    if unknown:
        raise where.error(section, unknown[0], f"unknown key{did_you_mean(unknown[0], schema)}; "
                          f"known keys are {sorted(schema)}")
    out = {}
    for key, (types, default) in schema.items():
        if key not in data:
            if default is _REQ:
                raise where.error(section, key, "is required but missing")
            out[key] = copy.deepcopy(default)
            continue
        value = data[key]
        tt = types if isinstance(types, tuple) else (types,)
        bad_bool = isinstance(value, bool) and bool not in tt
        if bad_bool or not isinstance(value, tt):
            raise where.error(section, key, f"must be of type {_type_name(types)}, got {value!r}")
        choices = _CHOICES.get((section, key))
        if choices and value not in choices:
            raise where.error(section, key, f"must be one of {list(choices)}, got {value!r}")
        out[key] = float(value) if tt == _NUM else value
    return out


def parse_quantity(value: str | float, default_unit: str | u.UnitBase, what: str) -> u.Quantity:
    """A workflow value (``"520 pc"`` or a bare number in ``default_unit``) -> Quantity.

    Raises
    ------
    ConfigError
        Unparsable string or a unit not convertible to ``default_unit``.
    """
    try:
        q = u.Quantity(value) if isinstance(value, str) else float(value) * u.Unit(default_unit)
    except (TypeError, ValueError) as err:
        raise ConfigError(f"{what}: cannot read {value!r} as a quantity (e.g. '1 {default_unit}')") from err
    if q.unit == u.dimensionless_unscaled and isinstance(value, str):
        q = q.value * u.Unit(default_unit)
    try:
        q.to(default_unit, equivalencies=u.spectral() + u.temperature())
    except u.UnitConversionError as err:
        raise ConfigError(f"{what}: unit {q.unit} cannot be converted to {default_unit}") from err
    return q


@functools.cache
def _registered(group):
    # entry_points() scans every installed distribution: once per process, not per source
    return {ep.name: ep for ep in entry_points(group=group)}


@functools.cache
def lookup_model(name: str) -> type[SEDModel]:
    """SED model class registered as ``name`` (built-in, or via the ``sedtemp.models`` entry points).

    Raises
    ------
    ConfigError
        Unknown name; the message lists the built-in and registered names.
    """
    from ..models import MODELS

    if name in MODELS:
        return MODELS[name]
    eps = _registered(MODEL_GROUP)
    if name in eps:
        return eps[name].load()
    raise ConfigError(f"[model] name: unknown model {name!r}; choose one of "
                      f"{sorted(MODELS) + sorted(eps)} or register one under the "
                      f"entry-point group '{MODEL_GROUP}'")


#: Opacities parsed from ``[model] opacity`` specs, per process (asked for once per chunk).
_OPACITIES: dict = {}


@dataclass
class Workflow:
    """A validated workflow: plain sections (dicts with defaults filled) and their builders.

    Build one with :func:`load_workflow` (file) or :func:`parse_workflow`
    (mapping). It is picklable, so it travels to worker processes.

    Attributes
    ----------
    run, catalog, model, fit, field, compare, output : dict
        The sections, checked and with defaults filled.
    bands : dict of str -> dict
        Band name -> band section, in file order.
    calibration : dict of str -> float
    priors : dict of str -> dict
    base_dir : Path
        Directory that relative paths are taken from.
    source : str
        File name (or "<workflow>") for messages.
    digest : str
        SHA-256 of the canonical workflow content (recorded in results).
    file : Path or None
        Absolute path of the workflow file (:func:`load_workflow`), None for
        a workflow built from a mapping; recorded in results so that
        ``sedtemp plot --source`` can refit a source.
    text : str or None
        The TOML text it was read from (recorded in the results metadata).
    """

    run: dict
    catalog: dict
    bands: dict
    calibration: dict
    model: dict
    priors: dict
    fit: dict
    field: dict
    compare: dict
    output: dict
    population: dict = field(default_factory=lambda: {"enabled": False})
    base_dir: Path = Path()
    source: str = "<workflow>"
    digest: str = ""
    file: Path | None = None
    raw: dict = field(default_factory=dict, repr=False)
    text: str | None = field(default=None, repr=False)

    # ---------------------------------------------------------------- paths
    def path(self, value: str | Path) -> Path:
        """``value`` relative to the workflow's directory (absolute paths kept)."""
        p = Path(value)
        return p if p.is_absolute() else self.base_dir / p

    @property
    def output_dir(self) -> Path:
        return self.path(self.output["directory"])

    # -------------------------------------------------------------- digests
    def sections(self) -> dict:
        """The checked sections as one plain mapping (current content, after any edits)."""
        return {"run": self.run, "catalog": self.catalog, "bands": self.bands,
                "calibration": self.calibration, "model": self.model, "priors": self.priors,
                "fit": self.fit, "field": self.field, "compare": self.compare, "output": self.output,
                "population": self.population}

    def results_content(self) -> dict:
        """:meth:`sections` without the keys of :data:`NON_RESULT_KEYS` (they change no result)."""
        out = {}
        for sec, body in self.sections().items():
            out[sec] = {k: v for k, v in body.items() if (sec, k) not in NON_RESULT_KEYS}
        return out

    def results_digest(self) -> str:
        """SHA-256 of :meth:`results_content`, computed from the current content.

        Unlike :attr:`digest` (the file's content when it was read), this
        follows edits of the sections after parsing, so caches and resume
        keyed on it never mix two workflows.
        """
        return _digest(self.results_content())

    # ------------------------------------------------------------- builders
    def bandset(self) -> BandSet:
        """The :class:`~sedtemp.bands.BandSet` of the ``[bands]`` tables, in file order."""
        from ..bands import Band, BandSet

        out = []
        for name, spec in self.bands.items():
            conv = {"detector": spec["detector"], "reference": spec["reference"]}
            try:
                if spec["wavelength"] is not None:
                    out.append(Band.monochromatic(name, parse_quantity(spec["wavelength"], "um", f"[bands.{name}] wavelength")))
                elif spec["tophat"] is not None:
                    th = spec["tophat"]
                    if set(th) != {"center", "width"}:
                        raise ConfigError(f"{self.source}: [bands.{name}] tophat needs exactly "
                                          f"{{center, width}}, got keys {sorted(th)}")
                    out.append(Band.tophat(name, parse_quantity(th["center"], "um", f"[bands.{name}] tophat.center"),
                                           float(th["width"]), **conv))
                else:
                    out.append(Band.from_file(name, self.path(spec["response"]), **conv))
            except InputError as err:
                raise ConfigError(f"{self.source}: [bands.{name}]: {err}") from err
        check_far_ir(out, self.source)
        return BandSet(out)

    def calibration_groups(self) -> Calibration | None:
        """:class:`~sedtemp.likelihood.Calibration` from ``[calibration]`` and the bands' groups, or None."""
        from ..likelihood import Calibration

        groups = {}
        for name, spec in self.bands.items():
            if spec["calibration"] is not None:
                groups.setdefault(spec["calibration"], []).append(name)
        if not groups:
            return None
        return Calibration({g: (members, self.calibration[g]) for g, members in groups.items()})

    def build_model(self, *, distance: u.Quantity | None = None, redshift: float = 0.0) -> SEDModel:
        """The SED model of ``[model]`` at this distance (Quantity) and redshift."""
        spec = self.model
        cls = lookup_model(spec["name"])
        opts = {}
        if spec["opacity"] is not None:
            opts["opacity"] = self._opacity()
        if spec["name"] != "thick":
            opts["amplitude"] = spec["amplitude"]
            if spec["amplitude"] == "mass":
                opts["distance"] = distance
            else:
                opts["solid_angle"] = parse_quantity(spec["solid_angle"] if spec["solid_angle"] is not None else 1.0,
                                                     "arcsec2", "[model] solid_angle")
        if spec["beta"] is not None:
            opts["beta"] = spec["beta"]
        opts["redshift"] = float(redshift)
        try:
            return cls(**opts)
        except (InputError, TypeError) as err:
            raise ConfigError(f"{self.source}: [model]: {err}") from err

    def _opacity(self):
        spec = dict(self.model["opacity"])
        key = repr(sorted(spec.items()))  # the opacity depends on the spec alone (opacities are immutable)
        found = _OPACITIES.get(key)
        if found is None:
            if len(_OPACITIES) > 64:
                _OPACITIES.clear()
            found = _OPACITIES[key] = self._parse_opacity(spec)
        return found

    def _parse_opacity(self, spec):
        from ..opacity import PowerLawOpacity, SaturatedPowerLawOpacity

        known = {"kappa0", "nu0", "beta", "per", "grain_radius", "grain_density", "break_wavelength"}
        unknown = set(spec) - known
        if unknown or not {"kappa0", "nu0"} <= set(spec):
            raise ConfigError(f"{self.source}: [model] opacity needs kappa0 and nu0 (optional "
                              f"{sorted(known - {'kappa0', 'nu0'})}); got keys {sorted(spec)}")
        args = (parse_quantity(spec["kappa0"], "cm2 g-1", "[model] opacity.kappa0"),
                parse_quantity(spec["nu0"], "Hz", "[model] opacity.nu0"), float(spec.get("beta", 2.0)))
        sat = {}
        for key, unit in (("grain_radius", "um"), ("grain_density", "g cm-3"), ("break_wavelength", "um")):
            if key in spec:
                sat[key] = parse_quantity(spec[key], unit, f"[model] opacity.{key}")
        try:
            if sat:  # UV/optical saturation: needed for a physical absorption of starlight
                return SaturatedPowerLawOpacity(*args, per=spec.get("per", "dust"), **sat)
            return PowerLawOpacity(*args, per=spec.get("per", "dust"))
        except InputError as err:
            raise ConfigError(f"{self.source}: [model] opacity: {err}") from err

    def opacity(self) -> Opacity:
        """The dust opacity used for the prediction: ``[model] opacity`` or the model default."""
        from ..models import default_opacity

        if self.model["opacity"] is not None:
            return self._opacity()
        return default_opacity("gas" if self.model["amplitude"] == "column" else "dust")

    def build_prior(self) -> dict[str, _Prior1D]:
        """Mapping parameter -> prior object from ``[priors]`` (empty: the model defaults)."""
        from .. import priors as P

        kinds = {"uniform": (P.Uniform, ("low", "high")), "loguniform": (P.LogUniform, ("low", "high")),
                 "gaussian": (P.Gaussian, ("mean", "sigma", "low", "high")),
                 "uniform_amplitude": (P.UniformAmplitude, ("low", "high")),
                 "log_uniform_amplitude": (P.LogUniformAmplitude, ("low", "high"))}
        out = {}
        for name, spec in self.priors.items():
            if spec["kind"] not in kinds:
                raise ConfigError(f"{self.source}: [priors.{name}] kind must be one of {sorted(kinds)}, "
                                  f"got {spec['kind']!r}")
            cls, args = kinds[spec["kind"]]
            need = args[:2]
            missing = [a for a in need if spec[a] is None]
            if missing:
                raise ConfigError(f"{self.source}: [priors.{name}] kind {spec['kind']!r} needs {missing}")
            vals = [spec[a] for a in args if spec[a] is not None]
            try:
                out[name] = cls(*vals)
            except InputError as err:
                raise ConfigError(f"{self.source}: [priors.{name}]: {err}") from err
        return out


def _check_bands(data, where):
    if not isinstance(data, dict) or not data:
        raise where.error("bands", None, "give at least one [bands.NAME] table")
    out = {}
    for name, spec in data.items():
        sec = f"bands.{name}"
        b = _check_table(spec, _BAND_KEYS, sec, where)
        given = [k for k in ("wavelength", "tophat", "response") if b[k] is not None]
        if len(given) != 1:
            raise where.error(sec, None, "give exactly one of wavelength, tophat or response "
                              f"(got {given or 'none'})")
        for key in ("beam", "solid_angle"):
            if b[key] is not None:
                try:
                    band_solid_angle(b, key)
                except (ConfigError, InputError) as err:
                    raise where.error(sec, key, str(err)) from err
        out[name] = b
    return out


def band_solid_angle(spec: dict, key: str) -> float | None:
    """The ``beam`` or ``solid_angle`` of a ``[bands.NAME]`` table in sr (None when not given).

    ``beam`` is a Gaussian FWHM (an angle: ``"18 arcsec"``, bare arcsec) or
    the beam's area (a solid angle: ``"370 arcsec2"``); ``solid_angle`` is
    the solid angle the photometry covers (bare arcsec^2). Both turn a
    surface brightness (``MJy/sr``) or a per-beam value (``Jy/beam``) into
    a flux density (:func:`sedtemp._units.flux_density_si`).

    Raises
    ------
    ConfigError
        Not a quantity, the wrong kind of unit, or not positive.

    Examples
    --------
    An 18 arcsec FWHM is a beam of pi FWHM^2 / (4 ln 2) = 367.1 arcsec^2:

    >>> f"{band_solid_angle({'beam': '18 arcsec'}, 'beam'):.4g}"
    '8.629e-09'
    >>> f"{band_solid_angle({'solid_angle': 367.1}, 'solid_angle'):.4g}"
    '8.628e-09'
    >>> band_solid_angle({"beam": None}, "beam") is None
    True
    """
    value = spec.get(key)
    if value is None:
        return None
    if key == "solid_angle":
        q = parse_quantity(value, "arcsec2", f"{key}")
        return beam_solid_angle(area=q)
    try:
        q = u.Quantity(value) if isinstance(value, str) else float(value) * u.arcsec
    except (TypeError, ValueError) as err:
        raise ConfigError(f"beam: cannot read {value!r} as a quantity (e.g. '18 arcsec' or '370 arcsec2')") from err
    if isinstance(value, str) and q.unit == u.dimensionless_unscaled:
        q = q.value * u.arcsec
    if q.unit.is_equivalent(u.sr):
        return beam_solid_angle(area=q)
    if q.unit.is_equivalent(u.rad):
        return beam_solid_angle(fwhm=q)
    raise ConfigError(f"beam: {value!r} is neither an angle (a FWHM, e.g. '18 arcsec') nor a solid angle "
                      "(the beam area, e.g. '370 arcsec2')")


def _check_mapping_of(data, section, types, where):
    if not isinstance(data, dict):
        raise where.error(section, None, "must be a table")
    for key, value in data.items():
        if isinstance(value, bool) or not isinstance(value, types):
            raise where.error(section, key, f"must be of type {_type_name(types)}, got {value!r}")
    return dict(data)


def _check_components(comps, where):
    kinds = field_kinds()
    for i, comp in enumerate(comps):
        if not isinstance(comp, dict) or not isinstance(comp.get("kind"), str):
            raise where.error("field.components", None,
                              f"component {i + 1} must be a table with a string 'kind'")
        kind = comp["kind"]
        if kind not in kinds:
            n = where.matching(rf"^\s*kind\s*=\s*[\"']{re.escape(kind)}[\"']")
            at = f"{where.source} line {n}" if n else where.source
            raise ConfigError(f"{at}: [[field.components]] {i + 1}: unknown field kind {kind!r}"
                              f"{did_you_mean(kind, kinds)}; known kinds are {sorted(kinds)} (more can be "
                              f"registered under the entry-point group '{FIELD_GROUP}')")


def _digest(data) -> str:
    def canon(x):
        if isinstance(x, dict):
            return "{" + ",".join(f"{k!r}:{canon(x[k])}" for k in sorted(x)) + "}"
        if isinstance(x, list):
            return "[" + ",".join(canon(v) for v in x) + "]"
        return repr(x)

    return hashlib.sha256(canon(data).encode()).hexdigest()


def parse_workflow(data: dict, *, base_dir: str | Path = ".", source: str = "<workflow>",
                   text: str | None = None) -> Workflow:
    """Validate a workflow mapping (as ``tomllib`` returns it) against the schema.

    Parameters
    ----------
    data : dict
        The parsed TOML document.
    base_dir : str or Path, keyword-only
        Directory relative paths are resolved against.
    source : str, keyword-only
        Name used in messages.
    text : str, optional, keyword-only
        The TOML text, used to give line numbers in messages.

    Returns
    -------
    Workflow

    Raises
    ------
    ConfigError
        Unknown section or key, wrong type, value not among the choices,
        a required key missing, a band without a response, a band naming an
        undefined calibration group, or inconsistent catalogue keys.
    """
    where = _Where(text, source)
    unknown = [k for k in data if k not in _TOP]
    if unknown:
        n = where.line(unknown[0]) or where.line(unknown[0].split(".")[0])
        at = f"{source} line {n}" if n else source
        raise ConfigError(f"{at}: unknown section or key {unknown[0]!r}; known sections are {sorted(_TOP)}")
    sections = {s: _check_table(data.get(s, {}), _SCHEMA[s], s, where) for s in _SCHEMA
                if s != "catalog" or "catalog" in data}
    if "catalog" not in sections:
        raise ConfigError(f"{source}: the [catalog] section is required (path, id_column)")
    bands = _check_bands(data.get("bands"), where)
    calibration = _check_mapping_of(data.get("calibration", {}), "calibration", _NUM, where)
    for name, b in bands.items():
        if b["calibration"] is not None and b["calibration"] not in calibration:
            raise where.error(f"bands.{name}", "calibration",
                              f"group {b['calibration']!r} is not defined in [calibration] "
                              f"(defined: {sorted(calibration)})")
    priors = {}
    for name, spec in _check_mapping_of(data.get("priors", {}), "priors", dict, where).items():
        priors[name] = _check_table(spec, _PRIOR_KEYS, f"priors.{name}", where)
    raw_cat = data["catalog"]
    for a, b in (("distance", "distance_column"), ("redshift", "redshift_column")):
        if a in raw_cat and b in raw_cat:
            raise where.error("catalog", b, f"give either {a} or {b}, not both")
    fld = sections["field"]
    _check_components(fld["components"], where)
    if fld["A_V_column"] is not None and "A_V" in data.get("field", {}):
        raise where.error("field", "A_V_column", "give either A_V or A_V_column, not both")
    check_sections(sections, priors, where)
    return Workflow(bands=bands, calibration=calibration, priors=priors, base_dir=Path(base_dir),
                    source=source, digest=_digest(data), raw=copy.deepcopy(data), text=text, **sections)


def read_toml(path: str | Path) -> tuple[dict, str]:
    """(mapping, text) of a workflow TOML file.

    Raises
    ------
    ConfigError
        The file cannot be read, or is not valid TOML (with tomllib's line and column).
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as err:
        raise ConfigError(f"cannot read workflow file {str(path)!r}: {err.strerror}") from err
    try:
        return tomllib.loads(text), text
    except tomllib.TOMLDecodeError as err:
        raise ConfigError(f"{path.name}: not valid TOML: {err}") from err


def load_workflow(path: str | Path) -> Workflow:
    """Read and validate a workflow TOML file.

    Raises
    ------
    ConfigError
        The file is missing, is not valid TOML (the message carries
        tomllib's line and column), or fails :func:`parse_workflow`.
    """
    path = Path(path)
    data, text = read_toml(path)
    wf = parse_workflow(data, base_dir=path.resolve().parent, source=path.name, text=text)
    wf.file = path.resolve()
    return wf
