"""The result of a population estimate (every method)."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._format import format_table, short, with_caution
from ..fit import FitResult


@dataclass
class PopulationResult:
    """Population estimates (canonical units; per kg when ``covariate == 'per_kg'``).

    Attributes
    ----------
    method : str
        ``marginal`` (maximum marginal likelihood), ``two-stage`` or ``iterative``.
    typical : dict of str to float
        Typical clearance and volume (at the reference weight).
    typical_se : dict of str to float or None
        Standard errors (bootstrap when run, otherwise sqrt(omega^2/N) on the log
        scale times the value).
    typical_ci : dict of str to (float, float) or None
        95 % intervals (bootstrap percentiles, or log-scale Wald).
    variability_cv_percent : dict of str to float
        Between-subject CV, ``100 sqrt(exp(omega^2) - 1)``.
    omega : ndarray, shape (2, 2)
        Covariance of ``ln CL, ln V`` between subjects.
    correlation : float
    exponents : dict of str to float
        Weight exponents (fixed or estimated).
    exponent_ci : dict of str to (float, float) or None
    residual_error : dict of str to float
    shrinkage_percent : dict of str to float
        ``100 (1 - SD(eta_i) / omega)`` (iterative only).
    subjects : list of FitResult
        Individual estimates (MAP under the final population prior for the
        iterative method).
    failures : list of (str, str)
    iterations : int
    objective_per_iteration : list of float
        Approximate ``-2 ln L`` (first-order Laplace form) per iteration.
    converged : bool
    percentiles : dict
        Two-stage: median and 5th/95th percentiles of the individual estimates.
    notes, warnings : list of str
    subject_means : dict of str to (float, float)
        Each subject's typical ``ln CL, ln V`` (with its covariates).
    model_name, effects, parameters : str, list of dict
        Marginal likelihood: the model, each covariate effect and every estimated
        parameter with its SE and 95 % interval (from the observed information).
    objective, n_parameters, n_levels, aic, bic : float, int
        ``-2 ln L`` of the marginal likelihood, parameters, levels; AIC ``= -2 ln L
        + 2 p``, BIC ``= -2 ln L + p ln(levels)``.
    parameter_names, parameter_correlation, condition_number
        Covariance of the estimates (inverse observed information) on the estimation
        scale.
    nodes : int
        Gauss-Hermite nodes per dimension (1: Laplace).
    parameter_covariance : ndarray or None
        Delta-method covariance of ``parameters`` (marginal likelihood).
    psi_covariance : ndarray or None
        Covariance of the estimation-scale parameters (``parameter_names``).
    design : Design or None
        The covariate model (mean function) without the study's data, for new patients.

    The statistical surface follows statsmodels' results: :attr:`params`, :attr:`units`,
    :attr:`bse`, :meth:`conf_int`, :meth:`cov_params`, :attr:`pvalues`
    (:mod:`pkcalc.population.stats`); a new patient: :meth:`individual_parameters`,
    :meth:`predict`, :meth:`to_prior` (:mod:`pkcalc.population.patient`).
    """

    method: str
    typical: dict[str, float]
    variability_cv_percent: dict[str, float]
    omega: np.ndarray
    residual_error: dict[str, float]
    subjects: list[FitResult]
    failures: list[tuple[str, str]]
    covariate: str = "none"
    reference_weight: float | None = None
    exponents: dict[str, float] = field(default_factory=dict)
    exponent_ci: dict[str, tuple[float, float]] | None = None
    typical_se: dict[str, float | None] = field(default_factory=dict)
    typical_ci: dict[str, tuple[float, float] | None] = field(default_factory=dict)
    correlation: float | None = None
    shrinkage_percent: dict[str, float] = field(default_factory=dict)
    iterations: int = 0
    objective_per_iteration: list[float] = field(default_factory=list)
    converged: bool = True
    percentiles: dict[str, dict[str, float]] = field(default_factory=dict)
    bootstrap: dict[str, object] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    eta: np.ndarray | None = None
    population_predictions: dict[str, np.ndarray] = field(default_factory=dict)
    subject_means: dict[str, tuple[float, float]] = field(default_factory=dict)
    # marginal likelihood (method "marginal")
    model_name: str = "base"
    effects: list[dict] = field(default_factory=list)
    parameters: list[dict] = field(default_factory=list)
    objective: float | None = None
    n_parameters: int | None = None
    n_levels: int | None = None
    aic: float | None = None
    bic: float | None = None
    parameter_names: list[str] = field(default_factory=list)
    parameter_correlation: np.ndarray | None = None
    condition_number: float | None = None
    nodes: int | None = None
    between_subject: str = "full"
    seconds: float | None = None
    comparison: object | None = None
    model_effects: list = field(default_factory=list)
    psi: np.ndarray | None = None
    exponent_se: dict[str, float] | None = None
    parameter_covariance: np.ndarray | None = None
    psi_covariance: np.ndarray | None = None
    design: Any = None

    # ------------------------------------------------------------------ statistics
    def _rows(self):
        from .stats import stat_rows

        return stat_rows(self)

    @property
    def params(self):
        """Every reported parameter (pandas Series by name; canonical units in
        :attr:`units`)."""
        import pandas as pd

        rows = self._rows()
        return pd.Series([r.value for r in rows], index=[r.name for r in rows], name="value")

    @property
    def units(self):
        """The unit of each of :attr:`params` ('' for numbers without a unit)."""
        import pandas as pd

        rows = self._rows()
        return pd.Series([r.unit for r in rows], index=[r.name for r in rows], name="unit")

    @property
    def bse(self):
        """Standard errors of :attr:`params` (NaN where there is none)."""
        import pandas as pd

        rows = self._rows()
        return pd.Series([np.nan if r.se is None else r.se for r in rows],
                         index=[r.name for r in rows], name="se")

    def conf_int(self, alpha: float = 0.05):
        """``1 - alpha`` intervals of :attr:`params`: a DataFrame with columns 0 (lower)
        and 1 (upper) as statsmodels gives them; log scale for positive quantities."""
        import pandas as pd
        from scipy.stats import norm

        from .stats import interval

        if not 0 < alpha < 1:
            raise ValueError(f"alpha must be between 0 and 1, got {alpha!r}")
        z = float(norm.ppf(1 - alpha / 2))
        rows = self._rows()
        return pd.DataFrame([interval(r, z) for r in rows], index=[r.name for r in rows],
                            columns=[0, 1])

    def cov_params(self):
        """Covariance of :attr:`params` (delta method from the covariance step; NaN where
        unknown)."""
        import pandas as pd

        from .stats import covariance

        rows = self._rows()
        names = [r.name for r in rows]
        return pd.DataFrame(covariance(self, rows), index=names, columns=names)

    @property
    def pvalues(self):
        """Wald p-values of "no effect" for the covariate effects (NaN for the other
        parameters)."""
        import pandas as pd

        from .stats import wald_p

        rows = self._rows()
        return pd.Series([wald_p(r) for r in rows], index=[r.name for r in rows],
                         name="p")

    # ------------------------------------------------------------------ a new patient
    def individual_parameters(self, subject: dict | None = None, level: float = 0.95):
        """Typical clearance and volume for a patient with the covariates ``subject``
        (column -> value), with the interval of the typical values and the
        between-subject range (:func:`pkcalc.population.patient.patient_parameters`)."""
        from .patient import patient_parameters

        return patient_parameters(self, subject, level)

    def predict(self, subject: dict | None, doses, times, *, level: float = 0.90,
                replicates: int = 2000, seed: int = 1):
        """The course of a patient with covariates ``subject`` under ``doses`` (a list
        of :class:`~pkcalc.core.DoseEvent`) at ``times`` (h): typical, median and the
        ``level`` between-subject range
        (:func:`pkcalc.population.patient.patient_prediction`)."""
        from .patient import patient_prediction

        return patient_prediction(self, subject, doses, times, level=level,
                                  replicates=replicates, seed=seed)

    def to_prior(self, subject: dict | None = None):
        """The MAP prior (:class:`~pkcalc.core.Prior`) of a patient with covariates
        ``subject`` -- for ``adjust_map`` and design files."""
        from .patient import patient_prior

        return patient_prior(self, subject)

    def summary(self, caution: bool = True) -> str:
        """Plain-text summary (canonical units), after the caution."""
        rows = [[k, v, self.typical_se.get(k), self.variability_cv_percent.get(k),
                 self.shrinkage_percent.get(k)] for k, v in self.typical.items()]
        effects = "; ".join(e.label for e in self.model_effects) if self.model_effects else (
            f"weight model {self.covariate}" if self.covariate != "none" else "none")
        lines = [f"Population ({self.method}, model '{self.model_name}', effects: {effects}); "
                 f"{len(self.subjects)} subjects, {self.iterations} iterations, "
                 f"{'converged' if self.converged else 'NOT converged'}",
                 format_table(["parameter", "typical", "SE", "CV %", "shrinkage %"], rows)]
        if self.exponents:
            lines.append("weight exponents: " + ", ".join(
                f"{k} {short(v)}" for k, v in self.exponents.items()))
        lines.append("residual error: " + ", ".join(
            f"{k} {short(v)}" for k, v in self.residual_error.items()))
        if self.objective is not None:
            lines.append(f"-2 ln L {short(self.objective, 8)}, {self.n_parameters} parameters, "
                         f"AIC {short(self.aic, 8)}, BIC {short(self.bic, 8)}")
        if self.parameters:
            lines.append(format_table(
                ["parameter", "value", "SE", "RSE %", "CI low", "CI high"],
                [[p["name"], p["value"], p["se"], p["rse_percent"], p["ci_low"], p["ci_high"]]
                 for p in self.parameters]))
        lines += [f"note: {n}" for n in self.notes]
        lines += [f"warning: {w}" for w in self.warnings]
        return with_caution("\n".join(lines), caution)

    def _repr_html_(self) -> str:
        """Notebook view: the caution, the table and the summary."""
        from .._format import result_html

        return result_html(self.summary(caution=False), self.to_frame())

    def to_frame(self):
        """One row per subject: individual estimates, ln deviations from typical, weight."""
        import pandas as pd

        rows = []
        for i, r in enumerate(self.subjects):
            row = {"subject": r.subject, "weight [kg]": r.weight,
                   "clearance [L/h]": r.clearance, "volume [L]": r.volume,
                   "half_life [h]": r.estimates["half_life"].value}
            if r.clock_origin:
                row["first_dose_clock"] = r.clock_origin
            if self.eta is not None:
                row["ln_clearance_deviation"], row["ln_volume_deviation"] = self.eta[i]
            rows.append(row)
        return pd.DataFrame(rows)


