"""Population estimates by maximum marginal likelihood.

The model: ``ln theta_i = mu_i(beta) + eta_i`` with ``theta = (CL, V)``,
``eta_i ~ N(0, Omega)`` (full 2 x 2 or diagonal), ``mu_i`` the typical values
with covariate effects (:mod:`pkcalc.population.covariates`), and the levels
``y_ij ~ N(f_ij, sa^2 + sp^2 f_ij^2)`` (additive, proportional, combined error;
BLQ levels by Beal's M3, ``P(y < LLOQ)``).  Each subject's deviations are
integrated out::

    L_i = integral p(y_i | eta) p(eta) d eta

With ``h(eta) = -2 ln[p(y_i | eta) p(eta)]``, its minimum ``eta^`` (the
conditional mode: the MAP estimate of :mod:`pkcalc.fit`) and ``H`` its Hessian
there (exact: :func:`pkcalc.fit.objective.exact_hessian`):

- **Laplace**: ``-2 ln L_i = h(eta^) - q ln(2 pi) + ln|H / 2|``
  (Tierney & Kadane, JASA 1986;81:82 -- from memory);
- **adaptive Gauss-Hermite quadrature** with ``n`` nodes per dimension:
  ``eta_k = eta^ + sqrt(2) B x_k`` with ``B B' = (H/2)^-1`` and ``x_k, w_k`` the
  Gauss-Hermite nodes and weights, ``L_i = 2^(q/2) |B| sum_k w_k e^(x_k'x_k)
  e^(-h(eta_k)/2)`` (Pinheiro & Bates, JCGS 1995;4:12 -- from memory); one node
  is the Laplace approximation.

The outer parameters -- ``beta``, the Cholesky factor of ``Omega`` (log
diagonal, off-diagonal) and the log residual SDs -- maximise the summed
likelihood by L-BFGS-B on gradients by the implicit function theorem (each mode
moved along ``-H^-1 dG/dpsi``, :meth:`MarginalProblem.gradient`); the inner modes
are found by Newton steps on the exact Hessian (the damped solver of
:mod:`pkcalc.fit`), warm-started.  The
standard errors invert the observed information, ``2 x`` the inverse of the
Hessian of ``-2 ln L`` by central differences.
"""

from __future__ import annotations

import functools
import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field, replace

import numpy as np

from ..core import FitOptions, SubjectData
from ..fit.data import prepare_batch
from ..fit.objective import Batch, exact_hessian, positive_definite, structural
from ..fit.solver import minimise
from . import quadrature
from .covariates import Design
from .gradient import GRAD_STEP, gradient_at_modes, tangent_gradient
from .quadrature import LOG_2PI, at_nodes, gauss_hermite, laplace, log_integral

__all__ = ["GRAD_STEP", "MarginalFit", "MarginalProblem", "gauss_hermite", "laplace",
           "log_integral"]

#: Central-difference steps (log-parameters) for the Hessian of the standard errors:
#: of the gradient at the modes, and (where that does not apply) of the objective.
HESS_GRAD_STEP = 1e-3
HESS_STEP = 2e-3
#: Largest gradient of -2 ln L at which the optimiser's "success" is not believed.
GRADIENT_DISAGREES = 1.0
#: The outer optimiser stops when no component of the gradient of -2 ln L (projected on
#: the bounds) exceeds this.
OUTER_GTOL = 1e-4
#: Largest move (log-parameters) of a mode's warm start along its tangent.
WARM_MOVE = 0.5
#: Condition number of the information (correlation form) above which the covariance
#: step warns that the estimates are nearly confounded (common practice: 1e3 is a
#: warning sign, 1e6 a failure; we warn from 1e4).
CONDITION_WARN = 1e4


@dataclass
class MarginalFit:
    """The optimum of one model (see :class:`MarginalProblem`)."""

    psi: np.ndarray
    objective: float
    converged: bool
    message: str
    iterations: int
    evaluations: int
    covariance: np.ndarray | None
    correlation: np.ndarray | None
    condition_number: float | None
    warnings: list[str]
    theta: np.ndarray              # conditional modes (N, 2): ln CL_i, ln V_i
    posterior: np.ndarray          # (N, 2, 2)
    seconds: float
    history: list[float] = field(default_factory=list)   # -2 ln L after each iteration


class MarginalProblem:
    """The marginal likelihood of one population model on one set of subjects.

    Parameters
    ----------
    subjects : list of SubjectData
    design : Design
        Covariate effects (the mean function).
    error_model, blq : str
    nodes : int
        Gauss-Hermite nodes per dimension (1 = Laplace).
    diagonal : bool
        Between-subject covariance without the correlation.
    """

    def __init__(self, subjects: list[SubjectData], design: Design, *, error_model: str,
                 blq: str, nodes: int = 1, diagonal: bool = False,
                 batch: Batch | None = None) -> None:
        if batch is None:
            batch, _, _ = prepare_batch(subjects, FitOptions(error_model=error_model,
                                                             blq=blq))
        n_used = batch.n_obs
        self.batch = batch
        self.subjects = subjects
        self.design = design
        self.error = error_model
        self.nodes = nodes
        self.diagonal = diagonal
        self.n = batch.t.shape[0]
        self.n_levels = int(n_used.sum())
        self.n_omega = 2 if diagonal else 3
        self.n_error = 2 if error_model == "combined" else 1
        self.theta: np.ndarray | None = None       # warm-start modes (N, 2)
        self.evaluations = 0
        self._grid = gauss_hermite(nodes, 2)[0] if nodes > 1 else None

    # ------------------------------------------------------------------ parameters
    @property
    def n_params(self) -> int:
        return self.design.n_beta + self.n_omega + self.n_error

    def names(self) -> list[str]:
        omega = ["ln SD of ln clearance", "ln SD of ln volume"]
        if not self.diagonal:  # the factor L of Omega = L L': say what each number is
            omega = ["ln SD of ln clearance",
                     "ln SD of ln volume not explained by ln clearance",
                     "covariance of ln CL and ln V / SD of ln CL"]
        err = {"additive": ["ln additive SD"], "proportional": ["ln proportional SD"],
               "combined": ["ln additive SD", "ln proportional SD"]}[self.error]
        return self.design.names + omega + err

    def unpack(self, psi: np.ndarray):
        """``beta``, ``Omega``, ``sa``, ``sp`` from the outer parameter vector."""
        k = self.design.n_beta
        beta = psi[:k]
        l11, l22 = math.exp(psi[k]), math.exp(psi[k + 1])
        l21 = 0.0 if self.diagonal else float(psi[k + 2])
        chol = np.array([[l11, 0.0], [l21, l22]])
        omega = chol @ chol.T
        e = psi[k + self.n_omega:]
        sa = math.exp(e[0]) if self.error in ("additive", "combined") else 0.0
        sp = math.exp(e[-1]) if self.error in ("proportional", "combined") else 0.0
        return beta, omega, sa, sp

    def pack(self, beta, omega, sa: float, sp: float) -> np.ndarray:
        chol = np.linalg.cholesky(omega if not self.diagonal
                                  else np.diag(np.diag(omega)))
        om = [math.log(chol[0, 0]), math.log(chol[1, 1])] + ([] if self.diagonal
                                                             else [chol[1, 0]])
        la, lp = math.log(max(sa, 1e-12)), math.log(max(sp, 1e-12))
        err = {"additive": [la], "proportional": [lp], "combined": [la, lp]}[self.error]
        return np.concatenate([np.asarray(beta, float), om, err])

    def upper_bounds(self) -> np.ndarray:
        """Ceilings that keep the search in numbers: between-subject SDs of at most 3
        (log scale; CV about 9,000 %), a Cholesky term within +-10, residual SDs of at
        most 100 times the median level (additive) and 1,000 % (proportional)."""
        upper = np.full(self.n_params, np.inf)
        k = self.design.n_beta
        upper[k:k + 2] = math.log(3.0)
        if not self.diagonal:
            upper[k + 2] = 10.0
        ymed = float(np.median(self.batch.y[self.batch.obs])) if self.batch.obs.any() else 1.0
        e = k + self.n_omega
        ceil = {"additive": [math.log(100 * ymed)], "proportional": [math.log(10.0)],
                "combined": [math.log(100 * ymed), math.log(10.0)]}[self.error]
        upper[e:] = ceil
        return upper

    def lower_bounds(self) -> np.ndarray:
        """Floors of the outer parameters: between-subject SDs of at least 0.01 (log
        scale), residual SDs of at least 1e-4 of the median level (additive) and 0.1 %
        (proportional), so a component the data do not support ends at its floor."""
        lower = np.full(self.n_params, -np.inf)
        k = self.design.n_beta
        lower[k:k + 2] = math.log(0.01)
        ymed = float(np.median(self.batch.y[self.batch.obs])) if self.batch.obs.any() else 1.0
        e = k + self.n_omega
        floors = {"additive": [math.log(1e-4 * ymed)], "proportional": [math.log(1e-3)],
                  "combined": [math.log(1e-4 * ymed), math.log(1e-3)]}[self.error]
        lower[e:] = floors
        if not self.diagonal:
            lower[k + 2] = -10.0
        return lower

    # ------------------------------------------------------------------ the likelihood
    def _map_batch(self, mu, omega, sa, sp) -> Batch:
        oi = np.linalg.inv(omega)
        return replace(self.batch, kind="map", mu=mu, omega_inv=np.repeat(oi[None], self.n, 0),
                       sa=np.full(self.n, sa), sp=np.full(self.n, sp),
                       geometry=self.batch.geometry)

    def _modes(self, b: Batch, mu: np.ndarray, both: bool, warm: np.ndarray | None = None):
        """Conditional modes: from the warm start (and the typical values when ``both``
        or there is no warm start), the better end point kept.  ``b`` may hold every
        subject several times (one row per subject and outer parameter vector): ``mu``
        and ``warm`` are then per row."""
        n = b.t.shape[0]
        warm = warm if warm is not None else self.theta
        starts = [warm, mu] if (both or warm is None) else [warm]
        starts = [mu if s is None else s for s in starts]
        m = len(starts)
        bm = b if m == 1 else b.repeat(m)

        def fun(th, idx):
            rows = bm if idx.size == bm.t.shape[0] else bm.rows(idx)
            obj, grad, hess, info = exact_hessian(rows, th)
            exact = positive_definite(hess)
            return obj, grad, np.where(exact[:, None, None], hess, info), exact

        theta0 = np.stack(starts, axis=1).reshape(n * m, 2)
        sol = minimise(fun, theta0, tol=1e-10, xtol=1e-5)
        obj = np.where(np.isfinite(sol.obj), sol.obj, np.inf).reshape(n, m)
        pick = np.arange(n) * m + np.argmin(obj, axis=1)
        return self._polish(sol.theta[pick], sol.grad[pick], sol.info[pick],
                            sol.extra[pick])

    @staticmethod
    def _polish(theta: np.ndarray, grad: np.ndarray, hess: np.ndarray,
                exact: np.ndarray) -> np.ndarray:
        """One more Newton step on the exact Hessian at the solver's end point (where it
        is positive definite and the step small): the likelihood needs the modes to many
        digits, so that it is smooth in the outer parameters."""
        if not exact.any():
            return theta
        step = np.zeros_like(theta)
        step[exact] = np.linalg.solve(hess[exact], grad[exact][..., None])[..., 0]
        small = np.abs(step).max(axis=1) < 0.1          # only a polish near the mode
        return np.where((exact & small)[:, None], theta - step, theta)

    def _warm(self, psis: np.ndarray) -> np.ndarray | None:
        """Warm starts of the modes under the outer vectors ``psis`` (P, p), one row per
        subject and vector (row ``i P + j``): the current modes moved along their tangent
        ``d theta^/d psi`` (kept by the gradient at those modes,
        :func:`~pkcalc.population.gradient.gradient_at_modes`) to each vector -- the
        first-order prediction of the new mode, so the inner solve starts nearer its end
        (the mode it ends at is the same: it is solved to the same tolerance).  A move
        larger than :data:`WARM_MOVE` in either log-parameter is not taken (the tangent is
        local); the plain current modes where no tangent belongs to them.  Only the
        optimiser's path uses it (:meth:`subject_terms`): the standard errors' shifted
        points start from the current modes, so that they do not depend on whether a
        tangent was kept (on Dask workers the modes set from the client have none)."""
        theta = self.theta
        if theta is None:
            return None
        kept = self.__dict__.get("_moving")
        if kept is None or kept[1] is not theta:
            return theta if len(psis) == 1 else np.repeat(theta, len(psis), axis=0)
        move = np.einsum("npa,kp->nka", kept[2], psis - kept[0])          # (N, P, 2)
        near = np.all(np.abs(move) <= WARM_MOVE, axis=2, keepdims=True)
        return (theta[:, None, :] + np.where(near, move, 0.0)).reshape(-1, 2)

    def keep_tangent(self, psi: np.ndarray, theta: np.ndarray, tangent: np.ndarray) -> None:
        """Keep ``d theta^/d psi`` (N, p, 2) at the modes ``theta`` of ``psi``: when the
        optimiser accepts ``psi`` (:meth:`accept`) the warm starts of :meth:`_warm` move
        along it (while ``theta`` stays the current modes)."""
        self._tangent = (np.array(psi, float), theta, tangent)

    def subject_terms(self, psi: np.ndarray, *, update: bool = True, both: bool = False):
        """Every subject's ``-2 ln L_i``, conditional modes and posterior covariances."""
        self.evaluations += 1
        beta, omega, sa, sp = self.unpack(psi)
        mu = self.design.means(beta)
        if not np.all(np.isfinite(mu)) or (self.error != "proportional" and sa <= 0):
            return np.full(self.n, np.inf), None, None
        b = self._map_batch(mu, omega, sa, sp)
        logdet_omega = np.full(self.n, float(np.linalg.slogdet(omega)[1]))
        m2ll, theta, post = self._terms(b, mu, logdet_omega, both,
                                        self._warm(np.asarray(psi, float)[None]), keep=True)
        self._last = (np.array(psi, float), theta, m2ll)
        if update:
            self.theta = theta
            self._moving = None
        return m2ll, theta, post

    def _terms(self, b: Batch, mu: np.ndarray, logdet_omega: np.ndarray, both: bool,
               warm: np.ndarray | None, *, keep: bool = False):
        """``-2 ln L`` of every row of ``b`` (a subject under one outer parameter vector),
        with its conditional mode and posterior covariance."""
        theta = self._modes(b, mu, both, warm)
        m2ll, post = self._at_modes(b, theta, logdet_omega, keep=keep)
        return m2ll, theta, post

    def _at_modes(self, b: Batch, theta: np.ndarray, logdet_omega: np.ndarray, *,
                  keep: bool = False):
        """The Laplace or quadrature ``-2 ln L`` of every row of ``b`` centred at
        ``theta`` (the conditional modes; no solve here), and the posterior covariance.
        With ``keep`` (the rows are the subjects under one vector) the quadrature nodes
        and the model's predictions there are kept for the gradient at that point."""
        pred = structural(b, theta, second=True)
        if keep:                    # the model at the modes, for the gradient there
            self._mode_kept = (theta, pred)
        g, _, hess, info = exact_hessian(b, theta, predictions=pred)
        # where the Hessian is not positive definite: the scoring matrix
        half = 0.5 * np.where(positive_definite(hess)[:, None, None], hess, info)
        post = np.linalg.inv(half)
        if self.nodes == 1:
            m2ll = laplace(g + logdet_omega + 2 * LOG_2PI, half)
        else:
            chol = np.linalg.cholesky(post)
            pts = theta[:, None, :] + math.sqrt(2.0) * np.einsum("bij,kj->bki", chol,
                                                                   self._grid)
            h_nodes, kept = at_nodes(b, pts, keep=True) if keep else (at_nodes(b, pts), None)
            h_nodes = h_nodes + logdet_omega[:, None] + 2 * LOG_2PI
            if keep:
                self._nodes_kept = None if kept is None else (theta, pts, kept)
            m2ll = log_integral(h_nodes, chol, self.nodes)
        return m2ll, post

    def objectives(self, psis: np.ndarray) -> np.ndarray:
        """The summed ``-2 ln L`` at several outer parameter vectors, from the current
        modes (not updated); ``inf`` where a vector cannot be used."""
        parts = self.objective_parts(psis)
        total = parts.sum(axis=0)
        return np.where(np.isfinite(total), total, np.inf)

    def objective_parts(self, psis: np.ndarray) -> np.ndarray:
        """Every subject's ``-2 ln L`` (N, P) at several outer parameter vectors, from the
        current modes (not updated): every subject under every vector is one row of a
        single vectorised inner solve (the rows stay independent problems), in blocks of
        vectors that keep each evaluation within ``quadrature.CELL_BLOCK`` cells."""
        psis = np.atleast_2d(np.asarray(psis, float))
        if self.theta is None:
            return np.stack([self.subject_terms(p, update=False)[0] for p in psis], axis=1)
        per = self._vectors_per_block()
        return np.concatenate([self._objective_parts(psis[i:i + per])
                               for i in range(0, len(psis), per)], axis=1)

    def _vectors_per_block(self) -> int:
        """Outer parameter vectors whose rows (every subject, x 2 for the Hessian's
        shifted points) fit in ``quadrature.CELL_BLOCK`` cells; at least one."""
        cells = self.batch.cells_per_row
        return max(1, quadrature.CELL_BLOCK // (2 * self.n * cells))

    def _objective_parts(self, psis: np.ndarray) -> np.ndarray:
        n, p_count = self.n, len(psis)
        self.evaluations += p_count
        b, mu, logdet, usable = self._rows(psis)
        warm = np.repeat(self.theta, p_count, axis=0)
        m2ll, _, _ = self._terms(b, mu, logdet, False, warm)
        parts = m2ll.reshape(n, p_count)
        return np.where(usable[None, :], parts, np.inf)

    def _rows(self, psis: np.ndarray):
        """Every subject under every outer parameter vector (row ``i P + j``): the batch,
        the typical values and ``ln|Omega|`` per row, and which vectors are usable."""
        n, p_count = self.n, len(psis)
        mu, oinv, logdet, sa, sp = self.unpack_many(psis)
        usable = np.isfinite(mu).all(axis=(0, 2))
        if self.error != "proportional":
            usable &= sa > 0
        mu[:, ~usable] = 0.0
        sa, sp = np.where(usable, sa, 1.0), np.where(usable, sp, 1.0)
        base = self._repeated(p_count)
        b = replace(base, kind="map", mu=mu.reshape(n * p_count, 2),
                    omega_inv=np.broadcast_to(oinv[None], (n, p_count, 2, 2)).reshape(-1, 2, 2),
                    sa=np.tile(sa, n), sp=np.tile(sp, n))
        return b, mu.reshape(-1, 2), np.tile(logdet, n), usable

    def unpack_many(self, psis: np.ndarray):
        """The typical values (N, V, 2), ``Omega^-1`` (V, 2, 2), ``ln|Omega|``, ``sa`` and
        ``sp`` (V,) of several outer parameter vectors (V, p) at once; ``Omega = L L'``
        with ``L = [[e^a, 0], [c, e^b]]``, so ``ln|Omega| = 2 (a + b)``."""
        psis = np.atleast_2d(np.asarray(psis, float))
        k = self.design.n_beta
        mu = self.design.means_many(psis[:, :k])
        l11, l22 = np.exp(psis[:, k]), np.exp(psis[:, k + 1])
        l21 = np.zeros(len(psis)) if self.diagonal else psis[:, k + 2]
        w11, w12, w22 = l11 * l11, l11 * l21, l21 * l21 + l22 * l22
        det = (l11 * l22) ** 2
        oinv = np.stack([np.stack([w22, -w12], -1), np.stack([-w12, w11], -1)], -2) \
            / det[:, None, None]
        logdet = 2.0 * (psis[:, k] + psis[:, k + 1])
        e = psis[:, k + self.n_omega:]
        zero = np.zeros(len(psis))
        sa = np.exp(e[:, 0]) if self.error in ("additive", "combined") else zero
        sp = np.exp(e[:, -1]) if self.error in ("proportional", "combined") else zero
        return mu, oinv, logdet, sa, sp

    def _repeated(self, count: int) -> Batch:
        """The subjects' batch with every row repeated ``count`` times (the last few
        kept for reuse)."""
        cache = self.__dict__.setdefault("_repeat_cache", {})
        if count not in cache:
            if len(cache) >= 4:
                cache.pop(next(iter(cache)))
            cache[count] = self.batch.repeat(count) if count > 1 else self.batch
        return cache[count]

    def objective(self, psi: np.ndarray, *, update: bool = False) -> float:
        m2ll, _, _ = self.subject_terms(psi, update=update)
        total = float(np.sum(m2ll))
        return total if math.isfinite(total) else math.inf

    def gradient(self, psi: np.ndarray) -> np.ndarray:
        """Gradient of the summed ``-2 ln L`` by the implicit function theorem: the sum of
        :meth:`gradient_parts` (or, where a subject's Hessian is not positive definite,
        of :meth:`tangent_parts`) over the subjects in their order."""
        psi = np.asarray(psi, float)
        parts = self.gradient_parts(psi)
        if parts is None:
            if self._modes_at(psi) is None:            # no modes: the objective is infinite
                return self.gradient_by_differences(psi)
            parts = self.tangent_parts(psi)
        self.evaluations += 2 * psi.size
        return parts.sum(axis=0)

    def gradient_by_differences(self, psi: np.ndarray) -> np.ndarray:
        """Central differences of the objective, every mode solved again (from the
        current warm start): the reference the implicit-function gradient is checked
        against; the ``2 p`` shifted objectives are solved together."""
        p = psi.size
        e = np.eye(p) * GRAD_STEP
        f = self.objectives(np.concatenate([psi + e, psi - e]))
        up, dn = f[:p], f[p:]
        ok = np.isfinite(up) & np.isfinite(dn)
        return np.where(ok, (up - dn) / (2 * GRAD_STEP), 0.0)

    def value_and_gradient(self, psi: np.ndarray) -> tuple[float, np.ndarray]:
        """The summed ``-2 ln L`` and its gradient at ``psi`` (the modes solved once)."""
        psi = np.asarray(psi, float)
        m2ll, parts = self.value_and_gradient_parts(psi)
        total = float(np.sum(m2ll))
        if not math.isfinite(total):
            return math.inf, np.zeros(psi.size)
        if parts is None:
            parts = self.tangent_parts(psi)
        self.evaluations += 2 * psi.size
        return total, parts.sum(axis=0)

    # -- what a shard of the subjects answers (pkcalc.population.shards) --------------
    def value_and_gradient_parts(self, psi: np.ndarray):
        """Every subject's ``-2 ln L`` and gradient row at ``psi`` (the gradient None where
        :meth:`gradient_parts` does not apply); the modes are kept for :meth:`accept`."""
        m2ll, _, _ = self.subject_terms(psi, update=False)
        if not np.all(np.isfinite(m2ll)):
            return m2ll, np.zeros((self.n, psi.size))
        return m2ll, self.gradient_parts(psi)

    def gradient_parts(self, psi: np.ndarray) -> np.ndarray | None:
        """Every subject's gradient row (N, p) from derivatives at its mode
        (:func:`~pkcalc.population.gradient.gradient_at_modes`); None where a Hessian is
        not positive definite or a shifted vector cannot be used."""
        theta = self._modes_at(psi)
        if theta is None:
            return None
        return gradient_at_modes(self, psi, theta, per_subject=True)

    def tangent_parts(self, psi: np.ndarray) -> np.ndarray:
        """Every subject's gradient row by central differences along the tangent of its
        mode (:func:`~pkcalc.population.gradient.tangent_gradient`)."""
        theta = self._modes_at(psi)
        if theta is None:                  # the objective is infinite at psi: no direction
            return np.zeros((self.n, psi.size))
        return tangent_gradient(self, psi, theta)

    def accept(self, psi: np.ndarray) -> bool:
        """Move the warm start to the modes of the last evaluation when it was at ``psi``
        (the optimiser's accepted point); False when there is none."""
        last = self.__dict__.get("_last")
        if last is not None and np.array_equal(last[0], psi) and last[1] is not None:
            self.theta = last[1]
            kept = self.__dict__.get("_tangent")
            self._moving = kept if kept is not None and kept[1] is last[1] else None
            return True
        return False

    def hessian_gradient_parts(self, psi: np.ndarray) -> np.ndarray | None:
        """Every subject's gradient rows at ``psi +- HESS_GRAD_STEP e_j`` (2p, N, p), the
        modes of the shifted points solved together from the current modes; None where
        the gradient at the modes does not apply."""
        if self.theta is None:
            return None
        p = psi.size
        h = HESS_GRAD_STEP
        points = np.concatenate([psi + h * np.eye(p), psi - h * np.eye(p)])
        out = []
        for x, m in zip(points, self._modes_many(points), strict=True):
            g = None if m is None else gradient_at_modes(self, x, m, per_subject=True)
            if g is None:
                return None
            out.append(g)
        return np.array(out)

    def set_modes(self, theta: np.ndarray | None) -> None:
        """Set the warm-start modes (a shard's slice, from the client)."""
        self.theta = theta

    def subject_terms_plain(self, psi: np.ndarray, update: bool = True, both: bool = False):
        """:meth:`subject_terms` with positional options (what a shard is asked)."""
        return self.subject_terms(psi, update=update, both=both)

    # ------------------------------------------------------------------------------------
    def _modes_at(self, psi: np.ndarray) -> np.ndarray | None:
        """The conditional modes at ``psi``: those of the last evaluation when it was at
        ``psi`` (the optimiser asks for the value, then the gradient), else solved."""
        last = self.__dict__.get("_last")
        if last is not None and np.array_equal(last[0], psi):
            return last[1]
        _, theta, _ = self.subject_terms(psi, update=False)
        return theta

    def hessian(self, psi: np.ndarray) -> np.ndarray:
        """Hessian of the summed ``-2 ln L``: central differences of the gradient at the
        modes (:meth:`hessian_gradient_parts`, summed over the subjects in their order),
        or, where that gradient does not apply, second central differences of the
        objective (:meth:`hessian_by_differences`)."""
        psi = np.asarray(psi, float)
        p = psi.size
        parts = self.hessian_gradient_parts(psi)
        if parts is not None:
            g = parts.sum(axis=1)
            hess = (g[:p] - g[p:]).T / (2 * HESS_GRAD_STEP)
            return 0.5 * (hess + hess.T)
        return self.hessian_by_differences(psi)

    def _modes_many(self, psis: np.ndarray) -> list[np.ndarray | None]:
        """The conditional modes at several outer vectors (one vectorised solve from the
        current modes); None for a vector that cannot be used."""
        n, count = self.n, len(psis)
        b, mu, _, usable = self._rows(psis)
        theta = self._modes(b, mu, False, np.repeat(self.theta, count, axis=0))
        theta = theta.reshape(n, count, 2)
        return [theta[:, j] if usable[j] else None for j in range(count)]

    def hessian_by_differences(self, psi: np.ndarray) -> np.ndarray:
        """Hessian of the summed ``-2 ln L`` by second central differences (every shifted
        point solved together, :meth:`objectives`)."""
        p = psi.size
        h = HESS_STEP
        e = np.eye(p) * h
        pairs = [(j, k) for j in range(p) for k in range(j)]
        points = [psi, *(psi + e[j] for j in range(p)), *(psi - e[j] for j in range(p))]
        for j, k in pairs:
            points += [psi + e[j] + e[k], psi + e[j] - e[k], psi - e[j] + e[k],
                       psi - e[j] - e[k]]
        f = self.objectives(np.array(points))
        f0, fp, fm = f[0], f[1:p + 1], f[p + 1:2 * p + 1]
        hess = np.empty((p, p))
        for j in range(p):
            hess[j, j] = (fp[j] - 2 * f0 + fm[j]) / h**2
        for i, (j, k) in enumerate(pairs):
            a, b, c, d = f[2 * p + 1 + 4 * i: 2 * p + 5 + 4 * i]
            hess[j, k] = hess[k, j] = (a - b - c + d) / (4 * h * h)
        return hess

    # ------------------------------------------------------------------ the optimum
    def fit(self, psi0: np.ndarray, *, progress: Callable[[str], None] | None = None,
            covariance: bool = True, max_iter: int = 300,
            reference: tuple[np.ndarray, float] | None = None) -> MarginalFit:
        """Maximise the marginal likelihood from ``psi0``; then the covariance step.

        ``reference``: the optimum ``(psi, -2 ln L)`` reached from another start; this
        start stops when it comes within 0.01 of it in every parameter and 1e-3 in
        ``-2 ln L`` (it has reached the same optimum).
        """
        from scipy.optimize import minimize

        t0 = time.perf_counter()
        self.theta = None
        state = {"it": 0}
        history: list[float] = []

        seen: dict[str, tuple] = {}
        lower, upper = self.lower_bounds(), self.upper_bounds()
        psi0 = np.clip(psi0, lower + 1e-3, upper - 1e-3)
        self.subject_terms(psi0, update=True, both=True)
        value0, grad0, scale = self._start_and_scale(psi0)

        def fun(z):
            psi = psi0 + scale * z
            if not np.any(z):                          # the start, evaluated above
                value, grad = value0, grad0
            else:
                value, grad = self.value_and_gradient(psi)
            seen["last"] = (psi, value, grad)
            return value, grad * scale

        def callback(z):
            psi = psi0 + scale * z
            state["it"] += 1
            last = seen.get("last")
            if last is not None and np.array_equal(last[0], psi) and self.accept(psi):
                value = last[1]                         # the warm start moved along
            else:
                value = self.objective(psi, update=True)
            history.append(float(value))
            if progress is not None:
                progress(f"iteration {state['it']}: -2 ln L {value:.4f}")
            if reference is not None and abs(value - reference[1]) < 1e-3 and \
                    np.max(np.abs(psi - reference[0])) < 0.01:
                state["reached"] = True
                raise StopIteration
            if last is not None and np.array_equal(last[0], psi) and \
                    _projected(last[2], psi, lower, upper) <= OUTER_GTOL:
                state["small"] = True               # the stop, on the unscaled gradient
                raise StopIteration

        bounds = [((lo - p0) / sc if math.isfinite(lo) else None,
                   (hi - p0) / sc if math.isfinite(hi) else None)
                  for lo, hi, p0, sc in zip(lower, upper, psi0, scale, strict=True)]
        with _one_blas_thread():
            res = minimize(fun, np.zeros_like(psi0), jac=True, method="L-BFGS-B",
                           callback=callback, bounds=bounds,
                           options={"gtol": 0.0, "ftol": 1e-12, "maxiter": max_iter})
        res.x = psi0 + scale * np.asarray(res.x, float)
        if state.get("small"):
            res.success = True
        psi = np.asarray(res.x, float)
        m2ll, theta, post = self.subject_terms(psi, update=True, both=True)
        value = float(np.sum(m2ll))
        grad = self.gradient(psi)
        gmax = _projected(grad, psi, lower, upper, near=1e-6)   # a bound pushed on: 0
        # the optimiser's own success counts only where the gradient agrees: a line search
        # that cannot move (every trial step infinite) can end "successfully" far from it
        success = bool(res.success) and gmax < GRADIENT_DISAGREES
        converged = success or gmax < 0.05 or bool(state.get("reached"))
        message = "converged" if success else (
            "reached the optimum of the first start" if state.get("reached") else
            f"stopped ({str(res.message).strip().rstrip('.')}); largest gradient {gmax:.2g}")
        warnings: list[str] = []
        names = self.names()
        for j in np.flatnonzero(psi <= lower + 1e-6):
            warnings.append(f"'{names[j]}' is at its lower bound: the data do not support "
                            "that component (consider a simpler model)")
        cov = corr = cond = None
        if covariance and math.isfinite(value):
            cov, corr, cond, warn = self._covariance(psi)
            warnings += warn
        return MarginalFit(psi, value, converged and math.isfinite(value), message,
                           int(res.nit), self.evaluations, cov, corr, cond, warnings, theta,
                           post, time.perf_counter() - t0, history)

    def _start_and_scale(self, psi0: np.ndarray):
        """The objective and gradient at the start, and a scale for each outer parameter:
        ``1 / sqrt`` of the diagonal of the cross-product of the subjects' gradients
        (the BHHH information, Berndt et al., Ann Econ Soc Meas 1974;3:653 -- from
        memory), so that the optimiser starts from steps of the right size in every
        direction; 1 where the subjects' gradients are not available."""
        m2ll, parts = self.value_and_gradient_parts(psi0)
        value = float(np.sum(m2ll))
        if not math.isfinite(value):
            return math.inf, np.zeros(psi0.size), np.ones(psi0.size)
        scale = np.ones(psi0.size)
        if parts is None:
            parts = self.tangent_parts(psi0)
        else:
            info = 0.5 * np.einsum("np,np->p", parts, parts)
            ok = np.isfinite(info) & (info > 0)
            scale[ok] = np.clip(1.0 / np.sqrt(info[ok]), 1e-2, 1e2)
        self.evaluations += 2 * psi0.size
        return value, parts.sum(axis=0), scale

    def _covariance(self, psi: np.ndarray):
        """Covariance of the outer parameters from the observed information."""
        hess = self.hessian(psi)
        hess = 0.5 * (hess + hess.T)
        info = 0.5 * hess
        d = np.sqrt(np.abs(np.diag(info)))
        warnings = []
        if not np.all(np.isfinite(info)) or np.any(d == 0):
            return None, None, None, ["the information matrix is not finite or has a zero "
                                      "row: no standard errors"]
        scaled = info / np.outer(d, d)
        eig = np.linalg.eigvalsh(scaled)
        cond = float(eig.max() / eig.min()) if eig.min() > 0 else math.inf
        if eig.min() <= 1e-10:
            vec = np.linalg.eigh(scaled)[1][:, 0]     # direction the data do not see
            weak = self.names()[int(np.argmax(np.abs(vec)))]
            return None, None, cond, [
                f"the information matrix is singular (smallest eigenvalue {eig.min():.2g} in "
                f"correlation form): the data do not determine every parameter (look at "
                f"'{weak}'); no standard errors"]
        cov = np.linalg.inv(info)
        sd = np.sqrt(np.diag(cov))
        corr = cov / np.outer(sd, sd)
        if cond > CONDITION_WARN:
            warnings.append(f"the information matrix is ill-conditioned (condition number "
                            f"{cond:.3g} in correlation form): some estimates are nearly "
                            "confounded and their standard errors unreliable")
        return cov, corr, cond, warnings


def _projected(grad: np.ndarray, psi: np.ndarray, lower: np.ndarray, upper: np.ndarray,
               near: float = 1e-9) -> float:
    """Largest component of the gradient projected on the box: a component within
    ``near (1 + |psi|)`` of a bound that points out of the box counts as 0."""
    near = near * (1.0 + np.abs(psi))
    held = ((psi <= lower + near) & (grad > 0)) | ((psi >= upper - near) & (grad < 0))
    return float(np.max(np.abs(np.where(held, 0.0, grad)), initial=0.0))


@functools.cache
def _blas_controller():
    """threadpoolctl's view of the BLAS libraries loaded by now (numpy's and scipy's),
    found once."""
    from threadpoolctl import ThreadpoolController

    return ThreadpoolController()


def _one_blas_thread():
    """A context in which the BLAS libraries run on one thread.

    scipy's L-BFGS-B calls BLAS routines that OpenBLAS hands to a second thread, which
    then busy-waits between the calls: a whole core spent for as long as the outer
    optimiser runs (measured on two cores: user time twice the wall time for the
    phenobarbital estimate).  The arrays of the outer problem are small, so one
    thread loses nothing."""
    return _blas_controller().limit(limits=1, user_api="blas")
