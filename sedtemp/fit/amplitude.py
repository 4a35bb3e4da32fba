"""The linear amplitude of an SED model: its marginal and its conditional draws.

For a model S = A g(T, beta) and Gaussian photometry, the likelihood at fixed
(T, beta) is exp(-chi2_min / 2) exp(-(A - mu)^2 / (2 s^2)), with the
conditional best amplitude mu = g^T C^-1 F / a and s = a^-1/2,
a = g^T C^-1 g. Integrating A against the amplitude prior is then a 1-D
problem per (source, node), solved here vectorised over all of them:

- :class:`UniformLinearAmplitude` (prior uniform in A): closed form,
  sqrt(2 pi) s [Phi((A_hi - mu)/s) - Phi((A_lo - mu)/s)] / (A_hi - A_lo).
- :class:`LogUniformLinearAmplitude` (prior uniform in log10 A, the default):
  J = int exp(-(A - mu)^2 / 2 s^2) dA / A. For m = mu / s >= 16 with both
  bounds > 10 s away, the asymptotic series
  J = sqrt(2 pi) (s / mu) sum_k (2k - 1)!! m^(-2k) (k <= 6), truncation
  error < 2e-12 relative; otherwise Gauss-Legendre quadrature on two panels
  (16 nodes in ln A near A -> 0, where the integrand is flat in ln A; 32
  nodes in A over the Gaussian core), agreement with adaptive quadrature
  better than 1e-7 relative (tests/test_fit.py).

Draws of A given a node follow the same prior: inverse-CDF sampling (uniform
prior) or rejection from the conditional Gaussian with an inverse-CDF
fallback on a 129-node table (log-uniform prior).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike
from scipy.special import log_ndtr, ndtr, ndtri

from ..errors import InputError
from ..priors import LogUniformAmplitude, UniformAmplitude

if TYPE_CHECKING:
    from ..priors import _Prior1D

__all__ = [
    "LogUniformLinearAmplitude",
    "UniformLinearAmplitude",
    "amplitude_marginal",
    "quadrature_nodes",
]

_LOG_SQRT_2PI = 0.5 * np.log(2.0 * np.pi)
_LN10 = np.log(10.0)
#: Conditional sd either side of mu that the quadrature covers: the Gaussian
#: beyond it carries < 1e-22 of the mass.
_SPAN = 10.0
#: m = mu / s from which the asymptotic series is used: with 24 terms its
#: truncation error is below 47!! / 7^48 ~ 1e-11 relative.
_REGULAR_M = 7.0
#: (2k - 1)!! for k = 1..24: the series coefficients of E[1 / (1 + r t)], t ~ N(0, 1).
_SERIES = np.cumprod(np.arange(1.0, 48.0, 2.0))
#: m from which rejection sampling is used (acceptance >= 1 - 8 / 16 per round).
_REJECT_M = 16.0
#: Below m = 7: K(m) = int_c^inf exp(-(x - m)^2 / 2) dx / x (x = A / s) is tabulated
#: once, as kappa(m) = ln K + m^2 / 2 on a 0.002 grid (linear interpolation error
#: ~ h^2 kappa'' / 8 < 1e-7), and the part below c is
#: exp(-m^2 / 2) [ln(c / x_lo) + m (c - x_lo)] (next term ~ m^2 c^2 / 4 < 2e-5 of it).
_TAB_C = 1e-3
_TAB_M = np.arange(-40.0, _REGULAR_M + 0.01, 0.002)
_GL_U = np.polynomial.legendre.leggauss(16)
_GL_A = np.polynomial.legendre.leggauss(32)
#: Rejection rounds before the inverse-CDF fallback (acceptance >= 0.5 per round).
_ROUNDS = 6
_TRUNC = 8.0
_TABLE = 129


def quadrature_nodes(mu: ArrayLike, s: ArrayLike, a_lo: float, a_hi: float) -> tuple[np.ndarray, np.ndarray]:
    """Nodes and log weights for int h(A) dA / A over [a_lo, a_hi].

    Parameters
    ----------
    mu, s : ndarray, same shape (...)
        Centre and width (same unit as the bounds) of the integrand's Gaussian core.
    a_lo, a_hi : float
        Prior bounds of the linear amplitude, 0 < a_lo < a_hi.

    Returns
    -------
    A, log_w : ndarray (..., 48)
        Nodes and log weights, so that int h dA / A ~= sum exp(log_w) h(A).
    """
    mu, s = np.broadcast_arrays(np.asarray(mu, float), np.asarray(s, float))
    top = np.minimum(a_hi, np.maximum(mu, a_lo) + _SPAN * s)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        # (an infinite decay or rise scale only ever enters through np.minimum with s)
        # data that want A below the lower bound: the integrand decays from a_lo
        # on the scale s^2 / (a_lo - mu)
        decay = np.where(mu < a_lo, s * s / np.maximum(a_lo - mu, 1e-300), s)
        top = np.where(mu < a_lo, np.minimum(a_hi, a_lo + _SPAN * np.minimum(s, decay)), top)
        bottom = np.maximum(a_lo, mu - _SPAN * s)
        # ... or above the upper bound: it rises towards a_hi on s^2 / (mu - a_hi)
        rise = s * s / np.maximum(mu - a_hi, 1e-300)
        beyond = bottom >= top
        bottom = np.where(beyond, np.maximum(a_lo, a_hi - _SPAN * np.minimum(s, rise)), bottom)
        top = np.where(beyond, a_hi, top)
    c = np.clip(top / 30.0, bottom, top)
    xu, wu = _GL_U
    xa, wa = _GL_A
    lu0, lu1 = np.log(bottom)[..., None], np.log(c)[..., None]
    u = 0.5 * (lu0 + lu1) + 0.5 * (lu1 - lu0) * xu
    a0, a1 = c[..., None], top[..., None]
    A2 = 0.5 * (a0 + a1) + 0.5 * (a1 - a0) * xa
    A = np.concatenate([np.exp(u), A2], axis=-1)
    with np.errstate(divide="ignore"):
        lw = np.concatenate([np.log(0.5 * (lu1 - lu0) * wu), np.log(0.5 * (a1 - a0) * wa) - np.log(A2)],
                            axis=-1)
    return A, lw


def _kappa_table():
    mu = _TAB_M
    A, lw = quadrature_nodes(mu, np.ones_like(mu), _TAB_C, 1e300)
    lh = -0.5 * (A - mu[:, None]) ** 2
    return _logsumexp(lw + lh) + 0.5 * mu**2


def _logsumexp(x, axis=-1):
    top = np.max(x, axis=axis, keepdims=True)
    top = np.where(np.isfinite(top), top, 0.0)
    with np.errstate(divide="ignore"):
        return np.log(np.sum(np.exp(x - top), axis=axis)) + top[..., 0]


class UniformLinearAmplitude:
    """Amplitude prior uniform in the linear amplitude A on [10^low, 10^high]."""

    n_uniform = 1

    def __init__(self, prior):
        self.prior = prior
        self.a_lo, self.a_hi = 10.0**prior.low, 10.0**prior.high

    def log_integral(self, mu: np.ndarray, s: np.ndarray, relevant: np.ndarray | None = None) -> np.ndarray:
        """log int exp(-(A - mu)^2 / 2 s^2) p(A) dA, elementwise; p the normalised prior (closed form)."""
        hi, lo = (self.a_hi - mu) / s, (self.a_lo - mu) / s
        out = _LOG_SQRT_2PI + np.log(s) - np.log(self.a_hi - self.a_lo)
        near = (hi < 8.0) | (lo > -8.0)  # mass inside the bounds is ~1 unless within 8 sd
        if np.any(near):
            lhi, llo = log_ndtr(hi[near]), log_ndtr(lo[near])
            with np.errstate(divide="ignore"):
                out[near] += lhi + np.log(-np.expm1(np.minimum(llo - lhi, -1e-300)))
        return out

    def draw(self, mu: np.ndarray, s: np.ndarray, uni: np.ndarray) -> np.ndarray:
        """Draws of A given the node, from uniforms ``uni`` (..., n_uniform)."""
        lo, hi = ndtr((self.a_lo - mu) / s), ndtr((self.a_hi - mu) / s)
        p = np.clip(lo + uni[..., 0] * (hi - lo), 1e-300, 1 - 1e-16)
        return np.clip(mu + s * ndtri(p), self.a_lo, self.a_hi)


class LogUniformLinearAmplitude(UniformLinearAmplitude):
    """Amplitude prior uniform in log10 A on [low, high] (p(A) ∝ 1 / A), the default."""

    n_uniform = 2 * _ROUNDS + 1

    def __init__(self, prior):
        super().__init__(prior)
        self._log_norm = np.log(_LN10 * (prior.high - prior.low))

    _kappa = None

    def _regular(self, mu, s, m_min=_REGULAR_M):
        # the series integrates A over (0, inf): a lower bound below c s (or
        # 10 s below mu) and an upper bound 10 s above mu change it by < 1e-10
        low_far = (mu - _SPAN * s > self.a_lo) | (self.a_lo < _TAB_C * s)
        return (mu >= m_min * s) & low_far & (mu + _SPAN * s < self.a_hi)

    def _tabulated(self, mu, s):
        """log J from the K(m) table for m < 7 with x_lo < c and the upper bound far."""
        if LogUniformLinearAmplitude._kappa is None:
            LogUniformLinearAmplitude._kappa = _kappa_table()
        m = mu / s
        x_lo = self.a_lo / s
        kap = np.interp(m, _TAB_M, LogUniformLinearAmplitude._kappa)
        low = np.log(_TAB_C / x_lo) + m * (_TAB_C - x_lo)
        return -0.5 * m * m + np.log(np.exp(kap) + low)

    def log_integral(self, mu: ArrayLike, s: ArrayLike, relevant: np.ndarray | None = None) -> np.ndarray:
        """log int exp(-(A - mu)^2 / 2 s^2) dA / (A ln10 (high - low)), elementwise.

        ``relevant`` (bool, same shape): entries whose value matters; the others
        (nodes > e^-40 below a source's peak) get the leading-order value
        log(sqrt(2 pi) s / max(mu, s)), finite and within a few units of the truth.
        """
        mu, s = np.broadcast_arrays(np.asarray(mu, float), np.asarray(s, float))
        if relevant is not None:
            out = _LOG_SQRT_2PI + np.log(s) - np.log(np.maximum(mu, s)) - self._log_norm
            if relevant.any():
                out[relevant] = self.log_integral(mu[relevant], s[relevant])
            return out
        out = np.empty(mu.shape)
        reg = self._regular(mu, s)
        r2 = (s[reg] / mu[reg]) ** 2
        # 8 terms suffice from m = 12 (next term 17!! / 12^18 ~ 1e-12); 24 below
        few = r2 < 1.0 / 144.0
        series = np.zeros_like(r2)
        for c in _SERIES[7::-1]:  # Horner
            series = r2 * (c + series)
        if not few.all():
            r2m = r2[~few]
            sm = np.zeros_like(r2m)
            for c in _SERIES[::-1]:
                sm = r2m * (c + sm)
            series[~few] = sm
        out[reg] = _LOG_SQRT_2PI + 0.5 * np.log(r2) + np.log1p(series)
        tab = ~reg & (mu < _REGULAR_M * s) & (mu > -40.0 * s) & (self.a_lo < _TAB_C * s) & (np.maximum(mu, 0) + _SPAN * s < self.a_hi)
        if tab.any():
            out[tab] = self._tabulated(mu[tab], s[tab])
        irr = ~reg & ~tab
        if irr.any():
            A, lw = quadrature_nodes(mu[irr], s[irr], self.a_lo, self.a_hi)
            lh = -0.5 * ((A - mu[irr][..., None]) / s[irr][..., None]) ** 2
            out[irr] = _logsumexp(lw + lh)
        return out - self._log_norm

    def draw(self, mu: ArrayLike, s: ArrayLike, uni: np.ndarray) -> np.ndarray:
        """Draws of A given the node (conditional ∝ N(A; mu, s) / A), from uniforms (..., n_uniform)."""
        mu, s = np.broadcast_arrays(np.asarray(mu, float), np.asarray(s, float))
        out = np.full(mu.shape, np.nan)
        reg = self._regular(mu, s, _REJECT_M)
        m = np.where(reg, mu / s, np.inf)
        plo, phi = ndtr(-_TRUNC), ndtr(_TRUNC)
        # a fixed number of rounds, so each draw uses fixed random numbers; a
        # round is computed only for the draws still pending (most accept in the first)
        todo = np.flatnonzero(reg)
        mu_f, s_f, m_f, out_f = mu.ravel(), s.ravel(), m.ravel(), out.reshape(-1)
        uni_f = uni.reshape(-1, uni.shape[-1])
        for k in range(_ROUNDS):
            if not todo.size:
                break
            t = ndtri(plo + uni_f[todo, 2 * k] * (phi - plo))
            accept = uni_f[todo, 2 * k + 1] * (1.0 + t / m_f[todo]) < 1.0 - _TRUNC / m_f[todo]
            hit = todo[accept]
            out_f[hit] = mu_f[hit] + s_f[hit] * t[accept]
            todo = todo[~accept]
        rest = ~reg.ravel()
        rest[todo] = True  # rejected in every round: the inverse-CDF fallback
        rest = rest.reshape(mu.shape)
        if rest.any():
            out[rest] = self._inverse_cdf(mu[rest], s[rest], uni[..., -1][rest])
        return np.clip(out, self.a_lo, self.a_hi)

    def _inverse_cdf(self, mu, s, u):
        """Inverse-CDF draws from a 129-node table in ln A (first 32 in ln A, then linear in A)."""
        A, _ = quadrature_nodes(mu, s, self.a_lo, self.a_hi)
        lo, hi = A.min(axis=-1), A.max(axis=-1)
        c = np.clip(hi / 30.0, lo, hi)
        lu = np.concatenate([np.linspace(np.log(lo), np.log(c), 32, axis=-1),
                             np.log(np.linspace(c, hi, _TABLE - 31, axis=-1)[..., 1:])], axis=-1)
        grid = np.exp(lu)
        lh = -0.5 * ((grid - mu[..., None]) / s[..., None]) ** 2  # density per unit ln A
        dens = np.exp(lh - lh.max(axis=-1, keepdims=True))
        cdf = np.concatenate([np.zeros((*mu.shape, 1)),
                              np.cumsum(0.5 * (dens[..., 1:] + dens[..., :-1]) * np.diff(lu, axis=-1), axis=-1)],
                             axis=-1)
        cdf /= cdf[..., -1:]
        k = np.clip(np.sum(cdf < u[..., None], axis=-1) - 1, 0, _TABLE - 2)
        c0 = np.take_along_axis(cdf, k[..., None], -1)[..., 0]
        c1 = np.take_along_axis(cdf, k[..., None] + 1, -1)[..., 0]
        l0 = np.take_along_axis(lu, k[..., None], -1)[..., 0]
        l1 = np.take_along_axis(lu, k[..., None] + 1, -1)[..., 0]
        t = np.clip((u - c0) / np.where(c1 > c0, c1 - c0, 1.0), 0.0, 1.0)
        return np.exp(l0 + t * (l1 - l0))


def amplitude_marginal(prior: _Prior1D) -> UniformLinearAmplitude:
    """The marginalisation strategy for an amplitude prior (on log10 A).

    Raises
    ------
    InputError
        For an amplitude prior other than LogUniformAmplitude or UniformAmplitude.
    """
    if isinstance(prior, LogUniformAmplitude):
        return LogUniformLinearAmplitude(prior)
    if isinstance(prior, UniformAmplitude):
        return UniformLinearAmplitude(prior)
    raise InputError(
        f"the amplitude is marginalised on a grid of (T, beta) only for a LogUniformAmplitude "
        f"(default) or UniformAmplitude prior, got {prior!r}; use one of those"
    )
