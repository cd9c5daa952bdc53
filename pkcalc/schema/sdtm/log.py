"""The import report: what was read from which dataset, used, left out and why."""

from __future__ import annotations

from collections import defaultdict
from typing import Any

__all__ = ["ImportLog"]

_SHOWN = 5


class ImportLog:
    """Every decision of the SDTM import, for the text, JSON and HTML reports.

    Rows left out are counted per dataset and reason, with the first source rows
    and subjects; a *problem* (an unreadable value, a date-time too imprecise) is a
    row the user would want back, a plain skip is by design (another analyte, a
    record not done, a placebo subject).
    """

    def __init__(self, folder: str) -> None:
        self.folder = folder
        self.datasets: dict[str, str] = {}
        self.read: dict[str, int] = {}
        self.used: dict[str, int] = defaultdict(int)
        self.skipped: dict[str, dict[str, dict[str, Any]]] = defaultdict(dict)
        self.analyte: str | None = None
        self.analyte_name = ""
        self.study_id = ""
        self.specimen: str | None = None
        self.treatment: str | None = None
        self.specimens: dict[str, dict[str, Any]] = {}
        self.treatments: dict[str, dict[str, Any]] = {}
        self.conversions: list[dict[str, Any]] = []
        self.weights: dict[str, dict[str, Any]] = {}
        self.placebo: list[str] = []
        self.time_origin = ""
        self.time_basis: dict[str, int] = {}
        self.apparent: str | None = None
        self.notes: list[str] = []
        #: The PC rows in play (:class:`~pkcalc.schema.sdtm.common.Rows`), for the rows
        #: left out of a subject that fails; not part of the report.
        self.pc_rows: Any = None

    def skip(self, domain: str, reason: str, rows, subjects, labels, *,
             problem: bool = False) -> None:
        """Count rows left out (``rows`` 0-based, with their subjects and labels)."""
        rows = list(rows)
        if not rows:
            return
        entry = self.skipped[domain].setdefault(
            reason, {"count": 0, "first_rows": [], "first_subjects": [], "problem": problem})
        entry["count"] += len(rows)
        if len(entry["first_rows"]) < _SHOWN:
            entry["first_rows"] += list(labels(rows[:_SHOWN - len(entry["first_rows"])]))
        seen = entry["first_subjects"]
        for s in subjects:
            if len(seen) >= _SHOWN:
                break
            if s not in seen:
                seen.append(str(s))

    def convert(self, domain: str, variable: str, unit: str, factor: float, to: str,
                rows: int) -> None:
        self.conversions.append({"dataset": domain.upper(), "variable": variable,
                                 "unit": unit, "factor": factor, "to": to, "rows": rows})

    @property
    def problems(self) -> list[str]:
        """One line per reason rows were left out as problems."""
        return [f"{d.upper()}: {e['count']} row(s) left out: {r} (e.g. "
                f"{', '.join(e['first_rows'][:3])})"
                for d, reasons in self.skipped.items() for r, e in reasons.items()
                if e["problem"]]

    def as_dict(self) -> dict[str, Any]:
        return {"folder": self.folder, "datasets": dict(self.datasets), "study": self.study_id,
                "analyte": self.analyte, "analyte_name": self.analyte_name,
                "specimen": self.specimen, "treatment": self.treatment,
                "specimens": self.specimens, "treatments": self.treatments,
                "time_origin": self.time_origin, "time_basis": dict(self.time_basis),
                "rows_read": dict(self.read), "rows_used": dict(self.used),
                "rows_skipped": {d: {r: dict(e) for r, e in reasons.items()}
                                 for d, reasons in self.skipped.items()},
                "unit_conversions": list(self.conversions), "weights": dict(self.weights),
                "placebo_subjects": list(self.placebo), "apparent_parameters": self.apparent,
                "notes": list(self.notes)}

    def lines(self) -> list[str]:
        out = [f"Imported from SDTM ({self.folder}): " + ", ".join(
            f"{d.upper()} {name}" for d, name in self.datasets.items())]
        chosen = [f"analyte {self.analyte}" if self.analyte else "",
                  f"specimen {self.specimen}" if self.specimen else "",
                  f"treatment {self.treatment}" if self.treatment else ""]
        if any(chosen):
            out.append("  analysed: " + "; ".join(c for c in chosen if c))
        if self.apparent:
            out.append(f"  NOTE: {self.apparent}")
        if self.time_origin:
            out.append(f"  time zero: {self.time_origin}")
        if self.time_basis:
            out.append("  sample times: " + ", ".join(f"{n} {k}" for k, n in
                                                      self.time_basis.items()))
        for what, seen in (("specimens", self.specimens), ("treatments", self.treatments)):
            if len(seen) > 1 or any(not v.get("used") for v in seen.values()):
                out.append(f"  {what} seen: " + "; ".join(
                    f"{k or '(not stated)'} {v['rows']} row(s) "
                    + ("used" if v.get("used") else "-> " + v.get("why", "not used"))
                    for k, v in seen.items()))
        for d in self.datasets:
            out.append(f"  {d.upper()}: {self.read.get(d, 0)} rows read, "
                       f"{self.used.get(d, 0)} used")
            for reason, e in self.skipped.get(d, {}).items():
                first = ", ".join(e["first_rows"][:3] or e["first_subjects"][:3])
                kind = "left out (problem)" if e["problem"] else "skipped"
                out.append(f"    {kind} {e['count']}: {reason} (e.g. {first})")
        if self.placebo:
            shown = ", ".join(self.placebo[:5]) + (" ..." if len(self.placebo) > 5 else "")
            out.append(f"  placebo subjects (not analysed): {len(self.placebo)} ({shown})")
        for c in self.conversions:
            if c["factor"] != 1.0:
                out.append(f"  unit: {c['dataset']}.{c['variable']} {c['unit']} -> {c['to']} "
                           f"(x {c['factor']:.6g}, {c['rows']} row(s))")
        sources: dict[str, int] = defaultdict(int)
        for w in self.weights.values():
            sources[w["source"].split(" (")[0]] += 1
        if sources:
            out.append("  body weight: " + "; ".join(f"{n} subject(s) {s}"
                                                      for s, n in sources.items()))
        out += [f"  note: {n}" for n in self.notes]
        return out
