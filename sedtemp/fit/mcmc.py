"""Per-source MCMC posterior with emcee, started on the grid posterior.

The only module of sedtemp that imports emcee.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any

import emcee
import numpy as np
from numpy.typing import ArrayLike
from scipy.optimize import minimize
from scipy.special import log_ndtr
from scipy.stats import qmc

from ..errors import (
    ConvergenceWarning,
    GridWarning,
    InputError,
    PriorEdgeWarning,
    SedtempWarning,
)
from ..likelihood import Calibration, PhotometryLikelihood
from ..photometry import prepare
from ..seeds import resolve_seed
from . import defaults
from ._blocks import conditional, group_sums
from ._data import require_bands, resolve_prior
from .amplitude import (
    LogUniformLinearAmplitude,
    _logsumexp,
    amplitude_marginal,
    quadrature_nodes,
)
from .diagnostics import ess_bulk_and_rhat, split_rhat
from .grid import GridPosterior, _axis_nodes, _prior_sd
from .result import FitResult
from .summary import POOR_FIT_PPP, trust_flags

if TYPE_CHECKING:
    import astropy.units as u

    from ..bands import BandSet
    from ..models import ModifiedBlackbody, SEDModel

__all__ = ["LogPosterior", "default_model", "fit_source"]

#: The kept chain must be this many integrated autocorrelation times long, so
#: that an early, lucky ESS estimate does not stop it.
_TAU_LENGTH = 10
#: Split R-hat (rank-normalised) below which the walkers agree (Vehtari et al. 2021).
_RHAT_MAX = 1.01
#: Burn-in: this many autocorrelation times are discarded (at most half the chain).
_BURN_TAU = 3
#: Split R-hat of the raw values above which the rank-normalised check is skipped (its
#: threshold is _RHAT_MAX = 1.01). On the benchmark's chains the rank-normalised value
#: exceeded the raw one by at most 0.0005 (measured over 4 fits, 50 checks), 10x below the margin.
_RHAT_PRECHECK = 1.015
_PPP_DRAWS = 500
#: 16-node Gauss-Hermite rule, weights folded with exp(x^2) so the integrand is used as is.
_GH_X, _GH_W = np.polynomial.hermite.hermgauss(16)
_GH_LOGW = np.log(_GH_W) + _GH_X**2
#: Nodes of the coarse grid posterior that places the walkers.
_START_N_T, _START_N_BETA = 40, 24


def default_model() -> ModifiedBlackbody:
    """The model used when none is given: optically thin, amplitude as tau (no distance needed)."""
    import astropy.units as u

    from ..models import ModifiedBlackbody

    return ModifiedBlackbody(amplitude="tau", solid_angle=1.0 * u.arcsec**2)


class LogPosterior:
    """Vectorised log posterior, ``(n_walkers, n_params) -> (n_walkers,)``; picklable.

    Returns ``-inf`` outside the prior or where the model is unphysical, never NaN.
    """

    def __init__(self, model, bands, likelihood, prior, used):
        self.model, self.bands, self.likelihood, self.prior = model, bands, likelihood, prior
        self.names = tuple(model.param_names)
        self.used = used

    def model_band_fluxes(self, theta: ArrayLike) -> np.ndarray:
        sed = self.model.sed_si(self.bands.nu_grid_hz, theta)
        return self.bands.band_fluxes(sed)[:, self.used]

    def __call__(self, theta):
        theta = np.atleast_2d(theta)
        lp = self.prior.logpdf(theta, self.names)
        good = np.isfinite(lp) & np.asarray(self.model.valid(theta), bool)
        out = np.full(theta.shape[0], -np.inf)
        if good.any():
            with np.errstate(over="ignore", invalid="ignore"):
                ll = self.likelihood(self.model_band_fluxes(theta[good]))
            out[good] = np.where(np.isfinite(ll), ll + lp[good], -np.inf)
        return out


class MarginalLogPosterior:
    """Log posterior of the free parameters (T[, beta]) with the linear amplitude integrated out.

    ``(n_walkers, n_free) -> (n_walkers, 3)``: column 0 the log posterior
    (``-inf`` outside the prior, never NaN), columns 1-2 the conditional
    amplitude's Gaussian mean and sd (emcee keeps them as blobs, so the
    amplitude is drawn afterwards without re-evaluating the model).

    The integral over A uses the exact likelihood (calibration covariance
    and upper limits included) on 48 quadrature nodes placed on the
    conditional Gaussian (:func:`~sedtemp.fit.amplitude.quadrature_nodes`),
    so it is exact to quadrature accuracy for either amplitude prior.
    """

    def __init__(self, model, bands, likelihood, prior, used, cal):
        self.model, self.bands, self.likelihood, self.prior = model, bands, likelihood, prior
        self.names = tuple(model.param_names)
        self.amp_name = model.amplitude_name
        self.free = tuple(n for n in self.names if n != self.amp_name)
        self.used = used
        self.amplitude = amplitude_marginal(prior[self.amp_name])
        det = likelihood.detected
        self._F = np.where(det, likelihood.flux, 0.0)[None]
        self._iv = np.where(det, 1.0 / np.where(det, likelihood.err, 1.0) ** 2, 0.0)[None]
        c = np.zeros((det.size, 0)) if cal is None else np.where(det[:, None], cal, 0.0)
        self._masks = (c > 0).astype(float).T
        self._d2 = np.array([col[col > 0].max() ** 2 for col in c.T]) if c.shape[1] else np.zeros(0)
        self._uniform_linear = not isinstance(self.amplitude, LogUniformLinearAmplitude)
        a = self.amplitude
        self._norm = (-np.log(a.a_hi - a.a_lo) if self._uniform_linear
                      else -np.log(np.log(10.0) * (prior[self.amp_name].high - prior[self.amp_name].low)))

    def _nodes(self, mu, sd):
        """Quadrature nodes for int L dA / A: Gauss-Hermite on the conditional Gaussian when every
        walker's amplitude is > 16 sd from 0 and 8 sd from the prior bounds (the integrand is then
        a near-Gaussian times a slowly varying 1 / A); the general two-panel rule otherwise."""
        a = self.amplitude
        if np.all((mu > 16 * sd) & (mu - 8 * sd > a.a_lo) & (mu + 8 * sd < a.a_hi)):
            A = mu[:, None] + np.sqrt(2.0) * sd[:, None] * _GH_X
            return A, np.log(np.sqrt(2.0) * sd)[:, None] + _GH_LOGW - np.log(A)
        return quadrature_nodes(mu, sd, a.a_lo, a.a_hi)

    def full_theta(self, x: np.ndarray, log_amp: ArrayLike | None = None) -> np.ndarray:
        """(n, n_free) -> (n, n_params) with the amplitude column (0 unless given)."""
        cols = dict(zip(self.free, np.atleast_2d(x).T, strict=True))
        cols[self.amp_name] = np.zeros(len(x)) if log_amp is None else log_amp
        return np.column_stack([cols[n] for n in self.names])

    def templates(self, x: np.ndarray) -> np.ndarray:
        theta = self.full_theta(x)
        return self.bands.band_fluxes(self.model.template_si(self.bands.nu_grid_hz, theta))[:, self.used]

    def node_log_likelihood(self, A: np.ndarray,
                            sums: tuple[np.ndarray, np.ndarray, np.ndarray, list[tuple[np.ndarray, np.ndarray]]],
                            g: np.ndarray) -> np.ndarray:
        """The likelihood's log at amplitudes A (n, q) of templates g (n, n_used), (n, q).

        Equal to ``likelihood(A[..., None] * g[:, None])`` (to rounding, tested)
        but from the :func:`~sedtemp.fit._blocks.group_sums` of the templates:
        with m = A g and r = F - A g over the detected bands,
        sum r^2 / sigma^2 = f - 2 A b + A^2 a, and per calibration group
        a_k(A) = A^2 a_k and b_k(A) = A b_k - A^2 a_k (the Woodbury terms of
        :func:`sedtemp.likelihood.calibrated_chi2`).
        """
        s_gg, s_fg, s_ff, parts = sums
        s_gg, s_fg = s_gg[0][:, None], s_fg[0][:, None]
        chi2 = s_ff[0, 0] - 2.0 * A * s_fg + A * A * s_gg
        logdet = np.zeros_like(A)
        for (g_gg, g_fg), dk in zip(parts, self._d2, strict=True):  # a few calibration groups
            a_k = A * A * g_gg[0][:, None]
            b_k = A * g_fg[0][:, None] - a_k
            den = 1.0 + dk * a_k
            chi2 = chi2 - dk * b_k * b_k / den
            logdet = logdet + np.log(den)
        lk = self.likelihood
        out = lk._const - 0.5 * (chi2 + logdet)
        if lk.limit_only.any():
            gl = g[:, lk.limit_only]
            out = out + np.sum(log_ndtr((lk._lim_f - A[..., None] * gl[:, None, :]) / lk._lim_err), axis=-1)
        return out

    def __call__(self, x):
        x = np.atleast_2d(x)
        out = np.full((x.shape[0], 3), np.nan)
        out[:, 0] = -np.inf
        lp = self.prior.logpdf(x, self.free)
        good = np.isfinite(lp) & np.asarray(self.model.valid(self.full_theta(x)), bool)
        if not good.any():
            return out
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            g = self.templates(x[good])
            sums = group_sums(self._F, self._iv, g, self._masks)
            a_hat, sd, _, _ = conditional(self._F, self._iv, g, self._masks, self._d2, sums)
            a_hat, sd = a_hat[0], sd[0]
            ok = np.isfinite(a_hat) & np.isfinite(sd) & (sd > 0)
            A, lw = self._nodes(np.where(ok, a_hat, 1.0), np.where(ok, sd, 1.0))
            ll = self.node_log_likelihood(A, sums, g)
            if self._uniform_linear:
                lw = lw + np.log(A)
            lm = _logsumexp(lw + ll) + self._norm
        val = np.where(ok & np.isfinite(lm), lm + lp[good], -np.inf)
        out[good, 0] = val
        out[good, 1], out[good, 2] = a_hat, sd
        return out


def _start_from_grid(post_fn, model, bands, prior, calibration, phot, used, n_walkers, rng, grid=None,  # noqa: ARG001 - kept for a uniform call signature
                     columns=None):
    """Draws of the exact grid posterior (linear-amplitude models): the first ``n_walkers`` place the walkers.

    All of them (``4 n_walkers`` less any outside the prior) shape the
    independence proposal of :func:`_moves`. A coarse grid is enough here
    (narrow posteriors are zoomed automatically); callers fitting many
    sources with one set-up pass ``grid`` to reuse it.
    ``columns``: the parameters sampled (default all).
    """
    if grid is None:
        grid = GridPosterior(bands, model=model, prior=prior, calibration=calibration,
                             T_nodes=_axis_nodes(prior["T"], _START_N_T, True),
                             beta_nodes=(_axis_nodes(prior["beta"], _START_N_BETA, False)
                                         if "beta" in prior else None))
    err = np.where(phot.missing, np.inf, phot.err)
    with warnings.catch_warnings():
        # the start only needs draws near the posterior; a coarse grid is no problem here
        warnings.simplefilter("ignore", GridWarning)
        _, extra = grid.summarise(phot.flux, err, phot.limit_only, n_draws=4 * n_walkers, n_ppp=2,
                                  rng=rng, keep_draws=True)
    d = extra["draws"]
    p0 = np.column_stack([d[n][0] for n in (columns or model.param_names)])
    lp = post_fn(p0)
    lp = lp[:, 0] if lp.ndim == 2 else lp
    p0 = p0[np.isfinite(lp)]
    if len(p0) < n_walkers:
        return None
    return p0


def _start_from_optimum(post, names, prior, n_walkers, rng):
    """Deterministic optimum (Halton design over the prior, then Nelder-Mead), plus a small ball."""
    def post_fn(x):
        lp = post(x)
        return lp[:, 0] if lp.ndim == 2 else lp

    lo, hi = prior.bounds(names)
    finite = np.isfinite(lo) & np.isfinite(hi)
    sd = np.array([_prior_sd(prior[n]) for n in names])
    centre = np.array([np.median(prior[n].sample(np.random.default_rng(0), 2001)) for n in names])
    lo = np.where(finite, lo, centre - 3 * sd)
    hi = np.where(finite, hi, centre + 3 * sd)
    design = qmc.scale(qmc.Halton(d=len(names), scramble=False).random(2048)[1:], lo, hi)
    lp = post_fn(design)
    if not np.isfinite(lp).any():
        raise InputError("no point of the prior has a finite posterior; check the data units and priors")
    best = design[np.argsort(-lp)[:3]]
    res = [minimize(lambda x: -post_fn(x[None])[0] if np.isfinite(post_fn(x[None])[0]) else 1e300,
                    b, method="Nelder-Mead", options={"xatol": 1e-6, "fatol": 1e-8, "maxiter": 4000})
           for b in best]
    x0 = min(res, key=lambda r: r.fun).x
    p0 = x0 + 1e-4 * sd * rng.standard_normal((4 * n_walkers, len(names)))
    ok = np.isfinite(post_fn(p0))
    if ok.sum() < n_walkers:
        raise InputError("could not place walkers around the optimum inside the prior")
    return p0[ok][:n_walkers]


def _diagnostics(chain):
    """Rank-normalised bulk ESS, split R-hat and tau = draws / ESS per parameter of a (steps, walkers, d) chain."""
    x = np.moveaxis(chain, 1, 0)  # (walkers, steps, d)
    ess, rh = np.array([ess_bulk_and_rhat(x[..., j]) for j in range(x.shape[2])]).T
    tau = x.shape[0] * x.shape[1] / ess
    return ess, rh, tau


def _moves(draws=None):
    # Differential-evolution proposals follow the curved T-beta ridge better than
    # the stretch move alone; the stretch move keeps the ensemble affine-invariant.
    # (DESnookerMove was tried too: no gain in tau here, and its Python-level
    # proposal loop cost ~10 % of the run.) With grid draws, half the steps are
    # independence proposals shaped by them: one log-posterior call for all
    # walkers per step, and a tau of a few steps where the draws fit well.
    if draws is None:
        return [(emcee.moves.DEMove(), 0.8), (emcee.moves.StretchMove(), 0.2)]
    return [(_independence_move(draws), _IND_WEIGHT), (emcee.moves.DEMove(), 0.8 * (1 - _IND_WEIGHT)),
            (emcee.moves.StretchMove(), 0.2 * (1 - _IND_WEIGHT))]


#: Share of steps that are independence proposals when the start had grid draws.
_IND_WEIGHT = 0.5
#: Degrees of freedom and width (x the draws' covariance) of the independence proposal.
_IND_DOF, _IND_WIDTH = 4.0, 1.3


def _independence_move(draws):
    """Independence Metropolis-Hastings (Tierney 1994) with a fixed multivariate-t proposal.

    The proposal is built once, before sampling, from grid-posterior draws, so
    the kernel keeps the posterior invariant; heavy tails (``_IND_DOF``) and a
    width above the draws' own cover the posterior's tails.
    """
    mu = draws.mean(axis=0)
    d = draws.shape[1]
    cov = np.atleast_2d(np.cov(draws, rowvar=False)) * _IND_WIDTH**2 * (_IND_DOF - 2) / _IND_DOF
    chol = np.linalg.cholesky(cov + 1e-12 * np.diag(np.diag(cov)))

    def log_q(x):
        z = np.linalg.solve(chol, (x - mu).T)
        return -0.5 * (_IND_DOF + d) * np.log1p(np.sum(z * z, axis=0) / _IND_DOF)

    def propose(x0, random):
        n = x0.shape[0]
        z = random.standard_normal((n, d)) / np.sqrt(random.chisquare(_IND_DOF, n) / _IND_DOF)[:, None]
        x1 = mu + z @ chol.T
        return x1, log_q(x0) - log_q(x1)

    return emcee.moves.MHMove(propose)


def _run_chain(post_fn, p0, seed, *, ess_target, check_every, max_steps, key_idx, draws=None):
    """Run emcee until the key parameters reach ``ess_target`` with R-hat < 1.01, or ``max_steps``."""
    nw, nd = p0.shape
    sampler = emcee.EnsembleSampler(nw, nd, post_fn, vectorize=True, moves=_moves(draws))
    state = emcee.State(p0, random_state=np.random.RandomState(seed).get_state())
    tau = np.full(nd, check_every / 10.0)
    converged = False
    burn = 0
    while sampler.iteration < max_steps:
        state = sampler.run_mcmc(state, min(check_every, max_steps - sampler.iteration), progress=False)
        chain = sampler.get_chain()
        burn = int(min(chain.shape[0] // 2, np.ceil(_BURN_TAU * np.max(tau))))
        if (chain.shape[0] - burn) * nw < ess_target:
            continue  # cannot have enough effective draws yet
        # cheap checks first: the split R-hat of the raw values (far above the threshold:
        # not converged) and emcee's autocorrelation time; the rank-normalised
        # diagnostics only when both say the targets may be reached
        if max(split_rhat(chain[burn:, :, j].T) for j in key_idx) > _RHAT_PRECHECK:
            continue
        tau_fast = emcee.autocorr.integrated_time(chain[burn:], tol=0)
        if np.any(nw * (chain.shape[0] - burn) / tau_fast[key_idx] < 0.8 * ess_target):
            tau = tau_fast
            continue
        ess, rh, tau = _diagnostics(chain[burn:])
        if _meets(ess, rh, tau, chain.shape[0] - burn, ess_target, key_idx):
            # the window reported (and re-checked by the result) starts >= 3 tau in,
            # tau as measured now; a later start is checked again before stopping
            new_burn = int(min(chain.shape[0] // 2, np.ceil(_BURN_TAU * np.max(tau))))
            if new_burn <= burn:
                converged = True
                break
            burn = new_burn
            ess, rh, tau = _diagnostics(chain[burn:])
            if _meets(ess, rh, tau, chain.shape[0] - burn, ess_target, key_idx):
                converged = True
                break
    return sampler, burn, converged


def _meets(ess, rh, tau, n_kept, ess_target, key_idx):
    """The stopping rule: ESS and R-hat of the key parameters, and a kept chain > 10 tau long."""
    return bool(np.all(ess[key_idx] >= ess_target) and np.all(rh[key_idx] < _RHAT_MAX)
                and n_kept > _TAU_LENGTH * np.max(tau))


def fit_source(flux: u.Quantity | ArrayLike, flux_err: u.Quantity | ArrayLike, bands: BandSet, *,
               model: SEDModel | None = None, prior: Mapping[str, Any] | None = None,
               calibration: Calibration | Mapping[str, tuple[Sequence[str], float]] | None = None,
               upper_limits: Sequence[str] | ArrayLike | None = None,
               seed: int | np.random.SeedSequence | None = None, n_walkers: int = defaults.N_WALKERS,
               ess_target: float = defaults.ESS_TARGET, max_steps: int = defaults.MAX_STEPS,
               check_every: int = defaults.CHECK_EVERY, start: str = "auto",
               start_grid: GridPosterior | None = None, source_id: object = None,
               marginalise: bool = True) -> FitResult:
    """MCMC posterior of one source's SED parameters.

    Parameters
    ----------
    flux, flux_err : Quantity, array_like or masked array, shape (n_bands,)
        Flux densities and 1-sigma errors, in the order of ``bands``. A bare
        number is in Jy (with a warning saying so). Negative and low-S/N
        fluxes are used as measured. NaN in both flux and error, or a masked
        entry, marks an unobserved band.
    bands : BandSet
    model : SEDModel, optional, keyword-only
        Default :func:`default_model`: optically thin modified blackbody with
        the amplitude as tau at nu0 for a 1 arcsec^2 source (T and beta do not
        depend on that choice).
    prior : Prior or mapping, optional
        Priors per parameter; entries given replace the model's defaults
        (``model.default_prior()``), the rest keep them.
    calibration : Calibration or mapping, optional
        Calibration groups, e.g. ``{"long": (["b250", "b350", "b500"], 0.05)}``.
    upper_limits : list of band names or bool array, optional
        Bands known only as upper limits: ``flux`` holds the limit, ``flux_err``
        its 1-sigma value (e.g. limit / 3 for a 3-sigma limit).
    seed : int or SeedSequence, optional
        Makes the run bit-for-bit repeatable; None means 0 (as everywhere in sedtemp).
    n_walkers : int
        emcee walkers (default :data:`sedtemp.fit.defaults.N_WALKERS`).
    ess_target : float
        Stop when T and beta (or all parameters, if neither) reach this
        rank-normalised bulk ESS with split R-hat < 1.01 and the kept chain
        is > 10 autocorrelation times long.
    max_steps : int
        Cap on steps; a run that hits it is flagged ``not_converged``.
    check_every : int
        Steps between convergence checks.
    start : {"auto", "grid", "optimum"}
        Walker start: the exact grid posterior (linear-amplitude models with
        T and beta) or a deterministic optimum.
    start_grid : GridPosterior, optional
        A grid built once for this band set, model, prior and calibration,
        reused for the start when fitting many sources.
    source_id : optional
        Named in error messages.
    marginalise : bool
        For linear-amplitude models, sample (T, beta) on the posterior with
        the amplitude integrated out and draw the amplitude afterwards from
        its conditional (:class:`MarginalLogPosterior`); False samples all
        parameters jointly.

    Returns
    -------
    FitResult

    Raises
    ------
    InputError
        Wrong flux unit, NaN or non-positive errors, shapes that do not match
        the bands, fewer usable bands than free parameters, a prior for an
        unknown parameter.
    """
    model = default_model() if model is None else model
    names = tuple(model.param_names)
    prior = resolve_prior(model, prior)
    phot = prepare(flux, flux_err, bands.names, upper_limits=upper_limits,
                   source_label=None if source_id is None else [source_id])
    if phot.flux.shape[0] != 1:
        raise InputError(f"fit_source fits one source; got {phot.flux.shape[0]} rows (use grid_posterior or the batch runner)")
    require_bands(phot, len(names), bands.names, source_id)
    if calibration is not None and not isinstance(calibration, Calibration):
        calibration = Calibration(calibration)
    cal = calibration.matrix(bands.names) if calibration is not None else None
    used = ~phot.missing[0]
    like = PhotometryLikelihood(phot.flux[0, used], phot.err[0, used], limit_only=phot.limit_only[0, used],
                                calibration=None if cal is None else cal[used])
    gridable = model.amplitude_name is not None and set(names) - {model.amplitude_name} in ({"T"}, {"T", "beta"})
    marginal = gridable and marginalise and start != "optimum"
    if marginal:
        post = MarginalLogPosterior(model, bands, like, prior, used, None if cal is None else cal[used])
        sampled = post.free
    else:
        post = LogPosterior(model, bands, like, prior, used)
        sampled = names
    ss = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(resolve_seed(seed))
    s_start, s_chain, s_ppp = ss.spawn(3)
    rng = np.random.default_rng(s_start)
    p0 = draws = None
    if start in ("auto", "grid") and gridable:
        draws = _start_from_grid(post, model, bands, prior, calibration, phot, used, n_walkers, rng, start_grid,
                                 columns=sampled)
        p0 = None if draws is None else draws[:n_walkers]
    elif start == "grid":
        raise InputError(f"start='grid' needs a linear-amplitude model with T and beta; {type(model).__name__} is not")
    if p0 is None:
        p0 = _start_from_optimum(post, sampled, prior, n_walkers, rng)
    key_idx = [sampled.index(k) for k in ("T", "beta") if k in sampled] or list(range(len(sampled)))
    chain_seed = int(s_chain.generate_state(1)[0])
    sampler, burn, converged = _run_chain(post, p0, chain_seed, ess_target=ess_target,
                                          check_every=check_every, max_steps=max_steps, key_idx=key_idx,
                                          draws=draws)
    chain, lnp = _full_chain(sampler, post, marginal, np.random.default_rng(s_ppp))
    return _make_result(chain, lnp, sampler, burn, converged, post, model, bands, prior, phot, like,
                        np.random.default_rng(s_ppp), seed, ess_target, key_idx)


def _full_chain(sampler, post, marginal, rng):
    """(steps, walkers, n_params) chain in the model's parameter order, and the log posterior.

    For the marginal sampler the amplitude of every step is drawn from its
    conditional given (T, beta) (the blobs hold its Gaussian mean and sd).
    """
    chain = sampler.get_chain()
    lnp = sampler.get_log_prob()
    if not marginal:
        return chain, lnp
    blobs = np.asarray(sampler.get_blobs(), float)  # (steps, walkers, 2)
    mu, sd = blobs[..., 0], blobs[..., 1]
    amp = post.amplitude.draw(mu, sd, rng.uniform(size=(*mu.shape, post.amplitude.n_uniform)))
    full = post.full_theta(chain.reshape(-1, chain.shape[2]), np.log10(amp).ravel())
    return full.reshape((*chain.shape[:2], len(post.names))), lnp


def _make_result(chain, lnp_chain, sampler, burn, converged, post, model, bands, prior, phot, like, rng, seed,
                 ess_target, key_idx):  # noqa: ARG001 - kept for a uniform call signature
    names = tuple(model.param_names)
    nw = chain.shape[1]
    kept = chain[burn:]
    flat = kept.reshape(-1, len(names))
    lnp = lnp_chain[burn:].reshape(-1)
    ess, rh, tau = _diagnostics(kept)
    key = [names.index(n) for n in ("T", "beta") if n in names] or list(range(len(names)))
    if not (np.all(ess[key] >= ess_target) and np.all(rh[key] < _RHAT_MAX)):
        converged = False
    samples = {n: flat[:, j].copy() for j, n in enumerate(names)}
    full_post = LogPosterior(model, bands, like, prior, post.used)
    imap = int(np.argmax(lnp))
    map_params = {n: float(flat[imap, j]) for j, n in enumerate(names)}
    m_map = full_post.model_band_fluxes(flat[imap][None])
    chi2_map = float(like.chi2_and_logdet(m_map)[0][0])
    idx = rng.choice(len(flat), size=min(_PPP_DRAWS, len(flat)), replace=False)
    chi_obs, chi_rep = like.predictive_chi2(full_post.model_band_fluxes(flat[idx]), rng)
    ppp = float(np.mean(chi_rep >= chi_obs))
    n_used = int(like.detected.sum())
    flags = _flags(samples, names, prior, ppp, converged, kept.shape[0], ess, rh, ess_target)
    return FitResult(
        samples=samples, log_prob=lnp, param_names=names, units=dict(model.param_units),
        ess={n: float(e) for n, e in zip(names, ess, strict=True)}, tau={n: float(t) for n, t in zip(names, tau, strict=True)},
        acceptance_fraction=float(np.mean(sampler.acceptance_fraction)), converged=bool(converged),
        flags=tuple(flags), map_params=map_params, chi2_map=chi2_map, dof=n_used - len(names), ppp=ppp,
        n_bands_used=n_used, model=model, bands=bands, flux_si=phot.flux[0], err_si=phot.err[0],
        limit_only=phot.limit_only[0], chain=chain, n_steps=chain.shape[0], n_walkers=nw, burn=burn,
        seed=seed, rhat={n: float(r) for n, r in zip(names, rh, strict=True)}, log_prob_chain=lnp_chain,
        sampled=tuple(post.free) if isinstance(post, MarginalLogPosterior) else names,
    )


def _flags(samples, names, prior, ppp, converged, n_kept, ess, rh, ess_target):
    flags = []
    if ppp < POOR_FIT_PPP:
        flags.append("poor_fit")
        warnings.warn(f"posterior predictive p-value {ppp:.3g} < {POOR_FIT_PPP}: the model does not "
                      "describe the data (flag 'poor_fit')", SedtempWarning, stacklevel=4)
    if not converged:
        flags.append("not_converged")
        warnings.warn(f"MCMC not converged: {n_kept} kept steps, bulk ESS {np.round(ess, 0)} "
                      f"(target {ess_target:g}), R-hat {np.round(rh, 3)}; flag 'not_converged'",
                      ConvergenceWarning, stacklevel=4)
    w = np.ones(len(next(iter(samples.values()))))
    for n in names:
        pr = prior[n]
        fl = trust_flags(n, samples[n], w, pr.low, pr.high, _prior_sd(pr))
        if any("prior_low" in f or "prior_high" in f for f in fl):
            warnings.warn(f"posterior of {n} piles up against its prior edge [{pr.low:g}, {pr.high:g}]",
                          PriorEdgeWarning, stacklevel=4)
        flags += fl
    return flags
