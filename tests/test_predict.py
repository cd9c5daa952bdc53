"""Scenario predictions: plateau basis, steady state, target flags, warnings."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from pkcalc import model
from pkcalc.core import DoseEvent, Target
from pkcalc.predict import predict_course


def test_plateau_is_final_rate_over_clearance():
    # [calc] Css = R0/CL for the final maintenance rate (Bourne, Basic Pharmacokinetics ch. 6).
    doses = [DoseEvent(0, 400, 0.5), DoseEvent(0.5, 35 * 47.5, 47.5), DoseEvent(48, 32 * 48, 48)]
    r = predict_course(clearance=4.2, volume=48.0, doses=doses)
    assert r.plateau_concentration == pytest.approx(32 / 4.2)
    assert "32 mg/h" in r.plateau_basis


def test_no_plateau_for_boluses_only():
    r = predict_course(clearance=4.2, volume=48.0, doses=[DoseEvent(0, 400, 0)])
    assert r.plateau_concentration is None
    assert r.steady_state is None


def test_steady_state_of_repeated_infusions():
    # Steady state of a train equals the Bauer (from memory) closed form in model.
    r = predict_course(clearance=5.5, volume=30.0, doses=[DoseEvent(0, 800, 1, every=8, count=9)])
    peak, trough, avg = model.steady_state_intermittent(800, 1, 8, 5.5, 30.0)
    ss = r.steady_state
    assert (ss.peak, ss.trough, ss.average) == (pytest.approx(peak), pytest.approx(trough),
                                                 pytest.approx(avg))
    assert r.plateau_concentration == pytest.approx(800 / (5.5 * 8))


def test_different_intervals_warn():
    doses = [DoseEvent(0, 100, 1, every=8, count=3), DoseEvent(0, 100, 1, every=12, count=3)]
    r = predict_course(clearance=5.0, volume=30.0, doses=doses)
    assert r.steady_state is None
    assert any("different intervals" in w for w in r.warnings)


def test_time_to_fraction():
    r = predict_course(clearance=4.2, volume=4.2 * 8 / model.LN2, doses=[DoseEvent(0, 100, 10)])
    assert r.time_to_fraction[0.5] == pytest.approx(8.0)
    assert r.time_to_fraction[0.9] == pytest.approx(8.0 * np.log2(10))
    assert r.time_to_fraction[0.99] == pytest.approx(8.0 * np.log2(100))


@pytest.mark.parametrize(
    ("target", "n_flags", "match"),
    [
        (Target(plateau=10.0), 0, None),
        (Target(plateau=8.0), 1, "from the target"),
        (Target(low=5.0, high=9.0), 2, "above the window high"),
        (Target(low=11.0, high=20.0), 1, "below the window low"),
    ],
)
def test_target_flags(target, n_flags, match):
    r = predict_course(clearance=3.0, volume=30.0, doses=[DoseEvent(0, 30 * 100, 100)],
                       target=target)
    assert len(r.flags) == n_flags
    if match:
        assert match in r.flags[0]


def test_overshoot_of_loading_dose_flagged():
    doses = [DoseEvent(0, 1000, 0), DoseEvent(0, 30 * 100, 100)]
    r = predict_course(clearance=3.0, volume=30.0, doses=doses, target=Target(None, 5.0, 20.0))
    assert any("the profile reaches" in f for f in r.flags)


def test_plausibility_warning():
    r = predict_course(clearance=4.0, volume=4000.0, doses=[DoseEvent(0, 100, 0)])
    assert any("volume" in w for w in r.warnings)


def test_default_times_cover_dosing_and_washout():
    r = predict_course(clearance=1.0, volume=10.0, doses=[DoseEvent(0, 100, 24)])
    assert r.time[0] == 0 and r.time[-1] == pytest.approx(24 + 5 * 10 * model.LN2)


def test_result_frame_and_summary():
    r = predict_course(clearance=3.0, volume=30.0, doses=[DoseEvent(0, 300, 1)], times=[0, 1, 2])
    frame = r.to_frame()
    assert list(frame.columns) == ["time [h]", "concentration [mg/L]"]
    assert "half-life" in r.summary()
    assert r.concentration_at([1.0])[0] == pytest.approx(r.concentration[1])


def test_predict_refuses_nonpositive():
    with pytest.raises(ValueError, match="positive"):
        predict_course(clearance=0.0, volume=1.0, doses=[DoseEvent(0, 1, 0)])


# --------------------------------------------------------------------------- drug on board, grids
def test_initial_concentration_decays_with_k_beside_the_doses():
    # 2 mg/L on board at time 0 decays with k = CL/V; the ODE with C(0) = 2 (scipy
    # solve_ivp, independent) gives the same course under a 30 mg/h infusion
    from scipy.integrate import solve_ivp

    cl, v = 3.0, 34.62
    r = predict_course(clearance=cl, volume=v, doses=[DoseEvent(0.0, 30.0 * 48, 48.0)],
                times=[0.0, 6.0, 24.0], initial_concentration=2.0)
    sol = solve_ivp(lambda _t, y: (30.0 - cl * y) / v, (0, 24), [2.0], t_eval=[0, 6, 24],
                    rtol=1e-11, atol=1e-12)
    np.testing.assert_allclose(r.concentration, sol.y[0], rtol=1e-8)


def test_coarse_requested_times_warn_and_the_highest_level_is_exact():
    # half-life 10 min sampled hourly: the listed profile misses the peak; the warning says
    # so and `highest` is the true peak at the end of the 6-min infusion (closed form)
    v = 10.0
    k = math.log(2) / (10 / 60)  # 1/h
    cl = k * v
    r = predict_course(clearance=cl, volume=v, doses=[DoseEvent(0.0, 100.0, 0.1)],
                times=np.arange(0.0, 6.0, 1.0))
    peak = 100.0 / 0.1 / cl * (1 - math.exp(-k * 0.1))
    assert r.highest == pytest.approx(peak, rel=1e-9)
    assert r.highest_time == pytest.approx(0.1)
    assert any("misses the peak" in w for w in r.warnings)


def test_default_grid_contains_every_dose_boundary():
    r = predict_course(clearance=3.0, volume=30.0, doses=[DoseEvent(0.0, 100.0, 0.37),
                                                   DoseEvent(5.13, 50.0, 0.0)])
    assert {0.37, 5.13} <= set(np.round(r.time, 12))


# --------------------------------------------------------------------------- dose lists
def _ode_peak_trough_average(doses, cl, v, tau, cycles):
    """Independent check: scipy's ODE solver integrates dC/dt = (rate(t) - CL C)/V over
    ``cycles`` intervals (long enough for steady state) and reads the last interval."""
    from scipy.integrate import solve_ivp

    def rate(t):
        return sum(d.amount / d.duration for d in doses
                   if d.start <= (t % tau) < d.start + d.duration)

    t_end = cycles * tau
    sol = solve_ivp(lambda t, c: [(rate(t) - cl * c[0]) / v], (0, t_end), [0.0],
                    method="LSODA", rtol=1e-10, atol=1e-12, max_step=0.02, dense_output=True)
    t = np.linspace(t_end - tau, t_end, 4001)
    c = sol.sol(t)[0]
    return c.max(), c.min(), np.trapezoid(c, t) / tau


def test_a_list_of_alike_doses_has_the_steady_state_of_the_repeated_record():
    # six 1-h infusions of 500 mg every 8 h written out one by one: the steady state is
    # that of the same regimen written with every/count, checked by the ODE solver; the
    # plateau is the steady-state average, never the infusion rate / CL (500/5 = 100)
    listed = [DoseEvent(8.0 * j, 500.0, 1.0) for j in range(6)]
    r = predict_course(clearance=5.0, volume=40.0, doses=listed)
    ref = predict_course(clearance=5.0, volume=40.0, doses=[DoseEvent(0, 500, 1, 8, 6)])
    assert r.steady_state == ref.steady_state
    assert r.plateau_concentration == pytest.approx(500 / (5.0 * 8))
    assert "6 alike doses every 8 h" in r.plateau_basis
    peak, trough, avg = _ode_peak_trough_average([DoseEvent(0, 500, 1)], 5.0, 40.0, 8.0, 20)
    ss = r.steady_state
    assert (ss.peak, ss.trough, ss.average) == (pytest.approx(peak, rel=1e-4),
                                                 pytest.approx(trough, rel=1e-4),
                                                 pytest.approx(avg, rel=1e-4))


def test_a_loading_dose_before_the_pattern_washes_out_with_a_warning():
    doses = [DoseEvent(0, 1200, 0)] + [DoseEvent(8.0 + 8 * j, 500.0, 1.0) for j in range(4)]
    r = predict_course(clearance=5.0, volume=40.0, doses=doses)
    assert r.steady_state is not None and r.steady_state.interval == 8.0
    assert any("wash out" in w for w in r.warnings)


@pytest.mark.parametrize("doses", [
    [DoseEvent(0, 500, 1), DoseEvent(8, 500, 1), DoseEvent(17, 500, 1)],   # one late dose
    [DoseEvent(0, 500, 1), DoseEvent(8, 500, 1)],                          # two doses only
    [DoseEvent(0, 500, 1), DoseEvent(8, 500, 1), DoseEvent(16, 400, 1)],   # last one different
])
def test_an_irregular_list_has_no_plateau_and_says_so(doses):
    r = predict_course(clearance=5.0, volume=40.0, doses=doses)
    assert r.plateau_concentration is None and r.steady_state is None
    assert "no plateau is defined" in r.plateau_basis
    assert "no plateau is defined" in r.summary()


def test_a_final_constant_infusion_states_how_close_it_gets():
    # 1 - exp(-k T): a 48-h infusion with t1/2 8 h reaches 1 - 2^-6 = 98 % (calc)
    r = predict_course(clearance=3.0, volume=34.62, doses=[DoseEvent(0, 30 * 48, 48)])
    assert "98%" in r.plateau_basis


@settings(max_examples=40, deadline=None)
@given(n=st.integers(3, 12), tau=st.floats(2.0, 48.0), frac=st.floats(0.05, 1.0),
       amount=st.floats(10.0, 5000.0), t0=st.floats(0.0, 100.0))
@example(n=5, tau=5.728248681838162, frac=1.0, amount=10.0, t0=0.0)  # back-to-back infusions
def test_any_regular_list_equals_its_repeated_record(n, tau, frac, amount, t0):
    listed = [DoseEvent(t0 + tau * j, amount, tau * frac) for j in range(n)]
    r = predict_course(clearance=4.0, volume=30.0, doses=listed)
    ref = predict_course(clearance=4.0, volume=30.0,
                         doses=[DoseEvent(t0, amount, tau * frac, tau, n)])
    a, b = r.steady_state, ref.steady_state
    assert [a.peak, a.trough, a.average, a.interval] == pytest.approx(
        [b.peak, b.trough, b.average, b.interval], rel=1e-9)
    assert r.plateau_concentration == pytest.approx(ref.plateau_concentration)


def test_the_50_and_90_percent_lines_have_their_own_styles():
    from pkcalc.plots import profile_figure
    from pkcalc.predict import predict_scenario
    from pkcalc.schema import load_scenario_file

    from .conftest import SCENARIOS

    sc = load_scenario_file(SCENARIOS / "demo.toml").scenarios[0]
    fig = profile_figure(predict_scenario(sc))
    styles = {line.get_label().split(" ")[0]: line.get_linestyle()
              for line in fig.axes[0].get_lines() if "of plateau" in line.get_label()}
    assert styles == {"50%": ":", "90%": "-."}   # dotted and dash-dot, not two dotted ones
