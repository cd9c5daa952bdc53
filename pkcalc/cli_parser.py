"""The ``pkcalc`` argument parser: commands, options, help texts and examples.

Parsing only; :mod:`pkcalc.cli` runs the commands.
"""

from __future__ import annotations

import argparse

from . import glossary

__all__ = ["DESIGN_OPTIONS", "EXAMPLES", "PARAM_OPTIONS", "build_parser"]

DESIGN_OPTIONS = ("plateau", "loading_time", "peak", "trough", "peak_min", "peak_max",
                   "trough_min", "trough_max", "infusion_time", "dose_step", "rate_step",
                   "max_rate", "max_dose", "max_loading", "salt_factor", "max_loading_ratio")
PARAM_OPTIONS = ("clearance", "volume", "half_life", "elimination_rate", "time_constant",
                  "weight")

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
(proportional, chiou, sawchuk_zaske, map) that start from the patient's
current level; see scenarios/demo-design.toml.""",
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
  pkcalc population scenarios/demo-sparse.toml --effect "weight on clearance and volume"
  pkcalc population scenarios/demo-sparse.toml --model "base:" \\
                    --model "weight: weight on clearance and volume"
  pkcalc population scenarios/demo-sparse.toml --stepwise "weight on clearance" \\
                    --stepwise "weight on volume" --add-if-p-below 0.05 \\
                    --remove-if-p-above 0.01
  pkcalc population --levels L.csv --doses D.csv --subjects S.csv --method two_stage
  pkcalc population scenarios/demo-sparse.toml --covariate per_kg --out pop-results/

Maximum marginal likelihood by default (--method marginal: the subjects' parameters
integrated out by the Laplace approximation, or adaptive Gauss-Hermite quadrature
with --nodes N); --method iterative gives the iterative two-stage estimate (Prevost
1977; Steimer et al. 1984) and --method two_stage the standard two-stage one.""",
    "sampling": """examples:
  pkcalc sampling scenarios/demo-sampling.toml
  pkcalc sampling scenarios/demo-sampling.toml --simulate 500 --workers 2 --out sampling/
  pkcalc sampling scenarios/demo-sampling.toml --simulate 1000 --engine dask \\
                  --scheduler tcp://10.0.0.5:8786 --json

The [scenarios.sampling] table gives the levels per subject, the window, the
residual error and, for a study, the between-subject variability and subjects
(docs/formats.md).  Times maximise the expected information about ln CL and ln V
(D-optimal); the expected relative SEs are printed for the optimum and for the
schedules under 'compare', and --simulate N checks them by re-estimation.""",
    "attainment": """examples:
  pkcalc attainment scenarios/demo-attainment.toml
  pkcalc attainment scenarios/demo-attainment.toml --patients 1000000 --workers 2 --out att/

The [attainment] table names where the patients come from (a study whose population
is estimated, a prior, or a table of patients), the grid of doses and intervals (or
rates) and the targets at steady state; bands split the patients by a covariate.
Every regimen meets the same virtual patients (seeded).""",
    "batch": """examples:
  pkcalc batch scenarios/demo-grid.toml --out grid-results.csv --at 24h,48h
  pkcalc batch scenarios/demo-batch.csv --out results.parquet
  pkcalc batch scenarios/demo-batch.csv --out pop.csv --population 10000 --seed 1 \\
               --cv-clearance 30% --cv-volume 20%
  pkcalc batch big.csv --out big-results.csv --engine dask
  pkcalc batch big.parquet --out big-results.parquet --engine dask --partitioned
  pkcalc batch /shared/big.parquet --out /shared/results.parquet --engine dask \\
               --partitioned --scheduler tcp://10.0.0.5:8786

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



class _FormerOption(argparse.Action):
    """A former option name: stores into the new option and notes the new name."""

    def __call__(self, parser, namespace, values, option_string=None):
        glossary.former(option_string, "--" + self.dest.replace("_", "-"), "option")
        setattr(namespace, self.dest, values)


def _former_option(p, old: str, dest: str, **kwargs) -> None:
    """Accept ``old`` (hidden from --help) for one release as the option stored in ``dest``."""
    p.add_argument(old, dest=dest, action=_FormerOption, help=argparse.SUPPRESS, **kwargs)


def _value(option: str):
    """argparse type of an option whose values had another spelling in the last release."""
    def convert(text: str) -> str:
        return glossary.canonical_value(text, option)
    return convert

def _study_args(p: argparse.ArgumentParser) -> None:
    p.add_argument("study", nargs="?", metavar="STUDY.toml", help="study file naming the tables")
    p.add_argument("--levels", metavar="L.csv", help="levels table")
    p.add_argument("--doses", metavar="D.csv", help="doses table")
    p.add_argument("--subjects", metavar="S.csv", help="subjects table (weights, covariates)")
    p.add_argument("--sdtm", metavar="DIR", help="CDISC SDTM datasets pc, ex or ec (dm, vs, "
                                                 "lb) as .xpt, Dataset-JSON or .csv in DIR")
    p.add_argument("--analyte", metavar="PCTESTCD", help="the analyte when PC holds several")
    p.add_argument("--specimen", metavar="PCSPEC", help="the specimen analysed (default: the "
                   "only plasma, serum or blood specimen in PC)")
    p.add_argument("--treatment", metavar="EXTRT", help="the treatment whose doses are "
                   "analysed (default: the only active treatment in EX)")
    p.add_argument("--times", choices=("actual", "nominal"), help="sample times from PCDTC "
                   "(actual, the default) or PCRFTDTC + PCELTM (nominal)")
    p.add_argument("--infusion-duration", metavar="Q", help="length of each administration "
                   "when EX gives no EXDUR and no usable end, e.g. '1 h' ('0 h': injections)")
    p.add_argument("--pre-dose", choices=("omit", "drug_on_board"), help="a measurable level "
                   "before the first dose: left out with a warning (omit, the default) or "
                   "taken as the drug on board at the first dose")
    p.add_argument("--strict", action="store_true", help="refuse SDTM data with any row or "
                   "subject left out as a problem (default: leave them out, named)")


# --------------------------------------------------------------------------- parser
def _add(sub, name: str, help_: str):
    p = sub.add_parser(name, help=help_, description=help_, epilog=EXAMPLES.get(name),
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.set_defaults(command=name)
    return p


def _adequacy_arg(p: argparse.ArgumentParser) -> None:
    p.add_argument("--no-adequacy", action="store_true",
                   help="skip the check of one compartment against two exponentials "
                        "(faster)")


def _output_args(p: argparse.ArgumentParser, out_help: str) -> None:
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout")
    p.add_argument("--out", metavar="DIR", help=out_help)
    p.add_argument("--report", metavar="FILE.html", help="write a self-contained HTML report")
    p.add_argument("--pdf", action="store_true",
                   help="also print the report to FILE.pdf beside it, with a headless "
                        "Chromium-based browser installed on this machine")


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
    _predict_parser(sub)
    _design_parser(sub)
    _fit_parser(sub)
    _population_parser(sub)
    _batch_parser(sub)
    _sampling_parser(sub)
    _attainment_parser(sub)
    _nca_parser(sub)
    _verify_parser(sub)
    _demo_parser(sub)
    return parser


def _predict_parser(sub) -> None:
    p = _add(sub, "predict",
             "Concentration course, plateau, time to plateau and steady state of scenarios.")
    p.add_argument("scenario", metavar="SCENARIO.toml", help="scenario file (docs/formats.md)")
    _output_args(p, "write CSV, JSON and PNG files to DIR")


def _design_parser(sub) -> None:
    p = _add(sub, "design",
             "Design a regimen to a target, or adjust one from measured levels.")
    p.add_argument("scenario", nargs="?", metavar="SCENARIO.toml",
                   help="scenario file with [scenarios.design] tables")
    for name in PARAM_OPTIONS:
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


def _fit_parser(sub) -> None:
    p = _add(sub, "fit",
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
    _adequacy_arg(p)
    _output_args(p, "write fit.csv, fit.json and plots to DIR")


def _population_parser(sub) -> None:
    p = _add(sub, "population",
             "Typical values, between-subject variability and residual error from a study.")
    _study_args(p)
    p.add_argument("--method", choices=["marginal", "iterative", "two_stage"],
                   type=_value("--method"),
                   help="maximum marginal likelihood (default), iterative two-stage, or "
                        "standard two-stage (rich data)")
    p.add_argument("--nodes", type=int, metavar="N",
                   help="Gauss-Hermite nodes per dimension (default 1: Laplace)")
    p.add_argument("--between-subject", choices=["full", "diagonal"],
                   help="variability of clearance and volume with (full, default) or "
                        "without their correlation")
    p.add_argument("--effect", action="append", metavar="TEXT",
                   help='a covariate effect, e.g. "weight on clearance and volume", '
                        '"sex on volume", "age on clearance linear around 40" (repeatable)')
    p.add_argument("--model", action="append", metavar="NAME: EFFECTS",
                   help='a model to compare, e.g. "base:" or "weight: weight on clearance; '
                        'sex on volume" (repeatable; the first is the base)')
    p.add_argument("--stepwise", action="append", metavar="TEXT",
                   help="a candidate effect for stepwise selection (repeatable)")
    p.add_argument("--add-if-p-below", type=float, metavar="P",
                   help="forward steps add the best candidate while its likelihood-ratio "
                        "p is below P (default 0.05)")
    p.add_argument("--remove-if-p-above", type=float, metavar="P",
                   help="backward steps remove the weakest added effect while its "
                        "likelihood-ratio p is above P (default 0.01)")
    _former_option(p, "--p-in", "add_if_p_below", type=float)
    _former_option(p, "--p-out", "remove_if_p_above", type=float)
    p.add_argument("--quiet", action="store_true", help="no progress lines")
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
    _engine_args(p, "where the work runs: this process (default; --workers N runs bootstrap "
                    "replicates in N local processes) or Dask workers (they hold the subjects "
                    "of the marginal estimates, and run bootstrap replicates)")
    p.add_argument("--vpc-replicates", type=int, metavar="N",
                   help="simulated replicates for the visual predictive check (default 200)")
    _adequacy_arg(p)
    _output_args(p, "write CSV, JSON and plots to DIR")


def _engine_args(p, engine_help: str) -> None:
    """--engine, --workers, --scheduler, --timeout: where independent pieces run."""
    p.add_argument("--engine", choices=["local", "dask"], default="local", help=engine_help)
    p.add_argument("--workers", type=int, metavar="N",
                   help="worker processes (dask: of the local cluster, default one per core)")
    p.add_argument("--scheduler", metavar="ADDR",
                   help="running Dask scheduler, e.g. tcp://10.0.0.5:8786 (default: a local "
                        "cluster on 127.0.0.1)")
    p.add_argument("--timeout", type=float, metavar="S",
                   help="seconds to reach the scheduler and see a worker (default 20)")


def _sampling_parser(sub) -> None:
    p = _add(sub, "sampling",
             "When to draw levels: D-optimal sampling times for a patient or a study, with "
             "the expected precision of clearance and volume.")
    p.add_argument("scenario", metavar="SCENARIO.toml",
                   help="scenario file with [scenarios.sampling] tables")
    p.add_argument("--simulate", type=int, metavar="N",
                   help="simulate and re-estimate N replicates of every design (default 0)")
    p.add_argument("--seed", type=int, metavar="S", help="seed of the simulations (default 1)")
    p.add_argument("--refit", choices=["marginal", "iterative"],
                   help="population re-estimates: the marginal likelihood (default, as in "
                        "pkcalc population) or iterative two-stage (faster)")
    p.add_argument("--starts", type=int, metavar="N",
                   help="optimiser starts per design (default 12)")
    _engine_args(p, "where simulated replicates run: this process (default; --workers N for "
                    "N local processes) or Dask workers")
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    _output_args(p, "write sampling.json, sampling-times.csv and a plot per scenario to DIR")


def _attainment_parser(sub) -> None:
    p = _add(sub, "attainment",
             "Share of a population reaching the targets on a grid of doses and intervals, "
             "overall and by covariate bands.")
    p.add_argument("scenario", metavar="ATTAINMENT.toml",
                   help="a file with an [attainment] table (docs/formats.md)")
    p.add_argument("--patients", type=int, metavar="N",
                   help="virtual patients (default: the file's, else 100000)")
    p.add_argument("--seed", type=int, metavar="S", help="seed of the draws (default 1)")
    _engine_args(p, "where pieces of 100,000 patients run: this process (default; "
                    "--workers N for N local processes) or Dask workers")
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    _output_args(p, "write attainment.json, attainment.csv and attainment.png to DIR")


def _batch_parser(sub) -> None:
    p = _add(sub, "batch",
             "Scenario tables at scale: plateau, time to plateau, steady state, variability.")
    p.add_argument("input", metavar="INPUT", help="CSV, Parquet, or TOML ([grid] or "
                                                  "[[scenarios]])")
    p.add_argument("--out", metavar="OUTPUT", required=True,
                   help="output table (.csv or .parquet), written atomically")
    _engine_args(p, "partitions computed in this process (default) or on Dask workers")
    p.add_argument("--partitioned", action="store_true",
                   help="write OUTPUT as a folder of part files (part-00000.csv|.parquet ...), "
                        "each written by the worker that computed it")
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
    p.add_argument("--pdf", action="store_true",
                   help="also print the report to FILE.pdf beside it, with a headless "
                        "Chromium-based browser installed on this machine")


def _nca_parser(sub) -> None:
    p = _add(sub, "nca",
             "Non-compartmental analysis per subject (AUC, terminal slope, CL, volumes, MRT).")
    _study_args(p)
    p.add_argument("--auc-method", choices=["linear_up_log_down", "linear"],
                   type=_value("--auc-method"),
                   help="trapezoid rule (default linear_up_log_down)")
    p.add_argument("--blq", choices=["leading_zero", "zero", "drop"],
                   help="BLQ levels: leading_zero (default: before the first measurable level "
                        "as 0, later ones left out), zero, drop")
    _former_option(p, "--blq-rule", "blq", choices=["leading_zero", "zero", "drop"])
    p.add_argument("--slope-tolerance", type=float, metavar="X",
                   help="terminal slope: take the longest tail of levels whose adjusted R² is "
                        "at most X below the best tail's (default 0.0001)")
    p.add_argument("--terminal", action="append", metavar="SUBJECT=T1,T2,...",
                   help="choose a subject's terminal points by hand (repeatable)")
    p.add_argument("--interval", metavar="first|last|each|N",
                   help="the dosing intervals reported (default each: every interval, those "
                        "with too few levels with the reason)")
    p.add_argument("--interval-tolerance", metavar="PCT,TIME",
                   help="repeated doses are regular when every gap is within the larger of "
                        "PCT of the interval and TIME (default '10%%,1 h')")
    p.add_argument("--duration-tolerance", metavar="PCT,TIME",
                   help="... and every infusion time within the larger of PCT and TIME of "
                        "the typical one (default '10%%,15 min')")
    p.add_argument("--pp", metavar="DIR",
                   help="also write the results as a CDISC SDTM PP dataset (pp.xpt, pp.csv, "
                        "pp.json) with its relationship to the PC rows (relrec) in DIR")
    _output_args(p, "write nca.csv, nca-intervals.csv, nca.json and plots to DIR")


def _verify_parser(sub) -> None:
    p = _add(sub, "verify",
             "Recompute worked examples and report PASS/FAIL per expected value.")
    p.add_argument("cases", metavar="CASES.toml", help="cases file (docs/formats.md)")
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout")
    p.add_argument("--junit", metavar="FILE.xml", help="also write JUnit XML for CI systems")
    p.add_argument("--out", metavar="DIR", help="write verify.csv, verify.json to DIR")
    p.add_argument("--report", metavar="FILE.html", help="write a self-contained HTML report")
    p.add_argument("--pdf", action="store_true",
                   help="also print the report to FILE.pdf beside it, with a headless "
                        "Chromium-based browser installed on this machine")


def _demo_parser(sub) -> None:
    p = _add(sub, "demo",
             "Run the invented demo scenario end to end.")
    p.add_argument("--out", metavar="DIR", help="output folder (default: pkcalc-demo)")
    p.add_argument("--pdf", action="store_true",
                   help="also print report.html to report.pdf with a headless "
                        "Chromium-based browser installed on this machine")
