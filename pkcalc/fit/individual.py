"""Individual estimation: least squares, maximum likelihood and MAP, with uncertainty.

:func:`fit_subjects` fits every subject of a study independently (all at once,
as rows of one vectorised problem).  Parameters are estimated on the log
scale; starting values come from the data (a grid over the elimination rate
with the volume solved in closed form for each grid value), plus a small
multi-start.  The covariance is ``s^2 (J'WJ)^-1`` for least squares, the
inverse Fisher information for likelihood fits (``(J'WJ + Omega^-1)^-1`` form
for MAP), and the inverse observed information (differences of the analytic
gradient) when censored levels enter the likelihood; 95 % intervals are built
on the log scale with a Student-t quantile and transformed back, so they are
asymmetric.
"""


from __future__ import annotations

import math

import numpy as np

from .. import model
from ..core import FitOptions, SubjectData
from ..plausibility import implausible, parameter_warnings
from .data import prepare_batch, subject_events, with_prior
from .objective import Batch, evaluate, n_error_params, residual_variance
from .result import Estimate, FitResult
from .starts import AGREE_TOL, bounds, error_starts, solve_starts, starting_values
from .uncertainty import (
    covariances,
    log_estimates,
    observed_hessian,
    profile_interval,
    structural_estimates,
    undetermined,
    wald_quantiles,
)

__all__ = ["Estimate", "FitResult", "fit_subjects", "starting_values", "subject_events"]

#: Relative SE above which an estimate is called poorly determined (common practice).
POOR_RSE = 50.0



def fit_subjects(subjects: list[SubjectData], options: FitOptions | None = None, *,
                 prior_means: dict[str, tuple[float, float]] | None = None
                 ) -> tuple[list[FitResult], list[tuple[str, str]]]:
    """Fit every subject independently.

    Parameters
    ----------
    subjects : list of SubjectData
    options : FitOptions, optional
        Default: proportional error model, BLQ by censored likelihood.
    prior_means : dict of subject to (ln CL, ln V), optional
        MAP only: each subject's prior mean, overriding the prior's typical
        values (population estimation with covariates uses this).

    Returns
    -------
    results : list of FitResult
    failures : list of (subject, reason)
        Subjects that could not be fitted at all (e.g. no measurable level).
    """
    opts = options or FitOptions()
    failures: list[tuple[str, str]] = []
    usable = _usable_subjects(subjects, opts, prior_means, failures)
    if usable is None:
        return [], failures
    keep, batch, notes, prior_info = usable
    starts, n_starts = _starts(batch, opts)
    sol, theta, sel, agreed = _best_of_starts(batch, starts, n_starts, opts)
    final = _reweighted(batch, theta, opts)
    stats = _statistics(final, theta, opts.method)
    weight = np.array([np.nan if s.weight is None else s.weight for s in keep])
    flagged = implausible(np.exp(theta[:, 0]), np.exp(theta[:, 1]), weight)
    results = []
    for i, s in enumerate(keep):
        k = s.time.size
        results.append(_result(
            s, opts, final, i, theta[i], stats["obj"][i], float(stats["m2ll"][i]),
            int(stats["n_used"][i]), stats["cov"][i], bool(stats["identifiable"][i]),
            float(stats["scale"][i]), stats["f"][i, :k],
            stats["observed"][i, :k], stats["resid"][i, :k], stats["wres"][i, :k],
            stats["tables"][i], stats["residual"][i], bool(sol.converged[sel[i]]),
            sol.message[sel[i]], int(sol.iterations[sel[i]]), n_starts, int(agreed[i]),
            notes[i], {key: v[i] for key, v in prior_info.items()}, bool(flagged[i])))
    return results, failures


def _usable_subjects(subjects, opts: FitOptions, prior_means, failures):
    """The batch of subjects that can be fitted (a measurable level, enough levels, a
    weight for a per-kg prior); the others go to ``failures``.  None when none is left."""
    full, notes_all, n_used = prepare_batch(subjects, opts)
    has_level = (full.obs & (full.y > 0)).any(axis=1)
    enough = (n_used >= 2) | (opts.prior is not None)
    for i in np.flatnonzero(~has_level):
        failures.append((subjects[i].subject, "no measurable level to fit"))
    for i in np.flatnonzero(has_level & ~enough):
        failures.append((subjects[i].subject, "fewer than 2 levels: individual fitting needs "
                                              "more (give a prior for a MAP estimate)"))
    good = np.flatnonzero(has_level & enough)
    if good.size == 0:
        return None
    keep = [subjects[i] for i in good]
    batch = full if good.size == len(subjects) else full.rows(good)
    notes = [notes_all[i] for i in good]
    prior_info: dict = {}
    if opts.method == "map":
        batch, prior_info, bad = with_prior(batch, keep, opts, prior_means)
        for i in sorted(bad, reverse=True):
            failures.append((keep[i].subject, "the prior is per kg but the subject has no "
                                              "weight"))
        if bad:
            good = np.array([i for i in range(len(keep)) if i not in bad], dtype=int)
            batch = batch.rows(good)
            keep = [keep[i] for i in good]
            notes = [notes[i] for i in good]
            prior_info = {k: v[good] for k, v in prior_info.items()}
        if not keep:
            return None
    return keep, batch, notes, prior_info


def _starts(batch: Batch, opts: FitOptions):
    """Starting values per subject: data-based grid starts, more spread around the
    best when asked, and the prior mean for MAP."""
    starts = starting_values(batch)                                        # (B, 3, 2)
    n_starts = opts.starts
    if n_starts > 3:
        spread = np.exp(np.linspace(-1.5, 1.5, n_starts - 3))
        extra = starts[:, :1, :] + np.stack([np.log(spread), np.zeros_like(spread)], -1)[None]
        starts = np.concatenate([starts, extra], axis=1)
    starts = starts[:, :n_starts, :]
    if opts.method == "map":
        # the prior mean is a natural extra start for sparse data
        starts = np.concatenate([batch.mu[:, None, :], starts], axis=1)[:, :max(n_starts, 1)]
        n_starts = starts.shape[1]
    return starts, n_starts


def _best_of_starts(batch: Batch, starts, n_starts: int, opts: FitOptions):
    """Solve from every start; keep each subject's best, count the starts that agree."""
    b = batch.t.shape[0]
    rep = batch.repeat(n_starts)
    theta0 = starts.reshape(b * n_starts, 2)
    if opts.method == "likelihood":
        # residual-error starts from each subject's best grid point, shared by its starts
        err0 = error_starts(batch, starts[:, 0, :])
        theta0 = np.concatenate([theta0, np.repeat(err0, n_starts, axis=0)], axis=1)
    sol = solve_starts(rep, theta0, opts, n_starts)
    obj = sol.obj.reshape(b, n_starts)
    obj_ok = np.where(np.isfinite(obj), obj, np.inf)
    best = np.argmin(obj_ok, axis=1)
    sel = np.arange(b) * n_starts + best
    agreed = (np.abs(obj_ok - obj_ok[np.arange(b), best][:, None]) <= AGREE_TOL).sum(axis=1)
    return sol, sol.theta[sel], sel, agreed


def _reweighted(batch: Batch, theta, opts: FitOptions) -> Batch:
    """For weights 1/predicted^2, the weights at the estimate (iteratively reweighted)."""
    if opts.weighting != "inverse_predicted_squared":
        return batch
    f0 = model.concentration(batch.t, batch.start, batch.amount, batch.duration,
                             np.exp(theta[:, 0]), np.exp(theta[:, 1]))
    return Batch(**{**batch.__dict__, "w": np.where(batch.obs, 1 / np.maximum(
        f0, 1e-12) ** 2, 0.0)})


def _statistics(final: Batch, theta, kind: str) -> dict:
    """Objective, information, covariance, estimates with intervals, -2 ln L and
    residuals of every subject at its estimate."""
    f_obj, _, info, f = evaluate(final, theta)
    # information for the covariance: the scoring matrix (J'WJ for least squares, the
    # Fisher information -- plus the prior's -- for likelihood and MAP fits); with
    # censored levels the observed information, by differences of the analytic gradient
    censored = final.cens.any(axis=1)
    hess = info
    if censored.any() and kind != "least_squares":
        idx = np.flatnonzero(censored)
        hess = info.copy()
        hess[idx] = observed_hessian(final.rows(idx), theta[idx])
    cov, identifiable, scale = covariances(final, f_obj, hess, kind)
    n_used = final.n_obs
    if kind == "least_squares":
        sd_all = np.sqrt(scale[:, None] / np.maximum(final.w, 1e-300))
        nn = np.maximum(n_used, 1)
        logw = np.where(final.obs, np.log(np.where(final.obs, final.w, 1.0)), 0.0).sum(axis=1)
        m2ll = nn * np.log(2 * np.pi * np.maximum(f_obj, 1e-300) / nn) + nn - logw
    else:
        sd_all = np.sqrt(residual_variance(final, theta, f)[0])
        m2ll = f_obj
    resid = np.where(final.obs, final.y - f, np.nan)
    return {"obj": f_obj, "f": f, "cov": cov, "identifiable": identifiable, "scale": scale,
            "tables": structural_estimates(final, theta, cov, kind), "n_used": n_used,
            "residual": _residual_estimates(final, theta, cov, scale),
            "m2ll": m2ll, "observed": np.where(final.obs | final.cens, final.y, np.nan),
            "resid": resid, "wres": resid / sd_all}


def _result(s: SubjectData, opts: FitOptions, batch: Batch, i: int, theta: np.ndarray,
            obj: float, m2ll: float, n_used: int, cov: np.ndarray, identifiable: bool,
            s2: float, pred: np.ndarray, observed: np.ndarray, resid: np.ndarray,
            wres: np.ndarray, table: dict[str, Estimate],
            residual: tuple[dict[str, Estimate], list[str]], converged: bool, message: str,
            iterations: int, n_starts: int, agreed: int, notes: list[str], prior: dict,
            flagged: bool) -> FitResult:
    kind = batch.kind
    warnings: list[str] = [x[1] for x in notes if isinstance(x, tuple)]
    notes = [x for x in notes if not isinstance(x, tuple)]
    n_real = s.time.size
    q = theta.size
    if kind == "least_squares":
        p = 3
        if n_used <= 2:
            warnings.append("two levels and two parameters: no degrees of freedom left for "
                            "standard errors")
    else:
        p = 2 + n_error_params(batch)
    if not identifiable and n_used > p - (1 if kind == "least_squares" else 0):
        which = undetermined(batch.rows(np.array([i])), theta, n_real)
        warnings.append(f"not identifiable: {which}; standard errors and intervals are not "
                        "reported")
    cov = cov if identifiable and math.isfinite(s2) else None
    ests = dict(table)
    corr = None if cov is None else float(cov[0, 1] / math.sqrt(cov[0, 0] * cov[1, 1]))
    if opts.ci == "profile" and cov is not None:
        _profile_intervals(ests, batch.rows(np.array([i])), theta, obj,
                           [float(cov[j, j]) for j in range(q)], opts, n_used, notes)
    residual, residual_notes = residual
    notes += residual_notes
    if not converged:
        warnings.append(f"did not converge: {message}")
    if agreed < n_starts:
        notes.append(f"{n_starts - agreed} of {n_starts} starts ended at a higher objective "
                     "(a local minimum); the best is reported")
    for name, e in ests.items():
        if e.rse_percent is not None and e.rse_percent > POOR_RSE and name in ("clearance",
                                                                                "volume"):
            warnings.append(f"{name} is poorly determined (RSE {e.rse_percent:.0f} %)")
    if flagged:
        warnings += parameter_warnings(ests["clearance"].value, ests["volume"].value, s.weight)
    prior_out = _prior_summary(prior, theta, cov, notes) if kind == "map" else {}
    return FitResult(
        subject=s.subject, converged=converged, method=kind,
        error_model=opts.error_model if kind != "least_squares" else None,
        weighting=opts.weighting, blq_method=opts.blq, estimates=ests, correlation=corr,
        residual_error=residual, objective=m2ll, aic=m2ll + 2 * p,
        bic=m2ll + p * math.log(max(n_used, 1)), n_obs=n_used, n_blq=int(s.blq.sum()),
        n_params=p, starts=n_starts, starts_agreed=agreed, iterations=iterations, time=s.time,
        observed=observed, predicted=pred, blq=s.blq.copy(), residuals=resid,
        weighted_residuals=wres, dose_start=s.dose_start, dose_amount=s.dose_amount,
        dose_duration=s.dose_duration, warnings=warnings, notes=notes, prior=prior_out,
        weight=s.weight, initial_concentration=s.initial_concentration,
        clock_origin=s.clock_origin)


def _profile_intervals(ests, row: Batch, theta, obj, var, opts: FitOptions, n_used: int,
                       notes: list[str]) -> None:
    """Profile-likelihood intervals of clearance and volume (in place)."""
    for j, name in ((0, "clearance"), (1, "volume")):
        lo, hi, note = profile_interval(row, theta, j, obj, math.sqrt(var[j]), opts, n_used)
        if note:
            notes.append(f"{name}: {note}")
        e = ests[name]
        ests[name] = Estimate(e.value, e.se, e.rse_percent, lo, hi)
    notes.append("95 % intervals of clearance and volume by profile likelihood; derived "
                 "ones (k, half-life) by the Wald method on the log scale")


def _residual_estimates(batch: Batch, theta: np.ndarray, cov: np.ndarray, scale: np.ndarray
                        ) -> list[tuple[dict[str, Estimate], list[str]]]:
    """The residual error of every row -- estimated (likelihood), fixed (MAP) or the LS
    scale -- with its notes."""
    b = theta.shape[0]
    if batch.kind == "likelihood":
        names = {"additive": ["additive"], "proportional": ["proportional"],
                 "combined": ["additive", "proportional"]}[batch.error]
        lower = bounds(batch, theta.shape[1])
        q = wald_quantiles(batch.n_obs, 2 + len(names), batch.kind)
        out: list[tuple[dict[str, Estimate], list[str]]] = [({}, []) for _ in range(b)]
        for j, name in enumerate(names):
            at_floor = theta[:, 2 + j] <= lower[:, 2 + j] + 1e-6
            var = np.where(at_floor, np.nan, cov[:, 2 + j, 2 + j])
            note = (f"the {name} error component is at its lower bound: the levels support "
                    "the other component alone")
            for (d, n), e, floor in zip(out, log_estimates(theta[:, 2 + j], var, q),
                                        at_floor.tolist(), strict=True):
                d[name] = e
                if floor:
                    n.append(note)
        return out
    if batch.kind == "map":
        note = "MAP estimate: residual error fixed at the prior's values"
        return [({**({"additive": Estimate(sa)} if sa > 0 else {}),
                  **({"proportional": Estimate(sp)} if sp > 0 else {})}, [note])
                for sa, sp in zip(batch.sa.tolist(), batch.sp.tolist(), strict=True)]
    return [({"scale": Estimate(math.sqrt(max(s2, 0.0)) if np.isfinite(s2) else math.nan)}, [])
            for s2 in scale.tolist()]


def _prior_summary(prior: dict, theta, cov, notes: list[str]) -> dict[str, float]:
    """MAP: typical values, the subject's deviations and the prior variance left."""
    mu, omega = prior["mu"], prior["omega"]
    out = {"typical_clearance": math.exp(mu[0]), "typical_volume": math.exp(mu[1]),
           "ln_clearance_deviation": float(theta[0]) - mu[0],
           "ln_volume_deviation": float(theta[1]) - mu[1]}
    if cov is not None:
        out["prior_variance_remaining_clearance_percent"] = 100 * cov[0, 0] / omega[0, 0]
        out["prior_variance_remaining_volume_percent"] = 100 * cov[1, 1] / omega[1, 1]
        notes.append(
            f"{out['prior_variance_remaining_clearance_percent']:.0f} % of the prior "
            f"variance of ln CL and {out['prior_variance_remaining_volume_percent']:.0f}"
            " % of ln V remain after the levels (100 % = the levels say nothing; low values "
            "= estimate driven by the data)")
    return out
