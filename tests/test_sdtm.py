"""CDISC SDTM import: an invented study written by the test as SAS transport (.xpt,
with pyreadstat) and as CSV, against the same study as pkcalc tables.

Mapping per the SDTM Implementation Guide v3.3 (from memory for section numbers):
PC (USUBJID, PCTESTCD, PCSTRESN, PCSTRESU, PCSTRESC, PCLLOQ, PCSTAT, PCDTC), EX
(EXDOSE, EXDOSU, EXROUTE, EXSTDTC, EXENDTC), VS (VSTESTCD = WEIGHT, VSSTRESN,
VSSTRESU, VSDTC); controlled terms "NOT DONE" (PCSTAT) and "INTRAVENOUS"
(route); ISO 8601 date-times (checked against ``datetime.fromisoformat``).
"""

from __future__ import annotations

from datetime import datetime, timedelta

import numpy as np
import pandas as pd
import pytest

import pkcalc
from pkcalc import model
from pkcalc.schema.sdtm import load_sdtm

SUBJECTS = ["INV-001", "INV-002", "INV-003", "INV-004"]
TRUTH = {"INV-001": (4.0, 40.0), "INV-002": (2.5, 55.0), "INV-003": (6.0, 30.0),
         "INV-004": (3.2, 48.0)}
TIMES = [0.5, 1.5, 3.0, 6.0, 12.0, 24.0]


def _study(tmp_path, fmt: str, *, extra_pc=(), route="INTRAVENOUS", dose_unit="mg",
           noise=0.0):
    """An invented study: 500 mg over 1 h; levels noise-free from the truth; subjects
    start on different days; INV-002's times written with offsets across the
    2026-03-29 daylight-saving change; INV-003's levels in ug/mL; a BLQ text row."""
    pc, ex, vs = [], [], []
    for i, sid in enumerate(SUBJECTS):
        cl, v = TRUTH[sid]
        origin = datetime(2026, 3, 27 + i, 23, 0)
        offsets = sid == "INV-002"

        def stamp(h, origin=origin, offsets=offsets):
            t = origin + timedelta(hours=h)  # an instant, in UTC
            if not offsets:
                return t.strftime("%Y-%m-%dT%H:%M:%S")
            off = 1 if t < datetime(2026, 3, 29, 1, 0) else 2   # CET -> CEST
            return (t + timedelta(hours=off)).strftime("%Y-%m-%dT%H:%M:%S") + f"+0{off}:00"

        amount = 500.0 if dose_unit == "mg" else 500.0 / 70.0
        ex.append({"USUBJID": sid, "EXDOSE": amount, "EXDOSU": dose_unit,
                   "EXROUTE": route if sid == "INV-004" else "INTRAVENOUS",
                   "EXSTDTC": stamp(0.0), "EXENDTC": stamp(1.0)})
        vs.append({"USUBJID": sid, "VSTESTCD": "WEIGHT", "VSSTRESN": 70.0, "VSSTRESU": "kg",
                   "VSDTC": stamp(-2.0)})
        c = model.concentration(np.array(TIMES), [0.0], [500.0], [1.0], cl, v)
        c = c * (1 + noise * np.sin(np.arange(len(TIMES)) * 2.1 + i))  # deterministic
        for t, x in zip(TIMES, c, strict=True):
            if sid == "INV-003":
                pc.append({"USUBJID": sid, "PCTESTCD": "INVDRG", "PCSTRESN": x,
                           "PCSTRESU": "ug/mL", "PCSTRESC": f"{x:g}", "PCLLOQ": 0.05,
                           "PCSTAT": "", "PCDTC": stamp(t)})
            else:
                pc.append({"USUBJID": sid, "PCTESTCD": "INVDRG", "PCSTRESN": x * 1000,
                           "PCSTRESU": "ng/mL", "PCSTRESC": f"{x * 1000:g}", "PCLLOQ": 50.0,
                           "PCSTAT": "", "PCDTC": stamp(t)})
        pc.append({"USUBJID": sid, "PCTESTCD": "INVDRG", "PCSTRESN": np.nan,
                   "PCSTRESU": "ng/mL", "PCSTRESC": "<50", "PCLLOQ": 50.0, "PCSTAT": "",
                   "PCDTC": stamp(96.0)})
        pc.append({"USUBJID": sid, "PCTESTCD": "INVDRG", "PCSTRESN": np.nan,
                   "PCSTRESU": "ng/mL", "PCSTRESC": "", "PCLLOQ": 50.0,
                   "PCSTAT": "NOT DONE", "PCDTC": stamp(48.0)})
    pc += list(extra_pc)
    folder = tmp_path / f"sdtm-{fmt}"
    folder.mkdir()
    for name, rows in (("pc", pc), ("ex", ex), ("vs", vs)):
        frame = pd.DataFrame(rows)
        if fmt == "xpt":
            import pyreadstat

            pyreadstat.write_xport(frame, str(folder / f"{name}.xpt"), table_name=name.upper(),
                                   file_format_version=5)
        else:
            frame.to_csv(folder / f"{name}.csv", index=False)
    return folder


@pytest.mark.parametrize("fmt", ["xpt", "csv"])
def test_sdtm_study_fits_like_the_equivalent_tables(tmp_path, fmt):
    folder = _study(tmp_path, fmt)
    study = load_sdtm(folder)
    assert [s.subject for s in study.subjects] == SUBJECTS
    for s in study.subjects:  # hours since the first dose, exactly (offsets, DST, days)
        measured = s.time[~s.blq]
        np.testing.assert_allclose(measured, TIMES, rtol=0, atol=1e-9)
        assert s.blq.sum() == 1 and s.lloq[s.blq][0] == pytest.approx(0.05)
    report = study.import_report
    assert report["rows_skipped"]["pc"]["not done (PCSTAT)"]["count"] == 4
    assert report["analyte"] == "INVDRG"
    fit = pkcalc.fit_study(study, error_model="additive", blq="drop")
    for r in fit.results:
        cl, v = TRUTH[r.subject]
        assert r.clearance == pytest.approx(cl, rel=1e-6)
        assert r.volume == pytest.approx(v, rel=1e-6)
    # the same study as pkcalc tables (the exported analysis-ready tables) fits identically
    tables = {}
    from pkcalc.schema.sdtm import export_tables

    for name, frame in export_tables(study).items():
        path = tmp_path / f"{fmt}-{name}.csv"
        frame.drop(columns=[c for c in frame.columns if c.endswith("[h]") and
                            c.split(" ")[0] in ("time", "start")]).to_csv(path, index=False)
        tables[name] = path
    again = pkcalc.fit_study(pkcalc.load_study(tables["levels"], tables["doses"],
                                               tables["subjects"]),
                             error_model="additive", blq="drop")
    for a, b in zip(fit.results, again.results, strict=True):
        assert b.clearance == pytest.approx(a.clearance, rel=1e-9)


def test_cli_reports_the_import_and_exports_tables(tmp_path, run_cli):
    folder = _study(tmp_path, "xpt")
    r = run_cli("nca", "--sdtm", folder, "--out", tmp_path / "o")
    assert r.code == 0, r.err
    assert "Imported from SDTM" in r.out and "not done (PCSTAT)" in r.out
    names = {p.name for p in (tmp_path / "o").iterdir()}
    assert {"analysis-levels.csv", "analysis-doses.csv", "analysis-subjects.csv"} <= names
    levels = pd.read_csv(tmp_path / "o" / "analysis-levels.csv")
    assert {"time [clock]", "time [h]"} <= set(levels.columns)
    doc = run_cli("fit", "--sdtm", folder, "--json").json()
    assert doc["import"]["rows_read"]["pc"] == 4 * (len(TIMES) + 2)


def test_per_kg_doses_use_the_weight_from_vs(tmp_path):
    study = load_sdtm(_study(tmp_path, "csv", dose_unit="mg/kg"))
    assert study.subjects[0].dose_amount[0] == pytest.approx(500.0)


@pytest.mark.parametrize(("change", "code", "phrase"), [
    ({"analyte": "OTHER"}, 2, "unknown analyte"),
    ({"route": "ORAL"}, 1, "not intravenous"),
    ({"extra_pc": [{"USUBJID": "INV-001", "PCTESTCD": "INVDRG", "PCSTRESN": 1.0,
                    "PCSTRESU": "ng/mL", "PCSTRESC": "1", "PCLLOQ": 50.0, "PCSTAT": "",
                    "PCDTC": ""}]}, 0, "PCDTC is empty"),
    ({"extra_pc": [{"USUBJID": "INV-001", "PCTESTCD": "INVDRG", "PCSTRESN": 1.0,
                    "PCSTRESU": "furlong", "PCSTRESC": "1", "PCLLOQ": 50.0, "PCSTAT": "",
                    "PCDTC": "2026-03-28T10:00:00"}]}, 0, "furlong"),
    ({"extra_pc": [{"USUBJID": "INV-999", "PCTESTCD": "INVDRG", "PCSTRESN": 1.0,
                    "PCSTRESU": "ng/mL", "PCSTRESC": "1", "PCLLOQ": 50.0, "PCSTAT": "",
                    "PCDTC": "2026-03-28T10:00:00"}]}, 1, "no exposure records"),
    ({"extra_pc": [{"USUBJID": "INV-001", "PCTESTCD": "OTHERDRG", "PCSTRESN": 1.0,
                    "PCSTRESU": "ng/mL", "PCSTRESC": "1", "PCLLOQ": 50.0, "PCSTAT": "",
                    "PCDTC": "2026-03-28T10:00:00"}]}, 2, "several analytes"),
])
def test_bad_sdtm_inputs(tmp_path, run_cli, change, code, phrase):
    analyte = change.pop("analyte", None)
    folder = _study(tmp_path, "csv", **change)
    args = ["fit", "--sdtm", folder] + (["--analyte", analyte] if analyte else [])
    r = run_cli(*args)
    assert r.code == code, r.err
    assert phrase in r.err and "Traceback" not in r.err


def test_end_before_start_and_damaged_transport_file(tmp_path, run_cli):
    folder = _study(tmp_path, "csv")
    ex = pd.read_csv(folder / "ex.csv")
    ex.loc[0, "EXENDTC"] = "2026-03-27T20:00:00"
    ex.to_csv(folder / "ex.csv", index=False)
    r = run_cli("fit", "--sdtm", folder)
    assert r.code == 1 and "EXENDTC" in r.err and "INV-001" in r.err
    bad = tmp_path / "bad"
    bad.mkdir()
    (bad / "pc.xpt").write_bytes(b"not a transport file at all")
    (bad / "ex.csv").write_text("USUBJID,EXDOSE,EXDOSU,EXSTDTC\nA,1,mg,2026-03-04T08:00\n")
    r = run_cli("nca", "--sdtm", bad)
    assert r.code == 2 and "SAS transport" in r.err


def test_a_folder_of_adam_datasets_is_named_as_such(tmp_path, run_cli):
    # ADaM analysis datasets (ADPC, ADEX) are derived tables, not the SDTM tabulation
    # (CDISC ADaMIG naming, from memory): the refusal says what the folder holds
    folder = _study(tmp_path, "csv")
    (folder / "pc.csv").rename(folder / "adpc.csv")
    r = run_cli("fit", "--sdtm", folder)
    assert r.code == 2
    assert "no PC dataset; adpc.csv is ADaM (analysis) data, not read" in r.err


def test_a_study_file_can_name_an_sdtm_folder(tmp_path, run_cli):
    folder = _study(tmp_path, "csv", noise=0.05)
    (tmp_path / "study.toml").write_text(f'sdtm = "{folder.name}"\nanalyte = "INVDRG"\n')
    r = run_cli("population", tmp_path / "study.toml", "--method", "two_stage")
    assert r.code == 0, r.err
    assert "Imported from SDTM" in r.out


def test_the_html_report_carries_the_import_report(tmp_path, run_cli):
    folder = _study(tmp_path, "csv")
    r = run_cli("fit", "--sdtm", folder, "--report", tmp_path / "r.html")
    assert r.code == 0, r.err
    html = (tmp_path / "r.html").read_text(encoding="utf-8")
    assert "imported from SDTM" in html and "not done (PCSTAT)" in html
