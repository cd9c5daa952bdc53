"""Non-compartmental analysis of one subject: every dosing interval, and the summary
the rest of pkcalc compares with (the fit, the population).

The summary says which analysis applies and what it assumed:

- **single dose**: the single-dose values (AUC to infinity, CL = dose/AUCinf, Vz,
  MRT and Vss corrected for the infusion time);
- **steady state**: regular repeated doses (:mod:`pkcalc.nca.regimen`) whose last
  interval has an area: CL = dose/AUCtau, Cavg, fluctuation, the accumulation
  ratio AUCtau(last)/AUCtau(first) (or 1/(1 - exp(-lambda_z tau)) when the first
  interval has no area), Vz = CL/lambda_z;
- **total exposure**: irregular doses sampled through every interval: the area
  from the first dose to infinity with the total amount (MRT and Vss not computed);
- **first dose**: otherwise, the single-dose values of the first dose when its
  levels allow them;
- **not computed**: none of the above, with the reasons.

Methods and sources: :mod:`pkcalc.nca.areas`, :mod:`pkcalc.nca.intervals`
(docs/methods.md).  Times in the summary are hours after its reference dose.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np

from .._format import format_table, short, with_caution
from ..core import NcaOptions, SubjectData
from .intervals import MIN_LEVELS, IntervalResult, Levels, _Window, interval_result
from .regimen import DURATION_TOLERANCE, INTERVAL_TOLERANCE, dosing_regimen

__all__ = ["BLQ_RULES", "EXTRAPOLATION_LIMIT", "NcaResult", "nca_of_subject", "nca_subject"]

#: Flag an AUC extrapolated beyond this percentage.
EXTRAPOLATION_LIMIT = 20.0
BLQ_RULES = {
    "leading_zero": "BLQ before the first measurable level counted as 0, later BLQ left out",
    "zero": "every BLQ level counted as 0",
    "drop": "every BLQ level left out",
}


@dataclass(frozen=True)
class NcaResult:
    """Non-compartmental results of one subject (canonical units; None = not computed,
    with the reason in ``notes``).

    Attributes
    ----------
    mode : str
        ``single dose``, ``steady state``, ``total exposure``, ``first dose`` or
        ``not computed`` (the module docstring says when).
    interval_number : int or None
        The dose the summary refers to (its start is ``reference_time``).
    regimen : str
        The regularity judgement in words.
    assumptions : tuple of str
        What the summary relies on (said again when a fit disagrees with it).
    intervals : tuple of IntervalResult
        Every dosing interval, analysed on the actual times.
    """

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
    min_concentration: float | None = None
    trough_concentration: float | None = None
    notes: tuple[str, ...] = ()
    time: np.ndarray = field(default_factory=lambda: np.empty(0))
    conc: np.ndarray = field(default_factory=lambda: np.empty(0))
    terminal_intercept: float | None = None
    interval_number: int | None = None
    steady_state: bool | None = None
    regimen: str = ""
    assumptions: tuple[str, ...] = ()
    intervals: tuple[IntervalResult, ...] = ()
    clock_origin: str | None = None

    FIELDS = ("peak_concentration", "peak_time", "last_concentration", "last_time",
              "auc_to_last", "aumc_to_last", "auc_to_infinity", "aumc_to_infinity",
              "auc_extrapolated_percent", "terminal_slope", "terminal_half_life",
              "adjusted_r2", "clearance", "mean_residence_time", "volume_terminal",
              "volume_steady_state", "auc_interval", "average_concentration",
              "fluctuation_percent", "accumulation_ratio", "min_concentration",
              "trough_concentration")

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
        from .._format import result_html

        return result_html(self.summary(caution=False), None)

    def summary(self, caution: bool = True) -> str:
        """Plain-text table (canonical units)."""
        rows = [[k.replace("_", " "), getattr(self, k)] for k in self.FIELDS
                if getattr(self, k) is not None]
        text = [f"Subject {self.subject} ({self.mode}; dose {short(self.dose)} mg)",
                format_table(["quantity", "value"], rows)]
        text += [f"note: {n}" for n in self.notes]
        return with_caution("\n".join(text), caution)


def _sorted(time, conc, blq, rows, reference, notes: list[str]) -> Levels:
    time = np.asarray(time, float)
    order = np.argsort(time, kind="stable")
    if np.any(np.diff(order) < 0):
        notes.append("levels were not in time order; sorted")
    rows = np.arange(time.size) if rows is None else np.asarray(rows, int)
    reference = (np.full(time.size, np.nan) if reference is None
                 else np.asarray(reference, float))
    return Levels(time[order], np.asarray(conc, float)[order], np.asarray(blq, bool)[order],
                  rows[order], reference[order])


def nca_subject(subject: str, time, conc, blq, dose_start, dose_amount, dose_duration, *,
                auc_method: str = "linear_up_log_down", blq_rule: str = "leading_zero",
                terminal_times=None, r2_tolerance: float = 1e-4,
                extrapolation_limit: float = EXTRAPOLATION_LIMIT,
                interval_tolerance: tuple[float, float] = INTERVAL_TOLERANCE,
                duration_tolerance: tuple[float, float] = DURATION_TOLERANCE,
                reference=None, rows=None) -> NcaResult:
    """Non-compartmental analysis of one subject (see the module docstring).

    Parameters
    ----------
    subject : str
    time, conc : array_like, h and mg/L
        Sample times (study clock) and levels (NaN allowed where BLQ).
    blq : array_like of bool
    dose_start, dose_amount, dose_duration : array_like, h, mg, h
    auc_method : {"linear_up_log_down", "linear"}
    blq_rule : {"leading_zero", "zero", "drop"}
    terminal_times : sequence of float, optional, h (study clock)
        Manual choice of the terminal points (used in the interval holding them).
    r2_tolerance : float
    extrapolation_limit : float, percent
    interval_tolerance, duration_tolerance : (fraction, hours)
        Regularity of the doses (:func:`pkcalc.nca.regimen.dosing_regimen`).
    reference : array_like, optional, h
        The start of the dose each level refers to (NaN: by its time).
    rows : array_like of int, optional
        Each level's row in its table (kept with each interval for traceability).

    Returns
    -------
    NcaResult
    """
    notes: list[str] = []
    order = np.argsort(np.asarray(dose_start, float), kind="stable")
    all_starts = np.asarray(dose_start, float)[order]
    all_durations = np.asarray(dose_duration, float)[order]
    starts, amounts, durations = _administrations(all_starts,
                                                  np.asarray(dose_amount, float)[order],
                                                  all_durations, notes)
    lv = _sorted(time, conc, blq, rows, reference, notes)
    regimen = dosing_regimen(starts, amounts, durations, interval_tolerance=interval_tolerance,
                             duration_tolerance=duration_tolerance)
    options = dict(auc_method=auc_method, blq_rule=blq_rule, r2_tolerance=r2_tolerance,
                   extrapolation_limit=extrapolation_limit)
    manual = None if terminal_times is None else np.asarray(terminal_times, float)
    n = starts.size
    rows_out = []
    for i in range(n):
        kind = ("single dose" if n == 1 else "first dose" if i == 0 else
                "last dose" if i == n - 1 else "between doses")
        end = float(starts[i + 1]) if i + 1 < n else None
        length = end - starts[i] if end is not None else regimen.interval
        w = _Window(i + 1, kind, float(starts[i]), end, length, float(amounts[i]),
                    float(durations[i]), (all_starts, all_durations),
                    float(starts[i] - starts[0]) if regimen.regular and i > 0 else None, manual)
        before = next((r.terminal_slope for r in reversed(rows_out) if r.terminal_slope),
                      None)
        rows_out.append(interval_result(subject, lv, w, starts, durations, lz_before=before,
                                        **options))
    rows_out = _accumulation(rows_out, regimen)
    return _summary(subject, lv, rows_out, regimen, starts, amounts, durations, options,
                    manual, notes, (all_starts, all_durations))


def _administrations(starts, amounts, durations, notes: list[str]):
    """Doses that start together (within a minute: a loading bolus given as an infusion
    starts) are one administration for the intervals: their amounts add, the longest
    infusion time counts."""
    from .intervals import SAME_TIME

    if starts.size < 2 or np.all(np.diff(starts) >= SAME_TIME):
        return starts, amounts, durations
    group = np.concatenate([[0], np.cumsum(np.diff(starts) >= SAME_TIME)])
    n = int(group[-1]) + 1
    out_s = np.array([starts[group == g][0] for g in range(n)])
    out_a = np.array([amounts[group == g].sum() for g in range(n)])
    out_d = np.array([durations[group == g].max() for g in range(n)])
    notes.append(f"{starts.size - n} dose(s) start together with another (a loading dose with "
                 "an infusion): one interval each, amounts added")
    return out_s, out_a, out_d


def _accumulation(rows: list[IntervalResult], regimen) -> list[IntervalResult]:
    """The accumulation ratio on the last interval: AUCtau(last)/AUCtau(first), or from the
    terminal slope when the first interval has no area."""
    if len(rows) < 2 or not regimen.regular:
        return rows
    first, last = rows[0], rows[-1]
    if last.auc_interval is None:
        return rows
    if first.auc_interval:
        ratio, how = last.auc_interval / first.auc_interval, "AUCtau of the last over the first"
    elif last.terminal_slope and regimen.interval:
        ratio = 1 / -math.expm1(-last.terminal_slope * regimen.interval)
        how = "1/(1 - exp(-lambda_z tau)): the first interval has no area"
    else:
        return rows
    rows[-1] = replace(last, accumulation_ratio=ratio,
                       notes=(*last.notes, f"accumulation ratio {short(ratio)} ({how})"))
    return rows


def _summary(subject, lv: Levels, rows: list[IntervalResult], regimen, starts, amounts,
             durations, options, manual, notes: list[str], lv_doses) -> NcaResult:
    n = starts.size
    first, last = rows[0], rows[-1]
    chosen, mode = None, "not computed"
    if n == 1 and first.reason is None:
        chosen, mode = first, "single dose"
    elif regimen.regular and last.auc_interval is not None:
        chosen, mode = last, "steady state"
    elif all(r.reason is None for r in rows):
        total = _Window(1, "total exposure", float(starts[0]), None, None,
                        float(amounts.sum()), float(durations[0]), lv_doses, None, manual)
        plain = replace(lv, reference=np.full(lv.time.size, np.nan))
        chosen = interval_result(subject, plain, total, starts, durations, **options)
        mode = "total exposure"
        notes.append(f"irregular repeated doses sampled through every interval: areas from "
                     f"the first dose with the total amount ({short(amounts.sum())} mg); MRT "
                     "and Vss not computed")
    elif first.auc_to_infinity is not None:
        chosen, mode = first, "first dose"
        notes.append("the last interval gives no steady-state area (irregular doses or too "
                     "few levels): the summary is the first dose's single-dose analysis")
    assumptions = [f"doses: {regimen.description}"]
    if chosen is None:
        reasons = sorted({r.reason for r in rows if r.reason})
        notes += [x for r in rows for x in r.notes if x not in notes]
        notes += reasons or ["no interval gives an area"]
        base = NcaResult(subject, mode, float(amounts[-1]), float(durations[-1]),
                         regimen.interval, float(starts[-1]))
        return replace(base, notes=tuple(notes), regimen=regimen.description,
                       assumptions=tuple(assumptions), intervals=tuple(rows),
                       time=lv.time, conc=lv.conc)
    if mode == "steady state":
        assumptions.append(f"steady state over the last of {n} doses" + (
            "" if chosen.steady_state else " (not reached: see the notes)"))
    assumptions += [x for x in chosen.notes if x.startswith(("level at", "pre-dose", "AUC "
                                                             "extrapolated", "single-dose"))]
    if mode == "steady state" and n > 1:
        notes.append(f"last of {n} regular doses every {short(regimen.interval)} h: analysed "
                     "over one interval (areas on the actual times)")
    fields = {k: getattr(chosen, k) for k in NcaResult.FIELDS if hasattr(chosen, k)}
    if mode != "steady state":
        fields.pop("accumulation_ratio", None)
    if mode == "steady state" and not chosen.steady_state:
        fields["clearance"] = chosen.clearance        # None unless near steady state
    base = NcaResult(subject, mode, float(chosen.dose), float(chosen.infusion_time),
                     chosen.length if mode == "steady state" else None, float(chosen.start))
    skipped = [r for r in rows if r.reason]
    if skipped:
        notes.append(f"{len(skipped)} of {n} interval(s) without their own exposure (too few "
                     f"levels: at least {MIN_LEVELS} after the dose): "
                     + ", ".join(f"dose {r.number}" for r in skipped[:6]))
    return replace(base, notes=tuple(notes + list(chosen.notes)), **fields,
                   points_used=chosen.points_used, terminal_intercept=chosen.terminal_intercept,
                   interval_number=chosen.number if mode != "total exposure" else None,
                   steady_state=chosen.steady_state if mode == "steady state" else None,
                   regimen=regimen.description, assumptions=tuple(assumptions),
                   intervals=tuple(rows), time=chosen.time, conc=chosen.conc)


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
                         r2_tolerance=o.r2_tolerance, extrapolation_limit=o.extrapolation_limit,
                         interval_tolerance=o.interval_tolerance,
                         duration_tolerance=o.duration_tolerance,
                         reference=subject.reference_time, rows=subject.rows)
    return replace(result, clock_origin=subject.clock_origin) if subject.clock_origin else result
