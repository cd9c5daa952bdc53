"""The command line: exit codes, JSON contract (docs/formats.md), files, cautions."""

from __future__ import annotations

import subprocess
import sys

import pandas as pd
import pytest

from pkcalc.report import CAUTION

from .conftest import SCENARIOS

DEMO = SCENARIOS / "demo.toml"

PREDICT_SCENARIO_KEYS = {"name", "parameters", "plateau_concentration", "time_to_50_percent",
                         "time_to_90_percent", "time_to_95_percent", "time_to_99_percent",
                         "profile", "steady_state", "warnings"}
PARAMETER_KEYS = {"clearance", "volume", "elimination_rate", "half_life", "time_constant"}
UNIT_KEYS = {"time", "amount", "volume", "concentration", "clearance", "rate",
             "elimination_rate"}


def test_predict_terminal_caution_first(run_cli):
    r = run_cli("predict", DEMO)
    assert r.code == 0, r.err
    first_digit = next(i for i, ch in enumerate(r.out) if ch.isdigit())
    assert r.out.index("CAUTION") < first_digit
    words = " ".join(r.out[:first_digit].replace("!", " ").split())
    assert "licensed clinicians and pharmacists" in words


def test_predict_json_contract(run_cli):
    r = run_cli("predict", DEMO, "--json")
    assert r.code == 0, r.err
    doc = r.json()  # the whole stdout is one JSON document: no banner mixed in
    assert doc["caution"] == CAUTION
    assert set(doc["units"]) == UNIT_KEYS
    assert len(doc["scenarios"]) == 3
    for sc in doc["scenarios"]:
        assert PREDICT_SCENARIO_KEYS <= set(sc)
        assert set(sc["parameters"]) == PARAMETER_KEYS
        assert {k for k in sc if k.startswith("half_lives_to_")} == {
            f"half_lives_to_{p}_percent" for p in (50, 90, 95, 99)}
        assert len(sc["profile"]["time"]) == len(sc["profile"]["concentration"])
    ss = doc["scenarios"][1]["steady_state"]
    assert set(ss) >= {"peak", "trough", "average"}
    assert doc["scenarios"][0]["steady_state"] is None


def test_output_units_are_applied(run_cli, write):
    text = DEMO.read_text().replace('time = "h"', 'time = "min"').replace(
        'concentration = "mg/L"', 'concentration = "ug/mL"')
    r = run_cli("predict", write("d.toml", text), "--json")
    doc = r.json()
    assert doc["units"]["time"] == "min"
    sc = doc["scenarios"][0]
    assert sc["parameters"]["half_life"] == pytest.approx(480.0)
    assert sc["time_to_50_percent"] == pytest.approx(480.0)
    assert sc["profile"]["time"][1] == pytest.approx(30.0)


def test_predict_out_writes_files(run_cli, tmp_path):
    out = tmp_path / "res"
    r = run_cli("predict", DEMO, "--out", out)
    assert r.code == 0, r.err
    assert (out / "CAUTION.txt").read_text().startswith("CAUTION")
    summary = pd.read_csv(out / "summary.csv")
    assert len(summary) == 3
    assert "plateau_concentration [mg/L]" in summary.columns
    for folder in summary["folder"]:
        prof = pd.read_csv(out / folder / "profile.csv")
        assert list(prof.columns) == ["time [h]", "concentration [mg/L]"]
        assert (out / folder / "profile.png").stat().st_size > 1000
    assert not list(out.rglob("*.tmp"))


def test_partial_failure_exit_1(run_cli, write):
    text = DEMO.read_text() + '\n[[scenarios]]\nname = "broken"\nclearance = "4 L/h"\n'
    r = run_cli("predict", write("d.toml", text), "--json")
    assert r.code == 1
    doc = r.json()
    assert len(doc["scenarios"]) == 3
    assert doc["failures"][0]["item"] == "scenario 'broken'"


@pytest.mark.parametrize(
    ("content", "match"),
    [("", "empty"), ("not = [toml", "not valid TOML"), ('[[scenarios]]\nname = "x"\n',
                                                         "not determined")],
)
def test_unusable_input_exit_2(run_cli, write, content, match):
    r = run_cli("predict", write("bad.toml", content))
    assert r.code == 2
    assert match in r.err and "bad.toml" in r.err
    assert "Traceback" not in r.err
    assert r.out == ""


def test_missing_file_exit_2(run_cli, tmp_path):
    r = run_cli("predict", tmp_path / "missing.toml")
    assert r.code == 2 and "file not found" in r.err


def test_never_overwrites_input(run_cli, tmp_path, write):
    src = write("out/predict.json", DEMO.read_text())
    before = src.read_text()
    r = run_cli("predict", src, "--out", src.parent)
    assert r.code == 2 and "overwrite an input" in r.err
    assert src.read_text() == before


def test_help_has_examples(run_cli):
    r = run_cli("predict", "--help")
    assert r.code == 0 and "examples:" in r.out


def test_console_script_no_traceback(tmp_path):
    # A real subprocess: bad input gives one message per problem and exit 2.
    bad = tmp_path / "bad.toml"
    bad.write_text('[[scenarios]]\nname = "x"\nclearance = "4 mg"\nvolume = "1 L"\n'
                   'doses = [{ start = "0 h", amount = "1 mg" }]\n')
    proc = subprocess.run([sys.executable, "-m", "pkcalc", "predict", str(bad)],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert "field 'clearance'" in proc.stderr


def test_demo_writes_outputs(demo_run):
    assert demo_run.code == 0
    assert demo_run.out.startswith("!!!")  # the caution block comes first
    folder = demo_run.folder
    assert (folder / "predict" / "predict.json").exists()
    assert (folder / "design" / "design.json").exists()
    assert (folder / "sampling" / "sampling.json").exists()
    # every folder written gets CAUTION.txt (docs/formats.md W7), the top one listing
    # the report
    top = (folder / "CAUTION.txt").read_text()
    assert top.startswith(CAUTION) and "report.html" in top
    assert all((folder / sub / "CAUTION.txt").exists() for sub in
               ("predict", "design", "nca", "fit", "population", "sampling", "verify",
                "batch"))


def test_population_help_states_the_default_and_keeps_examples_apart(run_cli):
    r = run_cli("population", "--help")
    assert "Maximum marginal likelihood by default" in r.out
    assert "Iterative two-stage by default" not in r.out
    # a continued example keeps its backslash and its own line
    assert '--model "base:" \\\n' in r.out
