"""pkcalc: intravenous infusion pharmacokinetics for research and review.

Predict concentrations for any infusion history, design regimens to a target,
fit clearance, volume and half-life from sampled levels, cross-check with
non-compartmental analysis, run scenario batches and verify against worked
examples.  All numbers are in canonical units: h, mg, L, mg/L, L/h, mg/h, 1/h.

Results are model estimates for research and review; dosing decisions belong
to licensed clinicians and pharmacists following local protocols.
"""

__version__ = "0.1.0"

from .errors import PkcalcInputError, PkcalcWarning, Problem
from .predict import ScenarioPrediction, SteadyState, predict, predict_scenario
from .schema import DoseEvent, ScenarioInput, Target, load_scenario_file

__all__ = [
    "DoseEvent",
    "PkcalcInputError",
    "PkcalcWarning",
    "Problem",
    "ScenarioInput",
    "ScenarioPrediction",
    "SteadyState",
    "Target",
    "__version__",
    "load_scenario_file",
    "predict",
    "predict_scenario",
]
