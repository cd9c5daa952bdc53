"""Command runs: load inputs, compute, build the JSON document, the terminal text,
the files of ``--out`` and the sections of an HTML report.  Nothing here prints;
:mod:`pkcalc.cli` decides what goes where.

Each ``run_*`` function returns a :class:`Run`.  Figures are drawn lazily and
once, for ``--out`` and ``--report`` alike.
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

from . import glossary, report
from .errors import PkcalcInputError
from .files import resolved

__all__ = ["Run", "check_not_input", "run_design", "run_predict", "run_verify",
           "unique_slugs", "write_outputs", "write_report"]

EXIT_OK, EXIT_PARTIAL, EXIT_INPUT = 0, 1, 2


#: Longest file-name part made from a name.
SLUG_LENGTH = 60


def slug(name: str) -> str:
    """A file-name-safe version of a scenario or subject name."""
    import re

    s = re.sub(r"[^A-Za-z0-9._-]+", "-", name).strip("-._")
    if len(s) > SLUG_LENGTH:   # whole words only: cut at the last '-' that fits
        cut = s[:SLUG_LENGTH + 1].rfind("-")
        s = s[:cut if cut >= SLUG_LENGTH // 2 else SLUG_LENGTH].strip("-._")
    return s or "item"


def unique_slugs(names: Sequence[str]) -> list[str]:
    """File-name-safe names, made unique with a counter."""
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
    ins = {resolved(p) for p in inputs if p}
    for out in outputs:
        if resolved(out) in ins:
            raise PkcalcInputError("refusing to overwrite an input file", file=str(out),
                                   expected="an output path that is not one of the inputs")


@dataclass
class Run:
    """The outcome of one command, before anything is printed or written.

    Attributes
    ----------
    command : str
    code : int
        Exit code (0, 1 or 2).
    doc : dict
        The JSON document.
    text : str
        Terminal output (caution first).
    inputs : list of str
        Input files (never overwritten; hashed in reports).
    title : str
    figure_factory : callable
        ``() -> dict[name, Figure]``; called once, lazily.
    file_writer : callable
        ``(out_dir, pngs) -> list[Path]``: the command's ``--out`` files.
    section_builder : callable
        ``(pngs) -> list[dict]``: HTML report sections.
    seed : int or None
    """

    command: str
    code: int
    doc: dict[str, Any]
    text: str
    inputs: list[str]
    title: str
    figure_factory: Callable[[], dict[str, Any]] = dict
    file_writer: Callable[[Path, dict[str, bytes]], list[Path]] | None = None
    section_builder: Callable[[dict[str, bytes]], list[dict[str, Any]]] = lambda _p: []
    seed: int | None = None
    warnings: list[str] = field(default_factory=list)

    def __post_init__(self) -> None:
        # every abbreviation the text uses, spelled out once at its end (the glossary's)
        line = glossary.explain(self.text)
        if line:
            self.text = self.text.rstrip("\n") + "\n\n" + line + "\n"

    @cached_property
    def pngs(self) -> dict[str, bytes]:
        """Every figure of the run as PNG bytes (drawn once)."""
        from .plots import figure_bytes

        return {name: figure_bytes(fig) for name, fig in self.figure_factory().items()
                if fig is not None}


def write_outputs(run: Run, out_dir: str | Path) -> list[Path]:
    """``CAUTION.txt`` and the command's files, atomically; never over an input.

    A refusal found while writing (a file of the run that is an input) leaves the
    folder as it was: the marker and a new CAUTION.txt are removed, and a folder made
    for the run too.  Files an earlier run listed in CAUTION.txt that this run does
    not write again are removed, so the folder holds one run's files."""
    from .files import INCOMPLETE_NAME, unfinished

    out = Path(out_dir)
    check_not_input([out / "CAUTION.txt"], run.inputs)
    existed, had_caution = out.is_dir(), (out / "CAUTION.txt").exists()
    earlier = report.previous_files(out)
    try:
        with unfinished(out):
            written = [report.write_caution_file(out)]
            if run.file_writer is not None:
                written += run.file_writer(out, run.pngs)
            written[0] = report.write_caution_file(out, written)
    except PkcalcInputError:
        (out / INCOMPLETE_NAME).unlink(missing_ok=True)
        if not had_caution:
            (out / "CAUTION.txt").unlink(missing_ok=True)
        if not existed:
            with contextlib.suppress(OSError):
                out.rmdir()
        raise
    now = {resolved(p) for p in written}
    inputs = {resolved(p) for p in run.inputs}
    for old in earlier:
        if resolved(old) not in now and resolved(old) not in inputs and old.is_file():
            old.unlink(missing_ok=True)
            folder = old.parent
            while folder != out and out in folder.parents:  # a scenario's folder, if empty
                try:
                    folder.rmdir()
                except OSError:
                    break
                folder = folder.parent
    return written


def write_report(runs: Sequence[Run], path: str | Path, *, title: str | None = None,
                 options: str = "") -> Path:
    """One self-contained HTML report of one or more runs."""
    from .report.html import HtmlReport, input_items, lines_item, render_html, run_verdict

    inputs = [p for r in runs for p in r.inputs]
    check_not_input([Path(path)], inputs)
    items, files = input_items(inputs)
    sections, overview = [], []
    for r in runs:
        built = r.section_builder(r.pngs)
        for i, s in enumerate(built):
            s["id"] = f"section-{len(sections) + 1}"
            s["run_start"] = i == 0 and bool(sections)   # a page break before each command
            sections.append(s)
        if built and r.warnings:   # the run's warnings beside its results, too
            shown = {w for s in built for b in s["blocks"] if b.get("kind") == "warnings"
                     for w in b["lines"]}
            rest = [w for w in r.warnings if w not in shown]
            if rest:
                built[0]["blocks"].insert(1, lines_item("warnings", rest))
        overview.append({"command": r.command, "anchor": built[0]["id"] if built else None,
                         "heading": built[0]["heading"] if built else r.command,
                         "verdict": run_verdict(r.command, r.doc),
                         "warnings": len(r.warnings)})
    rep = HtmlReport(
        title=title or runs[0].title, command=" + ".join(r.command for r in runs),
        sections=sections, inputs=items, files=files, options=options,
        seed=next((r.seed for r in runs if r.seed is not None), None),
        documents={r.command: r.doc for r in runs},
        warnings=[w for r in runs for w in r.warnings], overview=overview,
    )
    return report.write_atomic(path, render_html(rep))


# --------------------------------------------------------------------------- predict
_PARAM_KIND = {"clearance": "clearance", "volume": "volume",
               "elimination_rate": "elimination_rate", "half_life": "time",
               "time_constant": "time"}


def run_predict(scenario_path: str | Path, *, colour: bool = False) -> Run:
    """``pkcalc predict``: every good scenario of the file."""
    from .predict import predict_scenario
    from .report.html import predict_sections
    from .schema import load_scenario_file

    sfile = load_scenario_file(scenario_path)
    if not sfile.scenarios:
        raise PkcalcInputError([p for _, err in sfile.failures for p in err.problems])
    conv = report.UnitConverter(sfile.output.units())
    preds, failures = [], list(sfile.failures)
    for s in sfile.scenarios:
        try:
            preds.append(predict_scenario(s))
        except (ValueError, ArithmeticError) as exc:
            label = f"scenario '{s.name}'"
            failures.append((label, PkcalcInputError(str(exc), file=str(scenario_path),
                                                     item=label)))
    if not preds:
        raise PkcalcInputError([p for _, err in failures for p in err.problems])
    doc = report.predict_json(preds, conv, title=sfile.title, failures=failures)
    text = report.predict_text(preds, conv, title=sfile.title, failures=failures,
                               colour=colour)

    def figures() -> dict[str, Any]:
        from .plots import profile_figure

        return {p.name: profile_figure(p, conv) for p in preds}

    def files(out: Path, pngs: dict[str, bytes]) -> list[Path]:
        return _write_predict_files(out, preds, conv, doc, pngs, [str(scenario_path)])

    return Run("predict", EXIT_PARTIAL if failures else EXIT_OK, doc, text,
               [str(scenario_path)], sfile.title or "pkcalc predict", figures, files,
               lambda pngs: predict_sections(doc, pngs))


def _write_predict_files(out: Path, preds, conv, doc, pngs, inputs) -> list[Path]:
    """profile.csv and profile.png per scenario, summary.csv, predict.json."""
    import pandas as pd

    slugs = unique_slugs([p.name for p in preds])
    targets = [out / "predict.json", out / "summary.csv"]
    targets += [out / s / f for s in slugs for f in ("profile.csv", "profile.png")]
    check_not_input(targets, inputs)
    written = []
    rows = []
    tu, cu = conv.unit("time"), conv.unit("concentration")
    for pred, s, d in zip(preds, slugs, doc["scenarios"], strict=True):
        frame = pd.DataFrame({f"time [{tu}]": d["profile"]["time"],
                              f"concentration [{cu}]": d["profile"]["concentration"]})
        origin = pred.clock_origin
        if origin:  # the clock time beside the hours since the first dose
            start = pd.Timestamp(origin)
            frame.insert(1, "clock_time", [(start + pd.Timedelta(hours=float(h))).isoformat()
                                           for h in pred.time])
        written.append(report.write_atomic(out / s / "profile.csv", frame.to_csv(index=False)))
        written.append(report.write_atomic(out / s / "profile.png", pngs[pred.name]))
        row = {"scenario": pred.name, "folder": s}
        row.update({f"{k} [{conv.unit(_PARAM_KIND[k])}]": v for k, v in d["parameters"].items()})
        row[f"plateau_concentration [{cu}]"] = d["plateau_concentration"]
        for f in pred.time_to_fraction:
            key = glossary.time_to_key(f)
            row[glossary.header(key, tu)] = d[key]
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


# --------------------------------------------------------------------------- design
def run_design(cases, *, failures=(), title: str | None = None,
               units: dict[str, str] | None = None, inputs: Sequence[str] = (),
               colour: bool = False) -> Run:
    """``pkcalc design``: every validated design case."""
    from .design import design_from_case as design_one
    from .report.html import design_sections

    results, run_failures = [], list(failures)
    for case in cases:
        try:
            results.append(design_one(case))
        except (ValueError, ArithmeticError) as exc:  # infeasible requests, overflow
            label = f"scenario '{case.name}'"
            run_failures.append((label, PkcalcInputError(
                str(exc), file=inputs[0] if inputs else None, item=label)))
    if not results:
        raise PkcalcInputError([p for _, err in run_failures for p in err.problems])
    conv = report.UnitConverter(units)
    doc = report.design_json(results, conv, title=title, failures=run_failures)
    text = report.design_text(results, conv, title=title, failures=run_failures, colour=colour)

    def figures() -> dict[str, Any]:
        from .plots import design_figure

        return {r.name: design_figure(r, conv) for r in results}

    def files(out: Path, pngs: dict[str, bytes]) -> list[Path]:
        import pandas as pd

        slugs = unique_slugs([r.name for r in results])
        targets = [out / "design.json", out / "regimens.csv"]
        targets += [out / f"design-{s}.png" for s in slugs]
        check_not_input(targets, inputs)
        written = []
        frames = []
        for res, s in zip(results, slugs, strict=True):
            frame = res.to_frame()
            frame.insert(0, "scenario", res.name)
            frames.append(frame)
            if res.name in pngs:
                written.append(report.write_atomic(out / f"design-{s}.png", pngs[res.name]))
        written.append(report.write_atomic(out / "regimens.csv",
                                           pd.concat(frames).to_csv(index=False)))
        written.append(report.write_atomic(out / "design.json", report.dumps(doc)))
        return written

    return Run("design", EXIT_PARTIAL if run_failures else EXIT_OK, doc, text, list(inputs),
               title or "pkcalc design", figures, files,
               lambda pngs: design_sections(doc, pngs))


# --------------------------------------------------------------------------- sampling
def run_sampling(path: str | Path, *, simulate: int = 0, seed: int = 1, refit=None,
                 starts: int = 12, engine=None, progress=None, colour: bool = False) -> Run:
    """``pkcalc sampling``: the design of every scenario with a sampling table."""
    from .api import sampling_file
    from .report.html import sampling_sections
    from .report.sampling import sampling_json, sampling_text

    sf = sampling_file(path, simulate=simulate, seed=seed, engine=engine, refit=refit,
                       starts=starts, progress=progress)
    results, failures = sf.results, sf.failures
    conv = report.UnitConverter(sf.units)
    doc = sampling_json(results, conv, title=sf.title, failures=failures)
    text = sampling_text(results, title=sf.title, failures=failures, colour=colour)

    def figures() -> dict[str, Any]:
        from .plots import sampling_figure

        return {r.problem.name: sampling_figure(r, conv) for r in results}

    def files(out: Path, pngs: dict[str, bytes]) -> list[Path]:
        import pandas as pd

        slugs = unique_slugs([r.problem.name for r in results])
        targets = [out / "sampling.json", out / "sampling-times.csv"]
        targets += [out / f"sampling-{sl}.png" for sl in slugs]
        check_not_input(targets, [str(path)])
        written = []
        frames = []
        for res, sl in zip(results, slugs, strict=True):
            frame = res.to_frame()
            frame.insert(0, "scenario", res.problem.name)
            frames.append(frame)
            written.append(report.write_atomic(out / f"sampling-{sl}.png",
                                               pngs[res.problem.name]))
        written.append(report.write_atomic(out / "sampling-times.csv",
                                           pd.concat(frames).to_csv(index=False)))
        written.append(report.write_atomic(out / "sampling.json", report.dumps(doc)))
        return written

    return Run("sampling", EXIT_PARTIAL if failures else EXIT_OK, doc, text, [str(path)],
               sf.title or f"pkcalc sampling: {Path(path).name}", figures, files,
               lambda pngs: sampling_sections(doc, pngs), seed=seed if simulate else None,
               warnings=[w for r in results for w in r.warnings])


# --------------------------------------------------------------------------- verify
def run_verify(cases_path: str | Path, *, colour: bool = False) -> tuple[Run, Any]:
    """``pkcalc verify``: the run and the :class:`~pkcalc.verify.VerifyResult`."""
    from .report.html import verify_sections
    from .schema import load_cases_file
    from .verify import verify

    cfile = load_cases_file(cases_path)
    result = verify(cfile.scenarios, cfile.failures)
    doc = report.verify_json(result)
    text = report.verify_text(result, title=cfile.title, colour=colour)
    code = EXIT_INPUT if result.failures else (EXIT_PARTIAL if result.n_failed else EXIT_OK)

    def files(out: Path, pngs: dict[str, bytes]) -> list[Path]:
        check_not_input([out / "verify.json", out / "verify.csv"], [str(cases_path)])
        return [report.write_atomic(out / "verify.json", report.dumps(doc)),
                report.write_atomic(out / "verify.csv", result.to_frame().to_csv(index=False))]

    run = Run("verify", code, doc, text, [str(cases_path)], cfile.title or "pkcalc verify",
              dict, files, lambda _pngs: verify_sections(doc))
    return run, result


# --------------------------------------------------------------------------- studies
def load_study_input(study: str | None = None, levels: str | None = None,
                     doses: str | None = None, subjects: str | None = None,
                     sdtm: str | None = None, analyte: str | None = None, **options):
    """A study from a study TOML, from SDTM datasets, or from the three tables.

    ``options`` are the import choices (``specimen``, ``treatment``, ``times``,
    ``infusion_duration``, ``strict`` for SDTM; ``pre_dose`` for any study), as given
    on the command line (None when not given); they override a study file's keys.
    """
    from .schema import load_study, load_study_file
    from .schema.studyfile import SDTM_KEYS, import_options

    given = {k: v for k, v in options.items() if v is not None and v is not False}
    if sum(bool(x) for x in (study, levels or doses or subjects, sdtm)) > 1:
        raise PkcalcInputError("give one of: a study file, --levels/--doses, or --sdtm")
    if analyte and not (sdtm or study):
        raise PkcalcInputError("--analyte goes with --sdtm", field="--analyte")
    if analyte:
        given["analyte"] = analyte
    if sdtm:
        from .schema.sdtm import load_sdtm

        return load_sdtm(sdtm, **import_options(given, "the command line"))
    if study:
        return load_study_file(study, overrides=given)
    wrong = sorted(set(given) & set(SDTM_KEYS))
    if wrong:
        raise PkcalcInputError(f"--{wrong[0].replace('_', '-')} goes with SDTM data",
                               field=f"--{wrong[0].replace('_', '-')}",
                               expected="--sdtm DIR, or a study file naming sdtm")
    if not (levels and doses):
        raise PkcalcInputError("no study given", expected="STUDY.toml, --sdtm DIR, or "
                               "--levels L.csv --doses D.csv [--subjects S.csv]")
    return load_study(levels, doses, subjects, **import_options(given, "the command line"))


def run_nca(study, options=None, *, colour: bool = False, pp: str | None = None) -> Run:
    """``pkcalc nca``: every subject of a study (:func:`pkcalc.api.nca_study`); with ``pp``
    the results also as a CDISC SDTM PP dataset in that folder."""
    from .api import nca_study
    from .report.html import nca_sections

    result = nca_study(study, options)
    if not result.results:
        raise PkcalcInputError([p for _, err in study.failures for p in err.problems]
                               or "no subjects to analyse")
    conv = report.UnitConverter(study.output or None)
    doc, text = _with_import(study, result.document(conv), result.summary(conv, colour=colour))
    empty = [r for r in result.results if r.mode == "not computed"]
    for r in empty:     # a subject without any result is a failed item (exit 1), named
        doc.setdefault("failures", []).append({"item": f"subject '{r.subject}'", "problems": [
            {"file": None, "item": f"subject '{r.subject}'", "field": None,
             "message": "no non-compartmental result: " + "; ".join(
                 n for n in r.notes if "at least" in n or "nothing" in n or "no " in n[:3])
             or "no non-compartmental result", "expected": None}]})
    if pp is not None:
        from .report.pp import pp_datasets, pp_summary, write_pp

        rep = study.import_report or {}
        study_id = rep.get("study") or (Path(study.files[0]).stem if study.files else "STUDY")
        records, relation, own = pp_datasets(
            result.results, study_id=study_id, analyte=rep.get("analyte_name") or
            rep.get("analyte") or "", specimen=rep.get("specimen") or "",
            choice=result.options.interval, level_trace=study.level_trace,
            level_file=study.files[1] if len(study.files) > 2 else
            (study.files[0] if study.files else ""))
        write_pp(pp, records, relation, own, study_id, study.level_trace is not None)
        text += "\n" + pp_summary(records, own) + f"; written to {pp}"
        doc["pp"] = {"folder": str(pp), "records": len(records), "own_terms": own}

    def figures() -> dict[str, Any]:
        from .plots import nca_figure

        return {r.subject: nca_figure(r, conv) for r in result.results}

    def files(out: Path, pngs: dict[str, bytes]) -> list[Path]:
        slugs = unique_slugs([r.subject for r in result.results])
        targets = [out / "nca.csv", out / "nca-intervals.csv", out / "nca.json"] + [
            out / f"nca-{s}.png" for s in slugs]
        check_not_input(targets, study.files)
        written = [report.write_atomic(out / f"nca-{s}.png", pngs[r.subject])
                   for r, s in zip(result.results, slugs, strict=True) if r.subject in pngs]
        written.append(report.write_atomic(out / "nca.csv",
                                           result.to_frame(conv).to_csv(index=False)))
        written.append(report.write_atomic(out / "nca-intervals.csv",
                                           result.intervals_frame(conv).to_csv(index=False)))
        written.append(report.write_atomic(out / "nca.json", report.dumps(doc)))
        return written + _export_tables(study, out)

    return Run("nca", EXIT_PARTIAL if study.failures or empty else EXIT_OK, doc, text,
               list(study.files), study.title or "pkcalc nca", figures, files,
               lambda pngs: nca_sections(doc, pngs), warnings=result.warnings)


def run_fit(study, options=None, *, colour: bool = False) -> Run:
    """``pkcalc fit``: every subject of a study, optionally beside NCA
    (:func:`pkcalc.api.fit_study`)."""
    from .api import fit_study
    from .report.html import fit_sections

    result = fit_study(study, options)
    conv = report.UnitConverter(study.output or None)
    doc, text = _with_import(study, result.document(conv), result.summary(conv, colour=colour))

    def figures() -> dict[str, Any]:
        from .plots import diagnostics_figure, fit_figure

        figs = {r.subject: fit_figure(r, conv) for r in result.results}
        figs["__diagnostics__"] = diagnostics_figure(result.results, conv)
        return figs

    def files(out: Path, pngs: dict[str, bytes]) -> list[Path]:
        slugs = unique_slugs([r.subject for r in result.results])
        targets = [out / "fit.csv", out / "fit-levels.csv", out / "fit.json",
                   out / "diagnostics.png"] + [out / f"fit-{s}.png" for s in slugs]
        check_not_input(targets, study.files)
        written = [report.write_atomic(out / f"fit-{s}.png", pngs[r.subject])
                   for r, s in zip(result.results, slugs, strict=True)]
        written.append(report.write_atomic(out / "diagnostics.png", pngs["__diagnostics__"]))
        written.append(report.write_atomic(out / "fit.csv",
                                           result.to_frame(conv).to_csv(index=False)))
        written.append(report.write_atomic(out / "fit-levels.csv",
                                           result.levels_frame().to_csv(index=False)))
        written.append(report.write_atomic(out / "fit.json", report.dumps(doc)))
        return written + _export_tables(study, out)

    return Run("fit", EXIT_PARTIAL if result.failures else EXIT_OK, doc, text,
               list(study.files), study.title or "pkcalc fit", figures, files,
               lambda pngs: fit_sections(doc, pngs), warnings=list(study.warnings))


def _with_import(study, doc: dict[str, Any], text: str) -> tuple[dict[str, Any], str]:
    """A study read from SDTM carries its import report into the JSON and the text."""
    if not study.import_report:
        return doc, text
    doc["import"] = study.import_report
    doc["import_lines"] = study.import_lines
    return doc, text + "\n\n" + "\n".join(study.import_lines)


def _export_tables(study, out: Path) -> list[Path]:
    """The analysis-ready tables of a study read from SDTM (relative and clock times), so
    the same analysis can be rerun without SDTM."""
    if not study.tables:
        return []
    from .schema.sdtm import export_tables

    return [report.write_atomic(out / f"analysis-{name}.csv", frame.to_csv(index=False))
            for name, frame in export_tables(study).items()]


def run_population(study, options=None, *, colour: bool = False, progress=None,
                   engine=None) -> Run:
    """``pkcalc population``: marginal-likelihood or two-stage estimates
    (:func:`pkcalc.api.population_study`)."""
    from .api import population_study
    from .population import simulate_design
    from .report.html import population_sections
    from .schema import study_population_options

    options = options if options is not None else study_population_options(study)
    result = population_study(study, options, progress=progress, engine=engine)
    conv = report.UnitConverter(study.output or None)
    failures = result.all_failures
    doc = result.document(conv)
    text = result.summary(conv, colour=colour)
    doc, text = _with_import(study, doc, text)
    used = result.used_subjects
    flagged = [r for r in result.subjects
               if r.adequacy is not None and r.adequacy.verdict == "distribution_phase"]

    def figures() -> dict[str, Any]:
        from .plots import fit_figure, population_figure, vpc_figure

        figs = {"__diagnostics__": population_figure(result, used, conv)}
        for r in flagged:
            figs[r.subject] = fit_figure(r, conv)
        if options.vpc_replicates and result.method in ("iterative", "marginal"):
            sim = simulate_design(used, result, options.vpc_replicates, options.seed)
            figs["__vpc__"] = vpc_figure(used, sim, conv)
        return figs

    def files(out: Path, pngs: dict[str, bytes]) -> list[Path]:
        import pandas as pd

        targets = [out / n for n in ("population.json", "population-subjects.csv",
                                     "population-iterations.csv", "diagnostics.png",
                                     "vpc.png")]
        slugs = unique_slugs([r.subject for r in flagged])
        check_not_input(targets + [out / f"adequacy-{s}.png" for s in slugs], study.files)
        written = [report.write_atomic(out / "diagnostics.png", pngs["__diagnostics__"])]
        written += [report.write_atomic(out / f"adequacy-{s}.png", pngs[r.subject])
                    for r, s in zip(flagged, slugs, strict=True)]
        if "__vpc__" in pngs:
            written.append(report.write_atomic(out / "vpc.png", pngs["__vpc__"]))
        written.append(report.write_atomic(out / "population-subjects.csv",
                                           result.to_frame().to_csv(index=False)))
        # -2 ln L after each outer iteration (the iterative method's is approximate)
        name = "approximate_minus_2_ln_l" if result.method == "iterative" else "objective"
        iters = pd.DataFrame({"iteration": range(1, len(result.objective_per_iteration) + 1),
                              name: result.objective_per_iteration})
        written.append(report.write_atomic(out / "population-iterations.csv",
                                           iters.to_csv(index=False)))
        written.append(report.write_atomic(out / "population.json", report.dumps(doc)))
        return written + _export_tables(study, out)

    return Run("population", EXIT_PARTIAL if failures else EXIT_OK, doc, text,
               list(study.files), study.title or "pkcalc population", figures, files,
               lambda pngs: population_sections(doc, pngs), seed=options.seed,
               warnings=doc["warnings"])


# --------------------------------------------------------------------------- batch
def run_batch_command(input_path: str, output_path: str, options, *, engine="local",
                      chunk_rows: int | None = None, partitioned: bool = False,
                      progress: bool = False, colour: bool = False) -> Run:
    """``pkcalc batch``: stream the input to the output table; summary, plots."""
    from .batch import DEFAULT_CHUNK_ROWS, run_batch
    from .report.html import batch_sections

    check_not_input([Path(output_path)], [input_path])
    summary = run_batch(input_path, output_path, options, engine=engine,
                        chunk_rows=chunk_rows or DEFAULT_CHUNK_ROWS, progress=progress,
                        partitioned=partitioned)

    doc = report.json_document("batch", report.UnitConverter(), {
        "input": str(input_path), "output": str(output_path), "engine": summary.engine,
        "partitioned": summary.partitioned, "partitions": summary.partitions,
        "partition_rows": summary.partition_rows, "workers": summary.workers,
        "peak_memory_mb": {"client": round(summary.client_peak_rss_mb, 1),
                           "workers": {k: round(v, 1)
                                       for k, v in summary.worker_peak_rss_mb.items()}}
        if summary.client_peak_rss_mb else None,
        "rows": summary.rows, "failed": summary.failed,
        "first_errors": summary.first_errors, "seconds": round(summary.seconds, 3),
        "options": {"at": list(options.at), "population": options.population,
                    "seed": options.seed, "cv_clearance": options.cv_clearance,
                    "cv_volume": options.cv_volume, "correlation": options.correlation},
        "distribution": summary.distribution(),
        "warnings": summary.warnings,
    })
    text = report.assemble_text([summary.summary(caution=False)], [("batch", summary.warnings)],
                                colour=colour)

    def figures() -> dict[str, Any]:
        from .plots import batch_figure

        return {"__batch__": batch_figure(summary)}

    def files(out: Path, pngs: dict[str, bytes]) -> list[Path]:
        check_not_input([out / "batch-distributions.png", out / "batch.json"], [input_path])
        return [report.write_atomic(out / "batch-distributions.png", pngs["__batch__"]),
                report.write_atomic(out / "batch.json", report.dumps(doc))]

    return Run("batch", EXIT_PARTIAL if summary.failed else EXIT_OK, doc, text,
               [str(input_path)], f"pkcalc batch: {Path(input_path).name}", figures, files,
               lambda pngs: batch_sections(doc, pngs), seed=options.seed if options.population
               else None, warnings=summary.warnings)


# --------------------------------------------------------------------------- attainment
def run_attainment(path: str | Path, *, patients: int | None = None, seed: int | None = None,
                   engine=None, progress=None, colour: bool = False) -> Run:
    """``pkcalc attainment``: the share of a population on target for a regimen grid."""
    from .api import population_attainment, population_study
    from .report.attainment import attainment_json, attainment_text
    from .report.html import attainment_sections
    from .schema.attainment import load_attainment_file

    req = load_attainment_file(path, patients=patients, seed=seed)
    inputs = [str(path)] + [str(p) for p in (req.study, req.subjects) if p is not None]
    source = req.prior
    if req.study is not None:
        from .schema import load_study_file

        source = population_study(load_study_file(req.study), adequacy=False,
                                  vpc_replicates=0)
    t = req.targets
    doses = sorted({r[0] for r in req.regimens if r[0] is not None})
    intervals = sorted({r[1] for r in req.regimens if r[1] is not None})
    result = population_attainment(
        source, subjects=req.subjects, doses=doses, intervals=intervals,
        infusion_time=req.regimens[0][2], rates=[r[3] for r in req.regimens if r[3]],
        peak=t["peak"], trough=t["trough"], auc_24=t["auc_24"], window=t["level"],
        attainment_level=req.level,
        bands=(req.band_column, req.band_edges) if req.band_column else None,
        patients=req.patients, seed=req.seed, engine=engine, progress=progress)
    doc = attainment_json(result, title=req.title)
    text = attainment_text(result, title=req.title, colour=colour)

    def figures() -> dict[str, Any]:
        from .plots import attainment_figure

        return {"attainment": attainment_figure(result)}

    def files(out: Path, pngs: dict[str, bytes]) -> list[Path]:
        targets = [out / "attainment.json", out / "attainment.csv", out / "attainment.png"]
        check_not_input(targets, inputs)
        written = [report.write_atomic(out / "attainment.csv",
                                       result.to_frame().to_csv(index=False))]
        if "attainment" in pngs:
            written.append(report.write_atomic(out / "attainment.png", pngs["attainment"]))
        written.append(report.write_atomic(out / "attainment.json", report.dumps(doc)))
        return written

    return Run("attainment", EXIT_OK, doc, text, inputs, req.title or "pkcalc attainment",
               figures, files, lambda pngs: attainment_sections(doc, pngs), seed=req.seed)
