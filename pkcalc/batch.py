"""Scenario batches: one vectorised kernel, chunked streaming, variability, engines.

A batch table has one row per scenario and unit-bearing headers (docs/formats.md):
any two of ``clearance``, ``volume``, ``half_life``, ``elimination_rate``,
``time_constant``; ``rate`` (or ``dose``); optional ``duration``, ``interval``,
``loading_dose``, ``target``, ``window_low``, ``window_high``, ``weight``.

- no ``interval``: a constant-rate infusion from time 0 (for ``duration`` when
  given, otherwise without end); the plateau is ``rate/CL``;
- ``interval``: doses of ``rate x duration`` (or ``dose``) infused over
  ``duration`` (0 or absent: boluses) every ``interval``, without end; the
  steady state comes from :func:`pkcalc.model.steady_state_intermittent`;
- ``loading_dose``: a bolus at time 0, added to the concentrations at ``--at``
  times.

Units are parsed once per column from the header; the kernel is pure numpy
over whole columns.  A row with a problem gets its reason in the ``error``
column and empty results; the other rows are computed.  Input columns are
carried through unchanged.
"""

from __future__ import annotations

import itertools
import math
import os
import sys
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from . import model
from .errors import PkcalcInputError, Problem
from .units import KINDS, NUMERIC_RANGE, parse_header, parse_unit

__all__ = [
    "BatchOptions",
    "BatchSpec",
    "BatchSummary",
    "compute",
    "grid_frame",
    "parse_columns",
    "run_batch",
]

#: Recognised input columns and their kind of quantity.
INPUT_KINDS: dict[str, str] = {
    "clearance": "clearance", "volume": "volume", "half_life": "time",
    "elimination_rate": "elimination_rate", "time_constant": "time", "rate": "rate",
    "dose": "amount", "duration": "time", "interval": "time", "loading_dose": "amount",
    "target": "concentration", "window_low": "concentration",
    "window_high": "concentration", "weight": "weight",
}
PARAMETERS = ("clearance", "volume", "half_life", "elimination_rate", "time_constant")
FRACTIONS = (0.5, 0.9, 0.95, 0.99)
DEFAULT_CHUNK_ROWS = 200_000
#: Rows x virtual subjects evaluated at once in variability runs (memory bound).
POPULATION_BLOCK = 2_000_000
#: Most virtual subjects per row (memory: a few arrays of this length per metric).
MAX_POPULATION = 1_000_000
#: Most rows per chunk (memory grows with it; the default is 200,000).
MAX_CHUNK_ROWS = 10_000_000
#: Without a window, the fraction "inside" is counted within this of the target.
TARGET_BAND = 0.20


@dataclass(frozen=True)
class BatchSpec:
    """How the columns of an input table are read (from its header, once).

    Attributes
    ----------
    columns : dict of str to (str, UnitSpec)
        Recognised quantity -> (header as written, unit conversion).
    headers : list of str
        All input headers, in order (carried through to the output).
    unknown : list of str
        Headers that are not recognised (carried through, warned about).
    """

    columns: dict
    headers: list[str]
    unknown: list[str]

    @property
    def intermittent(self) -> bool:
        return "interval" in self.columns


@dataclass(frozen=True)
class BatchOptions:
    """What to compute besides the per-row metrics.

    Attributes
    ----------
    at : tuple of float, h
        Times for ``concentration_at_<t>h`` columns.
    population : int
        Virtual subjects per row (0: no variability).
    seed : int
    cv_clearance, cv_volume : float
        Between-subject CV (fraction) of clearance and volume (log-normal).
    correlation : float
        Correlation of ln CL and ln V.
    """

    at: tuple[float, ...] = ()
    population: int = 0
    seed: int = 1
    cv_clearance: float = 0.0
    cv_volume: float = 0.0
    correlation: float = 0.0


@dataclass
class BatchSummary:
    """Counts of a finished batch run."""

    rows: int = 0
    failed: int = 0
    first_errors: list[str] = field(default_factory=list)
    seconds: float = 0.0
    output: str = ""
    warnings: list[str] = field(default_factory=list)
    plateau: list[float] = field(default_factory=list)
    time_to_90: list[float] = field(default_factory=list)
    fraction_in_window: list[float] = field(default_factory=list)


# --------------------------------------------------------------------------- columns
def _at_label(t: float) -> str:
    return f"concentration_at_{t:g}h [mg/L]"


def parse_columns(headers: Sequence[str], *, file: str | None = None) -> BatchSpec:
    """Read the header once: units per column, required columns present.

    Raises
    ------
    PkcalcInputError
        Missing or wrong units, too few parameter columns, no rate or dose.
    """
    problems: list[Problem] = []
    columns = {}
    unknown = []
    for h in headers:
        name, unit = parse_header(h)
        key = name.strip().lower()
        if key not in INPUT_KINDS:
            unknown.append(str(h))
            continue
        if key in columns:
            problems.append(Problem(f"column '{name}' appears twice", file=file, field=str(h)))
            continue
        if unit is None:
            problems.append(Problem("the column header declares no unit", file=file,
                                    field=str(h), expected=f"'{key} [unit]' with "
                                                           f"{KINDS[INPUT_KINDS[key]]}"))
            continue
        try:
            columns[key] = (str(h), parse_unit(unit, INPUT_KINDS[key], field=str(h)))
        except PkcalcInputError as exc:
            problems += [Problem(p.message, file=file, field=p.field, expected=p.expected)
                         for p in exc.problems]
    given = [p for p in PARAMETERS if p in columns]
    k_like = [p for p in given if p in ("half_life", "elimination_rate", "time_constant")]
    independent = ("clearance" in columns) + ("volume" in columns) + bool(k_like)
    if not problems:
        if independent < 2:
            problems.append(Problem(
                f"the table needs two independent parameter columns (has: "
                f"{', '.join(given) or 'none'})", file=file, field="clearance",
                expected="two of clearance, volume and one of half_life / elimination_rate / "
                         "time_constant"))
        if "rate" not in columns and "dose" not in columns:
            problems.append(Problem("the table needs a rate or a dose column", file=file,
                                    field="rate", expected="'rate [mg/h]' or 'dose [mg]'"))
        if "dose" in columns and "interval" not in columns and "duration" not in columns:
            problems.append(Problem("a dose column needs an interval or a duration column",
                                    file=file, field="dose"))
        per_kg = [h for h, spec in columns.values() if spec.per_kg]
        if per_kg and "weight" not in columns:
            problems.append(Problem("per-kg columns need a weight column", file=file,
                                    field=per_kg[0], expected="'weight [kg]'"))
    if problems:
        raise PkcalcInputError(problems)
    return BatchSpec(columns, [str(h) for h in headers], unknown)


def _numeric(frame: pd.DataFrame, header: str) -> tuple[np.ndarray, np.ndarray]:
    """A column as floats, and a mask of cells that hold text (not a number)."""
    col = frame[header]
    if pd.api.types.is_numeric_dtype(col.dtype) and not pd.api.types.is_bool_dtype(col.dtype):
        return col.to_numpy(dtype=float), np.zeros(len(col), bool)
    text = col.astype(str).str.strip()
    empty = (text.isna() | text.isin(["", "nan", "NaN", "None", "<NA>"])).to_numpy()
    values = pd.to_numeric(text.where(~empty), errors="coerce").to_numpy(dtype=float)
    return values, np.isnan(values) & ~empty


def _out_of_range(x: np.ndarray) -> np.ndarray:
    """Not NaN, and infinite or nonzero outside :data:`pkcalc.units.NUMERIC_RANGE`."""
    a = np.abs(np.asarray(x, dtype=float))
    with np.errstate(invalid="ignore"):
        return ~np.isnan(a) & (np.isinf(a) | ((a != 0) & ((a < NUMERIC_RANGE[0]) |
                                                          (a > NUMERIC_RANGE[1]))))


class _Errors:
    """Per-row error text, built with whole-column masks."""

    def __init__(self, n: int) -> None:
        self.text = np.full(n, "", dtype=object)

    def add(self, mask: np.ndarray, message: str) -> None:
        if mask.any():
            cur = self.text[mask]
            self.text[mask] = np.where(cur == "", message, cur + "; " + message)

    @property
    def bad(self) -> np.ndarray:
        return self.text != ""


# --------------------------------------------------------------------------- kernel
def compute(frame: pd.DataFrame, spec: BatchSpec, options: BatchOptions) -> pd.DataFrame:
    """Results for every row of ``frame`` (the batch kernel; pure numpy over columns).

    Parameters
    ----------
    frame : DataFrame
        Input rows with the headers ``spec`` was built from.
    spec : BatchSpec
    options : BatchOptions

    Returns
    -------
    DataFrame
        The input columns followed by the result columns and ``error``.
    """
    n = len(frame)
    err = _Errors(n)
    vals: dict[str, np.ndarray] = {}
    weight = None
    if "weight" in spec.columns:
        header, unit = spec.columns["weight"]
        w, text = _numeric(frame, header)
        err.add(text, f"'{header}' holds text")
        weight = w * unit.factor
        err.add(~(weight > 0) & ~text & ~np.isnan(w), f"'{header}' must be > 0")
    parsed: dict[str, np.ndarray] = {}
    for key, (header, unit) in spec.columns.items():
        if key == "weight":
            continue
        raw, text = _numeric(frame, header)
        parsed[header] = raw
        err.add(text, f"'{header}' holds text (units belong in the header)")
        with np.errstate(over="ignore", invalid="ignore"):
            value = raw * unit.factor
        err.add(_out_of_range(value), f"'{header}' is outside the range pkcalc computes in "
                                      f"(zero, or {NUMERIC_RANGE[0]:g} to {NUMERIC_RANGE[1]:g} "
                                      "in canonical units)")
        if unit.per_kg:
            value = value * weight
            err.add(np.isnan(weight) & ~np.isnan(raw), f"'{header}' is per kg but the weight "
                                                       "is missing")
        vals[key] = value
    get = vals.get
    nan = np.full(n, np.nan)
    # parameters
    for key in PARAMETERS:
        if key in vals:
            v = vals[key]
            err.add(np.isnan(v) & ~err.bad, f"{key} is missing")
            err.add(~np.isnan(v) & ~(v > 0), f"{key} must be > 0")
    k_sources = {"half_life": lambda x: model.LN2 / x, "elimination_rate": lambda x: x,
                 "time_constant": lambda x: 1.0 / x}
    with np.errstate(divide="ignore", invalid="ignore"):
        ks = [(name, k_sources[name](vals[name])) for name in k_sources if name in vals]
        k = ks[0][1] if ks else None
        for name, other in ks[1:]:
            err.add(~np.isclose(other, k, rtol=1e-6, atol=0) & ~np.isnan(other) &
                    ~np.isnan(k), f"{name} disagrees with {ks[0][0]}")
        cl, v = get("clearance"), get("volume")
        if cl is not None and v is not None and k is not None:
            err.add(~np.isclose(cl / v, k, rtol=1e-6, atol=0) & ~np.isnan(k),
                    "clearance / volume disagrees with the elimination rate given")
        cl, v = model.resolve_clearance_volume(clearance=cl, volume=v, elimination_rate=k)
        for name, x in (("clearance", cl), ("volume", v), ("elimination rate", cl / v)):
            err.add(_out_of_range(x) & ~err.bad, f"the parameters imply a {name} outside the "
                                                 "range pkcalc computes in")
    # regimen
    rate, dose = get("rate"), get("dose")
    duration, interval = get("duration"), get("interval")
    for key in ("rate", "dose", "duration", "interval", "loading_dose", "target",
                "window_low", "window_high"):
        if key in vals:
            x = vals[key]
            bound = ("interval", "target", "window_high")
            if key in bound:
                err.add(~np.isnan(x) & ~(x > 0), f"{key} must be > 0")
            else:
                err.add(~np.isnan(x) & (x < 0), f"{key} must not be negative")
    if rate is not None and dose is not None:
        err.add(~np.isnan(rate) & ~np.isnan(dose), "give a rate or a dose in a row, not both")
    # per row: repeated doses when the row has an interval, else a constant-rate infusion
    is_int = ~np.isnan(interval) if interval is not None else np.zeros(n, bool)
    dur_given = duration if duration is not None else nan
    rate_given = rate if rate is not None else nan
    dose_given = dose if dose is not None else nan
    # repeated doses: dose = rate x duration (or the dose column); duration 0 = boluses
    dur_int = np.where(np.isnan(dur_given), 0.0, dur_given)
    amount = np.where(np.isnan(dose_given), rate_given * dur_int, dose_given)
    err.add(is_int & ~np.isnan(rate_given) & (dur_int <= 0),
            "a rate with an interval needs a duration > 0 (or give a dose)")
    err.add(is_int & (dur_int > np.where(is_int, interval if interval is not None else nan,
                                         np.inf)), "the infusion is longer than the interval")
    err.add(is_int & np.isnan(amount) & ~err.bad, "rate (with duration) or dose is missing")
    # constant-rate infusion: rate (or dose / duration) for duration, or without end
    rate_c = np.where(np.isnan(rate_given), dose_given / dur_given, rate_given)
    dur_c = np.where(np.isnan(dur_given), np.inf, dur_given)
    err.add(~is_int & np.isnan(rate_c) & ~err.bad, "rate is missing")
    err.add(~is_int & ~np.isnan(dur_given) & (dur_given <= 0), "duration must be > 0")
    tau = interval if interval is not None else nan
    reg = _Regimen(is_int, np.where(is_int, amount, np.nan), np.where(is_int, dur_int, dur_c),
                   tau, np.where(is_int, np.nan, rate_c))
    mean_rate = np.where(is_int, reg.amount / tau, reg.rate)
    low, high, target = get("window_low"), get("window_high"), get("target")
    if low is not None and high is not None:
        err.add(~np.isnan(low) & ~np.isnan(high) & (low >= high),
                "window_low is not below window_high")
    bad = err.bad
    # computation on all rows; failed rows are blanked afterwards
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        cl = np.where(bad, np.nan, cl)
        v = np.where(bad, np.nan, v)
        out: dict[str, np.ndarray] = {}
        p = model.derived_parameters(cl, v)
        out["clearance [L/h]"] = p["clearance"]
        out["volume [L]"] = p["volume"]
        out["half_life [h]"] = p["half_life"]
        out["elimination_rate [1/h]"] = p["elimination_rate"]
        out["plateau_concentration [mg/L]"] = mean_rate / cl
        for f in FRACTIONS:
            out[f"time_to_{f * 100:g}pct [h]"] = model.time_to_fraction(f, cl, v)
        if spec.intermittent:  # columns depend on the header only (stable across chunks)
            peak, trough, avg = model.steady_state_intermittent(reg.amount, reg.duration,
                                                                reg.interval, cl, v)
            out["steady_state_peak [mg/L]"] = peak
            out["steady_state_trough [mg/L]"] = trough
            out["steady_state_average [mg/L]"] = avg
        loading = get("loading_dose")
        for t in options.at:
            c = _concentration_at(t, cl, v, reg)
            if loading is not None:
                c = c + np.where(np.isnan(loading), 0.0, loading) / v * np.exp(-cl / v * t)
            out[_at_label(t)] = c
        if target is not None:
            out["rate_for_target [mg/h]"] = target * cl
            out["loading_dose_for_target [mg]"] = target * v
        lo, hi, has_window = _window(low, high, target)
        if lo is not None:
            out["in_window_at_steady_state"] = _inside(out, lo, hi, is_int)
            for t in options.at:
                c = out[_at_label(t)]
                out[f"in_window_at_{t:g}h"] = (c >= lo) & (c <= hi)
        if options.population:
            out.update(_variability(cl, v, reg, mean_rate, loading, lo, hi, options,
                                    spec.intermittent))
    overflow = np.zeros(n, bool)
    for col in out.values():
        if col.dtype != bool:
            inf = np.isinf(np.asarray(col, dtype=float))
            overflow |= inf if inf.ndim == 1 else inf.any(axis=tuple(range(1, inf.ndim)))
    err.add(overflow & ~bad, "a result overflowed (beyond float64): check the units")
    bad = err.bad
    result = frame.copy()
    for header, raw in parsed.items():  # recognised inputs as parsed numbers (engine-neutral)
        result[header] = raw
    for key, col in out.items():
        if col.dtype == bool:  # flags: empty for failed rows and rows without a window
            col = pd.array(np.where(bad | ~has_window, False, col), dtype="boolean")
            col[bad | ~has_window] = pd.NA
        else:
            blank = bad if not key.startswith("fraction_in_window") else bad | ~has_window
            col = np.where(blank, np.nan, col)
        result[key] = col
    result["error"] = err.text
    return result


def _window(low, high, target):
    """Window bounds per row: the stated window, or the target +-20 % (common practice).

    Returns ``(lo, hi, has)``: bounds (open ends as -inf / inf) and whether the
    row has a window at all; ``(None, None, None)`` without window or target columns.
    """
    if low is None and high is None and target is None:
        return None, None, None
    n = len(next(x for x in (low, high, target) if x is not None))
    lo = low if low is not None else np.full(n, np.nan)
    hi = high if high is not None else np.full(n, np.nan)
    if target is not None:
        no_window = np.isnan(lo) & np.isnan(hi)
        lo = np.where(no_window, target * (1 - TARGET_BAND), lo)
        hi = np.where(no_window, target * (1 + TARGET_BAND), hi)
    has = ~(np.isnan(lo) & np.isnan(hi))
    return np.where(np.isnan(lo), -np.inf, lo), np.where(np.isnan(hi), np.inf, hi), has


@dataclass(frozen=True)
class _Regimen:
    """Per-row dosing, canonical: repeated doses where ``is_int``, else an infusion."""

    is_int: np.ndarray
    amount: np.ndarray     # mg per repeated dose (NaN for infusion rows)
    duration: np.ndarray   # infusion time of each dose, or of the infusion (inf: no end)
    interval: np.ndarray   # h (NaN for infusion rows)
    rate: np.ndarray       # mg/h of the infusion rows (NaN for repeated rows)

    def rows(self, sl) -> _Regimen:
        """Rows as a column (for broadcasting against virtual subjects)."""
        return _Regimen(*(a[sl, None] for a in (self.is_int, self.amount, self.duration,
                                                   self.interval, self.rate)))


def _inside(out, lo, hi, is_int):
    plateau = out["plateau_concentration [mg/L]"]
    inside = (plateau >= lo) & (plateau <= hi)
    if "steady_state_peak [mg/L]" in out:
        ss = (out["steady_state_peak [mg/L]"] <= hi) & (out["steady_state_trough [mg/L]"] >= lo)
        inside = np.where(is_int, ss, inside)
    return inside


def _concentration_at(t, cl, v, reg: _Regimen):
    """Concentration at time t under repeated doses (closed-form series) or a constant
    infusion that may have ended."""
    k = cl / v
    on = np.minimum(t, reg.duration)               # infused so far (infusion rows)
    infusion = reg.rate / cl * -np.expm1(-k * on) * np.exp(-k * (t - on))
    repeated = model.concentration_repeated(t, np.where(reg.is_int, reg.amount, 0.0),
                                            np.where(reg.is_int, reg.duration, 0.0),
                                            np.where(reg.is_int, reg.interval, 1.0), cl, v)
    return np.where(reg.is_int, repeated, infusion)


def _variability(cl, v, reg: _Regimen, mean_rate, loading, lo, hi,
                 options: BatchOptions, any_int: bool) -> dict[str, np.ndarray]:
    """Percentiles over virtual subjects and the fraction inside the window.

    Every row uses the same standard-normal draws (common random numbers from
    ``seed``), so results do not depend on chunking or the engine and scenario
    differences are not blurred by sampling noise.
    """
    n_sub = options.population
    rng = np.random.default_rng(options.seed)
    z = rng.standard_normal((n_sub, 2))
    om_cl = math.sqrt(math.log1p(options.cv_clearance ** 2))
    om_v = math.sqrt(math.log1p(options.cv_volume ** 2))
    r = options.correlation
    eta_cl = om_cl * z[:, 0]
    eta_v = om_v * (r * z[:, 0] + math.sqrt(1 - r * r) * z[:, 1])
    rows = cl.size
    block = max(1, POPULATION_BLOCK // max(n_sub, 1))
    metrics: dict[str, list[np.ndarray]] = {}

    def add(name, arr):
        metrics.setdefault(name, []).append(arr)

    for s in range(0, rows, block):
        sl = slice(s, s + block)
        c_i = cl[sl, None] * np.exp(eta_cl)[None, :]
        v_i = v[sl, None] * np.exp(eta_v)[None, :]
        rg = reg.rows(sl)
        plateau = mean_rate[sl, None] / c_i
        add("plateau_concentration", plateau)
        add("time_to_90pct", model.time_to_fraction(0.9, c_i, v_i))
        if any_int:
            peak, trough, _ = model.steady_state_intermittent(rg.amount, rg.duration,
                                                              rg.interval, c_i, v_i)
            add("steady_state_peak", peak)
            add("steady_state_trough", trough)
        ats = []
        for t in options.at:
            c = _concentration_at(t, c_i, v_i, rg)
            if loading is not None:
                c = c + np.where(np.isnan(loading[sl]), 0.0, loading[sl])[:, None] / v_i * \
                    np.exp(-c_i / v_i * t)
            add(f"concentration_at_{t:g}h", c)
            ats.append(c)
        if lo is not None:
            l_, h_ = lo[sl, None], hi[sl, None]
            inside = (plateau >= l_) & (plateau <= h_)
            if any_int:
                inside = np.where(rg.is_int, (peak <= h_) & (trough >= l_), inside)
            add("fraction_in_window_at_steady_state", inside.mean(axis=1))
            for t, c in zip(options.at, ats, strict=True):
                add(f"fraction_in_window_at_{t:g}h", ((c >= l_) & (c <= h_)).mean(axis=1))
    if rows == 0:  # keep the columns of an empty chunk (schema of the output)
        empty = np.empty((0, n_sub))
        for name in ("plateau_concentration", "time_to_90pct") + (
                ("steady_state_peak", "steady_state_trough") if any_int else ()) + tuple(
                f"concentration_at_{t:g}h" for t in options.at):
            add(name, empty)
        if lo is not None:
            for name in ("fraction_in_window_at_steady_state",
                         *(f"fraction_in_window_at_{t:g}h" for t in options.at)):
                add(name, np.empty(0))
    out = {}
    units = {"plateau_concentration": "mg/L", "time_to_90pct": "h", "steady_state_peak": "mg/L",
             "steady_state_trough": "mg/L"}
    for name, parts in metrics.items():
        arr = np.concatenate(parts, axis=0)
        if name.startswith("fraction_in_window"):
            out[name] = arr
            continue
        unit = units.get(name, "mg/L")
        q = np.percentile(arr, [5, 50, 95], axis=1)
        for label, row in zip(("p05", "p50", "p95"), q, strict=True):
            out[f"{name}_{label} [{unit}]"] = row
    return out


# --------------------------------------------------------------------------- inputs
def grid_frame(grid: dict[str, list], *, file: str | None = None) -> pd.DataFrame:
    """The cartesian product of a ``[grid]`` table as a batch frame.

    Every value is a quantity with its unit (e.g. ``"4 L/h"``); each key's
    values share one unit in the output header (the unit of its first value,
    converted exactly with the registry).
    """
    from .units import parse_number_and_unit

    problems: list[Problem] = []
    columns: dict[str, list[float]] = {}
    headers: dict[str, str] = {}
    for key, values in grid.items():
        if key not in INPUT_KINDS:
            problems.append(Problem("unknown grid key", file=file, field=f"grid.{key}",
                                    expected=", ".join(INPUT_KINDS)))
            continue
        if not isinstance(values, list) or not values:
            values = [values]
        numbers = []
        first_unit = None
        for i, item in enumerate(values):
            try:
                number, unit = parse_number_and_unit(item, field=f"grid.{key}[{i}]")
                if not unit:
                    raise PkcalcInputError(f"'{item}' has no unit", field=f"grid.{key}[{i}]",
                                           expected=KINDS[INPUT_KINDS[key]])
                spec = parse_unit(unit, INPUT_KINDS[key], field=f"grid.{key}[{i}]")
                if first_unit is None:
                    first_unit = (unit, spec)
                numbers.append(number * spec.factor / first_unit[1].factor)
                if spec.per_kg != first_unit[1].per_kg:
                    raise PkcalcInputError("mixes per-kg and absolute values",
                                           field=f"grid.{key}")
            except PkcalcInputError as exc:
                problems += [Problem(p.message, file=file, field=p.field, expected=p.expected)
                             for p in exc.problems]
        if first_unit is not None:
            headers[key] = f"{key} [{first_unit[0]}]"
            columns[key] = numbers
    if problems:
        raise PkcalcInputError(problems)
    total = math.prod(len(v) for v in columns.values())
    if total > 50_000_000:
        raise PkcalcInputError(f"the grid has {total} rows; write it as a table instead",
                               file=file, field="grid")
    keys = list(columns)
    rows = list(itertools.product(*(columns[k] for k in keys)))
    return pd.DataFrame(rows, columns=[headers[k] for k in keys])


def _detect_format(path: Path) -> str:
    suffix = path.suffix.lower()
    if suffix in (".parquet", ".pq"):
        return "parquet"
    if suffix in (".csv", ".txt"):
        return "csv"
    if suffix == ".toml":
        return "toml"
    raise PkcalcInputError(f"unknown table format '{suffix}'", file=str(path),
                           expected=".csv, .parquet or .toml")


def _csv_chunks(path: Path, chunk_rows: int) -> tuple[list[str], Iterator[pd.DataFrame]]:
    from .tables import read_csv_chunks, read_header

    header = read_header(path)
    known = {h for h in header if parse_header(h)[0].strip().lower() in INPUT_KINDS}
    # unknown columns stay text exactly as written (IDs keep their leading zeros)
    reader = read_csv_chunks(path, chunk_rows, skipinitialspace=True,
                             dtype={h: str for h in header if h not in known},
                             keep_default_na=False, na_values=[""])
    return header, reader


def _parquet_chunks(path: Path, chunk_rows: int) -> tuple[list[str], Iterator[pd.DataFrame]]:
    try:
        import pyarrow.parquet as pq

        pf = pq.ParquetFile(path)
    except ImportError:
        raise PkcalcInputError("Parquet needs pyarrow", file=str(path),
                               expected="pip install pyarrow") from None
    except Exception as exc:  # pyarrow raises several types for damaged files
        raise PkcalcInputError(f"not a readable Parquet file ({exc.__class__.__name__}: "
                               f"{str(exc)[:120]})", file=str(path)) from None
    header = list(pf.schema_arrow.names)

    def gen():
        try:
            for rb in pf.iter_batches(batch_size=chunk_rows):
                yield rb.to_pandas()
        except Exception as exc:
            raise PkcalcInputError(f"Parquet file damaged while reading "
                                   f"({exc.__class__.__name__})", file=str(path)) from None
    return header, gen()


class _Writer:
    """Writes result chunks to a temporary file beside the output, renamed at the end."""

    def __init__(self, output: Path, fmt: str) -> None:
        self.output, self.fmt = output, fmt
        from .files import clean_stale, temp_path

        output.parent.mkdir(parents=True, exist_ok=True)
        clean_stale(output)  # temporary files of killed runs to the same path
        self.tmp = temp_path(output)
        self.tmp.touch(mode=0o600)
        self.first = True
        self.pq_writer = None
        self.handle = None

    def write(self, frame: pd.DataFrame) -> None:
        import pyarrow as pa

        table = pa.Table.from_pandas(frame, preserve_index=False)
        if self.fmt == "csv":
            # Arrow's CSV writer: shortest round-trip floats, several times faster than
            # DataFrame.to_csv (numbers read back bit for bit)
            import pyarrow.csv as pcsv

            if self.handle is None:
                self.handle = open(self.tmp, "wb")  # closed in commit() or abort()
            pcsv.write_csv(table, self.handle,
                           write_options=pcsv.WriteOptions(include_header=self.first))
        else:
            import pyarrow.parquet as pq

            if self.pq_writer is None:
                self.pq_writer = pq.ParquetWriter(self.tmp, table.schema)
            else:
                table = table.cast(self.pq_writer.schema)
            self.pq_writer.write_table(table)
        self.first = False

    def commit(self) -> None:
        if self.pq_writer is not None:
            self.pq_writer.close()
        if self.handle is not None:
            self.handle.close()
        from .files import _umask

        os.chmod(self.tmp, 0o666 & ~_umask())
        os.replace(self.tmp, self.output)

    def abort(self) -> None:
        if self.handle is not None:
            self.handle.close()
        if self.pq_writer is not None:
            try:
                self.pq_writer.close()
            except Exception:
                pass
        self.tmp.unlink(missing_ok=True)


def _normalise_types(frame: pd.DataFrame, spec: BatchSpec) -> pd.DataFrame:
    """Result columns with stable dtypes across chunks (for Parquet schemas)."""
    for c in frame.columns:
        if c.startswith("in_window_"):
            frame[c] = frame[c].astype("boolean")
    for h in spec.unknown:
        if h in frame.columns and frame[h].dtype == object:
            frame[h] = frame[h].astype(str)
    return frame


def _progress(enabled: bool) -> Callable[[int, float], None]:
    if not enabled:
        return lambda rows, started: None

    def show(rows: int, started: float) -> None:
        elapsed = time.perf_counter() - started
        rate = rows / elapsed if elapsed > 0 else 0.0
        sys.stderr.write(f"\r  {rows:,} rows ({rate:,.0f} rows/s)   ")
        sys.stderr.flush()
    return show


def run_batch(input_path: str | Path, output_path: str | Path, options: BatchOptions, *,
              engine: str = "local", scheduler: str | None = None,
              chunk_rows: int = DEFAULT_CHUNK_ROWS, progress: bool = False,
              collect: int = 200_000) -> BatchSummary:
    """Run a batch file to an output table (CSV or Parquet), streaming in chunks.

    Parameters
    ----------
    input_path : path
        ``.csv``, ``.parquet`` or ``.toml`` (``[grid]`` or ``[[scenarios]]``).
    output_path : path
        ``.csv`` or ``.parquet``; written atomically, never over the input.
    options : BatchOptions
    engine : {"local", "dask"}
    scheduler : str, optional
        Address of an existing Dask scheduler (``tcp://host:port``).
    chunk_rows : int
        Rows per chunk (memory stays bounded by it).
    progress : bool
        Progress on standard error.
    collect : int
        Keep up to this many plateau / time-to-90 % values for the summary plots.

    Returns
    -------
    BatchSummary
    """
    src, dst = Path(input_path), Path(output_path)
    from .tables import check_input_file

    check_input_file(src, "a .csv, .parquet or .toml table")
    if dst.exists() and dst.resolve() == src.resolve():
        raise PkcalcInputError("refusing to overwrite the input file", file=str(dst),
                               expected="an output path other than the input")
    fmt_in, fmt_out = _detect_format(src), _detect_format(dst)
    if fmt_out == "toml":
        raise PkcalcInputError("the output must be .csv or .parquet", file=str(dst))
    summary = BatchSummary(output=str(dst))
    started = time.perf_counter()
    if engine == "dask":
        from .batch_dask import run_dask

        if fmt_in == "toml":
            raise PkcalcInputError("the dask engine reads CSV or Parquet tables",
                                   file=str(src), expected="--engine local for TOML inputs")
        run_dask(src, dst, fmt_in, fmt_out, options, scheduler, chunk_rows, summary, collect)
        summary.seconds = time.perf_counter() - started
        return summary
    if fmt_in == "toml":
        from .schema import read_toml

        if "scenarios" in read_toml(src):
            if options.population:
                raise PkcalcInputError("variability runs read a table or a [grid]",
                                       file=str(src), expected="a CSV/Parquet table or [grid]")
            frame, _ = scenario_rows(src, options)
            write_stream(iter([frame]), dst, fmt_out, summary, collect, src)
            summary.seconds = time.perf_counter() - started
            return summary
        header, chunks = _toml_chunks(src, chunk_rows)
    elif fmt_in == "csv":
        header, chunks = _csv_chunks(src, chunk_rows)
    else:
        header, chunks = _parquet_chunks(src, chunk_rows)
    spec = parse_columns(header, file=str(src))
    if spec.unknown:
        summary.warnings.append(f"columns not used (carried through): "
                                f"{', '.join(spec.unknown)}")
    block = chunk_rows if not options.population else max(
        1, min(chunk_rows, POPULATION_BLOCK * 4 // max(options.population, 1)))
    show = _progress(progress)

    def parts() -> Iterator[pd.DataFrame]:
        for chunk in chunks:
            for s in range(0, len(chunk), block):
                yield _normalise_types(compute(chunk.iloc[s:s + block], spec, options), spec)
                show(summary.rows, started)

    try:
        write_stream(parts(), dst, fmt_out, summary, collect, src)
    finally:
        if progress:
            sys.stderr.write("\n")
    summary.seconds = time.perf_counter() - started
    return summary


def write_stream(parts: Iterator[pd.DataFrame], dst: Path, fmt_out: str,
                 summary: BatchSummary, collect: int, src: Path) -> None:
    """Write result parts in order to a temporary file, renamed when all are written;
    nothing is left behind when a part fails."""
    writer = _Writer(dst, fmt_out)
    try:
        for part in parts:
            writer.write(part)
            _tally(summary, part, collect)
        if summary.rows == 0:
            raise PkcalcInputError("the table has a header but no rows", file=str(src))
        writer.commit()
    except BaseException:
        writer.abort()
        raise


def _tally(summary: BatchSummary, result: pd.DataFrame, collect: int) -> None:
    errors = result["error"].to_numpy()
    failed = errors != ""
    first = summary.rows
    summary.rows += len(result)
    summary.failed += int(failed.sum())
    for i in np.flatnonzero(failed)[: max(0, 5 - len(summary.first_errors))]:
        summary.first_errors.append(f"row {first + i + 1}: {errors[i]}")
    room = collect - len(summary.plateau)
    if room > 0:
        ok = ~failed
        summary.plateau += result["plateau_concentration [mg/L]"].to_numpy()[ok][:room].tolist()
        summary.time_to_90 += result["time_to_90pct [h]"].to_numpy()[ok][:room].tolist()
        if "fraction_in_window_at_steady_state" in result:
            summary.fraction_in_window += result["fraction_in_window_at_steady_state"] \
                .to_numpy()[ok][:room].tolist()


def scenario_rows(path: Path, options: BatchOptions) -> tuple[pd.DataFrame, list]:
    """A scenario file (docs/formats.md) as batch rows: each scenario's own dose list is
    predicted with the general model (scenario files are small; one call per scenario)."""
    from .predict import predict_scenario
    from .schema import load_scenario_file

    sfile = load_scenario_file(path)
    rows = []
    for s in sfile.scenarios:
        pred = predict_scenario(s)
        p = pred.parameters
        row = {"scenario": s.name, "clearance [L/h]": p["clearance"], "volume [L]": p["volume"],
               "half_life [h]": p["half_life"], "elimination_rate [1/h]": p["elimination_rate"],
               "plateau_concentration [mg/L]": pred.plateau_concentration
               if pred.plateau_concentration is not None else np.nan}
        for f in FRACTIONS:
            row[f"time_to_{f * 100:g}pct [h]"] = pred.time_to_fraction.get(
                f, float(model.time_to_fraction(f, p["clearance"], p["volume"])))
        ss = pred.steady_state
        row["steady_state_peak [mg/L]"] = ss.peak if ss else np.nan
        row["steady_state_trough [mg/L]"] = ss.trough if ss else np.nan
        row["steady_state_average [mg/L]"] = ss.average if ss else np.nan
        if options.at:
            for t, c in zip(options.at, pred.concentration_at(list(options.at)), strict=True):
                row[_at_label(t)] = float(c)
        row["flags"] = " | ".join(pred.flags)
        row["error"] = ""
        rows.append(row)
    for label, err in sfile.failures:
        rows.append({"scenario": label, "error": str(err)})
    return pd.DataFrame(rows), sfile.failures


def _toml_chunks(path: Path, chunk_rows: int):
    """A TOML input with a ``[grid]`` table (cartesian product) as one frame."""
    from .schema import read_toml

    data = read_toml(path)
    if "grid" not in data:
        raise PkcalcInputError("a TOML batch input holds a [grid] table or [[scenarios]]",
                               file=str(path), field="grid",
                               expected="[grid] with lists of quantities")
    unknown = sorted(set(data) - {"grid", "title"})
    if unknown:
        raise PkcalcInputError("unknown key", file=str(path), field=unknown[0],
                               expected="grid, title")
    frame = grid_frame(data["grid"], file=str(path))
    return list(frame.columns), (frame.iloc[s:s + chunk_rows]
                                 for s in range(0, len(frame), chunk_rows))
