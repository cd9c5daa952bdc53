"""Designs to a target: continuous infusion to a plateau, repeated short
infusions to peak/trough limits."""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from .. import model
from .._format import short
from .common import (
    DEFAULT_DOSE_STEP,
    DEFAULT_INTERVALS,
    DEFAULT_MAX_LOADING_RATIO,
    DEFAULT_RATE_STEP,
    DEFAULT_TARGET_TOLERANCE,
    NEAR_TARGET,
    DesignResult,
    Limits,
    Regimen,
    loading_dose_for_target,
    loading_infusion_for_target,
    rate_for_target,
    round_to_step,
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


def design_continuous(
    clearance: float,
    volume: float,
    plateau: float,
    *,
    window: Limits | None = None,
    loading_time: float = 0.0,
    salt_factor: float = 1.0,
    rate_step: float | None = DEFAULT_RATE_STEP,
    loading_step: float | None = DEFAULT_DOSE_STEP,
    max_rate: float | None = None,
    max_loading: float | None = None,
    max_loading_ratio: float | None = DEFAULT_MAX_LOADING_RATIO,
    within: float = 0.10,
    name: str = "design",
) -> DesignResult:
    """Constant-rate infusion (with and without a loading dose) to a plateau.

    ``R0 = Css CL / S``; loading dose ``Css V / S`` as a bolus, or over
    ``loading_time`` with the under-shoot this causes predicted; a loading
    infusion sized for the target at its end (``Css CL T / (1 - exp(-kT)) / S``)
    is proposed beside it.  Without a loading dose the level is within
    ``within`` of the plateau after ``-ln(within)/k`` (Gibaldi & Perrier ch. 2).

    Parameters
    ----------
    clearance : float, L/h
    volume : float, L
    plateau : float, mg/L
        Target plateau concentration.
    window : Limits, optional, mg/L
        Acceptable range; default target ±10 %.
    loading_time : float, h
        0 for a bolus loading dose.
    salt_factor : float
        Fraction of the product that is active drug (0 < S <= 1).
    rate_step, loading_step : float or None, mg/h and mg
        Rounding steps (None: no rounding).
    max_rate, max_loading : float, optional
        User-stated maxima (mg/h, mg): exceeding them is flagged.
    max_loading_ratio : float, optional
        Flag when the loading dose exceeds this many times the maintenance
        amount per 24 h.
    within : float
        Fraction of the plateau for the time-to-target without loading.
    name : str

    Returns
    -------
    DesignResult
    """
    from ..predict import TARGET_RTOL

    k = clearance / volume
    window = window or Limits.around(plateau, TARGET_RTOL)
    exact_rate = rate_for_target(plateau, clearance, salt_factor)
    exact_ld = loading_dose_for_target(plateau, volume, salt_factor)
    rate = round_to_step(exact_rate, rate_step)
    horizon = loading_time + 5.0 * model.LN2 / k
    plateau_pred = float(model.plateau_concentration(salt_factor * rate, clearance))
    t_within = -math.log(within) / k

    def finish(label: str, ld: float | None, exact: dict[str, float]) -> Regimen:
        reg = Regimen(label, rate=rate, loading_dose=ld,
                      loading_time=loading_time if ld else None, exact=exact)
        t, c = _course(reg, clearance, volume, salt_factor, horizon)
        after = t >= (loading_time if ld else 0.0)
        flags = []
        predicted: dict[str, float | None] = {
            "plateau": plateau_pred, "peak": None, "trough": None,
            "average": plateau_pred, "auc_24": plateau_pred * 24.0,
            # the course tends to the plateau: its supremum / infimum include it
            "highest": max(float(c.max()), plateau_pred),
            "lowest_after_loading": min(float(c[after].min()), plateau_pred) if ld else None,
        }
        if ld:
            near = np.abs(c / plateau - 1.0) <= NEAR_TARGET
            idx = np.flatnonzero(after & ~near)
            settle = 0.0 if idx.size == 0 else float(t[min(idx[-1] + 1, t.size - 1)])
            predicted["time_to_within_5pct"] = settle
        else:
            predicted["time_to_within_5pct"] = float(-math.log(NEAR_TARGET) / k)
        v = window.violation(plateau_pred, "predicted plateau")
        if v:
            flags.append(v)
        if ld and window.high is not None and predicted["highest"] > window.high:
            flags.append(f"the course reaches {short(predicted['highest'])} mg/L, above "
                         f"{short(window.high)} mg/L")
        low = predicted["lowest_after_loading"]
        if ld and window.low is not None and low is not None and low < window.low:
            flags.append(f"after the loading dose the level falls to {short(low)} mg/L, below "
                         f"{short(window.low)} mg/L")
        if max_rate is not None and rate > max_rate:
            flags.append(f"rate {short(rate)} mg/h exceeds the stated maximum "
                         f"{short(max_rate)} mg/h")
        if ld and max_loading is not None and ld > max_loading:
            flags.append(f"loading dose {short(ld)} mg exceeds the stated maximum "
                         f"{short(max_loading)} mg")
        if ld and max_loading_ratio is not None and ld > max_loading_ratio * rate * 24.0:
            flags.append(f"loading dose {short(ld)} mg is more than {max_loading_ratio:g} times "
                         f"the 24-h maintenance amount {short(rate * 24)} mg")
        return Regimen(label, rate=rate, loading_dose=ld,
                       loading_time=loading_time if ld else None, predicted=predicted,
                       meets_target=not flags, flags=tuple(flags), exact=exact)

    regimens, notes = [], []
    ld = round_to_step(exact_ld, loading_step)
    label = ("maintenance + loading bolus" if loading_time <= 0 else
             f"maintenance + loading Css*V over {short(loading_time)} h")
    reg = finish(label, ld, {"rate": exact_rate, "loading_dose": exact_ld})
    regimens.append(reg)
    if loading_time > 0:
        exact_inf = loading_infusion_for_target(plateau, clearance, volume, loading_time,
                                                salt_factor)
        ld2 = round_to_step(exact_inf, loading_step)
        reg2 = finish(f"maintenance + loading sized for {short(loading_time)} h infusion",
                      ld2, {"rate": exact_rate, "loading_dose": exact_inf})
        regimens.append(reg2)
        notes.append(
            f"a loading dose of Css*V infused over {short(loading_time)} h ends below the target "
            f"(level {short(regimens[0].predicted['lowest_after_loading'])} mg/L); the second "
            "proposal sizes the loading infusion to reach the target at its end"
        )
    reg3 = finish("maintenance only (no loading dose)", None, {"rate": exact_rate})
    regimens.append(reg3)
    notes.append(f"without a loading dose the level is within {within:.0%} of the plateau after "
                 f"{short(t_within)} h ({short(t_within * k / model.LN2)} half-lives)")
    if salt_factor != 1.0:
        notes.append(f"amounts and rates are of the product; salt factor S = {salt_factor:g}")
    return DesignResult(
        name, "continuous", clearance, volume, regimens,
        target={"plateau": plateau, "window": [window.low, window.high]},
        notes=notes, salt_factor=salt_factor,
    )


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
    intervals: Sequence[float] = DEFAULT_INTERVALS,
    dose_step: float | None = DEFAULT_DOSE_STEP,
    salt_factor: float = 1.0,
    max_dose: float | None = None,
    max_loading_ratio: float | None = DEFAULT_MAX_LOADING_RATIO,
    options: int = 3,
    name: str = "design",
) -> DesignResult:
    """Dose and interval of repeated short infusions to peak/trough limits.

    Steady-state peak and trough are linear in the dose,
    ``peak = dose a(tau)``, ``trough = dose b(tau)`` (see
    :func:`pkcalc.model.steady_state_intermittent`), so for each practical
    interval the limits give a range of doses ``[L, U]``; the interval is
    feasible when ``L <= U``.  The unrounded design aims at the targets (or,
    without targets, at the limits that allow the longest interval); each
    practical interval gets the dose closest (in log scale) to the targets
    inside ``[L, U]``, rounded to ``dose_step``, then re-predicted.  Proposals
    are ranked feasible first, then by closeness to the unrounded interval.

    Parameters
    ----------
    clearance, volume : float, L/h and L
    infusion_time : float, h
    peak, trough : float, optional, mg/L
        Desired steady-state peak and trough.
    peak_limits, trough_limits : Limits, optional, mg/L
        Hard limits.  When only targets are given, target ±20 % is used and
        stated in the notes.
    intervals : sequence of float, h
        Practical intervals to choose from.
    dose_step : float or None, mg
    salt_factor : float
    max_dose : float, optional, mg
    max_loading_ratio : float, optional
    options : int
        How many proposals to return.
    name : str

    Returns
    -------
    DesignResult
    """
    notes: list[str] = []
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
    # aims for the unrounded design
    aim_peak = peak if peak is not None else _aim(peak_limits, high_side=True)
    aim_trough = trough if trough is not None else _aim(trough_limits, high_side=False)
    if aim_peak is None or aim_trough is None:
        raise ValueError("need a peak target or limit and a trough target or limit")
    if aim_trough >= aim_peak:
        raise ValueError(f"the trough aim {aim_trough:g} mg/L must be below the peak aim "
                         f"{aim_peak:g} mg/L")
    tau_exact, dose_exact = exact_intermittent(clearance, volume, infusion_time, aim_peak,
                                               aim_trough, salt_factor)
    candidates = []
    for tau in sorted(set(float(x) for x in intervals)):
        if tau < infusion_time:
            continue
        a, b, avg1 = _per_mg(tau, infusion_time, clearance, volume, salt_factor)
        lo = max(_div(peak_limits.low, a), _div(trough_limits.low, b), 0.0)
        hi = min(_div(peak_limits.high, a, math.inf), _div(trough_limits.high, b, math.inf))
        ideal = math.exp(0.5 * (math.log(aim_peak / a) + math.log(aim_trough / b)))
        feasible = lo <= hi
        if feasible:
            ideal = min(max(ideal, lo), hi)
        else:
            ideal = math.sqrt(lo * hi) if math.isfinite(hi) and lo > 0 else ideal
        dose = _round_inside(ideal, lo, hi, dose_step) if feasible else round_to_step(
            ideal, dose_step)
        pk, tr, av = dose * a, dose * b, dose * avg1
        flags = [f for f in (peak_limits.violation(pk, "steady-state peak"),
                             trough_limits.violation(tr, "steady-state trough")) if f]
        if not feasible:
            flags.append(_infeasible_reason(tau, a, b, peak_limits, trough_limits))
        if max_dose is not None and dose > max_dose:
            flags.append(f"dose {short(dose)} mg exceeds the stated maximum {short(max_dose)} mg")
        accumulation = 1.0 / -math.expm1(-clearance / volume * tau)
        predicted = {"plateau": None, "peak": pk, "trough": tr, "average": av,
                     "auc_24": av * 24.0, "first_dose_peak": pk / accumulation}
        reg = Regimen(
            f"{short(dose)} mg over {short(infusion_time)} h every {short(tau)} h", dose=dose,
            interval=tau, infusion_time=infusion_time, predicted=predicted,
            meets_target=not flags, flags=tuple(flags),
            exact={"interval": tau_exact, "dose": dose_exact},
        )
        candidates.append((not reg.meets_target, abs(math.log(tau / tau_exact)), reg))
    if not candidates:
        raise ValueError("no practical interval is at least as long as the infusion time")
    candidates.sort(key=lambda c: (c[0], c[1]))
    regimens = [c[2] for c in candidates[:options]]
    warnings: list[str] = []
    if not regimens[0].meets_target:
        notes.append("no practical interval meets every limit; the nearest options are shown "
                     "with the limit each one misses")
    best = regimens[0]
    acc = 1.0 / -math.expm1(-clearance / volume * best.interval)
    loading = round_to_step(best.dose * acc, dose_step)
    notes.append(f"a first dose of {short(loading)} mg (accumulation factor {short(acc)}) would "
                 f"give the steady-state peak at once; without it steady state takes about "
                 f"{short(5 * model.LN2 * volume / clearance)} h (five half-lives)")
    if max_loading_ratio is not None and acc > max_loading_ratio:
        warnings.append(f"that loading dose ({short(loading)} mg) is more than "
                        f"{max_loading_ratio:g} times the maintenance dose")
    notes.append(f"unrounded design: {short(dose_exact)} mg every {short(tau_exact)} h gives "
                 f"peak {short(aim_peak)} and trough {short(aim_trough)} mg/L exactly")
    if salt_factor != 1.0:
        notes.append(f"doses are of the product; salt factor S = {salt_factor:g}")
    return DesignResult(
        name, "intermittent", clearance, volume, regimens,
        target={"peak": aim_peak if peak is not None else None,
                "trough": aim_trough if trough is not None else None,
                "peak_limits": [peak_limits.low, peak_limits.high],
                "trough_limits": [trough_limits.low, trough_limits.high],
                "infusion_time": infusion_time},
        notes=notes, warnings=warnings, salt_factor=salt_factor,
    )


def _div(x: float | None, y: float, default: float = 0.0) -> float:
    return default if x is None else x / y


def _aim(limits: Limits, high_side: bool) -> float | None:
    """Design aim from limits: the geometric middle when both ends are given;
    otherwise the one end stated (for a peak maximum and a trough minimum this
    is the boundary that allows the longest interval)."""
    lo, hi = limits.low, limits.high
    if lo and hi:
        return math.sqrt(lo * hi)
    if high_side:
        return hi if hi is not None else lo
    return lo if lo is not None else hi


def _round_inside(ideal: float, lo: float, hi: float, step: float | None) -> float:
    """Round to the step, staying inside [lo, hi] when a multiple of the step fits."""
    if step is None or step <= 0:
        return ideal
    nearest = round_to_step(ideal, step)
    if lo * (1 - 1e-12) <= nearest <= hi * (1 + 1e-12):
        return nearest
    inside = [m * step for m in (math.ceil(lo / step), math.floor(hi / step)) if m >= 1]
    inside = [x for x in inside if lo * (1 - 1e-12) <= x <= hi * (1 + 1e-12)]
    if inside:
        return min(inside, key=lambda x: abs(math.log(x / ideal)))
    return nearest  # no multiple of the step fits: the flag will say which limit is crossed


def _infeasible_reason(tau, a, b, peak_limits: Limits, trough_limits: Limits) -> str:
    lows = [(_div(peak_limits.low, a), "peak minimum"), (_div(trough_limits.low, b),
                                                          "trough minimum")]
    highs = [(_div(peak_limits.high, a, math.inf), "peak maximum"),
             (_div(trough_limits.high, b, math.inf), "trough maximum")]
    lo, lo_name = max(lows)
    hi, hi_name = min(highs)
    return (f"at {short(tau)} h the {lo_name} needs a dose of at least {short(lo)} mg but the "
            f"{hi_name} allows at most {short(hi)} mg: both cannot be met")

