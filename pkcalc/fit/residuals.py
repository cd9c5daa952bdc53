"""Tests on the residuals of one subject's fit: runs of signs and a trend with time.

- **Runs test** (Wald & Wolfowitz, Ann Math Stat 1940;11:147): the signs of the
  weighted residuals ordered by time; too few runs (long stretches of one sign)
  mean the curve misses the data systematically.  The p-value is the exact
  lower tail of the number of runs given ``n+`` positive and ``n-`` negative
  signs (Swed & Eisenhart, Ann Math Stat 1943;14:66 -- from memory)::

      P(R = 2m)     = 2 C(n+ - 1, m - 1) C(n- - 1, m - 1) / C(n, n+)
      P(R = 2m + 1) = [C(n+ - 1, m) C(n- - 1, m - 1) + C(n+ - 1, m - 1) C(n- - 1, m)]
                      / C(n, n+)

- **Trend test**: Spearman's rank correlation of the weighted residuals with
  the time since the last dose (scipy), two-sided.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["runs_count", "runs_test", "trend_test"]


def runs_count(signs: np.ndarray) -> int:
    """Number of runs (maximal stretches of equal sign) in a sequence of +1/-1."""
    signs = np.asarray(signs)
    return 0 if signs.size == 0 else int(1 + np.count_nonzero(signs[1:] != signs[:-1]))


def _runs_pmf(r: int, n_pos: int, n_neg: int) -> float:
    """Exact probability of ``r`` runs with ``n_pos`` and ``n_neg`` signs in random order."""
    total = math.comb(n_pos + n_neg, n_pos)
    m, odd = divmod(r, 2)
    if not odd:
        ways = 2 * math.comb(n_pos - 1, m - 1) * math.comb(n_neg - 1, m - 1) if m >= 1 else 0
    else:
        ways = (math.comb(n_pos - 1, m) * math.comb(n_neg - 1, m - 1)
                + math.comb(n_pos - 1, m - 1) * math.comb(n_neg - 1, m)) if m >= 1 else 0
    return ways / total


def runs_test(residuals: np.ndarray) -> tuple[int, float | None]:
    """Runs of signs of residuals already ordered by time.

    Returns
    -------
    runs : int
    p : float or None
        Probability of this few runs or fewer if the signs were in random order
        (exact); None when all residuals have one sign or fewer than 3 are nonzero.

    Examples
    --------
    >>> runs_test(np.array([1.0, 2.0, -1.0, -2.0]))      # ++-- : 2 runs
    (2, 0.3333333333333333)
    """
    x = np.asarray(residuals, float)
    x = x[np.isfinite(x) & (x != 0)]
    signs = np.sign(x)
    n_pos, n_neg = int((signs > 0).sum()), int((signs < 0).sum())
    runs = runs_count(signs)
    if n_pos == 0 or n_neg == 0 or x.size < 3:
        return runs, None
    p = sum(_runs_pmf(r, n_pos, n_neg) for r in range(2, runs + 1))
    return runs, float(min(p, 1.0))


def _average_ranks(x: np.ndarray) -> np.ndarray:
    """Ranks 1..n with ties given their average rank."""
    order = np.argsort(x, kind="stable")
    xs = x[order]
    new = np.r_[True, xs[1:] != xs[:-1]]
    group = np.cumsum(new) - 1
    first = np.flatnonzero(new)
    last = np.r_[first[1:], xs.size] - 1
    ranks = np.empty(x.size)
    ranks[order] = 0.5 * (first + last)[group] + 1.0
    return ranks


def trend_test(residuals: np.ndarray, time_since_dose: np.ndarray) -> float | None:
    """Two-sided p-value of Spearman's rank correlation between residuals and the time
    since the last dose (the t approximation with ``n - 2`` degrees of freedom, as
    ``scipy.stats.spearmanr``); None with fewer than 4 levels or no spread in either."""
    from scipy.special import stdtr

    x = np.asarray(residuals, float)
    t = np.asarray(time_since_dose, float)
    ok = np.isfinite(x) & np.isfinite(t)
    x, t = x[ok], t[ok]
    if x.size < 4 or np.ptp(x) == 0 or np.ptp(t) == 0:
        return None
    rx, rt = _average_ranks(x), _average_ranks(t)
    rx -= rx.mean()
    rt -= rt.mean()
    r = float(rx @ rt / math.sqrt((rx @ rx) * (rt @ rt)))
    df = x.size - 2
    if abs(r) >= 1.0:
        return 0.0
    stat = r * math.sqrt(df / (1.0 - r * r))
    return float(2 * stdtr(df, -abs(stat)))
