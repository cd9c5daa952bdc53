"""HTML report: self-contained, caution first, escaped, numbers equal to the JSON."""

from __future__ import annotations

import json
import re
from html.parser import HTMLParser

import pytest

from pkcalc._format import fmt

from .conftest import SCENARIOS


class Collector(HTMLParser):
    """Records tags with attributes, table cells in order, and <pre> text by id."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict]] = []
        self.cells: list[str] = []
        self.pre: dict[str, str] = {}
        self._in_cell = False
        self._pre_id: str | None = None
        self._buf: list[str] = []
        self.first_table_pos: int | None = None
        self.caution_pos: int | None = None
        self.text_parts: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append((tag, a))
        if tag == "div" and "caution" in (a.get("class") or "") and self.caution_pos is None:
            self.caution_pos = len(self.tags)
        if tag == "table" and self.first_table_pos is None:
            self.first_table_pos = len(self.tags)
        if tag in ("td", "th"):
            self._in_cell, self._buf = True, []
        if tag == "pre":
            self._pre_id, self._buf = a.get("id", f"pre{len(self.pre)}"), []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._in_cell:
            self.cells.append("".join(self._buf).strip())
            self._in_cell = False
        if tag == "pre" and self._pre_id:
            self.pre[self._pre_id] = "".join(self._buf)
            self._pre_id = None

    def handle_data(self, data):
        self.text_parts.append(data)
        if self._in_cell or self._pre_id:
            self._buf.append(data)


def parse(path) -> Collector:
    c = Collector()
    c.feed(path.read_text(encoding="utf-8"))
    c.close()
    return c


def no_remote_resources(c: Collector) -> None:
    for tag, attrs in c.tags:
        for name in ("src", "href", "srcset", "data", "action"):
            value = attrs.get(name) or ""
            assert not re.match(r"\s*(https?:)?//", value), (tag, name, value[:80])
    assert not any(tag in ("script", "link", "iframe") for tag, _ in c.tags)


@pytest.fixture(scope="module")
def demo_report(demo_run):
    assert demo_run.code == 0
    return demo_run.folder


def test_demo_report_is_self_contained_and_caution_first(demo_report):
    path = demo_report / "report.html"
    c = parse(path)
    assert c.caution_pos is not None and c.first_table_pos is not None
    assert c.caution_pos < c.first_table_pos
    text = path.read_text(encoding="utf-8")
    assert "http://" not in text and "https://" not in text
    no_remote_resources(c)
    assert text.count("data:image/png;base64,") >= 7
    body = " ".join(c.text_parts)
    for needed in ("Assumptions of the model", "Reproducibility", "SHA-256", "demo.toml",
                   "licensed clinicians and pharmacists", "not an order"):
        assert needed in body


def test_report_numbers_equal_json(run_cli, tmp_path):
    rep = tmp_path / "r.html"
    r = run_cli("predict", SCENARIOS / "demo.toml", "--report", rep)
    assert r.code == 0, r.err
    doc = run_cli("predict", SCENARIOS / "demo.toml", "--json").json()
    c = parse(rep)
    embedded = json.loads(c.pre["results-json"])
    assert embedded == doc
    # every value in each scenario's parameter table is the JSON number (4 significant figures)
    labels = {"clearance": ("parameters", "clearance"), "volume": ("parameters", "volume"),
              "half-life": ("parameters", "half_life"),
              "plateau": (None, "plateau_concentration")}
    for label, (group, key) in labels.items():
        shown = [c.cells[i + 1] for i, cell in enumerate(c.cells) if cell == label]
        expected = [fmt((sc[group] if group else sc)[key]) for sc in doc["scenarios"]]
        assert shown == expected, label


def test_hostile_names_are_escaped(run_cli, write, tmp_path):
    hostile = '<script>alert("x")</script>'
    text = (SCENARIOS / "infusion-example.toml").read_text().replace(
        'name = "loading bolus + 30 mg/h"', f"name = '{hostile}'")
    rep = tmp_path / "h.html"
    r = run_cli("predict", write("h.toml", text), "--report", rep)
    assert r.code == 0, r.err
    html = rep.read_text(encoding="utf-8")
    assert hostile not in html
    assert "&lt;script&gt;" in html
    c = parse(rep)
    assert not any(tag == "script" for tag, _ in c.tags)
    assert hostile in " ".join(c.text_parts)  # shown as text


def test_design_report(run_cli, tmp_path):
    rep = tmp_path / "d.html"
    r = run_cli("design", "--clearance", "4 L/h", "--half-life", "8 h", "--plateau",
                "10 mg/L", "--report", rep)
    assert r.code == 0, r.err
    c = parse(rep)
    no_remote_resources(c)
    body = " ".join(c.text_parts)
    assert "not an order" in body and "--plateau" in body  # options in the footer


def test_report_never_overwrites_input(run_cli, write):
    src = write("in.toml", (SCENARIOS / "infusion-example.toml").read_text())
    before = src.read_text()
    r = run_cli("predict", src, "--report", src)
    assert r.code == 2 and "overwrite" in r.err
    assert src.read_text() == before


@pytest.mark.parametrize(
    "args",
    [
        ["nca", SCENARIOS / "demo-study.toml"],
        ["fit", SCENARIOS / "demo-study.toml", "--with-nca"],
        ["population", SCENARIOS / "demo-sparse.toml", "--vpc-replicates", "10"],
        ["batch", SCENARIOS / "demo-grid.toml", "--out", "{tmp}/g.csv"],
        ["verify", SCENARIOS / "reference-cases.toml"],
    ],
)
def test_every_command_report_is_self_contained(run_cli, tmp_path, args):
    args = [str(a).replace("{tmp}", str(tmp_path)) for a in args]
    rep = tmp_path / "r.html"
    r = run_cli(*args, "--report", rep)
    assert r.code == 0, r.err
    c = parse(rep)
    no_remote_resources(c)
    assert c.caution_pos is not None and c.first_table_pos is not None
    assert c.caution_pos < c.first_table_pos
    assert "Reproducibility" in " ".join(c.text_parts)


@pytest.mark.parametrize("command", ["predict", "design", "fit", "nca", "population", "batch",
                                     "verify", "demo"])
def test_every_command_help_has_examples(run_cli, command):
    r = run_cli(command, "--help")
    assert r.code == 0 and "examples:" in r.out
