"""Sampling-time design (pkcalc.sampling): the information against independent
computations, known optimal designs, the constraints, simulation and engines."""

from __future__ import annotations

import math

import numpy as np
import pytest
import sympy as sp
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from pkcalc import model
from pkcalc.core import DoseEvent, SamplingGroup, SamplingProblem
from pkcalc.engines import Engine
from pkcalc.errors import PkcalcInputError
from pkcalc.sampling import (
    course,
    design_sampling,
    individual_information,
    population_information,
    problem_allowed_set,
)
from pkcalc.sampling.constraints import allowed_set

BOLUS = (np.array([0.0]), np.array([1000.0]), np.array([0.0]))
INFUSIONS = (np.array([0.0, 8.0, 16.0]), np.array([800.0] * 3), np.array([1.0] * 3))


def problem(**kw) -> SamplingProblem:
    base = dict(name="x", design="individual", clearance=4.0, volume=40.0,
                doses=(DoseEvent(0.0, 1000.0, 0.0),), additive=0.5, proportional=0.0,
                groups=(SamplingGroup("patient", 1, 2),), window=(0.5, 48.0))
    base.update(kw)
    return SamplingProblem(**base)


def fd_sensitivities(t, doses, cl, v, h=1e-6):
    """Central differences of the concentration in ln CL and ln V (independent of the
    analytic gradient)."""
    cols = []
    for j in range(2):
        up = [math.log(cl), math.log(v)]
        dn = list(up)
        up[j] += h
        dn[j] -= h
        cu = model.concentration(t, *doses, math.exp(up[0]), math.exp(up[1]))
        cd = model.concentration(t, *doses, math.exp(dn[0]), math.exp(dn[1]))
        cols.append((cu - cd) / (2 * h))
    return np.stack(cols, axis=1)


# --------------------------------------------------------------------------- information
def test_individual_information_equals_finite_differences():
    t = np.array([1.5, 4.0, 9.0, 20.0])
    c = course(t, INFUSIONS, 5.0, 30.0, 0.2, 0.1)
    F = fd_sensitivities(t, INFUSIONS, 5.0, 30.0)
    var = 0.2**2 + (0.1 * model.concentration(t, *INFUSIONS, 5.0, 30.0)) ** 2
    expected = F.T @ np.diag(1 / var) @ F
    np.testing.assert_allclose(individual_information(c), expected, rtol=1e-6)


def test_information_is_the_covariance_of_the_score_monte_carlo():
    # additive error: the score of the normal log-likelihood (by finite differences of
    # scipy.stats.norm.logpdf) has covariance F' S^-1 F
    rng = np.random.default_rng(3)
    t = np.array([1.0, 6.0, 14.0])
    cl, v, sd = 5.0, 30.0, 0.4
    f = model.concentration(t, *INFUSIONS, cl, v)
    y = f + sd * rng.standard_normal((20000, t.size))
    h = 1e-5
    scores = []
    for j in range(2):
        up, dn = [math.log(cl), math.log(v)], [math.log(cl), math.log(v)]
        up[j] += h
        dn[j] -= h
        fu = model.concentration(t, *INFUSIONS, math.exp(up[0]), math.exp(up[1]))
        fd = model.concentration(t, *INFUSIONS, math.exp(dn[0]), math.exp(dn[1]))
        scores.append((stats.norm.logpdf(y, fu, sd).sum(1)
                       - stats.norm.logpdf(y, fd, sd).sum(1)) / (2 * h))
    mc = np.cov(np.array(scores))
    m = individual_information(course(t, INFUSIONS, cl, v, sd, 0.0))
    np.testing.assert_allclose(mc, m, rtol=0.05, atol=0.02 * np.abs(m).max())


def test_population_information_against_finite_differences_and_the_score():
    # first-order model: y ~ N(f(theta), F Omega F' + S); fixed block = mu' V^-1 mu with
    # mu by finite differences, variance block = the Monte-Carlo covariance of the
    # score in the variances (scipy.stats.multivariate_normal.logpdf)
    t = np.array([1.0, 6.0, 14.0])
    cl, v, a, b = 5.0, 30.0, 0.3, 0.1
    omega = np.array([[0.09, 0.02], [0.02, 0.04]])
    c = course(t, INFUSIONS, cl, v, a, b)
    m = population_information(c, omega, a, b)
    F = fd_sensitivities(t, INFUSIONS, cl, v)
    f = model.concentration(t, *INFUSIONS, cl, v)

    def cov(w11, w22, w12, sa2, sp2):
        om = np.array([[w11, w12], [w12, w22]])
        return F @ om @ F.T + np.diag(sa2 + sp2 * f**2)

    V = cov(0.09, 0.04, 0.02, a * a, b * b)
    np.testing.assert_allclose(m[:2, :2], F.T @ np.linalg.solve(V, F), rtol=1e-6)
    rng = np.random.default_rng(5)
    y = rng.multivariate_normal(f, V, size=40000)
    base = np.array([0.09, 0.04, 0.02, a * a, b * b])
    order = [0, 1, 2, 3, 4]  # variance of ln CL, ln V, covariance, additive, proportional
    h = 1e-5
    scores = []
    for j in order:
        up, dn = base.copy(), base.copy()
        up[j] += h
        dn[j] -= h
        lu = stats.multivariate_normal.logpdf(y, f, cov(*up))
        ld = stats.multivariate_normal.logpdf(y, f, cov(*dn))
        scores.append((lu - ld) / (2 * h))
    mc = np.cov(np.array(scores))
    np.testing.assert_allclose(mc, m[2:, 2:], rtol=0.08, atol=0.03 * np.abs(m[2:, 2:]).max())
    assert np.all(m[:2, 2:] == 0)   # block-diagonal


def test_population_information_without_variability_is_the_individual_one():
    t = np.array([2.0, 10.0])
    c = course(t, BOLUS, 4.0, 40.0, 0.5, 0.0)
    m = population_information(c, np.diag([1e-14, 1e-14]), 0.5, 0.0)
    np.testing.assert_allclose(m[:2, :2], individual_information(c), rtol=1e-6)


def test_map_information_adds_the_prior_precision():
    # levels with an enormous error carry no information: the posterior SD is the
    # prior's (a fact of Bayesian updating)
    omega = np.diag([0.3**2, 0.2**2])
    p = problem(design="map", omega=omega, additive=1e6)
    r = design_sampling(p)
    assert r.optimal.expected_rse_percent["clearance"] == pytest.approx(30.0, rel=1e-6)
    assert r.optimal.expected_rse_percent["volume"] == pytest.approx(20.0, rel=1e-6)


# --------------------------------------------------------------------------- known designs
def test_bolus_two_samples_additive_error_box_and_lucas_closed_form():
    # Box & Lucas 1959 (from memory): for C = (D/V) exp(-k t) with constant error the
    # D-optimal pair is the earliest time and 1/k after it.  Derived here with sympy.
    t1, t2, k, v, dose = sp.symbols("t1 t2 k V D", positive=True)
    lncl, lnv = sp.symbols("lncl lnv")
    c = sp.exp(-sp.exp(lncl - lnv) * t1) * dose * sp.exp(-lnv), \
        sp.exp(-sp.exp(lncl - lnv) * t2) * dose * sp.exp(-lnv)
    J = sp.Matrix([[sp.diff(ci, lncl), sp.diff(ci, lnv)] for ci in c])
    det = sp.simplify((J.T * J).det().subs(sp.exp(lncl - lnv), k).subs(sp.exp(-lnv), 1 / v))
    logdet = sp.log(det)
    assert sp.simplify(sp.diff(logdet, t2).subs(t2, t1 + 1 / k)) == 0      # t2 = t1 + 1/k
    d1 = sp.simplify(sp.diff(logdet, t1).subs(t2, t1 + 1 / k))
    assert d1.subs({k: 0.1, t1: 0.5, v: 40, dose: 1000}) < 0             # t1 at its minimum
    r = design_sampling(problem())
    assert r.optimal.times[0] == pytest.approx([0.5, 0.5 + 40.0 / 4.0], abs=2e-3)


def test_proportional_error_moves_the_optimum_to_the_window_ends():
    # ln C is linear in t for a bolus: the log-scale design puts the two levels at the
    # ends of the window (common practice; det = k^2 (t2 - t1)^2, derived in the docs)
    r = design_sampling(problem(additive=0.0, proportional=0.15, window=(1.0, 30.0)))
    assert r.optimal.times[0] == pytest.approx([1.0, 30.0], abs=1e-3)


def test_infusion_sensitivities_clearance_on_the_plateau_volume_on_the_rise():
    # constant-rate infusion C = R/CL (1 - exp(-k t)) (common practice): early in the
    # rise C ~ R t / V (all about V); on the plateau C = R/CL (all about CL)
    doses = (np.array([0.0]), np.array([40.0 * 500]), np.array([500.0]))
    tau = 45.0 / 3.0
    c = course(np.array([0.01 * tau, 10 * tau]), doses, 3.0, 45.0, 0.1, 0.0)
    rel = c.F / c.f[:, None]
    np.testing.assert_allclose(rel[0], [0.0, -1.0], atol=0.01)
    np.testing.assert_allclose(rel[1], [-1.0, 0.0], atol=0.01)


# --------------------------------------------------------------------------- constraints
def test_allowed_set_removes_infusions_and_night_hours():
    a = allowed_set((0.0, 48.0), infusions=[(0.0, 1.0), (8.0, 9.0)], daytime=(6.0, 22.0),
                    clock_hour=20.0)
    # time 0 is 20:00: allowed until 22:00 (2 h), then 06:00-22:00 = 10 h to 26 h, and
    # 34 h to 48 h (06:00 to 20:00 next day)
    assert a.pieces == [(1.0, 2.0), (10.0, 26.0), (34.0, 48.0)]
    u = np.linspace(0, a.length, 50)
    assert np.all(a.contains(a.to_time(u)))
    np.testing.assert_allclose(a.to_u(a.to_time(u)), u, atol=1e-12)


@settings(max_examples=25, deadline=None)
@given(lo=st.floats(0.0, 20.0), width=st.floats(6.0, 60.0), levels=st.integers(2, 4),
       spacing=st.sampled_from([0.0, 0.5, 2.0]), avoid=st.booleans())
def test_designs_respect_every_constraint(lo, width, levels, spacing, avoid):
    p = problem(doses=(DoseEvent(0.0, 500.0, 1.0, 6.0, 10),), window=(lo, lo + width),
                groups=(SamplingGroup("patient", 1, levels),), min_spacing=spacing,
                avoid_infusion=avoid, additive=0.2, proportional=0.1, starts=4)
    allowed = problem_allowed_set(p)
    try:
        r = design_sampling(p)
    except PkcalcInputError as exc:
        assert "hold only" in str(exc) or "no time" in str(exc)
        return
    t = np.array(r.optimal.times[0])
    assert np.all(allowed.contains(t))
    assert np.all(np.diff(t) >= spacing - 1e-9)
    if avoid:
        for s in range(10):
            assert not np.any((t > 6 * s + 1e-9) & (t < 6 * s + 1.0 - 1e-9))


def test_a_window_that_leaves_one_schedule_finds_it():
    # 4 levels 2 h apart in 1-7 h: 1, 3, 5, 7 h is the only schedule (found by hypothesis)
    p = problem(doses=(DoseEvent(0.0, 500.0, 1.0, 6.0, 10),), window=(1.0, 7.0),
                groups=(SamplingGroup("patient", 1, 4),), min_spacing=2.0,
                avoid_infusion=False, additive=0.2, proportional=0.1, starts=4)
    assert design_sampling(p).optimal.times[0] == pytest.approx([1.0, 3.0, 5.0, 7.0])


def test_candidates_exchange_search_finds_the_brute_force_optimum():
    cands = tuple(float(x) for x in (0.5, 1, 2, 3, 5, 8, 12, 16, 24, 36))
    p = problem(design="population", omega=np.diag([0.09, 0.04]), additive=0.0,
                proportional=0.15, candidates=cands,
                groups=(SamplingGroup("a", 20, 2), SamplingGroup("b", 20, 2)))
    r = design_sampling(p)
    from itertools import combinations

    from pkcalc.sampling.optimise import Evaluator

    ev = Evaluator(p)
    best = min((ev.loss([np.array(a), np.array(b)]), a, b)
               for a in combinations(cands, 2) for b in combinations(cands, 2))
    assert ev.loss([np.array(t) for t in r.optimal.times]) == pytest.approx(best[0], abs=1e-9)


def test_fewer_candidates_than_levels_is_refused():
    p = problem(candidates=(1.0, 60.0), groups=(SamplingGroup("patient", 1, 3),))
    with pytest.raises(PkcalcInputError, match="leave 1 candidate time"):
        design_sampling(p)


def test_population_precision_scales_with_the_subjects():
    om = np.diag([0.09, 0.04])
    r1 = design_sampling(problem(design="population", omega=om, additive=0.0,
                                 proportional=0.15, groups=(SamplingGroup("a", 25, 3),)))
    r4 = design_sampling(problem(design="population", omega=om, additive=0.0,
                                 proportional=0.15, groups=(SamplingGroup("a", 100, 3),)))
    np.testing.assert_allclose(r1.optimal.times, r4.optimal.times, atol=1e-6)
    for k in ("clearance", "volume"):
        assert r4.optimal.expected_rse_percent[k] == pytest.approx(
            r1.optimal.expected_rse_percent[k] / 2, rel=1e-6)


def test_one_level_per_subject_cannot_tell_variability_from_error():
    p = problem(design="population", omega=np.diag([0.09, 0.04]), additive=0.0,
                proportional=0.15, groups=(SamplingGroup("a", 50, 1),))
    with pytest.raises(PkcalcInputError, match="singular"):
        design_sampling(p)


def test_your_schedule_is_compared_with_the_optimum():
    r = design_sampling(problem(compare=((2.0, 4.0), (0.5, 10.5))))
    labels = [d.label for d in r.designs]
    assert labels == ["optimal", "compare 1", "compare 2"]
    assert r.designs[1].efficiency < 0.9 and r.designs[2].efficiency == pytest.approx(1, abs=1e-4)
    assert r.to_frame()["design"].tolist() == (["optimal"] * 2 + ["compare 1"] * 2
                                               + ["compare 2"] * 2)


# --------------------------------------------------------------------------- simulation
def test_simulated_precision_matches_the_expected_for_a_rich_individual_design():
    p = problem(groups=(SamplingGroup("patient", 1, 4),), additive=0.2, proportional=0.0)
    r = design_sampling(p, simulate=400, seed=2)
    s = r.optimal.simulation
    assert s.replicates == 400 and s.failed == 0
    for k in ("clearance", "volume"):
        exp_ = r.optimal.expected_rse_percent[k]
        assert s.parameters[k]["empirical_rse_percent"] == pytest.approx(exp_, rel=0.2)
        assert abs(s.parameters[k]["bias_percent"]) < 2.0
    assert 85 <= s.parameters["clearance"]["coverage_percent"] <= 100


def test_map_simulation_covers_the_patients_own_values():
    p = problem(design="map", omega=np.diag([0.3**2, 0.2**2]), additive=0.3,
                proportional=0.1, groups=(SamplingGroup("patient", 1, 2),))
    r = design_sampling(p, simulate=300, seed=4)
    s = r.optimal.simulation.parameters
    for k in ("clearance", "volume"):
        assert s[k]["empirical_rse_percent"] == pytest.approx(
            r.optimal.expected_rse_percent[k], rel=0.25)


@pytest.fixture(scope="module")
def cluster():
    distributed = pytest.importorskip("distributed")
    c = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                 host="127.0.0.1", dashboard_address=":0")
    yield c.scheduler_address
    c.close()


def test_simulation_does_not_depend_on_the_engine_or_the_workers(cluster):
    p = problem(design="population", omega=np.diag([0.09, 0.04]), additive=0.0,
                proportional=0.15, groups=(SamplingGroup("a", 20, 3),), starts=3)
    ref = design_sampling(p, simulate=6, seed=7, refit="iterative")
    for engine in (Engine("local", workers=2), Engine("dask", scheduler=cluster)):
        other = design_sampling(p, simulate=6, seed=7, engine=engine, refit="iterative")
        assert other.optimal.simulation == ref.optimal.simulation


def test_too_many_replicates_are_refused():
    p = problem(design="population", omega=np.diag([0.09, 0.04]), additive=0.0,
                proportional=0.15, groups=(SamplingGroup("a", 1000, 3),))
    with pytest.raises(PkcalcInputError, match="simulated subjects"):
        design_sampling(p, simulate=50_000)
