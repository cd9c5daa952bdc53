"""Generate the invented demo study tables (fixed seed; re-run to reproduce them).

INVENTED DATA: "veltaramide" is a fictional compound; the subjects, weights,
doses and levels below are simulated from a one-compartment model with known
parameters, not measured in anyone.

    python scenarios/generate_demo_study.py        # rewrites the CSV files beside it

The rich study (12 subjects, 9-12 levels each) feeds ``pkcalc fit`` and
``pkcalc nca``; the sparse study (60 subjects, 2-3 levels each) feeds
``pkcalc population``; the biphasic example (8 subjects of the fictional
"corvanide", simulated from a two-compartment model) shows the adequacy check
finding a distribution phase.  ``tests/test_demo_data.py`` checks that the committed
files equal what this script produces.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np

from pkcalc import model

HERE = Path(__file__).resolve().parent

#: True typical values of the simulation (also used by the tests).
TRUE = {"clearance": 4.0, "volume": 45.0, "cv_clearance": 0.30, "cv_volume": 0.20,
        "exponent_clearance": 0.75, "exponent_volume": 1.0, "reference_weight": 70.0,
        "proportional_error": 0.08, "additive_error": 0.05, "lloq": 0.2}


def _fmt(x: float) -> str:
    return f"{x:.4g}"


def _individuals(rng: np.random.Generator, n: int):
    weight = np.clip(rng.normal(72.0, 13.0, n), 45.0, 115.0).round(1)
    eta = rng.multivariate_normal([0.0, 0.0], np.diag([np.log1p(TRUE["cv_clearance"] ** 2),
                                                      np.log1p(TRUE["cv_volume"] ** 2)]), n)
    w = weight / TRUE["reference_weight"]
    cl = TRUE["clearance"] * w ** TRUE["exponent_clearance"] * np.exp(eta[:, 0])
    v = TRUE["volume"] * w ** TRUE["exponent_volume"] * np.exp(eta[:, 1])
    return weight, cl, v


def _observe(rng, t, start, amount, duration, cl, v):
    c = model.concentration(t, start, amount, duration, cl, v)
    sd = np.sqrt((TRUE["proportional_error"] * c) ** 2 + TRUE["additive_error"] ** 2)
    return c + rng.normal(0.0, 1.0, c.size) * sd


def rich_study(seed: int = 20261202) -> dict[str, str]:
    """Levels, doses and subjects CSV text of the rich demo study."""
    rng = np.random.default_rng(seed)
    n = 12
    weight, cl, v = _individuals(rng, n)
    levels = io.StringIO()
    doses = io.StringIO()
    levels.write("subject,time [h],concentration [ug/mL],lloq [ug/mL],blq\n")
    doses.write("subject,start [h],amount [mg],duration [min]\n")
    for i in range(n):
        sid = f"V{i + 1:02d}"
        if i < 8:       # one 500 mg infusion over 1 h
            start, amount, duration = [0.0], [500.0], [1.0]
            t = np.array([0.5, 1, 1.5, 2, 3, 4, 6, 8, 12, 16, 24, 36.0])
        elif i < 10:    # loading bolus, then an infusion with a rate change at 12 h
            start, amount, duration = [0.0, 0.0, 12.0], [250.0, 20.0 * 12, 30.0 * 12], \
                [0.0, 12.0, 12.0]
            t = np.array([0.25, 1, 4, 8, 12, 16, 20, 24, 30, 36.0])
        else:           # 300 mg over 30 min every 12 h, four doses; levels after the last
            start, amount, duration = [0.0, 12.0, 24.0, 36.0], [300.0] * 4, [0.5] * 4
            t = 36.0 + np.array([0.0, 0.5, 1, 2, 4, 6, 8, 12.0])
        c = _observe(rng, t, np.array(start), np.array(amount), np.array(duration), cl[i], v[i])
        for tt, cc in zip(t, c, strict=True):
            if cc < TRUE["lloq"]:
                levels.write(f"{sid},{_fmt(tt)},,{TRUE['lloq']},true\n")
            else:
                levels.write(f"{sid},{_fmt(tt)},{_fmt(cc)},{TRUE['lloq']},false\n")
        for s, a, d in zip(start, amount, duration, strict=True):
            doses.write(f"{sid},{_fmt(s)},{_fmt(a)},{_fmt(d * 60)}\n")
    subjects = "subject,weight [kg]\n" + "".join(
        f"V{i + 1:02d},{weight[i]:.1f}\n" for i in range(n))
    return {"demo-study-levels.csv": levels.getvalue(), "demo-study-doses.csv": doses.getvalue(),
            "demo-study-subjects.csv": subjects}


def sparse_study(seed: int = 7) -> dict[str, str]:
    """Levels, doses and subjects CSV text of the sparse demo study (60 subjects)."""
    rng = np.random.default_rng(seed)
    n = 60
    weight, cl, v = _individuals(rng, n)
    levels = io.StringIO()
    doses = io.StringIO()
    levels.write("subject,time [h],concentration [mg/L]\n")
    doses.write("subject,start [h],amount [mg],rate [mg/h]\n")
    for i in range(n):
        sid = f"S{i + 1:03d}"
        # weight-based loading (6 mg/kg over 30 min) and 0.5 mg/kg/h maintenance for 48 h
        load = round(6.0 * weight[i] / 10) * 10
        rate = round(0.5 * weight[i], 1)
        start = np.array([0.0, 0.5])
        amount = np.array([load, rate * 47.5])
        duration = np.array([0.5, 47.5])
        k = int(rng.integers(2, 4))
        t = np.sort(rng.choice(np.array([1, 2, 4, 8, 12, 24, 36, 47, 52, 60, 72.0]), k,
                               replace=False)) + rng.uniform(-0.2, 0.2, k).round(2)
        c = _observe(rng, t, start, amount, duration, cl[i], v[i])
        for tt, cc in zip(t, c, strict=True):
            levels.write(f"{sid},{_fmt(tt)},{_fmt(max(cc, 0.01))}\n")
        doses.write(f"{sid},0,{_fmt(load)},{_fmt(load / 0.5)}\n")
        doses.write(f"{sid},0.5,{_fmt(rate * 47.5)},{_fmt(rate)}\n")
    # an invented ward of admission: a text covariate with no effect on the kinetics
    # (its own random stream, so the other columns do not change)
    ward = np.random.default_rng(seed + 1).choice(["north", "south", "east"], n)
    subjects = "subject,weight [kg],ward\n" + "".join(
        f"S{i + 1:03d},{weight[i]:.1f},{ward[i]}\n" for i in range(n))
    return {"demo-sparse-levels.csv": levels.getvalue(),
            "demo-sparse-doses.csv": doses.getvalue(),
            "demo-sparse-subjects.csv": subjects}


def sdtm_study() -> dict[str, str]:
    """The rich study as CDISC SDTM datasets (PC, EX, VS, DM as CSV), with clock times:
    each subject starts on its own day, some levels are reported in ng/mL, BLQ levels
    as text ("<0.2"), and one planned sample per subject was not done (PCSTAT)."""
    from datetime import datetime, timedelta

    rich = rich_study()
    levels = [line.split(",") for line in rich["demo-study-levels.csv"].splitlines()[1:]]
    doses = [line.split(",") for line in rich["demo-study-doses.csv"].splitlines()[1:]]
    weights = dict(line.split(",") for line in
                   rich["demo-study-subjects.csv"].splitlines()[1:])
    subjects = sorted({row[0] for row in doses})
    origin = {sid: datetime(2026, 4, 6 + i, 8 + i % 3, 15 * (i % 4))
              for i, sid in enumerate(subjects)}

    def stamp(sid: str, hours: float) -> str:
        return (origin[sid] + timedelta(hours=hours)).strftime("%Y-%m-%dT%H:%M")

    pc = io.StringIO()
    pc.write("STUDYID,DOMAIN,USUBJID,PCSEQ,PCTESTCD,PCTEST,PCORRES,PCORRESU,PCSTRESC,"
             "PCSTRESN,PCSTRESU,PCLLOQ,PCSTAT,PCDTC\n")
    seq: dict[str, int] = {}
    for sid, t, conc, lloq, blq in levels:
        n = seq[sid] = seq.get(sid, 0) + 1
        usub = f"INVENTED-{sid}"
        ng = n % 2 == 0  # every other level reported in ng/mL
        if blq == "true":
            row = (f"<{lloq}", "", "ug/mL", lloq)
        elif ng:
            v = _fmt(float(conc) * 1000)
            row = (v, v, "ng/mL", _fmt(float(lloq) * 1000))
        else:
            row = (conc, conc, "ug/mL", lloq)
        pc.write(f"INV-DEMO,PC,{usub},{n},VELTA,Veltaramide,{row[0]},{row[2]},{row[0]},"
                 f"{row[1]},{row[2]},{row[3]},,{stamp(sid, float(t))}\n")
    for sid in subjects:  # a planned sample not done
        pc.write(f"INV-DEMO,PC,INVENTED-{sid},99,VELTA,Veltaramide,,,,,ug/mL,0.2,NOT DONE,"
                 f"{stamp(sid, 30.0)}\n")
    ex = io.StringIO()
    ex.write("STUDYID,DOMAIN,USUBJID,EXSEQ,EXTRT,EXDOSE,EXDOSU,EXROUTE,EXSTDTC,EXENDTC\n")
    count: dict[str, int] = {}
    for sid, start, amount, minutes in doses:
        n = count[sid] = count.get(sid, 0) + 1
        s0, s1 = float(start), float(start) + float(minutes) / 60
        ex.write(f"INV-DEMO,EX,INVENTED-{sid},{n},VELTARAMIDE,{amount},mg,INTRAVENOUS,"
                 f"{stamp(sid, s0)},{stamp(sid, s1)}\n")
    vs = io.StringIO()
    vs.write("STUDYID,DOMAIN,USUBJID,VSSEQ,VSTESTCD,VSTEST,VSSTRESN,VSSTRESU,VSDTC\n")
    dm = io.StringIO()
    dm.write("STUDYID,DOMAIN,USUBJID,SUBJID,RFSTDTC\n")
    for sid in subjects:
        vs.write(f"INV-DEMO,VS,INVENTED-{sid},1,WEIGHT,Weight,{weights[sid]},kg,"
                 f"{stamp(sid, -1.0)}\n")
        dm.write(f"INV-DEMO,DM,INVENTED-{sid},{sid},{stamp(sid, 0.0)}\n")
    return {"demo-sdtm/pc.csv": pc.getvalue(), "demo-sdtm/ex.csv": ex.getvalue(),
            "demo-sdtm/vs.csv": vs.getvalue(), "demo-sdtm/dm.csv": dm.getvalue()}


#: True values of the biphasic example (two compartments; invented compound "corvanide").
BIPHASIC = {"clearance": 6.0, "central_volume": 12.0, "intercompartmental": 20.0,
            "peripheral_volume": 30.0, "cv": 0.25, "proportional_error": 0.06}


def biphasic_study(seed: int = 41) -> dict[str, str]:
    """Levels and doses of the biphasic example: 8 subjects simulated from a
    two-compartment model (a distribution phase after each infusion), so the
    one-compartment adequacy check has something to find."""
    rng = np.random.default_rng(seed)
    levels = io.StringIO()
    doses = io.StringIO()
    levels.write("subject,time [h],concentration [mg/L]\n")
    doses.write("subject,start [h],amount [mg],duration [min]\n")
    t = np.array([0.75, 1.25, 1.5, 2, 3, 4, 6, 8, 12, 16, 24.0])
    for i in range(8):
        sid = f"B{i + 1}"
        p = {k: BIPHASIC[k] * np.exp(BIPHASIC["cv"] * rng.standard_normal())
             for k in ("clearance", "central_volume", "intercompartmental",
                       "peripheral_volume")}
        c = model.two_compartment_concentration(
            t, [0.0], [400.0], [1.0], p["clearance"], p["central_volume"],
            p["intercompartmental"], p["peripheral_volume"])
        c = c * np.exp(BIPHASIC["proportional_error"] * rng.standard_normal(t.size))
        levels.writelines(f"{sid},{_fmt(tt)},{_fmt(cc)}\n" for tt, cc in zip(t, c, strict=True))
        doses.write(f"{sid},0,400,60\n")
    return {"demo-biphasic-levels.csv": levels.getvalue(),
            "demo-biphasic-doses.csv": doses.getvalue()}


def all_files() -> dict[str, str]:
    return {**rich_study(), **sparse_study(), **sdtm_study(), **biphasic_study()}


if __name__ == "__main__":
    for name, text in all_files().items():
        (HERE / name).parent.mkdir(exist_ok=True)
        (HERE / name).write_text(text, encoding="utf-8")
        print("wrote", name)
