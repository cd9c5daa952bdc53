"""The search for the best sampling times under the constraints.

- Free times: scipy's SLSQP on the allowed-set coordinate (every proposal lies
  in the allowed set), the minimum spacing as inequality constraints on the
  mapped times, from several starts (evenly spread, then seeded random ones);
  the best schedule that meets every constraint wins.
- Candidate times: every combination when there are few (one group), else an
  exchange search (swap one chosen time for an unchosen candidate while the
  criterion improves) from several seeded starts.

The criterion is D (maximise ``ln det M`` over every estimated parameter) or A
(minimise the sum of the squared expected relative SEs of CL and V).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
from scipy.optimize import minimize

from ..core import SamplingProblem
from .constraints import AllowedSet, spacing_ok
from .information import (
    course,
    individual_information,
    log_det,
    population_information,
)

__all__ = ["Evaluator", "optimise"]

#: Candidate combinations searched exhaustively (more: the exchange search).
EXHAUSTIVE = 5000
_BAD = 1e30


class Evaluator:
    """Information of schedules for one problem (the dose history prepared once)."""

    def __init__(self, p: SamplingProblem) -> None:
        from ..core import expand_events
        from ..model import INITIAL_LEVEL

        start, amount, duration = expand_events(p.doses)
        if p.initial_concentration > 0:
            start = np.append(start, 0.0)
            amount = np.append(amount, p.initial_concentration)
            duration = np.append(duration, INITIAL_LEVEL)
        self.p = p
        self.doses = (start, amount, duration)
        self.omega = None if p.omega is None else np.asarray(p.omega, float)

    def subject_information(self, times: np.ndarray) -> np.ndarray:
        p = self.p
        c = course(times, self.doses, p.clearance, p.volume, p.additive, p.proportional)
        if p.design == "population":
            return population_information(c, self.omega, p.additive, p.proportional)
        return individual_information(c, self.omega if p.design == "map" else None)

    def information(self, schedules: list[np.ndarray]) -> np.ndarray:
        """The whole design's information (subjects x each group's information)."""
        total = None
        for g, times in zip(self.p.groups, schedules, strict=True):
            m = g.subjects * self.subject_information(times)
            total = m if total is None else total + m
        return total

    def loss(self, schedules: list[np.ndarray]) -> float:
        """The criterion to minimise (large when the information is singular)."""
        m = self.information(schedules)
        ld = log_det(m)
        if not math.isfinite(ld):
            return _BAD
        if self.p.criterion == "D":
            return -ld
        cov = np.linalg.inv(m)
        return float(cov[0, 0] + cov[1, 1])


def _split(x: np.ndarray, sizes: list[int]) -> list[np.ndarray]:
    return np.split(x, np.cumsum(sizes)[:-1])


def _feasible(schedules, allowed: AllowedSet, spacing: float) -> bool:
    return all(bool(np.all(allowed.contains(t))) and spacing_ok(t, spacing)
               for t in schedules)


def _continuous(ev: Evaluator, allowed: AllowedSet, rng: np.random.Generator
                ) -> list[np.ndarray] | None:
    p = ev.p
    sizes = [g.levels for g in p.groups]
    L, s = allowed.length, p.min_spacing

    def schedules(x):
        return [allowed.to_time(u) for u in _split(x, sizes)]

    def fun(x):
        return ev.loss(schedules(x))

    cons = []
    offset = 0
    for n in sizes:
        for j in range(n - 1):
            a, b = offset + j, offset + j + 1
            cons.append({"type": "ineq", "fun": lambda x, a=a, b=b:
                         allowed.to_time(x[b]) - allowed.to_time(x[a]) - s})
            if s == 0:
                cons.append({"type": "ineq", "fun": lambda x, a=a, b=b: x[b] - x[a]})
        offset += n
    starts = []
    for k in range(p.starts):
        parts = []
        for n in sizes:
            if k == 0:
                parts.append(np.linspace(0.0, L, n + 2)[1:-1] if n > 1 else np.array([L / 2]))
            elif k == 1:
                parts.append(np.linspace(0.0, L, n))
            else:
                parts.append(np.sort(rng.uniform(0.0, L, n)))
        starts.append(np.concatenate(parts))
    best, best_loss = None, math.inf
    for x0 in starts:
        res = minimize(fun, x0, method="SLSQP", bounds=[(0.0, L)] * len(x0),
                       constraints=cons, options={"maxiter": 200, "ftol": 1e-10})
        cand = [np.sort(t) for t in schedules(res.x)]
        cand = [_repair(t, allowed, s) for t in cand]
        if any(t is None for t in cand) or not _feasible(cand, allowed, s):
            continue
        loss = ev.loss(cand)
        if loss < best_loss:
            best, best_loss = cand, loss
    return best if best_loss < _BAD else None


def _repair(t: np.ndarray, allowed: AllowedSet, spacing: float) -> np.ndarray | None:
    """Push times forward by at most the optimiser's tolerance so the spacing holds
    exactly and each time stays in the allowed set (None when that fails)."""
    out = t.copy()
    for j in range(1, out.size):
        need = out[j - 1] + spacing
        if out[j] < need:
            if need - out[j] > 1e-4:
                return None
            out[j] = need
            if not allowed.contains(out[j])[0]:
                return None
    return out


def _discrete(ev: Evaluator, cands: np.ndarray, rng: np.random.Generator
              ) -> list[np.ndarray] | None:
    p = ev.p
    sizes = [g.levels for g in p.groups]
    s = p.min_spacing
    m = cands.size
    if len(sizes) == 1 and math.comb(m, sizes[0]) <= EXHAUSTIVE:
        best, best_loss = None, math.inf
        for idx in itertools.combinations(range(m), sizes[0]):
            t = cands[list(idx)]
            if not spacing_ok(t, s):
                continue
            loss = ev.loss([t])
            if loss < best_loss:
                best, best_loss = [t], loss
        return best if best_loss < _BAD else None
    best, best_loss = None, math.inf
    for k in range(p.starts):
        chosen = []
        for n in sizes:
            pick = _random_subset(cands, n, s, rng, spread=k == 0)
            if pick is None:
                return None
            chosen.append(pick)
        loss = ev.loss([cands[c] for c in chosen])
        for _ in range(50):
            improved = False
            for g, n in enumerate(sizes):
                for j in range(n):
                    for c in range(m):
                        if c in chosen[g]:
                            continue
                        trial = chosen[g].copy()
                        trial[j] = c
                        t = cands[np.sort(trial)]
                        if not spacing_ok(t, s):
                            continue
                        sched = [cands[np.sort(x)] for x in chosen]
                        sched[g] = t
                        new = ev.loss(sched)
                        if new < loss - 1e-12:
                            chosen[g], loss, improved = trial, new, True
            if not improved:
                break
        if loss < best_loss:
            best, best_loss = [cands[np.sort(c)] for c in chosen], loss
    return best if best_loss < _BAD else None


def _random_subset(cands: np.ndarray, n: int, spacing: float, rng: np.random.Generator,
                   spread: bool) -> np.ndarray | None:
    """Indices of n candidates that keep the spacing (evenly spread or random)."""
    order = np.linspace(0, cands.size - 1, cands.size).astype(int) if spread \
        else rng.permutation(cands.size)
    if spread:
        order = np.concatenate([np.round(np.linspace(0, cands.size - 1, n)).astype(int),
                                order])
    picked: list[int] = []
    for c in order:
        if c in picked:
            continue
        if all(abs(cands[c] - cands[q]) >= spacing - 1e-9 for q in picked):
            picked.append(int(c))
        if len(picked) == n:
            return np.array(picked)
    return None


def optimise(ev: Evaluator, allowed: AllowedSet, candidates: np.ndarray | None,
             seed: int = 0) -> list[np.ndarray] | None:
    """The best schedule of every group (None when no schedule meets the constraints or
    every one leaves the information singular)."""
    rng = np.random.default_rng(seed)
    if candidates is not None:
        return _discrete(ev, candidates, rng)
    return _continuous(ev, allowed, rng)
