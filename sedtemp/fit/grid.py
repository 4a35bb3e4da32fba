"""Exact grid posterior over (T, beta) with the amplitude marginalised on every node.

For a model S_nu = A g_nu(T, beta) whose amplitude A enters linearly, the
band fluxes of every (T, beta) grid node are tabulated once per band set. For
each source and node the Gaussian likelihood is quadratic in A, with
conditional mean A* = g^T C^-1 F / a and sd a^-1/2, a = g^T C^-1 g, and the
integral over A against its prior is a 1-D quadrature done for all sources
and nodes at once (:mod:`sedtemp.fit.amplitude`; exact in closed form for a
prior uniform in A, a series / tabulated quadrature accurate to 1e-6 for the
default prior uniform in log10 A). Every other term is a matrix product
(sources x bands) @ (bands x nodes).

Calibration covariance (C = D + sum_g d_g^2 m_g m_g^T) depends on the model
flux; on the grid it is evaluated at each node's diagonal best-fit amplitude,
which is exact without calibration terms and accurate to O(d_g^2 / SNR) with
them. Limit-only bands enter as log Phi((L - A* g) / sigma_L) at A*.

Narrow posteriors (sd below half a cell) are refined for all such sources of
a block at once (:mod:`sedtemp.fit.zoom`): a vectorised local optimiser finds
the mode, a per-source window of 25 x 25 nodes is centred on it and widened
until the posterior mass at its edges is negligible, and the refined MAP is
never worse in chi^2 than the optimiser's optimum.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np
from astropy.table import Table
from numpy.typing import ArrayLike
from scipy.interpolate import CubicSpline, RectBivariateSpline

from .._numerics import TensorSpline
from ..errors import GridWarning, InputError
from ..likelihood import Calibration
from ..photometry import prepare
from ..seeds import source_seeds
from . import defaults
from ._blocks import BlockRandom, Nodes, conditional, summarise_nodes
from ._data import resolve_prior
from .amplitude import amplitude_marginal
from .summary import QUANTILES
from .zoom import refine_block

if TYPE_CHECKING:
    import astropy.units as u

    from ..bands import BandSet
    from ..models import SEDModel
    from ..simulate import SeedLike

__all__ = ["GridPosterior", "grid_posterior", "source_seeds"]

_LOG_2PI = np.log(2.0 * np.pi)
_N_T_DEFAULT = defaults.N_T
_N_BETA_DEFAULT = defaults.N_BETA
#: A marginal sd below this many cell widths (after zooming) is flagged 'grid_too_coarse'.
_COARSE = 0.3
#: A marginal sd below this many cell widths triggers the zoomed re-evaluation.
_REFINE = 0.5
#: Nodes whose log likelihood x prior is this far below a source's best node get
#: a leading-order amplitude integral (their mass is < e^-40 relative).
#: (source, node) elements per sub-block of :meth:`GridPosterior.log_posterior` (~400 kB arrays).
_CACHE_ELEMENTS = 50_000
_RELEVANT = 40.0
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
    """Cell edges and widths around each node (edges at midpoints, in log for log grids)."""
    x = np.log(nodes) if log else nodes
    mid = 0.5 * (x[1:] + x[:-1])
    edges = np.concatenate([[x[0]], mid, [x[-1]]])
    if log:
        edges = np.exp(edges)
    return edges, np.diff(edges)


def _calibration_arrays(calibration, bands):
    if calibration is None:
        cal = np.zeros((len(bands), 0))
    elif isinstance(calibration, np.ndarray):
        cal = calibration
    else:
        cal = (calibration if isinstance(calibration, Calibration) else Calibration(calibration)).matrix(bands.names)
    masks = (cal > 0).astype(float).T  # (k, nb)
    d2 = np.array([col[col > 0].max() ** 2 for col in cal.T]) if cal.shape[1] else np.zeros(0)
    return masks, d2


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
        the amplitude prior must be :class:`~sedtemp.priors.LogUniformAmplitude`
        (the default) or :class:`~sedtemp.priors.UniformAmplitude`.
    calibration : Calibration, keyword-only
    T_nodes, beta_nodes : array_like, keyword-only
        Grid nodes (K; dimensionless). Default: ``defaults.N_T`` log-spaced T
        nodes and ``defaults.N_BETA`` linear beta nodes across the prior support.

    Raises
    ------
    InputError
        A model without a linear amplitude, an unsupported amplitude prior,
        grid nodes that are not increasing or leave the prior support.
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
        self.amplitude = amplitude_marginal(prior[amp])
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
        self._masks, self._d2 = _calibration_arrays(calibration, bands)
        self.sd_T, self.sd_beta = _prior_sd(prior["T"]), (_prior_sd(prior["beta"]) if self.has_beta else np.nan)

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

    def theta_of(self, T: ArrayLike, beta: ArrayLike) -> np.ndarray:
        """Parameter array (n, n_params) at amplitude 10**0 for T and beta arrays of shape (n,)."""
        cols = {"T": T, "beta": beta, self.amp_name: np.zeros(np.shape(T))}
        return np.column_stack([cols[n] for n in self.names])

    def theta_on(self, T: np.ndarray, beta: np.ndarray) -> np.ndarray:
        """Parameter array (k n m, n_params) at amplitude 10**0 on one tensor grid per row.

        T (k, n) and beta (k, m) (beta ignored without a beta parameter):
        the points of :meth:`templates_on`, T-major, without building the
        repeated columns one by one.
        """
        k, n = T.shape
        m = beta.shape[1] if self.has_beta else 1
        th = np.zeros((k, n, m, len(self.names)))
        th[..., self.names.index("T")] = T[:, :, None]
        if self.has_beta:
            th[..., self.names.index("beta")] = beta[:, None, :]
        return th.reshape(-1, len(self.names))

    def node_log_prior(self, T: ArrayLike, beta: ArrayLike | None, wT: ArrayLike, wb: ArrayLike) -> np.ndarray:
        """Log prior mass of cells (T, beta) with widths wT (K) and wb, elementwise."""
        lp = self.prior["T"].logpdf(T) + np.log(wT)
        if self.has_beta:
            lp = lp + self.prior["beta"].logpdf(beta) + np.log(wb)
        return lp

    def _tabulate(self, g=None):
        tt, bb = np.meshgrid(self.T_nodes, self.beta_nodes, indexing="ij")
        theta = self.theta_of(tt.ravel(), bb.ravel())
        if g is None:
            g = self.bands.band_fluxes(self.model.template_si(self.bands.nu_grid_hz, theta))  # (n_nodes, nb)
        valid = np.asarray(self.model.valid(theta), bool) & np.all(np.isfinite(g), axis=1)
        self._g = np.where(valid[:, None], g, 0.0)
        wT, wb = np.repeat(self._wT, self._wb.size), np.tile(self._wb, self._wT.size)
        lp = self.node_log_prior(theta[:, self.names.index("T")],
                                 theta[:, self.names.index("beta")] if self.has_beta else None, wT, wb)
        self._log_node_prior = np.where(valid, lp, -np.inf)
        self._log_node_density = self._log_node_prior - np.log(wT * wb)
        self._spline = None
        self._tensor = None
        self._nodes = None

    def nodes(self) -> Nodes:
        """The grid as a :class:`~sedtemp.fit._blocks.Nodes` shared by every source."""
        if self._nodes is None:
            lte = np.log(self.T_edges)
            self._nodes = Nodes(
                lt=np.log(self.T_nodes)[None], lt_edges=lte[None],
                beta=self.beta_nodes[None], beta_edges=self.beta_edges[None],
                g=self._g, log_prior=self._log_node_prior[None], log_density=self._log_node_density[None],
                affine=False)
        return self._nodes

    def template_spline(self) -> list[RectBivariateSpline] | CubicSpline:
        """Cubic splines of ln(band flux) over (ln T, beta) nodes, built on first use."""
        if self._spline is None:
            lg = np.log(np.maximum(self._g, 1e-300)).reshape(*self.shape, -1)
            x = np.log(self.T_nodes)
            if self.has_beta:
                self._spline = [RectBivariateSpline(x, self.beta_nodes, lg[:, :, j]) for j in range(lg.shape[2])]
            else:
                self._spline = CubicSpline(x, lg[:, 0, :], axis=0)
        return self._spline

    def templates_at(self, lnT: ArrayLike, beta: ArrayLike | None = None) -> np.ndarray:
        """Band fluxes at amplitude 10**0 at arbitrary points (any shape), (..., n_bands).

        Interpolated by the bicubic spline of ln(band flux) through the grid
        nodes (~1e-5 relative to the model, tested); points are clipped to
        the grid's span.
        """
        x = np.clip(lnT, np.log(self.T_nodes[0]), np.log(self.T_nodes[-1]))
        if not self.has_beta:
            return np.exp(self.template_spline()(x))
        y = np.clip(beta, self.beta_nodes[0], self.beta_nodes[-1])
        return np.exp(self._tensor_spline()(x, y))

    def _tensor_spline(self):
        """All bands' splines of :meth:`template_spline` as one :class:`~sedtemp._numerics.TensorSpline`."""
        if self._tensor is None:
            self._tensor = TensorSpline(self.template_spline())
        return self._tensor

    def templates_on(self, lnT: ArrayLike, beta: ArrayLike | None = None) -> np.ndarray:
        """Band fluxes (amplitude 10**0) on one tensor grid per row: (k, n) x (k, m) -> (k, n m, n_bands).

        The same spline as :meth:`templates_at` at the points
        ``(repeat(lnT, m), tile(beta, n))`` of each row (T-major order), to
        rounding, evaluated by :class:`~sedtemp._numerics.TensorSpline`
        (batched matrix products instead of one spline call per band).
        """
        x = np.clip(lnT, np.log(self.T_nodes[0]), np.log(self.T_nodes[-1]))
        if not self.has_beta:
            return np.exp(self.template_spline()(x))
        y = np.clip(beta, self.beta_nodes[0], self.beta_nodes[-1])
        lg = self._tensor_spline().on_grids(x, y)
        lg = lg.reshape(lg.shape[0], -1, lg.shape[-1])
        return np.exp(lg, out=lg)

    def zoomed(self, T_range: tuple[float, float], beta_range: tuple[float, float] | None = None, *,
               n_nodes: int = 25) -> GridPosterior:
        """A finer grid over one window (shared by all sources), band fluxes from :meth:`templates_at`."""
        child = object.__new__(GridPosterior)
        child.__dict__.update(self.__dict__)
        # clipped to the parent's span: exp(log(x)) can exceed x in the last bit
        child.T_nodes = np.clip(np.geomspace(*T_range, int(n_nodes)), self.T_nodes[0], self.T_nodes[-1])
        if self.has_beta:
            child.beta_nodes = np.clip(np.linspace(*beta_range, int(n_nodes)), self.beta_nodes[0], self.beta_nodes[-1])
        child._check_nodes()
        tt, bb = np.meshgrid(np.log(child.T_nodes), child.beta_nodes, indexing="ij")
        child._tabulate(self.templates_at(tt.ravel(), bb.ravel() if self.has_beta else None))
        return child

    def column_names(self) -> list[str]:
        """Names of the summary columns :meth:`summarise` returns."""
        names = [f"T_{k}" for k in QUANTILES]
        if self.has_beta:
            names += [f"beta_{k}" for k in QUANTILES] + ["T_beta_corr"]
        names += [f"{self.amp_name}_{k}" for k in QUANTILES] + ["T_map"]
        names += (["beta_map"] if self.has_beta else []) + [f"{self.amp_name}_map"]
        return [*names, "chi2_map", "n_bands_used", "dof", "chi2_reduced", "ppp"]

    @property
    def shape(self) -> tuple[int, int]:
        """(n_T, n_beta) grid shape."""
        return (self.T_nodes.size, self.beta_nodes.size)

    def log_posterior(self, flux: np.ndarray, err: np.ndarray, limit_only: np.ndarray, nodes: Nodes | None = None
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Unnormalised log posterior mass per node, and the conditional amplitude.

        Parameters
        ----------
        flux, err : ndarray (n_sources, n_bands), SI
            Missing bands have ``err = inf``.
        limit_only : ndarray of bool (n_sources, n_bands)
        nodes : Nodes, optional
            Default: this grid; per-source windows from the zoom otherwise.

        Returns
        -------
        logp, a_hat, a_sd, chi2 : ndarray (n_sources, n_nodes)
            log posterior mass, amplitude mean and sd given the node, chi^2 at a_hat.
        """
        nodes = self.nodes() if nodes is None else nodes
        step = max(1, _CACHE_ELEMENTS // nodes.g.shape[-2])
        if flux.shape[0] > step:
            # sub-blocks of sources whose (source, node) arrays stay in cache: the
            # elementwise work is several times faster than on one large array
            parts = [self.log_posterior(flux[i:i + step], err[i:i + step], limit_only[i:i + step],
                                        nodes if nodes.g.ndim == 2 else nodes.rows(slice(i, i + step)))
                     for i in range(0, flux.shape[0], step)]
            return tuple(np.concatenate(p) for p in zip(*parts, strict=True))
        det = ~limit_only & np.isfinite(err)
        iv = np.where(det, 1.0 / np.where(np.isfinite(err), err, 1.0) ** 2, 0.0)
        F = np.where(det, flux, 0.0)
        a_hat, sd, chi2, logdet = conditional(F, iv, nodes.g, self._masks, self._d2)
        good = np.isfinite(a_hat) & (sd > 0) & np.isfinite(sd)
        base = np.where(good, -0.5 * (chi2 + logdet), -np.inf) + nodes.log_prior
        peak = base.max(axis=1, keepdims=True)
        # the amplitude integral is computed exactly where the node can matter
        # (within e^-40 of the source's best node; it varies by a few units at most)
        relevant = base > peak - _RELEVANT
        with np.errstate(divide="ignore", invalid="ignore"):
            logp = base + self.amplitude.log_integral(np.where(good, a_hat, 0.0), np.where(good, sd, 1.0),
                                                      relevant)
        if limit_only.any():
            a_use = np.clip(a_hat, self.amplitude.a_lo, self.amplitude.a_hi)
            g = nodes.g
            for j in np.flatnonzero(limit_only.any(axis=0)):  # loop over limit bands only
                gj = g[..., j] if g.ndim == 3 else g[None, :, j]
                z = (flux[:, j, None] - a_use * gj) / err[:, j, None]
                logp = logp + np.where(limit_only[:, j, None], _log_ndtr(z), 0.0)
        logp = np.where(np.isfinite(logp), logp, -np.inf)
        const = -0.5 * np.sum(np.where(det, np.log(np.where(det, err, 1.0) ** 2) + _LOG_2PI, 0.0), axis=1)
        return logp + const[:, None], a_hat, sd, chi2

    def summarise(self, flux: np.ndarray, err: np.ndarray, limit_only: np.ndarray, *, n_draws: int = defaults.N_DRAWS,
                  n_ppp: int = defaults.N_PPP, rng: SeedLike | Sequence[SeedLike] = None,
                  keep_draws: bool = False, refine: bool = True) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        """Posterior summaries for a block of sources (SI arrays, see :meth:`log_posterior`).

        Parameters
        ----------
        flux, err : ndarray (n_sources, n_bands)
            SI flux densities and errors; ``err = inf`` marks a missing band.
        limit_only : ndarray of bool (n_sources, n_bands)
        n_draws, n_ppp : int, keyword-only
            Posterior draws kept per source, and those used for the posterior
            predictive p-value.
        rng : seed, Generator or list of them, keyword-only
            One generator for the whole block, or one per source (results are
            then independent of how sources are grouped into blocks, to
            ~1e-12 relative: only the order of floating-point sums differs).
        keep_draws : bool, keyword-only
            Return the posterior draws in ``extra["draws"]``.
        refine : bool, keyword-only
            Zoom narrow posteriors (see the module notes).

        Returns
        -------
        columns : dict of str -> ndarray (n_sources,)
            The flat summary columns (``T_median``, ..., ``chi2_reduced``, ``ppp``).
        extra : dict
            ``flags`` (list of tuples of str), ``posterior`` (n_sources, n_T,
            n_beta) normalised node masses on this grid, and ``draws`` (dict
            name -> (n_sources, n_draws)) when ``keep_draws``.
        """
        rng = BlockRandom(rng, flux.shape[0])
        n_use = max(n_draws, n_ppp, 2)
        # sources that the zoom re-evaluates get only what it needs from the coarse grid
        out = summarise_nodes(self, self.nodes(), flux, err, limit_only, rng, n_use, n_ppp,
                              skip_narrow=_REFINE if refine else None)
        if refine:
            rows = np.flatnonzero(out.narrow(self, _REFINE) & out.ok)
            if rows.size:
                refine_block(self, out, rows, flux, err, limit_only, rng, n_use, n_ppp)
        flags = out.final_flags(self, _COARSE)
        warn_flags(flags)
        extra = {"posterior": out.cube, "flags": flags}
        if keep_draws:
            extra["draws"] = {k: v[:, :n_draws] for k, v in out.draws.items()}
        return out.cols, extra


def _log_ndtr(z):
    from scipy.special import log_ndtr

    return log_ndtr(z)


def warn_flags(flags: Sequence[Sequence[str]]) -> None:
    """One GridWarning per kind of trouble in a block's flags."""
    n_edge = sum(any(f.endswith(("_prior_low", "_prior_high")) for f in fl) for fl in flags)
    if n_edge:
        warnings.warn(
            f"{n_edge} source(s) have posterior mass piled against the grid/prior edge "
            "(flags '*_at_prior_low' / '*_at_prior_high')", GridWarning, stacklevel=3)
    n_coarse = sum("grid_too_coarse" in fl for fl in flags)
    if n_coarse:
        warnings.warn(
            f"{n_coarse} source(s) have a posterior the zoomed grid does not resolve or a MAP a local "
            "optimiser improves on; pass finer T_nodes/beta_nodes (flag 'grid_too_coarse')",
            GridWarning, stacklevel=3)


def grid_posterior(flux: u.Quantity | ArrayLike, flux_err: u.Quantity | ArrayLike, bands: BandSet, *,
                   model: SEDModel | None = None, prior: Mapping[str, Any] | None = None,
                   calibration: Calibration | Mapping[str, tuple[Sequence[str], float]] | None = None,
                   upper_limits: Sequence[str] | ArrayLike | None = None, source_ids: Sequence[object] | None = None,
                   T_nodes: ArrayLike | None = None, beta_nodes: ArrayLike | None = None,
                   n_draws: int = defaults.N_DRAWS, n_ppp: int = defaults.N_PPP,
                   chunk_size: int = defaults.CHUNK_SIZE, seed: int | None = None,
                   grid: GridPosterior | None = None) -> Table:
    """Grid posteriors of T, beta and amplitude for many sources at once.

    Parameters
    ----------
    flux, flux_err : Quantity or array_like, shape (n_sources, n_bands)
        Flux densities and 1-sigma errors (Jy if bare); NaN in both marks an
        unobserved band.
    bands : BandSet
    model : SEDModel, keyword-only
        Required (it fixes distance or beam).
    prior, calibration, upper_limits : keyword-only
        As for :func:`~sedtemp.fit.fit_source`.
    source_ids : sequence, optional
        Identifiers for the ``id`` column, for messages and for the per-source seeds.
    T_nodes, beta_nodes : array_like, optional
        Grid nodes (see :class:`GridPosterior`).
    n_draws : int
        Posterior draws per source used for the amplitude quantiles.
    chunk_size : int
        Sources per vectorised block.
    seed : int, optional
        Run seed (None means 0); each source's draws come from
        :func:`sedtemp.seeds.source_seed` of its id, so they do not depend on chunking.
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
        flags.update(zip(rows, extra["flags"], strict=True))
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
    out["flags"] = [",".join(flags[i]) if i in flags else "too_few_bands" for i in range(ns)]
    for key in out.colnames:
        if key.startswith("T_"):
            out[key].unit = "K"
    out.meta["method"] = "grid"
    out.meta["grid_shape"] = list(grid.shape)
    return out
