"""Unit handling at the public edge: Quantities in, SI floats out.

Every public function that takes a physical value runs it through one of these
helpers. A bare number is taken in the documented default unit; a Quantity of
the wrong physical type raises :class:`~sedtemp.errors.InputError` naming the
argument.
"""

from __future__ import annotations

import astropy.units as u
import numpy as np

from .errors import InputError

__all__: list[str] = []  # private module (its helpers are used across sedtemp)

_FLUX_SI = u.W / u.m**2 / u.Hz


def _as_float_array(value, name):
    try:
        return np.asarray(value, dtype=float)
    except (TypeError, ValueError) as err:
        raise InputError(f"{name}: cannot read {value!r} as a number") from err


def _as_quantity(value, default_unit, name):
    if isinstance(value, u.Quantity):
        return value
    return _as_float_array(value, name) * default_unit


def to_hz(value, *, default_unit=u.um, name="frequency"):
    """Frequency or wavelength (Quantity, or bare number in ``default_unit``) -> Hz array."""
    q = _as_quantity(value, default_unit, name)
    try:
        return np.asarray(q.to_value(u.Hz, equivalencies=u.spectral()), dtype=float)
    except u.UnitConversionError as err:
        raise InputError(
            f"{name}: unit {q.unit} is neither a frequency nor a wavelength"
        ) from err


def to_si(value, unit, *, default_unit=None, name="value"):
    """Convert ``value`` to the SI ``unit``; bare numbers are in ``default_unit`` (or ``unit``)."""
    if not isinstance(value, u.Quantity) and (default_unit is None or default_unit is unit):
        return _as_float_array(value, name)  # a bare number already in the SI unit
    q = _as_quantity(value, default_unit if default_unit is not None else unit, name)
    try:
        return np.asarray(q.to_value(unit), dtype=float)
    except u.UnitConversionError as err:
        raise InputError(f"{name}: unit {q.unit} cannot be converted to {unit}") from err


def to_kelvin(value, *, name="temperature"):
    """Temperature (Quantity in K/deg_C, or bare number in K) -> K array."""
    if not isinstance(value, u.Quantity):
        return _as_float_array(value, name)  # a bare number is in K
    try:
        return np.asarray(value.to_value(u.K, equivalencies=u.temperature()), dtype=float)
    except u.UnitConversionError as err:
        raise InputError(f"{name}: unit {value.unit} is not a temperature") from err


def to_flux_si(value, *, name="flux"):
    """Flux density (Quantity in Jy, mJy, W m^-2 Hz^-1, ... or bare Jy) -> W m^-2 Hz^-1."""
    q = _as_quantity(value, u.Jy, name)
    try:
        return np.asarray(q.to_value(_FLUX_SI), dtype=float)
    except u.UnitConversionError as err:
        raise InputError(
            f"{name}: unit {q.unit} is not a flux density (use Jy, mJy or W m-2 Hz-1)"
        ) from err


def read_two_columns(path, *, what, example_units, format=None):
    """The first two columns of a table file as Quantities; both must carry units.

    Parameters
    ----------
    path : str or Path
    what : str
        What the table is, for messages (e.g. "opacity table").
    example_units : str
        Units to suggest when a column has none (e.g. "um and cm2 / g").
    format : str, optional
        astropy ``Table.read`` format; default from the file.
    """
    from pathlib import Path

    from astropy.table import Table

    path = Path(path)
    try:
        tab = Table.read(path, format=format) if format else Table.read(path)
    except Exception as err:  # astropy raises many types for unreadable files
        raise InputError(f"cannot read {what} {path}: {err}") from err
    if len(tab.colnames) < 2:
        raise InputError(f"{what} {path} needs two columns, found {len(tab.colnames)}")
    c0, c1 = tab.columns[0], tab.columns[1]
    for col in (c0, c1):
        if col.unit is None:
            raise InputError(f"{what} {path}: column '{col.name}' has no unit; "
                             f"write the file as ECSV with units (e.g. {example_units})")
    return u.Quantity(c0), u.Quantity(c1)


# ------------------------------------------------------------ catalogue units
#: Unit spellings offered as suggestions for a unit that does not parse, in order of preference
#: (a lower-case "mjy" is far more often milli- than mega-jansky).
COMMON_UNITS = ("Jy", "mJy", "uJy", "MJy", "W m-2 Hz-1", "erg s-1 cm-2 Hz-1", "MJy/sr", "Jy/sr",
                "Jy/beam", "mJy/beam", "pc", "kpc", "Mpc", "deg", "arcsec", "arcmin", "K", "um",
                "mm", "GHz", "solMass", "solLum", "mag")
_SURFACE_SI = u.W / u.m**2 / u.Hz / u.sr
#: 8 ln 2: a Gaussian's FWHM^2 = 8 ln 2 sigma^2 (exact).
_EIGHT_LN2 = 8.0 * np.log(2.0)


def did_you_mean(word: str, choices, *, n: int = 3) -> str:
    """`` (did you mean 'x'?)`` for the choices closest to ``word`` (difflib), or ``""``.

    Case-insensitive equals come first, in the order of ``choices``; then
    :func:`difflib.get_close_matches` (ratio >= 0.6).

    >>> did_you_mean("mjy", COMMON_UNITS)
    " (did you mean 'mJy' or 'MJy'?)"
    >>> did_you_mean("methdo", ["method", "n_T"])
    " (did you mean 'method'?)"
    >>> did_you_mean("zzz", ["method"])
    ''
    """
    import difflib

    choices = [str(c) for c in choices]
    same = [c for c in choices if c.lower() == str(word).lower() and c != word]
    close = [c for c in difflib.get_close_matches(str(word), choices, n=n, cutoff=0.6) if c not in same]
    found = (same + close)[:n]
    return f" (did you mean {' or '.join(repr(c) for c in found)}?)" if found else ""


def parse_unit(text, *, name: str = "unit") -> u.UnitBase:
    """An astropy unit from its text; a typo is refused with the closest common spellings.

    Raises
    ------
    InputError
        ``text`` is not a unit astropy reads; the message suggests the
        nearest of :data:`COMMON_UNITS` (``mjy`` -> ``mJy``).

    >>> parse_unit("mJy")
    Unit("mJy")
    """
    if isinstance(text, u.UnitBase):
        return text
    try:
        return u.Unit(str(text).strip())
    except ValueError as err:
        raise InputError(f"{name}: {str(text)!r} is not a unit{did_you_mean(str(text).strip(), COMMON_UNITS)}; "
                         "write it as astropy spells it, e.g. 'mJy', 'MJy/sr' or 'Jy/beam'") from err


def beam_solid_angle(*, fwhm=None, area=None) -> float:
    """Solid angle of a beam in sr, from a Gaussian FWHM or a stated area.

    Parameters
    ----------
    fwhm : Quantity or float, optional, keyword-only
        FWHM of a circular Gaussian beam (bare: arcsec).
    area : Quantity or float, optional, keyword-only
        Beam solid angle (bare: arcsec^2); give one of the two.

    Returns
    -------
    float
        sr.

    Notes
    -----
    Omega = 2 pi sigma^2 = pi FWHM^2 / (4 ln 2): the integral of a circular
    Gaussian of unit peak (exact, small-angle).

    >>> round(beam_solid_angle(fwhm=1.0) / beam_solid_angle(area=1.1330900354567985), 12)
    1.0
    """
    if (fwhm is None) == (area is None):
        raise InputError("beam: give exactly one of a FWHM (e.g. '18 arcsec') or an area (e.g. '370 arcsec2')")
    if fwhm is not None:
        theta = to_si(fwhm, u.rad, default_unit=u.arcsec, name="beam FWHM")
        if not np.all(theta > 0):
            raise InputError(f"beam FWHM must be positive, got {fwhm!r}")
        return float(2.0 * np.pi * theta**2 / _EIGHT_LN2)
    omega = to_si(area, u.sr, default_unit=u.arcsec**2, name="beam area")
    if not np.all(omega > 0):
        raise InputError(f"beam area must be positive, got {area!r}")
    return float(omega)


def flux_density_si(values, unit, *, solid_angle=None, beam=None, name: str = "flux") -> np.ndarray:
    """Flux densities in W m^-2 Hz^-1 from values in a flux-density, surface-brightness or per-beam unit.

    Parameters
    ----------
    values : array_like
        Numbers in ``unit``.
    unit : str or UnitBase
        ``Jy``-like (flux density), ``MJy/sr``-like (surface brightness) or
        ``Jy/beam``-like (per beam).
    solid_angle : Quantity or float, optional, keyword-only
        Solid angle the photometry covers (bare: arcsec^2), needed for a
        surface brightness (flux = I * Omega); default the beam area.
    beam : float, optional, keyword-only
        Beam solid angle in sr (:func:`beam_solid_angle`), needed for a
        per-beam unit; with no ``solid_angle`` a per-beam value times one
        beam is taken (a point source: its peak in Jy/beam is its flux in Jy).

    Raises
    ------
    InputError
        The unit is none of the three kinds, or the solid angle it needs is
        missing; the message says which key to add.

    Examples
    --------
    >>> round(float(flux_density_si([2.0], "mJy")[0]) / 1e-29, 12)
    2.0
    >>> float(flux_density_si([1.0], "MJy/sr", solid_angle=1e-6 * u.sr)[0]) == 1e-26
    True
    """
    unit = parse_unit(unit, name=name)
    vals = np.asarray(values, dtype=float)
    try:
        return vals * unit.to(_FLUX_SI)
    except u.UnitConversionError:
        pass
    omega = None if solid_angle is None else float(to_si(solid_angle, u.sr, default_unit=u.arcsec**2,
                                                         name=f"{name} solid angle"))
    if unit.is_equivalent(_FLUX_SI / u.beam):
        if beam is None:
            raise InputError(f"{name}: unit {unit} is per beam; give the beam (a FWHM, e.g. beam = \"18 arcsec\", "
                             "or its area) so it can be turned into a flux density")
        per_sr = unit.to(_SURFACE_SI, equivalencies=u.beam_angular_area(beam * u.sr))
        return vals * per_sr * (beam if omega is None else omega)
    if unit.is_equivalent(_SURFACE_SI):
        omega = omega if omega is not None else beam
        if omega is None:
            raise InputError(f"{name}: unit {unit} is a surface brightness; give the solid angle of the "
                             "photometry (e.g. solid_angle = \"370 arcsec2\") or the beam, so it can be "
                             "turned into a flux density")
        return vals * unit.to(_SURFACE_SI) * omega
    raise InputError(f"{name}: unit {unit} is not a flux density, a surface brightness or a per-beam unit; "
                     "use e.g. Jy, mJy, MJy/sr or Jy/beam")


def group_causes(causes, keys=None, *, show: int = 5) -> list[str]:
    """One line per distinct cause, with how many sources share it and the first few ids.

    Parameters
    ----------
    causes : sequence of str
        One cause per source (or per occurrence); empty strings are ignored.
    keys : sequence of str, optional
        The source of each cause; without them only the count is given.
    show : int, keyword-only
        Ids listed per cause before "and N more".

    Returns
    -------
    list of str
        In order of first appearance.

    >>> group_causes(["unit 'mjy' unknown"] * 8, [f"S{i}" for i in range(8)], show=2)
    ["unit 'mjy' unknown (8 sources: 'S0', 'S1' and 6 more)"]
    >>> group_causes(["a", "b", "a"])
    ['a (2 times)', 'b']
    """
    groups: dict[str, list] = {}
    for i, cause in enumerate(causes):
        if cause:
            groups.setdefault(str(cause), []).append(None if keys is None else str(keys[i]))
    out = []
    for cause, ks in groups.items():
        if len(ks) == 1:
            out.append(cause if keys is None else f"{cause} (source {ks[0]!r})")
        elif keys is None:
            out.append(f"{cause} ({len(ks)} times)")
        else:
            more = f" and {len(ks) - show} more" if len(ks) > show else ""
            out.append(f"{cause} ({len(ks)} sources: {', '.join(repr(k) for k in ks[:show])}{more})")
    return out
