"""A first workflow: the commented template, optionally pre-filled from a catalogue.

:func:`workflow_text` returns the bundled template (``sedtemp/data/template.toml``,
read through :mod:`importlib.resources`, so it ships in the wheel). Given a
catalogue it also guesses the id column, the sky-position columns and one
``[bands.NAME]`` table per flux/error column pair, and says what it guessed
and what it could not (:class:`Guess`). Nothing is guessed silently: every
guess is listed, and a column without a unit is left for the user to state.

Recognised pairings (case-insensitive), for a flux column ``F``:
``E250`` beside ``F250`` or ``S250``; ``dS250`` or ``eF250`` beside ``S250``
or ``F250``; ``F_err``, ``F_error``, ``Ferr``, ``F_e``, ``F_unc``,
``F_sigma``; ``e_F``, ``err_F``, ``sigma_F``. A boolean column ``L250``,
``F_limit``, ``F_lim`` or ``F_ul`` is the band's upper-limit flag. The centre
wavelength of a band is the number in its flux column's name, in um (a guess,
written as a 30 % wide top-hat: replace it by the response curve if you have it).
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import TYPE_CHECKING

import astropy.units as u

if TYPE_CHECKING:
    from astropy.table import Table

__all__ = ["BandGuess", "Guess", "guess_columns", "template_text", "workflow_text"]

_ID_NAMES = ("source_id", "id", "name", "src", "source", "srcid", "object", "objname")
_RA_NAMES = ("ra", "ra_deg", "raj2000", "ra_j2000", "ra_icrs")
_DEC_NAMES = ("dec", "dec_deg", "dej2000", "decj2000", "dec_j2000", "de_icrs", "dec_icrs")
_ERR_SUFFIXES = ("_err", "_error", "err", "_e", "_unc", "_sigma", "_sig")
_ERR_PREFIXES = ("e_", "err_", "sigma_", "unc_")
_LIMIT_SUFFIXES = ("_limit", "_lim", "_ul", "_upper")
_FLUX_TYPE = u.Jy.physical_type
_STAR_BLOCK = re.compile(r"^\[\[field\.components\]\][^\n]*heating star.*?(?=^\n|^\[)", re.S | re.M)
_BAND_BLOCK = re.compile(r"^# One table per band.*?(?=^\[calibration\])", re.DOTALL | re.MULTILINE)


def template_text() -> str:
    """The commented workflow template shipped with sedtemp (every key, its default and meaning)."""
    return (resources.files("sedtemp") / "data" / "template.toml").read_text(encoding="utf-8")


@dataclass
class BandGuess:
    """One band guessed from a flux/error column pair."""

    name: str
    flux: str
    error: str
    unit: str | None
    wavelength_um: float | None
    limit: str | None = None


@dataclass
class Guess:
    """What :func:`guess_columns` found in a catalogue."""

    id_column: str | None
    ra_column: str | None
    dec_column: str | None
    bands: list = field(default_factory=list)
    notes: list = field(default_factory=list)      # what was guessed
    problems: list = field(default_factory=list)   # what could not be guessed


def _lower_map(names):
    return {n.lower(): n for n in names}


def _error_candidates(flux):
    f = flux.lower()
    out = [f + s for s in _ERR_SUFFIXES] + [p + f for p in _ERR_PREFIXES] + ["e" + f, "d" + f]
    if f[:1] in ("f", "s"):
        out += ["e" + f[1:], "de" + f[1:], "d" + f[1:]]
    return out


def _is_numeric(col):
    return col.dtype.kind in "fiu"


def _wavelength(name):
    m = re.search(r"(\d+(?:\.\d+)?)", name)
    return float(m.group(1)) if m else None


def _unit_text(col):
    return None if col.unit is None else col.unit.to_string()


def _pick(names, wanted):
    low = _lower_map(names)
    return next((low[w] for w in wanted if w in low), None)


def _id_column(tab):
    found = _pick(tab.colnames, _ID_NAMES)
    if found is not None:
        return found
    return next((c for c in tab.colnames if tab[c].dtype.kind in "USO"), None)


def _limit_column(tab, flux, low):
    cands = [flux.lower() + s for s in _LIMIT_SUFFIXES]
    num = re.search(r"\d+(?:\.\d+)?", flux)
    if num:
        cands += ["l" + num.group(0), "lim" + num.group(0), "ul" + num.group(0)]
    for c in cands:
        if c in low and tab[low[c]].dtype.kind == "b":
            return low[c]
    return None


def _band_name(flux, used):
    w = _wavelength(flux)
    base = f"b{w:g}".replace(".", "p") if w is not None else re.sub(r"\W", "_", flux.lower())
    name, k = base, 2
    while name in used:
        name, k = f"{base}_{k}", k + 1
    return name


def guess_columns(tab: Table) -> Guess:
    """Guess the id, position and band columns of a catalogue table.

    Parameters
    ----------
    tab : astropy.table.Table

    Returns
    -------
    Guess
        With ``notes`` (each guess in words) and ``problems`` (what the user
        must still fill in: a missing unit, a wavelength not in a column name,
        a numeric column left unpaired).
    """
    g = Guess(_id_column(tab), _pick(tab.colnames, _RA_NAMES), _pick(tab.colnames, _DEC_NAMES))
    low = _lower_map(tab.colnames)
    taken = {c for c in (g.id_column, g.ra_column, g.dec_column) if c}
    for c in tab.colnames:
        if c in taken or not _is_numeric(tab[c]):
            continue
        err = next((low[e] for e in _error_candidates(c) if e in low and low[e] not in taken
                    and low[e] != c and _is_numeric(tab[low[e]])), None)
        if err is None:
            continue
        fu, eu = tab[c].unit, tab[err].unit
        if fu is not None and fu.physical_type != _FLUX_TYPE and not _surface_or_beam(fu):
            continue  # a pair of non-flux columns (e.g. a distance and its error)
        b = BandGuess(_band_name(c, {x.name for x in g.bands}), c, err, _unit_text(tab[c]), _wavelength(c),
                      _limit_column(tab, c, low))
        taken |= {c, err} | ({b.limit} if b.limit else set())
        g.bands.append(b)
        _band_notes(g, b, fu, eu)
    _id_notes(g, tab)
    rest = [c for c in tab.colnames if c not in taken and _is_numeric(tab[c])]
    if rest:
        g.notes.append(f"numeric columns not used: {', '.join(rest)} (e.g. distance_column, A_V_column, "
                       "or a field argument X_column; see the comments in the file)")
    if not g.bands:
        g.problems.append("no flux/error column pair recognised; write the [bands.NAME] tables by hand "
                          "(flux = \"...\", error = \"...\")")
    return g


def _surface_or_beam(unit):
    return unit.is_equivalent(u.Jy / u.sr) or unit.is_equivalent(u.Jy / u.beam)


def _band_notes(g, b, fu, eu):
    lam = f"{b.wavelength_um:g} um (from the column name)" if b.wavelength_um else "unknown"
    lim = f", upper-limit flag {b.limit!r}" if b.limit else ""
    g.notes.append(f"band {b.name}: flux {b.flux!r}, error {b.error!r}, unit {b.unit or 'none'}, "
                   f"centre {lam}{lim}")
    if fu is None or eu is None:
        g.problems.append(f"band {b.name}: column {b.flux if fu is None else b.error!r} has no unit; "
                          f"set unit = \"mJy\" (or Jy) under [bands.{b.name}]")
    elif fu != eu:
        g.problems.append(f"band {b.name}: flux unit {fu} and error unit {eu} differ; check the catalogue")
    elif _surface_or_beam(fu):
        g.problems.append(f"band {b.name}: unit {fu} is a surface brightness or per-beam unit, which the "
                          "catalogue reader needs as a flux density (Jy, mJy); convert the columns")
    if b.wavelength_um is None:
        g.problems.append(f"band {b.name}: no wavelength in the column name {b.flux!r}; give "
                          f"wavelength, tophat or response under [bands.{b.name}]")


def _id_notes(g, tab):  # noqa: ARG001 - kept for a uniform call signature
    if g.id_column is None:
        g.problems.append("no id column found; set [catalog] id_column")
    else:
        g.notes.append(f"id column: {g.id_column!r}")
    if g.ra_column and g.dec_column:
        g.notes.append(f"sky position: {g.ra_column!r}, {g.dec_column!r}")


def _bands_toml(bands):
    out = ["# One table per band (this order is the band order); written by `sedtemp init` from the",
           "# catalogue's flux/error column pairs. Keys: flux, error, limit (bool column), unit (when the",
           "# columns have none), calibration (a group of [calibration]), and exactly one response:",
           "# tophat = { center, width } (width = dnu / nu), wavelength (monochromatic) or",
           "# response = \"file.ecsv\" (a response curve); detector = \"energy\" | \"photon\";",
           "# reference = \"nu_fnu\" | \"fnu\" | alpha.", ""]
    for b in bands:
        out += [f"[bands.{b.name}]", f'flux = "{b.flux}"', f'error = "{b.error}"']
        if b.limit:
            out.append(f'limit = "{b.limit}"')
        out.append(f'# unit = "{b.unit}"   (the catalogue gives it)' if b.unit else
                   '# unit = "mJy"   # NO UNIT in the catalogue: uncomment and set the right one')
        out.append('# calibration = "long"')
        if b.wavelength_um:
            out.append(f'tophat = {{ center = "{b.wavelength_um:g} um", width = 0.3 }}   # guessed from the name')
        else:
            out.append('# tophat = { center = "??? um", width = 0.3 }   # could not guess: set it')
        out.append("")
    return "\n".join(out) + "\n"


def _set_line(text, key, value, *, uncomment=False):
    """Replace the value of the first ``key = ...`` line (or ``# key = ...`` with ``uncomment``)."""
    pat = re.compile(rf"^(#\s*)?{re.escape(key)}\s*=\s*\S+(\s*#.*)?$", re.MULTILINE)
    for m in pat.finditer(text):
        if m.group(1) and not uncomment:
            continue
        line, comment = f'{key} = "{value}"', (m.group(2) or "").strip()
        line = f"{line.ljust(25)} {comment}" if comment else line
        return text[: m.start()] + line + text[m.end():]
    return text


def workflow_text(catalog: str | Path | None = None, *, workflow_path: str | Path | None = None,
                  table: Table | None = None) -> tuple[str, Guess | None]:
    """The template, pre-filled from ``catalog`` when one is given; also the guesses made.

    Parameters
    ----------
    catalog : str or Path, optional
        Catalogue file; ``[catalog] path`` is written relative to the
        workflow's folder.
    workflow_path : str or Path, optional, keyword-only
        Where the workflow will be written (default: the current folder).
    table : astropy.table.Table, optional, keyword-only
        The catalogue already read (default: read ``catalog``).

    Returns
    -------
    text : str
    guess : Guess or None
    """
    text = template_text()
    if catalog is None:
        return text, None
    if table is None:
        from .pipeline import read_catalog

        table = read_catalog(catalog)
    g = guess_columns(table)
    base = Path(workflow_path).resolve().parent if workflow_path is not None else Path.cwd()
    rel = Path(os.path.relpath(Path(catalog).resolve(), base)).as_posix()
    text = _set_line(text, "path", rel)
    if g.id_column:
        text = _set_line(text, "id_column", g.id_column)
    if g.ra_column and g.dec_column:
        text = _set_line(text, "ra_column", g.ra_column, uncomment=True)
        text = _set_line(text, "dec_column", g.dec_column, uncomment=True)
    if g.bands:
        text = _BAND_BLOCK.sub(lambda _: _bands_toml(g.bands), text, count=1)
    text = _STAR_BLOCK.sub(lambda m: "".join(f"# {x}" if x.strip() else x
                                             for x in m.group(0).splitlines(keepends=True)), text, count=1)
    g.notes.append("[catalog] distance is the template's \"450 pc\": set yours (or distance_column)")
    g.notes.append("[[field.components]]: the interstellar field (U = 1) and the CMB; the template's heating "
                   "star is commented out: set it if your sources sit near one")
    return text, g

