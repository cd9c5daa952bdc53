"""Whether repeated doses are regular: the dosing records judged with a stated
clinical tolerance.

Real records never repeat to the second: a dose given at 08:10 instead of 08:00, or
an infusion that ran 62 instead of 60 minutes, is the prescribed regimen.  pkcalc
calls doses regular when every gap between starts is within the larger of 10 % of
the interval and 1 h of the interval, every infusion time within the larger of 10 %
and 15 min of the typical infusion time, and every amount within 10 % of the last
(common practice: the windows wards use to call a dose "on time"; both tolerances
are options).  The interval is the median gap.  The actual times are still used for
every area; the judgement only says which analysis applies.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .._format import short

__all__ = ["DURATION_TOLERANCE", "INTERVAL_TOLERANCE", "Regimen", "dosing_regimen"]

#: (fraction of the interval, hours): a gap within the larger of the two is on time.
INTERVAL_TOLERANCE = (0.10, 1.0)
#: (fraction of the infusion time, hours): an infusion within the larger is as given.
DURATION_TOLERANCE = (0.10, 0.25)
#: Amounts within this fraction of the last dose are the same regimen.
AMOUNT_TOLERANCE = 0.10


@dataclass(frozen=True)
class Regimen:
    """The dosing records as a regimen.

    Attributes
    ----------
    n_doses : int
    interval : float or None, h
        The median gap between starts (None for one dose).
    regular : bool
        Every gap, infusion time and amount within its tolerance (True for one dose).
    description : str
        The judgement in words, with the figures it rests on.
    """

    n_doses: int
    interval: float | None
    regular: bool
    description: str


def dosing_regimen(starts, amounts, durations, *,
                   interval_tolerance: tuple[float, float] = INTERVAL_TOLERANCE,
                   duration_tolerance: tuple[float, float] = DURATION_TOLERANCE) -> Regimen:
    """Judge the regularity of repeated doses (see the module docstring).

    Examples
    --------
    >>> r = dosing_regimen([0, 24.0, 47.8, 72.2], [500] * 4, [1.0, 1.03, 1.05, 1.02])
    >>> r.regular, r.interval
    (True, 24.0)
    """
    starts = np.asarray(starts, float)
    amounts = np.asarray(amounts, float)
    durations = np.asarray(durations, float)
    n = starts.size
    if n < 2:
        return Regimen(n, None, True, "a single dose")
    gaps = np.diff(starts)
    tau = float(np.median(gaps))
    allowed = max(interval_tolerance[0] * tau, interval_tolerance[1])
    late = np.flatnonzero(np.abs(gaps - tau) > allowed)
    typical = float(np.median(durations))
    allowed_d = max(duration_tolerance[0] * typical, duration_tolerance[1])
    long_ = np.flatnonzero(np.abs(durations - typical) > allowed_d)
    off = np.flatnonzero(np.abs(amounts - amounts[-1]) > AMOUNT_TOLERANCE * amounts[-1])
    words = (f"{n} doses, gaps {short(gaps.min())}-{short(gaps.max())} h against the interval "
             f"{short(tau)} h +/- {short(allowed)} h (the larger of "
             f"{interval_tolerance[0]:.0%} and {short(interval_tolerance[1])} h)")
    if typical > 0 or durations.max() > 0:
        words += (f", infusions {short(durations.min())}-{short(durations.max())} h against "
                  f"{short(typical)} h +/- {short(allowed_d)} h")
    problems = []
    if late.size:
        problems.append(f"dose {late[0] + 2} starts {short(gaps[late[0]])} h after the one "
                        "before")
    if long_.size:
        problems.append(f"dose {long_[0] + 1} runs {short(durations[long_[0]])} h")
    if off.size:
        problems.append(f"dose {off[0] + 1} is {short(amounts[off[0]])} mg against "
                        f"{short(amounts[-1])} mg last")
    if problems:
        return Regimen(n, tau, False, words + ": irregular (" + "; ".join(problems) + ")")
    return Regimen(n, tau, True, words + ": regular")
