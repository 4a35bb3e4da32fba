"""Emitted power of an opacity law, P(T, beta) = 4 pi int kappa_nu(beta) B_nu(T) dnu, tabulated once.

The emitted power per unit mass is a property of the opacity alone. It is
tabulated once per process and opacity (:func:`emission_table`, cached by
:meth:`sedtemp.opacity.Opacity.cache_key`) as ln P on a grid in ln T and
beta, interpolated by a bicubic spline, and inverted (the temperature that
emits a given power) by Newton's method on that spline, from a first guess
read off the table inverted per beta node. The spline is evaluated as one
bicubic polynomial per knot cell (:class:`_CellPolynomials`: value and
derivatives from one gather of 16 coefficients per point). The equilibrium
predictor and the comparison use this one implementation.

The exact analytic result for a pure power law, kept as the reference the
tests check against, is :func:`powerlaw_emitted_power`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike
from scipy.interpolate import BSpline, RectBivariateSpline

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
_DLNT = 0.05  # node spacing in ln T
_DBETA = 0.025  # node spacing in beta
_DLNP = 0.1  # node spacing in ln P of the inverted table (first guesses only)
_NEWTON_TOL = 1e-10  # estimated error in ln T after the last Newton step
_MAX_NEWTON = 30
_BETA_MARGIN = 0.2  # nodes beyond BETA_RANGE so the spline is interior everywhere
# emission quadrature: log-spaced nodes from 1e7 Hz (3 m) to 3e16 Hz (10 nm) and just beyond,
# 14 per ln T step of the table (6105 nodes, ~0.0036 apart in ln nu), enough for every T of the
# table (trapezoid in ln nu, checked against quad); on this lattice nu / T takes one value per
# (nu index - 14 T index), so B_nu(T) = T^3 B_(nu/T)(1 K) is evaluated once per value
_NU_EMIT_RANGE_HZ = (1e7, 3e16)
_NU_PER_T_STEP = 14
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


class _CellPolynomials:
    """A bicubic ``RectBivariateSpline`` as one polynomial per knot cell, evaluated at scattered points.

    The spline is the same piecewise polynomial either way; here the 4 x 4
    power-basis coefficients of every cell (in the offsets from the cell's
    lower corner) are computed once, exactly, from the B-spline coefficients
    (the derivatives at the cell corners, :class:`scipy.interpolate.BSpline`),
    so an evaluation is an index computation per axis (the data nodes are
    evenly spaced), one gather of 16 coefficients and two Horner schemes,
    with the first and second derivatives in x from the same gather. Agrees with ``RectBivariateSpline.ev`` to rounding
    (tests/test_compare_speed_paths.py checks 1e-12). Points outside the
    knot span use the end cells' polynomials; callers clip them first.
    """

    def __init__(self, spline: RectBivariateSpline, x_nodes: np.ndarray, y_nodes: np.ndarray) -> None:
        tx, ty, c = spline.tck
        nx, ny = tx.size - 4, ty.size - 4
        if tuple(spline.degrees) != (3, 3):
            raise ValueError("_CellPolynomials needs a bicubic spline")
        self.bx, self.by = np.unique(tx), np.unique(ty)  # cell edges (the distinct knots)
        self.ncx, self.ncy = self.bx.size - 1, self.by.size - 1
        fact = (1.0, 1.0, 2.0, 6.0)
        # along x: a_p(cell, j) = (d/dx)^p sum_i c_ij B_i(x) / p! at each cell's lower edge
        sx = BSpline(tx, c.reshape(nx, ny), 3)
        ax = np.empty((ny, self.ncx, 4))  # laid out as the coefficients of the splines in y
        for p in range(4):
            ax[:, :, p] = sx(self.bx[:-1], nu=p).T / fact[p]
        # along y: the same for every (x cell, p), with the a_p as B-spline coefficients in y
        sy = BSpline(ty, ax, 3)
        coef = np.empty((self.ncx, self.ncy, 4, 4))  # (x cell, y cell, power of x, power of y)
        for q in range(4):
            coef[:, :, :, q] = sy(self.by[:-1], nu=q).transpose(1, 0, 2) / fact[q]
        self.coef = coef.reshape(self.ncx * self.ncy, 16)
        # the data nodes are evenly spaced and the cells are unions of node intervals (an
        # interpolating spline's knots are data nodes), so a point's cell is found by arithmetic
        self._x = self._locator(x_nodes, self.bx)
        self._y = self._locator(y_nodes, self.by)

    @staticmethod
    def _locator(nodes, edges):
        """(first node, node step, cell of each node interval) for evenly spaced ``nodes``."""
        step = (nodes[-1] - nodes[0]) / (nodes.size - 1)
        if not np.allclose(np.diff(nodes), step, rtol=1e-9, atol=0):
            raise ValueError("_CellPolynomials needs evenly spaced data nodes")
        mid = nodes[:-1] + 0.5 * step
        return float(nodes[0]), float(step), np.clip(np.searchsorted(edges, mid) - 1, 0, edges.size - 2)

    @staticmethod
    def _cell(x, locator):
        first, step, cell_of = locator
        # truncation is the floor for the clipped, non-negative values; a point on a node may
        # land in either neighbouring cell, whose polynomials agree there (the spline is C2);
        # fmin / fmax map NaN to a valid cell (the value stays NaN)
        i = np.fmax(np.fmin((x - first) / step, cell_of.size - 1), 0).astype(np.intp)
        return cell_of[i]

    def __call__(self, x: np.ndarray, y: np.ndarray, *, derivs: int = 0) -> tuple[np.ndarray, ...]:
        """(value,) at the 1-D points (x, y), then d/dx and d^2/dx^2 up to order ``derivs`` (0-2)."""
        ix, iy = self._cell(x, self._x), self._cell(y, self._y)
        u, v = x - self.bx[ix], (y - self.by[iy])[:, None]
        c = np.take(self.coef, ix * self.ncy + iy, axis=0).reshape(-1, 4, 4)  # (n, powers of u, powers of v)
        c0, c1, c2, c3 = (((c[:, :, 3] * v + c[:, :, 2]) * v + c[:, :, 1]) * v + c[:, :, 0]).T  # Horner in v
        out: tuple[np.ndarray, ...] = (((c3 * u + c2) * u + c1) * u + c0,)
        if derivs >= 1:
            out += ((3 * c3 * u + 2 * c2) * u + c1,)
        if derivs >= 2:
            out += (6 * c3 * u + 2 * c2,)
        return out


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
    0.05 apart in ln T and 0.025 in beta. For a power law ln P is linear in
    ln T and the relative error of P is below 1e-7 (of the inverted T below
    1e-8). For UV-capped and tabulated opacities the error comes from beta:
    where the cap's break crosses the Planck peak (T > 2000 K) ln P bends
    sharply in beta, and nodes 0.05 apart in beta missed 1e-5 in T there;
    now the inverted T is within ~1.5e-6 of direct integration (measured;
    the tests check 1e-5), the ln T spacing adding < 3e-7 in P. The
    inversion finds the spline's root to ~1e-10 in ln T. tests/test_emission.py
    and tests/test_compare_speed_paths.py check P and T against
    scipy.integrate.quad and, for a power law, against the exact result.
    """

    key: tuple
    ln_t: np.ndarray
    beta: np.ndarray
    ln_p: np.ndarray
    _spline: RectBivariateSpline | None = field(default=None, repr=False)
    _cells: _CellPolynomials | None = field(default=None, repr=False)
    _guess: tuple | None = field(default=None, repr=False)

    def __getstate__(self):
        state = dict(self.__dict__)
        state["_spline"] = state["_cells"] = state["_guess"] = None  # rebuilt on first use: only the grid is shipped
        return state

    @property
    def spline(self) -> RectBivariateSpline:
        if self._spline is None:
            self._spline = RectBivariateSpline(self.ln_t, self.beta, self.ln_p, kx=3, ky=3, s=0)
        return self._spline

    @property
    def cells(self) -> _CellPolynomials:
        """:attr:`spline` as one polynomial per knot cell: the fast evaluator of the same function."""
        if self._cells is None:
            self._cells = _CellPolynomials(self.spline, self.ln_t, self.beta)
        return self._cells

    def _ln_power(self, lnt, b, derivs=1):
        """(ln P, d ln P / d ln T[, d^2 ln P / d ln T^2]) at (ln T, beta), linear in ln T beyond the table.

        The second derivative is the spline's at the nearest table edge beyond
        the table (0 would hide the kink there from Newton's error estimate).
        """
        x = np.clip(lnt, self.ln_t[0], self.ln_t[-1])
        val, *der = self.cells(x, b, derivs=max(derivs, 1))
        return (val + der[0] * (lnt - x), *der[:derivs])

    def power(self, temperature_k: ArrayLike, beta: ArrayLike) -> np.ndarray:
        """P(T, beta) in W kg^-1 (broadcasting; T in K, >= 0)."""
        t, b = np.broadcast_arrays(np.asarray(temperature_k, float), np.asarray(beta, float))
        with np.errstate(divide="ignore"):
            lnt = np.where(t > 0, np.log(np.where(t > 0, t, 1.0)), 0.0).ravel()
        b = b.ravel()
        (out,) = self.cells(np.clip(lnt, self.ln_t[0], self.ln_t[-1]), b)
        far = (lnt < self.ln_t[0]) | (lnt > self.ln_t[-1])
        if far.any():  # beyond the table: linear in ln T with the end slope
            out[far] = self._ln_power(lnt[far], b[far])[0]
        return np.where(t > 0, np.exp(out).reshape(t.shape), 0.0)

    def _guess_table(self):
        """(ln P of the first row, its step, ln T (n_P, n_beta)): the table inverted per beta node.

        Column k is ln T at ln P = y0 + j dy by linear interpolation between
        the table's own nodes of beta node k (monotone, since ln P increases
        with T), continued linearly with the end segments; built in one
        search over all columns at once (each column offset above the last).
        """
        if self._guess is None:
            lnp, n_t = self.ln_p.T, self.ln_t.size  # (n_beta, n_T), increasing along each row
            y0, y1 = lnp[:, 0].min(), lnp[:, -1].max()
            y = y0 + _DLNP * np.arange(int(np.ceil((y1 - y0) / _DLNP)) + 1)
            off = (y1 - y0 + 1.0) * np.arange(self.beta.size)[:, None]  # separates the columns
            i = np.searchsorted((lnp + off).ravel(), (off + y).ravel()).reshape(off.size, y.size)
            i = np.clip(i - n_t * np.arange(self.beta.size)[:, None], 1, n_t - 1)
            rows = np.arange(self.beta.size)[:, None]
            lo, hi = lnp[rows, i - 1], lnp[rows, i]
            lnt = self.ln_t[i - 1] + (y - lo) * (self.ln_t[1] - self.ln_t[0]) / (hi - lo)
            self._guess = (float(y0), _DLNP, np.ascontiguousarray(lnt.T))
        return self._guess

    def _first_guess(self, lnp, b):
        """ln T from :meth:`_guess_table`, bilinear in (ln P, beta): within ~1e-4 of the spline's root."""
        y0, dy, tab = self._guess_table()
        fy = (lnp - y0) / dy
        fb = (b - self.beta[0]) / (self.beta[1] - self.beta[0])
        # cells by fmin / fmax, which map a NaN to a valid index (the result stays NaN)
        j = np.fmax(np.fmin(np.floor(fy), tab.shape[0] - 2), 0).astype(np.intp)
        k = np.fmax(np.fmin(np.floor(fb), self.beta.size - 2), 0).astype(np.intp)
        fy, fb = fy - j, fb - k  # fy outside [0, 1] beyond the grid: linear continuation
        with np.errstate(invalid="ignore"):  # an infinite power: inf - inf, NaN, as before
            lo = tab[j, k] + fy * (tab[j + 1, k] - tab[j, k])
            hi = tab[j, k + 1] + fy * (tab[j + 1, k + 1] - tab[j, k + 1])
            return lo + fb * (hi - lo)

    def temperature(self, power: ArrayLike, beta: ArrayLike) -> np.ndarray:
        """The T (K) with P(T, beta) = ``power`` (W kg^-1, >= 0); 0 where the power is 0.

        A first guess from the table inverted per beta node (linear in ln P
        and beta; within ~1e-4 in ln T), then one Newton step in ln T on the
        forward spline, and more only where that step's own error estimate,
        abs(d2 ln P / (2 d ln P)) step^2 (Newton's quadratic convergence), is
        above 1e-10; the remaining error is then < ~1e-10 in ln T.
        """
        p, b = np.broadcast_arrays(np.asarray(power, float), np.asarray(beta, float))
        shape = p.shape
        p, b = p.ravel(), b.ravel()
        pos = p > 0
        lnp = np.log(np.where(pos, p, 1.0))
        x = self._first_guess(lnp, b)
        todo = np.flatnonzero(pos)
        for _ in range(_MAX_NEWTON):
            if not todo.size:
                break
            val, slope, curv = self._ln_power(x[todo], b[todo], derivs=2)
            step = (val - lnp[todo]) / slope
            x[todo] -= step
            with np.errstate(invalid="ignore"):  # a NaN power gives NaN and leaves the loop
                todo = todo[0.5 * np.abs(curv / slope) * step**2 > _NEWTON_TOL]
        return np.where(pos, np.exp(x), 0.0).reshape(shape)


def _planck_lattice(ln_t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(nu (Hz), B_nu(T) (n_T, n_nu)) on the emission quadrature's nodes, for the evenly spaced ``ln_t``.

    The nodes are ln nu_i = ln nu_lo + i d with d the ln T step over
    :data:`_NU_PER_T_STEP`, so ln(nu_i / T_j) = ln(nu_lo / T_0) + (i - r j) d:
    B_nu(T) = T^3 B_(nu/T)(1 K) (exact: B depends on nu and T through nu^3 and
    h nu / k T) is one row of values g read at offset r (n_T - 1 - j) for row j,
    a strided view scaled by T_j^3.
    """
    r, n_t = _NU_PER_T_STEP, ln_t.size
    step = (ln_t[-1] - ln_t[0]) / (n_t - 1) / r
    lo, hi = np.log(_NU_EMIT_RANGE_HZ)
    ln_nu = lo + step * np.arange(int(np.ceil((hi - lo) / step)) + 1)
    # g[k] = B at nu / T = exp(ln nu_lo - ln T_0 + (k - r (n_T - 1)) d), 1 K
    g = _planck_nu_si(np.exp(lo - ln_t[0] + step * np.arange(-r * (n_t - 1), ln_nu.size)), 1.0)
    # row j starts at r (n_T - 1 - j); copied first (ufuncs on the strided view are slow), then scaled
    bnu = np.ascontiguousarray(np.lib.stride_tricks.sliding_window_view(g, ln_nu.size)[::r][::-1])
    bnu *= np.exp(3 * ln_t)[:, None]
    # values below 1e-280 (x = h nu / k T near 700, 250 decades under any row's peak) add nothing
    # to the integrals but are subnormal or near it, which slows the matrix product
    bnu[bnu < 1e-280] = 0.0
    return np.exp(ln_nu), bnu


def _build(opacity) -> EmissionTable:
    lo_t, hi_t = np.log(T_TABLE_RANGE_K[0]), np.log(T_TABLE_RANGE_K[1])
    ln_t = np.linspace(lo_t, hi_t, round((hi_t - lo_t) / _DLNT) + 1)
    b_lo, b_hi = BETA_RANGE[0] - _BETA_MARGIN, BETA_RANGE[1] + _BETA_MARGIN
    beta = np.linspace(b_lo, b_hi, round((b_hi - b_lo) / _DBETA) + 1)
    nu, bnu = _planck_lattice(ln_t)  # (n_nu,), (n_T, n_nu)
    w = 4 * np.pi * log_trapezoid_weights(nu)
    kw = opacity.kappa_si(nu[None, :], beta[:, None]) * w  # (n_beta, n_nu)
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
