"""Subjects as padded arrays, and the objective functions on them.

Every subject is a row: sample times, observations and masks padded to the
longest subject, dose events padded with zero amounts.  The objectives return,
for many parameter vectors at once, the value, the analytic gradient and a
positive semi-definite scoring matrix (Gauss-Newton / Fisher information), all
from :func:`pkcalc.model.concentration_and_gradient` -- no finite differences.

Objectives (``theta = [ln CL, ln V, error parameters...]``):

- ``least_squares``: ``sum w (y - f)^2`` with fixed weights ``w``;
- ``likelihood``: ``-2 ln L`` with variance ``v = sa^2 + sp^2 f^2``
  (additive, proportional or combined; ``ln sa`` / ``ln sp`` estimated)::

      sum_obs [ln(2 pi v) + (y - f)^2 / v]  +  sum_blq [-2 ln Phi((LLOQ - f)/sqrt(v))]

  the BLQ term is Beal's M3 (J Pharmacokinet Pharmacodyn 2001;28:481);
- ``map``: the likelihood with fixed ``sa``, ``sp`` plus the prior
  ``(theta - mu)' Omega^-1 (theta - mu)`` on ``ln CL, ln V``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from scipy.special import log_ndtr

from .. import model

__all__ = ["Batch", "build_batch", "evaluate", "n_error_params"]

LOG_2PI = math.log(2 * math.pi)


@dataclass(frozen=True)
class Batch:
    """Padded arrays for ``B`` rows (subjects, possibly repeated for several starts).

    Attributes
    ----------
    t, y, w : ndarray, shape (B, N)
        Times (h), observations (mg/L; the LLOQ on censored rows), LS weights.
    obs, cens : ndarray of bool, shape (B, N)
        Observation used as a number; observation censored (M3 likelihood).
    start, amount, duration : ndarray, shape (B, E)
    kind : str
        ``least_squares``, ``likelihood`` or ``map``.
    error : str
        ``additive``, ``proportional`` or ``combined``.
    sa, sp : ndarray, shape (B,)
        Fixed residual SDs (``map``) -- ignored otherwise.
    mu : ndarray, shape (B, 2)
        Prior means of ``ln CL, ln V`` (``map``).
    omega_inv : ndarray, shape (B, 2, 2)
        Inverse prior covariance (``map``).
    """

    t: np.ndarray
    y: np.ndarray
    w: np.ndarray
    obs: np.ndarray
    cens: np.ndarray
    start: np.ndarray
    amount: np.ndarray
    duration: np.ndarray
    kind: str = "likelihood"
    error: str = "proportional"
    sa: np.ndarray | None = None
    sp: np.ndarray | None = None
    mu: np.ndarray | None = None
    omega_inv: np.ndarray | None = None

    def rows(self, idx: np.ndarray) -> Batch:
        """The batch restricted to some rows."""
        def sub(a):
            return None if a is None else a[idx]
        return replace(self, t=self.t[idx], y=self.y[idx], w=self.w[idx], obs=self.obs[idx],
                       cens=self.cens[idx], start=self.start[idx], amount=self.amount[idx],
                       duration=self.duration[idx], sa=sub(self.sa), sp=sub(self.sp),
                       mu=sub(self.mu), omega_inv=sub(self.omega_inv))

    def repeat(self, n: int) -> Batch:
        """Each row repeated ``n`` times consecutively (for several starts)."""
        return self.rows(np.repeat(np.arange(self.t.shape[0]), n))

    @property
    def n_obs(self) -> np.ndarray:
        return self.obs.sum(axis=1) + self.cens.sum(axis=1)


def n_error_params(batch: Batch) -> int:
    """How many residual-error parameters the objective estimates."""
    if batch.kind != "likelihood":
        return 0
    return 2 if batch.error == "combined" else 1


def build_batch(subjects, *, t_list, y_list, obs_list, cens_list, w_list=None,
                kind="likelihood", error="proportional") -> Batch:
    """Pad per-subject arrays into a :class:`Batch`.

    ``subjects`` supply dose events (``dose_start``, ``dose_amount``,
    ``dose_duration``); the ``*_list`` arguments one array per subject.
    """
    b = len(t_list)
    n = max(len(x) for x in t_list)
    e = max(len(s.dose_start) for s in subjects)

    def pad(arrs, fill, dtype=float, width=n):
        out = np.full((b, width), fill, dtype=dtype)
        for i, a in enumerate(arrs):
            out[i, :len(a)] = a
        return out

    t = pad(t_list, 0.0)
    return Batch(
        t=t, y=pad(y_list, 0.0), w=pad(w_list or [np.ones(len(x)) for x in t_list], 0.0),
        obs=pad(obs_list, False, bool), cens=pad(cens_list, False, bool),
        start=pad([s.dose_start for s in subjects], 0.0, width=e),
        amount=pad([s.dose_amount for s in subjects], 0.0, width=e),
        duration=pad([s.dose_duration for s in subjects], 0.0, width=e),
        kind=kind, error=error,
    )


def _variance(batch: Batch, theta: np.ndarray, f: np.ndarray):
    """Residual variance, its derivative wrt ln f's parameters, and wrt error parameters."""
    if batch.kind == "map":
        sa = batch.sa[:, None]
        sp = batch.sp[:, None]
        err_params = []
    else:
        if batch.error == "additive":
            sa, sp = np.exp(theta[:, 2])[:, None], np.zeros((theta.shape[0], 1))
        elif batch.error == "proportional":
            sa, sp = np.zeros((theta.shape[0], 1)), np.exp(theta[:, 2])[:, None]
        else:
            sa, sp = np.exp(theta[:, 2])[:, None], np.exp(theta[:, 3])[:, None]
        err_params = {"additive": ["a"], "proportional": ["p"], "combined": ["a", "p"]}[
            batch.error]
    v = sa**2 + sp**2 * f**2
    dv_df = 2 * sp**2 * f
    dv_err = []
    for which in err_params:  # d v / d ln sigma = 2 sigma^2 (times f^2 for proportional)
        dv_err.append(2 * sa**2 * np.ones_like(f) if which == "a" else 2 * sp**2 * f**2)
    return np.maximum(v, 1e-300), dv_df, dv_err


def evaluate(batch: Batch, theta: np.ndarray):
    """Objective, gradient and scoring matrix for each row.

    Parameters
    ----------
    batch : Batch
    theta : ndarray, shape (B, q)

    Returns
    -------
    obj : ndarray, shape (B,)
    grad : ndarray, shape (B, q)
    info : ndarray, shape (B, q, q)
        Positive semi-definite approximation of the Hessian of ``obj``.
    f : ndarray, shape (B, N)
        Predictions.
    """
    cl, v_ = np.exp(theta[:, 0]), np.exp(theta[:, 1])
    f, jac = model.concentration_and_gradient(batch.t, batch.start, batch.amount,
                                              batch.duration, cl, v_)
    q = theta.shape[1]
    if batch.kind == "least_squares":
        r = np.where(batch.obs, batch.y - f, 0.0)
        wr = batch.w * r
        obj = (wr * r).sum(axis=1)
        grad = -2 * np.einsum("bn,bnk->bk", wr, jac)
        info = 2 * np.einsum("bn,bni,bnj->bij", batch.w * batch.obs, jac, jac)
        return obj, grad, info, f
    var, dv_df, dv_err = _variance(batch, theta, f)
    # full derivative arrays (B, N, q): mean and variance
    dmu = np.zeros((*f.shape, q))
    dmu[..., :2] = jac
    dvar = np.zeros((*f.shape, q))
    dvar[..., :2] = dv_df[..., None] * jac
    for j, d in enumerate(dv_err):
        dvar[..., 2 + j] = d
    r = batch.y - f
    o = batch.obs
    var = np.where(o | batch.cens, var, 1.0)  # padding and unused levels: any positive value
    obj = np.where(o, LOG_2PI + np.log(var) + r * r / var, 0.0).sum(axis=1)
    g_obs = np.where(o, 1 / var - r * r / var**2, 0.0)[..., None] * dvar \
        - np.where(o, 2 * r / var, 0.0)[..., None] * dmu
    grad = g_obs.sum(axis=1)
    wmu = np.where(o, 2 / var, 0.0)
    wvar = np.where(o, 1 / var**2, 0.0)
    info = np.einsum("bn,bni,bnj->bij", wmu, dmu, dmu) + \
        np.einsum("bn,bni,bnj->bij", wvar, dvar, dvar)
    if batch.cens.any():
        c = batch.cens
        sd = np.sqrt(var)
        z = (batch.y - f) / sd
        log_cdf = log_ndtr(z)
        lam = np.exp(-0.5 * z * z - 0.5 * LOG_2PI - log_cdf)   # phi(z) / Phi(z)
        dz = -dmu / sd[..., None] - (z / (2 * var))[..., None] * dvar
        obj = obj + np.where(c, -2 * log_cdf, 0.0).sum(axis=1)
        grad = grad + (np.where(c, -2 * lam, 0.0)[..., None] * dz).sum(axis=1)
        curv = np.where(c, 2 * lam * (z + lam), 0.0)            # >= 0 (truncated normal)
        info = info + np.einsum("bn,bni,bnj->bij", curv, dz, dz)
    if batch.kind == "map":
        d = theta[:, :2] - batch.mu
        od = np.einsum("bij,bj->bi", batch.omega_inv, d)
        obj = obj + np.einsum("bi,bi->b", d, od)
        grad[:, :2] += 2 * od
        info[:, :2, :2] += 2 * batch.omega_inv
    return obj, grad, info, f
