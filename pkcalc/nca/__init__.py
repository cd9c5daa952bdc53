"""Non-compartmental analysis: the model-independent cross-check, per dosing interval
on the actual dosing times.

- :mod:`pkcalc.nca.areas` -- trapezoid areas (linear up / log down) and the terminal
  slope;
- :mod:`pkcalc.nca.regimen` -- whether repeated doses are regular, with a stated
  clinical tolerance;
- :mod:`pkcalc.nca.intervals` -- one dosing interval (Cmax, Tmax, Cmin, trough,
  AUCtau, single-dose and steady-state values);
- :mod:`pkcalc.nca.subject` -- every interval of a subject and the summary the fit
  and the population compare with.
"""

from .areas import AUC_METHODS, R2_TOLERANCE, TerminalPhase, auc_segments, level_at, terminal_phase
from .intervals import MIN_LEVELS, IntervalResult
from .regimen import DURATION_TOLERANCE, INTERVAL_TOLERANCE, Regimen, dosing_regimen
from .subject import BLQ_RULES, EXTRAPOLATION_LIMIT, NcaResult, nca_of_subject, nca_subject

__all__ = [
    "AUC_METHODS",
    "BLQ_RULES",
    "DURATION_TOLERANCE",
    "EXTRAPOLATION_LIMIT",
    "INTERVAL_TOLERANCE",
    "MIN_LEVELS",
    "R2_TOLERANCE",
    "IntervalResult",
    "NcaResult",
    "Regimen",
    "TerminalPhase",
    "auc_segments",
    "dosing_regimen",
    "level_at",
    "nca_of_subject",
    "nca_subject",
    "terminal_phase",
]
