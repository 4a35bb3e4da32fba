"""The population stage: after a catalogue run, the (T, beta) population of its sources.

Runs :func:`sedtemp.population.population_from_results` on the finished
results (their kept posterior draws) with the fit's own (T, beta) prior as
the interim prior, and writes ``population.ecsv``,
``population_sources.ecsv`` and the figure. ``sedtemp population RESULTS``
does the same on the files of a finished run (the results table and its
draws file).
"""

from __future__ import annotations

import logging
import warnings
from pathlib import Path

import numpy as np
from astropy.table import Table

from .._version import __version__
from ..errors import InputError, SedtempWarning
from .config import Workflow
from .schema import DRAW_PREFIX, STATUS_OK

__all__ = ["population_stage", "read_draws", "DRAWS_SUFFIXES"]

log = logging.getLogger(__name__)

#: Draws files a run may leave beside its results: HDF5 (h5py installed) or FITS.
DRAWS_SUFFIXES = ("-draws.h5", "-draws.fits")


def _interim_prior(wf: Workflow):
    """The fit's prior on (T, beta): the grid's draws were taken under it."""
    from .stages import model_for

    model = model_for(wf, 0.0, None if wf.model["amplitude"] != "mass" else 3.0e19)
    prior = model.default_prior().updated(wf.build_prior())
    return prior if "beta" in prior else None


def population_stage(result: Table, wf: Workflow, directory: str | Path) -> dict | None:
    """Infer the population of ``result`` (with ``draws_T``/``draws_beta``) and write its files.

    Parameters
    ----------
    result : Table
        Results of a run with posterior draws (``[output] n_keep`` > 0).
    wf : Workflow
        Its workflow (``[population]`` settings, the fit prior, the seed).
    directory : str or Path
        Where the files go.

    Returns
    -------
    dict or None
        ``files`` written and the population ``summary`` rows (for the
        report); None when ``[population] enabled`` is false.

    Raises
    ------
    InputError
        No draws in ``result`` or no fitted source with a free beta.
    """
    pop = wf.population
    if not pop.get("enabled"):
        return None
    from ..population import population_from_results, write_population

    if DRAW_PREFIX + "T" not in result.colnames or DRAW_PREFIX + "beta" not in result.colnames:
        raise InputError("[population] needs posterior draws of T and beta: set [output] n_keep > 0 "
                         "and fit beta (no [model] beta)")
    ok = np.asarray(result["status"]) == STATUS_OK
    if not ok.any():
        raise InputError("[population]: no fitted source in the results")
    with warnings.catch_warnings(record=True) as caught:
        # each warning is also a flag of population_sources.ecsv or of the summary;
        # the report lists them once instead of a traceback-like line on stderr
        warnings.simplefilter("always", SedtempWarning)
        res = population_from_results(result[ok], model=pop["model"], seed=wf.run["seed"],
                                      n_walkers=pop["n_walkers"], n_steps=pop["n_steps"],
                                      interim_prior=_interim_prior(wf), min_ess=pop["min_ess"],
                                      equilibrium_scatter=pop.get("equilibrium_scatter"),
                                      id_column=result.colnames[0])
    files = write_population(res, directory, version=__version__)
    summary = res.summary()
    rows = {str(r["parameter"]): float(r["median"]) for r in summary}
    log.info("population: %s", rows)
    return {"files": [Path(p).name for p in files], "summary": rows,
            "converged": bool(res.converged),
            "warnings": sorted({str(w.message) for w in caught if issubclass(w.category, SedtempWarning)})}


def read_draws(results: Table, path: str | Path) -> Table:
    """Attach the draws file of a run (``<name>-draws.h5`` or ``.fits``) to its results table.

    Raises
    ------
    InputError
        No draws file beside the results, or one whose ids do not match.
    """
    path = Path(path)
    stem = path.with_suffix("")
    for suffix in DRAWS_SUFFIXES:
        f = stem.with_name(stem.name + suffix)
        if f.exists():
            draws = _read_h5(f) if suffix.endswith(".h5") else Table.read(f)
            break
    else:
        raise InputError(f"{path}: no draws file beside it ({', '.join(stem.name + s for s in DRAWS_SUFFIXES)}); "
                         "rerun with [output] keep_draws = true")
    ids = [str(v) for v in results[results.colnames[0]]]
    if [str(v) for v in draws["id"]] != ids:
        raise InputError(f"{f}: its source ids do not match {path.name}; the two files are of different runs")
    out = results.copy()
    for name in draws.colnames:
        if name != "id":
            out[DRAW_PREFIX + name] = np.asarray(draws[name], float)
    return out


def _read_h5(path: Path) -> Table:
    try:
        import h5py
    except ImportError as err:
        raise ImportError(f"{path} is HDF5 and needs h5py: pip install 'sedtemp[hdf5]'") from err
    with h5py.File(path, "r") as h5:
        tab = Table({k: np.asarray(h5[k]) for k in h5})
    tab["id"] = [v.decode() if isinstance(v, bytes) else str(v) for v in tab["id"]]
    return tab
