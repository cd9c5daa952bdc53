"""A study from CDISC SDTM datasets: the choices, the clock, the tables.

What is analysed is chosen explicitly, with safe defaults:

- **analyte** (PCTESTCD): the only one, else ``--analyte``;
- **specimen** (PCSPEC): the only plasma, serum or blood specimen, else
  ``--specimen``; rows of other specimens (urine, ...) are counted, never mixed in;
- **treatment** (EXTRT/ECTRT): the only active (non-placebo) treatment, else
  ``--treatment``; records of other treatments are counted and never added (their
  route does not matter); subjects given placebo (by arm, records or zero doses)
  or only another treatment are reported and do not fail the run;
- an analyte that is not the treatment by name (a metabolite) is analysed against
  the treatment's doses with a prominent note: its clearance and volume are
  apparent.

Time zero of each subject is the start of their first administration of the
treatment; a level before it is a pre-dose level (see the study tables' rule S6).
A level whose date-time is too imprecise is left out with its reason (a row
problem); a dose that cannot be placed leaves its subject out, named.  With
``strict`` any row problem or subject left out refuses the import instead.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from ...clock import MINUTE, clock_text, parse_clock_array
from ...core import Study
from ...errors import PkcalcInputError, Problem, check_type
from ..study import PRE_DOSE_RULES, Columns, Failures, study_from_tables
from .concentrations import PC_VARIABLES, choose_analyte, map_levels
from .datasets import Dataset, find_datasets, frame_dataset, read_dataset
from .exposure import EXPOSURE_VARIABLES, map_doses
from .log import ImportLog
from .subjects import DM_VARIABLES, LB_VARIABLES, VS_VARIABLES, arm_placebo, map_subjects
from .terms import analyte_is_treatment

__all__ = ["TIME_BASES", "export_tables", "load_sdtm"]

TIME_BASES = ("actual", "nominal")
_WANTED = {"pc": PC_VARIABLES, "ex": EXPOSURE_VARIABLES, "ec": EXPOSURE_VARIABLES,
           "vs": VS_VARIABLES, "dm": DM_VARIABLES, "lb": LB_VARIABLES}


def _adam_hint(source) -> str:
    """A word when the folder holds ADaM analysis datasets (``adpc``, ``adex``...) instead
    of SDTM: they are derived tables with other variables, not read here."""
    if isinstance(source, dict):
        return ""
    adam = sorted(p.name for p in Path(source).iterdir()
                  if p.is_file() and p.name.lower().startswith("ad")
                  and p.suffix.lower() in (".xpt", ".json", ".csv"))
    if not adam:
        return ""
    return (f"; {', '.join(adam[:3])} {'is' if len(adam) == 1 else 'are'} ADaM (analysis) "
            "data, not read: pkcalc reads the SDTM tabulation datasets")


def _datasets(source, log: ImportLog) -> dict[str, Dataset]:
    """The datasets of a folder, or given as DataFrames (``{"pc": frame, ...}``)."""
    out: dict[str, Dataset] = {}
    if isinstance(source, dict):
        log.folder = "DataFrames"
        unknown = sorted(set(map(str.lower, source)) - set(_WANTED))
        if unknown:
            raise PkcalcInputError(f"unknown dataset(s) {', '.join(unknown)}", field="datasets",
                                   expected=", ".join(sorted(_WANTED)))
        for domain, frame in source.items():
            d = domain.lower()
            out[d] = frame_dataset(frame, d, _WANTED[d])
    else:
        import os

        check_type(source, (str, os.PathLike), "source",
                   "a folder path, or a dict of DataFrames {'pc': ..., 'ex': ...}")
        folder = Path(source)
        if not folder.is_dir():
            raise PkcalcInputError("is not a folder", file=str(folder),
                                   expected="a folder holding pc and ex (.xpt, .json or .csv)")
        paths, notes = find_datasets(folder, set(_WANTED))
        log.notes += notes
        problems = []
        for domain, path in paths.items():
            try:
                out[domain] = read_dataset(path, domain, _WANTED[domain])
            except PkcalcInputError as exc:
                problems += exc.located(file=str(path)).problems
        if problems:
            raise PkcalcInputError(problems)
    if "pc" not in out:
        raise PkcalcInputError(f"no PC dataset{_adam_hint(source)}", file=log.folder,
                               expected="pc.xpt, pc.json or pc.csv")
    if "ex" not in out and "ec" not in out:
        raise PkcalcInputError("no EX (or EC) dataset", file=log.folder,
                               expected="ex.xpt, ex.json or ex.csv")
    for d, ds in out.items():
        log.datasets[d] = ds.name
        log.read[d] = len(ds)
        log.notes += ds.notes
    return out


def _apparent(log: ImportLog) -> None:
    """A prominent note when the analyte is not the dosed treatment by name."""
    if not log.treatment or not log.analyte:
        return
    if analyte_is_treatment(log.treatment, log.analyte, log.analyte_name):
        return
    shown = log.analyte + (f" ({log.analyte_name})" if log.analyte_name else "")
    log.apparent = (f"the analyte {shown} is not the dosed treatment {log.treatment} by name "
                    "(a metabolite?): its clearance and volume are apparent values relative "
                    f"to the dose of {log.treatment}")


def load_sdtm(source, analyte: str | None = None, *, specimen: str | None = None,
              treatment: str | None = None, times: str = "actual",
              infusion_duration: float | None = None, pre_dose: str = "omit",
              strict: bool = False) -> Study:
    """A study from the SDTM datasets of a folder (PC and EX or EC; DM, VS, LB when
    present), or from DataFrames ``{"pc": ..., "ex": ..., ...}``.

    Parameters
    ----------
    source : path or dict of pandas.DataFrame
    analyte : str, optional
        PCTESTCD (needed when PC holds several).
    specimen : str, optional
        PCSPEC (default: the only plasma, serum or blood specimen).
    treatment : str, optional
        EXTRT (default: the only active treatment).
    times : {"actual", "nominal"}
        Sample times from PCDTC, or from PCRFTDTC + PCELTM where both are given.
    infusion_duration : float, optional, h
        Length of each administration when EX gives neither EXDUR nor a usable end.
    pre_dose : {"omit", "drug_on_board"}
        What a measurable level before the first dose becomes (rule S6).
    strict : bool
        Refuse the import when any row is left out as a problem or any subject fails.

    Returns
    -------
    Study
        With ``import_report`` (dict), ``import_lines`` (text) and ``tables`` (the
        analysis tables with their source rows).

    Raises
    ------
    PkcalcInputError
        Unusable datasets, ambiguous choices, or (``strict``) any problem.
    """
    if times not in TIME_BASES:
        raise PkcalcInputError(f"unknown time basis '{times}'", field="times",
                               expected=" or ".join(TIME_BASES))
    if pre_dose not in PRE_DOSE_RULES:
        raise PkcalcInputError(f"unknown rule '{pre_dose}'", field="pre_dose",
                               expected=" or ".join(PRE_DOSE_RULES))
    if infusion_duration is not None and not (0 <= infusion_duration < 1e4):
        raise PkcalcInputError("must be a length from 0 h", field="infusion_duration")
    log = ImportLog(str(source) if not isinstance(source, dict) else "DataFrames")
    data = _datasets(source, log)
    exposure = data.get("ec") or data["ex"]
    if "ec" in data and "ex" in data:
        log.notes.append("EC (exposure as collected) gives the administrations; EX is not used")
        log.used["ex"] = 0
    fails = Failures()
    chosen = choose_analyte(data["pc"], analyte, log)
    placebo_arm = arm_placebo(data.get("dm"))
    doses, not_dosed, dose_warnings = map_doses(exposure, log, fails, treatment=treatment,
                                                infusion_duration=infusion_duration,
                                                arm_placebo=placebo_arm)
    log.placebo = sorted(s for s, why in not_dosed.items() if why.startswith("placebo"))
    levels = map_levels(data["pc"], log, analyte=chosen, specimen=specimen, times=times,
                        placebo=set(not_dosed))
    _apparent(log)
    first = doses.groupby("subject")["sec"].min().to_dict() if len(doses) else {}
    subjects, weights = map_subjects(data.get("dm"), data.get("vs"), data.get("lb"), log,
                                     first)
    _per_kg(doses, weights, fails, exposure)
    origins = _clock(levels, doses, fails, data["pc"], exposure, log, times)
    _unmatched(levels, doses, fails, exposure, not_dosed)
    _count_pre_dose(levels, log, pre_dose)
    study = _study(levels, doses, subjects, data, exposure, fails, origins, pre_dose, log)
    _with_rows_left_out(study, fails, log, data["pc"].name)
    study.warnings += dose_warnings + log.problems
    if log.apparent:
        study.warnings.insert(0, log.apparent[0].upper() + log.apparent[1:])
    if strict:
        _strict(study, log)
    study.import_report = log.as_dict()
    study.import_lines = log.lines()
    study.tables = _tables(levels, doses, subjects, study)
    return study


#: Reasons a PC row is left out by design, not worth naming beside a subject's failure.
_BY_DESIGN = ("another analyte", "another specimen", "placebo subject")


def _with_rows_left_out(study: Study, fails: Failures, log: ImportLog, pc_name: str) -> None:
    """Beside each failed subject's problems, its PC rows that were left out and why: a
    subject that fails with "no level after the first dose" often had its levels left
    out for a reason the import report gives."""
    rows = log.pc_rows
    log.pc_rows = None
    if rows is None or not study.failures:
        return
    label = {f"subject '{sid}'": sid for sid in fails.by_subject}
    left = rows.left_out_of(set(label.values()), by_design=_BY_DESIGN)
    for k, (item, err) in enumerate(study.failures):
        counts = left.get(label.get(item, ""))
        if counts:
            n = sum(counts.values())
            why = "; ".join(f"{reason}: {c}" for reason, c in counts.items())
            study.failures[k] = (item, PkcalcInputError([*err.problems, Problem(
                f"of its PC rows, {n} {'was' if n == 1 else 'were'} left out ({why}; the "
                "import report names them)", file=pc_name, item=item)]))


def _per_kg(doses: pd.DataFrame, weights: dict[str, float], fails: Failures,
            ex: Dataset) -> None:
    """mg/kg amounts times the subject's weight (a subject without one fails)."""
    if not doses["per_kg"].any():
        return
    w = doses["subject"].map(weights).to_numpy(float)
    need = doses["per_kg"].to_numpy(bool)
    for sid, src in doses.loc[need & np.isnan(w), ["subject", "source"]].itertuples(index=False):
        if sid not in fails:
            fails(sid, f"a dose per kg needs the body weight (VS WEIGHT, baseline or on or "
                  f"before the first dose) ({src})", ex.name, f"{ex.domain.upper()}DOSU")
    doses["amount"] = np.where(need, doses["amount"] * w, doses["amount"])


def _clock(levels, doses, fails: Failures, pc: Dataset, ex: Dataset, log: ImportLog,
           times: str) -> dict[str, str]:
    """Hours since each subject's first administration; the origins as ISO 8601 text."""
    origins: dict[str, str] = {}
    if doses.empty:
        levels["hours"] = np.nan
        levels["reference_hours"] = np.nan
        doses["hours"] = np.nan
        return origins
    first = doses.loc[doses.groupby("subject")["sec"].idxmin()]
    origin = dict(zip(first["subject"], first["sec"], strict=True))
    kinds = pd.concat([levels[["subject", "offset"]], doses[["subject", "offset"]]])
    agg = kinds.groupby("subject")["offset"].agg(["any", "all"])
    for sid in agg.index[agg["any"] & ~agg["all"]]:
        fails(sid, "some date-times have a time-zone offset and some do not: the hours between "
              "them would be a guess", pc.name, "PCDTC")
    for sid, text in zip(first["subject"], first["clock"], strict=True):
        origins[sid] = text
    doses["hours"] = (doses["sec"] - doses["subject"].map(origin)) / 3600.0
    at = np.where(np.isnan(levels["nominal_sec"]), levels["sec"], levels["nominal_sec"])
    base = levels["subject"].map(origin).to_numpy(float)
    levels["hours"] = (at - base) / 3600.0
    reference = parse_clock_array(levels["reference_dose"])
    levels["reference_hours"] = np.where(reference.precision >= MINUTE,
                                         (reference.seconds - base) / 3600.0, np.nan)
    trt = log.treatment or "the treatment"
    log.time_origin = (f"each subject's first administration of {trt} "
                       f"({ex.domain.upper()}STDTC); levels before it are pre-dose levels")
    if times == "actual":
        log.time_basis = {"actual (PCDTC)": len(levels)}
    return origins


def _count_pre_dose(levels: pd.DataFrame, log: ImportLog, rule: str) -> None:
    pre = (levels["hours"] < 0).to_numpy()
    if not pre.any():
        return
    zero = pre & (levels["blq"].to_numpy(bool) | (levels["conc"].to_numpy(float) == 0))
    text = (f"{int(pre.sum())} pre-dose level(s) (before the subject's first dose): "
            f"{int(zero.sum())} below the LLOQ or zero, the zero at the first dose")
    if (pre & ~zero).any():
        text += (f"; {int((pre & ~zero).sum())} measurable, "
                 + ("taken as drug on board" if rule == "drug_on_board" else
                    "left out with a warning"))
    log.notes.append(text)


def _unmatched(levels, doses, fails: Failures, ex: Dataset, not_dosed) -> None:
    have = set(doses["subject"].unique())
    for sid in sorted(set(levels["subject"].unique()) - have - set(not_dosed)):
        if sid not in fails:
            fails(sid, "has PC levels but no exposure records of the analysed treatment",
                  ex.name, "USUBJID")


def _study(levels, doses, subjects, data, ex: Dataset, fails, origins, pre_dose,
           log: ImportLog) -> Study:
    lv_frame = pd.DataFrame({
        "subject": levels["subject"], "time [h]": levels["hours"],
        "concentration [mg/L]": levels["conc"], "lloq [mg/L]": levels["lloq"],
        "blq": levels["blq"].astype(bool), "source": levels["source"],
        "pcseq": levels["pcseq"], "reference_time [h]": levels["reference_hours"]})
    p = ex.domain.upper()
    ds_frame = pd.DataFrame({"subject": doses["subject"], "start [h]": doses["hours"],
                             "amount [mg]": doses["amount"], "duration [h]": doses["duration"],
                             "source": doses["source"]})
    lv = Columns(lv_frame, data["pc"].name, labels=levels["source"],
                 fields={"subject": "USUBJID", "time": "PCDTC", "concentration": "PCSTRESN",
                         "lloq": "PCLLOQ", "blq": "PCSTRESC"})
    ds = Columns(ds_frame, ex.name, labels=doses["source"],
                 fields={"subject": "USUBJID", "start": f"{p}STDTC", "amount": f"{p}DOSE",
                         "duration": f"{p}ENDTC / {p}DUR"})
    sb = None
    if len(subjects):
        names = [data[d].name for d in ("dm", "vs", "lb") if d in data]
        sb = Columns(subjects, " / ".join(names), labels=[f"subject '{s}'" for s in
                                                          subjects["subject"]])
    keep = levels["subject"].isin(set(doses["subject"].unique()) - set(fails.by_subject))
    if not keep.all():
        lv = Columns(lv_frame[keep].reset_index(drop=True), lv.file,
                     labels=levels.loc[keep, "source"].reset_index(drop=True), fields=lv.fields)
    if lv.frame.empty:
        found = ([p for _, err in fails.as_list() for p in err.problems]
                 + [Problem(line) for line in log.problems])
        raise PkcalcInputError(found or Problem(
            "no level of the analysed analyte, specimen and treatment is left to analyse",
            file=data["pc"].name, expected="levels of subjects given the treatment"))
    study = study_from_tables(lv, ds, sb, fails, pre_dose=pre_dose,
                              origins={s: o for s, o in origins.items()})
    study.files = [d.path or d.name for d in data.values()]
    study.level_trace = lv.frame[["source", "pcseq"]]
    if sb is not None:  # the subjects table's own warnings (subjects in DM only) are noise
        study.warnings = [w for w in study.warnings if "subjects table" not in w]
    return study


def _strict(study: Study, log: ImportLog) -> None:
    problems = [Problem(line) for line in log.problems]
    problems += [p for _, err in study.failures for p in err.problems]
    if problems:
        raise PkcalcInputError([*problems, Problem(
            "refused because strict: without --strict these rows and subjects are left out "
            "and the rest analysed")])


def _tables(levels, doses, subjects, study: Study) -> dict[str, pd.DataFrame]:
    """The analysis tables (clock and relative times, with the source rows)."""
    lv = pd.DataFrame({
        "subject": levels["subject"], "time [clock]": levels["clock"],
        "time [h]": levels["hours"], "concentration [mg/L]": levels["conc"],
        "lloq [mg/L]": levels["lloq"], "blq": np.where(levels["blq"], "true", "false"),
        "source": levels["source"], "pcseq": levels["pcseq"], "visit": levels["visit"],
        "pctpt": levels["pctpt"], "time_basis": levels["time_basis"],
        "reference_dose": levels["reference_dose"]})
    ds = pd.DataFrame({
        "subject": doses["subject"], "start [clock]": doses["clock"],
        "start [h]": doses["hours"], "amount [mg]": doses["amount"],
        "duration [h]": doses["duration"], "source": doses["source"],
        "exseq": doses["seq"], "treatment": doses["treatment"],
        "administration": doses["administration"]})
    if levels["time_basis"].eq("nominal").any():  # the clock column holds the nominal time
        nominal = levels["time_basis"].eq("nominal").to_numpy()
        lv.loc[nominal, "time [clock]"] = [clock_text(s) for s in
                                           levels.loc[nominal, "nominal_sec"]]
    analysed = {s.subject for s in study.subjects}
    out = {"levels": lv[lv["subject"].isin(analysed)].reset_index(drop=True),
           "doses": ds[ds["subject"].isin(analysed)].reset_index(drop=True)}
    if len(subjects):
        out["subjects"] = subjects[subjects["subject"].isin(analysed)].reset_index(drop=True)
    return out


def export_tables(study: Study) -> dict[str, pd.DataFrame]:
    """The analysis-ready tables of a study read from SDTM, with hours since each
    subject's first dose beside the clock times (rerun them with ``--levels`` etc.)."""
    return {k: v.copy() for k, v in study.tables.items() if len(v)}
