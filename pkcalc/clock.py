"""Clock times (ISO 8601 date-times) at the file boundary.

A clock time has a date and a time of day, to the minute at least:
``2026-03-04T08:15``, ``2026-03-04 08:15:30``, with an optional offset
(``+01:00``, ``Z``).  Anything else is refused, in particular a date without a
time, a time without a date, and day-first or month-first forms such as
``04/03/2026`` (which cannot be told apart).  Within one subject (or scenario)
either every clock time has an offset or none has: mixing them would make the
hours between them depend on a time zone nobody stated.  Hours are counted from
an origin (a subject's first dose) with :func:`hours_since`.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime

import numpy as np

from .errors import PkcalcInputError

__all__ = ["ISO_FORM", "ClockArray", "clock_text", "hours_since", "is_clock", "parse_clock",
           "parse_clock_array", "same_kind"]

#: The accepted form, for messages.
ISO_FORM = "an ISO 8601 date-time such as '2026-03-04T08:15' (offset optional: '+01:00')"

_ISO = re.compile(r"^\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}(:\d{2}(\.\d+)?)?(Z|[+-]\d{2}:?\d{2})?$")
_LOOKS_LIKE_DATE = re.compile(r"\d{1,4}[-/.]\d{1,2}[-/.]\d{1,4}|^\d{4}-\d{2}-\d{2}$|^\d{1,2}:\d{2}")


_ZONE_NAME = re.compile(r"^\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}(:\d{2}(\.\d+)?)?"
                        r"\s*[A-Za-z][A-Za-z_/+-]*$")
_ONE_DIGIT_HOUR = re.compile(r"^\d{4}-\d{2}-\d{2}[T ]\d:\d{2}")


def _near_miss(text: str) -> str | None:
    """Why an almost-ISO 8601 date-time is refused, in words (None for other text)."""
    if _ZONE_NAME.match(text):
        return ("a time-zone name cannot be read (abbreviations such as CST stand for "
                "several zones): write the offset, e.g. +01:00, or Z for UTC")
    if _ONE_DIGIT_HOUR.match(text):
        return "the hour needs two digits (09:15, not 9:15)"
    return None


def is_clock(text: object) -> bool:
    """True when ``text`` is written like a date or a time (accepted or not)."""
    return isinstance(text, str) and bool(_LOOKS_LIKE_DATE.search(text.strip()))


def parse_clock(text: object, *, field: str | None = None) -> datetime:
    """A date-time from its ISO 8601 text (see the module docstring).

    Examples
    --------
    >>> parse_clock("2026-03-04T08:15").hour
    8
    """
    s = str(text).strip()
    if not _ISO.match(s):
        if re.fullmatch(r"\d{4}-\d{2}-\d{2}", s):
            why = "a date without a time of day"
        elif re.fullmatch(r"\d{1,2}:\d{2}(:\d{2})?", s):
            why = "a time of day without a date"
        elif re.search(r"\d{1,2}[/.]\d{1,2}[/.]\d{2,4}", s):
            why = "day-first and month-first dates cannot be told apart"
        else:
            why = _near_miss(s) or "not an ISO 8601 date-time"
        raise PkcalcInputError(f"'{s}': {why}", field=field, expected=ISO_FORM)
    try:
        return datetime.fromisoformat(s.replace("Z", "+00:00"))
    except ValueError:
        raise PkcalcInputError(f"'{s}' is not a valid date-time", field=field,
                               expected=ISO_FORM) from None


def same_kind(times: Iterable[datetime], *, field: str | None = None) -> None:
    """Refuse a mix of date-times with and without an offset."""
    kinds = {t.tzinfo is not None for t in times}
    if len(kinds) > 1:
        raise PkcalcInputError("some date-times have a time-zone offset and some do not: the "
                               "hours between them would be a guess", field=field,
                               expected="an offset on every date-time, or on none")


def hours_since(t: datetime, origin: datetime) -> float:
    """Hours from ``origin`` to ``t`` (exact across offsets, e.g. a daylight-saving change
    written with offsets)."""
    return (t - origin).total_seconds() / 3600.0


# --------------------------------------------------------------------------- many at once
#: Precision of an ISO 8601 date-time (ISO 8601 allows reduced precision; CDISC SDTM
#: records it as written).  Ordered: a comparison ``>= MINUTE`` asks for a time of day
#: to the minute at least.
EMPTY, INVALID, YEAR, MONTH, DATE, HOUR, MINUTE = range(7)
PRECISION_WORDS = {EMPTY: "empty", INVALID: "not an ISO 8601 date-time", YEAR: "a year only",
                   MONTH: "a year and month only", DATE: "a date without a time of day",
                   HOUR: "a time of day without minutes", MINUTE: "a date and time"}

_PARTS = re.compile(r"^(\d{4})(?:-(\d{2})(?:-(\d{2})(?:[T ](\d{2})(?::(\d{2})"
                    r"(?::(\d{2})(\.\d+)?)?)?)?)?)?(Z|[+-]\d{2}(?::?\d{2})?)?$")
_DAYS_IN_MONTH = (31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31)


def _days_from_civil(y: int, m: int, d: int) -> int:
    """Days since 1970-01-01 of a proleptic Gregorian date (H. Hinnant's algorithm,
    'chrono-compatible low-level date algorithms', from memory; checked against
    ``datetime.date.toordinal`` in the tests)."""
    y -= m <= 2
    era = y // 400
    yoe = y - era * 400
    doy = (153 * (m + (-3 if m > 2 else 9)) + 2) // 5 + d - 1
    doe = yoe * 365 + yoe // 4 - yoe // 100 + doy
    return era * 146097 + doe - 719468


def _one(text: str) -> tuple[float, bool, int]:
    """(seconds, has offset, precision) of one date-time text."""
    s = text.strip()
    if not s:
        return math.nan, False, EMPTY
    m = _PARTS.match(s)
    if m is None:
        return math.nan, False, INVALID
    y, mo, d, hh, mi, ss, frac, off = m.groups()
    if mo is None:
        return math.nan, False, YEAR
    month = int(mo)
    if not 1 <= month <= 12:
        return math.nan, False, INVALID
    if d is None:
        return math.nan, False, MONTH
    year, day = int(y), int(d)
    leap = year % 4 == 0 and (year % 100 != 0 or year % 400 == 0)
    if not 1 <= day <= _DAYS_IN_MONTH[month - 1] + (month == 2 and leap):
        return math.nan, False, INVALID
    seconds = 86400.0 * _days_from_civil(year, month, day)
    if hh is None:
        return seconds, off is not None, DATE
    hour = int(hh)
    minute = int(mi) if mi is not None else 0
    second = (int(ss) if ss is not None else 0) + (float(frac) if frac else 0.0)
    if hour > 23 or minute > 59 or second >= 60:
        return math.nan, False, INVALID
    seconds += 3600.0 * hour + 60.0 * minute + second
    if off is not None and off != "Z":
        sign = -1.0 if off[0] == "-" else 1.0
        digits = off[1:].replace(":", "")
        seconds -= sign * (3600.0 * int(digits[:2]) + 60.0 * int(digits[2:4] or 0))
    return seconds, off is not None, (MINUTE if mi is not None else HOUR)


@dataclass(frozen=True)
class ClockArray:
    """Many ISO 8601 date-times at once.

    Attributes
    ----------
    seconds : ndarray of float
        Seconds since 1970-01-01T00:00 -- UTC for date-times with an offset, the
        wall clock as written otherwise (NaN when there is no date).  A date
        without a time gives its midnight.
    offset : ndarray of bool
        True where the text carries a time-zone offset (or ``Z``).
    precision : ndarray of int
        :data:`EMPTY`, :data:`INVALID`, :data:`YEAR`, :data:`MONTH`, :data:`DATE`,
        :data:`HOUR` or :data:`MINUTE` (to the minute or better).
    """

    seconds: np.ndarray
    offset: np.ndarray
    precision: np.ndarray

    def why(self, i: int, text: str) -> str:
        """Why the ``i``-th value is not a date-time to the minute, in words."""
        p = int(self.precision[i])
        if p == INVALID and re.search(r"\d{1,2}[/.]\d{1,2}[/.]\d{2,4}", text):
            return f"'{text}': day-first and month-first dates cannot be told apart"
        if p == INVALID and re.fullmatch(r"\d{1,2}:\d{2}(:\d{2})?", text.strip()):
            return f"'{text}': a time of day without a date"
        if p == INVALID and (near := _near_miss(text.strip())) is not None:
            return f"'{text}': {near}"
        return f"'{text}': {PRECISION_WORDS[p]}"


_PLAIN = (("%Y-%m-%dT%H:%M", r"^\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}$"),
          ("%Y-%m-%dT%H:%M:%S", r"^\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}:\d{2}$"))


def parse_clock_array(texts) -> ClockArray:
    """Parse many ISO 8601 date-times: the plain forms without an offset
    (``2026-03-04T08:15``, with seconds, ``T`` or a space) by pyarrow's parser, checked
    so that an impossible date (30 February) is not rolled over; everything else one by
    one (each distinct text once).

    Examples
    --------
    >>> a = parse_clock_array(["2026-03-04T08:15", "2026-03-04", "", "04/03/2026"])
    >>> [int(p) for p in a.precision] == [MINUTE, DATE, EMPTY, INVALID]
    True
    >>> float(a.seconds[0] - a.seconds[1]) / 3600
    8.25
    """
    import pandas as pd
    import pyarrow as pa
    import pyarrow.compute as pc

    if isinstance(texts, pd.Series):
        arr = pa.array(texts.astype("string[pyarrow]"), type=pa.string())
    else:
        arr = pa.array(["" if t is None else str(t) for t in texts], type=pa.string())
    arr = pc.utf8_trim_whitespace(pc.fill_null(arr, ""))
    n = len(arr)
    seconds = np.full(n, np.nan)
    offset = np.zeros(n, bool)
    precision = np.full(n, -1, dtype=int)
    dashed = pc.replace_substring(arr, " ", "T", max_replacements=1)
    for fmt, pattern in _PLAIN:
        match = pc.match_substring_regex(arr, pattern)
        stamps = pc.strptime(pc.if_else(match, dashed, pa.scalar(None, pa.string())),
                             format=fmt, unit="s", error_is_null=True)
        day = pc.cast(pc.if_else(match, pc.utf8_slice_codeunits(arr, 8, 10), "00"),
                      pa.int64())
        same_day = pc.equal(pc.day(stamps), day)
        ok = pc.fill_null(pc.and_(match, same_day), False).to_numpy(zero_copy_only=False)
        where = ok & (precision < 0)
        seconds[where] = pc.cast(stamps, pa.int64()).to_numpy(zero_copy_only=False)[where]
        precision[where] = MINUTE
    rest = np.flatnonzero(precision < 0)
    if rest.size:
        values = pd.Series(arr.take(pa.array(rest)).to_numpy(zero_copy_only=False),
                           dtype=object)
        codes, uniq = pd.factorize(values)
        parsed = [_one(u) for u in uniq]
        for j, (sec, off, prec) in enumerate(parsed):
            at = rest[codes == j]
            seconds[at], offset[at], precision[at] = sec, off, prec
    return ClockArray(seconds, offset, precision)


def clock_text(seconds: float, offset: bool = False) -> str:
    """The ISO 8601 text of a :attr:`ClockArray.seconds` value (UTC with ``Z`` when
    ``offset``)."""
    from datetime import timedelta

    t = datetime(1970, 1, 1) + timedelta(seconds=float(seconds))
    return t.isoformat(timespec="seconds") + ("Z" if offset else "")
