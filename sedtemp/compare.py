"""Comparison stage: the fitted dust temperature against the radiative-equilibrium prediction.

For every posterior draw i of a fit, (T_i, beta_i) (and the dust mass M_i if
the fit has one), the modelled field is drawn from its own uncertainty
(:class:`ScaleUncertainty`, :class:`DistanceUncertainty`,
:class:`ProjectedDistance`, one object per field component) and the
equilibrium temperature is computed with that draw's beta:

    P_abs,i = sum_c s_ci 4 pi int kappa_nu(beta_i) J_c,nu dnu,
    T_eq,i  : 4 pi int kappa_nu(beta_i) B_nu(T_eq,i) dnu = P_abs,i,

where s_ci is the draw's factor on component c. Absorbed power is linear in
the field, so each component's power is computed once for all draws and only
rescaled. From the pairs (T_i, T_eq,i) come P(T_fit > T_eq), the ratio
T_fit / T_eq, the field scale and ISRF strength U that would explain T_fit,
and the power beyond the modelled field, P_extra = P_emit(T_fit) - P_abs,
per unit mass and (times M_i) as a luminosity. A :class:`Comparison` holds
the draws, a flag from :data:`FLAGS` and a one-line verdict;
:func:`compare_table` runs the comparison for every row of a fit-results
table.
"""

from __future__ import annotations

import numbers
import zlib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, fields

import astropy.units as u
import numpy as np
from astropy.table import Table
from scipy.interpolate import CubicSpline
from scipy.stats import truncnorm

from ._units import to_kelvin, to_si
from .equilibrium import absorbed_power, emitted_power, stochastic_heating_check, temperature_for_power
from .errors import InputError
from .fit.summary import QUANTILES
from .opacity import PowerLawOpacity
from .radiation import ISRF, AttenuatedField, RadiationField, ScaledField, Star

__all__ = [
    "FLAGS",
    "UNTRUSTED_FIT_FLAGS",
    "W_PER_KG_IN_LSUN_PER_MSUN",
    "Thresholds",
    "FieldUncertainty",
    "ScaleUncertainty",
    "DistanceUncertainty",
    "ProjectedDistance",
    "Comparison",
    "compare",
    "compare_draws",
    "compare_table",
    "row_seed",
]

#: The comparison flags, in the order they are tested (see :class:`Thresholds`).
FLAGS = ("non_equilibrium", "extra_heating", "shielded", "unconstrained", "consistent")
#: 1 W kg^-1 expressed in L_sun / M_sun (IAU 2015 nominal L_sun and M_sun, via astropy).
W_PER_KG_IN_LSUN_PER_MSUN = float((u.W / u.kg).to(u.L_sun / u.solMass))
_W_PER_KG = u.W / u.kg
# Emission tables (opacities without an analytic emitted power): node spacings
# in ln T and beta; a cubic spline in ln T and 4-point Lagrange interpolation in
# beta of ln P are accurate to < 1e-6 (tests/test_compare.py checks it).
_EMIT_DLNT = 0.05
_EMIT_DBETA = 0.1
_EMIT_DIRECT_MAX = 512  # up to this many draws, emitted power is integrated directly
#: Fit trust flags (sedtemp.fit.summary) meaning the data do not bound T, or T is
#: cut by a prior edge (directly, or through the T-beta degeneracy when beta
#: piles on its edge): the posterior's position is then set by the prior.
#: 'beta_prior_dominated' alone is not here: a broad beta posterior is carried
#: through (T_eq is computed with each draw's beta), and cold cores with only
#: long-wavelength bands typically have a well-bounded T but a broad beta.
UNTRUSTED_FIT_FLAGS = ("T_at_prior_low", "T_at_prior_high", "T_prior_dominated",
                       "beta_at_prior_low", "beta_at_prior_high")


# ------------------------------------------------------------------ thresholds
@dataclass(frozen=True)
class Thresholds:
    """Decision thresholds of the comparison flags, with their defaults.

    Parameters
    ----------
    p_decide : float
        Posterior probability needed for ``extra_heating`` (P(T_fit > T_eq))
        or ``shielded`` (P(T_fit < T_eq)). Default 0.99.
    ratio_high : float
        ``extra_heating`` also needs the median of T_fit / T_eq above this
        (default 1.1: a 10 % excess; smaller ones are within the systematics
        of the opacity and field models).
    ratio_low : float
        ``shielded`` also needs the median ratio below this (default 0.9).
    max_ratio_width : float
        ``unconstrained`` when the 16-84 % interval of the ratio, divided by
        its median, is wider than this (default 0.5: the ratio is not known
        to +-25 %) and neither of the above holds.
    p_stochastic : float
        With a ``grain``, ``non_equilibrium`` when at least this fraction of
        the draws fails the stochastic-heating check (default 0.5).

    Raises
    ------
    InputError
        A value outside its range (0.5 <= p_decide < 1, ratio_high >= 1,
        0 < ratio_low <= 1, max_ratio_width > 0, 0 < p_stochastic <= 1).
    """

    p_decide: float = 0.99
    ratio_high: float = 1.1
    ratio_low: float = 0.9
    max_ratio_width: float = 0.5
    p_stochastic: float = 0.5

    def __post_init__(self):
        checks = {"p_decide": 0.5 <= self.p_decide < 1.0, "ratio_high": self.ratio_high >= 1.0,
                  "ratio_low": 0.0 < self.ratio_low <= 1.0, "max_ratio_width": self.max_ratio_width > 0.0,
                  "p_stochastic": 0.0 < self.p_stochastic <= 1.0}
        for name, ok in checks.items():
            if not ok:
                raise InputError(f"Thresholds: {name} = {getattr(self, name)!r} is out of range "
                                 "(0.5 <= p_decide < 1, ratio_high >= 1, 0 < ratio_low <= 1, "
                                 "max_ratio_width > 0, 0 < p_stochastic <= 1)")

    @classmethod
    def from_any(cls, value) -> Thresholds:
        """``None`` (defaults), a :class:`Thresholds`, or a mapping of some of its fields."""
        if value is None:
            return cls()
        if isinstance(value, cls):
            return value
        if isinstance(value, Mapping):
            known = {f.name for f in fields(cls)}
            unknown = sorted(set(value) - known)
            if unknown:
                raise InputError(f"thresholds: unknown key(s) {unknown}; valid keys are {sorted(known)}")
            try:
                numbers_ = {k: float(v) for k, v in value.items()}
            except (TypeError, ValueError) as err:
                raise InputError(f"thresholds: every value must be a number, got {dict(value)!r}") from err
            return cls(**numbers_)
        raise InputError(f"thresholds must be None, a Thresholds or a mapping, got {type(value).__name__}")


# ---------------------------------------------------------- field uncertainty
def _base(component):
    """The field under any attenuation or scaling wrappers (a Star stays a Star)."""
    while isinstance(component, (AttenuatedField, ScaledField)):
        component = component.field
    return component


def _star_of(component, who):
    star = _base(component)
    if not isinstance(star, Star):
        raise InputError(f"{who} applies to a Star component (a star-dust distance), "
                         f"not to {component!r}; key it by the star's index or object")
    return star


def _distance_ratio(rng, n, fraction, r_min):
    """d / d0 ~ Normal(1, fraction) truncated to d / d0 > r_min."""
    if fraction == 0:
        return np.ones(n)
    lo = (r_min * (1.0 + 1e-9) - 1.0) / fraction
    return 1.0 + fraction * truncnorm.rvs(lo, np.inf, size=n, random_state=rng)


class FieldUncertainty:
    """Base class: random factors multiplying one field component's absorbed power.

    Subclasses implement :meth:`factors`. ``bounds_T_eq`` is True when the
    component's nominal parameters make T_eq only an upper bound.
    """

    bounds_T_eq = False

    def factors(self, component, n, rng):  # pragma: no cover - abstract
        """``n`` factors (ndarray) for ``component`` (``None``: the whole field)."""
        raise NotImplementedError

    def check(self, component):
        """Raise :class:`InputError` if this uncertainty cannot apply to ``component``."""


class ScaleUncertainty(FieldUncertainty):
    """A field scale known to a factor: log-normal, ln s ~ Normal(0, ln factor).

    Parameters
    ----------
    factor : float
        The 1-sigma multiplicative uncertainty (> 1; e.g. 2: the scale is
        within [1/2, 2] of its nominal value at 68 %). 1 means no spread.

    Notes
    -----
    The median factor is 1, so the nominal field is the median field.
    """

    def __init__(self, factor):
        self.factor = float(factor)
        if not (np.isfinite(self.factor) and self.factor >= 1.0):
            raise InputError(f"ScaleUncertainty: factor must be a number >= 1 (e.g. 2 for 'known to a "
                             f"factor of 2'), got {factor!r}")

    def factors(self, component, n, rng):
        return np.exp(np.log(self.factor) * rng.standard_normal(n))

    def __repr__(self):
        return f"ScaleUncertainty(factor={self.factor:g})"


class DistanceUncertainty(FieldUncertainty):
    """A star-dust distance known to a fraction (Gaussian, truncated outside the star).

    Parameters
    ----------
    fraction : float
        1-sigma fractional error of the star's distance (>= 0; 0.2 for 20 %).

    Notes
    -----
    d = d0 (1 + fraction z), z ~ Normal(0, 1) truncated to d > R_star; the
    factor is the exact ratio of dilution factors W(d) / W(d0) ~ (d0 / d)^2.
    """

    def __init__(self, fraction):
        self.fraction = float(fraction)
        if not (np.isfinite(self.fraction) and self.fraction >= 0):
            raise InputError(f"DistanceUncertainty: fraction must be a number >= 0 (0.2 for 20 %), "
                             f"got {fraction!r}")

    def check(self, component):
        _star_of(component, "DistanceUncertainty")

    def factors(self, component, n, rng):
        star = _star_of(component, "DistanceUncertainty")
        r = _distance_ratio(rng, n, self.fraction, star.radius_m / star.distance_m)
        return star.dilution_at(r * star.distance_m * u.m) / star.dilution

    def __repr__(self):
        return f"DistanceUncertainty(fraction={self.fraction:g})"


class ProjectedDistance(FieldUncertainty):
    """A star's distance that is only a projected separation: T_eq becomes an upper bound.

    Parameters
    ----------
    fraction : float, optional
        1-sigma fractional error of the projected separation itself (default 0).
    isotropic : bool, keyword-only
        False (default): the draws use the projected separation, so every
        T_eq draw is the upper bound. True: the true distance is drawn as
        r = r_proj / sin i with an isotropic orientation (cos i uniform on
        [0, 1)), a prior under which the draws are a distribution below the bound.

    Notes
    -----
    In either case the comparison treats T_eq as an upper bound: ``shielded``
    is decided against the field *without* this component (the star at
    infinite distance), never against the bound (see :func:`compare_draws`).
    For isotropic orientations the factor sin^2 i has mean 2/3.
    """

    bounds_T_eq = True

    def __init__(self, fraction=0.0, *, isotropic=False):
        self.fraction = float(fraction)
        if not (np.isfinite(self.fraction) and self.fraction >= 0):
            raise InputError(f"ProjectedDistance: fraction must be a number >= 0, got {fraction!r}")
        self.isotropic = bool(isotropic)

    def check(self, component):
        _star_of(component, "ProjectedDistance")

    def factors(self, component, n, rng):
        star = _star_of(component, "ProjectedDistance")
        r = _distance_ratio(rng, n, self.fraction, star.radius_m / star.distance_m)
        if self.isotropic:
            cos_i = rng.uniform(size=n)  # in [0, 1): sin i > 0, so r stays finite
            r = r / np.sqrt(1.0 - cos_i**2)
        return star.dilution_at(r * star.distance_m * u.m) / star.dilution

    def __repr__(self):
        return f"ProjectedDistance(fraction={self.fraction:g}, isotropic={self.isotropic})"


def _component_index(key, comps):
    if isinstance(key, numbers.Integral) and not isinstance(key, bool):
        if not 0 <= key < len(comps):
            raise InputError(f"field_uncertainty: component index {key} is out of range for a field "
                             f"of {len(comps)} component(s): {comps}")
        return int(key)
    if isinstance(key, RadiationField):
        for i, c in enumerate(comps):
            inner = c
            while True:
                if inner is key:
                    return i
                if not isinstance(inner, (AttenuatedField, ScaledField)):
                    break
                inner = inner.field
        raise InputError(f"field_uncertainty: {key!r} is not a component of the field {comps}")
    raise InputError(f"field_uncertainty keys must be component indices or component objects, got {key!r}")


def _resolve_uncertainty(spec, field, projected):
    """Normalise ``field_uncertainty`` and ``projected`` to [(component indices, uncertainty)]."""
    comps = field.components
    every = tuple(range(len(comps)))
    entries = []
    if spec is None:
        pass
    elif isinstance(spec, numbers.Real) and not isinstance(spec, bool):
        if not (np.isfinite(spec) and spec >= 0):
            raise InputError(f"field_uncertainty: a number is the fractional 1-sigma of the field "
                             f"strength and must be >= 0, got {spec!r}")
        if spec > 0:
            entries.append((every, ScaleUncertainty(1.0 + float(spec))))
    elif isinstance(spec, FieldUncertainty):
        if isinstance(spec, ScaleUncertainty):
            entries.append((every, spec))
        elif len(comps) == 1:
            entries.append(((0,), spec))
        else:
            raise InputError(f"field_uncertainty: {spec!r} applies to one component of a field of "
                             f"{len(comps)}; pass a mapping such as {{1: {spec!r}}}")
    elif isinstance(spec, Mapping):
        for key, val in spec.items():
            i = _component_index(key, comps)
            for unc in (val if isinstance(val, (tuple, list)) else (val,)):
                if not isinstance(unc, FieldUncertainty):
                    raise InputError(f"field_uncertainty[{key!r}]: {unc!r} is not a FieldUncertainty "
                                     "(use ScaleUncertainty, DistanceUncertainty or ProjectedDistance)")
                entries.append(((i,), unc))
    else:
        raise InputError(f"field_uncertainty must be None, a number, a FieldUncertainty or a mapping "
                         f"component -> uncertainty, got {type(spec).__name__}")
    if projected:
        stars = [i for i, c in enumerate(comps) if isinstance(_base(c), Star)]
        if not stars:
            raise InputError(f"projected=True but the field {comps} has no Star component; projected "
                             "distances apply to stars")
        done = {idx[0] for idx, unc in entries if unc.bounds_T_eq}
        entries.extend(((i,), ProjectedDistance()) for i in stars if i not in done)
    for idx, unc in entries:
        if len(idx) == 1:
            unc.check(comps[idx[0]])
    return entries


def _draw_factors(entries, comps, n, rng):
    """Per-draw factors (n, n_components) and which components only bound T_eq."""
    f = np.ones((n, len(comps)))
    bounded = np.zeros(len(comps), bool)
    for idx, unc in entries:
        if len(idx) == 1:
            f[:, idx[0]] *= unc.factors(comps[idx[0]], n, rng)
        else:
            f[:, list(idx)] *= unc.factors(None, n, rng)[:, None]
        if unc.bounds_T_eq:
            bounded[list(idx)] = True
    return f, bounded


# ------------------------------------------------------------------ physics
def _emitted(t, b, opacity):
    """4 pi int kappa(beta_i) B_nu(T_i) dnu per draw (W/kg); exact or a cubic table in (ln T, beta)."""
    if type(opacity) is PowerLawOpacity or t.size <= _EMIT_DIRECT_MAX:
        return emitted_power(t, opacity, beta=b)
    lnt = np.log(t)
    lo, hi = lnt.min() - _EMIT_DLNT, lnt.max() + _EMIT_DLNT
    t_nodes = np.exp(np.linspace(lo, hi, max(8, int(np.ceil((hi - lo) / _EMIT_DLNT)) + 1)))
    if np.all(b == b[0]):
        lnp = np.log(emitted_power(t_nodes, opacity, beta=b[0]))
        return np.exp(CubicSpline(np.log(t_nodes), lnp)(lnt))
    # nodes cover [min, max] of beta with a margin, >= 4 of them for the cubic
    width = max(b.max() - b.min() + _EMIT_DBETA, 3 * _EMIT_DBETA)
    nb = int(np.ceil(width / _EMIT_DBETA)) + 1
    b_nodes = 0.5 * (b.max() + b.min()) + np.linspace(-width / 2, width / 2, nb)
    # one direct integration per beta node (a few tens), not per draw
    lnp = np.stack([np.log(emitted_power(t_nodes, opacity, beta=bk)) for bk in b_nodes], axis=1)
    vals = CubicSpline(np.log(t_nodes), lnp, axis=0)(lnt)  # (n, nb): spline in ln T per node
    # then 4-point Lagrange in beta around each draw
    step = b_nodes[1] - b_nodes[0]
    j = np.clip(np.floor((b - b_nodes[0]) / step).astype(int) - 1, 0, nb - 4)
    x = (b - b_nodes[j]) / step
    w = ((1 - x) * (x - 2) * (x - 3) / 6, x * (x - 2) * (x - 3) / 2, x * (1 - x) * (x - 3) / 2,
         x * (x - 1) * (x - 2) / 6)
    rows = np.arange(b.size)
    return np.exp(sum(w[k] * vals[rows, j + k] for k in range(4)))


@dataclass
class _Source:
    """Draws of one source, ready for the shared computation."""

    T: np.ndarray
    beta: np.ndarray
    mass: np.ndarray | None
    factors: np.ndarray
    bounded: np.ndarray
    untrusted: tuple = ()


def _evaluate(field, opacity, sources, grain):
    """Draw-level quantities for sources sharing one field: a dict of flat arrays per source."""
    T = np.concatenate([s.T for s in sources])
    b = np.concatenate([s.beta for s in sources])
    fac = np.concatenate([s.factors for s in sources])
    bounded = np.concatenate([np.broadcast_to(s.bounded, s.factors.shape) for s in sources])
    p_comp = absorbed_power(field, opacity, beta=b, per_component=True)  # (n, n_comp)
    if not np.all(p_comp.sum(axis=-1) > 0):
        raise InputError(f"compare: the field {field!r} supplies no absorbed power; check the field "
                         "and the opacity")
    p_abs = np.sum(p_comp * fac, axis=-1)
    out = {"T_eq": temperature_for_power(p_abs, opacity, beta=b), "p_abs": p_abs}
    p_emit = _emitted(T, b, opacity)
    out["p_emit"] = p_emit
    out["U_implied"] = p_emit / absorbed_power(ISRF(1.0), opacity, beta=b)
    if bounded.any():
        p_floor = np.sum(p_comp * fac * ~bounded, axis=-1)
        out["T_floor"] = temperature_for_power(p_floor, opacity, beta=b)
    if grain is not None:
        chk = stochastic_heating_check(field, opacity, grain, scale=p_abs / p_comp.sum(axis=-1), beta=b)
        out["stochastic"] = np.asarray(chk.stochastic, bool)
    edges = np.cumsum([0] + [s.T.size for s in sources])
    return [{k: v[lo:hi] for k, v in out.items()} for lo, hi in zip(edges[:-1], edges[1:])]


# ----------------------------------------------------------------- the result
def _q(x):
    return np.quantile(x, [QUANTILES[k] for k in QUANTILES])


@dataclass(frozen=True, eq=False, repr=False)
class Comparison:
    """Fitted against predicted temperature of one source: draws, flag and verdict.

    Attributes
    ----------
    flag : str
        One of :data:`FLAGS` (see :class:`Thresholds` and the README).
    verdict : str
        One line for people.
    p_warmer : float
        P(T_fit > T_eq) over the draws (equal to P(extra power > 0)).
    T_fit, T_eq : Quantity (n_draws,), K
        The fitted dust temperature and the equilibrium temperature of the
        modelled field, drawn with the same beta.
    beta : ndarray (n_draws,)
    ratio : ndarray (n_draws,)
        T_fit / T_eq.
    U_implied : ndarray (n_draws,)
        Strength U of the Mathis et al. (1983) ISRF that alone would heat the
        dust to T_fit.
    field_scale : ndarray (n_draws,)
        Factor on the (drawn) modelled field that would heat the dust to
        T_fit, P_emit(T_fit) / P_abs (1: the field explains T_fit).
    extra_power_per_mass : Quantity (n_draws,), W / kg
        P_emit(T_fit) - P_abs: positive, the power per unit mass an internal
        source must add; negative, the field supplies more than the dust
        radiates. Per the opacity's mass (``opacity_per``).
    extra_luminosity : Quantity (n_draws,), L_sun, or None
        extra_power_per_mass times the mass draws (None without masses).
    T_eq_is_upper_bound : bool
        The field has a projected star distance: T_eq is an upper bound.
    T_eq_floor : Quantity (n_draws,), K, or None
        With an upper bound: T_eq of the field without the projected
        component(s), the lowest any true distance allows.
    stochastic_fraction : float
        Fraction of draws failing the stochastic-heating check (NaN without a grain).
    thresholds : Thresholds
    opacity_per : str
        "dust" or "gas": the mass the per-mass power refers to.
    """

    flag: str
    verdict: str
    p_warmer: float
    T_fit: u.Quantity
    T_eq: u.Quantity
    beta: np.ndarray
    ratio: np.ndarray
    U_implied: np.ndarray
    field_scale: np.ndarray
    extra_power_per_mass: u.Quantity
    extra_luminosity: u.Quantity | None
    T_eq_is_upper_bound: bool
    T_eq_floor: u.Quantity | None
    stochastic_fraction: float
    thresholds: Thresholds
    opacity_per: str

    @property
    def extra_power_solar(self) -> u.Quantity:
        """extra_power_per_mass in L_sun / M_sun."""
        return self.extra_power_per_mass.to(u.L_sun / u.solMass)

    def columns(self) -> dict:
        """Flat result columns (floats, bools and strings) for a results table.

        For each of ``T_eq`` (K), ``ratio`` (T_fit / T_eq), ``U_implied``
        (ISRF U), ``field_scale`` (factor on the modelled field),
        ``extra_power`` (W kg^-1, per the opacity's mass),
        ``extra_power_solar`` (L_sun / M_sun) and ``extra_luminosity``
        (L_sun; NaN without masses) the quantiles ``_p2_5``, ``_p16``,
        ``_median``, ``_p84``, ``_p97_5``; then ``p_warmer``,
        ``stochastic_fraction``, ``T_eq_is_upper_bound``, ``flag``, ``verdict``.
        """
        draws = {"T_eq": self.T_eq.to_value(u.K), "ratio": self.ratio, "U_implied": self.U_implied,
                 "field_scale": self.field_scale,
                 "extra_power": self.extra_power_per_mass.to_value(_W_PER_KG),
                 "extra_power_solar": self.extra_power_solar.value,
                 "extra_luminosity": (None if self.extra_luminosity is None
                                      else self.extra_luminosity.to_value(u.L_sun))}
        out = {}
        for name, x in draws.items():
            q = _q(x) if x is not None else np.full(len(QUANTILES), np.nan)
            out.update({f"{name}_{k}": float(v) for k, v in zip(QUANTILES, q)})
        out.update(p_warmer=float(self.p_warmer), stochastic_fraction=float(self.stochastic_fraction),
                   T_eq_is_upper_bound=bool(self.T_eq_is_upper_bound), flag=self.flag, verdict=self.verdict)
        return out

    def __repr__(self):
        return f"<Comparison {self.flag}: {self.verdict}>"


def _classify(ratio, ratio_floor, stochastic_fraction, untrusted, th):
    """The flag from the ratio draws (and the floor ratio when T_eq is a bound)."""
    if np.isfinite(stochastic_fraction) and stochastic_fraction >= th.p_stochastic:
        return "non_equilibrium"
    if untrusted:
        return "unconstrained"
    # "median ratio above x" written as "more than half the draws above x" (robust to inf)
    if np.mean(ratio > 1.0) > th.p_decide and np.mean(ratio > th.ratio_high) > 0.5:
        return "extra_heating"
    colder = ratio if ratio_floor is None else ratio_floor
    if np.mean(colder < 1.0) > th.p_decide and np.mean(colder < th.ratio_low) > 0.5:
        return "shielded"
    q16, q50, q84 = np.quantile(ratio, [0.16, 0.5, 0.84])
    if q84 - q16 > th.max_ratio_width * q50:
        return "unconstrained"
    return "consistent"


def _pfmt(p, n):
    """A probability from n draws; 0 and 1 are written as bounds (< 1/n, > 1 - 1/n)."""
    if p >= 1.0:
        return f"> {1 - 1 / n:.3f}"
    if p <= 0.0:
        return f"< {1 / n:.3f}"
    return f"= {p:.3f}"


def _verdict(flag, c):
    """One line: flag, ratio and its 68 % interval, the probability, and what it means."""
    q16, q50, q84 = np.quantile(c["ratio"], [0.16, 0.5, 0.84])
    r = f"T_fit/T_eq = {q50:.2f} [{q16:.2f}, {q84:.2f}] (68 %)"
    pw, n = c["p_warmer"], c["ratio"].size
    th = c["thresholds"]
    bound = c["bounded"]
    tail = "; T_eq is an upper bound (projected star distance)" if bound else ""
    if flag == "non_equilibrium":
        return (f"non_equilibrium: {100 * c['stochastic_fraction']:.0f} % of draws fail the stochastic-"
                f"heating check for {c['grain']!r}, so T_eq does not apply; {r}")
    if flag == "extra_heating":
        e = np.median(c["extra_solar"])
        lum = c["extra_lum"]
        where = f" ({np.median(lum):.3g} L_sun)" if lum is not None else ""
        return (f"extra_heating: {r}, P(T_fit > T_eq) {_pfmt(pw, n)}; needs {e:.3g} L_sun/M_sun{where} "
                f"beyond the modelled field{tail}")
    if flag == "shielded":
        what = "the field without the projected star" if bound else "the modelled field"
        return (f"shielded: {r}, P(T_fit < T_eq) {_pfmt(1 - pw, n)}; colder than {what} allows "
                f"(an attenuated field?){tail}")
    if flag == "unconstrained" and c["untrusted"]:
        return (f"unconstrained: the fit's posterior is set by its prior ({', '.join(c['untrusted'])}), "
                f"so the data cannot decide; {r}{tail}")
    if flag == "unconstrained":
        return (f"unconstrained: {r}, an interval wider than {th.max_ratio_width:g} times its median; "
                f"the data cannot decide{tail}")
    if bound and 1 - pw > th.p_decide:
        return (f"consistent: {r}, P(T_fit < T_eq) {_pfmt(1 - pw, n)}, but T_eq is an upper bound (projected "
                "star distance): colder than the bound is expected for a star farther away and "
                "cannot show shielding")
    return f"consistent: {r}, P(T_fit > T_eq) {_pfmt(pw, n)}; the modelled field explains T_fit{tail}"


def _untrusted(fit_flags):
    """The fit flags (sequence or comma-separated string) that make the posterior prior-set."""
    if fit_flags is None:
        return ()
    items = fit_flags.split(",") if isinstance(fit_flags, str) else list(fit_flags)
    return tuple(f.strip() for f in items if f.strip() in UNTRUSTED_FIT_FLAGS)


def _build(src, d, bounded, th, grain, opacity):
    """A Comparison from one source's draws and evaluated quantities."""
    T, T_eq = src.T, d["T_eq"]
    ratio = T / T_eq
    ratio_floor = None
    if bounded:
        with np.errstate(divide="ignore"):
            ratio_floor = np.where(d["T_floor"] > 0, T / np.where(d["T_floor"] > 0, d["T_floor"], 1.0), np.inf)
    frac = float(np.mean(d["stochastic"])) if "stochastic" in d else float("nan")
    extra = d["p_emit"] - d["p_abs"]
    lum = None if src.mass is None else (extra * _W_PER_KG * src.mass * u.solMass).to(u.L_sun)
    flag = _classify(ratio, ratio_floor, frac, src.untrusted, th)
    info = {"ratio": ratio, "p_warmer": float(np.mean(T > T_eq)), "thresholds": th, "bounded": bounded,
            "untrusted": src.untrusted,
            "stochastic_fraction": frac, "grain": grain, "extra_solar": extra * W_PER_KG_IN_LSUN_PER_MSUN,
            "extra_lum": None if lum is None else lum.value}
    return Comparison(
        flag=flag, verdict=_verdict(flag, info), p_warmer=info["p_warmer"], T_fit=T * u.K, T_eq=T_eq * u.K,
        beta=src.beta, ratio=ratio, U_implied=d["U_implied"], field_scale=d["p_emit"] / d["p_abs"],
        extra_power_per_mass=extra * _W_PER_KG, extra_luminosity=lum, T_eq_is_upper_bound=bounded,
        T_eq_floor=d["T_floor"] * u.K if bounded else None, stochastic_fraction=frac, thresholds=th,
        opacity_per=opacity.per)


# ---------------------------------------------------------------- public API
def _prepare_draws(T_draws, beta_draws, mass_draws, opacity):
    """Validated 1-D SI arrays (K, -, solMass) from the user's draws."""
    t = np.atleast_1d(np.asarray(to_kelvin(T_draws, name="T_draws"), float))
    if t.ndim != 1 or t.size < 2 or not np.all(np.isfinite(t) & (t > 0)):
        raise InputError(f"compare: T_draws must be a 1-D array of >= 2 finite, positive temperatures (K); "
                         f"got shape {t.shape}")
    b = np.asarray(opacity.beta if beta_draws is None else beta_draws, float)
    if b.ndim == 0:
        b = np.full(t.size, float(b))
    if b.shape != t.shape or not np.all(np.isfinite(b)):
        raise InputError(f"compare: beta_draws must be a scalar or a finite array shaped like T_draws "
                         f"{t.shape}; got shape {b.shape}")
    m = None
    if mass_draws is not None:
        m = np.atleast_1d(np.asarray(to_si(mass_draws, u.solMass, name="mass_draws"), float))
        if m.shape != t.shape or not np.all(np.isfinite(m) & (m > 0)):
            raise InputError(f"compare: mass_draws must be finite, positive masses (solMass) shaped like "
                             f"T_draws {t.shape}; got shape {m.shape}")
    return t, b, m


def _check_field(field, opacity):
    if not isinstance(field, RadiationField):
        raise InputError(f"compare: field must be a sedtemp.radiation field, got {type(field).__name__}")
    if not hasattr(opacity, "kappa_si"):
        raise InputError(f"compare: opacity must be a sedtemp.opacity.Opacity, got {type(opacity).__name__}")


def compare_draws(T_draws, beta_draws, field, opacity, *, mass_draws=None, field_uncertainty=None,
                  projected=False, thresholds=None, grain=None, fit_flags=None, seed=None) -> Comparison:
    """Compare posterior draws of (T, beta) with the equilibrium temperature of a modelled field.

    Parameters
    ----------
    T_draws : Quantity or array_like, shape (n_draws,)
        Posterior draws of the dust temperature (bare numbers in K); at
        z > 0 the CMB-heated temperature, to compare with a field that
        contains ``CMB(z)``.
    beta_draws : array_like (n_draws,), float or None
        The matching emissivity-index draws; a number for a fixed-beta fit;
        None: the opacity's own beta.
    field : RadiationField
        The modelled heating field (sums keep their ``components``).
    opacity : Opacity
        The opacity the fit used (its slope is replaced by each draw's beta).
    mass_draws : Quantity or array_like (n_draws,), optional, keyword-only
        Mass draws (bare numbers in solMass): dust mass for an opacity per
        dust mass, gas mass for one per gas mass. Gives ``extra_luminosity``.
    field_uncertainty : keyword-only
        None; a number x (the fractional 1-sigma of the whole field's
        strength: ``ScaleUncertainty(1 + x)`` shared by all components); a
        :class:`FieldUncertainty` (a :class:`ScaleUncertainty` applies to the
        whole field, others need a one-component field); or a mapping from a
        component (its index in ``field.components`` or the component object)
        to one uncertainty or a tuple of them (their factors multiply).
    projected : bool, keyword-only
        The star distances are projected separations: every Star component
        without one gets ``ProjectedDistance()``.
    thresholds : Thresholds or mapping, keyword-only
        Flag thresholds (default :class:`Thresholds()`).
    grain : Grain, optional, keyword-only
        Run the stochastic-heating check of :func:`sedtemp.equilibrium.stochastic_heating_check`
        for this grain in each draw's field (flag ``non_equilibrium``).
    fit_flags : sequence of str or str, optional, keyword-only
        The fit's trust flags (``FitResult.flags``, or the comma-separated
        ``flags`` column of a results table). Any of
        :data:`UNTRUSTED_FIT_FLAGS` makes the result ``unconstrained``.
    seed : int, SeedSequence or Generator, optional, keyword-only
        For the field-uncertainty draws.

    Returns
    -------
    Comparison

    Raises
    ------
    InputError
        Bad draws, field, opacity, uncertainty specification or thresholds.

    Notes
    -----
    Flags, tested in this order (defaults in :class:`Thresholds`):

    - ``non_equilibrium``: with ``grain``, >= p_stochastic of the draws fail
      the stochastic-heating check.
    - ``unconstrained``: the fit carries a flag of :data:`UNTRUSTED_FIT_FLAGS`
      (T or beta piled on a prior edge, or prior-dominated): the posterior's
      position is then set by the prior (e.g. a uniform prior in the linear
      mass favours cold, massive solutions), not by the data.
    - ``extra_heating``: P(T_fit > T_eq) > p_decide and median ratio > ratio_high.
    - ``shielded``: P(T_fit < T_eq) > p_decide and median ratio < ratio_low.
      When T_eq is an upper bound (projected distance), T_eq is replaced here
      by the T_eq of the field without the projected star(s): a source colder
      than the bound alone is ``consistent`` and the verdict says why.
    - ``unconstrained``: the 16-84 % interval of the ratio is wider than
      max_ratio_width times its median.
    - ``consistent`` otherwise.

    The extra power is P_extra = 4 pi int kappa B_nu(T_fit) dnu - P_abs per
    unit (dust or gas) mass; P_extra > 0 exactly when T_fit > T_eq.
    """
    _check_field(field, opacity)
    th = Thresholds.from_any(thresholds)
    t, b, m = _prepare_draws(T_draws, beta_draws, mass_draws, opacity)
    entries = _resolve_uncertainty(field_uncertainty, field, projected)
    fac, bounded = _draw_factors(entries, field.components, t.size, np.random.default_rng(seed))
    src = _Source(t, b, m, fac, bounded, _untrusted(fit_flags))
    (d,) = _evaluate(field, opacity, [src], grain)
    return _build(src, d, bool(bounded.any()), th, grain, opacity)


def compare(fit_result, field, opacity=None, *, field_uncertainty=None, projected=False,
            thresholds=None, grain=None, seed=None) -> Comparison:
    """Compare a fit's posterior with the equilibrium temperature of a modelled field.

    Parameters
    ----------
    fit_result : FitResult
        From :func:`sedtemp.fit.fit_source`: ``samples["T"]`` (K), ``"beta"``
        if free, and ``"log10_mass"`` (solMass) for a mass amplitude.
    field : RadiationField
    opacity : Opacity, optional
        Default the fit model's ``opacity``, with each draw's beta.
    field_uncertainty, projected, thresholds, grain, seed : keyword-only
        As in :func:`compare_draws`.

    Returns
    -------
    Comparison

    Raises
    ------
    InputError
        No ``T`` draws, no opacity, or as :func:`compare_draws`.

    Notes
    -----
    A model with CMB heating on (z > 0) contributes its CMB-heated dust
    temperature (``model.dust_temperature``); include ``CMB(z)`` in ``field``.
    A fixed-beta model contributes its fixed beta. The fit's ``flags`` are
    passed on as ``fit_flags``.

    Examples
    --------
    >>> comp = compare(fit, ISRF(3.0) + Star(2e4, 1e4, distance=1.0))  # doctest: +SKIP
    >>> comp.flag, comp.p_warmer, comp.verdict  # doctest: +SKIP
    """
    samples = getattr(fit_result, "samples", None)
    if not isinstance(samples, Mapping) or "T" not in samples:
        raise InputError("compare: fit_result must be a FitResult with posterior samples of 'T'; "
                         "for bare draws use compare_draws")
    model = getattr(fit_result, "model", None)
    opacity = getattr(model, "opacity", None) if opacity is None else opacity
    if opacity is None:
        raise InputError(f"compare: the fit model {type(model).__name__} has no opacity; pass opacity=")
    T = np.asarray(samples["T"], float)
    if getattr(model, "cmb_heating", False):
        theta = np.column_stack([np.asarray(samples[p], float) for p in fit_result.param_names])
        T = model.dust_temperature(theta).to_value(u.K)
    beta = samples.get("beta", getattr(model, "beta", None))
    mass = None
    if getattr(model, "amplitude", None) == "mass" and "log10_mass" in samples:
        mass = 10.0 ** np.asarray(samples["log10_mass"], float)
    return compare_draws(T, beta, field, opacity, mass_draws=mass, field_uncertainty=field_uncertainty,
                         projected=projected, thresholds=thresholds, grain=grain,
                         fit_flags=getattr(fit_result, "flags", None), seed=seed)


# ---------------------------------------------------------------- catalogues
def row_seed(seed, key) -> np.random.SeedSequence:
    """Seed of one row in :func:`compare_table`: ``SeedSequence([seed, crc32(str(key))])``."""
    return np.random.SeedSequence([int(seed), zlib.crc32(str(key).encode("utf-8"))])


def _draws_of_row(draws, table, i, key):
    """(T, beta, mass) of row i, or a reason string when it has none."""
    if draws is None:
        cols = {"T": "draws_T", "beta": "draws_beta", "log10_mass": "draws_log10_mass"}
        d = {k: np.asarray(getattr(table[c][i], "value", table[c][i]), float)
             for k, c in cols.items() if c in table.colnames}
    elif "T" in draws and np.ndim(draws["T"]) == 2:
        d = {k: np.asarray(v)[i] for k, v in draws.items()}
    else:
        if key not in draws:
            return f"no posterior draws for id {key!r}"
        d = draws[key]
        if isinstance(d, (tuple, list)):
            d = dict(zip(("T", "beta", "mass"), d))
    T = d["T"]
    keep = np.isfinite(np.asarray(u.Quantity(T).value if isinstance(T, u.Quantity) else T, float))
    if not keep.any():
        return "no finite posterior draws of T"
    pick = (lambda v: None if v is None else (v if np.ndim(v) == 0 else v[keep]))
    beta = pick(d.get("beta"))
    if beta is not None and np.ndim(beta) and not np.all(np.isfinite(beta)):
        beta = None  # a fixed-beta fit stores NaN draws of beta
    mass = pick(d.get("mass"))
    if mass is None and d.get("log10_mass") is not None:
        mass = 10.0 ** np.asarray(pick(d["log10_mass"]), float)
    return T[keep], beta, mass


def _field_of_row(field, table, i):
    if isinstance(field, RadiationField):
        return field
    if callable(field):
        return field(table[i])
    if isinstance(field, Sequence) and len(field) == len(table):
        return field[i]
    raise InputError("compare_table: field must be a RadiationField, a callable row -> field, or a "
                     f"sequence of {len(table)} fields")


def compare_table(table: Table, field, opacity, *, draws=None, id_column="id", flags_column="flags",
                  field_uncertainty=None, projected=False, thresholds=None, grain=None,
                  seed=None) -> Table:
    """Run :func:`compare_draws` for every row of a fit-results table and add the columns.

    Parameters
    ----------
    table : astropy.table.Table
        One row per source (e.g. from :func:`sedtemp.fit.grid_posterior`).
    field : RadiationField, callable or sequence
        One field for all rows, a callable ``row -> field`` (per-source field
        parameters, e.g. ``lambda r: ISRF(r["U"]) + Star(2e4, 1e4, distance=r["d_pc"])``),
        or one field per row.
    opacity : Opacity
        The fit's opacity.
    draws : mapping, optional, keyword-only
        Posterior draws: a mapping ``id -> (T, beta[, mass])`` or ``id ->
        {"T": ..., "beta": ..., "mass" or "log10_mass": ...}`` (T in K, mass in
        solMass, beta None or a number for fixed-beta fits); or a mapping of
        2-D arrays (n_rows, n_draws) in row order with keys ``"T"``,
        ``"beta"``, ``"log10_mass"`` (what ``GridPosterior.summarise(...,
        keep_draws=True)`` returns). Default: the table's ``draws_T``,
        ``draws_beta``, ``draws_log10_mass`` columns (NaN-padded).
    id_column : str, keyword-only
        Column of source ids (default "id"; the row index if absent).
    flags_column : str or None, keyword-only
        Column of the fit's comma-separated trust flags, passed on as
        ``fit_flags`` (default "flags", used when present; None ignores it).
    field_uncertainty : keyword-only
        As in :func:`compare_draws`, or a callable ``row -> specification``.
    projected, thresholds, grain : keyword-only
        As in :func:`compare_draws`.
    seed : int, optional, keyword-only
        Row i draws its field uncertainty from :func:`row_seed` ``(seed, id)``,
        so a row's result does not depend on the other rows.

    Returns
    -------
    astropy.table.Table
        A copy of ``table`` with the columns of :meth:`Comparison.columns`
        (``T_eq_*`` in K, ``extra_power_*`` in W/kg, ``extra_power_solar_*``
        in L_sun/M_sun, ``extra_luminosity_*`` in L_sun). A row without draws,
        or whose own inputs are invalid, gets NaN, an empty ``flag`` and a
        verdict "not compared: <reason>".

    Raises
    ------
    InputError
        No draws at all, a field argument of the wrong kind, or an error that
        concerns every row (opacity, thresholds).

    Notes
    -----
    Rows that share one field object are evaluated together: the absorbed
    power of each component is computed once for all their draws.
    """
    th = Thresholds.from_any(thresholds)
    base = np.random.SeedSequence().entropy if seed is None else seed
    if draws is None and "draws_T" not in table.colnames:
        raise InputError("compare_table: no draws given and no 'draws_T' column; pass draws= or "
                         "fit with draws kept (e.g. pipeline.fit(..., n_keep=200))")
    ids = [k.item() if isinstance(k, np.generic) else k for k in table[id_column]] \
        if id_column in table.colnames else list(range(len(table)))
    groups, reasons = {}, {}
    for i, key in enumerate(ids):
        try:
            got = _draws_of_row(draws, table, i, key)
            if isinstance(got, str):
                reasons[i] = got
                continue
            fld = _field_of_row(field, table, i)
            _check_field(fld, opacity)
            t, b, m = _prepare_draws(*got, opacity)
            spec = field_uncertainty(table[i]) if callable(field_uncertainty) else field_uncertainty
            entries = _resolve_uncertainty(spec, fld, projected)
            fac, bounded = _draw_factors(entries, fld.components, t.size, np.random.default_rng(row_seed(base, key)))
        except InputError as err:  # this row's inputs: record the reason, go on
            reasons[i] = f"{type(err).__name__}: {err}"
            continue
        flags = table[flags_column][i] if flags_column in table.colnames else None
        groups.setdefault(id(fld), (fld, []))[1].append((i, _Source(t, b, m, fac, bounded, _untrusted(flags))))
    rows = {}
    for fld, members in groups.values():
        per = _evaluate(fld, opacity, [s for _, s in members], grain)
        for (i, src), d in zip(members, per):
            rows[i] = _build(src, d, bool(src.bounded.any()), th, grain, opacity).columns()
    return _with_columns(table, rows, reasons)


_UNITS = {"T_eq": u.K, "extra_power": _W_PER_KG, "extra_power_solar": u.L_sun / u.solMass,
          "extra_luminosity": u.L_sun}


def _quantity_of(name):
    """'T_eq_p2_5' -> 'T_eq': the drawn quantity a quantile column summarises."""
    for k in QUANTILES:
        if name.endswith("_" + k):
            return name[: -len(k) - 1]
    return name


def _with_columns(table, rows, reasons):
    out = Table(table, copy=True)
    if not rows:
        names = [f"{n}_{k}" for n in ("T_eq", "ratio", "U_implied", "field_scale", "extra_power",
                                       "extra_power_solar", "extra_luminosity") for k in QUANTILES]
        names += ["p_warmer", "stochastic_fraction", "T_eq_is_upper_bound", "flag", "verdict"]
    else:
        names = list(next(iter(rows.values())))
    for name in names:
        vals = [rows[i][name] if i in rows else None for i in range(len(table))]
        if name in ("flag", "verdict"):
            col = np.array([v if v is not None else ("" if name == "flag" else f"not compared: {reasons[i]}")
                            for i, v in enumerate(vals)], dtype=str)
        elif name == "T_eq_is_upper_bound":
            col = np.array([bool(v) for v in vals])
        else:
            col = np.array([np.nan if v is None else v for v in vals], float)
            unit = _UNITS.get(_quantity_of(name))
            col = col * unit if unit is not None else col
        out[name] = col
    return out
