"""Where the patient is now, and where a proposal takes them.

A proposal made from measured levels starts at a time on the dosing-history
clock.  From that time on the recorded doses are replaced (an infusion still
running then is cut there), the drug already on board decays with the
patient's elimination rate, and the proposal's doses superpose on it
(:func:`pkcalc.model.split_events`, :func:`pkcalc.model.concentration`).  A
proposal is judged on that projected course over :data:`PROJECTION_HORIZON`.

Between dose boundaries (starts and ends of infusions, boluses) every
one-compartment course is ``a + b exp(-k t)``, hence monotone, so its highest
and lowest values lie at those boundaries: the checks evaluate the course
there (both one-sided limits), which is exact, not a sampled grid.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .. import model

__all__ = ["PROJECTION_HORIZON", "TIME_STEP", "CurrentState", "Projection", "current_state",
           "prescribed_interval", "project", "round_time"]

#: How far ahead a proposal from levels is projected and judged, h.
PROJECTION_HORIZON = 72.0
#: Holds and starts are rounded to this step (15 min), a time a nurse can use
#: (common practice).
TIME_STEP = 0.25
#: Practical dosing intervals a recorded history is read against, h.
PRACTICAL_INTERVALS = (4.0, 6.0, 8.0, 12.0, 24.0, 36.0, 48.0, 72.0, 168.0)


def round_time(hours: float, step: float = TIME_STEP) -> float:
    """``hours`` to the nearest multiple of ``step`` (no rounding for ``step <= 0``)."""
    if step <= 0:
        return float(hours)
    return float(round(hours / step) * step)


@dataclass(frozen=True)
class CurrentState:
    """The patient at the moment a proposal starts (canonical units).

    Attributes
    ----------
    start : float, h
        When the proposal begins, on the history clock.
    level : float, mg/L
        Concentration the recorded history leaves at ``start`` (doses from
        ``start`` on withheld).
    basis : str
        Why this start, in words (``next scheduled dose``, ``last level``, ``given``).
    before : tuple of three ndarrays
        Single events (drug amounts; initial levels included) given before
        ``start``: ``(start, amount, duration)``.
    history : tuple of three ndarrays
        The whole recorded history as single events (drug), for plots.
    levels : tuple of (float, float)
        Measured levels ``(time h, mg/L)`` on the history clock, for plots.
    """

    start: float
    level: float
    basis: str
    before: tuple[np.ndarray, np.ndarray, np.ndarray]
    history: tuple[np.ndarray, np.ndarray, np.ndarray]
    levels: tuple[tuple[float, float], ...] = ()


def current_state(events, clearance: float, volume: float, start: float, basis: str,
                  levels=()) -> CurrentState:
    """The state at ``start`` left by single history ``events`` (drug amounts).

    Parameters
    ----------
    events : tuple of three array_like
        ``(start, amount, duration)`` of the recorded doses (and initial levels).
    clearance, volume : float, L/h and L
        The patient's estimates.
    start : float, h
    basis : str
    levels : iterable of (float, float)
    """
    events = tuple(np.asarray(a, dtype=float) for a in events)
    before, _ = model.split_events(*events, start)
    level = float(model.concentration([start], *before, clearance, volume)[0]) \
        if before[0].size else 0.0
    return CurrentState(start, level, basis, before, events,
                        tuple((float(t), float(c)) for t, c in levels))


@dataclass
class Projection:
    """A proposal's projected course from the current state.

    Attributes
    ----------
    start, end : float, h
        The projected span on the history clock.
    highest, highest_time : float, mg/L and h
    peaks : list of (float, float)
        ``(time, level)`` at the end of each new dose's infusion (after a bolus).
    troughs : list of (float, float)
        ``(time, level)`` just before each new dose after the first.
    lowest_after : float or None, mg/L
        Lowest level from ``settle`` on (None when not asked).
    level_at_end : float, mg/L
    auc_first_24 : float, mg h/L
        Area over the first 24 h of the proposal (mass balance).
    auc_windows : list of (float, float, float)
        ``(from, to, area)`` of every 24-h window of the horizon (mass balance).
    """

    start: float
    end: float
    highest: float
    highest_time: float
    peaks: list[tuple[float, float]] = field(default_factory=list)
    troughs: list[tuple[float, float]] = field(default_factory=list)
    lowest_after: float | None = None
    lowest_after_time: float | None = None
    level_at_end: float = 0.0
    auc_first_24: float = 0.0
    auc_windows: list[tuple[float, float, float]] = field(default_factory=list)


def project(state: CurrentState, new_events, clearance: float, volume: float, *,
            settle: float | None = None, horizon: float = PROJECTION_HORIZON) -> Projection:
    """Project the course from ``state`` under single ``new_events`` (drug amounts).

    Open-ended infusions must already be cut at ``state.start + horizon``.
    ``settle`` (h on the history clock) starts the window for ``lowest_after``.
    """
    t0, t1 = state.start, state.start + horizon
    new = tuple(np.asarray(a, dtype=float) for a in new_events)
    events = tuple(np.concatenate([b, n]) for b, n in zip(state.before, new, strict=True))
    marks = np.concatenate([[t0, t1], new[0], new[0] + np.maximum(new[2], 0.0)])
    if settle is not None:
        marks = np.append(marks, settle)
    marks = np.unique(marks[(marks >= t0) & (marks <= t1)])
    eps = 1e-9 * max(1.0, abs(t1))
    right = model.concentration(marks, *events, clearance, volume)
    left = model.concentration(np.maximum(marks - eps, t0), *events, clearance, volume)
    both = np.concatenate([right, left])
    both_t = np.concatenate([marks, marks])
    i = int(np.argmax(both))
    out = Projection(t0, t1, float(both[i]), float(both_t[i]),
                     level_at_end=float(right[-1]))
    ends = new[0] + np.maximum(new[2], 0.0)
    inside = (new[0] >= t0) & (new[0] < t1)
    if inside.any():
        pk_t = ends[inside]
        pk_t = pk_t[pk_t <= t1]
        out.peaks = [(float(t), float(c)) for t, c in
                     zip(pk_t, model.concentration(pk_t, *events, clearance, volume),
                         strict=True)]
        starts = np.unique(new[0][inside])[1:]
        tr = model.concentration(starts - eps, *events, clearance, volume)
        out.troughs = [(float(t), float(c)) for t, c in zip(starts, tr, strict=True)]
    if settle is not None:
        keep = both_t >= settle - 1e-12
        if keep.any():
            j = int(np.argmin(np.where(keep, both, np.inf)))
            out.lowest_after, out.lowest_after_time = float(both[j]), float(both_t[j])
    day = min(t0 + 24.0, t1)
    infused = _infused_between(events, t0, day)
    c_day = float(model.concentration([day], *events, clearance, volume)[0])
    c_start = float(model.concentration([t0], *events, clearance, volume)[0]) \
        - _bolus_level_at(new, t0, volume)
    out.auc_first_24 = float(model.area_by_mass_balance(infused, c_start, c_day,
                                                        clearance, volume))
    a = t0
    while a + 24.0 <= t1 + 1e-9:
        out.auc_windows.append((a, a + 24.0, _window_area(events, a, a + 24.0, clearance,
                                                          volume, t0, new)))
        a += 24.0
    return out


def _window_area(events, a: float, b: float, clearance: float, volume: float, t0: float,
                 new) -> float:
    """Area under the course over ``[a, b]`` by mass balance (boluses at ``a`` counted as
    input and not as the starting level)."""
    infused = _infused_between(events, a, b)
    c_a = float(model.concentration([a], *events, clearance, volume)[0]) \
        - _bolus_level_at(events if a > t0 else new, a, volume)
    c_b = float(model.concentration([b], *events, clearance, volume)[0])
    return float(model.area_by_mass_balance(infused, c_a, c_b, clearance, volume))


def _infused_between(events, a: float, b: float) -> float:
    """Drug amount entering in ``[a, b]`` (boluses at ``a`` included; initial levels not)."""
    start, amount, duration = events
    infusion = duration > 0
    given = np.where(infusion,
                     np.clip(np.minimum(b, start + duration) - np.maximum(a, start), 0.0, None)
                     / np.where(infusion, duration, 1.0) * amount,
                     np.where((duration == 0) & (start >= a) & (start <= b), amount, 0.0))
    return float(given.sum())


def _bolus_level_at(new, t: float, volume: float) -> float:
    """Level jump of new boluses given exactly at ``t`` (counted as input, not as a start)."""
    start, amount, duration = new
    return float(amount[(duration == 0) & (start == t)].sum() / volume)


def first_time_at_or_above(state: CurrentState, new_events, clearance: float, volume: float,
                           level: float, horizon: float = PROJECTION_HORIZON) -> float | None:
    """First time (h, history clock) the projected course reaches ``level``; None if never."""
    t = np.linspace(state.start, state.start + horizon, 4001)
    new = tuple(np.asarray(a, dtype=float) for a in new_events)
    events = tuple(np.concatenate([b, n]) for b, n in zip(state.before, new, strict=True))
    c = model.concentration(t, *events, clearance, volume)
    hit = np.flatnonzero(c >= level)
    return float(t[hit[0]]) if hit.size else None


def history_events(doses, salt_factor: float = 1.0, initial_concentration: float | None = None):
    """Single drug events of a recorded history (product amounts x ``S``), with an
    initial level at time 0 when given (see :data:`pkcalc.model.INITIAL_LEVEL`)."""
    doses = list(doses)
    if doses:
        st, am, du = model.expand_doses([d.start for d in doses], [d.amount for d in doses],
                                        [d.duration for d in doses],
                                        every=[d.every or 0.0 for d in doses],
                                        count=[d.count for d in doses])
    else:
        st, am, du = np.empty(0), np.empty(0), np.empty(0)
    am = am * salt_factor
    if initial_concentration:
        st, am, du = (np.append(st, 0.0), np.append(am, initial_concentration),
                      np.append(du, model.INITIAL_LEVEL))
    return st, am, du


def prescribed_interval(doses, interval: float | None = None) -> tuple[float | None, str]:
    """The interval of the regimen as prescribed, and how it was found: the stated
    ``interval``; else the ``every`` of the (last) repeated dose record; else the
    practical interval nearest (log scale) the median gap between recorded starts --
    a late dose lengthens one gap, it does not change the prescription."""
    if interval is not None:
        return float(interval), "as stated"
    doses = list(doses or [])
    repeated = [d for d in doses if getattr(d, "every", None) and getattr(d, "count", 1) > 1]
    if repeated:
        return float(repeated[-1].every), "the 'every' of the dose record"
    starts = np.unique([float(d.start) for d in doses])
    if starts.size < 2:
        return None, "a single dose"
    gaps = np.diff(starts)
    median = float(np.median(gaps))
    nearest = min(PRACTICAL_INTERVALS, key=lambda x: abs(np.log(x / median)))
    return nearest, (f"the practical interval nearest the median gap between recorded doses "
                     f"({median:.4g} h); give interval to state it")


def default_start(events, last_level: float, intermittent: bool,
                  interval: float | None = None) -> tuple[float, str]:
    """When a proposal from levels starts, and why.

    Intermittent regimens: the next recorded dose after the last level, else the
    next dose at the prescribed ``interval`` after the last recorded one (past the
    last level); continuous infusions, or otherwise: the time of the last level.
    """
    if intermittent:
        start, _, duration = events
        given = np.unique(start[duration >= 0])
        later = given[given > last_level]
        if later.size:
            return float(later.min()), "the next scheduled dose (recorded)"
        if given.size and interval:
            nxt = float(given[-1] + interval)
            while nxt <= last_level:
                nxt += interval
            return nxt, (f"the next scheduled dose: the last recorded dose + the prescribed "
                         f"interval of {interval:.4g} h")
    return float(last_level), "the time of the last level"
