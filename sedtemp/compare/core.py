"""The comparison of one source: fitted against predicted temperature, with its draws.

For every posterior draw i of a fit, (T_i, beta_i) (and the dust mass M_i if
the fit has one), the modelled field is drawn from its own uncertainty
(:mod:`sedtemp.compare.uncertainty`) and the equilibrium temperature is
computed with that draw's beta:

    P_abs,i = q_i sum_c s_ci 4 pi int kappa_nu(beta_i) J_c,nu dnu,
    T_eq,i  : 4 pi int kappa_nu(beta_i) B_nu(T_eq,i) dnu = P_abs,i,

where s_ci is the draw's factor on component c and q_i the opacity factor.
From the pairs (T_i, T_eq,i) come P(T_fit > T_eq), the ratio T_fit / T_eq,
the field scale and ISRF strength U that would explain T_fit, and the power
beyond the modelled field, P_extra = P_emit(T_fit) - P_abs, per unit mass
and (times M_i) as a luminosity. :func:`compare_draws` is
:func:`~sedtemp.compare.chunk.compare_chunk` for one source, keeping the draws.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from dataclasses import field as _dc_field
from typing import TYPE_CHECKING, Any

import astropy.units as u
import numpy as np

from .._units import to_kelvin, to_si
from ..absorption import warn_extrapolated
from ..errors import InputError
from ..grains import stochastic_heating_check
from ..radiation import RadiationField
from ..seeds import resolve_seed
from .chunk import W_PER_KG_IN_LSUN_PER_MSUN, columns_from, evaluate, source_factors
from .flags import untrusted_flags
from .thresholds import Thresholds
from .uncertainty import _Shared

if TYPE_CHECKING:
    from numpy.typing import ArrayLike

    from ..fit.result import FitResult
    from ..grains import Grain
    from ..opacity import Opacity
    from ..simulate import SeedLike
    from .uncertainty import FieldUncertaintySpec, OpacityUncertaintySpec

__all__ = ["Comparison", "compare", "compare_draws"]

_W_PER_KG = u.W / u.kg
#: Name of the heating-class column in the Python API's tables (:meth:`Comparison.columns`,
#: :func:`~sedtemp.compare.compare_table`), as in the pipeline's results.
CLASS_COLUMN = "heating_class"


def api_columns(cols: Mapping[str, Any]) -> dict[str, Any]:
    """``cols`` (in :func:`compare_chunk`'s naming) with the heating class under
    :data:`CLASS_COLUMN`, in the same order."""
    return {(CLASS_COLUMN if k == "flag" else k): v for k, v in cols.items()}


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
    opacity_extrapolated_fraction : float
        Median fraction of the absorbed power from wavelengths where the
        opacity law is an extrapolation (see
        :class:`~sedtemp.errors.OpacityExtrapolationWarning`).
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
    opacity_extrapolated_fraction: float = float("nan")
    _columns: dict = _dc_field(default_factory=dict, repr=False)

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
        ``stochastic_fraction``, ``T_eq_is_upper_bound``,
        ``opacity_extrapolated_fraction`` (median fraction of the absorbed
        power from where the opacity law is extrapolated), ``heating_class``
        (the :attr:`flag`; the name the pipeline's results use), ``verdict``.
        The same computation as :func:`compare_chunk` (whose dict names the
        heating class ``flag``).
        """
        return api_columns(self._columns)

    def __repr__(self) -> str:
        return f"<Comparison {self.flag}: {self.verdict}>"

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


def _seed_of(seed):
    """A SeedSequence or Generator from ``seed`` (None -> 0, an int, a sequence of ints, or either)."""
    if isinstance(seed, (np.random.SeedSequence, np.random.Generator)):
        return seed
    if seed is None or isinstance(seed, (int, np.integer)):
        return np.random.SeedSequence(resolve_seed(seed))
    try:
        return np.random.SeedSequence([int(v) for v in seed])
    except (TypeError, ValueError) as err:
        raise InputError(f"compare: seed must be None, a non-negative integer, a sequence of them, a "
                         f"SeedSequence or a Generator, got {seed!r}") from err


def compare_draws(T_draws: u.Quantity | ArrayLike, beta_draws: ArrayLike | float | None,
                  field: RadiationField, opacity: Opacity, *, mass_draws: u.Quantity | ArrayLike | None = None,
                  field_uncertainty: FieldUncertaintySpec = None,
                  opacity_uncertainty: OpacityUncertaintySpec = None, projected: bool = False,
                  thresholds: Thresholds | Mapping[str, float] | None = None, grain: Grain | None = None,
                  fit_flags: Sequence[str] | str | None = None, seed: SeedLike = None,
                  run_seed: int | None = None) -> Comparison:
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
        to one uncertainty or a tuple of them (their factors multiply). A
        ``ScaleUncertainty(..., shared=True)`` is common to all sources
        (drawn from ``run_seed`` and the component, see
        :mod:`sedtemp.compare.uncertainty`).
    opacity_uncertainty : float or ScaleUncertainty, keyword-only
        Fractional 1-sigma of kappa_FIR / kappa_abs, propagated into the T_eq
        draws as a log-normal factor on the absorbed power; None means
        :data:`DEFAULT_OPACITY_UNCERTAINTY` (0.3); 0 switches it off. The
        ratio is taken at the opacity's pivot (``opacity.pivot_hz``: nu0 of
        a power law, the break of a table), which the README discusses.
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
        For the field- and opacity-uncertainty draws (None: 0).
    run_seed : int, optional, keyword-only
        Seed of the shared uncertainties (the run's seed; None: 0).

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
    seq = _seed_of(seed)
    fac, bounded, q_op = source_factors(field_uncertainty, field, projected, t.size, seq,
                                        opacity_uncertainty, _Shared(run_seed))
    ev = evaluate(t[None], b[None], [field], opacity, fac[None], bounded[None], q_op[None])
    warn_extrapolated(ev["extrapolated_median"][0], opacity, "compare_draws")
    frac = None
    if grain is not None:
        chk = stochastic_heating_check(field, opacity, grain, scale=ev["p_abs"][0] / ev["nominal"][0], beta=b)
        frac = np.array([float(np.mean(chk.stochastic))])
    untrusted = untrusted_flags(fit_flags)
    cols, ratio, _ = columns_from(t[None], None if m is None else m[None], ev, [untrusted],
                                  np.array([bounded.any()]), th, frac, grain)
    row = {k: (v[0].item() if isinstance(v[0], np.generic) else v[0]) for k, v in cols.items()}
    row["flag"], row["verdict"] = str(row["flag"]), str(row["verdict"])
    extra = ev["p_emit"][0] - ev["p_abs"][0]
    lum = None if m is None else (extra * W_PER_KG_IN_LSUN_PER_MSUN * m) * u.L_sun
    return Comparison(
        flag=row["flag"], verdict=row["verdict"], p_warmer=row["p_warmer"], T_fit=t * u.K,
        T_eq=ev["T_eq"][0] * u.K, beta=b, ratio=ratio[0], U_implied=ev["U_implied"][0],
        field_scale=ev["p_emit"][0] / ev["p_abs"][0], extra_power_per_mass=extra * _W_PER_KG,
        extra_luminosity=lum, T_eq_is_upper_bound=bool(bounded.any()),
        T_eq_floor=ev["T_floor"][0] * u.K if "T_floor" in ev else None,
        stochastic_fraction=row["stochastic_fraction"], thresholds=th, opacity_per=opacity.per,
        opacity_extrapolated_fraction=row["opacity_extrapolated_fraction"], _columns=row)


def compare(fit_result: FitResult, field: RadiationField, opacity: Opacity | None = None, *,
            field_uncertainty: FieldUncertaintySpec = None, opacity_uncertainty: OpacityUncertaintySpec = None,
            projected: bool = False, thresholds: Thresholds | Mapping[str, float] | None = None,
            grain: Grain | None = None, seed: SeedLike = None) -> Comparison:
    """Compare a fit's posterior with the equilibrium temperature of a modelled field.

    Parameters
    ----------
    fit_result : FitResult
        From :func:`sedtemp.fit.fit_source`: ``samples["T"]`` (K), ``"beta"``
        if free, and ``"log10_mass"`` (solMass) for a mass amplitude.
    field : RadiationField
    opacity : Opacity, optional
        Default the fit model's ``opacity``, with each draw's beta.
    field_uncertainty, opacity_uncertainty, projected, thresholds, grain, seed : keyword-only
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
                         opacity_uncertainty=opacity_uncertainty, projected=projected, thresholds=thresholds, grain=grain,
                         fit_flags=getattr(fit_result, "flags", None), seed=seed)


