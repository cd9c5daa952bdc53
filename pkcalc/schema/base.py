"""Shared pieces of the input boundary: canonical input types, the problem
collector, parameter resolution, the pydantic base models and the file loader."""

from __future__ import annotations

import math
import tomllib
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    PrivateAttr,
    StrictFloat,
    StrictInt,
    StrictStr,
    ValidationError,
    model_validator,
)

from .. import model
from ..core import ScenarioInput
from ..errors import PkcalcInputError, Problem, check_path
from ..units import CANONICAL, display_factor, out_of_range, range_message, to_canonical

#: The five one-compartment parameters and the kind of quantity of each.
PARAMETER_NAMES: dict[str, str] = {
    "clearance": "clearance",
    "volume": "volume",
    "half_life": "time",
    "elimination_rate": "elimination_rate",
    "time_constant": "time",
}

#: Relative tolerance for an over-determined parameter set (three or more given).
AGREEMENT_RTOL = 1e-6

#: A quantity as written: text with its unit (a bare number is refused later with a
#: message that asks for the unit).  Strict: ``true`` is not the number 1.
QuantityText = StrictStr | StrictInt | StrictFloat


# --------------------------------------------------------------------------- canonical results
# --------------------------------------------------------------------------- helpers
class Collector:
    """Converts quantities, recording problems instead of stopping at the first."""

    def __init__(self, weight: float | None = None) -> None:
        self.problems: list[Problem] = []
        self.weight = weight

    def q(self, text: Any, kind: str, name: str, *, positive: bool = False,
          nonnegative: bool = False) -> float | None:
        if text is None:
            return None
        try:
            value = to_canonical(text, kind, field=name, weight=self.weight)
        except PkcalcInputError as exc:
            self.problems.extend(exc.problems)
            return None
        if positive and not value > 0:
            self.add(f"must be greater than zero, got '{text}'", name)
            return None
        if nonnegative and value < 0:
            self.add(f"must not be negative, got '{text}'", name)
            return None
        return value

    def add(self, message: str, name: str | None = None, expected: str | None = None) -> None:
        self.problems.append(Problem(message, field=name, expected=expected))

    def raise_if_any(self) -> None:
        if self.problems:
            raise PkcalcInputError(self.problems)


def agree(a: float, b: float) -> bool:
    return math.isclose(a, b, rel_tol=AGREEMENT_RTOL, abs_tol=0.0)


def resolve_parameters(values: dict[str, float], col: Collector) -> tuple[float, float] | None:
    """Clearance and volume from the given parameters, checking over-determined sets.

    Any two independent ones of clearance, volume, half_life, elimination_rate,
    time_constant fix the model; a third given must agree to 1e-6 relative.
    """
    given = {k: v for k, v in values.items() if v is not None}
    k_like = [n for n in ("half_life", "elimination_rate", "time_constant") if n in given]
    k_values = {
        "half_life": lambda v: model.LN2 / v,
        "elimination_rate": lambda v: v,
        "time_constant": lambda v: 1.0 / v,
    }
    rates = {n: k_values[n](given[n]) for n in k_like}
    first_k = rates[k_like[0]] if k_like else None
    for n in k_like[1:]:
        if not agree(rates[n], first_k):
            col.add(
                f"{n} ({given[n]:.6g}) disagrees with {k_like[0]} ({given[k_like[0]]:.6g}): "
                f"they imply elimination rates {rates[n]:.6g} and {first_k:.6g} 1/h",
                n, "values that agree to 1e-6 relative, or only two parameters",
            )
            return None
    cl, v = given.get("clearance"), given.get("volume")
    independent = (cl is not None) + (v is not None) + (first_k is not None)
    if independent < 2:
        names = ", ".join(given) or "none"
        col.add(
            f"clearance and volume are not determined by the parameters given ({names})",
            "clearance",
            "two of clearance, volume and one of half_life / elimination_rate / time_constant",
        )
        return None
    if cl is not None and v is not None and first_k is not None and not agree(cl / v, first_k):
        col.add(
            f"clearance/volume = {cl / v:.6g} 1/h disagrees with {k_like[0]} "
            f"(elimination rate {first_k:.6g} 1/h)",
            k_like[0], "values that agree to 1e-6 relative, or only two parameters",
        )
        return None
    with np.errstate(all="ignore"):
        cl_out, v_out = model.resolve_clearance_volume(
            clearance=cl, volume=v, elimination_rate=first_k
        )
        derived = {"clearance": (float(cl_out), "L/h"), "volume": (float(v_out), "L"),
                   "elimination_rate": (float(cl_out) / float(v_out), "1/h")}
    for name, (value, unit) in derived.items():
        if out_of_range(value) or value <= 0:
            col.add(f"the parameters given imply {name} = {range_message(value, unit)}",
                    name if name in given else next(iter(given)),
                    "parameters of a realistic size")
            return None
    return float(cl_out), float(v_out)


_TYPE_WORDS = {
    "list_type": "must be a list [ ... ]",
    "dict_type": "must be a table { ... }",
    "model_type": "must be a table { ... }",
    "model_attributes_type": "must be a table { ... }",
    "int_type": "must be a whole number",
    "int_parsing": "must be a whole number",
    "int_from_float": "must be a whole number",
    "bool_type": "must be true or false",
    "bool_parsing": "must be true or false",
}
_QUANTITY_TYPES = {"string_type", "int_type", "float_type"}


def _user_loc(loc: tuple, prefix: str) -> str:
    """A field path in the user's words: list positions as ``[i]``, no validator tags
    (``str``, ``list[union[...]]``, model class names)."""
    parts = []
    for p in loc:
        if isinstance(p, int):
            parts.append(f"[{p}]")
        elif "[" in p or "(" in p or p in ("str", "int", "float", "bool", "list", "dict") \
                or p[:1].isupper():
            continue
        else:
            parts.append(p)
    return (prefix + ".".join(parts)).replace(".[", "[")


def _shown(value: Any) -> str:
    text = repr(value) if not isinstance(value, bool) else str(value).lower()
    return text if len(text) <= 40 else text[:37] + "..."


def validation_problems(exc: ValidationError, *, prefix: str = "") -> list[Problem]:
    """pydantic errors -> pkcalc problems in the user's words (field path, message);
    our own errors kept.  The alternatives of one field are merged into one problem."""
    out: list[Problem] = []
    by_loc: dict[str, list[dict]] = {}
    for err in exc.errors():
        inner = (err.get("ctx") or {}).get("error")
        if isinstance(inner, PkcalcInputError):
            out.extend(inner.problems)
            continue
        by_loc.setdefault(_user_loc(err["loc"], prefix), []).append(err)
    # a union field: keep the deepest complaint ("times[0]: ...") over the alternative's
    # generic one ("times: must be a table")
    for loc in [x for x in by_loc if any(y != x and (y.startswith(x + "[") or
                                                     y.startswith(x + "."))
                                         for y in by_loc)]:
        if {e["type"] for e in by_loc[loc]} <= {"model_type", "dict_type", "list_type",
                                                  "model_attributes_type"}:
            del by_loc[loc]
    for loc, errs in by_loc.items():
        types = {e["type"] for e in errs}
        got = _shown(errs[0].get("input"))
        if "extra_forbidden" in types:
            msg = "unknown key (check the spelling; see docs/formats.md for the accepted keys)"
        elif "missing" in types:
            msg = "is required"
        elif types <= _QUANTITY_TYPES and len(errs) > 1:
            msg = f"must be a quantity written with its unit, such as '4 L/h' (got {got})"
        elif types == {"value_error"}:
            msg = errs[0]["msg"].removeprefix("Value error, ")
        elif types == {"string_type"}:
            msg = f"must be text in quotes (got {got})"
        elif len(types) == 1 and next(iter(types)) in _TYPE_WORDS:
            msg = f"{_TYPE_WORDS[next(iter(types))]} (got {got})"
        elif types & {"list_type", "dict_type", "model_type"} and len(errs) > 1:
            msg = f"must be a list [ ... ] or a table {{ from, to, step }} (got {got})"
        else:
            msg = errs[0]["msg"].replace("Input should be", "must be") + f" (got {got})"
        out.append(Problem(msg, field=loc or None))
    return out


def _check_items(raw: dict[str, Any], allowed: Iterable[str], where: str) -> None:
    unknown = sorted(set(raw) - set(allowed))
    if unknown:
        raise PkcalcInputError(
            [Problem("unknown key", field=f"{where}{k}", expected=", ".join(allowed))
             for k in unknown]
        )


def resolve_partial(values: dict[str, float | None], col: Collector
                    ) -> tuple[float | None, float | None]:
    """Clearance and/or volume from whatever parameters are given (design cases)."""
    given = {k: v for k, v in values.items() if v is not None}
    independent = ("clearance" in given) + ("volume" in given) + any(
        n in given for n in ("half_life", "elimination_rate", "time_constant"))
    if independent >= 2:
        params = resolve_parameters(values, col)
        return (None, None) if params is None else params
    return given.get("clearance"), given.get("volume")


# --------------------------------------------------------------------------- pydantic models
class StrictModel(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)


class LenientModel(BaseModel):
    """Unknown keys are kept and reported together with every other problem."""

    model_config = ConfigDict(extra="allow", frozen=True, populate_by_name=True)

    def unknown_keys(self, col: Collector, where: str = "") -> None:
        accepted = ", ".join(
            (f.alias or name) for name, f in type(self).model_fields.items()
        )
        for key in self.model_extra or {}:
            col.add("unknown key (check the spelling)", f"{where}{key}", accepted)


class WithParameters(LenientModel):
    """An entry with a name, a body weight and any of the five parameters."""

    name: str = Field(min_length=1)
    weight: QuantityText | None = None
    clearance: QuantityText | None = None
    volume: QuantityText | None = None
    half_life: QuantityText | None = None
    elimination_rate: QuantityText | None = None
    time_constant: QuantityText | None = None

    _resolved: Any = PrivateAttr(default=None)

    @property
    def resolved(self) -> Any:
        """The entry in canonical units (set by the subclass's validator)."""
        assert self._resolved is not None
        return self._resolved

    def start_collecting(self) -> tuple[Collector, float | None, dict[str, float | None]]:
        """A collector (with unknown keys reported), the weight and the canonical
        parameters given (None where absent or wrong)."""
        col = Collector()
        self.unknown_keys(col)
        weight = col.q(self.weight, "weight", "weight", positive=True)
        col.weight = weight
        values = {name: col.q(getattr(self, name), kind, name, positive=True)
                  for name, kind in PARAMETER_NAMES.items()}
        return col, weight, values


class OutputUnits(StrictModel):
    """Display units for outputs (``[output]`` table); canonical when omitted."""

    time: str | None = None
    amount: str | None = None
    volume: str | None = None
    concentration: str | None = None
    clearance: str | None = None
    rate: str | None = None
    elimination_rate: str | None = None

    @model_validator(mode="after")
    def _check(self) -> OutputUnits:
        problems = []
        for kind in type(self).model_fields:
            unit = getattr(self, kind)
            if unit is not None:
                try:
                    display_factor(unit, kind, field=f"output.{kind}")
                except PkcalcInputError as exc:
                    problems.extend(exc.problems)
        if problems:
            raise PkcalcInputError(problems)
        return self

    def units(self) -> dict[str, str]:
        """The full units map: chosen units, canonical for the rest."""
        keys = ("time", "amount", "volume", "concentration", "clearance", "rate",
                "elimination_rate")
        return {k: getattr(self, k) or CANONICAL[k] for k in keys}


@dataclass
class ScenarioFile:
    """A loaded scenario file: good scenarios and the problems of the bad ones.

    Attributes
    ----------
    path : str
    title : str or None
    output : OutputUnits
    scenarios : list of ScenarioInput
        The scenarios that validated, in file order.
    failures : list of (str, PkcalcInputError)
        Name (or position) and problems of each scenario that did not.
    raw : dict
        The parsed TOML, for reports.
    """

    path: str
    title: str | None
    output: OutputUnits
    scenarios: list[ScenarioInput]
    failures: list[tuple[str, PkcalcInputError]]
    raw: dict[str, Any]


#: The largest TOML file read: scenario, study and case files are small (a 5,000-dose
#: history is about 0.3 MB).
MAX_TOML_BYTES = 16 * 2**20


def read_toml(path: str | Path) -> dict[str, Any]:
    """Read a TOML file; unreadable, empty or non-TOML files raise PkcalcInputError."""
    from ..tables import check_input_file

    check_path(path)
    p = check_input_file(path, "a TOML file")
    if p.stat().st_size > MAX_TOML_BYTES:
        raise PkcalcInputError(f"is {p.stat().st_size / 2**20:.0f} MB; pkcalc reads TOML files "
                               f"of at most {MAX_TOML_BYTES // 2**20} MB", file=str(path),
                               expected="long dose histories and tables as CSV files (study "
                                        "tables, batch inputs)")
    try:
        raw = p.read_bytes()
        data = tomllib.loads(raw.decode("utf-8-sig"))  # a BOM is not an error
    except RecursionError:
        raise PkcalcInputError("is nested too deeply to read", file=str(path),
                               expected="a TOML file") from None
    except UnicodeDecodeError as exc:
        line = raw[:exc.start].count(b"\n") + 1
        what = ("a binary file, not text" if b"\x00" in raw[:4096] else
                f"not UTF-8 text: byte 0x{raw[exc.start]:02X} on line {line} (saved in another "
                "encoding, e.g. Latin-1 or Windows-1252?)")
        raise PkcalcInputError(what, file=str(path),
                               expected="a TOML file saved as UTF-8") from None
    except tomllib.TOMLDecodeError as exc:
        raise PkcalcInputError(f"not valid TOML: {exc}", file=str(path)) from None
    if not data:
        raise PkcalcInputError("the file is empty", file=str(path), expected="a TOML file")
    return data


def _scenario_label(raw: Any, i: int, list_key: str = "scenarios") -> str:
    word = "case" if list_key == "cases" else "scenario"
    name = raw.get("name") if isinstance(raw, dict) else None
    return f"{word} '{name}'" if isinstance(name, str) and name else f"{word} #{i + 1}"


def load_items(path: str | Path, spec: type[LenientModel], *, extra_keys: Iterable[str] = (),
               keep: Any = None, list_key: str = "scenarios") -> ScenarioFile:
    """Load a TOML file of ``[[scenarios]]`` (or ``[[cases]]``) tables, keeping good
    entries when others fail.

    Parameters
    ----------
    path : str or Path
    extra_keys : iterable of str
        Top-level keys other commands accept besides ``title``, ``output``, ``scenarios``.
    spec : pydantic model class
        The model each entry is validated with; its ``resolved`` property gives
        the canonical result.
    keep : callable, optional
        ``keep(raw) -> bool``; entries for which it is false are skipped.

    Returns
    -------
    ScenarioFile

    Raises
    ------
    PkcalcInputError
        When the file as a whole is unusable (missing, not TOML, no scenarios,
        bad ``[output]`` table).  Problems of single scenarios are returned in
        ``failures`` instead.
    """
    file = str(path)
    data = read_toml(path)
    try:
        _check_items(data, ["title", "output", list_key, *extra_keys], "")
        try:
            output = OutputUnits.model_validate(data.get("output", {}))
        except ValidationError as exc:
            raise PkcalcInputError(validation_problems(exc, prefix="output.")) from None
        raw_scenarios = data.get(list_key)
        if not isinstance(raw_scenarios, list) or not raw_scenarios:
            raise PkcalcInputError(f"no [[{list_key}]] given", field=list_key,
                                   expected=f"one or more [[{list_key}]] tables")
    except PkcalcInputError as exc:
        raise exc.located(file=file) from None
    good: list[Any] = []
    failures: list[tuple[str, PkcalcInputError]] = []
    names: set[str] = set()
    for i, raw in enumerate(raw_scenarios):
        label = _scenario_label(raw, i, list_key)
        if keep is not None and isinstance(raw, dict) and not keep(raw):
            continue
        try:
            if not isinstance(raw, dict):
                raise PkcalcInputError("each entry must be a table", field=list_key)
            item = spec.model_validate(raw)
            if item.name in names:
                raise PkcalcInputError(f"duplicate scenario name '{item.name}'", field="name")
            names.add(item.name)
            good.append(item.resolved)
        except ValidationError as exc:
            failures.append((label, PkcalcInputError(validation_problems(exc))
                             .located(file=file, item=label)))
        except PkcalcInputError as exc:
            failures.append((label, exc.located(file=file, item=label)))
    title = data.get("title") if isinstance(data.get("title"), str) else None
    return ScenarioFile(file, title, output, good, failures, data)


#: Keys of a study or scenario file that name other input files.
_FILE_KEYS = ("levels", "doses", "subjects", "sdtm", "prior", "study")


def referenced_files(path: str | Path) -> list[Path]:
    """The files a TOML input names (a study's tables, its SDTM folder and the files in
    it, a prior), relative to the TOML file's folder -- inputs too, for the output
    checks made before any work.  An unreadable file names none (its loader refuses
    it later)."""
    p = Path(path)
    try:
        if not p.is_file() or p.stat().st_size > MAX_TOML_BYTES:
            return []
        data = tomllib.loads(p.read_text(encoding="utf-8-sig"))
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError, ValueError, RecursionError):
        return []
    found: list[Path] = []
    tables = [data] + [data[k] for k in ("fit", "attainment") if isinstance(data.get(k), dict)]
    for table in tables:
        for key in _FILE_KEYS:
            value = table.get(key)
            if isinstance(value, str) and value.strip():
                ref = Path(value)
                ref = ref if ref.is_absolute() else p.parent / ref
                found.append(ref)
                if ref.is_dir():
                    found += [f for f in ref.iterdir() if f.is_file()]
    return found

