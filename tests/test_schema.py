"""Scenario-file validation: every rule of docs/formats.md and the core issue's bad inputs."""

from __future__ import annotations

import math

import numpy as np
import pytest

from pkcalc.errors import PkcalcInputError
from pkcalc.schema import load_scenario_file

GOOD = """
[[scenarios]]
name = "a"
clearance = "4.2 L/h"
half_life = "8 h"
doses = [ { start = "0 h", amount = "600 mg", duration = "30 min" },
          { start = "0.5 h", rate = "35 mg/h", duration = "71.5 h" } ]
times = { from = "0 h", to = "72 h", step = "0.25 h" }
"""


def scenario(body: str, name: str = "s") -> str:
    return f'[[scenarios]]\nname = "{name}"\n{body}\n'


def one(write, body: str):
    sf = load_scenario_file(write("s.toml", scenario(body)))
    return sf


def problems(write, body: str) -> list[str]:
    sf = one(write, body)
    assert not sf.scenarios, "expected the scenario to fail"
    (_, err), = sf.failures
    return [str(p) for p in err.problems]


def test_good_file(write):
    sf = load_scenario_file(write("s.toml", GOOD))
    (s,) = sf.scenarios
    assert s.clearance == pytest.approx(4.2)
    assert s.volume == pytest.approx(4.2 * 8 / math.log(2))
    assert s.doses[0].duration == pytest.approx(0.5)
    assert s.doses[1].amount == pytest.approx(35 * 71.5)
    assert s.times.size == 289 and s.times[-1] == pytest.approx(72.0)
    assert s.given == ("clearance", "half_life")


@pytest.mark.parametrize(
    "params",
    [
        'clearance = "4.2 L/h"\nvolume = "48 L"',
        'clearance = "70 mL/min"\nelimination_rate = "0.0875 1/h"',
        'volume = "48 L"\ntime_constant = "685.7142857142857 min"',
        'clearance = "4.2 L/h"\nvolume = "48 L"\nelimination_rate = "0.0875 1/h"',
    ],
)
def test_any_two_parameters(write, params):
    sf = one(write, params + '\ndoses = [{ start = "0 h", amount = "100 mg" }]')
    (s,) = sf.scenarios
    assert s.clearance == pytest.approx(4.2, rel=1e-9)
    assert s.volume == pytest.approx(48.0, rel=1e-9)


DOSE = '\ndoses = [{ start = "0 h", amount = "100 mg" }]'


@pytest.mark.parametrize(
    ("body", "field", "match"),
    [
        ('clearance = "4.2 L/h"\nvolume = "48 L"\nhalf_life = "9 h"' + DOSE,
         "half_life", "disagrees"),
        ('half_life = "8 h"\nelimination_rate = "0.2 1/h"' + DOSE, "elimination_rate",
         "disagrees"),
        ('half_life = "8 h"' + DOSE, "clearance", "not determined"),
        ('clearance = "4.2 mg"\nhalf_life = "8 h"' + DOSE, "clearance", "dimension"),
        ('clearance = "4.2"\nhalf_life = "8 h"' + DOSE, "clearance", "no unit"),
        ('clearance = 4.2\nhalf_life = "8 h"' + DOSE, "clearance", "no unit"),
        ('clearance = "0 L/h"\nhalf_life = "8 h"' + DOSE, "clearance", "greater than zero"),
        ('clearance = "-1 L/h"\nhalf_life = "8 h"' + DOSE, "clearance", "greater than zero"),
        ('clearance = "nan L/h"\nhalf_life = "8 h"' + DOSE, "clearance", "not a number"),
        ('clearance = "0.05 L/h/kg"\nhalf_life = "8 h"' + DOSE, "clearance", "no weight"),
        ('clearance = "4 L/h"\nhalf_life = "8 h"\ncolour = "red"' + DOSE, "colour",
         "unknown key"),
        ('clearance = "4 L/h"\nhalf_life = "8 h"', "doses", "no doses"),
        ('clearance = "4 L/h"\nhalf_life = "8 h"\ndoses = [{ start = "0 h", rate = "5 mg/h" }]',
         "doses[0]", "two of amount"),
        ('clearance = "4 L/h"\nhalf_life = "8 h"\ndoses = [{ start = "0 h", duration = "1 h" }]',
         "doses[0]", "two of amount"),
        ('clearance = "4 L/h"\nhalf_life = "8 h"\ndoses = [{ amount = "5 mg" }]',
         "doses[0].start", "required"),
        ('clearance = "4 L/h"\nhalf_life = "8 h"\n'
         'doses = [{ start = "0 h", amount = "100 mg", rate = "10 mg/h", duration = "2 h" }]',
         "doses[0].amount", "differs from rate x duration"),
        ('clearance = "4 L/h"\nhalf_life = "8 h"\n'
         'doses = [{ start = "0 h", amount = "100 mg", duration = "-2 h" }]',
         "doses[0].duration", "negative"),
        ('clearance = "4 L/h"\nhalf_life = "8 h"\n'
         'doses = [{ start = "-1 h", amount = "100 mg" }]', "doses[0].start", "negative"),
        ('clearance = "4 L/h"\nhalf_life = "8 h"\n'
         'doses = [{ start = "0 h", rate = "10 mg/h", duration = "0 h" }]',
         "doses[0].duration", "greater than zero"),
        ('clearance = "4 L/h"\nhalf_life = "8 h"\n'
         'doses = [{ start = "0 h", amount = "100 mg", count = 3 }]', "doses[0].every",
         "needs 'every'"),
        ('clearance = "4 L/h"\nhalf_life = "8 h"\n'
         'doses = [{ start = "0 h", amount = "100 mg", every = "8 h" }]', "doses[0].count",
         "needs 'count'"),
        ('clearance = "4 L/h"\nhalf_life = "8 h"\n'
         'doses = [{ start = "0 h", amount = "100 mg", every = "8 h", count = 0 }]',
         "doses[0].count", "1 or more"),
        ('clearance = "4 L/h"\nhalf_life = "8 h"' + DOSE + '\ntimes = ["1 h", "0.5 h"]',
         "times", "must increase"),
        ('clearance = "4 L/h"\nhalf_life = "8 h"' + DOSE + '\ntimes = ["-1 h", "0.5 h"]',
         "times[0]", "negative"),
        ('clearance = "4 L/h"\nhalf_life = "8 h"' + DOSE +
         '\ntimes = { from = "5 h", to = "1 h", step = "1 h" }', "times.to", "before"),
        ('clearance = "4 L/h"\nhalf_life = "8 h"' + DOSE +
         '\ntarget = { window = ["12 mg/L", "5 mg/L"] }', "target.window", "not below"),
        ('clearance = "4 L/h"\nhalf_life = "8 h"' + DOSE +
         '\ntarget = { plateau = "8 mg" }', "target.plateau", "dimension"),
    ],
)
def test_bad_scenarios_name_field(write, body, field, match):
    msgs = problems(write, body)
    assert any(f"field '{field}'" in m and __import__("re").search(match, m) for m in msgs), msgs
    assert all("scenario 's'" in m and "s.toml" in m for m in msgs)


def test_all_problems_collected(write):
    msgs = problems(write, 'clearance = "x"\nhalf_life = "8 mg"\n'
                           'doses = [{ start = "0 h", amount = "5" }]')
    fields = {m.split("field '")[1].split("'")[0] for m in msgs}
    assert {"clearance", "half_life", "doses[0].amount"} <= fields


def test_one_bad_scenario_does_not_stop_the_others(write):
    text = GOOD + scenario('clearance = "4 L/h"', name="bad")
    sf = load_scenario_file(write("s.toml", text))
    assert [s.name for s in sf.scenarios] == ["a"]
    assert [label for label, _ in sf.failures] == ["scenario 'bad'"]


def test_per_kg_with_weight(write):
    sf = one(write, 'weight = "18 kg"\nclearance = "0.06 L/h/kg"\nvolume = "0.7 L/kg"\n'
                    'doses = [{ start = "0 h", amount = "5 mg/kg" }, '
                    '{ start = "0 h", rate = "0.5 mg/kg/h", duration = "36 h" }]')
    (s,) = sf.scenarios
    assert (s.clearance, s.volume) == (pytest.approx(1.08), pytest.approx(12.6))
    assert s.doses[0].amount == pytest.approx(90.0)
    assert s.doses[1].amount == pytest.approx(9.0 * 36)


def test_amount_and_rate_give_duration(write):
    sf = one(write, 'clearance = "4 L/h"\nvolume = "40 L"\n'
                    'doses = [{ start = "0 h", amount = "100 mg", rate = "50 mg/h" }]')
    assert sf.scenarios[0].doses[0].duration == pytest.approx(2.0)


def test_three_consistent_dose_fields_accepted(write):
    sf = one(write, 'clearance = "4 L/h"\nvolume = "40 L"\n'
                    'doses = [{ start = "0 h", amount = "100 mg", rate = "50 mg/h", '
                    'duration = "120 min" }]')
    assert sf.scenarios[0].doses[0].amount == pytest.approx(100.0)


def test_time_range_inclusive(write):
    sf = one(write, 'clearance = "4 L/h"\nvolume = "40 L"' + DOSE +
             '\ntimes = { from = "0 min", to = "90 min", step = "15 min" }')
    np.testing.assert_allclose(sf.scenarios[0].times, [0, .25, .5, .75, 1.0, 1.25, 1.5])


@pytest.mark.parametrize(
    ("content", "match"),
    [
        ("", "empty"),
        ("this is [ not toml", "not valid TOML"),
        ('title = "x"', "no \\[\\[scenarios\\]\\]"),
        ('title = "x"\nscenarios = []', "no \\[\\[scenarios\\]\\]"),
        ('surprise = 1\n' + GOOD, "unknown key"),
        ('[output]\ntime = "mg"\n' + GOOD, "dimension"),
    ],
)
def test_unusable_files(write, content, match):
    path = write("f.toml", content)
    with pytest.raises(PkcalcInputError, match=match) as info:
        load_scenario_file(path)
    assert "f.toml" in str(info.value)


def test_missing_and_binary_files(tmp_path):
    with pytest.raises(PkcalcInputError, match="file not found"):
        load_scenario_file(tmp_path / "nope.toml")
    p = tmp_path / "bin.toml"
    p.write_bytes(b"\xff\xfe\x00\x01binary")
    with pytest.raises(PkcalcInputError, match="binary file, not text|not valid TOML"):
        load_scenario_file(p)


def test_duplicate_names(write):
    sf = load_scenario_file(write("s.toml", GOOD + GOOD))
    assert len(sf.scenarios) == 1
    assert "duplicate" in str(sf.failures[0][1])
