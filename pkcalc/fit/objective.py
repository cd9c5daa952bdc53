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

__all__ = ["Batch", "build_batch", "evaluate", "exact_hessian", "n_error_params",
           "positive_definite", "profiled_sigma", "structural"]

LOG_2PI = math.log(2 * math.pi)
#: Below this share of contributing (time, dose) pairs in the padded layout, a batch
#: evaluates the model on the contributing pairs only (:class:`pkcalc.model.EventCells`).
SPARSE_CELLS = 0.5


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
    geometry: tuple[np.ndarray, np.ndarray, np.ndarray] | model.EventCells | None = None
    compartments: int = 1

    def __post_init__(self) -> None:
        if self.geometry is None:  # parameter-free part of the model, computed once
            geometry = model.event_geometry(self.t, self.start, self.duration)
            used = geometry[2] & (self.amount[:, None, :] != 0)
            if used.size and used.mean() < SPARSE_CELLS:   # many doses, few levels
                geometry = model.event_cells(self.t, self.start, self.amount,
                                             self.duration, geometry)
            object.__setattr__(self, "geometry", geometry)

    def rows(self, idx: np.ndarray) -> Batch:
        """The batch restricted to some rows."""
        def sub(a):
            return None if a is None else a[idx]
        return replace(self, t=self.t[idx], y=self.y[idx], w=self.w[idx], obs=self.obs[idx],
                       cens=self.cens[idx], start=self.start[idx], amount=self.amount[idx],
                       duration=self.duration[idx], sa=sub(self.sa), sp=sub(self.sp),
                       mu=sub(self.mu), omega_inv=sub(self.omega_inv),
                       geometry=self.geometry.rows(idx)
                       if isinstance(self.geometry, model.EventCells)
                       else tuple(g[idx] for g in self.geometry))

    def repeat(self, n: int) -> Batch:
        """Each row repeated ``n`` times consecutively (for several starts)."""
        return self.rows(np.repeat(np.arange(self.t.shape[0]), n))

    @property
    def n_structural(self) -> int:
        """Structural parameters: ``ln CL, ln V`` (one compartment) or ``ln CL, ln V1,
        ln Q, ln V2`` (two compartments, the adequacy check)."""
        return 2 if self.compartments == 1 else 4

    @property
    def cells_per_row(self) -> int:
        """(level, dose) pairs the model evaluates per row: the padded ``N x E``, or the
        mean number of contributing pairs in the compact layout (for sizing blocks)."""
        if isinstance(self.geometry, model.EventCells):
            return max(1, -(-self.geometry.u.size // max(self.t.shape[0], 1)))
        return self.t.shape[1] * max(self.start.shape[1], 1)

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
    ``dose_duration``); the ``*json_list`` arguments one array per subject.
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


def residual_variance(batch: Batch, theta: np.ndarray, f: np.ndarray):
    """Residual variance, its derivative wrt ln f's parameters, and wrt error parameters."""
    if batch.kind == "map":
        sa = batch.sa[:, None]
        sp = batch.sp[:, None]
        err_params = []
    else:
        p = batch.n_structural
        if batch.error == "additive":
            sa, sp = np.exp(theta[:, p])[:, None], np.zeros((theta.shape[0], 1))
        elif batch.error == "proportional":
            sa, sp = np.zeros((theta.shape[0], 1)), np.exp(theta[:, p])[:, None]
        else:
            sa, sp = np.exp(theta[:, p])[:, None], np.exp(theta[:, p + 1])[:, None]
        err_params = {"additive": ["a"], "proportional": ["p"], "combined": ["a", "p"]}[
            batch.error]
    v = sa**2 + sp**2 * f**2
    dv_df = 2 * sp**2 * f
    dv_err = []
    for which in err_params:  # d v / d ln sigma = 2 sigma^2 (times f^2 for proportional)
        dv_err.append(2 * sa**2 * np.ones_like(f) if which == "a" else 2 * sp**2 * f**2)
    return np.maximum(v, 1e-300), dv_df, dv_err


def _dot(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row-wise ``sum_n a[b, n] b[b, n]`` (einsum: much faster than (a*b).sum(1) here)."""
    return np.einsum("bn,bn->b", a, b)


def _rowsum(a: np.ndarray) -> np.ndarray:
    return a @ np.ones(a.shape[1])


def _gram(w: np.ndarray, jac: np.ndarray) -> np.ndarray:
    """``sum_n w[b, n] jac[i, b, n] jac[j, b, n]`` for the structural block."""
    p = jac.shape[0]
    out = np.empty((w.shape[0], p, p))
    for i in range(p):
        wi = w * jac[i]
        for j in range(i, p):
            out[:, i, j] = out[:, j, i] = _dot(wi, jac[j])
    return out


def _block_sum(s: np.ndarray, e: list[np.ndarray], jac: np.ndarray) -> np.ndarray:
    """``sum_n`` of the vectors ``s * jac (+) e`` (structural part, error parts)."""
    p = jac.shape[0]
    out = np.empty((s.shape[0], p + len(e)))
    for i in range(p):
        out[:, i] = _dot(s, jac[i])
    for j, x in enumerate(e):
        out[:, p + j] = _rowsum(x)
    return out


def _block_gram(w: np.ndarray, s: np.ndarray, e: list[np.ndarray], jac: np.ndarray, *,
                structural_weight: np.ndarray | None = None) -> np.ndarray:
    """``sum_n w v v'`` for the vectors ``v = s * jac (+) e``; the structural block may be
    given its own weight (to add a mean term to the same Gram)."""
    p = jac.shape[0]
    q = p + len(e)
    out = np.empty((w.shape[0], q, q))
    out[:, :p, :p] = _gram(w * s * s if structural_weight is None else structural_weight, jac)
    for i, ei in enumerate(e):
        wse = w * s * ei
        cross = np.stack([_dot(wse, jac[k]) for k in range(p)], axis=1)
        out[:, p + i, :p] = cross
        out[:, :p, p + i] = cross
        for j, ej in enumerate(e):
            out[:, p + i, p + j] = _dot(w * ei, ej)
    return out


def profiled_sigma(batch: Batch, f: np.ndarray, floor: np.ndarray) -> np.ndarray:
    """ln of the residual SD that maximises the likelihood for given predictions.

    For a pure additive or proportional model without censored levels the
    maximum is closed form: ``s^2 = mean(r^2)`` or ``mean((r/f)^2)``.
    """
    o = batch.obs
    r = batch.y - f
    if batch.error == "proportional":
        r = r / np.where(o & (f > 0), f, 1.0)
    n = np.maximum(_rowsum(o.astype(float)), 1.0)
    s2 = _rowsum(np.where(o, r * r, 0.0)) / n
    return np.maximum(0.5 * np.log(np.maximum(s2, 1e-300)), floor)


def structural(batch: Batch, theta: np.ndarray, *, second: bool = False):
    """Predictions and their derivatives with respect to the structural log-parameters
    (the first ``batch.n_structural`` columns of ``theta``); with ``second`` (one
    compartment) also the second derivatives, shape (3, B, N): ``xx, xy, yy``."""
    # a trial point far out (a volume that underflows, a rate that overflows) gives
    # non-finite predictions and so an infinite objective: the solvers reject it, and
    # the arithmetic on the way is not a warning for the user
    with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
        return _structural(batch, theta, second)


def _structural(batch: Batch, theta: np.ndarray, second: bool):
    if second:
        if batch.compartments != 1:
            raise ValueError("second derivatives are those of the one-compartment model")
        return model.concentration_derivatives(
            batch.t, batch.start, batch.amount, batch.duration, np.exp(theta[:, 0]),
            np.exp(theta[:, 1]), geometry=batch.geometry)
    if batch.compartments == 1:
        return model.concentration_and_gradient(
            batch.t, batch.start, batch.amount, batch.duration, np.exp(theta[:, 0]),
            np.exp(theta[:, 1]), geometry=batch.geometry)
    return model.two_compartment_and_gradient(
        batch.t, batch.start, batch.amount, batch.duration, *np.exp(theta[:, :4]).T,
        geometry=batch.geometry)


def evaluate(batch: Batch, theta: np.ndarray, *, sigma_floor: np.ndarray | None = None,
             predictions: tuple[np.ndarray, np.ndarray] | None = None,
             information: bool = True):
    """Objective, gradient and scoring matrix for each row.

    Parameters
    ----------
    batch : Batch
    theta : ndarray, shape (B, q)
    sigma_floor : ndarray, shape (B,), optional
        Profile the residual SD out (likelihood kind, pure additive or
        proportional error, no censored levels): ``theta`` then holds only
        ``ln CL, ln V``; the SD takes its closed-form optimum (not below
        ``exp(sigma_floor)``), the gradient is the partial one (envelope theorem)
        and the scoring matrix the Schur complement for the structural block.
    predictions : (ndarray (B, N), ndarray (q, B, N)), optional
        :func:`structural` of these rows, computed once and reused (the model does not
        depend on the error or prior parameters that differ between rows).
    information : bool
        Whether to build the scoring matrix (``info`` is None without it: callers that
        need the objective and gradient only skip its Gram sums).

    Returns
    -------
    obj : ndarray, shape (B,)
    grad : ndarray, shape (B, q)
    info : ndarray, shape (B, q, q)
        Positive semi-definite approximation of the Hessian of ``obj``.
    f : ndarray, shape (B, N)
        Predictions.
    """
    f, jac = structural(batch, theta) if predictions is None else predictions
    # a level predicted at about 0 under proportional error makes the variance tiny and
    # the objective infinite: such a trial point is rejected by the solvers, so the
    # overflow on the way there is not a warning for the user
    with np.errstate(over="ignore", invalid="ignore"):
        return _evaluate(batch, theta, f, jac, sigma_floor, information)


def _evaluate(batch: Batch, theta: np.ndarray, f: np.ndarray, jac: np.ndarray,
              sigma_floor: np.ndarray | None, information: bool = True):
    if batch.kind == "least_squares":
        r = np.where(batch.obs, batch.y - f, 0.0)
        wr = batch.w * r
        obj = _dot(wr, r)
        grad = -2 * _block_sum(wr, [], jac)
        info = 2 * _gram(batch.w * batch.obs, jac) if information else None
        return obj, grad, info, f
    if sigma_floor is not None:
        theta = np.concatenate([theta, profiled_sigma(batch, f, sigma_floor)[:, None]], axis=1)
    var, dv_df, dv_err = residual_variance(batch, theta, f)
    # Derivatives of the mean are jac (structural only); derivatives of the variance
    # are dv_df * jac (structural) and dv_err[j] (error parameters).  A per-level
    # vector "s * jac (+) e" is kept as (s, e) so no (B, N, q) arrays are built.
    r = batch.y - f
    o = batch.obs
    var = np.where(o | batch.cens, var, 1.0)  # padding and unused levels: any positive value
    inv = 1.0 / var
    obj = _rowsum(np.where(o, LOG_2PI + np.log(var) + r * r * inv, 0.0))
    a = np.where(o, inv - r * r * inv * inv, 0.0)    # d obj / d var
    m = np.where(o, 2 * r * inv, 0.0)                # -d obj / d mean
    grad = _block_sum(a * dv_df - m, [a * e for e in dv_err], jac)
    # Fisher information: 2/v dmean dmean' + 1/v^2 dvar dvar' (one Gram for the structural
    # block: weight 2/v + (dv_df/v)^2)
    info = None
    if information:
        inv2 = np.where(o, inv * inv, 0.0)
        info = _block_gram(inv2, dv_df, dv_err, jac,
                           structural_weight=np.where(o, 2 * inv, 0.0) + inv2 * dv_df * dv_df)
    if batch.cens.any():
        c = batch.cens
        sd = np.sqrt(var)
        z = (batch.y - f) / sd
        log_cdf = log_ndtr(z)
        lam = np.exp(-0.5 * z * z - 0.5 * LOG_2PI - log_cdf)   # phi(z) / Phi(z)
        # dz = -dmean/sd - z/(2 var) dvar
        s_z = -1.0 / sd - z * inv / 2 * dv_df
        e_z = [-z * inv / 2 * e for e in dv_err]
        obj = obj + _rowsum(np.where(c, -2 * log_cdf, 0.0))
        g = np.where(c, -2 * lam, 0.0)
        grad = grad + _block_sum(g * s_z, [g * e for e in e_z], jac)
        if information:
            info = info + _block_gram(np.where(c, 2 * lam * (z + lam), 0.0), s_z, e_z, jac)
    if sigma_floor is not None and information:
        p = batch.n_structural
        i_ss, i_se, i_ee = info[:, :p, :p], info[:, :p, p], info[:, p, p]
        info = i_ss - i_se[:, :, None] * i_se[:, None, :] / np.maximum(i_ee, 1e-300)[:, None,
                                                                                   None]
        return obj, grad[:, :p], info, f
    if sigma_floor is not None:
        return obj, grad[:, :batch.n_structural], info, f
    if batch.kind == "map":
        d = theta[:, :2] - batch.mu
        od = np.einsum("bij,bj->bi", batch.omega_inv, d)
        obj = obj + np.einsum("bi,bi->b", d, od)
        grad[:, :2] += 2 * od
        if information:
            info[:, :2, :2] += 2 * batch.omega_inv
    return obj, grad, info, f


def positive_definite(m: np.ndarray) -> np.ndarray:
    """Which of the 2 x 2 matrices ``m`` (..., 2, 2) are positive definite (False for a
    matrix with a non-finite entry)."""
    with np.errstate(invalid="ignore", over="ignore"):
        det = m[..., 0, 0] * m[..., 1, 1] - m[..., 0, 1] * m[..., 1, 0]
        return (m[..., 0, 0] > 0) & (det > 0)


def exact_hessian(batch: Batch, theta: np.ndarray, *,
                  predictions: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None,
                  information: bool = True):
    """The ``map`` objective with its exact Hessian in ``ln CL, ln V`` (one compartment).

    Per level, with ``r = y - f``, ``v = sa^2 + sp^2 f^2``, ``v' = 2 sp^2 f`` and
    ``v'' = 2 sp^2``, the level's term ``l = ln(2 pi v) + r^2 / v`` has
    ``l' = (1/v - r^2/v^2) v' - 2 r / v`` and
    ``l'' = 2/v + v'^2 (2 r^2/v^3 - 1/v^2) + 4 r v'/v^2 + (1/v - r^2/v^2) v''``;
    a BLQ level (Beal's M3, ``l = -2 ln Phi(z)``, ``z = (LLOQ - f)/sqrt(v)``) has
    ``l' = -2 lambda z'`` and ``l'' = 2 lambda (z + lambda) z'^2 - 2 lambda z''`` with
    ``lambda = phi(z)/Phi(z)``, ``z' = -1/sqrt(v) - z v'/(2 v)`` and
    ``z'' = v'/(v sqrt(v)) + 3 z v'^2/(4 v^2) - z v''/(2 v)``.  The Hessian is
    ``sum l'' J J' + sum l' d2f`` (``J``, ``d2f`` the model's first and second
    derivatives, :func:`pkcalc.model.concentration_derivatives`) plus ``2 Omega^-1``.

    Parameters
    ----------
    batch : Batch
        Of kind ``map``.
    theta : ndarray, shape (B, 2)
    predictions : (f, J, d2f), optional
        :func:`structural` with ``second=True`` of these rows, computed once and reused.
    information : bool
        As for :func:`evaluate`.

    Returns
    -------
    obj : ndarray, shape (B,)
    grad : ndarray, shape (B, 2)
    hess : ndarray, shape (B, 2, 2)
        The exact Hessian (not necessarily positive definite away from a mode).
    info : ndarray, shape (B, 2, 2), or None
        The scoring matrix of :func:`evaluate` (positive semi-definite); None with
        ``information=False``.
    """
    if batch.kind != "map":
        raise ValueError("the exact Hessian is that of the map objective")
    f, jac, jac2 = structural(batch, theta, second=True) if predictions is None \
        else predictions
    obj, grad, info, _ = evaluate(batch, theta, predictions=(f, jac), information=information)
    with np.errstate(over="ignore", invalid="ignore"):   # see evaluate
        hess = _exact_hessian(batch, f, jac, jac2)
    return obj, grad, hess, info


def _exact_hessian(batch: Batch, f, jac, jac2) -> np.ndarray:
    sa2, sp2 = batch.sa[:, None] ** 2, batch.sp[:, None] ** 2
    o, c = batch.obs, batch.cens
    var = np.where(o | c, np.maximum(sa2 + sp2 * f * f, 1e-300), 1.0)
    inv = 1.0 / var
    dv, d2v = 2 * sp2 * f, 2 * sp2
    r = batch.y - f
    a = inv - r * r * inv * inv
    first = np.where(o, a * dv - 2 * r * inv, 0.0)
    second = np.where(o, 2 * inv + dv * dv * (2 * r * r * inv - 1.0) * inv * inv
                      + 4 * r * dv * inv * inv + a * d2v, 0.0)
    if c.any():
        sd = np.sqrt(var)
        z = r / sd
        lam = np.exp(-0.5 * z * z - 0.5 * LOG_2PI - log_ndtr(z))
        z1 = -1.0 / sd - z * dv * inv / 2
        z2 = dv * inv / sd + 0.75 * z * dv * dv * inv * inv - z * d2v * inv / 2
        first = first + np.where(c, -2 * lam * z1, 0.0)
        second = second + np.where(c, 2 * lam * (z + lam) * z1 * z1 - 2 * lam * z2, 0.0)
    hess = _gram(second, jac)
    hess[:, 0, 0] += _dot(first, jac2[0])
    cross = _dot(first, jac2[1])
    hess[:, 0, 1] += cross
    hess[:, 1, 0] += cross
    hess[:, 1, 1] += _dot(first, jac2[2])
    hess += 2 * batch.omega_inv
    return hess
