"""Option merging, in one place: a study file's ``[fit]``, ``[nca]`` and
``[population]`` tables with values given on the command line (or in Python).

Values given explicitly win over the study file's; a path in the study file (a
prior) is relative to the study file's folder, a path given explicitly to the
working directory.  The results are the validated core option types.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path
from typing import Any

from ..core import FitOptions, NcaOptions, PopulationOptions, Study
from ..errors import PkcalcInputError
from .fitopts import fit_options, population_options
from .study import nca_options

__all__ = ["study_fit_options", "study_nca_options", "study_population_options"]


#: The command-line option of each key (for messages about values given there).
CLI_NAMES = {"effects": "--effect", "models": "--model", "stepwise": "--stepwise",
             "terminal_points": "--terminal", "blq": "--blq", "prior": "--prior",
             "slope_tolerance": "--slope-tolerance"}


def _given_here(table: str, overrides: dict[str, Any], labels: dict[str, str] | None):
    """Relabel the problems of values given explicitly: the option (or keyword) that gave
    them, not the study file's table (see the module docstring)."""
    def relabel(exc: PkcalcInputError) -> PkcalcInputError:
        out = []
        for p in exc.problems:
            field = p.field or ""
            key = field.split(".")[1] if field.startswith(table + ".") else None
            if key in overrides:
                name = (labels or {}).get(key, key if labels is None else
                                          "--" + key.replace("_", "-"))
                out.append(replace(p, file=None,
                                   field=name + field[len(table) + 1 + len(key):]))
            else:
                out.append(p)
        return PkcalcInputError(out)
    return relabel


def _study_file(study: Study) -> str | None:
    """The study TOML the study was loaded from (None for tables named directly)."""
    first = study.files[0] if study.files else None
    return first if first and first.endswith(".toml") else None


def study_nca_options(study: Study, overrides: dict[str, Any] | None = None, *,
                      labels: dict[str, str] | None = None) -> NcaOptions:
    """NCA options: the study's ``[nca]`` table, then ``overrides`` (same keys;
    ``terminal_points`` are merged per subject).  ``labels`` names the options that
    gave the overrides in messages (the command line passes :data:`CLI_NAMES`)."""
    raw = dict(study.options.get("nca", {}))
    over = {k: v for k, v in (overrides or {}).items() if v is not None}
    relabel = _given_here("nca", over, labels)
    points = {**raw.get("terminal_points", {}), **over.pop("terminal_points", {})}
    raw.update(over)
    if points:
        raw["terminal_points"] = points
    try:
        return nca_options(raw, file=_study_file(study))
    except PkcalcInputError as exc:
        raise relabel(exc) from None


def study_fit_options(study: Study, overrides: dict[str, Any] | None = None, *,
                      labels: dict[str, str] | None = None) -> FitOptions:
    """Fit options: the study's ``[fit]`` table, then ``overrides``.

    An explicit ``weighting`` drops the file's ``error_model`` and vice versa; a
    ``prior`` path from the study file is relative to the study file's folder.
    """
    raw = dict(study.options.get("fit", {}))
    over = {k: v for k, v in (overrides or {}).items() if v is not None}
    if "weighting" in over:
        raw.pop("error_model", None)
    if "error_model" in over:
        raw.pop("weighting", None)
    raw.update(over)
    file = _study_file(study)
    base = Path(file).parent if file and "prior" not in over else None
    try:
        return fit_options(raw, base=base, file=file)
    except PkcalcInputError as exc:
        raise _given_here("fit", over, labels)(exc) from None


def study_population_options(study: Study, overrides: dict[str, Any] | None = None, *,
                             labels: dict[str, str] | None = None) -> PopulationOptions:
    """Population options: the study's ``[population]`` table, then ``overrides``."""
    raw = dict(study.options.get("population", {}))
    over = {k: v for k, v in (overrides or {}).items() if v is not None}
    raw.update(over)
    try:
        return population_options(raw, file=_study_file(study))
    except PkcalcInputError as exc:
        raise _given_here("population", over, labels)(exc) from None
