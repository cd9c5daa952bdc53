"""How likely a proposal meets its targets: the posterior grid and the probabilities,
checked against a closed form and an independent Monte Carlo.

References outside pkcalc:
- closed form: after a bolus ``D`` the level at ``tau`` is ``D/V exp(-CL tau / V)``; with
  ``V`` known and ``ln CL ~ N(mu, s^2)`` the level lies in ``[a, b]`` exactly when
  ``CL`` lies in ``[V/tau ln(D/(V b)), V/tau ln(D/(V a))]``, a normal-CDF difference
  (scipy.stats.norm);
- Monte Carlo: ``ln CL, ln V`` drawn from the prior with numpy and kept with
  probability ``L / max L`` (rejection sampling gives exact posterior draws; the
  maximum from scipy's Nelder-Mead), the
  likelihood and the courses from this file's own superposition formula (no pkcalc
  code), and the fraction of draws meeting each target.
All patients, regimens and priors are invented.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import minimize
from scipy.stats import norm

from pkcalc.core import DoseEvent, FitOptions, Prior, SubjectData, expand_events
from pkcalc.design import Limits, adjust_map
from pkcalc.design.attainment import attainment
from pkcalc.fit.posterior import grid_posterior

PRIOR = Prior(4.0, 45.0, math.sqrt(math.log(1 + 0.35**2)), math.sqrt(math.log(1 + 0.25**2)),
              proportional=0.10)


# --------------------------------------------------------------------------- own formula
def own_levels(t, start, amount, duration, cl, v):
    """Levels (draws x times) by superposition, written here from the textbook
    one-compartment solutions (infusion of A over d; bolus when d == 0)."""
    k = (cl / v)[:, None, None]
    vv = v[:, None, None]
    t = np.asarray(t, float)[None, :, None]
    s, a, d = (np.asarray(x, float)[None, None, :] for x in (start, amount, duration))
    since = t - s
    u = np.clip(since, 0.0, d)
    after = since - u
    safe_d = np.where(d > 0, d, 1.0)
    infusion = a / safe_d / (k * vv) * (1 - np.exp(-k * u)) * np.exp(-k * after)
    bolus = a / vv * np.exp(-k * np.maximum(since, 0.0))
    return np.where(since >= 0, np.where(d > 0, infusion, bolus), 0.0).sum(axis=-1)


def posterior_draws(prior: Prior, levels, history, n: int, seed: int):
    """Exact posterior draws by rejection from the prior (independent of pkcalc)."""
    rng = np.random.default_rng(seed)
    oc, ov, r = prior.omega_clearance, prior.omega_volume, prior.correlation
    chol = np.linalg.cholesky(np.array([[oc**2, r * oc * ov], [r * oc * ov, ov**2]]))
    mu = np.log([prior.clearance, prior.volume])
    t = np.array([x[0] for x in levels])
    y = np.array([x[1] for x in levels])
    def loglik(z):
        z = np.atleast_2d(z)
        f = own_levels(t, *history, np.exp(z[:, 0]), np.exp(z[:, 1]))
        sd = np.sqrt(prior.additive**2 + (prior.proportional * f) ** 2)
        return norm.logpdf(y, f, sd).sum(axis=1)

    # the acceptance bound: the likelihood's maximum (scipy's Nelder-Mead from a few
    # starts), so that every draw is kept with probability L / max L
    top = max(-minimize(lambda z: -loglik(z)[0], x0, method="Nelder-Mead",
                        options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 4000}).fun
              for x0 in (mu, np.add(mu, (0.5, -0.3)), np.add(mu, (-0.5, 0.3))))
    keep_cl, keep_v = [], []
    for _ in range(max(n // 250_000, 1)):
        z = mu + rng.standard_normal((250_000, 2)) @ chol.T
        cl, v = np.exp(z[:, 0]), np.exp(z[:, 1])
        ll = loglik(z)
        assert ll.max() <= top + 1e-9
        loglik_ = ll
        kept = np.log(rng.random(cl.size)) < loglik_ - top
        keep_cl.append(cl[kept])
        keep_v.append(v[kept])
    return np.concatenate(keep_cl), np.concatenate(keep_v)


def mc_attainment(result, history, cl, v):
    """Each proposal's probabilities from the draws, with this file's own formula."""
    out = []
    state = result.state
    end = state.start + 72.0
    before = tuple(np.asarray(a)[np.asarray(history[0]) < state.start - 1e-9]
                   for a in history)
    for r in result.regimens:
        events = [e for d in r.doses for e in _record_events(d, end)]
        new = tuple(np.array(x, float) for x in zip(*events, strict=True))
        allev = tuple(np.concatenate([b, n]) for b, n in zip(before, new, strict=True))
        ends = new[0] + new[2]
        ok, probs = np.ones(cl.size, bool), {}
        tgt = result.target
        checks = {"peak": (np.unique(ends[ends <= end]), tgt.get("peak_limits")),
                  "trough": (np.unique(new[0])[1:] - 1e-7, tgt.get("trough_limits"))}
        for key, (times, lim) in checks.items():
            if not lim or all(x is None for x in lim):
                continue
            c = np.concatenate([own_levels(times[i:i + 1], *allev, cl, v)
                                for i in range(times.size)], axis=1)
            m = np.ones(cl.size, bool)
            if lim[0] is not None:
                m &= (c >= lim[0]).all(axis=1)
            if lim[1] is not None:
                m &= (c <= lim[1]).all(axis=1)
            probs[key] = m.mean()
            ok &= m
        probs["joint"] = ok.mean()
        out.append(probs)
    return out


def _record_events(d, end):
    n = d.count or 1
    return [(d.start + i * (d.every or 0.0), d.amount, d.duration) for i in range(n)
            if d.start + i * (d.every or 0.0) <= end]


# --------------------------------------------------------------------------- closed form
def test_a_trough_after_a_bolus_with_known_volume_matches_the_normal_cdf():
    # an uninformative level (additive SD 1e4 mg/L): the posterior is the prior; V is
    # known to 1e-4 on the log scale; two 1000-mg boluses 12 h apart, trough at 12 h
    d, tau, v = 1000.0, 12.0, 40.0
    prior = Prior(4.0, v, 0.3, 1e-4, additive=1e4)
    subject = SubjectData("x", np.array([2.0]), np.array([20.0]), np.array([np.nan]),
                          np.array([False]), np.array([0]), np.array([0.0]), np.array([d]),
                          np.array([0.0]))
    post = grid_posterior(subject, FitOptions(prior=prior, blq="likelihood"),
                          (math.log(4.0), math.log(v)))
    a, b = 4.0, 9.0
    got = attainment(np.exp(post.ln_clearance), np.exp(post.ln_volume), post.weight,
                     (np.empty(0),) * 3, (np.array([0.0, tau]), np.array([d, d]),
                                          np.zeros(2)), 0.0, 24.0, trough=Limits(a, b))
    lo, hi = v / tau * math.log(d / (v * b)), v / tau * math.log(d / (v * a))
    exact = norm.cdf((math.log(hi) - math.log(4.0)) / 0.3) - \
        norm.cdf((math.log(lo) - math.log(4.0)) / 0.3)
    assert got.trough == pytest.approx(exact, abs=0.005)
    assert got.joint == got.trough and got.peak is None


def test_the_grid_holds_the_posterior_and_its_weights_sum_to_one():
    subject = SubjectData("x", np.array([35.5]), np.array([9.0]), np.array([np.nan]),
                          np.array([False]), np.array([0]), np.array([0.0, 12.0, 24.0]),
                          np.array([1000.0] * 3), np.array([1.0] * 3))
    post = grid_posterior(subject, FitOptions(prior=PRIOR, blq="likelihood"),
                          (math.log(4.8), math.log(43.0)))
    assert post.weight.sum() == pytest.approx(1.0)
    assert post.edge_mass < 1e-4
    # the posterior mean of ln CL on the grid equals a brute-force 2-D sum on a much
    # wider, finer rectangle (numpy only: prior x likelihood)
    g_cl, g_v = np.meshgrid(np.linspace(0.3, 3.0, 700), np.linspace(2.2, 5.2, 700),
                            indexing="ij")
    cl, v = np.exp(g_cl.ravel()), np.exp(g_v.ravel())
    f = own_levels([35.5], [0.0, 12.0, 24.0], [1000.0] * 3, [1.0] * 3, cl, v)[:, 0]
    sd = PRIOR.proportional * f
    oc, ov = PRIOR.omega_clearance, PRIOR.omega_volume
    logp = (norm.logpdf(9.0, f, sd) + norm.logpdf(g_cl.ravel(), math.log(4.0), oc)
            + norm.logpdf(g_v.ravel(), math.log(45.0), ov))
    w = np.exp(logp - logp.max())
    w /= w.sum()
    assert np.sum(post.weight * post.ln_clearance) == pytest.approx(
        np.sum(w * g_cl.ravel()), abs=2e-4)
    assert np.sum(post.weight * post.ln_volume) == pytest.approx(
        np.sum(w * g_v.ravel()), abs=2e-4)


# --------------------------------------------------------------------------- Monte Carlo
CASES = {
    # one trough level: a skewed posterior (V barely informed)
    "one-trough": dict(doses=[DoseEvent(0.0, 1000.0, 1.0, 12.0, 3)], levels=[(35.5, 9.0)],
                       infusion_time=1.0, peak_limits=Limits(20.0, 35.0),
                       trough_limits=Limits(5.0, 12.0)),
    # a peak and a trough after the first dose, one-sided trough limit
    "peak-and-trough": dict(doses=[DoseEvent(0.0, 500.0, 0.5)],
                            levels=[(1.5, 14.0), (10.0, 5.5)], infusion_time=0.5,
                            peak_limits=Limits(12.0, 20.0), trough_limits=Limits(None, 4.0),
                            intervals=(8.0, 12.0)),
}


@pytest.mark.parametrize("name", sorted(CASES))
def test_probabilities_match_an_independent_monte_carlo(name):
    case = dict(CASES[name])
    doses, levels = case.pop("doses"), case.pop("levels")
    result = adjust_map(doses, levels, PRIOR, **case)
    history = expand_events(doses)
    cl, v = posterior_draws(PRIOR, levels, history, 1_000_000, seed=7)
    assert cl.size > 30_000
    for r, mc in zip(result.regimens, mc_attainment(result, history, cl, v), strict=True):
        a = r.attainment
        for key, p in mc.items():
            se = math.sqrt(max(p * (1 - p), 1e-4) / cl.size)
            assert getattr(a, key) == pytest.approx(p, abs=0.005 + 3 * se), (r.label, key)


@pytest.mark.slow
def test_probabilities_match_a_million_posterior_draws():
    case = dict(CASES["one-trough"])
    doses, levels = case.pop("doses"), case.pop("levels")
    result = adjust_map(doses, levels, PRIOR, **case)
    history = expand_events(doses)
    cl, v = posterior_draws(PRIOR, levels, history, 10_000_000, seed=11)
    assert cl.size > 1_000_000
    for r, mc in zip(result.regimens, mc_attainment(result, history, cl, v), strict=True):
        for key, p in mc.items():
            assert getattr(r.attainment, key) == pytest.approx(p, abs=0.005), (r.label, key)


# --------------------------------------------------------------------------- the decision
def test_meets_target_needs_the_stated_probability_and_rank_orders_by_it():
    case = dict(CASES["one-trough"])
    doses, levels = case.pop("doses"), case.pop("levels")
    strict = adjust_map(doses, levels, PRIOR, attainment_level=0.95, **case)
    loose = adjust_map(doses, levels, PRIOR, attainment_level=0.05, **case)
    for s, lo in zip(strict.regimens, loose.regimens, strict=True):
        assert s.attainment.joint == pytest.approx(lo.attainment.joint)
        if s.attainment.joint < 0.95:
            assert not s.meets_target
            assert any("below the 95% asked" in f for f in s.flags)
    assert any(r.meets_target for r in loose.regimens)
    ranked = adjust_map(doses, levels, PRIOR, rank="attainment", **case)
    joints = [r.attainment.joint for r in ranked.regimens]
    assert joints == sorted(joints, reverse=True)
    assert ranked.current is not None and "current regimen continued" in ranked.current.label
    band = ranked.regimens[0].attainment.band
    assert len(band["time"]) == len(band["q05"]) and \
        all(lo <= mid <= hi + 1e-12 for lo, mid, hi in zip(band["q05"], band["q50"],
                                                             band["q95"], strict=True))


def test_the_current_infusion_continued_and_a_window_target():
    doses = [DoseEvent(0.0, 400.0, 0.5), DoseEvent(0.5, 35.0 * 23.5, 23.5)]
    res = adjust_map(doses, [(6.0, 7.1), (22.0, 6.2)], PRIOR, plateau=8.0,
                     window=Limits(6.0, 10.0))
    assert res.current is not None and "35 mg/h" in res.current.label
    for r in res.regimens:
        assert r.attainment.level is not None and r.attainment.peak is None
        assert r.attainment.joint == r.attainment.level
    assert 0.0 <= res.current.attainment.joint <= 1.0


# --------------------------------------------------------------------------- outputs
MAP_FILE = """[[scenarios]]
name = "invented trough"
doses = [ { start = "0 h", amount = "1000 mg", duration = "1 h", every = "12 h", count = 3 } ]
[scenarios.design]
method = "map"
levels = [ { time = "35.5 h", concentration = "9 mg/L" } ]
infusion_time = "1 h"
peak = ["20 mg/L", "35 mg/L"]
trough = ["5 mg/L", "12 mg/L"]
attainment_level = "60%"
rank = "attainment"
[scenarios.design.prior]
clearance = "4 L/h"
volume = "45 L"
cv_clearance = "35%"
cv_volume = "25%"
error = { proportional = "10%" }
"""


def test_command_line_outputs_carry_the_chances(run_cli, write, tmp_path):
    import pandas as pd

    path = write("m.toml", MAP_FILE)
    r = run_cli("design", path, "--json", "--out", tmp_path / "o", "--report",
                tmp_path / "r.html")
    assert r.code == 0, r.err
    doc = r.json()
    d = doc["designs"][0]
    assert d["attainment_level"] == pytest.approx(0.6)
    assert d["current"]["label"].startswith("current regimen continued")
    joints = [x["attainment"]["joint"] for x in d["regimens"]]
    assert joints == sorted(joints, reverse=True) and 0 < joints[0] <= 1
    first = d["regimens"][0]["attainment"]
    assert set(first) >= {"peak", "trough", "level", "auc_24", "joint", "method",
                          "effective_sample_size", "band"}
    assert first["level"] is None and first["auc_24"] is None
    for x in d["regimens"]:
        assert x["meets_target"] is False or x["attainment"]["joint"] >= 0.6
    csv = pd.read_csv(tmp_path / "o" / "regimens.csv")
    assert csv["attainment_joint"].tolist() == pytest.approx(joints)
    html = (tmp_path / "r.html").read_text()
    assert "Chance of meeting the targets" in html and "not a guarantee" in html
    text = run_cli("design", path).out
    assert "Chance of meeting the targets" in text and "all at once" in text
    assert "not a guarantee" in text


def test_the_design_plot_draws_the_band():
    from matplotlib.collections import PolyCollection

    from pkcalc.plots import design_figure

    case = dict(CASES["one-trough"])
    res = adjust_map(case.pop("doses"), case.pop("levels"), PRIOR, **case)
    fig = design_figure(res)
    assert any(isinstance(c, PolyCollection) for c in fig.axes[0].collections)
    assert any("5-95 %" in t.get_text() for t in fig.axes[0].get_legend().get_texts())
