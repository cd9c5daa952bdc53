"""Several covariate models side by side, and stepwise covariate selection.

Every model is estimated by maximum marginal likelihood on the same subjects.
The table gives ``-2 ln L``, the number of parameters, AIC, BIC and, for each
model, the likelihood-ratio test against the largest other model nested in it (its
effects a subset of the model's, fewer parameters; the base when nothing larger
is): ``D = -2 ln L(smaller) - (-2 ln L(model))`` against a chi-square with as many
degrees of freedom as the model has extra parameters (Wilks' theorem); models
with no nested partner get no test (compare by AIC/BIC).  :meth:`ModelComparison.tests`
lists every nested pair.  Stepwise selection
(common practice: forward inclusion at p < 0.05, backward elimination at
p > 0.01) adds the candidate effect with the smallest p-value while it is below
``add_if_p_below``, then removes the effect with the largest p-value while it is above
``remove_if_p_above``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from ..core import Effect, PopulationModel, PopulationOptions, SubjectData
from .estimate import marginal_estimate, model_effects
from .result import PopulationResult
from .shards import WorkerPool

__all__ = ["ModelComparison", "compare_models", "stepwise"]


#: Caption of the table of compared models (terminal text and HTML).
COMPARED_CAPTION = ("Models compared (first model '{base}'; each likelihood-ratio test is "
                    "against the model in the column 'compared with': the largest model "
                    "nested in it, or in a stepwise search the model of the step before):")


def stepwise_lines(steps: list[dict]) -> list[str]:
    """The stepwise path in words: each step's test is against the model of the step before."""
    if not steps:
        return []
    out = ["Stepwise path (each step's likelihood-ratio test is against the model of the step "
           "before; forward steps add while p < the add threshold, backward steps remove while "
           "p > the remove threshold):"]
    out += [f"  {s['step']}: {s['effect']} (against '{s['compared_with']}'): p = {s['p']:.3g},"
            f" threshold {s['threshold']:g} -> {s['decision']}" for s in steps]
    return out


@dataclass
class ModelRow:
    """One model of a comparison: its estimate, or why it failed."""

    name: str
    effects: tuple[Effect, ...]
    result: PopulationResult | None = None
    error: str | None = None
    lrt_df: int | None = None
    lrt_statistic: float | None = None
    lrt_p: float | None = None
    compared_with: str | None = None

    def as_dict(self) -> dict:
        r = self.result
        return {"model": self.name, "effects": [e.label for e in self.effects],
                "objective": None if r is None else r.objective,
                "n_parameters": None if r is None else r.n_parameters,
                "aic": None if r is None else r.aic, "bic": None if r is None else r.bic,
                "converged": None if r is None else r.converged,
                "compared_with": self.compared_with, "likelihood_ratio_df": self.lrt_df,
                "likelihood_ratio_statistic": self.lrt_statistic,
                "likelihood_ratio_p": self.lrt_p, "error": self.error}


@dataclass
class ModelComparison:
    """The models, the base they are tested against and the stepwise path (if any)."""

    rows: list[ModelRow]
    base: str
    steps: list[dict] = field(default_factory=list)
    selected: str | None = None
    #: effects every model holds (the weight model and the declared effects)
    common: tuple[str, ...] = ()

    @property
    def failed(self) -> list[ModelRow]:
        return [r for r in self.rows if r.result is None]

    def best(self) -> ModelRow | None:
        """The selected model (stepwise), else the lowest AIC."""
        ok = [r for r in self.rows if r.result is not None]
        if self.selected is not None:
            return next((r for r in ok if r.name == self.selected), None)
        return min(ok, key=lambda r: r.result.aic, default=None)

    def tests(self) -> list[dict]:
        """Every nested pair of estimated models with its likelihood-ratio test."""
        out = []
        for big in self.rows:
            for small in self.rows:
                test = _test(small, big)
                if test is not None:
                    out.append({"model": big.name, "nested_model": small.name, "df": test[0],
                                "statistic": test[1], "p": test[2]})
        return out

    def to_frame(self):
        """One row per model: effects, -2 ln L, parameters, AIC, BIC, the model its
        likelihood-ratio test is against, the test, convergence or the error."""
        import pandas as pd

        frame = pd.DataFrame([r.as_dict() for r in self.rows])
        frame["effects"] = frame["effects"].map("; ".join)
        frame["selected"] = [r is self.best() for r in self.rows]
        return frame

    def summary(self, caution: bool = True) -> str:
        """The comparison table, the stepwise path and every nested pair."""
        from .._format import format_table, with_caution

        best = self.best()
        rows = [[r.name, "; ".join(e.label for e in r.effects) or "(none)",
                 None if r.result is None else r.result.objective,
                 None if r.result is None else r.result.n_parameters,
                 None if r.result is None else r.result.aic,
                 None if r.result is None else r.result.bic, r.compared_with, r.lrt_df,
                 r.lrt_p, "FAILED: " + r.error if r.error else
                 ("yes" if r.result.converged else "NO"), "<-" if r is best else ""]
                for r in self.rows]
        lines = [COMPARED_CAPTION.format(base=self.base)]
        if self.common:
            lines.append("every model also holds: " + "; ".join(self.common))
        lines += [format_table(["model", "effects", "-2 ln L", "parameters", "AIC", "BIC",
                                "compared with", "likelihood-ratio df", "likelihood-ratio p",
                                "converged", "reported"], rows)]
        lines += stepwise_lines(self.steps)
        pairs = self.tests()
        if pairs:
            lines.append("Every nested pair:")
            lines.append(format_table(["model", "nested model", "df", "statistic", "p"],
                                      [[t["model"], t["nested_model"], t["df"],
                                        t["statistic"], t["p"]] for t in pairs]))
        return with_caution("\n".join(lines), caution)

    def _repr_html_(self) -> str:
        from .._format import result_html

        return result_html(self.summary(caution=False), self.to_frame())


def _test(small: ModelRow, big: ModelRow) -> tuple[int, float, float] | None:
    """Likelihood-ratio test of ``small`` nested in ``big``: (df, statistic, p)."""
    from scipy.stats import chi2

    if small.result is None or big.result is None or small is big:
        return None
    extra = big.result.n_parameters - small.result.n_parameters
    nested = {(e.column, e.parameter) for e in small.effects} <= \
        {(e.column, e.parameter) for e in big.effects}
    if extra <= 0 or not nested:
        return None
    d = max(small.result.objective - big.result.objective, 0.0)
    return extra, d, float(chi2.sf(d, extra))


def _lrt(base: ModelRow, row: ModelRow) -> None:
    test = _test(base, row)
    if test is not None:
        row.lrt_df, row.lrt_statistic, row.lrt_p = test
        row.compared_with = base.name


#: A larger model whose -2 ln L is above its nested model's by more than this did not
#: reach its optimum (it can always fit at least as well).
NESTED_SLACK = 1e-3


def _check_nested(small: ModelRow, big: ModelRow) -> None:
    """A larger model worse than the model nested in it is not at its optimum: say so
    where the estimate is reported (never a silent LRT of zero)."""
    if small.result is None or big.result is None:
        return
    gap = big.result.objective - small.result.objective
    if gap > NESTED_SLACK:
        big.result.converged = False
        big.result.warnings.append(
            f"-2 ln L {big.result.objective:.4f} is above that of the model nested in it, "
            f"'{small.name}' ({small.result.objective:.4f}): the estimate stopped short of "
            "its optimum (a larger model fits at least as well); do not use it")


def _nearest_nested(rows: list[ModelRow], row: ModelRow) -> ModelRow | None:
    """The model with the most parameters nested in ``row`` (the earliest on ties)."""
    nested = [r for r in rows if _test(r, row) is not None]
    return max(nested, key=lambda r: r.result.n_parameters, default=None)


def _estimate(subjects, options, pm: PopulationModel, progress, start, pool=None
              ) -> ModelRow:
    row = ModelRow(pm.name, pm.effects)
    try:
        row.result = marginal_estimate(subjects, options, pm, progress=progress, start=start,
                                       final_fits=False, pool=pool)
    except (ValueError, ArithmeticError, np.linalg.LinAlgError) as exc:
        row.error = str(exc)
    return row


def compare_models(subjects: list[SubjectData], options: PopulationOptions,
                   models: tuple[PopulationModel, ...], *,
                   progress: Callable[[str], None] | None = None,
                   pool: WorkerPool | None = None) -> ModelComparison:
    """Estimate every model; likelihood-ratio tests against the first (the base).  Every
    model also carries the effects of ``options`` (its body-weight model and effects).
    ``pool``: Dask workers holding the subjects (:mod:`pkcalc.population.shards`)."""
    common = model_effects(options)
    keys = {(e.column, e.parameter) for e in common}
    models = tuple(PopulationModel(pm.name, common + tuple(
        e for e in pm.effects if (e.column, e.parameter) not in keys)) for pm in models)
    rows: list[ModelRow] = []
    start = None
    for pm in models:
        row = _estimate(subjects, options, pm, progress, start, pool)
        rows.append(row)
        if start is None and row.result is not None:
            start = row.result          # later models start from the base estimate
    for row in rows[1:]:
        partner = _nearest_nested(rows, row)
        if partner is not None:
            _lrt(partner, row)
            _check_nested(partner, row)
    return ModelComparison(rows, models[0].name, common=tuple(e.label for e in common))


def stepwise(subjects: list[SubjectData], options: PopulationOptions,
             candidates: tuple[Effect, ...], *,
             progress: Callable[[str], None] | None = None,
             pool: WorkerPool | None = None) -> ModelComparison:
    """Forward inclusion at ``options.add_if_p_below``, then backward elimination at
    ``options.remove_if_p_above``, from the model of ``options`` (its effects always stay).
    ``pool``: Dask workers holding the subjects (:mod:`pkcalc.population.shards`)."""
    base_effects = model_effects(options)
    current = PopulationModel("base", base_effects)
    current_row = _estimate(subjects, options, current, progress, None, pool)
    rows, steps = [current_row], []
    if current_row.result is None:
        return ModelComparison(rows, "base", steps, None)
    remaining = [c for c in candidates
            if (c.column, c.parameter) not in {(e.column, e.parameter) for e in base_effects}]
    while remaining:
        trials = []
        for c in remaining:
            pm = PopulationModel(f"{current.name} + {c.column} on {c.parameter}",
                                 (*current.effects, c))
            row = _estimate(subjects, options, pm, progress, current_row.result, pool)
            _lrt(current_row, row)
            _check_nested(current_row, row)
            rows.append(row)
            trials.append((c, row))
        ok = [(c, r) for c, r in trials if r.lrt_p is not None]
        if not ok:
            break
        c, r = min(ok, key=lambda x: x[1].lrt_p)
        added = r.lrt_p < options.add_if_p_below
        steps.append({"step": "forward", "effect": c.label, "p": r.lrt_p,
                      "threshold": options.add_if_p_below, "compared_with": current_row.name,
                      "decision": "added" if added else "not added"})
        if r.lrt_p >= options.add_if_p_below:
            break
        current, current_row = PopulationModel(r.name, r.effects), r
        remaining.remove(c)
    while True:
        removable = [e for e in current.effects if e not in base_effects]
        ok = []
        for e in removable:
            pm = PopulationModel(f"{current.name} - {e.column} on {e.parameter}",
                                 tuple(x for x in current.effects if x != e))
            row = _estimate(subjects, options, pm, progress, current_row.result, pool)
            rows.append(row)
            test = _test(row, current_row)
            _check_nested(row, current_row)
            if test is not None:
                row.lrt_df, row.lrt_statistic, row.lrt_p = test
                row.compared_with = current_row.name
                ok.append((e, row, test[2]))
        if not ok:
            break
        e, row, p = max(ok, key=lambda x: x[2])
        removed = p > options.remove_if_p_above
        steps.append({"step": "backward", "effect": e.label, "p": p,
                      "threshold": options.remove_if_p_above, "compared_with": current_row.name,
                      "decision": "removed" if removed else "kept"})
        if p <= options.remove_if_p_above:
            break
        current, current_row = PopulationModel(row.name, row.effects), row
    return ModelComparison(rows, "base", steps, current.name,
                           common=tuple(e.label for e in base_effects))
