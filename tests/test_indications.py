"""Tests of the indication list: labelling, measurements, matching across inspections."""

import numpy as np
import pandas as pd
import pytest
from scipy import ndimage

from scananalyse.errors import InputError
from scananalyse.indications import (INDICATION_COLUMNS, find_indications, gone_indications,
                                     label_indications, match_indications, write_indications_csv)
from scananalyse.scan import SIDE_TOP, SIDE_UNDER

PITCH = 10.0
X0, Y0 = -100.0, 50.0


def random_loss(seed, shape=(120, 150)):
    rng = np.random.default_rng(seed)
    base = ndimage.gaussian_filter(rng.standard_normal(shape), 2.0)
    loss = np.clip(base * 8.0, 0, None).astype(np.float32)
    loss[rng.random(shape) < 0.02] = np.nan
    return loss


def test_labels_match_scipy_8_connectivity():
    loss = random_loss(1)
    rd = 1.0
    df, labels = find_indications(loss, pitch_mm=PITCH, x0=X0, y0=Y0, reporting_depth_mm=rd,
                                  return_labels=True)
    # reference: scipy.ndimage.label with the full 3×3 structure (8-connectivity)
    with np.errstate(invalid="ignore"):
        mask = loss >= rd
    ref, n = ndimage.label(mask, structure=np.ones((3, 3)))
    assert len(df) == n > 20
    idx = np.arange(1, n + 1)
    ref_area = ndimage.sum(mask, ref, idx)
    ref_depth = ndimage.maximum(np.nan_to_num(loss), ref, idx)
    ref_cy, ref_cx = np.array(ndimage.center_of_mass(mask, ref, idx)).T
    ref_rows = sorted(zip(ref_area, np.round(ref_depth, 5), np.round(X0 + PITCH * ref_cx, 6),
                          np.round(Y0 + PITCH * ref_cy, 6)))
    got_rows = sorted(zip(df.n_cells, np.round(df.depth_max_mm, 5), np.round(df.x_mm, 6),
                          np.round(df.y_mm, 6)))
    np.testing.assert_allclose(np.array(got_rows, float), np.array(ref_rows, float), atol=1e-5)
    np.testing.assert_allclose(df.area_m2, df.n_cells * PITCH ** 2 / 1e6)
    # the deepest cell is in the region and carries its maximum
    i = np.rint((df.y_deep_mm - Y0) / PITCH).astype(int)
    j = np.rint((df.x_deep_mm - X0) / PITCH).astype(int)
    assert np.all(labels[i, j] == df.id) and np.allclose(loss[i, j], df.depth_max_mm)


def test_measurements_of_one_region():
    loss = np.zeros((8, 10), np.float32)
    loss[2:4, 3:6] = [[1.5, 2.0, 1.2], [1.1, 3.0, 1.4]]
    side = np.full(loss.shape, SIDE_UNDER, np.int8)
    side[2, 3:6] = SIDE_TOP
    side[3, 3] = SIDE_TOP  # 4 top, 2 under → majority top
    plate = np.full(loss.shape, 7, np.int32)
    plate[3, 5] = 8
    zones = np.ones(loss.shape, np.int32)
    rate = np.full(loss.shape, np.nan, np.float32)
    rate[2, 4] = 0.25
    thick = (6.35 - loss).astype(np.float32)
    df = find_indications(loss, pitch_mm=PITCH, x0=X0, y0=Y0, reporting_depth_mm=1.0, side=side,
                          plate=plate, zone_labels=zones, zone_names={1: "interior"}, rate=rate,
                          thickness=thick)
    assert list(df.columns) == list(INDICATION_COLUMNS)
    row = df.iloc[0]
    # by hand: columns 3..5, rows 2..3; edges half a pitch beyond the cell centres
    assert row.x_min_mm == X0 + 2.5 * PITCH and row.x_max_mm == X0 + 5.5 * PITCH
    assert row.y_min_mm == Y0 + 1.5 * PITCH and row.y_max_mm == Y0 + 3.5 * PITCH
    assert row.x_mm == pytest.approx(X0 + 4 * PITCH) and row.y_mm == pytest.approx(Y0 + 2.5 * PITCH)
    assert row.depth_max_mm == pytest.approx(3.0) and row.t_min_mm == pytest.approx(3.35)
    assert (row.x_deep_mm, row.y_deep_mm) == (X0 + 4 * PITCH, Y0 + 3 * PITCH)
    assert row.n_cells == 6 and row.side == "top" and row.plate == 7 and row.zone == "interior"
    assert row.rate_max_mm_y == pytest.approx(0.25)
    assert row.status == "" and pd.isna(row.old_id)


def test_min_cells_and_empty():
    loss = np.zeros((10, 10), np.float32)
    loss[1, 1] = 2.0
    loss[5:7, 5:7] = 2.0
    lab = label_indications(loss, reporting_depth_mm=1.0, min_cells=2)
    assert lab.max() == 1 and np.count_nonzero(lab) == 4
    empty = find_indications(np.zeros((5, 5), np.float32), pitch_mm=PITCH, x0=0, y0=0,
                             reporting_depth_mm=1.0)
    assert len(empty) == 0 and list(empty.columns) == list(INDICATION_COLUMNS)
    with pytest.raises(InputError, match="reporting_depth_mm"):
        label_indications(loss, reporting_depth_mm=0.0)


def test_diagonal_cells_are_one_region():
    # 8-connectivity: cells touching at a corner belong together (common practice, no source)
    loss = np.zeros((4, 4), np.float32)
    loss[0, 0] = loss[1, 1] = loss[2, 2] = 2.0
    assert label_indications(loss, reporting_depth_mm=1.0).max() == 1


def _pair_maps():
    old = np.zeros((40, 60), np.float32)
    new = np.zeros((40, 60), np.float32)
    old[5:8, 5:8] = 2.0   # A: grows by 0.6 mm
    new[5:8, 5:8] = 2.0
    new[6, 6] = 2.6
    old[5:8, 20:23] = 1.8  # B: unchanged within the noise (+0.1 mm)
    new[5:8, 20:23] = 1.9
    new[20:23, 5:8] = 1.5  # C: new
    old[20:22, 30:32] = 2.0  # D: residual shift of 3 cells, no overlap now
    new[20:22, 34:36] = 3.0
    old[30:33, 50:53] = 2.5  # E: gone (repaired)
    return old, new


def test_match_statuses():
    old, new = _pair_maps()
    kw = dict(pitch_mm=PITCH, x0=0.0, y0=0.0, reporting_depth_mm=1.0, return_labels=True)
    ni, nl = find_indications(new, **kw)
    oi, ol = find_indications(old, **kw)
    g = 0.2828  # k·√(σ² + σ²), k = 2, σ = 0.1 mm (domain.md §3)
    m = match_indications(ni, oi, nl, ol, growth_sigma_mm=g, dt_years=10.0)
    by_pos = {(round(r.x_mm), round(r.y_mm)): r for r in m.itertuples()}
    a = by_pos[(60, 60)]
    b = by_pos[(210, 60)]
    c = by_pos[(60, 210)]
    d = by_pos[(345, 205)]
    assert a.status == "grown" and a.growth_mm == pytest.approx(0.6, abs=1e-5)
    assert a.growth_rate_mm_y == pytest.approx(0.06, abs=1e-6)
    assert b.status == "stable" and b.growth_rate_mm_y == 0.0
    assert c.status == "new" and pd.isna(c.old_id) and np.isnan(c.growth_rate_mm_y)
    # D overlaps nothing; the centroid fallback (≤ 50 mm) finds it 40 mm away
    assert d.status == "grown" and d.depth_old_mm == pytest.approx(2.0)
    gone = gone_indications(oi, m)
    assert len(gone) == 1 and gone.iloc[0].x_mm == pytest.approx(510.0)
    strict = match_indications(ni, oi, nl, ol, growth_sigma_mm=g, dt_years=10.0,
                               max_distance_mm=10.0)
    assert (strict.status == "new").sum() == 2
    with pytest.raises(InputError, match="dt_years"):
        match_indications(ni, oi, nl, ol, growth_sigma_mm=g, dt_years=0.0)


def test_merged_pits_take_the_deepest_old_depth():
    old = np.zeros((10, 20), np.float32)
    new = np.zeros((10, 20), np.float32)
    old[4, 2:5] = 1.5
    old[4, 7:9] = 2.5  # two old pits ...
    new[4, 2:9] = 2.6  # ... merged into one region now
    kw = dict(pitch_mm=PITCH, x0=0.0, y0=0.0, reporting_depth_mm=1.0, return_labels=True)
    ni, nl = find_indications(new, **kw)
    oi, ol = find_indications(old, **kw)
    m = match_indications(ni, oi, nl, ol, growth_sigma_mm=0.28, dt_years=5.0)
    assert len(m) == 1 and m.iloc[0].depth_old_mm == pytest.approx(2.5)
    assert m.iloc[0].status == "stable"  # 0.1 mm deeper: within the noise


def test_write_csv(tmp_path):
    old, new = _pair_maps()
    kw = dict(pitch_mm=PITCH, x0=0.0, y0=0.0, reporting_depth_mm=1.0, return_labels=True)
    ni, nl = find_indications(new, **kw)
    oi, ol = find_indications(old, **kw)
    m = match_indications(ni, oi, nl, ol, growth_sigma_mm=0.28, dt_years=10.0)
    p = tmp_path / "indications.csv"
    write_indications_csv(m, p)
    back = pd.read_csv(p)
    # design.md §3.5: id, position, deepest loss, minimum thickness, area, side, zone,
    # growth rate, status
    for col in ("id", "x_mm", "y_mm", "depth_max_mm", "t_min_mm", "area_m2", "side", "zone",
                "growth_rate_mm_y", "status"):
        assert col in back.columns
    assert set(back.status) == {"new", "grown", "stable"}
    np.testing.assert_allclose(back.depth_max_mm, m.depth_max_mm, atol=1e-4)
    assert list(tmp_path.iterdir()) == [p]  # no temporary file left


# ---------------------------------------------------------------- synthetic truth
synth = pytest.importorskip("scananalyse.synth")
register = pytest.importorskip("scananalyse.register")


def _reading(scan, x, y):
    i = np.rint((np.asarray(y) - scan.y0) / scan.pitch).astype(int)
    j = np.rint((np.asarray(x) - scan.x0) / scan.pitch).astype(int)
    ok = (i >= 0) & (i < scan.shape[0]) & (j >= 0) & (j < scan.shape[1])
    v = np.full(len(i), np.nan)
    v[ok] = scan.thickness[i[ok], j[ok]]
    return v, i, j


@pytest.mark.parametrize("seed, diameter", [(0, 8000.0), (4, 14000.0)])
def test_matched_indications_on_synthetic_pairs(seed, diameter):
    from scananalyse.indications import old_indications
    from scananalyse.rates import compute_rates

    p = synth.make_pair(seed=seed, diameter_mm=diameter)
    tr = p.truth
    T = register.RigidTransform(tr.rotation_deg, tr.dx_mm, tr.dy_mm)  # the TRUE transform
    oon = register.resample_onto(p.old, p.new, T)
    r = compute_rates(p.new, oon, None)
    rd = p.new.meta.threshold
    new = p.new
    ni, nl = find_indications(r.loss, pitch_mm=new.pitch, x0=new.x0, y0=new.y0,
                              reporting_depth_mm=rd, return_labels=True)
    oi, ol = old_indications(p.old, new, T, reporting_depth_mm=rd)
    m = match_indications(ni, oi, nl, ol, growth_sigma_mm=r.growth_sigma, dt_years=r.dt_years)
    # pits present in both scans (synthetic truth): not repaired, and each scan's own reading
    # at the pit centre shows reportable loss
    pits = tr.pits
    xo, yo = T.inverse().apply(pits.x_mm.to_numpy(), pits.y_mm.to_numpy())
    vo, _, _ = _reading(p.old, xo, yo)
    vn, i, j = _reading(new, pits.x_mm.to_numpy(), pits.y_mm.to_numpy())
    nom = new.meta.nominal
    with np.errstate(invalid="ignore"):
        present = (pits.repair.to_numpy() < 0) & pits.seen_old.to_numpy() & \
            pits.seen_new.to_numpy() & (nom - vo >= rd) & (nom - vn >= rd)
    assert present.sum() >= 30
    mi = m.set_index("id")
    oix = oi.set_index("id")
    good = 0
    for k in np.flatnonzero(present):
        lab = nl[i[k], j[k]]
        if lab == 0 or pd.isna(mi.loc[lab, "old_id"]):
            continue
        o = oix.loc[int(mi.loc[lab, "old_id"])]
        # the right older region: its centroid within the pit radius + 2 cells
        if np.hypot(o.x_mm - pits.x_mm.iloc[k], o.y_mm - pits.y_mm.iloc[k]) <= \
                pits.radius_mm.iloc[k] + 2 * new.pitch:
            good += 1
    share = good / present.sum()
    print(f"seed {seed}: {good} of {present.sum()} pits present in both matched ({100 * share:.1f} %)"
          f"; statuses {m.status.value_counts().to_dict()}")
    assert share >= 0.95  # issue 4 accuracy target


def test_region_max_matches_scipy_ndimage():
    # the rate column added after the list: scipy.ndimage.maximum over the same labels is the
    # reference (NaN cells skipped, as fmax does; a region of NaN only gives NaN)
    from scipy import ndimage

    from scananalyse.indications import region_max

    rng = np.random.default_rng(12)
    labels, n = ndimage.label(rng.random((120, 90)) < 0.3)
    v = rng.normal(0.2, 0.1, labels.shape).astype(np.float32)
    v[rng.random(v.shape) < 0.2] = np.nan
    got = region_max(labels, v)
    filled = np.where(np.isnan(v), -np.inf, v)
    ref = np.asarray(ndimage.maximum(filled, labels, index=np.arange(1, n + 1)), dtype=float)
    ref[~np.isfinite(ref)] = np.nan
    assert got.shape == (n,) and n > 20
    np.testing.assert_array_equal(got, ref)


# ------------------------------------------- repaired / partly unscanned / assumed rates
def _flag_case():
    """Three hand-made indications: A inside a repaired area, B next to an unscanned seam
    cell, C in fully scanned ground."""
    new = np.zeros((30, 40), np.float32)
    new[5:8, 5:8] = 1.5     # A
    new[15:18, 10:13] = 2.0  # B
    new[20:23, 30:33] = 1.8  # C
    old = np.zeros_like(new)
    old[5:8, 5:8] = 2.5     # A was deeper before the repair
    old[15:18, 10:13] = 2.0
    old[20:23, 30:33] = 1.0
    kw = dict(pitch_mm=PITCH, x0=0.0, y0=0.0, reporting_depth_mm=1.0, return_labels=True)
    ni, nl = find_indications(new, **kw)
    oi, ol = find_indications(old, **kw)
    m = match_indications(ni, oi, nl, ol, growth_sigma_mm=0.28, dt_years=10.0)
    cov_new = np.ones(new.shape, bool)
    cov_old = np.ones(new.shape, bool)
    cov_new[:, 13] = False  # an unscanned seam band beside B (8-connected to its cells)
    repaired = np.zeros(new.shape, bool)
    repaired[4:9, 4:9] = True
    return m, nl, cov_new, cov_old, repaired


def test_flag_repaired_and_partly_unscanned():
    import datetime as dt

    from scananalyse.indications import flag_indications

    m, nl, cov_new, cov_old, repaired = _flag_case()
    assert list(m.status) == ["stable", "stable", "grown"]  # A looks stable (−1 mm) before
    f = flag_indications(m, nl, covered_new=cov_new, covered_old=cov_old, dt_years=10.0,
                         repaired=repaired, repair_dates=[(repaired, dt.date(2021, 5, 1))],
                         inspected=dt.date(2026, 5, 1))
    a, b, c = f.itertuples()
    # by hand: A regrew 1.5 mm in the 5.0 years since the repair of 2021-05-01
    assert a.status == "repaired" and a.repair_date == "2021-05-01"
    assert a.regrowth_mm == pytest.approx(1.5) and a.regrowth_rate_mm_y == pytest.approx(0.3, rel=1e-3)
    assert np.isnan(a.growth_rate_mm_y) and a.growth_mm == pytest.approx(-1.0)
    assert b.status == "partly unscanned" and b.old_id == 2
    assert c.status == "grown" and c.repair_date == "" and np.isnan(c.regrowth_mm)
    # no date: the regrowth over the whole interval, a lower bound
    f2 = flag_indications(m, nl, covered_new=cov_new, covered_old=cov_old, dt_years=10.0,
                          repaired=repaired)
    assert f2.status.iloc[0] == "repaired" and f2.repair_date.iloc[0] == ""
    assert f2.regrowth_rate_mm_y.iloc[0] == pytest.approx(0.15)
    # the older scan's coverage counts too; outside the floor a gap does not cut
    cov_old2 = np.ones_like(cov_old)
    cov_old2[23, 29] = False  # diagonal neighbour of C's corner cell (22, 30)
    f3 = flag_indications(m, nl, covered_new=np.ones_like(cov_new), covered_old=cov_old2,
                          dt_years=10.0)
    assert list(f3.status) == ["stable", "stable", "partly unscanned"]
    floor = np.ones_like(cov_new)
    floor[23, 29] = False
    f4 = flag_indications(m, nl, covered_new=np.ones_like(cov_new), covered_old=cov_old2,
                          dt_years=10.0, floor=floor)
    assert list(f4.status) == ["stable", "stable", "grown"]
    with pytest.raises(InputError, match="inspected"):
        flag_indications(m, nl, covered_new=cov_new, covered_old=cov_old, dt_years=10.0,
                         repaired=repaired, repair_dates=dt.date(2021, 5, 1))
    with pytest.raises(InputError, match="covered_old"):
        flag_indications(m, nl, covered_new=cov_new, covered_old=cov_old[:5], dt_years=10.0)


def test_flag_grid_edge_inside_the_floor():
    # an indication reaching the edge of the grid where the floor goes on is cut by the edge
    # of the scan's coverage (synthetic truth: the region is drawn on the border)
    from scananalyse.indications import flag_indications

    loss = np.zeros((10, 10), np.float32)
    loss[0:2, 4:6] = 2.0
    ind, lab = find_indications(loss, pitch_mm=PITCH, x0=0.0, y0=0.0, reporting_depth_mm=1.0,
                                return_labels=True)
    ind["status"] = "new"
    ones = np.ones(loss.shape, bool)
    f = flag_indications(ind, lab, covered_new=ones, covered_old=ones, dt_years=5.0)
    assert f.status.iloc[0] == "partly unscanned"
    floor = ones.copy()
    floor[0] = False  # the grid's first row lies outside the floor: nothing beyond it
    f = flag_indications(ind, lab, covered_new=ones, covered_old=ones, dt_years=5.0, floor=floor)
    assert f.status.iloc[0] == "new"


def _rates_table():
    """A hand-made matched list: grown indications of two zones and sides, and new ones."""
    rows = []
    for k, r in enumerate([0.10, 0.12, 0.14, 0.16, 0.20, 0.30]):   # zone z1, under: 6 grown
        rows.append(("z1", "under", "grown", r, 2.0, 1))
    rows.append(("z2", "under", "grown", 0.50, 2.0, 1))               # zone z2, under: 1 grown
    rows.append(("z1", "top", "stable", 0.05, 2.0, 1))                # top: no grown, 1 measured
    rows.append(("z1", "under", "new", 0.08, 0.5, None))              # new in z1 under
    rows.append(("z2", "under", "new", 0.08, 0.5, None))              # new in z2 under
    rows.append(("z1", "top", "new", 0.01, 0.2, None))                # new, top
    rows.append(("z3", "unknown", "new", 0.02, 0.4, None))            # nothing on its side
    rows.append(("z1", "under", "new", 0.05, 3.0, None))              # deep new: late start governs
    df = pd.DataFrame(rows, columns=["zone", "side", "status", "rate_max_mm_y", "depth_max_mm",
                                     "old_id"])
    df["old_id"] = pd.array(df["old_id"], dtype="Int64")
    df["id"] = np.arange(1, len(df) + 1)
    df["growth_rate_mm_y"] = np.nan
    return df


def test_new_indication_rates_rule_and_fallbacks():
    from scananalyse.indications import new_indication_rates

    df = _rates_table()
    out = new_indication_rates(df, dt_years=10.0, quantile=0.9, min_grown=5, late_start_fraction=0.25)
    assert list(out.index) == list(df.index)
    assert (out.rate_basis[df.status != "new"] == "measured").all()
    assert np.allclose(out.rate_assumed_mm_y[:8], df.rate_max_mm_y[:8])
    # numpy's default (linear) quantile by hand: p90 of 0.10 .. 0.30 (6 values) = 0.25
    assert out.rate_assumed_mm_y[8] == pytest.approx(0.25)
    assert out.rate_basis[8] == "new: p90 of grown (z1, under, n=6)"
    # z2 has one grown: the floor's 7 grown underside rates; p90 = 0.30 + 0.4·(0.50 − 0.30)
    assert out.rate_assumed_mm_y[9] == pytest.approx(0.38)
    assert out.rate_basis[9] == "new: p90 of grown (floor fallback, under, n=7)"
    # top: no grown on that side, the greatest measured top rate is 0.05 < 0.2 mm ÷ 2.5 y = 0.08
    assert out.rate_assumed_mm_y[10] == pytest.approx(0.08)
    assert out.rate_basis[10] == "new: late start (depth ÷ 2.5 y)"
    out_b = new_indication_rates(df, dt_years=10.0, late_start_fraction=1.0)
    assert out_b.rate_assumed_mm_y[10] == pytest.approx(0.05)
    assert out_b.rate_basis[10] == "new: greatest measured rate (floor fallback, top, n=1)"
    # nothing measured on its side: its own bound or the late start, 0.4 mm ÷ 10 y = 0.04
    assert out_b.rate_assumed_mm_y[11] == pytest.approx(0.04)
    assert out_b.rate_basis[11].startswith("new: late start")
    # 3 mm in the last quarter of 10 years: 1.2 mm/y
    assert out.rate_assumed_mm_y[12] == pytest.approx(1.2)
    # never below the indication's own bound
    assert (out.rate_assumed_mm_y[df.status == "new"] >= df.rate_max_mm_y[df.status == "new"]).all()
    with pytest.raises(InputError, match="quantile"):
        new_indication_rates(df, dt_years=10.0, quantile=0.0)


def test_partly_unscanned_and_repaired_rates():
    from scananalyse.indications import new_indication_rates

    df = _rates_table()
    df.loc[1, "status"] = "partly unscanned"          # matched, cut by a seam
    df.loc[8, "status"] = "partly unscanned"          # unmatched, cut by the older coverage
    df["regrowth_rate_mm_y"] = np.nan
    df["repair_date"] = ""
    df.loc[2, ["status", "regrowth_rate_mm_y", "repair_date"]] = ["repaired", 0.4, "2020-01-01"]
    df.loc[3, ["status", "regrowth_rate_mm_y"]] = ["repaired", 0.02]
    out = new_indication_rates(df, dt_years=10.0)
    # matched: no late start (it was there before), the greater of its own rate and the
    # population term; 4 grown underside indications are left (< min_grown = 5): the greatest
    # measured underside rate, 0.50
    assert out.rate_assumed_mm_y[1] == pytest.approx(0.5)
    assert out.rate_basis[1] == ("partly unscanned: greatest measured rate (floor fallback, under, "
                                 "n=4)")
    assert out.rate_basis[8].startswith("partly unscanned: ")
    assert out.rate_assumed_mm_y[2] == pytest.approx(0.4)
    assert out.rate_basis[2] == "repaired 2020-01-01: regrowth since the repair"
    assert out.rate_basis[3].startswith("repaired, date unknown: ")
    assert out.rate_assumed_mm_y[3] >= 2.0 / 2.5


def test_apply_indication_rates_only_raises():
    from scananalyse.indications import apply_indication_rates, assumed_rate_note

    labels = np.zeros((6, 8), np.int32)
    labels[1:3, 1:3] = 1   # new, under
    labels[4, 4:7] = 2     # measured, top
    labels[1, 6] = 3       # new, unknown side -> unknown_side
    ind = pd.DataFrame({"id": [1, 2, 3], "side": ["under", "top", "unknown"],
                        "status": ["new", "grown", "new"],
                        "rate_assumed_mm_y": [0.3, 0.9, 0.2],
                        "rate_basis": ["new: late start (depth ÷ 2.5 y)", "measured", "new: x"]})
    top = np.full(labels.shape, 0.05, np.float32)
    under = np.full(labels.shape, 0.05, np.float32)
    under[1, 1] = 0.5      # faster than the assumed rate: kept
    under[2, 2] = np.nan   # no rate (excluded): takes the assumed rate
    t2, u2 = apply_indication_rates(top, under, labels, ind, unknown_side="top")
    assert u2[1, 1] == pytest.approx(0.5) and u2[2, 2] == pytest.approx(0.3)
    assert u2[1, 2] == pytest.approx(0.3) and t2[1, 1] == pytest.approx(0.05)
    assert np.all(t2[4, 4:7] == np.float32(0.05))  # measured: left as measured
    assert t2[1, 6] == pytest.approx(0.2) and u2[1, 6] == pytest.approx(0.05)
    assert under[2, 2] != under[2, 2] and top[1, 6] == np.float32(0.05)  # inputs untouched
    assert t2.dtype == np.float32
    note = assumed_rate_note(ind)
    assert note.startswith("2 indications (2 new) have no measured rate")
    assert assumed_rate_note(ind.iloc[[1]]) is None


def test_measure_indications_equals_find_indications():
    # the same regions measured from a given label map (label_indications' own)
    loss = random_loss(3)
    df, lab = find_indications(loss, pitch_mm=PITCH, x0=X0, y0=Y0, reporting_depth_mm=1.0,
                               return_labels=True)
    from scananalyse.indications import measure_indications

    again = measure_indications(lab, loss, pitch_mm=PITCH, x0=X0, y0=Y0)
    pd.testing.assert_frame_equal(df, again)
    with pytest.raises(InputError, match="labels"):
        measure_indications(lab[:5], loss, pitch_mm=PITCH, x0=X0, y0=Y0)
