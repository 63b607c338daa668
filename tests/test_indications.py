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
