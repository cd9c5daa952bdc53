"""The HTML report printed to PDF by a real browser engine (headless Chromium).

pkcalc draws no PDF itself: the browser lays the report out with its print styles
(page breaks, the caution in every page's footer) exactly as a reviewer's own
"print to PDF" would.  The browser is the one installed on the machine:
``PKCALC_BROWSER`` (a path), else the first of :data:`BROWSERS` on ``PATH``.  Without
one the run is refused before any work, saying how to get one.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import tempfile
from pathlib import Path

from ..errors import PkcalcInputError

__all__ = ["BROWSERS", "find_browser", "print_pdf"]

#: Chromium-based browsers looked for on PATH, in this order.
BROWSERS = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable", "chrome")
#: Longest wait for the browser to print, s.
PRINT_TIMEOUT = 180.0
#: What a browser needs on a machine without a screen or a network (a fresh profile; no
#: background connections, which a closed network refuses one by one).
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-extensions", "--no-pdf-header-footer")

HOW_TO_GET_ONE = ("install a Chromium-based browser (on Debian or Ubuntu: 'apt install "
                  "chromium'), or set PKCALC_BROWSER to one; the HTML report needs none")


def find_browser() -> str | None:
    """The browser that prints the PDF, or None."""
    given = os.environ.get("PKCALC_BROWSER")
    if given:
        return given if Path(given).is_file() and os.access(given, os.X_OK) else None
    for name in BROWSERS:
        found = shutil.which(name)
        if found:
            return found
    return None


def need_browser() -> str:
    """The browser, or an input error (exit 2) saying how to get one."""
    browser = find_browser()
    if browser is None:
        where = os.environ.get("PKCALC_BROWSER")
        what = (f"PKCALC_BROWSER '{where}' is not an executable file" if where else
                "no Chromium-based browser found on PATH (" + ", ".join(BROWSERS) + ")")
        raise PkcalcInputError(f"cannot print the PDF: {what}", field="--pdf",
                               expected=HOW_TO_GET_ONE)
    return browser


def print_pdf(html: str | Path, pdf: str | Path, *, browser: str | None = None,
              timeout: float = PRINT_TIMEOUT) -> Path:
    """Print ``html`` to ``pdf`` (written atomically) with the headless browser."""
    from ..files import write_atomic

    browser = browser or need_browser()
    html, pdf = Path(html).resolve(), Path(pdf)
    with tempfile.TemporaryDirectory(prefix="pkcalc-print-") as tmp:
        out = Path(tmp) / "report.pdf"
        cmd = [browser, *FLAGS, f"--user-data-dir={Path(tmp) / 'profile'}",
               f"--print-to-pdf={out}", html.as_uri()]
        try:
            done = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout,
                                  check=False)
        except subprocess.TimeoutExpired:
            raise PkcalcInputError(f"the browser did not print within {timeout:g} s",
                                   file=str(pdf), field="--pdf") from None
        if not out.is_file() or out.stat().st_size == 0:
            tail = (done.stderr or "").strip().splitlines()[-3:]
            raise PkcalcInputError("the browser printed no PDF" + (
                f" ({' / '.join(tail)})" if tail else ""), file=str(pdf), field="--pdf")
        return write_atomic(pdf, out.read_bytes())
