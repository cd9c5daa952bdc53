"""Benchmark: what the adequacy check adds to the fit of a rich study.

Run: python -m pytest -m bench -s tests/benchmarks/test_bench_adequacy.py

1,000 invented subjects x 12 levels (one compartment, 10 % proportional error,
500 mg over 1 h).  The baseline is ``pkcalc.fit_study`` with the check off,
measured in the same run; the figure is the ratio of the time with the check
to the time without it (target: at most 3).  Best of 3 runs each: the machine
is shared and noisy.
"""

from __future__ import annotations

import math
import time

import pytest

from pkcalc.api import fit_study
from pkcalc.core import FitOptions, Study

from .test_bench_fit import simulate

pytestmark = pytest.mark.bench


def best_of(n, fn):
    best = math.inf
    out = None
    for _ in range(n):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def test_bench_adequacy_ratio():
    subs, _ = simulate(1000)
    study = Study(subs)
    fit_study(Study(subs[:10]), FitOptions())  # warm-up (imports)
    t_off, _ = best_of(3, lambda: fit_study(study, FitOptions(adequacy=False)))
    t_on, res = best_of(3, lambda: fit_study(study, FitOptions()))
    counts = res.adequacy_counts
    print(f"\n[adequacy] 1,000 subjects x 12 levels: fit without the check {t_off:.2f} s, "
          f"with it {t_on:.2f} s; ratio {t_on / t_off:.2f} (target <= 3); verdicts {counts}")
    assert counts["adequate"] + counts["distribution_phase"] == 1000
    assert t_on / t_off <= 3.0
