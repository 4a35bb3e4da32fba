"""The results and draws files, written chunk by chunk from the checkpoints, equal the in-memory route's."""

import numpy as np
import pytest
from astropy.table import Table
from invented import THIN_DUST_WAVE as WAVE
from invented import thin_dust_catalog

from sedtemp.pipeline import batch, writers
from sedtemp.pipeline.batch import run_batch
from sedtemp.pipeline.catalog import map_catalog
from sedtemp.pipeline.config import OUTPUT_FORMATS, parse_workflow
from sedtemp.pipeline.stages import process_chunk


def make_catalog(n, seed=5):
    return thin_dust_catalog(n, seed)


def make_workflow(fmt="ecsv", **output):
    bands = {f"b{w}": {"flux": f"F{w}", "error": f"E{w}", "tophat": {"center": f"{w} um", "width": 0.3}}
             for w in WAVE}
    return parse_workflow({
        "run": {"seed": 11, "executor": "serial", "chunk_size": 4},
        "catalog": {"path": "cat.ecsv", "id_column": "name", "distance": "400 pc"},
        "bands": bands, "fit": {"n_T": 30, "n_beta": 16, "n_draws": 100},
        "priors": {"T": {"kind": "uniform", "low": 5.0, "high": 60.0},
                   "beta": {"kind": "uniform", "low": 0.5, "high": 3.0}},
        "output": {"n_keep": 20, "format": fmt, "keep_draws": True, "plots": False, "source_plots": "none",
                   **output},
    })


@pytest.fixture
def fixed_date(monkeypatch):
    """The results metadata without the clock, so that two writes of the same results compare."""
    real = batch.run_metadata
    monkeypatch.setattr(batch, "run_metadata", lambda wf, m: {**real(wf, m), "date_utc": "2000-01-01T00:00:00Z"})


def _in_memory_files(mapped, wf, folder):
    """The files as written before streaming: every chunk (in row order) vstacked in memory, then
    written whole (``_finalise``, the route without an output folder, and ``_write_outputs``)."""
    size = wf.run["chunk_size"]
    tabs = [process_chunk(wf, mapped.take(np.arange(a, min(a + size, len(mapped)))), n_keep=wf.output["n_keep"])
            for a in range(0, len(mapped), size)]
    ref = batch._finalise(tabs, wf, mapped)
    writers._write_outputs(ref, wf, folder)
    return ref


def _same_table(a, b):
    assert a.colnames == b.colnames
    assert a.meta == b.meta
    for c in a.colnames:
        x, y = a[c], b[c]
        assert (x.dtype, x.shape, x.unit, x.description, x.format, x.meta) == \
               (y.dtype, y.shape, y.unit, y.description, y.format, y.meta), c
        np.testing.assert_array_equal(np.asarray(x), np.asarray(y), err_msg=c)


def _catalogue(kind):
    cat = make_catalog(11)
    if kind == "first_chunk_skipped":  # chunk 1 has no fit columns: the column union differs per chunk
        for w in WAVE[1:]:
            cat[f"F{w}"][:4], cat[f"E{w}"][:4] = np.nan, np.nan
    return cat


@pytest.mark.parametrize("kind", ["plain", "first_chunk_skipped"])
@pytest.mark.parametrize("fmt", list(OUTPUT_FORMATS))
def test_streamed_files_equal_in_memory_route(tmp_path, fixed_date, fmt, kind):
    wf = make_workflow(fmt, keep_columns=["F70"])
    mapped = map_catalog(_catalogue(kind), wf)
    res = run_batch(mapped, wf, output_dir=tmp_path / "streamed")
    assert len(list((tmp_path / "streamed" / "parts").glob("part-*.ecsv"))) == 3
    ref = _in_memory_files(mapped, wf, tmp_path / "memory")
    _same_table(res, ref)
    name = "results" + OUTPUT_FORMATS[fmt][1]
    streamed, memory = (tmp_path / "streamed" / name).read_bytes(), (tmp_path / "memory" / name).read_bytes()
    assert streamed == memory  # byte for byte
    if fmt in ("csv", "votable"):
        assert (tmp_path / "streamed" / "results-meta.json").read_bytes() == \
               (tmp_path / "memory" / "results-meta.json").read_bytes()
    back = Table.read(tmp_path / "streamed" / name, **({"format": "ascii.ecsv"} if fmt == "ecsv" else {}))
    assert back.colnames[0] == "name" and back["name"].tolist() == list(mapped.ids)
    assert not list((tmp_path / "streamed" / "parts").glob(".tmp-*"))  # spill files removed


def test_streamed_draws_equal_in_memory_route(tmp_path, fixed_date):
    h5py = pytest.importorskip("h5py")
    wf = make_workflow()
    mapped = map_catalog(_catalogue("first_chunk_skipped"), wf)
    res = run_batch(mapped, wf, output_dir=tmp_path / "streamed")
    _in_memory_files(mapped, wf, tmp_path / "memory")
    with h5py.File(tmp_path / "streamed" / "results-draws.h5") as a, \
            h5py.File(tmp_path / "memory" / "results-draws.h5") as b:
        assert sorted(a) == sorted(b) == ["T", "beta", "id", "log10_mass"]
        assert dict(a.attrs) == dict(b.attrs)
        for k in b:
            assert (a[k].dtype, a[k].shape, a[k].chunks, a[k].compression) == \
                   (b[k].dtype, b[k].shape, b[k].chunks, b[k].compression), k
            np.testing.assert_array_equal(a[k][:], b[k][:], err_msg=k)
    np.testing.assert_array_equal(np.asarray(res["draws_T"])[4:], h5py.File(tmp_path / "streamed" / "results-draws.h5")["T"][4:])


def test_streamed_draws_fits_without_h5py(tmp_path, fixed_date, monkeypatch):
    import sys

    monkeypatch.setitem(sys.modules, "h5py", None)  # `import h5py` now raises ImportError
    wf = make_workflow()
    mapped = map_catalog(_catalogue("plain"), wf)
    run_batch(mapped, wf, output_dir=tmp_path / "streamed")
    _in_memory_files(mapped, wf, tmp_path / "memory")
    assert (tmp_path / "streamed" / "results-draws.fits").read_bytes() == \
           (tmp_path / "memory" / "results-draws.fits").read_bytes()


def test_resumed_run_writes_the_same_file(tmp_path, fixed_date):
    wf = make_workflow("fits")
    mapped = map_catalog(_catalogue("plain"), wf)
    run_batch(mapped, wf, output_dir=tmp_path)
    first = (tmp_path / "results.fits").read_bytes()
    parts = sorted((tmp_path / "parts").glob("part-*.ecsv"))
    parts[1].unlink()  # as if killed before the middle chunk finished
    res = run_batch(mapped, wf, output_dir=tmp_path)
    assert (tmp_path / "results.fits").read_bytes() == first
    assert res["name"].tolist() == list(mapped.ids)


def test_interleaved_checkpoints_are_merged_by_row(tmp_path):
    """Chunks whose rows interleave (cut across a gap by an earlier version) still come out in row order."""
    wf = make_workflow()
    mapped = map_catalog(make_catalog(7), wf)
    finished = writers._Finished(tmp_path, len(mapped))
    for rows in ([0, 1, 4, 5], [2, 3], [6]):
        finished.add(process_chunk(wf, mapped.take(rows), n_keep=0))
    assert [len(g) for g in finished.groups()] == [2, 1]
    chunks = list(writers._result_chunks(finished, mapped, {"k": 1}))
    assert [start for start, _ in chunks] == [0, 6]
    assert [str(v) for _, t in chunks for v in t["name"]] == [str(v) for v in mapped.ids]
    assert chunks[0][1].meta == {"k": 1} and chunks[1][1].meta == {}
    finished.remove()
    assert not list(tmp_path.iterdir())


def test_chunks_never_span_a_gap():
    """A resumed run cuts the rows still to do at their gaps: each chunk is a range of consecutive rows."""
    seen = []

    class Bar:
        def update(self, status):
            pass

    wf = make_workflow()
    wf.run["chunk_size"] = 8

    def on_done(tab):
        seen.append([int(r) for r in tab["_row"]])

    mapped = map_catalog(make_catalog(14), wf)
    todo = np.array([4, 5, 6, 7, 12, 13])
    batch._fit_all(lambda: (batch.InlineExecutor(), None), wf, mapped, todo, on_done, Bar(), 0)
    assert sorted(seen) == [[4, 5, 6, 7], [12, 13]]


def test_assembled_chunk_is_described_once():
    """assemble builds the columns with the metadata describe gives; describing again changes nothing."""
    import io

    from sedtemp.pipeline.schema import describe

    wf = make_workflow(keep_columns=["F70"])
    chunk = process_chunk(wf, map_catalog(make_catalog(5), wf), n_keep=5)
    bare = chunk.copy()
    for c in bare.colnames:
        if c != "F70":
            bare[c].unit, bare[c].description, bare[c].format, bare[c].meta = None, None, None, {}

    def text(t):
        buf = io.StringIO()
        t.write(buf, format="ascii.ecsv")
        return buf.getvalue()

    assert text(chunk) == text(describe(bare)) == text(describe(chunk.copy()))
