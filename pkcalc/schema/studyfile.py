"""The study TOML: it names the CSV tables (or an SDTM folder) and holds option tables."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from ..core import Study
from ..errors import PkcalcInputError, Problem
from .base import read_toml
from .sdtm import load_sdtm
from .study import load_study

__all__ = ["load_study_file"]


def _study_tables(data: dict[str, Any], base: Path, path: str | Path) -> Study:
    """The study of a study file that names its CSV tables."""
    missing = [k for k in ("levels", "doses") if not isinstance(data.get(k), str)]
    if missing:
        raise PkcalcInputError([Problem("the study file must name this table", file=str(path),
                                        field=k, expected="a path such as 'levels.csv' (or "
                                        "sdtm = 'folder')")
                                for k in missing])
    from ..tables import check_input_file

    problems = []
    for key in ("levels", "doses", "subjects"):
        if isinstance(data.get(key), str):
            try:
                check_input_file(base / data[key])
            except PkcalcInputError as exc:
                problems += [Problem(f"'{data[key]}' {p.message}", file=str(path), field=key,
                                     expected=p.expected) for p in exc.problems]
    if problems:
        raise PkcalcInputError(problems)
    return load_study(base / data["levels"], base / data["doses"],
                      base / data["subjects"] if isinstance(data.get("subjects"), str) else None)


def load_study_file(path: str | Path, *, extra_sections: tuple[str, ...] = ()) -> Study:
    """A study TOML: ``levels``, ``doses``, optional ``subjects`` (paths relative to the
    TOML file), optional ``title`` and option tables ``[fit]``, ``[nca]``,
    ``[population]``."""
    data = read_toml(path)
    base = Path(path).parent
    allowed = {"title", "levels", "doses", "subjects", "output", "fit", "nca", "population",
               "sdtm", "analyte", *extra_sections}
    unknown = sorted(set(data) - allowed)
    if unknown:
        raise PkcalcInputError([Problem("unknown key", file=str(path), field=k,
                                        expected=", ".join(sorted(allowed))) for k in unknown])
    if isinstance(data.get("sdtm"), str):
        if any(k in data for k in ("levels", "doses", "subjects")):
            raise PkcalcInputError("give sdtm or the tables (levels, doses), not both",
                                   file=str(path), field="sdtm")
        study = load_sdtm(base / data["sdtm"], data.get("analyte"))
    else:
        study = _study_tables(data, base, path)
    study.options = {k: data[k] for k in ("fit", "nca", "population") if k in data}
    study.title = data.get("title") if isinstance(data.get("title"), str) else None
    study.output = data.get("output", {}) if isinstance(data.get("output"), dict) else {}
    study.files = [str(path), *study.files]
    return study
