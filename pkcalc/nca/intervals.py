"""Non-compartmental analysis of one dosing interval, on the actual times.

Each dose starts an interval that ends when the next dose starts (the last one
lasts the regimen's interval).  A level belongs to the interval whose dose it
refers to (``reference``, e.g. from SDTM PCRFTDTC) or, without one, to the interval
it was drawn in.  The level at the start of an interval is: for the first dose of
an infusion, zero (a bolus: the log-linear back-extrapolation of the first two
falling levels); later, a level drawn shortly before the dose (after the previous
infusion ended, within the last quarter of the interval: a pre-dose or trough
sample, common practice) -- or one referring to the dose and drawn before it.  The
level at the end of an interval is extrapolated from its last level with the
terminal slope when there is one, else the next dose's pre-dose level.

Per interval: Cmax and Tmax (hours after the dose), Cmin (the lowest level of the
interval, its ends included), the trough (the level at its end), AUC over the
actual interval (AUCtau, linear up / log down), the average level AUCtau/tau and
the fluctuation (Cmax - Cmin)/Cavg; the terminal slope from the interval's own
levels after the peak and the end of the infusion (at least 3); for a single or
first dose the single-dose values (AUC to infinity, CL = dose/AUCinf, Vz, MRT,
Vss, Gibaldi & Perrier, from memory); at steady state CL = dose/AUCtau.  An
interval with fewer than 3 levels after its dose gets its trough and the reason.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np

from .._format import short
from .areas import auc_segments, level_at, terminal_phase

__all__ = ["MIN_LEVELS", "IntervalResult", "Levels", "interval_result"]

#: Fewest levels after the dose for the exposure of an interval (common practice).
MIN_LEVELS = 3
#: Dose starts and reference times within this (h, one minute) are the same dose.
SAME_TIME = 1.0 / 60.0


@dataclass(frozen=True)
class Levels:
    """One subject's levels, sorted by time (study clock, h; mg/L)."""

    time: np.ndarray
    conc: np.ndarray
    blq: np.ndarray
    rows: np.ndarray
    reference: np.ndarray        # the start of the dose each level refers to (NaN: unknown)


@dataclass(frozen=True)
class IntervalResult:
    """Non-compartmental values of one dosing interval (canonical units; None when not
    computed -- the reason is in ``reason`` or ``notes``).

    ``start`` is the dose's start on the study clock; ``peak_time`` and ``last_time``
    are hours after it; ``length`` is the actual interval (the last one: the
    regimen's).  ``clearance`` is dose/AUCinf for a single or first dose and
    dose/AUCtau at steady state.
    """

    subject: str
    number: int
    kind: str
    start: float
    dose: float
    infusion_time: float
    length: float | None
    steady_state: bool = False
    levels: int = 0
    peak_concentration: float | None = None
    peak_time: float | None = None
    min_concentration: float | None = None
    trough_concentration: float | None = None
    trough_source: str | None = None
    last_concentration: float | None = None
    last_time: float | None = None
    auc_to_last: float | None = None
    aumc_to_last: float | None = None
    auc_interval: float | None = None
    average_concentration: float | None = None
    fluctuation_percent: float | None = None
    auc_to_infinity: float | None = None
    aumc_to_infinity: float | None = None
    auc_extrapolated_percent: float | None = None
    terminal_slope: float | None = None
    terminal_half_life: float | None = None
    terminal_intercept: float | None = None
    adjusted_r2: float | None = None
    points_used: tuple[float, ...] = ()
    clearance: float | None = None
    volume_terminal: float | None = None
    mean_residence_time: float | None = None
    volume_steady_state: float | None = None
    accumulation_ratio: float | None = None
    reason: str | None = None
    notes: tuple[str, ...] = ()
    rows: tuple[int, ...] = ()
    terminal_rows: tuple[int, ...] = ()
    time: np.ndarray = field(default_factory=lambda: np.empty(0))
    conc: np.ndarray = field(default_factory=lambda: np.empty(0))

    FIELDS = ("peak_concentration", "peak_time", "min_concentration", "trough_concentration",
              "last_concentration", "last_time", "auc_to_last", "auc_interval",
              "average_concentration", "fluctuation_percent", "auc_to_infinity",
              "auc_extrapolated_percent", "terminal_slope", "terminal_half_life",
              "adjusted_r2", "clearance", "volume_terminal", "mean_residence_time",
              "volume_steady_state", "accumulation_ratio")


def _start_level(lv: Levels, i: int, starts, durations, lz_before: float | None,
                 notes: list[str]) -> tuple[float, int | None]:
    """The level at the start of interval ``i`` and the index of the level it came from
    (a pre-dose level is carried to the dose with the previous interval's terminal slope
    when there is one)."""
    s = starts[i]
    if i == 0:
        return 0.0, None        # nothing given before the first dose (a bolus: back-extrapolated)
    refers = np.abs(lv.reference - s) < SAME_TIME
    prev_end = starts[i - 1] + durations[i - 1]
    window = (lv.time >= max(prev_end, s - (s - starts[i - 1]) / 4)) & (lv.time < s - 1e-9)
    before = np.flatnonzero((refers & (lv.time < s - 1e-9))
                            | (window & np.isnan(lv.reference)))
    at = np.flatnonzero(np.abs(lv.time - s) <= 1e-9)
    if at.size:
        j = int(at[-1])
        return (0.0 if lv.blq[j] else float(lv.conc[j])), j
    if before.size:
        j = int(before[-1])
        value = 0.0 if lv.blq[j] or not np.isfinite(lv.conc[j]) else float(lv.conc[j])
        gap = s - lv.time[j]
        if lz_before and value > 0:
            value *= math.exp(-lz_before * gap)
            how = "carried to the dose with the latest terminal slope before it"
        else:
            how = "taken as the level at its start"
        notes.append(f"pre-dose level drawn {short(gap)} h before dose {i + 1} {how} "
                     f"({short(value)} mg/L)")
        return value, j
    return math.nan, None


def _members(lv: Levels, s: float, end: float | None) -> np.ndarray:
    """Levels of the interval: those referring to its dose and drawn after it, or (without
    a reference) drawn after it and before the next dose."""
    refers = np.abs(lv.reference - s) < SAME_TIME
    after = lv.time >= s - 1e-9
    by_time = after & (lv.time < end - 1e-9 if end is not None else True)
    return np.flatnonzero((refers & after) | (np.isnan(lv.reference) & by_time))


def _blq_rule(t, c, blq, rule: str):
    """Levels after the BLQ rule (leading_zero: BLQ before the first measurable level is
    0, later ones left out; zero: every BLQ is 0; drop: every BLQ left out)."""
    if not blq.any():
        return np.ones(t.size, bool), c, 0
    first = int(np.argmax(~blq)) if (~blq).any() else t.size
    if rule == "zero":
        return np.ones(t.size, bool), np.where(blq, 0.0, c), int(blq.sum())
    if rule == "drop":
        return ~blq, c, int(blq.sum())
    leading = blq & (np.arange(t.size) < first)
    return ~blq | leading, np.where(leading, 0.0, c), int(blq.sum())


@dataclass
class _Window:
    """What one interval's analysis needs besides the levels."""

    number: int
    kind: str
    start: float
    end: float | None            # the next dose's start (None: open)
    length: float | None         # AUCtau over [0, length] (None: no interval)
    dose: float
    infusion_time: float
    others: tuple[np.ndarray, np.ndarray]      # all dose starts and durations
    steady_after: float | None = None          # hours of regular dosing before this dose
    terminal_times: np.ndarray | None = None   # user's terminal points (study clock)


def interval_result(subject: str, lv: Levels, w: _Window, starts, durations, *,
                    auc_method: str, blq_rule: str, r2_tolerance: float,
                    extrapolation_limit: float, lz_before: float | None = None
                    ) -> IntervalResult:
    """The analysis of one interval (see the module docstring)."""
    notes: list[str] = []
    start_level, start_j = _start_level(lv, w.number - 1, starts, durations, lz_before, notes)
    idx = _members(lv, w.start, w.end)
    base = IntervalResult(subject, w.number, w.kind, float(w.start), float(w.dose),
                          float(w.infusion_time), w.length)
    t, c, blq = lv.time[idx] - w.start, lv.conc[idx], lv.blq[idx]
    keep, c, n_blq = _blq_rule(t, c, blq, blq_rule)
    if n_blq:
        notes.append(f"{n_blq} BLQ level(s) in the interval ({blq_rule.replace('_', ' ')} rule)")
    t, c, idx = t[keep], c[keep], idx[keep]
    member_rows = {round(float(tt), 9): int(r) for tt, r in zip(t, lv.rows[idx], strict=True)}
    after = t > 1e-9
    rows = tuple(int(r) for r in lv.rows[idx]) + (
        (int(lv.rows[start_j]),) if start_j is not None else ())
    if int(np.sum(after & (c > 0))) < MIN_LEVELS:
        return _too_few(base, t, c, after, w, notes, rows)
    inserted = t[0] > 1e-9
    if inserted:
        t, c, start_level = _insert_start(t, c, start_level, w, notes)
    observed = np.arange(1 if inserted else 0, t.size)
    i_peak = int(observed[np.nanargmax(c[observed])])
    positive = np.flatnonzero(c > 0)
    i_last = int(positive[-1])
    phase, phase_note = _terminal(t, c, i_peak, i_last, w, r2_tolerance, notes)
    notes.append(phase_note)
    lz = phase.slope if phase else None
    if np.isnan(c[0]) and lz is not None and w.length is not None and w.steady_after:
        c = c.copy()        # steady state: the level at the start equals the one at the end
        c[0] = c[i_last] * math.exp(-lz * (w.length - t[i_last]))
        notes.append(f"level at the start not sampled: taken as the level at the end of the "
                     f"interval, {short(c[0])} mg/L (steady state, terminal slope)")
    if np.isnan(c[0]):
        t, c = t[1:], c[1:]
        i_peak, i_last = i_peak - 1, i_last - 1
        notes.append("level at the start of the interval unknown: areas start at the first "
                     "level")
    upto = t <= t[i_last] + 1e-12
    seg_auc, seg_aumc = auc_segments(t[upto], c[upto], auc_method)
    out = dict(levels=int(np.sum(t > 1e-9)), peak_concentration=float(c[i_peak]),
               peak_time=float(t[i_peak]), last_concentration=float(c[i_last]),
               last_time=float(t[i_last]), auc_to_last=float(seg_auc.sum()),
               aumc_to_last=float(seg_aumc.sum()), rows=rows, time=t + w.start, conc=c)
    if phase is not None:
        out["terminal_rows"] = tuple(member_rows[round(float(x), 9)] for x in phase.times
                                     if round(float(x), 9) in member_rows)
        out.update(terminal_slope=lz, terminal_half_life=math.log(2) / lz,
                   terminal_intercept=phase.intercept, adjusted_r2=phase.adjusted_r2,
                   points_used=tuple(float(x + w.start) for x in phase.times))
    if w.length is not None:
        _over_interval(out, t, c, lz, w, lv, auc_method, notes)
    if w.kind in ("single dose", "first dose", "total exposure"):
        _to_infinity(out, w, lz, extrapolation_limit, notes)
    _steady_state(out, w, lz, notes)
    return replace(base, notes=tuple(notes), **out)


def _too_few(base: IntervalResult, t, c, after, w: _Window, notes, rows) -> IntervalResult:
    n = int(np.sum(after & (c > 0)))
    why = ("no measurable level after the dose: nothing to analyse" if n == 0 else
           f"{n} measurable level(s) after the dose: at least {MIN_LEVELS} are needed for the "
           "exposure of an interval")
    trough = None
    if w.end is not None and t.size and np.isfinite(c[-1]):
        trough = float(c[-1])      # the level drawn last in the interval (before the next dose)
    return replace(base, levels=n, trough_concentration=trough,
                   trough_source="the last level before the next dose" if trough is not None
                   else None,
                   reason=why, notes=tuple(notes),
                   rows=rows, time=t + w.start, conc=c)


def _insert_start(t, c, start_level: float, w: _Window, notes: list[str]):
    """Add the level at the dose (time 0 of the interval) when it was not sampled."""
    if w.number == 1 and w.infusion_time <= 0:
        pos = np.flatnonzero(c > 0)[:2]
        if pos.size == 2 and c[pos[1]] < c[pos[0]]:
            k0 = math.log(c[pos[0]] / c[pos[1]]) / (t[pos[1]] - t[pos[0]])
            start_level = c[pos[0]] * math.exp(k0 * t[pos[0]])
            notes.append(f"level at the bolus back-extrapolated log-linearly from the first "
                         f"two levels: {short(start_level)} mg/L")
        else:
            start_level = c[pos[0]]
            notes.append("level at the bolus taken as the first level (no falling pair to "
                         "back-extrapolate)")
    return np.concatenate([[0.0], t]), np.concatenate([[start_level], c]), start_level


def _terminal(t, c, i_peak, i_last, w: _Window, r2_tolerance: float, notes: list[str]):
    """The terminal phase of the interval: levels after the peak and the end of the
    infusion, never while any infusion runs."""
    idx = np.arange(t.size)
    window = (idx > i_peak) & (t >= w.infusion_time - 1e-9) & (c > 0) & (idx <= i_last)
    starts, durations = w.others
    t_abs = t + w.start
    running = ((durations[None, :] > 0) & (starts[None, :] < t_abs[:, None] - 1e-9)
               & (t_abs[:, None] < starts[None, :] + durations[None, :] - 1e-9)).any(axis=1)
    if w.kind == "total exposure":
        running |= t_abs < float((starts + durations).max()) - 1e-9
    if np.any(window & running):
        notes.append(f"{int((window & running).sum())} level(s) drawn while an infusion was "
                     "running (or before the last dose ended) left out of the terminal phase")
    if np.any((idx > i_peak) & (c <= 0) & (idx < i_last)):
        notes.append("zero levels inside the declining phase are left out of the terminal fit")
    manual = None
    if w.terminal_times is not None:
        chosen = np.asarray(w.terminal_times, float) - w.start
        if np.any(np.isin(np.round(t, 9), np.round(chosen, 9))):
            manual = chosen
    return terminal_phase(t[window & ~running], c[window & ~running], tolerance=r2_tolerance,
                          times=manual)


def _over_interval(out: dict, t, c, lz, w: _Window, lv: Levels, method: str,
                   notes: list[str]) -> None:
    """AUCtau over the actual interval, the average level, the trough, Cmin, fluctuation."""
    tau = w.length
    if t[-1] >= tau - 1e-9:                      # sampled through the end of the interval
        end_level = level_at(t, c, tau, method)
        source = "sampled" if np.any(np.abs(t - tau) <= 1e-9) else "interpolated"
        tt = np.concatenate([t[t < tau - 1e-9], [tau]])
        cc = np.concatenate([c[t < tau - 1e-9], [end_level]])
    else:
        if lz is not None and t[-1] >= w.infusion_time - 1e-9:
            end_level = float(c[-1] * math.exp(-lz * (tau - t[-1])))
            source = "extrapolated with the terminal slope"
        else:
            nxt = np.flatnonzero((lv.time >= w.start + t[-1] + 1e-9)
                                 & (lv.time <= w.start + tau + 1e-9))
            if not nxt.size or not np.isfinite(lv.conc[nxt[0]]):
                notes.append(f"the levels end {short(tau - t[-1])} h before the interval does "
                             "and there is no terminal slope: no interval area")
                return
            end_level = 0.0 if lv.blq[nxt[0]] else float(lv.conc[nxt[0]])
            source = "the next dose's pre-dose level"
        tt = np.concatenate([t, [tau]])
        cc = np.concatenate([c, [end_level]])
        notes.append(f"level at the end of the interval ({short(tau)} h) {source}: "
                     f"{short(end_level)} mg/L")
    auc_tau = float(auc_segments(tt, cc, method)[0].sum())
    cavg = auc_tau / tau
    cmin = float(np.nanmin(cc))
    out.update(auc_interval=auc_tau, average_concentration=cavg, min_concentration=cmin,
               trough_concentration=float(cc[-1]), trough_source=source,
               fluctuation_percent=100 * (out["peak_concentration"] - cmin) / cavg
               if cavg > 0 else None)


def _to_infinity(out: dict, w: _Window, lz, extrapolation_limit: float,
                 notes: list[str]) -> None:
    """AUC and AUMC to infinity, CL = dose/AUCinf, Vz, and MRT and Vss (single dose)."""
    if lz is None:
        notes.append("no terminal slope: AUC to infinity, clearance and volumes are not "
                     "computed")
        return
    last_c, last_t = out["last_concentration"], out["last_time"]
    auc_inf = out["auc_to_last"] + last_c / lz
    aumc_inf = out["aumc_to_last"] + last_t * last_c / lz + last_c / lz**2
    extrap = 100 * (auc_inf - out["auc_to_last"]) / auc_inf
    out.update(auc_to_infinity=auc_inf, aumc_to_infinity=aumc_inf,
               auc_extrapolated_percent=extrap)
    if extrap > extrapolation_limit:
        notes.append(f"AUC extrapolated {extrap:.1f} % (over {extrapolation_limit:g} %): "
                     "AUC to infinity and what depends on it are unreliable")
    cl = w.dose / auc_inf
    out.update(clearance=cl, volume_terminal=cl / lz)
    if w.kind in ("single dose", "first dose"):
        mrt = aumc_inf / auc_inf - w.infusion_time / 2
        out.update(mean_residence_time=mrt, volume_steady_state=cl * mrt)
        if w.kind == "first dose":
            notes.append("single-dose values of the first dose, from its own levels (its "
                         "area to infinity goes on under the later doses: superposition)")


#: Share of steady state counted as reached (five half-lives: 1 - 2^-5, a fact of the trade).
STEADY_SHARE = 1 - 2.0**-5
#: Below steady state but above this share, dose/AUCtau is given with its bias stated.
NEAR_STEADY_SHARE = 0.90


def _steady_state(out: dict, w: _Window, lz, notes: list[str]) -> None:
    """At steady state CL = dose/AUCtau and Vz = CL/lambda_z.  The share of steady state
    reached over the interval is ``1 - exp(-lambda_z (T + tau))`` after ``T`` hours of
    regular dosing (superposition of one exponential; calc); at least 1 - 2^-5 counts as
    steady state; from 90 % dose/AUCtau is given with the factor by which it over-states
    clearance (``1/share``); below, it is not given."""
    if w.steady_after is None or w.kind not in ("between doses", "last dose"):
        return
    if out.get("auc_interval") is None:
        return
    if not lz:
        notes.append("no terminal slope: whether steady state was reached cannot be judged; "
                     "clearance = dose/AUCtau not given")
        return
    half_life = math.log(2) / lz
    share = -math.expm1(-lz * (w.steady_after + w.length))
    cl = w.dose / out["auc_interval"]
    dosing = (f"{short(w.steady_after)} h of regular dosing before this dose "
              f"({short(w.steady_after / half_life)} terminal half-lives of {short(half_life)} h)")
    if share >= STEADY_SHARE:
        out.update(steady_state=True, clearance=cl, volume_terminal=cl / lz)
        notes.append(f"steady state: {dosing}, {share:.1%} of it reached")
    elif share >= NEAR_STEADY_SHARE:
        out.update(clearance=cl, volume_terminal=cl / lz)
        notes.append(f"near steady state only: {dosing}, {share:.1%} reached: dose/AUCtau "
                     f"over-states clearance by about {100 * (1 / share - 1):.1f} %")
    else:
        notes.append(f"steady state not reached: {dosing}, {share:.0%} reached: dose/AUCtau "
                     f"({short(cl)} L/h) would over-state clearance by "
                     f"{100 * (1 / share - 1):.0f} %; not given")
