"""Partitioned batch runs (pkcalc.batch.parts, pkcalc.batch.engine_dask): the same
numbers as the local engine for every format, output layout and worker count; row
order kept; nothing left at the output path by a failed or killed run.

The reference for every comparison is the local engine's single-file output (an
independent path: chunked streaming in this process, no partitions).
"""

from __future__ import annotations

import itertools
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from pkcalc.batch import BatchOptions, run_batch
from pkcalc.batch.parts import MANIFEST_NAME, plan_partitions
from pkcalc.errors import PkcalcInputError

from .test_batch import random_table

distributed = pytest.importorskip("distributed")

OPTIONS = BatchOptions(at=(24.0,), population=30, cv_clearance=0.3, cv_volume=0.2, seed=9)


@pytest.fixture(scope="module")
def clusters():
    """Test-started local clusters on loopback with 1, 2 and 3 worker processes."""
    made = {n: distributed.LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                                        host="127.0.0.1", dashboard_address=":0")
            for n in (1, 2, 3)}
    yield {n: c.scheduler_address for n, c in made.items()}
    for c in made.values():
        c.close()


def write_input(tmp_path: Path, fmt: str, n: int = 3000) -> Path:
    frame = random_table(n, seed=4)
    frame.loc[5, "half_life [h]"] = -1.0          # a bad row: a row error, not a failure
    frame.loc[2500, "rate [mg/h]"] = np.nan
    src = tmp_path / f"in.{fmt}"
    if fmt == "csv":
        frame.to_csv(src, index=False)
    else:
        frame.to_parquet(src, index=False, row_group_size=500)
    return src


def read_output(path: Path) -> pd.DataFrame:
    """A file or a partitioned folder, parts in order, with the same reader options."""
    files = sorted(path.glob("part-*")) if path.is_dir() else [path]
    if files[0].suffix == ".parquet":
        return pd.concat([pq.read_table(f).to_pandas() for f in files], ignore_index=True)
    return pd.concat([pd.read_csv(f, dtype={"id": str}, keep_default_na=False,
                                  na_values=[""]) for f in files], ignore_index=True)


def csv_bytes(path: Path) -> bytes:
    """A CSV output's bytes; a partitioned one's parts joined under the first header."""
    if not path.is_dir():
        return path.read_bytes()
    parts = [f.read_bytes() for f in sorted(path.glob("part-*"))]
    return parts[0] + b"".join(p.split(b"\n", 1)[1] for p in parts[1:])


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
@pytest.mark.parametrize("partitioned", [False, True])
@pytest.mark.parametrize("workers", [1, 2, 3])
def test_dask_equals_local_to_the_bit(tmp_path, clusters, fmt, partitioned, workers):
    src = write_input(tmp_path, fmt)
    ref = run_batch(src, tmp_path / f"local.{fmt}", OPTIONS, chunk_rows=700)
    out = tmp_path / f"dask.{fmt}"
    got = run_batch(src, out, OPTIONS, engine="dask", scheduler=clusters[workers],
                    chunk_rows=700, partitioned=partitioned)
    assert got.rows == ref.rows == 3000 and got.failed == ref.failed == 2
    assert got.first_errors == ref.first_errors
    assert got.workers == workers and got.partitions > 1
    assert got.plateau == ref.plateau and got.time_to_90 == ref.time_to_90
    if fmt == "csv":   # the same text, byte for byte (parts: one header each)
        assert csv_bytes(out) == (tmp_path / "local.csv").read_bytes()
    left, right = read_output(tmp_path / f"local.{fmt}"), read_output(out)
    pd.testing.assert_frame_equal(left, right, check_exact=True, check_dtype=fmt != "csv")
    assert list(right["id"]) == [f"{i:05d}" for i in range(3000)]   # row order kept
    if partitioned:
        assert (out / MANIFEST_NAME).is_file()
        assert len(list(out.glob("part-*"))) == got.partitions


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
def test_partitioned_local_and_dask_write_the_same_parts(tmp_path, clusters, fmt):
    src = write_input(tmp_path, fmt)
    a = run_batch(src, tmp_path / f"a.{fmt}", OPTIONS, chunk_rows=900, partitioned=True)
    b = run_batch(src, tmp_path / f"b.{fmt}", OPTIONS, chunk_rows=900, partitioned=True,
                  engine="dask", scheduler=clusters[2])
    assert a.engine == "local" and a.workers == 0 and a.partitions == b.partitions
    names = sorted(p.name for p in (tmp_path / f"a.{fmt}").glob("part-*"))
    assert names == sorted(p.name for p in (tmp_path / f"b.{fmt}").glob("part-*"))
    for name in names:
        if fmt == "csv":
            assert (tmp_path / "a.csv" / name).read_bytes() == \
                (tmp_path / "b.csv" / name).read_bytes()
        else:
            assert pq.read_table(tmp_path / "a.parquet" / name).equals(
                pq.read_table(tmp_path / "b.parquet" / name))


def test_a_started_local_cluster_gives_the_same_table(tmp_path):
    # the engine's own LocalCluster (not a test fixture), two worker processes
    src = write_input(tmp_path, "parquet")
    run_batch(src, tmp_path / "local.parquet", OPTIONS)
    s = run_batch(src, tmp_path / "dask.parquet", OPTIONS, engine="dask", workers=2,
                  partitioned=True, chunk_rows=1000)
    assert s.workers == 2 and 1 <= len(s.worker_peak_rss_mb) <= 2 and s.client_peak_rss_mb > 0
    assert "partitions: 3 of about 1,000 rows (the input's row groups), computed by 2 " \
           "worker processes" in s.summary()
    pd.testing.assert_frame_equal(read_output(tmp_path / "local.parquet"),
                                  read_output(tmp_path / "dask.parquet"), check_exact=True)
    assert len(s.to_frame()) == 3000 and len(s.to_frame(max_rows=7)) == 7


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
def test_the_summary_uses_the_same_first_rows(tmp_path, clusters, fmt):
    # fewer summary values than rows: the rows without error among the first 1,234,
    # wherever the partitions fall (a bad row at 5 lies inside, one at 2,500 outside)
    src = write_input(tmp_path, fmt)
    a = run_batch(src, tmp_path / f"a.{fmt}", OPTIONS, chunk_rows=700, collect=1234)
    b = run_batch(src, tmp_path / f"b.{fmt}", OPTIONS, chunk_rows=700, collect=1234,
                  engine="dask", scheduler=clusters[3])
    assert len(a.plateau) == 1233 and a.plateau == b.plateau
    assert a.time_to_90 == b.time_to_90
    np.testing.assert_array_equal(a.fraction_in_window, b.fraction_in_window)


def test_the_plan_follows_row_groups_and_byte_ranges(tmp_path):
    src = write_input(tmp_path, "parquet")
    plan = plan_partitions(src, "parquet", 1200)
    # six row groups of 500 rows: two per partition (1,000 <= 1,200), three partitions
    assert [p.row_groups for p in plan] == [(0, 1), (2, 3), (4, 5)]
    assert plan_partitions(src, "parquet", 100)[0].row_groups == (0,)  # a group stays whole
    csv = write_input(tmp_path, "csv")
    parts = plan_partitions(csv, "csv", 1000)
    assert parts[0].start > 0 and parts[-1].end == csv.stat().st_size
    assert all(a.end == b.start for a, b in itertools.pairwise(parts))


def test_a_partitioned_output_replaces_only_an_earlier_one(tmp_path):
    src = write_input(tmp_path, "parquet")
    out = tmp_path / "res.parquet"
    run_batch(src, out, OPTIONS, partitioned=True, chunk_rows=1000)
    first = sorted(p.name for p in out.iterdir())
    run_batch(src, out, OPTIONS, partitioned=True, chunk_rows=2000)  # fewer parts now
    assert sorted(p.name for p in out.iterdir()) != first
    assert len(read_output(out)) == 3000
    other = tmp_path / "mine.parquet"
    other.mkdir()
    (other / "notes.txt").write_text("keep me")
    with pytest.raises(PkcalcInputError, match="not a partitioned pkcalc output"):
        run_batch(src, other, OPTIONS, partitioned=True)
    assert (other / "notes.txt").read_text() == "keep me"
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no leftovers


def test_a_malformed_csv_line_is_a_row_error_on_every_engine(tmp_path, clusters):
    # B4/B6: a line with more cells than the header is that row's error, in its place;
    # the other rows are computed as by the local engine
    src = write_input(tmp_path, "csv")
    lines = src.read_text().splitlines()
    lines[2000] += ",1,2,3"                       # more cells than the header
    src.write_text("\n".join(lines) + "\n")
    out, local = tmp_path / "out.csv", tmp_path / "local.csv"
    summary = run_batch(src, out, OPTIONS, engine="dask", scheduler=clusters[2],
                        chunk_rows=300, partitioned=True)
    run_batch(src, local, OPTIONS, chunk_rows=300)
    a, b = read_output(out), pd.read_csv(local, keep_default_na=False, na_values=[""])
    assert summary.failed >= 1 and len(a) == len(b) == len(lines) - 1
    row = a.iloc[1999]
    assert row["error"].startswith("the row has") and "header" in row["error"]
    assert b.iloc[1999]["error"].endswith("(line 2001)")
    ok = a["error"].fillna("") == ""
    assert np.allclose(a.loc[ok, "plateau_concentration [mg/L]"],
                       b.loc[ok, "plateau_concentration [mg/L]"], rtol=1e-12, equal_nan=True)


def test_no_scheduler_is_an_input_error_within_the_timeout(tmp_path):
    from pkcalc.engines import Engine

    src = write_input(tmp_path, "parquet", n=50)
    t0 = time.perf_counter()
    with pytest.raises(PkcalcInputError, match="cannot reach the Dask scheduler"):
        run_batch(src, tmp_path / "o.parquet", BatchOptions(),
                  engine=Engine("dask", scheduler="tcp://127.0.0.1:9", timeout=2))
    assert time.perf_counter() - t0 < 15
    assert not (tmp_path / "o.parquet").exists()


def test_a_killed_dask_run_leaves_nothing_at_the_output(tmp_path):
    n = 3_000_000
    rng = np.random.default_rng(0)
    src = tmp_path / "big.parquet"
    pd.DataFrame({"clearance [L/h]": rng.uniform(1, 10, n), "volume [L]": rng.uniform(10, 80, n),
                  "rate [mg/h]": rng.uniform(10, 900, n)}).to_parquet(src, row_group_size=100_000)
    out = tmp_path / "out.parquet"
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1])}
    proc = subprocess.Popen([sys.executable, "-m", "pkcalc", "batch", str(src), "--out",
                             str(out), "--engine", "dask", "--workers", "2", "--partitioned",
                             "--quiet"], env=env, start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:   # parts are being written
        temps = [p for p in tmp_path.iterdir() if p.name.startswith(".out.parquet")]
        if temps and list(temps[0].glob("part-*")):
            break
        time.sleep(0.05)
    else:
        proc.kill()
        pytest.fail("the run did not start writing parts within 60 s")
    os.killpg(proc.pid, signal.SIGKILL)          # the client and its cluster
    proc.wait()
    assert not out.exists()
    # the next run to the same path removes the killed run's parts and succeeds
    s = run_batch(src, out, BatchOptions(), partitioned=True, chunk_rows=1_000_000)
    assert s.rows == n
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


def test_the_command_reports_row_errors_with_exit_1(tmp_path, clusters, run_cli):
    src = write_input(tmp_path, "csv")
    out = tmp_path / "res.csv"
    r = run_cli("batch", src, "--out", out, "--engine", "dask", "--scheduler", clusters[2],
                "--partitioned", "--chunk-rows", "1000", "--json")
    assert r.code == 1, r.err
    doc = r.json()
    assert doc["partitioned"] and doc["workers"] == 2 and doc["partitions"] >= 3
    assert doc["failed"] == 2 and doc["peak_memory_mb"]["client"] > 0
    assert "row 6: half_life must be > 0" in r.err
    assert (out / MANIFEST_NAME).is_file() and (tmp_path / "CAUTION.txt").is_file()
