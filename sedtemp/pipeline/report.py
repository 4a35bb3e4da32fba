"""What a run tells its user: progress while it runs, the summary and the report after.

Progress: one bar per stage (``fit``, ``plots``) with ok / skipped / failed
counts, updated per finished block of sources; when stderr is not a
terminal, plain log lines every :data:`LOG_EVERY_S` seconds instead of
carriage-return frames.

The summary (:func:`run_summary`) has the status counts, a fit-quality line
(poor fits, prior-limited, unconverged), the heating-class counts with the
T, beta and T_fit/T_eq ranges of each class, and a "check these next" list;
:func:`write_report` writes it with timing, failures and plots to
``<name>-report.txt`` and ``.json``.
"""

from __future__ import annotations

import json
import sys
import time
from collections import Counter
from collections.abc import Iterable
from pathlib import Path
from typing import Literal, TextIO

import numpy as np
from astropy.table import Table

from .._io import atomic_write_text
from .._version import __version__
from ..absorption import EXTRAPOLATION_WARN_FRACTION
from .schema import (
    CLASS_COLUMN,
    FIT_FLAGS_COLUMN,
    NONE_TEXT,
    STATUS_FAILED,
    STATUS_OK,
    STATUS_SKIPPED,
)

__all__ = [
    "extrapolation_caution", "LOG_EVERY_S", "Progress", "RunTally", "run_summary", "summary_lines", "write_report"]

#: Seconds between plain progress lines when stderr is not a terminal.
LOG_EVERY_S = 10.0
#: Fit flags counted in the fit-quality line: (flag, label).
_QUALITY = (("poor_fit", "poor fit"), ("prior_limited", "prior-limited"), ("unconverged", "unconverged"))
_NEXT = 10


class Progress:
    """Progress of one stage: a tqdm bar on a terminal, periodic plain lines otherwise.

    Parameters
    ----------
    stage : str
        Shown as the bar's label (``fit``, ``plots``).
    total, initial : int
        Sources in all, and already done (resumed).
    enabled : bool
    stream : file, optional
        Default ``sys.stderr``.
    """

    def __init__(self, stage: str, total: int, initial: int = 0, enabled: bool = True,
                 stream: TextIO | None = None) -> None:
        self.stage, self.total, self.done = stage, int(total), int(initial)
        self.counts = Counter()
        self.stream = sys.stderr if stream is None else stream
        self.enabled = bool(enabled)
        self._bar = None
        self._t0 = self._last = time.monotonic()
        if self.enabled and getattr(self.stream, "isatty", lambda: False)():
            from tqdm.auto import tqdm

            self._bar = tqdm(total=self.total, initial=self.done, unit="src", desc=stage, dynamic_ncols=True,
                             smoothing=0.1, file=self.stream)

    def update(self, statuses: Iterable[object]) -> None:
        """Count a finished block (its status values)."""
        statuses = [str(s) for s in statuses]
        self.counts.update(statuses)
        self.done += len(statuses)
        if self._bar is not None:
            self._bar.update(len(statuses))
            self._bar.set_postfix_str(self._counts(), refresh=False)
        elif self.enabled and (time.monotonic() - self._last >= LOG_EVERY_S or self.done >= self.total):
            self._last = time.monotonic()
            print(self.line(), file=self.stream, flush=True)

    def _counts(self):
        c = self.counts
        return f"{c[STATUS_OK]} ok, {c[STATUS_SKIPPED]} skipped, {c[STATUS_FAILED]} failed"

    def line(self) -> str:
        """The plain progress line: stage, done/total, counts, rate."""
        dt = max(time.monotonic() - self._t0, 1e-9)
        return (f"sedtemp {self.stage}: {self.done}/{self.total} sources ({self._counts()}), "
                f"{sum(self.counts.values()) / dt:.1f} src/s")

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()

    def __enter__(self) -> Progress:
        return self

    def __exit__(self, *exc: object) -> Literal[False]:
        self.close()
        return False


def _flag_sets(tab):
    if FIT_FLAGS_COLUMN not in tab.colnames:
        return [set() for _ in range(len(tab))]
    return [set() if str(f) in ("", NONE_TEXT) else set(str(f).split(",")) for f in tab[FIT_FLAGS_COLUMN]]


def _range(tab, name, rows):
    if name not in tab.colnames or not rows.any():
        return None
    v = np.asarray(tab[name], float)[rows]
    v = v[np.isfinite(v)]
    return None if not v.size else (float(v.min()), float(v.max()))


def _merge(a, b):
    """The (min, max) range of two ranges (either may be None)."""
    if a is None or b is None:
        return a if b is None else b
    return (min(a[0], b[0]), max(a[1], b[1]))


class RunTally:
    """What the run summary and the report need of the results, gathered a chunk at a time.

    :meth:`add` takes the results rows in row order, one chunk (a Table) at
    a time; :meth:`summary` is then what :func:`run_summary` gives of the
    whole table, and :func:`write_report` takes the tally in place of the
    table. Kept per source: 9 bytes (the p_warmer ranking of the "check these
    next" list) when the results have a comparison; everything else is
    counts, ranges, and the failed and skipped sources with their reasons.

    Parameters
    ----------
    ids : sequence, optional
        The source ids by row (the results' first column), to name ranked
        sources without keeping their ids; default: kept from the chunks.
    """

    def __init__(self, ids=None) -> None:
        self.ids = ids
        self.n = 0
        self.workflow_sha256: str | None = None
        self.status: Counter = Counter()
        self.quality = {label: 0 for _, label in _QUALITY}
        self.classes: dict[str, dict] = {}
        self.failed: list[tuple[str, str]] = []
        self.skipped: list[tuple[str, str]] = []
        self._poor: list[str] = []
        self._sure: list[np.ndarray] = []
        self._cand: list[np.ndarray] = []
        self._cand_ids: dict[int, str] = {}
        self._extra: tuple[int, float] | None = None

    def add(self, tab: Table) -> None:
        """Count the next rows of the results (a chunk, in row order)."""
        start = self.n
        if self.workflow_sha256 is None:
            self.workflow_sha256 = str(tab.meta.get("workflow_sha256", ""))
        self.n += len(tab)
        has_status = "status" in tab.colnames
        if has_status:
            self.status.update(str(s) for s in tab["status"])
        ok = np.asarray(tab["status"]) == STATUS_OK if has_status else np.ones(len(tab), bool)
        flags = _flag_sets(tab)
        for flag, label in _QUALITY:
            self.quality[label] += int(sum(1 for f, o in zip(flags, ok, strict=True) if o and flag in f))
        if CLASS_COLUMN in tab.colnames:
            cls = np.asarray(tab[CLASS_COLUMN], dtype=str)
            for name in sorted(set(cls[ok])):
                rows = ok & (cls == name)
                c = self.classes.setdefault(name, {"n": 0, "T": None, "beta": None, "ratio": None})
                c["n"] += int(rows.sum())
                for key, col in (("T", "T_median"), ("beta", "beta_median"), ("ratio", "ratio_median")):
                    c[key] = _merge(c[key], _range(tab, col, rows))
        if len(tab.colnames) and len(tab):
            first = tab[tab.colnames[0]]
            if has_status:
                st = np.asarray(tab["status"])
                for out, which in ((self.failed, STATUS_FAILED), (self.skipped, STATUS_SKIPPED)):
                    out.extend((str(first[i]), str(tab["reason"][i])) for i in np.flatnonzero(st == which))
            if len(set(self._poor)) < _NEXT:  # the first ones in row order are all the list can show
                self._poor += [str(first[i]) for i in range(len(tab)) if ok[i] and "poor_fit" in flags[i]]
            if CLASS_COLUMN in tab.colnames and "p_warmer" in tab.colnames:
                cand = ok & np.isin(np.asarray(tab[CLASS_COLUMN], dtype=str), ("extra_heating", "shielded"))
                self._sure.append(np.nan_to_num(np.abs(np.asarray(tab["p_warmer"], float) - 0.5)))
                self._cand.append(cand)
                if self.ids is None:
                    self._cand_ids.update((start + int(i), str(first[i])) for i in np.flatnonzero(cand))
        if "opacity_extrapolated_fraction" in tab.colnames:
            f = np.asarray(tab["opacity_extrapolated_fraction"], float)[ok]
            f = f[np.isfinite(f)]
            if f.size:
                n_over, largest = int(np.sum(f > EXTRAPOLATION_WARN_FRACTION)), float(f.max())
                self._extra = (n_over, largest) if self._extra is None else \
                    (self._extra[0] + n_over, max(self._extra[1], largest))

    def _id(self, i: int) -> str:
        return self._cand_ids[i] if self.ids is None else str(self.ids[i])

    def summary(self) -> dict:
        """What :func:`run_summary` gives of the rows added so far."""
        nxt = [k for k, _ in self.failed] + self._poor
        if self._sure:
            sure, cand = np.concatenate(self._sure), np.concatenate(self._cand)
            ranked = np.argsort(-sure)  # the whole ranking, as of the whole table (ties alike)
            for i in ranked[cand[ranked]]:
                if len(dict.fromkeys(nxt)) >= _NEXT:
                    break
                nxt.append(self._id(int(i)))
        classes = {name: dict(self.classes[name]) for name in sorted(self.classes)}
        return {"status": dict(self.status), "fit_quality": dict(self.quality), "classes": classes,
                "check_next": list(dict.fromkeys(nxt))[:_NEXT], "opacity_extrapolated": self._extra}


def run_summary(tab: Table | RunTally) -> dict:
    """Status and class counts, fit quality, per-class ranges and the sources to check next.

    Parameters
    ----------
    tab : Table or RunTally
        The results, or their tally (:class:`RunTally`).

    Returns
    -------
    dict
        ``status``, ``fit_quality`` (label -> count), ``classes`` (class ->
        {"n", "T", "beta", "ratio"} with (min, max) ranges of the medians),
        ``check_next`` (ids: failed, poor fits, extra_heating/shielded with
        the highest p_warmer distance from 0.5, at most 10).
    """
    return _tally(tab).summary()


def _tally(tab: Table | RunTally) -> RunTally:
    if isinstance(tab, RunTally):
        return tab
    tally = RunTally()
    tally.add(tab)
    return tally


def extrapolation_caution(n_over: int, largest: float, n: int) -> str | None:
    """The caution line for sources whose absorbed power comes partly from an extrapolated opacity."""
    if n_over == 0:
        return None
    return (f"caution: for {n_over} of {n} source(s), more than {EXTRAPOLATION_WARN_FRACTION:.0%} of the "
            f"absorbed power (up to {largest:.0%}) comes from wavelengths where the opacity law is "
            "extrapolated (a bare far-IR power law in the UV/optical): T_eq is not physical there; "
            "give [model] opacity a grain_radius (UV cap) or a tabulated opacity")


def _fmt(r):
    return "-" if r is None else f"{r[0]:.3g}-{r[1]:.3g}"


def summary_lines(summary: dict, n: int) -> list[str]:
    """The summary as text lines (the CLI prints them; the report holds them)."""
    s = summary["status"]
    lines = [(f"sources: {n} ({s.get(STATUS_OK, 0)} ok, {s.get(STATUS_SKIPPED, 0)} skipped, "
              f"{s.get(STATUS_FAILED, 0)} failed)"),
             "fit quality: " + ", ".join(f"{v} {k}" for k, v in summary["fit_quality"].items())]
    for name, c in summary["classes"].items():
        lines.append(f"  {name}: {c['n']} (T {_fmt(c['T'])} K, beta {_fmt(c['beta'])}, "
                     f"T_fit/T_eq {_fmt(c['ratio'])})")
    if summary["check_next"]:
        lines.append("check these next: " + ", ".join(summary["check_next"]))
    if summary.get("opacity_extrapolated"):
        n_over, largest = summary["opacity_extrapolated"]
        caution = extrapolation_caution(n_over, largest, s.get(STATUS_OK, 0))
        if caution:
            lines.append(caution)
    return lines


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
                         f"{src['choice']} source(s) plotted in {src['directory']}/; "
                         f"{src.get('refits', 0)} needed an MCMC refit (the others use the run's grid draws)")
        if src["cap_reached"]:
            lines.append(f"  cap reached: [output] max_source_plots = {src['cap']}; "
                         f"{src['selected'] - src['cap']} {src['choice']} source(s) not plotted "
                         "(raise the cap, or use `sedtemp plot RESULTS --source ID`)")
        lines.extend(f"  plot failed: {k}: {r}" for k, r in src["failed"])
    if "seconds" in plots:
        lines.append(f"plot time: {plots['seconds']:.1f} s")
    return lines


def write_report(tab: Table | RunTally, path: Path, *, seconds: float, n_resumed: int, plots: dict | None = None,
                 checkpoints: dict | None = None, population: dict | None = None) -> dict:
    """The run report: summary, failures with reasons, timing, plots, checkpoint events.

    Parameters
    ----------
    tab : Table or RunTally
        The results, or their tally (:class:`RunTally`, gathered chunk by chunk).
    path : Path
        File stem: ``<path>.txt`` and ``<path>.json`` are written.
    seconds : float, keyword-only
        Time of the fitting (this session), s.
    n_resumed : int, keyword-only
        Sources read back from checkpoints.
    plots : dict, optional, keyword-only
        As the batch runner collects it.
    population : dict, optional, keyword-only
        What the population stage returned (files, posterior medians).
    checkpoints : dict, optional, keyword-only
        ``damaged`` (parts removed and refitted), ``stale_lock``, ``removed_temporaries``.

    Returns
    -------
    dict
        The report content (as in the JSON file).
    """
    path = Path(path)
    tally = _tally(tab)
    summary = tally.summary()
    failed, skipped = tally.failed, tally.skipped
    n_new = tally.n - n_resumed
    rep = {"sedtemp_version": __version__, "workflow_sha256": tally.workflow_sha256 or "",
           "n_sources": tally.n, **summary, "flags": {k: v["n"] for k, v in summary["classes"].items()},
           "failed": failed, "skipped": skipped, "seconds": round(seconds, 3),
           "sources_this_session": n_new, "resumed_from_checkpoint": n_resumed,
           "sources_per_second": round(n_new / seconds, 3) if seconds > 0 else None,
           "checkpoints": checkpoints or {}}
    lines = [f"sedtemp {__version__} run report", f"workflow sha256: {rep['workflow_sha256']}",
             *summary_lines(summary, tally.n),
             f"time: {seconds:.1f} s for {n_new} source(s) this session"
             + (f" ({n_resumed} resumed from checkpoints)" if n_resumed else "")]
    for item in (checkpoints or {}).get("damaged", []):
        lines.append(f"damaged checkpoint refitted: {item}")
    if (checkpoints or {}).get("stale_lock"):
        lines.append(f"stale lock of an ended run taken over: {checkpoints['stale_lock']}")
    if plots:
        rep["plots"] = plots
        lines.extend(_plot_lines(plots))
    if population:
        rep["population"] = population
        med = ", ".join(f"{k} {v:.3g}" for k, v in population["summary"].items())
        lines.append(f"population (posterior medians): {med}"
                     + ("" if population["converged"] else " [chain not converged: see population.ecsv]"))
        lines.append("population files: " + ", ".join(population["files"]))
        lines.extend(f"population caution: {w}" for w in population.get("warnings", []))
    for title, items in (("failed", failed), ("skipped", skipped)):
        if items:
            lines.append(f"{title}:")
            lines.extend(f"  {k}: {r}" for k, r in items)
    atomic_write_text(path.with_suffix(".txt"), "\n".join(lines) + "\n")
    atomic_write_text(path.with_suffix(".json"), json.dumps(rep, indent=1, default=str))
    return rep
