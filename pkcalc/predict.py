"""Predict a scenario: profile, plateau, time to plateau, steady state, target flags.

Builds on :mod:`pkcalc.model` only; inputs are validated canonical
:class:`~pkcalc.schema.ScenarioInput` objects (or the :func:`predict` keyword
form with plain numbers in canonical units).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from . import glossary, model
from ._format import format_table, short, with_caution
from .core import DoseEvent, ScenarioInput, Target, expand_events
from .errors import PkcalcInputError, check_type
from .plausibility import parameter_warnings

__all__ = [
    "FRACTIONS",
    "ScenarioPrediction",
    "SteadyState",
    "default_times",
    "plot_grid",
    "predict_course",
    "predict_scenario",
    "repeating_tail",
]

#: Fractions of plateau reported by default.
FRACTIONS = (0.5, 0.9, 0.95, 0.99)

#: A plateau within this relative distance of its target counts as on target (common practice).
TARGET_RTOL = 0.10

#: Points of the automatic time grid.
DEFAULT_POINTS = 601


@dataclass(frozen=True)
class SteadyState:
    """Periodic steady state of repeated doses (mg/L; interval in h)."""

    peak: float
    trough: float
    average: float
    interval: float


@dataclass(frozen=True)
class ScenarioPrediction:
    """What one scenario predicts, in canonical units.

    Attributes
    ----------
    name : str
    parameters : dict of str to float
        ``clearance`` (L/h), ``volume`` (L), ``elimination_rate`` (1/h),
        ``half_life`` (h), ``time_constant`` (h).
    plateau_concentration : float or None, mg/L
        Plateau of the maintenance input: the final constant infusion rate
        divided by clearance, or for repeated doses the average steady-state
        level ``sum(dose)/(CL tau)``.  None when no sustained input is given.
    plateau_basis : str
        How the plateau was obtained, in words.
    time_to_fraction : dict of float to float, h
        Time for a constant-rate infusion to reach each fraction of its plateau.
    time, concentration : ndarray, h and mg/L
        The profile at the requested (or automatic) times.
    steady_state : SteadyState or None
        For repeated doses.
    target : Target or None
    flags : list of str
        Target or window checks that failed, in plain words.
    warnings : list of str
        Plausibility and modelling warnings.
    """

    name: str
    parameters: dict[str, float]
    plateau_concentration: float | None
    plateau_basis: str
    time_to_fraction: dict[float, float]
    time: np.ndarray
    concentration: np.ndarray
    steady_state: SteadyState | None
    doses: tuple[DoseEvent, ...]
    target: Target | None = None
    flags: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    weight: float | None = None
    initial_concentration: float = 0.0
    highest: float | None = None
    highest_time: float | None = None
    clock_origin: str | None = None

    def model_events(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Single events for :func:`pkcalc.model.concentration` (initial level included)."""
        return model_events(self.doses, self.initial_concentration)

    def concentration_at(self, t) -> np.ndarray:
        """Concentration (mg/L) at any times ``t`` (h) under this scenario's doses."""
        return model.concentration(np.atleast_1d(np.asarray(t, float)), *self.model_events(),
                                   self.parameters["clearance"], self.parameters["volume"])

    def _repr_html_(self) -> str:
        """Notebook view: the caution, the table and the summary."""
        from ._format import result_html

        return result_html(self.summary(caution=False), self.to_frame())

    def to_frame(self):
        """The profile as a DataFrame with columns ``time [h]``, ``concentration [mg/L]``."""
        import pandas as pd

        return pd.DataFrame({"time [h]": self.time, "concentration [mg/L]": self.concentration})

    def summary(self, caution: bool = True) -> str:
        """A plain-text summary in canonical units, after the caution (``caution=False``:
        without, for reports that print it themselves)."""
        p = self.parameters
        rows = [
            ["clearance", p["clearance"], "L/h"],
            ["volume", p["volume"], "L"],
            [glossary.label("elimination_rate"), p["elimination_rate"], "1/h"],
            [glossary.label("half_life"), p["half_life"], "h"],
            [glossary.label("time_constant"), p["time_constant"], "h"],
            [glossary.label("plateau"), self.plateau_concentration, "mg/L"],
        ]
        rows += [[glossary.time_to_label(f), t, "h"] for f, t in self.time_to_fraction.items()]
        if self.steady_state is not None:
            ss = self.steady_state
            rows += [["steady-state peak", ss.peak, "mg/L"],
                     ["steady-state trough", ss.trough, "mg/L"],
                     ["steady-state average", ss.average, "mg/L"]]
        text = [f"Scenario: {self.name}", format_table(["quantity", "value", "unit"], rows),
                f"plateau basis: {self.plateau_basis}"]
        text += [f"FLAG: {f}" for f in self.flags]
        text += [f"warning: {w}" for w in self.warnings]
        return with_caution("\n".join(text), caution)


# --------------------------------------------------------------------------- helpers
def model_events(doses: Sequence[DoseEvent], initial_concentration: float = 0.0):
    """Single events of a dose list for the model, with an initial level at time 0."""
    start, amount, duration = expand_events(doses)
    if initial_concentration:
        return (np.append(start, 0.0), np.append(amount, initial_concentration),
                np.append(duration, model.INITIAL_LEVEL))
    return start, amount, duration


def _events_span(doses: Sequence[DoseEvent]) -> float:
    return max((d.end for d in doses), default=0.0)


#: Dose boundaries added to grids at most (the first and the last doses' ones).
MAX_MARKS = 4_000


def _marks(doses: Sequence[DoseEvent]) -> np.ndarray:
    """Starts and ends of the doses, for grids: all of them, or for very long
    histories those of the first 500 and the last 1,500 doses."""
    start, _, duration = expand_events(doses)
    if start.size * 2 > MAX_MARKS:
        keep = np.r_[0:500, start.size - 1500:start.size]
        start, duration = start[keep], duration[keep]
    return np.concatenate([start, start + duration])


def default_times(doses: Sequence[DoseEvent], half_life: float,
                  points: int = DEFAULT_POINTS) -> np.ndarray:
    """Automatic times: 0 to the end of dosing plus five half-lives, with every dose
    start and end added so that no peak or trough falls between grid points.

    Five half-lives is where about 97 % of a dose has been eliminated (common practice).
    """
    horizon = _events_span(doses) + 5.0 * half_life
    marks = _marks(doses)
    return np.unique(np.concatenate([np.linspace(0.0, horizon, points),
                                     marks[(marks >= 0) & (marks <= horizon)]]))


def plot_grid(times: np.ndarray, doses: Sequence[DoseEvent], points: int = 1201) -> np.ndarray:
    """A dense grid for drawing: the profile's span, event starts and ends, and a
    point just before each bolus so that its jump is drawn vertically."""
    t_max = float(times.max()) if times.size else 0.0
    start, _, duration = expand_events(doses)
    marks = _marks(doses)
    eps = 1e-9 * max(t_max, 1.0)
    before_bolus = start[duration == 0][:MAX_MARKS // 2] - eps
    if times.size > 20_000:  # a drawing needs no more points than that
        times = times[:: times.size // 20_000 + 1]
    grid = np.concatenate([np.linspace(0.0, t_max, points), times, marks, before_bolus])
    grid = grid[(grid >= 0) & (grid <= t_max)]
    return np.unique(grid)


def _rate_segments(doses: Sequence[DoseEvent]) -> tuple[np.ndarray, np.ndarray]:
    """Piecewise-constant total infusion rate: breakpoints and rate after each."""
    start, amount, duration = expand_events([d for d in doses if d.duration > 0])
    if start.size == 0:
        return np.empty(0), np.empty(0)
    rate = amount / duration
    marks = np.concatenate([start, start + duration])
    steps = np.concatenate([rate, -rate])
    order = np.argsort(marks, kind="stable")
    marks, steps = marks[order], steps[order]
    uniq, idx = np.unique(marks, return_index=True)
    level = np.cumsum(steps)
    # the level after all changes at a breakpoint
    last_idx = np.append(idx[1:] - 1, steps.size - 1)
    return uniq, np.clip(level[last_idx], 0.0, None)


#: A dose list ends in a repeating pattern when at least this many alike doses (the same
#: amounts and durations starting together) follow each other at equal gaps.
PATTERN_DOSES = 3
#: Gaps that agree to this relative difference count as equal.
PATTERN_RTOL = 1e-6


def repeating_tail(doses: Sequence[DoseEvent]) -> list[DoseEvent] | None:
    """The repeating pattern a dose list ends in, as repeated dose records (one per dose of
    the repeated group, with ``every`` and ``count``), or None.

    The doses are grouped by start time; walking back from the last group, groups that
    repeat the last one (the same amounts and durations) at one gap form the pattern,
    which needs :data:`PATTERN_DOSES` groups, every infusion no longer than the gap, and
    no other dose still running when it begins.
    """
    start, amount, duration = expand_events(doses)
    if start.size < PATTERN_DOSES:
        return None
    starts, inverse = np.unique(start, return_inverse=True)
    groups = [sorted(zip(amount[inverse == g].tolist(), duration[inverse == g].tolist(),
                         strict=True)) for g in range(starts.size)]
    last = groups[-1]
    n = 1
    gap = None
    while n < starts.size and groups[-1 - n] == last:
        step = float(starts[-n] - starts[-1 - n])
        if gap is None:
            gap = step
        elif abs(step - gap) > PATTERN_RTOL * gap:
            break
        n += 1
    if gap is None or n < PATTERN_DOSES or max(d for _, d in last) > gap * (1 + PATTERN_RTOL):
        return None
    first = float(starts[-n])
    before = inverse < starts.size - n
    if np.any(start[before] + duration[before] > first + PATTERN_RTOL * gap):
        return None
    return [DoseEvent(first, a, d, gap, n) for a, d in last]


def _plateau(doses: Sequence[DoseEvent], clearance: float, volume: float,
             trains: list[DoseEvent]) -> tuple[float | None, str]:
    """The plateau and how it was found: the average steady-state level of repeated
    doses; the level the final rate approaches when the doses end in a constant-rate
    infusion; else none."""
    if trains:
        rate = sum(d.amount / d.every for d in trains)  # type: ignore[operator]
        return float(model.plateau_concentration(rate, clearance)), (
            f"average steady-state level of the repeated doses: mean input {rate:.4g} mg/h / CL"
        )
    marks, level = _rate_segments(doses)
    positive = np.flatnonzero(level > 1e-12 * (level.max() if level.size else 1.0))
    if positive.size == 0:
        return None, "no constant-rate infusion: no plateau"
    j = int(positive[-1])
    rate = float(level[j])
    # a constant-rate infusion ends the doses when its last segment is at least as long as
    # every gap between the dose starts before it (not one of several short infusions)
    length = float(marks[j + 1] - marks[j]) if j + 1 < marks.size else np.inf
    starts = np.unique(expand_events(doses)[0])
    starts = starts[starts <= marks[j]]
    longest_gap = float(np.diff(starts).max()) if starts.size > 1 else 0.0
    if length < longest_gap:
        return None, ("the doses end neither in a constant-rate infusion nor in a repeating "
                      f"pattern ({PATTERN_DOSES} or more alike doses at equal gaps): no "
                      "plateau is defined")
    basis = f"final infusion rate {rate:.4g} mg/h / CL"
    if np.isfinite(length):
        reached = float(model.fraction_of_plateau(length, clearance, volume))
        basis += (f" (the level it approaches if continued; {reached:.0%} of it is reached "
                  f"when the infusion stops after {short(length)} h)")
    return float(model.plateau_concentration(rate, clearance)), basis


def _steady_state(trains: list[DoseEvent], clearance: float, volume: float,
                  warnings: list[str]) -> SteadyState | None:
    if not trains:
        return None
    tau = trains[0].every
    assert tau is not None
    if any(not np.isclose(d.every, tau, rtol=1e-9) for d in trains):  # type: ignore[arg-type]
        warnings.append("repeated doses have different intervals: no common steady state reported")
        return None
    # an infusion as long as its interval (back to back) is allowed: the gaps of a listed
    # course are differences of start times, a rounding below the infusion time
    if any(d.duration > tau * (1 + 1e-9) for d in trains):
        warnings.append("an infusion lasts longer than its interval: steady state not reported")
        return None
    peak, trough, avg = model.steady_state_periodic(
        [d.start for d in trains], [d.amount for d in trains],
        [min(d.duration, tau) for d in trains], tau, clearance, volume,
    )
    return SteadyState(peak, trough, avg, float(tau))


def _target_flags(target: Target | None, plateau: float | None, ss: SteadyState | None,
                  profile_max: float) -> list[str]:
    if target is None:
        return []
    flags = []
    if target.plateau is not None and plateau is not None:
        rel = plateau / target.plateau - 1.0
        if abs(rel) > TARGET_RTOL:
            flags.append(
                f"plateau {short(plateau)} mg/L is {rel:+.0%} from the target "
                f"{short(target.plateau)} mg/L (more than {TARGET_RTOL:.0%})"
            )
    if target.plateau is not None and plateau is None:
        flags.append("a plateau target is given but the regimen has no sustained input")
    for label, value in (("plateau", plateau),
                         ("steady-state peak", ss.peak if ss else None),
                         ("steady-state trough", ss.trough if ss else None)):
        if value is None:
            continue
        if target.high is not None and value > target.high:
            flags.append(f"{label} {short(value)} mg/L is above the window high "
                         f"{short(target.high)} mg/L")
        if target.low is not None and value < target.low:
            flags.append(f"{label} {short(value)} mg/L is below the window low {short(target.low)}"
                         " mg/L")
    if target.high is not None and profile_max > target.high:
        flags.append(f"the profile reaches {short(profile_max)} mg/L, above the window high "
                     f"{short(target.high)} mg/L")
    return flags


# --------------------------------------------------------------------------- entry points
def predict_scenario(scenario: ScenarioInput, fractions: Sequence[float] = FRACTIONS
                     ) -> ScenarioPrediction:
    """Predict one validated scenario.

    Parameters
    ----------
    scenario : ScenarioInput
        Canonical, validated input (see :func:`pkcalc.schema.load_scenario_file`).
    fractions : sequence of float
        Fractions of plateau for the time-to-fraction table.

    Returns
    -------
    ScenarioPrediction
    """
    check_type(scenario, ScenarioInput, "scenario",
               "a pkcalc.ScenarioInput (or use predict_course with plain numbers)")
    cl, v = scenario.clearance, scenario.volume
    params = model.derived_parameters(cl, v)
    doses = scenario.doses
    times = scenario.times if scenario.times is not None else default_times(
        doses, params["half_life"])
    start, amount, duration = model_events(doses, scenario.initial_concentration)
    conc = model.concentration(times, start, amount, duration, cl, v)
    trains = [d for d in doses if d.count > 1]
    warnings = parameter_warnings(cl, v, scenario.weight)
    listed = None if trains else repeating_tail(doses)
    plateau, basis = _plateau(doses, cl, v, trains or listed or [])
    ss = _steady_state(trains or listed or [], cl, v, warnings)
    if listed:
        basis += (f" (the list ends in {listed[0].count} alike doses every "
                  f"{short(listed[0].every)} h, continued)")
        if len(expand_events(doses)[0]) > listed[0].count * len(listed):
            warnings.append("steady state considers the repeating doses at the end of the "
                            "list; the doses before them wash out")
    elif trains and any(d.count == 1 for d in doses):
        warnings.append("steady state considers only the repeated doses; single doses wash out")
    highest, highest_time = _highest(times, doses, (start, amount, duration), cl, v)
    profile_max = highest
    step = float(np.diff(times).max()) if times.size > 1 else 0.0
    if scenario.times is not None and step > params["half_life"] / 5 and \
            highest > 1.01 * float(conc.max()):
        warnings.append(
            f"the requested times are up to {short(step)} h apart, coarser than a fifth of the "
            f"half-life ({short(params['half_life'])} h): the listed profile misses the peak "
            f"({short(highest)} mg/L at {short(highest_time)} h; the highest listed is "
            f"{short(float(conc.max()))} mg/L); the plot shows the full course")
    flags = _target_flags(scenario.target, plateau, ss, profile_max)
    ttf = {f: float(model.time_to_fraction(f, cl, v)) for f in fractions}
    numbers = [conc, highest, plateau or 0.0, *ttf.values(),
               *((ss.peak, ss.trough, ss.average) if ss else ())]
    if not all(np.all(np.isfinite(x)) for x in numbers):
        raise ValueError("a result is not a finite number (overflow beyond float64): check "
                         "the units of the parameters and doses")
    return ScenarioPrediction(
        name=scenario.name, parameters=params, plateau_concentration=plateau,
        plateau_basis=basis, time_to_fraction=ttf, time=times, concentration=conc,
        steady_state=ss, doses=doses, target=scenario.target, flags=flags, warnings=warnings,
        weight=scenario.weight, initial_concentration=scenario.initial_concentration,
        highest=highest, highest_time=highest_time,
        clock_origin=scenario.extra.get("clock_origin"),
    )


def _highest(times, doses, events, cl, v) -> tuple[float, float]:
    """Highest level at the requested times and at every event boundary (both sides):
    between boundaries a one-compartment course is monotone, so this is exact."""
    marks = np.concatenate([times, _marks(doses)])
    marks = marks[(marks >= times.min()) & (marks <= times.max())] if times.size else marks
    eps = 1e-9 * max(1.0, float(marks.max()) if marks.size else 1.0)
    grid = np.concatenate([marks, np.maximum(marks - eps, 0.0)])
    c = model.concentration(grid, *events, cl, v)
    i = int(np.argmax(c))
    return float(c[i]), float(grid[i])


def predict_course(*, clearance: float, volume: float, doses: Sequence[DoseEvent],
            times=None, name: str = "scenario", target: Target | None = None,
            weight: float | None = None, initial_concentration: float = 0.0
            ) -> ScenarioPrediction:
    """Predict from plain numbers in canonical units (L/h, L, h, mg).

    Examples
    --------
    >>> from pkcalc.core import DoseEvent
    >>> r = predict_course(clearance=3.0, volume=34.62, doses=[DoseEvent(0.0, 6000.0, 200.0)])
    >>> round(r.plateau_concentration, 6)
    10.0
    """
    for name, x in (("clearance", clearance), ("volume", volume)):
        check_type(x, (int, float, np.integer, np.floating), name,
                   f"a positive number ({'L/h' if name == 'clearance' else 'L'})")
        if not (np.isfinite(x) and x > 0):
            raise PkcalcInputError(f"must be positive, got {x!r}", field=name)
    check_type(doses, (list, tuple), "doses", "a list of pkcalc.DoseEvent")
    try:
        t = None if times is None else np.asarray(times, dtype=float)
    except (TypeError, ValueError):
        raise PkcalcInputError(f"got {type(times).__name__}", field="times",
                               expected="a sequence of times in h") from None
    scenario = ScenarioInput(name, float(clearance), float(volume), tuple(doses), t, weight,
                             target, initial_concentration=float(initial_concentration))
    return predict_scenario(scenario)
