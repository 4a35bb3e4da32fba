"""The comparison of a whole chunk of sources at once: arrays in, columns out.

:func:`compare_chunk` is what the pipeline calls. Draw-level quantities of
all sources are computed as (n_sources, n_draws) arrays: absorbed power by
:func:`sedtemp.absorption.absorbed_power_and_reference` (each shared spectrum
integrated once, the ISRF(1) of ``U_implied`` with them), T_eq and the
emitted power from the opacity's one emission table, quantiles and flags
along the draw axis. Only the random draws of the
field uncertainty (one stream per source, so a source's result does not
depend on its chunk) and the verdict strings are made per source.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING

import astropy.units as u
import numpy as np
from numpy.typing import ArrayLike

from ..absorption import absorbed_power_and_reference, warn_extrapolated
from ..emission import check_beta, emission_table
from ..errors import InputError
from ..fit.summary import QUANTILES
from ..radiation import ISRF, RadiationField
from .flags import classify, untrusted_flags, verdict
from .thresholds import Thresholds
from .uncertainty import _Shared, draw_factors, opacity_factors, resolve_uncertainty

if TYPE_CHECKING:
    from ..grains import Grain
    from ..opacity import Opacity
    from .uncertainty import FieldUncertaintySpec, OpacityUncertaintySpec

__all__ = ["DRAWN", "W_PER_KG_IN_LSUN_PER_MSUN", "column_names", "compare_chunk"]

#: 1 W kg^-1 expressed in L_sun / M_sun (IAU 2015 nominal L_sun and M_sun, via astropy).
W_PER_KG_IN_LSUN_PER_MSUN = float((u.W / u.kg).to(u.L_sun / u.solMass))
#: The drawn quantities summarised by quantile columns, in column order.
DRAWN = ("T_eq", "ratio", "U_implied", "field_scale", "extra_power", "extra_power_solar", "extra_luminosity")
_ISRF1 = ISRF(1.0)


def column_names() -> list[str]:
    """Names of the comparison columns, in order (:meth:`Comparison.columns` keys)."""
    names = [f"{n}_{k}" for n in DRAWN for k in QUANTILES]
    return [*names, "p_warmer", "stochastic_fraction", "T_eq_is_upper_bound", "opacity_extrapolated_fraction", "flag", "verdict"]


def evaluate(T: np.ndarray, b: np.ndarray, fields: Sequence[RadiationField], opacity: Opacity, fac: np.ndarray,
             bounded: np.ndarray, q_op: np.ndarray) -> dict[str, np.ndarray]:
    """Draw-level arrays (n, m) for sources with draws T, b, factors fac (n, m, k), bounded (n, k)."""
    # the ISRF(1) of U_implied is absorbed in the same integration as the fields
    p_comp, p_x, p1 = absorbed_power_and_reference(fields, opacity, b, _ISRF1)
    k = p_comp.shape[-1]
    fac = fac[:, :, :k]
    nominal = p_comp.sum(axis=-1)
    if not np.all(nominal > 0):
        bad = int(np.flatnonzero(~np.all(nominal > 0, axis=1))[0])
        raise InputError(f"compare: the field {fields[bad]!r} supplies no absorbed power; check the field "
                         "and the opacity")
    p_abs = np.einsum("nmk,nmk->nm", p_comp, fac) * q_op  # the drawn factors, summed over components
    table = emission_table(opacity)
    out = {"T_eq": table.temperature(p_abs, b), "p_abs": p_abs, "nominal": nominal}
    out["p_emit"] = table.power(T, b)
    out["U_implied"] = out["p_emit"] / p1
    with np.errstate(invalid="ignore", divide="ignore"):
        out["extrapolated"] = np.einsum("nmk,nmk->nm", p_x, fac) * q_op / p_abs
    out["extrapolated_median"] = np.median(out["extrapolated"], axis=1)  # a column, and for the warning
    if bounded[:, :k].any():
        p_floor = np.sum(p_comp * fac * ~bounded[:, None, :k], axis=-1) * q_op
        t_floor = table.temperature(p_floor, b)
        out["T_floor"] = np.where(bounded[:, :k].any(axis=1)[:, None], t_floor, np.nan)
    return out


def _quantiles(x: np.ndarray, probs: Sequence[float]) -> np.ndarray:
    """``np.quantile(x, probs, axis=-1)`` (its default linear method, bit for bit) from one sort.

    For many short rows this is several times faster than ``np.quantile``,
    which selects each quantile separately. A row with a NaN gives NaN, as
    ``np.quantile`` does.
    """
    s = np.sort(x, axis=-1)
    n = s.shape[-1]
    v = np.asarray(probs, float) * (n - 1)
    lo = np.floor(v).astype(np.intp)
    g = v - lo
    a, b = s[..., lo], s[..., np.minimum(lo + 1, n - 1)]
    with np.errstate(invalid="ignore"):  # inf - inf in a row of infinite draws: NaN, as np.quantile
        d = b - a
        # numpy's _lerp: from the nearer end, so that the result is monotone in the probability
        q = np.where(g >= 0.5, b - d * (1 - g), a + d * g)
    q = np.where(np.isnan(s[..., -1:]), np.nan, q)  # NaN sorts last
    return np.moveaxis(q, -1, 0)


def columns_from(T: np.ndarray, mass: np.ndarray | None, ev: Mapping[str, np.ndarray],
                 untrusted: Sequence[Sequence[str]], bounded_any: np.ndarray, th: Thresholds,
                 stochastic_fraction: ArrayLike | None = None, grain: Grain | None = None
                 ) -> tuple[dict[str, np.ndarray], np.ndarray, np.ndarray | None]:
    """Column arrays (n,) of many sources from their evaluated draws (see :func:`column_names`)."""
    n, m = T.shape
    t_eq = ev["T_eq"]
    ratio = T / t_eq
    ratio_floor = None
    if "T_floor" in ev:
        with np.errstate(divide="ignore", invalid="ignore"):
            tf = ev["T_floor"]
            ratio_floor = np.where(np.isnan(tf), np.nan, np.where(tf > 0, T / np.where(tf > 0, tf, 1.0), np.inf))
    extra = ev["p_emit"] - ev["p_abs"]
    draws = {"T_eq": t_eq, "ratio": ratio, "U_implied": ev["U_implied"], "field_scale": ev["p_emit"] / ev["p_abs"],
             "extra_power": extra, "extra_power_solar": extra * W_PER_KG_IN_LSUN_PER_MSUN,
             "extra_luminosity": None if mass is None else extra * W_PER_KG_IN_LSUN_PER_MSUN * mass}
    probs = [QUANTILES[k] for k in QUANTILES]
    present = [name for name, x in draws.items() if x is not None]
    q_all = _quantiles(np.stack([draws[name] for name in present]), probs)  # (n_q, n_present, n)
    cols = {}
    for name in draws:
        q = q_all[:, present.index(name)] if name in present else np.full((len(probs), n), np.nan)
        cols.update({f"{name}_{k}": q[j] for j, k in enumerate(QUANTILES)})
    sf = np.full(n, np.nan) if stochastic_fraction is None else np.asarray(stochastic_fraction, float)
    cols["p_warmer"] = np.mean(t_eq < T, axis=1)
    cols["stochastic_fraction"] = sf
    cols["T_eq_is_upper_bound"] = np.asarray(bounded_any, bool)
    cols["opacity_extrapolated_fraction"] = ev["extrapolated_median"]
    q3 = np.array([cols["ratio_p16"], cols["ratio_median"], cols["ratio_p84"]])
    flags = classify(ratio, ratio_floor, sf, [bool(x) for x in untrusted], th, ratio_quantiles=q3)
    lum = None if mass is None else np.median(draws["extra_luminosity"], axis=1)
    solar = np.median(draws["extra_power_solar"], axis=1)
    cols["flag"] = flags
    cols["verdict"] = np.array([  # text per source
        verdict(flags[i], q=tuple(q3[:, i]), p_warmer=cols["p_warmer"][i], n=m, th=th, bounded=bool(bounded_any[i]),
                untrusted=untrusted[i], stochastic_fraction=sf[i], grain=grain, extra_solar=solar[i],
                extra_lum=None if lum is None else lum[i]) for i in range(n)])
    return cols, ratio, ratio_floor


def _as_2d(x, shape, name, unit=None):
    a = np.asarray(x.to_value(unit) if isinstance(x, u.Quantity) else x, float)
    if a.shape != shape:
        raise InputError(f"compare_chunk: {name} must have shape {shape}, got {a.shape}")
    return a


def source_factors(spec: FieldUncertaintySpec, field: RadiationField, projected: bool, m: int,
                   seed: np.random.SeedSequence | np.random.Generator,
                   opacity_uncertainty: OpacityUncertaintySpec, shared: _Shared
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(factors (m, k), bounded (k,), opacity factors (m,)) of one source from its own stream."""
    rng = np.random.default_rng(seed)
    entries = resolve_uncertainty(spec, field, projected)
    fac, bounded = draw_factors(entries, field.components, m, rng, shared=shared)
    return fac, bounded, opacity_factors(opacity_uncertainty, m, rng, shared=shared)


def compare_chunk(T_draws: u.Quantity | ArrayLike, beta_draws: ArrayLike, fields: Sequence[RadiationField],
                  opacity: Opacity, *, mass_draws: u.Quantity | ArrayLike | None = None,
                  field_uncertainty: FieldUncertaintySpec = None,
                  opacity_uncertainty: OpacityUncertaintySpec = None, projected: bool = False,
                  thresholds: Thresholds | Mapping[str, float] | None = None,
                  fit_flags: Sequence[str] | None = None, seeds: Sequence[np.random.SeedSequence],
                  run_seed: int | None = None, keep_draws: bool = False) -> dict[str, np.ndarray]:
    """Compare the posterior draws of a chunk of sources with their equilibrium temperatures.

    Parameters
    ----------
    T_draws : ndarray or Quantity (n, m)
        Draws of T per source (bare numbers in K), finite and > 0.
    beta_draws : ndarray (n, m)
        The matching beta draws (fixed-beta fits: the fixed value repeated).
    fields : sequence of RadiationField, length n
        Per-source fields (:func:`sedtemp.fields.build_field`), all with the
        same components in the same order when ``field_uncertainty`` names
        components by index.
    opacity : Opacity
    mass_draws : ndarray or Quantity (n, m), optional, keyword-only
        Mass draws (bare numbers in solMass) for ``extra_luminosity``.
    field_uncertainty, projected, thresholds : keyword-only
        As in :func:`sedtemp.compare.compare_draws` (one specification for all sources).
    opacity_uncertainty : keyword-only
        As in :func:`sedtemp.compare.compare_draws` (default 0.3).
    fit_flags : sequence of str, optional, keyword-only
        Per-source comma-separated fit trust flags.
    seeds : sequence of SeedSequence, keyword-only
        One per source (e.g. from :func:`sedtemp.compare.row_seed`).
    run_seed : int, optional, keyword-only
        The run seed of shared uncertainties (None: 0).
    keep_draws : bool, keyword-only
        Also return ``draws_T_eq`` (K) and ``draws_ratio``, both (n, m).

    Returns
    -------
    dict of ndarray (n,)
        The columns of :meth:`Comparison.columns`, per source.

    Raises
    ------
    InputError
        Bad shapes, draws, fields or uncertainty specification (for the whole chunk).

    Notes
    -----
    Equal, source by source, to :func:`~sedtemp.compare.compare_draws` with
    the same seed: identical random draws, and numerics that agree to ~1e-12
    relative (the same beta nodes and tables; only the order of summation in
    the matrix products differs). tests/test_compare.py checks 1e-10.
    """
    n = len(fields)
    T = np.asarray(T_draws.to_value(u.K) if isinstance(T_draws, u.Quantity) else T_draws, float)
    if T.ndim != 2 or T.shape[0] != n:
        raise InputError(f"compare_chunk: T_draws must have shape ({n}, n_draws), got {T.shape}")
    m = T.shape[1]
    for i, fld in enumerate(fields):
        if not isinstance(fld, RadiationField):
            raise InputError(f"compare_chunk: field {i} must be a sedtemp.radiation field, got {type(fld).__name__}")
    if m < 2 or not np.all(np.isfinite(T) & (T > 0)):
        raise InputError("compare_chunk: T_draws must be finite, positive temperatures (K), >= 2 draws per source")
    b = check_beta(_as_2d(beta_draws, (n, m), "beta_draws"), "compare_chunk")
    mass = None if mass_draws is None else _as_2d(mass_draws, (n, m), "mass_draws", u.solMass)
    if len(seeds) != n:
        raise InputError(f"compare_chunk: need one seed per source ({n}), got {len(seeds)}")
    th = Thresholds.from_any(thresholds)
    shared = _Shared(run_seed)
    k = max(len(f.components) for f in fields) if n else 0
    fac, bounded, q_op = np.ones((n, m, k)), np.zeros((n, k), bool), np.ones((n, m))
    for i, fld in enumerate(fields):  # random streams are per source; the numerics below are not
        f_i, b_i, q_i = source_factors(field_uncertainty, fld, projected, m, seeds[i], opacity_uncertainty, shared)
        fac[i, :, :f_i.shape[1]], bounded[i, :b_i.size], q_op[i] = f_i, b_i, q_i
    ev = evaluate(T, b, fields, opacity, fac, bounded, q_op)
    warn_extrapolated(ev["extrapolated_median"], opacity, "compare_chunk")
    untrusted = [untrusted_flags(None if fit_flags is None else fit_flags[i]) for i in range(n)]
    cols, ratio, _ = columns_from(T, mass, ev, untrusted, bounded.any(axis=1), th)
    if keep_draws:
        cols["draws_T_eq"], cols["draws_ratio"] = ev["T_eq"], ratio
    return cols
