"""Radiation fields from plain component descriptions: the kinds, resolved once.

A workflow describes a field as a list of components, each a mapping with a
``kind`` (``"isrf"``, ``"star"``, ``"cmb"``, ``"blackbody"``, ``"table"``,
or one registered under the ``sedtemp.fields`` entry-point group) and the
keyword arguments of that kind's constructor. This module turns such plain
per-source arguments into a field object. It sits in the physics layer, so
the catalogue, the comparison and the maps can all build fields without
importing the pipeline.
"""

from __future__ import annotations

import functools
from collections.abc import Callable, Mapping, Sequence
from importlib.metadata import entry_points
from typing import Any

import astropy.units as u

from . import radiation
from .errors import ConfigError, InputError

__all__ = ["FIELD_GROUP", "BUILTIN_FIELDS", "argument_value", "field_kinds", "field_factory", "build_field"]

#: Entry-point group under which other packages register field kinds.
FIELD_GROUP = "sedtemp.fields"
#: The field kinds sedtemp itself provides.
BUILTIN_FIELDS: Mapping[str, Callable[..., radiation.RadiationField]] = {
    "isrf": radiation.ISRF,
    "star": radiation.Star,
    "cmb": radiation.CMB,
    "blackbody": radiation.Blackbody,
    "table": radiation.Tabulated,
}


def argument_value(value: Any) -> Any:
    """A field argument as a workflow gives it: a quantity string becomes a Quantity, the rest stays.

    Examples
    --------
    >>> argument_value("2 pc")
    <Quantity 2. pc>
    >>> argument_value(3.0)
    3.0
    """
    if isinstance(value, str):
        try:
            return u.Quantity(value)
        except (TypeError, ValueError):
            return value
    return value


@functools.cache
def _registered() -> dict:
    # looked up once per process: entry_points() scans every installed
    # distribution and costs ~30 ms a call
    return {ep.name: ep for ep in entry_points(group=FIELD_GROUP)}


def field_kinds() -> list[str]:
    """Every known component kind: the built-in ones, then the registered ones."""
    return sorted(BUILTIN_FIELDS) + sorted(set(_registered()) - set(BUILTIN_FIELDS))


@functools.cache
def field_factory(kind: str) -> Callable[..., radiation.RadiationField]:
    """The constructor of field component ``kind`` (resolved once per process).

    Raises
    ------
    ConfigError
        Unknown kind; the message lists the known kinds.
    """
    if kind in BUILTIN_FIELDS:
        return BUILTIN_FIELDS[kind]
    eps = _registered()
    if kind in eps:
        return eps[kind].load()
    raise ConfigError(f"[[field.components]] kind: unknown field {kind!r}; choose one of "
                      f"{field_kinds()} or register one under the entry-point group '{FIELD_GROUP}'")


def build_field(components: Sequence[Mapping], *, A_V: float = 0.0) -> radiation.RadiationField:
    """The sum of ``components`` (each ``{"kind": ..., **arguments}``), attenuated by ``A_V``.

    Parameters
    ----------
    components : sequence of mapping
        One mapping per component: ``kind`` and the keyword arguments of its
        constructor (scalars: Quantities or floats in the constructor's units).
    A_V : float, keyword-only
        Visual extinction (mag) between the field's sources and the dust;
        0 means none.

    Returns
    -------
    RadiationField

    Raises
    ------
    ConfigError
        Unknown kind.
    InputError
        No component.

    Examples
    --------
    >>> fld = build_field([{"kind": "isrf", "U": 2.0}, {"kind": "cmb"}])
    >>> len(fld.components)
    2
    """
    total = None
    for spec in components:
        args = dict(spec)
        kind = args.pop("kind", None)
        if kind is None:
            raise InputError(f"field component {dict(spec)!r} has no 'kind'; add e.g. kind = \"isrf\"")
        fld = field_factory(str(kind))(**args)
        total = fld if total is None else total + fld
    if total is None:
        raise InputError("the workflow has no [[field.components]]; add at least one (e.g. kind = \"isrf\")")
    av = float(A_V)
    return total.attenuated(av) if av > 0 else total
