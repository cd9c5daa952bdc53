"""Terminal and JSON output of ``pkcalc design``."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from .. import glossary
from .._format import fmt, format_table, format_table_fit
from ..design.common import clock_after
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


def design_regimen_dict(r, conv: UnitConverter, scenario: str,
                        origin: str | None = None) -> dict[str, Any]:
    out: dict[str, Any] = {"scenario": scenario, "label": r.label}
    for key in _REGIMEN_KEYS:
        out[key] = json_number(conv(getattr(r, key), KIND_OF[key]))
    predicted = {k: None for k in ("plateau", "peak", "trough", "average")}
    predicted.update({k: _conv_any(conv, k, v) for k, v in r.predicted.items()})
    out["predicted"] = predicted
    out["meets_target"] = r.meets_target
    out["status"] = r.status
    out["flags"] = list(r.flags)
    out["exact"] = {k: _conv_any(conv, k, v, None) for k, v in r.exact.items()}
    out["start"] = json_number(conv(r.start, "time"))
    out["first_dose_time"] = json_number(conv(r.first_dose_time, "time"))
    if origin:
        out["start_clock"] = clock_after(origin, r.start)
        out["first_dose_clock"] = clock_after(origin, r.first_dose_time)
    out["doses"] = [{k: _conv_any(conv, k, v, None) if k != "count" else v
                     for k, v in d.as_dict().items()} for d in r.doses]
    if r.attainment is not None:
        out["attainment"] = attainment_dict(r.attainment, conv)
    return out


def attainment_dict(a, conv: UnitConverter) -> dict[str, Any]:
    """``attainment`` of a regimen: probabilities (0-1), the method, and the course band
    (display units) where it was computed."""
    out = {k: json_number(v) if isinstance(v, float) else v for k, v in a.as_dict().items()}
    if a.band:
        out["band"] = {"time": [json_number(conv(t, "time")) for t in a.band["time"]],
                       **{q: [json_number(conv(c, "concentration")) for c in a.band[q]]
                          for q in ("q05", "q50", "q95")}}
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
        regs = [design_regimen_dict(r, conv, res.name, res.clock_origin)
                for r in res.regimens]
        regimens += regs
        designs.append({
            "name": res.name, "method": res.method,
            "parameters": {"clearance": json_number(conv(res.clearance, "clearance")),
                           "volume": json_number(conv(res.volume, "volume"))},
            "estimates": {k: _conv_any(conv, k, v, None) for k, v in res.estimates.items()},
            "target": _target_dict(res.target, conv),
            "salt_factor": res.salt_factor, "clock_origin": res.clock_origin,
            "suspects": list(res.suspects),
            "formulas": [{"name": f["name"], "key": f["key"],
                          "value": _conv_any(conv, f["key"], f["value"], None),
                          "validity": f["validity"]} for f in res.formulas],
            "assumed": {k: _conv_any(conv, k, v, None) for k, v in res.assumed.items()},
            "regimens": regs, "notes": list(res.notes), "warnings": list(res.warnings),
            "attainment_level": res.attainment_level,
            "current": None if res.current is None else {
                "label": res.current.label,
                "attainment": attainment_dict(res.current.attainment, conv)},
        })
    return json_document("design", conv, {
        "design_caution": DESIGN_CAUTION, "title": title, "regimens": regimens,
        "designs": designs, "failures": failures_json(failures),
    })


#: Columns of the regimen table: (header, unit kind, key); ``p:`` keys are predictions.
_COLUMNS = (
    ("#", None, None), ("regimen", None, None), ("check", None, None),
    ("from", "time", "start"),
    ("rate", "rate", "rate"), ("loading", "amount", "loading_dose"),
    ("loading time", "time", "loading_time"), ("dose", "amount", "dose"),
    ("every", "time", "interval"), ("infusion", "time", "infusion_time"),
    ("peak", "concentration", "p:peak"), ("trough", "concentration", "p:trough"),
    ("average", "concentration", "p:average"), ("AUC24", "auc", "p:auc_24"),
    ("plateau", "concentration", "p:plateau"), ("highest", "concentration", "p:highest"),
    ("lowest after loading", "concentration", "p:lowest_after_loading"),
    ("level", "concentration", "p:level"), ("level at 72 h", "concentration", "p:level_at_72h"),
    ("time below trough max", "time", "p:time_below_trough_max"),
)


def design_result_text(res, conv: UnitConverter) -> str:
    lines = [f"Design: {res.name}  (method: {glossary.method_name(res.method)})"]
    lines += [f"CHECK LEVELS: {s}" for s in res.suspects]
    if res.clock_origin:
        lines.append(f"time 0 h = {res.clock_origin} (the first recorded dose)")
    lines += _parameters_and_estimates(res, conv)
    target = _target_line(res, conv)
    if target:
        lines.append(target)
    lines += _regimen_table(res, conv)
    for i, r in enumerate(res.regimens, 1):
        lines += [f"  #{i} {'CHECK LEVELS' if r.check_levels else 'FLAG'}: {f}"
                  for f in r.flags]
        if r.check_levels and not r.flags:
            lines.append(f"  #{i} CHECK LEVELS: the levels it rests on failed a check (above)")
    lines += _attainment_lines(res)
    lines += _times(res, conv)
    lines += [f"warning: {w}" for w in res.warnings]
    lines += [f"note: {n}" for n in res.notes]
    return "\n".join(lines)


def _percent(p: float | None) -> str:
    if p is None:
        return "-"
    if 0 < p < 0.005:
        return "< 1 %"
    if 0.995 < p < 1:
        return "> 99 %"
    return f"{100 * p:.0f} %"


def _attainment_lines(res) -> list[str]:
    """How likely each proposal (and the current regimen) meets each target."""
    rows = [(f"#{i}", r.attainment) for i, r in enumerate(res.regimens, 1)
            if r.attainment is not None]
    if not rows:
        return []
    if res.current is not None:
        rows.append(("current", res.current.attainment))
    keys = [k for k in ("peak", "trough", "level", "auc_24")
            if any(getattr(a, k) is not None for _, a in rows)]
    names = {"peak": "peak in window", "trough": "trough in window",
             "level": "level in window", "auc_24": "AUC24 in range"}
    table = [[name, *(_percent(getattr(a, k)) for k in keys), _percent(a.joint)]
             for name, a in rows]
    out = [f"Chance of meeting the targets over the next 72 h (from the levels and the prior; "
           f"'meets target' needs all at once >= {_percent(res.attainment_level)}):",
           format_table(["#", *(names[k] for k in keys), "all at once"], table)]
    if res.current is not None:
        out.append(f"  current = {res.current.label}")
    out.append("  A probability from a model is not a guarantee: local protocols and a "
               "licensed pharmacist decide.")
    return out


def _times(res, conv: UnitConverter) -> list[str]:
    """When each proposal starts and gives its first dose, as clock times too."""
    if not res.clock_origin or not res.regimens:
        return []
    out = ["Times (clock):"]
    for i, r in enumerate(res.regimens, 1):
        first = r.first_dose_time
        text = f"  #{i} starts {clock_after(res.clock_origin, r.start)}"
        if first is not None and first > r.start + 1e-9:
            text += (f"; hold until {clock_after(res.clock_origin, first)} "
                     f"({fmt(conv(first - r.start, 'time'))} {conv.unit('time')})")
        elif first is not None:
            text += "; first dose then"
        out.append(text)
    return out


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
            rows.append([glossary.words(k), conv(v, kind) if kind else v,
                         u(kind) if kind else ("%" if k.endswith("percent") else "")])
        lines += ["Individual estimates from the measured levels:",
                  format_table(["estimate", "value", "unit"], rows)]
    if res.assumed:
        lines.append("Assumed, not measured: " + "; ".join(
            f"{glossary.words(k)} {fmt(conv(v, KIND_OF.get(k, 'concentration')))} "
            f"{u(KIND_OF.get(k, 'concentration'))}" for k, v in res.assumed.items()))
    for f in res.formulas:
        kind = f["kind"]
        lines.append(f"For reference only, not a proposal: {f['name']} = "
                     f"{fmt(conv(f['value'], kind))} {u(kind)} -- {f['validity']}")
    return lines


def target_text(target: Mapping[str, Any], units: Mapping[str, str]) -> str:
    """A target in words (terminal and HTML): ``peak at most 30 mg/L; trough at least 8
    mg/L; AUC over 24 h 400 to 600 mg*h/L``; ``units`` maps kind -> display unit."""
    parts = []
    for k, v in target.items():
        if v is None or (isinstance(v, list | tuple) and all(x is None for x in v)):
            continue
        kind = {"infusion_time": "time", "auc_24": "auc"}.get(k, "concentration")
        unit = units.get(kind, glossary.UNITS[kind])
        name = glossary.words(k.removesuffix("_limits"))
        if isinstance(v, list | tuple) and v[0] is None:
            text = f"at most {fmt(v[1])}"
        elif isinstance(v, list | tuple) and v[1] is None:
            text = f"at least {fmt(v[0])}"
        else:
            text = " to ".join(fmt(x) for x in v) if isinstance(v, list | tuple) else fmt(v)
        parts.append(f"{name} {text} {unit}")
    return "; ".join(parts)


def _target_line(res, conv: UnitConverter) -> str | None:
    text = target_text(_target_dict(res.target, conv), conv.units)
    return "Target: " + text if text else None


def _regimen_table(res, conv: UnitConverter) -> list[str]:
    """The proposals as a table; empty columns left out (``from`` only from a state)."""
    from_state = any(r.start or "start_level" in r.predicted for r in res.regimens)

    floor = _small_level(res)

    def cell(r, i, name, kind, key):
        if name == "#":
            return i
        if name == "regimen":
            return r.label
        if name == "check":
            return r.status
        value = r.predicted.get(key[2:]) if key.startswith("p:") else getattr(r, key)
        if kind == "concentration" and value is not None and floor and 0 <= value < floor:
            return f"< {fmt(conv(floor, kind), 2)}"     # below 1 % of the aim: not a number
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
    return [heading, format_table_fit(headers, [[row[j] for j in keep] for row in table],
                                      keep=1)]


def regimen_table_from_doc(d: dict[str, Any], units: dict[str, str]):
    """The regimen table of one design of the JSON document, with the terminal's columns
    (:data:`_COLUMNS`; the values already in display units), empty columns left out; the
    start as a clock time where there is one."""
    regs = d["regimens"]

    def cell(i, r, name, key):
        if name == "#":
            return i
        if name == "regimen":
            return r["label"]
        if name == "check":
            return r["status"]
        if key == "start":
            return r.get("start_clock") or r["start"]
        return r["predicted"].get(key[2:]) if key.startswith("p:") else r.get(key)

    table = [[cell(i, r, name, key) for name, _, key in _COLUMNS]
             for i, r in enumerate(regs, 1)]
    from_state = any(r["start"] or r["predicted"].get("start_level") is not None for r in regs)
    keep = [j for j, (_, _, key) in enumerate(_COLUMNS)
            if (key is None or any(row[j] is not None for row in table))
            and (key != "start" or from_state)]
    auc = units.get("auc", "mg*h/L")
    headers = []
    for j in keep:
        name, kind, key = _COLUMNS[j]
        if kind is None:
            headers.append(name)
        elif key == "start":
            headers.append(f"{name} [{units['time']} or clock]")
        else:
            headers.append(f"{name} [{auc if kind == 'auc' else units[kind]}]")
    return headers, [[row[j] for j in keep] for row in table]


def _small_level(res) -> float | None:
    """1 % of the design's main concentration aim (plateau or peak): levels below it are
    shown as "< x" rather than as numbers nobody can measure."""
    t = res.target
    for key in ("plateau", "peak", "level"):
        if isinstance(t.get(key), int | float) and t[key]:
            return 0.01 * t[key]
    limits = t.get("peak_limits")
    if isinstance(limits, list | tuple) and any(x for x in limits if x):
        return 0.01 * max(x for x in limits if x)
    return None


def design_text(results, conv: UnitConverter, *, title: str | None = None, failures=(),
                colour: bool = False) -> str:
    """Terminal output of ``pkcalc design``: caution (with the not-an-order line) first."""
    return assemble_text([design_result_text(r, conv) for r in results], [], title=title,
                         failures=failures, colour=colour, extra_caution=DESIGN_CAUTION)
