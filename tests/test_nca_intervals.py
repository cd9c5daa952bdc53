"""NCA per dosing interval on real clock dosing records.

Invented subjects given 1-h infusions once a day for 5 days as a ward records them
(starts up to 15 min off 24 h, infusions 55-65 min), sampled through day 1, before
each dose on days 2-5 and through day 5 and after.  References, outside pkcalc:

- the exact one-compartment course (superposition of the actual doses) integrated
  with ``scipy.integrate.quad`` over each actual interval: AUCtau must match within a
  trapezoid error bound computed here -- zero on the log-down segments after every
  infusion has ended (the log rule is exact for one exponential: Yeh & Kwan 1978), and
  ``dt x (max - min)`` of the exact course on segments that rise or cross the end of
  an infusion (the integral and the linear trapezoid both lie between dt min and dt
  max);
- clearance at steady state dose/AUCtau against the simulated truth, within 5 %;
- the accumulation ratio AUCtau(last)/AUCtau(first) against 1/(1 - exp(-k tau))
  (Gibaldi & Perrier, from memory), within 3 %.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import integrate

from pkcalc import model
from pkcalc.nca import dosing_regimen, nca_subject

DAYS = 5


def subject(seed: int, cl: float, v: float):
    rng = np.random.default_rng(seed)
    starts = np.array([24.0 * d + rng.uniform(-0.25, 0.25) for d in range(DAYS)])
    starts -= starts[0]
    durations = rng.uniform(55, 65, DAYS) / 60.0
    amounts = np.full(DAYS, 500.0)
    t = [0.5, 1.0, 1.5, 2.0, 4.0, 8.0, 12.0]
    t += [starts[d] - 0.25 for d in range(1, DAYS)]                       # troughs
    t += [starts[-1] + h for h in (0.5, 1.0, 1.5, 2.0, 4.0, 8.0, 12.0, 24.0, 48.0)]
    t = np.array(t)
    c = model.concentration(t, starts, amounts, durations, cl, v)
    return t, c, starts, amounts, durations


def exact(starts, amounts, durations, cl, v):
    return lambda x: float(model.concentration(np.array([x]), starts, amounts, durations,
                                               cl, v)[0])


def error_bound(t_rel, start, starts, durations, f, length):
    """Trapezoid error bound of the interval's segments (see the module docstring)."""
    grid = np.concatenate([[0.0], t_rel[(t_rel > 0) & (t_rel < length)], [length]])
    ends = starts + durations
    bound = 0.0
    for a, b in itertools.pairwise(grid):
        running = np.any((starts < start + b) & (ends > start + a))
        if running:
            xs = np.linspace(start + a, start + b, 200)
            ys = [f(x) for x in xs]
            bound += (b - a) * (max(ys) - min(ys))
    return bound


CASES = [(3, 2.75, 60.0), (5, 4.0, 45.0), (8, 6.5, 40.0), (13, 9.84, 55.0), (21, 3.3, 75.0)]


@pytest.mark.parametrize(("seed", "cl", "v"), CASES)
def test_intervals_on_real_clock_records(seed, cl, v):
    t, c, starts, amounts, durations = subject(seed, cl, v)
    r = nca_subject("S", t, c, np.zeros(t.size, bool), starts, amounts, durations)
    assert dosing_regimen(starts, amounts, durations).regular
    assert r.mode == "steady state"
    f = exact(starts, amounts, durations, cl, v)
    k = cl / v
    first, last = r.intervals[0], r.intervals[-1]
    for row, length in ((first, starts[1] - starts[0]), (last, r.interval)):
        s = row.start
        truth = integrate.quad(f, s, s + length, points=[s + durations[row.number - 1]],
                               limit=200)[0]
        bound = error_bound(t - s, s, starts, durations, f, length)
        assert abs(row.auc_interval - truth) <= bound + 1e-9 * truth, (row.number, bound)
        assert row.length == pytest.approx(length)
    # the middle days have troughs only: a row each, with the reason
    for row in r.intervals[1:-1]:
        assert row.reason and "at least 3" in row.reason
        assert row.trough_concentration == pytest.approx(f(starts[row.number] - 0.25))
    assert r.clearance == pytest.approx(cl, rel=0.05)
    assert last.accumulation_ratio == pytest.approx(1 / (1 - math.exp(-k * r.interval)),
                                                    rel=0.03)
    assert first.clearance == pytest.approx(cl, rel=0.05)     # the first dose's own AUCinf


def test_tolerances_are_options_and_stated():
    t, c, starts, amounts, durations = subject(3, 4.0, 45.0)
    strict = nca_subject("S", t, c, np.zeros(t.size, bool), starts, amounts, durations,
                         interval_tolerance=(0.0, 0.01))
    assert "irregular" in strict.regimen and strict.mode != "steady state"
    assert strict.mode in ("first dose", "not computed")
    lax = nca_subject("S", t, c, np.zeros(t.size, bool), starts, amounts, durations)
    assert "regular" in lax.regimen and "the larger of 10% and 1 h" in lax.regimen


def test_references_assign_levels_to_their_dose():
    # a level drawn 2 h after dose 2 but recorded as referring to dose 1 (a late
    # sample of dose 1's profile): with the reference it counts for dose 1
    cl, v = 4.0, 40.0
    starts, amounts, durations = np.array([0.0, 12.0]), np.full(2, 400.0), np.ones(2)
    t = np.array([0.5, 1.5, 3.0, 6.0, 11.75, 13.0, 16.0, 20.0, 24.0])
    c = model.concentration(t, starts, amounts, durations, cl, v)
    ref = np.array([0, 0, 0, 0, 12, 12, 12, 12, 12.0])
    r = nca_subject("S", t, c, np.zeros(t.size, bool), starts, amounts, durations,
                    reference=ref)
    assert r.intervals[0].levels == 4 and r.intervals[1].levels == 4
    assert any("pre-dose level drawn 0.25 h before dose 2" in n for n in r.intervals[1].notes)


def test_interval_choice_and_outputs(run_cli, tmp_path):
    import pandas as pd

    from tests.conftest import SCENARIOS

    r = run_cli("nca", SCENARIOS / "demo-sdtm.toml", "--interval", "last", "--json",
                "--out", tmp_path / "o")
    assert r.code == 0, r.err
    v11 = next(s for s in r.json()["subjects"] if s["subject"] == "INVENTED-V11")
    assert [d["number"] for d in v11["intervals"]] == [4]
    assert v11["intervals"][0]["start_clock"].startswith("2026-")
    frame = pd.read_csv(tmp_path / "o" / "nca-intervals.csv")
    assert (frame.groupby("subject")["number"].count() == 1).all()
    r = run_cli("nca", SCENARIOS / "demo-sdtm.toml", "--report", tmp_path / "r.html")
    html = (tmp_path / "r.html").read_text(encoding="utf-8")
    assert "Per dosing interval" in html and "why not computed" in html
    text = run_cli("nca", SCENARIOS / "demo-sdtm.toml").out
    assert "Per dosing interval" in text and "dose #" in text
