"""Covariate effects as a mean function of the population model.

For subject ``i`` the typical log-parameters are::

    ln CL_i = b_CL + sum over the clearance effects
    ln V_i  = b_V  + sum over the volume effects

with, for an effect of column ``c`` (value ``c_i``):

- power:       ``e ln(c_i / ref)``          (``e`` estimated, or fixed);
- linear:      ``ln(1 + s (c_i - ref))``    (``s`` estimated; the typical value is
  ``typical (1 + s (c_i - ref))``, which must stay positive).  The estimation works
  with ``s x scale`` (``scale`` the largest ``|c_i - ref|``) so that a slope per year
  and a slope per kilogram are numbers of the same size for the optimiser; the
  reported slope is per unit;
- categorical: ``g_l`` for subjects of level ``l`` (one per level other than the
  reference; the factor on the typical value is ``exp(g_l)``).

References default to the median (numeric) or the most frequent level (text).
A text column named with the power form becomes categorical.
"""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass, replace

import numpy as np

from ..core import Effect, SubjectData
from ..errors import PkcalcInputError

__all__ = ["CovariateError", "Design", "build_design", "weight_effects"]


class CovariateError(PkcalcInputError):
    """A covariate model that cannot be estimated on these subjects (the message says
    which column and which subjects)."""


@dataclass
class _Term:
    effect: Effect
    row: int                     # 0 clearance, 1 volume
    values: np.ndarray           # ln(c/ref), (c - ref)/scale, or one-hot (N, L-1)
    names: list[str]             # names of the estimated parameters (empty when fixed)
    levels: list[str]
    scale: float = 1.0           # linear: the estimated parameter is slope x scale


@dataclass
class Design:
    """The mean function of one population model on one set of subjects.

    Attributes
    ----------
    effects : tuple of Effect
        With references and forms resolved.
    names : list of str
        Names of the fixed-effect parameters: ``ln typical clearance``, ``ln typical
        volume``, then one per estimated effect parameter.
    """

    effects: tuple[Effect, ...]
    names: list[str]
    terms: list[_Term]
    n_subjects: int

    @property
    def n_beta(self) -> int:
        return len(self.names)

    def means(self, beta: np.ndarray) -> np.ndarray:
        """Typical ``ln CL, ln V`` of every subject, shape (N, 2); ``inf`` where a linear
        effect makes a typical value non-positive."""
        return self.means_many(np.asarray(beta, float)[None])[:, 0]

    def means_many(self, betas: np.ndarray) -> np.ndarray:
        """:meth:`means` under several parameter vectors ``betas`` (V, n_beta) at once,
        shape (N, V, 2)."""
        betas = np.asarray(betas, float)
        mu = np.broadcast_to(betas[None, :, :2], (self.n_subjects, betas.shape[0], 2)).copy()
        k = 2
        for term in self.terms:
            e = term.effect
            if e.form == "categorical":
                m = len(term.names)
                mu[:, :, term.row] += term.values @ betas[:, k:k + m].T
                k += m
            elif e.form == "linear":
                arg = 1.0 + betas[None, :, k] * term.values[:, None]
                with np.errstate(invalid="ignore", divide="ignore"):
                    mu[:, :, term.row] += np.where(
                        arg > 0, np.log(np.where(arg > 0, arg, 1.0)), np.inf)
                k += 1
            elif e.fixed is not None:
                mu[:, :, term.row] += e.fixed * term.values[:, None]
            else:
                mu[:, :, term.row] += betas[None, :, k] * term.values[:, None]
                k += 1
        return mu

    def rows(self, idx: np.ndarray) -> Design:
        """The same mean function on the subjects ``idx`` (a shard of the study)."""
        terms = [replace(t, values=t.values[idx]) for t in self.terms]
        return Design(self.effects, list(self.names), terms, len(idx))

    def without_data(self) -> Design:
        """The same mean function without the study's covariate values (what a result
        keeps to compute a new patient's typical values)."""
        terms = [replace(t, values=np.empty(0)) for t in self.terms]
        return Design(self.effects, list(self.names), terms, 0)

    def means_for(self, beta: np.ndarray, covariates: dict) -> np.ndarray:
        """Typical ``ln CL, ln V`` of a patient with ``covariates`` (column -> value;
        names matched as in the study, case apart).

        Raises
        ------
        CovariateError
            A covariate the model needs is missing, a level the study did not have, a
            non-positive value under a power effect, or a linear effect that makes a
            typical value non-positive.
        """
        mu = np.array(beta[:2], float)
        k = 2
        for term in self.terms:
            e = term.effect
            column = match_column(covariates.keys(), e.column)
            if column is None or covariates[column] is None:
                raise CovariateError(f"the model needs '{e.column}' ({e.label}): give it")
            value = covariates[column]
            if e.form == "categorical":
                level = _level_text(value)
                m = len(term.names)
                if level != str(e.reference) and level not in term.levels:
                    raise CovariateError(
                        f"'{e.column}' = {value!r} is not a level of the study (levels: "
                        f"{', '.join([str(e.reference), *term.levels])})")
                mu[term.row] += sum(beta[k + j] for j, lv in enumerate(term.levels)
                                    if lv == level)
                k += m
                continue
            x = _number(value, e.column)
            if e.form == "linear":
                arg = 1.0 + beta[k] / term.scale * (x - e.reference)
                if not arg > 0:
                    raise CovariateError(f"'{e.column}' = {x:g} makes the typical "
                                         f"{e.parameter} non-positive under the linear effect")
                mu[term.row] += math.log(arg)
                k += 1
                continue
            if not x > 0:
                raise CovariateError(f"a power effect needs a positive '{e.column}', got {x:g}")
            exponent = e.fixed if e.fixed is not None else beta[k]
            mu[term.row] += exponent * math.log(x / e.reference)
            k += 0 if e.fixed is not None else 1
        return mu

    def start(self, ln_typical: np.ndarray) -> np.ndarray:
        """Fixed-effect starting values: the given typical values, no effect."""
        beta = np.zeros(self.n_beta)
        beta[:2] = ln_typical
        return beta

    def describe(self, beta: np.ndarray) -> list[dict]:
        """Each estimated effect parameter in plain words with its natural value."""
        out, k = [], 2
        for term in self.terms:
            e = term.effect
            for j, name in enumerate(term.names):
                value = float(beta[k + j]) / term.scale
                if e.form == "categorical":
                    out.append({"name": name, "effect": e.label, "kind": "factor",
                                "level": term.levels[j], "reference": e.reference,
                                "log_value": value, "value": math.exp(value)})
                else:
                    out.append({"name": name, "effect": e.label,
                                "kind": "exponent" if e.form == "power" else "slope",
                                "reference": e.reference, "value": value})
            k += len(term.names)
        return out


def _level_text(value) -> str:
    """A level as the study's subjects table gives it (numbers read as floats)."""
    if isinstance(value, bool):
        return str(value)
    if isinstance(value, int | float | np.integer | np.floating):
        return str(float(value))
    return str(value).strip()


def _number(value, column: str) -> float:
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise CovariateError(f"'{column}' must be a number, got {value!r}") from None
    if not math.isfinite(x):
        raise CovariateError(f"'{column}' must be a finite number, got {value!r}")
    return x


def weight_effects(covariate: str, reference_weight: float) -> tuple[Effect, ...]:
    """The body-weight models of the two-stage methods as effects."""
    if covariate == "none":
        return ()
    if covariate == "per_kg":
        return (Effect("weight", "clearance", "power", 1.0, 1.0),
                Effect("weight", "volume", "power", 1.0, 1.0))
    if covariate == "allometric":
        return (Effect("weight", "clearance", "power", reference_weight, 0.75),
                Effect("weight", "volume", "power", reference_weight, 1.0))
    return (Effect("weight", "clearance", "power", reference_weight),
            Effect("weight", "volume", "power", reference_weight))


def match_column(names, column: str) -> str | None:
    """The column of ``names`` that ``column`` means: the same name, else the only one
    that differs in case alone; None when there is none.

    Raises
    ------
    CovariateError
        When several columns differ from ``column`` in case alone.
    """
    names = set(names)
    if column in names:
        return column
    same = sorted(n for n in names if n.casefold() == column.casefold())
    if len(same) > 1:
        raise CovariateError(f"column '{column}' could be any of {', '.join(same)} "
                             "(they differ in case alone): name it exactly")
    return same[0] if same else None


def _values(subjects: list[SubjectData], column: str) -> list:
    names = set().union(*(s.covariates.keys() for s in subjects)) if subjects else set()
    found = match_column(names, column)
    if found is None:
        shown = ", ".join(sorted(names)) or "none"
        raise CovariateError(f"no column '{column}' in the subjects table (its columns: "
                             f"{shown})")
    column = found
    missing = [s.subject for s in subjects if column not in s.covariates]
    if len(missing) == len(subjects):
        raise CovariateError(f"column '{column}' of the subjects table has no value")
    if missing:
        shown = ", ".join(missing[:8]) + (f" and {len(missing) - 8} more" if len(missing) > 8
                                          else "")
        raise CovariateError(f"column '{column}' has no value for subject(s) {shown}: give "
                             "every subject a value or leave the effect out")
    return [s.covariates[column] for s in subjects]


def build_design(subjects: list[SubjectData], effects: tuple[Effect, ...]) -> Design:
    """Resolve references and forms and build the mean function.

    Raises
    ------
    CovariateError
        A column missing for some subjects, a constant column, a level with one
        subject, a non-positive value under a power effect.
    """
    names = ["ln typical clearance", "ln typical volume"]
    terms, resolved = [], []
    columns = set().union(*(s.covariates.keys() for s in subjects)) if subjects else set()
    for e in effects:
        raw = _values(subjects, e.column)
        e = replace(e, column=match_column(columns, e.column) or e.column)
        text = any(isinstance(x, str) for x in raw)
        if text and e.form == "linear":
            raise CovariateError(f"column '{e.column}' holds text: a linear effect needs "
                                 "numbers (a text column is a categorical factor)")
        row = 0 if e.parameter == "clearance" else 1
        if text or e.form == "categorical":
            e, term = _categorical(e, [str(x) for x in raw], row)
        else:
            e, term = _numeric(e, np.asarray(raw, float), row, subjects)
        terms.append(term)
        resolved.append(e)
        names += term.names
    return Design(tuple(resolved), names, terms, len(subjects))


#: Most levels of a categorical effect (each adds a parameter to every likelihood
#: evaluation; a column with more levels is rarely a factor).
MAX_LEVELS = 20


def _categorical(e: Effect, raw: list[str], row: int):
    counts = Counter(raw)
    if len(counts) > MAX_LEVELS:
        raise CovariateError(f"column '{e.column}' has {len(counts)} levels; a categorical "
                             f"effect takes at most {MAX_LEVELS} (an identifier or a number "
                             "read as text? group levels, or use a numeric column)")
    if len(counts) < 2:
        raise CovariateError(f"column '{e.column}' has the same level for every subject: its "
                             "effect cannot be estimated")
    single = sorted(level for level, c in counts.items() if c == 1)
    if single:
        raise CovariateError(f"level(s) {', '.join(repr(x) for x in single)} of column "
                             f"'{e.column}' have one subject: too few to estimate a factor "
                             "(merge levels or leave the effect out)")
    ref = e.reference if e.reference is not None else \
        sorted(counts, key=lambda x: (-counts[x], x))[0]
    if str(ref) not in counts:
        raise CovariateError(f"reference level {ref!r} does not occur in column '{e.column}'")
    levels = sorted(x for x in counts if x != str(ref))
    onehot = np.array([[1.0 if x == level else 0.0 for level in levels] for x in raw])
    e = replace(e, form="categorical", reference=str(ref), fixed=None)
    names = [f"{e.column}={level} on {e.parameter}: ln factor" for level in levels]
    return e, _Term(e, row, onehot, names, levels)


def _numeric(e: Effect, values: np.ndarray, row: int, subjects: list[SubjectData]):
    if np.ptp(values) == 0 and e.fixed is None:
        raise CovariateError(f"column '{e.column}' has the same value for every subject: its "
                             "effect cannot be estimated")
    ref = float(np.median(values)) if e.reference is None else float(e.reference)
    if e.form == "power":
        bad = [s.subject for s, x in zip(subjects, values, strict=True) if not x > 0]
        if bad:
            raise CovariateError(f"a power effect needs positive values of '{e.column}': "
                                 f"subject(s) {', '.join(bad[:8])} have zero or less (use the "
                                 "linear form)")
        x = np.log(values / ref)
        name = [] if e.fixed is not None else [f"{e.column} on {e.parameter}: exponent"]
        scale = 1.0
    else:
        scale = float(np.max(np.abs(values - ref))) or 1.0
        x = (values - ref) / scale
        name = [f"{e.column} on {e.parameter}: slope per unit"]
    e = replace(e, reference=ref)
    return e, _Term(e, row, x, name, [], scale)
