"""Shared fixtures: an invented six-band photometric system and a simulated source."""

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table

from sedtemp.bands import Band, BandSet
from sedtemp.models import ModifiedBlackbody

#: Invented band set (top-hats, 30 % wide in frequency) spanning the far-IR/submm.
WAVELENGTHS_UM = (70, 100, 160, 250, 350, 500)
TRUTH = {"log10_mass": 0.0, "T": 20.0, "beta": 1.8}


@pytest.fixture(scope="session")
def bands():
    return BandSet([Band.tophat(f"b{w}", w * u.um, 0.3) for w in WAVELENGTHS_UM])


@pytest.fixture(scope="session")
def model():
    return ModifiedBlackbody(distance=300 * u.pc)


def simulate(model, bands, theta, snr, rng, calibration=None):
    """Band fluxes (Jy) of parameter rows ``theta`` with Gaussian noise at ``snr``."""
    theta = np.atleast_2d(theta)
    m = bands.band_fluxes(model.sed_si(bands.nu_grid_hz, theta)) / 1e-26
    err = m / snr
    f = m + err * rng.standard_normal(m.shape)
    if calibration is not None:
        for members, frac in calibration.values():
            idx = [bands.names.index(b) for b in members]
            f[:, idx] += m[:, idx] * frac * rng.standard_normal((m.shape[0], 1))
    return f, err, m


@pytest.fixture(scope="session")
def source(model, bands):
    theta = np.array([[TRUTH["log10_mass"], TRUTH["T"], TRUTH["beta"]]])
    f, err, _ = simulate(model, bands, theta, 20.0, np.random.default_rng(11))
    return f[0], err[0]


#: Bands of the invented catalogue used by the pipeline and CLI tests.
CATALOG_WAVE = (70, 160, 250, 350, 500)


def invented_catalog(n, seed, unit=u.Jy):
    """Invented sources (test data only): modified blackbodies at 400 pc, 8 % noise.

    Columns ``name``, ``F<w>`` and ``E<w>`` (flux and error in ``unit``) for the
    top-hat bands of CATALOG_WAVE.
    """
    bs = BandSet([Band.tophat(f"b{w}", w * u.um, 0.3) for w in CATALOG_WAVE])
    rng = np.random.default_rng(seed)
    theta = np.column_stack([rng.uniform(-1, 0, n), rng.uniform(12, 30, n), rng.uniform(1.4, 2.2, n)])
    f = (bs.band_fluxes(ModifiedBlackbody(distance=400 * u.pc).sed_si(bs.nu_grid_hz, theta))
         * (u.W / u.m**2 / u.Hz)).to_value(unit)
    e = 0.08 * f
    t = Table()
    t["name"] = [f"S{i:03d}" for i in range(n)]
    for j, w in enumerate(CATALOG_WAVE):
        t[f"F{w}"] = (f[:, j] + e[:, j] * rng.standard_normal(n)) * unit
        t[f"E{w}"] = e[:, j] * unit
    return t
