"""Chunked runs of the pipeline over a catalogue on a ``concurrent.futures.Executor``.

The catalogue is cut into chunks of ``[run] chunk_size`` sources; each chunk
is one task (:func:`sedtemp.pipeline.process_chunk`) on an executor:

* ``"process"`` (default): :class:`~concurrent.futures.ProcessPoolExecutor`
  with ``[run] workers`` processes (0 = all cores);
* ``"dask"``: Dask distributed's ``Client.get_executor()``, on the scheduler
  at ``[run] scheduler`` or on a local cluster (extra ``sedtemp[dask]``);
* ``"mpi"``: ``mpi4py.futures.MPIPoolExecutor`` (extra ``sedtemp[mpi]``);
  start with ``mpiexec -n N python -m mpi4py.futures -m sedtemp run ...``;
* ``"serial"``: every chunk in this process (debugging, small tables).

This is the only module that knows about executors. No scheduling of its
own: it submits, waits for the first finished future, and writes its chunk.

Checkpoints: every finished chunk is written by the main process to
``<output>/parts/part-<first row>.ecsv`` atomically (temporary file, then
``os.replace``), so a part file is either complete or absent. A run started
again with the same command reads the parts, skips the sources they hold and
does the rest; the results table then holds every source exactly once.
Because each source has its own seed, the resumed results are identical to
an uninterrupted run.

Figures, once the results are written: the catalogue plots
(:func:`catalogue_plots`, ``[output] plots``) and, for the sources
``[output] source_plots`` selects (:func:`select_plot_sources`), at most
``max_source_plots`` of them, the corner, SED and trace plots in
``<output>/sources``. Those need a chain, so each chosen source is refitted
by MCMC with its own seed (:func:`sedtemp.pipeline.plot_source`), one task
per source on the same executor. The run report says how many were made
and whether the cap was reached.
"""

from __future__ import annotations

import concurrent.futures as cf
import functools
import json
import logging
import multiprocessing
import os
import shutil
import time
from collections import Counter
from contextlib import ExitStack, contextmanager
from pathlib import Path

import numpy as np
from astropy.table import Table, vstack

from . import __version__
from .catalog import MappedCatalog, write_table
from .config import OUTPUT_FORMATS, Workflow
from .errors import ConfigError
from .pipeline import STATUS_FAILED, STATUS_OK, STATUS_SKIPPED, plot_source, process_chunk, t_eq_band

__all__ = ["run_batch", "open_executor", "InlineExecutor", "write_report", "check_optional_packages",
           "catalogue_plots", "select_plot_sources", "SOURCES_DIR"]

log = logging.getLogger(__name__)

_PARTS = "parts"
_STATE = "run-state.json"
#: Sub-folder of the output directory that holds the per-source figures.
SOURCES_DIR = "sources"
#: Tasks kept in flight per worker: enough to keep workers busy, few enough that a
#: million-source catalogue is not all pickled at once.
_IN_FLIGHT_PER_WORKER = 3


class InlineExecutor(cf.Executor):
    """An Executor that runs each task at submission, in this process (``executor = "serial"``)."""

    def submit(self, fn, /, *args, **kwargs):
        fut = cf.Future()
        try:
            fut.set_result(fn(*args, **kwargs))
        except BaseException as err:  # delivered through the future, as a pool would
            fut.set_exception(err)
        return fut


def _n_workers(run) -> int:
    return run["workers"] if run["workers"] > 0 else (os.cpu_count() or 1)


def _process_pool(n):
    # forkserver: workers are forked from a clean server process (not from this one,
    # which may hold threads), with sedtemp imported once in the server
    if "forkserver" in multiprocessing.get_all_start_methods():
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(["sedtemp.pipeline"])
    else:  # pragma: no cover - Windows
        ctx = multiprocessing.get_context("spawn")
    return cf.ProcessPoolExecutor(max_workers=n, mp_context=ctx)


def _import_optional(module, extra):
    import importlib

    try:
        return importlib.import_module(module)
    except ImportError as err:
        raise ImportError(f"executor needs {module.split('.')[0]}; install it with "
                          f"pip install 'sedtemp[{extra}]'") from err


def _require_h5py():
    try:
        import h5py
    except ImportError as err:
        raise ImportError("[output] keep_draws = true needs h5py, which is not installed; "
                          "pip install 'sedtemp[hdf5]', or set keep_draws = false") from err
    return h5py


def check_optional_packages(wf: Workflow) -> None:
    """Fail now, before any fitting, if the workflow needs an optional package that is missing.

    Parameters
    ----------
    wf : Workflow

    Raises
    ------
    ImportError
        ``[output] keep_draws = true`` without h5py (extra ``sedtemp[hdf5]``),
        ``executor = "dask"`` without Dask distributed (``sedtemp[dask]``) or
        ``executor = "mpi"`` without mpi4py (``sedtemp[mpi]``); the message
        names the extra to install.
    """
    if wf.output["keep_draws"]:
        _require_h5py()
    kind = wf.run["executor"]
    if kind == "dask":
        _import_optional("distributed", "dask")
    elif kind == "mpi":
        _import_optional("mpi4py.futures", "mpi")


@contextmanager
def open_executor(run: dict):
    """Context manager yielding the Executor the ``[run]`` section asks for.

    Parameters
    ----------
    run : dict
        The workflow's ``[run]`` section (``executor``, ``workers``, ``scheduler``).

    Yields
    ------
    (concurrent.futures.Executor, int)
        The executor and its number of workers.

    Raises
    ------
    ImportError
        Dask or mpi4py is not installed (the message names the extra).
    """
    kind = run["executor"]
    if kind == "serial":
        yield InlineExecutor(), 1
    elif kind == "process":
        n = _n_workers(run)
        with _process_pool(n) as ex:
            yield ex, n
    elif kind == "dask":
        distributed = _import_optional("distributed", "dask")
        if run["scheduler"]:
            client = distributed.Client(run["scheduler"])
            cluster = None
        else:
            cluster = distributed.LocalCluster(n_workers=_n_workers(run), threads_per_worker=1,
                                               processes=True, dashboard_address=None,
                                               silence_logs=logging.ERROR)
            client = distributed.Client(cluster)
        try:
            n = max(1, len(client.scheduler_info().get("workers", {})))
            yield client.get_executor(), n
        finally:
            client.close()
            if cluster is not None:
                cluster.close()
    elif kind == "mpi":
        futures = _import_optional("mpi4py.futures", "mpi")
        with futures.MPIPoolExecutor() as ex:
            yield ex, _n_workers(run)
    else:  # pragma: no cover - the schema restricts the names
        raise ConfigError(f"[run] executor: unknown executor {kind!r}")


# -------------------------------------------------------------- checkpoints
def _catalog_digest(mapped: MappedCatalog) -> str:
    import hashlib

    h = hashlib.sha256()
    for arr in (mapped.keys.astype(str), mapped.flux, mapped.err, mapped.limit_only):
        h.update(np.ascontiguousarray(arr).tobytes())
    return h.hexdigest()


def _prepare_dir(out: Path, wf: Workflow, mapped: MappedCatalog, restart: bool) -> Path:
    parts = out / _PARTS
    state = {"workflow_sha256": wf.digest, "catalog_sha256": _catalog_digest(mapped),
             "n_sources": len(mapped), "sedtemp_version": __version__}
    state_file = out / _STATE
    if restart:  # the figures of the earlier run go too: none may be left over from it
        for folder in (parts, out / SOURCES_DIR):
            if folder.exists():
                shutil.rmtree(folder)
    if state_file.exists() and parts.exists():
        old = json.loads(state_file.read_text())
        for key in ("workflow_sha256", "catalog_sha256"):
            if old.get(key) != state[key]:
                what = key.split("_")[0]
                raise ConfigError(
                    f"output directory {str(out)!r} holds a run of a different {what}; "
                    "use another [output] directory, or start afresh with `sedtemp run --restart`")
    parts.mkdir(parents=True, exist_ok=True)
    for tmp in parts.glob(".tmp-*"):  # left by a killed write: never complete, remove
        tmp.unlink()
    fd_tmp = out / (".tmp-" + _STATE)
    fd_tmp.write_text(json.dumps(state, indent=1))
    os.replace(fd_tmp, state_file)
    return parts


def _read_part(path: Path) -> Table:
    """A part file as written: ECSV reads empty strings back as masked, so fill them again."""
    return _unmasked(Table.read(path, format="ascii.ecsv"))


def _unmasked(tab: Table) -> Table:
    """Masked cells (absent in a chunk, or empty strings) -> NaN, "" or False."""
    out = Table(masked=False, meta=tab.meta)
    for name in tab.colnames:
        col = tab[name]
        if getattr(col, "mask", None) is not None and np.any(col.mask):
            kind = col.dtype.kind
            fill = "" if kind in "US" else (False if kind == "b" else np.nan)
            col = col.filled(fill)
        out[name] = col
    return out


#: Column groups of the results table, in order (anything unlisted: comparison columns).
_DIAGNOSTICS = ("chi2_map", "n_bands_used", "dof", "chi2_reduced", "ppp", "acceptance_fraction",
                "converged", "method", "flags")


def _column_rank(name: str, id_column: str, params) -> int:
    if name == id_column:
        return 0
    if name.endswith("_ess") or name in _DIAGNOSTICS:
        return 2
    if name in ("T_eq", "beta_for_T_eq"):
        return 3
    if name in ("flag", "verdict"):
        return 5
    if name in ("status", "reason"):
        return 6
    if name.startswith("_"):
        return 7
    if any(name.startswith(p + "_") for p in params) and not name.startswith("T_eq"):
        return 1
    return 4


def _ordered(tab: Table, id_column: str) -> Table:
    params = ("T", "beta", "log10_mass", "log10_N_H2", "log10_tau0", "draws")
    names = sorted(tab.colnames, key=lambda c: _column_rank(c, id_column, params))  # stable
    return tab[names]


def _read_parts(parts: Path) -> list[Table]:
    return [_read_part(p) for p in sorted(parts.glob("part-*.ecsv"))]


def _write_part(parts: Path, tab: Table) -> None:
    write_table(tab, parts / f"part-{int(tab['_row'][0]):09d}.ecsv", format="ecsv")


def _chunks(todo: np.ndarray, size: int):
    return [todo[i:i + size] for i in range(0, todo.size, size)]


def _progress(total, initial, enabled, desc="sedtemp"):
    from tqdm.auto import tqdm

    return tqdm(total=total, initial=initial, unit="src", disable=not enabled, dynamic_ncols=True,
                desc=desc, smoothing=0.1)


def _in_flight(ex, limit, items, task, on_done):
    """Run every item on ``ex`` with at most ``limit`` tasks in flight, in order of submission.

    ``task(item)`` returns ``(fn, *args)``, built only when the item is
    submitted (so a large catalogue is never pickled all at once);
    ``on_done(item, result)`` gets each result as it finishes.
    """
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
    """Tasks in flight: a bounded number per worker; everything for an executor given by the caller."""
    return max(1, n_items if n_workers is None else _IN_FLIGHT_PER_WORKER * n_workers)


def _execute(ex, n_workers, wf, mapped, chunks, on_done, bar, n_keep):
    """Submit chunks with a bounded number in flight; hand each finished table to ``on_done``."""
    fn = functools.partial(process_chunk, n_keep=n_keep)

    def done(_, tab):
        on_done(tab)
        bar.update(len(tab))

    _in_flight(ex, _limit(n_workers, len(chunks)), chunks, lambda c: (fn, wf, mapped.take(c)), done)


# ----------------------------------------------------------------- results
def _finalise(tabs: list[Table], wf: Workflow, mapped: MappedCatalog) -> Table:
    tab = _unmasked(vstack(tabs, metadata_conflicts="silent")) if len(tabs) > 1 else tabs[0]
    tab = _ordered(tab, mapped.id_column)
    tab.sort("_row")
    rows = np.asarray(tab["_row"])
    if rows.size != len(mapped) or np.any(rows != np.arange(len(mapped))):
        raise RuntimeError(  # the checkpoint bookkeeping guarantees this; fail loudly if not
            f"internal error: results hold {rows.size} rows for {len(mapped)} sources")
    tab[mapped.id_column] = mapped.ids  # restore the input dtype (ECSV round trip)
    out = tab[[c for c in tab.colnames if not c.startswith("_")]]
    out.meta.clear()
    out.meta.update({"sedtemp_version": __version__, "workflow_sha256": wf.digest,
                     "workflow": wf.source, "workflow_path": "" if wf.file is None else str(wf.file),
                     "seed": wf.run["seed"], "id_column": mapped.id_column,
                     "band_names": list(mapped.band_names)})
    return out


def _results_table(tab: Table) -> Table:
    """The results file drops the per-source draw arrays (they go to HDF5)."""
    return tab[[c for c in tab.colnames if not c.startswith("draws_")]]


def _write_draws(tab: Table, path: Path) -> Path | None:
    names = [c for c in tab.colnames if c.startswith("draws_")]
    if not names:
        return None
    h5py = _require_h5py()
    tmp = path.with_name(".tmp-" + path.name)
    with h5py.File(tmp, "w") as h5:
        h5.attrs["sedtemp_version"] = __version__
        h5.attrs["workflow_sha256"] = tab.meta.get("workflow_sha256", "")
        h5.create_dataset("id", data=np.asarray([str(v) for v in tab[tab.colnames[0]]], dtype="S"))
        for c in names:
            h5.create_dataset(c[len("draws_"):], data=np.asarray(tab[c], float), compression="gzip")
    os.replace(tmp, path)
    return path


# ------------------------------------------------------------------- plots
def catalogue_plots(results: Table, directory) -> tuple[list[Path], list[str]]:
    """Population plot, and the comparison plot when the comparison columns are there.

    Written as ``<directory>/population.{pdf,png}`` and
    ``comparison.{pdf,png}``, from the sources with ``status = "ok"``. A
    figure that cannot be drawn is reported, not raised: the results of a
    finished run stay valid.

    Parameters
    ----------
    results : Table
        A results table (as :func:`run_batch` returns or writes it).
    directory : str or Path

    Returns
    -------
    (list of Path, list of str)
        The stems of the figures written, and one message per figure that failed.
    """
    import warnings

    try:
        from . import plots
    except ImportError as err:  # matplotlib or corner missing
        return [], [f"plots: not available ({err})"]
    out = Path(directory)
    base = results[[c for c in results.colnames if not c.startswith("draws_")]]
    if "id" not in base.colnames:
        base = base.copy()
        base["id"] = base[base.colnames[0]]
    ok = base[np.asarray(base["status"]) == STATUS_OK] if "status" in base.colnames else base
    jobs = [("population", plots.population_plot)]
    if "T_eq_median" in ok.colnames:
        jobs.insert(0, ("comparison", plots.comparison_plot))
    made, failed = [], []
    for name, fn in jobs:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # plotting hints must not stop a finished run
            try:
                fn(ok, save_to=out / name)
                made.append(out / name)
            except Exception as err:  # noqa: BLE001 - a plot failure is reported, results stay
                log.warning("%s plot failed: %s", name, err)
                failed.append(f"{name}: {type(err).__name__}: {err}")
    return made, failed


def select_plot_sources(results: Table, choice: str) -> np.ndarray:
    """Rows of ``results`` that get per-source plots under ``[output] source_plots = choice``.

    Parameters
    ----------
    results : Table
    choice : {"none", "flagged", "all"}
        "all": every source with ``status = "ok"``; "flagged": those whose
        comparison ``flag`` is not ``consistent`` or, without a comparison
        (no ``flag`` column), those with any fit flag (``flags`` not empty).

    Returns
    -------
    ndarray of int
        Row positions, in catalogue order.

    Raises
    ------
    ConfigError
        Unknown ``choice``.
    """
    from .config import SOURCE_PLOT_CHOICES

    if choice not in SOURCE_PLOT_CHOICES:
        raise ConfigError(f"[output] source_plots must be one of {list(SOURCE_PLOT_CHOICES)}, got {choice!r}")
    ok = np.asarray(results["status"]) == STATUS_OK
    if choice == "none":
        ok[:] = False
    elif choice == "flagged" and "flag" in results.colnames:
        flag = np.asarray(results["flag"], dtype=str)
        ok &= (flag != "") & (flag != "consistent")
    elif choice == "flagged" and "flags" in results.colnames:
        ok &= np.asarray(results["flags"], dtype=str) != ""
    elif choice == "flagged":  # neither comparison nor fit flags: nothing is flagged
        ok[:] = False
    return np.flatnonzero(ok)


def _plot_task(wf, sub, directory, t_eq):
    """One source's figures (a worker task); never raises: (paths, "" or the failure)."""
    try:
        return [str(p) for p in plot_source(wf, sub, 0, directory, T_eq=t_eq)], ""
    except Exception as err:  # noqa: BLE001 - one failed figure must not lose the others
        return [], f"{type(err).__name__}: {err}"


def _source_plots(get_executor, wf, mapped, result, out, progress) -> dict:
    """Per-source figures of the sources ``[output] source_plots`` selects, up to the cap."""
    choice, cap = wf.output["source_plots"], wf.output["max_source_plots"]
    chosen = select_plot_sources(result, choice)
    todo = chosen[:cap]
    info = {"choice": choice, "selected": int(chosen.size), "made": 0, "cap": cap,
            "cap_reached": bool(chosen.size > cap), "directory": SOURCES_DIR, "failed": []}
    if not todo.size:
        return info
    directory = out / SOURCES_DIR
    ex, n = get_executor()
    keys = mapped.keys

    def task(i):
        return _plot_task, wf, mapped.take([i]), directory, t_eq_band(result[int(i)])

    with _progress(int(todo.size), 0, progress, desc="plots") as bar:

        def done(i, res):
            _, error = res
            if error:
                log.warning("plots of source %r failed: %s", str(keys[i]), error)
                info["failed"].append([str(keys[i]), error])
            else:
                info["made"] += 1
            bar.update(1)

        _in_flight(ex, _limit(n, int(todo.size)), list(todo), task, done)
    return info


def _plot_lines(plots: dict) -> list[str]:
    lines = []
    cat = plots.get("catalogue")
    if cat is not None:
        lines.append("catalogue plots: " + (", ".join(cat["made"]) + " (.pdf, .png)" if cat["made"] else "none"))
        lines.extend(f"  plot failed: {m}" for m in cat["failed"])
    src = plots.get("sources")
    if src is not None:
        if src["choice"] == "none":
            lines.append('source plots: none ([output] source_plots = "none")')
        else:
            lines.append(f"source plots ({src['choice']}): {src['made']} of {src['selected']} "
                         f"{src['choice']} source(s) plotted in {src['directory']}/")
        if src["cap_reached"]:
            lines.append(f"  cap reached: [output] max_source_plots = {src['cap']}; "
                         f"{src['selected'] - src['cap']} {src['choice']} source(s) not plotted "
                         "(raise the cap, or use `sedtemp plot RESULTS --source ID`)")
        lines.extend(f"  plot failed: {k}: {r}" for k, r in src["failed"])
    if "seconds" in plots:
        lines.append(f"plot time: {plots['seconds']:.1f} s")
    return lines


def write_report(tab: Table, path: Path, *, seconds: float, n_resumed: int, plots: dict | None = None) -> dict:
    """Counts per flag and status, failures with reasons, timing, plots made; JSON and text files.

    Parameters
    ----------
    tab : Table
        The results.
    path : Path
        File stem: ``<path>.txt`` and ``<path>.json`` are written.
    seconds : float, keyword-only
        Time of the fitting (this session).
    n_resumed : int, keyword-only
        Sources read back from checkpoints.
    plots : dict, optional, keyword-only
        ``{"catalogue": {"made": [...], "failed": [...]}, "sources": {...},
        "seconds": float}`` as :func:`run_batch` collects it.

    Returns
    -------
    dict
        The report content.
    """
    status = Counter(str(s) for s in tab["status"])
    flags = Counter(str(f) for f in tab["flag"]) if "flag" in tab.colnames else Counter()
    failed = [(str(r[0]), str(r["reason"])) for r in tab if r["status"] == STATUS_FAILED]
    skipped = [(str(r[0]), str(r["reason"])) for r in tab if r["status"] == STATUS_SKIPPED]
    n_new = len(tab) - n_resumed
    rep = {"sedtemp_version": __version__, "workflow_sha256": tab.meta.get("workflow_sha256", ""),
           "n_sources": len(tab), "status": dict(status), "flags": dict(flags),
           "failed": failed, "skipped": skipped, "seconds": round(seconds, 3),
           "sources_this_session": n_new, "resumed_from_checkpoint": n_resumed,
           "sources_per_second": round(n_new / seconds, 3) if seconds > 0 else None}
    lines = [f"sedtemp {__version__} run report", f"workflow sha256: {rep['workflow_sha256']}",
             f"sources: {len(tab)} ({status.get(STATUS_OK, 0)} ok, {status.get(STATUS_SKIPPED, 0)} "
             f"skipped, {status.get(STATUS_FAILED, 0)} failed)"]
    if flags:
        lines.append("flags: " + ", ".join(f"{k or '(none)'}: {v}" for k, v in sorted(flags.items())))
    lines.append(f"time: {seconds:.1f} s for {n_new} source(s) this session"
                 + (f" ({n_resumed} resumed from checkpoints)" if n_resumed else ""))
    if plots:
        rep["plots"] = plots
        lines.extend(_plot_lines(plots))
    for title, items in (("failed", failed), ("skipped", skipped)):
        if items:
            lines.append(f"{title}:")
            lines.extend(f"  {k}: {r}" for k, r in items)
    write_text_atomic(path.with_suffix(".txt"), "\n".join(lines) + "\n")
    write_text_atomic(path.with_suffix(".json"), json.dumps(rep, indent=1))
    return rep


def write_text_atomic(path: Path, text: str) -> None:
    tmp = path.with_name(".tmp-" + path.name)
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)


def run_batch(mapped: MappedCatalog, wf: Workflow, *, executor=None, output_dir=None,
              progress=False, restart=False, keep_draws=False) -> Table:
    """Run fit -> predict -> compare over a mapped catalogue, in chunks, on an executor.

    With an ``output_dir`` the run also writes, after the results: the
    draws file (``[output] keep_draws``), the catalogue plots (``[output]
    plots``), the per-source plots (``[output] source_plots``, at most
    ``max_source_plots`` sources, each refitted by MCMC on the same
    executor: :func:`sedtemp.pipeline.plot_source`) and the run report,
    which says how many per-source plots were made and whether the cap
    was reached.

    Parameters
    ----------
    mapped : MappedCatalog
    wf : Workflow
    executor : concurrent.futures.Executor, optional, keyword-only
        Use this executor (not shut down here); default: the one ``[run]`` names.
    output_dir : str or Path, optional, keyword-only
        Checkpoint folder and results destination; None keeps everything in
        memory (and makes no plots).
    progress : bool, keyword-only
        tqdm progress bar (sources done, rate, time left) on stderr.
    restart : bool, keyword-only
        Discard the checkpoints and per-source plots of an earlier run in ``output_dir``.
    keep_draws : bool, keyword-only
        Keep ``[output] n_keep`` posterior draws per source in ``draws_*``
        columns of the returned table even if ``[output] keep_draws`` is off.

    Returns
    -------
    Table
        The results, one row per source in catalogue order (with the
        ``draws_*`` columns when draws were kept).

    Raises
    ------
    ConfigError
        ``output_dir`` holds checkpoints of a different workflow or catalogue.
    ImportError
        Before any fitting: ``[output] keep_draws`` with an ``output_dir``
        but without h5py, or an executor whose package is missing.
    """
    t0 = time.perf_counter()
    out = None if output_dir is None else Path(output_dir)
    if out is not None and wf.output["keep_draws"]:
        _require_h5py()  # now, not after hours of fitting
    tabs: list[Table] = []
    done_rows: set[int] = set()
    parts = None
    if out is not None:
        parts = _prepare_dir(out, wf, mapped, restart)
        tabs = _read_parts(parts)
        for t in tabs:
            done_rows.update(int(r) for r in t["_row"])
    n_resumed = len(done_rows)
    todo = np.array([i for i in range(len(mapped)) if i not in done_rows], dtype=int)

    def on_done(tab):
        if parts is not None:
            _write_part(parts, tab)
        tabs.append(tab)

    with ExitStack() as stack:
        pool = []

        def get_executor():
            """(executor, workers) opened at first use; workers None for the caller's executor."""
            if not pool:
                pool.append((executor, None) if executor is not None
                            else stack.enter_context(open_executor(wf.run)))
            return pool[0]

        with _progress(len(mapped), n_resumed, progress) as bar:
            if todo.size:
                n_keep = wf.output["n_keep"] if (keep_draws or wf.output["keep_draws"]) else 0
                _execute(*get_executor(), wf, mapped, _chunks(todo, wf.run["chunk_size"]), on_done, bar, n_keep)
        if not tabs:
            return Table()
        result = _finalise(tabs, wf, mapped)
        if out is None:
            return result
        seconds = time.perf_counter() - t0
        _write_outputs(result, wf, out)
        plots = _plots(get_executor, wf, mapped, result, out, progress)
    write_report(result, out / f"{wf.output['name']}-report", seconds=seconds, n_resumed=n_resumed, plots=plots)
    return result


def _write_outputs(result, wf, out):
    fmt, name = wf.output["format"], wf.output["name"]
    write_table(_results_table(result), out / (name + OUTPUT_FORMATS[fmt][1]), format=fmt)
    if wf.output["keep_draws"]:
        _write_draws(result, out / f"{name}-draws.h5")


def _plots(get_executor, wf, mapped, result, out, progress) -> dict:
    t0 = time.perf_counter()
    plots = {}
    if wf.output["plots"]:
        made, failed = catalogue_plots(result, out)
        plots["catalogue"] = {"made": [p.name for p in made], "failed": failed}
    plots["sources"] = _source_plots(get_executor, wf, mapped, result, out, progress)
    plots["seconds"] = round(time.perf_counter() - t0, 3)
    return plots
