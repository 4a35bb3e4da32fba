"""The catalogue pipeline as Python calls: fit, predict, compare, and all three.

Use these to drop sedtemp into another pipeline::

    from sedtemp.pipeline import load_workflow, run, fit, predict, compare

    wf = load_workflow("workflow.toml")
    results = run(my_table, wf)                  # fit -> predict -> compare

or stage by stage (each returns an astropy Table, one row per source, in
the input order)::

    fits = fit(my_table, wf, n_keep=200)         # posterior summaries (+ draws)
    pred = predict(my_table, wf, fits=fits)
    comp = compare(my_table, wf, fits=fits)

``table`` may be an astropy Table, a :class:`MappedCatalog` or a path to a
catalogue file. This module sits above the stages and the batch runner.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
from astropy.table import Table

from ..errors import InputError
from .batch import empty_results, run_batch
from .catalog import MappedCatalog, catalog_rows, map_catalog, read_catalog, stream_catalog
from .config import Workflow
from .schema import DRAW_PREFIX, FIT_FLAGS_COLUMN, STATUS_OK, assemble
from .stages import (
    column_rows,
    compare_stage,
    predict_stage,
    prediction_beta,
    process_chunk,
)

if TYPE_CHECKING:
    import concurrent.futures as cf

__all__ = ["compare", "fit", "predict", "run"]


def _mapped(table, wf: Workflow) -> MappedCatalog:
    if isinstance(table, MappedCatalog):
        return table
    if isinstance(table, (str, os.PathLike)):
        table = read_catalog(Path(table), format=wf.catalog["format"])
    if not isinstance(table, Table):
        raise InputError(f"table must be an astropy Table, a MappedCatalog or a catalogue path, "
                         f"got {type(table).__name__}")
    return map_catalog(table, wf)


def _public(tab):
    return tab[[c for c in tab.colnames if not c.startswith("_")]]


def fit(table: Table | MappedCatalog | str | os.PathLike[str], workflow: Workflow, *,
        n_keep: int | None = None) -> Table:
    """Fit stage alone: posterior summaries, diagnostics and (optionally) draws per source.

    Parameters
    ----------
    table : Table, MappedCatalog, str or Path
    workflow : Workflow
    n_keep : int, optional, keyword-only
        Draws kept per source as ``draws_T``, ``draws_beta``, ... (n, n_keep)
        columns, which :func:`compare` uses. Default ``[output] n_keep``.

    Returns
    -------
    Table
    """
    mapped = _mapped(table, workflow)
    if not len(mapped):
        return empty_results(mapped, workflow)
    return _public(process_chunk(workflow, mapped, stages=("fit",), n_keep=n_keep))


def predict(table: Table | MappedCatalog | str | os.PathLike[str], workflow: Workflow, *,
            fits: Table | None = None) -> Table:
    """Predict stage alone: T_eq of each source's field at beta (the fitted median if ``fits`` is given).

    Returns
    -------
    Table
        id column, ``T_eq_point`` (K), ``beta_for_T_eq``, ``status``, ``reason``.
    """
    mapped = _mapped(table, workflow)
    n = len(mapped)
    rows = [{} for _ in range(n)]
    if fits is not None and "beta_median" in fits.colnames:
        rows = [{"beta_median": float(v)} for v in fits["beta_median"]]
    status = np.full(n, STATUS_OK, dtype=object)
    reason = np.full(n, "", dtype=object)
    cols, failures = predict_stage(workflow, mapped, prediction_beta(workflow, rows), np.ones(n, bool))
    for i, why in failures.items():
        status[i], reason[i] = "failed", why
    return _public(assemble(mapped, [column_rows(cols, n)], status, reason, workflow=workflow))


def compare(table: Table | MappedCatalog | str | os.PathLike[str], workflow: Workflow, *, fits: Table) -> Table:
    """Compare stage alone, on the posterior draws of a :func:`fit` table (``draws_*`` columns).

    Raises
    ------
    InputError
        ``fits`` has no ``draws_T`` column (run :func:`fit` with ``n_keep > 0``).
    """
    if DRAW_PREFIX + "T" not in fits.colnames:
        raise InputError("compare needs posterior draws: run pipeline.fit(..., n_keep=200) first")
    mapped = _mapped(table, workflow)
    n = len(mapped)

    def arr(name):
        c = DRAW_PREFIX + name
        return np.asarray(getattr(fits[c], "value", fits[c]), float) if c in fits.colnames else None

    status = np.asarray(fits["status"], dtype=object).copy() if "status" in fits.colnames \
        else np.full(n, STATUS_OK, dtype=object)
    reason = np.asarray(fits["reason"], dtype=object).copy() if "reason" in fits.colnames \
        else np.full(n, "", dtype=object)
    T = arr("T")
    active = (status == STATUS_OK) & np.all(np.isfinite(T), axis=1)
    flags = [str(v) for v in fits[FIT_FLAGS_COLUMN]] if FIT_FLAGS_COLUMN in fits.colnames else None
    flags = None if flags is None else [("" if f == "none" else f) for f in flags]
    cols, failures = compare_stage(workflow, mapped, T, arr("beta"), mass_draws=arr("log10_mass"),
                                   fit_flags=flags, active=active)
    for i, why in failures.items():
        status[i], reason[i] = "failed", why
    return _public(assemble(mapped, [column_rows(cols, n)], status, reason, workflow=workflow))


def run(table: Table | MappedCatalog | str | os.PathLike[str], workflow: Workflow, *,
        executor: cf.Executor | None = None,
        output_dir: str | os.PathLike[str] | None = None, progress: bool = False) -> Table:
    """fit -> predict -> compare over a whole catalogue; the results table.

    Parameters
    ----------
    table : Table, MappedCatalog, str or Path
        A path is read as :func:`~sedtemp.pipeline.catalog.stream_catalog` does (a
        FITS table memory-mapped, each chunk's rows converted when it runs).
    workflow : Workflow
    executor : concurrent.futures.Executor, optional, keyword-only
        Where chunks run; default the workflow's ``[run] executor``.
    output_dir : str or Path, optional, keyword-only
        If given, checkpoint chunks there (under a lock), write the results
        file and the report (a killed run resumes); default: in memory only.
    progress : bool, keyword-only
        Progress per stage on stderr.

    Returns
    -------
    Table
        The results table (see README "Output columns"); an empty catalogue
        gives every column and no rows.
    """
    if isinstance(table, (str, os.PathLike)):  # a FITS file is memory-mapped and converted chunk by chunk
        mapped = stream_catalog(catalog_rows(Path(table), format=workflow.catalog["format"]), workflow)
    else:
        mapped = _mapped(table, workflow)
    return run_batch(mapped, workflow, executor=executor, output_dir=output_dir, progress=progress)
