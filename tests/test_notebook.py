"""The notebook of docs/ runs headlessly, as a researcher would run it, and its numbers
are the command line's.

References outside pkcalc: nbclient and nbformat (the Jupyter project's notebook
executor and format) run docs/notebook.ipynb in a fresh kernel; the command line's
JSON document (``pkcalc population --json``) of the same study and models is the
reference for the population numbers (to 1e-12).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

nbformat = pytest.importorskip("nbformat")
nbclient = pytest.importorskip("nbclient")

from .conftest import SCENARIOS  # noqa: E402

NOTEBOOK = Path(__file__).resolve().parents[1] / "docs" / "notebook.ipynb"


def _text(output) -> str:
    if output.get("output_type") == "stream":
        return output.get("text", "")
    data = output.get("data", {})
    return data.get("text/plain", "") + data.get("text/html", "")


@pytest.fixture(scope="module")
def executed(tmp_path_factory):
    nb = nbformat.read(NOTEBOOK, as_version=4)
    # one extra cell, not in the notebook: the population numbers at full precision
    nb.cells.append(nbformat.v4.new_code_cell(
        "import json\nprint('PARAMS=' + json.dumps({k: float(v) for k, v in "
        "pop.params.items()}))"))
    client = nbclient.NotebookClient(nb, timeout=600, kernel_name="python3",
                                     resources={"metadata": {"path": str(
                                         tmp_path_factory.mktemp("nb"))}})
    client.execute()
    return nb


def test_the_notebook_runs_without_errors_and_shows_each_step(executed):
    outputs = ["".join(_text(o) for o in c.get("outputs", [])) for c in executed.cells
               if c.cell_type == "code"]
    errors = [o for c in executed.cells if c.cell_type == "code" for o in c.get("outputs", [])
              if o.get("output_type") == "error"]
    assert not errors, errors
    text = "\n".join(outputs)
    for shown in ("subjects;", "clearance [L/h]", "terminal_half_life [h]", "allometric",
                  "compared_with", "typical clearance", "CAUTION", "Typical values for a "
                  "patient", "between-subject 90% low [mg/L]", "Design: adjustment (map)"):
        assert shown in text, shown
    figures = [o for c in executed.cells if c.cell_type == "code" for o in c.get("outputs", [])
               if "image/png" in o.get("data", {})]
    assert len(figures) >= 2


def test_the_notebook_population_numbers_are_the_command_lines(executed, run_cli, tmp_path):
    line = next(line for c in executed.cells if c.cell_type == "code"
                for o in c.get("outputs", []) for line in _text(o).splitlines()
                if line.startswith("PARAMS="))
    notebook = json.loads(line.removeprefix("PARAMS="))
    study = tmp_path / "sparse.toml"
    study.write_text(
        "\n".join([f'{k} = "{(SCENARIOS / f"demo-sparse-{k}.csv").as_posix()}"'
                   for k in ("levels", "doses", "subjects")]
                  + ["[population]", 'error_model = "combined"', 'covariate = "allometric"',
                     'reference_weight = "70 kg"', "seed = 7", "[population.models]",
                     "allometric = []", 'ward = ["ward on clearance"]']), encoding="utf-8")
    r = run_cli("population", study, "--json")
    assert r.code == 0, r.err
    cli = {p["name"]: p["value"] for p in json.loads(r.out)["parameters"]}
    assert list(cli) == list(notebook)
    for name, value in notebook.items():
        assert value == pytest.approx(cli[name], rel=1e-12, abs=1e-300), name
