"""A damped scoring (Levenberg-Marquardt) minimiser, vectorised over many rows.

Each row is an independent problem (a subject, or one start of a subject).
A step solves ``(I + lambda diag(I)) d = -g`` with ``I`` the scoring matrix of
:func:`pkcalc.fit.objective.evaluate`; it is accepted when the objective falls
(``lambda`` shrinks), otherwise ``lambda`` grows.  Rows stop when the
objective changes by less than ``tol (1 + |obj|)`` on an accepted step whose
largest component is below ``xtol``, or when a step below ``xtol`` raises it by no
more than rounding (``ROUNDING (1 + |obj|)``).  Marquardt, SIAM J Appl Math 1963;11:431;
Fisher scoring for the likelihood objectives (Jennrich & Sampson, Technometrics
1976;18:11 -- from memory).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

__all__ = ["Solution", "minimise"]

MAX_STEP = 2.0  # largest change of a log-parameter in one step (a factor of e^2)
#: Relative rise of the objective that is rounding, not a worse point (a few hundred
#: units in the last place of a sum of many terms).
ROUNDING = 1e-13


@dataclass
class Solution:
    """Result for every row.

    Attributes
    ----------
    theta : ndarray, shape (B, q)
    obj : ndarray, shape (B,)
    grad : ndarray, shape (B, q)
    info : ndarray, shape (B, q, q)
    converged : ndarray of bool, shape (B,)
    iterations : ndarray of int, shape (B,)
    message : list of str
    """

    theta: np.ndarray
    obj: np.ndarray
    grad: np.ndarray
    info: np.ndarray
    converged: np.ndarray
    iterations: np.ndarray
    message: list[str]
    extra: np.ndarray | None = None


def minimise(fun: Callable[[np.ndarray, np.ndarray], tuple], theta0: np.ndarray, *,
             max_iter: int = 200, tol: float = 1e-9, xtol: float = 1e-6,
             lower: float | np.ndarray = -30.0, upper: float | np.ndarray = 30.0,
             reference: tuple[np.ndarray, np.ndarray] | None = None,
             reference_tol: tuple[float, float] = (1e-4, 1e-4),
             settle: tuple[int, float] | None = None) -> Solution:
    """Minimise many small problems at once.

    Parameters
    ----------
    fun : callable
        ``fun(theta_rows, row_index) -> (obj, grad, info)`` for the given rows; a
        fourth item (an array with one entry per row) is carried along with the
        accepted points and returned as ``Solution.extra``.
    theta0 : ndarray, shape (B, q)
        Starting values (log-parameters).
    max_iter : int
    tol, xtol : float
        Convergence on the objective (relative) and on the step.
    lower, upper : float or ndarray broadcastable to (B, q)
        Box for the log-parameters (steps are clipped into it).
    reference : (ndarray (B, q), ndarray (B,)), optional
        A converged solution of the same problem from another start (NaN where
        there is none).  A row that comes within ``reference_tol`` (largest
        log-parameter difference, objective difference) of it has reached that
        optimum and stops there.
    settle : (int, float), optional
        ``(k, drop)``: a row whose objective fell by less than ``drop`` (absolute)
        over its last ``k`` iterations stops as converged -- for callers that need
        the objective, not the point (a flat ridge is crawled along slowly).

    Returns
    -------
    Solution
    """
    theta = np.array(theta0, dtype=float)
    b, q = theta.shape
    lower = np.broadcast_to(np.asarray(lower, float), (b, q))
    upper = np.broadcast_to(np.asarray(upper, float), (b, q))
    theta = np.clip(theta, lower, upper)
    all_rows = np.arange(b)
    first = fun(theta, all_rows)
    obj, grad, info = np.array(first[0]), np.array(first[1]), np.array(first[2])
    extra = np.array(first[3]) if len(first) > 3 else None
    lam = np.full(b, 1e-3)
    converged = np.zeros(b, bool)
    active = np.isfinite(obj)
    iterations = np.zeros(b, int)
    message = ["" if a else "objective not finite at the start" for a in active]
    eye = np.eye(q)
    history = None if settle is None else np.full((settle[0], b), np.inf)
    for it in range(max_iter):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        iterations[idx] += 1
        h = info[idx]
        g = grad[idx]
        th, lo_i, hi_i = theta[idx], lower[idx], upper[idx]
        # parameters held at a bound by the gradient are frozen for this step (active set)
        held = ((th <= lo_i + 1e-9) & (g > 0)) | ((th >= hi_i - 1e-9) & (g < 0))
        if held.any():
            free = ~held
            h = h * free[:, :, None] * free[:, None, :] + held[:, :, None] * eye
            g = np.where(held, 0.0, g)
        diag = np.maximum(np.diagonal(h, axis1=1, axis2=2), 1e-12)
        damped = h + lam[idx, None, None] * diag[:, :, None] * eye
        step = np.clip(-_solve(damped, g, diag), -MAX_STEP, MAX_STEP)
        trial = np.clip(th + step, lo_i, hi_i)
        out = fun(trial, idx)
        o_t, g_t, i_t = out[0], out[1], out[2]
        ok = np.isfinite(o_t) & (o_t <= obj[idx])
        acc = idx[ok]
        if extra is not None:
            extra[acc] = np.asarray(out[3])[ok]
        gain = obj[acc] - o_t[ok]
        size = np.abs(trial - th).max(axis=1)
        moved = size[ok]
        new, g_new = trial[ok], g_t[ok]
        theta[acc], obj[acc], grad[acc], info[acc] = new, o_t[ok], g_new, i_t[ok]
        lam[acc] = np.maximum(lam[acc] / 10.0, 1e-12)
        rej = idx[~ok]
        lam[rej] *= 10.0
        # a tiny step that raises the objective by no more than its rounding: the
        # objective cannot tell the points apart -- converged (not a stall to damp out)
        rounding = np.isfinite(o_t[~ok]) & \
            (o_t[~ok] - obj[rej] <= ROUNDING * (1.0 + np.abs(obj[rej]))) & \
            (size[~ok] <= xtol)
        converged[rej[rounding]] = True
        active[rej[rounding]] = False
        done = (gain <= tol * (1.0 + np.abs(obj[acc]))) & (moved <= xtol)
        # tiny gains with larger steps also count once the gradient is negligible
        at_bound = (new <= lo_i[ok] + 1e-9) | (new >= hi_i[ok] - 1e-9)
        gnorm = np.abs(np.where(at_bound, 0.0, g_new) * np.maximum(np.abs(new), 1.0)).max(axis=1)
        done |= (gain <= tol * (1.0 + np.abs(obj[acc]))) & (gnorm <= 1e-6)
        if reference is not None:
            ref_theta, ref_obj = reference
            near = (np.abs(new - ref_theta[acc]).max(axis=1) <= reference_tol[0]) & \
                (np.abs(obj[acc] - ref_obj[acc]) <= reference_tol[1])
            for r in acc[near & ~done]:
                message[r] = "reached the optimum found from the first start"
            done |= near
        if history is not None:
            k, drop = settle
            past = history[it % k, idx].copy()
            history[it % k, idx] = obj[idx]
            flat = (it >= k) & (past - obj[idx] < drop)
            for r in idx[flat & active[idx]]:
                message[r] = f"objective changed by less than {drop:g} over {k} iterations"
            converged[idx[flat]] = True
            active[idx[flat]] = False
        converged[acc[done]] = True
        active[acc[done]] = False
        stuck = rej[lam[rej] > 1e12]
        for r in stuck:
            small = np.abs(grad[r]).max() <= 1e-5 * (1.0 + abs(obj[r]))
            converged[r] = bool(small)
            message[r] = "" if small else "no step lowers the objective (flat or rough surface)"
        active[stuck] = False
    for r in np.flatnonzero(active):
        message[r] = f"not converged in {max_iter} iterations"
    return Solution(theta, obj, grad, info, converged, iterations, message, extra)


def _solve(a: np.ndarray, g: np.ndarray, diag: np.ndarray) -> np.ndarray:
    """``a^-1 g`` for a stack of small positive definite matrices: closed form for 2 x 2
    (Cramer's rule), else LAPACK; a singular matrix takes the scaled gradient step
    ``g / diag``."""
    if a.shape[1] == 2:
        det = a[:, 0, 0] * a[:, 1, 1] - a[:, 0, 1] * a[:, 1, 0]
        ok = np.isfinite(det) & (np.abs(det) > 1e-300)
        det = np.where(ok, det, 1.0)
        x0 = (a[:, 1, 1] * g[:, 0] - a[:, 0, 1] * g[:, 1]) / det
        x1 = (a[:, 0, 0] * g[:, 1] - a[:, 1, 0] * g[:, 0]) / det
        out = np.stack([x0, x1], axis=1)
        return np.where(ok[:, None], out, g / diag)
    try:
        return np.linalg.solve(a, g[..., None])[..., 0]
    except np.linalg.LinAlgError:
        return g / diag
