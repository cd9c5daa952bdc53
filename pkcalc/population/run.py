"""One population job from options: the chosen method (with its fallback), a model
comparison or stepwise selection, and the bootstrap -- what ``population_study`` and
``pkcalc population`` run."""

from __future__ import annotations

from functools import partial

from ..core import FitOptions, PopulationModel, PopulationOptions, SubjectData
from ..engines import Engine
from .compare import compare_models, stepwise
from .estimate import individual_estimates, marginal_estimate, usable_subjects
from .result import PopulationResult
from .shards import WorkerPool, worker_pool
from .twostage import bootstrap, iterative_two_stage, two_stage

__all__ = ["model_trouble", "population_bootstrap", "population_estimate"]


def population_estimate(subjects: list[SubjectData], o: PopulationOptions, progress=None,
                        engine: Engine | None = None) -> PopulationResult:
    """The estimate of the chosen method (marginal falls back to the iterative two-stage
    method, with a warning, when it does not converge and no effect needs it).  With a
    Dask ``engine`` the marginal estimates hold the subjects on its workers
    (:mod:`pkcalc.population.shards`; the same estimate as in this process)."""
    if o.method == "marginal" and engine is not None and engine.kind == "dask":
        with worker_pool(engine) as pool:
            return _estimate(subjects, o, progress, pool)
    return _estimate(subjects, o, progress, None)


def _estimate(subjects: list[SubjectData], o: PopulationOptions, progress,
              pool: WorkerPool | None) -> PopulationResult:
    if o.method == "two_stage":
        return two_stage(subjects, FitOptions(error_model=o.error_model, blq=o.blq),
                         covariate=o.covariate, reference_weight=o.reference_weight)
    if o.method == "iterative":
        return iterative_two_stage(subjects, error_model=o.error_model,
                                   covariate=o.covariate, reference_weight=o.reference_weight,
                                   blq=o.blq)
    if o.models or o.stepwise:
        comparison = (stepwise(subjects, o, o.stepwise, progress=progress, pool=pool)
                      if o.stepwise
                      else compare_models(subjects, o, o.models, progress=progress, pool=pool))
        best = comparison.best()
        if best is None:
            raise ValueError("no model of the comparison could be estimated: " + "; ".join(
                f"{r.name}: {r.error}" for r in comparison.rows if r.error))
        result = best.result
        individual_estimates(result, usable_subjects(subjects, o)[0], o)
        result.comparison = comparison
        result.notes.insert(0, f"reported model: '{best.name}' ("
                            + ("selected stepwise" if o.stepwise else "lowest AIC") + ")")
        result.failures += [(f"model '{r.name}'", r.error) for r in comparison.failed]
        result.failures += [(f"model '{r.name}'", model_trouble(r.result))
                            for r in comparison.rows
                            if r.result is not None and model_trouble(r.result)]
        return result
    result = marginal_estimate(subjects, o, progress=progress, pool=pool)
    if not result.converged and not o.effects:
        fallback = iterative_two_stage(subjects, error_model=o.error_model,
                                       covariate=o.covariate,
                                       reference_weight=o.reference_weight, blq=o.blq)
        fallback.warnings.append("the marginal-likelihood estimate did not converge ("
                                 + "; ".join(result.warnings) + "): the iterative two-stage "
                                 "estimate is reported instead")
        return fallback
    return result


def model_trouble(result) -> str:
    """Why a compared model's numbers are not to be trusted ('' when they are)."""
    if not result.converged:
        return "did not converge: " + "; ".join(result.warnings)
    if result.parameters and all(p["se"] is None for p in result.parameters):
        return "no standard errors: " + "; ".join(result.warnings)
    return ""


def population_bootstrap(subjects: list[SubjectData], o: PopulationOptions,
                         result: PopulationResult, progress=None,
                         engine: Engine | None = None) -> None:
    """Bootstrap over subjects: SEs and percentile intervals of the typical values."""
    estimate = None
    if result.method == "two_stage":       # each replicate by the same method
        estimate = partial(two_stage, options=FitOptions(error_model=o.error_model, blq=o.blq),
                           covariate=o.covariate, reference_weight=o.reference_weight)
    elif result.method == "marginal":
        model = PopulationModel(result.model_name, tuple(result.model_effects))
        # a partial of a module-level function: worker processes can run it
        estimate = partial(marginal_estimate, options=o, pmodel=model, start=result,
                           final_fits=False, covariance=False)
    result.bootstrap.update(bootstrap(
        subjects, result, o.bootstrap, o.seed, progress=progress, estimate=estimate,
        engine=engine, error_model=o.error_model, covariate=o.covariate,
        reference_weight=o.reference_weight, blq=o.blq))
    for k in ("clearance", "volume"):
        b = result.bootstrap.get(k)
        if isinstance(b, dict):
            result.typical_se[k] = b["se"]
            result.typical_ci[k] = (b["ci_low"], b["ci_high"])
    result.notes.append(f"standard errors and 95 % intervals of the typical values from "
                        f"{o.bootstrap} bootstrap replicates over subjects (seed {o.seed})")
