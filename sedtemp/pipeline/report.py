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
    "extrapolation_caution","LOG_EVERY_S", "Progress", "run_summary", "summary_lines", "write_report"]

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


def run_summary(tab: Table) -> dict:
    """Status and class counts, fit quality, per-class ranges and the sources to check next.

    Returns
    -------
    dict
        ``status``, ``fit_quality`` (label -> count), ``classes`` (class ->
        {"n", "T", "beta", "ratio"} with (min, max) ranges of the medians),
        ``check_next`` (ids: failed, poor fits, extra_heating/shielded with
        the highest p_warmer distance from 0.5, at most 10).
    """
    status = Counter(str(s) for s in tab["status"]) if "status" in tab.colnames else Counter()
    ok = np.asarray(tab["status"]) == STATUS_OK if "status" in tab.colnames else np.ones(len(tab), bool)
    flags = _flag_sets(tab)
    quality = {label: int(sum(1 for f, o in zip(flags, ok, strict=True) if o and flag in f)) for flag, label in _QUALITY}
    classes = {}
    if CLASS_COLUMN in tab.colnames:
        cls = np.asarray(tab[CLASS_COLUMN], dtype=str)
        for name in sorted(set(cls[ok])):
            rows = ok & (cls == name)
            classes[name] = {"n": int(rows.sum()), "T": _range(tab, "T_median", rows),
                             "beta": _range(tab, "beta_median", rows), "ratio": _range(tab, "ratio_median", rows)}
    ids = [str(v) for v in tab[tab.colnames[0]]] if len(tab.colnames) else []
    nxt = [ids[i] for i in range(len(tab)) if not ok[i] and str(tab["status"][i]) == STATUS_FAILED]
    nxt += [ids[i] for i in range(len(tab)) if ok[i] and "poor_fit" in flags[i]]
    if CLASS_COLUMN in tab.colnames and "p_warmer" in tab.colnames:
        cls = np.asarray(tab[CLASS_COLUMN], dtype=str)
        sure = np.abs(np.asarray(tab["p_warmer"], float) - 0.5)
        cand = [i for i in np.argsort(-np.nan_to_num(sure)) if ok[i] and cls[i] in ("extra_heating", "shielded")]
        nxt += [ids[i] for i in cand]
    return {"status": dict(status), "fit_quality": quality, "classes": classes,
            "check_next": list(dict.fromkeys(nxt))[:_NEXT],
            "opacity_extrapolated": _extrapolated(tab, ok)}


def _extrapolated(tab, ok):
    """(count above the warning fraction, largest fraction) of opacity_extrapolated_fraction, or None."""
    if "opacity_extrapolated_fraction" not in tab.colnames:
        return None
    f = np.asarray(tab["opacity_extrapolated_fraction"], float)[ok]
    f = f[np.isfinite(f)]
    if f.size == 0:
        return None
    return int(np.sum(f > EXTRAPOLATION_WARN_FRACTION)), float(f.max())


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


def write_report(tab: Table, path: Path, *, seconds: float, n_resumed: int, plots: dict | None = None,
                 checkpoints: dict | None = None, population: dict | None = None) -> dict:
    """The run report: summary, failures with reasons, timing, plots, checkpoint events.

    Parameters
    ----------
    tab : Table
        The results.
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
    summary = run_summary(tab)
    failed = [(str(r[0]), str(r["reason"])) for r in tab if r["status"] == STATUS_FAILED]
    skipped = [(str(r[0]), str(r["reason"])) for r in tab if r["status"] == STATUS_SKIPPED]
    n_new = len(tab) - n_resumed
    rep = {"sedtemp_version": __version__, "workflow_sha256": tab.meta.get("workflow_sha256", ""),
           "n_sources": len(tab), **summary, "flags": {k: v["n"] for k, v in summary["classes"].items()},
           "failed": failed, "skipped": skipped, "seconds": round(seconds, 3),
           "sources_this_session": n_new, "resumed_from_checkpoint": n_resumed,
           "sources_per_second": round(n_new / seconds, 3) if seconds > 0 else None,
           "checkpoints": checkpoints or {}}
    lines = [f"sedtemp {__version__} run report", f"workflow sha256: {rep['workflow_sha256']}",
             *summary_lines(summary, len(tab)),
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
