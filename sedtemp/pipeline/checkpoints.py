"""Checkpoints of a run: the output-folder lock, the input digests, part files and resume.

Layout of an output folder::

    <out>/.sedtemp.lock          held (flock) by the running process; pid, host, start time
    <out>/run-state.json         digests of the inputs (written when a session starts)
    <out>/parts/part-<row>-<sha>.ecsv   one per finished chunk, written atomically
    <out>/parts/checksums.txt    "<part name> <sha256>" appended per finished chunk

Resume refuses, naming what changed, when anything that changes results
differs from the run that wrote the parts: the workflow content except
:data:`~sedtemp.pipeline.config.NON_RESULT_KEYS`, every catalogue column the
run uses (ids, fluxes, errors, limits, distances, redshifts, A_V, field
columns, sky positions through the star separations, kept columns), and the
files the workflow points to (band responses, field and opacity tables).

A part whose bytes do not match the checksum in its name and in the run
state, or that cannot be read, is reported by name, removed and refitted;
so is a part holding sources that another part already holds. A lock left by
a process that died is detected (the flock is free) and reported.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import socket
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
from astropy.table import Table

from .._io import atomic_write_text, remove_stale_temporaries
from .._version import __version__
from ..errors import ConfigError
from .catalog import CatalogDigest, MappedCatalog, StreamedCatalog, write_table
from .config import Workflow

__all__ = [
    "LOCK_FILE",
    "PARTS_DIR",
    "STATE_FILE",
    "OutputLock",
    "RunState",
    "input_digests",
    "referenced_files",
    "unmasked",
]

log = logging.getLogger(__name__)

PARTS_DIR = "parts"
STATE_FILE = "run-state.json"
LOCK_FILE = ".sedtemp.lock"
_PART_GLOB = "part-*.ecsv"
#: Journal of part checksums: one line appended per part (a state file rewritten per part
#: would make a million-source run quadratic in its number of chunks).
JOURNAL = "checksums.txt"


class OutputLock:
    """Exclusive lock on an output folder for the whole run (``fcntl.flock``, POSIX).

    The lock dies with its process, so a lock file whose lock is free was
    left by a run that ended without cleaning up: it is reported
    (``stale``: its pid and start time) and taken over.

    Raises
    ------
    ConfigError
        (on enter) Another process holds the lock; the message gives its pid.
    """

    def __init__(self, folder: Path):
        self.path = Path(folder) / LOCK_FILE
        self.stale: dict | None = None
        self._fd = None

    def __enter__(self):
        import fcntl

        self.path.parent.mkdir(parents=True, exist_ok=True)
        fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = _read_holder(fd)
            os.close(fd)
            raise ConfigError(f"output folder {str(self.path.parent)!r} is in use by another sedtemp run "
                              f"(pid {holder.get('pid', '?')} on {holder.get('host', '?')}, started "
                              f"{holder.get('started', '?')}); wait for it, or use another [output] directory") from None
        old = _read_holder(fd)
        if old:
            self.stale = old
            log.warning("output folder %s: stale lock of pid %s (started %s) found and taken over",
                        self.path.parent, old.get("pid"), old.get("started"))
        os.ftruncate(fd, 0)
        os.write(fd, json.dumps({"pid": os.getpid(), "host": socket.gethostname(),
                                 "started": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())}).encode())
        self._fd = fd
        return self

    def __exit__(self, *exc):
        if self._fd is not None:
            os.ftruncate(self._fd, 0)  # an empty lock file means "ended cleanly"
            os.close(self._fd)
            self._fd = None
        return False


def _read_holder(fd) -> dict:
    os.lseek(fd, 0, os.SEEK_SET)
    raw = os.read(fd, 4096)
    try:
        return json.loads(raw) if raw.strip() else {}
    except ValueError:
        return {"pid": "?"}


def _sha256_bytes(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def referenced_files(wf: Workflow) -> list[Path]:
    """Files the workflow points to besides the catalogue: band responses, field and opacity tables."""
    out = []
    for spec in wf.bands.values():
        if spec["response"] is not None:
            out.append(wf.path(spec["response"]))
    for v in [*(x for comp in wf.field["components"] for x in comp.values()),
              *(wf.model["opacity"] or {}).values()]:
        if isinstance(v, str) and wf.path(v).is_file():
            out.append(wf.path(v))
    return sorted(set(out))


def input_digests(wf: Workflow, mapped: MappedCatalog | StreamedCatalog) -> dict:
    """Digests of everything that changes results (see the module notes).

    The catalogue's (:class:`~sedtemp.pipeline.catalog.CatalogDigest`) is taken of its values
    after mapping, a block of rows at a time: the same for a table and for its streamed file.
    """
    files = {str(p): _sha256_bytes(p.read_bytes()) for p in referenced_files(wf)}
    return {"workflow": wf.results_digest(), "workflow_content": json.loads(json.dumps(wf.results_content(),
                                                                                      default=str)),
            "catalog": CatalogDigest.of(mapped), "files": files, "n_sources": len(mapped)}


def _changed_keys(old: dict, new: dict) -> list[str]:
    out = []
    for sec in sorted(set(old) | set(new)):
        a, b = old.get(sec, {}), new.get(sec, {})
        if not isinstance(a, dict) or not isinstance(b, dict):
            if a != b:
                out.append(f"[{sec}]")
            continue
        out += [f"[{sec}] {k}" for k in sorted(set(a) | set(b)) if a.get(k) != b.get(k)]
    return out


def unmasked(tab: Table) -> Table:
    """Masked cells (absent in a chunk) -> NaN, "none" or False."""
    out = Table(masked=False, meta=tab.meta)
    for name in tab.colnames:
        col = tab[name]
        if getattr(col, "mask", None) is not None and np.any(col.mask):
            kind = col.dtype.kind
            col = col.filled("none" if kind in "US" else (False if kind == "b" else
                                                         (0 if kind in "iu" else np.nan)))
        out[name] = col
    return out


class RunState:
    """The run state of an output folder: input digests and the parts with their checksums."""

    def __init__(self, out: Path, wf: Workflow, mapped: MappedCatalog | StreamedCatalog, *,
                 restart: bool = False):
        self.out = Path(out)
        self.parts_dir = self.out / PARTS_DIR
        self.file = self.out / STATE_FILE
        self.digests = input_digests(wf, mapped)
        self.n_sources = len(mapped)
        self.parts: dict[str, str] = {}
        self.damaged: list[str] = []
        self.removed_temporaries: list[str] = []
        if restart and self.parts_dir.exists():
            for p in [*self.parts_dir.glob(_PART_GLOB), self.parts_dir / JOURNAL]:
                p.unlink(missing_ok=True)
        self._check_previous(restart)
        self.parts_dir.mkdir(parents=True, exist_ok=True)
        self.removed_temporaries = [p.name for p in remove_stale_temporaries(self.parts_dir)
                                    + remove_stale_temporaries(self.out)]
        self._save()

    def _check_previous(self, restart):
        if restart or not self.file.exists() or not any(self.parts_dir.glob(_PART_GLOB)):
            return
        try:
            old = json.loads(self.file.read_text(encoding="utf-8"))
        except ValueError:
            raise ConfigError(f"{self.file} is damaged (not JSON), so the checkpoints in {self.parts_dir} "
                              "cannot be trusted; start afresh with `sedtemp run --restart`") from None
        what = []
        if old.get("workflow") != self.digests["workflow"]:
            keys = _changed_keys(old.get("workflow_content", {}), self.digests["workflow_content"])
            what.append("workflow (" + (", ".join(keys[:6]) or "content") + ")")
        if old.get("catalog") != self.digests["catalog"]:
            what.append("catalogue values (columns used by the run)")
        for path in sorted(set(old.get("files", {})) | set(self.digests["files"])):
            if old.get("files", {}).get(path) != self.digests["files"].get(path):
                what.append(f"file {path}")
        if what:
            raise ConfigError(f"output folder {str(self.out)!r} holds checkpoints of a run with other inputs; "
                              f"changed: {'; '.join(what)}. Use another [output] directory, or start afresh "
                              "with `sedtemp run --restart`")
        self.parts = self._journal()

    def _journal(self) -> dict:
        out = {}
        path = self.parts_dir / JOURNAL
        if path.exists():
            for line in path.read_text(encoding="utf-8", errors="replace").splitlines():
                name, _, sha = line.partition(" ")
                if len(sha) == 64:  # a line torn by a kill is ignored
                    out[name] = sha
        return out

    def _save(self):
        state = dict(self.digests, sedtemp_version=__version__)
        atomic_write_text(self.file, json.dumps(state, indent=1))
        lines = "".join(f"{k} {v}\n" for k, v in sorted(self.parts.items()))
        atomic_write_text(self.parts_dir / JOURNAL, lines)

    def read_parts(self, keep: Callable[[Table], None] | None = None) -> list[Table]:
        """The valid parts; damaged or duplicate ones are reported (``damaged``), removed, refitted.

        ``keep``: called with each valid part (in file-name order, i.e. by first
        row) instead of collecting them, so that no more than one is in memory;
        the list returned is then empty.
        """
        tabs: list[Table] = []
        seen = np.zeros(self.n_sources, dtype=bool)  # rows some valid part holds
        for path in sorted(self.parts_dir.glob(_PART_GLOB)):
            tab, why = self._read_one(path, seen)
            if tab is None:
                log.warning("checkpoint %s is damaged (%s): removed, its sources are fitted again", path.name, why)
                self.damaged.append(f"{path.name}: {why}")
                path.unlink(missing_ok=True)
                self.parts.pop(path.name, None)
                continue
            seen[np.asarray(tab["_row"], dtype=int)] = True
            if keep is None:
                tabs.append(tab)
            else:
                keep(tab)
        self._save()
        return tabs

    def _read_one(self, path, seen):
        data = path.read_bytes()
        sha = _sha256_bytes(data)
        named = path.stem.rsplit("-", 1)[-1]
        if not sha.startswith(named) or self.parts.get(path.name, sha) != sha:
            return None, "checksum mismatch (truncated or altered)"
        try:
            tab = unmasked(Table.read(path, format="ascii.ecsv"))
        except Exception as err:  # noqa: BLE001 - any read failure means the part is unusable
            return None, f"unreadable: {type(err).__name__}"
        rows = np.asarray(tab["_row"], dtype=int)
        if rows.size and (rows.min() < 0 or rows.max() >= seen.size):
            return None, f"holds rows beyond the catalogue's {seen.size} sources"
        if np.any(seen[rows]):
            return None, "holds sources another checkpoint already has"
        self.parts[path.name] = sha
        return tab, ""

    def write_part(self, tab: Table) -> str:
        """Write one finished chunk atomically and record its checksum; the file name."""
        tmp_name = f"part-{int(tab['_row'][0]):09d}.tmp.ecsv"
        staging = self.parts_dir / (".tmp-staging-" + tmp_name)
        write_table(tab, staging, format="ecsv")
        sha = _sha256_bytes(staging.read_bytes())
        name = f"part-{int(tab['_row'][0]):09d}-{sha[:16]}.ecsv"
        os.replace(staging, self.parts_dir / name)
        self.parts[name] = sha
        with open(self.parts_dir / JOURNAL, "a", encoding="utf-8") as fh:
            fh.write(f"{name} {sha}\n")
            fh.flush()
            os.fsync(fh.fileno())
        return name
