"""Benchmark of the Dask batch engine against the local engine, measured in one run.

Run: python -m pytest -m bench -s tests/benchmarks/test_bench_dask.py

Invented tables of 10,000,000 and 100,000,000 rows (three numeric columns,
row groups of 1,000,000 rows, seeded), Parquet in, Parquet out, every run a fresh
``pkcalc batch`` process (so Dask's cluster start-up is included in its wall
time):

- the local engine (the baseline, one file);
- Dask with 1 and 2 worker processes, ``--partitioned`` (each worker writes its
  parts), and Dask with 2 workers writing one file;
- peak memory of the client (VmHWM, printed by pkcalc in ``--json``) and of each
  worker, and of the local engine's process.

Times are the median of three runs at 10,000,000 rows (one run at 100,000,000).
Targets (issue): Dask with 2 workers at least as fast as local, >= 1.6x faster
than Dask with 1 worker; client under 500 MB and every worker under 1 GB at both
sizes.  The memory bounds are asserted; the times are printed with the ratios
(this 2-core machine is shared and noisy).
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

pytestmark = pytest.mark.bench
pytest.importorskip("distributed")


def make_input(path: Path, rows: int) -> None:
    """Invented scenarios written block by block (bounded memory), 1,000,000-row groups."""
    block = 1_000_000
    with pq.ParquetWriter(path, pa.schema([("clearance [L/h]", pa.float64()),
                                           ("volume [L]", pa.float64()),
                                           ("rate [mg/h]", pa.float64())])) as w:
        for i in range(0, rows, block):
            rng = np.random.default_rng(i)
            n = min(block, rows - i)
            w.write_table(pa.table({"clearance [L/h]": rng.uniform(1, 10, n),
                                    "volume [L]": rng.uniform(10, 80, n),
                                    "rate [mg/h]": rng.uniform(10, 900, n)}))


def run(args: list[str]) -> tuple[float, dict, float]:
    """A fresh ``pkcalc batch`` process: wall time, its JSON summary, its own peak RSS."""
    code = ("import resource, sys; from pkcalc.cli import main; rc = main(sys.argv[1:]); "
            "print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss, file=sys.stderr); "
            "sys.exit(rc)")
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-c", code, "batch", *args, "--json", "--quiet"],
                          capture_output=True, text=True)
    wall = time.perf_counter() - t0
    assert proc.returncode == 0, proc.stderr[-2000:]
    rss = int(proc.stderr.strip().splitlines()[-1]) / 1024
    return wall, json.loads(proc.stdout), rss


def remove(path: Path) -> None:
    if path.is_dir():
        shutil.rmtree(path)
    else:
        path.unlink(missing_ok=True)


@pytest.mark.parametrize("rows", [10_000_000, 100_000_000], ids=["10M", "100M"])
def test_bench_dask_scales_with_workers_and_memory_stays_bounded(tmp_path, rows):
    src = tmp_path / "big.parquet"
    t0 = time.perf_counter()
    make_input(src, rows)
    print(f"\n[bench] {rows:,} rows: input {src.stat().st_size / 2**20:,.0f} MB written in "
          f"{time.perf_counter() - t0:.1f} s")
    out = tmp_path / "out.parquet"
    figures = {}
    runs = [("local", ["--engine", "local"]),
            ("dask-1", ["--engine", "dask", "--workers", "1", "--partitioned"]),
            ("dask-2", ["--engine", "dask", "--workers", "2", "--partitioned"]),
            ("dask-2-one-file", ["--engine", "dask", "--workers", "2"])]
    repeats = 3 if rows <= 10_000_000 else 1   # the median of three where it is cheap
    for name, extra in runs:
        walls, clients, largest = [], [], []
        for _ in range(repeats):
            wall, doc, rss = run([str(src), "--out", str(out), *extra])
            assert doc["rows"] == rows and doc["failed"] == 0
            mem = doc.get("peak_memory_mb") or {}
            workers = mem.get("workers") or {}
            walls.append(wall)
            clients.append(mem.get("client") or rss)
            largest.append(max(workers.values(), default=0.0))
            remove(out)
        figures[name] = (float(np.median(walls)), max(clients), max(largest))
        print(f"[bench]   {name:16s} {figures[name][0]:7.2f} s (runs: "
              f"{', '.join(f'{w:.2f}' for w in walls)})   client peak "
              f"{figures[name][1]:6.0f} MB"
              + (f"   largest worker {figures[name][2]:6.0f} MB ({len(workers)} workers; "
                 f"{doc['partitions']} partitions of about {doc['partition_rows']:,} rows)"
                 if workers else ""))
    local, one, two = figures["local"][0], figures["dask-1"][0], figures["dask-2"][0]
    print(f"[bench]   dask 2 workers vs local: {local / two:.2f}x (target >= 1.0); "
          f"vs dask 1 worker: {one / two:.2f}x (target >= 1.6); one output file with 2 "
          f"workers vs local: {local / figures['dask-2-one-file'][0]:.2f}x")
    for name, (_, client, worker) in figures.items():
        assert client < 500, f"{name}: client peak {client:.0f} MB"
        assert worker < 1024, f"{name}: worker peak {worker:.0f} MB"
