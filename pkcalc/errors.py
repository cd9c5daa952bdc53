"""Exceptions and warnings raised at pkcalc's boundary.

Every problem with user input is a :class:`Problem` with the place it was found
(file, item such as a scenario, row or subject, and field), what is wrong and
what was expected.  :class:`PkcalcInputError` carries one or more problems; the
command line prints them one per line and exits with code 2.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

__all__ = ["PkcalcInputError", "PkcalcWarning", "Problem"]


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
        if isinstance(problems, str):
            problems = [Problem(problems, file=file, item=item, field=field, expected=expected)]
        elif isinstance(problems, Problem):
            problems = [problems]
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
