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

and, for the figures of one source (which need its chain, not just its
row), refit it by MCMC exactly as the batch would::

    mapped = map_catalog(my_table, wf)
    res = pipeline.refit_source(wf, mapped, 17)   # FitResult of the 18th source
    pipeline.plot_source(wf, mapped, 17, "figs", T_eq=pipeline.t_eq_band(results[17]))

Every source gets its own random stream, ``SeedSequence([seed, key])`` with
``key`` a stable 64-bit hash of its id, so a source's result does not depend
on which other sources share its chunk or worker.
"""

from __future__ import annotations

import hashlib
import logging
import re
import warnings

import astropy.units as u
import numpy as np
from astropy.table import Table

from .catalog import MappedCatalog, map_catalog
from .config import Workflow
from .fields import build_field as _build_field_of
from .errors import InputError, SedtempWarning

__all__ = ["run", "fit", "predict", "compare", "process_chunk", "source_seed", "build_field",
           "fit_columns", "refit_source", "plot_source", "source_plot_stem", "t_eq_band",
           "STATUS_OK", "STATUS_SKIPPED", "STATUS_FAILED"]

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
    """The radiation field of source ``i``: its components summed and attenuated (:func:`sedtemp.fields.build_field`)."""
    return _build_field_of(mapped.field_arguments(i), A_V=float(mapped.A_V[i]))


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


def _mcmc_result(wf, mapped, i, seq, *, rescaled=True):
    """emcee fit of source i with the workflow's model, prior and calibration: (FitResult, model).

    ``rescaled``: with a per-source distance the batch fits fluxes rescaled to
    the 1 kpc grid distance (see _D_REF_M); False fits at the source's own
    distance, so the result's fluxes and SED are the source's own (plots).
    """
    from .fit import fit_source

    d_grid, factor = _scaling(wf, mapped, i)
    if not rescaled and factor != 1.0:
        d_grid, factor = float(mapped.distance_m[i]), 1.0
    model = _model(wf, mapped.redshift[i], d_grid)
    used = ~mapped.missing[i]
    flux = np.where(used, mapped.flux[i] * factor, np.nan) * (u.W / u.m**2 / u.Hz)
    err = np.where(used, mapped.err[i] * factor, np.nan) * (u.W / u.m**2 / u.Hz)
    f = wf.fit
    res = fit_source(flux, err, wf.bandset(), model=model, prior=wf.build_prior(),
                     calibration=wf.calibration_groups(), upper_limits=mapped.limit_only[i],
                     seed=seq, n_walkers=f["n_walkers"], ess_target=f["ess_target"],
                     max_steps=f["max_steps"], source_id=mapped.keys[i])
    return res, model


def _fit_mcmc(wf, mapped, i, seq):
    res, model = _mcmc_result(wf, mapped, i, seq)
    f = wf.fit
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
def _compare_one(wf, mapped, i, draws, fit_flags=None):
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
                         fit_flags=fit_flags, seed=int(seq_cmp.generate_state(1)[0]))
    return comp.columns()


def _compare_mapped(wf, mapped, draws, status, reason, fit_flags=None):
    """Compare every fitted source; ``fit_flags`` (per source) let prior-limited fits be 'unconstrained'."""
    out = []
    for i in range(len(mapped)):
        row = {}
        if status[i] == STATUS_OK and draws[i] is not None:
            try:
                row = _compare_one(wf, mapped, i, draws[i], None if fit_flags is None else fit_flags[i])
            except Exception as err:  # noqa: BLE001 - recorded per source
                err.add_note(f"while comparing source {mapped.keys[i]!r}")
                status[i], reason[i] = STATUS_FAILED, f"compare: {type(err).__name__}: {err}"
        out.append(row)
    return out


# ------------------------------------------------------- one source, in full
def refit_source(workflow: Workflow, mapped: MappedCatalog, index: int):
    """The full MCMC posterior of one catalogue source, as the batch run would sample it.

    Runs :func:`sedtemp.fit.fit_source` with the workflow's model, priors,
    calibration groups and ``[fit]`` emcee settings, seeded with the
    source's own fit seed (``source_seed(seed, key).spawn(2)[0]``). For a
    source the batch fitted by MCMC (``method = "mcmc"``) the chain is the
    batch's, bit for bit; for a grid source it is an MCMC sample of the same
    posterior. Use it for the per-source figures, which need the chain, the
    model and the photometry that a results row does not hold.

    Parameters
    ----------
    workflow : Workflow
    mapped : MappedCatalog
        The catalogue, mapped with this workflow.
    index : int
        Position of the source in ``mapped``.

    Returns
    -------
    FitResult

    Raises
    ------
    InputError
        ``index`` out of range, or the workflow skips the source (its reason).

    Notes
    -----
    With a per-source ``distance_column`` the batch samples fluxes rescaled
    to 1 kpc (the same posterior in T, beta and mass: S ~ M / D^2); the refit
    uses the source's own distance, so its fluxes are the catalogue's and its
    chain equals the batch's only up to rounding.
    """
    if isinstance(index, bool) or not isinstance(index, (int, np.integer)) or not 0 <= index < len(mapped):
        raise InputError(f"refit_source: index must be an integer in [0, {len(mapped)}), got {index!r}")
    key = str(mapped.keys[index])
    if mapped.skip_reason[index]:
        raise InputError(f"source {key!r} is skipped by this workflow ({mapped.skip_reason[index]}); "
                         "there is no fit to redo")
    seq_fit, _ = source_seed(workflow.run["seed"], key).spawn(2)
    with warnings.catch_warnings():
        # as in the batch: every sedtemp warning of the fit is also one of its flags
        warnings.simplefilter("ignore", SedtempWarning)
        res, _ = _mcmc_result(workflow, mapped, int(index), seq_fit, rescaled=False)
    return res


#: Characters kept in a figure file name made from a source id (others become "_").
_SAFE_NAME = re.compile(r"[^A-Za-z0-9._+-]")


def source_plot_stem(key: str) -> str:
    """File-name stem of a source's figures: its id with characters other than ``A-Za-z0-9._+-`` as ``_``."""
    return _SAFE_NAME.sub("_", str(key)) or "_"


def t_eq_band(row):
    """The predicted T_eq to shade on a corner plot, from a results row, in K; None if there is none.

    The 16-84 % interval ``(T_eq_p16, T_eq_p84)`` of the comparison stage
    when the row has it; else the single prediction ``T_eq`` of the predict
    stage, as three equal values (drawn as a line, no band).
    """
    names = row.colnames if hasattr(row, "colnames") else list(row.keys())

    def value(name):
        return float(u.Quantity(row[name], u.K).value) if name in names else np.nan

    lo, hi = value("T_eq_p16"), value("T_eq_p84")
    if np.isfinite(lo) and np.isfinite(hi):
        return np.array([lo, hi])
    t = value("T_eq")
    return np.full(3, t) if np.isfinite(t) else None


def plot_source(workflow: Workflow, mapped: MappedCatalog, index: int, directory, *, T_eq=None) -> list:
    """Refit one source (:func:`refit_source`) and write its corner, SED and trace plots.

    Parameters
    ----------
    workflow : Workflow
    mapped : MappedCatalog
    index : int
        Position of the source in ``mapped``.
    directory : str or Path
        Folder of the figures (created): ``<stem>_corner``, ``<stem>_sed``
        and ``<stem>_trace``, each as ``.pdf`` and ``.png``, with ``<stem>``
        from :func:`source_plot_stem`.
    T_eq : array_like, optional, keyword-only
        Predicted equilibrium temperature (K) shaded on the corner plot, as
        :func:`sedtemp.plots.corner_plot` takes it (e.g. :func:`t_eq_band`).

    Returns
    -------
    list of Path
        The files written.

    Raises
    ------
    InputError
        From :func:`refit_source` and the plotting functions.
    """
    from pathlib import Path

    from . import plots

    res = refit_source(workflow, mapped, index)
    stem = Path(directory) / source_plot_stem(mapped.keys[index])
    figures = {"corner": (plots.corner_plot, {"T_eq": T_eq}), "sed": (plots.sed_plot, {}),
               "trace": (plots.trace_plot, {})}
    written = []
    for kind, (make, options) in figures.items():
        written += plots.save_figure(make(res, **options), stem.with_name(f"{stem.name}_{kind}"))
    return written


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
        parts.append(_compare_mapped(wf, mapped, draws, status, reason,
                                     [r.get("flags", "") for r in rows]))
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
    flags = [str(v) for v in fits["flags"]] if "flags" in fits.colnames else None
    return _public(_to_table(mapped, [_compare_mapped(workflow, mapped, draws, status, reason, flags)],
                             status, reason))


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
