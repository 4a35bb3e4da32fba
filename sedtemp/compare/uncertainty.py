"""Field and opacity uncertainty: random factors on each field component's absorbed power.

One object per uncertainty (:class:`ScaleUncertainty`,
:class:`DistanceUncertainty`, :class:`ProjectedDistance`) says how the
factors of one field component (or of the whole field) are drawn. A
*shared* uncertainty (``shared=True``, for an error common to many sources:
the luminosity of one star, the U of a whole cloud) is drawn once per
catalogue draw index from a stream that depends on the run seed and the
component only, so draw j of every source gets the same factor, whatever
the chunking. The opacity uncertainty (fractional 1-sigma of
kappa_FIR / kappa_abs) multiplies the absorbed power of every component.
"""

from __future__ import annotations

import numbers
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING

import astropy.units as u
import numpy as np
from scipy.stats import truncnorm

from ..errors import InputError
from ..radiation import AttenuatedField, RadiationField, ScaledField, Star
from ..seeds import resolve_seed, source_seed

if TYPE_CHECKING:
    from typing import TypeAlias

    #: What ``field_uncertainty=`` accepts (see :func:`sedtemp.compare.compare_draws`).
    FieldUncertaintySpec: TypeAlias = (
        "float | FieldUncertainty | Mapping[int | RadiationField, FieldUncertainty"
        " | Sequence[FieldUncertainty]] | None")
    #: What ``opacity_uncertainty=`` accepts.
    OpacityUncertaintySpec: TypeAlias = "float | ScaleUncertainty | None"

__all__ = [
    "DEFAULT_OPACITY_UNCERTAINTY",
    "DistanceUncertainty",
    "FieldUncertainty",
    "ProjectedDistance",
    "ScaleUncertainty",
    "draw_factors",
    "opacity_factors",
    "resolve_uncertainty",
]

#: Default fractional 1-sigma of kappa_FIR / kappa_abs (the far-IR opacity
#: relative to the UV/optical absorption): 0.3. Grain models differ by tens
#: of per cent in this ratio (common practice; a round number, not a fit to
#: any one model). A factor 2 in the ratio moves T_eq by ~12-15 %.
DEFAULT_OPACITY_UNCERTAINTY = 0.3


class _Shared:
    """Standard-normal streams of shared uncertainties: one per (run seed, label), cached per call."""

    def __init__(self, run_seed):
        self.seed = resolve_seed(run_seed)
        self._cache: dict = {}

    def normals(self, label, n):
        key = (label, n)
        if key not in self._cache:
            rng = np.random.default_rng(source_seed(self.seed, f"shared-uncertainty:{label}"))
            self._cache[key] = rng.standard_normal(n)  # draw j is the j-th of one stream
        return self._cache[key]


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

    def factors(self, component: RadiationField | None, n: int, rng: np.random.Generator) -> np.ndarray:  # pragma: no cover - abstract
        """``n`` factors (ndarray) for ``component`` (``None``: the whole field)."""
        raise NotImplementedError

    def check(self, component: RadiationField | None) -> None:
        """Raise :class:`InputError` if this uncertainty cannot apply to ``component``."""


class ScaleUncertainty(FieldUncertainty):
    """A field scale known to a factor: log-normal, ln s ~ Normal(0, ln factor).

    Parameters
    ----------
    factor : float
        The 1-sigma multiplicative uncertainty (>= 1; e.g. 2: the scale is
        within [1/2, 2] of its nominal value at 68 %). 1 means no spread.
    shared : bool, keyword-only
        True: one error common to every source (drawn once per catalogue
        draw index from the run seed and the component, see the module
        notes); False (default): independent per source.

    Notes
    -----
    The median factor is 1, so the nominal field is the median field.
    """

    def __init__(self, factor: float, *, shared: bool = False) -> None:
        self.factor = float(factor)
        if not (np.isfinite(self.factor) and self.factor >= 1.0):
            raise InputError(f"ScaleUncertainty: factor must be a number >= 1 (e.g. 2 for 'known to a "
                             f"factor of 2'), got {factor!r}")
        self.shared = bool(shared)

    def factors(self, component: RadiationField | None, n: int, rng: np.random.Generator) -> np.ndarray:
        return np.exp(np.log(self.factor) * rng.standard_normal(n))

    def shared_factors(self, normals: np.ndarray) -> np.ndarray:
        """Factors from the shared standard normals of this component."""
        return np.exp(np.log(self.factor) * normals)

    def __repr__(self) -> str:
        return f"ScaleUncertainty(factor={self.factor:g}{', shared=True' if self.shared else ''})"


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

    def __init__(self, fraction: float) -> None:
        self.fraction = float(fraction)
        if not (np.isfinite(self.fraction) and self.fraction >= 0):
            raise InputError(f"DistanceUncertainty: fraction must be a number >= 0 (0.2 for 20 %), "
                             f"got {fraction!r}")

    def check(self, component: RadiationField | None) -> None:
        _star_of(component, "DistanceUncertainty")

    def factors(self, component: RadiationField | None, n: int, rng: np.random.Generator) -> np.ndarray:
        star = _star_of(component, "DistanceUncertainty")
        r = _distance_ratio(rng, n, self.fraction, star.radius_m / star.distance_m)
        return star.dilution_at(r * star.distance_m * u.m) / star.dilution

    def __repr__(self) -> str:
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

    def __init__(self, fraction: float = 0.0, *, isotropic: bool = False) -> None:
        self.fraction = float(fraction)
        if not (np.isfinite(self.fraction) and self.fraction >= 0):
            raise InputError(f"ProjectedDistance: fraction must be a number >= 0, got {fraction!r}")
        self.isotropic = bool(isotropic)

    def check(self, component: RadiationField | None) -> None:
        _star_of(component, "ProjectedDistance")

    def factors(self, component: RadiationField | None, n: int, rng: np.random.Generator) -> np.ndarray:
        star = _star_of(component, "ProjectedDistance")
        r = _distance_ratio(rng, n, self.fraction, star.radius_m / star.distance_m)
        if self.isotropic:
            cos_i = rng.uniform(size=n)  # in [0, 1): sin i > 0, so r stays finite
            r = r / np.sqrt(1.0 - cos_i**2)
        return star.dilution_at(r * star.distance_m * u.m) / star.dilution

    def __repr__(self) -> str:
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


def resolve_uncertainty(spec: FieldUncertaintySpec, field: RadiationField,
                        projected: bool) -> list[tuple[tuple[int, ...], FieldUncertainty]]:
    """Normalise ``field_uncertainty`` and ``projected`` to [(component indices, uncertainty)]."""
    comps = field.components
    every = tuple(range(len(comps)))
    entries: list[tuple[tuple[int, ...], FieldUncertainty]] = []
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


def draw_factors(entries: Sequence[tuple[tuple[int, ...], FieldUncertainty]],
                 comps: Sequence[RadiationField], n: int, rng: np.random.Generator, *,
                 run_seed: int | None = None,
                 shared: _Shared | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Per-draw factors (n, n_components) and which components only bound T_eq.

    ``shared`` (a cache of shared streams, made from ``run_seed`` when None)
    serves the uncertainties with ``shared=True``; the others draw from
    ``rng`` in the order of ``entries``.
    """
    f = np.ones((n, len(comps)))
    bounded = np.zeros(len(comps), bool)
    for idx, unc in entries:
        if getattr(unc, "shared", False):
            shared = _Shared(run_seed) if shared is None else shared
            label = "field" if len(idx) > 1 else f"component-{idx[0]}"
            fac = unc.shared_factors(shared.normals(label, n))
        else:
            fac = unc.factors(comps[idx[0]] if len(idx) == 1 else None, n, rng)
        if idx == tuple(range(len(comps))):  # the whole field: no fancy indexing
            f *= fac[:, None]
        else:
            f[:, list(idx)] *= fac[:, None]
        if unc.bounds_T_eq:
            bounded[list(idx)] = True
    return f, bounded


def opacity_factors(spec: OpacityUncertaintySpec, n: int, rng: np.random.Generator, *,
                    run_seed: int | None = None, shared: _Shared | None = None) -> np.ndarray:
    """Factors (n,) on the absorbed power from the opacity uncertainty ``spec``.

    ``spec``: None (:data:`DEFAULT_OPACITY_UNCERTAINTY`), a number x >= 0 (the
    fractional 1-sigma of kappa_FIR / kappa_abs: a log-normal factor of
    1-sigma 1 + x on the absorbed power, since T_eq solves
    P_emit(T; kappa_FIR) = P_abs(kappa_abs)), or a :class:`ScaleUncertainty`
    (with ``shared=True`` for one opacity error common to the catalogue).
    Draws nothing from ``rng`` when the spread is 0.
    """
    if spec is None:
        spec = DEFAULT_OPACITY_UNCERTAINTY
    if isinstance(spec, ScaleUncertainty):
        unc = spec
    elif isinstance(spec, numbers.Real) and not isinstance(spec, bool) and np.isfinite(spec) and spec >= 0:
        unc = ScaleUncertainty(1.0 + float(spec))
    else:
        raise InputError(f"opacity_uncertainty must be None, a number >= 0 (fractional 1-sigma of "
                         f"kappa_FIR / kappa_abs, e.g. 0.3) or a ScaleUncertainty, got {spec!r}")
    if unc.factor == 1.0:
        return np.ones(n)
    if unc.shared:
        shared = _Shared(run_seed) if shared is None else shared
        return unc.shared_factors(shared.normals("opacity", n))
    return unc.factors(None, n, rng)
