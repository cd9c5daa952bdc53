"""Closed-form kinetics against independent references.

References used here (named beside each check):
- scipy.integrate.solve_ivp on dC/dt = input(t)/V - k C (independent numerical solver);
- scipy.signal LTI simulation of G(s) = (1/CL)/(1 + (V/CL) s);
- sympy inverse Laplace transform of R0 / (s CL (1 + tau s));
- mpmath at 50 digits for long half-lives;
- facts of the trade (common practice) on fractions of plateau.
"""

from __future__ import annotations

import itertools
import math

import mpmath
import numpy as np
import pytest
import sympy as sp
from hypothesis import example, given, settings
from hypothesis import strategies as st
from scipy import signal
from scipy.integrate import quad, solve_ivp

from pkcalc import model

# --------------------------------------------------------------------------- helpers


def random_regimen(rng: np.random.Generator, n_events: int = 6):
    """Mixed boluses, overlapping infusions and a repeated train (invented)."""
    start = np.sort(rng.uniform(0, 30, n_events))
    amount = rng.uniform(10, 500, n_events)
    duration = rng.choice([0.0, 0.25, 1.0, 7.5, 20.0], n_events)
    # a repeated short infusion train on top
    s2, a2, d2 = model.expand_doses([2.0], [120.0], [0.5], every=[6.0], count=[5])
    return (np.concatenate([start, s2]), np.concatenate([amount, a2]),
            np.concatenate([duration, d2]))


def ode_reference(t_eval, start, amount, duration, cl, v):
    """solve_ivp of V dC/dt = sum of infusion rates - CL C, with bolus jumps.

    Integrates piecewise between event boundaries (rtol 1e-12) so that the
    discontinuous input never falls inside a step.
    """
    k = cl / v
    bolus = duration == 0
    marks = np.unique(np.concatenate([[0.0], start, (start + duration)[~bolus], t_eval]))

    def rate(t):
        on = (~bolus) & (start <= t) & (t < start + duration)
        return float(np.sum(amount[on] / duration[on]))

    out = {}
    c = 0.0
    for a, b in itertools.pairwise(marks):
        c += float(np.sum(amount[bolus & (start == a)])) / v  # bolus at a (right-continuous)
        if a in t_eval:
            out[a] = c
        mid_rate = rate(0.5 * (a + b))
        sol = solve_ivp(lambda _t, y, r=mid_rate: [r / v - k * y[0]], (a, b), [c],
                        rtol=1e-12, atol=1e-14, method="DOP853")
        c = float(sol.y[0, -1])
    last = marks[-1]
    c += float(np.sum(amount[bolus & (start == last)])) / v
    out[last] = c
    return np.array([out[t] for t in t_eval])


# --------------------------------------------------------------------------- independent solvers
@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_concentration_matches_solve_ivp(seed):
    # Reference: scipy.integrate.solve_ivp (independent numerical ODE solution).
    rng = np.random.default_rng(seed)
    start, amount, duration = random_regimen(rng)
    cl, v = rng.uniform(1, 10), rng.uniform(10, 100)
    t = np.unique(np.concatenate([np.linspace(0, 60, 37), start[:3] + 0.1]))
    ours = model.concentration(t, start, amount, duration, cl, v)
    ref = ode_reference(t, start, amount, duration, cl, v)
    np.testing.assert_allclose(ours, ref, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("seed", [10, 11])
def test_infusions_match_lti_simulation(seed):
    # Reference: scipy.signal.lsim of G(s) = (1/CL)/(1 + (V/CL)s) with a
    # zero-order-hold input, exact when every rate change lies on the grid.
    rng = np.random.default_rng(seed)
    start = np.round(rng.uniform(0, 20, 5), 2)
    duration = np.round(rng.uniform(0.5, 15, 5), 2)
    amount = rng.uniform(50, 400, 5)
    cl, v = rng.uniform(1, 10), rng.uniform(10, 100)
    t = np.round(np.arange(0, 50.0 + 1e-9, 0.01), 2)
    on = (start[:, None] <= t) & (t < (start + duration)[:, None])
    rate = on * (amount / duration)[:, None]
    system = signal.lti([1.0 / cl], [v / cl, 1.0])
    _, y, _ = signal.lsim(system, rate.sum(axis=0), t, interp=False)
    ours = model.concentration(t, start, amount, duration, cl, v)
    np.testing.assert_allclose(ours[1:], y[1:], rtol=1e-9, atol=1e-12)


def test_bolus_matches_lti_impulse():
    # Reference: scipy.signal.impulse of 1/(V s + CL), scaled by the dose.
    cl, v, dose = 3.0, 30.0, 250.0
    t = np.linspace(0, 40, 81)
    _, y = signal.impulse(signal.lti([1.0], [v, cl]), T=t)
    np.testing.assert_allclose(model.concentration(t, [0.0], [dose], [0.0], cl, v), dose * y,
                               rtol=1e-9)


def test_step_response_equals_sympy_inverse_laplace():
    # Reference: sympy inverse Laplace transform of R0 / (s CL (1 + tau s)).
    s, t = sp.symbols("s t", positive=True)
    r0, cl, v = sp.Rational(35), sp.Rational(42, 10), sp.Rational(48)
    tau = v / cl
    response = sp.inverse_laplace_transform(r0 / (s * cl * (1 + tau * s)), s, t)
    f = sp.lambdify(t, response, "mpmath")
    times = np.array([0.5, 1.0, 5.0, 11.0, 24.0, 100.0])
    expected = np.array([float(f(x)) for x in times])
    ours = model.concentration(times, [0.0], [35.0 * 1000], [1000.0], 4.2, 48.0)
    np.testing.assert_allclose(ours, expected, rtol=1e-12)


# --------------------------------------------------------------------------- facts of the trade
@pytest.mark.parametrize(
    ("t_over", "unit", "fraction"),
    [
        (1.0, "time_constant", 1 - math.exp(-1)),  # 63.2 % after one time constant
        (5.0, "time_constant", 1 - math.exp(-5)),  # 99.3 % after five time constants
        (1.0, "half_life", 0.5),                   # 50 % after one half-life
        (math.log2(10), "half_life", 0.9),         # 90 % after 3.32 half-lives
        (2.0, "half_life", 0.75),
        (3.0, "half_life", 0.875),
        (4.0, "half_life", 0.9375),
        (5.0, "half_life", 0.96875),
    ],
)
def test_fraction_of_plateau_facts(t_over, unit, fraction):
    # Common practice (no source): fractions of plateau after n half-lives / time constants.
    cl, v, r0 = 5.0, 50.0, 40.0
    p = model.derived_parameters(cl, v)
    t = t_over * p[unit]
    c = model.concentration([t], [0.0], [r0 * 1e4], [1e4], cl, v)[0]
    assert c / model.plateau_concentration(r0, cl) == pytest.approx(fraction, rel=1e-12)
    assert model.time_to_fraction(fraction, cl, v) == pytest.approx(t, rel=1e-12)


def test_rounded_facts_of_the_trade():
    # Common practice: 63.2 %, 99.3 % and "about 90 % after 3.3 half-lives".
    assert 1 - math.exp(-1) == pytest.approx(0.632, abs=5e-4)
    assert 1 - math.exp(-5) == pytest.approx(0.993, abs=5e-4)
    assert model.time_to_fraction(0.9, 1.0, 1.0 / model.LN2) == pytest.approx(3.3, abs=0.03)


def test_derived_parameters_identities():
    # [calc] k = CL/V, t½ = ln2/k, tau = 1/k.
    p = model.derived_parameters(4.2, 48.0)
    assert p["elimination_rate"] == pytest.approx(4.2 / 48.0)
    assert p["half_life"] == pytest.approx(math.log(2) * 48.0 / 4.2)
    assert p["time_constant"] == pytest.approx(48.0 / 4.2)


@pytest.mark.parametrize(
    "given",
    [
        {"clearance": 4.2, "volume": 48.0},
        {"clearance": 4.2, "half_life": math.log(2) * 48.0 / 4.2},
        {"volume": 48.0, "elimination_rate": 4.2 / 48.0},
        {"clearance": 4.2, "time_constant": 48.0 / 4.2},
    ],
)
def test_resolve_clearance_volume(given):
    cl, v = model.resolve_clearance_volume(**given)
    assert (cl, v) == (pytest.approx(4.2), pytest.approx(48.0))


def test_resolve_needs_two_independent():
    with pytest.raises(ValueError, match="need two"):
        model.resolve_clearance_volume(half_life=8.0)


# --------------------------------------------------------------------------- textbook examples
def test_theophylline_hendeles_1978():
    # Hendeles et al. 1978 (published abstract): a 5 mg/kg
    # loading dose raises the level ~10 mg/L and 0.4 mg/kg/h holds ~10 mg/L,
    # consistent with V ~0.5 L/kg and CL ~0.04 L/h/kg (70 kg here).
    w = 70.0
    cl, v = 0.04 * w, 0.5 * w
    assert model.plateau_concentration(0.4 * w, cl) == pytest.approx(10.0, rel=0.01)
    # loading bolus plus maintenance: flat at the plateau ([calc] LD = Css V)
    t = np.linspace(0, 48, 97)
    c = model.concentration(t, [0.0, 0.0], [5.0 * w, 0.4 * w * 48], [0.0, 48.0], cl, v)
    np.testing.assert_allclose(c, 10.0, rtol=1e-12)


def test_aminophylline_mitenko_ogilvie_1973():
    # Mitenko & Ogilvie, NEJM 1973 (abstract): aminophylline
    # 5.6 mg/kg then 0.9 mg/kg/h gives about 10 mg/L theophylline; with salt
    # factor S = 0.8 the implied clearance S R0 / Css is 0.072 L/h/kg (±10 %).
    implied_cl = 0.8 * 0.9 / 10.0
    assert 0.072 * 0.9 <= implied_cl <= 0.077 * 1.1
    assert model.plateau_concentration(0.8 * 0.9 * 70, implied_cl * 70) == pytest.approx(10.0)


def test_lidocaine_plateau():
    # Published abstract: 30 µg/kg/min with CL 12.3 mL/min/kg;
    # reported Css 2.3 µg/mL, Css = R0/CL gives 2.44 (multi-compartment drug: 10 %).
    rate = 30e-3 * 60 * 70        # mg/h for 70 kg
    cl = 12.3e-3 * 60 * 70        # L/h
    css = model.plateau_concentration(rate, cl)
    assert css == pytest.approx(2.44, abs=0.005)
    assert css == pytest.approx(2.3, rel=0.10)


def test_neonatal_phenobarbital_half_life():
    # Grasela & Donn 1985 (abstract): CL 0.0047 L/h/kg,
    # V 0.96 L/kg -> half-life about 141.6 h.
    p = model.derived_parameters(0.0047, 0.96)
    assert p["half_life"] == pytest.approx(141.6, abs=0.05)


def test_theophylline_loading_with_salt_factor_winter():
    # From memory: the classic theophylline worked example of Winter, *Basic
    # Clinical Pharmacokinetics* (V 0.5 L/kg, 70 kg, target 15 mg/L, given as
    # aminophylline with S = 0.8): LD = V C / S = 656 mg of aminophylline.
    # The numbers are recomputed from the formula, not trusted from memory.
    v, target, s = 0.5 * 70, 15.0, 0.8
    ld_salt = v * target / s
    assert ld_salt == pytest.approx(656.25)
    # giving S x LD of drug as a bolus reaches the target at once
    assert model.concentration([0.0], [0.0], [s * ld_salt], [0.0], 2.8, v)[0] == pytest.approx(15)


def test_loading_dose_flat_profile_any_parameters():
    # [calc] LD = Css V as a bolus with R0 = Css CL gives a flat profile.
    t = np.linspace(0, 100, 51)
    for cl, v in [(1.0, 10.0), (20.0, 5.0), (0.1, 300.0)]:
        c = model.concentration(t, [0, 0], [8 * v, 8 * cl * 100], [0, 100], cl, v)
        np.testing.assert_allclose(c, 8.0, rtol=1e-12)


# --------------------------------------------------------------------------- repeated dosing
@pytest.mark.parametrize("duration", [0.0, 0.5, 1.0, 8.0])
def test_steady_state_formulas_equal_superposition(duration):
    # Bauer, Applied Clinical Pharmacokinetics (from memory) steady-state equations,
    # checked by superposing 400 single doses with the general closed form.
    cl, v, dose, tau = 5.0, 40.0, 600.0, 8.0
    peak, trough, avg = model.steady_state_intermittent(dose, duration, tau, cl, v)
    s, a, d = model.expand_doses([0.0], [dose], [duration], [tau], [400])
    t_last = 399 * tau
    c = model.concentration([t_last + duration, t_last + tau - 1e-9], s, a, d, cl, v)
    assert peak == pytest.approx(c[0], rel=1e-9)
    assert trough == pytest.approx(c[1], rel=1e-7)
    # average = AUC over one interval / tau (numerical integral, trapezoid on a fine grid)
    grid = np.linspace(t_last, t_last + tau, 20001)
    auc = np.trapezoid(model.concentration(grid, s, a, d, cl, v), grid)
    assert avg == pytest.approx(auc / tau, rel=1e-6)


@pytest.mark.parametrize("count", [1, 3, None])
def test_concentration_repeated_equals_expanded(count):
    cl, v = 3.0, 25.0
    t = np.linspace(0, 80, 321)
    n = 20 if count is None else count
    s, a, d = model.expand_doses([0.0], [300.0], [1.5], [12.0], [n])
    ours = model.concentration_repeated(t, 300.0, 1.5, 12.0, cl, v, count=count)
    np.testing.assert_allclose(ours, model.concentration(t, s, a, d, cl, v), rtol=1e-12,
                               atol=1e-14)


def test_periodic_steady_state_two_trains():
    # Two dose trains with the same interval: the periodic formula equals the
    # late part of a long superposition.
    cl, v, tau = 4.0, 30.0, 12.0
    args = ([0.0, 5.0], [500.0, 200.0], [1.0, 0.0])
    peak, trough, avg = model.steady_state_periodic(*args, tau, cl, v)
    s, a, d = model.expand_doses(*args, every=[tau, tau], count=[300, 300])
    grid = np.linspace(299 * tau - tau, 299 * tau, 24001)
    c = model.concentration(grid, s, a, d, cl, v)
    assert peak == pytest.approx(c.max(), rel=1e-6)
    assert trough == pytest.approx(c.min(), rel=1e-4)
    # average = AUC over one interval / tau, by adaptive quadrature split at the events
    t0 = 298 * tau
    auc = sum(
        quad(lambda x: model.concentration([x], s, a, d, cl, v)[0], lo, hi, epsrel=1e-12)[0]
        for lo, hi in ((t0, t0 + 1.0), (t0 + 1.0, t0 + 5.0), (t0 + 5.0, t0 + tau))
    )
    assert avg == pytest.approx(auc / tau, rel=1e-9)


def test_right_continuous_at_bolus():
    c = model.concentration([2.0 - 1e-12, 2.0], [2.0], [100.0], [0.0], 1.0, 10.0)
    assert c[0] == 0.0
    assert c[1] == pytest.approx(10.0)


def test_broadcast_many_scenarios():
    cl = np.array([1.0, 2.0, 4.0])
    v = np.array([10.0, 20.0, 40.0])
    start = np.zeros((3, 2))
    amount = np.array([[100.0, 0.0], [200.0, 0.0], [400.0, 0.0]])
    duration = np.zeros((3, 2))
    t = np.tile(np.array([0.0, 10.0]), (3, 1))
    c = model.concentration(t, start, amount, duration, cl, v)
    assert c.shape == (3, 2)
    np.testing.assert_allclose(c[:, 0], 10.0)
    np.testing.assert_allclose(c[:, 1], 10.0 * np.exp(-1.0))


# --------------------------------------------------------------------------- hypothesis properties
pos = st.floats(0.05, 50.0)
doses = st.lists(
    st.tuples(st.floats(0, 48), st.floats(1, 1000), st.sampled_from([0.0, 0.5, 2.0, 12.0])),
    min_size=1, max_size=6,
)


def _arrays(ev):
    s, a, d = (np.array(x, dtype=float) for x in zip(*ev, strict=True))
    return s, a, d


@settings(max_examples=60, deadline=None)
@given(ev=doses, cl=pos, v=st.floats(1, 500), scale=st.floats(0.01, 100))
def test_linear_in_dose(ev, cl, v, scale):
    s, a, d = _arrays(ev)
    t = np.linspace(0, 100, 41)
    np.testing.assert_allclose(model.concentration(t, s, scale * a, d, cl, v),
                               scale * model.concentration(t, s, a, d, cl, v), rtol=1e-12,
                               atol=1e-300)


@settings(max_examples=60, deadline=None)
@given(ev1=doses, ev2=doses, cl=pos, v=st.floats(1, 500))
def test_superposition_of_two_regimens(ev1, ev2, cl, v):
    s1, a1, d1 = _arrays(ev1)
    s2, a2, d2 = _arrays(ev2)
    t = np.linspace(0, 100, 41)
    both = model.concentration(t, np.r_[s1, s2], np.r_[a1, a2], np.r_[d1, d2], cl, v)
    parts = model.concentration(t, s1, a1, d1, cl, v) + model.concentration(t, s2, a2, d2, cl, v)
    np.testing.assert_allclose(both, parts, rtol=1e-12, atol=1e-300)


@settings(max_examples=60, deadline=None)
@given(rate=st.floats(0.1, 1000), cl=pos, v1=st.floats(1, 500), v2=st.floats(1, 500))
def test_plateau_independent_of_volume(rate, cl, v1, v2):
    # After 60 time constants of the larger volume both are at the same plateau R0/CL.
    t_end = 60 * max(v1, v2) / cl
    c1, c2 = (model.concentration([t_end], [0.0], [rate * 2 * t_end], [2 * t_end], cl, v)[0]
              for v in (v1, v2))
    assert c1 == pytest.approx(rate / cl, rel=1e-12)
    assert c2 == pytest.approx(rate / cl, rel=1e-12)


@settings(max_examples=60, deadline=None)
@given(rate=st.floats(0.1, 1000), cl=pos, v=st.floats(1, 500))
def test_monotone_rise_to_plateau(rate, cl, v):
    t = np.linspace(0, 20 * v / cl, 400)
    c = model.concentration(t, [0.0], [rate * 1e9], [1e9], cl, v)
    assert np.all(np.diff(c) >= 0)
    assert np.all(c <= rate / cl * (1 + 1e-12))


@settings(max_examples=40, deadline=None)
@given(t=st.floats(0.001, 1000), amount=st.floats(1, 1000), duration=st.floats(0.01, 500))
def test_precision_long_half_life(t, amount, duration):
    # Half-life 1e5 h: compare with mpmath at 50 digits (independent arithmetic).
    mpmath.mp.dps = 50
    half_life, v = 1e5, 50.0
    k = math.log(2) / half_life
    cl = k * v
    ours = model.concentration([t], [0.0], [amount], [duration], cl, v)[0]
    mk, mt, md = mpmath.mpf(k), mpmath.mpf(t), mpmath.mpf(duration)
    rate = mpmath.mpf(amount) / md
    if mt <= md:
        ref = rate / (mk * v) * (1 - mpmath.exp(-mk * mt))
    else:
        ref = rate / (mk * v) * (1 - mpmath.exp(-mk * md)) * mpmath.exp(-mk * (mt - md))
    assert ours == pytest.approx(float(ref), rel=1e-13)


def test_analytic_gradient_matches_sympy_and_differences():
    # d C / d ln CL and d C / d ln V of the closed form, against sympy's symbolic
    # derivative of the same expressions (an infusion and a bolus).
    cl_s, v_s, t_s = sp.symbols("CL V t", positive=True)
    k = cl_s / v_s
    rate, dur, dose = 100.0, 2.0, 300.0
    during = rate / cl_s * (1 - sp.exp(-k * t_s))
    after = rate / cl_s * (1 - sp.exp(-k * dur)) * sp.exp(-k * (t_s - dur))
    bolus = dose / v_s * sp.exp(-k * t_s)
    cl, v = 3.0, 40.0
    times = np.array([0.5, 1.5, 2.0, 5.0, 20.0])
    _, grad = model.concentration_and_gradient(times, [0.0, 0.0], [rate * dur, dose],
                                               [dur, 0.0], cl, v)
    for i, x in enumerate(times):
        expr = (during if x <= dur else after) + bolus
        d_cl = float((sp.diff(expr, cl_s) * cl_s).subs({cl_s: cl, v_s: v, t_s: x}))
        d_v = float((sp.diff(expr, v_s) * v_s).subs({cl_s: cl, v_s: v, t_s: x}))
        assert grad[0, i] == pytest.approx(d_cl, rel=1e-10)
        assert grad[1, i] == pytest.approx(d_v, rel=1e-10)


def test_second_derivatives_match_sympy():
    # d2C/dlnCL2, d2C/dlnCL dlnV, d2C/dlnV2 of the closed form (an infusion, a bolus and
    # an initial level at once), against sympy's symbolic derivatives of the same
    # expressions; the first derivatives equal concentration_and_gradient's.
    cl_s, v_s, t_s = sp.symbols("CL V t", positive=True)
    k = cl_s / v_s
    rate, dur, dose, c0, s_bolus = 100.0, 2.0, 300.0, 4.0, 1.0
    during = rate / cl_s * (1 - sp.exp(-k * t_s))
    after = rate / cl_s * (1 - sp.exp(-k * dur)) * sp.exp(-k * (t_s - dur))
    bolus = dose / v_s * sp.exp(-k * (t_s - s_bolus))
    initial = c0 * sp.exp(-k * t_s)
    cl, v = 3.0, 40.0
    times = np.array([0.5, 1.5, 2.0, 5.0, 20.0, 300.0])
    args = (times, [0.0, s_bolus, 0.0], [rate * dur, dose, c0],
            [dur, 0.0, model.INITIAL_LEVEL], cl, v)
    conc, grad, hess = model.concentration_derivatives(*args)
    c1, g1 = model.concentration_and_gradient(*args)
    np.testing.assert_allclose(conc, c1, rtol=1e-14)
    np.testing.assert_allclose(grad, g1, rtol=1e-12, atol=1e-300)
    x, y = sp.symbols("x y")
    for i, tt in enumerate(times):
        expr = (during if tt <= dur else after) + (bolus if tt >= s_bolus else 0) + initial
        in_logs = expr.subs({cl_s: sp.exp(x), v_s: sp.exp(y)}, simultaneous=True)
        point = {x: math.log(cl), y: math.log(v), t_s: tt}
        for row, (a, b) in enumerate(((x, x), (x, y), (y, y))):
            ref = float(sp.diff(in_logs, a, b).subs(point).evalf(30))
            assert hess[row, i] == pytest.approx(ref, rel=1e-9, abs=1e-13), (tt, row)


@pytest.mark.parametrize("kind", ["infusions", "boluses"])
def test_derivatives_of_one_kind_of_dose_match_sympy(kind):
    # the usual study -- every dosing event an infusion, or every one a bolus -- sums
    # each derivative once (no per-kind parts); with a padding slot (amount 0, duration
    # 0) beside two doses, the first and second derivatives against sympy's of the
    # closed form
    cl_s, v_s, t_s = sp.symbols("CL V t", positive=True)
    k = cl_s / v_s

    def infusion(rate, start, dur):
        during = rate / cl_s * (1 - sp.exp(-k * (t_s - start)))
        after = rate / cl_s * (1 - sp.exp(-k * dur)) * sp.exp(-k * (t_s - start - dur))
        return lambda tt: 0 if tt < start else (during if tt <= start + dur else after)

    def bolus(dose, start):
        return lambda tt: 0 if tt < start else dose / v_s * sp.exp(-k * (t_s - start))

    if kind == "infusions":
        first, second = infusion(100.0, 0.0, 2.0), infusion(60.0, 6.0, 0.5)
        durations = [2.0, 0.5, 0.0]
    else:
        first, second = bolus(200.0, 0.0), bolus(30.0, 6.0)
        durations = [0.0, 0.0, 0.0]
    cl, v = 3.0, 40.0
    times = np.array([0.5, 2.0, 5.0, 6.2, 20.0, 150.0])
    args = (times, [0.0, 6.0, 0.0], [200.0, 30.0, 0.0], durations, cl, v)
    _, grad, hess = model.concentration_derivatives(*args)
    _, g1 = model.concentration_and_gradient(*args)
    np.testing.assert_allclose(g1, grad, rtol=1e-12)
    x, y = sp.symbols("x y")
    for i, tt in enumerate(times):
        expr = (first(tt) + second(tt)).subs({cl_s: sp.exp(x), v_s: sp.exp(y)},
                                             simultaneous=True)
        point = {x: math.log(cl), y: math.log(v), t_s: tt}
        for row, a in enumerate((x, y)):
            ref = float(sp.diff(expr, a).subs(point).evalf(30))
            assert grad[row, i] == pytest.approx(ref, rel=1e-10, abs=1e-13), (tt, row)
        for row, (a, b) in enumerate(((x, x), (x, y), (y, y))):
            ref = float(sp.diff(expr, a, b).subs(point).evalf(30))
            assert hess[row, i] == pytest.approx(ref, rel=1e-9, abs=1e-13), (tt, row)


@settings(max_examples=40, deadline=None)
@given(cl=st.floats(0.05, 50.0), v=st.floats(1.0, 500.0), t=st.floats(0.0, 200.0),
       d=st.floats(0.0, 24.0))
@example(cl=1.0, v=1.0, t=3.0, d=2.225073858507203e-309)   # found by hypothesis: A/(V k d)
@example(cl=1.0, v=1.0, t=0.0, d=2.225073858507203e-309)   # overflowed for a vanishing d
def test_second_derivatives_are_differences_of_the_gradient(cl, v, t, d):
    # central differences of the analytic gradient (first-order formulas, tested above
    # against sympy) equal the analytic second derivatives, anywhere in the range
    args = ([t], [0.0], [500.0], [d])
    _, _, hess = model.concentration_derivatives(*args, cl, v)
    h = 1e-5
    cols = []
    for dx, dy in ((h, 0.0), (0.0, h)):
        _, up = model.concentration_and_gradient(*args, cl * math.exp(dx), v * math.exp(dy))
        _, dn = model.concentration_and_gradient(*args, cl * math.exp(-dx), v * math.exp(-dy))
        cols.append((up - dn)[:, 0] / (2 * h))
    scale = max(abs(float(hess[:, 0].max())), abs(float(hess[:, 0].min())), 1e-12)
    np.testing.assert_allclose(hess[:, 0], [cols[0][0], cols[0][1], cols[1][1]],
                               rtol=1e-5, atol=1e-6 * scale)
    assert cols[0][1] == pytest.approx(cols[1][0], rel=1e-5, abs=1e-6 * scale)


# --------------------------------------------------------------------------- initial level, split
def test_initial_level_event_decays_with_k_and_its_gradient_matches_finite_differences():
    # C0 exp(-k t) for an initial-level event (no 1/V); derivatives wrt ln CL, ln V by
    # central differences (independent of the analytic forms)
    t = np.array([0.0, 1.0, 5.0, 12.0])
    start, amount, duration = (np.array([0.0, 2.0]), np.array([3.5, 200.0]),
                               np.array([model.INITIAL_LEVEL, 1.0]))
    cl, v = 4.0, 30.0
    c, grad = model.concentration_and_gradient(t, start, amount, duration, cl, v)
    only_init = 3.5 * np.exp(-cl / v * t)
    dose = model.concentration(t, start[1:], amount[1:], duration[1:], cl, v)
    np.testing.assert_allclose(c, only_init + dose, rtol=1e-13)
    h = 1e-6
    for j, (dcl, dv) in enumerate(((h, 0.0), (0.0, h))):
        up = model.concentration(t, start, amount, duration, cl * math.exp(dcl), v * math.exp(dv))
        dn = model.concentration(t, start, amount, duration, cl * math.exp(-dcl),
                                 v * math.exp(-dv))
        np.testing.assert_allclose(grad[j], (up - dn) / (2 * h), rtol=1e-6, atol=1e-10)


def test_split_events_superposes_to_the_whole_history():
    # the two parts of a history split at any time give the whole course (superposition)
    start, amount, duration = np.array([0.0, 3.0, 6.0]), np.array([100.0, 50.0, 80.0]), \
        np.array([5.0, 0.0, 10.0])
    t = np.linspace(0, 30, 301)
    whole = model.concentration(t, start, amount, duration, 3.0, 30.0)
    for at in (0.0, 2.5, 3.0, 7.0, 20.0):
        before, after = model.split_events(start, amount, duration, at)
        parts = model.concentration(t, *before, 3.0, 30.0) + model.concentration(t, *after,
                                                                                   3.0, 30.0)
        np.testing.assert_allclose(parts, whole, rtol=1e-12, atol=1e-14)
        assert before[1].sum() + after[1].sum() == pytest.approx(amount.sum())


def test_area_by_mass_balance_equals_quadrature():
    # AUC(t1, t2) = (input - V (C2 - C1)) / CL against adaptive quadrature (scipy.quad)
    start, amount, duration = np.array([0.0, 4.0]), np.array([300.0, 100.0]), np.array([2.0, 0.0])
    cl, v = 5.0, 40.0
    t1, t2 = 1.0, 14.0
    area = quad(lambda x: model.concentration([x], start, amount, duration, cl, v)[0], t1, t2,
                points=[2.0, 4.0], limit=200)[0]
    infused = 300.0 * (2.0 - 1.0) / 2.0 + 100.0
    c1, c2 = model.concentration([t1, t2], start, amount, duration, cl, v)
    assert model.area_by_mass_balance(infused, c1, c2, cl, v) == pytest.approx(area, rel=1e-9)


@pytest.mark.parametrize("duration", [0.0, 0.5, 2.0])
def test_amount_to_reach_lands_on_the_target(duration):
    # the amount from amount_to_reach, infused from a level of 4 mg/L, ends at 10 mg/L
    cl, v, c0 = 3.0, 35.0, 4.0
    a = float(model.amount_to_reach(10.0, c0, cl, v, duration))
    ev = (np.array([0.0, 0.0]), np.array([c0, a]), np.array([model.INITIAL_LEVEL, duration]))
    assert model.concentration([duration], *ev, cl, v)[0] == pytest.approx(10.0, rel=1e-12)


def test_row_formulas_match_the_ode():
    # single infusion (ended or not) and a bolus, against scipy solve_ivp
    cl, v = 4.0, 30.0
    for rate, dur in ((30.0, 6.0), (30.0, np.inf)):
        sol = solve_ivp(lambda t, y, r=rate, d=dur: ((r if t < d else 0.0) - cl * y) / v,
                        (0, 12), [0.0], t_eval=[3.0, 12.0], rtol=1e-11, atol=1e-12,
                        max_step=0.05)
        np.testing.assert_allclose(
            model.single_infusion_concentration(np.array([3.0, 12.0]), rate, dur, cl, v),
            sol.y[0], rtol=1e-7)
    sol = solve_ivp(lambda _t, y: -cl * y / v, (0, 10), [350.0 / v], t_eval=[10.0],
                    rtol=1e-11, atol=1e-12)
    assert model.bolus_concentration(10.0, 350.0, cl, v) == pytest.approx(sol.y[0][0],
                                                                          rel=1e-8)
    assert model.rate_for_plateau(8.0, cl) == pytest.approx(8.0 * cl)


# --------------------------------------------------------------------------- two compartments
def ode_two_compartments(t_eval, start, amount, duration, cl, v1, q, v2):
    """solve_ivp of the two-compartment amounts, piecewise between event boundaries
    (bolus jumps into the central compartment), rtol 1e-12 -- independent of the
    closed form."""
    bolus = duration == 0
    marks = np.unique(np.concatenate([[0.0], start, (start + duration)[~bolus], t_eval]))

    def rate(t):
        on = (~bolus) & (start <= t) & (t < start + duration)
        return float(np.sum(amount[on] / duration[on]))

    def rhs(_t, y, r):
        c1, c2 = y[0] / v1, y[1] / v2
        return [r - cl * c1 - q * c1 + q * c2, q * c1 - q * c2]

    out, y = {}, np.zeros(2)
    for a, b in itertools.pairwise(marks):
        y[0] += float(np.sum(amount[bolus & (start == a)]))
        if a in t_eval:
            out[a] = y[0] / v1
        sol = solve_ivp(rhs, (a, b), y, args=(rate(0.5 * (a + b)),), rtol=1e-12, atol=1e-14,
                        method="DOP853")
        y = sol.y[:, -1].copy()
    last = marks[-1]
    y[0] += float(np.sum(amount[bolus & (start == last)]))
    out[last] = y[0] / v1
    return np.array([out[t] for t in t_eval])


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_two_compartments_match_solve_ivp(seed):
    # Reference: scipy.integrate.solve_ivp of the two-compartment ODEs (independent solver).
    rng = np.random.default_rng(seed)
    start, amount, duration = random_regimen(rng)
    cl, v1, q, v2 = rng.uniform(1, 10), rng.uniform(5, 30), rng.uniform(1, 30), \
        rng.uniform(10, 100)
    t = np.unique(np.concatenate([np.linspace(0, 60, 37), start[:3] + 0.1]))
    ours = model.two_compartment_concentration(t, start, amount, duration, cl, v1, q, v2)
    ref = ode_two_compartments(t, start, amount, duration, cl, v1, q, v2)
    np.testing.assert_allclose(ours, ref, rtol=1e-8, atol=1e-10)


@settings(max_examples=200, deadline=None)
@given(st.floats(0.1, 50), st.floats(1, 200), st.floats(0.05, 100), st.floats(1, 500))
def test_two_compartment_macro_constants_satisfy_the_standard_identities(cl, v1, q, v2):
    # Gibaldi & Perrier, Pharmacokinetics, ch. 2 (from memory): alpha + beta =
    # k10 + k12 + k21, alpha beta = k10 k21; the unit-bolus coefficients sum to 1, their
    # initial slope is k10 + k12, and the area D/V1 (c_a/alpha + c_b/beta) equals D/CL.
    a, b, ca, cb = model.two_compartment_macro(cl, v1, q, v2)
    k10, k12, k21 = cl / v1, q / v1, q / v2
    assert a >= b > 0
    assert math.isclose(a + b, k10 + k12 + k21, rel_tol=1e-10)
    assert math.isclose(a * b, k10 * k21, rel_tol=1e-10)
    assert math.isclose(ca + cb, 1.0, rel_tol=1e-12)
    assert math.isclose(ca * a + cb * b, k10 + k12, rel_tol=1e-8)
    assert math.isclose(ca / a + cb / b, 1 / k10, rel_tol=1e-8)


def test_two_compartment_gradient_matches_finite_differences():
    # Reference: central differences of the closed form (independent of the analytic chain).
    rng = np.random.default_rng(7)
    start, amount, duration = random_regimen(rng)
    t = np.linspace(0, 48, 41)
    theta = np.log([4.0, 12.0, 9.0, 35.0])
    _, grad = model.two_compartment_and_gradient(t, start, amount, duration, *np.exp(theta))
    for j in range(4):
        h = np.zeros(4)
        h[j] = 1e-6
        up = model.two_compartment_concentration(t, start, amount, duration, *np.exp(theta + h))
        dn = model.two_compartment_concentration(t, start, amount, duration, *np.exp(theta - h))
        np.testing.assert_allclose(grad[j], (up - dn) / 2e-6, rtol=1e-6, atol=1e-9)


def test_two_compartments_without_exchange_are_one_compartment():
    # Fact of the model: with Q -> 0 the periphery never fills and the central
    # compartment is a one-compartment body of volume V1.
    rng = np.random.default_rng(3)
    start, amount, duration = random_regimen(rng)
    t = np.linspace(0, 60, 61)
    np.testing.assert_allclose(
        model.two_compartment_concentration(t, start, amount, duration, 3.0, 20.0, 1e-9, 50.0),
        model.concentration(t, start, amount, duration, 3.0, 20.0), rtol=1e-7, atol=1e-12)


@pytest.mark.parametrize("d", [1e-12, 5e-324, 2.2e-309])
def test_a_vanishing_infusion_is_a_bolus(d):
    # an infusion shorter than SHORTEST_INFUSION gives the bolus course (finite, no NaN),
    # not A/(V k d) overflowing; the exact infusion differs from the bolus by ~ k d
    t = np.array([0.0, 1.0, 10.0])
    c = model.concentration(t, [0.0], [100.0], [d], 2.0, 20.0)
    bolus = 100.0 / 20.0 * np.exp(-0.1 * t)
    np.testing.assert_allclose(c, bolus, rtol=1e-12)
    _, g, h = model.concentration_derivatives(t, [0.0], [100.0], [d], 2.0, 20.0)
    assert np.all(np.isfinite(g)) and np.all(np.isfinite(h))


# --------------------------------------------------------------------------- compact layout
def _ragged_rows(rng: np.random.Generator, n_rows: int = 5, initial: bool = True):
    """Invented ragged rows padded like a study: many doses (boluses, infusions, with
    ``initial`` sometimes an initial level), few levels, some levels before some doses;
    padding amount 0."""
    rows = []
    for _ in range(n_rows):
        start, amount, duration = random_regimen(rng, n_events=int(rng.integers(1, 8)))
        if initial and rng.random() < 0.5:
            start = np.append(start, 0.0)
            amount = np.append(amount, rng.uniform(1, 5))
            duration = np.append(duration, model.INITIAL_LEVEL)
        t = np.sort(rng.uniform(0, 60, int(rng.integers(1, 5))))
        rows.append((t, start, amount, duration))
    n = max(r[0].size for r in rows)
    e = max(r[1].size for r in rows)
    t = np.zeros((n_rows, n))
    s, a, d = np.zeros((n_rows, e)), np.zeros((n_rows, e)), np.zeros((n_rows, e))
    for i, (ti, si, ai, di) in enumerate(rows):
        t[i, :ti.size], s[i, :si.size], a[i, :ai.size], d[i, :di.size] = ti, si, ai, di
    return t, s, a, d, rows


@given(st.integers(0, 10_000))
@settings(max_examples=25, deadline=None)
def test_contributing_cells_give_the_padded_layout_results(seed):
    """The compact layout (only the pairs that contribute) against the padded layout:
    the same predictions, gradients and second derivatives (rounding only); and rows
    taken in any order, repeated, equal the cells of those padded rows."""
    rng = np.random.default_rng(seed)
    t, s, a, d, _ = _ragged_rows(rng)
    cl, v = rng.uniform(0.5, 10, t.shape[0]), rng.uniform(5, 100, t.shape[0])
    cells = model.event_cells(t, s, a, d)
    padded = model.concentration_derivatives(t, s, a, d, cl, v)
    compact = model.concentration_derivatives(t, s, a, d, cl, v, geometry=cells)
    for x, y in zip(padded, compact, strict=True):
        np.testing.assert_allclose(y, x, rtol=1e-12, atol=1e-14)
    c2, g2 = model.concentration_and_gradient(t, s, a, d, cl, v, geometry=cells)
    np.testing.assert_allclose(c2, padded[0], rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(g2, padded[1], rtol=1e-12, atol=1e-14)
    idx = rng.integers(0, t.shape[0], 7)
    picked = cells.rows(idx)
    direct = model.event_cells(t[idx], s[idx], a[idx], d[idx])
    for name in ("u", "w", "amount", "duration", "row", "slot", "counts"):
        np.testing.assert_array_equal(getattr(picked, name), getattr(direct, name))


def test_contributing_cells_match_solve_ivp():
    # Reference: scipy.integrate.solve_ivp on each row's own dosing history (an
    # independent numerical solution), predictions through the compact layout.
    rng = np.random.default_rng(7)
    t, s, a, d, rows = _ragged_rows(rng, n_rows=4, initial=False)
    cl, v = np.full(t.shape[0], 3.0), np.full(t.shape[0], 40.0)
    cells = model.event_cells(t, s, a, d)
    assert cells.u.size < t.size * s.shape[1]          # the layout is compact here
    conc, _ = model.concentration_and_gradient(t, s, a, d, cl, v, geometry=cells)
    for i, (ti, si, ai, di) in enumerate(rows):
        ref = ode_reference(ti, si, ai, di, 3.0, 40.0)
        np.testing.assert_allclose(conc[i, :ti.size], ref, rtol=1e-9, atol=1e-12)
