"""One population model by maximum marginal likelihood: starts, the optimum, the
covariance step in natural units, and the individual estimates from it."""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from ..core import Effect, FitOptions, PopulationModel, PopulationOptions, SubjectData
from ..fit import fit_subjects
from ..fit.data import predictions_by_subject, prepare_batch
from ..fit.result import Z95
from .covariates import Design, build_design, weight_effects
from .marginal import MarginalFit, MarginalProblem
from .result import PopulationResult
from .shards import ShardedProblem, WorkerPool
from .twostage import _as_prior, _cv, iterative_two_stage, two_stage, usable_fits

__all__ = ["individual_estimates", "marginal_estimate", "model_effects", "usable_subjects"]

#: Starts whose optima differ by less than this (-2 ln L) agree.
AGREE = 0.01
#: Iterative two-stage steps for the first start: a start, not an answer -- the marginal
#: optimiser takes it from there (run to convergence, the two-stage iterations took
#: about a quarter of the whole estimate's time and the optimum was the same).
START_STEPS = 5


def model_effects(options: PopulationOptions, extra: tuple[Effect, ...] = ()
                  ) -> tuple[Effect, ...]:
    """The effects of the model: the body-weight model of ``covariate``, then the declared
    effects (a declared effect of the same column and parameter replaces it)."""
    declared = tuple(options.effects) + tuple(extra)
    keys = {(e.column, e.parameter) for e in declared}
    weight = tuple(e for e in weight_effects(options.covariate, options.reference_weight)
                   if (e.column, e.parameter) not in keys)
    return weight + declared


def usable_subjects(subjects: list[SubjectData], options: PopulationOptions):
    """Subjects with at least one measurable level; the others as failures."""
    batch, _, _ = prepare_batch(subjects, FitOptions(error_model=options.error_model,
                                                     blq=options.blq))
    has = (batch.obs & (batch.y > 0)).any(axis=1)
    return ([s for s, h in zip(subjects, has, strict=True) if h],
            [(s.subject, "no measurable level") for s, h in zip(subjects, has, strict=True)
             if not h])


def marginal_estimate(subjects: list[SubjectData], options: PopulationOptions,
                      pmodel: PopulationModel | None = None, *,
                      progress: Callable[[str], None] | None = None,
                      start: PopulationResult | None = None,
                      final_fits: bool = True, covariance: bool = True,
                      pool: WorkerPool | None = None) -> PopulationResult:
    """Marginal-likelihood estimate of one model.

    Parameters
    ----------
    subjects : list of SubjectData
    options : PopulationOptions
        Error model, BLQ handling, nodes, diagonal or full variability.
    pmodel : PopulationModel, optional
        The covariate effects (default: those of ``options``).
    progress : callable, optional
        Receives a line per iteration.
    start : PopulationResult, optional
        A previous estimate to start from (model comparison, bootstrap).
    final_fits : bool
        Individual estimates (conditional modes with their SEs) under the result.
    covariance : bool
        Standard errors from the observed information; off for bootstrap replicates.
    pool : WorkerPool, optional
        Dask workers that hold the subjects (:mod:`pkcalc.population.shards`); the
        estimate does not depend on it.

    Raises
    ------
    ValueError
        Too few subjects, or a covariate model that cannot be estimated
        (:class:`pkcalc.population.covariates.CovariateError`).
    """
    effects = pmodel.effects if pmodel is not None else model_effects(options)
    name = pmodel.name if pmodel is not None else "model"
    subjects, failures = usable_subjects(subjects, options)
    if len(subjects) < 3:
        raise ValueError("the population step needs at least three subjects with levels")
    design = build_design(subjects, effects)
    settings = {"error_model": options.error_model, "blq": options.blq,
                "nodes": options.nodes, "diagonal": options.between_subject == "diagonal"}
    problem = MarginalProblem(subjects, design, **settings) if pool is None else \
        ShardedProblem(subjects, design, pool=pool, **settings)
    starts = _starts(problem, subjects, options, start)
    best: MarginalFit | None = None
    ends = []
    for k, psi0 in enumerate(starts):
        say = None if progress is None else (
            lambda text, k=k: progress(f"{name}, start {k + 1} of {len(starts)}: {text}"))
        ref = None if best is None else (best.psi, best.objective)
        fit = problem.fit(psi0, progress=say, covariance=False, reference=ref)
        ends.append(fit.objective)
        if best is None or fit.objective < best.objective:
            best = fit
    assert best is not None
    problem.theta = best.theta
    if covariance:
        cov, corr, cond, warn = problem._covariance(best.psi)
        best.covariance, best.correlation, best.condition_number = cov, corr, cond
        best.warnings += warn
    result = _assemble(problem, best, options, name, failures)
    agreed = sum(abs(e - best.objective) <= AGREE for e in ends)
    result.notes.append(f"{agreed} of {len(ends)} starts reached the best -2 ln L "
                        f"({', '.join(f'{e:.4f}' for e in ends)})")
    if final_fits:
        individual_estimates(result, subjects, options)
    return result


def _starts(problem: MarginalProblem, subjects, options: PopulationOptions,
            start: PopulationResult | None) -> list[np.ndarray]:
    """A few iterative two-stage steps (:data:`START_STEPS`), and the standard two-stage
    answer when the data allow one (otherwise the first start with doubled
    variances); each carries the model's covariate effects regressed from its subjects'
    estimates (:func:`_regressed`)."""
    if start is not None:
        return [_from_result(problem, start)]
    out = []
    it = iterative_two_stage(subjects, error_model=options.error_model, blq=options.blq,
                             final_fits=False, max_iterations=START_STEPS)
    out.append(_from_result(problem, it))
    try:
        ts = two_stage(subjects, FitOptions(error_model=options.error_model, blq=options.blq))
        ts.residual_error = dict(it.residual_error)
        out.append(_from_result(problem, ts))
    except (ValueError, np.linalg.LinAlgError):
        it.omega = it.omega * 2.0
        out.append(_from_result(problem, it))
    return out


def _from_result(problem: MarginalProblem, r: PopulationResult) -> np.ndarray:
    """A start from an earlier estimate: its own parameters when it is the same model,
    otherwise its typical values, variability and residual error, with this model's
    covariate effects regressed from its subjects' estimates (:func:`_regressed`)."""
    if r.psi is not None and r.parameter_names == problem.names():
        return np.array(r.psi, float)
    beta = problem.design.start(np.log([r.typical["clearance"], r.typical["volume"]]))
    means, eta = _subject_estimates(r)
    return _pack_result(problem, r, *_regressed(problem, means, eta, r.omega, beta))


def _subject_estimates(r: PopulationResult):
    """An earlier estimate's subject means and each subject's deviation from them (ln CL,
    ln V): its conditional modes, or -- a standard two-stage estimate -- the converged
    individual estimates about the typical values.  ``({}, None)`` when it has neither."""
    if r.eta is not None and len(r.subject_means) == len(r.eta):
        return r.subject_means, np.asarray(r.eta, float)
    fits = usable_fits(r.subjects)
    if not fits:
        return {}, None
    typical = (math.log(r.typical["clearance"]), math.log(r.typical["volume"]))
    eta = np.log([[f.clearance, f.volume] for f in fits]) - np.array(typical)
    return {f.subject: typical for f in fits}, eta


def _regressed(problem: MarginalProblem, means: dict[str, tuple[float, float]],
               eta: np.ndarray | None, omega0: np.ndarray, beta0: np.ndarray):
    """Fixed effects and variability of this model from an earlier estimate (of another
    model, or a two-stage one): least squares of that estimate's subject estimates
    (``means`` plus ``eta``, in the order of ``means``) on this model's mean function,
    linearised at ``beta0`` (exact for effects linear in their parameter); ``Omega``
    (``omega0`` before) loses the spread the new means explain (``Omega + cov(eta_new) -
    cov(eta)``, where that stays positive definite).  Subjects the earlier estimate has
    no estimate for are left out of the regression.  ``(beta0, None)`` when fewer than
    ``k + 2`` subjects have one or the regression gives a mean that cannot be used."""
    design = problem.design
    k = design.n_beta
    if eta is None:
        return beta0, None
    index = {s: i for i, s in enumerate(means)}
    where = [(j, index[s.subject]) for j, s in enumerate(problem.subjects)
             if s.subject in index]
    if len(where) < k + 2:
        return beta0, None
    rows = np.array([j for j, _ in where])
    eta = eta[[i for _, i in where]]
    modes = np.array([means[problem.subjects[j].subject] for j in rows]) + eta
    h = 1e-4
    mu = design.means_many(np.vstack([beta0, beta0 + h * np.eye(k)]))[rows]  # (n, k + 1, 2)
    if not np.all(np.isfinite(mu)) or not np.all(np.isfinite(modes)):
        return beta0, None
    jac = np.swapaxes((mu[:, 1:] - mu[:, :1]) / h, 1, 2).reshape(-1, k)    # (2n, k)
    step = np.linalg.lstsq(jac, (modes - mu[:, 0]).reshape(-1), rcond=None)[0]
    beta = beta0 + step
    new_mu = design.means(beta)[rows]
    if not np.all(np.isfinite(new_mu)):
        return beta0, None
    omega = np.array(omega0, float) + np.cov((modes - new_mu).T) - np.cov(eta.T)
    return beta, (omega if np.linalg.eigvalsh(omega).min() > 1e-6 else None)


def _pack_result(problem: MarginalProblem, r: PopulationResult, beta,
                 omega: np.ndarray | None = None) -> np.ndarray:
    omega = np.array(r.omega if omega is None else omega, float)
    omega = omega + np.eye(2) * 1e-4 if np.linalg.eigvalsh(omega).min() <= 1e-6 else omega
    sa = r.residual_error.get("additive") or 0.0
    sp = r.residual_error.get("proportional") or 0.0
    ymed = float(np.median(problem.batch.y[problem.batch.obs]))
    sa = max(sa, 0.05 * ymed) if problem.error in ("additive", "combined") else sa
    sp = max(sp, 0.05) if problem.error in ("proportional", "combined") else sp
    return problem.pack(beta, omega, sa, sp)


# --------------------------------------------------------------------------- natural units
def _natural(problem: MarginalProblem, psi: np.ndarray) -> list[tuple[str, float, str | None,
                                                                      bool]]:
    """(name, value, unit kind, positive) of every reported parameter."""
    beta, omega, sa, sp = problem.unpack(psi)
    rows = [("typical clearance", math.exp(beta[0]), "clearance", True),
            ("typical volume", math.exp(beta[1]), "volume", True)]
    for d in problem.design.describe(beta):
        label = d["name"].replace(": ln factor", ": factor")
        rows.append((label, d["value"], None, d["kind"] == "factor"))
    rows += [("between-subject variance of ln clearance", omega[0, 0], None, True),
             ("between-subject variance of ln volume", omega[1, 1], None, True),
             ("between-subject CV of clearance %", _cv(omega[0, 0]), None, True),
             ("between-subject CV of volume %", _cv(omega[1, 1]), None, True)]
    if not problem.diagonal:
        rows.append(("correlation of ln clearance and ln volume",
                     omega[0, 1] / math.sqrt(omega[0, 0] * omega[1, 1]), None, False))
    if problem.error in ("additive", "combined"):
        rows.append(("additive residual SD", sa, "concentration", True))
    if problem.error in ("proportional", "combined"):
        rows.append(("proportional residual SD", sp, None, True))
    return rows


def _parameter_rows(problem: MarginalProblem, fit: MarginalFit
                    ) -> tuple[list[dict], np.ndarray | None]:
    """Every parameter with its delta-method SE and 95 % interval (log scale for the
    positive ones), and the delta-method covariance of them all (NaN where a parameter
    rests on its floor)."""
    base = _natural(problem, fit.psi)
    values = np.array([r[1] for r in base])
    jac = np.empty((values.size, fit.psi.size))
    for j in range(fit.psi.size):
        step = np.zeros(fit.psi.size)
        step[j] = 1e-6
        up = np.array([r[1] for r in _natural(problem, fit.psi + step)])
        dn = np.array([r[1] for r in _natural(problem, fit.psi - step)])
        jac[:, j] = (up - dn) / 2e-6
    full = None if fit.covariance is None else jac @ fit.covariance @ jac.T
    var = None if full is None else np.diagonal(full)
    # a parameter at its floor has no meaningful SE (nor has anything derived from it)
    floor = fit.psi <= problem.lower_bounds() + 1e-6
    on_floor = (np.abs(jac[:, floor]) > 0).any(axis=1) if floor.any() else \
        np.zeros(len(base), bool)
    rows = []
    for i, (name, value, kind, positive) in enumerate(base):
        se = None if var is None or not var[i] >= 0 or on_floor[i] else math.sqrt(var[i])
        row = {"name": name, "value": value, "kind": kind, "se": se, "rse_percent": None,
               "ci_low": None, "ci_high": None, "at_lower_bound": bool(on_floor[i]),
               "positive": positive}
        if se is not None:
            if positive and value > 0:
                sl = se / value
                row.update(rse_percent=100 * sl, ci_low=value * math.exp(-Z95 * sl),
                           ci_high=value * math.exp(Z95 * sl))
            else:
                row.update(rse_percent=100 * se / abs(value) if value else None,
                           ci_low=value - Z95 * se, ci_high=value + Z95 * se)
                if name.startswith("correlation"):
                    row.update(ci_low=max(row["ci_low"], -1.0), ci_high=min(row["ci_high"], 1.0))
        rows.append(row)
    if full is not None:
        full = 0.5 * (full + full.T)
        full[on_floor, :] = np.nan
        full[:, on_floor] = np.nan
    return rows, full


def _assemble(problem: MarginalProblem, fit: MarginalFit, options: PopulationOptions,
              name: str, failures) -> PopulationResult:
    beta, omega, sa, sp = problem.unpack(fit.psi)
    rows, full = _parameter_rows(problem, fit)
    by = {r["name"]: r for r in rows}
    typical = {"clearance": math.exp(beta[0]), "volume": math.exp(beta[1])}
    mu = problem.design.means(beta)
    eta = fit.theta - mu
    n_p = problem.n_params
    result = PopulationResult(
        method="marginal", typical=typical,
        variability_cv_percent={"clearance": _cv(omega[0, 0]), "volume": _cv(omega[1, 1])},
        omega=omega, residual_error={k: v for k, v in (("additive", sa), ("proportional", sp))
                                     if v > 0},
        subjects=[], failures=list(failures), covariate=options.covariate,
        reference_weight=_weight_reference(problem.design),
        typical_se={k: by[f"typical {k}"]["se"] for k in typical},
        typical_ci={k: (None if by[f"typical {k}"]["se"] is None else
                        (by[f"typical {k}"]["ci_low"], by[f"typical {k}"]["ci_high"]))
                    for k in typical},
        correlation=None if problem.diagonal else float(
            omega[0, 1] / math.sqrt(omega[0, 0] * omega[1, 1])),
        iterations=fit.iterations, converged=fit.converged, model_name=name,
        objective_per_iteration=list(fit.history),
        parameters=rows, objective=fit.objective, n_parameters=n_p,
        n_levels=problem.n_levels, aic=fit.objective + 2 * n_p,
        bic=fit.objective + n_p * math.log(max(problem.n_levels, 1)),
        parameter_names=problem.names(), parameter_correlation=fit.correlation,
        condition_number=fit.condition_number, nodes=options.nodes,
        between_subject=options.between_subject, seconds=fit.seconds)
    result.effects = _effect_rows(problem.design, rows)
    result.exponents, result.exponent_ci = _weight_exponents(problem.design, rows)
    result.eta = eta
    result.shrinkage_percent = {
        k: 100 * (1 - float(np.std(eta[:, j])) / math.sqrt(omega[j, j]))
        for j, k in enumerate(("clearance", "volume"))}
    result.subject_means = {s.subject: (float(mu[i, 0]), float(mu[i, 1]))
                            for i, s in enumerate(problem.subjects)}
    result.population_predictions = predictions_by_subject(problem.batch, problem.subjects,
                                                           mu[:, 0], mu[:, 1])
    how = "Laplace approximation" if options.nodes == 1 else (
        f"adaptive Gauss-Hermite quadrature, {options.nodes} nodes per dimension")
    result.notes.append(f"maximum marginal likelihood ({how}); {fit.message} after "
                        f"{fit.iterations} iterations, {fit.evaluations} likelihood "
                        f"evaluations, {fit.seconds:.1f} s")
    result.notes.append("standard errors and 95 % intervals from the observed information "
                        "(the inverse of the curvature of -2 ln L at the estimates); intervals "
                        "of positive quantities on the log scale")
    result.notes.append("BIC uses the number of levels; shrinkage = 1 - SD(ln deviations "
                        "from typical) / between-subject SD (Savic & Karlsson 2009)")
    result.warnings += fit.warnings
    if not fit.converged:
        result.warnings.append(f"the marginal-likelihood estimate did not converge: "
                               f"{fit.message}")
    result.psi = fit.psi.copy()
    result.psi_covariance = None if fit.covariance is None else np.array(fit.covariance)
    result.parameter_covariance = full
    result.model_effects = list(problem.design.effects)
    result.design = problem.design.without_data()
    return result


def _effect_rows(design: Design, rows: list[dict]) -> list[dict]:
    by = {r["name"]: r for r in rows}
    out = []
    for d in design.describe(np.zeros(design.n_beta)):
        r = by[d["name"].replace(": ln factor", ": factor")]
        row = {**d, "value": r["value"], "se": r["se"], "ci_low": r["ci_low"],
               "ci_high": r["ci_high"], "name": r["name"]}
        if d["kind"] == "factor":
            row["log_value"] = math.log(r["value"])
        out.append(row)
    for e in design.effects:
        if e.fixed is not None:
            out.append({"name": f"{e.column} on {e.parameter}: exponent (fixed)",
                        "effect": e.label, "kind": "exponent", "reference": e.reference,
                        "value": e.fixed, "se": None, "ci_low": None, "ci_high": None})
    return out


def _weight_reference(design: Design) -> float | None:
    refs = [e.reference for e in design.effects if e.column == "weight" and e.form == "power"]
    return float(refs[0]) if refs else None


def _weight_exponents(design: Design, rows: list[dict]):
    """The body-weight exponents (fixed or estimated) in the two-stage methods' form."""
    by = {r["name"]: r for r in rows}
    exps, ci = {}, {}
    for e in design.effects:
        if e.column != "weight" or e.form != "power":
            continue
        if e.fixed is not None:
            exps[e.parameter] = e.fixed
        else:
            r = by[f"weight on {e.parameter}: exponent"]
            exps[e.parameter] = r["value"]
            if r["se"] is not None:
                ci[e.parameter] = (r["ci_low"], r["ci_high"])
    return exps, (ci or None)


def individual_estimates(result: PopulationResult, subjects: list[SubjectData],
                         options: PopulationOptions) -> None:
    """Conditional modes with their SEs: MAP under the final model."""
    sa = result.residual_error.get("additive", 0.0)
    sp = result.residual_error.get("proportional", 0.0)
    prior = _as_prior(result.omega, sa, sp)
    fits, fail = fit_subjects(subjects, FitOptions(error_model=options.error_model,
                                                    blq=options.blq, prior=prior),
                              prior_means=result.subject_means)
    result.subjects = fits
    result.failures += fail
