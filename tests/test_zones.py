"""Tests of floor geometry and zone maps (scananalyse.zones).

Areas are checked against plane geometry: an annulus has area π(R² − r²), an
annular sector ½·Δθ·(r₂² − r₁²), a polygon its shoelace area.  Cell-count areas
must converge to them as the pitch shrinks.
"""

import math

import numpy as np
import pytest

from scananalyse.errors import InputError
from scananalyse.rules import get_ruleset
from scananalyse.zones import (FloorGeometry, GridSpec, ZoneMap, ring_sector_zones, zone_map,
                               zone_table)


def grid_for(diameter, pitch, centre=(0.0, 0.0), margin=1):
    n = int(math.ceil(diameter / pitch)) + 2 * margin
    x0 = centre[0] - (n - 1) * pitch / 2
    y0 = centre[1] - (n - 1) * pitch / 2
    return GridSpec((n, n), x0, y0, pitch)


def shoelace(v):
    v = np.asarray(v, float)
    x, y = v[:, 0], v[:, 1]
    return 0.5 * abs(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1)))


RULES = get_ruleset()


def test_default_ring_areas_analytic():
    geo = FloorGeometry(8000.0, annular_width_mm=600.0)
    zm = zone_map(grid_for(8000, 20), geo, RULES)
    assert zm.names == ["critical", "annular", "interior"]
    R, w, a = 4000.0, 75.0, 600.0
    # annulus area π(R² − r²) (plane geometry)
    assert zm.area_m2("critical") == pytest.approx(math.pi * (R**2 - (R - w) ** 2) / 1e6, rel=1e-12)
    assert zm.area_m2("annular") == pytest.approx(math.pi * ((R - w) ** 2 - (R - a) ** 2) / 1e6, rel=1e-12)
    assert zm.area_m2("interior") == pytest.approx(math.pi * (R - a) ** 2 / 1e6, rel=1e-12)
    assert zm.areas_mm2.sum() == pytest.approx(geo.area_mm2, rel=1e-12)


def test_without_annular_ring():
    zm = zone_map(grid_for(3000, 10), FloorGeometry(3000.0), RULES)
    assert zm.names == ["critical", "interior"]
    assert zm.area_m2("interior") == pytest.approx(math.pi * (1500 - 75) ** 2 / 1e6)


@pytest.mark.parametrize("zone", ["critical", "annular", "interior"])
def test_cell_count_areas_converge(zone):
    geo = FloorGeometry(4000.0, centre=(130.0, -70.0), annular_width_mm=500.0)
    errs = []
    for pitch in (25.0, 12.5, 5.0):
        zm = zone_map(grid_for(4000, pitch, centre=geo.centre), geo, RULES)
        k = zm.index(zone)
        counted = zm.n_cells()[k] * pitch**2
        errs.append(abs(counted - zm.areas_mm2[k]) / zm.areas_mm2[k])
    # discretisation error of a ring of width w resolved by cells of pitch p shrinks
    # with p; at 5 mm the 75 mm critical ring (15 cells wide) is within 2 %
    assert errs[-1] < errs[0]
    assert errs[-1] < 0.02


def test_polygon_area_converges_and_carves_interior_only():
    geo = FloorGeometry(4000.0, annular_width_mm=500.0)
    # a triangle wholly in the interior, and a square straddling the annular ring
    tri = [(-800.0, -600.0), (700.0, -500.0), (-100.0, 900.0)]
    sq = [(1200.0, -300.0), (2100.0, -300.0), (2100.0, 300.0), (1200.0, 300.0)]
    errs = []
    for pitch in (40.0, 10.0, 4.0):
        zm = zone_map(grid_for(4000, pitch), geo, RULES, user_zones=[("low-spot", tri), ("east", sq)])
        errs.append(abs(zm.areas_mm2[zm.index("low-spot")] - shoelace(tri)) / shoelace(tri))
        # the square's cells lie only inside r < 1500 (the interior), never in the ring
        m = zm.mask("east")
        x = zm.x0 + zm.pitch * np.arange(zm.shape[1])
        y = zm.y0 + zm.pitch * np.arange(zm.shape[0])
        r = np.hypot(x[None, :], y[:, None])
        assert np.all(r[m] < 1500.0)
        assert np.any(zm.mask("annular") & (r > 1500) & (np.abs(y[:, None]) < 300)
                      & (x[None, :] > 1500))
        # interior analytic disc less the carved cells
        carved = (zm.n_cells()[zm.index("low-spot")] + zm.n_cells()[zm.index("east")]) * pitch**2
        assert zm.area_m2("interior") * 1e6 == pytest.approx(math.pi * 1500.0**2 - carved)
    assert errs[-1] < errs[0]
    assert errs[-1] < 0.01


def test_ring_sector_grid():
    geo = FloorGeometry(6000.0, annular_width_mm=600.0)
    zm = zone_map(grid_for(6000, 20), geo, RULES, user_zones=ring_sector_zones(3, 4, start_deg=45))
    # interior fully covered: dropped; 12 user zones follow critical and annular
    assert zm.names[:2] == ["critical", "annular"]
    assert "interior" not in zm.names
    assert len(zm.names) == 2 + 12
    ro = 2400.0
    dr = ro / 3
    for i in range(3):
        for j in range(4):
            # annular sector ½·Δθ·(r₂² − r₁²)
            expect = 0.5 * (math.pi / 2) * (((i + 1) * dr) ** 2 - (i * dr) ** 2)
            assert zm.areas_mm2[zm.index(f"r{i + 1}s{j + 1}")] == pytest.approx(expect)
    assert zm.areas_mm2.sum() == pytest.approx(geo.area_mm2)
    # a cell at (x, y) = (0, 1200): radius 1200 -> ring 2 (800..1600); angle 90° is in the
    # first sector [45°, 135°)
    i = int(round((1200 - zm.y0) / zm.pitch))
    j = int(round((0 - zm.x0) / zm.pitch))
    assert zm.names[zm.labels[i, j]] == "r2s1"
    # every floor cell has a zone
    x = zm.x0 + zm.pitch * np.arange(zm.shape[1])
    y = zm.y0 + zm.pitch * np.arange(zm.shape[0])
    r = np.hypot(x[None, :], y[:, None])
    assert np.all((zm.labels >= 0) == (r <= 3000.0))


def test_labels_outside_floor_and_dtype():
    zm = zone_map(grid_for(1000, 10, margin=5), FloorGeometry(1000.0), RULES)
    assert zm.labels.dtype == np.int16
    assert zm.labels[0, 0] == -1
    assert zm.labels[zm.shape[0] // 2, zm.shape[1] // 2] == zm.index("interior")


def test_all_unscanned_zone_gives_zero_coverage_and_nan():
    # rasterstats test_all_nodata style: a zone with no valid cell gives count 0 and NaN stats
    geo = FloorGeometry(2000.0)
    g = grid_for(2000, 10)
    zm = zone_map(g, geo, RULES)
    t = np.full(g.shape, 6.0, dtype=np.float32)
    t[zm.mask("critical")] = np.nan
    cov = zm.coverage_pct(np.isfinite(t))
    assert cov[zm.index("critical")] == 0.0
    assert cov[zm.index("interior")] == pytest.approx(100.0, abs=2.0)
    mx = zm.reduce(t, np.max)
    assert math.isnan(mx[zm.index("critical")])
    assert mx[zm.index("interior")] == 6.0
    tab = zone_table(zm, np.isfinite(t))
    assert list(tab.columns) == ["zone", "kind", "area_m2", "n_cells", "n_scanned", "coverage_pct"]
    assert tab.loc[tab.zone == "critical", "n_scanned"].item() == 0


def test_coverage_partial():
    geo = FloorGeometry(2000.0)
    g = grid_for(2000, 5)
    zm = zone_map(g, geo, RULES)
    x = zm.x0 + zm.pitch * np.arange(zm.shape[1])
    scanned = np.broadcast_to(x[None, :] > 0, g.shape)  # east half scanned
    cov = zm.coverage_pct(scanned)
    # half of each ring by symmetry, within the discretisation of a 5 mm grid
    assert cov[zm.index("interior")] == pytest.approx(50.0, abs=1.0)
    assert cov[zm.index("critical")] == pytest.approx(50.0, abs=2.5)


def test_reduce_keeps_inf_and_skips_nan():
    zm = zone_map(grid_for(500, 10), FloorGeometry(500.0), RULES)
    v = np.full(zm.shape, np.inf, dtype=np.float32)
    v[zm.mask("critical")] = np.nan
    v[zm.mask("critical") & (np.arange(zm.shape[1])[None, :] < 5)] = 3.0
    out = zm.reduce(v, np.min)
    assert out[zm.index("interior")] == np.inf
    assert out[zm.index("critical")] == 3.0


def test_reduce_fast_path_equals_plain_numpy_per_zone():
    # ground truth: numpy's nanmin/nanmax over each zone's cells picked by its mask
    rng = np.random.default_rng(3)
    zm = zone_map(grid_for(2000, 20), FloorGeometry(2000.0), RULES)
    v = rng.normal(6.0, 0.5, zm.shape).astype(np.float32)
    v[rng.random(zm.shape) < 0.3] = np.nan
    v[zm.mask("annular") if "annular" in zm.names else zm.mask("critical")] = np.nan  # a zone all NaN
    for func, ref in ((np.min, np.nanmin), (np.max, np.nanmax)):
        out = zm.reduce(v, func)
        for k, name in enumerate(zm.names):
            vals = v[zm.mask(name)]
            want = ref(vals) if np.isfinite(vals).any() else np.nan
            assert (np.isnan(out[k]) and np.isnan(want)) or out[k] == want
    # a reduction without a fast path takes the general route and agrees
    np.testing.assert_array_equal(zm.reduce(v, lambda a: a.min()), zm.reduce(v, np.min))


def test_gathered_reductions_and_counts_equal_plain_numpy_per_zone():
    # the zone assessment gathers each map's zoned cells once and reduces them per zone; the
    # ground truth is numpy over each zone's mask, a zone without any cell included
    rng = np.random.default_rng(5)
    zm = zone_map(grid_for(2000, 20), FloorGeometry(2000.0), RULES,
                  user_zones=[("outside", [(5000, 5000), (5100, 5000), (5000, 5100)])])  # no cell
    v = rng.normal(6.0, 0.5, zm.shape).astype(np.float32)
    v[rng.random(zm.shape) < 0.3] = np.nan
    v[zm.mask("critical")] = np.nan  # a zone all NaN
    g = zm.gather(v)
    assert g.size == np.count_nonzero(zm.labels >= 0)
    for func, ref in ((np.min, np.nanmin), (np.max, np.nanmax)):
        out = zm.reduce_gathered(g, func)
        np.testing.assert_array_equal(out, zm.reduce(v, func))
        for k, name in enumerate(zm.names):
            vals = v[zm.mask(name)]
            want = ref(vals) if np.isfinite(vals).any() else np.nan
            assert (np.isnan(out[k]) and np.isnan(want)) or out[k] == want, name
    m = rng.random(zm.shape) < 0.4
    counts = zm.count_gathered(zm.gather(m))
    assert counts.tolist() == [int(np.count_nonzero(m & zm.mask(n))) for n in zm.names]
    assert counts[zm.index("outside")] == 0
    np.testing.assert_array_equal(zm.coverage_from_counts(counts), zm.coverage_pct(m))
    with pytest.raises(ValueError, match="func"):
        zm.reduce_gathered(g, np.mean)
    with pytest.raises(ValueError, match="shape"):
        zm.gather(v[:-1])


def test_zone_map_from_floorscan():
    import datetime as dt

    from scananalyse.scan import FloorScan, ScanMeta
    g = grid_for(1200, 20)
    scan = FloorScan(np.full(g.shape, 6.35, np.float32), g.x0, g.y0, g.pitch,
                     ScanMeta(inspected=dt.date(2024, 1, 1), nominal=6.35))
    zm = zone_map(scan, FloorGeometry(1200.0), RULES)
    assert isinstance(zm, ZoneMap) and zm.shape == scan.shape


@pytest.mark.parametrize("kwargs, match", [
    ({"diameter_mm": -5.0}, r"field 'diameter'"),
    ({"diameter_mm": 1000.0, "annular_width_mm": 600.0}, r"field 'annular_width'"),
    ({"diameter_mm": 1000.0, "centre": (0.0,)}, r"field 'centre'"),
])
def test_geometry_errors(kwargs, match):
    with pytest.raises(InputError, match=match):
        FloorGeometry(**kwargs)


def test_zone_errors():
    g = grid_for(2000, 20)
    with pytest.raises(InputError, match=r"field 'annular_width'.*must exceed the critical-zone width"):
        zone_map(g, FloorGeometry(2000.0, annular_width_mm=50.0), RULES)
    with pytest.raises(InputError, match=r"field 'critical': duplicate or reserved"):
        zone_map(g, FloorGeometry(2000.0), RULES, user_zones=[("critical", [(0, 0), (1, 0), (0, 1)])])
    with pytest.raises(InputError, match=r"field 'bad': a polygon needs at least 3"):
        zone_map(g, FloorGeometry(2000.0), RULES, user_zones=[("bad", [(0, 0), (1, 0)])])
    with pytest.raises(InputError, match=r"field 'outer_radius_mm'"):
        zone_map(g, FloorGeometry(2000.0), RULES,
                 user_zones=ring_sector_zones(2, 2, outer_radius_mm=5000.0))
    zm = zone_map(g, FloorGeometry(2000.0), RULES)
    with pytest.raises(InputError, match=r"field 'zone': unknown zone 'annular'"):
        zm.mask("annular")
    with pytest.raises(InputError, match=r"field 'n_rings'"):
        ring_sector_zones(0, 3)


@pytest.mark.parametrize("n_zones", [3, 12])
def test_zone_groups_are_each_zones_cells_ascending_by_either_path(n_zones, monkeypatch):
    # groups() takes one pass per zone for few zones and a stable sort for many; both must
    # give exactly np.flatnonzero(labels == k) per zone, and _zoned the groups joined.
    from scananalyse import zones as Z

    rng = np.random.default_rng(3)
    labels = rng.integers(-1, n_zones, size=(37, 53)).astype(np.int16)
    for few in (0, 100):  # force the sort, then the per-zone passes
        monkeypatch.setattr(Z, "_FEW_ZONES", few)
        zm = Z.ZoneMap(labels=labels, names=[f"z{k}" for k in range(n_zones)], kinds=["user"] * n_zones,
                       areas_mm2=np.ones(n_zones), x0=0.0, y0=0.0, pitch=10.0, geometry=None)
        g = zm.groups()
        for k in range(n_zones):
            np.testing.assert_array_equal(g[k], np.flatnonzero(labels.ravel() == k))
            assert g[k].dtype == np.int32
        np.testing.assert_array_equal(zm._zoned, np.concatenate(g))
