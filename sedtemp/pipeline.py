"""The catalogue pipeline as Python stages: fit, predict, compare, and all three.

Use these to drop sedtemp into another pipeline::

    from sedtemp.config import load_workflow
    from sedtemp import pipeline

    wf = load_workflow("workflow.toml")
    results = pipeline.run(my_table, wf)          # fit -> predict -> compare

or stage by stage (each returns an astropy Table, one row per source, in
the input order)::

    fits = pipeline.fit(my_table, wf)             # posterior summaries (+ draws)
    pred = pipeline.predict(my_table, wf, fits=fits)
    comp = pipeline.compare(my_table, wf, fits=fits)

Every source gets its own random stream, ``SeedSequence([seed, key])`` with
``key`` a stable 64-bit hash of its id, so a source's result does not depend
on which other sources share its chunk or worker.
"""

from __future__ import annotations

import hashlib
import logging
import warnings

import astropy.units as u
import numpy as np
from astropy.table import Table

from .catalog import MappedCatalog, map_catalog
from .config import Workflow, lookup_field
from .errors import InputError, SedtempWarning

__all__ = ["run", "fit", "predict", "compare", "process_chunk", "source_seed", "build_field",
           "fit_columns", "STATUS_OK", "STATUS_SKIPPED", "STATUS_FAILED"]

log = logging.getLogger(__name__)

STATUS_OK, STATUS_SKIPPED, STATUS_FAILED = "ok", "skipped", "failed"
#: Reference distance (m) of the cached grid when distances come per source: fluxes are
#: rescaled by (D / D_ref)^2, which is exact for S ~ M / D^2 and keeps the mass prior in M.
_D_REF_M = (1.0 * u.kpc).to_value(u.m)
#: Per-process cache of grid tables: (workflow digest, redshift, distance) -> GridPosterior.
_GRIDS: dict = {}
_DRAW_PREFIX = "draws_"


def source_seed(seed: int, key: str) -> np.random.SeedSequence:
    """Seed sequence of one source: the workflow seed and a stable 64-bit hash of its id.

    Python's ``hash`` is salted per process, so it is not used; BLAKE2b is.
    """
    digest = int.from_bytes(hashlib.blake2b(key.encode("utf-8"), digest_size=8).digest(), "little")
    return np.random.SeedSequence([int(seed), digest])


def build_field(mapped: MappedCatalog, i: int):
    """The radiation field of source ``i``: the sum of the workflow's components, attenuated.

    Raises
    ------
    ConfigError
        Unknown component kind.
    InputError, TypeError
        From the field constructors (bad or missing arguments).
    """
    total = None
    for args in mapped.field_arguments(i):
        args = dict(args)
        factory = lookup_field(args.pop("kind"))
        fld = factory(**args)
        total = fld if total is None else total + fld
    if total is None:
        raise InputError("the workflow has no [[field.components]]; add at least one (e.g. kind = \"isrf\")")
    av = float(mapped.A_V[i])
    return total.attenuated(av) if av > 0 else total


# ------------------------------------------------------------------------ fit
def _grid_for(wf: Workflow, redshift: float, distance_m):
    from .fit import GridPosterior

    key = (wf.digest, round(float(redshift), 9), distance_m)
    if key not in _GRIDS:
        if len(_GRIDS) > 16:  # a catalogue with many redshifts: keep memory bounded
            _GRIDS.clear()
        model = _model(wf, redshift, distance_m)
        prior = model.default_prior().updated(wf.build_prior())
        names = model.param_names
        t_nodes = np.geomspace(prior["T"].low, prior["T"].high, wf.fit["n_T"])
        b_nodes = np.linspace(prior["beta"].low, prior["beta"].high, wf.fit["n_beta"]) if "beta" in names else None
        _GRIDS[key] = GridPosterior(wf.bandset(), model=model, prior=prior,
                                    calibration=wf.calibration_groups(), T_nodes=t_nodes, beta_nodes=b_nodes)
    return _GRIDS[key]


def _model(wf, redshift, distance_m):
    dist = None if distance_m is None else distance_m * u.m
    return wf.build_model(distance=dist, redshift=redshift) if wf.model["amplitude"] == "mass" \
        else wf.build_model(redshift=redshift)


def _scaling(wf, mapped, i):
    """(grid distance in m or None, flux factor) for source i (see _D_REF_M)."""
    if wf.model["amplitude"] != "mass" or mapped.distance_m is None:
        return None, 1.0
    if wf.catalog["distance_column"] is None:
        return float(mapped.distance_m[i]), 1.0
    return _D_REF_M, (mapped.distance_m[i] / _D_REF_M) ** 2


def _fit_grid(wf, mapped, i, rng):
    d_grid, factor = _scaling(wf, mapped, i)
    grid = _grid_for(wf, mapped.redshift[i], d_grid)
    sl = slice(i, i + 1)
    cols, extra = grid.summarise(mapped.flux[sl] * factor, mapped.err[sl] * factor, mapped.limit_only[sl],
                                 n_draws=wf.fit["n_draws"], rng=rng, keep_draws=True)
    row = {k: (v[0].item() if hasattr(v[0], "item") else v[0]) for k, v in cols.items()}
    row["flags"] = ",".join(extra["flags"][0])
    row["method"] = "grid"
    row["converged"] = True
    draws = {k: v[0] for k, v in extra["draws"].items()}
    return row, draws, grid.model


def _fit_mcmc(wf, mapped, i, seq):
    from .fit import fit_source

    d_grid, factor = _scaling(wf, mapped, i)
    model = _model(wf, mapped.redshift[i], d_grid)
    used = ~mapped.missing[i]
    flux = np.where(used, mapped.flux[i] * factor, np.nan) * (u.W / u.m**2 / u.Hz)
    err = np.where(used, mapped.err[i] * factor, np.nan) * (u.W / u.m**2 / u.Hz)
    f = wf.fit
    res = fit_source(flux, err, wf.bandset(), model=model, prior=wf.build_prior(),
                     calibration=wf.calibration_groups(), upper_limits=mapped.limit_only[i],
                     seed=seq, n_walkers=f["n_walkers"], ess_target=f["ess_target"],
                     max_steps=f["max_steps"], source_id=mapped.keys[i])
    row = res.summary()
    row["method"] = "mcmc"
    rng = np.random.default_rng(seq.spawn(1)[0])
    n = len(next(iter(res.samples.values())))
    pick = rng.choice(n, size=min(f["n_draws"], n), replace=False)
    return row, {k: v[pick] for k, v in res.samples.items()}, model


def fit_columns(row, draws, model):
    """Add derived columns: T-beta posterior correlation."""
    if "beta" in draws and np.all(np.isfinite(draws["beta"])) and len(draws["T"]) > 2:
        with np.errstate(invalid="ignore", divide="ignore"):
            row["T_beta_corr"] = float(np.corrcoef(draws["T"], draws["beta"])[0, 1])
    return row


def _fit_one(wf, mapped, i, seq):
    method = "mcmc" if (wf.fit["method"] == "mcmc" or mapped.keys[i] in
                        {str(s) for s in wf.fit["mcmc_sources"]}) else "grid"
    with warnings.catch_warnings():
        # every sedtemp warning of a fit is also one of its flags (STYLE.md), which
        # the results table carries; in a batch run the flags are the record
        warnings.simplefilter("ignore", SedtempWarning)
        if method == "grid":
            return _fit_grid(wf, mapped, i, np.random.default_rng(seq))
        return _fit_mcmc(wf, mapped, i, seq)


def _empty_rows(n):
    return [dict() for _ in range(n)]


def _fit_mapped(wf, mapped):
    """Fit every source of ``mapped``; rows (dicts), draws (dicts) and statuses."""
    n = len(mapped)
    rows, draws = _empty_rows(n), [None] * n
    status, reason = np.full(n, STATUS_OK, dtype=object), mapped.skip_reason.astype(object).copy()
    status[reason != ""] = STATUS_SKIPPED
    for i in range(n):
        if status[i] != STATUS_OK:
            continue
        seq_fit, _ = source_seed(wf.run["seed"], mapped.keys[i]).spawn(2)
        try:
            row, d, model = _fit_one(wf, mapped, i, seq_fit)
            rows[i], draws[i] = fit_columns(row, d, model), d
        except Exception as err:  # a failed source gets its reason; the run goes on
            err.add_note(f"while fitting source {mapped.keys[i]!r}")
            log.warning("source %r failed: %s", mapped.keys[i], err)
            status[i], reason[i] = STATUS_FAILED, f"fit: {type(err).__name__}: {err}"
    return rows, draws, status, reason


# -------------------------------------------------------------------- predict
def _predict_one(wf, mapped, i, beta):
    from .equilibrium import equilibrium_temperature

    fld = build_field(mapped, i)
    t_eq = equilibrium_temperature(fld, wf.opacity(), beta=beta)
    return float(u.Quantity(t_eq, u.K).value)


def _beta_for_prediction(wf, fit_row):
    if fit_row and np.isfinite(fit_row.get("beta_median", np.nan)):
        return float(fit_row["beta_median"])
    if wf.model["beta"] is not None:
        return float(wf.model["beta"])
    return float(wf.opacity().beta)


def _predict_mapped(wf, mapped, fit_rows, status, reason):
    out = []
    for i in range(len(mapped)):
        row = {"T_eq": np.nan, "beta_for_T_eq": np.nan}
        if status[i] == STATUS_OK:
            beta = _beta_for_prediction(wf, fit_rows[i])
            try:
                row = {"T_eq": _predict_one(wf, mapped, i, beta), "beta_for_T_eq": beta}
            except Exception as err:  # noqa: BLE001 - recorded per source
                err.add_note(f"while predicting T_eq of source {mapped.keys[i]!r}")
                status[i], reason[i] = STATUS_FAILED, f"predict: {type(err).__name__}: {err}"
        out.append(row)
    return out


# -------------------------------------------------------------------- compare
def _compare_one(wf, mapped, i, draws):
    from .compare import compare_draws

    fld = build_field(mapped, i)
    beta = draws.get("beta")
    if beta is None or not np.all(np.isfinite(beta)):
        beta = np.full(len(draws["T"]), _beta_for_prediction(wf, None))
    mass = None
    if wf.model["amplitude"] == "mass" and "log10_mass" in draws:
        mass = 10.0 ** np.asarray(draws["log10_mass"]) * u.solMass
    _, seq_cmp = source_seed(wf.run["seed"], mapped.keys[i]).spawn(2)
    f = wf.field
    comp = compare_draws(np.asarray(draws["T"]) * u.K, np.asarray(beta), fld, wf.opacity(),
                         mass_draws=mass, field_uncertainty=f["uncertainty"] or None,
                         projected=f["projected"], thresholds=wf.compare["thresholds"] or None,
                         seed=int(seq_cmp.generate_state(1)[0]))
    return comp.columns()


def _compare_mapped(wf, mapped, draws, status, reason):
    out = []
    for i in range(len(mapped)):
        row = {}
        if status[i] == STATUS_OK and draws[i] is not None:
            try:
                row = _compare_one(wf, mapped, i, draws[i])
            except Exception as err:  # noqa: BLE001 - recorded per source
                err.add_note(f"while comparing source {mapped.keys[i]!r}")
                status[i], reason[i] = STATUS_FAILED, f"compare: {type(err).__name__}: {err}"
        out.append(row)
    return out


# ------------------------------------------------------------------ assembly
def _to_table(mapped, parts, status, reason, draws=None, n_keep=0):
    """Rows of dicts (one list per stage) -> Table with the id column first."""
    n = len(mapped)
    tab = Table()
    tab[mapped.id_column] = mapped.ids
    names = []
    for rows in parts:
        for r in rows:
            names.extend(k for k in r if k not in names)
    for name in names:
        vals = []
        for i in range(n):
            v = None
            for rows in parts:
                if name in rows[i]:
                    v = rows[i][name]
            vals.append(v)
        tab[name] = _column(vals)
    tab["status"] = np.asarray(status, dtype=str)
    tab["reason"] = np.asarray(reason, dtype=str)
    tab["_row"] = mapped.rows
    tab["_key"] = mapped.keys
    if draws is not None and n_keep:
        keys = sorted({k for d in draws if d is not None for k in d})
        for k in keys:
            arr = np.full((n, n_keep), np.nan)
            for i, d in enumerate(draws):
                if d is not None and k in d:
                    v = np.asarray(d[k], float)[:n_keep]
                    arr[i, :v.size] = v
            tab[_DRAW_PREFIX + k] = arr
    _set_units(tab)
    return tab


def _column(vals):
    sample = next((v for v in vals if v is not None), None)
    if isinstance(sample, (bool, np.bool_)):
        return np.array([bool(v) if v is not None else False for v in vals])
    if isinstance(sample, (int, float, np.integer, np.floating)):
        if all(isinstance(v, (int, np.integer)) and not isinstance(v, bool) for v in vals if v is not None) \
                and all(v is not None for v in vals):
            return np.array(vals, dtype=int)
        return np.array([float(v) if v is not None else np.nan for v in vals])
    if isinstance(sample, u.Quantity):
        unit = sample.unit
        return u.Quantity([u.Quantity(v).to_value(unit) if v is not None else np.nan for v in vals], unit)
    return np.array(["" if v is None else str(v) for v in vals], dtype=str)


def _set_units(tab):
    for name in tab.colnames:
        col = tab[name]
        if col.unit is not None or col.dtype.kind != "f":
            continue
        if name.startswith(("T_", "draws_T")) and not name.startswith(("T_beta", "T_eq_ratio")) \
                and not name.endswith(("_ess", "_corr")):
            col.unit = u.K
        elif name.startswith(("log10_mass", "draws_log10_mass")) and not name.endswith("_ess"):
            col.unit = u.dex(u.solMass)
        elif name.startswith(("log10_N_H2", "draws_log10_N_H2")) and not name.endswith("_ess"):
            col.unit = u.dex(u.cm**-2)


def _compare_available() -> bool:
    import importlib.util

    return importlib.util.find_spec("sedtemp.compare") is not None


def process_chunk(wf: Workflow, mapped: MappedCatalog, *, stages=("fit", "predict", "compare"),
                  n_keep=None) -> Table:
    """Run the stages on every source of a (sub-)catalogue; one row per source.

    This is the task a worker runs. It never raises for one bad source: that
    source's row has ``status = "failed"`` and the ``reason``.

    Parameters
    ----------
    wf : Workflow
    mapped : MappedCatalog
    stages : tuple of str, keyword-only
        Subset of ("fit", "predict", "compare"), in that order.
    n_keep : int, optional, keyword-only
        Posterior draws kept per source in ``draws_<param>`` columns
        (default ``[output] n_keep``); 0 keeps none.

    Returns
    -------
    Table
    """
    n_keep = wf.output["n_keep"] if n_keep is None else n_keep
    use_compare = ("compare" in stages and wf.compare["enabled"] and bool(wf.field["components"])
                   and _compare_available())
    use_predict = "predict" in stages and bool(wf.field["components"])
    rows, draws, status, reason = _fit_mapped(wf, mapped)
    parts = [rows]
    if use_predict:
        parts.append(_predict_mapped(wf, mapped, rows, status, reason))
    if use_compare:
        parts.append(_compare_mapped(wf, mapped, draws, status, reason))
    return _to_table(mapped, parts, status, reason, draws=draws, n_keep=n_keep)


def _mapped(table, wf):
    return table if isinstance(table, MappedCatalog) else map_catalog(table, wf)


def _public(tab):
    return tab[[c for c in tab.colnames if not c.startswith("_")]]


def fit(table, workflow: Workflow, *, n_keep=None) -> Table:
    """Fit stage alone: posterior summaries, diagnostics and (optionally) draws per source.

    Parameters
    ----------
    table : Table or MappedCatalog
        The catalogue (validated with :func:`~sedtemp.catalog.map_catalog`).
    workflow : Workflow
    n_keep : int, optional, keyword-only
        Draws kept per source as ``draws_T``, ``draws_beta``, ... (n, n_keep)
        columns, which :func:`compare` uses. Default ``[output] n_keep``.

    Returns
    -------
    Table
        id column, ``T_*``, ``beta_*``, amplitude summaries, ``chi2_*``,
        ``ppp``, ``flags``, ``method``, ``status``, ``reason``.
    """
    return _public(process_chunk(workflow, _mapped(table, workflow), stages=("fit",), n_keep=n_keep))


def predict(table, workflow: Workflow, *, fits=None) -> Table:
    """Predict stage alone: T_eq of each source's field at beta (fitted median if ``fits`` is given).

    Returns
    -------
    Table
        id column, ``T_eq`` (K), ``beta_for_T_eq``.
    """
    mapped = _mapped(table, workflow)
    n = len(mapped)
    rows = [dict() for _ in range(n)]
    if fits is not None:
        rows = [{"beta_median": float(r["beta_median"])} if "beta_median" in fits.colnames else {}
                for r in fits]
    status = np.full(n, STATUS_OK, dtype=object)
    reason = np.full(n, "", dtype=object)
    return _public(_to_table(mapped, [_predict_mapped(workflow, mapped, rows, status, reason)], status, reason))


def compare(table, workflow: Workflow, *, fits) -> Table:
    """Compare stage alone, on the posterior draws of a :func:`fit` table (``draws_*`` columns).

    Raises
    ------
    InputError
        ``fits`` has no ``draws_T`` column (run :func:`fit` with ``n_keep > 0``).
    """
    if "draws_T" not in fits.colnames:
        raise InputError("compare needs posterior draws: run pipeline.fit(..., n_keep=200) first")
    mapped = _mapped(table, workflow)
    names = [c[len(_DRAW_PREFIX):] for c in fits.colnames if c.startswith(_DRAW_PREFIX)]
    draws = []
    status = np.asarray(fits["status"], dtype=object) if "status" in fits.colnames \
        else np.full(len(mapped), STATUS_OK, dtype=object)
    for r in fits:
        d = {k: np.asarray(u.Quantity(r[_DRAW_PREFIX + k]).value) for k in names}
        draws.append(d if np.all(np.isfinite(d["T"])) else None)
    reason = np.asarray(fits["reason"], dtype=object) if "reason" in fits.colnames \
        else np.full(len(mapped), "", dtype=object)
    status, reason = status.copy(), reason.copy()
    return _public(_to_table(mapped, [_compare_mapped(workflow, mapped, draws, status, reason)], status, reason))


def run(table, workflow: Workflow, *, executor=None, output_dir=None, progress=False) -> Table:
    """fit -> predict -> compare over a whole catalogue; the results table.

    Parameters
    ----------
    table : Table or MappedCatalog
    workflow : Workflow
    executor : concurrent.futures.Executor, optional, keyword-only
        Where chunks run; default the workflow's ``[run] executor``.
    output_dir : str or Path, optional, keyword-only
        If given, checkpoint chunks there, write the results file and the
        report (a killed run resumes); default: in memory only.
    progress : bool, keyword-only
        Show a progress bar.

    Returns
    -------
    Table
        The results table (see README "Output columns").
    """
    from .batch import run_batch

    return run_batch(_mapped(table, workflow), workflow, executor=executor, output_dir=output_dir,
                     progress=progress)
