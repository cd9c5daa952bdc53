"""The invented example and demo files shipped with pkcalc (``scenarios/``).

One function finds them, through :mod:`importlib.resources`, so the demo of an
installed pkcalc reads the files installed with it, and a checkout's demo the
checkout's own files.
"""

from __future__ import annotations

from importlib.resources import files
from pathlib import Path

__all__ = ["example_file", "example_names"]


def example_file(name: str) -> Path:
    """Path of a shipped example, e.g. ``example_file("demo-study.toml")``.

    Raises
    ------
    FileNotFoundError
        When no example has that name (the message lists the names).
    """
    if not isinstance(name, str):
        raise FileNotFoundError(f"no example named {name!r}; examples: "
                                f"{', '.join(example_names())}")
    path = Path(str(files("pkcalc.scenarios") / name))
    if not path.is_file():
        raise FileNotFoundError(f"no example named {name!r}; examples: "
                                f"{', '.join(example_names())}")
    return path


def example_names() -> list[str]:
    """Names of the shipped example files."""
    return sorted(p.name for p in files("pkcalc.scenarios").iterdir()
                  if p.name.endswith((".toml", ".csv")))
