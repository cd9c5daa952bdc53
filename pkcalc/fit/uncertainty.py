"""Uncertainty of individual estimates: covariances, Wald and profile intervals,
identifiability."""

from __future__ import annotations

import math

import numpy as np

from .. import model
from ..core import FitOptions
from .objective import Batch, evaluate
from .result import Estimate, wald_quantile
from .solver import minimise

CHI2_95 = 3.841458820694124
#: Identifiability: smallest eigenvalue of the information in correlation form.
IDENTIFIABILITY_EIG = 1e-8



def observed_hessian(batch: Batch, theta: np.ndarray, h: float = 1e-5) -> np.ndarray:
    """Observed information: central differences of the analytic gradient (once, at
    the estimate -- not in the iterations)."""
    b, q = theta.shape
    plus = np.repeat(theta[:, None, :], q, axis=1) + h * np.eye(q)
    minus = np.repeat(theta[:, None, :], q, axis=1) - h * np.eye(q)
    rows = np.repeat(np.arange(b), q)
    _, gp, _, _ = evaluate(batch.rows(rows), plus.reshape(-1, q), information=False)
    _, gm, _, _ = evaluate(batch.rows(rows), minus.reshape(-1, q), information=False)
    hess = ((gp - gm) / (2 * h)).reshape(b, q, q)
    return 0.5 * (hess + np.swapaxes(hess, 1, 2))


def structural_estimates(batch: Batch, theta: np.ndarray, cov: np.ndarray, kind: str
                          ) -> list[dict[str, Estimate]]:
    """Clearance, volume, elimination rate and half-life of every row (vectorised).

    ``ln k = ln CL - ln V`` and ``ln t1/2 = ln ln2 - ln k`` share the variance
    ``var(ln CL) + var(ln V) - 2 cov``; intervals are ``exp(ln x +- q SE)``.
    """
    q = wald_quantiles(batch.n_obs, 3 if kind == "least_squares" else theta.shape[1], kind)
    var_k = cov[:, 0, 0] + cov[:, 1, 1] - 2 * cov[:, 0, 1]
    lnk = theta[:, 0] - theta[:, 1]
    columns = {"clearance": (theta[:, 0], cov[:, 0, 0]), "volume": (theta[:, 1], cov[:, 1, 1]),
               "elimination_rate": (lnk, var_k),
               "half_life": (math.log(model.LN2) - lnk, var_k)}
    out: list[dict[str, Estimate]] = [{} for _ in range(theta.shape[0])]
    for name, (ln, var) in columns.items():
        for d, e in zip(out, log_estimates(ln, var, q), strict=True):
            d[name] = e
    return out


def wald_quantiles(n_obs: np.ndarray, n_params: int, kind: str) -> np.ndarray:
    """:func:`wald_quantile` of every row (once per distinct number of levels)."""
    n_obs = np.asarray(n_obs, dtype=int)
    distinct, where = np.unique(n_obs, return_inverse=True)
    return np.array([wald_quantile(int(k), n_params, kind) for k in distinct])[where]


def log_estimates(ln: np.ndarray, var: np.ndarray, quantile: np.ndarray) -> list[Estimate]:
    """Estimates ``exp(ln)`` with Wald intervals on the log scale,
    ``exp(ln +- quantile SE)``, for every row at once; no SE or interval where ``var``
    is NaN, negative or above 25 (an SE of the log above 5 means no meaningful
    interval)."""
    value = np.exp(ln)
    ok = np.isfinite(var) & (var >= 0) & (var <= 25.0)
    se_log = np.sqrt(np.where(ok, var, 0.0))
    lo, hi = np.exp(ln - quantile * se_log), np.exp(ln + quantile * se_log)
    # plain Python floats once per column (not a numpy scalar per element)
    rows = zip(ok.tolist(), value.tolist(), (value * se_log).tolist(),
               (100 * se_log).tolist(), lo.tolist(), hi.tolist(), strict=True)
    return [Estimate(v, se, rse, a, b) if good else Estimate(v)
            for good, v, se, rse, a, b in rows]


def covariances(batch: Batch, obj: np.ndarray, hess: np.ndarray, kind: str):
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
    # a row whose information is about 1e-300 (a parameter the levels do not see at
    # all) overflows here: its covariance is not finite, and it is not identifiable
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        inv_corr = np.einsum("bij,bj,bkj->bik", vec, 1 / eig_all, vec)
        cov = inv_corr / (d[:, :, None] * d[:, None, :]) * scale[:, None, None]
    identifiable &= np.all(np.isfinite(cov), axis=(1, 2)) | ~np.isfinite(scale)
    bad = ~identifiable | ~np.isfinite(scale)
    cov[bad] = np.nan
    return cov, identifiable, scale


def undetermined(row: Batch, theta: np.ndarray, n: int) -> str:
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


def profile_interval(row: Batch, theta: np.ndarray, j: int, obj_hat: float, se: float,
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
