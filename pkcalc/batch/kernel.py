"""The batch kernel: results for every row of a chunk, pure numpy over columns
(formulas from :mod:`pkcalc.model`), and virtual-population variability."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .. import model
from ..units import NUMERIC_RANGE
from .columns import (
    FRACTIONS,
    PARAMETERS,
    POPULATION_BLOCK,
    ROW_PROBLEM,
    TARGET_BAND,
    BatchOptions,
    BatchSpec,
    RowErrors,
    at_label,
    numeric_column,
    out_of_range_mask,
)


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
    problems = None
    if ROW_PROBLEM in frame.columns:        # lines the CSV reader could not split
        problems = frame[ROW_PROBLEM].fillna("").to_numpy(object)
        frame = frame.drop(columns=[ROW_PROBLEM])
    err = RowErrors(n)
    vals, parsed = _parse_inputs(frame, spec, err)
    cl, v = _parameters(vals, err)
    reg, mean_rate = _regimen(vals, err, n)
    low, high = vals.get("window_low"), vals.get("window_high")
    if low is not None and high is not None:
        err.add(~np.isnan(low) & ~np.isnan(high) & (low >= high),
                "window_low is not below window_high")
    bad = err.bad
    # computation on all rows; failed rows are blanked afterwards
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        cl = np.where(bad, np.nan, cl)
        v = np.where(bad, np.nan, v)
        out, has_window = _results(cl, v, reg, mean_rate, vals, spec, options)
    if problems is not None:                 # the reader's reason replaces the others
        empty = frame.isna().all(axis=1).to_numpy() & (problems == "")
        problems = np.where(empty, "the row is empty", problems)
        mark = problems != ""
        err.text[mark] = problems[mark]
    return _assemble(frame, parsed, out, err, has_window)


def _parse_inputs(frame: pd.DataFrame, spec: BatchSpec, err: RowErrors):
    """Every recognised column in canonical units (per-kg values times the weight),
    with text, range and missing-weight problems recorded per row."""
    vals: dict[str, np.ndarray] = {}
    weight = None
    if "weight" in spec.columns:
        header, unit = spec.columns["weight"]
        w, text = numeric_column(frame, header)
        err.add(text, f"'{header}' holds text")
        weight = w * unit.factor
        err.add(~(weight > 0) & ~text & ~np.isnan(w), f"'{header}' must be > 0")
    parsed: dict[str, np.ndarray] = {}
    for key, (header, unit) in spec.columns.items():
        if key == "weight":
            continue
        raw, text = numeric_column(frame, header)
        parsed[header] = raw
        err.add(text, f"'{header}' holds text (units belong in the header)")
        with np.errstate(over="ignore", invalid="ignore"):
            value = raw * unit.factor
        err.add(out_of_range_mask(value), f"'{header}' is outside the range pkcalc computes in "
                                      f"(zero, or {NUMERIC_RANGE[0]:g} to {NUMERIC_RANGE[1]:g} "
                                      "in canonical units)")
        if unit.per_kg:
            value = value * weight
            err.add(np.isnan(weight) & ~np.isnan(raw), f"'{header}' is per kg but the weight "
                                                       "is missing")
        vals[key] = value
    return vals, parsed


def _parameters(vals: dict[str, np.ndarray], err: RowErrors):
    """Clearance and volume per row from any two parameters, checked for agreement
    and range."""
    get = vals.get
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
            err.add(out_of_range_mask(x) & ~err.bad, f"the parameters imply a {name} outside the "
                                                 "range pkcalc computes in")
    return cl, v


def _regimen(vals: dict[str, np.ndarray], err: RowErrors, n: int):
    """Per row: repeated doses when the row has an interval, else a constant-rate
    infusion; and the mean input rate (for the plateau)."""
    get = vals.get
    nan = np.full(n, np.nan)
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
    return reg, mean_rate


def _results(cl, v, reg: _Regimen, mean_rate, vals, spec: BatchSpec, options: BatchOptions):
    """The result columns of every row (formulas from :mod:`pkcalc.model`)."""
    get = vals.get
    low, high, target = get("window_low"), get("window_high"), get("target")
    is_int = reg.is_int
    out: dict[str, np.ndarray] = {}
    p = model.derived_parameters(cl, v)
    out["clearance [L/h]"] = p["clearance"]
    out["volume [L]"] = p["volume"]
    out["half_life [h]"] = p["half_life"]
    out["elimination_rate [1/h]"] = p["elimination_rate"]
    out["plateau_concentration [mg/L]"] = model.plateau_concentration(mean_rate, cl)
    for f in FRACTIONS:
        out[f"time_to_{f * 100:g}_percent [h]"] = model.time_to_fraction(f, cl, v)
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
            c = c + model.bolus_concentration(t, np.where(np.isnan(loading), 0.0, loading),
                                              cl, v)
        out[at_label(t)] = c
    if target is not None:
        out["rate_for_target [mg/h]"] = model.rate_for_plateau(target, cl)
        out["loading_dose_for_target [mg]"] = model.amount_to_reach(target, 0.0, cl, v, 0.0)
    lo, hi, has_window = _window(low, high, target)
    if lo is not None:
        out["in_window_at_steady_state"] = _inside(out, lo, hi, is_int)
        for t in options.at:
            c = out[at_label(t)]
            out[f"in_window_at_{t:g}h"] = (c >= lo) & (c <= hi)
    if options.population:
        out.update(_variability(cl, v, reg, mean_rate, loading, lo, hi, options,
                                spec.intermittent))
    return out, has_window


def _assemble(frame: pd.DataFrame, parsed, out, err: RowErrors, has_window) -> pd.DataFrame:
    """Input columns (recognised ones as parsed numbers), results blanked on failed
    rows, and the error column; a result that overflowed is a row error."""
    n = len(frame)
    bad = err.bad
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
    infusion = model.single_infusion_concentration(t, reg.rate, reg.duration, cl, v)
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
    dev_cl, dev_v = _virtual_deviations(options)
    rows = cl.size
    block = max(1, POPULATION_BLOCK // max(options.population, 1))
    metrics: dict[str, list[np.ndarray]] = {}
    for s in range(0, rows, block):
        sl = slice(s, s + block)
        load = None if loading is None else np.where(np.isnan(loading[sl]), 0.0, loading[sl])
        _block_metrics(metrics, cl[sl, None] * np.exp(dev_cl)[None, :],
                       v[sl, None] * np.exp(dev_v)[None, :], reg.rows(sl), mean_rate[sl],
                       load, None if lo is None else (lo[sl, None], hi[sl, None]), options,
                       any_int)
    if rows == 0:  # keep the columns of an empty chunk (schema of the output)
        names = ["plateau_concentration", "time_to_90_percent",
                 *(("steady_state_peak", "steady_state_trough") if any_int else ()),
                 *(f"concentration_at_{t:g}h" for t in options.at)]
        for name in names:
            metrics[name] = [np.empty((0, options.population))]
        if lo is not None:
            for name in ("fraction_in_window_at_steady_state",
                         *(f"fraction_in_window_at_{t:g}h" for t in options.at)):
                metrics[name] = [np.empty(0)]
    return _percentile_columns(metrics)


def _virtual_deviations(options: BatchOptions):
    """Log-normal deviations of ln CL and ln V of the virtual subjects (SD of the log
    ``sqrt(ln(1 + CV^2))``, correlation ``r``), the same draws for every row."""
    z = np.random.default_rng(options.seed).standard_normal((options.population, 2))
    sd_cl = math.sqrt(math.log1p(options.cv_clearance ** 2))
    sd_v = math.sqrt(math.log1p(options.cv_volume ** 2))
    r = options.correlation
    return sd_cl * z[:, 0], sd_v * (r * z[:, 0] + math.sqrt(1 - r * r) * z[:, 1])


def _block_metrics(metrics, c_i, v_i, rg: _Regimen, mean_rate, loading, window,
                   options: BatchOptions, any_int: bool) -> None:
    """The metrics of a block of rows x virtual subjects, appended to ``metrics``."""
    def add(name, arr):
        metrics.setdefault(name, []).append(arr)

    plateau = model.plateau_concentration(mean_rate[:, None], c_i)
    add("plateau_concentration", plateau)
    add("time_to_90_percent", model.time_to_fraction(0.9, c_i, v_i))
    if any_int:
        peak, trough, _ = model.steady_state_intermittent(rg.amount, rg.duration,
                                                          rg.interval, c_i, v_i)
        add("steady_state_peak", peak)
        add("steady_state_trough", trough)
    ats = []
    for t in options.at:
        c = _concentration_at(t, c_i, v_i, rg)
        if loading is not None:
            c = c + model.bolus_concentration(t, loading[:, None], c_i, v_i)
        add(f"concentration_at_{t:g}h", c)
        ats.append(c)
    if window is not None:
        l_, h_ = window
        inside = (plateau >= l_) & (plateau <= h_)
        if any_int:
            inside = np.where(rg.is_int, (peak <= h_) & (trough >= l_), inside)
        add("fraction_in_window_at_steady_state", inside.mean(axis=1))
        for t, c in zip(options.at, ats, strict=True):
            add(f"fraction_in_window_at_{t:g}h", ((c >= l_) & (c <= h_)).mean(axis=1))


def _percentile_columns(metrics: dict[str, list[np.ndarray]]) -> dict[str, np.ndarray]:
    """5th, 50th and 95th percentiles over the virtual subjects, per row."""
    out = {}
    units = {"plateau_concentration": "mg/L", "time_to_90_percent": "h",
             "steady_state_peak": "mg/L", "steady_state_trough": "mg/L"}
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
