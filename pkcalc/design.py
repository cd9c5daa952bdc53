"""Design a regimen to a target and adjust it from measured levels.

Every proposal is rounded to what can be given and then re-predicted with
:mod:`pkcalc.model`; the predicted values, not the design equations, decide
whether a regimen meets its target.  All numbers are canonical (h, mg, L,
mg/L, L/h, mg/h).  Amounts and rates are of the product as given; the salt
factor ``S`` (fraction of the product that is active drug) converts them to
drug: ``drug = S x product``.

Methods and sources (details in ``docs/methods.md``):

- continuous infusion: ``R0 = Css CL / S``, ``LD = Css V / S``
  (Winter, *Basic Clinical Pharmacokinetics* -- from memory);
- repeated short infusions: the steady-state peak/trough equations
  (Bauer, *Applied Clinical Pharmacokinetics* -- from memory) and
  ``tau = ln(Cmax/Cmin)/k + T`` (Sawchuk & Zaske 1976 -- from memory);
- proportional adjustment at steady state (linear kinetics) and the pause
  ``ln(Cmeasured/Ctarget)/k`` before a lower rate (Bauer -- from memory);
- Chiou et al. 1978 two-level clearance beside the exact one-compartment solve;
- Sawchuk & Zaske 1976 individualisation from a peak and a trough.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import brentq

from . import model
from ._format import format_table, short
from .schema import DesignCase, DoseEvent

__all__ = [
    "DEFAULT_INTERVALS",
    "DesignResult",
    "Limits",
    "Regimen",
    "adjust_peak_trough",
    "adjust_proportional",
    "adjust_two_levels",
    "chiou_clearance",
    "design_continuous",
    "design_intermittent",
    "exact_two_level_clearance",
    "loading_dose_for_target",
    "rate_for_target",
    "run_design",
    "sawchuk_zaske",
]

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

    def violation(self, value: float | None, label: str) -> str | None:
        """A plain-words flag when ``value`` lies outside, else None."""
        if value is None:
            return None
        if self.high is not None and value > self.high * (1 + 1e-12):
            return f"{label} {short(value)} mg/L is above its limit {short(self.high)} mg/L"
        if self.low is not None and value < self.low * (1 - 1e-12):
            return f"{label} {short(value)} mg/L is below its limit {short(self.low)} mg/L"
        return None

    def text(self) -> str:
        lo = "-" if self.low is None else short(self.low)
        hi = "-" if self.high is None else short(self.high)
        return f"{lo} to {hi} mg/L"


def round_to_step(value: float, step: float | None) -> float:
    """Nearest multiple of ``step`` (at least one step); ``step=None`` keeps the value."""
    if step is None or step <= 0:
        return float(value)
    return float(max(round(value / step), 1) * step)


def rate_for_target(target, clearance, salt_factor=1.0):
    """Maintenance rate for a plateau: ``R0 = Css CL / S`` (mg/h of product).

    Examples
    --------
    >>> rate_for_target(10.0, 2.8)
    28.0
    """
    return target * clearance / salt_factor


def loading_dose_for_target(target, volume, salt_factor=1.0, current=0.0):
    """Loading dose: ``LD = (Ctarget - Ccurrent) V / S`` (mg of product).

    ``current`` gives the incremental loading dose of Winter (from memory).

    Examples
    --------
    >>> loading_dose_for_target(10.0, 35.0)
    350.0
    """
    return (target - current) * volume / salt_factor


def loading_infusion_for_target(target, clearance, volume, loading_time, salt_factor=1.0):
    """Loading amount infused over ``T`` that reaches the target at its end.

    From ``C(T) = (R/CL)(1 - exp(-kT)) = Ctarget``:
    ``LD = Ctarget CL T / (1 - exp(-kT)) / S``; it tends to ``Ctarget V / S``
    as ``T -> 0`` [calc].
    """
    k = clearance / volume
    if loading_time <= 0:
        return target * volume / salt_factor
    return target * clearance * loading_time / -math.expm1(-k * loading_time) / salt_factor


# --------------------------------------------------------------------------- results
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

    def events(self, salt_factor: float = 1.0, horizon: float | None = None) -> list[DoseEvent]:
        """Dose events of the regimen in drug amounts (``S x`` product), for prediction.

        Continuous maintenance starts after the loading dose ends and runs to
        ``horizon``; intermittent doses repeat up to ``horizon``.
        """
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

    @property
    def best(self) -> Regimen | None:
        """The first proposal."""
        return self.regimens[0] if self.regimens else None

    def to_frame(self):
        """One row per proposed regimen (canonical units in the headers)."""
        import pandas as pd

        rows = []
        for r in self.regimens:
            row = {"label": r.label, "rate [mg/h]": r.rate, "loading_dose [mg]": r.loading_dose,
                   "loading_time [h]": r.loading_time, "dose [mg]": r.dose,
                   "interval [h]": r.interval, "infusion_time [h]": r.infusion_time}
            row.update({f"predicted_{k} [{'mg*h/L' if k == 'auc_24' else 'mg/L'}]": v
                        for k, v in r.predicted.items()})
            row["meets_target"] = r.meets_target
            row["flags"] = " | ".join(r.flags)
            rows.append(row)
        return pd.DataFrame(rows)

    def summary(self) -> str:
        """Plain-text summary in canonical units (reports add the caution)."""
        lines = [f"Design: {self.name} ({self.method})"]
        if self.estimates:
            lines.append(format_table(["estimate", "value"],
                                      [[k, v] for k, v in self.estimates.items()]))
        for r in self.regimens:
            mark = "meets target" if r.meets_target else "FLAG"
            parts = [f"{k}={short(getattr(r, k))}" for k in
                     ("rate", "loading_dose", "loading_time", "dose", "interval",
                      "infusion_time") if getattr(r, k) is not None]
            pred = ", ".join(f"{k} {short(v)}" for k, v in r.predicted.items() if v is not None)
            lines.append(f"- {r.label}: {' '.join(parts)} -> {pred} [{mark}]")
            lines += [f"    flag: {f}" for f in r.flags]
        lines += [f"note: {n}" for n in self.notes]
        lines += [f"warning: {w}" for w in self.warnings]
        return "\n".join(lines)


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
    from .predict import TARGET_RTOL

    k = clearance / volume
    window = window or Limits.around(plateau, TARGET_RTOL)
    exact_rate = rate_for_target(plateau, clearance, salt_factor)
    exact_ld = loading_dose_for_target(plateau, volume, salt_factor)
    rate = round_to_step(exact_rate, rate_step)
    horizon = loading_time + 5.0 * model.LN2 / k
    plateau_pred = float(model.plateau_concentration(salt_factor * rate, clearance))
    t_within = -math.log(within) / k

    def finish(label: str, ld: float | None, exact: dict[str, float], note: str | None):
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
                       meets_target=not flags, flags=tuple(flags), exact=exact), note

    regimens, notes = [], []
    ld = round_to_step(exact_ld, loading_step)
    label = ("maintenance + loading bolus" if loading_time <= 0 else
             f"maintenance + loading Css*V over {short(loading_time)} h")
    reg, _ = finish(label, ld, {"rate": exact_rate, "loading_dose": exact_ld}, None)
    regimens.append(reg)
    if loading_time > 0:
        exact_inf = loading_infusion_for_target(plateau, clearance, volume, loading_time,
                                                salt_factor)
        ld2 = round_to_step(exact_inf, loading_step)
        reg2, _ = finish(f"maintenance + loading sized for {short(loading_time)} h infusion",
                         ld2, {"rate": exact_rate, "loading_dose": exact_inf}, None)
        regimens.append(reg2)
        notes.append(
            f"a loading dose of Css*V infused over {short(loading_time)} h ends below the target "
            f"(level {short(regimens[0].predicted['lowest_after_loading'])} mg/L); the second "
            "proposal sizes the loading infusion to reach the target at its end"
        )
    reg3, _ = finish("maintenance only (no loading dose)", None, {"rate": exact_rate}, None)
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
    name: str = "adjustment",
) -> DesignResult:
    """New rate (or dose) from a steady-state level, for linear kinetics.

    ``new = old x Ctarget / Cmeasured`` (Bauer -- from memory).  At steady
    state on a constant rate the level also gives the patient's clearance,
    ``CL = S R0 / Css``.  When the level is above the target and the volume is
    known, the infusion can be held for ``ln(Cmeasured/Ctarget)/k`` before the
    lower rate starts (Bauer -- from memory).

    Parameters
    ----------
    measured, target : float, mg/L
    current_rate : float, optional, mg/h
    current_dose, interval : float, optional, mg and h
        For intermittent regimens (the level is any fixed point of the interval).
    clearance, volume : float, optional, L/h and L
        Population values; the volume is used for the pause.
    """
    if (current_rate is None) == (current_dose is None):
        raise ValueError("give either current_rate or current_dose")
    ratio = target / measured
    estimates: dict[str, float] = {"ratio_target_to_measured": ratio}
    notes, regimens = [], []
    if current_rate is not None:
        exact = current_rate * ratio
        rate = round_to_step(exact, rate_step)
        cl_ind = salt_factor * current_rate / measured
        estimates["clearance"] = cl_ind
        if volume is not None:
            k = cl_ind / volume
            estimates["elimination_rate"] = k
            estimates["half_life"] = model.LN2 / k
            if measured > target:
                estimates["pause_before_new_rate"] = math.log(measured / target) / k
                notes.append(
                    f"to reach the target sooner, the infusion may be held for "
                    f"{short(estimates['pause_before_new_rate'])} h before the new rate starts "
                    "(individual k from the implied clearance and the given volume)"
                )
        predicted = {"plateau": salt_factor * rate / cl_ind, "peak": None, "trough": None,
                     "average": salt_factor * rate / cl_ind}
        regimens.append(Regimen(f"new rate {short(rate)} mg/h", rate=rate, predicted=predicted,
                                meets_target=abs(predicted["plateau"] / target - 1) <= 0.1,
                                exact={"rate": exact}))
    else:
        exact = current_dose * ratio  # type: ignore[operator]
        dose = round_to_step(exact, dose_step)
        level = measured * dose / current_dose  # type: ignore[operator]
        regimens.append(Regimen(f"new dose {short(dose)} mg", dose=dose, interval=interval,
                                predicted={"level": level},
                                meets_target=abs(level / target - 1) <= 0.1,
                                exact={"dose": exact}))
    notes.append("assumes linear kinetics and a level drawn at steady state")
    return DesignResult(name, "proportional", clearance, volume, regimens,
                        target={"plateau": target}, estimates=estimates, notes=notes,
                        salt_factor=salt_factor)


def chiou_clearance(rate, t1, c1, t2, c2, volume):
    """Clearance from two levels during a constant infusion (Chiou et al. 1978).

    ``CL = 2 R0 / (C1 + C2) + 2 V (C1 - C2) / ((C1 + C2)(t2 - t1))``

    It replaces the area between the two levels by a trapezoid, and is biased
    by several per cent when the levels are far apart (Chiou et al., J
    Pharmacokinet Biopharm 1978;6:135 -- from memory).

    Parameters
    ----------
    rate : float, mg/h
        Drug infusion rate between the two draws.
    t1, c1, t2, c2 : float
        Draw times (h, ``t2 > t1``) and levels (mg/L).
    volume : float, L
        Population volume.

    Examples
    --------
    >>> round(chiou_clearance(30.0, 0.0, 10.0, 6.0, 10.0, 35.0), 6)  # at plateau: R0/C
    3.0
    """
    return 2 * rate / (c1 + c2) + 2 * volume * (c1 - c2) / ((c1 + c2) * (t2 - t1))


def exact_two_level_clearance(rate, t1, c1, t2, c2, volume):
    """Clearance that carries ``C1`` at ``t1`` to ``C2`` at ``t2`` under constant infusion.

    Solves ``C2 = C1 exp(-k dt) + (R0/CL)(1 - exp(-k dt))`` with ``k = CL/V``
    for ``CL`` (Brent's method); the right side falls monotonically from
    ``C1 + R0 dt / V`` (CL -> 0) to 0 (CL -> infinity), so the root is unique.

    Raises
    ------
    ValueError
        When ``C2`` is higher than the infusion could produce with this volume.
    """
    dt = t2 - t1

    def f(cl):
        k = cl / volume
        return c1 * math.exp(-k * dt) - rate / cl * math.expm1(-k * dt) - c2

    upper_level = c1 + rate * dt / volume
    if c2 >= upper_level:
        raise ValueError(
            f"the second level {c2:g} mg/L is above what the infusion alone can reach with "
            f"this volume ({upper_level:g} mg/L at zero clearance)"
        )
    lo, hi = 1e-12 * volume / dt, 1.0 * volume / dt
    while f(hi) > 0:
        hi *= 10.0
        if hi > 1e12:
            raise ValueError("no clearance reproduces the two levels")
    return brentq(f, lo, hi, xtol=1e-14, rtol=1e-14, maxiter=500)


def adjust_two_levels(
    rate: float, t1: float, c1: float, t2: float, c2: float, volume: float, target: float,
    *, salt_factor: float = 1.0, rate_step: float | None = DEFAULT_RATE_STEP,
    name: str = "adjustment",
) -> DesignResult:
    """Chiou and exact two-level clearance during a constant infusion, and new rates."""
    drug_rate = salt_factor * rate
    cl_chiou = chiou_clearance(drug_rate, t1, c1, t2, c2, volume)
    cl_exact = exact_two_level_clearance(drug_rate, t1, c1, t2, c2, volume)
    regimens = []
    for label, cl in (("exact one-compartment solution", cl_exact), ("Chiou's method", cl_chiou)):
        exact = rate_for_target(target, cl, salt_factor)
        new = round_to_step(exact, rate_step)
        plateau = salt_factor * new / cl
        regimens.append(Regimen(f"new rate {short(new)} mg/h ({label})", rate=new,
                                predicted={"plateau": plateau, "peak": None, "trough": None,
                                           "average": plateau},
                                meets_target=abs(plateau / target - 1) <= 0.1,
                                exact={"rate": exact, "clearance": cl}))
    diff = cl_chiou / cl_exact - 1
    estimates = {"clearance_exact": cl_exact, "clearance_chiou": cl_chiou,
                 "chiou_minus_exact_percent": 100 * diff,
                 "elimination_rate": cl_exact / volume,
                 "half_life": model.LN2 * volume / cl_exact, "volume": volume}
    notes = ["Chiou's method approximates the area between the levels by a trapezoid; the "
             "exact solution assumes one compartment and the stated volume",
             "both clearances depend on the population volume given"]
    warnings = []
    if abs(diff) > 0.05:
        warnings.append(f"Chiou's clearance differs from the exact solution by {diff:+.1%}: "
                        "the levels are far apart for the trapezoid approximation")
    return DesignResult(name, "chiou", cl_exact, volume, regimens, target={"plateau": target},
                        estimates=estimates, notes=notes, warnings=warnings,
                        salt_factor=salt_factor)


def sawchuk_zaske(
    dose: float,
    infusion_time: float,
    interval: float,
    peak_level: float,
    peak_time: float,
    trough_level: float,
    trough_time: float,
    *,
    pre_dose_level: float | None = None,
    steady_state: bool = True,
    salt_factor: float = 1.0,
) -> dict[str, float]:
    """Individual k, half-life, V and CL from a peak and a trough (Sawchuk & Zaske 1976).

    Times are hours after the start of the sampled dose's infusion; a trough
    drawn before that dose has a negative time.  With ``dt`` the time between
    the draws (for a pre-dose trough at steady state, ``tau + t_trough - t_peak``):

    - ``k = ln(Cpeak/Ctrough) / dt``;
    - ``Cmax = Cpeak exp(k (t_peak - T))`` (back to the end of the infusion);
    - ``Cmin = Cmax exp(-k (tau - T))`` (end of the interval);
    - ``C0`` the level when the dose started (pre-dose level, or at steady
      state the extrapolated trough);
    - ``V = k0 (1 - exp(-kT)) / (k [Cmax - C0 exp(-kT)])``, ``k0 = S dose / T``;
      for a bolus ``V = S dose / (Cmax - C0)``.

    Sawchuk RJ, Zaske DE. J Pharmacokinet Biopharm 1976;4:183 (from memory).

    Returns
    -------
    dict
        ``elimination_rate``, ``half_life``, ``volume``, ``clearance``,
        ``peak_at_end_of_infusion``, ``trough_at_end_of_interval``, ``pre_dose_level``.
    """
    if trough_time < 0:
        dt = interval + trough_time - peak_time
    else:
        dt = trough_time - peak_time
    if dt <= 0:
        raise ValueError("the trough must be drawn after the peak (or before the dose)")
    if peak_time < infusion_time:
        raise ValueError("the peak must be drawn after the end of the infusion")
    k = math.log(peak_level / trough_level) / dt
    cmax = peak_level * math.exp(k * (peak_time - infusion_time))
    cmin = cmax * math.exp(-k * (interval - infusion_time))
    if pre_dose_level is not None:
        c0 = pre_dose_level
    elif trough_time < 0:
        c0 = trough_level * math.exp(k * trough_time)
    elif steady_state:
        c0 = cmin
    else:
        raise ValueError("give the pre-dose level, or state that the levels are at steady state")
    if infusion_time > 0:
        k0 = salt_factor * dose / infusion_time
        volume = k0 * -math.expm1(-k * infusion_time) / (
            k * (cmax - c0 * math.exp(-k * infusion_time)))
    else:
        volume = salt_factor * dose / (cmax - c0)
    if not volume > 0:
        raise ValueError("the levels imply a non-positive volume: check the times and levels")
    return {"elimination_rate": k, "half_life": model.LN2 / k, "volume": volume,
            "clearance": k * volume, "peak_at_end_of_infusion": cmax,
            "trough_at_end_of_interval": cmin, "pre_dose_level": c0}


def adjust_peak_trough(
    dose: float, infusion_time: float, interval: float,
    peak_level: float, peak_time: float, trough_level: float, trough_time: float,
    *, pre_dose_level: float | None = None, steady_state: bool = True,
    new_infusion_time: float | None = None, peak: float | None = None,
    trough: float | None = None, peak_limits: Limits | None = None,
    trough_limits: Limits | None = None, intervals: Sequence[float] = DEFAULT_INTERVALS,
    dose_step: float | None = DEFAULT_DOSE_STEP, salt_factor: float = 1.0,
    max_dose: float | None = None, name: str = "adjustment",
) -> DesignResult:
    """Sawchuk-Zaske individualisation, then a new dose and interval to the targets."""
    est = sawchuk_zaske(dose, infusion_time, interval, peak_level, peak_time, trough_level,
                        trough_time, pre_dose_level=pre_dose_level, steady_state=steady_state,
                        salt_factor=salt_factor)
    t_new = infusion_time if new_infusion_time is None else new_infusion_time
    result = design_intermittent(
        est["clearance"], est["volume"], t_new, peak=peak, trough=trough,
        peak_limits=peak_limits, trough_limits=trough_limits, intervals=intervals,
        dose_step=dose_step, salt_factor=salt_factor, max_dose=max_dose, name=name)
    result.method = "sawchuk_zaske"
    result.estimates = est
    result.notes.insert(0, "individual k from the log-linear decline between the two levels; "
                           "V from the peak at the end of the infusion and the pre-dose level "
                           "(Sawchuk & Zaske 1976)")
    return result


def run_design(case: DesignCase) -> DesignResult:
    """Run a validated design request (see :class:`pkcalc.schema.DesignCase`)."""
    opts = dict(case.options)
    for key in ("peak_limits", "trough_limits"):
        if opts.get(key) is not None:
            opts[key] = Limits(*opts[key])
    if opts.get("window") is not None:
        opts["window"] = Limits(*opts["window"])
    functions = {
        "continuous": design_continuous,
        "intermittent": design_intermittent,
        "proportional": adjust_proportional,
        "chiou": adjust_two_levels,
        "sawchuk_zaske": adjust_peak_trough,
    }
    result = functions[case.method](**opts, name=case.name)
    from .plausibility import parameter_warnings

    if result.clearance and result.volume:
        result.warnings.extend(parameter_warnings(result.clearance, result.volume, case.weight))
    return result
