"""Terminal and JSON output of ``pkcalc nca``."""

from __future__ import annotations

from typing import Any

from .. import glossary
from .._format import format_table
from .base import (
    UnitConverter,
    assemble_text,
    failures_json,
    json_document,
    json_number,
    settings_line,
)

#: Result fields in display order, with their kind of quantity (None: a plain number).
NCA_FIELDS: tuple[tuple[str, str | None], ...] = (
    ("peak_concentration", "concentration"), ("peak_time", "time"),
    ("last_concentration", "concentration"), ("last_time", "time"),
    ("auc_to_last", "auc"), ("auc_to_infinity", "auc"), ("auc_extrapolated_percent", None),
    ("aumc_to_last", "aumc"), ("aumc_to_infinity", "aumc"),
    ("terminal_slope", "elimination_rate"), ("terminal_half_life", "time"),
    ("adjusted_r2", None), ("clearance", "clearance"), ("mean_residence_time", "time"),
    ("volume_terminal", "volume"), ("volume_steady_state", "volume"),
    ("auc_interval", "auc"), ("average_concentration", "concentration"),
    ("fluctuation_percent", None), ("accumulation_ratio", None),
    ("min_concentration", "concentration"), ("trough_concentration", "concentration"),
)
#: Fields of one dosing interval, with their kind of quantity.
INTERVAL_FIELDS: tuple[tuple[str, str | None], ...] = (
    ("peak_concentration", "concentration"), ("peak_time", "time"),
    ("min_concentration", "concentration"), ("trough_concentration", "concentration"),
    ("last_concentration", "concentration"), ("last_time", "time"),
    ("auc_to_last", "auc"), ("auc_interval", "auc"),
    ("average_concentration", "concentration"), ("fluctuation_percent", None),
    ("auc_to_infinity", "auc"), ("auc_extrapolated_percent", None),
    ("terminal_slope", "elimination_rate"), ("terminal_half_life", "time"),
    ("adjusted_r2", None), ("clearance", "clearance"), ("volume_terminal", "volume"),
    ("mean_residence_time", "time"), ("volume_steady_state", "volume"),
    ("accumulation_ratio", None),
)


def selected_intervals(result, choice: str = "each") -> list:
    """The intervals a report shows: ``each``, ``first``, ``last`` or a dose number."""
    rows = list(result.intervals)
    if choice == "first":
        return rows[:1]
    if choice == "last":
        return rows[-1:]
    if choice.isdigit():
        return [r for r in rows if r.number == int(choice)]
    return rows


def interval_dict(r, conv: UnitConverter, clock_origin: str | None = None) -> dict[str, Any]:
    """One dosing interval's JSON object (display units)."""
    out: dict[str, Any] = {"number": r.number, "kind": r.kind,
                           "start": json_number(conv(r.start, "time")),
                           "dose": json_number(conv(r.dose, "amount")),
                           "infusion_time": json_number(conv(r.infusion_time, "time")),
                           "length": json_number(conv(r.length, "time")),
                           "levels": r.levels, "steady_state": bool(r.steady_state)}
    if clock_origin:
        from datetime import datetime, timedelta

        origin = datetime.fromisoformat(clock_origin.replace("Z", "+00:00"))
        out["start_clock"] = (origin + timedelta(hours=r.start)).isoformat(timespec="minutes")
    for key, kind in INTERVAL_FIELDS:
        value = getattr(r, key)
        out[key] = json_number(value if kind is None else conv(value, kind))
    out["trough_source"] = r.trough_source
    out["points_used"] = [json_number(conv(x, "time")) for x in r.points_used]
    out["reason"] = r.reason
    out["notes"] = list(r.notes)
    return out


def nca_subject_dict(r, conv: UnitConverter, choice: str = "each") -> dict[str, Any]:
    """One subject's JSON object (docs/formats.md keys, display units)."""
    out: dict[str, Any] = {"subject": r.subject, "mode": r.mode,
                           "dose": json_number(conv(r.dose, "amount")),
                           "infusion_time": json_number(conv(r.infusion_time, "time")),
                           "interval": json_number(conv(r.interval, "time"))}
    for key, kind in NCA_FIELDS:
        value = getattr(r, key)
        out[key] = json_number(value if kind is None else conv(value, kind))
    out["points_used"] = [json_number(conv(x, "time")) for x in r.points_used]
    out["notes"] = list(r.notes)
    out["reference_dose"] = r.interval_number
    out["steady_state"] = r.steady_state
    out["regimen"] = r.regimen
    out["assumptions"] = list(r.assumptions)
    out["intervals"] = [interval_dict(x, conv, r.clock_origin)
                        for x in selected_intervals(r, choice)]
    return out


def nca_json(results, conv: UnitConverter, *, title: str | None = None, failures=(),
             settings: dict[str, Any] | None = None, choice: str = "each") -> dict[str, Any]:
    """The ``pkcalc nca --json`` document."""
    doc = json_document("nca", conv, {
        "title": title, "settings": settings or {},
        "subjects": [nca_subject_dict(r, conv, choice) for r in results],
        "failures": failures_json(failures),
    })
    doc["units"]["auc"] = conv.unit("auc")
    doc["units"]["aumc"] = conv.unit("aumc")
    return doc


#: Columns of the terminal tables: single-dose quantities, then steady-state ones.
_MAIN = ("peak_concentration", "peak_time", "auc_to_last", "auc_to_infinity",
         "auc_extrapolated_percent", "terminal_slope", "terminal_half_life", "clearance",
         "volume_terminal", "mean_residence_time", "volume_steady_state")
_STEADY = ("interval", "auc_interval", "average_concentration", "fluctuation_percent",
           "accumulation_ratio")
#: Column heads: the glossary's symbol where the trade has one, else its label.
_SHORT = {k: (glossary.term(k).symbol if glossary.term(k).symbol in glossary.ABBREVIATIONS
              else glossary.label(k)) for k in (*_MAIN, *_STEADY)}


_INTERVAL_COLUMNS = tuple((k, glossary.term(k).symbol if glossary.term(k).symbol in
                           glossary.ABBREVIATIONS else glossary.label(k))
                          for k in ("peak_concentration", "peak_time", "trough_concentration",
                                    "auc_interval", "clearance", "terminal_half_life"))


def interval_table(results, conv: UnitConverter, choice: str = "each") -> str:
    """One row per dosing interval (actual times): the dose, its start, the interval,
    the levels in it and the main values; the reasons below."""
    unit = {k: conv.unit(kind) for k, kind in INTERVAL_FIELDS if kind}
    headers = ["subject", "dose #", f"start [{conv.unit('time')}]",
               f"interval [{conv.unit('time')}]", "levels",
               *[f"{label} [{unit[k]}]" for k, label in _INTERVAL_COLUMNS], "steady state"]
    rows, reasons = [], []
    for r in results:
        for x in selected_intervals(r, choice):
            d = interval_dict(x, conv)
            rows.append([r.subject, x.number, d["start"], d["length"], x.levels,
                         *[d[k] for k, _ in _INTERVAL_COLUMNS],
                         "yes" if x.steady_state else "-"])
            if x.reason:
                reasons.append(f"  subject {r.subject} dose {x.number}: {x.reason}")
    if not rows:
        return ""
    text = ("Per dosing interval (actual dosing times; Tmax in hours after the dose; CL is "
            "dose/AUCinf for a first dose, dose/AUCtau at steady state):\n"
            + format_table(headers, rows))
    return text + ("\n" + "\n".join(reasons) if reasons else "")


def nca_text(results, conv: UnitConverter, *, title: str | None = None, failures=(),
             warnings=(), settings: dict[str, Any] | None = None, colour: bool = False,
             choice: str = "each") -> str:
    """Terminal output: caution, one row per subject, steady-state table, intervals,
    notes."""
    kinds = dict(NCA_FIELDS) | {"interval": "time"}
    unit_of = {k: ("%" if k.endswith("percent") else "" if kind is None else conv.unit(kind))
               for k, kind in kinds.items()}
    dicts = [nca_subject_dict(r, conv) for r in results]

    def table(keys: tuple[str, ...], subset) -> str:
        keys = tuple(k for k in keys if any(d[k] is not None for d in subset))
        headers = ["subject", "mode", *[f"{_SHORT[k]} [{unit_of[k]}]" if unit_of[k] else
                                        _SHORT[k] for k in keys]]
        return format_table(headers, [[d["subject"], d["mode"], *[d[k] for k in keys]]
                                      for d in subset])

    sections = []
    if settings:
        sections.append(settings_line(settings))
    sections.append(table(_MAIN, dicts))
    steady = [d for d in dicts if d["mode"] == "steady state"]
    if steady:
        sections.append("Over one dosing interval at steady state:\n" + table(_STEADY, steady))
    if any(len(r.intervals) > 1 for r in results):
        sections.append(interval_table(results, conv, choice))
    note_lines = []
    for r, d in zip(results, dicts, strict=True):
        if d["points_used"]:
            note_lines.append(f"  subject {r.subject}: terminal points at "
                              f"{', '.join(f'{x:g}' for x in d['points_used'])} "
                              f"{conv.unit('time')}")
        note_lines += [f"  subject {r.subject}: {n}" for n in r.notes]
    if note_lines:
        sections.append("Notes:\n" + "\n".join(note_lines))
    return assemble_text(sections, [("study", warnings)] if warnings else [], title=title,
                         failures=failures, colour=colour)


__all__ = ["INTERVAL_FIELDS", "NCA_FIELDS", "interval_dict", "interval_table", "nca_json",
           "nca_subject_dict", "nca_text", "selected_intervals"]
