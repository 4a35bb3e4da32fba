"""The results and posterior-draws files of a chunked run, written one chunk at a time.

Finished chunks go to a temporary spill file beside their checkpoint
(:class:`_Finished`); :func:`_write_streamed` then writes the results file
(ECSV/CSV text, VOTable, FITS) and the draws file (HDF5, or FITS without
h5py) from them in row order, equal byte for byte to writing the whole table
at once (HDF5 draws: equal values), so that memory does not grow with the
catalogue. :func:`_write_outputs` is the in-memory route for a table at hand.
"""

from __future__ import annotations

import io
import pickle
from contextlib import ExitStack
from pathlib import Path

import numpy as np
from astropy.table import Table, vstack

from .._io import TMP_PREFIX, atomic_path, atomic_write_with
from .._version import __version__
from .catalog import MappedCatalog, write_table
from .checkpoints import unmasked
from .config import OUTPUT_FORMATS, Workflow
from .report import RunTally
from .schema import (
    DRAW_PREFIX,
    describe,
)
from .tables import _for_votable, _sidecar, _write_fits


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


def _write_streamed(finished: _Finished, wf: Workflow, mapped: MappedCatalog, out: Path, meta: dict,
                    keep: list[str] | None = None, tally: RunTally | None = None) -> Table | None:
    """Write the results file (and the draws file) from the finished chunks, one at a time.

    The files equal those :func:`_write_outputs` writes of
    :func:`sedtemp.pipeline.batch._finalise`'s
    table. Returns that table too (filled chunk by chunk: one copy in memory),
    or with ``keep`` only those of its columns (in its order; none: None).
    ``meta``: the run metadata of every chunk (the results table's header).
    ``tally`` gets every chunk as it is written.
    """
    fmt, name = wf.output["format"], wf.output["name"]
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
