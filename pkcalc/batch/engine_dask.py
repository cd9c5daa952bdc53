"""The Dask engine of ``pkcalc batch``: the same kernel on dask.dataframe partitions.

Partitions are computed on a cluster (a local one on loopback by default, or an
existing scheduler) with :func:`pkcalc.batch.compute` via ``map_partitions``;
the client receives them in order and writes one output file atomically.
Every column is read as text and converted by the kernel, so results are the
same to the last bit as the local engine's.  See docs/dask.md for running on
several machines.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from ..errors import PkcalcInputError
from .columns import BatchOptions, BatchSummary, parse_columns
from .io import csv_chunks, normalise_types, parquet_chunks, write_stream
from .kernel import compute

__all__ = ["run_dask"]


def _kernel(part: pd.DataFrame, spec, options) -> pd.DataFrame:
    return normalise_types(compute(part, spec, options), spec)


def run_dask(src: Path, dst: Path, fmt_in: str, fmt_out: str, options: BatchOptions,
             scheduler: str | None, chunk_rows: int, summary: BatchSummary,
             collect: int) -> None:
    """Run the batch on Dask (see the module docstring)."""
    try:
        import dask.dataframe as dd
        from distributed import Client, LocalCluster
    except ImportError:
        raise PkcalcInputError("the dask engine needs dask[distributed] and dask[dataframe]",
                               expected="pip install 'pkcalc[dask]'") from None
    reader = csv_chunks if fmt_in == "csv" else parquet_chunks
    header, _ = reader(src, 1)
    spec = parse_columns(header, file=str(src))
    if spec.unknown:
        summary.warnings.append(f"columns not used (carried through): "
                                f"{', '.join(spec.unknown)}")
    cluster = None
    try:
        if scheduler:
            client = Client(scheduler, timeout="20s")
        else:
            cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                   host="127.0.0.1", dashboard_address=None)
            client = Client(cluster)
    except OSError as exc:
        raise PkcalcInputError(f"cannot reach the Dask scheduler ({exc})",
                               field="--scheduler", expected="tcp://HOST:PORT") from None
    try:
        if fmt_in == "csv":
            # blocks of roughly chunk_rows rows (about 40 bytes a row)
            ddf = dd.read_csv(str(src), dtype=str, keep_default_na=False, na_values=[""],
                              skipinitialspace=True, blocksize=max(chunk_rows * 40, 1 << 20))
        else:
            ddf = dd.read_parquet(str(src))
        meta = _kernel(ddf._meta if fmt_in == "parquet" else pd.DataFrame(
            {h: pd.Series(dtype=str) for h in header}), spec, options)
        out = ddf.map_partitions(_kernel, spec, options, meta=meta)
        futures = client.compute(out.to_delayed())
        # computed on the cluster, written here in partition order
        write_stream((fut.result() for fut in futures), dst, fmt_out, summary, collect, src)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
