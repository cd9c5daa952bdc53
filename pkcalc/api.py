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
from .core import FitOptions, NcaOptions, PopulationOptions, Study
from .engines import Engine
from .errors import PkcalcInputError
from .population import PopulationResult

__all__ = ["StudyFit", "StudyNca", "StudyPopulation", "fit_study", "nca_study", "plot",
           "population_study"]

_STUDY_EXPECTED = ("a Study (pkcalc.load_study, load_study_file or load_sdtm), a study "
                   "file path, or levels= and doses= tables (paths, file-like objects or "
                   "pandas DataFrames; subjects= optional)")


def _as_study(study, levels=None, doses=None, subjects=None) -> Study:
    """The study of an entry point: a Study, a study file, or tables in memory or on
    disk (read by :func:`pkcalc.schema.load_study`, the rules of the CSV files)."""
    from pathlib import Path

    tables = (levels, doses, subjects)
    if study is not None and any(t is not None for t in tables):
        raise PkcalcInputError("give a study or levels=/doses= tables, not both",
                               field="study", expected=_STUDY_EXPECTED)
    if study is None:
        if levels is None or doses is None:
            raise PkcalcInputError("no study given", field="study", expected=_STUDY_EXPECTED)
        from .schema import load_study

        return load_study(levels, doses, subjects)
    if isinstance(study, Study):
        return study
    if isinstance(study, str | Path):
        from .schema import load_study_file

        return load_study_file(study)
    raise PkcalcInputError(f"got {type(study).__name__}", field="study",
                           expected=_STUDY_EXPECTED)


def _options(options, kind: type, name: str):
    if options is not None and not isinstance(options, kind):
        raise PkcalcInputError(f"got {type(options).__name__}", field="options",
                               expected=f"a pkcalc.core.{kind.__name__} or None ({name} "
                                        "options may also be given as keywords)")
    return options


def _converter(study: Study, units: dict[str, str] | None):
    from .report import UnitConverter

    return UnitConverter(units or study.output or None)


def _subject_failures(study: Study, extra=()) -> list[tuple[str, PkcalcInputError]]:
    return list(study.failures) + [
        (f"subject '{sid}'", PkcalcInputError(reason, item=f"subject '{sid}'"))
        for sid, reason in extra]


def _with_units(fields, conv) -> dict[str, str]:
    """Column headers with their display unit: ``clearance [L/h]``, percentages
    ``auc_extrapolated_percent [%]`` (as in fit.csv); plain numbers keep their name."""
    out = {k: f"{k} [{conv.unit(kind)}]" for k, kind in fields if kind is not None}
    out.update({k: f"{k} [%]" for k, kind in fields if kind is None and k.endswith("_percent")})
    return out


def _find_subject(results, name: str, failures=()):
    """The result of subject ``name``, or an error that lists the subjects."""
    for r in results:
        if r.subject == name:
            return r
    names = [r.subject for r in results]
    shown = ", ".join(names[:20]) + (f" and {len(names) - 20} more" if len(names) > 20
                                     else "")
    left = any(label == f"subject '{name}'" for label, _ in failures)
    why = " (it was left out: see failures)" if left else ""
    raise PkcalcInputError(f"no result for subject '{name}'{why}", field="subject",
                           expected=f"one of {shown}")


class _PerSubject:
    """What every study-level result shares: iteration over the per-subject results,
    one subject by name, and the notebook view (summary and table)."""

    results: list

    def __iter__(self) -> Iterator:
        return iter(self.results)

    def __len__(self) -> int:
        return len(self.results)

    def subject(self, name: str):
        """The result of one subject.

        Raises
        ------
        PkcalcInputError
            When no subject of the results has that name (the message lists them).
        """
        return _find_subject(self.results, name, getattr(self, "failures", []))

    def _one(self, subject: str | None):
        if subject is None:
            if len(self.results) != 1:
                raise PkcalcInputError("name the subject to draw", field="subject",
                                       expected="one of " + ", ".join(
                                           r.subject for r in self.results[:20]))
            return self.results[0]
        return self.subject(subject)

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

        from .report import UnitConverter
        from .report.nca import NCA_FIELDS

        conv = conv or UnitConverter(self.units)
        frame = pd.DataFrame(self.document(conv)["subjects"]).drop(columns=["intervals"])
        frame["points_used"] = frame["points_used"].map(lambda xs: " ".join(f"{x:g}" for x in xs))
        for key in ("notes", "assumptions"):
            frame[key] = frame[key].map(" | ".join)
        if any(r.clock_origin for r in self.results):
            frame.insert(1, "first_dose_clock", [r.clock_origin for r in self.results])
        fields = (*NCA_FIELDS, ("dose", "amount"), ("infusion_time", "time"),
                  ("interval", "time"))
        return frame.rename(columns=_with_units(fields, conv))

    def plot(self, subject: str | None = None, conv=None):
        """The figure ``pkcalc nca --out`` writes for ``subject`` (the only subject when
        there is one): the levels, the terminal phase and its fit."""
        from .plots import nca_figure
        from .report import UnitConverter

        return nca_figure(self._one(subject), conv or UnitConverter(self.units))

    def intervals_frame(self, conv=None):
        """One row per dosing interval (the table ``pkcalc nca --out`` writes as
        ``nca-intervals.csv``)."""
        import pandas as pd

        from .report import UnitConverter
        from .report.nca import INTERVAL_FIELDS

        conv = conv or UnitConverter(self.units)
        rows = []
        for s in self.document(conv)["subjects"]:
            for d in s["intervals"]:
                rows.append({"subject": s["subject"], **{k: v for k, v in d.items()
                                                         if k not in ("points_used", "notes")},
                             "points_used": " ".join(f"{x:g}" for x in d["points_used"]),
                             "notes": " | ".join(d["notes"])})
        fields = (*INTERVAL_FIELDS, ("start", "time"), ("dose", "amount"),
                  ("infusion_time", "time"), ("length", "time"))
        return pd.DataFrame(rows).rename(columns=_with_units(fields, conv))



def nca_study(study=None, options: NcaOptions | None = None, *, levels=None, doses=None,
              subjects=None, units: dict[str, str] | None = None,
              **overrides: Any) -> StudyNca:
    """NCA of every subject (see :func:`pkcalc.nca.nca_of_subject`).

    Parameters
    ----------
    study : Study or path, optional
        A study (:func:`pkcalc.load_study`, :func:`pkcalc.load_study_file`,
        :func:`pkcalc.schema.load_sdtm`) or a study file; or give the tables instead:
    levels, doses, subjects : path, file-like or pandas.DataFrame, optional
        The study tables with the column rules and unit headers of the CSV files
        (docs/formats.md); messages name the frame and its row.
    options : NcaOptions, optional
        Default: the study file's ``[nca]`` table with ``overrides``.
    units : dict, optional
        Display units for ``summary()``/``to_frame()`` (kind -> unit, e.g.
        ``{"concentration": "ng/mL"}``).
    **overrides
        The ``[nca]`` keys (docs/formats.md, "NCA options"):

        - ``auc_method``: ``"linear_up_log_down"`` (default) or ``"linear"``;
        - ``blq``: ``"leading_zero"`` (default), ``"zero"`` or ``"drop"``;
        - ``terminal_points``: subject -> list of times (with units, ``"12 h"``);
        - ``slope_tolerance``: the terminal slope takes the longest tail whose adjusted R²
          is at most this below the best tail's (default 1e-4; ``r2_tolerance`` is the
          former name);
        - ``extrapolation_limit``: percent of AUC∞ extrapolated above which AUC∞ is
          flagged (default 20);
        - ``interval``: ``"each"`` (default), ``"first"``, ``"last"`` or a dose number;
        - ``interval_tolerance``: ``"10%,1 h"`` (default; the larger applies);
        - ``duration_tolerance``: ``"10%,15 min"`` (default).

    Returns
    -------
    StudyNca
    """
    from .nca import nca_of_subject
    from .schema import study_nca_options

    study = _as_study(study, levels, doses, subjects)
    opts = _options(options, NcaOptions, "NCA") or study_nca_options(study, overrides)
    _check_terminal_points(study, opts)
    results = [nca_of_subject(s, opts) for s in study.subjects]
    warnings = list(study.warnings)
    return StudyNca(results, list(study.failures), opts, warnings, study.title,
                    units or study.output or None)


def _check_terminal_points(study: Study, opts: NcaOptions) -> None:
    """Terminal points chosen by hand name a subject of the study and its level times
    (hours after its first dose, to 1e-6 h); nothing chosen is ignored silently."""
    import numpy as np

    problems = []
    by = {s.subject: s for s in study.subjects}
    left = {label for label, _ in study.failures}
    for sid, times in sorted(opts.terminal_points.items()):
        s = by.get(sid)
        if s is None:
            why = "was left out (see its problems)" if f"subject '{sid}'" in left else \
                "is not in the study"
            problems.append(PkcalcInputError(
                f"terminal points for subject '{sid}', which {why}",
                field="--terminal (terminal_points)",
                expected="one of " + ", ".join(list(by)[:20])).problems[0])
            continue
        missing = [t for t in times if not np.any(np.abs(s.time - t) <= 1e-6)]
        if missing:
            shown = ", ".join(f"{t:g}" for t in s.time[:30])
            problems.append(PkcalcInputError(
                f"subject '{sid}' has no level at {', '.join(f'{t:g}' for t in missing)} h",
                field="--terminal (terminal_points)",
                expected=f"times of its levels (hours after its first dose): {shown}"
            ).problems[0])
    if problems:
        raise PkcalcInputError(problems)


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
            row.update({k: d[k] for k in ("objective", "aic", "bic", "n_levels", "n_blq",
                                          "starts", "starts_agreed")})
            a = d["adequacy"]
            if a is not None:
                row.update({"one_compartment": a["verdict"], "adequacy_delta_aic":
                            a["delta_aic"],
                            "adequacy_likelihood_ratio_p": a["likelihood_ratio_p"],
                            "adequacy_runs_test_p": a["runs_test_p"],
                            "adequacy_trend_test_p": a["trend_test_p"],
                            f"earliest_sampling_after_infusion [{doc['units']['time']}]":
                            a["earliest_sampling_after_infusion"]})
            row["warnings"] = " | ".join(d["warnings"])
            rows.append(row)
        frame = pd.DataFrame(rows)
        if any(r.clock_origin for r in self.results):
            frame.insert(1, "first_dose_clock", [r.clock_origin for r in self.results])
        return frame

    def plot(self, subject: str | None = None, conv=None):
        """The figure ``pkcalc fit --out`` writes: the diagnostics of every subject
        (``diagnostics.png``), or one subject's levels and fitted course."""
        from .plots import diagnostics_figure, fit_figure
        from .report import UnitConverter

        conv = conv or UnitConverter(self.units)
        if subject is None:
            return diagnostics_figure(self.results, conv)
        return fit_figure(self.subject(subject), conv)

    def levels_frame(self):
        """Every level with its prediction and residuals (``fit-levels.csv``)."""
        import pandas as pd

        return pd.concat([r.to_frame() for r in self.results], ignore_index=True)



def fit_study(study=None, options: FitOptions | None = None, *, levels=None, doses=None,
              subjects=None, units: dict[str, str] | None = None,
              **overrides: Any) -> StudyFit:
    """Fit every subject of a study (see :func:`pkcalc.fit.fit_subjects`).

    Parameters
    ----------
    study : Study or path, optional
        A study (:func:`pkcalc.load_study`, :func:`pkcalc.load_study_file`,
        :func:`pkcalc.schema.load_sdtm`) or a study file; or give the tables instead:
    levels, doses, subjects : path, file-like or pandas.DataFrame, optional
        The study tables with the column rules and unit headers of the CSV files.
    options : FitOptions, optional
        Default: the study file's ``[fit]`` table with ``overrides``.
    units : dict, optional
        Display units for ``summary()``/``to_frame()``.
    **overrides
        The ``[fit]`` keys (docs/formats.md):

        - ``error_model``: ``"proportional"`` (default), ``"additive"`` or
          ``"combined"`` -- maximum likelihood; or instead
        - ``weighting``: ``"uniform"``, ``"inverse_observed"``,
          ``"inverse_observed_squared"`` or ``"inverse_predicted_squared"`` -- least
          squares;
        - ``blq``: ``"likelihood"`` (Beal's M3; default with an error model),
          ``"drop"`` (default with a weighting) or ``"half_lloq"``;
        - ``ci``: ``"wald"`` (default) or ``"profile"``;
        - ``prior``: a prior file path or a table (clearance, volume with units, CVs)
          -- MAP estimation;
        - ``starts``: starting points of the multi-start search (1-20, default 3);
        - ``with_nca``: compare with NCA (default False);
        - ``nca_threshold``: percent disagreement flagged (default 20);
        - ``adequacy``: the one-compartment adequacy check (default True).

    Returns
    -------
    StudyFit

    Raises
    ------
    PkcalcInputError
        When no subject could be fitted.
    """
    from .fit import check_adequacy, compare_with_nca, fit_subjects
    from .schema import study_fit_options

    study = _as_study(study, levels, doses, subjects)
    opts = _options(options, FitOptions, "fit") or study_fit_options(study, overrides)
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
@dataclass
class StudyPopulation(PopulationResult):
    """A population estimate of a study: every attribute and method of
    :class:`~pkcalc.population.PopulationResult` (``params``, ``bse``, ``conf_int()``,
    ``cov_params()``, ``pvalues``, ``predict()``, ``individual_parameters()``,
    ``to_prior()``, ``comparison``) plus the study's context, so that ``summary()`` and
    ``document()`` are what ``pkcalc population`` prints and writes.

    Attributes
    ----------
    options : PopulationOptions
    study_failures : list of (str, PkcalcInputError)
        Subjects left out when the study was read.
    study_warnings : list of str
    title : str or None
    display_units : dict or None
        Display units of ``summary()`` and ``document()`` (canonical otherwise).
    used_subjects : list of SubjectData
        The subjects the estimate used (for ``plot()``).
    """

    options: PopulationOptions | None = None
    study_failures: list = field(default_factory=list)
    study_warnings: list[str] = field(default_factory=list)
    title: str | None = None
    display_units: dict[str, str] | None = None
    used_subjects: list = field(default_factory=list)

    @classmethod
    def of(cls, result: PopulationResult, study: Study, options: PopulationOptions,
           units: dict[str, str] | None = None) -> StudyPopulation:
        from dataclasses import fields

        base = {f.name: getattr(result, f.name) for f in fields(PopulationResult)}
        fitted = {r.subject for r in result.subjects}
        return cls(**base, options=options, study_failures=list(study.failures),
                   study_warnings=list(study.warnings), title=study.title,
                   display_units=units or study.output or None,
                   used_subjects=[s for s in study.subjects if s.subject in fitted])

    @property
    def all_failures(self) -> list[tuple[str, PkcalcInputError]]:
        """Subjects left out when reading and when estimating, with their problems."""
        return list(self.study_failures) + [
            (f"subject '{sid}'", PkcalcInputError(str(reason), item=f"subject '{sid}'"))
            for sid, reason in self.failures]

    @property
    def settings(self) -> dict[str, Any]:
        o = self.options or PopulationOptions()
        # what the model held: the weight model's reference only when there is one, and
        # the effects as estimated (with the reference values taken from the data)
        ref = f"{o.reference_weight:g} kg" if o.covariate != "none" else \
            "not used (no weight model)"
        out: dict[str, Any] = {"method": o.method, "error_model": o.error_model,
                               "blq": o.blq, "weight_model": o.covariate,
                               "reference_weight": ref, "adequacy_check": o.adequacy}
        if o.method == "marginal":
            held = [e["effect"] for e in self.effects if e.get("effect")] if self.effects \
                else [e.label for e in o.effects]
            out.update({"nodes": o.nodes, "between_subject": o.between_subject,
                        "effects": "; ".join(dict.fromkeys(held)) or "none"})
        return out

    def document(self, conv=None) -> dict[str, Any]:
        """The ``pkcalc population --json`` document."""
        from .report import UnitConverter
        from .report.population import population_json

        doc = population_json(self, conv or UnitConverter(self.display_units),
                              title=self.title, failures=self.all_failures,
                              settings=self.settings)
        doc["warnings"] = list(self.study_warnings) + list(self.warnings)
        return doc

    def summary(self, conv=None, colour: bool = False, caution: bool = True) -> str:
        """The text ``pkcalc population`` prints (caution first, display units)."""
        from .report import UnitConverter
        from .report.population import population_text

        text = population_text(self, conv or UnitConverter(self.display_units),
                               title=self.title, failures=self.all_failures,
                               settings=self.settings, colour=colour)
        return text if caution else text.split("\n\n", 1)[-1]

    def _repr_html_(self) -> str:
        return result_html(self.summary(), self.to_frame(), caution=False)

    def plot(self, subject: str | None = None, conv=None):
        """The diagnostics figure ``pkcalc population --out`` writes (observed against
        population and individual predictions), or one subject's fit."""
        from .plots import fit_figure, population_figure
        from .report import UnitConverter

        conv = conv or UnitConverter(self.display_units)
        if subject is not None:
            return fit_figure(_find_subject(self.subjects, subject, self.all_failures), conv)
        return population_figure(self, self.used_subjects, conv)


def population_study(study=None, options: PopulationOptions | None = None, *,
                     levels=None, doses=None, subjects=None,
                     units: dict[str, str] | None = None,
                     progress: Callable[[str], None] | None = None,
                     engine: Engine | None = None, **overrides: Any) -> StudyPopulation:
    """Population estimates of a study: maximum marginal likelihood (default; Laplace
    or adaptive quadrature, with standard errors, covariate effects, model
    comparison and stepwise selection), or the standard / iterative two-stage
    methods; bootstrap standard errors when ``bootstrap`` > 0.

    Parameters
    ----------
    study : Study or path, optional
        A study or a study file; or give the tables instead:
    levels, doses, subjects : path, file-like or pandas.DataFrame, optional
        The study tables (covariates in the subjects table, any column name).
    options : PopulationOptions, optional
        Default: the study file's ``[population]`` table with ``overrides``.
    units : dict, optional
        Display units of ``summary()`` and ``document()``.
    progress : callable, optional
        Receives a line of text per iteration or bootstrap replicate (the command
        line prints them on a terminal).
    engine : Engine, optional
        Where the work runs (:mod:`pkcalc.engines`; default this process): with the
        marginal method and a Dask engine, each worker holds a share of the subjects
        for every estimate; bootstrap replicates run on the engine (local worker
        processes or Dask).  The result does not depend on it.
    **overrides
        The ``[population]`` keys (docs/formats.md, "Population options"):

        - ``method``: ``"marginal"`` (default), ``"iterative"`` or ``"two_stage"``;
        - ``error_model``: ``"proportional"`` (default), ``"additive"``, ``"combined"``;
        - ``blq``: ``"likelihood"`` (default, Beal's M3), ``"drop"``, ``"half_lloq"``;
        - ``covariate``: body-weight model ``"none"`` (default), ``"allometric"``
          (exponents 0.75 and 1), ``"estimated"`` or ``"per_kg"``;
        - ``reference_weight``: ``"70 kg"`` (default; a weight with its unit);
        - ``effects``: a list of effects in words, e.g. ``["weight on clearance",
          "sex on volume", "age on clearance linear around 40"]``;
        - ``models``: models to compare, ``{"base": [], "sex": ["sex on
          clearance"]}`` (or a list of :class:`~pkcalc.core.PopulationModel`);
        - ``stepwise``: ``{"candidates": [...], "add_if_p_below": 0.05,
          "remove_if_p_above": 0.01}``;
        - ``nodes``: Gauss-Hermite nodes per dimension, 1 (Laplace, default) to 31;
        - ``between_subject``: ``"full"`` (default) or ``"diagonal"``;
        - ``bootstrap``: replicates (default 0), ``seed`` (default 1);
        - ``vpc_replicates``: simulated studies of the command line's VPC (200);
        - ``adequacy``: the one-compartment adequacy check (default True).

    Returns
    -------
    StudyPopulation
        With ``failures`` naming subjects left out (reading and fitting) and, for a
        comparison, ``comparison`` (every model) -- the result is then the selected
        model (stepwise) or the one with the lowest AIC.

    Raises
    ------
    PkcalcInputError
        When too few subjects remain or the model cannot be estimated (the
        subjects left out are named first).
    """
    from .population.covariates import CovariateError
    from .population.run import population_bootstrap, population_estimate
    from .schema import study_population_options

    study = _as_study(study, levels, doses, subjects)
    o = _options(options, PopulationOptions, "population") or \
        study_population_options(study, overrides)
    try:
        result = population_estimate(study.subjects, o, progress, engine)
    except ValueError as exc:
        where = (study.subjects_file or "the subjects table") \
            if isinstance(exc, CovariateError) else (study.files[0] if study.files else None)
        raise PkcalcInputError([p for _, err in study.failures for p in err.problems]
                               + PkcalcInputError(str(exc), file=where).problems) from None
    if o.adequacy:
        from .fit import check_adequacy

        found = check_adequacy(study.subjects, result.subjects,
                               FitOptions(error_model=o.error_model, blq=o.blq))
        for r in result.subjects:
            r.adequacy = found.get(r.subject)
    if o.bootstrap:
        population_bootstrap(study.subjects, o, result, progress, engine)
    elif result.method == "iterative":
        result.notes.append("standard errors of the typical values from the linearised "
                            "information, each subject's posterior covariance included (run "
                            "--bootstrap N for bootstrap intervals)")
    return StudyPopulation.of(result, study, o, units)


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

    def plot(self, scenario: str | None = None, conv=None):
        """The figure ``pkcalc sampling --out`` writes for ``scenario`` (the first
        without)."""
        from .plots import sampling_figure
        from .report import UnitConverter

        names = [r.problem.name for r in self.results]
        if scenario is not None and scenario not in names:
            raise PkcalcInputError(f"no design for scenario '{scenario}'", field="scenario",
                                   expected="one of " + ", ".join(names))
        one = self.results[names.index(scenario) if scenario is not None else 0]
        return sampling_figure(one, conv or UnitConverter(self.units))


def plot(result, conv=None):
    """The figure the command line writes for any result: a prediction's profile, a
    design's course, one subject's fit or NCA, a sampling design, or a study-level
    result's own ``plot()``.

    Parameters
    ----------
    result
        A result object of pkcalc.
    conv : UnitConverter, optional
        Display units (canonical by default).

    Returns
    -------
    matplotlib.figure.Figure or None
        None when the result has nothing to draw (a design without a course).
    """
    from . import plots
    from .design import DesignResult
    from .fit import FitResult
    from .nca import NcaResult
    from .population.attainment import PopulationAttainment
    from .predict import ScenarioPrediction
    from .report import UnitConverter
    from .sampling import SamplingResult

    if hasattr(result, "plot") and callable(result.plot):
        return result.plot(conv=conv) if conv is not None else result.plot()
    conv = conv or UnitConverter()
    drawers = ((ScenarioPrediction, plots.profile_figure), (DesignResult, plots.design_figure),
               (FitResult, plots.fit_figure), (NcaResult, plots.nca_figure),
               (SamplingResult, plots.sampling_figure),
               (PopulationAttainment, plots.attainment_figure))
    for kind, draw in drawers:
        if isinstance(result, kind):
            return draw(result, conv)
    raise PkcalcInputError(f"got {type(result).__name__}", field="result",
                           expected="a result object of pkcalc (a prediction, design, fit, "
                                    "NCA, population or sampling result)")


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


# --------------------------------------------------------------------------- attainment
def _bands(values, column: str, edges: list[float]):
    """Band index of each value and the band names (``crcl < 30``, ``crcl 30-60`` ...)."""
    import itertools

    import numpy as np

    values = np.asarray(values)
    if values.dtype == object or not np.all(np.isfinite(values.astype(float))):
        raise PkcalcInputError(f"column '{column}' needs a number in every row for bands",
                               field="bands", expected="numbers in the column's own unit")
    from ._format import short

    names = [f"{column} < {short(edges[0])}"]
    names += [f"{column} {short(a)}-{short(b)}" for a, b in itertools.pairwise(edges)]
    names.append(f"{column} >= {short(edges[-1])}")
    return np.digitize(values.astype(float), edges), tuple(names)


def population_attainment(source=None, *, subjects=None, doses=(), intervals=(),
                          infusion_time: float = 0.0, rates=(), peak=None, trough=None,
                          auc_24=None, window=None, attainment_level: float = 0.9,
                          bands: tuple[str, list[float]] | None = None,
                          patients: int = 100_000, seed: int = 1,
                          engine: Engine | None = None, progress=None):
    """The share of a population reaching each target on each regimen of a grid.

    Parameters
    ----------
    source : PopulationResult, StudyPopulation or Prior, optional
        Where the patients' typical values and between-subject variability come from
        (a population result with its covariate model, or a prior).  None: the
        ``subjects`` table gives each patient's own ``clearance`` and ``volume``.
    subjects : path, file-like or DataFrame, optional
        Real or virtual patients: covariates (resampled for virtual patients; a weight
        for a per-kg prior), or ``clearance [..]`` and ``volume [..]`` columns.
    doses, intervals : sequences of float, mg and h
        The grid of repeated infusions of ``infusion_time`` h (every dose at every
        interval); or ``rates`` (mg/h) for continuous infusions.  Amounts of drug.
    peak, trough, auc_24, window : (low, high), optional
        Targets at steady state (mg/L; AUC24 in mg h/L; ``window`` the plateau of a
        continuous infusion); either end may be None.
    attainment_level : float
        The share the lowest dose of each interval must reach (reported per band).
    bands : (column, edges), optional
        Covariate bands of a ``subjects`` column (edges in the column's unit).
    patients, seed : int
        Virtual patients drawn (seeded; the same patients meet every regimen).
    engine : Engine, optional
        Where the pieces of 100,000 patients run (local, processes, Dask); the numbers
        do not depend on it.

    Returns
    -------
    PopulationAttainment
        ``fraction`` by band and regimen, ``monte_carlo_se()``, ``lowest()``,
        ``to_frame()``, ``summary()`` and ``plot()`` through :func:`pkcalc.plot`.
    """
    import math

    import numpy as np

    from .core import Prior
    from .population.attainment import (
        AttainmentRegimen,
        AttainmentTargets,
        PatientSource,
    )
    from .population.attainment import population_attainment as compute
    from .schema.attainment import patient_table

    table = patient_table(subjects) if subjects is not None else None
    n_rows = table["n"] if table is not None else 1
    columns = {k: v for k, v in (table or {}).items() if k not in ("n", "file")}
    if source is None:
        if table is None or "clearance" not in table or "volume" not in table:
            raise PkcalcInputError("without a population or a prior the subjects table must "
                                   "give each patient's clearance and volume",
                                   field="subjects",
                                   expected="columns 'clearance [L/h]' and 'volume [L]'")
        ln_mean = np.log(np.column_stack([table["clearance"], table["volume"]]))
        omega, what = None, f"{n_rows:,} patients with their own clearance and volume"
    elif isinstance(source, Prior):
        weights = table.get("weight") if table is not None else None
        if (source.clearance_per_kg or source.volume_per_kg) and weights is None:
            raise PkcalcInputError("the prior is per kg: the subjects table needs a weight "
                                   "column", field="subjects", expected="weight [kg]")
        if weights is None:
            ln_mean = np.log([[source.clearance, source.volume]] * n_rows)
        else:
            ln_mean = np.log([source.typical(float(w)) for w in weights])
        oc, ov, r = source.omega_clearance, source.omega_volume, source.correlation
        omega = np.array([[oc**2, r * oc * ov], [r * oc * ov, ov**2]])
        what = f"virtual patients from the prior ({source.source or 'inline'})"
    elif isinstance(source, PopulationResult):
        from .population.patient import _mean_function

        design, beta, _ = _mean_function(source)
        names = list(columns)
        cache: dict[tuple, Any] = {}
        rows = []
        for i in range(n_rows):
            cov = {k: (columns[k][i] if not isinstance(columns[k][i], float)
                       or math.isfinite(columns[k][i]) else None) for k in names}
            key = tuple(cov.values())
            if key not in cache:
                try:
                    cache[key] = source.individual_parameters(cov).ln_mean \
                        if source.method != "marginal" else design.means_for(beta, cov)
                except ValueError as exc:
                    raise PkcalcInputError(f"row {i + 1}: {exc}",
                                           file=table["file"] if table else None) from None
            rows.append(cache[key])
        ln_mean = np.asarray(rows, float)
        omega = np.asarray(source.omega, float)
        what = (f"virtual patients from the population estimate ({source.method}"
                + (f"; covariates resampled from {n_rows:,} rows" if table else "") + ")")
    else:
        raise PkcalcInputError(f"got {type(source).__name__}", field="source",
                               expected="a population result, a Prior, or None with "
                                        "patients' own clearance and volume")
    if not np.all(np.isfinite(ln_mean)):
        raise PkcalcInputError("a patient's typical clearance or volume is not a positive "
                               "number under the covariate model", field="subjects")
    band = np.zeros(n_rows, dtype=int)
    band_names: tuple[str, ...] = ("all",)
    if bands is not None:
        column, edges = bands
        from .population.covariates import match_column

        found = match_column(columns.keys(), column)
        if found is None:
            raise PkcalcInputError(f"no column '{column}' in the subjects table",
                                   field="bands", expected=", ".join(columns) or "a column")
        band, band_names = _bands(columns[found], found, list(edges))
    regimens = [AttainmentRegimen(d, tau, infusion_time) for tau in intervals for d in doses]
    regimens += [AttainmentRegimen(rate=r) for r in rates]
    targets = AttainmentTargets(peak=peak, trough=trough, auc_24=auc_24, level=window)
    try:
        return compute(PatientSource(ln_mean, omega, band, band_names, what), regimens,
                       targets, patients=patients, seed=seed, level=attainment_level,
                       engine=engine, progress=progress)
    except ValueError as exc:
        raise PkcalcInputError(str(exc), field="attainment") from None
