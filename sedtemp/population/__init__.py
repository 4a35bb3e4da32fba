"""Hierarchical (T, beta) population of a catalogue and the fraction of heated sources.

The per-source posteriors are combined by importance sampling (Hogg, Myers &
Bovy 2010): the population distribution is inferred with the per-source
errors deconvolved, each source is shrunk toward it, and the fraction of
sources heated beyond radiative equilibrium is inferred with its interval.
"""

from .figure import population_figure
from .heated import HeatedFractionResult, heated_fraction
from .infer import infer_population
from .models import GaussianPopulation, HeatedMixture, MixturePopulation
from .result import PopulationResult
from .stage import population_from_results, write_population

__all__ = [
    "GaussianPopulation",
    "HeatedFractionResult",
    "HeatedMixture",
    "MixturePopulation",
    "PopulationResult",
    "heated_fraction",
    "infer_population",
    "population_figure",
    "population_from_results",
    "write_population",
]
