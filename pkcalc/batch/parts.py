"""Partitioned batch runs: the plan, one partition read-compute-write, and the commit.

A *partition* is a run of consecutive rows that one worker reads, computes with
the batch kernel and writes as one part file, without the rows passing through
the client:

- Parquet inputs split at row groups (consecutive row groups up to
  ``chunk_rows`` rows make one partition; a larger row group is one partition
  on its own);
- CSV inputs split into byte ranges of about ``chunk_rows`` rows; a partition
  owns the lines that *start* inside its range (lines must not break inside
  quoted cells, as in every byte-range CSV reader).

Inside a partition the rows are computed and written in blocks of at most
``chunk_rows`` rows, so a worker's memory stays near one block whatever the
table's size.  Part files are written into a private temporary folder beside the
output; when every part is done the folder is renamed to the output (a
partitioned dataset) or its parts are streamed in order into one output file.
A run that fails or is killed leaves nothing at the output path.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import shutil
import socket
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import PkcalcInputError
from .columns import POPULATION_BLOCK, BatchOptions, BatchSpec, BatchSummary
from .io import Writer, normalise_types, ragged_rows
from .kernel import compute

__all__ = ["MANIFEST_NAME", "Part", "PartResult", "plan_partitions", "run_part"]

#: The file that describes a partitioned output (ignored by Parquet dataset readers).
MANIFEST_NAME = "_pkcalc_manifest.json"
#: Most errors a part reports back (the summary shows the first five of the run).
PART_ERRORS = 5


@dataclass(frozen=True)
class Part:
    """One partition of an input table (see the module docstring)."""

    index: int
    path: str
    fmt: str
    row_groups: tuple[int, ...] = ()
    start: int = 0
    end: int = 0
    rows_hint: int = 0
    #: the first row's number in the table when known before reading (Parquet)
    offset: int | None = None


@dataclass
class PartResult:
    """What a part sends back: counts, its first errors and a few values for the summary."""

    index: int
    file: str
    rows: int = 0
    failed: int = 0
    errors: list[tuple[int, str]] = field(default_factory=list)
    #: the part's first rows (as many as the summary can use), row by row
    ok: np.ndarray = field(default_factory=lambda: np.empty(0, bool))
    plateau: np.ndarray = field(default_factory=lambda: np.empty(0))
    time_to_90: np.ndarray = field(default_factory=lambda: np.empty(0))
    fraction: np.ndarray | None = None
    peak_rss_mb: float = 0.0
    worker: str = ""


@dataclass(frozen=True)
class CsvLayout:
    """How every CSV partition is parsed: the same options as the local engine."""

    names: tuple[str, ...]
    text_columns: tuple[str, ...]
    header_end: int


# --------------------------------------------------------------------------- planning
def block_rows(chunk_rows: int, options: BatchOptions) -> int:
    """Rows computed at once: ``chunk_rows``, fewer in variability runs (memory)."""
    if not options.population:
        return chunk_rows
    return max(1, min(chunk_rows, POPULATION_BLOCK * 4 // max(options.population, 1)))


def plan_partitions(src: Path, fmt: str, chunk_rows: int) -> list[Part]:
    """The partitions of ``src`` (a ``.csv`` or ``.parquet`` table)."""
    if fmt == "parquet":
        import pyarrow.parquet as pq

        meta = pq.ParquetFile(src).metadata
        parts: list[Part] = []
        group: list[int] = []
        rows = 0
        offset = 0
        for i in range(meta.num_row_groups):
            n = meta.row_group(i).num_rows
            if group and rows + n > chunk_rows:
                parts.append(Part(len(parts), str(src), fmt, tuple(group), rows_hint=rows,
                                  offset=offset))
                offset += rows
                group, rows = [], 0
            group.append(i)
            rows += n
        if group:
            parts.append(Part(len(parts), str(src), fmt, tuple(group), rows_hint=rows,
                              offset=offset))
        return parts
    layout_end = csv_header_end(src)
    size = src.stat().st_size
    with open(src, "rb") as fh:
        fh.seek(layout_end)
        sample = fh.read(1 << 20)
    per_row = len(sample) / max(sample.count(b"\n"), 1) if sample else 1.0
    step = max(int(chunk_rows * per_row), 1 << 16)
    starts = list(range(layout_end, size, step)) or [layout_end]
    return [Part(i, str(src), fmt, start=s, end=min(s + step, size),
                 rows_hint=int(min(s + step, size) - s) // max(int(per_row), 1))
            for i, s in enumerate(starts)]


def csv_header_end(src: Path) -> int:
    """The byte offset just after the header line."""
    with open(src, "rb") as fh:
        fh.readline()
        return fh.tell()


def csv_layout(src: Path) -> CsvLayout:
    """Column names and text columns exactly as the local engine's CSV reader sees them."""
    from ..tables import ENCODING, read_header
    from ..units import parse_header
    from .columns import INPUT_KINDS

    header = read_header(src)
    known = {h for h in header if parse_header(h)[0].strip().lower() in INPUT_KINDS}
    names = pd.read_csv(src, nrows=0, encoding=ENCODING, index_col=False,
                        skipinitialspace=True).columns
    return CsvLayout(tuple(names), tuple(h for h in header if h not in known),
                     csv_header_end(src))


# --------------------------------------------------------------------------- one part
def _worker_name() -> str:
    return f"{socket.gethostname()}:{os.getpid()}"


def peak_rss_mb() -> float:
    """This process's peak resident memory in MB (0 where the system does not say).

    Linux's ``VmHWM`` counts this program only; ``ru_maxrss`` (the fallback) also
    keeps the peak of the process a worker was started from.
    """
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except (OSError, ValueError):
        pass
    try:
        import resource

        return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    except (ImportError, OSError):  # not on every platform
        return 0.0


def _csv_bytes(part: Part, layout: CsvLayout) -> bytes:
    """The lines that start inside the part's byte range."""
    with open(part.path, "rb") as fh:
        if part.start > layout.header_end:
            fh.seek(part.start - 1)
            fh.readline()  # the line that began before the range belongs to the previous part
        else:
            fh.seek(part.start)
        pos = fh.tell()
        data = fh.read(max(0, part.end - pos))
        if data and not data.endswith(b"\n"):
            data += fh.readline()
        return data


def _read_part(part: Part, block: int, layout: CsvLayout | None) -> Iterator[pd.DataFrame]:
    if part.fmt == "parquet":
        import pyarrow.parquet as pq

        pf = pq.ParquetFile(part.path, pre_buffer=False)  # memory: see io.parquet_chunks
        for rb in pf.iter_batches(batch_size=block, row_groups=list(part.row_groups)):
            yield rb.to_pandas()
        return
    from ..tables import _translate

    assert layout is not None
    data = _csv_bytes(part, layout)
    if not data.strip():
        return
    def make():
        return pd.read_csv(io.BytesIO(data), header=None, names=list(layout.names),
                           encoding="utf-8", index_col=False, chunksize=block,
                           skipinitialspace=True, keep_default_na=False, na_values=[""],
                           dtype={h: str for h in layout.text_columns}, on_bad_lines="warn",
                           skip_blank_lines=False)
    try:
        # lines with more cells than the header are row errors (no line number: a part
        # is a byte range of the file)
        yield from ragged_rows(make, 1, "", str(part.path),
                               "the first row of a partition (run without --partitioned "
                               "to find it)")
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError,
            ValueError) as exc:
        raise _translate(part.path, exc, len(layout.names)) from None


def part_file(folder: str | Path, index: int, fmt_out: str) -> Path:
    return Path(folder) / f"part-{index:05d}.{fmt_out}"


def run_part(part: Part, spec: BatchSpec, options: BatchOptions, folder: str, fmt_out: str,
             chunk_rows: int, collect: int, layout: CsvLayout | None = None) -> PartResult:
    """Read, compute and write one partition into ``folder``; runs on a worker.

    Raises
    ------
    PkcalcInputError
        The worker cannot read the input or write the part, or a CSV line is
        malformed (the whole run stops, as with the local engine).
    """
    out = part_file(folder, part.index, fmt_out)
    result = PartResult(part.index, out.name)
    # the summary uses the first `collect` rows of the table: a part whose place is
    # known sends only what falls among them, any other at most `collect` rows
    limit = collect if part.offset is None else max(0, collect - part.offset)
    writer = None
    try:
        for frame in _read_part(part, block_rows(chunk_rows, options), layout):
            res = normalise_types(compute(frame, spec, options), spec)
            if writer is None:  # the folder is temporary as a whole: no file-level rename
                writer = Writer(out, fmt_out, atomic=False)
            writer.write(res)
            _tally_part(result, res, limit)
        if writer is not None:
            writer.commit()
    except OSError as exc:
        if writer is not None:
            writer.abort()
        raise PkcalcInputError(
            f"the worker {_worker_name()} cannot read the input or write its part "
            f"({exc.strerror or exc.__class__.__name__}: {exc.filename or ''})",
            file=part.path, expected="input and output on storage that every worker "
                                     "reaches at the same path") from None
    result.peak_rss_mb = peak_rss_mb()
    result.worker = _worker_name()
    return result


def _tally_part(result: PartResult, frame: pd.DataFrame, limit: int) -> None:
    errors = frame["error"].to_numpy()
    failed = errors != ""
    for i in np.flatnonzero(failed)[: max(0, PART_ERRORS - len(result.errors))]:
        result.errors.append((result.rows + int(i), str(errors[i])))
    room = limit - result.rows
    result.rows += len(frame)
    result.failed += int(failed.sum())
    if room > 0:
        result.ok = np.concatenate([result.ok, ~failed[:room]])
        result.plateau = np.concatenate(
            [result.plateau, frame["plateau_concentration [mg/L]"].to_numpy(float)[:room]])
        result.time_to_90 = np.concatenate(
            [result.time_to_90, frame["time_to_90_percent [h]"].to_numpy(float)[:room]])
        if "fraction_in_window_at_steady_state" in frame:
            result.fraction = np.concatenate([
                result.fraction if result.fraction is not None else np.empty(0),
                frame["fraction_in_window_at_steady_state"].to_numpy(float)[:room]])


# --------------------------------------------------------------------------- the client side
def merge_result(summary: BatchSummary, result: PartResult, collect: int) -> None:
    """Add one part's counts to the run's summary (parts in order)."""
    for row, message in result.errors:
        if len(summary.first_errors) < 5:
            summary.first_errors.append(f"row {summary.rows + row + 1}: {message}")
    room = collect - summary.rows  # as the local engine: rows without error among the first
    summary.rows += result.rows
    summary.failed += result.failed
    if room > 0:
        ok = result.ok[:room]
        summary.plateau += result.plateau[:room][ok].tolist()
        summary.time_to_90 += result.time_to_90[:room][ok].tolist()
        if result.fraction is not None:
            summary.fraction_in_window += result.fraction[:room][ok].tolist()
    if result.worker and summary.workers:
        summary.worker_peak_rss_mb[result.worker] = max(
            summary.worker_peak_rss_mb.get(result.worker, 0.0), result.peak_rss_mb)


def temp_folder(dst: Path) -> Path:
    """A fresh private folder beside ``dst`` for the parts (removed by later runs when
    its process is gone, like pkcalc's temporary files)."""
    from ..files import clean_stale, temp_path

    dst.parent.mkdir(parents=True, exist_ok=True)
    clean_stale(dst)
    folder = temp_path(dst)
    folder.mkdir(mode=0o700)
    return folder


def remove_folder(folder: Path) -> None:
    shutil.rmtree(folder, ignore_errors=True)


def is_dataset(path: Path) -> bool:
    """Whether ``path`` is a folder pkcalc wrote as a partitioned output."""
    return path.is_dir() and (path / MANIFEST_NAME).is_file()


def check_dataset_target(dst: Path) -> None:
    """A partitioned output replaces only an earlier partitioned output of pkcalc."""
    if dst.exists() and not is_dataset(dst):
        kind = "folder" if dst.is_dir() else "file"
        raise PkcalcInputError(
            f"a {kind} that is not a partitioned pkcalc output is already there",
            file=str(dst), field="--out",
            expected="a new path, or the folder of an earlier --partitioned run")


def commit_dataset(folder: Path, dst: Path, summary: BatchSummary, parts: list[str]) -> None:
    """Write the manifest and rename the folder of parts to ``dst`` (an earlier
    partitioned output there is replaced)."""
    from ..files import current_umask

    manifest = {"rows": summary.rows, "failed": summary.failed, "parts": parts,
                "input": summary.input,
                "caution": "Model estimates; dosing decisions belong to licensed clinicians "
                           "and pharmacists under local protocols."}
    (folder / MANIFEST_NAME).write_text(json.dumps(manifest, indent=1) + "\n",
                                        encoding="utf-8")
    os.chmod(folder, 0o777 & ~current_umask())
    for name in [*parts, MANIFEST_NAME]:
        with contextlib.suppress(OSError):
            os.chmod(folder / name, 0o666 & ~current_umask())
    old = None
    if dst.exists():
        check_dataset_target(dst)
        from ..files import temp_path

        old = temp_path(dst)
        os.replace(dst, old)
    os.replace(folder, dst)
    if old is not None:
        remove_folder(old)


def append_part(writer: Writer, path: Path, fmt: str, first: bool) -> None:
    """Stream one part file into the single output file (CSV bytes as written;
    Parquet row group by row group), holding one block at a time."""
    if fmt == "csv":
        if writer.handle is None:
            writer.handle = open(writer.tmp, "wb")  # closed by the writer
        with open(path, "rb") as fh:
            if not first:
                fh.readline()  # the part's header
            shutil.copyfileobj(fh, writer.handle, 1 << 20)
        writer.first = False
        return
    import pyarrow.parquet as pq

    pf = pq.ParquetFile(path)
    for i in range(pf.num_row_groups):
        writer.write_arrow(pf.read_row_group(i))

