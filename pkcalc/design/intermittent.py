"""Design of repeated short infusions to peak/trough limits and/or an AUC24, from zero
or from the patient's current state."""

from __future__ import annotations

import math
from collections.abc import Sequence

from .. import model
from .._format import short
from .common import (
    DEFAULT_DOSE_STEP,
    DEFAULT_INTERVALS,
    DEFAULT_MAX_LOADING_RATIO,
    DEFAULT_TARGET_TOLERANCE,
    DesignResult,
    Limits,
    Regimen,
    aim_of,
    auc_range,
    div_or,
    infusion_record,
    records_events,
    round_inside,
    round_to_step,
)
from .projection import PROJECTION_HORIZON, TIME_STEP, CurrentState, project, round_time


# --------------------------------------------------------------------------- intermittent
def _per_mg(interval, infusion_time, clearance, volume, salt_factor):
    peak, trough, avg = model.steady_state_intermittent(salt_factor, infusion_time, interval,
                                                        clearance, volume)
    return float(peak), float(trough), float(avg)


def exact_intermittent(clearance, volume, infusion_time, peak, trough, salt_factor=1.0):
    """Interval and dose that give exactly ``peak`` and ``trough`` at steady state.

    ``tau = ln(peak/trough)/k + T`` and
    ``dose = peak k V T (1 - exp(-k tau)) / (1 - exp(-k T)) / S``
    (Sawchuk & Zaske 1976; Bauer -- from memory).  For a bolus (``T = 0``)
    ``dose = peak V (1 - exp(-k tau)) / S``.

    Returns
    -------
    interval, dose : float
        h and mg of product.
    """
    k = clearance / volume
    tau = math.log(peak / trough) / k + infusion_time
    per_mg_peak = _per_mg(tau, infusion_time, clearance, volume, salt_factor)[0]
    return tau, peak / per_mg_peak


def design_intermittent(
    clearance: float,
    volume: float,
    infusion_time: float,
    *,
    peak: float | None = None,
    trough: float | None = None,
    peak_limits: Limits | None = None,
    trough_limits: Limits | None = None,
    auc_24: Limits | None = None,
    intervals: Sequence[float] = DEFAULT_INTERVALS,
    dose_step: float | None = DEFAULT_DOSE_STEP,
    salt_factor: float = 1.0,
    max_dose: float | None = None,
    max_loading_ratio: float | None = DEFAULT_MAX_LOADING_RATIO,
    options: int = 3,
    state: CurrentState | None = None,
    time_step: float = TIME_STEP,
    name: str = "design",
) -> DesignResult:
    """Dose and interval of repeated short infusions to peak/trough limits and/or an AUC24.

    Steady-state peak and trough are linear in the dose,
    ``peak = dose a(tau)``, ``trough = dose b(tau)`` (see
    :func:`pkcalc.model.steady_state_intermittent`), and so is the AUC over 24 h,
    ``AUC24 = 24 S dose / (CL tau)``, so for each practical interval the limits
    give a range of doses ``[L, U]``; the interval is feasible when ``L <= U``.
    The aims are the targets, or the (geometric) middle of a window with both
    ends; a one-sided limit is a limit, not an aim (without any aim, the limits
    that allow the longest interval are).  Each practical interval gets the dose
    that meets the aims inside ``[L, U]`` -- the compromise of two aims, or the
    one aim reachable, never a side pushed to its limit for an aim the other side
    cannot reach -- rounded to ``dose_step``, then re-predicted.  Proposals are
    ranked feasible first, then by closeness to the unrounded interval (one aim
    with a trough maximum only -- extended-interval dosing -- to 24 h; otherwise
    to 12 h; common practice).

    With a ``state`` (a proposal from measured levels) the first dose is given at
    ``state.start``: when the level then is below the steady-state trough, the
    first dose carries the increment that puts the course on its steady state
    after one infusion (:func:`pkcalc.model.amount_to_reach`); when above, the
    first dose waits until the level has fallen to the trough.  Each proposal is
    judged on its projected course over the next 72 h (every peak and trough).

    Parameters
    ----------
    clearance, volume : float, L/h and L
    infusion_time : float, h
    peak, trough : float, optional, mg/L
        Desired steady-state peak and trough.
    peak_limits, trough_limits : Limits, optional, mg/L
        Hard limits.  When only targets are given, target ±20 % is used and
        stated in the notes.
    auc_24 : Limits, optional, mg h/L
        Steady-state AUC over 24 h (a range, or ``Limits(x, x)`` for a value).
    intervals : sequence of float, h
        Practical intervals to choose from.
    dose_step : float or None, mg
    salt_factor : float
    max_dose : float, optional, mg
    max_loading_ratio : float, optional
    options : int
        How many proposals to return.
    state : CurrentState, optional
    name : str

    Returns
    -------
    DesignResult
    """
    notes: list[str] = []
    peak_limits, trough_limits, auc_24, (aim_peak, aim_trough, aim_auc) = _limits_and_aims(
        peak, trough, peak_limits, trough_limits, auc_24, notes)
    by_levels = aim_peak is not None and aim_trough is not None
    tau_exact = dose_exact = None
    if by_levels:
        tau_exact, dose_exact = exact_intermittent(clearance, volume, infusion_time, aim_peak,
                                                   aim_trough, salt_factor)
    limits = (peak_limits, trough_limits, auc_24)
    # without an exact interval (one aim and limits): closeness to 24 h when only a trough
    # maximum bounds it (extended-interval dosing), else to 12 h (common practice)
    extended = trough_limits.high is not None and trough_limits.low is None and not by_levels
    reference = tau_exact if tau_exact else (24.0 if extended else 12.0)
    candidates = []
    for tau in sorted(set(float(x) for x in intervals)):
        if tau < infusion_time:
            continue
        reg = _intermittent_candidate(clearance, volume, infusion_time, tau, limits,
                                      (aim_peak, aim_trough, aim_auc), dose_step, salt_factor,
                                      max_dose, tau_exact, dose_exact, state, time_step)
        rank = math.log(tau / reference)
        candidates.append((not reg.meets_target, abs(rank), reg))
    if not candidates:
        raise ValueError("no practical interval is at least as long as the infusion time")
    candidates.sort(key=lambda c: (c[0], c[1]))
    regimens = [c[2] for c in candidates[:options]]
    warnings: list[str] = []
    if not regimens[0].meets_target:
        notes.append("no practical interval meets every limit; the nearest options are shown "
                     "with the limit each one misses")
    _first_dose_notes(regimens[0], clearance, volume, dose_step, max_loading_ratio, state,
                      notes, warnings)
    if by_levels:
        notes.append(f"unrounded design: {short(dose_exact)} mg every {short(tau_exact)} h gives "
                     f"peak {short(aim_peak)} and trough {short(aim_trough)} mg/L exactly")
    elif aim_peak is not None or aim_trough is not None:
        side = (f"peak {short(aim_peak)} mg/L" if aim_peak is not None else
                f"trough {short(aim_trough)} mg/L")
        notes.append(f"aim: the {side} (the other side is a limit, not an aim); intervals "
                     f"ranked by closeness to {short(reference)} h"
                     + (" (extended-interval dosing, common practice)" if extended else
                        " (common practice)"))
    else:
        notes.append(f"AUC24 target: dose = AUC24 x CL x interval / (24 S); ranked by closeness "
                     f"of the interval to 12 h (common practice); aim {short(aim_auc)} mg*h/L")
    below = regimens[0].predicted.get("time_below_trough_max")
    if extended and below is not None:
        notes.append(f"extended interval: about {short(below)} h of each "
                     f"{short(regimens[0].interval)}-h interval below "
                     f"{short(trough_limits.high)} mg/L at steady state (the drug-free time)")
    if salt_factor != 1.0:
        notes.append(f"doses are of the product; salt factor S = {salt_factor:g}")
    target = {"peak": aim_peak if peak is not None else None,
              "trough": aim_trough if trough is not None else None,
              "peak_limits": [peak_limits.low, peak_limits.high],
              "trough_limits": [trough_limits.low, trough_limits.high],
              "infusion_time": infusion_time}
    if auc_24 is not None:
        target["auc_24"] = [auc_24.low, auc_24.high]
    return DesignResult(name, "intermittent", clearance, volume, regimens, target=target,
                        notes=notes, warnings=warnings, salt_factor=salt_factor, state=state)


def _limits_and_aims(peak, trough, peak_limits, trough_limits, auc_24, notes: list[str]):
    """Limits (targets without limits get ±20 %, stated) and the aims of the unrounded
    design: the targets, or the middle or stated side of the limits, or the AUC."""
    if peak is not None and peak_limits is None:
        peak_limits = Limits.around(peak, DEFAULT_TARGET_TOLERANCE)
        notes.append(f"no peak limits stated: acceptance taken as the target ±"
                     f"{DEFAULT_TARGET_TOLERANCE:.0%} ({peak_limits.text()})")
    if trough is not None and trough_limits is None:
        trough_limits = Limits.around(trough, DEFAULT_TARGET_TOLERANCE)
        notes.append(f"no trough limits stated: acceptance taken as the target ±"
                     f"{DEFAULT_TARGET_TOLERANCE:.0%} ({trough_limits.text()})")
    peak_limits = peak_limits or Limits()
    trough_limits = trough_limits or Limits()
    aim_auc_value = auc_24.low if auc_24 is not None and auc_24.low == auc_24.high else None
    auc_24 = auc_range(auc_24, notes)
    aim_auc = aim_auc_value or (aim_of(auc_24, high_side=True) if auc_24 is not None else None)
    # an aim is a target, or the (geometric) middle of a window with both ends; a one-sided
    # limit is a limit, not an aim -- unless no side has an aim at all (then the limits
    # that allow the longest interval are the design's aim, as before)
    aim_peak = peak if peak is not None else _middle(peak_limits)
    aim_trough = trough if trough is not None else _middle(trough_limits)
    if aim_peak is None and aim_trough is None and aim_auc is None:
        aim_peak = aim_of(peak_limits, high_side=True)
        aim_trough = aim_of(trough_limits, high_side=False)
    by_levels = aim_peak is not None and aim_trough is not None
    if aim_peak is None and aim_trough is None and aim_auc is None:
        raise ValueError("need a peak target or limit and a trough target or limit, or an "
                         "AUC24 target")
    if by_levels and aim_trough >= aim_peak:
        raise ValueError(f"the trough aim {aim_trough:g} mg/L must be below the peak aim "
                         f"{aim_peak:g} mg/L")
    return peak_limits, trough_limits, auc_24, (aim_peak, aim_trough, aim_auc)


def _middle(limits: Limits) -> float | None:
    """The geometric middle of a window with both ends, else None."""
    if limits.low and limits.high:
        return math.sqrt(limits.low * limits.high)
    return None


def _first_dose_notes(best: Regimen, clearance, volume, dose_step, max_loading_ratio, state,
                      notes: list[str], warnings: list[str]) -> None:
    """From zero: the loading first dose that gives the steady-state peak at once; from
    the current state: where the proposals start and from which level."""
    acc = 1.0 / -math.expm1(-clearance / volume * best.interval)
    if state is None:
        loading = round_to_step(best.dose * acc, dose_step)
        notes.append(f"a first dose of {short(loading)} mg (accumulation factor {short(acc)}) "
                     f"would give the steady-state peak at once; without it steady state takes "
                     f"about {short(5 * model.LN2 * volume / clearance)} h (five half-lives)")
        if max_loading_ratio is not None and acc > max_loading_ratio:
            warnings.append(f"that loading dose ({short(loading)} mg) is more than "
                            f"{max_loading_ratio:g} times the maintenance dose")
    else:
        notes.insert(0, f"the proposals start at {short(state.start)} h ({state.basis}); the "
                        f"recorded doses from then on are replaced; the level then is "
                        f"{short(state.level)} mg/L (projected from the history with the "
                        "individual estimates); the first dose is sized (or delayed) so that "
                        "the course joins its steady state after one infusion")


def _intermittent_candidate(clearance, volume, infusion_time, tau, limits, aims, dose_step,
                            salt_factor, max_dose, tau_exact, dose_exact,
                            state: CurrentState | None, time_step: float = TIME_STEP
                            ) -> Regimen:
    """The rounded dose for one practical interval, re-predicted and flagged."""
    peak_limits, trough_limits, auc_24 = limits
    aim_peak, aim_trough, aim_auc = aims
    a, b, avg1 = _per_mg(tau, infusion_time, clearance, volume, salt_factor)
    per_auc = avg1 * 24.0
    lo = max(div_or(peak_limits.low, a), div_or(trough_limits.low, b), 0.0)
    hi = min(div_or(peak_limits.high, a, math.inf), div_or(trough_limits.high, b, math.inf))
    if auc_24 is not None:
        lo = max(lo, div_or(auc_24.low, per_auc))
        hi = min(hi, div_or(auc_24.high, per_auc, math.inf))
    feasible = lo <= hi
    if aim_peak is not None and aim_trough is not None:
        d_peak, d_trough = aim_peak / a, aim_trough / b
        inside = [d for d in (d_peak, d_trough) if lo * (1 - 1e-12) <= d <= hi * (1 + 1e-12)]
        ideal = (math.sqrt(d_peak * d_trough) if len(inside) != 1 or not feasible
                 else inside[0])     # one aim out of reach: keep the other at its aim
    elif aim_peak is not None:
        ideal = aim_peak / a
    elif aim_trough is not None:
        ideal = aim_trough / b
    else:
        ideal = aim_auc / per_auc
    if feasible:
        ideal = min(max(ideal, lo), hi)
    elif math.isfinite(hi) and lo > 0:
        ideal = math.sqrt(lo * hi)
    dose = round_inside(ideal, lo, hi, dose_step) if feasible else round_to_step(ideal,
                                                                                 dose_step)
    pk, tr, av = dose * a, dose * b, dose * avg1
    flags = [f for f in (peak_limits.violation(pk, "steady-state peak"),
                         trough_limits.violation(tr, "steady-state trough")) if f]
    if auc_24 is not None:
        f = auc_24.violation(av * 24.0, "steady-state AUC24", unit="mg*h/L")
        if f:
            flags.append(f)
    if not feasible:
        flags.append(_infeasible_reason(tau, a, b, peak_limits, trough_limits, auc_24,
                                        per_auc))
    if max_dose is not None and dose > max_dose:
        flags.append(f"dose {short(dose)} mg exceeds the stated maximum {short(max_dose)} mg")
    accumulation = 1.0 / -math.expm1(-clearance / volume * tau)
    predicted = {"plateau": None, "peak": pk, "trough": tr, "average": av,
                 "auc_24": av * 24.0, "first_dose_peak": pk / accumulation}
    if trough_limits.high is not None:
        k = clearance / volume
        falling = math.log(pk / trough_limits.high) / k if pk > trough_limits.high else 0.0
        predicted["time_below_trough_max"] = max(tau - infusion_time - falling, 0.0)
    exact = {"interval": tau_exact, "dose": dose_exact} if tau_exact else {"dose": ideal}
    label = f"{short(dose)} mg over {short(infusion_time)} h every {short(tau)} h"
    if state is None:
        n = math.floor(PROJECTION_HORIZON / tau - 1e-9) + 1
        records = (infusion_record(0.0, dose, infusion_time, tau, n),)
        return Regimen(label, dose=dose, interval=tau, infusion_time=infusion_time,
                       predicted=predicted, meets_target=not flags, flags=tuple(flags),
                       exact=exact, doses=records)
    return _intermittent_from_state(state, label, dose, tau, infusion_time, tr, clearance,
                                    volume, salt_factor, dose_step, predicted, flags, exact,
                                    (peak_limits, trough_limits, auc_24), max_dose, time_step)


def first_dose_records(state: CurrentState, dose: float, tau: float, infusion_time: float,
                       trough_ss: float, clearance: float, volume: float, salt_factor: float,
                       dose_step: float | None, time_step: float = TIME_STEP):
    """Dose records of a repeated regimen that joins its steady state from ``state``.

    Below the steady-state trough the first dose carries the extra amount that adds
    ``(Ctrough - C) exp(-k (t - start))`` after its infusion
    (:func:`pkcalc.model.amount_to_reach`), so from then on the course is the
    steady-state one; above it the first dose waits ``ln(C/Ctrough)/k``
    (:func:`pkcalc.model.time_to_fall`), rounded to ``time_step`` (a wait shorter
    than the step is dropped: the first dose is given at the start).  Records cover
    the projection horizon.

    Returns
    -------
    records : tuple of DoseRecord
    first_dose : float, mg (product)
    label : str
    exact_first : float, mg (unrounded first dose)
    """
    s0, c0 = state.start, state.level
    first_start, first_dose, exact_first = s0, dose, dose
    label = f"{short(dose)} mg over {short(infusion_time)} h every {short(tau)} h"
    hold = float(model.time_to_fall(c0, trough_ss, clearance, volume)) \
        if c0 > trough_ss * (1 + 1e-9) else 0.0
    if hold >= time_step > 0 or (hold > 0 and time_step <= 0):
        first_start = s0 + max(round_time(hold, time_step), time_step)
        label += f", first dose after a {short(first_start - s0)}-h hold"
    elif hold > 0:
        label += " (no hold: the level reaches the trough within the time step)"
    else:
        k = clearance / volume
        lift = (trough_ss - c0) * math.exp(-k * infusion_time)
        extra = float(model.amount_to_reach(lift, 0.0, clearance, volume, infusion_time))
        exact_first = dose + extra / salt_factor
        first_dose = round_to_step(exact_first, dose_step)
        if first_dose != dose:
            label = f"first {short(first_dose)} mg, then " + label
    end = s0 + PROJECTION_HORIZON
    n = max(math.floor((end - first_start) / tau - 1e-9), 0)
    records = (infusion_record(first_start, first_dose, infusion_time),)
    if n >= 1:
        records += (infusion_record(first_start + tau, dose, infusion_time, tau, n),)
    return records, first_dose, label, exact_first


def _intermittent_from_state(state, label, dose, tau, infusion_time, trough_ss, clearance,
                             volume, salt_factor, dose_step, predicted, flags, exact,
                             level_limits, max_dose, time_step) -> Regimen:
    """First dose from the current level, the rest of the regimen, and the projected checks."""
    records, first_dose, label, exact_first = first_dose_records(
        state, dose, tau, infusion_time, trough_ss, clearance, volume, salt_factor, dose_step,
        time_step)
    if exact_first != dose:
        exact = {**exact, "first_dose": exact_first}
    end = state.start + PROJECTION_HORIZON
    proj = project(state, records_events(records, salt_factor, end), clearance, volume,
                   settle=records[0].start + infusion_time)
    peak_limits, trough_limits, auc_24 = level_limits
    flags = list(flags)
    for t, c in proj.peaks:
        f = peak_limits.violation(c, f"projected peak at {short(t)} h")
        if f:
            flags.append(f)
            break
    for t, c in proj.troughs:
        f = trough_limits.violation(c, f"projected trough at {short(t)} h")
        if f:
            flags.append(f)
            break
    if peak_limits.high is not None and proj.highest > peak_limits.high * (1 + 1e-9) and \
            proj.highest > state.level * (1 + 1e-9) and \
            not any("projected peak" in f for f in flags):
        flags.append(f"the projected course reaches {short(proj.highest)} mg/L at "
                     f"{short(proj.highest_time)} h, above {short(peak_limits.high)} mg/L")
    if max_dose is not None and first_dose > max_dose:
        flags.append(f"first dose {short(first_dose)} mg exceeds the stated maximum "
                     f"{short(max_dose)} mg")
    if auc_24 is not None:
        for a, b, area in proj.auc_windows:
            f = auc_24.violation(area, f"projected AUC over {short(a)}-{short(b)} h",
                                 unit="mg*h/L")
            if f:
                flags.append(f)
                break
    predicted = {**predicted, "start_level": state.level,
                 "first_dose_peak": proj.peaks[0][1] if proj.peaks else None,
                 "highest": proj.highest, "level_at_72h": proj.level_at_end,
                 "auc_first_24": proj.auc_first_24}
    if auc_24 is not None and proj.auc_windows:
        areas = [w[2] for w in proj.auc_windows]
        predicted.update(lowest_auc_24_window=min(areas), highest_auc_24_window=max(areas))
    return Regimen(label, dose=dose, interval=tau, infusion_time=infusion_time,
                   loading_dose=first_dose if first_dose != dose else None,
                   predicted=predicted, meets_target=not flags, flags=tuple(flags),
                   exact=exact, start=state.start, doses=records)


def _infeasible_reason(tau, a, b, peak_limits: Limits, trough_limits: Limits,
                       auc_24: Limits | None = None, per_auc: float = 1.0) -> str:
    lows = [(div_or(peak_limits.low, a), "peak minimum"),
            (div_or(trough_limits.low, b), "trough minimum")]
    highs = [(div_or(peak_limits.high, a, math.inf), "peak maximum"),
             (div_or(trough_limits.high, b, math.inf), "trough maximum")]
    if auc_24 is not None:
        lows.append((div_or(auc_24.low, per_auc), "AUC24 minimum"))
        highs.append((div_or(auc_24.high, per_auc, math.inf), "AUC24 maximum"))
    lo, lo_name = max(lows)
    hi, hi_name = min(highs)
    return (f"at {short(tau)} h the {lo_name} needs a dose of at least {short(lo)} mg but the "
            f"{hi_name} allows at most {short(hi)} mg: both cannot be met")
