"""Adjustment from measured levels: proportional, Chiou, Sawchuk-Zaske; and
the dispatcher that runs a validated design request."""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from scipy.optimize import brentq

from .. import model
from .._format import short
from ..schema import DesignCase
from .common import (
    DEFAULT_DOSE_STEP,
    DEFAULT_INTERVALS,
    DEFAULT_RATE_STEP,
    DesignResult,
    Limits,
    Regimen,
    rate_for_target,
    round_to_step,
)
from .targets import design_continuous, design_intermittent


# --------------------------------------------------------------------------- adjustments
def adjust_proportional(
    measured: float,
    target: float,
    *,
    current_rate: float | None = None,
    current_dose: float | None = None,
    interval: float | None = None,
    clearance: float | None = None,
    volume: float | None = None,
    salt_factor: float = 1.0,
    rate_step: float | None = DEFAULT_RATE_STEP,
    dose_step: float | None = DEFAULT_DOSE_STEP,
    name: str = "adjustment",
) -> DesignResult:
    """New rate (or dose) from a steady-state level, for linear kinetics.

    ``new = old x Ctarget / Cmeasured`` (Bauer -- from memory).  At steady
    state on a constant rate the level also gives the patient's clearance,
    ``CL = S R0 / Css``.  When the level is above the target and the volume is
    known, the infusion can be held for ``ln(Cmeasured/Ctarget)/k`` before the
    lower rate starts (Bauer -- from memory).

    Parameters
    ----------
    measured, target : float, mg/L
    current_rate : float, optional, mg/h
    current_dose, interval : float, optional, mg and h
        For intermittent regimens (the level is any fixed point of the interval).
    clearance, volume : float, optional, L/h and L
        Population values; the volume is used for the pause.
    """
    if (current_rate is None) == (current_dose is None):
        raise ValueError("give either current_rate or current_dose")
    ratio = target / measured
    estimates: dict[str, float] = {"ratio_target_to_measured": ratio}
    notes, regimens = [], []
    if current_rate is not None:
        exact = current_rate * ratio
        rate = round_to_step(exact, rate_step)
        cl_ind = salt_factor * current_rate / measured
        estimates["clearance"] = cl_ind
        if volume is not None:
            k = cl_ind / volume
            estimates["elimination_rate"] = k
            estimates["half_life"] = model.LN2 / k
            if measured > target:
                estimates["pause_before_new_rate"] = math.log(measured / target) / k
                notes.append(
                    f"to reach the target sooner, the infusion may be held for "
                    f"{short(estimates['pause_before_new_rate'])} h before the new rate starts "
                    "(individual k from the implied clearance and the given volume)"
                )
        predicted = {"plateau": salt_factor * rate / cl_ind, "peak": None, "trough": None,
                     "average": salt_factor * rate / cl_ind}
        regimens.append(Regimen(f"new rate {short(rate)} mg/h", rate=rate, predicted=predicted,
                                meets_target=abs(predicted["plateau"] / target - 1) <= 0.1,
                                exact={"rate": exact}))
    else:
        exact = current_dose * ratio  # type: ignore[operator]
        dose = round_to_step(exact, dose_step)
        level = measured * dose / current_dose  # type: ignore[operator]
        regimens.append(Regimen(f"new dose {short(dose)} mg", dose=dose, interval=interval,
                                predicted={"level": level},
                                meets_target=abs(level / target - 1) <= 0.1,
                                exact={"dose": exact}))
    notes.append("assumes linear kinetics and a level drawn at steady state")
    return DesignResult(name, "proportional", clearance, volume, regimens,
                        target={"plateau": target}, estimates=estimates, notes=notes,
                        salt_factor=salt_factor)


def chiou_clearance(rate, t1, c1, t2, c2, volume):
    """Clearance from two levels during a constant infusion (Chiou et al. 1978).

    ``CL = 2 R0 / (C1 + C2) + 2 V (C1 - C2) / ((C1 + C2)(t2 - t1))``

    It replaces the area between the two levels by a trapezoid, and is biased
    by several per cent when the levels are far apart (Chiou et al., J
    Pharmacokinet Biopharm 1978;6:135 -- from memory).

    Parameters
    ----------
    rate : float, mg/h
        Drug infusion rate between the two draws.
    t1, c1, t2, c2 : float
        Draw times (h, ``t2 > t1``) and levels (mg/L).
    volume : float, L
        Population volume.

    Examples
    --------
    >>> round(chiou_clearance(30.0, 0.0, 10.0, 6.0, 10.0, 35.0), 6)  # at plateau: R0/C
    3.0
    """
    return 2 * rate / (c1 + c2) + 2 * volume * (c1 - c2) / ((c1 + c2) * (t2 - t1))


def exact_two_level_clearance(rate, t1, c1, t2, c2, volume):
    """Clearance that carries ``C1`` at ``t1`` to ``C2`` at ``t2`` under constant infusion.

    Solves ``C2 = C1 exp(-k dt) + (R0/CL)(1 - exp(-k dt))`` with ``k = CL/V``
    for ``CL`` (Brent's method); the right side falls monotonically from
    ``C1 + R0 dt / V`` (CL -> 0) to 0 (CL -> infinity), so the root is unique.

    Raises
    ------
    ValueError
        When ``C2`` is higher than the infusion could produce with this volume.
    """
    dt = t2 - t1

    def f(cl):
        k = cl / volume
        return c1 * math.exp(-k * dt) - rate / cl * math.expm1(-k * dt) - c2

    upper_level = c1 + rate * dt / volume
    if c2 >= upper_level:
        raise ValueError(
            f"the second level {c2:g} mg/L is above what the infusion alone can reach with "
            f"this volume ({upper_level:g} mg/L at zero clearance)"
        )
    lo, hi = 1e-12 * volume / dt, 1.0 * volume / dt
    while f(hi) > 0:
        hi *= 10.0
        if hi > 1e12:
            raise ValueError("no clearance reproduces the two levels")
    return brentq(f, lo, hi, xtol=1e-14, rtol=1e-14, maxiter=500)


def adjust_two_levels(
    rate: float, t1: float, c1: float, t2: float, c2: float, volume: float, target: float,
    *, salt_factor: float = 1.0, rate_step: float | None = DEFAULT_RATE_STEP,
    name: str = "adjustment",
) -> DesignResult:
    """Chiou and exact two-level clearance during a constant infusion, and new rates."""
    drug_rate = salt_factor * rate
    cl_chiou = chiou_clearance(drug_rate, t1, c1, t2, c2, volume)
    cl_exact = exact_two_level_clearance(drug_rate, t1, c1, t2, c2, volume)
    regimens = []
    for label, cl in (("exact one-compartment solution", cl_exact), ("Chiou's method", cl_chiou)):
        exact = rate_for_target(target, cl, salt_factor)
        new = round_to_step(exact, rate_step)
        plateau = salt_factor * new / cl
        regimens.append(Regimen(f"new rate {short(new)} mg/h ({label})", rate=new,
                                predicted={"plateau": plateau, "peak": None, "trough": None,
                                           "average": plateau},
                                meets_target=abs(plateau / target - 1) <= 0.1,
                                exact={"rate": exact, "clearance": cl}))
    diff = cl_chiou / cl_exact - 1
    estimates = {"clearance_exact": cl_exact, "clearance_chiou": cl_chiou,
                 "chiou_minus_exact_percent": 100 * diff,
                 "elimination_rate": cl_exact / volume,
                 "half_life": model.LN2 * volume / cl_exact, "volume": volume}
    notes = ["Chiou's method approximates the area between the levels by a trapezoid; the "
             "exact solution assumes one compartment and the stated volume",
             "both clearances depend on the population volume given"]
    warnings = []
    if abs(diff) > 0.05:
        warnings.append(f"Chiou's clearance differs from the exact solution by {diff:+.1%}: "
                        "the levels are far apart for the trapezoid approximation")
    return DesignResult(name, "chiou", cl_exact, volume, regimens, target={"plateau": target},
                        estimates=estimates, notes=notes, warnings=warnings,
                        salt_factor=salt_factor)


def sawchuk_zaske(
    dose: float,
    infusion_time: float,
    interval: float,
    peak_level: float,
    peak_time: float,
    trough_level: float,
    trough_time: float,
    *,
    pre_dose_level: float | None = None,
    steady_state: bool = True,
    salt_factor: float = 1.0,
) -> dict[str, float]:
    """Individual k, half-life, V and CL from a peak and a trough (Sawchuk & Zaske 1976).

    Times are hours after the start of the sampled dose's infusion; a trough
    drawn before that dose has a negative time.  With ``dt`` the time between
    the draws (for a pre-dose trough at steady state, ``tau + t_trough - t_peak``):

    - ``k = ln(Cpeak/Ctrough) / dt``;
    - ``Cmax = Cpeak exp(k (t_peak - T))`` (back to the end of the infusion);
    - ``Cmin = Cmax exp(-k (tau - T))`` (end of the interval);
    - ``C0`` the level when the dose started (pre-dose level, or at steady
      state the extrapolated trough);
    - ``V = k0 (1 - exp(-kT)) / (k [Cmax - C0 exp(-kT)])``, ``k0 = S dose / T``;
      for a bolus ``V = S dose / (Cmax - C0)``.

    Sawchuk RJ, Zaske DE. J Pharmacokinet Biopharm 1976;4:183 (from memory).

    Returns
    -------
    dict
        ``elimination_rate``, ``half_life``, ``volume``, ``clearance``,
        ``peak_at_end_of_infusion``, ``trough_at_end_of_interval``, ``pre_dose_level``.
    """
    if trough_time < 0:
        dt = interval + trough_time - peak_time
    else:
        dt = trough_time - peak_time
    if dt <= 0:
        raise ValueError("the trough must be drawn after the peak (or before the dose)")
    if peak_time < infusion_time:
        raise ValueError("the peak must be drawn after the end of the infusion")
    k = math.log(peak_level / trough_level) / dt
    cmax = peak_level * math.exp(k * (peak_time - infusion_time))
    cmin = cmax * math.exp(-k * (interval - infusion_time))
    if pre_dose_level is not None:
        c0 = pre_dose_level
    elif trough_time < 0:
        c0 = trough_level * math.exp(k * trough_time)
    elif steady_state:
        c0 = cmin
    else:
        raise ValueError("give the pre-dose level, or state that the levels are at steady state")
    if infusion_time > 0:
        k0 = salt_factor * dose / infusion_time
        volume = k0 * -math.expm1(-k * infusion_time) / (
            k * (cmax - c0 * math.exp(-k * infusion_time)))
    else:
        volume = salt_factor * dose / (cmax - c0)
    if not volume > 0:
        raise ValueError("the levels imply a non-positive volume: check the times and levels")
    return {"elimination_rate": k, "half_life": model.LN2 / k, "volume": volume,
            "clearance": k * volume, "peak_at_end_of_infusion": cmax,
            "trough_at_end_of_interval": cmin, "pre_dose_level": c0}


def adjust_peak_trough(
    dose: float, infusion_time: float, interval: float,
    peak_level: float, peak_time: float, trough_level: float, trough_time: float,
    *, pre_dose_level: float | None = None, steady_state: bool = True,
    new_infusion_time: float | None = None, peak: float | None = None,
    trough: float | None = None, peak_limits: Limits | None = None,
    trough_limits: Limits | None = None, intervals: Sequence[float] = DEFAULT_INTERVALS,
    dose_step: float | None = DEFAULT_DOSE_STEP, salt_factor: float = 1.0,
    max_dose: float | None = None, name: str = "adjustment",
) -> DesignResult:
    """Sawchuk-Zaske individualisation, then a new dose and interval to the targets."""
    est = sawchuk_zaske(dose, infusion_time, interval, peak_level, peak_time, trough_level,
                        trough_time, pre_dose_level=pre_dose_level, steady_state=steady_state,
                        salt_factor=salt_factor)
    t_new = infusion_time if new_infusion_time is None else new_infusion_time
    result = design_intermittent(
        est["clearance"], est["volume"], t_new, peak=peak, trough=trough,
        peak_limits=peak_limits, trough_limits=trough_limits, intervals=intervals,
        dose_step=dose_step, salt_factor=salt_factor, max_dose=max_dose, name=name)
    result.method = "sawchuk_zaske"
    result.estimates = est
    result.notes.insert(0, "individual k from the log-linear decline between the two levels; "
                           "V from the peak at the end of the infusion and the pre-dose level "
                           "(Sawchuk & Zaske 1976)")
    return result


def run_design(case: DesignCase) -> DesignResult:
    """Run a validated design request (see :class:`pkcalc.schema.DesignCase`)."""
    opts = dict(case.options)
    for key in ("peak_limits", "trough_limits"):
        if opts.get(key) is not None:
            opts[key] = Limits(*opts[key])
    if opts.get("window") is not None:
        opts["window"] = Limits(*opts["window"])
    functions = {
        "map": adjust_map,
        "continuous": design_continuous,
        "intermittent": design_intermittent,
        "proportional": adjust_proportional,
        "chiou": adjust_two_levels,
        "sawchuk_zaske": adjust_peak_trough,
    }
    result = functions[case.method](**opts, name=case.name)
    from ..plausibility import parameter_warnings

    if result.clearance and result.volume:
        result.warnings.extend(parameter_warnings(result.clearance, result.volume, case.weight))
    return result


def adjust_map(doses, levels, prior, *, plateau=None, window=None, infusion_time=None,
               peak=None, trough=None, peak_limits=None, trough_limits=None,
               intervals=DEFAULT_INTERVALS, weight=None, salt_factor: float = 1.0,
               name: str = "adjustment", **rounding) -> DesignResult:
    """Bayesian (MAP) individualisation from any levels, then a new regimen.

    The individual clearance and volume are the posterior mode given the levels
    after ``doses`` and the population ``prior`` (see :mod:`pkcalc.fit`); the new
    regimen is designed with them: a continuous infusion to ``plateau``, or
    repeated infusions of ``infusion_time`` to the peak/trough targets or limits.
    """
    from ..fit import fit_subjects
    from ..schema.fitopts import FitOptions
    from ..schema.study import SubjectData

    t = np.array([x[0] for x in levels], float)
    c = np.array([x[1] for x in levels], float)
    order = np.argsort(t)
    events = model.expand_doses([d.start for d in doses], [d.amount for d in doses],
                                [d.duration for d in doses],
                                every=[d.every or 0.0 for d in doses],
                                count=[d.count for d in doses])
    subject = SubjectData(name, t[order], c[order], np.full(t.size, np.nan),
                          np.zeros(t.size, bool), np.arange(t.size), *events,
                          covariates={} if weight is None else {"weight": weight})
    fits, failures = fit_subjects([subject], FitOptions(prior=prior, blq="drop"))
    if not fits:
        raise ValueError(f"the MAP estimate failed: {failures[0][1]}")
    fit = fits[0]
    cl, v = fit.clearance, fit.volume
    if plateau is not None:
        result = design_continuous(cl, v, plateau, window=window, salt_factor=salt_factor,
                                   name=name, **{k: x for k, x in rounding.items()
                                                 if k in ("rate_step", "dose_step",
                                                          "max_rate", "max_loading",
                                                          "max_loading_ratio")})
    else:
        result = design_intermittent(cl, v, infusion_time, peak=peak, trough=trough,
                                     peak_limits=peak_limits, trough_limits=trough_limits,
                                     intervals=intervals, salt_factor=salt_factor, name=name,
                                     **{k: x for k, x in rounding.items()
                                        if k in ("dose_step", "max_dose")})
    result.method = "map"
    result.estimates = {"clearance": cl, "volume": v,
                        "half_life": fit.estimates["half_life"].value,
                        **{k: x for k, x in fit.prior.items() if k.startswith("prior_variance")}}
    result.notes.insert(0, f"individual clearance and volume: MAP estimate from "
                           f"{fit.n_obs} level(s) and the prior ({prior.source or 'inline'})")
    if plateau is not None:
        current = float(fit.predict([float(t.max())])[0])
        result.notes.append(
            f"the loading doses assume a start from zero; the predicted level at the last "
            f"sample is {short(current)} mg/L, so the incremental loading dose "
            f"(target - current) x V is {short(max(plateau - current, 0.0) * v / salt_factor)}"
            " mg")
    result.notes += fit.notes
    result.warnings += fit.warnings
    return result
