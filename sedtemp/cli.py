"""The ``sedtemp`` command.

Subcommands::

    sedtemp init WORKFLOW [--catalog CAT] [--force]     write a commented workflow (pre-filled from CAT)
    sedtemp check WORKFLOW [--show]                     validate workflow and catalogue; --show: dry run
    sedtemp run WORKFLOW [--output DIR] [--restart] [--limit N] [--ids A,B]
                                                        fit -> predict -> compare a catalogue
    sedtemp fit WORKFLOW --source ID [--plots DIR]      one source: summary, prediction, verdict
    sedtemp demo [--output DIR] [--sources N] [--restart]  the bundled invented scenario, end to end
    sedtemp plot RESULTS [--source ID] [--output DIR]   plots from a finished run

``init`` writes the template bundled with sedtemp (every key, its default and
a comment); with ``--catalog`` it also fills ``[catalog]`` and one
``[bands.NAME]`` table per flux/error column pair it recognises, and says what
it guessed and what it could not (:mod:`sedtemp.init_workflow`).

``check --show`` prints the resolved workflow as TOML, the band table, the
resolved model, opacity, priors and field, the range of T_eq over (a sample
of) the catalogue and a run-time estimate from timing a few sources
(:mod:`sedtemp.inspect_workflow`).

``run --ids A,B`` and ``--limit N`` run a subset of the catalogue (the listed
ids, then the first N).

``run`` (and ``demo``) write into the output folder the results table, the
run report, the draws file (``[output] keep_draws``), the catalogue plots
``population`` and ``comparison`` (``[output] plots``) and, in ``sources/``,
the corner, SED and trace plots of the sources ``[output] source_plots``
selects ("flagged" by default; at most ``max_source_plots``), each as PDF
and PNG.

``plot RESULTS`` redraws the catalogue plots from a results file (into its
folder, or ``--output DIR``). ``plot RESULTS --source ID`` makes the three
plots of one source in ``DIR/sources/`` from the results file alone: the
workflow is rebuilt from the text the results metadata records
(``workflow_text``, relative paths against ``base_dir``) and the source is
read again from ``catalog_path``; a source the run fitted by MCMC is refitted
by MCMC with its seed (corner, SED, trace), a grid source is drawn from its
grid posterior (corner, SED).

``check`` validates the workflow and the catalogue and checks that the
optional packages the workflow needs are installed (h5py for
``keep_draws``, Dask or mpi4py for those executors).

Global options, before or after the subcommand: ``--quiet`` (no progress bar
or summary), ``--debug`` (show the traceback of an error). Errors print one
line to stderr (a list of problems: one line each, repeated ones grouped) and
the command returns non-zero; Ctrl-C prints one line and returns 130.
"""

from __future__ import annotations

import argparse
import sys
import time
import traceback
from collections.abc import Sequence
from dataclasses import replace
from pathlib import Path

from ._version import __version__
from .errors import SedtempError

__all__ = ["build_parser", "main"]

_DEMO_OUTPUT = "sedtemp-demo"


QUICK_START = """\
quick start:
  sedtemp init my.toml --catalog my_catalog.ecsv   write a commented workflow for your catalogue
  sedtemp check my.toml --show                      see what it will do (bands, priors, T_eq, time)
  sedtemp run my.toml                               fit -> predict -> compare every source"""


def _global_options(parser, *, default):
    """--quiet and --debug; on the subcommands with SUPPRESS so they do not reset the global value."""
    parser.add_argument("--quiet", action="store_true", default=default, help="no progress bar or summary")
    parser.add_argument("--debug", action="store_true", default=default, help="show tracebacks of errors")


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``sedtemp`` command."""
    p = argparse.ArgumentParser(prog="sedtemp", description=(
        "Dust temperature posteriors from far-IR/submm photometry, compared with "
        "radiative equilibrium in a modelled radiation field."), epilog=QUICK_START,
        formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--version", action="version", version=f"sedtemp {__version__}")
    _global_options(p, default=False)
    common = argparse.ArgumentParser(add_help=False)
    _global_options(common, default=argparse.SUPPRESS)
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")
    i = sub.add_parser("init", parents=[common], help="write a commented workflow file")
    i.add_argument("workflow", type=Path, help="workflow TOML file to write")
    i.add_argument("--catalog", type=Path, metavar="CAT",
                   help="catalogue (ECSV, FITS, CSV with a units row): fill [catalog] and [bands] from it")
    i.add_argument("--force", action="store_true", help="overwrite an existing file")
    c = sub.add_parser("check", parents=[common], help="validate a workflow and its catalogue")
    c.add_argument("workflow", type=Path)
    c.add_argument("--show", action="store_true", help="dry run: resolved workflow, bands, priors, "
                   "field, T_eq range and an estimated run time")
    r = sub.add_parser("run", parents=[common], help="run a workflow over its catalogue")
    r.add_argument("workflow", type=Path, help="workflow TOML file")
    r.add_argument("--output", type=Path, help="output folder (default: [output] directory)")
    r.add_argument("--restart", action="store_true", help="discard checkpoints of an earlier run")
    _subset_options(r)
    f = sub.add_parser("fit", parents=[common], help="fit one source of a workflow and print its verdict")
    f.add_argument("workflow", type=Path)
    f.add_argument("--source", required=True, metavar="ID", help="id of the source (its [catalog] id_column)")
    f.add_argument("--plots", type=Path, metavar="DIR", help="also write its corner, SED and trace plots here")
    d = sub.add_parser("demo", parents=[common], help="run the bundled demo scenario")
    d.add_argument("--output", type=Path, default=Path(_DEMO_OUTPUT), help=f"folder (default {_DEMO_OUTPUT})")
    d.add_argument("--sources", type=int, default=None, help="use only the first N sources")
    d.add_argument("--restart", action="store_true", help="discard checkpoints of an earlier demo run")
    d.add_argument("--maps", action="store_true", help="the map demo instead: synthetic images of an "
                   "invented cloud, fitted pixel by pixel and compared with their truth")
    m = sub.add_parser("map", parents=[common], help="fit a workflow's FITS images pixel by pixel")
    m.add_argument("workflow", type=Path, help="workflow TOML file with a [maps] section")
    m.add_argument("--output", type=Path, help="output folder (default: [output] directory)")
    m.add_argument("--restart", action="store_true", help="discard tile checkpoints of an earlier run")
    po = sub.add_parser("population", parents=[common],
                        help="infer the (T, beta) population of a finished run from its kept draws")
    po.add_argument("results", type=Path, help="results file of a finished run (its draws file beside it)")
    po.add_argument("--model", choices=("gaussian", "mixture"), default="gaussian")
    po.add_argument("--steps", type=int, default=2000, help="emcee steps (default 2000)")
    po.add_argument("--seed", type=int, default=None, help="seed (default: the run's)")
    po.add_argument("--output", type=Path, metavar="DIR", help="folder of the files (default: that of RESULTS)")
    pl = sub.add_parser("plot", parents=[common], help="plots from a results table")
    pl.add_argument("results", type=Path, help="results file of a finished run")
    pl.add_argument("--source", metavar="ID", help="corner, SED and trace plots of this source "
                    "(refitted by MCMC with the run's workflow) instead of the catalogue plots")
    pl.add_argument("--output", type=Path, metavar="DIR",
                    help="folder for the figures (default: the folder of RESULTS)")
    return p


def _subset_options(parser):
    parser.add_argument("--limit", type=int, metavar="N", help="only the first N sources (after --ids)")
    parser.add_argument("--ids", metavar="A,B,...", help="only these source ids (comma-separated)")


def _say(args, text):
    if not args.quiet:
        print(text)


def _load(path):
    from .pipeline import map_catalog, read_catalog

    wf = _workflow(path)
    tab = read_catalog(wf.path(wf.catalog["path"]), format=wf.catalog["format"])
    return wf, tab, map_catalog


def _workflow(path):
    """Load a workflow and build what the schema alone does not check; a problem names its line."""
    import astropy.units as u

    from .errors import ConfigError
    from .inspect_workflow import with_line
    from .pipeline import load_workflow

    wf = load_workflow(path)
    try:
        wf.bandset()
        wf.build_prior()
        wf.opacity()
        wf.build_model(distance=1.0 * u.kpc) if wf.model["amplitude"] == "mass" else wf.build_model()
    except ConfigError as err:
        raise with_line(wf, err) from err
    return wf


def _subset(tab, wf, *, ids=None, limit=None):
    """The rows of ``tab`` with the given ids (catalogue order), then the first ``limit``."""
    from ._units import did_you_mean
    from .errors import CatalogError, InputError
    from .pipeline import source_key

    if ids is not None:
        wanted = [x.strip() for x in str(ids).split(",") if x.strip()]
        if not wanted:
            raise InputError(f"--ids: no id given in {ids!r}; write e.g. --ids S001,S002")
        idc = wf.catalog["id_column"]
        if idc not in tab.colnames:
            raise CatalogError(f"[catalog] id_column: column {idc!r} is not in the catalogue "
                               f"{wf.catalog['path']!r}")
        keys = [source_key(v) for v in tab[idc]]
        pos = {}
        for i, k in enumerate(keys):
            pos.setdefault(k, i)
        unknown = [w for w in wanted if w not in pos]
        if unknown:
            shown = ", ".join(repr(w) for w in unknown[:5]) + (f" and {len(unknown) - 5} more" if len(unknown) > 5 else "")
            hint = did_you_mean(unknown[0], keys[:20000]) if keys else ""
            raise CatalogError(f"source id(s) {shown} not in the catalogue {wf.catalog['path']!r} "
                               f"(column {idc!r}){hint}; ids look like {keys[0]!r}" if keys else
                               f"the catalogue {wf.catalog['path']!r} has no sources")
        tab = tab[sorted({pos[w] for w in wanted})]
    if limit is not None:
        if limit < 1:
            raise InputError(f"--limit must be >= 1, got {limit}")
        tab = tab[:limit]
    return tab


def _cmd_check(args) -> int:
    from .pipeline import check_optional_packages

    t0 = time.perf_counter()
    wf, tab, map_catalog = _load(args.workflow)
    check_optional_packages(wf)
    mapped = map_catalog(tab, wf)
    n_skip = int((mapped.skip_reason != "").sum())
    _say(args, f"{args.workflow}: workflow valid; catalogue {wf.catalog['path']!r}: {len(mapped)} "
               f"source(s), {len(mapped.band_names)} band(s), {n_skip} to be skipped "
               f"(checked in {time.perf_counter() - t0:.2f} s)")
    for key, reason in zip(mapped.keys, mapped.skip_reason, strict=True):
        if reason:
            _say(args, f"  skip {key}: {reason}")
    if not args.show:  # a cheap look at the field and opacity: does T_eq rest on an extrapolation?
        from .inspect_workflow import t_eq_range

        teq = t_eq_range(wf, mapped, max_sources=50)
        if teq is not None and teq["caution"]:
            print(f"sedtemp check: {teq['caution']}", file=sys.stderr)
    if args.show:
        from .cli_show import show

        print(show(wf, tab, mapped))
    return 0


def _run_workflow(args, wf, tab, map_catalog, out, *, restart=False, return_table=True):
    """Run the workflow into ``out`` and print its summary; the results table, or with
    ``return_table=False`` only their tally (the table is not held: memory stays flat in
    the catalogue's size)."""
    from .pipeline import check_optional_packages, run_batch

    check_optional_packages(wf)  # a missing extra fails here, before any fitting
    mapped = map_catalog(tab, wf)
    res = run_batch(mapped, wf, output_dir=out, progress=not args.quiet, restart=restart,
                    return_table=return_table)
    _summary(args, res, out, wf)
    return res


def _summary(args, res, out, wf):
    import json

    from .pipeline import OUTPUT_FORMATS, RunTally, run_summary, summary_lines

    for line in summary_lines(run_summary(res), res.n if isinstance(res, RunTally) else len(res)):
        _say(args, line)
    name = wf.output["name"]
    _say(args, f"results: {out / (name + OUTPUT_FORMATS[wf.output['format']][1])}")
    report = out / (name + "-report.txt")
    _say(args, f"report:  {report}")
    rep = report.with_suffix(".json")
    rep_data = json.loads(rep.read_text(encoding="utf-8")) if rep.exists() else {}
    plots = rep_data.get("plots", {})
    pop = rep_data.get("population")
    if pop:
        _say(args, "population: " + ", ".join(f"{k} {v:.3g}" for k, v in pop["summary"].items())
             + f" (posterior medians; {out / pop['files'][0]})")
        for w in pop.get("warnings", []):
            _say(args, f"population caution: {w}")
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
    from .pipeline import check_optional_packages
    from .pipeline.catalog import catalog_rows, stream_catalog

    wf = _workflow(args.workflow)
    path, fmt = wf.path(wf.catalog["path"]), wf.catalog["format"]
    if args.ids is None and args.limit is None:
        rows = catalog_rows(path, format=fmt)  # a FITS file memory-mapped, other formats read once
    else:
        from .pipeline import read_catalog

        rows = _subset(read_catalog(path, format=fmt), wf, ids=args.ids, limit=args.limit)
    out = args.output if args.output is not None else wf.output_dir
    check_optional_packages(wf)  # a missing extra fails here, before any fitting
    # checked a block at a time; each chunk's rows are converted as it is sent to a worker
    mapped = stream_catalog(rows, wf)
    _run_workflow(args, wf, mapped, lambda m, _: m, Path(out), restart=args.restart, return_table=False)
    return 0


def _h5py_missing() -> bool:
    try:
        import h5py  # noqa: F401
    except ImportError:
        return True
    return False


def _cmd_demo(args) -> int:
    from importlib import resources

    if args.maps:
        return _cmd_map_demo(args)

    from .pipeline import load_workflow, map_catalog, read_catalog

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
            _say(args, "demo: h5py is not installed (pip install 'sedtemp[hdf5]'): posterior draws go to a FITS table")
        wf = replace(wf, output=output)
        _say(args, f"demo: {len(tab)} sources of the invented Varnel cloud -> {args.output}")
        try:  # the folder as the user wrote it (the printed paths stay short), the same place as out
            res = _run_workflow(args, wf, tab, map_catalog, args.output, restart=args.restart)
        except SedtempError as err:  # the batch's advice names `sedtemp run`; here it is the demo
            if "sedtemp run --restart" not in str(err):
                raise
            raise type(err)(str(err).replace("sedtemp run --restart", "sedtemp demo --restart")) from err
        truth = read_catalog(wf.path("demo_truth.ecsv"))
        _say(args, _truth_score(res, truth, wf.catalog["id_column"]))
    return 0


def _truth_score(res, truth, idc):
    """One line: how often the heating class equals the true class of the invented scenario."""
    import numpy as np

    if "heating_class" not in res.colnames:
        return "no heating classes (compare stage not available)"
    t = {str(k): str(c) for k, c in zip(truth[idc], truth["true_class"], strict=True)}
    ok = [str(r["heating_class"]) == t.get(str(r[idc])) for r in res if r["status"] == "ok"]
    return f"heating class equal to the true class for {int(np.sum(ok))} of {len(ok)} fitted sources"


def _cmd_plot(args) -> int:
    from .pipeline import SOURCES_DIR, catalogue_plots

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


def _recorded_text(value):
    """The workflow text of a results file: a list of lines (ECSV), or that list as JSON text (FITS)."""
    import json

    if isinstance(value, str):
        try:
            value = json.loads(value)
        except ValueError:
            return value  # plain text (a hand-made file)
    if isinstance(value, (list, tuple)):
        return "\n".join(str(x) for x in value) + "\n"
    return None if value is None else str(value)


def _run_workflow_of(args, res):
    """The workflow of a finished run, rebuilt from the text its results file records."""
    import tomllib

    from .errors import ConfigError, InputError
    from .pipeline import parse_workflow

    text, base = _recorded_text(_meta(res, "workflow_text")), _meta(res, "base_dir")
    if not text or not base:
        raise InputError(f"{args.results.name} does not record the text of its workflow (results "
                         "metadata 'workflow_text', 'base_dir'); per-source plots refit the source "
                         "with that workflow: run it again with this sedtemp version")
    try:
        data = tomllib.loads(str(text))
    except tomllib.TOMLDecodeError as err:
        raise InputError(f"{args.results.name}: the recorded workflow text is not valid TOML ({err}); "
                         "the results file is damaged: run the workflow again") from err
    name = _meta(res, "workflow") or "<recorded workflow>"
    wf = parse_workflow(data, base_dir=Path(str(base)), source=str(name), text=str(text))
    digest = _meta(res, "workflow_sha256")
    if digest and wf.digest != digest:
        raise ConfigError(f"{args.results.name}: the recorded workflow text does not match its recorded "
                          f"sha256 ({str(digest)[:12]}... recorded, {wf.digest[:12]}... from the text); "
                          "the results file is damaged: run the workflow again")
    return wf


def _plot_source(args, res, directory):
    """Refit one source of a finished run with its recorded workflow; write its three figures."""
    import numpy as np

    from .errors import InputError
    from .pipeline import map_catalog, plot_source, read_catalog, source_key, t_eq_band

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
    cat_path = _meta(res, "catalog_path") or wf.path(wf.catalog["path"])
    if not Path(str(cat_path)).exists():
        raise InputError(f"the catalogue of {args.results.name}, {str(cat_path)!r}, no longer exists; "
                         "restore it there to refit its sources")
    cat = read_catalog(Path(str(cat_path)), format=wf.catalog["format"])
    in_cat = np.flatnonzero(np.array([source_key(v) for v in cat[wf.catalog["id_column"]]]) == args.source)
    if not in_cat.size:
        raise InputError(f"source {args.source!r} is no longer in the catalogue {str(cat_path)!r} "
                         "of the run")
    mapped = map_catalog(cat[in_cat[:1]], wf)  # map only this row: the rest is not needed
    grid = "method" in res.colnames and str(row["method"]) == "grid"
    return plot_source(wf, mapped, 0, directory, T_eq=t_eq_band(row), trace=None if grid else True)


def _cmd_init(args) -> int:
    from ._io import atomic_write_text
    from .errors import InputError
    from .init_workflow import workflow_text

    path = args.workflow
    if path.exists() and not args.force:
        raise InputError(f"{str(path)!r} already exists; choose another name or add --force to overwrite it")
    text, guess = workflow_text(args.catalog, workflow_path=path)
    path.parent.mkdir(parents=True, exist_ok=True)
    atomic_write_text(path, text)
    _say(args, f"wrote {path}: the commented workflow template" + (f", filled from {args.catalog}" if guess else ""))
    if guess is not None:
        _say(args, "guessed (check these):")
        for note in guess.notes:
            _say(args, f"  {note}")
        if guess.problems:
            _say(args, "could not guess (fill these in):")
            for prob in guess.problems:
                _say(args, f"  {prob}")
    _say(args, f"next: sedtemp check {path} --show")
    return 0


def _cmd_fit(args) -> int:
    from .errors import InputError
    from .errors import SedtempError as _Err
    from .pipeline import plot_source, process_chunk, t_eq_band

    wf, tab, map_catalog = _load(args.workflow)
    mapped = map_catalog(_subset(tab, wf, ids=args.source), wf)  # map only this row
    if mapped.skip_reason[0]:
        raise InputError(f"source {args.source!r} is skipped by this workflow ({mapped.skip_reason[0]}); "
                         "there is nothing to fit")
    row = process_chunk(wf, mapped, n_keep=0)[0]
    if row["status"] != "ok":
        raise _Err(f"source {args.source!r} failed: {row['reason']}")
    from .cli_show import source_report

    print(source_report(row, wf))
    if args.plots is not None:
        paths = plot_source(wf, mapped, 0, args.plots, T_eq=t_eq_band(row), trace=None)
        _say(args, "plots:   " + ", ".join(str(p) for p in paths if p.suffix == ".png"))
    return 0


def _map_lines(report) -> list[str]:
    lines = [f"maps: {report['maps']}"]
    for key in ("n_pixels", "n_fitted", "n_skipped", "skipped", "compare_flags", "fit_flags"):
        if key in report:
            lines.append(f"{key.replace('_', ' ')}: {report[key]}")
    if "figure" in report:
        lines.append(f"quick-look figure: {report['figure']}")
    lines.append(f"time: {report['seconds']} s ({report['tiles_resumed']} tile(s) resumed)")
    return lines


def _cmd_map(args) -> int:
    from .maps import run_map_workflow

    report = run_map_workflow(args.workflow, output_dir=args.output, restart=args.restart,
                              progress=not args.quiet)
    report.pop("hdul", None)
    for line in _map_lines(report):
        _say(args, line)
    return 0


def _cmd_map_demo(args) -> int:
    from .maps import run_map_demo

    out = args.output if args.output != Path(_DEMO_OUTPUT) else Path(_DEMO_OUTPUT + "-maps")
    _say(args, f"map demo: synthetic images of the invented Tamsin cloud -> {out}")
    report = run_map_demo(out, progress=not args.quiet)
    for line in _map_lines(report):
        _say(args, line)
    t = report["truth_comparison"]
    _say(args, "T map against the truth: " + ", ".join(f"{k} {v:.3g}" if isinstance(v, float) else f"{k} {v}"
                                                     for k, v in t.items()))
    return 0


def _cmd_population(args) -> int:
    import tomllib

    from .pipeline import parse_workflow
    from .pipeline.population_stage import population_stage, read_draws

    res = _read_results(args.results)
    text = _meta(res, "workflow_text")
    if not text:
        raise SedtempError(f"{args.results}: no workflow recorded in its metadata; is it a sedtemp results file?")
    text = _recorded_text(text)
    wf = parse_workflow(tomllib.loads(text), base_dir=_meta(res, "base_dir") or ".", text=text)
    population = {**wf.population, "enabled": True, "model": args.model, "n_steps": args.steps}
    seed = wf.run["seed"] if args.seed is None else args.seed
    wf = replace(wf, population=population, run={**wf.run, "seed": seed})
    out = args.output if args.output is not None else args.results.parent
    info = population_stage(read_draws(res, args.results), wf, out)
    _say(args, "population (posterior medians): "
         + ", ".join(f"{k} {v:.3g}" for k, v in info["summary"].items()))
    if not info["converged"]:
        _say(args, "caution: the population chain did not converge; raise --steps")
    for w in info["warnings"]:
        _say(args, f"caution: {w}")
    _say(args, "files: " + ", ".join(str(Path(out) / f) for f in info["files"]))
    return 0


_COMMANDS = {"init": _cmd_init, "check": _cmd_check, "run": _cmd_run, "fit": _cmd_fit, "demo": _cmd_demo,
             "plot": _cmd_plot, "map": _cmd_map, "population": _cmd_population}
_RESUMABLE = ("run", "demo", "map")


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``sedtemp`` command; returns the exit status.

    Parameters
    ----------
    argv : list of str, optional
        Arguments without the program name (default ``sys.argv[1:]``).

    Returns
    -------
    int
        0 on success, 1 on an error (one line on stderr, or one line per
        problem of a list; ``--debug`` adds the traceback), 2 on a usage
        error (from argparse), 130 on Ctrl-C (one line).
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
        print(f"sedtemp {args.command}: error: {_error_text(err)}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        again = "; run the same command again to resume" if args.command in _RESUMABLE else ""
        print(f"sedtemp {args.command}: interrupted{again}", file=sys.stderr)
        return 130


def _error_text(err) -> str:
    """The message of ``err``: one line, or a head line and one line per problem, repeats grouped."""
    from ._units import group_causes

    lines = [x.strip() for x in str(err).splitlines() if x.strip()]
    if len(lines) <= 2:  # one problem: one line
        return " ".join(lines)
    items = group_causes([x.removeprefix("- ") for x in lines[1:]])
    return lines[0] + "".join(f"\n  - {x}" for x in items)
