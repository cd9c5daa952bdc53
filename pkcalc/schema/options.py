"""Option merging, in one place: a study file's ``[fit]``, ``[nca]`` and
``[population]`` tables with values given on the command line (or in Python).

Values given explicitly win over the study file's; a path in the study file (a
prior) is relative to the study file's folder, a path given explicitly to the
working directory.  The results are the validated core option types.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from ..core import FitOptions, NcaOptions, PopulationOptions, Study
from .fitopts import fit_options, population_options
from .study import nca_options

__all__ = ["study_fit_options", "study_nca_options", "study_population_options"]


def _study_file(study: Study) -> str | None:
    """The study TOML the study was loaded from (None for tables named directly)."""
    first = study.files[0] if study.files else None
    return first if first and first.endswith(".toml") else None


def study_nca_options(study: Study, overrides: dict[str, Any] | None = None) -> NcaOptions:
    """NCA options: the study's ``[nca]`` table, then ``overrides`` (same keys;
    ``terminal_points`` are merged per subject)."""
    raw = dict(study.options.get("nca", {}))
    over = {k: v for k, v in (overrides or {}).items() if v is not None}
    points = {**raw.get("terminal_points", {}), **over.pop("terminal_points", {})}
    raw.update(over)
    if points:
        raw["terminal_points"] = points
    return nca_options(raw, file=_study_file(study))


def study_fit_options(study: Study, overrides: dict[str, Any] | None = None) -> FitOptions:
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
    return fit_options(raw, base=base, file=file)


def study_population_options(study: Study, overrides: dict[str, Any] | None = None
                             ) -> PopulationOptions:
    """Population options: the study's ``[population]`` table, then ``overrides``."""
    raw = dict(study.options.get("population", {}))
    raw.update({k: v for k, v in (overrides or {}).items() if v is not None})
    return population_options(raw, file=_study_file(study))
