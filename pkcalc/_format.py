"""Plain-text formatting shared by result ``summary()`` methods and reports."""

from __future__ import annotations

import html
import math
from collections.abc import Sequence
from typing import Any

#: The clinical-use caution carried by every human-facing output.
CAUTION = (
    "CAUTION: These results are model estimates for research and review. They assume "
    "linear one-compartment kinetics and the inputs as given. They are not dosing orders: "
    "dosing decisions belong to licensed clinicians and pharmacists following local "
    "protocols and product labelling. Check every number before any clinical use."
)

#: One-line form for plot footers.
CAUTION_SHORT = (
    "Model estimates for research and review only; dosing decisions belong to licensed "
    "clinicians and pharmacists under local protocols."
)


def result_html(summary: str, frame: Any = None, *, caution: bool = True) -> str:
    """Notebook view of a result: the caution (unless ``summary`` starts with it), the
    table (if any) and the summary text."""
    table = frame.to_html(index=False, na_rep="", float_format=lambda x: f"{x:.4g}") \
        if frame is not None else ""
    head = f"<p><strong>{html.escape(CAUTION_SHORT)}</strong></p>" if caution else ""
    return f'<div class="pkcalc-result">{head}{table}<pre>{html.escape(summary)}</pre></div>'

def with_caution(text: str, caution: bool = True) -> str:
    """``text`` after the caution (every human-facing summary starts with it), or
    ``text`` alone for reports that print the caution themselves."""
    if not caution:
        return text
    import textwrap

    return textwrap.fill(CAUTION, 78) + "\n\n" + text


__all__ = ["fmt", "format_table", "short", "with_caution"]


def fmt(value: object, digits: int = 4) -> str:
    """A number to ``digits`` significant figures; None/NaN as '-'; others as str.

    Examples
    --------
    >>> fmt(3.14159), fmt(None), fmt(1234567.0), fmt(0.000123456)
    ('3.142', '-', '1.235e+06', '0.0001235')
    """
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float) or hasattr(value, "__float__"):
        try:
            x = float(value)  # type: ignore[arg-type]
        except (TypeError, ValueError):
            return str(value)
        if math.isnan(x):
            return "-"
        if math.isinf(x):
            return "inf" if x > 0 else "-inf"
        if x == 0:
            return "0"
        mag = math.floor(math.log10(abs(x)))
        if mag >= 6 or mag < -5:
            return f"{x:.{digits - 1}e}"
        decimals = max(digits - 1 - mag, 0)
        return f"{x:.{decimals}f}"
    return str(value)


def short(value: object, digits: int = 4) -> str:
    """A number in running text: ``digits`` significant figures, no trailing zeros.

    Examples
    --------
    >>> short(0.5), short(12.0), short(9.80321), short(None)
    ('0.5', '12', '9.803', '-')
    """
    if value is None:
        return "-"
    try:
        x = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return str(value)
    return "-" if math.isnan(x) else f"{x:.{digits}g}"


def format_table(headers: Sequence[str], rows: Sequence[Sequence[object]],
                 *, digits: int = 4) -> str:
    """An aligned plain-text table: text left-aligned, numbers right-aligned.

    Examples
    --------
    >>> print(format_table(["name", "value [mg/L]"], [["a", 1.5], ["bb", 10.25]]))
    name  value [mg/L]
    ----  ------------
    a            1.500
    bb           10.25
    """
    cells = [[fmt(c, digits) for c in row] for row in rows]
    numeric = [
        all((isinstance(row[j], int | float) and not isinstance(row[j], bool)) or row[j] is None
            for row in rows) if rows else False
        for j in range(len(headers))
    ]
    widths = [
        max([len(h), *(len(r[j]) for r in cells)]) for j, h in enumerate(headers)
    ]

    def line(values: Sequence[str], is_header: bool = False) -> str:
        parts = []
        for j, v in enumerate(values):
            right = numeric[j]
            parts.append(v.rjust(widths[j]) if right else v.ljust(widths[j]))
        return "  ".join(parts).rstrip()

    out = [line(headers, True), "  ".join("-" * w for w in widths)]
    out += [line(r) for r in cells]
    return "\n".join(out)


def format_table_fit(headers: Sequence[str], rows: Sequence[Sequence[object]], *,
                     width: int = 100, keep: int = 1, digits: int = 4) -> str:
    """:func:`format_table`, split into several tables of at most ``width`` columns
    when it is wider (the first ``keep`` columns repeated in each part)."""
    whole = format_table(headers, rows, digits=digits)
    if max(len(line) for line in whole.splitlines()) <= width or len(headers) <= keep + 1:
        return whole
    cells = [[fmt(c, digits) for c in row] for row in rows]
    col_width = [max([len(h), *(len(r[j]) for r in cells)]) + 2 for j, h in enumerate(headers)]
    base = sum(col_width[:keep])
    parts, current, used = [], [], base
    for j in range(keep, len(headers)):
        if current and used + col_width[j] > width:
            parts.append(current)
            current, used = [], base
        current.append(j)
        used += col_width[j]
    parts.append(current)
    tables = []
    for group in parts:
        cols = list(range(keep)) + group
        tables.append(format_table([headers[j] for j in cols],
                                   [[row[j] for j in cols] for row in rows], digits=digits))
    return "\n\n".join(tables)
