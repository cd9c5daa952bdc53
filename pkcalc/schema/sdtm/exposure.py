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
    seen = pd.Series(trt[rows.keep], dtype=object).value_counts()
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


def _placebo(trt) -> np.ndarray:
    """Where a treatment's name says placebo (vectorised)."""
    return pd.Series(trt, dtype="string[pyarrow]").str.contains(
        PLACEBO.pattern, case=False, regex=True).fillna(False).to_numpy(bool)


def _not_dosed(subject: np.ndarray, mine: np.ndarray, keep: np.ndarray, trt: np.ndarray,
               zero: np.ndarray, arm_placebo: set[str]) -> dict[str, str]:
    """Subjects with records who were not given the analysed treatment: placebo (by
    arm, by their records, or every dose zero) or another treatment only."""
    out: dict[str, str] = {}
    frame = pd.DataFrame({"s": subject, "mine": mine & keep, "dose": mine & keep & ~zero,
                          "placebo": _placebo(trt)})
    by = frame.groupby("s").agg(mine=("mine", "any"), dose=("dose", "any"),
                                placebo=("placebo", "any"))
    by = by[by.index != ""]
    for sid in by.index[by["mine"] & ~by["dose"]]:
        out[sid] = "placebo (every dose of the analysed treatment is zero)"
    for sid, placebo in by.loc[~by["mine"], "placebo"].items():
        out[sid] = ("placebo" if placebo or sid in arm_placebo
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
    zero = (value.to_numpy(float) == 0) & ~bad_value.to_numpy(bool)
    not_dosed = _not_dosed(subject, mine, rows.keep, trt, zero, arm_placebo)
    rows.drop(~mine & _placebo(trt), "placebo treatment")
    rows.drop(~mine, "another treatment")
    rows.drop(np.isin(subject, list(not_dosed)), "subject not given the analysed treatment")
    doses = _administrations(ds, p, rows, log, fails, subject, value, bad_value,
                             infusion_duration)
    warnings = _duplicates(doses, fails, ds)
    log.used[ds.domain] = int(rows.keep.sum())
    return doses, not_dosed, warnings


def _per_distinct(texts: np.ndarray, parse) -> tuple[np.ndarray, np.ndarray]:
    """``parse`` of each distinct text once: (values, problems) per row (NaN for None)."""
    codes, uniq = pd.factorize(texts)
    values = np.full(len(uniq), np.nan)
    problems = np.full(len(uniq), "", dtype=object)
    for j, u in enumerate(uniq):
        try:
            v = parse(u)
        except ValueError as exc:
            problems[j] = str(exc)
            continue
        values[j] = np.nan if v is None else v
    return values[codes], problems[codes]


def _administrations(ds, p, rows: Rows, log, fails: Failures, subject, value, bad_value,
                     infusion_duration):
    """Every record kept is checked (a failing record leaves its subject out, named) and
    expanded into its administrations, one row each (vectorised over the records).

    A record with a frequency spans ``floor((end - start) / interval) + 1``
    administrations (an end given as a date only runs to the end of that day); each
    lasts EXDUR, else (one administration with a precise end) end - start, else nothing
    for an intravenous bolus, else ``infusion_duration`` -- otherwise the record is
    refused, named.
    """
    n_rows = len(ds)
    start_text = ds.text(f"{p}STDTC")
    end_text = ds.text(f"{p}ENDTC")
    start, end = parse_clock_array(start_text), parse_clock_array(end_text)
    factor, per_kg, unit_problem, seen = unit_specs(ds.text(f"{p}DOSU"), "amount")
    route = ds.text(f"{p}ROUTE").str.upper().to_numpy(object)
    freq = ds.text(f"{p}DOSFRQ").to_numpy(object)
    dur_text = ds.text(f"{p}DUR").to_numpy(object)
    value = value.to_numpy(float)
    bad_value = bad_value.to_numpy(bool)
    tau, tau_problem = _per_distinct(freq, frequency_hours)
    given, dur_problem = _per_distinct(dur_text, lambda x: iso_duration_hours(x) if x else None)
    s, e, ep = start.seconds, end.seconds, end.precision
    problem = np.full(n_rows, "", dtype=object)
    field = np.full(n_rows, "", dtype=object)
    st_text, en_text = start_text.to_numpy(object), end_text.to_numpy(object)

    def flag(mask, message, where_field) -> None:
        for i in np.flatnonzero(mask & rows.keep & (problem == "")):
            problem[i], field[i] = message(i), where_field

    flag((route != "") & ~np.isin(route, IV_ROUTES), lambda i: f"route '{route[i]}' is not "
         "intravenous: only intravenous doses are modelled", f"{p}ROUTE")
    flag(start.precision < MINUTE, lambda i: f"{p}STDTC '{st_text[i]}' is "
         f"{PRECISION_WORDS[int(start.precision[i])]}: the administration cannot be placed",
         f"{p}STDTC")
    raw_dose = ds.text(f"{p}DOSE")
    flag(bad_value | ~np.isfinite(value), lambda i: f"{p}DOSE is empty: the amount given is "
         "unknown" if raw_dose.iloc[i] == "" else f"{p}DOSE '{raw_dose.iloc[i]}' is not a "
         f"number (a unit belongs in {p}DOSU)", f"{p}DOSE")
    flag(unit_problem != "", lambda i: f"{p}DOSU: {unit_problem[i]}", f"{p}DOSU")
    flag(tau_problem != "", lambda i: tau_problem[i], f"{p}DOSFRQ")
    flag(dur_problem != "", lambda i: dur_problem[i], f"{p}DUR")
    flag(given < 0, lambda i: f"{p}DUR '{dur_text[i]}' is negative", f"{p}DUR")
    flag(~np.isin(ep, (EMPTY, DATE, HOUR, MINUTE)),
         lambda i: f"{p}ENDTC '{en_text[i]}' is {PRECISION_WORDS[int(ep[i])]}", f"{p}ENDTC")
    flag(((ep >= HOUR) & (e < s)) | ((ep == DATE) & (e + 86400.0 <= s)),
         lambda i: f"{p}ENDTC '{en_text[i]}' is before {p}STDTC", f"{p}ENDTC")
    repeated = np.isfinite(tau)
    flag(repeated & (ep == EMPTY), lambda i: f"{p}DOSFRQ gives repeated administrations but "
         f"{p}ENDTC is empty: how many is unknown", f"{p}ENDTC")
    with np.errstate(invalid="ignore"):
        last = np.where(ep >= HOUR, e, e + 86400.0 - 1.0)
        n = np.where(repeated & (problem == ""),
                     np.floor((last - s) / (3600.0 * np.where(repeated, tau, 1.0)) + 1e-9) + 1,
                     1.0)
    n = np.nan_to_num(n, nan=1.0).clip(1, None).astype(np.int64)
    length = np.where(np.isfinite(given), given, np.nan)
    length = np.where(np.isnan(length) & (n == 1) & (ep >= HOUR), (e - s) / 3600.0, length)
    length = np.where(np.isnan(length) & np.isin(route, BOLUS_ROUTES), 0.0, length)
    if infusion_duration is not None:
        length = np.where(np.isnan(length), infusion_duration, length)

    def unknown(i: int) -> str:
        what = f"{n[i]} administrations" if n[i] > 1 else "the administration"
        how = "empty" if ep[i] == EMPTY else "a date only" if ep[i] == DATE else "spans them"
        return (f"the length of {what} is unknown ({p}ENDTC {how} and no {p}DUR): give "
                f"{p}DUR or --infusion-duration (0 h for injections)")

    flag(np.isnan(length), unknown, f"{p}DUR")
    flag(n > MAX_ADMINISTRATIONS, lambda i: f"{freq[i]} from {st_text[i]} to {en_text[i]} is "
         f"{n[i]} administrations (at most {MAX_ADMINISTRATIONS:,})", f"{p}DOSFRQ")
    bad = np.flatnonzero(rows.keep & (problem != ""))
    for i, where in zip(bad, ds.labels(bad), strict=True):
        fails(subject[i], f"{problem[i]} ({where})", ds.name, field[i])
    good = np.flatnonzero(rows.keep & (problem == ""))
    counts = n[good]
    many = freq[good][counts > 1]
    for term in pd.unique(many):
        key = term.upper() + (f" ({SPACING_NOTE[term.upper()]})" if term.upper() in
                              SPACING_NOTE else "")
        log.notes.append(f"{int(np.sum(many == term))} {p} record(s) with {p}DOSFRQ {key} "
                         "expanded into their administrations")
    log_units(log, ds.domain, f"{p}DOSU", "amount", seen, rows.keep)
    rec = np.repeat(good, counts)
    k = np.arange(rec.size) - np.repeat(np.cumsum(counts) - counts, counts)
    step = np.where(np.isfinite(tau), tau, 0.0)[rec]
    clock = st_text[rec].copy()
    for j in np.flatnonzero(k > 0):
        clock[j] = _shifted(clock[j], float(k[j] * step[j]))
    of_n = n[rec]
    administration = np.full(rec.size, "", dtype=object)
    for j in np.flatnonzero(of_n > 1):
        administration[j] = f"{k[j] + 1} of {of_n[j]}"
    return pd.DataFrame({
        "subject": subject[rec], "sec": s[rec] + 3600.0 * k * step, "offset": start.offset[rec],
        "clock": clock, "amount": (value * factor)[rec], "per_kg": per_kg[rec].astype(bool),
        "duration": length[rec], "row": rec, "source": ds.labels(rec).to_numpy(object),
        "seq": ds.text(f"{p}SEQ").to_numpy(object)[rec],
        "treatment": ds.text(f"{p}TRT").to_numpy(object)[rec],
        "administration": administration})


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
    same_subject = sid[1:] == sid[:-1]
    same = same_subject & (np.abs(sec[1:] - sec[:-1]) < 60.0) & np.isclose(
        amount[1:], amount[:-1]) & np.isclose(dur[1:], dur[:-1])
    for j in np.flatnonzero(same) + 1:
        fails(sid[j], f"two records give the same administration ({src[j - 1]} and "
              f"{src[j]}): a duplicated record?", ds.name, f"{ds.domain.upper()}STDTC")
    overlap = same_subject & ~same & (dur[1:] > 0) & (dur[:-1] > 0) & (
        sec[1:] < sec[:-1] + 3600.0 * dur[:-1] - 1.0)
    for j in (np.flatnonzero(overlap) + 1)[:20]:
        warnings.append(f"subject '{sid[j]}': the infusion of {src[j]} starts before the "
                        f"one of {src[j - 1]} ends: overlapping infusions add up")
    return warnings
