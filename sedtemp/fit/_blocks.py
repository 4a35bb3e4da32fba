"""Grid posterior of a block of sources on shared or per-source nodes: the pieces of ``summarise``.

A :class:`Nodes` is a (T, beta) grid either shared by every source of the
block (leading dimension 1, the coarse grid) or one uniform window per
source (leading dimension n_sources, the zoom). Every function here works
on both by broadcasting; none loops over sources except the flag bookkeeping.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.interpolate import CubicSpline

from ..errors import InputError
from ..likelihood import calibrated_chi2
from .summary import POOR_FIT_PPP, QUANTILES, trust_masks

__all__: list[str] = []

#: Refinement factor of the spline-interpolated marginals used for quantiles.
_UPSAMPLE = 8
#: Log-density floor (relative to the peak) kept finite for the spline.
_LOG_FLOOR = -80.0
#: In-cell jitter of the draws is scaled to at most this many posterior sd
#: (uniform jitter of width w adds w^2/12 to the variance: <= 2 % here).
_JITTER = 0.49
#: A posterior whose smallest principal sd on the node lattice is below this many
#: times the refinement threshold (in cells), and whose T marginal is within
#: twice it, is refined too (0.5: a ridge < 0.25 cells across): such a ridge is summarised too wide by the coarse
#: grid (found at S/N 100: a marginal 2.5x too wide).
_RIDGE = 0.5


class BlockRandom:
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

    def _call(self, method, size, rows=None):
        if self._gens is None:
            return getattr(self._one, method)(size=size)
        gens = self._gens if rows is None else [self._gens[i] for i in rows]
        return np.stack([getattr(g, method)(size=size[1:]) for g in gens])

    def uniform(self, size, rows=None):
        return self._call("uniform", size, rows)

    def standard_normal(self, size, rows=None):
        return self._call("standard_normal", size, rows)


class _RowRandom:
    """A BlockRandom restricted to some rows (the zoomed sources)."""

    def __init__(self, parent, rows):
        self.parent, self.rows = parent, rows

    def uniform(self, size):
        return self.parent.uniform(size, self.rows)

    def standard_normal(self, size):
        return self.parent.standard_normal(size, self.rows)


@dataclass
class Nodes:
    """A (ln T, beta) grid, shared (leading dim 1) or per source (``affine``: uniform windows)."""

    lt: np.ndarray  # (k, n_T) ln T of the nodes
    lt_edges: np.ndarray  # (k, n_T + 1)
    beta: np.ndarray  # (k, n_beta)
    beta_edges: np.ndarray  # (k, n_beta + 1)
    g: np.ndarray  # (n_nodes, nb) shared or (k, n_nodes, nb)
    log_prior: np.ndarray  # (k, n_nodes) log prior mass of each cell
    log_density: np.ndarray  # (k, n_nodes) log prior density at each node
    affine: bool

    @property
    def n_beta(self):
        return self.beta.shape[1]

    def rows(self, sl):
        """The nodes of the sources ``sl`` (a slice) of per-source nodes."""
        def cut(a):
            return a if a.shape[0] == 1 else a[sl]
        return Nodes(lt=cut(self.lt), lt_edges=cut(self.lt_edges), beta=cut(self.beta),
                     beta_edges=cut(self.beta_edges), g=self.g if self.g.ndim == 2 else self.g[sl],
                     log_prior=cut(self.log_prior), log_density=cut(self.log_density), affine=self.affine)

    def put(self, rows, other):
        """Overwrite the per-source nodes of ``rows`` (index array) with ``other``'s, in place."""
        for name in ("lt", "lt_edges", "beta", "beta_edges", "g", "log_prior", "log_density"):
            getattr(self, name)[rows] = getattr(other, name)

    def g_at(self, node):
        """Band fluxes (ns, n, nb) of node indices (ns, n)."""
        if self.g.ndim == 2:
            return self.g[node]
        return self.g[np.arange(node.shape[0])[:, None], node]


def take(arr, idx):
    """arr (k, n) indexed by idx (ns, m) per row (k = 1 broadcasts)."""
    return arr[0][idx] if arr.shape[0] == 1 else np.take_along_axis(arr, idx, axis=1)


_GROUP_WEIGHTS: dict = {}


def _group_weights(masks, nb):
    """0/1 band weights of each (disjoint) calibration group, cached per mask pattern."""
    key = (nb, masks.shape, masks.tobytes())
    hit = _GROUP_WEIGHTS.get(key)
    if hit is None:
        if len(_GROUP_WEIGHTS) > 256:
            _GROUP_WEIGHTS.clear()
        hit = _GROUP_WEIGHTS[key] = [(m > 0).astype(float) for m in masks]
    return hit


def group_sums(F, iv, g, masks):
    """Weighted sums of templates g against the data, per (source, node) and per calibration group.

    Returns
    -------
    a, b : ndarray (ns, nn)
        sum g^2 / sigma^2 and sum F g / sigma^2 over the used bands.
    f : ndarray (ns, 1)
        sum F^2 / sigma^2.
    parts : list of (a_k, b_k)
        The same sums restricted to each calibration group (``masks`` rows).
    """
    if g.ndim == 2:
        def mm(w, gg):
            return w @ gg.T
    else:  # per-source templates: one batched matrix-vector product
        def mm(w, gg):
            return np.matmul(gg, w[:, :, None])[..., 0]
    groups = _group_weights(masks, F.shape[1])
    Fiv = F * iv
    g2 = g * g
    parts = [(mm(iv * m, g2), mm(Fiv * m, g)) for m in groups]  # per-group a_g, b_g
    # the totals over every used band directly (one product each, not a sum of the parts)
    return mm(iv, g2), mm(Fiv, g), np.sum(F * Fiv, axis=1)[:, None], parts


def conditional(F, iv, g, masks, d2, sums=None):
    """Conditional amplitude mean, sd, chi^2 and calibration log-det per (source, node).

    Parameters
    ----------
    F, iv : ndarray (ns, nb)
        Detected fluxes (0 elsewhere) and inverse variances (0 for unused bands).
    g : ndarray (nn, nb) or (ns, nn, nb)
        Band fluxes at amplitude 1.
    masks, d2 : ndarray (k, nb), (k,)
        Calibration groups (see :func:`sedtemp.likelihood.calibrated_chi2`).
    sums : tuple, optional
        :func:`group_sums` of the same arguments, when the caller has them already.

    Returns
    -------
    a_hat, sd, chi2, logdet : ndarray (ns, nn)
    """
    if sums is None:
        a, b, f, parts = group_sums(F, iv, g, masks)
    else:  # the caller's sums stay as they are
        a, b, f, parts = sums
        a, b = a.copy(), b.copy()
    det_prod = None  # prod_g (1 + d_g^2 A^2 a_g): one log at the end
    if parts:
        a_hat0 = np.maximum(b / np.where(a > 0, a, 1.0), 0.0)
        a_hat0 *= a_hat0
    for (ak, bk), dd in zip(parts, d2, strict=True):  # a few calibration groups (Woodbury, diagonal core)
        den = dd * a_hat0
        den *= ak
        den += 1.0
        kap = dd * a_hat0
        kap /= den
        ka = kap * ak
        a -= ka * ak
        b -= ka * bk
        kap *= bk
        kap *= bk
        f = f - kap
        if det_prod is None:
            det_prod = den
        else:
            det_prod *= den
    a = np.where(a > 0, a, np.inf)
    a_hat = b / a
    chi2 = f - b * a_hat
    return a_hat, 1.0 / np.sqrt(a), chi2, (np.log(det_prod) if det_prod is not None else np.zeros_like(a))


_UPSAMPLERS: dict = {}


def _upsampler(t):
    """Fine nodes tf and the matrix (n, n_fine) of the not-a-knot cubic spline through nodes t.

    The spline is linear in its data, so ``y @ op`` equals
    ``CubicSpline(t, y, axis=1)(tf)`` (to rounding) for every row y at once;
    cached per node vector.
    """
    key = t.tobytes()
    hit = _UPSAMPLERS.get(key)
    if hit is None:
        tf = np.linspace(t[0], t[-1], _UPSAMPLE * (t.size - 1) + 1)
        if len(_UPSAMPLERS) > 64:
            _UPSAMPLERS.clear()
        hit = _UPSAMPLERS[key] = (tf, np.ascontiguousarray(CubicSpline(t, np.eye(t.size), axis=0)(tf).T))
    return hit


def axis_quantiles(mass, x, edges, affine):
    """Quantiles and sd of a marginal given as node masses (ns, n) on nodes x (k, n).

    The log density at the nodes (mass / cell width) is interpolated with a
    cubic spline onto a grid _UPSAMPLE times finer and integrated there
    (the log of a near-Gaussian marginal is near-quadratic, which the spline
    follows closely). Per-source windows are uniform, so the spline runs in
    the node index and the results are mapped back affinely.
    """
    ns, n = mass.shape
    with np.errstate(divide="ignore"):
        logd = np.log(mass) - np.log(np.diff(edges, axis=1))
    top = logd.max(axis=1, keepdims=True)
    logd = np.maximum(logd - top, _LOG_FLOOR)
    t = np.arange(n, dtype=float) if affine else x[0]
    tf, op = _upsampler(t)
    dens = np.exp(np.clip(logd @ op, _LOG_FLOOR, 0.5))
    cdf = np.concatenate([np.zeros((ns, 1)), np.cumsum(0.5 * (dens[:, 1:] + dens[:, :-1]) * np.diff(tf), axis=1)],
                         axis=1)
    cdf /= cdf[:, -1:]
    rows = np.arange(ns)
    x0, h = (x[:, 0], (x[:, -1] - x[:, 0]) / (n - 1)) if affine else (0.0, 1.0)
    out = {}
    for key, q in QUANTILES.items():  # five probabilities
        k = np.clip(np.sum(cdf[:, 1:] < q, axis=1), 0, tf.size - 2)
        c0, c1 = cdf[rows, k], cdf[rows, k + 1]
        frac = np.clip((q - c0) / np.where(c1 > c0, c1 - c0, 1.0), 0.0, 1.0)
        out[key] = x0 + h * (tf[k] + frac * (tf[k + 1] - tf[k]))
    p = np.diff(cdf, axis=1)
    xm = 0.5 * (tf[1:] + tf[:-1])
    mean = np.sum(p * xm, axis=1)
    sd = np.sqrt(np.maximum(np.sum(p * xm**2, axis=1) - mean**2, 0.0)) * h
    return out, sd


def narrow_rows(grid, cells, sd_lnT, sd_b, cell_lnT, cell_b, sd_min):
    """Sources whose marginal sd is below ``cells`` grid cells in ln T or beta (or on a thin ridge)."""
    out = sd_lnT < cells * cell_lnT
    if grid.has_beta:
        out |= sd_b < cells * cell_b
        # a T-beta ridge a fraction of a cell across, when its marginal is
        # also within two cells (wider ridges are summarised well by the rows)
        out |= (sd_min < _RIDGE * cells) & (sd_lnT < 2 * cells * cell_lnT)
    return out


@dataclass
class BlockSummary:
    """Columns, draws and diagnostics of a block; rows can be replaced by a zoomed evaluation."""

    cols: dict
    draws: dict
    ok: np.ndarray
    sd_lnT: np.ndarray
    sd_b: np.ndarray
    cell_lnT: np.ndarray
    cell_b: np.ndarray
    node: np.ndarray
    sd_min: np.ndarray | None = None
    cube: np.ndarray | None = None
    zoom_failed: np.ndarray | None = None
    extra: dict = field(default_factory=dict)

    def narrow(self, grid, cells):
        """Sources whose marginal sd is below ``cells`` grid cells in ln T or beta."""
        return narrow_rows(grid, cells, self.sd_lnT, self.sd_b, self.cell_lnT, self.cell_b, self.sd_min)

    def replace(self, rows, other):
        """Take rows ``rows`` from ``other`` (a summary of exactly those sources)."""
        for key, val in other.cols.items():
            self.cols[key][rows] = val
        for key, val in other.draws.items():
            self.draws[key][rows] = val
        for name in ("ok", "sd_lnT", "sd_b", "cell_lnT", "cell_b", "node", "sd_min"):
            getattr(self, name)[rows] = getattr(other, name)

    def final_flags(self, grid, coarse):
        """Per-source trust flags (tuples) from the draws, widths and zoom checks."""
        failed = self.zoom_failed if self.zoom_failed is not None else np.zeros(self.ok.size, bool)
        too_coarse = (self.narrow(grid, coarse) | failed) & self.ok
        w = np.ones(self.draws["T"].shape[1])
        pT, pb = grid.prior["T"], grid.prior["beta"] if grid.has_beta else None
        masks = trust_masks("T", self.draws["T"], w, pT.low, pT.high, grid.sd_T)
        if pb is not None:
            masks.update(trust_masks("beta", self.draws["beta"], w, pb.low, pb.high, grid.sd_beta))
        flags = []
        for i in range(self.ok.size):  # per-source bookkeeping of the flag masks
            if not self.ok[i]:
                flags.append(("no_valid_grid_node",))
                continue
            fl = [k for k, m in masks.items() if m[i]]
            if too_coarse[i]:
                fl.append("grid_too_coarse")
            # a failed zoom check is the grid's fault, not the model's: no 'poor_fit' then
            if self.cols["ppp"][i] < POOR_FIT_PPP and not failed[i]:
                fl.append("poor_fit")
            flags.append(tuple(fl))
        return flags


def draw(grid, nodes, post, a_hat, sd, n, rng, sd_lnT, sd_b):
    """n weighted draws per source: (node index, T, beta, log10 amplitude).

    A draw picks a node by its mass and moves uniformly within the node's
    cell, shrunk towards the node where the cell is wide compared with the
    posterior: the node masses alone already have the right variance
    (rectangle rule), and a full-cell jitter would add h^2/12. The shrink
    factor min(1, _JITTER sd / h) caps that excess at 2 % of the variance.
    """
    ns, nn = post.shape
    n_amp = grid.amplitude.n_uniform
    uni = rng.uniform(size=(ns, 3 + n_amp, n))
    cum = np.cumsum(post, axis=1)
    cum = cum / cum[:, -1:] + np.arange(ns)[:, None]
    u = uni[:, 0] + np.arange(ns)[:, None]
    flat = np.minimum(np.searchsorted(cum.ravel(), u.ravel()), ns * nn - 1)
    node = (flat - np.arange(ns).repeat(n) * nn).reshape(ns, n).clip(0, nn - 1)
    it, ib = np.divmod(node, nodes.n_beta)
    jt, jb = uni[:, 1], uni[:, 2]
    lt0, lt1 = take(nodes.lt_edges, it), take(nodes.lt_edges, it + 1)
    lnode = take(nodes.lt, it)
    cell_T = np.diff(nodes.lt, axis=1).max(axis=1)
    cT = np.minimum(1.0, _JITTER * sd_lnT / cell_T)[:, None]
    T = np.exp(lnode + cT * (lt0 + jt * (lt1 - lt0) - lnode))
    if grid.has_beta:
        b0, b1 = take(nodes.beta_edges, ib), take(nodes.beta_edges, ib + 1)
        cb = np.minimum(1.0, _JITTER * sd_b / np.diff(nodes.beta, axis=1).max(axis=1))[:, None]
        bnode = take(nodes.beta, ib)
        beta = bnode + cb * (b0 + jb * (b1 - b0) - bnode)
    else:
        beta = np.full((ns, n), np.nan)
    rows = np.arange(ns)[:, None]
    amp = grid.amplitude.draw(a_hat[rows, node], sd[rows, node], np.moveaxis(uni[:, 3:], 1, -1))
    return node, T, beta, np.log10(amp)


def chi2_of(grid, flux, err, limit_only, model):
    """chi^2 of data (ns, nb) against models (ns, nm, nb) with calibration terms."""
    det = ~limit_only & np.isfinite(err)
    iv = np.where(det, 1.0 / np.where(det, err, 1.0) ** 2, 0.0)[:, None, :]
    resid = np.where(det, flux, 0.0)[:, None, :] - model
    return calibrated_chi2(resid, model, iv, grid._masks, grid._d2)[0]


def ppp(grid, nodes, flux, err, limit_only, node, lamp, rng):
    """Posterior predictive p-value of chi^2 from replicated data sets at the draws."""
    model = (10.0**lamp)[..., None] * nodes.g_at(node)  # (ns, nd, nb)
    det = ~limit_only & np.isfinite(err)
    sig = np.where(det, err, 0.0)[:, None, :]
    k = len(grid._d2)
    z = rng.standard_normal((*model.shape[:2], model.shape[2] + k))
    noise = z[..., : model.shape[2]] * sig
    for j, (m, d2) in enumerate(zip(grid._masks, grid._d2, strict=True)):
        noise = noise + model * m * (np.sqrt(d2) * z[..., model.shape[2] + j])[..., None]
    chi_obs = chi2_of(grid, flux, err, limit_only, model)
    iv = np.where(det, 1.0 / np.where(det, err, 1.0) ** 2, 0.0)[:, None, :]
    chi_rep = calibrated_chi2(np.where(det[:, None, :], noise, 0.0), model, iv, grid._masks, grid._d2)[0]
    return np.mean(chi_rep >= chi_obs, axis=1)


def _correlation(cube, nodes):
    """Posterior correlation of T and beta from the node masses (rectangle rule)."""
    ns = cube.shape[0]
    # moments about each row's middle node: the same covariance, without the cancellation
    # of E[T beta] - E[T] E[beta] for a window far narrower than its distance from 0
    T = np.exp(nodes.lt)
    Tn = np.broadcast_to(T - T[:, T.shape[1] // 2, None], (ns, nodes.lt.shape[1]))
    bn = np.broadcast_to(nodes.beta - nodes.beta[:, nodes.n_beta // 2, None], (ns, nodes.n_beta))
    pT, pb = cube.sum(axis=2), cube.sum(axis=1)
    mT, mb = np.sum(pT * Tn, axis=1), np.sum(pb * bn, axis=1)
    cTb = np.sum(np.matmul(cube, bn[:, :, None])[..., 0] * Tn, axis=1) - mT * mb
    vT, vb = np.sum(pT * Tn**2, axis=1) - mT**2, np.sum(pb * bn**2, axis=1) - mb**2
    with np.errstate(invalid="ignore", divide="ignore"):
        return cTb / np.sqrt(vT * vb)


def _min_principal_sd(cube):
    """Smallest principal sd of the node masses (ns, nT, nB), in cells (node-index units)."""
    _, nT, nB = cube.shape
    i, j = np.arange(nT, dtype=float), np.arange(nB, dtype=float)
    pT, pb = cube.sum(axis=2), cube.sum(axis=1)
    mi, mj = pT @ i, pb @ j
    a = pT @ i**2 - mi**2
    c = pb @ j**2 - mj**2
    b = (cube @ j) @ i - mi * mj
    lam = 0.5 * (a + c) - np.sqrt(0.25 * (a - c) ** 2 + b * b)
    return np.sqrt(np.maximum(lam, 0.0))


def _map_columns(grid, nodes, cols, a_hat, chi2, flux, err, limit_only):
    """MAP node (max of -chi2/2 + log prior density, amplitude at its optimum) and chi^2 there."""
    ns = flux.shape[0]
    prof = -0.5 * chi2 + nodes.log_density
    imap = np.argmax(np.where(np.isfinite(prof), prof, -np.inf), axis=1)
    rows = np.arange(ns)
    it, ib = np.divmod(imap, nodes.n_beta)
    cols["T_map"] = np.exp(take(nodes.lt, it[:, None])[:, 0])
    if grid.has_beta:
        cols["beta_map"] = take(nodes.beta, ib[:, None])[:, 0]
    amp_map = np.clip(a_hat[rows, imap], grid.amplitude.a_lo, grid.amplitude.a_hi)
    cols[f"{grid.amp_name}_map"] = np.log10(amp_map)
    m_map = amp_map[:, None] * nodes.g_at(imap[:, None])[:, 0]
    cols["chi2_map"] = chi2_of(grid, flux, err, limit_only, m_map[:, None, :])[:, 0]
    n_det = np.sum(~limit_only & np.isfinite(err), axis=1)
    dof = n_det - len(grid.names)
    cols["n_bands_used"] = n_det
    cols["dof"] = dof
    with np.errstate(divide="ignore", invalid="ignore"):
        cols["chi2_reduced"] = np.where(dof > 0, cols["chi2_map"] / np.where(dof > 0, dof, 1), np.nan)


def summarise_nodes(grid, nodes, flux, err, limit_only, rng, n, n_ppp, evaluated=None, skip_narrow=None):
    """Summary columns and draws of a block on ``nodes`` (shared or per source): a BlockSummary.

    ``evaluated``: the block's ``grid.log_posterior`` on these nodes, when the caller has it.
    ``skip_narrow``: a width in cells (shared nodes only); sources narrower than
    that (:func:`narrow_rows`) get only their MAP, widths and ``ok``, since the
    zoom replaces the rest; their draws and other columns are NaN until then.
    """
    logp, a_hat, sd, chi2 = grid.log_posterior(flux, err, limit_only, nodes) if evaluated is None else evaluated
    ns = flux.shape[0]
    peak = logp.max(axis=1, keepdims=True)
    ok = np.isfinite(peak[:, 0])
    post = np.where(ok[:, None], np.exp(logp - np.where(ok[:, None], peak, 0.0)), 1.0)
    post /= post.sum(axis=1, keepdims=True)
    cube = post.reshape(ns, nodes.lt.shape[1], nodes.n_beta)
    cols = {}
    qT, sd_lnT = axis_quantiles(cube.sum(axis=2), nodes.lt, nodes.lt_edges, nodes.affine)
    cols.update({f"T_{k}": np.exp(v) for k, v in qT.items()})
    sd_b = np.full(ns, np.nan)
    if grid.has_beta:
        qb, sd_b = axis_quantiles(cube.sum(axis=1), nodes.beta, nodes.beta_edges, nodes.affine)
        cols.update({f"beta_{k}": v for k, v in qb.items()})
    cell_T = np.broadcast_to(np.diff(nodes.lt, axis=1).max(axis=1), (ns,)).copy()
    cell_b = (np.broadcast_to(np.diff(nodes.beta, axis=1).max(axis=1), (ns,)).copy() if grid.has_beta
              else np.full(ns, np.nan))
    sd_min = _min_principal_sd(cube) if grid.has_beta else np.full(ns, np.inf)
    todo = np.arange(ns)
    if skip_narrow is not None:
        todo = np.flatnonzero(~(narrow_rows(grid, skip_narrow, sd_lnT, sd_b, cell_T, cell_b, sd_min) & ok))
    full = todo.size == ns
    sub = slice(None) if full else todo
    rr = rng if full else _RowRandom(rng, todo)
    if todo.size:
        node_s, T_s, beta_s, lamp_s = draw(grid, nodes, post[sub], a_hat[sub], sd[sub], n, rr, sd_lnT[sub],
                                           sd_b[sub])
    if full:
        node, T, beta, lamp = node_s, T_s, beta_s, lamp_s
    else:
        node = np.zeros((ns, n), int)
        T, beta, lamp = (np.full((ns, n), np.nan) for _ in range(3))
        if todo.size:
            node[todo], T[todo], beta[todo], lamp[todo] = node_s, T_s, beta_s, lamp_s
    if grid.has_beta:
        cols["T_beta_corr"] = _correlation(cube, nodes)
    qa = np.full((len(QUANTILES), ns), np.nan)
    if todo.size:
        qa[:, sub] = np.quantile(lamp_s, list(QUANTILES.values()), axis=1)
    cols.update({f"{grid.amp_name}_{k}": qa[i] for i, k in enumerate(QUANTILES)})
    _map_columns(grid, nodes, cols, a_hat, chi2, flux, err, limit_only)
    cols["ppp"] = np.full(ns, np.nan)
    if todo.size:
        cols["ppp"][sub] = ppp(grid, nodes, flux[sub], err[sub], limit_only[sub], node_s[:, :n_ppp],
                               lamp_s[:, :n_ppp], rr)
    for c in cols.values():
        if c.dtype.kind == "f":
            c[~ok] = np.nan
    draws = {"T": T, "beta": beta, grid.amp_name: lamp}
    return BlockSummary(cols=cols, draws=draws, ok=ok, sd_lnT=sd_lnT, sd_b=sd_b, cell_lnT=cell_T, cell_b=cell_b,
                        node=node, sd_min=sd_min, cube=cube)
