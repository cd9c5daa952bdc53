"""The bad-input corpus: every refused input across all eight commands.

Each row: the rule of docs/formats.md it tests, the command line, the input files,
the expected exit code and a phrase the message (stderr) must contain.  Every run
must end without a traceback, leave its inputs untouched, and -- when it refuses
(exit 2) -- write no output.  Files are invented.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from pathlib import Path

import pytest

from pkcalc.cli import main

from .conftest import map_scenario


@dataclass(frozen=True)
class Case:
    id: str
    rule: str
    args: tuple[str, ...]
    files: dict[str, str | bytes] = field(default_factory=dict)
    code: int = 2
    phrase: str = ""
    dirs: tuple[str, ...] = ()


# --------------------------------------------------------------------------- valid inputs
SCENARIO = """[[scenarios]]
name = "s"
clearance = {clearance}
half_life = {half_life}
doses = [ {{ start = {start}, amount = {amount}, duration = {duration} }} ]
"""
GOOD = {"clearance": '"3 L/h"', "half_life": '"8 h"', "start": '"0 h"', "amount": '"300 mg"',
        "duration": '"1 h"'}


def scenario(**changes: str) -> str:
    return SCENARIO.format(**{**GOOD, **changes})


def scenario_lines(*lines: str, doses: str | None = None) -> str:
    body = ['[[scenarios]]', 'name = "s"', 'clearance = "3 L/h"', 'half_life = "8 h"']
    body.append(doses if doses is not None else
                'doses = [ { start = "0 h", amount = "300 mg", duration = "1 h" } ]')
    return "\n".join(body + list(lines)) + "\n"


LEVELS = ("subject,time [h],concentration [mg/L]\nA,1,8.1\nA,2,7.2\nA,4,5.6\nA,8,3.4\n"
          "A,12,2.1\nB,1,9.0\nB,2,8.1\nB,4,6.5\nB,8,4.2\nB,12,2.7\n"
          "C,1,7.0\nC,2,6.4\nC,4,5.1\nC,8,3.3\nC,12,2.2\n"
          "D,1,8.8\nD,2,7.5\nD,4,5.4\nD,8,2.9\nD,12,1.6\n")
DOSES = ("subject,start [h],amount [mg],duration [h]\nA,0,500,0.5\nB,0,500,0.5\n"
         "C,0,500,0.5\nD,0,500,0.5\n")
SUBJECTS = "subject,weight [kg]\nA,70\nB,80\nC,65\nD,90\n"
STUDY_TOML = 'levels = "levels.csv"\ndoses = "doses.csv"\nsubjects = "subjects.csv"\n'
BATCH = "clearance [L/h],half_life [h],rate [mg/h]\n3,8,30\n4,6,40\n"
CASES = """[[cases]]
name = "c"
source = "invented, recomputed by hand: Css = R0/CL"
clearance = "3 L/h"
half_life = "8 h"
doses = [ { start = "0 h", rate = "30 mg/h", duration = "200 h" } ]
[[cases.expect]]
quantity = "plateau_concentration"
value = "10 mg/L"
tolerance = "1%"
"""
DESIGN = """[[scenarios]]
name = "d"
clearance = "4.2 L/h"
half_life = "8 h"
[scenarios.design]
plateau = "8 mg/L"
"""
def map_file(d0="0 h", d1="0.5 h", t1="6 h", t2="22 h", extra="") -> str:
    return map_scenario(d0, d1, t1, t2, 'plateau = "8 mg/L"\n' + extra)


def study_files(levels=LEVELS, doses=DOSES, subjects=SUBJECTS) -> dict[str, str | bytes]:
    return {"levels.csv": levels, "doses.csv": doses, "subjects.csv": subjects,
            "study.toml": STUDY_TOML}


# --------------------------------------------------------------------------- the corpus
def quantity_cases() -> list[Case]:
    """Q1-Q6 for every quantity of a scenario, via predict."""
    out = []
    bad = [  # (value as written in TOML, rule, phrase)
        ('"3"', "Q1", "has no unit"), ("3", "Q1", "has no unit"),
        ('"3 kg/m"', "Q2", "dimension"), ("true", "Q4", "with its unit"),
        ('["3"]', "Q4", "with its unit"), ('"nan {u}"', "Q3", "not a number"),
        ('"inf {u}"', "Q3", "not a number"), ('"1e-308 {u}"', "Q3", "outside the range"),
        ('"1e308 {u}"', "Q3", "outside the range"), ('"three {u}"', "Q1", "number"),
        ('"-3 {u}"', "Q6", "{sign}"),
    ]
    units = {"clearance": ("L/h", "greater than zero"), "half_life": ("h", "greater than zero"),
             "start": ("h", "not be negative"), "amount": ("mg", "not be negative"),
             "duration": ("h", "not be negative")}
    for name, (unit, sign) in units.items():
        for value, rule, phrase in bad:
            v = value.replace("{u}", unit)
            p = phrase.replace("{sign}", sign)
            out.append(Case(f"predict-{name}-{v}", rule, ("predict", "s.toml"),
                            {"s.toml": scenario(**{name: v})}, 2, p))
    return out


def dose_and_time_cases() -> list[Case]:
    d = 'doses = [ {{ start = "0 h", amount = "300 mg", duration = "1 h"{x} }} ]'
    rows = [
        ("count-0", "D3", ', every = "8 h", count = 0', "count must be 1 or more"),
        ("count-negative", "D3", ', every = "8 h", count = -2', "count must be 1 or more"),
        ("count-float", "Q4", ', every = "8 h", count = 1.5', "whole number"),
        ("count-true", "Q4", ', every = "8 h", count = true', "whole number"),
        ("count-text", "Q4", ', every = "8 h", count = "3"', "whole number"),
        ("count-huge", "D3", ', every = "8 h", count = 100000', "5000"),
        ("count-1e9", "D3", ', every = "8 h", count = 1000000000', "5000"),
        ("every-no-count", "D2", ', every = "8 h"', "needs 'count'"),
        ("count-no-every", "D2", ", count = 3", "needs 'every'"),
        ("every-zero", "Q6", ', every = "0 h", count = 3', "greater than zero"),
        ("unknown-key", "F3", ', dose = "3 mg"', "unknown key"),
    ]
    out = [Case(f"predict-dose-{i}", r, ("predict", "s.toml"),
                {"s.toml": scenario_lines(doses=d.format(x=x).replace("{{", "{")
                                          .replace("}}", "}"))}, 2, p)
           for i, r, x, p in rows]
    whole = [
        ("rate-no-duration", "D1", 'doses = [ { start = "0 h", rate = "30 mg/h" } ]',
         "two of amount"),
        ("disagree", "D1", 'doses = [ { start = "0 h", amount = "300 mg", rate = "30 mg/h", '
         'duration = "1 h" } ]', "differs from rate x duration"),
        ("nothing", "D1", 'doses = [ { start = "0 h" } ]', "two of amount"),
        ("no-doses", "D1", 'doses = []', "no doses"),
        ("doses-text", "F3", 'doses = "300 mg"', "must be a list"),
        ("start-missing", "F3", 'doses = [ { amount = "300 mg" } ]', "is required"),
        ("many-doses", "D4", 'doses = [ ' + ", ".join(
            f'{{ start = "{i} h", amount = "1 mg", every = "1 h", count = 3000 }}'
            for i in range(2)) + " ]", "5000"),
        ("rate-zero-duration", "D1", 'doses = [ { start = "0 h", rate = "30 mg/h", '
         'duration = "0 h" } ]', "duration greater than zero"),
    ]
    out += [Case(f"predict-doses-{i}", r, ("predict", "s.toml"),
                 {"s.toml": scenario_lines(doses=x)}, 2, p) for i, r, x, p in whole]
    times = [
        ("decreasing", "T1", 'times = ["2 h", "1 h"]', "must increase"),
        ("repeated", "T1", 'times = ["1 h", "1 h"]', "must increase"),
        ("negative", "T1", 'times = ["-1 h", "1 h"]', "not be negative"),
        ("empty", "T1", "times = []", "empty"),
        ("range-backwards", "T1", 'times = { from = "5 h", to = "1 h", step = "1 h" }',
         "before 'from'"),
        ("range-step-zero", "T1", 'times = { from = "0 h", to = "1 h", step = "0 h" }',
         "greater than zero"),
        ("too-many", "T2", 'times = { from = "0 h", to = "1000 h", step = "0.0001 h" }',
         "more than 1000000"),
        ("bare", "Q1", "times = [1, 2]", "has no unit"),
        ("text", "F3", 'times = "often"', "must be a list"),
        ("range-unknown-key", "F3", 'times = { from = "0 h", to = "1 h", step = "1 h", '
         'by = 2 }', "unknown key"),
        ("work", "D5", 'times = { from = "0 h", to = "4000 h", step = "0.0001 h" }',
         "more than 1000000"),
    ]
    out += [Case(f"predict-times-{i}", r, ("predict", "s.toml"),
                 {"s.toml": scenario_lines(x)}, 2, p) for i, r, x, p in times]
    return out


def parameter_cases() -> list[Case]:
    rows = [
        ("one-parameter", "P1", scenario().replace('half_life = "8 h"\n', ""), "not determined"),
        ("disagree", "P2", scenario().replace('half_life = "8 h"',
                                              'half_life = "8 h"\nvolume = "10 L"'),
         "disagrees"),
        ("derived-k-too-large", "P3", scenario(clearance='"1e50 L/h"').replace(
            'half_life = "8 h"', 'volume = "1e-60 L"'), "outside the range"),
        ("per-kg-no-weight", "Q5", scenario(clearance='"0.05 L/h/kg"'), "no weight"),
        ("unknown-key", "F3", scenario().replace('name = "s"', 'name = "s"\nclearence = "3"'),
         "unknown key"),
        ("no-name", "F3", scenario().replace('name = "s"\n', ""), "is required"),
        ("name-number", "F3", scenario().replace('name = "s"', "name = 5"), "must be text"),
        ("duplicate-name", "F3", scenario() + scenario(), "duplicate scenario name", 1),
        ("weight-zero", "Q6", scenario().replace('name = "s"', 'name = "s"\nweight = "0 kg"'),
         "greater than zero"),
        ("window-reversed", "A1", scenario() + 'target = { window = ["10 mg/L", "5 mg/L"] }\n',
         "not below high"),
        ("target-bare", "Q1", scenario() + "target = { plateau = 10 }\n", "has no unit"),
        ("initial-negative", "Q6", scenario().replace('name = "s"', 'name = "s"\n'
                                                      'initial_concentration = "-1 mg/L"'),
         "not be negative"),
        ("output-unit", "Q2", '[output]\ntime = "kg"\n' + scenario(), "dimension"),
        ("no-scenarios", "F3", 'title = "t"\n', "no [[scenarios]]"),
        ("scenarios-not-table", "F3", 'scenarios = [1]\n', "must be a table"),
        ("top-unknown", "F3", 'colour = "red"\n' + scenario(), "unknown key"),
    ]
    return [Case(f"predict-{i}", r, ("predict", "s.toml"), {"s.toml": x},
                 code[0] if code else 2, p) for i, r, x, p, *code in rows]


def file_cases() -> list[Case]:
    """F1-F3 for every command that reads a TOML file, and the study TOML."""
    commands = {"predict": ("predict",), "design": ("design",), "verify": ("verify",),
                "fit": ("fit",), "nca": ("nca",), "population": ("population",),
                "batch": ("batch",)}
    out = []
    for name, prefix in commands.items():
        extra = ("--out", "o.csv") if name == "batch" else ()
        out += [
            Case(f"{name}-missing-file", "F2", (*prefix, "nope.toml", *extra), {}, 2,
                 "not found"),
            Case(f"{name}-folder", "F2", (*prefix, "adir", *extra), {}, 2, "is a folder",
                 dirs=("adir",)),
            Case(f"{name}-empty", "F2", (*prefix, "e.toml", *extra), {"e.toml": ""}, 2,
                 "empty"),
            Case(f"{name}-invalid-toml", "F3", (*prefix, "b.toml", *extra),
                 {"b.toml": "[[scenarios]\nname = \n"}, 2, "not valid TOML"),
            Case(f"{name}-latin1-toml", "F1", (*prefix, "l.toml", *extra),
                 {"l.toml": 'title = "caf\xe9"\n'.encode("latin-1")}, 2,
                 "not UTF-8 text: byte 0xE9 on line 1"),
        ]
    out.append(Case("predict-bom-is-fine", "F1", ("predict", "bom.toml"),
                    {"bom.toml": b"\xef\xbb\xbf" + scenario().encode()}, 0, ""))
    out.append(Case("fit-study-names-folder", "S7", ("fit", "study.toml"),
                    {**study_files(), "study.toml": 'levels = "."\ndoses = "doses.csv"\n'}, 2,
                    "'levels'"))
    out.append(Case("fit-study-missing-table", "S7", ("fit", "study.toml"),
                    {**study_files(), "study.toml": 'levels = "none.csv"\ndoses = "doses.csv"\n'},
                    2, "not found"))
    out.append(Case("fit-study-no-levels-key", "S7", ("fit", "study.toml"),
                    {**study_files(), "study.toml": 'doses = "doses.csv"\n'}, 2,
                    "must name this table"))
    return out


def study_cases() -> list[Case]:
    tables = [
        ("ragged", "S3", {"levels": LEVELS + "B,13,2.5,99\n"}, "more cells"),
        # a spreadsheet's regional CSV: semicolons or tabs between cells, decimal commas
        ("semicolons", "F1", {"levels": LEVELS.replace(",", ";")},
         "separated by semicolons, not commas"),
        ("tabs", "F1", {"doses": DOSES.replace(",", "\t")}, "separated by tabs, not commas"),
        ("decimal-comma", "S3", {"levels": LEVELS.replace("A,2,7.2", "A,2,7,2")},
         "a decimal comma, as in '0,5', splits a number in two"),
        ("duplicate-header", "S2", {"levels": LEVELS.replace(
            "concentration [mg/L]\n", "concentration [mg/L],time [h]\n", 1)
            .replace("\nA,1,8.1\n", "\nA,1,8.1,1\n")}, "appears twice"),
        ("latin1", "F1", {"levels": LEVELS.replace("subject", "sujet\xe9", 1)
                          .encode("latin-1")}, "not UTF-8"),
        ("no-unit", "S1", {"levels": LEVELS.replace("time [h]", "time")}, "declares no unit"),
        ("wrong-unit", "Q2", {"levels": LEVELS.replace("time [h]", "time [mg]")}, "dimension"),
        ("text-cell", "S4", {"levels": LEVELS.replace("A,2,7.2", "A,2,high")}, "text"),
        # a level before the first dose is a pre-dose level (a warning on stdout), not a
        # failure: tests/test_schema_study.py checks what becomes of it
        ("negative-time", "S6", {"levels": LEVELS.replace("A,1,8.1", "A,-1,8.1")}, "", 0),
        ("negative-level", "S4", {"levels": LEVELS.replace("A,2,7.2", "A,2,-7.2")},
         "negative concentration", 1),
        ("huge-level", "S4", {"levels": LEVELS.replace("A,2,7.2", "A,2,1e308")},
         "outside the range"),
        ("inf-level", "S4", {"levels": LEVELS.replace("A,2,7.2", "A,2,inf")}, "non-finite"),
        ("per-kg-no-weight", "S5", {"doses": DOSES.replace("amount [mg]", "amount [mg/kg]"),
                                    "subjects": "subject,height [cm]\nA,170\nB,180\n"
                                                "C,160\nD,190\n"}, "weight"),
        ("header-only", "S4", {"levels": "subject,time [h],concentration [mg/L]\n"},
         "no rows"),
        ("missing-column", "S1", {"doses": "subject,start [h]\nA,0\nB,0\n"}, "two of"),
    ]
    out = []
    for command in ("fit", "nca", "population"):
        for name, rule, change, phrase, *code in tables:
            files = study_files(**{k: v for k, v in change.items()})
            out.append(Case(f"{command}-{name}", rule, (command, "study.toml"), files,
                            code[0] if code else 2, phrase))
    return out


def batch_cases() -> list[Case]:
    rows = [
        ("ragged", "S3", BATCH + "5,8,30,1\n", 1, "the row has 4 cells, the header 3 (line 4)"),
        ("ragged-first-row", "S3", BATCH.replace("\n3,8,30\n", "\n3,8,30,9\n"), 2,
         "the first row has more cells"),
        ("semicolons", "F1", BATCH.replace(",", ";"), 2, "separated by semicolons"),
        ("duplicate-header", "S2", "clearance [L/h],half_life [h],rate [mg/h],rate [mg/h]\n"
         "3,8,30,30\n", 2, "appears twice"),
        ("latin1", "F1", ("clearance [L/h],half_life [h],rate [mg/h],note\n3,8,30,caf\xe9\n"
                          ).encode("latin-1"), 2, "not UTF-8"),
        ("header-only", "B4", "clearance [L/h],half_life [h],rate [mg/h]\n", 2, "no rows"),
        ("inf-cell", "B2", BATCH + "inf,8,30\n", 1, "outside the range"),
        ("e309-cell", "B2", BATCH + "1e309,8,30\n", 1, "outside the range"),
        ("400-digits", "B2", BATCH + "9" * 400 + ",8,30\n", 1, "outside the range"),
        ("tiny-cell", "B2", BATCH + "3,1e-200,30\n", 1, "outside the range"),
        ("text-cell", "B2", BATCH + "3,eight,30\n", 1, "holds text"),
        ("negative-cell", "B2", BATCH + "-3,8,30\n", 1, "must be > 0"),
    ]
    out = [Case(f"batch-{i}", r, ("batch", "b.csv", "--out", "o.csv"), {"b.csv": x}, c, p)
           for i, r, x, c, p in rows]
    opts = [
        ("chunk-rows-0", "B3", ("--chunk-rows", "0"), "--chunk-rows"),
        ("chunk-rows-negative", "B3", ("--chunk-rows", "-1"), "--chunk-rows"),
        ("chunk-rows-huge", "B3", ("--chunk-rows", "100000000"), "--chunk-rows"),
        ("population-0", "B3", ("--population", "0"), "--population"),
        ("population-1e9", "B3", ("--population", "1000000000"), "1,000,000"),
        ("seed-negative", "B3", ("--population", "10", "--seed", "-1"), "--seed"),
        ("correlation-2", "B3", ("--population", "10", "--correlation", "2"), "--correlation"),
        ("cv-text", "B3", ("--population", "10", "--cv-clearance", "lots"), "--cv-clearance"),
        ("cv-negative", "B3", ("--population", "10", "--cv-clearance", "-5%"),
         "--cv-clearance"),
        ("workers-0", "B5", ("--engine", "dask", "--workers", "0"), "--workers"),
        ("workers-local", "B5", ("--workers", "2"), "--engine dask"),
        ("scheduler-local", "B5", ("--scheduler", "tcp://127.0.0.1:9"),
         "only used by the dask engine"),
        ("timeout-0", "B5", ("--engine", "dask", "--timeout", "0"), "--timeout"),
        ("scheduler-unreachable", "B5", ("--engine", "dask", "--scheduler", "tcp://127.0.0.1:9",
                                         "--timeout", "2"), "cannot reach the Dask scheduler"),
        ("at-bare", "Q1", ("--at", "24"), "has no unit"),
        ("at-wrong-unit", "Q2", ("--at", "24 mg"), "dimension"),
    ]
    out += [Case(f"batch-option-{i}", r, ("batch", "b.csv", "--out", "o.csv", *a),
                 {"b.csv": BATCH}, 2, p) for i, r, a, p in opts]
    out += [
        Case("batch-output-is-input", "W3", ("batch", "b.csv", "--out", "b.csv"),
             {"b.csv": BATCH}, 2, "input"),
        Case("batch-output-xlsx", "B1", ("batch", "b.csv", "--out", "o.xlsx"),
             {"b.csv": BATCH}, 2, "unknown table format"),
        Case("batch-output-caution", "B1", ("batch", "b.csv", "--out", "CAUTION.txt"),
             {"b.csv": BATCH}, 2, "CAUTION.txt"),
        Case("batch-unknown-format", "F2", ("batch", "b.xlsx", "--out", "o.csv"),
             {"b.xlsx": "x"}, 2, "unknown table format"),
        Case("batch-parquet-garbage", "F2", ("batch", "b.parquet", "--out", "o.csv"),
             {"b.parquet": b"PAR1 not really"}, 2, "Parquet"),
        Case("batch-partitioned-toml", "B5", ("batch", "g.toml", "--out", "o.csv",
                                              "--partitioned"),
             {"g.toml": '[grid]\nclearance = ["3 L/h"]\nvolume = ["30 L"]\n'
                        'rate = ["10 mg/h"]\n'}, 2, "CSV or Parquet"),
        Case("batch-partitioned-over-folder", "B6", ("batch", "b.csv", "--out", "o.csv",
                                                     "--partitioned"),
             {"b.csv": BATCH, "o.csv/mine.txt": "keep"}, 2,
             "not a partitioned pkcalc output"),
        Case("batch-partitioned-over-file", "B6", ("batch", "b.csv", "--out", "o.csv",
                                                   "--partitioned"),
             {"b.csv": BATCH, "o.csv": "a file"}, 2, "is a file, not a folder"),
        Case("population-engine-no-bootstrap", "B5", ("population", "study.toml", "--engine",
                                                      "dask", "--method", "iterative"),
             study_files(), 2, "--bootstrap"),
        Case("population-workers-no-bootstrap", "B5", ("population", "study.toml", "--workers",
                                                       "2"), study_files(), 2, "--bootstrap"),
    ]
    return out


def output_cases() -> list[Case]:
    study = study_files()
    cmds = {
        "predict": (("predict", "s.toml"), {"s.toml": scenario()}),
        "design": (("design", "d.toml"), {"d.toml": DESIGN}),
        "fit": (("fit", "study.toml"), study),
        "nca": (("nca", "study.toml"), study),
        "population": (("population", "study.toml"), study),
        "verify": (("verify", "c.toml"), {"c.toml": CASES}),
    }
    out = []
    for name, (args, files) in cmds.items():
        inp = args[1]
        out += [
            Case(f"{name}-out-is-file", "W1", (*args, "--out", "afile"),
                 {**files, "afile": "x"}, 2, "is a file, not a folder"),
            Case(f"{name}-report-is-folder", "W1", (*args, "--report", "adir"), files, 2,
                 "is a folder, not a file", dirs=("adir",)),
            Case(f"{name}-report-is-input", "W3", (*args, "--report", inp), files, 2,
                 "input file"),
            Case(f"{name}-report-in-out", "W4", (*args, "--out", "o", "--report", "o/x.csv"),
                 files, 2, "where pkcalc writes its own"),
            Case(f"{name}-out-under-file", "W2", (*args, "--out", "afile/sub"),
                 {**files, "afile": "x"}, 2, "is a file, not a folder"),
        ]
    out += [
        Case("verify-junit-is-report", "W4", ("verify", "c.toml", "--junit", "x.html",
                                              "--report", "x.html"), {"c.toml": CASES}, 2,
             "one would replace the other"),
        Case("verify-junit-folder", "W1", ("verify", "c.toml", "--junit", "adir"),
             {"c.toml": CASES}, 2, "is a folder", dirs=("adir",)),
        Case("batch-report-is-out", "W4", ("batch", "b.csv", "--out", "r.csv", "--report",
                                           "r.csv"), {"b.csv": BATCH}, 2, "one would replace"),
        Case("batch-plots-is-file", "W1", ("batch", "b.csv", "--out", "r.csv", "--plots",
                                           "afile"), {"b.csv": BATCH, "afile": "x"}, 2,
             "is a file, not a folder"),
        Case("batch-out-is-folder", "W1", ("batch", "b.csv", "--out", "adir"),
             {"b.csv": BATCH}, 2, "is a folder", dirs=("adir",)),
        Case("demo-out-is-file", "W1", ("demo", "--out", "afile"), {"afile": "x"}, 2,
             "is a file, not a folder"),
        Case("demo-out-under-file", "W2", ("demo", "--out", "afile/x"), {"afile": "x"}, 2,
             "is a file, not a folder"),
        Case("predict-out-unwritable", "W2", ("predict", "s.toml", "--out", "/proc/pkcalc"),
             {"s.toml": scenario()}, 2, "cannot be written"),
        Case("predict-pdf-without-report", "W11", ("predict", "s.toml", "--pdf"),
             {"s.toml": scenario()}, 2, "--report"),
    ]
    return out


def design_cases() -> list[Case]:
    def d(extra: str, params: str = 'clearance = "4.2 L/h"\nhalf_life = "8 h"\n') -> str:
        return f'[[scenarios]]\nname = "d"\n{params}[scenarios.design]\n{extra}\n'
    rows = [
        ("unknown-method", "G1", d('method = "guess"\nplateau = "8 mg/L"'), "unknown method"),
        ("window-reversed", "G2", d('plateau = "8 mg/L"\nwindow = ["10 mg/L", "6 mg/L"]'),
         "not below high"),
        ("peak-limits-reversed", "G2", d('infusion_time = "1 h"\npeak = ["30 mg/L", '
                                         '"20 mg/L"]\ntrough_min = "5 mg/L"'), "not below"),
        ("trough-above-peak", "G2", d('infusion_time = "1 h"\npeak = "10 mg/L"\n'
                                      'trough = "20 mg/L"'), "not below the peak"),
        ("salt-factor", "G6", d('plateau = "8 mg/L"\nsalt_factor = 1.5'), "salt_factor"),
        ("loading-ratio", "G6", d('plateau = "8 mg/L"\nmax_loading_ratio = -1'),
         "max_loading_ratio"),
        ("auc-dimension", "G3", d('auc_24 = ["400 mg/L", "600 mg/L"]'), "design.auc_24"),
        ("auc-reversed", "G3", d('auc_24 = ["600 mg*h/L", "400 mg*h/L"]'), "AUC24 low"),
        ("auc-three", "G3", d('auc_24 = ["1 mg*h/L", "2 mg*h/L", "3 mg*h/L"]'),
         "value or [low, high]"),
        ("no-target", "G1", d(""), "needs a plateau"),
        ("no-clearance", "G1", d('plateau = "8 mg/L"', params='half_life = "8 h"\n'),
         "needs 'clearance'"),
        ("plateau-bare", "Q1", d("plateau = 8"), "has no unit"),
        ("rate-step-negative", "Q6", d('plateau = "8 mg/L"\nrate_step = "-1 mg/h"'),
         "greater than zero"),
        ("unknown-key", "F3", d('plateau = "8 mg/L"\nplatou = "8 mg/L"'), "unknown key"),
        ("start-without-history", "G4", d('plateau = "8 mg/L"\nstart = "5 h"'), "start"),
        ("map-no-prior", "G1", map_file().split("[scenarios.design.prior]")[0],
         "needs a prior"),
        ("map-no-doses", "G1", "\n".join(x for x in map_file().splitlines()
                                         if "start =" not in x and "rate =" not in x
                                         and not x.startswith("doses")), "needs the doses"),
        ("map-start-before-level", "G4", map_file(extra='start = "10 h"'), "design.start"),
        ("map-levels-order", "G4", map_file(t1="22 h", t2="6 h"), "not in time order"),
        ("map-level-before-dose", "G4", map_file(d0="8 h", d1="8.5 h", t2="24 h"),
         "initial_concentration"),
        ("sz-steady-state-false", "G5", d('method = "sawchuk_zaske"\ndose = "800 mg"\n'
                                          'infusion_time = "1 h"\ninterval = "8 h"\n'
                                          "steady_state = false\n"
                                          'peak_sample = { time = "1.5 h", concentration = '
                                          '"27 mg/L" }\ntrough_sample = { time = "-0.25 h", '
                                          'concentration = "9 mg/L" }\npeak = ["20 mg/L", '
                                          '"30 mg/L"]\ntrough = ["5 mg/L", "10 mg/L"]',
                                          params=""), "steady_state = false"),
        ("sz-during-infusion", "G5",
         '[[scenarios]]\nname = "d"\ndoses = [ { start = "0 h", amount = "800 mg", '
         'duration = "1 h", every = "8 h", count = 3 } ]\n[scenarios.design]\n'
         'method = "sawchuk_zaske"\ninfusion_time = "1 h"\n'
         'peak_sample = { time = "16.5 h", concentration = "20 mg/L" }\n'
         'trough_sample = { time = "15.75 h", concentration = "9 mg/L" }\n'
         'peak = ["20 mg/L", "30 mg/L"]\ntrough = ["5 mg/L", "10 mg/L"]\n',
         "during an infusion"),
        ("chiou-one-level", "G1", d('method = "chiou"\nrate = "30 mg/h"\nplateau = "8 mg/L"\n'
                                    'samples = [ { time = "4 h", concentration = "2 mg/L" } ]',
                                    params='volume = "48 L"\n'), "exactly two levels"),
        ("chiou-order", "G1", d('method = "chiou"\nrate = "30 mg/h"\nplateau = "8 mg/L"\n'
                                'samples = [ { time = "16 h", concentration = "4 mg/L" }, '
                                '{ time = "4 h", concentration = "2 mg/L" } ]',
                                params='volume = "48 L"\n'), "drawn after the first"),
        ("proportional-no-rate", "G1", d('method = "proportional"\nmeasured = "10 mg/L"\n'
                                         'plateau = "8 mg/L"', params='volume = "48 L"\n'),
         "current_rate"),
        ("no-design-table", "F3", scenario(), "no scenario has a [scenarios.design]"),
        ("attainment-level-above-1", "G9", map_file(extra="attainment_level = 1.5"),
         "attainment_level"),
        ("attainment-level-percent", "G9", map_file(extra='attainment_level = "150%"'),
         "attainment_level"),
        ("attainment-level-zero", "G9", map_file(extra="attainment_level = 0"),
         "attainment_level"),
        ("rank-unknown", "G9", map_file(extra='rank = "best"'), "unknown ranking"),
        ("attainment-without-map", "G9", d('plateau = "8 mg/L"\nattainment_level = 0.8'),
         "method 'map'"),
    ]
    out = [Case(f"design-{i}", r, ("design", "d.toml"), {"d.toml": x}, 2, p)
           for i, r, x, p in rows]
    flags = [
        ("both-file-and-flags", "G1", ("d.toml", "--plateau", "8 mg/L"), "not both"),
        ("nothing", "G1", (), "nothing to design"),
        ("flag-bare", "Q1", ("--clearance", "4", "--half-life", "8 h", "--plateau", "8 mg/L"),
         "has no unit"),
        ("flag-overflow", "Q3", ("--clearance", "1e308 L/h", "--half-life", "1e-308 h",
                                 "--plateau", "8 mg/L"), "outside the range"),
        ("flag-auc-three", "G3", ("--clearance", "4 L/h", "--volume", "40 L", "--auc-24",
                                  "1 mg*h/L", "2 mg*h/L", "3 mg*h/L"), "value or LOW HIGH"),
        ("flag-loading-ratio", "G6", ("--clearance", "4 L/h", "--volume", "40 L",
                                      "--plateau", "8 mg/L", "--max-loading-ratio", "-1"),
         "max_loading_ratio"),
    ]
    out += [Case(f"design-{i}", r, ("design", *a), {"d.toml": DESIGN}, 2, p)
            for i, r, a, p in flags]
    return out


def verify_cases() -> list[Case]:
    rows = [
        ("unknown-quantity", "V1", CASES.replace('"plateau_concentration"', '"plateau"'),
         "plateau"),
        ("value-dimension", "V1", CASES.replace('"10 mg/L"', '"10 mg"'), "dimension"),
        ("tolerance-bad", "V1", CASES.replace('"1%"', '"about right"'), "tolerance"),
        ("no-expect", "V1", CASES.split("[[cases.expect]]")[0], "expect"),
        ("param-dimension", "Q2", CASES.replace('half_life = "8 h"', 'half_life = "8 kg"'),
         "dimension"),
        ("no-cases", "F3", 'title = "x"\n', "no [[cases]]"),
    ]
    return [Case(f"verify-{i}", r, ("verify", "c.toml"), {"c.toml": x}, 2, p)
            for i, r, x, p in rows]


def option_cases() -> list[Case]:
    study = study_files()
    rows = [
        ("fit-starts-0", "F3", ("fit", "study.toml", "--starts", "0"), "starts"),
        ("fit-nca-threshold", "F3", ("fit", "study.toml", "--nca-threshold", "-5"), "positive"),
        ("fit-prior-missing", "F2", ("fit", "study.toml", "--prior", "none.toml"), "not found"),
        ("fit-no-tables", "S7", ("fit",), "levels"),
        ("population-bootstrap", "F3", ("population", "study.toml", "--bootstrap", "-1"),
         "bootstrap"),
        ("population-reference-weight", "Q2", ("population", "study.toml",
                                               "--reference-weight", "70 L"), "dimension"),
        ("nca-terminal-bad", "F3", ("nca", "study.toml", "--terminal", "A"), "terminal"),
        ("nca-interval-word", "N1", ("nca", "study.toml", "--interval", "middle"),
         "unknown interval"),
        ("nca-interval-zero", "N1", ("nca", "study.toml", "--interval", "0"), "unknown interval"),
        ("nca-tolerance-no-percent", "N1", ("nca", "study.toml", "--interval-tolerance",
                                            "10,1 h"), "not a percentage"),
        ("nca-tolerance-one-part", "N1", ("nca", "study.toml", "--interval-tolerance", "10%"),
         "a percentage and a time"),
        ("nca-tolerance-wrong-unit", "N1", ("nca", "study.toml", "--duration-tolerance",
                                            "10%,5 mg"), "dimension"),
        ("nca-tolerance-huge", "N1", ("nca", "study.toml", "--interval-tolerance",
                                      "150%,1 h"), "outside"),
        ("nca-pp-is-a-file", "N2", ("nca", "study.toml", "--pp", "levels.csv"), "--pp"),
        ("nca-pp-is-the-study-folder", "N2", ("nca", "--sdtm", ".", "--pp", "."),
         "input folder"),
    ]
    out = [Case(i, r, a, study, 2, p) for i, r, a, p in rows]
    pop = [  # population options: M1-M3 (a single model refused before any estimate)
        ("effect-no-on", "M1", ["--effect", "weight clearance"], "names a column"),
        ("effect-bad-word", "M1", ["--effect", "weight on clearance quickly"], "unknown word"),
        ("effect-fixed-text", "M1", ["--effect", "weight on clearance fixed big"],
         "'fixed' takes a number"),
        ("effect-no-parameter", "M1", ["--effect", "weight on kidneys"], "unknown word"),
        ("nodes-0", "M1", ["--nodes", "0"], "1 to 31"),
        ("nodes-big", "M1", ["--nodes", "40"], "1 to 31"),
        ("p-in-1", "M1", ["--stepwise", "weight on clearance", "--add-if-p-below", "1.5"],
         "probability"),
        ("effect-iterative", "M2", ["--method", "iterative", "--effect",
                                    "weight on clearance"], "marginal method"),
        ("models-one", "M2", ["--model", "only: weight on clearance"], "at least two models"),
        ("models-and-stepwise", "M2", ["--model", "a:", "--model", "b: weight on volume",
                                       "--stepwise", "weight on clearance"], "not both"),
        ("p-out-alone", "M2", ["--remove-if-p-above", "0.01"], "need --stepwise"),
        ("model-no-name", "M2", ["--model", "weight on clearance"], "NAME: EFFECTS"),
        ("column-missing", "M3", ["--effect", "height on clearance"], "no column 'height'"),
        ("column-constant", "M3", ["--effect", "site on clearance"], "same level"),
    ]
    sub = "subject,weight [kg],site\nA,70,x\nB,80,x\nC,65,x\nD,90,x\n"
    out += [Case(f"population-{i}", r, ("population", "study.toml", "--vpc-replicates", "0",
                                        *a), {**study, "subjects.csv": sub}, 2, p)
            for i, r, a, p in pop]
    for command in ("fit", "population"):  # the adequacy switch is true or false
        files = {**study, "study.toml": STUDY_TOML + f'\n[{command}]\nadequacy = "no"\n'}
        out.append(Case(f"{command}-adequacy-not-bool", "F3", (command, "study.toml"), files,
                        2, f"{command}.adequacy"))
    return out


def clock_and_sdtm_cases() -> list[Case]:
    levels = "subject,time [clock],concentration [mg/L]\nA,{t},5\nA,2026-03-04T14:00,3\n"
    doses = "subject,start [clock],amount [mg]\nA,2026-03-04T08:00,500\n"
    out = [Case(f"fit-clock-{i}", r, ("fit", "--levels", "l.csv", "--doses", "d.csv"),
                {"l.csv": levels.format(t=t), "d.csv": doses}, 2, p)
           for i, r, t, p in (("date-only", "K1", "2026-03-04", "without a time"),
                              ("time-only", "K1", "09:00", "without a date"),
                              ("slashes", "K1", "04/03/2026 09:00", "cannot be told apart"),
                              ("words", "K1", "Tuesday morning", "not an ISO 8601"))]
    out.append(Case("fit-clock-with-relative-doses", "K2",
                    ("fit", "--levels", "l.csv", "--doses", "d.csv"),
                    {"l.csv": levels.format(t="2026-03-04T09:00"),
                     "d.csv": "subject,start [h],amount [mg]\nA,0,500\n"}, 2,
                    "both use clock times"))
    out.append(Case("predict-clock-mixed", "K3", ("predict", "s.toml"),
                    {"s.toml": scenario(start='"2026-03-04T08:00"') + 'times = ["1 h"]\n'}, 2,
                    "mix clock times"))
    pc = ("USUBJID,PCTESTCD,PCSTRESN,PCSTRESU,PCSTRESC,PCLLOQ,PCSTAT,PCDTC\n"
          "S1,DRG,5,mg/L,5,0.1,,2026-03-04T09:00\nS1,DRG,3,mg/L,3,0.1,,2026-03-04T14:00\n")
    ex = ("USUBJID,EXDOSE,EXDOSU,EXROUTE,EXSTDTC,EXENDTC\n"
          "S1,500,mg,INTRAVENOUS,2026-03-04T08:00,2026-03-04T08:00\n")
    cases = [
        ("no-pc", "X1", {"sd/ex.csv": ex}, "no PC dataset"),
        ("pc-variable", "X1", {"sd/pc.csv": pc.replace("PCDTC", "PCDATE"), "sd/ex.csv": ex},
         "PCDTC"),
        ("damaged-xpt", "X1", {"sd/pc.xpt": b"garbage", "sd/ex.csv": ex}, "SAS transport"),
        ("two-analytes", "X2", {"sd/pc.csv": pc + "S1,OTHER,1,mg/L,1,0.1,,2026-03-04T10:00\n",
                                "sd/ex.csv": ex}, "several analytes"),
    ]
    out += [Case(f"nca-sdtm-{i}", r, ("nca", "--sdtm", "sd"), f, 2, p) for i, r, f, p in cases]
    out.append(Case("nca-sdtm-analyte-unknown", "X2", ("nca", "--sdtm", "sd", "--analyte", "X"),
                    {"sd/pc.csv": pc, "sd/ex.csv": ex}, 2, "unknown analyte"))
    out.append(Case("fit-sdtm-oral", "X5", ("fit", "--sdtm", "sd"),
                    {"sd/pc.csv": pc, "sd/ex.csv": ex.replace("INTRAVENOUS", "ORAL")}, 2,
                    "not intravenous"))
    out.append(Case("fit-sdtm-unit", "X4", ("fit", "--sdtm", "sd"),
                    {"sd/pc.csv": pc.replace("mg/L", "furlongs"), "sd/ex.csv": ex}, 2,
                    "furlongs"))
    out.append(Case("fit-sdtm-per-kg-no-weight", "X6", ("fit", "--sdtm", "sd"),
                    {"sd/pc.csv": pc, "sd/ex.csv": ex.replace(",mg,", ",mg/kg,")}, 2,
                    "body weight"))
    out.append(Case("fit-sdtm-not-a-folder", "X1", ("fit", "--sdtm", "sd.csv"),
                    {"sd.csv": "x"}, 2, "is not a folder"))
    return out


SAMPLING_TABLE = """
[scenarios.sampling]
levels = 2
window = ["1 h", "24 h"]
error = { proportional = "10%" }
"""
CLOCK_DOSES = 'doses = [ { start = "2026-03-02T20:00", amount = "300 mg", duration = "1 h" } ]'


def sampling_cases() -> list[Case]:
    def file(table: str = SAMPLING_TABLE, doses: str | None = None) -> str:
        return scenario_lines(table, doses=doses)

    def swap(old: str, new: str) -> str:
        assert old in SAMPLING_TABLE
        return SAMPLING_TABLE.replace(old, new)

    rows = [
        ("unknown-key", "P1", file(SAMPLING_TABLE + "colour = 'red'\n"), "unknown key"),
        ("levels-0", "P1", file(swap("levels = 2", "levels = 0")), "1 to 24"),
        ("levels-text", "P1", file(swap("levels = 2", "levels = 'two'")), "1 to 24"),
        ("no-error", "P1", file(swap('error = { proportional = "10%" }\n', "")), "error"),
        ("error-zero", "P1", file(swap('proportional = "10%"', 'proportional = "0%"')),
         "residual error"),
        ("design-bad", "P1", file(SAMPLING_TABLE + "design = 'clever'\n"), "not a design"),
        ("criterion-bad", "P1", file(SAMPLING_TABLE + "criterion = 'E'\n"), "criterion"),
        ("cv-one", "P2", file(SAMPLING_TABLE + "cv_clearance = '30%'\n"), "both clearance"),
        ("cv-and-sd", "P2", file(SAMPLING_TABLE + "cv_clearance = '30%'\nsd_log_clearance = "
                                                  "0.3\ncv_volume = '20%'\n"), "one of"),
        ("population-zero-cv", "P2", file(SAMPLING_TABLE + "design = 'population'\n"
                                          "subjects = 20\n"), "variability above zero"),
        ("population-cv-0", "P2", file(SAMPLING_TABLE + "cv_clearance = '0%'\ncv_volume = "
                                       "'0%'\nsubjects = 20\n"), "variability above zero"),
        ("individual-with-cv", "P2", file(SAMPLING_TABLE + "design = 'individual'\n"
                                          "cv_clearance = '30%'\ncv_volume = '20%'\n"),
         "takes no variability"),
        ("window-reversed", "P3", file(swap('["1 h", "24 h"]', '["24 h", "1 h"]')),
         "not before the latest"),
        ("window-horizon", "P3", file(swap('["1 h", "24 h"]', '["1 h", "2000 h"]')),
         "after the horizon"),
        ("window-bare", "P3", file(swap('["1 h", "24 h"]', '[1, 24]')), "has no unit"),
        ("window-clock-relative", "P3", file(doses=CLOCK_DOSES), "relative time"),
        ("candidate-outside", "P3", file(SAMPLING_TABLE + "candidates = ['2 h', '30 h']\n"),
         "outside the window"),
        ("compare-outside", "P3", file(SAMPLING_TABLE + "compare = [['2 h', '30 h']]\n"),
         "outside the window"),
        ("daytime-relative", "P3", file(SAMPLING_TABLE + "daytime = ['06:00', '22:00']\n"),
         "on the clock"),
        ("daytime-bad", "P3", file('\n[scenarios.sampling]\nlevels = 2\nwindow = '
                                   '["2026-03-03T06:00", "2026-03-03T20:00"]\nerror = '
                                   '{ proportional = "10%" }\ndaytime = ["6", "22:00"]\n',
                                   doses=CLOCK_DOSES), "hour of the day"),
        ("candidates-too-few", "P4", file(SAMPLING_TABLE + "candidates = ['2 h']\n"),
         "1 candidate time"),
        ("candidates-in-infusion", "P4",
         file(SAMPLING_TABLE.replace('"1 h"', '"0 h"') + "avoid_infusion = true\n"
              "candidates = ['0.5 h', '0.7 h', '2 h']\n"), "1 candidate time"),
        ("spacing-too-wide", "P4", file(SAMPLING_TABLE + "min_spacing = '30 h'\n"),
         "hold only 1"),
        ("population-no-subjects", "P5", file(SAMPLING_TABLE + "design = 'population'\n"
                                              "cv_clearance = '30%'\ncv_volume = '20%'\n"),
         "number of subjects"),
        ("population-one-level", "P5", file(swap("levels = 2", "levels = 1")
                                            + "cv_clearance = '30%'\ncv_volume = '20%'\n"
                                            "subjects = 40\n"), "singular"),
        ("compare-length", "P5", file(SAMPLING_TABLE + "compare = [['2 h']]\n"),
         "gives 1 times for 2 levels"),
        ("groups-individual", "P5", file(SAMPLING_TABLE + "groups = [{ subjects = 3 }]\n"),
         "population design"),
    ]
    out = [Case(f"sampling-{i}", r, ("sampling", "s.toml"), {"s.toml": x}, 2, p)
           for i, r, x, p in rows]
    good = {"s.toml": file()}
    opts = [
        ("simulate-negative", "P6", ("--simulate", "-1"), "--simulate"),
        ("simulate-huge", "P6", ("--simulate", "1000000"), "100,000"),
        ("engine-no-simulate", "P6", ("--engine", "dask"), "--simulate"),
        ("workers-no-simulate", "P6", ("--workers", "2"), "--simulate"),
        ("starts-0", "P6", ("--starts", "0"), "--starts"),
        ("seed-negative", "P6", ("--seed", "-3"), "--seed"),
    ]
    out += [Case(f"sampling-option-{i}", r, ("sampling", "s.toml", *a), good, 2, p)
            for i, r, a, p in opts]
    out.append(Case("sampling-no-table", "P1", ("sampling", "s.toml"),
                    {"s.toml": scenario_lines()}, 2, "no scenario has a [scenarios.sampling]"))
    return out

def round3_cases() -> list[Case]:
    """The newer surfaces tried as a hostile user would (clock times, engines, effects,
    design histories, sampling zones, outputs)."""
    study = study_files()
    one = LEVELS.replace("A,2,7.2\nA,4,5.6\nA,8,3.4\nA,12,2.1\n", "")
    zero = LEVELS.replace("A,1,8.1\nA,2,7.2\nA,4,5.6\nA,8,3.4\nA,12,2.1\n",
                          "A,1,0\nA,2,0\nA,4,0\nA,8,0\nA,12,0\n")
    sub = "subject,weight [kg],site\nA,70,x\nB,80,y\nC,65,x\nD,90,y\n"
    many = "subject,ward\n" + "".join(f"S{i},w{i // 2}\n" for i in range(44))
    many_levels = "subject,time [h],concentration [mg/L]\n" + "".join(
        f"S{i},{t},{8 * 0.9 ** t:.3f}\n" for i in range(44) for t in (1, 4, 8))
    many_doses = "subject,start [h],amount [mg]\n" + "".join(f"S{i},0,500\n" for i in range(44))
    toml_fails = scenario(clearance='"3 mg"')
    history = "doses = [\n" + "".join(
        f'  {{ start = "{i * 12} h", amount = "100 mg", duration = "1 h" }},\n'
        for i in range(5001)) + "]\n"
    sampling = scenario_lines(SAMPLING_TABLE + "groups = [" + ", ".join(
        "{ subjects = 2 }" for _ in range(21)) + "]\ndesign = 'population'\n"
        "cv_clearance = '30%'\ncv_volume = '20%'\n")
    dst = ('\n[scenarios.sampling]\nlevels = 2\nwindow = ["2026-03-28T22:00+01:00", '
           '"2026-03-29T20:00+02:00"]\nerror = { proportional = "10%" }\n'
           'daytime = ["06:00", "22:00"]\n')
    dst_doses = ('doses = [ { start = "2026-03-28T20:00+01:00", amount = "300 mg", '
                 'duration = "1 h" } ]')
    rows = [
        ("batch-toml-every-scenario-fails", "Q2", ("batch", "s.toml", "--out", "o.csv"),
         {"s.toml": toml_fails}, 2, "dimension"),
        ("batch-out-txt", "B1", ("batch", "b.csv", "--out", "o.txt"), {"b.csv": BATCH}, 2,
         ".csv or .parquet"),
        ("batch-empty-line", "B4", ("batch", "b.csv", "--out", "o.csv"),
         {"b.csv": BATCH.replace("\n4,6,40", "\n\n4,6,40")}, 1, "empty"),
        ("batch-report-caution", "W8", ("batch", "b.csv", "--out", "o.csv", "--report",
                                        "CAUTION.txt"), {"b.csv": BATCH}, 2, "CAUTION.txt"),
        ("batch-timeout-inf", "B5", ("batch", "b.csv", "--out", "o.csv", "--engine", "dask",
                                     "--timeout", "inf"), {"b.csv": BATCH}, 2, "--timeout"),
        ("batch-timeout-huge", "B5", ("batch", "b.csv", "--out", "o.csv", "--engine", "dask",
                                      "--timeout", "1e308"), {"b.csv": BATCH}, 2, "3600"),
        ("batch-scheduler-empty", "B5", ("batch", "b.csv", "--out", "o.csv", "--engine",
                                         "dask", "--scheduler", ""), {"b.csv": BATCH}, 2,
         "--scheduler"),
        ("batch-workers-256", "W10", ("batch", "b.csv", "--out", "o.csv", "--engine", "dask",
                                      "--workers", "256"), {"b.csv": BATCH}, 2, "--workers"),
        ("nca-one-sample", "N3", ("nca", "study.toml"), study_files(levels=one), 1, "'A'"),
        ("nca-all-zero", "N3", ("nca", "study.toml"), study_files(levels=zero), 1, "'A'"),
        ("nca-terminal-unknown-subject", "N4", ("nca", "study.toml", "--terminal",
                                                "Z=4 h,8 h,12 h"), study, 2, "'Z'"),
        ("nca-terminal-unsampled", "N4", ("nca", "study.toml", "--terminal",
                                          "A=4 h,9 h,12 h"), study, 2, "no level at 9"),
        ("fit-report-is-levels", "W3", ("fit", "study.toml", "--report", "levels.csv"),
         study, 2, "input"),
        ("fit-out-holds-input", "W3", ("fit", "study.toml", "--out", "."),
         {**study, "fit.csv": LEVELS,
          "study.toml": 'levels = "fit.csv"\ndoses = "doses.csv"\n'}, 2, "fit.csv"),
        ("population-two-stage-bootstrap", "M2", ("population", "study.toml", "--method",
                                                  "two-stage", "--bootstrap", "3",
                                                  "--vpc-replicates", "0"), study, 0, ""),
        ("population-effect-fixed-huge", "M1", ("population", "study.toml", "--effect",
                                                "weight on clearance fixed 1e300"),
         {**study, "subjects.csv": sub}, 2, "10"),
        ("population-effect-word", "M1", ("population", "study.toml", "--effect",
                                          "weight on clearance --effect"),
         {**study, "subjects.csv": sub}, 2, "--effect"),
        ("population-model-duplicate", "M2", ("population", "study.toml", "--model",
                                              "a: weight on clearance", "--model",
                                              "a: weight on volume"),
         {**study, "subjects.csv": sub}, 2, "'a'"),
        ("population-categorical-21", "M4", ("population", "study.toml", "--effect",
                                             "ward on clearance"),
         {"levels.csv": many_levels, "doses.csv": many_doses, "subjects.csv": many,
          "study.toml": STUDY_TOML}, 2, "at most 20"),
        ("fit-prior-cv-30", "Q7", ("fit", "study.toml", "--prior", "p.toml"),
         {**study, "p.toml": '[prior]\nclearance = "3 L/h"\nvolume = "40 L"\ncv_clearance = 30\n'
                             'cv_volume = "20%"\n'}, 2, "3000"),
        ("fit-prior-cv-1e300", "Q7", ("fit", "study.toml", "--prior", "p.toml"),
         {**study, "p.toml": '[prior]\nclearance = "3 L/h"\nvolume = "40 L"\ncv_clearance = '
                             '"1e300%"\ncv_volume = "20%"\n'}, 2, "1000"),
        ("design-salt-tiny", "G6", ("design", "d.toml"),
         {"d.toml": DESIGN + "salt_factor = 1e-300\n"}, 2, "salt_factor"),
        ("design-history-5001", "D4", ("design", "d.toml"),
         {"d.toml": map_file().replace(map_file().split("doses = ")[1].split("[scenarios")[0],
                                       history.split("doses = ")[1])}, 2, "5000"),
        ("sampling-21-groups", "P7", ("sampling", "s.toml"), {"s.toml": sampling}, 2, "20"),
        ("sampling-dst-without-zone", "P3", ("sampling", "s.toml"),
         {"s.toml": scenario_lines(dst, doses=dst_doses)}, 2, "timezone"),
        ("sampling-unknown-zone", "P7", ("sampling", "s.toml"),
         {"s.toml": scenario_lines(dst + "timezone = 'Mars/Olympus'\n", doses=dst_doses)},
         2, "Mars/Olympus"),
    ]
    return [Case(i, r, a, f, c, p) for i, r, a, f, c, p in rows]

ATTAINMENT = """[attainment]
doses = ["500 mg", "1 g"]
intervals = ["12 h"]
infusion_time = "1 h"
auc_24 = ["300 mg*h/L", "600 mg*h/L"]
{extra}
[attainment.prior]
clearance = "4 L/h"
volume = "45 L"
cv_clearance = "30%"
cv_volume = "20%"
error = {{ proportional = "10%" }}
"""


def attainment_cases() -> list[Case]:
    def a(extra: str = "", drop: str = "") -> str:
        text = ATTAINMENT.format(extra=extra)
        return text.replace(drop, "") if drop else text

    patients = "crcl [mL/min],weight [kg]\n40,60\n80,70\n"
    rows = [
        ("no-source", "A1", a().split("[attainment.prior]")[0],
         "say where the patients come from"),
        ("study-and-prior", "A1", a('study = "s.toml"'), "not both"),
        ("doses-without-intervals", "A2", a(drop='intervals = ["12 h"]\n'),
         "doses and intervals"),
        ("rates-and-doses", "A2", a('rates = ["20 mg/h"]'), "not both"),
        ("infusion-longer", "A2", a().replace('"1 h"', '"13 h"', 1), "longer than an interval"),
        ("no-target", "A3", a(drop='auc_24 = ["300 mg*h/L", "600 mg*h/L"]\n'),
         "at least one target"),
        ("peak-reversed", "A3", a('peak = ["40 mg/L", "20 mg/L"]'), "above high"),
        ("level-above-1", "A3", a("attainment_level = 2"), "attainment_level"),
        ("patients-0", "A3", a("patients = 0"), "patients"),
        ("unknown-key", "A3", a("patience = 3"), "unknown key"),
        ("bands-no-subjects", "A4", a('bands = { column = "crcl", edges = [60] }'),
         "subjects table"),
        ("bands-decreasing", "A4", a('subjects = "p.csv"\nbands = { column = "crcl", '
                                     'edges = [60, 30] }'), "increase"),
    ]
    out = [Case(f"attainment-{i}", r, ("attainment", "a.toml"), {"a.toml": x, "p.csv": patients},
                2, p) for i, r, x, p in rows]
    out.append(Case("attainment-band-column-missing", "A4", ("attainment", "a.toml"),
                    {"a.toml": a('subjects = "p.csv"\nbands = { column = "age", edges = [60] }'),
                     "p.csv": patients}, 2, "no column 'age'"))
    out.append(Case("attainment-patients-option", "A3", ("attainment", "a.toml", "--patients",
                                                         "0"), {"a.toml": a()}, 2, "--patients"))
    out.append(Case("attainment-out-is-input", "W3", ("attainment", "a.toml", "--out", "o"),
                    {"a.toml": a('subjects = "o/attainment.csv"'),
                     "o/attainment.csv": patients}, 2, "attainment.csv"))
    return out


CORPUS = (quantity_cases() + dose_and_time_cases() + parameter_cases() + file_cases()
          + study_cases() + batch_cases() + output_cases() + design_cases() + verify_cases()
          + option_cases() + clock_and_sdtm_cases() + sampling_cases() + round3_cases()
          + attainment_cases())


def test_the_corpus_is_large_and_cites_its_rules():
    rules = (Path(__file__).resolve().parents[1] / "docs" / "formats.md").read_text("utf-8")
    assert len(CORPUS) >= 200
    assert len({c.id for c in CORPUS}) == len(CORPUS)
    for c in CORPUS:
        assert f"**{c.rule}**" in rules, f"{c.id}: rule {c.rule} is not in docs/formats.md"
    commands = {c.args[0] for c in CORPUS}
    assert commands >= {"predict", "design", "fit", "nca", "population", "batch", "verify",
                        "demo", "sampling", "attainment"}


def _digest(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.mark.parametrize("case", CORPUS, ids=[c.id for c in CORPUS])
def test_bad_input(case: Case, tmp_path, monkeypatch, capsys):
    for name, content in case.files.items():
        path = tmp_path / name
        path.parent.mkdir(parents=True, exist_ok=True)
        if isinstance(content, bytes):
            path.write_bytes(content)
        else:
            path.write_text(content, encoding="utf-8")
    for d in case.dirs:
        (tmp_path / d).mkdir()
    monkeypatch.chdir(tmp_path)
    before = _digest(tmp_path)
    try:
        code = main(list(case.args))
    except SystemExit as exc:  # argparse
        code = int(exc.code or 0)
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    assert code == case.code, f"[{case.rule}] exit {code}\nstderr: {err}\nstdout: {out[-500:]}"
    assert case.phrase.lower() in err.lower(), f"[{case.rule}] stderr: {err}"
    after = _digest(tmp_path)
    for name, digest in before.items():  # inputs are never changed
        assert after.get(name) == digest, f"{name} changed"
    if code == 2:  # a refusal writes nothing
        assert set(after) == set(before), f"written: {set(after) - set(before)}"
