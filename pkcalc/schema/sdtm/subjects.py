"""DM, VS and LB -> the subjects table (covariates for ``--effect``) and body weights.

SDTMIG v3.3 (from memory for section numbers): DM gives AGE (with AGEU), SEX, RACE,
ARM, ACTARM and COUNTRY; VS gives WEIGHT, HEIGHT and BMI (VSTESTCD, VSSTRESN,
VSSTRESU, VSDTC, VSBLFL); LB gives laboratory tests (LBTESTCD, LBSTRESN, LBSTRESU,
LBDTC, LBBLFL).  A subject's value of a test is the one flagged baseline
(``--BLFL = Y``, the last such row), else the last on or before the first dose (a
date without a time counts when it is the day of the first dose or earlier).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ...clock import DATE, EMPTY, parse_clock_array
from ...errors import PkcalcInputError
from ...units import ureg
from .common import Rows
from .datasets import Dataset
from .log import ImportLog
from .terms import PLACEBO, normalise_unit

__all__ = ["DM_VARIABLES", "LB_VARIABLES", "VS_VARIABLES", "arm_placebo", "map_subjects"]

DM_VARIABLES = {"USUBJID", "AGE", "AGEU", "SEX", "RACE", "ARM", "ACTARM", "ARMCD", "ACTARMCD",
                "COUNTRY"}
VS_VARIABLES = {"USUBJID", "VSSEQ", "VSTESTCD", "VSSTRESN", "VSSTRESU", "VSDTC", "VSBLFL"}
LB_VARIABLES = {"USUBJID", "LBSEQ", "LBTESTCD", "LBSTRESN", "LBSTRESU", "LBDTC", "LBBLFL",
                "LBSPEC"}
_AGE_YEARS = {"YEARS": 1.0, "YEAR": 1.0, "MONTHS": 1 / 12, "MONTH": 1 / 12,
              "WEEKS": 7 / 365.25, "WEEK": 7 / 365.25, "DAYS": 1 / 365.25, "DAY": 1 / 365.25,
              "HOURS": 1 / 8766, "HOUR": 1 / 8766}


def arm_placebo(dm: Dataset | None) -> set[str]:
    """Subjects whose actual arm (ACTARM, else ARM) is a placebo arm."""
    if dm is None:
        return set()
    var = "ACTARM" if dm.has("ACTARM") else "ARM"
    arms = dm.text(var).to_numpy(object)
    ids = dm.text("USUBJID").to_numpy(object)
    return {s for s, a in zip(ids, arms, strict=True) if s and PLACEBO.search(a or "")}


def _baseline(ds: Dataset, prefix: str, test: np.ndarray, first: dict[str, float],
              rows: Rows) -> pd.DataFrame:
    """Per test and subject the chosen row: the last flagged baseline, else the last on or
    before the first dose.  Columns: test, subject, row, how."""
    subject = ds.text("USUBJID").to_numpy(object)
    when = parse_clock_array(ds.text(f"{prefix}DTC"))
    flag = ds.text(f"{prefix}BLFL").str.upper().to_numpy(object) == "Y"
    first_sec = pd.Series(subject, dtype=object).map(first).to_numpy(float)
    dated = when.precision >= DATE
    # a date only counts when its day is the first dose's day or earlier
    day_end = np.where(when.precision == DATE, when.seconds + 86400.0 - 1.0, when.seconds)
    before = dated & (day_end <= first_sec + np.where(when.precision == DATE, 86400.0, 0.0))
    ok = rows.keep
    undated = ok & (when.precision == EMPTY) & ~flag
    if undated.any():
        rows.log.notes.append(f"{ds.domain.upper()}: {int(undated.sum())} row(s) without a "
                              f"date ({prefix}DTC) or a baseline flag cannot be placed: not used")
    frame = pd.DataFrame({"test": test, "subject": subject, "row": np.arange(len(ds)),
                          "sec": np.where(dated, when.seconds, -np.inf)})
    flagged = frame[flag & ok].drop_duplicates(["test", "subject"], keep="last")
    rest = frame[before & ok & ~np.isnan(first_sec)]
    taken = pd.MultiIndex.from_frame(flagged[["test", "subject"]])
    rest = rest[~pd.MultiIndex.from_frame(rest[["test", "subject"]]).isin(taken)]
    last = rest.sort_values(["test", "subject", "sec", "row"], kind="stable").drop_duplicates(
        ["test", "subject"], keep="last")
    return pd.concat([flagged.assign(how="baseline flag"),
                      last.assign(how="last on or before the first dose")])


def _column(chosen: pd.DataFrame, t: str, values: np.ndarray) -> pd.Series:
    picked = chosen[chosen["test"] == t]
    return pd.Series(values[picked["row"].to_numpy(int)], index=picked["subject"].to_numpy(object))


def _vs(vs: Dataset, log: ImportLog, first: dict[str, float]) -> dict[str, pd.Series]:
    """Weight, height and BMI per subject from VS (weights also into the log)."""
    for v in ("USUBJID", "VSTESTCD", "VSSTRESN", "VSSTRESU"):
        if not vs.has(v):
            raise PkcalcInputError(f"variable {v} missing", file=vs.name,
                                   expected="USUBJID, VSTESTCD, VSSTRESN, VSSTRESU")
    subject = vs.text("USUBJID").to_numpy(object)
    rows = Rows(vs, log, pd.Series(subject, dtype=object))
    test = vs.text("VSTESTCD").str.upper().to_numpy(object)
    rows.drop(~np.isin(test, ["WEIGHT", "HEIGHT", "BMI"]), "another test (VSTESTCD)")
    value, bad = vs.number("VSSTRESN")
    raw = vs.text("VSSTRESN")
    rows.drop_each(bad.to_numpy(bool), lambda i: f"VSSTRESN '{raw.iloc[i]}' is not a number",
                   problem=True)
    rows.drop(value.isna().to_numpy(bool), "no result (VSSTRESN empty)")
    unit = vs.text("VSSTRESU").to_numpy(object)
    target = {"WEIGHT": "kg", "HEIGHT": "cm", "BMI": "kg/m**2"}
    factor = np.full(len(vs), np.nan)
    for u in pd.unique(unit):
        for t, to in target.items():
            sel = (unit == u) & (test == t)
            if not sel.any():
                continue
            try:
                factor[sel] = float(ureg.Quantity(1.0, normalise_unit(u)).to(to).magnitude)
            except Exception:  # pint raises several kinds for unknown or wrong units
                rows.drop(sel, f"VSSTRESU '{u}' is not a unit of {t.lower()}", problem=True)
            else:
                if factor[sel][0] != 1.0:
                    log.convert("vs", f"VSSTRESU ({t})", u, float(factor[sel][0]), to,
                                int((sel & rows.keep).sum()))
    kg = value.to_numpy(float) * factor
    rows.drop((test == "WEIGHT") & ~(kg > 0), "weight not positive", problem=True)
    chosen = _baseline(vs, "VS", test, first, rows)
    weight = chosen[chosen["test"] == "WEIGHT"]
    labels = vs.labels(weight["row"].to_numpy(int)).to_numpy(object)
    for (sid, r, how), where in zip(weight[["subject", "row", "how"]].itertuples(index=False),
                                    labels, strict=True):
        log.weights[sid] = {"kg": float(kg[r]), "source": f"{how} ({where})"}
    log.used["vs"] = int(rows.keep.sum())
    return {"weight [kg]": _column(chosen, "WEIGHT", kg),
            "height [cm]": _column(chosen, "HEIGHT", kg),
            "bmi [kg/m2]": _column(chosen, "BMI", kg)}


def _dm(dm: Dataset, log: ImportLog) -> dict[str, pd.Series]:
    ids = dm.text("USUBJID").to_numpy(object)
    keep = (ids != "") & ~pd.Series(ids, dtype=object).duplicated().to_numpy(bool)
    if np.sum(ids != "") > keep.sum():
        log.notes.append("DM lists a subject more than once: the first row is used")
    out: dict[str, pd.Series] = {}
    if dm.has("AGE"):
        age, _ = dm.number("AGE")
        units = dm.text("AGEU").str.upper().to_numpy(object)
        scale = np.array([_AGE_YEARS.get(u, 1.0 if not u else np.nan) for u in units])
        unknown = sorted(set(units[np.isnan(scale)]))
        if unknown:
            log.notes.append(f"DM: AGEU {', '.join(unknown)} not understood: those ages "
                             "are not used")
        years = age.to_numpy(float) * scale
        ok = keep & np.isfinite(years)
        out["age [years]"] = pd.Series(years[ok], index=ids[ok])
    for var in ("SEX", "RACE", "ARM", "ACTARM", "COUNTRY"):
        if dm.has(var):
            x = dm.text(var).to_numpy(object)
            ok = keep & (x != "")
            out[var.lower()] = pd.Series(x[ok], index=ids[ok], dtype=object)
    log.used["dm"] = int(keep.sum())
    return out


def _lb(lb: Dataset, log: ImportLog, first: dict[str, float], taken: set[str]
        ) -> dict[str, pd.Series]:
    """Each laboratory test's baseline value as a column ``<test> [unit]``."""
    for v in ("USUBJID", "LBTESTCD", "LBSTRESN"):
        if not lb.has(v):
            raise PkcalcInputError(f"variable {v} missing", file=lb.name,
                                   expected="USUBJID, LBTESTCD, LBSTRESN, LBSTRESU")
    subject = lb.text("USUBJID").to_numpy(object)
    rows = Rows(lb, log, pd.Series(subject, dtype=object))
    test = lb.text("LBTESTCD").str.upper().to_numpy(object)
    value, bad = lb.number("LBSTRESN")
    rows.drop(bad.to_numpy(bool), "LBSTRESN is not a number", problem=True)
    rows.drop(value.isna().to_numpy(bool), "no result (LBSTRESN empty)")
    unit = lb.text("LBSTRESU").to_numpy(object)
    scaled = value.to_numpy(float).copy()
    names: dict[str, str] = {}
    for t in sorted(set(test[rows.keep]) - {""}):
        sel = (test == t) & rows.keep
        usual = pd.Series(unit[sel], dtype=object).mode().iloc[0]
        for other in set(unit[sel]) - {usual}:
            mine = sel & (unit == other)
            try:
                f = float(ureg.Quantity(1.0, normalise_unit(other)).to(
                    normalise_unit(usual)).magnitude)
            except Exception:  # pint: unknown unit or another dimension
                rows.drop(mine, f"{t}: LBSTRESU '{other}' cannot be converted to {usual}",
                          problem=True)
                continue
            scaled[mine] *= f
            log.convert("lb", f"LBSTRESU ({t})", other, f, usual, int(mine.sum()))
        name = t.lower() if t.lower() not in taken else f"lb_{t.lower()}"
        names[t] = f"{name} [{usual}]" if usual else name
    chosen = _baseline(lb, "LB", test, first, rows)
    log.used["lb"] = int(rows.keep.sum())
    return {column: _column(chosen, t, scaled) for t, column in names.items()}


def map_subjects(dm: Dataset | None, vs: Dataset | None, lb: Dataset | None,
                 log: ImportLog, first: dict[str, float]) -> tuple[pd.DataFrame, dict]:
    """The subjects table (one row per subject with any covariate) and the weights (kg)."""
    columns: dict[str, pd.Series] = {}
    if vs is not None:
        columns.update(_vs(vs, log, first))
    if dm is not None:
        columns.update(_dm(dm, log))
    if lb is not None:
        columns.update(_lb(lb, log, first, {c.split(" [")[0] for c in columns}))
    columns = {k: v for k, v in columns.items() if len(v)}
    weights = columns["weight [kg]"].to_dict() if "weight [kg]" in columns else {}
    if not columns:
        return pd.DataFrame({"subject": []}), weights
    frame = pd.concat(columns, axis=1)
    if {"weight [kg]", "height [cm]"} <= set(frame.columns):
        bmi = frame["weight [kg]"] / (frame["height [cm]"] / 100.0) ** 2
        frame["bmi [kg/m2]"] = frame["bmi [kg/m2]"].fillna(bmi) if "bmi [kg/m2]" in frame \
            else bmi
    frame = frame.dropna(axis=1, how="all")
    frame.insert(0, "subject", frame.index.astype(str))
    return frame.reset_index(drop=True), weights
