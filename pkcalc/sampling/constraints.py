"""Where levels may be drawn: the allowed set of times and its checks.

The allowed set is the sampling window minus the infusions (when levels must
not be drawn during one) intersected with the allowed hours of the day (when
the scenario runs on the clock): a union of closed intervals.  The optimiser
works on a coordinate ``u`` in ``[0, L]`` (``L`` the allowed set's total
length) mapped onto the set piece by piece, so every time it proposes lies in
the set exactly; the minimum spacing is a constraint on the mapped times.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["AllowedSet", "allowed_set", "spacing_ok"]

#: Times closer than this (h) count as equal when checking constraints.
TOLERANCE = 1e-9


class AllowedSet:
    """A union of disjoint closed intervals, sorted, with the ``u -> t`` mapping."""

    def __init__(self, pieces: list[tuple[float, float]]) -> None:
        self.pieces = [(float(a), float(b)) for a, b in pieces if b >= a]
        lengths = np.array([b - a for a, b in self.pieces], float)
        self.starts = np.array([a for a, _ in self.pieces], float)
        self.cum = np.concatenate([[0.0], np.cumsum(lengths)])
        self.length = float(self.cum[-1])

    def __bool__(self) -> bool:
        return bool(self.pieces)

    def to_time(self, u: np.ndarray) -> np.ndarray:
        """Times for coordinates ``u`` in ``[0, length]`` (piecewise-linear, increasing)."""
        u = np.clip(np.asarray(u, float), 0.0, self.length)
        k = np.clip(np.searchsorted(self.cum, u, side="right") - 1, 0, len(self.pieces) - 1)
        return self.starts[k] + (u - self.cum[k])

    def to_u(self, t: np.ndarray) -> np.ndarray:
        """Coordinates of times that lie in the set."""
        t = np.asarray(t, float)
        k = np.clip(np.searchsorted(self.starts, t, side="right") - 1, 0, len(self.pieces) - 1)
        return self.cum[k] + (t - self.starts[k])

    def contains(self, t) -> np.ndarray:
        t = np.atleast_1d(np.asarray(t, float))
        inside = np.zeros(t.shape, bool)
        for a, b in self.pieces:
            inside |= (t >= a - TOLERANCE) & (t <= b + TOLERANCE)
        return inside

    def capacity(self, spacing: float) -> int:
        """Most levels the set holds with at least ``spacing`` between them (greedy from
        the left, which is optimal on a line)."""
        count, last = 0, -math.inf
        for a, b in self.pieces:
            t = max(a, last + spacing)
            if spacing <= 0:
                if b >= a:
                    return 10**9  # any number (levels may coincide)
            while t <= b + TOLERANCE:
                count += 1
                last = t
                t = last + spacing
        return count

    def describe(self) -> str:
        return ", ".join(f"{a:g}-{b:g} h" for a, b in self.pieces)


def _subtract(pieces: list[tuple[float, float]], lo: float, hi: float
              ) -> list[tuple[float, float]]:
    """Remove the open interval (lo, hi); the end points stay allowed."""
    out = []
    for a, b in pieces:
        if hi <= a or lo >= b:
            out.append((a, b))
            continue
        if a <= lo:
            out.append((a, lo))
        if hi <= b:
            out.append((hi, b))
    return out


def allowed_set(window: tuple[float, float], *, infusions=(), daytime=None,
                clock_hour: float | None = None) -> AllowedSet:
    """The allowed sampling times.

    Parameters
    ----------
    window : (float, float), h
        Earliest and latest time.
    infusions : iterable of (start, end), h
        Periods during which no level is drawn (their ends are allowed).
    daytime : (float, float), optional
        Allowed hours of the day, e.g. ``(6, 22)``; may wrap midnight (``(22, 6)``).
    clock_hour : float, optional
        Hour of the day at time 0 (needed with ``daytime``).
    """
    pieces = [(float(window[0]), float(window[1]))]
    for lo, hi in infusions:
        if hi > lo:
            pieces = _subtract(pieces, lo, hi)
    if daytime is not None and clock_hour is not None:
        start, end = daytime
        a, b = window
        # the forbidden hours as intervals on the time axis, day by day
        first_day = math.floor((a + clock_hour) / 24.0) - 1
        last_day = math.ceil((b + clock_hour) / 24.0) + 1
        for day in range(first_day, last_day + 1):
            base = day * 24.0 - clock_hour
            if start < end:     # allowed start..end: forbidden end..start(+24)
                pieces = _subtract(pieces, base + end, base + start + 24.0)
            else:               # wraps midnight: forbidden end..start the same day
                pieces = _subtract(pieces, base + end, base + start)
    # single instants left between two forbidden periods are dropped (no room to
    # draw a level), unless the window itself is all there is
    kept = sorted(p for p in pieces if p[1] > p[0] + TOLERANCE)
    return AllowedSet(kept)


def spacing_ok(times: np.ndarray, spacing: float) -> bool:
    t = np.sort(np.asarray(times, float))
    return bool(np.all(np.diff(t) >= spacing - TOLERANCE)) if t.size > 1 else True
