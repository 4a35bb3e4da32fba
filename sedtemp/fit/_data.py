"""Validation and conversion of photometry handed to the fitters."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .._units import to_flux_si
from ..errors import InputError

__all__: list[str] = []


@dataclass(frozen=True)
class Photometry:
    """SI photometry of one or many sources, validated.

    ``flux``/``err``: (n_sources, n_bands) in W m^-2 Hz^-1; ``missing``: bands
    with no measurement (NaN flux and error) per source; ``limit_only``: bands
    known only as an upper limit (``flux`` holds the limit, ``err`` its sigma).
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


def prepare(flux, flux_err, names, *, upper_limits=None, skip_missing=True, source_label=None):
    """Convert and check photometry; return :class:`Photometry` with 2-D arrays.

    Parameters
    ----------
    flux, flux_err : Quantity or array_like, shape (n_bands,) or (n_sources, n_bands)
        Flux densities and 1-sigma errors (Jy if bare). For limit-only bands
        ``flux`` is the limit and ``flux_err`` its 1-sigma value.
    names : sequence of str
        Band names, for messages.
    upper_limits : list of band names or bool array, optional
        Limit-only bands.
    skip_missing : bool
        If True a band whose flux *and* error are NaN is treated as not
        observed; if False any NaN is an error.
    source_label : sequence, optional
        Source identifiers used in error messages (default: row index).
    """
    f = np.atleast_2d(to_flux_si(flux, name="flux"))
    e = np.atleast_2d(to_flux_si(flux_err, name="flux_err"))
    nb = len(names)
    for arr, what in ((f, "flux"), (e, "flux_err")):
        if arr.shape[-1] != nb:
            raise InputError(f"{what} has {arr.shape[-1]} values per source but there are {nb} bands {list(names)}")
    if f.shape != e.shape:
        raise InputError(f"flux has shape {f.shape} but flux_err has shape {e.shape}")
    label = (lambda i: f"source {source_label[i]!r}") if source_label is not None else (
        (lambda i: f"source row {i}") if f.shape[0] > 1 else (lambda i: "the source"))
    both_nan = np.isnan(f) & np.isnan(e)
    missing = both_nan if skip_missing else np.zeros_like(both_nan)
    bad_nan = (np.isnan(f) | np.isnan(e)) & ~missing
    if bad_nan.any():
        i, j = np.argwhere(bad_nan)[0]
        what = "flux" if np.isnan(f[i, j]) else "flux_err"
        hint = ("; mark an unobserved band with NaN in both flux and error"
                if skip_missing else "; drop the band or give both flux and error")
        raise InputError(f"{label(i)}, band '{names[j]}': {what} is NaN{hint}")
    bad_inf = ~missing & ~(np.isfinite(f) & np.isfinite(e))
    if bad_inf.any():
        i, j = np.argwhere(bad_inf)[0]
        raise InputError(f"{label(i)}, band '{names[j]}': flux or error is infinite")
    bad_err = ~missing & ~(e > 0)
    if bad_err.any():
        i, j = np.argwhere(bad_err)[0]
        raise InputError(
            f"{label(i)}, band '{names[j]}': flux_err must be positive, got {e[i, j]:.3g} W m-2 Hz-1"
        )
    lim = _limits_array(upper_limits, names, f.shape) & ~missing
    f = np.where(missing, 0.0, f)
    e = np.where(missing, np.inf, e)
    return Photometry(flux=f, err=e, missing=missing, limit_only=lim)


def resolve_prior(model, prior):
    """The model's default priors, with the entries of ``prior`` (mapping) replacing them."""
    from ..priors import Prior

    base = model.default_prior()
    full = base if prior is None else base.updated(dict(prior))
    full.check_names(tuple(model.param_names))
    return full


def require_bands(phot: Photometry, n_free: int, names, source_label=None):
    """Raise InputError if the (single) source has fewer usable bands than parameters."""
    n = int(phot.n_usable[0])
    if n < n_free:
        used = [b for b, m, lim in zip(names, phot.missing[0], phot.limit_only[0]) if not (m or lim)]
        who = f"source {source_label!r}" if source_label is not None else "the source"
        raise InputError(
            f"{who} has {n} usable band(s) {used} but the model has {n_free} free parameters; "
            "fix a parameter (e.g. beta) or add bands"
        )
