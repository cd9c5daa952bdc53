"""One name per quantity: the glossary every output reads its names from.

Each :class:`Term` gives a quantity one key (the JSON key and the stem of the CSV
header), one text label, a symbol, the kind of unit it is shown in and what it means.
Keys that are not quantities (folders of a document, verdicts, settings) are listed in
:data:`FIELDS`; composed keys (``clearance_se``, ``plateau_concentration_p95``,
``time_to_90_percent``) follow :data:`PREFIXES`, :data:`SUFFIXES` and :data:`PATTERNS`.
:data:`ABBREVIATIONS` spells out every short form an output may print; :data:`FORMER`
lists the names earlier releases used (accepted as input for one release, never
written). ``docs/glossary.md`` is generated from this module
(``python -m pkcalc.glossary > docs/glossary.md``) and a test keeps the two equal.

This module imports nothing from pkcalc: every other module may read it.
"""

from __future__ import annotations

import re
import sys
import warnings
from dataclasses import dataclass

__all__ = [
    "ABBREVIATIONS",
    "AVOID",
    "FIELDS",
    "FORMER",
    "FORMER_OPTIONS",
    "FORMER_VALUES",
    "PATTERNS",
    "PREFIXES",
    "SUFFIXES",
    "TERMS",
    "UNITS",
    "FormerName",
    "Term",
    "abbreviations_used",
    "area_unit",
    "axis",
    "canonical_value",
    "explain",
    "former",
    "header",
    "is_known",
    "label",
    "markdown",
    "method_name",
    "term",
    "time_to_key",
    "time_to_keys",
    "time_to_label",
    "unit_of",
    "words",
]

#: Canonical unit of each kind (the same table as pkcalc.core; repeated here so the
#: glossary stays a leaf module, and checked equal by a test).
UNITS: dict[str, str] = {
    "time": "h", "amount": "mg", "volume": "L", "concentration": "mg/L",
    "clearance": "L/h", "rate": "mg/h", "elimination_rate": "1/h", "weight": "kg",
    "auc": "mg*h/L", "aumc": "mg*h^2/L", "percent": "%",
}


def area_unit(concentration: str, time: str, power: int = 1) -> str:
    """The unit of an area under a concentration curve: ``mg/L`` and ``h`` give ``mg*h/L``."""
    t = time if power == 1 else f"{time}^{power}"
    if "/" in concentration:
        top, bottom = concentration.split("/", 1)
        return f"{top}*{t}/{bottom}"
    return f"{concentration}*{t}"


@dataclass(frozen=True)
class Term:
    """One quantity: key, text label, symbol, unit kind and meaning."""

    key: str
    label: str
    kind: str | None
    symbol: str
    means: str


def _t(key, label, kind, symbol, means):
    return Term(key, label, kind, symbol, means)


#: Every quantity an output names (key, label, unit kind, symbol, meaning).
TERMS: tuple[Term, ...] = (
    # parameters of the one-compartment model
    _t("clearance", "clearance", "clearance", "CL",
       "volume of plasma cleared of drug per unit time; plateau = rate / clearance"),
    _t("volume", "volume of distribution", "volume", "V",
       "amount in the body divided by the plasma level"),
    _t("elimination_rate", "elimination rate constant", "elimination_rate", "k",
       "first-order rate of fall of the level: clearance / volume"),
    _t("half_life", "half-life", "time", "t½",
       "time for the level to halve after dosing stops: ln 2 / k"),
    _t("time_constant", "time constant", "time", "τ",
       "volume / clearance = 1 / k: the level reaches 63.2 % of its plateau after one"),
    _t("central_volume", "central volume", "volume", "V1",
       "volume of the first compartment of the two-exponential check"),
    _t("peripheral_volume", "peripheral volume", "volume", "V2",
       "volume of the second compartment of the two-exponential check"),
    _t("intercompartmental_clearance", "exchange clearance", "clearance", "Q",
       "clearance between the two compartments of the two-exponential check"),
    _t("distribution_half_life", "distribution half-life", "time", "t½,fast",
       "half-life of the fast phase of the two-exponential check"),
    _t("fast_fraction", "fast-phase share", "fraction", "",
       "share of the area belonging to the fast phase (0-1)"),
    # levels and their timing
    _t("concentration", "concentration", "concentration", "C", "plasma level"),
    _t("plateau_concentration", "plateau", "concentration", "Css",
       "level a constant infusion approaches: rate / clearance"),
    _t("plateau", "plateau", "concentration", "Css",
       "level a constant infusion approaches: rate / clearance"),
    _t("steady_state_peak", "peak at steady state", "concentration", "Cmax,ss",
       "highest level of a dosing interval once the regimen has settled"),
    _t("steady_state_trough", "trough at steady state", "concentration", "Cmin,ss",
       "level just before the next dose once the regimen has settled"),
    _t("steady_state_average", "average at steady state", "concentration", "Cavg,ss",
       "AUC of one interval divided by its length at steady state"),
    _t("peak", "peak", "concentration", "Cmax", "highest level of a dosing interval"),
    _t("trough", "trough", "concentration", "Cmin", "level just before the next dose"),
    _t("average", "average level", "concentration", "Cavg",
       "AUC over an interval divided by its length"),
    _t("level", "level", "concentration", "C", "a measured or predicted plasma level"),
    _t("highest", "highest level", "concentration", "", "highest level of the projected course"),
    _t("lowest_after_loading", "lowest level after loading", "concentration", "",
       "lowest level of the projected course after the loading dose"),
    _t("first_dose_peak", "peak after the first dose", "concentration", "", ""),
    _t("start_level", "level at the start", "concentration", "",
       "projected level when the proposal begins"),
    _t("level_at_start", "level at the start", "concentration", "",
       "estimated level when the proposal begins"),
    _t("level_at_72h", "level at 72 h", "concentration", "",
       "projected level 72 h after the start"),
    _t("pre_dose_level", "pre-dose level", "concentration", "", "level just before a dose"),
    _t("peak_at_end_of_infusion", "peak at the end of the infusion", "concentration", "", ""),
    _t("trough_at_end_of_interval", "trough at the end of the interval", "concentration", "", ""),
    _t("peak_concentration", "highest observed level", "concentration", "Cmax",
       "highest measured level (NCA)"),
    _t("peak_time", "time of the highest level", "time", "Tmax", "(NCA)"),
    _t("min_concentration", "lowest observed level", "concentration", "Cmin",
       "lowest measured level in the interval (NCA)"),
    _t("trough_concentration", "trough", "concentration", "Ctrough",
       "level at the end of the interval (NCA)"),
    _t("trough_source", "trough from", None, "",
       "whether the trough was measured or read off the curve"),
    _t("last_concentration", "last measurable level", "concentration", "Clast", "(NCA)"),
    _t("last_time", "time of the last measurable level", "time", "Tlast", "(NCA)"),
    _t("average_concentration", "average level", "concentration", "Cavg",
       "AUC over the interval divided by its length (NCA)"),
    _t("fluctuation_percent", "fluctuation", "percent", "",
       "(highest - lowest) / average level over the interval"),
    _t("accumulation_ratio", "accumulation ratio", None, "",
       "AUC of the interval divided by the AUC of the first interval"),
    # areas
    _t("auc", "AUC", "auc", "AUC", "area under the concentration-time curve"),
    _t("auc_24", "AUC over 24 h", "auc", "AUC24",
       "area under the curve over 24 h at steady state"),
    _t("auc_first_24", "AUC over the first 24 h", "auc", "AUC0-24", ""),
    _t("lowest_auc_24_window", "lowest AUC of any 24-h window", "auc", "", ""),
    _t("highest_auc_24_window", "highest AUC of any 24-h window", "auc", "", ""),
    _t("auc_to_last", "AUC to the last level", "auc", "AUClast", "(NCA, trapezoids)"),
    _t("auc_to_infinity", "AUC to infinity", "auc", "AUCinf",
       "AUC to the last level plus last level / terminal slope"),
    _t("auc_interval", "AUC over the interval", "auc", "AUCtau", "(NCA)"),
    _t("auc_extrapolated_percent", "AUC extrapolated", "percent", "",
       "share of AUC to infinity beyond the last level"),
    _t("aumc", "AUMC", "aumc", "AUMC", "area under the first-moment curve"),
    _t("aumc_to_last", "AUMC to the last level", "aumc", "AUMClast", ""),
    _t("aumc_to_infinity", "AUMC to infinity", "aumc", "AUMCinf", ""),
    _t("terminal_slope", "terminal slope", "elimination_rate", "λz",
       "slope of ln(level) over the terminal points"),
    _t("terminal_half_life", "terminal half-life", "time", "t½,z", "ln 2 / terminal slope"),
    _t("adjusted_r2", "adjusted R²", None, "R²adj", "fit of the terminal log-linear line"),
    _t("points_used", "terminal points", None, "", "times of the points of the terminal slope"),
    _t("mean_residence_time", "mean residence time", "time", "MRT", "AUMC / AUC"),
    _t("volume_terminal", "volume (terminal phase)", "volume", "Vz", "clearance / terminal slope"),
    _t("volume_steady_state", "volume at steady state", "volume", "Vss", "clearance * MRT"),
    # doses and regimens
    _t("dose", "dose", "amount", "D", "amount per administration"),
    _t("amount", "amount", "amount", "", "amount of one dose"),
    _t("first_dose", "first dose", "amount", "", ""),
    _t("reference_dose", "reference dose", None, "",
       "the dose the levels of an NCA are counted from (its number)"),
    _t("loading_dose", "loading dose", "amount", "", "extra dose given at the start"),
    _t("loading_time", "loading infusion time", "time", "", "length of the loading infusion"),
    _t("rate", "infusion rate", "rate", "R0", "amount per unit time of an infusion"),
    _t("duration", "infusion time", "time", "", "length of one infusion"),
    _t("infusion_time", "infusion time", "time", "Tinf", "length of one infusion"),
    _t("interval", "dosing interval", "time", "τdose", "time from one dose to the next"),
    _t("every", "dosing interval", "time", "", "time from one dose to the next"),
    _t("count", "number of doses", None, "", ""),
    _t("start", "start", "time", "", "time of the first dose of a record or proposal"),
    _t("first_dose_time", "time of the first dose", "time", "", ""),
    _t("first_dose_at", "time of the first dose", "time", "", ""),
    _t("hold", "hold", "time", "", "time without drug before the new regimen starts"),
    _t("pause_before_new_rate", "pause before the new rate", "time", "", ""),
    _t("salt_factor", "salt factor", None, "S", "share of the weighed amount that is active drug"),
    _t("time_below_trough_max", "time below the trough limit", "time", "",
       "longest time per interval the projected level stays below the trough limit"),
    _t("time", "time", "time", "t", "time since the time origin"),
    _t("ratio_rule_rate", "ratio-rule rate", "rate", "",
       "old rate x target / level: valid at steady state only, listed for reference"),
    _t("ratio_rule_dose", "ratio-rule dose", "amount", "",
       "old dose x target / level: valid at steady state only, listed for reference"),
    _t("rate_for_target", "rate for the target", "rate", "", ""),
    _t("loading_dose_for_target", "loading dose for the target", "amount", "", ""),
    _t("earliest_sampling_after_infusion", "draw levels from", "time", "",
       "earliest time after the end of an infusion that avoids a distribution phase"),
    _t("likelihood_ratio_statistic", "likelihood-ratio statistic", None, "",
       "difference in -2 ln L of two nested models"),
    _t("length", "interval length", "time", "", ""),
    # plateau approach
    _t("time_to_within_5_percent", "time to within 5 % of the plateau", "time", "", ""),
    # estimation
    _t("objective", "-2 ln L", None, "-2 ln L", "minus twice the log-likelihood"),
    _t("approximate_minus_2_ln_l", "approximate -2 ln L", None, "",
       "the iterative method's objective at each iteration"),
    _t("objective_per_iteration", "approximate -2 ln L per iteration", None, "", ""),
    _t("objective_one_compartment", "-2 ln L (one compartment)", None, "", ""),
    _t("objective_two_exponential", "-2 ln L (two exponentials)", None, "", ""),
    _t("aic", "AIC", None, "AIC", "Akaike information criterion: -2 ln L + 2 p"),
    _t("bic", "BIC", None, "BIC", "Bayesian information criterion: -2 ln L + p ln n"),
    _t("delta_aic", "AIC difference", None, "ΔAIC",
       "AIC of two exponentials minus AIC of one compartment"),
    _t("likelihood_ratio_p", "likelihood-ratio test p", "p", "", ""),
    _t("likelihood_ratio_df", "likelihood-ratio test degrees of freedom", None, "", ""),
    _t("runs_test_p", "runs test p", "p", "", "runs of residual signs (Wald-Wolfowitz)"),
    _t("trend_test_p", "trend test p", "p", "", "trend of residuals with time"),
    _t("runs", "runs", None, "", "number of runs of residual signs"),
    _t("n_levels", "levels", None, "n", "number of levels used"),
    _t("n_blq", "BLQ levels", None, "", "number of levels below the LLOQ"),
    _t("n_parameters", "parameters", None, "p", "number of estimated parameters"),
    _t("levels", "levels", None, "", "number of levels (or the levels themselves)"),
    _t("levels_after_infusion", "levels after the infusion", None, "", ""),
    _t("se", "SE", None, "SE", "standard error"),
    _t("rse_percent", "RSE", "percent", "RSE", "relative standard error: SE / estimate"),
    _t("ci_low", "95 % CI low", None, "", "lower end of the 95 % confidence interval"),
    _t("ci_high", "95 % CI high", None, "", "upper end of the 95 % confidence interval"),
    _t("correlation", "correlation", None, "r", ""),
    _t("correlation_clearance_volume", "correlation of CL and V estimates", None, "", ""),
    _t("condition_number", "condition number", None, "",
       "largest / smallest eigenvalue of the correlation matrix of the estimates"),
    _t("iterations", "iterations", None, "", ""),
    _t("starts", "starts", None, "", "number of optimiser starts"),
    _t("starts_agreed", "starts that agree", None, "", ""),
    _t("nodes", "quadrature nodes", None, "",
       "Gauss-Hermite nodes per dimension (1 = Laplace approximation)"),
    _t("weighted_residual", "weighted residual", None, "", "residual / its standard deviation"),
    _t("residual", "residual", "concentration", "", "observed - predicted level"),
    _t("observed", "observed level", "concentration", "", ""),
    _t("predicted", "predicted level", "concentration", "", ""),
    _t("additive", "additive residual SD", "concentration", "", ""),
    _t("proportional", "proportional residual SD", None, "", "as a fraction of the level"),
    _t("residual_proportional", "proportional residual SD", None, "", ""),
    # population
    _t("typical", "typical value", None, "", "value of a subject at the reference covariates"),
    _t("typical_clearance", "typical clearance", "clearance", "", ""),
    _t("typical_volume", "typical volume", "volume", "", ""),
    _t("variability_cv_percent", "between-subject CV", "percent", "CV",
       "between-subject coefficient of variation"),
    _t("variability_sd_log", "between-subject SD of the log", None, "", ""),
    _t("variance_clearance", "between-subject variance of ln CL", None, "", ""),
    _t("variance_volume", "between-subject variance of ln V", None, "", ""),
    _t("cv_clearance", "between-subject CV of clearance", None, "", "as a fraction"),
    _t("cv_volume", "between-subject CV of volume", None, "", "as a fraction"),
    _t("between_subject_covariance_log", "between-subject covariance of ln CL and ln V",
       None, "", ""),
    _t("shrinkage_percent", "shrinkage", "percent", "",
       "1 - SD of the individual deviations / between-subject SD"),
    _t("ln_clearance_deviation", "ln CL deviation from typical", None, "", ""),
    _t("ln_volume_deviation", "ln V deviation from typical", None, "", ""),
    _t("exponents", "weight exponents", None, "", ""),
    _t("exponent_ci", "95 % CI of the weight exponents", None, "", ""),
    _t("reference", "reference value", None, "", "covariate value of the typical subject"),
    _t("reference_weight", "reference weight", "weight", "", "weight of the typical subject"),
    _t("reference_weight_kg", "reference weight", "weight", "", "weight of the typical subject"),
    _t("weight", "body weight", "weight", "WT", ""),
    # design, attainment and sampling
    _t("target", "target", None, "", "what the regimen should reach"),
    _t("window", "target window", "concentration", "", "lowest and highest acceptable level"),
    _t("peak_limits", "peak limits", "concentration", "", ""),
    _t("trough_limits", "trough limits", "concentration", "", ""),
    _t("clearance_exact", "clearance (exact)", "clearance", "", ""),
    _t("clearance_chiou", "clearance (Chiou)", "clearance", "", "Chiou's two-point estimate"),
    _t("chiou_minus_exact_percent", "Chiou minus exact", "percent", "", ""),
    _t("prior_variance_remaining_clearance_percent", "prior variance left (clearance)",
       "percent", "", ""),
    _t("prior_variance_remaining_volume_percent", "prior variance left (volume)", "percent",
       "", ""),
    _t("attainment", "chance of meeting the target", None, "",
       "posterior probability that the target holds over the projected course"),
    _t("attainment_level", "required chance", None, "", ""),
    _t("joint", "chance of meeting every target", None, "", ""),
    _t("effective_sample_size", "effective sample size", None, "", ""),
    _t("band", "90 % band", "concentration", "", "5th-95th percentile of the projected level"),
    _t("q05", "5th percentile", None, "", ""),
    _t("q50", "median", None, "", ""),
    _t("q95", "95th percentile", None, "", ""),
    _t("p05", "5th percentile", None, "", ""),
    _t("p50", "median", None, "", ""),
    _t("p95", "95th percentile", None, "", ""),
    _t("efficiency", "efficiency", None, "",
       "information of a schedule relative to the best one found"),
    _t("log_det_information", "ln det of the expected information", None, "", ""),
    _t("expected_rse_percent", "expected RSE", "percent", "", ""),
    _t("fraction_in_window", "share of scenarios in the window", None, "", "0-1"),
    _t("in_window", "in the window", None, "", "true when the level lies in the window"),
    # batch
    _t("population", "virtual subjects", None, "", "number of virtual subjects per scenario"),
    _t("seconds", "seconds", None, "s", "wall time"),
    _t("peak_memory_mb", "peak memory", None, "MB", ""),
    _t("partition_rows", "rows per partition", None, "", ""),
    _t("partitions", "partitions", None, "", ""),
    _t("workers", "workers", None, "", ""),
)

#: Keys that are not quantities: parts of a document, settings and verdicts.
FIELDS: dict[str, str] = {
    "adequacy": "the check whether one compartment describes a subject",
    "adequacy_check": "setting: run the adequacy check",
    "adequacy_summary": "counts of the adequacy verdicts",
    "adequate": "verdict: one compartment describes the levels",
    "distribution_phase": "verdict: a distribution phase is visible",
    "too_few_levels": "verdict: too few levels to tell",
    "allowed": "allowed sampling windows",
    "assumed": "values the method assumed rather than estimated",
    "assumptions": "what an NCA assumed about the doses",
    "at": "times at which levels are reported",
    "auc_method": "setting: trapezoid rule of the NCA",
    "between_subject": "setting: full or diagonal between-subject covariance",
    "blq": "setting or flag: levels below the LLOQ",
    "blq_method": "how BLQ levels entered the fit",
    "bootstrap": "bootstrap replicates",
    "cases": "verification cases",
    "causes": "likely reasons for a disagreement",
    "caution": "the clinical-use caution",
    "checks": "expected values of a verification case",
    "clock_origin": "date-time of time zero",
    "clock_times": "clock times of planned samples",
    "command": "the pkcalc command that wrote the file",
    "comparison": "the models compared",
    "comparison_with_nca": "fitted against NCA values",
    "common_effects": "effects every compared model holds",
    "compared_with": "the model a likelihood-ratio test is against",
    "computed": "value pkcalc computed",
    "converged": "true when the optimiser converged",
    "covariate": "the body-weight model",
    "criterion": "sampling design criterion",
    "current": "the current regimen",
    "design": "a design (or its kind)",
    "design_caution": "caution printed with every design",
    "designs": "designs of a run",
    "difference": "computed - expected",
    "differences": "differences behind an adequacy verdict",
    "distribution": "percentiles across scenarios",
    "doses": "dose records",
    "effect": "a covariate effect",
    "effects": "covariate effects",
    "engine": "local or dask",
    "error": "why a row could not be computed",
    "error_model": "residual error model",
    "errors": "problems found",
    "estimates": "estimated values",
    "exact": "the unrounded proposal",
    "expected": "expected value (source beside it)",
    "failed": "number that failed",
    "failures": "items that failed",
    "first_errors": "the first problems found",
    "fit": "the fitted value",
    "flags": "plausibility flags",
    "folder": "output folder of a scenario",
    "formulas": "steady-state formulas listed apart from the estimates",
    "groups": "groups of a sampling design",
    "information_parameters": "parameters the sampling design is for",
    "input": "the input file",
    "intervals": "per-interval NCA results (or the setting)",
    "key": "a name from this glossary",
    "kind": "kind of an interval or row",
    "label": "a proposal's description",
    "meets_target": "true when the projected course meets the target",
    "message": "a sentence for the reader",
    "method": "the method used",
    "mode": "NCA mode (single dose, steady state, total exposure)",
    "model": "model name",
    "models": "the models compared",
    "name": "a name",
    "names": "parameter names",
    "nca": "the NCA value",
    "nested_pairs": "likelihood-ratio tests of nested models",
    "not_computed": "why a value is missing",
    "no_coverage_reason": "why the interval coverage of a simulation is missing",
    "notes": "notes",
    "number": "a sequence number",
    "one_compartment": "adequacy verdict of a subject",
    "options": "the options of a run",
    "output": "the output file",
    "parameters": "parameter values or table",
    "partitioned": "true when the output is a partitioned dataset",
    "passed": "true when within tolerance",
    "percentiles": "percentiles across replicates",
    "pkcalc_version": "version that wrote the file",
    "plateau_basis": "what the plateau is the plateau of (which rate, and why)",
    "sampling_caution": "caution printed with every sampling design",
    "prior": "the prior of a MAP estimate",
    "profile": "the predicted level over time",
    "quantity": "a key from this glossary",
    "ratio": "fit / NCA",
    "reason": "why",
    "regimen": "a regimen (or its description)",
    "regimens": "proposed regimens",
    "regular_doses": "setting: tolerance for regular dosing",
    "residual_error": "residual error estimates",
    "rows": "rows",
    "iteration": "number of an outer iteration of the estimation",
    "group": "group of a sampling design",
    "clock_time": "date and time of day (ISO 8601)",
    "sample": "number of a sample within its group (1, 2, ...)",
    "scenario": "scenario name",
    "scenarios": "scenarios",
    "seed": "random seed",
    "selected": "the model selected",
    "settings": "the settings of a run",
    "simulation": "simulate-and-refit results",
    "source": "where an expected value comes from",
    "standard_errors": "standard errors from the observed information",
    "status": "verdict of a proposal: meets target, check levels, ...",
    "step": "forward or backward",
    "stepwise": "the stepwise path",
    "accepted": "true when the step changed the model",
    "steady_state": "whether the levels are at steady state",
    "subject": "subject identifier",
    "subjects": "subjects (or number of subjects)",
    "suspects": "levels that look inconsistent",
    "text": "a sentence",
    "times": "times (or the setting saying what times are)",
    "title": "title of the run",
    "tolerance": "allowed difference",
    "two_exponential_sensitivity_check": "the two-exponential refit",
    "typical_ci": "95 % CI of the typical values",
    "typical_se": "SE of the typical values",
    "typical_units": "units of the typical values",
    "unit": "unit of a value",
    "units": "display units",
    "validity": "when a formula holds",
    "value": "a value",
    "verdict": "a verdict",
    "warnings": "warnings",
    "weight_model": "setting: the body-weight model",
    "weighting": "setting: least-squares weights",
    "lrt": "likelihood-ratio test",
    "folder_name": "folder name",
    "case": "verification case",
}

#: Composed keys: prefix + glossary key.
PREFIXES: dict[str, str] = {
    "predicted_": "projected by the model for a proposal",
    "attainment_": "chance of meeting the target for",
    "adequacy_": "adequacy check:",
    "expected_rse_": "expected RSE of",
    "typical_": "typical value of",
}

#: Composed keys: glossary key + suffix.
SUFFIXES: dict[str, str] = {
    "_se": "standard error",
    "_rse_percent": "relative standard error (%)",
    "_ci_low": "lower end of the 95 % confidence interval",
    "_ci_high": "upper end of the 95 % confidence interval",
    "_p05": "5th percentile across virtual subjects",
    "_p50": "median across virtual subjects",
    "_p95": "95th percentile across virtual subjects",
}

#: Keys with a number in them: display form -> (regular expression, meaning).
PATTERNS: dict[str, tuple[str, str]] = {
    "time_to_N_percent": (r"time_to_\d+(?:\.\d+)?_percent",
                          "time for a constant infusion to reach N % of its plateau (h)"),
    "half_lives_to_N_percent": (r"half_lives_to_\d+(?:\.\d+)?_percent",
                                "the same time counted in half-lives"),
    "concentration_at_Nh": (r"concentration_at_\d+(?:\.\d+)?h", "level at N h (mg/L)"),
    "in_window_at_Nh, in_window_at_steady_state": (
        r"in_window_at_(?:\d+(?:\.\d+)?h|steady_state)",
        "true when the level lies in the target window"),
    "fraction_in_window_at_Nh, fraction_in_window_at_steady_state": (
        r"fraction_in_window_at_(?:\d+(?:\.\d+)?h|steady_state)",
        "share of virtual subjects in the target window (0-1)"),
    "window_low, window_high": (r"window_(?:low|high)", "ends of the target window (mg/L)"),
}

#: Short forms an output may print, spelled out once per output.
ABBREVIATIONS: dict[str, str] = {
    "AIC": "Akaike information criterion",
    "AUC": "area under the concentration-time curve",
    "AUC24": "area under the concentration-time curve over 24 hours",
    "AUMC": "area under the first-moment curve",
    "BIC": "Bayesian information criterion",
    "BLQ": "below the lower limit of quantification",
    "CI": "confidence interval",
    "CL": "clearance",
    "CV": "coefficient of variation",
    "LLOQ": "lower limit of quantification",
    "MAP": "maximum a posteriori (Bayesian) estimate",
    "MRT": "mean residence time",
    "NCA": "non-compartmental analysis",
    "RSE": "relative standard error",
    "SD": "standard deviation",
    "SE": "standard error",
    "V": "volume of distribution",
    "Cmax": "highest observed level",
    "Tmax": "time of the highest observed level",
    "Cavg": "average level over the interval",
    "AUClast": "AUC to the last measurable level",
    "AUCinf": "AUC to infinity",
    "AUCtau": "AUC over one dosing interval",
    "λz": "terminal slope",
    "Vz": "volume from the terminal slope",
    "Vss": "volume at steady state",
    "-2 ln L": "minus twice the log-likelihood",
    "ΔAIC": "difference in AIC",
    "p": "probability of a difference at least this large by chance",
}

#: Method names as printed (the value in files and JSON -> the name in text).
METHOD_NAMES: dict[str, str] = {
    "sawchuk_zaske": "Sawchuk–Zaske", "chiou": "Chiou", "map": "Bayesian MAP",
    "proportional": "proportional", "two_stage": "standard two-stage",
    "iterative": "iterative two-stage", "marginal": "maximum marginal likelihood",
    "linear_up_log_down": "linear up, log down", "likelihood": "likelihood (M3)",
}


def method_name(value: str) -> str:
    """A method as printed in text: ``sawchuk_zaske`` -> "Sawchuk–Zaske"."""
    return METHOD_NAMES.get(value, value.replace("_", " "))


#: Former output names -> current names (earlier releases; not written any more).
FORMER: dict[str, str] = {
    "time_to_90pct": "time_to_90_percent",
    "time_to_50pct": "time_to_50_percent",
    "time_to_95pct": "time_to_95_percent",
    "time_to_99pct": "time_to_99_percent",
    "time_to_within_5pct": "time_to_within_5_percent",
    "time_to_fraction": "time_to_N_percent",
    "time_to_fraction_half_lives": "half_lives_to_N_percent",
    "covariance_step": "standard_errors",
    "not_enough_data": "too_few_levels",
    "n_obs": "n_levels",
    "n_params": "n_parameters",
    "lrt_p": "likelihood_ratio_p",
    "lrt_df": "likelihood_ratio_df",
    "adequacy_lrt_p": "adequacy_likelihood_ratio_p",
    "adequacy_runs_p": "adequacy_runs_test_p",
    "adequacy_trend_p": "adequacy_trend_test_p",
}

#: Former command-line options -> current options (accepted for one release).
FORMER_OPTIONS: dict[str, str] = {
    "--p-in": "--add-if-p-below",
    "--p-out": "--remove-if-p-above",
    "--blq-rule": "--blq",
}

#: Former option values -> current values (accepted for one release, in files and options).
FORMER_VALUES: dict[str, str] = {
    "two-stage": "two_stage",
    "linear-up-log-down": "linear_up_log_down",
}

#: Spellings no output may contain (regular expression -> the glossary's word instead).
AVOID: dict[str, str] = {
    r"(?i)half life": "half-life",
    r"t1/2|t½": "half-life",
    r"elimination rate(?! constant)(?!s)": "elimination rate constant",
    r"mg/L\*h": "mg*h/L",
    r"(?i)covariance[ _]step": "standard errors (observed information)",
    r"(?i)sawchuk zaske": "Sawchuk–Zaske",
    r"time_to_fraction": "time_to_N_percent",
    r"\dpct\b": "N_percent",
    r"not_enough_data": "too_few_levels",
    r"-2lnL": "-2 ln L",
    r"\bdAIC\b": "ΔAIC",
    r"\bLRT\b": "likelihood-ratio test",
    r"(?i)from memory": "(sources belong in the docs, not in results)",
    r"(?i)cholesky": "(say what the number is)",
    r"(?i)classical new rate": "steady-state proportional rate",
    r"\b(?:None|True|False)\b": "-, yes, no",
}

_BY_KEY: dict[str, Term] = {t.key: t for t in TERMS}


def term(key: str) -> Term:
    """The :class:`Term` of a key (KeyError naming the key when it is not in the glossary)."""
    if key in _BY_KEY:
        return _BY_KEY[key]
    m = re.fullmatch(r"time_to_(\d+(?:\.\d+)?)_percent", key)
    if m:
        return Term(key, time_to_label(float(m.group(1)) / 100.0), "time", "", "")
    m = re.fullmatch(r"(fraction_)?in_window_at_(\d+(?:\.\d+)?h|steady_state)", key)
    if m:
        when = m.group(2).replace("_", " ").replace("h", " h") if m.group(2)[0].isdigit() \
            else "at steady state"
        when = when if when == "at steady state" else f"at {when}"
        if m.group(1):
            return Term(key, f"share of virtual subjects in the window {when}", "fraction", "",
                        "0-1")
        return Term(key, f"in the window {when}", None, "", "")
    m = re.fullmatch(r"concentration_at_(\d+(?:\.\d+)?)h", key)
    if m:
        return Term(key, f"level at {m.group(1)} h", "concentration", "", "")
    raise KeyError(f"{key!r} is not in the glossary (pkcalc/glossary.py)")


def unit_of(key: str, units: dict[str, str] | None = None) -> str:
    """Display unit of a key ("" for a number without unit); ``units`` maps kind -> unit."""
    kind = term(key).kind
    table = {**UNITS, **(units or {})}
    if kind in ("auc", "aumc") and units and ("concentration" in units or "time" in units):
        return area_unit(table["concentration"], table["time"], 1 if kind == "auc" else 2)
    return table.get(kind, "") if kind and kind != "fraction" else ""


def label(key: str) -> str:
    """Text label of a key."""
    return term(key).label


def words(key: str) -> str:
    """The text label of a key, or its words when it is not a quantity of the glossary."""
    try:
        return term(key).label
    except KeyError:
        return key.replace("_", " ")


def header(key: str, unit: str | None = None) -> str:
    """CSV header of a key: ``key [unit]`` (just the key for a number without unit)."""
    u = unit_of(key) if unit is None else unit
    return f"{key} [{u}]" if u else key


def axis(key: str, unit: str | None = None) -> str:
    """Axis or column label of a key: ``label [unit]`` (as in the terminal's tables)."""
    u = unit_of(key) if unit is None else unit
    return f"{label(key)} [{u}]" if u else label(key)


def time_to_key(fraction: float) -> str:
    """Key of the time to a fraction of the plateau: 0.9 -> ``time_to_90_percent``."""
    return f"time_to_{fraction * 100:g}_percent"


def time_to_label(fraction: float) -> str:
    """Text label of the time to a fraction of the plateau: 0.9 -> "time to 90 % of plateau"."""
    return f"time to {fraction * 100:g} % of plateau"


def time_to_keys(doc) -> list[tuple[float, str]]:
    """The ``time_to_N_percent`` keys of a document with their fractions, in order."""
    out = []
    for key in doc:
        m = re.fullmatch(r"time_to_(\d+(?:\.\d+)?)_percent", key)
        if m:
            out.append((float(m.group(1)) / 100.0, key))
    return out


def _base_known(key: str) -> bool:
    return (key in _BY_KEY or key in FIELDS
            or any(re.fullmatch(rx, key) for rx, _ in PATTERNS.values()))


def is_known(key: str) -> bool:
    """True when a JSON key or CSV header stem is a glossary name (plain or composed)."""
    key = key.split(" [", 1)[0]
    if _base_known(key):
        return True
    for s in SUFFIXES:
        if key.endswith(s) and _base_known(key[: -len(s)]):
            return True
    for p in PREFIXES:
        if key.startswith(p) and is_known(key[len(p):]):
            return True
    return False


def _abbreviation_pattern(short: str) -> re.Pattern:
    return re.compile(r"(?<![\w-])" + re.escape(short) + r"(?![\w])")


_SPELLED = {a: _abbreviation_pattern(a) for a in ABBREVIATIONS if a not in ("p", "V")}


def abbreviations_used(text: str) -> list[str]:
    """The glossary's short forms that appear in ``text`` (in glossary order)."""
    return [a for a, pat in _SPELLED.items() if pat.search(text)]


def explain(text: str) -> str:
    """One line spelling out every short form used in ``text`` ("" when none is used)."""
    used = abbreviations_used(text)
    if not used:
        return ""
    return "Abbreviations: " + "; ".join(f"{a} = {ABBREVIATIONS[a]}" for a in used) + "."


class FormerName(FutureWarning):
    """A former name or spelling was given as input (accepted in this release only)."""


def former(old: str, new: str, where: str) -> None:
    """Warn (:class:`FormerName`) that ``old`` is the former name of ``new``."""
    warnings.warn(f"{where}: '{old}' is the former name; write '{new}' (the former name is "
                  "accepted in this release only)", FormerName, stacklevel=3)


def canonical_value(value: str, option: str) -> str:
    """An option value in its current spelling; a former spelling warns (:class:`FormerName`)."""
    if isinstance(value, str) and value in FORMER_VALUES:
        new = FORMER_VALUES[value]
        former(value, new, option)
        return new
    return value


def _unit_text(t: Term) -> str:
    if t.kind in UNITS:
        return UNITS[t.kind]
    return {"p": "0-1", "fraction": "0-1"}.get(t.kind or "", "-")


def markdown() -> str:
    """docs/glossary.md, generated from this module."""
    out = ["# Glossary", "",
           "One name per quantity. Every output of pkcalc — terminal text, JSON keys, CSV "
           "headers, HTML reports and plots — takes its names from this table (generated "
           "from `pkcalc/glossary.py`; regenerate with `python -m pkcalc.glossary > "
           "docs/glossary.md`). CSV headers are `key [unit]`; JSON documents state their "
           "units under `units`; terminal tables and plots label columns and axes "
           "`label [unit]`. Units below are the canonical ones; display units follow "
           "`[output]` of a scenario.", "",
           "## Quantities", "",
           "| key (JSON, CSV) | text label | symbol | unit | meaning |",
           "|---|---|---|---|---|"]
    for t in TERMS:
        out.append(f"| `{t.key}` | {t.label} | {t.symbol or '-'} | {_unit_text(t)} | "
                   f"{t.means or '-'} |")
    out += ["", "## Composed keys", "",
            "| form | meaning |", "|---|---|"]
    out += [f"| `{p}<key>` | {m} |" for p, m in PREFIXES.items()]
    out += [f"| `<key>{s}` | {m} |" for s, m in SUFFIXES.items()]
    out += [f"| `{shown}` | {m} |" for shown, (_, m) in PATTERNS.items()]
    out += ["", "## Other keys", "", "| key | what it holds |", "|---|---|"]
    out += [f"| `{k}` | {v} |" for k, v in sorted(FIELDS.items())]
    out += ["", "## Abbreviations", "",
            "Each output spells out the abbreviations it uses once (terminal text: a line at "
            "the end; HTML: the terms section, linked from the contents).", "",
            "| short form | spelled out |", "|---|---|"]
    out += [f"| {a} | {m} |" for a, m in ABBREVIATIONS.items()]
    out += ["", "## Former names", "",
            "Earlier releases wrote these names. Outputs use the new ones; as input (option "
            "names, option values, keys of study files) the former names are accepted in "
            "this release with a deprecation note, and will be refused in the next.", "",
            "| former | now |", "|---|---|"]
    out += [f"| `{a}` | `{b}` |" for a, b in {**FORMER, **FORMER_OPTIONS,
                                               **FORMER_VALUES}.items()]
    return "\n".join(out) + "\n"


if __name__ == "__main__":  # pragma: no cover - regeneration helper
    sys.stdout.write(markdown())
