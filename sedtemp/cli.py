"""The ``sedtemp`` command.

Subcommands::

    sedtemp run WORKFLOW [--output DIR] [--restart]   fit -> predict -> compare a catalogue
    sedtemp check WORKFLOW                              validate workflow and catalogue, no fitting
    sedtemp demo [--output DIR] [--sources N]           the bundled invented scenario, end to end
    sedtemp plot RESULTS [--source ID] [--output DIR]   plots from a results table

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
    pl.add_argument("results", type=Path)
    pl.add_argument("--source", help="id of one source (needs the draws file)")
    pl.add_argument("--output", type=Path, help="folder for the figures (default: next to RESULTS)")
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
    t0 = time.perf_counter()
    wf, tab, map_catalog = _load(args.workflow)
    wf.bandset()
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
    from .batch import run_batch

    mapped = map_catalog(tab, wf)
    res = run_batch(mapped, wf, output_dir=out, progress=not args.quiet, restart=restart)
    if wf.output["plots"]:
        _plots(res, out, args, wf)
    _summary(args, res, out, wf)
    return res


def _summary(args, res, out, wf):
    from collections import Counter

    from .config import OUTPUT_FORMATS

    status = Counter(str(s) for s in res["status"])
    _say(args, f"{len(res)} source(s): " + ", ".join(f"{v} {k}" for k, v in sorted(status.items())))
    if "flag" in res.colnames:
        flags = Counter(str(s) for s in res["flag"] if s)
        _say(args, "flags: " + ", ".join(f"{k}: {v}" for k, v in sorted(flags.items())))
    name = wf.output["name"]
    _say(args, f"results: {out / (name + OUTPUT_FORMATS[wf.output['format']][1])}")
    _say(args, f"report:  {out / (name + '-report.txt')}")


def _cmd_run(args) -> int:
    wf, tab, map_catalog = _load(args.workflow)
    out = args.output if args.output is not None else wf.output_dir
    _run_workflow(args, wf, tab, map_catalog, Path(out), restart=args.restart)
    return 0


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
        wf = replace(wf, output={**wf.output, "directory": str(out)})
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


def _plots(res, out, args, wf=None):
    try:
        from . import plots
    except ImportError:
        _say(args, "plots: not available (sedtemp.plots could not be imported)")
        return []
    import warnings

    out = Path(out)
    made = []
    base = res[[c for c in res.colnames if not c.startswith("draws_")]]
    if "id" not in base.colnames:
        base = base.copy()
        base["id"] = base[base.colnames[0]]
    ok = base[base["status"] == "ok"]
    jobs = [("population", plots.population_plot)]
    if "T_eq_median" in ok.colnames:
        jobs.insert(0, ("comparison", plots.comparison_plot))
    for name, fn in jobs:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # plotting hints must not stop a finished run
            try:
                fig = fn(ok, save_to=out / name)
                made.append(out / name)
                del fig
            except Exception as err:  # noqa: BLE001 - a plot failure is reported, results stay
                print(f"sedtemp: {name} plot failed: {err}", file=sys.stderr)
    if made:
        _say(args, "plots:   " + ", ".join(f"{p}.png" for p in made))
    return made


def _cmd_plot(args) -> int:
    from astropy.table import Table

    from .errors import InputError

    if not args.results.exists():
        raise InputError(f"results file {str(args.results)!r} does not exist")
    try:
        from . import plots  # noqa: F401
    except ImportError as err:
        raise SedtempError("plots are not available: sedtemp.plots could not be imported") from err
    res = Table.read(args.results)
    out = args.output if args.output is not None else args.results.parent
    if args.source is None:
        made = _plots(res, out, args)
        return 0 if made else 1
    return _plot_source(args, res, out)


def _plot_source(args, res, out):
    import numpy as np

    from . import plots
    from .errors import InputError

    idc = res.colnames[0]
    keys = np.array([str(v) for v in res[idc]])
    if args.source not in keys:
        raise InputError(f"source {args.source!r} is not in {args.results.name} (column {idc!r})")
    draws_file = args.results.with_name(args.results.stem + "-draws.h5")
    if not draws_file.exists():
        raise InputError(f"per-source plots need the posterior draws {draws_file.name}; "
                         "set keep_draws = true under [output] and run again")
    import h5py

    with h5py.File(draws_file, "r") as h5:
        ids = np.array([v.decode() for v in h5["id"][:]])
        i = int(np.flatnonzero(ids == args.source)[0])
        draws = {k: h5[k][i] for k in h5 if k != "id"}
    row = res[int(np.flatnonzero(keys == args.source)[0])]
    fig = plots.population_plot(res[res["status"] == "ok"] if "status" in res.colnames else res,
                                draws={args.source: (draws["T"], draws.get("beta"))},
                                save_to=Path(out) / f"source-{args.source}")
    del fig, row
    _say(args, f"plot: {Path(out) / f'source-{args.source}'}.png")
    return 0


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
