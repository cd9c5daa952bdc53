"""The README's Quick start stays true: two commands, the test one run verbatim by CI."""

from __future__ import annotations

import re

from .conftest import REPO


def quick_start_commands() -> list[str]:
    text = (REPO / "README.md").read_text(encoding="utf-8")
    section = text.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    blocks = re.findall(r"```(?:bash|sh)?\n(.*?)```", section, flags=re.S)
    return [line.strip() for b in blocks for line in b.splitlines()
            if line.strip() and not line.strip().startswith("#")]


def test_quick_start_has_exactly_two_commands():
    cmds = quick_start_commands()
    assert len(cmds) == 2, cmds
    assert "pkcalc demo" in cmds[0]
    assert "pytest" in cmds[1]


def test_ci_runs_the_readme_test_command_verbatim():
    test_cmd = quick_start_commands()[1]
    ci_lines = [line.strip() for line in (REPO / ".ci" / "run").read_text().splitlines()]
    assert test_cmd in ci_lines


def test_readme_opens_with_the_job():
    first_para = (REPO / "README.md").read_text(encoding="utf-8").split("\n\n")[1]
    assert "infusion" in first_para and "clearance" in first_para
