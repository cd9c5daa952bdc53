"""PC (pharmacokinetic concentrations) -> the levels of the analysed analyte.

SDTMIG v3.3 PC (from memory for section numbers): USUBJID, PCTESTCD/PCTEST (the
analyte), PCSPEC (specimen), PCSTAT (``NOT DONE``), PCDTC (date-time of the
sample, ISO 8601), PCSTRESN/PCSTRESC/PCSTRESU (standard result, its text and
unit), PCLLOQ (limit of quantification, in PCSTRESU), and for nominal times
PCRFTDTC (the reference dose's date-time) with PCELTM (planned elapsed time, an
ISO 8601 duration); PCSEQ, VISIT and PCTPT travel with each level for
traceability.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ...clock import MINUTE, PRECISION_WORDS, parse_clock_array
from ...errors import PkcalcInputError
from ..study import BLQ_TEXT
from .common import Rows, log_units, unit_specs
from .datasets import Dataset, text_matches
from .log import ImportLog
from .terms import SYSTEMIC_SPECIMENS, iso_duration_hours

__all__ = ["PC_VARIABLES", "choose_analyte", "map_levels"]

PC_VARIABLES = {"STUDYID", "USUBJID", "PCSEQ", "PCTESTCD", "PCTEST", "PCSPEC", "PCSTAT", "PCDTC",
                "PCSTRESN", "PCSTRESC", "PCSTRESU", "PCLLOQ", "PCRFTDTC", "PCELTM",
                "PCTPTREF", "PCTPT", "PCTPTNUM", "VISIT", "VISITNUM"}
_REQUIRED = ("USUBJID", "PCTESTCD", "PCSTRESN", "PCSTRESU", "PCDTC")


def choose_analyte(pc: Dataset, analyte: str | None, log: ImportLog) -> str:
    """The analysed PCTESTCD (recorded in the log with its PCTEST name)."""
    missing = [v for v in _REQUIRED if not pc.has(v)]
    if missing:
        raise PkcalcInputError(f"variable(s) {', '.join(missing)} missing", file=pc.name,
                               expected=", ".join(_REQUIRED))
    codes = pc.text("PCTESTCD")
    pairs = pd.DataFrame({"code": codes, "name": pc.text("PCTEST")}).drop_duplicates("code")
    names = dict(zip(pairs["code"], pairs["name"], strict=True))
    analytes = sorted(set(pairs["code"]) - {""})
    shown = ", ".join(f"{a} ({names[a]})" if names.get(a) else a for a in analytes)
    if not analytes:
        raise PkcalcInputError("no analyte: PCTESTCD is empty on every row", file=pc.name,
                               field="PCTESTCD")
    if analyte is None:
        if len(analytes) > 1:
            raise PkcalcInputError(f"PC holds several analytes ({shown})", file=pc.name,
                                   field="PCTESTCD", expected="--analyte PCTESTCD")
        chosen = analytes[0]
    else:
        match = [a for a in analytes if a.upper() == str(analyte).strip().upper()]
        if not match:
            raise PkcalcInputError(f"unknown analyte '{analyte}'", file=pc.name,
                                   field="PCTESTCD", expected=shown or "an analyte in PC")
        chosen = match[0]
    log.analyte = chosen
    log.analyte_name = names.get(chosen, "")
    studies = [s for s in pd.unique(pc.text("STUDYID")) if s]
    log.study_id = studies[0] if studies else ""
    return chosen


def _choose_specimen(pc: Dataset, rows: Rows, of_analyte: np.ndarray, specimen: str | None,
                     log: ImportLog) -> None:
    """Keep the analysed specimen's rows (see the module docstring of ``load``)."""
    if not pc.has("PCSPEC"):
        log.notes.append("PC has no PCSPEC: every row of the analyte is taken as the "
                         "analysed specimen")
        return
    spec = pc.text("PCSPEC").str.upper().to_numpy(object)
    seen = pd.Series(spec[of_analyte]).value_counts()
    stated = [s for s in seen.index if s]
    if specimen is not None:
        chosen = str(specimen).strip().upper()
        if chosen not in stated:
            raise PkcalcInputError(f"unknown specimen '{specimen}'", file=pc.name,
                                   field="PCSPEC", expected=", ".join(stated) or "a PCSPEC "
                                   "value of the analyte's rows")
    else:
        systemic = [s for s in stated if s in SYSTEMIC_SPECIMENS]
        if len(systemic) == 1:
            chosen = systemic[0]
        elif not stated:
            log.notes.append("PCSPEC is empty on every row: every row of the analyte is "
                             "taken as the analysed specimen")
            return
        else:
            listed = ", ".join(f"{s} ({int(seen[s])} rows)" for s in stated)
            why = ("several systemic specimens" if systemic else
                   "no plasma, serum or blood specimen")
            raise PkcalcInputError(f"{why} for the analyte: {listed}", file=pc.name,
                                   field="PCSPEC", expected="--specimen PCSPEC")
    log.specimen = chosen
    for s, n in seen.items():
        log.specimens[s] = {"rows": int(n), "used": s == chosen,
                            **({} if s == chosen else {"why": "left out (another specimen)"
                                                       if s else "left out (not stated)"})}
    rows.drop(spec == "", "specimen not stated (PCSPEC empty)", problem=True)
    rows.drop(spec != chosen, "another specimen (PCSPEC), not analysed")


def map_levels(pc: Dataset, log: ImportLog, *, analyte: str, specimen: str | None,
               times: str, placebo: set[str]) -> pd.DataFrame:
    """The analyte's levels, one row per PC row kept.

    Columns: ``subject``, ``sec``/``offset``/``clock`` (sample date-time), ``conc``,
    ``lloq`` (mg/L; NaN when not given), ``blq``, ``row`` (PC row, 0-based),
    ``source`` (its label), ``pcseq``, ``visit``, ``pctpt``, ``reference_dose``
    (PCRFTDTC as written), ``nominal_sec`` (PCRFTDTC + PCELTM, NaN when not used),
    ``time_basis``.
    """
    subject = pc.text("USUBJID")
    rows = Rows(pc, log, subject)
    of_analyte = (pc.text("PCTESTCD") == analyte).to_numpy()
    rows.drop(~of_analyte, "another analyte (PCTESTCD)")
    _choose_specimen(pc, rows, of_analyte, specimen, log)
    rows.drop(pc.text("PCSTAT").str.upper().to_numpy(object) == "NOT DONE",
              "not done (PCSTAT)")
    rows.drop(subject.isin(placebo).to_numpy(), "placebo subject")
    if subject.eq("").any():
        rows.drop(subject.eq("").to_numpy(), "no subject (USUBJID empty)", problem=True)

    clock_text = pc.text("PCDTC")
    clock = parse_clock_array(clock_text)
    nominal_sec = np.full(len(pc), np.nan)
    nominal_offset = np.zeros(len(pc), bool)
    if times == "nominal":
        nominal_sec, nominal_offset = _nominal(pc, log)
    actual_ok = clock.precision >= MINUTE
    use_actual = np.isnan(nominal_sec)
    rows.drop_each(use_actual & ~actual_ok,
                   lambda i: f"PCDTC is {PRECISION_WORDS[int(clock.precision[i])]}",
                   problem=True)

    value, bad = pc.number("PCSTRESN")
    bad = bad.to_numpy()
    rows.drop_each(bad, lambda i: f"PCSTRESN '{pc.text('PCSTRESN').iloc[i]}' is not a number",
                   problem=True)
    text = pc.text("PCSTRESC")
    value = _number_from_text(pc, value, rows, log)
    blq = text_matches(text, BLQ_TEXT.pattern)
    value = _blq_over_number(pc, value, blq, rows, log)
    rows.drop(value.isna().to_numpy(bool) & ~blq, "no result (PCSTRESN empty, PCSTRESC neither "
              "a number nor a below-LLOQ text)")

    unit = pc.text("PCSTRESU")
    usual = unit[rows.keep & (unit != "").to_numpy()].mode()
    if len(usual):
        fill = blq & (unit == "").to_numpy() & rows.keep
        if fill.any():
            log.notes.append(f"{int(fill.sum())} below-LLOQ PC row(s) without a unit "
                             f"(PCSTRESU) take the analyte's unit {usual.iloc[0]}")
            unit = unit.where(~fill, usual.iloc[0])
    factor, _, problem, seen = unit_specs(unit, "concentration")
    rows.drop_each(problem != "", lambda i: f"PCSTRESU: {problem[i]}", problem=True)
    lloq_value, lloq_bad = pc.number("PCLLOQ")
    rows.drop_each(lloq_bad.to_numpy(bool), lambda i: f"PCLLOQ '{pc.text('PCLLOQ').iloc[i]}' "
                   "is not a number", problem=True)
    from_text = np.full(len(pc), np.nan)
    need = np.flatnonzero(blq & ~np.isfinite(lloq_value.to_numpy(float)))
    if need.size:
        from_text[need] = pd.to_numeric(text.iloc[need].str.extract(
            r"(\d+(?:\.\d+)?)", expand=False), errors="coerce").to_numpy(float)
    lloq = np.where(np.isfinite(lloq_value), lloq_value, np.where(blq, from_text, np.nan))
    keep = rows.keep
    log.pc_rows = rows                        # why a failed subject's rows were left out
    log_units(log, "pc", "PCSTRESU", "concentration", seen, keep)
    log.used["pc"] = int(keep.sum())
    idx = np.flatnonzero(keep)
    basis = np.where(use_actual, "actual", "nominal")[idx]
    if times == "nominal":
        for k, n in zip(*np.unique(basis, return_counts=True), strict=True):
            log.time_basis[str(k)] = int(n)
    def pick(var: str) -> pd.Series:
        return pc.text(var).iloc[idx].reset_index(drop=True)

    return pd.DataFrame({
        "subject": pick("USUBJID"), "sec": clock.seconds[idx],
        "offset": np.where(use_actual, clock.offset, nominal_offset)[idx],
        "clock": pick("PCDTC"),
        "conc": (value.to_numpy(float) * factor)[idx], "lloq": (lloq * factor)[idx],
        "blq": blq[idx], "row": idx, "source": pc.labels_fast(idx),
        "pcseq": pick("PCSEQ"), "visit": pick("VISIT"), "pctpt": pick("PCTPT"),
        "reference_dose": pick("PCRFTDTC"), "nominal_sec": nominal_sec[idx],
        "time_basis": basis})


def _number_from_text(pc: Dataset, value: pd.Series, rows: Rows, log: ImportLog
                      ) -> pd.Series:
    """PCSTRESN with, where it is empty, the plain number PCSTRESC holds: in SDTM PCSTRESN
    is the numeric copy of PCSTRESC, so a package that left the copy out still says the
    result (a note counts such rows and names the first; a below-LLOQ text or other
    words stay what they are)."""
    if not pc.has("PCSTRESC"):
        return value
    empty = np.flatnonzero(value.isna().to_numpy(bool) & rows.keep)
    if not empty.size:
        return value
    text = pc.text("PCSTRESC").iloc[empty]
    from_text = pd.Series(np.nan, index=value.index)
    from_text.iloc[empty] = pd.to_numeric(text.where(text != ""), errors="coerce").to_numpy(
        float)
    from_text[~np.isfinite(from_text)] = np.nan
    copy = from_text.notna().to_numpy(bool)
    if not copy.any():
        return value
    idx = np.flatnonzero(copy)
    log.notes.append(f"{idx.size} PC row(s) with PCSTRESN empty take the number written in "
                     f"PCSTRESC (PCSTRESN is its numeric copy), e.g. "
                     f"{', '.join(pc.labels_fast(idx[:3]))}")
    return value.where(~copy, from_text)


def _blq_over_number(pc: Dataset, value: pd.Series, blq: np.ndarray, rows: Rows,
                     log: ImportLog) -> pd.Series:
    """PCSTRESN emptied where PCSTRESC says the level is below the limit: some packages
    also put a number there (often the LLOQ itself), which read as a measured level would
    turn a censored level into a value at the limit.  A note counts such rows."""
    both = blq & value.notna().to_numpy(bool) & rows.keep
    if not both.any():
        return value
    idx = np.flatnonzero(both)
    raw = pc.text("PCSTRESN")
    shown = ", ".join(f"{label}: PCSTRESC '{pc.text('PCSTRESC').iloc[i]}', PCSTRESN "
                      f"'{raw.iloc[i]}'" for label, i in zip(pc.labels_fast(idx[:3]),
                                                              idx[:3], strict=True))
    log.notes.append(f"{idx.size} PC row(s) whose PCSTRESC says the level is below the limit "
                     f"also carry a number in PCSTRESN: taken as below the limit, as PCSTRESC "
                     f"says ({shown})")
    return value.where(~both)


def _nominal(pc: Dataset, log: ImportLog) -> tuple[np.ndarray, np.ndarray]:
    """PCRFTDTC + PCELTM per row (NaN where either is unusable: the actual time is used)."""
    missing = [v for v in ("PCRFTDTC", "PCELTM") if not pc.has(v)]
    if missing:
        raise PkcalcInputError(f"nominal times need {' and '.join(missing)}", file=pc.name,
                               field=missing[0], expected="--times actual, or PC with "
                               "PCRFTDTC and PCELTM")
    ref = parse_clock_array(pc.text("PCRFTDTC").to_numpy(object))
    elapsed = np.full(len(pc), np.nan)
    for i, x in enumerate(pc.text("PCELTM")):
        if x:
            try:
                elapsed[i] = iso_duration_hours(x)
            except ValueError:
                pass
    out = np.where(ref.precision >= MINUTE, ref.seconds + 3600.0 * elapsed, np.nan)
    log.notes.append("nominal sample times: PCRFTDTC (reference dose) + PCELTM (planned "
                     "elapsed time); rows without both use PCDTC")
    return out, ref.offset
