"""Exceptions and warnings raised at pkcalc's boundary.

Every problem with user input is a :class:`Problem` with the place it was found
(file, item such as a scenario, row or subject, and field), what is wrong and
what was expected.  :class:`PkcalcInputError` carries one or more problems; the
command line prints them one per line and exits with code 2.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

__all__ = ["PkcalcInputError", "PkcalcWarning", "Problem", "check_path", "check_type"]


@dataclass(frozen=True)
class Problem:
    """One thing wrong with an input, with its location.

    Attributes
    ----------
    message : str
        What is wrong, including the offending value.
    file : str or None
        The input file, when there is one.
    item : str or None
        The scenario, row, subject or case, e.g. ``"scenario 'ward A'"``, ``"row 12"``.
    field : str or None
        The field or column, e.g. ``"clearance"`` or ``"doses[1].duration"``.
    expected : str or None
        What would have been accepted.
    """

    message: str
    file: str | None = None
    item: str | None = None
    field: str | None = None
    expected: str | None = None

    def __str__(self) -> str:
        where = [p for p in (self.file, self.item) if p]
        if self.field:
            where.append(f"field '{self.field}'")
        text = ": ".join([*where, self.message])
        if self.expected:
            text += f" (expected {self.expected})"
        return text

    def to_dict(self) -> dict[str, str | None]:
        """The problem as a JSON-ready mapping."""
        return {
            "file": self.file,
            "item": self.item,
            "field": self.field,
            "message": self.message,
            "expected": self.expected,
        }


class PkcalcInputError(ValueError):
    """Input that pkcalc cannot use, with every problem found.

    Parameters
    ----------
    problems : str, Problem or sequence of Problem
        What is wrong.  A plain string becomes one problem with the keyword fields.
    file, item, field, expected : str, optional
        Location used when ``problems`` is a string.
    """

    def __init__(
        self,
        problems: str | Problem | list[Problem] | tuple[Problem, ...],
        *,
        file: str | None = None,
        item: str | None = None,
        field: str | None = None,
        expected: str | None = None,
    ) -> None:
        if isinstance(problems, Problem):
            problems = [problems]
        elif not isinstance(problems, list | tuple) or not all(
                isinstance(p, Problem) for p in problems):
            problems = [Problem(str(problems), file=file, item=item, field=field,
                                expected=expected)]
        self.problems: list[Problem] = list(problems)
        super().__init__(str(self))

    def __str__(self) -> str:
        return "\n".join(str(p) for p in self.problems)

    def located(self, *, file: str | None = None, item: str | None = None) -> PkcalcInputError:
        """A copy whose problems carry ``file`` / ``item`` where they had none."""
        return PkcalcInputError(
            [
                replace(p, file=p.file or file, item=p.item or item)
                for p in self.problems
            ]
        )


class PkcalcWarning(UserWarning):
    """A plausibility or data-quality warning (the result is still produced)."""


def check_type(value, kinds, field: str, expected: str) -> None:
    """Refuse a value of the wrong type where a public function receives it (a
    :class:`PkcalcInputError` naming the field, never a bare ``TypeError`` later)."""
    kinds = kinds if isinstance(kinds, tuple) else (kinds,)
    if not isinstance(value, kinds) or (isinstance(value, bool) and bool not in kinds):
        raise PkcalcInputError(f"got {type(value).__name__} {_short_repr(value)}",
                               field=field, expected=expected)


def check_path(value, field: str = "path") -> None:
    """Refuse anything but a path (``str`` or ``os.PathLike``)."""
    import os

    check_type(value, (str, os.PathLike), field, "a file path (str or pathlib.Path)")


def _short_repr(value) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."



def check_numbers(values: dict, optional: tuple[str, ...] = ()) -> None:
    """Refuse arguments that are not real numbers (``optional`` ones may be None):
    a :class:`PkcalcInputError` naming the first such field."""
    import math
    import numbers

    for name, x in values.items():
        if x is None and name in optional:
            continue
        if isinstance(x, bool) or not isinstance(x, numbers.Real) or not math.isfinite(x):
            raise PkcalcInputError(f"got {type(x).__name__} {_short_repr(x)}", field=name,
                                   expected="a finite number" + (" or None" if name in optional
                                                                 else ""))
