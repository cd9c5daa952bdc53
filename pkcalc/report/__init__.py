"""Human-facing output: the caution, terminal tables, JSON documents, files, HTML.

Functions here return text, dictionaries or bytes; only :mod:`pkcalc.cli`
prints.  The caution text lives in :mod:`pkcalc.report.base` and nowhere else.
"""

from .base import (
    CAUTION,
    CAUTION_SHORT,
    PROFILE_ROWS,
    UnitConverter,
    assemble_text,
    caution_block,
    dumps,
    failures_json,
    failures_text,
    json_document,
    previous_files,
    warnings_text,
    write_atomic,
    write_caution_file,
)
from .design import (
    DESIGN_CAUTION,
    design_json,
    design_regimen_dict,
    design_result_text,
    design_text,
)
from .predict import predict_json, predict_scenario_dict, predict_scenario_text, predict_text
from .verify import verify_json, verify_text

__all__ = [
    "CAUTION",
    "CAUTION_SHORT",
    "DESIGN_CAUTION",
    "PROFILE_ROWS",
    "UnitConverter",
    "assemble_text",
    "caution_block",
    "design_json",
    "design_regimen_dict",
    "design_result_text",
    "design_text",
    "dumps",
    "failures_json",
    "failures_text",
    "json_document",
    "predict_json",
    "predict_scenario_dict",
    "predict_scenario_text",
    "predict_text",
    "previous_files",
    "verify_json",
    "verify_text",
    "warnings_text",
    "write_atomic",
    "write_caution_file",
]
