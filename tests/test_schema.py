"""The results schema: every column described, typed and united; metadata kept in every format."""

import json
import os

import astropy.units as u
import numpy as np
import pytest
from astropy.io.votable import parse_single_table
from astropy.table import QTable, Table
from invented import catalog_workflow_data, invented_catalog

from sedtemp.pipeline import (
    OUTPUT_FORMATS,
    map_catalog,
    parse_workflow,
    run_batch,
    run_summary,
    schema,
    summary_lines,
)
from sedtemp.pipeline.report import Progress


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    out = tmp_path_factory.mktemp("schema")
    t = invented_catalog(5, 8)
    t["ra"], t["dec"] = np.linspace(10.0, 10.04, 5) * u.deg, np.full(5, -20.0) * u.deg
    wf = parse_workflow(catalog_workflow_data(
        field={"components": [{"kind": "isrf", "U": 1.0}], "uncertainty": 0.2},
        fit={"mcmc_sources": ["S003"], "n_walkers": 16, "ess_target": 50},
        output={"keep_columns": ["ra", "dec"]}))
    res = run_batch(map_catalog(t, wf), wf, output_dir=out)
    return out, res, wf


def test_every_column_in_schema_with_unit_type_and_description(run_dir):
    _, res, _ = run_dir
    for name in res.colnames:
        if name in ("name", "ra", "dec"):
            continue
        s = schema.spec(name)
        col = res[name]
        assert col.description == s.description, name
        assert col.dtype.kind == {"f": "f", "i": "i", "b": "b", "U": "U"}[s.kind], name
        if s.kind == "f" and s.unit:
            assert col.unit == u.Unit(s.unit), name
    assert res["n_bands_used"].dtype.kind == "i" and res["dof"].tolist() == [2] * 5  # 5 bands - 3 parameters
    assert res["extra_power_median"].unit == u.W / u.kg and res["extra_luminosity_median"].unit == u.solLum
    assert res["method"].tolist() == ["grid", "grid", "grid", "mcmc", "grid"]
    assert "" not in res["reason"].tolist() and set(res["reason"]) == {"none"}  # 'none', never empty


def test_unknown_column_refused_by_the_schema():
    with pytest.raises(KeyError, match=r"results column 'T_mean' is not in sedtemp.pipeline.schema; add it"):
        schema.spec("T_mean")


def test_kept_input_columns_carried_through(run_dir):
    _, res, _ = run_dir
    np.testing.assert_array_equal(res["ra"], np.linspace(10.0, 10.04, 5))
    assert res["ra"].unit == u.deg


def test_metadata_records_the_run(run_dir):
    out, _, wf = run_dir
    meta = Table.read(out / "results.ecsv").meta
    for key in ("catalog_sha256", "results_sha256", "workflow_sha256", "date_utc", "command_line"):
        assert meta[key], key
    assert set(meta["versions"]) == {"sedtemp", "python", "numpy", "scipy", "astropy", "emcee"}
    assert meta["id_column"] == "name" and meta["band_names"] == list(wf.bands)


@pytest.mark.parametrize("fmt", ["fits", "votable", "csv"])
def test_other_formats_keep_units_and_metadata(tmp_path, run_dir, fmt):
    from sedtemp.pipeline import write_table

    _, res, _ = run_dir
    path = write_table(res, tmp_path / f"r{OUTPUT_FORMATS[fmt][1]}", format=fmt)
    if fmt == "fits":
        back = QTable.read(path)
        assert back["log10_mass_median"].unit == u.dex(u.solMass)  # kept through astropy's metadata block
        meta = {str(k).lower(): v for k, v in back.meta.items()}  # FITS keys may come back upper case
        assert meta["catalog_sha256"] == res.meta["catalog_sha256"]
        assert json.loads(meta["versions"]) == res.meta["versions"]
        return
    side = json.loads((tmp_path / "r-meta.json").read_text())
    assert side["meta"]["catalog_sha256"] == res.meta["catalog_sha256"]
    assert side["columns"]["log10_mass_median"]["unit"] == "dex(solMass)"
    if fmt == "votable":
        fields = {f.name: f for f in parse_single_table(path).fields}
        assert fields["T_median"].ucd == "phys.temperature;stat.median" and fields["T_median"].unit == u.K
        assert fields["p_warmer"].ucd == "stat.probability"


def test_run_summary_fit_quality_and_class_ranges(run_dir):
    out, res, _ = run_dir
    summ = run_summary(res)
    assert set(summ["fit_quality"]) == {"poor fit", "prior-limited", "unconverged"}
    assert sum(c["n"] for c in summ["classes"].values()) == 5
    cls = next(iter(summ["classes"]))
    rows = np.asarray(res["heating_class"]) == cls
    lo, hi = summ["classes"][cls]["T"]
    assert (lo, hi) == (float(np.min(res["T_median"][rows])), float(np.max(res["T_median"][rows])))
    lines = summary_lines(summ, len(res))
    text = (out / "results-report.txt").read_text()
    assert all(line in text for line in lines) and lines[1].startswith("fit quality: ")


def test_progress_plain_lines_when_not_a_terminal(tmp_path):
    import io

    buf = io.StringIO()  # not a tty
    with Progress("fit", 4, 0, True, stream=buf) as bar:
        bar.update(["ok", "ok", "failed"])
        bar.update(["skipped"])
    lines = buf.getvalue().splitlines()
    assert lines[-1].startswith("sedtemp fit: 4/4 sources (2 ok, 1 skipped, 1 failed), ")
    assert "\r" not in buf.getvalue()


def test_results_parts_and_report_have_the_usual_permissions(run_dir):
    """Files are created 0666 minus the umask (mkstemp alone would leave results and parts 0600)."""
    out, _, _ = run_dir
    umask = os.umask(0)
    os.umask(umask)
    expected = 0o666 & ~umask
    files = [out / "results.ecsv", out / "results-report.txt", *(out / "parts").glob("part-*.ecsv")]
    assert {f.stat().st_mode & 0o777 for f in files} == {expected}
