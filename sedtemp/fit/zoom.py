"""Zoomed re-evaluation of narrow grid posteriors, for all such sources of a block at once.

A bright source's posterior can be far narrower than a coarse cell and lie
on a curved T-beta ridge between nodes, so the coarse grid's best node can be
tens of posterior sd from the optimum. The zoom therefore does not trust the
coarse posterior's location:

1. a vectorised local optimiser (Newton steps on a 3 x 3 finite-difference
   stencil of the amplitude-profiled chi^2, with fall-back to the best
   stencil point and step halving) starts at the coarse MAP and finds the
   optimum and its Laplace covariance;
2. a uniform per-source window of 25 x 25 nodes, +-6 Laplace sd around the
   optimum, is evaluated; while more than 1e-3 of the posterior mass sits on
   a window edge that is not a prior edge, the window is re-centred on the
   posterior mean and widened 2x (at most 3 times);
3. the refined MAP is the better (in chi^2) of the window's best node and
   the optimiser's point; if the window's best node is still worse than the
   optimiser by more than 1 in chi^2, or mass still sits on a window edge,
   the source is flagged ``grid_too_coarse`` (and not ``poor_fit``).

Band fluxes at the window nodes come from the bicubic spline of ln(band
flux) through the coarse grid (~1e-5 relative to the model).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from ._blocks import Nodes, _RowRandom, conditional, summarise_nodes

if TYPE_CHECKING:
    from ._blocks import BlockRandom, BlockSummary

__all__: list[str] = []

_ZOOM_NODES = 25
_NODE_LEVELS = (25, 33, 41, 49, 55, 61)
#: Window half-width in Laplace posterior sd (cells of 0.5 sd).
_HALF_SD = 6.0
#: Posterior mass on a non-prior window edge above which the window is widened.
_EDGE_MASS = 1e-3
_WIDEN = 2.0
_MAX_WIDEN = 3
#: chi^2 by which the window's best node may exceed the optimiser's optimum
#: (a node within half a cell of 0.5 sd of the optimum is within ~0.1).
_CHI2_TOL = 1.0
_N_ITER = 20
_STENCIL2 = np.array([(0, 0), (1, 0), (-1, 0), (0, 1), (0, -1), (1, 1), (1, -1), (-1, 1), (-1, -1)], float)
_STENCIL1 = np.array([(0,), (1,), (-1,)], float)


def _bounds(grid):
    """(lo, hi) of (ln T[, beta]) inside both the prior support and the coarse grid."""
    lo = [max(np.log(grid.T_nodes[0]), np.log(max(grid.prior["T"].low, 1e-300)))]
    hi = [min(np.log(grid.T_nodes[-1]), np.log(grid.prior["T"].high))]
    if grid.has_beta:
        lo.append(max(grid.beta_nodes[0], grid.prior["beta"].low))
        hi.append(min(grid.beta_nodes[-1], grid.prior["beta"].high))
    return np.array(lo), np.array(hi)


def _data(grid, flux, err, limit_only):  # noqa: ARG001 - kept for a uniform call signature
    det = ~limit_only & np.isfinite(err)
    iv = np.where(det, 1.0 / np.where(np.isfinite(err), err, 1.0) ** 2, 0.0)
    return np.where(det, flux, 0.0), iv


# ``grid: Any`` below is a GridPosterior: sedtemp.fit.grid imports this module, so importing it
# here (even for type checking) would make an import cycle.
def profile_chi2(grid: Any, F: np.ndarray, iv: np.ndarray, pts: np.ndarray) -> np.ndarray:
    """Amplitude-profiled chi^2 (calibration included) at points (k, m, d) of (ln T[, beta]) -> (k, m)."""
    g = grid.templates_at(pts[..., 0], pts[..., 1] if grid.has_beta else None)
    _, _, chi2, _ = conditional(F, iv, g, grid._masks, grid._d2)
    return np.where(np.isfinite(chi2), chi2, np.inf)


#: Positions of the 3 x 3 stencil points (_STENCIL2 order) in a T-major 3 x 3 tensor grid.
_STENCIL_IN_GRID = ((_STENCIL2[:, 0] + 1) * 3 + _STENCIL2[:, 1] + 1).astype(int)


def _stencil_chi2(grid, F, iv, pts, y, h, lo, hi):
    """profile_chi2 at the stencil points ``pts`` (k, 9 or 3, d) around y with spacing h.

    The clipped 3 x 3 stencil is a tensor grid per source, so its band fluxes
    come from :meth:`GridPosterior.templates_on` (the same spline values).
    """
    if not grid.has_beta:
        return profile_chi2(grid, F, iv, pts)
    off = np.array([-1.0, 0.0, 1.0])
    axes = [np.clip(y[:, j, None] + off * h[:, j, None], lo[j], hi[j]) for j in range(2)]
    g = grid.templates_on(axes[0], axes[1])[:, _STENCIL_IN_GRID]
    _, _, chi2, _ = conditional(F, iv, g, grid._masks, grid._d2)
    return np.where(np.isfinite(chi2), chi2, np.inf)


def _newton(c, h):
    """Newton step, PD mask and Laplace sd from a stencil of chi^2 values c (k, 9 or 3)."""
    if h.shape[1] == 1:
        g1 = (c[:, 1] - c[:, 2]) / (2 * h[:, 0])
        H = (c[:, 1] + c[:, 2] - 2 * c[:, 0]) / h[:, 0] ** 2
        pd = H > 0
        Hs = np.where(pd, H, 1.0)
        return (-g1 / Hs)[:, None], pd, np.sqrt(2.0 / Hs)[:, None], np.zeros(len(c))
    g1 = (c[:, 1] - c[:, 2]) / (2 * h[:, 0])
    g2 = (c[:, 3] - c[:, 4]) / (2 * h[:, 1])
    H11 = (c[:, 1] + c[:, 2] - 2 * c[:, 0]) / h[:, 0] ** 2
    H22 = (c[:, 3] + c[:, 4] - 2 * c[:, 0]) / h[:, 1] ** 2
    H12 = (c[:, 5] - c[:, 6] - c[:, 7] + c[:, 8]) / (4 * h[:, 0] * h[:, 1])
    det = H11 * H22 - H12**2
    pd = (H11 > 0) & (det > 0) & np.isfinite(det)
    d = np.where(pd, det, 1.0)
    step = np.column_stack([-(H22 * g1 - H12 * g2) / d, -(H11 * g2 - H12 * g1) / d])
    # covariance of the Laplace approximation: 2 H^-1 (chi^2 = -2 log L)
    sd = np.sqrt(np.abs(np.column_stack([2 * H22 / d, 2 * H11 / d])))
    rho = np.where(pd, -H12 / np.sqrt(np.abs(H11 * H22) + 1e-300), 0.0)
    return step, pd, sd, rho


def optimise(grid: Any, F: np.ndarray, iv: np.ndarray, y0: np.ndarray, h0: np.ndarray
             ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Vectorised local minimum of the profiled chi^2 from y0 (k, d): (y, chi2, sd, rho).

    ``h0`` (k, d) is the initial stencil spacing (the coarse cell); ``sd``
    the Laplace posterior sd at the optimum (``h0`` where the Hessian is not
    positive definite), ``rho`` the Laplace T-beta correlation.
    """
    lo, hi = _bounds(grid)
    sten = _STENCIL2 if grid.has_beta else _STENCIL1
    y = np.clip(y0, lo, hi)
    h = 0.5 * h0
    sd = h0.copy()
    rho = np.zeros(len(y))
    active = np.ones(len(y), bool)
    for _ in range(_N_ITER):  # at most _N_ITER vectorised iterations over the sources still active
        a = np.flatnonzero(active)
        ya, ha = y[a], h[a]
        pts = np.clip(ya[:, None, :] + sten[None] * ha[:, None, :], lo, hi)
        c = _stencil_chi2(grid, F[a], iv[a], pts, ya, ha, lo, hi)
        step, pd, sd_new, rho_new = _newton(c, ha)
        step = np.clip(step, -4 * ha, 4 * ha)
        trial = np.clip(ya + np.where(pd[:, None], step, 0.0), lo, hi)
        ct = profile_chi2(grid, F[a], iv[a], trial[:, None, :])[:, 0]
        ib = np.argmin(c, axis=1)
        cb = c[np.arange(len(c)), ib]
        use_trial = pd & (ct <= np.minimum(cb, c[:, 0]))
        use_best = ~use_trial & (cb < c[:, 0])
        y[a] = np.where(use_trial[:, None], trial, np.where(use_best[:, None], pts[np.arange(len(c)), ib], ya))
        sd[a] = np.where(pd[:, None], sd_new, sd[a])
        rho[a] = np.where(pd, rho_new, rho[a])
        stuck = ~use_trial & ~use_best
        # stencil spacing follows the posterior width once it is known; halves when stuck
        ha = np.where(pd[:, None], np.clip(sd_new, 1e-9, h0[a]), ha)
        h[a] = np.where(stuck[:, None], 0.5 * ha, ha)
        # a source stops once its Newton step is below 1 % of its posterior sd (or its
        # stencil far below it): its result then depends on its own data only, not on
        # how long the other sources of the block take
        small = np.all(np.abs(np.where(pd[:, None], step, 0.0)) < 0.01 * sd[a], axis=1) & pd
        active[a] = ~(small | np.all(h[a] < 1e-3 * sd[a], axis=1))
        if not active.any():
            break
    chi2 = profile_chi2(grid, F, iv, y[:, None, :])[:, 0]
    return y, chi2, sd, rho


def _n_nodes(rho):
    """Nodes per window axis for each source (see _n_nodes_one)."""
    return np.array([_n_nodes_one(r) for r in np.atleast_1d(rho)], int)


def _n_nodes_one(rho):
    """Nodes per window axis so that a ridge of correlation rho is >= 1 cell across.

    Across the ridge the sd is ~ sd_marginal sqrt(1 - rho^2), and a window of
    +-6 marginal sd has cells of 12 sd / (n - 1): n >= 12 / sqrt(1 - rho^2) + 1,
    rounded up to the next of _NODE_LEVELS (capped at 61: beyond, the ridge is resolved to
    less than a cell and the source may be flagged grid_too_coarse); sources
    with the same n are evaluated together.
    """
    r = abs(float(rho))
    need = 2 * _HALF_SD / np.sqrt(max(1.0 - r * r, 1e-6)) + 1
    # a few sizes only, so the sources of a block share few window shapes (the
    # cost of a window grows as n^2: a level every ~15 % in n)
    return int(next(n for n in _NODE_LEVELS if n >= min(need, _NODE_LEVELS[-1])))


def window_nodes(grid: Any, centre: np.ndarray, half: np.ndarray | float, n: int = _ZOOM_NODES) -> Nodes:
    """Uniform per-source windows (k sources) around ``centre`` (k, d) of half-width ``half``."""
    lo, hi = _bounds(grid)
    k = centre.shape[0]
    t = np.linspace(0.0, 1.0, n)
    c = np.clip(centre, lo, hi)
    a = np.maximum(c - half, lo)
    b = np.minimum(c + half, hi)
    b = np.maximum(b, np.minimum(a + 1e-9 * np.maximum(1.0, np.abs(a)), hi))
    a = np.minimum(a, b - 1e-12)
    lt = a[:, :1] + (b[:, :1] - a[:, :1]) * t
    bn = a[:, 1:2] + (b[:, 1:2] - a[:, 1:2]) * t if grid.has_beta else np.full((k, 1), np.nan)
    lte = _edges(lt)
    be = _edges(bn) if grid.has_beta else np.full((k, 2), np.nan)
    g = grid.templates_on(lt, bn if grid.has_beta else None)
    theta = grid.theta_on(np.exp(lt), bn)
    # (a sum over bands is finite exactly when every band flux is: band fluxes are far below overflow)
    valid = np.asarray(grid.model.valid(theta), bool).reshape(k, -1) & np.isfinite(g @ np.ones(g.shape[-1]))
    # the prior is a product over T and beta: its log mass and the cell widths per
    # axis, then an outer sum (T-major, as the band fluxes)
    wT = np.diff(np.exp(lte), axis=1)
    with np.errstate(divide="ignore"):
        lwT = np.log(wT)
        lpT = grid.prior["T"].logpdf(np.exp(lt)) + lwT
        if grid.has_beta:
            wb = np.diff(be, axis=1)
            lwb = np.log(wb)
            lpb = grid.prior["beta"].logpdf(bn) + lwb
        else:
            lpb = lwb = np.zeros((k, 1))
    lp = np.where(valid, (lpT[:, :, None] + lpb[:, None, :]).reshape(k, -1), -np.inf)
    log_width = (lwT[:, :, None] + lwb[:, None, :]).reshape(k, -1)
    if not valid.all():
        g = np.where(valid[..., None], g, 0.0)
    return Nodes(lt=lt, lt_edges=lte, beta=bn, beta_edges=be, g=g,
                 log_prior=lp, log_density=lp - log_width, affine=True)


def _edges(x):
    mid = 0.5 * (x[:, 1:] + x[:, :-1])
    return np.concatenate([x[:, :1], mid, x[:, -1:]], axis=1)


def _edge_mass(grid, nodes, post):
    """Posterior mass on window edges that are not prior (or coarse-grid) edges, (k,)."""
    lo, hi = _bounds(grid)
    k = post.shape[0]
    cube = post.reshape(k, nodes.lt.shape[1], nodes.n_beta)
    tol = 1e-9
    m = np.where(nodes.lt[:, 0] > lo[0] + tol, cube[:, 0, :].sum(axis=1), 0.0)
    m = np.maximum(m, np.where(nodes.lt[:, -1] < hi[0] - tol, cube[:, -1, :].sum(axis=1), 0.0))
    if grid.has_beta:
        m = np.maximum(m, np.where(nodes.beta[:, 0] > lo[1] + tol, cube[:, :, 0].sum(axis=1), 0.0))
        m = np.maximum(m, np.where(nodes.beta[:, -1] < hi[1] - tol, cube[:, :, -1].sum(axis=1), 0.0))
    return m


def _posterior_mean(nodes, post):
    k = post.shape[0]
    cube = post.reshape(k, nodes.lt.shape[1], nodes.n_beta)
    out = [np.sum(cube.sum(axis=2) * nodes.lt, axis=1)]
    if nodes.n_beta > 1:
        out.append(np.sum(cube.sum(axis=1) * nodes.beta, axis=1))
    return np.column_stack(out)


def _windows(grid, F_all, err, limit_only, centre, half, n):
    """Windows widened until the edge mass is small: (nodes, still_on_edge, log_posterior on them).

    Each round re-evaluates only the sources still on an edge; a source's
    window depends on its own data alone, never on the others of the block.
    """
    nodes = window_nodes(grid, centre, half, n)
    evaluated = grid.log_posterior(F_all, err, limit_only, nodes)
    todo = np.arange(centre.shape[0])
    sub_nodes, sub_eval = nodes, evaluated
    for attempt in range(_MAX_WIDEN + 1):
        logp = sub_eval[0]
        peak = logp.max(axis=1, keepdims=True)
        post = np.exp(logp - np.where(np.isfinite(peak), peak, 0.0))
        post /= np.maximum(post.sum(axis=1, keepdims=True), 1e-300)
        edge = _edge_mass(grid, sub_nodes, post) > _EDGE_MASS
        if not edge.any() or attempt == _MAX_WIDEN:
            break
        mean = _posterior_mean(sub_nodes, post)
        todo = todo[edge]
        centre, half = mean[edge], _WIDEN * half[edge]
        sub_nodes = window_nodes(grid, centre, half, n)
        sub_eval = grid.log_posterior(F_all[todo], err[todo], limit_only[todo], sub_nodes)
        nodes.put(todo, sub_nodes)
        for full, part in zip(evaluated, sub_eval, strict=True):
            full[todo] = part
    on_edge = np.zeros(nodes.lt.shape[0], bool)
    on_edge[todo] = edge
    return nodes, on_edge, evaluated


def refine_block(grid: Any, out: BlockSummary, rows: np.ndarray, flux: np.ndarray, err: np.ndarray,
                 limit_only: np.ndarray, rng: BlockRandom, n: int, n_ppp: int) -> None:
    """Re-evaluate the sources ``rows`` of a block summary ``out`` on zoomed windows, in place."""
    f, e, lim = flux[rows], err[rows], limit_only[rows]
    F, iv = _data(grid, f, e, lim)
    y0 = [np.log(out.cols["T_map"][rows])]
    h0 = [out.cell_lnT[rows]]
    if grid.has_beta:
        y0.append(out.cols["beta_map"][rows])
        h0.append(out.cell_b[rows])
    y0, h0 = np.column_stack(y0), np.column_stack(h0)
    y, chi2_opt, sd, rho = optimise(grid, F, iv, y0, h0)
    n_of = _n_nodes(rho) if grid.has_beta else np.full(len(rows), _ZOOM_NODES)
    if out.zoom_failed is None:
        out.zoom_failed = np.zeros(out.ok.size, bool)
    for n_nodes in np.unique(n_of):  # at most len(_NODE_LEVELS) window sizes
        sel = np.flatnonzero(n_of == n_nodes)
        r = rows[sel]
        nodes, on_edge, evaluated = _windows(grid, f[sel], e[sel], lim[sel], y[sel], _HALF_SD * sd[sel],
                                             int(n_nodes))
        summ = summarise_nodes(grid, nodes, f[sel], e[sel], lim[sel], _RowRandom(rng, r), n, n_ppp, evaluated)
        failed = on_edge | (summ.cols["chi2_map"] > chi2_opt[sel] + _CHI2_TOL)
        better = chi2_opt[sel] < summ.cols["chi2_map"]
        if better.any():
            _use_optimum(grid, summ, better, y[sel], f[sel], e[sel], lim[sel])
        summ.cube = None
        out.replace(r, summ)
        out.zoom_failed[r] = failed
    out.extra["zoomed"] = rows


def _use_optimum(grid, summ, sel, y, flux, err, limit_only):
    """Report the optimiser's point as the MAP where its chi^2 beats the best window node."""
    from ._blocks import chi2_of

    F, iv = _data(grid, flux[sel], err[sel], limit_only[sel])
    g = grid.templates_at(y[sel, :1], y[sel, 1:2] if grid.has_beta else None)  # (k, 1, nb)
    a_hat, _, _, _ = conditional(F, iv, g, grid._masks, grid._d2)
    amp = np.clip(a_hat[:, 0], grid.amplitude.a_lo, grid.amplitude.a_hi)
    summ.cols["T_map"][sel] = np.exp(y[sel, 0])
    if grid.has_beta:
        summ.cols["beta_map"][sel] = y[sel, 1]
    summ.cols[f"{grid.amp_name}_map"][sel] = np.log10(amp)
    chi2 = chi2_of(grid, flux[sel], err[sel], limit_only[sel], amp[:, None, None] * g)[:, 0]
    summ.cols["chi2_map"][sel] = chi2
    dof = summ.cols["dof"][sel]
    with np.errstate(divide="ignore", invalid="ignore"):
        summ.cols["chi2_reduced"][sel] = np.where(dof > 0, chi2 / np.where(dof > 0, dof, 1), np.nan)
