"""``pkcalc`` command line: parses arguments, calls the library, prints, writes files.

Exit codes: 0 success; 1 some items failed (the rest are written) or a
verification check failed; 2 unusable input (one message per problem, naming
file, item and field; no traceback).
"""

from __future__ import annotations

import argparse
import os
import re
import sys
from collections.abc import Callable, Sequence
from pathlib import Path

from .errors import PkcalcInputError

EXIT_OK, EXIT_PARTIAL, EXIT_INPUT = 0, 1, 2

EXAMPLES = {
    "predict": """examples:
  pkcalc predict scenarios/demo.toml
  pkcalc predict scenarios/demo.toml --json > prediction.json
  pkcalc predict scenarios/demo.toml --out results/""",
    "design": """examples:
  pkcalc design --clearance "4 L/h" --half-life "8 h" --plateau "10 mg/L"
  pkcalc design --clearance "4 L/h" --half-life "8 h" --plateau "10 mg/L" --loading-time "30 min"
  pkcalc design --clearance "5.5 L/h" --volume "30 L" --peak-max "30 mg/L" --trough-min "8 mg/L" \\
                --infusion-time "1 h" --dose-step "50 mg"
  pkcalc design --clearance "5.5 L/h" --volume "30 L" --peak "25 mg/L" --trough "5 mg/L" \\
                --infusion-time "30 min"
  pkcalc design scenarios/demo-design.toml --out design-results/

A scenario file holds a [scenarios.design] table per scenario, for designs
(continuous, intermittent) and adjustments from measured levels
(proportional, chiou, sawchuk_zaske); see scenarios/demo-design.toml.""",
    "demo": """examples:
  pkcalc demo --out demo-output""",
}


# --------------------------------------------------------------------------- helpers
def _colour() -> bool:
    return sys.stdout.isatty() and "NO_COLOR" not in os.environ


def _emit(text: str) -> None:
    sys.stdout.write(text if text.endswith("\n") else text + "\n")


def slug(name: str) -> str:
    """A file-name-safe version of a scenario or subject name."""
    s = re.sub(r"[^A-Za-z0-9._-]+", "-", name).strip("-._")
    return s[:60] or "item"


def unique_slugs(names: Sequence[str]) -> list[str]:
    seen: dict[str, int] = {}
    out = []
    for n in names:
        s = slug(n)
        if s in seen:
            seen[s] += 1
            s = f"{s}-{seen[s]}"
        else:
            seen[s] = 1
        out.append(s)
    return out


def check_not_input(outputs: Sequence[Path], inputs: Sequence[str | Path]) -> None:
    """Refuse to write over an input file."""
    ins = {Path(p).resolve() for p in inputs if p}
    for out in outputs:
        if Path(out).resolve() in ins:
            raise PkcalcInputError("refusing to overwrite an input file", file=str(out),
                                   expected="an output path that is not one of the inputs")


# --------------------------------------------------------------------------- predict
def _predict_files(scenario_path: str, out_dir: str | None, as_json: bool,
                   report_path: str | None = None) -> int:
    from . import report
    from .predict import predict_scenario
    from .schema import load_scenario_file

    sfile = load_scenario_file(scenario_path)
    if not sfile.scenarios:
        raise PkcalcInputError(
            [p for _, err in sfile.failures for p in err.problems]
        )
    conv = report.UnitConverter(sfile.output.units())
    preds = [predict_scenario(s) for s in sfile.scenarios]
    doc = report.predict_json(preds, conv, title=sfile.title, failures=sfile.failures)
    if as_json:
        _emit(report.dumps(doc))
    else:
        _emit(report.predict_text(preds, conv, title=sfile.title, failures=sfile.failures,
                                  colour=_colour()))
    if out_dir:
        written = write_predict_outputs(Path(out_dir), preds, conv, doc, [scenario_path])
        if not as_json:
            _emit(f"wrote {len(written)} files to {out_dir}")
    return EXIT_PARTIAL if sfile.failures else EXIT_OK


def write_predict_outputs(out: Path, preds, conv, doc, inputs) -> list[Path]:
    """profile.csv and profile.png per scenario, summary.csv, predict.json, CAUTION.txt."""
    import pandas as pd

    from . import report
    from .plots import profile_figure, save_figure

    slugs = unique_slugs([p.name for p in preds])
    targets = [out / "predict.json", out / "summary.csv", out / "CAUTION.txt"]
    targets += [out / s / f for s in slugs for f in ("profile.csv", "profile.png")]
    check_not_input(targets, inputs)
    written = [report.write_caution_file(out)]
    rows = []
    tu, cu = conv.unit("time"), conv.unit("concentration")
    for pred, s in zip(preds, slugs, strict=True):
        frame = pd.DataFrame({f"time [{tu}]": conv(pred.time, "time"),
                              f"concentration [{cu}]": conv(pred.concentration,
                                                            "concentration")})
        written.append(report.write_atomic(out / s / "profile.csv", frame.to_csv(index=False)))
        written.append(save_figure(profile_figure(pred, conv), out / s / "profile.png"))
        d = report.predict_scenario_dict(pred, conv)
        row = {"scenario": pred.name, "folder": s}
        row.update({f"{k} [{conv.unit(_PARAM_KIND[k])}]": v for k, v in d["parameters"].items()})
        row[f"plateau_concentration [{cu}]"] = d["plateau_concentration"]
        for f, t in d["time_to_fraction"].items():
            row[f"time_to_{float(f) * 100:g}pct [{tu}]"] = t
        ss = d["steady_state"] or {}
        for key in ("peak", "trough", "average"):
            row[f"steady_state_{key} [{cu}]"] = ss.get(key)
        row["flags"] = " | ".join(pred.flags)
        row["warnings"] = " | ".join(pred.warnings)
        rows.append(row)
    written.append(report.write_atomic(out / "summary.csv",
                                       pd.DataFrame(rows).to_csv(index=False)))
    written.append(report.write_atomic(out / "predict.json", report.dumps(doc)))
    return written


_PARAM_KIND = {"clearance": "clearance", "volume": "volume",
               "elimination_rate": "elimination_rate", "half_life": "time",
               "time_constant": "time"}


def cmd_predict(args: argparse.Namespace) -> int:
    return _predict_files(args.scenario, args.out, args.json)


# --------------------------------------------------------------------------- design
_DESIGN_OPTIONS = ("plateau", "loading_time", "peak", "trough", "peak_min", "peak_max",
                   "trough_min", "trough_max", "infusion_time", "dose_step", "rate_step",
                   "max_rate", "max_dose", "max_loading", "salt_factor", "max_loading_ratio")
_PARAM_OPTIONS = ("clearance", "volume", "half_life", "elimination_rate", "time_constant",
                  "weight")


def _design_from_options(args: argparse.Namespace):
    from pydantic import ValidationError

    from .errors import Problem
    from .schema import DesignCaseSpec, validation_problems

    raw: dict = {"name": "command line"}
    raw.update({k: getattr(args, k) for k in _PARAM_OPTIONS if getattr(args, k) is not None})
    design = {k: getattr(args, k) for k in _DESIGN_OPTIONS if getattr(args, k) is not None}
    if args.window:
        design["window"] = list(args.window)
    if args.intervals:
        design["intervals"] = [x.strip() for x in args.intervals.split(",") if x.strip()]
    raw["design"] = design
    try:
        return DesignCaseSpec.model_validate(raw).resolved
    except ValidationError as exc:
        problems = validation_problems(exc)
    except PkcalcInputError as exc:
        problems = exc.problems

    def option(field: str | None) -> str | None:
        if not field:
            return None
        name = field.split(".", 1)[1] if field.startswith("design.") else field
        name = name.split("[")[0].split(".")[0]
        return "--" + name.replace("_", "-")

    raise PkcalcInputError([Problem(p.message, item="command line", field=option(p.field),
                                    expected=p.expected) for p in problems])


def cmd_design(args: argparse.Namespace) -> int:
    from .schema import OutputUnits, load_design_file

    quick = any(getattr(args, k) is not None for k in (*_DESIGN_OPTIONS, *_PARAM_OPTIONS,
                                                        "window", "intervals"))
    if args.scenario and quick:
        raise PkcalcInputError("give a scenario file or command-line parameters, not both",
                               expected="pkcalc design FILE.toml, or pkcalc design --clearance "
                                        "... --half-life ... --plateau ...")
    if args.scenario:
        sfile = load_design_file(args.scenario)
        return _design_run(sfile.scenarios, sfile.failures, sfile.title, sfile.output.units(),
                           [args.scenario], args.json, args.out)
    if quick:
        return _design_run([_design_from_options(args)], [], None, OutputUnits().units(), [],
                           args.json, args.out)
    raise PkcalcInputError("nothing to design", expected="a scenario file, or "
                           "--clearance/--half-life with --plateau or --peak/--trough")


def _design_run(cases, failures, title, units, inputs, as_json: bool, out_dir) -> int:
    from . import report
    from .design import run_design

    results, run_failures = [], list(failures)
    for case in cases:
        try:
            results.append(run_design(case))
        except ValueError as exc:  # infeasible requests the schema could not foresee
            label = f"scenario '{case.name}'"
            run_failures.append((label, PkcalcInputError(
                str(exc), file=inputs[0] if inputs else None, item=label)))
    if not results:
        raise PkcalcInputError([p for _, err in run_failures for p in err.problems])
    conv = report.UnitConverter(units)
    doc = report.design_json(results, conv, title=title, failures=run_failures)
    if as_json:
        _emit(report.dumps(doc))
    else:
        _emit(report.design_text(results, conv, title=title, failures=run_failures,
                                 colour=_colour()))
    if out_dir:
        written = write_design_outputs(Path(out_dir), results, conv, doc, inputs)
        if not as_json:
            _emit(f"wrote {len(written)} files to {out_dir}")
    return EXIT_PARTIAL if run_failures else EXIT_OK


def write_design_outputs(out: Path, results, conv, doc, inputs) -> list[Path]:
    """design.json, regimens.csv, one plot per design, CAUTION.txt."""
    import pandas as pd

    from . import report
    from .plots import design_figure, save_figure

    slugs = unique_slugs([r.name for r in results])
    targets = [out / "design.json", out / "regimens.csv", out / "CAUTION.txt"]
    targets += [out / f"design-{s}.png" for s in slugs]
    check_not_input(targets, inputs)
    written = [report.write_caution_file(out)]
    frames = []
    for res, s in zip(results, slugs, strict=True):
        frame = res.to_frame()
        frame.insert(0, "scenario", res.name)
        frames.append(frame)
        fig = design_figure(res, conv)
        if fig is not None:
            written.append(save_figure(fig, out / f"design-{s}.png"))
    written.append(report.write_atomic(out / "regimens.csv",
                                       pd.concat(frames).to_csv(index=False)))
    written.append(report.write_atomic(out / "design.json", report.dumps(doc)))
    return written


def demo_path(name: str = "demo.toml") -> Path:
    """Path of a scenario file shipped with pkcalc."""
    from importlib.resources import files

    return Path(str(files("pkcalc.scenarios") / name))


def cmd_demo(args: argparse.Namespace) -> int:
    from .schema import load_design_file

    out = Path(args.out or "pkcalc-demo")
    codes = [_predict_files(str(demo_path()), str(out / "predict"), False)]
    design_file = demo_path("demo-design.toml")
    sfile = load_design_file(design_file)
    codes.append(_design_run(sfile.scenarios, sfile.failures, sfile.title,
                             sfile.output.units(), [str(design_file)], False, out / "design"))
    return max(codes)


# --------------------------------------------------------------------------- parser
def _add(sub, name: str, func: Callable[[argparse.Namespace], int], help_: str):
    p = sub.add_parser(name, help=help_, description=help_, epilog=EXAMPLES.get(name),
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.set_defaults(func=func, command=name)
    return p


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="pkcalc",
        description="Intravenous infusion pharmacokinetics (one-compartment, linear). "
                    "Results are model estimates for research and review; dosing decisions "
                    "belong to licensed clinicians and pharmacists under local protocols.",
    )
    from . import __version__

    parser.add_argument("--version", action="version", version=f"pkcalc {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = _add(sub, "predict", cmd_predict,
             "Concentration course, plateau, time to plateau and steady state of scenarios.")
    p.add_argument("scenario", metavar="SCENARIO.toml", help="scenario file (DESIGN.md §5)")
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout")
    p.add_argument("--out", metavar="DIR", help="write CSV, JSON and PNG files to DIR")

    p = _add(sub, "design", cmd_design,
             "Design a regimen to a target, or adjust one from measured levels.")
    p.add_argument("scenario", nargs="?", metavar="SCENARIO.toml",
                   help="scenario file with [scenarios.design] tables")
    for name in _PARAM_OPTIONS:
        p.add_argument("--" + name.replace("_", "-"), metavar="Q", help=f"{name} with unit")
    p.add_argument("--plateau", metavar="Q", help="target plateau (continuous infusion)")
    p.add_argument("--window", nargs=2, metavar=("LOW", "HIGH"), help="acceptable plateau range")
    p.add_argument("--loading-time", metavar="Q", help="loading dose duration (default: bolus)")
    for name in ("peak", "trough"):
        p.add_argument(f"--{name}", metavar="Q", help=f"target steady-state {name}")
        p.add_argument(f"--{name}-min", metavar="Q", help=f"lowest acceptable {name}")
        p.add_argument(f"--{name}-max", metavar="Q", help=f"highest acceptable {name}")
    p.add_argument("--infusion-time", metavar="Q", help="duration of each intermittent dose")
    p.add_argument("--intervals", metavar="LIST",
                   help='practical intervals, e.g. "6 h,8 h,12 h,24 h" (default 6-48 h)')
    p.add_argument("--dose-step", metavar="Q", help="round doses to this step (default 10 mg)")
    p.add_argument("--rate-step", metavar="Q", help="round rates to this step (default 0.1 mg/h)")
    p.add_argument("--max-rate", metavar="Q", help="flag rates above this")
    p.add_argument("--max-dose", metavar="Q", help="flag doses above this")
    p.add_argument("--max-loading", metavar="Q", help="flag loading doses above this")
    p.add_argument("--max-loading-ratio", type=float, metavar="N",
                   help="flag loading doses above N maintenance doses (default 3)")
    p.add_argument("--salt-factor", type=float, metavar="S",
                   help="fraction of the product that is active drug (default 1)")
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout")
    p.add_argument("--out", metavar="DIR", help="write CSV, JSON and PNG files to DIR")

    p = _add(sub, "demo", cmd_demo, "Run the invented demo scenario end to end.")
    p.add_argument("--out", metavar="DIR", help="output folder (default: pkcalc-demo)")
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``pkcalc`` console script."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.func(args)
    except PkcalcInputError as exc:
        for problem in exc.problems:
            print(f"pkcalc {args.command}: error: {problem}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        return EXIT_OK


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
