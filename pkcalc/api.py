"""Study-level jobs for scripts and notebooks: one call per job, a result object back.

>>> import pkcalc
>>> study = pkcalc.load_study_file(pkcalc.example_file("demo-study.toml"))
>>> fit = pkcalc.fit_study(study)                      # every subject, one result
>>> round(fit.subject("V01").clearance, 2)
4.92
>>> nca = pkcalc.nca_study(study)
>>> nca.to_frame().shape[0] == len(study.subjects)
True

Each result has plain attributes, ``summary()`` (the text ``pkcalc`` prints,
caution first), ``to_frame()`` (the table ``pkcalc`` writes with ``--out``) and
``_repr_html_()`` for notebooks.  Options come from the study file's ``[fit]``,
``[nca]`` or ``[population]`` table, overridden by keyword arguments with the
command-line names (``error_model="combined"``, ``blq="drop"``, ...), or as a
ready options object (:class:`pkcalc.core.FitOptions`, ...).  Numbers are in
canonical units unless a unit map (the study file's ``[output]`` table, or
``units=``) says otherwise.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from typing import Any

from ._format import result_html
from .core import FitOptions, NcaOptions, PopulationModel, PopulationOptions, Study
from .engines import Engine
from .errors import PkcalcInputError

__all__ = ["StudyFit", "StudyNca", "fit_study", "nca_study", "population_study"]


def _converter(study: Study, units: dict[str, str] | None):
    from .report import UnitConverter

    return UnitConverter(units or study.output or None)


def _subject_failures(study: Study, extra=()) -> list[tuple[str, PkcalcInputError]]:
    return list(study.failures) + [
        (f"subject '{sid}'", PkcalcInputError(reason, item=f"subject '{sid}'"))
        for sid, reason in extra]


class _PerSubject:
    """What every study-level result shares: iteration over the per-subject results,
    one subject by name, and the notebook view (summary and table)."""

    results: list

    def __iter__(self) -> Iterator:
        return iter(self.results)

    def __len__(self) -> int:
        return len(self.results)

    def subject(self, name: str):
        """The result of one subject."""
        return next(r for r in self.results if r.subject == name)

    def _repr_html_(self) -> str:
        return result_html(self.summary(), self.to_frame(), caution=False)


# --------------------------------------------------------------------------- NCA
@dataclass
class StudyNca(_PerSubject):
    """Non-compartmental analysis of every subject of a study.

    Attributes
    ----------
    results : list of NcaResult
    failures : list of (str, PkcalcInputError)
        Subjects left out when the study was read.
    options : NcaOptions
    warnings : list of str
    """

    results: list
    failures: list
    options: NcaOptions
    warnings: list[str] = field(default_factory=list)
    title: str | None = None
    units: dict[str, str] | None = None

    @property
    def settings(self) -> dict[str, str]:
        from .nca import BLQ_RULES

        o = self.options
        return {"auc_method": o.auc_method, "blq": BLQ_RULES[o.blq_rule],
                "times": "hours after the start of the reference dose",
                "regular_doses": f"every gap within the larger of {o.interval_tolerance[0]:.0%} "
                                 f"of the interval and {o.interval_tolerance[1]:g} h; every "
                                 f"infusion within the larger of {o.duration_tolerance[0]:.0%} "
                                 f"and {o.duration_tolerance[1]:g} h of the typical one",
                "intervals": o.interval}

    def document(self, conv=None) -> dict[str, Any]:
        """The ``pkcalc nca --json`` document."""
        from .report import UnitConverter
        from .report.nca import nca_json

        doc = nca_json(self.results, conv or UnitConverter(self.units), title=self.title,
                       failures=self.failures, settings=self.settings,
                       choice=self.options.interval)
        doc["warnings"] = list(self.warnings)
        return doc

    def summary(self, conv=None, colour: bool = False) -> str:
        """The text ``pkcalc nca`` prints (caution first)."""
        from .report import UnitConverter
        from .report.nca import nca_text

        return nca_text(self.results, conv or UnitConverter(self.units), title=self.title,
                        failures=self.failures, warnings=self.warnings,
                        settings=self.settings, colour=colour, choice=self.options.interval)

    def to_frame(self, conv=None):
        """One row per subject: the table ``pkcalc nca --out`` writes (``nca.csv``)."""
        import pandas as pd

        frame = pd.DataFrame(self.document(conv)["subjects"]).drop(columns=["intervals"])
        frame["points_used"] = frame["points_used"].map(lambda xs: " ".join(f"{x:g}" for x in xs))
        for key in ("notes", "assumptions"):
            frame[key] = frame[key].map(" | ".join)
        if any(r.clock_origin for r in self.results):
            frame.insert(1, "first_dose_clock", [r.clock_origin for r in self.results])
        return frame

    def intervals_frame(self, conv=None):
        """One row per dosing interval (the table ``pkcalc nca --out`` writes as
        ``nca-intervals.csv``)."""
        import pandas as pd

        rows = []
        for s in self.document(conv)["subjects"]:
            for d in s["intervals"]:
                rows.append({"subject": s["subject"], **{k: v for k, v in d.items()
                                                         if k not in ("points_used", "notes")},
                             "points_used": " ".join(f"{x:g}" for x in d["points_used"]),
                             "notes": " | ".join(d["notes"])})
        return pd.DataFrame(rows)



def nca_study(study: Study, options: NcaOptions | None = None, *,
              units: dict[str, str] | None = None, **overrides: Any) -> StudyNca:
    """NCA of every subject (see :func:`pkcalc.nca.nca_of_subject`).

    Parameters
    ----------
    study : Study
    options : NcaOptions, optional
        Default: the study file's ``[nca]`` table with ``overrides`` (``auc_method``,
        ``blq``, ``terminal_points``, ``r2_tolerance``, ``extrapolation_limit``).
    units : dict, optional
        Display units for ``summary()``/``to_frame()``.
    """
    from .nca import nca_of_subject
    from .schema import study_nca_options

    opts = options if options is not None else study_nca_options(study, overrides)
    results = [nca_of_subject(s, opts) for s in study.subjects]
    warnings = list(study.warnings)
    unknown = sorted(set(opts.terminal_points) - {s.subject for s in study.subjects})
    if unknown:
        warnings.append(f"terminal points given for unknown subjects: {', '.join(unknown)}")
    return StudyNca(results, list(study.failures), opts, warnings, study.title,
                    units or study.output or None)


# --------------------------------------------------------------------------- fit
@dataclass
class StudyFit(_PerSubject):
    """Individual fits of every subject of a study.

    Attributes
    ----------
    results : list of FitResult
    failures : list of (str, PkcalcInputError)
        Subjects left out when reading or that could not be fitted.
    options : FitOptions
    comparisons : list of Comparison or None
        Fit beside NCA (``options.with_nca``).
    nca : StudyNca or None
    """

    results: list
    failures: list
    options: FitOptions
    comparisons: list | None = None
    nca: StudyNca | None = None
    warnings: list[str] = field(default_factory=list)
    title: str | None = None
    units: dict[str, str] | None = None

    @property
    def adequacy_counts(self) -> dict[str, int] | None:
        """Subjects per adequacy verdict (None when the check was off)."""
        from .fit import adequacy_counts

        return adequacy_counts(self.results)

    @property
    def settings(self) -> dict[str, Any]:
        o = self.options
        out: dict[str, Any] = {"method": o.method, "error_model": o.error_model,
                               "weighting": o.weighting, "blq": o.blq, "intervals": o.ci,
                               "starts": o.starts, "adequacy_check": o.adequacy}
        if o.prior is not None:
            out["prior"] = o.prior.source or "inline"
        return out

    def document(self, conv=None) -> dict[str, Any]:
        """The ``pkcalc fit --json`` document."""
        from .report import UnitConverter
        from .report.fit import fit_json

        doc = fit_json(self.results, conv or UnitConverter(self.units), title=self.title,
                       failures=self.failures, comparisons=self.comparisons,
                       settings=self.settings)
        doc["warnings"] = list(self.warnings)
        return doc

    def summary(self, conv=None, colour: bool = False) -> str:
        """The text ``pkcalc fit`` prints (caution first)."""
        from .report import UnitConverter
        from .report.fit import fit_text

        return fit_text(self.results, conv or UnitConverter(self.units), title=self.title,
                        failures=self.failures, comparisons=self.comparisons,
                        warnings=self.warnings, settings=self.settings, colour=colour)

    def to_frame(self, conv=None):
        """One row per subject with every estimate, SE, RSE, interval and the fit's
        statistics: the table ``pkcalc fit --out`` writes (``fit.csv``)."""
        import pandas as pd

        doc = self.document(conv)
        rows = []
        for d in doc["subjects"]:
            row = {"subject": d["subject"], "converged": d["converged"]}
            for name, e in d["estimates"].items():
                unit = doc["units"][{"half_life": "time"}.get(name, name)]
                for key in ("value", "se", "rse_percent", "ci_low", "ci_high"):
                    suffix = "" if key == "value" else f"_{key}"
                    row[f"{name}{suffix} [{'%' if key == 'rse_percent' else unit}]"] = e[key]
            row.update({k: d[k] for k in ("objective", "aic", "bic", "n_obs", "n_blq",
                                          "starts", "starts_agreed")})
            a = d["adequacy"]
            if a is not None:
                row.update({"one_compartment": a["verdict"], "adequacy_delta_aic":
                            a["delta_aic"], "adequacy_lrt_p": a["likelihood_ratio_p"],
                            "adequacy_runs_p": a["runs_test_p"],
                            "adequacy_trend_p": a["trend_test_p"],
                            f"earliest_sampling_after_infusion [{doc['units']['time']}]":
                            a["earliest_sampling_after_infusion"]})
            row["warnings"] = " | ".join(d["warnings"])
            rows.append(row)
        frame = pd.DataFrame(rows)
        if any(r.clock_origin for r in self.results):
            frame.insert(1, "first_dose_clock", [r.clock_origin for r in self.results])
        return frame

    def levels_frame(self):
        """Every level with its prediction and residuals (``fit-levels.csv``)."""
        import pandas as pd

        return pd.concat([r.to_frame() for r in self.results], ignore_index=True)



def fit_study(study: Study, options: FitOptions | None = None, *,
              units: dict[str, str] | None = None, **overrides: Any) -> StudyFit:
    """Fit every subject of a study (see :func:`pkcalc.fit.fit_subjects`).

    Parameters
    ----------
    study : Study
    options : FitOptions, optional
        Default: the study file's ``[fit]`` table with ``overrides`` (``weighting``,
        ``error_model``, ``blq``, ``ci``, ``prior``, ``starts``, ``with_nca``,
        ``nca_threshold``).
    units : dict, optional

    Raises
    ------
    PkcalcInputError
        When no subject could be fitted.
    """
    from .fit import check_adequacy, compare_with_nca, fit_subjects
    from .schema import study_fit_options

    opts = options if options is not None else study_fit_options(study, overrides)
    results, unfit = fit_subjects(study.subjects, opts)
    failures = _subject_failures(study, unfit)
    if not results:
        raise PkcalcInputError([p for _, err in failures for p in err.problems]
                               or "no subject could be fitted")
    if opts.adequacy:
        found = check_adequacy(study.subjects, results, opts)
        for r in results:
            r.adequacy = found.get(r.subject)
    nca = comparisons = None
    if opts.with_nca:
        nca = nca_study(study, units=units)  # the study's [nca] options, as `pkcalc nca`
        comparisons = compare_with_nca(results, nca.results, opts.nca_threshold,
                                       nca.options.extrapolation_limit)
    return StudyFit(results, failures, opts, comparisons, nca, list(study.warnings),
                    study.title, units or study.output or None)


# --------------------------------------------------------------------------- population
def population_study(study: Study, options: PopulationOptions | None = None, *,
                     progress: Callable[[str], None] | None = None,
                     engine: Engine | None = None, **overrides: Any):
    """Population estimates of a study: maximum marginal likelihood (default; Laplace
    or adaptive quadrature, with a covariance step, covariate effects, model
    comparison and stepwise selection), or the standard / iterative two-stage
    methods; bootstrap standard errors when ``options.bootstrap`` > 0.

    Parameters
    ----------
    study : Study
    options : PopulationOptions, optional
        Default: the study file's ``[population]`` table with ``overrides``.
    progress : callable, optional
        Receives a line of text per iteration or bootstrap replicate (the command
        line prints them on a terminal).
    engine : Engine, optional
        Where the bootstrap replicates run (:mod:`pkcalc.engines`; default this
        process).  The result does not depend on it.

    Returns
    -------
    PopulationResult
        With ``failures`` naming subjects left out (reading and fitting) and, for a
        comparison, ``comparison`` (every model) -- the result is then the selected
        model (stepwise) or the one with the lowest AIC.

    Raises
    ------
    PkcalcInputError
        When too few subjects remain or the model cannot be estimated (the
        subjects left out are named first).
    """
    from .schema import study_population_options

    o = options if options is not None else study_population_options(study, overrides)
    try:
        result = _population_estimate(study, o, progress)
    except ValueError as exc:
        raise PkcalcInputError([p for _, err in study.failures for p in err.problems]
                               + PkcalcInputError(str(exc), file=study.files[0] if study.files
                                                  else None).problems) from None
    if o.adequacy:
        from .fit import check_adequacy

        found = check_adequacy(study.subjects, result.subjects,
                               FitOptions(error_model=o.error_model, blq=o.blq))
        for r in result.subjects:
            r.adequacy = found.get(r.subject)
    if o.bootstrap:
        _population_bootstrap(study, o, result, progress, engine)
    elif result.method == "iterative":
        result.notes.append("standard errors of the typical values from the linearised "
                            "information, each subject's posterior covariance included (run "
                            "--bootstrap N for bootstrap intervals)")
    return result


def _population_estimate(study: Study, o: PopulationOptions, progress):
    """The estimate of the chosen method (marginal falls back to the iterative two-stage
    method, with a warning, when it does not converge and no effect needs it)."""
    from .population import iterative_two_stage, two_stage
    from .population.compare import compare_models, stepwise
    from .population.estimate import individual_estimates, marginal_estimate, usable_subjects

    if o.method == "two-stage":
        return two_stage(study.subjects, FitOptions(error_model=o.error_model, blq=o.blq),
                         covariate=o.covariate, reference_weight=o.reference_weight)
    if o.method == "iterative":
        return iterative_two_stage(study.subjects, error_model=o.error_model,
                                   covariate=o.covariate, reference_weight=o.reference_weight,
                                   blq=o.blq)
    if o.models or o.stepwise:
        comparison = (stepwise(study.subjects, o, o.stepwise, progress=progress) if o.stepwise
                      else compare_models(study.subjects, o, o.models, progress=progress))
        best = comparison.best()
        if best is None:
            raise ValueError("no model of the comparison could be estimated: " + "; ".join(
                f"{r.name}: {r.error}" for r in comparison.rows if r.error))
        result = best.result
        individual_estimates(result, usable_subjects(study.subjects, o)[0], o)
        result.comparison = comparison
        result.notes.insert(0, f"reported model: '{best.name}' ("
                            + ("selected stepwise" if o.stepwise else "lowest AIC") + ")")
        result.failures += [(f"model '{r.name}'", r.error) for r in comparison.failed]
        result.failures += [(f"model '{r.name}'", _model_trouble(r.result))
                            for r in comparison.rows
                            if r.result is not None and _model_trouble(r.result)]
        return result
    result = marginal_estimate(study.subjects, o, progress=progress)
    if not result.converged and not o.effects:
        fallback = iterative_two_stage(study.subjects, error_model=o.error_model,
                                       covariate=o.covariate,
                                       reference_weight=o.reference_weight, blq=o.blq)
        fallback.warnings.append("the marginal-likelihood estimate did not converge ("
                                 + "; ".join(result.warnings) + "): the iterative two-stage "
                                 "estimate is reported instead")
        return fallback
    return result


def _model_trouble(result) -> str:
    """Why a compared model's numbers are not to be trusted ('' when they are)."""
    if not result.converged:
        return "did not converge: " + "; ".join(result.warnings)
    if result.parameters and all(p["se"] is None for p in result.parameters):
        return "no standard errors: " + "; ".join(result.warnings)
    return ""


def _population_bootstrap(study: Study, o: PopulationOptions, result, progress,
                          engine: Engine | None) -> None:
    """Bootstrap over subjects: SEs and percentile intervals of the typical values."""
    from functools import partial

    from .population import bootstrap
    from .population.estimate import marginal_estimate

    estimate = None
    if result.method == "marginal":
        model = PopulationModel(result.model_name, tuple(result.model_effects))
        # a partial of a module-level function: worker processes can run it
        estimate = partial(marginal_estimate, options=o, pmodel=model, start=result,
                           final_fits=False, covariance=False)
    result.bootstrap.update(bootstrap(
        study.subjects, result, o.bootstrap, o.seed, progress=progress, estimate=estimate,
        engine=engine, error_model=o.error_model, covariate=o.covariate,
        reference_weight=o.reference_weight, blq=o.blq))
    for k in ("clearance", "volume"):
        b = result.bootstrap.get(k)
        if isinstance(b, dict):
            result.typical_se[k] = b["se"]
            result.typical_ci[k] = (b["ci_low"], b["ci_high"])
    result.notes.append(f"standard errors and 95 % intervals of the typical values from "
                        f"{o.bootstrap} bootstrap replicates over subjects (seed {o.seed})")


# --------------------------------------------------------------------------- sampling
@dataclass
class SamplingFile:
    """The sampling designs of a scenario file.

    Attributes
    ----------
    results : list of SamplingResult
        One per scenario with a usable ``[scenarios.sampling]`` table.
    failures : list of (str, PkcalcInputError)
        Scenarios that could not be designed, with their problems.
    title : str or None
    units : dict
        The file's display units (``[output]``).
    """

    results: list[Any]
    failures: list[tuple[str, PkcalcInputError]]
    title: str | None = None
    units: dict[str, str] = field(default_factory=dict)

    def summary(self) -> str:
        from ._format import with_caution

        return with_caution("\n\n".join(r.summary(caution=False) for r in self.results))

    def to_frame(self):
        import pandas as pd

        frames = []
        for r in self.results:
            f = r.to_frame()
            f.insert(0, "scenario", r.problem.name)
            frames.append(f)
        return pd.concat(frames, ignore_index=True)

    def _repr_html_(self) -> str:
        return result_html(self.summary(), self.to_frame(), caution=False)


def sampling_file(path, *, simulate: int = 0, seed: int = 1, engine: Engine | None = None,
                  refit: str | None = None, starts: int = 12,
                  progress: Callable[[str], None] | None = None) -> SamplingFile:
    """Sampling-time designs of every scenario of ``path`` that has a
    ``[scenarios.sampling]`` table (docs/formats.md), optionally proven by ``simulate``
    replicates per design (see :func:`pkcalc.sampling.design_sampling`).

    Raises
    ------
    PkcalcInputError
        When the file is unusable or no scenario could be designed.
    """
    from dataclasses import replace

    from .sampling import design_sampling
    from .schema.sampling import load_sampling_file, sampling_problem

    sfile = load_sampling_file(path)
    results, failures = [], list(sfile.failures)
    for s in sfile.scenarios:
        label = f"scenario '{s.name}'"
        try:
            problem = sampling_problem(s, starts=starts)
            results.append(design_sampling(problem, simulate=simulate, seed=seed,
                                           engine=engine, refit=refit, progress=progress))
        except PkcalcInputError as exc:
            failures.append((label, PkcalcInputError(
                [replace(p, file=p.file or str(path), item=p.item or label)
                 for p in exc.problems])))
        except ValueError as exc:  # a core type refused a combination
            failures.append((label, PkcalcInputError(str(exc), file=str(path), item=label)))
    if not results:
        raise PkcalcInputError([p for _, err in failures for p in err.problems])
    return SamplingFile(results, failures, sfile.title, sfile.output.units())
