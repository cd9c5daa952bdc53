"""SDTM as a sponsor delivers it: the invented package of tests/fixtures/sponsor_sdtm.py
written as SAS transport (pyreadstat), CSV and CDISC Dataset-JSON v1.1, imported and
compared row by row with the tables the generator computes itself (hours from
``datetime`` arithmetic, mg/L from the simulated levels), then fitted back to the
simulated truth.

Sources: SDTMIG v3.3 (PC, EX, EC, VS, DM, LB variables; from memory for section
numbers); CDISC controlled terminology for units (``LB``, ``NG/ML``), frequency
(``QD``), specimen (``URINE``) and route (``ORAL``) -- from memory; CDISC Dataset-JSON
v1.1 (top-level ``columns`` and ``rows``); SAS transport v5 stores zero as eight zero
bytes (from memory), read here with pyreadstat.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

import pkcalc
from pkcalc.errors import PkcalcInputError
from pkcalc.schema.sdtm import export_tables, load_sdtm, read_dataset
from tests.fixtures.sponsor_sdtm import build, write

FORMATS = ["xpt", "csv", "json"]


@pytest.fixture(scope="module")
def package():
    return build()


@pytest.fixture(scope="module", params=FORMATS)
def imported(request, package, tmp_path_factory):
    folder = write(package, tmp_path_factory.mktemp(request.param) / "sdtm", request.param)
    return request.param, folder, load_sdtm(folder, analyte="ORVX")


def test_every_analysed_row_equals_the_generators_own(package, imported):
    _fmt, _folder, study = imported
    assert not study.failures                              # placebo subjects are not failures
    assert sorted(s.subject for s in study.subjects) == sorted(package.truth)
    for s in study.subjects:
        exp = package.expected_levels[s.subject]
        np.testing.assert_allclose(s.time, exp["time"], rtol=0, atol=1e-9)
        np.testing.assert_array_equal(s.blq, exp["blq"])
        np.testing.assert_allclose(s.conc[~s.blq], exp["conc"][~exp["blq"]], rtol=1e-12)
        d = package.expected_doses[s.subject]
        np.testing.assert_allclose(s.dose_start, d["start"], rtol=0, atol=1e-9)
        np.testing.assert_allclose(s.dose_amount, d["amount"], rtol=1e-12)
        np.testing.assert_allclose(s.dose_duration, d["duration"], rtol=0, atol=1e-9)
        assert s.covariates["weight"] == pytest.approx(package.weights[s.subject], rel=1e-9)


def test_what_was_left_out_is_counted_with_its_rows(package, imported):
    _fmt, _folder, study = imported
    rep = study.import_report
    pc = rep["rows_skipped"]["pc"]
    n = len(package.truth)
    assert pc["another specimen (PCSPEC), not analysed"]["count"] == 2 * n     # urine
    assert pc["another analyte (PCTESTCD)"]["count"] == 2 * n                  # metabolite
    assert pc["not done (PCSTAT)"]["count"] == n + len(package.placebo)
    assert pc["placebo subject"]["count"] > 0
    date_only = pc["PCDTC is a date without a time of day"]
    assert date_only["count"] == 1 and date_only["problem"]
    assert date_only["first_rows"][0].startswith(f"pc.{_fmt} row {package.date_only_row + 1} ")
    assert rep["placebo_subjects"] == package.placebo
    assert rep["treatment"] == "ORVEXAMIDE" and rep["specimen"] == "PLASMA"
    assert rep["treatments"]["COMPARATOR CX"]["used"] is False
    assert any("QD expanded" in n for n in rep["notes"])
    assert any("pre-dose level(s)" in n for n in rep["notes"])
    assert any(c["unit"] == "LB" and c["to"] == "kg" for c in rep["unit_conversions"])
    assert sum(w["source"].startswith("baseline flag") for w in rep["weights"].values()) == 4
    assert any("PCDTC is a date" in w for w in study.warnings)


def test_subjects_carry_demographics_vitals_and_labs(imported):
    _fmt, _folder, study = imported
    cov = study.subjects[0].covariates
    assert {"age", "sex", "race", "arm", "actarm", "country", "crcl", "height", "bmi"} <= set(cov)
    assert cov["bmi"] == pytest.approx(cov["weight"] / (cov["height"] / 100) ** 2, rel=0.03)


def test_the_fits_recover_the_simulated_truth(package, imported):
    _fmt, _folder, study = imported
    fit = pkcalc.fit_study(study, error_model="proportional", adequacy=False)
    assert not fit.failures
    for r in fit.results:
        cl, v = package.truth[r.subject]
        assert r.clearance == pytest.approx(cl, rel=1e-4)
        assert r.volume == pytest.approx(v, rel=1e-4)


def test_the_exported_tables_rerun_identically(imported, tmp_path):
    _fmt, _folder, study = imported
    tables = {}
    for name, frame in export_tables(study).items():
        path = tmp_path / f"{name}.csv"
        frame.drop(columns=[c for c in frame.columns if c in ("time [h]", "start [h]")]
                   ).to_csv(path, index=False)
        tables[name] = path
    again = pkcalc.load_study(tables["levels"], tables["doses"], tables["subjects"])
    assert [s.subject for s in again.subjects] == [s.subject for s in study.subjects]
    for a, b in zip(study.subjects, again.subjects, strict=True):
        np.testing.assert_allclose(a.time, b.time, atol=1e-9)
        np.testing.assert_allclose(a.dose_amount, b.dose_amount, rtol=1e-12)
    assert "columns ignored" not in " ".join(again.warnings)


def test_zeros_in_transport_files_stay_zero(package, tmp_path):
    folder = write(package, tmp_path / "x", "xpt")
    ex = read_dataset(folder / "ex.xpt", "ex", {"USUBJID", "EXTRT", "EXDOSE"})
    dose, _ = ex.number("EXDOSE")
    placebo = ex.text("EXTRT") == "PLACEBO"
    assert (dose[placebo] == 0.0).all()                   # not 5.4e-79
    pc = read_dataset(folder / "pc.xpt", "pc", {"USUBJID", "PCSTRESN"})
    values, _ = pc.number("PCSTRESN")
    assert (values == 0.0).sum() == len(package.placebo)


def test_a_metabolite_is_analysed_with_a_prominent_note(package, tmp_path):
    folder = write(package, tmp_path / "m", "csv")
    with pytest.raises(PkcalcInputError, match="several treatments"):
        load_sdtm(folder, analyte="ORVM1")               # no treatment named like it
    study = load_sdtm(folder, analyte="ORVM1", treatment="ORVEXAMIDE")
    assert "apparent" in study.warnings[0] and "ORVEXAMIDE" in study.warnings[0]
    assert "apparent" in study.import_report["apparent_parameters"]
    with pytest.raises(PkcalcInputError, match=r"several analytes \(ORVM1 \(Orvexamide "
                                               r"metabolite M1\), ORVX \(Orvexamide\)\)"):
        load_sdtm(folder)


def test_strict_refuses_what_is_otherwise_left_out(package, tmp_path):
    folder = write(package, tmp_path / "s", "csv")
    with pytest.raises(PkcalcInputError, match="PCDTC is a date without a time of day"):
        load_sdtm(folder, analyte="ORVX", strict=True)


def test_several_systemic_specimens_need_a_choice(package, tmp_path):
    frames = {k: v.copy() for k, v in package.frames.items()}
    pc = frames["pc"]
    serum = pc[(pc["PCSPEC"] == "PLASMA") & (pc["PCTESTCD"] == "ORVX")].head(3).copy()
    serum["PCSPEC"] = "SERUM"
    frames["pc"] = pd.concat([pc, serum], ignore_index=True)
    with pytest.raises(PkcalcInputError, match=r"several systemic specimens.*--specimen"):
        load_sdtm(frames, analyte="ORVX")
    study = load_sdtm(frames, analyte="ORVX", specimen="plasma")
    assert study.import_report["specimens"]["SERUM"]["used"] is False


def test_dataframes_are_datasets_too(package, imported):
    _fmt, _folder, study = imported
    same = load_sdtm(package.frames, analyte="ORVX")
    for a, b in zip(study.subjects, same.subjects, strict=True):
        np.testing.assert_allclose(a.conc, b.conc, rtol=1e-12)


def test_several_active_treatments_without_an_analyte_match_are_refused(package):
    frames = {k: v.copy() for k, v in package.frames.items()}
    frames["ex"]["EXTRT"] = frames["ex"]["EXTRT"].replace("COMPARATOR CX", "ORVEXAMIDE B")
    frames["ex"].loc[frames["ex"]["EXTRT"] == "ORVEXAMIDE B", "EXROUTE"] = "INTRAVENOUS"
    frames["pc"] = frames["pc"].drop(columns="PCTEST")      # no analyte name to match
    with pytest.raises(PkcalcInputError, match=r"several treatments .*--treatment"):
        load_sdtm(frames, analyte="ORVX")
    study = load_sdtm(frames, analyte="ORVX", treatment="orvexamide")
    assert study.import_report["treatments"]["ORVEXAMIDE B"]["used"] is False


def test_the_cli_imports_the_package_with_exit_0(package, tmp_path, run_cli):
    folder = write(package, tmp_path / "c", "xpt")
    r = run_cli("fit", "--sdtm", folder, "--analyte", "ORVX", "--json")
    assert r.code == 0, r.err
    doc = r.json()
    assert doc["import"]["placebo_subjects"] == package.placebo
    assert "PCDTC is a date without a time of day" in r.err      # a row problem, named
    r = run_cli("fit", "--sdtm", folder, "--analyte", "ORVX", "--strict")
    assert r.code == 2 and "strict" in r.err


def test_dataset_json_counts_are_checked(package, tmp_path):
    folder = write(package, tmp_path / "j", "json")
    doc = json.loads((folder / "pc.json").read_text())
    doc["rows"] = doc["rows"][:-3]
    (folder / "pc.json").write_text(json.dumps(doc))
    with pytest.raises(PkcalcInputError, match="records"):
        load_sdtm(folder, analyte="ORVX")


def test_truncated_transport_files_are_refused(package, tmp_path):
    folder = write(package, tmp_path / "t", "xpt")
    data = (folder / "pc.xpt").read_bytes()
    (folder / "pc.xpt").write_bytes(data[:-37])
    with pytest.raises(PkcalcInputError, match="truncated"):
        load_sdtm(folder, analyte="ORVX")
