"""SDTM records one rule at a time, on small invented datasets given as DataFrames:
repeated-dose EX records, EC (exposure as collected), nominal times, pre-dose levels,
duplicates, units and durations.

Sources: SDTMIG v3.3 EX/EC/PC variables (from memory for section numbers); CDISC
controlled terminology FREQ (QD, BID, Q8H, PRN) and UNIT (from memory); ISO 8601
durations (PT1H, -PT15M); expected hours computed here with ``datetime`` arithmetic.
"""

from __future__ import annotations

from datetime import datetime, timedelta

import numpy as np
import pandas as pd
import pytest

from pkcalc import model
from pkcalc.clock import parse_clock_array
from pkcalc.errors import PkcalcInputError
from pkcalc.schema.sdtm import load_sdtm
from pkcalc.schema.sdtm.terms import frequency_hours, iso_duration_hours, normalise_unit
from pkcalc.units import parse_unit

T0 = datetime(2026, 6, 1, 8, 0)
CL, V = 5.0, 40.0


def iso(h: float) -> str:
    return (T0 + timedelta(hours=h)).strftime("%Y-%m-%dT%H:%M")


def pc_frame(hours, starts, amounts, durations, sid="S1", **extra):
    c = model.concentration(np.asarray(hours, float).clip(0), starts, amounts, durations, CL, V)
    c = np.where(np.asarray(hours) < 0, 0.0, c)
    return pd.DataFrame({"USUBJID": sid, "PCTESTCD": "DRG", "PCSTRESN": c * 1000,
                         "PCSTRESU": "ng/mL", "PCSTRESC": "", "PCLLOQ": 1.0,
                         "PCDTC": [iso(h) for h in hours], **extra})


def ex_row(sid="S1", **kw):
    row = {"USUBJID": sid, "EXTRT": "DRUGX", "EXDOSE": 500.0, "EXDOSU": "mg",
           "EXROUTE": "INTRAVENOUS", "EXSTDTC": iso(0), "EXENDTC": iso(1), "EXDOSFRQ": "",
           "EXDUR": ""}
    row.update(kw)
    return row


def test_a_summarising_record_expands_into_its_administrations():
    # QD from day 1 08:00 to day 5 (a date only), each 1 h (EXDUR): five doses 24 h apart
    ex = pd.DataFrame([ex_row(EXENDTC="2026-06-05", EXDOSFRQ="QD", EXDUR="PT1H")])
    starts = 24.0 * np.arange(5)
    pc = pc_frame([1, 4, 24.5, 96.5, 100, 110], starts, np.full(5, 500.0), np.ones(5))
    s = load_sdtm({"pc": pc, "ex": ex}).subjects[0]
    np.testing.assert_allclose(s.dose_start, starts)
    np.testing.assert_allclose(s.dose_duration, 1.0)
    np.testing.assert_allclose(s.conc, pc["PCSTRESN"] / 1000, rtol=1e-12)


@pytest.mark.parametrize(("freq", "end", "n", "tau"), [
    ("BID", "2026-06-03", 6, 12.0),                 # three days twice a day: 6
    ("Q8H", "2026-06-01T23:59", 2, 8.0),            # 08:00, 16:00 (00:00 is after the end)
    ("Q8H", "2026-06-02T00:00", 3, 8.0),            # ... and 00:00 when the end is on it
    ("QD", "2026-06-01T09:00", 1, None),            # one record per administration
])
def test_frequency_terms_give_the_administrations(freq, end, n, tau):
    ex = pd.DataFrame([ex_row(EXENDTC=end, EXDOSFRQ=freq, EXDUR="PT30M")])
    pc = pc_frame([0.75, 2.0], [0.0], [500.0], [0.5])
    s = load_sdtm({"pc": pc, "ex": ex}).subjects[0]
    assert s.dose_start.size == n
    if tau:
        np.testing.assert_allclose(np.diff(s.dose_start), tau)
    np.testing.assert_allclose(s.dose_duration, 0.5)


def test_a_length_that_is_not_given_is_asked_for_naming_the_record():
    ex = pd.DataFrame([ex_row(EXENDTC="2026-06-03", EXDOSFRQ="QD", EXSEQ=7.0)])
    pc = pc_frame([0.5, 2.0], [0.0], [500.0], [1.0])
    with pytest.raises(PkcalcInputError, match=r"--infusion-dur.*\(EX frame row 1 \(EXSEQ 7\)\)"):
        load_sdtm({"pc": pc, "ex": ex})
    s = load_sdtm({"pc": pc, "ex": ex}, infusion_duration=1.0).subjects[0]
    assert s.dose_start.size == 3 and (s.dose_duration == 1.0).all()
    bolus = pd.DataFrame([ex_row(EXENDTC="", EXROUTE="INTRAVENOUS BOLUS")])
    assert load_sdtm({"pc": pc, "ex": bolus}).subjects[0].dose_duration[0] == 0.0


@pytest.mark.parametrize(("freq", "phrase"), [("PRN", "as needed"), ("QM", "month"),
                                              ("SOMETIMES", "pkcalc can expand")])
def test_frequencies_without_times_are_refused(freq, phrase):
    ex = pd.DataFrame([ex_row(EXENDTC="2026-06-03", EXDOSFRQ=freq, EXDUR="PT1H")])
    with pytest.raises(PkcalcInputError, match=phrase):
        load_sdtm({"pc": pc_frame([0.5, 2.0], [0.0], [500.0], [1.0]), "ex": ex})


def test_exposure_as_collected_gives_the_amounts_actually_given():
    # EX says 500 mg QD for 3 days; EC holds what was given: 500, not given, 450
    ex = pd.DataFrame([ex_row(EXENDTC="2026-06-03", EXDOSFRQ="QD", EXDUR="PT1H")])
    ec = pd.DataFrame([{"USUBJID": "S1", "ECTRT": "DRUGX", "ECDOSE": d, "ECDOSU": "mg",
                        "ECROUTE": "INTRAVENOUS", "ECSTDTC": iso(24 * k),
                        "ECENDTC": iso(24 * k + 1), "ECMOOD": "PERFORMED", "ECOCCUR": occ}
                       for k, (d, occ) in enumerate([(500.0, "Y"), (500.0, "N"),
                                                     (450.0, "Y")])])
    pc = pc_frame([1, 4, 49, 52], [0.0, 48.0], [500.0, 450.0], [1.0, 1.0])
    study = load_sdtm({"pc": pc, "ex": ex, "ec": ec})
    s = study.subjects[0]
    np.testing.assert_allclose(s.dose_start, [0.0, 48.0])
    np.testing.assert_allclose(s.dose_amount, [500.0, 450.0])
    assert study.import_report["rows_skipped"]["ec"]["not given (ECOCCUR = N)"]["count"] == 1
    assert any("EC (exposure as collected)" in n for n in study.import_report["notes"])


def test_nominal_times_come_from_the_reference_dose_and_the_planned_time():
    pc = pc_frame([0.55, 2.1, 24.2], [0.0, 24.0], [500.0, 500.0], [1.0, 1.0])
    pc["PCRFTDTC"] = [iso(0), iso(0), iso(24)]
    pc["PCELTM"] = ["PT30M", "PT2H", ""]          # the last has no planned time
    ex = pd.DataFrame([ex_row(), ex_row(EXSTDTC=iso(24), EXENDTC=iso(25))])
    study = load_sdtm({"pc": pc, "ex": ex}, times="nominal")
    np.testing.assert_allclose(study.subjects[0].time, [0.5, 2.0, 24.2], atol=1e-9)
    assert study.import_report["time_basis"] == {"actual": 1, "nominal": 2}
    assert list(study.tables["levels"]["time_basis"]) == ["nominal", "nominal", "actual"]
    with pytest.raises(PkcalcInputError, match="nominal times need PCRFTDTC and PCELTM"):
        load_sdtm({"pc": pc.drop(columns=["PCRFTDTC", "PCELTM"]), "ex": ex}, times="nominal")


def test_pre_dose_levels_are_kept_as_pre_dose():
    pc = pc_frame([-0.25, 0.5, 2.0, 6.0], [0.0], [500.0], [1.0])
    pc.loc[0, ["PCSTRESN", "PCSTRESC"]] = [np.nan, "<1"]
    ex = pd.DataFrame([ex_row()])
    s = load_sdtm({"pc": pc, "ex": ex}).subjects[0]
    np.testing.assert_allclose(s.time, [0.5, 2.0, 6.0], atol=1e-9)
    assert any("pre-dose" in n for n in s.notes)
    # a measurable pre-dose level: a warning (omit) or the drug on board
    pc.loc[0, ["PCSTRESN", "PCSTRESC"]] = [2500.0, "2500"]
    study = load_sdtm({"pc": pc, "ex": ex})
    assert study.subjects[0].initial_concentration == 0.0
    assert any("measurable pre-dose level 2.5 mg/L" in w for w in study.warnings)
    on_board = load_sdtm({"pc": pc, "ex": ex}, pre_dose="drug_on_board").subjects[0]
    assert on_board.initial_concentration == pytest.approx(2.5)


def test_a_duplicated_record_fails_its_subject_and_an_overlap_is_named():
    pc = pd.concat([pc_frame([0.5, 2.0], [0.0], [500.0], [1.0]),
                    pc_frame([0.5, 2.0], [0.0], [500.0], [1.0], sid="S2")])
    ex = pd.DataFrame([ex_row(EXSEQ=1.0), ex_row(EXSEQ=2.0),
                       ex_row("S2", EXSEQ=1.0, EXENDTC=iso(4)),
                       ex_row("S2", EXSEQ=2.0, EXSTDTC=iso(2), EXENDTC=iso(3))])
    study = load_sdtm({"pc": pc, "ex": ex})
    assert [s.subject for s in study.subjects] == ["S2"]
    assert "duplicated record" in str(study.failures[0][1])
    assert any("overlapping infusions" in w for w in study.warnings)


def test_placebo_arm_and_zero_doses_are_reported_not_failed():
    pc = pd.concat([pc_frame([0.5, 2.0], [0.0], [500.0], [1.0]),
                    pc_frame([0.5, 2.0], [0.0], [0.0], [1.0], sid="P1"),
                    pc_frame([0.5, 2.0], [0.0], [0.0], [1.0], sid="P2")])
    ex = pd.DataFrame([ex_row(), ex_row("P1", EXDOSE=0.0),
                       ex_row("P2", EXTRT="PLACEBO", EXDOSE=0.0)])
    study = load_sdtm({"pc": pc, "ex": ex})
    assert [s.subject for s in study.subjects] == ["S1"] and not study.failures
    assert study.import_report["placebo_subjects"] == ["P1", "P2"]


def test_an_imprecise_dose_time_fails_only_its_subject():
    pc = pd.concat([pc_frame([0.5, 2.0], [0.0], [500.0], [1.0]),
                    pc_frame([0.5, 2.0], [0.0], [500.0], [1.0], sid="S2")])
    ex = pd.DataFrame([ex_row(), ex_row("S2", EXSTDTC="2026-06-01")])
    study = load_sdtm({"pc": pc, "ex": ex})
    assert [s.subject for s in study.subjects] == ["S1"]
    assert "a date without a time of day" in str(study.failures[0][1])


def test_a_subject_that_fails_names_its_rows_left_out():
    # S2's levels after the dose are all left out (dates without a time, a text result),
    # its pre-dose level is kept: its failure ("no level after the first dose") says why,
    # so the user need not search the import report
    pc = pd.concat([pc_frame([0.5, 2.0], [0.0], [500.0], [1.0]),
                    pc_frame([-0.5, 0.5, 2.0, 4.0], [0.0], [500.0], [1.0], sid="S2")],
                   ignore_index=True).astype({"PCSTRESN": object})
    pc.loc[[3, 4], "PCDTC"] = pc.loc[[3, 4], "PCDTC"].str[:10]
    pc.loc[5, "PCSTRESN"] = "abc"
    study = load_sdtm({"pc": pc, "ex": pd.DataFrame([ex_row(), ex_row("S2")])})
    assert [s.subject for s in study.subjects] == ["S1"]
    (item, err), = study.failures
    assert item == "subject 'S2'"
    assert "no level after the first dose" in str(err)
    assert ("of its PC rows, 3 were left out (PCDTC is a date without a time of day: 2; "
            "PCSTRESN 'abc' is not a number: 1;") in str(err)


@pytest.mark.parametrize(("text", "value"), [("1,5", "1,5"), ("abc", "abc"), ("n/a", "n/a")])
def test_result_text_that_is_not_a_number_is_a_row_problem(text, value):
    pc = pc_frame([0.5, 2.0, 4.0], [0.0], [500.0], [1.0]).astype({"PCSTRESN": object})
    pc.loc[2, "PCSTRESN"] = text
    study = load_sdtm({"pc": pc, "ex": pd.DataFrame([ex_row()])})
    assert study.subjects[0].time.size == 2
    assert f"PCSTRESN '{value}' is not a number" in " ".join(study.warnings)


def test_an_empty_pcstresn_takes_the_number_written_in_pcstresc():
    # SDTMIG v3.3 PC: PCSTRESN is PCSTRESC "copied in numeric format" (from memory): a
    # package that left the copy empty still states the result in PCSTRESC
    pc = pc_frame([0.5, 2.0, 4.0, 8.0], [0.0], [500.0], [1.0]).astype({"PCSTRESN": object})
    pc["PCSTRESC"] = [f"{x:.6g}" for x in pc["PCSTRESN"]]
    pc.loc[[1, 2], "PCSTRESN"] = np.nan
    pc.loc[3, ["PCSTRESN", "PCSTRESC"]] = [np.nan, "see comment"]     # words: no result
    study = load_sdtm({"pc": pc, "ex": pd.DataFrame([ex_row()])})
    s = study.subjects[0]
    np.testing.assert_allclose(s.time, [0.5, 2.0, 4.0])
    expected = [pc["PCSTRESN"][0] / 1000] + [float(x) / 1000 for x in pc["PCSTRESC"][1:3]]
    np.testing.assert_allclose(s.conc, expected, rtol=1e-12)
    notes = study.import_report["notes"]
    assert any(n.startswith("2 PC row(s) with PCSTRESN empty take the number written in "
                            "PCSTRESC") and "row 2" in n for n in notes)
    assert study.import_report["rows_skipped"]["pc"][
        "no result (PCSTRESN empty, PCSTRESC neither a number nor a below-LLOQ text)"][
        "count"] == 1


def test_a_below_limit_text_wins_over_a_number_in_pcstresn():
    # some packages also put the LLOQ in PCSTRESN on a below-limit row: read as a number,
    # a censored level would become a measured one at the limit
    pc = pc_frame([0.5, 2.0, 4.0, 30.0], [0.0], [500.0], [1.0])
    pc["PCSTRESC"] = [f"{x:.6g}" for x in pc["PCSTRESN"]]
    pc.loc[3, ["PCSTRESN", "PCSTRESC"]] = [1.0, "<1"]       # ng/mL, PCLLOQ 1
    study = load_sdtm({"pc": pc, "ex": pd.DataFrame([ex_row()])})
    s = study.subjects[0]
    assert s.blq.tolist() == [False, False, False, True]
    assert s.lloq[3] == pytest.approx(1e-3)                  # 1 ng/mL in mg/L
    assert any(n.startswith("1 PC row(s) whose PCSTRESC says the level is below the limit "
                            "also carry a number in PCSTRESN") for n in
               study.import_report["notes"])


def test_an_empty_dose_is_named_as_empty():
    ex = pd.DataFrame([ex_row(EXDOSE=np.nan)])
    with pytest.raises(PkcalcInputError, match=r"EXDOSE is empty: the amount given is unknown"):
        load_sdtm({"pc": pc_frame([0.5, 2.0], [0.0], [500.0], [1.0]), "ex": ex})


def test_dose_text_with_a_unit_is_refused_not_misread():
    ex = pd.DataFrame([ex_row(EXDOSE="500 g")])
    with pytest.raises(PkcalcInputError, match=r"EXDOSE '500 g' is not a number"):
        load_sdtm({"pc": pc_frame([0.5, 2.0], [0.0], [500.0], [1.0]), "ex": ex})


# --------------------------------------------------------------------------- terms
@pytest.mark.parametrize(("text", "hours"), [("PT1H", 1.0), ("PT30M", 0.5), ("P1D", 24.0),
                                             ("-PT15M", -0.25), ("PT1H30M", 1.5),
                                             ("P1W", 168.0), ("PT0,5H", 0.5)])
def test_iso_8601_durations(text, hours):
    assert iso_duration_hours(text) == pytest.approx(hours)


@pytest.mark.parametrize("text", ["P1M", "P1Y", "1 hour", "PT", "P"])
def test_durations_without_a_fixed_length_are_refused(text):
    with pytest.raises(ValueError):
        iso_duration_hours(text)


@pytest.mark.parametrize(("term", "hours"), [("QD", 24), ("BID", 12), ("TID", 8), ("QID", 6),
                                             ("Q12H", 12), ("Q48H", 48), ("QOD", 48),
                                             ("QW", 168), ("Q2W", 336), ("ONCE", None),
                                             ("CONTINUOUS", None)])
def test_frequency_terms(term, hours):
    assert frequency_hours(term) == hours


@pytest.mark.parametrize(("cdisc", "kind", "factor"), [
    ("NG/ML", "concentration", 1e-3), ("ng/mL", "concentration", 1e-3),
    ("ug/mL", "concentration", 1.0), ("μg/mL", "concentration", 1.0),
    ("µg/mL", "concentration", 1.0), ("MG/L", "concentration", 1.0),
    ("LB", "weight", 0.45359237), ("KG", "weight", 1.0), ("MG/KG", "amount", 1.0)])
def test_cdisc_unit_spellings(cdisc, kind, factor):
    # SI prefixes and the international pound (0.45359237 kg, exact by definition)
    assert parse_unit(normalise_unit(cdisc), kind).factor == pytest.approx(factor, rel=1e-12)


def test_clock_array_agrees_with_the_standard_library():
    texts = ["2026-03-29T01:30+01:00", "2026-03-29T03:30+02:00", "2024-02-29T12:00:30.5",
             "1999-12-31T23:59", "2026-06-01 08:00"]
    a = parse_clock_array(texts)
    epoch = datetime(1970, 1, 1)
    for text, sec in zip(texts, a.seconds, strict=True):
        t = datetime.fromisoformat(text)
        expected = ((t.replace(tzinfo=None) - (t.utcoffset() or timedelta())) - epoch
                    ).total_seconds()
        assert sec == pytest.approx(expected, abs=1e-6)
    assert a.seconds[1] - a.seconds[0] == 3600.0          # across the daylight-saving change
