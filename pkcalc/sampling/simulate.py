"""Proof by simulation: replicates drawn from the stated model, levels simulated at a
design's times, re-estimated with pkcalc's own fit or population method.

Replicate ``r`` draws from its own stream ``numpy.random.default_rng([seed, r])``
(the same draws for every design: common random numbers), so results do not
depend on how replicates are grouped into tasks, on the engine or on the number
of workers.  Individual designs re-estimate the patient by maximum likelihood
(the error model known in form, its size estimated), MAP designs with the prior;
population designs re-estimate each simulated study by the iterative two-stage
method (default) or the marginal likelihood.
"""

from __future__ import annotations

import math
from functools import partial

import numpy as np

from .. import model
from ..core import FitOptions, PopulationOptions, Prior, SamplingProblem, SubjectData
from ..engines import Engine, map_ordered
from ..fit.result import Z95
from .optimise import Evaluator
from .result import DesignEvaluation, SimulationSummary

__all__ = ["REFIT_METHODS", "simulate_designs"]

REFIT_METHODS = ("iterative", "marginal")
#: Replicates per task: individual fits are batched, population studies are not.
BLOCK_INDIVIDUAL = 250
BLOCK_POPULATION = 5


def error_model(p: SamplingProblem) -> str:
    if p.additive > 0 and p.proportional > 0:
        return "combined"
    return "additive" if p.additive > 0 else "proportional"


def _levels(rng: np.random.Generator, times: np.ndarray, doses, cl: float, v: float,
            p: SamplingProblem) -> np.ndarray:
    start, amount, duration = doses
    f = model.concentration(times, start, amount, duration, cl, v)
    z = rng.standard_normal((2, times.size))
    return f * (1.0 + p.proportional * z[0]) + p.additive * z[1]


def _subject(name: str, times: np.ndarray, conc: np.ndarray, p: SamplingProblem
             ) -> SubjectData:
    from ..core import expand_events

    start, amount, duration = expand_events(p.doses)
    n = times.size
    return SubjectData(name, times, conc, np.full(n, np.nan), np.zeros(n, bool),
                       np.arange(1, n + 1), start, amount, duration,
                       initial_concentration=p.initial_concentration)


def _draw(rng: np.random.Generator, p: SamplingProblem, omega) -> tuple[float, float]:
    if omega is None:
        return p.clearance, p.volume
    eta = rng.multivariate_normal(np.zeros(2), omega, method="cholesky")
    return p.clearance * math.exp(eta[0]), p.volume * math.exp(eta[1])


def _block(block: tuple[int, int], p: SamplingProblem, schedules: list[list[float]],
           seed: int, refit: str) -> np.ndarray:
    """Replicates ``block[0] .. block[1]-1``: rows of (ok, true CL, true V, CL, V, CL low,
    CL high, V low, V high) -- NaN where not available."""
    ev = Evaluator(p)
    omega = ev.omega
    out = np.full((block[1] - block[0], 9), np.nan)
    out[:, 0] = 0.0
    if p.design != "population":
        times = np.array(schedules[0], float)
        subjects, truths = [], []
        for r in range(*block):
            rng = np.random.default_rng([seed, r])
            cl, v = _draw(rng, p, omega if p.design == "map" else None)
            truths.append((cl, v))
            subjects.append(_subject(f"r{r}", times, _levels(rng, times, ev.doses, cl, v, p),
                                     p))
        out[:, 1:3] = truths
        _fit_individuals(p, subjects, omega, out)
        return out
    for i, r in enumerate(range(*block)):
        rng = np.random.default_rng([seed, r])
        subjects = []
        for g, sched in zip(p.groups, schedules, strict=True):
            times = np.array(sched, float)
            for j in range(g.subjects):
                cl, v = _draw(rng, p, omega)
                subjects.append(_subject(f"{g.name}-{j}", times,
                                         _levels(rng, times, ev.doses, cl, v, p), p))
        out[i, 1:3] = (p.clearance, p.volume)
        _fit_population(p, subjects, refit, out[i])
    return out


def _fit_individuals(p: SamplingProblem, subjects, omega, out: np.ndarray) -> None:
    from ..fit import fit_subjects

    prior = None
    if p.design == "map":
        sd = np.sqrt(np.diag(omega))
        prior = Prior(p.clearance, p.volume, float(sd[0]), float(sd[1]),
                      float(omega[0, 1] / (sd[0] * sd[1])), p.additive, p.proportional)
    opts = FitOptions(error_model=None if prior else error_model(p), prior=prior,
                      weighting=None, starts=3, adequacy=False) if prior else \
        FitOptions(error_model=error_model(p), adequacy=False)
    results, _ = fit_subjects(subjects, opts)
    index = {s.subject: i for i, s in enumerate(subjects)}
    # without a prior the residual error is estimated too: intervals only when the
    # levels leave it degrees of freedom (else they are the fit's, not the design's)
    n_error = 2 if error_model(p) == "combined" else 1
    intervals = prior is not None or subjects[0].time.size > 2 + n_error
    for res in results:
        i = index[res.subject]
        cl, v = res.estimates.get("clearance"), res.estimates.get("volume")
        if cl is None or v is None or not (cl.value > 0 and v.value > 0):
            continue
        out[i, 0] = 1.0
        out[i, 3:5] = (cl.value, v.value)
        if intervals and cl.ci_low is not None and v.ci_low is not None:
            out[i, 5:9] = (cl.ci_low, cl.ci_high, v.ci_low, v.ci_high)


def _fit_population(p: SamplingProblem, subjects, refit: str, row: np.ndarray) -> None:
    try:
        if refit == "marginal":
            from ..population.estimate import marginal_estimate

            opts = PopulationOptions(error_model=error_model(p), adequacy=False,
                                     between_subject="full" if p.omega[0, 1] else "diagonal")
            res = marginal_estimate(subjects, opts, final_fits=False, covariance=True)
        else:
            from ..population import iterative_two_stage

            res = iterative_two_stage(subjects, error_model=error_model(p),
                                      final_fits=False)
    except (ValueError, ArithmeticError, np.linalg.LinAlgError):
        return
    cl, v = res.typical["clearance"], res.typical["volume"]
    if not (cl > 0 and v > 0 and math.isfinite(cl) and math.isfinite(v)):
        return
    row[0] = 1.0
    row[3:5] = (cl, v)
    se = res.typical_se or {}
    if se.get("clearance") and se.get("volume"):
        for j, (est, s) in enumerate(((cl, se["clearance"]), (v, se["volume"]))):
            half = Z95 * s / est          # the interval on the log scale
            row[5 + 2 * j: 7 + 2 * j] = (est * math.exp(-half), est * math.exp(half))


def summarise(rows: np.ndarray, method: str, seed: int) -> SimulationSummary:
    ok = rows[:, 0] == 1.0
    out = SimulationSummary(int(rows.shape[0]), int((~ok).sum()), method, seed)
    good = rows[ok]
    for j, name in enumerate(("clearance", "volume")):
        true, est = good[:, 1 + j], good[:, 3 + j]
        lo, hi = good[:, 5 + 2 * j], good[:, 6 + 2 * j]
        rel = (est - true) / true
        logerr = np.log(est) - np.log(true)
        has = ~np.isnan(lo)
        out.parameters[name] = {
            "true": float(np.mean(true)) if true.size else None,
            "mean": float(np.mean(est)) if est.size else None,
            "bias_percent": float(100 * np.mean(rel)) if rel.size else None,
            "rmse_percent": float(100 * np.sqrt(np.mean(rel**2))) if rel.size else None,
            "empirical_rse_percent": float(100 * np.std(logerr, ddof=1))
            if logerr.size > 1 else None,
            "coverage_percent": float(100 * np.mean((lo[has] <= true[has])
                                                    & (true[has] <= hi[has])))
            if has.any() else None,
            "intervals": int(has.sum()),
        }
    return out


def simulate_designs(p: SamplingProblem, ev: Evaluator, designs: list[DesignEvaluation],
                     n: int, seed: int, engine: Engine, refit: str | None, progress) -> None:
    """Simulate and re-estimate ``n`` replicates of every design (in place)."""
    refit = refit or "marginal"      # the default of `pkcalc population` too
    if refit not in REFIT_METHODS:
        raise ValueError(f"refit: '{refit}' is not one of {', '.join(REFIT_METHODS)}")
    size = BLOCK_INDIVIDUAL if p.design != "population" else BLOCK_POPULATION
    blocks = [(a, min(a + size, n)) for a in range(0, n, size)]
    method = {"individual": "maximum likelihood fit", "map": "MAP fit with the prior",
              "population": {"iterative": "iterative two-stage",
                             "marginal": "marginal likelihood (Laplace)"}[refit]}[p.design]
    for d in designs:
        def show(done, total, seconds, label=d.label):
            if progress is not None:
                left = seconds / done * (total - done)
                reps = min(done * size, n)
                progress(f"{label}: {reps:,} of {n:,} replicates ({n - reps:,} left, about "
                         f"{left:.0f} s)")
        task = partial(_block, p=p, schedules=d.times, seed=seed, refit=refit)
        rows = np.concatenate(map_ordered(task, blocks, engine, progress=show))
        d.simulation = summarise(rows, method, seed)
