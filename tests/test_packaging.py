"""Every sub-package is listed for installation (a plain `pip install .` must work)."""

from __future__ import annotations

import tomllib

from .conftest import REPO


def test_all_subpackages_are_declared():
    config = tomllib.loads((REPO / "pyproject.toml").read_text())
    declared = set(config["tool"]["setuptools"]["packages"])
    found = {".".join(p.parent.relative_to(REPO).parts)
             for p in (REPO / "pkcalc").rglob("*/__init__.py")}
    assert found | {"pkcalc", "pkcalc.scenarios"} <= declared
