"""Prior distributions for single parameters and a named collection of them.

Each prior is an object with a vectorised ``logpdf`` that returns ``-inf``
outside its support (never NaN), a support ``low``/``high`` and a seeded
``sample``. A :class:`Prior` maps parameter names to these objects and gives
the joint log-density of parameter vectors of shape ``(n, n_params)``.

The priors are *proper* (normalised), so the log-evidence-like quantities and
posterior-predictive checks built on them are well defined.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping, Sequence

import numpy as np
from numpy.typing import ArrayLike
from scipy import special

from .errors import InputError

__all__ = ["Gaussian", "LogUniform", "LogUniformAmplitude", "Prior", "Uniform", "UniformAmplitude"]


class _Prior1D:
    low: float
    high: float

    def logpdf(self, x: ArrayLike) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def sample(self, rng: np.random.Generator, n: int) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def _bounds_check(self, low, high, what):
        if not (np.isfinite(low) or low == -np.inf) or not (np.isfinite(high) or high == np.inf):
            raise InputError(f"{what}: bounds must be numbers, got ({low!r}, {high!r})")
        if not low < high:
            raise InputError(f"{what}: low must be below high, got low={low!r}, high={high!r}")


class Uniform(_Prior1D):
    """Uniform prior on [low, high].

    Parameters
    ----------
    low, high : float
        Finite bounds, in the parameter's unit.
    """

    def __init__(self, low: float, high: float) -> None:
        low, high = float(low), float(high)
        self._bounds_check(low, high, "Uniform")
        if not (np.isfinite(low) and np.isfinite(high)):
            raise InputError(f"Uniform: bounds must be finite, got ({low}, {high})")
        self.low, self.high = low, high
        self._logp = -np.log(high - low)

    def logpdf(self, x: ArrayLike) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        inside = (x >= self.low) & (x <= self.high)
        return np.where(inside, self._logp, -np.inf)

    def sample(self, rng: np.random.Generator, n: int) -> np.ndarray:
        return rng.uniform(self.low, self.high, size=n)

    def __repr__(self) -> str:
        return f"Uniform({self.low:g}, {self.high:g})"


class LogUniform(_Prior1D):
    """Log-uniform (scale-invariant) prior, p(x) ∝ 1/x on [low, high], 0 < low < high."""

    def __init__(self, low: float, high: float) -> None:
        low, high = float(low), float(high)
        self._bounds_check(low, high, "LogUniform")
        if not (low > 0 and np.isfinite(high)):
            raise InputError(f"LogUniform: needs 0 < low < high < inf, got ({low}, {high})")
        self.low, self.high = low, high
        self._lognorm = np.log(np.log(high / low))

    def logpdf(self, x: ArrayLike) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        inside = (x >= self.low) & (x <= self.high)
        with np.errstate(divide="ignore", invalid="ignore"):
            lp = -np.log(np.where(inside, x, 1.0)) - self._lognorm
        return np.where(inside, lp, -np.inf)

    def sample(self, rng: np.random.Generator, n: int) -> np.ndarray:
        return np.exp(rng.uniform(np.log(self.low), np.log(self.high), size=n))

    def __repr__(self) -> str:
        return f"LogUniform({self.low:g}, {self.high:g})"


class Gaussian(_Prior1D):
    """Gaussian prior N(mean, sigma^2), optionally truncated to [low, high] and renormalised."""

    def __init__(self, mean: float, sigma: float, low: float = -np.inf, high: float = np.inf) -> None:
        mean, sigma, low, high = float(mean), float(sigma), float(low), float(high)
        if not (np.isfinite(mean) and np.isfinite(sigma) and sigma > 0):
            raise InputError(f"Gaussian: needs a finite mean and sigma > 0, got ({mean}, {sigma})")
        self._bounds_check(low, high, "Gaussian")
        self.mean, self.sigma, self.low, self.high = mean, sigma, low, high
        a, b = (low - mean) / sigma, (high - mean) / sigma
        mass = special.ndtr(b) - special.ndtr(a)
        self._a, self._b = a, b
        self._lognorm = -0.5 * np.log(2 * np.pi) - np.log(sigma) - np.log(mass)

    def logpdf(self, x: ArrayLike) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        inside = (x >= self.low) & (x <= self.high)
        z = (x - self.mean) / self.sigma
        return np.where(inside, self._lognorm - 0.5 * z**2, -np.inf)

    def sample(self, rng: np.random.Generator, n: int) -> np.ndarray:
        # inverse-CDF sampling of the truncated normal
        lo, hi = special.ndtr(self._a), special.ndtr(self._b)
        return self.mean + self.sigma * special.ndtri(rng.uniform(lo, hi, size=n))

    def __repr__(self) -> str:
        return f"Gaussian({self.mean:g}, {self.sigma:g}, low={self.low:g}, high={self.high:g})"


class UniformAmplitude(_Prior1D):
    """Prior on x = log10(A) that is uniform in the *linear* amplitude A.

    p(x) ∝ 10^x on [low, high] (``low``, ``high`` in log10 units), i.e. A
    uniform on [10^low, 10^high]. This is the default amplitude prior: the
    amplitude enters the model linearly, so with it the grid posterior
    marginalises the amplitude exactly, and unlike a log-uniform prior it does
    not put unbounded weight on A -> 0 when a source is barely detected.
    """

    def __init__(self, low: float, high: float) -> None:
        low, high = float(low), float(high)
        self._bounds_check(low, high, "UniformAmplitude")
        if not (np.isfinite(low) and np.isfinite(high)):
            raise InputError(f"UniformAmplitude: bounds must be finite, got ({low}, {high})")
        self.low, self.high = low, high
        self._ln10 = np.log(10.0)
        # log of the normaliser int_low^high 10^x dx = (10^high - 10^low) / ln 10
        self._lognorm = high * self._ln10 + np.log(-np.expm1((low - high) * self._ln10)) - np.log(self._ln10)

    def logpdf(self, x: ArrayLike) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        inside = (x >= self.low) & (x <= self.high)
        return np.where(inside, x * self._ln10 - self._lognorm, -np.inf)

    def sample(self, rng: np.random.Generator, n: int) -> np.ndarray:
        return np.log10(rng.uniform(10.0**self.low, 10.0**self.high, size=n))

    def __repr__(self) -> str:
        return f"UniformAmplitude({self.low:g}, {self.high:g})"


class LogUniformAmplitude(Uniform):
    """Prior on x = log10(A) that is uniform in x (log-uniform in the amplitude A).

    p(x) = 1 / (high - low) on [low, high] (log10 units), i.e. p(A) ∝ 1/A.
    This is the default amplitude prior. The amplitude is a scale parameter,
    and a scale-invariant prior adds no preference for any (T, beta): with a
    prior uniform in the *linear* amplitude, marginalising A multiplies the
    (T, beta) posterior by ~A*(T, beta), the conditional best amplitude,
    which favours cold, massive solutions and biases cold sources colder
    (validated at fixed truth in tests/validation).

    Parameters
    ----------
    low, high : float
        Bounds of log10 of the amplitude (finite).

    Examples
    --------
    >>> p = LogUniformAmplitude(-2.0, 2.0)
    >>> bool(np.isclose(p.logpdf(0.0), -np.log(4.0)))
    True
    """

    def __init__(self, low: float, high: float) -> None:
        super().__init__(low, high)

    def __repr__(self) -> str:
        return f"LogUniformAmplitude({self.low:g}, {self.high:g})"


class Prior(Mapping):
    """Independent priors on named parameters.

    Parameters
    ----------
    priors : mapping of str to prior objects
        One entry per free parameter.

    Examples
    --------
    >>> p = Prior({"T": Uniform(5, 100), "beta": Gaussian(1.8, 0.3, 0, 4)})
    >>> p.logpdf(np.array([[20.0, 1.8]]), ("T", "beta")).shape
    (1,)
    """

    def __init__(self, priors: Mapping[str, _Prior1D]) -> None:
        self._priors = dict(priors)
        for name, pr in self._priors.items():
            if not isinstance(pr, _Prior1D):
                raise InputError(
                    f"prior for '{name}' must be Uniform, LogUniform, Gaussian, UniformAmplitude or LogUniformAmplitude, got {pr!r}"
                )

    def __getitem__(self, key: str) -> _Prior1D:
        return self._priors[key]

    def __iter__(self) -> Iterator[str]:
        return iter(self._priors)

    def __len__(self) -> int:
        return len(self._priors)

    def updated(self, other: Mapping[str, _Prior1D]) -> Prior:
        """A new Prior with entries of ``other`` (mapping) replacing or adding to these."""
        merged = dict(self._priors)
        merged.update(dict(other))
        return Prior(merged)

    def check_names(self, names: Sequence[str]) -> None:
        """Raise InputError unless every name has a prior and no prior is left unused."""
        missing = [n for n in names if n not in self._priors]
        extra = [n for n in self._priors if n not in names]
        if missing:
            raise InputError(f"no prior given for parameter(s) {missing}; model parameters are {list(names)}")
        if extra:
            raise InputError(f"prior given for unknown parameter(s) {extra}; model parameters are {list(names)}")

    def logpdf(self, theta: ArrayLike, names: Sequence[str]) -> np.ndarray:
        """Joint log prior density of ``theta`` (n, len(names)) -> (n,); -inf outside the support.

        The same name as the single priors' ``logpdf``; ``log_prob`` is an alias
        kept for existing callers.
        """
        theta = np.atleast_2d(np.asarray(theta, dtype=float))
        out = np.zeros(theta.shape[0])
        for j, name in enumerate(names):  # loop over a handful of parameters, not data
            out += self._priors[name].logpdf(theta[:, j])
        return np.where(np.isnan(out), -np.inf, out)

    log_prob = logpdf

    def sample(self, rng: np.random.Generator, n: int, names: Sequence[str]) -> np.ndarray:
        """Draws of shape (n, len(names)) from the prior."""
        return np.column_stack([self._priors[name].sample(rng, n) for name in names])

    def bounds(self, names: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
        """(low, high) arrays of the supports, in ``names`` order."""
        lo = np.array([self._priors[n].low for n in names])
        hi = np.array([self._priors[n].high for n in names])
        return lo, hi

    def __repr__(self) -> str:
        inner = ", ".join(f"{k!r}: {v!r}" for k, v in self._priors.items())
        return f"Prior({{{inner}}})"
