"""Terminal and JSON output of ``pkcalc verify``."""

from __future__ import annotations

from typing import Any

from .._format import format_table
from .base import assemble_text, failures_json, json_document, json_number


def verify_json(result) -> dict[str, Any]:
    """The ``pkcalc verify --json`` document (docs/formats.md keys)."""
    cases = [{
        "name": case.name, "source": case.source,
        "checks": [{"quantity": c.quantity, "expected": json_number(c.expected),
                    "computed": json_number(c.computed), "difference": json_number(c.difference),
                    "unit": c.unit, "tolerance": c.tolerance, "passed": c.passed,
                    "message": c.message} for c in case.checks],
    } for case in result.cases]
    return json_document("verify", None, {
        "cases": cases, "passed": result.n_passed, "failed": result.n_failed,
        "errors": failures_json(result.failures),
    })


def verify_text(result, *, title: str | None = None, colour: bool = False) -> str:
    """Terminal output: caution, one table per case with its source, then a tally."""
    sections = []
    for case in result.cases:
        rows = [[c.quantity, c.expected, c.computed, c.difference, c.unit, c.tolerance,
                 "PASS" if c.passed else "FAIL"] for c in case.checks]
        lines = [f"Case: {case.name}", f"source: {case.source}",
                 format_table(["quantity", "expected", "computed", "difference", "unit",
                               "tolerance", "result"], rows, digits=6)]
        lines += [f"  FAIL {c.quantity}: {c.message}" for c in case.checks if not c.passed]
        sections.append("\n".join(lines))
    n_err = len(result.failures)
    tally = (f"{result.n_passed} passed, {result.n_failed} failed"
             + (f", {n_err} case(s) unusable" if n_err else "")
             + f" ({len(result.cases)} cases)")
    sections.append(("ALL CHECKS PASSED: " if not result.n_failed and not n_err else
                     "CHECKS FAILED: ") + tally)
    return assemble_text(sections, [], title=title, failures=result.failures, colour=colour)


__all__ = ["verify_json", "verify_text"]
