"""The statistical surface of a population estimate, laid out as statsmodels lays out
its results (``params``, ``bse``, ``conf_int(alpha)``, ``cov_params()``,
``pvalues``; statsmodels' ``LikelihoodModelResults``), for every method.

Every reported parameter is one row: the typical values, the covariate effects, the
between-subject variances and CVs, the correlation and the residual SDs
(marginal likelihood), or the typical values, weight exponents, CVs and residual
SDs (two-stage methods).  Canonical units; per kg where the weight model says so.

- Standard errors: the inverse observed information (delta method from the observed
  information, :mod:`pkcalc.population.estimate`), or the bootstrap / linearised
  information of the two-stage methods; ``None`` where there is none.
- Intervals: on the log scale for positive quantities (``value exp(+-z SE/value)``),
  on the natural scale otherwise (correlations clipped to [-1, 1]); ``z`` the
  normal quantile of ``1 - alpha/2``.  At ``alpha = 0.05`` they are the intervals
  of the JSON document.
- Wald tests of "no effect" for the covariate effects: ``z = value / SE`` for
  exponents and slopes, ``z = ln(factor) / (SE / factor)`` for factors of a level;
  two-sided normal p-values.  Other parameters have no test (NaN), as a test of a
  typical clearance against zero means nothing.
"""

from __future__ import annotations

import math

import numpy as np

from ..core import CANONICAL_UNITS

__all__ = ["StatRow", "interval", "stat_rows", "wald_p"]


class StatRow:
    """One reported parameter: name, value, unit, SE, whether it is positive (log-scale
    interval) and whether it is a covariate effect (a Wald test)."""

    __slots__ = ("ci_high", "ci_low", "effect", "kind", "name", "positive", "se", "unit",
                 "value")

    def __init__(self, name: str, value: float, unit: str, se: float | None,
                 positive: bool, effect: str | None = None, kind: str | None = None,
                 ci: tuple[float, float] | None = None) -> None:
        self.name, self.value, self.unit, self.se = name, float(value), unit, se
        self.positive, self.effect, self.kind = positive, effect, kind
        self.ci_low, self.ci_high = ci if ci is not None else (None, None)


def _unit(kind: str | None, name: str, per_kg: bool) -> str:
    if kind is None:
        return "%" if name.endswith("%") else ""
    unit = CANONICAL_UNITS[kind]
    return unit + ("/kg" if per_kg and name.startswith("typical") else "")


def stat_rows(result) -> list[StatRow]:
    """Every reported parameter of ``result`` (any method), in the order of the text."""
    per_kg = result.covariate == "per_kg"
    if result.method == "marginal" and result.parameters:
        kinds = {e["name"]: e["kind"] for e in result.effects}
        rows = []
        for p in result.parameters:
            positive = p.get("positive", p["name"].startswith("typical"))
            ci = None if p["ci_low"] is None else (p["ci_low"], p["ci_high"])
            rows.append(StatRow(p["name"], p["value"], _unit(p["kind"], p["name"], per_kg),
                                p["se"], positive, kinds.get(p["name"]), p["kind"], ci))
        return rows
    rows = []
    for k in ("clearance", "volume"):
        ci = result.typical_ci.get(k)
        rows.append(StatRow(f"typical {k}", result.typical[k],
                            _unit(k, "typical", per_kg), result.typical_se.get(k), True,
                            kind=k, ci=ci))
    for k, v in result.exponents.items():
        ci = (result.exponent_ci or {}).get(k)
        se = (result.exponent_se or {}).get(k)
        rows.append(StatRow(f"weight on {k}: exponent", v, "", se, False,
                            effect="exponent" if se is not None else None, ci=ci))
    for k, v in result.variability_cv_percent.items():
        rows.append(StatRow(f"between-subject CV of {k} %", v, "%", None, True))
    for k, v in result.residual_error.items():
        rows.append(StatRow(f"{k} residual SD", v,
                            CANONICAL_UNITS["concentration"] if k == "additive" else "",
                            None, True, kind="concentration" if k == "additive" else None))
    return rows


def interval(row: StatRow, z: float) -> tuple[float, float]:
    """The ``z`` interval of a row (log scale for positive quantities)."""
    if row.se is None:
        return math.nan, math.nan
    if row.positive and row.value > 0:
        s = row.se / row.value
        return row.value * math.exp(-z * s), row.value * math.exp(z * s)
    lo, hi = row.value - z * row.se, row.value + z * row.se
    if row.name.startswith("correlation"):
        lo, hi = max(lo, -1.0), min(hi, 1.0)
    return lo, hi


def wald_p(row: StatRow) -> float:
    """Two-sided p-value of "no effect" for a covariate effect (NaN otherwise)."""
    from scipy.stats import norm

    if row.effect is None or row.se is None or row.se <= 0:
        return math.nan
    if row.effect == "factor":
        if not row.value > 0:
            return math.nan
        z = math.log(row.value) / (row.se / row.value)
    else:
        z = row.value / row.se
    return float(2 * norm.sf(abs(z)))


def covariance(result, rows: list[StatRow]) -> np.ndarray:
    """Covariance of the reported parameters: the covariance step's (delta method) for
    the marginal method, else the squared SEs on the diagonal with unknown (NaN)
    covariances."""
    n = len(rows)
    cov = getattr(result, "parameter_covariance", None)
    if cov is not None and np.shape(cov) == (n, n):
        return np.array(cov, float)
    out = np.full((n, n), np.nan)
    for i, r in enumerate(rows):
        out[i, i] = np.nan if r.se is None else r.se**2
    return out
