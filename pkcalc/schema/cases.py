"""The cases file of ``pkcalc verify`` (docs/formats.md): inputs, source, expectations."""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pydantic import Field, model_validator

from ..core import MIN_SALT_FACTOR, DesignCase, DoseEvent
from ..errors import PkcalcInputError
from ..units import KIND_OF, parse_number_and_unit, parse_unit
from .base import (
    Collector,
    LenientModel,
    QuantityText,
    ScenarioFile,
    WithParameters,
    load_items,
    resolve_partial,
)
from .design_table import DesignSpec, resolve_design
from .scenario import DoseSpec, TimeRange, resolve_times

__all__ = ["QUANTITIES", "CaseSpec", "Expectation", "VerifyCase", "load_cases_file"]

#: Quantities a case may check, with what each needs besides clearance and volume.
QUANTITIES: dict[str, str] = {
    "plateau_concentration": "doses",
    "time_to_fraction": "fraction",
    "concentration": "doses and at",
    "peak": "repeated doses",
    "trough": "repeated doses",
    "average": "repeated doses",
    "clearance": "",
    "volume": "",
    "half_life": "",
    "elimination_rate": "",
    "time_constant": "",
    "rate_for_target": "target (salt_factor optional)",
    "loading_dose_for_target": "target (salt_factor, current optional)",
}
_NEED_DOSES = ("plateau_concentration", "concentration", "peak", "trough", "average")
_DESIGN_Q = re.compile(r"^design\.(estimate|regimen|predicted|exact)\.([a-z_0-9]+)$")
_TOL = re.compile(r"^\s*([0-9.eE+-]+)\s*%\s*$")


@dataclass(frozen=True)
class Expectation:
    """One expected value, in canonical units, with the text as written.

    Attributes
    ----------
    quantity : str
    kind : str
        Kind of quantity (``units.CANONICAL`` key) of the value.
    expected : float
        Canonical value.
    unit : str
        The unit the value was written in (results are shown in it).
    factor : float
        Canonical per written unit (``canonical = written * factor``).
    tol_rel, tol_abs : float or None
        Relative tolerance, or absolute tolerance in canonical units.
    tolerance : str
        As written.
    args : dict
        ``fraction``, ``at`` (h), ``target`` (mg/L), ``salt_factor``, ``current`` (mg/L),
        ``regimen`` (1-based number of the proposed regimen for ``design.*``).
    """

    quantity: str
    kind: str
    expected: float
    unit: str
    factor: float
    tol_rel: float | None
    tol_abs: float | None
    tolerance: str
    args: dict[str, float] = field(default_factory=dict)


@dataclass(frozen=True)
class VerifyCase:
    """A validated case: parameters, optional doses and design, expectations."""

    name: str
    source: str
    clearance: float | None
    volume: float | None
    weight: float | None
    doses: tuple[DoseEvent, ...]
    times: Any
    design: DesignCase | None
    expectations: tuple[Expectation, ...]


class ExpectSpec(LenientModel):
    """One ``[[cases.expect]]`` table."""

    quantity: str
    value: QuantityText
    tolerance: str | int | float
    fraction: float | None = None
    at: QuantityText | None = None
    target: QuantityText | None = None
    salt_factor: float | None = None
    current: QuantityText | None = None
    regimen: int | None = None

    def to_expectation(self, col: Collector, where: str) -> Expectation | None:
        self.unknown_keys(col, f"{where}.")
        q = self.quantity
        match = _DESIGN_Q.match(q)
        if q in QUANTITIES:
            kind = KIND_OF[q]
        elif match and match.group(2) in KIND_OF:
            kind = KIND_OF[match.group(2)]
        elif match:
            kind = "concentration" if match.group(1) == "predicted" else "dimensionless"
        else:
            col.add(f"unknown quantity '{q}'", f"{where}.quantity",
                    ", ".join(QUANTITIES) + ", or design.estimate.<name>, "
                    "design.regimen.<name>, design.predicted.<name>, design.exact.<name>")
            return None
        n0 = len(col.problems)
        value, unit, factor = self._value(col, kind, f"{where}.value")
        tol_rel = tol_abs = None
        tol_text = str(self.tolerance)
        m = _TOL.match(tol_text)
        if m:
            tol_rel = float(m.group(1)) / 100.0
        else:
            tol_abs = col.q(self.tolerance, kind, f"{where}.tolerance", nonnegative=True) \
                if kind != "dimensionless" else self._dimensionless(col, f"{where}.tolerance")
        if (tol_rel is not None and not tol_rel >= 0):
            col.add(f"tolerance '{tol_text}' must not be negative", f"{where}.tolerance")
        args: dict[str, float] = {}
        if self.fraction is not None:
            if not 0 < self.fraction < 1:
                col.add(f"fraction must be in (0, 1), got {self.fraction}", f"{where}.fraction")
            args["fraction"] = self.fraction
        if self.at is not None:
            at = col.q(self.at, "time", f"{where}.at", nonnegative=True)
            if at is not None:
                args["at"] = at
        if self.target is not None:
            target = col.q(self.target, "concentration", f"{where}.target", positive=True)
            if target is not None:
                args["target"] = target
        if self.current is not None:
            current = col.q(self.current, "concentration", f"{where}.current", nonnegative=True)
            if current is not None:
                args["current"] = current
        if self.salt_factor is not None:
            if not MIN_SALT_FACTOR <= self.salt_factor <= 1:
                col.add(f"salt_factor must be from 0.05 to 1 (the drug's share of the product), "
                    f"got {self.salt_factor}",
                        f"{where}.salt_factor")
            args["salt_factor"] = self.salt_factor
        if self.regimen is not None:
            if self.regimen < 1 or not q.startswith("design."):
                col.add("regimen is the 1-based number of a proposed regimen (design.* only)",
                        f"{where}.regimen")
            args["regimen"] = self.regimen
        needs = {"time_to_fraction": "fraction", "concentration": "at",
                 "rate_for_target": "target", "loading_dose_for_target": "target"}
        if q in needs and needs[q] not in args:
            col.add(f"quantity '{q}' needs '{needs[q]}'", f"{where}.{needs[q]}")
        if len(col.problems) > n0 or value is None:
            return None
        return Expectation(q, kind, value, unit, factor, tol_rel, tol_abs, tol_text, args)

    def _value(self, col: Collector, kind: str, where: str):
        if kind == "dimensionless":
            v = self._dimensionless(col, where)
            return v, "", 1.0
        try:
            number, unit = parse_number_and_unit(self.value, field=where)
            if not unit:
                raise PkcalcInputError(f"'{self.value}' has no unit", field=where)
            spec = parse_unit(unit, kind, field=where)
        except PkcalcInputError as exc:
            col.problems.extend(exc.problems)
            return None, "", 1.0
        if spec.per_kg:
            col.add("expected values must be absolute, not per kg", where)
            return None, "", 1.0
        return number * spec.factor, unit, spec.factor

    def _dimensionless(self, col: Collector, where: str) -> float | None:
        text = self.value if where.endswith("value") else self.tolerance
        try:
            number, unit = parse_number_and_unit(text, field=where)
        except PkcalcInputError as exc:
            col.problems.extend(exc.problems)
            return None
        if unit:
            col.add(f"'{text}' should be a plain number", where)
            return None
        return number


class CaseSpec(WithParameters):
    """One ``[[cases]]`` table: scenario inputs, a ``source`` and expectations."""

    source: str = Field(min_length=1)
    doses: list[DoseSpec] = Field(default_factory=list)
    times: list[QuantityText] | TimeRange | None = None
    design: DesignSpec | None = None
    expect: list[ExpectSpec] = Field(min_length=1)


    @model_validator(mode="after")
    def _to_canonical(self) -> CaseSpec:
        col, weight, values = self.start_collecting()
        cl, v = (None, None) if col.problems else resolve_partial(values, col)
        doses = []
        for i, d in enumerate(self.doses):
            ev = d.to_event(col, f"doses[{i}]")
            if ev is not None:
                doses.append(ev)
        times = resolve_times(self.times, col)
        design = None
        if self.design is not None:
            method, opts = resolve_design(self.design, cl, v, col)
            design = DesignCase(self.name, method, cl, v, opts, weight)
        expectations = [e.to_expectation(col, f"expect[{i}]") for i, e in enumerate(self.expect)]
        for i, e in enumerate(expectations):
            if e is None:
                continue
            if e.quantity.startswith("design.") and design is None:
                col.add(f"'{e.quantity}' needs a [cases.design] table", f"expect[{i}].quantity")
            elif not e.quantity.startswith("design.") and (cl is None or v is None):
                col.add(f"'{e.quantity}' needs clearance and volume (any two parameters)",
                        f"expect[{i}].quantity")
            elif e.quantity in _NEED_DOSES and not doses:
                col.add(f"'{e.quantity}' needs doses", f"expect[{i}].quantity")
        col.raise_if_any()
        self._resolved = VerifyCase(self.name, self.source, cl, v, weight, tuple(doses), times,
                                    design, tuple(e for e in expectations if e is not None))
        return self


def load_cases_file(path: str | Path) -> ScenarioFile:
    """Load a cases file (``[[cases]]`` tables); bad cases are returned as failures."""
    return load_items(path, CaseSpec, list_key="cases")
