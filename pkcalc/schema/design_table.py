"""The ``[scenarios.design]`` table: what to design or adjust, and its canonical
options for the :mod:`pkcalc.design` function of the method (one builder per method)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from pydantic import Field

from ..core import MIN_SALT_FACTOR
from ..errors import PkcalcInputError
from .base import Collector, LenientModel, QuantityText

__all__ = ["DESIGN_METHODS", "DesignSpec", "SampleSpec", "resolve_design"]

# --------------------------------------------------------------------------- design
DESIGN_METHODS = ("continuous", "intermittent", "proportional", "chiou", "sawchuk_zaske", "map")


class SampleSpec(LenientModel):
    """A measured level: ``{ time = "2 h", concentration = "4.1 mg/L" }``, or one below the
    limit of quantification: ``{ time = "30 h", blq = true, lloq = "0.3 mg/L" }``."""

    time: QuantityText
    concentration: QuantityText | None = None
    blq: bool | None = None
    lloq: QuantityText | None = None


class DesignSpec(LenientModel):
    """The ``[scenarios.design]`` table: what to design or adjust, and how to round."""

    method: str | None = None
    # continuous infusion
    plateau: QuantityText | None = None
    window: list[QuantityText] | None = Field(default=None, min_length=2, max_length=2)
    loading_time: QuantityText | None = None
    within: float | None = None
    # intermittent infusion
    infusion_time: QuantityText | None = None
    peak: QuantityText | list[QuantityText] | None = None
    trough: QuantityText | list[QuantityText] | None = None
    peak_min: QuantityText | None = None
    peak_max: QuantityText | None = None
    trough_min: QuantityText | None = None
    trough_max: QuantityText | None = None
    intervals: list[QuantityText] | None = None
    # rounding and limits
    salt_factor: float | None = None
    rate_step: QuantityText | None = None
    dose_step: QuantityText | None = None
    max_rate: QuantityText | None = None
    max_dose: QuantityText | None = None
    max_loading: QuantityText | None = None
    max_loading_ratio: float | None = None
    # adjustment from levels
    measured: QuantityText | SampleSpec | None = None
    current_rate: QuantityText | None = None
    current_dose: QuantityText | None = None
    current_interval: QuantityText | None = None
    rate: QuantityText | None = None
    samples: list[SampleSpec] | None = None
    dose: QuantityText | None = None
    interval: QuantityText | None = None
    peak_sample: SampleSpec | None = None
    trough_sample: SampleSpec | None = None
    pre_dose: QuantityText | None = None
    steady_state: bool | None = None
    new_infusion_time: QuantityText | None = None
    # MAP (Bayesian) individualisation: levels after the scenario's doses, and a prior
    levels: list[SampleSpec] | None = None
    prior: dict[str, Any] | str | None = None
    # any method from levels: when the new regimen starts (history clock), drug on board
    start: QuantityText | None = None
    initial_concentration: QuantityText | None = None
    # a steady-state AUC over 24 h: a value or [low, high]
    auc_24: QuantityText | list[QuantityText] | None = None
    # holds and starts are rounded to this step (default 15 min)
    time_step: QuantityText | None = None
    # MAP: the probability every target holds that 'meets target' needs, and the ranking
    attainment_level: float | str | None = None
    rank: str | None = None

    def infer_method(self) -> str:
        if self.method is not None:
            return self.method
        if self.levels is not None or self.prior is not None:
            return "map"
        if self.samples is not None:
            return "chiou"
        if self.peak_sample is not None or self.trough_sample is not None:
            return "sawchuk_zaske"
        if self.measured is not None:
            return "proportional"
        if self.infusion_time is not None or self.peak is not None or self.trough is not None \
                or self.peak_max is not None or self.trough_min is not None \
                or self.peak_min is not None or self.trough_max is not None:
            return "intermittent"
        return "continuous"


def _limits_pair(col: Collector, spec: DesignSpec, name: str):
    """(target, (low, high)) for 'peak' / 'trough' from the single or list form and min/max."""
    value = getattr(spec, name)
    target = low = high = None
    if isinstance(value, list):
        if len(value) != 2:
            col.add("give [min, max]", f"design.{name}", "a list of two concentrations")
        else:
            low = col.q(value[0], "concentration", f"design.{name}[0]", nonnegative=True)
            high = col.q(value[1], "concentration", f"design.{name}[1]", positive=True)
    elif value is not None:
        target = col.q(value, "concentration", f"design.{name}", positive=True)
    mn = col.q(getattr(spec, f"{name}_min"), "concentration", f"design.{name}_min",
               nonnegative=True)
    mx = col.q(getattr(spec, f"{name}_max"), "concentration", f"design.{name}_max",
               positive=True)
    low = mn if mn is not None else low
    high = mx if mx is not None else high
    if low is not None and high is not None and low >= high:
        col.add(f"{name} minimum {low:g} mg/L is not below the maximum {high:g} mg/L",
                f"design.{name}", "min < max")
    if target is not None and ((low is not None and target < low) or
                               (high is not None and target > high)):
        col.add(f"{name} target {target:g} mg/L lies outside its own limits", f"design.{name}")
    limits = None if low is None and high is None else (low, high)
    return target, limits


def _auc_limits(col: Collector, spec: DesignSpec):
    """The AUC24 target as (low, high) in mg h/L: a value (low = high) or a range."""
    value = spec.auc_24
    if value is None:
        return None
    if isinstance(value, list):
        if len(value) != 2:
            col.add("give a value or [low, high]", "design.auc_24",
                    "'500 mg*h/L' or ['400 mg*h/L', '600 mg*h/L']")
            return None
        lo = col.q(value[0], "auc", "design.auc_24[0]", positive=True)
        hi = col.q(value[1], "auc", "design.auc_24[1]", positive=True)
        if lo is not None and hi is not None and lo > hi:
            col.add(f"AUC24 low {lo:g} mg*h/L is above high {hi:g} mg*h/L", "design.auc_24",
                    "[low, high] with low <= high")
            return None
        return None if lo is None or hi is None else (lo, hi)
    x = col.q(value, "auc", "design.auc_24", positive=True)
    return None if x is None else (x, x)


def _window(col: Collector, spec: DesignSpec):
    if spec.window is None:
        return None
    lo = col.q(spec.window[0], "concentration", "design.window[0]", nonnegative=True)
    hi = col.q(spec.window[1], "concentration", "design.window[1]", positive=True)
    if lo is not None and hi is not None and lo >= hi:
        col.add(f"window low {lo:g} mg/L is not below high {hi:g} mg/L",
                "design.window", "[low, high] with low < high")
        return None
    return None if lo is None or hi is None else (lo, hi)


def _sample(col: Collector, sample: SampleSpec | None, where: str, *, blq_ok: bool = False):
    """``(time, level)``; with ``blq_ok`` also ``(time, None, True, lloq)`` for a level
    below the limit of quantification (method 'map' only: Beal's M3)."""
    if sample is None:
        return None
    sample.unknown_keys(col, f"{where}.")
    t = col.q(sample.time, "time", f"{where}.time")
    if sample.blq:
        if not blq_ok:
            col.add("a level below the LLOQ is used by method 'map' only (censored "
                    "likelihood); this method needs a measured level", f"{where}.blq",
                    "a concentration, or method = 'map'")
            return None
        if sample.concentration is not None:
            col.add("a level below the LLOQ has no concentration: give its lloq",
                    f"{where}.concentration", "{ time, blq = true, lloq = '0.3 mg/L' }")
            return None
        lloq = col.q(sample.lloq, "concentration", f"{where}.lloq", positive=True)
        if sample.lloq is None:
            col.add("a level below the LLOQ needs its lloq", f"{where}.lloq",
                    "lloq = '0.3 mg/L'")
        return None if t is None or lloq is None else (t, None, True, lloq)
    if sample.concentration is None:
        col.add("a level needs its concentration (or blq = true with its lloq)",
                f"{where}.concentration", "concentration = '4.1 mg/L'")
        return None
    c = col.q(sample.concentration, "concentration", f"{where}.concentration", positive=True)
    return None if t is None or c is None else (t, c)


def _need(col: Collector, method: str, **values: Any) -> bool:
    missing = [k for k, v in values.items() if v is None]
    reported = {p.field for p in col.problems}
    for k in missing:
        field = k if k in ("clearance", "volume") or "." in k else f"design.{k}"
        if field not in reported and k not in reported:  # not again when it failed to parse
            col.add(f"method '{method}' needs '{k}'", field)
    return not missing


@dataclass
class _DesignContext:
    """What every method's options are built from (already converted)."""

    spec: DesignSpec
    col: Collector
    cl: float | None
    v: float | None
    history: bool
    plateau: float | None
    peak: float | None
    trough: float | None
    peak_limits: tuple | None
    trough_limits: tuple | None
    interval_opts: dict[str, Any]
    auc: tuple | None
    window: tuple | None


def resolve_design(spec: DesignSpec, cl: float | None, v: float | None,
                   col: Collector, history: bool = False) -> tuple[str, dict[str, Any]]:
    """Canonical keyword options for the design function of the method."""
    spec.unknown_keys(col, "design.")
    method = spec.infer_method()
    if method not in DESIGN_METHODS:
        col.add(f"unknown method '{method}'", "design.method", ", ".join(DESIGN_METHODS))
        return method, {}
    q = col.q
    opts: dict[str, Any] = {}
    if spec.salt_factor is not None:
        if not MIN_SALT_FACTOR <= spec.salt_factor <= 1:
            col.add(f"salt_factor must be from 0.05 to 1 (the drug's share of the product), "
                    f"got {spec.salt_factor}",
                    "design.salt_factor")
        opts["salt_factor"] = spec.salt_factor
    steps = {"rate_step": ("rate", spec.rate_step), "dose_step": ("amount", spec.dose_step)}
    maxima = {"max_rate": ("rate", spec.max_rate), "max_dose": ("amount", spec.max_dose),
              "max_loading": ("amount", spec.max_loading)}
    for key, (kind, text) in {**steps, **maxima}.items():
        value = q(text, kind, f"design.{key}", positive=True)
        if value is not None:
            opts[key] = value
    if spec.max_loading_ratio is not None:
        if not 0 < spec.max_loading_ratio <= 1000:
            col.add(f"max_loading_ratio must be a positive number of maintenance doses, got "
                    f"{spec.max_loading_ratio:g}", "design.max_loading_ratio", "e.g. 3")
        opts["max_loading_ratio"] = spec.max_loading_ratio
    plateau = q(spec.plateau, "concentration", "design.plateau", positive=True)
    peak, peak_limits = _limits_pair(col, spec, "peak")
    trough, trough_limits = _limits_pair(col, spec, "trough")
    if peak is not None and trough is not None and trough >= peak:
        col.add(f"trough target {trough:g} mg/L is not below the peak target {peak:g} mg/L",
                "design.trough", "a trough target below the peak target")
    intervals = None
    if spec.intervals is not None:
        intervals = [q(x, "time", f"design.intervals[{i}]", positive=True)
                     for i, x in enumerate(spec.intervals)]
        if not intervals or any(x is None for x in intervals):
            col.add("give one or more intervals", "design.intervals")
    interval_opts = {"peak": peak, "trough": trough, "peak_limits": peak_limits,
                     "trough_limits": trough_limits}
    if intervals:
        interval_opts["intervals"] = intervals
    auc = _auc_limits(col, spec)
    window = _window(col, spec)
    if auc is not None:
        interval_opts["auc_24"] = auc
    context = _DesignContext(spec, col, cl, v, history, plateau, peak, trough, peak_limits,
                             trough_limits, interval_opts, auc, window)
    _METHOD_OPTIONS[method](context, opts)
    if method != "map" and (spec.attainment_level is not None or spec.rank is not None):
        col.add(f"attainment_level and rank need the posterior of method 'map' (levels and "
                f"a prior), not method '{method}'", "design.attainment_level",
                "method = 'map' with levels and a prior")
    step = q(spec.time_step, "time", "design.time_step", nonnegative=True)
    if step is not None:
        if step > 24:
            col.add(f"time_step {step:g} h is longer than a day", "design.time_step",
                    "e.g. '15 min' (0 for no rounding)")
        opts["time_step"] = step
    return method, opts


def _options_continuous(c: _DesignContext, opts: dict[str, Any]) -> None:
    """Options of method 'continuous'."""
    method = "continuous"
    spec, col, q, cl, v, plateau, auc = c.spec, c.col, c.col.q, c.cl, c.v, c.plateau, c.auc
    window = c.window
    if spec.plateau is None and spec.auc_24 is None:
        col.add("method 'continuous' needs a plateau or an AUC24 target", "design.plateau",
                "plateau = '8 mg/L' or auc_24 = ['400 mg*h/L', '600 mg*h/L']")
    if _need(col, method, clearance=cl, volume=v):
        opts.update(clearance=cl, volume=v, plateau=plateau, auc_24=auc)
    if window is not None:
        opts["window"] = window
    lt = q(spec.loading_time, "time", "design.loading_time", nonnegative=True)
    if lt is not None:
        opts["loading_time"] = lt
    if spec.within is not None:
        if not 0 < spec.within < 1:
            col.add(f"within must be a fraction in (0, 1), got {spec.within}",
                    "design.within")
        opts["within"] = spec.within
    opts.pop("max_dose", None)


def _options_intermittent(c: _DesignContext, opts: dict[str, Any]) -> None:
    """Options of method 'intermittent'."""
    method = "intermittent"
    spec, col, q, cl, v, peak, trough = c.spec, c.col, c.col.q, c.cl, c.v, c.peak, c.trough
    peak_limits, trough_limits, interval_opts = c.peak_limits, c.trough_limits, c.interval_opts
    auc = c.auc
    t_inf = q(spec.infusion_time, "time", "design.infusion_time", nonnegative=True)
    if _need(col, method, infusion_time=t_inf, clearance=cl, volume=v):
        opts.update(clearance=cl, volume=v, infusion_time=t_inf)
    if auc is None and peak is None and peak_limits is None:
        col.add("needs a peak target or limits (or an AUC24 target)", "design.peak",
                "peak, peak_min or peak_max")
    if auc is None and trough is None and trough_limits is None:
        col.add("needs a trough target or limits (or an AUC24 target)", "design.trough",
                "trough, trough_min or trough_max")
    opts.update(interval_opts)
    for key in ("rate_step", "max_rate", "max_loading"):
        opts.pop(key, None)


def _options_proportional(c: _DesignContext, opts: dict[str, Any]) -> None:
    """Options of method 'proportional'."""
    method = "proportional"
    spec, col, q, cl, v, history, plateau = c.spec, c.col, c.col.q, c.cl, c.v, c.history, c.plateau
    window = c.window
    measured_time = None
    if isinstance(spec.measured, SampleSpec):
        sample = _sample(col, spec.measured, "design.measured")
        measured_time, measured = sample if sample else (None, None)
    else:
        measured = q(spec.measured, "concentration", "design.measured", positive=True)
    opts["measured_time"] = measured_time
    rate = q(spec.current_rate, "rate", "design.current_rate", positive=True)
    dose = q(spec.current_dose, "amount", "design.current_dose", positive=True)
    interval = q(spec.current_interval, "time", "design.current_interval", positive=True)
    _need(col, method, measured=measured, plateau=plateau)
    if (rate is None) == (dose is None):
        col.add("give either current_rate or current_dose", "design.current_rate")
    if history and measured_time is None and measured is not None:
        col.add("with a dose history the level needs its time on that clock",
                "design.measured", "measured = { time = '22 h', concentration = '9.1 mg/L' }")
    if history and v is None:
        col.add("with a dose history the proportional method needs a volume (to solve "
                "the clearance off steady state and project the course)", "volume")
    opts.update(measured=measured, target=plateau, current_rate=rate, current_dose=dose,
                interval=interval, clearance=cl, volume=v)
    if window is not None:
        opts["window"] = window
    for key in ("max_rate", "max_dose", "max_loading", "max_loading_ratio"):
        opts.pop(key, None)


def _options_chiou(c: _DesignContext, opts: dict[str, Any]) -> None:
    """Options of method 'chiou'."""
    method = "chiou"
    spec, col, q, v, history, plateau = c.spec, c.col, c.col.q, c.v, c.history, c.plateau
    window = c.window
    rate = q(spec.rate, "rate", "design.rate", positive=True)
    samples = [_sample(col, s, f"design.samples[{i}]")
               for i, s in enumerate(spec.samples or [])]
    if len(samples) != 2:
        col.add(f"Chiou's method takes exactly two levels, got {len(samples)}",
                "design.samples", "two { time, concentration } tables")
    elif None not in samples:
        (t1, c1), (t2, c2) = samples
        if t2 <= t1:
            col.add(f"the second level (at {t2:g} h) must be drawn after the first "
                    f"(at {t1:g} h)", "design.samples", "levels in time order, apart")
        opts.update(t1=t1, c1=c1, t2=t2, c2=c2)
    needs = {"plateau": plateau, "volume": v} if history else {
        "rate": rate, "plateau": plateau, "volume": v}
    if _need(col, method, **needs):
        opts.update(rate=rate, volume=v, target=plateau)
    if window is not None:
        opts["window"] = window
    for key in ("max_dose", "max_loading", "max_loading_ratio"):
        opts.pop(key, None)


def _options_map(c: _DesignContext, opts: dict[str, Any]) -> None:
    """Options of method 'map'."""
    spec, col, q, plateau, peak = c.spec, c.col, c.col.q, c.plateau, c.peak
    peak_limits, interval_opts, auc, window = c.peak_limits, c.interval_opts, c.auc, c.window
    from .fitopts import load_prior, parse_prior

    levels = [_sample(col, x, f"design.levels[{i}]", blq_ok=True)
              for i, x in enumerate(spec.levels or [])]
    if not levels:
        col.add("method 'map' needs measured levels", "design.levels",
                "levels = [ { time = '6 h', concentration = '8.1 mg/L' } ]")
    prior = None
    try:
        if isinstance(spec.prior, dict):
            prior = parse_prior(spec.prior)
        elif isinstance(spec.prior, str):
            prior = load_prior(spec.prior)
        else:
            col.add("method 'map' needs a prior", "design.prior",
                    "a [scenarios.design.prior] table or a prior file path")
    except PkcalcInputError as exc:
        col.problems.extend(exc.problems)
    t_inf = q(spec.infusion_time, "time", "design.infusion_time", nonnegative=True)
    if plateau is None and peak is None and peak_limits is None and auc is None:
        col.add("method 'map' needs a new target: plateau, auc_24, or peak/trough with "
                "infusion_time", "design.plateau")
    if plateau is None and t_inf is None and (peak is not None or peak_limits is not None):
        col.add("a peak/trough target needs infusion_time", "design.infusion_time")
    opts.update(levels=[x for x in levels if x is not None], prior=prior, plateau=plateau,
                infusion_time=t_inf, **interval_opts)
    lt = q(spec.loading_time, "time", "design.loading_time", nonnegative=True)
    if lt is not None:
        opts["loading_time"] = lt
    if window is not None:
        opts["window"] = window
    interval = q(spec.interval, "time", "design.interval", positive=True)
    if interval is not None:
        opts["interval"] = interval
    level = _attainment_level(col, spec.attainment_level)
    if level is not None:
        opts["attainment_level"] = level
    if spec.rank is not None:
        if spec.rank not in RANKS:
            col.add(f"unknown ranking '{spec.rank}'", "design.rank", " or ".join(RANKS))
        opts["rank"] = spec.rank


#: How MAP proposals are ordered: the method's own order, or by the joint probability.
RANKS = ("target", "attainment")


def _attainment_level(col: Collector, raw) -> float | None:
    """``attainment_level``: a fraction in (0, 1] or a percentage ("70%")."""
    if raw is None:
        return None
    text = str(raw).strip()
    try:
        value = float(text[:-1]) / 100 if text.endswith("%") else float(text)
    except ValueError:
        value = float("nan")
    if isinstance(raw, bool) or not 0 < value <= 1 or (not text.endswith("%") and value > 1):
        col.add(f"attainment_level must be a probability above 0 and at most 1, got {raw!r}",
                "design.attainment_level", "e.g. 0.7 or '70%'")
        return None
    return value


def _options_sawchuk_zaske(c: _DesignContext, opts: dict[str, Any]) -> None:
    """Options of method 'sawchuk_zaske'."""
    method = "sawchuk_zaske"
    spec, col, q, history, peak, trough = c.spec, c.col, c.col.q, c.history, c.peak, c.trough
    peak_limits, trough_limits, interval_opts = c.peak_limits, c.trough_limits, c.interval_opts
    auc = c.auc
    dose = q(spec.dose, "amount", "design.dose", positive=True)
    t_inf = q(spec.infusion_time, "time", "design.infusion_time", nonnegative=True)
    interval = q(spec.interval, "time", "design.interval", positive=True)
    ps = _sample(col, spec.peak_sample, "design.peak_sample")
    ts = _sample(col, spec.trough_sample, "design.trough_sample")
    if history:  # the doses come from the history; the new regimen needs an infusion time
        _need(col, method, peak_sample=spec.peak_sample, trough_sample=spec.trough_sample)
        if t_inf is None and spec.new_infusion_time is None:
            col.add("the new regimen needs infusion_time", "design.infusion_time")
    else:
        _need(col, method, dose=dose, infusion_time=t_inf, interval=interval,
              peak_sample=spec.peak_sample, trough_sample=spec.trough_sample)
    if ps is not None and ts is not None:
        if ts[1] >= ps[1]:
            col.add(f"the trough level {ts[1]:g} mg/L is not below the peak level "
                    f"{ps[1]:g} mg/L", "design.trough_sample.concentration")
        if ts[0] == ps[0]:
            col.add("the peak and trough are drawn at the same time", "design.trough_sample")
        if not history and t_inf is not None and ps[0] < t_inf:
            col.add(f"the peak (at {ps[0]:g} h) is drawn before the infusion ends "
                    f"({t_inf:g} h)", "design.peak_sample.time")
        if not history and 0 <= ts[0] < ps[0]:
            col.add("the trough must be drawn after the peak, or before the dose "
                    "(negative time)", "design.trough_sample.time")
        if not history and ts[0] < 0 and spec.steady_state is False \
                and spec.pre_dose is None:
            col.add("with steady_state = false a trough drawn before the dose cannot give "
                    "the elimination rate (a dose lies between the two levels): give the "
                    "dose history as doses = [...], or draw both levels after the infusion",
                    "design.steady_state")
    if ((peak is None and peak_limits is None) or (trough is None and trough_limits is None)) \
            and auc is None:
        col.add("the new regimen needs peak and trough targets or limits (or an AUC24 "
                "target)", "design.peak")
    pre = q(spec.pre_dose, "concentration", "design.pre_dose", nonnegative=True)
    new_t = q(spec.new_infusion_time, "time", "design.new_infusion_time",
              nonnegative=True)
    opts.update(dose=dose, infusion_time=t_inf, interval=interval,
                peak_level=ps[1] if ps else None, peak_time=ps[0] if ps else None,
                trough_level=ts[1] if ts else None, trough_time=ts[0] if ts else None,
                pre_dose_level=pre, new_infusion_time=new_t, **interval_opts)
    if spec.steady_state is not None:
        opts["steady_state"] = spec.steady_state
    for key in ("rate_step", "max_rate", "max_loading", "max_loading_ratio"):
        opts.pop(key, None)


_METHOD_OPTIONS = {name: globals()[f"_options_{name}"] for name in DESIGN_METHODS}
