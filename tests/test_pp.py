"""NCA on a sponsor-style SDTM package (clock dosing records, tests/fixtures/sponsor_sdtm.py)
and its CDISC SDTM PP dataset.

Checks outside pkcalc: clearance against the simulated truth (within 5 %); the PP and
RELREC datasets read back with pyreadstat and with pandas' own SAS reader, variable
names, types and lengths against the SDTMIG PP and RELREC variable lists (from memory:
names of at most 8 characters, labels of at most 40, PPTESTCD of at most 8 and PPTEST of
at most 40 characters, PPSEQ and PPSTRESN numeric, the rest text); PPSTRESN equal to
the CSV's values exactly; every PCSEQ of RELREC present in the package's PC.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

import pkcalc
from pkcalc.report.pp import OWN_TERMS, PK_TERMS, PP_VARIABLES, RELREC_VARIABLES
from pkcalc.schema.sdtm import load_sdtm
from tests.fixtures.sponsor_sdtm import build, write


@pytest.fixture(scope="module")
def package():
    return build()


@pytest.fixture(scope="module")
def folder(package, tmp_path_factory):
    return write(package, tmp_path_factory.mktemp("pp") / "sdtm", "xpt")


def test_nca_clearance_on_clock_records_is_within_5_percent(package, folder):
    study = load_sdtm(folder, analyte="ORVX")
    nca = pkcalc.nca_study(study)
    for r in nca.results:
        cl, _ = package.truth[r.subject]
        assert r.mode == "steady state", (r.subject, r.regimen)
        assert r.clearance == pytest.approx(cl, rel=0.05), (r.subject, r.notes)
        assert "regular" in r.regimen and "irregular" not in r.regimen
        assert [x.number for x in r.intervals] == [1, 2, 3, 4, 5]
        assert r.intervals[0].clearance == pytest.approx(cl, rel=0.05)   # first dose, AUCinf


@pytest.fixture(scope="module")
def written(folder, tmp_path_factory):
    from pkcalc.cli import main

    out = tmp_path_factory.mktemp("ppout") / "pp"
    code = main(["nca", "--sdtm", str(folder), "--analyte", "ORVX", "--pp", str(out),
                 "--json"])
    assert code == 0
    return out


def test_pp_variables_types_and_lengths(written):
    import pyreadstat

    frame, meta = pyreadstat.read_xport(str(written / "pp.xpt"))
    assert meta.table_name == "PP"
    assert list(frame.columns) == [v for v, _, _ in PP_VARIABLES]
    assert all(len(v) <= 8 for v in frame.columns)
    assert all(len(label) <= 40 for label in meta.column_labels)
    kinds = meta.readstat_variable_types
    for name, _, kind in PP_VARIABLES:
        assert (kinds[name] == "string") == (kind == "string"), name
    assert frame["PPTESTCD"].str.len().max() <= 8 and frame["PPTEST"].str.len().max() <= 40
    codes = {c for c, _, _ in PK_TERMS.values()} | {c for c, _, _ in OWN_TERMS.values()}
    assert set(frame["PPTESTCD"]) <= codes
    assert (frame["DOMAIN"] == "PP").all() and frame["PPSEQ"].is_unique
    assert set(frame["STUDYID"]) == {"INV-ORVX-01"}
    assert (frame["PPSPEC"] == "PLASMA").all() and (frame["PPCAT"] == "Orvexamide").all()


def test_pp_values_equal_the_csv_and_the_json(written):
    import pyreadstat

    xpt, _ = pyreadstat.read_xport(str(written / "pp.xpt"))
    csv = pd.read_csv(written / "pp.csv", keep_default_na=False)
    stresn_csv = pd.to_numeric(csv["PPSTRESN"].replace("", np.nan))
    np.testing.assert_array_equal(xpt["PPSTRESN"].to_numpy(), stresn_csv.to_numpy())
    sas = pd.read_sas(written / "pp.xpt", format="xport", encoding="utf-8")
    finite = np.isfinite(xpt["PPSTRESN"]) & (xpt["PPSTRESN"] != 0)
    np.testing.assert_allclose(sas["PPSTRESN"][finite], xpt["PPSTRESN"][finite], rtol=1e-15)
    doc = json.loads((written / "pp.json").read_text())
    assert doc["datasetJSONVersion"] == "1.1.0" and doc["records"] == len(xpt)
    i = [c["name"] for c in doc["columns"]].index("PPSTRESN")
    from_json = np.array([np.nan if r[i] is None else r[i] for r in doc["rows"]], float)
    np.testing.assert_array_equal(from_json, xpt["PPSTRESN"].to_numpy())


def test_not_computed_intervals_are_not_done_records(written):
    import pyreadstat

    pp, _ = pyreadstat.read_xport(str(written / "pp.xpt"))
    done = pp[pp["PPSTAT"] == "NOT DONE"]
    assert len(done) and done["PPREASND"].str.contains("at least 3|nothing to analyse").all()
    assert done["PPSTRESN"].isna().all()
    ss = pp[pp["PPTESTCD"] == "PKCCLSS"]
    assert len(ss) == pp["USUBJID"].nunique()          # one steady-state clearance each
    assert (ss["PPENINT"].str.match(r"^PT\d+(\.\d+)?H$")).all()
    assert (ss["PPRFTDTC"].str.match(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}$")).all()
    assert "PKCCLSS" in (written / "pp-terms.txt").read_text()


def test_relrec_names_the_pc_rows_used(written, package):
    import pyreadstat

    rel, _ = pyreadstat.read_xport(str(written / "relrec.xpt"))
    assert list(rel.columns) == [v for v, _, _ in RELREC_VARIABLES]
    pp, _ = pyreadstat.read_xport(str(written / "pp.xpt"))
    pc_seq = {str(int(x)) for x in package.frames["pc"]["PCSEQ"]}
    pcs = rel[rel["RDOMAIN"] == "PC"]
    assert set(pcs["IDVAR"]) == {"PCSEQ"} and set(pcs["IDVARVAL"]) <= pc_seq
    pps = rel[rel["RDOMAIN"] == "PP"]
    computed = pp[pp["PPSTAT"] != "NOT DONE"]        # a record without levels has none
    assert set(computed["PPSEQ"].astype(int)) <= set(pps["IDVARVAL"].astype(int))
    for _relid, g in rel.groupby("RELID"):     # every relation joins PP and PC records
        assert set(g["RDOMAIN"]) == {"PP", "PC"}
    lamz = rel[rel["RELID"].str.endswith("-LAMZ") & (rel["RDOMAIN"] == "PC")]
    levels = rel[rel["RELID"].str.endswith("-LEVELS") & (rel["RDOMAIN"] == "PC")]
    assert 0 < len(lamz) < len(levels)


def test_pp_into_an_input_folder_is_refused_before_any_work(folder, run_cli, tmp_path):
    before = sorted(p.name for p in folder.iterdir())
    r = run_cli("nca", "--sdtm", folder, "--analyte", "ORVX", "--pp", folder)
    assert r.code == 2 and "input folder" in r.err
    assert sorted(p.name for p in folder.iterdir()) == before
    blocker = tmp_path / "file"
    blocker.write_text("x")
    r = run_cli("nca", "--sdtm", folder, "--analyte", "ORVX", "--pp", blocker)
    assert r.code == 2 and "--pp" in r.err


def test_tables_without_sdtm_get_their_own_relationship(run_cli, tmp_path):
    from tests.conftest import SCENARIOS

    r = run_cli("nca", SCENARIOS / "demo-study.toml", "--pp", tmp_path / "pp")
    assert r.code == 0, r.err
    sources = pd.read_csv(tmp_path / "pp" / "pp-sources.csv")
    assert {"PPGRPID", "RELID", "file", "line"} <= set(sources.columns)
    assert sources["file"].str.endswith("demo-study-levels.csv").all()
    assert not (tmp_path / "pp" / "relrec.xpt").exists()
