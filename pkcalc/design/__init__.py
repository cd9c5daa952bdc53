"""Design a regimen to a target and adjust it from measured levels.

Every proposal is rounded to what can be given and then re-predicted with
:mod:`pkcalc.model`; the predicted values, not the design equations, decide
whether a regimen meets its target.  All numbers are canonical (h, mg, L,
mg/L, L/h, mg/h).  Amounts and rates are of the product as given; the salt
factor ``S`` (fraction of the product that is active drug) converts them to
drug: ``drug = S x product``.

Methods and sources (details in ``docs/methods.md``):

- continuous infusion: ``R0 = Css CL / S``, ``LD = Css V / S``
  (Winter, *Basic Clinical Pharmacokinetics* -- from memory);
- repeated short infusions: the steady-state peak/trough equations
  (Bauer, *Applied Clinical Pharmacokinetics* -- from memory) and
  ``tau = ln(Cmax/Cmin)/k + T`` (Sawchuk & Zaske 1976 -- from memory);
- proportional adjustment at steady state (linear kinetics) and the pause
  ``ln(Cmeasured/Ctarget)/k`` before a lower rate (Bauer -- from memory);
- Chiou et al. 1978 two-level clearance beside the exact one-compartment solve;
- Sawchuk & Zaske 1976 individualisation from a peak and a trough.
"""

from .adjust import (
    adjust_map,
    adjust_peak_trough,
    adjust_proportional,
    adjust_two_levels,
    design_from_case,
)
from .common import (
    DEFAULT_DOSE_STEP,
    DEFAULT_INTERVALS,
    DEFAULT_MAX_LOADING_RATIO,
    DEFAULT_RATE_STEP,
    DEFAULT_TARGET_TOLERANCE,
    DesignResult,
    Limits,
    Regimen,
    loading_dose_for_target,
    loading_infusion_for_target,
    rate_for_target,
    round_to_step,
)
from .continuous import design_continuous
from .intermittent import design_intermittent, exact_intermittent
from .levels import (
    chiou_clearance,
    exact_two_level_clearance,
    one_level_clearance,
    sawchuk_zaske,
    two_level_parameters,
)

__all__ = [
    "DEFAULT_DOSE_STEP",
    "DEFAULT_INTERVALS",
    "DEFAULT_MAX_LOADING_RATIO",
    "DEFAULT_RATE_STEP",
    "DEFAULT_TARGET_TOLERANCE",
    "DesignResult",
    "Limits",
    "Regimen",
    "adjust_map",
    "adjust_peak_trough",
    "adjust_proportional",
    "adjust_two_levels",
    "chiou_clearance",
    "design_continuous",
    "design_from_case",
    "design_intermittent",
    "exact_intermittent",
    "exact_two_level_clearance",
    "loading_dose_for_target",
    "loading_infusion_for_target",
    "one_level_clearance",
    "rate_for_target",
    "round_to_step",
    "sawchuk_zaske",
    "two_level_parameters",
]
