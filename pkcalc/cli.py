"""``pkcalc`` command line: parses arguments, calls the library, prints, writes files.

Exit codes: 0 success; 1 some items failed (the rest are written) or a
verification check failed; 2 unusable input (one message per problem, naming
file, item and field; no traceback).
"""

from __future__ import annotations

import argparse
import os
import sys
import warnings
from collections.abc import Callable, Sequence
from pathlib import Path

from .cli_parser import DESIGN_OPTIONS, PARAM_OPTIONS, build_parser
from .errors import PkcalcInputError

EXIT_OK, EXIT_PARTIAL, EXIT_INPUT = 0, 1, 2

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
    imported = run.doc.get("import") or {}
    for domain, reasons in (imported.get("rows_skipped") or {}).items():
        for reason, e in reasons.items():
            if e.get("problem"):
                print(f"pkcalc {command}: warning: {domain.upper()}: {e['count']} row(s) left "
                      f"out: {reason} (e.g. {', '.join(e['first_rows'][:3])})",
                      file=sys.stderr)


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
        if getattr(args, "pdf", False):
            _print_pdf(Path(report_path), args)
    return run.code


def _print_pdf(html: Path, args: argparse.Namespace) -> None:
    from .report.pdf import print_pdf

    pdf = print_pdf(html, html.with_suffix(".pdf"))
    if not getattr(args, "json", False):
        _emit(f"printed the report to {pdf}")


# --------------------------------------------------------------------------- predict
def cmd_predict(args: argparse.Namespace) -> int:
    from .runner import run_predict

    return _finish(run_predict(args.scenario, colour=_colour()), args)


# --------------------------------------------------------------------------- design


def _design_from_options(args: argparse.Namespace):
    from pydantic import ValidationError

    from .errors import Problem
    from .schema import DesignCaseSpec, validation_problems

    raw: dict = {"name": "command line"}
    raw.update({k: getattr(args, k) for k in PARAM_OPTIONS if getattr(args, k) is not None})
    design = {k: getattr(args, k) for k in DESIGN_OPTIONS if getattr(args, k) is not None}
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

    quick = any(getattr(args, k) is not None for k in (*DESIGN_OPTIONS, *PARAM_OPTIONS,
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


# --------------------------------------------------------------------------- sampling
def cmd_sampling(args: argparse.Namespace) -> int:
    from .runner import run_sampling

    if args.simulate is not None and args.simulate < 0:
        raise PkcalcInputError("must be 0 or more replicates", field="--simulate")
    if args.seed is not None and not 0 <= args.seed < 2**32:
        raise PkcalcInputError("must be a whole number from 0 to 4294967295", field="--seed")
    if args.starts is not None and not 1 <= args.starts <= 1000:
        raise PkcalcInputError("must be from 1 to 1000", field="--starts")
    engine = _engine(args)
    if (engine.kind == "dask" or (engine.workers or 1) > 1) and not args.simulate:
        raise PkcalcInputError("the engine runs simulated replicates",
                               field="--engine" if engine.kind == "dask" else "--workers",
                               expected="--simulate N with it")
    progress = _progress_printer("sampling") if sys.stderr.isatty() and not args.quiet \
        else None
    run = run_sampling(args.scenario, simulate=args.simulate or 0, seed=args.seed or 1,
                       refit=args.refit, starts=args.starts or 12, engine=engine,
                       progress=progress, colour=_colour())
    if progress is not None:
        print("\r\033[K", end="", file=sys.stderr, flush=True)
    return _finish(run, args)


# --------------------------------------------------------------------------- attainment
def cmd_attainment(args: argparse.Namespace) -> int:
    from .runner import run_attainment

    if args.seed is not None and not 0 <= args.seed < 2**32:
        raise PkcalcInputError("must be a whole number from 0 to 4294967295", field="--seed")
    if args.patients is not None and not 1 <= args.patients <= 10_000_000:
        raise PkcalcInputError("must be 1 to 10,000,000", field="--patients")
    progress = _progress_printer("attainment") if sys.stderr.isatty() and not args.quiet \
        else None
    run = run_attainment(args.scenario, patients=args.patients, seed=args.seed,
                         engine=_engine(args), progress=progress, colour=_colour())
    if progress is not None:
        print("\r\033[K", end="", file=sys.stderr, flush=True)
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
def _nca_overrides(args: argparse.Namespace) -> dict:
    """The NCA options given on the command line (the boundary merges them)."""
    points = {}
    for item in args.terminal or []:
        sid, sep, times = item.partition("=")
        if not sep:
            raise PkcalcInputError(f"'{item}' is not SUBJECT=TIME,TIME,...", field="--terminal",
                                   expected='e.g. --terminal "3=8 h,12 h,24 h"')
        points[sid.strip()] = [t.strip() for t in times.split(",")]
    return {"auc_method": args.auc_method, "blq": args.blq,
            "terminal_points": points or None, "interval": args.interval,
            "slope_tolerance": args.slope_tolerance,
            "interval_tolerance": args.interval_tolerance,
            "duration_tolerance": args.duration_tolerance}


def _import_args(args: argparse.Namespace) -> dict:
    """The study-import choices of the command line (None where not given)."""
    return {"specimen": args.specimen, "treatment": args.treatment, "times": args.times,
            "infusion_duration": args.infusion_duration, "pre_dose": args.pre_dose,
            "strict": args.strict}


def cmd_fit(args: argparse.Namespace) -> int:
    from .runner import load_study_input, run_fit
    from .schema import study_fit_options
    from .schema.options import CLI_NAMES

    study = load_study_input(args.study, args.levels, args.doses, args.subjects,
                             args.sdtm, args.analyte, **_import_args(args))
    options = study_fit_options(study, {
        "weighting": args.weighting, "error_model": args.error_model, "blq": args.blq,
        "ci": args.ci, "prior": args.prior, "starts": args.starts,
        "with_nca": True if args.with_nca else None, "nca_threshold": args.nca_threshold,
        "adequacy": False if args.no_adequacy else None}, labels=CLI_NAMES)
    return _finish(run_fit(study, options, colour=_colour()), args)


def cmd_population(args: argparse.Namespace) -> int:
    from .runner import load_study_input, run_population
    from .schema import study_population_options
    from .schema.options import CLI_NAMES

    study = load_study_input(args.study, args.levels, args.doses, args.subjects,
                             args.sdtm, args.analyte, **_import_args(args))
    options = study_population_options(study, {
        "method": args.method, "error_model": args.error_model, "blq": args.blq,
        "covariate": args.covariate, "reference_weight": args.reference_weight,
        "bootstrap": args.bootstrap, "seed": args.seed,
        "vpc_replicates": args.vpc_replicates,
        "adequacy": False if args.no_adequacy else None, "nodes": args.nodes,
        "between_subject": args.between_subject, "effects": args.effect,
        "models": _models_arg(args.model), "stepwise": _stepwise_arg(args)},
        labels=CLI_NAMES)
    progress = _progress_printer("population") if sys.stderr.isatty() and not args.quiet \
        else None
    engine = _engine(args)
    # a Dask engine holds the subjects of a marginal estimate on its workers; local worker
    # processes run bootstrap replicates only
    needs_bootstrap = (engine.kind == "dask" and options.method != "marginal") or \
        (engine.kind == "local" and (engine.workers or 1) > 1)
    if needs_bootstrap and not options.bootstrap:
        raise PkcalcInputError(
            "the engine runs bootstrap replicates" + (
                " (and the subjects of the marginal method)" if engine.kind == "dask" else ""),
            field="--engine" if engine.kind == "dask" else "--workers",
            expected="--bootstrap N with it" + (
                ", or the marginal method" if engine.kind == "dask" else ""))
    run = run_population(study, options, colour=_colour(), progress=progress, engine=engine)
    if progress is not None:
        print("\r\033[K", end="", file=sys.stderr, flush=True)
    return _finish(run, args)


def _models_arg(items: list[str] | None) -> dict | None:
    """``--model "NAME: effect; effect"`` (repeatable) as the study file's models table."""
    if not items:
        return None
    out: dict[str, list[str]] = {}
    for item in items:
        name, sep, effects = item.partition(":")
        if not sep or not name.strip():
            raise PkcalcInputError(f"'{item}' is not NAME: EFFECTS", field="--model",
                                   expected='e.g. --model "base:" --model "weight: weight on '
                                            'clearance; sex on volume"')
        if name.strip() in out:
            raise PkcalcInputError(f"the model name '{name.strip()}' is given twice",
                                   field="--model", expected="a different name for each model")
        out[name.strip()] = [e.strip() for e in effects.split(";") if e.strip()]
    return out


def _stepwise_arg(args: argparse.Namespace) -> dict | None:
    if not args.stepwise:
        if args.add_if_p_below is not None or args.remove_if_p_above is not None:
            raise PkcalcInputError("--add-if-p-below and --remove-if-p-above need "
                                   "--stepwise candidates", field="--stepwise")
        return None
    step: dict = {"candidates": list(args.stepwise)}
    if args.add_if_p_below is not None:
        step["add_if_p_below"] = args.add_if_p_below
    if args.remove_if_p_above is not None:
        step["remove_if_p_above"] = args.remove_if_p_above
    return step


def _progress_printer(command: str):
    """Progress lines on stderr, overwriting one line (a terminal only)."""
    def show(text: str) -> None:
        print(f"\rpkcalc {command}: {text}\033[K", end="", file=sys.stderr, flush=True)
    return show


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


def _engine(args: argparse.Namespace):
    """The --engine, --workers, --scheduler and --timeout options as an Engine."""
    from .engines import Engine

    if args.scheduler and args.engine != "dask":
        raise PkcalcInputError("a scheduler is only used by the dask engine",
                               field="--scheduler", expected="--engine dask --scheduler ADDR")
    try:
        return Engine(args.engine, workers=args.workers, scheduler=args.scheduler,
                      timeout=args.timeout if args.timeout is not None else 20.0)
    except ValueError as exc:
        name, _, message = str(exc).partition(": ")
        raise PkcalcInputError(message, field="--" + name) from None


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
    run = run_batch_command(args.input, args.out, options, engine=_engine(args),
                            chunk_rows=args.chunk_rows, partitioned=args.partitioned,
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
    from .schema.options import CLI_NAMES

    study = load_study_input(args.study, args.levels, args.doses, args.subjects,
                             args.sdtm, args.analyte, **_import_args(args))
    options = study_nca_options(study, _nca_overrides(args), labels=CLI_NAMES)
    return _finish(run_nca(study, options, colour=_colour(), pp=args.pp), args)


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
        run_sampling,
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
    runs.append(run_sampling(example_file("demo-sampling.toml"), colour=_colour()))
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
    from . import report

    report.write_caution_file(out, [path])       # the top folder too (W7)
    _emit(f"wrote the demo outputs to {out}/ and the report to {path}")
    if getattr(args, "pdf", False):
        _print_pdf(Path(path), args)
    return max(run.code for run in runs)


COMMANDS: dict[str, Callable[[argparse.Namespace], int]] = {
    "predict": cmd_predict, "design": cmd_design, "fit": cmd_fit,
    "sampling": cmd_sampling, "attainment": cmd_attainment,
    "population": cmd_population, "batch": cmd_batch, "nca": cmd_nca,
    "verify": cmd_verify, "demo": cmd_demo,
}

_INPUT_ARGS = ("scenario", "study", "levels", "doses", "subjects", "cases", "input", "prior",
               "sdtm")


def _inputs(args: argparse.Namespace) -> list:
    """Every input of the command: the paths given, and the files a TOML input names
    (a study's tables, for instance) -- none may be an output."""
    from .schema.base import referenced_files

    given = [getattr(args, k, None) for k in _INPUT_ARGS]
    more = [f for g in given if g and str(g).lower().endswith(".toml")
            for f in referenced_files(g)]
    return [*given, *more]


#: The files each command writes into its --out folder (patterns), checked against the
#: inputs before any work.
WRITES = {
    "predict": ("summary.csv", "predict.json", "*/profile.csv", "*/profile.png"),
    "design": ("design.json", "regimens.csv", "design-*.png"),
    "sampling": ("sampling.json", "sampling-times.csv", "sampling-*.png"),
    "attainment": ("attainment.json", "attainment.csv", "attainment.png"),
    "verify": ("verify.json", "verify.csv"),
    "nca": ("nca.json", "nca.csv", "nca-intervals.csv", "nca-*.png", "analysis-*.csv"),
    "fit": ("fit.json", "fit.csv", "fit-levels.csv", "fit-*.png", "diagnostics.png",
            "analysis-*.csv"),
    "population": ("population.json", "population-subjects.csv",
                   "population-iterations.csv", "diagnostics.png", "vpc.png",
                   "adequacy-*.png", "analysis-*.csv"),
}


def _outputs(args: argparse.Namespace):
    """The output paths the command was given (see :func:`pkcalc.files.check_outputs`)."""
    from .files import Output

    outs = []
    out = getattr(args, "out", None)
    if out is None and args.command == "demo":
        out = "pkcalc-demo"
    if out is not None:
        kind = "file" if args.command == "batch" and not args.partitioned else "folder"
        outs.append(Output(Path(out), kind, "--out", owns_names=args.command != "batch",
                           writes=WRITES.get(args.command, ())))
        if args.command == "batch":
            kind = "file"  # the table's format is its suffix, folder or not
        if kind == "file" and not Path(out).is_dir() and \
                Path(out).suffix.lower() not in (".csv", ".parquet", ".pq"):
            raise PkcalcInputError(f"unknown table format '{Path(out).suffix}'", file=str(out),
                                   field="--out", expected="a .csv or .parquet file name")
        if kind == "file" and Path(out).name in ("CAUTION.txt", "INCOMPLETE.txt") \
                and not getattr(args, "plots", None):
            raise PkcalcInputError("pkcalc writes its CAUTION.txt beside the output table: "
                                   "choose another name", file=str(out), field="--out",
                                   expected="a .csv or .parquet file name")
    for option, kind in (("report", "file"), ("junit", "file"), ("plots", "folder"),
                         ("pp", "folder")):
        value = getattr(args, option, None)
        if value is not None:
            outs.append(Output(Path(value), kind, "--" + option))
    if getattr(args, "pdf", False):
        from .report.pdf import need_browser

        report = getattr(args, "report", None)
        if report is None and args.command != "demo":
            raise PkcalcInputError("--pdf prints the HTML report: give --report FILE.html",
                                   field="--pdf")
        need_browser()          # refused before any work when there is none
        if report is not None:
            outs.append(Output(Path(report).with_suffix(".pdf"), "file", "--pdf"))
    return outs


def _os_problem(exc: OSError) -> str:
    """A system refusal in the user's words: the file and what the system said."""
    import errno

    name = exc.filename if exc.filename is not None else ""
    name = str(name) if len(str(name)) <= 120 else str(name)[:60] + "..." + str(name)[-40:]
    why = {errno.ENAMETOOLONG: "the path or a name in it is too long for the file system",
           errno.ELOOP: "symbolic links that point at each other (a loop)",
           errno.EACCES: "permission denied", errno.EPERM: "permission denied",
           errno.ENOSPC: "no space left on the device (nothing was kept of this output)",
           errno.EROFS: "the file system is read-only", errno.EISDIR: "is a folder",
           errno.ENOTDIR: "a part of the path is a file, not a folder"}.get(
               exc.errno, exc.strerror or str(exc))
    return f"{name}: {why}" if name else why


def _interrupted(signum, _frame):
    """SIGTERM ends the run like Ctrl-C: temporary files are removed on the way out."""
    raise KeyboardInterrupt


def _former_note(message, category, filename, lineno, file=None, line=None) -> None:
    """A former name given as input: one note on stderr (other warnings as usual)."""
    from . import glossary

    if issubclass(category, glossary.FormerName):
        print(f"pkcalc: note: {message}", file=sys.stderr)
    else:
        sys.stderr.write(warnings.formatwarning(message, category, filename, lineno, line))


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``pkcalc`` console script."""
    import signal

    from . import glossary
    from .files import check_outputs

    parser = build_parser()
    with warnings.catch_warnings():
        warnings.simplefilter("always", glossary.FormerName)
        warnings.showwarning = _former_note
        args = parser.parse_args(argv)
    args.func = COMMANDS[args.command]
    args.argv = list(sys.argv[1:] if argv is None else argv)
    previous = None
    if argv is None:  # the console script: a SIGTERM cleans up like Ctrl-C
        previous = signal.signal(signal.SIGTERM, _interrupted)
    try:
        with warnings.catch_warnings():
            # results are checked for finite values where they are made; numerical
            # warnings from the libraries are not messages for the user
            warnings.simplefilter("ignore", RuntimeWarning)
            warnings.simplefilter("always", glossary.FormerName)
            warnings.showwarning = _former_note
            check_outputs(_outputs(args), _inputs(args))
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
    except OSError as exc:  # the system refused a file: unreadable, too long, a loop, full
        print(f"pkcalc {args.command}: error: {_os_problem(exc)}", file=sys.stderr)
        return EXIT_INPUT
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
