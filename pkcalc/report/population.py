"""Terminal and JSON output of ``pkcalc population``."""

from __future__ import annotations

from typing import Any

from .. import glossary
from .._format import format_table
from ..population.compare import COMPARED_CAPTION, stepwise_lines
from .base import (
    UnitConverter,
    assemble_text,
    failures_json,
    json_document,
    json_number,
    settings_line,
)
from .fit import adequacy_summary, adequacy_text, fit_subject_dict

_MAX_ROWS = 25


def _typ_unit(conv: UnitConverter, kind: str, per_kg: bool) -> str:
    return conv.unit(kind) + ("/kg" if per_kg else "")


def population_json(result, conv: UnitConverter, *, title: str | None = None, failures=(),
                    settings: dict[str, Any] | None = None) -> dict[str, Any]:
    """The ``pkcalc population --json`` document (docs/formats.md keys plus details)."""
    per_kg = result.covariate == "per_kg"
    kinds = {"clearance": "clearance", "volume": "volume"}
    typical = {k: json_number(conv(v, kinds[k])) for k, v in result.typical.items()}
    ci = {k: (None if v is None else [json_number(conv(v[0], kinds[k])),
                                      json_number(conv(v[1], kinds[k]))])
          for k, v in result.typical_ci.items()}
    body: dict[str, Any] = {
        "title": title, "settings": settings or {}, "method": result.method,
        "typical": typical,
        "typical_units": {k: _typ_unit(conv, kinds[k], per_kg) for k in kinds},
        "typical_se": {k: json_number(None if v is None else conv(v, kinds[k]))
                       for k, v in result.typical_se.items()},
        "typical_ci": ci,
        "variability_cv_percent": {k: json_number(v) for k, v in
                                   result.variability_cv_percent.items()},
        "correlation": json_number(result.correlation),
        "between_subject_covariance_log": [[json_number(x) for x in row] for row in result.omega],
        "covariate": {"model": result.covariate, "reference_weight_kg": result.reference_weight,
                      "exponents": {k: json_number(v) for k, v in result.exponents.items()},
                      "exponent_ci": None if result.exponent_ci is None else {
                          k: [json_number(v[0]), json_number(v[1])]
                          for k, v in result.exponent_ci.items()}},
        "residual_error": {k: json_number(v) for k, v in result.residual_error.items()},
        "shrinkage_percent": {k: json_number(v) for k, v in result.shrinkage_percent.items()},
        "percentiles": result.percentiles,
        "subjects": [fit_subject_dict(r, conv) for r in result.subjects],
        "adequacy_summary": adequacy_summary(result.subjects),
        "iterations": result.iterations, "converged": result.converged,
        "objective_per_iteration": [json_number(x) for x in result.objective_per_iteration],
        "bootstrap": {k: v for k, v in result.bootstrap.items() if k != "state"} or None,
        "notes": list(result.notes), "warnings": list(result.warnings),
        "failures": failures_json(failures),
    }
    body.update(marginal_json(result, conv, per_kg))
    return json_document("population", conv, body)


def _row_units(row: dict, conv: UnitConverter, per_kg: bool) -> tuple[Any, str]:
    """A parameter row's value converter and unit (display units; per kg when so)."""
    kind = row.get("kind")
    if kind is None:
        unit = "%" if row["name"].endswith("%") else ""
        return (lambda x: json_number(x)), unit
    unit = conv.unit(kind) + ("/kg" if per_kg and row["name"].startswith("typical") else "")
    return (lambda x: json_number(None if x is None else conv(x, kind))), unit


def parameter_dicts(rows: list[dict], conv: UnitConverter, per_kg: bool) -> list[dict]:
    """The table of every parameter with its standard error, in display units."""
    out = []
    for r in rows:
        c, unit = _row_units(r, conv, per_kg)
        out.append({"name": r["name"], "value": c(r["value"]), "unit": unit, "se": c(r["se"]),
                    "rse_percent": json_number(r["rse_percent"]), "ci_low": c(r["ci_low"]),
                    "ci_high": c(r["ci_high"])})
    return out


def marginal_json(result, conv: UnitConverter, per_kg: bool) -> dict[str, Any]:
    """The marginal-likelihood keys: objective, parameters, standard errors, comparison."""
    if result.method != "marginal":
        return {}
    corr = result.parameter_correlation
    out: dict[str, Any] = {
        "model": result.model_name, "objective": json_number(result.objective),
        "n_parameters": result.n_parameters, "n_levels": result.n_levels,
        "aic": json_number(result.aic), "bic": json_number(result.bic),
        "nodes": result.nodes, "between_subject": result.between_subject,
        "parameters": parameter_dicts(result.parameters, conv, per_kg),
        "effects": [{k: (json_number(v) if isinstance(v, float) else v) for k, v in e.items()}
                    for e in result.effects],
        "standard_errors": {
            "names": list(result.parameter_names),
            "correlation": None if corr is None else [[json_number(x) for x in row]
                                                      for row in corr],
            "condition_number": json_number(result.condition_number)},
    }
    comp = result.comparison
    if comp is not None:
        out["comparison"] = {"base": comp.base, "selected": comp.selected,
                             "common_effects": list(comp.common),
                             "nested_pairs": [{k: (json_number(v) if isinstance(v, float)
                                                   else v) for k, v in t.items()}
                                              for t in comp.tests()],
                             "models": [{k: (json_number(v) if isinstance(v, float) else v)
                                         for k, v in r.as_dict().items()} for r in comp.rows],
                             "stepwise": [{k: (json_number(v) if isinstance(v, float) else v)
                                           for k, v in s.items()} for s in comp.steps]}
    return out


def comparison_text(doc: dict[str, Any]) -> str | None:
    """The comparison table (and the stepwise path)."""
    comp = doc.get("comparison")
    if not comp:
        return None
    base = set(comp["models"][0]["effects"]) if comp["models"] else set()

    def own(m, first):
        effects = m["effects"] if first else [e for e in m["effects"] if e not in base]
        return "; ".join(effects) or "(none)"

    rows = [[m["model"], own(m, i == 0), m["objective"], m["n_parameters"],
             m["aic"], m["bic"], m["compared_with"], m["likelihood_ratio_df"],
             m["likelihood_ratio_p"],
             "FAILED: " + m["error"] if m["error"] else ("yes" if m["converged"] else "NO")]
            for i, m in enumerate(comp["models"])]
    lines = [COMPARED_CAPTION.format(base=comp["base"])]
    if comp.get("common_effects"):
        lines.append("every model also holds: " + "; ".join(comp["common_effects"])
                     + " (the weight model and the effects given with --effect)")
    lines += [format_table(["model", "effects (beyond the first model's)", "-2 ln L",
                           "parameters", "AIC", "BIC", "compared with", "likelihood-ratio df",
                           "likelihood-ratio p", "converged"], rows)]
    lines += stepwise_lines(comp["stepwise"])
    return "\n".join(lines)


def _num(x) -> str:
    return "-" if x is None else f"{x:.3g}"


def population_text(result, conv: UnitConverter, *, title: str | None = None, failures=(),
                    settings: dict[str, Any] | None = None, colour: bool = False) -> str:
    """Terminal output: caution, typical values, variability, residual error, subjects."""
    doc = population_json(result, conv, title=title, failures=failures, settings=settings)
    sections = []
    if settings:
        sections.append(settings_line(settings))
    rows = []
    for k in ("clearance", "volume"):
        ci = doc["typical_ci"].get(k)
        rows.append([k, doc["typical"][k], doc["typical_units"][k], doc["typical_se"].get(k),
                     "-" if not ci else f"{ci[0]:.4g}-{ci[1]:.4g}",
                     doc["variability_cv_percent"][k], doc["shrinkage_percent"].get(k)])
    sections.append(f"Population estimates ({result.method} method):\n" + format_table(
        ["parameter", "typical", "unit", "SE", "95% CI", "between-subject CV %",
         "shrinkage %"], rows))
    if doc.get("parameters"):
        prow = [[p["name"], p["value"], p["unit"], p["se"], p["rse_percent"],
                 "-" if p["ci_low"] is None else f"{p['ci_low']:.4g}-{p['ci_high']:.4g}"]
                for p in doc["parameters"]]
        head = (f"Every parameter (standard errors from the observed information; -2 ln L "
                f"{doc['objective']:.4f}, "
                f"{doc['n_parameters']} parameters, AIC {doc['aic']:.4f}, BIC {doc['bic']:.4f};"
                f" condition number {_num(doc['standard_errors']['condition_number'])}):\n")
        sections.append(head + format_table(["parameter", "value", "unit", "SE", "RSE %",
                                             "95% CI"], prow))
    comparison = comparison_text(doc)
    if comparison:
        sections.append(comparison)
    extra = []
    cov = doc["covariate"]
    if cov["model"] != "none" and cov["reference_weight_kg"] is not None:
        ref = cov["reference_weight_kg"]
        text = (f"weight model: {cov['model']} (typical at {ref:g} kg); exponents "
                + ", ".join(f"{k} {v:.3g}" for k, v in cov["exponents"].items()))
        if cov["exponent_ci"]:
            text += " (95% CI " + ", ".join(f"{k} {a:.3g}-{b:.3g}" for k, (a, b) in
                                             cov["exponent_ci"].items()) + ")"
        extra.append(text)
    if doc["correlation"] is not None:
        extra.append(f"correlation of ln CL and ln V between subjects: {doc['correlation']:.3g}")
    if doc["residual_error"]:
        extra.append("residual error: " + ", ".join(
            f"{k} {v:.4g}{' ' + conv.unit('concentration') if k == 'additive' else ''}"
            for k, v in doc["residual_error"].items()))
    if result.method == "iterative":
        obj = result.objective_per_iteration
        extra.append(f"iterations: {result.iterations} "
                     f"({'converged' if result.converged else 'NOT converged'}); approximate "
                     f"-2 ln L {obj[0]:.6g} -> {obj[-1]:.6g}" if obj else "")
    if doc["bootstrap"]:
        b = doc["bootstrap"]
        extra.append(f"bootstrap: {b['replicates']} replicates (seed {b['seed']}, "
                     f"{b['failed']} failed)")
    sections.append("\n".join(extra))
    srows = []
    for d in doc["subjects"][:_MAX_ROWS]:
        e = d["estimates"]
        pr = d.get("prior") or {}
        srows.append([d["subject"], e["clearance"]["value"], e["volume"]["value"],
                      e["half_life"]["value"], pr.get("ln_clearance_deviation"),
                      pr.get("ln_volume_deviation"), d["n_levels"]])
    more = len(doc["subjects"]) - _MAX_ROWS
    sections.append("Individual estimates under the population prior (MAP):\n" + format_table(
        ["subject", f"CL [{conv.unit('clearance')}]", f"V [{conv.unit('volume')}]",
         f"{glossary.label('half_life')} [{conv.unit('time')}]", "ln CL deviation from typical",
         "ln V deviation from typical", "levels"], srows)
        + (f"\n... and {more} more subjects (all in --json / --out)" if more > 0 else ""))
    adequacy = adequacy_text(doc["subjects"], result.subjects, conv, max_rows=_MAX_ROWS)
    if adequacy:
        sections.append(adequacy)
    if result.notes:
        sections.append("Notes:\n" + "\n".join(f"  {n}" for n in result.notes))
    return assemble_text(sections, [("population", result.warnings)], title=title,
                         failures=failures, colour=colour)


__all__ = ["comparison_text", "marginal_json", "parameter_dicts", "population_json",
           "population_text"]
