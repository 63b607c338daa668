"""``report.pdf``: the report page printed by a headless Chromium, when one is installed.

The PDF is the same ``report.html`` printed with the page's own print style sheet
(``@media print`` and ``@page`` in ``templates/report.css``), so paper and screen show
the same content.  Chromium is a system program, not a Python dependency: where none is
found (or it fails, or takes too long) :func:`write_pdf` writes nothing and returns a
one-line note saying why; it never raises for that.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import tempfile
from pathlib import Path

__all__ = ["write_pdf", "find_browser", "PAPERS", "BROWSERS"]

#: Paper names accepted by :func:`write_pdf` and the CSS ``@page size`` each one sets.
PAPERS = {"A4": "A4", "Letter": "letter"}
#: Executables tried in turn on PATH.
BROWSERS = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")


def find_browser() -> str | None:
    """Path of a headless-capable Chromium on PATH, or None.

    ``SCANANALYSE_BROWSER`` names one explicitly; set it to an empty string (or ``none``)
    to skip the PDF."""
    env = os.environ.get("SCANANALYSE_BROWSER")
    if env is not None:
        if env.strip().lower() in ("", "none", "0", "off"):
            return None
        return shutil.which(env) or (env if Path(env).is_file() else None)
    for name in BROWSERS:
        exe = shutil.which(name)
        if exe:
            return exe
    return None


def write_pdf(html_path, pdf_path, *, paper: str = "A4", timeout: float = 180.0) -> str | None:
    """Print ``html_path`` to ``pdf_path`` on ``paper`` ("A4" or "Letter").

    Returns None when the PDF was written (temporary file, then ``os.replace``), else a
    one-line note saying why not (no browser, the browser failed or timed out); the
    caller reports the note and goes on.
    """
    if paper not in PAPERS:
        raise ValueError(f"paper must be one of {', '.join(PAPERS)}, not {paper!r}")
    html_path, pdf_path = Path(html_path), Path(pdf_path)
    exe = find_browser()
    if exe is None:
        env = os.environ.get("SCANANALYSE_BROWSER")
        if env is not None:
            return (f"report.pdf not written: SCANANALYSE_BROWSER={env!r} names no browser to print "
                    "with (unset it to look for chromium, or print report.html from a browser)")
        return ("report.pdf not written: no Chromium found (install chromium, or print "
                "report.html from a browser)")
    with tempfile.TemporaryDirectory(prefix="scananalyse-pdf-") as work:
        work = Path(work)
        # the same page, with the paper size put last so it wins over the sheet's A4
        text = html_path.read_text(encoding="utf-8")
        size = f"<style>@page {{ size: {PAPERS[paper]}; }}</style>"
        text = text.replace("</head>", size + "</head>", 1) if "</head>" in text else size + text
        page = work / "page.html"
        page.write_text(text, encoding="utf-8")
        tmp_pdf = pdf_path.with_name(f".{pdf_path.name}.{os.getpid()}.tmp")
        cmd = [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
               "--disable-background-networking", "--disable-component-update", "--disable-sync",
               "--disable-extensions", f"--user-data-dir={work / 'profile'}", "--no-pdf-header-footer",
               f"--print-to-pdf={tmp_pdf}", page.as_uri()]
        try:
            proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                    stderr=subprocess.PIPE, start_new_session=True)
        except OSError as e:
            return f"report.pdf not written: {Path(exe).name} could not be started ({e.strerror or e})"
        try:
            _, err = proc.communicate(timeout=timeout)
        except subprocess.TimeoutExpired:
            _kill_group(proc)
            tmp_pdf.unlink(missing_ok=True)
            return f"report.pdf not written: {Path(exe).name} took longer than {timeout:.0f} s"
        finally:
            _kill_group(proc)  # helpers Chromium may leave behind in its own session
        ok = tmp_pdf.is_file() and tmp_pdf.stat().st_size > 0 and tmp_pdf.read_bytes()[:5] == b"%PDF-"
        if not ok:
            tmp_pdf.unlink(missing_ok=True)
            last = (err or b"").decode(errors="replace").strip().splitlines()
            why = f": {last[-1][:160]}" if last else ""
            return f"report.pdf not written: {Path(exe).name} exited with code {proc.returncode}{why}"
        os.replace(tmp_pdf, pdf_path)
    return None


def _kill_group(proc: subprocess.Popen) -> None:
    """End the browser's process group (it was started in a session of its own)."""
    try:
        if hasattr(os, "killpg"):
            os.killpg(proc.pid, signal.SIGKILL)
        elif proc.poll() is None:
            proc.kill()
    except (ProcessLookupError, PermissionError):
        pass
    try:
        proc.communicate(timeout=10)  # reaps it and closes the stderr pipe
    except (subprocess.TimeoutExpired, ValueError, OSError):
        pass
