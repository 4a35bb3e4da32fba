"""What a workflow will do, before it runs: the dry run behind ``sedtemp check --show``.

Built from the public attributes of :class:`~sedtemp.pipeline.Workflow` only:
the resolved workflow as TOML (every default filled in), the band table, the
resolved model, opacity, priors and field, the range of predicted
equilibrium temperatures over (a sample of) the catalogue, and a run-time
estimate from timing a few sources. Field kinds are checked when the
workflow is read (:func:`sedtemp.pipeline.parse_workflow`: a typo is reported
with its line and the nearest known kind).
"""

from __future__ import annotations

import re
import time
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

import astropy.units as u
import numpy as np

from .errors import ConfigError

if TYPE_CHECKING:
    from .pipeline.catalog import MappedCatalog
    from .pipeline.config import Workflow

__all__ = [
    "band_rows",
    "format_band_table",
    "line_of",
    "physics_lines",
    "resolved_toml",
    "t_eq_range",
    "time_estimate",
    "with_line",
]

_SECTIONS = ("run", "catalog", "model", "fit", "field", "compare", "output")


# ------------------------------------------------------------------ TOML dump
def _toml_value(v):
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        return repr(float(v))
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{_key(k)} = {_toml_value(x)}" for k, x in v.items() if x is not None) + " }"
    return _toml_value(str(v))


def _key(k):
    return k if re.fullmatch(r"[A-Za-z0-9_-]+", str(k)) else _toml_value(str(k))


def _table(name, data, skip=()):
    lines = [f"[{name}]"]
    for k, v in data.items():
        if k in skip:
            continue
        lines.append(f"# {_key(k)} = (not set)" if v is None else f"{_key(k)} = {_toml_value(v)}")
    return lines


def resolved_toml(wf: Workflow) -> str:
    """The workflow as TOML with every default filled in; unset optional keys as comments.

    The text parses back (:mod:`tomllib`) to a workflow equal in content.
    """
    out = [f"# {wf.source} as sedtemp reads it: every default filled in", ""]
    for sec in _SECTIONS:
        data = getattr(wf, sec)
        out += _table(sec, data, skip=("components",) if sec == "field" else ())
        if sec == "catalog":
            out.append("")
            for name, spec in wf.bands.items():
                out += [*_table(f"bands.{name}", spec), ""]
            if wf.calibration:
                out += _table("calibration", wf.calibration)
        if sec == "model":
            out.append("")
            for name, spec in wf.priors.items():
                out += [*_table(f"priors.{name}", spec), ""]
        if sec == "field":
            for comp in data["components"]:
                out += ["", "[[field.components]]"] + [f"{_key(k)} = {_toml_value(v)}" for k, v in comp.items()]
        out.append("")
    return "\n".join(out)


# ----------------------------------------------------------------- band table
def band_rows(wf: Workflow) -> list[dict]:
    """One dict per band: name, flux and error columns, unit, centre (um), calibration group."""
    bs = wf.bandset()
    units = wf.catalog["units"]
    rows = []
    for j, (name, spec) in enumerate(wf.bands.items()):
        lam = (bs.nu_ref_hz[j] * u.Hz).to_value(u.um, equivalencies=u.spectral())
        group = spec["calibration"]
        rows.append({"band": name, "flux": spec["flux"], "error": spec["error"],
                     "unit": spec["unit"] or units.get(spec["flux"]) or "(from the catalogue)",
                     "centre_um": float(lam),
                     "calibration": f"{group} ({wf.calibration[group]:.0%})" if group else "none",
                     "limit": spec["limit"] or ""})
    return rows


def format_band_table(rows: list[dict], catalog_units: Mapping[str, str] | None = None) -> str:
    """Aligned text of :func:`band_rows`; ``catalog_units`` (flux column -> unit) fills units in."""
    catalog_units = catalog_units or {}
    head = ("band", "flux", "error", "limit", "unit", "centre", "calibration")
    body = [(r["band"], r["flux"], r["error"], r["limit"] or "-",
             catalog_units.get(r["flux"], r["unit"]), f"{r['centre_um']:.4g} um", r["calibration"]) for r in rows]
    widths = [max(len(str(x)) for x in col) for col in zip(head, *body, strict=True)]
    return "\n".join("  ".join(str(x).ljust(w) for x, w in zip(line, widths, strict=True)).rstrip() for line in (head, *body))


# ---------------------------------------------------------- resolved physics
def physics_lines(wf: Workflow) -> list[str]:
    """The resolved model, opacity, priors and field of a workflow, one item per line."""
    model = wf.build_model(distance=1.0 * u.kpc, redshift=0.0) if wf.model["amplitude"] == "mass" \
        else wf.build_model(redshift=0.0)
    prior = model.default_prior().updated(wf.build_prior())
    out = [f"model: {type(model).__name__} ({wf.model['name']}, amplitude {wf.model['amplitude']}), "
           f"parameters {', '.join(model.param_names)}"
           + (f", beta fixed at {wf.model['beta']}" if wf.model["beta"] is not None else "")]
    out.append(f"opacity: {_describe(wf.opacity())}"
               + ("" if wf.model["opacity"] is not None else " (the model default)"))
    for name in model.param_names:
        src = "workflow" if name in wf.priors else "model default"
        out.append(f"prior {name}: {_describe(prior[name])} ({src})")
    fld = wf.field
    comps = "; ".join(", ".join(f"{k}={v}" for k, v in c.items()) for c in fld["components"]) or "none"
    out.append(f"field: {comps}; A_V {fld['A_V_column'] or fld['A_V']}, uncertainty {fld['uncertainty']:.0%}"
               f"{', projected separations' if fld['projected'] else ''}")
    cal = wf.calibration_groups()
    out.append("calibration: " + (", ".join(f"{g} {frac:.0%}" for g, frac in wf.calibration.items()) if cal
                                  else "none"))
    if not wf.field["components"]:
        out.append("compare: no [[field.components]], so no prediction and no comparison")
    return out


def _describe(obj):
    text = repr(obj)
    return text if len(text) <= 160 else text[:157] + "..."


# ------------------------------------------------------------- workflow lines
def line_of(wf: Workflow, pattern: str) -> int | None:
    """Line number (1-based) of the first line of the workflow file matching ``pattern`` (regex)."""
    if wf.file is None:
        return None
    try:
        lines = wf.file.read_text(encoding="utf-8").splitlines()
    except OSError:
        return None
    rx = re.compile(pattern)
    return next((n for n, line in enumerate(lines, 1) if rx.search(line)), None)


def with_line(wf: Workflow, err: ConfigError) -> ConfigError:
    """``err`` with ``line N`` after the file name when its message names a section and has no line."""
    msg = str(err)
    if " line " in msg.split(":", 1)[0] or wf.file is None:
        return err
    m = re.search(r"\[\[?([A-Za-z0-9_.\"-]+)\]\]?", msg)
    if m is None:
        return err
    n = line_of(wf, rf"^\s*\[\[?\s*{re.escape(m.group(1))}\s*\]\]?")
    if n is None:
        return err
    head, _, rest = msg.partition(": ")
    text = f"{head} line {n}: {rest}" if head == wf.source else f"{wf.source} line {n}: {msg}"
    new = ConfigError(text)
    new.__cause__ = err
    return new


# ------------------------------------------------------------ T_eq and timing
def t_eq_range(wf: Workflow, mapped: MappedCatalog, *, max_sources: int = 200,
               seed: int = 0) -> dict[str, Any] | None:
    """Predicted equilibrium temperatures over (a random sample of) the catalogue.

    Each source's field is built with :func:`sedtemp.fields.build_field`
    from its own arguments and A_V; beta is ``[model] beta``, else the
    opacity's own slope (the fit's beta is not known before the run).

    Returns
    -------
    dict or None
        ``n`` (sources evaluated), ``n_total``, ``beta``, ``min``, ``median``,
        ``max`` (K), ``failed`` (list of (key, message)); None without a field.
    """
    import warnings

    from .equilibrium import predict_chunk
    from .errors import SedtempWarning
    from .fields import build_field
    from .pipeline.report import extrapolation_caution

    if not wf.field["components"] or len(mapped) == 0:
        return None
    n = len(mapped)
    pick = np.arange(n) if n <= max_sources else np.sort(
        np.random.default_rng(seed).choice(n, size=max_sources, replace=False))
    kappa = wf.opacity()
    beta = float(wf.model["beta"]) if wf.model["beta"] is not None else float(kappa.beta)
    fields, keys, failed = [], [], []
    for i in pick:  # the fields one by one (a bad one is reported), the solve in one call
        try:
            fields.append(build_field(mapped.field_arguments(int(i)), A_V=float(mapped.A_V[i])))
            keys.append(str(mapped.keys[i]))
        except Exception as err:  # noqa: BLE001 - reported per source, the check goes on
            failed.append((str(mapped.keys[i]), f"{type(err).__name__}: {err}"))
    t, frac = np.array([]), np.array([])
    if fields:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", SedtempWarning)  # said below, as one caution line
            res = predict_chunk(fields, kappa, np.full(len(fields), beta), details=True)
        t, frac = np.asarray(res["T_eq"]), np.asarray(res["opacity_extrapolated_fraction"])
    caution = extrapolation_caution(int(np.sum(frac > 0.01)), float(frac.max()) if frac.size else 0.0, t.size)
    return {"n": int(t.size), "n_total": n, "beta": beta, "failed": failed, "caution": caution,
            "min": float(t.min()) if t.size else np.nan, "median": float(np.median(t)) if t.size else np.nan,
            "max": float(t.max()) if t.size else np.nan}


def time_estimate(wf: Workflow, mapped: MappedCatalog, *, n_sample: int = 3,
                  workers: int | None = None) -> dict[str, Any]:
    """Estimated run time from timing the fit, predict and compare of a few sources.

    The first timed source carries the one-off set-up (the grid table of
    the model); the next ``n_sample`` give the cost per source. Sources
    named in ``[fit] mcmc_sources`` (or every source with ``method =
    "mcmc"``) cost as much as one timed MCMC source each.

    Returns
    -------
    dict
        ``setup_s``, ``per_source_s``, ``n_fit``, ``n_mcmc``, ``mcmc_per_source_s`` (or None),
        ``workers``, ``serial_s``, ``wall_s`` (serial / workers, a lower bound), ``n_timed``.
    """
    import os

    from .pipeline import process_chunk

    ok = np.flatnonzero(mapped.skip_reason == "")
    listed = {str(s) for s in wf.fit["mcmc_sources"]}
    all_mcmc = wf.fit["method"] == "mcmc"
    is_mcmc = np.array([all_mcmc or str(mapped.keys[i]) in listed for i in ok], bool)
    grid_idx, mcmc_idx = ok[~is_mcmc], ok[is_mcmc]

    def timed(idx):
        t0 = time.perf_counter()
        process_chunk(wf, mapped.take(idx), n_keep=0)
        return time.perf_counter() - t0

    setup = per = mcmc_per = None
    if grid_idx.size:
        setup = timed(grid_idx[:1])
        more = grid_idx[1:1 + n_sample]
        per = timed(more) / more.size if more.size else setup
        setup = max(setup - per, 0.0)
    if mcmc_idx.size:
        mcmc_per = timed(mcmc_idx[:1])
    serial = (setup or 0.0) + (per or 0.0) * grid_idx.size + (mcmc_per or 0.0) * mcmc_idx.size
    w = workers if workers else (1 if wf.run["executor"] == "serial" else
                                 (wf.run["workers"] or os.cpu_count() or 1))
    return {"setup_s": setup or 0.0, "per_source_s": per, "n_fit": int(grid_idx.size), "n_mcmc": int(mcmc_idx.size),
            "mcmc_per_source_s": mcmc_per, "workers": int(w), "serial_s": serial, "wall_s": serial / max(int(w), 1),
            "n_timed": int(min(grid_idx.size, 1 + n_sample) + min(mcmc_idx.size, 1))}
