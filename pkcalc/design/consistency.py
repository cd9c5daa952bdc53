"""Whether measured levels can come from the recorded history -- checked before any
proposal is trusted.

A proposal made from levels that the recorded doses cannot have produced rests on a
number that is wrong somewhere (a level, a time, a unit, a dose left out of the
record).  Every adjustment method runs the checks that apply to it; a level that
fails one makes every proposal *check levels* (never *meets target*), with the level
and the reason beside the design.

- **Reachable**: with the stated volume, no level can exceed what every milligram
  given by then, none eliminated, would give: ``C(t) <= A(t)/V + C0`` (zero
  clearance; ``A(t)`` the drug given by ``t``, infusions in proportion; ``C0`` drug
  on board) [calc].
- **Falling while nothing is given**: between two levels with no dose given or
  running between them the level can only fall; a rise of more than
  :data:`RISE_TOLERANCE` (about what assay imprecision allows; common practice)
  means the levels, their times or the record are wrong.
- **Fit misses a level**: a MAP or fitted estimate whose prediction misses a level
  by more than :data:`RESIDUAL_SD_LIMIT` residual SDs (about 5 % of levels by chance
  for one level; common practice) -- or an estimate that did not converge.
"""

from __future__ import annotations

import itertools

import numpy as np

from .. import model
from .._format import short

__all__ = ["RESIDUAL_SD_LIMIT", "RISE_TOLERANCE", "fit_misses", "given_by",
           "input_between", "rising_while_eliminating", "unreachable"]

#: A rise between two levels with nothing given that counts as impossible (5 %).
RISE_TOLERANCE = 0.05
#: Standardised residual beyond which a fitted level is suspect.
RESIDUAL_SD_LIMIT = 2.0


def given_by(events, t: float) -> tuple[float, float]:
    """Drug given by ``t`` (mg; infusions in proportion) and drug on board at time 0
    (mg/L, initial levels)."""
    start, amount, duration = (np.asarray(a, float) for a in events)
    initial = duration == model.INITIAL_LEVEL
    dose = ~initial
    s, a, d = start[dose], amount[dose], duration[dose]
    infusing = d > 0
    part = np.where(infusing, np.clip((t - s) / np.where(infusing, d, 1.0), 0.0, 1.0),
                    (s <= t).astype(float))
    return float((a * part).sum()), float(amount[initial & (start <= t)].sum())


def unreachable(events, levels, volume: float) -> list[str]:
    """Levels above the zero-clearance bound of the history (see the module docstring)."""
    out = []
    for t, c in levels:
        amount, on_board = given_by(events, t)
        bound = amount / volume + on_board
        if c > bound * (1 + 1e-9):
            out.append(f"the level at {short(t)} h ({short(c)} mg/L) is above what the recorded "
                       f"doses can give even with no elimination ({short(bound)} mg/L with V "
                       f"{short(volume)} L): a level, its time or its unit, the volume, or a dose "
                       "missing from the record is wrong")
    return out


def input_between(events, a: float, b: float) -> bool:
    """True when a dose is given, or an infusion runs, between ``a`` and ``b``."""
    start, _, duration = (np.asarray(x, float) for x in events)
    dose = duration != model.INITIAL_LEVEL
    s, d = start[dose], duration[dose]
    bolus = (d == 0) & (s > a) & (s <= b)
    running = (d > 0) & (s < b) & (s + d > a)
    return bool(np.any(bolus | running))


def rising_while_eliminating(events, levels) -> list[str]:
    """Pairs of consecutive levels that rise with nothing given between them."""
    out = []
    pts = sorted((float(t), float(c)) for t, c in levels)
    for (t1, c1), (t2, c2) in itertools.pairwise(pts):
        if c2 > c1 * (1 + RISE_TOLERANCE) and not input_between(events, t1, t2):
            out.append(f"the level rises from {short(c1)} mg/L at {short(t1)} h to {short(c2)} "
                       f"mg/L at {short(t2)} h with no dose given or running between them: "
                       "during elimination it can only fall (levels swapped, a time or a "
                       "dose record wrong)")
    return out


def fit_misses(fit, additive: float, proportional: float) -> list[str]:
    """Levels the estimate misses by more than :data:`RESIDUAL_SD_LIMIT` residual SDs, and
    an estimate that did not converge."""
    out = []
    if not fit.converged:
        out.append("the estimate did not converge: the levels may not fit one "
                   "compartment with this history")
    measured = ~np.asarray(fit.blq, bool)
    obs = np.asarray(fit.observed, float)[measured]
    pred = np.asarray(fit.predicted, float)[measured]
    times = np.asarray(fit.time, float)[measured]
    sd = np.sqrt(additive**2 + (proportional * pred) ** 2)
    z = (obs - pred) / np.where(sd > 0, sd, np.inf)
    bad = np.flatnonzero(np.abs(z) > RESIDUAL_SD_LIMIT)
    if bad.size:
        parts = ", ".join(f"{short(obs[i])} mg/L at {short(times[i])} h by {z[i]:+.1f} SD"
                          for i in bad)
        out.append(f"the estimate misses {parts} (beyond {RESIDUAL_SD_LIMIT:g} residual SDs): "
                   "the levels and the record do not agree with one compartment and the "
                   "prior")
    return out
