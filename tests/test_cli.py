"""The sedtemp command, in-process; python -m sedtemp; resume after SIGKILL in a subprocess."""

import os
import signal
import subprocess
import sys
import time

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table
from invented import CATALOG_WAVE, invented_catalog

from sedtemp import __version__
from sedtemp.cli import main

WAVE = CATALOG_WAVE


def _catalog(n, seed=5):
    return invented_catalog(n, seed, unit=u.mJy)


def _workflow_text(extra_fit="", executor="serial", chunk=4, extra_output='source_plots = "none"', extra=""):
    bands = "\n".join(f'[bands.b{w}]\nflux = "F{w}"\nerror = "E{w}"\n'
                      f'tophat = {{ center = "{w} um", width = 0.3 }}\n' for w in WAVE)
    return f"""
[run]
seed = 3
executor = "{executor}"
chunk_size = {chunk}

[catalog]
path = "cat.ecsv"
id_column = "name"
distance = "400 pc"

{bands}
[fit]
n_T = 40
n_beta = 24
n_draws = 200
{extra_fit}

[priors.T]
kind = "uniform"
low = 5.0
high = 60.0

{extra}
[output]
directory = "out"
{extra_output}
"""


@pytest.fixture
def case(tmp_path):
    _catalog(10).write(tmp_path / "cat.ecsv")
    wf = tmp_path / "wf.toml"
    wf.write_text(_workflow_text())
    return tmp_path, wf


def test_check_valid(case, capsys):
    _, wf = case
    assert main(["check", str(wf)]) == 0
    out = capsys.readouterr().out
    assert "workflow valid; catalogue 'cat.ecsv': 10 source(s), 5 band(s), 0 to be skipped" in out


def test_check_reports_catalogue_problems_on_one_line(case, capsys):
    tmp, wf = case
    t = Table.read(tmp / "cat.ecsv")
    t["E160"][3] = -1.0
    t.write(tmp / "cat.ecsv", overwrite=True)
    assert main(["check", str(wf)]) == 1
    err = capsys.readouterr().err
    assert err.count("\n") == 1  # one line
    assert err.startswith("sedtemp check: error: catalogue 'cat.ecsv' has 1 problem(s): - band 'b160': "
                          "error is not positive for 1 source(s): 'S003'")


def test_config_error_and_debug_traceback(case, capsys):
    _tmp, wf = case
    wf.write_text(wf.read_text().replace("[fit]", "[fit]\nmethdo = 'grid'"))
    assert main(["check", str(wf)]) == 1
    err = capsys.readouterr().err
    assert "sedtemp check: error: wf.toml line" in err and "[fit] 'methdo': unknown key" in err
    assert "Traceback" not in err
    assert main(["check", str(wf), "--debug"]) == 1
    assert "Traceback (most recent call last)" in capsys.readouterr().err


def test_run_writes_results_report_and_plot(case, capsys):
    tmp, wf = case
    assert main(["run", str(wf), "--quiet"]) == 0
    assert capsys.readouterr().out == ""  # --quiet: nothing on stdout
    res = Table.read(tmp / "out" / "results.ecsv")
    assert res.colnames[0] == "name" and len(res) == 10 and set(res["status"]) == {"ok"}
    assert res.meta["sedtemp_version"] == __version__
    assert (tmp / "out" / "results-report.txt").read_text().startswith(f"sedtemp {__version__} run report")
    assert (tmp / "out" / "population.png").stat().st_size > 0
    assert main(["plot", str(tmp / "out" / "results.ecsv"), "--output", str(tmp / "figs")]) == 0
    assert (tmp / "figs" / "population.png").exists()


def test_plot_errors(case, capsys):
    tmp, _ = case
    assert main(["plot", str(tmp / "none.ecsv")]) == 1
    assert "sedtemp plot: error: results file" in capsys.readouterr().err


def test_usage_error_returns_2(capsys):
    assert main(["frobnicate"]) == 2
    assert "invalid choice: 'frobnicate'" in capsys.readouterr().err


def test_python_dash_m():
    out = subprocess.run([sys.executable, "-m", "sedtemp", "--version"], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0 and out.stdout.strip() == f"sedtemp {__version__}"


def test_resume_after_sigkill(tmp_path):
    """Kill the run once the first chunk is written; the rerun equals an uninterrupted run."""
    _catalog(12).write(tmp_path / "cat.ecsv")
    # the last sources go through emcee so the run lasts long enough to be killed mid-way
    mcmc = 'mcmc_sources = ["S009", "S010", "S011"]\nn_walkers = 16\ness_target = 40\nmax_steps = 600'
    wf = tmp_path / "wf.toml"
    wf.write_text(_workflow_text(mcmc, chunk=2))
    cmd = [sys.executable, "-m", "sedtemp", "run", str(wf), "--quiet"]
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    parts = tmp_path / "out" / "parts"
    t0 = time.time()
    while not list(parts.glob("part-*.ecsv")) and proc.poll() is None and time.time() - t0 < 120:
        time.sleep(0.05)
    assert proc.poll() is None, "run ended before it could be killed"
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    assert not (tmp_path / "out" / "results.ecsv").exists()
    n_done = len(list(parts.glob("part-*.ecsv")))
    assert 1 <= n_done < 6
    rerun = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert rerun.returncode == 0, rerun.stderr
    resumed = Table.read(tmp_path / "out" / "results.ecsv")
    assert resumed["name"].tolist() == [f"S{i:03d}" for i in range(12)]  # none lost, none twice
    report = (tmp_path / "out" / "results-report.txt").read_text()
    assert f"({2 * n_done} resumed from checkpoints)" in report
    # uninterrupted reference run of the same command in a fresh process (same environment:
    # BLAS thread settings of this test process may differ after other tests), another folder
    ref_run = subprocess.run([*cmd, "--output", str(tmp_path / "ref")], capture_output=True, text=True, timeout=300)
    assert ref_run.returncode == 0, ref_run.stderr
    ref = Table.read(tmp_path / "ref" / "results.ecsv")
    assert ref.colnames == resumed.colnames
    for c in ref.colnames:
        if ref[c].dtype.kind == "f":
            np.testing.assert_array_equal(np.asarray(resumed[c]), np.asarray(ref[c]), err_msg=c)
        else:
            assert resumed[c].tolist() == ref[c].tolist(), c
    assert resumed["method"].tolist() == ["grid"] * 9 + ["mcmc"] * 3


# ------------------------------------------------------------ per-source plots
FIELD = '[[field.components]]\nkind = "isrf"\nU = 1.0\n'
MCMC = "n_walkers = 16\ness_target = 40\nmax_steps = 2000"


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    """A finished run (no per-source plots) of 6 sources in a field, S004 by MCMC: results file, workflow."""
    tmp = tmp_path_factory.mktemp("finished")
    _catalog(6).write(tmp / "cat.ecsv")
    wf = tmp / "wf.toml"
    wf.write_text(_workflow_text(MCMC + '\nmcmc_sources = ["S004"]', extra=FIELD))
    assert main(["run", str(wf), "--quiet"]) == 0
    return tmp / "out" / "results.ecsv", wf


def _recording_corner(monkeypatch):
    from sedtemp import plots

    seen = []
    real = plots.corner_plot

    def recording(result, **kw):
        seen.append((result, kw["T_eq"]))
        return real(result, **kw)

    monkeypatch.setattr(plots, "corner_plot", recording)
    return seen


def _moved(finished, tmp_path):
    """The finished run's results file alone, its workflow file gone: plot --source needs only the results."""
    results, wf = finished
    moved = tmp_path / "moved.ecsv"
    moved.write_bytes(results.read_bytes())
    hidden = wf.with_name("wf.toml.away")
    wf.rename(hidden)
    return moved, hidden, wf


@pytest.mark.parametrize("key, kinds", [("S003", ("corner", "sed")), ("S004", ("corner", "sed", "trace"))])
def test_plot_source_from_the_results_file_alone(finished, tmp_path, monkeypatch, capsys, key, kinds):
    results, _ = finished
    res = Table.read(results)
    seen = _recording_corner(monkeypatch)
    moved, hidden, wf = _moved(finished, tmp_path)
    try:
        assert main(["plot", str(moved), "--source", key, "--output", str(tmp_path)]) == 0
    finally:
        hidden.rename(wf)
    names = sorted(p.name for p in (tmp_path / "sources").iterdir())
    assert names == sorted(f"{key}_{k}.{e}" for k in kinds for e in ("pdf", "png"))
    assert str(tmp_path / "sources" / f"{key}_{kinds[-1]}.png") in capsys.readouterr().out
    (result, t_eq), = seen
    row = res[int(key[1:])]
    assert row["method"] == ("mcmc" if key == "S004" else "grid")
    # the predicted T_eq of the row is shaded: the comparison's 68 % interval
    np.testing.assert_array_equal(t_eq, [row["T_eq_p16"], row["T_eq_p84"]])
    t = np.asarray(result.samples["T"])
    if key == "S004":  # the MCMC refit with the source's seed repeats the run's chain (exact behaviour)
        assert np.median(t) == pytest.approx(float(row["T_median"]), rel=1e-9)
    else:  # draws of the run's grid posterior: their median agrees with the grid's quantile within
        # 4 Monte Carlo errors (sd / sqrt(n)) plus the node spacing in T (40 log nodes over 5-60 K)
        grid_step = float(row["T_median"]) * np.log(60 / 5) / 39
        assert abs(np.median(t) - float(row["T_median"])) < 4 * np.std(t) / np.sqrt(t.size) + grid_step


def test_plot_source_errors(finished, tmp_path, capsys):
    results, _ = finished
    assert main(["plot", str(results), "--source", "S999"]) == 1
    assert ("sedtemp plot: error: source 'S999' is not in results.ecsv (column 'name'); ids look like 'S000'"
            in capsys.readouterr().err)
    res = Table.read(results)
    failed = res.copy()
    failed["status"], failed["reason"] = failed["status"].astype("U8"), failed["reason"].astype("U40")
    failed["status"][2], failed["reason"][2] = "failed", "fit: FloatingPointError: invented"
    failed.write(tmp_path / "failed.ecsv")
    assert main(["plot", str(tmp_path / "failed.ecsv"), "--source", "S002"]) == 1
    assert ("source 'S002' has status 'failed' in failed.ecsv (fit: FloatingPointError: invented); there is no "
            "posterior to plot" in capsys.readouterr().err)
    bare = res.copy()
    bare.meta = {}
    bare.write(tmp_path / "bare.ecsv")
    assert main(["plot", str(tmp_path / "bare.ecsv"), "--source", "S001"]) == 1
    assert ("bare.ecsv does not record the text of its workflow (results metadata 'workflow_text', "
            "'base_dir')" in capsys.readouterr().err)
    changed = res.copy()
    changed.meta["workflow_text"] = [x.replace("seed = 3", "seed = 4") for x in res.meta["workflow_text"]]
    changed.write(tmp_path / "changed.ecsv")
    assert main(["plot", str(tmp_path / "changed.ecsv"), "--source", "S001"]) == 1
    assert ("changed.ecsv: the recorded workflow text does not match its recorded sha256 ("
            in capsys.readouterr().err)
    gone = res.copy()
    gone.meta["catalog_path"] = str(tmp_path / "gone.ecsv")
    gone.write(tmp_path / "nocat.ecsv")
    assert main(["plot", str(tmp_path / "nocat.ecsv"), "--source", "S001"]) == 1
    assert (f"the catalogue of nocat.ecsv, '{tmp_path / 'gone.ecsv'}', no longer exists; restore it there"
            in capsys.readouterr().err)
    assert not (tmp_path / "sources").exists()


def test_keep_draws_without_h5py_go_to_a_fits_table(case, monkeypatch, capsys):
    tmp, wf = case
    wf.write_text(wf.read_text().replace('directory = "out"', 'directory = "out"\nkeep_draws = true\nn_keep = 50'))
    monkeypatch.setitem(sys.modules, "h5py", None)  # `import h5py` now raises ImportError
    assert main(["run", str(wf), "--quiet"]) == 0
    assert not (tmp / "out" / "results-draws.h5").exists()
    draws = Table.read(tmp / "out" / "results-draws.fits")
    res = Table.read(tmp / "out" / "results.ecsv")
    assert list(draws["id"]) == list(res["name"])
    assert draws["T"].shape == (10, 50)  # exact: n_keep draws per source
    # the draws are the posterior's: their median is the table's T_median within the draw noise
    ok = res["status"] == "ok"
    med = np.median(draws["T"][ok], axis=1)
    width = (res["T_p84"] - res["T_p16"]).value[ok]
    assert np.all(np.abs(med - res["T_median"].value[ok]) < 0.5 * width)


def test_population_stage_and_command(case, capsys):
    tmp, wf = case
    wf.write_text(wf.read_text().replace('directory = "out"', 'directory = "out"\nkeep_draws = true\nn_keep = 50')
                  + "\n[population]\nenabled = true\nn_steps = 300\nn_walkers = 16\n")
    assert main(["run", str(wf), "--quiet"]) == 0
    pop = Table.read(tmp / "out" / "population.ecsv")
    assert list(pop["parameter"]) == ["T_mean", "beta_mean", "T_sd", "beta_sd", "rho"]
    # the invented catalogue draws T uniformly in 12-30 K (mean 21 K, sd 5.2 K): a loose check
    # that the population is the catalogue's, at 10 sources and a short chain
    t_mean = float(pop["median"][0])
    assert 15.0 < t_mean < 27.0
    report = (tmp / "out" / "results-report.txt").read_text()
    assert "population (posterior medians): T_mean" in report
    assert main(["population", str(tmp / "out" / "results.ecsv"), "--steps", "300",
                 "--output", str(tmp / "pop")]) == 0
    out = capsys.readouterr().out
    assert "population (posterior medians): T_mean" in out
    assert (tmp / "pop" / "population_posterior.png").exists()
    again = Table.read(tmp / "pop" / "population.ecsv")
    # the same run seed and draws with another chain length: the same population within its width
    sd = float(again["p84"][0] - again["p16"][0])
    assert abs(float(again["median"][0]) - t_mean) < sd


def test_population_needs_kept_draws(case, capsys):
    tmp, wf = case
    wf.write_text(wf.read_text().replace('directory = "out"', 'directory = "out"\nn_keep = 1')
                  + "\n[population]\nenabled = true\n")
    assert main(["check", str(wf)]) == 1
    assert "needs posterior draws: set [output] n_keep to 200 or so" in capsys.readouterr().err
    wf.write_text(wf.read_text().replace("n_keep = 1", "n_keep = 20").replace("enabled = true", 'model = "wide"'))
    assert main(["check", str(wf)]) == 1
    assert 'must be "gaussian" or "mixture", got \'wide\'' in capsys.readouterr().err
    wf.write_text(wf.read_text().replace('model = "wide"', ""))
    assert main(["run", str(wf), "--quiet"]) == 0
    assert main(["population", str(tmp / "out" / "results.ecsv")]) == 1
    assert "no draws file beside it" in capsys.readouterr().err


# ------------------------------------------------ global options, help, Ctrl-C
def test_global_options_before_or_after_the_subcommand(case, capsys):
    _tmp, wf = case
    for argv in (["--quiet", "check", str(wf)], ["check", str(wf), "--quiet"], ["check", "--quiet", str(wf)]):
        assert main(argv) == 0, argv
        assert capsys.readouterr().out == "", argv
    wf.write_text(wf.read_text().replace("[fit]", "[fit]\nmethdo = 'grid'"))
    assert main(["--debug", "check", str(wf)]) == 1
    assert "Traceback (most recent call last)" in capsys.readouterr().err
    assert main(["check", str(wf), "--debug"]) == 1
    assert "Traceback (most recent call last)" in capsys.readouterr().err


def test_help_ends_with_a_three_line_quick_start(capsys):
    assert main(["--help"]) == 0
    lines = capsys.readouterr().out.rstrip().splitlines()
    assert lines[-4] == "quick start:"
    assert [x.split()[:2] for x in lines[-3:]] == [["sedtemp", "init"], ["sedtemp", "check"], ["sedtemp", "run"]]
    assert "--show" in lines[-2] and "--catalog" in lines[-3]


@pytest.mark.parametrize("command, tail", [("check", ""), ("run", "; run the same command again to resume")])
def test_ctrl_c_prints_one_line(case, monkeypatch, capsys, command, tail):
    from sedtemp import cli

    def interrupted(args):
        raise KeyboardInterrupt

    monkeypatch.setitem(cli._COMMANDS, command, interrupted)
    _, wf = case
    assert main([command, str(wf)]) == 130
    captured = capsys.readouterr()
    assert captured.err == f"sedtemp {command}: interrupted{tail}\n" and "Traceback" not in captured.err


def test_demo_accepts_restart(monkeypatch, tmp_path, capsys):
    """`sedtemp demo --restart` passes restart=True to the run (the demo's own message names --restart)."""
    from sedtemp import cli
    from sedtemp.errors import SedtempError

    seen = {}

    def recording(args, wf, tab, map_catalog, out, *, restart=False):
        seen["restart"], seen["n"] = restart, len(tab)
        raise SedtempError("stopped by the test")

    monkeypatch.setattr(cli, "_run_workflow", recording)
    assert main(["demo", "--sources", "4", "--output", str(tmp_path / "d"), "--restart", "--quiet"]) == 1
    assert seen == {"restart": True, "n": 4}
    assert "sedtemp demo: error: stopped by the test" in capsys.readouterr().err
    assert main(["demo", "--sources", "4", "--output", str(tmp_path / "d"), "--quiet"]) == 1
    assert seen["restart"] is False


def test_many_problems_one_line_each_repeats_grouped(case, capsys):
    tmp, wf = case
    t = Table.read(tmp / "cat.ecsv")
    t["E160"][3] = -1.0
    t["E250"][4] = -1.0
    t.write(tmp / "cat.ecsv", overwrite=True)
    assert main(["check", str(wf)]) == 1
    lines = capsys.readouterr().err.splitlines()
    assert lines == ["sedtemp check: error: catalogue 'cat.ecsv' has 2 problem(s):",
                     "  - band 'b160': error is not positive for 1 source(s): 'S003'",
                     "  - band 'b250': error is not positive for 1 source(s): 'S004'"]


def test_error_text_groups_repeated_causes():
    from sedtemp.cli import _error_text
    from sedtemp.errors import CatalogError

    err = CatalogError("catalogue 'c' has 3 problem(s):\n  - unit 'mjy' is not a unit\n  - unit 'mjy' is not a unit"
                       "\n  - column 'x' is missing")
    assert _error_text(err) == ("catalogue 'c' has 3 problem(s):\n  - unit 'mjy' is not a unit (2 times)\n"
                                "  - column 'x' is missing")


# ------------------------------------------------------------ run subsets
def test_run_ids_and_limit(case, capsys):
    tmp, wf = case
    assert main(["run", str(wf), "--ids", "S007, S001,S004", "--quiet", "--output", str(tmp / "ids")]) == 0
    assert Table.read(tmp / "ids" / "results.ecsv")["name"].tolist() == ["S001", "S004", "S007"]  # catalogue order
    assert main(["run", str(wf), "--limit", "3", "--quiet", "--output", str(tmp / "lim")]) == 0
    assert Table.read(tmp / "lim" / "results.ecsv")["name"].tolist() == ["S000", "S001", "S002"]
    assert main(["run", str(wf), "--ids", "S009,S004", "--limit", "1", "--quiet", "--output", str(tmp / "both")]) == 0
    assert Table.read(tmp / "both" / "results.ecsv")["name"].tolist() == ["S004"]


def test_run_unknown_id_is_an_error_naming_it(case, capsys):
    tmp, wf = case
    assert main(["run", str(wf), "--ids", "S001,S01,Q7"]) == 1
    err = capsys.readouterr().err
    assert ("sedtemp run: error: source id(s) 'S01', 'Q7' not in the catalogue 'cat.ecsv' (column 'name') "
            "(did you mean 'S001'" in err)
    assert main(["run", str(wf), "--limit", "0"]) == 1
    assert "--limit must be >= 1, got 0" in capsys.readouterr().err
    assert not (tmp / "out").exists()


# ------------------------------------------------------------ fit one source
def test_fit_one_source_prints_summary_prediction_and_verdict(finished, tmp_path, capsys):
    results, wf = finished
    row = Table.read(results)[3]
    assert main(["fit", str(wf), "--source", "S003", "--quiet"]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out[0] == "source S003: grid fit, 5 band(s) used"
    table = {x.split()[0]: x.split() for x in out[1:5]}
    assert table["parameter"][:2] == ["parameter", "median"]
    # the same numbers as the batch run's row (same seed, same grid), to the 4 digits printed
    assert table["T"][1] == f"{row['T_median']:.4g}"
    assert table["T"][2:4] == [f"[{row['T_p16']:.4g},", f"{row['T_p84']:.4g}]"] and table["T"][-1] == "K"
    assert table["beta"][1] == f"{row['beta_median']:.4g}"
    assert table["log10_mass"][1] == f"{row['log10_mass_median']:.4g}"
    text = "\n".join(out)
    assert f"chi2 = {row['chi2_map']:.3g} for {int(row['dof'])} dof" in text
    assert f"T_eq (radiative equilibrium) = {row['T_eq_median']:.4g} K" in text
    assert f"heating class: {row['heating_class']}" in text and f"verdict: {row['verdict']}" in text


def test_fit_one_source_errors_and_plots(finished, tmp_path, capsys):
    _, wf = finished
    assert main(["fit", str(wf), "--source", "S999"]) == 1
    assert "sedtemp fit: error: source id(s) 'S999' not in the catalogue 'cat.ecsv'" in capsys.readouterr().err
    assert main(["fit", str(wf)]) == 2  # --source is required
    assert "the following arguments are required: --source" in capsys.readouterr().err
    assert main(["fit", str(wf), "--source", "S002", "--plots", str(tmp_path / "p"), "--quiet"]) == 0
    # a grid source: corner and SED from its grid draws (no chain, so no trace plot)
    assert sorted(p.name for p in (tmp_path / "p").glob("*.png")) == ["S002_corner.png", "S002_sed.png"]
    assert main(["fit", str(wf), "--source", "S004", "--plots", str(tmp_path / "q"), "--quiet"]) == 0
    assert sorted(p.name for p in (tmp_path / "q").glob("*.png")) == ["S004_corner.png", "S004_sed.png",
                                                                      "S004_trace.png"]


# --------------------------------------------------------------- check --show
def test_check_show_is_a_dry_run(case, capsys):
    import tomllib

    from sedtemp.equilibrium import equilibrium_temperature
    from sedtemp.pipeline import load_workflow, parse_workflow
    from sedtemp.radiation import CMB, ISRF

    tmp, wf = case
    wf.write_text(_workflow_text(extra=FIELD + '[[field.components]]\nkind = "cmb"\n'))
    assert main(["check", str(wf), "--show", "--quiet"]) == 0
    out = capsys.readouterr().out
    toml_text = out.split("== resolved workflow ==\n", 1)[1].split("== bands ==", 1)[0]
    back = parse_workflow(tomllib.loads(toml_text), base_dir=tmp)
    orig = load_workflow(wf)
    for sec in ("run", "catalog", "bands", "model", "priors", "fit", "field", "compare", "output"):
        assert getattr(back, sec) == getattr(orig, sec), sec  # every default, as sedtemp resolved it
    assert "b250  F250  E250   -      mJy   250 um  none" in out
    assert "prior T: Uniform(5, 60) (workflow)" in out and "prior beta:" in out and "(model default)" in out
    assert "field: kind=isrf, U=1.0; kind=cmb; A_V 0.0, uncertainty 0%" in out
    # T_eq of the ISRF (U = 1) + CMB at the opacity's own beta: the same for every source
    kappa = orig.opacity()
    t_eq = equilibrium_temperature(ISRF(1.0) + CMB(), kappa, beta=kappa.beta).to_value(u.K)
    assert (f"T_eq at beta = {kappa.beta:g}: {t_eq:.1f} to {t_eq:.1f} K (median {t_eq:.1f} K) "
            "over all of 10 source(s)") in out
    est = out.split("== estimated run time ==\n", 1)[1]
    assert est.startswith("about ") and "from timing 4 source(s) now" in est and "x 10" in est


def test_unknown_field_kind_is_a_workflow_problem_with_its_line(case, capsys):
    _, wf = case
    text = _workflow_text(extra=FIELD.replace('"isrf"', '"isfr"'))
    wf.write_text(text)
    line = text.splitlines().index('kind = "isfr"') + 1
    assert main(["check", str(wf)]) == 1
    err = capsys.readouterr().err
    assert err.startswith(f"sedtemp check: error: wf.toml line {line}: [[field.components]] 1: unknown field "
                          "kind 'isfr' (did you mean 'isrf'?)")
    assert "source" not in err.split("known kinds")[0] and "S000" not in err


def test_builder_errors_name_the_workflow_line(case, capsys):
    _, wf = case
    text = _workflow_text().replace('kind = "uniform"', 'kind = "uniformm"')
    wf.write_text(text)
    line = text.splitlines().index('kind = "uniformm"') + 1
    assert main(["check", str(wf)]) == 1
    assert (f"sedtemp check: error: wf.toml line {line}: [priors.T] 'kind': must be one of"
            in capsys.readouterr().err)


# ------------------------------------------------------ init, in a subprocess
def test_init_check_run_in_a_subprocess(tmp_path):
    """The README walk-through: init from a catalogue, check --show, run; `python -m sedtemp`."""
    _catalog(5).write(tmp_path / "cat.ecsv")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(p for p in sys.path if p)}

    def sedtemp(*argv):
        return subprocess.run([sys.executable, "-m", "sedtemp", *argv], capture_output=True, text=True,
                              timeout=300, cwd=tmp_path, env=env)

    init = sedtemp("init", "my.toml", "--catalog", "cat.ecsv")
    assert init.returncode == 0, init.stderr
    assert "band b250: flux 'F250', error 'E250', unit mJy, centre 250 um (from the column name)" in init.stdout
    text = (tmp_path / "my.toml").read_text()
    text = text.replace('distance = "450 pc"', 'distance = "400 pc"').replace("executor = \"process\"",
                                                                               "executor = \"serial\"")
    text = text.replace('source_plots = "flagged"', 'source_plots = "none"')
    (tmp_path / "my.toml").write_text(text)
    check = sedtemp("check", "my.toml", "--show")
    assert check.returncode == 0, check.stderr
    assert "my.toml: workflow valid; catalogue 'cat.ecsv': 5 source(s), 5 band(s), 0 to be skipped" in check.stdout
    run = sedtemp("--quiet", "run", "my.toml", "--limit", "2")
    assert run.returncode == 0, run.stderr
    assert Table.read(tmp_path / "sedtemp-results" / "results.ecsv")["name"].tolist() == ["S000", "S001"]


def test_demo_advice_names_the_demo_restart(monkeypatch, tmp_path, capsys):
    from sedtemp import cli
    from sedtemp.errors import ConfigError

    def refusing(*args, **kwargs):
        raise ConfigError("the folder holds another run; start afresh with `sedtemp run --restart`")

    monkeypatch.setattr(cli, "_run_workflow", refusing)
    assert main(["demo", "--sources", "2", "--output", str(tmp_path / "d"), "--quiet"]) == 1
    assert capsys.readouterr().err == ("sedtemp demo: error: the folder holds another run; start afresh with "
                                       "`sedtemp demo --restart`\n")


def test_map_demo_and_map_command(tmp_path, capsys):
    from astropy.io import fits

    assert main(["demo", "--maps", "--output", str(tmp_path / "md"), "--quiet"]) == 0
    with fits.open(tmp_path / "md" / "results" / "maps.fits") as hdul:
        names = [h.name for h in hdul]
        assert {"T_MEDIAN", "BETA_MEDIAN", "T_EQ_MEDIAN", "P_WARMER", "COMPARE_FLAG"} <= set(names)
        assert hdul["T_MEDIAN"].header["CTYPE1"] == hdul["P_WARMER"].header["CTYPE1"]
    workflow = tmp_path / "md" / "map-demo.toml"
    assert main(["map", str(workflow), "--output", str(tmp_path / "again")]) == 0
    out = capsys.readouterr().out
    assert "maps: " in out and "(1 tile(s) resumed)" not in out
    with fits.open(tmp_path / "again" / "maps.fits") as a, fits.open(tmp_path / "md" / "results" / "maps.fits") as b:
        # the same workflow and seed: the same maps, pixel for pixel
        np.testing.assert_array_equal(a["T_MEDIAN"].data, b["T_MEDIAN"].data)
    assert main(["map", str(tmp_path / "nope.toml")]) == 1


def test_bare_power_law_under_starlight_is_a_caution_at_check_and_run(case, capsys):
    """A far-IR power law with no UV cap under a star: check and the run summary say so."""
    tmp, wf = case
    field = ('[[field.components]]\nkind = "star"\nteff = "20000 K"\nluminosity = "1000 solLum"\n'
             'distance = "0.3 pc"\n\n[model]\nopacity = { kappa0 = "10 cm2 g-1", nu0 = "1 THz", beta = 2.0 }\n')
    wf.write_text(wf.read_text() + "\n" + field)
    assert main(["check", str(wf)]) == 0  # legal input: a caution, not an error
    err = capsys.readouterr().err
    assert "of the absorbed power" in err and "comes from wavelengths where the opacity law is extrapolated" in err
    assert main(["run", str(wf), "--quiet"]) == 0
    report = (tmp / "out" / "results-report.txt").read_text()
    assert "where the opacity law is extrapolated" in report
    res = Table.read(tmp / "out" / "results.ecsv")
    # a 20 000 K star puts nearly all of its power shortward of 30 um, where the bare law is extrapolated
    assert np.nanmin(res["opacity_extrapolated_fraction"]) > 0.9


def test_population_stage_infers_the_heated_fraction_from_kept_ratio_draws(case):
    tmp, wf = case
    field = '[[field.components]]\nkind = "isrf"\nU = 1.0\n'
    wf.write_text(wf.read_text().replace('directory = "out"', 'directory = "out"\nn_keep = 50') + "\n" + field
                  + "\n[population]\nenabled = true\nn_steps = 300\nn_walkers = 16\nequilibrium_scatter = 0.1\n")
    assert main(["run", str(wf), "--quiet"]) == 0
    pop = Table.read(tmp / "out" / "population.ecsv")
    names = list(pop["parameter"])
    assert names[5:] == ["fraction", "heated_mean", "heated_sd"]  # the heated-fraction mixture's rows
    row = pop[names.index("fraction")]
    assert 0.0 <= row["p2_5"] <= row["median"] <= row["p97_5"] <= 1.0  # a fraction with its interval
    sources = Table.read(tmp / "out" / "population_sources.ecsv")
    assert "p_heated" in sources.colnames and len(sources) == 10
