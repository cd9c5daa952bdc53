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

import numpy as np
from scipy.special import gammaln, stdtr

__all__ = ["runs_count", "runs_test", "runs_tests", "trend_test", "trend_tests"]


def runs_count(signs: np.ndarray) -> int:
    """Number of runs (maximal stretches of equal sign) in a sequence of +1/-1."""
    signs = np.asarray(signs)
    return 0 if signs.size == 0 else int(1 + np.count_nonzero(signs[1:] != signs[:-1]))


def _log_comb(n: np.ndarray, k: np.ndarray) -> np.ndarray:
    """ln C(n, k), -inf where k < 0 or k > n."""
    ok = (k >= 0) & (k <= n)
    n_, k_ = np.where(ok, n, 0), np.where(ok, k, 0)
    return np.where(ok, gammaln(n_ + 1) - gammaln(k_ + 1) - gammaln(n_ - k_ + 1), -np.inf)


def runs_tests(residuals: np.ndarray, mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Runs test of every row (residuals already in time order; ``mask`` marks the
    ones to use -- zero and non-finite residuals are skipped).

    Returns
    -------
    runs : ndarray of int, shape (B,)
    p : ndarray, shape (B,)
        Exact ``P(R <= runs)`` (see the module); NaN when a row has one sign only
        or fewer than 3 usable residuals.
    """
    x = np.asarray(residuals, float)
    use = np.asarray(mask, bool) & np.isfinite(x) & (x != 0)
    n = x.shape[1]
    # compact each row's usable signs to the left, in order
    order = np.argsort(~use, axis=1, kind="stable")
    sign = np.take_along_axis(np.where(use, np.sign(x), 0.0), order, axis=1)
    count = use.sum(axis=1)
    valid_pair = np.arange(1, n)[None, :] < count[:, None]
    runs = np.where(count > 0, 1 + (valid_pair & (sign[:, 1:] != sign[:, :-1])).sum(axis=1), 0)
    n_pos, n_neg = (sign > 0).sum(axis=1), (sign < 0).sum(axis=1)
    r = np.arange(2, max(n, 2) + 1)[None, :]                       # possible run counts
    m, odd = r // 2, r % 2 == 1
    a, c = (n_pos - 1)[:, None], (n_neg - 1)[:, None]
    even_ways = np.log(2.0) + _log_comb(a, m - 1) + _log_comb(c, m - 1)
    odd_ways = np.logaddexp(_log_comb(a, m) + _log_comb(c, m - 1),
                            _log_comb(a, m - 1) + _log_comb(c, m))
    log_total = _log_comb((n_pos + n_neg)[:, None], n_pos[:, None])
    with np.errstate(invalid="ignore"):
        pmf = np.exp(np.where(odd, odd_ways, even_ways) - log_total)
    p = np.where(r <= runs[:, None], np.nan_to_num(pmf), 0.0).sum(axis=1)
    p = np.where((n_pos > 0) & (n_neg > 0) & (count >= 3), np.minimum(p, 1.0), np.nan)
    return runs.astype(int), p


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
    >>> runs, p = runs_test(np.array([1.0, 2.0, -1.0, -2.0]))   # ++-- : 2 runs
    >>> runs, round(p, 12)                                     # 2 of the 6 orders
    (2, 0.333333333333)
    """
    x = np.asarray(residuals, float)[None, :]
    runs, p = runs_tests(x, np.ones_like(x, bool))
    return int(runs[0]), None if np.isnan(p[0]) else float(p[0])


def trend_tests(residuals: np.ndarray, time_since_dose: np.ndarray, mask: np.ndarray
                ) -> np.ndarray:
    """Two-sided p-values of Spearman's rank correlation between residuals and the
    time since the last dose, per row (the t approximation with ``n - 2`` degrees of
    freedom, ties at their average rank, as ``scipy.stats.spearmanr``); NaN with
    fewer than 4 usable levels or no spread in either."""
    from scipy.stats import rankdata

    x = np.asarray(residuals, float)
    t = np.asarray(time_since_dose, float)
    use = np.asarray(mask, bool) & np.isfinite(x) & np.isfinite(t)
    n = use.sum(axis=1)
    # padding ranks after every usable value, so it cannot disturb their ranks
    rx = rankdata(np.where(use, x, np.inf), axis=1)
    rt = rankdata(np.where(use, t, np.inf), axis=1)
    nn = np.maximum(n, 1)
    dx = np.where(use, rx - (np.where(use, rx, 0).sum(axis=1) / nn)[:, None], 0.0)
    dt = np.where(use, rt - (np.where(use, rt, 0).sum(axis=1) / nn)[:, None], 0.0)
    sxx, stt = (dx * dx).sum(axis=1), (dt * dt).sum(axis=1)
    ok = (n >= 4) & (sxx > 0) & (stt > 0)
    r = np.where(ok, (dx * dt).sum(axis=1) / np.sqrt(np.where(ok, sxx * stt, 1.0)), 0.0)
    r = np.clip(r, -1.0, 1.0)
    df = np.maximum(n - 2, 1)
    with np.errstate(divide="ignore"):
        stat = np.abs(r) * np.sqrt(df / np.maximum(1.0 - r * r, 0.0))
    p = np.where(np.abs(r) >= 1.0, 0.0, 2 * stdtr(df, -stat))
    return np.where(ok, p, np.nan)


def trend_test(residuals: np.ndarray, time_since_dose: np.ndarray) -> float | None:
    """:func:`trend_tests` of one series; None when it cannot be computed."""
    x = np.asarray(residuals, float)[None, :]
    p = trend_tests(x, np.asarray(time_since_dose, float)[None, :], np.ones_like(x, bool))
    return None if np.isnan(p[0]) else float(p[0])
