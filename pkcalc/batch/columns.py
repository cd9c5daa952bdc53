"""Batch columns: recognised headers and units, options, the run summary, per-row errors."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .. import glossary
from ..errors import PkcalcInputError, Problem
from ..units import KINDS, NUMERIC_RANGE, parse_header, parse_unit

#: Recognised input columns and their kind of quantity.
INPUT_KINDS: dict[str, str] = {
    "clearance": "clearance", "volume": "volume", "half_life": "time",
    "elimination_rate": "elimination_rate", "time_constant": "time", "rate": "rate",
    "dose": "amount", "duration": "time", "interval": "time", "loading_dose": "amount",
    "target": "concentration", "window_low": "concentration",
    "window_high": "concentration", "weight": "weight",
}
PARAMETERS = ("clearance", "volume", "half_life", "elimination_rate", "time_constant")
FRACTIONS = (0.5, 0.9, 0.95, 0.99)
DEFAULT_CHUNK_ROWS = 200_000
#: Rows x virtual subjects evaluated at once in variability runs (memory bound).
POPULATION_BLOCK = 2_000_000
#: Most virtual subjects per row (memory: a few arrays of this length per metric).
MAX_POPULATION = 1_000_000
#: Most rows per chunk (memory grows with it; the default is 200,000).
MAX_CHUNK_ROWS = 10_000_000
#: Without a window, the fraction "inside" is counted within this of the target.
TARGET_BAND = 0.20


@dataclass(frozen=True)
class BatchSpec:
    """How the columns of an input table are read (from its header, once).

    Attributes
    ----------
    columns : dict of str to (str, UnitSpec)
        Recognised quantity -> (header as written, unit conversion).
    headers : list of str
        All input headers, in order (carried through to the output).
    unknown : list of str
        Headers that are not recognised (carried through, warned about).
    """

    columns: dict
    headers: list[str]
    unknown: list[str]

    @property
    def intermittent(self) -> bool:
        return "interval" in self.columns


@dataclass(frozen=True)
class BatchOptions:
    """What to compute besides the per-row metrics.

    Attributes
    ----------
    at : tuple of float, h
        Times for ``concentration_at_<t>h`` columns.
    population : int
        Virtual subjects per row (0: no variability).
    seed : int
    cv_clearance, cv_volume : float
        Between-subject CV (fraction) of clearance and volume (log-normal).
    correlation : float
        Correlation of ln CL and ln V.
    """

    at: tuple[float, ...] = ()
    population: int = 0
    seed: int = 1
    cv_clearance: float = 0.0
    cv_volume: float = 0.0
    correlation: float = 0.0


@dataclass
class BatchSummary:
    """A finished batch run: counts, the first problems, and distributions over the
    first rows (the results themselves are in the output table, ``to_frame()``).

    Attributes
    ----------
    rows, failed : int
    first_errors : list of str
    seconds : float
    output, input, engine : str
    warnings : list of str
    plateau, time_to_90, fraction_in_window : list of float
        Values of the first rows (for percentiles and plots).
    partitioned : bool
        The output is a folder of part files (``part-00000.csv`` ...).
    partitions, partition_rows, partition_source : int, int, str
        Partitioned runs: how many partitions, their usual size in rows and what
        set it (the input's row groups or ``--chunk-rows``).
    workers : int
        Processes that computed the partitions (0: this process).
    client_peak_rss_mb : float
        Peak resident memory of this process (partitioned and Dask runs).
    worker_peak_rss_mb : dict of str to float
        Peak resident memory of each worker process (``host:pid``).
    """

    rows: int = 0
    failed: int = 0
    first_errors: list[str] = field(default_factory=list)
    seconds: float = 0.0
    output: str = ""
    warnings: list[str] = field(default_factory=list)
    plateau: list[float] = field(default_factory=list)
    time_to_90: list[float] = field(default_factory=list)
    fraction_in_window: list[float] = field(default_factory=list)
    input: str = ""
    engine: str = "local"
    partitioned: bool = False
    partitions: int = 0
    partition_rows: int = 0
    partition_source: str = ""
    workers: int = 0
    client_peak_rss_mb: float = 0.0
    worker_peak_rss_mb: dict[str, float] = field(default_factory=dict)

    def distribution(self) -> dict[str, dict[str, float] | None]:
        """5th, 50th and 95th percentiles of plateau, time to 90 % and the fraction
        inside the window, over the first rows."""
        def pct(values):
            a = np.asarray(values, float)
            a = a[np.isfinite(a)]
            if a.size == 0:
                return None
            return {k: float(np.percentile(a, q)) for k, q in (("p05", 5), ("p50", 50),
                                                                 ("p95", 95))}
        return {"plateau_concentration": pct(self.plateau),
                "time_to_90_percent": pct(self.time_to_90),
                "fraction_in_window_at_steady_state": pct(self.fraction_in_window)}

    def summary(self, caution: bool = True) -> str:
        """The run in words (counts, first problems, distributions; no caution)."""
        from .._format import format_table, with_caution

        lines = [f"Batch: {self.rows:,} rows from {self.input} -> {self.output} "
                 f"({self.engine} engine, {self.seconds:.2f} s)",
                 f"rows with problems: {self.failed:,}" + (
                     " (their results are empty; the reason is in the error column)"
                     if self.failed else "")]
        lines += [f"  {e}" for e in self.first_errors]
        if self.partitions:
            where = f"{self.workers} worker processes" if self.workers else "this process"
            lines.append(f"partitions: {self.partitions:,} of about {self.partition_rows:,} "
                         f"rows ({self.partition_source}), computed by {where}")
        if self.client_peak_rss_mb:
            mem = f"peak memory: this process {self.client_peak_rss_mb:,.0f} MB"
            if self.worker_peak_rss_mb:
                mem += f", largest worker {max(self.worker_peak_rss_mb.values()):,.0f} MB"
            lines.append(mem)
        rows = []
        for name, d in self.distribution().items():
            if d is None:
                continue
            if name.startswith("fraction_in_window"):   # a percentage, as in the plot
                rows.append([glossary.label(name), "%", *(100 * d[k] for k in
                                                        ("p05", "p50", "p95"))])
            else:
                rows.append([glossary.label(name), glossary.unit_of(name), d["p05"],
                             d["p50"], d["p95"]])
        if rows:
            lines.append(format_table(["across the batch (first rows)", "unit", "5th",
                                       "median", "95th"], rows))
        return with_caution("\n".join(lines), caution)

    def to_frame(self, max_rows: int | None = None):
        """The output table (or its first ``max_rows`` rows); a partitioned output's
        parts are read in order."""
        from pathlib import Path

        out = Path(self.output)
        files = sorted(out.glob("part-*")) if out.is_dir() else [out]
        frames, rows = [], 0
        for f in files:
            if f.suffix.lower() in (".parquet", ".pq"):
                frame = pd.read_parquet(f)
            else:
                frame = pd.read_csv(f, nrows=None if max_rows is None else max_rows - rows,
                                    keep_default_na=False, na_values=[""])
            frames.append(frame)
            rows += len(frame)
            if max_rows is not None and rows >= max_rows:
                break
        frame = pd.concat(frames, ignore_index=True) if len(frames) > 1 else frames[0]
        return frame if max_rows is None else frame.head(max_rows)

    def _repr_html_(self) -> str:
        from .._format import result_html

        return result_html(self.summary(caution=False), self.to_frame(max_rows=20))


# --------------------------------------------------------------------------- columns
def at_label(t: float) -> str:
    return f"concentration_at_{t:g}h [mg/L]"


def unused_columns_warning(spec: BatchSpec) -> str | None:
    """The warning that names the input columns pkcalc does not use (carried through to
    the output), or None when every column is used."""
    if not spec.unknown:
        return None
    return ("columns not used (carried through): "
            + ", ".join(name or "a column without a name" for name in spec.unknown))


def parse_columns(headers: Sequence[str], *, file: str | None = None) -> BatchSpec:
    """Read the header once: units per column, required columns present.

    Raises
    ------
    PkcalcInputError
        Missing or wrong units, too few parameter columns, no rate or dose.
    """
    problems: list[Problem] = []
    columns = {}
    unknown = []
    for h in headers:
        name, unit = parse_header(h)
        key = name.strip().lower()
        if key not in INPUT_KINDS:
            unknown.append(str(h))
            continue
        if key in columns:
            problems.append(Problem(f"column '{name}' appears twice", file=file, field=str(h)))
            continue
        if unit is None:
            problems.append(Problem("the column header declares no unit", file=file,
                                    field=str(h), expected=f"'{key} [unit]' with "
                                                           f"{KINDS[INPUT_KINDS[key]]}"))
            continue
        try:
            columns[key] = (str(h), parse_unit(unit, INPUT_KINDS[key], field=str(h)))
        except PkcalcInputError as exc:
            problems += [Problem(p.message, file=file, field=p.field, expected=p.expected)
                         for p in exc.problems]
    given = [p for p in PARAMETERS if p in columns]
    k_like = [p for p in given if p in ("half_life", "elimination_rate", "time_constant")]
    independent = ("clearance" in columns) + ("volume" in columns) + bool(k_like)
    if not problems:
        if independent < 2:
            problems.append(Problem(
                f"the table needs two independent parameter columns (has: "
                f"{', '.join(given) or 'none'})", file=file, field="clearance",
                expected="two of clearance, volume and one of half_life / elimination_rate / "
                         "time_constant"))
        if "rate" not in columns and "dose" not in columns:
            problems.append(Problem("the table needs a rate or a dose column", file=file,
                                    field="rate", expected="'rate [mg/h]' or 'dose [mg]'"))
        if "dose" in columns and "interval" not in columns and "duration" not in columns:
            problems.append(Problem("a dose column needs an interval or a duration column",
                                    file=file, field="dose"))
        per_kg = [h for h, spec in columns.values() if spec.per_kg]
        if per_kg and "weight" not in columns:
            problems.append(Problem("per-kg columns need a weight column", file=file,
                                    field=per_kg[0], expected="'weight [kg]'"))
    if problems:
        raise PkcalcInputError(problems)
    return BatchSpec(columns, [str(h) for h in headers], unknown)


def numeric_column(frame: pd.DataFrame, header: str) -> tuple[np.ndarray, np.ndarray]:
    """A column as floats, and a mask of cells that hold text (not a number)."""
    col = frame[header]
    if pd.api.types.is_numeric_dtype(col.dtype) and not pd.api.types.is_bool_dtype(col.dtype):
        return col.to_numpy(dtype=float), np.zeros(len(col), bool)
    text = col.astype(str).str.strip()
    empty = (text.isna() | text.isin(["", "nan", "NaN", "None", "<NA>"])).to_numpy()
    values = pd.to_numeric(text.where(~empty), errors="coerce").to_numpy(dtype=float)
    return values, np.isnan(values) & ~empty


def out_of_range_mask(x: np.ndarray) -> np.ndarray:
    """Not NaN, and infinite or nonzero outside :data:`pkcalc.units.NUMERIC_RANGE`."""
    a = np.abs(np.asarray(x, dtype=float))
    with np.errstate(invalid="ignore"):
        return ~np.isnan(a) & (np.isinf(a) | ((a != 0) & ((a < NUMERIC_RANGE[0]) |
                                                          (a > NUMERIC_RANGE[1]))))


#: A hidden column of chunks read from CSV: why a row could not be read ("" when it
#: could).  The kernel turns it into the row's error; it never reaches the output.
ROW_PROBLEM = "__row_problem__"


class RowErrors:
    """Per-row error text, built with whole-column masks."""

    def __init__(self, n: int) -> None:
        self.text = np.full(n, "", dtype=object)

    def add(self, mask: np.ndarray, message: str) -> None:
        if mask.any():
            cur = self.text[mask]
            self.text[mask] = np.where(cur == "", message, cur + "; " + message)

    @property
    def bad(self) -> np.ndarray:
        return self.text != ""


