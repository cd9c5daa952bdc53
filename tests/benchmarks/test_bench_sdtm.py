"""Benchmark of the SDTM import (printed figures; not part of the default run).

Run: python -m pytest -m bench -s tests/benchmarks/test_bench_sdtm.py

The invented sponsor-style package of tests/fixtures/sponsor_sdtm.py scaled to 4,000
subjects and 200,000 PC rows (plus EX, VS, DM, LB), written as CSV, SAS transport
and Dataset-JSON.  Each import runs in a fresh process (median of three wall times;
peak RSS of the process, ``VmHWM``, which a new program starts afresh -- ``ru_maxrss``
would carry the parent's), beside the bare read of the same files in the same run:
pandas' CSV reader, pyreadstat, ``json`` + DataFrame -- nothing mapped, checked or
converted.  Targets: under 5 s and under 500 MB.
"""

from __future__ import annotations

import statistics
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from tests.fixtures.sponsor_sdtm import build, write

pytestmark = pytest.mark.bench

IMPORT = """
import sys, time
import pandas, numpy, pyarrow, pyreadstat
from pkcalc.schema.sdtm import load_sdtm
t0 = time.perf_counter()
study = load_sdtm(sys.argv[1], analyte="ORVX")
wall = time.perf_counter() - t0
hwm = [ln for ln in open("/proc/self/status") if ln.startswith("VmHWM")][0].split()[1]
print(wall, int(hwm) / 1024, len(study.subjects))
"""

BARE = """
import json, sys, time
from pathlib import Path
import pandas as pd, numpy, pyarrow, pyreadstat
t0 = time.perf_counter()
for p in sorted(Path(sys.argv[1]).iterdir()):
    # the invented DM holds one Latin-1 byte: the bare readers are told so
    latin = p.stem == "dm"
    if p.suffix == ".csv":
        pd.read_csv(p, dtype=str, keep_default_na=False,
                    encoding="latin-1" if latin else "utf-8")
    elif p.suffix == ".xpt":
        pyreadstat.read_xport(str(p), encoding="latin1" if latin else None)
    else:
        d = json.loads(p.read_text())
        pd.DataFrame(d["rows"], columns=[c["name"] for c in d["columns"]])
wall = time.perf_counter() - t0
hwm = [ln for ln in open("/proc/self/status") if ln.startswith("VmHWM")][0].split()[1]
print(wall, int(hwm) / 1024, 0)
"""


def run(code: str, folder: Path) -> tuple[float, float, int]:
    out = subprocess.run([sys.executable, "-c", code, str(folder)], capture_output=True,
                         text=True, check=True, cwd=Path(__file__).resolve().parents[2])
    wall, mb, n = out.stdout.split()
    return float(wall), float(mb), int(n)


@pytest.fixture(scope="module")
def folders(tmp_path_factory):
    day5 = tuple(np.round(np.linspace(0.25, 48.0, 33), 3))
    package = build(n_active=4000, n_placebo=0, day5_hours=day5)
    assert len(package.frames["pc"]) == 200_000
    base = tmp_path_factory.mktemp("sdtm-bench")
    return {fmt: write(package, base / fmt, fmt) for fmt in ("csv", "xpt", "json")}


@pytest.mark.parametrize("fmt", ["csv", "xpt", "json"])
def test_import_speed_and_memory(folders, fmt):
    runs = [run(IMPORT, folders[fmt]) for _ in range(3)]
    bare = [run(BARE, folders[fmt]) for _ in range(3)]
    wall = statistics.median(r[0] for r in runs)
    mb = max(r[1] for r in runs)
    bare_wall = statistics.median(r[0] for r in bare)
    bare_mb = max(r[1] for r in bare)
    assert runs[0][2] == 4000
    print(f"\nSDTM import, {fmt}: 200,000 PC rows, 4,000 subjects: {wall:.2f} s "
          f"(runs {', '.join(f'{r[0]:.2f}' for r in runs)}), peak {mb:.0f} MB; "
          f"bare read of the same files {bare_wall:.2f} s, {bare_mb:.0f} MB; "
          f"ratio {wall / bare_wall:.2f}x time, {mb / bare_mb:.2f}x memory; "
          f"targets < 5 s: {'met' if wall < 5 else 'NOT met'}, < 500 MB: "
          f"{'met' if mb < 500 else 'NOT met'}")
    assert mb < 500
