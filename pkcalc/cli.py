"""``pkcalc`` command line: parses arguments, calls the library, prints, writes files.

Exit codes: 0 success; 1 some items failed (the rest are written) or a
verification check failed; 2 unusable input (one message per problem, naming
file, item and field; no traceback).
"""

from __future__ import annotations

import argparse
import os
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
    "verify": """examples:
  pkcalc verify scenarios/reference-cases.toml
  pkcalc verify my-cases.toml --junit verify.xml
  pkcalc verify my-cases.toml --json > verify.json

exit code 0 when every check passes, 1 when any check fails, 2 when the file
(or a case in it) cannot be used.""",
    "fit": """examples:
  pkcalc fit scenarios/demo-study.toml
  pkcalc fit scenarios/demo-study.toml --with-nca --out fit-results/
  pkcalc fit --levels levels.csv --doses doses.csv --weighting inverse_predicted_squared \\
             --blq drop
  pkcalc fit --levels levels.csv --doses doses.csv --error-model combined --ci profile
  pkcalc fit --levels levels.csv --doses doses.csv --prior prior.toml     (MAP)

Defaults: proportional error model by maximum likelihood, BLQ levels by the
censored likelihood (Beal's M3), Wald intervals on the log scale, 3 starts.""",
    "population": """examples:
  pkcalc population scenarios/demo-sparse.toml
  pkcalc population scenarios/demo-sparse.toml --covariate estimated --bootstrap 200
  pkcalc population --levels L.csv --doses D.csv --subjects S.csv --method two-stage
  pkcalc population scenarios/demo-sparse.toml --covariate per_kg --out pop-results/

Iterative two-stage by default (Prevost 1977; Steimer et al. 1984): MAP
estimates of every subject under the current population prior, then an update
of the typical values, the between-subject covariance and the residual error,
until they settle.""",
    "batch": """examples:
  pkcalc batch scenarios/demo-grid.toml --out grid-results.csv --at 24h,48h
  pkcalc batch scenarios/demo-batch.csv --out results.parquet
  pkcalc batch scenarios/demo-batch.csv --out pop.csv --population 10000 --seed 1 \\
               --cv-clearance 30% --cv-volume 20%
  pkcalc batch big.csv --out big-results.csv --engine dask
  pkcalc batch big.parquet --out big-results.parquet --engine dask \\
               --scheduler tcp://10.0.0.5:8786

The input table has one row per scenario and units in the headers (any two of
clearance, volume, half_life, elimination_rate, time_constant; rate or dose;
optional duration, interval, loading_dose, target, window_low, window_high,
weight).  Input columns are carried through; a row with a problem gets its
reason in the 'error' column and empty results.  --out is the output table;
--plots DIR writes the distribution plots and CAUTION.txt.""",
    "nca": """examples:
  pkcalc nca scenarios/demo-study.toml
  pkcalc nca --levels levels.csv --doses doses.csv --auc-method linear --out nca-results/
  pkcalc nca scenarios/demo-study.toml --terminal "3=8 h,12 h,24 h"

Times in the results are hours after the start of the reference dose (the
single dose, or the last of regular repeated doses).""",
    "demo": """examples:
  pkcalc demo --out demo-output""",
}


# --------------------------------------------------------------------------- helpers
def _colour() -> bool:
    return sys.stdout.isatty() and "NO_COLOR" not in os.environ


def _emit(text: str) -> None:
    sys.stdout.write(text if text.endswith("\n") else text + "\n")


def _problems_to_stderr(run, command: str) -> None:
    """Items that failed (exit 1, or 2 for unusable verify cases) are also named on
    stderr, where problems belong; the rest of the run is on stdout."""
    from .errors import Problem

    for failure in (run.doc.get("failures") or []) + (run.doc.get("errors") or []):
        for p in failure.get("problems", []):
            print(f"pkcalc {command}: error: {Problem(**p)}", file=sys.stderr)


def _finish(run, args: argparse.Namespace) -> int:
    """Print the run (JSON or text), write --out files and --report, return its exit code."""
    from .runner import write_outputs, write_report

    _problems_to_stderr(run, args.command)
    out = getattr(args, "out", None)
    report_path = getattr(args, "report", None)
    if getattr(args, "json", False):
        _emit(__import__("pkcalc.report", fromlist=["dumps"]).dumps(run.doc))
    else:
        _emit(run.text)
    if out:
        written = write_outputs(run, out)
        if not getattr(args, "json", False):
            _emit(f"wrote {len(written)} files to {out}")
    if report_path:
        write_report([run], report_path, options=" ".join(args.argv))
        if not getattr(args, "json", False):
            _emit(f"wrote the report to {report_path}")
    return run.code


# --------------------------------------------------------------------------- predict
def cmd_predict(args: argparse.Namespace) -> int:
    from .runner import run_predict

    return _finish(run_predict(args.scenario, colour=_colour()), args)


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
    if args.auc_24 and len(args.auc_24) > 2:
        raise PkcalcInputError(f"--auc-24 takes a value or LOW HIGH, got {len(args.auc_24)} "
                               "values", item="command line", field="--auc-24",
                               expected='"500 mg*h/L" or "400 mg*h/L" "600 mg*h/L"')
    if args.auc_24:
        design["auc_24"] = list(args.auc_24) if len(args.auc_24) == 2 else args.auc_24[0]
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
    from .runner import run_design
    from .schema import load_design_file

    quick = any(getattr(args, k) is not None for k in (*_DESIGN_OPTIONS, *_PARAM_OPTIONS,
                                                        "window", "intervals", "auc_24"))
    if args.scenario and quick:
        raise PkcalcInputError("give a scenario file or command-line parameters, not both",
                               expected="pkcalc design FILE.toml, or pkcalc design --clearance "
                                        "... --half-life ... --plateau ...")
    if args.scenario:
        sfile = load_design_file(args.scenario)
        run = run_design(sfile.scenarios, failures=sfile.failures, title=sfile.title,
                         units=sfile.output.units(), inputs=[args.scenario], colour=_colour())
    elif quick:
        run = run_design([_design_from_options(args)], colour=_colour())
    else:
        raise PkcalcInputError("nothing to design", expected="a scenario file, or "
                               "--clearance/--half-life with --plateau or --peak/--trough")
    return _finish(run, args)


# --------------------------------------------------------------------------- verify
def cmd_verify(args: argparse.Namespace) -> int:
    from . import report
    from .runner import check_not_input, run_verify
    from .verify import junit_xml

    run, result = run_verify(args.cases, colour=_colour())
    if args.junit:
        check_not_input([Path(args.junit)], [args.cases])
        report.write_atomic(args.junit, junit_xml(result))
    return _finish(run, args)


# --------------------------------------------------------------------------- nca
def _study_args(p: argparse.ArgumentParser) -> None:
    p.add_argument("study", nargs="?", metavar="STUDY.toml", help="study file naming the tables")
    p.add_argument("--levels", metavar="L.csv", help="levels table")
    p.add_argument("--doses", metavar="D.csv", help="doses table")
    p.add_argument("--subjects", metavar="S.csv", help="subjects table (weights, covariates)")


def _nca_overrides(args: argparse.Namespace) -> dict:
    """The NCA options given on the command line (the boundary merges them)."""
    points = {}
    for item in args.terminal or []:
        sid, sep, times = item.partition("=")
        if not sep:
            raise PkcalcInputError(f"'{item}' is not SUBJECT=TIME,TIME,...", field="--terminal",
                                   expected='e.g. --terminal "3=8 h,12 h,24 h"')
        points[sid.strip()] = [t.strip() for t in times.split(",")]
    return {"auc_method": args.auc_method, "blq": args.blq_rule,
            "terminal_points": points or None}


def cmd_fit(args: argparse.Namespace) -> int:
    from .runner import load_study_input, run_fit
    from .schema import study_fit_options

    study = load_study_input(args.study, args.levels, args.doses, args.subjects)
    options = study_fit_options(study, {
        "weighting": args.weighting, "error_model": args.error_model, "blq": args.blq,
        "ci": args.ci, "prior": args.prior, "starts": args.starts,
        "with_nca": True if args.with_nca else None, "nca_threshold": args.nca_threshold})
    return _finish(run_fit(study, options, colour=_colour()), args)


def cmd_population(args: argparse.Namespace) -> int:
    from .runner import load_study_input, run_population
    from .schema import study_population_options

    study = load_study_input(args.study, args.levels, args.doses, args.subjects)
    options = study_population_options(study, {
        "method": args.method, "error_model": args.error_model, "blq": args.blq,
        "covariate": args.covariate, "reference_weight": args.reference_weight,
        "bootstrap": args.bootstrap, "seed": args.seed,
        "vpc_replicates": args.vpc_replicates})
    return _finish(run_population(study, options, colour=_colour()), args)


def _percent(text: str | None, option: str) -> float:
    if text is None:
        return 0.0
    value = text.strip()
    try:
        number = float(value.rstrip("%").strip())
    except ValueError:
        raise PkcalcInputError(f"'{text}' is not a percentage", field=option,
                               expected="e.g. 30%") from None
    if not 0 <= number <= 1000:
        raise PkcalcInputError(f"'{text}' is out of range", field=option,
                               expected="0% to 1000%")
    return number / 100.0


def cmd_batch(args: argparse.Namespace) -> int:
    from .batch import BatchOptions
    from .runner import run_batch_command, write_outputs, write_report
    from .units import to_canonical

    at = tuple(to_canonical(x.strip(), "time", field="--at")
               for x in (args.at or "").split(",") if x.strip())
    from .batch import MAX_CHUNK_ROWS, MAX_POPULATION

    if args.population is not None and not 1 <= args.population <= MAX_POPULATION:
        raise PkcalcInputError(f"must be from 1 to {MAX_POPULATION:,} virtual subjects per row",
                               field="--population", expected="e.g. 10000")
    if args.chunk_rows is not None and not 1 <= args.chunk_rows <= MAX_CHUNK_ROWS:
        raise PkcalcInputError(f"must be from 1 to {MAX_CHUNK_ROWS:,} rows",
                               field="--chunk-rows", expected="e.g. 200000 (the default)")
    if args.seed is not None and not 0 <= args.seed < 2**32:
        raise PkcalcInputError("must be a whole number from 0 to 4294967295", field="--seed")
    if args.correlation is not None and not -1 < args.correlation < 1:
        raise PkcalcInputError("must be in (-1, 1)", field="--correlation")
    options = BatchOptions(at=at, population=args.population or 0, seed=args.seed or 1,
                           cv_clearance=_percent(args.cv_clearance, "--cv-clearance"),
                           cv_volume=_percent(args.cv_volume, "--cv-volume"),
                           correlation=args.correlation or 0.0)
    progress = sys.stderr.isatty() and not args.quiet
    run = run_batch_command(args.input, args.out, options, engine=args.engine,
                            scheduler=args.scheduler, chunk_rows=args.chunk_rows,
                            progress=progress, colour=_colour())
    if args.json:
        from . import report

        _emit(report.dumps(run.doc))
    else:
        _emit(run.text)
    errors = run.doc.get("first_errors") or []
    for e in errors:
        print(f"pkcalc batch: error: {args.input}: {e}", file=sys.stderr)
    more = (run.doc.get("failed") or 0) - len(errors)
    if more > 0:
        print(f"pkcalc batch: error: {args.input}: and {more:,} more rows with problems "
              f"(each has its reason in the 'error' column of {args.out})", file=sys.stderr)
    report_dir = Path(args.plots) if args.plots else Path(args.out).parent
    if args.plots:
        write_outputs(run, report_dir)
    else:
        from . import report

        report.write_caution_file(report_dir)
    if args.report:
        write_report([run], args.report, options=" ".join(args.argv))
    return run.code


def cmd_nca(args: argparse.Namespace) -> int:
    from .runner import load_study_input, run_nca
    from .schema import study_nca_options

    study = load_study_input(args.study, args.levels, args.doses, args.subjects)
    options = study_nca_options(study, _nca_overrides(args))
    return _finish(run_nca(study, options, colour=_colour()), args)


def cmd_demo(args: argparse.Namespace) -> int:
    """Predict, design, NCA, fit, population, verify and a batch on the shipped invented
    examples; one HTML report."""
    from .files import unfinished

    out = Path(args.out or "pkcalc-demo")
    with unfinished(out):
        return _demo(out, args)


def _demo(out: Path, args: argparse.Namespace) -> int:
    from .batch import BatchOptions
    from .examples import example_file
    from .runner import (
        run_batch_command,
        run_design,
        run_fit,
        run_nca,
        run_population,
        run_predict,
        run_verify,
        write_outputs,
        write_report,
    )
    from .schema import (
        load_design_file,
        load_study_file,
        study_fit_options,
        study_population_options,
    )

    runs = [run_predict(example_file("demo.toml"), colour=_colour())]
    design_file = example_file("demo-design.toml")
    sfile = load_design_file(design_file)
    runs.append(run_design(sfile.scenarios, failures=sfile.failures, title=sfile.title,
                           units=sfile.output.units(), inputs=[str(design_file)],
                           colour=_colour()))
    study = load_study_file(example_file("demo-study.toml"))
    runs.append(run_nca(study, colour=_colour()))
    runs.append(run_fit(study, study_fit_options(study, {"with_nca": True}), colour=_colour()))
    sparse = load_study_file(example_file("demo-sparse.toml"))
    runs.append(run_population(sparse, study_population_options(sparse, {"vpc_replicates": 100}),
                               colour=_colour()))
    runs.append(run_verify(example_file("reference-cases.toml"), colour=_colour())[0])
    (out / "batch").mkdir(parents=True, exist_ok=True)
    runs.append(run_batch_command(str(example_file("demo-grid.toml")),
                                  str(out / "batch" / "grid-results.csv"),
                                  BatchOptions(at=(24.0, 48.0), population=1000, seed=1,
                                               cv_clearance=0.3, cv_volume=0.2),
                                  colour=_colour()))
    for run in runs:
        _emit(run.text)
        write_outputs(run, out / run.command)
    path = write_report(runs, out / "report.html", title="pkcalc demo (invented data)",
                        options=" ".join(args.argv))
    _emit(f"wrote the demo outputs to {out}/ and the report to {path}")
    return max(run.code for run in runs)


# --------------------------------------------------------------------------- parser
def _add(sub, name: str, func: Callable[[argparse.Namespace], int], help_: str):
    p = sub.add_parser(name, help=help_, description=help_, epilog=EXAMPLES.get(name),
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.set_defaults(func=func, command=name)
    return p


def _output_args(p: argparse.ArgumentParser, out_help: str) -> None:
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout")
    p.add_argument("--out", metavar="DIR", help=out_help)
    p.add_argument("--report", metavar="FILE.html", help="write a self-contained HTML report")


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
    p.add_argument("scenario", metavar="SCENARIO.toml", help="scenario file (docs/formats.md)")
    _output_args(p, "write CSV, JSON and PNG files to DIR")

    p = _add(sub, "design", cmd_design,
             "Design a regimen to a target, or adjust one from measured levels.")
    p.add_argument("scenario", nargs="?", metavar="SCENARIO.toml",
                   help="scenario file with [scenarios.design] tables")
    for name in _PARAM_OPTIONS:
        p.add_argument("--" + name.replace("_", "-"), metavar="Q", help=f"{name} with unit")
    p.add_argument("--plateau", metavar="Q", help="target plateau (continuous infusion)")
    p.add_argument("--window", nargs=2, metavar=("LOW", "HIGH"), help="acceptable plateau range")
    p.add_argument("--loading-time", metavar="Q", help="loading dose duration (default: bolus)")
    p.add_argument("--auc-24", nargs="+", metavar="Q",
                   help='steady-state AUC over 24 h: a value or LOW HIGH, e.g. "400 mg*h/L" '
                        '"600 mg*h/L" (alone or with peak/trough limits)')
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
    _output_args(p, "write CSV, JSON and PNG files to DIR")

    p = _add(sub, "fit", cmd_fit,
             "Estimate clearance, volume and half-life per subject from sampled levels.")
    _study_args(p)
    group = p.add_mutually_exclusive_group()
    group.add_argument("--weighting", choices=["uniform", "inverse_observed",
                                               "inverse_observed_squared",
                                               "inverse_predicted_squared"],
                       help="least squares with fixed weights")
    group.add_argument("--error-model", choices=["additive", "proportional", "combined"],
                       help="maximum likelihood with this residual error (default proportional)")
    p.add_argument("--blq", choices=["drop", "likelihood", "half_lloq"],
                   help="levels below LLOQ: drop (M1), likelihood (M3, default), half_lloq")
    p.add_argument("--prior", metavar="PRIOR.toml", help="MAP estimation with this prior")
    p.add_argument("--ci", choices=["wald", "profile"], help="interval method (default wald)")
    p.add_argument("--starts", type=int, metavar="N", help="number of starts (default 3)")
    p.add_argument("--with-nca", action="store_true",
                   help="show the fit beside non-compartmental results")
    p.add_argument("--nca-threshold", type=float, metavar="PERCENT",
                   help="flag fit/NCA differences beyond this (default 20)")
    _output_args(p, "write fit.csv, fit.json and plots to DIR")

    p = _add(sub, "population", cmd_population,
             "Typical values, between-subject variability and residual error from a study.")
    _study_args(p)
    p.add_argument("--method", choices=["two-stage", "iterative"],
                   help="standard two-stage (rich data) or iterative two-stage (default)")
    p.add_argument("--error-model", choices=["additive", "proportional", "combined"],
                   help="residual error (default proportional)")
    p.add_argument("--blq", choices=["likelihood", "drop", "half_lloq"],
                   help="levels below LLOQ (default likelihood, Beal's M3)")
    p.add_argument("--covariate", choices=["none", "allometric", "estimated", "per_kg"],
                   help="body-weight model (default none)")
    p.add_argument("--reference-weight", metavar="Q", help="reference weight (default 70 kg)")
    p.add_argument("--bootstrap", type=int, metavar="N",
                   help="bootstrap replicates over subjects for SEs (default 0)")
    p.add_argument("--seed", type=int, metavar="S", help="seed for bootstrap and VPC (default 1)")
    p.add_argument("--vpc-replicates", type=int, metavar="N",
                   help="simulated replicates for the visual predictive check (default 200)")
    _output_args(p, "write CSV, JSON and plots to DIR")

    p = _add(sub, "batch", cmd_batch,
             "Scenario tables at scale: plateau, time to plateau, steady state, variability.")
    p.add_argument("input", metavar="INPUT", help="CSV, Parquet, or TOML ([grid] or "
                                                  "[[scenarios]])")
    p.add_argument("--out", metavar="OUTPUT", required=True,
                   help="output table (.csv or .parquet), written atomically")
    p.add_argument("--engine", choices=["local", "dask"], default="local",
                   help="local numpy (default) or dask.dataframe partitions")
    p.add_argument("--scheduler", metavar="ADDR",
                   help="existing Dask scheduler, e.g. tcp://10.0.0.5:8786 (default: a local "
                        "cluster)")
    p.add_argument("--at", metavar="TIMES", help="concentration at these times, e.g. 24h,48h")
    p.add_argument("--population", type=int, metavar="N",
                   help="virtual subjects per row (percentiles, fraction inside the window)")
    p.add_argument("--seed", type=int, metavar="S", help="seed of the virtual population")
    p.add_argument("--cv-clearance", metavar="P", help="between-subject CV of clearance, e.g. 30%%")
    p.add_argument("--cv-volume", metavar="P", help="between-subject CV of volume, e.g. 20%%")
    p.add_argument("--correlation", type=float, metavar="R",
                   help="correlation of ln CL and ln V (default 0)")
    p.add_argument("--chunk-rows", type=int, metavar="N",
                   help="rows per chunk (default 200000; memory stays bounded by it)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--plots", metavar="DIR", help="write distribution plots and CAUTION.txt")
    p.add_argument("--json", action="store_true", help="print the run summary as JSON")
    p.add_argument("--report", metavar="FILE.html", help="write a self-contained HTML report")

    p = _add(sub, "nca", cmd_nca,
             "Non-compartmental analysis per subject (AUC, terminal slope, CL, volumes, MRT).")
    _study_args(p)
    p.add_argument("--auc-method", choices=["linear-up-log-down", "linear"],
                   help="trapezoid rule (default linear-up-log-down)")
    p.add_argument("--blq-rule", choices=["leading_zero", "zero", "drop"],
                   help="BLQ levels: leading_zero (default: before the first measurable level "
                        "as 0, later ones left out), zero, drop")
    p.add_argument("--terminal", action="append", metavar="SUBJECT=T1,T2,...",
                   help="choose a subject's terminal points by hand (repeatable)")
    _output_args(p, "write nca.csv, nca.json and plots to DIR")

    p = _add(sub, "verify", cmd_verify,
             "Recompute worked examples and report PASS/FAIL per expected value.")
    p.add_argument("cases", metavar="CASES.toml", help="cases file (docs/formats.md)")
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout")
    p.add_argument("--junit", metavar="FILE.xml", help="also write JUnit XML for CI systems")
    p.add_argument("--out", metavar="DIR", help="write verify.csv, verify.json to DIR")
    p.add_argument("--report", metavar="FILE.html", help="write a self-contained HTML report")

    p = _add(sub, "demo", cmd_demo, "Run the invented demo scenario end to end.")
    p.add_argument("--out", metavar="DIR", help="output folder (default: pkcalc-demo)")
    return parser


_INPUT_ARGS = ("scenario", "study", "levels", "doses", "subjects", "cases", "input", "prior")


def _outputs(args: argparse.Namespace):
    """The output paths the command was given (see :func:`pkcalc.files.check_outputs`)."""
    from .files import Output

    outs = []
    out = getattr(args, "out", None)
    if out is None and args.command == "demo":
        out = "pkcalc-demo"
    if out is not None:
        kind = "file" if args.command == "batch" else "folder"
        outs.append(Output(Path(out), kind, "--out"))
        if kind == "file" and not Path(out).is_dir() and \
                Path(out).suffix.lower() not in (".csv", ".txt", ".parquet", ".pq"):
            raise PkcalcInputError(f"unknown table format '{Path(out).suffix}'", file=str(out),
                                   field="--out", expected="a .csv or .parquet file name")
        if kind == "file" and Path(out).name in ("CAUTION.txt", "INCOMPLETE.txt") \
                and not getattr(args, "plots", None):
            raise PkcalcInputError("pkcalc writes its CAUTION.txt beside the output table: "
                                   "choose another name", file=str(out), field="--out",
                                   expected="a .csv or .parquet file name")
    for option, kind in (("report", "file"), ("junit", "file"), ("plots", "folder")):
        value = getattr(args, option, None)
        if value is not None:
            outs.append(Output(Path(value), kind, "--" + option))
    return outs


def _interrupted(signum, _frame):
    """SIGTERM ends the run like Ctrl-C: temporary files are removed on the way out."""
    raise KeyboardInterrupt


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``pkcalc`` console script."""
    import signal
    import warnings

    from .files import check_outputs

    parser = build_parser()
    args = parser.parse_args(argv)
    args.argv = list(sys.argv[1:] if argv is None else argv)
    previous = None
    if argv is None:  # the console script: a SIGTERM cleans up like Ctrl-C
        previous = signal.signal(signal.SIGTERM, _interrupted)
    try:
        with warnings.catch_warnings():
            # results are checked for finite values where they are made; numerical
            # warnings from the libraries are not messages for the user
            warnings.simplefilter("ignore", RuntimeWarning)
            check_outputs(_outputs(args), [getattr(args, k, None) for k in _INPUT_ARGS])
            return args.func(args)
    except PkcalcInputError as exc:
        for problem in exc.problems:
            print(f"pkcalc {args.command}: error: {problem}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt:
        print(f"pkcalc {args.command}: interrupted; files being written were removed",
              file=sys.stderr)
        return 130
    except BrokenPipeError:
        return EXIT_OK
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
