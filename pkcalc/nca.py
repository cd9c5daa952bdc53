"""Non-compartmental analysis: the model-independent cross-check.

Per subject, after a single dose (or the last of regular repeated doses, over
one interval at steady state): peak and its time, last measurable level, area
under the curve (linear up / log down, or linear), area under the first
moment curve, terminal slope by log-linear regression with automatic point
selection, terminal half-life, extrapolated areas, clearance, volumes and mean
residence time corrected for the infusion time.

Methods and sources (``docs/methods.md``):

- linear trapezoid ``(C1 + C2)/2 dt``; log trapezoid when ``C2 < C1``, both
  > 0: ``(C1 - C2) dt / ln(C1/C2)``; log AUMC segment
  ``dt (t1 C1 - t2 C2)/L + dt^2 (C1 - C2)/L^2`` with ``L = ln(C1/C2)``
  (Yeh & Kwan, J Pharmacokinet Biopharm 1978;6:79);
- terminal slope: least squares of ``ln C`` on ``t`` over the last ``n >= 3``
  points after the peak (and after the end of infusion); adjusted
  ``R2 = 1 - (1 - R2)(n - 1)/(n - 2)``; the best adjusted R2, preferring more
  points within :data:`R2_TOLERANCE` of the best (common practice);
- ``AUCinf = AUClast + Clast/lz``; ``AUMCinf = AUMClast + tlast Clast/lz + Clast/lz^2``;
  ``CL = dose/AUCinf``; ``Vz = CL/lz``; ``MRT = AUMCinf/AUCinf - T/2``;
  ``Vss = CL MRT`` (Gibaldi & Perrier, *Pharmacokinetics*, ch. 11; Yamaoka et
  al. 1978 -- from memory).

Times in the result are hours after the start of the reference dose.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ._format import format_table, short
from .core import NCA_AUC_METHODS, NcaOptions, SubjectData

__all__ = [
    "AUC_METHODS",
    "BLQ_RULES",
    "EXTRAPOLATION_LIMIT",
    "R2_TOLERANCE",
    "NcaResult",
    "TerminalPhase",
    "auc_segments",
    "nca_of_subject",
    "nca_subject",
    "terminal_phase",
]

#: Adjusted R2 within this of the best counts as a tie; the tie with more points wins.
R2_TOLERANCE = 1e-4
#: Flag an AUC extrapolated beyond this percentage.
EXTRAPOLATION_LIMIT = 20.0
AUC_METHODS = NCA_AUC_METHODS
BLQ_RULES = {
    "leading_zero": "BLQ before the first measurable level counted as 0, later BLQ left out",
    "zero": "every BLQ level counted as 0",
    "drop": "every BLQ level left out",
}


def auc_segments(t, c, method: str = "linear-up-log-down"):
    """Area and first-moment area of each segment between consecutive samples.

    Parameters
    ----------
    t, c : array_like, shape (n,)
        Times (h, increasing) and levels (mg/L).
    method : {"linear-up-log-down", "linear"}
        The log rule is used for falling segments with both levels > 0
        (Yeh & Kwan 1978); it is exact for a single exponential.

    Returns
    -------
    auc, aumc : ndarray, shape (n - 1,)
        mg h/L and mg h^2/L.

    Examples
    --------
    >>> auc, _ = auc_segments([0.0, 1.0], [2.0, 2.0 * math.exp(-1.0)])
    >>> round(float(auc[0]), 6) == round(2.0 * (1 - math.exp(-1.0)), 6)
    True
    """
    t = np.asarray(t, dtype=float)
    c = np.asarray(c, dtype=float)
    t1, t2, c1, c2 = t[:-1], t[1:], c[:-1], c[1:]
    dt = t2 - t1
    auc = 0.5 * (c1 + c2) * dt
    aumc = 0.5 * (t1 * c1 + t2 * c2) * dt
    if method == "linear":
        return auc, aumc
    log = (c2 < c1) & (c2 > 0) & (c1 > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        L = np.log(c1 / c2)
        auc_log = (c1 - c2) * dt / L
        aumc_log = dt * (t1 * c1 - t2 * c2) / L + dt**2 * (c1 - c2) / L**2
    return np.where(log, auc_log, auc), np.where(log, aumc_log, aumc)


@dataclass(frozen=True)
class TerminalPhase:
    """The chosen terminal log-linear regression.

    Attributes
    ----------
    slope : float, 1/h
        ``lambda_z`` (positive for a falling phase).
    intercept : float
        ``ln C`` at time 0 of the regression.
    r2, adjusted_r2 : float
    times : ndarray
        The sample times used.
    """

    slope: float
    intercept: float
    r2: float
    adjusted_r2: float
    times: np.ndarray


def _regress(t: np.ndarray, y: np.ndarray):
    """Least squares of y on t for several suffix sets at once is done by the caller;
    this is the plain fit with R2."""
    n = t.size
    tm, ym = t.mean(), y.mean()
    sxx = ((t - tm) ** 2).sum()
    sxy = ((t - tm) * (y - ym)).sum()
    syy = ((y - ym) ** 2).sum()
    b = sxy / sxx
    r2 = 1.0 if syy == 0 else (sxy * sxy) / (sxx * syy)
    adj = 1 - (1 - r2) * (n - 1) / (n - 2) if n > 2 else math.nan
    return b, ym - b * tm, r2, adj


def terminal_phase(t, c, *, min_points: int = 3, tolerance: float = R2_TOLERANCE,
                   times=None) -> tuple[TerminalPhase | None, str]:
    """Terminal slope by log-linear regression over the last points.

    Candidates are the last ``n`` points (``n >= min_points``) of ``t, c``
    (which the caller restricts to samples after the peak and after the end of
    the infusion, with ``c > 0``).  The set with the highest adjusted R2 wins;
    sets within ``tolerance`` of it count as ties and the one with more points
    is taken.  With ``times`` given, exactly those samples are used (manual
    selection, at least 2).

    Returns
    -------
    phase : TerminalPhase or None
    note : str
        Why no slope could be estimated, or how the points were chosen.
    """
    t = np.asarray(t, dtype=float)
    c = np.asarray(c, dtype=float)
    if times is not None:
        chosen = np.isin(np.round(t, 9), np.round(np.asarray(times, float), 9))
        if chosen.sum() < 2:
            return None, "fewer than 2 of the chosen terminal points are usable samples"
        tt, yy = t[chosen], np.log(c[chosen])
        b, a, r2, adj = _regress(tt, yy)
        if not b < 0:
            return None, "the chosen terminal points do not fall: no terminal slope"
        return TerminalPhase(-b, a, r2, adj, tt), "terminal points chosen by the user"
    if t.size < min_points:
        return None, (f"only {t.size} usable level(s) after the peak: at least {min_points} "
                      "are needed for a terminal slope")
    y = np.log(c)
    best = None
    fits = []
    for n in range(min_points, t.size + 1):
        b, a, r2, adj = _regress(t[-n:], y[-n:])
        fits.append((n, b, a, r2, adj))
    falling = [f for f in fits if f[1] < 0]
    if not falling:
        return None, "the terminal phase is rising or flat: no terminal slope"
    top = max(f[4] for f in falling)
    ties = [f for f in falling if f[4] >= top - tolerance]
    best = max(ties, key=lambda f: f[0])
    n, b, a, r2, adj = best
    return TerminalPhase(-b, a, r2, adj, t[-n:]), (
        f"terminal points chosen automatically: last {n} of {t.size} after the peak "
        f"(adjusted R2 {adj:.4f}; ties within {tolerance:g} resolved to more points)")


@dataclass(frozen=True)
class NcaResult:
    """Non-compartmental results of one subject (canonical units; None = not computed,
    with the reason in ``notes``)."""

    subject: str
    mode: str
    dose: float
    infusion_time: float
    interval: float | None
    reference_time: float
    peak_concentration: float | None = None
    peak_time: float | None = None
    last_concentration: float | None = None
    last_time: float | None = None
    auc_to_last: float | None = None
    aumc_to_last: float | None = None
    auc_to_infinity: float | None = None
    aumc_to_infinity: float | None = None
    auc_extrapolated_percent: float | None = None
    terminal_slope: float | None = None
    terminal_half_life: float | None = None
    adjusted_r2: float | None = None
    points_used: tuple[float, ...] = ()
    clearance: float | None = None
    mean_residence_time: float | None = None
    volume_terminal: float | None = None
    volume_steady_state: float | None = None
    auc_interval: float | None = None
    average_concentration: float | None = None
    fluctuation_percent: float | None = None
    accumulation_ratio: float | None = None
    notes: tuple[str, ...] = ()
    time: np.ndarray = field(default_factory=lambda: np.empty(0))
    conc: np.ndarray = field(default_factory=lambda: np.empty(0))
    terminal_intercept: float | None = None

    FIELDS = ("peak_concentration", "peak_time", "last_concentration", "last_time",
              "auc_to_last", "aumc_to_last", "auc_to_infinity", "aumc_to_infinity",
              "auc_extrapolated_percent", "terminal_slope", "terminal_half_life",
              "adjusted_r2", "clearance", "mean_residence_time", "volume_terminal",
              "volume_steady_state", "auc_interval", "average_concentration",
              "fluctuation_percent", "accumulation_ratio")
    clock_origin: str | None = None

    def to_dict(self) -> dict[str, object]:
        """Plain values (canonical units)."""
        out: dict[str, object] = {"subject": self.subject, "mode": self.mode, "dose": self.dose,
                                  "infusion_time": self.infusion_time,
                                  "interval": self.interval}
        out.update({k: getattr(self, k) for k in self.FIELDS})
        out["points_used"] = [float(x) for x in self.points_used]
        out["notes"] = list(self.notes)
        return out

    def _repr_html_(self) -> str:
        """Notebook view: the caution, the table and the summary."""
        from ._format import result_html

        return result_html(self.summary(), None)

    def summary(self) -> str:
        """Plain-text table (canonical units)."""
        rows = [[k.replace("_", " "), getattr(self, k)] for k in self.FIELDS
                if getattr(self, k) is not None]
        text = [f"Subject {self.subject} ({self.mode}; dose {short(self.dose)} mg)",
                format_table(["quantity", "value"], rows)]
        text += [f"note: {n}" for n in self.notes]
        return "\n".join(text)


def _apply_blq(t, c, blq, rule: str):
    """Levels after the BLQ rule; returns times, levels and a note."""
    if not blq.any():
        return t, c, None
    measurable = ~blq
    first = np.argmax(measurable) if measurable.any() else t.size
    if rule == "zero":
        keep = np.ones_like(blq)
        c = np.where(blq, 0.0, c)
    elif rule == "drop":
        keep = ~blq
    else:  # leading_zero
        leading = blq & (np.arange(t.size) < first)
        c = np.where(leading, 0.0, c)
        keep = ~blq | leading
    note = f"{int(blq.sum())} BLQ level(s): {BLQ_RULES[rule]}"
    return t[keep], c[keep], note


def _regular_interval(starts: np.ndarray) -> float | None:
    if starts.size < 2:
        return None
    gaps = np.diff(starts)
    tau = gaps[-1]
    return float(tau) if tau > 0 and np.allclose(gaps, tau, rtol=1e-6) else None


def nca_subject(subject: str, time, conc, blq, dose_start, dose_amount, dose_duration, *,
                auc_method: str = "linear-up-log-down", blq_rule: str = "leading_zero",
                terminal_times=None, r2_tolerance: float = R2_TOLERANCE,
                extrapolation_limit: float = EXTRAPOLATION_LIMIT) -> NcaResult:
    """Non-compartmental analysis of one subject.

    The reference dose is the single dose, or the last of regular repeated
    doses (steady state over one interval ``tau``), or for irregular repeated
    doses the first dose with the total amount (total exposure; MRT and Vss
    are then not computed).

    Parameters
    ----------
    subject : str
    time, conc : array_like, h and mg/L
        Sample times (study clock) and levels (NaN allowed where BLQ).
    blq : array_like of bool
    dose_start, dose_amount, dose_duration : array_like, h, mg, h
    auc_method : {"linear-up-log-down", "linear"}
    blq_rule : {"leading_zero", "zero", "drop"}
    terminal_times : sequence of float, optional, h (study clock)
        Manual choice of the terminal points.
    r2_tolerance : float
    extrapolation_limit : float, percent

    Returns
    -------
    NcaResult
    """
    starts = np.asarray(dose_start, float)
    amounts = np.asarray(dose_amount, float)
    durations = np.asarray(dose_duration, float)
    notes: list[str] = []
    time, conc, blq = _sorted_levels(time, conc, blq, notes)
    mode, ref, dose, t_inf, tau = _reference_dose(starts, amounts, durations, notes)
    base = NcaResult(subject, mode, float(dose), float(t_inf), tau, float(ref))
    t, c, b = _interval_samples(time, conc, blq, starts, durations, mode, ref, tau, notes)
    t, c, blq_note = _apply_blq(t, c, b, blq_rule)
    if blq_note:
        notes.append(blq_note)
    if t.size == 0 or not np.any(c > 0):
        notes.append("no measurable level after the dose: nothing to analyse")
        return _with(base, notes=tuple(notes))
    t, c, inserted = _level_at_dose(t, c, t_inf, mode, notes)
    observed = np.arange(1 if inserted else 0, t.size)
    i_peak = int(observed[np.nanargmax(c[observed])])
    peak_c, peak_t = float(c[i_peak]), float(t[i_peak])
    i_last = int(np.flatnonzero(c > 0)[-1])
    window = _terminal_window(t, c, i_peak, i_last, t_inf, ref, starts, durations, mode, notes)
    manual = None if terminal_times is None else np.asarray(terminal_times, float) - ref
    phase, phase_note = terminal_phase(t[window], c[window], tolerance=r2_tolerance,
                                       times=manual)
    notes.append(phase_note)
    lz = phase.slope if phase else None
    last_c, last_t = float(c[i_last]), float(t[i_last])
    t, c = _fill_pre_dose(t, c, mode, lz, last_c, last_t, tau, notes)
    upto = t <= last_t + 1e-12
    seg_auc, seg_aumc = auc_segments(t[upto], c[upto], auc_method)
    out = dict(peak_concentration=peak_c, peak_time=peak_t,
               last_concentration=last_c, last_time=last_t,
               auc_to_last=float(seg_auc.sum()), aumc_to_last=float(seg_aumc.sum()),
               points_used=tuple(float(x + ref) for x in (phase.times if phase else [])),
               time=t + ref, conc=c)
    if phase is not None:
        out.update(terminal_slope=lz, terminal_half_life=math.log(2) / lz,
                   adjusted_r2=phase.adjusted_r2, terminal_intercept=phase.intercept)
    if mode == "steady state":
        _steady_state_parameters(out, dose, tau, lz, starts, notes)
    else:
        _single_or_total_parameters(out, dose, t_inf, lz, mode, extrapolation_limit, notes)
    return _with(base, notes=tuple(notes), **out)


def _sorted_levels(time, conc, blq, notes: list[str]):
    time = np.asarray(time, float)
    conc = np.asarray(conc, float)
    blq = np.asarray(blq, bool)
    order = np.argsort(time, kind="stable")
    if np.any(np.diff(order) < 0):
        notes.append("levels were not in time order; sorted")
    return time[order], conc[order], blq[order]


def _reference_dose(starts, amounts, durations, notes: list[str]):
    """The dose the analysis refers to: single, last of regular doses, or total exposure."""
    tau = _regular_interval(starts)
    if starts.size == 1:
        return "single dose", starts[0], amounts[0], durations[0], tau
    if tau is not None and np.isclose(amounts[-1], amounts[-2]) and \
            np.isclose(durations[-1], durations[-2]):
        notes.append(f"last of {starts.size} regular doses every {short(tau)} h: analysed over "
                     "one interval, assuming steady state")
        return "steady state", starts[-1], amounts[-1], durations[-1], tau
    dose = float(amounts.sum())
    notes.append("irregular repeated doses: areas from the first dose with the total amount "
                 f"({short(dose)} mg); MRT and Vss not computed")
    return "total exposure", starts[0], dose, float(durations[0]), None


def _interval_samples(time, conc, blq, starts, durations, mode, ref, tau, notes: list[str]):
    """Levels from the reference dose on (one interval at steady state), times relative
    to it; at steady state a trough drawn shortly before the dose (after the previous
    infusion ended, within the last quarter of the interval) is the level at the start
    of the interval -- common practice for pre-dose samples."""
    sel = time >= ref - 1e-9
    if mode == "steady state":
        sel &= time <= ref + tau + 1e-9
        prev_end = starts[-2] + durations[-2]
        before = np.flatnonzero((time < ref - 1e-9) & (time >= max(prev_end, ref - tau / 4))
                                & ~np.isnan(conc) & ~blq)
        if before.size and not np.any(np.abs(time - ref) <= 1e-9):
            j = int(before[-1])
            sel[j] = True
            notes.append(f"pre-dose level drawn {short(ref - time[j])} h before the dose taken "
                         f"as the level at the start of the interval ({short(conc[j])} mg/L)")
            time = time.copy()
            time[j] = ref
    return time[sel] - ref, conc[sel], blq[sel]


def _level_at_dose(t, c, t_inf, mode, notes: list[str]):
    """Add the level at the reference time when not sampled: 0 for an infusion, the
    log-linear back-extrapolation for a bolus, NaN at steady state (filled later)."""
    if t[0] <= 0:
        return t, c, False
    if t_inf <= 0:
        pos = np.flatnonzero(c > 0)[:2]
        if pos.size == 2 and c[pos[1]] < c[pos[0]]:
            k0 = math.log(c[pos[0]] / c[pos[1]]) / (t[pos[1]] - t[pos[0]])
            c0 = c[pos[0]] * math.exp(k0 * t[pos[0]])
            notes.append(f"level at the bolus back-extrapolated log-linearly from the first "
                         f"two levels: {short(c0)} mg/L")
        else:
            c0 = c[pos[0]]
            notes.append("level at the bolus taken as the first level (no falling pair to "
                         "back-extrapolate)")
    elif mode == "steady state":
        c0 = math.nan
    else:
        c0 = 0.0
    return np.concatenate([[0.0], t]), np.concatenate([[c0], c]), True


def _terminal_window(t, c, i_peak, i_last, t_inf, ref, starts, durations, mode,
                     notes: list[str]) -> np.ndarray:
    """Candidate terminal points: after the peak and the reference infusion, measurable,
    never while any infusion runs (and for total exposure after the last dose ended)."""
    idx = np.arange(t.size)
    window = (idx > i_peak) & (t >= t_inf - 1e-9) & (c > 0) & (idx <= i_last)
    t_abs = t + ref
    running = ((durations[None, :] > 0) & (starts[None, :] < t_abs[:, None] - 1e-9)
               & (t_abs[:, None] < starts[None, :] + durations[None, :] - 1e-9)).any(axis=1)
    if mode == "total exposure":
        running |= t_abs < float((starts + durations).max()) - 1e-9
    if np.any(window & running):
        notes.append(f"{int((window & running).sum())} level(s) drawn while an infusion was "
                     "running (or before the last dose ended) left out of the terminal phase")
    if np.any((idx > i_peak) & (c <= 0) & (idx < i_last)):
        notes.append("zero levels inside the declining phase are left out of the terminal fit")
    return window & ~running


def _fill_pre_dose(t, c, mode, lz, last_c, last_t, tau, notes: list[str]):
    """At steady state without a pre-dose level: the level at the end of the interval."""
    if not (mode == "steady state" and np.isnan(c[0])):
        return t, c
    if lz is not None:
        c = c.copy()
        c[0] = last_c * math.exp(-lz * (tau - last_t))
        notes.append(f"pre-dose level not sampled: taken as the level at the end of the "
                     f"interval, {short(c[0])} mg/L (steady state, terminal slope)")
        return t, c
    notes.append("pre-dose level not sampled and no terminal slope: area starts at the "
                 "first level")
    return t[1:], c[1:]


def _steady_state_parameters(out, dose, tau, lz, starts, notes: list[str]) -> None:
    """AUC over the interval, CL, average level, fluctuation, accumulation."""
    last_c, last_t = out["last_concentration"], out["last_time"]
    if lz is not None and (starts.size - 1) * tau < 5 * math.log(2) / lz:
        notes.append(f"{short((starts.size - 1) * tau)} h of regular dosing before the last dose "
                     f"is less than five terminal half-lives ({short(5 * math.log(2) / lz)} h): "
                     "steady state may not be reached")
    auc_tau = out["auc_to_last"]
    if last_t < tau - 1e-9:
        if lz is not None:
            tail = np.array([last_t, tau])
            tail_c = np.array([last_c, last_c * math.exp(-lz * (tau - last_t))])
            auc_tau += float(auc_segments(tail, tail_c, "linear-up-log-down")[0].sum())
            notes.append(f"interval area extrapolated from {short(last_t)} h to "
                         f"{short(tau)} h with the terminal slope")
        else:
            auc_tau = None
            notes.append("the samples do not cover the interval and there is no terminal "
                         "slope: no interval area")
    if auc_tau is not None:
        cl = dose / auc_tau
        cavg = auc_tau / tau
        cmin = float(np.nanmin(out["conc"]))
        out.update(auc_interval=auc_tau, clearance=cl, average_concentration=cavg,
                   fluctuation_percent=100 * (out["peak_concentration"] - cmin) / cavg)
        if lz is not None:
            out.update(volume_terminal=cl / lz, accumulation_ratio=1 / -math.expm1(-lz * tau))
    notes.append("MRT and Vss are not computed at steady state")


def _single_or_total_parameters(out, dose, t_inf, lz, mode, extrapolation_limit,
                                notes: list[str]) -> None:
    """AUC and AUMC to infinity, CL, Vz, and for a single dose MRT and Vss."""
    if lz is None:
        notes.append("no terminal slope: AUC to infinity, clearance, volumes and MRT are not "
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
    cl = dose / auc_inf
    out.update(clearance=cl, volume_terminal=cl / lz)
    if mode == "single dose":
        mrt = aumc_inf / auc_inf - t_inf / 2
        out.update(mean_residence_time=mrt, volume_steady_state=cl * mrt)


def nca_of_subject(subject: SubjectData, options: NcaOptions | None = None) -> NcaResult:
    """Non-compartmental analysis of one subject's data with the given options.

    Examples
    --------
    >>> import numpy as np
    >>> from pkcalc.core import SubjectData
    >>> t = np.array([0.5, 1, 2, 4, 8, 12.0])
    >>> s = SubjectData("A", t, 10 * np.exp(-0.2 * t), np.full(6, np.nan), np.zeros(6, bool),
    ...                 np.arange(6), np.array([0.0]), np.array([500.0]), np.array([0.0]))
    >>> round(float(nca_of_subject(s).terminal_slope), 6)
    0.2
    """
    o = options or NcaOptions()
    result = nca_subject(subject.subject, subject.time, subject.conc, subject.blq,
                       subject.dose_start, subject.dose_amount, subject.dose_duration,
                       auc_method=o.auc_method, blq_rule=o.blq_rule,
                       terminal_times=o.terminal_points.get(subject.subject),
                       r2_tolerance=o.r2_tolerance, extrapolation_limit=o.extrapolation_limit)
    return _with(result, clock_origin=subject.clock_origin) if subject.clock_origin else result


def _with(base: NcaResult, **changes) -> NcaResult:
    from dataclasses import replace

    return replace(base, **changes)
