"""Tests of scananalyse.report.figures and scananalyse.report.units.

Checks against independent references: scikit-image's block_reduce for the
display decimation, Gringorten's plotting positions and scipy.stats.gumbel_r for
the probability and return-level plots, an analytic radial thickness field for
the contour position, and exact unit definitions.
"""

from __future__ import annotations

import io

import matplotlib
import matplotlib._pylab_helpers as pylab_helpers
import numpy as np
import pandas as pd
import pytest
from matplotlib.figure import Figure
from matplotlib.patches import Circle
from PIL import Image
from scipy import stats
from skimage.measure import block_reduce

from scananalyse.report import figures as F
from scananalyse.report import units as U

EXT = (-2000.0, 2000.0, -1500.0, 1500.0)  # mm, cell edges of a 300 x 400 grid of 10 mm


def _radial(shape=(300, 400), pitch=10.0, r0=800.0):
    """Thickness 6 mm far out, falling linearly towards the centre: t = 2 + 4 r / r0 (capped 6)."""
    y = EXT[2] + pitch * (np.arange(shape[0]) + 0.5)
    x = EXT[0] + pitch * (np.arange(shape[1]) + 0.5)
    X, Y = np.meshgrid(x, y)
    r = np.hypot(X, Y)
    return np.minimum(6.0, 2.0 + 4.0 * r / r0).astype(np.float32), r


# --------------------------------------------------------------------------- units
def test_unit_conversions_exact():
    # 1 in = 25.4 mm, 1 mil = 0.0254 mm, 1 mpy = 0.0254 mm/y (domain.md §3, seen);
    # 1 ft = 0.3048 m, 1 lb = 0.45359237 kg (international yard and pound, from memory)
    assert U.convert(6.35, "thickness", "in") == pytest.approx(0.25)
    assert U.convert(2.54, "depth", "in") == pytest.approx(100.0)
    assert U.convert(0.254, "rate", "in") == pytest.approx(10.0)
    assert U.convert(1.0, "area", "in") == pytest.approx(10.7639104, rel=1e-8)
    assert U.convert(1.0, "mass", "in") == pytest.approx(2.20462262, rel=1e-8)
    assert U.convert(3.0, "thickness", "mm") == 3.0
    assert U.quantity_of_column("rate_under_max_mm_y") == "rate"
    assert U.quantity_of_column("depth_eva_upper_mm") == "depth"
    assert U.quantity_of_column("t_min_mm") == "thickness"
    assert U.quantity_of_column("interval_code_y") == "years"
    with pytest.raises(ValueError, match="display units"):
        U.convert(1.0, "depth", "cm")


def test_fmt_number_specials():
    assert U.fmt_number(float("nan")) == "–"
    assert U.fmt_number(None) == "–"
    assert U.fmt_number(np.inf) == "∞"
    assert U.fmt_number(-np.inf) == "−∞"
    assert U.fmt_number(-0.4, 1) == "−0.4"
    assert U.fmt_number(-0.001, 2) == "0.00"  # no negative zero
    assert U.fmt_number(np.int64(7)) == "7"
    assert U.fmt_number(pd.NaT) == "–"


# --------------------------------------------------------------------------- decimation
@pytest.mark.parametrize("how,func,cval", [("min", np.min, np.inf), ("max", np.max, -np.inf)])
def test_decimate_matches_block_reduce(how, func, cval):
    rng = np.random.default_rng(0)
    a = rng.normal(5, 1, size=(203, 157)).astype(np.float32)
    out, f = F.decimate(a, how=how, max_pixels=2000)
    ref = block_reduce(a, (f, f), func=func, cval=cval)  # scikit-image reference
    assert out.shape == ref.shape and out.size <= 2000
    # the smallest block size that fits: f - 1 would not
    assert np.ceil(203 / (f - 1)) * np.ceil(157 / (f - 1)) > 2000
    np.testing.assert_array_equal(out, ref.astype(np.float32))


@pytest.mark.parametrize("how,op", [("min", np.fmin), ("max", np.fmax)])
def test_decimate_with_gaps_equals_numpy_reduceat(how, op):
    # numpy's own NaN-skipping block reduction (fmin/fmax.reduceat along both axes) is the
    # reference, on a grid that is not a whole number of blocks, with gaps, float64 input
    rng = np.random.default_rng(3)
    a = rng.normal(5, 1, size=(301, 449))
    a[rng.random(a.shape) < 0.3] = np.nan
    a[:, 100:140] = np.nan
    out, f = F.decimate(a, how=how, max_pixels=5000)
    assert f > 1
    b = a.astype(np.float32)
    ref = op.reduceat(op.reduceat(b, np.arange(0, 301, f), axis=0), np.arange(0, 449, f), axis=1)
    np.testing.assert_array_equal(out, ref)
    assert out.dtype == np.float32
    # the "any" reduction of the registration overlay's masks, against scikit-image
    m = np.isnan(a)
    (nb, _, _), g, shape = F.reduce_feature_masks(m, m, m, max_pixels=5000)
    assert shape == m.shape
    np.testing.assert_array_equal(nb, block_reduce(m, (g, g), func=np.any, cval=False))


def test_decimate_nan_handling():
    a = np.full((8, 8), np.nan, dtype=np.float32)
    a[0, 0] = 3.0
    a[0, 1] = 1.0       # block (0, 0): min 1, max 3, NaNs ignored
    a[5, 5] = 2.0       # block (1, 1) of 4x4 blocks
    out, f = F.decimate(a, how="min", max_pixels=4)
    assert f == 4
    assert out[0, 0] == 1.0 and out[1, 1] == 2.0
    assert np.isnan(out[0, 1]) and np.isnan(out[1, 0])  # all-NaN block stays "not scanned"
    out, _ = F.decimate(a, how="max", max_pixels=4)
    assert out[0, 0] == 3.0


# --------------------------------------------------------------------------- floor map
def test_floor_map_no_pyplot_state_and_conservative_pixels():
    t, _ = _radial()
    t[123, 201] = 0.7          # one deep pit in a single cell
    t[:5, :] = np.nan          # a strip not scanned
    n_before = pylab_helpers.Gcf.get_num_fig_managers()
    fig = F.floor_map(t, extent=EXT, title="t", label="thickness", kind="thickness",
                      diameter_mm=3000.0, max_pixels=10_000)
    assert isinstance(fig, Figure)
    assert pylab_helpers.Gcf.get_num_fig_managers() == n_before  # nothing registered
    ax = fig.axes[0]
    im = ax.images[0]
    assert im.origin == "lower"
    assert fig.scananalyse_factor > 1
    arr = im.get_array()
    assert float(arr.min()) == pytest.approx(0.7)  # the pit survives decimation (min)
    assert np.ma.getmaskarray(arr)[0].all()        # not-scanned strip masked
    assert matplotlib.colors.to_hex(im.get_cmap().get_bad()) == F.NOT_SCANNED_COLOUR
    assert "thinnest" in fig.scananalyse_caption
    # axes in metres; the shell circle radius D/2 in metres
    e = im.get_extent()
    assert e[0] == pytest.approx(-2.0) and e[2] == pytest.approx(-1.5)
    circles = [p for p in ax.patches if isinstance(p, Circle)]
    assert any(c.get_radius() == pytest.approx(1.5) for c in circles)
    assert ax.get_xlabel() == "x [m]"


def test_floor_map_loss_keeps_deepest_and_units_in():
    loss = np.zeros((300, 400), dtype=np.float32)
    loss[77, 311] = 2.54
    fig = F.floor_map(loss, extent=EXT, title="loss", label="loss depth", kind="loss",
                      units="in", max_pixels=5_000)
    im = fig.axes[0].images[0]
    assert float(im.get_array().max()) == pytest.approx(100.0)  # 2.54 mm = 100 mils
    cb_label = fig.axes[1].get_ylabel()
    assert cb_label == "loss depth [mils]"
    fig = F.floor_map(loss / 10, extent=EXT, title="rate", label="rate", kind="rate", units="in")
    assert fig.axes[1].get_ylabel() == "rate [mpy]"


def test_floor_map_contour_at_known_radius():
    t, r = _radial()
    # t = 2 + 4 r / 800 crosses MRT 2.54 mm at r = 0.135 * 800 = 108 mm; 4.0 mm at 400 mm
    fig = F.floor_map(t, extent=EXT, title="t", label="thickness", kind="thickness",
                      contours=[(2.54, "MRT", "-"), (4.0, "repair-to", "--")])
    ax = fig.axes[0]
    sets = [c for c in ax.collections if hasattr(c, "levels")]
    assert len(sets) == 2
    for cs, r_true in zip(sets, (0.108, 0.400)):
        verts = np.concatenate([p.vertices for p in cs.get_paths() if len(p.vertices)])
        rad = np.hypot(verts[:, 0], verts[:, 1])
        # contours on cell centres: within one cell (0.01 m) of the analytic radius
        np.testing.assert_allclose(rad, r_true, atol=0.01)
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert any(l.startswith("MRT (2.54 mm)") for l in labels)


def test_floor_map_patches_seams_indications_side():
    t, _ = _radial()
    plate = np.zeros(t.shape, dtype=np.int32)
    plate[:, 200:] = 1
    patches = pd.DataFrame({"x_min_mm": [-500.0, 100.0], "y_min_mm": [-300.0, 200.0],
                            "x_max_mm": [-100.0, 500.0], "y_max_mm": [0.0, 600.0],
                            "corner_radius_mm": [50.0, 50.0]})
    ind = pd.DataFrame({"id": [1, 2], "x_mm": [0.0, 300.0], "y_mm": [0.0, 100.0],
                        "depth_max_mm": [3.0, 1.0]})
    fig = F.floor_map(t, extent=EXT, title="t", label="thickness", plate=plate, patches=patches,
                      indications=ind, diameter_mm=3000.0)
    ax = fig.axes[0]
    from matplotlib.collections import PatchCollection

    outlines = [c for c in ax.collections if isinstance(c, PatchCollection)]
    assert len(outlines) == 1 and len(outlines[0].get_paths()) == 2
    bb = outlines[0].get_paths()[0].get_extents()  # the first patch, in metres
    assert (bb.x0, bb.y0, bb.x1, bb.y1) == pytest.approx((-0.5, -0.3, -0.1, 0.0))
    seam = ax.images[1].get_array()
    cols = np.where((~np.ma.getmaskarray(seam)).any(axis=0))[0]
    assert cols.tolist() == [200]  # the seam between plate 0 and plate 1
    side = np.where(np.isfinite(t), 2, 0).astype(np.int8)
    side[:10] = 1
    fig = F.floor_map(side.astype(np.float32), extent=EXT, title="side", label="side",
                      kind="side")
    assert any("under" in x.get_text() for x in fig.axes[0].get_legend().get_texts())


def test_floor_map_life_infinite_clipped():
    life = np.full((50, 60), np.inf, dtype=np.float32)
    life[10, 10] = 3.0
    life[20, 20] = -1.0
    fig = F.floor_map(life, extent=(0, 600, 0, 500), title="life", label="remaining life",
                      kind="life")
    im = fig.axes[0].images[0]
    lo, hi = im.get_clim()
    assert lo == 0.0 and hi == pytest.approx(3.0)
    assert fig.axes[1].get_ylabel() == "remaining life [y]"


def test_floor_map_with_ax_and_bad_kind():
    fig = Figure()
    ax = fig.add_subplot()
    out = F.floor_map(np.ones((5, 5)), extent=(0, 50, 0, 50), title="x", label="t", ax=ax)
    assert out is fig
    with pytest.raises(ValueError, match="kind"):
        F.floor_map(np.ones((5, 5)), extent=(0, 50, 0, 50), title="x", label="t", kind="depth")


def _drawn(fig, dpi=130):
    """Draw a figure; return its renderer."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    fig.set_dpi(dpi)
    fig.canvas.draw()
    return fig.canvas.get_renderer()


@pytest.mark.parametrize("case", ["round floor", "wide scan, no shell", "inches, long legend", "side"])
def test_floor_map_layout_keeps_everything_inside_and_apart(case):
    # Floor maps on their own figure are laid out from their shape (no layout engine): every
    # text must lie inside the figure, the colour bar beside the map without touching it,
    # and the legend below the x label, clear of the map.
    t, _ = _radial()
    kw = dict(extent=EXT, title="Remaining thickness now", label="remaining thickness", kind="thickness")
    if case == "round floor":
        kw.update(diameter_mm=3900.0)
    elif case == "wide scan, no shell":
        kw.update(extent=(-6000.0, 6000.0, -1500.0, 1500.0))
    elif case == "inches, long legend":
        plate = np.zeros(t.shape, dtype=np.int32)
        plate[:, 200:] = 1
        patches = pd.DataFrame({"x_min_mm": [-500.0], "y_min_mm": [-300.0], "x_max_mm": [-100.0],
                                "y_max_mm": [0.0]})
        ind = pd.DataFrame({"id": [1], "x_mm": [0.0], "y_mm": [0.0], "depth_max_mm": [3.0]})
        kw.update(kind="loss", label="underside loss", units="in", diameter_mm=3900.0, plate=plate,
                  patches=patches, indications=ind)
        t = 6.35 - t
    else:
        t = np.where(np.isfinite(t), 2, 0).astype(np.float32)
        kw.update(kind="side", label="side", diameter_mm=3900.0)
    fig = F.floor_map(t, **kw)
    assert fig.get_layout_engine() is None
    r = _drawn(fig)
    W, H = fig.bbox.width, fig.bbox.height
    fw, fh = fig.get_size_inches()
    inked = fig.get_tightbbox(r)  # everything drawn: texts, ticks, legend, colour bar [in]
    assert inked.x0 >= 0 and inked.y0 >= 0 and inked.x1 <= fw and inked.y1 <= fh, (case, inked)
    ax = fig.axes[0]
    amap = ax.get_window_extent(r)
    leg = ax.get_legend().get_window_extent(r)
    xlab = ax.xaxis.label.get_window_extent(r)
    assert leg.y1 <= xlab.y0 and leg.y1 < amap.y0, case
    assert 0.55 * W < amap.width < W, case  # the map takes most of the width
    if case != "wide scan, no shell":
        assert amap.height > 0.6 * H, case  # and, being about square, most of the height
    if kind_has_bar := kw["kind"] != "side":
        cbar = fig.axes[1].get_window_extent(r)
        assert cbar.x0 > amap.x1 and cbar.x1 < W, case
        ticks = fig.axes[1].get_tightbbox(r)
        assert ticks.x1 <= W, case
    assert kind_has_bar == (len(fig.axes) == 2)


# --------------------------------------------------------------------------- registration
def test_registration_overlay_scores():
    new = np.zeros((100, 120), dtype=bool)
    new[40:45, :] = True
    before = np.roll(new, 10, axis=0)
    after = new.copy()
    after[40, :] = False
    fig = F.registration_overlay(new, before, after, extent=(0, 1200, 0, 1000))
    titles = [a.get_title(loc="left") for a in fig.axes[:2]]
    assert titles[0].endswith(" 0 %")
    # Jaccard index of the two masks: 4 rows shared of 5 → 80 %
    assert titles[1].endswith(" 80 %")
    img = fig.axes[1].images[0].get_array()
    assert tuple(img[42, 5]) == pytest.approx((0.10, 0.10, 0.10))  # both → dark
    assert tuple(img[40, 5]) == pytest.approx((0.90, 0.45, 0.05))  # new only → orange


# --------------------------------------------------------------------------- extremes
def test_probability_plot_gringorten_and_fit_line():
    rng = np.random.default_rng(42)
    x = stats.gumbel_r.rvs(loc=1.5, scale=0.4, size=60, random_state=rng)
    loc, scale = stats.gumbel_r.fit(x)  # reference estimator (scipy)
    fig = F.probability_plot({"maxima": x, "loc": loc, "scale": scale, "method": "MLE"},
                             title="p", units="mm")
    ax = fig.axes[0]
    pts, line = ax.lines[0], ax.lines[1]
    n = x.size
    p = (np.arange(1, n + 1) - 0.44) / (n + 0.12)  # Gringorten (1963), domain.md §7
    np.testing.assert_allclose(pts.get_xdata(), -np.log(-np.log(p)))
    np.testing.assert_allclose(pts.get_ydata(), np.sort(x))
    # the Gumbel line x = μ + σ y, i.e. scipy's quantile at p = exp(-exp(-y))
    yy = line.get_xdata()
    np.testing.assert_allclose(line.get_ydata(),
                               stats.gumbel_r.ppf(np.exp(-np.exp(-yy)), loc, scale), rtol=1e-10)


def test_probability_plot_censored_and_extremes_object():
    rng = np.random.default_rng(3)
    x = stats.gumbel_r.rvs(loc=1.0, scale=0.5, size=80, random_state=rng)
    cens = x < 0.9
    fig = F.probability_plot({"maxima": x, "censored": cens, "threshold": 0.9, "loc": 1.0,
                              "scale": 0.5}, title="c", units="in")
    ax = fig.axes[0]
    n, k = x.size, int(cens.sum())
    p = ((np.arange(1, n + 1) - 0.44) / (n + 0.12))[k:]  # censored blocks rank lowest
    np.testing.assert_allclose(ax.lines[0].get_xdata(), -np.log(-np.log(p)))
    np.testing.assert_allclose(ax.lines[0].get_ydata(), np.sort(x[~cens]) / 0.0254)  # mils
    assert "mils" in ax.get_ylabel()
    # the project's extremes.ProbabilityPlot object is accepted as it is
    from scananalyse import extremes as E
    fit = E.fit_gumbel_mle(x, censored=cens, threshold=0.9)
    pp = E.probability_plot(x, fit, censored=cens, threshold=0.9)
    fig = F.probability_plot(pp, title="obj", units="mm")
    np.testing.assert_allclose(fig.axes[0].lines[0].get_ydata(), np.sort(x[~cens]))
    np.testing.assert_allclose(fig.axes[0].lines[-1].get_ydata(), pp.line_x)


def test_return_level_plot_marks_zone_T():
    loc, scale = 150.0, 90.0  # the textbook Gumbel of domain.md §7
    T = np.logspace(0.1, 3, 60)
    level = stats.gumbel_r.ppf(1 - 1 / T, loc, scale)
    fig = F.return_level_plot(T, level, level - 20, level + 30, zone_T=10.0, units="mm")
    ax = fig.axes[0]
    marker = [l for l in ax.lines if l.get_marker() == "o"][0]
    # x_T = μ − σ ln(−ln(1 − 1/T)) at T = 10 (90th percentile 352.5, domain.md §7);
    # read off the log-interpolated curve: within 0.5 % of the exact value
    assert marker.get_ydata()[0] == pytest.approx(352.5, rel=5e-3)
    assert ax.get_xscale() == "log"
    assert len(ax.collections) >= 1  # the bounds band
    # one-sided: only an upper bound, computed at its own periods (the dots); the line between
    # them keeps the bound's margin over the return level, interpolated in log T, so it passes
    # through every dot and never cuts under the curve where the margin is positive
    Tb = np.array([2.0, 10.0, 100.0])
    up = stats.gumbel_r.ppf(1 - 1 / Tb, loc, scale) + np.array([25.0, 40.0, 30.0])
    fig = F.return_level_plot(T, level, None, up, bound_T=Tb, zone_T=10.0, units="mm",
                              bound_label="90 % upper bound")
    ax = fig.axes[0]
    line = [l for l in ax.lines if l.get_label() == "90 % upper bound"]
    dots = [l for l in ax.lines if l.get_label() == "_bound computed here"]
    assert len(line) == 1 and len(dots) == 1
    np.testing.assert_allclose(dots[0].get_xdata(), Tb)
    np.testing.assert_allclose(dots[0].get_ydata(), up)
    x, y = np.asarray(line[0].get_xdata()), np.asarray(line[0].get_ydata())
    assert x.min() == 2.0 and x.max() == 100.0
    np.testing.assert_allclose(np.interp(np.log(Tb), np.log(x), y), up, rtol=1e-12)  # through the dots
    margin = y - stats.gumbel_r.ppf(1 - 1 / x, loc, scale)
    assert margin.min() > 24.0  # between 25 and 40 everywhere (up to the curve's log interpolation)
    assert "90 % upper bound" in [t.get_text() for t in ax.get_legend().get_texts()]
    # the period axis has plain numbers, not typeset powers of ten
    _drawn(fig)  # tick labels are made at the draw
    labels = [t.get_text() for t in ax.get_xticklabels() if t.get_text()]
    assert labels and all("$" not in t for t in labels) and "10" in labels and "100" in labels
    assert not [t for t in ax.get_xticklabels(minor=True) if t.get_text()]  # three decades: 10, 100 only
    # over two decades or less (here 2 to 144, the demo floor's), 2 and 5 are labelled too, in
    # the same size as 10 and 100
    Ts = np.geomspace(2.0, 144.0, 60)
    fig = F.return_level_plot(Ts, stats.gumbel_r.ppf(1 - 1 / Ts, loc, scale), None, None, zone_T=48.0)
    ax = fig.axes[0]
    _drawn(fig)
    minor = [t for t in ax.get_xticklabels(minor=True) if t.get_text()]
    major = [t for t in ax.get_xticklabels() if t.get_text()]
    assert {"2", "5", "20", "50"} <= {t.get_text() for t in minor} and {"10", "100"} <= {t.get_text() for t in major}
    assert {t.get_fontsize() for t in minor} == {t.get_fontsize() for t in major}


def test_method_comparison_markers_and_flags():
    z = pd.DataFrame({"zone": ["critical", "interior"], "interval_code_y": [25.0, -1.0],
                      "life_local_y": [np.inf, 4.0], "life_eva_y": [18.0, 3.5],
                      "interval_cap_y": [20.0, 20.0], "interval_recommended_y": [18.0, 0.0],
                      "flags": ["", "below MRT;code interval exceeds local life"]})
    fig = F.method_comparison(z)
    ax = fig.axes[0]
    assert [t.get_text() for t in ax.get_yticklabels()] == ["critical", "interior"]
    bars = ax.patches
    assert sorted(b.get_width() for b in bars) == [0.0, 18.0]
    texts = [t.get_text() for t in ax.texts]
    assert "∞" in texts  # infinite co-located life drawn as an arrow
    assert any("below MRT; code interval exceeds local life" in t for t in texts)
    # a negative code interval is shown at 0 and labelled, not as negative years
    assert ax.get_xlim()[0] > -1.0
    assert any(t.strip() == "below MRT" for t in texts)


# --------------------------------------------------------------------------- output
def test_png_output(tmp_path):
    fig = Figure(figsize=(4, 3))
    ax = fig.add_subplot()
    ax.plot([0, 1], [0, 1])
    b = F.png_bytes(fig, dpi=50)
    assert b[:8] == b"\x89PNG\r\n\x1a\n"
    assert b"matplotlib.org" not in b and b"http" not in b  # no software URL in metadata
    with Image.open(io.BytesIO(b)) as im:
        assert im.size == (200, 150)
    p = F.save_png(fig, tmp_path / "a.png", dpi=50)
    assert p == str(tmp_path / "a.png")
    assert (tmp_path / "a.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert [f.name for f in tmp_path.iterdir()] == ["a.png"]


def test_constrained_layout_run_once_gives_matplotlibs_own_pixels():
    # _render_png runs a figure's constrained layout once and then draws it once; the pixels
    # must equal matplotlib's own savefig of the same figure (which draws it twice).
    import io

    from matplotlib.figure import Figure
    from PIL import Image

    def build():
        fig = Figure(figsize=(5.0, 4.0), layout="constrained")
        ax = fig.add_subplot()
        im = ax.imshow(np.arange(400.0).reshape(20, 20), origin="lower")
        fig.colorbar(im, ax=ax, label="a long colour-bar label [mm]")
        ax.set_title("a title that takes some room")
        ax.set_xlabel("x [m]")
        ax.legend(handles=[ax.plot([0, 19], [0, 19], label="line")[0]], loc="upper center",
                  bbox_to_anchor=(0.5, -0.15), ncol=2)
        draws = []
        fig.canvas.mpl_connect("draw_event", lambda ev: draws.append(1))
        return fig, draws

    ref, ref_draws = build()
    buf = io.BytesIO()
    ref.savefig(buf, format="png", dpi=130)
    ours, our_draws = build()
    data = F._render_png(ours, 130)
    a = np.asarray(Image.open(io.BytesIO(buf.getvalue())).convert("RGBA"))
    b = np.asarray(Image.open(io.BytesIO(data)).convert("RGBA"))
    assert a.shape == b.shape and np.array_equal(a, b)
    assert len(ref_draws) == 2 and len(our_draws) == 1


# --------------------------------------------------------------------------- locating, defects of issue 19
def test_contours_light_with_dark_halo():
    t, _ = _radial()
    fig = F.floor_map(t, extent=EXT, title="t", label="t", contours=[(4.0, "MRT", "--")])
    from matplotlib.colors import to_rgb

    lines = [a for a in fig.axes[0].collections if type(a).__name__ == "QuadContourSet"] \
        or [a for a in fig.axes[0].collections if hasattr(a, "levels")]
    assert lines
    rgb = to_rgb(lines[0].get_edgecolor()[0])
    assert sum(rgb) / 3 > 0.8  # light: visible on the dark end of viridis
    assert lines[0].get_path_effects()  # with a dark halo for the light end


def test_floor_map_zones_ring_plates_patch_ids():
    from types import SimpleNamespace

    t, r = _radial()
    labels = np.where(r <= 1400.0, np.where(r > 1100.0, 0, 1), -1).astype(np.int16)
    zmap = SimpleNamespace(labels=labels, names=["critical", "interior"], kinds=["critical", "interior"],
                           geometry=SimpleNamespace(centre=(0.0, 0.0)))
    plate = np.zeros(t.shape, dtype=np.int32)
    plate[:, 200:] = 1
    patches = pd.DataFrame({"patch": ["P007"], "x_min_mm": [-100.0], "y_min_mm": [-100.0],
                            "x_max_mm": [100.0], "y_max_mm": [100.0]})
    fig = F.floor_map(t, extent=EXT, title="t", label="t", zones=zmap, plate=plate, patches=patches,
                      diameter_mm=2800.0)
    ax = fig.axes[0]
    texts = [x.get_text() for x in ax.texts]
    assert {"critical", "interior", "plate 0", "plate 1", "P007"} <= set(texts)
    rings = [p for p in ax.patches if isinstance(p, Circle) and p.get_edgecolor()[:3] != (0.2, 0.2, 0.2)]
    radii = sorted(round(p.get_radius(), 2) for p in ax.patches if isinstance(p, Circle))
    assert any(abs(rad - 1.1) < 0.02 for rad in radii), radii  # the ring's inner edge, in m
    assert rings
    legend = [h.get_text() for h in ax.get_legend().get_texts()]
    assert "critical-zone ring" in legend


def test_summed_rate_and_shared_range():
    from scananalyse.report.figlist import shared_range, summed_rate

    top = np.array([[0.1, np.nan, np.nan, -0.2]], dtype=np.float32)
    under = np.array([[0.2, 0.3, np.nan, 0.1]], dtype=np.float32)
    thk = np.array([[5.0, 5.0, 5.0, np.nan]], dtype=np.float32)
    s = summed_rate(top, under, thk)
    assert np.allclose(s[0, :2], [0.3, 0.3]) and np.isnan(s[0, 2]) and np.isnan(s[0, 3])
    assert shared_range(np.array([1.0, np.nan]), np.array([[2.5]])) == (0.0, 2.5)
    assert shared_range(np.array([np.nan])) == (0.0, None)


def test_probability_plot_legend_says_fitted_line():
    fig = F.probability_plot({"maxima": [1.0, 1.5, 2.0, 2.2], "loc": 1.4, "scale": 0.4,
                              "line_reduced": [-1.0, 2.0], "line_x": [1.0, 2.2]}, title="p")
    legend = [h.get_text() for h in fig.axes[0].get_legend().get_texts()]
    assert "fitted line" in legend and not any("fitted fit" in x for x in legend)
