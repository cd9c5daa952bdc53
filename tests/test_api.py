"""The library face as a notebook user meets it (pkcalc.api, pkcalc/__init__): tables in
memory, statistical population results, predictions for a new patient, names that are
the user's, errors a user can act on, figures.

References outside pkcalc named beside each check: statsmodels' results convention
(``params``, ``bse``, ``conf_int(alpha)`` with columns 0 and 1, ``cov_params()``,
``pvalues``; statsmodels documentation, LikelihoodModelResults); the normal
distribution of scipy.stats for Wald tests and quantiles; the covariate model
computed by hand (power, linear, categorical, as docs/methods.md §9b states it); an
invented study simulated here with a known truth.
"""

from __future__ import annotations

import inspect
import math

import numpy as np
import pandas as pd
import pytest
from scipy.stats import norm

import pkcalc
from pkcalc import DoseEvent, PkcalcInputError
from pkcalc.core import Effect, PopulationModel, PopulationOptions

from .conftest import SCENARIOS


# --------------------------------------------------------------------------- an invented study
def invented_frames(n: int = 36, seed: int = 11):
    """Levels, doses and subjects as DataFrames with unit headers: CL 5 L/h x
    (weight/70)^0.75 x 0.7 for Sex 'M'; V 50 L x (1 + 0.01 (Age - 40)); 4 levels after
    a 1-h loading infusion and a maintenance infusion (invented)."""
    rng = np.random.default_rng(seed)
    lv, ds, sb = [], [], []
    for i in range(n):
        sid = f"P{i:02d}"
        w = float(np.clip(rng.normal(72, 14), 40, 120))
        sex = "M" if i % 2 else "F"
        age = float(rng.uniform(20, 70))
        cl = 5.0 * (w / 70) ** 0.75 * (0.7 if sex == "M" else 1.0) * math.exp(
            rng.normal(0, 0.25))
        v = 50.0 * (1 + 0.01 * (age - 40)) * math.exp(rng.normal(0, 0.15))
        t = np.sort(rng.choice([0.5, 1.5, 3, 6, 10, 16, 24, 30, 36.0], 4, replace=False))
        c = pkcalc.model.concentration(t, np.array([0, 1.0]), np.array([500.0, 1400.0]),
                                       np.array([1.0, 35.0]), cl, v)
        y = c * np.exp(0.08 * rng.normal(size=t.size))
        lv += [{"subject": sid, "time [h]": a, "concentration [mg/L]": b}
               for a, b in zip(t, y, strict=True)]
        ds += [{"subject": sid, "start [h]": 0.0, "amount [mg]": 500.0, "duration [h]": 1.0},
               {"subject": sid, "start [h]": 1.0, "amount [mg]": 1400.0, "duration [h]": 35.0}]
        sb.append({"subject": sid, "weight [kg]": w, "Sex": sex, "Age": age})
    return pd.DataFrame(lv), pd.DataFrame(ds), pd.DataFrame(sb)


EFFECTS = ["weight on clearance", "sex on clearance", "age on volume linear"]


@pytest.fixture(scope="module")
def frames():
    return invented_frames()


@pytest.fixture(scope="module")
def pop(frames):
    levels, doses, subjects = frames
    return pkcalc.population_study(levels=levels, doses=doses, subjects=subjects,
                                   effects=EFFECTS, adequacy=False)


# --------------------------------------------------------------------------- tables in memory
def test_frames_give_the_same_study_as_the_files(tmp_path):
    # the demo study's CSV files read as DataFrames: the same fits as from the files
    files = {k: SCENARIOS / f"demo-study-{k}.csv" for k in ("levels", "doses", "subjects")}
    from_files = pkcalc.fit_study(levels=files["levels"], doses=files["doses"],
                                  subjects=files["subjects"], adequacy=False)
    frames = {k: pd.read_csv(p) for k, p in files.items()}
    from_frames = pkcalc.fit_study(**frames, adequacy=False)
    a, b = from_files.to_frame(), from_frames.to_frame()
    pd.testing.assert_frame_equal(a, b)
    nca = pkcalc.nca_study(**frames)
    assert len(nca) == len(from_frames)


def test_a_bad_frame_names_the_frame_and_its_row(frames):
    levels, doses, subjects = frames
    # a negative level leaves its subject out, named with the frame's row
    bad = levels.copy()
    bad.loc[5, "concentration [mg/L]"] = -1.0
    fit = pkcalc.fit_study(levels=bad, doses=doses, subjects=subjects, adequacy=False)
    text = "\n".join(str(e) for _, e in fit.failures)
    assert "the levels frame" in text and "row 5" in text
    # a table without units is unusable: the frame is named
    with pytest.raises(PkcalcInputError, match="the doses frame"):
        pkcalc.fit_study(levels=levels, doses=doses.rename(columns={"amount [mg]": "amount"}),
                         subjects=subjects)


def test_entry_points_refuse_what_is_not_a_study():
    for call in (lambda: pkcalc.fit_study(3), lambda: pkcalc.nca_study(),
                 lambda: pkcalc.population_study(object()),
                 lambda: pkcalc.fit_study(pkcalc.load_study_file(
                     SCENARIOS / "demo-study.toml"), options="combined")):
        with pytest.raises(PkcalcInputError) as err:
            call()
        assert "expected" in str(err.value)


# --------------------------------------------------------------------------- statistics
def test_population_results_follow_the_statsmodels_layout_and_agree_with_json(pop):
    doc = pop.document()
    by = {p["name"]: p for p in doc["parameters"]}
    assert list(pop.params.index) == list(by)
    for name, value in pop.params.items():
        assert value == pytest.approx(by[name]["value"], rel=1e-12, abs=1e-300)
        se = pop.bse[name]
        assert (math.isnan(se) and by[name]["se"] is None) or se == pytest.approx(
            by[name]["se"], rel=1e-12)
        ci = pop.conf_int().loc[name]
        if by[name]["ci_low"] is not None:
            assert (ci[0], ci[1]) == (pytest.approx(by[name]["ci_low"], rel=1e-12),
                                      pytest.approx(by[name]["ci_high"], rel=1e-12))
    assert pop.units["typical clearance"] == "L/h" and pop.units["typical volume"] == "L"
    # cov_params is the delta-method covariance whose diagonal gives bse
    cov = pop.cov_params()
    ok = pop.bse.notna()
    assert np.allclose(np.sqrt(np.diag(cov.to_numpy()))[ok.to_numpy()], pop.bse[ok],
                       rtol=1e-9)
    assert np.allclose(cov.to_numpy(), cov.to_numpy().T, equal_nan=True)


def test_conf_int_alpha_and_wald_p_values_by_hand(pop):
    # a 90 % interval of a positive parameter: value x exp(+-z SE/value), z from scipy
    z = norm.ppf(0.95)
    v, se = pop.params["typical clearance"], pop.bse["typical clearance"]
    lo, hi = pop.conf_int(0.10).loc["typical clearance"]
    assert (lo, hi) == (pytest.approx(v * math.exp(-z * se / v)),
                        pytest.approx(v * math.exp(z * se / v)))
    # Wald tests of the effects: exponent/SE, ln(factor)/(SE/factor); two-sided normal
    p = pop.pvalues
    exp_name = "weight on clearance: exponent"
    e, s = pop.params[exp_name], pop.bse[exp_name]
    assert p[exp_name] == pytest.approx(2 * norm.sf(abs(e / s)))
    factor = next(n for n in p.index if n.startswith("Sex=") or n.startswith("sex="))
    f, sf = pop.params[factor], pop.bse[factor]
    assert p[factor] == pytest.approx(2 * norm.sf(abs(math.log(f) / (sf / f))))
    assert math.isnan(p["typical clearance"])
    # the invented truth: the sex factor (0.7 for M) is found, far from 1
    assert p[factor] < 1e-3
    with pytest.raises(ValueError, match="alpha"):
        pop.conf_int(1.5)


def test_factor_log_values_are_the_log_of_the_factor(pop):
    for e in pop.effects:
        if e["kind"] == "factor":
            assert e["log_value"] == pytest.approx(math.log(e["value"]), rel=1e-12)
            assert e["log_value"] != 0.0
    js = [e for e in pop.document()["effects"] if e["kind"] == "factor"]
    assert js and all(e["log_value"] == pytest.approx(math.log(e["value"])) for e in js)


def test_column_names_keep_their_case_and_match_without_it(pop):
    # the subjects frame says 'Sex' and 'Age'; the effects say 'sex' and 'age'
    names = [e["name"] for e in pop.effects]
    assert any(n.startswith("Sex=") for n in names)
    assert any(n.startswith("Age on volume") for n in names)


def test_a_linear_effect_in_years_is_estimated(pop):
    # the invented truth: V x (1 + 0.01 (age - 40)); a slope per year is a small number
    # next to the others and was once left at zero by the optimiser (one iteration)
    name = "Age on volume: slope per unit"
    lo, hi = pop.conf_int().loc[name]
    assert lo < 0.01 < hi and lo > 0
    assert pop.converged and pop.iterations > 3


def test_a_missing_column_is_named_in_the_subjects_table(frames):
    levels, doses, subjects = frames
    with pytest.raises(PkcalcInputError) as err:
        pkcalc.population_study(levels=levels, doses=doses, subjects=subjects,
                                effects=["ApgarInd on volume"], adequacy=False)
    text = str(err.value)
    assert "subjects" in text and "ApgarInd" in text and "Sex" in text
    assert "levels" not in text.split("ApgarInd")[0]


def test_summary_is_the_command_line_text(pop):
    text = pop.summary()
    assert text.lstrip("! \n").startswith("CAUTION")
    assert "L/h" in text and "effects" in text
    assert "covariate: none" not in text
    html = pop._repr_html_()
    assert "pkcalc-result" in html and "CAUTION" in html
    # the compute result's own notebook view (it once failed on a wrong import)
    base = pkcalc.PopulationResult._repr_html_(pop)
    assert "licensed clinicians" in base and "<table" in base


# --------------------------------------------------------------------------- a new patient
def test_a_new_patient_by_hand_computation_of_the_covariate_model(pop):
    p = pop.params
    refs = {e["effect"].split(" ")[0]: e["reference"] for e in pop.effects}
    factor_name = next(n for n in p.index if n.startswith("Sex="))
    level = factor_name.split("=")[1].split(" ")[0]
    for sex in ("F", "M"):
        patient = {"weight": 55.0, "Sex": sex, "age": 63.0}
        got = pop.individual_parameters(patient)
        cl = p["typical clearance"] * (55.0 / refs["weight"]) ** p[
            "weight on clearance: exponent"] * (p[factor_name] if sex == level else 1.0)
        v = p["typical volume"] * (1 + p["Age on volume: slope per unit"] * (63.0 - refs["Age"]))
        assert got.clearance == pytest.approx(cl, rel=1e-10)
        assert got.volume == pytest.approx(v, rel=1e-10)
        # the between-subject range: exp(mu +- z omega^0.5) (log-normal quantiles)
        z = norm.ppf(0.975)
        om = p["between-subject variance of ln clearance"]
        assert got.clearance_range == (pytest.approx(cl * math.exp(-z * math.sqrt(om))),
                                       pytest.approx(cl * math.exp(z * math.sqrt(om))))
        assert got.clearance_ci[0] < cl < got.clearance_ci[1]
    with pytest.raises(PkcalcInputError, match="Sex"):
        pop.individual_parameters({"weight": 55.0, "age": 63.0})
    with pytest.raises(PkcalcInputError, match="not a level"):
        pop.individual_parameters({"weight": 55.0, "Sex": "X", "age": 63.0})


def test_predict_for_a_new_patient_and_design_from_the_prior(pop):
    from pkcalc.design import Limits, adjust_map

    patient = {"weight": 80.0, "Sex": "F", "age": 45.0}
    doses = [DoseEvent(0.0, 1000.0, 1.0, every=12.0, count=4)]
    t = np.linspace(0, 48, 97)
    course = pop.predict(patient, doses, t, level=0.9, replicates=400, seed=3)
    typ = pop.individual_parameters(patient)
    exact = pkcalc.predict_course(clearance=typ.clearance, volume=typ.volume, doses=doses,
                                  times=t).concentration
    assert np.allclose(course.typical, exact, rtol=1e-12)
    assert np.all(course.low <= course.median + 1e-12)
    assert np.all(course.median <= course.high + 1e-12)
    again = pop.predict(patient, doses, t, level=0.9, replicates=400, seed=3)
    assert np.array_equal(again.high, course.high)           # seeded
    frame = course.to_frame()
    assert all("[" in c for c in frame.columns)
    prior = pop.to_prior(patient)
    assert prior.clearance == pytest.approx(typ.clearance)
    assert prior.omega_clearance == pytest.approx(math.sqrt(pop.omega[0, 0]))
    levels = [(6.0, float(exact[12]) * 1.1), (11.5, float(exact[23]) * 1.1)]
    res = adjust_map(doses, levels, prior, infusion_time=1.0, peak_limits=Limits(20, 40),
                     trough_limits=Limits(5, 15))
    assert res.regimens and res.estimates["clearance"] > 0


# --------------------------------------------------------------------------- comparison
def test_comparison_tests_nested_pairs_and_has_a_table(frames):
    from pkcalc.population.compare import compare_models
    from pkcalc.schema import load_study

    levels, doses, subjects = frames
    study = load_study(levels, doses, subjects)
    models = (PopulationModel("base"),
              PopulationModel("weight", (Effect("weight", "clearance"),)),
              PopulationModel("weight+sex", (Effect("weight", "clearance"),
                                             Effect("Sex", "clearance"))))
    comp = compare_models(study.subjects, PopulationOptions(), models)
    rows = {r.name: r for r in comp.rows}
    # each model against the largest model nested in it, not only against the first
    assert rows["weight"].compared_with == "base"
    assert rows["weight+sex"].compared_with == "weight"
    d = rows["weight"].result.objective - rows["weight+sex"].result.objective
    assert rows["weight+sex"].lrt_statistic == pytest.approx(max(d, 0.0))
    pairs = {(t["model"], t["nested_model"]) for t in comp.tests()}
    assert pairs == {("weight", "base"), ("weight+sex", "base"), ("weight+sex", "weight")}
    frame = comp.to_frame()
    assert [None if pd.isna(x) else x for x in frame["compared_with"]] == [
        None, "base", "weight"]
    assert "compared with" in comp.summary() and "Every nested pair" in comp.summary()


# --------------------------------------------------------------------------- the names
def test_unknown_subjects_and_misspelt_options_are_input_errors():
    study = pkcalc.load_study_file(SCENARIOS / "demo-study.toml")
    fit = pkcalc.fit_study(study, adequacy=False)
    with pytest.raises(PkcalcInputError, match="V01"):
        fit.subject("V99")
    with pytest.raises(PkcalcInputError, match="error_modle"):
        pkcalc.fit_study(study, error_modle="additive")
    with pytest.raises(PkcalcInputError, match="V99"):
        study.subject("V99")


WRONG = (None, 3, object(), "nonsense", [1, 2], {"a": 1})


def _public_callables():
    from pkcalc import batch, design

    out = [(f"pkcalc.{n}", getattr(pkcalc, n)) for n in pkcalc.__all__
           if callable(getattr(pkcalc, n)) and not (
               isinstance(getattr(pkcalc, n), type)
               and issubclass(getattr(pkcalc, n), BaseException))]
    out += [(f"pkcalc.design.{n}", getattr(design, n)) for n in (
        "design_continuous", "design_intermittent", "adjust_proportional", "adjust_two_levels",
        "adjust_peak_trough", "adjust_map")]
    out.append(("pkcalc.batch.run_batch", batch.run_batch))
    return out


@pytest.mark.parametrize("name,func", _public_callables(), ids=lambda x: x if
                         isinstance(x, str) else "")
def test_wrong_types_give_input_errors(name, func):
    """Every public function, given values of the wrong type for its required
    arguments, raises a ValueError (PkcalcInputError) or FileNotFoundError -- never a
    bare TypeError, KeyError, AttributeError or StopIteration."""
    sig = inspect.signature(func)
    required = [p for p in sig.parameters.values() if p.default is p.empty
                and p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD)]
    keywords = [p for p in sig.parameters.values() if p.default is p.empty
                and p.kind == p.KEYWORD_ONLY]
    for value in WRONG:
        try:
            func(*[value] * len(required), **{p.name: value for p in keywords})
        except (ValueError, FileNotFoundError):
            pass


def test_help_lists_every_option():
    from pkcalc.schema.fitopts import FIT_KEYS, POPULATION_KEYS
    from pkcalc.schema.study import NCA_KEYS

    for func, keys in ((pkcalc.fit_study, FIT_KEYS), (pkcalc.nca_study, NCA_KEYS),
                       (pkcalc.population_study, POPULATION_KEYS)):
        doc = inspect.getdoc(func)
        missing = [k for k in keys if f"``{k}``" not in doc]
        assert not missing, (func.__name__, missing)


def test_the_package_shows_its_public_names_only():
    names = dir(pkcalc)
    for private in ("Any", "annotations", "import_module", "_EXPORTS", "cli", "runner"):
        assert private not in names
    for public in ("PopulationResult", "StudyPopulation", "fit_study", "plot", "load_sdtm"):
        assert public in pkcalc.__all__ and public in names
        getattr(pkcalc, public)


def test_frames_carry_units_in_their_headers(pop):
    study = pkcalc.load_study_file(SCENARIOS / "demo-study.toml")
    nca = pkcalc.nca_study(study)
    fit = pkcalc.fit_study(study, adequacy=False)
    unitless = {"subject", "mode", "converged", "objective", "aic", "bic", "n_levels", "n_blq",
                "starts", "starts_agreed", "warnings", "notes", "points_used", "regimen",
                "assumptions", "reference_dose", "steady_state", "adjusted_r2",
                "accumulation_ratio", "auc_extrapolated_percent", "fluctuation_percent",
                "number", "kind", "levels", "trough_source", "reason", "first_dose_clock",
                "ln_clearance_deviation", "ln_volume_deviation", "one_compartment",
                "adequacy_delta_aic", "adequacy_likelihood_ratio_p", "adequacy_runs_test_p",
                "adequacy_trend_test_p"}
    for frame in (nca.to_frame(), nca.intervals_frame(), fit.to_frame(), pop.to_frame()):
        numeric = frame.select_dtypes("number").columns
        bare = [c for c in numeric if "[" not in c and c not in unitless]
        assert not bare, bare


def test_results_draw_the_figures_the_command_writes(pop):
    from matplotlib.figure import Figure

    study = pkcalc.load_study_file(SCENARIOS / "demo-study.toml")
    fit = pkcalc.fit_study(study, adequacy=False)
    nca = pkcalc.nca_study(study)
    course = pkcalc.predict_course(clearance=3.0, volume=34.6,
                                   doses=[DoseEvent(0.0, 1440.0, 48.0)])
    for fig in (fit.plot(), fit.plot("V01"), nca.plot("V01"), pop.plot(),
                pkcalc.plot(course), pkcalc.plot(fit.subject("V02")), pkcalc.plot(pop)):
        assert isinstance(fig, Figure)
    with pytest.raises(PkcalcInputError):
        pkcalc.plot("not a result")


def test_population_attainment_takes_the_marginal_covariate_model(pop, frames):
    # virtual patients with the study's covariates: the typical values are the model's
    # mean function at each row (weight, sex, age), the variability the estimate's
    from pkcalc.api import population_attainment

    _, _, subjects = frames
    one = subjects.iloc[[0]]
    r = population_attainment(pop, subjects=one, doses=[1000.0], intervals=[12.0],
                              infusion_time=1.0, auc_24=(300.0, None), patients=200_000)
    p = pop.individual_parameters({"weight": float(one["weight [kg]"].iloc[0]),
                                   "Sex": one["Sex"].iloc[0], "Age": float(one["Age"].iloc[0])})
    sd = math.sqrt(p.ln_covariance[0, 0])
    # AUC24 >= 300  <=>  CL <= 24 x 1000 / (12 x 300)
    from scipy.stats import norm

    exact = norm.cdf((math.log(24 * 1000 / (12 * 300)) - p.ln_mean[0]) / sd)
    assert r.fraction[0, 0, -1] == pytest.approx(exact, abs=4 * r.monte_carlo_se()[0, 0, -1])
