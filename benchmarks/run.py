"""Benchmark of sedtemp against a hand-written per-source script, in one run.

Usage::

    python benchmarks/run.py            # full run (~25 min on 2 cores, 10^6-row run included)
    python benchmarks/run.py --quick    # smoke run with small sizes
    python benchmarks/run.py --maps     # the map benchmark (benchmarks/maps.py)

On the same simulated sources it measures

1. the hand-written baseline (``benchmarks/baseline.py``: monochromatic model,
   curve_fit start, scalar emcee, 32 walkers x 5,000 steps);
2. ``fit_source`` (band-integrated fluxes, calibration covariance);
3. grid mode (``GridPosterior.summarise`` in chunks) over a 10,000-source catalogue;
4. ``equilibrium_temperature`` over 10^6 field strengths;
5. batch throughput (``sedtemp.pipeline.run_batch``, grid mode) with 1 and 2 workers;
6. end to end (fit -> predict -> compare) on the demo workflow's settings, one
   worker, against the hand-written per-source script of the same three steps
   (``baseline.end_to_end_one``), with the share of predict + compare (every
   source a grid fit: the demo's two named MCMC sources are fitted on the grid here);
7. ``sedtemp run`` on 2 workers over 10^6 generated rows (``--quick``: 10^4),
   its wall time and peak memory (``ru_maxrss`` of the largest process);

and prints a table (time per source, sources/s, ESS/s, ratio against the
baseline measured in this run, target, met?), the agreement of the grid and
MCMC posterior quantiles in units of the posterior sd, and the peak memory
(``ru_maxrss`` of a subprocess) of chunked grid runs over 10^5 and 10^6 rows.

ESS is counted the same way for the baseline and fit_source: n_walkers *
(n_steps - burn) / tau, tau from emcee's integrated autocorrelation time
after burn-in, the smaller of T and beta; ESS/s divides by the whole wall time
of the fit (start, sampling, diagnostics).

BLAS is pinned to one thread so that "per core" means one core.
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse
import importlib
import json
import logging
import platform
import resource
import subprocess
import sys
import time
import warnings
from pathlib import Path

import astropy.units as u
import emcee
import numpy as np
from astropy.table import Table

sys.path.insert(0, str(Path(__file__).resolve().parent))
import baseline

from sedtemp import Band, BandSet, Calibration, ModifiedBlackbody, fit_source
from sedtemp.fit.grid import GridPosterior
from sedtemp.simulate import simulate_photometry

WAVELENGTHS_UM = (70, 100, 160, 250, 350, 500)
CAL_GROUPS = {"short": (["b70", "b100", "b160"], 0.07), "long": (["b250", "b350", "b500"], 0.055)}
DISTANCE_PC = 300.0
SNR = 20.0
JY = 1e-26
QUANTILE_KEYS = {"p16": 0.16, "median": 0.5, "p84": 0.84}
TARGETS = {"mcmc_ess_ratio": 10.0, "grid_per_core": 2500.0, "grid_quantile_sd": 0.1,
           "teq_per_s": 1e6, "batch_speedup": 1.8}


# ------------------------------------------------------------------ set-up
def make_bands():
    return BandSet([Band.tophat(f"b{w}", w * u.um, 0.3) for w in WAVELENGTHS_UM])


def make_model():
    return ModifiedBlackbody(distance=DISTANCE_PC * u.pc)


def simulate(model, bands, n, rng):
    """n sources: truths, band-integrated fluxes with noise at SNR 20 and calibration offsets (Jy)."""
    theta = np.column_stack([rng.uniform(-0.5, 0.5, n), rng.uniform(12.0, 35.0, n), rng.uniform(1.3, 2.2, n)])
    f, err, _ = simulate_photometry(bands, model, theta, snr=SNR, calibration=CAL_GROUPS, seed=rng, unit_si=JY)
    return theta, f, err


def emcee_ess(chain, burn):
    """n_walkers (n_steps - burn) / tau per parameter, as emcee's get_autocorr_time(quiet=True)."""
    logging.getLogger("emcee").setLevel(logging.ERROR)  # quiet=True logs 'chain too short' otherwise
    tau = emcee.autocorr.integrated_time(chain[burn:], quiet=True)
    return chain.shape[1] * (chain.shape[0] - burn) / tau


def _quiet():
    w = warnings.catch_warnings()
    w.__enter__()
    warnings.simplefilter("ignore")
    return w


# ------------------------------------------------------------- sections
def bench_baseline(bands, flux, err, n):
    nu = np.asarray(bands.nu_ref_hz)
    res = []
    for i in range(n):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # curve_fit's covariance warning on a noisy start
            out = baseline.fit_one(nu, flux[i], err[i], seed=i)
        res.append(out)
    secs = np.array([r["seconds"] for r in res])
    ess = np.array([min(r["ess"][1], r["ess"][2]) for r in res])
    return {"time": secs.mean(), "ess_per_s": float(np.sum(ess) / np.sum(secs)),
            "detail": f"tau(T) = {np.mean([r['tau'][1] for r in res]):.1f}, ESS(T,beta) = {ess.mean():.0f}"}


def bench_mcmc(bands, model, flux, err, n):
    cal = Calibration(CAL_GROUPS)
    fits, secs, ess = [], [], []
    fit_source(flux[0] * u.Jy, err[0] * u.Jy, bands, model=model, calibration=cal, seed=10_000)  # warm-up
    for i in range(n):
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            r = fit_source(flux[i] * u.Jy, err[i] * u.Jy, bands, model=model, calibration=cal, seed=i)
        secs.append(time.perf_counter() - t0)
        e = emcee_ess(r.chain, r.burn)
        ess.append(min(e[1], e[2]))
        fits.append(r)
    secs, ess = np.array(secs), np.array(ess)
    n_conv = sum(f.converged for f in fits)
    return {"time": secs.mean(), "ess_per_s": float(ess.sum() / secs.sum()), "fits": fits,
            "detail": f"ESS(T,beta) = {ess.mean():.0f}, steps = {np.mean([f.n_steps for f in fits]):.0f}, "
                      f"converged {n_conv}/{n}"}


def bench_grid(bands, model, flux, err, chunk_size):
    """Grid posteriors of every source, single process, in chunks; returns columns too."""
    t0 = time.perf_counter()
    grid = GridPosterior(bands, model=model, calibration=Calibration(CAL_GROUPS))
    t_tab = time.perf_counter() - t0
    f_si, e_si = flux * JY, err * JY
    lim = np.zeros(f_si.shape, bool)
    seqs = np.random.SeedSequence(7).spawn(-(-len(f_si) // chunk_size))
    parts = []
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for c, s in enumerate(range(0, len(f_si), chunk_size)):
            sl = slice(s, s + chunk_size)
            cols, _ = grid.summarise(f_si[sl], e_si[sl], lim[sl], rng=np.random.default_rng(seqs[c]))
            parts.append(cols)
    dt = time.perf_counter() - t0
    cols = {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}
    n = len(f_si)
    return {"time": dt / n, "rate": n / dt, "cols": cols, "nodes": grid.shape,
            "detail": f"{n} sources, grid {grid.shape[0]}x{grid.shape[1]}, tables {t_tab:.2f} s (once)"}


def quantile_agreement(fits, cols):
    """Median over sources of |q_grid - q_mcmc| / sd_mcmc for p16, median, p84 of T and beta."""
    out = {}
    for name in ("T", "beta"):
        for key, q in QUANTILE_KEYS.items():
            d = [abs(cols[f"{name}_{key}"][i] - np.quantile(f.samples[name], q)) / np.std(f.samples[name])
                 for i, f in enumerate(fits)]
            out[f"{name}_{key}"] = float(np.median(d))
    return out


def bench_teq(n):
    try:
        eq = importlib.import_module("sedtemp.equilibrium")
        rad = importlib.import_module("sedtemp.radiation")
        from sedtemp.models import default_opacity
    except ImportError as err:
        return {"skipped": f"skipped: module not available ({err.name})"}
    opacity = default_opacity("dust")
    scale = np.geomspace(0.1, 1e4, n)
    field = rad.ISRF()
    eq.equilibrium_temperature(field, opacity, scale=scale[:1000], beta=1.8)  # warm-up (tables)
    t0 = time.perf_counter()
    t_eq = eq.equilibrium_temperature(field, opacity, scale=scale, beta=1.8)
    dt = time.perf_counter() - t0
    t_k = np.asarray(u.Quantity(t_eq, u.K).value if hasattr(t_eq, "unit") else t_eq)
    return {"time": dt / n, "rate": n / dt,
            "detail": f"{n} values of U in [0.1, 1e4], beta = 1.8: T_eq {t_k.min():.1f}-{t_k.max():.1f} K"}


def _workflow(n_workers, chunk_size):
    from sedtemp.pipeline import parse_workflow

    data = {
        "run": {"seed": 3, "executor": "process", "workers": n_workers, "chunk_size": chunk_size},
        "catalog": {"path": "<in memory>", "id_column": "id", "distance": f"{DISTANCE_PC} pc"},
        "bands": {f"b{w}": {"flux": f"f{w}", "error": f"e{w}", "unit": "Jy",
                            "calibration": "short" if w < 200 else "long",
                            "tophat": {"center": f"{w} um", "width": 0.3}} for w in WAVELENGTHS_UM},
        "calibration": {k: v[1] for k, v in CAL_GROUPS.items()},
        "fit": {"method": "grid"},
        "output": {"plots": False},
    }
    return parse_workflow(data)


def bench_batch(flux, err, n_workers, chunk_size):
    try:
        batch = importlib.import_module("sedtemp.pipeline")
        catalog = batch
    except ImportError as err:
        return {"skipped": f"skipped: module not available ({err.name})"}
    wf = _workflow(n_workers, chunk_size)
    tab = Table({"id": np.arange(len(flux))})
    for j, w in enumerate(WAVELENGTHS_UM):
        tab[f"f{w}"] = flux[:, j] * u.Jy
        tab[f"e{w}"] = err[:, j] * u.Jy
    mapped = catalog.map_catalog(tab, wf)
    t0 = time.perf_counter()
    res = batch.run_batch(mapped, wf)  # includes starting the process pool
    dt = time.perf_counter() - t0
    n_ok = int(np.sum(np.asarray(res["status"]) == "ok")) if "status" in res.colnames else len(res)
    return {"time": dt / len(flux), "rate": len(flux) / dt, "res": res,
            "detail": f"{len(flux)} sources, chunk {chunk_size}, {n_ok} ok, pool start included"}


# ----------------------------------------------------- end to end (demo workflow)
def _demo():
    from importlib import resources

    from sedtemp.pipeline import load_workflow, read_catalog

    with resources.as_file(resources.files("sedtemp") / "data" / "demo" / "demo.toml") as path:
        wf = load_workflow(path)
        tab = read_catalog(wf.path(wf.catalog["path"]))
    wf.run.update(executor="serial", workers=1)
    wf.output.update(plots=False, source_plots="none", keep_draws=False)
    # the demo fits two named sources by MCMC as well (for their trace plots); the
    # throughput row measures the grid pipeline, so every source is a grid fit here
    wf.fit.update(mcmc_sources=[])
    wf.population.update(enabled=False)
    return wf, tab


def bench_end_to_end(n, n_base):
    """sedtemp fit -> predict -> compare over n demo sources (one worker) vs the hand-written script."""
    from sedtemp.pipeline import map_catalog, process_chunk, run_batch
    from sedtemp.pipeline.stages import STAGE_SECONDS

    wf, tab = _demo()
    mapped = map_catalog(tab[:n], wf)
    process_chunk(wf, mapped.take([0]), stages=("fit",))  # warm-up: grid tables, imports
    for key in STAGE_SECONDS:
        STAGE_SECONDS[key] = 0.0
    t0 = time.perf_counter()
    res = run_batch(mapped, wf)
    dt = time.perf_counter() - t0
    # share of predict + compare: the stages' own wall time (sedtemp.pipeline.stages.STAGE_SECONDS)
    # over the whole run; the rest is the fit, assembling rows and writing nothing
    stage = dict(STAGE_SECONDS)
    share = (stage["predict"] + stage["compare"]) / dt
    ok = int(np.sum(np.asarray(res["status"]) == "ok"))
    # the hand-written script on the same kind of source: six bands, fit, T_eq per draw, P(T > T_eq)
    nu = baseline.C / (np.array([70.0, 110.0, 170.0, 250.0, 350.0, 500.0]) * 1e-6)
    truth = baseline.modbb(nu, -14.0, 20.0, 1.8)
    secs = []
    for k in range(n_base):
        e = 0.05 * truth
        f = truth + e * np.random.default_rng(k).standard_normal(nu.size)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # emcee's short-chain and curve_fit hints
            secs.append(baseline.end_to_end_one(nu, f, e, 1.0, seed=k)["seconds"])
    base_rate = 1.0 / np.mean(secs)
    parts = ", ".join(f"{k} {100 * v / dt:.0f} %" for k, v in stage.items())
    return {"time": dt / n, "rate": n / dt, "base_rate": base_rate, "share": share,
            "detail": f"{n} demo sources ({ok} ok), one worker: {n / dt:.1f} src/s; hand-written script "
                      f"{base_rate:.3f} src/s ({n_base} source(s)); predict + compare {100 * share:.0f} % "
                      f"of the time ({parts}; the rest: batch set-up and final table)"}


def _write_big_catalog(path, n_rows, seed):
    bands, model = make_bands(), make_model()
    _, flux, err = simulate(model, bands, n_rows, np.random.default_rng(seed))
    tab = Table({"id": np.arange(n_rows)})
    for j, w in enumerate(WAVELENGTHS_UM):
        tab[f"f{w}"] = flux[:, j] * u.Jy
        tab[f"e{w}"] = err[:, j] * u.Jy
    tab.write(path, format="fits", overwrite=True)


#: A small wrapper process: runs its arguments as a command and prints, as JSON, the command's
#: time and the peak RSS of the largest process of its tree (RUSAGE_CHILDREN of a process that
#: has had no other child, and whose own memory, copied into the command at fork, stays small).
_PEAK_WRAPPER = """import json, resource, subprocess, sys, time
t0 = time.perf_counter()
p = subprocess.run(sys.argv[1:], capture_output=True, text=True, check=False)
dt = time.perf_counter() - t0
print(json.dumps({"rc": p.returncode, "seconds": dt, "stderr": p.stderr.strip()[-300:],
                  "peak_mb": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024}))
"""


def bench_sedtemp_run(n_rows, workdir):
    """``sedtemp run`` (the command, in a subprocess) on 2 workers over n_rows rows: time and peak memory.

    The catalogue is simulated by a process of its own, and the command is run and measured by a
    fresh small wrapper process: on Linux ``RUSAGE_CHILDREN`` is the largest peak of every child a
    process has waited for, and a forked child starts its peak at its parent's memory, so measured
    from this process it would hold the simulation's (or an earlier benchmark's) high-water mark.
    """
    workdir.mkdir(parents=True, exist_ok=True)
    cat = workdir / "big.fits"
    subprocess.run([sys.executable, "-c", "import runpy, sys; runpy.run_path(sys.argv[1])['_write_big_catalog']"
                    "(sys.argv[2], int(sys.argv[3]), 5)", __file__, str(cat), str(n_rows)], check=True)
    bands = "\n".join(f'[bands.b{w}]\nflux = "f{w}"\nerror = "e{w}"\ncalibration = "{"short" if w < 200 else "long"}"\n'
                      f'tophat = {{ center = "{w} um", width = 0.3 }}\n' for w in WAVELENGTHS_UM)
    (workdir / "big.toml").write_text(
        f'[run]\nseed = 1\nexecutor = "process"\nworkers = 2\nchunk_size = 512\n\n'
        f'[catalog]\npath = "big.fits"\nid_column = "id"\ndistance = "{DISTANCE_PC} pc"\n\n{bands}\n'
        f'[calibration]\nshort = {CAL_GROUPS["short"][1]}\nlong = {CAL_GROUPS["long"][1]}\n\n'
        '[output]\ndirectory = "out"\nplots = false\nsource_plots = "none"\n')
    cmd = [sys.executable, "-m", "sedtemp", "run", str(workdir / "big.toml"), "--restart", "--quiet"]
    wrapper = subprocess.run([sys.executable, "-c", _PEAK_WRAPPER, *cmd], capture_output=True, text=True,
                             check=True)
    res = json.loads(wrapper.stdout.strip().splitlines()[-1])
    if res["rc"]:
        return {"skipped": f"sedtemp run failed: {res['stderr']}"}
    dt, peak = res["seconds"], res["peak_mb"]
    return {"time": dt / n_rows, "rate": n_rows / dt, "peak_mb": peak,
            "detail": f"{n_rows:,d} rows, 2 workers: {dt:.1f} s ({n_rows / dt:.0f} rows/s), peak RSS of the "
                      f"largest process {peak:.0f} MB"}


# ------------------------------------------------------------- memory
def memory_child(n_rows, chunk_size, n_t, n_beta):
    """Chunked grid run over n_rows simulated sources, writing nothing; prints JSON with ru_maxrss."""
    bands, model = make_bands(), make_model()
    kw = {}
    if n_t:
        kw = {"T_nodes": np.geomspace(3.0, 150.0, n_t), "beta_nodes": np.linspace(0.0, 4.0, n_beta)}
    grid = GridPosterior(bands, model=model, calibration=Calibration(CAL_GROUPS), **kw)
    rss_start = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    seqs = np.random.SeedSequence(11)
    t0 = time.perf_counter()
    done = 0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        while done < n_rows:
            n = min(chunk_size, n_rows - done)
            rng = np.random.default_rng(seqs.spawn(1)[0])
            _, f, e = simulate(model, bands, n, rng)  # the chunk as a reader would deliver it
            # zooming of narrow posteriors is off here: it is per-source work that adds
            # no memory, and with the coarse memory grid it would zoom every source
            grid.summarise(f * JY, e * JY, np.zeros(f.shape, bool), rng=rng, refine=False)
            done += n
    dt = time.perf_counter() - t0
    print(json.dumps({"rows": n_rows, "seconds": dt, "rate": n_rows / dt, "grid": list(grid.shape),
                      "maxrss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
                      "rss_after_setup_mb": rss_start / 1024}))


def bench_memory(rows, chunk_size, n_t, n_beta):
    out = []
    for n in rows:
        cmd = [sys.executable, __file__, "--memory-child", str(n), "--chunk-size", str(chunk_size),
               "--memory-grid", f"{n_t}x{n_beta}"]
        p = subprocess.run(cmd, capture_output=True, text=True, check=True)
        out.append(json.loads(p.stdout.strip().splitlines()[-1]))
    return out


# ------------------------------------------------------------- profile
def profile(n_fit=3, n_grid=2048, chunk_size=32, top=18):
    """cProfile of fit_source (n_fit sources) and of grid mode (n_grid sources); prints the top functions."""
    import cProfile
    import pstats

    bands, model = make_bands(), make_model()
    _, flux, err = simulate(model, bands, max(n_fit, n_grid), np.random.default_rng(5))
    cal = Calibration(CAL_GROUPS)
    fit_source(flux[0] * u.Jy, err[0] * u.Jy, bands, model=model, calibration=cal, seed=99)  # warm-up
    for label, fn in (
        (f"fit_source, {n_fit} sources", lambda: [fit_source(flux[i], err[i], bands, model=model,
                                                             calibration=cal, seed=i) for i in range(n_fit)]),
        (f"grid mode, {n_grid} sources (tables included)",
         lambda: bench_grid(bands, model, flux[:n_grid], err[:n_grid], chunk_size)),
    ):
        pr = cProfile.Profile()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            pr.enable()
            fn()
            pr.disable()
        st = pstats.Stats(pr)
        print(f"\n==== {label}: {st.total_tt:.2f} s under cProfile ====")
        st.sort_stats("tottime").print_stats(top)
        st.sort_stats("cumulative").print_stats(r"sedtemp|emcee/(ensemble|autocorr)", top)


# ------------------------------------------------------------- report
def _fmt(x, spec):
    return "-" if x is None else format(x, spec)


def print_table(rows):
    head = ("stage", "time/source", "sources/s", "ESS/s", "vs baseline", "target", "met?")
    lines = [head]
    for r in rows:
        if "skipped" in r:
            lines.append((r["name"], "skipped: module not available", r.get("target", "")))
            continue
        t = r["time"]
        tps = f"{t:.3g} s" if t >= 1e-3 else (f"{t * 1e3:.3g} ms" if t >= 1e-6 else f"{t * 1e9:.3g} ns")
        met = "" if r.get("met") is None else ("yes" if r["met"] else "NO")
        lines.append((r["name"], tps, _fmt(1.0 / t, ".4g"), _fmt(r.get("ess_per_s"), ".0f"),
                      r.get("ratio", "-"), r.get("target", ""), met))
    full = [x for x in lines if len(x) == len(head)]
    widths = [max(len(str(x[i])) for x in full) for i in range(len(head))]
    for k, line in enumerate(lines):
        if len(line) != len(head):
            print(f"{line[0]:<{widths[0]}}  {line[1]} (target {line[2]})")
            continue
        print("  ".join(f"{x!s:<{w}}" if i == 0 else f"{x!s:>{w}}" for i, (x, w) in enumerate(zip(line, widths, strict=True))))
        if k == 0:
            print("  ".join("-" * w for w in widths))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small sizes for a smoke run (~1 min)")
    ap.add_argument("--seed", type=int, default=2024)
    ap.add_argument("--chunk-size", type=int, default=32, help="grid-mode sources per vectorised block")
    ap.add_argument("--memory-grid", default="40x24",
                    help="T x beta nodes of the memory runs ('default' = 100x60; 10^6 rows then take ~15 min)")
    ap.add_argument("--memory-rows", default="100000,1000000",
                    help="catalogue sizes of the peak-memory runs (comma-separated)")
    ap.add_argument("--profile", action="store_true", help="cProfile fit_source and grid mode instead")
    ap.add_argument("--memory-child", type=int, default=None, help=argparse.SUPPRESS)
    ap.add_argument("--workdir", default="benchmark-work", help="folder of the `sedtemp run` benchmark files")
    ap.add_argument("--maps", action="store_true",
                    help="the map benchmark instead (benchmarks/maps.py: 1000 x 1000 pixels, 5 bands; "
                         "with --quick 200 x 200)")
    args = ap.parse_args(argv)
    if args.maps:
        import runpy

        maps = runpy.run_path(str(Path(__file__).with_name("maps.py")), run_name="benchmark_maps")
        return maps["main"](["--quick"] if args.quick else [])
    n_t, n_beta = (0, 0) if args.memory_grid == "default" else map(int, args.memory_grid.split("x"))
    if args.memory_child is not None:
        memory_child(args.memory_child, args.chunk_size, n_t, n_beta)
        return 0
    if args.profile:
        profile()
        return 0
    q = args.quick
    n_base, n_mcmc = (1, 3) if q else (3, 10)
    n_grid, n_teq, n_batch = (1000, 10**5, 256) if q else (10_000, 10**6, 1536)
    mem_rows = (2000, 20_000) if q else tuple(int(x) for x in args.memory_rows.split(","))
    t_start = time.perf_counter()
    bands, model = make_bands(), make_model()
    rng = np.random.default_rng(args.seed)
    _, flux, err = simulate(model, bands, n_grid, rng)  # sources 0..n_mcmc-1 are also fitted by MCMC
    print(f"sedtemp benchmark: {platform.processor() or platform.machine()}, {os.cpu_count()} cores, "
          f"python {platform.python_version()}, numpy {np.__version__}, emcee {emcee.__version__}, BLAS threads 1")
    print(f"sources: 6 top-hat bands 70-500 um (30 % wide), SNR {SNR:g}, calibration 7 % / 5.5 % in two groups, "
          f"T in [12, 35] K, beta in [1.3, 2.2]\n", flush=True)

    base = bench_baseline(bands, flux, err, n_base)
    print(f"[1] baseline          {base['detail']}", flush=True)
    mc = bench_mcmc(bands, model, flux, err, n_mcmc)
    print(f"[2] fit_source        {mc['detail']}", flush=True)
    gr = bench_grid(bands, model, flux, err, args.chunk_size)
    print(f"[3] grid mode         {gr['detail']}", flush=True)
    te = bench_teq(n_teq)
    print(f"[4] T_eq              {te.get('detail', te.get('skipped'))}", flush=True)
    b1 = bench_batch(flux[:n_batch], err[:n_batch], 1, 64)
    print(f"[5] batch 1 worker    {b1.get('detail', b1.get('skipped'))}", flush=True)
    b2 = bench_batch(flux[:n_batch], err[:n_batch], 2, 64)
    print(f"[5] batch 2 workers   {b2.get('detail', b2.get('skipped'))}", flush=True)
    n_e2e, n_e2e_base, n_big = (60, 1, 10**4) if q else (300, 3, 10**6)
    e2e = bench_end_to_end(n_e2e, n_e2e_base)
    print(f"[6] end to end        {e2e['detail']}", flush=True)
    # the memory children first: on Linux a child's ru_maxrss starts from its parent's
    # high-water mark of waited children, so the big `sedtemp run` would mask theirs
    mem = bench_memory(mem_rows, args.chunk_size, n_t, n_beta)
    big = bench_sedtemp_run(n_big, Path(args.workdir))
    print(f"[7] sedtemp run       {big.get('detail', big.get('skipped'))}", flush=True)
    qa = quantile_agreement(mc["fits"], gr["cols"])

    rows = [
        {"name": "baseline (hand-written emcee)", "time": base["time"], "ess_per_s": base["ess_per_s"],
         "ratio": "1.0", "target": "-"},
        {"name": "fit_source (MCMC)", "time": mc["time"], "ess_per_s": mc["ess_per_s"],
         "ratio": f"{mc['ess_per_s'] / base['ess_per_s']:.1f}x ESS/s", "target": ">= 10x ESS/s",
         "met": mc["ess_per_s"] / base["ess_per_s"] >= TARGETS["mcmc_ess_ratio"]},
        {"name": "grid mode (1 core)", "time": gr["time"],
         "ratio": f"{base['time'] / gr['time']:.0f}x sources/s", "target": ">= 2500 /s/core",
         "met": gr["rate"] >= TARGETS["grid_per_core"]},
    ]
    if "skipped" in te:
        rows.append({"name": "T_eq (per field strength)", "skipped": te["skipped"], "target": ">= 1e6 /s"})
    else:
        rows.append({"name": "T_eq (per field strength)", "time": te["time"], "ratio": "-",
                     "target": ">= 1e6 /s", "met": te["rate"] >= TARGETS["teq_per_s"]})
    for name, b in (("batch, 1 worker (grid)", b1), ("batch, 2 workers (grid)", b2)):
        if "skipped" in b:
            rows.append({"name": name, "skipped": b["skipped"], "target": ">= 1.8x 1 worker"})
    if "skipped" not in b1 and "skipped" not in b2:
        speed = b2["rate"] / b1["rate"]
        rows.append({"name": "batch, 1 worker (grid)", "time": b1["time"],
                     "ratio": f"{base['time'] / b1['time']:.0f}x sources/s", "target": "-"})
        rows.append({"name": "batch, 2 workers (grid)", "time": b2["time"],
                     "ratio": f"{base['time'] / b2['time']:.0f}x; {speed:.2f}x 1 worker",
                     "target": ">= 1.8x 1 worker", "met": speed >= TARGETS["batch_speedup"]})
    rows.append({"name": "end to end (demo, 1 worker)", "time": e2e["time"],
                 "ratio": f"{e2e['rate'] / e2e['base_rate']:.0f}x sources/s; predict+compare "
                          f"{100 * e2e['share']:.0f} %", "target": ">= 1000x; <= 25 %",
                 "met": e2e["rate"] / e2e["base_rate"] >= 1000 and e2e["share"] <= 0.25})
    if "skipped" in big:
        rows.append({"name": "sedtemp run (2 workers)", "skipped": big["skipped"], "target": "10^6 rows < 1 h"})
    else:
        rows.append({"name": f"sedtemp run, {n_big:.0e} rows", "time": big["time"],
                     "ratio": f"peak {big['peak_mb']:.0f} MB", "target": "10^6 rows < 1 h",
                     "met": big["rate"] * 3600 >= 10**6})
    print()
    print_table(rows)
    worst = max(qa.values())
    print(f"\nMCMC vs grid posterior quantiles ({n_mcmc} sources; median over sources of "
          f"|q_grid - q_mcmc| / posterior sd):")
    print("  " + "  ".join(f"{k} {v:.3f}" for k, v in qa.items()))
    print(f"  worst {worst:.3f}  (target <= {TARGETS['grid_quantile_sd']}: "
          f"{'yes' if worst <= TARGETS['grid_quantile_sd'] else 'NO'}; MCMC Monte Carlo error of a "
          f"quantile ~ 1.5/sqrt(ESS) = {1.5 / np.sqrt(np.mean([min(f.ess['T'], f.ess['beta']) for f in mc['fits']])):.3f} sd)")
    print(f"\nPeak memory of chunked grid-mode runs (subprocess ru_maxrss; chunk {args.chunk_size}, "
          f"grid {mem[0]['grid'][0]}x{mem[0]['grid'][1]}, no zooming, nothing written):")
    for m in mem:
        print(f"  {m['rows']:>9,d} rows: peak RSS {m['maxrss_mb']:7.1f} MB "
              f"(after set-up {m['rss_after_setup_mb']:.1f} MB), {m['seconds']:.1f} s, {m['rate']:.0f} rows/s")
    ratio = mem[-1]["maxrss_mb"] / mem[0]["maxrss_mb"]
    print(f"  peak ratio {mem[-1]['rows'] // mem[0]['rows']}x rows -> {ratio:.3f}x memory "
          f"(target: independent of catalogue size: {'yes' if ratio < 1.05 else 'NO'})")
    print(f"\ntotal benchmark time {time.perf_counter() - t_start:.0f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
