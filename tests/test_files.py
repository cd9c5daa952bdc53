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


def test_system_refusals_end_with_one_message_and_exit_2(tmp_path, run_cli, monkeypatch):
    # W9: a link loop, a name longer than the system allows, a full disk
    from .conftest import SCENARIOS

    scenario = SCENARIOS / "demo.toml"
    loop = tmp_path / "loop"
    os.symlink(loop, loop)
    r = run_cli("predict", loop)
    assert r.code == 2 and "Traceback" not in r.err and "loop" in r.err
    r = run_cli("predict", scenario, "--report", tmp_path / ("x" * 300 + ".html"))
    assert r.code == 2 and "Traceback" not in r.err and "too long" in r.err.lower()
    real = os.replace

    def full(src, dst):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(os, "replace", full)
    r = run_cli("predict", scenario, "--report", tmp_path / "r.html")
    monkeypatch.setattr(os, "replace", real)
    assert r.code == 2 and "Traceback" not in r.err and "space" in r.err.lower()
    assert not list(tmp_path.glob(".r.html.*")) and not (tmp_path / "r.html").exists()


def test_a_folder_reused_holds_one_runs_files(tmp_path, run_cli):
    # W7: the second run into a folder removes what the first wrote and it does not
    # write again (here the first run's scenario folders), never other files
    from .conftest import SCENARIOS

    out = tmp_path / "o"
    out.mkdir()
    (out / "mine.txt").write_text("keep me")
    assert run_cli("predict", SCENARIOS / "demo.toml", "--out", out).code == 0
    first = {p.name for p in out.iterdir()}
    listed = (out / "CAUTION.txt").read_text()
    assert "summary.csv" in listed and "mine.txt" not in listed
    assert run_cli("predict", SCENARIOS / "infusion-example.toml", "--out", out).code == 0
    second = {p.name for p in out.iterdir()}
    assert len(first - second) >= 3          # the demo's scenario folders are gone
    assert "mine.txt" in second and (out / "mine.txt").read_text() == "keep me"
    assert second == {"CAUTION.txt", "predict.json", "summary.csv", "mine.txt",
                      *(p.name for p in out.iterdir() if p.is_dir())}
    assert len([p for p in out.iterdir() if p.is_dir()]) == 1


def test_the_files_an_earlier_run_listed_never_reach_outside_the_folder(tmp_path):
    from pkcalc.report import CAUTION, previous_files
    from pkcalc.report.base import FILES_HEADING

    out, elsewhere = tmp_path / "o", tmp_path / "elsewhere"
    out.mkdir()
    elsewhere.mkdir()
    (out / "link").symlink_to(elsewhere)
    (out / "CAUTION.txt").write_text(f"{CAUTION}\n\n{FILES_HEADING}\n  a.csv\n  sub/b.png\n"
                                      f"  ../x.csv\n  /etc/passwd\n  link/c.csv\n")
    assert previous_files(out) == [out / "a.csv", out / "sub" / "b.png"]


def test_file_names_from_long_names_end_on_a_whole_word():
    from pkcalc.runner import SLUG_LENGTH, slug, unique_slugs

    name = "orvimycin: levels around the second dose, from the dose history (AUC24 target)"
    s = slug(name)
    assert len(s) <= SLUG_LENGTH and s.endswith("from-the-dose") and "--" not in s
    assert slug("x" * 80) == "x" * SLUG_LENGTH          # one long word: cut where it must
    assert slug("***") == "item"
    assert unique_slugs(["a b", "a-b"]) == ["a-b", "a-b-2"]
