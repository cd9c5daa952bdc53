"""Result types of individual estimation: a parameter estimate and one subject's fit."""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import lru_cache
from typing import Any

import numpy as np

from .. import model
from .._format import format_table, short, with_caution

#: How the log-scale parameters of the estimates enter: ln x = a . (ln CL, ln V).
_LOG_MAP = {"clearance": (1.0, 0.0), "volume": (0.0, 1.0), "elimination_rate": (1.0, -1.0),
            "half_life": (-1.0, 1.0)}
#: The standard normal 97.5 % quantile (scipy.stats.norm.ppf(0.975)).
Z95 = 1.959963984540054


@lru_cache(maxsize=256)
def wald_quantile(n_obs: int, n_params: int, kind: str, probability: float = 0.975) -> float:
    """Quantile (97.5 % by default) for Wald intervals: Student's t on ``n - p`` degrees
    of freedom for least squares and likelihood fits (small-sample practice in
    nonlinear regression, e.g. Bates & Watts 1988 -- from memory), normal for MAP
    fits."""
    from scipy.stats import norm
    from scipy.stats import t as student_t

    if kind == "map" or n_obs - n_params < 1:
        return Z95 if probability == 0.975 else float(norm.ppf(probability))
    return float(student_t.ppf(probability, n_obs - n_params))


@dataclass(frozen=True)
class Estimate:
    """A parameter estimate with its uncertainty (canonical units).

    ``se`` is the delta-method SE on the natural scale; ``rse_percent`` is
    100 x SE of the log; ``ci_low``/``ci_high`` the 95 % interval, built on the
    log scale (Wald) or by profile likelihood.  None when not estimable.
    """

    value: float
    se: float | None = None
    rse_percent: float | None = None
    ci_low: float | None = None
    ci_high: float | None = None

    def __str__(self) -> str:
        if self.se is None:
            return f"{short(self.value)} (SE not available)"
        return (f"{short(self.value)} (SE {short(self.se)}, 95% CI {short(self.ci_low)}-"
                f"{short(self.ci_high)})")


@dataclass
class FitResult:
    """One subject's fit.

    Attributes
    ----------
    subject : str
    converged : bool
    method : str
        ``least_squares``, ``likelihood`` or ``map``.
    error_model, weighting, blq_method : str or None
    estimates : dict of str to Estimate
        ``clearance`` (L/h), ``volume`` (L), ``elimination_rate`` (1/h), ``half_life`` (h).
    correlation : float or None
        Correlation of the ln CL and ln V estimates.
    residual_error : dict of str to Estimate
        ``additive`` (mg/L) and/or ``proportional`` (fraction), estimated or fixed.
    objective : float
        ``-2 ln L`` at the estimate (for MAP: of the posterior, constants included).
    aic, bic : float
    n_obs, n_blq, n_params : int
    starts, starts_agreed, iterations : int
    time, observed, predicted : ndarray
        Levels used (BLQ rows carry their LLOQ), predictions.
    blq : ndarray of bool
    residuals, weighted_residuals : ndarray
    warnings, notes : list of str
    prior : dict
        MAP only: typical values, ``eta`` and the prior variance remaining.
    adequacy : Adequacy or None
        Whether one compartment describes the levels (:mod:`pkcalc.fit.adequacy`);
        None when the check was turned off.
    """

    subject: str
    converged: bool
    method: str
    error_model: str | None
    weighting: str | None
    blq_method: str
    estimates: dict[str, Estimate]
    correlation: float | None
    residual_error: dict[str, Estimate]
    objective: float
    aic: float
    bic: float
    n_obs: int
    n_blq: int
    n_params: int
    starts: int
    starts_agreed: int
    iterations: int
    time: np.ndarray
    observed: np.ndarray
    predicted: np.ndarray
    blq: np.ndarray
    residuals: np.ndarray
    weighted_residuals: np.ndarray
    dose_start: np.ndarray
    dose_amount: np.ndarray
    dose_duration: np.ndarray
    warnings: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    prior: dict[str, float] = field(default_factory=dict)
    weight: float | None = None
    initial_concentration: float = 0.0
    clock_origin: str | None = None
    adequacy: Any = None

    @property
    def clearance(self) -> float:
        return self.estimates["clearance"].value

    @property
    def volume(self) -> float:
        return self.estimates["volume"].value

    # ------------------------------------------------------------------ statistics
    def _stat_items(self) -> list[tuple[str, Estimate, str]]:
        units = {"clearance": "L/h", "volume": "L", "elimination_rate": "1/h",
                 "half_life": "h"}
        items = [(k, e, units.get(k, "")) for k, e in self.estimates.items()]
        items += [(f"{k} residual SD", e, "mg/L" if k == "additive" else "")
                  for k, e in self.residual_error.items()]
        return items

    @property
    def params(self):
        """The estimates (pandas Series by name; units in :attr:`units`), laid out as
        statsmodels' results: clearance, volume, elimination rate, half-life, then the
        residual error."""
        import pandas as pd

        items = self._stat_items()
        return pd.Series([e.value for _, e, _ in items], index=[n for n, _, _ in items],
                         name="value")

    @property
    def units(self):
        import pandas as pd

        items = self._stat_items()
        return pd.Series([u for _, _, u in items], index=[n for n, _, _ in items], name="unit")

    @property
    def bse(self):
        """Standard errors (delta method on the natural scale; NaN where none)."""
        import pandas as pd

        items = self._stat_items()
        return pd.Series([np.nan if e.se is None else e.se for _, e, _ in items],
                         index=[n for n, _, _ in items], name="se")

    def conf_int(self, alpha: float = 0.05):
        """``1 - alpha`` intervals: columns 0 (lower) and 1 (upper), as statsmodels gives
        them.  At 0.05 the reported intervals (Wald on the log scale, or profile
        likelihood); otherwise Wald on the log scale with the fit's quantile (Student's t
        on n - p degrees of freedom, normal for MAP)."""
        import pandas as pd

        if isinstance(alpha, str):
            raise ValueError(f"conf_int takes alpha (a number); for one parameter use "
                             f"conf_int().loc[{alpha!r}]")
        if not 0 < alpha < 1:
            raise ValueError(f"alpha must be between 0 and 1, got {alpha!r}")
        q = wald_quantile(self.n_obs, self.n_params, self.method, 1 - alpha / 2)
        rows = []
        for _, e, _ in self._stat_items():
            if abs(alpha - 0.05) < 1e-12 and e.ci_low is not None:
                rows.append((e.ci_low, e.ci_high))
            elif e.se is None or e.rse_percent is None:
                rows.append((np.nan, np.nan))
            else:
                s = e.rse_percent / 100
                rows.append((e.value * np.exp(-q * s), e.value * np.exp(q * s)))
        return pd.DataFrame(rows, index=[n for n, _, _ in self._stat_items()], columns=[0, 1])

    def cov_params(self):
        """Covariance of :attr:`params`: the structural parameters from the covariance of
        ``ln CL, ln V`` (delta method, ``cov = x_i x_j a_i' S a_j``); the residual error
        on the diagonal only (NaN where unknown)."""
        import pandas as pd

        items = self._stat_items()
        n = len(items)
        out = np.full((n, n), np.nan)
        cl, v = self.estimates["clearance"], self.estimates["volume"]
        if cl.rse_percent is not None and v.rse_percent is not None \
                and self.correlation is not None:
            s1, s2 = cl.rse_percent / 100, v.rse_percent / 100
            sigma = np.array([[s1 * s1, self.correlation * s1 * s2],
                              [self.correlation * s1 * s2, s2 * s2]])
            for i, (ni, ei, _) in enumerate(items):
                for j, (nj, ej, _) in enumerate(items):
                    if ni in _LOG_MAP and nj in _LOG_MAP:
                        a, b = np.array(_LOG_MAP[ni]), np.array(_LOG_MAP[nj])
                        out[i, j] = ei.value * ej.value * float(a @ sigma @ b)
        for i, (_, e, _) in enumerate(items):
            if np.isnan(out[i, i]) and e.se is not None:
                out[i, i] = e.se**2
        names = [n for n, _, _ in items]
        return pd.DataFrame(out, index=names, columns=names)

    def events(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Dose events for the model (an initial level, if any, as an initial-level
        event at time 0)."""
        start, amount, duration = self.dose_start, self.dose_amount, self.dose_duration
        if self.initial_concentration:
            start, amount, duration = (np.append(start, 0.0),
                                       np.append(amount, self.initial_concentration),
                                       np.append(duration, model.INITIAL_LEVEL))
        return start, amount, duration

    def predict_two_exponential(self, t) -> np.ndarray | None:
        """The adequacy check's two-exponential curve at times ``t`` (a sensitivity
        check), or None when there is none."""
        if self.adequacy is None:
            return None
        return self.adequacy.predict_two_exponential(t, *self.events())

    def predict(self, t) -> np.ndarray:
        """Concentration (mg/L) at times ``t`` (h) with the estimates (an initial level,
        if any, included)."""
        return model.concentration(np.asarray(t, float), *self.events(), self.clearance,
                                   self.volume)

    def _repr_html_(self) -> str:
        """Notebook view: the caution, the table and the summary."""
        from .._format import result_html

        return result_html(self.summary(caution=False), self.to_frame())

    def to_frame(self):
        """Per-level diagnostics: time, observed, predicted, residuals, BLQ flag."""
        import pandas as pd

        frame = pd.DataFrame({"subject": self.subject, "time [h]": self.time,
                              "observed [mg/L]": self.observed,
                              "predicted [mg/L]": self.predicted, "blq": self.blq,
                              "residual [mg/L]": self.residuals,
                              "weighted_residual": self.weighted_residuals})
        if self.clock_origin:  # the original clock time beside the hours since the first dose
            origin = pd.Timestamp(self.clock_origin)
            frame.insert(2, "clock_time", [(origin + pd.Timedelta(hours=float(h))).isoformat()
                                           for h in self.time])
        return frame

    def summary(self, caution: bool = True) -> str:
        """Plain-text summary (canonical units)."""
        rows = [[k, e.value, e.se, e.rse_percent, e.ci_low, e.ci_high]
                for k, e in self.estimates.items()]
        rows += [[f"residual {k}", e.value, e.se, e.rse_percent, e.ci_low, e.ci_high]
                 for k, e in self.residual_error.items()]
        lines = [f"Subject {self.subject}: {self.method.replace('_', ' ')}"
                 f" ({self.error_model or self.weighting}), "
                 f"{'converged' if self.converged else 'NOT converged'}, "
                 f"-2 ln L {short(self.objective, 6)}, AIC {short(self.aic, 6)}, "
                 f"{self.n_obs} levels ({self.n_blq} BLQ), {self.starts_agreed}/{self.starts} "
                 "starts agreed",
                 format_table(["parameter", "value", "SE", "RSE %", "CI low", "CI high"], rows)]
        if self.adequacy is not None:
            lines.append(f"one compartment: {self.adequacy.verdict.replace('_', ' ')} -- "
                         f"{self.adequacy.reason}")
        lines += [f"warning: {w}" for w in self.warnings]
        lines += [f"note: {n}" for n in self.notes]
        return with_caution("\n".join(lines), caution)
