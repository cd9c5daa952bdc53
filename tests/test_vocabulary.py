"""One vocabulary, item by item: the renames (with the former names accepted for one
release), the text that said the wrong thing, and figures that read at a glance."""

from __future__ import annotations

import json

import numpy as np
import pytest

from pkcalc import example_file, glossary
from pkcalc.runner import run_batch_command, run_design
from pkcalc.schema import load_design_file

STEPWISE = ["--stepwise", "weight on clearance", "--stepwise", "weight on volume"]


# --------------------------------------------------------------------------- renames
def test_population_standard_errors_are_named_in_our_words(demo_run):
    doc = json.loads((demo_run.folder / "population" / "population.json").read_text())
    assert "standard_errors" in doc and "covariance_step" not in doc
    assert "condition_number" in doc["standard_errors"]
    names = doc["standard_errors"]["names"]
    # every name says what the number is (no factor named after a decomposition)
    assert "covariance of ln CL and ln V / SD of ln CL" in names
    assert "Every parameter (standard errors from the observed information" in demo_run.out


@pytest.fixture(scope="module")
def stepwise_run(tmp_path_factory):
    """A stepwise search on the demo study (12 subjects: quick), text and JSON."""
    import contextlib
    import io

    from pkcalc.cli import main

    out = tmp_path_factory.mktemp("stepwise")
    text = io.StringIO()
    with contextlib.redirect_stdout(text):
        code = main(["population", str(example_file("demo-study.toml")), *STEPWISE,
                     "--add-if-p-below", "0.5", "--remove-if-p-above", "0.1",
                     "--vpc-replicates", "0", "--quiet", "--out", str(out)])
    assert code == 0
    return text.getvalue(), json.loads((out / "population.json").read_text())


def test_stepwise_options_say_what_they_do(stepwise_run):
    _, doc = stepwise_run
    steps = doc["comparison"]["stepwise"]
    assert steps and all(s["decision"] in ("added", "not added", "removed", "kept")
                         for s in steps)
    assert steps[0]["threshold"] == 0.5 and steps[0]["compared_with"] == "base"
    names = [m["model"] for m in doc["comparison"]["models"]]
    for s in steps:
        assert s["compared_with"] in names
    assert all(s["threshold"] == (0.5 if s["step"] == "forward" else 0.1) for s in steps)


def test_former_stepwise_option_names_are_accepted_with_a_note(capsys):
    import warnings

    from pkcalc.cli import _former_note
    from pkcalc.cli_parser import build_parser

    with warnings.catch_warnings():
        warnings.simplefilter("always", glossary.FormerName)
        warnings.showwarning = _former_note
        args = build_parser().parse_args(["population", "study.toml", "--stepwise", "x",
                                          "--p-in", "0.2", "--p-out", "0.1"])
    assert args.add_if_p_below == 0.2 and args.remove_if_p_above == 0.1
    err = capsys.readouterr().err
    assert "'--p-in' is the former name; write '--add-if-p-below'" in err
    assert "'--p-out' is the former name; write '--remove-if-p-above'" in err
    help_text = build_parser()._subparsers._group_actions[0].choices["population"]
    assert "--p-in" not in help_text.format_help()


def test_former_stepwise_keys_in_a_study_file_are_accepted(write):
    from pkcalc.schema.fitopts import population_options

    with pytest.warns(glossary.FormerName, match="write 'add_if_p_below'"):
        o = population_options({"stepwise": {"candidates": ["weight on clearance"],
                                              "p_in": 0.2}}, file="study.toml")
    assert o.add_if_p_below == 0.2


def test_stepwise_text_and_caption_agree_with_the_json(stepwise_run):
    text, doc = stepwise_run
    assert "likelihood-ratio test against 'base'" not in text
    assert "the model of the step before" in text
    lines = [ln for ln in text.splitlines() if ln.strip().startswith(("forward:",
                                                                     "backward:"))]
    assert len(lines) == len(doc["comparison"]["stepwise"])
    for line, step in zip(lines, doc["comparison"]["stepwise"], strict=True):
        assert line.rstrip().endswith(f"-> {step['decision']}")
        assert f"(against '{step['compared_with']}')" in line


def test_nca_slope_rule_is_worded_as_ours_and_its_tolerance_is_an_option(run_cli):
    study = example_file("demo-study.toml")
    r = run_cli("nca", study, "--json")
    note = " ".join(r.json()["subjects"][0]["notes"])
    assert "ties within" not in note and "resolved to more points" not in note
    assert "longest tail whose adjusted R²" in note and "slope tolerance" in note
    loose = run_cli("nca", study, "--slope-tolerance", "0.05", "--json").json()
    a = [s["points_used"] for s in r.json()["subjects"]]
    b = [s["points_used"] for s in loose["subjects"]]
    assert all(len(y) >= len(x) for x, y in zip(a, b, strict=True))
    assert any(len(y) > len(x) for x, y in zip(a, b, strict=True))
    assert run_cli("nca", study, "--slope-tolerance", "0.5").code == 2


def test_nca_blq_option_has_the_fit_commands_name(run_cli):
    study = example_file("demo-study.toml")
    new = run_cli("nca", study, "--blq", "zero", "--json")
    old = run_cli("nca", study, "--blq-rule", "zero", "--json")
    assert new.code == old.code == 0
    assert "'--blq-rule' is the former name; write '--blq'" in old.err
    assert new.json()["subjects"] == old.json()["subjects"]


def test_option_values_have_one_spelling_and_the_former_is_accepted(run_cli, write):
    study = example_file("demo-study.toml")
    r = run_cli("nca", study, "--auc-method", "linear-up-log-down", "--json")
    assert r.code == 0 and "write 'linear_up_log_down'" in r.err
    assert r.json()["settings"]["auc_method"] == "linear_up_log_down"
    assert "linear-up-log-down" not in run_cli("nca", "--help").out
    assert "two-stage" not in run_cli("population", "--help").out.replace(
        "iterative two-stage", "").replace("standard two-stage", "")


def test_time_to_a_fraction_of_the_plateau_has_one_key_everywhere(demo_run):
    doc = json.loads((demo_run.folder / "predict" / "predict.json").read_text())
    sc = doc["scenarios"][0]
    assert sc["time_to_90_percent"] == pytest.approx(
        sc["half_lives_to_90_percent"] * sc["parameters"]["half_life"])
    head = (demo_run.folder / "batch" / "grid-results.csv").read_text().splitlines()[0]
    assert "time_to_90_percent [h]" in head
    summary = (demo_run.folder / "predict" / "summary.csv").read_text().splitlines()[0]
    assert "time_to_90_percent [h]" in summary
    assert "time to 90 % of plateau" in demo_run.out


def test_area_units_read_amount_time_per_volume(demo_run):
    for name in ("nca/nca.csv", "nca/nca-intervals.csv", "design/regimens.csv"):
        head = (demo_run.folder / name).read_text().splitlines()[0]
        assert "mg*h/L" in head and "mg/L*h" not in head, name
    doc = json.loads((demo_run.folder / "nca" / "nca.json").read_text())
    assert doc["units"]["auc"] == "mg*h/L" and doc["units"]["aumc"] == "mg*h^2/L"


def test_design_methods_print_by_their_published_names(demo_run):
    assert "(method: Sawchuk–Zaske)" in demo_run.out
    assert "sawchuk zaske" not in demo_run.out.lower()


def test_sampling_labels_the_compared_schedule_by_its_key(demo_run):
    doc = json.loads((demo_run.folder / "sampling" / "sampling.json").read_text())
    labels = {d["label"] for sc in doc["scenarios"] for d in sc["designs"]}
    assert "compare" in labels and not any("yours" in x for x in labels)


def test_refit_defaults_to_the_population_commands_method():
    from pkcalc.cli_parser import build_parser

    for command in ("sampling", "population"):
        text = build_parser()._subparsers._group_actions[0].choices[command].format_help()
        assert "marginal" in text.split("(default")[0] or "(default, as in" in text
    import inspect

    from pkcalc.sampling import simulate

    assert 'refit or "marginal"' in inspect.getsource(simulate.simulate_designs)


def test_verdict_and_counts_share_the_glossary_names(demo_run):
    doc = json.loads((demo_run.folder / "fit" / "fit.json").read_text())
    assert "too_few_levels" in doc["adequacy_summary"]
    s = doc["subjects"][0]
    assert "n_levels" in s and "n_parameters" in s and "n_obs" not in s
    head = (demo_run.folder / "fit" / "fit.csv").read_text().splitlines()[0]
    assert "adequacy_likelihood_ratio_p" in head and "n_levels" in head


def test_population_settings_say_what_the_model_held():
    import pkcalc

    r = pkcalc.population_study(example_file("demo-study.toml"),
                                effects=["weight on clearance"], vpc_replicates=0)
    s = r.settings
    assert s["weight_model"] == "none"
    assert s["reference_weight"] == "not used (no weight model)"
    ref = r.effects[0]["reference"]
    assert f"around {ref:g}" in s["effects"]
    text = r.summary()
    assert "reference weight: not used" in text and "effects: weight on clearance" in text


def test_batch_summary_states_units_and_the_window_share_as_a_percentage(demo_run):
    out = demo_run.out.split("Batch:", 1)[1]
    assert "unit" in out and "% " in out
    line = next(x for x in out.splitlines() if x.startswith("share of virtual subjects"))
    values = [float(x) for x in line.split()[-3:]]
    assert max(values) > 1.0      # a percentage, as in the plot (not 0-1)


def test_iterations_file_has_rows_with_the_default_method(demo_run):
    rows = (demo_run.folder / "population" / "population-iterations.csv").read_text()
    lines = rows.splitlines()
    assert lines[0] == "iteration,objective" and len(lines) > 3
    values = [float(x.split(",")[1]) for x in lines[1:]]
    assert values[-1] <= values[0]


def test_docs_use_the_current_names():
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    former = {*glossary.FORMER, *glossary.FORMER_OPTIONS, *glossary.FORMER_VALUES}
    for name in ("README.md", "docs/formats.md", "docs/methods.md", "docs/design-notes.md"):
        text = (root / name).read_text(encoding="utf-8")
        for old in former:
            assert f"`{old}`" not in text and f"`{old} " not in text, (name, old)
        for bad in ("mg/L*h", "-2lnL", "t1/2 ["):
            assert bad not in text, (name, bad)


# --------------------------------------------------------------------------- figures
@pytest.fixture(scope="module")
def design_figures():
    from pkcalc.report import UnitConverter

    path = example_file("demo-design.toml")
    sfile = load_design_file(path)
    run = run_design(sfile.scenarios, failures=sfile.failures, title=sfile.title,
                     units=sfile.output.units(), inputs=[str(path)])
    assert UnitConverter  # the figures are drawn in the file's display units
    return {k: f for k, f in run.figure_factory().items() if f is not None}


@pytest.fixture(scope="module")
def batch_figure(tmp_path_factory):
    from pkcalc.batch import BatchOptions

    out = tmp_path_factory.mktemp("batch") / "grid.csv"
    run = run_batch_command(str(example_file("demo-grid.toml")), str(out),
                            BatchOptions(at=(24.0, 48.0), population=200, seed=1,
                                         cv_clearance=0.3, cv_volume=0.2))
    return run.figure_factory()["__batch__"]


def _inside(fig, artist) -> bool:
    renderer = fig.canvas.get_renderer()
    box = artist.get_window_extent(renderer)
    canvas = fig.bbox
    return (box.x0 >= canvas.x0 - 1 and box.y0 >= canvas.y0 - 1
            and box.x1 <= canvas.x1 + 1 and box.y1 <= canvas.y1 + 1)


def _draw(fig):
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    fig.canvas.draw()
    return fig


def test_every_axis_label_of_the_batch_plot_is_inside_the_canvas(batch_figure):
    fig = _draw(batch_figure)
    for ax in fig.axes:
        for label in (ax.xaxis.label, ax.yaxis.label):
            if label.get_text():
                assert _inside(fig, label), label.get_text()


def test_design_legends_do_not_cover_the_curves_and_labels_fit(design_figures):
    assert design_figures
    for name, fig in design_figures.items():
        fig = _draw(fig)
        ax = fig.axes[0]
        legend = ax.get_legend()
        box = legend.get_window_extent(fig.canvas.get_renderer())
        assert not box.overlaps(ax.get_window_extent()), name
        assert _inside(fig, legend), name
        footer = [t for t in fig.texts if "Model estimates" in t.get_text()]
        assert footer, name                      # the caution footer is there
        assert not box.overlaps(footer[0].get_window_extent(fig.canvas.get_renderer())), \
            name                                 # and the legend does not cover it
        for label in (ax.xaxis.label, ax.yaxis.label, ax.title):
            assert _inside(fig, label), (name, label.get_text())


def test_proposals_are_drawn_unlike_the_limit_lines(design_figures):
    for name, fig in design_figures.items():
        lines = fig.axes[0].get_lines()
        proposals = [ln for ln in lines if ln.get_label().startswith("#")]
        limits = [ln for ln in lines if ln.get_label() in ("peak limits", "trough limits",
                                                            "target plateau")]
        assert proposals, name
        assert all(ln.get_linestyle() == "-" for ln in proposals), name
        assert all(ln.get_linestyle() != "-" for ln in limits), name
        marks = [ln.get_marker() for ln in proposals]
        assert len(set(map(str, marks))) == len(marks), name     # each its own marker


def test_plot_axes_use_glossary_labels(design_figures):
    for fig in design_figures.values():
        ax = fig.axes[0]
        assert ax.get_xlabel() == glossary.axis("time", "h")
        assert ax.get_ylabel() == glossary.axis("concentration", "mg/L")


def test_half_lives_to_plateau_match_the_first_order_identity(demo_run):
    # time to a fraction f of the plateau is -ln(1 - f) / k: log2(1/(1-f)) half-lives
    # (first-order kinetics; from memory)
    doc = json.loads((demo_run.folder / "predict" / "predict.json").read_text())
    for f in (50, 90, 95, 99):
        n = doc["scenarios"][0][f"half_lives_to_{f}_percent"]
        assert n == pytest.approx(np.log2(1 / (1 - f / 100)), rel=1e-9)
