"""Starting values from the data and the multi-start solve."""

from __future__ import annotations

import numpy as np

from .. import model
from ..core import FitOptions
from .objective import Batch, evaluate, profiled_sigma, structural
from .solver import Solution, minimise

#: Starts whose objectives differ by less than this (in -2 ln L units) agree.
AGREE_TOL = 1e-3



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

    measured = batch.obs & (batch.y > 0)
    log_y = np.log(np.where(measured, batch.y, 1.0))[:, None, :]          # once, not per k

    def fit_v(k):  # k (B, G) -> (ln V, sse)
        s = model.concentration(batch.t[:, None, :], batch.start[:, None, :],
                                batch.amount[:, None, :], batch.duration[:, None, :], k,
                                np.ones_like(k))                           # V = 1
        pos = measured[:, None, :] & (s > 0)
        with np.errstate(divide="ignore", invalid="ignore"):
            d = np.where(pos, np.log(s) - log_y, 0.0)
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


def error_starts(batch: Batch, theta: np.ndarray) -> np.ndarray:
    """Residual-error starting values from the structural start."""
    f = model.concentration(batch.t, batch.start, batch.amount, batch.duration,
                            np.exp(theta[:, 0]), np.exp(theta[:, 1]))
    pos = batch.obs & (batch.y > 0) & (f > 0)
    n = np.maximum(pos.sum(axis=1), 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        lr = np.where(pos, np.log(np.where(pos, batch.y, 1.0) / np.where(pos, f, 1.0)), 0.0)
    sp = np.clip(np.sqrt((lr**2).sum(axis=1) / n), 0.02, 1.0)
    ymed = row_median(batch)
    sa = np.clip(np.sqrt((np.where(batch.obs, batch.y - f, 0.0) ** 2).sum(axis=1) / n),
                 1e-3 * ymed, None)
    if batch.error == "additive":
        return np.log(sa)[:, None]
    if batch.error == "proportional":
        return np.log(sp)[:, None]
    return np.stack([np.log(np.maximum(0.1 * ymed * sp, 1e-6)), np.log(0.8 * sp)], axis=1)


def row_median(batch: Batch) -> np.ndarray:
    """Median of the measured levels of each row (1 when a row has none)."""
    has = batch.obs.any(axis=1)
    values = np.where(batch.obs, batch.y, np.nan)
    values[~has] = 1.0
    return np.nanmedian(values, axis=1)


def bounds(batch: Batch, q: int) -> np.ndarray:
    """Lower bounds of the log-parameters: residual SDs are kept above a floor
    (additive 1e-4 of the median level, proportional 0.1 %) so that a component
    the data do not support ends at its bound instead of at zero variance."""
    lower = np.full((batch.t.shape[0], q), -30.0)
    p = batch.n_structural
    if batch.kind == "likelihood":
        ymed = row_median(batch)
        floors = {"additive": [np.log(1e-4 * ymed)],
                  "proportional": [np.full_like(ymed, np.log(1e-3))],
                  "combined": [np.log(1e-4 * ymed), np.full_like(ymed, np.log(1e-3))]}
        for j, floor in enumerate(floors[batch.error]):
            lower[:, p + j] = floor
    return lower


def solve_starts(batch: Batch, theta0: np.ndarray, opts: FitOptions, n_starts: int, *,
                 max_iter: int = 200, settle: tuple[int, float] | None = None):
    """Solve the first start of every subject, then the other starts; an other start
    that reaches the first start's optimum stops there (it agrees)."""
    if n_starts == 1 or opts.weighting == "inverse_predicted_squared":
        return solve(batch, theta0, opts, max_iter=max_iter, settle=settle)
    which = np.arange(theta0.shape[0]) % n_starts
    first, others = np.flatnonzero(which == 0), np.flatnonzero(which > 0)
    sol1 = solve(batch.rows(first), theta0[first], opts, max_iter=max_iter, settle=settle)
    ref_theta = np.repeat(np.where(sol1.converged[:, None], sol1.theta, np.nan),
                          n_starts - 1, axis=0)
    ref_obj = np.repeat(np.where(sol1.converged, sol1.obj, np.nan), n_starts - 1)
    sol2 = solve(batch.rows(others), theta0[others], opts, reference=(ref_theta, ref_obj),
                 max_iter=max_iter, settle=settle)
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


def solve(batch: Batch, theta0: np.ndarray, opts: FitOptions, reference=None, *,
          max_iter: int = 200, settle: tuple[int, float] | None = None):
    n_rows = batch.t.shape[0]

    def fun(theta, idx):
        rows = batch if idx.size == n_rows else batch.rows(idx)
        obj, grad, info, _ = evaluate(rows, theta)
        return obj, grad, info

    lower = bounds(batch, theta0.shape[1])
    p = batch.n_structural
    if batch.kind == "likelihood" and batch.error != "combined" and not batch.cens.any():
        # the residual SD has a closed-form optimum: profile it out (structural only)
        floor = lower[:, p]

        def profiled(theta, idx):
            rows = batch if idx.size == n_rows else batch.rows(idx)
            obj, grad, info, _ = evaluate(rows, theta, sigma_floor=floor[idx])
            return obj, grad, info

        ref = None if reference is None else (reference[0][:, :p], reference[1])
        sol = minimise(profiled, theta0[:, :p], lower=lower[:, :p], reference=ref,
                       max_iter=max_iter, settle=settle,
                       reference_tol=(1e-3, AGREE_TOL))
        f = structural(batch, sol.theta)[0]
        sol.theta = np.concatenate([sol.theta, profiled_sigma(batch, f, floor)[:, None]], 1)
        return sol
    if opts.weighting != "inverse_predicted_squared":
        return minimise(fun, theta0, lower=lower, reference=reference, max_iter=max_iter,
                        settle=settle,
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
