"""The library as a researcher scripts it: README examples run, the house has no circle,
compute modules import no file-boundary library, options objects refuse wrong values,
and the command line prints what the library computes."""

from __future__ import annotations

import ast
import json
import re
import subprocess
import sys
from pathlib import Path

import pytest

import pkcalc
from pkcalc.core import (
    DoseEvent,
    FitOptions,
    NcaOptions,
    PopulationOptions,
    Prior,
    ScenarioInput,
    Target,
)

from .conftest import REPO, SCENARIOS


# --------------------------------------------------------------------------- README
def readme_python_blocks() -> list[str]:
    text = (REPO / "README.md").read_text(encoding="utf-8")
    return re.findall(r"```python\n(.*?)```", text, flags=re.S)


def test_every_python_block_of_the_readme_runs(tmp_path, monkeypatch, capsys):
    blocks = readme_python_blocks()
    assert len(blocks) >= 4
    monkeypatch.chdir(tmp_path)  # the examples write grid.csv here, not in the checkout
    namespace: dict = {}
    for block in blocks:
        exec(compile(block, "README.md", "exec"), namespace)
    out = capsys.readouterr().out
    assert "10.0" in out and "750.0 8.0" in out and "CAUTION" in out and "V01" in out
    assert (tmp_path / "grid.csv").exists()


# --------------------------------------------------------------------------- the house
COMPUTE = ("model", "core", "predict", "design", "fit", "nca", "population", "plausibility")


@pytest.mark.parametrize("module", COMPUTE)
def test_compute_modules_import_no_boundary_library(module):
    code = (f"import sys, pkcalc.{module}; "
            "print([m for m in ('pandas', 'pydantic', 'pint') if m in sys.modules])")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.strip()
    assert out == "[]", f"importing pkcalc.{module} loads {out}"


def _module_graph() -> dict[str, set[str]]:
    """pkcalc's imports (module level and inside functions), by walking the source."""
    root = REPO / "pkcalc"
    mods = {}
    for p in root.rglob("*.py"):
        parts = p.relative_to(REPO).with_suffix("").parts
        mods[".".join(parts[:-1] if parts[-1] == "__init__" else parts)] = p
    graph: dict[str, set[str]] = {m: set() for m in mods}
    for m, p in mods.items():
        pkg = m if p.name == "__init__.py" else m.rsplit(".", 1)[0]
        for node in ast.walk(ast.parse(p.read_text(encoding="utf-8"))):
            targets = []
            if isinstance(node, ast.ImportFrom):
                base = pkg
                for _ in range(max(node.level - 1, 0)):
                    base = base.rsplit(".", 1)[0]
                t = (f"{base}.{node.module}" if node.module else base) if node.level \
                    else node.module
                targets = [t] + [f"{t}.{a.name}" for a in node.names]
            elif isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            for t in targets:
                while t and t not in mods and "." in t:
                    t = t.rsplit(".", 1)[0]
                if t in mods and t != m and not m.startswith(t + "."):
                    graph[m].add(t)
    return graph


def test_no_import_circle_inside_pkcalc():
    graph = _module_graph()
    state: dict[str, int] = {}
    path: list[str] = []

    def visit(v: str) -> None:
        state[v] = 1
        path.append(v)
        for w in sorted(graph[v]):
            if state.get(w) == 1:
                cycle = [*path[path.index(w):], w]
                pytest.fail("import circle: " + " -> ".join(cycle))
            if w not in state:
                visit(w)
        path.pop()
        state[v] = 2

    for v in sorted(graph):
        if v not in state:
            visit(v)


def test_compute_never_imports_the_boundary_or_the_command_line():
    graph = _module_graph()
    def part(name: str) -> str:
        return name.split(".")[1] if "." in name else ""

    compute = [m for m in graph if part(m) in COMPUTE]
    for m in compute:
        bad = {t for t in graph[m] if part(t) in ("schema", "units", "cli", "runner",
                                                  "report", "plots", "api")}
        assert not bad, f"{m} imports {bad}"


def test_example_files_are_this_checkouts_own():
    # the demo of this checkout reads this checkout's files (importlib.resources)
    path = pkcalc.example_file("demo.toml").resolve()
    assert path == (SCENARIOS / "demo.toml").resolve()
    with pytest.raises(FileNotFoundError, match="demo-study.toml"):
        pkcalc.example_file("no-such-example.toml")


# --------------------------------------------------------------------------- options objects
@pytest.mark.parametrize(("make", "field"), [
    (lambda: FitOptions(error_model="banana"), "error_model"),
    (lambda: FitOptions(weighting="often", error_model=None), "weighting"),
    (lambda: FitOptions(blq="maybe"), "blq"),
    (lambda: FitOptions(ci="wide"), "ci"),
    (lambda: FitOptions(starts=0), "starts"),
    (lambda: FitOptions(nca_threshold=-1), "nca_threshold"),
    (lambda: FitOptions(weighting="uniform", blq="likelihood", error_model=None), "blq"),
    (lambda: NcaOptions(auc_method="simpson"), "auc_method"),
    (lambda: NcaOptions(blq_rule="half"), "blq_rule"),
    (lambda: NcaOptions(r2_tolerance=2.0), "r2_tolerance"),
    (lambda: PopulationOptions(method="naive"), "method"),
    (lambda: PopulationOptions(covariate="height"), "covariate"),
    (lambda: PopulationOptions(bootstrap=-1), "bootstrap"),
    (lambda: Prior(-4.0, 40.0, 0.3, 0.2, proportional=0.1), "clearance"),
    (lambda: Prior(4.0, 40.0, 0.3, 0.2, correlation=1.5, proportional=0.1), "correlation"),
    (lambda: Prior(4.0, 40.0, 0.3, 0.2), "additive/proportional"),
    (lambda: DoseEvent(-1.0, 100.0, 0.0), "start"),
    (lambda: DoseEvent(0.0, float("nan"), 0.0), "amount"),
    (lambda: DoseEvent(0.0, 100.0, 1.0, count=3), "every"),
    (lambda: DoseEvent(0.0, 100.0, 1.0, every=8.0, count=True), "count"),
    (lambda: Target(low=10.0, high=5.0), "low"),
    (lambda: ScenarioInput("s", 0.0, 30.0, ()), "clearance"),
])
def test_options_objects_refuse_wrong_values_naming_the_field(make, field):
    with pytest.raises(ValueError, match=re.escape(field)):
        make()


# --------------------------------------------------------------------------- the two bugs
def _study_with_options(tmp_path: Path, extra: str) -> Path:
    for name in ("demo-study-levels.csv", "demo-study-doses.csv", "demo-study-subjects.csv"):
        (tmp_path / name).write_bytes((SCENARIOS / name).read_bytes())
    study = (SCENARIOS / "demo-study.toml").read_text(encoding="utf-8")
    study = re.sub(r"(?ms)^\[(fit|nca|population)\].*?(?=^\[|\Z)", "", study)
    path = tmp_path / "study.toml"
    path.write_text(study + "\n" + extra, encoding="utf-8")
    return path


def test_nca_options_are_the_same_beside_a_fit(tmp_path, run_cli):
    # a study's [nca] slope_tolerance applies to `pkcalc nca` and to `fit --with-nca` alike
    path = _study_with_options(tmp_path, "[nca]\nslope_tolerance = 0.1\n")
    nca = run_cli("nca", path, "--json").json()
    fit = run_cli("fit", path, "--with-nca", "--json").json()
    by_nca = {s["subject"]: s["terminal_half_life"] for s in nca["subjects"]}
    beside = {c["subject"]: row["nca"] for c in fit["comparison_with_nca"]
              for row in c["rows"] if row["quantity"].startswith("half-life")}
    assert beside and all(by_nca[s] == pytest.approx(v) for s, v in beside.items())
    (tmp_path / "d").mkdir()
    default = run_cli("nca", _study_with_options(tmp_path / "d", ""), "--json").json()
    assert any(d["terminal_half_life"] != pytest.approx(by_nca[d["subject"]])
               for d in default["subjects"]), "the option must change some subject"


def test_a_study_files_prior_path_is_relative_to_the_study_file(tmp_path, run_cli,
                                                                 monkeypatch):
    prior = ('[prior]\nclearance = "4 L/h"\nvolume = "40 L"\ncv_clearance = "40%"\n'
             'cv_volume = "30%"\nerror = { proportional = "10%" }\n')
    (tmp_path / "priors").mkdir()
    (tmp_path / "priors" / "p.toml").write_text(prior, encoding="utf-8")
    path = _study_with_options(tmp_path, '[fit]\nprior = "priors/p.toml"\n')
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    r = run_cli("fit", path, "--json")
    assert r.code == 0, r.err
    assert r.json()["settings"]["prior"].endswith("p.toml")


# --------------------------------------------------------------------------- CLI = library
def test_the_command_line_prints_what_the_library_computes(run_cli):
    study_path = SCENARIOS / "demo-study.toml"
    study = pkcalc.load_study_file(study_path)
    cli_fit = run_cli("fit", study_path, "--json").json()
    lib_fit = json.loads(json.dumps(pkcalc.fit_study(study).document(), default=float))
    assert cli_fit["subjects"] == lib_fit["subjects"]
    cli_nca = run_cli("nca", study_path, "--json").json()
    lib_nca = json.loads(json.dumps(pkcalc.nca_study(study).document(), default=float))
    assert cli_nca["subjects"] == lib_nca["subjects"]
    # population: tests/test_notebook.py compares the notebook's estimate with the
    # command line's JSON, parameter by parameter
    scen = pkcalc.load_scenario_file(SCENARIOS / "demo.toml")
    cli_pred = run_cli("predict", SCENARIOS / "demo.toml", "--json").json()
    for s, d in zip(scen.scenarios, cli_pred["scenarios"], strict=True):
        lib = pkcalc.predict_scenario(s)
        assert d["plateau_concentration"] == pytest.approx(lib.plateau_concentration,
                                                           rel=1e-12) \
            if lib.plateau_concentration is not None else d["plateau_concentration"] is None


def test_results_have_a_notebook_view_with_the_caution():
    study = pkcalc.load_study_file(SCENARIOS / "demo-study.toml")
    for result in (pkcalc.fit_study(study), pkcalc.nca_study(study)):
        html = result._repr_html_()
        assert "licensed clinicians" in html and "<table" in html


# --------------------------------------------------------------------------- references
def _references(text: str) -> set[str]:
    links = set(re.findall(r"\]\(([^)#\s]+)\)", text))
    paths = set(re.findall(r"`((?:pkcalc|tests|scenarios|docs)/[A-Za-z0-9_./-]+)", text))
    return {p.rstrip("/.") for p in links | paths if "://" not in p and "*" not in p}


@pytest.mark.parametrize("doc", ["README.md", "DEVELOPERS.md", "docs/methods.md",
                                 "docs/design-notes.md", "docs/validation.md", "docs/dask.md",
                                 "docs/formats.md"])
def test_every_path_a_document_names_exists(doc):
    text = (REPO / doc).read_text(encoding="utf-8")
    base = (REPO / doc).parent
    missing = [p for p in sorted(_references(text))
               if not (base / p).exists() and not (REPO / p).exists()]
    assert not missing, f"{doc} names paths that do not exist: {missing}"
