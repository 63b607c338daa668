"""Tests of the per-zone assessment (scananalyse.assess).

Checks against published values (domain notes §4: an MFL threshold table
calculated from API 653 3rd ed. §4.4.7.1, published by a tank consultancy),
hand-worked arithmetic of the code formula written out below, synthetic floors
with known truth (scananalyse.synth), and properties (hypothesis).
"""

import datetime as dt
import math
import types

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from scananalyse.assess import (BOUND_NAMES, ZONE_COLUMNS, AssessOptions, add_years,
                                assess_zones, code_interval, eva_life, local_life_map, mrt_map,
                                repair_to_thickness, zone_mrt)
from scananalyse.errors import InputError
from scananalyse.rules import get_ruleset
from scananalyse.scan import SIDE_TOP, SIDE_UNDER, ScanMeta
from scananalyse.zones import FloorGeometry, GridSpec, zone_map

RULES = get_ruleset()
IN = 25.4


# ---------------------------------------------------------------------------
# repair-to thickness: published check values
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("n, mrt_in, expect_in", [
    (2, 0.10, 0.175),
    (1, 0.10, 0.150),
    (1, 0.05, 0.120),
])
def test_repair_to_published_values(n, mrt_in, expect_in):
    # MFL threshold table from API 653 3rd ed. §4.4.7.1 (tank consultancy, seen):
    # t0 = 0.250 in, age 20 y, Or = 10 y, rounded UP to 0.005 in.
    rt = repair_to_thickness(mrt=mrt_in, t0=0.250, age_years=20, interval_years=10, n_sides=n,
                             round_up_to=0.005)
    assert rt == pytest.approx(expect_in, abs=1e-12)
    # the same in mm with the rule set's 0.005 in step
    rt_mm = RULES.round_repair_to(repair_to_thickness(mrt=mrt_in * IN, t0=0.250 * IN, age_years=20,
                                                      interval_years=10, n_sides=n))
    assert rt_mm == pytest.approx(expect_in * IN, abs=1e-9)


def test_repair_to_unrounded_and_consistent_with_code_formula():
    # (0.05 + 0.5*0.25)/1.5 = 0.116667 in before rounding (derived)
    rt = repair_to_thickness(mrt=0.05, t0=0.25, age_years=20, interval_years=10, n_sides=1)
    assert rt == pytest.approx(0.175 / 1.5)
    # repairing both faces to RT gives exactly the target interval under the code formula
    rt2 = repair_to_thickness(mrt=2.54, t0=6.35, age_years=20, interval_years=10, n_sides=2)
    cr = code_interval(t0=6.35, rtbc=rt2, rtip=rt2, mrt=2.54, age_years=20, method="UT")
    assert cr.interval_y == pytest.approx(10.0)
    # n = 0 (both faces protected): RT = MRT
    assert repair_to_thickness(mrt=2.54, t0=6.35, age_years=20, interval_years=10, n_sides=0) == 2.54


# ---------------------------------------------------------------------------
# code formula: a hand-worked example
# ---------------------------------------------------------------------------
def test_code_formula_hand_worked():
    # Hand-worked example (arithmetic on the formula of domain notes §4):
    #   t0 = 6.35 mm (1/4 in), 20 years in service, UT scan, no leak detection -> MRT 2.54 mm.
    #   Thinnest underside area RTbc = 4.35 mm, thinnest top-side area RTip = 5.35 mm.
    #   StPr = (t0 - RTip)/age = (6.35 - 5.35)/20 = 0.050 mm/y
    #   UPr  = (t0 - RTbc)/age = (6.35 - 4.35)/20 = 0.100 mm/y
    #   min(RTbc, RTip) = 4.35 mm
    #   Or = (4.35 - 2.54)/(0.050 + 0.100) = 1.81/0.15 = 12.0667 y
    #   check: MRT = 4.35 - 12.0667*0.15 = 2.54 mm
    cr = code_interval(t0=6.35, rtbc=4.35, rtip=5.35, mrt=2.54, age_years=20, method="UT")
    assert cr.stpr == pytest.approx(0.050)
    assert cr.upr == pytest.approx(0.100)
    assert cr.min_rt == pytest.approx(4.35)
    assert cr.interval_y == pytest.approx(1.81 / 0.15)
    assert cr.min_rt - cr.interval_y * (cr.stpr + cr.upr) == pytest.approx(2.54)

    # Same floor scanned by MFL with a 1.0 mm threshold: t0 - threshold = 5.35 > RTbc, so
    # UPr still uses RTbc = 4.35: same interval.
    cr = code_interval(t0=6.35, rtbc=4.35, rtip=5.35, mrt=2.54, age_years=20, method="MFL",
                       threshold=1.0)
    assert cr.t_used_upr == pytest.approx(4.35)
    assert cr.interval_y == pytest.approx(1.81 / 0.15)

    # MFL, no underside indication (RTbc = t0): the MFL-threshold rule takes
    #   t_used = min(6.35 - 1.0, 6.35) = 5.35 -> UPr = 1.0/20 = 0.050 mm/y
    #   Or = (min(6.35, 5.35) - 2.54)/(0.050 + 0.050) = 2.81/0.10 = 28.1 y
    cr = code_interval(t0=6.35, rtbc=6.35, rtip=5.35, mrt=2.54, age_years=20, method="mfl",
                       threshold=1.0)
    assert cr.t_used_upr == pytest.approx(5.35)
    assert cr.upr == pytest.approx(0.05)
    assert cr.interval_y == pytest.approx(28.1)
    assert "UPr from the MFL threshold" in cr.notes

    # Effective CP: UPr = 0 -> Or = 1.81/0.05 = 36.2 y
    cr = code_interval(t0=6.35, rtbc=4.35, rtip=5.35, mrt=2.54, age_years=20, method="UT",
                       cp_effective=True)
    assert cr.upr == 0.0
    assert cr.interval_y == pytest.approx(36.2)


def test_code_formula_coating_circularity():
    base = dict(t0=6.35, rtbc=4.35, rtip=5.35, mrt=2.54, age_years=20, method="UT", coated=True)
    # Or with StPr = 0: 1.81/0.10 = 18.1 y; with the age-based StPr: 12.0667 y.
    # coating life 40 y >= 18.1 y: StPr = 0, Or = 18.1 y
    cr = code_interval(coating_life_years=40, **base)
    assert cr.coating_credit and cr.stpr == 0.0
    assert cr.interval_y == pytest.approx(18.1)
    assert cr.stpr_age == pytest.approx(0.05)
    # coating life 15 y: StPr = 0 holds for any Or <= 15 y and 15 y passes the formula
    # (4.35 - 15*0.10 = 2.85 >= 2.54), longer than 12.07 y: Or = 15 y, limited by the coating
    cr = code_interval(coating_life_years=15, **base)
    assert cr.coating_credit and cr.interval_y == pytest.approx(15.0)
    # coating life 10 y < 12.07 y: no credit, Or = 12.07 y
    cr = code_interval(coating_life_years=10, **base)
    assert not cr.coating_credit and cr.stpr == pytest.approx(0.05)
    assert cr.interval_y == pytest.approx(1.81 / 0.15)
    # unknown coating life: no credit
    cr = code_interval(coating_life_years=None, **base)
    assert not cr.coating_credit and "coating life unknown: no StPr credit" in cr.notes


def test_code_formula_edges():
    # no loss at all: both rates 0 -> infinite interval
    cr = code_interval(t0=6.35, rtbc=6.35, rtip=6.35, mrt=2.54, age_years=10, method="UT")
    assert cr.interval_y == math.inf
    # below MRT with rates: negative; below MRT with zero rates (CP, coated): 0
    cr = code_interval(t0=6.35, rtbc=2.0, rtip=6.35, mrt=2.54, age_years=10, method="UT")
    assert cr.interval_y == pytest.approx((2.0 - 2.54) / 0.435)
    assert cr.interval_y < 0 and "below MRT" in cr.notes
    cr = code_interval(t0=6.35, rtbc=2.0, rtip=6.35, mrt=2.54, age_years=10, method="UT",
                       cp_effective=True)
    assert cr.interval_y == 0.0
    # plate thicker than nominal is not negative corrosion
    cr = code_interval(t0=6.35, rtbc=6.5, rtip=6.6, mrt=2.54, age_years=10, method="UT")
    assert cr.stpr == 0.0 and cr.upr == 0.0
    with pytest.raises(InputError, match=r"field 'age_years'"):
        code_interval(t0=6.35, rtbc=5, rtip=5, mrt=2.54, age_years=0)
    with pytest.raises(InputError, match=r"field 'n_sides'"):
        repair_to_thickness(mrt=2.54, t0=6.35, age_years=20, interval_years=10, n_sides=3)


# ---------------------------------------------------------------------------
# co-located and extreme-value lives
# ---------------------------------------------------------------------------
def test_local_life_map_cases():
    t = np.array([[5.0, 2.0, np.nan], [4.54, 6.35, 3.0]], dtype=np.float32)
    rt = np.array([[0.1, 0.1, 0.1], [0.0, 0.0, -0.2]], dtype=np.float32)
    ru = np.array([[0.4, 0.1, 0.1], [0.5, 0.0, 0.0]], dtype=np.float32)
    life = local_life_map(t, rt, ru, 2.54)
    assert life.dtype == np.float32
    assert life[0, 0] == pytest.approx((5.0 - 2.54) / 0.5, rel=1e-6)
    assert life[0, 1] == 0.0  # already below MRT
    assert np.isnan(life[0, 2])  # not scanned
    assert life[1, 0] == pytest.approx(2.0 / 0.5, rel=1e-6)
    assert life[1, 1] == np.inf  # no rate
    assert life[1, 2] == np.inf  # negative rate counts as 0
    # per-cell MRT
    life2 = local_life_map(t, rt, ru, np.full(t.shape, 4.0, np.float32))
    assert life2[0, 0] == pytest.approx(2.0, rel=1e-6)
    assert np.isnan(local_life_map(t, np.full(t.shape, np.nan), ru, 2.54)).all()


def test_local_life_map_by_bands_is_the_formula_on_the_whole_grid():
    # The map is computed a band of rows at a time; on a grid of several bands (and a
    # partial last one) every cell must equal (t - MRT) / (r_top+ + r_under+) with the
    # documented special cases, evaluated on the whole grid at once.
    from scananalyse import assess

    rng = np.random.default_rng(8)
    shape = (assess._LIFE_BAND_ROWS * 2 + 37, 53)
    t = rng.uniform(1.0, 7.0, shape).astype(np.float32)
    t[rng.random(shape) < 0.1] = np.nan
    rt = rng.normal(0.05, 0.1, shape).astype(np.float32)
    ru = rng.normal(0.05, 0.1, shape).astype(np.float32)
    ru[rng.random(shape) < 0.05] = np.nan
    rt[:40] = 0.0
    ru[:40] = 0.0
    mrt = np.where(np.arange(shape[1]) < 20, 2.54, 1.27).astype(np.float32)[None, :].repeat(shape[0], 0)
    s = np.maximum(rt, 0) + np.maximum(ru, 0)
    margin = t - mrt
    with np.errstate(divide="ignore", invalid="ignore"):
        ref = np.where(s > 0, margin / s, np.inf)
    ref = np.where(margin < 0, 0.0, ref)
    ref = np.where(np.isnan(margin) | np.isnan(s), np.nan, ref).astype(np.float32)
    for m in (mrt, np.float32(2.54)):
        got = local_life_map(t, rt, ru, m)
        want = ref if m is mrt else local_life_map(t, rt, ru, np.full(shape, 2.54, np.float32))
        assert got.dtype == np.float32 and got.shape == shape
        np.testing.assert_array_equal(got, want)
    assert np.isinf(ref[:40][np.isfinite(t[:40]) & (margin[:40] >= 0)]).all()


def test_eva_life():
    # (t0 - depth_upper - MRT)/rate = (6.35 - 2.81 - 2.54)/0.2 = 5 y
    assert eva_life(t0=6.35, depth_upper=2.81, mrt=2.54, rate=0.2) == pytest.approx(5.0)
    assert eva_life(t0=6.35, depth_upper=4.0, mrt=2.54, rate=0.2) == 0.0
    assert eva_life(t0=6.35, depth_upper=1.0, mrt=2.54, rate=0.0) == math.inf
    assert math.isnan(eva_life(t0=6.35, depth_upper=1.0, mrt=2.54, rate=math.nan))


def test_add_years():
    assert add_years(dt.date(2024, 5, 1), 10.0) == dt.date(2034, 5, 1)
    # 0.5 y = round(182.6) = 183 days of the mean Gregorian year
    assert add_years(dt.date(2024, 5, 1), 10.5) == dt.date(2034, 5, 1) + dt.timedelta(days=183)
    assert add_years(dt.date(2024, 2, 29), 1.0) == dt.date(2025, 2, 28)
    assert add_years(dt.date(2024, 2, 29), 4.0) == dt.date(2028, 2, 29)


# ---------------------------------------------------------------------------
# per-zone assessment on small constructed floors
# ---------------------------------------------------------------------------
PITCH = 50.0
N = 62
DIAM = 3000.0
GRID = GridSpec((N, N), -(N - 1) * PITCH / 2, -(N - 1) * PITCH / 2, PITCH)
GEO = FloorGeometry(DIAM)


def coords():
    x = GRID.x0 + PITCH * np.arange(N)
    y = GRID.y0 + PITCH * np.arange(N)
    return np.meshgrid(x, y)


def make_meta(age=10, method="UT", threshold=None):
    insp = dt.date(2026, 5, 1)
    inst = None if age is None else dt.date(2026 - age, 5, 1)
    return ScanMeta(inspected=insp, nominal=6.35, method=method, threshold=threshold, installed=inst)


def base_floor(t_general=6.25, r_under=0.008, r_top=0.0):
    zm = zone_map(GRID, GEO, RULES)
    inside = zm.labels >= 0
    t = np.where(inside, np.float32(t_general), np.float32(np.nan)).astype(np.float32)
    ru = np.full(GRID.shape, r_under, np.float32)
    rt = np.full(GRID.shape, r_top, np.float32)
    side = np.zeros(GRID.shape, np.int8)
    return zm, t, side, rt, ru


def row(df, zone):
    return df.set_index("zone").loc[zone]


def flags_of(df, zone):
    f = row(df, zone)["flags"]
    return set(f.split(";")) if f else set()


def test_code_interval_flagged_where_it_exceeds_colocated_life():
    # Young tank (10 y), UT scan, no leak detection (MRT 2.54 mm). Underside pits that
    # began late and grow fast (0.5 mm/y measured short-term) are still at 4.6 mm, above
    # the repair-to thickness for a 10-year interval with one unprotected side,
    # RT = (2.54 + 1*10/10*6.35)/(1 + 1) = 4.445 mm, so the code formula, whose UPr comes
    # from the thinnest area over the whole age ((6.35 - 4.6)/10 = 0.175 mm/y), promises
    #   Or = (4.6 - 2.54)/0.175 = 11.77 y,
    # while the pits themselves reach MRT in (4.6 - 2.54)/0.5 = 4.12 y.
    age = 10
    rt_10 = repair_to_thickness(mrt=2.54, t0=6.35, age_years=age, interval_years=10, n_sides=1)
    assert 4.6 > rt_10
    zm, t, side, rt, ru = base_floor()
    X, Y = coords()
    pits = (np.hypot(X - 300, Y + 200) < 80) | (np.hypot(X + 500, Y - 400) < 60)
    t[pits] = 4.6
    side[pits] = SIDE_UNDER
    ru[pits] = 0.5
    meta = make_meta(age)
    df = assess_zones(thickness=t, side=side, rate_top=rt, rate_under=ru, zones=zm,
                      meta=meta, rules=RULES, options=AssessOptions())
    r = row(df, "interior")
    # the dates give 3653 days = 10.0015 mean Gregorian years
    assert r["interval_code_y"] == pytest.approx((4.6 - 2.54) / ((6.35 - 4.6) / meta.age_years),
                                                 rel=1e-5)
    assert r["life_local_y"] == pytest.approx((4.6 - 2.54) / 0.5, rel=1e-5)
    assert "code-exceeds-local" in flags_of(df, "interior")
    assert r["interval_recommended_y"] == 4.0
    assert r["limiting"] == "local"
    assert "target-not-reached" in flags_of(df, "interior")
    # the critical zone, thinning uniformly at the rate the code infers ((6.35-6.25)/10 =
    # 0.01 mm/y) and measured slower (0.008 mm/y), is not flagged
    assert "code-exceeds-local" not in flags_of(df, "critical")
    assert row(df, "critical")["limiting"] == "cap"


def test_columns_and_healthy_floor_has_no_warning_flags():
    zm, t, side, rt, ru = base_floor()
    df = assess_zones(thickness=t, side=side, rate_top=rt, rate_under=ru, zones=zm,
                      meta=make_meta(), rules=RULES, options=AssessOptions(),
                      extremes={z: {"depth_eva_mm": 0.3, "depth_eva_upper_mm": 0.4,
                                    "rate_eva_mm_y": 0.008} for z in zm.names})
    assert list(df.columns[:len(ZONE_COLUMNS)]) == ZONE_COLUMNS
    assert list(df.zone) == ["critical", "interior"]
    for z in df.zone:
        assert flags_of(df, z) == set()
        r = row(df, z)
        assert r["interval_recommended_y"] == 20.0 and r["limiting"] == "cap"
        assert r["next_due"] == "2046-05-01"
    # MRT of the critical zone: t0/2 = 3.175 mm (rule, memory); interior 2.54 mm
    assert row(df, "critical")["mrt_mm"] == pytest.approx(3.175)
    assert row(df, "interior")["mrt_mm"] == pytest.approx(2.54)
    # extreme-value life (6.35 - 0.4 - 2.54)/0.008 = 426.25 y, longer than the code
    # formula's (6.25 - 2.54)/0.01 = 371 y: no flag
    assert row(df, "interior")["life_eva_y"] == pytest.approx(426.25)


def test_flags_present_when_expected():
    zm, t, side, rt, ru = base_floor()
    X, Y = coords()
    r = np.hypot(X, Y)
    crit = zm.mask("critical")
    # interior: one cell below MRT
    i, j = N // 2, N // 2
    t[i, j] = 2.0
    # critical: a cell at 3.0 mm, above the table MRT 2.54 but below the critical minimum 3.175
    ci, cj = np.argwhere(crit)[0]
    t[ci, cj] = 3.0
    # critical zone: leave only a third scanned -> low coverage
    t[crit & (X < 500)] = np.nan
    t[ci, cj] = 3.0
    df = assess_zones(thickness=t, side=side, rate_top=rt, rate_under=ru, zones=zm,
                      meta=make_meta(), rules=RULES, rate_short_available=False,
                      options=AssessOptions(target_interval_years=10))
    fi = flags_of(df, "interior")
    fc = flags_of(df, "critical")
    assert {"below-mrt", "target-not-reached", "no-short-term-rates", "no-eva"} <= fi
    assert "critical-zone-below-min" not in fi
    assert {"critical-zone-below-min", "below-mrt", "low-coverage", "no-short-term-rates"} <= fc
    assert row(df, "interior")["interval_code_y"] <= 0
    assert row(df, "interior")["interval_recommended_y"] == 0.0
    assert row(df, "interior")["next_due"] == "2026-05-01"
    assert r[crit].min() > 1500 - 75 - PITCH


def test_all_unscanned_zone_no_data():
    # rasterstats test_all_nodata style: a user zone with no scanned cell
    zm = zone_map(GRID, GEO, RULES, user_zones=[("sump", [(-300, -300), (300, -300), (300, 300),
                                                          (-300, 300)])])
    t = np.where(zm.labels >= 0, np.float32(6.2), np.float32(np.nan)).astype(np.float32)
    t[zm.mask("sump")] = np.nan
    ru = np.full(GRID.shape, 0.01, np.float32)
    df = assess_zones(thickness=t, side=None, rate_top=None, rate_under=ru, zones=zm,
                      meta=make_meta(), rules=RULES)
    s = row(df, "sump")
    assert s["coverage_pct"] == 0.0
    assert s["area_m2"] == pytest.approx(0.36, rel=0.05)
    for c in ("t_min_mm", "depth_max_mm", "interval_code_y", "life_local_y",
              "interval_recommended_y", "rate_under_max_mm_y"):
        assert math.isnan(s[c])
    assert s["flags"] == "no-data" and s["next_due"] == ""
    assert row(df, "interior")["interval_recommended_y"] > 0


def test_first_inspection_without_rates_uses_initial_interval():
    zm, t, side, rt, ru = base_floor(t_general=6.30)
    df = assess_zones(thickness=t, side=side, rate_top=None, rate_under=None, zones=zm,
                      meta=make_meta(age=None), rules=RULES, rate_short_available=False)
    r = row(df, "interior")
    # no installed date: no code formula; no rates: initial interval 10 y (API 653 §6.4.2)
    assert math.isnan(r["interval_code_y"])
    assert r["interval_recommended_y"] == 10.0 and r["limiting"] == "initial"
    assert {"no-age", "initial-interval", "no-short-term-rates"} <= flags_of(df, "interior")
    assert "target-not-reached" not in flags_of(df, "interior")
    # with CP and a release-prevention barrier: 10 + 5 + 10 = 25 y, cap 30
    df = assess_zones(thickness=t, side=side, rate_top=None, rate_under=None, zones=zm,
                      meta=make_meta(age=None), rules=RULES,
                      options=AssessOptions(cp_effective=True, release_prevention_barrier=True))
    assert row(df, "interior")["interval_recommended_y"] == 25.0


def test_eva_bounds_and_flags():
    from scananalyse.extremes import ZoneExtremes
    zm, t, side, rt, ru = base_floor()
    t[N // 2, N // 2] = 4.35
    ex = {
        # upper bound 3.5 mm deep over the zone, rate missing -> zone max sum (0 + 0.008)
        "interior": ZoneExtremes(reason="", depth_eva_mm=3.0, depth_eva_upper_mm=3.5),
        # a failed fit is falsy and has NaN depths -> no-eva
        "critical": ZoneExtremes(reason="too few blocks"),
    }
    df = assess_zones(thickness=t, side=side, rate_top=rt, rate_under=ru, zones=zm,
                      meta=make_meta(), rules=RULES, extremes=ex)
    r = row(df, "interior")
    assert r["rate_eva_source"] == "zone-max-sum"
    assert r["life_eva_y"] == pytest.approx((6.35 - 3.5 - 2.54) / 0.008, rel=1e-5)
    assert "eva-rate-assumed" in flags_of(df, "interior")
    assert "no-eva" in flags_of(df, "critical")
    # the code formula here: UPr = (6.35-4.35)/10 = 0.2 -> Or = 1.81/0.2 = 9.05 y < eva 38.75 y
    assert r["limiting"] == "code" and r["interval_recommended_y"] == 9.0
    # deeper expected pit than the metal allows: eva-below-mrt, life 0, code-exceeds-eva
    ex2 = {"interior": types.SimpleNamespace(depth_eva_mm=3.6, depth_eva_upper_mm=4.0,
                                             rate_eva_mm_y=0.3)}
    df = assess_zones(thickness=t, side=side, rate_top=rt, rate_under=ru, zones=zm,
                      meta=make_meta(), rules=RULES, extremes=ex2)
    assert {"eva-below-mrt", "code-exceeds-eva"} <= flags_of(df, "interior")
    assert row(df, "interior")["interval_recommended_y"] == 0.0
    assert row(df, "interior")["limiting"] == "eva"


def test_side_attribution_and_unknown_side_option():
    zm, t, side, rt, ru = base_floor(t_general=6.35, r_under=0.0)
    X, Y = coords()
    top = np.hypot(X - 200, Y) < 60
    t[top] = 5.35
    side[top] = SIDE_TOP
    unk = np.hypot(X + 300, Y) < 60
    t[unk] = 4.35
    # unknown counts as underside: RTbc 4.35, RTip 5.35 (the hand-worked example at age 20)
    df = assess_zones(thickness=t, side=side, rate_top=rt, rate_under=ru, zones=zm,
                      meta=make_meta(age=20), rules=RULES)
    r = row(df, "interior")
    assert (r["rtbc_mm"], r["rtip_mm"]) == (pytest.approx(4.35), pytest.approx(5.35))
    # 20 calendar years = 7305 days = 20.0004 mean Gregorian years
    assert r["interval_code_y"] == pytest.approx(1.81 / 0.15, rel=1e-4)
    # unknown counted as top side: RTip 4.35, RTbc = t0 (no underside cell)
    df = assess_zones(thickness=t, side=side, rate_top=rt, rate_under=ru, zones=zm,
                      meta=make_meta(age=20), rules=RULES, options=AssessOptions(unknown_side="top"))
    r = row(df, "interior")
    assert r["rtbc_mm"] == pytest.approx(6.35) and r["rtip_mm"] == pytest.approx(4.35)
    assert r["upr_mm_y"] == 0.0 and r["stpr_mm_y"] == pytest.approx(0.1, rel=1e-4)


def test_mfl_without_threshold_flag():
    zm, t, side, rt, ru = base_floor()
    df = assess_zones(thickness=t, side=side, rate_top=rt, rate_under=ru, zones=zm,
                      meta=make_meta(method="MFL"), rules=RULES)
    assert "no-mfl-threshold" in flags_of(df, "interior")
    df = assess_zones(thickness=t, side=side, rate_top=rt, rate_under=ru, zones=zm,
                      meta=make_meta(method="MFL", threshold=1.27), rules=RULES)
    assert "no-mfl-threshold" not in flags_of(df, "interior")
    # UPr from the threshold: (6.35 - min(5.08, 6.25))/10 = 0.127 mm/y
    assert row(df, "interior")["upr_mm_y"] == pytest.approx(0.127, rel=1e-3)


def test_rule_overrides_reach_the_assessment():
    zm, t, side, rt, ru = base_floor()
    rules = get_ruleset("api653", {"interval_cap_y": 15, "mrt_no_leak_detection_mm": 3.0})
    df = assess_zones(thickness=t, side=side, rate_top=rt, rate_under=ru, zones=zm,
                      meta=make_meta(), rules=rules)
    r = row(df, "interior")
    assert r["cap_y"] == 15.0 and r["interval_recommended_y"] == 15.0
    assert r["mrt_mm"] == 3.0
    # the critical zone takes the greater of the table MRT and its minimum 3.175 mm
    assert zone_mrt(zm, rules, AssessOptions(), t0=6.35).tolist() == [pytest.approx(3.175), 3.0]
    m = mrt_map(zm, rules, AssessOptions(leak_detection=True), t0=6.35)
    assert np.isnan(m[0, 0]) and m[N // 2, N // 2] == pytest.approx(1.27)


def test_input_errors():
    zm, t, side, rt, ru = base_floor()
    with pytest.raises(InputError, match=r"field 'unknown_side'"):
        AssessOptions(unknown_side="left")
    with pytest.raises(InputError, match=r"field 'target_interval_years'"):
        AssessOptions(target_interval_years=-1)
    bad = ScanMeta(inspected=dt.date(2020, 1, 1), nominal=6.35, installed=dt.date(2021, 1, 1))
    with pytest.raises(InputError, match=r"field 'installed'"):
        assess_zones(thickness=t, side=side, rate_top=rt, rate_under=ru, zones=zm, meta=bad,
                     rules=RULES)
    with pytest.raises(InputError, match=r"field 'pitch_mm'"):
        assess_zones(thickness=t, side=side, rate_top=rt, rate_under=ru, zones=zm,
                     meta=make_meta(), rules=RULES, pitch_mm=25.0)


# ---------------------------------------------------------------------------
# (b) synthetic floors with known truth
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_recommendation_within_true_life_on_synthetic_floors(seed):
    # A synthetic MFL floor (scananalyse.synth): 14 y old, pits up to 0.15 mm/y.  With the
    # true rate maps used as the measured ones, the recommended interval must not exceed
    # the true remaining life of the scanned metal, min over cells of
    # (t_true - MRT)/(r_top_true + r_under_true), by more than 10 %.  MRT: 2.54 mm
    # (Table 4.4, no leak detection), 3.175 mm = t0/2 in the critical zone (rule, memory).
    from scananalyse import synth  # imported here: the rest of the file does not need it

    p = synth.make_pair(diameter_mm=4000, seed=seed, installed=dt.date(2012, 5, 1),
                        inspected_old=dt.date(2019, 5, 1), inspected_new=dt.date(2026, 5, 1),
                        max_pit_rate=0.15, deep_fraction=0.0, shell_margin_mm=40, repairs=0)
    tr = p.truth
    zm = zone_map(p.new, FloorGeometry(tr.diameter_mm, centre=tr.centre), RULES)
    df = assess_zones(thickness=p.new.thickness, side=p.new.side, rate_top=tr.rate_top_true,
                      rate_under=tr.rate_under_true, zones=zm, meta=p.new.meta, rules=RULES)
    scanned = np.isfinite(p.new.thickness)
    rate = tr.rate_top_true.astype(np.float64) + tr.rate_under_true.astype(np.float64)
    checked = 0
    for name, mrt in (("critical", 6.35 / 2), ("interior", 2.54)):
        m = zm.mask(name) & scanned
        if not m.any():
            continue
        life = (tr.t_new_true[m].astype(np.float64) - mrt) / rate[m]
        true_life = max(float(np.min(life)), 0.0)
        rec = row(df, name)["interval_recommended_y"]
        assert 0.0 <= rec <= 1.10 * true_life + 1e-9, (name, rec, true_life)
        checked += 1
    assert checked == 2


# ---------------------------------------------------------------------------
# (c) property: recommended <= every bound, >= 0, on the rule's step
# ---------------------------------------------------------------------------
SMALL = GridSpec((16, 16), -375.0, -375.0, 50.0)
SMALL_ZM = zone_map(SMALL, FloorGeometry(780.0), RULES,
                    user_zones=[("patch", [(-200, -200), (100, -200), (100, 150), (-200, 150)])])


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**32 - 1), age=st.one_of(st.none(), st.integers(1, 40)),
       nan_frac=st.floats(0, 1), use_rates=st.booleans(), coated=st.booleans(),
       life=st.one_of(st.none(), st.floats(0, 40)), cp=st.booleans(), rpb=st.booleans(),
       ld=st.booleans(), eva=st.booleans(), mfl=st.booleans(), unk=st.sampled_from(["under", "top"]))
def test_recommended_never_exceeds_any_bound(seed, age, nan_frac, use_rates, coated, life, cp,
                                             rpb, ld, eva, mfl, unk):
    rng = np.random.default_rng(seed)
    shape = SMALL.shape
    t = rng.uniform(0.5, 7.0, shape).astype(np.float32)
    t[rng.random(shape) < nan_frac] = np.nan
    side = rng.integers(0, 3, shape).astype(np.int8)
    rt = rng.exponential(0.05, shape).astype(np.float32) * (rng.random(shape) < 0.7)
    ru = rng.exponential(0.1, shape).astype(np.float32) * (rng.random(shape) < 0.7)
    meta = ScanMeta(inspected=dt.date(2026, 5, 1), nominal=6.35, method="MFL" if mfl else "UT",
                    threshold=1.0 if mfl else None,
                    installed=None if age is None else dt.date(2026 - age, 5, 1))
    extremes = None
    if eva:
        extremes = {z: {"depth_eva_mm": float(d), "depth_eva_upper_mm": float(d) * 1.1,
                        "rate_eva_mm_y": None if rng.random() < 0.5 else float(rng.uniform(0, 0.5))}
                    for z, d in zip(SMALL_ZM.names, rng.uniform(0, 5, len(SMALL_ZM.names)))}
    opts = AssessOptions(coated=coated, coating_life_years=life, cp_effective=cp,
                         release_prevention_barrier=rpb, leak_detection=ld, unknown_side=unk)
    df = assess_zones(thickness=t, side=side, rate_top=rt if use_rates else None,
                      rate_under=ru if use_rates else None, zones=SMALL_ZM, meta=meta, rules=RULES,
                      options=opts, extremes=extremes)
    step = RULES.v("interval_step_y")
    for _, r in df.iterrows():
        rec = r["interval_recommended_y"]
        if r["n_scanned"] == 0:
            assert math.isnan(rec) and r["flags"] == "no-data"
            continue
        assert rec >= 0
        assert rec / step == pytest.approx(round(rec / step))
        bounds = {"code": r["interval_code_y"], "local": r["life_local_y"], "eva": r["life_eva_y"],
                  "initial": r["initial_interval_y"], "cap": r["cap_y"]}
        for b, v in bounds.items():
            if not math.isnan(v):
                assert rec <= max(v, 0.0) + 1e-9, (b, v, rec)
        assert r["limiting"] in BOUND_NAMES
        # the governing bound is within one rounding step above the recommendation
        gov = max(bounds[r["limiting"]], 0.0)
        assert gov - rec < step + 1e-9
        assert rec <= r["cap_y"] and r["cap_y"] == (30.0 if rpb else 20.0)


# ---------------------------------------------------------------------------
# (d) zone maximum rates with their interval; recommend_interval
# ---------------------------------------------------------------------------
def test_recommend_interval_least_bound_rounded_down():
    # hand-worked: least of 7.3 (local), 9 (code), NaN (eva skipped), cap 20 → 7.3, rounded
    # DOWN to the rule set's 0.5 y step → 7.0; a negative bound gives 0
    from scananalyse.assess import recommend_interval

    rec, lim = recommend_interval(code=9.0, local=7.3, eva=math.nan, initial=math.nan, cap=20.0,
                                  rules=RULES)
    assert (rec, lim) == (7.0, "local")
    rec, lim = recommend_interval(code=-2.0, local=7.3, eva=5.0, initial=math.nan, cap=20.0,
                                  rules=RULES)
    assert (rec, lim) == (0.0, "code")
    rec, lim = recommend_interval(code=20.0, local=25.0, eva=math.inf, initial=math.nan, cap=20.0,
                                  rules=RULES)
    assert (rec, lim) == (20.0, "code")  # a tie goes to the first of BOUND_NAMES


def test_zone_rate_interval_columns_and_eva_fallback_uses_upper_ends():
    from scananalyse.rates import ZoneRateInputs

    # one underside pit at 0.5 mm/y whose cells carry the interval [0.4, 0.7] mm/y, noise
    # σ 0.01 mm/y; the rest 0.008 mm/y with [0.0, 0.02]
    zm, t, side, rt, ru = base_floor()
    X, Y = coords()
    pit = np.hypot(X - 300, Y + 200) < 80
    ru[pit] = 0.5
    lo = np.where(pit, 0.4, 0.0).astype(np.float32)
    hi = np.where(pit, 0.7, 0.02).astype(np.float32)
    zeros = np.zeros_like(rt)
    df = assess_zones(thickness=t, side=side, rate_top=rt, rate_under=ru, zones=zm,
                      meta=make_meta(), rules=RULES,
                      zone_rates=ZoneRateInputs(top_fit=rt, top_lo=zeros, top_hi=zeros, under_fit=ru,
                                                under_lo=lo, under_hi=hi, sigma=0.01),
                      extremes={z: {"depth_eva_mm": 0.3, "depth_eva_upper_mm": 0.4} for z in zm.names})
    r = row(df, "interior")
    n_pit = int(np.count_nonzero(pit & (zm.labels == zm.names.index("interior"))))
    assert n_pit > 1
    # all pit cells share 0.5 exactly (no noise in this input): the point takes off
    # σ·E[max of n_pit normals] (Blom), the interval holds the point
    from scananalyse.rates import expected_max_normal

    assert r["rate_under_max_mm_y"] == pytest.approx(0.5 - 0.01 * expected_max_normal(n_pit), rel=1e-4)
    assert r["rate_under_max_raw_mm_y"] == pytest.approx(0.5)
    assert r["rate_under_max_lo_mm_y"] <= r["rate_under_max_mm_y"] <= r["rate_under_max_hi_mm_y"]
    assert r["rate_under_max_hi_mm_y"] == pytest.approx(0.7)
    assert r["rate_top_max_mm_y"] == 0 and r["rate_top_max_hi_mm_y"] == 0
    # no rate from the extremes: the extreme-value life takes the upper ends (conservative)
    assert r["rate_eva_source"] == "zone-max-hi-sum"
    assert r["rate_eva_mm_y"] == pytest.approx(0.7)
    # the co-located life from the upper ends is the shorter one
    assert r["life_local_short_y"] <= r["life_local_y"]
    # without the interval maps: the plain maximum and NaN bounds
    df2 = assess_zones(thickness=t, side=side, rate_top=rt, rate_under=ru, zones=zm,
                       meta=make_meta(), rules=RULES)
    r2 = row(df2, "interior")
    assert r2["rate_under_max_mm_y"] == pytest.approx(0.5)
    assert math.isnan(r2["rate_under_max_lo_mm_y"]) and math.isnan(r2["rate_under_max_hi_mm_y"])


# ---------------------------------------------------------------------------
# critical-zone minimum: half t0, 50 % of the lower shell course tmin, >= 2.54 mm
# (domain.md §1, memory)
# ---------------------------------------------------------------------------
def _thin_critical_cell_floor():
    """:func:`base_floor` with a critical-zone cell at 3.1 mm (above 50 % of a 6.0 mm shell
    tmin, 3.0 mm; below t0/2), and the critical zone's mask."""
    zm, t, side, rt, ru = base_floor()
    crit = zm.mask("critical")
    ci, cj = np.argwhere(crit)[0]
    t[ci, cj] = 3.1
    return (zm, t, side, rt, ru), crit


def _assess_floor(floor, rules=RULES, **options):
    """:func:`assess_zones` on a ``base_floor()`` tuple with ``AssessOptions(**options)``."""
    zm, t, side, rt, ru = floor
    return assess_zones(thickness=t, side=side, rate_top=rt, rate_under=ru, zones=zm,
                        meta=make_meta(), rules=rules, options=AssessOptions(**options))


def test_critical_zone_minimum_without_shell_tmin_states_the_default():
    from scananalyse.assess import critical_zone_minimum

    floor, crit = _thin_critical_cell_floor()
    df = _assess_floor(floor)
    r = row(df, "critical")
    # no shell tmin: max(min(6.35/2), 2.54) = 3.175 mm; the note says the shell term was not applied
    assert r["mrt_mm"] == pytest.approx(3.175)
    assert "critical-zone-below-min" in flags_of(df, "critical")
    assert "no tmin of the lower shell course given" in r["notes"] and "not applied" in r["notes"]
    assert "not applied" not in row(df, "interior")["notes"]
    cz, note = critical_zone_minimum(RULES, 6.35)
    assert cz == pytest.approx(3.175) and note in r["notes"]
    # an unscanned critical zone keeps its minimum, and the note
    thickness = floor[1]
    thickness[crit] = np.nan
    df = _assess_floor(floor)
    assert row(df, "critical")["flags"] == "no-data" and note in row(df, "critical")["notes"]


def test_critical_zone_minimum_with_shell_tmin_applies_it():
    floor, _ = _thin_critical_cell_floor()
    df = _assess_floor(floor, shell_tmin_mm=6.0)
    r = row(df, "critical")
    # min(3.175, 0.5 * 6.0 = 3.0) = 3.0 mm, not below 2.54 mm: the 3.1 mm cell is now acceptable
    assert r["mrt_mm"] == pytest.approx(3.0)
    assert "critical-zone-below-min" not in flags_of(df, "critical")
    assert "lower shell course tmin 6.00 mm" in r["notes"] and "not applied" not in r["notes"]
    # a thin shell: 50 % of 4.0 mm = 2.0 mm, raised to the 2.54 mm floor
    df2 = _assess_floor(floor, shell_tmin_mm=4.0)
    assert row(df2, "critical")["mrt_mm"] == pytest.approx(2.54)
    # the rule set's fraction is the one applied
    rs = get_ruleset(overrides={"critical_zone_min_shell_fraction": 0.45})
    df3 = _assess_floor(floor, rs, shell_tmin_mm=6.0)
    assert row(df3, "critical")["mrt_mm"] == pytest.approx(2.7)


def test_shell_tmin_input_from_job_file_and_command_line(tmp_path):
    from scananalyse.cli import _job_from_args, build_parser
    from scananalyse.job import read_job, resolve_units

    jf = tmp_path / "job.toml"
    jf.write_text('[floor]\ndiameter = 3000\nshell_course_tmin = 0.25\n[report]\nunits = "in"\n', encoding="utf-8")
    job = resolve_units(read_job(jf), "mm")
    assert job.shell_tmin_mm == pytest.approx(6.35)
    assert resolve_units(job, "mm").shell_tmin_mm == job.shell_tmin_mm  # idempotent
    # the option, in the scans' units when no units are given
    args = build_parser().parse_args(["assess", "scan.csv", "--out", str(tmp_path / "o"), "--diameter", "3000",
                                      "--shell-tmin", "6.0"])
    assert resolve_units(_job_from_args(args), "mm").shell_tmin_mm == pytest.approx(6.0)
    # not given: None, and the critical-zone minimum leaves the shell term out
    args = build_parser().parse_args(["assess", "scan.csv", "--out", str(tmp_path / "o"), "--diameter", "3000"])
    assert resolve_units(_job_from_args(args), "mm").shell_tmin_mm is None
    # refused: zero, or out of range
    jf.write_text("[floor]\nshell_course_tmin = 0\n", encoding="utf-8")
    with pytest.raises(InputError, match="floor.shell_course_tmin"):
        read_job(jf)
    jf.write_text("[floor]\nshell_course_tmin = 5000\n", encoding="utf-8")
    with pytest.raises(InputError, match="floor.shell_course_tmin"):
        read_job(jf)
