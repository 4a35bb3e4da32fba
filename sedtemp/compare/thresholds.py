"""Decision thresholds of the comparison flags and the flag names."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, fields

from ..errors import InputError

__all__ = ["FLAGS", "UNTRUSTED_FIT_FLAGS", "Thresholds"]

#: The comparison flags, in the order they are tested (see :class:`Thresholds`).
FLAGS = ("non_equilibrium", "extra_heating", "shielded", "unconstrained", "consistent")
#: Fit trust flags (sedtemp.fit.summary) meaning the data do not bound T, or T is
#: cut by a prior edge (directly, or through the T-beta degeneracy when beta
#: piles on its edge): the posterior's position is then set by the prior.
#: 'beta_prior_dominated' alone is not here: a broad beta posterior is carried
#: through (T_eq is computed with each draw's beta), and cold cores with only
#: long-wavelength bands typically have a well-bounded T but a broad beta.
UNTRUSTED_FIT_FLAGS = ("T_at_prior_low", "T_at_prior_high", "T_prior_dominated",
                       "beta_at_prior_low", "beta_at_prior_high")


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

    def __post_init__(self) -> None:
        checks = {"p_decide": 0.5 <= self.p_decide < 1.0, "ratio_high": self.ratio_high >= 1.0,
                  "ratio_low": 0.0 < self.ratio_low <= 1.0, "max_ratio_width": self.max_ratio_width > 0.0,
                  "p_stochastic": 0.0 < self.p_stochastic <= 1.0}
        for name, ok in checks.items():
            if not ok:
                raise InputError(f"Thresholds: {name} = {getattr(self, name)!r} is out of range "
                                 "(0.5 <= p_decide < 1, ratio_high >= 1, 0 < ratio_low <= 1, "
                                 "max_ratio_width > 0, 0 < p_stochastic <= 1)")

    @classmethod
    def from_any(cls, value: Thresholds | Mapping[str, float] | None) -> Thresholds:
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
