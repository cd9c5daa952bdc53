"""Individual parameters from measured levels: Chiou's two-level clearance, the exact
one- and two-level solutions after any dose history, and Sawchuk-Zaske."""

from __future__ import annotations

import math

import numpy as np
from scipy.optimize import brentq

from .. import model


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


def _level_parts(t, events, k):
    """``(g, c)`` with the level at ``t`` = ``g / V + c``: ``g`` the doses' part at
    ``V = 1`` (amount/V scaling) and ``c`` the initial-level part (no V)."""
    start, amount, duration = events
    init = duration < 0
    dose = (start[~init], amount[~init], duration[~init])
    g = float(model.concentration([t], *dose, k, 1.0)[0]) if dose[0].size else 0.0
    c = float(model.concentration([t], start[init], amount[init], duration[init], k, 1.0)[0]) \
        if init.any() else 0.0
    return g, c


def two_level_parameters(events, first: tuple[float, float], second: tuple[float, float]
                         ) -> dict[str, float]:
    """Elimination rate and volume that reproduce two levels after any dose history.

    Each level is ``C(t) = g(t; k) / V + c(t; k)`` by superposition, with ``g``
    the doses' response at unit volume and ``c`` an initial level's decay
    (:func:`pkcalc.model.concentration`).  Eliminating ``V``::

        (C1 - c(t1; k)) g(t2; k) = (C2 - c(t2; k)) g(t1; k)

    is one equation in ``k`` (solved by Brent's method after a scan of
    ``ln k``), then ``V = g(t1; k) / (C1 - c(t1; k))``.  With one dose and both
    levels after its infusion this is the log-linear decline of Sawchuk & Zaske
    (1976); at steady state it reproduces their pre-dose trough form (from
    memory) -- without the steady-state assumption, since the earlier doses are
    superposed exactly.

    Parameters
    ----------
    events : tuple of three ndarrays
        Single events (drug amounts, h; initial levels allowed).
    first, second : (float, float)
        ``(time h, level mg/L)`` on the history clock.

    Raises
    ------
    ValueError
        When no (or more than one) elimination rate reproduces the two levels.
    """
    (t1, c1), (t2, c2) = first, second

    def h(lnk):
        k = math.exp(lnk)
        g1, i1 = _level_parts(t1, events, k)
        g2, i2 = _level_parts(t2, events, k)
        return (c1 - i1) * g2 - (c2 - i2) * g1

    grid = np.linspace(math.log(1e-5), math.log(50.0), 241)
    values = np.array([h(x) for x in grid])
    sign = np.sign(values)
    roots = np.flatnonzero(sign[:-1] * sign[1:] < 0)
    if roots.size == 0:
        raise ValueError("no elimination rate between 1e-5 and 50 1/h reproduces the two "
                         "levels with this dose history: check the times, levels and doses")
    if roots.size > 1:
        raise ValueError("more than one elimination rate reproduces the two levels with this "
                         "dose history: draw the levels further apart or around one dose")
    j = int(roots[0])
    lnk = brentq(h, grid[j], grid[j + 1], xtol=1e-14, rtol=1e-14, maxiter=500)
    k = math.exp(lnk)
    g1, i1 = _level_parts(t1, events, k)
    if not (c1 - i1) > 0 or not g1 > 0:
        raise ValueError("the levels imply a non-positive volume: check the times and levels")
    volume = g1 / (c1 - i1)
    return {"elimination_rate": k, "half_life": model.LN2 / k, "volume": volume,
            "clearance": k * volume}


def one_level_clearance(events, time: float, level: float, volume: float) -> float:
    """Clearance that reproduces one level after any dose history, with a given volume.

    At fixed ``V`` the level falls monotonically as ``CL`` rises (every term of
    :func:`pkcalc.model.concentration` does), so the root is unique (Brent's
    method).  At steady state on a constant rate it is ``R0 / Css``.
    """
    def f(lncl):
        return float(model.concentration([time], *events, math.exp(lncl), volume)[0]) - level

    lo, hi = math.log(1e-6 * volume), math.log(1e3 * volume)
    if f(lo) < 0:
        raise ValueError(f"the level {level:g} mg/L is above what the infusion alone can reach "
                         "with this volume (check the level, the doses and the volume)")
    if f(hi) > 0:
        raise ValueError(f"the level {level:g} mg/L is too low for the recorded doses")
    return math.exp(brentq(f, lo, hi, xtol=1e-14, rtol=1e-14, maxiter=500))


def check_levels_outside_infusions(events, times: dict[str, float],
                                   method: str = "the peak-and-trough method") -> None:
    """Refuse a level drawn while an infusion runs (the method needs post-infusion levels)."""
    start, _, duration = events
    for name, t in times.items():
        running = (duration > 0) & (start < t) & (t < start + duration)
        if running.any():
            j = int(np.flatnonzero(running)[0])
            raise ValueError(
                f"design.{name}.time: the level at {t:g} h is drawn during an infusion "
                f"(running {start[j]:g} to {start[j] + duration[j]:g} h); {method} "
                "needs levels drawn after the end of an infusion (the MAP method takes "
                "levels at any time)")
