"""Streamed catalogues (``stream_catalog``, what ``sedtemp run`` uses): a FITS file read through a
memory map a block of rows at a time, each chunk's rows converted when it is taken. The values,
the results, the digests and the error messages equal those of mapping the whole table at once.

The blocks are made a few rows long here (``BLOCK_ROWS`` patched) so that a small catalogue
crosses many block boundaries."""

import astropy.units as u
import numpy as np
import pytest
from astropy.table import MaskedColumn, Table
from invented import catalog_workflow_data, invented_catalog

from sedtemp.cli import main
from sedtemp.errors import CatalogError, ConfigError
from sedtemp.pipeline import batch, catalog
from sedtemp.pipeline.batch import run_batch
from sedtemp.pipeline.catalog import (
    CatalogDigest,
    MappedCatalog,
    StreamedCatalog,
    catalog_rows,
    map_catalog,
    read_catalog,
    stream_catalog,
)
from sedtemp.pipeline.checkpoints import input_digests
from sedtemp.pipeline.config import parse_workflow

N = 23


@pytest.fixture(autouse=True)
def small_blocks(monkeypatch):
    monkeypatch.setattr(catalog, "BLOCK_ROWS", 5)


def _catalogue(n=N):
    """Invented sources with what the mapping treats row by row: skipped sources (too few bands),
    an upper-limit flag column, a per-source distance and field strength, a kept text column."""
    t = invented_catalog(n, 7)
    for w in (160, 250, 350, 500):  # one band left: skipped
        t[f"F{w}"][[2, n - 10]] = np.nan
        t[f"E{w}"][[2, n - 10]] = np.nan
    t["F70"][[6, n - 4]] = np.nan  # one band unobserved
    t["E70"][[6, n - 4]] = np.nan
    t["lim500"] = np.arange(n) % 4 == 1
    t["dist"] = np.linspace(300.0, 500.0, n) * u.pc
    t["U"] = np.linspace(0.5, 3.0, n)
    t["note"] = MaskedColumn([f"n{i}" for i in range(n)], mask=np.arange(n) % 6 == 0)
    return t


def _workflow(run=None, output=None):
    data = catalog_workflow_data(field={"components": [{"kind": "isrf", "U_column": "U"}]},
                                 output={"keep_columns": ["note"], **(output or {})}, run=run or {})
    data["catalog"].pop("distance")
    data["catalog"]["distance_column"] = "dist"
    data["bands"]["b500"]["limit"] = "lim500"
    return parse_workflow(data)


def _write(tab, tmp_path, suffix):
    path = tmp_path / f"cat{suffix}"
    tab.write(path, overwrite=True)
    return path


def _assert_same(a: MappedCatalog, b: MappedCatalog):
    """Every value the stages see, exactly (the streamed route converts the same numbers the same way)."""
    for name in ("ids", "keys", "rows", "flux", "err", "missing", "limit_only", "distance_m", "redshift", "A_V",
                 "skip_reason"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
    assert a.band_names == b.band_names and a.id_column == b.id_column
    assert [sorted(c) for c in a.field_params] == [sorted(c) for c in b.field_params]
    for ca, cb in zip(a.field_params, b.field_params, strict=True):
        for k in ca:
            if isinstance(ca[k], str):
                assert ca[k] == cb[k]
                continue
            assert getattr(ca[k], "unit", None) == getattr(cb[k], "unit", None), k
            np.testing.assert_array_equal(getattr(ca[k], "value", ca[k]), getattr(cb[k], "value", cb[k]), err_msg=k)
    assert sorted(a.kept) == sorted(b.kept)
    for k in a.kept:
        np.testing.assert_array_equal(np.asarray(a.kept[k]), np.asarray(b.kept[k]), err_msg=k)
        assert a.kept[k].dtype == b.kept[k].dtype


@pytest.mark.parametrize("suffix", [".fits", ".ecsv"])
def test_streamed_rows_equal_the_whole_table_route(tmp_path, suffix):
    wf = _workflow()
    path = _write(_catalogue(), tmp_path, suffix)
    rows = catalog_rows(path)
    assert isinstance(rows, catalog._FitsRows if suffix == ".fits" else catalog._TableRows)
    whole = map_catalog(read_catalog(path), wf)
    streamed = stream_catalog(rows, wf)
    assert isinstance(streamed, StreamedCatalog) and len(streamed) == N
    np.testing.assert_array_equal(streamed.ids, whole.ids)
    assert streamed.ids.dtype == whole.ids.dtype
    assert [streamed.keys[i] for i in range(N)] == [str(k) for k in whole.keys]
    # one chunk inside a block, across blocks, single sources, sources far apart (read row by row), all
    for index in ([0, 1, 2], [3, 4, 5, 6, 7], [22], [13], [0, 11, 22], [20, 3, 9], list(range(N))):
        _assert_same(streamed.take(index), whole.take(index))
    assert CatalogDigest.of(streamed) == CatalogDigest.of(whole)
    assert input_digests(wf, streamed) == input_digests(wf, whole)


def test_fits_blocks_read_as_table_read_reads_the_file(tmp_path):
    """Text as bytes (stripped), masked integers (TNULL) and text, units, metadata: as Table.read."""
    t = _catalogue()
    t["code"] = MaskedColumn(np.arange(N), mask=np.arange(N) % 5 == 0)
    t["blank"] = ["" if i % 3 == 0 else "x" for i in range(N)]
    t.meta["SURVEY"] = "invented"
    path = _write(t, tmp_path, ".fits")
    whole, rows = Table.read(path), catalog_rows(path)
    for start, stop in ((0, 5), (5, 10), (20, 23)):
        part, ref = rows.read(start, stop), whole[start:stop]
        assert part.colnames == ref.colnames and part.meta == ref.meta
        for c in ref.colnames:
            a, b = ref[c], part[c]
            assert (a.dtype, a.unit) == (b.dtype, b.unit), c
            fill = {"f": np.nan}.get(a.dtype.kind)  # NaN is masked only in a column that holds one
            fa = a.filled(fill) if hasattr(a, "filled") and fill is not None else np.asarray(a)
            fb = b.filled(fill) if hasattr(b, "filled") and fill is not None else np.asarray(b)
            np.testing.assert_array_equal(np.asarray(fa), np.asarray(fb), err_msg=c)
            if a.dtype.kind != "f":
                np.testing.assert_array_equal(getattr(a, "mask", False), getattr(b, "mask", False), err_msg=c)


@pytest.fixture
def fixed_date(monkeypatch):
    real = batch.run_metadata
    monkeypatch.setattr(batch, "run_metadata", lambda wf, m: {**real(wf, m), "date_utc": "2000-01-01T00:00:00Z"})


def test_streamed_run_writes_the_same_results(tmp_path, fixed_date):
    wf = _workflow(run={"chunk_size": 4}, output={"keep_draws": True})
    path = _write(_catalogue(), tmp_path, ".fits")
    whole = map_catalog(read_catalog(path), wf)
    res = run_batch(whole, wf, output_dir=tmp_path / "a")
    tally = run_batch(stream_catalog(catalog_rows(path), wf), wf, output_dir=tmp_path / "b", return_table=False)
    assert tally.n == len(res) == N and tally.skipped
    for name in ("results.ecsv", "results-draws.h5", "results-draws.fits", "results-report.json"):
        a, b = tmp_path / "a" / name, tmp_path / "b" / name
        if name.endswith(".json"):
            assert a.read_text().count("\n") == b.read_text().count("\n")
        elif a.exists():
            assert a.read_bytes() == b.read_bytes(), name


def test_resume_of_a_streamed_run_detects_a_changed_catalogue(tmp_path):
    wf = _workflow(run={"chunk_size": 4})
    t = _catalogue()
    path = _write(t, tmp_path, ".fits")
    run_batch(stream_catalog(catalog_rows(path), wf), wf, output_dir=tmp_path / "out", return_table=False)
    # the same file again: resumes (nothing left to fit); the whole-table route agrees on the digest
    run_batch(map_catalog(read_catalog(path), wf), wf, output_dir=tmp_path / "out", return_table=False)
    t["F350"][17] *= 1.001  # one value, in a later block
    _write(t, tmp_path, ".fits")
    with pytest.raises(ConfigError, match="changed: catalogue values"):
        run_batch(stream_catalog(catalog_rows(path), wf), wf, output_dir=tmp_path / "out", return_table=False)


def _message(tab, wf):
    with pytest.raises(CatalogError) as whole:
        map_catalog(tab, wf)
    return str(whole.value)


@pytest.mark.parametrize("suffix", [".fits", ".ecsv"])
@pytest.mark.parametrize("spoil", ["negative_error", "nan_error", "duplicate", "no_id", "bad_limit", "bad_distance",
                                   "no_column", "no_unit"])
def test_errors_on_bad_rows_are_those_of_the_whole_table(tmp_path, suffix, spoil):
    wf = _workflow()
    t = _catalogue()
    if spoil == "negative_error":
        t["E160"][[3, 16]] = -1.0
    elif spoil == "nan_error":
        t["E250"][18] = np.nan
    elif spoil == "duplicate":  # in two blocks: only the whole catalogue shows it
        t["name"][21] = t["name"][1]
    elif spoil == "no_id":
        t["name"][17] = ""
    elif spoil == "bad_limit":
        t["lim500"] = t["lim500"].astype(int)
        t["lim500"][12] = 2
    elif spoil == "bad_distance":
        t["dist"][22] = -5.0
    elif spoil == "no_column":
        t.remove_column("E350")
    else:
        t["F70"].unit = None
    path = _write(t, tmp_path, suffix)
    expected = _message(read_catalog(path), wf)
    with pytest.raises(CatalogError) as streamed:
        stream_catalog(catalog_rows(path), wf)
    assert str(streamed.value) == expected
    assert str(streamed.value).startswith("catalogue 'catalog.ecsv' has ")  # the workflow's [catalog] path
    column = {"negative_error": "band 'b160': error is not positive for 2 source(s): 'S003', 'S016'",
              "nan_error": "band 'b250': error is NaN but the flux is not for 1 source(s): 'S018'",
              "duplicate": "duplicate id(s): 'S001'", "no_id": "at row(s) [17]",
              "bad_limit": "column 'lim500' holds", "bad_distance": "'S022'",
              "no_column": "column 'E350' is not in the catalogue", "no_unit": "column 'F70' has no unit"}[spoil]
    assert column in expected


def test_sedtemp_run_on_a_fits_catalogue(tmp_path, capsys):
    """The command streams the file; a bad row fails the run as `sedtemp check` reports it."""
    t = _catalogue(12)
    t.write(tmp_path / "cat.fits")
    bands = "\n".join(f'[bands.b{w}]\nflux = "F{w}"\nerror = "E{w}"\ntophat = {{ center = "{w} um", width = 0.3 }}\n'
                      for w in (70, 160, 250, 350, 500))
    wf = tmp_path / "wf.toml"
    wf.write_text(f'[run]\nseed = 3\nexecutor = "serial"\nchunk_size = 4\n\n[catalog]\npath = "cat.fits"\n'
                  f'id_column = "name"\ndistance = "400 pc"\n\n{bands}\n[fit]\nn_T = 30\nn_beta = 20\nn_draws = 100\n\n'
                  '[output]\ndirectory = "out"\nplots = false\nsource_plots = "none"\nn_keep = 50\n')
    assert main(["run", str(wf), "--quiet"]) == 0
    res = Table.read(tmp_path / "out" / "results.ecsv")
    assert len(res) == 12 and list(res["name"]) == list(t["name"])
    assert main(["run", str(wf), "--quiet", "--limit", "5", "--output", str(tmp_path / "five")]) == 0
    assert len(Table.read(tmp_path / "five" / "results.ecsv")) == 5
    t["E250"][9] = -1.0
    t.write(tmp_path / "cat.fits", overwrite=True)
    capsys.readouterr()
    assert main(["check", str(wf)]) == 1
    check = capsys.readouterr().err
    assert main(["run", str(wf), "--quiet", "--restart"]) == 1
    run = capsys.readouterr().err
    assert "band 'b250': error is not positive for 1 source(s): 'S009'" in run
    assert run.replace("sedtemp run:", "sedtemp check:") == check


def test_take_out_of_range_and_keys(tmp_path):
    wf = _workflow()
    streamed = stream_catalog(catalog_rows(_write(_catalogue(), tmp_path, ".fits")), wf)
    with pytest.raises(IndexError, match=r"source index out of range \[0, 23\)"):
        streamed.take([22, 23])
    assert len(streamed.take([])) == 0
    assert len(streamed.keys) == N and list(streamed.keys[[1, 2]]) == ["S001", "S002"]


def test_an_empty_catalogue_maps_whole(tmp_path):
    wf = _workflow()
    mapped = stream_catalog(catalog_rows(_write(_catalogue()[:0], tmp_path, ".fits")), wf)
    assert isinstance(mapped, MappedCatalog) and len(mapped) == 0
