"""Areas and the terminal slope: the building blocks of non-compartmental analysis.

- linear trapezoid ``(C1 + C2)/2 dt``; log trapezoid when ``C2 < C1``, both > 0:
  ``(C1 - C2) dt / ln(C1/C2)``; log AUMC segment
  ``dt (t1 C1 - t2 C2)/L + dt^2 (C1 - C2)/L^2`` with ``L = ln(C1/C2)``
  (Yeh & Kwan, J Pharmacokinet Biopharm 1978;6:79);
- terminal slope: least squares of ``ln C`` on ``t`` over the last ``n >= 3``
  points; adjusted ``R2 = 1 - (1 - R2)(n - 1)/(n - 2)``; pkcalc's rule: the longest
  tail whose adjusted R2 is at most :data:`R2_TOLERANCE` (the slope tolerance, an
  option) below the best tail's.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..core import NCA_AUC_METHODS

__all__ = ["AUC_METHODS", "R2_TOLERANCE", "TerminalPhase", "auc_segments", "level_at",
           "terminal_phase"]

#: Adjusted R2 within this of the best counts as a tie; the tie with more points wins.
R2_TOLERANCE = 1e-4
AUC_METHODS = NCA_AUC_METHODS


def auc_segments(t, c, method: str = "linear_up_log_down"):
    """Area and first-moment area of each segment between consecutive samples.

    Parameters
    ----------
    t, c : array_like, shape (n,)
        Times (h, increasing) and levels (mg/L).
    method : {"linear_up_log_down", "linear"}
        The log rule is used for falling segments with both levels > 0
        (Yeh & Kwan 1978); it is exact for a single exponential.

    Returns
    -------
    auc, aumc : ndarray, shape (n - 1,)
        mg h/L and mg h^2/L.

    Examples
    --------
    >>> auc, _ = auc_segments([0.0, 1.0], [2.0, 2.0 * math.exp(-1.0)])
    >>> round(float(auc[0]), 6) == round(2.0 * (1 - math.exp(-1.0)), 6)
    True
    """
    t = np.asarray(t, dtype=float)
    c = np.asarray(c, dtype=float)
    t1, t2, c1, c2 = t[:-1], t[1:], c[:-1], c[1:]
    dt = t2 - t1
    auc = 0.5 * (c1 + c2) * dt
    aumc = 0.5 * (t1 * c1 + t2 * c2) * dt
    if method == "linear":
        return auc, aumc
    log = (c2 < c1) & (c2 > 0) & (c1 > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        L = np.log(c1 / c2)
        auc_log = (c1 - c2) * dt / L
        aumc_log = dt * (t1 * c1 - t2 * c2) / L + dt**2 * (c1 - c2) / L**2
    return np.where(log, auc_log, auc), np.where(log, aumc_log, aumc)


@dataclass(frozen=True)
class TerminalPhase:
    """The chosen terminal log-linear regression.

    Attributes
    ----------
    slope : float, 1/h
        ``lambda_z`` (positive for a falling phase).
    intercept : float
        ``ln C`` at time 0 of the regression.
    r2, adjusted_r2 : float
    times : ndarray
        The sample times used.
    """

    slope: float
    intercept: float
    r2: float
    adjusted_r2: float
    times: np.ndarray


def _regress(t: np.ndarray, y: np.ndarray):
    """Least squares of y on t for several suffix sets at once is done by the caller;
    this is the plain fit with R2."""
    n = t.size
    tm, ym = t.mean(), y.mean()
    sxx = ((t - tm) ** 2).sum()
    sxy = ((t - tm) * (y - ym)).sum()
    syy = ((y - ym) ** 2).sum()
    b = sxy / sxx
    r2 = 1.0 if syy == 0 else (sxy * sxy) / (sxx * syy)
    adj = 1 - (1 - r2) * (n - 1) / (n - 2) if n > 2 else math.nan
    return b, ym - b * tm, r2, adj


def terminal_phase(t, c, *, min_points: int = 3, tolerance: float = R2_TOLERANCE,
                   times=None) -> tuple[TerminalPhase | None, str]:
    """Terminal slope by log-linear regression over the last points.

    Candidates are the last ``n`` points (``n >= min_points``) of ``t, c``
    (which the caller restricts to samples after the peak and after the end of
    the infusion, with ``c > 0``).  The set with the highest adjusted R2 wins;
    sets within ``tolerance`` of it count as ties and the one with more points
    is taken.  With ``times`` given, exactly those samples are used (manual
    selection, at least 2).

    Returns
    -------
    phase : TerminalPhase or None
    note : str
        Why no slope could be estimated, or how the points were chosen.
    """
    t = np.asarray(t, dtype=float)
    c = np.asarray(c, dtype=float)
    if times is not None:
        chosen = np.isin(np.round(t, 9), np.round(np.asarray(times, float), 9))
        if chosen.sum() < 2:
            return None, "fewer than 2 of the chosen terminal points are usable samples"
        tt, yy = t[chosen], np.log(c[chosen])
        b, a, r2, adj = _regress(tt, yy)
        if not b < 0:
            return None, "the chosen terminal points do not fall: no terminal slope"
        return TerminalPhase(-b, a, r2, adj, tt), "terminal points chosen by the user"
    if t.size < min_points:
        return None, (f"only {t.size} usable level(s) after the peak: at least {min_points} "
                      "are needed for a terminal slope")
    y = np.log(c)
    best = None
    fits = []
    for n in range(min_points, t.size + 1):
        b, a, r2, adj = _regress(t[-n:], y[-n:])
        fits.append((n, b, a, r2, adj))
    falling = [f for f in fits if f[1] < 0]
    if not falling:
        return None, "the terminal phase is rising or flat: no terminal slope"
    top = max(f[4] for f in falling)
    ties = [f for f in falling if f[4] >= top - tolerance]
    best = max(ties, key=lambda f: f[0])
    n, b, a, r2, adj = best
    return TerminalPhase(-b, a, r2, adj, t[-n:]), (
        f"terminal slope over the last {n} of {t.size} levels after the peak: the longest "
        f"tail whose adjusted R² ({adj:.4f}) is at most {tolerance:g} below the best tail's "
        "(slope tolerance)")


def level_at(t, c, at: float, method: str = "linear_up_log_down") -> float:
    """The level at time ``at`` between two samples (``t[0] <= at <= t[-1]``):
    log-linear between falling positive levels (log-down), linear otherwise -- the
    same rule as the areas, so that an area cut at ``at`` adds up."""
    t = np.asarray(t, float)
    c = np.asarray(c, float)
    j = int(np.searchsorted(t, at, side="right"))
    if j <= 0:
        return float(c[0])
    if j >= t.size:
        return float(c[-1])
    t1, t2, c1, c2 = t[j - 1], t[j], c[j - 1], c[j]
    if t2 == t1:
        return float(c2)
    w = (at - t1) / (t2 - t1)
    if method != "linear" and c2 < c1 and c2 > 0 and c1 > 0:
        return float(c1 * (c2 / c1) ** w)
    return float(c1 + w * (c2 - c1))
