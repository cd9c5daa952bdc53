"""How likely a regimen meets its targets, given what the levels say about the patient.

A proposal is computed from one estimate of clearance and volume; the patient's
true values are uncertain.  Over the posterior of ``ln CL, ln V`` (the nodes and
weights of :func:`pkcalc.fit.posterior.grid_posterior`) every proposal's projected
course is recomputed for each node, together with the history (so the level at the
start is uncertain too), and the probabilities are the posterior weights of the
nodes where

- every peak of the new doses (end of each infusion) is within the peak limits,
- every trough (just before each new dose after the first) within the trough limits,
- every 24-h window's area (mass balance) within the AUC24 range,
- for a continuous infusion, the level within the window from the end of loading
  to the horizon (extremes at the event boundaries: between them a one-compartment
  level moves monotonically),

and ``joint`` is the weight where all of the targets given hold at once.  A 5-95 %
band of the course is kept for the plot.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np

from .. import model
from .._format import short
from ..core import FitOptions
from .common import Limits, records_events
from .projection import _infused_between

__all__ = [
    "ATTAINMENT_LEVEL",
    "BAND_QUANTILES",
    "Attainment",
    "CurrentRegimen",
    "attainment",
    "with_attainment",
]

#: The probability that every target holds that *meets target* needs by default
#: (common practice for target attainment in dosing decisions: a clear majority).
ATTAINMENT_LEVEL = 0.7

#: Quantiles of the course band (plots and JSON).
BAND_QUANTILES = (0.05, 0.5, 0.95)
#: Points of the band's time grid (plus the event boundaries), and the share of the
#: posterior mass (its heaviest nodes) the band is computed from.
BAND_POINTS = 97
BAND_MASS = 0.999
#: Parameter nodes evaluated at once (bounds memory: nodes x times x events).
CELLS = 4_000_000


@dataclass
class Attainment:
    """Posterior probabilities that a regimen meets each target over its projected course.

    Attributes
    ----------
    peak, trough, auc_24, level : float or None
        Probability that every peak / trough / 24-h window area / the level (continuous
        window) is within its limits; None where the design set no such target.
    joint : float or None
        Probability that every target given holds at once.
    method : str
    effective_sample_size : float
    band : dict
        ``time`` (h, history clock) and ``q05``, ``q50``, ``q95`` (mg/L): the course's
        5 %, median and 95 % levels over the posterior.
    """

    peak: float | None = None
    trough: float | None = None
    auc_24: float | None = None
    level: float | None = None
    joint: float | None = None
    method: str = ""
    effective_sample_size: float = 0.0
    band: dict[str, list[float]] = field(default_factory=dict)

    def as_dict(self) -> dict[str, object]:
        return {"peak": self.peak, "trough": self.trough, "auc_24": self.auc_24,
                "level": self.level, "joint": self.joint, "method": self.method,
                "effective_sample_size": self.effective_sample_size}


def _inside(values: np.ndarray, limits: Limits | None) -> np.ndarray:
    """Row-wise: every column within ``limits`` (open ends ignored; 1e-9 relative slack,
    as the point judgement)."""
    ok = np.ones(values.shape[0], dtype=bool)
    if limits is None or values.shape[1] == 0:
        return ok
    if limits.high is not None:
        ok &= (values <= limits.high * (1 + 1e-9)).all(axis=1)
    if limits.low is not None:
        ok &= (values >= limits.low * (1 - 1e-9)).all(axis=1)
    return ok


def _heaviest(weight: np.ndarray, mass: float) -> np.ndarray:
    """Indices of the heaviest nodes that together carry ``mass`` of the weight."""
    order = np.argsort(weight)[::-1]
    n = int(np.searchsorted(np.cumsum(weight[order]), mass * weight.sum())) + 1
    return order[:min(n, weight.size)]


def _weighted_quantiles(values: np.ndarray, weight: np.ndarray, qs) -> np.ndarray:
    """Quantiles of each column of ``values`` (nodes x times) under node ``weight``."""
    order = np.argsort(values, axis=0)
    sorted_v = np.take_along_axis(values, order, axis=0)
    cum = np.cumsum(weight[order], axis=0)
    out = np.empty((len(qs), values.shape[1]))
    for i, q in enumerate(qs):
        idx = (cum < q).sum(axis=0).clip(0, values.shape[0] - 1)
        out[i] = sorted_v[idx, np.arange(values.shape[1])]
    return out


def attainment(clearance: np.ndarray, volume: np.ndarray, weight: np.ndarray,
               history, new, start: float, horizon: float, *,
               peak: Limits | None = None, trough: Limits | None = None,
               auc_24: Limits | None = None, window: Limits | None = None,
               settle: float | None = None, method: str = "",
               effective_sample_size: float = 0.0, band: bool = False) -> Attainment:
    """Probabilities that the course of ``history`` + ``new`` events meets each target.

    Parameters
    ----------
    clearance, volume, weight : ndarray, shape (M,)
        Parameter nodes (L/h, L) and their probabilities (summing to 1).
    history, new : tuple of ndarray
        ``(start, amount, duration)`` single events: the recorded doses (drug amounts,
        initial-level events included) and the regimen's new doses.
    start, horizon : float, h
        The projection runs over ``[start, start + horizon]``.
    peak, trough, auc_24, window : Limits, optional
        The targets (None: not a target).
    settle : float, optional
        From when the continuous ``window`` applies (end of loading; default ``start``).
    """
    cl = np.asarray(clearance, dtype=float)
    v = np.asarray(volume, dtype=float)
    w = np.asarray(weight, dtype=float)
    hist = tuple(np.asarray(a, dtype=float) for a in history)
    new = tuple(np.asarray(a, dtype=float) for a in new)
    events = tuple(np.concatenate([h, n]) for h, n in zip(hist, new, strict=True))
    t0, t1 = float(start), float(start) + float(horizon)
    eps = 1e-9 * max(1.0, abs(t1))
    ends = new[0] + np.maximum(new[2], 0.0)
    inside = (new[0] >= t0) & (new[0] < t1)
    peak_t = np.unique(ends[inside & (ends <= t1)])
    trough_t = np.unique(new[0][inside])[1:]
    marks = np.unique(np.concatenate([[t0, t1], new[0], ends]))
    marks = marks[(marks >= t0) & (marks <= t1)]
    days = np.arange(t0, t1 + 1e-9, 24.0)
    days = days[days + 24.0 <= t1 + 1e-9]
    grid = np.unique(np.concatenate([np.linspace(t0, t1, BAND_POINTS), marks])) if band \
        else np.empty(0)
    n_e = max(events[0].size, 1)
    block = max(1, CELLS // max(n_e * (2 * marks.size + grid.size + 2 * days.size + 4), 1))
    ok = {k: np.ones(cl.size, dtype=bool) for k in ("peak", "trough", "auc_24", "level")}
    courses = []
    for i in range(0, cl.size, block):
        c_i, v_i = cl[i:i + block], v[i:i + block]

        def level(times, c_i=c_i, v_i=v_i):
            times = np.asarray(times, dtype=float)
            if times.size == 0:
                return np.empty((c_i.size, 0))
            return model.concentration(times[None, :], *(e[None, :] for e in events),
                                       c_i, v_i)

        sl = slice(i, i + block)
        if peak is not None:
            ok["peak"][sl] = _inside(level(peak_t), peak)
        if trough is not None:
            ok["trough"][sl] = _inside(level(trough_t - eps), trough)
        if auc_24 is not None and days.size:
            areas = np.column_stack([_window_areas(events, new, a, c_i, v_i, t0, level)
                                     for a in days])
            ok["auc_24"][sl] = _inside(areas, auc_24)
        if window is not None:
            from_t = t0 if settle is None else settle
            m = marks[marks >= from_t - 1e-12]
            both = np.concatenate([level(m), level(np.maximum(m - eps, from_t))], axis=1)
            ok["level"][sl] = _inside(both, window)
        if band:
            courses.append(level(grid))
    given = {"peak": peak, "trough": trough, "auc_24": auc_24 if days.size else None,
             "level": window}
    out = Attainment(method=method, effective_sample_size=effective_sample_size)
    joint = np.ones(cl.size, dtype=bool)
    for key, limits in given.items():
        if limits is None:
            continue
        setattr(out, key, float(w[ok[key]].sum()))
        joint &= ok[key]
    if any(x is not None for x in given.values()):
        out.joint = float(w[joint].sum())
    if band:
        q = _weighted_quantiles(np.concatenate(courses, axis=0), w, BAND_QUANTILES)
        out.band = {"time": grid.tolist(), "q05": q[0].tolist(), "q50": q[1].tolist(),
                    "q95": q[2].tolist()}
    return out


def _window_areas(events, new, a: float, cl, v, t0: float, level) -> np.ndarray:
    """Area over ``[a, a + 24 h]`` for each node, by mass balance (a bolus at ``a`` counts
    as input, not as the level there) -- as :func:`projection.project` computes it."""
    b = a + 24.0
    infused = _infused_between(events, a, b)
    start, amount, duration = events if a > t0 else new
    at_a = float(amount[(duration == 0) & (start == a)].sum())
    c = level(np.array([a, b]))
    return model.area_by_mass_balance(infused, c[:, 0] - at_a / v, c[:, 1], cl, v)


@dataclass(frozen=True)
class CurrentRegimen:
    """The recorded regimen continued over the projection, with its attainment."""

    label: str
    attainment: Attainment


def _limits(target: dict, key: str) -> Limits | None:
    pair = target.get(key)
    if not isinstance(pair, list | tuple) or all(x is None for x in pair):
        return None
    return Limits(*pair)


def _current_events(history, start: float, horizon: float, continuous: bool,
                    tau: float | None):
    """The last recorded dose continued: an infusion at its rate to the horizon, or the
    last dose repeated at the prescribed interval.  None when there is nothing to
    continue (no dose, a bolus for a continuous design, no interval)."""
    st, am, du = (np.asarray(a, dtype=float) for a in history)
    real = (am > 0) & (du >= 0)
    if not real.any():
        return None, ""
    i = int(np.flatnonzero(real)[np.argmax(st[real])])
    end = start + horizon
    if continuous:
        if du[i] <= 0:
            return None, ""
        rate = am[i] / du[i]
        t_from = max(st[i] + du[i], start)
        if t_from >= end:
            return (np.empty(0), np.empty(0), np.empty(0)), \
                f"current infusion {short(rate)} mg/h (drug) continued"
        return (np.array([t_from]), np.array([rate * (end - t_from)]),
                np.array([end - t_from])), f"current infusion {short(rate)} mg/h (drug) continued"
    if tau is None:
        return None, ""
    n = max(math.floor((end - st[i]) / tau - 1e-9), 0)
    starts = st[i] + tau * np.arange(1, n + 1)
    starts = starts[starts >= start - 1e-9]
    label = (f"current regimen continued: {short(am[i])} mg (drug) over {short(du[i])} h "
             f"every {short(tau)} h")
    return (starts, np.full(starts.size, am[i]), np.full(starts.size, du[i])), label


def with_attainment(result, subject, prior, mode: tuple[float, float], history,
                    tau: float | None, level: float = ATTAINMENT_LEVEL,
                    rank: str = "target", horizon: float | None = None) -> None:
    """Attach the posterior attainment to every proposal of a MAP ``result`` (and to the
    current regimen continued); a proposal below ``level`` no longer meets target.

    ``history`` is the whole recorded history (single events, drug amounts): the
    proposals replace what it holds from the state's start on, the current regimen
    keeps it and continues its last dose."""
    from ..fit.posterior import grid_posterior
    from .projection import PROJECTION_HORIZON

    horizon = PROJECTION_HORIZON if horizon is None else horizon
    state = result.state
    if state is None or not result.regimens:
        return
    post = grid_posterior(subject, FitOptions(prior=prior, blq="likelihood"), mode)
    cl, v, w = np.exp(post.ln_clearance), np.exp(post.ln_volume), post.weight
    continuous = result.method == "continuous" or any(r.rate is not None
                                                      for r in result.regimens)
    target = result.target
    limits = {"auc_24": _limits(target, "auc_24")}
    if continuous:
        limits["window"] = _limits(target, "window")
    else:
        limits["peak"] = _limits(target, "peak_limits")
        limits["trough"] = _limits(target, "trough_limits")
    common = dict(method=post.method, effective_sample_size=post.effective_sample_size,
                  **limits)
    end = state.start + horizon
    regimens = []
    for r in result.regimens:
        new = records_events(r.doses, result.salt_factor, end)
        keep = new[0] <= end
        new = tuple(np.asarray(a)[keep] for a in new)
        a = attainment(cl, v, w, state.before, new, state.start, horizon, settle=r.settle,
                       **common)
        r = replace(r, attainment=a)
        if r.meets_target and a.joint is not None and a.joint < level:
            why = (f"the probability that every target holds is {a.joint:.0%}, below the "
                   f"{level:.0%} asked (attainment_level)")
            r = replace(r, meets_target=False, flags=(*r.flags, why))
        regimens.append(r)
    if rank == "attainment":
        regimens.sort(key=lambda r: -(r.attainment.joint or 0.0))
    first = regimens[0]   # the band of the course on the plot: the first proposal's
    new = records_events(first.doses, result.salt_factor, end)
    keep = new[0] <= end
    heavy = _heaviest(w, BAND_MASS)   # 5-95 % quantiles need only the bulk of the mass
    first.attainment.band = attainment(cl[heavy], v[heavy], w[heavy] / w[heavy].sum(),
                                       state.before,
                                       tuple(np.asarray(a)[keep] for a in new), state.start,
                                       horizon, band=True).band
    result.regimens = regimens
    result.attainment_level = level
    events, label = _current_events(history, state.start, horizon, continuous, tau)
    if events is not None:
        result.current = CurrentRegimen(label, attainment(
            cl, v, w, history, events, state.start, horizon, **common))
    result.notes.append(
        f"attainment: the posterior probability that each target holds over the "
        f"{short(horizon)}-h projected course, from the levels and the prior ({post.method}; "
        f"effective sample size {post.effective_sample_size:.0f}); 'meets target' needs "
        f"every target at once with at least {level:.0%}. A probability from a model is "
        "not a guarantee")
    if post.edge_mass > 1e-4:
        result.warnings.append(f"the posterior reaches the edge of its grid ({post.edge_mass:.1e} "
                               "of its mass there): the probabilities may be off by about that")
