"""Population inference on a results table, and its output files.

Free of pipeline imports (the pipeline calls these): it reads the
``draws_T`` / ``draws_beta`` columns (n, n_keep) a results table carries.
"""

from __future__ import annotations

import io
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import astropy.units as u
import numpy as np
from astropy.table import Table, vstack
from numpy.typing import ArrayLike

from .._io import atomic_write_bytes, atomic_write_text
from ..errors import InputError
from .figure import population_figure
from .heated import heated_fraction
from .infer import DEFAULT_MIN_ESS, DEFAULT_N_STEPS, infer_population
from .result import PopulationResult

if TYPE_CHECKING:
    from ..priors import Prior

__all__ = ["POPULATION_FILES", "RATIO_DRAWS_COLUMN", "population_from_results", "write_population"]

#: Files written by :func:`write_population`, in order.
POPULATION_FILES = ("population.ecsv", "population_sources.ecsv", "population_posterior.png",
                    "population_posterior.pdf")
#: Column of per-draw T_fit / T_eq ratios read when present (n, n_keep).
RATIO_DRAWS_COLUMN = "draws_ratio"


def _values(col):
    """Plain floats of a column; a temperature column in K."""
    unit = getattr(col, "unit", None)
    if unit is not None and unit.physical_type == "temperature":
        return u.Quantity(col).to_value(u.K)
    return np.asarray(getattr(col, "value", col), float)


def _draws_of(results, draws):
    if draws is not None:
        if not isinstance(draws, Mapping) or "T" not in draws or "beta" not in draws:
            raise InputError("population_from_results: draws must be a mapping with 'T' and 'beta' arrays "
                             "(n_sources, n_draws)")
        T, beta = (np.asarray(u.Quantity(draws[k]).to_value(u.K) if isinstance(draws[k], u.Quantity)
                              else draws[k], float) for k in ("T", "beta"))
    else:
        missing = [c for c in ("draws_T", "draws_beta") if c not in results.colnames]
        if missing:
            raise InputError(f"population_from_results: the results table has no {missing} column(s); "
                             "keep posterior draws in the run (e.g. [output] n_keep = 200) or pass draws=")
        T, beta = _values(results["draws_T"]), _values(results["draws_beta"])
    if T.ndim != 2 or T.shape != beta.shape or T.shape[0] != len(results):
        raise InputError(f"population_from_results: T and beta draws must both be (n_rows={len(results)}, "
                         f"n_draws), got {T.shape} and {beta.shape}")
    return np.stack([T, beta], axis=-1)


def population_from_results(results: Table, *, draws: Mapping[str, ArrayLike] | None = None,
                            model: str | Any = "gaussian", seed: int | None = 0,
                            n_walkers: int = 32, n_steps: int = DEFAULT_N_STEPS,
                            interim_prior: Prior | Sequence[Any] | Callable[..., np.ndarray] | None = None,
                            min_ess: float = DEFAULT_MIN_ESS, ratio_draws: ArrayLike | None = None,
                            equilibrium_scatter: float | None = None, id_column: str = "id") -> PopulationResult:
    """Population of a results table (``draws_T``, ``draws_beta`` columns) and optionally the heated fraction.

    Parameters
    ----------
    results : astropy.table.Table
        One row per source; ``draws_T`` (K) and ``draws_beta`` of shape
        (n, n_keep), NaN-padded. Rows whose draws are all NaN (failed fits,
        fixed-beta fits) are left out and flagged ``no_draws``.
    draws : mapping, optional, keyword-only
        ``{"T": (n, m), "beta": (n, m)}`` instead of the columns (T in K).
    model, seed, n_walkers, n_steps, interim_prior, min_ess : keyword-only
        As in :func:`~sedtemp.population.infer_population`.
    ratio_draws : array_like (n, m), optional, keyword-only
        Per-draw T_fit / T_eq (linear ratio) of each row; default the
        ``draws_ratio`` column when present. Given, the heated fraction is
        inferred too and attached as ``result.heated``.
    equilibrium_scatter : float, keyword-only
        Needed with ratio draws: see :func:`~sedtemp.population.heated_fraction`.
    id_column : str, keyword-only
        Column of source ids (default "id"; the row index if absent).

    Returns
    -------
    PopulationResult

    Raises
    ------
    InputError
        No draws, draws of the wrong shape, ratio draws without ``equilibrium_scatter``.
    """
    x = _draws_of(results, draws)
    ids = [v.item() if isinstance(v, np.generic) else v for v in results[id_column]] \
        if id_column in results.colnames else list(range(len(results)))
    res = infer_population(x, interim_prior=interim_prior, model=model, seed=seed, n_walkers=n_walkers,
                           n_steps=n_steps, min_ess=min_ess, source_ids=ids)
    if ratio_draws is None and RATIO_DRAWS_COLUMN in results.colnames:
        ratio_draws = _values(results[RATIO_DRAWS_COLUMN])
    if ratio_draws is not None:
        if equilibrium_scatter is None:
            raise InputError("population_from_results: ratio draws given but no equilibrium_scatter; pass "
                             "equilibrium_scatter= (sd of ln T_eq among equilibrium sources)")
        ratio = np.asarray(ratio_draws, float)
        if ratio.ndim != 2 or ratio.shape[0] != len(results):
            raise InputError(f"population_from_results: ratio_draws must be (n_rows={len(results)}, n_draws), "
                             f"got {ratio.shape}")
        with np.errstate(divide="ignore", invalid="ignore"):
            y = np.where(ratio > 0, np.log(np.where(ratio > 0, ratio, 1.0)), np.nan)
        res.heated = heated_fraction(y, equilibrium_scatter=equilibrium_scatter, seed=seed,
                                     n_steps=n_steps, min_ess=min_ess, source_ids=ids)
    return res


def _ecsv(table):
    buf = io.StringIO()
    table.write(buf, format="ascii.ecsv")
    return buf.getvalue()


def _summary_with_heated(result):
    """The population summary, with the heated fraction's rows appended when there is one."""
    tab = result.summary()
    if result.heated is None:
        return tab
    h = result.heated.summary()
    meta = dict(tab.meta)
    meta.update({f"heated_{k}": v for k, v in h.meta.items()})
    tab = vstack([tab, h], metadata_conflicts="silent")
    tab.meta = meta
    return tab


def write_population(result: PopulationResult, directory: str | Path, *,
                     version: str | None = None) -> list[Path]:
    """Write ``population.ecsv``, ``population_sources.ecsv`` and the figure (PNG, PDF), atomically.

    Parameters
    ----------
    result : PopulationResult
    directory : str or Path
        Created if needed.
    version : str, optional, keyword-only
        Recorded in the files' metadata (the pipeline passes the sedtemp version).

    Returns
    -------
    list of Path
        The files written, in the order of :data:`POPULATION_FILES`.
    """
    d = Path(directory)
    d.mkdir(parents=True, exist_ok=True)
    summary = _summary_with_heated(result)
    sources = result.source_table()
    if result.heated is not None:
        sources["p_heated"] = result.heated.p_heated
        sources["heated_flag"] = np.asarray(result.heated.flags, dtype=str)
    for tab in (summary, sources):
        if version is not None:
            tab.meta["sedtemp_version"] = version
    paths = [atomic_write_text(d / POPULATION_FILES[0], _ecsv(summary)),
             atomic_write_text(d / POPULATION_FILES[1], _ecsv(sources))]
    fig = population_figure(result)
    for name in POPULATION_FILES[2:]:
        buf = io.BytesIO()
        fig.savefig(buf, format=name.rsplit(".", 1)[1], dpi=120)
        paths.append(atomic_write_bytes(d / name, buf.getvalue()))
    return paths
