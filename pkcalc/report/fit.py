"""Terminal and JSON output of ``pkcalc fit`` (and the side-by-side NCA table)."""

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

_KIND = {"clearance": "clearance", "volume": "volume", "half_life": "time",
         "elimination_rate": "elimination_rate"}
_RESIDUAL_KIND = {"additive": "concentration", "scale": None, "proportional": None}


def _estimate_dict(e, kind: str | None, conv: UnitConverter) -> dict[str, Any]:
    c = (lambda x: json_number(x)) if kind is None else (lambda x: json_number(conv(x, kind)))
    return {"value": c(e.value), "se": c(e.se), "rse_percent": json_number(e.rse_percent),
            "ci_low": c(e.ci_low), "ci_high": c(e.ci_high)}


_TWO_KIND = {"clearance": "clearance", "central_volume": "volume",
             "intercompartmental_clearance": "clearance", "peripheral_volume": "volume",
             "terminal_half_life": "time", "distribution_half_life": "time",
             "fast_fraction": None}


def adequacy_dict(a, conv: UnitConverter) -> dict[str, Any] | None:
    """The ``adequacy`` object of a subject (docs/formats.md; display units)."""
    if a is None:
        return None

    def c(x, kind):
        return json_number(x if kind is None or x is None else conv(x, kind))

    diffs = {k: c(v, "time" if k == "early_level_time_after_end" else None)
             for k, v in a.differences.items()}
    return {"verdict": a.verdict, "reason": a.reason,
            "levels_after_infusion": a.levels_after_infusion,
            "objective_one_compartment": json_number(a.objective_one),
            "objective_two_exponential": json_number(a.objective_two),
            "delta_aic": json_number(a.delta_aic), "likelihood_ratio_p": json_number(a.lrt_p),
            "runs": a.runs, "runs_test_p": json_number(a.runs_p),
            "trend_test_p": json_number(a.trend_p),
            "two_exponential_sensitivity_check": {k: c(v, _TWO_KIND[k])
                                                  for k, v in a.two_exponential.items()}
            or None,
            "differences": diffs or None,
            "earliest_sampling_after_infusion": c(a.earliest_sampling_after_infusion, "time"),
            "notes": list(a.notes)}


def adequacy_summary(results) -> dict[str, Any] | None:
    """Study-level counts of the adequacy verdicts and the sentence that says them."""
    from ..fit.adequacy import adequacy_counts, counts_sentence

    counts = adequacy_counts(results)
    if counts is None:
        return None
    return {**counts, "subjects": sum(counts.values()), "text": counts_sentence(counts)}


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
        "n_levels": r.n_obs, "n_blq": r.n_blq, "n_parameters": r.n_params,
        "starts": r.starts, "starts_agreed": r.starts_agreed, "iterations": r.iterations,
        "prior": {k: json_number(v) for k, v in r.prior.items()} or None,
        "warnings": list(r.warnings), "notes": list(r.notes),
        "adequacy": adequacy_dict(r.adequacy, conv),
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
        out.append({"subject": c.subject, "rows": rows, "flags": list(c.flags),
                    "causes": list(c.causes)})
    return out


def fit_json(results, conv: UnitConverter, *, title: str | None = None, failures=(),
             comparisons=None, settings: dict[str, Any] | None = None) -> dict[str, Any]:
    """The ``pkcalc fit --json`` document."""
    body: dict[str, Any] = {"title": title, "settings": settings or {},
                            "subjects": [fit_subject_dict(r, conv) for r in results],
                            "failures": failures_json(failures),
                            "adequacy_summary": adequacy_summary(results)}
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
        sections.append(settings_line(settings))
    rows = []
    for d in dicts:
        e = d["estimates"]
        rows.append([d["subject"], e["clearance"]["value"], _ci(e["clearance"]),
                     e["volume"]["value"], _ci(e["volume"]), e["half_life"]["value"],
                     _ci(e["half_life"]), d["correlation_clearance_volume"], d["objective"],
                     d["aic"], f"{d['n_levels']}/{d['n_blq']}",
                     f"{d['starts_agreed']}/{d['starts']}",
                     "yes" if d["converged"] else "NO"])
    sections.append("Estimates (95 % intervals built on the log scale):\n" + format_table(
        ["subject", f"CL [{u('clearance')}]", "CL 95% CI", f"V [{u('volume')}]", "V 95% CI",
         f"{glossary.label('half_life')} [{u('time')}]", f"{glossary.label('half_life')} 95% CI",
         "corr(CL,V)", glossary.label("objective"), "AIC", "levels/BLQ", "starts agreed",
         "converged"], rows))
    res_rows = []
    for d in dicts:
        for k, e in d["residual_error"].items():
            unit = u("concentration") if k == "additive" else (
                "fraction" if k == "proportional" else "")
            res_rows.append([d["subject"], k, e["value"], unit, e["rse_percent"], _ci(e)])
    if res_rows:
        sections.append("Residual error:\n" + format_table(
            ["subject", "component", "value", "unit", "RSE %", "95% CI"], res_rows))
    adequacy = adequacy_text(dicts, results, conv)
    if adequacy:
        sections.append(adequacy)
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


_VERDICT_WORDS = {"adequate": "adequate", "distribution_phase": "DISTRIBUTION PHASE",
                  "too_few_levels": "too few levels"}


def adequacy_text(dicts, results, conv: UnitConverter, max_rows: int | None = None
                  ) -> str | None:
    """The adequacy section: the study count, a row per subject, the flagged subjects'
    evidence in words and the sampling-time advice."""
    summary = adequacy_summary(results)
    if summary is None:
        return None
    u = conv.unit
    rows = []
    for d in dicts:
        a = d["adequacy"]
        if a is None:
            continue
        rows.append([d["subject"], _VERDICT_WORDS[a["verdict"]], a["levels_after_infusion"],
                     a["delta_aic"], a["likelihood_ratio_p"], a["runs_test_p"],
                     a["trend_test_p"], a["earliest_sampling_after_infusion"]])
    more = 0 if max_rows is None else max(len(rows) - max_rows, 0)
    rows = rows if max_rows is None else rows[:max_rows]
    lines = [f"Is one compartment adequate? {summary['text']}.",
             format_table(["subject", "one compartment", "levels after infusion",
                           "ΔAIC (two exponentials)", "likelihood-ratio p", "runs test p",
                           "trend test p",
                           f"draw from [{u('time')} after infusion]"], rows)
             + (f"\n... and {more} more subjects (all in --json / --out)" if more else "")]
    for d in dicts:
        a = d["adequacy"]
        if a is not None and a["verdict"] == "distribution_phase":
            lines.append(f"  subject {d['subject']}: {a['reason']}")
            lines += [f"    {n}" for n in a["notes"]]
    lines.append("  (two-exponential numbers are a sensitivity check; the reported estimates "
                 "stay one-compartment)")
    return "\n".join(lines)


__all__ = ["adequacy_dict", "adequacy_summary", "adequacy_text", "comparison_dicts", "fit_json",
           "fit_subject_dict", "fit_text"]
