"""Benchmarks of `pkcalc batch` (printed figures; not part of the default run).

Run: python -m pytest -m bench -s tests/benchmarks/test_bench_batch.py

- 1,000,000 rows CSV -> results CSV end to end, against a bare pandas baseline
  measured in the same run: read_csv + the same numpy arithmetic + to_csv;
- the same rows Parquet -> Parquet;
- peak memory (RSS of a fresh process) for 1,000,000 and 10,000,000 rows: bounded
  by the chunk size, not the file;
- --population 10000 over 100 scenarios.
Invented scenario tables, fixed seeds.
"""

from __future__ import annotations

import math
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pcsv
import pytest

from pkcalc.batch import BatchOptions, run_batch

pytestmark = pytest.mark.bench


def table(n: int, seed: int = 0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    return pd.DataFrame({
        "clearance [L/h]": rng.uniform(1, 10, n).round(4),
        "half_life [h]": rng.uniform(2, 20, n).round(3),
        "rate [mg/h]": rng.uniform(10, 900, n).round(2),
        "duration [h]": np.full(n, 1.0),
        "interval [h]": rng.choice([6.0, 8.0, 12.0], n),
        "target [mg/L]": rng.uniform(5, 20, n).round(2),
    })


def bare(src: Path, dst: Path) -> None:
    """The baseline: pandas read_csv, the same formulas written out, to_csv."""
    d = pd.read_csv(src)
    cl, th, r0 = d["clearance [L/h]"], d["half_life [h]"], d["rate [mg/h]"]
    tinf, tau, target = d["duration [h]"], d["interval [h]"], d["target [mg/L]"]
    k = math.log(2) / th
    v = cl / k
    dose = r0 * tinf
    out = d.copy()
    out["volume [L]"] = v
    out["elimination_rate [1/h]"] = k
    out["plateau_concentration [mg/L]"] = dose / tau / cl
    for f in (0.5, 0.9, 0.95, 0.99):
        out[f"time_to_{f * 100:g}_percent [h]"] = -np.log1p(-f) / k
    peak = dose / v * -np.expm1(-k * tinf) / (k * tinf) / -np.expm1(-k * tau)
    out["steady_state_peak [mg/L]"] = peak
    out["steady_state_trough [mg/L]"] = peak * np.exp(-k * (tau - tinf))
    out["steady_state_average [mg/L]"] = dose / (cl * tau)
    out["rate_for_target [mg/h]"] = target * cl
    out["loading_dose_for_target [mg]"] = target * v
    out["in_window_at_steady_state"] = (peak <= 1.2 * target) & (out[
        "steady_state_trough [mg/L]"] >= 0.8 * target)
    out["error"] = ""
    out.to_csv(dst, index=False)


def peak_rss_mb(args: list[str]) -> tuple[float, float]:
    """Run a fresh process; its peak RSS (MB) and wall time."""
    code = ("import resource, sys; from pkcalc.cli import main; rc = main(sys.argv[1:]); "
            "print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss, file=sys.stderr); "
            "sys.exit(rc)")
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True,
                          check=True)
    wall = time.perf_counter() - t0
    return int(proc.stderr.strip().splitlines()[-1]) / 1024, wall


def test_bench_batch_csv_and_parquet(tmp_path):
    n = 1_000_000
    frame = table(n)
    src = tmp_path / "in.csv"
    pcsv.write_csv(pa.Table.from_pandas(frame, preserve_index=False), src)
    t0 = time.perf_counter()
    bare(src, tmp_path / "bare.csv")
    t_bare = time.perf_counter() - t0
    t0 = time.perf_counter()
    s = run_batch(src, tmp_path / "out.csv", BatchOptions())
    t_ours = time.perf_counter() - t0
    assert s.rows == n and s.failed == 0
    psrc = tmp_path / "in.parquet"
    frame.to_parquet(psrc, index=False)
    t0 = time.perf_counter()
    run_batch(psrc, tmp_path / "out.parquet", BatchOptions())
    t_pq = time.perf_counter() - t0
    print(f"\n[bench] batch 1,000,000 rows CSV -> CSV: pkcalc {t_ours:.2f} s, bare pandas "
          f"read_csv + numpy + to_csv {t_bare:.2f} s, ratio {t_ours / t_bare:.2f} (target <= 2)")
    print(f"[bench] batch 1,000,000 rows Parquet -> Parquet: {t_pq:.2f} s "
          f"({t_ours / t_pq:.1f}x faster than CSV)")
    assert t_ours <= 2 * t_bare and t_pq < t_ours


def test_bench_batch_memory_bounded(tmp_path):
    small, big = tmp_path / "m1.csv", tmp_path / "m10.csv"
    pcsv.write_csv(pa.Table.from_pandas(table(1_000_000, 1), preserve_index=False), small)
    with open(big, "wb") as fh:  # 10 x 1,000,000 rows, written in blocks
        for i in range(10):
            pcsv.write_csv(pa.Table.from_pandas(table(1_000_000, 10 + i), preserve_index=False),
                           fh, write_options=pcsv.WriteOptions(include_header=i == 0))
    rss1, wall1 = peak_rss_mb(["batch", str(small), "--out", str(tmp_path / "o1.csv"),
                               "--quiet"])
    rss10, wall10 = peak_rss_mb(["batch", str(big), "--out", str(tmp_path / "o10.csv"),
                                 "--quiet"])
    size = big.stat().st_size / 2**20
    print(f"\n[bench] peak RSS: 1,000,000 rows {rss1:.0f} MB ({wall1:.1f} s); 10,000,000 rows "
          f"({size:.0f} MB file) {rss10:.0f} MB ({wall10:.1f} s); chunk 200,000 rows")
    assert rss10 < 1.3 * rss1 + 50


def test_bench_population_10000_over_100_scenarios(tmp_path):
    src = tmp_path / "p.csv"
    frame = table(100, 3)
    frame["window_low [mg/L]"] = 5.0
    frame["window_high [mg/L]"] = 40.0
    frame.to_csv(src, index=False)
    opts = BatchOptions(at=(24.0, 48.0), population=10_000, seed=1, cv_clearance=0.3,
                        cv_volume=0.2)
    t0 = time.perf_counter()
    s = run_batch(src, tmp_path / "p-out.csv", opts)
    wall = time.perf_counter() - t0
    t0 = time.perf_counter()
    run_batch(src, tmp_path / "p0.csv", BatchOptions(at=(24.0, 48.0)))
    base = time.perf_counter() - t0
    print(f"\n[bench] --population 10000 over 100 scenarios: {wall:.2f} s (target < 5 s); "
          f"without variability {base:.3f} s; ratio {wall / base:.0f}")
    assert s.rows == 100 and wall < 5.0
