"""The posterior of one subject's ``ln CL, ln V`` given its levels and a prior, on a grid.

The MAP objective of :mod:`pkcalc.fit.objective` (``-2 ln`` of likelihood times prior,
Beal's M3 for levels below the LLOQ) evaluated at many parameter pairs at once.  A
grid in the coordinates of the Laplace approximation (centred on the mode, scaled
by the Cholesky factor of its covariance) integrates the exact posterior: the
nodes carry weights proportional to the posterior density, widened until the
mass left on the grid's edge is negligible.  This is adaptive quadrature in two
dimensions; it needs no sampling and is deterministic.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core import FitOptions, SubjectData
from .data import prepare_batch, with_prior
from .objective import evaluate

__all__ = ["GridPosterior", "grid_posterior", "map_objective"]

#: Nodes per axis, the half-width of the grid (in SDs of the Laplace approximation),
#: the largest half-width tried and the mass on the edge that is negligible.
NODES = 81
SPAN = 6.0
MAX_SPAN = 13.5
EDGE_MASS = 1e-5
#: Posterior mass of the lightest nodes that may be dropped after integration.
PRUNE = 1e-6
#: Parameter pairs evaluated at once (bounds memory for long histories).
BLOCK = 4096


@dataclass(frozen=True)
class GridPosterior:
    """Posterior nodes of ``ln CL, ln V`` and their weights (summing to 1).

    Attributes
    ----------
    ln_clearance, ln_volume, weight : ndarray, shape (M,)
    mode : tuple of float
        ``ln CL, ln V`` at the mode.
    covariance : ndarray, shape (2, 2)
        The Laplace approximation's covariance (the grid's scale).
    nodes : int
        Nodes per axis.
    span : float
        Half-width of the grid in SDs of the Laplace approximation.
    edge_mass : float
        Posterior mass on the grid's outermost ring (small when the grid holds it).
    effective_sample_size : float
        ``(sum w)^2 / sum w^2`` of the node weights.
    """

    ln_clearance: np.ndarray
    ln_volume: np.ndarray
    weight: np.ndarray
    mode: tuple[float, float]
    covariance: np.ndarray
    nodes: int
    span: float
    edge_mass: float
    effective_sample_size: float

    @property
    def method(self) -> str:
        return (f"quadrature on a {self.nodes} x {self.nodes} grid over +/-{self.span:g} SD "
                "of the posterior's Laplace approximation")


def map_objective(subject: SubjectData, options: FitOptions, theta: np.ndarray) -> np.ndarray:
    """``-2 ln`` posterior (up to a constant) of ``subject`` at each row of ``theta``
    (``ln CL, ln V``); ``options`` carries the prior and the BLQ method."""
    if options.prior is None:
        raise ValueError("the posterior needs a prior")
    batch, _, _ = prepare_batch([subject], options)
    batch, _, bad = with_prior(batch, [subject], options)
    if bad:
        raise ValueError("the prior is per kg but the subject has no weight")
    theta = np.atleast_2d(np.asarray(theta, dtype=float))
    out = np.empty(theta.shape[0])
    for i in range(0, theta.shape[0], BLOCK):
        part = theta[i:i + BLOCK]
        rows = batch.rows(np.zeros(part.shape[0], dtype=int))
        with np.errstate(all="ignore"):   # far nodes: predictions that underflow
            out[i:i + BLOCK] = evaluate(rows, part, information=False)[0]
    # a node whose objective is not a number has no posterior weight
    return np.where(np.isnan(out), np.inf, out)


def _laplace_covariance(subject, options, mode) -> np.ndarray:
    """Covariance from the curvature of ``-2 ln`` posterior at the mode (central
    differences on the log scale; the prior keeps it positive definite)."""
    h = 1e-3
    steps = np.array([[0, 0], [h, 0], [-h, 0], [0, h], [0, -h], [h, h], [-h, -h], [h, -h],
                      [-h, h]])
    f = map_objective(subject, options, np.asarray(mode) + steps)
    d11 = (f[1] - 2 * f[0] + f[2]) / h**2
    d22 = (f[3] - 2 * f[0] + f[4]) / h**2
    d12 = (f[5] + f[6] - f[7] - f[8]) / (4 * h**2)
    hess = 0.5 * np.array([[d11, d12], [d12, d22]])   # of -ln posterior
    try:
        cov = np.linalg.inv(hess)
        np.linalg.cholesky(cov)
        return cov
    except np.linalg.LinAlgError:
        p = options.prior
        oc, ov, r = p.omega_clearance, p.omega_volume, p.correlation
        return np.array([[oc**2, r * oc * ov], [r * oc * ov, ov**2]])


def grid_posterior(subject: SubjectData, options: FitOptions, mode: tuple[float, float], *,
                   nodes: int = NODES, span: float = SPAN) -> GridPosterior:
    """The posterior of ``subject``'s ``ln CL, ln V`` on a grid around ``mode``.

    The grid is ``nodes x nodes`` points over ``+/- span`` SDs of the Laplace
    approximation; it is widened (x1.5, up to :data:`MAX_SPAN`) while more than
    :data:`EDGE_MASS` of the posterior lies on its outer ring (a skewed posterior
    from few levels).
    """
    mode = (float(mode[0]), float(mode[1]))
    cov = _laplace_covariance(subject, options, mode)
    chol = np.linalg.cholesky(cov)
    step = 2 * span / (nodes - 1)
    while True:
        nodes = max(nodes, 2 * round(span / step) + 1)   # the same spacing when widened
        z = np.linspace(-span, span, nodes)
        za, zb = np.meshgrid(z, z, indexing="ij")
        zz = np.column_stack([za.ravel(), zb.ravel()])
        theta = np.asarray(mode) + zz @ chol.T
        obj = map_objective(subject, options, theta)
        logw = -0.5 * (obj - np.nanmin(obj))
        w = np.exp(np.where(np.isfinite(logw), logw, -np.inf))
        w /= w.sum()
        ring = (np.abs(za.ravel()) >= span - 1e-12) | (np.abs(zb.ravel()) >= span - 1e-12)
        edge = float(w[ring].sum())
        if edge <= EDGE_MASS or span >= MAX_SPAN:
            break
        span = min(span * 1.5, MAX_SPAN)
    ess = float(1.0 / np.sum(w**2))
    # nodes carrying a negligible share (together at most PRUNE) are dropped: they
    # cannot move a probability by more than that, and halve the work that follows
    order = np.argsort(w)
    drop = order[np.cumsum(w[order]) <= PRUNE]
    keep = np.ones(w.size, dtype=bool)
    keep[drop] = False
    w = w[keep] / w[keep].sum()
    theta = theta[keep]
    return GridPosterior(theta[:, 0], theta[:, 1], w, mode, cov, nodes, span, edge, ess)
