"""Exact grid posterior over (T, beta) with the amplitude marginalised analytically.

For a model S_nu = A * g_nu(T, beta) whose amplitude A enters linearly, the
band fluxes of every (T, beta) grid node are tabulated once per band set. For
each source and node the Gaussian likelihood is then quadratic in A, and the
integral over A (uniform prior on [A_lo, A_hi]) is closed-form:

    int L dA = exp(-chi2_min / 2) sqrt(2 pi / a) [Phi((A_hi - A*) sqrt a) - Phi((A_lo - A*) sqrt a)]

with a = g^T C^-1 g and A* = g^T C^-1 F / a. Every term is a matrix product
(sources x bands) @ (bands x nodes), so thousands of sources are done at once.

Calibration covariance (C = D + sum_g d_g^2 m_g m_g^T) depends on the model
flux; on the grid it is evaluated at each node's diagonal best-fit amplitude,
which is exact without calibration terms and accurate to O(d_g^2 / SNR) with
them. Limit-only bands enter as log Phi((L - A* g) / sigma_L) at A*.
"""

from __future__ import annotations

import warnings
import zlib

import numpy as np
from astropy.table import Table
from scipy.interpolate import CubicSpline, RectBivariateSpline
from scipy.special import log_ndtr, ndtr, ndtri

from ..errors import GridWarning, InputError
from ..likelihood import Calibration, calibrated_chi2
from ..priors import UniformAmplitude
from ._data import prepare, resolve_prior
from .summary import POOR_FIT_PPP, QUANTILES, trust_flags

__all__ = ["GridPosterior", "grid_posterior"]

_LOG_2PI = np.log(2.0 * np.pi)
_N_T_DEFAULT = 100
_N_BETA_DEFAULT = 60
#: Refinement factor of the spline-interpolated marginals used for quantiles.
_UPSAMPLE = 8
#: Log-density floor (relative to the peak) kept finite for the spline.
_LOG_FLOOR = -80.0
#: A marginal sd below this many cell widths (after zooming) is flagged
#: 'grid_too_coarse'. A cubic spline follows a near-quadratic log density
#: closely down to about a third of a cell per sd.
_COARSE = 0.3
#: A marginal sd below this many cell widths triggers a zoomed re-evaluation of
#: that source (the spline quantiles are good to ~0.3 cells; the margin is safety).
_REFINE = 0.5
#: In-cell jitter of the draws is scaled to at most this many posterior sd
#: (uniform jitter of width w adds w^2/12 to the variance: <= 2 % here).
_JITTER = 0.49
#: Zoom levels at most (a factor ~8 finer each): resolves S/N up to ~10^4.
_ZOOM_LEVELS = 3
#: Nodes per axis of a zoomed grid (window ~ +-5 sd: cells of ~0.4 sd, so the
#: uniform in-cell jitter of the draws adds ~1 % to the variance).
_ZOOM_NODES = 25
#: Half-width, in prior sd, of the beta grid when the beta prior is unbounded.
_UNBOUNDED_SPAN = 5.0


def _prior_sd(pr):
    if np.isfinite(pr.low) and np.isfinite(pr.high) and type(pr).__name__ == "Uniform":
        return (pr.high - pr.low) / np.sqrt(12.0)
    return float(np.std(pr.sample(np.random.default_rng(0), 20000)))


def _axis_nodes(pr, n, log):
    lo, hi = pr.low, pr.high
    if not np.isfinite(lo) or not np.isfinite(hi):
        m, s = getattr(pr, "mean", 0.0), getattr(pr, "sigma", 1.0)
        lo, hi = max(lo, m - _UNBOUNDED_SPAN * s), min(hi, m + _UNBOUNDED_SPAN * s)
    if log and lo > 0:
        return np.geomspace(lo, hi, n)
    return np.linspace(lo, hi, n)


def _node_widths(nodes, log):
    """Cell widths around each node (edges at midpoints, in log for log grids)."""
    x = np.log(nodes) if log else nodes
    mid = 0.5 * (x[1:] + x[:-1])
    edges = np.concatenate([[x[0]], mid, [x[-1]]])
    if log:
        edges = np.exp(edges)
    return edges, np.diff(edges)


class _BlockRandom:
    """Random numbers for a block of sources, from one Generator or one per source.

    With one Generator per source (a sequence), each source's draws depend on
    its own seed only, never on which block or worker it landed in.
    """

    def __init__(self, rng, n):
        if isinstance(rng, list | tuple):
            if len(rng) != n:
                raise InputError(f"got {len(rng)} random generators for {n} sources")
            self._gens = [np.random.default_rng(r) for r in rng]
        else:
            self._gens = None
            self._one = np.random.default_rng(rng)

    def _call(self, method, size):
        if self._gens is None:
            return getattr(self._one, method)(size=size)
        return np.stack([getattr(g, method)(size=size[1:]) for g in self._gens])

    def row(self, i):
        """The generator(s) to use for source ``i`` alone."""
        return [self._gens[i] if self._gens is not None else self._one]

    def uniform(self, size):
        return self._call("uniform", size)

    def standard_normal(self, size):
        return self._call("standard_normal", size)


class GridPosterior:
    """Tabulated model band fluxes and priors for grid posteriors of many sources.

    Parameters
    ----------
    bands : BandSet
    model : SEDModel, keyword-only
        A model with a linear amplitude and free parameters ``T`` (and
        optionally ``beta``) besides it.
    prior : Prior or mapping, keyword-only
        Priors on the model's parameters (default: ``model.default_prior()``);
        the amplitude prior must be :class:`~sedtemp.priors.UniformAmplitude`.
    calibration : Calibration, keyword-only
    T_nodes, beta_nodes : array_like, keyword-only
        Grid nodes (K; dimensionless). Default: 100 log-spaced T nodes and 60
        linear beta nodes across the prior support.
    """

    def __init__(self, bands, *, model, prior=None, calibration=None, T_nodes=None, beta_nodes=None):
        self.bands = bands
        self.model = model
        amp = model.amplitude_name
        names = tuple(model.param_names)
        free = [p for p in names if p != amp]
        if amp is None or free not in (["T"], ["T", "beta"]):
            raise InputError(
                f"grid mode needs a model with a linear amplitude and free T (and beta); "
                f"{type(model).__name__} has parameters {list(names)}; use the MCMC fitter"
            )
        prior = resolve_prior(model, prior)
        if not isinstance(prior[amp], UniformAmplitude):
            raise InputError(
                f"grid mode marginalises '{amp}' analytically and needs a UniformAmplitude prior "
                f"on it, got {prior[amp]!r}; use the MCMC fitter for other amplitude priors"
            )
        self.prior, self.names, self.amp_name = prior, names, amp
        self.has_beta = "beta" in names
        self.T_nodes = np.asarray(T_nodes if T_nodes is not None else _axis_nodes(prior["T"], _N_T_DEFAULT, True), float)
        if self.has_beta:
            bn = beta_nodes if beta_nodes is not None else _axis_nodes(prior["beta"], _N_BETA_DEFAULT, False)
            self.beta_nodes = np.asarray(bn, float)
        else:
            self.beta_nodes = np.array([np.nan])
        self._check_nodes()
        self._tabulate()
        cal = np.zeros((len(bands), 0)) if calibration is None else (
            calibration if isinstance(calibration, np.ndarray) else Calibration(calibration).matrix(bands.names)
            if not isinstance(calibration, Calibration) else calibration.matrix(bands.names))
        self._masks = (cal > 0).astype(float).T  # (k, nb)
        self._d2 = np.array([col[col > 0].max() ** 2 for col in cal.T]) if cal.shape[1] else np.zeros(0)

    def _check_nodes(self):
        for name, nodes in (("T", self.T_nodes), ("beta", self.beta_nodes if self.has_beta else None)):
            if nodes is None:
                continue
            if nodes.ndim != 1 or nodes.size < 3 or np.any(np.diff(nodes) <= 0):
                raise InputError(f"{name} grid nodes must be a strictly increasing 1-D array of >= 3 values")
            pr = self.prior[name]
            if nodes[0] < pr.low or nodes[-1] > pr.high:
                raise InputError(
                    f"{name} grid [{nodes[0]:g}, {nodes[-1]:g}] extends outside its prior support "
                    f"[{pr.low:g}, {pr.high:g}]"
                )
        self.T_edges, self._wT = _node_widths(self.T_nodes, self.T_nodes[0] > 0)
        if self.has_beta:
            self.beta_edges, self._wb = _node_widths(self.beta_nodes, False)
        else:
            self.beta_edges, self._wb = np.array([np.nan, np.nan]), np.ones(1)

    def _theta_nodes(self):
        tt, bb = np.meshgrid(self.T_nodes, self.beta_nodes, indexing="ij")
        cols = {"T": tt.ravel(), "beta": bb.ravel(), self.amp_name: np.zeros(tt.size)}
        return np.column_stack([cols[n] for n in self.names])

    def _tabulate(self, g=None):
        theta = self._theta_nodes()
        if g is None:
            nu = self.bands.nu_grid_hz
            g = self.bands.band_fluxes(self.model.template_si(nu, theta))  # (n_nodes, nb)
        valid = np.asarray(self.model.valid(theta), bool) & np.all(np.isfinite(g), axis=1)
        self._g = np.where(valid[:, None], g, 0.0)
        self._g2 = self._g**2
        lp = self.prior["T"].logpdf(theta[:, self.names.index("T")]) + np.log(np.repeat(self._wT, self._wb.size))
        if self.has_beta:
            lp = lp + self.prior["beta"].logpdf(theta[:, self.names.index("beta")]) + np.log(np.tile(self._wb, self._wT.size))
        self._log_node_prior = np.where(valid, lp, -np.inf)
        log_w = np.log(np.repeat(self._wT, self._wb.size) * np.tile(self._wb, self._wT.size))
        self._log_node_density = self._log_node_prior - log_w
        pa = self.prior[self.amp_name]
        self._a_lo, self._a_hi = 10.0**pa.low, 10.0**pa.high
        self._spline = None

    def _template_spline(self):
        """Cubic splines of ln(band flux) over (ln T, beta) nodes, built on first use."""
        if self._spline is None:
            lg = np.log(np.maximum(self._g, 1e-300)).reshape(*self.shape, -1)
            x = np.log(self.T_nodes)
            if self.has_beta:
                self._spline = [RectBivariateSpline(x, self.beta_nodes, lg[:, :, j]) for j in range(lg.shape[2])]
            else:
                self._spline = CubicSpline(x, lg[:, 0, :], axis=0)
        return self._spline

    def zoomed(self, T_range, beta_range=None, *, n_nodes=None):
        """A finer grid over a window, with band fluxes interpolated from this one.

        The band fluxes are smooth in (ln T, beta): a bicubic spline of their
        logarithm through the parent's nodes reproduces the model to ~1e-5
        relative (tested), far below photometric errors, at a tiny fraction
        of the cost of evaluating the model on new nodes.
        """
        n = _ZOOM_NODES if n_nodes is None else int(n_nodes)
        child = object.__new__(GridPosterior)
        child.__dict__.update(self.__dict__)
        # clipped to the parent's span: exp(log(x)) can exceed x in the last bit
        child.T_nodes = np.clip(np.geomspace(*T_range, n), self.T_nodes[0], self.T_nodes[-1])
        if self.has_beta:
            child.beta_nodes = np.clip(np.linspace(*beta_range, n), self.beta_nodes[0], self.beta_nodes[-1])
        child._check_nodes()
        spl = self._template_spline()
        x = np.log(child.T_nodes)
        if self.has_beta:
            lg = np.stack([s(x, child.beta_nodes).ravel() for s in spl], axis=1)
        else:
            lg = spl(x)
        child._tabulate(np.exp(lg))
        return child

    def column_names(self):
        """Names of the summary columns :meth:`summarise` returns."""
        names = [f"T_{k}" for k in QUANTILES]
        if self.has_beta:
            names += [f"beta_{k}" for k in QUANTILES] + ["T_beta_corr"]
        names += [f"{self.amp_name}_{k}" for k in QUANTILES] + ["T_map"]
        names += (["beta_map"] if self.has_beta else []) + [f"{self.amp_name}_map"]
        return names + ["chi2_map", "n_bands_used", "dof", "chi2_reduced", "ppp"]

    @property
    def shape(self):
        """(n_T, n_beta) grid shape."""
        return (self.T_nodes.size, self.beta_nodes.size)

    def log_posterior(self, flux, err, limit_only):
        """Unnormalised log posterior mass per node, and the conditional amplitude.

        Parameters
        ----------
        flux, err : ndarray (n_sources, n_bands), SI
            Missing bands have ``err = inf``.
        limit_only : ndarray of bool (n_sources, n_bands)

        Returns
        -------
        logp, a_hat, a_sd, chi2 : ndarray (n_sources, n_nodes)
            log posterior mass, amplitude mean and sd given the node, chi^2 at a_hat.
        """
        det = ~limit_only & np.isfinite(err)
        iv = np.where(det, 1.0 / np.where(np.isfinite(err), err, 1.0) ** 2, 0.0)
        F = np.where(det, flux, 0.0)
        g, g2 = self._g, self._g2
        a = iv @ g2.T
        b = (F * iv) @ g.T
        f = np.sum(F * F * iv, axis=1)[:, None]
        a_hat0 = np.maximum(b / np.where(a > 0, a, 1.0), 0.0)
        a_hat0 *= a_hat0
        det_prod = np.ones_like(a)  # prod_g (1 + d_g^2 A^2 a_g): one log at the end
        for m, d2 in zip(self._masks, self._d2):  # a few calibration groups
            ivm = iv * m
            ak = ivm @ g2.T
            bk = (F * ivm) @ g.T
            kap = d2 * a_hat0
            den = 1.0 + kap * ak
            kap /= den
            a -= kap * ak * ak
            b -= kap * ak * bk
            f = f - kap * bk * bk
            det_prod *= den
        a = np.where(a > 0, a, np.inf)
        a_hat = b / a
        chi2 = f - b * a_hat
        # log of det C / det D times a, and sd = a^-1/2, in one log call
        det_prod *= a
        with np.errstate(divide="ignore"):
            logp = -0.5 * (chi2 + np.log(det_prod))
        logp += 0.5 * _LOG_2PI - np.log(self._a_hi - self._a_lo)
        sd = 1.0 / np.sqrt(a)
        # amplitude mass inside the prior bounds, log[Phi(hi) - Phi(lo)]: ~0 unless
        # the conditional amplitude is within 8 sd of a bound, so evaluate only there
        hi, lo = (self._a_hi - a_hat) / sd, (self._a_lo - a_hat) / sd
        near = (hi < 8.0) | (lo > -8.0)
        if near.any():
            lhi, llo = log_ndtr(hi[near]), log_ndtr(lo[near])
            with np.errstate(divide="ignore"):
                logp[near] += lhi + np.log(-np.expm1(np.minimum(llo - lhi, -1e-300)))
        if limit_only.any():
            a_use = np.clip(a_hat, self._a_lo, self._a_hi)
            for j in np.flatnonzero(limit_only.any(axis=0)):  # loop over limit bands only
                z = (flux[:, j, None] - a_use * g[None, :, j]) / err[:, j, None]
                logp = logp + np.where(limit_only[:, j, None], log_ndtr(z), 0.0)
        logp = logp + self._log_node_prior
        logp = np.where(np.isfinite(logp), logp, -np.inf)
        const = -0.5 * np.sum(np.where(det, np.log(np.where(det, err, 1.0) ** 2) + _LOG_2PI, 0.0), axis=1)
        return logp + const[:, None], a_hat, sd, chi2

    # ------------------------------------------------------------------ summaries
    def _axis_quantiles(self, mass, nodes, widths, log):
        """Quantiles and sd of a marginal given as node masses (n_s, n_nodes).

        The log density at the nodes (mass / cell width) is interpolated with
        a cubic spline onto a grid _UPSAMPLE times finer and integrated there;
        a smooth posterior a cell or two wide is then summarised accurately
        (the log of a near-Gaussian marginal is near-quadratic, which the
        spline follows closely).
        """
        x = np.log(nodes) if log else nodes
        w = np.diff(np.log(self.T_edges)) if log else widths
        with np.errstate(divide="ignore"):
            logd = np.log(mass) - np.log(w)
        top = logd.max(axis=1, keepdims=True)
        logd = np.maximum(logd - top, _LOG_FLOOR)
        xf = np.linspace(x[0], x[-1], _UPSAMPLE * (x.size - 1) + 1)
        dens = np.exp(np.clip(CubicSpline(x, logd, axis=1)(xf), _LOG_FLOOR, 0.5))
        cdf = np.concatenate([np.zeros((mass.shape[0], 1)),
                              np.cumsum(0.5 * (dens[:, 1:] + dens[:, :-1]) * np.diff(xf), axis=1)], axis=1)
        cdf /= cdf[:, -1:]
        out = {}
        for key, q in QUANTILES.items():
            k = np.clip(np.sum(cdf[:, 1:] < q, axis=1), 0, xf.size - 2)
            rows = np.arange(mass.shape[0])
            c0, c1 = cdf[rows, k], cdf[rows, k + 1]
            t = np.clip((q - c0) / np.where(c1 > c0, c1 - c0, 1.0), 0.0, 1.0)
            v = xf[k] + t * (xf[k + 1] - xf[k])
            out[key] = np.exp(v) if log else v
        p = np.diff(cdf, axis=1)
        xm = 0.5 * (xf[1:] + xf[:-1])
        mean = np.sum(p * xm, axis=1)
        sd = np.sqrt(np.maximum(np.sum(p * xm**2, axis=1) - mean**2, 0.0))
        return out, sd

    def _draw(self, post, a_hat, sd, n, rng, sd_lnT, sd_b):
        """n weighted draws per source: (node index, T, beta, log10 amplitude).

        A draw picks a node by its mass and moves uniformly within the node's
        cell, shrunk towards the node where the cell is wide compared with
        the posterior: the node masses alone already have the right variance
        (rectangle rule), and a full-cell jitter would add h^2/12. The shrink
        factor min(1, _JITTER sd / h) caps that excess at 2 % of the variance.
        """
        ns, nn = post.shape
        cum = np.cumsum(post, axis=1)
        cum = cum / cum[:, -1:] + np.arange(ns)[:, None]
        uni = rng.uniform(size=(ns, 4, n))
        u = uni[:, 0] + np.arange(ns)[:, None]
        flat = np.minimum(np.searchsorted(cum.ravel(), u.ravel()), ns * nn - 1)
        node = (flat - np.arange(ns).repeat(n) * nn).reshape(ns, n).clip(0, nn - 1)
        it, ib = np.divmod(node, self.beta_nodes.size)
        jt, jb = uni[:, 1], uni[:, 2]
        lt0, lt1 = np.log(self.T_edges[it]), np.log(self.T_edges[it + 1])
        lnode = np.log(self.T_nodes[it])
        cT = np.minimum(1.0, _JITTER * sd_lnT / np.diff(np.log(self.T_nodes)).max())[:, None]
        T = np.exp(lnode + cT * (lt0 + jt * (lt1 - lt0) - lnode))
        if self.has_beta:
            b0, b1 = self.beta_edges[ib], self.beta_edges[ib + 1]
            cb = np.minimum(1.0, _JITTER * sd_b / np.diff(self.beta_nodes).max())[:, None]
            bnode = self.beta_nodes[ib]
            beta = bnode + cb * (b0 + jb * (b1 - b0) - bnode)
        else:
            beta = np.full((ns, n), np.nan)
        rows = np.arange(ns)[:, None]
        mu, s = a_hat[rows, node], sd[rows, node]
        lo, hi = ndtr((self._a_lo - mu) / s), ndtr((self._a_hi - mu) / s)
        p = np.clip(lo + uni[:, 3] * (hi - lo), 1e-300, 1 - 1e-16)
        amp = np.clip(mu + s * ndtri(p), self._a_lo, self._a_hi)
        return node, T, beta, np.log10(amp)

    def summarise(self, flux, err, limit_only, *, n_draws=500, n_ppp=100, rng=None, keep_draws=False,
                  refine=True, _depth=0):
        """Posterior summaries for a block of sources (SI arrays, see :meth:`log_posterior`).

        ``rng`` is a seed or Generator for the whole block, or a list with one
        seed / SeedSequence / Generator per source (results then independent
        of how sources are grouped into blocks).

        With ``refine`` (default), a source whose posterior is narrower than
        half a cell is evaluated again on a zoomed grid around its posterior
        (:meth:`zoomed`), and its summaries and draws come from there; the
        zoom repeats (each level ~8x finer) up to _ZOOM_LEVELS times, so very
        high S/N posteriors are resolved too.

        Returns
        -------
        columns : dict of str -> ndarray (n_sources,)
            The flat summary columns (``T_median``, ..., ``chi2_reduced``, ``ppp``).
        extra : dict
            ``posterior`` (n_sources, n_T, n_beta) normalised node masses on
            this grid (zoomed sources keep the coarse one), ``flags`` (list of
            tuples), and ``draws`` when ``keep_draws``.
        """
        rng = _BlockRandom(rng, flux.shape[0])
        logp, a_hat, sd, chi2 = self.log_posterior(flux, err, limit_only)
        ns = flux.shape[0]
        peak = logp.max(axis=1, keepdims=True)
        ok = np.isfinite(peak[:, 0])
        post = np.where(ok[:, None], np.exp(logp - np.where(ok[:, None], peak, 0.0)), 1.0)
        post /= post.sum(axis=1, keepdims=True)
        cube = post.reshape(ns, *self.shape)
        cols = {}
        qT, sd_lnT = self._axis_quantiles(cube.sum(axis=2), self.T_nodes, self._wT, True)
        cols.update({f"T_{k}": v for k, v in qT.items()})
        sd_b = None
        if self.has_beta:
            qb, sd_b = self._axis_quantiles(cube.sum(axis=1), self.beta_nodes, self._wb, False)
            cols.update({f"beta_{k}": v for k, v in qb.items()})
        node, T, beta, lamp = self._draw(post, a_hat, sd, max(n_draws, n_ppp, 2), rng, sd_lnT, sd_b)
        if self.has_beta:
            # posterior correlation of T and beta (the degeneracy) from the node masses;
            # node sums of a smooth posterior converge fast (rectangle rule on a Gaussian)
            pT, pb = cube.sum(axis=2), cube.sum(axis=1)
            mT, mb = pT @ self.T_nodes, pb @ self.beta_nodes
            cTb = np.einsum("sij,i,j->s", cube, self.T_nodes, self.beta_nodes) - mT * mb
            vT, vb = pT @ self.T_nodes**2 - mT**2, pb @ self.beta_nodes**2 - mb**2
            with np.errstate(invalid="ignore", divide="ignore"):
                cols["T_beta_corr"] = cTb / np.sqrt(vT * vb)
        qa = np.quantile(lamp, list(QUANTILES.values()), axis=1)
        cols.update({f"{self.amp_name}_{k}": qa[i] for i, k in enumerate(QUANTILES)})
        # MAP: the node maximising the posterior density with the amplitude at its
        # conditional optimum, -chi2/2 + log prior density (the slowly varying
        # calibration determinant is left out; it moves the MAP by << a cell).
        prof = -0.5 * chi2 + self._log_node_density
        imap = np.argmax(np.where(np.isfinite(prof), prof, -np.inf), axis=1)
        rows = np.arange(ns)
        it, ib = np.divmod(imap, self.beta_nodes.size)
        cols["T_map"] = self.T_nodes[it]
        if self.has_beta:
            cols["beta_map"] = self.beta_nodes[ib]
        amp_map = np.clip(a_hat[rows, imap], self._a_lo, self._a_hi)
        cols[f"{self.amp_name}_map"] = np.log10(amp_map)
        n_det = np.sum(~limit_only & np.isfinite(err), axis=1)
        dof = n_det - len(self.names)
        m_map = amp_map[:, None] * self._g[imap]
        chi2_map = self._chi2(flux, err, limit_only, m_map[:, None, :])[:, 0]
        cols["chi2_map"] = chi2_map
        cols["n_bands_used"] = n_det
        cols["dof"] = dof
        with np.errstate(divide="ignore", invalid="ignore"):
            cols["chi2_reduced"] = np.where(dof > 0, chi2_map / np.where(dof > 0, dof, 1), np.nan)
        cols["ppp"] = self._ppp(flux, err, limit_only, node[:, :n_ppp], lamp[:, :n_ppp], rng)
        coarse_at = (lambda f: self._narrow(sd_lnT, sd_b, f))
        flags = self._flags(T, beta, ok, coarse_at(_COARSE))
        flags = [fl + ("poor_fit",) if p < POOR_FIT_PPP else fl for fl, p in zip(flags, cols["ppp"])]
        for key, c in cols.items():
            if c.dtype.kind == "f":
                c[~ok] = np.nan
        draws = {"T": T, "beta": beta, self.amp_name: lamp}
        if refine and _depth < _ZOOM_LEVELS:
            for i in np.flatnonzero(coarse_at(_REFINE) & ok):  # only the narrow posteriors
                self._refine_row(i, cols, flags, draws, flux, err, limit_only, sd_lnT, sd_b,
                                 n_draws=n_draws, n_ppp=n_ppp, rng=rng.row(i), depth=_depth + 1)
        if _depth == 0:
            self._warn(flags)
        extra = {"posterior": cube, "flags": flags}
        if keep_draws:
            extra["draws"] = draws
        return cols, extra

    def _narrow(self, sd_lnT, sd_b, cells):
        """Sources whose marginal sd is below ``cells`` grid cells in T or beta."""
        out = sd_lnT < cells * np.diff(np.log(self.T_nodes)).max()
        if sd_b is not None:
            out |= sd_b < cells * np.diff(self.beta_nodes).max()
        return out

    def _refine_row(self, i, cols, flags, draws, flux, err, limit_only, sd_lnT, sd_b, *, n_draws, n_ppp, rng,
                    depth):
        """Re-evaluate source ``i`` on a zoomed grid around its posterior; update in place."""
        lt = np.log(self.T_nodes)
        dlt = np.diff(lt).max()
        lo = max(np.log(cols["T_p2_5"][i]) - 2 * sd_lnT[i] - dlt, lt[0])
        hi = min(np.log(cols["T_p97_5"][i]) + 2 * sd_lnT[i] + dlt, lt[-1])
        b_rng = None
        if self.has_beta:
            db = np.diff(self.beta_nodes).max()
            b_rng = (max(cols["beta_p2_5"][i] - 2 * sd_b[i] - db, self.beta_nodes[0]),
                     min(cols["beta_p97_5"][i] + 2 * sd_b[i] + db, self.beta_nodes[-1]))
        child = self.zoomed((np.exp(lo), np.exp(hi)), b_rng)
        sl = slice(i, i + 1)
        c2, e2 = child.summarise(flux[sl], err[sl], limit_only[sl], n_draws=n_draws, n_ppp=n_ppp,
                                 rng=rng, keep_draws=True, refine=True, _depth=depth)
        for key, val in c2.items():
            cols[key][i] = val[0]
        flags[i] = e2["flags"][0]
        for key, val in e2["draws"].items():
            draws[key][i] = val[0]

    def _warn(self, flags):
        n_edge = sum(any(f.endswith(("_prior_low", "_prior_high")) for f in fl) for fl in flags)
        if n_edge:
            warnings.warn(
                f"{n_edge} source(s) have posterior mass piled against the grid/prior edge "
                "(flags '*_at_prior_low' / '*_at_prior_high')", GridWarning, stacklevel=4)
        n_coarse = sum("grid_too_coarse" in fl for fl in flags)
        if n_coarse:
            warnings.warn(
                f"{n_coarse} source(s) have a posterior narrower than {_COARSE} grid cells even on "
                "a zoomed grid; pass finer T_nodes/beta_nodes (flag 'grid_too_coarse')",
                GridWarning, stacklevel=4)

    def _chi2(self, flux, err, limit_only, model):
        """chi^2 of data (n_s, nb) against models (n_s, n_m, nb) with calibration terms."""
        det = ~limit_only & np.isfinite(err)
        iv = np.where(det, 1.0 / np.where(det, err, 1.0) ** 2, 0.0)[:, None, :]
        resid = np.where(det, flux, 0.0)[:, None, :] - model
        chi2, _ = calibrated_chi2(resid, model, iv, self._masks, self._d2)
        return chi2

    def _ppp(self, flux, err, limit_only, node, lamp, rng):
        """Posterior predictive p-value of chi^2 from replicated data sets at the draws."""
        model = (10.0**lamp)[..., None] * self._g[node]  # (n_s, n_d, nb)
        det = ~limit_only & np.isfinite(err)
        sig = np.where(det, err, 0.0)[:, None, :]
        k = len(self._d2)
        z = rng.standard_normal(model.shape[:2] + (model.shape[2] + k,))
        noise = z[..., : model.shape[2]] * sig
        for j, (m, d2) in enumerate(zip(self._masks, self._d2)):
            noise = noise + model * m * (np.sqrt(d2) * z[..., model.shape[2] + j])[..., None]
        chi_obs = self._chi2(flux, err, limit_only, model)
        # replicated data: chi2 of (model + noise) against the model
        iv = np.where(det, 1.0 / np.where(det, err, 1.0) ** 2, 0.0)[:, None, :]
        chi_rep, _ = calibrated_chi2(np.where(det[:, None, :], noise, 0.0), model, iv, self._masks, self._d2)
        return np.mean(chi_rep >= chi_obs, axis=1)

    def _flags(self, T, beta, ok, coarse):
        """Per-source trust flags from the draws and the marginal widths."""
        flags = []
        w = np.ones(T.shape[1])
        for i in range(T.shape[0]):  # per-source bookkeeping on a few hundred draws
            if not ok[i]:
                flags.append(("no_valid_grid_node",))
                continue
            fl = trust_flags("T", T[i], w, self.prior["T"].low, self.prior["T"].high, self._sd_T)
            if self.has_beta:
                fl += trust_flags("beta", beta[i], w, self.prior["beta"].low, self.prior["beta"].high, self._sd_b)
            if coarse[i]:
                fl.append("grid_too_coarse")
            flags.append(tuple(fl))
        return flags

    @property
    def _sd_T(self):
        return _prior_sd(self.prior["T"])

    @property
    def _sd_b(self):
        return _prior_sd(self.prior["beta"])


def source_seeds(seed, ids):
    """One SeedSequence per source, keyed on the run seed and the source id.

    A stable CRC-32 of ``str(id)`` (never Python's salted ``hash``) makes each
    source's random numbers independent of its position, block and worker.
    """
    base = 0 if seed is None else int(seed)
    return [np.random.SeedSequence([base, zlib.crc32(str(i).encode())]) for i in ids]


def grid_posterior(flux, flux_err, bands, *, model=None, prior=None, calibration=None,
                   upper_limits=None, source_ids=None, T_nodes=None, beta_nodes=None,
                   n_draws=500, n_ppp=100, chunk_size=32, seed=None, grid=None):
    """Grid posteriors of T, beta and amplitude for many sources at once.

    Parameters
    ----------
    flux, flux_err : Quantity or array_like, shape (n_sources, n_bands)
        Flux densities and 1-sigma errors (Jy if bare); NaN in both marks an
        unobserved band.
    bands : BandSet
    model : SEDModel, keyword-only
        Default: :class:`~sedtemp.models.ModifiedBlackbody` per its defaults
        is *not* assumed; a model is required (it fixes distance or beam).
    prior, calibration, upper_limits : keyword-only
        As for :func:`~sedtemp.fit.fit_source`.
    source_ids : sequence, optional
        Identifiers for the ``id`` column and for messages.
    T_nodes, beta_nodes : array_like, optional
        Grid nodes (see :class:`GridPosterior`).
    n_draws : int
        Posterior draws per source used for the amplitude quantiles.
    chunk_size : int
        Sources per vectorised block. Small blocks keep the (sources x nodes)
        work arrays in the CPU cache: 32 is ~2x faster than 256 here.
    seed : int, optional
        Run seed; each source's draws come from ``SeedSequence([seed, crc32(id)])``,
        so they do not depend on chunking.
    grid : GridPosterior, optional
        Reuse precomputed tables (the other model/prior/grid keywords are then ignored).

    Returns
    -------
    astropy.table.Table
        One row per source: ``id``, ``{T,beta,<amplitude>}_{p2_5,p16,median,p84,p97_5,map}``,
        ``chi2_map``, ``dof``, ``chi2_reduced``, ``ppp``, ``n_bands_used``,
        ``flags`` (comma-separated). ``T`` columns in K.
    """
    if grid is None:
        if model is None:
            raise InputError("grid_posterior needs model= (e.g. ModifiedBlackbody(distance=...))")
        grid = GridPosterior(bands, model=model, prior=prior, calibration=calibration,
                             T_nodes=T_nodes, beta_nodes=beta_nodes)
    phot = prepare(flux, flux_err, bands.names, upper_limits=upper_limits, source_label=source_ids)
    ns = phot.flux.shape[0]
    ids = np.asarray(source_ids) if source_ids is not None else np.arange(ns)
    n_free = len(grid.names)
    # a source with too few bands has no meaningful posterior: it is skipped and
    # 'too_few_bands' is its only flag
    fit_rows = np.flatnonzero(phot.n_usable >= n_free)
    seeds = source_seeds(seed, ids)
    parts, flags = [], {}
    for start in range(0, fit_rows.size, chunk_size):
        rows = fit_rows[start:start + chunk_size]
        err = np.where(phot.missing[rows], np.inf, phot.err[rows])
        cols, extra = grid.summarise(phot.flux[rows], err, phot.limit_only[rows], n_draws=n_draws,
                                     n_ppp=n_ppp, rng=[seeds[i] for i in rows])
        parts.append(cols)
        flags.update(zip(rows, extra["flags"]))
    out = Table()
    out["id"] = ids
    keys = parts[0].keys() if parts else grid.column_names()
    for key in keys:
        col = np.full(ns, np.nan)
        if parts:
            col[fit_rows] = np.concatenate([p[key] for p in parts])
        out[key] = col
    out["n_bands_used"] = phot.n_usable
    out["dof"] = phot.n_usable - n_free
    flag_text = [",".join(flags[i]) if i in flags else "too_few_bands" for i in range(ns)]
    out["flags"] = flag_text
    for key in out.colnames:
        if key.startswith("T_"):
            out[key].unit = "K"
    out.meta["method"] = "grid"
    out.meta["grid_shape"] = list(grid.shape)
    return out
