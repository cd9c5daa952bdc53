"""Study tables: units per column, unusable files, per-subject failures."""

from __future__ import annotations

import numpy as np
import pytest

from pkcalc.errors import PkcalcInputError
from pkcalc.schema import load_study, load_study_file

LEVELS = """subject,time [min],concentration [ng/mL],lloq [ng/mL],blq
A,30,5000,100,false
A,120,3000,100,false
A,600,,100,true
B,60,4000,100,false
B,240,80,100,false
"""
DOSES = """subject,start [h],amount [mg/kg],duration [min]
A,0,5,30
B,0,5,0
"""
SUBJECTS = """subject,weight [kg],age [years],sex
A,70,40,f
B,80,50,m
"""


@pytest.fixture
def tables(write):
    def make(levels=LEVELS, doses=DOSES, subjects=SUBJECTS):
        return (write("levels.csv", levels), write("doses.csv", doses),
                write("subjects.csv", subjects) if subjects is not None else None)
    return make


def test_units_per_column_and_per_kg_doses(tables):
    study = load_study(*tables())
    a, b = study.subjects
    np.testing.assert_allclose(a.time, [0.5, 2.0, 10.0])
    np.testing.assert_allclose(a.conc[:2], [5.0, 3.0])
    assert np.isnan(a.conc[2]) and a.blq.tolist() == [False, False, True]
    assert a.dose_amount[0] == pytest.approx(350.0) and a.dose_duration[0] == pytest.approx(0.5)
    assert b.dose_amount[0] == pytest.approx(400.0) and b.dose_duration[0] == 0.0
    assert a.weight == 70.0 and a.covariates["age"] == 40.0
    # B's 80 ng/mL is below its LLOQ: treated as BLQ, never silently as a number
    assert b.blq.tolist() == [False, True]
    assert any("below their LLOQ" in n for n in b.notes)
    # a text column is kept as a categorical covariate (population effects use it)
    assert a.covariates["sex"] == "f" and b.covariates["sex"] == "m"


def test_study_toml(write, tables):
    tables()
    path = write("study.toml", 'title = "t"\nlevels = "levels.csv"\ndoses = "doses.csv"\n'
                               'subjects = "subjects.csv"\n[nca]\nblq = "zero"\n')
    study = load_study_file(path)
    assert len(study.subjects) == 2 and study.options["nca"] == {"blq": "zero"}
    assert study.files[0].endswith("study.toml")


def test_a_spreadsheet_export_with_empty_columns_and_crlf_reads_as_the_clean_table(tables):
    # trailing separators (empty columns a spreadsheet keeps) and CRLF line ends: the same
    # study as the clean tables; an unnamed column that holds a value is refused
    clean = load_study(*tables())
    messy = "\r\n".join(line + ",," for line in LEVELS.strip().splitlines()) + "\r\n\r\n"
    again = load_study(*tables(levels=messy))
    for a, b in zip(clean.subjects, again.subjects, strict=True):
        np.testing.assert_array_equal(a.time, b.time)
        np.testing.assert_array_equal(a.conc, b.conc)
        np.testing.assert_array_equal(a.blq, b.blq)
    lv, ds, sb = tables(levels=messy.replace("A,120,3000,100,false,,", "A,120,3000,100,false,,x"))
    with pytest.raises(PkcalcInputError, match=r"column 7 has no name in the header but holds "
                                               r"'x' \(line 3\)"):
        load_study(lv, ds, sb)


def test_blq_written_in_the_concentration_column_is_a_blq_level(tables):
    # '<100' (the limit in the column's unit) or 'BLQ' with the lloq column: the same
    # study as the table that marks them with blq and lloq (common practice in
    # laboratory exports), said in a warning naming the lines
    marked = load_study(*tables())
    texts = LEVELS.replace("A,600,,100,true", "A,600,<100,,").replace(
        "B,240,80,100,false", "B,240,BLQ,100,")
    study = load_study(*tables(levels=texts))
    for a, b in zip(marked.subjects, study.subjects, strict=True):
        np.testing.assert_array_equal(a.time, b.time)
        np.testing.assert_array_equal(a.blq, b.blq)
        np.testing.assert_allclose(a.lloq, b.lloq, rtol=1e-12)
        np.testing.assert_array_equal(a.conc[~a.blq], b.conc[~b.blq])
    assert any("2 concentration cell(s) written as below the limit of quantification are "
               "BLQ levels (line 4: '<100', line 6: 'BLQ')" in w for w in study.warnings)
    lv, ds, sb = tables(levels=texts.replace("A,600,<100,,", "A,600,<50,100,"))
    with pytest.raises(PkcalcInputError, match=r"says below 50 \(0.05 mg/L\) but its lloq is "
                                               r"0.1 mg/L \(line 4\)"):
        load_study(lv, ds, sb)


@pytest.mark.parametrize(("cell", "blq"), [("not quantifiable", True), ("<LLOQ", True),
                                           ("BQL", True), ("<100 ng/mL", False)])
def test_which_concentration_texts_are_blq(tables, cell, blq):
    # words, or '<x' alone; a text carrying another number and unit stays text (refused):
    # its unit may not be the column's
    lv, ds, sb = tables(levels=LEVELS.replace("A,600,,100,true", f"A,600,{cell},100,"))
    if blq:
        assert load_study(lv, ds, sb).subjects[0].blq.tolist() == [False, False, True]
    else:
        with pytest.raises(PkcalcInputError, match="text or non-finite"):
            load_study(lv, ds, sb)


def test_a_frame_with_blq_texts_is_read_without_changing_it():
    import pandas as pd
    levels = pd.DataFrame({"subject": ["A", "A", "A"], "time [h]": [1.0, 4.0, 24.0],
                           "concentration [mg/L]": ["8.1", "5.6", "< 0.5"]})
    before = levels.copy()
    doses = pd.DataFrame({"subject": ["A"], "start [h]": [0.0], "amount [mg]": [500.0]})
    s = load_study(levels, doses).subjects[0]
    assert s.blq.tolist() == [False, False, True] and s.lloq[2] == pytest.approx(0.5)
    pd.testing.assert_frame_equal(levels, before)


@pytest.mark.parametrize(
    ("which", "text", "match"),
    [
        ("levels", "subject,time,concentration [mg/L]\nA,1,2\n", "declares no unit"),
        ("levels", "subject,,concentration [mg/L]\nA,1,2\n", "column 2 has no name"),
        ("levels", "subject,time [h],concentration [mg]\nA,1,2\n", "dimension"),
        ("levels", "subject,time [h]\nA,1\n", "missing column 'concentration'"),
        ("levels", "subject,time [h],concentration [mg/L]\nA,1,two\n", "text or non-finite"),
        ("levels", "subject,time [h],concentration [mg/L]\nA,1,inf\n", "text or non-finite"),
        ("levels", "", "empty"),
        ("levels", "subject,time [h],concentration [mg/L]\n", "no rows"),
        ("doses", "subject,start [h],rate [mg/h]\nA,0,5\n", "needs amount"),
        ("doses", "subject,amount [mg]\nA,5\n", "missing column 'start'"),
    ],
)
def test_unusable_tables(tables, write, which, text, match):
    lv, ds, sb = tables()
    target = {"levels": lv, "doses": ds}[which]
    target.write_text(text)
    with pytest.raises(PkcalcInputError, match=match) as info:
        load_study(lv, ds, sb)
    assert target.name in str(info.value)


@pytest.mark.parametrize(
    ("levels", "doses", "match"),
    [
        ("subject,time [h],concentration [mg/L]\nA,1,2\nA,1,3\nB,1,2\n", None, "duplicate"),
        ("subject,time [h],concentration [mg/L],lloq [mg/L],blq\nA,1,5,1,true\n"
         "B,1,2,1,false\n", None, "above its LLOQ"),
        ("subject,time [h],concentration [mg/L]\nA,1,-2\nB,1,2\n", None,
         "negative concentration"),
        ("subject,time [h],concentration [mg/L]\nA,1,2\nB,1,2\nC,1,2\n", None, "no doses"),
        ("subject,time [h],concentration [mg/L]\nA,1,2\nB,1,2\n",
         "subject,start [h],amount [mg]\nA,5,100\nB,0,100\n", "no level after the first dose"),
        ("subject,time [h],concentration [mg/L]\nA,1,\nB,1,2\n", None, "missing concentration"),
    ],
)
def test_per_subject_failures_keep_the_others(tables, levels, doses, match):
    lv, ds, sb = tables(levels=levels,
                        doses=doses or "subject,start [h],amount [mg]\nA,0,100\nB,0,100\n",
                        subjects=None)
    study = load_study(lv, ds, sb)
    (label, err), = study.failures
    failed = label.split("'")[1]
    kept = [s.subject for s in study.subjects]
    assert "B" in kept and failed not in kept
    assert match in str(err) and f"subject '{failed}'" in str(err)


def test_per_kg_dose_without_weight_fails_subject(tables):
    lv, ds, sb = tables(subjects="subject,weight [kg]\nA,70\n")
    study = load_study(lv, ds, sb)
    assert [s.subject for s in study.subjects] == ["A"]
    assert "weight" in str(study.failures[0][1])
    assert any("without a row in the subjects table" in w for w in study.warnings)


def test_doses_only_subject_is_a_warning(tables):
    lv, ds, sb = tables(doses=DOSES + "C,0,5,30\n",
                        subjects=SUBJECTS + "C,60,30,f\n")
    study = load_study(lv, ds, sb)
    assert len(study.subjects) == 2
    assert any("doses but no levels" in w and "C" in w for w in study.warnings)


def test_inconsistent_dose_triple(tables):
    lv, ds, sb = tables(doses="subject,start [h],amount [mg],rate [mg/h],duration [h]\n"
                              "A,0,100,10,2\nB,0,100,50,2\n", subjects=None)
    study = load_study(lv, ds, sb)
    assert [s.subject for s in study.subjects] == ["B"]
    assert "differs from rate x duration" in str(study.failures[0][1])


def test_identical_and_overlapping_dose_records_are_warned_with_their_rows(tables):
    # both are legal (the doses add up) but usually a copied row: warned, never silent
    lv, ds, sb = tables(doses=DOSES + "A,0,5,30\nB,0.5,5,60\nB,1,5,60\n")
    study = load_study(lv, ds, sb)
    text = " ".join(study.warnings)
    assert "subject 'A': identical dose records" in text
    assert "subject 'B'" in text and "overlapping infusions add up" in text
    a = next(s for s in study.subjects if s.subject == "A")
    assert a.dose_amount.sum() == pytest.approx(2 * 5 * 70)  # both given: 2 x 5 mg/kg x 70 kg


def test_a_level_years_after_the_last_dose_is_left_out_of_a_fit_with_a_warning(tables):
    from pkcalc.core import FitOptions
    from pkcalc.fit import fit_subjects

    # 2 years after the dose (a year typed for a day?): not "pre-dose", not fitted
    far = 2 * 365 * 24 * 60
    lv, ds, sb = tables(levels=LEVELS + f"A,{far},4000,100,false\n")
    study = load_study(lv, ds, sb)
    a = next(s for s in study.subjects if s.subject == "A")
    assert a.time.max() == pytest.approx(far / 60)
    fitted = fit_subjects([a], FitOptions())[0][0]
    assert any("after the last dose, left out" in str(n) for n in fitted.warnings)
    assert fitted.n_obs == 3 and fitted.n_blq == 1  # the 3 before it (one BLQ), not 4
