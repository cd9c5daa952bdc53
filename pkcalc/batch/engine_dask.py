"""Partitioned batch runs on Dask workers, or in this process (``--partitioned``).

The client plans the partitions (:mod:`pkcalc.batch.parts`), checks that every
worker reaches the input and the output's folder, and submits one task per
partition.  Each worker reads its partition from the input, computes it with the
batch kernel and writes its part file into a temporary folder beside the output;
only counts and a few summary values travel back.  The client then commits:

- a partitioned output: the folder of parts is renamed to the output path;
- a single output file: the parts are streamed in order into it (one block in
  memory at a time) while later partitions are still being computed.

Results are the same to the last bit as the local engine's: the same kernel,
the same parsing, and variability draws that do not depend on the partitions.
See docs/dask.md for several machines.
"""

from __future__ import annotations

import os
import time
from functools import partial
from pathlib import Path

from ..engines import Engine, dask_client
from ..errors import PkcalcInputError
from .columns import BatchOptions, BatchSummary, parse_columns, unused_columns_warning
from .io import Writer, csv_chunks, parquet_chunks
from .parts import (
    Part,
    PartResult,
    append_part,
    check_dataset_target,
    commit_dataset,
    csv_layout,
    merge_result,
    part_file,
    peak_rss_mb,
    plan_partitions,
    remove_folder,
    run_part,
    temp_folder,
)

__all__ = ["run_partitioned"]


def _access(src: str, folder: str) -> str:
    """Runs on every worker before the work: '' or what the worker cannot reach."""
    if not os.path.isfile(src):
        return f"cannot read the input {src}"
    if not os.access(folder, os.W_OK):
        return f"cannot write into {folder}"
    return ""


def _progress_line(summary: BatchSummary, done: int, total: int, started: float) -> None:
    import sys

    elapsed = time.perf_counter() - started
    left = elapsed / done * (total - done) if done else 0.0
    sys.stderr.write(f"\r  partition {done:,} of {total:,}, {summary.rows:,} rows "
                     f"(about {left:.0f} s left)   ")
    sys.stderr.flush()


def run_partitioned(src: Path, dst: Path, fmt_in: str, fmt_out: str, options: BatchOptions,
                    engine: Engine, chunk_rows: int, summary: BatchSummary, collect: int,
                    partitioned: bool, progress: bool = False) -> None:
    """Run the batch partition by partition on ``engine`` (see the module docstring)."""
    reader = csv_chunks if fmt_in == "csv" else parquet_chunks
    header, _ = reader(src, 1)
    spec = parse_columns(header, file=str(src))
    if (unused := unused_columns_warning(spec)) is not None:
        summary.warnings.append(unused)
    if partitioned:
        check_dataset_target(dst)
    plan = plan_partitions(src, fmt_in, chunk_rows)
    layout = csv_layout(src) if fmt_in == "csv" else None
    summary.partitions = len(plan)
    summary.partition_rows = max((p.rows_hint for p in plan), default=0)
    summary.partition_source = ("the input's row groups" if fmt_in == "parquet"
                                else f"byte ranges of about --chunk-rows {chunk_rows:,} rows")
    summary.partitioned = partitioned
    folder = temp_folder(dst)
    task = partial(run_part, spec=spec, options=options, folder=str(folder),
                   fmt_out=fmt_out, chunk_rows=chunk_rows, collect=collect, layout=layout)
    writer = None if partitioned else Writer(dst, fmt_out)
    started = time.perf_counter()
    names: list[str] = []  # part files written, in order (results are not kept)
    try:
        for done, result in enumerate(_results(plan, task, engine, src, folder, summary), 1):
            merge_result(summary, result, collect)
            if result.rows:
                names.append(result.file)
            if writer is not None and result.rows:
                append_part(writer, part_file(folder, result.index, fmt_out), fmt_out,
                            first=len(names) == 1)
                part_file(folder, result.index, fmt_out).unlink()
            if progress:
                _progress_line(summary, done, len(plan), started)
        if summary.rows == 0:
            raise PkcalcInputError("the table has a header but no rows", file=str(src))
        if writer is not None:
            writer.commit()
            remove_folder(folder)
        else:
            commit_dataset(folder, dst, summary, names)
    except BaseException:
        if writer is not None:
            writer.abort()
        remove_folder(folder)
        raise
    finally:
        if progress:
            import sys

            sys.stderr.write("\n")
        summary.client_peak_rss_mb = peak_rss_mb()


def _results(plan: list[Part], task, engine: Engine, src: Path, folder: Path,
             summary: BatchSummary):
    """The parts' results in order, computed here or on the cluster."""
    if engine.kind == "local":
        summary.workers = 0
        for part in plan:
            yield task(part)
        return
    with dask_client(engine) as client:
        workers = client.scheduler_info().get("workers", {})
        summary.workers = len(workers)
        trouble = {w: m for w, m in client.run(_access, str(src.resolve()),
                                               str(folder.resolve())).items() if m}
        if trouble:
            worker, message = next(iter(trouble.items()))
            raise PkcalcInputError(
                f"{len(trouble)} of {len(workers)} Dask workers cannot do the work "
                f"(worker {worker}: {message})", file=str(src),
                expected="the input and the output's folder on storage that every worker "
                         "reaches at the same path (a shared file system)")
        futures = client.map(task, plan, pure=False)
        try:
            for i, fut in enumerate(futures):
                result = _result(fut)
                futures[i] = None  # released: the worker drops its copy of the result
                fut.release()
                yield result
        finally:
            client.cancel([f for f in futures if f is not None])


def _result(fut) -> PartResult:
    try:
        return fut.result()
    except PkcalcInputError:
        raise
    except Exception as exc:
        from distributed import KilledWorker

        if isinstance(exc, KilledWorker):
            raise PkcalcInputError(
                "a Dask worker died while computing a partition (often out of memory)",
                field="--chunk-rows", expected="smaller partitions, e.g. --chunk-rows "
                                               "100000, or workers with more memory") from None
        raise
