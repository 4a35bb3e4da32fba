"""Checks of a workflow's values that would make every source fail, run before any fitting.

The schema (:mod:`sedtemp.pipeline.config`) checks keys and types; this
module checks meaning: a prior whose bounds are reversed or equal, a
log-uniform prior starting at 0, a negative width, a prior on a parameter
the model fixes, a temperature prior below the CMB temperature, a one-node
grid, more draws kept than drawn, a worker count that is negative or absurd,
an output name that leaves the output folder. ``sedtemp check`` reads the
workflow through these checks, so a passing check means the run can start.
Each message names the key and says how to fix it.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from typing import TYPE_CHECKING, Any

from ..constants import T_CMB0
from ..errors import ConfigError

if TYPE_CHECKING:
    from ..bands import Band

__all__ = ["MAX_WORKERS", "PRIOR_ARGUMENTS", "check_sections"]

#: Largest ``[run] workers`` accepted (a typo such as 100000 would start that many processes).
MAX_WORKERS = 1024
#: Prior kind -> (required arguments, optional arguments).
PRIOR_ARGUMENTS = {"uniform": (("low", "high"), ()), "loguniform": (("low", "high"), ()),
                   "gaussian": (("mean", "sigma"), ("low", "high")),
                   "uniform_amplitude": (("low", "high"), ())}


def _fail(where, section, key, message):
    raise where.error(section, key, message)


def _check_counts(s, where):
    for sec, key in (("run", "chunk_size"), ("fit", "n_draws"), ("output", "n_keep")):
        if s[sec][key] < 1:
            _fail(where, sec, key, f"must be >= 1, got {s[sec][key]}")
    if s["output"]["max_source_plots"] < 0:
        _fail(where, "output", "max_source_plots",
              f"must be >= 0 (0: no per-source plots), got {s['output']['max_source_plots']}")
    if s["output"]["n_keep"] > s["fit"]["n_draws"]:
        _fail(where, "output", "n_keep", f"{s['output']['n_keep']} draws kept but [fit] n_draws = "
              f"{s['fit']['n_draws']} drawn (draws would repeat); lower n_keep or raise n_draws")
    for key in ("n_T", "n_beta"):
        if s["fit"][key] < 2:
            _fail(where, "fit", key, f"a grid needs at least 2 nodes, got {s['fit'][key]}; use e.g. 60")
    workers = s["run"]["workers"]
    if not 0 <= workers <= MAX_WORKERS:
        _fail(where, "run", "workers", f"must be 0 (all cores) or 1..{MAX_WORKERS}, got {workers}")


def _check_output(s, where):
    name = s["output"]["name"]
    if not name or name in (".", "..") or any(c in name for c in "/\\") or name.startswith("."):
        _fail(where, "output", "name", f"must be a plain file name (no folders, not hidden), got {name!r}; "
              "put folders in [output] directory")
    cols = s["output"]["keep_columns"]
    if not all(isinstance(c, str) and c for c in cols):
        _fail(where, "output", "keep_columns", f"must be a list of column names, got {cols!r}")
    pop = s["population"]
    if pop["model"] not in ("gaussian", "mixture"):
        _fail(where, "population", "model", f"must be \"gaussian\" or \"mixture\", got {pop['model']!r}")
    if pop["enabled"] and s["output"]["n_keep"] < 2:
        _fail(where, "population", "enabled", "needs posterior draws: set [output] n_keep to 200 or so")
    if pop["n_walkers"] < 4 or pop["n_steps"] < 10:
        _fail(where, "population", "n_walkers", f"needs n_walkers >= 4 and n_steps >= 10, got "
              f"{pop['n_walkers']} and {pop['n_steps']}")
    if s["compare"]["opacity_uncertainty"] < 0:
        _fail(where, "compare", "opacity_uncertainty",
              f"is a fractional 1-sigma and cannot be negative, got {s['compare']['opacity_uncertainty']}")
    if s["field"]["uncertainty"] < 0:
        _fail(where, "field", "uncertainty",
              f"is a fractional 1-sigma and cannot be negative, got {s['field']['uncertainty']}")


def _check_prior(name, spec, where, model):
    sec = f"priors.{name}"
    kind = spec["kind"]
    if kind not in PRIOR_ARGUMENTS:
        _fail(where, sec, "kind", f"must be one of {sorted(PRIOR_ARGUMENTS)}, got {kind!r}")
    need, _ = PRIOR_ARGUMENTS[kind]
    missing = [a for a in need if spec[a] is None]
    if missing:
        _fail(where, sec, None, f"kind {kind!r} needs {missing}")
    if name == "beta" and model["beta"] is not None:
        _fail(where, sec, None, f"beta is fixed by [model] beta = {model['beta']}; remove [priors.beta] "
              "or the fixed beta")
    low, high = spec["low"], spec["high"]
    if low is not None and high is not None:
        if low > high:
            _fail(where, sec, "low", f"low = {low} is above high = {high}; swap them")
        if low == high:
            _fail(where, sec, "low", f"low = high = {low} leaves no room; fix the parameter instead "
                  "or widen the bounds")
    if kind == "loguniform" and low is not None and low <= 0:
        _fail(where, sec, "low", f"a log-uniform prior needs low > 0, got {low}")
    if kind == "gaussian" and spec["sigma"] is not None and not spec["sigma"] > 0:
        _fail(where, sec, "sigma", f"must be > 0, got {spec['sigma']}")
    if name == "T" and low is not None:
        z = model["_redshift"]
        t_cmb = T_CMB0 * (1.0 + z)
        if low < t_cmb:
            _fail(where, sec, "low", f"T low = {low} K is below the CMB temperature {t_cmb:.3f} K at "
                  f"z = {z:g}, which no dust can be colder than; raise it")


def _check_distance_redshift(cat, where):
    """A common distance given with a common redshift must agree with it (Planck 2018 cosmology)."""
    z, dist = cat["redshift"], cat["distance"]
    if dist is None or not z or z < 0.01:
        return
    import astropy.units as u
    from astropy.cosmology import Planck18

    try:  # the same reading as config.parse_quantity (a bare number is in pc)
        q = u.Quantity(dist) if isinstance(dist, str) else float(dist) * u.pc
        d = (q if q.unit != u.dimensionless_unscaled else q.value * u.pc).to_value(u.Mpc)
    except (TypeError, ValueError, u.UnitConversionError):
        return  # reported with its own message when the distance is used

    d_l = Planck18.luminosity_distance(z).to_value(u.Mpc)
    if not 0.5 < d / d_l < 2.0 or not math.isfinite(d):
        _fail(where, "catalog", "distance", f"{d:.4g} Mpc disagrees with redshift {z:g} (luminosity "
              f"distance {d_l:.4g} Mpc in the Planck 2018 cosmology, astropy); give one of them, or both "
              "consistent")


def check_sections(sections: dict, priors: dict, where: Any) -> None:
    """Raise :class:`~sedtemp.errors.ConfigError` for values that would make every source fail.

    Parameters
    ----------
    sections : dict
        The checked sections (``run``, ``catalog``, ``model``, ``fit``,
        ``field``, ``compare``, ``output``) with defaults filled.
    priors : dict
        ``[priors.PARAM]`` tables, checked against their schema.
    where : object
        The workflow's line finder (``where.error(section, key, message)``
        returns a ConfigError naming the file and line).

    Raises
    ------
    ConfigError
        The first problem found; the message names the key and the remedy.
    """
    _check_counts(sections, where)
    _check_output(sections, where)
    model = dict(sections["model"], _redshift=float(sections["catalog"]["redshift"] or 0.0))
    for name, spec in priors.items():
        _check_prior(name, spec, where, model)
    _check_distance_redshift(sections["catalog"], where)


#: Reference wavelengths (m) accepted for a band: the far-IR/submm and some margin.
_BAND_RANGE_M = (10e-6, 1e-2)


def check_far_ir(bands: Iterable[Band], source: str) -> None:
    """Refuse bands far outside the far-IR/submm (e.g. a response file in the wrong unit)."""
    c = 299792458.0
    for b in bands:
        lam = c / b.nu_ref_hz
        if not _BAND_RANGE_M[0] <= lam <= _BAND_RANGE_M[1]:
            raise ConfigError(f"{source}: [bands.{b.name}]: reference wavelength {lam * 1e6:.4g} um is "
                              "outside the far-IR/submm range 10 um - 1 cm that sedtemp fits; check the "
                              "response file's unit or the band's wavelength")
