"""Helpers the SDTM mappings share: units per distinct spelling, and row filters that
record why each row was left out."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ...errors import PkcalcInputError
from ...units import CANONICAL, UnitSpec, parse_unit
from .datasets import Dataset
from .log import ImportLog
from .terms import normalise_unit

__all__ = ["Rows", "unit_spec", "unit_specs"]


def unit_spec(text: str, kind: str) -> UnitSpec:
    """The unit as pint reads it, trying the CDISC spelling rules when the text as
    written is not understood (``NG/ML``, ``LB``)."""
    try:
        return parse_unit(text, kind)
    except PkcalcInputError:
        alt = normalise_unit(text)
        if alt != str(text).strip():
            try:
                return parse_unit(alt, kind)
            except PkcalcInputError:
                pass
        raise


def unit_specs(units: pd.Series, kind: str):
    """Per row: canonical factor (NaN when unusable), per-kg flag and the problem text
    ('' when fine); each distinct spelling is parsed once."""
    codes, uniq = pd.factorize(units.to_numpy(object), use_na_sentinel=False)
    factor = np.full(len(uniq), np.nan)
    per_kg = np.zeros(len(uniq), bool)
    problem = np.full(len(uniq), "", dtype=object)
    for i, u in enumerate(uniq):
        try:
            spec = unit_spec(u, kind)
        except PkcalcInputError as exc:
            problem[i] = exc.problems[0].message
            continue
        factor[i], per_kg[i] = spec.factor, spec.per_kg
    return factor[codes], per_kg[codes], problem[codes], (uniq, codes, factor)


def log_units(log: ImportLog, domain: str, variable: str, kind: str, uniq_codes_factor,
              mask: np.ndarray) -> None:
    """Record each unit actually converted on the rows kept."""
    uniq, codes, factor = uniq_codes_factor
    for i, u in enumerate(uniq):
        n = int(np.sum(mask & (codes == i)))
        if n and np.isfinite(factor[i]):
            log.convert(domain, variable, str(u), float(factor[i]), CANONICAL[kind], n)


class Rows:
    """The rows of a dataset still in play; each row left out is recorded once, with
    its reason, in the import report."""

    def __init__(self, ds: Dataset, log: ImportLog, subjects: pd.Series) -> None:
        self.ds = ds
        self.log = log
        self.subjects = subjects.to_numpy(object)
        self.keep = np.ones(len(ds), bool)
        self.reason = np.zeros(len(ds), np.int32)     # 0: kept, k: self.reasons[k - 1]
        self.reasons: list[str] = []

    def drop(self, mask, reason: str, *, problem: bool = False) -> None:
        """Leave out the rows of ``mask`` still kept, for ``reason``."""
        mask = np.asarray(mask, bool) & self.keep
        if mask.any():
            rows = np.flatnonzero(mask)
            self.log.skip(self.ds.domain, reason, rows, self.subjects[rows[:50]],
                          self.ds.labels, problem=problem)
            self.keep &= ~mask
            if reason not in self.reasons:
                self.reasons.append(reason)
            self.reason[rows] = self.reasons.index(reason) + 1

    def left_out_of(self, subjects: set[str], *, by_design: tuple[str, ...] = ()
                    ) -> dict[str, dict[str, int]]:
        """For each of ``subjects``, its rows left out by reason (reasons starting with one
        of ``by_design`` not counted)."""
        pick = (self.reason > 0) & pd.Series(self.subjects).isin(subjects).to_numpy()
        out: dict[str, dict[str, int]] = {}
        for sid, code in zip(self.subjects[pick].tolist(), self.reason[pick].tolist(),
                             strict=True):
            why = self.reasons[code - 1]
            if not why.startswith(by_design):
                counts = out.setdefault(str(sid), {})
                counts[why] = counts.get(why, 0) + 1
        return out

    def drop_each(self, mask, reason, *, problem: bool = False) -> None:
        """Leave out the rows of ``mask``, each with its own reason: ``reason(i)`` for
        row ``i`` (called for those rows only)."""
        mask = np.asarray(mask, bool) & self.keep
        rows = np.flatnonzero(mask)
        if not rows.size:
            return
        reasons = np.array([reason(int(i)) for i in rows], dtype=object)
        for r in pd.unique(reasons):
            chosen = np.zeros_like(mask)
            chosen[rows[reasons == r]] = True
            self.drop(chosen, str(r), problem=problem)
