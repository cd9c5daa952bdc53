"""The ``[attainment]`` table of ``pkcalc attainment`` and the patients table.

```toml
title = "Invented: share of patients on target"
[attainment]
study = "demo-sparse.toml"     # a population estimated from this study (its [population]
                                # options), or prior = a [prior] table or a prior file
subjects = "patients.csv"      # covariates of real or virtual patients (resampled), or
                                # their own clearance and volume (used as they are)
patients = 100000              # virtual patients drawn
seed = 1
doses = ["500 mg", "1 g"]      # with intervals and infusion_time ...
intervals = ["8 h", "12 h"]
infusion_time = "1 h"
# rates = ["20 mg/h", "40 mg/h"]   # ... or continuous infusions
peak = ["20 mg/L", "40 mg/L"]  # windows (either end may be "-": open)
trough = ["5 mg/L", "15 mg/L"]
auc_24 = ["400 mg*h/L", "600 mg*h/L"]
attainment_level = "90%"       # the share the lowest dose must reach
bands = { column = "crcl", edges = [30, 60, 90] }   # in the column's own unit
```
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from pydantic import Field

from ..errors import PkcalcInputError, Problem
from .base import Collector, LenientModel, read_toml
from .design_table import _attainment_level

__all__ = ["AttainmentRequest", "AttainmentSpec", "load_attainment_file", "patient_table"]

#: Most patients a table may hold, and most grid points per axis.
MAX_TABLE_ROWS = 1_000_000
MAX_GRID = 100


class AttainmentSpec(LenientModel):
    study: str | None = None
    prior: dict[str, Any] | str | None = None
    subjects: str | None = None
    patients: int | None = None
    seed: int | None = None
    doses: list[Any] | None = None
    intervals: list[Any] | None = None
    infusion_time: Any = None
    rates: list[Any] | None = None
    peak: list[Any] | None = Field(default=None, min_length=2, max_length=2)
    trough: list[Any] | None = Field(default=None, min_length=2, max_length=2)
    auc_24: list[Any] | None = Field(default=None, min_length=2, max_length=2)
    window: list[Any] | None = Field(default=None, min_length=2, max_length=2)
    attainment_level: float | str | None = None
    bands: dict[str, Any] | None = None


@dataclass
class AttainmentRequest:
    """A validated request (canonical units; paths resolved against the TOML file)."""

    title: str | None
    study: Path | None
    prior: Any
    subjects: Path | None
    patients: int
    seed: int
    regimens: list[tuple[float | None, float | None, float, float | None]]
    targets: dict[str, tuple[float | None, float | None] | None]
    level: float
    band_column: str | None
    band_edges: list[float]
    file: str


def _window(col: Collector, raw, kind: str, name: str):
    if raw is None:
        return None
    ends = []
    for i, x in enumerate(raw):
        if isinstance(x, str) and x.strip() in ("-", ""):
            ends.append(None)
        else:
            ends.append(col.q(x, kind, f"attainment.{name}[{i}]", nonnegative=True))
    lo, hi = ends
    if lo is None and hi is None:
        col.add("give at least one end", f"attainment.{name}", "['20 mg/L', '40 mg/L']")
        return None
    if lo is not None and hi is not None and lo > hi:
        col.add(f"low {lo:g} is above high {hi:g}", f"attainment.{name}", "[low, high]")
        return None
    return (lo, hi)


def _grid(col: Collector, raw, kind: str, name: str) -> list[float]:
    if raw is None:
        return []
    if not 1 <= len(raw) <= MAX_GRID:
        col.add(f"give 1 to {MAX_GRID} values, got {len(raw)}", f"attainment.{name}")
        return []
    values = [col.q(x, kind, f"attainment.{name}[{i}]", positive=True)
              for i, x in enumerate(raw)]
    return sorted({x for x in values if x is not None})


def load_attainment_file(path: str | Path, *, patients: int | None = None,
                         seed: int | None = None) -> AttainmentRequest:
    """Read and check an attainment file (every problem reported at once)."""
    from pydantic import ValidationError

    from .base import validation_problems

    data = read_toml(path)
    file = str(path)
    unknown = sorted(set(data) - {"title", "attainment"})
    if unknown or not isinstance(data.get("attainment"), dict):
        raise PkcalcInputError("an attainment file holds an [attainment] table (and an "
                               "optional title)", file=file,
                               field=unknown[0] if unknown else "attainment")
    try:
        spec = AttainmentSpec.model_validate(data["attainment"])
    except ValidationError as exc:
        raise PkcalcInputError([Problem(p.message, file=file, field=p.field,
                                        expected=p.expected)
                                for p in validation_problems(exc, prefix="attainment.")]
                               ) from None
    col = Collector()
    spec.unknown_keys(col, "attainment.")
    base = Path(path).parent

    def ref(x):
        if x is None:
            return None
        p = Path(x)
        return p if p.is_absolute() else base / p

    if spec.study is not None and spec.prior is not None:
        col.add("give a study (a population estimated from it) or a prior, not both",
                "attainment.study")
    prior = None
    if spec.prior is not None:
        from .fitopts import load_prior, parse_prior

        try:
            prior = parse_prior(spec.prior, file=file) if isinstance(spec.prior, dict) \
                else load_prior(ref(spec.prior))
        except PkcalcInputError as exc:
            col.problems.extend(exc.problems)
    if spec.study is None and spec.prior is None and spec.subjects is None:
        col.add("say where the patients come from: a study, a prior, or a subjects table "
                "with each patient's clearance and volume", "attainment.study")
    n = patients if patients is not None else (
        spec.patients if spec.patients is not None else 100_000)
    if not 1 <= n <= 10_000_000:
        col.add(f"patients must be 1 to 10,000,000, got {n}", "attainment.patients")
    s = seed if seed is not None else (spec.seed if spec.seed is not None else 1)
    if not 0 <= s < 2**32:
        col.add(f"seed must be 0 to 4294967295, got {s}", "attainment.seed")
    doses = _grid(col, spec.doses, "amount", "doses")
    intervals = _grid(col, spec.intervals, "time", "intervals")
    rates = _grid(col, spec.rates, "rate", "rates")
    t_inf = col.q(spec.infusion_time, "time", "attainment.infusion_time", nonnegative=True)
    regimens: list[tuple[float | None, float | None, float, float | None]] = []
    if rates and (doses or intervals):
        col.add("give doses with intervals, or rates, not both", "attainment.rates")
    elif rates:
        regimens = [(None, None, 0.0, r) for r in rates]
    elif doses and intervals:
        t_inf = t_inf or 0.0
        if any(t_inf > tau for tau in intervals):
            col.add(f"the infusion time {t_inf:g} h is longer than an interval",
                    "attainment.infusion_time")
        regimens = [(d, tau, t_inf, None) for tau in intervals for d in doses]
    else:
        col.add("give doses and intervals (repeated infusions) or rates (continuous)",
                "attainment.doses")
    if len(regimens) > 400:
        col.add(f"{len(regimens)} regimens, more than 400", "attainment.doses")
    targets = {"peak": _window(col, spec.peak, "concentration", "peak"),
               "trough": _window(col, spec.trough, "concentration", "trough"),
               "auc_24": _window(col, spec.auc_24, "auc", "auc_24"),
               "level": _window(col, spec.window, "concentration", "window")}
    if rates and (targets["peak"] or targets["trough"]):
        col.add("a continuous infusion has a level window, not peak or trough targets",
                "attainment.peak", "window = ['10 mg/L', '15 mg/L']")
    if not any(targets.values()):
        col.add("give at least one target", "attainment.peak",
                "peak, trough, auc_24 or window")
    level = _attainment_level(col, spec.attainment_level)
    band_column, edges = None, []
    if spec.bands is not None:
        extra = sorted(set(spec.bands) - {"column", "edges"})
        column = spec.bands.get("column")
        raw_edges = spec.bands.get("edges")
        if extra or not isinstance(column, str) or not isinstance(raw_edges, list) or \
                not raw_edges or not all(isinstance(x, int | float) and not isinstance(x, bool)
                                         for x in raw_edges):
            col.add("bands need a column and edges (numbers in the column's unit)",
                    "attainment.bands", "{ column = 'crcl', edges = [30, 60, 90] }")
        elif sorted(raw_edges) != raw_edges or len(set(raw_edges)) != len(raw_edges) \
                or len(raw_edges) > 20:
            col.add("edges must increase (at most 20)", "attainment.bands.edges")
        else:
            band_column, edges = column, [float(x) for x in raw_edges]
        if spec.subjects is None:
            col.add("bands need a subjects table with that column", "attainment.bands")
    if col.problems:
        raise PkcalcInputError([Problem(p.message, file=file, field=p.field,
                                        expected=p.expected) for p in col.problems])
    return AttainmentRequest(data.get("title"), ref(spec.study), prior, ref(spec.subjects),
                             int(n), int(s), regimens, targets,
                             0.9 if level is None else level, band_column, edges, file)


def patient_table(source) -> dict[str, Any]:
    """A table of patients (path, file-like or DataFrame): ``weight`` (kg),
    ``clearance`` (L/h) and ``volume`` (L) in canonical units when present; every other
    column as numbers in its own unit, or text; ``n`` the number of rows."""
    from .study import _table

    cols = _table(source, "patients")
    n = len(cols.frame)
    if n > MAX_TABLE_ROWS:
        raise PkcalcInputError(f"{n:,} rows, more than {MAX_TABLE_ROWS:,}", file=cols.file)
    problems: list[Problem] = []
    out: dict[str, Any] = {"n": n, "file": cols.file}
    kinds = {"weight": "weight", "clearance": "clearance", "volume": "volume"}
    for key, (name, unit) in cols.map.items():
        if key in kinds:
            values, _ = cols.numeric(key, kinds[key], problems)
            out[key] = values.to_numpy(float)
            continue
        if key == "subject":
            continue
        raw = cols.text(key)
        numeric = np.asarray(pd_numeric(raw), float)
        out[str(name).split("[")[0].strip()] = numeric if (
            unit is not None or np.isfinite(numeric[raw.to_numpy() != ""]).all()) \
            else raw.to_numpy(object)
    for key in ("weight", "clearance", "volume"):
        if key in out:
            bad = ~(out[key] > 0)
            if bad.any():
                i = int(np.flatnonzero(bad)[0])
                problems.append(Problem(f"{key} must be positive ({cols.where(i)})",
                                        file=cols.file, field=cols.field(key)))
    if problems:
        raise PkcalcInputError(problems)
    return out


def pd_numeric(raw):
    import pandas as pd

    return pd.to_numeric(raw.where(raw != ""), errors="coerce")
