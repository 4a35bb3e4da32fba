"""The one photometry simulator."""

import astropy.units as u
import numpy as np
import pytest

from sedtemp.bands import Band, BandSet
from sedtemp.errors import InputError
from sedtemp.models import ModifiedBlackbody
from sedtemp.simulate import simulate_photometry

BS = BandSet([Band.monochromatic(f"b{w}", w * u.um) for w in (100, 250, 500)])
MOD = ModifiedBlackbody(distance=300 * u.pc)


def test_depth_and_snr_noise_and_repeatability():
    th = [[0.0, 15.0, 1.8]]
    f, e, m = simulate_photometry(BS, MOD, th, depth=10.0, seed=1)
    np.testing.assert_allclose(e, m.max() / 10.0, rtol=1e-15)  # exact: every band's noise = peak / depth
    f2, _, _ = simulate_photometry(BS, MOD, th, depth=10.0, seed=1)
    np.testing.assert_array_equal(f, f2)
    _, e3, m3 = simulate_photometry(BS, MOD, th, snr=20.0)
    np.testing.assert_allclose(e3, m3 / 20.0, rtol=1e-15)
    with pytest.raises(InputError, match="needs exactly one of snr= .* depth= .* or sigma="):
        simulate_photometry(BS, MOD, th)
    with pytest.raises(InputError, match=r"calibration names band\(s\) \['zz'\]"):
        simulate_photometry(BS, MOD, th, snr=5, calibration={"g": (["zz"], 0.1)})
    with pytest.raises(InputError, match="needs exactly one of"):
        simulate_photometry(BS, MOD, th, snr=5, sigma=1.0)


def test_sigma_noise_is_the_given_errors():
    th = [[0.0, 15.0, 1.8], [0.5, 25.0, 1.6]]
    sig = np.array([0.1, 0.2, 0.3])
    f, e, m = simulate_photometry(BS, MOD, th, sigma=sig, seed=3)
    np.testing.assert_array_equal(e, np.broadcast_to(sig, (2, 3)))  # one error per band for every source
    z = np.random.default_rng(3).standard_normal((2, 3))
    np.testing.assert_allclose(f, m + sig * z, rtol=1e-15)
    _, e1, _ = simulate_photometry(BS, MOD, th, sigma=0.5)
    assert np.all(e1 == 0.5)


def test_generator_seed_is_used_as_is():
    # a Generator is drawn from in place (the tests hand one generator to successive calls)
    rng = np.random.default_rng(5)
    f1, _, _ = simulate_photometry(BS, MOD, [[0.0, 15.0, 1.8]], snr=10, seed=rng)
    f2, _, _ = simulate_photometry(BS, MOD, [[0.0, 15.0, 1.8]], snr=10, seed=rng)
    assert not np.array_equal(f1, f2)


def test_floor_adds_in_quadrature():
    th = [[0.0, 15.0, 1.8], [0.5, 25.0, 1.6]]
    # sigma 3 and floor 4 make an error of exactly 5 in every band (a 3-4-5 triangle)
    f, e, m = simulate_photometry(BS, MOD, th, sigma=3.0, floor=4.0, seed=7)
    np.testing.assert_array_equal(e, np.full((2, 3), 5.0))
    np.testing.assert_allclose(f, m + 5.0 * np.random.default_rng(7).standard_normal((2, 3)), rtol=1e-15)
    # with snr: err = sqrt((m / snr)^2 + floor^2), a floor per band
    floor = np.array([0.0, 1e-3, 2e-3])
    _, e2, m2 = simulate_photometry(BS, MOD, th, snr=20.0, floor=floor)
    np.testing.assert_allclose(e2, np.sqrt((m2 / 20.0) ** 2 + floor**2), rtol=1e-15)
    np.testing.assert_array_equal(e2[:, 0], m2[:, 0] / 20.0)  # a zero floor leaves the error as it was


def test_calibration_multiplies_the_model_flux_before_the_noise():
    th = [[0.0, 15.0, 1.8], [0.5, 25.0, 1.6]]
    cal = {"g": (["b100", "b250"], 0.1)}
    f, _, m = simulate_photometry(BS, MOD, th, sigma=0.2, calibration=cal, seed=4)
    rng = np.random.default_rng(4)
    z, d = rng.standard_normal((2, 3)), rng.standard_normal((2, 1))
    gain = np.hstack([1 + 0.1 * d, 1 + 0.1 * d, np.ones((2, 1))])
    np.testing.assert_allclose(f, m * gain + 0.2 * z, rtol=1e-14)
