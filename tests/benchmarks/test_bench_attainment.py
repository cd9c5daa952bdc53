"""Benchmark: the chance of meeting the targets for every proposal of a MAP design.

Run: python -m pytest -m bench -s tests/benchmarks/test_bench_attainment.py

The invented one-trough adjustment of tests/test_design_attainment.py (three repeated-
infusion proposals and the current regimen, peak and trough windows, 72 h).  Printed:
the time of the attainment step (posterior grid, every proposal, the current regimen,
the band), the whole MAP design, and as baseline measured in the same run the same
probabilities by 10^5 posterior draws (numpy rejection sampling and the test's own
formula).  Target: the attainment step within 0.3 s.
"""

from __future__ import annotations

import math
import time

import numpy as np
import pytest

from pkcalc.core import expand_events
from pkcalc.design import adjust_map
from pkcalc.design import attainment as module

from ..test_design_attainment import CASES, PRIOR, mc_attainment, posterior_draws

pytestmark = pytest.mark.bench


def test_bench_attainment_of_one_design():
    case = dict(CASES["one-trough"])
    doses, levels = case.pop("doses"), case.pop("levels")
    adjust_map(doses, levels, PRIOR, **case)            # warm-up (imports)
    spent = []
    real = module.with_attainment

    def timed(*a, **k):
        t0 = time.perf_counter()
        real(*a, **k)
        spent.append(time.perf_counter() - t0)

    module_adjust = __import__("pkcalc.design.adjust", fromlist=["with_attainment"])
    module_adjust.with_attainment = timed
    try:
        best_design = math.inf
        for _ in range(5):           # best of 5: the machine is shared and noisy
            t0 = time.perf_counter()
            result = adjust_map(doses, levels, PRIOR, **case)
            best_design = min(best_design, time.perf_counter() - t0)
    finally:
        module_adjust.with_attainment = real
    best_attainment = min(spent)
    history = expand_events(doses)
    t0 = time.perf_counter()
    cl, v = posterior_draws(PRIOR, levels, history, 1_000_000, seed=3)
    mc = mc_attainment(result, history, cl[:100_000], v[:100_000])
    t_mc = time.perf_counter() - t0
    print(f"\nattainment of {len(result.regimens)} proposals + the current regimen: "
          f"{best_attainment:.3f} s (target 0.3 s); whole MAP design {best_design:.3f} s; "
          f"Monte Carlo baseline ({min(cl.size, 100_000)} posterior draws): {t_mc:.2f} s; "
          f"ratio {t_mc / best_attainment:.1f}x")
    print("joint: " + ", ".join(f"{r.attainment.joint:.3f} (MC {m['joint']:.3f})"
                                for r, m in zip(result.regimens, mc, strict=True)))
    assert np.isfinite(best_attainment)
