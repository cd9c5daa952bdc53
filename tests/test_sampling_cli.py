"""``pkcalc sampling`` end to end: the JSON contract, files, report, exit codes."""

from __future__ import annotations

import json

import pytest

from .conftest import SCENARIOS

DEMO = SCENARIOS / "demo-sampling.toml"


def test_json_contract_times_and_expected_rse(run_cli):
    r = run_cli("sampling", DEMO, "--json")
    assert r.code == 0, r.err
    doc = r.json()
    assert doc["command"] == "sampling" and doc["caution"] and doc["sampling_caution"]
    assert doc["units"]["time"] == "h"
    assert len(doc["scenarios"]) == 3
    one = doc["scenarios"][0]
    assert one["design"] == "individual"
    best = one["designs"][0]
    assert best["label"] == "optimal" and len(best["times"]) == 2
    assert set(best["expected_rse_percent"]) == {"clearance", "volume"}
    assert one["designs"][1]["label"] == "compare" and 0 < one["designs"][1]["efficiency"] < 1
    clock = doc["scenarios"][1]
    assert clock["design"] == "map" and clock["designs"][0]["groups"][0]["clock_times"][0] \
        .startswith("2026-03-03T")
    pop = doc["scenarios"][2]
    assert pop["design"] == "population" and len(pop["designs"][0]["times"]) == 3
    for t in (t for g in pop["designs"][0]["times"] for t in g):   # candidate times only
        assert f"{t:g} h" in DEMO.read_text()


def test_times_follow_the_output_time_unit(run_cli, write):
    text = DEMO.read_text().replace('time = "h"', 'time = "min"')
    path = write("s.toml", text)
    r = run_cli("sampling", path, "--json")
    h = run_cli("sampling", DEMO, "--json")
    a, b = r.json()["scenarios"][0]["designs"][0]["times"], \
        h.json()["scenarios"][0]["designs"][0]["times"]
    assert a == pytest.approx([60 * x for x in b])


def test_outputs_report_and_simulation(run_cli, tmp_path):
    out = tmp_path / "o"
    r = run_cli("sampling", DEMO, "--simulate", "3", "--seed", "3", "--out", out,
                "--report", tmp_path / "r.html", "--refit", "iterative")
    assert r.code == 0, r.err
    names = sorted(p.name for p in out.iterdir())
    assert "sampling.json" in names and "sampling-times.csv" in names and "CAUTION.txt" in names
    assert sum(n.endswith(".png") for n in names) == 3
    doc = json.loads((out / "sampling.json").read_text())
    sim = doc["scenarios"][0]["designs"][0]["simulation"]
    assert sim["replicates"] == 3 and sim["seed"] == 3
    # two levels for two parameters and an error: no interval, and the text says why
    one = doc["scenarios"][0]["designs"][0]["simulation"]
    assert one["parameters"]["clearance"]["coverage_percent"] is None
    assert "as many levels as estimated parameters" in one["no_coverage_reason"]
    assert "95% coverage '-': no re-estimate gave a 95 % interval" in r.out
    html = (tmp_path / "r.html").read_text()
    assert "95% coverage &#39;-&#39;: no re-estimate" in html or \
        "95% coverage '-': no re-estimate" in html
    pop = doc["scenarios"][2]["designs"][0]["simulation"]
    assert pop["no_coverage_reason"] is None
    assert html.index("CAUTION") < html.index("Sampling times")
    csv = (out / "sampling-times.csv").read_text().splitlines()
    assert csv[0].startswith("scenario,design,group,subjects,sample,time [h]")


def test_a_scenario_with_a_problem_is_named_and_the_rest_computed(run_cli, write):
    bad = DEMO.read_text().replace('levels = 2\nwindow = ["16 h", "32 h"]',
                                   'levels = 2\nwindow = ["16 h", "3200 h"]')
    r = run_cli("sampling", write("s.toml", bad), "--json")
    assert r.code == 1
    assert "after the horizon" in r.err and "scenario 'orvimycin: two levels" in r.err
    assert len(r.json()["scenarios"]) == 2


def test_progress_on_a_terminal_only(run_cli, write, monkeypatch):
    import sys

    one = DEMO.read_text().split("# The same patient")[0]   # the first scenario only
    path = write("one.toml", one)
    monkeypatch.setattr(sys.stderr, "isatty", lambda: True, raising=False)
    r = run_cli("sampling", path, "--simulate", "300")
    assert r.code == 0 and "replicates" in r.err and "left" in r.err
    r = run_cli("sampling", path, "--simulate", "300", "--quiet")
    assert r.code == 0 and "replicates" not in r.err
