"""The committed invented demo tables are exactly what their generator produces."""

from __future__ import annotations

import importlib.util

from .conftest import SCENARIOS


def test_demo_tables_match_the_generator():
    spec = importlib.util.spec_from_file_location("gen", SCENARIOS / "generate_demo_study.py")
    gen = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(gen)
    for name, text in gen.all_files().items():
        assert (SCENARIOS / name).read_text(encoding="utf-8") == text, name
