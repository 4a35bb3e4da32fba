"""Python stage API (fit, predict, compare, run), the bundled demo and its generator."""

import importlib.util
import json
import sys
from importlib import resources
from pathlib import Path

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table

from sedtemp import pipeline
from sedtemp.pipeline.catalog import map_catalog, read_catalog
from sedtemp.pipeline.config import load_workflow, parse_workflow

ROOT = Path(__file__).resolve().parents[1]
from invented import CATALOG_WAVE, invented_catalog

WAVE = CATALOG_WAVE


def _catalog(n, seed=9):
    return invented_catalog(n, seed, unit=u.Jy)


def _workflow(catalog=None, fit=None):
    bands = {f"b{w}": {"flux": f"F{w}", "error": f"E{w}", "tophat": {"center": f"{w} um", "width": 0.3}}
             for w in WAVE}
    return parse_workflow({
        "run": {"seed": 5, "executor": "serial"},
        "catalog": {"path": "c", "id_column": "name", **(catalog or {"distance": "400 pc"})},
        "bands": bands, "fit": {"n_T": 40, "n_beta": 24, "n_draws": 200, **(fit or {})},
        "priors": {"T": {"kind": "uniform", "low": 5.0, "high": 60.0}}})


def test_fit_stage_equals_run_and_keeps_draws():
    t = _catalog(6)
    wf = _workflow()
    fits = pipeline.fit(t, wf, n_keep=30)
    run = pipeline.run(t, wf)
    assert fits["draws_T"].shape == (6, 30) and fits["draws_T"].unit == u.K
    np.testing.assert_array_equal(fits["T_median"], run["T_median"])  # same seeds, same numbers
    # the kept draws are the first draws of the posterior sample the summaries came from:
    # their median lies inside the 95 % interval (exact property of any posterior sample subset
    # would be weaker; 30 of 200 draws fall outside p2.5-p97.5 only with tiny probability)
    med = np.median(np.asarray(fits["draws_T"]), axis=1)
    assert np.all((med > fits["T_p2_5"]) & (med < fits["T_p97_5"]))


def test_mcmc_source_equals_fit_source_with_its_seed():
    from sedtemp.fit import fit_source

    t = _catalog(3)
    wf = _workflow(fit={"mcmc_sources": ["S001"], "n_walkers": 16, "ess_target": 60})
    res = pipeline.fit(t, wf)
    assert res["method"].tolist() == ["grid", "mcmc", "grid"]
    m = map_catalog(t, wf)
    seq, _ = pipeline.source_seed(5, "S001").spawn(2)
    direct = fit_source(m.flux[1] * u.W / u.m**2 / u.Hz, m.err[1] * u.W / u.m**2 / u.Hz, wf.bandset(),
                        model=wf.build_model(distance=400 * u.pc), prior=wf.build_prior(), seed=seq,
                        n_walkers=16, ess_target=60, max_steps=20000, upper_limits=m.limit_only[1])
    assert res["T_median"][1] == direct.summary()["T_median"]  # bit-identical chain
    assert res["T_ess"][1] == direct.summary()["T_ess"]
    # refit_source (the per-source plots' fit) is that same fit, with the source's own seed
    again = pipeline.refit_source(wf, m, 1)
    np.testing.assert_array_equal(again.chain, direct.chain)
    assert again.summary()["T_median"] == res["T_median"][1]


def test_refit_source_errors():
    from sedtemp.errors import InputError

    t = _catalog(3)
    for w in WAVE[1:]:
        t[f"F{w}"][2], t[f"E{w}"][2] = np.nan, np.nan
    wf = _workflow()
    m = map_catalog(t, wf)
    with pytest.raises(InputError, match=r"refit_source: index must be an integer in \[0, 3\), got 3"):
        pipeline.refit_source(wf, m, 3)
    with pytest.raises(InputError, match=r"source 'S002' is skipped by this workflow \(too_few_bands: "
                                         r"1 usable band\(s\) \['b70'\], need 3\); there is no fit to redo"):
        pipeline.refit_source(wf, m, 2)


def test_t_eq_band_and_plot_stem():
    both = Table({"T_eq": [20.0] * u.K, "T_eq_p16": [18.0] * u.K, "T_eq_p84": [23.0] * u.K})
    np.testing.assert_array_equal(pipeline.t_eq_band(both[0]), [18.0, 23.0])  # the 68 % interval
    np.testing.assert_array_equal(pipeline.t_eq_band({"T_eq": 0.02 * u.kK}), [20.0, 20.0, 20.0])  # a line
    assert pipeline.t_eq_band({"T_eq": np.nan, "T_median": 15.0}) is None
    assert pipeline.t_eq_band({"T_median": 15.0}) is None
    assert pipeline.source_plot_stem("G12.3+0.1 / core #2") == "G12.3+0.1___core__2"


def test_per_source_distance_rescaling_is_exact():
    """Fluxes scaled by (D / 1 kpc)^2 on a 1 kpc grid = a grid at D (S ~ M / D^2, exact)."""
    t = _catalog(4)
    common = pipeline.fit(t, _workflow())
    t["dist"] = np.full(4, 0.4) * u.kpc
    per_source = pipeline.fit(t, _workflow({"distance_column": "dist"}))
    for c in ("T_median", "T_p16", "beta_p84", "log10_mass_median", "log10_mass_p97_5"):
        # identical posteriors up to float rounding in the tabulated fluxes
        np.testing.assert_allclose(per_source[c], common[c], rtol=1e-9, err_msg=c)


def test_compare_stage_needs_draws():
    from sedtemp.errors import InputError

    t = _catalog(2)
    wf = _workflow()
    with pytest.raises(InputError, match=r"compare needs posterior draws: run pipeline\.fit\(\.\.\., n_keep=200\)"):
        pipeline.compare(t, wf, fits=pipeline.fit(t, wf, n_keep=0))


# ----------------------------------------------------------- with the field
def _field_workflow():
    pytest.importorskip("sedtemp.radiation")
    pytest.importorskip("sedtemp.equilibrium")
    wf = _workflow()
    wf.field["components"] = [{"kind": "isrf", "U_column": "U"}]
    wf.field["uncertainty"] = 0.2
    return wf


def test_predict_stage_equals_equilibrium_temperature():
    wf = _field_workflow()
    from sedtemp.equilibrium import equilibrium_temperature
    from sedtemp.radiation import ISRF

    t = _catalog(3)
    t["U"] = [1.0, 10.0, 100.0]
    pred = pipeline.predict(t, wf)
    for i, U in enumerate(t["U"]):
        direct = equilibrium_temperature(ISRF(U), wf.opacity(), beta=wf.opacity().beta)
        assert pred["T_eq_point"][i] == pytest.approx(direct.to_value(u.K), rel=1e-12)  # same call
    # T_eq rises with U (radiative equilibrium, T ~ U^(1/(4+beta)): exact for a power-law kappa)
    assert np.all(np.diff(pred["T_eq_point"]) > 0)


def test_compare_stage_equals_compare_draws():
    pytest.importorskip("sedtemp.compare")
    wf = _field_workflow()
    from sedtemp.compare import compare_draws
    from sedtemp.radiation import ISRF

    t = _catalog(2)
    t["U"] = [2.0, 5.0]
    fits = pipeline.fit(t, wf, n_keep=200)
    comp = pipeline.compare(t, wf, fits=fits)
    _, seq = pipeline.source_seed(5, "S000").spawn(2)
    direct = compare_draws(np.asarray(fits["draws_T"][0]) * u.K, np.asarray(fits["draws_beta"][0]), ISRF(2.0),
                           wf.opacity(), mass_draws=10 ** np.asarray(fits["draws_log10_mass"][0]) * u.solMass,
                           field_uncertainty=0.2, projected=False, seed=int(seq.generate_state(1)[0]))
    assert comp["heating_class"][0] == direct.flag
    assert comp["p_warmer"][0] == pytest.approx(direct.p_warmer, rel=1e-12)


# ---------------------------------------------------------------- the demo
def _load_generator():
    spec = importlib.util.spec_from_file_location("make_demo", ROOT / "sample_data" / "make_demo.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def _demo_dir():
    return resources.files("sedtemp") / "data" / "demo"


BAND_FILES = [f"bands/{b}.ecsv" for b in ("k70", "k110", "k170", "k250", "k350", "k500")]


def _generator_or_skip():
    if not (ROOT / "sample_data" / "make_demo.py").exists():
        pytest.skip("source tree not available (installed package only)")
    return _load_generator()


def test_bundled_demo_files_load(tmp_path):
    """Every bundled demo file loads through importlib.resources; workflow and curves = generator's."""
    demo = _demo_dir()
    with resources.as_file(demo / "demo.toml") as path:
        wf = load_workflow(path)
        assert len(wf.bandset()) == 6
        cat = read_catalog(wf.path(wf.catalog["path"]))
        truth = read_catalog(wf.path("demo_truth.ecsv"))
    assert cat["src"].tolist() == truth["src"].tolist()
    gen = _generator_or_skip()
    assert len(cat) == gen.N_SOURCES
    assert (demo / "demo.toml").read_text(encoding="utf-8") == gen.WORKFLOW.format(bands=gen._bands_toml())
    for name, (lam, width, _) in gen.BANDS.items():
        gen.response_curve(lam, width).write(tmp_path / f"{name}.ecsv", format="ascii.ecsv")
        assert (demo / f"bands/{name}.ecsv").read_text() == (tmp_path / f"{name}.ecsv").read_text(), name


def test_star_separation_from_sky_positions():
    """Projected separations from RA/Dec and the common distance equal the generator's truth.

    The generator placed each source at angle arctan(sep / D) from the star with astropy's
    directional_offset_by; map_catalog inverts that with SkyCoord.separation: exact up to the
    rounding of the stored coordinates (relative 1e-9).
    """
    demo = _demo_dir()
    with resources.as_file(demo / "demo.toml") as path:
        wf = load_workflow(path)
        m = map_catalog(read_catalog(wf.path(wf.catalog["path"])), wf)
        truth = read_catalog(wf.path("demo_truth.ecsv"))
    star = next(c for c in m.field_params if c["kind"] == "star")
    np.testing.assert_allclose(star["distance"].to_value(u.pc), truth["separation"].quantity.to_value(u.pc),
                               rtol=1e-9)


@pytest.mark.slow
def test_bundled_demo_equals_generator_output(tmp_path):
    """The full regeneration (about 2 min on 2 cores): bundled catalogue and truth are the generator's."""
    gen = _generator_or_skip()
    gen.make(tmp_path)
    demo = _demo_dir()
    for name in ["demo.toml", "demo_catalog.ecsv", "demo_truth.ecsv", *BAND_FILES]:
        assert (demo / name).read_text(encoding="utf-8") == (tmp_path / name).read_text(encoding="utf-8"), name


@pytest.mark.slow
def test_demo_subset_end_to_end(tmp_path, monkeypatch):
    pytest.importorskip("sedtemp.compare")
    from sedtemp.cli import main

    _patch_demo(monkeypatch, output={"max_source_plots": 3})  # the demo's own cap (12) costs ~30 s here
    assert main(["demo", "--output", str(tmp_path), "--sources", "40", "--quiet"]) == 0
    res = Table.read(tmp_path / "results.ecsv")
    truth = Table.read(_demo_dir() / "demo_truth.ecsv")[:40]
    assert res["src"].tolist() == truth["src"].tolist()
    ok = res["status"] == "ok"
    assert ok.sum() >= 36
    # the invented scenario's truth: most flags recover the true class (the demo's purpose)
    match = np.asarray(res["heating_class"][ok]) == np.asarray(truth["true_class"][ok])
    assert match.mean() >= 0.7, f"only {match.mean():.0%} of flags equal the truth"
    # recovered temperatures of the consistent sources scatter around the truth
    cons = ok & (np.asarray(truth["true_class"]) == "consistent")
    z = (np.asarray(res["T_median"][cons]) - np.asarray(truth["T_true"][cons])) / (
        0.5 * (np.asarray(res["T_p84"][cons]) - np.asarray(res["T_p16"][cons])))
    assert np.mean(np.abs(z) < 2) >= 0.8  # ~95 % expected for calibrated 68 % intervals
    assert (tmp_path / "results-report.txt").exists()
    # the draws file needs the optional h5py (sedtemp[hdf5]); without it the demo goes on without
    assert (tmp_path / "results-draws.h5").exists() == (importlib.util.find_spec("h5py") is not None)
    # the demo leaves the catalogue plots and the plots of its flagged sources (up to the cap)
    for name in ("population", "comparison"):
        assert (tmp_path / f"{name}.pdf").stat().st_size > 0 and (tmp_path / f"{name}.png").stat().st_size > 0
    flagged = [str(k) for k, f, s in zip(res["src"], res["heating_class"], res["status"], strict=True) if s == "ok" and f not in ("none", "consistent")]
    assert len(flagged) > 3  # the cap is reached
    assert sorted(p.name for p in (tmp_path / "sources").iterdir()) == sorted(
        f"{k}_{kind}.{ext}" for k in flagged[:3] for kind in ("corner", "sed") for ext in ("pdf", "png"))
    src = json.loads((tmp_path / "results-report.json").read_text())["plots"]["sources"]
    assert (src["made"], src["selected"], src["cap_reached"]) == (3, len(flagged), True)


def _patch_demo(monkeypatch, **sections):
    """Load the demo workflow with some settings changed (test speed); its file and sha256 stay."""
    import sedtemp.pipeline as api  # the CLI imports load_workflow from sedtemp.pipeline when it runs

    real = api.load_workflow

    def load(path):
        wf = real(path)
        for name, values in sections.items():
            getattr(wf, name).update(values)
        return wf

    monkeypatch.setattr(api, "load_workflow", load)


def test_demo_without_h5py(tmp_path, monkeypatch, capsys):
    from sedtemp.cli import main

    monkeypatch.setitem(sys.modules, "h5py", None)
    _patch_demo(monkeypatch, run={"executor": "serial"}, output={"max_source_plots": 0})
    assert main(["demo", "--output", str(tmp_path), "--sources", "6"]) == 0
    out = capsys.readouterr().out
    assert out.startswith("demo: h5py is not installed (pip install 'sedtemp[hdf5]'): posterior draws go to a "
                          "FITS table\n")
    assert (tmp_path / "results.ecsv").exists() and not (tmp_path / "results-draws.h5").exists()
    assert (tmp_path / "results-draws.fits").exists()
    assert (tmp_path / "population.ecsv").exists()  # the demo's population stage ran on those draws
    assert (tmp_path / "population.png").exists()
    src = json.loads((tmp_path / "results-report.json").read_text())["plots"]["sources"]
    assert src["made"] == 0 and src["cap_reached"] == (src["selected"] > 0)  # cap 0: none made


def test_grid_cache_follows_edits_of_a_parsed_workflow():
    """The per-process grid cache is keyed on the workflow's current content, not its parse-time digest."""
    t = _catalog(3)
    wf = _workflow()
    before = pipeline.fit(t, wf)
    wf.fit["n_T"] = 25  # edited after parsing: the cached 40-node grid must not be reused
    edited = pipeline.fit(t, wf)
    fresh = pipeline.fit(t, _workflow(fit={"n_T": 25}))
    np.testing.assert_array_equal(edited["T_median"], fresh["T_median"])
    assert not np.array_equal(edited["T_median"], before["T_median"])
