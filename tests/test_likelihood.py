"""Likelihood against scipy's multivariate normal and exact CDF terms."""

import numpy as np
import pytest
from scipy.stats import multivariate_normal, norm

from sedtemp.errors import InputError
from sedtemp.likelihood import Calibration, PhotometryLikelihood, calibrated_chi2

NAMES = ["b70", "b160", "b250", "b350", "b500"]


def _dense_cov(err, cal, m):
    c = np.diag(err**2)
    for g in range(cal.shape[1]):
        v = cal[:, g] * m
        c = c + np.outer(v, v)
    return c


def test_matches_scipy_multivariate_normal_with_calibration():
    # Reference: scipy.stats.multivariate_normal with the dense covariance
    # C = diag(sigma^2) + sum_g d_g^2 m_g m_g^T; Woodbury must agree to rounding.
    rng = np.random.default_rng(3)
    cal = Calibration({"short": (["b70", "b160"], 0.07), "long": (["b250", "b350", "b500"], 0.05)})
    mat = cal.matrix(NAMES)
    flux = rng.uniform(1, 5, 5)
    err = 0.1 * flux
    like = PhotometryLikelihood(flux, err, calibration=mat)
    models = rng.uniform(1, 5, (6, 5))
    got = like(models)
    ref = [multivariate_normal(m, _dense_cov(err, mat, m)).logpdf(flux) for m in models]
    np.testing.assert_allclose(got, ref, rtol=1e-12)


def test_no_calibration_is_independent_gaussians():
    # Reference: scipy.stats.norm.logpdf summed over bands (exact).
    flux = np.array([1.0, -0.2, 3.0])
    err = np.array([0.3, 0.2, 0.5])
    m = np.array([[1.1, 0.1, 2.5]])
    got = PhotometryLikelihood(flux, err)(m)
    assert got[0] == pytest.approx(norm.logpdf(flux, m[0], err).sum(), rel=1e-13)


def test_limit_only_band_uses_gaussian_cdf():
    # Reference: log Phi((L - m) / sigma_L) from scipy.stats.norm.logcdf (exact).
    flux = np.array([2.0, 0.9])
    err = np.array([0.2, 0.3])  # second band: 3-sigma limit of 0.9 -> sigma 0.3
    like = PhotometryLikelihood(flux, err, limit_only=np.array([False, True]))
    m = np.array([[2.1, 0.5], [2.1, 1.5]])
    ref = norm.logpdf(2.0, 2.1, 0.2) + norm.logcdf((0.9 - m[:, 1]) / 0.3)
    np.testing.assert_allclose(like(m), ref, rtol=1e-12)


def test_simulate_has_the_likelihood_covariance():
    # Replicated data must have covariance C (check: sample covariance of 2e5 draws,
    # tolerance 4 / sqrt(n) relative on the diagonal from the chi^2 sampling error).
    cal = Calibration({"all": (NAMES[:3], 0.1)})
    mat = cal.matrix(NAMES[:3])
    m = np.array([1.0, 2.0, 3.0])
    err = np.array([0.1, 0.1, 0.2])
    like = PhotometryLikelihood(m, err, calibration=mat)
    rep = like.simulate(np.tile(m, (200_000, 1)), np.random.default_rng(0))
    cov = np.cov(rep.T)
    ref = _dense_cov(err, mat, m)
    np.testing.assert_allclose(np.diag(cov), np.diag(ref), rtol=4 / np.sqrt(200_000) * 3)
    assert cov[0, 2] == pytest.approx(ref[0, 2], rel=0.03)


def test_calibrated_chi2_broadcasts():
    rng = np.random.default_rng(1)
    r = rng.normal(size=(4, 3, 5))
    m = rng.uniform(1, 2, size=(4, 3, 5))
    iv = rng.uniform(1, 2, size=(4, 1, 5))
    masks = np.array([[1, 1, 0, 0, 0], [0, 0, 1, 1, 1]], float)
    d2 = np.array([0.01, 0.0025])
    chi2, logdet = calibrated_chi2(r, m, iv, masks, d2)
    i, j = 2, 1
    cov = np.diag(1 / iv[i, 0])
    for mk, d in zip(masks, d2, strict=True):
        v = mk * m[i, j]
        cov = cov + d * np.outer(v, v)
    # Reference: dense linear algebra (numpy.linalg), exact to rounding.
    assert chi2[i, j] == pytest.approx(r[i, j] @ np.linalg.solve(cov, r[i, j]), rel=1e-12)
    assert logdet[i, j] == pytest.approx(np.linalg.slogdet(cov)[1] + np.log(iv[i, 0]).sum(), rel=1e-12)


def test_calibration_errors():
    with pytest.raises(InputError, match="band 'b250' is in two calibration groups"):
        Calibration({"a": (["b250"], 0.05), "b": (["b250", "b350"], 0.05)})
    with pytest.raises(InputError, match="fraction must be >= 0"):
        Calibration({"a": (["b250"], -0.1)})
    with pytest.raises(InputError, match=r"give \(band names, fraction\)"):
        Calibration({"a": 0.05})
    with pytest.raises(InputError, match=r"not among the fitted bands"):
        Calibration({"a": (["b999"], 0.05)}).matrix(NAMES)
