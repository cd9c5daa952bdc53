"""Faults: killed runs, interrupted runs and concurrent runs leave nothing a later run
trips over (docs/formats.md, rules W4-W6).

Each test runs ``python -m pkcalc`` as a separate process (signals need one).  The
outputs are written atomically: a temporary file ``.<name>.pkcalc-<pid>-<hex>.tmp``
beside the destination, renamed over it (POSIX ``rename`` is atomic).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest

from pkcalc.files import INCOMPLETE_NAME, clean_stale, temp_path


def _grid(path: Path, n_clearance: int) -> Path:
    """A batch grid of n_clearance x 100 x 10 rows (invented values)."""
    cls = ", ".join(f'"{2 + i * 0.001:.3f} L/h"' for i in range(n_clearance))
    vols = ", ".join(f'"{20 + i * 0.1:.1f} L"' for i in range(100))
    rates = ", ".join(f'"{100 + i * 10} mg/h"' for i in range(10))
    path.write_text(f"[grid]\nclearance = [{cls}]\nvolume = [{vols}]\nrate = [{rates}]\n",
                    encoding="utf-8")
    return path


def _default_sigint() -> None:
    # a shell starts background jobs with SIGINT ignored, and a child inherits that:
    # restore the default so the test does not depend on how the suite was launched
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def _start(args, cwd):
    return subprocess.Popen([sys.executable, "-m", "pkcalc", *map(str, args)], cwd=cwd,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                            preexec_fn=_default_sigint)


def _wait_for_temp(folder: Path, name: str, proc, limit: float = 60.0) -> list[Path]:
    """Wait until the run has started writing (its temporary file exists)."""
    t0 = time.monotonic()
    while time.monotonic() - t0 < limit:
        temps = [p for p in folder.iterdir() if p.name.startswith(f".{name}.pkcalc-")]
        if temps:
            return temps
        if proc.poll() is not None:
            pytest.fail(f"the run ended before writing: {proc.stderr.read().decode()}")
        time.sleep(0.05)
    pytest.fail("no temporary file appeared")


def test_batch_killed_with_sigkill_leaves_no_output_and_the_next_run_cleans_up(tmp_path):
    big = _grid(tmp_path / "big.toml", 2000)   # 2,000,000 rows
    proc = _start(["batch", big, "--out", "out.csv", "--chunk-rows", "50000"], tmp_path)
    temps = _wait_for_temp(tmp_path, "out.csv", proc)
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=30)
    assert not (tmp_path / "out.csv").exists()          # nothing half-written
    assert all(t.exists() for t in temps)               # a stale temporary file remains
    small = _grid(tmp_path / "small.toml", 2)
    done = subprocess.run([sys.executable, "-m", "pkcalc", "batch", small, "--out",
                           "out.csv"], cwd=tmp_path, capture_output=True, timeout=120)
    assert done.returncode == 0, done.stderr.decode()
    assert len(pd.read_csv(tmp_path / "out.csv")) == 2000
    assert not any(t.exists() for t in temps)           # the next run removed it
    assert not list(tmp_path.glob(".out.csv.*"))


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT])
def test_batch_interrupted_removes_its_temporary_file(tmp_path, sig):
    big = _grid(tmp_path / "big.toml", 2000)
    proc = _start(["batch", big, "--out", "out.parquet", "--chunk-rows", "50000"], tmp_path)
    _wait_for_temp(tmp_path, "out.parquet", proc)
    proc.send_signal(sig)
    err = proc.communicate(timeout=60)[1].decode()
    assert proc.returncode == 130, err
    assert "interrupted" in err and "Traceback" not in err
    assert not (tmp_path / "out.parquet").exists()
    assert not list(tmp_path.glob(".out.parquet.*"))


def test_two_concurrent_runs_to_one_path_both_finish_whole(tmp_path):
    grid = _grid(tmp_path / "g.toml", 300)  # 300,000 rows each
    procs = [_start(["batch", grid, "--out", "same.csv", "--chunk-rows", "50000"], tmp_path)
             for _ in range(2)]
    for p in procs:
        err = p.communicate(timeout=300)[1].decode()
        assert p.returncode == 0, err
    frame = pd.read_csv(tmp_path / "same.csv")
    assert len(frame) == 300_000 and (frame["error"].isna()).all()
    assert not list(tmp_path.glob(".same.csv.*"))


def test_killed_demo_is_recognisably_incomplete(tmp_path):
    proc = _start(["demo", "--out", "d"], tmp_path)
    marker = tmp_path / "d" / INCOMPLETE_NAME
    t0 = time.monotonic()
    while not marker.exists() and time.monotonic() - t0 < 60:
        time.sleep(0.05)
    assert marker.exists()
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=30)
    assert marker.exists()                       # the folder says it is incomplete
    assert not (tmp_path / "d" / "report.html").exists()


def test_stale_temporary_files_of_live_processes_are_kept(tmp_path):
    # a temporary file whose process still runs (a concurrent run) is never removed;
    # one whose process is gone is (POSIX kill(pid, 0) tells which)
    target = tmp_path / "r.csv"
    mine = temp_path(target)
    mine.write_text("x")
    gone = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True).stdout.strip()
    dead = tmp_path / f".r.csv.pkcalc-{gone}-00ff00ff.tmp"
    dead.write_text("x")
    removed = clean_stale(target)
    assert removed == [dead] and mine.exists() and not dead.exists()
    assert os.getpid() > 0


# --------------------------------------------------------------------------- local workers (W10)
def _children(pid: int) -> set[int]:
    """The process ids started by ``pid`` (Linux /proc; every thread's children)."""
    found: set[int] = set()
    for task in Path(f"/proc/{pid}/task").glob("*"):
        try:
            found |= {int(x) for x in (task / "children").read_text().split()}
        except OSError:
            continue
    return found


def _alive(pids: set[int]) -> set[int]:
    alive = set()
    for p in pids:
        try:
            state = Path(f"/proc/{p}/stat").read_text().split(")")[-1].split()[0]
        except OSError:
            continue
        if state != "Z":
            alive.add(p)
    return alive


def _population_with_workers(tmp_path):
    from .conftest import SCENARIOS

    proc = _start(["population", SCENARIOS / "demo-study.toml", "--method", "iterative",
                   "--bootstrap", "400", "--workers", "2", "--no-adequacy",
                   "--vpc-replicates", "0", "--out", tmp_path / "o"], tmp_path)
    t0 = time.monotonic()
    while time.monotonic() - t0 < 120:
        kids = _alive(_children(proc.pid))
        if len(kids) >= 2:
            time.sleep(1.0)  # the workers are busy with replicates
            return proc, _alive(_children(proc.pid))
        if proc.poll() is not None:
            pytest.fail(f"the run ended first: {proc.stderr.read().decode()}")
        time.sleep(0.1)
    proc.kill()
    pytest.fail("no worker processes appeared")


def test_sigterm_stops_a_run_with_local_workers_within_seconds(tmp_path):
    proc, workers = _population_with_workers(tmp_path)
    t0 = time.monotonic()
    proc.send_signal(signal.SIGTERM)
    err = proc.communicate(timeout=60)[1].decode()
    took = time.monotonic() - t0
    assert took < 10, f"took {took:.1f} s to stop"
    assert proc.returncode == 130 and "Traceback" not in err, err
    deadline = time.monotonic() + 10
    while _alive(workers) and time.monotonic() < deadline:
        time.sleep(0.1)
    assert not _alive(workers), "worker processes outlived the run"
    assert not (tmp_path / "o" / "population.json").exists()


def test_workers_end_with_a_run_killed_by_sigkill(tmp_path):
    proc, workers = _population_with_workers(tmp_path)
    assert workers
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=30)
    deadline = time.monotonic() + 10
    while _alive(workers) and time.monotonic() < deadline:
        time.sleep(0.1)
    assert not _alive(workers), "worker processes outlived the killed run"
