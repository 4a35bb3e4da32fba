"""Shared numerics below every module that uses them: quadrature weights, bicubic splines."""

from __future__ import annotations

import numpy as np

__all__ = ["TensorSpline", "trapezoid_weights", "log_trapezoid_weights"]


def trapezoid_weights(x: np.ndarray) -> np.ndarray:
    """Weights ``t`` with ``sum(t * f) ==`` the trapezoid integral of ``f`` on the sorted nodes ``x``.

    Parameters
    ----------
    x : ndarray, shape (n,)
        Increasing nodes.

    Returns
    -------
    ndarray, shape (n,)

    Examples
    --------
    >>> trapezoid_weights(np.array([0.0, 1.0, 3.0]))
    array([0.5, 1.5, 1. ])
    """
    x = np.asarray(x, dtype=float)
    dx = np.diff(x)
    t = np.zeros_like(x)
    t[:-1] += 0.5 * dx
    t[1:] += 0.5 * dx
    return t


def log_trapezoid_weights(nu: np.ndarray) -> np.ndarray:
    """Weights ``w`` with ``sum(w * f) ~= int f dnu`` by the trapezoid rule in ln nu.

    ``int f dnu = int f nu dln(nu)``: the trapezoid weights in ln nu times nu.
    Suited to log-spaced grids spanning decades.

    Parameters
    ----------
    nu : ndarray, shape (n,)
        Increasing positive nodes.

    Returns
    -------
    ndarray, shape (n,)
    """
    nu = np.asarray(nu, dtype=float)
    return trapezoid_weights(np.log(nu)) * nu


def _basis(t: np.ndarray, k: int, x: np.ndarray, deriv: bool = False):
    """The k + 1 non-zero B-spline basis functions of degree k on knots t at points x.

    Cox-de Boor recursion, vectorised over the points (a loop over the degree only).

    Returns
    -------
    first : ndarray of int (n,)
        Index of the first non-zero basis function at each point.
    values : ndarray (n, k + 1)
    derivs : ndarray (n, k + 1) or None
        First derivatives (when ``deriv``).
    """
    n_coef = t.size - k - 1
    left = np.clip(np.searchsorted(t, x, side="right") - 1, k, n_coef - 1)
    vals = np.ones((x.size, 1))
    prev = vals
    for j in range(1, k + 1):
        i = left[:, None] - j + np.arange(j + 1)  # basis functions N_{i,j}, i = left - j .. left
        with np.errstate(divide="ignore", invalid="ignore"):
            d1 = t[i + j] - t[i]
            d2 = t[i + j + 1] - t[i + 1]
            a = np.where(d1 > 0, (x[:, None] - t[i]) / d1, 0.0)
            b = np.where(d2 > 0, (t[i + j + 1] - x[:, None]) / d2, 0.0)
        lo = np.concatenate([np.zeros((x.size, 1)), vals], axis=1)  # N_{i, j-1}
        hi = np.concatenate([vals, np.zeros((x.size, 1))], axis=1)  # N_{i+1, j-1}
        prev = vals
        vals = a * lo + b * hi
    if not deriv:
        return left - k, vals, None
    i = left[:, None] - k + np.arange(k + 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        d1 = t[i + k] - t[i]
        d2 = t[i + k + 1] - t[i + 1]
        lo = np.concatenate([np.zeros((x.size, 1)), prev], axis=1)
        hi = np.concatenate([prev, np.zeros((x.size, 1))], axis=1)
        der = k * (np.where(d1 > 0, lo / d1, 0.0) - np.where(d2 > 0, hi / d2, 0.0))
    return left - k, vals, der


class TensorSpline:
    """Several bivariate tensor-product splines on shared knots, evaluated together at scattered points.

    Built from scipy ``RectBivariateSpline`` objects (their knots and
    coefficients); evaluation is the same piecewise polynomial
    (agreement with ``RectBivariateSpline.ev`` to rounding, tested) but
    vectorised over points *and* splines: the basis functions are computed
    once per point and the (k + 1)^2 coefficients of every spline are
    gathered in one indexing operation, instead of one FITPACK call per
    spline. Points outside the knot span are evaluated with the end
    polynomial pieces; callers clip them first.

    Parameters
    ----------
    splines : sequence of scipy.interpolate.RectBivariateSpline
        Same knots and degrees.
    """

    def __init__(self, splines) -> None:
        first = splines[0]
        self.kx, self.ky = first.degrees
        fitpack_tx, fitpack_ty = first.tck[:2]
        for s in splines[1:]:
            if not (np.array_equal(s.tck[0], fitpack_tx) and np.array_equal(s.tck[1], fitpack_ty)):
                raise ValueError("TensorSpline needs splines on the same knots")
        # full knot vectors (with the k + 1 repeated end knots), as FITPACK stores them
        self.tx, self.ty = np.asarray(fitpack_tx, float), np.asarray(fitpack_ty, float)
        self.ny_coef = self.ty.size - self.ky - 1
        self.coef = np.stack([np.asarray(s.tck[2], float) for s in splines], axis=-1)  # (nx_c * ny_c, n)

    def __call__(self, x: np.ndarray, y: np.ndarray, *, dx: bool = False):
        """Values (points..., n_splines) at (x, y), and d/dx too when ``dx``."""
        x, y = np.broadcast_arrays(np.asarray(x, float), np.asarray(y, float))
        shape = x.shape
        ix, bx, dbx = _basis(self.tx, self.kx, x.ravel(), deriv=dx)
        iy, by, _ = _basis(self.ty, self.ky, y.ravel())
        idx = ((ix[:, None] + np.arange(self.kx + 1))[:, :, None] * self.ny_coef
               + (iy[:, None] + np.arange(self.ky + 1))[:, None, :])
        c = self.coef[idx]  # (n, kx + 1, ky + 1, n_splines)
        cy = np.einsum("pabk,pb->pak", c, by)
        val = np.einsum("pa,pak->pk", bx, cy).reshape(*shape, -1)
        if not dx:
            return val
        return val, np.einsum("pa,pak->pk", dbx, cy).reshape(*shape, -1)

    def on_grids(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Values on one tensor grid per row: x (k, n), y (k, m) -> (k, n, m, n_splines).

        Per row, the basis functions are laid out densely over the few
        coefficients its grid touches, and the contraction is two batched
        matrix products (cost ~ k n m w, w the touched coefficients per axis).
        """
        x, y = np.asarray(x, float), np.asarray(y, float)
        k = x.shape[0]
        bx, ix0, wx = self._dense_basis(self.tx, self.kx, x)
        by, iy0, wy = self._dense_basis(self.ty, self.ky, y)
        nx_coef = self.tx.size - self.kx - 1
        c2 = self.coef.reshape(nx_coef, self.ny_coef, -1)
        rx = np.minimum(ix0[:, None] + np.arange(wx), nx_coef - 1)  # clipped rows get zero weight
        ry = np.minimum(iy0[:, None] + np.arange(wy), self.ny_coef - 1)
        sub = c2[rx[:, :, None], ry[:, None, :]]  # (k, wx, wy, n_s)
        n_s, m = sub.shape[-1], y.shape[1]
        # contract y first, (k, 1, m, wy) @ (k, wx, wy, n_s) -> (k, wx, m, n_s), then x in one
        # batched product whose result is already laid out (k, n, m, n_s): no transposed copy
        t1 = np.matmul(by[:, None], sub)
        return np.matmul(bx, t1.reshape(k, wx, m * n_s)).reshape(k, x.shape[1], m, n_s)

    @staticmethod
    def _dense_basis(t, deg, x):
        """Per row of x (k, n): dense basis (k, n, w) over coefficients first .. first + w - 1."""
        k, n = x.shape
        first, vals, _ = _basis(t, deg, x.ravel())
        first, vals = first.reshape(k, n), vals.reshape(k, n, deg + 1)
        row0 = first.min(axis=1)
        w = int((first.max(axis=1) - row0).max()) + deg + 1
        dense = np.zeros((k, n, w))
        cols = (first - row0[:, None])[:, :, None] + np.arange(deg + 1)
        np.put_along_axis(dense, cols, vals, axis=2)
        return dense, row0, w
