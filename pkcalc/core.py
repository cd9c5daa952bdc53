"""The plain domain types every part of pkcalc shares (numpy and the standard library only).

Dose events, a scenario, a subject's data, a study, fit and population options, a
prior and a design request -- in canonical units (h, mg, L, mg/L, L/h, mg/h, 1/h).
The file boundary (:mod:`pkcalc.schema`) builds them from files; the compute
modules take and return them.  Each validates itself in ``__post_init__`` and
raises ``ValueError`` naming the field, so a wrong value made in Python fails
where it is made, not later.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from . import model
from .errors import PkcalcInputError

__all__ = [
    "BLQ_METHODS",
    "CANONICAL_UNITS",
    "CI_METHODS",
    "EFFECT_FORMS",
    "ERROR_MODELS",
    "MIN_SALT_FACTOR",
    "NCA_AUC_METHODS",
    "NCA_BLQ_RULES",
    "NCA_INTERVALS",
    "POPULATION_METHODS",
    "WEIGHTINGS",
    "DesignCase",
    "DoseEvent",
    "Effect",
    "FitOptions",
    "NcaOptions",
    "PopulationModel",
    "PopulationOptions",
    "Prior",
    "SamplingGroup",
    "SamplingProblem",
    "ScenarioInput",
    "Study",
    "SubjectData",
    "Target",
    "expand_events",
]

#: The smallest salt factor accepted (the drug's share of the product; salts and esters
#: in use lie well above it -- common practice).
MIN_SALT_FACTOR = 0.05

#: The canonical unit of every kind of quantity: every number inside pkcalc is in these.
CANONICAL_UNITS: dict[str, str] = {
    "time": "h",
    "amount": "mg",
    "volume": "L",
    "concentration": "mg/L",
    "clearance": "L/h",
    "rate": "mg/h",
    "elimination_rate": "1/h",
    "weight": "kg",
    "auc": "mg*h/L",
    "aumc": "mg*h^2/L",
}

WEIGHTINGS = ("uniform", "inverse_observed", "inverse_observed_squared",
              "inverse_predicted_squared")
ERROR_MODELS = ("additive", "proportional", "combined")
BLQ_METHODS = ("drop", "likelihood", "half_lloq")
CI_METHODS = ("wald", "profile")
NCA_AUC_METHODS = ("linear_up_log_down", "linear")
NCA_BLQ_RULES = ("leading_zero", "zero", "drop")
NCA_INTERVALS = ("each", "first", "last")


def _check(ok: bool, name: str, rule: str, value: Any) -> None:
    if not ok:
        raise ValueError(f"{name} {rule}, got {_shown(value)}")


def _shown(value: Any) -> str:
    """A value for a message: short, and arrays by their size (never numpy's repr)."""
    if isinstance(value, np.ndarray):
        return f"an array of {value.size} values" if value.size > 3 else \
            "[" + ", ".join(f"{x:g}" if isinstance(x, float | np.floating) else str(x)
                            for x in value.tolist()) + "]"
    if isinstance(value, np.generic):
        value = value.item()
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _finite(x: Any) -> bool:
    try:
        return math.isfinite(float(x))
    except (TypeError, ValueError):
        return False


@dataclass(frozen=True)
class DoseEvent:
    """One dose event in canonical units (possibly repeated).

    Attributes
    ----------
    start : float, h
    amount : float, mg
    duration : float, h
        0 for a bolus.
    every : float or None, h
        Interval between repeats.
    count : int
        Number of doses (1 for a single dose).
    """

    start: float
    amount: float
    duration: float
    every: float | None = None
    count: int = 1

    def __post_init__(self) -> None:
        _check(_finite(self.start) and self.start >= 0, "start", "must be a finite time >= 0 h",
               self.start)
        _check(_finite(self.amount) and self.amount >= 0, "amount", "must be finite and >= 0 mg",
               self.amount)
        _check(_finite(self.duration) and self.duration >= 0, "duration",
               "must be finite and >= 0 h (0 for a bolus)", self.duration)
        _check(isinstance(self.count, int | np.integer) and not isinstance(self.count, bool)
               and self.count >= 1, "count", "must be a whole number >= 1", self.count)
        _check(self.every is None or (_finite(self.every) and self.every > 0), "every",
               "must be None or a positive interval in h", self.every)
        _check(self.count == 1 or self.every is not None, "every",
               "is needed when count > 1", self.every)

    @property
    def rate(self) -> float | None:
        """Infusion rate in mg/h (None for a bolus)."""
        return self.amount / self.duration if self.duration > 0 else None

    @property
    def end(self) -> float:
        """End of the last infusion of the event, h."""
        return self.start + (self.count - 1) * (self.every or 0.0) + self.duration


def expand_events(doses: Iterable[DoseEvent]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Single events (start, amount, duration arrays) of a dose list, repeats expanded."""
    doses = list(doses)
    return model.expand_doses(
        [d.start for d in doses],
        [d.amount for d in doses],
        [d.duration for d in doses],
        every=[d.every if d.every is not None else 0.0 for d in doses],
        count=[d.count for d in doses],
    )


@dataclass(frozen=True)
class Target:
    """A target plateau and/or a window, mg/L."""

    plateau: float | None = None
    low: float | None = None
    high: float | None = None

    def __post_init__(self) -> None:
        for name in ("plateau", "low", "high"):
            x = getattr(self, name)
            _check(x is None or (_finite(x) and x >= 0), name, "must be None or >= 0 mg/L", x)
        if self.low is not None and self.high is not None:
            _check(self.low < self.high, "low", f"must be below high ({self.high})", self.low)


@dataclass(frozen=True)
class ScenarioInput:
    """A validated scenario in canonical units (what :mod:`pkcalc.predict` consumes).

    Attributes
    ----------
    name : str
    clearance : float, L/h
    volume : float, L
    doses : tuple of DoseEvent
    times : ndarray or None, h
        Requested output times (sorted, non-negative); None lets pkcalc choose.
    weight : float or None, kg
    target : Target or None
    given : tuple of str
        The parameter names the user gave (for reports).
    initial_concentration : float, mg/L
        Drug on board at time 0 (earlier therapy), decaying with k.
    """

    name: str
    clearance: float
    volume: float
    doses: tuple[DoseEvent, ...]
    times: np.ndarray | None = None
    weight: float | None = None
    target: Target | None = None
    given: tuple[str, ...] = ()
    extra: dict[str, Any] = field(default_factory=dict)
    initial_concentration: float = 0.0

    def __post_init__(self) -> None:
        for name in ("clearance", "volume"):
            x = getattr(self, name)
            _check(_finite(x) and x > 0, name, "must be a positive finite number", x)
        _check(_finite(self.initial_concentration) and self.initial_concentration >= 0,
               "initial_concentration", "must be >= 0 mg/L", self.initial_concentration)
        _check(isinstance(self.doses, list | tuple)
               and all(isinstance(d, DoseEvent) for d in self.doses), "doses",
               "must be a list of DoseEvent objects", self.doses)


@dataclass(frozen=True)
class SubjectData:
    """One subject's levels and doses in canonical units.

    Attributes
    ----------
    subject : str
    time : ndarray, h
        Sample times, sorted.
    conc : ndarray, mg/L
        Measured levels; NaN where a BLQ level carries no number.
    lloq : ndarray, mg/L
        Limit of quantification per level (NaN when not given).
    blq : ndarray of bool
        True where the level is below its LLOQ (marked, or a number under LLOQ).
    rows : ndarray of int
        Line numbers of the levels in their file (for messages).
    dose_start, dose_amount, dose_duration : ndarray, h, mg, h
        Dose events (duration 0 for a bolus).
    covariates : dict of str to float or str
        From the subjects table; ``weight`` in kg; text columns (categorical
        factors) as text.
    notes : tuple of str
        Data-handling notes (sorting, BLQ numbers below LLOQ).
    clock_origin : str or None
        ISO 8601 date-time of the first dose when the data came with clock times
        (times are hours since it).
    initial_concentration : float, mg/L
        Drug on board at time 0 from earlier therapy (decays with the subject's k);
        from an ``initial_concentration [..]`` column of the subjects table.
    reference_time : ndarray or None, h
        The start of the dose each level refers to (SDTM PCRFTDTC; NaN where not
        stated); None when no level states one.
    """

    subject: str
    time: np.ndarray
    conc: np.ndarray
    lloq: np.ndarray
    blq: np.ndarray
    rows: np.ndarray
    dose_start: np.ndarray
    dose_amount: np.ndarray
    dose_duration: np.ndarray
    covariates: dict[str, float | str] = field(default_factory=dict)
    notes: tuple[str, ...] = ()
    initial_concentration: float = 0.0
    clock_origin: str | None = None
    reference_time: np.ndarray | None = None

    def __post_init__(self) -> None:
        n = np.shape(self.time)[0] if np.ndim(self.time) else -1
        _check(self.reference_time is None or np.shape(self.reference_time) == (n,),
               "reference_time", f"must have one value per sample time ({n})",
               np.shape(self.reference_time))
        for name in ("conc", "lloq", "blq", "rows"):
            _check(np.shape(getattr(self, name)) == (n,), name,
                   f"must have one value per sample time ({n})", np.shape(getattr(self, name)))
        e = np.shape(self.dose_start)
        for name in ("dose_amount", "dose_duration"):
            _check(np.shape(getattr(self, name)) == e, name,
                   "must have one value per dose start", np.shape(getattr(self, name)))
        _check(_finite(self.initial_concentration) and self.initial_concentration >= 0,
               "initial_concentration", "must be >= 0 mg/L", self.initial_concentration)

    @property
    def weight(self) -> float | None:
        return self.covariates.get("weight")

    @property
    def n_blq(self) -> int:
        return int(self.blq.sum())


@dataclass
class Study:
    """Subjects that passed the checks, and those that did not.

    Attributes
    ----------
    subjects : list of SubjectData
    failures : list of (str, PkcalcInputError)
        ``("subject 'X'", problems)`` for subjects left out.
    warnings : list of str
        Table-level warnings (unknown columns, subjects in one table only).
    files : list of str
        The table files read.
    options : dict
        Raw option tables of a study TOML (``fit``, ``nca``, ``population``).
    title : str or None
    subjects_file : str or None
        The file the covariates came from (named by covariate problems).
    """

    subjects: list[SubjectData]
    failures: list[tuple[str, PkcalcInputError]] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    files: list[str] = field(default_factory=list)
    options: dict[str, Any] = field(default_factory=dict)
    title: str | None = None
    subjects_file: str | None = None
    output: dict[str, str] = field(default_factory=dict)
    import_report: dict[str, Any] = field(default_factory=dict)
    import_lines: list[str] = field(default_factory=list)
    tables: dict[str, Any] = field(default_factory=dict)
    level_trace: Any = None     # per level row: its source (SDTM: source, pcseq), or None

    def subject(self, name: str) -> SubjectData:
        """One subject's data (a PkcalcInputError listing the subjects if none has
        that name)."""
        for s in self.subjects:
            if s.subject == name:
                return s
        names = [s.subject for s in self.subjects]
        left = any(label == f"subject '{name}'" for label, _ in self.failures)
        raise PkcalcInputError(
            f"no subject '{name}'" + (" (it was left out: see failures)" if left else ""),
            field="subject", expected="one of " + ", ".join(names[:20])
            + (f" and {len(names) - 20} more" if len(names) > 20 else ""))


@dataclass(frozen=True)
class Prior:
    """Population prior for MAP estimation (canonical units).

    Attributes
    ----------
    clearance, volume : float
        Typical values, L/h and L (or L/h/kg and L/kg when ``per_kg``).
    clearance_per_kg, volume_per_kg : bool
    omega_clearance, omega_volume : float
        SD of ln CL and ln V between subjects.
    correlation : float
        Correlation of ln CL and ln V.
    additive, proportional : float
        Residual error: additive SD (mg/L) and proportional SD (fraction).
    source : str
        Where the prior came from (file name).
    """

    clearance: float
    volume: float
    omega_clearance: float
    omega_volume: float
    correlation: float = 0.0
    additive: float = 0.0
    proportional: float = 0.0
    clearance_per_kg: bool = False
    volume_per_kg: bool = False
    source: str = ""

    def __post_init__(self) -> None:
        for name in ("clearance", "volume"):
            x = getattr(self, name)
            _check(_finite(x) and x > 0, name, "must be a positive finite typical value", x)
        for name in ("omega_clearance", "omega_volume", "additive", "proportional"):
            x = getattr(self, name)
            _check(_finite(x) and x >= 0, name, "must be a finite SD >= 0", x)
        _check(_finite(self.correlation) and -1 < self.correlation < 1, "correlation",
               "must be in (-1, 1)", self.correlation)
        _check(self.additive > 0 or self.proportional > 0, "additive/proportional",
               "need a residual error (one of them > 0)", (self.additive, self.proportional))

    @property
    def error_model(self) -> str:
        if self.additive > 0 and self.proportional > 0:
            return "combined"
        return "additive" if self.additive > 0 else "proportional"

    def typical(self, weight: float | None) -> tuple[float, float]:
        """Typical clearance and volume for a subject (per-kg values need the weight)."""
        if (self.clearance_per_kg or self.volume_per_kg) and weight is None:
            raise ValueError("the prior is per kg but the subject has no weight")
        cl = self.clearance * (weight if self.clearance_per_kg else 1.0)
        v = self.volume * (weight if self.volume_per_kg else 1.0)
        return cl, v


@dataclass(frozen=True)
class FitOptions:
    """Validated fit options.

    ``weighting`` (least squares) and ``error_model`` (likelihood) exclude each
    other; a ``prior`` makes the fit a MAP estimate with the prior's error model.
    """

    weighting: str | None = None
    error_model: str | None = "proportional"
    blq: str = "likelihood"
    ci: str = "wald"
    prior: Prior | None = None
    starts: int = 3
    with_nca: bool = False
    nca_threshold: float = 20.0
    adequacy: bool = True

    def __post_init__(self) -> None:
        _check(self.weighting is None or self.weighting in WEIGHTINGS, "weighting",
               f"must be one of {', '.join(WEIGHTINGS)} (or None)", self.weighting)
        _check(self.error_model is None or self.error_model in ERROR_MODELS, "error_model",
               f"must be one of {', '.join(ERROR_MODELS)} (or None)", self.error_model)
        _check((self.weighting is None) != (self.error_model is None) or
               self.prior is not None, "error_model",
               "and weighting exclude each other: give exactly one", self.error_model)
        _check(self.blq in BLQ_METHODS, "blq", f"must be one of {', '.join(BLQ_METHODS)}",
               self.blq)
        _check(not (self.blq == "likelihood" and self.weighting is not None), "blq",
               "'likelihood' (Beal's M3) needs an error model, not a weighting", self.blq)
        _check(self.ci in CI_METHODS, "ci", f"must be one of {', '.join(CI_METHODS)}", self.ci)
        _check(self.prior is None or isinstance(self.prior, Prior), "prior",
               "must be a Prior or None", self.prior)
        _check(isinstance(self.starts, int) and not isinstance(self.starts, bool)
               and 1 <= self.starts <= 20, "starts", "must be a whole number from 1 to 20",
               self.starts)
        _check(_finite(self.nca_threshold) and self.nca_threshold > 0, "nca_threshold",
               "must be a positive percentage", self.nca_threshold)
        _check(isinstance(self.adequacy, bool), "adequacy", "must be true or false",
               self.adequacy)

    @property
    def method(self) -> str:
        if self.prior is not None:
            return "map"
        return "least_squares" if self.weighting else "likelihood"


EFFECT_FORMS = ("power", "linear", "categorical")
POPULATION_METHODS = ("marginal", "iterative", "two_stage")


@dataclass(frozen=True)
class Effect:
    """One covariate effect of a population model, from a subjects-table column.

    Attributes
    ----------
    column : str
        The subjects-table column (``weight``, or any other).
    parameter : str
        ``clearance`` or ``volume``.
    form : str
        ``power``: ``typical x (value / reference)^exponent``; ``linear``:
        ``typical x (1 + slope (value - reference))``; ``categorical``: one
        multiplicative factor per level other than the reference level.
    reference : float, str or None
        The reference value (power, linear; default the median over the
        subjects) or level (categorical; default the most frequent).
    fixed : float or None
        A fixed exponent (power only; e.g. 0.75 for allometric clearance):
        nothing is estimated.
    """

    column: str
    parameter: str
    form: str = "power"
    reference: float | str | None = None
    fixed: float | None = None

    def __post_init__(self) -> None:
        _check(isinstance(self.column, str) and self.column.strip() != "", "column",
               "must name a subjects-table column", self.column)
        _check(self.parameter in ("clearance", "volume"), "parameter",
               "must be 'clearance' or 'volume'", self.parameter)
        _check(self.form in EFFECT_FORMS, "form", f"must be one of {', '.join(EFFECT_FORMS)}",
               self.form)
        _check(self.fixed is None or (self.form == "power" and _finite(self.fixed)), "fixed",
               "a fixed exponent applies to the power form only", self.fixed)
        _check(self.reference is None or self.form == "categorical"
               or (_finite(self.reference) and (self.form == "linear" or self.reference > 0)),
               "reference", "must be a positive number (power) or a number (linear)",
               self.reference)

    @property
    def label(self) -> str:
        """``weight on clearance (around 70)`` -- the words the model is declared in."""
        words = [] if self.form == "power" and self.fixed is None else [self.form]
        if self.fixed is not None:
            words.append(f"fixed {self.fixed:g}")
        if self.reference is not None:
            ref = self.reference
            words.append(f"around {ref:g}" if isinstance(ref, float) else f"around {ref}")
        return f"{self.column} on {self.parameter}" + (f" ({' '.join(words)})" if words
                                                       else "")

    @property
    def estimated(self) -> bool:
        return self.fixed is None


@dataclass(frozen=True)
class PopulationModel:
    """A named set of covariate effects (the base model has none)."""

    name: str
    effects: tuple[Effect, ...] = ()

    def __post_init__(self) -> None:
        _check(isinstance(self.name, str) and self.name != "", "name", "must not be empty",
               self.name)
        _check(all(isinstance(e, Effect) for e in self.effects), "effects",
               "must be Effect objects", self.effects)
        keys = [(e.column, e.parameter) for e in self.effects]
        _check(len(set(keys)) == len(keys), "effects",
               "name each column at most once per parameter", keys)


@dataclass(frozen=True)
class PopulationOptions:
    """Validated options of ``pkcalc population``.

    ``method`` ``marginal`` (default) maximises the marginal likelihood, the
    individual deviations integrated out by the Laplace approximation
    (``nodes = 1``) or adaptive Gauss-Hermite quadrature (``nodes`` per
    dimension); ``iterative`` and ``two-stage`` are the two-stage methods.
    ``between_subject`` is ``full`` (a correlation of clearance and volume) or
    ``diagonal``.  ``effects`` are the covariate effects of the model; ``models``
    several models to compare; ``stepwise`` candidate effects for forward
    inclusion (``add_if_p_below``) and backward elimination (``remove_if_p_above``).
    """

    method: str = "marginal"
    error_model: str = "proportional"
    blq: str = "likelihood"
    covariate: str = "none"
    reference_weight: float = 70.0
    bootstrap: int = 0
    seed: int = 1
    vpc_replicates: int = 200
    adequacy: bool = True
    nodes: int = 1
    between_subject: str = "full"
    effects: tuple[Effect, ...] = ()
    models: tuple[PopulationModel, ...] = ()
    stepwise: tuple[Effect, ...] = ()
    add_if_p_below: float = 0.05
    remove_if_p_above: float = 0.01

    def __post_init__(self) -> None:
        _check(isinstance(self.adequacy, bool), "adequacy", "must be true or false",
               self.adequacy)
        _check(self.method in POPULATION_METHODS, "method",
               f"must be one of {', '.join(POPULATION_METHODS)}", self.method)
        _check(isinstance(self.nodes, int) and not isinstance(self.nodes, bool)
               and 1 <= self.nodes <= 31, "nodes", "must be a whole number from 1 to 31",
               self.nodes)
        _check(self.between_subject in ("full", "diagonal"), "between_subject",
               "must be 'full' or 'diagonal'", self.between_subject)
        _check(all(isinstance(e, Effect) for e in self.effects + self.stepwise), "effects",
               "must be Effect objects", self.effects)
        _check(all(isinstance(m, PopulationModel) for m in self.models), "models",
               "must be PopulationModel objects", self.models)
        for name in ("add_if_p_below", "remove_if_p_above"):
            x = getattr(self, name)
            _check(_finite(x) and 0 < x < 1, name, "must be a probability between 0 and 1", x)
        _check(self.method == "marginal" or not (self.effects or self.models or self.stepwise),
               "method", "covariate effects, model comparison and stepwise selection need "
               "the marginal method", self.method)
        _check(self.error_model in ERROR_MODELS, "error_model",
               f"must be one of {', '.join(ERROR_MODELS)}", self.error_model)
        _check(self.blq in BLQ_METHODS, "blq", f"must be one of {', '.join(BLQ_METHODS)}",
               self.blq)
        _check(self.covariate in ("none", "allometric", "estimated", "per_kg"), "covariate",
               "must be none, allometric, estimated or per_kg", self.covariate)
        _check(_finite(self.reference_weight) and self.reference_weight > 0,
               "reference_weight", "must be a positive weight in kg", self.reference_weight)
        for name, hi in (("bootstrap", 10000), ("seed", 2**32 - 1), ("vpc_replicates", 10000)):
            x = getattr(self, name)
            _check(isinstance(x, int) and not isinstance(x, bool) and 0 <= x <= hi, name,
                   f"must be a whole number from 0 to {hi}", x)


@dataclass(frozen=True)
class NcaOptions:
    """Options of non-compartmental analysis.

    Attributes
    ----------
    auc_method : str
        ``linear_up_log_down`` (default) or ``linear``.
    blq_rule : str
        ``leading_zero`` (default), ``zero`` or ``drop``.
    terminal_points : dict of str to tuple of float, h
        Terminal points chosen by hand per subject (study clock).
    r2_tolerance : float
        Adjusted R2 within this of the best counts as a tie (more points win).
    extrapolation_limit : float, percent
        Flag an AUC extrapolated beyond this.
    interval : str
        The dosing intervals reported: ``each`` (default), ``first``, ``last`` or a
        dose number (``"3"``).
    interval_tolerance, duration_tolerance : (float, float)
        (fraction, hours): repeated doses are regular when every gap (infusion time)
        is within the larger of the two of the interval (typical infusion time).
    """

    auc_method: str = "linear_up_log_down"
    blq_rule: str = "leading_zero"
    terminal_points: dict[str, tuple[float, ...]] = field(default_factory=dict)
    r2_tolerance: float = 1e-4
    extrapolation_limit: float = 20.0
    interval: str = "each"
    interval_tolerance: tuple[float, float] = (0.10, 1.0)
    duration_tolerance: tuple[float, float] = (0.10, 0.25)

    def __post_init__(self) -> None:
        _check(self.auc_method in NCA_AUC_METHODS, "auc_method",
               f"must be one of {', '.join(NCA_AUC_METHODS)}", self.auc_method)
        _check(self.blq_rule in NCA_BLQ_RULES, "blq_rule",
               f"must be one of {', '.join(NCA_BLQ_RULES)}", self.blq_rule)
        _check(_finite(self.r2_tolerance) and 0 <= self.r2_tolerance <= 0.1, "r2_tolerance",
               "must be a number from 0 to 0.1", self.r2_tolerance)
        _check(_finite(self.extrapolation_limit) and 0 <= self.extrapolation_limit <= 100,
               "extrapolation_limit", "must be a percentage from 0 to 100",
               self.extrapolation_limit)
        _check(isinstance(self.interval, str) and (self.interval in NCA_INTERVALS or (
            self.interval.isdigit() and int(self.interval) >= 1)), "interval",
               f"must be one of {', '.join(NCA_INTERVALS)} or a dose number", self.interval)
        for name in ("interval_tolerance", "duration_tolerance"):
            x = getattr(self, name)
            _check(isinstance(x, tuple) and len(x) == 2 and all(_finite(v) for v in x)
                   and 0 <= x[0] <= 1 and 0 <= x[1] <= 1e4, name,
                   "must be (a fraction from 0 to 1, hours >= 0)", x)
        for sid, times in self.terminal_points.items():
            _check(len(times) >= 2 and all(_finite(t) for t in times),
                   f"terminal_points[{sid!r}]", "needs two or more finite times", times)


@dataclass(frozen=True)
class DesignCase:
    """A validated design request in canonical units.

    ``options`` holds keyword arguments of the :mod:`pkcalc.design` function
    that ``method`` names (canonical numbers, :class:`~pkcalc.design.Limits`
    built later from ``*_limits`` pairs).
    """

    name: str
    method: str
    clearance: float | None
    volume: float | None
    options: dict[str, Any]
    weight: float | None = None
    clock_origin: str | None = None




SAMPLING_DESIGNS = ("individual", "map", "population")
SAMPLING_CRITERIA = ("D", "A")
#: Most levels per subject a sampling design places.
MAX_SAMPLING_LEVELS = 24


@dataclass(frozen=True)
class SamplingGroup:
    """Subjects that share one sampling schedule.

    Attributes
    ----------
    name : str
    subjects : int
        How many subjects (1 for an individual design).
    levels : int
        Levels per subject.
    times : tuple of float or None, h
        The user's own schedule for this group (compared with the optimum).
    """

    name: str
    subjects: int
    levels: int
    times: tuple[float, ...] | None = None

    def __post_init__(self) -> None:
        _check(isinstance(self.subjects, int) and self.subjects >= 1, "subjects",
               "must be a whole number >= 1", self.subjects)
        _check(isinstance(self.levels, int) and 1 <= self.levels <= MAX_SAMPLING_LEVELS,
               "levels", f"must be a whole number from 1 to {MAX_SAMPLING_LEVELS}", self.levels)
        if self.times is not None:
            _check(len(self.times) == self.levels and all(_finite(t) for t in self.times),
                   "times", "must give one finite time per level", self.times)


@dataclass(frozen=True)
class SamplingProblem:
    """A validated sampling-time design request in canonical units (h, mg, L, L/h).

    Attributes
    ----------
    name : str
    design : {"individual", "map", "population"}
    clearance, volume : float
        Typical (population, MAP prior) or the patient's (individual) values.
    doses : tuple of DoseEvent
    initial_concentration : float, mg/L
    omega : ndarray (2, 2) or None
        Covariance of ln CL and ln V between subjects (None without variability).
    additive, proportional : float
        Residual error SDs (mg/L; fraction).
    groups : tuple of SamplingGroup
    window : (float, float), h
    avoid_infusion : bool
        No level during an infusion (its end is allowed).
    daytime : (float, float) or None
        Allowed hours of the day (clock scenarios).
    clock_hour : float or None
        Hour of the day at time 0 (one fixed UTC offset throughout).
    excluded : tuple of (float, float), h
        Periods outside the allowed hours of the day, computed in a time zone (its
        daylight-saving changes included); used instead of ``daytime`` arithmetic.
    clock_origin : str or None
        ISO 8601 date-time of time 0 (clock scenarios, for reports).
    min_spacing : float, h
    candidates : tuple of float or None, h
        When given, levels are drawn only at these times.
    compare : tuple of tuple of float
        The user's schedules to compare (individual and MAP designs).
    criterion : {"D", "A"}
    starts : int
        Optimiser starts.
    """

    name: str
    design: str
    clearance: float
    volume: float
    doses: tuple[DoseEvent, ...]
    additive: float
    proportional: float
    groups: tuple[SamplingGroup, ...]
    window: tuple[float, float]
    omega: np.ndarray | None = None
    initial_concentration: float = 0.0
    avoid_infusion: bool = False
    daytime: tuple[float, float] | None = None
    clock_hour: float | None = None
    excluded: tuple[tuple[float, float], ...] = ()
    clock_origin: str | None = None
    min_spacing: float = 0.0
    candidates: tuple[float, ...] | None = None
    compare: tuple[tuple[float, ...], ...] = ()
    criterion: str = "D"
    starts: int = 12

    def __post_init__(self) -> None:
        _check(self.design in SAMPLING_DESIGNS, "design",
               f"must be one of {', '.join(SAMPLING_DESIGNS)}", self.design)
        _check(self.criterion in SAMPLING_CRITERIA, "criterion",
               f"must be one of {', '.join(SAMPLING_CRITERIA)}", self.criterion)
        for name in ("clearance", "volume"):
            x = getattr(self, name)
            _check(_finite(x) and x > 0, name, "must be a positive finite number", x)
        _check(_finite(self.additive) and _finite(self.proportional) and self.additive >= 0
               and self.proportional >= 0 and self.additive + self.proportional > 0,
               "additive/proportional", "need a residual error SD > 0",
               (self.additive, self.proportional))
        _check(len(self.window) == 2 and all(_finite(t) for t in self.window)
               and 0 <= self.window[0] < self.window[1], "window",
               "must be (earliest, latest) with 0 <= earliest < latest", self.window)
        _check(bool(self.groups), "groups", "need at least one group", self.groups)
        if self.design != "population":
            _check(len(self.groups) == 1 and self.groups[0].subjects == 1, "groups",
                   "an individual or MAP design has one subject", self.groups)
        if self.design in ("map", "population"):
            om = None if self.omega is None else np.asarray(self.omega, float)
            _check(om is not None and om.shape == (2, 2) and bool(np.all(np.isfinite(om)))
                   and om[0, 0] > 0 and om[1, 1] > 0
                   and om[0, 1] ** 2 < om[0, 0] * om[1, 1], "omega",
                   f"a {self.design} design needs between-subject variances > 0",
                   self.omega)
        _check(_finite(self.min_spacing) and self.min_spacing >= 0, "min_spacing",
               "must be >= 0 h", self.min_spacing)
        _check(isinstance(self.starts, int) and 1 <= self.starts <= 1000, "starts",
               "must be a whole number from 1 to 1000", self.starts)
        if self.daytime is not None and not self.excluded:
            _check(self.clock_hour is not None, "daytime",
                   "needs a scenario on the clock (dose starts as date-times)", self.daytime)
