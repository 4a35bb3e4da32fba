"""Fault injection: kills, damaged checkpoints, concurrent runs and changed inputs.

Each case ends with every source exactly once and results equal to an
uninterrupted run (within the 1e-10 relative chunking tolerance of README,
since a resumed run groups the remaining sources into other blocks), or with
a clear refusal. Kills are real: a forked child process runs the batch and is
SIGKILLed (by itself, at a seeded point of its file writes, or by the parent).
"""

import json
import multiprocessing
import os
import signal
import time

import numpy as np
import pytest
from astropy.table import Table
from invented import catalog_workflow_data, invented_catalog

from sedtemp.errors import ConfigError
from sedtemp.pipeline import map_catalog, parse_workflow, run_batch
from sedtemp.pipeline.checkpoints import LOCK_FILE, OutputLock

N_SOURCES = 14  # five chunks of 3
FORK = multiprocessing.get_context("fork") if "fork" in multiprocessing.get_all_start_methods() else None
pytestmark = pytest.mark.skipif(FORK is None, reason="fault injection forks child processes (POSIX)")


def _workflow(**sections):
    return parse_workflow(catalog_workflow_data(**sections))


@pytest.fixture(scope="module")
def catalog():
    return invented_catalog(N_SOURCES, 21)


@pytest.fixture(scope="module")
def reference(catalog, tmp_path_factory):
    wf = _workflow()
    return run_batch(map_catalog(catalog, wf), wf, output_dir=tmp_path_factory.mktemp("reference"))


def _assert_equal_to(res, ref):
    assert res.colnames == ref.colnames
    assert res["name"].tolist() == ref["name"].tolist()  # every source once, in catalogue order
    for c in ref.colnames:
        x, y = np.asarray(res[c]), np.asarray(ref[c])
        if x.dtype.kind == "f":
            np.testing.assert_allclose(x, y, rtol=1e-10, atol=0, err_msg=c)
        else:
            assert x.tolist() == y.tolist(), c


def _child_run(out, catalog, kill_at, phase):
    """Child: run the batch; SIGKILL itself at the ``kill_at``-th file replacement (before or after it)."""
    real = os.replace
    count = [0]

    def replace(src, dst):
        count[0] += 1
        if count[0] == kill_at and phase == "before":
            os.kill(os.getpid(), signal.SIGKILL)  # the temporary file is written, not yet in place
        real(src, dst)
        if count[0] == kill_at and phase == "after":
            os.kill(os.getpid(), signal.SIGKILL)  # in place, but the bookkeeping after it not done

    os.replace = replace
    wf = _workflow()
    run_batch(map_catalog(catalog, wf), wf, output_dir=out)
    os._exit(0)


def _run_child(target, *args):
    proc = FORK.Process(target=target, args=args)
    proc.start()
    proc.join(60)
    return proc.exitcode


# the seeded kill points: 10 draws of (file replacement number, before/after); a run of
# 14 sources in 5 chunks replaces ~17 files (state, 5 parts x (part, state), results, report)
_POINTS = [(int(k), str(p)) for k, p in zip(np.random.default_rng(2024).integers(1, 18, 10),
                                            np.random.default_rng(7).choice(["before", "after"], 10), strict=True)]


@pytest.mark.parametrize("kill_at, phase", _POINTS)
def test_kill_during_writes_then_resume(tmp_path, catalog, reference, kill_at, phase):
    code = _run_child(_child_run, tmp_path, catalog, kill_at, phase)
    assert code in (-signal.SIGKILL, 0)
    wf = _workflow()
    res = run_batch(map_catalog(catalog, wf), wf, output_dir=tmp_path)
    _assert_equal_to(res, reference)
    on_disk = Table.read(tmp_path / "results.ecsv")
    _assert_equal_to(on_disk, reference)
    assert not list(tmp_path.glob("**/.tmp-*"))  # half-written files cleaned up
    parts = sorted(p.name for p in (tmp_path / "parts").glob("part-*.ecsv"))
    rows = [r for p in parts for r in Table.read(tmp_path / "parts" / p)["_row"]]
    assert sorted(rows) == list(range(N_SOURCES))  # no source lost or duplicated in the checkpoints


@pytest.mark.parametrize("damage", ["truncate", "flip", "empty"])
def test_damaged_checkpoint_is_reported_and_refitted(tmp_path, catalog, reference, damage):
    wf = _workflow()
    m = map_catalog(catalog, wf)
    run_batch(m, wf, output_dir=tmp_path)
    part = sorted((tmp_path / "parts").glob("part-*.ecsv"))[2]
    data = part.read_bytes()
    part.write_bytes({"truncate": data[: len(data) // 2], "empty": b"",
                      "flip": data[:-40] + bytes([data[-40] ^ 1]) + data[-39:]}[damage])
    res = run_batch(m, wf, output_dir=tmp_path)
    _assert_equal_to(res, reference)
    report = (tmp_path / "results-report.txt").read_text()
    assert f"damaged checkpoint refitted: {part.name}: checksum mismatch" in report
    assert json.loads((tmp_path / "results-report.json").read_text())["resumed_from_checkpoint"] == 11


def _hold_lock(out, ready, release):
    with OutputLock(out):
        ready.set()
        release.wait(30)
    os._exit(0)


def test_concurrent_run_refused_while_locked(tmp_path, catalog):
    ready, release = FORK.Event(), FORK.Event()
    proc = FORK.Process(target=_hold_lock, args=(tmp_path, ready, release))
    proc.start()
    try:
        assert ready.wait(20)
        wf = _workflow()
        with pytest.raises(ConfigError, match=rf"output folder .* is in use by another sedtemp run \(pid {proc.pid} "):
            run_batch(map_catalog(catalog[:3], wf), wf, output_dir=tmp_path)
    finally:
        release.set()
        proc.join(20)


def _lock_and_die(out, ready):
    lock = OutputLock(out).__enter__()  # never released: the process is killed holding it
    ready.set()
    time.sleep(60)
    lock.__exit__(None, None, None)


def test_stale_lock_of_killed_run_reported_and_taken_over(tmp_path, catalog, reference):
    ready = FORK.Event()
    proc = FORK.Process(target=_lock_and_die, args=(tmp_path, ready))
    proc.start()
    assert ready.wait(20)
    os.kill(proc.pid, signal.SIGKILL)
    proc.join(20)
    assert json.loads((tmp_path / LOCK_FILE).read_text())["pid"] == proc.pid  # the file stays behind
    wf = _workflow()
    res = run_batch(map_catalog(catalog, wf), wf, output_dir=tmp_path)
    _assert_equal_to(res, reference)
    rep = json.loads((tmp_path / "results-report.json").read_text())
    assert rep["checkpoints"]["stale_lock"]["pid"] == proc.pid
    assert f"stale lock of an ended run taken over: {{'pid': {proc.pid}" in (tmp_path / "results-report.txt").read_text()


def test_changed_flux_refused_naming_the_catalogue(tmp_path, catalog):
    wf = _workflow()
    run_batch(map_catalog(catalog[:6], wf), wf, output_dir=tmp_path)
    changed = catalog[:6].copy()
    changed["F250"][3] *= 1.01
    with pytest.raises(ConfigError, match=r"changed: catalogue values \(columns used by the run\)\. Use another"):
        run_batch(map_catalog(changed, wf), wf, output_dir=tmp_path)


def test_changed_sky_position_refused(tmp_path, catalog):
    """A star placed by position: moving a source on the sky changes its field, so resume refuses."""
    t = catalog[:4].copy()
    t["ra"], t["dec"] = np.linspace(10.0, 10.01, 4), np.full(4, -20.0)
    t["ra"].unit = t["dec"].unit = "deg"
    wf = _workflow(catalog={"ra_column": "ra", "dec_column": "dec"},
                   field={"components": [{"kind": "star", "teff": "20000 K", "luminosity": "1e4 solLum",
                                          "position": {"ra": 10.02, "dec": -20.0}}]},
                   compare={"enabled": False})
    run_batch(map_catalog(t, wf), wf, output_dir=tmp_path)
    t["ra"][1] += 0.001
    with pytest.raises(ConfigError, match=r"changed: catalogue values"):
        run_batch(map_catalog(t, wf), wf, output_dir=tmp_path)


def test_changed_response_file_refused_naming_it(tmp_path, catalog):
    nu = np.linspace(0.8, 1.2, 21) * 1.2e12
    resp = tmp_path / "b250.dat"
    resp.write_text("\n".join(f"{x:.6e} {1.0 - abs(x / 1.2e12 - 1) * 4:.4f}" for x in nu) + "\n")
    data = catalog_workflow_data()
    data["bands"]["b250"] = {"flux": "F250", "error": "E250", "response": str(resp)}
    wf = parse_workflow(data)
    out = tmp_path / "out"
    run_batch(map_catalog(catalog[:4], wf), wf, output_dir=out)
    resp.write_text(resp.read_text().replace("0.6000", "0.6500"))
    with pytest.raises(ConfigError, match=rf"changed: file {resp}\. Use another"):
        run_batch(map_catalog(catalog[:4], wf), wf, output_dir=out)


def test_non_result_keys_may_change_on_resume(tmp_path, catalog, reference):
    wf = _workflow()
    m = map_catalog(catalog, wf)
    run_batch(m, wf, output_dir=tmp_path)
    for p in sorted((tmp_path / "parts").glob("part-*.ecsv"))[1::2]:
        p.unlink()
    other = _workflow(run={"chunk_size": 2, "workers": 3}, output={"name": "renamed", "format": "ecsv"})
    res = run_batch(map_catalog(catalog, other), other, output_dir=tmp_path)
    _assert_equal_to(res, reference)


#: A fresh interpreter (not a fork: a forked child would share this process's forkserver)
#: running a pool whose single chunk takes far longer than the test.
_POOL_SCRIPT = """
import sys
sys.path.insert(0, {tests!r})
from invented import catalog_workflow_data, invented_catalog
from sedtemp.pipeline import map_catalog, parse_workflow, run_batch
wf = parse_workflow(catalog_workflow_data(run={{"executor": "process", "workers": 1, "chunk_size": 1}},
    fit={{"method": "mcmc", "n_walkers": 16, "ess_target": 100000, "max_steps": 10**7}}))
run_batch(map_catalog(invented_catalog(2, 21), wf), wf, output_dir={out!r})
"""


def _descendants(pid):
    kids = {}
    for d in os.listdir("/proc"):
        if d.isdigit():
            try:
                with open(f"/proc/{d}/stat") as fh:
                    kids[int(d)] = int(fh.read().rsplit(")", 1)[1].split()[1])
            except OSError:
                continue
    out, frontier = set(), {pid}
    while frontier:
        frontier = {p for p, pp in kids.items() if pp in frontier} - out
        out |= frontier
    return out


def _running(pid):
    """True while ``pid`` exists and is not a zombie (state Z: ended, not yet reaped)."""
    try:
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] != "Z"
    except OSError:
        return False


@pytest.mark.skipif(not os.path.isdir("/proc"), reason="reads the process tree from /proc")
def test_workers_end_when_main_process_is_killed(tmp_path):
    import subprocess
    import sys
    from pathlib import Path

    script = _POOL_SCRIPT.format(tests=str(Path(__file__).parent), out=str(tmp_path))
    proc = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 60
    workers = set()
    while time.monotonic() < deadline and len(workers) < 3:  # resource tracker, forkserver, worker
        time.sleep(0.3)
        workers = _descendants(proc.pid)
    assert workers, "no worker process started"
    time.sleep(1.0)  # let the worker start its chunk
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait(10)
    deadline = time.monotonic() + 10
    alive = workers
    while alive and time.monotonic() < deadline:
        time.sleep(0.3)
        alive = {p for p in alive if _running(p)}
    assert not alive, f"worker processes {sorted(alive)} outlived the killed main process"


def test_ctrl_c_prints_one_line(tmp_path):
    """SIGINT to `sedtemp run` with a process pool: one line on stderr, no worker tracebacks."""
    import subprocess
    import sys

    cat = invented_catalog(2, 21)
    cat.write(tmp_path / "catalog.ecsv")
    bands = "".join(f'[bands.b{w}]\nflux = "F{w}"\nerror = "E{w}"\ntophat = {{ center = "{w} um", width = 0.3 }}\n'
                    for w in (70, 160, 250, 350, 500))
    (tmp_path / "wf.toml").write_text(
        '[run]\nexecutor = "process"\nworkers = 1\nchunk_size = 1\n[catalog]\npath = "catalog.ecsv"\n'
        'id_column = "name"\ndistance = "400 pc"\n' + bands +
        '[fit]\nmethod = "mcmc"\nn_walkers = 16\ness_target = 100000\nmax_steps = 10000000\n'
        '[output]\nplots = false\nsource_plots = "none"\n')
    # a session of its own, so that SIGINT can go to its whole process group, as a terminal's Ctrl-C does
    proc = subprocess.Popen([sys.executable, "-m", "sedtemp", "run", str(tmp_path / "wf.toml"), "--quiet"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
    deadline = time.monotonic() + 60
    # resource tracker, forkserver and the worker, which then starts its (endless) chunk
    while time.monotonic() < deadline and len(_descendants(proc.pid)) < 3:
        time.sleep(0.3)
    time.sleep(2.0)
    os.killpg(proc.pid, signal.SIGINT)  # main process, forkserver and worker, like Ctrl-C
    _, err = proc.communicate(timeout=30)
    assert proc.returncode == 130
    assert err.strip().splitlines() == ["sedtemp run: interrupted; run the same command again to resume"], err
