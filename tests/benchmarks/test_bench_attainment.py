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


def test_bench_population_attainment_million_patients_twenty_regimens():
    """10^6 virtual patients x 20 regimens (10 doses x 2 intervals), three targets, on
    the local engine and on 2 worker processes; the baseline, measured in the same run,
    is the bare numpy computation (one draw of 10^6 patients, the steady-state formulas
    written out, no bands, no pieces).  Target: 10 s locally."""
    from pkcalc.api import population_attainment
    from pkcalc.engines import Engine

    kw = dict(doses=[250.0 * i for i in range(1, 11)], intervals=[8.0, 12.0],
              infusion_time=1.0, peak=(20.0, 40.0), trough=(5.0, 15.0),
              auc_24=(400.0, 600.0), patients=1_000_000, seed=4)
    population_attainment(PRIOR, **{**kw, "patients": 1000})       # warm-up
    t0 = time.perf_counter()
    local = population_attainment(PRIOR, **kw)
    t_local = time.perf_counter() - t0
    t0 = time.perf_counter()
    pooled = population_attainment(PRIOR, engine=Engine("local", workers=2), **kw)
    t_pool = time.perf_counter() - t0
    assert np.array_equal(local.fraction, pooled.fraction, equal_nan=True)
    t0 = time.perf_counter()
    rng = np.random.default_rng(4)
    ln = np.log([PRIOR.clearance, PRIOR.volume]) + rng.standard_normal((1_000_000, 2)) * [
        PRIOR.omega_clearance, PRIOR.omega_volume]
    cl, v = np.exp(ln[:, 0]), np.exp(ln[:, 1])
    k = cl / v
    for tau in (8.0, 12.0):
        for dose in kw["doses"]:
            peak = dose / (cl * 1.0) * (1 - np.exp(-k)) / (1 - np.exp(-k * tau))
            trough = peak * np.exp(-k * (tau - 1.0))
            auc = 24 * dose / (cl * tau)
            _ = ((peak >= 20) & (peak <= 40) & (trough >= 5) & (trough <= 15)
                 & (auc >= 400) & (auc <= 600)).mean()
    t_bare = time.perf_counter() - t0
    print(f"\npopulation attainment, 10^6 patients x 20 regimens: local {t_local:.2f} s, "
          f"2 workers {t_pool:.2f} s (target 10 s); bare numpy baseline {t_bare:.2f} s; "
          f"ratio local/bare {t_local / t_bare:.2f}")
