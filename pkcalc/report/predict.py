"""Terminal and JSON output of ``pkcalc predict``."""

from __future__ import annotations

from typing import Any

import numpy as np

from .. import glossary
from .._format import fmt, format_table
from .base import (
    PROFILE_ROWS,
    UnitConverter,
    assemble_text,
    failures_json,
    json_document,
    json_list,
    json_number,
)


# --------------------------------------------------------------------------- predict
def predict_scenario_dict(pred, conv: UnitConverter) -> dict[str, Any]:
    """One scenario's JSON object (docs/formats.md keys, display units)."""
    p = pred.parameters
    ss = pred.steady_state
    target = pred.target
    return {
        "name": pred.name,
        "parameters": {
            "clearance": json_number(conv(p["clearance"], "clearance")),
            "volume": json_number(conv(p["volume"], "volume")),
            "elimination_rate": json_number(conv(p["elimination_rate"], "elimination_rate")),
            "half_life": json_number(conv(p["half_life"], "time")),
            "time_constant": json_number(conv(p["time_constant"], "time")),
        },
        "plateau_concentration": json_number(conv(pred.plateau_concentration, "concentration")),
        "plateau_basis": pred.plateau_basis,
        **{glossary.time_to_key(f): json_number(conv(t, "time"))
           for f, t in pred.time_to_fraction.items()},
        **{glossary.time_to_key(f).replace("time_to_", "half_lives_to_"):
           json_number(t / p["half_life"]) for f, t in pred.time_to_fraction.items()},
        "profile": {
            "time": json_list(conv(pred.time, "time")),
            "concentration": json_list(conv(pred.concentration, "concentration")),
        },
        "steady_state": None if ss is None else {
            "peak": json_number(conv(ss.peak, "concentration")),
            "trough": json_number(conv(ss.trough, "concentration")),
            "average": json_number(conv(ss.average, "concentration")),
            "interval": json_number(conv(ss.interval, "time")),
        },
        "target": None if target is None else {
            "plateau": json_number(conv(target.plateau, "concentration")),
            "window": None if target.low is None else [
                json_number(conv(target.low, "concentration")),
                json_number(conv(target.high, "concentration")),
            ],
        },
        "flags": list(pred.flags),
        "warnings": list(pred.warnings),
    }


def predict_json(predictions, conv: UnitConverter, *, title: str | None = None,
                 failures=()) -> dict[str, Any]:
    """The ``pkcalc predict --json`` document."""
    return json_document("predict", conv, {
        "title": title,
        "scenarios": [predict_scenario_dict(p, conv) for p in predictions],
        "failures": failures_json(failures),
    })


def predict_scenario_text(pred, conv: UnitConverter) -> str:
    """Terminal table of one scenario in display units."""
    u = conv.unit
    p = pred.parameters
    rows: list[list[Any]] = [
        [glossary.label("clearance"), conv(p["clearance"], "clearance"), u("clearance")],
        [glossary.label("volume"), conv(p["volume"], "volume"), u("volume")],
        [glossary.label("elimination_rate"), conv(p["elimination_rate"], "elimination_rate"),
         u("elimination_rate")],
        [glossary.label("half_life"), conv(p["half_life"], "time"), u("time")],
        [glossary.label("time_constant") + " (V/CL)", conv(p["time_constant"], "time"),
         u("time")],
        [glossary.label("plateau"), conv(pred.plateau_concentration, "concentration"),
         u("concentration")],
    ]
    for f, t in pred.time_to_fraction.items():
        rows.append([f"{glossary.time_to_label(f)} ({t / p['half_life']:.2f} half-lives)",
                     conv(t, "time"), u("time")])
    ss = pred.steady_state
    if ss is not None:
        rows += [
            [f"steady-state peak (every {fmt(conv(ss.interval, 'time'))} {u('time')})",
             conv(ss.peak, "concentration"), u("concentration")],
            ["steady-state trough", conv(ss.trough, "concentration"), u("concentration")],
            ["steady-state average", conv(ss.average, "concentration"), u("concentration")],
        ]
    if pred.target is not None:
        t = pred.target
        if t.plateau is not None:
            rows.append(["target plateau", conv(t.plateau, "concentration"), u("concentration")])
        if t.low is not None:
            rows.append(["target window low", conv(t.low, "concentration"), u("concentration")])
            rows.append(["target window high", conv(t.high, "concentration"),
                         u("concentration")])
    lines = [f"Scenario: {pred.name}", format_table(["quantity", "value", "unit"], rows),
             f"plateau basis: {pred.plateau_basis}"]
    t, c = conv(pred.time, "time"), conv(pred.concentration, "concentration")
    if t.size <= PROFILE_ROWS:
        lines.append(format_table([f"time [{u('time')}]", f"concentration [{u('concentration')}]"],
                                  [[float(a), float(b)] for a, b in zip(t, c, strict=True)]))
    elif t.size:
        i = int(np.argmax(c))
        lines.append(
            f"profile: {t.size} points from {fmt(t[0])} to {fmt(t[-1])} {u('time')}; highest "
            f"{fmt(c[i])} {u('concentration')} at {fmt(t[i])} {u('time')}; last "
            f"{fmt(c[-1])} {u('concentration')} (all points: --json or --out)"
        )
    if pred.target is not None:
        lines.append("target check: " + ("all met" if not pred.flags else
                                         f"{len(pred.flags)} flag(s)"))
    for flag in pred.flags:
        lines.append(f"  FLAG: {flag}")
    return "\n".join(lines)


def predict_text(predictions, conv: UnitConverter, *, title: str | None = None,
                 failures=(), colour: bool = False) -> str:
    """Terminal output of ``pkcalc predict``: caution first, tables, warnings."""
    return assemble_text([predict_scenario_text(p, conv) for p in predictions],
                         [(p.name, p.warnings) for p in predictions], title=title,
                         failures=failures, colour=colour)
