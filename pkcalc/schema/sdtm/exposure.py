"""EX (exposure) or EC (exposure as collected) -> the administrations of the analysed
treatment.

SDTMIG v3.3 EX/EC (from memory for section numbers): USUBJID, --TRT (treatment),
--DOSE/--DOSU (amount per administration and its unit; ``mg/kg`` needs the body
weight), --ROUTE, --STDTC/--ENDTC (start and end of the exposure, ISO 8601),
--DOSFRQ (frequency: one record may summarise repeated administrations), --DUR
(ISO 8601 duration of one administration), EC's ECMOOD (``SCHEDULED`` records are
plans, not administrations) and ECOCCUR (``N``: not given).

A record with a frequency spans ``floor((end - start) / interval) + 1``
administrations, ``interval`` apart from the start (an end given as a date only
runs to the end of that day); each lasts EXDUR, else the ``--infusion-duration``
given, else nothing for an intravenous bolus -- otherwise the record is refused,
named.  A single administration lasts from EXSTDTC to EXENDTC (or EXDUR).
"""

from __future__ import annotations

import math
from datetime import datetime, timedelta

import numpy as np
import pandas as pd

from ...clock import DATE, EMPTY, HOUR, MINUTE, PRECISION_WORDS, parse_clock_array
from ...errors import PkcalcInputError
from ..study import Failures
from .common import Rows, log_units, unit_specs
from .datasets import Dataset
from .log import ImportLog
from .terms import (
    BOLUS_ROUTES,
    IV_ROUTES,
    PLACEBO,
    SPACING_NOTE,
    analyte_is_treatment,
    frequency_hours,
    iso_duration_hours,
)

__all__ = ["EXPOSURE_VARIABLES", "MAX_ADMINISTRATIONS", "map_doses"]

_COMMON = ("SEQ", "TRT", "DOSE", "DOSU", "ROUTE", "STDTC", "ENDTC", "DOSFRQ", "DUR")
EXPOSURE_VARIABLES = {"USUBJID", "VISIT", "ECMOOD", "ECOCCUR",
                      *(f"EX{v}" for v in _COMMON), *(f"EC{v}" for v in _COMMON)}
#: Most administrations pkcalc expands for one subject (as for a scenario's doses).
MAX_ADMINISTRATIONS = 5000


def _treatment(ds: Dataset, p: str, rows: Rows, treatment: str | None, log: ImportLog
               ) -> tuple[str | None, np.ndarray]:
    """The analysed treatment and the mask of its records (other treatments and placebo
    records are counted, never mixed in).  Without ``treatment``: the only active one,
    else the only one named like the analyte, else a refusal listing them."""
    if not ds.has(f"{p}TRT"):
        if treatment is not None:
            raise PkcalcInputError(f"{p} has no {p}TRT to choose '{treatment}' from",
                                   file=ds.name, field=f"{p}TRT")
        log.notes.append(f"{p} has no {p}TRT: every record is taken as the analysed "
                         "treatment")
        return None, rows.keep.copy()
    trt = ds.text(f"{p}TRT").to_numpy(object)
    seen = pd.Series(trt[rows.keep]).value_counts()
    names = [t for t in seen.index if t]
    active = [t for t in names if not PLACEBO.search(t)]
    if treatment is not None:
        match = [t for t in names if t.upper() == str(treatment).strip().upper()]
        if not match:
            raise PkcalcInputError(f"unknown treatment '{treatment}'", file=ds.name,
                                   field=f"{p}TRT", expected=", ".join(names))
        chosen = match[0]
    elif len(active) == 1:
        chosen = active[0]
    elif len(like := [t for t in active if analyte_is_treatment(t, log.analyte or "",
                                                                 log.analyte_name)]) == 1:
        chosen = like[0]
        log.notes.append(f"{p} holds several treatments ({', '.join(active)}): {chosen} is "
                         f"analysed, named like the analyte {log.analyte}")
    elif not active:
        raise PkcalcInputError(f"no active treatment in {p} (only {', '.join(names) or 'none'})",
                               file=ds.name, field=f"{p}TRT")
    else:
        raise PkcalcInputError(f"{p} holds several treatments ({', '.join(active)})",
                               file=ds.name, field=f"{p}TRT", expected=f"--treatment {p}TRT")
    log.treatment = chosen
    for t, n in seen.items():
        log.treatments[t] = {"rows": int(n), "used": t == chosen, **({} if t == chosen else {
            "why": "left out (placebo)" if PLACEBO.search(t or "") else
            "left out (another treatment)" if t else "left out (not stated)"})}
    return chosen, trt == chosen


def _not_dosed(subject: np.ndarray, mine: np.ndarray, keep: np.ndarray, trt: np.ndarray,
               zero: np.ndarray, arm_placebo: set[str]) -> dict[str, str]:
    """Subjects with records who were not given the analysed treatment: placebo (by
    arm, by their records, or every dose zero) or another treatment only."""
    out: dict[str, str] = {}
    frame = pd.DataFrame({"s": subject, "mine": mine & keep, "dose": mine & keep & ~zero,
                          "placebo": np.array([bool(PLACEBO.search(t or "")) for t in trt])})
    by = frame.groupby("s").agg(mine=("mine", "any"), dose=("dose", "any"),
                                placebo=("placebo", "any"))
    for sid, r in by.iterrows():
        if not sid:
            continue
        if r["mine"] and not r["dose"]:
            out[sid] = "placebo (every dose of the analysed treatment is zero)"
        elif not r["mine"]:
            out[sid] = ("placebo" if r["placebo"] or sid in arm_placebo
                        else "not given the analysed treatment")
    for sid in arm_placebo:
        out.setdefault(sid, "placebo (arm)")
    return out


def map_doses(ds: Dataset, log: ImportLog, fails: Failures, *, treatment: str | None,
              infusion_duration: float | None, arm_placebo: set[str]
              ) -> tuple[pd.DataFrame, dict[str, str], list[str]]:
    """The administrations of the analysed treatment, the subjects not given it (with
    why) and warnings.

    Columns: ``subject``, ``sec``, ``offset``, ``clock`` (start as ISO 8601 text),
    ``amount`` (mg, or mg/kg where ``per_kg``), ``per_kg``, ``duration`` (h), ``row``,
    ``source``, ``seq``, ``treatment``, ``administration``.
    """
    p = ds.domain.upper()
    required = ("USUBJID", f"{p}DOSE", f"{p}DOSU", f"{p}STDTC")
    missing = [v for v in required if not ds.has(v)]
    if missing:
        raise PkcalcInputError(f"variable(s) {', '.join(missing)} missing", file=ds.name,
                               expected=", ".join(required))
    subject = ds.text("USUBJID").to_numpy(object)
    rows = Rows(ds, log, pd.Series(subject))
    if p == "EC":
        rows.drop(ds.text("ECMOOD").str.upper().to_numpy(object) == "SCHEDULED",
                  "scheduled, not an administration (ECMOOD)")
        rows.drop(ds.text("ECOCCUR").str.upper().to_numpy(object) == "N",
                  "not given (ECOCCUR = N)")
    rows.drop(subject == "", "no subject (USUBJID empty)", problem=True)
    _chosen, mine = _treatment(ds, p, rows, treatment, log)
    trt = ds.text(f"{p}TRT").to_numpy(object)
    value, bad_value = ds.number(f"{p}DOSE")
    zero = (value.to_numpy(float) == 0) & ~bad_value.to_numpy()
    not_dosed = _not_dosed(subject, mine, rows.keep, trt, zero, arm_placebo)
    rows.drop(~mine & np.array([bool(PLACEBO.search(t or "")) for t in trt]),
              "placebo treatment")
    rows.drop(~mine, "another treatment")
    rows.drop(np.isin(subject, list(not_dosed)), "subject not given the analysed treatment")
    doses = _administrations(ds, p, rows, log, fails, subject, value, bad_value,
                             infusion_duration)
    warnings = _duplicates(doses, fails, ds)
    log.used[ds.domain] = int(rows.keep.sum())
    return doses, not_dosed, warnings


def _administrations(ds, p, rows: Rows, log, fails: Failures, subject, value, bad_value,
                     infusion_duration):
    """Per record kept: check, expand, and one row per administration."""
    idx = np.flatnonzero(rows.keep)
    start_text = ds.text(f"{p}STDTC").to_numpy(object)
    end_text = ds.text(f"{p}ENDTC").to_numpy(object)
    start = parse_clock_array(start_text)
    end = parse_clock_array(end_text)
    factor, per_kg, unit_problem, seen = unit_specs(ds.text(f"{p}DOSU"), "amount")
    route = ds.text(f"{p}ROUTE").str.upper().to_numpy(object)
    freq = ds.text(f"{p}DOSFRQ").to_numpy(object)
    dur_text = ds.text(f"{p}DUR").to_numpy(object)
    raw_dose = ds.text(f"{p}DOSE").to_numpy(object)
    seq = ds.text(f"{p}SEQ").to_numpy(object)
    trt = ds.text(f"{p}TRT").to_numpy(object)
    out = []
    notes: dict[str, int] = {}
    for i in idx:
        sid, where = subject[i], ds.label(i)

        def fail(message: str, field: str, sid=sid, where=where) -> None:
            fails(sid, f"{message} ({where})", ds.name, field)

        if route[i] and route[i] not in IV_ROUTES:
            fail(f"route '{route[i]}' is not intravenous: only intravenous doses are "
                 "modelled", f"{p}ROUTE")
            continue
        if start.precision[i] < MINUTE:
            fail(f"{p}STDTC '{start_text[i]}' is {PRECISION_WORDS[int(start.precision[i])]}: "
                 "the administration cannot be placed", f"{p}STDTC")
            continue
        if bad_value.iloc[i] or not math.isfinite(value.iloc[i]):
            fail(f"{p}DOSE '{raw_dose[i]}' is not a number (a unit belongs in {p}DOSU)",
                 f"{p}DOSE")
            continue
        if unit_problem[i]:
            fail(f"{p}DOSU: {unit_problem[i]}", f"{p}DOSU")
            continue
        try:
            tau = frequency_hours(freq[i])
            given = iso_duration_hours(dur_text[i]) if dur_text[i] else None
        except ValueError as exc:
            fail(str(exc), f"{p}DUR" if "duration" in str(exc) else f"{p}DOSFRQ")
            continue
        if given is not None and given < 0:
            fail(f"{p}DUR '{dur_text[i]}' is negative", f"{p}DUR")
            continue
        plan = _plan(i, start, end, end_text, tau, given, route[i], infusion_duration, p)
        if isinstance(plan, str):
            fail(plan, f"{p}ENDTC" if "ENDTC" in plan else f"{p}DUR")
            continue
        n, length = plan
        if n > MAX_ADMINISTRATIONS:
            fail(f"{freq[i]} from {start_text[i]} to {end_text[i]} is {n} administrations "
                 f"(at most {MAX_ADMINISTRATIONS:,})", f"{p}DOSFRQ")
            continue
        if n > 1:
            key = freq[i].upper() + (f" ({SPACING_NOTE[freq[i].upper()]})"
                                     if freq[i].upper() in SPACING_NOTE else "")
            notes[key] = notes.get(key, 0) + 1
        for k in range(n):
            out.append((sid, start.seconds[i] + 3600.0 * k * (tau or 0.0), start.offset[i],
                        _shifted(start_text[i], k * (tau or 0.0)), value.iloc[i] * factor[i],
                        bool(per_kg[i]), length, i, where, seq[i], trt[i],
                        f"{k + 1} of {n}" if n > 1 else ""))
    for key, count in notes.items():
        log.notes.append(f"{count} {p} record(s) with {p}DOSFRQ {key} expanded into their "
                         "administrations")
    log_units(log, ds.domain, f"{p}DOSU", "amount", seen, rows.keep)
    columns = ["subject", "sec", "offset", "clock", "amount", "per_kg", "duration", "row",
               "source", "seq", "treatment", "administration"]
    return pd.DataFrame(out, columns=columns)


def _plan(i, start, end, end_text, tau, given, route, infusion_duration, p):
    """(administrations, hours each) of record ``i``, or why it cannot be used."""
    s, e, ep = start.seconds[i], end.seconds[i], int(end.precision[i])
    if ep not in (EMPTY, DATE, HOUR, MINUTE):
        return f"{p}ENDTC '{end_text[i]}' is {PRECISION_WORDS[ep]}"
    if ep >= HOUR and e < s:
        return f"{p}ENDTC '{end_text[i]}' is before {p}STDTC"
    if ep == DATE and e + 86400.0 <= s:
        return f"{p}ENDTC '{end_text[i]}' is before {p}STDTC"
    bolus = route in BOLUS_ROUTES
    if tau is None:
        n = 1
    elif ep == EMPTY:
        return (f"{p}DOSFRQ gives repeated administrations but {p}ENDTC is empty: how many "
                "is unknown")
    else:
        last = e if ep >= HOUR else e + 86400.0 - 1.0
        n = math.floor((last - s) / (3600.0 * tau) + 1e-9) + 1
    if given is not None:
        return n, given
    if n == 1 and ep >= HOUR:
        return 1, (e - s) / 3600.0
    if bolus:
        return n, 0.0
    if infusion_duration is not None:
        return n, infusion_duration
    what = (f"{n} administrations" if n > 1 else "the administration")
    return (f"the length of {what} is unknown ({p}ENDTC "
            f"{'empty' if ep == EMPTY else 'a date only' if ep == DATE else 'spans them'} and "
            f"no {p}DUR): give {p}DUR or --infusion-duration (0 h for injections)")


def _shifted(text: str, hours: float) -> str:
    if hours == 0:
        return text
    t = datetime.fromisoformat(text.strip().replace("Z", "+00:00").replace(" ", "T"))
    return (t + timedelta(hours=hours)).isoformat(timespec="minutes" if t.second == 0
                                                  else "seconds")


def _duplicates(doses: pd.DataFrame, fails: Failures, ds: Dataset) -> list[str]:
    """The same administration twice (same start within a minute, amount and length) is a
    data error: the subject is left out, named.  Two infusions that overlap are possible
    but unusual: a warning names them (a bolus given as an infusion starts is not one)."""
    warnings: list[str] = []
    if doses.empty:
        return warnings
    d = doses.sort_values(["subject", "sec", "duration"], kind="stable")
    sid = d["subject"].to_numpy(object)
    sec, dur = d["sec"].to_numpy(float), d["duration"].to_numpy(float)
    amount = d["amount"].to_numpy(float)
    src = d["source"].to_numpy(object)
    for j in range(1, len(d)):
        if sid[j] != sid[j - 1]:
            continue
        same = (abs(sec[j] - sec[j - 1]) < 60.0 and np.isclose(amount[j], amount[j - 1])
                and np.isclose(dur[j], dur[j - 1]))
        if same:
            fails(sid[j], f"two records give the same administration ({src[j - 1]} and "
                  f"{src[j]}): a duplicated record?", ds.name, f"{ds.domain.upper()}STDTC")
        elif dur[j] > 0 and dur[j - 1] > 0 and sec[j] < sec[j - 1] + 3600.0 * dur[j - 1] - 1.0 \
                and len(warnings) < 20:
            warnings.append(f"subject '{sid[j]}': the infusion of {src[j]} starts before the "
                            f"one of {src[j - 1]} ends: overlapping infusions add up")
    return warnings
