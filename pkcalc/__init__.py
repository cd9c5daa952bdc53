"""pkcalc: intravenous infusion pharmacokinetics for research and review.

Predict concentrations for any infusion history, design regimens to a target,
fit clearance, volume and half-life from sampled levels, cross-check with
non-compartmental analysis, run scenario batches and verify against worked
examples.  All numbers are in canonical units: h, mg, L, mg/L, L/h, mg/h, 1/h.

Results are model estimates for research and review; dosing decisions belong
to licensed clinicians and pharmacists following local protocols.

The names below are loaded on first use, so that importing one part of pkcalc
(say :mod:`pkcalc.model`) does not import the file boundary (pandas, pydantic,
pint) or the other parts.
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

__version__ = "0.1.0"

#: public name -> module that defines it
_EXPORTS = {
    "DoseEvent": "core", "ScenarioInput": "core", "Target": "core", "SubjectData": "core",
    "Study": "core", "FitOptions": "core", "Prior": "core", "PopulationOptions": "core",
    "PkcalcInputError": "errors", "PkcalcWarning": "errors", "Problem": "errors",
    "ScenarioPrediction": "predict", "SteadyState": "predict", "predict_course": "predict",
    "predict_scenario": "predict",
    "load_scenario_file": "schema", "load_study_file": "schema", "load_study": "schema",
    "example_file": "examples",
    "fit_study": "api", "nca_study": "api", "population_study": "api", "plot": "api",
    "StudyFit": "api", "StudyNca": "api", "StudyPopulation": "api",
    "PopulationResult": "population", "FitResult": "fit", "NcaResult": "nca",
    "DesignResult": "design", "load_sdtm": "schema",
    "SamplingProblem": "core", "SamplingGroup": "core", "design_sampling": "sampling",
    "sampling_file": "api", "SamplingFile": "api", "Engine": "engines",
    "population_attainment": "api", "PopulationAttainment": "population.attainment",
}

__all__ = ["__version__", *sorted(_EXPORTS)]


_MODULES = {"core", "model", "predict", "design", "fit", "nca", "population", "batch",
            "schema", "units", "errors", "report", "plots", "verify", "files", "tables",
            "examples", "api", "runner", "cli", "plausibility", "sampling", "engines"}


def __getattr__(name: str) -> Any:
    if name in _EXPORTS:
        return getattr(import_module(f".{_EXPORTS[name]}", __name__), name)
    if name in _MODULES:
        return import_module(f".{name}", __name__)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


#: the parts a script uses directly (the others serve the command line)
_PUBLIC_MODULES = {"core", "model", "predict", "design", "fit", "nca", "population", "batch",
                   "sampling", "schema", "units", "errors", "report", "plots", "verify",
                   "engines"}


def __dir__() -> list[str]:
    return sorted(set(__all__) | _PUBLIC_MODULES)
