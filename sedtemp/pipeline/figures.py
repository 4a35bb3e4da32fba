"""The figures of a finished run: catalogue plots and the per-source plots of chosen sources."""

from __future__ import annotations

import logging
import warnings
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from astropy.table import Table

from ..errors import ConfigError
from .config import SOURCE_PLOT_CHOICES
from .schema import CLASS_COLUMN, DRAW_PREFIX, FIT_FLAGS_COLUMN, NONE_TEXT, STATUS_OK
from .sources import plot_source, t_eq_band

if TYPE_CHECKING:
    from .catalog import MappedCatalog
    from .config import Workflow
    from .report import Progress

__all__ = ["SOURCES_DIR", "catalogue_plots", "select_plot_sources", "source_plots"]

log = logging.getLogger(__name__)

#: Sub-folder of the output directory that holds the per-source figures.
SOURCES_DIR = "sources"


def catalogue_plots(results: Table, directory: str | Path) -> tuple[list[Path], list[str]]:
    """Population plot, and the comparison plot when the comparison columns are there.

    Written as ``<directory>/population.{pdf,png}`` and
    ``comparison.{pdf,png}``, from the sources with ``status = "ok"``. A
    figure that cannot be drawn is reported, not raised.

    Returns
    -------
    (list of Path, list of str)
        The stems of the figures written, and one message per figure that failed.
    """
    try:
        from .. import plots
    except ImportError as err:  # matplotlib or corner missing
        return [], [f"plots: not available ({err})"]
    out = Path(directory)
    base = results[[c for c in results.colnames if not c.startswith(DRAW_PREFIX)]]
    if "id" not in base.colnames:
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


def _column(results, new, old):
    return new if new in results.colnames else (old if old in results.colnames else None)


def select_plot_sources(results: Table, choice: str) -> np.ndarray:
    """Rows of ``results`` that get per-source plots under ``[output] source_plots = choice``.

    Parameters
    ----------
    results : Table
    choice : {"none", "flagged", "all"}
        "all": every source with ``status = "ok"``; "flagged": those whose
        ``heating_class`` is not ``consistent`` or, without a comparison,
        those with any fit flag.

    Returns
    -------
    ndarray of int
        Row positions, in catalogue order.

    Raises
    ------
    ConfigError
        Unknown ``choice``.
    """
    if choice not in SOURCE_PLOT_CHOICES:
        raise ConfigError(f"[output] source_plots must be one of {list(SOURCE_PLOT_CHOICES)}, got {choice!r}")
    if choice == "none":  # no column needed (a run that holds none of its results)
        return np.flatnonzero(np.zeros(len(results), dtype=bool))
    ok = np.asarray(results["status"]) == STATUS_OK
    cls, fl = _column(results, CLASS_COLUMN, "flag"), _column(results, FIT_FLAGS_COLUMN, "flags")
    if choice == "flagged" and cls is not None:
        flag = np.asarray(results[cls], dtype=str)
        ok &= (flag != "") & (flag != NONE_TEXT) & (flag != "consistent")
    elif choice == "flagged" and fl is not None:
        v = np.asarray(results[fl], dtype=str)
        ok &= (v != "") & (v != NONE_TEXT)
    elif choice == "flagged":  # neither comparison nor fit flags: nothing is flagged
        ok[:] = False
    return np.flatnonzero(ok)


def _plot_task(wf, sub, directory, t_eq):
    """One source's figures (a worker task); never raises: (paths, "" or the failure, refitted)."""
    info = {}
    try:
        return [str(p) for p in plot_source(wf, sub, 0, directory, T_eq=t_eq, trace=None, info=info)], "", info.get("refit", False)
    except Exception as err:  # noqa: BLE001 - one failed figure must not lose the others
        return [], f"{type(err).__name__}: {err}", info.get("refit", False)


def source_plots(run_tasks: Callable[[list, Callable, Callable], Any], wf: Workflow, mapped: MappedCatalog,
                 result: Table, out: Path, progress_factory: Callable[[str, int], Progress]) -> dict:
    """Per-source figures of the sources ``[output] source_plots`` selects, up to the cap.

    ``run_tasks(items, task, on_done)`` runs the tasks (on the run's executor);
    ``progress_factory(stage, total)`` gives a :class:`~sedtemp.pipeline.report.Progress`.
    """
    choice, cap = wf.output["source_plots"], wf.output["max_source_plots"]
    chosen = select_plot_sources(result, choice)
    todo = chosen[:cap]
    info = {"choice": choice, "selected": int(chosen.size), "made": 0, "cap": cap, "refits": 0,
            "cap_reached": bool(chosen.size > cap), "directory": SOURCES_DIR, "failed": []}
    if not todo.size:
        return info
    directory = out / SOURCES_DIR
    keys = mapped.keys

    def task(i):
        return _plot_task, wf, mapped.take([i]), directory, t_eq_band(result[int(i)])

    with progress_factory("plots", int(todo.size)) as bar:

        def done(i, res):
            _, error, refit = res
            info["refits"] += int(bool(refit))
            if error:
                log.warning("plots of source %r failed: %s", str(keys[i]), error)
                info["failed"].append([str(keys[i]), error])
            else:
                info["made"] += 1
            bar.update(["ok" if not error else "failed"])

        run_tasks(list(todo), task, done)
    return info
