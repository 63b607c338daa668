"""The figures comparing two inspections: growth map with its noise band, indications by
status, the two scans side by side on the newer grid, the repair record with its dates.

Checked on the arrays the figures draw (the image artists' data, the legend's counts),
against quantities computed here from the analysis independently of the figure code.
"""

from __future__ import annotations

import dataclasses
import re

import numpy as np
import pytest
from matplotlib.patches import Rectangle

from scananalyse.job import Job
from scananalyse.pipeline import analyse
from scananalyse.rates import growth_threshold
from scananalyse.report import figures as F
from scananalyse.report.figlist import figure_specs
from scananalyse.synth import make_pair, write_repair_record

NEW_SLUGS = {"growth": "maps", "scans_side_by_side": "maps", "repair_record": "maps",
             "indication_status": "maps"}


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    pair = make_pair(diameter_mm=4000.0, pitch_new=20.0, pitch_old=25.0, seed=11, rotation_deg=0.8,
                     shift_mm=(40.0, 20.0))
    rec = tmp_path_factory.mktemp("rec") / "repairs.csv"
    write_repair_record(pair.truth, rec)
    an = analyse(pair.new, pair.old, job=Job(diameter=4000.0, repairs=str(rec)))
    single = analyse(pair.new, job=Job(diameter=4000.0, repairs=str(rec)))
    return pair, an, single


def _specs(an, units="mm"):
    return {slug: (sec, cap, build) for sec, slug, cap, build in figure_specs(an, units)}


def test_comparison_figures_for_two_inspections_only(runs):
    _pair, an, single = runs
    assert len(an.repairs) == 2  # the repair record reaches the analysis
    specs = _specs(an)
    for slug, sec in NEW_SLUGS.items():
        assert slug in specs and specs[slug][0] == sec
    order = [s for _sec, s, _c, _b in figure_specs(an, "mm")]
    # after the short-term rate maps, before the co-located life
    assert order.index("rate_short_under") < order.index("growth") < order.index("scans_side_by_side") \
        < order.index("repair_record") < order.index("life_local")
    one = _specs(single)
    assert not set(NEW_SLUGS) & set(one)
    # without repair records there is no repair-record figure, the others stay
    none = _specs(dataclasses.replace(an, repairs=[]))
    assert "repair_record" not in none and {"growth", "scans_side_by_side", "indication_status"} <= set(none)


@pytest.mark.parametrize("units,scale", [("mm", 1.0), ("in", 1.0 / 0.0254)])
def test_growth_map_plots_old_on_new_minus_new_with_noise_band(runs, units, scale):
    _pair, an, _single = runs
    _sec, cap, build = _specs(an, units)["growth"]
    fig = build()
    im = fig.axes[0].images[0]
    shown = np.ma.asarray(im.get_array())
    old_t = np.asarray(an.old_on_new.thickness, dtype=np.float64)
    new_t = np.asarray(an.new.thickness, dtype=np.float64)
    both = np.isfinite(old_t) & np.isfinite(new_t)
    assert both.any() and (~both).any()
    assert shown.shape == old_t.shape  # full resolution on this grid
    mask = np.ma.getmaskarray(shown)
    np.testing.assert_array_equal(mask, ~both)  # unscanned stays unscanned, not 0
    np.testing.assert_allclose(shown.data[both], (old_t - new_t)[both] * scale, rtol=1e-5, atol=1e-4 * scale)
    # metal lost and thicker cells both present, the scale centred at 0
    assert shown.max() > 0 > shown.min()
    lo, hi = im.get_clim()
    assert lo == pytest.approx(-hi) and hi >= shown.max() - 1e-6
    assert im.get_cmap().name.startswith("RdBu")
    # the noise band: k * sqrt(so^2 + sn^2), ticked on the colour bar and named in the legend
    g = growth_threshold(an.rates.sigma_old, an.rates.sigma_new, k=an.rates.k_sigma)
    assert g > 0
    cbar_ax = fig.axes[1]
    ticks = cbar_ax.get_yticks()
    assert np.any(np.isclose(ticks, g * scale)) and np.any(np.isclose(ticks, -g * scale))
    texts = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    unit = "mm" if units == "mm" else "mils"
    nd = 2 if units == "mm" else 0
    band = f"±{g * scale:.{nd}f} {unit}"
    assert any(t.startswith("noise band " + band) for t in texts)
    assert band in cap


def test_growth_kind_default_range_shows_the_band():
    # small changes only: the range is widened to twice the band so the band is visible
    v = np.array([[0.1, -0.05], [np.nan, 0.2]])
    fig = F.floor_map(v, extent=(0, 20, 0, 20), title="g", label="growth", kind="growth", noise_band=0.3)
    im = fig.axes[0].images[0]
    assert im.get_clim() == pytest.approx((-0.6, 0.6))
    assert np.ma.getmaskarray(im.get_array())[1, 0]
    fig = F.floor_map(v * 10, extent=(0, 20, 0, 20), title="g", label="growth", kind="growth")
    assert fig.axes[0].images[0].get_clim() == pytest.approx((-2.0, 2.0))
    assert not any("noise band" in t.get_text() for t in fig.axes[0].get_legend().get_texts())


def test_status_map_legend_counts_match_the_table(runs):
    _pair, an, _single = runs
    _sec, _cap, build = _specs(an)["indication_status"]
    fig = build()
    counts = an.indications["status"].value_counts().to_dict()
    assert len(counts) >= 3
    legend = {}
    for t in fig.axes[0].get_legend().get_texts():
        m = re.fullmatch(r"(.+) \((\d+)\)", t.get_text())
        if m:
            legend[m.group(1)] = int(m.group(2))
    names = {st: F.STATUS_STYLE[st][2] for st in F.STATUS_STYLE}
    for st, n in counts.items():
        assert legend[names.get(st, st)] == n, st
    for st in ("new", "grown", "stable", "repaired", "partly unscanned"):
        assert legend[names[st]] == counts.get(st, 0)
    assert sum(legend.values()) == len(an.indications)
    # one marker per indication, in distinct shapes and colours per status
    offsets = sum(len(c.get_offsets()) for c in fig.axes[0].collections if hasattr(c, "get_offsets")
                  and c.get_offsets() is not None and len(c.get_offsets()) and c.get_paths())
    assert offsets >= len(an.indications)
    styles = [(m, c) for m, c, _n in F.STATUS_STYLE.values()]
    assert len(set(m for m, _c in styles)) == len(styles) == len(set(c for _m, c in styles))


def test_side_by_side_scans_on_one_grid_and_scale(runs):
    _pair, an, _single = runs
    fig = _specs(an)["scans_side_by_side"][2]()
    maps = [a for a in fig.axes if a.images and a.get_title(loc="left")]
    assert len(maps) == 2
    left, right = (np.ma.asarray(a.images[0].get_array()) for a in maps)
    for shown, grid in ((left, an.old_on_new.thickness), (right, an.new.thickness)):
        fin = np.isfinite(grid)
        np.testing.assert_array_equal(~np.ma.getmaskarray(shown), fin)
        np.testing.assert_allclose(shown.data[fin], grid[fin], rtol=1e-6)
    assert maps[0].images[0].get_clim() == maps[1].images[0].get_clim()
    both = np.r_[an.old_on_new.thickness[np.isfinite(an.old_on_new.thickness)],
                 an.new.thickness[np.isfinite(an.new.thickness)]]
    assert maps[0].images[0].get_clim() == pytest.approx((both.min(), both.max()))
    assert maps[0].images[0].get_extent() == maps[1].images[0].get_extent()
    assert str(an.old.meta.inspected) in maps[0].get_title(loc="left")


def test_repair_record_map_outlines_each_area_with_its_date(runs):
    _pair, an, _single = runs
    fig = _specs(an)["repair_record"][2]()
    ax = fig.axes[0]
    rects = [p for p in ax.patches if isinstance(p, Rectangle) and p.get_edgecolor()[:3]
             == pytest.approx(tuple(int(F._REPAIR_COLOUR[i:i + 2], 16) / 255 for i in (1, 3, 5)))]
    assert len(rects) == len(an.repairs)
    texts = [t.get_text() for t in ax.texts]
    for k, r in enumerate(an.repairs, start=1):
        assert any(t.startswith(f"R{k} {r.date.isoformat()}") for t in texts)
        x0, x1, y0, y1 = r.shape.bounds
        assert any(p.get_x() == pytest.approx(x0 / 1000) and p.get_y() == pytest.approx(y0 / 1000)
                   and p.get_width() == pytest.approx((x1 - x0) / 1000) for p in rects)


def test_new_figures_render_to_png(runs):
    _pair, an, _single = runs
    specs = _specs(an, "in")
    for slug in NEW_SLUGS:
        data = F.png_bytes(specs[slug][2]())
        assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 10_000


def test_repair_record_map_shapes_and_dates_before_the_older_inspection():
    import datetime as dt

    from matplotlib.patches import Circle, Polygon

    from scananalyse.attribution import Shape
    from scananalyse.rates import Repair

    reps = [Repair(Shape("circle", 0, x=100.0, y=100.0, r=50.0), dt.date(2012, 3, 4)),
            Repair(Shape("polygon", 0, points=((-300.0, -300.0), (-100.0, -300.0), (-200.0, -150.0))),
                   dt.date(2020, 7, 1), thickness=8.0)]
    t = np.full((40, 40), 6.0)
    fig = F.repair_record_map(t, reps, older_date=dt.date(2016, 5, 1), extent=(-400, 400, -400, 400),
                              diameter_mm=800.0)
    ax = fig.axes[0]
    circ = [p for p in ax.patches if isinstance(p, Circle) and p.get_radius() == pytest.approx(0.05)]
    poly = [p for p in ax.patches if isinstance(p, Polygon) and len(p.get_xy()) >= 3
            and np.allclose(p.get_xy()[:3], np.array(reps[1].shape.points) / 1000.0)]
    assert len(circ) == 1 and len(poly) == 1
    assert circ[0].get_linestyle() == "--" and poly[0].get_linestyle() == "-"  # before / after the older scan
    assert fig.scananalyse_repair_labels == ["R1 2012-03-04", "R2 2020-07-01\n8.00 mm plate"]
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "repaired between the inspections" in legend and "repaired before the older inspection" in legend
