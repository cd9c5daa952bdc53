"""``design_sampling``: the optimum, the user's schedules, and their proof by simulation."""

from __future__ import annotations

import time
from collections.abc import Callable

import numpy as np

from ..core import SamplingProblem, expand_events
from ..engines import Engine
from ..errors import PkcalcInputError, check_type
from .constraints import AllowedSet, allowed_set
from .information import log_det, population_parameters, rse_percent
from .optimise import Evaluator, optimise
from .result import DesignEvaluation, SamplingResult, efficiency

__all__ = ["design_sampling", "problem_allowed_set"]

#: Most simulated replicates, and replicates x subjects, of one run (memory and time).
MAX_REPLICATES = 100_000
MAX_SIMULATED_SUBJECTS = 20_000_000


def problem_allowed_set(p: SamplingProblem) -> AllowedSet:
    """The allowed sampling periods of a problem (window, infusions, hours of day)."""
    start, _, duration = expand_events(p.doses)
    infusions = [(s, s + d) for s, d in zip(start, duration, strict=True) if d > 0] \
        if p.avoid_infusion else []
    if p.excluded:      # hours of the day counted in a time zone, by the boundary
        return allowed_set(p.window, infusions=[*infusions, *p.excluded])
    return allowed_set(p.window, infusions=infusions, daytime=p.daytime,
                       clock_hour=p.clock_hour)


def _check_room(p: SamplingProblem, allowed: AllowedSet, cands: np.ndarray | None) -> None:
    need = max(g.levels for g in p.groups)
    where = f"scenario '{p.name}'"
    if not allowed:
        raise PkcalcInputError("the constraints leave no time to draw a level", item=where,
                               field="sampling.window", expected="a wider window or fewer "
                                                                 "constraints")
    if cands is not None:
        if cands.size < need:
            raise PkcalcInputError(
                f"the constraints leave {cands.size} candidate time(s) for {need} levels",
                item=where, field="sampling.candidates",
                expected="more candidate times inside the allowed periods "
                         f"({allowed.describe()})")
        return
    room = allowed.capacity(p.min_spacing)
    if room < need:
        raise PkcalcInputError(
            f"the allowed periods ({allowed.describe()}) hold only {room} level(s) "
            f"{p.min_spacing:g} h apart, fewer than the {need} asked", item=where,
            field="sampling.min_spacing", expected="fewer levels, a smaller spacing or a "
                                                   "wider window")


def _evaluate(ev: Evaluator, label: str, schedules: list[np.ndarray], names: list[str],
              values: np.ndarray) -> DesignEvaluation:
    m = ev.information(schedules)
    rse = rse_percent(m)
    out: dict[str, float | None] = {}
    for i, name in enumerate(names):
        if rse is None:
            out[name] = None
        elif i < 2:
            out[name] = float(rse[i])          # SE of the log = RSE
        else:
            out[name] = float(rse[i] / values[i])  # SE of a variance relative to it
    # times to 1e-9 h (3.6 us): the optimiser's rounding noise is not shown
    return DesignEvaluation(label, [[round(float(t), 9) for t in s] for s in schedules], out,
                            log_det(m))


def design_sampling(problem: SamplingProblem, *, simulate: int = 0, seed: int = 1,
                    engine: Engine | None = None, refit: str | None = None,
                    progress: Callable[[str], None] | None = None) -> SamplingResult:
    """The best sampling times of a scenario and the expected precision of CL and V.

    Parameters
    ----------
    problem : SamplingProblem
    simulate : int
        Replicates to simulate and re-estimate per design (0: none).
    seed : int
        Seed of the simulations (each replicate has its own stream from it, so the
        numbers do not depend on the engine or the number of workers).
    engine : Engine, optional
        Where the replicates run (:mod:`pkcalc.engines`).
    refit : {"iterative", "marginal"}, optional
        Population re-estimates: the marginal likelihood (Laplace; default, as in
        ``pkcalc population``) or the iterative two-stage method (faster).
    progress : callable, optional
        Receives a line per finished block of replicates.

    Returns
    -------
    SamplingResult

    Raises
    ------
    PkcalcInputError
        Constraints that leave too little room, a design that cannot estimate the
        parameters, too many replicates.
    """
    check_type(problem, SamplingProblem, "problem",
               "a pkcalc.core.SamplingProblem (or use pkcalc.sampling_file for a file)")
    t0 = time.perf_counter()
    p = problem
    where = f"scenario '{p.name}'"
    if not 0 <= simulate <= MAX_REPLICATES:
        raise PkcalcInputError(f"must be from 0 to {MAX_REPLICATES:,} replicates",
                               field="--simulate")
    subjects = sum(g.subjects for g in p.groups)
    if simulate * subjects > MAX_SIMULATED_SUBJECTS:
        raise PkcalcInputError(
            f"{simulate:,} replicates x {subjects:,} subjects is more than the "
            f"{MAX_SIMULATED_SUBJECTS:,} simulated subjects of one run", field="--simulate",
            expected=f"at most {MAX_SIMULATED_SUBJECTS // subjects:,} replicates")
    allowed = problem_allowed_set(p)
    cands = None
    if p.candidates is not None:
        c = np.array(sorted(set(p.candidates)), float)
        cands = c[allowed.contains(c)]
    _check_room(p, allowed, cands)
    ev = Evaluator(p)
    best = optimise(ev, allowed, cands)
    if best is None:
        raise PkcalcInputError(
            "no schedule within the constraints can estimate every parameter (the "
            "information is singular)", item=where, field="sampling.levels",
            expected="more levels per subject" + (" (a population design needs levels "
                                                  "enough to tell variability from "
                                                  "residual error)"
                                                  if p.design == "population" else ""))
    if p.design == "population":
        names = population_parameters(ev.omega, p.additive, p.proportional)
        om = ev.omega
        values = np.array([1.0, 1.0, om[0, 0], om[1, 1]] + ([om[0, 1]] if om[0, 1] else [])
                          + ([p.additive**2] if p.additive > 0 else [])
                          + ([p.proportional**2] if p.proportional > 0 else []))
    else:
        names, values = ["clearance", "volume"], np.ones(2)
    designs = [_evaluate(ev, "optimal", best, names, values)]
    # the schedules to compare: named after the key that gave them (compare, groups.times)
    given = [("compare" if len(p.compare) == 1 else f"compare {i + 1}", [np.array(t, float)])
             for i, t in enumerate(p.compare)]
    if any(g.times is not None for g in p.groups):
        if not all(g.times is not None for g in p.groups):
            raise PkcalcInputError("give every group's times, or none", item=where,
                                   field="sampling.groups")
        given.append(("group times", [np.array(g.times, float) for g in p.groups]))
    notes, warnings = [], []
    for label, sched in given:
        d = _evaluate(ev, label, sched, names, values)
        d.efficiency = efficiency(d.log_det, designs[0].log_det, len(names))
        bad = [float(t) for s in sched for t in s if not allowed.contains(t)[0]]
        if bad:
            warnings.append(f"{d.label}: {len(bad)} time(s) outside the allowed periods "
                            f"(first {bad[0]:g} h)")
        designs.append(d)
    designs[0].efficiency = 1.0
    if simulate:
        from .simulate import simulate_designs

        simulate_designs(p, ev, designs, simulate, seed, engine or Engine(), refit, progress)
    notes.append("expected RSE: 100 x the SE of ln CL and ln V from the inverse of the "
                 + {"individual": "Fisher information of the patient's levels",
                    "map": "posterior information (levels plus the prior)",
                    "population": "first-order population information (block-diagonal), "
                                  "summed over the subjects"}[p.design])
    return SamplingResult(p, designs, list(allowed.pieces), names,
                          time.perf_counter() - t0, notes, warnings)
