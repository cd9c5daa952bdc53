"""JSON and terminal text of ``pkcalc sampling`` (built from SamplingResult objects)."""

from __future__ import annotations

from typing import Any

from .base import UnitConverter, assemble_text, failures_json, json_document, json_number

__all__ = ["SAMPLING_CAUTION", "sampling_json", "sampling_text"]

SAMPLING_CAUTION = ("Sampling times are planned from assumed parameter values and error "
                    "models; the precision shown is what the model expects, not a promise. "
                    "Sample collection follows local protocols and clinical judgement.")


def _design_dict(r, d, conv: UnitConverter) -> dict[str, Any]:
    times = [[json_number(conv(t, "time")) for t in ts] for ts in d.times]
    out = {
        "label": d.label,
        "times": times[0] if len(times) == 1 else times,
        "groups": [{"name": g.name, "subjects": g.subjects, "levels": g.levels,
                    "times": ts, "clock_times": [r.clock_text(t) for t in raw]
                    if r.problem.clock_origin else None}
                   for g, ts, raw in zip(r.problem.groups, times, d.times, strict=True)],
        "expected_rse_percent": {k: json_number(v) for k, v in d.expected_rse_percent.items()},
        "log_det_information": json_number(d.log_det),
        "efficiency": json_number(d.efficiency),
        "simulation": None,
    }
    if d.simulation is not None:
        s = d.simulation
        out["simulation"] = {
            "replicates": s.replicates, "failed": s.failed, "method": s.method,
            "seed": s.seed, "no_coverage_reason": s.no_coverage_reason(),
            "parameters": {k: {m: json_number(v) if isinstance(v, float) else v
                               for m, v in vals.items()} for k, vals in s.parameters.items()},
        }
    return out


def sampling_scenario_dict(r, conv: UnitConverter) -> dict[str, Any]:
    p = r.problem
    return {
        "name": p.name, "design": p.design, "criterion": p.criterion,
        "parameters": {"clearance": json_number(conv(p.clearance, "clearance")),
                       "volume": json_number(conv(p.volume, "volume"))},
        "residual_error": {"additive": json_number(conv(p.additive, "concentration")),
                           "proportional": p.proportional},
        "variability_sd_log": None if p.omega is None else {
            "clearance": json_number(p.omega[0][0] ** 0.5),
            "volume": json_number(p.omega[1][1] ** 0.5),
            "correlation": json_number(p.omega[0][1] / (p.omega[0][0] * p.omega[1][1]) ** 0.5)},
        "clock_origin": p.clock_origin,
        "allowed": [[json_number(conv(a, "time")), json_number(conv(b, "time"))]
                    for a, b in r.allowed],
        "information_parameters": r.parameters,
        "designs": [_design_dict(r, d, conv) for d in r.designs],
        "seconds": round(r.seconds, 3),
        "notes": list(r.notes), "warnings": list(r.warnings),
    }


def sampling_json(results, conv: UnitConverter, *, title: str | None = None,
                  failures=()) -> dict[str, Any]:
    """The ``pkcalc sampling --json`` document: ``scenarios[].designs[].times`` (in the
    time unit) and ``designs[].expected_rse_percent`` (docs/formats.md)."""
    return json_document("sampling", conv, {
        "sampling_caution": SAMPLING_CAUTION, "title": title,
        "scenarios": [sampling_scenario_dict(r, conv) for r in results],
        "failures": failures_json(failures),
    })


def sampling_text(results, *, title: str | None = None, failures=(),
                  colour: bool = False) -> str:
    """Terminal output: caution first, then each scenario's designs."""
    return assemble_text([r.summary(caution=False) for r in results], [(r.problem.name, r.warnings)
                                                          for r in results],
                         title=title, failures=failures, colour=colour,
                         extra_caution=SAMPLING_CAUTION)
