"""The glossary is the single source of every name the outputs use (pkcalc/glossary.py,
docs/glossary.md), checked on every output of the demo: JSON keys, CSV headers, terminal
text, the HTML report and the axis labels of the plots."""

from __future__ import annotations

import csv
import json
import re
from pathlib import Path

import pytest

from pkcalc import glossary
from pkcalc.core import CANONICAL_UNITS

ROOT = Path(__file__).resolve().parents[1]


def _keys(obj, out: set[str]) -> set[str]:
    if isinstance(obj, dict):
        for k, v in obj.items():
            out.add(k)
            _keys(v, out)
    elif isinstance(obj, list):
        for v in obj:
            _keys(v, out)
    return out


# JSON objects keyed by data rather than by glossary names (subject ids, scenario names,
# effect names chosen by the user): their keys are values, not names.
_DATA_KEYED = ("distribution",)


def test_docs_glossary_is_generated_from_the_module():
    text = (ROOT / "docs" / "glossary.md").read_text(encoding="utf-8")
    assert text == glossary.markdown(), (
        "docs/glossary.md differs from pkcalc/glossary.py: regenerate it with "
        "python -m pkcalc.glossary > docs/glossary.md")


def test_canonical_units_agree_with_core():
    for kind, unit in CANONICAL_UNITS.items():
        assert glossary.UNITS[kind] == unit


def test_area_unit_reads_as_amount_time_per_volume():
    assert glossary.area_unit("mg/L", "h") == "mg*h/L"
    assert glossary.area_unit("ug/mL", "min") == "ug*min/mL"
    assert glossary.area_unit("mg/L", "h", 2) == "mg*h^2/L"


def test_composed_keys_are_known_and_strangers_are_not():
    for key in ("clearance_se", "plateau_concentration_p95", "time_to_90_percent",
                "predicted_auc_24", "attainment_joint", "concentration_at_24h",
                "fraction_in_window_at_steady_state", "half_lives_to_50_percent",
                "adequacy_likelihood_ratio_p", "expected_rse_clearance"):
        assert glossary.is_known(key), key
    for key in ("time_to_90pct", "covariance_step", "n_obs", "lrt_p", "clearance_foo"):
        assert not glossary.is_known(key), key


def test_every_term_has_a_label_and_a_known_unit_kind():
    kinds = set(glossary.UNITS) | {None, "p", "fraction"}
    seen = set()
    for t in glossary.TERMS:
        assert t.key not in seen, f"{t.key} defined twice"
        seen.add(t.key)
        assert t.label and t.kind in kinds, t
        assert t.key not in glossary.FIELDS, f"{t.key} is both a quantity and a field"


def test_explain_spells_out_only_the_abbreviations_used():
    line = glossary.explain("RSE 12 %, AIC 3.1; CI 1-2")
    assert "RSE = relative standard error" in line and "AIC = Akaike" in line
    assert "BLQ" not in line
    assert glossary.explain("nothing short here") == ""
    assert "; SE =" not in glossary.explain("RSE only")
    assert glossary.abbreviations_used("RSE only") == ["RSE"]


def test_former_values_warn_and_map_to_the_current_spelling():
    with pytest.warns(glossary.FormerName, match="former name"):
        assert glossary.canonical_value("two-stage", "--method") == "two_stage"
    assert glossary.canonical_value("marginal", "--method") == "marginal"


# ---- every output of the demo -------------------------------------------------------


def _files(folder: Path, suffix: str) -> list[Path]:
    return sorted(folder.rglob(f"*{suffix}"))


def test_every_json_key_of_the_demo_is_a_glossary_name(demo_run):
    unknown: dict[str, str] = {}
    for path in _files(demo_run.folder, ".json"):
        doc = json.loads(path.read_text(encoding="utf-8"))
        for key in _keys(doc, set()):
            if not glossary.is_known(key):
                unknown.setdefault(key, path.name)
    # keys under data-keyed objects (the batch percentiles are keyed by output columns,
    # which are glossary names themselves) are covered by the same rule
    assert not unknown, f"JSON keys not in the glossary: {unknown}"


def test_every_csv_header_of_the_demo_is_a_glossary_name_with_its_unit(demo_run):
    unknown: dict[str, str] = {}
    for path in _files(demo_run.folder, ".csv"):
        with path.open(encoding="utf-8") as f:
            head = next(csv.reader(f))
        for h in head:
            stem = h.split(" [", 1)[0]
            if not glossary.is_known(stem):
                unknown.setdefault(h, path.name)
            elif stem in {t.key for t in glossary.TERMS}:
                unit = glossary.unit_of(stem)
                if unit:
                    assert h.endswith("]"), f"{path.name}: {h} has no unit (expected [{unit}])"
    assert not unknown, f"CSV headers not in the glossary: {unknown}"


def test_every_verified_quantity_of_the_demo_is_a_glossary_key(demo_run):
    import pandas as pd

    table = pd.read_csv(demo_run.folder / "verify" / "verify.csv")
    names = {q.split(" (", 1)[0] for q in table["quantity"]}
    assert not {n for n in names if not glossary.is_known(n)}, names


def _avoided(text: str) -> list[str]:
    return [f"{m.group(0)!r} (write {new})" for rx, new in glossary.AVOID.items()
            for m in [re.search(rx, text)] if m]


def test_no_output_of_the_demo_uses_a_former_or_avoided_spelling(demo_run):
    bad = {}
    outputs = {"terminal": demo_run.out}
    for suffix in (".csv", ".html", ".txt"):
        for path in _files(demo_run.folder, suffix):
            if path.name.endswith(".csv") and path.stat().st_size > 2_000_000:
                continue
            outputs[str(path.relative_to(demo_run.folder))] = path.read_text(encoding="utf-8")
    for path in _files(demo_run.folder, ".json"):
        # names and words of a JSON document (values that are numbers do not matter)
        outputs[str(path.relative_to(demo_run.folder))] = json.dumps(
            json.loads(path.read_text(encoding="utf-8")), ensure_ascii=False)
    for name, text in outputs.items():
        if "verify" in name or name == "terminal" or name == "report.html":
            # a verification case names its source (a citation may say "from memory" or
            # quote a formula); sources are the user's words, not pkcalc's labels
            text = "\n".join(line for line in text.splitlines()
                              if not line.lstrip().startswith("source:"))
        if name.endswith(".json"):
            text = re.sub(r'"source": "[^"]*"', "", text)
        if name.endswith(".csv"):
            # True/False are the CSV spelling of a yes/no column (pandas reads them back)
            text = re.sub(r"\b(True|False)\b", "", text)
            if "verify" in name:
                text = "\n".join(",".join(row[:1] + row[2:]) for row in csv.reader(
                    text.splitlines()))
        if name.endswith(".html"):
            from pkcalc.report.html import visible_text

            text = re.sub(r">\s*source: [^<]*<", "><", text.split('<section id="data">', 1)[0])
            text = visible_text(text)
        found = _avoided(text)
        if found:
            bad[name] = found
    assert not bad, f"outputs with spellings the glossary replaces: {bad}"


def test_terminal_and_html_spell_out_every_abbreviation_they_use(demo_run):
    used = glossary.abbreviations_used(demo_run.out)
    assert used, "the demo's terminal output uses no abbreviation at all?"
    for a in used:
        assert f"{a} = {glossary.ABBREVIATIONS[a]}" in demo_run.out, a
    from pkcalc.report.html import visible_text

    html = (demo_run.folder / "report.html").read_text(encoding="utf-8")
    assert 'id="glossary"' in html and 'href="#glossary"' in html
    before, body = html.split('<section id="glossary">', 1)
    body = body.split("</section>", 1)[0]
    used = glossary.abbreviations_used(visible_text(before))
    assert "AUC" in used and "RSE" in used
    for a in used:
        assert f"<dt>{a}</dt><dd>{glossary.ABBREVIATIONS[a]}</dd>" in body, a
