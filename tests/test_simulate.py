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
    with pytest.raises(InputError, match="needs exactly one of snr= .* or depth="):
        simulate_photometry(BS, MOD, th)
    with pytest.raises(InputError, match=r"calibration names band\(s\) \['zz'\]"):
        simulate_photometry(BS, MOD, th, snr=5, calibration={"g": (["zz"], 0.1)})
