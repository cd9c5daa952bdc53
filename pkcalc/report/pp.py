"""Non-compartmental results as a CDISC SDTM PP (pharmacokinetic parameters) dataset,
with its relationship to the PC rows used (RELREC).

Variables, in SDTMIG v3.3 order (from memory for the section; each checked in
tests/test_pp.py): STUDYID, DOMAIN (``PP``), USUBJID, PPSEQ, PPGRPID (one profile:
subject and dose number), PPTESTCD/PPTEST (the parameter), PPCAT (the analyte),
PPORRES/PPORRESU (result as computed, text), PPSTRESC/PPSTRESN/PPSTRESU (standard
result), PPSTAT/PPREASND (``NOT DONE`` and why), PPSPEC (specimen), PPRFTDTC (the
reference dose's date-time), PPSTINT/PPENINT (the interval, ISO 8601 durations from
the reference dose).

Parameter codes follow the CDISC controlled terminology for PK parameters (codelist
PKPARMCD; from memory, medium confidence: CMAX, TMAX, CMIN, CTROUGH, CAVG, CLST,
TLST, AUCLST, AUCIFO, AUCPEO, AUCTAU, LAMZ, LAMZHL, LAMZNPT, R2ADJ, CLO, VZO, VSSO,
MRTIFO, FLUCP, ARAUC).  Where the terminology has no term pkcalc knows of, the code
is pkcalc's own, starting ``PKC`` and listed in :data:`OWN_TERMS` (clearance at
steady state as dose/AUCTAU).

RELREC (from memory): records that share a RELID are related; each profile has one
RELID for its exposure parameters with every PC row of the interval, and one for
the terminal-slope parameters with the PC rows of the terminal phase
(``IDVAR = PPSEQ`` / ``PCSEQ``).  Studies read from tables rather than SDTM have no
PCSEQ: their relationship is pkcalc's own table ``pp-sources.csv`` (the table row).
"""

from __future__ import annotations

import json
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

from ..units import CANONICAL

__all__ = ["OWN_TERMS", "PK_TERMS", "PP_VARIABLES", "pp_datasets", "write_pp"]

#: IntervalResult field -> (PPTESTCD, PPTEST, unit); unit None: no unit.
PK_TERMS: dict[str, tuple[str, str, str | None]] = {
    "peak_concentration": ("CMAX", "Max Conc", "mg/L"),
    "peak_time": ("TMAX", "Time of CMAX", "h"),
    "min_concentration": ("CMIN", "Min Conc", "mg/L"),
    "trough_concentration": ("CTROUGH", "Trough Concentration", "mg/L"),
    "average_concentration": ("CAVG", "Average Concentration", "mg/L"),
    "last_concentration": ("CLST", "Last Nonzero Conc", "mg/L"),
    "last_time": ("TLST", "Time of Last Nonzero Conc", "h"),
    "auc_to_last": ("AUCLST", "AUC to Last Nonzero Conc", "h*mg/L"),
    "auc_to_infinity": ("AUCIFO", "AUC Infinity Obs", "h*mg/L"),
    "auc_extrapolated_percent": ("AUCPEO", "AUC %Extrapolation Obs", "%"),
    "auc_interval": ("AUCTAU", "AUC Over Dosing Interval", "h*mg/L"),
    "terminal_slope": ("LAMZ", "Lambda z", "/h"),
    "terminal_half_life": ("LAMZHL", "Half-Life Lambda z", "h"),
    "points": ("LAMZNPT", "Number of Points for Lambda z", None),
    "adjusted_r2": ("R2ADJ", "R Squared Adjusted", None),
    "clearance": ("CLO", "Total CL Obs", "L/h"),
    "volume_terminal": ("VZO", "Vz Obs", "L"),
    "volume_steady_state": ("VSSO", "Vol Dist Steady State Obs", "L"),
    "mean_residence_time": ("MRTIFO", "MRT Infinity Obs", "h"),
    "fluctuation_percent": ("FLUCP", "Fluctuation%", "%"),
    "accumulation_ratio": ("ARAUC", "Accumulation Ratio AUC", None),
}
#: pkcalc's own terms (not in the terminology as far as pkcalc knows), with their meaning.
OWN_TERMS: dict[str, tuple[str, str, str | None]] = {
    "clearance_steady_state": ("PKCCLSS", "Clearance at Steady State, Dose/AUCTAU", "L/h"),
}
_TERMINAL = ("terminal_slope", "terminal_half_life", "points", "adjusted_r2")
PP_VARIABLES: tuple[tuple[str, str, str], ...] = (
    ("STUDYID", "Study Identifier", "string"), ("DOMAIN", "Domain Abbreviation", "string"),
    ("USUBJID", "Unique Subject Identifier", "string"), ("PPSEQ", "Sequence Number", "integer"),
    ("PPGRPID", "Group ID", "string"), ("PPTESTCD", "Parameter Short Name", "string"),
    ("PPTEST", "Parameter Name", "string"), ("PPCAT", "Parameter Category", "string"),
    ("PPORRES", "Result or Finding in Original Units", "string"),
    ("PPORRESU", "Original Units", "string"),
    ("PPSTRESC", "Character Result/Finding in Std Format", "string"),
    ("PPSTRESN", "Numeric Result/Finding in Standard Units", "double"),
    ("PPSTRESU", "Standard Units", "string"), ("PPSTAT", "Completion Status", "string"),
    ("PPREASND", "Reason Parameter Not Calculated", "string"),
    ("PPSPEC", "Specimen Material Type", "string"),
    ("PPRFTDTC", "Date/Time of Reference Point", "string"),
    ("PPSTINT", "Planned Start of Assessment Interval", "string"),
    ("PPENINT", "Planned End of Assessment Interval", "string"),
)
RELREC_VARIABLES: tuple[tuple[str, str, str], ...] = (
    ("STUDYID", "Study Identifier", "string"), ("RDOMAIN", "Related Domain Abbreviation",
                                                "string"),
    ("USUBJID", "Unique Subject Identifier", "string"),
    ("IDVAR", "Identifying Variable", "string"),
    ("IDVARVAL", "Identifying Variable Value", "string"),
    ("RELTYPE", "Relationship Type", "string"), ("RELID", "Relationship Identifier", "string"),
)


def _duration(hours: float) -> str:
    """An ISO 8601 duration of hours (``PT24H``, ``PT23.983H``)."""
    return f"PT{hours:.6g}H"


def _clock(origin: str | None, hours: float) -> str:
    if not origin:
        return ""
    t = datetime.fromisoformat(origin.replace("Z", "+00:00")) + timedelta(hours=hours)
    return t.isoformat(timespec="minutes")


def pp_datasets(results, *, study_id: str, analyte: str = "", specimen: str = "",
                choice: str = "each", level_trace=None, level_file: str = ""):
    """The PP records, the RELREC records (or pkcalc's own source table) and the list of
    pkcalc's own terms used, as pandas DataFrames (canonical units).

    ``level_trace`` gives each level row's ``pcseq`` (SDTM input); without it the
    relationship names the table rows (``level_file`` line numbers).
    """
    import pandas as pd

    from .nca import selected_intervals

    pp, rel, sources = [], [], []
    own_used: set[str] = set()
    seq = 0
    for r in results:
        for x in selected_intervals(r, choice):
            group = f"{r.subject}-DOSE{x.number}"
            common = {"STUDYID": study_id, "DOMAIN": "PP", "USUBJID": r.subject,
                      "PPGRPID": group, "PPCAT": analyte, "PPSPEC": specimen,
                      "PPRFTDTC": _clock(r.clock_origin, x.start),
                      "PPSTINT": _duration(0.0),
                      "PPENINT": _duration(x.length) if x.length else ""}
            values = {k: getattr(x, k, None) for k in PK_TERMS}
            values["points"] = len(x.points_used) if x.points_used else None
            terms = dict(PK_TERMS)
            if x.steady_state or (x.kind in ("between doses", "last dose")
                                  and x.clearance is not None):
                terms["clearance"] = OWN_TERMS["clearance_steady_state"]
                own_used.add(terms["clearance"][0])
            exposure, terminal = [], []
            if x.reason:
                seq += 1
                code, name, unit = terms["auc_interval"]
                pp.append({**common, "PPSEQ": seq, "PPTESTCD": code, "PPTEST": name,
                           "PPORRES": "", "PPORRESU": "", "PPSTRESC": "",
                           "PPSTRESN": float("nan"), "PPSTRESU": "", "PPSTAT": "NOT DONE",
                           "PPREASND": x.reason[:200]})
                exposure.append(seq)
            for key, (code, name, unit) in terms.items():
                value = values.get(key)
                if value is None:
                    continue
                seq += 1
                text = f"{value:.10g}"
                pp.append({**common, "PPSEQ": seq, "PPTESTCD": code, "PPTEST": name[:40],
                           "PPORRES": text, "PPORRESU": unit or "", "PPSTRESC": text,
                           "PPSTRESN": float(value), "PPSTRESU": unit or "", "PPSTAT": "",
                           "PPREASND": ""})
                (terminal if key in _TERMINAL else exposure).append(seq)
            all_rows = sorted(set(x.rows))
            term_rows = sorted(set(x.terminal_rows))
            for ids, rows, tag in ((exposure, all_rows, "LEVELS"), (terminal, term_rows,
                                                                    "LAMZ")):
                if not ids or not rows:
                    continue
                relid = f"{group}-{tag}"
                if level_trace is not None:
                    rel += [{"STUDYID": study_id, "RDOMAIN": "PP", "USUBJID": r.subject,
                             "IDVAR": "PPSEQ", "IDVARVAL": str(i), "RELTYPE": "",
                             "RELID": relid} for i in ids]
                    rel += [{"STUDYID": study_id, "RDOMAIN": "PC", "USUBJID": r.subject,
                             "IDVAR": "PCSEQ", "IDVARVAL": str(level_trace["pcseq"].iloc[j]),
                             "RELTYPE": "", "RELID": relid} for j in rows]
                else:
                    sources += [{"PPGRPID": group, "RELID": relid, "PPSEQ": ", ".join(
                        map(str, ids)), "file": level_file, "line": j + 2} for j in rows]
    pp_frame = pd.DataFrame(pp, columns=[v for v, _, _ in PP_VARIABLES])
    rel_frame = pd.DataFrame(rel, columns=[v for v, _, _ in RELREC_VARIABLES])
    src_frame = pd.DataFrame(sources, columns=["PPGRPID", "RELID", "PPSEQ", "file", "line"])
    own = sorted(own_used)
    return pp_frame, (rel_frame if level_trace is not None else src_frame), own


def dataset_json(frame, name: str, variables, study_id: str) -> dict[str, Any]:
    """CDISC Dataset-JSON v1.1 of a dataset (metadata at the top level, ``columns``
    with ``dataType``, ``rows`` as arrays; missing numbers as null)."""
    import math

    columns = [{"itemOID": f"IT.{name}.{v}", "name": v, "label": label, "dataType": kind}
               for v, label, kind in variables]
    rows = []
    for rec in frame.itertuples(index=False, name=None):
        rows.append([None if isinstance(x, float) and math.isnan(x) else
                     (int(x) if kind == "integer" else x)
                     for x, (_, _, kind) in zip(rec, variables, strict=True)])
    return {"datasetJSONCreationDateTime": datetime.now().isoformat(timespec="seconds"),
            "datasetJSONVersion": "1.1.0", "fileOID": f"pkcalc.{study_id}.{name}",
            "originator": "pkcalc", "sourceSystem": {"name": "pkcalc", "version": _version()},
            "studyOID": study_id, "itemGroupOID": f"IG.{name}", "records": len(rows),
            "name": name, "label": "Pharmacokinetic Parameters" if name == "PP" else
            "Related Records", "columns": columns, "rows": rows}


def _version() -> str:
    from .. import __version__

    return __version__


def write_pp(folder: str | Path, pp, relation, own: list[str], study_id: str,
             sdtm: bool) -> list[Path]:
    """Write ``pp.xpt``, ``pp.csv``, ``pp.json`` and the relationship (``relrec.*`` with
    SDTM input, else ``pp-sources.csv``) atomically."""
    import pyreadstat

    from ..files import temp_path, write_atomic

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    written = []

    def xpt(frame, name: str, variables, path: Path) -> Path:
        tmp = temp_path(path)
        try:
            pyreadstat.write_xport(frame, str(tmp), table_name=name, file_format_version=5,
                                   column_labels=[label for _, label, _ in variables])
            tmp.replace(path)
        finally:
            tmp.unlink(missing_ok=True)
        return path

    written.append(xpt(pp, "PP", PP_VARIABLES, folder / "pp.xpt"))
    written.append(write_atomic(folder / "pp.csv", pp.to_csv(index=False)))
    written.append(write_atomic(folder / "pp.json", json.dumps(
        dataset_json(pp, "PP", PP_VARIABLES, study_id), indent=1)))
    if sdtm:
        written.append(xpt(relation, "RELREC", RELREC_VARIABLES, folder / "relrec.xpt"))
        written.append(write_atomic(folder / "relrec.csv", relation.to_csv(index=False)))
        written.append(write_atomic(folder / "relrec.json", json.dumps(
            dataset_json(relation, "RELREC", RELREC_VARIABLES, study_id), indent=1)))
    else:
        written.append(write_atomic(folder / "pp-sources.csv", relation.to_csv(index=False)))
    terms = [f"{code}: {name} ({unit or 'no unit'}) -- pkcalc's own term"
             for code, name, unit in OWN_TERMS.values() if code in own]
    readme = ("PP dataset written by pkcalc from its non-compartmental analysis (invented "
              "or study data as given). Results are model-independent estimates for research "
              "and review; dosing decisions belong to licensed clinicians and pharmacists "
              "following local protocols.\n"
              f"Standard units: {CANONICAL['concentration']}, h, h*mg/L, L/h, L.\n"
              + ("Terms not in the CDISC terminology as far as pkcalc knows:\n  "
                 + "\n  ".join(terms) + "\n" if terms else ""))
    written.append(write_atomic(folder / "pp-terms.txt", readme))
    return written


def pp_summary(pp, own: list[str]) -> str:
    """One line for the terminal."""
    return (f"PP dataset: {len(pp)} parameter records for {pp['USUBJID'].nunique()} "
            f"subject(s)" + (f"; pkcalc's own terms: {', '.join(own)}" if own else ""))
