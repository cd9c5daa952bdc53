"""Sampling-time design: when to draw levels so that CL and V come out precise.

:func:`design_sampling` finds the D-optimal (or A-optimal) times of one patient
(individual or MAP design) or of a study's groups (population design, first-order
information), evaluates the user's own schedules, and proves the expected
precision by simulating and re-estimating replicates with pkcalc's own fit and
population methods (locally or on Dask, :mod:`pkcalc.engines`).
"""

from .information import (
    course,
    individual_information,
    log_det,
    population_information,
    population_parameters,
    rse_percent,
)
from .result import DesignEvaluation, SamplingResult, SimulationSummary
from .run import design_sampling, problem_allowed_set

__all__ = [
    "DesignEvaluation",
    "SamplingResult",
    "SimulationSummary",
    "course",
    "design_sampling",
    "individual_information",
    "log_det",
    "population_information",
    "population_parameters",
    "problem_allowed_set",
    "rse_percent",
]
