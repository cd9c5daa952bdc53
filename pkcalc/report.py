"""Human-facing output: the caution, terminal tables, JSON documents, files.

Functions here return text or dictionaries; only :mod:`pkcalc.cli` prints.
The caution text lives here and nowhere else.
"""

from __future__ import annotations

import json
import math
import os
import tempfile
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

import numpy as np

from . import __version__
from ._format import fmt, format_table
from .units import CANONICAL, display_factor

__all__ = [
    "CAUTION",
    "CAUTION_SHORT",
    "UnitConverter",
    "caution_block",
    "json_document",
    "predict_json",
    "predict_text",
    "write_atomic",
    "write_caution_file",
]

#: The clinical-use caution carried by every human-facing output.
CAUTION = (
    "CAUTION: These results are model estimates for research and review. They assume "
    "linear one-compartment kinetics and the inputs as given. They are not dosing orders: "
    "dosing decisions belong to licensed clinicians and pharmacists following local "
    "protocols and product labelling. Check every number before any clinical use."
)

#: One-line form for plot footers.
CAUTION_SHORT = (
    "Model estimates for research and review only; dosing decisions belong to licensed "
    "clinicians and pharmacists under local protocols."
)

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
        self.units["auc"] = f"{self.units['concentration']}*{self.units['time']}"
        self._factor["auc"] = self._factor["concentration"] * self._factor["time"]

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


def _num(x: Any) -> Any:
    """JSON-safe number: NaN/inf -> None, numpy -> float."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def _list(a: Iterable[float]) -> list[Any]:
    return [_num(v) for v in a]


def json_document(kind: str, units: UnitConverter | None, body: dict[str, Any]) -> dict[str, Any]:
    """The common envelope of every JSON output: version, units map, caution."""
    doc: dict[str, Any] = {"pkcalc_version": __version__, "command": kind}
    if units is not None:
        doc["units"] = {k: v for k, v in units.units.items() if k != "auc"}
    doc["caution"] = CAUTION
    doc.update(body)
    return doc


def dumps(doc: dict[str, Any]) -> str:
    """JSON text (NaN refused: values were made JSON-safe before)."""
    return json.dumps(doc, indent=2, allow_nan=False)


# --------------------------------------------------------------------------- predict
def predict_scenario_dict(pred, conv: UnitConverter) -> dict[str, Any]:
    """One scenario's JSON object (DESIGN.md §6 keys, display units)."""
    p = pred.parameters
    ss = pred.steady_state
    target = pred.target
    return {
        "name": pred.name,
        "parameters": {
            "clearance": _num(conv(p["clearance"], "clearance")),
            "volume": _num(conv(p["volume"], "volume")),
            "elimination_rate": _num(conv(p["elimination_rate"], "elimination_rate")),
            "half_life": _num(conv(p["half_life"], "time")),
            "time_constant": _num(conv(p["time_constant"], "time")),
        },
        "plateau_concentration": _num(conv(pred.plateau_concentration, "concentration")),
        "plateau_basis": pred.plateau_basis,
        "time_to_fraction": {
            f"{f:g}": _num(conv(t, "time")) for f, t in pred.time_to_fraction.items()
        },
        "time_to_fraction_half_lives": {
            f"{f:g}": _num(t / p["half_life"]) for f, t in pred.time_to_fraction.items()
        },
        "profile": {
            "time": _list(conv(pred.time, "time")),
            "concentration": _list(conv(pred.concentration, "concentration")),
        },
        "steady_state": None if ss is None else {
            "peak": _num(conv(ss.peak, "concentration")),
            "trough": _num(conv(ss.trough, "concentration")),
            "average": _num(conv(ss.average, "concentration")),
            "interval": _num(conv(ss.interval, "time")),
        },
        "target": None if target is None else {
            "plateau": _num(conv(target.plateau, "concentration")),
            "window": None if target.low is None else [
                _num(conv(target.low, "concentration")), _num(conv(target.high, "concentration"))
            ],
        },
        "flags": list(pred.flags),
        "warnings": list(pred.warnings),
    }


def failures_json(failures) -> list[dict[str, Any]]:
    """Failed items (name, problems) as JSON objects."""
    return [{"item": label, "problems": [p.to_dict() for p in err.problems]}
            for label, err in failures]


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
        ["clearance", conv(p["clearance"], "clearance"), u("clearance")],
        ["volume", conv(p["volume"], "volume"), u("volume")],
        ["elimination rate constant", conv(p["elimination_rate"], "elimination_rate"),
         u("elimination_rate")],
        ["half-life", conv(p["half_life"], "time"), u("time")],
        ["time constant (V/CL)", conv(p["time_constant"], "time"), u("time")],
        ["plateau", conv(pred.plateau_concentration, "concentration"), u("concentration")],
    ]
    for f, t in pred.time_to_fraction.items():
        rows.append([f"time to {f:.0%} of plateau ({t / p['half_life']:.2f} half-lives)",
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


def warnings_text(items: Iterable[tuple[str, Iterable[str]]]) -> str:
    """A separate block listing warnings per item; empty string when there are none."""
    lines = []
    for name, warns in items:
        lines += [f"  {name}: {w}" for w in warns]
    return "Warnings:\n" + "\n".join(lines) if lines else ""


def failures_text(failures) -> str:
    """Problems of items that could not be computed."""
    if not failures:
        return ""
    lines = ["Not computed (input problems):"]
    for _label, err in failures:
        lines += [f"  {p}" for p in err.problems]
    return "\n".join(lines)


def predict_text(predictions, conv: UnitConverter, *, title: str | None = None,
                 failures=(), colour: bool = False) -> str:
    """Terminal output of ``pkcalc predict``: caution first, tables, warnings."""
    parts = [caution_block(colour)]
    if title:
        parts.append(title)
    parts += [predict_scenario_text(p, conv) for p in predictions]
    for block in (warnings_text((p.name, p.warnings) for p in predictions),
                  failures_text(failures)):
        if block:
            parts.append(block)
    return "\n\n".join(parts) + "\n"


# --------------------------------------------------------------------------- files
def write_atomic(path: str | Path, data: str | bytes) -> Path:
    """Write a file atomically: a temporary file in the same folder, then rename."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    mode = "wb" if isinstance(data, bytes) else "w"
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, mode, **({} if mode == "wb" else {"encoding": "utf-8"})) as fh:
            fh.write(data)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path


def write_caution_file(out_dir: str | Path) -> Path:
    """``CAUTION.txt`` beside files written with ``--out``."""
    text = CAUTION + "\n\npkcalc " + __version__ + "\n"
    return write_atomic(Path(out_dir) / "CAUTION.txt", text)


# --------------------------------------------------------------------------- design
DESIGN_CAUTION = (
    "This design is a calculation to be checked by a licensed pharmacist or clinician under "
    "local protocols. It is not an order."
)

_ESTIMATE_KIND = {
    "clearance": "clearance", "clearance_exact": "clearance", "clearance_chiou": "clearance",
    "volume": "volume", "elimination_rate": "elimination_rate", "half_life": "time",
    "pause_before_new_rate": "time", "time_to_within_target_without_loading": "time",
    "peak_at_end_of_infusion": "concentration", "trough_at_end_of_interval": "concentration",
    "pre_dose_level": "concentration",
}
_PREDICTED_KIND = {"auc_24": "auc", "time_to_within_5pct": "time"}
_REGIMEN_KIND = {"rate": "rate", "loading_dose": "amount", "loading_time": "time",
                 "dose": "amount", "interval": "time", "infusion_time": "time"}


def _conv_any(conv: UnitConverter, key: str, value: Any, table: Mapping[str, str],
              default: str | None = "concentration") -> Any:
    kind = table.get(key, default)
    if value is None or kind is None:
        return _num(value)
    return _num(conv(value, kind))


def design_regimen_dict(r, conv: UnitConverter, scenario: str) -> dict[str, Any]:
    out: dict[str, Any] = {"scenario": scenario, "label": r.label}
    for key, kind in _REGIMEN_KIND.items():
        out[key] = _num(conv(getattr(r, key), kind))
    predicted = {k: None for k in ("plateau", "peak", "trough", "average")}
    predicted.update({k: _conv_any(conv, k, v, _PREDICTED_KIND) for k, v in r.predicted.items()})
    out["predicted"] = predicted
    out["meets_target"] = r.meets_target
    out["flags"] = list(r.flags)
    out["exact"] = {k: _conv_any(conv, k, v, {**_REGIMEN_KIND, **_ESTIMATE_KIND}, None)
                    for k, v in r.exact.items()}
    return out


def _target_dict(target: Mapping[str, Any], conv: UnitConverter) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, v in target.items():
        kind = "time" if k == "infusion_time" else "concentration"
        if isinstance(v, list | tuple):
            out[k] = [_conv_any(conv, k, x, {}, kind) for x in v]
        else:
            out[k] = _conv_any(conv, k, v, {}, kind)
    return out


def design_json(results, conv: UnitConverter, *, title: str | None = None,
                failures=()) -> dict[str, Any]:
    """The ``pkcalc design --json`` document: top-level ``regimens`` (DESIGN.md §6)
    plus ``designs`` with each scenario's estimates, target and notes."""
    regimens, designs = [], []
    for res in results:
        regs = [design_regimen_dict(r, conv, res.name) for r in res.regimens]
        regimens += regs
        designs.append({
            "name": res.name, "method": res.method,
            "parameters": {"clearance": _num(conv(res.clearance, "clearance")),
                           "volume": _num(conv(res.volume, "volume"))},
            "estimates": {k: _conv_any(conv, k, v, _ESTIMATE_KIND, None)
                          for k, v in res.estimates.items()},
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
            kind = _ESTIMATE_KIND.get(k)
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
        unit = u("time") if k == "infusion_time" else u("concentration")
        tparts.append(f"{k.replace('_', ' ')} {text} {unit}")
    if tparts:
        lines.append("Target: " + "; ".join(str(p) for p in tparts))
    columns = [
        ("#", None, None), ("regimen", None, None),
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
            if key is None or any(row[j] is not None for row in table)]
    headers = [columns[j][0] for j in keep]
    rows = [[row[j] for j in keep] for row in table]
    lines += ["Proposed regimens (predicted at steady state, rounded):",
              format_table(headers, rows)]
    for i, r in enumerate(res.regimens, 1):
        lines += [f"  #{i} FLAG: {f}" for f in r.flags]
    lines += [f"note: {n}" for n in res.notes]
    return "\n".join(lines)


def design_text(results, conv: UnitConverter, *, title: str | None = None, failures=(),
                colour: bool = False) -> str:
    """Terminal output of ``pkcalc design``: caution (with the not-an-order line) first."""
    parts = [caution_block(colour, extra=DESIGN_CAUTION)]
    if title:
        parts.append(title)
    parts += [design_result_text(r, conv) for r in results]
    for block in (warnings_text((r.name, r.warnings) for r in results),
                  failures_text(failures)):
        if block:
            parts.append(block)
    return "\n\n".join(parts) + "\n"
