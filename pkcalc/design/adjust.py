"""Adjustment from measured levels: proportional, Chiou, Sawchuk-Zaske; and
the dispatcher that runs a validated design request."""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from .. import model
from .._format import short
from ..core import DesignCase, DoseEvent, FitOptions, Prior, SubjectData
from ..errors import PkcalcInputError, check_numbers, check_type
from .attainment import ATTAINMENT_LEVEL, with_attainment
from .common import (
    DEFAULT_DOSE_STEP,
    DEFAULT_INTERVALS,
    DEFAULT_RATE_STEP,
    DesignResult,
    Limits,
    Regimen,
    check_levels,
    open_infusion_record,
    rate_for_target,
    records_events,
    round_to_step,
)
from .consistency import fit_misses, rising_while_eliminating, unreachable
from .continuous import design_continuous
from .intermittent import design_intermittent, first_dose_records
from .levels import (
    check_levels_outside_infusions,
    chiou_clearance,
    one_level_clearance,
    sawchuk_zaske,
    two_level_parameters,
)
from .projection import (
    PROJECTION_HORIZON,
    TIME_STEP,
    CurrentState,
    current_state,
    default_start,
    history_events,
    prescribed_interval,
)

#: Share of steady state from which the steady-state formulas apply (five half-lives,
#: 1 - 2^-5; a fact of the trade).
STEADY_SHARE = 1 - 2.0**-5
#: A history longer than this many half-lives makes "one clearance throughout" a real
#: assumption (common practice).
LONG_HISTORY_HALF_LIVES = 3.0


def steady_state_validity(events, t_level: float, k: float) -> str:
    """Whether a level drawn at ``t_level`` after the recorded doses is at steady state,
    in words: the share reached after the dosing so far (``1 - exp(-k T)``, one
    exponential; calc)."""
    start, _, duration = events
    given = start[(duration >= 0) & (start <= t_level)]
    if not given.size:
        return "valid at steady state only"
    span = t_level - float(given.min())
    share = -np.expm1(-k * span)
    if share >= STEADY_SHARE:
        return (f"valid at steady state only: the level was drawn {short(span)} h after dosing "
                f"began ({short(span * k / model.LN2)} half-lives), at steady state")
    return (f"valid at steady state only -- NOT at steady state here: the level was drawn "
            f"{short(span)} h after dosing began ({short(span * k / model.LN2)} half-lives, "
            f"{share:.0%} of steady state); do not use it")


def long_history_note(events, t_last: float, k: float) -> str | None:
    """A note when the estimate assumes one clearance over a history of several
    half-lives (a changing clearance would be averaged)."""
    start, _, duration = events
    given = start[(duration >= 0) & (start <= t_last)]
    if given.size < 2:
        return None
    span = t_last - float(given.min())
    half = model.LN2 / k
    if span <= LONG_HISTORY_HALF_LIVES * half:
        return None
    return (f"one clearance is assumed over the whole recorded history ({short(span)} h, "
            f"{short(span / half)} half-lives): if it changed (renal function), the estimates "
            "average over the change; to individualise from the current dose only, give a "
            "measured pre-dose level and a level after that dose without the earlier doses "
            "(method sawchuk_zaske, steady_state = false)")


def _check_history(history, field: str = "history") -> None:
    """A dose history is a list of :class:`~pkcalc.core.DoseEvent` (or None)."""
    if history is None:
        return
    if not isinstance(history, list | tuple) or not all(isinstance(d, DoseEvent)
                                                          for d in history):
        raise PkcalcInputError(f"got {type(history).__name__}", field=field,
                               expected="a list of pkcalc.DoseEvent")


# --------------------------------------------------------------------------- adjustments
def adjust_proportional(
    measured: float,
    target: float,
    *,
    current_rate: float | None = None,
    current_dose: float | None = None,
    interval: float | None = None,
    clearance: float | None = None,
    volume: float | None = None,
    salt_factor: float = 1.0,
    rate_step: float | None = DEFAULT_RATE_STEP,
    dose_step: float | None = DEFAULT_DOSE_STEP,
    window: Limits | None = None,
    measured_time: float | None = None,
    history: Sequence | None = None,
    start: float | None = None,
    initial_concentration: float | None = None,
    time_step: float = TIME_STEP,
    name: str = "adjustment",
) -> DesignResult:
    """New rate (or dose) from one level, for linear kinetics.

    ``new = old x Ctarget / Cmeasured`` (Bauer -- from memory) when the level is
    at steady state: then ``CL = S R0 / Css``.  With the dose ``history`` (level
    time on its clock) and a volume, the clearance is instead the one that
    reproduces the level after exactly those doses
    (:func:`one_level_clearance`; equal to ``S R0 / C`` at steady state), and
    the new regimen starts from the level then present (see
    :func:`pkcalc.design.design_continuous` with a state): an incremental
    loading dose below the target, a hold of ``ln(C/Ctarget)/k`` above it.
    Without a history but with a volume, the level is taken as the current
    steady-state level at the time of the draw.

    Parameters
    ----------
    measured, target : float, mg/L
    current_rate : float, optional, mg/h
    current_dose, interval : float, optional, mg and h
        For intermittent regimens (the level is any fixed point of the interval).
    clearance, volume : float, optional, L/h and L
        Population values; the volume is used for the course and the hold.
    measured_time : float, optional, h
        Time of the level on the history clock.
    history : sequence of DoseEvent, optional
        Recorded doses (product amounts).
    start : float, optional, h
    initial_concentration : float, optional, mg/L
    """
    check_numbers({"measured": measured, "target": target, "current_rate": current_rate,
                   "current_dose": current_dose, "volume": volume,
                   "measured_time": measured_time},
                  optional=("current_rate", "current_dose", "volume", "measured_time"))
    _check_history(history)
    if (current_rate is None) == (current_dose is None):
        raise ValueError("give either current_rate or current_dose")
    ratio = target / measured
    if history and volume is not None and measured_time is not None:
        events = history_events(history, salt_factor, initial_concentration)
        impossible = unreachable(events, [(measured_time, measured)], volume)
        if impossible:
            raise ValueError(impossible[0])
        cl_ind = one_level_clearance(events, measured_time, measured, volume)
        if current_dose is not None:
            check_levels_outside_infusions(events, {"measured": measured_time},
                                           "the proportional method on repeated doses")
            tau, how = prescribed_interval(history, interval)
            return _proportional_intermittent(events, cl_ind, volume, measured, measured_time,
                                              target, current_dose, tau, how, salt_factor,
                                              dose_step, start, window, time_step, name)
        st, basis = (start, "as given") if start is not None else (
            measured_time, "the time of the level")
        state = current_state(events, cl_ind, volume, st, basis, [(measured_time, measured)])
        basis_note = ("clearance solved from the level after the recorded doses (one "
                      "compartment, the given volume); at steady state it equals S R0 / C")
    elif current_rate is not None and volume is not None:
        cl_ind = salt_factor * current_rate / measured
        state = CurrentState(0.0, measured, "the time of the level (no dose history: the "
                             "level is taken as the steady state on the current rate)",
                             (np.array([0.0]), np.array([measured]),
                              np.array([model.INITIAL_LEVEL])),
                             (np.empty(0), np.empty(0), np.empty(0)), ((0.0, measured),))
        basis_note = "clearance from the steady-state level: CL = S R0 / Css"
    else:
        return _proportional_classical(measured, target, ratio, current_rate, current_dose,
                                       interval, clearance, volume, salt_factor, rate_step,
                                       dose_step, window, name)
    result = design_continuous(cl_ind, volume, target, window=window, salt_factor=salt_factor,
                               rate_step=rate_step, dose_step=dose_step, state=state,
                               time_step=time_step, name=name)
    result.method = "proportional"
    k = cl_ind / volume
    result.estimates = {"clearance": cl_ind, "elimination_rate": k,
                        "half_life": model.LN2 / k, "level_at_start": state.level}
    result.notes.insert(0, basis_note)
    holds = [r.exact["hold"] for r in result.regimens if "hold" in r.exact]
    if holds:
        result.estimates["pause_before_new_rate"] = holds[0]
    if current_rate is not None:
        validity = (steady_state_validity(events, measured_time, k) if history else
                    "valid at steady state only (no dose history given: assumed)")
        result.formulas.append({"name": "ratio rule: new rate = old rate x target / level",
                                "key": "ratio_rule_rate", "value": current_rate * ratio,
                                "kind": "rate", "validity": validity})
    result.notes.append("assumes linear one-compartment kinetics")
    return result


def _proportional_classical(measured, target, ratio, current_rate, current_dose, interval,
                            clearance, volume, salt_factor, rate_step, dose_step, window, name):
    """The steady-state ratio rule alone (no volume or history to project a course)."""
    estimates: dict[str, float] = {"ratio_target_to_measured": ratio}
    notes, regimens, warnings = [], [], []
    if current_rate is not None:
        exact = current_rate * ratio
        rate = round_to_step(exact, rate_step)
        cl_ind = salt_factor * current_rate / measured
        estimates["clearance"] = cl_ind
        predicted = {"plateau": salt_factor * rate / cl_ind, "peak": None, "trough": None,
                     "average": salt_factor * rate / cl_ind}
        accept = window or Limits.around(target, 0.10)
        regimens.append(Regimen(f"new rate {short(rate)} mg/h", rate=rate, predicted=predicted,
                                meets_target=accept.violation(predicted["plateau"], "x") is None,
                                exact={"rate": exact},
                                doses=(open_infusion_record(0.0, rate),)))
        warnings.append("no volume given: the course from the current level (and a hold before "
                        "a lower rate) cannot be projected; the check is at the new plateau only")
    else:
        exact = current_dose * ratio
        dose = round_to_step(exact, dose_step)
        level = measured * dose / current_dose
        accept = window or Limits.around(target, 0.10)
        regimens.append(Regimen(f"new dose {short(dose)} mg", dose=dose, interval=interval,
                                predicted={"level": level},
                                meets_target=accept.violation(level, "x") is None,
                                exact={"dose": exact}))
        warnings.append("no dose history given: the new dose is judged at steady state only; "
                        "give doses = [...] and the level's time to project the course")
    notes.append("the ratio rule is valid at steady state only; without a dose history "
                 "pkcalc cannot check that the level was drawn at steady state (assumed)")
    return DesignResult(name, "proportional", clearance, volume, regimens,
                        target={"plateau": target}, estimates=estimates, notes=notes,
                        warnings=warnings, salt_factor=salt_factor)


def _proportional_intermittent(events, cl, v, measured, t_level, target, current_dose,
                               tau, how, salt_factor, dose_step, start, window, time_step,
                               name) -> DesignResult:
    """Same interval, the dose whose steady-state level at the sampled point is the target,
    started from the current state and judged on the projected course."""
    st, _, du = events
    given = st[(du >= 0) & (st <= t_level)]
    last = float(given.max())
    t_inf = float(du[(du >= 0) & (st == last)].max())
    phase = t_level - last
    if tau is None:
        raise ValueError("give current_interval: the history has a single dose")
    per_mg = float(model.steady_state_profile([phase % tau], [0.0], [salt_factor], [t_inf],
                                              tau, cl, v)[0])
    exact = target / per_mg
    dose = round_to_step(exact, dose_step)
    if start is None:
        start, basis = default_start(events, t_level, True, tau)
    else:
        basis = "as given"
    state = current_state(events, cl, v, start, basis, [(t_level, measured)])
    _, trough_ss, _ = (float(x) for x in model.steady_state_intermittent(
        salt_factor * dose, t_inf, tau, cl, v))
    window = window or Limits.around(target, 0.10)
    reg = _first_dose_regimen(state, dose, tau, t_inf, trough_ss, cl, v, salt_factor,
                              dose_step, phase, window, time_step)
    k = cl / v
    result = DesignResult(
        name, "proportional", cl, v, [reg], state=state,
        target={"plateau": None, "level": target, "window": [window.low, window.high]},
        estimates={"clearance": cl, "elimination_rate": k, "half_life": model.LN2 / k,
                   "level_at_start": state.level},
        notes=[f"clearance solved from the level after the recorded doses; the new dose gives "
               f"{short(target)} mg/L at {short(phase)} h after each dose at steady state "
               f"(every {short(tau)} h: {how}); the regimen starts at {short(state.start)} h "
               f"({basis}) from {short(state.level)} mg/L"],
        salt_factor=salt_factor)
    result.formulas.append({"name": "ratio rule: new dose = old dose x target / level",
                            "key": "ratio_rule_dose",
                            "value": current_dose * target / measured, "kind": "amount",
                            "validity": steady_state_validity(events, t_level, k)})
    return result


def _first_dose_regimen(state, dose, tau, t_inf, trough_ss, cl, v, salt_factor, dose_step,
                        phase, window: Limits, time_step: float = TIME_STEP) -> Regimen:
    """Dose every ``tau`` from the state (first dose joins steady state); flags when the
    projected level ``phase`` h after a dose (after the first) leaves ``window``."""
    records, first_dose, label, _ = first_dose_records(state, dose, tau, t_inf, trough_ss, cl,
                                                       v, salt_factor, dose_step, time_step)
    end = state.start + PROJECTION_HORIZON
    ev = records_events(records, salt_factor, end)
    starts = ev[0][ev[0] < end][1:]
    when = starts + phase
    when = when[when <= end]
    full = tuple(np.concatenate([b, n]) for b, n in zip(state.before, ev, strict=True))
    levels = model.concentration(when, *full, cl, v) if when.size else np.empty(0)
    flags = []
    for t, c in zip(when, levels, strict=True):
        f = window.violation(float(c), f"projected level at {short(float(t))} h")
        if f:
            flags.append(f)
            break
    predicted = {"level": float(levels[-1]) if levels.size else None,
                 "start_level": state.level}
    return Regimen(label, dose=dose, interval=tau, infusion_time=t_inf,
                   loading_dose=first_dose if first_dose != dose else None,
                   predicted=predicted, meets_target=not flags, flags=tuple(flags),
                   exact={"dose": dose}, start=state.start, doses=records)


def adjust_two_levels(
    rate: float | None, t1: float, c1: float, t2: float, c2: float, volume: float,
    target: float, *, salt_factor: float = 1.0, rate_step: float | None = DEFAULT_RATE_STEP,
    dose_step: float | None = DEFAULT_DOSE_STEP, window: Limits | None = None,
    history: Sequence | None = None, start: float | None = None,
    initial_concentration: float | None = None, time_step: float = TIME_STEP,
    name: str = "adjustment",
) -> DesignResult:
    """Chiou and exact two-level clearance, then a new rate from the level now.

    Without a ``history`` the two levels are drawn during one constant infusion
    of ``rate`` (times on any clock).  With the recorded doses (times on their
    clock) the input between the draws is taken from them -- rate changes and
    boluses included: the exact clearance carries ``C1`` at ``t1`` to ``C2`` at
    ``t2`` under exactly that input (:func:`one_level_clearance` with ``C1`` as
    an initial level at ``t1``), and Chiou's formula uses the average rate
    between the draws.  The new regimen starts at ``start`` (default ``t2``)
    from the level then present (see :func:`pkcalc.design.design_continuous`).
    With a history both levels must be reachable from the recorded doses with the
    stated volume (:func:`pkcalc.design.consistency.unreachable`); otherwise every
    proposal is *check levels*.
    """
    check_numbers({"rate": rate, "t1": t1, "c1": c1, "t2": t2, "c2": c2, "volume": volume,
                   "target": target}, optional=("rate",))
    if not t2 > t1:
        raise PkcalcInputError(f"the second level must be drawn after the first (t1 {t1:g} h, "
                               f"t2 {t2:g} h)", field="t2")
    _check_history(history)
    suspects: list[str] = []
    if history:
        events = history_events(history, salt_factor, initial_concentration)
        suspects = unreachable(events, [(t1, c1), (t2, c2)], volume)
        _, after = model.split_events(*events, t1)
        inside = model.split_events(*after, t2)[0]
        infused = float(inside[1][inside[2] >= 0].sum())
        drug_rate = infused / (t2 - t1)
    else:
        drug_rate = salt_factor * rate
        after = (np.array([t1]), np.array([drug_rate * (t2 - t1)]), np.array([t2 - t1]))
    from_first = tuple(np.append(a, x) for a, x in zip(after, (t1, c1, model.INITIAL_LEVEL),
                                                      strict=True))
    cl_chiou = chiou_clearance(drug_rate, t1, c1, t2, c2, volume)
    cl_exact = one_level_clearance(from_first, t2, c2, volume)
    if start is None:
        start, basis = t2, "the time of the second level"
    else:
        basis = "as given"
    state = current_state(from_first, cl_exact, volume, start, basis, [(t1, c1), (t2, c2)])
    result = design_continuous(cl_exact, volume, target, window=window, salt_factor=salt_factor,
                               rate_step=rate_step, dose_step=dose_step, state=state,
                               time_step=time_step, name=name)
    result.method = "chiou"
    diff = cl_chiou / cl_exact - 1
    chiou_rate = round_to_step(rate_for_target(target, cl_chiou, salt_factor), rate_step)
    result.estimates = {"clearance_exact": cl_exact, "clearance_chiou": cl_chiou,
                        "chiou_minus_exact_percent": 100 * diff,
                        "elimination_rate": cl_exact / volume,
                        "half_life": model.LN2 * volume / cl_exact, "volume": volume,
                        "level_at_start": state.level}
    result.notes[:0] = [
        "clearance: the exact one-compartment solution (the stated volume) carries the first "
        "level to the second under the recorded input; Chiou's method approximates the area "
        f"between the levels by a trapezoid and gives {short(cl_chiou)} L/h "
        f"(a rate of {short(chiou_rate)} mg/h for the target)",
        "both clearances depend on the population volume given"]
    if history:
        result.notes.append(f"input between the levels from the recorded doses: average "
                            f"{short(drug_rate)} mg/h of drug")
    if abs(diff) > 0.05 and not suspects:
        result.warnings.append(f"Chiou's clearance differs from the exact solution by "
                               f"{diff:+.1%}: the levels are far apart for the trapezoid "
                               "approximation")
    return check_levels(result, suspects)


def adjust_peak_trough(
    dose: float | None, infusion_time: float | None, interval: float | None,
    peak_level: float, peak_time: float, trough_level: float, trough_time: float,
    *, pre_dose_level: float | None = None, steady_state: bool = True,
    new_infusion_time: float | None = None, peak: float | None = None,
    trough: float | None = None, peak_limits: Limits | None = None,
    trough_limits: Limits | None = None, auc_24: Limits | None = None,
    intervals: Sequence[float] = DEFAULT_INTERVALS,
    dose_step: float | None = DEFAULT_DOSE_STEP, salt_factor: float = 1.0,
    max_dose: float | None = None, history: Sequence | None = None,
    start: float | None = None, initial_concentration: float | None = None,
    time_step: float = TIME_STEP, name: str = "adjustment",
) -> DesignResult:
    """Sawchuk-Zaske individualisation, then a new dose and interval from the level now.

    Without a ``history``: the classical method around one dose (times from the
    start of its infusion; :func:`sawchuk_zaske`), the new regimen starting one
    interval after that dose.  With the recorded doses (times on their clock):
    k and V from the two levels by superposing every earlier dose
    (:func:`two_level_parameters`) -- any dose, steady state or not -- and the
    new regimen starting at ``start`` (default: the next scheduled dose).
    """
    check_numbers({"dose": dose, "infusion_time": infusion_time, "interval": interval,
                   "peak_level": peak_level, "peak_time": peak_time,
                   "trough_level": trough_level, "trough_time": trough_time},
                  optional=("dose", "interval"))
    _check_history(history)
    t_new = new_infusion_time if new_infusion_time is not None else infusion_time
    if history:
        events = history_events(history, salt_factor, initial_concentration)
        check_levels_outside_infusions(events, {"peak_sample": peak_time,
                                                 "trough_sample": trough_time})
        pair = sorted([(peak_time, peak_level), (trough_time, trough_level)])
        est = two_level_parameters(events, pair[0], pair[1])
        if t_new is None:
            raise ValueError("design.infusion_time: the new regimen needs an infusion time")
        cl, v = est["clearance"], est["volume"]
        last = max(peak_time, trough_time)
        tau_rx, _how = prescribed_interval(history, interval)
        if start is None:
            start, basis = default_start(events, last, True, tau_rx)
        else:
            basis = "as given"
        state = current_state(events, cl, v, start, basis, pair)
        note = ("individual k and V: the two levels solved exactly with every recorded dose "
                "superposed (one compartment; the Sawchuk-Zaske idea without the steady-state "
                "assumption)")
        long_note = long_history_note(events, last, est["elimination_rate"])
    else:
        est = sawchuk_zaske(dose, infusion_time, interval, peak_level, peak_time, trough_level,
                            trough_time, pre_dose_level=pre_dose_level,
                            steady_state=steady_state, salt_factor=salt_factor)
        cl, v = est["clearance"], est["volume"]
        # the sampled dose on its own clock, the level at its start decaying beside it
        events = (np.array([0.0, 0.0]), np.array([est["pre_dose_level"],
                                                  salt_factor * dose]),
                  np.array([model.INITIAL_LEVEL, infusion_time]))
        start = interval if start is None else start
        state = current_state(events, cl, v, start, "the next dose, one interval after the "
                              "sampled one", [(peak_time, peak_level),
                                              (trough_time, trough_level)])
        note = ("individual k from the log-linear decline between the two levels; V from the "
                "peak at the end of the infusion and the pre-dose level (Sawchuk & Zaske 1976)")
        long_note = None
    result = design_intermittent(
        cl, v, t_new, peak=peak, trough=trough, peak_limits=peak_limits,
        trough_limits=trough_limits, auc_24=auc_24, intervals=intervals, dose_step=dose_step,
        salt_factor=salt_factor, max_dose=max_dose, state=state, time_step=time_step,
        name=name)
    result.method = "sawchuk_zaske"
    assumed_pre = not history and pre_dose_level is None
    result.estimates = {k: x for k, x in est.items()
                        if not (assumed_pre and k == "pre_dose_level")}
    result.estimates["level_at_start"] = state.level
    if assumed_pre:
        how = ("the trough extrapolated back to the dose" if trough_time < 0 else
               "the steady-state trough (steady state assumed)")
        result.assumed["pre_dose_level"] = est["pre_dose_level"]
        result.notes.insert(0, f"the pre-dose level is assumed, not measured: {how}; the "
                               "classical method is valid at steady state only")
    result.notes.insert(0, note)
    if long_note:
        result.notes.append(long_note)
    return result


def design_from_case(case: DesignCase) -> DesignResult:
    """Run a validated design request (see :class:`pkcalc.schema.DesignCase`)."""
    opts = dict(case.options)
    for key in ("peak_limits", "trough_limits", "auc_24"):
        if opts.get(key) is not None:
            opts[key] = Limits(*opts[key])
    if opts.get("window") is not None:
        opts["window"] = Limits(*opts["window"])
    functions = {
        "map": adjust_map,
        "continuous": design_continuous,
        "intermittent": design_intermittent,
        "proportional": adjust_proportional,
        "chiou": adjust_two_levels,
        "sawchuk_zaske": adjust_peak_trough,
    }
    result = functions[case.method](**opts, name=case.name)
    if case.method in ("proportional", "chiou", "sawchuk_zaske"):
        result.notes.append("chance of meeting the targets: not computed -- this method "
                            "takes the levels as exact and has no prior; method 'map' (the "
                            "same levels and doses with a prior) gives it")
    from ..plausibility import parameter_warnings

    if result.clearance and result.volume:
        result.warnings.extend(parameter_warnings(result.clearance, result.volume, case.weight))
    result.clock_origin = case.clock_origin
    return result


def adjust_map(doses, levels, prior, *, plateau=None, window=None, auc_24=None,
               infusion_time=None, peak=None, trough=None, peak_limits=None,
               trough_limits=None, intervals=DEFAULT_INTERVALS, weight=None,
               salt_factor: float = 1.0, start: float | None = None,
               initial_concentration: float | None = None, loading_time: float = 0.0,
               name: str = "adjustment", interval: float | None = None,
               time_step: float = TIME_STEP, attainment_level: float = ATTAINMENT_LEVEL,
               rank: str = "target", **rounding) -> DesignResult:
    """Bayesian (MAP) individualisation from any levels, then a new regimen from now.

    The individual clearance and volume are the posterior mode given the levels
    after ``doses`` (product amounts; ``S x`` is the drug) and the population
    ``prior`` (see :mod:`pkcalc.fit`).  The new regimen starts at ``start``
    (default: the next scheduled dose for repeated infusions, the last level for
    a continuous infusion) from the level the history leaves then, and is
    judged on its projected course (see :mod:`pkcalc.design.projection`): a
    continuous infusion to ``plateau`` / ``auc_24``, or repeated infusions of
    ``infusion_time`` to the peak/trough targets or limits and/or ``auc_24``.

    ``levels`` are ``(time, level)`` or ``(time, level, blq, lloq)``: a level below
    the LLOQ enters by the censored likelihood (Beal's M3).  Before the proposals
    are trusted the levels are checked (:mod:`pkcalc.design.consistency`): a rise
    with nothing given, a level the estimate misses by more than two residual SDs
    or an estimate that did not converge make every proposal *check levels*.

    Every proposal, and the current regimen continued, gets the posterior probability
    that each target holds over its projected course (:mod:`pkcalc.design.attainment`);
    a proposal *meets target* only when the probability that all of them hold is at
    least ``attainment_level``.  ``rank = "attainment"`` orders the proposals by that
    probability.
    """
    from ..fit import fit_subjects

    _check_history(doses, "doses")
    check_type(prior, Prior, "prior", "a pkcalc.Prior (e.g. a population result's "
               "to_prior())")
    if not isinstance(levels, list | tuple) or not levels or not all(
            isinstance(x, list | tuple) and len(x) >= 2 for x in levels):
        raise PkcalcInputError(f"got {type(levels).__name__}", field="levels",
                               expected="a list of (time, level) pairs, or (time, None, True, "
                                        "lloq) for a level below the LLOQ")
    check_numbers({f"levels[{i}].time": x[0] for i, x in enumerate(levels)})
    t = np.array([x[0] for x in levels], float)
    c = np.array([np.nan if x[1] is None else x[1] for x in levels], float)
    blq = np.array([bool(x[2]) if len(x) > 2 else False for x in levels])
    lloq = np.array([x[3] if len(x) > 3 and x[3] is not None else np.nan for x in levels],
                    float)
    order = np.argsort(t)
    events = history_events(doses, salt_factor, initial_concentration)
    subject = SubjectData(name, t[order], np.where(blq, np.nan, c)[order], lloq[order],
                          blq[order], np.arange(t.size), *events,
                          covariates={} if weight is None else {"weight": weight})
    fits, failures = fit_subjects([subject], FitOptions(prior=prior, blq="likelihood"))
    if not fits:
        raise ValueError(f"the MAP estimate failed: {failures[0][1]}")
    fit = fits[0]
    cl, v = fit.clearance, fit.volume
    continuous = plateau is not None or (auc_24 is not None and infusion_time is None)
    if start is None:
        tau_rx, _ = prescribed_interval(doses, interval)
        start, basis = default_start(events, float(t.max()), not continuous, tau_rx)
    else:
        basis = "as given"
    measured = [(tt, cc) for tt, cc, b in zip(t, c, blq, strict=True) if not b]
    state = current_state(events, cl, v, start, basis, measured)
    result = _design_from_state(state, cl, v, continuous, salt_factor, name, rounding,
                                plateau=plateau, window=window, auc_24=auc_24,
                                loading_time=loading_time, infusion_time=infusion_time,
                                peak=peak, trough=trough, peak_limits=peak_limits,
                                trough_limits=trough_limits, intervals=intervals,
                                time_step=time_step)
    result.method = "map"
    result.estimates = {"clearance": cl, "volume": v,
                        "half_life": fit.estimates["half_life"].value,
                        "level_at_start": state.level,
                        **{k: x for k, x in fit.prior.items() if k.startswith("prior_variance")}}
    result.notes.insert(0, f"individual clearance and volume: MAP estimate from "
                           f"{fit.n_obs} level(s) and the prior ({prior.source or 'inline'})")
    result.notes += fit.notes
    result.warnings += fit.warnings
    if blq.any():
        result.notes.append(f"{int(blq.sum())} level(s) below the LLOQ enter as P(C < LLOQ) "
                            "(censored likelihood, Beal's M3)")
    _adequacy_of_levels(subject, fit, prior, result)
    long_note = long_history_note(events, float(t.max()), cl / v)
    if long_note:
        result.notes.append(long_note)
    suspects = rising_while_eliminating(events, measured)
    suspects += fit_misses(fit, prior.additive, prior.proportional)
    tau_rx, _ = prescribed_interval(doses, interval)
    with_attainment(result, subject, prior, (math.log(cl), math.log(v)), events, tau_rx,
                    attainment_level, rank)
    return check_levels(result, suspects)


def _adequacy_of_levels(subject: SubjectData, fit, prior, result: DesignResult) -> None:
    """With enough levels, whether one compartment describes them (a distribution phase
    makes every level-based estimate, and so the proposal, less trustworthy)."""
    from ..fit import check_adequacy

    a = check_adequacy([subject], [fit], FitOptions(prior=prior, blq="drop"))[subject.subject]
    if a.verdict == "distribution_phase":
        result.warnings.append("one compartment does not describe these levels: " + a.reason)
        result.notes += a.notes
    elif a.verdict == "adequate":
        result.notes.append("one compartment is adequate for these levels: " + a.reason)
    else:
        result.notes.append(f"one-compartment adequacy not checked: {a.reason}")


_CONTINUOUS_KEYS = ("rate_step", "dose_step", "max_rate", "max_loading", "max_loading_ratio")
_INTERMITTENT_KEYS = ("dose_step", "max_dose", "max_loading_ratio")


def _design_from_state(state, cl, v, continuous, salt_factor, name, rounding, *, plateau=None,
                       window=None, auc_24=None, loading_time=0.0, infusion_time=None,
                       peak=None, trough=None, peak_limits=None, trough_limits=None,
                       intervals=DEFAULT_INTERVALS, time_step=TIME_STEP) -> DesignResult:
    """The new regimen from the patient's state, continuous or intermittent."""
    if continuous:
        return design_continuous(cl, v, plateau, window=window, auc_24=auc_24,
                                 loading_time=loading_time or 0.0, salt_factor=salt_factor,
                                 state=state, time_step=time_step, name=name,
                                 **{k: x for k, x in rounding.items() if k in _CONTINUOUS_KEYS})
    return design_intermittent(cl, v, infusion_time, peak=peak, trough=trough,
                               peak_limits=peak_limits, trough_limits=trough_limits,
                               auc_24=auc_24, intervals=intervals, salt_factor=salt_factor,
                               state=state, time_step=time_step, name=name,
                               **{k: x for k, x in rounding.items() if k in _INTERMITTENT_KEYS})
