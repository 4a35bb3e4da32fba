"""The sedtemp command, in-process; python -m sedtemp; resume after SIGKILL in a subprocess."""

import json
import os
import signal
import subprocess
import sys
import time

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table

from conftest import CATALOG_WAVE, invented_catalog
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
    tmp, wf = case
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
    ref_run = subprocess.run(cmd + ["--output", str(tmp_path / "ref")], capture_output=True, text=True, timeout=300)
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
    """A finished run (no per-source plots) of 6 sources in a field: the results file and workflow."""
    tmp = tmp_path_factory.mktemp("finished")
    _catalog(6).write(tmp / "cat.ecsv")
    wf = tmp / "wf.toml"
    wf.write_text(_workflow_text(MCMC, extra=FIELD))
    assert main(["run", str(wf), "--quiet"]) == 0
    return tmp / "out" / "results.ecsv", wf


def test_plot_source_refits_with_recorded_workflow(finished, tmp_path, monkeypatch, capsys):
    from sedtemp import plots

    results, wf = finished
    res = Table.read(results)
    assert res.meta["workflow_path"] == str(wf.resolve())
    seen = []
    real = plots.corner_plot

    def recording(result, **kw):
        seen.append((result, kw["T_eq"]))
        return real(result, **kw)

    monkeypatch.setattr(plots, "corner_plot", recording)
    assert main(["plot", str(results), "--source", "S003", "--output", str(tmp_path)]) == 0
    names = sorted(p.name for p in (tmp_path / "sources").iterdir())
    assert names == sorted(f"S003_{k}.{e}" for k in ("corner", "sed", "trace") for e in ("pdf", "png"))
    assert str(tmp_path / "sources" / "S003_trace.png") in capsys.readouterr().out
    (result, t_eq), = seen
    row = res[3]
    # the predicted T_eq of the row is shaded: the comparison's 68 % interval, else the prediction
    expect = ([row["T_eq_p16"], row["T_eq_p84"]] if "T_eq_p16" in res.colnames else [row["T_eq"]] * 3)
    np.testing.assert_array_equal(t_eq, expect)
    # the refit is an MCMC sample of the posterior the grid row summarises: medians agree within
    # 4 Monte Carlo errors (sd / sqrt(ESS)) plus the grid's node spacing in T (40 log nodes over 5-60 K)
    sd = np.std(result.samples["T"])
    grid_step = row["T_median"] * np.log(60 / 5) / 39
    assert abs(np.median(result.samples["T"]) - row["T_median"]) < 4 * sd / np.sqrt(result.ess["T"]) + grid_step


def test_plot_source_errors(finished, tmp_path, capsys):
    results, wf = finished
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
    assert ("bare.ecsv does not record the path and sha256 of its workflow (results metadata 'workflow_path', "
            "'workflow_sha256')" in capsys.readouterr().err)
    changed = tmp_path / "changed.toml"
    changed.write_text(wf.read_text().replace("seed = 3", "seed = 4"))
    res.meta["workflow_path"] = str(changed)
    res.write(tmp_path / "changed.ecsv")
    assert main(["plot", str(tmp_path / "changed.ecsv"), "--source", "S001"]) == 1
    err = capsys.readouterr().err
    assert f"the workflow '{changed}' has changed since changed.ecsv was made (sha256 " in err
    assert "restore it, or run it again, before plotting its sources" in err
    res.meta["workflow_path"] = str(tmp_path / "gone.toml")
    res.write(tmp_path / "gone.ecsv")
    assert main(["plot", str(tmp_path / "gone.ecsv"), "--source", "S001"]) == 1
    assert f"the workflow of gone.ecsv, '{tmp_path / 'gone.toml'}', no longer exists" in capsys.readouterr().err
    assert not (tmp_path / "sources").exists()


def test_keep_draws_without_h5py_refused_at_check_and_run(case, monkeypatch, capsys):
    tmp, wf = case
    wf.write_text(wf.read_text().replace('directory = "out"', 'directory = "out"\nkeep_draws = true'))
    monkeypatch.setitem(sys.modules, "h5py", None)  # `import h5py` now raises ImportError
    msg = ("error: [output] keep_draws = true needs h5py, which is not installed; pip install 'sedtemp[hdf5]', "
           "or set keep_draws = false")
    assert main(["check", str(wf)]) == 1
    assert msg in capsys.readouterr().err
    assert main(["run", str(wf), "--quiet"]) == 1
    assert msg in capsys.readouterr().err
    assert not (tmp / "out").exists()  # refused before any fitting
