"""Plausibility warnings for one-compartment parameters (warnings, never errors).

The limits are deliberately wide: they catch unit slips (mL entered as L, minutes
as hours), not unusual patients.  Limits, per 70 kg when a weight is known:

- half-life under 1 minute or over 60 days;
- volume over 1,000 L or under 3 L (about the plasma volume);
- clearance over 500 L/h (well above cardiac output, about 300 L/h) -- common practice.
"""

from __future__ import annotations

import numpy as np

from .model import LN2

__all__ = ["LIMITS", "implausible", "parameter_warnings"]

#: (lower, upper) limits in canonical units, per 70 kg where it applies.
LIMITS = {
    "half_life": (1.0 / 60.0, 60.0 * 24.0),
    "volume": (3.0, 1000.0),
    "clearance": (0.0, 500.0),
}


def parameter_warnings(clearance: float, volume: float, weight: float | None = None) -> list[str]:
    """Plain-words warnings for parameters far outside human ranges.

    Parameters
    ----------
    clearance : float, L/h
    volume : float, L
    weight : float, kg, optional
        When given, volume and clearance limits scale with ``weight / 70``.

    Returns
    -------
    list of str
        Empty when everything is plausible.

    Examples
    --------
    >>> parameter_warnings(4.0, 40.0)
    []
    >>> parameter_warnings(4.0, 4000.0)[0][:29]
    'volume 4000 L is above 1000 L'
    """
    out: list[str] = []
    if not (np.isfinite(clearance) and np.isfinite(volume)) or clearance <= 0 or volume <= 0:
        return out
    scale = 1.0 if weight is None else weight / 70.0
    per = "" if weight is None else f" for {weight:g} kg"
    half_life = LN2 * volume / clearance
    lo, hi = LIMITS["half_life"]
    if half_life < lo:
        out.append(f"half-life {half_life * 60:.3g} min is under 1 minute: check the units")
    if half_life > hi:
        out.append(f"half-life {half_life / 24:.3g} d is over 60 days: check the units")
    lo, hi = LIMITS["volume"]
    if volume > hi * scale:
        out.append(f"volume {volume:.4g} L is above {hi * scale:.4g} L{per}: check the units")
    if volume < lo * scale:
        out.append(
            f"volume {volume:.4g} L is below the plasma volume (~{lo * scale:.3g} L{per}): "
            "check the units"
        )
    hi = LIMITS["clearance"][1]
    if clearance > hi * scale:
        out.append(
            f"clearance {clearance:.4g} L/h is above {hi * scale:.4g} L/h{per}, far above cardiac "
            "output: check the units"
        )
    return out


def implausible(clearance: np.ndarray, volume: np.ndarray, weight: np.ndarray) -> np.ndarray:
    """Which rows :func:`parameter_warnings` would warn about (vectorised; ``weight``
    NaN where unknown) -- so that many fits build the warnings only where there are
    any."""
    clearance, volume = np.asarray(clearance, float), np.asarray(volume, float)
    weight = np.asarray(weight, float)
    scale = np.where(np.isnan(weight), 1.0, weight / 70.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        half_life = LN2 * volume / clearance
    checked = np.isfinite(clearance) & np.isfinite(volume) & (clearance > 0) & (volume > 0)
    out = (half_life < LIMITS["half_life"][0]) | (half_life > LIMITS["half_life"][1])
    out |= (volume > LIMITS["volume"][1] * scale) | (volume < LIMITS["volume"][0] * scale)
    out |= clearance > LIMITS["clearance"][1] * scale
    return checked & out
