"""Benchmark: the marginal-likelihood estimate of 1,000 sparse subjects x 4 levels.

Run: python -m pytest -m bench -s tests/benchmarks/test_bench_marginal.py

Invented data (the sparse design of tests/test_population.py, 4 levels per
subject, 10 % proportional error, estimated weight exponents).  Targets: Laplace
in under 60 s; adaptive Gauss-Hermite quadrature with 5 nodes per dimension
within 4x the Laplace time.  The baseline measured in the same run is the
iterative two-stage estimate of the same data; the ratios are printed.
"""

from __future__ import annotations

import time

import pytest

from pkcalc.core import Effect, PopulationModel, PopulationOptions
from pkcalc.population import iterative_two_stage
from pkcalc.population.estimate import marginal_estimate

from ..test_population import sparse_subjects

pytestmark = pytest.mark.bench

WEIGHT = PopulationModel("weight", (Effect("weight", "clearance", reference=70.0),
                                    Effect("weight", "volume", reference=70.0)))


def test_bench_marginal_1000_subjects():
    subs = sparse_subjects(seed=4, n=1000, levels=4)
    t0 = time.perf_counter()
    its = iterative_two_stage(subs, covariate="estimated", final_fits=False)
    t_its = time.perf_counter() - t0
    t0 = time.perf_counter()
    lap = marginal_estimate(subs, PopulationOptions(), WEIGHT, final_fits=False)
    t_lap = time.perf_counter() - t0
    t0 = time.perf_counter()
    agq = marginal_estimate(subs, PopulationOptions(nodes=5), WEIGHT, final_fits=False)
    t_agq = time.perf_counter() - t0
    print(f"\n[bench] 1,000 subjects x 4 levels: iterative two-stage {t_its:.1f} s "
          f"({its.iterations} iterations); Laplace {t_lap:.1f} s (target < 60 s; "
          f"{t_lap / t_its:.1f}x the two-stage); quadrature, 5 nodes {t_agq:.1f} s "
          f"({t_agq / t_lap:.2f}x Laplace, target <= 4)")
    print(f"[bench] typical CL {lap.typical['clearance']:.3f} / {agq.typical['clearance']:.3f}"
          f" (true 5), V {lap.typical['volume']:.2f} / {agq.typical['volume']:.2f} (true 50);"
          f" -2lnL {lap.objective:.2f} / {agq.objective:.2f}")
    assert lap.converged and agq.converged
    assert t_lap < 60 and t_agq / t_lap <= 4
