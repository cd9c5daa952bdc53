"""Shared fixtures: writing small input files and running the CLI in-process."""

from __future__ import annotations

import json
import textwrap
from dataclasses import dataclass
from pathlib import Path

import pytest

from pkcalc.cli import main

REPO = Path(__file__).resolve().parents[1]
SCENARIOS = REPO / "scenarios"


@dataclass
class CliResult:
    code: int
    out: str
    err: str

    def json(self):
        return json.loads(self.out)


@pytest.fixture
def run_cli(capsys):
    """Run ``pkcalc ARGS`` in-process; return exit code, stdout and stderr."""

    def run(*args: str) -> CliResult:
        try:
            code = main([str(a) for a in args])
        except SystemExit as exc:  # argparse usage errors
            code = int(exc.code or 0)
        captured = capsys.readouterr()
        return CliResult(code, captured.out, captured.err)

    return run


@pytest.fixture
def write(tmp_path):
    """Write dedented text to a file under tmp_path and return its path."""

    def _write(name: str, text: str) -> Path:
        path = tmp_path / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(textwrap.dedent(text).lstrip(), encoding="utf-8")
        return path

    return _write


#: An invented MAP design scenario (the demo's veltaramide history); fill d0, d1 (dose
#: starts), t1, t2 (level times) and extra (more design keys).
MAP_SCENARIO = """[[scenarios]]
name = "m"
doses = [ {{ start = "{d0}", amount = "400 mg", duration = "30 min" }},
          {{ start = "{d1}", rate = "35 mg/h", duration = "23.5 h" }} ]
[scenarios.design]
method = "map"
levels = [ {{ time = "{t1}", concentration = "7.1 mg/L" }},
           {{ time = "{t2}", concentration = "6.2 mg/L" }} ]
{extra}
[scenarios.design.prior]
clearance = "4.2 L/h"
volume = "48 L"
cv_clearance = "35%"
cv_volume = "25%"
error = {{ proportional = "10%", additive = "0.2 mg/L" }}
"""


def map_scenario(d0="0 h", d1="0.5 h", t1="6 h", t2="22 h", extra='plateau = "8 mg/L"'):
    return MAP_SCENARIO.format(d0=d0, d1=d1, t1=t1, t2=t2, extra=extra)


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory):
    """``pkcalc demo --out DIR`` run once for the whole session (it takes half a minute):
    the folder, the exit code and what it printed."""
    import contextlib
    import io
    from types import SimpleNamespace

    out = tmp_path_factory.mktemp("demo") / "demo"
    text = io.StringIO()
    with contextlib.redirect_stdout(text):
        code = main(["demo", "--out", str(out)])
    return SimpleNamespace(folder=out, code=code, out=text.getvalue())
