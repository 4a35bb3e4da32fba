"""Chunked runs of the pipeline over a catalogue on a ``concurrent.futures.Executor``.

The catalogue is cut into chunks of ``[run] chunk_size`` sources; each chunk
is one task (:func:`sedtemp.pipeline.stages.process_chunk`) on the executor
``[run] executor`` names (:mod:`sedtemp.pipeline.executors`). The runner
submits with a bounded number of tasks in flight, waits for the first
finished future and checkpoints its chunk (:mod:`sedtemp.pipeline.checkpoints`),
all while holding the output folder's lock. Because each source has its own
seed, a resumed run's results equal an uninterrupted run's.

With an output folder, finished chunks are not held in memory: each goes to
its checkpoint and to a temporary spill file, and the results file (and the
draws file, ``[output] keep_draws``) is written from them one chunk at a time
in row order (:func:`_write_streamed`), equal byte for byte to what writing
the whole table at once gives (HDF5 draws: equal values). The table the run
returns is filled chunk by chunk (one copy, no vstack); with
``return_table=False`` (``sedtemp run``) there is none: the report's counts
are gathered as the chunks are written (:class:`~sedtemp.pipeline.report.RunTally`)
and only the columns the stages after it need are kept. After the results:
the catalogue plots and per-source plots (:mod:`sedtemp.pipeline.figures`),
and the run report (:mod:`sedtemp.pipeline.report`).
"""

from __future__ import annotations

import concurrent.futures as cf
import functools
import io
import logging
import pickle
import platform
import sys
import time
from contextlib import ExitStack
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.table import Table, vstack

from .._io import TMP_PREFIX, atomic_path, atomic_write_with
from .._version import __version__
from .catalog import MappedCatalog, write_table
from .checkpoints import OutputLock, RunState, input_digests, unmasked
from .config import OUTPUT_FORMATS, Workflow
from .executors import EXECUTORS, InlineExecutor, open_executor
from .figures import SOURCES_DIR, catalogue_plots, select_plot_sources, source_plots
from .population_stage import population_stage
from .report import Progress, RunTally, write_report
from .schema import (
    CLASS_COLUMN,
    DRAW_PREFIX,
    FIT_FLAGS_COLUMN,
    assemble,
    describe,
    order,
    spec,
)
from .stages import process_chunk
from .tables import _for_votable, _sidecar, _write_fits

__all__ = [
    "SOURCES_DIR",
    "InlineExecutor",
    "catalogue_plots",
    "check_optional_packages",
    "empty_results",
    "open_executor",
    "run_batch",
    "run_metadata",
    "select_plot_sources",
    "write_report",
]

log = logging.getLogger(__name__)

#: Tasks kept in flight per worker: enough to keep workers busy, few enough that a
#: million-source catalogue is not all pickled at once.
_IN_FLIGHT_PER_WORKER = 3
_KINDS = {"f": float, "i": np.int64, "b": bool, "U": str}
#: Packages whose versions the results record.
_RECORDED = ("numpy", "scipy", "astropy", "emcee")


def check_optional_packages(wf: Workflow) -> None:
    """Fail now, before any fitting, if the workflow needs an optional package that is missing.

    Raises
    ------
    ImportError
        ``executor = "dask"`` without Dask distributed (``sedtemp[dask]``) or
        ``executor = "mpi"`` without mpi4py (``sedtemp[mpi]``).
    """
    EXECUTORS[wf.run["executor"]].check()


def _in_flight(ex, limit, items, task, on_done):
    """Run every item on ``ex`` with at most ``limit`` tasks in flight, in order of submission."""
    pending = {}
    queue = list(reversed(items))
    while queue or pending:
        while queue and len(pending) < limit:
            item = queue.pop()
            fn, *args = task(item)
            pending[ex.submit(fn, *args)] = item
        done, _ = cf.wait(pending, return_when=cf.FIRST_COMPLETED)
        for fut in done:
            on_done(pending.pop(fut), fut.result())


def _limit(n_workers, n_items):
    return max(1, n_items if n_workers is None else _IN_FLIGHT_PER_WORKER * n_workers)


def _versions() -> dict:
    from importlib.metadata import PackageNotFoundError, version

    out = {"sedtemp": __version__, "python": platform.python_version()}
    for name in _RECORDED:
        try:
            out[name] = version(name)
        except PackageNotFoundError:
            out[name] = "not installed"
    return out


def run_metadata(wf: Workflow, mapped: MappedCatalog) -> dict:
    """The reproducibility record of a results file (every writer keeps it)."""
    digests = input_digests(wf, mapped)
    return {"sedtemp_version": __version__, "versions": _versions(),
            "date_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "command_line": " ".join(sys.argv), "workflow_sha256": wf.digest,
            "results_sha256": digests["workflow"], "catalog_sha256": digests["catalog"],
            "files_sha256": digests["files"], "workflow": wf.source,
            # one string per line: ECSV's YAML header folds a long multi-line string into one line
            "workflow_text": (wf.text or "").splitlines(), "workflow_path": "" if wf.file is None else str(wf.file),
            "catalog_path": str(wf.path(wf.catalog["path"]).resolve()), "base_dir": str(wf.base_dir.resolve()),
            "seed": wf.run["seed"], "id_column": mapped.id_column, "band_names": list(mapped.band_names)}


def _result_names(wf: Workflow) -> list[str]:
    """The columns a run of ``wf`` writes (what an empty catalogue's results still carry)."""
    from ..fit.summary import QUANTILES

    model = wf.build_model(distance=1.0 * u.pc) if wf.model["amplitude"] == "mass" else wf.build_model()
    names = [f"{p}_{k}" for p in model.param_names for k in (*QUANTILES, "map")]
    names += ["T_beta_corr"] if "beta" in model.param_names else []
    names += ["chi2_map", "n_bands_used", "dof", "chi2_reduced", "ppp", FIT_FLAGS_COLUMN, "method", "converged"]
    if wf.field["components"]:
        names += ["T_eq_point", "beta_for_T_eq"]
        if wf.compare["enabled"]:
            names += [f"{q}_{k}" for q in ("T_eq", "ratio", "U_implied", "field_scale", "extra_power",
                                           "extra_power_solar", "extra_luminosity") for k in QUANTILES]
            names += ["p_warmer", "stochastic_fraction", "T_eq_is_upper_bound", CLASS_COLUMN, "verdict"]
    return names


def empty_results(mapped: MappedCatalog, wf: Workflow) -> Table:
    """The results table of an empty catalogue: every column (with its unit), no rows."""
    tab = assemble(mapped, [dict.fromkeys(_result_names(wf))][:0], [], [], workflow=wf)
    for name in order(_result_names(wf)):
        if name not in tab.colnames:
            tab[name] = np.zeros(0, dtype=_KINDS[spec(name).kind])
    tab = tab[[mapped.id_column, *order([c for c in tab.colnames if c != mapped.id_column and not c.startswith("_")])]]
    return describe(tab)


def _finalise(tabs: list[Table], wf: Workflow, mapped: MappedCatalog) -> Table:
    # in row order, whatever order the chunks finished in: the columns of chunks that
    # lack some (all skipped, say) then come in the same order on every run
    tabs = sorted(tabs, key=lambda t: int(np.min(t["_row"])))
    tab = unmasked(vstack(tabs, metadata_conflicts="silent")) if len(tabs) > 1 else tabs[0]
    tab.sort("_row")
    rows = np.asarray(tab["_row"])
    if rows.size != len(mapped) or np.any(rows != np.arange(len(mapped))):
        raise RuntimeError(  # the checkpoint bookkeeping guarantees this; fail loudly if not
            f"internal error: results hold {rows.size} rows for {len(mapped)} sources")
    return _public_chunk(tab, mapped.ids, run_metadata(wf, mapped), mapped.id_column)


def _public_chunk(tab: Table, ids, meta: dict, id_column: str) -> Table:
    """The results rows of ``tab`` (sorted, checked): input ids, no private column, described."""
    tab[id_column] = ids  # restore the input dtype (ECSV round trip)
    out = describe(tab[[c for c in tab.colnames if not c.startswith("_")]])
    out.meta.clear()
    out.meta.update(meta)
    return out


def _h5py_or_none():
    try:
        import h5py
    except ImportError:
        return None
    return h5py


def _write_draws(tab: Table, path: Path) -> Path | None:
    """Posterior draws in HDF5 (``path``) when h5py is installed, else in a FITS table beside it."""
    names = [c for c in tab.colnames if c.startswith(DRAW_PREFIX)]
    if not names:
        return None
    h5py = _h5py_or_none()
    if h5py is None:  # the optional extra sedtemp[hdf5] is absent: a FITS binary table keeps them
        fits_path = path.with_suffix(".fits")
        draws = Table({"id": [str(v) for v in tab[tab.colnames[0]]],
                       **{c[len(DRAW_PREFIX):]: np.asarray(tab[c], float) for c in names}})
        # FITS keywords of at most 8 characters
        draws.meta.update(SEDTEMPV=__version__, WORKFLOW=tab.meta.get("workflow_sha256", "")[:64])
        atomic_write_with(fits_path, lambda tmp: draws.write(tmp, format="fits", overwrite=True))
        return fits_path
    with atomic_path(path) as tmp, h5py.File(tmp, "w") as h5:
        h5.attrs["sedtemp_version"] = __version__
        h5.attrs["workflow_sha256"] = tab.meta.get("workflow_sha256", "")
        h5.create_dataset("id", data=np.asarray([str(v) for v in tab[tab.colnames[0]]], dtype="S"))
        for c in names:
            h5.create_dataset(c[len(DRAW_PREFIX):], data=np.asarray(tab[c], float), compression="gzip")
    return path


def _write_outputs(result, wf, out):
    fmt, name = wf.output["format"], wf.output["name"]
    write_table(result[[c for c in result.colnames if not c.startswith(DRAW_PREFIX)]],
                out / (name + OUTPUT_FORMATS[fmt][1]), format=fmt)
    if wf.output["keep_draws"]:
        _write_draws(result, out / f"{name}-draws.h5")


# ------------------------------------------------------------ the results, streamed to disk
#: Prefix of a finished chunk's spill file in the parts folder (a temporary: a killed run's
#: are removed with the other temporaries when the next run starts).
_SPILL_PREFIX = TMP_PREFIX + "chunk-"


class _Finished:
    """The finished chunks of a run with an output folder, kept on disk rather than in memory.

    Each chunk table (as fitted, or as read back from its checkpoint) is pickled
    to a temporary file beside the checkpoints, so the results file is written
    from them one chunk at a time. Kept in memory per chunk: its first and last
    row, and its columns with their dtypes (:attr:`layout` combines them).
    """

    def __init__(self, folder: Path, n_rows: int):
        self.folder = Path(folder)
        self.done = np.zeros(n_rows, dtype=bool)
        self.items: list[tuple[int, int, Path, tuple]] = []
        self._signatures: dict = {}  # one tuple per distinct column signature

    def add(self, tab: Table) -> None:
        rows = np.asarray(tab["_row"], dtype=int)
        path = self.folder / f"{_SPILL_PREFIX}{int(rows.min()):09d}-{len(self.items)}.pkl"
        with path.open("wb") as fh:
            pickle.dump(tab, fh, protocol=pickle.HIGHEST_PROTOCOL)
        sig = tuple((name, tab[name].dtype.str, tab[name].shape[1:]) for name in tab.colnames)
        self.items.append((int(rows.min()), int(rows.max()), path, self._signatures.setdefault(sig, sig)))
        self.done[rows] = True

    @property
    def layout(self) -> dict[str, tuple[np.dtype, tuple]]:
        """Name -> (dtype, shape of a cell) of the results columns: what ``vstack`` of every
        chunk, in row order, gives (the union of their columns, in order of first appearance,
        each with the common dtype of its chunks)."""
        from astropy.utils.metadata import common_dtype

        out: dict = {}
        for sig in dict.fromkeys(it[3] for it in sorted(self.items, key=lambda it: (it[0], it[1]))):
            for name, dt, shape in sig:
                common = dt if name not in out else common_dtype([np.empty(0, out[name][0]), np.empty(0, dt)])
                out[name] = (np.dtype(common), shape)
        return out

    def groups(self) -> list[list[Path]]:
        """The spill files in row order: chunks whose row ranges overlap form one group.

        Chunks are slices of the sources still to do, cut where that list has a
        gap (:func:`_fit_all`), so each holds a contiguous range of rows and a
        group is one chunk; checkpoints of an earlier version, cut across gaps,
        may interleave, and are then merged by row.
        """
        out: list[list[Path]] = []
        last = -1
        for first, end, path, _ in sorted(self.items, key=lambda it: (it[0], it[1])):
            if out and first <= last:
                out[-1].append(path)
            else:
                out.append([path])
            last = max(last, end)
        return out

    def remove(self) -> None:
        for it in self.items:
            it[2].unlink(missing_ok=True)


def _load(path: Path) -> Table:
    with path.open("rb") as fh:  # our own spill file, written by this run
        return pickle.load(fh)


def _result_chunks(finished: _Finished, mapped: MappedCatalog, meta: dict):
    """The results rows, chunk by chunk in row order, as :func:`_finalise` gives them.

    The first chunk carries ``meta``, the others none. Each is what the rows
    of the vstacked, sorted, described table of every chunk are: the same
    columns in the same order and dtypes, absent cells filled the same way.
    """
    layout = finished.layout
    names = list(layout)
    empty = Table([np.empty((0, *shape), dtype=dt) for dt, shape in layout.values()], names=names)
    start = 0
    for i, group in enumerate(finished.groups()):
        tabs = [_load(p) for p in group]
        tab = tabs[0]
        if len(tabs) > 1 or tab.colnames != names or any(tab[c].shape[1:] != shape for c, (_, shape)
                                                         in layout.items()):
            tab = unmasked(vstack([empty, *tabs], metadata_conflicts="silent"))
        else:  # the usual case: the same columns, some text columns narrower than another chunk's
            for c, (dt, _) in layout.items():
                if tab[c].dtype != dt:
                    tab[c] = tab[c].astype(dt)  # a Column keeps its unit, description and meta
        rows = np.asarray(tab["_row"])
        if np.any(np.diff(rows) < 0):
            tab.sort("_row")
            rows = np.asarray(tab["_row"])
        if np.any(rows != np.arange(start, start + rows.size)) or start + rows.size > len(mapped):
            raise RuntimeError(  # the checkpoint bookkeeping guarantees this; fail loudly if not
                f"internal error: results rows {rows[:1]}..{rows[-1:]} where rows from {start} were expected")
        yield start, _public_chunk(tab, mapped.ids[start:start + rows.size], meta if i == 0 else {},
                                   mapped.id_column)
        start += rows.size
    if start != len(mapped):
        raise RuntimeError(f"internal error: results hold {start} rows for {len(mapped)} sources")


class _TextSink:
    """ECSV or CSV written a chunk at a time: the header once, then each chunk's data lines.

    Every data line of astropy's ECSV and CSV writers depends on its own row
    only (ECSV: ``str`` of each value; CSV: each column's format), so the
    file equals the one ``Table.write`` makes of the whole table.
    """

    def __init__(self, fh, writer: str):
        self.fh, self.writer, self.first = fh, writer, True
        self.header: str | None = None  # of the chunks after the first (no table metadata)

    def _text(self, tab):
        buf = io.StringIO()
        tab.write(buf, format=self.writer)
        return buf.getvalue()

    def add(self, tab: Table) -> None:
        text = self._text(tab)
        if not self.first:  # the same table's header, without rows, comes off the front
            if self.header is None or not text.startswith(self.header):
                self.header = self._text(tab[:0])  # the columns' metadata: the same for every chunk
                if not text.startswith(self.header):
                    raise RuntimeError(f"internal error: {self.writer} chunk does not start with its header")
            text = text[len(self.header):]
        self.fh.write(text)
        self.first = False

    def close(self) -> None:
        pass


class _VOTableSink:
    """VOTable (TABLEDATA) written a chunk at a time: the first chunk's document with every
    later chunk's ``<TR>`` rows inserted before its ``</TABLEDATA>``."""

    _OPEN, _CLOSE = b"<TABLEDATA>\n", b"</TABLEDATA>"

    def __init__(self, fh):
        self.fh, self.tail = fh, None

    def add(self, tab: Table) -> None:
        buf = io.BytesIO()
        _for_votable(tab).write(buf, format="votable")
        raw = buf.getvalue()
        a = raw.index(self._OPEN) + len(self._OPEN)
        b = raw.rindex(b"\n", 0, raw.rindex(self._CLOSE)) + 1  # the line holding </TABLEDATA>
        if self.tail is None:
            self.fh.write(raw[:a])
            self.tail = raw[b:]
        self.fh.write(raw[a:b])

    def close(self) -> None:
        if self.tail is not None:
            self.fh.write(self.tail)


class _FitsSink:
    """A FITS binary table written a chunk at a time.

    The primary HDU and the table header are the first chunk's, with NAXIS2
    set to the total number of rows; then the rows of every chunk as the
    FITS writer encodes them (big-endian records, one per row), and the zero
    padding to a whole FITS block. ``write(table, fileobj)`` writes one
    table as a FITS file (the same function the whole table would go through).
    """

    _BLOCK = 2880

    def __init__(self, fh, n_rows: int, write):
        self.fh, self.n_rows, self.write = fh, n_rows, write
        self.naxis1: int | None = None
        self.rows = 0

    def add(self, tab: Table) -> None:
        from astropy.io import fits

        buf = io.BytesIO()
        self.write(tab, buf)
        raw = buf.getvalue()
        with fits.open(io.BytesIO(raw)) as hdul:
            info, header = hdul.fileinfo(1), hdul[1].header.copy()
        nrows = header["NAXIS2"]
        nbytes = header["NAXIS1"] * nrows
        if self.naxis1 is None:
            self.naxis1 = header["NAXIS1"]
            header["NAXIS2"] = self.n_rows
            self.fh.write(raw[:info["hdrLoc"]])
            self.fh.write(header.tostring().encode("ascii"))
        elif header["NAXIS1"] != self.naxis1:
            raise RuntimeError("internal error: FITS rows of one chunk differ in width from the first's")
        self.fh.write(raw[info["datLoc"]:info["datLoc"] + nbytes])
        self.rows += nrows

    def close(self) -> None:
        if self.rows != self.n_rows:
            raise RuntimeError(f"internal error: {self.rows} FITS rows written for {self.n_rows}")
        size = (self.naxis1 or 0) * self.rows
        self.fh.write(b"\0" * (-size % self._BLOCK))


def _results_sink(fmt: str, fh, n_rows: int):
    if fmt == "fits":
        return _FitsSink(fh, n_rows, _write_fits)
    if fmt == "votable":
        return _VOTableSink(fh)
    return _TextSink(fh, OUTPUT_FORMATS[fmt][0])


def _id_width(ids, step: int = 65536) -> int:
    """Bytes of the longest id as text (the ``S`` dtype of the draws file's id dataset)."""
    width = 1
    for a in range(0, len(ids), step):
        width = max(width, np.asarray([str(v) for v in ids[a:a + step]], dtype="S").itemsize)
    return width


class _H5DrawsSink:
    """The draws file in HDF5, written a chunk at a time (values as :func:`_write_draws` writes them).

    The datasets get the shapes, dtypes and gzip compression of the one-go
    writer (so the same HDF5 chunk shapes); rows are buffered so that each
    write covers whole HDF5 chunks.
    """

    def __init__(self, h5, names, layout, ids, workflow_sha):
        self.h5, self.names = h5, names
        h5.attrs["sedtemp_version"] = __version__
        h5.attrs["workflow_sha256"] = workflow_sha
        n = len(ids)
        dset = h5.create_dataset("id", shape=(n,), dtype=f"S{_id_width(ids)}")
        for a in range(0, n, 65536):
            dset[a:a + 65536] = np.asarray([str(v) for v in ids[a:a + 65536]], dtype="S")
        self.sets = {c: h5.create_dataset(c[len(DRAW_PREFIX):], shape=(n, *layout[c][1]), dtype=float,
                                          compression="gzip") for c in names}
        self.pending: dict = {c: [] for c in names}
        self.start = 0  # first row not yet written
        self.step = min(d.chunks[0] for d in self.sets.values()) if self.sets else 1

    def add(self, tab: Table, flush: bool = False) -> None:
        for c in self.names:
            if len(tab):
                self.pending[c].append(np.asarray(tab[c], float))
        held = sum(len(a) for a in self.pending[self.names[0]])
        n = held if flush else held - (self.start + held) % self.step
        if n <= 0:
            return
        for c in self.names:
            block = np.concatenate(self.pending[c])
            self.sets[c][self.start:self.start + n] = block[:n]
            self.pending[c] = [block[n:]]
        self.start += n

    def close(self) -> None:
        self.add(Table(), flush=True)


def _draws_fits_table(tab: Table, names, width: int, meta: dict | None) -> Table:
    draws = Table({"id": np.asarray([str(v) for v in tab[tab.colnames[0]]], dtype=f"U{width}"),
                   **{c[len(DRAW_PREFIX):]: np.asarray(tab[c], float) for c in names}})
    if meta is not None:
        draws.meta.update(meta)
    return draws


def _write_streamed(finished: _Finished, wf: Workflow, mapped: MappedCatalog, out: Path,
                    keep: list[str] | None = None, tally: RunTally | None = None) -> Table | None:
    """Write the results file (and the draws file) from the finished chunks, one at a time.

    The files equal those :func:`_write_outputs` writes of :func:`_finalise`'s
    table. Returns that table too (filled chunk by chunk: one copy in memory),
    or with ``keep`` only those of its columns (in its order; none: None).
    ``tally`` gets every chunk as it is written.
    """
    fmt, name = wf.output["format"], wf.output["name"]
    meta = run_metadata(wf, mapped)
    n = len(mapped)
    layout = finished.layout
    draws = [c for c in layout if c.startswith(DRAW_PREFIX)]
    keep_draws = bool(wf.output["keep_draws"] and draws)
    path = out / (name + OUTPUT_FORMATS[fmt][1])
    h5py = _h5py_or_none() if keep_draws else None
    draws_path = out / (f"{name}-draws.h5" if h5py is not None else f"{name}-draws.fits")
    result = None
    first = None
    with ExitStack() as stack:
        tmp = stack.enter_context(atomic_path(path))
        binary = fmt in ("fits", "votable")
        fh = stack.enter_context(tmp.open("wb") if binary else tmp.open("w", encoding="utf-8", newline=""))
        sink = _results_sink(fmt, fh, n)
        dsink: _H5DrawsSink | _FitsSink | None = None
        if keep_draws:
            dtmp = stack.enter_context(atomic_path(draws_path))
            if h5py is not None:
                h5 = stack.enter_context(h5py.File(dtmp, "w"))
                dsink = _H5DrawsSink(h5, draws, layout, mapped.ids, meta["workflow_sha256"])
            else:
                width = _id_width(mapped.ids)
                dmeta = {"SEDTEMPV": __version__, "WORKFLOW": meta["workflow_sha256"][:64]}
                dfh = stack.enter_context(dtmp.open("wb"))
                dsink = _FitsSink(dfh, n, lambda t, f: t.write(f, format="fits"))
        for start, tab in _result_chunks(finished, mapped, meta):
            public = [c for c in tab.colnames if not c.startswith(DRAW_PREFIX)]
            sink.add(tab[public])
            if isinstance(dsink, _FitsSink):
                dsink.add(_draws_fits_table(tab, draws, width, dmeta if start == 0 else None))
            elif dsink is not None:
                dsink.add(tab)
            if tally is not None:
                tally.add(tab)
            if first is None:
                first = tab
                cols = tab.colnames if keep is None else [c for c in tab.colnames if c in set(keep)]
                result = tab[cols][np.zeros(n, dtype=int)] if cols else None
            if result is not None:
                for c in result.colnames:
                    result[c][start:start + len(tab)] = tab[c]
        sink.close()
        if dsink is not None:
            dsink.close()
    if fmt in ("csv", "votable") and first is not None and first.meta:
        _sidecar(first[[c for c in first.colnames if not c.startswith(DRAW_PREFIX)]][:0], path)
    return result


def _fit_all(get_executor, wf, mapped, todo, on_done, bar, n_keep):
    fn = functools.partial(process_chunk, n_keep=n_keep)
    size = wf.run["chunk_size"]
    # cut where the rows still to do have a gap (a resumed run), so that each chunk holds
    # consecutive rows and the results are written chunk by chunk in row order
    runs = np.split(todo, np.flatnonzero(np.diff(todo) != 1) + 1) if todo.size else []
    chunks = [run[i:i + size] for run in runs for i in range(0, run.size, size)]
    if not chunks:
        return
    ex, n = get_executor()

    def done(_, tab):
        on_done(tab)
        bar.update(tab["status"])

    _in_flight(ex, _limit(n, len(chunks)), chunks, lambda c: (fn, wf, mapped.take(c)), done)


def run_batch(mapped: MappedCatalog, wf: Workflow, *, executor: cf.Executor | None = None,
              output_dir: str | Path | None = None, progress: bool = False, restart: bool = False,
              keep_draws: bool = False, return_table: bool = True) -> Table | RunTally:
    """Run fit -> predict -> compare over a mapped catalogue, in chunks, on an executor.

    Parameters
    ----------
    mapped : MappedCatalog
    wf : Workflow
    executor : concurrent.futures.Executor, optional, keyword-only
        Use this executor (not shut down here); default: the one ``[run]`` names.
    output_dir : str or Path, optional, keyword-only
        Checkpoint folder and results destination (locked for the run); None
        keeps everything in memory (and makes no plots).
    progress : bool, keyword-only
        Progress per stage on stderr (a bar on a terminal, plain lines otherwise).
    restart : bool, keyword-only
        Discard the checkpoints and per-source plots of an earlier run in ``output_dir``.
    keep_draws : bool, keyword-only
        Keep ``[output] n_keep`` draws per source in ``draws_*`` columns of
        the returned table even if ``[output] keep_draws`` is off.
    return_table : bool, keyword-only
        False (with ``output_dir``): do not hold the results table; the files
        are written alike and the run returns the :class:`~sedtemp.pipeline.report.RunTally`
        of its report, gathered as the results are written. Held in memory
        then: only the columns the catalogue plots, the per-source plots and
        the population stage use, when the workflow makes them.

    Returns
    -------
    Table or RunTally
        The results, one row per source in catalogue order; their tally
        with ``return_table=False``.

    Raises
    ------
    ConfigError
        ``output_dir`` holds checkpoints of other inputs (the message names
        what changed), or another run holds its lock.
    ImportError
        Before any fitting: a needed optional package is missing.
    """
    if not return_table and output_dir is None:
        raise ValueError("run_batch: return_table=False needs an output_dir (the results go to files there)")
    check_optional_packages(wf) if output_dir is not None else EXECUTORS[wf.run["executor"]].check()
    if output_dir is None:
        return _run(mapped, wf, executor, None, progress, False, keep_draws)
    out = Path(output_dir)
    with OutputLock(out) as lock:
        return _run(mapped, wf, executor, out, progress, restart, keep_draws, lock=lock,
                    return_table=return_table)


def _needed_columns(wf: Workflow, names: list[str]) -> list[str]:
    """The results columns the stages after the results files use (of ``names``, in order)."""
    if wf.population.get("enabled"):
        return list(names)  # the population stage reads the draws and what it likes of the rest
    need: set[str] = set()
    if wf.output["plots"]:  # the catalogue plots: every column but the draws
        need.update(c for c in names if not c.startswith(DRAW_PREFIX))
    if wf.output["source_plots"] != "none":  # choosing the sources, and their T_eq band
        need.update(names[:1])
        need.update(("status", CLASS_COLUMN, "flag", FIT_FLAGS_COLUMN, "flags", "T_eq_p16", "T_eq_p84",
                     "T_eq_point", "T_eq"))
    return [c for c in names if c in need]


def _run(mapped, wf, executor, out, progress, restart, keep_draws, lock=None, return_table=True):
    t0 = time.perf_counter()
    tabs: list[Table] = []  # in memory only without an output folder
    state: RunState | None = None
    finished: _Finished | None = None
    done = np.zeros(len(mapped), dtype=bool)
    if out is not None:
        if restart and (out / SOURCES_DIR).exists():  # no figure of the earlier run may be left over
            import shutil

            shutil.rmtree(out / SOURCES_DIR)
        state = RunState(out, wf, mapped, restart=restart)
        finished = _Finished(state.parts_dir, len(mapped))
        state.read_parts(keep=finished.add)
        done = finished.done
    n_resumed = int(done.sum())
    todo = np.flatnonzero(~done)
    n_keep = wf.output["n_keep"] if (keep_draws or wf.output["keep_draws"] or wf.population.get("enabled")) else 0

    def on_done(tab):
        if state is None or finished is None:
            tabs.append(tab)
            return
        state.write_part(tab)
        finished.add(tab)

    try:
        with ExitStack() as stack:
            pool = []

            def get_executor():
                if not pool:
                    pool.append((executor, None) if executor is not None
                                else stack.enter_context(open_executor(wf.run)))
                return pool[0]

            with Progress("fit", len(mapped), n_resumed, progress) as bar:
                _fit_all(get_executor, wf, mapped, todo, on_done, bar, n_keep)
            if out is None or finished is None:
                return _finalise(tabs, wf, mapped) if tabs else _empty(mapped, wf)
            seconds = time.perf_counter() - t0
            tally = None if return_table else RunTally(mapped.ids)
            if finished.items and tally is not None:
                kept = _write_streamed(finished, wf, mapped, out, _needed_columns(wf, list(finished.layout)), tally)
                result = Table() if kept is None else kept
            elif finished.items:
                result = _write_streamed(finished, wf, mapped, out)
            else:
                result = _empty(mapped, wf)
                _write_outputs(result, wf, out)
            population = population_stage(result, wf, out)
            plots = _plots(get_executor, wf, mapped, result, out, progress)
    finally:
        if finished is not None:
            finished.remove()
    events = {"damaged": state.damaged, "removed_temporaries": state.removed_temporaries,
              "stale_lock": None if lock is None or lock.stale is None else lock.stale}
    if tally is None or not tally.n:
        tally = RunTally(mapped.ids)
        tally.add(result)
    write_report(tally, out / f"{wf.output['name']}-report", seconds=seconds, n_resumed=n_resumed,
                 plots=plots, checkpoints=events, population=population)
    return result if return_table else tally


def _empty(mapped, wf):
    tab = empty_results(mapped, wf)
    tab.meta.update(run_metadata(wf, mapped))
    return tab


def _plots(get_executor, wf, mapped, result, out, progress) -> dict:
    t0 = time.perf_counter()
    plots = {}
    if wf.output["plots"] and len(mapped):
        made, failed = catalogue_plots(result, out)
        plots["catalogue"] = {"made": [p.name for p in made], "failed": failed}

    def run_tasks(items, task, on_done):
        ex, n = get_executor()
        _in_flight(ex, _limit(n, len(items)), items, task, on_done)

    plots["sources"] = source_plots(run_tasks, wf, mapped, result, out,
                                    lambda stage, total: Progress(stage, total, 0, progress))
    plots["seconds"] = round(time.perf_counter() - t0, 3)
    return plots
