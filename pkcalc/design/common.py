"""Shared pieces of regimen design: limits, rounding, basic target formulas,
and the result types."""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from .. import model
from .._format import format_table, short, with_caution
from ..core import DoseEvent

#: Practical dosing intervals, h (configurable per design).
DEFAULT_INTERVALS = (6.0, 8.0, 12.0, 24.0, 36.0, 48.0)
#: Default rounding steps: dose 10 mg, loading dose 10 mg, rate 0.1 mg/h.
DEFAULT_DOSE_STEP = 10.0
DEFAULT_RATE_STEP = 0.1
#: Warn when a loading dose exceeds this many maintenance doses per interval
#: (continuous infusion: per 24 h of maintenance). Common practice, no source.
DEFAULT_MAX_LOADING_RATIO = 3.0
#: Acceptance around a target when no limits are stated (common practice).
DEFAULT_TARGET_TOLERANCE = 0.20
#: How close to the target a level counts as "at target" for time-to-target.
NEAR_TARGET = 0.05


# --------------------------------------------------------------------------- small pieces
@dataclass(frozen=True)
class Limits:
    """A closed interval ``[low, high]``; either end may be None (open)."""

    low: float | None = None
    high: float | None = None

    def __post_init__(self) -> None:
        if self.low is not None and self.high is not None and self.low > self.high:
            raise ValueError(f"limit low {self.low:g} is above high {self.high:g}")

    @classmethod
    def around(cls, target: float, tolerance: float) -> Limits:
        return cls(target * (1 - tolerance), target * (1 + tolerance))

    def violation(self, value: float | None, label: str, unit: str = "mg/L") -> str | None:
        """A plain-words flag when ``value`` lies outside, else None."""
        if value is None:
            return None
        if self.high is not None and value > self.high * (1 + 1e-12):
            return f"{label} {short(value)} {unit} is above its limit {short(self.high)} {unit}"
        if self.low is not None and value < self.low * (1 - 1e-12):
            return f"{label} {short(value)} {unit} is below its limit {short(self.low)} {unit}"
        return None

    def text(self, unit: str = "mg/L") -> str:
        lo = "-" if self.low is None else short(self.low)
        hi = "-" if self.high is None else short(self.high)
        return f"{lo} to {hi} {unit}"


def round_to_step(value: float, step: float | None) -> float:
    """Nearest multiple of ``step`` (at least one step); ``step=None`` keeps the value."""
    if step is None or step <= 0:
        return float(value)
    return float(max(round(value / step), 1) * step)


def round_inside(ideal: float, lo: float, hi: float, step: float | None) -> float:
    """Round to the step, staying inside ``[lo, hi]`` when a multiple of the step fits.

    When none fits the nearest multiple is returned (the caller flags the limit crossed).
    """
    if step is None or step <= 0:
        return ideal
    nearest = round_to_step(ideal, step)
    if lo * (1 - 1e-12) <= nearest <= hi * (1 + 1e-12):
        return nearest
    inside = [m * step for m in (math.ceil(lo / step), math.floor(hi / step)) if m >= 1]
    inside = [x for x in inside if lo * (1 - 1e-12) <= x <= hi * (1 + 1e-12)]
    if inside:
        return min(inside, key=lambda x: abs(math.log(x / ideal)))
    return nearest


def div_or(x: float | None, y: float, default: float = 0.0) -> float:
    return default if x is None else x / y


def aim_of(limits: Limits, high_side: bool) -> float | None:
    """Design aim from limits: the geometric middle when both ends are given;
    otherwise the one end stated (for a peak maximum and a trough minimum this
    is the boundary that allows the longest interval)."""
    lo, hi = limits.low, limits.high
    if lo and hi:
        return math.sqrt(lo * hi)
    if high_side:
        return hi if hi is not None else lo
    return lo if lo is not None else hi


def auc_range(auc_24: Limits | None, notes: list[str]) -> Limits | None:
    """An AUC24 value (low = high) becomes value ±10 % (stated in the notes)."""
    from ..predict import TARGET_RTOL

    if auc_24 is None or auc_24.low is None or auc_24.low != auc_24.high:
        return auc_24
    out = Limits.around(auc_24.low, TARGET_RTOL)
    notes.append(f"no AUC24 range stated: acceptance taken as the target ±{TARGET_RTOL:.0%} "
                 f"({out.text('mg*h/L')})")
    return out


def rate_for_target(target, clearance, salt_factor=1.0):
    """Maintenance rate for a plateau: ``R0 = Css CL / S`` (mg/h of product).

    Examples
    --------
    >>> rate_for_target(10.0, 2.8)
    28.0
    """
    return float(model.rate_for_plateau(target, clearance)) / salt_factor


def loading_dose_for_target(target, volume, salt_factor=1.0, current=0.0):
    """Loading dose: ``LD = (Ctarget - Ccurrent) V / S`` (mg of product).

    ``current`` gives the incremental loading dose of Winter (from memory).

    Examples
    --------
    >>> loading_dose_for_target(10.0, 35.0)
    350.0
    """
    return float(model.amount_to_reach(target, current, 1.0, volume, 0.0)) / salt_factor


def loading_infusion_for_target(target, clearance, volume, loading_time, salt_factor=1.0):
    """Loading amount infused over ``T`` that reaches the target at its end.

    From ``C(T) = (R/CL)(1 - exp(-kT)) = Ctarget``:
    ``LD = Ctarget CL T / (1 - exp(-kT)) / S``; it tends to ``Ctarget V / S``
    as ``T -> 0`` [calc].
    """
    return float(model.amount_to_reach(target, 0.0, clearance, volume,
                                       max(loading_time, 0.0))) / salt_factor


# --------------------------------------------------------------------------- results
@dataclass(frozen=True)
class DoseRecord:
    """One dose record of a proposal, on the history clock (product amounts).

    ``start`` and two of ``amount``/``rate``/``duration`` (all three filled
    where known); ``every``/``count`` where it repeats.  A continuous infusion
    without an end has ``duration`` and ``amount`` None.
    """

    start: float
    amount: float | None
    rate: float | None
    duration: float | None
    every: float | None = None
    count: int = 1

    def as_dict(self) -> dict[str, float | int | None]:
        return {"start": self.start, "amount": self.amount, "rate": self.rate,
                "duration": self.duration, "every": self.every, "count": self.count}

    def single_events(self, salt_factor: float, until: float, extend: bool = False):
        """``(start, amount, duration)`` arrays of drug (``S x`` product), repeats
        expanded; an open infusion runs to ``until``.  ``extend`` continues a
        repeated record past its count up to ``until`` (the regimen goes on)."""
        if self.duration is None:
            d = max(until - self.start, 0.0)
            assert self.rate is not None
            return (np.array([self.start]), np.array([salt_factor * self.rate * d]),
                    np.array([d]))
        n = self.count
        every = self.every or 0.0
        if extend and every > 0:
            n = max(n, math.floor((until - self.start) / every) + 1)
        starts = self.start + every * np.arange(n)
        return (starts, np.full(n, salt_factor * (self.amount or 0.0)),
                np.full(n, self.duration))


def records_events(records, salt_factor: float, until: float, extend: bool = False):
    """Single drug events of several :class:`DoseRecord` (see ``single_events``)."""
    parts = [r.single_events(salt_factor, until, extend) for r in records]
    if not parts:
        return np.empty(0), np.empty(0), np.empty(0)
    return tuple(np.concatenate([p[i] for p in parts]) for i in range(3))


def bolus_record(start: float, amount: float) -> DoseRecord:
    return DoseRecord(start, amount, None, 0.0)


def infusion_record(start: float, amount: float, duration: float, every: float | None = None,
                    count: int = 1) -> DoseRecord:
    if duration <= 0:
        return DoseRecord(start, amount, None, 0.0, every if count > 1 else None, count)
    return DoseRecord(start, amount, amount / duration, duration,
                      every if count > 1 else None, count)


def open_infusion_record(start: float, rate: float) -> DoseRecord:
    return DoseRecord(start, None, rate, None)


@dataclass(frozen=True)
class Regimen:
    """One proposed regimen with its re-predicted metrics.

    Attributes
    ----------
    label : str
    rate : float or None, mg/h
        Continuous maintenance rate (product).
    loading_dose : float or None, mg
    loading_time : float or None, h
        Duration of the loading dose (0: bolus).
    dose : float or None, mg
        Intermittent dose (product).
    interval : float or None, h
    infusion_time : float or None, h
    predicted : dict of str to float or None, mg/L
        ``plateau``, ``peak``, ``trough``, ``average``, ``auc_24`` (mg h/L),
        and for continuous designs ``highest`` / ``lowest_after_loading``.
    meets_target : bool or None
    flags : tuple of str
    exact : dict of str to float
        The unrounded design values.
    start : float, h
        When the regimen starts (history clock; 0 for a design without history).
    doses : tuple of DoseRecord
        The exact dose records proposed (product amounts), for re-simulation.
    check_levels : bool
        The levels the proposal rests on failed a consistency check
        (:mod:`pkcalc.design.consistency`): never *meets target*.
    settle : float or None, h
        From when a continuous proposal's window applies (the end of loading or hold).
    attainment : Attainment or None
        Posterior probabilities of meeting each target (MAP designs;
        :mod:`pkcalc.design.attainment`).
    """

    label: str
    rate: float | None = None
    loading_dose: float | None = None
    loading_time: float | None = None
    dose: float | None = None
    interval: float | None = None
    infusion_time: float | None = None
    predicted: dict[str, float | None] = field(default_factory=dict)
    meets_target: bool | None = None
    flags: tuple[str, ...] = ()
    exact: dict[str, float] = field(default_factory=dict)
    start: float = 0.0
    doses: tuple[DoseRecord, ...] = ()
    check_levels: bool = False
    settle: float | None = None
    attainment: Any = None

    @property
    def status(self) -> str:
        """``meets target``, ``FLAG`` (a limit missed) or ``check levels``."""
        if self.check_levels:
            return "check levels"
        return "meets target" if self.meets_target else "FLAG"

    @property
    def first_dose_time(self) -> float | None:
        """When the first new dose is given (h, history clock)."""
        starts = [d.start for d in self.doses]
        return min(starts) if starts else None

    def events(self, salt_factor: float = 1.0, horizon: float | None = None) -> list[DoseEvent]:
        """Dose events of the regimen in drug amounts (``S x`` product), for prediction.

        Continuous maintenance starts after the loading dose ends and runs to
        ``horizon``; intermittent doses repeat up to ``horizon``.  A regimen with
        dose records uses them (on the history clock).
        """
        if self.doses:
            until = self.start + (horizon or 0.0)
            st, am, du = records_events(self.doses, salt_factor, until, extend=True)
            keep = st <= until
            return [DoseEvent(float(a), float(b), float(c))
                    for a, b, c in zip(st[keep], am[keep], du[keep], strict=True)]
        out = []
        t_load = self.loading_time or 0.0
        if self.loading_dose:
            out.append(DoseEvent(0.0, salt_factor * self.loading_dose, t_load))
        if self.rate is not None and horizon is not None:
            start = t_load if self.loading_dose else 0.0
            out.append(DoseEvent(start, salt_factor * self.rate * (horizon - start),
                                 horizon - start))
        if self.dose is not None and self.interval is not None and horizon is not None:
            first = self.interval if self.loading_dose else 0.0
            n = max(math.floor((horizon - first) / self.interval) + 1, 1)
            out.append(DoseEvent(first, salt_factor * self.dose, self.infusion_time or 0.0,
                                 self.interval if n > 1 else None, n))
        return out


def clock_after(origin: str | None, hours: float | None) -> str | None:
    """The ISO 8601 date-time ``hours`` after ``origin`` (to the minute)."""
    if origin is None or hours is None:
        return None
    from datetime import datetime, timedelta

    t = datetime.fromisoformat(origin.replace("Z", "+00:00")) + timedelta(hours=hours)
    return t.isoformat(timespec="minutes")


def _record_text(d: DoseRecord) -> str:
    """One dose record in words (product amounts, h on the history clock)."""
    if d.duration is None:
        return f"from {short(d.start)} h {short(d.rate)} mg/h, ongoing"
    what = (f"{short(d.amount)} mg bolus" if d.duration == 0 else
            f"{short(d.amount)} mg over {short(d.duration)} h")
    rep = f" every {short(d.every)} h x {d.count}" if d.every and d.count > 1 else ""
    return f"at {short(d.start)} h {what}{rep}"


def check_levels(result: DesignResult, suspects: list[str]) -> DesignResult:
    """Mark every proposal *check levels* when the levels failed a consistency check."""
    if not suspects:
        return result
    result.suspects += suspects
    result.regimens = [replace(r, meets_target=False, check_levels=True)
                       for r in result.regimens]
    result.warnings[:0] = [f"check levels before using any proposal: {s}" for s in suspects]
    return result


def _unit_of(key: str) -> str:
    """Canonical unit of a predicted quantity, by its name."""
    if key.startswith("auc") or "_auc_" in key:
        return "mg*h/L"
    if key.startswith("time_") or key in ("hold", "start"):
        return "h"
    return "mg/L"


@dataclass
class DesignResult:
    """A design or adjustment: estimates, proposed regimens, notes and warnings.

    Attributes
    ----------
    name : str
    method : str
        ``continuous``, ``intermittent``, ``proportional``, ``chiou`` or ``sawchuk_zaske``.
    clearance, volume : float or None
        Parameters used for the proposals (L/h, L).
    estimates : dict of str to float
        Individual estimates from levels (adjustment methods).
    target : dict
        The target as understood (plateau, window, peak and trough limits).
    regimens : list of Regimen
        Proposals, best first.
    notes, warnings : list of str
    salt_factor : float
    state : CurrentState or None
        Where the patient was when the proposals start (designs from levels).
    suspects : list of str
        Levels that failed a consistency check, with the reason (proposals are then
        *check levels*).
    formulas : list of dict
        Textbook values for reference (``name``, ``value``, ``kind``, ``validity``):
        they are not the proposals' basis.
    assumed : dict of str to float
        Values assumed rather than estimated (e.g. a pre-dose level taken at steady
        state).
    clock_origin : str or None
        ISO 8601 date-time of time 0 when the history came in clock times.
    current : CurrentRegimen or None
        The recorded regimen continued, with its attainment (MAP designs).
    attainment_level : float or None
        The probability that every target holds that *meets target* needs.
    """

    name: str
    method: str
    clearance: float | None
    volume: float | None
    regimens: list[Regimen]
    target: dict[str, object] = field(default_factory=dict)
    estimates: dict[str, float] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    salt_factor: float = 1.0
    state: Any = None
    suspects: list[str] = field(default_factory=list)
    formulas: list[dict[str, Any]] = field(default_factory=list)
    assumed: dict[str, float] = field(default_factory=dict)
    clock_origin: str | None = None
    current: Any = None
    attainment_level: float | None = None

    @property
    def best(self) -> Regimen | None:
        """The first proposal."""
        return self.regimens[0] if self.regimens else None

    def _repr_html_(self) -> str:
        """Notebook view: the caution, the table and the summary."""
        from .._format import result_html

        return result_html(self.summary(caution=False), self.to_frame())

    def to_frame(self):
        """One row per proposed regimen (canonical units in the headers)."""
        import pandas as pd

        rows = []
        for r in self.regimens:
            row = {"label": r.label, "rate [mg/h]": r.rate, "loading_dose [mg]": r.loading_dose,
                   "loading_time [h]": r.loading_time, "dose [mg]": r.dose,
                   "interval [h]": r.interval, "infusion_time [h]": r.infusion_time}
            row.update({f"predicted_{k} [{_unit_of(k)}]": v for k, v in r.predicted.items()})
            row["meets_target"] = r.meets_target
            row["status"] = r.status
            row["flags"] = " | ".join(r.flags)
            row["start [h]"] = r.start
            row["first_dose_at [h]"] = r.first_dose_time
            if self.clock_origin:
                row["start_clock"] = clock_after(self.clock_origin, r.start)
                row["first_dose_clock"] = clock_after(self.clock_origin, r.first_dose_time)
            row["doses"] = "; ".join(_record_text(d) for d in r.doses)
            if r.attainment is not None:
                row.update({f"attainment_{k}": getattr(r.attainment, k)
                            for k in ("peak", "trough", "level", "auc_24", "joint")})
            rows.append(row)
        return pd.DataFrame(rows)

    def summary(self, caution: bool = True) -> str:
        """Plain-text summary in canonical units, after the caution (``caution=False``:
        without, for reports that print it themselves)."""
        lines = [f"Design: {self.name} ({self.method})"]
        if self.estimates:
            lines.append(format_table(["estimate", "value"],
                                      [[k, v] for k, v in self.estimates.items()]))
        lines += [f"CHECK LEVELS: {s}" for s in self.suspects]
        for r in self.regimens:
            mark = r.status
            parts = [f"{k}={short(getattr(r, k))}" for k in
                     ("rate", "loading_dose", "loading_time", "dose", "interval",
                      "infusion_time") if getattr(r, k) is not None]
            pred = ", ".join(f"{k} {short(v)}" for k, v in r.predicted.items() if v is not None)
            lines.append(f"- {r.label}: {' '.join(parts)} -> {pred} [{mark}]")
            lines += [f"    flag: {f}" for f in r.flags]
        lines += [f"note: {n}" for n in self.notes]
        lines += [f"warning: {w}" for w in self.warnings]
        return with_caution("\n".join(lines), caution)

