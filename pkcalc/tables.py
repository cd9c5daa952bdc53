"""Reading CSV tables the same way everywhere (study tables, batch tables).

One set of rules, one set of messages:

- the path must be a file (a folder, a missing or an empty file is refused);
- text is UTF-8, with or without a byte-order mark; anything else is refused with
  the position of the first byte that is not UTF-8;
- every column name appears once (pandas would silently rename a duplicate);
- a row with more cells than the header is refused with its line number (pandas
  would otherwise take the first column as an index and shift every column), with a
  word on decimal commas;
- a header that is one column holding semicolons or tabs (a spreadsheet's regional
  CSV) is refused saying so.
"""

from __future__ import annotations

import csv
import re
import warnings
from collections.abc import Iterator
from pathlib import Path

from .errors import PkcalcInputError, Problem

__all__ = ["check_input_file", "read_csv", "read_csv_chunks", "read_header"]

ENCODING = "utf-8-sig"
_DECIMAL_COMMA = " (a decimal comma, as in '0,5', splits a number in two)"
_COMMA_SEPARATED = ("a CSV table with commas between cells and '.' as the decimal mark "
                    "(a spreadsheet's 'CSV (comma delimited)')")


def check_input_file(path: str | Path, what: str = "a CSV table with a header row") -> Path:
    """The path as a :class:`~pathlib.Path` when it is a non-empty file."""
    p = Path(path)
    if p.is_dir():
        raise PkcalcInputError("is a folder, not a file", file=str(path), expected=what)
    if not p.is_file():
        if p.is_symlink():
            raise PkcalcInputError("a symbolic link that leads nowhere (a loop, or its target "
                                   "is missing)", file=str(path), expected=what)
        raise PkcalcInputError("file not found", file=str(path), expected=what)
    if p.stat().st_size == 0:
        raise PkcalcInputError("the file is empty (0 bytes)", file=str(path), expected=what)
    return p


def _not_utf8(path: str | Path, exc: UnicodeDecodeError) -> PkcalcInputError:
    return PkcalcInputError(
        f"is not UTF-8 text (byte 0x{exc.object[exc.start]:02x} at position {exc.start} of "
        "the block read)", file=str(path), expected="a table saved as UTF-8 (with or without "
        "a byte-order mark)")


def read_header(path: str | Path, *, named: bool = False) -> list[str]:
    """Column names of the first line, checked for duplicates and encoding.  With
    ``named`` (study tables) every column up to the last named one needs a name; the
    unnamed ones after it (a spreadsheet's empty columns) are left to the caller to
    check that they hold nothing.  Without it (batch tables, which carry unknown columns
    through) an unnamed column is one more column."""
    p = check_input_file(path)
    try:
        with open(p, encoding=ENCODING, newline="") as fh:
            header = next(csv.reader(fh), [])
    except UnicodeDecodeError as exc:
        raise _not_utf8(path, exc) from None
    except csv.Error as exc:
        raise PkcalcInputError(f"not a readable CSV header ({exc})", file=str(path)) from None
    names = [h.strip() for h in header]
    if not any(names):
        raise PkcalcInputError("the first line has no column names", file=str(path),
                               expected="a CSV table with a header row")
    for sep, word in ((";", "semicolons"), ("\t", "tabs")):
        if len(names) == 1 and sep in names[0]:
            # a spreadsheet saved with its regional list separator (and often decimal
            # commas): read as one column, every row would be misread or refused
            shown = names[0][:60].replace("\t", " ")
            raise PkcalcInputError(
                f"the header is one column, '{shown}': the table is separated by {word}, "
                "not commas", file=str(path), expected=_COMMA_SEPARATED)
    checked = names
    if named:
        last_named = max(i for i, n in enumerate(names) if n)
        for i, name in enumerate(names[:last_named]):
            if not name:
                raise PkcalcInputError(
                    f"column {i + 1} has no name in the header", file=str(path),
                    field=f"column {i + 1}", expected="a name for every column (empty "
                    "columns a spreadsheet added at the end can be deleted)")
        checked = names[:last_named + 1]
    seen: set[str] = set()
    problems = []
    for name in checked:
        key = name.lower()
        if key in seen:
            problems.append(Problem(f"column '{name}' appears twice in the header",
                                    file=str(path), field=name,
                                    expected="each column once"))
        seen.add(key)
    if problems:
        raise PkcalcInputError(problems)
    return names


def _translate(path: str | Path, exc: BaseException, n_columns: int) -> PkcalcInputError:
    import pandas as pd

    if isinstance(exc, UnicodeDecodeError):
        return _not_utf8(path, exc)
    if isinstance(exc, pd.errors.ParserWarning):
        return PkcalcInputError(f"a row has more cells than the header's {n_columns} "
                                f"columns{_DECIMAL_COMMA}", file=str(path),
                                expected="as many cells in every row as column names")
    text = str(exc).splitlines()[0] if str(exc) else exc.__class__.__name__
    counts = re.search(r"Expected (\d+) fields in line (\d+), saw (\d+)", text)
    if counts:
        n, line, seen = counts.groups()
        return PkcalcInputError(f"line {line} has more cells ({seen}) than the header's {n} columns"
                                f"{_DECIMAL_COMMA}", file=str(path),
                                expected="as many cells in every row as column names")
    if "Expected" in text and "fields" in text:
        return PkcalcInputError(f"a row has more cells than the header ({text})",
                                file=str(path),
                                expected="as many cells in every row as column names")
    return PkcalcInputError(f"not a readable CSV table ({text})", file=str(path))


def read_csv(path: str | Path, **kwargs):
    """The whole table as a DataFrame, under the rules of this module."""
    import pandas as pd

    header = read_header(path, named=True)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", pd.errors.ParserWarning)
            frame = pd.read_csv(path, encoding=ENCODING, index_col=False, **kwargs)
    except (pd.errors.ParserError, pd.errors.ParserWarning, pd.errors.EmptyDataError,
            UnicodeDecodeError, ValueError) as exc:
        raise _translate(path, exc, len(header)) from None
    return _without_empty_columns(frame, header, path)


def _without_empty_columns(frame, header: list[str], path: str | Path):
    """The frame without the unnamed columns at the end of the header, which must hold
    nothing (a spreadsheet's empty columns); one with a value is refused with its line."""
    import pandas as pd

    n_named = max(i for i, n in enumerate(header) if n) + 1
    if n_named == len(header):
        return frame
    extra = frame.iloc[:, n_named:]
    filled = extra.notna() & (extra.astype(str).apply(lambda c: c.str.strip()) != "")
    if filled.to_numpy().any():
        row, col = (int(x[0]) for x in filled.to_numpy().nonzero())
        value = extra.iat[row, col]
        raise PkcalcInputError(
            f"column {n_named + col + 1} has no name in the header but holds '{value}' "
            f"(line {row + 2})", file=str(path), field=f"column {n_named + col + 1}",
            expected="a name for every column that holds values")
    return pd.DataFrame(frame.iloc[:, :n_named])


def read_csv_chunks(path: str | Path, chunksize: int, **kwargs) -> Iterator:
    """The table in chunks of ``chunksize`` rows; problems surface as
    :class:`PkcalcInputError` when the chunk holding them is read."""
    import pandas as pd

    header = read_header(path)

    ragged = kwargs.get("on_bad_lines") == "warn"   # the caller records long rows

    def gen():
        try:
            with warnings.catch_warnings():
                if not ragged:
                    warnings.simplefilter("error", pd.errors.ParserWarning)
                reader = pd.read_csv(path, encoding=ENCODING, index_col=False,
                                     chunksize=chunksize, **kwargs)
                yield from reader
        except (pd.errors.ParserError, pd.errors.ParserWarning, pd.errors.EmptyDataError,
                UnicodeDecodeError, ValueError) as exc:
            raise _translate(path, exc, len(header)) from None
    return gen()
