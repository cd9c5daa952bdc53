"""Slow check: the information-based expected RSEs of rich designs against the
empirical ones of 500 simulated and re-estimated replicates (within +-20 %, the
issue's bound).  Run: python -m pytest -m slow tests/test_sampling_slow.py -s"""

from __future__ import annotations

import numpy as np
import pytest

from pkcalc.core import DoseEvent, SamplingGroup, SamplingProblem
from pkcalc.engines import Engine
from pkcalc.sampling import design_sampling

pytestmark = pytest.mark.slow


@pytest.mark.parametrize("design", ["individual", "map", "population"])
def test_expected_rse_agrees_with_500_simulated_replicates(design):
    # invented drug: 500 mg over 1 h every 12 h, three doses; a rich design
    pop = design == "population"
    p = SamplingProblem(
        name=design, design=design, clearance=4.0, volume=40.0,
        doses=(DoseEvent(0.0, 500.0, 1.0, 12.0, 3),), additive=0.1, proportional=0.1,
        groups=(SamplingGroup("all", 60 if pop else 1, 4),), window=(0.0, 48.0),
        omega=None if design == "individual" else np.diag([0.3**2, 0.25**2]),
        avoid_infusion=True, min_spacing=1.0)
    r = design_sampling(p, simulate=500, seed=11, engine=Engine("local", workers=2),
                        refit="iterative")
    s = r.optimal.simulation
    print(f"\n[{design}] times {r.optimal.times}; failed {s.failed}")
    for k in ("clearance", "volume"):
        expected = r.optimal.expected_rse_percent[k]
        empirical = s.parameters[k]["empirical_rse_percent"]
        print(f"[{design}] {k}: expected RSE {expected:.2f} %, simulated {empirical:.2f} %, "
              f"bias {s.parameters[k]['bias_percent']:.2f} %, coverage "
              f"{s.parameters[k]['coverage_percent']}")
        assert empirical == pytest.approx(expected, rel=0.2)
    assert s.failed <= 5
