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


def demo_path(name: str = "demo.toml") -> Path:
    """Path of a scenario file shipped with pkcalc."""
    from importlib.resources import files

    return Path(str(files("pkcalc.scenarios") / name))


def cmd_demo(args: argparse.Namespace) -> int:
    out = args.out or "pkcalc-demo"
    return _predict_files(str(demo_path()), out, False)


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
