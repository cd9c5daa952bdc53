"""The engine layer (pkcalc.engines): the same results in the same order wherever the
pieces run; bounded, clear failures for unreachable or empty schedulers."""

from __future__ import annotations

import math
import time
from functools import partial

import pytest

from pkcalc.engines import Engine, dask_client, map_ordered
from pkcalc.errors import PkcalcInputError

distributed = pytest.importorskip("distributed")


def _piece(x: int, scale: float) -> tuple[int, float]:
    """A module-level piece of work (picklable): a seeded draw per item."""
    import numpy as np

    return x, float(np.random.default_rng([7, x]).normal()) * scale


@pytest.fixture(scope="module")
def cluster():
    c = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                 host="127.0.0.1", dashboard_address=":0")
    yield c.scheduler_address
    c.close()


def test_every_engine_returns_the_same_results_in_order(cluster):
    items = list(range(23))
    fn = partial(_piece, scale=2.0)
    serial = [fn(x) for x in items]               # the reference: a plain loop
    seen = []
    assert map_ordered(fn, items, progress=lambda d, t, s: seen.append((d, t))) == serial
    assert seen[-1] == (23, 23) and len(seen) == 23
    assert map_ordered(fn, items, Engine("local", workers=2)) == serial
    assert map_ordered(fn, items, Engine("dask", scheduler=cluster)) == serial
    assert map_ordered(fn, items, Engine("dask", workers=1)) == serial
    assert map_ordered(fn, [], Engine("local", workers=2)) == []


def test_an_exception_in_a_piece_reaches_the_caller(cluster):
    with pytest.raises(ValueError, match="math domain error"):
        map_ordered(partial(math.fmod, 1.0), [1.0, 0.0], Engine("dask", scheduler=cluster))
    with pytest.raises(ValueError, match="math domain error"):
        map_ordered(partial(math.fmod, 1.0), [1.0, 0.0], Engine("local", workers=2))


@pytest.mark.parametrize("kwargs, field", [
    ({"kind": "spark"}, "kind"), ({"workers": 0}, "workers"), ({"workers": 2.5}, "workers"),
    ({"kind": "local", "scheduler": "tcp://x:1"}, "scheduler"), ({"timeout": 0}, "timeout"),
])
def test_engine_options_are_checked(kwargs, field):
    with pytest.raises(ValueError, match=f"^{field}:"):
        Engine(**kwargs)


def test_labels():
    assert Engine().label == "local"
    assert Engine("local", workers=3).label == "local (3 processes)"
    assert Engine("dask", scheduler="tcp://h:1").label == "dask (scheduler tcp://h:1)"


def test_an_unreachable_scheduler_fails_within_the_timeout():
    t0 = time.perf_counter()
    with pytest.raises(PkcalcInputError, match="cannot reach the Dask scheduler"), \
            dask_client(Engine("dask", scheduler="tcp://127.0.0.1:9", timeout=2)):
        pass
    assert time.perf_counter() - t0 < 15


def test_a_scheduler_without_workers_fails_within_the_timeout():
    empty = distributed.LocalCluster(n_workers=0, processes=True, host="127.0.0.1",
                                     dashboard_address=":0")
    try:
        t0 = time.perf_counter()
        with pytest.raises(PkcalcInputError, match="has no workers"), \
                dask_client(Engine("dask", scheduler=empty.scheduler_address, timeout=2)):
            pass
        assert time.perf_counter() - t0 < 15
    finally:
        empty.close()
