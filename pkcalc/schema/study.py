"""Study tables (levels, doses, subjects) and the study TOML (docs/formats.md).

Tables are CSV with units in the headers (``time [h]``, ``concentration [ng/mL]``).
Units are parsed once per column and applied to the whole column; text in a
numeric column, a missing unit or a missing column make the file unusable
(:class:`~pkcalc.errors.PkcalcInputError`, exit 2).  Problems that concern one
subject (duplicate times, a BLQ mark on a value above its LLOQ, no doses, no
level after the first dose, negative levels) fail that subject only; the rest
go on.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .. import glossary
from ..core import NCA_AUC_METHODS, NCA_BLQ_RULES, NCA_INTERVALS, NcaOptions, Study, SubjectData
from ..errors import PkcalcInputError, Problem
from ..units import KINDS, NUMERIC_RANGE, parse_header, parse_unit

__all__ = [
    "PRE_DOSE_RULES",
    "Study",
    "SubjectData",
    "load_study",
    "nca_options",
    "read_table",
]

_TRUE = {"true", "1", "yes", "y", "t"}
_FALSE = {"false", "0", "no", "n", "f", ""}
_MAX_LISTED = 5


# --------------------------------------------------------------------------- tables
def read_table(path: str | Path) -> pd.DataFrame:
    """Read a CSV table as text (numbers are converted per column later)."""
    from ..tables import read_csv

    frame = read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    if frame.empty:
        raise PkcalcInputError("the table has a header but no rows", file=str(path))
    return frame


class Columns:
    """Header parsing for one table: name -> (column, unit).

    ``labels`` names each row in messages (default ``line N`` of a CSV file; tables
    built from SDTM say ``pc.xpt row 17 (PCSEQ 5)``); ``fields`` gives the source
    variable of a column for messages (SDTM: ``time`` is ``PCDTC``).
    """

    def __init__(self, frame: pd.DataFrame, file: str, *, labels=None,
                 fields: dict[str, str] | None = None) -> None:
        self.file = file
        self.frame = frame
        self.labels = labels
        self.fields = dict(fields or {})
        self.map: dict[str, tuple[str, str | None]] = {}
        problems = []
        for col in frame.columns:
            name, unit = parse_header(col)
            key = name.strip().lower()
            if key in self.map:
                problems.append(Problem(f"column '{name}' appears twice", file=file,
                                        field=str(col)))
            self.map[key] = (col, unit)
        if problems:
            raise PkcalcInputError(problems)

    def where(self, i: int) -> str:
        """The row in words: ``line 12`` (CSV) or the source row's label."""
        if self.labels is None:
            return f"line {i + 2}"
        return str(self.labels.iloc[i] if hasattr(self.labels, "iloc") else self.labels[i])

    def field(self, name: str) -> str:
        """The column (or source variable) called ``name`` in messages."""
        if name in self.fields:
            return self.fields[name]
        return str(self.map[name][0]) if name in self.map else name

    def has(self, name: str) -> bool:
        return name in self.map

    def text(self, name: str) -> pd.Series:
        return self.frame[self.map[name][0]].astype(str).str.strip()

    def numeric(self, name: str, kind: str, problems: list[Problem], *,
                required_unit: bool = True) -> tuple[pd.Series, Any]:
        """The column in canonical units (NaN where empty), and its UnitSpec."""
        col, unit = self.map[name]
        if unit is None and required_unit:
            problems.append(Problem("the column header declares no unit", file=self.file,
                                    field=str(col),
                                    expected=f"a header such as '{name} [unit]' with "
                                             f"{KINDS[kind]}"))
            return pd.Series(np.nan, index=self.frame.index), None
        try:
            spec = parse_unit(unit, kind, field=str(col)) if unit is not None else None
        except PkcalcInputError as exc:
            problems.extend(Problem(p.message, file=self.file, field=p.field,
                                    expected=p.expected) for p in exc.problems)
            return pd.Series(np.nan, index=self.frame.index), None
        column = self.frame[col]
        if pd.api.types.is_numeric_dtype(column) and not pd.api.types.is_bool_dtype(column):
            values = column.astype(float)       # a table built in memory: numbers already
            raw = None
            bad = pd.Series(np.isinf(values.to_numpy()), index=values.index)
        else:
            raw = column.astype(str).str.strip()
            values = pd.to_numeric(raw.where(raw != ""), errors="coerce")
            bad = values.isna() & (raw != "")
            bad |= np.isinf(values.fillna(0.0))
        shown = (lambda i: raw.iloc[i]) if raw is not None else (lambda i: f"{values.iloc[i]:g}")
        if bad.any():
            rows = np.flatnonzero(bad.to_numpy())[:_MAX_LISTED]
            examples = ", ".join(f"{self.where(i)}: '{shown(i)}'" for i in rows)
            more = f" and {int(bad.sum()) - len(rows)} more" if bad.sum() > len(rows) else ""
            problems.append(Problem(f"text or non-finite values in a numeric column ({examples}"
                                    f"{more})", file=self.file, field=self.field(name),
                                    expected="numbers"))
        factor = spec.factor if spec is not None else 1.0
        canonical = values * factor
        a = canonical.abs()
        outside = ~bad & canonical.notna() & (np.isinf(a) | ((a != 0) & (
            (a < NUMERIC_RANGE[0]) | (a > NUMERIC_RANGE[1]))))
        if outside.any():
            i = int(np.flatnonzero(outside.to_numpy())[0])
            problems.append(Problem(f"'{shown(i)}' ({self.where(i)}) is outside the range "
                                    f"pkcalc computes in (zero, or {NUMERIC_RANGE[0]:g} to "
                                    f"{NUMERIC_RANGE[1]:g} in canonical units)", file=self.file,
                                    field=self.field(name), expected="numbers of a realistic size"))
        return canonical, spec


def _require(cols: Columns, names: list[str], problems: list[Problem]) -> None:
    for n in names:
        if not cols.has(n):
            problems.append(Problem(f"missing column '{n}'", file=cols.file, field=n,
                                    expected=", ".join(names)))


#: Columns that trace a row back to its source (tables built from SDTM carry them); they
#: are kept in the analysis tables and never read as data.
TRACE_COLUMNS = frozenset({"source", "usubjid", "pcseq", "exseq", "ecseq", "visit", "pctpt",
                           "time_basis", "reference_dose", "treatment", "administration",
                           "specimen", "analyte", "studyid"})


def _warn_unknown(cols: Columns, known: set[str], warnings: list[str]) -> None:
    unknown = [c for k, (c, _) in cols.map.items() if k not in known and k not in TRACE_COLUMNS]
    if unknown:
        warnings.append(f"{cols.file}: columns ignored: {', '.join(map(str, unknown))}")


def _bool_column(cols: Columns, name: str, problems: list[Problem]) -> pd.Series:
    column = cols.frame[cols.map[name][0]]
    if pd.api.types.is_bool_dtype(column):
        return column.astype(bool)
    raw = cols.text(name).str.lower()
    bad = ~raw.isin(_TRUE | _FALSE)
    if bad.any():
        rows = np.flatnonzero(bad.to_numpy())[:_MAX_LISTED]
        problems.append(Problem(f"not true/false at {', '.join(cols.where(i) for i in rows)}",
                                file=cols.file, field=cols.field(name),
                                expected="true or false"))
    return raw.isin(_TRUE)


# --------------------------------------------------------------------------- loading
#: What a level drawn before time zero (the first dose) becomes: ``omit`` leaves a
#: measurable one out with a warning; ``drug_on_board`` takes it as the level already
#: present at the first dose (earlier therapy).  Levels below the LLOQ (or zero) before
#: the first dose are always the zero at the first dose.
PRE_DOSE_RULES = ("omit", "drug_on_board")


def _table(source, what: str) -> Columns:
    """A study table from a path, a file-like object or a pandas DataFrame (the same
    rules and messages; a frame's rows are named by their index)."""
    if isinstance(source, pd.DataFrame):
        if source.empty:
            raise PkcalcInputError("the table has no rows", file=f"the {what} frame")
        frame = source.copy()
        frame.columns = [str(c) for c in frame.columns]
        labels = [f"row {ix!r}" if not isinstance(ix, int | np.integer) else f"row {ix}"
                  for ix in frame.index]
        return Columns(frame.reset_index(drop=True), f"the {what} frame", labels=labels)
    if hasattr(source, "read"):
        from io import StringIO

        text = source.read()
        if isinstance(text, bytes):
            try:
                text = text.decode("utf-8-sig")
            except UnicodeDecodeError as exc:
                raise PkcalcInputError(f"is not UTF-8 text (byte at position {exc.start})",
                                       file=f"the {what} stream") from None
        frame = pd.read_csv(StringIO(text), dtype=str, keep_default_na=False,
                            skipinitialspace=True, index_col=False)
        if frame.empty:
            raise PkcalcInputError("the table has a header but no rows",
                                   file=f"the {what} stream")
        return Columns(frame, f"the {what} stream")
    if not isinstance(source, str | Path):
        raise PkcalcInputError(f"got {type(source).__name__}", field=what,
                               expected="a path, a file-like object or a pandas DataFrame")
    return Columns(read_table(source), str(source))


def load_study(levels, doses, subjects=None, *, pre_dose: str = "omit") -> Study:
    """Read and check the study tables.

    Parameters
    ----------
    levels : path, file-like or pandas.DataFrame
        ``subject, time [..], concentration [..]``, optional ``lloq [..]``, ``blq``.
    doses : path, file-like or pandas.DataFrame
        ``subject, start [..]`` and two of ``amount [..]``, ``rate [..]``,
        ``duration [..]`` (an amount alone is a bolus).
    subjects : path, file-like or pandas.DataFrame, optional
        ``subject, weight [..], ...`` covariates.
    pre_dose : {"omit", "drug_on_board"}
        What a measurable level drawn before the first dose becomes
        (:data:`PRE_DOSE_RULES`).

    Returns
    -------
    Study

    Raises
    ------
    PkcalcInputError
        For unusable tables (missing, empty, not CSV, missing columns or units,
        text in numeric columns).
    """
    lv = _table(levels, "levels")
    ds = _table(doses, "doses")
    sb = None if subjects is None else _table(subjects, "subjects")
    return study_from_tables(lv, ds, sb, pre_dose=pre_dose)


def study_from_tables(lv: Columns, ds: Columns, sb: Columns | None,
                      failures: Failures | None = None, *, pre_dose: str = "omit",
                      origins: dict[str, str] | None = None) -> Study:
    """A study from tables already read (CSV files, or tables built from SDTM); subjects
    with problems found earlier can be passed in ``failures``; ``origins`` gives the
    clock time of each subject's time zero when the tables hold hours already."""
    if pre_dose not in PRE_DOSE_RULES:
        raise PkcalcInputError(f"unknown rule '{pre_dose}'", field="pre_dose",
                               expected=" or ".join(PRE_DOSE_RULES))
    problems: list[Problem] = []
    warnings: list[str] = []
    _require(lv, ["subject", "time", "concentration"], problems)
    _require(ds, ["subject", "start"], problems)
    if problems:
        raise PkcalcInputError(problems)
    _warn_unknown(lv, {"subject", "time", "concentration", "lloq", "blq", "reference_time"},
                  warnings)
    _warn_unknown(ds, {"subject", "start", "amount", "rate", "duration"}, warnings)
    files = [lv.file, ds.file]
    covariates: dict[str, dict[str, float]] = {}
    if sb is not None:
        covariates = _read_subjects(sb, warnings)
        files.append(sb.file)
    lvl = _read_levels(lv, problems, warnings)
    dos = _read_doses(ds, problems)
    if ("clock" in lvl) != ("clock" in dos):
        problems.append(Problem("the levels and doses tables must both use clock times "
                                "(header '[clock]') or both relative times", file=lv.file,
                                field="time", expected="time [clock] with start [clock], or "
                                "time [h] with start [h]"))
    if problems:
        raise PkcalcInputError(problems)
    fails = failures if failures is not None else Failures()
    if "clock" in lvl:
        origins = _clock_to_hours(lvl, dos, fails, lv, ds)
    amount, duration = _dose_amounts(dos, covariates, fails, ds)
    blq = _level_checks(lvl, fails, lv)
    level_frame = pd.DataFrame({"subject": lvl["subject"], "time": lvl["time"],
                                "conc": lvl["conc"], "lloq": lvl["lloq"], "blq": blq,
                                "marked": lvl["blq_mark"],
                                "row": np.arange(len(lvl["time"])),
                                "reference": lvl.get("reference", np.nan)})
    dose_frame = pd.DataFrame({"subject": dos["subject"], "start": dos["start"],
                               "amount": amount, "duration": duration})
    _cross_checks(level_frame, dose_frame, covariates, fails, warnings, lv, ds)
    good = _subjects(level_frame, dose_frame, covariates, fails, lv, origins or {}, pre_dose,
                     warnings)
    return Study(good, fails.as_list(), warnings, files,
                 subjects_file=sb.file if sb is not None else None)


def _clock_to_hours(lvl, dos, fails: Failures, lv: Columns, ds: Columns) -> dict[str, str]:
    """Clock times -> hours since each subject's first dose (in place); the origins
    (the first dose's date-time as written, normalised).

    A subject whose date-times mix offsets and none is left out.
    """
    from ..clock import parse_clock

    d_sec, d_off = dos["clock"].seconds, dos["clock"].offset
    l_sec, l_off = lvl["clock"].seconds, lvl["clock"].offset
    d_sub = dos["subject"].to_numpy(object)
    l_sub = lvl["subject"].to_numpy(object)
    frame = pd.DataFrame({"subject": np.concatenate([d_sub, l_sub]),
                          "offset": np.concatenate([d_off, l_off]),
                          "ok": np.concatenate([~np.isnan(d_sec), ~np.isnan(l_sec)])})
    kinds = frame[frame["ok"]].groupby("subject")["offset"].agg(["any", "all"])
    mixed = set(kinds.index[kinds["any"] & ~kinds["all"]])
    for sid in sorted(mixed):
        fails(sid, "some date-times have a time-zone offset and some do not: the hours "
              "between them would be a guess", lv.file, lv.field("time"))
    starts = pd.DataFrame({"subject": d_sub, "sec": d_sec, "i": np.arange(d_sub.size)})
    starts = starts[~np.isnan(d_sec)]
    first = starts.loc[starts.groupby("subject")["sec"].idxmin()]
    origin_sec = dict(zip(first["subject"], first["sec"], strict=True))
    texts = ds.text("start").to_numpy(object)
    origins = {sid: parse_clock(texts[i]).isoformat() for sid, i in
               zip(first["subject"], first["i"], strict=True) if sid not in mixed}
    for table, sec, sub in ((dos, d_sec, d_sub), (lvl, l_sec, l_sub)):
        column = "start" if table is dos else "time"
        base = pd.Series(sub).map(origin_sec).to_numpy(float)
        hours = (sec - base) / 3600.0
        table[column] = pd.Series(hours, index=table[column].index)
    if "reference_clock" in lvl:
        base = pd.Series(l_sub).map(origin_sec).to_numpy(float)
        lvl["reference"] = pd.Series((lvl["reference_clock"].seconds - base) / 3600.0,
                                     index=lvl["time"].index)
    return origins


class Failures:
    """Problems per subject (a subject with any is left out of the study)."""

    def __init__(self) -> None:
        self.by_subject: dict[str, list[Problem]] = {}

    def __call__(self, sid: str, message: str, file: str, field: str | None = None) -> None:
        self.by_subject.setdefault(sid, []).append(
            Problem(message, file=file, item=f"subject '{sid}'", field=field))

    def __contains__(self, sid: str) -> bool:
        return sid in self.by_subject

    def as_list(self) -> list[tuple[str, PkcalcInputError]]:
        return [(f"subject '{sid}'", PkcalcInputError(p)) for sid, p in self.by_subject.items()]


def _read_subjects(sb: Columns, warnings: list[str]) -> dict[str, dict[str, float | str]]:
    """The subjects table by subject: weight, initial_concentration, numeric covariates and
    text covariates (categorical factors; an empty cell is a missing value)."""
    problems: list[Problem] = []
    _require(sb, ["subject"], problems)
    if problems:
        raise PkcalcInputError(problems)
    ids = sb.text("subject")
    table: dict[str, pd.Series] = {}
    for key, (_col, unit) in sb.map.items():
        if key == "subject" or key in TRACE_COLUMNS:
            continue
        if key == "weight":
            table["weight"], _ = sb.numeric("weight", "weight", problems)
        elif key == "initial_concentration":
            table[key], _ = sb.numeric(key, "concentration", problems)
        else:
            # a covariate keeps the name its header gives it (case included)
            name = parse_header(_col)[0].strip()
            column = sb.frame[sb.map[key][0]]
            if pd.api.types.is_numeric_dtype(column) and not pd.api.types.is_bool_dtype(column):
                table[name] = column.astype(float)
                continue
            raw = sb.text(key)
            numeric = pd.to_numeric(raw.where(raw != ""), errors="coerce")
            if unit is not None or numeric.notna().sum() == (raw != "").sum():
                table[name] = numeric
            else:
                table[name] = raw.where(raw.str.strip() != "").str.strip()
    dup = ids[ids.duplicated()]
    if len(dup):
        problems.append(Problem(f"subject '{dup.iloc[0]}' appears twice", file=sb.file,
                                field=sb.field("subject")))
    for key, bad, rule in (("initial_concentration", lambda x: x < 0, "must not be negative"),
                           ("weight", lambda x: x <= 0, "must be positive")):
        if key in table and bad(table[key]).any():
            i = int(np.flatnonzero(bad(table[key]).to_numpy())[0])
            problems.append(Problem(f"{key} {rule} ({sb.where(i)})", file=sb.file,
                                    field=sb.field(key)))
    if problems:
        raise PkcalcInputError(problems)
    if not table:
        return {sid: {} for sid in ids}
    frame = pd.DataFrame({k: v.reset_index(drop=True) for k, v in table.items()})
    records = frame.astype(object).where(frame.notna(), None).to_dict("records")
    return {sid: {k: (x if isinstance(x, str) else float(x)) for k, x in r.items()
                  if x is not None}
            for sid, r in zip(ids, records, strict=True)}


CLOCK_UNITS = ("clock", "iso 8601", "iso8601")


def _is_clock(cols: Columns, name: str) -> bool:
    """A time column whose header says it holds clock times: ``time [clock]``."""
    unit = cols.map[name][1] if cols.has(name) else None
    return unit is not None and unit.strip().lower() in CLOCK_UNITS


def _clock_column(cols: Columns, name: str, problems: list[Problem]):
    """Date-times of a clock column (:class:`~pkcalc.clock.ClockArray`; NaN where a
    cell is empty or unusable, with the first three problems reported)."""
    from ..clock import EMPTY, ISO_FORM, MINUTE, parse_clock_array

    text = cols.text(name).to_numpy(object)
    clock = parse_clock_array(text)
    bad = np.flatnonzero((clock.precision != EMPTY) & (clock.precision < MINUTE))
    for i in bad[:3]:
        problems.append(Problem(f"{clock.why(int(i), text[i])} ({cols.where(int(i))})",
                                file=cols.file, field=cols.field(name), expected=ISO_FORM))
    clock.seconds[bad] = np.nan
    return clock


#: A result text that says the level is below the limit of quantification: ``<0.5``,
#: ``<LLOQ``, ``BLQ``, ``BQL``, ``NQ``, ``below LLOQ``, ``not quantifiable`` -- one rule
#: for study tables and SDTM's PCSTRESC.
BLQ_TEXT = re.compile(r"^\s*(?:<|BLQ|BQL|LLOQ|NQ|BELOW|NOT QUANTIFIABLE)", re.IGNORECASE)
#: A study-table cell ``<x``: the limit in the column's unit.
_BLQ_LIMIT = re.compile(r"^<\s*((?:\d+(?:\.\d*)?|\.\d+)(?:[eE][-+]?\d+)?)$")


def _blq_text(lv: Columns, warnings: list[str]) -> tuple[pd.Series, pd.Series] | None:
    """Concentration cells written as a BLQ text: which rows, and the limit a ``<x`` cell
    states (in the column's unit; NaN for words).  The cells are emptied in a copy of the
    table so the column reads as numbers; None when there are none."""
    col = lv.map["concentration"][0]
    column = lv.frame[col]
    if pd.api.types.is_numeric_dtype(column) and not pd.api.types.is_bool_dtype(column):
        return None
    raw = column.astype(str).str.strip()
    limit = pd.to_numeric(raw.str.extract(_BLQ_LIMIT, expand=False), errors="coerce")
    # words only: a cell with another number in it ('<0.5 ng/mL') stays text, refused --
    # its unit may not be the column's
    words = raw.str.match(BLQ_TEXT) & ~raw.str.contains(r"\d")
    mark = limit.notna() | words
    if not mark.any():
        return None
    lv.frame = lv.frame.copy()
    lv.frame[col] = raw.where(~mark, "")
    rows = np.flatnonzero(mark.to_numpy())
    shown = ", ".join(f"{lv.where(int(i))}: '{raw.iloc[i]}'" for i in rows[:3])
    warnings.append(f"{lv.file}: {rows.size} concentration cell(s) written as below the "
                    f"limit of quantification are BLQ levels ({shown}"
                    f"{' ...' if rows.size > 3 else ''}); the limit is the number after '<', "
                    "else the lloq column")
    return mark, limit


def _read_levels(lv: Columns, problems: list[Problem], warnings: list[str]
                 ) -> dict[str, Any]:
    """The levels table's columns in canonical units (clock times kept as seconds
    until the subject's first dose is known); BLQ texts in the concentration column
    (:func:`_blq_text`) become BLQ levels."""
    out: dict[str, Any] = {"subject": lv.text("subject")}
    if _is_clock(lv, "time"):
        out["clock"] = _clock_column(lv, "time", problems)
        out["time"] = pd.Series(np.where(np.isnan(out["clock"].seconds), np.nan, 0.0),
                                index=lv.frame.index)
    else:
        out["time"], _ = lv.numeric("time", "time", problems)
    texts = _blq_text(lv, warnings)
    out["conc"], spec = lv.numeric("concentration", "concentration", problems)
    index = out["time"].index
    out["lloq"] = (lv.numeric("lloq", "concentration", problems)[0] if lv.has("lloq")
                   else pd.Series(np.nan, index=index))
    out["blq_mark"] = (_bool_column(lv, "blq", problems) if lv.has("blq")
                       else pd.Series(False, index=index))
    if texts is not None:
        mark, limit = texts
        stated = limit * (spec.factor if spec is not None else np.nan)
        given = out["lloq"]
        differ = mark & stated.notna() & given.notna() & ~np.isclose(stated, given,
                                                                     rtol=1e-9, atol=0)
        for i in np.flatnonzero(differ.to_numpy())[:_MAX_LISTED]:
            problems.append(Problem(
                f"the level says below {limit.iloc[i]:g} ({stated.iloc[i]:g} mg/L) but its "
                f"lloq is {given.iloc[i]:g} mg/L ({lv.where(int(i))})", file=lv.file,
                field=lv.field("lloq"), expected="one limit per level"))
        out["lloq"] = given.where(given.notna() | ~mark, stated)
        out["blq_mark"] = out["blq_mark"] | mark
    if lv.has("reference_time"):                # the start of the dose each level refers to
        if _is_clock(lv, "reference_time"):
            out["reference_clock"] = _clock_column(lv, "reference_time", problems)
            out["reference"] = pd.Series(np.nan, index=index)
        else:
            out["reference"], _ = lv.numeric("reference_time", "time", problems)
    if out["subject"].eq("").any():
        i = int(np.flatnonzero(out["subject"].eq("").to_numpy())[0])
        problems.append(Problem(f"empty subject at {lv.where(i)}", file=lv.file,
                                field=lv.field("subject")))
    if out["time"].isna().any() and not problems:
        i = int(np.flatnonzero(out["time"].isna().to_numpy())[0])
        problems.append(Problem(f"missing time at {lv.where(i)}", file=lv.file,
                                field=lv.field("time")))
    return out


def _read_doses(ds: Columns, problems: list[Problem]) -> dict[str, Any]:
    """The doses table's columns in canonical units (per-kg columns still per kg)."""
    out: dict[str, Any] = {"subject": ds.text("subject"), "given": {}, "specs": {}}
    if _is_clock(ds, "start"):
        out["clock"] = _clock_column(ds, "start", problems)
        out["start"] = pd.Series(np.where(np.isnan(out["clock"].seconds), np.nan, 0.0),
                                 index=ds.frame.index)
    else:
        out["start"], _ = ds.numeric("start", "time", problems)
    for name, kind in (("amount", "amount"), ("rate", "rate"), ("duration", "time")):
        if ds.has(name):
            out["given"][name], out["specs"][name] = ds.numeric(name, kind, problems)
    if not out["given"] or list(out["given"]) in (["rate"], ["duration"]):
        problems.append(Problem("the doses table needs amount, or two of amount, rate, "
                                "duration", file=ds.file, field="amount",
                                expected="amount [..] and optionally rate [..] or duration [..]"))
    if out["start"].isna().any() and not problems:
        i = int(np.flatnonzero(out["start"].isna().to_numpy())[0])
        problems.append(Problem(f"missing start at {ds.where(i)}", file=ds.file,
                                field=ds.field("start")))
    return out


def _dose_amounts(dos: dict[str, Any], covariates, fails: Failures, ds: Columns):
    """Amount and duration per dose row (per-kg columns times the weight); problems
    per subject."""
    d_subject, given = dos["subject"], dict(dos["given"])
    weight_of = d_subject.map(lambda s: covariates.get(s, {}).get("weight", np.nan))
    per_kg_missing = pd.Series(False, index=d_subject.index)
    for name, spec in dos["specs"].items():
        if spec is not None and spec.per_kg:
            given[name] = given[name] * weight_of
            per_kg_missing |= weight_of.isna()
    amount, duration, dose_problem = _resolve_doses(given)
    for i in np.flatnonzero((dose_problem != "").to_numpy() & ~per_kg_missing.to_numpy()):
        fails(d_subject.iloc[i], f"{dose_problem.iloc[i]} ({ds.where(i)})", ds.file)
    for i in np.flatnonzero(per_kg_missing.to_numpy()):
        fails(d_subject.iloc[i], f"a per-kg dose needs the subject's weight ({ds.where(i)}): "
              + ("give it in the subjects table" if covariates else
                 "no subjects table with a weight column was given"), ds.file, "weight")
    for i in np.flatnonzero((dos["start"] < 0).to_numpy()):
        fails(d_subject.iloc[i], f"negative dose start ({ds.where(i)})", ds.file,
              ds.field("start"))
    return amount, duration


def _level_checks(lvl: dict[str, pd.Series], fails: Failures, lv: Columns) -> pd.Series:
    """BLQ per level (marked, a number under its LLOQ, or empty with an LLOQ) and the
    level problems per subject (levels before time zero are pre-dose levels, handled
    per subject later)."""
    subject, conc, lloq, mark = (lvl[k] for k in ("subject", "conc", "lloq", "blq_mark"))
    blq = mark | (conc < lloq) | (conc.isna() & lloq.notna())
    f_blq, f_lloq, f_conc = lv.field("blq"), lv.field("lloq"), lv.field("concentration")
    for i in np.flatnonzero((mark & (conc > lloq)).to_numpy()):
        fails(subject.iloc[i], f"marked BLQ but the level {conc.iloc[i]:g} mg/L is above its "
              f"LLOQ {lloq.iloc[i]:g} mg/L ({lv.where(i)})", lv.file, f_blq)
    for i in np.flatnonzero((mark & lloq.isna() & conc.isna()).to_numpy()):
        fails(subject.iloc[i], f"a BLQ level needs its LLOQ ({lv.where(i)})", lv.file, f_lloq)
    for i in np.flatnonzero((conc.isna() & ~blq).to_numpy()):
        fails(subject.iloc[i], f"missing concentration ({lv.where(i)}); a level below the "
              "limit of quantification needs blq = true and its lloq", lv.file, f_conc)
    for i in np.flatnonzero((conc < 0).to_numpy()):
        fails(subject.iloc[i], f"negative concentration {conc.iloc[i]:g} mg/L ({lv.where(i)})",
              lv.file, f_conc)
    return blq


def _cross_checks(level_frame, dose_frame, covariates, fails: Failures, warnings: list[str],
                  lv: Columns, ds: Columns) -> None:
    """Duplicate sample times, and subjects present in one table only."""
    dup = level_frame.duplicated(["subject", "time"], keep=False)
    for sid, rows in level_frame[dup].groupby("subject")["row"]:
        fails(sid, f"duplicate sample times ({', '.join(lv.where(int(i)) for i in rows)})",
              lv.file, lv.field("time"))
    _dose_record_checks(dose_frame, warnings, ds)
    level_ids = set(level_frame["subject"].unique())
    dose_ids = set(dose_frame["subject"].unique())
    for sid in sorted(level_ids - dose_ids):
        fails(sid, "has levels but no doses", ds.file, ds.field("subject"))
    only_doses = sorted(dose_ids - level_ids)
    if only_doses:
        warnings.append(f"subjects with doses but no levels (left out): "
                        f"{_listed(only_doses)}")
    if covariates:
        only_cov = sorted(set(covariates) - level_ids)
        if only_cov:
            warnings.append(f"subjects in the subjects table only: {_listed(only_cov)}")
        no_cov = sorted(level_ids - set(covariates))
        if no_cov:
            warnings.append(f"subjects without a row in the subjects table: "
                            f"{_listed(no_cov)}")


def _dose_record_checks(dose_frame: pd.DataFrame, warnings: list[str], ds: Columns) -> None:
    """Identical dose records, and infusions of a subject that overlap: legal (the doses
    add up) but often a copied row -- warned, naming the rows."""
    frame = dose_frame.assign(row=np.arange(len(dose_frame)))
    frame = frame[frame["amount"].notna() & frame["start"].notna()]
    same = frame.duplicated(["subject", "start", "amount", "duration"], keep=False)
    for sid, rows in frame[same].groupby("subject")["row"]:
        warnings.append(f"subject '{sid}': identical dose records "
                        f"({', '.join(ds.where(int(i)) for i in rows)}): both are given (the "
                        "doses add up); remove one if it is a copy")
    inf = frame[frame["duration"] > 0].drop_duplicates(
        ["subject", "start", "amount", "duration"]).sort_values(["subject", "start"],
                                                                kind="stable")
    sub = inf["subject"].to_numpy(object)
    start = inf["start"].to_numpy(float)
    end = start + inf["duration"].to_numpy(float)
    same_subject = sub[1:] == sub[:-1]
    overlap = np.flatnonzero(same_subject & (start[1:] < end[:-1] - 1e-9)) + 1
    for i in overlap[:10]:
        warnings.append(f"subject '{sub[i]}': the infusion of "
                        f"{ds.where(int(inf['row'].iloc[i]))} starts before the one of "
                        f"{ds.where(int(inf['row'].iloc[i - 1]))} ends: overlapping infusions "
                        "add up")


def _listed(names: list[str], most: int = 10) -> str:
    more = f" and {len(names) - most} more" if len(names) > most else ""
    return ", ".join(names[:most]) + more


def _pre_dose(sid: str, t, c, blq, rows, cov: dict, rule: str, lv: Columns,
              notes: list[str], warnings: list[str]) -> tuple[np.ndarray, float | None]:
    """Levels before time zero: below the LLOQ (or zero) they are the zero at the first
    dose; a measurable one is left out with a warning (``omit``) or becomes the drug on
    board at the first dose (``drug_on_board``).  Returns the mask of the levels kept
    (from time zero on) and the drug on board taken from a pre-dose level (None when
    none)."""
    pre = t < 0
    if not pre.any():
        return ~pre, None
    zero = pre & (blq | (c == 0))
    if zero.any():
        notes.append(f"{int(zero.sum())} pre-dose level(s) below the LLOQ or zero: the level "
                     "is zero at the first dose")
    measurable = np.flatnonzero(pre & ~zero)
    on_board = None
    if measurable.size:
        j = int(measurable[-1])
        where = lv.where(int(rows[j]))
        if rule == "drug_on_board" and "initial_concentration" not in cov:
            on_board = float(c[j])
            notes.append(f"pre-dose level {on_board:.4g} mg/L ({where}) taken as the drug on "
                         "board at the first dose")
        elif rule == "drug_on_board":
            notes.append(f"pre-dose level ({where}) left out: the subjects table gives the "
                         "initial concentration")
        else:
            warnings.append(f"subject '{sid}': measurable pre-dose level {c[j]:.4g} mg/L "
                            f"{-t[j]:.4g} h before the first dose ({where}): left out (drug "
                            "from earlier therapy?); use the pre-dose rule 'drug_on_board' to "
                            "take it as the level at the first dose")
            notes.append(f"{measurable.size} measurable pre-dose level(s) left out")
    return ~pre, on_board


def _subjects(level_frame, dose_frame, covariates, fails: Failures, lv: Columns,
              origins: dict[str, str], pre_dose: str, warnings: list[str]
              ) -> list[SubjectData]:
    """One SubjectData per subject without problems (numpy slices of the tables sorted
    once, in the order subjects first appear in the levels table)."""
    codes, names = pd.factorize(level_frame["subject"])       # in order of appearance
    d_codes = pd.Index(names).get_indexer(dose_frame["subject"])
    t = level_frame["time"].to_numpy(float)
    conc = level_frame["conc"].to_numpy(float)
    lloq = level_frame["lloq"].to_numpy(float)
    blq = level_frame["blq"].to_numpy(bool)
    marked = level_frame["marked"].to_numpy(bool)
    rows = level_frame["row"].to_numpy(int)
    reference = level_frame["reference"].to_numpy(float)
    l_order = np.argsort(codes, kind="stable")               # by subject, file order within
    d_start = dose_frame["start"].to_numpy(float)
    d_order = np.lexsort((d_start, d_codes))
    d_amount = dose_frame["amount"].to_numpy(float)
    d_duration = dose_frame["duration"].to_numpy(float)
    l_bounds = np.searchsorted(codes[l_order], np.arange(len(names) + 1))
    d_bounds = np.searchsorted(d_codes[d_order], np.arange(len(names) + 1))
    n = len(names)
    sorted_codes = codes[l_order]
    backwards = np.zeros(n, bool)      # a subject's levels not in time order
    step = np.diff(t[l_order]) < 0
    backwards[sorted_codes[1:][step & (sorted_codes[1:] == sorted_codes[:-1])]] = True
    pre = t < 0
    pre_measured = np.bincount(codes, weights=pre & ~(blq | (conc == 0)), minlength=n) > 0
    pre_zero = np.bincount(codes, weights=pre & (blq | (conc == 0)), minlength=n).astype(int)
    good: list[SubjectData] = []
    for k, sid in enumerate(names):
        if sid in fails:
            continue
        idx = l_order[l_bounds[k]:l_bounds[k + 1]]
        notes: list[str] = []
        if backwards[k]:
            notes.append("levels were not in time order; sorted by time")
            idx = idx[np.argsort(t[idx], kind="stable")]
        di = d_order[d_bounds[k]:d_bounds[k + 1]]
        cov = covariates.get(sid, {})
        on_board = None
        if pre_measured[k]:
            keep, on_board = _pre_dose(sid, t[idx], conc[idx], blq[idx], rows[idx], cov,
                                       pre_dose, lv, notes, warnings)
            idx = idx[keep]
        elif pre_zero[k]:
            notes.append(f"{pre_zero[k]} pre-dose level(s) below the LLOQ or zero: the level "
                         "is zero at the first dose")
            idx = idx[~pre[idx]]
        if not idx.size or (t[idx] <= d_start[di].min()).all():
            fails(sid, "no level after the first dose", lv.file, lv.field("time"))
            continue
        n_under = int((blq[idx] & ~marked[idx] & ~np.isnan(conc[idx])).sum())
        if n_under:
            notes.append(f"{n_under} level(s) below their LLOQ treated as BLQ")
        initial = on_board if on_board is not None else cov.get("initial_concentration", 0.0)
        good.append(SubjectData(
            subject=str(sid), time=t[idx], conc=conc[idx], lloq=lloq[idx], blq=blq[idx],
            rows=rows[idx], dose_start=d_start[di], dose_amount=d_amount[di],
            dose_duration=d_duration[di],
            covariates={k: x for k, x in cov.items() if k != "initial_concentration"},
            notes=tuple(notes), initial_concentration=initial,
            clock_origin=origins.get(sid),
            reference_time=reference[idx] if np.isfinite(reference[idx]).any() else None))
    return good


def _resolve_doses(given: dict[str, pd.Series]) -> tuple[pd.Series, pd.Series, pd.Series]:
    """Amount and duration per row from two of amount/rate/duration (vectorised)."""
    index = next(iter(given.values())).index
    nan = pd.Series(np.nan, index=index)
    amount = given.get("amount", nan)
    rate = given.get("rate", nan)
    duration = given.get("duration", nan)
    a, r, d = amount.notna(), rate.notna(), duration.notna()
    problem = pd.Series("", index=index, dtype=object)
    out_amount = amount.copy()
    out_duration = duration.copy()
    # amount alone -> bolus
    out_duration = out_duration.where(~(a & ~r & ~d), 0.0)
    # rate + duration
    out_amount = out_amount.where(~(~a & r & d), rate * duration)
    # amount + rate
    with np.errstate(divide="ignore", invalid="ignore"):
        out_duration = out_duration.where(~(a & r & ~d), amount / rate)
    three = a & r & d
    disagree = three & ~np.isclose(rate * duration, amount, rtol=1e-6, atol=0)
    problem = problem.mask(disagree, "amount differs from rate x duration")
    problem = problem.mask(~a & ~(r & d), "a dose needs an amount, or a rate and a duration")
    negative = (amount < 0) | (rate < 0) | (duration < 0)
    problem = problem.mask(negative, "negative amount, rate or duration")
    problem = problem.mask(r & (rate <= 0) & a & ~d, "rate must be positive")
    problem = problem.mask(r & d & (duration <= 0), "an infusion rate needs a duration > 0")
    return out_amount, out_duration, problem


# --------------------------------------------------------------------------- options
def _tolerance(value: Any, field: str) -> tuple[float, float]:
    """``"10%,1 h"`` (or ``["10%", "1 h"]``) -> (0.10, 1.0): a share and a time."""
    from ..units import to_canonical

    parts = value if isinstance(value, list) else str(value).split(",")
    expected = "a percentage and a time, the larger applies, e.g. '10%,1 h'"
    if len(parts) != 2:
        raise PkcalcInputError(f"'{value}' is not a percentage and a time", field=field,
                               expected=expected)
    share = str(parts[0]).strip()
    if not share.endswith("%"):
        raise PkcalcInputError(f"'{share}' is not a percentage", field=field, expected=expected)
    try:
        fraction = float(share[:-1]) / 100
    except ValueError:
        raise PkcalcInputError(f"'{share}' is not a percentage", field=field,
                               expected=expected) from None
    hours = to_canonical(str(parts[1]).strip(), "time", field=field)
    if not (0 <= fraction <= 1) or not (0 <= hours <= 1e4):
        raise PkcalcInputError(f"'{value}' is outside 0-100 % or 0-10,000 h", field=field,
                               expected=expected)
    return fraction, hours


#: The keys of a study's ``[nca]`` table (and of ``nca_study``'s keywords).
NCA_KEYS = ("auc_method", "blq", "terminal_points", "slope_tolerance", "extrapolation_limit",
            "interval", "interval_tolerance", "duration_tolerance")


def nca_options(raw: dict[str, Any] | None, *, file: str | None = None) -> NcaOptions:
    """Validate the ``[nca]`` options (or the same keys from the command line).

    Keys: ``auc_method`` (``linear_up_log_down`` | ``linear``), ``blq``
    (``leading_zero`` | ``zero`` | ``drop``), ``terminal_points`` (subject ->
    list of times with units), ``r2_tolerance``, ``extrapolation_limit`` (percent),
    ``interval`` (``each`` | ``first`` | ``last`` | a dose number),
    ``interval_tolerance`` and ``duration_tolerance`` (a percentage and a time, the
    larger applies: ``"10%,1 h"`` or ``["10%", "1 h"]``).
    """
    from ..units import to_canonical

    raw = dict(raw or {})
    problems: list[Problem] = []
    out: dict[str, Any] = {}
    allowed = set(NCA_KEYS)
    if "r2_tolerance" in raw and "slope_tolerance" not in raw:
        raw = dict(raw)
        glossary.former("r2_tolerance", "slope_tolerance", f"{file}: nca")
        raw["slope_tolerance"] = raw.pop("r2_tolerance")
    for key in sorted(set(raw) - allowed):
        problems.append(Problem("unknown key", file=file, field=f"nca.{key}",
                                expected=", ".join(sorted(allowed))))
    method = glossary.canonical_value(raw.get("auc_method", "linear_up_log_down"),
                                      f"{file}: nca.auc_method")
    if method not in NCA_AUC_METHODS:
        problems.append(Problem(f"unknown AUC method '{method}'", file=file,
                                field="nca.auc_method", expected=", ".join(NCA_AUC_METHODS)))
    out["auc_method"] = method
    rule = raw.get("blq", "leading_zero")
    if rule not in NCA_BLQ_RULES:
        problems.append(Problem(f"unknown BLQ rule '{rule}'", file=file, field="nca.blq",
                                expected=", ".join(NCA_BLQ_RULES)))
    out["blq_rule"] = rule
    for key, lo, hi in (("slope_tolerance", 0.0, 0.1), ("extrapolation_limit", 0.0, 100.0)):
        if key in raw:
            value = raw[key]
            if not isinstance(value, int | float) or isinstance(value, bool) \
                    or not lo <= value <= hi:
                problems.append(Problem(f"must be a number from {lo:g} to {hi:g}", file=file,
                                        field=f"nca.{key}"))
            else:
                out["r2_tolerance" if key == "slope_tolerance" else key] = float(value)
    if "interval" in raw:
        value = str(raw["interval"]).strip().lower()
        if value in NCA_INTERVALS or (value.isdigit() and int(value) >= 1):
            out["interval"] = value
        else:
            problems.append(Problem(f"unknown interval '{raw['interval']}'", file=file,
                                    field="nca.interval",
                                    expected="each, first, last or a dose number such as 3"))
    for key in ("interval_tolerance", "duration_tolerance"):
        if key in raw:
            try:
                out[key] = _tolerance(raw[key], f"nca.{key}")
            except PkcalcInputError as exc:
                problems += [Problem(p.message, file=file, field=p.field, expected=p.expected)
                             for p in exc.problems]
    points = raw.get("terminal_points") or {}
    if not isinstance(points, dict):
        problems.append(Problem("must map subjects to lists of times", file=file,
                                field="nca.terminal_points"))
        points = {}
    terminal = {}
    for sid, times in points.items():
        try:
            if not isinstance(times, list) or len(times) < 2:
                raise PkcalcInputError("give at least two times")
            terminal[str(sid)] = tuple(to_canonical(x, "time",
                                                    field=f"nca.terminal_points.{sid}")
                                       for x in times)
        except PkcalcInputError as exc:
            problems += [Problem(p.message, file=file, field=f"nca.terminal_points.{sid}",
                                 expected="a list of times such as ['8 h', '12 h', '24 h']")
                         for p in exc.problems]
    out["terminal_points"] = terminal
    if problems:
        raise PkcalcInputError(problems)
    return NcaOptions(**out)
