"""The three stages over one chunk of sources: fit, predict, compare.

Each stage takes the workflow, a mapped chunk (:class:`MappedCatalog`) and
plain arrays, and returns columns (one value per source) plus the failures
of the sources it could not do (``{index: reason}``). They never call the
batch runner: :func:`process_chunk` chains them for one chunk, and the
runners (:mod:`sedtemp.pipeline.batch`, :mod:`sedtemp.pipeline.api`) sit
above.

* :func:`fit_stage`: grid posteriors on BLOCKS of sources (one call of
  :meth:`GridPosterior.summarise` per (redshift, distance) group, one
  Generator per source), emcee for the ``mcmc_sources``;
* :func:`predict_stage`: T_eq of each source's field at one beta per source;
* :func:`compare_stage`: the comparison of each source's posterior draws.

``predict_stage`` and ``compare_stage`` still loop over per-source calls
inside; each loop is the one place a vectorised chunk call replaces.

Every source gets its own random stream (:func:`sedtemp.seeds.source_seed`,
spawned into a fit and a compare stream), so a source's result does not
depend on which other sources share its chunk or worker.
"""

from __future__ import annotations

import logging
import time
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import astropy.units as u
import numpy as np

from ..errors import SedtempWarning
from ..fields import build_field
from ..seeds import source_seed
from .catalog import MappedCatalog
from .config import Workflow
from .schema import STATUS_FAILED, STATUS_OK, STATUS_SKIPPED, assemble

if TYPE_CHECKING:
    from astropy.table import Table

    from ..fit import FitResult, GridPosterior
    from ..models import SEDModel
    from ..radiation import RadiationField

__all__ = [
    "FitOutput",
    "column_rows",
    "compare_stage",
    "draws_arrays",
    "fit_method",
    "fit_stage",
    "flux_scaling",
    "grid_for",
    "mcmc_result",
    "model_for",
    "predict_stage",
    "prediction_beta",
    "process_chunk",
    "source_field",
    "source_streams",
]

log = logging.getLogger(__name__)

#: Reference distance (m) of the cached grid when distances come per source: fluxes are
#: rescaled by (D / D_ref)^2, which is exact for S ~ M / D^2 and keeps the mass prior in M.
_D_REF_M = (1.0 * u.kpc).to_value(u.m)
#: Per-process cache of grid tables: (results digest, redshift, distance) -> GridPosterior.
#: The digest is computed from the workflow's current content, so a workflow edited after
#: parsing never gets another workflow's grid.
_GRIDS: dict = {}
_GRID_CACHE_SIZE = 16


def source_streams(wf: Workflow, key: str) -> tuple[np.random.SeedSequence, np.random.SeedSequence]:
    """(fit stream, compare stream) of source ``key``: ``source_seed(seed, key).spawn(2)``."""
    a, b = source_seed(wf.run["seed"], key).spawn(2)
    return a, b


def source_field(mapped: MappedCatalog, i: int) -> RadiationField:
    """The radiation field of source ``i`` (:func:`sedtemp.fields.build_field`)."""
    return build_field(mapped.field_arguments(i), A_V=float(mapped.A_V[i]))


def model_for(wf: Workflow, redshift: float, distance_m: float | None) -> SEDModel:
    """The workflow's SED model at this redshift and distance (m; None when the amplitude is no mass)."""
    dist = None if distance_m is None else distance_m * u.m
    return wf.build_model(distance=dist, redshift=redshift) if wf.model["amplitude"] == "mass" \
        else wf.build_model(redshift=redshift)


def grid_for(wf: Workflow, redshift: float, distance_m: float | None, digest: str | None = None) -> GridPosterior:
    """The cached :class:`GridPosterior` of the workflow at this redshift and grid distance (m)."""
    from ..fit import GridPosterior

    key = (digest or wf.results_digest(), round(float(redshift), 9), distance_m)
    if key not in _GRIDS:
        if len(_GRIDS) >= _GRID_CACHE_SIZE:  # a catalogue with many redshifts: memory stays bounded
            _GRIDS.clear()
        model = model_for(wf, redshift, distance_m)
        prior = model.default_prior().updated(wf.build_prior())
        t_nodes = np.geomspace(prior["T"].low, prior["T"].high, wf.fit["n_T"])
        b_nodes = (np.linspace(prior["beta"].low, prior["beta"].high, wf.fit["n_beta"])
                   if "beta" in model.param_names else None)
        _GRIDS[key] = GridPosterior(wf.bandset(), model=model, prior=prior,
                                    calibration=wf.calibration_groups(), T_nodes=t_nodes, beta_nodes=b_nodes)
    return _GRIDS[key]


def flux_scaling(wf: Workflow, mapped: MappedCatalog, i: int) -> tuple[float | None, float]:
    """(grid distance in m or None, flux factor) for source i (see _D_REF_M)."""
    if wf.model["amplitude"] != "mass" or mapped.distance_m is None:
        return None, 1.0
    if wf.catalog["distance_column"] is None:
        return float(mapped.distance_m[i]), 1.0
    return _D_REF_M, (mapped.distance_m[i] / _D_REF_M) ** 2


def fit_method(wf: Workflow, key: str) -> str:
    """"mcmc" for the workflow's MCMC sources (or ``method = "mcmc"``), else "grid"."""
    mcmc = wf.fit["method"] == "mcmc" or key in {str(s) for s in wf.fit["mcmc_sources"]}
    return "mcmc" if mcmc else "grid"


@dataclass
class FitOutput:
    """What the fit stage gives the later stages: rows, draws and per-source status."""

    rows: list
    draws: list
    status: np.ndarray
    reason: np.ndarray
    methods: list = field(default_factory=list)


def _fail(out, i, stage, key, err):
    err.add_note(f"while running the {stage} stage on source {key!r}")
    log.warning("source %r failed (%s): %s", key, stage, err)
    out.status[i], out.reason[i] = STATUS_FAILED, f"{stage}: {type(err).__name__}: {err}"


def _grid_block(wf, mapped, idx, out, digest):
    """Grid-fit the sources ``idx`` (same grid key) in one block call."""
    d_grid, _ = flux_scaling(wf, mapped, idx[0])
    grid = grid_for(wf, mapped.redshift[idx[0]], d_grid, digest)
    factor = np.array([flux_scaling(wf, mapped, i)[1] for i in idx])[:, None]
    rngs = [np.random.default_rng(source_streams(wf, mapped.keys[i])[0]) for i in idx]
    cols, extra = grid.summarise(mapped.flux[idx] * factor, mapped.err[idx] * factor, mapped.limit_only[idx],
                                 n_draws=wf.fit["n_draws"], rng=rngs, keep_draws=True)
    for j, i in enumerate(idx):
        row = {k: (v[j].item() if hasattr(v[j], "item") else v[j]) for k, v in cols.items()}
        row.update(flags=",".join(extra["flags"][j]), method="grid", converged=True)
        out.rows[i] = row
        out.draws[i] = {k: np.asarray(v[j])[: wf.fit["n_draws"]] for k, v in extra["draws"].items()}


def mcmc_result(wf: Workflow, mapped: MappedCatalog, i: int, seq: np.random.SeedSequence, *,
                rescaled: bool = True) -> tuple[FitResult, SEDModel]:
    """emcee fit of source i with the workflow's model, prior and calibration: (FitResult, model).

    ``rescaled``: with a per-source distance the batch fits fluxes rescaled to
    the 1 kpc grid distance (see _D_REF_M); False fits at the source's own
    distance, so the result's fluxes and SED are the source's own (plots).
    """
    from ..fit import fit_source

    d_grid, factor = flux_scaling(wf, mapped, i)
    if not rescaled and factor != 1.0:
        d_grid, factor = float(mapped.distance_m[i]), 1.0
    model = model_for(wf, mapped.redshift[i], d_grid)
    used = ~mapped.missing[i]
    flux = np.where(used, mapped.flux[i] * factor, np.nan) * (u.W / u.m**2 / u.Hz)
    err = np.where(used, mapped.err[i] * factor, np.nan) * (u.W / u.m**2 / u.Hz)
    f = wf.fit
    res = fit_source(flux, err, wf.bandset(), model=model, prior=wf.build_prior(),
                     calibration=wf.calibration_groups(), upper_limits=mapped.limit_only[i],
                     seed=seq, n_walkers=f["n_walkers"], ess_target=f["ess_target"],
                     max_steps=f["max_steps"], source_id=mapped.keys[i])
    return res, model


def _fit_mcmc(wf, mapped, i, out):
    seq = source_streams(wf, mapped.keys[i])[0]
    res, _ = mcmc_result(wf, mapped, i, seq)
    row = res.summary()
    row["method"] = "mcmc"
    rng = np.random.default_rng(seq.spawn(1)[0])
    n = len(next(iter(res.samples.values())))
    pick = rng.choice(n, size=min(wf.fit["n_draws"], n), replace=False)
    out.rows[i], out.draws[i] = row, {k: v[pick] for k, v in res.samples.items()}


def fit_stage(wf: Workflow, mapped: MappedCatalog) -> FitOutput:
    """Fit every source of a chunk: grid blocks, then the MCMC sources one by one.

    Returns
    -------
    FitOutput
        ``rows`` (dict of summary values per source, empty if not fitted),
        ``draws`` (dict of arrays (n_draws,) per parameter, or None),
        ``status`` and ``reason`` (object arrays (n,)).
    """
    n = len(mapped)
    out = FitOutput(rows=[{} for _ in range(n)], draws=[None] * n,
                    status=np.full(n, STATUS_OK, dtype=object), reason=mapped.skip_reason.astype(object).copy())
    out.status[out.reason != ""] = STATUS_SKIPPED
    todo = np.flatnonzero(out.status == STATUS_OK)
    out.methods = [fit_method(wf, k) for k in mapped.keys]
    grid_idx = [i for i in todo if out.methods[i] == "grid"]
    groups: dict = {}
    for i in grid_idx:
        groups.setdefault((round(float(mapped.redshift[i]), 9), flux_scaling(wf, mapped, i)[0]), []).append(i)
    digest = wf.results_digest() if groups else None
    with warnings.catch_warnings():
        # every sedtemp warning of a fit is also one of its flags (STYLE.md), which
        # the results table carries; in a batch run the flags are the record
        warnings.simplefilter("ignore", SedtempWarning)
        for idx in groups.values():
            try:
                _grid_block(wf, mapped, np.asarray(idx), out, digest)
            except Exception:  # noqa: BLE001 - find the failing source(s) one by one
                for i in idx:
                    try:
                        _grid_block(wf, mapped, np.asarray([i]), out, digest)
                    except Exception as err:  # noqa: BLE001 - recorded per source, the run goes on
                        _fail(out, i, "fit", mapped.keys[i], err)
        for i in todo:
            if out.methods[i] == "mcmc":
                try:
                    _fit_mcmc(wf, mapped, i, out)
                except Exception as err:  # noqa: BLE001 - recorded per source, the run goes on
                    _fail(out, i, "fit", mapped.keys[i], err)
    return out


def _default_beta(wf):
    return float(wf.model["beta"]) if wf.model["beta"] is not None else float(wf.opacity().beta)


def prediction_beta(wf: Workflow, fit_rows: Sequence[Mapping[str, Any] | None]) -> np.ndarray:
    """beta of each source's prediction: the fitted median, else [model] beta, else the opacity's."""
    default = _default_beta(wf)
    vals = [r.get("beta_median", np.nan) if r else np.nan for r in fit_rows]
    beta = np.asarray(vals, dtype=float)
    return np.where(np.isfinite(beta), beta, default)


def _fields_of(mapped, idx, failures, stage, cache=None):
    """Per-source fields of the sources ``idx``; a source whose field cannot be built fails alone.

    ``cache`` (index -> field) lets the predict and compare stages of one chunk
    build each source's field once.
    """
    cache = {} if cache is None else cache
    fields, ok = [], []
    for i in idx:
        try:
            if i not in cache:
                cache[i] = source_field(mapped, i)
            fields.append(cache[i])
            ok.append(i)
        except Exception as err:  # noqa: BLE001 - recorded per source
            failures[i] = f"{stage}: {type(err).__name__}: {err}"
    return fields, np.asarray(ok, dtype=int)


def predict_stage(wf: Workflow, mapped: MappedCatalog, beta: np.ndarray, active: np.ndarray, *,
                  fields: dict | None = None) -> tuple[dict[str, np.ndarray], dict[int, str]]:
    """T_eq (K) of each active source's field at its ``beta``: one chunk call.

    Returns
    -------
    columns : dict of str -> ndarray (n,)
        ``T_eq_point`` (K), ``beta_for_T_eq`` and ``opacity_extrapolated_fraction``;
        NaN where not active or failed.
    failures : dict of int -> str

    ``fields`` (keyword-only): a per-chunk cache of the sources' fields
    (index -> field), filled here and reused by :func:`compare_stage`.
    """
    from ..equilibrium import predict_chunk

    n = len(mapped)
    cols = {"T_eq_point": np.full(n, np.nan), "beta_for_T_eq": np.full(n, np.nan),
            "opacity_extrapolated_fraction": np.full(n, np.nan)}
    failures: dict = {}
    built, idx = _fields_of(mapped, np.flatnonzero(active), failures, "predict", fields)
    if idx.size == 0:
        return cols, failures
    opacity = wf.opacity()
    try:
        with warnings.catch_warnings():
            # the fraction is a column (and the 'opacity_extrapolated' fit flag in
            # the comparison); one warning per chunk would only repeat it
            warnings.simplefilter("ignore", SedtempWarning)
            res = predict_chunk(built, opacity, beta[idx], details=True)
    except Exception as err:  # noqa: BLE001 - the whole chunk failed: record it per source
        for i in idx:
            failures[i] = f"predict: {type(err).__name__}: {err}"
        return cols, failures
    cols["T_eq_point"][idx] = res["T_eq"]
    cols["beta_for_T_eq"][idx] = beta[idx]
    cols["opacity_extrapolated_fraction"][idx] = res["opacity_extrapolated_fraction"]
    return cols, failures


def draws_arrays(draws: list, n_draws: int, names: Sequence[str] = ("T", "beta", "log10_mass")) -> dict:
    """Per-source draw dicts -> arrays (n, n_draws) per parameter, NaN-padded (None: absent)."""
    n = len(draws)
    out = {}
    for name in names:
        if not any(d is not None and name in d for d in draws):
            out[name] = None
            continue
        arr = np.full((n, n_draws), np.nan)
        for i, d in enumerate(draws):
            if d is not None and name in d:
                v = np.asarray(d[name], float)[:n_draws]
                arr[i, :v.size] = v
        out[name] = arr
    return out


def _field_uncertainty(wf: Workflow):
    """The workflow's field uncertainty: None, a fraction, or a shared ScaleUncertainty."""
    f = wf.field
    if not f["uncertainty"]:
        return None
    if f["uncertainty_shared"]:
        from ..compare import ScaleUncertainty

        return ScaleUncertainty(1.0 + float(f["uncertainty"]), shared=True)
    return float(f["uncertainty"])


def _wants_ratio_draws(wf: Workflow) -> bool:
    """Per-draw T_fit / T_eq are kept for the population stage's heated fraction."""
    pop = wf.population
    return bool(pop.get("enabled")) and pop.get("equilibrium_scatter") is not None


def _compare_stream(wf: Workflow, key: str) -> np.random.SeedSequence:
    """The compare stream of :func:`source_streams` (its second child) without spawning the first.

    ``spawn`` gives child i the parent's entropy with spawn key (i,), so this is
    the same SeedSequence (tests/test_compare_speed_paths.py checks it).
    """
    return np.random.SeedSequence(source_seed(wf.run["seed"], key).entropy, spawn_key=(1,))


def _compare_group(wf, mapped, idx, T, beta, mass, fit_flags, fields, opacity, keep_draws=False):
    from ..compare import compare_chunk

    f = wf.field
    seeds = [np.random.SeedSequence(int(_compare_stream(wf, mapped.keys[i]).generate_state(1)[0])) for i in idx]
    return compare_chunk(T, beta, fields, opacity, mass_draws=mass,
                         field_uncertainty=_field_uncertainty(wf),
                         opacity_uncertainty=float(wf.compare["opacity_uncertainty"]),
                         projected=f["projected"], thresholds=wf.compare["thresholds"] or None,
                         fit_flags=None if fit_flags is None else [fit_flags[i] for i in idx],
                         seeds=seeds, run_seed=wf.run["seed"], keep_draws=keep_draws)


def compare_stage(wf: Workflow, mapped: MappedCatalog, T_draws: np.ndarray, beta_draws: np.ndarray | None, *,
                  mass_draws: np.ndarray | None = None, fit_flags: Sequence[str] | None = None,
                  active: np.ndarray | None = None, fields: dict | None = None
                  ) -> tuple[dict[str, np.ndarray], dict[int, str]]:
    """The comparison of every active source's draws, one chunk call per draw count.

    Parameters
    ----------
    T_draws, beta_draws : ndarray (n, n_draws)
        Posterior draws (K; dimensionless), NaN-padded; ``beta_draws`` None
        for a fixed-beta model.
    mass_draws : ndarray (n, n_draws), optional, keyword-only
        log10 mass draws (solMass) when the amplitude is a mass.
    fit_flags : sequence of str, optional, keyword-only
        Each source's fit flags (prior-limited fits become ``unconstrained``).
    active : ndarray of bool (n,), optional, keyword-only
    fields : dict, optional, keyword-only
        Per-chunk cache of the sources' fields (index -> field), e.g. the
        one :func:`predict_stage` filled.

    Returns
    -------
    columns : dict of str -> ndarray (n,)
        The comparison columns (as :meth:`Comparison.columns` names them);
        None where not active or failed.
    failures : dict of int -> str

    Notes
    -----
    Sources are grouped by their number of finite draws (grid fits all have
    ``n_draws``; MCMC fits may have fewer) and each group goes through
    :func:`sedtemp.compare.compare_chunk`, which equals the per-source
    :func:`~sedtemp.compare.compare_draws` with the same seed to 1e-10.
    If a whole group fails, its sources are retried one by one so that only
    the bad ones fail.
    """
    n = len(mapped)
    active = np.ones(n, bool) if active is None else active
    failures: dict = {}
    built, idx = _fields_of(mapped, np.flatnonzero(active), failures, "compare", fields)
    field_of = dict(zip(idx.tolist(), built, strict=True))
    opacity = wf.opacity()
    default_beta = _default_beta(wf)
    counts = np.isfinite(T_draws).sum(axis=1) if idx.size else np.zeros(n, int)
    columns: dict = {}  # name -> object array (n,), None where not compared
    for m in np.unique(counts[idx]) if idx.size else []:
        group = idx[counts[idx] == m]
        _compare_groups(wf, mapped, group, int(m), T_draws, beta_draws, mass_draws, fit_flags,
                        field_of, opacity, default_beta, columns, failures)
    return columns, failures


def _group_arrays(wf, group, m, T_draws, beta_draws, mass_draws, default_beta):
    # every row of the group has exactly m finite T draws: the finite ones, in order, row by row
    t_rows = np.asarray(T_draws, float)[group]
    keep = np.isfinite(t_rows)
    T = t_rows[keep].reshape(len(group), m)
    beta = np.full_like(T, default_beta)
    if beta_draws is not None:
        b = np.asarray(beta_draws, float)[group][keep].reshape(len(group), m)
        beta = np.where(np.isfinite(b), b, default_beta)
    mass = None
    if wf.model["amplitude"] == "mass" and mass_draws is not None:
        mass = 10.0 ** np.asarray(mass_draws, float)[group][keep].reshape(len(group), m)
    return T, beta, mass


def _compare_groups(wf, mapped, group, m, T_draws, beta_draws, mass_draws, fit_flags, field_of,
                    opacity, default_beta, columns, failures):
    """Compare ``group`` in one call, into ``columns``; on failure, one source at a time to find the bad ones."""
    T, beta, mass = _group_arrays(wf, group, m, T_draws, beta_draws, mass_draws, default_beta)
    fields = [field_of[i] for i in group]
    with warnings.catch_warnings():
        # a warning of the comparison is also a column or flag of its row
        warnings.simplefilter("ignore", SedtempWarning)
        try:
            cols = _compare_group(wf, mapped, group, T, beta, mass, fit_flags, fields, opacity,
                                  keep_draws=_wants_ratio_draws(wf))
        except Exception as err:  # noqa: BLE001 - retried per source below
            if len(group) == 1:
                err.add_note(f"while comparing source {mapped.keys[group[0]]!r}")
                failures[int(group[0])] = f"compare: {type(err).__name__}: {err}"
                return
            for j in range(len(group)):
                _compare_groups(wf, mapped, group[j:j + 1], m, T_draws, beta_draws, mass_draws, fit_flags,
                                field_of, opacity, default_beta, columns, failures)
            return
    ratio = cols.pop("draws_ratio", None)
    cols.pop("draws_T_eq", None)
    n = len(mapped)
    for k, v in cols.items():  # the group's values (numpy scalars) into its rows of each column
        columns.setdefault(k, np.full(n, None, dtype=object))[group] = list(v)
    if ratio is not None:  # per-draw T_fit / T_eq, for the population's heated fraction
        col = columns.setdefault("_ratio_draws", np.full(n, None, dtype=object))
        for j, i in enumerate(group):
            col[i] = ratio[j]


def column_rows(columns: dict, n: int) -> list[dict]:
    """Columns (name -> array (n,)) -> one dict per source, as :func:`schema.assemble` takes them."""
    return [{k: v[i] for k, v in columns.items()} for i in range(n)]


def _apply(failures, status, reason):
    for i, why in failures.items():
        status[i], reason[i] = STATUS_FAILED, why


#: Seconds spent in each stage of :func:`process_chunk` in this process since
#: import (wall clock; read by benchmarks/run.py for the share of each stage).
STAGE_SECONDS: dict = {"fit": 0.0, "predict": 0.0, "compare": 0.0, "assemble": 0.0}


def process_chunk(wf: Workflow, mapped: MappedCatalog, *, stages: Sequence[str] = ("fit", "predict", "compare"),
                  n_keep: int | None = None) -> Table:
    """Run the stages on every source of a (sub-)catalogue; one row per source (a Table).

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
        Columns in the order and with the units of :mod:`sedtemp.pipeline.schema`,
        plus the private ``_row`` and ``_key``.
    """
    n_keep = wf.output["n_keep"] if n_keep is None else n_keep
    has_field = bool(wf.field["components"])
    t0 = time.perf_counter()
    fit = fit_stage(wf, mapped)
    t1 = time.perf_counter()
    STAGE_SECONDS["fit"] += t1 - t0
    parts = [fit.rows]
    ok = fit.status == STATUS_OK
    fields: dict = {}  # each source's field, built once for both stages
    if "predict" in stages and has_field:
        cols, failures = predict_stage(wf, mapped, prediction_beta(wf, fit.rows), ok, fields=fields)
        _apply(failures, fit.status, fit.reason)
        parts.append(column_rows(cols, len(mapped)))
    t2 = time.perf_counter()
    STAGE_SECONDS["predict"] += t2 - t1
    if "compare" in stages and has_field and wf.compare["enabled"]:
        arrays = draws_arrays(fit.draws, wf.fit["n_draws"])
        active = (fit.status == STATUS_OK) & np.array([d is not None for d in fit.draws], bool)
        cols, failures = compare_stage(wf, mapped, arrays["T"], arrays["beta"], mass_draws=arrays["log10_mass"],
                                       fit_flags=[r.get("flags", "") for r in fit.rows], active=active,
                                       fields=fields)
        _apply(failures, fit.status, fit.reason)
        ratio = cols.pop("_ratio_draws", None)
        if ratio is not None:  # kept beside the fit's draws: the draws_ratio column
            for i, r in enumerate(ratio):
                if r is not None and fit.draws[i] is not None:
                    fit.draws[i] = {**fit.draws[i], "ratio": np.asarray(r, float)}
        parts.append(column_rows(cols, len(mapped)))
    t3 = time.perf_counter()
    STAGE_SECONDS["compare"] += t3 - t2
    out = assemble(mapped, parts, fit.status, fit.reason, draws=fit.draws, n_keep=n_keep, workflow=wf)
    STAGE_SECONDS["assemble"] += time.perf_counter() - t3
    return out
