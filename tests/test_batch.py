"""Chunked runs: per-source seeds, independence of chunking and workers, checkpoints, failures."""

import hashlib
import sys

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table
from invented import THIN_DUST_WAVE as WAVE
from invented import thin_dust_catalog

from sedtemp import pipeline
from sedtemp.errors import ConfigError
from sedtemp.pipeline import stages
from sedtemp.pipeline.batch import InlineExecutor, run_batch
from sedtemp.pipeline.catalog import map_catalog
from sedtemp.pipeline.config import parse_workflow


def make_catalog(n, seed=3):
    return thin_dust_catalog(n, seed)


def make_workflow(**run):
    bands = {f"b{w}": {"flux": f"F{w}", "error": f"E{w}", "tophat": {"center": f"{w} um", "width": 0.3}}
             for w in WAVE}
    return parse_workflow({
        "run": {"seed": 11, "executor": "serial", "chunk_size": 4, **run},
        "catalog": {"path": "cat.ecsv", "id_column": "name", "distance": "400 pc"},
        "bands": bands, "fit": {"n_T": 40, "n_beta": 24, "n_draws": 200},
        "priors": {"T": {"kind": "uniform", "low": 5.0, "high": 60.0},
                   "beta": {"kind": "uniform", "low": 0.5, "high": 3.0}},
        "output": {"n_keep": 50},
    })


def _same(a, b, rtol=0.0):
    assert a.colnames == b.colnames
    for c in a.colnames:
        x, y = np.asarray(a[c]), np.asarray(b[c])
        if x.dtype.kind == "f":
            # rtol=0: bit-identical (same seeds, same arithmetic); see the Dask test for rtol > 0
            np.testing.assert_allclose(x, y, rtol=rtol, atol=0, err_msg=c)
        else:
            assert x.tolist() == y.tolist(), c


@pytest.fixture(scope="module")
def catalog():
    return make_catalog(14)


@pytest.fixture(scope="module")
def reference(catalog):
    wf = make_workflow()
    return run_batch(map_catalog(catalog, wf), wf, keep_draws=True)


def test_source_seed_is_workflow_seed_and_stable_id_hash():
    h = int.from_bytes(hashlib.blake2b(b"S007", digest_size=8).digest(), "little")
    expect = np.random.SeedSequence([11, h]).generate_state(4)
    np.testing.assert_array_equal(pipeline.source_seed(11, "S007").generate_state(4), expect)
    assert not np.array_equal(pipeline.source_seed(11, "S008").generate_state(4), expect)
    assert not np.array_equal(pipeline.source_seed(12, "S007").generate_state(4), expect)


def test_results_in_catalogue_order_with_id_first(reference, catalog):
    assert reference.colnames[0] == "name"
    assert reference["name"].tolist() == catalog["name"].tolist()
    assert set(reference["status"]) == {"ok"}
    assert reference["T_median"].unit == u.K and reference["log10_mass_median"].unit == u.dex(u.solMass)
    assert reference.meta["workflow_sha256"] == make_workflow().digest
    assert reference["draws_T"].shape == (14, 50)


def test_grid_rows_equal_direct_grid_posterior(reference, catalog):
    """A row equals GridPosterior.summarise on that source alone with its own seed (exact)."""
    wf = make_workflow()
    m = map_catalog(catalog, wf)
    grid = stages.grid_for(wf, 0.0, m.distance_m[5])
    seq, _ = pipeline.source_seed(11, "S005").spawn(2)
    cols, _ = grid.summarise(m.flux[5:6], m.err[5:6], m.limit_only[5:6], n_draws=200,
                             rng=np.random.default_rng(seq), keep_draws=True)
    for key in ("T_median", "T_p16", "beta_p84", "log10_mass_median", "ppp", "chi2_map"):
        # the run fits blocks of sources; a block's matrix products may round differently
        # from a one-source call (BLAS), hence the stated 1e-10 relative tolerance
        assert reference[key][5] == pytest.approx(cols[key][0], rel=1e-10), key


@pytest.mark.parametrize("run", [{"chunk_size": 5, "executor": "process", "workers": 1},
                                 {"chunk_size": 3, "executor": "process", "workers": 2}])
def test_same_results_any_chunking_and_worker_count(reference, catalog, run):
    wf = make_workflow(**run)
    # results may not depend on chunking or worker count beyond 1e-10 relative (README)
    _same(run_batch(map_catalog(catalog, wf), wf, keep_draws=True), reference, rtol=1e-10)


def test_dask_local_cluster_same_results(reference, catalog):
    pytest.importorskip("distributed")
    wf = make_workflow(executor="dask", workers=2, chunk_size=6)
    # Dask's nanny starts workers with OMP_NUM_THREADS=1, so BLAS may sum the grid's matrix
    # products in another order: rounding-level differences (observed 3e-15), hence 1e-12
    _same(run_batch(map_catalog(catalog, wf), wf, keep_draws=True), reference, rtol=1e-12)


def test_resume_from_checkpoints(tmp_path, reference, catalog):
    wf = make_workflow()
    m = map_catalog(catalog, wf)
    full = run_batch(m, wf, output_dir=tmp_path)
    parts = sorted((tmp_path / "parts").glob("part-*.ecsv"))
    assert len(parts) == 4  # 14 sources in chunks of 4
    parts[1].unlink()
    parts[3].unlink()  # as if killed before these chunks finished
    (tmp_path / "parts" / ".tmp-part-000000099.ecsv").write_text("half-written")
    again = run_batch(m, wf, output_dir=tmp_path)
    _same(again, full)
    _same(full, reference[[c for c in reference.colnames if not c.startswith("draws_")]])
    assert sorted(p.name for p in (tmp_path / "parts").glob("part-*")) == [p.name for p in parts]
    assert not list((tmp_path / "parts").glob(".tmp-*"))  # the half-written file is removed
    on_disk = Table.read(tmp_path / "results.ecsv")
    assert on_disk["name"].tolist() == catalog["name"].tolist()  # every source exactly once
    np.testing.assert_array_equal(on_disk["T_median"], full["T_median"])
    report = (tmp_path / "results-report.txt").read_text()
    assert "sources: 14 (14 ok, 0 skipped, 0 failed)" in report
    assert "(8 resumed from checkpoints)" in report


def test_other_workflow_in_same_directory_refused(tmp_path, catalog):
    wf = make_workflow()
    run_batch(map_catalog(catalog[:4], wf), wf, output_dir=tmp_path)
    other = make_workflow(seed=12)
    with pytest.raises(ConfigError, match=r"holds checkpoints of a run with other inputs; changed: workflow "
                       r"\(\[run\] seed\)\. Use another \[output\] directory"):
        run_batch(map_catalog(catalog[:4], other), other, output_dir=tmp_path)
    res = run_batch(map_catalog(catalog[:4], other), other, output_dir=tmp_path, restart=True)
    assert len(res) == 4


def test_failed_source_has_reason_and_run_goes_on(monkeypatch, catalog):
    real = stages._grid_block

    def flaky(wf, mapped, idx, out, digest):
        if "S002" in mapped.keys[idx]:
            raise FloatingPointError("invented failure")
        return real(wf, mapped, idx, out, digest)

    monkeypatch.setattr(stages, "_grid_block", flaky)
    wf = make_workflow()
    res = run_batch(map_catalog(catalog[:5], wf), wf, executor=InlineExecutor())
    assert res["status"].tolist() == ["ok", "ok", "failed", "ok", "ok"]
    assert res["reason"][2] == "fit: FloatingPointError: invented failure"
    assert np.isnan(res["T_median"][2]) and np.isfinite(res["T_median"][3])


def test_skipped_source_row(catalog):
    t = catalog[:3].copy()
    for w in WAVE[1:]:
        t[f"F{w}"][1], t[f"E{w}"][1] = np.nan, np.nan
    wf = make_workflow()
    res = run_batch(map_catalog(t, wf), wf)
    assert res["status"].tolist() == ["ok", "skipped", "ok"]
    assert res["reason"][1] == "too_few_bands: 1 usable band(s) ['b70'], need 3"


def test_draws_written_to_hdf5(tmp_path, catalog):
    h5py = pytest.importorskip("h5py")
    wf = make_workflow()
    wf.output["keep_draws"] = True
    res = run_batch(map_catalog(catalog[:6], wf), wf, output_dir=tmp_path)
    with h5py.File(tmp_path / "results-draws.h5", "r") as h5:
        assert [v.decode() for v in h5["id"][:]] == res["name"].tolist()
        np.testing.assert_array_equal(h5["T"][:], np.asarray(res["draws_T"]))
        assert h5.attrs["workflow_sha256"] == wf.digest
    assert "draws_T" not in Table.read(tmp_path / "results.ecsv").colnames


# ------------------------------------------------------------ per-source plots
def test_select_plot_sources():
    from sedtemp.pipeline.batch import select_plot_sources

    tab = Table({"name": ["a", "b", "c", "d", "e"], "status": ["ok", "ok", "ok", "failed", "ok"],
                 "flags": ["", "T_at_prior_high", "", "", ""],
                 "flag": ["consistent", "consistent", "shielded", "extra_heating", "unconstrained"]})
    assert select_plot_sources(tab, "flagged").tolist() == [2, 4]  # comparison flag, not "consistent"; ok only
    assert select_plot_sources(tab, "all").tolist() == [0, 1, 2, 4]
    assert select_plot_sources(tab, "none").tolist() == []
    del tab["flag"]  # no comparison stage: any fit flag counts
    assert select_plot_sources(tab, "flagged").tolist() == [1]
    del tab["flags"]
    assert select_plot_sources(tab, "flagged").tolist() == []
    with pytest.raises(ConfigError, match=r"\[output\] source_plots must be one of \['none', 'flagged', 'all'\], "
                                          r"got 'most'"):
        select_plot_sources(tab, "most")


def test_source_plots_of_flagged_sources_with_cap(tmp_path, catalog):
    """T prior capped at 20 K: sources fitted warmer pile up at the edge (fit flag); cap 2 of them."""
    import json

    raw = make_workflow().raw  # a new workflow (new digest: the cached grids are keyed on it)
    raw["priors"]["T"]["high"] = 20.0
    raw["fit"].update(n_walkers=16, ess_target=40, max_steps=2000)
    raw["output"].update(source_plots="flagged", max_source_plots=2)
    wf = parse_workflow(raw)
    res = run_batch(map_catalog(catalog[:6], wf), wf, output_dir=tmp_path)
    flagged = [str(k) for k, f in zip(res["name"], res["fit_flags"], strict=True) if f != "none"]
    assert len(flagged) > 2  # otherwise the cap is not exercised
    files = sorted(p.name for p in (tmp_path / "sources").iterdir())
    # grid sources: corner and SED from the run's grid draws; no chain, so no trace and no refit
    assert files == sorted(f"{k}_{kind}.{ext}" for k in flagged[:2] for kind in ("corner", "sed")
                           for ext in ("pdf", "png"))  # the first two flagged, in catalogue order
    assert all((tmp_path / "sources" / f).stat().st_size > 0 for f in files)
    rep = json.loads((tmp_path / "results-report.json").read_text())["plots"]["sources"]
    assert rep == {"choice": "flagged", "selected": len(flagged), "made": 2, "cap": 2, "cap_reached": True,
                   "directory": "sources", "failed": [], "refits": 0}
    text = (tmp_path / "results-report.txt").read_text()
    assert f"source plots (flagged): 2 of {len(flagged)} flagged source(s) plotted in sources/" in text
    assert (f"cap reached: [output] max_source_plots = 2; {len(flagged) - 2} flagged source(s) not plotted "
            "(raise the cap, or use `sedtemp plot RESULTS --source ID`)") in text
    assert "catalogue plots: population (.pdf, .png)" in text  # no comparison columns: population only
    # --restart discards the earlier run's figures with its checkpoints
    wf.output.update(source_plots="none", plots=False)
    run_batch(map_catalog(catalog[:6], wf), wf, output_dir=tmp_path, restart=True)
    assert not (tmp_path / "sources").exists()
    assert 'source plots: none ([output] source_plots = "none")' in (tmp_path / "results-report.txt").read_text()


def test_keep_draws_without_h5py_go_to_fits(tmp_path, catalog, monkeypatch):
    from astropy.table import Table

    from sedtemp.pipeline.batch import check_optional_packages

    monkeypatch.setitem(sys.modules, "h5py", None)  # `import h5py` now raises ImportError
    wf = make_workflow()
    wf.output["keep_draws"] = True
    check_optional_packages(wf)  # draws need no optional package: FITS without h5py
    res = run_batch(map_catalog(catalog[:2], wf), wf, output_dir=tmp_path / "out")
    draws = Table.read(tmp_path / "out" / "results-draws.fits")
    assert list(draws["id"]) == [str(v) for v in res[res.colnames[0]]]
    np.testing.assert_array_equal(draws["T"], np.asarray(res["draws_T"], float))  # exact copy
