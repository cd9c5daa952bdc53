"""Caution, unit conversion for display, JSON envelope, atomic file writes."""

from __future__ import annotations

import json
import math
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

import numpy as np

from .. import __version__, glossary
from .._format import CAUTION, CAUTION_SHORT, fmt  # noqa: F401  (one text, used everywhere)
from ..units import CANONICAL, display_factor

#: Profiles with at most this many points are printed in full on the terminal.
PROFILE_ROWS = 25

_BOLD, _RED, _RESET = "\033[1m", "\033[31m", "\033[0m"


def _wrap(text: str, width: int) -> list[str]:
    import textwrap

    return textwrap.wrap(text, width)


def caution_block(colour: bool = False, width: int = 78, extra: str | None = None) -> str:
    """The caution as a boxed block for the top of terminal output."""
    lines = _wrap(CAUTION, width - 4)
    if extra:
        lines += ["", *_wrap(extra, width - 4)]
    bar = "!" * width
    body = [f"! {line.ljust(width - 4)} !" for line in lines]
    block = "\n".join([bar, *body, bar])
    return f"{_BOLD}{_RED}{block}{_RESET}" if colour else block


class UnitConverter:
    """Converts canonical numbers to display units.

    Parameters
    ----------
    units : mapping of kind to unit text, optional
        Display units; kinds not given stay canonical.
    """

    def __init__(self, units: Mapping[str, str | None] | None = None) -> None:
        chosen = {k: v for k, v in (units or {}).items() if v}
        self.units: dict[str, str] = {
            k: chosen.get(k, CANONICAL[k])
            for k in ("time", "amount", "volume", "concentration", "clearance", "rate",
                      "elimination_rate")
        }
        self._factor = {k: display_factor(u, k) for k, u in self.units.items()}
        self.units["auc"] = glossary.area_unit(self.units["concentration"], self.units["time"])
        self._factor["auc"] = self._factor["concentration"] * self._factor["time"]
        self.units["aumc"] = glossary.area_unit(self.units["concentration"], self.units["time"],
                                                2)
        self._factor["aumc"] = self._factor["auc"] * self._factor["time"]

    def __call__(self, value: Any, kind: str) -> Any:
        """Convert a number, array or None from canonical to the display unit of ``kind``."""
        if value is None:
            return None
        factor = self._factor[kind]
        if isinstance(value, np.ndarray):
            return value * factor
        return float(value) * factor

    def unit(self, kind: str) -> str:
        return self.units[kind]


def plain_value(value: Any) -> str:
    """A setting in words: yes/no, "not set", lists and tables without Python syntax."""
    if value is None:
        return "not set"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, list | tuple):
        return ", ".join(plain_value(v) for v in value) or "none"
    if isinstance(value, dict):
        return "; ".join(f"{k.replace('_', ' ')} {plain_value(v)}" for k, v in value.items()) \
            or "none"
    if isinstance(value, float):
        return fmt(value)
    return str(value).replace("_", " ")


def settings_lines(settings: dict[str, Any]) -> list[str]:
    """The settings of a run as plain lines (``weighting: not set``, ``adequacy: yes``)."""
    return [f"{k.replace('_', ' ')}: {plain_value(v)}" for k, v in settings.items()]


def settings_line(settings: dict[str, Any]) -> str:
    """The settings of a run on one line of terminal text, in the same words as the HTML."""
    return "Settings: " + "; ".join(settings_lines(settings))


def json_number(x: Any) -> Any:
    """JSON-safe number: NaN/inf -> None, numpy -> float."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def json_list(a: Iterable[float]) -> list[Any]:
    return [json_number(v) for v in a]


def json_document(kind: str, units: UnitConverter | None, body: dict[str, Any]) -> dict[str, Any]:
    """The common envelope of every JSON output: version, units map, caution."""
    doc: dict[str, Any] = {"pkcalc_version": __version__, "command": kind}
    if units is not None:
        doc["units"] = {k: v for k, v in units.units.items() if k not in ("auc", "aumc")}
    doc["caution"] = CAUTION
    doc.update(body)
    return doc


def dumps(doc: dict[str, Any]) -> str:
    """JSON text (NaN refused: values were made JSON-safe before)."""
    return json.dumps(doc, indent=2, allow_nan=False)


def failures_json(failures) -> list[dict[str, Any]]:
    """Failed items (name, problems) as JSON objects."""
    return [{"item": label, "problems": [p.to_dict() for p in err.problems]}
            for label, err in failures]


def warnings_text(items: Iterable[tuple[str, Iterable[str]]]) -> str:
    """A separate block listing warnings per item; empty string when there are none."""
    lines = []
    for name, warns in items:
        lines += [f"  {name}: {w}" for w in warns]
    return "Warnings:\n" + "\n".join(lines) if lines else ""


def assemble_text(sections: Iterable[str], warnings: Iterable[tuple[str, Iterable[str]]], *,
                  title: str | None = None, failures=(), colour: bool = False,
                  extra_caution: str | None = None) -> str:
    """A terminal document: caution block first, title, sections, warnings, failures."""
    parts = [caution_block(colour, extra=extra_caution)]
    if title:
        parts.append(title)
    parts += list(sections)
    parts += [b for b in (warnings_text(warnings), failures_text(failures)) if b]
    return "\n\n".join(parts) + "\n"


def failures_text(failures) -> str:
    """Problems of items that could not be computed."""
    if not failures:
        return ""
    lines = ["Not computed (input problems):"]
    for _label, err in failures:
        lines += [f"  {p}" for p in err.problems]
    return "\n".join(lines)


# --------------------------------------------------------------------------- files
def write_atomic(path: str | Path, data: str | bytes) -> Path:
    """Write a file atomically (see :func:`pkcalc.files.write_atomic`)."""
    from ..files import write_atomic as _write

    return _write(path, data)


#: The line of CAUTION.txt after which the files of the run are listed.
FILES_HEADING = "Files written by this run:"


def write_caution_file(out_dir: str | Path, files: Iterable[str | Path] = ()) -> Path:
    """``CAUTION.txt`` beside files written with ``--out``, listing the run's files (the
    next run into the folder removes those of them it does not write again)."""
    out = Path(out_dir)
    names = sorted({_inside(out, Path(f)) for f in files} - {"CAUTION.txt", None})
    text = CAUTION + "\n\npkcalc " + __version__ + "\n"
    if names:
        text += "\n" + FILES_HEADING + "\n" + "".join(f"  {n}\n" for n in names)
    return write_atomic(Path(out_dir) / "CAUTION.txt", text)


def previous_files(out_dir: str | Path) -> list[Path]:
    """The files an earlier pkcalc run listed in the folder's CAUTION.txt."""
    path = Path(out_dir) / "CAUTION.txt"
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError):
        return []
    if not text.startswith(CAUTION) or FILES_HEADING not in text:
        return []
    names = [line.strip() for line in text.split(FILES_HEADING, 1)[1].splitlines()]
    out = Path(out_dir)
    found = []
    for n in names:
        rel = Path(n)
        if n and "\\" not in n and not rel.is_absolute() and ".." not in rel.parts \
                and _inside(out, out / rel) is not None:  # never through a link outside
            found.append(out / rel)
    return found


def _inside(out: Path, path: Path) -> str | None:
    """``path`` relative to the folder ``out`` (POSIX separators), None when outside."""
    try:
        return path.resolve().relative_to(out.resolve()).as_posix()
    except (ValueError, OSError):
        return None

