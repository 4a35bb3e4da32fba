"""One photometry simulator: band fluxes of a model with Gaussian noise and calibration offsets.

Used by the tests, the validation suite, the benchmarks and the demo
generator, so that every "simulated source" in the project means the same.

Noise is given either per band as a signal-to-noise ratio (``snr``: each
band's error is its own model flux / snr) or as a survey depth (``depth``:
every band's error is the same fraction of the source's *peak* band flux,
err = peak / depth, so fainter bands have lower S/N, as in a real survey of
fixed sensitivity) or as the errors themselves (``sigma``: given 1-sigma
errors per band, e.g. one fixed error per band for a whole population).
A noise floor (``floor``) can be added in quadrature to any of the three.

Calibration offsets multiply the *model* fluxes, and the noise is added
after them: flux = m (1 + delta_g) + err * z, the model whose marginal is
the covariance diag(err^2) + d_g^2 m m^T of the likelihood.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import ArrayLike

from .errors import InputError

if TYPE_CHECKING:
    from .bands import BandSet

#: What ``seed=`` accepts (None means 0).
SeedLike = int | np.random.SeedSequence | np.random.Generator | None

__all__ = ["JY_SI", "simulate_photometry"]

#: 1 Jy in W m^-2 Hz^-1.
JY_SI = 1e-26


def simulate_photometry(bands: BandSet, model: Any, theta: ArrayLike, *, snr: ArrayLike | None = None,
                        depth: ArrayLike | None = None, sigma: ArrayLike | None = None,
                        floor: ArrayLike | None = None,
                        calibration: Any = None,  # model, calibration: inference-layer types
                        seed: SeedLike = None, unit_si: float = JY_SI
                        ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Noisy band fluxes of ``model`` at parameters ``theta``.

    Parameters
    ----------
    bands : BandSet
    model : SEDModel
    theta : array_like (n, n_params) or (n_params,)
        Parameters in ``model.param_names`` order.
    snr : float or array_like (n_bands,) or (n, n_bands), keyword-only
        Per-band signal-to-noise: err = model flux / snr.
    depth : float or array_like (n,), keyword-only
        Survey depth: err = (peak band flux of the source) / depth in every band.
    sigma : float or array_like (n_bands,) or (n, n_bands), keyword-only
        The 1-sigma errors themselves, in ``unit_si``.
        Exactly one of ``snr``, ``depth`` and ``sigma`` is given.
    floor : float or array_like (n_bands,) or (n, n_bands), keyword-only
        Noise floor in ``unit_si``, added in quadrature to the error of
        ``snr``, ``depth`` or ``sigma``: err = sqrt(err_0**2 + floor**2)
        (e.g. a fractional error plus a confusion or sensitivity limit).
        Default: none.
    calibration : mapping name -> (band names, fraction), keyword-only
        Calibration groups: one shared factor (1 + fraction * N(0, 1)) per
        group and source multiplies the model fluxes of its bands.
    seed : int, SeedSequence or Generator, keyword-only
        None means 0 (repeatable by default, like every sedtemp entry point).
    unit_si : float
        Unit of the returned fluxes in W m^-2 Hz^-1 (default Jy).

    Returns
    -------
    flux, err, model_flux : ndarray (n, n_bands)
        Noisy fluxes, 1-sigma errors and noiseless model band fluxes, in ``unit_si``.

    Raises
    ------
    InputError
        Not exactly one of ``snr``, ``depth`` and ``sigma``; a calibration band not in ``bands``.

    Examples
    --------
    >>> import astropy.units as u
    >>> from sedtemp.bands import Band, BandSet
    >>> from sedtemp.models import ModifiedBlackbody
    >>> bs = BandSet([Band.monochromatic(f"b{w}", w * u.um) for w in (100, 250, 500)])
    >>> f, e, m = simulate_photometry(bs, ModifiedBlackbody(distance=300 * u.pc), [0.0, 20.0, 1.8], snr=10)
    >>> bool(np.allclose(e, m / 10))
    True
    """
    if sum(x is not None for x in (snr, depth, sigma)) != 1:
        raise InputError("simulate_photometry needs exactly one of snr= (per band), depth= (peak / noise) "
                         "or sigma= (the errors)")
    theta = np.atleast_2d(np.asarray(theta, float))
    rng = np.random.default_rng(0 if seed is None else seed)
    m = bands.band_fluxes(model.sed_si(bands.nu_grid_hz, theta)) / unit_si
    if snr is not None:
        err = m / np.asarray(snr, float)
    elif sigma is not None:
        err = np.broadcast_to(np.asarray(sigma, float), m.shape).copy()
    else:
        err = np.broadcast_to(m.max(axis=1, keepdims=True) / np.reshape(np.asarray(depth, float), (-1, 1)),
                              m.shape).copy()
    if floor is not None:
        err = np.hypot(err, np.asarray(floor, float))
    f = m + err * rng.standard_normal(m.shape)
    if calibration is not None:
        groups = calibration.groups if hasattr(calibration, "groups") else calibration
        if not isinstance(groups, Mapping):
            raise InputError("calibration must map a group name to (band names, fraction)")
        for members, frac in groups.values():  # a few groups
            unknown = [b for b in members if b not in bands.names]
            if unknown:
                raise InputError(f"calibration names band(s) {unknown} not in {list(bands.names)}")
            idx = [bands.names.index(b) for b in members]
            f[:, idx] += m[:, idx] * frac * rng.standard_normal((m.shape[0], 1))
    return f, err, m
