"""Is one compartment enough?  A check beside every individual fit.

For each subject with enough levels drawn after the end of an infusion, the
one-compartment likelihood fit is compared with a two-exponential disposition
fit (a two-compartment model with the same dose history, error model and BLQ
handling, fitted by the same solver from several starts around the
one-compartment answer):

- **likelihood-ratio test**: ``D = -2 ln L(one) - (-2 ln L(two))`` against a
  chi-square with 2 degrees of freedom (the two extra parameters ``Q``, ``V2``);
  ``delta AIC = D - 4`` (positive favours two exponentials);
- **runs test** on the signs of the weighted residuals of the reported fit,
  ordered by time, and a **trend test** of those residuals against the time
  since the last dose (:mod:`pkcalc.fit.residuals`) -- reported as evidence.

Verdict: ``distribution_phase`` when the likelihood-ratio test rejects one
compartment at ``ALPHA``; ``adequate`` otherwise; ``too_few_levels`` when the
subject has too few levels (fewer than ``MIN_AFTER_INFUSION`` after the end of
an infusion, or too few in all for five or six parameters).  The nesting is
at the boundary (``Q -> 0``) and samples are small, where the chi-square
reference is approximate; the level ``ALPHA = 0.005`` keeps false alarms on
one-compartment data below 5 % (measured by the tests over simulated subjects).

The two-exponential numbers are a **sensitivity check**, never a replacement
for the one-compartment estimates.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .. import model
from ..core import FitOptions, SubjectData
from .data import prepare_batch, subject_events
from .objective import Batch, n_error_params
from .residuals import runs_tests, trend_tests
from .starts import solve

__all__ = ["ALPHA", "Adequacy", "adequacy_counts", "check_adequacy", "counts_sentence"]

#: Level of the likelihood-ratio test that flags a distribution phase.
ALPHA = 0.005
#: Levels drawn after the end of an infusion (no infusion running) needed for the check.
MIN_AFTER_INFUSION = 3
#: Levels beyond the two-exponential model's parameter count needed for the check.
MIN_SPARE = 2
#: Starts of the two-exponential fit: central volume as a fraction of the
#: one-compartment volume, inter-compartmental clearance as a multiple of its clearance
#: (the second only where the first ends without a regular convergence).
STARTS = ((0.5, 2.0), (0.2, 5.0))
#: Iterations of the two-exponential fit.  On one-compartment data its surface is a
#: flat ridge (Q -> 0 or Q -> infinity) along which the solver crawls; the objective
#: there is already within a small fraction of its limit, and an unfinished fit only
#: makes the test conservative (its -2 ln L is an upper bound of the minimum).
MAX_ITER = 30
#: ... and a row whose -2 ln L fell by less than 0.001 over 5 iterations has settled
#: (the test needs the objective, not the point on the ridge).  Flagged rows are then
#: run to full convergence, so the two-exponential numbers they report are final.
SETTLE = (5, 1e-3)
#: Iterations of that last run (a flagged fit still unfinished says so).
REFINE_ITER = 60

VERDICTS = ("adequate", "distribution_phase", "too_few_levels")


@dataclass(frozen=True)
class Adequacy:
    """Whether one compartment describes one subject's levels, with the evidence.

    Attributes
    ----------
    verdict : str
        ``adequate``, ``distribution_phase`` or ``too_few_levels``.
    reason : str
        The verdict in plain words.
    levels_after_infusion : int
    objective_one, objective_two : float or None
        ``-2 ln L`` of the one-compartment and two-exponential fits.
    delta_aic : float or None
        AIC(one) - AIC(two); positive favours two exponentials.
    lrt_p : float or None
        Likelihood-ratio test p-value (chi-square, 2 df).
    runs, runs_p : int, float or None
        Runs of residual signs and the exact p-value of that few.
    trend_p : float or None
        Spearman test of residuals against time since the last dose.
    two_exponential : dict of str to float
        Sensitivity check (canonical units): ``clearance``, ``central_volume``,
        ``intercompartmental_clearance``, ``peripheral_volume``,
        ``terminal_half_life``, ``distribution_half_life``, ``fast_fraction``.
    differences : dict
        ``clearance_percent`` (one-compartment relative to two-exponential),
        ``terminal_half_life_percent``, and for the earliest level after an
        infusion ``early_level_time_after_end`` (h), ``early_level_percent``
        (observed vs the one-compartment curve) and
        ``early_level_two_exponential_percent``.
    earliest_sampling_after_infusion : float or None
        Hours after the end of an infusion from which the fast phase is below
        the residual error (flagged subjects).
    notes : list of str
    """

    verdict: str
    reason: str
    levels_after_infusion: int = 0
    objective_one: float | None = None
    objective_two: float | None = None
    delta_aic: float | None = None
    lrt_p: float | None = None
    runs: int | None = None
    runs_p: float | None = None
    trend_p: float | None = None
    two_exponential: dict[str, float] = field(default_factory=dict)
    differences: dict[str, float] = field(default_factory=dict)
    earliest_sampling_after_infusion: float | None = None
    notes: list[str] = field(default_factory=list)

    def predict_two_exponential(self, t, start, amount, duration) -> np.ndarray | None:
        """The two-exponential curve at times ``t`` (sensitivity check), or None."""
        p = self.two_exponential
        if not p:
            return None
        return model.two_compartment_concentration(
            np.asarray(t, float), start, amount, duration, p["clearance"], p["central_volume"],
            p["intercompartmental_clearance"], p["peripheral_volume"])


def adequacy_counts(results) -> dict[str, int] | None:
    """Subjects per verdict over fit results (None when no result carries a check)."""
    found = [r.adequacy for r in results if getattr(r, "adequacy", None) is not None]
    if not found:
        return None
    return {v: sum(a.verdict == v for a in found) for v in VERDICTS}


def counts_sentence(counts: dict[str, int]) -> str:
    """"2 of 12 subjects show a distribution phase; ..." in plain words."""
    n = sum(counts.values())
    return (f"{counts['distribution_phase']} of {n} subjects show a distribution phase "
            f"(one compartment not adequate); {counts['adequate']} adequate; "
            f"{counts['too_few_levels']} with too few levels to tell")


# --------------------------------------------------------------------------- timing
def _after_infusion(batch: Batch) -> np.ndarray:
    """Levels (used in the fit) drawn after drug entered while no infusion runs."""
    real = batch.amount > 0
    infusion = real & (batch.duration > 0)
    t = batch.t[:, :, None]
    s = batch.start[:, None, :]
    running = (infusion[:, None, :] & (t > s) & (t < s + batch.duration[:, None, :])).any(-1)
    dose = real & (batch.duration >= 0)
    first = np.where(dose, batch.start, np.inf).min(axis=1)
    initial = (real & (batch.duration < 0)).any(axis=1)
    entered = (batch.t > first[:, None]) | (initial[:, None] & (batch.t >= 0))
    return (batch.obs | batch.cens) & entered & ~running


def _time_since_dose(batch: Batch) -> np.ndarray:
    """Hours since the start of the most recent dose (NaN before any dose)."""
    dose = (batch.amount > 0) & (batch.duration >= 0)
    starts = np.where(dose, batch.start, -np.inf)[:, None, :]
    prev = np.where(starts <= batch.t[:, :, None], starts, -np.inf).max(axis=-1)
    return np.where(np.isfinite(prev), batch.t - prev, np.nan)


def _time_after_end(s: SubjectData, t: float) -> float:
    """Hours since the most recent end of a dose (bolus: its time) before ``t``."""
    ends = s.dose_start + np.maximum(s.dose_duration, 0.0)
    before = ends[ends <= t]
    return float(t - before.max()) if before.size else math.nan


# --------------------------------------------------------------------------- the check
def check_adequacy(subjects: list[SubjectData], fits: list, options: FitOptions
                   ) -> dict[str, Adequacy]:
    """The adequacy of one compartment for every fitted subject.

    Parameters
    ----------
    subjects : list of SubjectData
    fits : list of FitResult
        The reported (one-compartment) fits; their weighted residuals feed the
        runs and trend tests.
    options : FitOptions
        The fit's options: its error model (least squares: proportional error
        for relative weights, additive for uniform) and BLQ handling are used by
        both likelihood fits.

    Returns
    -------
    dict of subject to Adequacy
    """
    by_id = {s.subject: s for s in subjects}
    pairs = [(by_id[f.subject], f) for f in fits if f.subject in by_id]
    if not pairs:
        return {}
    opts = _likelihood_options(options)
    subs = [s for s, _ in pairs]
    batch, _, n_used = prepare_batch(subs, opts)
    after = _after_infusion(batch).sum(axis=1)
    runs, runs_p, trend_p = _residual_tests(batch, [f for _, f in pairs])
    need = 4 + (2 if opts.error_model == "combined" else 1) + MIN_SPARE
    out: dict[str, Adequacy] = {}
    eligible = []
    for i, s in enumerate(subs):
        common = {"levels_after_infusion": int(after[i]), "runs": runs[i],
                  "runs_p": runs_p[i], "trend_p": trend_p[i]}
        if after[i] < MIN_AFTER_INFUSION:
            out[s.subject] = Adequacy(
                "too_few_levels", f"{after[i]} level(s) after the end of an infusion: the "
                f"check needs at least {MIN_AFTER_INFUSION}", **common)
        elif n_used[i] < need:
            out[s.subject] = Adequacy(
                "too_few_levels", f"{n_used[i]} levels: the two-exponential check needs at "
                f"least {need}", **common)
        else:
            eligible.append((i, common))
    if eligible:
        idx = np.array([i for i, _ in eligible])
        out.update(_compare([pairs[i] for i in idx], batch.rows(idx),
                            [c for _, c in eligible], opts))
    return out


def _likelihood_options(options: FitOptions) -> FitOptions:
    """Likelihood options matching the reported fit (error model and BLQ)."""
    if options.error_model is not None and options.prior is None:
        return FitOptions(error_model=options.error_model, blq=options.blq)
    if options.prior is not None:
        return FitOptions(error_model=options.prior.error_model, blq=options.blq)
    error = "additive" if options.weighting in (None, "uniform") else "proportional"
    return FitOptions(error_model=error, blq="drop" if options.blq == "likelihood"
                      else options.blq)


def _residual_tests(batch: Batch, fits: list):
    """Runs and trend tests of every subject's weighted residuals (all at once; the
    levels are in time order).  None where a test cannot be computed."""
    wres = np.full(batch.t.shape, np.nan)
    for i, f in enumerate(fits):
        wres[i, :f.weighted_residuals.size] = f.weighted_residuals
    usable = np.isfinite(wres)
    runs, runs_p = runs_tests(wres, usable)
    trend_p = trend_tests(wres, _time_since_dose(batch), usable)
    enough = usable.sum(axis=1) >= 3

    def opt(x, ok):
        return None if not ok or np.isnan(x) else float(x)

    return ([int(r) if ok else None for r, ok in zip(runs, enough, strict=True)],
            [opt(p, ok) for p, ok in zip(runs_p, enough, strict=True)],
            [opt(p, ok) for p, ok in zip(trend_p, enough, strict=True)])


def _compare(pairs, batch1: Batch, commons: list[dict], opts: FitOptions
             ) -> dict[str, Adequacy]:
    """Fit both models by likelihood and compare them (the reported fits serve as the
    one-compartment likelihood fits when they are such fits)."""
    from .individual import fit_subjects

    subjects = [s for s, _ in pairs]
    if all(f.method == "likelihood" and f.error_model == opts.error_model
           and f.blq_method == opts.blq for _, f in pairs):
        one = [f for _, f in pairs]
    else:
        found, _ = fit_subjects(subjects, opts)
        by_id = {r.subject: r for r in found}
        keep = [i for i, s in enumerate(subjects) if s.subject in by_id]
        if not keep:
            return {}
        subjects = [subjects[i] for i in keep]
        commons = [commons[i] for i in keep]
        batch1 = batch1.rows(np.array(keep))
        one = [by_id[s.subject] for s in subjects]
    batch = Batch(**{**batch1.__dict__, "compartments": 2})
    theta, obj_two, finished = _fit_two(batch, one, opts)
    obj_one = np.array([r.objective for r in one])
    d = np.maximum(obj_one - obj_two, 0.0)
    p = np.exp(-0.5 * d)             # chi-square upper tail with 2 degrees of freedom
    cl, v1, q, v2 = np.exp(theta[:, :4]).T
    alpha, beta, c_a, _ = model.two_compartment_macro(cl, v1, q, v2)
    after = _after_infusion(batch)
    out = {}
    for i, s in enumerate(subjects):
        two = {"clearance": float(cl[i]), "central_volume": float(v1[i]),
               "intercompartmental_clearance": float(q[i]), "peripheral_volume": float(v2[i]),
               "terminal_half_life": model.LN2 / float(beta[i]),
               "distribution_half_life": model.LN2 / float(alpha[i]),
               "fast_fraction": float(c_a[i])}
        evidence = {**commons[i], "objective_one": float(obj_one[i]),
                    "objective_two": float(obj_two[i]), "delta_aic": float(d[i]) - 4.0,
                    "lrt_p": float(p[i]), "two_exponential": two}
        if p[i] >= ALPHA:
            out[s.subject] = _adequate(evidence)
        else:
            out[s.subject] = _distribution_phase(s, one[i], evidence, batch,
                                                 after[i, :s.time.size], theta[i],
                                                 bool(finished[i]))
    return out


def _fit_two(batch: Batch, ones: list, opts: FitOptions):
    """The two-exponential likelihood fit of every row, best of the starts.

    Every row starts at ``STARTS[0]``; a row that ends there without a regular
    convergence (it settled on a flat ridge or ran out of iterations) and is not
    already flagged tries the other starts too.
    """
    b = batch.t.shape[0]
    n_err = n_error_params(batch)
    theta0 = np.empty((b, len(STARTS), 4 + n_err))
    for i, r in enumerate(ones):
        ln_err = [math.log(r.residual_error[k].value) for k in ("additive", "proportional")
                  if k in r.residual_error]
        for j, (fv, fq) in enumerate(STARTS):
            theta0[i, j] = [math.log(r.clearance), math.log(fv * r.volume),
                            math.log(fq * r.clearance), math.log((1 - fv) * r.volume), *ln_err]
    sol = solve(batch, theta0[:, 0], opts, max_iter=MAX_ITER, settle=SETTLE)
    theta = sol.theta.copy()
    obj = np.where(np.isfinite(sol.obj), sol.obj, np.inf)
    obj_one = np.array([r.objective for r in ones])
    regular = np.array([c and not m for c, m in zip(sol.converged, sol.message, strict=True)])
    again = np.flatnonzero(~regular & (np.exp(-0.5 * np.maximum(obj_one - obj, 0)) >= ALPHA))
    for j in range(1, len(STARTS)):
        if again.size == 0:
            break
        more = solve(batch.rows(again), theta0[again, j], opts, max_iter=MAX_ITER,
                     settle=SETTLE)
        better = np.isfinite(more.obj) & (more.obj < obj[again])
        theta[again[better]] = more.theta[better]
        obj[again[better]] = more.obj[better]
    flagged = np.flatnonzero(np.exp(-0.5 * np.maximum(obj_one - obj, 0)) < ALPHA)
    final_ok = np.ones(b, bool)
    if flagged.size:
        final = solve(batch.rows(flagged), theta[flagged], opts, max_iter=REFINE_ITER)
        better = np.isfinite(final.obj) & (final.obj <= obj[flagged])
        theta[flagged[better]] = final.theta[better]
        obj[flagged[better]] = final.obj[better]
        final_ok[flagged] = final.converged
    return theta, obj, final_ok


def _adequate(evidence: dict) -> Adequacy:
    p, d4 = evidence["lrt_p"], evidence["delta_aic"]
    hint = (f"; p is below 0.05 but above the check's level {ALPHA:g}: at most a weak hint "
            "of a second phase" if p < 0.05 else "")
    return Adequacy("adequate", f"one compartment describes the levels (two-exponential "
                    f"fit: likelihood-ratio p = {p:.2g}, delta AIC {d4:+.1f}{hint})",
                    **evidence, notes=_pattern_note(evidence))


def _distribution_phase(s: SubjectData, one, evidence: dict, batch: Batch,
                        after: np.ndarray, theta: np.ndarray, finished: bool) -> Adequacy:
    """The flagged subject's evidence in words, and the sampling advice."""
    p, d4, two = evidence["lrt_p"], evidence["delta_aic"], evidence["two_exponential"]
    diffs = _differences(s, one, two, after)
    advice = _earliest_time(s, two, _residual_sd(batch, theta))
    words = [f"distribution phase evident (likelihood-ratio p = {p:.2g}, delta AIC "
             f"{d4:+.1f} for two exponentials)",
             f"one-compartment clearance is {_rel(diffs['clearance_percent'])} the "
             f"two-exponential estimate (sensitivity check)",
             f"its half-life is {_rel(diffs['terminal_half_life_percent'])} the terminal "
             f"half-life of {two['terminal_half_life']:.3g} h"]
    if "early_level_percent" in diffs:
        words.append(f"the level drawn {diffs['early_level_time_after_end']:.3g} h after the "
                     f"dose ended is {_rel(diffs['early_level_percent'], 'above', 'below')} the "
                     "one-compartment curve")
    notes = []
    if advice is not None:
        notes.append(f"levels drawn from {advice:.3g} h after the end of an infusion are past "
                     "the fast phase (it has fallen below the residual error there); draw "
                     "levels after distribution is complete (common practice in level "
                     "monitoring)")
    else:
        notes.append("the fast phase stays above the residual error until the next dose: "
                     "levels in this schedule cannot avoid it")
    if not finished:
        notes.append(f"the two-exponential fit was stopped after {REFINE_ITER} more "
                     "iterations before full convergence: its numbers are approximate (the "
                     "verdict stands: a finished fit can only lower its -2 ln L)")
    return Adequacy("distribution_phase", "; ".join(words), **evidence, differences=diffs,
                    earliest_sampling_after_infusion=advice,
                    notes=notes + _pattern_note(evidence))


def _rel(pct: float, up: str = "above", down: str = "below") -> str:
    """"16 % below" / "within 1 % of" (for "... the two-exponential estimate")."""
    if abs(pct) < 1.0:
        return "within 1 % of"
    return f"{abs(pct):.0f} % {up if pct >= 0 else down}"


def _pattern_note(common: dict) -> list[str]:
    notes = []
    if common["runs_p"] is not None and common["runs_p"] < 0.05:
        notes.append(f"the weighted residuals run in long stretches of one sign ({common['runs']} "
                     f"runs, runs test p = {common['runs_p']:.2g})")
    if common["trend_p"] is not None and common["trend_p"] < 0.05:
        notes.append(f"the weighted residuals trend with time since the dose (Spearman p = "
                     f"{common['trend_p']:.2g})")
    return notes


def _differences(s: SubjectData, one, two: dict, after: np.ndarray) -> dict[str, float]:
    """How far apart the two models are, in percent of the two-exponential values
    (``after``: the subject's levels drawn after a dose ended, no infusion running)."""
    out = {"clearance_percent": 100 * (one.clearance / two["clearance"] - 1),
           "terminal_half_life_percent": 100 * (one.estimates["half_life"].value
                                                / two["terminal_half_life"] - 1)}
    after = after & np.isfinite(s.conc) & ~s.blq & (s.conc > 0)
    if after.any():
        idx = np.flatnonzero(after)
        since_end = np.array([_time_after_end(s, s.time[j]) for j in idx])
        i = int(idx[np.nanargmin(since_end)])        # the level soonest after a dose ended
        t = s.time[i]
        start, amount, duration = subject_events(s)
        c1 = float(one.predict([t])[0])
        c2 = float(model.two_compartment_concentration(
            [t], start, amount, duration, two["clearance"], two["central_volume"],
            two["intercompartmental_clearance"], two["peripheral_volume"])[0])
        if c1 > 0:
            out.update({"early_level_time_after_end": _time_after_end(s, t),
                        "early_level_percent": 100 * (s.conc[i] / c1 - 1),
                        "early_level_two_exponential_percent": 100 * (c2 / c1 - 1)})
    return out


def _residual_sd(batch: Batch, theta: np.ndarray) -> tuple[float, float]:
    """Additive and proportional SDs of the two-exponential fit."""
    err = np.exp(theta[4:])
    if batch.error == "additive":
        return float(err[0]), 0.0
    if batch.error == "proportional":
        return 0.0, float(err[0])
    return float(err[0]), float(err[1])


def _earliest_time(s: SubjectData, two: dict, sd: tuple[float, float]) -> float | None:
    """Hours after the end of the last infusion before the last level from which the fast
    exponential is below the residual SD of the level (None if not before the next dose)."""
    start, amount, duration = subject_events(s)
    ends = s.dose_start + np.maximum(s.dose_duration, 0.0)
    last = s.time.max()
    before = ends[ends <= last]
    if before.size == 0:
        return None
    end = float(before.max())
    later = s.dose_start[s.dose_start > end]
    alpha, _, c_a, _ = model.two_compartment_macro(
        two["clearance"], two["central_volume"], two["intercompartmental_clearance"],
        two["peripheral_volume"])
    horizon = 12 * model.LN2 / float(alpha)
    if later.size:
        horizon = min(horizon, float(later.min()) - end)
    tau = np.linspace(0.0, horizon, 481)
    v1 = two["central_volume"]
    fast = float(c_a) * model.concentration(end + tau, start, amount, duration,
                                            float(alpha) * v1, v1)
    total = model.two_compartment_concentration(
        end + tau, start, amount, duration, two["clearance"], v1,
        two["intercompartmental_clearance"], two["peripheral_volume"])
    below = np.abs(fast) <= np.sqrt(sd[0] ** 2 + (sd[1] * total) ** 2)
    if not below.any():
        return None
    # the first time from which the fast phase stays below the error
    idx = np.flatnonzero(~below)
    first = 0 if idx.size == 0 else idx.max() + 1
    if first >= tau.size:
        return None
    return float(tau[first])
