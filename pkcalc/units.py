"""Units at the boundary: one pint registry, canonical units, quantity and header parsing.

Everything inside pkcalc works in the canonical units below.  Text such as
``"4.2 L/h"`` or a table header such as ``"clearance [mL/min]"`` is converted
here, once per field or per column, never per value inside a computation.

=================  ===========  ==========================================
kind               canonical    accepted (examples)
=================  ===========  ==========================================
time               h            h, min, s, d, week
amount             mg           mg, g, µg/ug/mcg, ng; per kg: mg/kg
volume             L            L, mL, dL; per kg: L/kg
concentration      mg/L         mg/L, µg/mL, ng/mL, mcg/mL, g/L
clearance          L/h          L/h, mL/min, L/d; per kg: L/h/kg, mL/min/kg
rate               mg/h         mg/h, mg/min, µg/min; per kg: mg/kg/h
elimination_rate   1/h          1/h, 1/min, 1/d
weight             kg           kg, g, lb
=================  ===========  ==========================================

A per-kg value is multiplied by the subject's weight, which must then be given.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from functools import lru_cache

import pint

from . import glossary
from .core import CANONICAL_UNITS
from .errors import PkcalcInputError

__all__ = [
    "CANONICAL",
    "KINDS",
    "KIND_OF",
    "UnitSpec",
    "display_factor",
    "parse_header",
    "parse_number_and_unit",
    "parse_unit",
    "to_canonical",
    "ureg",
]

#: The one unit registry of pkcalc.  ``h`` is the hour (pint >= 0.24).
ureg = pint.UnitRegistry()
ureg.define("mcg = microgram")

#: Canonical unit of each kind of quantity.
CANONICAL: dict[str, str] = CANONICAL_UNITS

#: Examples of accepted units, used in error messages.
KINDS: dict[str, str] = {
    "time": "a time such as 'h', 'min', 'd'",
    "amount": "an amount such as 'mg', 'g', 'µg' (or 'mg/kg' with a weight)",
    "volume": "a volume such as 'L', 'mL' (or 'L/kg' with a weight)",
    "concentration": "a concentration such as 'mg/L', 'µg/mL', 'ng/mL'",
    "clearance": "a clearance such as 'L/h', 'mL/min' (or 'L/h/kg', 'mL/min/kg' with a weight)",
    "rate": "a rate such as 'mg/h', 'mg/min', 'µg/min' (or 'mg/kg/h' with a weight)",
    "elimination_rate": "a first-order rate constant such as '1/h', '1/min'",
    "weight": "a body weight such as 'kg', 'g'",
    "auc": "an area such as 'mg*h/L'",
    "aumc": "a moment area such as 'mg*h^2/L'",
}

#: The kind of quantity of every named result pkcalc reports: read from the glossary
#: (the one vocabulary), plus two names that occur only as input (a verification case's
#: ``time_to_fraction`` and a design's ``target``).
KIND_OF: dict[str, str] = {
    **{t.key: t.kind for t in glossary.TERMS if t.kind in KINDS},
    "target": "concentration",
    "time_to_fraction": "time",
}

#: Kinds that may be given per kilogram of body weight.
PER_KG_KINDS = frozenset({"amount", "volume", "clearance", "rate"})

#: A unit per square metre of body surface (``mg/m2``, ``mg/m^2``, ``mg/m²``, ``mg/m2/h``).
_PER_AREA = re.compile(r"/\s*m(?:\s*(?:\^|\*\*)?\s*2|²)\s*(?:/|$)", re.IGNORECASE)
_NUMBER = re.compile(r"^\s*([-+]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][-+]?\d+)?)\s*(.*?)\s*$")
_HEADER = re.compile(r"^\s*([^\[\]]*?)\s*\[\s*([^\[\]]*?)\s*\]\s*$")


@dataclass(frozen=True)
class UnitSpec:
    """How to turn numbers in a given unit into canonical numbers.

    Attributes
    ----------
    kind : str
        One of :data:`CANONICAL`'s keys.
    text : str
        The unit as written.
    factor : float
        Multiply a value in ``text`` units by this to get canonical units.
    per_kg : bool
        True when the value is per kilogram: multiply also by the weight in kg.
    """

    kind: str
    text: str
    factor: float
    per_kg: bool


#: Exponents as papers write them: ``h-1``, ``L.h-1``, ``h⁻¹``, ``m²`` (and ``/h`` for
#: ``1/h``), read as the powers they mean.
_SUPERSCRIPTS = str.maketrans({"⁻": "-", "¹": "1", "²": "2", "³": "3"})
_MINUS_POWER = re.compile(r"(?<=[A-Za-zµμ])\s*-\s*(\d+)\b")
_POWER = re.compile(r"(?<=[A-Za-zµμ])(\d+)\b")


@lru_cache(maxsize=512)
def _unit(text: str) -> pint.Unit:
    text = text.replace("^", "**")
    if any(c in text for c in "⁻¹²³"):
        text = _POWER.sub(r"**\1", text.translate(_SUPERSCRIPTS))
    if not text[:1].isdigit():              # '1e-3' is a number, not e to the -3
        text = _MINUS_POWER.sub(r"**-\1", text)
    if text.startswith("/"):
        text = "1" + text
    return ureg.parse_units(text)


def _not_a_mass_or_volume(text: str, unit: pint.Unit | None) -> str | None:
    """Why a unit of amount or concentration that is not a mass or a mass per volume
    cannot be converted, in the trade's words (None when that is not the reason)."""
    if re.search(r"(?i)\b[mkµμ]?(?:i\.?u\.?|units?|u)\b", text):
        return (f"'{text}' counts units of biological activity, which have no fixed mass: "
                "give the amount in mg (or a concentration in mg/L)")
    if unit is not None and "[substance]" in unit.dimensionality:
        return (f"'{text}' is a molar unit: converting it needs the molar mass, which "
                "pkcalc does not assume; give mass units (mg, mg/L)")
    return None


def _has_per_mass(unit: pint.Unit) -> bool:
    """True when the unit divides by a mass unit (as in mg/kg or L/h/kg)."""
    for name, power in unit._units.items():
        if power < 0 and ureg.get_dimensionality(name) == ureg.get_dimensionality("kg"):
            return True
    return False


def parse_unit(text: str, kind: str, *, field: str | None = None) -> UnitSpec:
    """Check a unit string for a kind of quantity and return its conversion.

    Parameters
    ----------
    text : str
        Unit as written, e.g. ``"mL/min"`` or ``"mg/kg/h"``.
    kind : str
        Kind of quantity expected (a key of :data:`CANONICAL`).
    field : str, optional
        Field or column name for the error message.

    Returns
    -------
    UnitSpec

    Raises
    ------
    PkcalcInputError
        When the unit is unknown or has the wrong dimension.

    Examples
    --------
    >>> parse_unit("mL/min", "clearance").factor
    0.06
    """
    if kind not in CANONICAL:
        raise ValueError(f"unknown kind of quantity {kind!r}")
    if text is None or not str(text).strip():
        raise PkcalcInputError("no unit given", field=field, expected=KINDS[kind])
    if kind in PER_KG_KINDS and _PER_AREA.search(str(text)):
        raise PkcalcInputError(
            f"'{text}' is per body-surface area, which pkcalc does not convert (that needs a "
            "height and a choice of surface-area formula): give it in absolute units",
            field=field, expected=KINDS[kind])
    try:
        unit = _unit(str(text).strip())
    except (pint.UndefinedUnitError, pint.DefinitionSyntaxError, AttributeError,
            TypeError, ValueError, SyntaxError, AssertionError):
        unit = None
    canonical = _unit(CANONICAL[kind])
    if (unit is None or unit.dimensionality != canonical.dimensionality) and \
            kind in ("amount", "concentration", "rate") and \
            (why := _not_a_mass_or_volume(str(text).strip(), unit)) is not None:
        raise PkcalcInputError(why, field=field, expected=KINDS[kind])
    if unit is None:
        raise PkcalcInputError(f"unknown unit '{text}'", field=field, expected=KINDS[kind])
    if unit.dimensionality == canonical.dimensionality:
        factor = float(ureg.Quantity(1.0, unit).to(canonical).magnitude)
        return UnitSpec(kind, str(text).strip(), factor, False)
    if kind in PER_KG_KINDS and _has_per_mass(unit):
        per_kg = canonical / ureg.kilogram
        if unit.dimensionality == per_kg.dimensionality:
            factor = float(ureg.Quantity(1.0, unit).to(per_kg).magnitude)
            return UnitSpec(kind, str(text).strip(), factor, True)
    raise PkcalcInputError(
        f"unit '{text}' has dimension {unit.dimensionality}, not that of {CANONICAL[kind]}",
        field=field,
        expected=KINDS[kind],
    )


def parse_number_and_unit(text: object, *, field: str | None = None) -> tuple[float, str]:
    """Split ``"4.2 L/h"`` into ``(4.2, "L/h")``; the unit may be empty.

    A bare number (int or float from TOML) returns an empty unit.  NaN,
    infinity and non-numeric text are errors.
    """
    if isinstance(text, bool):
        raise PkcalcInputError(f"got {text!r}", field=field, expected="a number with a unit")
    if isinstance(text, int | float):
        value = float(text)
        unit = ""
    else:
        match = _NUMBER.match(str(text))
        if not match:
            raise PkcalcInputError(
                f"'{text}' is not a number followed by a unit", field=field,
                expected="text such as '4.2 L/h'",
            )
        value, unit = float(match.group(1)), match.group(2)
    if value != value or value in (float("inf"), float("-inf")):
        raise PkcalcInputError(f"'{text}' is not a finite number", field=field)
    return value, unit


#: Canonical magnitudes pkcalc computes with: zero, or 1e-100 to 1e100.  Far beyond any
#: physical value, and far enough inside float64 (IEEE 754: about 2.2e-308 to 1.8e308)
#: that products and quotients of a few of them cannot overflow or underflow.
NUMERIC_RANGE = (1e-100, 1e100)


def out_of_range(value: float) -> bool:
    """True for a value that is not finite, or nonzero outside :data:`NUMERIC_RANGE`."""
    a = abs(value)
    return not math.isfinite(value) or (a != 0 and not NUMERIC_RANGE[0] <= a <= NUMERIC_RANGE[1])


def range_message(value: float, unit: str) -> str:
    return (f"{value:.6g} {unit} is outside the range pkcalc computes in (zero, or "
            f"{NUMERIC_RANGE[0]:g} to {NUMERIC_RANGE[1]:g} in {unit})")


def to_canonical(
    text: object,
    kind: str,
    *,
    field: str | None = None,
    weight: float | None = None,
) -> float:
    """Convert a quantity written as text to a canonical number.

    Parameters
    ----------
    text : str
        A number and a unit, e.g. ``"35 mL/min"``.  A bare number is refused:
        nothing is assumed about units.
    kind : str
        Kind of quantity expected (a key of :data:`CANONICAL`).
    field : str, optional
        Field name for error messages.
    weight : float, optional, kg
        Body weight, needed for per-kg values such as ``"0.5 L/kg"``.

    Returns
    -------
    float
        The value in the canonical unit of ``kind``.

    Examples
    --------
    >>> to_canonical("35 mL/min", "clearance")
    2.1
    >>> to_canonical("0.5 L/kg", "volume", weight=70.0)
    35.0
    """
    value, unit = parse_number_and_unit(text, field=field)
    if not unit:
        raise PkcalcInputError(
            f"'{text}' has no unit", field=field, expected=f"{KINDS[kind]}, e.g. '{value:g} "
            f"{CANONICAL[kind]}'",
        )
    spec = parse_unit(unit, kind, field=field)
    result = value * spec.factor
    if spec.per_kg:
        if weight is None:
            raise PkcalcInputError(
                f"'{text}' is per kg of body weight but no weight is given", field=field,
                expected="a 'weight' such as '70 kg'",
            )
        result *= weight
    if out_of_range(result):
        raise PkcalcInputError(range_message(result, CANONICAL[kind]), field=field,
                               expected=f"{KINDS[kind]} of a realistic size")
    return result


def parse_header(header: str) -> tuple[str, str | None]:
    """Split a table header ``"clearance [L/h]"`` into name and unit.

    Returns ``(name, None)`` when the header declares no unit.

    Examples
    --------
    >>> parse_header("time [min]")
    ('time', 'min')
    >>> parse_header("subject")
    ('subject', None)
    """
    match = _HEADER.match(str(header))
    if match:
        return match.group(1).strip(), match.group(2).strip()
    return str(header).strip(), None


def display_factor(unit: str, kind: str, *, field: str | None = None) -> float:
    """Factor that turns a canonical value into ``unit`` (per-kg units refused).

    Examples
    --------
    >>> display_factor("min", "time")
    60.0
    """
    spec = parse_unit(unit, kind, field=field)
    if spec.per_kg:
        raise PkcalcInputError(
            f"display unit '{unit}' is per kg; output units must be absolute", field=field,
            expected=KINDS[kind],
        )
    return 1.0 / spec.factor
