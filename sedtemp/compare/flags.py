"""Classification of comparisons into flags, the verdict text, and catalogue-level counts.

:func:`classify` decides the flag of many sources at once from their ratio
draws T_fit / T_eq (arrays (n_sources, n_draws)); :func:`verdict` writes the
one line a person reads; :func:`catalogue_counts` counts heated and
shielded sources per catalogue draw, so a field error shared by many
sources widens the count's interval as it should.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike

from .thresholds import UNTRUSTED_FIT_FLAGS, Thresholds

if TYPE_CHECKING:
    from ..grains import Grain

__all__ = ["catalogue_counts", "classify", "untrusted_flags", "verdict"]


def untrusted_flags(fit_flags: str | Sequence[str] | None) -> tuple[str, ...]:
    """The fit flags (sequence or comma-separated string) that make the posterior prior-set."""
    if fit_flags is None:
        return ()
    items = fit_flags.split(",") if isinstance(fit_flags, str) else list(fit_flags)
    return tuple(f.strip() for f in items if f.strip() in UNTRUSTED_FIT_FLAGS)


def classify(ratio: ArrayLike, ratio_floor: ArrayLike | None, stochastic_fraction: ArrayLike,
             untrusted: ArrayLike, th: Thresholds, *, ratio_quantiles: ArrayLike | None = None) -> np.ndarray:
    """Flags (n,) of :data:`FLAGS` from ratio draws (n, m), tested in the documented order.

    Parameters
    ----------
    ratio : ndarray (n, m)
        T_fit / T_eq per draw.
    ratio_floor : ndarray (n, m) or None
        T_fit / T_eq_floor (the field without projected stars); used for
        ``shielded`` where finite, NaN rows use ``ratio``.
    stochastic_fraction : ndarray (n,)
        Fraction of draws failing the stochastic-heating check (NaN: not checked).
    untrusted : ndarray of bool (n,)
        The fit's posterior is set by its prior.
    th : Thresholds
    ratio_quantiles : ndarray (3, n), optional, keyword-only
        The 16, 50 and 84 % quantiles of ``ratio`` along the draws
        (``np.quantile(ratio, [0.16, 0.5, 0.84], axis=1)``), when the caller
        has them already; computed here otherwise.
    """
    ratio = np.asarray(ratio, float)
    colder = ratio if ratio_floor is None else np.where(np.isnan(ratio_floor), ratio, ratio_floor)
    # "median ratio above x" written as "more than half the draws above x" (robust to inf)
    heated = (np.mean(ratio > 1.0, axis=1) > th.p_decide) & (np.mean(ratio > th.ratio_high, axis=1) > 0.5)
    shielded = (np.mean(colder < 1.0, axis=1) > th.p_decide) & (np.mean(colder < th.ratio_low, axis=1) > 0.5)
    q16, q50, q84 = (np.quantile(ratio, [0.16, 0.5, 0.84], axis=1) if ratio_quantiles is None
                     else np.asarray(ratio_quantiles, float))
    wide = q84 - q16 > th.max_ratio_width * q50
    sf = np.asarray(stochastic_fraction, float)
    stoch = np.isfinite(sf) & (sf >= th.p_stochastic)
    conds = [stoch, np.asarray(untrusted, bool), heated, shielded, wide]
    choices = ["non_equilibrium", "unconstrained", "extra_heating", "shielded", "unconstrained"]
    return np.select(conds, choices, default="consistent")


def _pfmt(p, n):
    """A probability from n draws; 0 and 1 are written as bounds (< 1/n, > 1 - 1/n)."""
    if p >= 1.0:
        return f"> {1 - 1 / n:.3f}"
    if p <= 0.0:
        return f"< {1 / n:.3f}"
    return f"= {p:.3f}"


def verdict(flag: str, *, q: Sequence[float], p_warmer: float, n: int, th: Thresholds, bounded: bool,
            untrusted: Sequence[str] = (), stochastic_fraction: float = float("nan"),
            grain: Grain | None = None, extra_solar: float = float("nan"),
            extra_lum: float | None = None) -> str:
    """One line: flag, ratio and its 68 % interval, the probability, and what it means.

    ``q`` is (q16, q50, q84) of the ratio; ``extra_solar`` and ``extra_lum``
    the medians of the extra power (L_sun/M_sun) and luminosity (L_sun or None).
    """
    q16, q50, q84 = q
    r = f"T_fit/T_eq = {q50:.2f} [{q16:.2f}, {q84:.2f}] (68 %)"
    tail = "; T_eq is an upper bound (projected star distance)" if bounded else ""
    if flag == "non_equilibrium":
        return (f"non_equilibrium: {100 * stochastic_fraction:.0f} % of draws fail the stochastic-"
                f"heating check for {grain!r}, so T_eq does not apply; {r}")
    if flag == "extra_heating":
        where = f" ({extra_lum:.3g} L_sun)" if extra_lum is not None and np.isfinite(extra_lum) else ""
        return (f"extra_heating: {r}, P(T_fit > T_eq) {_pfmt(p_warmer, n)}; needs {extra_solar:.3g} "
                f"L_sun/M_sun{where} beyond the modelled field{tail}")
    if flag == "shielded":
        what = "the field without the projected star" if bounded else "the modelled field"
        return (f"shielded: {r}, P(T_fit < T_eq) {_pfmt(1 - p_warmer, n)}; colder than {what} allows "
                f"(an attenuated field?){tail}")
    if flag == "unconstrained" and untrusted:
        return (f"unconstrained: the fit's posterior is set by its prior ({', '.join(untrusted)}), "
                f"so the data cannot decide; {r}{tail}")
    if flag == "unconstrained":
        return (f"unconstrained: {r}, an interval wider than {th.max_ratio_width:g} times its median; "
                f"the data cannot decide{tail}")
    if bounded and 1 - p_warmer > th.p_decide:
        return (f"consistent: {r}, P(T_fit < T_eq) {_pfmt(1 - p_warmer, n)}, but T_eq is an upper bound "
                "(projected star distance): colder than the bound is expected for a star farther away "
                "and cannot show shielding")
    return f"consistent: {r}, P(T_fit > T_eq) {_pfmt(p_warmer, n)}; the modelled field explains T_fit{tail}"


def catalogue_counts(ratio_draws: ArrayLike, *, thresholds: Thresholds | Mapping[str, float] | None = None,
                     interval: float = 0.68) -> dict:
    """How many sources are warmer / colder than equilibrium, with an interval over catalogue draws.

    Parameters
    ----------
    ratio_draws : ndarray (n_sources, n_draws)
        T_fit / T_eq per draw (``compare_chunk(..., keep_draws=True)["draws_ratio"]``).
        Column j is one draw of the whole catalogue: with shared field
        uncertainties every source's draw j used the same shared factor.
    thresholds : Thresholds or mapping, keyword-only
        A draw counts as heated when its ratio > ``ratio_high``, shielded
        when < ``ratio_low``.
    interval : float, keyword-only
        Central probability of the interval (default 0.68).

    Returns
    -------
    dict
        ``{"extra_heating": (median, low, high), "shielded": (...)}``, counts
        of sources (floats: quantiles over draws).

    Examples
    --------
    >>> r = np.array([[1.5, 1.6, 0.8], [1.2, 1.3, 1.25]])
    >>> catalogue_counts(r)["extra_heating"][0]
    2.0
    """
    th = Thresholds.from_any(thresholds)
    r = np.asarray(ratio_draws, float)
    lo, hi = (1 - interval) / 2, (1 + interval) / 2
    out = {}
    for name, per_draw in (("extra_heating", np.sum(r > th.ratio_high, axis=0)),
                           ("shielded", np.sum(r < th.ratio_low, axis=0))):
        q = np.quantile(per_draw, [0.5, lo, hi])
        out[name] = tuple(float(v) for v in q)
    return out
