"""Input files -> validated, canonical inputs (the boundary).

pydantic models describe each input file (docs/formats.md); their validators
turn every quantity into canonical units with :mod:`pkcalc.units`, check the
parameters, doses and options, and collect every problem before raising.
What comes out (:class:`ScenarioInput`, :class:`DoseEvent`, :class:`DesignCase`,
...) is plain numbers in canonical units that the rest of pkcalc trusts.

Modules: ``base`` (shared types, collector, loader), ``scenario`` (scenario
files), ``design`` (design tables).
"""

from ..core import DoseEvent, ScenarioInput, Study, SubjectData, Target, expand_events
from .base import (
    AGREEMENT_RTOL,
    PARAMETER_NAMES,
    OutputUnits,
    ScenarioFile,
    load_items,
    read_toml,
    resolve_parameters,
    resolve_partial,
    validation_problems,
)
from .cases import CaseSpec, Expectation, VerifyCase, load_cases_file
from .design import DesignCase, DesignCaseSpec, load_design_file
from .design_table import DESIGN_METHODS, DesignSpec
from .scenario import DoseSpec, ScenarioSpec, TargetSpec, TimeRange, load_scenario_file

__all__ = [
    "AGREEMENT_RTOL",
    "DESIGN_METHODS",
    "PARAMETER_NAMES",
    "CaseSpec",
    "DesignCase",
    "DesignCaseSpec",
    "DesignSpec",
    "DoseEvent",
    "DoseSpec",
    "Expectation",
    "OutputUnits",
    "ScenarioFile",
    "ScenarioInput",
    "ScenarioSpec",
    "Study",
    "SubjectData",
    "Target",
    "TargetSpec",
    "TimeRange",
    "VerifyCase",
    "expand_events",
    "load_cases_file",
    "load_design_file",
    "load_items",
    "load_scenario_file",
    "load_sdtm",
    "load_study",
    "load_study_file",
    "nca_options",
    "read_toml",
    "resolve_parameters",
    "resolve_partial",
    "study_fit_options",
    "study_nca_options",
    "study_population_options",
    "validation_problems",
]


_LAZY = {"load_sdtm", "load_study", "load_study_file", "nca_options", "study_fit_options",
         "study_nca_options", "study_population_options"}


def __getattr__(name: str):
    """Study tables need pandas; load them on first use so that ``pkcalc predict``
    starts quickly."""
    if name == "load_sdtm":
        from .sdtm import load_sdtm

        return load_sdtm
    if name in _LAZY:
        from . import options, study, studyfile

        module = options if name.startswith("study_") else (
            studyfile if name == "load_study_file" else study)
        return getattr(module, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
