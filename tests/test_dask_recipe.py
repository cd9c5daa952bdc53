"""docs/dask.md: the several-machines recipe run as written (scheduler, worker
processes and pkcalc as separate processes on loopback), and a worker that does not
see the input refused before any work."""

from __future__ import annotations

import os
import re
import shlex
import shutil
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

pytest.importorskip("distributed")

ROOT = Path(__file__).resolve().parents[1]
BIN = Path(sys.executable).parent


def recipe() -> list[list[str]]:
    """The commands under the recipe marker of docs/dask.md."""
    text = (ROOT / "docs" / "dask.md").read_text(encoding="utf-8")
    block = text.split("<!-- recipe:", 1)[1].split("```", 2)[1]
    return [shlex.split(line) for line in block.strip().splitlines()]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def localise(cmd: list[str], port: int, shared: Path) -> list[str]:
    out = []
    for word in cmd:
        word = word.replace("SCHEDULER-HOST", "127.0.0.1").replace("8786", str(port))
        word = word.replace("/shared", str(shared))
        out.append(word)
    exe = BIN / out[0]
    return [str(exe) if exe.exists() else out[0], *out[1:]]


def wait_for_port(port: int, seconds: float = 60) -> None:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        with socket.socket() as s:
            if s.connect_ex(("127.0.0.1", port)) == 0:
                return
        time.sleep(0.2)
    pytest.fail(f"the scheduler did not listen on {port} within {seconds} s")


def stop(procs: list[subprocess.Popen]) -> None:
    for p in reversed(procs):
        p.terminate()
    for p in procs:
        try:
            p.wait(10)
        except subprocess.TimeoutExpired:
            p.kill()


def invented_table(path: Path, n: int = 20_000) -> None:
    rng = np.random.default_rng(3)
    pd.DataFrame({"clearance [L/h]": rng.uniform(1, 10, n), "volume [L]": rng.uniform(10, 80, n),
                  "rate [mg/h]": rng.uniform(10, 900, n)}).to_parquet(path, row_group_size=2500)


def test_the_documented_recipe_runs_as_written(tmp_path):
    steps = recipe()
    assert [s[:2] for s in steps] == [["dask", "scheduler"], ["dask", "worker"],
                                      ["pkcalc", "batch"]]
    shared = tmp_path / "shared"
    shared.mkdir()
    invented_table(shared / "scenarios.parquet")
    port = free_port()
    env = {**os.environ, "PATH": f"{BIN}{os.pathsep}{os.environ.get('PATH', '')}"}
    procs = []
    try:
        procs.append(subprocess.Popen(localise(steps[0], port, shared), env=env,
                                      stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
        wait_for_port(port)
        procs.append(subprocess.Popen(localise(steps[1], port, shared), env=env,
                                      stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
        run = subprocess.run([*localise(steps[2], port, shared), "--json"], env=env,
                             capture_output=True, text=True, timeout=300)
    finally:
        stop(procs)
    assert run.returncode == 0, run.stderr
    import json

    doc = json.loads(run.stdout)
    assert doc["engine"] == "dask" and doc["workers"] == 2 and doc["partitioned"]
    assert doc["partitions"] == 1 and doc["rows"] == 20_000   # 8 row groups, one partition
    # the same table as the local engine (an independent run in this process)
    from pkcalc.batch import BatchOptions, run_batch

    run_batch(shared / "scenarios.parquet", tmp_path / "local.parquet", BatchOptions())
    pd.testing.assert_frame_equal(pd.read_parquet(tmp_path / "local.parquet"),
                                  pd.read_parquet(shared / "results.parquet"),
                                  check_exact=True)


def _can_hide_folders() -> bool:
    if os.geteuid() != 0 or shutil.which("unshare") is None:
        return False
    return subprocess.run(["unshare", "-m", "true"], capture_output=True).returncode == 0


@pytest.mark.skipif(not _can_hide_folders(), reason="needs root and unshare(1) to give a "
                                                    "worker its own view of the files")
def test_a_worker_without_the_input_is_refused_before_any_work(tmp_path):
    # the worker runs in its own mount namespace with an empty folder mounted over
    # the input's folder: the situation of a machine that lacks the shared mount
    data = tmp_path / "data"
    data.mkdir()
    invented_table(data / "in.parquet", n=1000)
    port = free_port()
    env = {**os.environ, "PATH": f"{BIN}{os.pathsep}{os.environ.get('PATH', '')}"}
    scheduler = subprocess.Popen([str(BIN / "dask"), "scheduler", "--host", "127.0.0.1",
                                  "--port", str(port)], env=env,
                                 stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    procs = [scheduler]
    try:
        wait_for_port(port)
        worker = (f"mount -t tmpfs none {shlex.quote(str(data))} && exec "
                  f"{shlex.quote(str(BIN / 'dask'))} worker tcp://127.0.0.1:{port} "
                  "--nworkers 1 --nthreads 1")
        procs.append(subprocess.Popen(["unshare", "-m", "sh", "-c", worker], env=env,
                                      stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
        run = subprocess.run([str(BIN / "pkcalc"), "batch", str(data / "in.parquet"),
                              "--out", str(data / "out.parquet"), "--engine", "dask",
                              "--scheduler", f"tcp://127.0.0.1:{port}", "--timeout", "60"],
                             env=env, capture_output=True, text=True, timeout=300)
    finally:
        stop(procs)
    assert run.returncode == 2, run.stderr
    assert re.search(r"1 of 1 Dask workers cannot do the work .*cannot read the input",
                     run.stderr), run.stderr
    assert "Traceback" not in run.stderr
    assert sorted(p.name for p in data.iterdir()) == ["in.parquet"]
