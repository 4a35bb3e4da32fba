"""Table files: reading catalogues (CSV with a units row, ids kept as text) and writing results.

Every table sedtemp writes goes through :func:`write_table`: atomically
(:mod:`sedtemp._io`), keeping units, descriptions and metadata in every
output format (ECSV and FITS natively, CSV and VOTable with a
``<stem>-meta.json`` beside them).
"""

from __future__ import annotations

import csv
import re
import warnings
from pathlib import Path

import astropy.units as u
from astropy.io import ascii
from astropy.io.registry import IORegistryError
from astropy.table import Table

from .._io import atomic_path
from ..errors import CatalogError
from .config import OUTPUT_FORMATS

__all__ = ["read_catalog", "write_table"]


def _units_row(cells):
    """Units parsed from a CSV row, or None if the row is data (some cell is a number)."""
    units = []
    for c in cells:
        c = c.strip()  # noqa: PLW2901 - the loop value is normalised in place
        if not c:
            units.append(None)
            continue
        try:
            float(c)
            return None
        except ValueError:
            pass
        try:
            units.append(u.Unit(c))
        except ValueError:
            return None
    return units if any(x is not None for x in units) else None


#: A cell with a leading zero before more digits ("001"): an identifier, not a number.
_LEADING_ZERO = re.compile(r"^\s*[+-]?0\d")


def _text_columns(header, data_rows):
    """Columns holding a cell such as ``001``: read as text so ``001`` does not become 1."""
    names = [h.strip() for h in header]
    keep = set()
    for row in csv.reader(data_rows):
        # strict=False: a ragged row is the CSV reader's to report; here only its cells count
        for name, cell in zip(names, row, strict=False):
            if name not in keep and _LEADING_ZERO.match(cell):
                keep.add(name)
    return {name: [ascii.convert_numpy(str)] for name in keep}


def _read_csv_with_units(path: Path) -> Table:
    """CSV whose first row under the header may hold units (no cell a number, all valid units)."""
    lines = [line for line in path.read_text(encoding="utf-8").splitlines() if line.strip()]
    data = [line for line in lines if not line.startswith("#")]
    rows = list(csv.reader(data[:2]))
    units = _units_row(rows[1]) if len(rows) > 1 else None
    body = data[1:] if units is None else data[2:]
    converters = _text_columns(rows[0], body) if rows else {}
    if not body:  # a header alone: an empty catalogue with these columns
        return Table(names=[h.strip() for h in rows[0]] if rows else [], dtype=[float] * len(rows[0] if rows else []))
    tab = Table.read([data[0], *body], format="ascii.csv", converters=converters)
    # strict=False: without a units row there is nothing to pair (units or [] is empty)
    for name, unit in zip(rows[0], units or [], strict=False):
        if unit is not None and name.strip() in tab.colnames:
            tab[name.strip()].unit = unit
    return tab


def read_catalog(path: str | Path, *, format: str | None = None) -> Table:
    """Read a catalogue file with astropy.

    Parameters
    ----------
    path : str or Path
    format : str, optional, keyword-only
        astropy ``Table.read`` format; default from the suffix (``.csv``:
        CSV, whose first row may hold units; otherwise astropy's detection).

    Raises
    ------
    CatalogError
        The file does not exist or astropy cannot read it.
    """
    path = Path(path)
    if not path.exists():
        raise CatalogError(f"catalogue file {str(path)!r} does not exist; check [catalog] path")
    try:
        if format is None and path.suffix.lower() == ".csv":
            return _read_csv_with_units(path)
        if format is None and path.suffix.lower() == ".ecsv":
            format = "ascii.ecsv"
        return Table.read(path, format=format)
    except (OSError, ValueError, TypeError, IORegistryError) as err:
        raise CatalogError(f"cannot read catalogue {path.name!r}: {err}; "
                           "set [catalog] format to an astropy format") from err


def _sidecar(table: Table, path: Path) -> None:
    """Metadata and column descriptions beside a file whose format cannot hold them (CSV, VOTable)."""
    import json

    from .._io import atomic_write_text

    cols = {c: {"unit": None if table[c].unit is None else str(table[c].unit),
                "description": table[c].description} for c in table.colnames}
    atomic_write_text(path.with_name(path.stem + "-meta.json"),
                      json.dumps({"meta": dict(table.meta), "columns": cols}, indent=1, default=str))


def _for_votable(table: Table) -> Table:
    """VOUnit has no dex: log-valued columns are written unit-less, their unit in the description."""
    out = table.copy(copy_data=False)
    for name in out.colnames:
        unit = out[name].unit
        if unit is not None and isinstance(unit, u.FunctionUnitBase):
            out[name].unit = None
            out[name].description = f"{out[name].description or name} [{unit}]"
    out.meta = {k: v for k, v in table.meta.items() if isinstance(v, (str, int, float))}
    return out


def _write_fits(table, tmp):
    """FITS: a QTable keeps units FITS cannot state (dex(solMass)) through astropy's metadata
    block; nested or multi-line metadata is stored as JSON text (header cards hold one line)."""
    import json

    from astropy.table import QTable

    out = QTable(table, copy=False)
    out.meta = {k: (v if isinstance(v, (int, float)) or (isinstance(v, str) and "\n" not in v)
                    else json.dumps(v)) for k, v in table.meta.items()}
    with warnings.catch_warnings():
        # the dex unit is kept in astropy's metadata block (read back with QTable.read); plain
        # FITS readers see the column without a unit, which the warning says and we document
        warnings.filterwarnings("ignore", message=".*could not be saved in native FITS format")
        # long metadata keys become HIERARCH cards, the FITS convention for them
        warnings.filterwarnings("ignore", message="Keyword name .* HIERARCH card will be created")
        out.write(tmp, format="fits", overwrite=True)


def write_table(table: Table, path: str | Path, *, format: str = "ecsv") -> Path:
    """Write ``table`` atomically (temporary file in the same folder, then rename).

    ECSV and FITS keep every unit, description and the metadata; CSV and
    VOTable, which cannot hold all of it, get ``<stem>-meta.json`` beside
    them (VOTable keeps units it can state, UCDs and descriptions itself).

    Parameters
    ----------
    table : Table
    path : str or Path
    format : {"ecsv", "fits", "votable", "csv"}, keyword-only

    Returns
    -------
    Path
        The written file.
    """
    writer, _ = OUTPUT_FORMATS[format]
    path = Path(path)
    with atomic_path(path) as tmp:
        if format == "fits":
            _write_fits(table, tmp)
        elif format == "votable":
            _for_votable(table).write(tmp, format=writer, overwrite=True)
        else:
            table.write(tmp, format=writer, overwrite=True)
    if format in ("csv", "votable") and table.meta:
        _sidecar(table, path)
    return path
