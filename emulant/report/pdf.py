"""``emulant pdf REPORT.html``: the report printed to PDF by headless Chromium.

The page's print stylesheet does the layout (A4, a page break before each section, tables and
figures kept whole, page numbers in the bottom margin). The folded parts (the full estimates
table, the protocol as parsed, the code lists) are opened in the printed copy. Nothing is written
when Chromium is absent or fails: the PDF appears under its name only when complete.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import tempfile
from pathlib import Path

from emulant.errors import EmulantError

BROWSERS = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")


class PdfError(EmulantError):
    """The PDF could not be written (no Chromium, or it failed); the message says what to do."""


def find_chromium() -> str | None:
    """The headless browser to print with: ``$EMULANT_CHROMIUM``, else the first on ``PATH``."""
    env = os.environ.get("EMULANT_CHROMIUM")
    if env:
        return env if (Path(env).is_file() and os.access(env, os.X_OK)) else shutil.which(env)
    for name in BROWSERS:
        found = shutil.which(name)
        if found:
            return found
    return None


def opened(html: str) -> str:
    """The page with every folded part open, for printing."""
    return html.replace('<details class="fold"', '<details class="fold" open')


def html_to_pdf(html_path: str | Path, pdf_path: str | Path | None = None,
                browser: str | None = None, timeout: float = 300) -> Path:
    """Print ``html_path`` to ``pdf_path`` (default: beside it, ``.pdf``); returns the PDF path.

    Raises
    ------
    PdfError
        When the HTML file does not exist, no Chromium is found, or Chromium fails.
    """
    src = Path(html_path)
    if not src.is_file():
        raise PdfError(f"{src}: no such report file")
    out = Path(pdf_path) if pdf_path else src.with_suffix(".pdf")
    exe = browser or find_chromium()
    if not exe:
        raise PdfError("emulant pdf needs headless Chromium, which was not found (looked for "
                       f"{', '.join(BROWSERS)} on PATH and $EMULANT_CHROMIUM). Install the "
                       "chromium package of your system, or open the HTML report in a browser "
                       "and print it to PDF from there.")
    with tempfile.TemporaryDirectory(prefix="emulant-pdf-") as tmp:
        t = Path(tmp)
        page = t / "report.html"
        page.write_text(opened(src.read_text(encoding="utf-8")), encoding="utf-8")
        pdf = t / "report.pdf"
        cmd = [exe, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
               "--disable-background-networking", "--disable-component-update", "--disable-sync",
               f"--user-data-dir={t / 'profile'}", "--no-pdf-header-footer",
               f"--print-to-pdf={pdf}", page.as_uri()]
        try:
            res = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)
        except (OSError, subprocess.TimeoutExpired) as exc:
            raise PdfError(f"{exe} could not print {src}: {exc}") from None
        if res.returncode != 0 or not pdf.is_file() or pdf.stat().st_size == 0:
            tail = " ".join((res.stderr or "").strip().splitlines()[-3:])
            raise PdfError(f"{exe} could not print {src} (exit {res.returncode}): {tail}")
        out.parent.mkdir(parents=True, exist_ok=True)
        part = out.with_name(out.name + ".part")
        shutil.copyfile(pdf, part)
        os.replace(part, out)
    return out
