"""Benchmarks for the core model and `pkcalc predict` (not part of the default run).

Run: python -m pytest -m bench -s tests/benchmarks/test_bench_model.py

Each benchmark prints a ratio against a baseline measured in the same run: the
machine is shared and noisy, so absolute times mean little.
"""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from pkcalc import model

pytestmark = pytest.mark.bench

REPO = Path(__file__).resolve().parents[2]


def best_of(fn, repeat: int = 5) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def test_bench_concentration_vs_bare_numpy():
    """1,000 scenarios x 1,000 times x 5 events: pkcalc vs a bare numpy expression."""
    rng = np.random.default_rng(0)
    n_s, n_t, n_e = 1000, 1000, 5
    cl = rng.uniform(1, 10, n_s)
    v = rng.uniform(10, 100, n_s)
    start = np.sort(rng.uniform(0, 48, (n_s, n_e)), axis=1)
    duration = rng.uniform(0.5, 24, (n_s, n_e))
    amount = rng.uniform(50, 500, (n_s, n_e))
    t = np.broadcast_to(np.linspace(0, 96, n_t), (n_s, n_t))

    def ours():
        return model.concentration(t, start, amount, duration, cl, v)

    def bare():
        # the textbook piecewise infusion formula, written directly
        k = (cl / v)[:, None, None]
        css = (amount / duration / cl[:, None])[:, None, :]
        dt = t[:, :, None] - start[:, None, :]
        d = duration[:, None, :]
        during = css * (1 - np.exp(-k * dt))
        after = css * (1 - np.exp(-k * d)) * np.exp(-k * (dt - d))
        return np.where(dt < 0, 0.0, np.where(dt <= d, during, after)).sum(axis=-1)

    with np.errstate(over="ignore", invalid="ignore"):
        np.testing.assert_allclose(ours(), bare(), rtol=1e-9, atol=1e-12)
        t_bare = best_of(bare)
    t_ours = best_of(ours)
    ratio = t_ours / t_bare
    print(f"\n[bench] concentration 1000x1000x5: pkcalc {t_ours * 1e3:.1f} ms, "
          f"bare numpy {t_bare * 1e3:.1f} ms, ratio {ratio:.2f} (target <= 3)")
    assert ratio <= 3.0


def test_bench_predict_demo_wall_time():
    """`pkcalc predict` on the demo file, start to finish, in a fresh process."""
    exe = Path(sys.executable).with_name("pkcalc")
    cmd = [str(exe), "predict", str(REPO / "scenarios" / "demo.toml")]
    subprocess.run(cmd, capture_output=True, check=True)  # warm the file cache
    walls = []
    for _ in range(3):
        t0 = time.perf_counter()
        subprocess.run(cmd, capture_output=True, check=True)
        walls.append(time.perf_counter() - t0)
    baseline = best_of(lambda: subprocess.run([sys.executable, "-c", "pass"], check=True), 3)
    print(f"\n[bench] pkcalc predict demo: best {min(walls):.2f} s wall "
          f"(bare Python start-up {baseline:.2f} s; target < 1.5 s)")
    assert min(walls) < 1.5
