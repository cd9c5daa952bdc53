"""Population estimates with the subjects held on Dask workers
(pkcalc.population.shards): the same estimate as in one process, whatever the number
of workers.

The reference is the estimate computed in this process by the same library (the
sharded path only moves where each subject's numbers are computed; the issue's bar
is 1e-10).  The study is invented and ragged on purpose -- subjects with 2 to 5
levels and 2 or 3 doses, a few BLQ levels (Beal's M3) -- so a shard's own widths
would differ from the whole study's.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from pkcalc.core import Effect, PopulationModel, PopulationOptions
from pkcalc.engines import Engine
from pkcalc.population.compare import compare_models, stepwise
from pkcalc.population.estimate import marginal_estimate
from pkcalc.population.run import population_estimate

from .test_population_marginal import invented_study, write_study

distributed = pytest.importorskip("distributed")


def ragged_study(n: int, seed: int, *, blq_levels: bool = True):
    """The invented study of test_population_marginal with ragged levels and doses:
    every fifth subject has a third dose, some keep 2 of their levels, every seventh
    has its last level below a limit of quantification (with ``blq_levels``)."""
    subs = invented_study(n, seed=seed, levels=5)
    rng = np.random.default_rng(seed)
    out = []
    for i, s in enumerate(subs):
        keep = np.sort(rng.choice(s.time.size, int(rng.integers(2, 6)), replace=False))
        t, c = s.time[keep], s.conc[keep]
        lloq, blq = np.full(t.size, np.nan), np.zeros(t.size, bool)
        if blq_levels and i % 7 == 0:
            lloq[-1], blq[-1], c = 1.2 * c[-1], True, np.where(np.arange(t.size) == t.size - 1,
                                                              np.nan, c)
        start, amount, duration = s.dose_start, s.dose_amount, s.dose_duration
        if i % 5 == 0:
            start, amount, duration = (np.append(start, 30.0), np.append(amount, 200.0),
                                       np.append(duration, 1.0))
        out.append(dataclasses.replace(s, time=t, conc=c, lloq=lloq, blq=blq,
                                       rows=np.arange(t.size), dose_start=start,
                                       dose_amount=amount, dose_duration=duration))
    return out


@pytest.fixture(scope="module")
def pools():
    from pkcalc.population.shards import worker_pool

    with worker_pool(Engine("dask", workers=1)) as one, \
            worker_pool(Engine("dask", workers=2)) as two:
        yield {1: one, 2: two}


def _same(a, b) -> None:
    assert np.max(np.abs(np.asarray(a.psi) - np.asarray(b.psi))) <= 1e-10
    assert a.objective == pytest.approx(b.objective, rel=1e-10, abs=1e-10)
    for x, y in zip(a.parameters, b.parameters, strict=True):
        assert x["name"] == y["name"]
        assert x["value"] == pytest.approx(y["value"], rel=1e-10)
        if x["se"] is None:
            assert y["se"] is None
        else:
            assert x["se"] == pytest.approx(y["se"], rel=1e-10), x["name"]


@pytest.mark.parametrize(("nodes", "error"), [(1, "combined"), (3, "proportional")])
def test_the_estimate_does_not_depend_on_the_number_of_workers(pools, nodes, error):
    subs = ragged_study(45, seed=21)
    assert len({s.time.size for s in subs}) >= 3 and len({s.dose_start.size for s in subs}) == 2
    opts = PopulationOptions(nodes=nodes, error_model=error)
    pm = PopulationModel("w", (Effect("weight", "clearance", reference=70.0),))
    here = marginal_estimate(subs, opts, pm, final_fits=False)
    assert here.converged
    assert next(p for p in here.parameters if p["name"] == "typical clearance")["se"]
    for workers in (1, 2):
        there = marginal_estimate(subs, opts, pm, final_fits=False, pool=pools[workers])
        _same(here, there)
        np.testing.assert_allclose(there.omega, here.omega, rtol=1e-10)


def test_a_comparison_on_the_workers_equals_the_one_here(pools):
    subs = ragged_study(40, seed=22)
    opts = PopulationOptions(error_model="proportional")
    models = (PopulationModel("base", ()),
              PopulationModel("weight", (Effect("weight", "clearance", reference=70.0),)))
    here = compare_models(subs, opts, models)
    there = compare_models(subs, opts, models, pool=pools[2])
    for a, b in zip(here.rows, there.rows, strict=True):
        assert a.name == b.name
        _same(a.result, b.result)
        assert (a.lrt_p is None and b.lrt_p is None) or \
            a.lrt_p == pytest.approx(b.lrt_p, rel=1e-9)


def test_population_estimate_with_a_dask_engine_starts_and_stops_its_cluster():
    # the job-level entry point: one cluster for the job, closed afterwards
    subs = ragged_study(30, seed=23)
    opts = PopulationOptions(error_model="proportional", adequacy=False)
    here = population_estimate(subs, opts)
    there = population_estimate(subs, opts, engine=Engine("dask", workers=2))
    assert there.method == "marginal"
    _same(here, there)
    assert math.isfinite(there.objective)


def test_cli_population_on_dask_workers(run_cli, write):
    path = write_study(write, ragged_study(30, seed=24, blq_levels=False))
    args = ("population", path, "--json", "--vpc-replicates", "0", "--no-adequacy")
    here = run_cli(*args)
    there = run_cli(*args, "--engine", "dask", "--workers", "2")
    assert here.code == 0 and there.code == 0, there.err
    a, b = here.json(), there.json()
    assert a["objective"] == pytest.approx(b["objective"], rel=1e-10)
    for x, y in zip(a["parameters"], b["parameters"], strict=True):
        assert x["value"] == pytest.approx(y["value"], rel=1e-10)
    # the two-stage methods use the engine for bootstrap replicates only
    r = run_cli(*args, "--method", "iterative", "--engine", "dask")
    assert r.code == 2 and "--bootstrap N" in r.err


def test_a_stepwise_search_on_the_workers_takes_the_same_steps(pools):
    subs = ragged_study(40, seed=25)
    opts = PopulationOptions(error_model="proportional", add_if_p_below=0.5,
                             remove_if_p_above=0.1)
    candidates = (Effect("weight", "clearance", reference=70.0), Effect("sex", "volume"))
    here = stepwise(subs, opts, candidates)
    there = stepwise(subs, opts, candidates, pool=pools[2])
    assert [r.name for r in here.rows] == [r.name for r in there.rows]
    assert here.selected == there.selected and len(here.steps) == len(there.steps) > 0
    for a, b in zip(here.steps, there.steps, strict=True):
        assert {k: v for k, v in a.items() if k != "p"} == \
            {k: v for k, v in b.items() if k != "p"}
        assert a["p"] == pytest.approx(b["p"], rel=1e-9)
    for a, b in zip(here.rows, there.rows, strict=True):
        _same(a.result, b.result)
