"""Shared fixtures: an invented six-band photometric system and a simulated source."""

import astropy.units as u
import numpy as np
import pytest
from invented import CATALOG_WAVE, TRUTH, catalog_workflow_data, invented_catalog, simulate

from sedtemp.bands import Band, BandSet
from sedtemp.models import ModifiedBlackbody

#: Invented band set (top-hats, 30 % wide in frequency) spanning the far-IR/submm.
WAVELENGTHS_UM = (70, 100, 160, 250, 350, 500)


@pytest.fixture(scope="session")
def bands():
    return BandSet([Band.tophat(f"b{w}", w * u.um, 0.3) for w in WAVELENGTHS_UM])


@pytest.fixture(scope="session")
def model():
    return ModifiedBlackbody(distance=300 * u.pc)


@pytest.fixture(scope="session")
def source(model, bands):
    theta = np.array([[TRUTH["log10_mass"], TRUTH["T"], TRUTH["beta"]]])
    f, err, _ = simulate(model, bands, theta, 20.0, np.random.default_rng(11))
    return f[0], err[0]



@pytest.fixture(scope="session")
def make_catalog():
    """The invented-catalogue factory :func:`invented_catalog` as a fixture (no ``from conftest import``)."""
    return invented_catalog


@pytest.fixture(scope="session")
def catalog_wave():
    """Wavelengths (um) of the invented catalogue's top-hat bands."""
    return CATALOG_WAVE


@pytest.fixture(scope="session")
def workflow_data():
    """Factory of workflow mappings for the invented catalogue (see :func:`catalog_workflow_data`)."""
    return catalog_workflow_data
