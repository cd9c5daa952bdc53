"""Recompute expected values from worked examples: ``pkcalc verify``.

A case holds scenario inputs, a ``source`` naming where its expected values
come from, and expectations with tolerances (docs/formats.md).  Every value is
recomputed with the same code paths the other commands use (:mod:`predict`,
:mod:`design`, :mod:`model`), compared in canonical units, and shown in the
unit the expected value was written in.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from dataclasses import dataclass, field

import numpy as np

from . import glossary, model
from ._format import format_table, short, with_caution
from .core import ScenarioInput
from .design import DesignResult, design_from_case, loading_dose_for_target, rate_for_target
from .predict import predict_scenario
from .schema.cases import Expectation, VerifyCase

__all__ = ["CaseResult", "CheckResult", "VerifyResult", "junit_xml", "run_case", "verify"]


@dataclass(frozen=True)
class CheckResult:
    """One expectation recomputed.

    Attributes
    ----------
    quantity : str
        With its arguments, e.g. ``concentration (at 12 h)``.
    expected, computed, difference : float or None
        In ``unit`` (the unit the expected value was written in).
    unit, tolerance : str
    passed : bool
    message : str
        Why it failed, or what could not be computed.
    """

    quantity: str
    expected: float
    computed: float | None
    difference: float | None
    unit: str
    tolerance: str
    passed: bool
    message: str = ""


@dataclass
class CaseResult:
    """All checks of one case."""

    name: str
    source: str
    checks: list[CheckResult]

    @property
    def passed(self) -> bool:
        return all(c.passed for c in self.checks)


@dataclass
class VerifyResult:
    """Results of a cases file, plus cases that could not be read."""

    cases: list[CaseResult]
    failures: list = field(default_factory=list)

    @property
    def n_passed(self) -> int:
        return sum(c.passed for case in self.cases for c in case.checks)

    @property
    def n_failed(self) -> int:
        return sum(not c.passed for case in self.cases for c in case.checks)

    def summary(self, caution: bool = True) -> str:
        """Plain-text table case x quantity, after the caution (``caution=False``: without)."""
        rows = [[case.name, c.quantity, c.expected, c.computed, c.difference, c.unit,
                 c.tolerance, "PASS" if c.passed else "FAIL"]
                for case in self.cases for c in case.checks]
        table = format_table(["case", "quantity", "expected", "computed", "difference", "unit",
                              "tolerance", "result"], rows)
        return with_caution(table, caution)

    def _repr_html_(self) -> str:
        """Notebook view: the caution, the table and the summary."""
        from ._format import result_html

        return result_html(self.summary(caution=False), self.to_frame())

    def to_frame(self):
        """One row per check."""
        import pandas as pd

        return pd.DataFrame([
            {"case": case.name, "source": case.source, "quantity": c.quantity,
             "expected": c.expected, "computed": c.computed, "difference": c.difference,
             "unit": c.unit, "tolerance": c.tolerance, "passed": c.passed,
             "message": c.message}
            for case in self.cases for c in case.checks
        ])


def _label(e: Expectation) -> str:
    parts = []
    if "fraction" in e.args:
        parts.append(f"fraction {short(e.args['fraction'])}")
    if "at" in e.args:
        parts.append(f"at {short(e.args['at'])} h")
    if "target" in e.args:
        parts.append(f"target {short(e.args['target'])} mg/L")
    if "current" in e.args:
        parts.append(f"current {short(e.args['current'])} mg/L")
    if "salt_factor" in e.args:
        parts.append(f"S {short(e.args['salt_factor'])}")
    if "regimen" in e.args:
        parts.append(f"regimen #{e.args['regimen']}")
    # the quantity by its glossary key, what it is of in parentheses
    name = e.quantity
    if name == "time_to_fraction" and "fraction" in e.args:  # one key per fraction
        name = glossary.time_to_key(float(e.args["fraction"]))
        parts = [p for p in parts if not p.startswith("fraction ")]
    elif name.startswith("design."):
        _, part, name = name.split(".")
        parts.insert(0, {"estimate": "design estimate", "exact": "design, unrounded",
                         "predicted": "design, predicted",
                         "regimen": "design, rounded"}.get(part, "design"))
    elif name in ("peak", "trough", "average"):
        name = f"steady_state_{name}"
    return name + (f" ({', '.join(parts)})" if parts else "")


def _design_value(result: DesignResult, quantity: str, number: int = 1) -> float:
    _, part, key = quantity.split(".")
    if part != "estimate" and number > len(result.regimens):
        raise KeyError(f"the design proposes {len(result.regimens)} regimen(s), not {number}")
    best = result.regimens[number - 1] if result.regimens else None
    source = {
        "estimate": result.estimates,
        "exact": best.exact if best else {},
        "predicted": best.predicted if best else {},
        "regimen": {k: getattr(best, k) for k in ("rate", "loading_dose", "loading_time",
                                                   "dose", "interval", "infusion_time")}
        if best else {},
    }[part]
    if key not in source or source[key] is None:
        raise KeyError(f"the design has no {part} '{key}' (it has: {', '.join(source) or 'none'})")
    return float(source[key])


def _compute(case: VerifyCase, e: Expectation, cache: dict) -> float:
    """The canonical value of one expectation."""
    if e.quantity.startswith("design."):
        if "design" not in cache:
            cache["design"] = design_from_case(case.design)  # type: ignore[arg-type]
        return _design_value(cache["design"], e.quantity, int(e.args.get("regimen", 1)))
    cl, v = case.clearance, case.volume
    assert cl is not None and v is not None
    salt = e.args.get("salt_factor", 1.0)
    params = model.derived_parameters(cl, v)
    if e.quantity in params:
        return params[e.quantity]
    if e.quantity == "time_to_fraction":
        return float(model.time_to_fraction(e.args["fraction"], cl, v))
    if e.quantity == "rate_for_target":
        return rate_for_target(e.args["target"], cl, salt)
    if e.quantity == "loading_dose_for_target":
        return loading_dose_for_target(e.args["target"], v, salt, e.args.get("current", 0.0))
    if "prediction" not in cache:
        cache["prediction"] = predict_scenario(ScenarioInput(
            case.name, cl, v, case.doses, case.times, case.weight))
    pred = cache["prediction"]
    if e.quantity == "concentration":
        return float(pred.concentration_at([e.args["at"]])[0])
    if e.quantity == "plateau_concentration":
        if pred.plateau_concentration is None:
            raise KeyError("the doses give no plateau (no constant-rate infusion)")
        return pred.plateau_concentration
    if pred.steady_state is None:
        raise KeyError("no steady state: the case needs repeated doses (every, count)")
    return float(getattr(pred.steady_state, e.quantity))


def run_case(case: VerifyCase) -> CaseResult:
    """Recompute every expectation of a case."""
    checks = []
    cache: dict = {}
    for e in case.expectations:
        shown_expected = e.expected / e.factor
        try:
            computed = _compute(case, e, cache)
        except (KeyError, ValueError) as exc:
            checks.append(CheckResult(_label(e), shown_expected, None, None, e.unit,
                                      e.tolerance, False, f"not computed: {exc}"))
            continue
        diff = computed - e.expected
        limit = e.tol_abs if e.tol_abs is not None else (e.tol_rel or 0.0) * abs(e.expected)
        passed = bool(np.isfinite(computed) and abs(diff) <= limit * (1 + 1e-12))
        message = "" if passed else (f"differs by {short(diff / e.factor)} {e.unit}, more than "
                                     f"the tolerance {e.tolerance}")
        checks.append(CheckResult(_label(e), shown_expected, computed / e.factor,
                                  diff / e.factor, e.unit, e.tolerance, passed, message))
    return CaseResult(case.name, case.source, checks)


def verify(cases, failures=()) -> VerifyResult:
    """Run validated cases (see :func:`pkcalc.schema.cases.load_cases_file`)."""
    return VerifyResult([run_case(c) for c in cases], list(failures))


def junit_xml(result: VerifyResult, suite: str = "pkcalc verify") -> bytes:
    """JUnit XML: one ``testcase`` per check (classname = case), ``failure`` on FAIL,
    ``error`` for cases that could not be read."""
    n_err = len(result.failures)
    root = ET.Element("testsuites")
    ts = ET.SubElement(root, "testsuite", name=suite,
                       tests=str(result.n_passed + result.n_failed + n_err),
                       failures=str(result.n_failed), errors=str(n_err))
    for case in result.cases:
        for c in case.checks:
            tc = ET.SubElement(ts, "testcase", classname=case.name, name=c.quantity)
            out = ET.SubElement(tc, "system-out")
            out.text = (f"source: {case.source}\nexpected {c.expected!r} {c.unit}, computed "
                        f"{c.computed!r} {c.unit}, tolerance {c.tolerance}")
            if not c.passed:
                fail = ET.SubElement(tc, "failure", message=c.message or "failed")
                fail.text = c.message
    for label, err in result.failures:
        tc = ET.SubElement(ts, "testcase", classname=label, name="input")
        e = ET.SubElement(tc, "error", message="unusable case")
        e.text = str(err)
    ET.indent(root)
    return ET.tostring(root, encoding="utf-8", xml_declaration=True)
