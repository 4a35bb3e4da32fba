"""The results schema: every column's name, unit, type, description, display format and UCD.

Every writer of results (the stages' chunk tables, the checkpoints, the
final results file in ECSV, FITS, VOTable or CSV) takes column metadata from
here; nothing guesses a unit from a name prefix. A column the schema does not
know is an error in :func:`spec` (so a new stage column cannot slip out
undocumented), except input columns carried through ``[output]
keep_columns``, which keep the catalogue's own metadata.

Families of columns are generated from their parameter or quantity name and
the posterior quantile keys of :data:`sedtemp.fit.summary.QUANTILES`
(``_p2_5``, ``_p16``, ``_median``, ``_p84``, ``_p97_5``).

Renamed columns (version 0.2, :data:`RENAMES`): ``flag`` -> ``heating_class``
(the comparison's one-word class), ``flags`` -> ``fit_flags`` (the fit's
comma-separated warnings), ``T_eq`` -> ``T_eq_point`` (the predict stage's
single T_eq at the median beta, unlike the ``T_eq_median`` of the
comparison's T_eq posterior).
"""

from __future__ import annotations

import functools
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import astropy.units as u
import numpy as np
from astropy.table import Column, Table

__all__ = [
    "CLASS_COLUMN",
    "DRAW_PREFIX",
    "FIT_FLAGS_COLUMN",
    "NONE_TEXT",
    "RENAMES",
    "STATUS_FAILED",
    "STATUS_OK",
    "STATUS_SKIPPED",
    "ColumnSpec",
    "assemble",
    "describe",
    "known",
    "order",
    "spec",
]

STATUS_OK, STATUS_SKIPPED, STATUS_FAILED = "ok", "skipped", "failed"
#: Text written for "no flags" / "no reason" (an empty string reads back as masked in ECSV).
NONE_TEXT = "none"
#: Prefix of the per-source posterior draw columns (n_sources, n_keep).
DRAW_PREFIX = "draws_"
#: Old name -> new name of the renamed result columns (for the CHANGELOG's table).
RENAMES = {"flag": "heating_class", "flags": "fit_flags", "T_eq": "T_eq_point"}
CLASS_COLUMN, FIT_FLAGS_COLUMN = RENAMES["flag"], RENAMES["flags"]


@dataclass(frozen=True)
class ColumnSpec:
    """Metadata of one results column."""

    name: str
    unit: str | None
    kind: str  # "f" float, "i" integer, "b" boolean, "U" text
    description: str
    format: str | None = None
    ucd: str | None = None
    group: int = 4  # order: 0 id, 1 parameters, 2 diagnostics, 3 prediction, 4 comparison, 5 class, 6 status


#: Parameters of the models: (unit, description, UCD, format).
_PARAMS = {
    "T": ("K", "dust temperature", "phys.temperature", ".3f"),
    "beta": ("", "dust emissivity index", "phys.emissivity", ".3f"),
    "log10_mass": ("dex(solMass)", "log10 of the mass (dust or gas, as the opacity is per)", "phys.mass", ".4f"),
    "log10_N_H2": ("dex(cm-2)", "log10 of the H2 column density", "phys.columnDensity", ".4f"),
    "log10_tau0": ("", "log10 of the optical depth at the opacity's reference frequency", "phys.absorption.opticalDepth", ".4f"),
}
#: Comparison quantities (quantile families): (unit, description, UCD).
_COMPARE = {
    "T_eq": ("K", "radiative-equilibrium dust temperature (posterior with the field's uncertainty)",
             "phys.temperature", ".3f"),
    "ratio": ("", "T_fit / T_eq", "arith.ratio", ".4f"),
    "U_implied": ("", "ISRF scale U that would give T_fit in equilibrium", None, ".4g"),
    "field_scale": ("", "factor on the modelled field that would give T_fit", "arith.factor", ".4g"),
    "extra_power": ("W kg-1", "power per dust (or gas) mass needed beyond the field", None, ".4g"),
    "extra_power_solar": ("solLum solMass-1", "extra power per mass in solar units", None, ".4g"),
    "extra_luminosity": ("solLum", "extra luminosity for the fitted mass", "phys.luminosity", ".4g"),
}
_STAT_TEXT = {"p2_5": "2.5th percentile", "p16": "16th percentile", "median": "median",
              "p84": "84th percentile", "p97_5": "97.5th percentile"}
_FIXED = [
    ColumnSpec("T_beta_corr", "", "f", "posterior correlation of T and beta", ".3f", "stat.correlation", 1),
    ColumnSpec("chi2_map", "", "f", "chi^2 at the maximum a posteriori (calibration included)", ".3f",
               "stat.fit.chi2", 2),
    ColumnSpec("n_bands_used", None, "i", "bands with a measurement (not limit-only); 0 when not fitted", None, "meta.number", 2),
    ColumnSpec("dof", None, "i", "degrees of freedom: bands used - free parameters; 0 when not fitted", None, "stat.fit.dof", 2),
    ColumnSpec("chi2_reduced", "", "f", "chi2_map / dof (NaN when dof <= 0)", ".3f", "stat.fit.chi2", 2),
    ColumnSpec("ppp", "", "f", "posterior predictive p-value of chi^2", ".3f", "stat.probability", 2),
    ColumnSpec("acceptance_fraction", "", "f", "mean MCMC acceptance fraction (NaN for grid fits)", ".3f",
               "stat.fit", 2),
    ColumnSpec("converged", None, "b", "fit met its convergence criteria (grid fits: true)", None, "meta.code", 2),
    ColumnSpec("method", None, "U", "fitting method: grid or mcmc", None, "meta.code", 2),
    ColumnSpec(FIT_FLAGS_COLUMN, None, "U", "comma-separated fit warnings, or 'none'", None, "meta.code.qual", 2),
    ColumnSpec("T_eq_point", "K", "f", "equilibrium T of the modelled field at beta_for_T_eq (no field "
               "uncertainty)", ".3f", "phys.temperature", 3),
    ColumnSpec("beta_for_T_eq", "", "f", "beta used for T_eq_point (fitted median or the model's)", ".3f",
               "phys.emissivity", 3),
    ColumnSpec("opacity_extrapolated_fraction", "", "f", "fraction of the absorbed power taken where the "
               "opacity law is extrapolated (a bare far-IR power law in the UV, or beyond a table)", ".3f",
               None, 3),
    ColumnSpec("p_warmer", "", "f", "posterior probability that T_fit > T_eq", ".3f", "stat.probability", 4),
    ColumnSpec("stochastic_fraction", "", "f", "fraction of draws in which grains are stochastically heated",
               ".3f", None, 4),
    ColumnSpec("T_eq_is_upper_bound", None, "b", "T_eq is an upper bound (projected star distances)",
               None, "meta.code", 4),
    ColumnSpec(CLASS_COLUMN, None, "U", "heating class: consistent, extra_heating, shielded, "
               "non_equilibrium or unconstrained", None, "meta.code.class", 5),
    ColumnSpec("verdict", None, "U", "one-sentence reading of the comparison", None, "meta.note", 5),
    ColumnSpec("status", None, "U", "ok, skipped or failed", None, "meta.code.status", 6),
    ColumnSpec("reason", None, "U", "why a source was skipped or failed, or 'none'", None, "meta.note", 6),
]


def _families() -> dict:
    out = {s.name: s for s in _FIXED}
    for p, (unit, text, ucd, fmt) in _PARAMS.items():
        for k, stat in _STAT_TEXT.items():
            out[f"{p}_{k}"] = ColumnSpec(f"{p}_{k}", unit, "f", f"{text}: posterior {stat}", fmt,
                                         f"{ucd};stat.median" if k == "median" and ucd else ucd, 1)
        out[f"{p}_map"] = ColumnSpec(f"{p}_map", unit, "f", f"{text}: maximum a posteriori", fmt, ucd, 1)
        out[f"{p}_ess"] = ColumnSpec(f"{p}_ess", "", "f", f"{text}: effective sample size (MCMC; NaN for grid)",
                                     ".1f", None, 2)
        out[f"{p}_rhat"] = ColumnSpec(f"{p}_rhat", "", "f", f"{text}: rank-normalised split R-hat "
                                      "(Vehtari et al. 2021; MCMC; NaN for grid)", ".4f", None, 2)
        out[DRAW_PREFIX + p] = ColumnSpec(DRAW_PREFIX + p, unit, "f", f"{text}: posterior draws", fmt, ucd, 7)
    out[DRAW_PREFIX + "ratio"] = ColumnSpec(DRAW_PREFIX + "ratio", "", "f", "T_fit / T_eq per posterior draw "
                                            "(kept for the population's heated fraction)", ".4f", None, 7)
    for q, (unit, text, ucd, fmt) in _COMPARE.items():
        for k, stat in _STAT_TEXT.items():
            out[f"{q}_{k}"] = ColumnSpec(f"{q}_{k}", unit, "f", f"{text}: posterior {stat}", fmt, ucd, 4)
    return out


_SPECS = _families()
_KIND_DTYPE = {"f": float, "i": np.int64, "b": bool, "U": str}


def known(name: str) -> bool:
    """True if ``name`` is a results column of the schema."""
    return name in _SPECS


def spec(name: str) -> ColumnSpec:
    """The :class:`ColumnSpec` of results column ``name``.

    Raises
    ------
    KeyError
        ``name`` is not in the schema (a stage produced an undocumented column).
    """
    try:
        return _SPECS[name]
    except KeyError:
        raise KeyError(f"results column {name!r} is not in sedtemp.pipeline.schema; add it there "
                       "with its unit and description") from None


def _renamed(name):
    return RENAMES.get(name, name)


@functools.cache
def _unit(text: str):
    """The parsed unit of a schema unit string ("" -> None: dimensionless columns carry no unit)."""
    return u.Unit(text) if text else None


def _column(name, data) -> Column:
    """A schema column built with the metadata :func:`describe` gives it (no second pass needed)."""
    s = spec(name)
    unit = _unit(s.unit) if s.unit is not None and data.dtype.kind == "f" else None
    return Column(data, name=name, unit=unit, description=s.description, format=s.format,
                  meta={"ucd": s.ucd} if s.ucd else None)


def _values(name, vals):
    """One column from per-source values (None where absent), typed by the schema."""
    s = spec(name)
    if s.kind == "f":
        return np.array([np.nan if v is None else float(u.Quantity(v).value if isinstance(v, u.Quantity) else v)
                         for v in vals], dtype=float)
    if s.kind == "i":
        return np.array([0 if v is None or (isinstance(v, float) and not np.isfinite(v)) else int(v)
                         for v in vals], dtype=np.int64)
    if s.kind == "b":
        return np.array([bool(v) if v is not None else False for v in vals], dtype=bool)
    return np.array([NONE_TEXT if v is None or str(v) == "" else str(v) for v in vals], dtype=str)


def assemble(mapped: Any, parts: Sequence[Sequence[Mapping[str, Any]]], status: Sequence[str],
             reason: Sequence[str], *, draws: Sequence[Mapping[str, Any] | None] | None = None, n_keep: int = 0,
             workflow: Any = None) -> Table:  # noqa: ARG001 - kept for a uniform call signature
    # mapped: MappedCatalog, workflow: Workflow (Any: the catalogue and config modules import this one)
    """Per-stage row dicts -> one Table: id first, schema columns in order, units and metadata set.

    Parameters
    ----------
    mapped : MappedCatalog
    parts : list of list of dict
        For each stage, one dict of values per source (keys: stage column names;
        old names of :data:`RENAMES` are renamed here).
    status, reason : sequence of str (n,)
    draws : list of dict or None, optional, keyword-only
        Per-source posterior draws; the first ``n_keep`` go to ``draws_<param>``.
    n_keep : int, keyword-only
    workflow : Workflow, optional, keyword-only
        Gives ``[output] keep_columns`` (copied from ``mapped.kept``).

    Returns
    -------
    Table
        With the private columns ``_row`` and ``_key`` last.
    """
    n = len(mapped)
    tab = Table()
    tab[mapped.id_column] = mapped.ids
    values: dict = {}
    names: dict = {}  # stage key -> column name (renamed once per key, not once per cell)
    for rows in parts:
        for i, r in enumerate(rows):
            for k, v in r.items():
                name = names.get(k)
                if name is None:
                    name = names[k] = _renamed(k)
                col = values.get(name)
                if col is None:
                    col = values[name] = [None] * n
                col[i] = v
    values["status"] = list(status)
    values["reason"] = list(reason)
    for name in order(values):
        tab[name] = _column(name, _values(name, values[name]))
    if draws is not None and n_keep:
        for k in sorted({k for d in draws if d is not None for k in d}):
            arr = np.full((n, n_keep), np.nan)
            for i, d in enumerate(draws):
                if d is not None and k in d:
                    v = np.asarray(d[k], float)[:n_keep]
                    arr[i, :v.size] = v
            tab[DRAW_PREFIX + k] = _column(DRAW_PREFIX + k, arr)
    for name, col in (getattr(mapped, "kept", None) or {}).items():
        tab[name] = col
    tab["_row"] = mapped.rows
    tab["_key"] = mapped.keys
    return describe(tab)  # a no-op on the columns built above; the kept ones the schema knows


def order(names: Iterable[str]) -> list[str]:
    """Schema column names sorted by group, stable within a group."""
    return sorted(names, key=lambda c: spec(c).group)


def describe(tab: Table) -> Table:
    """Set unit, description, format and (VOTable) UCD of every schema column, in place; ``tab``.

    Cheap on a table already described (a chunk described again on its way to
    the results file): only what differs is set (setting a format makes astropy
    format the column to check it).
    """
    for name in tab.colnames:
        if not known(name):
            continue
        s = spec(name)
        col = tab[name]
        if s.unit is not None and col.dtype.kind == "f":
            unit = _unit(s.unit)
            if col.unit is not unit:
                col.unit = unit
        col.description = s.description
        if col.format != s.format:
            col.format = s.format
        if s.ucd:
            col.meta["ucd"] = s.ucd
    return tab
