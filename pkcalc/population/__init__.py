"""Population estimates from study data.

- ``twostage``: the standard and iterative two-stage methods, bootstrap, the
  simulation behind the visual predictive check;
- ``result``: :class:`PopulationResult`, shared by every method.
"""

from .result import PopulationResult
from .twostage import (
    COVARIATE_MODELS,
    bootstrap,
    iterative_two_stage,
    simulate_design,
    two_stage,
)

__all__ = [
    "COVARIATE_MODELS",
    "PopulationResult",
    "bootstrap",
    "iterative_two_stage",
    "simulate_design",
    "two_stage",
]
