"""Catalogues: reading, validating and mapping columns; writing result tables.

A catalogue is any table astropy reads (FITS, ECSV, VOTable, CSV). The
workflow's ``[catalog]``, ``[bands.*]`` and ``[field]`` sections say which
columns hold the source id, each band's flux, error and limit flag, the
distance or redshift and the radiation-field parameters. :func:`map_catalog`
checks all of it *before* any fitting and raises one
:class:`~sedtemp.errors.CatalogError` listing every problem found (missing
columns, columns without or with the wrong unit, NaN or non-positive errors,
duplicate ids, bad field parameters). Sources with too few usable bands are
not an error: they are marked to be skipped, with the reason, and appear in
the results with that reason.

Units are never guessed: a flux column needs a unit in the table, or
``unit = ...`` in its band table, or an entry in ``[catalog] units``. A CSV
file may carry units as its first row under the header.

``sedtemp run`` uses :func:`stream_catalog` instead: the same checks and
values, :data:`BLOCK_ROWS` rows at a time, so that its memory does not grow
with the catalogue. A FITS table is memory-mapped (:func:`catalog_rows`) and
read a block at a time, the file closed after each; text formats (ECSV, CSV,
VOTable) cannot be, so they are read once and the table as read is held for
the run (about 8 bytes per numeric cell, plus text columns). For every row
the run holds only the ids; each chunk's rows are converted to SI when the
chunk is submitted (:meth:`StreamedCatalog.take`).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING

import astropy.units as u
import numpy as np
from astropy.coordinates import SkyCoord
from astropy.table import MaskedColumn
from numpy.typing import ArrayLike

from .._units import flux_density_si, group_causes, parse_unit
from ..errors import CatalogError, ConfigError, InputError
from ..fields import argument_value, build_field
from .config import Workflow, band_solid_angle, parse_quantity
from .tables import read_catalog, write_table

if TYPE_CHECKING:
    from astropy.table import Table

__all__ = ["BLOCK_ROWS", "CatalogDigest", "MappedCatalog", "StreamedCatalog", "catalog_rows", "map_catalog",
           "read_catalog", "source_key", "stream_catalog", "write_table"]

# the file side (reading catalogues, writing tables) lives in .tables; re-exported here

#: Field parameters that are dimensionless, so a column without a unit is fine.
_DIMENSIONLESS = {"U", "A_V", "dilution", "redshift", "scale"}
#: Problems of one kind listed by source before "... and N more".
_SHOW = 5


def source_key(value: object) -> str:
    """The text form of a source id used for seeds and bookkeeping (stable across runs)."""
    if isinstance(value, bytes):
        value = value.decode()
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        value = int(value)
    return str(value).strip()


def _ids(col, name, probs, rows):
    """Id values; masked, empty or NaN ids are a problem (every source needs its own id).

    ``rows``: the catalogue rows of ``col``'s values, which the message names.
    """
    masked = np.asarray(getattr(col, "mask", np.zeros(len(col), bool)), dtype=bool)
    ids = np.asarray(col.filled("" if col.dtype.kind in "US" else np.nan) if masked.any() else col)
    bad = masked.copy()
    if ids.dtype.kind == "f":
        bad |= ~np.isfinite(ids)
    elif ids.dtype.kind in "US":
        bad |= np.char.strip(ids.astype(str)) == ""
    if bad.any():
        probs.add(f"[catalog] id_column {name!r}: {int(bad.sum())} source(s) without an id (empty, "
                  f"masked or NaN) at row(s) {np.asarray(rows)[bad][:_SHOW].tolist()}; give every source an id")
    return ids


@dataclass
class MappedCatalog:
    """Validated, SI-converted catalogue content, ready for the stages.

    Attributes
    ----------
    ids : ndarray (n,)
        Source ids as in the input table.
    keys : ndarray of str (n,)
        :func:`source_key` of each id.
    rows : ndarray of int (n,)
        Row index in the input table.
    band_names : tuple of str
    flux, err : ndarray (n, n_bands)
        W m^-2 Hz^-1; a missing band has flux 0 and err inf.
    missing, limit_only : ndarray of bool (n, n_bands)
    distance_m : ndarray (n,) or None
        Distance in m (None when the model needs none).
    redshift : ndarray (n,)
    field_params : list of dict
        Per field component: ``kind`` plus arguments, each a scalar
        (Quantity or float) or a per-source array.
    A_V : ndarray (n,)
        Attenuation of the field, mag.
    skip_reason : ndarray of str (n,)
        Empty for sources to fit, else why the source is skipped.
    id_column : str
    kept : dict of str -> Column
        Input columns carried into the results (``[output] keep_columns``).
    """

    ids: np.ndarray
    keys: np.ndarray
    rows: np.ndarray
    band_names: tuple
    flux: np.ndarray
    err: np.ndarray
    missing: np.ndarray
    limit_only: np.ndarray
    distance_m: np.ndarray | None
    redshift: np.ndarray
    field_params: list = field(default_factory=list)
    A_V: np.ndarray | None = None
    skip_reason: np.ndarray | None = None
    id_column: str = "id"
    kept: dict = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.ids)

    def take(self, index: ArrayLike) -> MappedCatalog:
        """A sub-catalogue of the sources at ``index`` (integer array)."""
        index = np.asarray(index, dtype=int)
        n = len(self)

        def sub(x):
            if isinstance(x, np.ndarray) and x.shape[:1] == (n,):
                return x[index]
            if isinstance(x, u.Quantity) and x.shape[:1] == (n,):
                return x[index]
            return x

        params = [{k: sub(v) for k, v in comp.items()} for comp in self.field_params]
        return replace(self, ids=self.ids[index], keys=self.keys[index], rows=self.rows[index],
                       flux=self.flux[index], err=self.err[index], missing=self.missing[index],
                       limit_only=self.limit_only[index],
                       distance_m=None if self.distance_m is None else self.distance_m[index],
                       redshift=self.redshift[index], field_params=params, A_V=self.A_V[index],
                       skip_reason=self.skip_reason[index],
                       kept={k: v[index] for k, v in self.kept.items()})

    def field_arguments(self, i: int) -> list[dict]:
        """Per component, the keyword arguments of source ``i`` (scalars)."""
        n = len(self)
        out = []
        for comp in self.field_params:
            args = {}
            for k, v in comp.items():
                is_array = isinstance(v, np.ndarray) and v.ndim == 1 and v.shape[0] == n
                args[k] = v[i] if is_array else v
            out.append(args)
        return out


class _Problems:
    """Collects validation problems, one line each."""

    def __init__(self, source):
        self.source, self.items = source, []

    def add(self, text):
        self.items.append(text)

    def per_source(self, text, mask, keys):
        idx = np.flatnonzero(mask)
        if idx.size:
            shown = ", ".join(repr(str(k)) for k in keys[idx[:_SHOW]])
            more = f" and {idx.size - _SHOW} more" if idx.size > _SHOW else ""
            self.add(f"{text} for {idx.size} source(s): {shown}{more}")

    def raise_if_any(self):
        if self.items:
            items = group_causes(self.items)  # one line per cause, repeats counted
            lines = "\n  - ".join(items)
            raise CatalogError(f"catalogue {self.source!r} has {len(items)} problem(s):\n  - {lines}")


def _column_values(tab, name, unit_hint, what, probs, catalog_units):
    """Float array of a column (masked -> NaN) and its unit (or None); problems recorded."""
    if name not in tab.colnames:
        probs.add(f"{what}: column {name!r} is not in the catalogue "
                  f"(columns: {', '.join(tab.colnames[:12])}{' ...' if len(tab.colnames) > 12 else ''})")
        return None, None
    col = tab[name]
    try:
        vals = (col.filled(np.nan) if isinstance(col, MaskedColumn) else np.asarray(col)).astype(float)
    except (TypeError, ValueError):
        probs.add(f"{what}: column {name!r} is not numeric (dtype {col.dtype})")
        return None, None
    vals = np.asarray(getattr(vals, "value", vals), dtype=float)
    unit = col.unit
    stated = unit_hint if unit_hint is not None else catalog_units.get(name)
    if stated is not None:
        try:
            stated = parse_unit(stated, name=f"{what}: column {name!r}")
        except InputError as err:
            probs.add(str(err))
            return vals, None
        if unit is not None and unit != stated:
            probs.add(f"{what}: column {name!r} has unit {unit} but the workflow says {stated}; "
                      "remove the unit from the workflow or fix the column")
            return vals, None
        unit = stated
    return vals, unit


def _flux_columns(tab, wf, probs, catalog_units):
    n, names = len(tab), tuple(wf.bands)
    flux, err = np.full((n, len(names)), np.nan), np.full((n, len(names)), np.nan)
    lim = np.zeros((n, len(names)), bool)
    for j, (bname, spec) in enumerate(wf.bands.items()):
        n_before = len(probs.items)
        for key, target in (("flux", flux), ("error", err)):
            what = f"band {bname!r} {key}"
            vals, unit = _column_values(tab, spec[key], spec["unit"], what, probs, catalog_units)
            if vals is None:
                continue
            if unit is None:
                if tab[spec[key]].unit is None and spec["unit"] is None and spec[key] not in catalog_units:
                    probs.add(f"{what}: column {spec[key]!r} has no unit; add unit = \"mJy\" "
                              f"(or Jy) under [bands.{bname}]")
                continue
            try:
                omega = band_solid_angle(spec, "solid_angle")  # sr
                target[:, j] = flux_density_si(vals, unit, solid_angle=None if omega is None else omega * u.sr,
                                               beam=band_solid_angle(spec, "beam"),
                                               name=f"{what}: column {spec[key]!r}")
            except InputError as exc:
                probs.add(f"{exc} (add it under [bands.{bname}])" if "give the" in str(exc) else str(exc))
        if spec["limit"] is not None:
            if spec["limit"] not in tab.colnames:
                probs.add(f"band {bname!r} limit: column {spec['limit']!r} is not in the catalogue")
            else:
                lim[:, j] = _limit_flags(tab[spec["limit"]], spec["limit"], bname, probs)
        if len(probs.items) > n_before:  # already reported: no per-source follow-up messages
            flux[:, j], err[:, j] = np.nan, np.nan
    return flux, err, lim


#: Text accepted in a limit column (any case): the flux is an upper limit / a detection.
_TRUE_TEXT = frozenset({"true", "t", "yes", "y", "1"})
_FALSE_TEXT = frozenset({"false", "f", "no", "n", "0", ""})


def _limit_flags(col, name, band, probs):
    """Boolean upper-limit flags from a limit column: bools, 0/1 numbers, or True/False text.

    Text such as ``"False"`` is read by its meaning, never cast (``bool("False")`` is True).
    """
    vals = col.filled(False) if isinstance(col, MaskedColumn) else np.asarray(col)
    kind = np.asarray(vals).dtype.kind
    if kind == "b":
        return np.asarray(vals, dtype=bool)
    if kind in "iuf":
        num = np.asarray(vals, dtype=float)
        bad = ~np.isin(num, (0.0, 1.0))
        if bad.any():
            probs.add(f"band {band!r} limit: column {name!r} holds {num[bad][0]!r}; use true/false or 1/0")
        return num == 1.0
    text = np.char.lower(np.char.strip(np.asarray(vals, dtype=str)))
    bad = ~np.isin(text, list(_TRUE_TEXT | _FALSE_TEXT))
    if bad.any():
        probs.add(f"band {band!r} limit: column {name!r} holds {str(text[bad][0])!r}; use true/false "
                  "(or yes/no, 1/0)")
    return np.isin(text, list(_TRUE_TEXT))


def _photometry(flux, err, lim, keys, names, probs):
    both_nan = np.isnan(flux) & np.isnan(err)
    for j, b in enumerate(names):
        probs.per_source(f"band {b!r}: flux is NaN but the error is not (give both as NaN "
                         "for an unobserved band)", np.isnan(flux[:, j]) & ~np.isnan(err[:, j]), keys)
        probs.per_source(f"band {b!r}: error is NaN but the flux is not",
                         np.isnan(err[:, j]) & ~np.isnan(flux[:, j]), keys)
        probs.per_source(f"band {b!r}: error is not positive", ~both_nan[:, j] & ~(err[:, j] > 0)
                         & ~np.isnan(err[:, j]), keys)
        probs.per_source(f"band {b!r}: flux or error is infinite", np.isinf(flux[:, j]) | np.isinf(err[:, j]), keys)
    missing = both_nan
    return (np.where(missing, 0.0, flux), np.where(missing, np.inf, err), missing, lim & ~missing)


def _per_source_scalar(tab, wf, key, col_key, default_unit, probs, catalog_units, n):
    """A per-source value from a column or one common value -> SI float array (or None)."""
    cat = wf.catalog
    if cat[col_key] is not None:
        vals, unit = _column_values(tab, cat[col_key], None, f"[catalog] {col_key}", probs, catalog_units)
        if vals is None:
            return None
        if default_unit is None:
            return vals
        if unit is None:
            probs.add(f"[catalog] {col_key}: column {cat[col_key]!r} has no unit; add it to "
                      f"[catalog] units, e.g. units = {{ {cat[col_key]} = \"{default_unit}\" }}")
            return None
        try:
            return (vals * unit).to_value(u.m)
        except u.UnitConversionError:
            probs.add(f"[catalog] {col_key}: column {cat[col_key]!r} has unit {unit}, not a length")
            return None
    if cat[key] is None:
        return None
    if default_unit is None:
        return np.full(n, float(cat[key]))
    try:
        return np.full(n, parse_quantity(cat[key], default_unit, f"[catalog] {key}").to_value(u.m))
    except ConfigError as err:
        probs.add(str(err))
        return None


def _separation(tab, wf, comp, distance_m, probs, catalog_units):
    """Projected separation (Quantity, pc) of each source from a star at ``position``."""
    cat, pos = wf.catalog, comp["position"]
    if cat["ra_column"] is None or cat["dec_column"] is None:
        probs.add("[[field.components]] star position: set [catalog] ra_column and dec_column")
        return None
    if distance_m is None:
        probs.add("[[field.components]] star position: a common distance or distance_column "
                  "is needed to turn angles into separations")
        return None
    if not (isinstance(pos, dict) and set(pos) == {"ra", "dec"}):
        probs.add(f"[[field.components]] star position must be {{ra, dec}} in deg, got {pos!r}")
        return None
    coords = []
    for key in ("ra_column", "dec_column"):
        vals, unit = _column_values(tab, cat[key], None, f"[catalog] {key}", probs, catalog_units)
        if vals is None:
            return None
        coords.append(vals * (unit if unit is not None else u.deg))
    star = SkyCoord(float(pos["ra"]) * u.deg, float(pos["dec"]) * u.deg)
    sep = SkyCoord(coords[0], coords[1]).separation(star)
    return (np.tan(sep.to_value(u.rad)) * distance_m * u.m).to(u.pc)


def _field_components(tab, wf, distance_m, redshift, keys, probs, catalog_units):
    comps = []
    for i, comp in enumerate(wf.field["components"]):
        out = {"kind": comp["kind"]}
        for key, value in comp.items():
            if key in ("kind", "position"):
                continue
            if key.endswith("_column"):
                arg = key[: -len("_column")]
                if arg in comp:
                    probs.add(f"[[field.components]] {i + 1} ({comp['kind']}): give {arg} or {key}, not both")
                    continue
                vals, unit = _column_values(tab, value, None, f"field component {comp['kind']!r} {key}",
                                            probs, catalog_units)
                if vals is None:
                    continue
                probs.per_source(f"field component {comp['kind']!r}: column {value!r} is not finite",
                                 ~np.isfinite(vals), keys)
                probs.per_source(f"field component {comp['kind']!r}: column {value!r} for {arg!r} is "
                                 "negative (a field strength, distance or scale is >= 0)",
                                 np.isfinite(vals) & (vals < 0), keys)
                if unit is None and arg not in _DIMENSIONLESS:
                    probs.add(f"field component {comp['kind']!r}: column {value!r} for {arg!r} has no unit; "
                              f"add it to [catalog] units")
                    continue
                out[arg] = vals if unit is None or unit == u.dimensionless_unscaled else vals * unit
            else:
                out[key] = argument_value(value)
        if "position" in comp:
            sep = _separation(tab, wf, comp, distance_m, probs, catalog_units)
            if sep is not None:
                out["distance"] = sep
        if comp["kind"] == "cmb" and "redshift" not in out:
            out["redshift"] = redshift
        comps.append(out)
    return comps


def _min_bands(wf, n_free):
    m = wf.catalog["min_bands"]
    return n_free if m is None else max(int(m), 1)


def _skip_reasons(missing, lim, names, need):
    usable = ~missing & ~lim
    n_use = usable.sum(axis=1)
    reasons = np.full(missing.shape[0], "", dtype=object)
    for i in np.flatnonzero(n_use < need):  # only the skipped sources
        used = [b for b, ok in zip(names, usable[i], strict=True) if ok]
        reasons[i] = (f"too_few_bands: {n_use[i]} usable band(s) {used}, need {need}")
    return reasons.astype(str)


def _check_field(mapped, probs):
    """Build the field of the first source, so a bad argument shows before fitting."""
    if not mapped.field_params or len(mapped) == 0:
        return
    try:
        build_field(mapped.field_arguments(0), A_V=float(mapped.A_V[0]))
    except Exception as err:  # noqa: BLE001 - any constructor error is reported, with the component
        probs.add(f"[field]: cannot build the radiation field of source {str(mapped.keys[0])!r}: {err}")


def map_catalog(table: Table, workflow: Workflow, *, n_free: int | None = None) -> MappedCatalog:
    """Validate ``table`` against the workflow and convert it for the stages.

    Parameters
    ----------
    table : astropy.table.Table
    workflow : Workflow
    n_free : int, optional, keyword-only
        Free parameters of the model (default: from the workflow's model);
        the default ``min_bands``.

    Returns
    -------
    MappedCatalog

    Raises
    ------
    CatalogError
        Listing every problem found: missing columns, columns without a
        unit or with an inconvertible or contradicting unit, NaN or
        non-positive errors, duplicate or missing ids, non-finite field
        parameters, a field that cannot be built.

    See Also
    --------
    stream_catalog : the same checks and values, a block of rows at a time.
    """
    mapped, probs = _map_rows(table, workflow, n_free, np.arange(len(table)), check_field=True)
    probs.raise_if_any()
    return mapped


def _map_rows(tab, wf, n_free, rows, *, check_field):
    """Map the rows ``rows`` (their positions in the catalogue) held by ``tab``: (mapped, problems)."""
    probs = _Problems(wf.catalog["path"])
    cat_units = dict(wf.catalog["units"])
    n, names = len(tab), tuple(wf.bands)
    idc = wf.catalog["id_column"]
    if idc not in tab.colnames:
        probs.add(f"[catalog] id_column: column {idc!r} is not in the catalogue")
        ids = np.arange(n)
    else:
        ids = _ids(tab[idc], idc, probs, rows)
    keys = np.array([source_key(v) for v in ids], dtype=str) if n else np.zeros(0, str)
    uniq, counts = np.unique(keys, return_counts=True)
    dup = uniq[counts > 1]
    if dup.size:
        shown = ", ".join(repr(str(d)) for d in dup[:_SHOW])
        probs.add(f"[catalog] id_column {idc!r}: {dup.size} duplicate id(s): {shown}"
                  f"{' ...' if dup.size > _SHOW else ''}; ids must be unique")
    flux, err, lim = _flux_columns(tab, wf, probs, cat_units)
    flux, err, missing, lim = _photometry(flux, err, lim, keys, names, probs)
    distance = _per_source_scalar(tab, wf, "distance", "distance_column", "pc", probs, cat_units, n)
    if distance is not None:
        probs.per_source("distance is not a positive finite number", ~(np.isfinite(distance) & (distance > 0)), keys)
    redshift = _per_source_scalar(tab, wf, "redshift", "redshift_column", None, probs, cat_units, n)
    redshift = np.zeros(n) if redshift is None else redshift
    probs.per_source("redshift is not a finite number >= 0", ~(np.isfinite(redshift) & (redshift >= 0)), keys)
    if wf.model["amplitude"] == "mass" and wf.model["name"] == "thin" and distance is None and not np.all(redshift > 0):
        probs.add("[catalog]: the model's amplitude is a mass, which needs a distance; set "
                  "[catalog] distance = \"... pc\" or distance_column")
    av = np.full(n, float(wf.field["A_V"]))
    if wf.field["A_V_column"] is not None:
        vals, _ = _column_values(tab, wf.field["A_V_column"], None, "[field] A_V_column", probs, cat_units)
        av = vals if vals is not None else av
    probs.per_source("A_V is not a finite number >= 0", ~(np.isfinite(av) & (av >= 0)), keys)
    comps = _field_components(tab, wf, distance, redshift, keys, probs, cat_units)
    if n_free is None:
        n_free = _n_free(wf)
    mapped = MappedCatalog(ids=ids, keys=keys, rows=np.asarray(rows, dtype=int), band_names=names, flux=flux,
                           err=err, missing=missing, limit_only=lim, distance_m=distance, redshift=redshift,
                           field_params=comps, A_V=av,
                           skip_reason=_skip_reasons(missing, lim, names, _min_bands(wf, n_free)),
                           id_column=idc, kept=_kept_columns(tab, wf, probs))
    if check_field and not probs.items:
        _check_field(mapped, probs)
    return mapped, probs


def _kept_columns(tab, wf, probs) -> dict:
    """The input columns ``[output] keep_columns`` names (metadata kept; masked -> filled)."""
    out = {}
    for name in wf.output["keep_columns"]:
        if name not in tab.colnames:
            probs.add(f"[output] keep_columns: column {name!r} is not in the catalogue")
            continue
        col = tab[name]
        out[name] = col.filled() if isinstance(col, MaskedColumn) else col.copy()
    return out


def _n_free(wf) -> int:
    model = wf.build_model(distance=1.0 * u.pc, redshift=0.0) if wf.model["amplitude"] == "mass" \
        else wf.build_model(redshift=0.0)
    return len(model.param_names)


# ------------------------------------------------------------------ streamed catalogues
#: Rows read, checked and converted at a time by :class:`StreamedCatalog` (and hashed at a time by
#: :class:`CatalogDigest`): a few MB of a typical catalogue. The digest of a catalogue depends on
#: it, so changing it makes earlier checkpoints look like those of another catalogue.
BLOCK_ROWS = 16384


class CatalogDigest:
    """SHA-256 of every catalogue value a run uses, added a block of mapped rows at a time.

    The same catalogue gives the same digest whether its blocks come from a
    :class:`MappedCatalog` (:meth:`of`) or from a :class:`StreamedCatalog`
    (blocks of :data:`BLOCK_ROWS` rows, in row order). Text is hashed as
    text, so a block's string width does not matter.
    """

    def __init__(self) -> None:
        self._h = hashlib.sha256()

    def _array(self, arr) -> None:
        a = np.asarray(getattr(arr, "value", arr))
        if a.dtype.kind in "OUS":
            self._h.update(b"text" + str(a.shape).encode())
            self._h.update("\0".join(a.astype(str).ravel().tolist()).encode("utf-8", "surrogatepass") + b"\1")
            return
        self._h.update(str(a.dtype).encode() + str(a.shape).encode())
        self._h.update(np.ascontiguousarray(a).tobytes())

    def add(self, block: MappedCatalog) -> None:
        """Hash the next block of rows (catalogue order)."""
        for arr in (block.keys, block.rows, block.flux, block.err, block.missing, block.limit_only,
                    block.redshift, block.A_V, block.skip_reason):
            self._array(arr)
        if block.distance_m is not None:
            self._array(block.distance_m)
        for comp in block.field_params:  # per-source field columns and star separations (ra/dec)
            for k in sorted(comp):
                self._h.update(k.encode())
                v = comp[k]
                self._array(v) if hasattr(v, "shape") else self._h.update(repr(v).encode())
        for name in sorted(block.kept):
            self._h.update(name.encode())
            self._array(block.kept[name])

    def hexdigest(self) -> str:
        return self._h.hexdigest()

    @classmethod
    def of(cls, mapped: MappedCatalog | StreamedCatalog) -> str:
        """The digest of a whole catalogue."""
        if isinstance(mapped, StreamedCatalog):
            return mapped.digest
        d = cls()
        for start in range(0, len(mapped), BLOCK_ROWS):
            d.add(mapped.take(np.arange(start, min(start + BLOCK_ROWS, len(mapped)))))
        return d.hexdigest()


class _TableRows:
    """Rows of a catalogue held in memory (a text format, or a table given as such)."""

    def __init__(self, table: Table):
        self.table = table

    def __len__(self) -> int:
        return len(self.table)

    def read(self, start: int, stop: int) -> Table:
        return self.table[start:stop]

    def whole(self) -> Table:
        return self.table


#: File name endings of FITS catalogues read a block of rows at a time (compressed ones are not).
_FITS_SUFFIXES = (".fits", ".fit", ".fts")


class _FitsRows:
    """Rows of a FITS binary table, read through a memory map a block at a time.

    Each block is read with astropy's own FITS table reader (same masks, text
    stripping, units and metadata as ``Table.read`` of the file) and copied;
    the file is closed after each block, so the pages read do not stay mapped.
    """

    def __init__(self, path: Path, hdu: int, n_rows: int):
        self.path, self.hdu, self.n = path, hdu, n_rows

    @classmethod
    def open(cls, path: Path) -> _FitsRows | None:
        """The reader of a file with exactly one table HDU; None if it is not one (read it whole)."""
        from astropy.io import fits

        try:
            with fits.open(path, memmap=True, character_as_bytes=True) as hdul:
                tables = [i for i, h in enumerate(hdul) if isinstance(h, (fits.BinTableHDU, fits.TableHDU))]
                if len(tables) != 1 or any(isinstance(h, fits.GroupsHDU) for h in hdul):
                    return None
                return cls(path, tables[0], int(hdul[tables[0]].header["NAXIS2"]))
        except Exception:  # noqa: BLE001 - any problem: the whole-file reader says what is wrong
            return None

    def __len__(self) -> int:
        return self.n

    def read(self, start: int, stop: int) -> Table:
        from astropy.io import fits
        from astropy.io.fits.connect import read_table_fits

        with fits.open(self.path, memmap=True, character_as_bytes=True) as hdul:
            hdu = hdul[self.hdu]
            data = hdu.data[start:stop]
            # text as bytes, as Table.read gives it (a slice of the table forgets it and decodes to str)
            data._character_as_bytes = True
            part = type(hdu)(data=data, header=hdu.header)
            return read_table_fits(part).copy(copy_data=True)  # detached from the map closed here

    def whole(self) -> Table:
        return read_catalog(self.path, format="fits")


def catalog_rows(path: str | Path, *, format: str | None = None) -> _TableRows | _FitsRows:
    """The rows of a catalogue file: FITS tables memory-mapped, other formats read once.

    Raises
    ------
    CatalogError
        As :func:`read_catalog`: the file does not exist or cannot be read.
    """
    path = Path(path)
    if format in (None, "fits") and path.suffix.lower() in _FITS_SUFFIXES and path.is_file():
        rows = _FitsRows.open(path)
        if rows is not None:
            return rows
    return _TableRows(read_catalog(path, format=format))


class StreamedCatalog:
    """A catalogue checked and converted a block of rows at a time, for the batch run.

    What :func:`map_catalog` does for the whole table at once, done for
    :data:`BLOCK_ROWS` rows at a time: the checks (a problem anywhere makes
    the whole table be mapped by :func:`map_catalog`, which raises the same
    :class:`~sedtemp.errors.CatalogError`), then :meth:`take` converts the
    rows a chunk needs when the chunk is sent to a worker. Held for every
    row: the ids only (the results' id column and the report's names).

    Attributes
    ----------
    ids : ndarray (n,)
        Source ids as in the input table.
    keys : sequence of str (n,)
        :func:`source_key` of each id, computed when asked for.
    band_names : tuple of str
    id_column : str
    digest : str
        :class:`CatalogDigest` of the catalogue.
    """

    def __init__(self, source: _TableRows | _FitsRows, workflow: Workflow, *, n_free: int | None = None):
        self._source, self._wf = source, workflow
        self._n_free = _n_free(workflow) if n_free is None else n_free
        self.band_names = tuple(workflow.bands)
        self.id_column = workflow.catalog["id_column"]
        self._window: MappedCatalog | None = None
        self.ids, self.digest = self._check_all()
        self.keys = _Keys(self.ids)

    def __len__(self) -> int:
        return len(self.ids)

    def _check_all(self):
        """Every block checked and hashed; on a problem, the whole table mapped (which raises)."""
        n, ids, digest = len(self._source), [], CatalogDigest()
        hashes = np.empty(n, dtype=np.int64)  # duplicate ids across blocks, 8 bytes a row
        bad = n == 0
        for start in range(0, n, BLOCK_ROWS):
            stop = min(start + BLOCK_ROWS, n)
            block, probs = _map_rows(self._source.read(start, stop), self._wf, self._n_free,
                                     np.arange(start, stop), check_field=start == 0)
            if probs.items:
                bad = True
                break
            digest.add(block)
            ids.append(block.ids)
            hashes[start:stop] = [hash(str(k)) for k in block.keys]
            if stop == n:
                self._window = block
        if not bad:
            hashes.sort()
            bad = bool(np.any(hashes[1:] == hashes[:-1]))  # (or two keys of one hash: checked in full)
        del hashes
        if bad:
            mapped = map_catalog(self._source.whole(), self._wf, n_free=self._n_free)  # raises if really bad
            return mapped.ids, CatalogDigest.of(mapped)
        return (np.concatenate(ids) if len(ids) > 1 else ids[0]), digest.hexdigest()

    def take(self, index: ArrayLike) -> MappedCatalog:
        """The mapped sources at ``index`` (integer array), as ``map_catalog(table).take(index)``."""
        index = np.asarray(index, dtype=int)
        n = len(self)
        if index.size and (index.min() < 0 or index.max() >= n):
            raise IndexError(f"source index out of range [0, {n})")
        lo, hi = (int(index.min()), int(index.max()) + 1) if index.size else (0, 1)
        w = self._window
        if w is None or lo < w.rows[0] or hi > w.rows[0] + len(w):
            if hi - lo > BLOCK_ROWS:  # sources far apart: only their rows
                rows = np.unique(index)
                return self._mapped(self._rows_table(rows), rows).take(np.searchsorted(rows, index))
            stop = min(lo + BLOCK_ROWS, n)
            w = self._window = self._mapped(self._source.read(lo, stop), np.arange(lo, stop))
        return w.take(index - w.rows[0])

    def _mapped(self, tab, rows):
        mapped, probs = _map_rows(tab, self._wf, self._n_free, rows, check_field=False)
        probs.raise_if_any()  # checked before: only a catalogue changed since shows problems here
        return mapped

    def _rows_table(self, index):
        """The rows ``index`` (sorted, unique) of the catalogue, read block by block."""
        from astropy.table import vstack

        lo, hi = int(index[0]), int(index[-1]) + 1
        if hi - lo == index.size:  # consecutive (a chunk larger than a block): one read
            return self._source.read(lo, hi)
        parts = []
        for start in np.unique(index // BLOCK_ROWS) * BLOCK_ROWS:
            sel = index[(index >= start) & (index < start + BLOCK_ROWS)]
            parts.append(self._source.read(int(start), int(min(start + BLOCK_ROWS, len(self))))[sel - start])
        if len(parts) == 1:
            return parts[0]
        out = vstack(parts, metadata_conflicts="silent")
        for name in out.colnames:  # vstack forgets the fill value (FITS: TNULL, NaN, ""), the file's
            fills = [p[name].fill_value for p in parts if isinstance(p[name], MaskedColumn)]
            if fills and isinstance(out[name], MaskedColumn):
                out[name].fill_value = fills[0]
        return out


class _Keys:
    """:func:`source_key` of each id, computed when one is asked for (nothing held)."""

    def __init__(self, ids: np.ndarray):
        self._ids = ids

    def __len__(self) -> int:
        return len(self._ids)

    def __getitem__(self, i):
        if isinstance(i, (int, np.integer)):
            return source_key(self._ids[i])
        vals = self._ids[i]
        return np.array([source_key(v) for v in vals], dtype=str) if len(vals) else np.zeros(0, str)


def stream_catalog(rows: Table | _TableRows | _FitsRows, workflow: Workflow, *,
                   n_free: int | None = None) -> StreamedCatalog | MappedCatalog:
    """Validate a catalogue a block of rows at a time; convert each chunk's rows when asked.

    Parameters
    ----------
    rows : Table, or the rows of a file (:func:`catalog_rows`)
        A FITS file is memory-mapped and read a block at a time; the rows of a
        text format (ECSV, CSV, VOTable) cannot be, so they are read once and
        that table is held for the run (about 8 bytes per numeric cell).
    workflow : Workflow
    n_free : int, optional, keyword-only
        As :func:`map_catalog`.

    Returns
    -------
    StreamedCatalog or MappedCatalog
        Its ``take(index)`` equals ``map_catalog(table, workflow).take(index)``;
        an empty catalogue gives the (empty) MappedCatalog.

    Raises
    ------
    CatalogError
        The very error :func:`map_catalog` raises for the whole table.
    """
    source = _TableRows(rows) if not isinstance(rows, (_TableRows, _FitsRows)) else rows
    if not len(source):  # nothing to stream: the empty mapped catalogue (its results have every column)
        return map_catalog(source.whole(), workflow, n_free=n_free)
    return StreamedCatalog(source, workflow, n_free=n_free)
