"""Regimen design and adjustment: worked examples, re-prediction, invariants, bad input."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from pkcalc import model
from pkcalc.design import (
    Limits,
    adjust_peak_trough,
    adjust_proportional,
    adjust_two_levels,
    chiou_clearance,
    design_continuous,
    design_intermittent,
    exact_intermittent,
    exact_two_level_clearance,
    loading_dose_for_target,
    rate_for_target,
    sawchuk_zaske,
)
from pkcalc.schema import expand_events

from .conftest import SCENARIOS


def course(regimen, cl, v, salt=1.0, horizon=400.0, points=40001):
    """Re-predict a proposed regimen with the core model (a second path)."""
    start, amount, duration = expand_events(regimen.events(salt, horizon))
    t = np.unique(np.concatenate([np.linspace(0, horizon, points), start + duration]))
    return t, model.concentration(t, start, amount, duration, cl, v)


# --------------------------------------------------------------------------- worked examples
def test_theophylline_hendeles_1978():
    # Hendeles et al. 1978 (abstract): for ~10 mg/L, a 5 mg/kg
    # loading dose and 0.4 mg/kg/h (V 0.5 L/kg, CL 0.04 L/h/kg; 70 kg here).
    r = design_continuous(0.04 * 70, 0.5 * 70, 10.0, rate_step=None, dose_step=None)
    best = r.regimens[0]
    assert best.rate / 70 == pytest.approx(0.4)
    assert best.loading_dose / 70 == pytest.approx(5.0)


def test_aminophylline_mitenko_ogilvie_1973():
    # Mitenko & Ogilvie, NEJM 1973 (abstract): 5.6 mg/kg then
    # 0.9 mg/kg/h of aminophylline (S = 0.8) gives about 10 mg/L of theophylline.
    # With the implied CL 0.072 L/h/kg and V = 5.6 x 0.8 / 10 L/kg the design with
    # the salt factor returns those doses.
    r = design_continuous(0.072, 5.6 * 0.8 / 10, 10.0, salt_factor=0.8, rate_step=None,
                          dose_step=None)
    assert r.regimens[0].rate == pytest.approx(0.9)
    assert r.regimens[0].loading_dose == pytest.approx(5.6)


def test_lidocaine_rate():
    # Published abstract: 30 µg/kg/min with CL 12.3 mL/min/kg gave
    # about 2.3 µg/mL (10 %: multi-compartment drug). The rate for 2.3 mg/L:
    rate = rate_for_target(2.3, 12.3e-3 * 60)  # mg/h per kg
    assert rate * 1000 / 60 == pytest.approx(30.0, rel=0.10)


def test_incremental_loading_dose_winter():
    # From memory: Winter, *Basic Clinical Pharmacokinetics* -- incremental loading
    # dose (Ctarget - Ccurrent) V / S; theophylline V 0.5 L/kg x 70 kg, level 5 -> 15
    # mg/L, aminophylline S = 0.8: 437.5 mg (recomputed from the formula).
    assert loading_dose_for_target(15.0, 35.0, 0.8, current=5.0) == pytest.approx(437.5)


def test_proportional_adjustment_bauer():
    # From memory: Bauer, *Applied Clinical Pharmacokinetics* -- at steady state on
    # 40 mg/h the level is 15 mg/L; for 10 mg/L the new rate is 40 x 10/15 = 26.7 mg/h,
    # and the infusion may be held ln(15/10)/k hours first (numbers recomputed).
    r = adjust_proportional(15.0, 10.0, current_rate=40.0, volume=35.0)
    assert r.regimens[0].rate == pytest.approx(26.7)
    cl = 40.0 / 15.0
    assert r.estimates["clearance"] == pytest.approx(cl)
    assert r.estimates["pause_before_new_rate"] == pytest.approx(math.log(1.5) / (cl / 35.0))


def test_chiou_formula_and_exact_solution():
    # Chiou et al., J Pharmacokinet Biopharm 1978 (from memory): the formula below;
    # on noise-free one-compartment levels (no loading dose) the exact solve
    # recovers CL, Chiou's trapezoid is biased by several per cent when the levels
    # are far apart and close to exact when they are near ([calc]).
    cl, v, r0 = 4.0, 40.0, 40.0
    c = model.concentration([2.0, 14.0], [0.0], [r0 * 100], [100.0], cl, v)
    assert exact_two_level_clearance(r0, 2.0, c[0], 14.0, c[1], v) == pytest.approx(cl, 1e-10)
    chiou = chiou_clearance(r0, 2.0, c[0], 14.0, c[1], v)
    expected = 2 * r0 / (c[0] + c[1]) + 2 * v * (c[0] - c[1]) / ((c[0] + c[1]) * 12.0)
    assert chiou == pytest.approx(expected)
    assert 0.03 < abs(chiou / cl - 1) < 0.25
    near = model.concentration([10.0, 11.0], [0.0], [r0 * 100], [100.0], cl, v)
    assert chiou_clearance(r0, 10.0, near[0], 11.0, near[1], v) == pytest.approx(cl, rel=0.005)


def test_adjust_two_levels_reports_both():
    cl, v, r0 = 4.0, 40.0, 40.0
    c = model.concentration([2.0, 14.0], [0.0], [r0 * 100], [100.0], cl, v)
    res = adjust_two_levels(r0, 2.0, c[0], 14.0, c[1], v, 8.0, rate_step=None)
    assert res.regimens[0].rate == pytest.approx(32.0)   # 8 mg/L x 4 L/h
    assert res.estimates["clearance_chiou"] != pytest.approx(cl, rel=0.01)
    assert any("differs from the exact" in w for w in res.warnings)


@pytest.mark.parametrize("trough_time", [-0.5, 7.5])
@pytest.mark.parametrize("infusion_time", [0.0, 0.5, 1.0])
def test_sawchuk_zaske_recovers_parameters(trough_time, infusion_time):
    # Sawchuk & Zaske, J Pharmacokinet Biopharm 1976 (from memory): k from the
    # log-linear decline, V from the peak and pre-dose level. On noise-free
    # steady-state one-compartment levels (invented numbers) it is exact [calc].
    cl, v, dose, tau = 5.0, 20.0, 120.0, 8.0
    s, a, d = model.expand_doses([0.0], [dose], [infusion_time], [tau], [60])
    t0 = 50 * tau
    peak_t = infusion_time + 0.5
    draws = [t0 + peak_t, t0 + trough_time]
    levels = model.concentration(draws, s, a, d, cl, v)
    est = sawchuk_zaske(dose, infusion_time, tau, levels[0], peak_t, levels[1], trough_time)
    assert est["elimination_rate"] == pytest.approx(cl / v, rel=1e-8)
    assert est["volume"] == pytest.approx(v, rel=1e-6)
    assert est["clearance"] == pytest.approx(cl, rel=1e-6)
    peak, trough, _ = model.steady_state_intermittent(dose, infusion_time, tau, cl, v)
    assert est["peak_at_end_of_infusion"] == pytest.approx(peak, rel=1e-8)
    assert est["trough_at_end_of_interval"] == pytest.approx(trough, rel=1e-6)


def test_sawchuk_zaske_new_regimen_hits_targets_by_reprediction():
    # Invented aminoglycoside-like numbers; the new regimen is re-predicted with
    # the core model by superposing doses to steady state.
    cl, v = 5.0, 20.0
    s, a, d = model.expand_doses([0.0], [120.0], [0.5], [8.0], [60])
    lv = model.concentration([400 + 1.0, 400 + 7.5], s, a, d, cl, v)
    res = adjust_peak_trough(120.0, 0.5, 8.0, lv[0], 1.0, lv[1], 7.5,
                             peak_limits=Limits(6.0, 10.0), trough_limits=Limits(None, 1.0),
                             dose_step=10.0)
    best = res.regimens[0]
    assert best.meets_target
    t, c = course(best, cl, v, horizon=30 * best.interval)
    last = t >= 28 * best.interval
    assert c[last].max() == pytest.approx(best.predicted["peak"], rel=1e-6)
    assert 6.0 <= c[last].max() <= 10.0 and c[last].min() <= 1.0


# --------------------------------------------------------------------------- re-prediction
@pytest.mark.parametrize("loading_time", [0.0, 0.5, 2.0])
def test_continuous_design_lands_on_target(loading_time):
    cl, v, target = 4.2, 48.0, 8.0
    res = design_continuous(cl, v, target, loading_time=loading_time, rate_step=0.5,
                            dose_step=25.0)
    for reg in res.regimens:
        _, c = course(reg, cl, v, horizon=200.0)
        assert c[-1] == pytest.approx(reg.predicted["plateau"], rel=1e-4)
        assert reg.predicted["plateau"] == pytest.approx(target, abs=0.25 / cl)  # rounding
        if reg.loading_dose:
            assert reg.predicted["highest"] == pytest.approx(c.max(), rel=1e-3)
    if loading_time > 0:
        # the loading infusion sized for its duration reaches the target at its end
        sized = res.regimens[1]
        exact = sized.exact["loading_dose"]
        assert model.concentration([loading_time], [0.0], [exact], [loading_time], cl, v)[0] \
            == pytest.approx(target)
        # while Css*V over the same time under-shoots
        assert res.regimens[0].predicted["lowest_after_loading"] < target


def test_bolus_loading_gives_flat_profile():
    res = design_continuous(3.0, 30.0, 10.0, rate_step=None, dose_step=None)
    _, c = course(res.regimens[0], 3.0, 30.0, horizon=100.0)
    np.testing.assert_allclose(c, 10.0, rtol=1e-12)


def test_intermittent_design_reprediction():
    cl, v = 5.5, 30.0
    res = design_intermittent(cl, v, 1.0, peak_limits=Limits(None, 30.0),
                              trough_limits=Limits(8.0, None), dose_step=50.0)
    best = res.regimens[0]
    assert best.meets_target
    t, c = course(best, cl, v, horizon=40 * best.interval)
    last = t >= 38 * best.interval
    assert c[last].max() == pytest.approx(best.predicted["peak"], rel=1e-6)
    assert c[last].min() == pytest.approx(best.predicted["trough"], rel=1e-3)
    assert best.predicted["auc_24"] == pytest.approx(best.dose / cl * 24 / best.interval)


def test_infeasible_limits_are_named():
    # A short half-life cannot keep a tight peak/trough ratio at practical intervals.
    res = design_intermittent(20.0, 20.0, 0.5, peak_limits=Limits(None, 10.0),
                              trough_limits=Limits(8.0, None))
    assert not res.regimens[0].meets_target
    assert any("both cannot be met" in f for f in res.regimens[0].flags)
    assert any("no practical interval meets every limit" in n for n in res.notes)


def test_maximum_dose_and_loading_ratio_flags():
    res = design_intermittent(1.0, 50.0, 1.0, peak=20.0, trough=12.0, max_dose=100.0,
                              intervals=[6.0, 8.0])
    flags = " ".join(f for r in res.regimens for f in r.flags)
    assert "exceeds the stated maximum" in flags
    # t½ 34.7 h with 6-8 h intervals: accumulation > 3, the loading dose warning fires
    assert any("times the maintenance dose" in w for w in res.warnings)
    cont = design_continuous(4.0, 40.0, 10.0, max_rate=30.0)
    assert any("exceeds the stated maximum" in f for f in cont.regimens[0].flags)


# --------------------------------------------------------------------------- invariants
@settings(max_examples=80, deadline=None)
@given(cl=st.floats(0.5, 20), v=st.floats(5, 200), t_inf=st.sampled_from([0.0, 0.5, 1.0, 2.0]),
       peak=st.floats(5, 60), ratio=st.floats(1.5, 20))
def test_unrounded_design_hits_peak_and_trough(cl, v, t_inf, peak, ratio):
    trough = peak / ratio
    tau, dose = exact_intermittent(cl, v, t_inf, peak, trough)
    p, tr, _ = model.steady_state_intermittent(dose, t_inf, tau, cl, v)
    assert p == pytest.approx(peak, rel=1e-9)
    assert tr == pytest.approx(trough, rel=1e-9)


@settings(max_examples=80, deadline=None)
@given(cl=st.floats(0.5, 20), v=st.floats(5, 200), t_inf=st.sampled_from([0.5, 1.0]),
       pmax=st.floats(10, 60), tmin=st.floats(0.5, 8), step=st.sampled_from([10.0, 50.0]))
def test_rounding_never_crosses_a_limit_silently(cl, v, t_inf, pmax, tmin, step):
    assume(tmin < pmax / 1.2)
    res = design_intermittent(cl, v, t_inf, peak_limits=Limits(None, pmax),
                              trough_limits=Limits(tmin, None), dose_step=step)
    for reg in res.regimens:
        crossed = (reg.predicted["peak"] > pmax * (1 + 1e-9)
                   or reg.predicted["trough"] < tmin * (1 - 1e-9))
        if crossed:
            assert reg.flags and not reg.meets_target


@settings(max_examples=50, deadline=None)
@given(cl=st.floats(0.2, 30), v=st.floats(3, 300), target=st.floats(0.5, 50),
       rate_step=st.sampled_from([None, 0.1, 1.0]))
def test_continuous_rounding_flags(cl, v, target, rate_step):
    res = design_continuous(cl, v, target, rate_step=rate_step, dose_step=None)
    for reg in res.regimens:
        off = abs(reg.predicted["plateau"] / target - 1) > 0.1
        if off:
            assert not reg.meets_target


# --------------------------------------------------------------------------- CLI
def test_cli_quick_plateau_json(run_cli):
    r = run_cli("design", "--clearance", "4 L/h", "--half-life", "8 h", "--plateau",
                "10 mg/L", "--json")
    assert r.code == 0, r.err
    doc = r.json()
    assert "caution" in doc and doc["units"]["rate"] == "mg/h"
    reg = doc["regimens"][0]
    assert {"rate", "loading_dose", "dose", "interval", "infusion_time", "predicted",
            "meets_target", "flags"} <= set(reg)
    assert set(reg["predicted"]) >= {"plateau", "peak", "trough", "average"}
    assert reg["rate"] == pytest.approx(40.0) and reg["dose"] is None
    assert reg["loading_dose"] == pytest.approx(460.0)  # 10 mg/L x 46.2 L, to 10 mg


def test_cli_quick_peak_trough_text(run_cli):
    r = run_cli("design", "--clearance", "5.5 L/h", "--volume", "30 L", "--peak", "25 mg/L",
                "--trough", "5 mg/L", "--infusion-time", "30 min")
    assert r.code == 0, r.err
    assert r.out.index("CAUTION") < r.out.index("Proposed regimens")
    assert "not an order" in " ".join(r.out.replace("!", " ").split())


def test_cli_design_file_and_out(run_cli, tmp_path):
    out = tmp_path / "d"
    r = run_cli("design", SCENARIOS / "demo-design.toml", "--out", out)
    assert r.code == 0, r.err
    assert (out / "CAUTION.txt").exists() and (out / "regimens.csv").exists()
    assert len(list(out.glob("design-*.png"))) >= 4


@pytest.mark.parametrize(
    ("args", "match"),
    [
        (["--clearance", "4 L/h", "--half-life", "8 h", "--plateau", "10 mg"], "--plateau"),
        (["--clearance", "4 L/h", "--half-life", "8 h", "--plateau", "10 mg/L", "--window",
          "12 mg/L", "8 mg/L"], "not below"),
        (["--clearance", "4 L/h", "--volume", "30 L", "--peak", "5 mg/L", "--trough", "8 mg/L",
          "--infusion-time", "1 h"], "not below the peak"),
        (["--clearance", "4 L/h", "--volume", "30 L", "--peak-min", "30 mg/L", "--peak-max",
          "20 mg/L", "--trough-min", "2 mg/L", "--infusion-time", "1 h"], "not below"),
        (["--half-life", "8 h", "--plateau", "10 mg/L"], "needs 'clearance'"),
        ([], "nothing to design"),
    ],
)
def test_cli_bad_quick_input(run_cli, args, match):
    r = run_cli("design", *args)
    assert r.code == 2
    assert match in r.err and "Traceback" not in r.err


CHIOU = """
[[scenarios]]
name = "c"
volume = "40 L"
[scenarios.design]
method = "chiou"
rate = "30 mg/h"
samples = [ {{ time = "{t1}", concentration = "{c1}" }},
            {{ time = "{t2}", concentration = "{c2}" }} ]
plateau = "8 mg/L"
"""

SZ = """
[[scenarios]]
name = "sz"
[scenarios.design]
method = "sawchuk_zaske"
dose = "120 mg"
infusion_time = "30 min"
interval = "8 h"
peak_sample = {{ time = "{tp}", concentration = "{cp}" }}
trough_sample = {{ time = "{tt}", concentration = "{ct}" }}
peak = "8 mg/L"
trough = "1 mg/L"
"""


@pytest.mark.parametrize(
    ("text", "match"),
    [
        (CHIOU.format(t1="8 h", c1="3 mg/L", t2="2 h", c2="5 mg/L"), "must be drawn after"),
        (CHIOU.format(t1="2 h", c1="3 mg/L", t2="2 h", c2="5 mg/L"), "must be drawn after"),
        (CHIOU.format(t1="2 h", c1="3 mg", t2="8 h", c2="5 mg/L"), "dimension"),
        (SZ.format(tp="1 h", cp="2 mg/L", tt="7.5 h", ct="6 mg/L"), "not below the peak"),
        (SZ.format(tp="1 h", cp="6 mg/L", tt="1 h", ct="2 mg/L"), "same time"),
        (SZ.format(tp="0.25 h", cp="6 mg/L", tt="7.5 h", ct="2 mg/L"), "before the infusion"),
        (CHIOU.format(t1="2 h", c1="3 mg/L", t2="8 h", c2="5 mg/L").replace(
            'volume = "40 L"', ''), "needs 'volume'"),
    ],
)
def test_cli_bad_design_files(run_cli, write, text, match):
    r = run_cli("design", write("bad.toml", text))
    assert r.code == 2, r.out
    assert match in r.err and "bad.toml" in r.err and "Traceback" not in r.err


def test_cli_infeasible_chiou_level(run_cli, write):
    # the second level is higher than the infusion alone could produce: exit 2, named
    text = CHIOU.format(t1="2 h", c1="1 mg/L", t2="3 h", c2="9 mg/L")
    r = run_cli("design", write("bad.toml", text))
    assert r.code == 2 and "above what the infusion alone can reach" in r.err


MAP_CASE = """
[[scenarios]]
name = "m"
weight = "82 kg"
doses = [ { start = "0 h", amount = "400 mg", duration = "30 min" },
          { start = "0.5 h", rate = "35 mg/h", duration = "23.5 h" } ]
[scenarios.design]
method = "map"
levels = [ { time = "6 h", concentration = "7.1 mg/L" },
           { time = "22 h", concentration = "6.2 mg/L" } ]
plateau = "8 mg/L"
[scenarios.design.prior]
clearance = "4.2 L/h"
volume = "48 L"
cv_clearance = "35%"
cv_volume = "25%"
error = { proportional = "10%" }
"""


def test_map_design_uses_the_fit_estimate(run_cli, write):
    # second path: the same MAP estimate through pkcalc.fit, and the new rate
    # re-predicted as Css = R0/CL
    from pkcalc.core import SubjectData
    from pkcalc.fit import fit_subjects
    from pkcalc.schema.fitopts import fit_options

    r = run_cli("design", write("m.toml", MAP_CASE), "--json")
    assert r.code == 0, r.err
    d = r.json()["designs"][0]
    s, a, dur = model.expand_doses([0.0, 0.5], [400.0, 35 * 23.5], [0.5, 23.5])
    subject = SubjectData("m", np.array([6.0, 22.0]), np.array([7.1, 6.2]),
                          np.full(2, np.nan), np.zeros(2, bool), np.arange(2), s, a, dur)
    prior = {"clearance": "4.2 L/h", "volume": "48 L", "cv_clearance": "35%",
             "cv_volume": "25%", "error": {"proportional": "10%"}}
    (fit,), _ = fit_subjects([subject], fit_options({"prior": prior, "blq": "drop"}))
    assert d["estimates"]["clearance"] == pytest.approx(fit.clearance, rel=1e-9)
    reg = d["regimens"][0]
    assert reg["rate"] / fit.clearance == pytest.approx(8.0, abs=0.1 / fit.clearance)


def test_map_design_needs_prior_and_levels(run_cli, write):
    text = MAP_CASE.split("[scenarios.design.prior]")[0]
    r = run_cli("design", write("m.toml", text))
    assert r.code == 2 and "needs a prior" in r.err
    r = run_cli("design", write("m2.toml", MAP_CASE.replace(
        'levels = [ { time = "6 h", concentration = "7.1 mg/L" },\n'
        '           { time = "22 h", concentration = "6.2 mg/L" } ]\n', "")))
    assert r.code == 2 and "needs measured levels" in r.err
