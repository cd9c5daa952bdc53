"""Terminal and JSON output of ``pkcalc fit`` (and the side-by-side NCA table)."""

from __future__ import annotations

from typing import Any

from .._format import format_table
from .base import UnitConverter, assemble_text, failures_json, json_document, json_number

_KIND = {"clearance": "clearance", "volume": "volume", "half_life": "time",
         "elimination_rate": "elimination_rate"}
_RESIDUAL_KIND = {"additive": "concentration", "scale": None, "proportional": None}


def _estimate_dict(e, kind: str | None, conv: UnitConverter) -> dict[str, Any]:
    c = (lambda x: json_number(x)) if kind is None else (lambda x: json_number(conv(x, kind)))
    return {"value": c(e.value), "se": c(e.se), "rse_percent": json_number(e.rse_percent),
            "ci_low": c(e.ci_low), "ci_high": c(e.ci_high)}


def fit_subject_dict(r, conv: UnitConverter) -> dict[str, Any]:
    """One subject's JSON object (docs/formats.md keys, display units)."""
    return {
        "subject": r.subject, "converged": r.converged, "method": r.method,
        "estimates": {k: _estimate_dict(e, _KIND[k], conv) for k, e in r.estimates.items()},
        "correlation_clearance_volume": json_number(r.correlation),
        "error_model": r.error_model, "weighting": r.weighting, "blq_method": r.blq_method,
        "residual_error": {k: _estimate_dict(e, _RESIDUAL_KIND.get(k), conv)
                           for k, e in r.residual_error.items()},
        "objective": json_number(r.objective), "aic": json_number(r.aic), "bic": json_number(r.bic),
        "n_obs": r.n_obs, "n_blq": r.n_blq, "n_params": r.n_params,
        "starts": r.starts, "starts_agreed": r.starts_agreed, "iterations": r.iterations,
        "prior": {k: json_number(v) for k, v in r.prior.items()} or None,
        "warnings": list(r.warnings), "notes": list(r.notes),
    }


def comparison_dicts(comparisons, conv: UnitConverter) -> list[dict[str, Any]]:
    kinds = {"clearance": "clearance", "half-life (terminal)": "time"}
    out = []
    for c in comparisons:
        rows = []
        for row in c.rows:
            kind = kinds.get(row["quantity"], "volume")
            rows.append({"quantity": row["quantity"],
                         "fit": json_number(conv(row["fit"], kind)),
                         "nca": json_number(conv(row["nca"], kind)),
                         "ratio": json_number(row["ratio"])})
        out.append({"subject": c.subject, "rows": rows, "flags": list(c.flags)})
    return out


def fit_json(results, conv: UnitConverter, *, title: str | None = None, failures=(),
             comparisons=None, settings: dict[str, Any] | None = None) -> dict[str, Any]:
    """The ``pkcalc fit --json`` document."""
    body: dict[str, Any] = {"title": title, "settings": settings or {},
                            "subjects": [fit_subject_dict(r, conv) for r in results],
                            "failures": failures_json(failures)}
    if comparisons is not None:
        body["comparison_with_nca"] = comparison_dicts(comparisons, conv)
    return json_document("fit", conv, body)


def _ci(e: dict[str, Any]) -> str:
    if e["ci_low"] is None:
        return "-"
    return f"{e['ci_low']:.4g}-{e['ci_high']:.4g}"


def fit_text(results, conv: UnitConverter, *, title: str | None = None, failures=(),
             comparisons=None, warnings=(), settings: dict[str, Any] | None = None,
             colour: bool = False) -> str:
    """Terminal output: caution, estimates per subject, residual error, NCA comparison."""
    u = conv.unit
    dicts = [fit_subject_dict(r, conv) for r in results]
    sections = []
    if settings:
        sections.append("Settings: " + "; ".join(
            f"{k.replace('_', ' ')}: {'-' if v is None else str(v).replace('_', ' ')}"
            for k, v in settings.items()))
    rows = []
    for d in dicts:
        e = d["estimates"]
        rows.append([d["subject"], e["clearance"]["value"], _ci(e["clearance"]),
                     e["volume"]["value"], _ci(e["volume"]), e["half_life"]["value"],
                     _ci(e["half_life"]), d["correlation_clearance_volume"], d["objective"],
                     d["aic"], f"{d['n_obs']}/{d['n_blq']}",
                     f"{d['starts_agreed']}/{d['starts']}",
                     "yes" if d["converged"] else "NO"])
    sections.append("Estimates (95 % intervals built on the log scale):\n" + format_table(
        ["subject", f"CL [{u('clearance')}]", "CL 95% CI", f"V [{u('volume')}]", "V 95% CI",
         f"t1/2 [{u('time')}]", "t1/2 95% CI", "corr(CL,V)", "-2lnL", "AIC", "levels/BLQ",
         "starts agreed", "converged"], rows))
    res_rows = []
    for d in dicts:
        for k, e in d["residual_error"].items():
            unit = u("concentration") if k == "additive" else (
                "fraction" if k == "proportional" else "")
            res_rows.append([d["subject"], k, e["value"], unit, e["rse_percent"], _ci(e)])
    if res_rows:
        sections.append("Residual error:\n" + format_table(
            ["subject", "component", "value", "unit", "RSE %", "95% CI"], res_rows))
    if comparisons:
        crow = []
        for c in comparison_dicts(comparisons, conv):
            for row in c["rows"]:
                crow.append([c["subject"], row["quantity"], row["fit"], row["nca"],
                             row["ratio"]])
        flags = [f"  subject {c.subject}: FLAG: {f}" for c in comparisons for f in c.flags]
        sections.append("Fit beside non-compartmental analysis (ratio = fit / NCA):\n"
                        + format_table(["subject", "quantity", "fit", "NCA", "ratio"], crow)
                        + ("\n" + "\n".join(flags) if flags else "\n  no disagreement beyond "
                           "the threshold"))
    notes = [f"  subject {r.subject}: {n}" for r in results for n in r.notes]
    if notes:
        sections.append("Notes:\n" + "\n".join(notes))
    warn_items = [(f"subject {r.subject}", r.warnings) for r in results]
    if warnings:
        warn_items.insert(0, ("study", list(warnings)))
    return assemble_text(sections, warn_items, title=title, failures=failures, colour=colour)


__all__ = ["comparison_dicts", "fit_json", "fit_subject_dict", "fit_text"]
