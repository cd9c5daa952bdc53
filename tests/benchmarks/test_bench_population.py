"""Benchmark: iterative two-stage on 120 sparse subjects (invented data).

Run: python -m pytest -m bench -s tests/benchmarks/test_bench_population.py

Target: to convergence in under 30 s on this machine.  The baseline measured
in the same run is one MAP pass over the same subjects (``pkcalc fit
--prior``), so the ratio says how many MAP passes the population estimate costs.
"""

from __future__ import annotations

import time

import pytest

from pkcalc.fit import fit_subjects
from pkcalc.population import iterative_two_stage
from pkcalc.schema.fitopts import fit_options

from ..test_population import sparse_subjects

pytestmark = pytest.mark.bench


def test_bench_iterative_two_stage_120_sparse_subjects():
    subs = sparse_subjects(seed=2)
    prior = fit_options({"prior": {"clearance": "5 L/h", "volume": "50 L",
                                   "cv_clearance": "35%", "cv_volume": "25%",
                                   "error": {"proportional": "10%"}}})
    fit_subjects(subs[:5], prior)  # warm-up
    t0 = time.perf_counter()
    fit_subjects(subs, prior)
    t_map = time.perf_counter() - t0
    t0 = time.perf_counter()
    res = iterative_two_stage(subs, covariate="estimated")
    t_its = time.perf_counter() - t0
    print(f"\n[bench] iterative two-stage, 120 sparse subjects: {t_its:.2f} s, "
          f"{res.iterations} iterations, converged {res.converged} (target < 30 s); one MAP "
          f"pass {t_map:.3f} s; ratio {t_its / t_map:.1f} MAP passes")
    assert res.converged and t_its < 30.0
