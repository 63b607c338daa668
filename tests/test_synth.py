"""Tests of the synthetic floors: the truth they return must match the scans.

The checks here are against the model each scan is defined by (the registration
contract in design.md §3.3, Gaussian reading noise, MFL censoring as domain.md
§2 describes it), recomputed independently in the tests.
"""

import datetime as dt
import math
import time

import numpy as np
import pytest
from scipy import ndimage, stats

from scananalyse import synth
from scananalyse.scan import FloorScan

# Small floors keep the file fast.
SMALL = dict(diameter_mm=4000.0, pitch_new=10.0, pitch_old=12.5, n_top_pits=20, n_under_pits=40, seed=3)


@pytest.fixture(scope="module")
def pair():
    return synth.make_pair(**SMALL)


def _rot(theta_deg):
    c, s = math.cos(math.radians(theta_deg)), math.sin(math.radians(theta_deg))
    return np.array([[c, -s], [s, c]])


def _old_frame(truth, x, y):
    """Floor (new-frame) point -> old frame, inverting x' = R x + d (design.md §3.3)."""
    R = _rot(truth.rotation_deg)
    return R.T @ (np.array([x, y]) - np.array([truth.dx_mm, truth.dy_mm]))


def _cell(scan: FloorScan, u, v):
    """Nearest cell (row, col) of own-frame point (u, v) on a scan's grid."""
    return int(round((v - scan.y0) / scan.pitch)), int(round((u - scan.x0) / scan.pitch))


def _clear_deep_pits(pair, *, min_depth=1.4):
    """Pits deep in both inspections, unrepaired, with the whole window scanned in both scans."""
    tr = pair.truth
    out = []
    for p in tr.pits.itertuples():
        if p.repair >= 0 or min(p.depth_old_mm, p.depth_new_mm) < min_depth or not (p.seen_new and p.seen_old):
            continue
        ok = True
        for scan, (u, v) in ((pair.new, (p.x_mm, p.y_mm)), (pair.old, _old_frame(tr, p.x_mm, p.y_mm))):
            i, j = _cell(scan, u, v)
            w = int(math.ceil(p.radius_mm / scan.pitch)) + 1
            win = scan.thickness[i - w:i + w + 1, j - w:j + w + 1]
            ok &= win.shape == (2 * w + 1, 2 * w + 1) and bool(np.isfinite(win).all())
        if ok:
            out.append(p)
    return out


def test_shapes_types_and_metadata(pair):
    tr = pair.truth
    assert tr.centre == (0.0, 0.0)
    for name in ("t_new_true", "t_old_true", "loss_top_true", "loss_under_true", "rate_top_true",
                 "rate_under_true"):
        a = getattr(tr, name)
        assert a.shape == pair.new.shape and a.dtype == np.float32, name
    assert tr.side_true.dtype == np.int8 and tr.plate_true.dtype == np.int32
    assert pair.new.thickness.dtype == np.float32 and pair.old.thickness.dtype == np.float32
    assert pair.new.pitch == 10.0 and pair.old.pitch == 12.5
    # Each grid covers the floor circle's bounding box in its own frame, and no more than a cell over.
    R = tr.diameter_mm / 2
    for scan, (cu, cv) in ((pair.new, tr.centre), (pair.old, _old_frame(tr, *tr.centre))):
        x_lo, x_hi, y_lo, y_hi = scan.extent
        assert x_lo <= cu - R and x_hi >= cu + R and y_lo <= cv - R and y_hi >= cv + R
        assert max(scan.shape) <= math.ceil(2 * R / scan.pitch) + 1
    assert pair.new.shape == (400, 400)
    m = pair.new.meta
    assert (m.inspected, pair.old.meta.inspected, m.installed) == (
        dt.date(2026, 5, 1), dt.date(2016, 5, 1), dt.date(2001, 5, 1))
    assert (m.method, m.units, m.nominal, m.threshold, m.sigma) == ("MFL", "mm", 6.35, 1.0, 0.1)
    assert pair.new.plate is not None and pair.old.plate is not None
    assert pair.new.side is not None and pair.old.side is None
    assert tr.dt_years == pytest.approx(10.0, abs=0.01)    # 2016-05-01 -> 2026-05-01
    assert tr.age_new_years - tr.age_old_years == pytest.approx(tr.dt_years)
    # NaN outside the floor circle, defined everywhere inside (even unscanned).
    X, Y = pair.new.grid_xy()
    inside = X ** 2 + Y ** 2 <= (tr.diameter_mm / 2) ** 2
    assert np.isfinite(tr.t_new_true[inside]).all() and np.isnan(tr.t_new_true[~inside]).all()
    assert np.isfinite(tr.t_old_true[inside]).all()
    assert (tr.plate_true[~inside] == -1).all() and (tr.plate_true[inside] >= 0).all()
    assert (tr.t_new_true[inside] >= 0.3 - 1e-6).all()
    # Thickness only falls with time, except where repaired.
    assert len(tr.repairs) == 2
    X32, Y32 = X, Y
    rep = np.zeros(pair.new.shape, bool)
    for r in tr.repairs.itertuples():
        rep |= (X32 >= r.x_min_mm) & (X32 <= r.x_max_mm) & (Y32 >= r.y_min_mm) & (Y32 <= r.y_max_mm)
    ok = inside & ~rep
    assert (tr.t_new_true[ok] <= tr.t_old_true[ok] + 1e-5).all()


def test_transform_honoured_pit_centres(pair):
    """A known pit centre c shows at c in the new scan and at R^T(c - d) in the old one (§3.3)."""
    tr = pair.truth
    assert (tr.rotation_deg, tr.dx_mm, tr.dy_mm) == (2.0, 120.0, -80.0)
    pits = _clear_deep_pits(pair)
    assert len(pits) >= 3
    for p in pits:
        for scan, (u, v) in ((pair.new, (p.x_mm, p.y_mm)), (pair.old, _old_frame(tr, p.x_mm, p.y_mm))):
            i, j = _cell(scan, u, v)
            w = int(math.ceil(p.radius_mm / scan.pitch)) + 1
            win = scan.thickness[i - w:i + w + 1, j - w:j + w + 1].astype(np.float64)
            # the thinnest reading lies within one cell of the expected point
            a, b = np.unravel_index(np.argmin(win), win.shape)
            xm, ym = scan.x0 + (j - w + b) * scan.pitch, scan.y0 + (i - w + a) * scan.pitch
            assert math.hypot(xm - u, ym - v) <= 1.5 * scan.pitch
            # the loss-weighted centroid lands within a third of a cell
            loss = scan.meta.nominal - win
            jj, ii = np.meshgrid(np.arange(j - w, j + w + 1), np.arange(i - w, i + w + 1))
            xc = scan.x0 + scan.pitch * (loss * jj).sum() / loss.sum()
            yc = scan.y0 + scan.pitch * (loss * ii).sum() / loss.sum()
            assert math.hypot(xc - u, yc - v) <= scan.pitch / 3


def test_transform_property_maps_old_to_new(pair):
    tr = pair.truth
    t = tr.transform
    x, y = t.apply(np.array([100.0, -250.0]), np.array([40.0, 900.0]))
    ref = _rot(2.0) @ np.array([[100.0, -250.0], [40.0, 900.0]]) + np.array([[120.0], [-80.0]])
    np.testing.assert_allclose(np.vstack([x, y]), ref, atol=1e-9)


def test_noise_statistics_ut():
    """UT: reading = truth + N(0, sigma) everywhere scanned; std matches the requested sigma."""
    sigma = 0.2
    p = synth.make_pair(diameter_mm=3000.0, pitch_new=10.0, pitch_old=15.0, method="UT", sigma=sigma,
                        seed=11)
    assert p.new.meta.threshold is None
    res = (p.new.thickness - p.truth.t_new_true)[p.new.scanned].astype(np.float64)
    n = res.size
    assert n > 40000
    # sample std of n normal draws has relative s.e. 1/sqrt(2n) (~0.3 % here); allow 2 %.
    assert np.std(res) == pytest.approx(sigma, rel=0.02)
    assert abs(np.mean(res)) < 4 * sigma / math.sqrt(n)
    # normality: Kolmogorov-Smirnov against scipy.stats.norm(0, sigma)
    assert stats.kstest(res[::7], stats.norm(0.0, sigma).cdf).pvalue > 1e-3


def test_noise_statistics_mfl_above_threshold(pair):
    """MFL: where true loss is well above the threshold, residuals have the requested sigma."""
    tr, s = pair.truth, pair.new
    loss = s.meta.nominal - tr.t_new_true
    sel = s.scanned & (loss >= s.meta.threshold + 5 * s.meta.sigma)
    res = (s.thickness - tr.t_new_true)[sel].astype(np.float64)
    assert res.size > 300
    # relative s.e. of a std from n draws: 1/sqrt(2n) ~ 4 % at n = 300; allow 3 s.e.
    assert np.std(res) == pytest.approx(s.meta.sigma, rel=3 / math.sqrt(2 * res.size))


def test_mfl_censoring(pair):
    """No reported loss shallower than the threshold: readings are nominal or thin by >= threshold."""
    for s in (pair.new, pair.old):
        t = s.thickness[s.scanned]
        nominal, thr = s.meta.nominal, s.meta.threshold
        reported_loss = nominal - t
        at_nominal = t == np.float32(nominal)
        assert at_nominal.mean() > 0.9
        assert (reported_loss[~at_nominal] >= thr - 1e-5).all()
    # where the true loss is far below the threshold, the scan reads exactly nominal
    tr, s = pair.truth, pair.new
    shallow = s.scanned & (s.meta.nominal - tr.t_new_true < s.meta.threshold - 6 * s.meta.sigma)
    assert (s.thickness[shallow] == np.float32(s.meta.nominal)).all()
    # general thinning alone (0.3 mm at 25 y) is below the threshold: hidden by censoring
    assert np.nanmedian(s.meta.nominal - tr.t_new_true) > 0.1


def test_determinism_with_seed():
    kw = dict(diameter_mm=3000.0, pitch_new=20.0, pitch_old=25.0)
    a, b, c = synth.make_pair(seed=5, **kw), synth.make_pair(seed=5, **kw), synth.make_pair(seed=6, **kw)
    for name in ("old", "new"):
        np.testing.assert_array_equal(getattr(a, name).thickness, getattr(b, name).thickness)
    np.testing.assert_array_equal(a.truth.t_new_true, b.truth.t_new_true)
    np.testing.assert_array_equal(a.new.side, b.new.side)
    assert a.truth.pits.equals(b.truth.pits) and a.truth.repairs.equals(b.truth.repairs)
    assert not np.array_equal(a.new.thickness, c.new.thickness, equal_nan=True)


def test_new_pits_absent_in_old(pair):
    tr = pair.truth
    new_pits = tr.pits[(tr.pits.start_year > tr.age_old_years) & (tr.pits.repair < 0)]
    assert len(new_pits) >= 3
    assert (new_pits.depth_old_mm == 0).all() and (new_pits.depth_new_mm > 0).all()
    g_loss = (tr.general_rate_top + tr.general_rate_under) * tr.age_old_years
    for p in new_pits.itertuples():
        i, j = _cell(pair.new, p.x_mm, p.y_mm)
        # truth at the old date: general thinning only at the pit's centre
        assert tr.t_old_true[i, j] == pytest.approx(tr.nominal - g_loss, abs=1e-4) or \
            tr.t_old_true[i, j] >= tr.t_new_true[i, j]
        u, v = _old_frame(tr, p.x_mm, p.y_mm)
        io, jo = _cell(pair.old, u, v)
        val = pair.old.thickness[io, jo]
        if np.isfinite(val):     # MFL: the old scan reads nominal there
            assert val == np.float32(pair.old.meta.nominal)
    seen_deep = new_pits[new_pits.seen_new & (new_pits.depth_new_mm > 1.6)]
    for p in seen_deep.itertuples():     # and the new scan reports them
        i, j = _cell(pair.new, p.x_mm, p.y_mm)
        assert pair.new.meta.nominal - pair.new.thickness[i, j] >= pair.new.meta.threshold


def test_coverage_holes(pair):
    tr, new, old = pair.truth, pair.new, pair.old
    R = tr.diameter_mm / 2
    # shell margin: 100 mm new, 130 mm old
    X, Y = new.grid_xy()
    r = np.hypot(X, Y)
    assert np.isnan(new.thickness[(r > R - 100 + 1) & (r <= R)]).all()
    assert new.scanned[(r < R - 100 - 1)].mean() > 0.9
    Xo, Yo = old.grid_xy()
    xf, yf = tr.transform.apply(Xo, Yo)
    ro = np.hypot(xf, yf)
    assert np.isnan(old.thickness[(ro > R - 130 + 1) & (ro <= R)]).all()
    # sump (0.22 R, 0.12 R), column base (-0.35 R, 0.30 R): unscanned in both scans
    for (x, y) in ((0.22 * R, 0.12 * R), (-0.35 * R, 0.30 * R)):
        assert np.isnan(new.thickness[_cell(new, x, y)])
        assert np.isnan(old.thickness[_cell(old, *_old_frame(tr, x, y))])
    # temporary obstruction in the old scan only
    x, y = 0.25 * R, -0.56 * R
    assert np.isnan(old.thickness[_cell(old, *_old_frame(tr, x, y))])
    assert np.isfinite(new.thickness[_cell(new, x, y)])
    # seam bands: the midpoint of every seam segment is unscanned in both scans
    assert len(tr.seams) >= 4
    for (x1, y1, x2, y2) in tr.seams:
        xm, ym = (x1 + x2) / 2, (y1 + y2) / 2
        assert np.isnan(new.thickness[_cell(new, xm, ym)])
        assert np.isnan(old.thickness[_cell(old, *_old_frame(tr, xm, ym))])
    # hidden pits are seen in neither scan
    hidden = tr.pits[tr.pits.kind.isin(["shell_margin", "column_base"])]
    assert len(hidden) == 4 and set(hidden.kind) == {"shell_margin", "column_base"}
    assert not hidden.seen_new.any() and not hidden.seen_old.any()
    assert (hidden.depth_new_mm > 2.0).all()


def test_true_rates_equal_pit_rates(pair):
    """rate maps = general rate + rate * cosine cap; pit rate = (depth_new - depth_old) / dt."""
    tr = pair.truth
    X, Y = pair.new.grid_xy()
    active = tr.pits[(tr.pits.repair < 0)]
    checked = 0
    for p in active.itertuples():
        i, j = _cell(pair.new, p.x_mm, p.y_mm)
        rho = math.hypot(X[i, j] - p.x_mm, Y[i, j] - p.y_mm)
        cap = 0.5 * (1 + math.cos(math.pi * rho / p.radius_mm)) if rho < p.radius_mm else 0.0
        rate_map = tr.rate_top_true if p.side == "top" else tr.rate_under_true
        g = tr.general_rate_top if p.side == "top" else tr.general_rate_under
        if not np.isfinite(rate_map[i, j]):
            continue
        # top pits never overlap; an under pit may share the cell with another face only
        assert rate_map[i, j] == pytest.approx(g + p.rate_mm_y * cap, rel=1e-4, abs=1e-6)
        checked += 1
        if p.start_year < tr.age_old_years:
            assert p.rate_mm_y == pytest.approx((p.depth_new_mm - p.depth_old_mm) / tr.dt_years, rel=1e-9)
            # and the truth maps agree: loss growth over the interval / dt at that cell
            dloss = (tr.t_old_true[i, j] - tr.t_new_true[i, j])
            other = tr.rate_under_true if p.side == "top" else tr.rate_top_true
            g_other = tr.general_rate_under if p.side == "top" else tr.general_rate_top
            if other[i, j] == pytest.approx(g_other):     # no pit of the other face here
                assert dloss == pytest.approx((rate_map[i, j] + other[i, j]) * tr.dt_years,
                                              rel=2e-3, abs=2e-4)
    assert checked > 20
    # late starters grow faster (median rates)
    late = tr.pits.start_year > tr.age_old_years
    assert tr.pits.rate_mm_y[late].median() > tr.pits.rate_mm_y[~late].median()
    # far from any pit only the general rates remain
    far = np.ones(pair.new.shape, bool)
    for p in tr.pits.itertuples():
        far &= np.hypot(X - p.x_mm, Y - p.y_mm) > p.radius_mm
    inside = np.isfinite(tr.t_new_true)
    np.testing.assert_allclose(tr.rate_top_true[far & inside], tr.general_rate_top, rtol=1e-6)
    np.testing.assert_allclose(tr.rate_under_true[far & inside], tr.general_rate_under, rtol=1e-6)
    assert (tr.side_true[far] == 0).all()


def test_repairs(pair):
    tr = pair.truth
    reps = tr.repairs
    assert set(reps.side) == {"top", "under"}
    X, Y = pair.new.grid_xy()
    for r in reps.itertuples():
        assert pair.old.meta.inspected < r.date < pair.new.meta.inspected
        pit = tr.pits.loc[r.pit_id]
        assert pit.repair == r.id and pit.depth_old_mm >= 1.0 and pit.seen_old
        # the old scan shows the pit
        io, jo = _cell(pair.old, *_old_frame(tr, pit.x_mm, pit.y_mm))
        assert pair.old.meta.nominal - pair.old.thickness[io, jo] >= 1.0
        i, j = _cell(pair.new, pit.x_mm, pit.y_mm)
        t_since = tr.age_new_years - r.year
        g = (tr.general_rate_top + tr.general_rate_under) * t_since
        if r.restart:    # pit restarts from zero at its own rate
            assert pit.depth_new_mm == pytest.approx(pit.rate_mm_y * t_since, rel=1e-9)
        else:            # coated insert: the pit stops, only general thinning of the new metal
            assert pit.depth_new_mm == 0.0
            assert tr.t_new_true[i, j] == pytest.approx(tr.nominal - g, abs=1e-4)
            assert tr.rate_top_true[i, j] == pytest.approx(tr.general_rate_top)
        # the repaired area is thicker now than at the old inspection
        assert tr.t_new_true[i, j] > tr.t_old_true[i, j] + 0.9


def test_side_layer_and_truth(pair):
    tr, s = pair.truth, pair.new
    marked = s.side == 1
    assert marked.sum() > 50
    # marked cells carry top-side pit loss of at least half the threshold (an underside pit
    # at the same spot may be deeper, so side_true there can be 2)
    top_pit = tr.loss_top_true - tr.general_rate_top * tr.age_new_years
    assert (top_pit[marked] >= 0.5 * s.meta.threshold - 1e-4).all()
    assert (tr.side_true[marked] == 1).mean() > 0.9
    assert set(np.unique(s.side)) <= {0, 1}
    assert (tr.side_true == 2).any() and (tr.side_true == 1).any()
    # every marked pit shows as an MFL indication (reported loss >= threshold) somewhere in it
    lab, n = ndimage.label(marked)
    deepest = ndimage.maximum(s.meta.nominal - s.thickness, lab, np.arange(1, n + 1))
    assert n >= 3 and (np.asarray(deepest) >= s.meta.threshold).all()


def test_plate_layer_consistent_between_scans(pair):
    tr, new, old = pair.truth, pair.new, pair.old
    Xo, Yo = old.grid_xy()
    xf, yf = tr.transform.apply(Xo, Yo)
    i = np.rint((yf - new.y0) / new.pitch).astype(int)
    j = np.rint((xf - new.x0) / new.pitch).astype(int)
    ok = (i >= 0) & (j >= 0) & (i < new.shape[0]) & (j < new.shape[1]) & old.scanned
    agree = new.plate[i[ok], j[ok]] == old.plate[ok]
    assert agree.mean() > 0.995     # disagreements only within a cell of a seam, which are unscanned
    ids = np.unique(new.plate[new.plate >= 0])
    np.testing.assert_array_equal(ids, np.arange(ids.size))


def test_make_scan_single_inspection():
    scan, truth = synth.make_scan(diameter_mm=3000.0, pitch=15.0, seed=2, inspected="2024-06-01")
    assert isinstance(scan, FloorScan) and scan.shape == (200, 200)
    assert scan.meta.inspected == dt.date(2024, 6, 1)
    assert truth.t_true.shape == scan.shape
    assert {"depth_mm", "seen", "rate_mm_y", "start_year"} <= set(truth.pits.columns)
    assert (truth.pits.start_year < truth.age_years).all()
    loss = scan.meta.nominal - scan.thickness[scan.scanned]
    assert ((loss == 0) | (loss >= scan.meta.threshold - 1e-5)).all()
    # depth at the inspection = rate * (age - start)
    np.testing.assert_allclose(truth.pits.depth_mm,
                               truth.pits.rate_mm_y * (truth.age_years - truth.pits.start_year), rtol=1e-9)


def test_generation_speed():
    """About 1.3 M new cells + 0.8 M old cells; budget ~1 s on one core, generous bound for CI."""
    t0 = time.perf_counter()
    p = synth.make_pair(diameter_mm=11300.0, pitch_new=10.0, pitch_old=12.5, seed=1)
    elapsed = time.perf_counter() - t0
    assert p.new.thickness.size > 1_000_000
    assert elapsed < 4.0


def test_bad_arguments():
    with pytest.raises(ValueError, match="pitch_new"):
        synth.make_pair(pitch_new=0.0)
    with pytest.raises(ValueError, match="dates"):
        synth.make_pair(inspected_old=dt.date(2027, 1, 1))


def test_repair_record_reads_back(pair, tmp_path):
    """The operator repair record written from the truth reads back with rates.read_repairs."""
    from scananalyse.rates import read_repairs

    path = tmp_path / "repairs.csv"
    synth.write_repair_record(pair.truth, path)
    recs = read_repairs(path, scan=pair.new)
    assert len(recs) == len(pair.truth.repairs)
    for rec, r in zip(recs, pair.truth.repairs.itertuples()):
        x_min, x_max, y_min, y_max = rec.shape.bounds
        assert (x_min, y_min, x_max, y_max) == pytest.approx(
            (r.x_min_mm, r.y_min_mm, r.x_max_mm, r.y_max_mm), abs=0.1)   # written to 0.1 mm
        assert rec.date == r.date and rec.thickness == pytest.approx(pair.truth.nominal)


def test_featureless_and_off_centre_floors():
    """Zero pits gives a floor with general thinning only; an off-centre tank keeps its geometry."""
    p = synth.make_pair(diameter_mm=3000.0, pitch_new=20.0, pitch_old=25.0, n_top_pits=0,
                        n_under_pits=0, n_hidden_pits=0, repairs=0, seed=1)
    assert len(p.truth.pits) == 0 and len(p.truth.repairs) == 0
    assert (p.new.thickness[p.new.scanned] == np.float32(6.35)).all()   # all censored by MFL
    assert (p.truth.side_true == 0).all() and not p.new.side.any()
    c = (700.0, -450.0)
    q = synth.make_pair(diameter_mm=3000.0, pitch_new=20.0, pitch_old=25.0, centre=c, seed=2)
    X, Y = q.new.grid_xy()
    inside = np.hypot(X - c[0], Y - c[1]) <= 1500.0
    assert np.isfinite(q.truth.t_new_true[inside]).all() and np.isnan(q.truth.t_new_true[~inside]).all()
    d = np.hypot(q.truth.pits.x_mm - c[0], q.truth.pits.y_mm - c[1])
    assert (d + q.truth.pits.radius_mm <= 1500.0 + 1e-6).all()


def test_ut_single_scan_has_noise_everywhere():
    scan, truth = synth.make_scan(diameter_mm=3000.0, pitch=20.0, method="UT", sigma=0.15, seed=4)
    assert scan.meta.method == "UT" and scan.meta.threshold is None
    res = (scan.thickness - truth.t_true)[scan.scanned].astype(np.float64)
    # s.e. of a std from n ~ 12000 draws is ~0.65 %; allow 3 %
    assert np.std(res) == pytest.approx(0.15, rel=0.03)
    assert (scan.thickness[scan.scanned] != np.float32(6.35)).mean() > 0.9
