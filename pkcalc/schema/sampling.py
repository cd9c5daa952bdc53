"""The ``[scenarios.sampling]`` table of ``pkcalc sampling`` (docs/formats.md, rules P1-P6).

A scenario's doses and clearance/volume are read as for ``predict``; the table
adds::

    [scenarios.sampling]
    levels = 3                                  # per subject
    window = ["1 h", "48 h"]                    # earliest, latest (or date-times)
    error = { proportional = "15%", additive = "0.2 mg/L" }
    cv_clearance = "30%"                        # between-subject variability
    cv_volume = "20%"                           #   (or sd_log_clearance / sd_log_volume)
    correlation = 0.0
    design = "population"                       # individual | map | population
    subjects = 100                              # population, one group; or:
    groups = [ { name = "ward", subjects = 60, levels = 2 }, ... ]
    avoid_infusion = true                       # no level during an infusion
    daytime = ["06:00", "22:00"]                # clock scenarios only
    min_spacing = "30 min"
    candidates = ["1 h", "2 h", ...]            # draw only at these times
    compare = [["2 h", "24 h"]]                 # your schedules (individual, map)
    criterion = "D"                             # D (default) or A

Times are on the doses' clock: relative quantities, or ISO 8601 date-times when
the doses are.
"""

from __future__ import annotations

import math
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np

from ..core import (
    MAX_SAMPLING_LEVELS,
    SAMPLING_CRITERIA,
    SAMPLING_DESIGNS,
    SamplingGroup,
    SamplingProblem,
    ScenarioInput,
)
from ..errors import PkcalcInputError, Problem
from .base import Collector, ScenarioFile

__all__ = ["KEYS", "load_sampling_file", "sampling_problem"]

KEYS = ("levels", "window", "error", "cv_clearance", "cv_volume", "sd_log_clearance",
        "sd_log_volume", "correlation", "design", "subjects", "groups", "avoid_infusion",
        "daytime", "timezone", "min_spacing", "candidates", "compare", "criterion")
#: A design's levels are searched over at most this many candidate times.
MAX_CANDIDATES = 2000
#: Most groups of a population design, and most sampling times to choose in all (the
#: design searches over every time of every group: bounded work).
MAX_GROUPS = 20
MAX_TOTAL_LEVELS = 96
#: Beyond the last dose, the horizon in half-lives (the level is then < 0.1 % of
#: what it was: 2^-10).
HORIZON_HALF_LIVES = 10.0


def load_sampling_file(path: str | Path) -> ScenarioFile:
    """The scenarios of a file that have a ``[scenarios.sampling]`` table."""
    from .scenario import load_scenario_file

    sf = load_scenario_file(path, keep=lambda raw: "sampling" in raw)
    if not sf.scenarios and not sf.failures:
        raise PkcalcInputError("no scenario has a [scenarios.sampling] table", file=str(path),
                               field="sampling", expected="a [scenarios.sampling] table")
    return sf


def _time(col: Collector, text: Any, field: str, origin: datetime | None) -> float | None:
    """A time on the doses' clock: a quantity, or a date-time when the doses are."""
    from ..clock import hours_since, is_clock, parse_clock, same_kind

    if is_clock(text):
        if origin is None:
            col.add(f"'{text}' is a date-time but the doses are relative times", field,
                    "a time with a unit, e.g. '12 h'")
            return None
        try:
            t = parse_clock(text, field=field)
            same_kind([t, origin], field=field)
        except (PkcalcInputError, TypeError) as exc:
            if isinstance(exc, PkcalcInputError):
                col.problems.extend(exc.problems)
            else:
                col.add("mixes a time-zone offset with date-times without one", field)
            return None
        return hours_since(t, origin)
    if origin is not None:
        col.add(f"'{text}' is a relative time but the doses are date-times", field,
                "an ISO 8601 date-time, e.g. '2026-03-02T08:00'")
        return None
    return col.q(text, "time", field, nonnegative=True)


def _times(col, raw, field, origin) -> tuple[float, ...] | None:
    if not isinstance(raw, list) or not raw:
        col.add("must be a list of times", field, "e.g. ['2 h', '12 h']")
        return None
    out = [_time(col, x, f"{field}[{i}]", origin) for i, x in enumerate(raw)]
    return None if any(t is None for t in out) else tuple(sorted(out))


def _hours_in_zone(col, raw: dict, origin: datetime | None, win, daytime
                   ) -> tuple[tuple[float, float], ...]:
    """The periods outside ``daytime`` on the scenario's clock, counted in the time zone
    ``timezone`` (IANA name) with its daylight-saving changes.  Without a zone the hours
    of the day follow the first dose's UTC offset throughout -- refused when the
    window's date-times carry another offset (a change of summer time in between)."""
    from datetime import time as clock_time
    from datetime import timedelta

    zone_name = raw.get("timezone")
    if zone_name is None:
        if daytime is not None and origin is not None and origin.tzinfo is not None \
                and win is not None:
            ends = [origin + timedelta(hours=t) for t in win]
            offsets = {origin.utcoffset()} | {e.utcoffset() for e in ends}
            texts = [w for w in raw.get("window", []) if isinstance(w, str)]
            stated = set()
            for text in texts:
                try:
                    stated.add(datetime.fromisoformat(text).utcoffset())
                except ValueError:
                    pass
            if len(offsets | stated) > 1:
                col.add("the date-times carry different UTC offsets (a change of summer "
                        "time?): the hours of the day need the time zone", "sampling.daytime",
                        "timezone = 'Europe/Paris' (an IANA time-zone name)")
        return ()
    if daytime is None:
        col.add("a time zone is used only with daytime", "sampling.timezone",
                "daytime = ['06:00', '22:00']")
        return ()
    try:
        from zoneinfo import ZoneInfo

        zone = ZoneInfo(str(zone_name))
    except (KeyError, ValueError, OSError, ImportError):
        col.add(f"'{zone_name}' is not a time-zone name", "sampling.timezone",
                "an IANA name such as 'Europe/Paris' or 'America/New_York'")
        return ()
    if origin is None or origin.tzinfo is None:
        col.add("a time zone needs date-times with their UTC offset", "sampling.timezone",
                "doses with start = '2026-03-28T08:00+01:00'")
        return ()
    if win is None:
        return ()
    a, b = daytime

    def wall(day, hour: float) -> datetime:
        day = day + timedelta(days=int(hour // 24))
        h = hour % 24
        return datetime.combine(day, clock_time(int(h), round(h % 1 * 60) % 60),
                                tzinfo=zone)

    first = (origin + timedelta(hours=win[0])).astimezone(zone).date() - timedelta(days=1)
    last = (origin + timedelta(hours=win[1])).astimezone(zone).date() + timedelta(days=1)
    out = []
    day = first
    while day <= last:
        lo, hi = (wall(day, b), wall(day, a + 24)) if a < b else (wall(day, b), wall(day, a))
        out.append(((lo - origin).total_seconds() / 3600, (hi - origin).total_seconds() / 3600))
        day += timedelta(days=1)
    return tuple(out)


def _hour_of_day(col, text, field) -> float | None:
    if not isinstance(text, str) or text.count(":") != 1:
        col.add(f"'{text}' is not an hour of the day", field, "HH:MM, e.g. '06:00'")
        return None
    hh, mm = text.split(":")
    if not (hh.isdigit() and mm.isdigit() and 0 <= int(hh) <= 24 and 0 <= int(mm) < 60):
        col.add(f"'{text}' is not an hour of the day", field, "HH:MM, e.g. '06:00'")
        return None
    return int(hh) + int(mm) / 60.0


def _variability(raw: dict, col: Collector) -> np.ndarray | None:
    """Covariance of ln CL and ln V from CVs (ln(1 + CV^2)) or SDs of the log."""
    from .fitopts import _percent_or_number

    sds = {}
    for name in ("clearance", "volume"):
        cv, sd = raw.get(f"cv_{name}"), raw.get(f"sd_log_{name}")
        if cv is not None and sd is not None:
            col.add("give one of cv_ and sd_log_", f"sampling.cv_{name}")
            continue
        if cv is not None:
            value = _percent_or_number(cv, f"sampling.cv_{name}", col.problems, None)
            if value is not None:
                if not value >= 0:
                    col.add("must not be negative", f"sampling.cv_{name}")
                else:
                    sds[name] = math.sqrt(math.log1p(value**2))
        elif sd is not None:
            if not isinstance(sd, int | float) or isinstance(sd, bool) or not 0 <= sd <= 5:
                col.add("must be a number from 0 to 5", f"sampling.sd_log_{name}")
            else:
                sds[name] = float(sd)
    corr = raw.get("correlation", 0.0)
    if not isinstance(corr, int | float) or isinstance(corr, bool) or not -1 < corr < 1:
        col.add("must be a number in (-1, 1)", "sampling.correlation")
        corr = 0.0
    if not sds:
        if corr:
            col.add("a correlation needs cv_clearance and cv_volume", "sampling.correlation")
        return None
    if len(sds) == 1:
        col.add("give the variability of both clearance and volume", "sampling.cv_volume"
                if "clearance" in sds else "sampling.cv_clearance")
        return None
    a, b = sds["clearance"], sds["volume"]
    return np.array([[a * a, corr * a * b], [corr * a * b, b * b]])


def _groups(raw: dict, col: Collector, design: str, levels, origin) -> list[SamplingGroup]:
    groups = raw.get("groups")
    if groups is None:
        subjects = raw.get("subjects", 1)
        if design == "population" and "subjects" not in raw:
            col.add("a population design needs the number of subjects", "sampling.subjects",
                    "subjects = 100, or groups = [{ subjects = 50, levels = 2 }, ...]")
            return []
        if design != "population" and subjects != 1:
            kind = "an individual" if design == "individual" else "a MAP"
            col.add(f"{kind} design is for one subject", "sampling.subjects",
                    "design = 'population' for a study")
            return []
        if not isinstance(subjects, int) or isinstance(subjects, bool) or subjects < 1:
            col.add("must be a whole number >= 1", "sampling.subjects")
            return []
        if levels is None:
            col.add("is required", "sampling.levels", "how many levels per subject, e.g. 3")
            return []
        return [SamplingGroup("all" if design == "population" else "patient", subjects,
                              levels)]
    if design != "population":
        col.add("groups belong to a population design", "sampling.groups",
                "design = 'population'")
        return []
    if not isinstance(groups, list) or not groups:
        col.add("must be a list of tables", "sampling.groups",
                "[{ name = 'A', subjects = 50, levels = 2 }, ...]")
        return []
    if len(groups) > MAX_GROUPS:
        col.add(f"{len(groups)} groups; at most {MAX_GROUPS}", "sampling.groups",
                "fewer groups (subjects of one schedule form one group)")
        return []
    out = []
    for i, g in enumerate(groups):
        where = f"sampling.groups[{i}]"
        if not isinstance(g, dict):
            col.add("must be a table", where)
            continue
        for key in sorted(set(g) - {"name", "subjects", "levels", "times"}):
            col.add("unknown key", f"{where}.{key}", "name, subjects, levels, times")
        n, lv = g.get("subjects"), g.get("levels", levels)
        if not isinstance(n, int) or isinstance(n, bool) or n < 1:
            col.add("must be a whole number >= 1", f"{where}.subjects")
            continue
        if not _levels_ok(col, lv, f"{where}.levels"):
            continue
        times = _times(col, g["times"], f"{where}.times", origin) if "times" in g else None
        if times is not None and len(times) != lv:
            col.add(f"gives {len(times)} times for {lv} levels", f"{where}.times")
            continue
        out.append(SamplingGroup(str(g.get("name", f"group {i + 1}")), n, lv, times))
    total = sum(g.levels for g in out)
    if total > MAX_TOTAL_LEVELS:
        col.add(f"{total} sampling times to choose in all; at most {MAX_TOTAL_LEVELS}",
                "sampling.groups", "fewer groups or fewer levels per group")
        return []
    return out


def _levels_ok(col, levels, field) -> bool:
    if not isinstance(levels, int) or isinstance(levels, bool) \
            or not 1 <= levels <= MAX_SAMPLING_LEVELS:
        col.add(f"must be a whole number from 1 to {MAX_SAMPLING_LEVELS}", field)
        return False
    return True


def sampling_problem(s: ScenarioInput, *, starts: int = 12) -> SamplingProblem:
    """The validated design request of one scenario (problems name ``sampling.*``)."""
    from .fitopts import _prior_error

    raw = s.extra.get("sampling")
    col = Collector(s.weight)
    if not isinstance(raw, dict):
        raise PkcalcInputError("must be a table", field="sampling")
    for key in sorted(set(raw) - set(KEYS)):
        col.add("unknown key", f"sampling.{key}", ", ".join(KEYS))
    origin = datetime.fromisoformat(s.extra["clock_origin"]) if s.extra.get("clock_origin") \
        else None
    levels = raw.get("levels")
    if levels is not None and not _levels_ok(col, levels, "sampling.levels"):
        levels = None
    errs: list[Problem] = []
    if "error" not in raw:
        col.add("is required", "sampling.error",
                "error = { proportional = '15%' } and/or additive = '0.2 mg/L'")
        add = prop = 0.0
    else:
        add, prop = _prior_error({"error": raw["error"]}, errs, None)
    col.problems += [Problem(p.message, field=(p.field or "").replace("prior.", "sampling."),
                             expected=p.expected) for p in errs]
    omega = _variability(raw, col)
    design = raw.get("design", "individual" if omega is None else
                     "population" if ("subjects" in raw or "groups" in raw) else "map")
    if design not in SAMPLING_DESIGNS:
        col.add(f"'{design}' is not a design", "sampling.design", ", ".join(SAMPLING_DESIGNS))
        design = "individual"
    if design in ("map", "population") and (omega is None or omega[0, 0] == 0
                                            or omega[1, 1] == 0):
        col.add(f"a {design} design needs between-subject variability above zero",
                "sampling.cv_clearance", "cv_clearance and cv_volume, e.g. '30%' and '20%'")
    if design == "individual" and omega is not None:
        col.add("an individual design takes no variability (the patient's values are "
                "given)", "sampling.cv_clearance",
                "design = 'map' to use it as a prior, or 'population'")
    window = raw.get("window")
    win = None
    if not isinstance(window, list) or len(window) != 2:
        col.add("must be [earliest, latest]", "sampling.window", "e.g. ['1 h', '48 h']")
    else:
        lo = _time(col, window[0], "sampling.window[0]", origin)
        hi = _time(col, window[1], "sampling.window[1]", origin)
        if lo is not None and hi is not None:
            if not lo < hi:
                col.add("the earliest time is not before the latest", "sampling.window")
            else:
                win = (lo, hi)
    groups = _groups(raw, col, design, levels, origin)
    avoid = raw.get("avoid_infusion", False)
    if not isinstance(avoid, bool):
        col.add("must be true or false", "sampling.avoid_infusion")
        avoid = False
    daytime = None
    if "daytime" in raw:
        d = raw["daytime"]
        if origin is None:
            col.add("needs a scenario on the clock (dose starts as date-times)",
                    "sampling.daytime", "doses with start = '2026-03-02T08:00'")
        elif not isinstance(d, list) or len(d) != 2:
            col.add("must be [from, to]", "sampling.daytime", "e.g. ['06:00', '22:00']")
        else:
            a = _hour_of_day(col, d[0], "sampling.daytime[0]")
            b = _hour_of_day(col, d[1], "sampling.daytime[1]")
            if a is not None and b is not None:
                if a % 24 == b % 24:
                    col.add("from and to are the same hour", "sampling.daytime")
                else:
                    daytime = (a % 24, b % 24)
    spacing = col.q(raw.get("min_spacing", "0 h"), "time", "sampling.min_spacing",
                    nonnegative=True) or 0.0
    cands = _times(col, raw["candidates"], "sampling.candidates", origin) \
        if "candidates" in raw else None
    if cands is not None and len(cands) > MAX_CANDIDATES:
        col.add(f"{len(cands)} candidate times; at most {MAX_CANDIDATES:,}",
                "sampling.candidates")
    compare = []
    if "compare" in raw:
        c = raw["compare"]
        if not isinstance(c, list) or not c or not all(isinstance(x, list) for x in c):
            col.add("must be a list of schedules", "sampling.compare",
                    "e.g. [['2 h', '24 h'], ['1 h', '12 h']]")
        elif len(groups) != 1:
            col.add("with several groups give each group's times", "sampling.compare",
                    "groups = [{ ..., times = ['2 h', '24 h'] }]")
        else:
            for i, sched in enumerate(c):
                t = _times(col, sched, f"sampling.compare[{i}]", origin)
                if t is not None and groups and len(t) != groups[0].levels:
                    col.add(f"gives {len(t)} times for {groups[0].levels} levels",
                            f"sampling.compare[{i}]")
                elif t is not None:
                    compare.append(t)
    criterion = raw.get("criterion", "D")
    if criterion not in SAMPLING_CRITERIA:
        col.add(f"'{criterion}' is not a criterion", "sampling.criterion", "D or A")
        criterion = "D"
    excluded = _hours_in_zone(col, raw, origin, win, daytime)
    col.raise_if_any()
    _check_times(s, win, groups, cands, compare, design)
    clock_hour = None
    if origin is not None:
        clock_hour = origin.hour + origin.minute / 60.0 + origin.second / 3600.0
    return SamplingProblem(
        name=s.name, design=design, clearance=s.clearance, volume=s.volume, doses=s.doses,
        additive=add, proportional=prop, groups=tuple(groups), window=win, omega=omega,
        initial_concentration=s.initial_concentration, avoid_infusion=avoid,
        daytime=daytime, clock_hour=clock_hour, excluded=excluded,
        clock_origin=s.extra.get("clock_origin"),
        min_spacing=spacing, candidates=cands, compare=tuple(compare), criterion=criterion,
        starts=starts)


def _check_times(s: ScenarioInput, win, groups, cands, compare, design) -> None:
    """Every time inside the window; the window inside the simulated horizon (P3)."""
    from ..core import expand_events
    from ..model import LN2

    start, _, duration = expand_events(s.doses)
    half_life = LN2 * s.volume / s.clearance
    horizon = float(np.max(start + np.maximum(duration, 0.0))) + HORIZON_HALF_LIVES * half_life
    col = Collector()
    if win[1] > horizon:
        col.add(f"the window ends at {win[1]:g} h, after the horizon of {horizon:g} h (the "
                f"last dose's end + {HORIZON_HALF_LIVES:g} half-lives, when the level is "
                "below 0.1 % of its value)", "sampling.window",
                f"a latest time up to {horizon:g} h")
    lo, hi = win

    def outside(times, field):
        bad = [t for t in times if not lo - 1e-9 <= t <= hi + 1e-9]
        if bad:
            col.add(f"{len(bad)} time(s) outside the window {lo:g}-{hi:g} h (first "
                    f"{bad[0]:g} h)", field, "times inside sampling.window")
    if cands is not None:
        outside(cands, "sampling.candidates")
    for i, t in enumerate(compare):
        outside(t, f"sampling.compare[{i}]")
    for i, g in enumerate(groups):
        if g.times is not None:
            outside(g.times, f"sampling.groups[{i}].times")
    col.raise_if_any()
