"""The marginal likelihood with the subjects held on Dask workers.

``pkcalc population --engine dask`` (library: ``population_study(..., engine=
Engine("dask"))``) splits the subjects into one contiguous shard per worker.  Each
worker keeps its shard -- the padded levels and doses, the covariate rows, and the
conditional modes that warm-start the next inner solve -- as a
:class:`~pkcalc.population.marginal.MarginalProblem` between the optimiser's
iterations (a Dask actor), so only the outer parameters travel to the workers and
only per-subject numbers come back.  The client runs the optimiser; every iteration
asks all shards at once for each subject's ``-2 ln L`` and gradient row and sums
them in the subjects' order.  A shard pads its subjects to the whole study's widths,
so each subject's arithmetic is that of one process and the estimate does not depend
on the number of workers (tested to 1e-10; in practice the same digits).

The starting estimates (the two-stage methods) and the individual estimates under
the result are computed in this process.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..core import SubjectData
from ..engines import Engine, dask_client
from .covariates import Design
from .marginal import MarginalProblem

__all__ = ["ShardedProblem", "WorkerPool", "worker_pool"]


@dataclass
class WorkerPool:
    """An open Dask client and the worker addresses the shards are placed on (one
    shard per worker)."""

    client: Any
    workers: list[str]
    engine: Engine


@contextlib.contextmanager
def worker_pool(engine: Engine) -> Iterator[WorkerPool]:
    """The workers of ``engine`` (a Dask engine) for the duration of the block: one
    cluster (or scheduler connection) for every estimate of a job."""
    with dask_client(engine) as client:
        workers = sorted(client.scheduler_info()["workers"])
        yield WorkerPool(client, workers, engine)


class ShardedProblem(MarginalProblem):
    """A :class:`MarginalProblem` whose subjects live on the workers of ``pool``.

    The client keeps the whole study's batch for what the optimiser needs on this
    side (bounds, counts, the parameter names); every per-subject computation is
    asked of the shards (:meth:`MarginalProblem.value_and_gradient_parts` and the
    other "parts" methods), the answers concatenated in the subjects' order.
    """

    def __init__(self, subjects: list[SubjectData], design: Design, *, error_model: str,
                 blq: str, nodes: int = 1, diagonal: bool = False,
                 pool: WorkerPool) -> None:
        self._actors: list[Any] = []
        super().__init__(subjects, design, error_model=error_model, blq=blq, nodes=nodes,
                         diagonal=diagonal)
        parts = [p for p in np.array_split(np.arange(self.n), len(pool.workers)) if p.size]
        self._parts = parts
        # the handles bind to the current client when they are made: this pool's (another
        # client of this process may be the default one)
        with pool.client.as_current():
            futures = [pool.client.submit(
                MarginalProblem, [], design.rows(part),            # the batch is the data
                error_model=error_model, blq=blq, nodes=nodes, diagonal=diagonal,
                batch=self.batch.rows(part), actor=True, workers=[address], pure=False)
                for part, address in zip(parts, pool.workers, strict=False)]
            self._actors = [f.result() for f in futures]

    # the warm-start modes live on the shards; the client only knows whether there are any
    @property
    def theta(self) -> np.ndarray | None:
        return self.__dict__.get("_theta")

    @theta.setter
    def theta(self, value: np.ndarray | None) -> None:
        self.__dict__["_theta"] = value
        if self._actors:
            slices = [None if value is None else value[p] for p in self._parts]
            self._all("set_modes", *[(s,) for s in slices])

    def _all(self, method: str, *args_each, same: tuple = ()) -> list:
        """Call ``method`` on every shard at once (per-shard arguments, or the ``same``
        ones for all) and wait for the answers, in the shards' order."""
        calls = [getattr(a, method)(*(args_each[i] if args_each else same))
                 for i, a in enumerate(self._actors)]
        return [c.result() for c in calls]

    # ------------------------------------------------------------------ the parts
    def subject_terms(self, psi: np.ndarray, *, update: bool = True, both: bool = False):
        self.evaluations += 1
        psi = np.asarray(psi, float)
        answers = self._all("subject_terms_plain", same=(psi, update, both))
        if any(a[1] is None for a in answers):
            return np.full(self.n, np.inf), None, None
        m2ll = np.concatenate([a[0] for a in answers])
        theta = np.concatenate([a[1] for a in answers])
        post = np.concatenate([a[2] for a in answers])
        self._last = (psi.copy(), theta, m2ll)
        if update:
            self.__dict__["_theta"] = theta
        return m2ll, theta, post

    def value_and_gradient_parts(self, psi: np.ndarray):
        self.evaluations += 1
        answers = self._all("value_and_gradient_parts", same=(np.asarray(psi, float),))
        m2ll = np.concatenate([a[0] for a in answers])
        grads = [a[1] for a in answers]
        return m2ll, None if any(g is None for g in grads) else np.concatenate(grads)

    def gradient_parts(self, psi: np.ndarray) -> np.ndarray | None:
        grads = self._all("gradient_parts", same=(np.asarray(psi, float),))
        return None if any(g is None for g in grads) else np.concatenate(grads)

    def tangent_parts(self, psi: np.ndarray) -> np.ndarray:
        return np.concatenate(self._all("tangent_parts", same=(np.asarray(psi, float),)))

    def accept(self, psi: np.ndarray) -> bool:
        return all(self._all("accept", same=(np.asarray(psi, float),)))

    def hessian_gradient_parts(self, psi: np.ndarray) -> np.ndarray | None:
        grads = self._all("hessian_gradient_parts", same=(np.asarray(psi, float),))
        return None if any(g is None for g in grads) else np.concatenate(grads, axis=1)

    def objective_parts(self, psis: np.ndarray) -> np.ndarray:
        psis = np.atleast_2d(np.asarray(psis, float))
        self.evaluations += len(psis)
        return np.concatenate(self._all("objective_parts", same=(psis,)), axis=0)
