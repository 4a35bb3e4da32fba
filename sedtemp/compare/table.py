"""Comparison of every row of a fit-results table (the Python-API catalogue helper)."""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from typing import TYPE_CHECKING, Any

import astropy.units as u
import numpy as np
from astropy.table import Table

from ..errors import InputError
from ..fit.summary import QUANTILES
from ..radiation import RadiationField
from ..seeds import source_seed
from .chunk import column_names
from .core import CLASS_COLUMN, api_columns, compare_draws
from .thresholds import Thresholds

if TYPE_CHECKING:
    from astropy.table import Row

    from ..grains import Grain
    from ..opacity import Opacity
    from .uncertainty import FieldUncertaintySpec, OpacityUncertaintySpec

__all__ = ["compare_table", "row_seed"]

_W_PER_KG = u.W / u.kg
_UNITS = {"T_eq": u.K, "extra_power": _W_PER_KG, "extra_power_solar": u.L_sun / u.solMass,
          "extra_luminosity": u.L_sun}


def _quantity_of(name):
    """'T_eq_p2_5' -> 'T_eq': the drawn quantity a quantile column summarises."""
    for k in QUANTILES:
        if name.endswith("_" + k):
            return name[: -len(k) - 1]
    return name


def row_seed(seed: int | None, key: object) -> np.random.SeedSequence:
    """Seed of one row's comparison: :func:`sedtemp.seeds.source_seed` ``(seed, key)``, the rule of
    the grid fitter and the pipeline alike (``seed=None`` means 0)."""
    return source_seed(seed, key)


def _draws_of_row(draws, table, i, key):
    """(T, beta, mass) of row i, or a reason string when it has none."""
    if draws is None:
        cols = {"T": "draws_T", "beta": "draws_beta", "log10_mass": "draws_log10_mass"}
        d = {k: np.asarray(getattr(table[c][i], "value", table[c][i]), float)
             for k, c in cols.items() if c in table.colnames}
    elif "T" in draws and np.ndim(draws["T"]) == 2:
        d = {k: np.asarray(v)[i] for k, v in draws.items()}
    else:
        if key not in draws:
            return f"no posterior draws for id {key!r}"
        d = draws[key]
        if isinstance(d, (tuple, list)):
            # strict=False: the mass is optional, (T, beta) pairs with the first two names
            d = dict(zip(("T", "beta", "mass"), d, strict=False))
    T = d["T"]
    keep = np.isfinite(np.asarray(u.Quantity(T).value if isinstance(T, u.Quantity) else T, float))
    if not keep.any():
        return "no finite posterior draws of T"
    def pick(v):
        return (None if v is None else (v if np.ndim(v) == 0 else v[keep]))
    beta = pick(d.get("beta"))
    if beta is not None and np.ndim(beta) and not np.all(np.isfinite(beta)):
        beta = None  # a fixed-beta fit stores NaN draws of beta
    mass = pick(d.get("mass"))
    if mass is None and d.get("log10_mass") is not None:
        mass = 10.0 ** np.asarray(pick(d["log10_mass"]), float)
    return T[keep], beta, mass


def _field_of_row(field, table, i):
    if isinstance(field, RadiationField):
        return field
    if callable(field):
        return field(table[i])
    if isinstance(field, Sequence) and len(field) == len(table):
        return field[i]
    raise InputError("compare_table: field must be a RadiationField, a callable row -> field, or a "
                     f"sequence of {len(table)} fields")


def compare_table(table: Table,
                  field: RadiationField | Callable[[Row], RadiationField] | Sequence[RadiationField],
                  opacity: Opacity, *, draws: Mapping[Any, Any] | None = None, id_column: str = "id",
                  flags_column: str | None = "flags",
                  field_uncertainty: FieldUncertaintySpec | Callable[[Row], FieldUncertaintySpec] = None,
                  opacity_uncertainty: OpacityUncertaintySpec = None, projected: bool = False,
                  thresholds: Thresholds | Mapping[str, float] | None = None, grain: Grain | None = None,
                  seed: int | None = None) -> Table:
    """Run :func:`compare_draws` for every row of a fit-results table and add the columns.

    Parameters
    ----------
    table : astropy.table.Table
        One row per source (e.g. from :func:`sedtemp.fit.grid_posterior`).
    field : RadiationField, callable or sequence
        One field for all rows, a callable ``row -> field`` (per-source field
        parameters, e.g. ``lambda r: ISRF(r["U"]) + Star(2e4, 1e4, distance=r["d_pc"])``),
        or one field per row.
    opacity : Opacity
        The fit's opacity.
    draws : mapping, optional, keyword-only
        Posterior draws: a mapping ``id -> (T, beta[, mass])`` or ``id ->
        {"T": ..., "beta": ..., "mass" or "log10_mass": ...}`` (T in K, mass in
        solMass, beta None or a number for fixed-beta fits); or a mapping of
        2-D arrays (n_rows, n_draws) in row order with keys ``"T"``,
        ``"beta"``, ``"log10_mass"`` (what ``GridPosterior.summarise(...,
        keep_draws=True)`` returns). Default: the table's ``draws_T``,
        ``draws_beta``, ``draws_log10_mass`` columns (NaN-padded).
    id_column : str, keyword-only
        Column of source ids (default "id"; the row index if absent).
    flags_column : str or None, keyword-only
        Column of the fit's comma-separated trust flags, passed on as
        ``fit_flags`` (default "flags", used when present; None ignores it).
    field_uncertainty : keyword-only
        As in :func:`compare_draws`, or a callable ``row -> specification``.
    projected, thresholds, grain : keyword-only
        As in :func:`compare_draws`.
    opacity_uncertainty : keyword-only
        As in :func:`compare_draws` (default 0.3).
    seed : int, optional, keyword-only
        Row i draws its field uncertainty from :func:`row_seed` ``(seed, id)``,
        so a row's result does not depend on the other rows; shared
        uncertainties use ``seed`` itself. None means 0.

    Returns
    -------
    astropy.table.Table
        A copy of ``table`` with the columns of :meth:`Comparison.columns`
        (``T_eq_*`` in K, ``extra_power_*`` in W/kg, ``extra_power_solar_*``
        in L_sun/M_sun, ``extra_luminosity_*`` in L_sun). A row without draws,
        or whose own inputs are invalid, gets NaN, an empty ``heating_class``
        and a verdict "not compared: <reason>".

    Raises
    ------
    InputError
        No draws at all, a field argument of the wrong kind, or an error that
        concerns every row (opacity, thresholds).

    Notes
    -----
    Row by row (rows may differ in field, number of draws and uncertainty);
    the pipeline compares a chunk at once with :func:`compare_chunk`, which
    gives the same columns.
    """
    Thresholds.from_any(thresholds)  # an error here concerns every row
    if not hasattr(opacity, "kappa_si"):
        raise InputError(f"compare_table: opacity must be a sedtemp.opacity.Opacity, got {type(opacity).__name__}")
    if not (isinstance(field, RadiationField) or callable(field)
            or (isinstance(field, Sequence) and len(field) == len(table))):
        raise InputError("compare_table: field must be a RadiationField, a callable row -> field, or a "
                         f"sequence of {len(table)} fields")
    if draws is None and "draws_T" not in table.colnames:
        raise InputError("compare_table: no draws given and no 'draws_T' column; pass draws= or "
                         "fit with draws kept (e.g. pipeline.fit(..., n_keep=200))")
    ids = [k.item() if isinstance(k, np.generic) else k for k in table[id_column]] \
        if id_column in table.colnames else list(range(len(table)))
    rows, reasons = {}, {}
    for i, key in enumerate(ids):  # rows differ in field, draws and specification
        try:
            got = _draws_of_row(draws, table, i, key)
            if isinstance(got, str):
                reasons[i] = got
                continue
            fld = _field_of_row(field, table, i)
            spec = field_uncertainty(table[i]) if callable(field_uncertainty) else field_uncertainty
            flags = table[flags_column][i] if flags_column and flags_column in table.colnames else None
            rows[i] = compare_draws(*got[:2], fld, opacity, mass_draws=got[2], field_uncertainty=spec,
                                    opacity_uncertainty=opacity_uncertainty, projected=projected,
                                    thresholds=thresholds, grain=grain, fit_flags=flags,
                                    seed=row_seed(seed, key), run_seed=seed).columns()
        except InputError as err:  # this row's inputs: record the reason, go on
            reasons[i] = f"{type(err).__name__}: {err}"
    return _with_columns(table, rows, reasons)


def _with_columns(table, rows, reasons):
    out = Table(table, copy=True)
    names = list(api_columns(dict.fromkeys(column_names()))) if not rows else list(next(iter(rows.values())))
    for name in names:
        vals = [rows[i][name] if i in rows else None for i in range(len(table))]
        if name in (CLASS_COLUMN, "verdict"):
            col = np.array([v if v is not None else ("" if name == CLASS_COLUMN else f"not compared: {reasons[i]}")
                            for i, v in enumerate(vals)], dtype=str)
        elif name == "T_eq_is_upper_bound":
            col = np.array([bool(v) for v in vals])
        else:
            col = np.array([np.nan if v is None else v for v in vals], float)
            unit = _UNITS.get(_quantity_of(name))
            col = col * unit if unit is not None else col
        out[name] = col
    return out
