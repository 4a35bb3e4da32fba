"""Invented test data shared by the pipeline and CLI tests (imported as ``invented``; not a conftest)."""

import astropy.units as u
import numpy as np
from astropy.table import Table

from sedtemp.bands import Band, BandSet
from sedtemp.models import ModifiedBlackbody
from sedtemp.simulate import simulate_photometry

#: The invented source of the fit and comparison tests.
TRUTH = {"log10_mass": 0.0, "T": 20.0, "beta": 1.8}


def simulate(model, bands, theta, snr, rng, calibration=None):
    """Band fluxes (Jy) of parameter rows ``theta`` with Gaussian noise at ``snr``: the tests'
    shorthand for :func:`sedtemp.simulate.simulate_photometry` drawing from the generator ``rng``."""
    return simulate_photometry(bands, model, theta, snr=snr, calibration=calibration, seed=rng)


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
    f, e, _ = simulate_photometry(bs, ModifiedBlackbody(distance=400 * u.pc), theta, snr=1 / 0.08, seed=rng,
                                  unit_si=(1 * unit).to_value(u.W / u.m**2 / u.Hz))
    t = Table()
    t["name"] = [f"S{i:03d}" for i in range(n)]
    for j, w in enumerate(CATALOG_WAVE):
        t[f"F{w}"] = f[:, j] * unit
        t[f"E{w}"] = e[:, j] * unit
    return t


def catalog_workflow_data(**sections):
    """Workflow mapping for the invented catalogue: five top-hat bands, 400 pc, a small grid."""
    bands = {f"b{w}": {"flux": f"F{w}", "error": f"E{w}", "tophat": {"center": f"{w} um", "width": 0.3}}
             for w in CATALOG_WAVE}
    data = {"run": {"seed": 5, "executor": "serial", "chunk_size": 3},
            "catalog": {"path": "catalog.ecsv", "id_column": "name", "distance": "400 pc"},
            "bands": bands, "fit": {"n_T": 30, "n_beta": 20, "n_draws": 100},
            "priors": {"T": {"kind": "uniform", "low": 5.0, "high": 60.0}},
            "output": {"n_keep": 50, "plots": False, "source_plots": "none"}}
    for name, values in sections.items():
        data[name] = {**data.get(name, {}), **values}
    return data


#: Bands of the thin-dust catalogue of the batch and streamed-output tests.
THIN_DUST_WAVE = (70, 160, 250, 350, 500)


def thin_dust_catalog(n, seed):
    """Invented thin-dust sources at 400 pc in five top-hat bands, 8 % noise (test data only)."""
    bs = BandSet([Band.tophat(f"b{w}", w * u.um, 0.3) for w in THIN_DUST_WAVE])
    model = ModifiedBlackbody(distance=400 * u.pc)
    rng = np.random.default_rng(seed)
    theta = np.column_stack([rng.uniform(-1, 0, n), rng.uniform(12, 30, n), rng.uniform(1.4, 2.2, n)])
    f, e, _ = simulate_photometry(bs, model, theta, snr=1 / 0.08, seed=rng)
    t = Table()
    t["name"] = [f"S{i:03d}" for i in range(n)]
    for j, w in enumerate(THIN_DUST_WAVE):
        t[f"F{w}"] = f[:, j] * u.Jy
        t[f"E{w}"] = e[:, j] * u.Jy
    return t
