"""Benchmark: individual fits per second, and the ratio to scipy's curve_fit.

Run: python -m pytest -m bench -s tests/benchmarks/test_bench_fit.py

1,000 invented subjects x 12 levels with 10 % proportional error.  pkcalc fits
them (proportional error model, maximum likelihood, 3 starts, analytic
gradients, all subjects as one vectorised problem); the baseline is
scipy.optimize.curve_fit per subject with its default finite-difference
Jacobian, a fixed start (the typical values) and weights 1/observed^2, measured
in the same run.
"""

from __future__ import annotations

import math
import time
import warnings

import numpy as np
import pytest
from scipy import optimize

from pkcalc import model
from pkcalc.core import FitOptions, SubjectData
from pkcalc.fit import fit_subjects

pytestmark = pytest.mark.bench

TIMES = np.array([0.5, 1, 1.5, 2, 3, 4, 6, 8, 12, 16, 24, 36.0])
ROUNDS = 4


def simulate(n: int, seed: int = 2026):
    rng = np.random.default_rng(seed)
    subs, truth = [], []
    for i in range(n):
        cl, v = 4 * math.exp(rng.normal(0, 0.3)), 45 * math.exp(rng.normal(0, 0.2))
        c = model.concentration(TIMES, [0.0], [500.0], [1.0], cl, v)
        y = c * (1 + 0.10 * rng.normal(size=TIMES.size))
        subs.append(SubjectData(str(i), TIMES, y, np.full(12, np.nan), np.zeros(12, bool),
                                np.arange(12), np.array([0.0]), np.array([500.0]),
                                np.array([1.0])))
        truth.append((cl, v))
    return subs, np.array(truth)


def test_bench_fits_per_second_and_curve_fit_ratio():
    subs, truth = simulate(1000)
    fit_subjects(subs[:10], FitOptions())  # warm-up (imports)

    def one(s):
        def f(t, lncl, lnv):
            return model.concentration(t, s.dose_start, s.dose_amount, s.dose_duration,
                                       math.exp(lncl), math.exp(lnv))
        return optimize.curve_fit(f, s.time, s.conc, p0=[math.log(4.0), math.log(45.0)],
                                  sigma=s.conc)

    def baseline() -> int:
        ok = 0
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            for s in subs:
                try:
                    one(s)
                    ok += 1
                except (RuntimeError, ValueError):
                    pass
        return ok

    # rounds of (pkcalc twice, curve_fit once), the best of each kept: both sides are
    # timed under the same conditions of this shared, noisy machine
    t_ours = t_cf = math.inf
    for _ in range(ROUNDS):
        for _ in range(2):
            t0 = time.perf_counter()
            res, _ = fit_subjects(subs, FitOptions())
            t_ours = min(t_ours, time.perf_counter() - t0)
        t0 = time.perf_counter()
        cf_ok = baseline()
        t_cf = min(t_cf, time.perf_counter() - t0)
    ours_ok = sum(r.converged for r in res)
    rate = len(subs) / t_ours
    ratio = t_cf / t_ours
    err = np.median(np.abs(np.array([r.clearance for r in res]) / truth[:, 0] - 1))
    print(f"\n[bench] pkcalc fit: {len(subs)} subjects in {t_ours:.3f} s (best of {2 * ROUNDS}) = "
          f"{rate:.0f} fits/s (target >= 30,000: {'met' if rate >= 30_000 else 'NOT met'}); "
          f"converged {ours_ok}/{len(subs)}; "
          f"median |CL error| {err:.2%}")
    print(f"[bench] scipy curve_fit (FD Jacobian, fixed start): {t_cf:.3f} s (best of {ROUNDS}), "
          f"converged "
          f"{cf_ok}/{len(subs)}; ratio curve_fit / pkcalc = {ratio:.1f} (target >= 10: "
          f"{'met' if ratio >= 10 else 'NOT met'})")
    assert rate >= 200          # floors of the first release; the targets above are printed
    assert ratio >= 5
    assert ours_ok >= cf_ok
