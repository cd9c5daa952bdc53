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


def design_result_text(res, conv: UnitConverter) -> str:
    u = conv.unit
    lines = [f"Design: {res.name}  (method: {res.method.replace('_', ' ')})"]
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
    tgt = _target_dict(res.target, conv)
    tparts = []
    for k, v in tgt.items():
        if v is None or v == [None, None]:
            continue
        text = " to ".join(fmt(x) for x in v) if isinstance(v, list) else fmt(v)
        unit = u({"infusion_time": "time", "auc_24": "auc"}.get(k, "concentration"))
        tparts.append(f"{k.replace('_', ' ')} {text} {unit}")
    if tparts:
        lines.append("Target: " + "; ".join(str(p) for p in tparts))
    from_state = any(r.start or "start_level" in r.predicted for r in res.regimens)
    columns = [
        ("#", None, None), ("regimen", None, None),
        (f"from [{u('time')}]", "start", "time"),
        (f"rate [{u('rate')}]", "rate", "rate"),
        (f"loading [{u('amount')}]", "loading_dose", "amount"),
        (f"loading time [{u('time')}]", "loading_time", "time"),
        (f"dose [{u('amount')}]", "dose", "amount"),
        (f"every [{u('time')}]", "interval", "time"),
        (f"infusion [{u('time')}]", "infusion_time", "time"),
        (f"peak [{u('concentration')}]", "p:peak", "concentration"),
        (f"trough [{u('concentration')}]", "p:trough", "concentration"),
        (f"average [{u('concentration')}]", "p:average", "concentration"),
        (f"AUC24 [{u('auc')}]", "p:auc_24", "auc"),
        (f"plateau [{u('concentration')}]", "p:plateau", "concentration"),
        (f"highest [{u('concentration')}]", "p:highest", "concentration"),
        (f"lowest after loading [{u('concentration')}]", "p:lowest_after_loading",
         "concentration"),
        (f"level [{u('concentration')}]", "p:level", "concentration"),
        (f"level at 72 h [{u('concentration')}]", "p:level_at_72h", "concentration"),
        ("check", None, None),
    ]

    def cell(r, i, key, kind, header):
        if header == "#":
            return i
        if header == "regimen":
            return r.label
        if header == "check":
            return "meets target" if r.meets_target else "FLAG"
        value = r.predicted.get(key[2:]) if key.startswith("p:") else getattr(r, key)
        return conv(value, kind)

    table = [[cell(r, i, key, kind, h) for h, key, kind in columns]
             for i, r in enumerate(res.regimens, 1)]
    keep = [j for j, (h, key, _) in enumerate(columns)
            if (key is None or any(row[j] is not None for row in table))
            and (key != "start" or from_state)]
    headers = [columns[j][0] for j in keep]
    rows = [[row[j] for j in keep] for row in table]
    heading = ("Proposed regimens (rounded; peak/trough/average/plateau at steady state; highest, "
               "lowest and level at 72 h on the course projected from the start):"
               if from_state else "Proposed regimens (predicted at steady state, rounded):")
    lines += [heading, format_table(headers, rows)]
    for i, r in enumerate(res.regimens, 1):
        lines += [f"  #{i} FLAG: {f}" for f in r.flags]
    lines += [f"note: {n}" for n in res.notes]
    return "\n".join(lines)


def design_text(results, conv: UnitConverter, *, title: str | None = None, failures=(),
                colour: bool = False) -> str:
    """Terminal output of ``pkcalc design``: caution (with the not-an-order line) first."""
    return assemble_text([design_result_text(r, conv) for r in results],
                         [(r.name, r.warnings) for r in results], title=title,
                         failures=failures, colour=colour, extra_caution=DESIGN_CAUTION)
