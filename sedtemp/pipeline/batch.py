"""Chunked runs of the pipeline over a catalogue on a ``concurrent.futures.Executor``.

The catalogue is cut into chunks of ``[run] chunk_size`` sources (a streamed
catalogue, :func:`~sedtemp.pipeline.catalog.stream_catalog`, reads and
converts a chunk's rows as the chunk is submitted); each chunk is one task (:func:`sedtemp.pipeline.stages.process_chunk`) on the executor
``[run] executor`` names (:mod:`sedtemp.pipeline.executors`). The runner
submits with a bounded number of tasks in flight, waits for the first
finished future and checkpoints its chunk (:mod:`sedtemp.pipeline.checkpoints`),
all while holding the output folder's lock. Because each source has its own
seed, a resumed run's results equal an uninterrupted run's.

With an output folder, finished chunks are not held in memory: each goes to
its checkpoint and to a temporary spill file, and the results file (and the
draws file, ``[output] keep_draws``) is written from them one chunk at a time
in row order (:func:`_write_streamed`), equal byte for byte to what writing
the whole table at once gives (HDF5 draws: equal values). The table the run
returns is filled chunk by chunk (one copy, no vstack); with
``return_table=False`` (``sedtemp run``) there is none: the report's counts
are gathered as the chunks are written (:class:`~sedtemp.pipeline.report.RunTally`)
and only the columns the stages after it need are kept. After the results:
the catalogue plots and per-source plots (:mod:`sedtemp.pipeline.figures`),
and the run report (:mod:`sedtemp.pipeline.report`).
"""

from __future__ import annotations

import concurrent.futures as cf
import functools
import logging
import platform
import sys
import time
from contextlib import ExitStack
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.table import Table, vstack

from .._version import __version__
from .catalog import MappedCatalog, StreamedCatalog
from .checkpoints import OutputLock, RunState, input_digests, unmasked
from .config import Workflow
from .executors import EXECUTORS, InlineExecutor, open_executor
from .figures import SOURCES_DIR, catalogue_plots, select_plot_sources, source_plots
from .population_stage import population_stage
from .report import Progress, RunTally, write_report
from .schema import (
    CLASS_COLUMN,
    DRAW_PREFIX,
    FIT_FLAGS_COLUMN,
    assemble,
    describe,
    order,
    spec,
)
from .stages import process_chunk
from .writers import _Finished, _public_chunk, _write_outputs, _write_streamed

__all__ = [
    "SOURCES_DIR",
    "InlineExecutor",
    "catalogue_plots",
    "check_optional_packages",
    "empty_results",
    "open_executor",
    "run_batch",
    "run_metadata",
    "select_plot_sources",
    "write_report",
]

log = logging.getLogger(__name__)

#: Tasks kept in flight per worker: enough to keep workers busy, few enough that a
#: million-source catalogue is not all pickled at once.
_IN_FLIGHT_PER_WORKER = 3
_KINDS = {"f": float, "i": np.int64, "b": bool, "U": str}
#: Packages whose versions the results record.
_RECORDED = ("numpy", "scipy", "astropy", "emcee")


def check_optional_packages(wf: Workflow) -> None:
    """Fail now, before any fitting, if the workflow needs an optional package that is missing.

    Raises
    ------
    ImportError
        ``executor = "dask"`` without Dask distributed (``sedtemp[dask]``) or
        ``executor = "mpi"`` without mpi4py (``sedtemp[mpi]``).
    """
    EXECUTORS[wf.run["executor"]].check()


def _in_flight(ex, limit, items, task, on_done):
    """Run every item on ``ex`` with at most ``limit`` tasks in flight, in order of submission."""
    pending = {}
    queue = list(reversed(items))
    while queue or pending:
        while queue and len(pending) < limit:
            item = queue.pop()
            fn, *args = task(item)
            pending[ex.submit(fn, *args)] = item
        done, _ = cf.wait(pending, return_when=cf.FIRST_COMPLETED)
        for fut in done:
            on_done(pending.pop(fut), fut.result())


def _limit(n_workers, n_items):
    return max(1, n_items if n_workers is None else _IN_FLIGHT_PER_WORKER * n_workers)


def _versions() -> dict:
    from importlib.metadata import PackageNotFoundError, version

    out = {"sedtemp": __version__, "python": platform.python_version()}
    for name in _RECORDED:
        try:
            out[name] = version(name)
        except PackageNotFoundError:
            out[name] = "not installed"
    return out


def run_metadata(wf: Workflow, mapped: MappedCatalog | StreamedCatalog) -> dict:
    """The reproducibility record of a results file (every writer keeps it)."""
    digests = input_digests(wf, mapped)
    return {"sedtemp_version": __version__, "versions": _versions(),
            "date_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "command_line": " ".join(sys.argv), "workflow_sha256": wf.digest,
            "results_sha256": digests["workflow"], "catalog_sha256": digests["catalog"],
            "files_sha256": digests["files"], "workflow": wf.source,
            # one string per line: ECSV's YAML header folds a long multi-line string into one line
            "workflow_text": (wf.text or "").splitlines(), "workflow_path": "" if wf.file is None else str(wf.file),
            "catalog_path": str(wf.path(wf.catalog["path"]).resolve()), "base_dir": str(wf.base_dir.resolve()),
            "seed": wf.run["seed"], "id_column": mapped.id_column, "band_names": list(mapped.band_names)}


def _result_names(wf: Workflow) -> list[str]:
    """The columns a run of ``wf`` writes (what an empty catalogue's results still carry)."""
    from ..fit.summary import QUANTILES

    model = wf.build_model(distance=1.0 * u.pc) if wf.model["amplitude"] == "mass" else wf.build_model()
    names = [f"{p}_{k}" for p in model.param_names for k in (*QUANTILES, "map")]
    names += ["T_beta_corr"] if "beta" in model.param_names else []
    names += ["chi2_map", "n_bands_used", "dof", "chi2_reduced", "ppp", FIT_FLAGS_COLUMN, "method", "converged"]
    if wf.field["components"]:
        names += ["T_eq_point", "beta_for_T_eq"]
        if wf.compare["enabled"]:
            names += [f"{q}_{k}" for q in ("T_eq", "ratio", "U_implied", "field_scale", "extra_power",
                                           "extra_power_solar", "extra_luminosity") for k in QUANTILES]
            names += ["p_warmer", "stochastic_fraction", "T_eq_is_upper_bound", CLASS_COLUMN, "verdict"]
    return names


def empty_results(mapped: MappedCatalog, wf: Workflow) -> Table:
    """The results table of an empty catalogue: every column (with its unit), no rows."""
    tab = assemble(mapped, [dict.fromkeys(_result_names(wf))][:0], [], [], workflow=wf)
    for name in order(_result_names(wf)):
        if name not in tab.colnames:
            tab[name] = np.zeros(0, dtype=_KINDS[spec(name).kind])
    tab = tab[[mapped.id_column, *order([c for c in tab.colnames if c != mapped.id_column and not c.startswith("_")])]]
    return describe(tab)


def _finalise(tabs: list[Table], wf: Workflow, mapped: MappedCatalog) -> Table:
    # in row order, whatever order the chunks finished in: the columns of chunks that
    # lack some (all skipped, say) then come in the same order on every run
    tabs = sorted(tabs, key=lambda t: int(np.min(t["_row"])))
    tab = unmasked(vstack(tabs, metadata_conflicts="silent")) if len(tabs) > 1 else tabs[0]
    tab.sort("_row")
    rows = np.asarray(tab["_row"])
    if rows.size != len(mapped) or np.any(rows != np.arange(len(mapped))):
        raise RuntimeError(  # the checkpoint bookkeeping guarantees this; fail loudly if not
            f"internal error: results hold {rows.size} rows for {len(mapped)} sources")
    return _public_chunk(tab, mapped.ids, run_metadata(wf, mapped), mapped.id_column)


def _fit_all(get_executor, wf, mapped, todo, on_done, bar, n_keep):
    fn = functools.partial(process_chunk, n_keep=n_keep)
    size = wf.run["chunk_size"]
    # cut where the rows still to do have a gap (a resumed run), so that each chunk holds
    # consecutive rows and the results are written chunk by chunk in row order
    runs = np.split(todo, np.flatnonzero(np.diff(todo) != 1) + 1) if todo.size else []
    chunks = [run[i:i + size] for run in runs for i in range(0, run.size, size)]
    if not chunks:
        return
    ex, n = get_executor()

    def done(_, tab):
        on_done(tab)
        bar.update(tab["status"])

    _in_flight(ex, _limit(n, len(chunks)), chunks, lambda c: (fn, wf, mapped.take(c)), done)


def run_batch(mapped: MappedCatalog | StreamedCatalog, wf: Workflow, *, executor: cf.Executor | None = None,
              output_dir: str | Path | None = None, progress: bool = False, restart: bool = False,
              keep_draws: bool = False, return_table: bool = True) -> Table | RunTally:
    """Run fit -> predict -> compare over a mapped catalogue, in chunks, on an executor.

    Parameters
    ----------
    mapped : MappedCatalog or StreamedCatalog
        The catalogue; a streamed one (:func:`~sedtemp.pipeline.catalog.stream_catalog`)
        has each chunk's rows converted as the chunk is submitted.
    wf : Workflow
    executor : concurrent.futures.Executor, optional, keyword-only
        Use this executor (not shut down here); default: the one ``[run]`` names.
    output_dir : str or Path, optional, keyword-only
        Checkpoint folder and results destination (locked for the run); None
        keeps everything in memory (and makes no plots).
    progress : bool, keyword-only
        Progress per stage on stderr (a bar on a terminal, plain lines otherwise).
    restart : bool, keyword-only
        Discard the checkpoints and per-source plots of an earlier run in ``output_dir``.
    keep_draws : bool, keyword-only
        Keep ``[output] n_keep`` draws per source in ``draws_*`` columns of
        the returned table even if ``[output] keep_draws`` is off.
    return_table : bool, keyword-only
        False (with ``output_dir``): do not hold the results table; the files
        are written alike and the run returns the :class:`~sedtemp.pipeline.report.RunTally`
        of its report, gathered as the results are written. Held in memory
        then: only the columns the catalogue plots, the per-source plots and
        the population stage use, when the workflow makes them.

    Returns
    -------
    Table or RunTally
        The results, one row per source in catalogue order; their tally
        with ``return_table=False``.

    Raises
    ------
    ConfigError
        ``output_dir`` holds checkpoints of other inputs (the message names
        what changed), or another run holds its lock.
    ImportError
        Before any fitting: a needed optional package is missing.
    """
    if not return_table and output_dir is None:
        raise ValueError("run_batch: return_table=False needs an output_dir (the results go to files there)")
    check_optional_packages(wf) if output_dir is not None else EXECUTORS[wf.run["executor"]].check()
    if output_dir is None:
        return _run(mapped, wf, executor, None, progress, False, keep_draws)
    out = Path(output_dir)
    with OutputLock(out) as lock:
        return _run(mapped, wf, executor, out, progress, restart, keep_draws, lock=lock,
                    return_table=return_table)


def _needed_columns(wf: Workflow, names: list[str]) -> list[str]:
    """The results columns the stages after the results files use (of ``names``, in order)."""
    if wf.population.get("enabled"):
        return list(names)  # the population stage reads the draws and what it likes of the rest
    need: set[str] = set()
    if wf.output["plots"]:  # the catalogue plots: every column but the draws
        need.update(c for c in names if not c.startswith(DRAW_PREFIX))
    if wf.output["source_plots"] != "none":  # choosing the sources, and their T_eq band
        need.update(names[:1])
        need.update(("status", CLASS_COLUMN, "flag", FIT_FLAGS_COLUMN, "flags", "T_eq_p16", "T_eq_p84",
                     "T_eq_point", "T_eq"))
    return [c for c in names if c in need]


def _run(mapped, wf, executor, out, progress, restart, keep_draws, lock=None, return_table=True):
    t0 = time.perf_counter()
    tabs: list[Table] = []  # in memory only without an output folder
    state: RunState | None = None
    finished: _Finished | None = None
    done = np.zeros(len(mapped), dtype=bool)
    if out is not None:
        if restart and (out / SOURCES_DIR).exists():  # no figure of the earlier run may be left over
            import shutil

            shutil.rmtree(out / SOURCES_DIR)
        state = RunState(out, wf, mapped, restart=restart)
        finished = _Finished(state.parts_dir, len(mapped))
        state.read_parts(keep=finished.add)
        done = finished.done
    n_resumed = int(done.sum())
    todo = np.flatnonzero(~done)
    n_keep = wf.output["n_keep"] if (keep_draws or wf.output["keep_draws"] or wf.population.get("enabled")) else 0

    def on_done(tab):
        if state is None or finished is None:
            tabs.append(tab)
            return
        state.write_part(tab)
        finished.add(tab)

    try:
        with ExitStack() as stack:
            pool = []

            def get_executor():
                if not pool:
                    pool.append((executor, None) if executor is not None
                                else stack.enter_context(open_executor(wf.run)))
                return pool[0]

            with Progress("fit", len(mapped), n_resumed, progress) as bar:
                _fit_all(get_executor, wf, mapped, todo, on_done, bar, n_keep)
            if out is None or finished is None:
                return _finalise(tabs, wf, mapped) if tabs else _empty(mapped, wf)
            seconds = time.perf_counter() - t0
            tally = None if return_table else RunTally(mapped.ids)
            if finished.items and tally is not None:
                kept = _write_streamed(finished, wf, mapped, out, run_metadata(wf, mapped),
                                       _needed_columns(wf, list(finished.layout)), tally)
                result = Table() if kept is None else kept
            elif finished.items:
                result = _write_streamed(finished, wf, mapped, out, run_metadata(wf, mapped))
            else:
                result = _empty(mapped, wf)
                _write_outputs(result, wf, out)
            population = population_stage(result, wf, out)
            plots = _plots(get_executor, wf, mapped, result, out, progress)
    finally:
        if finished is not None:
            finished.remove()
    events = {"damaged": state.damaged, "removed_temporaries": state.removed_temporaries,
              "stale_lock": None if lock is None or lock.stale is None else lock.stale}
    if tally is None or not tally.n:
        tally = RunTally(mapped.ids)
        tally.add(result)
    write_report(tally, out / f"{wf.output['name']}-report", seconds=seconds, n_resumed=n_resumed,
                 plots=plots, checkpoints=events, population=population)
    return result if return_table else tally


def _empty(mapped, wf):
    tab = empty_results(mapped, wf)
    tab.meta.update(run_metadata(wf, mapped))
    return tab


def _plots(get_executor, wf, mapped, result, out, progress) -> dict:
    t0 = time.perf_counter()
    plots = {}
    if wf.output["plots"] and len(mapped):
        made, failed = catalogue_plots(result, out)
        plots["catalogue"] = {"made": [p.name for p in made], "failed": failed}

    def run_tasks(items, task, on_done):
        ex, n = get_executor()
        _in_flight(ex, _limit(n, len(items)), items, task, on_done)

    plots["sources"] = source_plots(run_tasks, wf, mapped, result, out,
                                    lambda stage, total: Progress(stage, total, 0, progress))
    plots["seconds"] = round(time.perf_counter() - t0, 3)
    return plots
