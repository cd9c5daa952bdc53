"""A new patient from a population estimate: typical values for their covariates, how
well they are known, how far a patient may lie from them, their predicted course and
a prior for MAP individualisation.

For a patient with covariates ``c`` the typical log-parameters are the model's mean
function (:mod:`pkcalc.population.covariates`), ``mu(c) = b + sum of the effects``:

- **typical values** ``exp(mu)`` with a 95 % (``level``) interval from the
  uncertainty of the fixed effects: ``var(mu) = g' Sigma_b g`` with ``g`` the
  gradient of ``mu`` in the fixed effects (exact for power and categorical effects,
  which are linear in them; by central differences for linear effects) and
  ``Sigma_b`` their block of the covariance step [calc: delta method];
- **between-subject range** ``exp(mu +- z sqrt(omega))``: where a patient with
  these covariates is expected to lie (the typical values taken as known)
  [calc: log-normal quantiles];
- **predicted course**: the model at the typical values, and the median and
  ``level`` range over ``replicates`` patients drawn from ``N(mu, Omega)``
  (seeded) -- a between-subject prediction interval without residual error;
- **prior**: typical values at the covariates with the between-subject SDs, the
  correlation and the residual error -- the MAP prior of ``design``.

Two-stage results have weight models only (typical at the reference weight, fixed
or estimated exponents; per kg); their uncertainty is that of the typical values.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from .. import model
from .._format import format_table, result_html, short, with_caution
from ..core import DoseEvent, Effect, Prior, expand_events
from .covariates import CovariateError, Design, match_column, weight_effects

__all__ = ["PatientParameters", "PatientPrediction", "patient_parameters",
           "patient_prediction", "patient_prior"]

#: Patients drawn for the between-subject prediction interval of a course.
REPLICATES = 2000


@dataclass
class PatientParameters:
    """Typical clearance and volume of one patient (canonical units).

    Attributes
    ----------
    covariates : dict
    clearance, volume, half_life : float
        Typical values at the covariates (L/h, L, h).
    level : float
        Coverage of the intervals.
    clearance_ci, volume_ci : (float, float) or None
        Interval of the typical value (the estimate's uncertainty).
    clearance_range, volume_range : (float, float)
        Between-subject range: where a patient with these covariates lies.
    ln_mean : ndarray, shape (2,)
    ln_covariance : ndarray, shape (2, 2)
        Between-subject covariance of ``ln CL, ln V``.
    notes : list of str
    """

    covariates: dict
    clearance: float
    volume: float
    half_life: float
    level: float
    clearance_ci: tuple[float, float] | None
    volume_ci: tuple[float, float] | None
    clearance_range: tuple[float, float]
    volume_range: tuple[float, float]
    ln_mean: np.ndarray
    ln_covariance: np.ndarray
    notes: list[str] = field(default_factory=list)

    def to_frame(self):
        """One row per parameter: typical value, its interval, the between-subject range."""
        import pandas as pd

        pct = f"{self.level:.0%}"
        rows = []
        for name, unit, value, ci, rng in (
                ("clearance", "L/h", self.clearance, self.clearance_ci, self.clearance_range),
                ("volume", "L", self.volume, self.volume_ci, self.volume_range)):
            rows.append({"parameter": name, "unit": unit, "typical": value,
                         f"typical {pct} CI low": None if ci is None else ci[0],
                         f"typical {pct} CI high": None if ci is None else ci[1],
                         f"between-subject {pct} low": rng[0],
                         f"between-subject {pct} high": rng[1]})
        return pd.DataFrame(rows)

    def summary(self, caution: bool = True) -> str:
        cov = ", ".join(f"{k} {v}" for k, v in self.covariates.items()) or "none"
        pct = f"{self.level:.0%}"
        rows = [[n, u, v, "-" if ci is None else f"{short(ci[0])}-{short(ci[1])}",
                 f"{short(r[0])}-{short(r[1])}"]
                for n, u, v, ci, r in (
                    ("clearance", "L/h", self.clearance, self.clearance_ci,
                     self.clearance_range),
                    ("volume", "L", self.volume, self.volume_ci, self.volume_range))]
        lines = [f"Typical values for a patient with {cov}:",
                 format_table(["parameter", "unit", "typical", f"{pct} CI of the typical",
                               f"{pct} between subjects"], rows),
                 f"half-life {short(self.half_life)} h at the typical values"]
        lines += [f"note: {n}" for n in self.notes]
        return with_caution("\n".join(lines), caution)

    def _repr_html_(self) -> str:
        return result_html(self.summary(caution=False), self.to_frame())


@dataclass
class PatientPrediction:
    """A patient's predicted course from a population estimate (mg/L, h).

    Attributes
    ----------
    parameters : PatientParameters
    time : ndarray
    typical : ndarray
        The course at the typical values.
    median, low, high : ndarray
        Median and ``level`` range over patients drawn between subjects.
    replicates, seed : int
    doses : tuple of DoseEvent
    """

    parameters: PatientParameters
    time: np.ndarray
    typical: np.ndarray
    median: np.ndarray
    low: np.ndarray
    high: np.ndarray
    replicates: int
    seed: int
    doses: tuple[DoseEvent, ...]

    def to_frame(self):
        import pandas as pd

        pct = f"{self.parameters.level:.0%}"
        return pd.DataFrame({"time [h]": self.time, "typical [mg/L]": self.typical,
                             "median [mg/L]": self.median,
                             f"between-subject {pct} low [mg/L]": self.low,
                             f"between-subject {pct} high [mg/L]": self.high})

    def summary(self, caution: bool = True) -> str:
        p = self.parameters
        i = int(np.argmax(self.typical))
        lines = [p.summary(caution=False),
                 f"course: {len(self.doses)} dose record(s), {self.time.size} times from "
                 f"{short(float(self.time[0]))} to {short(float(self.time[-1]))} h; highest "
                 f"typical level {short(float(self.typical[i]))} mg/L at "
                 f"{short(float(self.time[i]))} h ({p.level:.0%} between subjects "
                 f"{short(float(self.low[i]))}-{short(float(self.high[i]))} mg/L)",
                 f"between-subject range from {self.replicates} patients drawn from the "
                 f"estimated variability (seed {self.seed}); residual error not included"]
        return with_caution("\n".join(lines), caution)

    def _repr_html_(self) -> str:
        return result_html(self.summary(caution=False), self.to_frame())


# --------------------------------------------------------------------------- compute
def _mean_function(result) -> tuple[Design, np.ndarray, np.ndarray | None]:
    """The mean function, fixed effects and their covariance of any method's result."""
    if result.method == "marginal" and result.design is not None:
        k = result.design.n_beta
        beta = np.asarray(result.psi[:k], float)
        cov = None if result.psi_covariance is None else np.asarray(
            result.psi_covariance, float)[:k, :k]
        return result.design, beta, cov
    # two-stage methods: the weight model with its exponents taken as fixed
    effects = tuple(Effect(e.column, e.parameter, e.form, e.reference,
                           result.exponents.get(e.parameter, e.fixed))
                    for e in weight_effects(result.covariate, result.reference_weight or 1.0))
    design = Design(effects, ["ln typical clearance", "ln typical volume"],
                    _weight_terms(effects), 0)
    beta = np.log([result.typical["clearance"], result.typical["volume"]])
    se = [result.typical_se.get(k) for k in ("clearance", "volume")]
    cov = None if any(x is None for x in se) else np.diag(
        [(se[0] / result.typical["clearance"]) ** 2, (se[1] / result.typical["volume"]) ** 2])
    return design, beta, cov


def _weight_terms(effects: tuple[Effect, ...]):
    """Terms of fixed weight effects (the two-stage methods' weight models)."""
    from .covariates import _Term

    return [_Term(e, 0 if e.parameter == "clearance" else 1, np.empty(0), [], [])
            for e in effects]


def _gradient(design: Design, beta: np.ndarray, covariates: Mapping) -> np.ndarray:
    """d mu / d beta, shape (2, n_beta), by central differences (exact for the effects
    linear in beta)."""
    g = np.empty((2, beta.size))
    for j in range(beta.size):
        h = 1e-6 * max(1.0, abs(beta[j]))
        up, dn = beta.copy(), beta.copy()
        up[j] += h
        dn[j] -= h
        g[:, j] = (design.means_for(up, covariates) - design.means_for(dn, covariates)) / (2 * h)
    return g


def _normal_quantile(level: float) -> float:
    from scipy.stats import norm

    if not 0 < level < 1:
        raise ValueError(f"level must be between 0 and 1, got {level!r}")
    return float(norm.ppf(0.5 + level / 2))


def patient_parameters(result, covariates: Mapping | None = None,
                       level: float = 0.95) -> PatientParameters:
    """Typical clearance and volume of a patient with ``covariates`` (see the module
    docstring); ``covariates`` maps subjects-table columns to values (a weight in kg,
    a level of a categorical factor ...).

    Raises
    ------
    CovariateError
        A covariate the model needs is missing or outside what the model allows.
    """
    covariates = dict(covariates or {})
    z = _normal_quantile(level)
    design, beta, cov = _mean_function(result)
    if result.covariate == "per_kg" and match_column(covariates.keys(), "weight") is None:
        raise CovariateError("the typical values are per kg: give the patient's 'weight'")
    mu = design.means_for(beta, covariates)
    omega = np.asarray(result.omega, float)
    cis: list[tuple[float, float] | None] = [None, None]
    if cov is not None and np.all(np.isfinite(cov)):
        g = _gradient(design, beta, covariates)
        var = np.einsum("ij,jk,ik->i", g, cov, g)
        cis = [(math.exp(mu[j] - z * math.sqrt(var[j])), math.exp(mu[j] + z * math.sqrt(var[j])))
               if var[j] >= 0 else None for j in range(2)]
    ranges = [(math.exp(mu[j] - z * math.sqrt(omega[j, j])),
               math.exp(mu[j] + z * math.sqrt(omega[j, j]))) for j in range(2)]
    cl, v = math.exp(mu[0]), math.exp(mu[1])
    notes = []
    if result.method != "marginal":
        notes.append(f"{result.method} estimate: the weight model's exponents are taken as "
                     "known; the interval of the typical values is that of the typical "
                     "values alone")
    unused = sorted(k for k in covariates
                    if not any(k.casefold() == e.column.casefold() for e in design.effects))
    if unused:
        notes.append(f"not in the model (ignored): {', '.join(unused)}")
    return PatientParameters(covariates, cl, v, model.LN2 * v / cl, level, cis[0], cis[1],
                             ranges[0], ranges[1], mu, omega, notes)


def patient_prediction(result, covariates: Mapping | None, doses: Sequence[DoseEvent],
                       times, *, level: float = 0.90, replicates: int = REPLICATES,
                       seed: int = 1) -> PatientPrediction:
    """The predicted course of a patient with ``covariates`` under ``doses`` (canonical
    units) at ``times`` (h): typical, median and ``level`` between-subject range."""
    params = patient_parameters(result, covariates, level)
    doses = tuple(doses)
    if not doses or not all(isinstance(d, DoseEvent) for d in doses):
        raise ValueError("doses must be a non-empty sequence of DoseEvent")
    t = np.asarray(times, float).ravel()
    if t.size == 0 or not np.all(np.isfinite(t)) or np.any(t < 0):
        raise ValueError("times must be finite, non-negative hours")
    if not 10 <= int(replicates) <= 100_000:
        raise ValueError(f"replicates must be from 10 to 100000, got {replicates!r}")
    events = expand_events(doses)
    typical = model.concentration(t, *events, params.clearance, params.volume)
    rng = np.random.default_rng(seed)
    draws = rng.multivariate_normal(params.ln_mean, params.ln_covariance, size=int(replicates))
    conc = np.stack([model.concentration(t, *events, math.exp(a), math.exp(b))
                     for a, b in draws])
    q = (1 - level) / 2
    low, median, high = np.quantile(conc, [q, 0.5, 1 - q], axis=0)
    return PatientPrediction(params, t, typical, median, low, high, int(replicates), seed,
                             doses)


def patient_prior(result, covariates: Mapping | None = None) -> Prior:
    """The MAP prior of a patient: typical values at ``covariates`` (the reference
    values without), the between-subject SDs and correlation, the residual error."""
    covariates = dict(covariates or {})
    design, beta, _ = _mean_function(result)
    if covariates or not design.effects:
        mu = design.means_for(beta, covariates)
        cl, v, per_kg = math.exp(mu[0]), math.exp(mu[1]), False
    else:
        cl, v = result.typical["clearance"], result.typical["volume"]
        per_kg = result.covariate == "per_kg"
        if any(e.column != "weight" for e in design.effects) or (
                design.effects and not per_kg):
            raise CovariateError("the model has covariate effects: give the patient's "
                                 "covariates (" + ", ".join(sorted({e.column for e in
                                                                    design.effects})) + ")")
    omega = np.asarray(result.omega, float)
    sd = np.sqrt(np.diag(omega))
    corr = float(omega[0, 1] / (sd[0] * sd[1])) if sd.all() else 0.0
    return Prior(cl, v, float(sd[0]), float(sd[1]), correlation=corr,
                 additive=result.residual_error.get("additive", 0.0),
                 proportional=result.residual_error.get("proportional", 0.0),
                 clearance_per_kg=per_kg, volume_per_kg=per_kg,
                 source=f"population estimate ({result.method}, model "
                        f"'{result.model_name}')")

