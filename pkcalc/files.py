"""Writing files safely: atomic writes, temporary files that a later run can clean,
the output-path policy every command follows, and the mark of an unfinished folder.

- Every file is written to a temporary file in the same folder, then renamed over
  its destination (``os.replace``, atomic on POSIX).  Temporary files are named
  ``.<name>.pkcalc-<pid>-<random>.tmp``; a run cleans them on errors, Ctrl-C and
  SIGTERM, and the next run to the same path removes those left by a process that
  no longer exists (a run killed with SIGKILL).
- Output paths are checked before any work (:func:`check_outputs`): the right
  kind (file or folder), writable (probed by creating a file), not an input, not
  equal to each other, and not a name pkcalc itself writes into an output folder.
- A folder written by ``--out`` holds ``INCOMPLETE.txt`` while files are being
  written (:func:`unfinished`); a killed run leaves it, a finished run removes it.

Only the standard library and :mod:`pkcalc.errors` are used here.
"""

from __future__ import annotations

import contextlib
import fnmatch
import os
import re
import secrets
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

from .errors import PkcalcInputError, Problem

__all__ = [
    "INCOMPLETE_NAME",
    "Output",
    "check_outputs",
    "clean_stale",
    "resolved",
    "temp_path",
    "unfinished",
    "write_atomic",
]

#: The file that marks an output folder whose writing has not finished.
INCOMPLETE_NAME = "INCOMPLETE.txt"
#: Names pkcalc writes directly into an ``--out`` folder (besides the patterns below).
RESERVED_NAMES = frozenset({"CAUTION.txt", INCOMPLETE_NAME})
#: Suffixes of the files pkcalc writes into an ``--out`` folder.
RESERVED_SUFFIXES = frozenset({".csv", ".json", ".png", ".txt"})

_TMP = re.compile(r"^\.(?P<name>.+)\.pkcalc-(?P<pid>\d+)-[0-9a-f]+\.tmp$")


def current_umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def temp_path(path: str | Path) -> Path:
    """A fresh temporary path beside ``path`` that names this process."""
    path = Path(path)
    return path.parent / f".{path.name}.pkcalc-{os.getpid()}-{secrets.token_hex(4)}.tmp"


def _alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def clean_stale(path: str | Path) -> list[Path]:
    """Remove temporary files for ``path`` left by processes that no longer run.

    A temporary file of a run still going (the same path written concurrently)
    is kept.  Returns the files removed.
    """
    path = Path(path)
    removed = []
    try:
        entries = list(path.parent.iterdir())
    except OSError:
        return removed
    for entry in entries:
        m = _TMP.match(entry.name)
        if m and m.group("name") == path.name and not _alive(int(m.group("pid"))):
            with contextlib.suppress(OSError):
                if entry.is_dir() and not entry.is_symlink():
                    import shutil

                    shutil.rmtree(entry)  # the part files of a killed partitioned run
                else:
                    entry.unlink()
                removed.append(entry)
    return removed


def write_atomic(path: str | Path, data: str | bytes) -> Path:
    """Write a file atomically: a temporary file in the same folder, then rename.

    The temporary file is removed on any error or interruption; stale ones of
    killed runs to the same path are removed first.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    clean_stale(path)
    tmp = temp_path(path)
    mode = "wb" if isinstance(data, bytes) else "w"
    try:
        with open(tmp, mode, **({} if mode == "wb" else {"encoding": "utf-8"})) as fh:
            fh.write(data)
        os.chmod(tmp, 0o666 & ~current_umask())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


@contextlib.contextmanager
def unfinished(folder: str | Path) -> Iterator[Path]:
    """Mark ``folder`` as being written: ``INCOMPLETE.txt`` until the block ends well."""
    folder = Path(folder)
    marker = folder / INCOMPLETE_NAME
    write_atomic(marker, "pkcalc was writing this folder and did not finish: files may be "
                         "missing, or left from an earlier run. Run the command again.\n")
    yield folder
    marker.unlink(missing_ok=True)


# --------------------------------------------------------------------------- the policy
@dataclass(frozen=True)
class Output:
    """One output path of a command: ``kind`` is ``file`` or ``folder``; ``option`` the
    command-line option that named it (for messages)."""

    path: Path
    kind: str
    option: str
    #: for folders: whether pkcalc writes its own files (CAUTION.txt, csv, json, png) there
    owns_names: bool = True
    #: for folders: patterns of the files the command writes there
    writes: tuple[str, ...] = ()


def _nearest_existing(path: Path) -> Path:
    p = path
    while not p.exists():
        if p.parent == p:
            break
        p = p.parent
    return p


def _probe_writable(folder: Path) -> str | None:
    """None when a file can be created in ``folder``; else the reason in words."""
    probe = temp_path(folder / "write-probe")
    try:
        fd = os.open(probe, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o600)
        os.close(fd)
        probe.unlink()
    except OSError as exc:
        return exc.strerror or exc.__class__.__name__
    return None


def _problem(out: Output, message: str, expected: str) -> Problem:
    return Problem(message, file=str(out.path), field=out.option, expected=expected)


def _check_one(out: Output) -> list[Problem]:
    p = out.path
    if out.kind == "file":
        if p.is_dir():
            return [_problem(out, "is a folder, not a file", "a file name")]
        if str(p).endswith(os.sep) or p.name in ("", ".", ".."):
            return [_problem(out, "names a folder, not a file", "a file name")]
    elif p.exists() and not p.is_dir():
        return [_problem(out, "exists and is a file, not a folder",
                         "a folder (new or existing)")]
    base = _nearest_existing(p if out.kind == "folder" else p.parent)
    if not base.is_dir():
        return [_problem(out, f"cannot be created: '{base}' is a file, not a folder",
                         "a path whose folders are folders")]
    reason = _probe_writable(base)
    if reason:
        return [_problem(out, f"cannot be written: '{base}': {reason}",
                         "a folder you can write to")]
    return []


def resolved(path) -> Path:
    """The absolute path with links followed -- or as written where links loop (the
    loader then reports the loop)."""
    try:
        return Path(path).resolve()
    except (RuntimeError, OSError):
        return Path(os.path.abspath(path))


def check_outputs(outputs: Sequence[Output], inputs: Sequence[str | Path] = ()) -> None:
    """Check every output path before any work; raise one problem per clash.

    Raises
    ------
    PkcalcInputError
        Wrong kind, not writable, an input, two outputs on one path, or a file
        output where an output folder receives pkcalc's own files of that name.
    """
    problems: list[Problem] = []
    ins = {resolved(p) for p in inputs if p}
    for out in outputs:
        problems += _check_one(out)
        if out.kind == "file" and resolved(out.path) in ins:
            problems.append(_problem(out, "is an input file: refusing to overwrite it",
                                     "an output path that is not one of the inputs"))
        if out.kind == "folder" and resolved(out.path) in ins:
            problems.append(_problem(out, "is an input folder: refusing to write into it",
                                     "an output folder that is not one of the inputs"))
        if out.kind == "file" and out.path.name in RESERVED_NAMES:
            problems.append(_problem(out, f"'{out.path.name}' is a name pkcalc writes itself "
                                          "(the caution beside its outputs, the unfinished "
                                          "marker)", "another file name"))
        if out.kind == "folder":
            folder = resolved(out.path)
            for p in sorted(ins):
                rel = p.relative_to(folder).as_posix() if p.is_relative_to(folder) else None
                if rel is not None and any(fnmatch.fnmatchcase(rel, w) for w in
                                           (*out.writes, *RESERVED_NAMES)):
                    problems.append(_problem(out, f"holds the input '{rel}', a name this "
                                                  "command writes there: refusing to "
                                                  "overwrite an input",
                                             "another output folder"))
    for i, a in enumerate(outputs):
        for b in outputs[i + 1:]:
            ra, rb = resolved(a.path), resolved(b.path)
            if ra == rb:
                problems.append(_problem(b, f"is also given as {a.option}: one would replace "
                                            "the other", "a different path for each output"))
            for f, d in ((a, b), (b, a)):
                if f.kind == "file" and d.kind == "folder" and d.owns_names \
                        and resolved(f.path).parent == resolved(d.path) \
                        and (f.path.name in RESERVED_NAMES
                             or f.path.suffix.lower() in RESERVED_SUFFIXES):
                    problems.append(_problem(
                        f, f"lies in the {d.option} folder, where pkcalc writes its own "
                           f"'{f.path.suffix or f.path.name}' files",
                        f"a path outside {d.path}, or another file type"))
    if problems:
        raise PkcalcInputError(problems)
