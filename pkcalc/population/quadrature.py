"""The integrals of the marginal likelihood: the Laplace approximation and adaptive
Gauss-Hermite quadrature of ``integral exp(-h/2)`` over a subject's deviations, and
the evaluation of the inner objective at quadrature nodes in bounded blocks.

- **Laplace**: ``-2 ln L_i = h(eta^) - q ln(2 pi) + ln|H / 2|``
  (Tierney & Kadane, JASA 1986;81:82);
- **adaptive Gauss-Hermite quadrature** with ``n`` nodes per dimension:
  ``eta_k = eta^ + sqrt(2) B x_k`` with ``B B' = (H/2)^-1`` and ``x_k, w_k`` the
  Gauss-Hermite nodes and weights, ``L_i = 2^(q/2) |B| sum_k w_k e^(x_k'x_k)
  e^(-h(eta_k)/2)`` (Pinheiro & Bates, JCGS 1995;4:12); one node is the Laplace
  approximation.
"""

from __future__ import annotations

import math

import numpy as np

from ..fit.objective import Batch, evaluate, structural

__all__ = ["CELL_BLOCK", "LOG_2PI", "at_nodes", "gauss_hermite", "laplace", "log_integral"]

LOG_2PI = math.log(2 * math.pi)
#: Largest number of level x dose cells of one vectorised evaluation (0.4 MB per
#: temporary array: larger ones are mapped and unmapped by the allocator on every call).
CELL_BLOCK = 50_000
#: Largest number of predictions kept from the objective's nodes for the gradient at
#: the same point (32 MB); beyond it the gradient evaluates the model again.
KEEP_CELLS = 4_000_000


def at_nodes(b: Batch, pts: np.ndarray, *, keep: bool = False):
    """The inner objective of row ``r`` of ``b`` at each of its node points ``pts[r]``
    (shape (R, K, q)), evaluated in blocks of at most :data:`CELL_BLOCK` cells so the
    temporaries stay small (large ones are mapped and unmapped by the allocator on
    every call: system time, not arithmetic).

    With ``keep``, also the model's predictions at the nodes, ``(f (R K, N), J (2, R K,
    N))`` -- for the outer gradient at the same point -- when they take at most
    :data:`KEEP_CELLS` numbers (else None)."""
    r, k = pts.shape[:2]
    flat = pts.reshape(r * k, -1)
    cells = b.cells_per_row
    per = max(1, CELL_BLOCK // cells)
    out = np.empty(r * k)
    kept = None
    if keep and 3 * r * k * b.t.shape[1] <= KEEP_CELLS:
        kept = (np.empty((r * k, b.t.shape[1])), np.empty((2, r * k, b.t.shape[1])))
    for a in range(0, r * k, per):
        idx = np.arange(a, min(a + per, r * k))
        rows = b.rows(idx // k)
        pred = structural(rows, flat[idx])
        out[idx] = evaluate(rows, flat[idx], predictions=pred, information=False)[0]
        if kept is not None:
            kept[0][idx], kept[1][:, idx] = pred
    out = out.reshape(r, k)
    return (out, kept) if keep else out


def gauss_hermite(nodes: int, q: int = 2) -> tuple[np.ndarray, np.ndarray]:
    """Product Gauss-Hermite nodes ``(K, q)`` and log weights ``(K,)`` (weight
    ``e^(-x'x)``), ``K = nodes^q``."""
    x, w = np.polynomial.hermite.hermgauss(nodes)
    grid = np.stack(np.meshgrid(*([x] * q), indexing="ij"), -1).reshape(-1, q)
    lw = np.sum(np.stack(np.meshgrid(*([np.log(w)] * q), indexing="ij"), -1).reshape(-1, q),
                axis=1)
    return grid, lw


def laplace(h_mode: np.ndarray, half_hessian: np.ndarray) -> np.ndarray:
    """``-2 ln`` of ``integral exp(-h/2)`` by the Laplace approximation:
    ``h(eta^) - q ln(2 pi) + ln|H/2|`` (``half_hessian`` is ``H/2``, shape (B, q, q))."""
    q = half_hessian.shape[-1]
    return h_mode - q * LOG_2PI + np.linalg.slogdet(half_hessian)[1]


def log_integral(h_nodes: np.ndarray, chol: np.ndarray, nodes: int) -> np.ndarray:
    """``-2 ln`` of ``integral exp(-h/2)`` by adaptive Gauss-Hermite quadrature.

    Parameters
    ----------
    h_nodes : ndarray, shape (B, K)
        ``h`` at the nodes ``eta^ + sqrt(2) B x_k`` (``K = nodes^q``, order of
        :func:`gauss_hermite`).
    chol : ndarray, shape (B, q, q)
        ``B``: Cholesky factor of the inverse of ``H / 2``.
    nodes : int

    Returns
    -------
    ndarray, shape (B,)
    """
    q = chol.shape[-1]
    grid, lw = gauss_hermite(nodes, q)
    terms = lw[None, :] + (grid**2).sum(axis=1)[None, :] - 0.5 * h_nodes
    top = terms.max(axis=1)
    lse = top + np.log(np.exp(terms - top[:, None]).sum(axis=1))
    logdet_b = np.log(np.abs(np.diagonal(chol, axis1=1, axis2=2))).sum(axis=1)
    return -2.0 * (0.5 * q * math.log(2.0) + logdet_b + lse)
