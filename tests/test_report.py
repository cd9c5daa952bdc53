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
        ["population", SCENARIOS / "demo-sparse.toml", "--vpc-replicates", "10", "--method",
         "iterative"],
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


# --------------------------------------------------------------------------- finding one's way
VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source",
        "track", "wbr"}
#: elements whose end tag HTML lets one leave out (none is left out by the template)
OPTIONAL_END = {"p", "li", "td", "th", "tr", "thead", "tbody", "option"}


class Structure(HTMLParser):
    """Checks that every element is closed in order (the HTML parser of the standard
    library), and records ids, links and the order of headings."""

    def __init__(self) -> None:
        super().__init__()
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.ids: list[str] = []
        self.links: list[str] = []
        self.h2: list[str] = []
        self._h2 = False

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "id" in a:
            self.ids.append(a["id"])
        if tag == "a" and (a.get("href") or "").startswith("#"):
            self.links.append(a["href"][1:])
        if tag == "h2":
            self._h2, self._text = True, []
        if tag not in VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if tag == "h2":
            self._h2 = False
            self.h2.append("".join(self._text).strip())
        if tag in VOID:
            return
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes <{self.stack[-1] if self.stack else None}>")
            return
        self.stack.pop()

    def handle_data(self, data):
        if self._h2:
            self._text.append(data)


def test_the_demo_report_opens_with_the_overview_and_contents(demo_report):
    html = (demo_report / "report.html").read_text(encoding="utf-8")
    s = Structure()
    s.feed(html)
    assert not s.errors and s.stack == [], s.errors[:5]
    assert s.h2[:2] == ["Overview", "Contents"]
    assert s.h2[-5:] == ["All warnings", "Inputs", "Terms and abbreviations", "Results as data",
                         "Reproducibility"]
    assert len(s.ids) == len(set(s.ids))
    assert set(s.links) <= set(s.ids) and len(s.links) >= 20     # every link lands
    # the overview: a verdict line per command, linked to its section
    assert html.index("Overview") < html.index("Prediction:")
    for found in ("scenario(s) predicted", "proposal(s):", "subject fits converged",
                  "estimate from 60 subjects", "check(s) passed", "row(s)"):
        assert found in html
    # inputs once each, collapsed, at the end (after every result)
    inputs = html[html.index('<section id="inputs">'):html.index('<section id="data">')]
    captions = re.findall(r"<summary>([^<]+) \(as given", inputs)
    assert len(captions) == len(set(captions)) >= 5
    assert " open>" not in inputs
    assert html.index('<section id="inputs">') > html.rindex('class="result')


def test_warnings_stand_beside_their_section_and_again_in_one_list(run_cli, write, tmp_path):
    from .test_design_attainment import MAP_FILE

    rep = tmp_path / "w.html"
    path = write("m.toml", MAP_FILE.replace('levels = [ { time = "35.5 h", concentration = '
                                            '"9 mg/L" } ]',
                                            'levels = [ { time = "35.5 h", concentration = '
                                            '"40 mg/L" } ]'))
    assert run_cli("design", path, "--report", rep).code == 0
    html = rep.read_text(encoding="utf-8")
    section = html[html.index('id="section-1"'):html.index('id="assumptions"')]
    everything = html[html.index('id="all-warnings"'):]
    shown = re.findall(r'<p class="warning">([^<]+)</p>', section)
    assert shown and all(w in everything or "not an order" in w for w in shown)


def test_the_html_design_table_has_the_terminals_columns(run_cli, tmp_path):
    rep = tmp_path / "d.html"
    r = run_cli("design", SCENARIOS / "demo-design.toml", "--report", rep)
    assert r.code == 0
    html = rep.read_text(encoding="utf-8")
    for header in ("peak [mg/L]", "trough [mg/L]", "AUC24 [mg*h/L]", "check",
                   "highest [mg/L]", "lowest after loading [mg/L]", "every [h]"):
        assert header in html
    assert "target: peak at most 30.00 mg/L; trough at least 8.000 mg/L" in html
    assert "[None" not in html


def test_print_styles_and_the_pdf_option(run_cli, tmp_path, monkeypatch):
    rep = tmp_path / "p.html"
    assert run_cli("predict", SCENARIOS / "demo.toml", "--report", rep).code == 0
    html = rep.read_text(encoding="utf-8")
    assert "@media print" in html and "@bottom-left" in html and "break-before: page" in html
    # --pdf without a browser: refused before any work, saying how to get one
    monkeypatch.setenv("PKCALC_BROWSER", str(tmp_path / "no-such-browser"))
    r = run_cli("predict", SCENARIOS / "demo.toml", "--report", tmp_path / "q.html", "--pdf")
    assert r.code == 2 and "apt install chromium" in r.err
    assert not (tmp_path / "q.html").exists()
    r = run_cli("predict", SCENARIOS / "demo.toml", "--pdf")
    assert r.code == 2 and "--report" in r.err


def test_settings_read_as_words_not_python(demo_report):
    html = (demo_report / "report.html").read_text(encoding="utf-8")
    body = html[html.index('<section id="section-1"'):html.index('<section id="assumptions"')]
    notes = re.findall(r'<p class="note">([^<]+)</p>', body)
    settings = [n for n in notes if re.match(r"^[a-z ]+: ", n)]
    assert settings
    for line in settings:
        assert not re.search(r"\b(None|True|False)\b|\['|\{'", line), line
