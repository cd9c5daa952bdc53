"""Fitted one-compartment parameters beside the non-compartmental ones.

For each subject: fitted clearance vs NCA clearance, fitted volume vs the
terminal volume Vz (and Vss when available), fitted half-life vs the terminal
half-life, as ratios fit/NCA.  A ratio further than ``threshold`` percent from
1 is flagged (common practice; default 20 %), with the assumption whose failure
explains the difference, checked in this order:

- **steady state not reached** -- NCA over one interval of regular doses
  assumes steady state; less than five half-lives of regular dosing before the
  last dose breaks it (five half-lives: about 97 % of steady state, a fact of
  the trade);
- **extrapolated area** over the NCA limit (20 % by default, common practice):
  clearance and Vz then rest on the extrapolation;
- **too few terminal points** (fewer than 3) or no terminal slope;
- **a distribution phase** found by the adequacy check
  (:mod:`pkcalc.fit.adequacy`): the one-compartment model averages two phases.

When none of them holds the flag says so and points at the records.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

__all__ = ["Comparison", "compare_with_nca", "disagreement_causes"]

PAIRS = (
    ("clearance", "clearance", "clearance"),
    ("volume", "volume_terminal", "volume (terminal, Vz)"),
    ("volume", "volume_steady_state", "volume (steady state, Vss)"),
    ("half_life", "terminal_half_life", "half-life (terminal)"),
)
#: Half-lives of regular dosing that count as steady state (97 %; fact of the trade).
STEADY_STATE_HALF_LIVES = 5.0
#: Fewest points of a trustworthy terminal slope (common practice).
MIN_TERMINAL_POINTS = 3


@dataclass(frozen=True)
class Comparison:
    """One subject's side-by-side values (canonical units).

    ``causes`` names the failed assumptions that explain a disagreement (empty when
    nothing is flagged or no assumption was found to fail).
    """

    subject: str
    rows: list[dict] = field(default_factory=list)
    flags: list[str] = field(default_factory=list)
    causes: list[str] = field(default_factory=list)


def disagreement_causes(fit, nca, extrapolation_limit: float = 20.0) -> list[str]:
    """The assumptions that fail for this subject, in plain words (see the module)."""
    causes = []
    if nca.mode == "total exposure":
        causes.append(f"irregular doses ({nca.regimen}): NCA took the area from the first dose "
                      "to infinity with the total amount, which relies on every interval being "
                      "well sampled")
    if nca.mode == "first dose":
        causes.append("NCA's clearance is the first dose's dose/AUCinf (no steady-state "
                      "interval area): it rests on the first interval's terminal slope and "
                      "extrapolation")
    if nca.mode == "steady state" and nca.steady_state is False:
        why = next((n for n in nca.notes if "steady state" in n and ("reached" in n)), "")
        causes.append("NCA's clearance dose/AUCtau assumes steady state" + (f": {why}" if why
                                                                             else ""))
    elif nca.mode == "steady state" and nca.interval:
        regular = float(np.ptp(fit.dose_start)) if fit.dose_start.size > 1 else 0.0
        half_life = max(fit.estimates["half_life"].value, nca.terminal_half_life or 0.0)
        if regular < STEADY_STATE_HALF_LIVES * half_life:
            causes.append(f"steady state not reached: {regular:.3g} h of regular dosing before "
                          f"the last dose against five half-lives ({5 * half_life:.3g} h), "
                          "while NCA over one interval assumes steady state")
    extrap = nca.auc_extrapolated_percent
    if extrap is not None and extrap > extrapolation_limit:
        causes.append(f"extrapolated area {extrap:.0f} % (over {extrapolation_limit:g} %): the "
                      "NCA clearance and Vz rest on the extrapolation")
    if nca.terminal_half_life is None:
        causes.append("no terminal slope: the NCA terminal values are missing")
    elif len(nca.points_used) < MIN_TERMINAL_POINTS:
        causes.append(f"only {len(nca.points_used)} terminal points: the NCA terminal slope "
                      "is uncertain")
    adequacy = getattr(fit, "adequacy", None)
    if adequacy is not None and adequacy.verdict == "distribution_phase":
        causes.append("a distribution phase (adequacy check): the one-compartment fit "
                      "averages the fast and slow phases")
    return causes


def compare_with_nca(fits, ncas, threshold: float = 20.0,
                     extrapolation_limit: float = 20.0) -> list[Comparison]:
    """Pair fit and NCA results by subject and flag disagreements with their cause.

    Parameters
    ----------
    fits : list of FitResult
    ncas : list of NcaResult
    threshold : float, percent
    extrapolation_limit : float, percent
        The NCA's limit on the extrapolated area.

    Returns
    -------
    list of Comparison
    """
    by_subject = {n.subject: n for n in ncas}
    out = []
    for f in fits:
        n = by_subject.get(f.subject)
        if n is None:
            continue
        rows, differ = [], []
        for fit_key, nca_key, label in PAIRS:
            fv = f.estimates[fit_key].value
            nv = getattr(n, nca_key)
            ratio = fv / nv if nv else None
            rows.append({"quantity": label, "fit": fv, "nca": nv, "ratio": ratio})
            if ratio is not None and math.isfinite(ratio) and abs(ratio - 1) * 100 > threshold:
                direction = "higher" if ratio > 1 else "lower"
                differ.append(f"fitted {label} is {abs(ratio - 1):.0%} {direction} than the "
                              "non-compartmental value")
        causes = disagreement_causes(f, n, extrapolation_limit) if differ else []
        checked = "steady state, extrapolated area, terminal points" + (
            ", adequacy of one compartment" if getattr(f, "adequacy", None) is not None
            else "; the adequacy check was off")
        relied = "; ".join(getattr(n, "assumptions", ()) or ())
        because = ("; likely cause: " + "; ".join(causes)) if causes else (
            f"; no failed assumption found ({checked})"
            + (f"; NCA relied on: {relied}" if relied else "")
            + ": check those, then the records (doses, times, units)")
        out.append(Comparison(f.subject, rows, [d + because for d in differ], causes))
    return out
