"""The scenario file of ``pkcalc predict`` (docs/formats.md)."""

from __future__ import annotations

import math
from collections.abc import Iterable
from pathlib import Path
from typing import Any

import numpy as np
from pydantic import Field, StrictInt, model_validator

from ..core import DoseEvent, ScenarioInput, Target
from ..errors import PkcalcInputError
from .base import (
    Collector,
    LenientModel,
    QuantityText,
    ScenarioFile,
    WithParameters,
    agree,
    load_items,
    resolve_parameters,
)


class DoseSpec(LenientModel):
    """A dose event as written: ``start`` and two of ``amount``, ``rate``, ``duration``."""

    start: QuantityText
    amount: QuantityText | None = None
    rate: QuantityText | None = None
    duration: QuantityText | None = None
    every: QuantityText | None = None
    count: StrictInt | None = None

    def to_event(self, col: Collector, where: str) -> DoseEvent | None:
        """Canonical event; problems go to ``col`` with field names under ``where``."""
        n0 = len(col.problems)
        self.unknown_keys(col, f"{where}.")
        if self.count is not None and self.count < 1:
            col.add(f"count must be 1 or more, got {self.count}", f"{where}.count")
        if self.count is not None and self.count > MAX_DOSE_EVENTS:
            col.add(f"count = {self.count} is more than the {MAX_DOSE_EVENTS} doses pkcalc "
                    "expands per scenario", f"{where}.count",
                    f"at most {MAX_DOSE_EVENTS} doses; the steady state is reported from "
                    "any count of 2 or more (closed form)")
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
            if not agree(rate * duration, amount):
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


def clock_to_hours(doses: list[DoseSpec], times, col: Collector, extra_times=()):
    """Clock-time dose starts and times (ISO 8601) -> hours since the first dose.

    Either every dose start and time of a scenario is a clock time or none is; the
    origin is the earliest dose start.  ``extra_times`` (``(field, text)`` pairs, e.g.
    level times of a design) are converted too and returned third.
    """
    from ..clock import hours_since, is_clock, parse_clock, same_kind

    texts = [d.start for d in doses] + (list(times) if isinstance(times, list) else []) \
        + [t for _, t in extra_times]
    clock = [is_clock(t) for t in texts]
    if not any(clock):
        return doses, times, list(extra_times), None
    if not all(clock):
        col.add("dose starts and times mix clock times and relative times", "doses",
                "every start and time as an ISO 8601 date-time, or every one with a unit")
        return [], None, [], None
    try:
        starts = [parse_clock(d.start, field=f"doses[{i}].start") for i, d in enumerate(doses)]
        origin = min(starts)
        same_kind(starts, field="doses")

        def rel(text, field):
            t = parse_clock(text, field=field)
            same_kind([t, origin], field=field)
            return f"{hours_since(t, origin):.17g} h"
        new_doses = [d.model_copy(update={"start": rel(d.start, f"doses[{i}].start")})
                     for i, d in enumerate(doses)]
        new_times = [rel(t, f"times[{i}]") for i, t in enumerate(times)] \
            if isinstance(times, list) else times
        new_extra = [(f, rel(t, f)) for f, t in extra_times]
    except (PkcalcInputError, TypeError) as exc:
        if isinstance(exc, PkcalcInputError):
            col.problems.extend(exc.problems)
        else:
            col.add("some date-times have a time-zone offset and some do not", "doses")
        return [], None, [], None
    return new_doses, new_times, new_extra, origin.isoformat()


class TimeRange(LenientModel):
    """Evenly spaced times ``from``, ``from + step``, ... up to ``to`` (inclusive)."""

    from_: QuantityText = Field(alias="from")
    to: QuantityText
    step: QuantityText


class TargetSpec(LenientModel):
    """A plateau target and/or a window ``[low, high]`` (concentrations)."""

    plateau: QuantityText | None = None
    window: list[QuantityText] | None = Field(default=None, min_length=2, max_length=2)

    def to_target(self, col: Collector) -> Target:
        self.unknown_keys(col, "target.")
        plateau = col.q(self.plateau, "concentration", "target.plateau", positive=True)
        low = high = None
        if self.window is not None:
            low = col.q(self.window[0], "concentration", "target.window[0]", nonnegative=True)
            high = col.q(self.window[1], "concentration", "target.window[1]", positive=True)
            if low is not None and high is not None and low >= high:
                col.add(f"window low {low:g} mg/L is not below high {high:g} mg/L",
                        "target.window", "[low, high] with low < high")
                low = high = None
        return Target(plateau, low, high)


MAX_TIMES = 1_000_000
#: Most single doses one scenario may expand to (repeats included), and the most
#: times x doses one prediction evaluates; both keep memory and time bounded.
MAX_DOSE_EVENTS = 5_000
MAX_WORK = 100_000_000


def resolve_times(spec: list[QuantityText] | TimeRange | None, col: Collector):
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


class ScenarioSpec(WithParameters):
    """One ``[[scenarios]]`` entry of a scenario file (docs/formats.md).

    Validation converts every quantity to canonical units and checks the
    parameters and doses; the result is available as :attr:`resolved`.
    """

    doses: list[DoseSpec] = Field(default_factory=list)
    times: list[QuantityText] | TimeRange | None = None
    target: TargetSpec | None = None
    design: dict[str, Any] | None = None
    sampling: dict[str, Any] | None = None
    initial_concentration: QuantityText | None = None


    @model_validator(mode="after")
    def _to_canonical(self) -> ScenarioSpec:
        col, weight, values = self.start_collecting()
        params = None if col.problems else resolve_parameters(values, col)
        doses = []
        if not self.doses:
            col.add("no doses given", "doses", "a list of dose events")
        dose_specs, times_spec, _, origin = clock_to_hours(self.doses, self.times, col)
        for i, d in enumerate(dose_specs):
            ev = d.to_event(col, f"doses[{i}]")
            if ev is not None:
                doses.append(ev)
        times = resolve_times(times_spec, col)
        n_events = sum(d.count for d in doses)
        if n_events > MAX_DOSE_EVENTS:
            col.add(f"the doses expand to {n_events} single doses, more than the "
                    f"{MAX_DOSE_EVENTS} pkcalc evaluates per scenario", "doses",
                    f"at most {MAX_DOSE_EVENTS} doses in all")
        elif times is not None and times.size * max(n_events, 1) > MAX_WORK:
            col.add(f"{times.size} times x {n_events} doses is more than the "
                    f"{MAX_WORK:,} evaluations pkcalc does per scenario", "times",
                    "fewer times (a larger step) or fewer doses")
        target = self.target.to_target(col) if self.target is not None else None
        initial = col.q(self.initial_concentration, "concentration", "initial_concentration",
                        nonnegative=True)
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
            extra={**({"design": self.design} if self.design is not None else {}),
                   **({"sampling": self.sampling} if self.sampling is not None else {}),
                   **({"clock_origin": origin} if origin else {})},
            initial_concentration=initial or 0.0,
        )
        return self


def load_scenario_file(path: str | Path, *, extra_keys: Iterable[str] = (),
                       keep: Any = None) -> ScenarioFile:
    """Load and validate a scenario file, keeping good scenarios when others fail.

    Scenarios that hold only a ``[scenarios.design]`` table (no doses) are
    left to ``pkcalc design`` and skipped here.

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
    if keep is None:
        def keep(raw: dict) -> bool:
            return "doses" in raw or "design" not in raw
    return load_items(path, ScenarioSpec, extra_keys=extra_keys, keep=keep)
