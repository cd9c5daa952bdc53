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
