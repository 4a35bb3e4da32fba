"""Emitted power of an opacity law, P(T, beta) = 4 pi int kappa_nu(beta) B_nu(T) dnu, tabulated once.

The emitted power per unit mass is a property of the opacity alone. It is
tabulated once per process and opacity (:func:`emission_table`, cached by
:meth:`sedtemp.opacity.Opacity.cache_key`) as ln P on a grid in ln T and
beta, interpolated by a bicubic spline, and inverted (the temperature that
emits a given power) by Newton's method on that spline. The equilibrium
predictor and the comparison use this one implementation.

The exact analytic result for a pure power law, kept as the reference the
tests check against, is :func:`powerlaw_emitted_power`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike
from scipy.interpolate import RectBivariateSpline

from ._numerics import log_trapezoid_weights
from .errors import InputError
from .planck import _planck_nu_si, _powerlaw_planck_integral_si

if TYPE_CHECKING:
    from .opacity import Opacity

__all__ = [
    "BETA_RANGE",
    "T_TABLE_RANGE_K",
    "EmissionTable",
    "check_beta",
    "emission_table",
    "powerlaw_emitted_power",
    "register_table",
]

#: Emissivity indices accepted by the equilibrium and comparison code: the
#: physical range of grain far-IR slopes with margin (measured values lie in
#: ~0.5-3; beta < 0 would mean an opacity rising to long wavelengths).
BETA_RANGE = (0.0, 5.0)
#: Temperatures spanned by the table (K); outside it ln P is continued linearly in ln T.
T_TABLE_RANGE_K = (0.5, 5000.0)
_DLNT = 0.025  # node spacing in ln T
_DBETA = 0.05  # node spacing in beta
_DLNP = 0.05  # node spacing in ln P of the inverted table (first guesses only)
_BETA_MARGIN = 0.2  # nodes beyond BETA_RANGE so the spline is interior everywhere
# emission quadrature: 6001 log-spaced nodes, 1e7 Hz (3 m) to 3e16 Hz (10 nm),
# enough for every T of the table (trapezoid in ln nu, checked against quad)
_NU_EMIT_HZ = np.geomspace(1e7, 3e16, 6001)
_MAX_CACHED = 32
_CACHE: dict = {}


def check_beta(beta: ArrayLike, who: str) -> np.ndarray:
    """``beta`` as a float array, refused (InputError) outside :data:`BETA_RANGE` or non-finite."""
    b = np.asarray(beta, dtype=float)
    lo, hi = BETA_RANGE
    if b.size and not (np.all(np.isfinite(b)) and b.min() >= lo and b.max() <= hi):
        bad = b[~(np.isfinite(b) & (b >= lo) & (b <= hi))].ravel()[:3]
        raise InputError(f"{who}: beta must be finite and within [{lo:g}, {hi:g}] (a far-IR emissivity "
                         f"index; measured values lie in ~0.5-3), got {bad.tolist()}")
    return b


def powerlaw_emitted_power(temperature_k: ArrayLike, beta: ArrayLike, kappa0_si: float,
                           nu0_hz: float) -> np.ndarray:
    """Exact emitted power (W/kg) of kappa0 (nu/nu0)^beta: 4 pi kappa0 int (nu/nu0)^beta B_nu dnu.

    Parameters
    ----------
    temperature_k : array_like
        T in K.
    beta : array_like
        Broadcasts against ``temperature_k``; > -3.
    kappa0_si : float
        kappa at nu0 in m^2 kg^-1.
    nu0_hz : float
        Pivot frequency in Hz.

    Returns
    -------
    ndarray
        4 pi kappa0 nu0^-beta (2 h / c^2) (k T / h)^(4+beta) Gamma(4+beta) zeta(4+beta).

    References
    ----------
    Exact analytic solution (int x^(3+beta) / (e^x - 1) dx = Gamma(4+beta) zeta(4+beta)).
    """
    return 4 * np.pi * kappa0_si * _powerlaw_planck_integral_si(temperature_k, beta, nu0_hz)


@dataclass(eq=False)
class EmissionTable:
    """ln P(ln T, beta) of one opacity on a regular grid, with its interpolant.

    Picklable (a few hundred kB): ship it to worker processes once and
    :func:`register_table` it there.

    Attributes
    ----------
    key : tuple
        The opacity's :meth:`~sedtemp.opacity.Opacity.cache_key`.
    ln_t, beta : ndarray
        Grid nodes (ln K, and beta).
    ln_p : ndarray (n_T, n_beta)
        ln of the emitted power per unit mass, W kg^-1.

    Notes
    -----
    Bicubic spline (scipy ``RectBivariateSpline``, interpolating) on nodes
    0.025 apart in ln T and 0.05 in beta: relative error of P below 1e-7 and
    of the inverted T below 1e-8 inside the table (tests/test_emission.py
    checks P against scipy.integrate.quad and, for a power law, against the
    exact result).
    """

    key: tuple
    ln_t: np.ndarray
    beta: np.ndarray
    ln_p: np.ndarray
    _spline: RectBivariateSpline | None = field(default=None, repr=False)
    _inverse: RectBivariateSpline | None = field(default=None, repr=False)

    def __getstate__(self):
        state = dict(self.__dict__)
        state["_spline"] = state["_inverse"] = None  # rebuilt on first use: only the grid is shipped
        return state

    @property
    def spline(self) -> RectBivariateSpline:
        if self._spline is None:
            self._spline = RectBivariateSpline(self.ln_t, self.beta, self.ln_p, kx=3, ky=3, s=0)
        return self._spline

    def _ln_power(self, lnt, b):
        """(ln P, d ln P / d ln T) at (ln T, beta), continued linearly in ln T beyond the table."""
        x = np.clip(lnt, self.ln_t[0], self.ln_t[-1])
        slope = self.spline.ev(x, b, dx=1)
        return self.spline.ev(x, b) + slope * (lnt - x), slope

    def power(self, temperature_k: ArrayLike, beta: ArrayLike) -> np.ndarray:
        """P(T, beta) in W kg^-1 (broadcasting; T in K, >= 0)."""
        t, b = np.broadcast_arrays(np.asarray(temperature_k, float), np.asarray(beta, float))
        with np.errstate(divide="ignore"):
            lnt = np.where(t > 0, np.log(np.where(t > 0, t, 1.0)), 0.0).ravel()
        b = b.ravel()
        out = self.spline.ev(np.clip(lnt, self.ln_t[0], self.ln_t[-1]), b)
        far = (lnt < self.ln_t[0]) | (lnt > self.ln_t[-1])
        if far.any():  # beyond the table: linear in ln T with the end slope
            out[far] = self._ln_power(lnt[far], b[far])[0]
        return np.where(t > 0, np.exp(out).reshape(t.shape), 0.0)

    @property
    def inverse(self) -> RectBivariateSpline:
        """ln T(ln P, beta): the table inverted on a regular ln P grid (a first guess, ~1e-7)."""
        if self._inverse is None:
            fine = np.linspace(self.ln_t[0], self.ln_t[-1], 8 * (self.ln_t.size - 1) + 1)
            lnp = self.spline(fine, self.beta)  # (n_fine, n_beta), increasing down each column
            y = np.arange(lnp[0].min(), lnp[-1].max() + _DLNP, _DLNP)
            lnt = np.empty((y.size, self.beta.size))
            for k in range(self.beta.size):  # once per table, per beta node
                col = lnp[:, k]
                lo = (col[1] - col[0]) / (fine[1] - fine[0])
                hi = (col[-1] - col[-2]) / (fine[-1] - fine[-2])
                lnt[:, k] = np.interp(y, col, fine)
                lnt[:, k] = np.where(y < col[0], fine[0] + (y - col[0]) / lo, lnt[:, k])
                lnt[:, k] = np.where(y > col[-1], fine[-1] + (y - col[-1]) / hi, lnt[:, k])
            self._inverse = RectBivariateSpline(y, self.beta, lnt, kx=3, ky=3, s=0)
        return self._inverse

    def temperature(self, power: ArrayLike, beta: ArrayLike) -> np.ndarray:
        """The T (K) with P(T, beta) = ``power`` (W kg^-1, >= 0); 0 where the power is 0.

        A first guess from the inverted table (:attr:`inverse`), then Newton's
        method in ln T on the forward spline until the last step is below 1e-5
        (quadratic convergence: the remaining error is then ~1e-10; the first
        guess is already good to ~1e-7, so one step is the rule).
        """
        p, b = np.broadcast_arrays(np.asarray(power, float), np.asarray(beta, float))
        shape = p.shape
        p, b = p.ravel(), b.ravel()
        pos = p > 0
        lnp = np.log(np.where(pos, p, 1.0))
        inv = self.inverse
        x = inv.ev(np.clip(lnp, inv.get_knots()[0][0], inv.get_knots()[0][-1]), b)
        for _ in range(30):
            val, slope = self._ln_power(x, b)
            step = (val - lnp) / slope
            x = x - step
            # quadratic convergence: after a step s the error is ~ s^2 (< 1e-10 for s < 1e-5)
            if not pos.any() or np.max(np.abs(step[pos])) < 1e-5:
                break
        return np.where(pos, np.exp(x), 0.0).reshape(shape)


def _build(opacity) -> EmissionTable:
    lo_t, hi_t = np.log(T_TABLE_RANGE_K[0]), np.log(T_TABLE_RANGE_K[1])
    ln_t = np.linspace(lo_t, hi_t, round((hi_t - lo_t) / _DLNT) + 1)
    b_lo, b_hi = BETA_RANGE[0] - _BETA_MARGIN, BETA_RANGE[1] + _BETA_MARGIN
    beta = np.linspace(b_lo, b_hi, round((b_hi - b_lo) / _DBETA) + 1)
    nu = _NU_EMIT_HZ
    w = 4 * np.pi * log_trapezoid_weights(nu)
    kw = opacity.kappa_si(nu[None, :], beta[:, None]) * w  # (n_beta, n_nu)
    bnu = _planck_nu_si(nu[None, :], np.exp(ln_t)[:, None])  # (n_T, n_nu)
    p = bnu @ kw.T  # (n_T, n_beta): one matrix product
    if not np.all(p > 0):
        raise InputError(f"the opacity {opacity!r} emits no power on the table grid; check it")
    return EmissionTable(opacity.cache_key(), ln_t, beta, np.log(p))


def emission_table(opacity: Opacity) -> EmissionTable:
    """The (cached) emitted-power table of ``opacity``, built on first use in this process.

    Parameters
    ----------
    opacity : Opacity

    Returns
    -------
    EmissionTable

    Examples
    --------
    >>> from sedtemp.opacity import PowerLawOpacity
    >>> tab = emission_table(PowerLawOpacity(10.0, 1e12, 2.0))
    >>> exact = powerlaw_emitted_power(20.0, 2.0, 1.0, 1e12)
    >>> bool(abs(tab.power(20.0, 2.0) / exact - 1) < 1e-6)
    True
    """
    key = opacity.cache_key()
    tab = _CACHE.get(key)
    if tab is None:
        if len(_CACHE) >= _MAX_CACHED:
            _CACHE.pop(next(iter(_CACHE)))
        tab = _CACHE[key] = _build(opacity)
    return tab


def register_table(table: EmissionTable) -> None:
    """Put a table built elsewhere (e.g. shipped to a worker) into this process's cache."""
    if not isinstance(table, EmissionTable):
        raise InputError(f"register_table needs an EmissionTable, got {type(table).__name__}")
    _CACHE[table.key] = table
