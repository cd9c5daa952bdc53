"""Options of ``pkcalc fit`` and the prior file of MAP estimation.

Fit options come from the ``[fit]`` table of a study TOML and/or the command
line (the command line wins).  A prior gives typical clearance and volume
(absolute, or per kg of body weight), their between-subject variability (CV %
or SD of the log) with an optional correlation, and the residual error model.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

from .. import glossary
from ..core import (
    BLQ_METHODS,
    CI_METHODS,
    ERROR_MODELS,
    POPULATION_METHODS,
    WEIGHTINGS,
    Effect,
    FitOptions,
    PopulationModel,
    PopulationOptions,
    Prior,
)
from ..errors import PkcalcInputError, Problem
from ..units import parse_number_and_unit, parse_unit
from .base import read_toml

__all__ = [
    "BLQ_METHODS",
    "ERROR_MODELS",
    "WEIGHTINGS",
    "FitOptions",
    "PopulationOptions",
    "Prior",
    "fit_options",
    "load_prior",
    "parse_prior",
    "population_options",
]



#: The largest CV or proportional SD accepted, as a fraction (1000 %; batch B3 too).
MAX_FRACTION = 10.0
#: Most candidate effects of a stepwise selection, and most models of a comparison.
MAX_CANDIDATE_EFFECTS = 12
MAX_MODELS = 12
#: The largest fixed exponent of a power effect accepted (in absolute value).
MAX_EXPONENT = 10.0
#: The largest SD of a log-parameter accepted.
MAX_SD_LOG = 5.0


def _percent_or_number(text: Any, field: str, problems: list[Problem], file: str | None,
                       *, allow_percent: bool = True) -> float | None:
    """A CV or proportional SD ('30%' or the fraction 0.3), or with ``allow_percent``
    False an SD of a log-parameter; a plain number above 1 for a fraction is refused
    (30 would be 3000 %), and so are values beyond :data:`MAX_FRACTION` /
    :data:`MAX_SD_LOG`."""
    try:
        value, unit = parse_number_and_unit(text, field=field)
    except PkcalcInputError as exc:
        problems.extend(Problem(p.message, file=file, field=field) for p in exc.problems)
        return None
    if unit and not (unit == "%" and allow_percent):
        problems.append(Problem(f"'{text}' should be a percentage or a plain number",
                                file=file, field=field))
        return None
    if not allow_percent:
        if not value <= MAX_SD_LOG:
            problems.append(Problem(f"{value:g} is beyond the largest SD of a logarithm "
                                    f"accepted ({MAX_SD_LOG:g})", file=file, field=field))
            return None
        return value
    if unit != "%" and value > 1:
        problems.append(Problem(f"the plain number {text!r} is a fraction: it would mean "
                                f"{value * 100:g} %", file=file, field=field,
                                expected=f"'{value:g}%' (a percentage), or {value / 100:g}"))
        return None
    fraction = value / 100.0 if unit == "%" else value
    if not fraction <= MAX_FRACTION:
        problems.append(Problem(f"'{text}' is beyond {MAX_FRACTION * 100:g} %", file=file,
                                field=field, expected="a percentage from 0 % to 1000 %"))
        return None
    return fraction


def parse_prior(raw: dict[str, Any], *, file: str | None = None) -> Prior:
    """A prior from its table (see the module docstring for the keys)."""
    problems: list[Problem] = []
    allowed = {"clearance", "volume", "cv_clearance", "cv_volume", "sd_log_clearance",
               "sd_log_volume", "correlation", "error"}
    for key in sorted(set(raw) - allowed):
        problems.append(Problem("unknown key", file=file, field=f"prior.{key}",
                                expected=", ".join(sorted(allowed))))
    typical = _prior_typical(raw, problems, file)
    omegas = _prior_variability(raw, problems, file)
    corr = raw.get("correlation", 0.0)
    if not isinstance(corr, int | float) or isinstance(corr, bool) or not -1 < corr < 1:
        problems.append(Problem("correlation must be a number in (-1, 1)", file=file,
                                field="prior.correlation"))
        corr = 0.0
    add, prop = _prior_error(raw, problems, file)
    if problems:
        raise PkcalcInputError(problems)
    return Prior(typical["clearance"][0], typical["volume"][0], omegas["clearance"],
                 omegas["volume"], float(corr), add, prop, typical["clearance"][1],
                 typical["volume"][1], source=file or "")


def _located(exc: PkcalcInputError, file: str | None) -> list[Problem]:
    return [Problem(p.message, file=file, field=p.field, expected=p.expected)
            for p in exc.problems]


def _prior_typical(raw, problems: list[Problem], file) -> dict[str, tuple[float, bool]]:
    """Typical clearance and volume (absolute or per kg)."""
    typical: dict[str, tuple[float, bool]] = {}
    for name in ("clearance", "volume"):
        text = raw.get(name)
        if text is None:
            problems.append(Problem("is required", file=file, field=f"prior.{name}"))
            continue
        try:
            value, unit = parse_number_and_unit(text, field=f"prior.{name}")
            spec = parse_unit(unit, name, field=f"prior.{name}")
        except PkcalcInputError as exc:
            problems.extend(_located(exc, file))
            continue
        if not value > 0:
            problems.append(Problem("must be greater than zero", file=file,
                                    field=f"prior.{name}"))
            continue
        typical[name] = (value * spec.factor, spec.per_kg)
    return typical


def _prior_variability(raw, problems: list[Problem], file) -> dict[str, float]:
    """SD of ln CL and ln V: from a CV (log-normal: ln(1 + CV^2)) or given directly."""
    omegas: dict[str, float] = {}
    for name in ("clearance", "volume"):
        cv, sd = raw.get(f"cv_{name}"), raw.get(f"sd_log_{name}")
        if (cv is None) == (sd is None):
            problems.append(Problem("give exactly one of cv_ and sd_log_", file=file,
                                    field=f"prior.cv_{name}",
                                    expected="cv_clearance = '30%' or sd_log_clearance = 0.29"))
            continue
        if cv is not None:
            value = _percent_or_number(cv, f"prior.cv_{name}", problems, file)
            omega = value if value is None or value <= 0 else math.sqrt(math.log1p(value**2))
        else:
            omega = _percent_or_number(sd, f"prior.sd_log_{name}", problems, file,
                                       allow_percent=False)
        if omega is not None and not omega > 0:
            problems.append(Problem("between-subject variability must be greater than zero",
                                    file=file, field=f"prior.cv_{name}"))
        elif omega is not None:
            omegas[name] = omega
    return omegas


def _prior_error(raw, problems: list[Problem], file) -> tuple[float, float]:
    """The residual error of the prior: additive SD (mg/L) and proportional SD."""
    error = raw.get("error", {})
    if not isinstance(error, dict):
        problems.append(Problem("must be a table", file=file, field="prior.error"))
        error = {}
    for key in sorted(set(error) - {"additive", "proportional"}):
        problems.append(Problem("unknown key", file=file, field=f"prior.error.{key}",
                                expected="additive, proportional"))
    add = prop = 0.0
    if "additive" in error:
        try:
            value, unit = parse_number_and_unit(error["additive"], field="prior.error.additive")
            add = value * parse_unit(unit, "concentration",
                                     field="prior.error.additive").factor
        except PkcalcInputError as exc:
            problems.extend(_located(exc, file))
    if "proportional" in error:
        prop = _percent_or_number(error["proportional"], "prior.error.proportional", problems,
                                  file) or 0.0
    if add < 0 or prop < 0 or (add == 0 and prop == 0 and not problems):
        problems.append(Problem("the residual error needs additive and/or proportional SD > 0",
                                file=file, field="prior.error",
                                expected="[prior.error] proportional = '10%', additive = "
                                         "'0.1 mg/L'"))
    return add, prop


def load_prior(path: str | Path) -> Prior:
    """A prior TOML file with a ``[prior]`` table."""
    data = read_toml(path)
    if set(data) - {"prior", "title"} or not isinstance(data.get("prior"), dict):
        raise PkcalcInputError("a prior file holds one [prior] table (and an optional title)",
                               file=str(path), field="prior")
    return parse_prior(data["prior"], file=str(path))


#: The keys of a study's ``[fit]`` table (and of ``fit_study``'s keywords).
FIT_KEYS = ("weighting", "error_model", "blq", "ci", "prior", "starts", "with_nca",
            "nca_threshold", "adequacy")
#: The keys of a study's ``[population]`` table (and of ``population_study``'s keywords).
POPULATION_KEYS = ("method", "error_model", "blq", "covariate", "reference_weight",
                   "bootstrap", "seed", "vpc_replicates", "adequacy", "nodes",
                   "between_subject", "effects", "models", "stepwise")


def fit_options(raw: dict[str, Any] | None = None, *, base: Path | None = None,
                file: str | None = None) -> FitOptions:
    """Validate fit options (study ``[fit]`` table merged with command-line values)."""
    raw = {k: v for k, v in (raw or {}).items() if v is not None}
    problems: list[Problem] = []
    allowed = set(FIT_KEYS)
    for key in sorted(set(raw) - allowed):
        problems.append(Problem("unknown key", file=file, field=f"fit.{key}",
                                expected=", ".join(sorted(allowed))))
    weighting = raw.get("weighting")
    error_model = raw.get("error_model")
    if weighting is not None and error_model is not None:
        problems.append(Problem("give a weighting (least squares) or an error model "
                                "(likelihood), not both", file=file, field="fit.weighting"))
    if weighting is not None and weighting not in WEIGHTINGS:
        problems.append(Problem(f"unknown weighting '{weighting}'", file=file,
                                field="fit.weighting", expected=", ".join(WEIGHTINGS)))
    if error_model is not None and error_model not in ERROR_MODELS:
        problems.append(Problem(f"unknown error model '{error_model}'", file=file,
                                field="fit.error_model", expected=", ".join(ERROR_MODELS)))
    if weighting is None and error_model is None:
        error_model = "proportional"
    blq = raw.get("blq", "drop" if weighting else "likelihood")
    if blq not in BLQ_METHODS:
        problems.append(Problem(f"unknown BLQ method '{blq}'", file=file, field="fit.blq",
                                expected=", ".join(BLQ_METHODS)))
    if blq == "likelihood" and weighting is not None:
        problems.append(Problem("the censored likelihood (Beal's M3) needs an error model, "
                                "not a least-squares weighting", file=file, field="fit.blq",
                                expected="--error-model ... or --blq drop|half_lloq"))
    ci = raw.get("ci", "wald")
    if ci not in CI_METHODS:
        problems.append(Problem(f"unknown interval method '{ci}'", file=file, field="fit.ci",
                                expected=", ".join(CI_METHODS)))
    prior = None
    if "prior" in raw:
        try:
            if isinstance(raw["prior"], dict):
                prior = parse_prior(raw["prior"], file=file)
            else:
                path = Path(raw["prior"])
                prior = load_prior(path if path.is_absolute() or base is None else base / path)
        except PkcalcInputError as exc:
            problems.extend(exc.problems)
        if prior is not None and (weighting is not None):
            problems.append(Problem("a prior (MAP) uses the prior's error model; drop the "
                                    "weighting", file=file, field="fit.weighting"))
    starts = raw.get("starts", 3)
    if not isinstance(starts, int) or isinstance(starts, bool) or not 1 <= starts <= 20:
        problems.append(Problem("starts must be a whole number from 1 to 20", file=file,
                                field="fit.starts"))
    threshold = raw.get("nca_threshold", 20.0)
    if not isinstance(threshold, int | float) or not threshold > 0:
        problems.append(Problem("must be a positive percentage", file=file,
                                field="fit.nca_threshold"))
    adequacy = raw.get("adequacy", True)
    if not isinstance(adequacy, bool):
        problems.append(Problem("must be true or false", file=file, field="fit.adequacy",
                                expected="adequacy = false (turns the one-compartment "
                                         "adequacy check off)"))
    if problems:
        raise PkcalcInputError(problems)
    if prior is not None:
        error_model = prior.error_model
    return FitOptions(weighting, None if weighting else error_model, blq, ci, prior,
                      int(starts), bool(raw.get("with_nca", False)), float(threshold),
                      adequacy)


EFFECT_HELP = ('"weight on clearance", "weight on clearance and volume", "sex on volume", '
               '"age on clearance linear around 40", "weight on clearance fixed 0.75 around '
               '70 kg"')


def parse_effects(text: Any, field: str, file: str | None = None) -> tuple[Effect, ...]:
    """Effects from words: ``COLUMN on clearance|volume [and volume] [power|linear|
    categorical] [fixed EXPONENT] [around REFERENCE]``."""
    from ..units import to_canonical

    def fail(why: str):
        raise PkcalcInputError(f"{why}: {text!r}", file=file, field=field,
                               expected=EFFECT_HELP)

    if not isinstance(text, str) or " on " not in f" {text.strip()} ":
        fail("an effect names a column and a parameter")
    words = text.replace(",", " ").split()
    if "on" not in words[1:]:
        fail("an effect names a column and a parameter")
    k = words.index("on", 1)
    column = " ".join(words[:k])
    rest = words[k + 1:]
    params, form, fixed, ref = [], "power", None, None
    i = 0
    while i < len(rest):
        w = rest[i].lower()
        if w in ("clearance", "volume"):
            params.append(w)
        elif w == "and":
            pass
        elif w in ("power", "linear", "categorical"):
            form = w
        elif w == "fixed" and i + 1 < len(rest):
            try:
                fixed = float(rest[i + 1])
            except ValueError:
                fail(f"'fixed' takes a number, not '{rest[i + 1]}'")
            if not abs(fixed) <= MAX_EXPONENT:
                fail(f"a fixed exponent of {rest[i + 1]} is beyond +-{MAX_EXPONENT:g}")
            i += 1
        elif w == "around" and i + 1 < len(rest):
            value = " ".join(rest[i + 1:])
            try:
                ref = float(value)
            except ValueError:
                if column == "weight":
                    ref = to_canonical(value, "weight", field=field)
                elif len(rest[i + 1:]) == 1:
                    ref = value                   # a reference level of a text column
                else:
                    fail(f"'around' takes a number or a level, not '{value}'")
            break
        else:
            fail(f"unknown word '{rest[i]}'")
        i += 1
    if not params:
        fail("say which parameter: clearance, volume or both")
    if isinstance(ref, str) and form != "categorical":
        form = "categorical"
    try:
        return tuple(Effect(column, p, form, ref, fixed) for p in dict.fromkeys(params))
    except ValueError as exc:
        fail(str(exc))
        raise


def _effect_list(value: Any, field: str, file: str | None, problems: list[Problem]
                 ) -> tuple[Effect, ...]:
    items = [value] if isinstance(value, str) else value
    if not isinstance(items, list):
        problems.append(Problem("must be a list of effects", file=file, field=field,
                                expected=EFFECT_HELP))
        return ()
    out: list[Effect] = []
    for item in items:
        if isinstance(item, Effect):            # already an effect (from Python)
            out.append(item)
            continue
        try:
            out += parse_effects(item, field, file)
        except PkcalcInputError as exc:
            problems.extend(exc.problems)
    return tuple(out)


def _models(value: Any, file: str | None, problems: list[Problem]
            ) -> tuple[PopulationModel, ...]:
    """``[population.models]``: name = [effects]; at least two models (or, from Python,
    PopulationModel objects)."""
    if isinstance(value, list | tuple) and all(isinstance(m, PopulationModel) for m in value):
        value = {m.name: list(m.effects) for m in value}
    if isinstance(value, dict) and len(value) > MAX_MODELS:
        problems.append(Problem(f"{len(value)} models; at most {MAX_MODELS}", file=file,
                                field="population.models"))
        return ()
    if not isinstance(value, dict) or len(value) < 2:
        problems.append(Problem("give at least two models to compare, each a list of effects",
                                file=file, field="population.models",
                                expected='base = [], weight = ["weight on clearance"]'))
        return ()
    out = []
    for name, effects in value.items():
        eff = _effect_list(effects, f"population.models.{name}", file, problems)
        try:
            out.append(PopulationModel(str(name), eff))
        except ValueError as exc:
            problems.append(Problem(str(exc), file=file, field=f"population.models.{name}"))
    return tuple(out)


def population_options(raw: dict[str, Any] | None = None, *, file: str | None = None
                       ) -> PopulationOptions:
    """Validate the ``[population]`` table (merged with command-line values)."""
    from ..units import to_canonical

    raw = {k: v for k, v in (raw or {}).items() if v is not None}
    if "method" in raw:   # the former spelling of a value, accepted for one release
        raw["method"] = glossary.canonical_value(raw["method"], f"{file}: population.method")
    problems: list[Problem] = []
    allowed = set(POPULATION_KEYS)
    for key in sorted(set(raw) - allowed):
        problems.append(Problem("unknown key", file=file, field=f"population.{key}",
                                expected=", ".join(sorted(allowed))))
    choices = {"method": POPULATION_METHODS, "error_model": ERROR_MODELS,
               "blq": BLQ_METHODS, "covariate": ("none", "allometric", "estimated", "per_kg"),
               "between_subject": ("full", "diagonal")}
    for key, allowed_values in choices.items():
        if key in raw and raw[key] not in allowed_values:
            problems.append(Problem(f"unknown value '{raw[key]}'", file=file,
                                    field=f"population.{key}",
                                    expected=", ".join(allowed_values)))
    ref = 70.0
    if "reference_weight" in raw:
        try:
            ref = to_canonical(raw["reference_weight"], "weight",
                               field="population.reference_weight")
            if not ref > 0:
                raise PkcalcInputError("must be greater than zero",
                                       field="population.reference_weight")
        except PkcalcInputError as exc:
            problems.extend(Problem(p.message, file=file, field=p.field, expected=p.expected)
                            for p in exc.problems)
    for key, lo, hi in (("bootstrap", 0, 10000), ("seed", 0, 2**32 - 1),
                        ("vpc_replicates", 0, 10000)):
        if key in raw and (not isinstance(raw[key], int) or isinstance(raw[key], bool)
                           or not lo <= raw[key] <= hi):
            problems.append(Problem(f"must be a whole number from {lo} to {hi}", file=file,
                                    field=f"population.{key}"))
    nodes = raw.get("nodes", 1)
    if not isinstance(nodes, int) or isinstance(nodes, bool) or not 1 <= nodes <= 31:
        problems.append(Problem("must be a whole number from 1 to 31 (1: Laplace)", file=file,
                                field="population.nodes"))
    effects = _effect_list(raw.get("effects", []), "population.effects", file, problems)
    models = _models(raw["models"], file, problems) if "models" in raw else ()
    step = raw.get("stepwise")
    candidates: tuple[Effect, ...] = ()
    p_add, p_remove = 0.05, 0.01
    if step is not None:
        if not isinstance(step, dict) or not step.get("candidates"):
            problems.append(Problem("stepwise selection needs candidate effects", file=file,
                                    field="population.stepwise",
                                    expected='candidates = ["sex on clearance"], '
                                             'add_if_p_below = 0.05, '
                                             'remove_if_p_above = 0.01'))
        else:
            candidates = _effect_list(step["candidates"], "population.stepwise.candidates",
                                      file, problems)
            if len(candidates) > MAX_CANDIDATE_EFFECTS:
                problems.append(Problem(f"{len(candidates)} candidate effects; at most "
                                        f"{MAX_CANDIDATE_EFFECTS} (each step estimates every "
                                        "remaining one)", file=file,
                                        field="population.stepwise.candidates"))
            step = dict(step)
            for old, new in (("p_in", "add_if_p_below"), ("p_out", "remove_if_p_above")):
                if old in step and new not in step:
                    glossary.former(old, new, f"{file}: population.stepwise")
                    step[new] = step.pop(old)
            p_add = step.get("add_if_p_below", 0.05)
            p_remove = step.get("remove_if_p_above", 0.01)
            for key, x in (("add_if_p_below", p_add), ("remove_if_p_above", p_remove)):
                if not isinstance(x, int | float) or isinstance(x, bool) or not 0 < x < 1:
                    problems.append(Problem("must be a probability between 0 and 1",
                                            file=file, field=f"population.stepwise.{key}"))
            for key in sorted(set(step) - {"candidates", "add_if_p_below",
                                           "remove_if_p_above"}):
                problems.append(Problem("unknown key", file=file,
                                        field=f"population.stepwise.{key}",
                                        expected="candidates, add_if_p_below, "
                                                 "remove_if_p_above"))
    method = raw.get("method", "marginal")
    if method in ("iterative", "two_stage") and (effects or models or candidates):
        problems.append(Problem("covariate effects, model comparison and stepwise selection "
                                "need the marginal method", file=file,
                                field="population.method", expected="method = \"marginal\""))
    if models and candidates:
        problems.append(Problem("give models to compare or stepwise candidates, not both",
                                file=file, field="population.stepwise"))
    if not isinstance(raw.get("adequacy", True), bool):
        problems.append(Problem("must be true or false", file=file, field="population.adequacy",
                                expected="adequacy = false (turns the one-compartment "
                                         "adequacy check off)"))
    if problems:
        raise PkcalcInputError(problems)
    return PopulationOptions(
        method=method, error_model=raw.get("error_model", "proportional"),
        blq=raw.get("blq", "likelihood"), covariate=raw.get("covariate", "none"),
        reference_weight=ref, bootstrap=raw.get("bootstrap", 0), seed=raw.get("seed", 1),
        vpc_replicates=raw.get("vpc_replicates", 200), adequacy=raw.get("adequacy", True),
        nodes=nodes, between_subject=raw.get("between_subject", "full"), effects=effects,
        models=models, stepwise=candidates, add_if_p_below=float(p_add),
        remove_if_p_above=float(p_remove))
