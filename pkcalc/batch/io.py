"""Batch inputs and outputs: CSV/Parquet/TOML chunks, grids, the atomic streaming writer."""

from __future__ import annotations

import itertools
import math
import os
import re
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pandas as pd

from .. import model
from ..errors import PkcalcInputError, Problem
from ..units import KINDS, parse_header, parse_unit
from .columns import (
    FRACTIONS,
    INPUT_KINDS,
    ROW_PROBLEM,
    BatchOptions,
    BatchSpec,
    BatchSummary,
    at_label,
)


# --------------------------------------------------------------------------- inputs
def grid_frame(grid: dict[str, list], *, file: str | None = None) -> pd.DataFrame:
    """The cartesian product of a ``[grid]`` table as a batch frame.

    Every value is a quantity with its unit (e.g. ``"4 L/h"``); each key's
    values share one unit in the output header (the unit of its first value,
    converted exactly with the registry).
    """
    from ..units import parse_number_and_unit

    problems: list[Problem] = []
    columns: dict[str, list[float]] = {}
    headers: dict[str, str] = {}
    for key, values in grid.items():
        if key not in INPUT_KINDS:
            problems.append(Problem("unknown grid key", file=file, field=f"grid.{key}",
                                    expected=", ".join(INPUT_KINDS)))
            continue
        if not isinstance(values, list) or not values:
            values = [values]
        numbers = []
        first_unit = None
        for i, item in enumerate(values):
            try:
                number, unit = parse_number_and_unit(item, field=f"grid.{key}[{i}]")
                if not unit:
                    raise PkcalcInputError(f"'{item}' has no unit", field=f"grid.{key}[{i}]",
                                           expected=KINDS[INPUT_KINDS[key]])
                spec = parse_unit(unit, INPUT_KINDS[key], field=f"grid.{key}[{i}]")
                if first_unit is None:
                    first_unit = (unit, spec)
                numbers.append(number * spec.factor / first_unit[1].factor)
                if spec.per_kg != first_unit[1].per_kg:
                    raise PkcalcInputError("mixes per-kg and absolute values",
                                           field=f"grid.{key}")
            except PkcalcInputError as exc:
                problems += [Problem(p.message, file=file, field=p.field, expected=p.expected)
                             for p in exc.problems]
        if first_unit is not None:
            headers[key] = f"{key} [{first_unit[0]}]"
            columns[key] = numbers
    if problems:
        raise PkcalcInputError(problems)
    total = math.prod(len(v) for v in columns.values())
    if total > 50_000_000:
        raise PkcalcInputError(f"the grid has {total} rows; write it as a table instead",
                               file=file, field="grid")
    keys = list(columns)
    rows = list(itertools.product(*(columns[k] for k in keys)))
    return pd.DataFrame(rows, columns=[headers[k] for k in keys])


def detect_format(path: Path) -> str:
    suffix = path.suffix.lower()
    if suffix in (".parquet", ".pq"):
        return "parquet"
    if suffix in (".csv", ".txt"):
        return "csv"
    if suffix == ".toml":
        return "toml"
    raise PkcalcInputError(f"unknown table format '{suffix}'", file=str(path),
                           expected=".csv, .parquet or .toml")


_SKIPPED = re.compile(r"Skipping line (\d+): expected (\d+) fields?, saw (\d+)")


def ragged_rows(make_reader, first_line: int, where: str, file: str,
                first: str = "the first row") -> Iterator[pd.DataFrame]:
    """The chunks of a pandas CSV reader made with ``on_bad_lines="warn"`` and
    ``skip_blank_lines=False``, with every line that has more cells than the header put
    back in its place as an empty row whose :data:`ROW_PROBLEM` says so (a row error,
    not a refusal of the file).  ``first_line``: the line number pandas gives the first
    data row; ``where``: how the message names the line (``"line {n}"`` or "").

    A first data row longer than the header refuses the file: pandas then reads every
    row short (it cannot tell the row from a header that lacks a name)."""
    import warnings

    start = 0                                   # data rows read so far (bad ones too)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", pd.errors.ParserWarning)
        reader = iter(make_reader())
        while True:
            del caught[:]
            try:
                chunk = next(reader)
            except StopIteration:
                break
            if any("Length of header" in str(w.message) for w in caught):
                raise PkcalcInputError(f"{first} has more cells than the header (a column "
                                       "name missing?)", file=file,
                                       expected="as many cells in the first row as column "
                                                "names")
            bad = [(int(m[1]), int(m[2]), int(m[3])) for w in caught
                   if issubclass(w.category, pd.errors.ParserWarning)
                   for m in _SKIPPED.finditer(str(w.message))]
            chunk = chunk.reset_index(drop=True)
            chunk[ROW_PROBLEM] = ""
            if bad:
                total = len(chunk) + len(bad)
                at = sorted(line - first_line - start for line, _, _ in bad)
                keep = np.setdiff1d(np.arange(total), at)
                full = chunk.reindex(range(total))
                full.iloc[keep] = chunk.to_numpy()
                full.iloc[at] = np.nan
                full.loc[at, ROW_PROBLEM] = [
                    f"the row has {saw} cells, the header {want}"
                    + (f" ({where.format(n=line)})" if where else "")
                    for line, want, saw in sorted(bad)]
                # integer and boolean columns cannot hold the empty cells: float / object
                chunk = full.astype({c: (float if t.kind in "iu" else object if t.kind == "b"
                                         else t) for c, t in chunk.dtypes.items()})
            start += len(chunk)
            yield chunk


def csv_chunks(path: Path, chunk_rows: int) -> tuple[list[str], Iterator[pd.DataFrame]]:
    from ..tables import read_csv_chunks, read_header

    header = read_header(path)
    known = {h for h in header if parse_header(h)[0].strip().lower() in INPUT_KINDS}
    # unknown columns stay text exactly as written (IDs keep their leading zeros)

    def make():
        return read_csv_chunks(path, chunk_rows, skipinitialspace=True,
                               dtype={h: str for h in header if h not in known},
                               keep_default_na=False, na_values=[""], on_bad_lines="warn",
                               skip_blank_lines=False)
    return header, ragged_rows(make, 2, "line {n}", str(path))


def parquet_chunks(path: Path, chunk_rows: int) -> tuple[list[str], Iterator[pd.DataFrame]]:
    try:
        import pyarrow.parquet as pq

        # no pre-buffering: its cache keeps every row group read until the file is
        # closed, so memory would grow with the table
        pf = pq.ParquetFile(path, pre_buffer=False)
    except ImportError:
        raise PkcalcInputError("Parquet needs pyarrow", file=str(path),
                               expected="pip install pyarrow") from None
    except Exception as exc:  # pyarrow raises several types for damaged files
        raise PkcalcInputError(f"not a readable Parquet file ({exc.__class__.__name__}: "
                               f"{str(exc)[:120]})", file=str(path)) from None
    header = list(pf.schema_arrow.names)

    def gen():
        try:
            for rb in pf.iter_batches(batch_size=chunk_rows):
                yield rb.to_pandas()
        except Exception as exc:
            raise PkcalcInputError(f"Parquet file damaged while reading "
                                   f"({exc.__class__.__name__})", file=str(path)) from None
    return header, gen()


class Writer:
    """Writes result chunks to a temporary file beside the output, renamed at the end.

    With ``atomic=False`` it writes ``output`` itself (a part file inside a folder
    that is temporary as a whole) and :meth:`commit` only closes it.
    """

    def __init__(self, output: Path, fmt: str, *, atomic: bool = True) -> None:
        self.output, self.fmt, self.atomic = output, fmt, atomic
        from ..files import clean_stale, temp_path

        if atomic:
            output.parent.mkdir(parents=True, exist_ok=True)
            clean_stale(output)  # temporary files of killed runs to the same path
            self.tmp = temp_path(output)
            self.tmp.touch(mode=0o600)
        else:
            self.tmp = output
        self.first = True
        self.pq_writer = None
        self.handle = None

    def write(self, frame: pd.DataFrame) -> None:
        import pyarrow as pa

        self.write_arrow(pa.Table.from_pandas(frame, preserve_index=False))

    def write_arrow(self, table) -> None:
        """Append an Arrow table (the same schema as the first one written)."""
        if self.fmt == "csv":
            # Arrow's CSV writer: shortest round-trip floats, several times faster than
            # DataFrame.to_csv (numbers read back bit for bit)
            import pyarrow.csv as pcsv

            if self.handle is None:
                self.handle = open(self.tmp, "wb")  # closed in commit() or abort()
            pcsv.write_csv(table, self.handle,
                           write_options=pcsv.WriteOptions(include_header=self.first))
        else:
            import pyarrow.parquet as pq

            if self.pq_writer is None:  # pyarrow opens the path itself (native writes)
                self.pq_writer = pq.ParquetWriter(str(self.tmp), table.schema)
            else:
                table = table.cast(self.pq_writer.schema)
            self.pq_writer.write_table(table)
        self.first = False

    def commit(self) -> None:
        if self.pq_writer is not None:
            self.pq_writer.close()
        if self.handle is not None:
            self.handle.close()
        if not self.atomic:
            return
        from ..files import current_umask

        os.chmod(self.tmp, 0o666 & ~current_umask())
        os.replace(self.tmp, self.output)

    def abort(self) -> None:
        if self.handle is not None:
            self.handle.close()
        if self.pq_writer is not None:
            try:
                self.pq_writer.close()
            except Exception:
                pass
        self.tmp.unlink(missing_ok=True)


def normalise_types(frame: pd.DataFrame, spec: BatchSpec) -> pd.DataFrame:
    """Result columns with stable dtypes across chunks (for Parquet schemas)."""
    for c in frame.columns:
        if c.startswith("in_window_"):
            frame[c] = frame[c].astype("boolean")
    for h in spec.unknown:
        if h in frame.columns and frame[h].dtype == object:
            frame[h] = frame[h].astype(str)
    return frame


def write_stream(parts: Iterator[pd.DataFrame], dst: Path, fmt_out: str,
                 summary: BatchSummary, collect: int, src: Path) -> None:
    """Write result parts in order to a temporary file, renamed when all are written;
    nothing is left behind when a part fails."""
    writer = Writer(dst, fmt_out)
    try:
        for part in parts:
            writer.write(part)
            tally(summary, part, collect)
        if summary.rows == 0:
            raise PkcalcInputError("the table has a header but no rows", file=str(src))
        writer.commit()
    except BaseException:
        writer.abort()
        raise


def tally(summary: BatchSummary, result: pd.DataFrame, collect: int) -> None:
    errors = result["error"].to_numpy()
    failed = errors != ""
    first = summary.rows
    summary.rows += len(result)
    summary.failed += int(failed.sum())
    for i in np.flatnonzero(failed)[: max(0, 5 - len(summary.first_errors))]:
        summary.first_errors.append(f"row {first + i + 1}: {errors[i]}")
    room = collect - first  # values of the rows without error among the first `collect`
    if room > 0:
        ok = ~failed[:room]
        summary.plateau += result["plateau_concentration [mg/L]"].to_numpy()[:room][ok].tolist()
        summary.time_to_90 += result["time_to_90_percent [h]"].to_numpy()[:room][ok].tolist()
        if "fraction_in_window_at_steady_state" in result:
            summary.fraction_in_window += result["fraction_in_window_at_steady_state"] \
                .to_numpy()[:room][ok].tolist()


def scenario_rows(path: Path, options: BatchOptions) -> tuple[pd.DataFrame, list]:
    """A scenario file (docs/formats.md) as batch rows: each scenario's own dose list is
    predicted with the general model (scenario files are small; one call per scenario)."""
    from ..predict import predict_scenario
    from ..schema import load_scenario_file

    sfile = load_scenario_file(path)
    rows = []
    for s in sfile.scenarios:
        pred = predict_scenario(s)
        p = pred.parameters
        row = {"scenario": s.name, "clearance [L/h]": p["clearance"], "volume [L]": p["volume"],
               "half_life [h]": p["half_life"], "elimination_rate [1/h]": p["elimination_rate"],
               "plateau_concentration [mg/L]": pred.plateau_concentration
               if pred.plateau_concentration is not None else np.nan}
        for f in FRACTIONS:
            row[f"time_to_{f * 100:g}_percent [h]"] = pred.time_to_fraction.get(
                f, float(model.time_to_fraction(f, p["clearance"], p["volume"])))
        ss = pred.steady_state
        row["steady_state_peak [mg/L]"] = ss.peak if ss else np.nan
        row["steady_state_trough [mg/L]"] = ss.trough if ss else np.nan
        row["steady_state_average [mg/L]"] = ss.average if ss else np.nan
        if options.at:
            for t, c in zip(options.at, pred.concentration_at(list(options.at)), strict=True):
                row[at_label(t)] = float(c)
        row["flags"] = " | ".join(pred.flags)
        row["error"] = ""
        rows.append(row)
    if not rows:  # no scenario could be read: the file is unusable, as for predict
        raise PkcalcInputError([p for _, err in sfile.failures for p in err.problems])
    columns = list(rows[0])
    for label, err in sfile.failures:
        rows.append({"scenario": label, "error": str(err)})
    return pd.DataFrame(rows, columns=columns), sfile.failures


def toml_chunks(path: Path, chunk_rows: int):
    """A TOML input with a ``[grid]`` table (cartesian product) as one frame."""
    from ..schema import read_toml

    data = read_toml(path)
    if "grid" not in data:
        raise PkcalcInputError("a TOML batch input holds a [grid] table or [[scenarios]]",
                               file=str(path), field="grid",
                               expected="[grid] with lists of quantities")
    unknown = sorted(set(data) - {"grid", "title"})
    if unknown:
        raise PkcalcInputError("unknown key", file=str(path), field=unknown[0],
                               expected="grid, title")
    frame = grid_frame(data["grid"], file=str(path))
    return list(frame.columns), (frame.iloc[s:s + chunk_rows]
                                 for s in range(0, len(frame), chunk_rows))

