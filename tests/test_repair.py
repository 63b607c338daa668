"""Tests of scananalyse.repair: which cells need repair, patch-plate planning under the
patch rules, re-assessment maps, the engineer's own patch sets (CSV / DXF).

Rule values: API 653 §9.10.1.1 and Fig. 9.13 as quoted in shared/domain.md §6
(300 mm minimum when overlapping a seam or another patch, 150 mm otherwise,
50 mm beyond the corrosion, fillet welds 50 mm from existing bottom welds).
Steel density 7850 kg/m³: engineering handbooks, carbon steel.
"""

from __future__ import annotations

import math
import time

import ezdxf
import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from matplotlib.path import Path as MplPath
from scipy.spatial import cKDTree

from scananalyse import repair
from scananalyse.errors import InputError, ScanWarning
from scananalyse.rules import get_ruleset

RULES = get_ruleset("api653")
M = 50.0      # 2 in beyond the corrosion [seen: API 653 §9.10.1.1, domain.md §6]
C = 50.0      # fillet welds 2 in from existing welds [seen: API 653 Fig. 9.13, domain.md §6]
MIN_SMALL = 150.0   # 6 in [seen: API 653 §9.10.1.1]
MIN_OVER = 300.0    # 12 in [seen: API 653 §9.10.1.1]
RHO = 7850.0        # carbon steel, engineering handbooks (common practice, no single source)


def test_rule_values_are_the_published_ones():
    # the planner reads these from the rule set; check the set says what domain.md §6 says
    assert RULES.v("patch_extend_beyond_mm") == M
    assert RULES.v("patch_weld_clearance_mm") == C
    assert RULES.v("patch_min_size_mm") == MIN_SMALL
    assert RULES.v("patch_min_size_overlap_mm") == MIN_OVER
    assert RULES.v("steel_density_kg_m3") == RHO


# ---------------------------------------------------------------------------
# independent geometry used by the checks below
# ---------------------------------------------------------------------------
def outline_samples(xa, ya, xb, yb, r, step=0.25):
    """Dense points, in order round the outline, of a rounded rectangle (independent of repair.py)."""
    edges = ((xa + r, ya, xb - r, ya), (xb, ya + r, xb, yb - r),
             (xb - r, yb, xa + r, yb), (xa, yb - r, xa, ya + r))
    arcs = ((xb - r, ya + r, -90), (xb - r, yb - r, 0), (xa + r, yb - r, 90), (xa + r, ya + r, 180))
    pts = []
    for (x1, y1, x2, y2), (cx, cy, a0) in zip(edges, arcs):
        n = max(2, int(math.hypot(x2 - x1, y2 - y1) / step) + 1)
        t = np.linspace(0, 1, n)
        pts.append(np.column_stack([x1 + t * (x2 - x1), y1 + t * (y2 - y1)]))
        if r > 0:
            a = np.radians(np.linspace(a0, a0 + 90, 721))
            pts.append(np.column_stack([cx + r * np.cos(a), cy + r * np.sin(a)]))
    return np.concatenate(pts)


def rect_gap(a, b):
    dx = max(0.0, b[0] - a[2], a[0] - b[2])
    dy = max(0.0, b[1] - a[3], a[1] - b[3])
    return math.hypot(dx, dy)


def span_gap(a0, a1, b0, b1):
    return max(0.0, b0 - a1, a0 - b1)


# ---------------------------------------------------------------------------
# cells needing repair
# ---------------------------------------------------------------------------
def test_cells_needing_repair_formula():
    # criterion t - (r_top + r_under)*target < MRT (domain.md §6), hand-worked:
    t = np.array([[6.0, 4.0, 3.0, np.nan, 2.0, 5.0]], dtype=np.float32)
    rt = np.array([[0.1, 0.05, 0.0, 0.5, np.nan, -0.3]], dtype=np.float32)
    ru = np.array([[0.2, 0.1, 0.0, 0.5, np.nan, 0.0]], dtype=np.float32)
    got = repair.cells_needing_repair(t, rt, ru, mrt_mm=2.54, target_years=10.0)
    # 6 - 0.3*10 = 3.0 >= 2.54 -> no; 4 - 0.15*10 = 2.5 < 2.54 -> yes; 3 - 0 = 3 -> no;
    # NaN thickness never; 2.0 already below MRT with unknown rates -> yes;
    # 5 with a negative top rate counted as 0 -> 5 -> no.
    assert got.tolist() == [[False, True, False, False, True, False]]
    # per-cell MRT (e.g. a critical-zone minimum of 3.2 mm at the third cell)
    mrt = np.array([[2.54, 2.54, 3.2, 2.54, 2.54, 2.54]])
    assert repair.cells_needing_repair(t, rt, ru, mrt_mm=mrt, target_years=10.0)[0, 2]
    # the code's way: every scanned cell thinner than the repair-to thickness
    got = repair.cells_needing_repair(t, rt, ru, mrt_mm=2.54, target_years=10.0, repair_to_mm=4.445)
    assert got.tolist() == [[False, True, True, False, True, False]]
    with pytest.raises(InputError, match="repair_to_mm"):
        repair.cells_needing_repair(t, rt, ru, mrt_mm=2.54, target_years=10, repair_to_mm=-1)


# ---------------------------------------------------------------------------
# areas and masses
# ---------------------------------------------------------------------------
def test_area_and_mass_hand_arithmetic():
    # 300 x 300 mm plate, 50 mm corners, 6.35 mm thick, 7850 kg/m3:
    # area = 0.3*0.3 - (4 - pi)*0.05^2 = 0.09 - 0.0021460184 = 0.0878539816 m2
    # mass = 0.0878539816 m2 * 0.00635 m * 7850 kg/m3 = 4.37929 kg
    area = repair.rounded_rect_area_mm2(300.0, 300.0, 50.0) / 1e6
    assert area == pytest.approx(0.0878539816, rel=1e-9)
    assert repair.patch_mass_kg(area, 6.35, density_kg_m3=7850.0) == pytest.approx(4.37929, rel=1e-5)
    # a circle of radius r is a rounded square of side 2r and radius r: area pi r^2
    assert repair.rounded_rect_area_mm2(200.0, 200.0, 100.0) == pytest.approx(math.pi * 100 ** 2)


def test_single_cell_gets_the_small_minimum_and_its_mass():
    nd = np.zeros((60, 60), dtype=bool)
    nd[30, 30] = True                                # cell centre (300, 300), pitch 10
    df = repair.plan_patches(nd, x0=0.0, y0=0.0, pitch=10.0, rules=RULES)
    assert len(df) == 1
    p = df.iloc[0]
    # cell 295..305 + 50 each side = 110 mm, grown to the 150 mm minimum about the centre
    assert (p.x_min_mm, p.y_min_mm, p.x_max_mm, p.y_max_mm) == pytest.approx((225, 225, 375, 375))
    assert p.corner_radius_mm == 50.0 and p.thickness_mm == 6.35
    # 0.15^2 - (4 - pi)*0.05^2 = 0.0225 - 0.00214601837 = 0.020353981633 m2; x 0.00635 x 7850
    assert p.area_m2 == pytest.approx(0.02035398163, rel=1e-9)
    assert p.mass_kg == pytest.approx(0.02035398163 * 0.00635 * 7850, rel=1e-9)
    assert p.n_cells_covered == 1 and p["flags"] == ""
    # always the 300 mm minimum when small patches are not allowed
    df = repair.plan_patches(nd, x0=0.0, y0=0.0, pitch=10.0, rules=RULES, allow_small=False)
    assert df.iloc[0].x_max_mm - df.iloc[0].x_min_mm == pytest.approx(300.0)


def test_rule_values_come_from_the_rule_set():
    nd = np.zeros((60, 60), dtype=bool)
    nd[30, 30] = True
    rules = get_ruleset("api653", {"patch_min_size_mm": 200.0, "patch_corner_radius_mm": 25.0,
                                   "patch_thickness_mm": 8.0, "steel_density_kg_m3": 7800.0})
    p = repair.plan_patches(nd, x0=0.0, y0=0.0, pitch=10.0, rules=rules).iloc[0]
    assert p.x_max_mm - p.x_min_mm == pytest.approx(200.0)
    assert p.corner_radius_mm == 25.0 and p.thickness_mm == 8.0
    area = (0.2 * 0.2 - (4 - math.pi) * 0.025 ** 2)
    assert p.mass_kg == pytest.approx(area * 0.008 * 7800.0, rel=1e-9)


# ---------------------------------------------------------------------------
# merging, seams, critical zone
# ---------------------------------------------------------------------------
def test_patches_closer_than_the_clearance_merge_and_others_stay_apart():
    nd = np.zeros((80, 120), dtype=bool)
    nd[40, 20] = True      # patch x 125..275 (150 mm about x = 200)
    nd[40, 39] = True      # patch x 315..465: gap 40 mm < 50 -> merge
    nd[40, 80] = True      # patch x 725..875: far away
    df = repair.plan_patches(nd, x0=0.0, y0=0.0, pitch=10.0, rules=RULES)
    assert len(df) == 2
    big = df.iloc[int(np.argmin(df.x_min_mm))]
    assert big.x_min_mm == pytest.approx(125.0) and big.x_max_mm == pytest.approx(465.0)
    assert big.n_cells_covered == 2
    nd2 = np.zeros((80, 120), dtype=bool)
    nd2[40, 20] = True
    nd2[40, 40] = True     # patch x 325..475: gap exactly 50 mm -> allowed, stays separate
    assert len(repair.plan_patches(nd2, x0=0.0, y0=0.0, pitch=10.0, rules=RULES)) == 2


def test_seam_alongside_an_edge_is_crossed_with_the_large_minimum():
    nd = np.zeros((80, 80), dtype=bool)
    nd[40, 40] = True                               # cell (400, 400): patch 325..475
    seam = [(0.0, 500.0, 800.0, 500.0)]             # horizontal weld 25 mm above the top edge
    df = repair.plan_patches(nd, x0=0.0, y0=0.0, pitch=10.0, rules=RULES, seams=seam)
    p = df.iloc[0]
    assert p["flags"] == ""
    assert p.y_min_mm < 500.0 < p.y_max_mm          # now overlaps the seam ...
    assert min(p.x_max_mm - p.x_min_mm, p.y_max_mm - p.y_min_mm) >= MIN_OVER - 1e-9   # ... at >= 300 mm
    assert abs(p.y_max_mm - 500.0) >= C and abs(p.y_min_mm - 500.0) >= C
    # without fixing, the same patch is flagged
    df = repair.plan_patches(nd, x0=0.0, y0=0.0, pitch=10.0, rules=RULES, seams=seam, fix_clearance=False)
    assert df.iloc[0]["flags"] == repair.FLAG_WELD_CLEARANCE
    # a seam crossing the patch squarely is an overlap, not a clearance problem
    df = repair.plan_patches(nd, x0=0.0, y0=0.0, pitch=10.0, rules=RULES, seams=[(400.0, 0.0, 400.0, 800.0)])
    p = df.iloc[0]
    assert p["flags"] == "" and p.x_max_mm - p.x_min_mm == pytest.approx(MIN_OVER)


def test_critical_zone_patches_are_flagged():
    nd = np.zeros((60, 60), dtype=bool)
    nd[30, 5] = True
    nd[30, 40] = True
    crit = np.zeros((60, 60), dtype=bool)
    crit[:, :3] = True                              # a strip of critical cells at x <= 20 mm
    labels = np.where(crit, 0, 1)
    df = repair.plan_patches(nd, x0=0.0, y0=0.0, pitch=10.0, rules=RULES, zone_labels=labels,
                             zone_names=["critical", "interior"])
    assert len(df) == 2
    assert sorted(df["flags"].tolist()) == ["", repair.FLAG_CRITICAL]
    assert set(df.zone) == {"interior"}             # the corrosion itself lies in the interior
    # a thicker plate than the critical-zone maximum (1/4 in) gets a second flag
    df = repair.plan_patches(nd, x0=0.0, y0=0.0, pitch=10.0, rules=RULES, critical_mask=crit,
                             patch_thickness_mm=9.53)
    crit_flags = [f for f in df["flags"] if f]
    assert crit_flags == [f"{repair.FLAG_CRITICAL};{repair.FLAG_CRITICAL_THICKNESS}"]


def test_seams_from_plate_layer_recover_the_layout():
    # synthetic ground truth: plates 600 x 200 mm (60 x 20 cells of 10 mm), rows staggered by
    # 200 mm, a 2-cell unscanned band (-1) along every row seam
    ny, nx = 60, 150
    i = np.arange(ny)[:, None]
    j = np.arange(nx)[None, :]
    row = i // 20
    plate = (row * 100 + (j + row * 20) // 60).astype(np.int32)
    plate[(np.arange(ny) % 20) < 2, :] = -1
    segs = repair.seams_from_plate(plate, x0=0.0, y0=0.0, pitch=10.0)
    horiz = segs[np.isclose(segs[:, 1], segs[:, 3])]
    vert = segs[np.isclose(segs[:, 0], segs[:, 2])]
    # row seams: between row 19 and the band 20..21 -> mid-gap at y = (19 + 22)/2 * 10 = 205 mm
    assert sorted(np.round(horiz[:, 1], 6)) == [205.0, 405.0]
    assert np.allclose(horiz[:, 0], -5.0) and np.allclose(horiz[:, 2], 1495.0)
    # plate ends: x boundaries at multiples of 600 mm shifted by -200*row, between cells
    xs = {(round(s[0], 6), round(min(s[1], s[3]), 6)) for s in vert}
    expected = set()
    for r in range(3):
        for k in range(1, 4):
            xb = k * 600 - r * 200
            if 0 < xb < nx * 10:
                y_lo = r * 200 + 20 - 5                 # lower edge of the plate row's first scanned row
                expected.add((xb - 5.0, float(y_lo)))
    assert xs == expected


# ---------------------------------------------------------------------------
# the property test: the proposal obeys every patch rule
# ---------------------------------------------------------------------------
@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2 ** 32 - 1), ny=st.integers(12, 50), nx=st.integers(12, 50),
       pitch=st.sampled_from([5.0, 10.0, 25.0]), n_blobs=st.integers(0, 7),
       n_seams=st.integers(0, 3), crit_cols=st.integers(0, 4))
def test_plan_obeys_every_patch_rule(seed, ny, nx, pitch, n_blobs, n_seams, crit_cols):
    rng = np.random.default_rng(seed)
    x0, y0 = float(rng.uniform(-500, 500)), float(rng.uniform(-500, 500))
    nd = np.zeros((ny, nx), dtype=bool)
    for _ in range(n_blobs):
        ci, cj = rng.integers(0, ny), rng.integers(0, nx)
        hi, hj = rng.integers(0, 4, size=2)
        blob = rng.random((2 * hi + 1, 2 * hj + 1)) < 0.7
        sub = nd[max(0, ci - hi):ci + hi + 1, max(0, cj - hj):cj + hj + 1]
        sub |= blob[:sub.shape[0], :sub.shape[1]]
    W, H = nx * pitch, ny * pitch
    seams = []
    for _ in range(n_seams):   # axis-aligned welds, whole or part of the grid
        if rng.random() < 0.5:
            y = y0 + rng.uniform(-pitch, H)
            a, b = sorted(rng.uniform(x0 - 100, x0 + W + 100, size=2))
            seams.append((a, y, b, y))
        else:
            x = x0 + rng.uniform(-pitch, W)
            a, b = sorted(rng.uniform(y0 - 100, y0 + H + 100, size=2))
            seams.append((x, a, x, b))
    crit = np.zeros((ny, nx), dtype=bool)
    crit[:, :crit_cols] = True

    df = repair.plan_patches(nd, x0=x0, y0=y0, pitch=pitch, rules=RULES, seams=seams or None,
                             critical_mask=crit)
    assert list(df.columns) == repair.PATCH_COLUMNS
    if not nd.any():
        assert len(df) == 0
        return
    rects = df[["x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm"]].to_numpy()
    rads = df.corner_radius_mm.to_numpy()
    flags = [set(f.split(";")) - {""} for f in df["flags"]]
    for f in flags:
        assert f <= {repair.FLAG_CRITICAL, repair.FLAG_WELD_CLEARANCE}

    # every marked cell is inside a patch, its square at least M from the outline
    # (for a convex outline the nearest point of the square is one of its corners)
    ii, jj = np.nonzero(nd)
    cx, cy = x0 + jj * pitch, y0 + ii * pitch
    h = pitch / 2
    corners = np.concatenate([np.column_stack([cx + sx, cy + sy]) for sx in (-h, h) for sy in (-h, h)])
    owner = np.full(len(cx), -1)
    for k, (r, rad) in enumerate(zip(rects, rads)):
        ring = outline_samples(*r, rad)
        inside = MplPath(ring).contains_points(corners, radius=-1e-9).reshape(4, -1).all(axis=0)
        owner[inside] = k
    assert np.all(owner >= 0), "a marked cell is not covered"
    for k, (r, rad) in enumerate(zip(rects, rads)):
        sel = owner == k
        if not sel.any():
            continue
        ring = outline_samples(*r, rad)
        pts = np.concatenate([np.column_stack([cx[sel] + sx, cy[sel] + sy]) for sx in (-h, h) for sy in (-h, h)])
        d, _ = cKDTree(ring).query(pts)
        # sampling 0.25 mm apart overstates a distance of 50 mm by < 0.25^2/(8*50) mm
        assert d.min() >= M - 1e-6
    assert int(df.n_cells_covered.sum()) == int(nd.sum())

    # sizes: >= 150 mm, and >= 300 mm where a seam passes through the patch
    for r, f in zip(rects, flags):
        size = min(r[2] - r[0], r[3] - r[1])
        assert size >= MIN_SMALL - 1e-9
        through = any((s[1] == s[3] and r[1] < s[1] < r[3] and s[0] < r[2] and s[2] > r[0]) or
                      (s[0] == s[2] and r[0] < s[0] < r[2] and s[1] < r[3] and s[3] > r[1])
                      for s in seams)
        if through:
            assert size >= MIN_OVER - 1e-9

    # patch welds at least C apart (no overlaps)
    for a in range(len(rects)):
        for b in range(a + 1, len(rects)):
            assert rect_gap(rects[a], rects[b]) >= C - 1e-6

    # weld clearance to seams running alongside an edge, unless flagged
    for r, f in zip(rects, flags):
        if repair.FLAG_WELD_CLEARANCE in f:
            continue
        for s in seams:
            if s[1] == s[3]:      # horizontal seam vs bottom and top edges
                for ye in (r[1], r[3]):
                    assert math.hypot(s[1] - ye, span_gap(s[0], s[2], r[0], r[2])) >= C - 1e-6
            else:
                for xe in (r[0], r[2]):
                    assert math.hypot(s[0] - xe, span_gap(s[1], s[3], r[1], r[3])) >= C - 1e-6

    # critical-zone flag exactly where a critical cell's square meets the patch
    for r, f in zip(rects, flags):
        ci_, cj_ = np.nonzero(crit)
        ccx, ccy = x0 + cj_ * pitch, y0 + ci_ * pitch
        touch = bool(np.any((ccx + h > r[0]) & (ccx - h < r[2]) & (ccy + h > r[1]) & (ccy - h < r[3])))
        assert (repair.FLAG_CRITICAL in f) == touch

    # the checker agrees with the planner
    ck = repair.check_patch_rules(df, x0=x0, y0=y0, pitch=pitch, rules=RULES, seams=seams or None,
                                  critical_mask=crit, needs=nd)
    assert ck["flags"].tolist() == df["flags"].tolist()


# ---------------------------------------------------------------------------
# the floor as repaired
# ---------------------------------------------------------------------------
def _one_patch(xa, ya, xb, yb, r=0.0, t=6.35, pid="P001"):
    return pd.DataFrame({"patch": [pid], "zone": [""], "x_min_mm": [xa], "y_min_mm": [ya],
                         "x_max_mm": [xb], "y_max_mm": [yb], "corner_radius_mm": [r],
                         "thickness_mm": [t]})


def test_apply_patches_semantics():
    t = np.full((10, 10), 4.0, dtype=np.float32)
    t[5, 5] = np.nan                                # unscanned under the patch
    rt = np.full_like(t, 0.05)
    ru = np.full_like(t, 0.2)
    p = _one_patch(15.0, 15.0, 75.0, 75.0, r=20.0, t=6.35)   # cell centres 20..70 inside
    t2, rt2, ru2, cov = repair.apply_patches(t, rt, ru, p, x0=0.0, y0=0.0, pitch=10.0)
    # corners cut by the 20 mm radius: centre (20, 20) lies 5*sqrt(2) = 7.1 mm from the arc
    # centre (35, 35)?  No: distance sqrt(15^2+15^2) = 21.2 > 20 -> outside
    assert not cov[2, 2] and cov[2, 3] and cov[3, 3]
    assert cov.sum() == 36 - 4
    assert np.all(t2[cov & np.isfinite(t)] == np.float32(6.35))
    assert np.isnan(t2[5, 5])                        # still unscanned
    assert np.all(t2[~cov] == t[~cov])
    assert np.array_equal(rt2, rt)                   # product side still corrodes the patch
    assert np.array_equal(ru2, ru)                   # measured underside rate kept by default
    assert rt2 is rt and ru2 is ru                   # design rule: no full-grid copy of an unchanged map
    ru_before = ru.copy()
    _, _, ru3, _ = repair.apply_patches(t, rt, ru, p, x0=0.0, y0=0.0, pitch=10.0, under_cause_removed=True)
    assert np.all(ru3[cov & np.isfinite(t)] == 0) and np.all(ru3[~cov] == ru[~cov])
    assert ru3 is not ru and np.array_equal(ru, ru_before)   # the input is never modified
    # a missing thickness takes the rule value, or fails without one
    p2 = _one_patch(15.0, 15.0, 75.0, 75.0, t=np.nan)
    t4, *_ = repair.apply_patches(t, rt, ru, p2, x0=0.0, y0=0.0, pitch=10.0, rules=RULES)
    assert t4[4, 4] == np.float32(RULES.v("patch_thickness_mm"))
    with pytest.raises(InputError, match="thickness_mm"):
        repair.apply_patches(t, rt, ru, p2, x0=0.0, y0=0.0, pitch=10.0)


def test_patched_life_is_conservative_against_the_two_layer_truth():
    # Physical truth for a lap-welded patch of thickness tp over old plate of remaining t_old:
    # the soil side must eat the old plate (t_old / r_u years) before it reaches the patch;
    # the product side thins the patch all along.  Model: (tp - MRT)/(r_t + r_u).
    rng = np.random.default_rng(7)
    n = 2000
    t_old = rng.uniform(0.5, 6.0, n)
    tp = rng.uniform(5.0, 10.0, n)
    r_t = rng.uniform(0.0, 0.5, n)
    r_u = rng.uniform(0.01, 0.8, n)
    mrt = 2.54
    t_map = t_old.reshape(40, 50).astype(np.float32)
    p = _one_patch(-5.0, -5.0, 495.0, 395.0, t=0.0 + 1.0)   # thickness set per cell below
    cov = repair.covered_cells(p, shape=t_map.shape, x0=0.0, y0=0.0, pitch=10.0)
    assert cov.all()
    life_model = (tp - mrt) / (r_t + r_u)
    t_perf = t_old / r_u
    top_only = (tp - mrt) / np.where(r_t > 0, r_t, np.inf)
    life_true = np.where(top_only <= t_perf, top_only,
                         t_perf + (tp - r_t * t_perf - mrt) / (r_t + r_u))
    assert np.all(life_model <= life_true + 1e-9)
    # and apply_patches produces exactly the model's inputs (patch thickness, both rates)
    t2, rt2, ru2, _ = repair.apply_patches(t_map, r_t.reshape(40, 50), r_u.reshape(40, 50),
                                           _one_patch(-5.0, -5.0, 495.0, 395.0, t=7.0),
                                           x0=0.0, y0=0.0, pitch=10.0)
    life_map = (t2 - mrt) / (rt2 + ru2)
    assert np.allclose(life_map, (7.0 - mrt) / (r_t + r_u).reshape(40, 50).astype(np.float32), rtol=1e-5)


def test_plan_repairs_meets_the_target_outside_the_patches():
    rng = np.random.default_rng(3)
    t = rng.uniform(3.0, 6.35, (80, 80)).astype(np.float32)
    rt = rng.uniform(0.0, 0.05, t.shape).astype(np.float32)
    ru = np.where(rng.random(t.shape) < 0.01, 0.25, 0.02).astype(np.float32)
    plan = repair.plan_repairs(t, rt, ru, mrt_mm=2.54, target_years=10.0, x0=0.0, y0=0.0, pitch=10.0,
                               rules=RULES)
    assert plan.n_uncovered == 0 and plan.needs.any()
    life = (plan.thickness - 2.54) / (plan.rate_top + plan.rate_under)
    assert np.all(life[~plan.covered] >= 10.0 - 1e-4)          # ground truth: own-rate projection
    assert plan.area_m2 == pytest.approx(plan.patches.area_m2.sum())
    # the code's way: everything thinner than 3.5 mm is patched
    t3 = np.where(rng.random((200, 200)) < 0.001, 3.0, 5.5).astype(np.float32)
    r3 = np.full(t3.shape, 0.02, dtype=np.float32)
    plan2 = repair.repair_to_plan(t3, r3, r3, repair_to_mm=3.5, x0=0.0, y0=0.0, pitch=10.0, rules=RULES)
    assert plan2.n_uncovered == 0 and 0 < plan2.covered.mean() < 0.9
    assert np.nanmin(plan2.thickness[~plan2.covered]) >= 3.5
    assert np.all(plan2.thickness[plan2.covered] == np.float32(RULES.v("patch_thickness_mm")))


# ---------------------------------------------------------------------------
# the engineer's own patches
# ---------------------------------------------------------------------------
def test_check_patch_rules_finds_each_violation():
    nd = np.zeros((100, 100), dtype=bool)
    nd[20, 20] = True            # corrosion at (200, 200)
    seams = [(0.0, 700.0, 1000.0, 700.0)]
    crit = np.zeros((100, 100), dtype=bool)
    crit[:, 95:] = True          # x >= 950 mm
    rows = [
        ("A", 160.0, 160.0, 260.0, 260.0),    # 100 mm: too small; corrosion only 35 mm inside
        ("B", 400.0, 100.0, 600.0, 300.0),    # ok alone ...
        ("C", 630.0, 100.0, 830.0, 300.0),    # ... but 30 mm from B: both too close
        ("D", 100.0, 600.0, 300.0, 800.0),    # crosses the seam while 200 mm: below the 300 mm minimum
        ("E", 400.0, 430.0, 700.0, 730.0),    # 300 mm, top edge 30 mm beyond the seam
        ("F", 880.0, 400.0, 1100.0, 620.0),   # touches the critical strip
    ]
    df = pd.DataFrame(rows, columns=["patch", "x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm"])
    df["corner_radius_mm"] = 0.0
    df["thickness_mm"] = 6.35
    ck = repair.check_patch_rules(df, x0=0.0, y0=0.0, pitch=10.0, rules=RULES, seams=seams,
                                  critical_mask=crit, needs=nd).set_index("patch")
    assert set(ck["flags"]["A"].split(";")) == {repair.FLAG_TOO_SMALL, repair.FLAG_NOT_BEYOND}
    assert ck["flags"]["B"] == repair.FLAG_TOO_CLOSE and ck["flags"]["C"] == repair.FLAG_TOO_CLOSE
    assert ck["flags"]["D"] == repair.FLAG_OVERLAP_SIZE
    assert ck["flags"]["E"] == repair.FLAG_WELD_CLEARANCE
    assert ck["flags"]["F"] == repair.FLAG_CRITICAL
    assert not ck.ok.any()
    # a 300 mm patch over another patch, extending 60 mm beyond it on every side: allowed
    df2 = pd.DataFrame([("G", 0.0, 0.0, 300.0, 300.0), ("H", -60.0, -60.0, 360.0, 360.0)],
                       columns=["patch", "x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm"])
    ck2 = repair.check_patch_rules(df2, x0=0.0, y0=0.0, pitch=10.0, rules=RULES)
    assert ck2.ok.all()
    # uncovered cells: the corrosion at (200, 200) lies inside A
    n, mask = repair.uncovered_cells(nd, df, x0=0.0, y0=0.0, pitch=10.0)
    assert n == 0 and not mask.any()
    n, mask = repair.uncovered_cells(nd, df.iloc[1:], x0=0.0, y0=0.0, pitch=10.0)
    assert n == 1 and mask[20, 20]


def _planned():
    nd = np.zeros((80, 80), dtype=bool)
    nd[10:13, 10:14] = True
    nd[50, 60] = True
    nd[60:64, 20:22] = True
    labels = np.ones((80, 80), dtype=np.int16)
    return repair.plan_patches(nd, x0=-400.0, y0=-400.0, pitch=10.0, rules=RULES,
                               seams=[(-400.0, 0.0, 400.0, 0.0)], zone_labels=labels,
                               zone_names=["critical", "interior"])


def test_csv_round_trip(tmp_path):
    df = _planned()
    assert len(df) == 3
    path = tmp_path / "patches.csv"
    repair.write_patches_csv(df, path)
    back = repair.read_patches(path, rules=RULES)
    cols = ["x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm", "corner_radius_mm", "thickness_mm",
            "area_m2", "mass_kg"]
    assert back.patch.tolist() == df.patch.tolist() and back.zone.tolist() == df.zone.tolist()
    np.testing.assert_allclose(back[cols].to_numpy(), df[cols].to_numpy(), rtol=1e-5)
    # plain CSV with the contract's header row (design.md §3.5)
    assert pd.read_csv(path).columns.tolist() == repair.PATCH_COLUMNS


@pytest.mark.parametrize("body, line, match", [
    ("patch,x_min_mm,y_min_mm,x_max_mm\nP1,0,0,100\n", 1, "y_max_mm.*required"),
    ("patch,x_min_mm,y_min_mm,x_max_mm,y_max_mm,colour\nP1,0,0,1,1,red\n", 1, "colour.*unknown column"),
    ("patch,x_min_mm,y_min_mm,x_max_mm,y_max_mm\nP1,0,0,100,100\nP2,0,zero,100,100\n", 3,
     "y_min_mm.*not a number"),
    ("patch,x_min_mm,y_min_mm,x_max_mm,y_max_mm\nP1,0,0,100,100\nP1,200,0,300,100\n", 3,
     "duplicate patch id"),
    ("patch,x_min_mm,y_min_mm,x_max_mm,y_max_mm\n\nP1,100,0,100,100\n", 3, "x_max_mm.*must exceed"),
    ("patch,x_min_mm,y_min_mm,x_max_mm,y_max_mm,corner_radius_mm\nP1,0,0,100,100,60\n", 2,
     "corner_radius_mm.*half the smaller side"),
    ("patch,x_min_mm,y_min_mm,x_max_mm,y_max_mm,thickness_mm\nP1,0,0,100,100,-6\n", 2,
     "thickness_mm.*> 0"),
    ("patch,x_min_mm,y_min_mm,x_max_mm,y_max_mm\nP1,0,0,100\n", 2, "expected 5 fields"),
    ("patch,x_min_mm,y_min_mm,x_max_mm,y_max_mm\nP1,0,0,inf,100\n", 2, "x_max_mm.*finite"),
])
def test_csv_errors_name_file_and_line(tmp_path, body, line, match):
    path = tmp_path / "patches.csv"
    path.write_text(body)
    with pytest.raises(InputError, match=rf"patches\.csv:{line}.*{match}"):
        repair.read_patches(path)


def test_csv_blanks_take_defaults(tmp_path):
    path = tmp_path / "mine.csv"
    path.write_text("# engineer's set\npatch,x_min_mm,y_min_mm,x_max_mm,y_max_mm,corner_radius_mm,"
                    "thickness_mm\nQ1,0,0,400,300,,\n")
    back = repair.read_patches(path)
    assert back.corner_radius_mm[0] == 0.0 and np.isnan(back.thickness_mm[0])
    assert back.area_m2[0] == pytest.approx(0.12)


def test_dxf_round_trip(tmp_path):
    df = _planned()
    path = tmp_path / "patches.dxf"
    repair.write_patches_dxf(df, path)
    doc = ezdxf.readfile(path)
    assert doc.dxfversion == "AC1024"                       # R2010
    assert doc.header["$INSUNITS"] == 4                     # millimetres
    plines = doc.modelspace().query("LWPOLYLINE")
    assert len(plines) == len(df) and all(p.closed for p in plines)
    back = repair.read_patches(path, rules=RULES)
    cols = ["x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm", "corner_radius_mm", "thickness_mm",
            "area_m2", "mass_kg"]
    back = back.set_index("patch").loc[df.patch]
    np.testing.assert_allclose(back[cols].to_numpy(), df[cols].to_numpy(), rtol=1e-9, atol=1e-6)
    assert back.zone.tolist() == df.zone.tolist() and (back.note == "").all()


def test_dxf_foreign_outlines(tmp_path):
    doc = ezdxf.new("R2010")
    doc.units = ezdxf.units.IN
    msp = doc.modelspace()
    msp.add_circle((10.0, 10.0), 6.0)                                   # 12 in disc
    msp.add_lwpolyline([(0, 0), (8, 0), (4, 6)], close=True)            # triangle
    msp.add_polyline2d([(20, 0), (32, 0), (32, 12), (20, 12)], close=True)
    msp.add_lwpolyline([(0, 20), (5, 20)])                              # open: ignored
    msp.add_line((0, 0), (1, 1))                                        # not an outline
    msp.add_text("MY-1", dxfattribs={"insert": (25.0, 5.0)})
    path = tmp_path / "cad.dxf"
    doc.saveas(path)
    with pytest.warns(ScanWarning) as rec:
        back = repair.read_patches(path)
    msgs = " | ".join(str(w.message) for w in rec)
    assert "LINE" in msgs and "open LWPOLYLINE" in msgs and "bounding rectangle" in msgs
    assert len(back) == 3
    circ = back.iloc[0]
    # 1 in = 25.4 mm exactly [seen: corrosion reference pages]
    assert (circ.x_min_mm, circ.y_max_mm) == pytest.approx((4 * 25.4, 16 * 25.4))
    assert circ.corner_radius_mm == pytest.approx(6 * 25.4) and circ.note == ""
    assert circ.area_m2 == pytest.approx(math.pi * (6 * 0.0254) ** 2)
    tri = back.iloc[1]
    assert (tri.x_min_mm, tri.y_min_mm, tri.x_max_mm, tri.y_max_mm) == pytest.approx((0, 0, 8 * 25.4, 6 * 25.4))
    assert "bounding rectangle" in tri.note
    sq = back.iloc[2]
    assert sq.patch == "MY-1" and sq.corner_radius_mm == 0.0
    assert sq.x_max_mm - sq.x_min_mm == pytest.approx(12 * 25.4)


def test_dxf_unreadable(tmp_path):
    path = tmp_path / "bad.dxf"
    path.write_text("this is not a drawing\n")
    with pytest.raises(InputError, match=r"bad\.dxf"):
        repair.read_patches(path)
    with pytest.raises(InputError, match=r"\.csv or \.dxf"):
        p = tmp_path / "x.txt"
        p.write_text("")
        repair.read_patches(p)


# ---------------------------------------------------------------------------
# speed
# ---------------------------------------------------------------------------
def test_speed_seven_million_cells():
    rng = np.random.default_rng(11)
    n = 2650                                           # 7.0 million cells, 10 mm pitch: 26.5 m
    nd = np.zeros((n, n), dtype=bool)
    for i, j in zip(rng.integers(0, n, 300), rng.integers(0, n, 300)):
        nd[max(0, i - 2):i + 3, max(0, j - 3):j + 2] = True
    i = np.arange(n)[:, None]
    j = np.arange(n)[None, :]
    plate = ((i // 180) * 100 + (j + (i // 180) * 200) // 600).astype(np.int32)
    plate[(np.arange(n) % 180) < 2, :] = -1
    t0 = time.perf_counter()
    df = repair.plan_patches(nd, x0=0.0, y0=0.0, pitch=10.0, rules=RULES, plate=plate)
    dt = time.perf_counter() - t0
    n_unc, _ = repair.uncovered_cells(nd, df, x0=0.0, y0=0.0, pitch=10.0)
    print(f"\nplan_patches: {nd.size / 1e6:.1f} M cells, {len(df)} patches, {dt:.2f} s")
    assert n_unc == 0 and len(df) > 100
    assert dt < 30.0


def test_near_pairs_equal_all_pairs_with_a_few_large_rectangles():
    # ground truth: the gap of every pair computed directly (all n² pairs); the search must
    # find every pair closer than c, also when a few rectangles are far larger than the rest
    from scananalyse import repair as rp

    rng = np.random.default_rng(4)
    n = 300
    x = rng.uniform(0, 20000, n)
    y = rng.uniform(0, 20000, n)
    w = rng.uniform(100, 400, n)
    h = rng.uniform(100, 400, n)
    w[:3] = [6000, 3000, 9000]  # merged patches / replaced plates
    h[:3] = [2500, 7000, 1200]
    R = np.column_stack([x, y, x + w, y + h])
    c = 300.0
    i, j, gap, _ox, _oy = rp._near_pairs(R, c)
    got = {(a, b) for a, b, g in zip(i, j, gap) if g < c}
    want = set()
    for a in range(n):
        for b in range(a + 1, n):
            dx = max(0.0, R[b, 0] - R[a, 2], R[a, 0] - R[b, 2])
            dy = max(0.0, R[b, 1] - R[a, 3], R[a, 1] - R[b, 3])
            if np.hypot(dx, dy) < c:
                want.add((a, b))
    assert got == want and len(want) > 20


# ---------------------------------------------------------------------------
# shell clearance (API 650 §5.5.2: lap joints at least 600 mm from the shell)
# ---------------------------------------------------------------------------
class _Geom:
    """A floor geometry stand-in: centre and inside radius."""

    def __init__(self, centre, radius_mm):
        self.centre, self.radius_mm = centre, radius_mm


def _shell_patches():
    # shell radius 5000 mm about (100, -50); patches on the +x axis
    rows = [
        ("IN", 3000.0, -200.0, 3300.0, 100.0),   # farthest corner ~3.2 m: 1.8 m clear
        ("NEAR", 4200.0, -200.0, 4500.0, 100.0),  # reaches 4.40 m from the centre: 0.59 m clear
        ("EDGE", -4280.0, -200.0, -3980.0, 100.0),  # opposite side, reaches 4.38 m: 0.61 m clear with the rounding
    ]
    df = pd.DataFrame(rows, columns=["patch", "x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm"])
    df["corner_radius_mm"] = 50.0
    df["thickness_mm"] = 6.35
    return df


def test_shell_distance_is_exact_for_rounded_corners():
    R = np.array([[3900.0, -150.0, 4300.0, 150.0]])
    # centre (0, 0), radius 5000: core corner (4250, 100), + 50 mm radius
    d = repair.shell_distance_mm(R, np.array([50.0]), centre=(0.0, 0.0), radius_mm=5000.0)
    assert d[0] == pytest.approx(5000.0 - (math.hypot(4250.0, 100.0) + 50.0))
    # the sharp rectangle reaches farther: rounding only moves the weld away from the shell
    d0 = repair.shell_distance_mm(R, np.array([0.0]), centre=(0.0, 0.0), radius_mm=5000.0)
    assert d0[0] < d[0]
    # a patch beyond the shell has a negative distance
    assert repair.shell_distance_mm(np.array([[4900.0, 0.0, 5200.0, 300.0]]), np.zeros(1),
                                    centre=(0.0, 0.0), radius_mm=5000.0)[0] < 0


def test_check_patch_rules_flags_shell_clearance():
    df = _shell_patches()
    geom = _Geom((100.0, -50.0), 5000.0)
    ck = repair.check_patch_rules(df, x0=0.0, y0=0.0, pitch=10.0, rules=RULES, geometry=geom).set_index("patch")
    assert ck.attrs["shell_clearance_checked"]
    expect = {p: 5000.0 - (math.hypot(max(abs(r[0] + 50 - 100), abs(r[2] - 50 - 100)),
                                      max(abs(r[1] + 50 + 50), abs(r[3] - 50 + 50))) + 50.0)
              for p, *r in df[["patch", "x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm"]].itertuples(index=False)}
    for p, d in expect.items():
        assert ck.loc[p, "shell_distance_mm"] == pytest.approx(d)
    assert expect["NEAR"] < 600.0 < expect["EDGE"]
    assert ck.loc["NEAR", "flags"] == repair.FLAG_SHELL_CLEARANCE and not ck.loc["NEAR", "ok"]
    assert ck.loc["IN", "flags"] == "" and ck.loc["EDGE", "flags"] == ""
    # the rule set's value is the one applied: a 1.9 m clearance catches IN as well
    wide = get_ruleset(overrides={"shell_lap_joint_clearance_mm": 1900.0})
    ck2 = repair.check_patch_rules(df, x0=0.0, y0=0.0, pitch=10.0, rules=wide, geometry=geom)
    assert all(repair.FLAG_SHELL_CLEARANCE in f for f in ck2["flags"])
    # old callers (no geometry): unchecked, said so, nothing flagged for it
    ck3 = repair.check_patch_rules(df, x0=0.0, y0=0.0, pitch=10.0, rules=RULES)
    assert not ck3.attrs["shell_clearance_checked"] and ck3["shell_distance_mm"].isna().all()
    assert ck3.ok.all()


def test_check_patch_rules_shell_clearance_with_floor_geometry():
    from scananalyse.zones import FloorGeometry

    geom = FloorGeometry(diameter_mm=10000.0, centre=(100.0, -50.0), annular_width_mm=None)
    ck = repair.check_patch_rules(_shell_patches(), x0=0.0, y0=0.0, pitch=10.0, rules=RULES, geometry=geom)
    assert list(ck["flags"]) == ["", repair.FLAG_SHELL_CLEARANCE, ""]


def test_shell_clearance_flag_is_explained():
    from scananalyse.report.labels import FLAGS_EXPLAINED

    assert repair.FLAG_SHELL_CLEARANCE in FLAGS_EXPLAINED
