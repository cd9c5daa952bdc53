"""Design of a constant-rate infusion to a plateau or an AUC24, from zero or from the
patient's current state."""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from .. import model
from .._format import short
from .common import (
    DEFAULT_DOSE_STEP,
    DEFAULT_MAX_LOADING_RATIO,
    DEFAULT_RATE_STEP,
    NEAR_TARGET,
    DesignResult,
    Limits,
    Regimen,
    aim_of,
    auc_range,
    infusion_record,
    loading_dose_for_target,
    loading_infusion_for_target,
    open_infusion_record,
    rate_for_target,
    records_events,
    round_inside,
    round_to_step,
)
from .projection import (
    PROJECTION_HORIZON,
    TIME_STEP,
    CurrentState,
    first_time_at_or_above,
    project,
    round_time,
)


# --------------------------------------------------------------------------- continuous
def _course(regimen: Regimen, clearance: float, volume: float, salt_factor: float,
            horizon: float, points: int = 2001):
    t = np.linspace(0.0, horizon, points)
    events = regimen.events(salt_factor, horizon)
    start = np.array([e.start for e in events])
    amount = np.array([e.amount for e in events])
    duration = np.array([e.duration for e in events])
    return t, model.concentration(t, start, amount, duration, clearance, volume)


def _plateau_and_window(plateau, window, auc_24):
    """Plateau aim and window, from a plateau target and/or an AUC24 range (mg h/L).

    At steady state on a constant rate ``AUC24 = 24 Css`` [calc]; without a
    plateau the aim is the (geometric) middle of the AUC range over 24 h.
    """
    from ..predict import TARGET_RTOL

    if plateau is None:
        if auc_24 is None:
            raise ValueError("need a plateau target or an AUC24 target")
        plateau = aim_of(Limits(auc_24.low, auc_24.high), high_side=True) / 24.0
    if window is None:
        window = (Limits(auc_24.low and auc_24.low / 24.0, auc_24.high and auc_24.high / 24.0)
                  if auc_24 is not None and auc_24.low is not None and auc_24.high is not None
                  else Limits.around(plateau, TARGET_RTOL))
    return plateau, window


def design_continuous(
    clearance: float,
    volume: float,
    plateau: float | None = None,
    *,
    window: Limits | None = None,
    auc_24: Limits | None = None,
    loading_time: float = 0.0,
    salt_factor: float = 1.0,
    rate_step: float | None = DEFAULT_RATE_STEP,
    dose_step: float | None = DEFAULT_DOSE_STEP,
    max_rate: float | None = None,
    max_loading: float | None = None,
    max_loading_ratio: float | None = DEFAULT_MAX_LOADING_RATIO,
    within: float = 0.10,
    state: CurrentState | None = None,
    time_step: float = TIME_STEP,
    name: str = "design",
) -> DesignResult:
    """Constant-rate infusion (with and without a loading dose) to a plateau.

    ``R0 = Css CL / S``; loading dose ``Css V / S`` as a bolus, or over
    ``loading_time`` with the under-shoot this causes predicted; a loading
    infusion sized for the target at its end (``Css CL T / (1 - exp(-kT)) / S``)
    is proposed beside it.  Without a loading dose the level is within
    ``within`` of the plateau after ``-ln(within)/k`` (Gibaldi & Perrier ch. 2).

    With a ``state`` (a proposal from measured levels) the regimen starts at
    ``state.start`` from the level then present: the loading dose is the
    increment from that level (:func:`pkcalc.model.amount_to_reach`), a level
    above the target gets a hold of ``ln(C/Ctarget)/k`` before the new rate,
    and every proposal is judged on its projected course over the next 72 h.

    Parameters
    ----------
    clearance : float, L/h
    volume : float, L
    plateau : float, optional, mg/L
        Target plateau concentration (or give ``auc_24``).
    window : Limits, optional, mg/L
        Acceptable range; default target ±10 % (or the AUC range / 24 h).
    auc_24 : Limits, optional, mg h/L
        Steady-state AUC over 24 h; ``AUC24 = 24 R0 S / CL``.
    loading_time : float, h
        0 for a bolus loading dose.
    salt_factor : float
        Fraction of the product that is active drug (0 < S <= 1).
    rate_step, dose_step : float or None, mg/h and mg
        Rounding steps of the rate and the loading dose (None: no rounding);
        values are rounded inside the window where a multiple of the step fits.
    max_rate, max_loading : float, optional
        User-stated maxima (mg/h, mg): exceeding them is flagged.
    max_loading_ratio : float, optional
        Flag when the loading dose exceeds this many times the maintenance
        amount per 24 h.
    within : float
        Fraction of the plateau for the time-to-target without loading.
    state : CurrentState, optional
        Where the patient is when the proposal starts.
    name : str

    Returns
    -------
    DesignResult
    """
    range_notes: list[str] = []
    if plateau is None and auc_24 is not None and auc_24.low == auc_24.high:
        plateau = auc_24.low / 24.0  # AUC24 = 24 Css at steady state
    auc_24 = auc_range(auc_24, range_notes)
    plateau, window = _plateau_and_window(plateau, window, auc_24)
    k = clearance / volume
    exact_rate = rate_for_target(plateau, clearance, salt_factor)
    lo_rate = rate_for_target(window.low or 0.0, clearance, salt_factor)
    hi_rate = rate_for_target(window.high, clearance, salt_factor) if window.high else math.inf
    if auc_24 is not None:
        lo_rate = max(lo_rate, rate_for_target((auc_24.low or 0.0) / 24, clearance, salt_factor))
        if auc_24.high is not None:
            hi_rate = min(hi_rate, rate_for_target(auc_24.high / 24, clearance, salt_factor))
    rate = round_inside(exact_rate, lo_rate, hi_rate, rate_step) if lo_rate <= hi_rate \
        else round_to_step(exact_rate, rate_step)
    plateau_pred = float(model.plateau_concentration(salt_factor * rate, clearance))
    checks = _ContinuousChecks(clearance, volume, plateau, window, auc_24, salt_factor, rate,
                               max_rate, max_loading, max_loading_ratio, plateau_pred)
    target = {"plateau": plateau, "window": [window.low, window.high]}
    if auc_24 is not None:
        target["auc_24"] = [auc_24.low, auc_24.high]
    if state is not None:
        regimens, notes = _continuous_from_state(state, checks, exact_rate, loading_time,
                                                 dose_step, time_step)
    else:
        regimens, notes = _continuous_from_zero(checks, exact_rate, loading_time, dose_step,
                                                k, within)
    notes[:0] = range_notes
    if salt_factor != 1.0:
        notes.append(f"amounts and rates are of the product; salt factor S = {salt_factor:g}")
    if rate != round_to_step(exact_rate, rate_step):
        notes.append(f"the rate is rounded to {short(rate)} mg/h (not the nearest step) to stay "
                     "inside the window")
    return DesignResult(name, "continuous", clearance, volume, regimens, target=target,
                        notes=notes, salt_factor=salt_factor, state=state)


@dataclass
class _ContinuousChecks:
    """What every continuous proposal is checked against."""

    clearance: float
    volume: float
    plateau: float
    window: Limits
    auc_24: Limits | None
    salt_factor: float
    rate: float
    max_rate: float | None
    max_loading: float | None
    max_loading_ratio: float | None
    plateau_pred: float

    def common(self, ld: float | None) -> list[str]:
        flags = []
        v = self.window.violation(self.plateau_pred, "predicted plateau")
        if v:
            flags.append(v)
        if self.auc_24 is not None:
            v = self.auc_24.violation(self.plateau_pred * 24.0, "steady-state AUC24",
                                      unit="mg*h/L")
            if v:
                flags.append(v)
        if self.max_rate is not None and self.rate > self.max_rate:
            flags.append(f"rate {short(self.rate)} mg/h exceeds the stated maximum "
                         f"{short(self.max_rate)} mg/h")
        if ld and self.max_loading is not None and ld > self.max_loading:
            flags.append(f"loading dose {short(ld)} mg exceeds the stated maximum "
                         f"{short(self.max_loading)} mg")
        if ld and self.max_loading_ratio is not None and \
                ld > self.max_loading_ratio * self.rate * 24.0:
            flags.append(f"loading dose {short(ld)} mg is more than {self.max_loading_ratio:g} "
                         f"times the 24-h maintenance amount {short(self.rate * 24)} mg")
        return flags

    def steady(self) -> dict[str, float | None]:
        p = self.plateau_pred
        return {"plateau": p, "peak": None, "trough": None, "average": p, "auc_24": p * 24.0}


def _continuous_from_zero(ck: _ContinuousChecks, exact_rate: float, loading_time: float,
                          dose_step: float | None, k: float, within: float):
    """Proposals for a patient without drug on board (time 0 = the start)."""
    clearance, volume, plateau, window = ck.clearance, ck.volume, ck.plateau, ck.window
    salt_factor, rate = ck.salt_factor, ck.rate
    horizon = loading_time + 5.0 * model.LN2 / k
    exact_ld = loading_dose_for_target(plateau, volume, salt_factor)

    def finish(label: str, ld: float | None, exact: dict[str, float]) -> Regimen:
        t_load = loading_time if ld else 0.0
        records = ((infusion_record(0.0, ld, loading_time),) if ld else ()) + (
            open_infusion_record(t_load, rate),)
        reg = Regimen(label, rate=rate, loading_dose=ld,
                      loading_time=loading_time if ld else None, exact=exact, doses=records)
        t, c = _course(reg, clearance, volume, salt_factor, horizon)
        after = t >= t_load
        flags = ck.common(ld)
        predicted: dict[str, float | None] = {
            **ck.steady(),
            # the course tends to the plateau: its supremum / infimum include it
            "highest": max(float(c.max()), ck.plateau_pred),
            "lowest_after_loading": min(float(c[after].min()), ck.plateau_pred) if ld else None,
        }
        if ld:
            near = np.abs(c / plateau - 1.0) <= NEAR_TARGET
            idx = np.flatnonzero(after & ~near)
            predicted["time_to_within_5_percent"] = 0.0 if idx.size == 0 else float(
                t[min(idx[-1] + 1, t.size - 1)])
        else:
            predicted["time_to_within_5_percent"] = float(-math.log(NEAR_TARGET) / k)
        if ld and window.high is not None and predicted["highest"] > window.high:
            flags.append(f"the course reaches {short(predicted['highest'])} mg/L, above "
                         f"{short(window.high)} mg/L")
        low = predicted["lowest_after_loading"]
        if ld and window.low is not None and low is not None and low < window.low:
            flags.append(f"after the loading dose the level falls to {short(low)} mg/L, below "
                         f"{short(window.low)} mg/L")
        return replace(reg, predicted=predicted, meets_target=not flags, flags=tuple(flags))

    regimens, notes = [], []
    ld = _round_loading(exact_ld, plateau, 0.0, ck, 0.0, dose_step)
    label = ("maintenance + loading bolus" if loading_time <= 0 else
             f"maintenance + loading Css*V over {short(loading_time)} h")
    regimens.append(finish(label, ld, {"rate": exact_rate, "loading_dose": exact_ld}))
    if loading_time > 0:
        exact_inf = loading_infusion_for_target(plateau, clearance, volume, loading_time,
                                                salt_factor)
        ld2 = _round_loading(exact_inf, plateau, 0.0, ck, loading_time, dose_step)
        regimens.append(finish(f"maintenance + loading sized for {short(loading_time)} h "
                               "infusion", ld2, {"rate": exact_rate, "loading_dose": exact_inf}))
        notes.append(
            f"a loading dose of Css*V infused over {short(loading_time)} h ends below the target "
            f"(level {short(regimens[0].predicted['lowest_after_loading'])} mg/L); the second "
            "proposal sizes the loading infusion to reach the target at its end"
        )
    regimens.append(finish("maintenance only (no loading dose)", None, {"rate": exact_rate}))
    t_within = -math.log(within) / k
    notes.append(f"without a loading dose the level is within {within:.0%} of the plateau after "
                 f"{short(t_within)} h ({short(t_within * k / model.LN2)} half-lives)")
    return regimens, notes


def _round_loading(exact: float, plateau: float, current: float, ck: _ContinuousChecks,
                   loading_time: float, step: float | None) -> float:
    """Loading amount rounded to the step, inside the amounts that end within the window."""
    def amount(level):
        return float(model.amount_to_reach(level, current, ck.clearance, ck.volume,
                                           loading_time)) / ck.salt_factor
    lo = amount(ck.window.low) if ck.window.low is not None else 0.0
    hi = amount(ck.window.high) if ck.window.high is not None else math.inf
    if step is None or step <= 0:
        return exact
    if lo <= hi and hi > 0:
        return round_inside(exact, max(lo, 0.0), hi, step)
    return round_to_step(exact, step)


def _continuous_from_state(state: CurrentState, ck: _ContinuousChecks, exact_rate: float,
                           loading_time: float, dose_step: float | None, time_step: float):
    """Proposals that start at ``state.start`` from the level then present."""
    cl, v, s0, c0 = ck.clearance, ck.volume, state.start, state.level
    regimens: list[Regimen] = []
    notes = [f"the proposals start at {short(s0)} h ({state.basis}); the recorded doses from then "
             f"on are replaced; the level then is {short(c0)} mg/L (projected from the history "
             "with the individual estimates)"]
    exact_ld = float(model.amount_to_reach(ck.plateau, c0, cl, v, loading_time)) / ck.salt_factor
    if exact_ld > 0 and c0 < ck.plateau * (1 - NEAR_TARGET / 5):
        ld = _round_loading(exact_ld, ck.plateau, c0, ck, loading_time, dose_step)
        what = "bolus" if loading_time <= 0 else f"over {short(loading_time)} h"
        records = (infusion_record(s0, ld, loading_time),
                   open_infusion_record(s0 + loading_time, ck.rate))
        regimens.append(_judge_continuous(
            f"incremental loading {short(ld)} mg {what} + {short(ck.rate)} mg/h", state, ck,
            records, settle=s0 + loading_time, ld=ld, loading_time=loading_time,
            exact={"rate": exact_rate, "loading_dose": exact_ld}))
        notes.append(f"incremental loading dose: the amount that takes the level from "
                     f"{short(c0)} mg/L to {short(ck.plateau)} mg/L "
                     + ("(target - current) x V / S" if loading_time <= 0 else
                        f"by the end of a {short(loading_time)}-h infusion"))
    if c0 > ck.plateau * (1 + NEAR_TARGET):
        exact_hold = float(model.time_to_fall(c0, ck.plateau, cl, v))
        hold = round_time(exact_hold, time_step) if exact_hold >= time_step else 0.0
        if hold > 0:
            records = (open_infusion_record(s0 + hold, ck.rate),)
            regimens.append(_judge_continuous(
                f"hold {short(hold)} h, then {short(ck.rate)} mg/h", state, ck, records,
                settle=s0 + hold, ld=None, loading_time=None,
                exact={"rate": exact_rate, "hold": exact_hold}))
            notes.append(f"the level {short(c0)} mg/L is above the target: holding the infusion "
                         f"for ln(C/Ctarget)/k = {short(exact_hold)} h (rounded to "
                         f"{short(hold)} h, a {short(time_step * 60)}-min step) lets it fall to "
                         "the target first")
        else:
            notes.append(f"the level {short(c0)} mg/L is above the target but falls to it in "
                         f"{short(exact_hold * 60)} min, less than the {short(time_step * 60)}-"
                         "min time step: no hold proposed")
    regimens.append(_judge_continuous(
        f"{short(ck.rate)} mg/h from {short(s0)} h (no loading dose)", state, ck,
        (open_infusion_record(s0, ck.rate),), settle=s0, ld=None, loading_time=None,
        exact={"rate": exact_rate}))
    regimens.sort(key=lambda r: not r.meets_target)
    return regimens, notes


def _judge_continuous(label: str, state: CurrentState, ck: _ContinuousChecks, records,
                      *, settle: float, ld: float | None, loading_time: float | None,
                      exact: dict[str, float]) -> Regimen:
    """Re-predict a continuous proposal from the state and flag what its course misses."""
    end = state.start + PROJECTION_HORIZON
    new = records_events(records, ck.salt_factor, end)
    proj = project(state, new, ck.clearance, ck.volume, settle=settle)
    flags = ck.common(ld)
    w = ck.window
    if w.high is not None and proj.highest > w.high * (1 + 1e-9) and \
            proj.highest > state.level * (1 + 1e-9):
        flags.append(f"the projected course reaches {short(proj.highest)} mg/L at "
                     f"{short(proj.highest_time)} h, above {short(w.high)} mg/L")
    low = proj.lowest_after
    if w.low is not None and low is not None and low < w.low * (1 - 1e-9):
        reach = first_time_at_or_above(state, new, ck.clearance, ck.volume, w.low)
        when = f"; it reaches {short(w.low)} mg/L at {short(reach)} h" if reach else \
            " within the next 72 h"
        flags.append(f"the projected level is {short(low)} mg/L at "
                     f"{short(proj.lowest_after_time)} h, below the window low "
                     f"{short(w.low)} mg/L{when}")
    if w.high is not None and state.level > w.high and settle <= state.start:
        flags.append(f"the level starts above the window ({short(state.level)} mg/L) and "
                     "stays above it for a while: consider holding the infusion first")
    if ck.auc_24 is not None:
        for a, b, area in proj.auc_windows:
            f = ck.auc_24.violation(area, f"projected AUC over {short(a)}-{short(b)} h",
                                    unit="mg*h/L")
            if f:
                flags.append(f)
                break
    predicted = {**ck.steady(), "start_level": state.level, "highest": proj.highest,
                 "lowest_after_loading": low, "level_at_72h": proj.level_at_end,
                 "auc_first_24": proj.auc_first_24}
    if ck.auc_24 is not None and proj.auc_windows:
        areas = [w[2] for w in proj.auc_windows]
        predicted.update(lowest_auc_24_window=min(areas), highest_auc_24_window=max(areas))
    return Regimen(label, rate=ck.rate, loading_dose=ld, loading_time=loading_time,
                   predicted=predicted, meets_target=not flags, flags=tuple(flags),
                   exact=exact, start=state.start, doses=tuple(records), settle=settle)
