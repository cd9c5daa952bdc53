"""The scenarios of ``pkcalc design``: parameters, the design table, and the dose history
of adjustments from levels, checked against the level times."""

from __future__ import annotations

import itertools
from pathlib import Path
from typing import Any

from pydantic import ValidationError, model_validator

from ..core import DesignCase
from ..errors import PkcalcInputError
from .base import (
    Collector,
    ScenarioFile,
    WithParameters,
    load_items,
    resolve_partial,
    validation_problems,
)
from .design_table import DesignSpec, SampleSpec, resolve_design


class DesignCaseSpec(WithParameters):
    """A ``[[scenarios]]`` entry read by ``pkcalc design``: parameters and a design table.

    Predict-only keys (doses, times, target) are accepted and ignored, so one
    file can serve both commands.
    """

    doses: list[Any] | None = None
    times: Any = None
    target: Any = None
    design: DesignSpec


    @model_validator(mode="after")
    def _to_canonical(self) -> DesignCaseSpec:
        col, weight, values = self.start_collecting()
        cl, v = (None, None) if col.problems else resolve_partial(values, col)
        doses, design, origin = _clock_history(self.doses, self.design, col)
        method, opts = resolve_design(design, cl, v, col, history=bool(doses))
        if method in LEVEL_METHODS:
            _history(doses, design, method, opts, col)
        elif self.design.start is not None or self.design.initial_concentration is not None:
            col.add(f"'start' and 'initial_concentration' belong to adjustments from levels, "
                    f"not to method '{method}'", "design.start")
        col.raise_if_any()
        if method == "map":
            opts["weight"] = weight
        self._resolved = DesignCase(self.name, method, cl, v, opts, weight, origin)
        return self


#: Methods that adjust from measured levels (and take a dose history).
LEVEL_METHODS = ("proportional", "chiou", "sawchuk_zaske", "map")


def _clock_history(doses, design: DesignSpec, col: Collector):
    """A history written in clock times (ISO 8601): dose starts, level times and the
    start become hours since the first dose (see :func:`.scenario.clock_to_hours`)."""
    from ..clock import is_clock
    from .scenario import DoseSpec, clock_to_hours

    samples = [(f"design.levels[{i}].time", x) for i, x in enumerate(design.levels or [])]
    samples += [(f"design.samples[{i}].time", x) for i, x in enumerate(design.samples or [])]
    samples += [(f"design.{k}.time", getattr(design, k)) for k in
                ("peak_sample", "trough_sample", "measured")
                if isinstance(getattr(design, k), SampleSpec)]
    now = isinstance(design.start, str) and design.start.strip().lower() == "now"
    texts = [x.time for _, x in samples] + ([design.start] if design.start and not now else [])
    texts += [d.get("start") for d in doses or [] if isinstance(d, dict)]
    if not doses or not any(is_clock(t) for t in texts):
        if now:
            col.add("start = 'now' needs the dose history in clock times (ISO 8601 "
                    "date-times)", "design.start", "a start such as '30 h', or clock times")
        return doses, design, None
    if now:
        design = design.model_copy(update={"start": _now(texts)})
    try:
        specs = [DoseSpec.model_validate(d) for d in doses]
    except ValidationError:
        return doses, design, None  # reported by _history
    extra = [(f, x.time) for f, x in samples] + (
        [("design.start", design.start)] if design.start else [])
    specs, _, converted, origin = clock_to_hours(specs, None, col, extra)
    if not specs:
        return [], design, None
    new = dict(converted)
    update: dict[str, Any] = {}
    for key in ("levels", "samples"):
        items = getattr(design, key)
        if items:
            update[key] = [x.model_copy(update={"time": new[f"design.{key}[{i}].time"]})
                           for i, x in enumerate(items)]
    for key in ("peak_sample", "trough_sample", "measured"):
        item = getattr(design, key)
        if isinstance(item, SampleSpec):
            update[key] = item.model_copy(update={"time": new[f"design.{key}.time"]})
    if design.start:
        update["start"] = new["design.start"]
    return ([d.model_dump(by_alias=True, exclude_none=True) for d in specs],
            design.model_copy(update=update), origin)


def _now(texts) -> str:
    """The time of this run as an ISO 8601 date-time, with an offset when the history
    has them (so that the hours to it are exact)."""
    from datetime import datetime

    from ..clock import is_clock

    offsets = any(is_clock(t) and ("+" in str(t)[10:] or str(t).endswith("Z") or
                                   "-" in str(t)[10:]) for t in texts)
    now = datetime.now().astimezone() if offsets else datetime.now()
    return now.isoformat(timespec="seconds")


def _history(doses, spec: DesignSpec, method: str, opts: dict[str, Any],
             col: Collector) -> None:
    """The recorded doses, the start and the initial level of an adjustment from levels,
    checked against the level times (all on the history clock)."""
    from .scenario import MAX_DOSE_EVENTS, DoseSpec

    if doses is not None and len(doses) > MAX_DOSE_EVENTS:
        col.add(f"{len(doses)} dose records, more than the {MAX_DOSE_EVENTS} pkcalc "
                "evaluates per scenario", "doses", f"at most {MAX_DOSE_EVENTS} doses in all "
                "(the earlier ones as an initial_concentration)")
        return
    events = []
    for i, raw in enumerate(doses or []):
        try:
            ev = DoseSpec.model_validate(raw).to_event(col, f"doses[{i}]")
        except ValidationError as exc:
            col.problems.extend(validation_problems(exc, prefix=f"doses[{i}]."))
            continue
        if ev is not None:
            events.append(ev)
    if sum(e.count for e in events) > MAX_DOSE_EVENTS:
        col.add(f"the doses expand to {sum(e.count for e in events)} single doses, more than "
                f"the {MAX_DOSE_EVENTS} pkcalc evaluates per scenario", "doses",
                f"at most {MAX_DOSE_EVENTS} doses in all")
        return
    d = spec
    start = col.q(d.start, "time", "design.start", nonnegative=True)
    initial = col.q(d.initial_concentration, "concentration", "design.initial_concentration",
                    nonnegative=True)
    if method == "map" and not events and not doses:
        col.add("method 'map' needs the doses given before the levels", "doses",
                "doses = [ { start = '0 h', amount = '500 mg', duration = '1 h' } ]")
    if not events:
        if doses is None and (start is not None or initial is not None):
            col.add("'start' and 'initial_concentration' need the dose history", "doses",
                    "doses = [...] with the recorded doses (times on one clock)")
        return
    opts.update(history=events, start=start, initial_concentration=initial)
    if method == "map":
        opts["doses"] = opts.pop("history")
    levels = _level_times(method, opts)
    first_dose = min(e.start for e in events)
    for label, t in levels:
        if t < first_dose and not initial:
            col.add(f"the level at {t:g} h is before the first recorded dose ({first_dose:g} h): "
                    "a level before any dose needs initial_concentration (drug on board from "
                    "earlier therapy)", label, "initial_concentration = '2 mg/L', or the "
                    "earlier doses in doses = [...]")
    times = [t for _, t in levels]
    if method in ("map", "chiou") and any(b <= a for a, b in itertools.pairwise(times)):
        col.add("the levels are not in time order on the dose-history clock",
                levels[0][0].split("[")[0], "levels listed in increasing time, each at its "
                "own time")
    if start is not None and times and start < max(times):
        col.add(f"start {start:g} h is before the last level ({max(times):g} h): a new "
                "regimen cannot begin before the levels it is based on", "design.start",
                "a start at or after the last level")


def _level_times(method: str, opts: dict[str, Any]) -> list[tuple[str, float]]:
    if method == "map":
        return [(f"design.levels[{i}].time", t) for i, (t, _) in enumerate(opts["levels"])]
    if method == "chiou":
        return [(f"design.samples[{i}].time", opts[f"t{i + 1}"]) for i in range(2)
                if opts.get(f"t{i + 1}") is not None]
    if method == "sawchuk_zaske":
        return [(f"design.{k}_sample.time", opts[f"{k}_time"]) for k in ("peak", "trough")
                if opts.get(f"{k}_time") is not None]
    t = opts.get("measured_time")
    return [] if t is None else [("design.measured.time", t)]


def load_design_file(path: str | Path) -> ScenarioFile:
    """Load the scenarios of a file that have a ``[scenarios.design]`` table."""
    sf = load_items(path, DesignCaseSpec, keep=lambda raw: "design" in raw)
    if not sf.scenarios and not sf.failures:
        raise PkcalcInputError("no scenario has a [scenarios.design] table", file=str(path),
                               field="design", expected="a [scenarios.design] table")
    return sf
