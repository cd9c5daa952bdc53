"""What share of a population reaches the targets on a regimen: target attainment by
Monte Carlo over virtual patients, overall and by covariate bands.

Each virtual patient has typical ``ln CL, ln V`` from its covariates (a population
result's covariate model, or a prior's typical values) plus a between-subject draw
from ``N(0, Omega)``; or the patients are given with their own clearance and volume
(no draw).  Covariates are resampled from a table of real or virtual patients (every
row equally likely).  For every regimen on the grid the steady state is computed in
closed form (:func:`pkcalc.model.steady_state_intermittent`; a continuous infusion's
plateau ``R0/CL``); a patient meets

- the peak target when the steady-state peak (end of infusion) is in its window,
- the trough target when the trough (just before a dose) is,
- the AUC24 target when ``24 x dose / (CL tau)`` (``24 R0 / CL``) is in its range,
- the level target (continuous) when the plateau is in its window,

and all of them at once.  Patients are drawn in pieces of :data:`PIECE` with seeds
from one ``numpy.random.SeedSequence``: every regimen meets the same virtual patients
(common random numbers), and the numbers do not depend on the engine or the number of
workers.  The Monte Carlo SE of a share ``p`` of ``n`` patients is ``sqrt(p(1-p)/n)``.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .. import model
from .._format import format_table, result_html, short, with_caution

__all__ = ["PIECE", "AttainmentRegimen", "AttainmentTargets", "PatientSource",
           "PopulationAttainment", "population_attainment"]

#: Virtual patients per piece of work (one seed each).
PIECE = 100_000
#: Most virtual patients in one run, and most regimens on a grid.
MAX_PATIENTS = 10_000_000
MAX_REGIMENS = 400
#: What each patient is judged on, in this order (``joint``: all targets given).
KEYS = ("peak", "trough", "auc_24", "level", "joint")
#: The targets in words.
NAMES = {"peak": "peak", "trough": "trough", "auc_24": "AUC24", "level": "level",
         "joint": "all at once"}


@dataclass(frozen=True)
class AttainmentRegimen:
    """One regimen of the grid: repeated infusions (``dose`` mg over ``infusion_time`` h
    every ``interval`` h) or a continuous infusion (``rate`` mg/h); amounts of drug."""

    dose: float | None = None
    interval: float | None = None
    infusion_time: float = 0.0
    rate: float | None = None

    @property
    def label(self) -> str:
        if self.rate is not None:
            return f"{short(self.rate)} mg/h continuous"
        return (f"{short(self.dose)} mg over {short(self.infusion_time)} h every "
                f"{short(self.interval)} h")


@dataclass(frozen=True)
class AttainmentTargets:
    """Windows ``(low, high)`` (either end None: open); None: not a target."""

    peak: tuple[float | None, float | None] | None = None
    trough: tuple[float | None, float | None] | None = None
    auc_24: tuple[float | None, float | None] | None = None
    level: tuple[float | None, float | None] | None = None

    def given(self) -> list[str]:
        return [k for k in KEYS[:-1] if getattr(self, k) is not None]


@dataclass(frozen=True)
class PatientSource:
    """Where virtual patients come from.

    Attributes
    ----------
    ln_mean : ndarray, shape (P, 2)
        Typical ``ln CL, ln V`` of each table row (one row when there is no table).
    omega : ndarray, shape (2, 2), or None
        Between-subject covariance; None: the rows are the patients (their own
        clearance and volume, nothing drawn).
    band : ndarray of int, shape (P,)
        The band of each row (index into ``band_names``).
    band_names : tuple of str
    description : str
        In words, for the summary.
    """

    ln_mean: np.ndarray
    omega: np.ndarray | None
    band: np.ndarray
    band_names: tuple[str, ...] = ("all",)
    description: str = ""


@dataclass
class PopulationAttainment:
    """Shares of patients reaching each target, by band and regimen.

    Attributes
    ----------
    regimens : list of AttainmentRegimen
    band_names : list of str
        ``all`` first, then the covariate bands.
    patients : ndarray, shape (bands,)
        Patients in each band.
    fraction : ndarray, shape (bands, regimens, 5)
        Share meeting ``peak``, ``trough``, ``auc_24``, ``level`` and all at once
        (``joint``); NaN where not a target.
    targets : AttainmentTargets
    level : float
        The share asked of the lowest dose (e.g. 0.9).
    seed : int
    source : str
    notes : list of str
    """

    regimens: list[AttainmentRegimen]
    band_names: list[str]
    patients: np.ndarray
    fraction: np.ndarray
    targets: AttainmentTargets
    level: float
    seed: int
    source: str = ""
    notes: list[str] = field(default_factory=list)

    def monte_carlo_se(self) -> np.ndarray:
        """``sqrt(p (1 - p) / n)`` of every share (same shape as ``fraction``)."""
        n = np.maximum(self.patients, 1)[:, None, None]
        p = self.fraction
        return np.sqrt(p * (1 - p) / n)

    def lowest(self) -> list[dict[str, Any]]:
        """Per band and interval (or for continuous infusions), the smallest dose (rate)
        of the grid whose share meeting every target reaches ``level``; None when none
        does."""
        out = []
        groups: dict[Any, list[int]] = {}
        for j, r in enumerate(self.regimens):
            key = ("continuous", None) if r.rate is not None else (r.interval, r.infusion_time)
            groups.setdefault(key, []).append(j)
        for b, band in enumerate(self.band_names):
            for key, idx in groups.items():
                idx = sorted(idx, key=lambda j: self.regimens[j].rate
                             if self.regimens[j].rate is not None else self.regimens[j].dose)
                hit = next((j for j in idx if self.fraction[b, j, -1] >= self.level), None)
                out.append({"band": band, "interval": key[0] if key[0] != "continuous"
                            else None, "regimen": None if hit is None
                            else self.regimens[hit].label,
                            "dose": None if hit is None else self.regimens[hit].dose,
                            "rate": None if hit is None else self.regimens[hit].rate,
                            "fraction": None if hit is None else float(self.fraction[b, hit, -1])})
        return out

    def to_frame(self):
        """One row per band and regimen: the shares (0-1) and their Monte Carlo SE."""
        import pandas as pd

        se = self.monte_carlo_se()
        rows = []
        for b, band in enumerate(self.band_names):
            for j, r in enumerate(self.regimens):
                row = {"band": band, "regimen": r.label, "dose [mg]": r.dose,
                       "interval [h]": r.interval, "infusion_time [h]": r.infusion_time
                       if r.rate is None else None, "rate [mg/h]": r.rate,
                       "patients": int(self.patients[b])}
                for k, key in enumerate(KEYS):
                    value = self.fraction[b, j, k]
                    row[f"fraction_{key}" if key != "joint" else "fraction"] = \
                        None if np.isnan(value) else float(value)
                row["monte_carlo_se"] = float(se[b, j, -1])
                rows.append(row)
        return pd.DataFrame(rows)

    def summary(self, caution: bool = True) -> str:
        """The shares meeting every target, a line per regimen and a column per band."""
        lines = [f"Target attainment: {self.source}",
                 f"targets: {_targets_text(self.targets)}; seed {self.seed}"]
        head = ["regimen", *(f"{b} (n={int(n)})" for b, n in zip(self.band_names,
                                                                  self.patients, strict=True))]
        rows = [[r.label, *(f"{100 * self.fraction[b, j, -1]:.1f} %"
                            for b in range(len(self.band_names)))]
                for j, r in enumerate(self.regimens)]
        lines += ["Share of patients meeting every target (steady state):",
                  format_table(head, rows)]
        se = float(np.nanmax(self.monte_carlo_se()[:, :, -1])) if self.fraction.size else 0.0
        lines.append(f"Monte Carlo SE at most {100 * se:.2f} percentage points")
        lines.append(f"Lowest dose of the grid reaching {100 * self.level:.0f} %:")
        lines.append(format_table(["band", "interval [h]", "regimen", "share"], [
            [x["band"], "-" if x["interval"] is None else short(x["interval"]),
             x["regimen"] or "none on the grid",
             "-" if x["fraction"] is None else f"{100 * x['fraction']:.1f} %"]
            for x in self.lowest()]))
        lines += [f"note: {n}" for n in self.notes]
        lines.append("A share of virtual patients from a model is not a guarantee for any "
                     "patient: local protocols and a licensed pharmacist decide.")
        return with_caution("\n".join(lines), caution)

    def _repr_html_(self) -> str:
        return result_html(self.summary(caution=False), self.to_frame())


def _targets_text(t: AttainmentTargets) -> str:
    units = {"peak": "mg/L", "trough": "mg/L", "level": "mg/L", "auc_24": "mg*h/L"}
    parts = []
    for k in t.given():
        lo, hi = getattr(t, k)
        parts.append(f"{NAMES[k]} {'-' if lo is None else short(lo)} to "
                     f"{'-' if hi is None else short(hi)} {units[k]}")
    return "; ".join(parts) or "none"


def _within(x: np.ndarray, window) -> np.ndarray:
    lo, hi = window
    ok = np.ones(x.shape, dtype=bool)
    if lo is not None:
        ok &= x >= lo * (1 - 1e-12)
    if hi is not None:
        ok &= x <= hi * (1 + 1e-12)
    return ok


def _piece(args) -> tuple[np.ndarray, np.ndarray]:
    """Counts of patients meeting each target, by band and regimen, for one piece:
    ``(counts (bands, regimens, 5), patients per band)``."""
    source, regimens, targets, n_bands, seed, start, size = args
    if source.omega is None:              # the rows are the patients
        rows = np.arange(start, start + size)
        ln = source.ln_mean[rows]
    else:
        rng = np.random.default_rng(seed)
        rows = rng.integers(0, source.ln_mean.shape[0], size) \
            if source.ln_mean.shape[0] > 1 else np.zeros(size, dtype=int)
        chol = np.linalg.cholesky(source.omega + 1e-300 * np.eye(2))
        ln = source.ln_mean[rows] + rng.standard_normal((size, 2)) @ chol.T
    cl, v = np.exp(ln[:, 0]), np.exp(ln[:, 1])
    band = source.band[rows]
    per_band = np.bincount(band, minlength=n_bands).astype(float)
    counts = np.zeros((n_bands, len(regimens), len(KEYS)))
    given = targets.given()
    for j, r in enumerate(regimens):
        if r.rate is not None:
            level = r.rate / cl
            values = {"peak": level, "trough": level, "level": level, "auc_24": 24 * level}
        else:
            peak, trough, average = model.steady_state_intermittent(
                r.dose, r.infusion_time, r.interval, cl, v)
            values = {"peak": peak, "trough": trough, "level": average,
                      "auc_24": 24 * average}
        joint = np.ones(size, dtype=bool)
        for k, key in enumerate(KEYS[:-1]):
            if key not in given:
                continue
            ok = _within(values[key], getattr(targets, key))
            joint &= ok
            counts[:, j, k] = np.bincount(band, weights=ok, minlength=n_bands)
        counts[:, j, -1] = np.bincount(band, weights=joint, minlength=n_bands)
    return counts, per_band


def population_attainment(source: PatientSource, regimens: Sequence[AttainmentRegimen],
                          targets: AttainmentTargets, *, patients: int = 100_000,
                          seed: int = 1, level: float = 0.9, engine=None,
                          progress: Callable[[int, int, float], None] | None = None
                          ) -> PopulationAttainment:
    """Shares of ``patients`` virtual patients (all the rows, when the source gives the
    patients themselves) meeting ``targets`` on each regimen, overall and by band."""
    from ..engines import map_ordered

    regimens = list(regimens)
    if not regimens or len(regimens) > MAX_REGIMENS:
        raise ValueError(f"give 1 to {MAX_REGIMENS} regimens, got {len(regimens)}")
    if not targets.given():
        raise ValueError("give at least one target (peak, trough, auc_24 or level)")
    if not 0 < level <= 1:
        raise ValueError(f"level must be a share in (0, 1], got {level!r}")
    if source.omega is None:
        patients = int(source.ln_mean.shape[0])
    if not 1 <= int(patients) <= MAX_PATIENTS:
        raise ValueError(f"patients must be 1 to {MAX_PATIENTS:,}, got {patients!r}")
    patients = int(patients)
    n_bands = len(source.band_names)
    pieces = math.ceil(patients / PIECE)
    seeds = np.random.SeedSequence(seed).spawn(pieces)
    work = [(source, regimens, targets, n_bands, seeds[i], i * PIECE,
             min(PIECE, patients - i * PIECE)) for i in range(pieces)]
    results = map_ordered(_piece, work, engine, progress=progress)
    counts = sum(c for c, _ in results)
    per_band = sum(n for _, n in results)
    # 'all' first, then the bands (when there are several)
    if n_bands > 1:
        counts = np.concatenate([counts.sum(axis=0, keepdims=True), counts])
        per_band = np.concatenate([[per_band.sum()], per_band])
        names = ["all", *source.band_names]
    else:
        names = ["all"]
    with np.errstate(invalid="ignore", divide="ignore"):
        fraction = counts / per_band[:, None, None]
    given = targets.given()
    for k, key in enumerate(KEYS[:-1]):
        if key not in given:
            fraction[:, :, k] = np.nan
    notes = []
    empty = [b for b, n in zip(names, per_band, strict=True) if n == 0]
    if empty:
        notes.append(f"no patient in band(s) {', '.join(empty)}: their shares are not numbers")
    notes.append("steady state in closed form; a patient's peak is at the end of an "
                 "infusion, the trough just before a dose, AUC24 = 24 x dose / (CL x "
                 "interval)")
    return PopulationAttainment(regimens, names, per_band, fraction, targets, level, seed,
                                source.description, notes)
