"""JSON and terminal text of ``pkcalc attainment`` (built from PopulationAttainment)."""

from __future__ import annotations

from typing import Any

from .base import UnitConverter, assemble_text, json_document, json_number

__all__ = ["ATTAINMENT_CAUTION", "attainment_json", "attainment_text"]

ATTAINMENT_CAUTION = ("Shares of virtual patients from a model, not a promise for any "
                      "patient: the choice of a regimen belongs to licensed clinicians and "
                      "pharmacists under local protocols.")


def attainment_json(result, *, title: str | None = None) -> dict[str, Any]:
    """The ``pkcalc attainment --json`` document (docs/formats.md)."""
    from ..population.attainment import KEYS

    se = result.monte_carlo_se()
    table = []
    for b, band in enumerate(result.band_names):
        for j, r in enumerate(result.regimens):
            row = {"band": band, "regimen": r.label, "dose": json_number(r.dose),
                   "interval": json_number(r.interval),
                   "infusion_time": None if r.rate is not None else json_number(r.infusion_time),
                   "rate": json_number(r.rate), "patients": int(result.patients[b])}
            for k, key in enumerate(KEYS):
                row["fraction" if key == "joint" else f"fraction_{key}"] = \
                    json_number(result.fraction[b, j, k])
            row["monte_carlo_se"] = json_number(se[b, j, -1])
            table.append(row)
    t = result.targets
    return json_document("attainment", UnitConverter(), {
        "attainment_caution": ATTAINMENT_CAUTION, "title": title,
        "source": result.source, "patients": int(result.patients[0]), "seed": result.seed,
        "attainment_level": result.level,
        "targets": {k: None if getattr(t, k) is None else [json_number(x) for x in getattr(t, k)]
                    for k in ("peak", "trough", "auc_24", "level")},
        "bands": list(result.band_names), "table": table,
        "lowest": [{k: json_number(v) if isinstance(v, float) else v for k, v in x.items()}
                   for x in result.lowest()],
        "notes": list(result.notes),
    })


def attainment_text(result, *, title: str | None = None, colour: bool = False) -> str:
    """Terminal output: the caution first, then the result's summary."""
    return assemble_text([result.summary(caution=False)], [], title=title, colour=colour,
                         extra_caution=ATTAINMENT_CAUTION)
