"""Fitted one-compartment parameters beside the non-compartmental ones.

For each subject: fitted clearance vs NCA clearance, fitted volume vs the
terminal volume Vz (and Vss when available), fitted half-life vs the terminal
half-life, as ratios fit/NCA.  A ratio further than ``threshold`` percent from
1 is flagged in plain words: for a drug with a distribution phase the fitted
half-life is shorter and the volume smaller than the terminal ones -- the
one-compartment assumption fails (common practice; default 20 %).
"""

from __future__ import annotations

from dataclasses import dataclass, field

__all__ = ["Comparison", "compare_with_nca"]

PAIRS = (
    ("clearance", "clearance", "clearance"),
    ("volume", "volume_terminal", "volume (terminal, Vz)"),
    ("volume", "volume_steady_state", "volume (steady state, Vss)"),
    ("half_life", "terminal_half_life", "half-life (terminal)"),
)


@dataclass(frozen=True)
class Comparison:
    """One subject's side-by-side values (canonical units)."""

    subject: str
    rows: list[dict] = field(default_factory=list)
    flags: list[str] = field(default_factory=list)


def compare_with_nca(fits, ncas, threshold: float = 20.0) -> list[Comparison]:
    """Pair fit and NCA results by subject and flag disagreements.

    Parameters
    ----------
    fits : list of FitResult
    ncas : list of NcaResult
    threshold : float, percent

    Returns
    -------
    list of Comparison
    """
    by_subject = {n.subject: n for n in ncas}
    out = []
    for f in fits:
        n = by_subject.get(f.subject)
        if n is None:
            continue
        rows, flags = [], []
        for fit_key, nca_key, label in PAIRS:
            fv = f.estimates[fit_key].value
            nv = getattr(n, nca_key)
            ratio = fv / nv if nv else None
            rows.append({"quantity": label, "fit": fv, "nca": nv, "ratio": ratio})
            if ratio is not None and abs(ratio - 1) * 100 > threshold:
                direction = "higher" if ratio > 1 else "lower"
                flags.append(
                    f"fitted {label} is {abs(ratio - 1):.0%} {direction} than the "
                    f"non-compartmental value: the one-compartment model may not describe "
                    f"this subject (for example a distribution phase)")
        out.append(Comparison(f.subject, rows, flags))
    return out
