"""Shared numerics below every module that uses them: quadrature weights."""

from __future__ import annotations

import numpy as np

__all__ = ["trapezoid_weights", "log_trapezoid_weights"]


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
