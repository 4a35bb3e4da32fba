"""One photometry container and validator, shared by the Python API and the catalogue.

:func:`prepare` takes what a user passes (Quantities, bare numbers in Jy,
masked arrays) and returns a validated :class:`Photometry` in SI units;
:func:`photometry_problems` checks SI arrays and returns every problem with
the sources it concerns (the catalogue reports them all at once);
:func:`validate` raises on the first one.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import astropy.units as u
import numpy as np
from numpy.typing import ArrayLike

from ._units import to_flux_si
from .errors import InputError, SedtempWarning

__all__ = ["Photometry", "photometry_problems", "prepare", "validate"]


@dataclass(frozen=True)
class Photometry:
    """SI photometry of one or many sources, validated.

    Attributes
    ----------
    flux, err : ndarray (n_sources, n_bands)
        W m^-2 Hz^-1. Missing bands hold flux 0 and error inf.
    missing : ndarray of bool (n_sources, n_bands)
        Bands with no measurement (NaN flux and error, or masked).
    limit_only : ndarray of bool (n_sources, n_bands)
        Bands known only as an upper limit (``flux`` holds the limit, ``err`` its sigma).
    """

    flux: np.ndarray
    err: np.ndarray
    missing: np.ndarray
    limit_only: np.ndarray

    @property
    def n_usable(self) -> np.ndarray:
        """Bands with a measured flux (not missing, not limit-only) per source."""
        return np.sum(~self.missing & ~self.limit_only, axis=-1)


def _limits_array(upper_limits, names, shape):
    """Upper-limit specification -> bool array of limit-only bands."""
    if upper_limits is None:
        return np.zeros(shape, bool)
    if isinstance(upper_limits, dict | set | list | tuple) and all(isinstance(k, str) for k in upper_limits):
        unknown = [k for k in upper_limits if k not in names]
        if unknown:
            raise InputError(f"upper_limits names unknown band(s) {unknown}; bands are {list(names)}")
        row = np.array([n in upper_limits for n in names])
        return np.broadcast_to(row, shape).copy()
    arr = np.asarray(upper_limits, dtype=bool)
    try:
        return np.broadcast_to(arr, shape).copy()
    except ValueError as err:
        raise InputError(
            f"upper_limits has shape {arr.shape}, expected {shape} or a list of band names"
        ) from err


def _to_si(value, what):
    """(SI array, mask or None, was_bare) of a flux-like input; masks are kept, lists of Quantities refused."""
    if isinstance(value, list | tuple) and any(isinstance(v, u.Quantity) for v in value):
        raise InputError(
            f"{what} is a list of Quantities; make it one Quantity array, e.g. "
            f"u.Quantity({what}) or np.array([...]) * u.Jy"
        )
    mask = None
    if isinstance(value, np.ma.MaskedArray):
        mask = np.ma.getmaskarray(value)
        value = np.ma.asarray(value, dtype=float).filled(np.nan)
    elif hasattr(value, "unmasked") and hasattr(value, "mask"):  # astropy Masked Quantity
        mask = np.asarray(value.mask)
        value = value.unmasked
    bare = not isinstance(value, u.Quantity)
    si = np.array(to_flux_si(value, name=what), dtype=float, ndmin=1)
    if mask is not None:
        si = np.where(np.broadcast_to(mask, si.shape), np.nan, si)
    return si, mask, bare


def photometry_problems(flux: np.ndarray, err: np.ndarray, names: Sequence[str], *,
                        skip_missing: bool = True) -> list[tuple[str, np.ndarray]]:
    """Every problem of SI photometry arrays, as (message, mask over sources) pairs.

    Parameters
    ----------
    flux, err : ndarray (n_sources, n_bands)
        SI flux densities and errors; NaN in both marks a missing band.
    names : sequence of str
        Band names (for the messages).
    skip_missing : bool
        NaN in both flux and error means "not observed" (else any NaN is a problem).

    Returns
    -------
    list of (str, ndarray of bool (n_sources,))
        Only problems that concern at least one source.
    """
    both_nan = np.isnan(flux) & np.isnan(err) if skip_missing else np.zeros(flux.shape, bool)
    out = []
    for j, b in enumerate(names):  # a few bands; each check is vectorised over sources
        fn, en = np.isnan(flux[:, j]), np.isnan(err[:, j])
        hint = ("; mark an unobserved band with NaN in both flux and error" if skip_missing
                else "; drop the band or give both flux and error")
        checks = [
            (f"band '{b}': flux is NaN{hint}", fn & ~both_nan[:, j]),
            (f"band '{b}': flux_err is NaN{hint}", en & ~fn & ~both_nan[:, j]),
            (f"band '{b}': flux or error is infinite", np.isinf(flux[:, j]) | np.isinf(err[:, j])),
            (f"band '{b}': flux_err must be positive", ~both_nan[:, j] & ~en & ~np.isinf(err[:, j])
             & ~(err[:, j] > 0)),
        ]
        out += [(msg, mask) for msg, mask in checks if mask.any()]
    return out


def validate(flux: ArrayLike, err: ArrayLike, names: Sequence[str], *, limit_only: ArrayLike | None = None,
             skip_missing: bool = True, source_label: Sequence[object] | None = None) -> Photometry:
    """SI arrays (n_sources, n_bands) -> :class:`Photometry`, raising on the first problem.

    Raises
    ------
    InputError
        Naming the source (``source_label[i]``, else the row) and the band.
    """
    flux, err = np.atleast_2d(np.asarray(flux, float)), np.atleast_2d(np.asarray(err, float))
    probs = photometry_problems(flux, err, names, skip_missing=skip_missing)
    if probs:
        msg, mask = probs[0]
        i = int(np.flatnonzero(mask)[0])
        who = (f"source {source_label[i]!r}" if source_label is not None
               else (f"source row {i}" if flux.shape[0] > 1 else "the source"))
        if "positive" in msg:
            j = list(names).index(msg.split("'")[1])
            msg += f", got {err[i, j]:.3g} W m-2 Hz-1"
        raise InputError(f"{who}, {msg}")
    missing = np.isnan(flux) & np.isnan(err) if skip_missing else np.zeros(flux.shape, bool)
    lim = np.zeros(flux.shape, bool) if limit_only is None else np.broadcast_to(limit_only, flux.shape)
    return Photometry(flux=np.where(missing, 0.0, flux), err=np.where(missing, np.inf, err),
                      missing=missing, limit_only=lim & ~missing)


def prepare(flux: u.Quantity | ArrayLike, flux_err: u.Quantity | ArrayLike, names: Sequence[str], *,
            upper_limits: Sequence[str] | ArrayLike | None = None, skip_missing: bool = True,
            source_label: Sequence[object] | None = None) -> Photometry:
    """Convert and check user photometry; return :class:`Photometry` with 2-D SI arrays.

    Parameters
    ----------
    flux, flux_err : Quantity, array_like or masked array, shape (n_bands,) or (n_sources, n_bands)
        Flux densities and 1-sigma errors. A bare number is taken in Jy, with
        one :class:`~sedtemp.errors.SedtempWarning` saying so. A masked entry
        (in either) is a missing band. For limit-only bands ``flux`` is the
        limit and ``flux_err`` its 1-sigma value.
    names : sequence of str
        Band names, for messages.
    upper_limits : list of band names or bool array, optional
        Limit-only bands.
    skip_missing : bool
        If True a band whose flux *and* error are NaN (or masked) is treated
        as not observed; if False any NaN is an error.
    source_label : sequence, optional
        Source identifiers used in error messages (default: row index).

    Returns
    -------
    Photometry

    Raises
    ------
    InputError
        Lists of Quantities, wrong units, shapes that do not match the bands
        or each other, NaN/inf/non-positive errors (naming source and band).

    Examples
    --------
    >>> import astropy.units as u
    >>> p = prepare([1.0, 2.0] * u.Jy, [0.1, 0.2] * u.Jy, ["a", "b"])
    >>> p.flux.shape, float(p.flux[0, 0])
    ((1, 2), 1e-26)
    """
    f, mf, bare_f = _to_si(flux, "flux")
    e, me, bare_e = _to_si(flux_err, "flux_err")
    if bare_f or bare_e:
        which = " and ".join(w for w, b in (("flux", bare_f), ("flux_err", bare_e)) if b)
        warnings.warn(f"{which} given as bare numbers: taken in Jy; pass Quantities (e.g. values * u.mJy) "
                      "to state the unit", SedtempWarning, stacklevel=3)
    f, e = np.atleast_2d(f), np.atleast_2d(e)
    nb = len(names)
    for arr, what in ((f, "flux"), (e, "flux_err")):
        if arr.ndim > 2 or arr.shape[-1] != nb:
            raise InputError(f"{what} has shape {arr.shape}: expected (n_bands,) or (n_sources, n_bands) "
                             f"with {nb} bands {list(names)}")
    if f.shape != e.shape:
        raise InputError(f"flux has shape {f.shape} but flux_err has shape {e.shape}; give one error per flux")
    if skip_missing:  # a band masked in either array is missing in both
        gone = np.zeros(f.shape, bool)
        for m in (mf, me):
            if m is not None:
                gone |= np.broadcast_to(np.atleast_2d(m), f.shape)
        f, e = np.where(gone, np.nan, f), np.where(gone, np.nan, e)
    lim = _limits_array(upper_limits, names, f.shape)
    return validate(f, e, names, limit_only=lim, skip_missing=skip_missing, source_label=source_label)
