"""CDISC controlled terminology and ISO 8601 durations, as the SDTM import reads them.

Sources (CDISC Controlled Terminology, SDTM codelists; from memory for the codelist
codes -- the submission values are the ones listed here):

- Route of administration (ROUTE, C66729): the intravenous terms pkcalc models.
- Specimen type (SPECTYPE, C78734): plasma, serum and blood are the systemic
  specimens a concentration-time model describes; anything else (urine, faeces,
  cerebrospinal fluid, ...) is another matrix and never mixed in.
- Frequency (FREQ, C71113): ``ONCE``, ``QD``, ``BID``, ``TID``, ``QID``, ``QOD``,
  ``QH``, ``QW``, ``Q<n>H``, ``Q<n>D``, ``Q<n>W``, ``EVERY WEEK``,
  ``CONTINUOUS``; ``PRN`` (as needed), monthly terms and ``UNKNOWN`` cannot be
  expanded into administration times and are refused.
- Unit (UNIT, C71620): submission values such as ``mg``, ``ug/mL``, ``ng/mL``,
  ``kg``, ``LB``, ``cm``, ``kg/m2``; spellings in upper case (``NG/ML``, ``KG``)
  and the Greek or micro sign (``μg/mL``, ``µg/mL``) are accepted too.
- ISO 8601 durations (``PT1H``, ``PT30M``, ``P1D``, ``-PT15M``) for EXDUR and
  PCELTM (ISO 8601-1:2019 section 5.5.2, from memory); years and months have no
  fixed length in hours and are refused.
"""

from __future__ import annotations

import math
import re

__all__ = [
    "BOLUS_ROUTES",
    "IV_ROUTES",
    "PLACEBO",
    "SYSTEMIC_SPECIMENS",
    "analyte_is_treatment",
    "frequency_hours",
    "iso_duration_hours",
    "normalise_unit",
]

#: Intravenous routes of the route terminology that pkcalc models.
IV_ROUTES = ("INTRAVENOUS", "INTRAVENOUS BOLUS", "INTRAVENOUS DRIP", "INTRAVENOUS INFUSION")
#: Routes whose administrations are instantaneous (no length needed).
BOLUS_ROUTES = ("INTRAVENOUS BOLUS",)
#: Specimens whose concentrations are the systemic levels the model describes.
SYSTEMIC_SPECIMENS = ("PLASMA", "SERUM", "BLOOD", "WHOLE BLOOD")
#: A placebo (or vehicle, sham) treatment or arm, by its words.
PLACEBO = re.compile(r"\b(?:PLACEBO|VEHICLE|SHAM)\b", re.IGNORECASE)

_ONCE = {"", "ONCE", "CONTINUOUS", "SINGLE", "1 TIME", "ONE TIME"}
_FIXED = {"QD": 24.0, "DAILY": 24.0, "BID": 12.0, "TID": 8.0, "QID": 6.0, "QOD": 48.0,
          "QH": 1.0, "QW": 168.0, "EVERY WEEK": 168.0, "QWK": 168.0}
_EVERY = re.compile(r"^Q(\d+(?:\.\d+)?)(H|D|W|WK)$")
_STEP = {"H": 1.0, "D": 24.0, "W": 168.0, "WK": 168.0}
#: How pkcalc spaces the administrations of a term that says "times a day".
SPACING_NOTE = {"BID": "twice a day taken as every 12 h", "TID": "three times a day taken as "
                "every 8 h", "QID": "four times a day taken as every 6 h"}


def frequency_hours(term: str) -> float | None:
    """Hours between administrations for a frequency term; None for a single
    administration (``ONCE``, ``CONTINUOUS``, empty).

    Raises
    ------
    ValueError
        For a term that cannot be expanded into administration times (``PRN``,
        ``QM``, ``UNKNOWN``, anything unknown), with the reason.

    Examples
    --------
    >>> frequency_hours("QD"), frequency_hours("Q12H"), frequency_hours("ONCE")
    (24.0, 12.0, None)
    """
    t = " ".join(str(term).strip().upper().split())
    if t in _ONCE:
        return None
    if t in _FIXED:
        return _FIXED[t]
    m = _EVERY.match(t)
    if m and float(m.group(1)) > 0:
        return float(m.group(1)) * _STEP[m.group(2)]
    if t == "PRN":
        raise ValueError("'PRN' (as needed) gives no administration times")
    if re.fullmatch(r"Q\d*M|MONTHLY|EVERY MONTH", t):
        raise ValueError(f"'{term}': a month has no fixed length in hours")
    raise ValueError(f"'{term}' is not a frequency term pkcalc can expand")


_DURATION = re.compile(
    r"^(-)?P(?:(\d+(?:[.,]\d+)?)Y)?(?:(\d+(?:[.,]\d+)?)M)?(?:(\d+(?:[.,]\d+)?)W)?"
    r"(?:(\d+(?:[.,]\d+)?)D)?(?:T(?:(\d+(?:[.,]\d+)?)H)?(?:(\d+(?:[.,]\d+)?)M)?"
    r"(?:(\d+(?:[.,]\d+)?)S)?)?$")


def iso_duration_hours(text: str) -> float:
    """Hours of an ISO 8601 duration such as ``PT1H30M``, ``P1D`` or ``-PT15M``.

    Raises
    ------
    ValueError
        When the text is not a duration, or uses years or months.

    Examples
    --------
    >>> iso_duration_hours("PT1H30M"), iso_duration_hours("-PT15M"), iso_duration_hours("P1D")
    (1.5, -0.25, 24.0)
    """
    s = str(text).strip().upper()
    m = _DURATION.match(s)
    if not m or s in ("P", "PT", "-P", "-PT") or s.endswith("T"):
        raise ValueError(f"'{text}' is not an ISO 8601 duration such as 'PT1H' or 'PT30M'")
    sign, years, months, weeks, days, hours, minutes, seconds = m.groups()
    if years or months:
        raise ValueError(f"'{text}': years and months have no fixed length in hours")

    def num(x: str | None) -> float:
        return float(x.replace(",", ".")) if x else 0.0

    h = 168 * num(weeks) + 24 * num(days) + num(hours) + num(minutes) / 60 + num(seconds) / 3600
    if not math.isfinite(h):
        raise ValueError(f"'{text}' is not a finite duration")
    return -h if sign else h


_TOKEN = re.compile(r"[A-Za-zµμ]+")
_SPELLING = {
    "g": "g", "mg": "mg", "ug": "ug", "µg": "ug", "μg": "ug", "mcg": "ug", "ng": "ng",
    "pg": "pg", "kg": "kg", "lb": "lb", "lbs": "lb", "l": "L", "ml": "mL", "dl": "dL",
    "ul": "uL", "µl": "uL", "μl": "uL", "h": "h", "hr": "h", "hrs": "h", "hour": "h",
    "hours": "h", "min": "min", "d": "d", "day": "d", "days": "d", "s": "s", "sec": "s",
    "cm": "cm", "m": "m", "mm": "mm", "in": "inch", "mol": "mol", "mmol": "mmol",
    "umol": "umol", "µmol": "umol", "μmol": "umol", "nmol": "nmol",
}


def normalise_unit(text: str) -> str:
    """A CDISC unit spelling as pint reads it: tokens matched without regard to case
    (``NG/ML`` -> ``ng/mL``, ``LB`` -> ``lb``), the micro and Greek mu signs as ``u``,
    ``m2`` as ``m**2``.

    Examples
    --------
    >>> normalise_unit("NG/ML"), normalise_unit("μg/mL"), normalise_unit("kg/m2")
    ('ng/mL', 'ug/mL', 'kg/m**2')
    """
    s = str(text).strip()

    def word(m: re.Match) -> str:
        w = m.group(0)
        return _SPELLING.get(w.lower(), w)

    s = _TOKEN.sub(word, s)
    return re.sub(r"([A-Za-z])([23])\b", r"\1**\2", s)


def _key(x: str) -> str:
    return re.sub(r"[^A-Z0-9]", "", str(x).upper())


def analyte_is_treatment(treatment: str, code: str, name: str = "") -> bool:
    """True when the analyte (PCTESTCD ``code``, PCTEST ``name``) is the dosed treatment
    by name: the same name (letters and digits), or the code an abbreviation that starts
    the treatment's name; an analyte whose name says metabolite never is.

    Examples
    --------
    >>> analyte_is_treatment("ORVEXAMIDE", "ORVX", "Orvexamide")
    True
    >>> analyte_is_treatment("ORVEXAMIDE", "ORVM1", "Orvexamide metabolite M1")
    False
    """
    if "METABOLITE" in str(name).upper():
        return False
    t = _key(treatment)
    return bool(t) and (_key(name) == t or (bool(_key(code)) and t.startswith(_key(code))))
