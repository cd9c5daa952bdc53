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


def _baseline(ds: Dataset, prefix: str, mask: np.ndarray, first: dict[str, float],
              rows: Rows) -> pd.DataFrame:
    """Per subject the chosen row among ``mask``: the last flagged baseline, else the last
    on or before the first dose.  Columns: subject, row, how."""
    subject = ds.text("USUBJID").to_numpy(object)
    when = parse_clock_array(ds.text(f"{prefix}DTC").to_numpy(object))
    flag = ds.text(f"{prefix}BLFL").str.upper().to_numpy(object) == "Y"
    first_sec = pd.Series(subject).map(first).to_numpy(float)
    dated = when.precision >= DATE
    # a date only counts when its day is the first dose's day or earlier
    day_end = np.where(when.precision == DATE, when.seconds + 86400.0 - 1.0, when.seconds)
    before = dated & (day_end <= first_sec + np.where(when.precision == DATE, 86400.0, 0.0))
    ok = mask & rows.keep
    frame = pd.DataFrame({"subject": subject, "row": np.arange(len(ds)), "flag": flag & ok,
                          "before": before & ok & ~np.isnan(first_sec),
                          "sec": np.where(dated, when.seconds, -np.inf)})
    flagged = frame[frame["flag"]].groupby("subject").tail(1).assign(how="baseline flag")
    rest = frame[frame["before"] & ~frame["subject"].isin(flagged["subject"])]
    last = rest.sort_values(["subject", "sec", "row"], kind="stable").groupby("subject").tail(1)
    last = last.assign(how="last on or before the first dose")
    undated = frame[ok & (when.precision == EMPTY) & ~frame["subject"].isin(
        pd.concat([flagged["subject"], last["subject"]]))]
    if len(undated):
        rows.log.notes.append(f"{ds.domain.upper()}: {len(undated)} row(s) without a date "
                              f"({prefix}DTC) and no baseline flag not used")
    return pd.concat([flagged, last])[["subject", "row", "how"]]


def _vs(vs: Dataset, log: ImportLog, first: dict[str, float], table: dict[str, dict]) -> dict:
    """Weight, height and BMI per subject from VS; returns the weights in kg."""
    for v in ("USUBJID", "VSTESTCD", "VSSTRESN", "VSSTRESU"):
        if not vs.has(v):
            raise PkcalcInputError(f"variable {v} missing", file=vs.name,
                                   expected="USUBJID, VSTESTCD, VSSTRESN, VSSTRESU")
    subject = vs.text("USUBJID").to_numpy(object)
    rows = Rows(vs, log, pd.Series(subject))
    test = vs.text("VSTESTCD").str.upper().to_numpy(object)
    rows.drop(~np.isin(test, ["WEIGHT", "HEIGHT", "BMI"]), "another test (VSTESTCD)")
    value, bad = vs.number("VSSTRESN")
    raw = vs.text("VSSTRESN").to_numpy(object)
    rows.drop_each(bad.to_numpy(), np.array([f"VSSTRESN '{x}' is not a number" for x in raw],
                                            dtype=object), problem=True)
    rows.drop(value.isna().to_numpy(), "no result (VSSTRESN empty)")
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
    bad_weight = (test == "WEIGHT") & ~(kg > 0)
    rows.drop(bad_weight, "weight not positive", problem=True)
    weights: dict[str, float] = {}
    for t, column in (("WEIGHT", "weight [kg]"), ("HEIGHT", "height [cm]"),
                      ("BMI", "bmi [kg/m2]")):
        chosen = _baseline(vs, "VS", test == t, first, rows)
        for sid, r, how in chosen.itertuples(index=False):
            table.setdefault(sid, {})[column] = float(kg[r])
            if t == "WEIGHT":
                weights[sid] = float(kg[r])
                log.weights[sid] = {"kg": float(kg[r]), "source": f"{how} ({vs.label(r)})"}
    for cov in table.values():
        if "bmi [kg/m2]" not in cov and "weight [kg]" in cov and "height [cm]" in cov:
            cov["bmi [kg/m2]"] = cov["weight [kg]"] / (cov["height [cm]"] / 100.0) ** 2
    log.used["vs"] = int(rows.keep.sum())
    return weights


def _dm(dm: Dataset, table: dict[str, dict], log: ImportLog) -> None:
    ids = dm.text("USUBJID").to_numpy(object)
    if dm.has("AGE"):
        age, _ = dm.number("AGE")
        units = dm.text("AGEU").str.upper().to_numpy(object)
        scale = np.array([_AGE_YEARS.get(u, 1.0 if not u else np.nan) for u in units])
        unknown = sorted(set(units[np.isnan(scale)]))
        if unknown:
            log.notes.append(f"DM: AGEU {', '.join(unknown)} not understood: those ages "
                             "are not used")
        years = age.to_numpy(float) * scale
        for sid, y in zip(ids, years, strict=True):
            if sid and np.isfinite(y):
                table.setdefault(sid, {})["age [years]"] = float(y)
    for var in ("SEX", "RACE", "ARM", "ACTARM", "COUNTRY"):
        if dm.has(var):
            for sid, x in zip(ids, dm.text(var).to_numpy(object), strict=True):
                if sid and x:
                    table.setdefault(sid, {})[var.lower()] = x
    log.used["dm"] = int(np.sum(ids != ""))


def _lb(lb: Dataset, table: dict[str, dict], log: ImportLog, first: dict[str, float]) -> None:
    """Each laboratory test's baseline value as a column ``<test> [unit]``."""
    for v in ("USUBJID", "LBTESTCD", "LBSTRESN"):
        if not lb.has(v):
            raise PkcalcInputError(f"variable {v} missing", file=lb.name,
                                   expected="USUBJID, LBTESTCD, LBSTRESN, LBSTRESU")
    subject = lb.text("USUBJID").to_numpy(object)
    rows = Rows(lb, log, pd.Series(subject))
    test = lb.text("LBTESTCD").str.upper().to_numpy(object)
    value, bad = lb.number("LBSTRESN")
    rows.drop(bad.to_numpy(), "LBSTRESN is not a number", problem=True)
    rows.drop(value.isna().to_numpy(), "no result (LBSTRESN empty)")
    unit = lb.text("LBSTRESU").to_numpy(object)
    taken = {c.split(" [")[0] for cov in table.values() for c in cov}
    for t in sorted(set(test[rows.keep]) - {""}):
        sel = (test == t) & rows.keep
        usual = pd.Series(unit[sel]).mode().iloc[0]
        scale = np.where(unit == usual, 1.0, np.nan)
        for other in set(unit[sel]) - {usual}:
            try:
                scale[sel & (unit == other)] = float(ureg.Quantity(
                    1.0, normalise_unit(other)).to(normalise_unit(usual)).magnitude)
                log.convert("lb", f"LBSTRESU ({t})", other, float(
                    scale[sel & (unit == other)][0]), usual, int((sel & (unit == other)).sum()))
            except Exception:  # pint: unknown unit or another dimension
                rows.drop(sel & (unit == other), f"{t}: LBSTRESU '{other}' cannot be "
                          f"converted to {usual}", problem=True)
        name = t.lower() if t.lower() not in taken else f"lb_{t.lower()}"
        column = f"{name} [{usual}]" if usual else name
        chosen = _baseline(lb, "LB", test == t, first, rows)
        for sid, r, _how in chosen.itertuples(index=False):
            table.setdefault(sid, {})[column] = float(value.iloc[r] * scale[r])
    log.used["lb"] = int(rows.keep.sum())


def map_subjects(dm: Dataset | None, vs: Dataset | None, lb: Dataset | None,
                 log: ImportLog, first: dict[str, float]) -> tuple[pd.DataFrame, dict]:
    """The subjects table (one row per subject with any covariate) and the weights."""
    table: dict[str, dict] = {}
    weights: dict[str, float] = {}
    if vs is not None:
        weights = _vs(vs, log, first, table)
    if dm is not None:
        _dm(dm, table, log)
    if lb is not None:
        _lb(lb, table, log, first)
    if not table:
        return pd.DataFrame({"subject": []}), weights
    frame = pd.DataFrame.from_dict(table, orient="index")
    frame.insert(0, "subject", frame.index.astype(str))
    return frame.reset_index(drop=True), weights

