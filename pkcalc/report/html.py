"""Self-contained HTML reports (jinja2 with autoescaping).

A report is built from the JSON document of a run (so its numbers are the
JSON numbers), figures rendered to base64 PNG, the input files (text and
SHA-256) and the options.  Nothing is fetched: no scripts, fonts, styles or
images from anywhere else.  All user text is escaped by the template engine.
"""

from __future__ import annotations

import base64
import hashlib
import math
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from .. import __version__, glossary
from .._format import fmt
from ..population.compare import COMPARED_CAPTION, stepwise_lines
from .base import CAUTION, CAUTION_SHORT, dumps, settings_lines

__all__ = [
    "ASSUMPTIONS",
    "HtmlReport",
    "batch_sections",
    "design_sections",
    "figure_item",
    "fit_sections",
    "input_items",
    "nca_sections",
    "population_sections",
    "predict_sections",
    "render_html",
    "table_item",
    "verify_sections",
]

#: The one-compartment linear model's assumptions, and when they fail.
ASSUMPTIONS = [
    "One well-stirred compartment: the drug distributes instantly. Drugs with a distinct "
    "distribution phase (two or more compartments) show early levels above the prediction "
    "after a bolus or short infusion, and a terminal half-life longer than the fitted one.",
    "Linear (first-order) elimination: clearance does not change with concentration. "
    "Saturable elimination (for example phenytoin-like kinetics) makes levels rise more than "
    "in proportion to the dose, and proportional adjustments under-shoot.",
    "Constant parameters over time: changing kidney or liver function, interacting drugs, "
    "growth or illness change clearance and volume during a course.",
    "Doses given as stated: actual infusion times, line dead-volume, missed or late doses "
    "and sampling-time errors are not modelled.",
    "Intravenous input only: no absorption phase.",
    "Concentrations are total plasma levels; protein binding changes are not modelled.",
]


@dataclass
class HtmlReport:
    """What goes into one report file."""

    title: str
    command: str
    sections: list[dict[str, Any]] = field(default_factory=list)
    inputs: list[dict[str, Any]] = field(default_factory=list)
    files: list[dict[str, str]] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    options: str = ""
    seed: int | None = None
    subtitle: str | None = None
    documents: dict[str, Any] = field(default_factory=dict)
    overview: list[dict[str, Any]] = field(default_factory=list)


# --------------------------------------------------------------------------- items
def _cell(value: Any) -> dict[str, Any]:
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return {"text": fmt(value), "num": False}
    if isinstance(value, int | float):
        return {"text": fmt(value), "num": not (isinstance(value, float) and math.isnan(value))}
    return {"text": str(value), "num": False}


def table_item(headers: list[str], rows: list[list[Any]], caption: str = "") -> dict[str, Any]:
    """A table item; numbers are shown to 4 significant figures."""
    return {"kind": "table", "caption": caption, "headers": headers,
            "rows": [[_cell(c) for c in row] for row in rows]}


def figure_item(png: bytes, caption: str) -> dict[str, Any]:
    """A figure item from PNG bytes (embedded as base64)."""
    return {"kind": "figure", "caption": caption, "data": base64.b64encode(png).decode("ascii")}


def lines_item(kind: str, lines: list[str]) -> dict[str, Any]:
    return {"kind": kind, "lines": list(lines)}


def _import_section(doc: dict[str, Any]) -> list[dict[str, Any]]:
    """The import report of a study read from SDTM (what was read, used and skipped)."""
    lines = doc.get("import_lines")
    if not lines:
        return []
    return [{"heading": "Study data imported from SDTM", "blocks": [lines_item("text", lines)]}]


def input_items(paths: list[str | Path]) -> tuple[list[dict[str, Any]], list[dict[str, str]]]:
    """The input files as text blocks (collapsed; each file once), and their names with
    SHA-256."""
    items, files = [], []
    seen: set[Path] = set()
    for p in paths:
        key = Path(p).resolve()
        if key in seen:
            continue
        seen.add(key)
        data = Path(p).read_bytes()
        files.append({"name": str(p), "sha256": hashlib.sha256(data).hexdigest()})
        text = data.decode("utf-8", errors="replace")
        if len(text) > 200_000:
            text = text[:200_000] + "\n... (truncated)"
        items.append({"kind": "pre", "caption": f"{Path(p).name} (as given, with its units)",
                      "text": text, "open": False})
    return items, files


# --------------------------------------------------------------------------- sections
def predict_sections(doc: dict[str, Any], figures: dict[str, bytes]) -> list[dict[str, Any]]:
    """Report sections of a predict JSON document (one per scenario)."""
    u = doc["units"]
    out = []
    for sc in doc["scenarios"]:
        p = sc["parameters"]
        rows = [
            ["clearance", p["clearance"], u["clearance"]],
            ["volume", p["volume"], u["volume"]],
            [glossary.label("elimination_rate"), p["elimination_rate"], u["elimination_rate"]],
            [glossary.label("half_life"), p["half_life"], u["time"]],
            [glossary.label("time_constant") + " (V/CL)", p["time_constant"], u["time"]],
            [glossary.label("plateau"), sc["plateau_concentration"], u["concentration"]],
        ]
        rows += [[glossary.time_to_label(f), sc[key], u["time"]]
                 for f, key in glossary.time_to_keys(sc)]
        ss = sc["steady_state"]
        if ss:
            rows += [["steady-state peak", ss["peak"], u["concentration"]],
                     ["steady-state trough", ss["trough"], u["concentration"]],
                     ["steady-state average", ss["average"], u["concentration"]]]
        items = [table_item(["quantity", "value", "unit"], rows, "Parameters and plateau"),
                 lines_item("notes", [f"plateau basis: {sc['plateau_basis']}"])]
        if sc["target"]:
            t = sc["target"]
            target_rows = []
            if t["plateau"] is not None:
                target_rows.append(["target plateau", t["plateau"], u["concentration"]])
            if t["window"]:
                target_rows += [["window low", t["window"][0], u["concentration"]],
                                ["window high", t["window"][1], u["concentration"]]]
            items.append(table_item(["target", "value", "unit"], target_rows, "Target"))
            items.append(lines_item("notes", ["target check: all met"] if not sc["flags"]
                                    else []))
        if sc["flags"]:
            items.append(lines_item("flags", sc["flags"]))
        if sc["warnings"]:
            items.append(lines_item("warnings", sc["warnings"]))
        if sc["name"] in figures:
            items.append(figure_item(figures[sc["name"]], f"Predicted course: {sc['name']}"))
        out.append({"heading": f"Prediction: {sc['name']}", "blocks": items})
    return out


def _closing_blocks(item: dict[str, Any], figures: dict[str, bytes], caption: str
                    ) -> list[dict[str, Any]]:
    """An item's notes, warnings (when any) and figure (when drawn)."""
    out = [lines_item("notes", item["notes"])]
    if item["warnings"]:
        out.append(lines_item("warnings", item["warnings"]))
    if item["name"] in figures:
        out.append(figure_item(figures[item["name"]], caption))
    return out


def design_sections(doc: dict[str, Any], figures: dict[str, bytes]) -> list[dict[str, Any]]:
    """Report sections of a design JSON document (one per design)."""
    u = doc["units"]
    out = []
    for d in doc["designs"]:
        items: list[dict[str, Any]] = [lines_item("warnings", [doc["design_caution"]])]
        items.append(lines_item("text", [
            f"method: {glossary.method_name(d['method'])}; parameters used: clearance "
            f"{fmt(d['parameters']['clearance'])} {u['clearance']}, volume "
            f"{fmt(d['parameters']['volume'])} {u['volume']}"]))
        if d.get("suspects"):
            items.append(lines_item("warnings", [f"CHECK LEVELS: {s}" for s in d["suspects"]]))
        if d["estimates"]:
            items.append(table_item(["estimate", "value"], [[glossary.words(k), v] for k, v in
                                                             d["estimates"].items()],
                                    "Individual estimates from the measured levels"))
        if d.get("formulas") or d.get("assumed"):
            items.append(lines_item("notes", [
                f"for reference only, not a proposal: {f['name']} = {fmt(f['value'])} -- "
                f"{f['validity']}" for f in d.get("formulas", [])] + [
                f"assumed, not measured: {glossary.words(k)} {fmt(v)}"
                for k, v in d.get("assumed", {}).items()]))
        target = _target_text(d["target"], u)
        if target:
            items.append(lines_item("text", [f"target: {target}"]))
        from .design import regimen_table_from_doc

        headers, rows = regimen_table_from_doc(d, u)
        items.append(table_item(headers, rows,
                                "Proposed regimens, rounded and re-predicted (the terminal's "
                                "columns: steady state; highest, lowest and level at 72 h on "
                                "the course projected from the start)"))
        flags = [f"#{i} {f}" for i, r in enumerate(d["regimens"], 1) for f in r["flags"]]
        if flags:
            items.append(lines_item("flags", flags))
        items += _attainment_blocks(d)
        if d.get("warnings"):
            items.append(lines_item("warnings", d["warnings"]))
        items += _closing_blocks(d, figures, f"Proposed regimens: {d['name']}")
        out.append({"heading": f"Design: {d['name']}", "blocks": items})
    return out


def _target_text(target: dict[str, Any], u: dict[str, str]) -> str:
    """The target in the terminal's words."""
    from .design import target_text

    return target_text(target, u)


def _attainment_blocks(d: dict[str, Any]) -> list[dict[str, Any]]:
    """The chance of meeting each target, per proposal and for the current regimen."""
    rows = [(f"#{i}", r["attainment"]) for i, r in enumerate(d["regimens"], 1)
            if r.get("attainment")]
    if not rows:
        return []
    if d.get("current"):
        rows.append(("current: " + d["current"]["label"], d["current"]["attainment"]))
    keys = [k for k in ("peak", "trough", "level", "auc_24")
            if any(a.get(k) is not None for _, a in rows)]
    names = {"peak": "peak in window", "trough": "trough in window",
             "level": "level in window", "auc_24": "AUC24 in range"}

    def pct(p):
        return "-" if p is None else f"{100 * p:.1f} %"

    level = d.get("attainment_level")
    return [table_item(["#", *(names[k] for k in keys), "all at once"],
                       [[n, *(pct(a.get(k)) for k in keys), pct(a.get("joint"))]
                        for n, a in rows],
                       "Chance of meeting the targets over the next 72 h (posterior, from the "
                       f"levels and the prior); 'meets target' needs all at once >= {pct(level)}"),
            lines_item("notes", [rows[0][1].get("method", "") + "; a probability from a model "
                                 "is not a guarantee: local protocols and a licensed "
                                 "pharmacist decide"])]


def sampling_sections(doc: dict[str, Any], figures: dict[str, bytes]) -> list[dict[str, Any]]:
    """Report sections of a sampling JSON document (one per scenario)."""
    u = doc["units"]
    out = []
    for sc in doc["scenarios"]:
        items: list[dict[str, Any]] = [lines_item("warnings", [doc["sampling_caution"]])]
        items.append(lines_item("text", [
            f"{sc['design']} design, {sc['criterion']}-optimal; clearance "
            f"{fmt(sc['parameters']['clearance'])} {u['clearance']}, volume "
            f"{fmt(sc['parameters']['volume'])} {u['volume']}; allowed periods: "
            + "; ".join(f"{fmt(a)}-{fmt(b)} {u['time']}" for a, b in sc["allowed"])]))
        rows = []
        for d in sc["designs"]:
            for g in d["groups"]:
                rows.append([d["label"], g["name"], g["subjects"],
                             ", ".join(fmt(t) for t in g["times"]),
                             ", ".join(g["clock_times"]) if g["clock_times"] else "",
                             d["expected_rse_percent"]["clearance"],
                             d["expected_rse_percent"]["volume"], d["efficiency"]])
        items.append(table_item(["design", "group", "subjects", f"times [{u['time']}]",
                                 "clock times", "expected RSE CL %", "expected RSE V %",
                                 "efficiency"], rows, "Sampling times"))
        sims = [(d["label"], d["simulation"]) for d in sc["designs"] if d["simulation"]]
        if sims:
            srows = [[label, k, s["parameters"][k]["empirical_rse_percent"],
                      s["parameters"][k]["bias_percent"], s["parameters"][k]["rmse_percent"],
                      s["parameters"][k]["coverage_percent"], s["replicates"], s["failed"]]
                     for label, s in sims for k in ("clearance", "volume")]
            items.append(table_item(["design", "parameter", "simulated RSE %", "bias %",
                                     "RMSE %", "95% coverage %", "replicates", "failed"],
                                    srows, f"Simulation and re-estimation ({sims[0][1]['method']}"
                                           f", seed {sims[0][1]['seed']})"))
            why = [f"{label}: 95% coverage '-': {s['no_coverage_reason']}" for label, s in sims
                   if s.get("no_coverage_reason")]
            if why:
                items.append(lines_item("notes", why))
        items += _closing_blocks(sc, figures, f"Sampling times: {sc['name']}")
        out.append({"heading": f"Sampling: {sc['name']}", "blocks": items})
    return out


def verify_sections(doc: dict[str, Any]) -> list[dict[str, Any]]:
    """One section with a table per case."""
    items: list[dict[str, Any]] = [lines_item("text", [
        f"{doc['passed']} checks passed, {doc['failed']} failed."])]
    for case in doc["cases"]:
        items.append({"kind": "heading", "text": case["name"]})
        items.append(lines_item("notes", [f"source: {case['source']}"]))
        items.append(table_item(
            ["quantity", "expected", "computed", "unit", "tolerance", "result"],
            [[c["quantity"], c["expected"], c["computed"], c["unit"], c["tolerance"],
              "PASS" if c["passed"] else "FAIL"] for c in case["checks"]]))
    return [{"heading": "Verification against worked examples", "blocks": items}]


# --------------------------------------------------------------------------- render
def render_html(report: HtmlReport) -> str:
    """The report as one self-contained HTML document."""
    from jinja2 import Environment, PackageLoader, select_autoescape

    env = Environment(loader=PackageLoader("pkcalc", "templates"),
                      autoescape=select_autoescape(["html"], default=True))
    template = env.get_template("report.html")
    caution_lines = [CAUTION.removeprefix("CAUTION: ")]
    if any(k == "design" for k in report.documents):
        caution_lines.append(report.documents["design"]["design_caution"])
    json_text = dumps(report.documents if len(report.documents) != 1
                      else next(iter(report.documents.values())))
    values = dict(
        title=report.title, subtitle=report.subtitle, caution=caution_lines,
        caution_short=CAUTION_SHORT, sections=report.sections, inputs=report.inputs,
        files=report.files, warnings=report.warnings, assumptions=ASSUMPTIONS,
        json_text=json_text, version=__version__, command=report.command,
        options=report.options, seed=report.seed, overview=report.overview,
        generated=datetime.now(UTC).strftime("%Y-%m-%d %H:%M:%S"), terms=[],
    )
    # the abbreviations the page uses, spelled out in its terms section (second pass)
    first = visible_text(template.render(**values))
    values["terms"] = [(a, glossary.ABBREVIATIONS[a]) for a in glossary.abbreviations_used(first)]
    return template.render(**values)


def visible_text(html: str) -> str:
    """The words of a page: no embedded images, no tags."""
    import re

    return re.sub(r"<[^>]+>", " ", re.sub(r"data:[^\"']+", "", html))


def nca_sections(doc: dict[str, Any], figures: dict[str, bytes]) -> list[dict[str, Any]]:
    """One section: the quantity x subject table, notes and a plot per subject."""
    from .nca import NCA_FIELDS

    u = {**doc["units"], None: ""}
    subjects = doc["subjects"]
    rows = []
    for key, kind in NCA_FIELDS:
        values = [s[key] for s in subjects]
        if any(v is not None for v in values):
            rows.append([glossary.words(key), u.get(kind, "") if kind else "", *values])
    rows.append(["points used for the slope", u["time"],
                 *[", ".join(f"{x:g}" for x in s["points_used"]) or "-" for s in subjects]])
    items: list[dict[str, Any]] = [
        lines_item("notes", settings_lines(doc["settings"])),
        table_item(["quantity", "unit", *[f"subject {s['subject']}" for s in subjects]], rows,
                   "Non-compartmental results")]
    interval_rows = [[s["subject"], d["number"], d.get("start_clock") or d["start"],
                      d["length"], d["levels"], d["peak_concentration"], d["peak_time"],
                      d["min_concentration"], d["trough_concentration"], d["auc_interval"],
                      d["average_concentration"], d["fluctuation_percent"], d["clearance"],
                      d["terminal_half_life"], "yes" if d["steady_state"] else "-",
                      d["reason"] or ""]
                     for s in subjects for d in s.get("intervals", [])]
    if any(len(s.get("intervals", [])) > 1 for s in subjects):
        t, c = u["time"], u["concentration"]
        items.append(table_item(
            ["subject", "dose #", f"start [{t}]", f"interval [{t}]", "levels",
             f"Cmax [{c}]", f"Tmax [{t}]", f"Cmin [{c}]", f"trough [{c}]",
             f"AUCtau [{u['auc']}]", f"Cavg [{c}]", "fluctuation [%]",
             f"CL [{u['clearance']}]", f"half-life [{t}]", "steady state", "why not computed"],
            interval_rows, "Per dosing interval (actual dosing times)"))
    notes = [f"subject {s['subject']} ({s['mode']}): {n}" for s in subjects for n in s["notes"]]
    items.append(lines_item("notes", notes))
    if doc.get("warnings"):
        items.append(lines_item("warnings", doc["warnings"]))
    for s in subjects:
        if s["subject"] in figures:
            items.append(figure_item(figures[s["subject"]],
                                     f"subject {s['subject']}: log concentration vs time"))
    return [{"heading": "Non-compartmental analysis", "blocks": items}, *_import_section(doc)]


def fit_sections(doc: dict[str, Any], figures: dict[str, bytes]) -> list[dict[str, Any]]:
    """Estimates table, residual error, the NCA comparison and the plots."""
    u = doc["units"]
    rows = []
    for d in doc["subjects"]:
        e = d["estimates"]
        rows.append([d["subject"], e["clearance"]["value"], e["clearance"]["ci_low"],
                     e["clearance"]["ci_high"], e["volume"]["value"], e["volume"]["ci_low"],
                     e["volume"]["ci_high"], e["half_life"]["value"], e["half_life"]["ci_low"],
                     e["half_life"]["ci_high"], d["objective"], d["aic"], d["n_levels"],
                     d["n_blq"], "yes" if d["converged"] else "NO"])
    items: list[dict[str, Any]] = [
        lines_item("notes", settings_lines(doc["settings"])),
        table_item(["subject", f"CL [{u['clearance']}]", "low", "high", f"V [{u['volume']}]",
                    "low", "high", f"half-life [{u['time']}]", "low", "high", "-2 ln L", "AIC",
                    "levels", "BLQ", "converged"], rows,
                   "Estimates with 95 % intervals (built on the log scale)")]
    res = [[d["subject"], k, e["value"], e["rse_percent"]] for d in doc["subjects"]
           for k, e in d["residual_error"].items()]
    if res:
        items.append(table_item(["subject", "residual error", "value", "RSE %"], res,
                                "Residual error (additive in concentration units, "
                                "proportional as a fraction)"))
    if doc.get("adequacy_summary"):
        items += _adequacy_items(doc)
    if doc.get("comparison_with_nca"):
        crow = [[c["subject"], r["quantity"], r["fit"], r["nca"], r["ratio"]]
                for c in doc["comparison_with_nca"] for r in c["rows"]]
        items.append(table_item(["subject", "quantity", "fit", "NCA", "fit / NCA"], crow,
                                "Fit beside non-compartmental analysis"))
        flags = [f"subject {c['subject']}: {f}" for c in doc["comparison_with_nca"]
                 for f in c["flags"]]
        if flags:
            items.append(lines_item("flags", flags))
    warns = [f"subject {d['subject']}: {w}" for d in doc["subjects"] for w in d["warnings"]]
    if warns:
        items.append(lines_item("warnings", warns))
    notes = [f"subject {d['subject']}: {n}" for d in doc["subjects"] for n in d["notes"]]
    if notes:
        items.append(lines_item("notes", notes))
    if "__diagnostics__" in figures:
        items.append(figure_item(figures["__diagnostics__"], "Goodness of fit (all subjects)"))
    for d in doc["subjects"]:
        if d["subject"] in figures:
            items.append(figure_item(figures[d["subject"]],
                                     f"subject {d['subject']}: levels and fitted course"))
    return [{"heading": "Individual fits (one-compartment)", "blocks": items},
            *_import_section(doc)]


def _adequacy_items(doc: dict[str, Any]) -> list[dict[str, Any]]:
    """Is one compartment adequate: the study count, a row per subject, the evidence."""
    rows, words = [], []
    for d in doc["subjects"]:
        a = d.get("adequacy")
        if a is None:
            continue
        rows.append([d["subject"], glossary.words(a["verdict"]), a["levels_after_infusion"],
                     a["delta_aic"], a["likelihood_ratio_p"], a["runs_test_p"],
                     a["trend_test_p"], a["earliest_sampling_after_infusion"]])
        if a["verdict"] == "distribution_phase":
            words += [f"subject {d['subject']}: {a['reason']}",
                      *[f"subject {d['subject']}: {n}" for n in a["notes"]]]
    u = doc["units"]
    items = [table_item(["subject", "one compartment", "levels after infusion",
                         "ΔAIC (two exponentials)", "likelihood-ratio p", "runs test p",
                         "trend test p",
                         f"draw from [{u['time']} after infusion]"], rows,
                        "Is one compartment adequate? " + doc["adequacy_summary"]["text"]
                        + " (two-exponential numbers are a sensitivity check)")]
    if words:
        items.append(lines_item("flags", words))
    return items


def population_sections(doc: dict[str, Any], figures: dict[str, bytes]) -> list[dict[str, Any]]:
    """Typical values, variability, covariates, residual error, subjects and plots."""
    rows = []
    for k in ("clearance", "volume"):
        ci = doc["typical_ci"].get(k) or [None, None]
        rows.append([k, doc["typical"][k], doc["typical_units"][k], doc["typical_se"].get(k),
                     ci[0], ci[1], doc["variability_cv_percent"][k],
                     doc["shrinkage_percent"].get(k)])
    items: list[dict[str, Any]] = [
        lines_item("notes", settings_lines(doc["settings"])),
        table_item(["parameter", "typical", "unit", "SE", "CI low", "CI high", "CV %",
                    "shrinkage %"], rows, f"Population estimates ({doc['method']})")]
    cov = doc["covariate"]
    text = [f"weight model: {cov['model']}"]
    if cov["exponents"]:
        text.append("exponents: " + ", ".join(f"{k} {v:.3g}" for k, v in
                                               cov["exponents"].items()))
    if doc["residual_error"]:
        text.append("residual error: " + ", ".join(f"{k} {v:.4g}" for k, v in
                                                    doc["residual_error"].items()))
    text.append(f"iterations: {doc['iterations']}; converged: "
                f"{'yes' if doc['converged'] else 'NO'}")
    items.append(lines_item("text", text))
    if doc.get("parameters"):
        items.append(table_item(
            ["parameter", "value", "unit", "SE", "RSE %", "CI low", "CI high"],
            [[p["name"], p["value"], p["unit"], p["se"], p["rse_percent"], p["ci_low"],
              p["ci_high"]] for p in doc["parameters"]],
            "Every parameter (standard errors from the observed information): -2 ln L "
            f"{doc['objective']:.4f}, "
            f"{doc['n_parameters']} parameters, AIC {doc['aic']:.4f}, BIC {doc['bic']:.4f}"))
    if doc.get("comparison"):
        comp = doc["comparison"]
        items.append(table_item(
            ["model", "effects", "-2 ln L", "parameters", "AIC", "BIC", "compared with",
             "likelihood-ratio df", "likelihood-ratio p", "note"],
            [[m["model"], "; ".join(m["effects"]) or "(none)", m["objective"],
              m["n_parameters"], m["aic"], m["bic"], m["compared_with"] or "-",
              m["likelihood_ratio_df"], m["likelihood_ratio_p"], m["error"] or ""]
             for m in comp["models"]],
            COMPARED_CAPTION.format(base=comp["base"]).rstrip(":")))
        if comp["stepwise"]:
            items.append(lines_item("text", stepwise_lines(comp["stepwise"])))
    srows = [[d["subject"], d["estimates"]["clearance"]["value"],
              d["estimates"]["volume"]["value"], d["estimates"]["half_life"]["value"],
              (d.get("prior") or {}).get("ln_clearance_deviation"),
              (d.get("prior") or {}).get("ln_volume_deviation"), d["n_levels"]]
             for d in doc["subjects"]]
    items.append(table_item(["subject", f"CL [{doc['units']['clearance']}]",
                             f"V [{doc['units']['volume']}]", f"half-life [{doc['units']['time']}]",
                             "ln CL deviation from typical", "ln V deviation from typical",
                             "levels"], srows,
                            "Individual estimates under the population prior"))
    if doc.get("warnings"):
        items.append(lines_item("warnings", doc["warnings"]))
    items.append(lines_item("notes", doc["notes"]))
    if doc.get("adequacy_summary"):
        items += _adequacy_items(doc)
    for key, caption in (("__diagnostics__", "Population diagnostics"),
                         ("__vpc__", "Visual predictive check")):
        if key in figures:
            items.append(figure_item(figures[key], caption))
    for d in doc["subjects"]:
        if d["subject"] in figures:
            items.append(figure_item(figures[d["subject"]], f"subject {d['subject']}: "
                                     "distribution phase (one compartment and two exponentials)"))
    return [{"heading": "Population estimates", "blocks": items}, *_import_section(doc)]


def batch_sections(doc: dict[str, Any], figures: dict[str, bytes]) -> list[dict[str, Any]]:
    """Counts, distributions across the batch, first errors, the plot."""
    items: list[dict[str, Any]] = [lines_item("text", [
        f"{doc['rows']} rows from {doc['input']} written to {doc['output']} "
        f"({doc['engine']} engine); {doc['failed']} rows with problems."])]
    rows = [[glossary.words(k), "%", *(100 * d[q] for q in ("p05", "p50", "p95"))]
            if k.startswith("fraction_in_window") else
            [glossary.words(k), glossary.unit_of(k), d["p05"], d["p50"], d["p95"]]
            for k, d in doc["distribution"].items() if d]
    if rows:
        items.append(table_item(["quantity", "unit", "5th", "median", "95th"], rows,
                                "Across the batch"))
    if doc["first_errors"]:
        items.append(lines_item("warnings", doc["first_errors"]))
    if "__batch__" in figures:
        items.append(figure_item(figures["__batch__"], "Distributions across the batch"))
    return [{"heading": "Scenario batch", "blocks": items}]


def attainment_sections(doc: dict[str, Any], figures: dict[str, bytes]) -> list[dict[str, Any]]:
    """The report section of an attainment JSON document."""
    items: list[dict[str, Any]] = [lines_item("warnings", [doc["attainment_caution"]])]
    def ends(v):
        return " to ".join("-" if x is None else fmt(x) for x in v)

    targets = "; ".join(f"{glossary.words(k)} {ends(v)}" for k, v in doc["targets"].items()
                        if v is not None)
    items.append(lines_item("text", [f"patients: {doc['source']}; {doc['patients']:,} in all; "
                                     f"seed {doc['seed']}", f"targets (steady state): {targets}"]))
    bands = doc["bands"]
    regimens = list(dict.fromkeys(row["regimen"] for row in doc["table"]))
    share = {(row["band"], row["regimen"]): row for row in doc["table"]}
    rows = [[reg, *(f"{100 * share[(b, reg)]['fraction']:.1f} % "
                    f"(± {100 * share[(b, reg)]['monte_carlo_se']:.2f})"
                    if share[(b, reg)]["fraction"] is not None else "-" for b in bands)]
            for reg in regimens]
    items.append(table_item(["regimen", *bands], rows,
                            "Share of patients meeting every target (Monte Carlo SE in "
                            "percentage points)"))
    items.append(table_item(
        ["band", "interval [h]", "lowest regimen", "share"],
        [[x["band"], "-" if x["interval"] is None else fmt(x["interval"]),
          x["regimen"] or "none on the grid",
          "-" if x["fraction"] is None else f"{100 * x['fraction']:.1f} %"]
         for x in doc["lowest"]],
        f"Lowest dose of the grid reaching {100 * doc['attainment_level']:.0f} %"))
    items.append(lines_item("notes", doc["notes"]))
    if "attainment" in figures:
        items.append(figure_item(figures["attainment"], "Target attainment against the dose"))
    return [{"heading": "Target attainment", "blocks": items}]


# --------------------------------------------------------------------------- overview
def _count(items, test) -> int:
    return sum(1 for x in items if test(x))


def run_verdict(command: str, doc: dict[str, Any]) -> str:
    """One line saying what a run found, for the report's overview (from its JSON)."""
    failures = len(doc.get("failures") or [])
    failed = f"; {failures} item(s) failed" if failures else ""
    if command == "predict":
        sc = doc["scenarios"]
        return (f"{len(sc)} scenario(s) predicted; "
                f"{_count(sc, lambda s: s['flags'])} with a target flag{failed}")
    if command == "design":
        regs = doc["regimens"]
        return (f"{len(doc['designs'])} design(s), {len(regs)} proposal(s): "
                f"{_count(regs, lambda r: r['status'] == 'meets target')} meet target, "
                f"{_count(regs, lambda r: r['status'] == 'FLAG')} flagged, "
                f"{_count(regs, lambda r: r['status'] == 'check levels')} check levels"
                f"{failed}")
    if command == "fit":
        subs = doc["subjects"]
        ad = doc.get("adequacy_summary") or {}
        extra = f"; adequacy: {ad['text']}" if ad.get("text") else ""
        return (f"{_count(subs, lambda s: s['converged'])} of {len(subs)} subject fits "
                f"converged{extra}{failed}")
    if command == "population":
        ok = "converged" if doc.get("converged") else "NOT converged"
        return (f"{doc.get('method', '')} estimate from {len(doc['subjects'])} subjects: "
                f"{ok}{failed}")
    if command == "nca":
        return f"{len(doc['subjects'])} subject(s) analysed{failed}"
    if command == "verify":
        return (f"{doc['passed']} check(s) passed, {doc['failed']} failed, "
                f"{len(doc.get('errors') or [])} case(s) unusable")
    if command == "sampling":
        return f"{len(doc['scenarios'])} sampling design(s){failed}"
    if command == "batch":
        return f"{doc['rows']} row(s), {doc['failed']} with problems"
    if command == "attainment":
        reached = _count(doc["lowest"], lambda x: x["regimen"] is not None)
        return (f"{len(doc['table'])} band x regimen shares of {doc['patients']:,} patients; "
                f"a lowest dose reaching {100 * doc['attainment_level']:.0f} % in "
                f"{reached} of {len(doc['lowest'])} band x interval(s)")
    return "see the section"
