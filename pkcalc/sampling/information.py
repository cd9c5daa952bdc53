"""Expected information about ln CL and ln V from levels drawn at given times.

Levels follow ``y_j = f(t_j; theta) + e_j`` with ``f`` the one-compartment
course of the dose history (:func:`pkcalc.model.concentration_and_gradient`),
``theta = (ln CL, ln V)`` and a residual error of variance
``s_j = a^2 + b^2 f_j^2`` (additive SD ``a``, proportional SD ``b``).  With
``F`` the sensitivities ``df/dtheta`` at the sampling times (an ``n x 2``
matrix) and ``S = diag(s)``:

- **individual**: ``M = F' S^-1 F`` -- the information of the weighted
  least-squares / maximum-likelihood estimate with the error model known (the
  variance's own dependence on theta is left out, as in the classical design
  literature; Box & Lucas 1959);
- **MAP** (a prior ``theta ~ N(mu, Omega)``): ``M = F' S^-1 F + Omega^-1``, the
  inverse of the posterior covariance of the linearised model;
- **population**, first-order approximation (the individual deviations
  linearised at zero; Mentré, Mallet & Baccar 1997, from memory), one subject
  with ``V = F Omega F' + S``: the fixed-effects block ``F' V^-1 F`` and the
  variance block ``1/2 tr(V^-1 dV_k V^-1 dV_l)`` over the variances of ln CL,
  ln V (and their covariance when correlated) and of the residual error, the
  two blocks kept apart (the block-diagonal form; Retout & Mentré 2003, from
  memory).  A study adds ``N_g`` times the information of each group's
  schedule.

The expected relative standard error of CL (or V) is ``100 sqrt([M^-1]_11)``:
the SE of ln CL is the RSE of CL to first order.

Pure numpy on plain arrays; no pandas.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .. import model

__all__ = ["Course", "course", "individual_information", "log_det", "population_information",
           "population_information_batch", "population_parameters", "rse_percent"]


@dataclass(frozen=True)
class Course:
    """The mean level and its sensitivities at sampling times."""

    f: np.ndarray      # (n,) mg/L
    F: np.ndarray      # (n, 2): df/d ln CL, df/d ln V
    var: np.ndarray    # (n,) residual variance, (mg/L)^2


def course(times, doses: tuple[np.ndarray, np.ndarray, np.ndarray], clearance: float,
           volume: float, additive: float, proportional: float) -> Course:
    """Mean, sensitivities and residual variance at ``times`` (any order)."""
    t = np.asarray(times, float)
    start, amount, duration = doses
    f, grad = model.concentration_and_gradient(t, start, amount, duration, clearance, volume)
    var = additive**2 + (proportional * f) ** 2
    return Course(f, grad.T.copy(), var)


def individual_information(c: Course, prior_cov: np.ndarray | None = None) -> np.ndarray:
    """``F' S^-1 F`` (plus ``Omega^-1`` with a prior): 2 x 2."""
    w = 1.0 / np.maximum(c.var, 1e-300)
    m = c.F.T @ (c.F * w[:, None])
    if prior_cov is not None:
        m = m + np.linalg.inv(prior_cov)
    return m


def population_parameters(omega: np.ndarray, additive: float, proportional: float
                          ) -> list[str]:
    """Names of the population model's parameters, in the information's order."""
    names = ["clearance", "volume", "variance_clearance", "variance_volume"]
    if omega[0, 1] != 0.0:
        names.append("covariance")
    if additive > 0:
        names.append("residual_additive")
    if proportional > 0:
        names.append("residual_proportional")
    return names


def population_information(c: Course, omega: np.ndarray, additive: float,
                           proportional: float) -> np.ndarray:
    """One subject's first-order population information (block-diagonal), p x p in the
    order of :func:`population_parameters`."""
    return population_information_batch(c.f[None], c.F[None], c.var[None], omega,
                                        additive, proportional)[0]


def population_information_batch(f: np.ndarray, F: np.ndarray, var: np.ndarray,
                                 omega: np.ndarray, additive: float, proportional: float
                                 ) -> np.ndarray:
    """:func:`population_information` of k schedules at once: ``f``, ``var`` (k, n),
    ``F`` (k, n, 2); returns (k, p, p)."""
    k, n = f.shape
    V = np.einsum("kia,ab,kjb->kij", F, omega, F)
    V[:, np.arange(n), np.arange(n)] += var
    Vi = np.linalg.inv(V)
    fixed = np.einsum("kia,kij,kjb->kab", F, Vi, F)
    f1, f2 = F[:, :, 0], F[:, :, 1]
    dV = [f1[:, :, None] * f1[:, None, :], f2[:, :, None] * f2[:, None, :]]
    if omega[0, 1] != 0.0:
        cross = f1[:, :, None] * f2[:, None, :]
        dV.append(cross + np.swapaxes(cross, 1, 2))
    if additive > 0:
        dV.append(np.broadcast_to(np.eye(n), (k, n, n)))
    if proportional > 0:
        eye = np.zeros((k, n, n))
        eye[:, np.arange(n), np.arange(n)] = f**2
        dV.append(eye)
    A = [Vi @ d for d in dV]
    q = len(A)
    out = np.zeros((k, 2 + q, 2 + q))
    out[:, :2, :2] = fixed
    for i in range(q):
        for j in range(i, q):
            out[:, 2 + i, 2 + j] = out[:, 2 + j, 2 + i] = \
                0.5 * np.einsum("kab,kba->k", A[i], A[j])
    return out


#: Information whose scaled form (unit diagonal) has a smallest eigenvalue below this
#: counts as singular: some parameter combination is not identified.
SINGULAR = 1e-10


def log_det(m: np.ndarray) -> float:
    """``ln det M`` (``-inf`` when M is singular, judged on its scaled form so that
    rounding does not pass for information)."""
    d = np.diag(m)
    if not np.all(d > 0) or not np.all(np.isfinite(m)):
        return -np.inf
    s = 1.0 / np.sqrt(d)
    scaled = m * s[:, None] * s[None, :]
    if np.linalg.eigvalsh(scaled)[0] < SINGULAR:
        return -np.inf
    sign, value = np.linalg.slogdet(m)
    return float(value) if sign > 0 and np.isfinite(value) else -np.inf


def rse_percent(m: np.ndarray) -> np.ndarray | None:
    """``100 sqrt(diag(M^-1))`` (None when M cannot be inverted)."""
    if not np.isfinite(log_det(m)):
        return None
    try:
        cov = np.linalg.inv(m)
    except np.linalg.LinAlgError:
        return None
    d = np.diag(cov)
    if np.any(d < 0):
        return None
    return 100.0 * np.sqrt(d)
