"""Running a batch file to an output table on the local engine (or handing it to Dask)."""

from __future__ import annotations

import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import pandas as pd

from ..engines import Engine
from ..errors import PkcalcInputError, check_path, check_type
from ..files import resolved
from .columns import (
    DEFAULT_CHUNK_ROWS,
    POPULATION_BLOCK,
    BatchOptions,
    BatchSummary,
    parse_columns,
    unused_columns_warning,
)
from .io import (
    csv_chunks,
    detect_format,
    normalise_types,
    parquet_chunks,
    scenario_rows,
    toml_chunks,
    write_stream,
)
from .kernel import compute


def _progress(enabled: bool) -> Callable[[int, float], None]:
    if not enabled:
        return lambda rows, started: None

    def show(rows: int, started: float) -> None:
        elapsed = time.perf_counter() - started
        rate = rows / elapsed if elapsed > 0 else 0.0
        sys.stderr.write(f"\r  {rows:,} rows ({rate:,.0f} rows/s)   ")
        sys.stderr.flush()
    return show


def run_batch(input_path: str | Path, output_path: str | Path, options: BatchOptions, *,
              engine: str | Engine = "local", scheduler: str | None = None,
              chunk_rows: int = DEFAULT_CHUNK_ROWS, progress: bool = False,
              collect: int = 200_000, partitioned: bool = False,
              workers: int | None = None) -> BatchSummary:
    """Run a batch file to an output table (CSV or Parquet), streaming in chunks.

    Parameters
    ----------
    input_path : path
        ``.csv``, ``.parquet`` or ``.toml`` (``[grid]`` or ``[[scenarios]]``).
    output_path : path
        ``.csv`` or ``.parquet``; written atomically, never over the input.  With
        ``partitioned`` a folder of that name holding ``part-00000.<fmt>`` ... and a
        manifest.
    options : BatchOptions
    engine : {"local", "dask"} or Engine
        ``"dask"`` computes partitions on Dask workers (see docs/dask.md).
    scheduler : str, optional
        Address of an existing Dask scheduler (``tcp://host:port``).
    chunk_rows : int
        Rows per chunk (memory stays bounded by it); partitions of CSV inputs.
    progress : bool
        Progress on standard error.
    collect : int
        Keep up to this many plateau / time-to-90 % values for the summary plots.
    partitioned : bool
        Write a partitioned dataset (a folder of part files) instead of one file.
    workers : int, optional
        Worker processes of the local Dask cluster (default: one per core).

    Returns
    -------
    BatchSummary
    """
    from ..tables import check_input_file

    check_path(input_path, "input_path")
    check_path(output_path, "output_path")
    check_type(options, BatchOptions, "options", "a pkcalc.batch.BatchOptions")
    src, dst = Path(input_path), Path(output_path)

    if not isinstance(engine, Engine):
        try:
            engine = Engine(engine, workers=workers, scheduler=scheduler)
        except ValueError as exc:
            raise PkcalcInputError(str(exc).split(": ", 1)[-1],
                                   field="--" + str(exc).split(":", 1)[0]) from None
    if engine.kind == "local" and engine.workers not in (None, 1):
        raise PkcalcInputError("the local batch engine computes in this process",
                               field="--workers", expected="--engine dask for several "
                                                           "worker processes")
    check_input_file(src, "a .csv, .parquet or .toml table")
    if dst.exists() and resolved(dst) == resolved(src):
        raise PkcalcInputError("refusing to overwrite the input file", file=str(dst),
                               expected="an output path other than the input")
    fmt_in, fmt_out = detect_format(src), detect_format(dst)
    if dst.suffix.lower() not in (".csv", ".parquet", ".pq"):
        raise PkcalcInputError(f"the output table must be .csv or .parquet, not "
                               f"'{dst.suffix or '(no suffix)'}'", file=str(dst),
                               field="--out", expected="e.g. results.csv or results.parquet")
    summary = BatchSummary(output=str(dst), input=str(src), engine=engine.kind)
    started = time.perf_counter()
    if engine.kind == "dask" or partitioned:
        from .engine_dask import run_partitioned

        if fmt_in == "toml":
            raise PkcalcInputError("partitioned and dask runs read CSV or Parquet tables",
                                   file=str(src), expected="--engine local without "
                                                           "--partitioned for TOML inputs")
        run_partitioned(src.resolve(), dst.resolve(), fmt_in, fmt_out, options, engine,
                        chunk_rows, summary, collect, partitioned, progress)
        summary.seconds = time.perf_counter() - started
        return summary
    if fmt_in == "toml":
        from ..schema import read_toml

        if "scenarios" in read_toml(src):
            if options.population:
                raise PkcalcInputError("variability runs read a table or a [grid]",
                                       file=str(src), expected="a CSV/Parquet table or [grid]")
            frame, _ = scenario_rows(src, options)
            write_stream(iter([frame]), dst, fmt_out, summary, collect, src)
            summary.seconds = time.perf_counter() - started
            return summary
        header, chunks = toml_chunks(src, chunk_rows)
    elif fmt_in == "csv":
        header, chunks = csv_chunks(src, chunk_rows)
    else:
        header, chunks = parquet_chunks(src, chunk_rows)
    spec = parse_columns(header, file=str(src))
    if (unused := unused_columns_warning(spec)) is not None:
        summary.warnings.append(unused)
    block = chunk_rows if not options.population else max(
        1, min(chunk_rows, POPULATION_BLOCK * 4 // max(options.population, 1)))
    show = _progress(progress)

    def parts() -> Iterator[pd.DataFrame]:
        for chunk in chunks:
            for s in range(0, len(chunk), block):
                yield normalise_types(compute(chunk.iloc[s:s + block], spec, options), spec)
                show(summary.rows, started)

    try:
        write_stream(parts(), dst, fmt_out, summary, collect, src)
    finally:
        if progress:
            sys.stderr.write("\n")
    summary.seconds = time.perf_counter() - started
    return summary


