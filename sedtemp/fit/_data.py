"""Priors and band-count checks for the fitters (the photometry itself: :mod:`sedtemp.photometry`)."""

from __future__ import annotations

from ..errors import InputError
from ..photometry import Photometry

__all__: list[str] = []


def resolve_prior(model, prior):
    """The model's default priors, with the entries of ``prior`` (mapping) replacing them."""
    base = model.default_prior()
    full = base if prior is None else base.updated(dict(prior))
    full.check_names(tuple(model.param_names))
    return full


def require_bands(phot: Photometry, n_free: int, names, source_label=None):
    """Raise InputError if the (single) source has fewer usable bands than parameters."""
    n = int(phot.n_usable[0])
    if n < n_free:
        used = [b for b, m, lim in zip(names, phot.missing[0], phot.limit_only[0], strict=True) if not (m or lim)]
        who = f"source {source_label!r}" if source_label is not None else "the source"
        raise InputError(
            f"{who} has {n} usable band(s) {used} but the model has {n_free} free parameters; "
            "fix a parameter (e.g. beta) or add bands"
        )
