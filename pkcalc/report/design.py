"""Terminal and JSON output of ``pkcalc design``."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from .._format import fmt, format_table
from ..units import KIND_OF
from .base import (
    UnitConverter,
    assemble_text,
    failures_json,
    json_document,
    json_number,
)

# --------------------------------------------------------------------------- design
DESIGN_CAUTION = (
    "This design is a calculation to be checked by a licensed pharmacist or clinician under "
    "local protocols. It is not an order."
)

_REGIMEN_KEYS = ("rate", "loading_dose", "loading_time", "dose", "interval", "infusion_time")


def _conv_any(conv: UnitConverter, key: str, value: Any,
              default: str | None = "concentration") -> Any:
    """Convert a named result to display units by its kind (``units.KIND_OF``)."""
    kind = KIND_OF.get(key, default)
    if value is None or kind is None:
        return json_number(value)
    return json_number(conv(value, kind))


def design_regimen_dict(r, conv: UnitConverter, scenario: str) -> dict[str, Any]:
    out: dict[str, Any] = {"scenario": scenario, "label": r.label}
    for key in _REGIMEN_KEYS:
        out[key] = json_number(conv(getattr(r, key), KIND_OF[key]))
    predicted = {k: None for k in ("plateau", "peak", "trough", "average")}
    predicted.update({k: _conv_any(conv, k, v) for k, v in r.predicted.items()})
    out["predicted"] = predicted
    out["meets_target"] = r.meets_target
    out["flags"] = list(r.flags)
    out["exact"] = {k: _conv_any(conv, k, v, None) for k, v in r.exact.items()}
    out["start"] = json_number(conv(r.start, "time"))
    out["doses"] = [{k: _conv_any(conv, k, v, None) if k != "count" else v
                     for k, v in d.as_dict().items()} for d in r.doses]
    return out


def _target_dict(target: Mapping[str, Any], conv: UnitConverter) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, v in target.items():
        kind = {"infusion_time": "time", "auc_24": "auc"}.get(k, "concentration")
        if isinstance(v, list | tuple):
            out[k] = [json_number(conv(x, kind)) for x in v]
        else:
            out[k] = json_number(conv(v, kind))
    return out


def design_json(results, conv: UnitConverter, *, title: str | None = None,
                failures=()) -> dict[str, Any]:
    """The ``pkcalc design --json`` document: top-level ``regimens`` (docs/formats.md)
    plus ``designs`` with each scenario's estimates, target and notes."""
    regimens, designs = [], []
    for res in results:
        regs = [design_regimen_dict(r, conv, res.name) for r in res.regimens]
        regimens += regs
        designs.append({
            "name": res.name, "method": res.method,
            "parameters": {"clearance": json_number(conv(res.clearance, "clearance")),
                           "volume": json_number(conv(res.volume, "volume"))},
            "estimates": {k: _conv_any(conv, k, v, None) for k, v in res.estimates.items()},
            "target": _target_dict(res.target, conv),
            "salt_factor": res.salt_factor,
            "regimens": regs, "notes": list(res.notes), "warnings": list(res.warnings),
        })
    return json_document("design", conv, {
        "design_caution": DESIGN_CAUTION, "title": title, "regimens": regimens,
        "designs": designs, "failures": failures_json(failures),
    })


#: Columns of the regimen table: (header, unit kind, key); ``p:`` keys are predictions.
_COLUMNS = (
    ("#", None, None), ("regimen", None, None), ("from", "time", "start"),
    ("rate", "rate", "rate"), ("loading", "amount", "loading_dose"),
    ("loading time", "time", "loading_time"), ("dose", "amount", "dose"),
    ("every", "time", "interval"), ("infusion", "time", "infusion_time"),
    ("peak", "concentration", "p:peak"), ("trough", "concentration", "p:trough"),
    ("average", "concentration", "p:average"), ("AUC24", "auc", "p:auc_24"),
    ("plateau", "concentration", "p:plateau"), ("highest", "concentration", "p:highest"),
    ("lowest after loading", "concentration", "p:lowest_after_loading"),
    ("level", "concentration", "p:level"), ("level at 72 h", "concentration", "p:level_at_72h"),
    ("check", None, None),
)


def design_result_text(res, conv: UnitConverter) -> str:
    lines = [f"Design: {res.name}  (method: {res.method.replace('_', ' ')})"]
    lines += _parameters_and_estimates(res, conv)
    target = _target_line(res, conv)
    if target:
        lines.append(target)
    lines += _regimen_table(res, conv)
    for i, r in enumerate(res.regimens, 1):
        lines += [f"  #{i} FLAG: {f}" for f in r.flags]
    lines += [f"note: {n}" for n in res.notes]
    return "\n".join(lines)


def _parameters_and_estimates(res, conv: UnitConverter) -> list[str]:
    u = conv.unit
    lines = []
    if res.clearance is not None or res.volume is not None:
        lines.append(f"parameters used: clearance {fmt(conv(res.clearance, 'clearance'))} "
                     f"{u('clearance')}, volume {fmt(conv(res.volume, 'volume'))} {u('volume')}")
    if res.estimates:
        rows = []
        for k, v in res.estimates.items():
            kind = KIND_OF.get(k)
            rows.append([k.replace("_", " "), conv(v, kind) if kind else v,
                         u(kind) if kind else ("%" if k.endswith("percent") else "")])
        lines += ["Individual estimates from the measured levels:",
                  format_table(["estimate", "value", "unit"], rows)]
    return lines


def _target_line(res, conv: UnitConverter) -> str | None:
    parts = []
    for k, v in _target_dict(res.target, conv).items():
        if v is None or v == [None, None]:
            continue
        text = " to ".join(fmt(x) for x in v) if isinstance(v, list) else fmt(v)
        unit = conv.unit({"infusion_time": "time", "auc_24": "auc"}.get(k, "concentration"))
        parts.append(f"{k.replace('_', ' ')} {text} {unit}")
    return "Target: " + "; ".join(parts) if parts else None


def _regimen_table(res, conv: UnitConverter) -> list[str]:
    """The proposals as a table; empty columns left out (``from`` only from a state)."""
    from_state = any(r.start or "start_level" in r.predicted for r in res.regimens)

    def cell(r, i, name, kind, key):
        if name == "#":
            return i
        if name == "regimen":
            return r.label
        if name == "check":
            return "meets target" if r.meets_target else "FLAG"
        value = r.predicted.get(key[2:]) if key.startswith("p:") else getattr(r, key)
        return conv(value, kind)

    table = [[cell(r, i, *c) for c in _COLUMNS] for i, r in enumerate(res.regimens, 1)]
    keep = [j for j, (_, _, key) in enumerate(_COLUMNS)
            if (key is None or any(row[j] is not None for row in table))
            and (key != "start" or from_state)]
    headers = [name if kind is None else f"{name} [{conv.unit(kind)}]"
               for name, kind, _ in (_COLUMNS[j] for j in keep)]
    heading = ("Proposed regimens (rounded; peak/trough/average/plateau at steady state; highest, "
               "lowest and level at 72 h on the course projected from the start):"
               if from_state else "Proposed regimens (predicted at steady state, rounded):")
    return [heading, format_table(headers, [[row[j] for j in keep] for row in table])]


def design_text(results, conv: UnitConverter, *, title: str | None = None, failures=(),
                colour: bool = False) -> str:
    """Terminal output of ``pkcalc design``: caution (with the not-an-order line) first."""
    return assemble_text([design_result_text(r, conv) for r in results],
                         [(r.name, r.warnings) for r in results], title=title,
                         failures=failures, colour=colour, extra_caution=DESIGN_CAUTION)
