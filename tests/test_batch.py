"""Scenario batches: a second path for every row, variability, engines, bad input."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from pkcalc import model
from pkcalc.batch import BatchOptions, compute, grid_frame, parse_columns, run_batch
from pkcalc.core import DoseEvent
from pkcalc.errors import PkcalcInputError
from pkcalc.predict import predict_course

from .conftest import SCENARIOS


def random_table(n: int, seed: int = 0) -> pd.DataFrame:
    """Invented scenarios: mixed repeated-dose and constant-infusion rows."""
    rng = np.random.default_rng(seed)
    interval = rng.choice([6.0, 8.0, 12.0, np.nan], n)
    return pd.DataFrame({
        "id": [f"{i:05d}" for i in range(n)],
        "clearance [mL/min]": rng.uniform(20, 150, n),
        "half_life [h]": rng.uniform(1, 30, n),
        "rate [mg/h]": rng.uniform(10, 900, n),
        "duration [min]": np.where(np.isnan(interval), np.nan, rng.choice([30.0, 60.0], n)),
        "interval [h]": interval,
        "target [mg/L]": rng.uniform(5, 20, n),
        "weight [kg]": rng.uniform(40, 120, n),
    })


def test_every_row_equals_the_single_scenario_path():
    # Second path: the same scenario through pkcalc.predict (general superposition).
    frame = random_table(40, seed=1)
    spec = parse_columns(list(frame.columns))
    out = compute(frame, spec, BatchOptions(at=(24.0, 100.0)))
    assert (out["error"] == "").all()
    for i, row in frame.iterrows():
        cl = row["clearance [mL/min]"] * 0.06
        v = cl * row["half_life [h]"] / math.log(2)
        if np.isnan(row["interval [h]"]):
            doses = [DoseEvent(0.0, row["rate [mg/h]"] * 1e6, 1e6)]
        else:
            d = row["duration [min]"] / 60
            doses = [DoseEvent(0.0, row["rate [mg/h]"] * d, d, row["interval [h]"], 400)]
        pred = predict_course(clearance=cl, volume=v, doses=doses, times=[24.0, 100.0])
        r = out.iloc[i]
        assert r["volume [L]"] == pytest.approx(v, rel=1e-12)
        assert r["plateau_concentration [mg/L]"] == pytest.approx(pred.plateau_concentration,
                                                                   rel=1e-12)
        assert r["concentration_at_24h [mg/L]"] == pytest.approx(pred.concentration[0],
                                                                 rel=1e-9)
        assert r["concentration_at_100h [mg/L]"] == pytest.approx(pred.concentration[1],
                                                                  rel=1e-9)
        assert r["time_to_90_percent [h]"] == pytest.approx(pred.time_to_fraction[0.9], rel=1e-12)
        if pred.steady_state is not None:
            assert r["steady_state_peak [mg/L]"] == pytest.approx(pred.steady_state.peak,
                                                                  rel=1e-9)
            assert r["steady_state_trough [mg/L]"] == pytest.approx(pred.steady_state.trough,
                                                                    rel=1e-9)
        assert r["rate_for_target [mg/h]"] == pytest.approx(row["target [mg/L]"] * cl)


def test_chunking_does_not_change_results(tmp_path):
    frame = random_table(101, seed=2)
    src = tmp_path / "in.csv"
    frame.to_csv(src, index=False)
    opts = BatchOptions(at=(12.0,), population=50, cv_clearance=0.3, cv_volume=0.2, seed=4)
    run_batch(src, tmp_path / "a.csv", opts, chunk_rows=7)
    run_batch(src, tmp_path / "b.csv", opts, chunk_rows=100_000)
    a, b = pd.read_csv(tmp_path / "a.csv"), pd.read_csv(tmp_path / "b.csv")
    pd.testing.assert_frame_equal(a, b)
    assert len(a) == 101


def test_ids_are_carried_through_as_text(tmp_path):
    frame = random_table(5)
    src = tmp_path / "in.csv"
    frame.to_csv(src, index=False)
    run_batch(src, tmp_path / "o.csv", BatchOptions())
    out = pd.read_csv(tmp_path / "o.csv", dtype={"id": str})
    assert out["id"].tolist() == frame["id"].tolist()


def test_an_unnamed_trailing_column_is_carried_through_and_named_in_the_warning(tmp_path):
    # a spreadsheet's trailing separator: batch tables carry unknown columns through, so
    # the empty one is one more (the study tables' stricter rule is not applied here)
    src = tmp_path / "in.csv"
    src.write_text("clearance [L/h],half_life [h],rate [mg/h],\n3,8,30,\n4,6,40,\n")
    summary = run_batch(src, tmp_path / "o.csv", BatchOptions())
    out = pd.read_csv(tmp_path / "o.csv")
    np.testing.assert_allclose(out["plateau_concentration [mg/L]"], [10.0, 10.0])  # R0/CL
    assert "columns not used (carried through): a column without a name" in summary.warnings


# --------------------------------------------------------------------------- variability
def test_zero_variability_collapses_to_the_point_prediction():
    frame = random_table(20, seed=3)
    spec = parse_columns(list(frame.columns))
    out = compute(frame, spec, BatchOptions(at=(24.0,), population=200))
    for q in ("p05", "p50", "p95"):
        np.testing.assert_allclose(out[f"plateau_concentration_{q} [mg/L]"],
                                   out["plateau_concentration [mg/L]"], rtol=1e-12)
        np.testing.assert_allclose(out[f"concentration_at_24h_{q} [mg/L]"],
                                   out["concentration_at_24h [mg/L]"], rtol=1e-12)


def test_plateau_percentiles_match_lognormal():
    # plateau = R0/CL with CL log-normal: the plateau is log-normal with the same
    # log-SD; percentiles from scipy.stats.lognorm, within Monte Carlo error (N = 1e5).
    frame = pd.DataFrame({"clearance [L/h]": [4.0], "volume [L]": [40.0],
                          "rate [mg/h]": [40.0]})
    out = compute(frame, parse_columns(list(frame.columns)),
                  BatchOptions(population=100_000, cv_clearance=0.3, seed=11))
    omega = math.sqrt(math.log1p(0.3**2))
    dist = stats.lognorm(s=omega, scale=10.0)  # median plateau 40/4
    for q, label in ((0.05, "p05"), (0.5, "p50"), (0.95, "p95")):
        assert out[f"plateau_concentration_{label} [mg/L]"].iloc[0] == pytest.approx(
            dist.ppf(q), rel=0.01)


def test_fraction_inside_window():
    frame = pd.DataFrame({"clearance [L/h]": [4.0], "volume [L]": [40.0],
                          "rate [mg/h]": [40.0], "window_low [mg/L]": [8.0],
                          "window_high [mg/L]": [12.0]})
    out = compute(frame, parse_columns(list(frame.columns)),
                  BatchOptions(population=100_000, cv_clearance=0.3, seed=5))
    omega = math.sqrt(math.log1p(0.3**2))
    expected = stats.norm.cdf(math.log(10 / 8) / omega) - stats.norm.cdf(math.log(10 / 12) /
                                                                        omega)
    assert out["fraction_in_window_at_steady_state"].iloc[0] == pytest.approx(expected,
                                                                               abs=0.005)


# --------------------------------------------------------------------------- inputs
def test_grid_product(tmp_path):
    frame = grid_frame({"clearance": ["3 L/h", "50 mL/min"], "volume": ["20 L"],
                        "rate": ["600 mg/h", "800 mg/h"], "interval": ["8 h", "12 h"],
                        "duration": ["1 h"]})
    assert len(frame) == 8
    assert frame.columns[0] == "clearance [L/h]"
    np.testing.assert_allclose(frame["clearance [L/h]"], 3.0)  # 50 mL/min is 3 L/h
    r = run_batch(SCENARIOS / "demo-grid.toml", tmp_path / "g.csv", BatchOptions())
    assert r.rows == 54 and r.failed == 0


def test_scenario_file_input(tmp_path):
    r = run_batch(SCENARIOS / "demo.toml", tmp_path / "s.csv", BatchOptions(at=(24.0,)))
    out = pd.read_csv(tmp_path / "s.csv")
    assert r.rows == 3 and len(out) == 3
    assert out["plateau_concentration [mg/L]"].iloc[0] == pytest.approx(32 / 4.2)


@pytest.mark.parametrize(
    ("cells", "match"),
    [
        ({"half_life [h]": "abc"}, "holds text"),
        ({"half_life [h]": "8 h"}, "holds text (units belong in the header)"),
        ({"clearance [L/h]": "-4"}, "clearance must be > 0"),
        ({"clearance [L/h]": "0"}, "clearance must be > 0"),
        ({"clearance [L/h]": ""}, "clearance is missing"),
        ({"rate [mg/h]": "-5"}, "rate must not be negative"),
        ({"interval [h]": "0.5"}, "longer than the interval"),
    ],
)
def test_row_errors_keep_the_other_rows(tmp_path, cells, match):
    rows = [{"clearance [L/h]": "4", "half_life [h]": "8", "rate [mg/h]": "300",
             "duration [h]": "1", "interval [h]": "8"} for _ in range(3)]
    rows[1].update(cells)
    src = tmp_path / "in.csv"
    pd.DataFrame(rows).to_csv(src, index=False)
    r = run_batch(src, tmp_path / "o.csv", BatchOptions())
    out = pd.read_csv(tmp_path / "o.csv", keep_default_na=False)
    assert r.failed == 1 and match in out["error"].iloc[1]
    assert out["plateau_concentration [mg/L]"].iloc[1] == ""
    assert out["error"].iloc[0] == "" and out["error"].iloc[2] == ""


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("clearance [L/h],rate [mg/h]\n4,30\n", "two independent parameter columns"),
        ("clearance [L/h],volume [L]\n4,30\n", "rate or a dose"),
        ("clearance,volume [L],rate [mg/h]\n4,30,20\n", "declares no unit"),
        ("clearance [mg],volume [L],rate [mg/h]\n4,30,20\n", "dimension"),
        ("clearance [L/h],volume [L],rate [mg/h]\n", "no rows"),
        ("", "empty"),
    ],
)
def test_unusable_tables(tmp_path, text, match):
    src = tmp_path / "in.csv"
    src.write_text(text)
    with pytest.raises(PkcalcInputError, match=match):
        run_batch(src, tmp_path / "o.csv", BatchOptions())
    assert not (tmp_path / "o.csv").exists()
    assert not list(tmp_path.glob(".o.csv.*"))  # no half-written file left behind


def test_truncated_parquet(tmp_path):
    src = tmp_path / "in.parquet"
    random_table(1000).to_parquet(src)
    data = src.read_bytes()
    src.write_bytes(data[: len(data) // 2])
    with pytest.raises(PkcalcInputError, match="Parquet"):
        run_batch(src, tmp_path / "o.csv", BatchOptions())
    assert not (tmp_path / "o.csv").exists()


def test_never_overwrites_the_input(tmp_path):
    src = tmp_path / "in.csv"
    random_table(3).to_csv(src, index=False)
    before = src.read_bytes()
    with pytest.raises(PkcalcInputError, match="overwrite"):
        run_batch(src, src, BatchOptions())
    assert src.read_bytes() == before


# --------------------------------------------------------------------------- command line
def test_cli_batch(run_cli, tmp_path):
    out = tmp_path / "r.parquet"
    r = run_cli("batch", SCENARIOS / "demo-batch.csv", "--out", out, "--at", "24h,48h",
                "--population", "500", "--cv-clearance", "30%", "--cv-volume", "20%",
                "--plots", tmp_path / "plots", "--quiet")
    assert r.code == 0, r.err
    assert r.out.index("CAUTION") < r.out.index("Batch:")
    frame = pd.read_parquet(out)
    assert len(frame) == 5 and "fraction_in_window_at_24h" in frame
    assert (tmp_path / "plots" / "CAUTION.txt").exists()
    assert (tmp_path / "plots" / "batch-distributions.png").exists()


def test_cli_batch_row_failures_exit_1(run_cli, tmp_path, write):
    src = write("in.csv", "clearance [L/h],volume [L],rate [mg/h]\n4,30,20\n4,-3,20\n")
    r = run_cli("batch", src, "--out", tmp_path / "o.csv", "--json")
    assert r.code == 1
    doc = r.json()
    assert doc["rows"] == 2 and doc["failed"] == 1 and "volume" in doc["first_errors"][0]


def test_cli_batch_unusable_exit_2(run_cli, tmp_path, write):
    src = write("in.csv", "")
    r = run_cli("batch", src, "--out", tmp_path / "o.csv")
    assert r.code == 2 and "empty" in r.err and "Traceback" not in r.err
    r = run_cli("batch", SCENARIOS / "demo-batch.csv", "--out", tmp_path / "o.txt.json")
    assert r.code == 2 and "unknown table format" in r.err


def test_model_series_equals_superposition_for_batch_rows():
    # the repeated-dose closed form the kernel uses equals explicit superposition
    t = np.array([0.0, 5.0, 23.9, 24.0, 47.5])
    c = model.concentration_repeated(t, 300.0, 0.5, 8.0, 4.0, 40.0)
    s, a, d = model.expand_doses([0.0], [300.0], [0.5], [8.0], [50])
    np.testing.assert_allclose(c, model.concentration(t, s, a, d, 4.0, 40.0), rtol=1e-12)
