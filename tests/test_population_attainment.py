"""Target attainment of a population: shares of virtual patients on target.

References outside pkcalc:
- closed form: with ``ln CL ~ N(mu, s^2)`` the steady-state AUC24 of ``dose`` every
  ``tau`` is ``24 dose / (CL tau)``, so the share with AUC24 in ``[a, b]`` is a
  normal-CDF difference (scipy.stats.norm);
- brute force: each given patient's course under 80 repeated infusions by this
  file's own superposition of single infusions (no pkcalc code); its last peak and
  trough equal the steady state to far below any boundary;
- the covariate model applied by hand with numpy draws (typical x (weight / 70)^0.75
  and ^1, log-normal between-subject variability) for a population estimate.
Patients, priors and targets are invented.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy.stats import norm

import pkcalc
from pkcalc.api import population_attainment
from pkcalc.core import Prior
from pkcalc.engines import Engine

PRIOR = Prior(4.0, 45.0, 0.30, 0.20, correlation=0.2, proportional=0.1)


def own_course_extremes(cl, v, dose, tau, t_inf, n=80):
    """Peak (end of the last infusion) and trough (just before the next) after ``n``
    infusions, by superposition written here."""
    k = cl / v
    rate = dose / t_inf
    starts = tau * np.arange(n)

    def level(t):
        since = t - starts[None, :]
        u = np.clip(since, 0, t_inf)
        after = since - u
        c = rate / (k[:, None] * v[:, None]) * (1 - np.exp(-k[:, None] * u)) \
            * np.exp(-k[:, None] * after)
        return np.where(since >= 0, c, 0).sum(axis=1)

    last = starts[-1]
    return level(last + t_inf), level(last + tau - 1e-9)


def test_auc_share_of_a_prior_population_matches_the_normal_cdf():
    r = population_attainment(PRIOR, doses=[500.0, 1000.0], intervals=[12.0],
                              infusion_time=1.0, auc_24=(300.0, 600.0), patients=400_000,
                              seed=5)
    se = r.monte_carlo_se()
    for j, dose in enumerate([500.0, 1000.0]):
        # AUC24 in [a, b]  <=>  CL in [24 dose / (tau b), 24 dose / (tau a)]
        lo, hi = 24 * dose / (12 * 600.0), 24 * dose / (12 * 300.0)
        exact = norm.cdf((math.log(hi) - math.log(4.0)) / 0.3) - \
            norm.cdf((math.log(lo) - math.log(4.0)) / 0.3)
        assert r.fraction[0, j, -1] == pytest.approx(exact, abs=4 * se[0, j, -1] + 1e-4)
        assert r.fraction[0, j, 2] == r.fraction[0, j, -1]
        assert np.isnan(r.fraction[0, j, 0])          # peak: not a target


def test_given_patients_are_judged_as_a_brute_force_simulation_judges_them():
    rng = np.random.default_rng(3)
    n = 2000
    cl = 4.0 * np.exp(rng.normal(0, 0.35, n))
    v = 45.0 * np.exp(rng.normal(0, 0.25, n))
    table = pd.DataFrame({"clearance [L/h]": cl, "volume [L]": v,
                          "crcl [mL/min]": rng.uniform(20, 130, n)})
    doses, taus = [500.0, 1000.0, 1500.0], [8.0, 12.0]
    r = population_attainment(None, subjects=table, doses=doses, intervals=taus,
                              infusion_time=1.0, peak=(20.0, 40.0), trough=(5.0, 15.0),
                              bands=("crcl", [30, 60, 90]))
    assert r.patients[0] == n and r.band_names[1:] == ["crcl < 30", "crcl 30-60",
                                                       "crcl 60-90", "crcl >= 90"]
    band = np.digitize(table["crcl [mL/min]"], [30, 60, 90])
    for j, reg in enumerate(r.regimens):
        peak, trough = own_course_extremes(cl, v, reg.dose, reg.interval, 1.0)
        ok_p = (peak >= 20) & (peak <= 40)
        ok_t = (trough >= 5) & (trough <= 15)
        assert r.fraction[0, j, 0] == pytest.approx(ok_p.mean(), abs=1e-12)
        assert r.fraction[0, j, 1] == pytest.approx(ok_t.mean(), abs=1e-12)
        assert r.fraction[0, j, -1] == pytest.approx((ok_p & ok_t).mean(), abs=1e-12)
        for b in range(4):
            assert r.fraction[b + 1, j, -1] == pytest.approx((ok_p & ok_t)[band == b].mean())
    assert r.patients[1:].sum() == n


def test_results_do_not_depend_on_the_engine_or_the_workers():
    kw = dict(doses=[250.0, 500.0, 750.0], intervals=[8.0, 12.0], infusion_time=0.5,
              peak=(None, 40.0), auc_24=(200.0, None), patients=250_000, seed=9)
    local = population_attainment(PRIOR, **kw)
    pooled = population_attainment(PRIOR, engine=Engine("local", workers=2), **kw)
    assert np.array_equal(local.fraction, pooled.fraction, equal_nan=True)
    pytest.importorskip("distributed")
    on_dask = population_attainment(PRIOR, engine=Engine("dask", workers=1, timeout=60), **kw)
    assert np.array_equal(local.fraction, on_dask.fraction, equal_nan=True)
    # common random numbers: a regimen's share does not depend on the others on the grid
    alone = population_attainment(PRIOR, **{**kw, "doses": [500.0]})
    assert np.array_equal(alone.fraction[0, :, -1], local.fraction[0, [1, 4], -1])


def test_lowest_dose_reaching_the_share():
    r = population_attainment(PRIOR, doses=[250.0, 500.0, 750.0, 1000.0], intervals=[12.0],
                              infusion_time=1.0, auc_24=(200.0, None), attainment_level=0.8,
                              patients=100_000)
    lowest = r.lowest()[0]
    shares = r.fraction[0, :, -1]
    first = int(np.flatnonzero(shares >= 0.8)[0])
    assert lowest["dose"] == [250.0, 500.0, 750.0, 1000.0][first]
    assert all(s < 0.8 for s in shares[:first])


@pytest.fixture(scope="module")
def sparse_population():
    # iterative two-stage: the allometric weight model of the study file, in a second
    # (the marginal estimate's own covariate model is checked in tests/test_api.py)
    return pkcalc.population_study(pkcalc.example_file("demo-sparse.toml"), adequacy=False,
                                   vpc_replicates=0, method="iterative")


def test_a_population_estimate_with_its_weight_model(sparse_population):
    pop = sparse_population
    subjects = pd.read_csv(pkcalc.example_file("demo-sparse-subjects.csv"))
    r = population_attainment(pop, subjects=subjects, doses=[400.0, 600.0], intervals=[12.0],
                              infusion_time=0.5, auc_24=(150.0, 300.0), patients=300_000,
                              bands=("weight", [70]), seed=2)
    # the same model by hand: allometric typical values, log-normal variability
    rng = np.random.default_rng(123)
    w = rng.choice(subjects["weight [kg]"].to_numpy(), 300_000)
    ref = pop.reference_weight or 70.0
    eta = rng.multivariate_normal([0, 0], np.asarray(pop.omega), 300_000)
    cl = pop.typical["clearance"] * (w / ref) ** 0.75 * np.exp(eta[:, 0])
    for j, dose in enumerate([400.0, 600.0]):
        auc = 24 * dose / (cl * 12.0)
        ok = (auc >= 150) & (auc <= 300)
        se = r.monte_carlo_se()
        assert r.fraction[0, j, -1] == pytest.approx(ok.mean(), abs=5 * se[0, j, -1])
        light = w < 70
        assert r.fraction[1, j, -1] == pytest.approx(ok[light].mean(), abs=5 * se[1, j, -1])
    assert "population estimate" in r.source
    assert r.summary().startswith("CAUTION") or "CAUTION" in r.summary()[:200]
    frame = r.to_frame()
    assert set(frame["band"]) == {"all", "weight < 70", "weight >= 70"}
    assert {"fraction", "monte_carlo_se", "fraction_auc_24"} <= set(frame.columns)


ATTAINMENT_FILE = """title = "invented"
[attainment]
subjects = "patients.csv"
patients = 50000
doses = ["500 mg", "1 g"]
intervals = ["12 h"]
infusion_time = "1 h"
auc_24 = ["300 mg*h/L", "600 mg*h/L"]
bands = { column = "crcl", edges = [60] }
[attainment.prior]
clearance = "4 L/h"
volume = "45 L"
cv_clearance = "30%"
cv_volume = "20%"
error = { proportional = "10%" }
"""


def test_command_line_outputs(run_cli, write, tmp_path):
    write("patients.csv", "crcl [mL/min],weight [kg]\n40,60\n80,70\n100,90\n")
    path = write("a.toml", ATTAINMENT_FILE)
    r = run_cli("attainment", path, "--json", "--out", tmp_path / "o", "--report",
                tmp_path / "r.html")
    assert r.code == 0, r.err
    doc = r.json()
    assert doc["command"] == "attainment" and doc["patients"] == 50_000
    assert doc["bands"] == ["all", "crcl < 60", "crcl >= 60"]
    row = doc["table"][0]
    assert {"band", "regimen", "fraction", "monte_carlo_se", "fraction_auc_24"} <= set(row)
    assert doc["targets"]["auc_24"] == [300.0, 600.0] and doc["targets"]["peak"] is None
    assert {p.name for p in (tmp_path / "o").iterdir()} >= {
        "attainment.json", "attainment.csv", "attainment.png", "CAUTION.txt"}
    html = (tmp_path / "r.html").read_text()
    assert "Target attainment" in html and "not a promise" in html
    text = run_cli("attainment", path, "--patients", "1000").out
    assert text.lstrip("! \n").startswith("CAUTION") and "n=1000" in text


def test_a_notebook_user_gets_the_views_and_the_figure():
    r = pkcalc.population_attainment(PRIOR, doses=[500.0, 1000.0], intervals=[12.0],
                                     infusion_time=1.0, auc_24=(300.0, None), patients=20_000)
    assert isinstance(r, pkcalc.PopulationAttainment)
    assert "pkcalc-result" in r._repr_html_() and "licensed clinicians" in r._repr_html_()
    assert len(r.to_frame()) == 2
    fig = pkcalc.plot(r)
    assert fig.axes[0].get_ylabel().startswith("patients meeting every target")
