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
from .constraints import TOLERANCE, AllowedSet, spacing_ok
from .information import (
    SINGULAR,
    Course,
    course,
    individual_information,
    log_det,
    population_information,
    population_information_batch,
)

__all__ = ["Evaluator", "optimise"]

#: Candidate combinations searched exhaustively (more: the exchange search).
EXHAUSTIVE = 5000
#: Points of the grid the free-time search starts from (plus the course's corners).
GRID = 160
#: Most passes of the exchange search over every level.
MAX_SWEEPS = 20
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

    def course(self, times: np.ndarray) -> Course:
        p = self.p
        return course(times, self.doses, p.clearance, p.volume, p.additive, p.proportional)

    def course_information(self, c: Course) -> np.ndarray:
        p = self.p
        if p.design == "population":
            return population_information(c, self.omega, p.additive, p.proportional)
        return individual_information(c, self.omega if p.design == "map" else None)

    def subject_information(self, times: np.ndarray) -> np.ndarray:
        return self.course_information(self.course(times))

    def information(self, schedules: list[np.ndarray]) -> np.ndarray:
        """The whole design's information (subjects x each group's information)."""
        total = None
        for g, times in zip(self.p.groups, schedules, strict=True):
            m = g.subjects * self.subject_information(times)
            total = m if total is None else total + m
        return total

    def loss(self, schedules: list[np.ndarray]) -> float:
        """The criterion to minimise (large when the information is singular)."""
        return self.loss_of(self.information(schedules))

    def loss_of(self, m: np.ndarray) -> float:
        ld = log_det(m)
        if not math.isfinite(ld):
            return _BAD
        if self.p.criterion == "D":
            return -ld
        cov = np.linalg.inv(m)
        return float(cov[0, 0] + cov[1, 1])


    def loss_batch(self, ms: np.ndarray) -> np.ndarray:
        """:meth:`loss_of` of a stack of matrices (k, p, p) at once."""
        d = np.diagonal(ms, axis1=1, axis2=2)
        ok = np.all(d > 0, axis=1) & np.all(np.isfinite(ms), axis=(1, 2))
        out = np.full(ms.shape[0], _BAD)
        if not ok.any():
            return out
        m = ms[ok]
        sc = 1.0 / np.sqrt(np.diagonal(m, axis1=1, axis2=2))
        scaled = m * sc[:, :, None] * sc[:, None, :]
        good = np.linalg.eigvalsh(scaled)[:, 0] >= SINGULAR
        sign, ld = np.linalg.slogdet(m)
        good &= (sign > 0) & np.isfinite(ld)
        vals = np.full(m.shape[0], _BAD)
        if self.p.criterion == "D":
            vals[good] = -ld[good]
        elif good.any():
            cov = np.linalg.inv(m[good])
            vals[good] = cov[:, 0, 0] + cov[:, 1, 1]
        out[ok] = vals
        return out

    def loss_and_gradient(self, schedules: list[np.ndarray], step: float = 1e-6
                          ) -> tuple[float, np.ndarray]:
        """The criterion and its forward-difference gradient in every time, from one
        model evaluation per group (the times and the times + step together)."""
        parts, courses = [], []
        for g, t in zip(self.p.groups, schedules, strict=True):
            both = self.course(np.concatenate([t, t + step]))
            n = t.size
            base = Course(both.f[:n], both.F[:n], both.var[:n])
            courses.append((both, base, n))
            parts.append(g.subjects * self.course_information(base))
        total = sum(parts)
        loss = self.loss_of(total)
        grad = []
        for (both, base, n), g, part in zip(courses, self.p.groups, parts, strict=True):
            for j in range(n):
                f, F, var = base.f.copy(), base.F.copy(), base.var.copy()
                f[j], F[j], var[j] = both.f[n + j], both.F[n + j], both.var[n + j]
                moved = total - part + g.subjects * self.course_information(Course(f, F, var))
                grad.append((self.loss_of(moved) - loss) / step)
        return loss, np.array(grad)


def _feasible(schedules, allowed: AllowedSet, spacing: float) -> bool:
    return all(bool(np.all(allowed.contains(t))) and spacing_ok(t, spacing)
               for t in schedules)


def grid_times(ev: Evaluator, allowed: AllowedSet, points: int = GRID) -> np.ndarray:
    """A grid over the allowed set: evenly spread points plus every piece's ends and
    every dose start and infusion end inside it (where the course has a corner and
    optima often sit)."""
    start, _, duration = ev.doses
    corners = np.concatenate([start, start + np.maximum(duration, 0.0)])
    out = [corners[allowed.contains(corners)]]
    spacing = ev.p.min_spacing
    for a, b in allowed.pieces:
        n = max(2, math.ceil(points * (b - a) / max(allowed.length, 1e-12)) + 1)
        out.append(np.linspace(a, b, n))
        if spacing > 0:  # tightly packed schedules from either end stay reachable
            k = np.arange(min(int((b - a) / spacing) + 1, points))
            out += [a + k * spacing, b - k * spacing]
    return np.unique(np.concatenate(out))


class _Rows:
    """The course at fixed times, so that any subset's information needs no model call."""

    def __init__(self, ev: Evaluator, times: np.ndarray) -> None:
        self.ev, self.times = ev, times
        self.c = ev.course(times)
        # individual and MAP information is a sum over levels: each time's own term
        self.additive = ev.p.design != "population"
        if self.additive:
            F, w = self.c.F, 1.0 / np.maximum(self.c.var, 1e-300)
            self.terms = w[:, None, None] * F[:, :, None] * F[:, None, :]

    def info(self, g_subjects: int, idx: np.ndarray) -> np.ndarray:
        c = self.c
        return g_subjects * self.ev.course_information(Course(c.f[idx], c.F[idx], c.var[idx]))


def _exchange(ev: Evaluator, rows: _Rows, rng: np.random.Generator, starts: int
              ) -> tuple[list[np.ndarray] | None, float]:
    """Exchange search over the rows' times: swap one chosen time for an unchosen one
    while the criterion improves; the best of several starts (index arrays)."""
    p = ev.p
    sizes = [g.levels for g in p.groups]
    subjects = [g.subjects for g in p.groups]
    times, s = rows.times, p.min_spacing
    best, best_loss = None, math.inf
    for k in range(starts):
        chosen = []
        for n in sizes:
            pick = _random_subset(times, n, s, rng, spread=k == 0)
            if pick is None:  # this start found no spaced subset: try the next
                break
            chosen.append(np.sort(pick))
        if len(chosen) < len(sizes):
            continue
        parts = [rows.info(subjects[g], chosen[g]) for g in range(len(sizes))]
        total = sum(parts)
        loss = ev.loss_of(total)
        for _ in range(MAX_SWEEPS):
            improved = False
            for g, n in enumerate(sizes):
                for j in range(n):
                    if rows.additive:  # information adds over levels: every swap at once
                        new, c = _best_swap(ev, rows, subjects[g], total, chosen[g], j, s)
                    else:
                        new, c = _best_population_swap(ev, rows, subjects[g],
                                                       total - parts[g], chosen[g], j, s)
                    if c is None or not new < loss - 1e-12:
                        continue
                    trial = chosen[g].copy()
                    trial[j] = c
                    trial.sort()
                    part = rows.info(subjects[g], trial)
                    total = total - parts[g] + part
                    chosen[g], parts[g], loss, improved = trial, part, ev.loss_of(total), True
            if not improved:
                break
        if loss < best_loss:
            best, best_loss = [c.copy() for c in chosen], loss
    return (best if best_loss < _BAD else None), best_loss


def _best_swap(ev: Evaluator, rows: _Rows, subjects: int, total: np.ndarray,
               chosen: np.ndarray, j: int, spacing: float) -> tuple[float, int | None]:
    """The best replacement of level j among every time (additive information)."""
    base = total - subjects * rows.terms[chosen[j]]
    losses = ev.loss_batch(base[None, :, :] + subjects * rows.terms)
    ok = _swap_mask(rows.times, chosen, j, spacing)
    if not ok.any():
        return math.inf, None
    losses = np.where(ok, losses, np.inf)
    c = int(np.argmin(losses))
    return float(losses[c]), c


def _swap_mask(times: np.ndarray, chosen: np.ndarray, j: int, spacing: float) -> np.ndarray:
    ok = np.ones(times.size, bool)
    ok[chosen] = False
    for o in np.delete(chosen, j):
        ok &= np.abs(times - times[o]) >= spacing - 1e-9
    return ok


def _best_population_swap(ev: Evaluator, rows: _Rows, subjects: int, rest: np.ndarray,
                          chosen: np.ndarray, j: int, spacing: float
                          ) -> tuple[float, int | None]:
    """The best replacement of level j among every time (population information of
    every trial schedule in one batch)."""
    ok = _swap_mask(rows.times, chosen, j, spacing)
    cand = np.flatnonzero(ok)
    if cand.size == 0:
        return math.inf, None
    idx = np.repeat(chosen[None, :], cand.size, axis=0)
    idx[:, j] = cand
    c, p = rows.c, ev.p
    info = population_information_batch(c.f[idx], c.F[idx], c.var[idx], ev.omega,
                                        p.additive, p.proportional)
    losses = ev.loss_batch(rest[None] + subjects * info)
    best = int(np.argmin(losses))
    return float(losses[best]), int(cand[best])


def _polish(ev: Evaluator, allowed: AllowedSet, schedules: list[np.ndarray]
            ) -> list[np.ndarray]:
    """SLSQP from the grid's best, each time kept inside its own allowed piece (where
    the criterion is smooth between corners), the spacing as linear constraints."""
    p = ev.p
    sizes = [g.levels for g in p.groups]
    s = p.min_spacing
    x0 = np.concatenate(schedules)
    bounds = []
    for t in x0:
        piece = next((a, b) for a, b in allowed.pieces
                     if a - TOLERANCE <= t <= b + TOLERANCE)
        bounds.append(piece)
    pairs, offset = [], 0
    for n in sizes:
        pairs += [(offset + j, offset + j + 1) for j in range(n - 1)]
        offset += n
    cons = []
    if pairs:
        ia = np.array([a for a, _ in pairs], int)
        ib = np.array([b for _, b in pairs], int)
        jac = np.zeros((len(pairs), x0.size))
        jac[np.arange(len(pairs)), ia] = -1.0
        jac[np.arange(len(pairs)), ib] = 1.0
        cons.append({"type": "ineq", "fun": lambda x: x[ib] - x[ia] - s, "jac": lambda x: jac})

    def split(x):
        return np.split(x, np.cumsum(sizes)[:-1])

    try:
        res = minimize(lambda x: ev.loss_and_gradient(split(x)), x0, jac=True,
                       method="SLSQP", bounds=bounds, constraints=cons,
                       options={"maxiter": 100, "ftol": 1e-12})
    except (ValueError, np.linalg.LinAlgError):
        return schedules
    lo, hi = np.array(bounds).T
    cand = [_repair(np.sort(t), allowed, s) for t in split(np.clip(res.x, lo, hi))]
    if any(t is None for t in cand) or not _feasible(cand, allowed, s):
        return schedules
    return cand if ev.loss(cand) < ev.loss(schedules) else schedules


def _continuous(ev: Evaluator, allowed: AllowedSet, rng: np.random.Generator
                ) -> list[np.ndarray] | None:
    rows = _Rows(ev, grid_times(ev, allowed))
    best, _ = _exchange(ev, rows, rng, ev.p.starts)
    if best is None:
        return None
    return _polish(ev, allowed, [rows.times[b] for b in best])


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
    rows = _Rows(ev, cands)
    if len(sizes) == 1 and math.comb(m, sizes[0]) <= EXHAUSTIVE:
        best, best_loss = None, math.inf
        for idx in itertools.combinations(range(m), sizes[0]):
            idx = np.array(idx)
            if not spacing_ok(cands[idx], s):
                continue
            loss = ev.loss_of(rows.info(p.groups[0].subjects, idx))
            if loss < best_loss:
                best, best_loss = [cands[idx]], loss
        return best if best_loss < _BAD else None
    best, _ = _exchange(ev, rows, rng, p.starts)
    return None if best is None else [cands[b] for b in best]


def _random_subset(cands: np.ndarray, n: int, spacing: float, rng: np.random.Generator,
                   spread: bool) -> np.ndarray | None:
    """Indices of n candidates that keep the spacing (evenly spread or random).  An
    evenly spread start that cannot keep the spacing falls back to the earliest chain
    (each time the first one far enough after the last): when the constraints leave a
    single schedule, that is it."""
    order = rng.permutation(cands.size)
    if spread:
        order = np.concatenate([np.round(np.linspace(0, cands.size - 1, n)).astype(int),
                                np.arange(cands.size)])
    picked = _pick(cands, order, n, spacing)
    if picked is None and spread:
        picked = _pick(cands, np.argsort(cands, kind="stable"), n, spacing)
    return picked


def _pick(cands: np.ndarray, order: np.ndarray, n: int, spacing: float) -> np.ndarray | None:
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
