"""The outer gradient of the marginal likelihood by the implicit function theorem.

Each subject's ``-2 ln L_i`` is the Laplace or quadrature formula centred at its
conditional mode ``theta^(psi)``; the mode moves with the outer parameters along
``d theta^/d psi_j = -H^-1 dG/dpsi_j`` (``G`` the analytic gradient of the inner
objective ``h`` in ``theta``, ``H`` its Jacobian).  :func:`gradient_at_modes` takes the
derivative at the modes (envelope theorem for ``h``, the trace formula for ``ln|H|``,
the derivative of the Cholesky factor for the quadrature nodes), evaluating the model
once per subject and point and reusing the predictions for every shifted ``psi``;
where a Hessian is not positive definite, :func:`tangent_gradient` gives central
differences along the tangent.  Both are checked against central differences of the
objective with every mode solved again (``tests/test_population_marginal.py``).
The functions take a :class:`~pkcalc.population.marginal.MarginalProblem`.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np

from ..fit.objective import Batch, evaluate, exact_hessian, positive_definite, structural
from . import quadrature

__all__ = ["GRAD_STEP", "gradient_at_modes", "tangent_gradient"]

#: Central-difference step (log-parameters) of the outer gradient.
GRAD_STEP = 1e-4
#: Step of psi for the derivative of the analytic inner gradient at fixed modes.
DPSI_STEP = 1e-5
#: Gradient at the modes: steps of the derivative of the (exact) Hessian in theta and
#: of the derivatives in psi.
THIRD_STEP = 1e-4
DPSI_H_STEP = 1e-4


def tangent_gradient(self, psi: np.ndarray, theta: np.ndarray) -> np.ndarray:
    """Every subject's gradient row (N, p) of ``-2 ln L`` by central differences along
    the tangent of its mode, for where :func:`gradient_at_modes` does not apply (a
    Hessian that is not positive definite).

    Each subject's term is ``Q(theta^(psi), psi)``: the Laplace (or quadrature)
    formula centred at the conditional mode.  The mode moves with ``psi`` along
    ``d theta^/d psi_j = -H^-1 d G / d psi_j`` (``G`` the analytic gradient of ``h``
    in ``theta``, ``H`` its Jacobian; no move where ``H`` is not positive definite);
    the derivative is the central difference of ``Q`` along that tangent,
    ``(theta^ +- e s_j, psi +- e e_j)``.  No mode is solved again: every subject under
    every shifted vector is one row of one vectorised evaluation, the components in
    blocks (bounded memory).  (:meth:`MarginalProblem.gradient_by_differences` is the
    plain finite-difference check.)"""
    psi = np.asarray(psi, float)
    p = psi.size
    b0, _, _, _ = self._rows(psi[None])
    _, _, hess, _ = exact_hessian(b0, theta, information=False)
    pd = positive_definite(hess)
    out = np.zeros((self.n, p))
    per = self._vectors_per_block()
    for j0 in range(0, p, per):
        js = np.arange(j0, min(j0 + per, p))
        out[:, js] = _tangent_part(self, psi, theta, hess, pd, js)
    return out


def _tangent_part(self, psi, theta, hess, pd, js: np.ndarray) -> np.ndarray:
    """Components ``js`` of :func:`tangent_gradient`, every subject (N, len(js))."""
    n, m = self.n, js.size
    e = np.eye(psi.size)[js]
    # d G / d psi_j at the fixed modes
    bs, _, _, ok_s = self._rows(np.concatenate([psi + DPSI_STEP * e, psi - DPSI_STEP * e]))
    _, grad_s, _, _ = evaluate(bs, np.repeat(theta, 2 * m, axis=0), information=False)
    grad_s = grad_s.reshape(n, 2 * m, 2)
    d_g = (grad_s[:, :m] - grad_s[:, m:]) / (2 * DPSI_STEP)          # (n, m, 2)
    tangent = np.zeros_like(d_g)
    if pd.any():
        tangent[pd] = -np.linalg.solve(hess[pd][:, None], d_g[pd][..., None])[..., 0]
    # Q along the tangent, both directions, every subject and component at once
    b, _, logdet, ok = self._rows(np.concatenate([psi + GRAD_STEP * e,
                                                  psi - GRAD_STEP * e]))
    centres = theta[:, None, :] + GRAD_STEP * np.concatenate([tangent, -tangent], axis=1)
    m2ll, _ = self._at_modes(b, centres.reshape(-1, 2), logdet)
    m2ll = m2ll.reshape(n, 2 * m)
    up, dn = m2ll[:, :m], m2ll[:, m:]
    good = (ok[:m] & ok[m:] & ok_s[:m] & ok_s[m:])[None, :] & np.isfinite(up) & \
        np.isfinite(dn)
    return np.where(good, (up - dn) / (2 * GRAD_STEP), 0.0)


def gradient_at_modes(self, psi: np.ndarray, theta: np.ndarray, *,
                      per_subject: bool = False) -> np.ndarray | None:
    """The gradient from derivatives at the modes (None where it does not apply: a
    Hessian that is not positive definite, an unusable shifted vector); Laplace here,
    quadrature in :func:`_quadrature_part`.

    ``-2 ln L_i = h(theta^) + ln|H| + const``; ``dh/dpsi`` is the partial derivative
    at the mode (envelope theorem) and ``d ln|H| / dpsi_j = tr(H^-1 (dH/dpsi_j +
    sum_m dH/dtheta_m s_jm))`` with ``s_j = -H^-1 dG/dpsi_j``.  ``G`` and ``H`` are
    analytic (:func:`pkcalc.fit.objective.exact_hessian`); the derivatives of ``H``
    in ``theta`` and of ``G``, ``H`` in ``psi`` are central differences at the mode.
    The model is evaluated once per subject and point (the mode and four neighbours);
    the shifted ``psi`` reuse the predictions at the mode (the model does not depend
    on ``psi``); the neighbours need the unshifted ``psi`` only."""
    n, p = self.n, psi.size
    dd, dp = THIRD_STEP, DPSI_H_STEP
    e2 = np.eye(2)
    centres = np.stack([dd * e2[0], -dd * e2[0], dd * e2[1], -dd * e2[1]])
    vectors = np.concatenate([psi[None], psi + dp * np.eye(p), psi - dp * np.eye(p)])
    v = vectors.shape[0]
    b_all, _, logdet, usable = self._rows(vectors)            # rows i v + j
    if not usable.all():
        return None
    # the predictions are given: the rows need no event geometry (the big arrays)
    b_all = replace(b_all, geometry=())
    b_one = replace(self._rows(psi[None])[0], geometry=())
    kept = self.__dict__.get("_mode_kept")
    given = kept[1] if kept is not None and kept[0] is theta else None
    obj, grad0, h0 = _reused(self, b_all, theta[:, None, :], v, hessian=True, given=given)
    obj, grad0, h0 = obj[:, 0], grad0[:, 0], h0[:, 0]       # (n, v), (n, v, 2), (n, v, 2, 2)
    _, _, h1 = _reused(self, b_one, theta[:, None, :] + centres[None], 1, hessian=True)
    h1 = h1[:, :, 0]                                        # (n, 4, 2, 2) at the neighbours
    h_base = h0[:, 0]
    if not np.all(positive_definite(h_base)):
        return None
    inv = np.linalg.inv(h_base)                                         # (n, 2, 2)
    d_h_psi = (h0[:, 1:p + 1] - h0[:, p + 1:]) / (2 * dp)               # (n, p, 2, 2)
    d_g_psi = (grad0[:, 1:p + 1] - grad0[:, p + 1:]) / (2 * dp)         # (n, p, 2)
    tangent = -np.einsum("nab,npb->npa", inv, d_g_psi)                   # (n, p, 2)
    d_h_theta = np.stack([(h1[:, 0] - h1[:, 1]) / (2 * dd),
                          (h1[:, 2] - h1[:, 3]) / (2 * dd)], axis=1)     # (n, 2, 2, 2)
    total_dh = d_h_psi + np.einsum("nmab,npm->npab", d_h_theta, tangent)
    d_logdet = np.einsum("nab,npba->np", inv, total_dh)
    logdet = logdet.reshape(n, v)
    if self.nodes == 1:
        h_mode = obj + logdet                          # h at the mode (+ const)
        d_env = (h_mode[:, 1:p + 1] - h_mode[:, p + 1:]) / (2 * dp)     # (n, p)
        out = d_env + d_logdet
    else:
        out = _quadrature_part(self, b_all, theta, inv, total_dh, tangent, d_logdet,
                               logdet, v, p)
    if not np.all(np.isfinite(out)):
        return None
    self.keep_tangent(psi, theta, tangent)                # warm starts of the next solve
    return out if per_subject else out.sum(axis=0)


def _quadrature_part(self, b_all, theta, inv, total_dh, tangent, d_logdet, logdet,
                         v: int, p: int) -> np.ndarray:
    """The quadrature formula's gradient at the modes.  ``-2 ln L_i = -2 ln|B| -
    2 lse_k(t_k)`` with nodes ``eta_k = theta^ + sqrt(2) B x_k``, ``B B' = 2 H^-1``
    and ``t_k = ln w_k + x_k'x_k - h(eta_k)/2``: its derivative is
    ``tr(H^-1 dH_j) + sum_k pi_k dh(eta_k)/dpsi_j`` (``pi`` the normalised node
    weights), with ``dh(eta_k)/dpsi_j = dh/dpsi_j + G(eta_k)' (s_j + sqrt(2) dB_j
    x_k)`` and ``dB = B Phi(B^-1 dP B^-T)``, ``dP = -2 H^-1 dH H^-1`` (the derivative
    of the Cholesky factor, ``Phi`` the lower triangle with half the diagonal)."""
    dp = DPSI_H_STEP
    chol = np.linalg.cholesky(2.0 * inv)                                  # (n, 2, 2)
    grid, lw = quadrature.gauss_hermite(self.nodes, 2)
    kept = self.__dict__.get("_nodes_kept")
    if kept is not None and kept[0] is theta:   # the objective's nodes at this point
        nodes, given = kept[1], kept[2]
    else:
        nodes, given = theta[:, None, :] + math.sqrt(2.0) * np.einsum(
            "nij,kj->nki", chol, grid), None
    obj, grad, _ = _reused(self, b_all, nodes, v, given=given,
                           all_gradients=False)                  # (n, K, v), (n, K, 1, 2)
    h = obj + logdet[:, None, :]
    terms = lw[None, :] + (grid**2).sum(axis=1)[None, :] - 0.5 * h[:, :, 0]
    weights = np.exp(terms - terms.max(axis=1, keepdims=True))
    weights /= weights.sum(axis=1, keepdims=True)                         # (n, K)
    d_h_psi = (h[:, :, 1:p + 1] - h[:, :, p + 1:]) / (2 * dp)              # (n, K, p)
    d_p = -2.0 * (inv[:, None] @ total_dh @ inv[:, None])                 # (n, p, 2, 2)
    b_inv = np.linalg.inv(chol)
    inner = b_inv[:, None] @ d_p @ np.swapaxes(b_inv, 1, 2)[:, None]
    phi = np.tril(inner)
    phi[..., 0, 0] *= 0.5
    phi[..., 1, 1] *= 0.5
    d_b = chol[:, None] @ phi                                             # (n, p, 2, 2)
    # G(eta_k)' (s_j + sqrt(2) dB_j x_k) as batched products: (n, K, 2) @ (n, 2, p) and
    # (n, K, 4) @ (n, 4, p), the 4 being the (a, b) pairs of G_a x_b and dB_ab
    g_k = grad[:, :, 0]                                                   # (n, K, 2)
    gx = (g_k[:, :, :, None] * grid[None, :, None, :]).reshape(g_k.shape[0], -1, 4)
    d_h = d_h_psi + g_k @ np.swapaxes(tangent, 1, 2) + math.sqrt(2.0) * (
        gx @ np.swapaxes(d_b.reshape(d_b.shape[0], -1, 4), 1, 2))         # (n, K, p)
    return d_logdet + np.einsum("nk,nkp->np", weights, d_h)

def _reused(self, b_all: Batch, pts: np.ndarray, v: int, *, hessian: bool = False,
            given: tuple[np.ndarray, ...] | None = None, all_gradients: bool = True,
            separable: bool = True):
    """The inner objective and its gradient (and, with ``hessian``, its exact Hessian)
    at points ``pts`` (n, K, 2) of every subject under each of the ``v`` outer vectors
    of ``b_all`` (rows ``i v + j``).

    ``h = (levels' part: f(eta), sa, sp) + (eta - mu)' Omega^-1 (eta - mu)``: the model
    is evaluated once per subject and point, the levels' part once per distinct
    residual error among the vectors (most shifted vectors move a typical value or
    ``Omega`` only), and the prior part, which needs no model, per vector; in blocks
    of subjects of at most :data:`quadrature.CELL_BLOCK` cells.  ``given``: the model's
    predictions at ``pts`` (rows ``i K + k``; with ``hessian`` also the second
    derivatives), when the objective kept them.  Without
    ``all_gradients`` the gradient is that under the first vector only (n, K, 1, 2).
    With ``separable`` (pure additive or proportional error, no BLQ level) the levels'
    part under the other residual errors is rescaled from the first one's
    (:func:`_scaled_errors`) instead of evaluated again."""
    n, k = pts.shape[:2]
    errors = np.stack([b_all.sa[:v], b_all.sp[:v]], axis=1)
    distinct, which = np.unique(errors, axis=0, return_inverse=True)
    which = which.reshape(-1)
    u = len(distinct)
    levels = self.__dict__.get("_levels_only")
    if levels is None:      # the levels only: no event geometry, times or doses to copy
        none = np.empty((self.n, 0))
        levels = self._levels_only = replace(
            self.batch, kind="map", geometry=(), t=none, w=none, start=none, amount=none,
            duration=none, sa=None, sp=None, mu=None, omega_inv=None)
    mu_all = b_all.mu.reshape(n, v, 2)
    oinv = b_all.omega_inv.reshape(n, v, 2, 2)[0]                  # (v, 2, 2)
    a00, a01, a10, a11 = oinv[:, 0, 0], oinv[:, 0, 1], oinv[:, 1, 0], oinv[:, 1, 1]
    cells = self.batch.cells_per_row
    per = max(1, quadrature.CELL_BLOCK // (k * max(u * self.batch.t.shape[1], cells)))
    vg = v if all_gradients else 1
    obj = np.empty((n, k, v))
    grad = np.empty((n, k, vg, 2))
    hess = np.empty((n, k, v, 2, 2)) if hessian else None
    zero_prior = np.zeros((1, 2, 2))
    for a in range(0, n, per):                                 # subjects in blocks
        subs = np.arange(a, min(a + per, n))
        s = subs.size
        flat = pts[subs].reshape(-1, 2)                                     # (s k, 2)
        if given is None:
            pred = structural(self.batch.rows(np.repeat(subs, k)), flat, second=hessian)
        else:
            span = slice(a * k, (a + s) * k)
            pred = (given[0][span], *(d[:, span] for d in given[1:]))
        quick = None
        if separable and u > 1 and not hessian:
            quick = _scaled_errors(self.error, levels.rows(np.repeat(subs, k)), flat, pred,
                                   distinct, zero_prior)
        if quick is not None:
            o, g = quick
        else:
            rows = replace(levels.rows(np.repeat(subs, k * u)),
                           sa=np.tile(distinct[:, 0], s * k),
                           sp=np.tile(distinct[:, 1], s * k), mu=np.zeros((s * k * u, 2)),
                           omega_inv=np.broadcast_to(zero_prior, (s * k * u, 2, 2)))
            if u == 1:                          # one residual error: the rows are the points
                at_rows, at = pred, flat
            else:                               # each point x u errors
                rep = np.repeat(np.arange(s * k), u)
                at_rows, at = (pred[0][rep], *(d[:, rep] for d in pred[1:])), flat[rep]
            if hessian:
                o, g, h, _ = exact_hessian(rows, at, predictions=at_rows, information=False)
                hess[subs] = h.reshape(s, k, u, 2, 2)[:, :, which] + 2 * oinv
            else:
                o, g, _, _ = evaluate(rows, at, predictions=at_rows, information=False)
        # the prior part, (eta - mu)' Omega^-1 (eta - mu), per vector
        d0 = pts[subs][:, :, None, 0] - mu_all[subs][:, None, :, 0]        # (s, k, v)
        d1 = pts[subs][:, :, None, 1] - mu_all[subs][:, None, :, 1]
        od0, od1 = a00 * d0 + a01 * d1, a10 * d0 + a11 * d1
        obj[subs] = o.reshape(s, k, u)[:, :, which] + d0 * od0 + d1 * od1
        g = g.reshape(s, k, u, 2)[:, :, which[:vg]]
        grad[subs, :, :, 0] = g[..., 0] + 2 * od0[:, :, :vg]
        grad[subs, :, :, 1] = g[..., 1] + 2 * od1[:, :, :vg]
    return obj, grad, hess


def _scaled_errors(error: str, rows: Batch, flat: np.ndarray, pred, distinct: np.ndarray,
                   zero_prior: np.ndarray):
    """The levels' part of ``h`` and its gradient in ``eta`` under each residual error of
    ``distinct`` (u, 2), from one evaluation under the first: with a pure additive error
    ``c = sa^2`` and a pure proportional one ``c = sp^2`` (variance ``c f^2``), a row with
    ``n`` levels has ``l(c) = n ln(2 pi c) + sum ln f^2 [prop.] + S / c`` and gradient
    ``A + B / c`` (``S`` the sum of ``r^2`` or ``(r/f)^2``, ``A`` the gradient of
    ``sum ln f^2``: 0 for additive, ``sum 2 J/f`` for proportional), so
    ``l(c) = l(c0) + n ln(c/c0) + S (1/c - 1/c0)`` and
    ``grad(c) = A + (grad(c0) - A) c0/c`` [calc].  None (evaluate each error) when a
    level is censored, or a variance would reach the objective's floor (a level
    predicted at about 0 under proportional error)."""
    if error not in ("additive", "proportional") or rows.cens.any():
        return None
    f, jac = pred[0], pred[1]
    obs = rows.obs
    col = 0 if error == "additive" else 1
    c0, c = distinct[0, col] ** 2, distinct[:, col] ** 2                      # (u,)
    f2 = f * f if error == "proportional" else 1.0
    # the variance must stay above the objective's floor (1e-300) at every level
    if (obs & ~(c.min() * f2 > 1e-290)).any():
        return None
    m = rows.t.shape[0]
    one = replace(rows, sa=np.full(m, distinct[0, 0]), sp=np.full(m, distinct[0, 1]),
                  mu=np.zeros((m, 2)), omega_inv=np.broadcast_to(zero_prior, (m, 2, 2)))
    o0, g0, _, _ = evaluate(one, flat, predictions=(f, jac), information=False)
    r = np.where(obs, rows.y - f, 0.0)
    n_obs = obs.sum(axis=1)
    if error == "additive":
        s_sum = np.einsum("bn,bn->b", r, r)
        a_part = np.zeros_like(g0)
    else:
        q = r / np.where(obs, f, 1.0)
        s_sum = np.einsum("bn,bn->b", q, q)
        inv_f = np.where(obs, 2.0 / np.where(obs, f, 1.0), 0.0)
        a_part = np.stack([np.einsum("bn,bn->b", inv_f, jac[0]),
                           np.einsum("bn,bn->b", inv_f, jac[1])], axis=1)
    o = o0[:, None] + n_obs[:, None] * np.log(c / c0)[None, :] + \
        s_sum[:, None] * (1.0 / c - 1.0 / c0)[None, :]
    g = a_part[:, None, :] + (g0 - a_part)[:, None, :] * (c0 / c)[None, :, None]
    return o.reshape(-1), g.reshape(-1, 2)
