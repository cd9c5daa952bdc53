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

import re
from collections.abc import Iterable
from datetime import datetime

from .errors import PkcalcInputError

__all__ = ["ISO_FORM", "hours_since", "is_clock", "parse_clock", "same_kind"]

#: The accepted form, for messages.
ISO_FORM = "an ISO 8601 date-time such as '2026-03-04T08:15' (offset optional: '+01:00')"

_ISO = re.compile(r"^\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}(:\d{2}(\.\d+)?)?(Z|[+-]\d{2}:?\d{2})?$")
_LOOKS_LIKE_DATE = re.compile(r"\d{1,4}[-/.]\d{1,2}[-/.]\d{1,4}|^\d{4}-\d{2}-\d{2}$|^\d{1,2}:\d{2}")


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
            why = "not an ISO 8601 date-time"
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
