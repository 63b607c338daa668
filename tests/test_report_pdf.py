"""report.pdf: the demo report printed by headless Chromium, measured from the PDF itself.

How the fill of a page is measured (no rendering): every text run and every image drawn on
the page is located with pypdf (text by its text matrix, images by the transformation
matrix in force at ``Do``).  The fill is the distance from the top of the text area
(page top less the 12 mm margin) down to the lowest text baseline or image edge, divided by
the height of the text area (down to 25 mm above the paper's edge, where the repeated
caution footer begins; what is drawn below that line is the footer and does not count).
A page holding one short table row or one sentence at its top measures well under 1/3.

Without a browser these tests skip, and fail instead under SCANANALYSE_REQUIRE_BROWSER=1
(CI installs Chromium and sets it).  The no-browser path of write_pdf is tested always.
"""

from __future__ import annotations

import os
import shutil
import stat

import pytest

from scananalyse.report.pdf import find_browser, write_pdf
from scananalyse.runner import run_demo

import pypdf  # noqa: E402  (a test dependency: pyproject [test])

MM = 72 / 25.4
TOP_MM, FOOTER_MM = 12.0, 25.0  # @page top margin; bottom margin + footer band (report.css)
# measured on the demo (Chromium 156, DejaVu fonts): A4 27 pages with the four comparison
# figures and the field-readings section of the demo's hand readings (23 without the
# readings, 19 without the comparison figures either); one page spare
MAX_PAGES = {"A4": 28, "Letter": 30}
MIN_FILL = 1 / 3
FIG_DPI = 130  # runner.write_outputs draws the figures at this resolution
# legend font sizes drawn in report.figures: 10 pt on the two-panel registration figure
# (1300 px wide), 13 pt on the side-by-side scans (1560 px), 7.5 pt on every other figure
LEGEND_PT = {1300: 10.0, 1560: 13.0}
LEGEND_PT_DEFAULT = 7.5


def _browser_or_skip():
    exe = find_browser()
    if exe is None:
        why = "no headless browser: chromium (or chromium-browser) not found on PATH"
        if os.environ.get("SCANANALYSE_REQUIRE_BROWSER") == "1":
            pytest.fail(f"{why}, and SCANANALYSE_REQUIRE_BROWSER=1 requires it (apt-get install chromium)")
        pytest.skip(f"{why} (set SCANANALYSE_REQUIRE_BROWSER=1 to make this a failure)")
    return exe


@pytest.fixture(scope="module")
def demo_pdfs(tmp_path_factory):
    _browser_or_skip()
    out = tmp_path_factory.mktemp("pdf") / "demo"
    res = run_demo(out, quiet=True)
    assert "report.pdf" in res.files, res.notes
    letter = out.parent / "letter.pdf"
    assert write_pdf(out / "report.html", letter, paper="Letter") is None
    return {"A4": out / "report.pdf", "Letter": letter, "out": out}


def _mul(m, n):
    a, b, c, d, e, f = m
    A, B, C, D, E, F = n
    return [a * A + b * C, a * B + b * D, c * A + d * C, c * B + d * D, e * A + f * C + E, e * B + f * D + F]


def _layout(page):
    """(text baselines y, images [(name, x0, x1, y0, y1)]) of one page, in points."""
    ys, images = [], []
    stack = [[1.0, 0.0, 0.0, 1.0, 0.0, 0.0]]

    def before(op, args, cm, tm):
        if op == b"q":
            stack.append(list(stack[-1]))
        elif op == b"Q" and len(stack) > 1:
            stack.pop()
        elif op == b"cm":
            stack[-1] = _mul([float(v) for v in args], stack[-1])
        elif op == b"Do":
            a, b, c, d, e, f = stack[-1]
            xs = [e, a + e, c + e, a + c + e]
            yy = [f, b + f, d + f, b + d + f]
            images.append((str(args[0]), min(xs), max(xs), min(yy), max(yy)))

    def text(t, cm, tm, font, size):
        if t.strip():
            ys.append(_mul(tm, cm)[5])

    page.extract_text(visitor_operand_before=before, visitor_text=text)
    return ys, images


def page_fill(page) -> float:
    h = float(page.mediabox.height)
    ys, images = _layout(page)
    ys = ys + [y for im in images for y in im[3:]]
    lo, top = FOOTER_MM * MM, h - TOP_MM * MM
    body = [y for y in ys if y >= lo - 2]
    return (top - min(body)) / (top - lo) if body else 0.0


@pytest.mark.parametrize("paper", ["A4", "Letter"])
def test_demo_pdf_pages_and_fill(demo_pdfs, paper):
    path = demo_pdfs[paper]
    assert path.read_bytes()[:5] == b"%PDF-"
    reader = pypdf.PdfReader(path)
    n = len(reader.pages)
    w_mm = float(reader.pages[0].mediabox.width) / MM
    assert abs(w_mm - (210.0 if paper == "A4" else 215.9)) < 1.0, w_mm
    assert 8 <= n <= MAX_PAGES[paper], n
    fills = [page_fill(p) for p in reader.pages]
    thin = [(i + 1, round(f, 2)) for i, f in enumerate(fills[:-1]) if f < MIN_FILL]
    assert not thin, f"{paper}: pages under a third full (page, fill): {thin}; all: {[round(f, 2) for f in fills]}"
    assert fills[-1] > 0.0
    # the caution footer is on every page
    for i, p in enumerate(reader.pages):
        assert "Caution" in p.extract_text(), f"page {i + 1} has no caution footer"


@pytest.mark.parametrize("paper", ["A4", "Letter"])
def test_demo_pdf_maps_full_width_and_legends(demo_pdfs, paper):
    """Maps at the full text width (nothing shrinks the page to fit), and every figure
    printed large enough for its legend to be 7 pt or more on paper."""
    reader = pypdf.PdfReader(demo_pdfs[paper])
    text_w = float(reader.pages[0].mediabox.width) - 2 * 12 * MM  # 12 mm side margins
    n_maps = 0
    for i, page in enumerate(reader.pages):
        xobjects = page["/Resources"].get("/XObject", {})
        for name, x0, x1, y0, y1 in _layout(page)[1]:
            obj = xobjects[name].get_object()
            if obj.get("/Subtype") != "/Image":
                continue
            px = int(obj["/Width"])
            scale = (x1 - x0) / (px / FIG_DPI * 72)
            legend = LEGEND_PT.get(px, LEGEND_PT_DEFAULT) * scale
            assert legend >= 7.0, f"page {i + 1}: image {name} ({px} px) legend prints at {legend:.1f} pt"
            if px == 936:  # a floor map (7.2 in at 130 dpi)
                n_maps += 1
                assert x1 - x0 >= 0.97 * text_w, f"page {i + 1}: map {(x1 - x0) / MM:.0f} mm wide"
    assert n_maps >= 7


def test_no_browser_is_a_note_not_an_error(tmp_path, monkeypatch):
    html = tmp_path / "report.html"
    html.write_text("<!DOCTYPE html><html><head></head><body><p>x</p></body></html>", encoding="utf-8")
    monkeypatch.setenv("SCANANALYSE_BROWSER", "none")
    assert find_browser() is None
    note = write_pdf(html, tmp_path / "report.pdf")
    assert isinstance(note, str) and "\n" not in note and note.startswith("report.pdf not written")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report.html"]
    monkeypatch.setenv("SCANANALYSE_BROWSER", shutil.which("false") or "/bin/false")
    note = write_pdf(html, tmp_path / "report.pdf")
    assert note is not None and "exited with code" in note and "\n" not in note
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report.html"]
    with pytest.raises(ValueError):
        write_pdf(html, tmp_path / "report.pdf", paper="A3")


def test_browser_that_hangs_times_out(tmp_path, monkeypatch):
    slow = tmp_path / "slowbrowser"
    slow.write_text("#!/bin/sh\nsleep 30\n")
    slow.chmod(slow.stat().st_mode | stat.S_IXUSR)
    html = tmp_path / "report.html"
    html.write_text("<html><head></head><body>x</body></html>", encoding="utf-8")
    monkeypatch.setenv("SCANANALYSE_BROWSER", str(slow))
    note = write_pdf(html, tmp_path / "report.pdf", timeout=1)
    assert note is not None and "longer than" in note
    assert not (tmp_path / "report.pdf").exists()


def test_demo_without_browser_still_completes(tmp_path, monkeypatch):
    monkeypatch.setenv("SCANANALYSE_BROWSER", "none")
    res = run_demo(tmp_path / "demo", quiet=True)
    assert "report.pdf" not in res.files and "report.html" in res.files
    assert not (tmp_path / "demo" / "report.pdf").exists()
    notes = [n for n in res.notes if n.startswith("report.pdf not written")]
    assert len(notes) == 1 and "\n" not in notes[0]
    assert "note: report.pdf not written" in res.console_summary()
