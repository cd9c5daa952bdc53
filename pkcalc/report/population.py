"""Terminal and JSON output of ``pkcalc population``."""

from __future__ import annotations

from typing import Any

from .._format import format_table
from .base import UnitConverter, assemble_text, failures_json, json_document, json_number
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
    return json_document("population", conv, body)


def population_text(result, conv: UnitConverter, *, title: str | None = None, failures=(),
                    settings: dict[str, Any] | None = None, colour: bool = False) -> str:
    """Terminal output: caution, typical values, variability, residual error, subjects."""
    doc = population_json(result, conv, title=title, failures=failures, settings=settings)
    sections = []
    if settings:
        sections.append("Settings: " + "; ".join(
            f"{k.replace('_', ' ')}: {'-' if v is None else str(v).replace('_', ' ')}"
            for k, v in settings.items()))
    rows = []
    for k in ("clearance", "volume"):
        ci = doc["typical_ci"].get(k)
        rows.append([k, doc["typical"][k], doc["typical_units"][k], doc["typical_se"].get(k),
                     "-" if not ci else f"{ci[0]:.4g}-{ci[1]:.4g}",
                     doc["variability_cv_percent"][k], doc["shrinkage_percent"].get(k)])
    sections.append(f"Population estimates ({result.method} method):\n" + format_table(
        ["parameter", "typical", "unit", "SE", "95% CI", "between-subject CV %",
         "shrinkage %"], rows))
    extra = []
    cov = doc["covariate"]
    if cov["model"] != "none":
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
                     f"-2lnL {obj[0]:.6g} -> {obj[-1]:.6g}" if obj else "")
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
                      pr.get("ln_volume_deviation"), d["n_obs"]])
    more = len(doc["subjects"]) - _MAX_ROWS
    sections.append("Individual estimates under the population prior (MAP):\n" + format_table(
        ["subject", f"CL [{conv.unit('clearance')}]", f"V [{conv.unit('volume')}]",
         f"t1/2 [{conv.unit('time')}]", "ln CL deviation from typical",
         "ln V deviation from typical", "levels"], srows)
        + (f"\n... and {more} more subjects (all in --json / --out)" if more > 0 else ""))
    adequacy = adequacy_text(doc["subjects"], result.subjects, conv, max_rows=_MAX_ROWS)
    if adequacy:
        sections.append(adequacy)
    if result.notes:
        sections.append("Notes:\n" + "\n".join(f"  {n}" for n in result.notes))
    return assemble_text(sections, [("population", result.warnings)], title=title,
                         failures=failures, colour=colour)


__all__ = ["population_json", "population_text"]
