"""Writing files safely: atomic writes, the output-path policy, the unfinished-folder mark,
and the numeric range every value is checked against."""

from __future__ import annotations

import errno
import itertools
import os
from pathlib import Path

import numpy as np
import pytest

from pkcalc import files
from pkcalc.errors import PkcalcInputError
from pkcalc.files import INCOMPLETE_NAME, Output, check_outputs, unfinished, write_atomic
from pkcalc.units import NUMERIC_RANGE, out_of_range


def test_numeric_range_keeps_products_and_quotients_inside_float64():
    # IEEE 754 float64 limits (numpy.finfo): any product or quotient of three values
    # from the accepted range is finite and normal -- the reason for the range
    info = np.finfo(np.float64)
    lo, hi = NUMERIC_RANGE
    for a, b, c in itertools.product((lo, hi), repeat=3):
        for x in (a * b * c, a * b / c, a / (b * c), a / b / c):
            assert np.isfinite(x) and (x == 0 or x >= info.tiny)
    assert hi ** 3 < info.max and lo ** 3 > info.tiny
    assert out_of_range(float("inf")) and out_of_range(float("nan"))
    assert out_of_range(1e-101) and out_of_range(-1e101) and not out_of_range(0.0)


def test_write_atomic_replaces_whole_or_not_at_all(tmp_path, monkeypatch):
    # POSIX rename atomicity (os.replace): a failure before the rename leaves the old
    # file as it was and no temporary file behind
    target = tmp_path / "r.json"
    write_atomic(target, "old")

    def fail(*_args):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(files.os, "replace", fail)
    with pytest.raises(OSError):
        write_atomic(target, "new")
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["r.json"]
    monkeypatch.undo()
    write_atomic(target, "new")
    assert target.read_text() == "new"
    assert oct(target.stat().st_mode & 0o777) == oct(0o666 & ~files.current_umask())


def test_unwritable_place_is_refused_before_any_work(tmp_path, monkeypatch):
    # as root every folder is writable, so the probe's failure is simulated
    real_open = os.open

    def denied(path, flags, *args):
        if "write-probe" in str(path):
            raise PermissionError(errno.EACCES, "Permission denied")
        return real_open(path, flags, *args)

    monkeypatch.setattr(files.os, "open", denied)
    with pytest.raises(PkcalcInputError, match="cannot be written.*Permission denied"):
        check_outputs([Output(tmp_path / "out", "folder", "--out")])


def test_reserved_names_and_duplicates(tmp_path):
    out = Output(tmp_path / "o", "folder", "--out")
    with pytest.raises(PkcalcInputError, match="where pkcalc writes its own"):
        check_outputs([out, Output(tmp_path / "o" / "CAUTION.txt", "file", "--report")])
    with pytest.raises(PkcalcInputError, match="one would replace the other"):
        check_outputs([Output(tmp_path / "a.html", "file", "--report"),
                       Output(tmp_path / "a.html", "file", "--junit")])
    # a report beside the outputs, not among them, is fine
    check_outputs([out, Output(tmp_path / "o" / "report.html", "file", "--report")])


def test_unfinished_marker(tmp_path):
    with unfinished(tmp_path / "o") as folder:
        assert (folder / INCOMPLETE_NAME).exists()
    assert not (tmp_path / "o" / INCOMPLETE_NAME).exists()
    with pytest.raises(RuntimeError), unfinished(tmp_path / "p"):
        raise RuntimeError("killed half-way")
    assert (tmp_path / "p" / INCOMPLETE_NAME).exists()


def test_out_folder_of_a_command_ends_without_the_marker(tmp_path, run_cli):
    from .conftest import SCENARIOS

    r = run_cli("predict", SCENARIOS / "demo.toml", "--out", tmp_path / "o")
    assert r.code == 0
    names = {p.name for p in Path(tmp_path / "o").iterdir()}
    assert "CAUTION.txt" in names and INCOMPLETE_NAME not in names
