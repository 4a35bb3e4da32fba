"""Per-source MCMC posterior with emcee, started on the grid posterior.

The only module of sedtemp that imports emcee.
"""

from __future__ import annotations

import warnings

import emcee
import numpy as np
from scipy.optimize import minimize
from scipy.stats import qmc

from ..errors import ConvergenceWarning, GridWarning, InputError, PriorEdgeWarning, SedtempWarning
from ..likelihood import Calibration, PhotometryLikelihood
from ..photometry import prepare
from ._data import require_bands, resolve_prior
from .grid import GridPosterior, _axis_nodes, _prior_sd
from .result import FitResult
from .summary import POOR_FIT_PPP, trust_flags

__all__ = ["fit_source", "LogPosterior", "default_model"]

#: Autocorrelation checks: the chain must be this many tau long (emcee docs' advice).
_TAU_LENGTH = 50
#: Relative change of tau between checks below which tau counts as stable.
_TAU_STABLE = 0.05
_PPP_DRAWS = 500
#: Nodes of the coarse grid posterior that places the walkers.
_START_N_T, _START_N_BETA = 40, 24


def default_model():
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

    def model_band_fluxes(self, theta):
        sed = self.model.sed_si(self.bands.nu_grid_hz, theta)
        return self.bands.band_fluxes(sed)[:, self.used]

    def __call__(self, theta):
        theta = np.atleast_2d(theta)
        lp = self.prior.log_prob(theta, self.names)
        good = np.isfinite(lp) & np.asarray(self.model.valid(theta), bool)
        out = np.full(theta.shape[0], -np.inf)
        if good.any():
            with np.errstate(over="ignore", invalid="ignore"):
                ll = self.likelihood(self.model_band_fluxes(theta[good]))
            out[good] = np.where(np.isfinite(ll), ll + lp[good], -np.inf)
        return out


def _start_from_grid(post_fn, model, bands, prior, calibration, phot, used, n_walkers, rng, grid=None):
    """Walkers drawn from the exact grid posterior (linear-amplitude models).

    A coarse grid is enough here (narrow posteriors are zoomed automatically);
    callers fitting many sources with one set-up pass ``grid`` to reuse it.
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
    p0 = np.column_stack([d[n][0] for n in model.param_names])
    lp = post_fn(p0)
    p0 = p0[np.isfinite(lp)]
    if len(p0) < n_walkers:
        return None
    return p0[:n_walkers]


def _start_from_optimum(post_fn, names, prior, n_walkers, rng):
    """Deterministic optimum (Halton design over the prior, then Nelder-Mead), plus a small ball."""
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


def _autocorr(chain):
    """tau per parameter (tol=0: an estimate whatever the length)."""
    return emcee.autocorr.integrated_time(chain, tol=0)


def _moves():
    # Differential-evolution proposals follow the curved T-beta ridge better than
    # the stretch move alone; the stretch move keeps the ensemble affine-invariant.
    # (DESnookerMove was tried too: no gain in tau here, and its Python-level
    # proposal loop cost ~10 % of the run.)
    return [(emcee.moves.DEMove(), 0.8), (emcee.moves.StretchMove(), 0.2)]


def _run_chain(post_fn, p0, seed, *, ess_target, check_every, max_steps, key_idx):
    nw, nd = p0.shape
    sampler = emcee.EnsembleSampler(nw, nd, post_fn, vectorize=True, moves=_moves())
    state = emcee.State(p0, random_state=np.random.RandomState(seed).get_state())
    old_tau = np.inf
    tau = np.full(nd, 1.0)
    converged = False
    while sampler.iteration < max_steps:
        state = sampler.run_mcmc(state, check_every, progress=False)
        if np.isfinite(old_tau).all() and sampler.iteration < (_TAU_LENGTH + 2) * np.max(tau):
            continue  # too short to pass the length rule yet: skip the autocorrelation estimate
        chain = sampler.get_chain()
        tau = _autocorr(chain)
        burn = int(np.ceil(2 * np.max(tau)))
        n_kept = chain.shape[0] - burn
        ess = nw * n_kept / tau
        long_enough = n_kept > _TAU_LENGTH * np.max(tau)
        stable = np.all(np.abs(old_tau - tau) < _TAU_STABLE * tau)
        old_tau = tau
        if long_enough and stable and np.all(ess[key_idx] >= ess_target):
            converged = True
            break
    return sampler, tau, burn, converged


def fit_source(flux, flux_err, bands, *, model=None, prior=None, calibration=None,
               upper_limits=None, seed=None, n_walkers=64, ess_target=1000, max_steps=20000,
               check_every=100, start="auto", start_grid=None, source_id=None):
    """MCMC posterior of one source's SED parameters.

    Parameters
    ----------
    flux, flux_err : Quantity or array_like, shape (n_bands,)
        Flux densities and 1-sigma errors, in the order of ``bands``; a bare
        number is in Jy. Negative and low-S/N fluxes are used as measured.
        NaN in both flux and error marks an unobserved band.
    bands : BandSet
    model : SEDModel, optional, keyword-only
        Default :func:`default_model`: optically thin modified blackbody with
        the amplitude as tau at nu0 for a 1 arcsec^2 source (T and beta do not
        depend on that choice).
    prior : Prior or mapping, optional
        Priors per parameter; entries given replace the model's defaults
        (``model.default_prior()``), the rest keep them.
    calibration : Calibration or mapping, optional
        Calibration groups, e.g. ``{"spire": (["b250", "b350", "b500"], 0.05)}``.
    upper_limits : list of band names or bool array, optional
        Bands known only as upper limits: ``flux`` holds the limit, ``flux_err``
        its 1-sigma value (e.g. limit / 3 for a 3-sigma limit).
    seed : int or SeedSequence, optional
        Makes the run bit-for-bit repeatable.
    n_walkers : int
        emcee walkers. The log posterior is vectorised over walkers, so more
        walkers cost little per step while the chain-length rule (50 tau)
        fixes the number of steps: 64 gave ~1.2x the effective samples per
        second of 48 and ~1.6x of 32 in benchmarks/run.py.
    ess_target : float
        Stop when T and beta (or all parameters, if neither) reach this
        effective sample size, the chain is > 50 tau long and tau is stable.
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

    Returns
    -------
    FitResult

    Raises
    ------
    InputError
        Wrong flux unit, NaN or non-positive errors, fewer usable bands than
        free parameters, a prior for an unknown parameter.
    """
    model = default_model() if model is None else model
    names = tuple(model.param_names)
    prior = resolve_prior(model, prior)
    phot = prepare(flux, flux_err, bands.names, upper_limits=upper_limits)
    if phot.flux.shape[0] != 1:
        raise InputError(f"fit_source fits one source; got {phot.flux.shape[0]} rows (use grid_posterior or the batch runner)")
    require_bands(phot, len(names), bands.names, source_id)
    if calibration is not None and not isinstance(calibration, Calibration):
        calibration = Calibration(calibration)
    cal = calibration.matrix(bands.names) if calibration is not None else None
    used = ~phot.missing[0]
    like = PhotometryLikelihood(phot.flux[0, used], phot.err[0, used], limit_only=phot.limit_only[0, used],
                                calibration=None if cal is None else cal[used])
    post = LogPosterior(model, bands, like, prior, used)
    ss = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    s_start, s_chain, s_ppp = ss.spawn(3)
    rng = np.random.default_rng(s_start)
    p0 = None
    gridable = model.amplitude_name is not None and set(names) - {model.amplitude_name} in ({"T"}, {"T", "beta"})
    if start in ("auto", "grid") and gridable:
        p0 = _start_from_grid(post, model, bands, prior, calibration, phot, used, n_walkers, rng, start_grid)
    elif start == "grid":
        raise InputError(f"start='grid' needs a linear-amplitude model with T and beta; {type(model).__name__} is not")
    if p0 is None:
        p0 = _start_from_optimum(post, names, prior, n_walkers, rng)
    key_idx = [names.index(k) for k in ("T", "beta") if k in names] or list(range(len(names)))
    chain_seed = int(s_chain.generate_state(1)[0])
    sampler, tau, burn, converged = _run_chain(post, p0, chain_seed, ess_target=ess_target,
                                               check_every=check_every, max_steps=max_steps, key_idx=key_idx)
    return _make_result(sampler, tau, burn, converged, post, model, bands, prior, phot, used,
                        np.random.default_rng(s_ppp), seed)


def _make_result(sampler, tau, burn, converged, post, model, bands, prior, phot, used, rng, seed):
    names = post.names
    chain = sampler.get_chain()
    flat = sampler.get_chain(discard=burn, flat=True)
    lnp = sampler.get_log_prob(discard=burn, flat=True)
    nw = chain.shape[1]
    # the same length criterion as the stopping rule, on the kept part of the chain
    tau = _autocorr(chain[burn:])
    if chain.shape[0] - burn <= _TAU_LENGTH * np.max(tau):
        converged = False
    ess = nw * (chain.shape[0] - burn) / tau
    samples = {n: flat[:, j].copy() for j, n in enumerate(names)}
    imap = int(np.argmax(lnp))
    map_params = {n: float(flat[imap, j]) for j, n in enumerate(names)}
    m_map = post.model_band_fluxes(flat[imap][None])
    chi2_map = float(post.likelihood.chi2_and_logdet(m_map)[0][0])
    idx = rng.choice(len(flat), size=min(_PPP_DRAWS, len(flat)), replace=False)
    m = post.model_band_fluxes(flat[idx])
    chi_obs, chi_rep = post.likelihood.predictive_chi2(m, rng)
    like = post.likelihood
    ppp = float(np.mean(chi_rep >= chi_obs))
    n_used = int(like.detected.sum())
    flags = []
    if ppp < POOR_FIT_PPP:
        flags.append("poor_fit")
        warnings.warn(f"posterior predictive p-value {ppp:.3g} < {POOR_FIT_PPP}: the model does not "
                      "describe the data (flag 'poor_fit')", SedtempWarning, stacklevel=3)
    if not converged:
        flags.append("not_converged")
        warnings.warn(f"MCMC not converged after {chain.shape[0]} steps (tau = {np.round(tau, 1)}); "
                      "flag 'not_converged'", ConvergenceWarning, stacklevel=3)
    w = np.ones(len(flat))
    for n in names:
        pr = prior[n]
        fl = trust_flags(n, samples[n], w, pr.low, pr.high, _prior_sd(pr))
        if any("prior_low" in f or "prior_high" in f for f in fl):
            warnings.warn(f"posterior of {n} piles up against its prior edge [{pr.low:g}, {pr.high:g}]",
                          PriorEdgeWarning, stacklevel=3)
        flags += fl
    return FitResult(
        samples=samples, log_prob=lnp, param_names=names, units=dict(model.param_units),
        ess={n: float(e) for n, e in zip(names, ess)}, tau={n: float(t) for n, t in zip(names, tau)},
        acceptance_fraction=float(np.mean(sampler.acceptance_fraction)), converged=bool(converged),
        flags=tuple(flags), map_params=map_params, chi2_map=chi2_map, dof=n_used - len(names), ppp=ppp,
        n_bands_used=n_used, model=model, bands=bands, flux_si=phot.flux[0], err_si=phot.err[0],
        limit_only=phot.limit_only[0], chain=chain, n_steps=chain.shape[0], n_walkers=nw, burn=burn,
        seed=seed,
    )
