"""The ``sedtemp`` command.

Subcommands::

    sedtemp run WORKFLOW [--output DIR] [--restart]   fit -> predict -> compare a catalogue
    sedtemp check WORKFLOW                              validate workflow and catalogue, no fitting
    sedtemp demo [--output DIR] [--sources N]           the bundled invented scenario, end to end
    sedtemp plot RESULTS [--source ID] [--output DIR]   plots from a finished run

``run`` (and ``demo``) write into the output folder the results table, the
run report, the draws file (``[output] keep_draws``), the catalogue plots
``population`` and ``comparison`` (``[output] plots``) and, in ``sources/``,
the corner, SED and trace plots of the sources ``[output] source_plots``
selects ("flagged" by default; at most ``max_source_plots``), each as PDF
and PNG.

``plot RESULTS`` redraws the catalogue plots from a results file (into its
folder, or ``--output DIR``). ``plot RESULTS --source ID`` makes the three
plots of one source in ``DIR/sources/``: it refits the source by MCMC with
the run's workflow, whose path and sha256 the results file records; it
refuses if that workflow has changed since the run.

``check`` validates the workflow and the catalogue and checks that the
optional packages the workflow needs are installed (h5py for
``keep_draws``, Dask or mpi4py for those executors).

Global options: ``--quiet`` (no progress bar or summary), ``--debug`` (show
the traceback of an error). Errors print one line to stderr and the command
returns non-zero.
"""

from __future__ import annotations

import argparse
import sys
import time
import traceback
from dataclasses import replace
from pathlib import Path

from . import __version__
from .errors import SedtempError

__all__ = ["main", "build_parser"]

_DEMO_OUTPUT = "sedtemp-demo"


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``sedtemp`` command."""
    p = argparse.ArgumentParser(prog="sedtemp", description=(
        "Dust temperature posteriors from far-IR/submm photometry, compared with "
        "radiative equilibrium in a modelled radiation field."))
    p.add_argument("--version", action="version", version=f"sedtemp {__version__}")
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--quiet", action="store_true", help="no progress bar or summary")
    common.add_argument("--debug", action="store_true", help="show tracebacks of errors")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")
    r = sub.add_parser("run", parents=[common], help="run a workflow over its catalogue")
    r.add_argument("workflow", type=Path, help="workflow TOML file")
    r.add_argument("--output", type=Path, help="output folder (default: [output] directory)")
    r.add_argument("--restart", action="store_true", help="discard checkpoints of an earlier run")
    c = sub.add_parser("check", parents=[common], help="validate a workflow and its catalogue")
    c.add_argument("workflow", type=Path)
    d = sub.add_parser("demo", parents=[common], help="run the bundled demo scenario")
    d.add_argument("--output", type=Path, default=Path(_DEMO_OUTPUT), help=f"folder (default {_DEMO_OUTPUT})")
    d.add_argument("--sources", type=int, default=None, help="use only the first N sources")
    pl = sub.add_parser("plot", parents=[common], help="plots from a results table")
    pl.add_argument("results", type=Path, help="results file of a finished run")
    pl.add_argument("--source", metavar="ID", help="corner, SED and trace plots of this source "
                    "(refitted by MCMC with the run's workflow) instead of the catalogue plots")
    pl.add_argument("--output", type=Path, metavar="DIR",
                    help="folder for the figures (default: the folder of RESULTS)")
    return p


def _say(args, text):
    if not args.quiet:
        print(text)


def _load(path):
    from .catalog import map_catalog, read_catalog
    from .config import load_workflow

    wf = load_workflow(path)
    tab = read_catalog(wf.path(wf.catalog["path"]), format=wf.catalog["format"])
    return wf, tab, map_catalog


def _cmd_check(args) -> int:
    from .batch import check_optional_packages

    t0 = time.perf_counter()
    wf, tab, map_catalog = _load(args.workflow)
    wf.bandset()
    check_optional_packages(wf)
    mapped = map_catalog(tab, wf)
    n_skip = int((mapped.skip_reason != "").sum())
    _say(args, f"{args.workflow}: workflow valid; catalogue {wf.catalog['path']!r}: {len(mapped)} "
               f"source(s), {len(mapped.band_names)} band(s), {n_skip} to be skipped "
               f"(checked in {time.perf_counter() - t0:.2f} s)")
    for key, reason in zip(mapped.keys, mapped.skip_reason):
        if reason:
            _say(args, f"  skip {key}: {reason}")
    return 0


def _run_workflow(args, wf, tab, map_catalog, out, *, restart=False):
    from .batch import check_optional_packages, run_batch

    check_optional_packages(wf)  # a missing extra fails here, before any fitting
    mapped = map_catalog(tab, wf)
    res = run_batch(mapped, wf, output_dir=out, progress=not args.quiet, restart=restart)
    _summary(args, res, out, wf)
    return res


def _summary(args, res, out, wf):
    import json
    from collections import Counter

    from .config import OUTPUT_FORMATS

    status = Counter(str(s) for s in res["status"])
    _say(args, f"{len(res)} source(s): " + ", ".join(f"{v} {k}" for k, v in sorted(status.items())))
    if "flag" in res.colnames:
        flags = Counter(str(s) for s in res["flag"] if s)
        _say(args, "flags: " + ", ".join(f"{k}: {v}" for k, v in sorted(flags.items())))
    name = wf.output["name"]
    _say(args, f"results: {out / (name + OUTPUT_FORMATS[wf.output['format']][1])}")
    report = out / (name + "-report.txt")
    _say(args, f"report:  {report}")
    rep = report.with_suffix(".json")
    plots = json.loads(rep.read_text(encoding="utf-8")).get("plots", {}) if rep.exists() else {}
    cat = plots.get("catalogue")
    if cat is not None:
        _say(args, "plots:   " + (", ".join(str(out / f"{n}.png") for n in cat["made"]) or "none"))
        for msg in cat["failed"]:
            print(f"sedtemp: plot failed: {msg}", file=sys.stderr)
    src = plots.get("sources")
    if src is not None and src["choice"] != "none":
        cap = f" (cap max_source_plots = {src['cap']} reached)" if src["cap_reached"] else ""
        _say(args, f"source plots: {src['made']} of {src['selected']} {src['choice']} source(s) in "
                   f"{out / src['directory']}{cap}")
        for key, msg in src["failed"]:
            print(f"sedtemp: plots of source {key!r} failed: {msg}", file=sys.stderr)


def _cmd_run(args) -> int:
    wf, tab, map_catalog = _load(args.workflow)
    out = args.output if args.output is not None else wf.output_dir
    _run_workflow(args, wf, tab, map_catalog, Path(out), restart=args.restart)
    return 0


def _h5py_missing() -> bool:
    try:
        import h5py  # noqa: F401
    except ImportError:
        return True
    return False


def _cmd_demo(args) -> int:
    from importlib import resources

    from .catalog import map_catalog, read_catalog
    from .config import load_workflow

    with resources.as_file(resources.files("sedtemp") / "data" / "demo" / "demo.toml") as path:
        wf = load_workflow(path)
        tab = read_catalog(wf.path(wf.catalog["path"]), format=wf.catalog["format"])
        if args.sources is not None:
            if args.sources < 1:
                raise SedtempError(f"--sources must be >= 1, got {args.sources}")
            tab = tab[: args.sources]
        out = args.output.resolve()
        output = {**wf.output, "directory": str(out)}
        if output["keep_draws"] and _h5py_missing():  # h5py is the optional extra sedtemp[hdf5]
            output["keep_draws"] = False
            _say(args, "demo: h5py is not installed (pip install 'sedtemp[hdf5]'): posterior draws not written")
        wf = replace(wf, output=output)
        _say(args, f"demo: {len(tab)} sources of the invented Varnel cloud -> {out}")
        res = _run_workflow(args, wf, tab, map_catalog, out)
        truth = read_catalog(wf.path("demo_truth.ecsv"))
        _say(args, _truth_score(res, truth, wf.catalog["id_column"]))
    return 0


def _truth_score(res, truth, idc):
    """One line: how often the flag equals the true heating class of the invented scenario."""
    import numpy as np

    if "flag" not in res.colnames:
        return "no comparison flags (compare stage not available)"
    t = {str(k): str(c) for k, c in zip(truth[idc], truth["true_class"])}
    ok = [str(r["flag"]) == t.get(str(r[idc])) for r in res if r["status"] == "ok"]
    return f"flags equal to the true class for {int(np.sum(ok))} of {len(ok)} fitted sources"


def _cmd_plot(args) -> int:
    from .batch import SOURCES_DIR, catalogue_plots

    res = _read_results(args.results)
    out = Path(args.output if args.output is not None else args.results.parent)
    if args.source is not None:
        paths = _plot_source(args, res, out / SOURCES_DIR)
        _say(args, "plots:   " + ", ".join(str(p) for p in paths if p.suffix == ".png"))
        return 0
    made, failed = catalogue_plots(res, out)
    for msg in failed:
        print(f"sedtemp plot: {msg}", file=sys.stderr)
    if made:
        _say(args, "plots:   " + ", ".join(f"{p}.png" for p in made))
    return 0 if made and not failed else 1


def _read_results(path):
    from astropy.io.registry import IORegistryError
    from astropy.table import Table

    from .errors import InputError

    if not path.exists():
        raise InputError(f"results file {str(path)!r} does not exist")
    try:
        return Table.read(path, format="ascii.ecsv" if path.suffix.lower() == ".ecsv" else None)
    except (OSError, ValueError, TypeError, IORegistryError) as err:
        raise InputError(f"cannot read results file {path.name!r}: {err}") from err


def _meta(res, key):
    """A results-file metadata entry; FITS headers give the keys back in upper case."""
    for k, v in res.meta.items():
        if str(k).lower() == key:
            return v
    return None


def _run_workflow_of(args, res):
    """The workflow recorded in a results file, unchanged since the run."""
    from .config import load_workflow
    from .errors import ConfigError, InputError

    path, digest = _meta(res, "workflow_path"), _meta(res, "workflow_sha256")
    if not path or not digest:
        raise InputError(f"{args.results.name} does not record the path and sha256 of its workflow "
                         "(results metadata 'workflow_path', 'workflow_sha256'); per-source plots "
                         "refit the source with that workflow: run it again with this sedtemp version")
    if not Path(path).exists():
        raise ConfigError(f"the workflow of {args.results.name}, {path!r}, no longer exists; "
                          "restore it there to refit its sources")
    wf = load_workflow(path)
    if wf.digest != digest:
        raise ConfigError(f"the workflow {path!r} has changed since {args.results.name} was made "
                          f"(sha256 {digest[:12]}... recorded, {wf.digest[:12]}... now); restore it, "
                          "or run it again, before plotting its sources")
    return wf


def _plot_source(args, res, directory):
    """Refit one source of a finished run with its recorded workflow; write its three figures."""
    import numpy as np

    from .catalog import map_catalog, read_catalog
    from .errors import InputError
    from .pipeline import plot_source, t_eq_band

    idc = _meta(res, "id_column") or res.colnames[0]
    keys = [str(v) for v in res[idc]]
    if args.source not in keys:
        raise InputError(f"source {args.source!r} is not in {args.results.name} (column {idc!r}); "
                         f"ids look like {keys[0]!r}" if keys else f"{args.results.name} has no sources")
    row = res[keys.index(args.source)]
    if "status" in res.colnames and row["status"] != "ok":
        raise InputError(f"source {args.source!r} has status {str(row['status'])!r} in {args.results.name} "
                         f"({row['reason']}); there is no posterior to plot")
    wf = _run_workflow_of(args, res)
    cat = read_catalog(wf.path(wf.catalog["path"]), format=wf.catalog["format"])
    in_cat = np.flatnonzero(np.array([str(v) for v in cat[wf.catalog["id_column"]]]) == args.source)
    if not in_cat.size:
        raise InputError(f"source {args.source!r} is no longer in the catalogue {wf.catalog['path']!r} "
                         "of the workflow")
    mapped = map_catalog(cat[in_cat[:1]], wf)  # map only this row: the rest is not needed
    return plot_source(wf, mapped, 0, directory, T_eq=t_eq_band(row))


_COMMANDS = {"run": _cmd_run, "check": _cmd_check, "demo": _cmd_demo, "plot": _cmd_plot}


def main(argv=None) -> int:
    """Entry point of the ``sedtemp`` command; returns the exit status.

    Parameters
    ----------
    argv : list of str, optional
        Arguments without the program name (default ``sys.argv[1:]``).

    Returns
    -------
    int
        0 on success, 1 on an error (one line on stderr; ``--debug`` adds the
        traceback), 2 on a usage error (from argparse).
    """
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse: --help, --version or a usage error
        return int(exc.code or 0)
    try:
        return _COMMANDS[args.command](args)
    except (SedtempError, ImportError, OSError) as err:
        if args.debug:
            traceback.print_exc()
        print(f"sedtemp {args.command}: error: {_one_line(err)}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("sedtemp: interrupted; run the same command again to resume", file=sys.stderr)
        return 130


def _one_line(err) -> str:
    text = str(err)
    lines = text.splitlines()
    if len(lines) > 1:  # a validation report: keep it, but as one line per problem is clearer
        return lines[0] + " " + " ".join(x.strip() for x in lines[1:])
    return text
