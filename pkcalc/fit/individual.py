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
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np

from .. import model
from .._format import format_table, short
from ..core import FitOptions, SubjectData
from ..plausibility import parameter_warnings
from .objective import Batch, _variance, evaluate, n_error_params, profiled_sigma
from .solver import Solution, minimise

__all__ = ["Estimate", "FitResult", "fit_subjects", "starting_values"]

Z95 = 1.959963984540054
CHI2_95 = 3.841458820694124
#: Starts whose objectives differ by less than this (in -2 ln L units) agree.
AGREE_TOL = 1e-3
#: Identifiability: smallest eigenvalue of the information in correlation form.
IDENTIFIABILITY_EIG = 1e-8
#: Relative SE above which an estimate is called poorly determined (common practice).
POOR_RSE = 50.0


@dataclass(frozen=True)
class Estimate:
    """A parameter estimate with its uncertainty (canonical units).

    ``se`` is the delta-method SE on the natural scale; ``rse_percent`` is
    100 x SE of the log; ``ci_low``/``ci_high`` the 95 % interval, built on the
    log scale (Wald) or by profile likelihood.  None when not estimable.
    """

    value: float
    se: float | None = None
    rse_percent: float | None = None
    ci_low: float | None = None
    ci_high: float | None = None

    def __str__(self) -> str:
        if self.se is None:
            return f"{short(self.value)} (SE not available)"
        return (f"{short(self.value)} (SE {short(self.se)}, 95% CI {short(self.ci_low)}-"
                f"{short(self.ci_high)})")


@dataclass
class FitResult:
    """One subject's fit.

    Attributes
    ----------
    subject : str
    converged : bool
    method : str
        ``least_squares``, ``likelihood`` or ``map``.
    error_model, weighting, blq_method : str or None
    estimates : dict of str to Estimate
        ``clearance`` (L/h), ``volume`` (L), ``elimination_rate`` (1/h), ``half_life`` (h).
    correlation : float or None
        Correlation of the ln CL and ln V estimates.
    residual_error : dict of str to Estimate
        ``additive`` (mg/L) and/or ``proportional`` (fraction), estimated or fixed.
    objective : float
        ``-2 ln L`` at the estimate (for MAP: of the posterior, constants included).
    aic, bic : float
    n_obs, n_blq, n_params : int
    starts, starts_agreed, iterations : int
    time, observed, predicted : ndarray
        Levels used (BLQ rows carry their LLOQ), predictions.
    blq : ndarray of bool
    residuals, weighted_residuals : ndarray
    warnings, notes : list of str
    prior : dict
        MAP only: typical values, ``eta`` and the prior variance remaining.
    """

    subject: str
    converged: bool
    method: str
    error_model: str | None
    weighting: str | None
    blq_method: str
    estimates: dict[str, Estimate]
    correlation: float | None
    residual_error: dict[str, Estimate]
    objective: float
    aic: float
    bic: float
    n_obs: int
    n_blq: int
    n_params: int
    starts: int
    starts_agreed: int
    iterations: int
    time: np.ndarray
    observed: np.ndarray
    predicted: np.ndarray
    blq: np.ndarray
    residuals: np.ndarray
    weighted_residuals: np.ndarray
    dose_start: np.ndarray
    dose_amount: np.ndarray
    dose_duration: np.ndarray
    warnings: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    prior: dict[str, float] = field(default_factory=dict)
    weight: float | None = None
    initial_concentration: float = 0.0

    @property
    def clearance(self) -> float:
        return self.estimates["clearance"].value

    @property
    def volume(self) -> float:
        return self.estimates["volume"].value

    def conf_int(self, name: str) -> tuple[float | None, float | None]:
        """95 % interval of a parameter."""
        e = self.estimates[name]
        return e.ci_low, e.ci_high

    def predict(self, t) -> np.ndarray:
        """Concentration (mg/L) at times ``t`` (h) with the estimates (an initial level,
        if any, included)."""
        start, amount, duration = self.dose_start, self.dose_amount, self.dose_duration
        if self.initial_concentration:
            start, amount, duration = (np.append(start, 0.0),
                                       np.append(amount, self.initial_concentration),
                                       np.append(duration, model.INITIAL_LEVEL))
        return model.concentration(np.asarray(t, float), start, amount, duration,
                                   self.clearance, self.volume)

    def _repr_html_(self) -> str:
        """Notebook view: the caution, the table and the summary."""
        from .._format import result_html

        return result_html(self.summary(), self.to_frame())

    def to_frame(self):
        """Per-level diagnostics: time, observed, predicted, residuals, BLQ flag."""
        import pandas as pd

        return pd.DataFrame({"subject": self.subject, "time [h]": self.time,
                             "observed [mg/L]": self.observed,
                             "predicted [mg/L]": self.predicted, "blq": self.blq,
                             "residual [mg/L]": self.residuals,
                             "weighted_residual": self.weighted_residuals})

    def summary(self) -> str:
        """Plain-text summary (canonical units)."""
        rows = [[k, e.value, e.se, e.rse_percent, e.ci_low, e.ci_high]
                for k, e in self.estimates.items()]
        rows += [[f"residual {k}", e.value, e.se, e.rse_percent, e.ci_low, e.ci_high]
                 for k, e in self.residual_error.items()]
        lines = [f"Subject {self.subject}: {self.method.replace('_', ' ')}"
                 f" ({self.error_model or self.weighting}), "
                 f"{'converged' if self.converged else 'NOT converged'}, "
                 f"-2lnL {short(self.objective, 6)}, AIC {short(self.aic, 6)}, "
                 f"{self.n_obs} levels ({self.n_blq} BLQ), {self.starts_agreed}/{self.starts} "
                 "starts agreed",
                 format_table(["parameter", "value", "SE", "RSE %", "CI low", "CI high"], rows)]
        lines += [f"warning: {w}" for w in self.warnings]
        lines += [f"note: {n}" for n in self.notes]
        return "\n".join(lines)


# --------------------------------------------------------------------------- data
def subject_events(s: SubjectData) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A subject's dose events for the model, with its initial level (if any) as an
    initial-level event at time 0 (:data:`pkcalc.model.INITIAL_LEVEL`)."""
    if not s.initial_concentration:
        return s.dose_start, s.dose_amount, s.dose_duration
    return (np.append(s.dose_start, 0.0), np.append(s.dose_amount, s.initial_concentration),
            np.append(s.dose_duration, model.INITIAL_LEVEL))


def _prepare_batch(subjects: list[SubjectData], opts: FitOptions):
    """All subjects as one padded batch after the BLQ method and the weights.

    Returns the batch, the data-handling notes of each subject and the number of
    levels each one contributes.
    """
    b = len(subjects)
    n = max((s.time.size for s in subjects), default=1)
    events = [subject_events(s) for s in subjects]
    e = max((ev[0].size for ev in events), default=1)
    t = np.zeros((b, n))
    y = np.full((b, n), np.nan)
    lloq = np.full((b, n), np.nan)
    blq = np.zeros((b, n), bool)
    valid = np.zeros((b, n), bool)
    start, amount, duration = np.zeros((b, e)), np.zeros((b, e)), np.zeros((b, e))
    for i, s in enumerate(subjects):
        k = s.time.size
        t[i, :k], y[i, :k], lloq[i, :k], blq[i, :k], valid[i, :k] = (s.time, s.conc, s.lloq,
                                                                       s.blq, True)
        m = events[i][0].size
        start[i, :m], amount[i, :m], duration[i, :m] = events[i]
    blq &= valid
    obs = valid & ~blq
    cens = np.zeros_like(blq)
    n_blq = blq.sum(axis=1)
    notes: list[list[str]] = [[] for _ in range(b)]
    if opts.blq == "half_lloq":
        y = np.where(blq, lloq / 2, y)
        obs = obs | blq
    elif opts.blq == "likelihood":
        y = np.where(blq, lloq, y)
        cens = blq.copy()
    text = {"drop": "BLQ level(s) dropped (Beal's M1)",
            "half_lloq": "BLQ level(s) set to LLOQ/2 (substitution, for comparison; Beal's "
                         "M5/M6 family)",
            "likelihood": "BLQ level(s) enter as P(C < LLOQ) (censored likelihood, "
                          "Beal's M3)"}[opts.blq]
    for i in np.flatnonzero(n_blq):
        notes[i].append(f"{int(n_blq[i])} {text}")
    y = np.where(np.isnan(y), 0.0, y)
    # levels where no drug has entered yet (before or at the start of the first infusion,
    # and no initial level): the model predicts exactly zero there, so they carry no
    # information on CL and V and would put a zero variance into the likelihood
    none_yet = valid & (model.concentration(t, start, amount, duration, 1.0, 1.0) <= 0)
    warns: list[list[str]] = [[] for _ in range(b)]
    for i in np.flatnonzero(none_yet.any(axis=1)):
        k = subjects[i].time.size
        times = ", ".join(f"{x:g} h" for x in t[i, :k][none_yet[i, :k]])
        measured = (obs[i] & none_yet[i] & (y[i] > 0)).any()
        text = (f"level(s) at {times} drawn before any drug entered: the model predicts zero "
                "there, so they were left out of the fit")
        if measured:
            warns[i].append(text + "; a measurable level before the first dose means drug "
                            "on board from earlier therapy: give initial_concentration")
        else:
            notes[i].append(text)
    obs &= ~none_yet
    cens &= ~none_yet
    w = np.ones((b, n))
    if opts.weighting in ("inverse_observed", "inverse_observed_squared"):
        bad = obs & ~(y > 0)
        obs = obs & ~bad
        for i in np.flatnonzero(bad.any(axis=1)):
            notes[i].append(f"{int(bad[i].sum())} level(s) of zero left out: weights "
                            "1/observed need positive levels")
        power = 1.0 if opts.weighting == "inverse_observed" else 2.0
        w = np.where(obs, np.abs(np.where(obs, y, 1.0)) ** -power, 0.0)
    batch = Batch(t=t, y=y, w=w, obs=obs, cens=cens, start=start, amount=amount,
                  duration=duration, kind=opts.method, error=opts.error_model or "additive")
    for i in range(b):
        notes[i] = [("warning", x) for x in warns[i]] + notes[i]
    return batch, notes, obs.sum(axis=1) + cens.sum(axis=1)


def starting_values(batch: Batch, n_grid: int = 16) -> np.ndarray:
    """Data-based starting ``ln CL, ln V`` for each row.

    For each row a log-spaced grid of elimination rates (half-lives from 1/50
    to 20 times the sampling span) is tried; for each rate the volume follows
    in closed form from ``ln C = ln S(t; k) - ln V`` (mean log residual over the
    measured levels), and the rate with the smallest squared log residual wins.

    Returns
    -------
    ndarray, shape (B, 3, 2)
        The best grid point and two rates 2.5 times faster and slower (each
        with its own closed-form volume).
    """
    b = batch.t.shape[0]
    first = batch.start.min(axis=1, initial=np.inf, where=batch.amount > 0)
    first = np.where(np.isfinite(first), first, 0.0)
    span = np.maximum((batch.t * batch.obs).max(axis=1) - first, 1e-3)
    grid = np.exp(np.linspace(np.log(model.LN2 / (20 * span)), np.log(model.LN2 / (span / 50)),
                              n_grid).T)                                  # (B, G) in 1/h
    mult = np.array([1.0, 2.5, 1 / 2.5])

    def fit_v(k):  # k (B, G) -> (ln V, sse)
        s = model.concentration(batch.t[:, None, :], batch.start[:, None, :],
                                batch.amount[:, None, :], batch.duration[:, None, :], k,
                                np.ones_like(k))                           # V = 1
        pos = batch.obs[:, None, :] & (batch.y[:, None, :] > 0) & (s > 0)
        with np.errstate(divide="ignore", invalid="ignore"):
            d = np.where(pos, np.log(s) - np.log(np.where(pos, batch.y[:, None, :], 1.0)), 0.0)
        n = np.maximum(pos.sum(axis=2), 1)
        lnv = d.sum(axis=2) / n
        sse = np.where(pos, (d - lnv[..., None]) ** 2, 0.0).sum(axis=2)
        sse = np.where(pos.sum(axis=2) > 0, sse, np.inf)
        return lnv, sse

    _, sse = fit_v(grid)
    best = np.clip(np.argmin(sse, axis=1), 1, n_grid - 2)
    rows = np.arange(b)
    # parabola through the best grid point and its neighbours (in ln k) refines the minimum
    y0, y1, y2 = sse[rows, best - 1], sse[rows, best], sse[rows, best + 1]
    curv = y0 - 2 * y1 + y2
    with np.errstate(divide="ignore", invalid="ignore"):
        shift = np.where(np.isfinite(curv) & (curv > 0), 0.5 * (y0 - y2) / curv, 0.0)
    step = np.log(grid[:, 1] / grid[:, 0])
    k_best = grid[rows, best] * np.exp(np.clip(shift, -1.0, 1.0) * step)
    ks = k_best[:, None] * mult[None, :]                                  # (B, 3)
    lnv3, _ = fit_v(ks)
    lncl3 = np.log(ks) + lnv3
    return np.stack([lncl3, lnv3], axis=-1)


def _error_starts(batch: Batch, theta: np.ndarray) -> np.ndarray:
    """Residual-error starting values from the structural start."""
    f = model.concentration(batch.t, batch.start, batch.amount, batch.duration,
                            np.exp(theta[:, 0]), np.exp(theta[:, 1]))
    pos = batch.obs & (batch.y > 0) & (f > 0)
    n = np.maximum(pos.sum(axis=1), 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        lr = np.where(pos, np.log(np.where(pos, batch.y, 1.0) / np.where(pos, f, 1.0)), 0.0)
    sp = np.clip(np.sqrt((lr**2).sum(axis=1) / n), 0.02, 1.0)
    ymed = _row_median(batch)
    sa = np.clip(np.sqrt((np.where(batch.obs, batch.y - f, 0.0) ** 2).sum(axis=1) / n),
                 1e-3 * ymed, None)
    if batch.error == "additive":
        return np.log(sa)[:, None]
    if batch.error == "proportional":
        return np.log(sp)[:, None]
    return np.stack([np.log(np.maximum(0.1 * ymed * sp, 1e-6)), np.log(0.8 * sp)], axis=1)


# --------------------------------------------------------------------------- fitting
def _row_median(batch: Batch) -> np.ndarray:
    """Median of the measured levels of each row (1 when a row has none)."""
    has = batch.obs.any(axis=1)
    values = np.where(batch.obs, batch.y, np.nan)
    values[~has] = 1.0
    return np.nanmedian(values, axis=1)


def _bounds(batch: Batch, q: int) -> np.ndarray:
    """Lower bounds of the log-parameters: residual SDs are kept above a floor
    (additive 1e-4 of the median level, proportional 0.1 %) so that a component
    the data do not support ends at its bound instead of at zero variance."""
    lower = np.full((batch.t.shape[0], q), -30.0)
    if batch.kind == "likelihood":
        ymed = _row_median(batch)
        floors = {"additive": [np.log(1e-4 * ymed)],
                  "proportional": [np.full_like(ymed, np.log(1e-3))],
                  "combined": [np.log(1e-4 * ymed), np.full_like(ymed, np.log(1e-3))]}
        for j, floor in enumerate(floors[batch.error]):
            lower[:, 2 + j] = floor
    return lower


def _solve_starts(batch: Batch, theta0: np.ndarray, opts: FitOptions, n_starts: int):
    """Solve the first start of every subject, then the other starts; an other start
    that reaches the first start's optimum stops there (it agrees)."""
    if n_starts == 1 or opts.weighting == "inverse_predicted_squared":
        return _solve(batch, theta0, opts)
    which = np.arange(theta0.shape[0]) % n_starts
    first, others = np.flatnonzero(which == 0), np.flatnonzero(which > 0)
    sol1 = _solve(batch.rows(first), theta0[first], opts)
    ref_theta = np.repeat(np.where(sol1.converged[:, None], sol1.theta, np.nan),
                          n_starts - 1, axis=0)
    ref_obj = np.repeat(np.where(sol1.converged, sol1.obj, np.nan), n_starts - 1)
    sol2 = _solve(batch.rows(others), theta0[others], opts, reference=(ref_theta, ref_obj))
    out = Solution(np.empty_like(theta0), np.empty(theta0.shape[0]),
                   np.empty((theta0.shape[0], sol1.grad.shape[1])),
                   np.empty((theta0.shape[0], *sol1.info.shape[1:])),
                   np.empty(theta0.shape[0], bool), np.empty(theta0.shape[0], int),
                   [""] * theta0.shape[0])
    for idx, part in ((first, sol1), (others, sol2)):
        out.theta[idx], out.obj[idx], out.converged[idx] = part.theta, part.obj, part.converged
        out.iterations[idx] = part.iterations
        for k, r in enumerate(idx):
            out.message[r] = part.message[k]
    return out


def _solve(batch: Batch, theta0: np.ndarray, opts: FitOptions, reference=None):
    n_rows = batch.t.shape[0]

    def fun(theta, idx):
        rows = batch if idx.size == n_rows else batch.rows(idx)
        obj, grad, info, _ = evaluate(rows, theta)
        return obj, grad, info

    lower = _bounds(batch, theta0.shape[1])
    if batch.kind == "likelihood" and batch.error != "combined" and not batch.cens.any():
        # the residual SD has a closed-form optimum: profile it out (2 parameters)
        floor = lower[:, 2]

        def profiled(theta, idx):
            rows = batch if idx.size == n_rows else batch.rows(idx)
            obj, grad, info, _ = evaluate(rows, theta, sigma_floor=floor[idx])
            return obj, grad, info

        ref = None if reference is None else (reference[0][:, :2], reference[1])
        sol = minimise(profiled, theta0[:, :2], lower=lower[:, :2], reference=ref,
                       reference_tol=(1e-3, AGREE_TOL))
        f = model.concentration(batch.t, batch.start, batch.amount, batch.duration,
                                np.exp(sol.theta[:, 0]), np.exp(sol.theta[:, 1]))
        sol.theta = np.concatenate([sol.theta, profiled_sigma(batch, f, floor)[:, None]], 1)
        return sol
    if opts.weighting != "inverse_predicted_squared":
        return minimise(fun, theta0, lower=lower, reference=reference,
                        reference_tol=(1e-3, AGREE_TOL))
    # iteratively reweighted: w = 1/f^2 from the current prediction
    theta = theta0
    sol = None
    for _ in range(25):
        f = model.concentration(batch.t, batch.start, batch.amount, batch.duration,
                                np.exp(theta[:, 0]), np.exp(theta[:, 1]))
        w = np.where(batch.obs, 1.0 / np.maximum(f, 1e-12) ** 2, 0.0)
        batch = Batch(**{**batch.__dict__, "w": w})
        sol = minimise(fun, theta)
        change = np.abs(sol.theta - theta).max()
        theta = sol.theta
        if change < 1e-8:
            break
    return sol


def _hessian(batch: Batch, theta: np.ndarray, h: float = 1e-5) -> np.ndarray:
    """Observed information: central differences of the analytic gradient (once, at
    the estimate -- not in the iterations)."""
    b, q = theta.shape
    plus = np.repeat(theta[:, None, :], q, axis=1) + h * np.eye(q)
    minus = np.repeat(theta[:, None, :], q, axis=1) - h * np.eye(q)
    rows = np.repeat(np.arange(b), q)
    _, gp, _, _ = evaluate(batch.rows(rows), plus.reshape(-1, q))
    _, gm, _, _ = evaluate(batch.rows(rows), minus.reshape(-1, q))
    hess = ((gp - gm) / (2 * h)).reshape(b, q, q)
    return 0.5 * (hess + np.swapaxes(hess, 1, 2))


def _estimate(lnvalue: float, var: float | None, quantile: float = Z95) -> Estimate:
    """Estimate with a Wald interval on the log scale, ``exp(ln x +- q SE)``."""
    value = math.exp(lnvalue)
    if var is None or not np.isfinite(var) or var < 0 or var > 25.0:
        return Estimate(value)  # SE of the log above 5: no meaningful interval
    se = math.sqrt(var)
    return Estimate(value, value * se, 100 * se, math.exp(lnvalue - quantile * se),
                    math.exp(lnvalue + quantile * se))


@lru_cache(maxsize=256)
def wald_quantile(n_obs: int, n_params: int, kind: str) -> float:
    """97.5 % quantile for Wald intervals: Student's t on ``n - p`` degrees of freedom
    for least squares and likelihood fits (small-sample practice in nonlinear
    regression, e.g. Bates & Watts 1988 -- from memory), normal for MAP fits."""
    from scipy.stats import t as student_t

    if kind == "map" or n_obs - n_params < 1:
        return Z95
    return float(student_t.ppf(0.975, n_obs - n_params))


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
    kind = opts.method
    full, notes_all, n_used = _prepare_batch(subjects, opts)
    has_level = (full.obs & (full.y > 0)).any(axis=1)
    enough = (n_used >= 2) | (opts.prior is not None)
    for i in np.flatnonzero(~has_level):
        failures.append((subjects[i].subject, "no measurable level to fit"))
    for i in np.flatnonzero(has_level & ~enough):
        failures.append((subjects[i].subject, "fewer than 2 levels: individual fitting needs "
                                              "more (give a prior for a MAP estimate)"))
    good = np.flatnonzero(has_level & enough)
    if good.size == 0:
        return [], failures
    keep = [subjects[i] for i in good]
    batch = full if good.size == len(subjects) else full.rows(good)
    notes = [notes_all[i] for i in good]
    prior_info = {}
    if kind == "map":
        batch, prior_info, bad = _with_prior(batch, keep, opts, prior_means)
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
            return [], failures
    starts = starting_values(batch)                                        # (B, 3, 2)
    n_starts = opts.starts
    if n_starts > 3:
        spread = np.exp(np.linspace(-1.5, 1.5, n_starts - 3))
        extra = starts[:, :1, :] + np.stack([np.log(spread), np.zeros_like(spread)], -1)[None]
        starts = np.concatenate([starts, extra], axis=1)
    starts = starts[:, :n_starts, :]
    if kind == "map":
        # the prior mean is a natural extra start for sparse data
        starts = np.concatenate([batch.mu[:, None, :], starts], axis=1)[:, :max(n_starts, 1)]
        n_starts = starts.shape[1]
    b = len(keep)
    rep = batch.repeat(n_starts)
    theta0 = starts.reshape(b * n_starts, 2)
    if kind == "likelihood":
        # residual-error starts from each subject's best grid point, shared by its starts
        err0 = _error_starts(batch, starts[:, 0, :])
        theta0 = np.concatenate([theta0, np.repeat(err0, n_starts, axis=0)], axis=1)
    sol = _solve_starts(rep, theta0, opts, n_starts)
    obj = sol.obj.reshape(b, n_starts)
    obj_ok = np.where(np.isfinite(obj), obj, np.inf)
    best = np.argmin(obj_ok, axis=1)
    sel = np.arange(b) * n_starts + best
    theta = sol.theta[sel]
    agreed = (np.abs(obj_ok - obj_ok[np.arange(b), best][:, None]) <= AGREE_TOL).sum(axis=1)
    final = batch  # one row per subject, in order (the starts only differ in theta)
    if opts.weighting == "inverse_predicted_squared":
        f0 = model.concentration(final.t, final.start, final.amount, final.duration,
                                 np.exp(theta[:, 0]), np.exp(theta[:, 1]))
        final = Batch(**{**final.__dict__, "w": np.where(final.obs, 1 / np.maximum(
            f0, 1e-12) ** 2, 0.0)})
    f_obj, _, info, f = evaluate(final, theta)
    # information for the covariance: the scoring matrix (J'WJ for least squares, the
    # Fisher information -- plus the prior's -- for likelihood and MAP fits); with
    # censored levels the observed information, by differences of the analytic gradient
    censored = final.cens.any(axis=1)
    hess = info
    if censored.any() and kind != "least_squares":
        idx = np.flatnonzero(censored)
        hess = info.copy()
        hess[idx] = _hessian(final.rows(idx), theta[idx])
    cov, identifiable, scale = _covariances(final, f_obj, hess, kind)
    lower = _bounds(final, theta.shape[1])
    tables = _structural_estimates(final, theta, cov, kind)
    n_used = final.n_obs
    if kind == "least_squares":
        sd_all = np.sqrt(scale[:, None] / np.maximum(final.w, 1e-300))
        nn = np.maximum(n_used, 1)
        logw = np.where(final.obs, np.log(np.where(final.obs, final.w, 1.0)), 0.0).sum(axis=1)
        m2ll = nn * np.log(2 * np.pi * np.maximum(f_obj, 1e-300) / nn) + nn - logw
    else:
        sd_all = np.sqrt(_variance(final, theta, f)[0])
        m2ll = f_obj
    observed = np.where(final.obs | final.cens, final.y, np.nan)
    resid = np.where(final.obs, final.y - f, np.nan)
    wres = resid / sd_all
    results = []
    for i, s in enumerate(keep):
        k = s.time.size
        results.append(_result(
            s, opts, final, i, theta[i], f_obj[i], float(m2ll[i]), int(n_used[i]), cov[i],
            bool(identifiable[i]), float(scale[i]), lower[i], f[i, :k], observed[i, :k],
            resid[i, :k], wres[i, :k], tables[i], bool(sol.converged[sel[i]]),
            sol.message[sel[i]], int(sol.iterations[sel[i]]), n_starts, int(agreed[i]),
            notes[i], {key: v[i] for key, v in prior_info.items()}))
    return results, failures


def _structural_estimates(batch: Batch, theta: np.ndarray, cov: np.ndarray, kind: str
                          ) -> list[dict[str, Estimate]]:
    """Clearance, volume, elimination rate and half-life of every row (vectorised).

    ``ln k = ln CL - ln V`` and ``ln t1/2 = ln ln2 - ln k`` share the variance
    ``var(ln CL) + var(ln V) - 2 cov``; intervals are ``exp(ln x +- q SE)``.
    """
    n = batch.n_obs
    p = 3 if kind == "least_squares" else theta.shape[1]
    q = np.array([wald_quantile(int(k), p, kind) for k in n])
    var_k = cov[:, 0, 0] + cov[:, 1, 1] - 2 * cov[:, 0, 1]
    lnk = theta[:, 0] - theta[:, 1]
    columns = {"clearance": (theta[:, 0], cov[:, 0, 0]), "volume": (theta[:, 1], cov[:, 1, 1]),
               "elimination_rate": (lnk, var_k),
               "half_life": (math.log(model.LN2) - lnk, var_k)}
    out: list[dict[str, Estimate]] = [{} for _ in range(theta.shape[0])]
    for name, (ln, var) in columns.items():
        value = np.exp(ln)
        ok = np.isfinite(var) & (var >= 0) & (var <= 25.0)
        se_log = np.sqrt(np.where(ok, var, 0.0))
        lo, hi = np.exp(ln - q * se_log), np.exp(ln + q * se_log)
        for i in range(theta.shape[0]):
            out[i][name] = (Estimate(float(value[i]), float(value[i] * se_log[i]),
                                     float(100 * se_log[i]), float(lo[i]), float(hi[i]))
                            if ok[i] else Estimate(float(value[i])))
    return out


def _covariances(batch: Batch, obj: np.ndarray, hess: np.ndarray, kind: str):
    """Covariance of the log-parameters for every row at once.

    Least squares: ``s^2 (J'WJ)^-1`` with ``s^2 = SS/(n - 2)``; likelihood and MAP:
    ``2 H^-1`` with ``H`` the observed Hessian of ``-2 ln L`` (or of the posterior).
    A row is not identifiable when the clearance/volume block of the information,
    scaled to unit diagonal, has an eigenvalue below :data:`IDENTIFIABILITY_EIG`,
    or the information is not positive definite.

    Returns
    -------
    cov : ndarray, shape (B, q, q)
        NaN for rows without a usable covariance.
    identifiable : ndarray of bool, shape (B,)
    scale : ndarray, shape (B,)
        ``s^2`` for least squares (NaN without degrees of freedom), else 1.
    """
    b = hess.shape[0]
    n = batch.n_obs
    if kind == "least_squares":
        scale = np.where(n > 2, obj / np.maximum(n - 2, 1), np.nan)
        info = hess / 2
    else:
        scale = np.ones(b)
        info = hess / 2
    d = np.sqrt(np.maximum(np.diagonal(info, axis1=1, axis2=2), 1e-300))
    corr = info / (d[:, :, None] * d[:, None, :])
    finite = np.all(np.isfinite(corr), axis=(1, 2))
    # a row whose information overflowed (extreme levels) is simply not identifiable
    corr = np.where(finite[:, None, None], corr, np.eye(corr.shape[1])[None])
    eig_all, vec = np.linalg.eigh(corr)
    eig_cv = np.linalg.eigvalsh(corr[:, :2, :2])
    identifiable = (eig_cv.min(axis=1) >= IDENTIFIABILITY_EIG) & (eig_all.min(axis=1) > 0)
    identifiable &= np.all(np.isfinite(info), axis=(1, 2)) & finite
    with np.errstate(divide="ignore", invalid="ignore"):
        inv_corr = np.einsum("bij,bj,bkj->bik", vec, 1 / eig_all, vec)
        cov = inv_corr / (d[:, :, None] * d[:, None, :]) * scale[:, None, None]
    bad = ~identifiable | ~np.isfinite(scale)
    cov[bad] = np.nan
    return cov, identifiable, scale


def _with_prior(batch: Batch, subjects: list[SubjectData], opts: FitOptions,
                prior_means: dict[str, tuple[float, float]] | None = None):
    prior = opts.prior
    assert prior is not None
    mu, bad = [], []
    for i, s in enumerate(subjects):
        if prior_means is not None and s.subject in prior_means:
            mu.append(list(prior_means[s.subject]))
            continue
        try:
            cl, v = prior.typical(s.weight)
        except ValueError:
            bad.append(i)
            cl, v = prior.clearance, prior.volume
        mu.append([math.log(cl), math.log(v)])
    mu = np.asarray(mu)
    oc, ov, r = prior.omega_clearance, prior.omega_volume, prior.correlation
    omega = np.array([[oc**2, r * oc * ov], [r * oc * ov, ov**2]])
    b = len(subjects)
    batch = Batch(**{**batch.__dict__, "kind": "map", "error": prior.error_model,
                     "sa": np.full(b, prior.additive), "sp": np.full(b, prior.proportional),
                     "mu": mu, "omega_inv": np.repeat(np.linalg.inv(omega)[None], b, axis=0)})
    info = {"mu": mu, "omega": np.repeat(omega[None], b, axis=0)}
    return batch, info, bad


def _result(s: SubjectData, opts: FitOptions, batch: Batch, i: int, theta: np.ndarray,
            obj: float, m2ll: float, n_used: int, cov: np.ndarray, identifiable: bool,
            s2: float, lower: np.ndarray, pred: np.ndarray, observed: np.ndarray,
            resid: np.ndarray, wres: np.ndarray, table: dict[str, Estimate], converged: bool,
            message: str, iterations: int, n_starts: int, agreed: int, notes: list[str],
            prior: dict) -> FitResult:
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
        which = _undetermined(batch.rows(np.array([i])), theta, n_real)
        warnings.append(f"not identifiable: {which}; standard errors and intervals are not "
                        "reported")
    cov = cov if identifiable and math.isfinite(s2) else None
    var = [None] * q if cov is None else [float(cov[j, j]) for j in range(q)]
    qt = wald_quantile(n_used, p, kind)
    ests = dict(table)
    corr = None if cov is None else float(cov[0, 1] / math.sqrt(cov[0, 0] * cov[1, 1]))
    if opts.ci == "profile" and cov is not None:
        for j, name in ((0, "clearance"), (1, "volume")):
            lo, hi, note = _profile(batch.rows(np.array([i])), theta, j, obj,
                                    math.sqrt(var[j]), opts, n_used)
            if note:
                notes.append(f"{name}: {note}")
            e = ests[name]
            ests[name] = Estimate(e.value, e.se, e.rse_percent, lo, hi)
        notes.append("95 % intervals of clearance and volume by profile likelihood; derived "
                     "ones (k, half-life) by the Wald method on the log scale")
    residual: dict[str, Estimate] = {}
    if kind == "likelihood":
        names = {"additive": ["additive"], "proportional": ["proportional"],
                 "combined": ["additive", "proportional"]}[batch.error]
        for j, name in enumerate(names):
            at_floor = theta[2 + j] <= lower[2 + j] + 1e-6
            residual[name] = _estimate(float(theta[2 + j]), None if at_floor or cov is None
                                       else var[2 + j], qt)
            if at_floor:
                notes.append(f"the {name} error component is at its lower bound: the levels "
                             f"support the other component alone")
    elif kind == "map":
        if batch.sa[i] > 0:
            residual["additive"] = Estimate(float(batch.sa[i]))
        if batch.sp[i] > 0:
            residual["proportional"] = Estimate(float(batch.sp[i]))
        notes.append("MAP estimate: residual error fixed at the prior's values")
    else:
        residual["scale"] = Estimate(math.sqrt(max(s2, 0.0)) if np.isfinite(s2) else math.nan)
    if not converged:
        warnings.append(f"did not converge: {message}")
    if agreed < n_starts:
        notes.append(f"{n_starts - agreed} of {n_starts} starts ended at a higher objective "
                     "(a local minimum); the best is reported")
    for name, e in ests.items():
        if e.rse_percent is not None and e.rse_percent > POOR_RSE and name in ("clearance",
                                                                                "volume"):
            warnings.append(f"{name} is poorly determined (RSE {e.rse_percent:.0f} %)")
    warnings += parameter_warnings(ests["clearance"].value, ests["volume"].value, s.weight)
    prior_out: dict[str, float] = {}
    if kind == "map":
        mu, omega = prior["mu"], prior["omega"]
        prior_out = {"typical_clearance": math.exp(mu[0]), "typical_volume": math.exp(mu[1]),
                     "ln_clearance_deviation": float(theta[0]) - mu[0],
                     "ln_volume_deviation": float(theta[1]) - mu[1]}
        if cov is not None:
            prior_out["prior_variance_remaining_clearance_percent"] = 100 * cov[0, 0] / omega[
                0, 0]
            prior_out["prior_variance_remaining_volume_percent"] = 100 * cov[1, 1] / omega[1, 1]
            notes.append(
                f"{prior_out['prior_variance_remaining_clearance_percent']:.0f} % of the prior "
                f"variance of ln CL and {prior_out['prior_variance_remaining_volume_percent']:.0f}"
                " % of ln V remain after the levels (100 % = the levels say nothing; low values "
                "= estimate driven by the data)")
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
        weight=s.weight, initial_concentration=s.initial_concentration)


def _undetermined(row: Batch, theta: np.ndarray, n: int) -> str:
    """Plain words for which parameter the levels do not determine."""
    _, jac = model.concentration_and_gradient(row.t[0, :n], row.start[0], row.amount[0],
                                              row.duration[0], math.exp(theta[0]),
                                              math.exp(theta[1]))
    used = (row.obs[0, :n] | row.cens[0, :n])
    f = model.concentration(row.t[0, :n], row.start[0], row.amount[0], row.duration[0],
                            math.exp(theta[0]), math.exp(theta[1]))
    rel_v = np.abs(jac[1][used]) / np.maximum(f[used], 1e-300)
    if rel_v.max(initial=0.0) < 1e-3:
        return ("the volume is not determined by these levels (they all lie on the plateau, "
                "where only clearance matters)")
    return "clearance and volume cannot be told apart with these sample times"


def _profile(row: Batch, theta: np.ndarray, j: int, obj_hat: float, se: float,
             opts: FitOptions, n_used: int):
    """Profile-likelihood 95 % interval of parameter ``j`` (ln CL or ln V)."""
    from scipy.optimize import brentq

    q = theta.size
    free = [i for i in range(q) if i != j]
    to_m2ll = (lambda o: n_used * math.log(max(o, 1e-300) / n_used)) if \
        row.kind == "least_squares" else (lambda o: o)
    # likelihood-ratio cut-off: chi-square(1) for MAP; for fits that estimate the
    # residual variance, the small-sample form n ln(1 + t^2/(n - p)) with t the
    # Student quantile (Bates & Watts 1988, profile t -- from memory)
    p = 3 if row.kind == "least_squares" else q
    if row.kind == "map" or n_used - p < 1:
        cut = CHI2_95
    else:
        tq = wald_quantile(n_used, p, row.kind)
        cut = n_used * math.log1p(tq * tq / (n_used - p))
    target = to_m2ll(obj_hat) + cut
    start = {"x": theta[free].copy()}

    def prof(x: float) -> float:
        def fun(th, idx):
            full = np.empty((th.shape[0], q))
            full[:, free] = th
            full[:, j] = x
            obj, grad, info, _ = evaluate(row.rows(np.zeros(th.shape[0], int)), full)
            return obj, grad[:, free], info[:, free][:, :, free]
        sol = minimise(fun, start["x"][None, :])
        start["x"] = sol.theta[0]
        return to_m2ll(float(sol.obj[0])) - target

    bounds = []
    note = ""
    for direction in (-1, 1):
        start["x"] = theta[free].copy()
        step = max(se, 0.02)
        inner, outer = theta[j], None
        for _ in range(30):
            x = theta[j] + direction * step
            if prof(x) > 0:
                outer = x
                break
            inner = x
            step *= 1.8
        if outer is None:
            bounds.append(None)
            note = "the profile likelihood does not close on one side (interval open)"
            continue
        start["x"] = theta[free].copy()
        root = brentq(prof, min(inner, outer), max(inner, outer), xtol=1e-6)
        bounds.append(math.exp(root))
    return bounds[0], bounds[1], note
