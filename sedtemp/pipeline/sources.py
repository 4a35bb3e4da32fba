"""One catalogue source in full: its posterior as a FitResult, and its figures.

A grid-fitted source's :class:`~sedtemp.fit.FitResult` is rebuilt from the
grid draws with the source's own seed (the very draws the run summarised,
in milliseconds, no MCMC); an MCMC source is refitted with its seed, which
gives the run's chain bit for bit. The corner and SED plots need only the
draws; the trace plot needs a chain, so it is made for MCMC sources only,
or when asked (``trace=True``, which refits a grid source by MCMC).
"""

from __future__ import annotations

import re
import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

import astropy.units as u
import numpy as np

from ..errors import InputError, SedtempWarning
from .catalog import MappedCatalog
from .config import Workflow
from .stages import (
    fit_method,
    flux_scaling,
    grid_for,
    mcmc_result,
    model_for,
    source_streams,
)

if TYPE_CHECKING:
    from astropy.table import Row
    from numpy.typing import ArrayLike

    from ..fit import FitResult

__all__ = ["grid_result", "plot_source", "refit_source", "source_plot_stem", "source_result", "t_eq_band"]


def _check_index(mapped, index, what):
    if isinstance(index, bool) or not isinstance(index, (int, np.integer)) or not 0 <= index < len(mapped):
        raise InputError(f"{what}: index must be an integer in [0, {len(mapped)}), got {index!r}")
    key = str(mapped.keys[index])
    if mapped.skip_reason[index]:
        raise InputError(f"source {key!r} is skipped by this workflow ({mapped.skip_reason[index]}); "
                         "there is no fit to redo")
    return key


def refit_source(workflow: Workflow, mapped: MappedCatalog, index: int) -> FitResult:
    """The full MCMC posterior of one catalogue source, as the batch run would sample it.

    Runs :func:`sedtemp.fit.fit_source` with the workflow's model, priors,
    calibration groups and ``[fit]`` emcee settings, seeded with the
    source's own fit seed (``source_seed(seed, key).spawn(2)[0]``). For a
    source the batch fitted by MCMC the chain is the batch's, bit for bit;
    for a grid source it is an MCMC sample of the same posterior.

    Parameters
    ----------
    workflow : Workflow
    mapped : MappedCatalog
        The catalogue, mapped with this workflow.
    index : int
        Position of the source in ``mapped``.

    Returns
    -------
    FitResult

    Raises
    ------
    InputError
        ``index`` out of range, or the workflow skips the source (its reason).

    Notes
    -----
    With a per-source ``distance_column`` the batch samples fluxes rescaled
    to 1 kpc (the same posterior in T, beta and mass: S ~ M / D^2); the refit
    uses the source's own distance, so its fluxes are the catalogue's and its
    chain equals the batch's only up to rounding.
    """
    key = _check_index(mapped, index, "refit_source")
    with warnings.catch_warnings():
        # as in the batch: every sedtemp warning of the fit is also one of its flags
        warnings.simplefilter("ignore", SedtempWarning)
        res, _ = mcmc_result(workflow, mapped, int(index), source_streams(workflow, key)[0], rescaled=False)
    return res


def grid_result(workflow: Workflow, mapped: MappedCatalog, index: int) -> FitResult:
    """The grid posterior of one source as a :class:`~sedtemp.fit.FitResult` (no chain).

    The draws are those of the batch run (same grid, same seed); ``ess`` is
    the number of draws (independent), ``chain`` is None, ``method = "grid"``.
    With a per-source distance the mass draws are moved from the 1 kpc grid
    distance to the source's own (exact: S ~ M / D^2).

    Raises
    ------
    InputError
        As :func:`refit_source`.
    """
    from ..fit import FitResult

    key = _check_index(mapped, index, "grid_result")
    i = int(index)
    d_grid, factor = flux_scaling(workflow, mapped, i)
    grid = grid_for(workflow, mapped.redshift[i], d_grid)
    sl = slice(i, i + 1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SedtempWarning)
        cols, extra = grid.summarise(mapped.flux[sl] * factor, mapped.err[sl] * factor, mapped.limit_only[sl],
                                     n_draws=workflow.fit["n_draws"],
                                     rng=[np.random.default_rng(source_streams(workflow, key)[0])], keep_draws=True)
    model = grid.model
    shift = -np.log10(factor) if factor != 1.0 else 0.0  # mass at the source's own distance
    samples = {}
    for name in model.param_names:
        v = np.asarray(extra["draws"][name][0])[: workflow.fit["n_draws"]]
        samples[name] = v + shift if name == model.amplitude_name else v
    if factor != 1.0:
        model = model_for(workflow, mapped.redshift[i], float(mapped.distance_m[i]))
    n = len(samples["T"])
    map_params = {p: float(cols[f"{p}_map"][0]) + (shift if p == model.amplitude_name else 0.0)
                  for p in model.param_names if f"{p}_map" in cols}
    used = ~mapped.missing[i]
    return FitResult(samples=samples, log_prob=np.full(n, np.nan), param_names=tuple(model.param_names),
                     units=dict(model.param_units), ess={p: float(n) for p in model.param_names},
                     tau=dict.fromkeys(model.param_names, 1.0), acceptance_fraction=float("nan"),
                     converged=True, flags=tuple(extra["flags"][0]), map_params=map_params,
                     chi2_map=float(cols["chi2_map"][0]), dof=int(cols["dof"][0]), ppp=float(cols["ppp"][0]),
                     n_bands_used=int(cols["n_bands_used"][0]), method="grid", model=model,
                     bands=workflow.bandset(), flux_si=np.where(used, mapped.flux[i], np.nan),
                     err_si=np.where(used, mapped.err[i], np.nan), limit_only=mapped.limit_only[i])


def source_result(workflow: Workflow, mapped: MappedCatalog, index: int, *,
                  chain: bool = False) -> tuple[FitResult, bool]:
    """The source's posterior as the run had it: (FitResult, refitted by MCMC?).

    A grid source gives :func:`grid_result` (no refit) unless ``chain`` is
    asked for; an MCMC source (or ``chain=True``) gives :func:`refit_source`.
    """
    key = _check_index(mapped, index, "source_result")
    if chain or fit_method(workflow, key) == "mcmc":
        return refit_source(workflow, mapped, index), True
    return grid_result(workflow, mapped, index), False


#: Characters kept in a figure file name made from a source id (others become "_").
_SAFE_NAME = re.compile(r"[^A-Za-z0-9._+-]")


def source_plot_stem(key: str) -> str:
    """File-name stem of a source's figures: its id with characters other than ``A-Za-z0-9._+-`` as ``_``."""
    return _SAFE_NAME.sub("_", str(key)) or "_"


def t_eq_band(row: Row | Mapping[str, Any]) -> np.ndarray | None:
    """The predicted T_eq to shade on a corner plot, from a results row, in K; None if there is none.

    The 16-84 % interval ``(T_eq_p16, T_eq_p84)`` of the comparison stage
    when the row has it; else the single prediction ``T_eq_point`` (or
    ``T_eq`` of results before version 0.2) as three equal values (a line).
    """
    names = row.colnames if hasattr(row, "colnames") else list(row.keys())

    def value(name):
        return float(u.Quantity(row[name], u.K).value) if name in names else np.nan

    lo, hi = value("T_eq_p16"), value("T_eq_p84")
    if np.isfinite(lo) and np.isfinite(hi):
        return np.array([lo, hi])
    t = value("T_eq_point") if "T_eq_point" in names else value("T_eq")
    return np.full(3, t) if np.isfinite(t) else None


def plot_source(workflow: Workflow, mapped: MappedCatalog, index: int, directory: str | Path, *,
                T_eq: ArrayLike | None = None,
                trace: bool | None = True, info: dict | None = None) -> list:
    """Write the corner and SED plots of one source (and its trace plot when it has a chain).

    Parameters
    ----------
    workflow : Workflow
    mapped : MappedCatalog
    index : int
        Position of the source in ``mapped``.
    directory : str or Path
        Folder of the figures (created): ``<stem>_corner``, ``<stem>_sed``
        (and ``<stem>_trace``), each as ``.pdf`` and ``.png``, with ``<stem>``
        from :func:`source_plot_stem`.
    T_eq : array_like, optional, keyword-only
        Predicted equilibrium temperature (K) shaded on the corner plot.
    trace : bool or None, keyword-only
        True (default, as ``sedtemp plot --source``): refit the source by
        MCMC with its seed and make the trace plot too; None (the batch
        run): the trace plot only for sources the run fitted by MCMC, the
        others drawn from their grid draws without a refit; False: never.
    info : dict, optional, keyword-only
        Receives ``refit`` (bool: an MCMC fit was run for these figures).

    Returns
    -------
    list of Path
        The files written.

    Raises
    ------
    InputError
        From :func:`refit_source` and the plotting functions.
    """
    from .. import plots

    res, refit = source_result(workflow, mapped, index, chain=trace is True)
    if info is not None:
        info["refit"] = refit
    stem = Path(directory) / source_plot_stem(mapped.keys[index])
    figures = {"corner": (plots.corner_plot, {"T_eq": T_eq}), "sed": (plots.sed_plot, {})}
    if res.chain is not None and trace is not False:
        figures["trace"] = (plots.trace_plot, {})
    written = []
    for kind, (make, options) in figures.items():
        written += plots.save_figure(make(res, **options), stem.with_name(f"{stem.name}_{kind}"))
    return written
