"""Clock times (ISO 8601) in study tables: per subject, hours since its first dose.

Reference for the date-time arithmetic: Python's ``datetime.fromisoformat``
(independent of pkcalc's parser), with offsets across a daylight-saving change.
"""

from __future__ import annotations

import re
from datetime import datetime, timedelta

import numpy as np
import pandas as pd
import pytest

import pkcalc
from pkcalc.clock import hours_since, parse_clock, parse_clock_array
from pkcalc.errors import PkcalcInputError

from .conftest import SCENARIOS, map_scenario


@pytest.mark.parametrize("text", ["2026-03-04T08:15", "2026-03-04 08:15:30",
                                  "2026-03-29T01:30+01:00", "2026-03-29T03:30+02:00",
                                  "2026-10-25T02:30Z"])
def test_accepted_forms_equal_fromisoformat(text):
    assert parse_clock(text) == datetime.fromisoformat(text.replace("Z", "+00:00"))


@pytest.mark.parametrize(("text", "why"), [("2026-03-04", "without a time"),
                                           ("08:15", "without a date"),
                                           ("04/03/2026 08:15", "cannot be told apart"),
                                           ("yesterday", "not an ISO 8601"),
                                           ("2026-03-04T09:15 CET", "time-zone name"),
                                           ("2026-03-04 09:15 Europe/Berlin",
                                            "time-zone name"),
                                           ("2026-03-04 9:15", "hour needs two digits")])
def test_refused_forms(text, why):
    with pytest.raises(PkcalcInputError, match=why):
        parse_clock(text)
    # the array parser (study tables, SDTM) gives the same reason
    clock = parse_clock_array([text])
    assert re.search(why, clock.why(0, text))


def test_hours_across_a_daylight_saving_change_written_with_offsets():
    # 2026-03-29 in central Europe: 02:00 +01:00 becomes 03:00 +02:00; one real hour
    a, b = parse_clock("2026-03-29T01:30+01:00"), parse_clock("2026-03-29T03:30+02:00")
    assert hours_since(b, a) == pytest.approx(1.0)


def _clock_copy(tmp_path, starts):
    """The demo study with clock times: each subject starts on its own day and time
    (some written with offsets across a daylight-saving change)."""
    levels = pd.read_csv(SCENARIOS / "demo-study-levels.csv", dtype=str)
    doses = pd.read_csv(SCENARIOS / "demo-study-doses.csv", dtype=str)
    tcol = next(c for c in levels.columns if c.startswith("time"))
    scol = next(c for c in doses.columns if c.startswith("start"))
    assert tcol.endswith("[h]") and scol.endswith("[h]")

    def clock(sid, hours):
        origin, offset = starts[sid]
        t = origin + timedelta(hours=float(hours))
        if offset is None:
            return t.strftime("%Y-%m-%dT%H:%M:%S.%f")
        # written with the offset in force at that instant (a change after 20 h)
        off = offset if float(hours) < 20 else offset + 1
        local = t + timedelta(hours=off)
        return local.strftime("%Y-%m-%dT%H:%M:%S.%f") + f"+{off:02d}:00"

    levels[tcol] = [clock(s, h) for s, h in zip(levels["subject"], levels[tcol], strict=True)]
    doses[scol] = [clock(s, h) for s, h in zip(doses["subject"], doses[scol], strict=True)]
    levels = levels.rename(columns={tcol: "time [clock]"})
    doses = doses.rename(columns={scol: "start [clock]"})
    levels.to_csv(tmp_path / "levels.csv", index=False)
    doses.to_csv(tmp_path / "doses.csv", index=False)
    (tmp_path / "subjects.csv").write_bytes((SCENARIOS / "demo-study-subjects.csv").read_bytes())
    return tmp_path / "levels.csv", tmp_path / "doses.csv", tmp_path / "subjects.csv"


def _starts(subjects):
    out = {}
    for i, sid in enumerate(subjects):
        origin = datetime(2026, 3, 2 + i, 7 + i % 5, 15 * (i % 4))  # UTC instants
        out[sid] = (origin, 1 if i % 2 else None)
    return out


def test_clock_time_study_fits_exactly_like_the_relative_one(tmp_path):
    rel = pkcalc.load_study_file(SCENARIOS / "demo-study.toml")
    paths = _clock_copy(tmp_path, _starts([s.subject for s in rel.subjects]))
    clk = pkcalc.load_study(*paths)
    assert [s.subject for s in clk.subjects] == [s.subject for s in rel.subjects]
    for a, b in zip(rel.subjects, clk.subjects, strict=True):
        np.testing.assert_allclose(b.time, a.time, rtol=0, atol=1e-9)
        np.testing.assert_allclose(b.dose_start, a.dose_start, rtol=0, atol=1e-9)
    fit_rel = pkcalc.fit_study(rel, error_model="proportional")
    fit_clk = pkcalc.fit_study(clk, error_model="proportional")
    for a, b in zip(fit_rel.results, fit_clk.results, strict=True):
        assert b.clearance == pytest.approx(a.clearance, rel=1e-9)
        assert b.volume == pytest.approx(a.volume, rel=1e-9)
    levels = fit_clk.levels_frame()
    assert "clock_time" in levels.columns               # the clock time kept beside hours
    assert "first_dose_clock" in fit_clk.to_frame().columns
    assert "first_dose_clock" in pkcalc.nca_study(clk).to_frame().columns


def test_mixed_offsets_leave_that_subject_out(tmp_path, run_cli):
    rel = pkcalc.load_study_file(SCENARIOS / "demo-study.toml")
    paths = _clock_copy(tmp_path, _starts([s.subject for s in rel.subjects]))
    text = paths[0].read_text()
    first = next(line for line in text.splitlines()[1:] if "+0" in line)
    naive = first.split(",")
    naive[1] = naive[1].split("+")[0]
    paths[0].write_text(text.replace(first, ",".join(naive)))
    r = run_cli("fit", "--levels", paths[0], "--doses", paths[1], "--subjects", paths[2])
    assert r.code == 1 and "time-zone offset" in r.err


def test_clock_and_relative_tables_together_are_refused(tmp_path, run_cli):
    (tmp_path / "l.csv").write_text("subject,time [clock],concentration [mg/L]\n"
                                    "A,2026-03-04T09:00,5\nA,2026-03-04T12:00,3\n")
    (tmp_path / "d.csv").write_text("subject,start [h],amount [mg]\nA,0,500\n")
    r = run_cli("fit", "--levels", tmp_path / "l.csv", "--doses", tmp_path / "d.csv")
    assert r.code == 2 and "both use clock times" in r.err
    (tmp_path / "d.csv").write_text("subject,start [clock],amount [mg]\nA,04/03/2026 08:00,500\n")
    r = run_cli("fit", "--levels", tmp_path / "l.csv", "--doses", tmp_path / "d.csv")
    assert r.code == 2 and "cannot be told apart" in r.err and "line 2" in r.err


SCENARIO = """[[scenarios]]
name = "s"
clearance = "3 L/h"
half_life = "8 h"
doses = [ {{ start = "{d0}", amount = "300 mg", duration = "1 h" }},
          {{ start = "{d1}", amount = "300 mg", duration = "1 h" }} ]
times = ["{t0}", "{t1}"]
"""


def test_scenario_in_clock_times_predicts_like_relative_times(run_cli, write):
    rel = run_cli("predict", write("r.toml", SCENARIO.format(
        d0="0 h", d1="12 h", t0="1 h", t1="24.5 h")), "--json").json()
    clk = run_cli("predict", write("c.toml", SCENARIO.format(
        d0="2026-03-28T20:00+01:00", d1="2026-03-29T09:00+02:00",
        t0="2026-03-28T21:00+01:00", t1="2026-03-29T21:30+02:00")), "--json").json()
    a, b = rel["scenarios"][0]["profile"], clk["scenarios"][0]["profile"]
    np.testing.assert_allclose(b["time"], a["time"], atol=1e-9)
    np.testing.assert_allclose(b["concentration"], a["concentration"], rtol=1e-12)
    bad = run_cli("predict", write("m.toml", SCENARIO.format(
        d0="2026-03-28T20:00", d1="12 h", t0="1 h", t1="2 h")))
    assert bad.code == 2 and "mix clock times" in bad.err





WINDOW = 'plateau = "8 mg/L"\nwindow = ["6 mg/L", "10 mg/L"]'


def test_design_history_in_clock_times_equals_relative_times(run_cli, write):
    rel = run_cli("design", write("r.toml", map_scenario(extra=WINDOW)), "--json").json()
    clk = run_cli("design", write("c.toml", map_scenario(
        d0="2026-05-01T08:00", d1="2026-05-01T08:30", t1="2026-05-01T14:00",
        t2="2026-05-02T06:00", extra=WINDOW)), "--json").json()
    assert clk["regimens"][0]["start"] == pytest.approx(rel["regimens"][0]["start"])
    assert clk["regimens"][0]["loading_dose"] == rel["regimens"][0]["loading_dose"]
    assert clk["designs"][0]["estimates"]["clearance"] == pytest.approx(
        rel["designs"][0]["estimates"]["clearance"], rel=1e-9)


def test_predicted_profiles_keep_the_clock_time(run_cli, write, tmp_path):
    r = run_cli("predict", write("c.toml", SCENARIO.format(
        d0="2026-03-04T08:00", d1="2026-03-04T20:00", t0="2026-03-04T09:00",
        t1="2026-03-05T08:00")), "--out", tmp_path / "o")
    assert r.code == 0
    profile = pd.read_csv(tmp_path / "o" / "s" / "profile.csv")
    assert list(profile["clock_time"]) == ["2026-03-04T09:00:00", "2026-03-05T08:00:00"]
    assert list(profile["time [h]"]) == [1.0, 24.0]
