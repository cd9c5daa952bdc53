"""Input files -> validated, canonical inputs (the boundary).

pydantic models describe the scenario file (DESIGN.md §5); their validators
turn every quantity into canonical units with :mod:`pkcalc.units`, check the
one-compartment parameter set and the dose events, and collect every problem
before raising.  What comes out (:class:`ScenarioInput`, :class:`DoseEvent`)
is plain numbers in canonical units that the rest of pkcalc trusts.
"""

from __future__ import annotations

import math
import tomllib
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, PrivateAttr, ValidationError, model_validator

from . import model
from .errors import PkcalcInputError, Problem
from .units import CANONICAL, display_factor, to_canonical

__all__ = [
    "PARAMETER_NAMES",
    "DoseEvent",
    "DoseSpec",
    "OutputUnits",
    "ScenarioFile",
    "ScenarioInput",
    "ScenarioSpec",
    "Target",
    "load_scenario_file",
    "read_toml",
    "validation_problems",
]

#: The five one-compartment parameters and the kind of quantity of each.
PARAMETER_NAMES: dict[str, str] = {
    "clearance": "clearance",
    "volume": "volume",
    "half_life": "time",
    "elimination_rate": "elimination_rate",
    "time_constant": "time",
}

#: Relative tolerance for an over-determined parameter set (three or more given).
AGREEMENT_RTOL = 1e-6

QuantityText = str | int | float


# --------------------------------------------------------------------------- canonical results
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


# --------------------------------------------------------------------------- helpers
class _Collector:
    """Converts quantities, recording problems instead of stopping at the first."""

    def __init__(self, weight: float | None = None) -> None:
        self.problems: list[Problem] = []
        self.weight = weight

    def q(self, text: Any, kind: str, name: str, *, positive: bool = False,
          nonnegative: bool = False) -> float | None:
        if text is None:
            return None
        try:
            value = to_canonical(text, kind, field=name, weight=self.weight)
        except PkcalcInputError as exc:
            self.problems.extend(exc.problems)
            return None
        if positive and not value > 0:
            self.add(f"must be greater than zero, got '{text}'", name)
            return None
        if nonnegative and value < 0:
            self.add(f"must not be negative, got '{text}'", name)
            return None
        return value

    def add(self, message: str, name: str | None = None, expected: str | None = None) -> None:
        self.problems.append(Problem(message, field=name, expected=expected))

    def raise_if_any(self) -> None:
        if self.problems:
            raise PkcalcInputError(self.problems)


def _agree(a: float, b: float) -> bool:
    return math.isclose(a, b, rel_tol=AGREEMENT_RTOL, abs_tol=0.0)


def resolve_parameters(values: dict[str, float], col: _Collector) -> tuple[float, float] | None:
    """Clearance and volume from the given parameters, checking over-determined sets.

    Any two independent ones of clearance, volume, half_life, elimination_rate,
    time_constant fix the model; a third given must agree to 1e-6 relative.
    """
    given = {k: v for k, v in values.items() if v is not None}
    k_like = [n for n in ("half_life", "elimination_rate", "time_constant") if n in given]
    k_values = {
        "half_life": lambda v: model.LN2 / v,
        "elimination_rate": lambda v: v,
        "time_constant": lambda v: 1.0 / v,
    }
    rates = {n: k_values[n](given[n]) for n in k_like}
    first_k = rates[k_like[0]] if k_like else None
    for n in k_like[1:]:
        if not _agree(rates[n], first_k):
            col.add(
                f"{n} ({given[n]:.6g}) disagrees with {k_like[0]} ({given[k_like[0]]:.6g}): "
                f"they imply elimination rates {rates[n]:.6g} and {first_k:.6g} 1/h",
                n, "values that agree to 1e-6 relative, or only two parameters",
            )
            return None
    cl, v = given.get("clearance"), given.get("volume")
    independent = (cl is not None) + (v is not None) + (first_k is not None)
    if independent < 2:
        names = ", ".join(given) or "none"
        col.add(
            f"clearance and volume are not determined by the parameters given ({names})",
            "clearance",
            "two of clearance, volume and one of half_life / elimination_rate / time_constant",
        )
        return None
    if cl is not None and v is not None and first_k is not None and not _agree(cl / v, first_k):
        col.add(
            f"clearance/volume = {cl / v:.6g} 1/h disagrees with {k_like[0]} "
            f"(elimination rate {first_k:.6g} 1/h)",
            k_like[0], "values that agree to 1e-6 relative, or only two parameters",
        )
        return None
    cl_out, v_out = model.resolve_clearance_volume(
        clearance=cl, volume=v, elimination_rate=first_k
    )
    return float(cl_out), float(v_out)


def validation_problems(exc: ValidationError, *, prefix: str = "") -> list[Problem]:
    """pydantic errors -> pkcalc problems (field path, message); our own errors kept."""
    out: list[Problem] = []
    for err in exc.errors():
        inner = (err.get("ctx") or {}).get("error")
        if isinstance(inner, PkcalcInputError):
            out.extend(inner.problems)
            continue
        loc = prefix + ".".join(str(p) if not isinstance(p, int) else f"[{p}]" for p in err["loc"])
        loc = loc.replace(".[", "[")
        msg = err["msg"]
        if err["type"] == "extra_forbidden":
            msg = "unknown key (check the spelling; see DESIGN.md §5 for the accepted keys)"
        elif err["type"] == "missing":
            msg = "is required"
        out.append(Problem(msg, field=loc or None))
    return out


def _check_items(raw: dict[str, Any], allowed: Iterable[str], where: str) -> None:
    unknown = sorted(set(raw) - set(allowed))
    if unknown:
        raise PkcalcInputError(
            [Problem("unknown key", field=f"{where}{k}", expected=", ".join(allowed))
             for k in unknown]
        )


# --------------------------------------------------------------------------- pydantic models
class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)


class _Lenient(BaseModel):
    """Unknown keys are kept and reported together with every other problem."""

    model_config = ConfigDict(extra="allow", frozen=True, populate_by_name=True)

    def unknown_keys(self, col: _Collector, where: str = "") -> None:
        accepted = ", ".join(
            (f.alias or name) for name, f in type(self).model_fields.items()
        )
        for key in self.model_extra or {}:
            col.add("unknown key (check the spelling)", f"{where}{key}", accepted)


class DoseSpec(_Lenient):
    """A dose event as written: ``start`` and two of ``amount``, ``rate``, ``duration``."""

    start: QuantityText
    amount: QuantityText | None = None
    rate: QuantityText | None = None
    duration: QuantityText | None = None
    every: QuantityText | None = None
    count: int | None = None

    def to_event(self, col: _Collector, where: str) -> DoseEvent | None:
        """Canonical event; problems go to ``col`` with field names under ``where``."""
        n0 = len(col.problems)
        self.unknown_keys(col, f"{where}.")
        if self.count is not None and self.count < 1:
            col.add(f"count must be 1 or more, got {self.count}", f"{where}.count")
        start = col.q(self.start, "time", f"{where}.start", nonnegative=True)
        amount = col.q(self.amount, "amount", f"{where}.amount", nonnegative=True)
        rate = col.q(self.rate, "rate", f"{where}.rate", nonnegative=True)
        duration = col.q(self.duration, "time", f"{where}.duration", nonnegative=True)
        every = col.q(self.every, "time", f"{where}.every", positive=True)
        if len(col.problems) > n0:
            return None
        given = [n for n, v in (("amount", amount), ("rate", rate), ("duration", duration))
                 if v is not None]
        if given == ["duration"] or given == ["rate"] or not given:
            col.add(
                f"a dose needs two of amount, rate, duration (got {', '.join(given) or 'none'})",
                where, "amount alone for a bolus, or two of amount / rate / duration",
            )
            return None
        if rate is not None and duration is not None and amount is not None:
            if not _agree(rate * duration, amount):
                col.add(
                    f"amount {amount:g} mg differs from rate x duration = {rate * duration:g} mg",
                    f"{where}.amount", "only two of amount / rate / duration, or three that agree",
                )
                return None
        elif rate is not None and duration is not None:
            amount = rate * duration
        elif rate is not None:  # amount and rate
            if rate <= 0:
                col.add("rate must be greater than zero when given with amount", f"{where}.rate")
                return None
            duration = amount / rate
        elif duration is None:  # amount alone -> bolus
            duration = 0.0
        if rate is not None and duration == 0:
            col.add("an infusion rate needs a duration greater than zero", f"{where}.duration")
            return None
        count = self.count if self.count is not None else 1
        if count > 1 and every is None:
            col.add(f"count = {count} needs 'every' (the interval)", f"{where}.every")
            return None
        if every is not None and self.count is None:
            col.add("'every' needs 'count' (the number of doses)", f"{where}.count")
            return None
        return DoseEvent(start, amount, duration, every if count > 1 else None, count)


class TimeRange(_Lenient):
    """Evenly spaced times ``from``, ``from + step``, ... up to ``to`` (inclusive)."""

    from_: QuantityText = Field(alias="from")
    to: QuantityText
    step: QuantityText


class TargetSpec(_Lenient):
    """A plateau target and/or a window ``[low, high]`` (concentrations)."""

    plateau: QuantityText | None = None
    window: list[QuantityText] | None = Field(default=None, min_length=2, max_length=2)

    def to_target(self, col: _Collector) -> Target:
        self.unknown_keys(col, "target.")
        plateau = col.q(self.plateau, "concentration", "target.plateau", positive=True)
        low = high = None
        if self.window is not None:
            low = col.q(self.window[0], "concentration", "target.window[0]", nonnegative=True)
            high = col.q(self.window[1], "concentration", "target.window[1]", positive=True)
            if low is not None and high is not None and low >= high:
                col.add(f"window low {low:g} mg/L is not below high {high:g} mg/L",
                        "target.window", "[low, high] with low < high")
        return Target(plateau, low, high)


MAX_TIMES = 1_000_000


def _resolve_times(spec: list[QuantityText] | TimeRange | None, col: _Collector):
    if spec is None:
        return None
    if isinstance(spec, TimeRange):
        spec.unknown_keys(col, "times.")
        t0 = col.q(spec.from_, "time", "times.from", nonnegative=True)
        t1 = col.q(spec.to, "time", "times.to", nonnegative=True)
        step = col.q(spec.step, "time", "times.step", positive=True)
        if None in (t0, t1, step):
            return None
        if t1 < t0:
            col.add(f"'to' ({t1:g} h) is before 'from' ({t0:g} h)", "times.to")
            return None
        n = math.floor((t1 - t0) / step * (1 + 1e-12)) + 1
        if n > MAX_TIMES:
            col.add(f"{n} time points is more than {MAX_TIMES}", "times.step", "a larger step")
            return None
        return t0 + step * np.arange(n)
    values = [col.q(v, "time", f"times[{i}]", nonnegative=True) for i, v in enumerate(spec)]
    if any(v is None for v in values):
        return None
    times = np.asarray(values, dtype=float)
    if times.size == 0:
        col.add("the list of times is empty", "times")
        return None
    bad = np.flatnonzero(np.diff(times) <= 0)
    if bad.size:
        col.add(f"times must increase; times[{bad[0] + 1}] is not after times[{bad[0]}]",
                "times", "a strictly increasing list")
        return None
    return times


class ScenarioSpec(_Lenient):
    """One ``[[scenarios]]`` entry of a scenario file (DESIGN.md §5).

    Validation converts every quantity to canonical units and checks the
    parameters and doses; the result is available as :attr:`resolved`.
    """

    name: str = Field(min_length=1)
    weight: QuantityText | None = None
    clearance: QuantityText | None = None
    volume: QuantityText | None = None
    half_life: QuantityText | None = None
    elimination_rate: QuantityText | None = None
    time_constant: QuantityText | None = None
    doses: list[DoseSpec] = Field(default_factory=list)
    times: list[QuantityText] | TimeRange | None = None
    target: TargetSpec | None = None
    design: dict[str, Any] | None = None

    _resolved: ScenarioInput | None = PrivateAttr(default=None)

    @model_validator(mode="after")
    def _to_canonical(self) -> ScenarioSpec:
        col = _Collector()
        self.unknown_keys(col)
        weight = col.q(self.weight, "weight", "weight", positive=True)
        col.weight = weight
        values = {
            name: col.q(getattr(self, name), kind, name, positive=True)
            for name, kind in PARAMETER_NAMES.items()
        }
        params = None if col.problems else resolve_parameters(values, col)
        doses = []
        if not self.doses:
            col.add("no doses given", "doses", "a list of dose events")
        for i, d in enumerate(self.doses):
            ev = d.to_event(col, f"doses[{i}]")
            if ev is not None:
                doses.append(ev)
        times = _resolve_times(self.times, col)
        target = self.target.to_target(col) if self.target is not None else None
        col.raise_if_any()
        assert params is not None
        self._resolved = ScenarioInput(
            name=self.name,
            clearance=params[0],
            volume=params[1],
            doses=tuple(doses),
            times=times,
            weight=weight,
            target=target,
            given=tuple(n for n, v in values.items() if v is not None),
            extra={"design": self.design} if self.design is not None else {},
        )
        return self

    @property
    def resolved(self) -> ScenarioInput:
        """The scenario in canonical units."""
        assert self._resolved is not None
        return self._resolved


class OutputUnits(_Strict):
    """Display units for outputs (``[output]`` table); canonical when omitted."""

    time: str | None = None
    amount: str | None = None
    volume: str | None = None
    concentration: str | None = None
    clearance: str | None = None
    rate: str | None = None
    elimination_rate: str | None = None

    @model_validator(mode="after")
    def _check(self) -> OutputUnits:
        problems = []
        for kind in type(self).model_fields:
            unit = getattr(self, kind)
            if unit is not None:
                try:
                    display_factor(unit, kind, field=f"output.{kind}")
                except PkcalcInputError as exc:
                    problems.extend(exc.problems)
        if problems:
            raise PkcalcInputError(problems)
        return self

    def units(self) -> dict[str, str]:
        """The full units map: chosen units, canonical for the rest."""
        keys = ("time", "amount", "volume", "concentration", "clearance", "rate",
                "elimination_rate")
        return {k: getattr(self, k) or CANONICAL[k] for k in keys}


@dataclass
class ScenarioFile:
    """A loaded scenario file: good scenarios and the problems of the bad ones.

    Attributes
    ----------
    path : str
    title : str or None
    output : OutputUnits
    scenarios : list of ScenarioInput
        The scenarios that validated, in file order.
    failures : list of (str, PkcalcInputError)
        Name (or position) and problems of each scenario that did not.
    raw : dict
        The parsed TOML, for reports.
    """

    path: str
    title: str | None
    output: OutputUnits
    scenarios: list[ScenarioInput]
    failures: list[tuple[str, PkcalcInputError]]
    raw: dict[str, Any]


def read_toml(path: str | Path) -> dict[str, Any]:
    """Read a TOML file; unreadable, empty or non-TOML files raise PkcalcInputError."""
    p = Path(path)
    if not p.is_file():
        raise PkcalcInputError("file not found", file=str(path))
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise PkcalcInputError("not a text file", file=str(path), expected="a TOML file") from None
    except tomllib.TOMLDecodeError as exc:
        raise PkcalcInputError(f"not valid TOML: {exc}", file=str(path)) from None
    if not data:
        raise PkcalcInputError("the file is empty", file=str(path), expected="a TOML file")
    return data


def _scenario_label(raw: Any, i: int) -> str:
    name = raw.get("name") if isinstance(raw, dict) else None
    return f"scenario '{name}'" if isinstance(name, str) and name else f"scenario #{i + 1}"


def load_scenario_file(path: str | Path, *, extra_keys: Iterable[str] = (),
                       spec: type[_Lenient] | None = None,
                       keep: Any = None) -> ScenarioFile:
    """Load and validate a scenario file, keeping good scenarios when others fail.

    Parameters
    ----------
    path : str or Path
    extra_keys : iterable of str
        Top-level keys other commands accept besides ``title``, ``output``, ``scenarios``.
    spec : pydantic model class, optional
        The model each ``[[scenarios]]`` entry is validated with (default
        :class:`ScenarioSpec`; ``pkcalc design`` uses :class:`DesignCaseSpec`).
    keep : callable, optional
        ``keep(raw) -> bool``; entries for which it is false are skipped.

    Returns
    -------
    ScenarioFile

    Raises
    ------
    PkcalcInputError
        When the file as a whole is unusable (missing, not TOML, no scenarios,
        bad ``[output]`` table).  Problems of single scenarios are returned in
        ``failures`` instead.
    """
    spec = spec or ScenarioSpec
    file = str(path)
    data = read_toml(path)
    try:
        _check_items(data, ["title", "output", "scenarios", *extra_keys], "")
        try:
            output = OutputUnits.model_validate(data.get("output", {}))
        except ValidationError as exc:
            raise PkcalcInputError(validation_problems(exc, prefix="output.")) from None
        raw_scenarios = data.get("scenarios")
        if not isinstance(raw_scenarios, list) or not raw_scenarios:
            raise PkcalcInputError("no [[scenarios]] given", field="scenarios",
                                   expected="one or more [[scenarios]] tables")
    except PkcalcInputError as exc:
        raise exc.located(file=file) from None
    good: list[Any] = []
    failures: list[tuple[str, PkcalcInputError]] = []
    names: set[str] = set()
    for i, raw in enumerate(raw_scenarios):
        label = _scenario_label(raw, i)
        if keep is not None and isinstance(raw, dict) and not keep(raw):
            continue
        try:
            if not isinstance(raw, dict):
                raise PkcalcInputError("each scenario must be a table", field="scenarios")
            item = spec.model_validate(raw)
            if item.name in names:
                raise PkcalcInputError(f"duplicate scenario name '{item.name}'", field="name")
            names.add(item.name)
            good.append(item.resolved)
        except ValidationError as exc:
            failures.append((label, PkcalcInputError(validation_problems(exc))
                             .located(file=file, item=label)))
        except PkcalcInputError as exc:
            failures.append((label, exc.located(file=file, item=label)))
    title = data.get("title") if isinstance(data.get("title"), str) else None
    return ScenarioFile(file, title, output, good, failures, data)


# --------------------------------------------------------------------------- design
DESIGN_METHODS = ("continuous", "intermittent", "proportional", "chiou", "sawchuk_zaske")


class SampleSpec(_Lenient):
    """A measured level: ``{ time = "2 h", concentration = "4.1 mg/L" }``."""

    time: QuantityText
    concentration: QuantityText


class DesignSpec(_Lenient):
    """The ``[scenarios.design]`` table: what to design or adjust, and how to round."""

    method: str | None = None
    # continuous infusion
    plateau: QuantityText | None = None
    window: list[QuantityText] | None = Field(default=None, min_length=2, max_length=2)
    loading_time: QuantityText | None = None
    within: float | None = None
    # intermittent infusion
    infusion_time: QuantityText | None = None
    peak: QuantityText | list[QuantityText] | None = None
    trough: QuantityText | list[QuantityText] | None = None
    peak_min: QuantityText | None = None
    peak_max: QuantityText | None = None
    trough_min: QuantityText | None = None
    trough_max: QuantityText | None = None
    intervals: list[QuantityText] | None = None
    # rounding and limits
    salt_factor: float | None = None
    rate_step: QuantityText | None = None
    dose_step: QuantityText | None = None
    max_rate: QuantityText | None = None
    max_dose: QuantityText | None = None
    max_loading: QuantityText | None = None
    max_loading_ratio: float | None = None
    # adjustment from levels
    measured: QuantityText | None = None
    current_rate: QuantityText | None = None
    current_dose: QuantityText | None = None
    current_interval: QuantityText | None = None
    rate: QuantityText | None = None
    samples: list[SampleSpec] | None = None
    dose: QuantityText | None = None
    interval: QuantityText | None = None
    peak_sample: SampleSpec | None = None
    trough_sample: SampleSpec | None = None
    pre_dose: QuantityText | None = None
    steady_state: bool | None = None
    new_infusion_time: QuantityText | None = None

    def infer_method(self) -> str:
        if self.method is not None:
            return self.method
        if self.samples is not None:
            return "chiou"
        if self.peak_sample is not None or self.trough_sample is not None:
            return "sawchuk_zaske"
        if self.measured is not None:
            return "proportional"
        if self.infusion_time is not None or self.peak is not None or self.trough is not None \
                or self.peak_max is not None or self.trough_min is not None:
            return "intermittent"
        return "continuous"


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


def _limits_pair(col: _Collector, spec: DesignSpec, name: str):
    """(target, (low, high)) for 'peak' / 'trough' from the single or list form and min/max."""
    value = getattr(spec, name)
    target = low = high = None
    if isinstance(value, list):
        if len(value) != 2:
            col.add("give [min, max]", f"design.{name}", "a list of two concentrations")
        else:
            low = col.q(value[0], "concentration", f"design.{name}[0]", nonnegative=True)
            high = col.q(value[1], "concentration", f"design.{name}[1]", positive=True)
    elif value is not None:
        target = col.q(value, "concentration", f"design.{name}", positive=True)
    mn = col.q(getattr(spec, f"{name}_min"), "concentration", f"design.{name}_min",
               nonnegative=True)
    mx = col.q(getattr(spec, f"{name}_max"), "concentration", f"design.{name}_max",
               positive=True)
    low = mn if mn is not None else low
    high = mx if mx is not None else high
    if low is not None and high is not None and low >= high:
        col.add(f"{name} minimum {low:g} mg/L is not below the maximum {high:g} mg/L",
                f"design.{name}", "min < max")
    if target is not None and ((low is not None and target < low) or
                               (high is not None and target > high)):
        col.add(f"{name} target {target:g} mg/L lies outside its own limits", f"design.{name}")
    limits = None if low is None and high is None else (low, high)
    return target, limits


def _sample(col: _Collector, sample: SampleSpec | None, where: str):
    if sample is None:
        return None
    sample.unknown_keys(col, f"{where}.")
    t = col.q(sample.time, "time", f"{where}.time")
    c = col.q(sample.concentration, "concentration", f"{where}.concentration", positive=True)
    return None if t is None or c is None else (t, c)


def _need(col: _Collector, method: str, **values: Any) -> bool:
    missing = [k for k, v in values.items() if v is None]
    for k in missing:
        col.add(f"method '{method}' needs '{k}'", k if "." in k else f"design.{k}")
    return not missing


def resolve_design(spec: DesignSpec, cl: float | None, v: float | None,
                   col: _Collector) -> tuple[str, dict[str, Any]]:
    """Canonical keyword options for the design function of the method."""
    spec.unknown_keys(col, "design.")
    method = spec.infer_method()
    if method not in DESIGN_METHODS:
        col.add(f"unknown method '{method}'", "design.method", ", ".join(DESIGN_METHODS))
        return method, {}
    q = col.q
    opts: dict[str, Any] = {}
    if spec.salt_factor is not None:
        if not 0 < spec.salt_factor <= 1:
            col.add(f"salt_factor must be in (0, 1], got {spec.salt_factor}",
                    "design.salt_factor")
        opts["salt_factor"] = spec.salt_factor
    steps = {"rate_step": ("rate", spec.rate_step), "dose_step": ("amount", spec.dose_step)}
    maxima = {"max_rate": ("rate", spec.max_rate), "max_dose": ("amount", spec.max_dose),
              "max_loading": ("amount", spec.max_loading)}
    for key, (kind, text) in {**steps, **maxima}.items():
        value = q(text, kind, f"design.{key}", positive=True)
        if value is not None:
            opts[key] = value
    if spec.max_loading_ratio is not None:
        opts["max_loading_ratio"] = spec.max_loading_ratio
    plateau = q(spec.plateau, "concentration", "design.plateau", positive=True)
    peak, peak_limits = _limits_pair(col, spec, "peak")
    trough, trough_limits = _limits_pair(col, spec, "trough")
    if peak is not None and trough is not None and trough >= peak:
        col.add(f"trough target {trough:g} mg/L is not below the peak target {peak:g} mg/L",
                "design.trough", "a trough target below the peak target")
    intervals = None
    if spec.intervals is not None:
        intervals = [q(x, "time", f"design.intervals[{i}]", positive=True)
                     for i, x in enumerate(spec.intervals)]
        if not intervals or any(x is None for x in intervals):
            col.add("give one or more intervals", "design.intervals")
    interval_opts = {"peak": peak, "trough": trough, "peak_limits": peak_limits,
                     "trough_limits": trough_limits}
    if intervals:
        interval_opts["intervals"] = intervals
    if method == "continuous":
        if _need(col, method, plateau=plateau, clearance=cl, volume=v):
            opts.update(clearance=cl, volume=v, plateau=plateau)
        if spec.window is not None:
            lo = q(spec.window[0], "concentration", "design.window[0]", nonnegative=True)
            hi = q(spec.window[1], "concentration", "design.window[1]", positive=True)
            if lo is not None and hi is not None and lo >= hi:
                col.add(f"window low {lo:g} mg/L is not below high {hi:g} mg/L",
                        "design.window", "[low, high] with low < high")
            opts["window"] = (lo, hi)
        lt = q(spec.loading_time, "time", "design.loading_time", nonnegative=True)
        if lt is not None:
            opts["loading_time"] = lt
        if spec.within is not None:
            if not 0 < spec.within < 1:
                col.add(f"within must be a fraction in (0, 1), got {spec.within}",
                        "design.within")
            opts["within"] = spec.within
        opts.pop("max_dose", None)
        opts.pop("dose_step", None)
    elif method == "intermittent":
        t_inf = q(spec.infusion_time, "time", "design.infusion_time", nonnegative=True)
        if _need(col, method, infusion_time=t_inf, clearance=cl, volume=v):
            opts.update(clearance=cl, volume=v, infusion_time=t_inf)
        if peak is None and peak_limits is None:
            col.add("needs a peak target or limits", "design.peak", "peak, peak_min or peak_max")
        if trough is None and trough_limits is None:
            col.add("needs a trough target or limits", "design.trough",
                    "trough, trough_min or trough_max")
        opts.update(interval_opts)
        for key in ("rate_step", "max_rate", "max_loading"):
            opts.pop(key, None)
    elif method == "proportional":
        measured = q(spec.measured, "concentration", "design.measured", positive=True)
        rate = q(spec.current_rate, "rate", "design.current_rate", positive=True)
        dose = q(spec.current_dose, "amount", "design.current_dose", positive=True)
        interval = q(spec.current_interval, "time", "design.current_interval", positive=True)
        _need(col, method, measured=measured, plateau=plateau)
        if (rate is None) == (dose is None):
            col.add("give either current_rate or current_dose", "design.current_rate")
        opts.update(measured=measured, target=plateau, current_rate=rate, current_dose=dose,
                    interval=interval, clearance=cl, volume=v)
        for key in ("max_rate", "max_dose", "max_loading", "max_loading_ratio"):
            opts.pop(key, None)
    elif method == "chiou":
        rate = q(spec.rate, "rate", "design.rate", positive=True)
        samples = [_sample(col, s, f"design.samples[{i}]")
                   for i, s in enumerate(spec.samples or [])]
        if len(samples) != 2:
            col.add(f"Chiou's method takes exactly two levels, got {len(samples)}",
                    "design.samples", "two { time, concentration } tables")
        elif None not in samples:
            (t1, c1), (t2, c2) = samples
            if t2 <= t1:
                col.add(f"the second level (at {t2:g} h) must be drawn after the first "
                        f"(at {t1:g} h)", "design.samples", "levels in time order, apart")
            opts.update(t1=t1, c1=c1, t2=t2, c2=c2)
        if _need(col, method, rate=rate, plateau=plateau, volume=v):
            opts.update(rate=rate, volume=v, target=plateau)
        for key in ("dose_step", "max_rate", "max_dose", "max_loading", "max_loading_ratio"):
            opts.pop(key, None)
    elif method == "sawchuk_zaske":
        dose = q(spec.dose, "amount", "design.dose", positive=True)
        t_inf = q(spec.infusion_time, "time", "design.infusion_time", nonnegative=True)
        interval = q(spec.interval, "time", "design.interval", positive=True)
        ps = _sample(col, spec.peak_sample, "design.peak_sample")
        ts = _sample(col, spec.trough_sample, "design.trough_sample")
        _need(col, method, dose=dose, infusion_time=t_inf, interval=interval,
              peak_sample=spec.peak_sample, trough_sample=spec.trough_sample)
        if ps is not None and ts is not None:
            if ts[1] >= ps[1]:
                col.add(f"the trough level {ts[1]:g} mg/L is not below the peak level "
                        f"{ps[1]:g} mg/L", "design.trough_sample.concentration")
            if ts[0] == ps[0]:
                col.add("the peak and trough are drawn at the same time", "design.trough_sample")
            if t_inf is not None and ps[0] < t_inf:
                col.add(f"the peak (at {ps[0]:g} h) is drawn before the infusion ends "
                        f"({t_inf:g} h)", "design.peak_sample.time")
            if 0 <= ts[0] < ps[0]:
                col.add("the trough must be drawn after the peak, or before the dose "
                        "(negative time)", "design.trough_sample.time")
        if (peak is None and peak_limits is None) or (trough is None and trough_limits is None):
            col.add("the new regimen needs peak and trough targets or limits", "design.peak")
        pre = q(spec.pre_dose, "concentration", "design.pre_dose", nonnegative=True)
        new_t = q(spec.new_infusion_time, "time", "design.new_infusion_time",
                  nonnegative=True)
        opts.update(dose=dose, infusion_time=t_inf, interval=interval,
                    peak_level=ps[1] if ps else None, peak_time=ps[0] if ps else None,
                    trough_level=ts[1] if ts else None, trough_time=ts[0] if ts else None,
                    pre_dose_level=pre, new_infusion_time=new_t, **interval_opts)
        if spec.steady_state is not None:
            opts["steady_state"] = spec.steady_state
        for key in ("rate_step", "max_rate", "max_loading", "max_loading_ratio"):
            opts.pop(key, None)
    return method, opts


def resolve_partial(values: dict[str, float | None], col: _Collector
                    ) -> tuple[float | None, float | None]:
    """Clearance and/or volume from whatever parameters are given (design cases)."""
    given = {k: v for k, v in values.items() if v is not None}
    independent = ("clearance" in given) + ("volume" in given) + any(
        n in given for n in ("half_life", "elimination_rate", "time_constant"))
    if independent >= 2:
        params = resolve_parameters(values, col)
        return (None, None) if params is None else params
    return given.get("clearance"), given.get("volume")


class DesignCaseSpec(_Lenient):
    """A ``[[scenarios]]`` entry read by ``pkcalc design``: parameters and a design table.

    Predict-only keys (doses, times, target) are accepted and ignored, so one
    file can serve both commands.
    """

    name: str = Field(min_length=1)
    weight: QuantityText | None = None
    clearance: QuantityText | None = None
    volume: QuantityText | None = None
    half_life: QuantityText | None = None
    elimination_rate: QuantityText | None = None
    time_constant: QuantityText | None = None
    doses: list[Any] | None = None
    times: Any = None
    target: Any = None
    design: DesignSpec

    _resolved: DesignCase | None = PrivateAttr(default=None)

    @model_validator(mode="after")
    def _to_canonical(self) -> DesignCaseSpec:
        col = _Collector()
        self.unknown_keys(col)
        weight = col.q(self.weight, "weight", "weight", positive=True)
        col.weight = weight
        values = {name: col.q(getattr(self, name), kind, name, positive=True)
                  for name, kind in PARAMETER_NAMES.items()}
        cl, v = (None, None) if col.problems else resolve_partial(values, col)
        method, opts = resolve_design(self.design, cl, v, col)
        col.raise_if_any()
        self._resolved = DesignCase(self.name, method, cl, v, opts, weight)
        return self

    @property
    def resolved(self) -> DesignCase:
        assert self._resolved is not None
        return self._resolved


def load_design_file(path: str | Path) -> ScenarioFile:
    """Load the scenarios of a file that have a ``[scenarios.design]`` table."""
    sf = load_scenario_file(path, spec=DesignCaseSpec, keep=lambda raw: "design" in raw)
    if not sf.scenarios and not sf.failures:
        raise PkcalcInputError("no scenario has a [scenarios.design] table", file=str(path),
                               field="design", expected="a [scenarios.design] table")
    return sf
