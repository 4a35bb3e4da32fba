"""Gaussian photometric likelihood with correlated calibration errors and upper limits.

The covariance of the detected bands is

    C = diag(sigma_i^2) + sum_g d_g^2 m_g m_g^T,

where m_g is the model flux vector restricted to the bands of calibration
group g and d_g the group's fractional calibration uncertainty. This is the
exact marginal of a model multiplied by (1 + delta_g), delta_g ~ N(0, d_g^2),
one delta per group. The groups are disjoint, so C^-1 and det C follow from
the Woodbury identity with a *diagonal* k x k core: everything reduces to a few
vectorised sums per group, with no matrix inverse per evaluation.

Bands given only as an upper limit L (flux unknown, limit at n sigma)
contribute log Phi((L - m) / sigma_L), sigma_L = L / n. A band with a measured
flux and error, even a negative or low-S/N one, is a normal Gaussian term:
that is the information the measurement holds, and throwing it away for a
limit biases fits.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
from numpy.typing import ArrayLike
from scipy.special import log_ndtr

from .errors import InputError

__all__ = ["Calibration", "PhotometryLikelihood", "calibrated_chi2"]

_LOG_2PI = np.log(2.0 * np.pi)


class Calibration:
    """Calibration groups: bands that share one fractional calibration error.

    Parameters
    ----------
    groups : mapping of str to (sequence of band names, float)
        ``{"group": (["b250", "b350", "b500"], 0.05)}``: the bands of a group
        share a fully correlated fractional error (here 5 %). A band in no
        group has no calibration term; a band alone in its group gets an
        uncorrelated fractional error.

    Examples
    --------
    >>> cal = Calibration({"long": (["b250", "b350"], 0.05), "short": (["b70"], 0.07)})
    """

    def __init__(self, groups: Mapping[str, tuple[Sequence[str], float]]) -> None:
        self.groups: dict[str, tuple[tuple[str, ...], float]] = {}
        seen: dict[str, str] = {}
        for gname, spec in dict(groups).items():
            try:
                members, frac = spec
            except (TypeError, ValueError) as err:
                raise InputError(
                    f"calibration group '{gname}': give (band names, fraction), got {spec!r}"
                ) from err
            if isinstance(members, str):
                members = [members]
            frac = float(frac)
            if not (np.isfinite(frac) and frac >= 0):
                raise InputError(
                    f"calibration group '{gname}': fraction must be >= 0 (e.g. 0.05 for 5 %), got {frac}"
                )
            for b in members:
                if b in seen:
                    raise InputError(
                        f"band '{b}' is in two calibration groups ('{seen[b]}' and '{gname}')"
                    )
                seen[b] = gname
            self.groups[gname] = (tuple(members), frac)

    def matrix(self, band_names: Sequence[str]) -> np.ndarray:
        """(n_bands, n_groups) array: d_g where band i is in group g, else 0."""
        names = list(band_names)
        unknown = [b for members, _ in self.groups.values() for b in members if b not in names]
        if unknown:
            raise InputError(
                f"calibration names band(s) {unknown} that are not among the fitted bands {names}"
            )
        out = np.zeros((len(names), len(self.groups)))
        for g, (members, frac) in enumerate(self.groups.values()):
            for b in members:
                out[names.index(b), g] = frac
        return out

    def __repr__(self) -> str:
        return f"Calibration({self.groups!r})"


def calibrated_chi2(resid: np.ndarray, model: np.ndarray, ivar: np.ndarray, masks: np.ndarray,
                    d2: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Woodbury chi^2 and log-det term of C = diag(1/ivar) + sum_g d2_g m_g m_g^T.

    Parameters
    ----------
    resid, model : ndarray (..., n_bands)
        Data minus model, and the model band fluxes.
    ivar : ndarray broadcastable to (..., n_bands)
        1 / sigma^2 (0 for bands to ignore).
    masks : ndarray (n_groups, n_bands)
        Membership (0/1) of each band in each disjoint calibration group.
    d2 : ndarray (n_groups,)
        Squared fractional calibration error of each group.

    Returns
    -------
    chi2, logdet : ndarray (...)
        r^T C^-1 r and ln det C - sum ln sigma^2 = sum_g ln(1 + d2_g a_g).
    """
    wr = resid * ivar
    chi2 = np.sum(resid * wr, axis=-1)
    logdet = np.zeros_like(chi2)
    for mask, dg in zip(masks, d2, strict=True):  # loop over a few calibration groups
        a = np.sum(model * model * ivar * mask, axis=-1)
        b = np.sum(model * wr * mask, axis=-1)
        den = 1.0 + dg * a
        chi2 = chi2 - dg * b * b / den
        logdet = logdet + np.log(den)
    return chi2, logdet


class PhotometryLikelihood:
    """Log-likelihood of band fluxes given model band fluxes, vectorised over models.

    Parameters
    ----------
    flux, flux_err : ndarray, shape (n_bands,)
        Fluxes and 1-sigma errors in SI (W m^-2 Hz^-1). For limit-only bands,
        ``flux`` holds the limit and ``flux_err`` its sigma (limit / n_sigma).
    limit_only : ndarray of bool, shape (n_bands,), keyword-only
        Bands known only as an upper limit.
    calibration : ndarray, shape (n_bands, n_groups), keyword-only
        Fractional calibration errors from :meth:`Calibration.matrix`; rows of
        limit-only bands are ignored.

    Notes
    -----
    With r = F - m over detected bands, D = diag(sigma^2) and for each group
    g: a_g = sum_{i in g} m_i^2 / sigma_i^2, b_g = sum_{i in g} m_i r_i / sigma_i^2,
    the Woodbury identity with a diagonal core gives

        r^T C^-1 r = sum r^2 / sigma^2 - sum_g d_g^2 b_g^2 / (1 + d_g^2 a_g)
        ln det C  = sum ln sigma^2 + sum_g ln(1 + d_g^2 a_g).
    """

    def __init__(self, flux: ArrayLike, flux_err: ArrayLike, *, limit_only: ArrayLike | None = None,
                 calibration: ArrayLike | None = None) -> None:
        flux = np.asarray(flux, dtype=float)
        err = np.asarray(flux_err, dtype=float)
        nb = flux.shape[0]
        lim = np.zeros(nb, bool) if limit_only is None else np.asarray(limit_only, bool)
        self.detected = ~lim
        self.limit_only = lim
        self.flux = flux
        self.err = err
        self.ivar = 1.0 / err[self.detected] ** 2
        self._f = flux[self.detected]
        self._lim_f = flux[lim]
        self._lim_err = err[lim]
        cal = np.zeros((nb, 0)) if calibration is None else np.asarray(calibration, float)
        cal = cal[self.detected]
        keep = np.any(cal > 0, axis=0)
        # membership masks (n_det, k) and d_g^2 per group (one fraction per group)
        self._mask = (cal[:, keep] > 0).astype(float)
        self._d2g = (cal[:, keep] ** 2).max(axis=0) if keep.any() else np.zeros(0)
        self._const = -0.5 * (np.sum(np.log(err[self.detected] ** 2)) + self.detected.sum() * _LOG_2PI)

    @property
    def n_detected(self) -> int:
        return int(self.detected.sum())

    def chi2_and_logdet(self, model_flux: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
        """(r^T C^-1 r, ln det C - sum ln sigma^2) for model band fluxes (n, n_bands)."""
        m = np.atleast_2d(model_flux)[:, self.detected]
        return calibrated_chi2(self._f - m, m, self.ivar, self._mask.T, self._d2g)

    def limit_term(self, model_flux: ArrayLike) -> np.ndarray:
        """sum over limit-only bands of log Phi((L - m) / sigma_L), shape (n,)."""
        if not self.limit_only.any():
            return np.zeros(np.atleast_2d(model_flux).shape[0])
        m = np.atleast_2d(model_flux)[:, self.limit_only]
        return np.sum(log_ndtr((self._lim_f - m) / self._lim_err), axis=1)

    def __call__(self, model_flux: ArrayLike) -> np.ndarray:
        """Log-likelihood, shape (n,), for model band fluxes of shape (n, n_bands)."""
        chi2, logdet = self.chi2_and_logdet(model_flux)
        return self._const - 0.5 * (chi2 + logdet) + self.limit_term(model_flux)

    def predictive_chi2(self, model_flux: ArrayLike, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        """chi^2 of the data and of one replicated data set at each model, (n,), (n,).

        The posterior predictive p-value is the fraction of posterior draws
        whose replicated chi^2 exceeds the observed one.
        """
        m = np.atleast_2d(model_flux)
        chi_obs = self.chi2_and_logdet(m)[0]
        rep = self.simulate(m, rng)[:, self.detected]
        md = m[:, self.detected]
        chi_rep = calibrated_chi2(rep - md, md, self.ivar, self._mask.T, self._d2g)[0]
        return chi_obs, chi_rep

    def simulate(self, model_flux: ArrayLike, rng: np.random.Generator) -> np.ndarray:
        """Replicated data sets drawn from the likelihood at each model, shape (n, n_bands).

        Detected bands get Gaussian noise plus one shared calibration factor
        per group; limit-only bands are returned as NaN.
        """
        m = np.atleast_2d(model_flux)
        n = m.shape[0]
        out = np.full_like(m, np.nan, dtype=float)
        md = m[:, self.detected]
        noise = rng.standard_normal(md.shape) * self.err[self.detected]
        if self._d2g.size:
            delta = rng.standard_normal((n, self._d2g.size)) * np.sqrt(self._d2g)
            noise = noise + md * (delta @ self._mask.T)
        out[:, self.detected] = md + noise
        return out
