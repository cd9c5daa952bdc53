"""CDISC SDTM study data: PC and EX (and optionally VS, DM) -> a study.

Mapping (CDISC SDTM Implementation Guide v3.3+: PC "Pharmacokinetics
Concentrations", EX "Exposure", VS "Vital Signs", DM "Demographics"):

- PC: one level per row of the chosen analyte (``PCTESTCD``); subject
  ``USUBJID``; date-time ``PCDTC`` (ISO 8601); result ``PCSTRESN`` in
  ``PCSTRESU`` (converted per row with pint: mixed units are fine); a level below
  the limit of quantification when ``PCSTRESN`` is empty and ``PCSTRESC`` reads
  like ``<LLOQ``, ``BLQ`` or ``< 0.5``, with its limit from ``PCLLOQ`` (or the
  number in the text); rows with ``PCSTAT = "NOT DONE"`` are skipped and counted.
- EX: one dose per row; ``EXDOSE`` in ``EXDOSU``; start ``EXSTDTC``; the
  infusion lasts ``EXENDTC - EXSTDTC`` (an instantaneous dose when they are equal
  or ``EXENDTC`` is empty); only intravenous routes (``EXROUTE``) are modelled -- a
  subject with another route is left out, named.
- VS: body weight from ``VSTESTCD = "WEIGHT"`` (``VSSTRESN``, ``VSSTRESU``), the
  last value on or before the subject's first dose.
- DM: the subjects of the study (those without levels are listed).

Datasets are ``pc``, ``ex``, ``vs``, ``dm`` in a folder, each ``.xpt`` (SAS
transport, read with pandas' SAS reader) or ``.csv``.  Times become hours since
each subject's first dose (see :mod:`pkcalc.clock`).  Every row read, used and
skipped (with the reason, counts and the first subjects) is in the import report.
"""

from __future__ import annotations

import re
from collections import defaultdict
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..core import Study
from ..errors import PkcalcInputError, Problem
from ..units import parse_number_and_unit, parse_unit
from .study import Columns, Failures, study_from_tables

__all__ = ["IV_ROUTES", "ImportLog", "export_tables", "load_sdtm", "read_dataset"]

#: Intravenous routes of the SDTM route terminology (C66729) that pkcalc models.
IV_ROUTES = ("INTRAVENOUS", "INTRAVENOUS BOLUS", "INTRAVENOUS DRIP", "INTRAVENOUS INFUSION")
_BLQ_TEXT = re.compile(r"^\s*(<|BLQ|BQL|LLOQ|NQ|BELOW|NOT QUANTIFIABLE)", re.IGNORECASE)
_REQUIRED = {"pc": ("USUBJID", "PCTESTCD", "PCSTRESN", "PCSTRESU", "PCDTC"),
             "ex": ("USUBJID", "EXDOSE", "EXDOSU", "EXSTDTC"),
             "vs": ("USUBJID", "VSTESTCD", "VSSTRESN", "VSSTRESU"),
             "dm": ("USUBJID",)}


class ImportLog:
    """What was read from which dataset, used, and skipped and why."""

    def __init__(self, folder: str) -> None:
        self.folder = folder
        self.datasets: dict[str, str] = {}
        self.read: dict[str, int] = {}
        self.used: dict[str, int] = defaultdict(int)
        self.skipped: dict[str, dict[str, list[str]]] = defaultdict(lambda: defaultdict(list))
        self.analyte: str | None = None
        self.notes: list[str] = []

    def skip(self, domain: str, reason: str, subject: str) -> None:
        self.skipped[domain][reason].append(subject)

    def as_dict(self) -> dict[str, Any]:
        return {"folder": self.folder, "datasets": dict(self.datasets), "analyte": self.analyte,
                "rows_read": dict(self.read), "rows_used": dict(self.used),
                "rows_skipped": {d: {r: {"count": len(s), "first_subjects": sorted(set(s))[:5]}
                                     for r, s in reasons.items()}
                                 for d, reasons in self.skipped.items()},
                "notes": list(self.notes)}

    def lines(self) -> list[str]:
        out = [f"Imported from SDTM ({self.folder}): " + ", ".join(
            f"{d.upper()} {Path(f).name}" for d, f in self.datasets.items())
               + (f"; analyte {self.analyte}" if self.analyte else "")]
        for d in self.datasets:
            out.append(f"  {d.upper()}: {self.read.get(d, 0)} rows read, "
                       f"{self.used.get(d, 0)} used")
            for reason, subjects in self.skipped.get(d, {}).items():
                first = ", ".join(sorted(set(subjects))[:3])
                out.append(f"    skipped {len(subjects)}: {reason} (e.g. {first})")
        out += [f"  note: {n}" for n in self.notes]
        return out


def read_dataset(path: Path) -> pd.DataFrame:
    """One SDTM dataset as text columns with upper-case names (``.xpt`` or ``.csv``)."""
    if path.suffix.lower() == ".xpt":
        try:
            frame = pd.read_sas(path, format="xport", encoding="utf-8")
        except Exception as exc:  # the reader raises many kinds for a damaged file
            raise PkcalcInputError(f"is not a readable SAS transport file "
                                   f"({exc.__class__.__name__})", file=str(path)) from None
    else:
        from ..tables import read_csv

        frame = read_csv(path, dtype=str, keep_default_na=False)
    frame.columns = [str(c).strip().upper() for c in frame.columns]
    for c in frame.columns:
        frame[c] = frame[c].map(lambda x: "" if x is None or (isinstance(x, float) and
                                                             np.isnan(x)) else
                                (f"{x:.17g}" if isinstance(x, float) else str(x).strip()))
    return frame


def _find(folder: Path, domain: str) -> Path | None:
    for p in sorted(folder.iterdir()):
        if p.stem.lower() == domain and p.suffix.lower() in (".xpt", ".csv"):
            return p
    return None


def load_sdtm(folder: str | Path, analyte: str | None = None) -> Study:
    """A study from the SDTM datasets in ``folder`` (see the module docstring).

    Raises
    ------
    PkcalcInputError
        When PC or EX is missing or unusable, a required variable is absent, or
        the analyte is unknown or not chosen among several.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise PkcalcInputError("is not a folder", file=str(folder),
                               expected="a folder holding pc and ex (.xpt or .csv)")
    log = ImportLog(str(folder))
    data: dict[str, pd.DataFrame] = {}
    problems: list[Problem] = []
    for domain in ("pc", "ex", "vs", "dm"):
        path = _find(folder, domain)
        if path is None:
            if domain in ("pc", "ex"):
                problems.append(Problem(f"no {domain.upper()} dataset", file=str(folder),
                                        expected=f"{domain}.xpt or {domain}.csv"))
            continue
        frame = read_dataset(path)
        missing = [v for v in _REQUIRED[domain] if v not in frame.columns]
        if missing:
            problems.append(Problem(f"variable(s) {', '.join(missing)} missing",
                                    file=str(path), expected=", ".join(_REQUIRED[domain])))
            continue
        data[domain], log.datasets[domain], log.read[domain] = frame, str(path), len(frame)
    if problems:
        raise PkcalcInputError(problems)
    fails = Failures()
    levels = _levels(data["pc"], analyte, log, fails)
    weights = _weights(data.get("vs"), _first_doses(data["ex"]), log)
    doses = _doses(data["ex"], weights, log, fails)
    subjects = pd.DataFrame({"subject": list(weights),
                             "weight [kg]": [f"{w:.17g}" for w in weights.values()]})
    if "dm" in data:
        log.used["dm"] = len(set(data["dm"]["USUBJID"]) & set(levels["subject"]))
        without = sorted(set(data["dm"]["USUBJID"]) - set(levels["subject"]))
        if without:
            log.notes.append(f"{len(without)} subject(s) in DM have no levels: "
                             f"{', '.join(without[:5])}")
    for sid in sorted(set(levels["subject"]) - set(doses["subject"])):
        fails(sid, "has PC levels but no exposure records (EX)", log.datasets["ex"], "USUBJID")
    study = study_from_tables(
        Columns(levels, log.datasets["pc"]), Columns(doses, log.datasets["ex"]),
        Columns(subjects, log.datasets.get("vs", "VS")) if len(subjects) else None, fails)
    study.import_report = log.as_dict()
    study.import_lines = log.lines()
    study.tables = {"levels": levels, "doses": doses, "subjects": subjects}
    return study


def _levels(pc: pd.DataFrame, analyte: str | None, log: ImportLog, fails: Failures):
    """PC rows of the analyte as a levels table (concentration in mg/L, clock times)."""
    file = log.datasets["pc"]
    analytes = sorted(set(pc["PCTESTCD"]) - {""})
    if analyte is None and len(analytes) > 1:
        raise PkcalcInputError(f"PC holds several analytes ({', '.join(analytes)})",
                               file=file, field="PCTESTCD", expected="--analyte PCTESTCD")
    if analyte is not None and analyte not in analytes:
        raise PkcalcInputError(f"unknown analyte '{analyte}'", file=file, field="PCTESTCD",
                               expected=", ".join(analytes) or "an analyte present in PC")
    log.analyte = analyte or (analytes[0] if analytes else None)
    rows = []
    for _, r in pc.iterrows():
        sid = r["USUBJID"]
        if log.analyte is not None and r["PCTESTCD"] != log.analyte:
            log.skip("pc", "another analyte (PCTESTCD)", sid)
            continue
        if r.get("PCSTAT", "").upper() == "NOT DONE":
            log.skip("pc", "not done (PCSTAT)", sid)
            continue
        if r["PCDTC"] == "":
            fails(sid, "a PC row has no date-time (PCDTC)", file, "PCDTC")
            log.skip("pc", "no date-time (PCDTC)", sid)
            continue
        level = _result(r, sid, file, fails)
        if level is None:
            log.skip("pc", "no usable result (PCSTRESN / PCSTRESC)", sid)
            continue
        rows.append({"subject": sid, "time [clock]": r["PCDTC"], **level})
        log.used["pc"] += 1
    return pd.DataFrame(rows, columns=["subject", "time [clock]", "concentration [mg/L]",
                                       "lloq [mg/L]", "blq"]).astype(str)


def _factor(unit: str, kind: str, sid: str, file: str, field: str, fails: Failures):
    try:
        spec = parse_unit(unit, kind, field=field)
    except PkcalcInputError as exc:
        fails(sid, exc.problems[0].message, file, field)
        return None
    return spec


def _result(r, sid: str, file: str, fails: Failures) -> dict[str, str] | None:
    """Concentration (or BLQ with its limit) of one PC row in mg/L."""
    unit = r["PCSTRESU"]
    text = r.get("PCSTRESC", "")
    blq = r["PCSTRESN"] == "" and bool(_BLQ_TEXT.match(text))
    if r["PCSTRESN"] == "" and not blq:
        return None
    spec = _factor(unit, "concentration", sid, file, "PCSTRESU", fails)
    if spec is None:
        return None
    lloq = ""
    if r.get("PCLLOQ", "") != "":
        lloq = f"{float(r['PCLLOQ']) * spec.factor:.17g}"
    elif blq:
        number = re.search(r"\d+(\.\d+)?", text)
        lloq = f"{float(number.group()) * spec.factor:.17g}" if number else ""
    value = "" if blq else f"{float(r['PCSTRESN']) * spec.factor:.17g}"
    return {"concentration [mg/L]": value, "lloq [mg/L]": lloq, "blq": "true" if blq else
            "false"}


def _first_doses(ex: pd.DataFrame) -> dict[str, Any]:
    """Each subject's earliest EXSTDTC (unparsable ones ignored here, reported later)."""
    from ..clock import parse_clock

    first: dict[str, Any] = {}
    for sid, text in zip(ex["USUBJID"], ex["EXSTDTC"], strict=True):
        try:
            t = parse_clock(text)
            if sid not in first or t < first[sid]:
                first[sid] = t
        except (PkcalcInputError, TypeError):
            continue
    return first


def _doses(ex: pd.DataFrame, weights: dict[str, float], log: ImportLog, fails: Failures):
    """EX rows as a doses table (amount in mg, duration in h, clock starts)."""
    from ..clock import hours_since, parse_clock

    file = log.datasets["ex"]
    rows = []
    for _, r in ex.iterrows():
        sid = r["USUBJID"]
        route = r.get("EXROUTE", "").upper()
        if route and route not in IV_ROUTES:
            fails(sid, f"route '{r['EXROUTE']}' is not intravenous: only intravenous doses "
                       "are modelled", file, "EXROUTE")
            log.skip("ex", "not intravenous (EXROUTE)", sid)
            continue
        try:
            start = parse_clock(r["EXSTDTC"], field="EXSTDTC")
            end = parse_clock(r["EXENDTC"], field="EXENDTC") if r.get("EXENDTC", "") else None
        except PkcalcInputError as exc:
            fails(sid, exc.problems[0].message, file, exc.problems[0].field)
            log.skip("ex", "unusable date-time (EXSTDTC / EXENDTC)", sid)
            continue
        duration = 0.0 if end is None else hours_since(end, start)
        if duration < 0:
            fails(sid, f"EXENDTC {r['EXENDTC']} is before EXSTDTC {r['EXSTDTC']}", file,
                  "EXENDTC")
            log.skip("ex", "end before start (EXENDTC)", sid)
            continue
        try:
            value, _ = parse_number_and_unit(r["EXDOSE"], field="EXDOSE")
        except PkcalcInputError:
            fails(sid, f"EXDOSE '{r['EXDOSE']}' is not a number", file, "EXDOSE")
            continue
        spec = _factor(r["EXDOSU"], "amount", sid, file, "EXDOSU", fails)
        if spec is None:
            log.skip("ex", "unit not readable (EXDOSU)", sid)
            continue
        amount = value * spec.factor
        if spec.per_kg:
            if sid not in weights:
                fails(sid, f"a dose in {r['EXDOSU']} needs the body weight (VS WEIGHT on or "
                           "before the first dose)", file, "EXDOSU")
                log.skip("ex", "per-kg dose without a weight", sid)
                continue
            amount *= weights[sid]
        rows.append({"subject": sid, "start [clock]": r["EXSTDTC"],
                     "amount [mg]": f"{amount:.17g}", "duration [h]": f"{duration:.17g}"})
        log.used["ex"] += 1
    frame = pd.DataFrame(rows)
    if frame.empty:
        frame = pd.DataFrame(columns=["subject", "start [clock]", "amount [mg]",
                                      "duration [h]"])
    return frame.fillna("").astype(str)


def _weights(vs: pd.DataFrame | None, first: dict[str, Any], log: ImportLog
             ) -> dict[str, float]:
    """Body weight (kg) per subject: the last VS WEIGHT on or before the first dose."""
    from ..clock import parse_clock

    if vs is None:
        return {}
    best: dict[str, tuple[float, float]] = {}
    for _, r in vs.iterrows():
        sid = r["USUBJID"]
        if r["VSTESTCD"].upper() != "WEIGHT" or r["VSSTRESN"] == "":
            continue
        try:
            kg = float(r["VSSTRESN"]) * parse_unit(r["VSSTRESU"], "weight").factor
            when = parse_clock(r["VSDTC"]) if r.get("VSDTC", "") else None
            late = when is not None and sid in first and when > first[sid]
        except (PkcalcInputError, ValueError, TypeError):
            log.skip("vs", "unusable weight (VSSTRESN / VSSTRESU / VSDTC)", sid)
            continue
        if late:
            log.skip("vs", "weight after the first dose", sid)
            continue
        key = (when - first[sid]).total_seconds() if when is not None and sid in first \
            else -np.inf
        if sid not in best or key >= best[sid][0]:
            best[sid] = (key, kg)
        log.used["vs"] += 1
    return {sid: kg for sid, (_, kg) in best.items()}


def export_tables(study: Study) -> dict[str, pd.DataFrame]:
    """The analysis-ready tables of a study read from SDTM, with hours since each
    subject's first dose beside the clock times (rerun them with ``--levels`` etc.)."""
    from ..clock import hours_since, parse_clock

    origins = {s.subject: parse_clock(s.clock_origin) for s in study.subjects
               if s.clock_origin}
    out = {}
    for name, column, rel in (("levels", "time [clock]", "time [h]"),
                              ("doses", "start [clock]", "start [h]")):
        frame = study.tables[name].copy()
        frame.insert(2, rel, [f"{hours_since(parse_clock(c), origins[sid]):.17g}"
                              if sid in origins else "" for sid, c in
                              zip(frame["subject"], frame[column], strict=True)])
        out[name] = frame
    if len(study.tables.get("subjects", [])):
        out["subjects"] = study.tables["subjects"]
    return out
