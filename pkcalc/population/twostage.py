"""Population estimates from study data: standard and iterative two-stage methods.

- **Standard two-stage** (rich data): individual fits, then the geometric
  means of clearance and volume, between-subject CV, medians and 5-95th
  percentiles.  It over-states the variability by the estimation error of
  each subject.
- **Iterative two-stage** (sparse data; Prevost 1977; Steimer et al., Drug
  Metab Rev 1984;15:265 -- from memory): alternate

  1. MAP estimates of every subject under the current prior
     ``ln theta_i ~ N(X_i beta, Omega)`` with the current residual error,
     giving ``theta_i`` and its posterior covariance ``C_i`` (inverse of
     ``J'WJ + Omega^-1``);
  2. ``beta = (sum X_i' Omega^-1 X_i)^-1 sum X_i' Omega^-1 theta_i``,
     ``Omega = (1/N) sum [(theta_i - X_i beta)(theta_i - X_i beta)' + C_i]``;
  3. the residual error by maximum likelihood on the pooled residuals with
     variance ``v_ij + j_ij' C_i j_ij``;

  until the largest change of ``beta`` is below 1e-4 (log scale), of the
  diagonal of ``Omega`` below 1e-3 (relative) and of the residual SDs below 1e-3
  of the residual SD at the median level, or 200 iterations.

  Standard errors of the typical values come from the linearised information
  ``sum X_i' (Omega^-1 - Omega^-1 C_i Omega^-1) X_i`` -- the marginal covariance
  of a subject's estimate is ``Omega + S_i`` with ``S_i`` its estimation error, and
  by Woodbury ``(Omega + S_i)^-1 = Omega^-1 - Omega^-1 C_i Omega^-1`` with the
  posterior covariance ``C_i`` -- so sparse subjects count less than rich ones.

Covariates (body weight): none; allometric with fixed exponents (0.75 for
clearance, 1 for volume); estimated exponents; or per-kg normalisation
(exponents 1 and reference weight 1 kg, so typical values are per kg).  The
typical value of a subject is ``theta_pop (W/W_ref)^exponent``.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
from scipy.optimize import minimize as scipy_minimize

from .. import model
from ..core import FitOptions, Prior, SubjectData
from ..engines import Engine
from ..fit import fit_subjects
from ..fit.data import predictions_by_subject, prepare_batch
from ..fit.objective import Batch, evaluate, exact_hessian, positive_definite
from ..fit.result import Z95
from ..fit.solver import minimise
from ..fit.starts import starting_values
from .result import PopulationResult

__all__ = [
    "COVARIATE_MODELS",
    "PopulationResult",
    "iterative_two_stage",
    "simulate_design",
    "two_stage",
]

COVARIATE_MODELS = ("none", "allometric", "estimated", "per_kg")
FIXED_EXPONENTS = {"allometric": (0.75, 1.0), "per_kg": (1.0, 1.0)}
MAX_ITERATIONS = 200
BETA_TOL = 1e-4
OMEGA_TOL = 1e-3
#: Largest change of the residual SDs, relative to the residual SD at the median level.
SIGMA_TOL = 1e-3


# --------------------------------------------------------------------------- helpers
def _cv(omega2: float) -> float:
    """Log-normal CV % from the variance of the log: ``100 sqrt(exp(w^2) - 1)``."""
    return 100.0 * math.sqrt(math.expm1(max(omega2, 0.0)))


def _design(subjects: list[SubjectData], covariate: str, reference_weight: float | None):
    """Per subject: log-weight term x (N,) and the offsets of ln CL, ln V for fixed
    exponents; which parameters carry an estimated exponent."""
    n = len(subjects)
    if covariate == "none":
        return np.zeros(n), np.zeros((n, 2)), False
    weights = np.array([s.weight if s.weight is not None else np.nan for s in subjects])
    ref = 1.0 if covariate == "per_kg" else reference_weight
    x = np.log(weights / ref)
    if covariate == "estimated":
        return x, np.zeros((n, 2)), True
    e_cl, e_v = FIXED_EXPONENTS[covariate]
    return x, np.stack([e_cl * x, e_v * x], axis=1), False


def _gls(theta: np.ndarray, x: np.ndarray, offset: np.ndarray, omega: np.ndarray,
         estimate_exponents: bool):
    """beta (intercepts, and exponents when estimated) and its covariance."""
    n = theta.shape[0]
    y = theta - offset
    if not estimate_exponents:
        beta = y.mean(axis=0)
        return beta, omega / n, y - beta
    # X_i = [[1, x, 0, 0], [0, 0, 1, x]] for (ln CL, ln V); beta = [a_cl, b_cl, a_v, b_v]
    oi = np.linalg.inv(omega)
    xm = np.zeros((n, 2, 4))
    xm[:, 0, 0], xm[:, 0, 1], xm[:, 1, 2], xm[:, 1, 3] = 1.0, x, 1.0, x
    a = np.einsum("nki,kl,nlj->ij", xm, oi, xm)
    bvec = np.einsum("nki,kl,nl->i", xm, oi, y)
    cov = np.linalg.inv(a)
    beta = cov @ bvec
    resid = y - np.einsum("nki,i->nk", xm, beta)
    return beta, cov, resid


def _means(beta: np.ndarray, x: np.ndarray, offset: np.ndarray, estimate: bool) -> np.ndarray:
    if not estimate:
        return offset + beta[None, :]
    return np.stack([beta[0] + beta[1] * x, beta[2] + beta[3] * x], axis=1) + offset


def _residual_update(batch: Batch, f: np.ndarray, jac: np.ndarray, cpost: np.ndarray,
                     error: str, start: tuple[float, float]) -> tuple[float, float]:
    """Residual error from the pooled residuals: maximises
    ``sum [ln v + (r^2 + j' C j) / v]`` over the error parameters, where ``j' C j``
    is the posterior variance of the prediction, so the expected squared error
    ``r^2 + j' C j`` is used rather than the shrunken residual alone (the EM form
    of the iterative two-stage update; censored levels are left out of this step)."""
    o = batch.obs
    r = np.where(o, batch.y - f, 0.0)
    extra = np.einsum("ibn,bij,jbn->bn", jac, cpost, jac)

    def objective(p):
        sa = math.exp(p[0]) if error in ("additive", "combined") else 0.0
        sp = math.exp(p[-1]) if error in ("proportional", "combined") else 0.0
        v = np.where(o, np.maximum(sa**2 + sp**2 * f**2, 1e-300), 1.0)
        return float(np.where(o, np.log(v) + (r * r + extra) / v, 0.0).sum())

    sa0, sp0 = start
    p0 = {"additive": [math.log(sa0)], "proportional": [math.log(sp0)],
          "combined": [math.log(sa0), math.log(sp0)]}[error]
    res = scipy_minimize(objective, p0, method="Nelder-Mead",
                         options={"xatol": 1e-6, "fatol": 1e-8, "maxiter": 400})
    p = res.x
    sa = math.exp(p[0]) if error in ("additive", "combined") else 0.0
    sp = math.exp(p[-1]) if error in ("proportional", "combined") else 0.0
    return sa, sp


# --------------------------------------------------------------------------- two-stage
def usable_fits(fits: list) -> list:
    """The individual fits the standard two-stage method uses: converged, with a
    standard error of clearance."""
    return [r for r in fits if r.converged and r.estimates["clearance"].se is not None]


def two_stage(subjects: list[SubjectData], options: FitOptions | None = None, *,
              covariate: str = "none", reference_weight: float = 70.0) -> PopulationResult:
    """Standard two-stage estimates from individual fits.

    Typical values are geometric means ``exp(mean ln theta_i)`` (adjusted for the
    weight model when one is given), CV % from the variance of ``ln theta_i``.
    """
    fits, failures = fit_subjects(subjects, options or FitOptions())
    usable = usable_fits(fits)
    kept = {id(r) for r in usable}          # identity: comparing results field by field
    dropped = [r.subject for r in fits if id(r) not in kept]   # is quadratic and slow
    if len(usable) < 2:
        raise ValueError("fewer than two subjects could be fitted individually: the "
                         "two-stage method needs rich data (use the iterative method)")
    by_name = {s.subject: s for s in subjects}
    subs = [by_name[r.subject] for r in usable]
    theta = np.log(np.array([[r.clearance, r.volume] for r in usable]))
    x, offset, estimate = _design(subs, covariate, reference_weight)
    omega0 = np.cov(theta.T) if len(usable) > 2 else np.eye(2)
    beta, beta_cov, resid = _gls(theta, x, offset, omega0, estimate)
    omega = np.cov(resid.T, ddof=0 if estimate else 1) if len(usable) > 1 else np.eye(2)
    result = _assemble("two_stage", beta, beta_cov, omega, estimate, covariate,
                       reference_weight, fits, failures)
    result.residual_error = {"median_proportional":
                             float(np.median([r.residual_error["proportional"].value
                                              for r in usable if "proportional" in
                                              r.residual_error]))} \
        if any("proportional" in r.residual_error for r in usable) else {}
    for name, j in (("clearance", 0), ("volume", 1)):
        vals = np.exp(theta[:, j])
        result.percentiles[name] = {"median": float(np.median(vals)),
                                    "p05": float(np.percentile(vals, 5)),
                                    "p95": float(np.percentile(vals, 95))}
    if dropped:
        result.warnings.append(f"left out of the population step (no usable individual "
                               f"estimate): {', '.join(dropped)}")
    result.notes.append("the two-stage CV includes each subject's estimation error, so it "
                        "over-states the true between-subject variability")
    return result


def _assemble(method, beta, beta_cov, omega, estimate, covariate, reference_weight, fits,
              failures) -> PopulationResult:
    if estimate:
        typ = {"clearance": math.exp(beta[0]), "volume": math.exp(beta[2])}
        se_log = {"clearance": math.sqrt(beta_cov[0, 0]), "volume": math.sqrt(beta_cov[2, 2])}
        exps = {"clearance": float(beta[1]), "volume": float(beta[3])}
        exp_se = {"clearance": math.sqrt(beta_cov[1, 1]), "volume": math.sqrt(beta_cov[3, 3])}
        exp_ci = {k: (exps[k] - Z95 * exp_se[k], exps[k] + Z95 * exp_se[k]) for k in exps}
    else:
        typ = {"clearance": math.exp(beta[0]), "volume": math.exp(beta[1])}
        se_log = {"clearance": math.sqrt(beta_cov[0, 0]), "volume": math.sqrt(beta_cov[1, 1])}
        exps = dict(zip(("clearance", "volume"), FIXED_EXPONENTS[covariate], strict=True)) \
            if covariate in FIXED_EXPONENTS else {}
        exp_ci = exp_se = None
    ref = 1.0 if covariate == "per_kg" else (reference_weight if covariate != "none" else None)
    return PopulationResult(
        method=method, typical=typ,
        variability_cv_percent={"clearance": _cv(omega[0, 0]), "volume": _cv(omega[1, 1])},
        omega=omega, residual_error={}, subjects=fits, failures=failures, covariate=covariate,
        reference_weight=ref, exponents=exps, exponent_ci=exp_ci, exponent_se=exp_se,
        typical_se={k: typ[k] * se_log[k] for k in typ},
        typical_ci={k: (typ[k] * math.exp(-Z95 * se_log[k]), typ[k] * math.exp(
            Z95 * se_log[k])) for k in typ},
        correlation=float(omega[0, 1] / math.sqrt(omega[0, 0] * omega[1, 1]))
        if omega[0, 0] > 0 and omega[1, 1] > 0 else None,
    )


# --------------------------------------------------------------------------- iterative
def _map_all(batch: Batch, theta0: np.ndarray, mu: np.ndarray, omega: np.ndarray, sa: float,
             sp: float):
    """MAP estimates of all subjects under one prior; posterior covariances.

    Sparse subjects can have several posterior modes, so each subject starts from
    its previous estimate and from its prior mean, and the better end point wins.
    """
    n = theta0.shape[0]
    oi = np.linalg.inv(omega)
    b = replace(batch, kind="map", mu=mu, omega_inv=np.repeat(oi[None], n, axis=0),
                sa=np.full(n, sa), sp=np.full(n, sp), geometry=batch.geometry)
    b2 = b.repeat(2)

    def fun(th, idx):          # Newton steps on the exact Hessian where it is positive
        rows = b2 if idx.size == 2 * n else b2.rows(idx)       # definite, else scoring
        obj, grad, hess, info = exact_hessian(rows, th)
        return obj, grad, np.where(positive_definite(hess)[:, None, None], hess, info)

    starts = np.stack([theta0, mu], axis=1).reshape(2 * n, 2)
    sol = minimise(fun, starts)
    pick = np.arange(n) * 2 + np.argmin(sol.obj.reshape(n, 2), axis=1)
    sol.theta, sol.converged = sol.theta[pick], sol.converged[pick]
    obj, _, info, f = evaluate(b, sol.theta)
    cpost = np.linalg.inv(info / 2)
    _, jac = model.concentration_and_gradient(b.t, b.start, b.amount, b.duration,
                                              np.exp(sol.theta[:, 0]), np.exp(sol.theta[:, 1]),
                                              geometry=b.geometry)
    return sol, obj, cpost, f, jac


def iterative_two_stage(subjects: list[SubjectData], *, error_model: str = "proportional",
                        covariate: str = "none", reference_weight: float = 70.0,
                        blq: str = "likelihood", max_iterations: int = MAX_ITERATIONS,
                        start: dict | None = None, final_fits: bool = True
                        ) -> PopulationResult:
    """Iterative two-stage population estimates (see the module docstring).

    Parameters
    ----------
    subjects : list of SubjectData
    error_model : {"additive", "proportional", "combined"}
    covariate : {"none", "allometric", "estimated", "per_kg"}
    reference_weight : float, kg
    blq : {"likelihood", "drop", "half_lloq"}
    max_iterations : int
    start : dict, optional
        ``beta``, ``omega``, ``sa``, ``sp``, ``theta`` to start from (bootstrap).
    final_fits : bool
        Produce a :class:`FitResult` per subject under the final prior.

    Returns
    -------
    PopulationResult
    """
    if covariate not in COVARIATE_MODELS:
        raise ValueError(f"unknown covariate model {covariate!r}")
    failures: list[tuple[str, str]] = []
    if covariate != "none":
        missing = [s.subject for s in subjects if s.weight is None]
        failures += [(m, "no body weight for the covariate model") for m in missing]
        subjects = [s for s in subjects if s.weight is not None]
    opts = FitOptions(error_model=error_model, blq=blq)
    batch, _, _ = prepare_batch(subjects, opts)
    has = (batch.obs & (batch.y > 0)).any(axis=1)
    for i in np.flatnonzero(~has):
        failures.append((subjects[i].subject, "no measurable level"))
    if (~has).any():
        keep = np.flatnonzero(has)
        batch = batch.rows(keep)
        subjects = [subjects[i] for i in keep]
    n = len(subjects)
    if n < 3:
        raise ValueError("the population step needs at least three subjects with levels")
    x, offset, estimate = _design(subjects, covariate, reference_weight)
    if start is None:
        theta = starting_values(batch)[:, 0, :]
        beta, _, resid = _gls(theta, x, offset, np.eye(2), estimate)
        omega = np.diag([1.0, 1.0])       # broad: CV about 130 %
        sa, sp = (0.1 * float(np.median(batch.y[batch.obs])), 0.2)
    else:
        theta, beta, omega = start["theta"], start["beta"], start["omega"]
        sa, sp = start["sa"], start["sp"]
    if error_model == "additive":
        sp = 0.0
    elif error_model == "proportional":
        sa = 0.0
    history: list[float] = []
    converged = False
    it = 0
    ymed = float(np.median(batch.y[batch.obs])) if batch.obs.any() else 1.0
    while it < max_iterations:
        it += 1
        mu = _means(beta, x, offset, estimate)
        sol, obj, cpost, f, jac = _map_all(batch, theta, mu, omega, sa, sp)
        theta = sol.theta
        # first-order (Laplace) approximation of -2 ln L of the population model
        logdet_c = np.linalg.slogdet(cpost)[1]
        history.append(float(obj.sum() + n * np.linalg.slogdet(omega)[1] - logdet_c.sum()))
        new_beta, _, resid = _gls(theta, x, offset, omega, estimate)
        new_omega = (np.einsum("ni,nj->ij", resid, resid) + cpost.sum(axis=0)) / n
        new_sa, new_sp = _residual_update(batch, f, jac, cpost, error_model,
                                          (max(sa, 1e-3), max(sp, 1e-3)))
        d_beta = np.abs(new_beta - beta).max()
        d_omega = np.abs(np.diag(new_omega) / np.diag(omega) - 1).max()
        d_sigma = max(abs(new_sa - sa), abs(new_sp - sp) * ymed) / max(
            new_sa + new_sp * ymed, 1e-12)
        beta, omega, sa, sp = new_beta, new_omega, new_sa, new_sp
        if d_beta < BETA_TOL and d_omega < OMEGA_TOL and d_sigma < SIGMA_TOL:
            converged = True
            break
    beta_cov = _linearised_cov(x, omega, cpost, estimate)
    result = _assemble("iterative", beta, beta_cov, omega, estimate, covariate,
                       reference_weight, [], failures)
    result.iterations = it
    result.objective_per_iteration = history
    result.converged = converged
    result.residual_error = {k: v for k, v in (("additive", sa), ("proportional", sp)) if v > 0}
    mu = _means(beta, x, offset, estimate)
    eta = theta - mu
    result.eta = eta
    result.subject_means = {s.subject: (float(mu[i, 0]), float(mu[i, 1]))
                            for i, s in enumerate(subjects)}
    result.shrinkage_percent = {
        name: 100 * (1 - float(np.std(eta[:, j])) / math.sqrt(omega[j, j]))
        for j, name in enumerate(("clearance", "volume"))}
    result.population_predictions = predictions_by_subject(batch, subjects, mu[:, 0],
                                                           mu[:, 1])
    result.notes.append(
        f"convergence: largest change of the typical values (log scale) < {BETA_TOL:g}, "
        f"of the variances < {OMEGA_TOL:g} (relative) and of the residual error < "
        f"{SIGMA_TOL:g} (relative); {'reached' if converged else 'NOT'} after {it} "
        "iterations")
    result.notes.append("shrinkage = 1 - SD(ln deviations from typical) / between-subject SD "
                        "(Savic & Karlsson 2009); "
                        "high values (> 30 %) make individual estimates lean on the prior")
    if not converged:
        result.warnings.append(f"did not converge in {max_iterations} iterations: the "
                               "estimates are the last iterate")
    result.bootstrap = {"state": {"theta": theta, "beta": beta, "omega": omega, "sa": sa,
                                  "sp": sp}}
    if final_fits:
        prior = _as_prior(omega, sa, sp)
        means = {s.subject: (float(mu[i, 0]), float(mu[i, 1])) for i, s in enumerate(subjects)}
        fits, fit_fail = fit_subjects(subjects, FitOptions(error_model=error_model, blq=blq,
                                                            prior=prior), prior_means=means)
        result.subjects = fits
        result.failures += fit_fail
    return result


def _linearised_cov(x: np.ndarray, omega: np.ndarray, cpost: np.ndarray, estimate: bool
                    ) -> np.ndarray:
    """Covariance of ``beta``: the inverse of ``sum X_i' (Omega^-1 - Omega^-1 C_i
    Omega^-1) X_i`` (each subject's posterior covariance ``C_i`` included)."""
    oi = np.linalg.inv(omega)
    w = oi[None] - np.einsum("ij,njk,kl->nil", oi, cpost, oi)          # (N, 2, 2)
    if not estimate:
        return np.linalg.inv(w.sum(axis=0))
    n = x.shape[0]
    xm = np.zeros((n, 2, 4))
    xm[:, 0, 0], xm[:, 0, 1], xm[:, 1, 2], xm[:, 1, 3] = 1.0, x, 1.0, x
    return np.linalg.inv(np.einsum("nki,nkl,nlj->ij", xm, w, xm))


def _as_prior(omega: np.ndarray, sa: float, sp: float) -> Prior:
    oc, ov = math.sqrt(omega[0, 0]), math.sqrt(omega[1, 1])
    r = float(np.clip(omega[0, 1] / (oc * ov), -0.99, 0.99))
    return Prior(1.0, 1.0, oc, ov, r, sa, sp, source="population estimate")


def _bootstrap_replicate(pick: np.ndarray, fitted: list[SubjectData], estimate,
                         start_state, theta_by: dict, kwargs: dict):
    """One bootstrap replicate (runs wherever the engine puts it): the estimate on the
    resampled subjects, or None when it fails."""
    sample = [replace(fitted[i], subject=f"{fitted[i].subject}#{k}")
              for k, i in enumerate(pick)]
    try:
        if estimate is not None:
            r = estimate(sample)
        else:
            start = None if start_state is None else dict(start_state, theta=np.array(
                [theta_by.get(fitted[i].subject, start_state["theta"][0]) for i in pick]))
            r = iterative_two_stage(sample, start=start, final_fits=False,
                                    max_iterations=60, **kwargs)
    except (ValueError, ArithmeticError, np.linalg.LinAlgError):
        return None
    return (r.typical["clearance"], r.typical["volume"],
            r.variability_cv_percent["clearance"], r.variability_cv_percent["volume"],
            dict(r.exponents))


def bootstrap(subjects: list[SubjectData], result: PopulationResult, n_boot: int, seed: int,
              *, progress=None, estimate=None, engine: Engine | None = None,
              **kwargs) -> dict[str, object]:
    """Bootstrap over subjects: re-estimate on resampled subjects (seeded), warm-started
    from the estimate; percentile 95 % intervals and SEs of the typical values.

    ``estimate(sample)`` re-estimates one replicate (default: the iterative
    two-stage method with ``kwargs``; a module-level function or a
    :func:`functools.partial` of one, so that worker processes can run it);
    ``engine`` says where the replicates run (:mod:`pkcalc.engines`; default this
    process).  Every resample is drawn here from ``seed`` before any replicate
    runs, so the result does not depend on the engine or the number of workers.
    ``progress`` receives a line per finished replicate with the time left.
    """
    from functools import partial

    from ..engines import map_ordered

    rng = np.random.default_rng(seed)
    state = result.bootstrap.get("state")
    fitted = [s for s in subjects if s.subject in {r.subject for r in result.subjects}] \
        or subjects
    theta_by = {} if state is None else {s.subject: state["theta"][i]
                                         for i, s in enumerate(fitted)
                                         if i < len(state["theta"])}
    picks = [rng.integers(0, len(fitted), len(fitted)) for _ in range(n_boot)]

    def show(done: int, total: int, seconds: float) -> None:
        left = seconds / done * (total - done)
        progress(f"bootstrap replicate {done} of {total} ({total - done} left, about "
                 f"{left:.0f} s)")

    task = partial(_bootstrap_replicate, fitted=fitted, estimate=estimate,
                   start_state=state, theta_by=theta_by, kwargs=kwargs)
    replicates = map_ordered(task, picks, engine,
                             progress=show if progress is not None else None)
    draws = {"clearance": [], "volume": [], "cv_clearance": [], "cv_volume": []}
    exps: dict[str, list[float]] = {"clearance": [], "volume": []}
    fails = 0
    for rep in replicates:
        if rep is None:
            fails += 1
            continue
        for key, value in zip(draws, rep[:4], strict=True):
            draws[key].append(value)
        for k, v in rep[4].items():
            exps[k].append(v)
    out: dict[str, object] = {"replicates": n_boot, "failed": fails, "seed": seed}
    for k, vals in draws.items():
        a = np.array(vals)
        if a.size:
            out[k] = {"se": float(a.std(ddof=1)) if a.size > 1 else None,
                      "ci_low": float(np.percentile(a, 2.5)),
                      "ci_high": float(np.percentile(a, 97.5))}
    for k, vals in exps.items():
        a = np.array(vals)
        if a.size > 1:
            out[f"exponent_{k}"] = {"se": float(a.std(ddof=1)),
                                    "ci_low": float(np.percentile(a, 2.5)),
                                    "ci_high": float(np.percentile(a, 97.5))}
    return out


# --------------------------------------------------------------------------- simulation
def simulate_design(subjects: list[SubjectData], result: PopulationResult, replicates: int,
                    seed: int) -> np.ndarray:
    """Simulated levels for a visual predictive check.

    Each replicate draws ``eta ~ N(0, Omega)`` for every subject and residual
    errors with the estimated model, at the subjects' own doses and sampling
    times.

    Returns
    -------
    ndarray, shape (replicates, total levels)
        In the order of the subjects and their sample times.
    """
    rng = np.random.default_rng(seed)
    mu = np.array([result.subject_means[s.subject] for s in subjects])
    sa = result.residual_error.get("additive", 0.0)
    sp = result.residual_error.get("proportional", 0.0)
    # all replicates at once: subjects padded to one width, parameters (R, S)
    batch, _, _ = prepare_batch(subjects, FitOptions(error_model="additive", blq="drop"))
    eta = rng.multivariate_normal([0.0, 0.0], result.omega, (replicates, len(subjects)))
    cl = np.exp(mu[None, :, 0] + eta[..., 0])
    v = np.exp(mu[None, :, 1] + eta[..., 1])
    c = model.concentration(batch.t[None], batch.start[None], batch.amount[None],
                            batch.duration[None], cl, v)                    # (R, S, N)
    sd = np.sqrt(sa**2 + sp**2 * c**2)
    c = c + sd * rng.standard_normal(c.shape)
    real = np.concatenate([np.arange(s.time.size) + i * batch.t.shape[1]
                           for i, s in enumerate(subjects)])
    return c.reshape(replicates, -1)[:, real]
