"""The per-source script a user writes by hand: the baseline that sedtemp is timed against.

This is deliberately the ordinary way of doing it, written as a typical user
would (and as the emcee documentation's line-fitting tutorial shows):

* a monochromatic modified blackbody evaluated at the band centres,
  S_nu = A (nu / nu0)^beta B_nu(T), in Jy, with A in sr (log10 A fitted);
* a ``scipy.optimize.curve_fit`` start;
* emcee with a scalar (non-vectorised) log-probability and flat priors,
  32 walkers, 5,000 steps, the first 1,000 discarded as burn-in;
* the effective sample size from ``sampler.get_autocorr_time(quiet=True)``.

No band integration, no calibration covariance, no upper limits. It is not
part of the sedtemp package (run it with ``python benchmarks/baseline.py``).
"""

from __future__ import annotations

import time

import emcee
import numpy as np
from scipy.optimize import curve_fit

H = 6.62607015e-34  # J s (exact, SI 2019)
K_B = 1.380649e-23  # J/K (exact, SI 2019)
C = 299792458.0  # m/s (exact)
NU0 = C / 250e-6  # reference frequency of the emissivity law: 250 um
JY = 1e-26  # W m^-2 Hz^-1

N_WALKERS = 32
N_STEPS = 5000
BURN = 1000


def modbb(nu, log_a, t, beta):
    """Monochromatic modified blackbody in Jy: 10**log_a (nu/nu0)^beta B_nu(T)."""
    bnu = 2 * H * nu**3 / C**2 / (np.exp(H * nu / (K_B * t)) - 1.0)
    return 10.0**log_a * (nu / NU0) ** beta * bnu / JY


def log_prob(p, nu, flux, err):
    """Scalar log-probability: flat priors and a chi^2 likelihood."""
    log_a, t, beta = p
    if not (3.0 < t < 150.0 and 0.0 < beta < 4.0 and -25.0 < log_a < 5.0):
        return -np.inf
    model = modbb(nu, log_a, t, beta)
    return -0.5 * np.sum(((flux - model) / err) ** 2)


def fit_one(nu, flux, err, seed=0, n_walkers=N_WALKERS, n_steps=N_STEPS, burn=BURN):
    """Fit one source the hand-written way.

    Parameters
    ----------
    nu : ndarray (n_bands,)
        Band centre frequencies in Hz.
    flux, err : ndarray (n_bands,)
        Flux densities and errors in Jy.

    Returns
    -------
    dict
        ``samples`` (n, 3) flat chain after burn-in (log10 A, T, beta), ``tau``
        (3,), ``ess`` (3,) = n_walkers (n_steps - burn) / tau, ``seconds``.
    """
    t0 = time.perf_counter()
    rng = np.random.default_rng(seed)
    # a starting guess as a user would make it: T = 20 K, beta = 1.8, A from the brightest band
    i = np.argmax(flux)
    guess = [np.log10(flux[i] / modbb(nu[i], 0.0, 20.0, 1.8)), 20.0, 1.8]
    popt, _ = curve_fit(modbb, nu, flux, p0=guess, sigma=err, absolute_sigma=True, maxfev=20000)
    p0 = popt + 1e-4 * rng.standard_normal((n_walkers, 3))
    sampler = emcee.EnsembleSampler(n_walkers, 3, log_prob, args=(nu, flux, err))
    sampler.run_mcmc(p0, n_steps, progress=False)
    tau = sampler.get_autocorr_time(discard=burn, quiet=True)
    samples = sampler.get_chain(discard=burn, flat=True)
    ess = n_walkers * (n_steps - burn) / tau
    return {"samples": samples, "tau": tau, "ess": ess, "seconds": time.perf_counter() - t0,
            "acceptance": float(np.mean(sampler.acceptance_fraction))}


# ------------------------------------------------------------ end to end, by hand
SIGMA_SB = 5.670374419e-8  # W m^-2 K^-4 (exact from the SI constants)
T_STAR = 5000.0  # K: the starlight a user would model the field with, one diluted blackbody
#: Dilution of that blackbody giving a far-UV-to-near-IR energy density of ~5e-14 J m^-3 for U = 1
#: (the order of the local interstellar field; from memory, common practice for a quick estimate)
W_U1 = 5e-14 * C / (4 * SIGMA_SB * T_STAR**4)
NU_FIELD = np.geomspace(1e10, 3e15, 1500)  # Hz: the user's integration grid


def _bnu(nu, t):
    with np.errstate(over="ignore"):
        return 2 * H * nu**3 / C**2 / np.expm1(H * nu / (K_B * t))


def t_eq_one(beta, u_field):
    """Equilibrium T by hand: brentq on int kappa (B(T) - J) dnu, kappa ~ (nu/nu0)^beta, no UV cap."""
    from scipy.optimize import brentq

    kappa = (NU_FIELD / NU0) ** beta
    absorbed = np.trapezoid(kappa * u_field * W_U1 * _bnu(NU_FIELD, T_STAR), NU_FIELD)
    return brentq(lambda t: np.trapezoid(kappa * _bnu(NU_FIELD, t), NU_FIELD) - absorbed, 2.0, 2000.0)


def end_to_end_one(nu, flux, err, u_field, seed=0, n_draws=100, field_sd=0.2):
    """fit -> predict -> compare for one source, as a hand-written script does it.

    The emcee fit of :func:`fit_one`, then T_eq for each of ``n_draws``
    posterior draws of beta with the field strength drawn with a 20 %
    log-normal uncertainty, then P(T_fit > T_eq).

    Returns
    -------
    dict
        ``p_warmer``, ``t_eq_median`` (K), ``seconds``.
    """
    t0 = time.perf_counter()
    fit = fit_one(nu, flux, err, seed=seed)
    rng = np.random.default_rng(seed + 1)
    pick = fit["samples"][rng.choice(len(fit["samples"]), n_draws, replace=False)]
    u_draws = u_field * np.exp(field_sd * rng.standard_normal(n_draws))
    t_eq = np.array([t_eq_one(b, uu) for b, uu in zip(pick[:, 2], u_draws, strict=True)])
    return {"p_warmer": float(np.mean(pick[:, 1] > t_eq)), "t_eq_median": float(np.median(t_eq)),
            "seconds": time.perf_counter() - t0}


if __name__ == "__main__":
    # one invented source: six bands 70-500 um, T = 20 K, beta = 1.8, 5 % errors
    lam_um = np.array([70.0, 100.0, 160.0, 250.0, 350.0, 500.0])
    nu = C / (lam_um * 1e-6)
    truth = modbb(nu, -14.0, 20.0, 1.8)
    err = 0.05 * truth
    flux = truth + err * np.random.default_rng(1).standard_normal(nu.size)
    out = fit_one(nu, flux, err, seed=1)
    print(f"{out['seconds']:.2f} s, tau = {np.round(out['tau'], 1)}, ESS = {np.round(out['ess'])}, "
          f"ESS/s (min of T, beta) = {out['ess'][1:].min() / out['seconds']:.0f}")
