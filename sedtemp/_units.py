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

__all__: list[str] = []  # private module

_FLUX_SI = u.W / u.m**2 / u.Hz


def _as_quantity(value, default_unit, name):
    if isinstance(value, u.Quantity):
        return value
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError) as err:
        raise InputError(f"{name}: cannot read {value!r} as a number") from err
    return arr * default_unit


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
    q = _as_quantity(value, default_unit if default_unit is not None else unit, name)
    try:
        return np.asarray(q.to_value(unit), dtype=float)
    except u.UnitConversionError as err:
        raise InputError(f"{name}: unit {q.unit} cannot be converted to {unit}") from err


def to_kelvin(value, *, name="temperature"):
    """Temperature (Quantity in K/deg_C, or bare number in K) -> K array."""
    q = _as_quantity(value, u.K, name)
    try:
        return np.asarray(q.to_value(u.K, equivalencies=u.temperature()), dtype=float)
    except u.UnitConversionError as err:
        raise InputError(f"{name}: unit {q.unit} is not a temperature") from err


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
