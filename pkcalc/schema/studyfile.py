"""The study TOML: it names the CSV tables (or an SDTM folder) and holds option tables."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from ..core import Study
from ..errors import PkcalcInputError, Problem
from .base import read_toml
from .sdtm import load_sdtm
from .study import load_study

__all__ = ["IMPORT_KEYS", "SDTM_KEYS", "import_options", "load_study_file"]

#: Study-file keys (and command-line options) that choose what an SDTM import reads.
SDTM_KEYS = ("analyte", "specimen", "treatment", "times", "infusion_duration", "strict")
#: Keys that apply to any study.
IMPORT_KEYS = (*SDTM_KEYS, "pre_dose")


def import_options(raw: dict[str, Any], file: str | None = None) -> dict[str, Any]:
    """The import choices, checked: text for analyte/specimen/treatment, ``times``
    actual or nominal, ``infusion_duration`` a time ('1 h'), ``pre_dose`` omit or
    drug_on_board, ``strict`` true or false."""
    from ..units import to_canonical

    out: dict[str, Any] = {}
    problems = []
    for key, value in raw.items():
        if key in ("analyte", "specimen", "treatment"):
            if not isinstance(value, str) or not value.strip():
                problems.append(Problem("must be text", file=file, field=key))
            out[key] = value
        elif key == "times" and value not in ("actual", "nominal"):
            problems.append(Problem(f"unknown time basis {value!r}", file=file, field=key,
                                    expected="actual or nominal"))
        elif key == "pre_dose" and value not in ("omit", "drug_on_board"):
            problems.append(Problem(f"unknown rule {value!r}", file=file, field=key,
                                    expected="omit or drug_on_board"))
        elif key == "strict" and not isinstance(value, bool):
            problems.append(Problem("must be true or false", file=file, field=key))
        elif key == "infusion_duration":
            try:
                out[key] = to_canonical(value, "time", field=key)
            except PkcalcInputError as exc:
                problems += [Problem(p.message, file=file, field=key, expected=p.expected)
                             for p in exc.problems]
            continue
        out[key] = value
    if problems:
        raise PkcalcInputError(problems)
    return out


def _study_tables(data: dict[str, Any], base: Path, path: str | Path,
                  pre_dose: str = "omit") -> Study:
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
                      base / data["subjects"] if isinstance(data.get("subjects"), str) else None,
                      pre_dose=pre_dose)


def load_study_file(path: str | Path, *, extra_sections: tuple[str, ...] = (),
                    overrides: dict[str, Any] | None = None) -> Study:
    """A study TOML: ``levels``, ``doses``, optional ``subjects`` (paths relative to the
    TOML file) -- or ``sdtm`` (a folder) with the SDTM choices (:data:`SDTM_KEYS`) --,
    ``pre_dose``, optional ``title`` and option tables ``[fit]``, ``[nca]``,
    ``[population]``; ``overrides`` (the command line's choices) win over the file's."""
    data = read_toml(path)
    base = Path(path).parent
    allowed = {"title", "levels", "doses", "subjects", "output", "fit", "nca", "population",
               "sdtm", *IMPORT_KEYS, *extra_sections}
    unknown = sorted(set(data) - allowed)
    if unknown:
        raise PkcalcInputError([Problem("unknown key", file=str(path), field=k,
                                        expected=", ".join(sorted(allowed))) for k in unknown])
    chosen = import_options({k: data[k] for k in IMPORT_KEYS if k in data}, str(path))
    chosen.update(import_options(overrides or {}, "the command line"))
    if isinstance(data.get("sdtm"), str):
        if any(k in data for k in ("levels", "doses", "subjects")):
            raise PkcalcInputError("give sdtm or the tables (levels, doses), not both",
                                   file=str(path), field="sdtm")
        study = load_sdtm(base / data["sdtm"], **chosen)
    else:
        wrong = sorted(set(chosen) & set(SDTM_KEYS))
        if wrong:
            raise PkcalcInputError("goes with sdtm = 'folder'", file=str(path),
                                   field=wrong[0], expected="levels and doses tables without "
                                   "SDTM choices")
        study = _study_tables(data, base, path, chosen.get("pre_dose", "omit"))
    study.options = {k: data[k] for k in ("fit", "nca", "population") if k in data}
    study.title = data.get("title") if isinstance(data.get("title"), str) else None
    study.output = data.get("output", {}) if isinstance(data.get("output"), dict) else {}
    study.files = [str(path), *study.files]
    return study
