"""Unit parsing and conversion at the boundary.

Conversion factors are facts (SI definitions): 1 h = 60 min, 1 d = 24 h,
1 L = 1000 mL, 1 mg = 1000 µg, 1 ng/mL = 1 µg/L = 0.001 mg/L.
"""

from __future__ import annotations

import pytest

from pkcalc.errors import PkcalcInputError
from pkcalc.units import display_factor, parse_header, parse_unit, to_canonical


@pytest.mark.parametrize(
    ("text", "kind", "expected"),
    [
        ("4.2 L/h", "clearance", 4.2),
        ("35 mL/min", "clearance", 2.1),
        ("100.8 L/d", "clearance", 4.2),
        ("600 mg", "amount", 600.0),
        ("0.6 g", "amount", 600.0),
        ("500 ug", "amount", 0.5),
        ("500 µg", "amount", 0.5),
        ("500 μg", "amount", 0.5),  # Greek mu
        ("500 mcg", "amount", 0.5),
        ("30 min", "time", 0.5),
        ("2 d", "time", 48.0),
        ("3600 s", "time", 1.0),
        ("8 h", "time", 8.0),     # h is the hour, not Planck's constant
        ("0.1 1/h", "elimination_rate", 0.1),
        ("0.01 1/min", "elimination_rate", 0.6),
        ("250 ng/mL", "concentration", 0.25),
        ("2.5 µg/mL", "concentration", 2.5),
        ("2.5 mcg/mL", "concentration", 2.5),
        ("35 mg/h", "rate", 35.0),
        ("0.5 mg/min", "rate", 30.0),
        ("48 L", "volume", 48.0),
        ("1500 mL", "volume", 1.5),
        ("70 kg", "weight", 70.0),
        ("1e-3 L/h", "clearance", 1e-3),
        # exponents as papers write them (h-1, L.h-1, h⁻¹, L·h⁻¹) and '/h' for 1/h
        ("0.1 h-1", "elimination_rate", 0.1),
        ("0.1 h⁻¹", "elimination_rate", 0.1),
        ("0.1 /h", "elimination_rate", 0.1),
        ("4.2 L.h-1", "clearance", 4.2),
        ("4.2 L h-1", "clearance", 4.2),
        ("4.2 L·h⁻¹", "clearance", 4.2),
        ("35 mL.min-1", "clearance", 2.1),
        ("100 mg·h·L⁻¹", "auc", 100.0),
    ],
)
def test_to_canonical(text, kind, expected):
    assert to_canonical(text, kind) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize(
    ("text", "kind", "weight", "expected"),
    [
        ("5 mg/kg", "amount", 70.0, 350.0),
        ("0.5 L/kg", "volume", 70.0, 35.0),
        ("0.04 L/h/kg", "clearance", 70.0, 2.8),
        ("12.3 mL/min/kg", "clearance", 70.0, 12.3 * 60 * 70 / 1000),
        ("0.4 mg/kg/h", "rate", 70.0, 28.0),
        ("30 ug/kg/min", "rate", 70.0, 30 * 70 * 60 / 1000),
        ("12.3 mL·min⁻¹·kg⁻¹", "clearance", 70.0, 12.3 * 60 * 70 / 1000),
    ],
)
def test_per_kg(text, kind, weight, expected):
    assert to_canonical(text, kind, weight=weight) == pytest.approx(expected, rel=1e-12)


def test_per_kg_needs_weight():
    with pytest.raises(PkcalcInputError, match="per kg.*no weight") as info:
        to_canonical("0.5 L/kg", "volume", field="volume")
    assert info.value.problems[0].field == "volume"


@pytest.mark.parametrize(
    ("text", "kind", "match"),
    [
        ("4.2", "clearance", "has no unit"),
        (4.2, "clearance", "has no unit"),
        ("4.2 mg", "clearance", "dimension"),
        ("4.2 L/h", "volume", "dimension"),
        ("0.1 1/h", "rate", "dimension"),          # not a per-kg rate: no mass divided out
        ("5 %", "amount", "dimension"),
        ("4.2 flurbs", "clearance", "unknown unit 'flurbs' \\(expected"),
        # body-surface-area doses are common in oncology (a fact of the trade); converting
        # them needs a height and a surface-area formula, so they are refused, said why
        ("100 mg/m2", "amount", "per body-surface area"),
        ("100 mg/m²", "amount", "per body-surface area"),
        ("10 mg/m^2/h", "rate", "per body-surface area"),
        # activity units (IU) have no fixed mass, and molar units need the molar mass
        # (facts of the trade): refused, said why
        ("5000 IU", "amount", "units of biological activity"),
        ("1000 units", "amount", "units of biological activity"),
        ("2 mIU/mL", "concentration", "units of biological activity"),
        ("12 µmol/L", "concentration", "molar unit.*molar mass"),
        ("1e-3", "amount", "has no unit|unknown unit"),
        ("nan L/h", "clearance", "not a number"),
        ("inf L/h", "clearance", "not a number"),
        ("L/h", "clearance", "not a number"),
        ("4,2 L/h", "clearance", "unknown unit|dimension|not a number"),
        ("", "time", "not a number"),
    ],
)
def test_bad_quantities_name_field_and_accepted_forms(text, kind, match):
    with pytest.raises(PkcalcInputError, match=match) as info:
        to_canonical(text, kind, field="the_field")
    problem = info.value.problems[0]
    assert problem.field == "the_field"
    assert "the_field" in str(info.value)


def test_error_lists_accepted_units():
    with pytest.raises(PkcalcInputError) as info:
        to_canonical("3 mg", "clearance", field="clearance")
    assert "L/h" in info.value.problems[0].expected
    assert "mL/min" in info.value.problems[0].expected


@pytest.mark.parametrize(
    ("header", "name", "unit"),
    [
        ("time [h]", "time", "h"),
        ("  concentration [ mg/L ] ", "concentration", "mg/L"),
        ("clearance [mL/min/kg]", "clearance", "mL/min/kg"),
        ("subject", "subject", None),
        ("lloq [ng/mL]", "lloq", "ng/mL"),
    ],
)
def test_parse_header(header, name, unit):
    assert parse_header(header) == (name, unit)


def test_parse_unit_per_kg_flag():
    spec = parse_unit("mL/min/kg", "clearance")
    assert spec.per_kg and spec.factor == pytest.approx(0.06)
    assert not parse_unit("mL/min", "clearance").per_kg


def test_display_factor():
    assert display_factor("min", "time") == pytest.approx(60.0)
    assert display_factor("ug/mL", "concentration") == pytest.approx(1.0)
    with pytest.raises(PkcalcInputError, match="per kg"):
        display_factor("L/kg", "volume")
