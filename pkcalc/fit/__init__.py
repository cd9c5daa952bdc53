"""Individual estimation of clearance, volume and half-life from sampled levels.

- ``objective``: subjects as padded arrays; least-squares, likelihood (additive,
  proportional, combined; Beal's M3 for BLQ) and MAP objectives with analytic
  gradients;
- ``solver``: a damped scoring minimiser vectorised over subjects and starts;
- ``data``: subjects as one batch (BLQ method, weights, the prior);
- ``starts``: data-based starting values and the multi-start solve;
- ``uncertainty``: covariances, Wald (log scale) and profile intervals,
  identifiability;
- ``result``: the result types; ``individual``: :func:`fit_subjects`;
- ``adequacy``: one compartment against two exponentials, with residual tests
  (``residuals``), beside every fit; ``compare``: the fit beside NCA.
"""

from .adequacy import Adequacy, adequacy_counts, check_adequacy
from .compare import Comparison, compare_with_nca
from .individual import Estimate, FitResult, fit_subjects, starting_values
from .objective import Batch, build_batch, evaluate
from .solver import Solution, minimise

__all__ = [
    "Adequacy",
    "Batch",
    "Comparison",
    "Estimate",
    "FitResult",
    "Solution",
    "adequacy_counts",
    "build_batch",
    "check_adequacy",
    "compare_with_nca",
    "evaluate",
    "fit_subjects",
    "minimise",
    "starting_values",
]
