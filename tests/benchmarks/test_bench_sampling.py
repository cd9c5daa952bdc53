"""Benchmarks of ``pkcalc sampling`` (printed figures; not part of the default run).

Run: python -m pytest -m bench -s tests/benchmarks/test_bench_sampling.py

- an individual design with 2, 3 and 4 levels (target: under 1 s each);
- a population design over 3 groups (target: under 10 s);
- 1,000 simulate-and-refit replicates of a 100-subject sparse study (2-3 levels
  per subject; iterative two-stage re-estimates): this process, 2 local
  processes (target: under 5 minutes with the local engine), Dask with 1 and 2
  workers; the speed-ups against this process, measured in the same run.
Invented drug and study, fixed seeds.
"""

from __future__ import annotations

import time

import numpy as np
import pytest

from pkcalc.core import DoseEvent, SamplingGroup, SamplingProblem
from pkcalc.engines import Engine
from pkcalc.sampling import design_sampling

pytestmark = pytest.mark.bench

DOSES = (DoseEvent(0.0, 800.0, 1.0, 8.0, 6),)


def problem(**kw) -> SamplingProblem:
    base = dict(name="bench", design="individual", clearance=5.5, volume=30.0, doses=DOSES,
                additive=0.2, proportional=0.1, groups=(SamplingGroup("patient", 1, 2),),
                window=(16.0, 48.0), avoid_infusion=True, min_spacing=0.5)
    base.update(kw)
    return SamplingProblem(**base)


def test_bench_individual_and_population_designs():
    for levels in (2, 3, 4):
        p = problem(groups=(SamplingGroup("patient", 1, levels),))
        t0 = time.perf_counter()
        r = design_sampling(p)
        wall = time.perf_counter() - t0
        print(f"\n[bench] individual design, {levels} levels: {wall:.3f} s (target < 1 s); "
              f"times {r.optimal.times[0]}")
        assert wall < 1.0
    p = problem(design="population", omega=np.diag([0.09, 0.0625]),
                groups=(SamplingGroup("A", 40, 2), SamplingGroup("B", 30, 3),
                        SamplingGroup("C", 30, 4)))
    t0 = time.perf_counter()
    r = design_sampling(p)
    wall = time.perf_counter() - t0
    print(f"[bench] population design, 3 groups (2, 3, 4 levels): {wall:.2f} s (target < 10 s)"
          f"; expected RSE {r.optimal.expected_rse_percent['clearance']:.2f} % / "
          f"{r.optimal.expected_rse_percent['volume']:.2f} %")
    assert wall < 10.0


def test_bench_1000_replicates_of_a_100_subject_sparse_study():
    p = problem(design="population", omega=np.diag([0.09, 0.0625]),
                groups=(SamplingGroup("two levels", 50, 2), SamplingGroup("three", 50, 3)),
                starts=4)
    figures = {}
    for name, engine in (("this process", Engine()),
                         ("local, 2 processes", Engine("local", workers=2)),
                         ("dask, 1 worker", Engine("dask", workers=1)),
                         ("dask, 2 workers", Engine("dask", workers=2))):
        t0 = time.perf_counter()
        r = design_sampling(p, simulate=1000, seed=5, engine=engine)
        figures[name] = time.perf_counter() - t0
        s = r.optimal.simulation
        simulated = s.parameters["clearance"]["empirical_rse_percent"]
        print(f"\n[bench] 1,000 replicates x 100 subjects, {name}: {figures[name]:.1f} s; "
              f"failed {s.failed}; simulated RSE CL {simulated:.2f} % "
              f"(expected {r.optimal.expected_rse_percent['clearance']:.2f} %)")
    base = figures["this process"]
    print(f"[bench] speed-up against this process: local 2 processes "
          f"{base / figures['local, 2 processes']:.2f}x, dask 2 workers "
          f"{base / figures['dask, 2 workers']:.2f}x (dask 2 vs 1 worker "
          f"{figures['dask, 1 worker'] / figures['dask, 2 workers']:.2f}x)")
    assert figures["local, 2 processes"] < 300
