"""`pkcalc verify`: the shipped reference cases pass; wrong and broken cases are caught."""

from __future__ import annotations

import xml.etree.ElementTree as ET

import pytest

from pkcalc.schema import load_cases_file
from pkcalc.verify import verify

from .conftest import SCENARIOS

REFERENCE = SCENARIOS / "reference-cases.toml"

WRONG = """
[[cases]]
name = "deliberately wrong plateau"
source = "test: 30 mg/h / 3 L/h is 10 mg/L, not 11"
clearance = "3 L/h"
half_life = "8 h"
doses = [ { start = "0 h", rate = "30 mg/h", duration = "200 h" } ]
[[cases.expect]]
quantity = "plateau_concentration"
value = "11 mg/L"
tolerance = "1%"
[[cases.expect]]
quantity = "half_life"
value = "480 min"
tolerance = "0.1 min"
"""


def test_reference_cases_pass(run_cli, tmp_path):
    junit = tmp_path / "ref.xml"
    r = run_cli("verify", REFERENCE, "--junit", junit)
    assert r.code == 0, r.out + r.err
    assert "ALL CHECKS PASSED" in r.out
    suite = ET.parse(junit).getroot().find("testsuite")
    assert int(suite.get("tests")) >= 40 and suite.get("failures") == "0"


def test_reference_cases_have_sources_and_enough_cases():
    cfile = load_cases_file(REFERENCE)
    assert not cfile.failures
    assert len(cfile.scenarios) >= 15
    for case in cfile.scenarios:
        assert case.source.strip()
    result = verify(cfile.scenarios)
    assert result.n_failed == 0


def test_wrong_case_fails_and_junit_records_it(run_cli, write, tmp_path):
    junit = tmp_path / "out.xml"
    r = run_cli("verify", write("wrong.toml", WRONG), "--junit", junit)
    assert r.code == 1
    assert "FAIL" in r.out and "CHECKS FAILED" in r.out
    root = ET.parse(junit).getroot()
    suite = root.find("testsuite")
    assert suite.get("failures") == "1" and suite.get("tests") == "2"
    failed = [tc for tc in suite.iter("testcase") if tc.find("failure") is not None]
    assert len(failed) == 1
    assert failed[0].get("classname") == "deliberately wrong plateau"
    assert "more than the tolerance" in failed[0].find("failure").get("message")


def test_json_contract(run_cli, write):
    r = run_cli("verify", write("wrong.toml", WRONG), "--json")
    doc = r.json()
    assert doc["caution"] and doc["passed"] == 1 and doc["failed"] == 1
    check = doc["cases"][0]["checks"][0]
    assert {"quantity", "expected", "computed", "unit", "tolerance", "passed"} <= set(check)
    assert check["computed"] == pytest.approx(10.0) and check["unit"] == "mg/L"
    # the half-life check is shown in the unit it was written in
    assert doc["cases"][0]["checks"][1]["computed"] == pytest.approx(480.0)


@pytest.mark.parametrize(
    ("mutation", "match"),
    [
        (('quantity = "half_life"', 'quantity = "half-life"'), "unknown quantity"),
        (('value = "480 min"', 'value = "480 mg"'), "dimension"),
        (('tolerance = "0.1 min"', 'tolerance = "0.1 mg"'), "dimension"),
        (('source = "test: 30 mg/h / 3 L/h is 10 mg/L, not 11"\n', ''), "source"),
    ],
)
def test_unusable_case_exit_2(run_cli, write, mutation, match):
    r = run_cli("verify", write("bad.toml", WRONG.replace(*mutation)))
    assert r.code == 2
    assert match in r.out + r.err
    assert "Traceback" not in r.err


def test_case_needing_doses(run_cli, write):
    text = WRONG.replace('doses = [ { start = "0 h", rate = "30 mg/h", duration = "200 h" } ]',
                         "")
    r = run_cli("verify", write("bad.toml", text))
    assert r.code == 2 and "needs doses" in r.out


def test_empty_cases_file(run_cli, write):
    r = run_cli("verify", write("e.toml", 'title = "x"\n'))
    assert r.code == 2 and "no [[cases]]" in r.err
