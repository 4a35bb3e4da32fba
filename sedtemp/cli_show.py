"""Text the ``sedtemp`` command prints: the ``check --show`` dry run and the one-source report of ``fit``."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from ._units import group_causes
from .inspect_workflow import (
    band_rows,
    format_band_table,
    physics_lines,
    resolved_toml,
    t_eq_range,
    time_estimate,
)

if TYPE_CHECKING:
    from astropy.table import Row, Table

    from .pipeline.catalog import MappedCatalog
    from .pipeline.config import Workflow

__all__ = ["format_seconds", "show", "source_report"]

#: Columns of the comparison stage that look like parameter summaries but are not fit parameters.
_COMPARE_NAMES = {"T_eq", "ratio", "U_implied", "field_scale", "extra_power", "extra_power_solar",
                  "extra_luminosity"}


def format_seconds(s: float) -> str:
    """``"42 s"``, ``"3.5 min"`` or ``"2.1 h"``."""
    if not np.isfinite(s):
        return "unknown"
    if s < 90:
        return f"{s:.0f} s" if s >= 10 else f"{s:.2g} s"
    if s < 5400:
        return f"{s / 60:.1f} min"
    return f"{s / 3600:.1f} h"


def show(wf: Workflow, tab: Table, mapped: MappedCatalog, *, max_sources: int = 200,
         n_timed: int = 3) -> str:
    """The dry-run text of ``sedtemp check --show``."""
    units = {spec["flux"]: str(tab[spec["flux"]].unit) for spec in wf.bands.values()
             if spec["flux"] in tab.colnames and tab[spec["flux"]].unit is not None}
    out = ["", "== resolved workflow ==", resolved_toml(wf), "== bands ==",
           format_band_table(band_rows(wf), units), "", "== model, opacity, priors, field =="]
    out += physics_lines(wf)
    out += ["", "== predicted equilibrium temperature =="]
    out += _t_eq_lines(wf, mapped, max_sources)
    out += ["", "== estimated run time =="]
    out += _time_lines(wf, mapped, n_timed)
    return "\n".join(out)


def _t_eq_lines(wf, mapped, max_sources):
    r = t_eq_range(wf, mapped, max_sources=max_sources)
    if r is None:
        return ["no [[field.components]]: no prediction, no comparison"]
    sample = "all" if r["n"] + len(r["failed"]) == r["n_total"] else f"a random sample of {r['n'] + len(r['failed'])}"
    lines = []
    if r["n"]:
        lines.append(f"T_eq at beta = {r['beta']:g}: {r['min']:.1f} to {r['max']:.1f} K (median {r['median']:.1f} K) "
                     f"over {sample} of {r['n_total']} source(s); the run uses each source's fitted beta")
    if r.get("caution"):
        lines.append(r["caution"])
    if r["failed"]:
        lines.append(f"T_eq could not be computed for {len(r['failed'])} source(s):")
        keys, causes = zip(*r["failed"], strict=True)
        lines += [f"  - {x}" for x in group_causes(causes, keys)]
    return lines


def _time_lines(wf, mapped, n_timed):
    est = time_estimate(wf, mapped, n_sample=n_timed)
    if est["n_fit"] + est["n_mcmc"] == 0:
        return ["no source to fit"]
    parts = []
    if est["per_source_s"] is not None:
        parts.append(f"{est['setup_s']:.2g} s set-up + {est['per_source_s']:.2g} s per source x {est['n_fit']}")
    if est["mcmc_per_source_s"] is not None:
        parts.append(f"{est['mcmc_per_source_s']:.2g} s per MCMC source x {est['n_mcmc']}")
    line = (f"about {format_seconds(est['wall_s'])} on {est['workers']} worker(s) "
            f"({format_seconds(est['serial_s'])} on one: {'; '.join(parts)}), from timing {est['n_timed']} "
            "source(s) now; per-source plots (one MCMC fit each) come on top")
    return [line]


def _params(row):
    names = row.colnames
    return [c[: -len("_median")] for c in names if c.endswith("_median")
            and c[: -len("_median")] not in _COMPARE_NAMES and f"{c[:-7]}_p16" in names]


def _unit(row, name):
    col = row.table[name] if hasattr(row, "table") else None
    unit = getattr(col, "unit", None)
    return "" if unit is None else str(unit)


def _value(row, name):
    v = row[name]
    return float(getattr(v, "value", v))


def source_report(row: Row, wf: Workflow) -> str:
    """The summary table, prediction and verdict of one fitted source (a results row)."""
    idc = wf.catalog["id_column"]
    out = [f"source {row[idc]}: {row['method']} fit" + (f", {int(row['n_bands_used'])} band(s) used"
                                                          if "n_bands_used" in row.colnames else "")]
    head = ("parameter", "median", "68 % interval", "95 % interval", "unit")
    body = []
    for p in _params(row):
        q = {k: _value(row, f"{p}_{k}") for k in ("median", "p16", "p84", "p2_5", "p97_5") if f"{p}_{k}" in row.colnames}
        body.append((p, f"{q['median']:.4g}", f"[{q['p16']:.4g}, {q['p84']:.4g}]",
                     f"[{q['p2_5']:.4g}, {q['p97_5']:.4g}]" if "p2_5" in q else "-", _unit(row, f"{p}_median")))
    widths = [max(len(x) for x in col) for col in zip(head, *body, strict=True)]
    out += ["  " + "  ".join(x.ljust(w) for x, w in zip(line, widths, strict=True)).rstrip() for line in (head, *body)]
    if "chi2_map" in row.colnames:
        out.append(f"chi2 = {_value(row, 'chi2_map'):.3g} for {int(_value(row, 'dof'))} dof "
                   f"(reduced {_value(row, 'chi2_reduced'):.3g}); posterior predictive p = {_value(row, 'ppp'):.3g}")
    flags = str(row["fit_flags"]) if "fit_flags" in row.colnames else ""
    out.append(f"fit flags: {flags or 'none'}")
    if "T_eq_median" in row.colnames:
        out.append(f"T_eq (radiative equilibrium) = {_value(row, 'T_eq_median'):.4g} K, 68 % interval "
                   f"[{_value(row, 'T_eq_p16'):.4g}, {_value(row, 'T_eq_p84'):.4g}] K")
    elif "T_eq_point" in row.colnames:
        out.append(f"T_eq (radiative equilibrium) = {_value(row, 'T_eq_point'):.4g} K at beta = "
                   f"{_value(row, 'beta_for_T_eq'):.3g}")
    else:
        out.append("T_eq: no [[field.components]] in the workflow, so no prediction")
    if "heating_class" in row.colnames:
        out.append(f"heating class: {row['heating_class']}")
        out.append(f"verdict: {row['verdict']}")
    return "\n".join(out)
