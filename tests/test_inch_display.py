"""With ``--units in`` everything a person reads is in inches, mils and mpy (feet on the
map axes): the page, the console, the figures' axes and scale bars, the diameter as typed.

Conversion factors are exact by definition: 1 in = 25.4 mm, 1 ft = 0.3048 m, 1 mil =
0.0254 mm, 1 lb = 0.45359237 kg (NIST SP 811, 2008, appendix B.8).  The whole compare runs
once per session (``inch_compare_run`` in conftest.py, shared with test_cli.py); the
figure checks call the figure functions on small arrays and read the matplotlib axes.
"""

from __future__ import annotations

import html
import re

import numpy as np
import pytest

from scananalyse.report import figures as F
from scananalyse.report import units as U
from scananalyse.report.figlist import registration_figure, sizing_figure
from scananalyse.rules import get_ruleset

# an SI unit after a number or alone as a word: mm, mm/y, m², m2, kg, and "[m]" or "<n> m"
_SI_TOKEN = re.compile(r"(?<![\w/])(mm/y|mm|m²|m2|kg)(?![\w/²])|\[m\]|\d m\b")
# the diameter typed in inches, shown as typed with feet and inches, the SI value beside it
_DIAMETER_SHOWN = "157.48 in = 13 ft 1.5 in (4000 mm)"


def _page_lines(path) -> list[str]:
    """The text a person reads on the page, one line per element (no CSS, no image data)."""
    s = path.read_text(encoding="utf-8")
    s = re.sub(r"<style.*?</style>", "", s, flags=re.S)
    s = re.sub(r"<img[^>]*>", "", s)
    text = html.unescape(re.sub(r"<[^>]+>", "\n", s))
    return [ln.strip() for ln in text.splitlines() if ln.strip()]


def _allowed_si() -> set:
    """Lines allowed to hold SI: the diameter's SI beside-value, and the rule notes, which
    quote their sources with the sources' own inch or metric values (e.g. "12 in, as the
    metric 300 mm quoted")."""
    notes = {r["note"] for r in get_ruleset("api653").table() if r.get("note")}
    return notes | {_DIAMETER_SHOWN}


@pytest.fixture(scope="module")
def page(inch_compare_run):
    assert inch_compare_run["code"] == 0
    return _page_lines(inch_compare_run["out"] / "report.html")


def test_page_text_has_no_si_units(page):
    allowed = _allowed_si()
    leaks = [ln for ln in page if _SI_TOKEN.search(ln) and ln not in allowed]
    assert leaks == []
    # the page does speak in the display units (guards against an empty page passing)
    for unit in ("in", "mils", "mpy", "ft²"):
        assert unit in page
    assert any(" mils" in ln for ln in page)  # a sentence with a depth in it


def test_diameter_appears_as_typed(page):
    assert _DIAMETER_SHOWN in page


def test_notes_and_zone_notes_are_converted(page):
    notes = [ln for ln in page if ln.startswith("Zone interior") or "critical-zone minimum" in ln]
    assert notes
    assert any(re.search(r"\d+\.\d{3} in", ln) or re.search(r"\d+ mils", ln) for ln in notes)


def test_registration_shift_in_inches(page):
    k = page.index("Shift in x")
    assert page[k + 1] == "in"  # its unit column
    assert abs(float(page[k + 2].replace("−", "-")) - 60.0 / 25.4) < 0.2  # synthetic shift 60 mm, ±5 mm


def test_console_speaks_inches(inch_compare_run):
    text = inch_compare_run["console"]
    assert re.search(r"shift \(−?-?\d+\.\d{3}, −?-?\d+\.\d{3}\) in", text)
    assert "ft² in all" in text and "thickness in" in text
    # the header gives the diameter as the report does, as typed, with its SI value beside it
    assert text.splitlines()[0].endswith(f", diameter {_DIAMETER_SHOWN}")
    bad = [ln for ln in text.replace(_DIAMETER_SHOWN, "").splitlines() if _SI_TOKEN.search(ln)]
    assert bad == []


def _numbers(text: str) -> list[float]:
    return [float(v.replace("−", "-")) for v in re.findall(r"[−-]?\d+\.?\d*", text)]


def test_check_speaks_inches(small_pair_files, capsys):
    from scananalyse.cli import main
    from scananalyse.io import read_scan

    assert main(["check", small_pair_files["new_csv"], "--units", "in"]) == 0
    text = capsys.readouterr().out
    # the first line names the file (its path may hold anything), the second the file's own units
    assert ", file units mm" in text.splitlines()[1]
    body = text.split("\n", 2)[2]
    assert [ln for ln in body.splitlines() if _SI_TOKEN.search(ln)] == []
    s = read_scan(small_pair_files["new_csv"]).summary()
    grid = next(ln for ln in body.splitlines() if ln.strip().startswith("grid"))
    pitch, x0, x1 = _numbers(grid.split("pitch")[0])[-1], *_numbers(grid.split(";")[1])[:2]
    assert pitch == pytest.approx(s["pitch_mm"] / 25.4, abs=6e-4) and "in pitch" in grid
    assert (x0, x1) == pytest.approx([v / 304.8 for v in s["x_range_mm"]], abs=6e-3) and grid.endswith(" ft")
    area = _numbers(body.split("cells =")[1].split("ft²")[0])[0]
    assert area == pytest.approx(s["scanned_area_m2"] / 0.3048 ** 2, abs=0.06)
    t = next(ln for ln in body.splitlines() if ln.strip().startswith("thickness"))
    lo, hi, nominal = _numbers(t)
    assert [lo, hi, nominal] == pytest.approx([s["t_min_mm"] / 25.4, s["t_max_mm"] / 25.4, s["nominal_mm"] / 25.4],
                                              abs=6e-4)
    assert "threshold 39 mils" in body  # 1.00 mm = 39.37 mils


def test_register_speaks_inches(small_pair_files, tmp_path, capsys):
    import json

    from scananalyse.cli import main

    out = tmp_path / "reg"
    assert main(["register", small_pair_files["old_csv"], small_pair_files["new_csv"], "--out", str(out),
                 "--quiet", "--units", "in"]) == 0
    line = capsys.readouterr().out.splitlines()[0]
    reg = json.loads((out / "registration.json").read_text())  # the file keeps mm
    m = re.search(r"shift \((\S+), (\S+)\) in", line)
    assert [float(m[1]), float(m[2])] == pytest.approx([reg["dx_mm"] / 25.4, reg["dy_mm"] / 25.4], abs=6e-4)
    rms = re.search(r"residual RMS (\d+) mils", line)
    assert int(rms[1]) == round(reg["residual_rms_mm"] / 0.0254)
    assert not _SI_TOKEN.search(line)


# ---------------------------------------------------------------------------
# figures: axis labels, ticks and scale bar in ft (or in)
# ---------------------------------------------------------------------------
EXT_4M = (-2000.0, 2000.0, -2000.0, 2000.0)  # a 4 m floor [mm]


def _grid(n=40):
    g = np.full((n, n), 6.35, dtype=np.float32)
    g[10:14, 20:24] = 4.0
    return g


def _scale_text(ax) -> str:
    return next(t.get_text() for t in ax.texts if re.fullmatch(r"[\d.]+ (m|ft|in)", t.get_text()))


def _ticks_in(ax, m_per_unit) -> np.ndarray:
    lo, hi = ax.get_xlim()
    loc = np.array([t for t in ax.get_xticks() if lo <= t <= hi])
    return loc / m_per_unit


@pytest.mark.parametrize("units,unit", [("mm", "m"), ("in", "ft")])
def test_floor_map_axes_and_scale_bar(units, unit):
    fig = F.floor_map(_grid(), extent=EXT_4M, title="t", label="remaining thickness", units=units,
                      diameter_mm=4000.0)
    ax = fig.axes[0]
    assert (ax.get_xlabel(), ax.get_ylabel()) == (f"x [{unit}]", f"y [{unit}]")
    assert _scale_text(ax).endswith(f" {unit}")
    if units == "in":
        ft = _ticks_in(ax, 0.3048)
        np.testing.assert_allclose(ft, np.round(ft), atol=1e-9)  # ticks at whole feet
        assert {lab.get_text() for lab in ax.get_xticklabels()} >= {"0", "2"}
        assert fig.axes[1].get_ylabel() == "remaining thickness [in]"


def test_small_floor_axes_in_inches():
    fig = F.floor_map(_grid(), extent=(-500.0, 500.0, -500.0, 500.0), title="t", label="loss", kind="loss",
                      units="in", diameter_mm=1000.0)
    ax = fig.axes[0]
    assert ax.get_xlabel() == "x [in]" and _scale_text(ax).endswith(" in")
    inch = _ticks_in(ax, 0.0254)
    np.testing.assert_allclose(inch, np.round(inch), atol=1e-9)
    assert fig.axes[1].get_ylabel() == "loss [mils]"


def test_pair_and_status_maps_in_feet():
    g = _grid()
    pair = F.floor_map_pair(g, g, titles=("a", "b"), label="remaining thickness", extent=EXT_4M, units="in",
                            diameter_mm=4000.0)
    assert [a.get_xlabel() for a in pair.axes[:2]] == ["x [ft]", "x [ft]"]
    assert pair.axes[0].get_ylabel() == "y [ft]"
    import pandas as pd

    ind = pd.DataFrame({"id": [1], "x_mm": [100.0], "y_mm": [-200.0], "status": ["new"],
                        "x_min_mm": [80.0], "x_max_mm": [120.0], "y_min_mm": [-220.0], "y_max_mm": [-180.0]})
    st = F.indication_status_map(ind, scanned=np.isfinite(g), extent=EXT_4M, units="in", diameter_mm=4000.0)
    assert st.axes[0].get_xlabel() == "x [ft]" and _scale_text(st.axes[0]).endswith(" ft")


def test_registration_overlay_in_feet():
    m = np.zeros((40, 40), dtype=bool)
    m[5:9, 5:9] = True
    fig = F.registration_overlay(m, m, m, extent=EXT_4M, units="in")
    a, b = fig.axes[:2]
    assert (a.get_xlabel(), a.get_ylabel(), b.get_xlabel(), b.get_ylabel()) == ("x [ft]", "y [ft]", "x [ft]", "")
    assert F.registration_overlay(m, m, m, extent=EXT_4M).axes[0].get_xlabel() == "x [m]"


def test_registration_figure_passes_units(small_pair_files):
    from scananalyse.register import RigidTransform, resample_onto

    pair = small_pair_files["pair"]  # the overlay's axes do not depend on the transform
    fig = registration_figure(pair.new, pair.old, resample_onto(pair.old, pair.new, RigidTransform()), units="in")
    assert fig.axes[0].get_xlabel() == "x [ft]"


def test_sizing_figure_loss_in_mils():
    import pandas as pd

    pairs = pd.DataFrame({"kind": ["prove-up"] * 2, "scanned": [True, True], "t_scan_mm": [5.35, 4.35],
                          "thickness_mm": [5.10, 4.00]})
    ax = sizing_figure(pairs, 6.35, None, units="in").axes[0]
    assert ax.get_xlabel() == "loss sized by the scan [mils]"
    x, y = ax.collections[0].get_offsets().T
    np.testing.assert_allclose(x, [1.0 / 0.0254, 2.0 / 0.0254])  # 1 mm = 39.37 mils


# ---------------------------------------------------------------------------
# the helpers
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("text,shown", [
    ("thinnest 1.40 mm against 2.54 mm", "thinnest 0.055 in against 0.100 in"),
    ("deepest loss expected there up to 2.54 mm", "deepest loss expected there up to 100 mils"),
    ("the 1.0 m² nobody scanned", "the 10.8 ft² nobody scanned"),
    ("a rate of 0.254 mm/y", "a rate of 10.0 mpy"),
    ("blocks of 1000 mm square", "blocks of 39.4 in square"),
    ("= 2 × sqrt(0.150² + 0.150²) = 0.424 mm is not growth", "= 2 × sqrt(5.9² + 5.9²) = 17 mils is not growth"),
    ("eva_block_mm gives the side", "eva_block_mm gives the side"),
])
def test_text_in_units(text, shown):
    assert U.text_in_units(text, "in") == shown
    assert U.text_in_units(text, "mm") == text


def test_feet_inches_and_diameter_text():
    assert U.feet_inches(4000.0) == "13 ft 1.5 in"  # 4000 / 25.4 = 157.48 in = 13 ft 1.48 in
    assert U.feet_inches(3657.6) == "12 ft 0.0 in"  # 144 in exactly
    assert U.diameter_text(8000.0, (8000.0, "mm"), "in") == "26 ft 3.0 in (8000 mm as given)"
    assert U.diameter_text(8000.0, (8000.0, "mm"), "mm") == 8000.0
    assert U.diameter_text(4000.0, (157.48, "in"), "mm") == "157.48 in = 13 ft 1.5 in (4000 mm)"


def test_rule_values_and_map_units():
    # 1 kg/m³ = 0.06242796 lb/ft³ (NIST SP 811 B.8): steel 7850 kg/m³ = 490.06 lb/ft³
    v, u = U.rule_value(7850.0, "kg/m3", "in")
    assert u == "lb/ft³" and v == pytest.approx(7850.0 * 0.06242796, rel=1e-7)
    assert U.rule_value(2.54, "mm", "in") == (pytest.approx(0.1), "in")
    assert U.rule_value(20, "y", "in") == (20, "y")
    assert U.length_axis_unit(8.0, "in") == ("ft", 0.3048)
    assert U.length_axis_unit(1.0, "in") == ("in", 0.0254)
    assert U.length_axis_unit(1.0, "mm") == ("m", 1.0)
    assert U.display_column("dx_mm", "in")[1] == "in"  # a registration shift is a length
    assert U.display_column("residual_rms_mm", "in")[1] == "mils"
