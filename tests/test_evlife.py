"""The public stage functions moved out of the pipeline: the extreme-value life
(scananalyse.evlife), the zone fit with block halving (extremes.fit_zone) and the
short-term rate fill of indications the older scan missed (rates.fill_uncovered_rates).
Invented data, seeded."""

import datetime as dt
from types import SimpleNamespace

import numpy as np
import pytest

from scananalyse.evlife import LIFE_HORIZON_Y, hidden_parts, masked_nanmin, seen_lives, zone_lives
from scananalyse.extremes import MIN_BLOCK_MM, depth_map, fit_zone, zone_extremes
from scananalyse.rates import RateOptions, compute_rates, fill_uncovered_rates
from scananalyse.scan import FloorScan, ScanMeta

NOM = 10.0
PITCH = 10.0


def _floor(seed=3, shape=(60, 60)):
    """Gumbel(1.0, 0.2) loss on every cell of a 0.6 m square zone whose whole area is
    twice the scanned area (so there is an unscanned part to extrapolate to)."""
    rng = np.random.default_rng(seed)
    depth = rng.gumbel(1.0, 0.2, shape).clip(0.0, None)
    thickness = (NOM - depth).astype(np.float32)
    zmap = SimpleNamespace(names=["interior"], labels=np.zeros(shape, np.int16),
                           areas_mm2=np.array([2.0 * shape[0] * shape[1] * PITCH * PITCH]))
    return thickness, zmap


def _parts(thickness, zmap, rate, mrt, **kw):
    r = np.full(thickness.shape, rate, np.float32)
    m = np.full(thickness.shape, mrt, np.float32)
    common = dict(nominal=NOM, censored=None)
    hidden = hidden_parts(thickness, r, np.zeros_like(r), m, zmap, threshold=None, pitch=PITCH, block_mm=100.0,
                          seed=0, **common, **kw)
    seen = seen_lives(thickness, r, np.zeros_like(r), m, zmap, **common)
    return seen, hidden


def _life(thickness, zmap, rate, mrt):
    seen, hidden = _parts(thickness, zmap, rate, mrt)
    return zone_lives(seen, hidden)["interior"]["life_eva_y"]


def test_life_is_zero_once_the_allowance_is_used_up():
    thickness, zmap = _floor()
    mrt = float(np.nanmin(thickness)) + 0.1  # the thinnest scanned cell is already below MRT
    assert _life(thickness, zmap, 0.05, mrt) == 0.0


def test_life_is_the_horizon_when_nothing_corrodes():
    thickness, zmap = _floor()
    assert _life(thickness, zmap, 0.0, 2.0) == LIFE_HORIZON_Y


def test_life_falls_as_the_rate_rises_and_scales_as_its_inverse():
    # With one rate everywhere the projected block maxima are the H = 0 maxima shifted by
    # r·H, so the fitted quantile shifts by r·H too and life·r (the margin the deepest
    # expected loss has left, in mm) is the same for every r, within the root search's
    # 0.02 y tolerance and 0.05 y safety step (the bootstrap of the predictive quantile is
    # seeded alike at every horizon).
    thickness, zmap = _floor()
    rates = [0.1, 0.2, 0.4]
    lives = [_life(thickness, zmap, r, 2.0) for r in rates]
    assert lives[0] > lives[1] > lives[2] > 0
    assert lives[0] < LIFE_HORIZON_Y
    margins = [life * r for life, r in zip(lives, rates)]
    assert max(margins) - min(margins) <= 0.08 * max(rates)


def test_masked_nanmin_is_nanmin_of_the_masked_cells():
    rng = np.random.default_rng(1)
    v = rng.normal(size=(700, 9)).astype(np.float32)
    v[rng.random(v.shape) < 0.2] = np.nan
    m = rng.random(v.shape) < 0.5
    assert masked_nanmin(v, m, rows=64) == np.nanmin(v[m])
    assert np.isnan(masked_nanmin(v, np.zeros_like(m)))


def test_depth_map_censored_cells_are_valid_zeros():
    t = np.array([[9.0, np.nan], [10.5, 8.0]], np.float32)
    cens = np.array([[False, True], [False, True]])
    d = depth_map(t, NOM, cens)
    np.testing.assert_array_equal(d, np.array([[1.0, np.nan], [0.0, 0.0]], np.float32))


def test_fit_zone_halves_the_blocks_on_a_narrow_zone():
    # A strip 0.2 m wide: no 1 m block (nor 0.5 m one) is half covered, so the configured
    # side gives no fit; fit_zone halves it until blocks fit, not below MIN_BLOCK_MM.
    rng = np.random.default_rng(7)
    values = rng.gumbel(1.0, 0.2, (20, 400)).astype(np.float32)
    mask = np.ones(values.shape, bool)
    kw = dict(pitch_mm=PITCH, zone_area_mm2=values.size * PITCH ** 2, seed=0)
    assert not zone_extremes(values, mask, block_mm=1000.0, **kw)
    z = fit_zone(values, mask, block_mm=1000.0, **kw)
    assert z and MIN_BLOCK_MM <= z.block_mm < 1000.0
    assert z.row()["eva_block_mm"] == z.block_mm
    # a zone that fits with the configured blocks keeps them (larger blocks are preferred)
    wide = rng.gumbel(1.0, 0.2, (400, 400)).astype(np.float32)
    assert fit_zone(wide, np.ones(wide.shape, bool), block_mm=1000.0, pitch_mm=PITCH,
                    zone_area_mm2=wide.size * PITCH ** 2, seed=0).block_mm == 1000.0


def test_fill_uncovered_rates_scales_the_indications_measured_ratio():
    # One indication (a 3 x 3 pit); the older scan missed its right column.  Those cells take
    # their own loss times the largest short-term-rate-to-loss ratio measured in the pit.
    old_meta = ScanMeta(inspected=dt.date(2016, 5, 1), nominal=6.0, threshold=None, sigma=0.01, units="mm",
                        installed=dt.date(1996, 5, 1))
    new_meta = old_meta.replace(inspected=dt.date(2026, 5, 1))
    t_old = np.full((9, 9), 6.0, np.float32)
    t_new = t_old.copy()
    t_old[3:6, 3:6] = 5.5
    t_new[3:6, 3:6] = 4.5  # 1 mm more in 10 y where measured: short-term 0.1 mm/y
    t_new[4, 4] = 4.0
    t_old_seen = t_old.copy()
    t_old_seen[3:6, 5] = np.nan
    new = FloorScan(t_new, 0.0, 0.0, 10.0, new_meta)
    old_on_new = FloorScan(t_old_seen, 0.0, 0.0, 10.0, old_meta)
    side = np.full(t_new.shape, 2, np.int8)  # underside
    lr = compute_rates(new, old_on_new, side, options=RateOptions())
    labels = np.zeros(t_new.shape, np.int32)
    labels[3:6, 3:6] = 1
    assert np.isnan(lr.rate_short_under[4, 5])
    filled, n = fill_uncovered_rates(lr, new, old_on_new, labels)
    assert n == 3 and filled.counts["short_rate_filled_from_indication"] == 3
    measured = lr.rate_short_under[3:6, 3:5] / lr.loss_under[3:6, 3:5]
    ratio = float(np.nanmax(measured))
    np.testing.assert_allclose(filled.rate_short_under[3:6, 5], ratio * lr.loss_under[3:6, 5], rtol=1e-6)
    assert np.all(filled.rate_under[3:6, 5] >= filled.rate_short_under[3:6, 5])
    # no indication: nothing changes
    same, n0 = fill_uncovered_rates(lr, new, old_on_new, np.zeros_like(labels))
    assert n0 == 0 and same is lr


def test_hidden_prediction_is_the_law_of_the_maximum_over_the_unscanned_blocks():
    # Block maxima of Gumbel(1.0, 0.2) cells; the deepest of T hidden blocks has the law F^T
    # (Shibata 1994; Coles 2001 §3.1): its median is F^-1(0.5^(1/T)).  The predictive
    # median mixes the bootstrap fits, so it lies within a few scale units of that value,
    # and the predictive upper bound lies above the median.  Checked against scipy.stats.
    from scipy import stats

    thickness, zmap = _floor(seed=11, shape=(100, 100))
    seen, hidden = _parts(thickness, zmap, 0.01, 2.0)
    h = hidden["interior"]
    assert h.source == "zone" and h.area_mm2 == pytest.approx(100 * 100 * PITCH ** 2)
    # block maxima of 100 cells of Gumbel(1.0, 0.2): Gumbel(1.0 + 0.2 ln 100, 0.2)
    truth = stats.gumbel_r(loc=1.0 + 0.2 * np.log(100.0), scale=0.2)
    expected_p50 = truth.ppf(0.5 ** (1.0 / h.T))
    assert abs(h.depth_p50_mm - expected_p50) < 0.15
    assert h.depth_p95_mm > h.depth_p50_mm


def test_repairs_never_lengthen_the_life_of_metal_nobody_saw():
    # The hidden part is the floor's as found; a repaired seen part (every scanned cell
    # patched: no loss, no rate) leaves the zone's extreme-value life at the hidden part's.
    thickness, zmap = _floor(seed=5)
    seen, hidden = _parts(thickness, zmap, 0.05, 6.0)
    as_found = zone_lives(seen, hidden)["interior"]["life_eva_y"]
    patched = np.full(thickness.shape, NOM, np.float32)
    zero = np.zeros_like(patched)
    seen_rep = seen_lives(patched, zero, zero, np.full(patched.shape, 6.0, np.float32), zmap, nominal=NOM)
    repaired = zone_lives(seen_rep, hidden)["interior"]["life_eva_y"]
    assert seen_rep["interior"] == LIFE_HORIZON_Y
    assert repaired == pytest.approx(hidden["interior"].life_y) and as_found <= repaired
    assert repaired < LIFE_HORIZON_Y


def test_a_zone_too_small_for_a_fit_borrows_the_floors():
    # A 3 x 3-cell zone inside a floor: no fit of its own; its hidden part uses the floor's
    # fit, extrapolated to its own unscanned area, and says so.
    thickness, _ = _floor(seed=2, shape=(80, 80))
    labels = np.zeros(thickness.shape, np.int16)
    labels[10:13, 10:13] = 1
    zmap = SimpleNamespace(names=["interior", "sump"], labels=labels,
                           areas_mm2=np.array([2.0 * (80 * 80 - 9) * PITCH ** 2, 9 * PITCH ** 2 + 0.5e6]))
    seen, hidden = _parts(thickness, zmap, 0.02, 6.0)
    h = hidden["sump"]
    assert h.source == "floor" and "zone fit" in h.reason
    assert h.area_mm2 == pytest.approx(0.5e6)
    assert np.isfinite(h.life_y) and h.life_y < LIFE_HORIZON_Y


def test_a_zone_nobody_scanned_is_hidden_over_its_whole_area_with_the_floors_law():
    # A ring zone with no scanned cell (the shell margin the crawler cannot reach): it is
    # not skipped; its whole area is hidden and judged with the floor's fit.  Its median
    # deepest loss follows F^T over its own area (Shibata 1994; Coles 2001 §3.1), so it is
    # deeper than the median over the much smaller hidden part of a 3 x 3-cell zone.
    thickness, _ = _floor(seed=2, shape=(80, 80))
    labels = np.zeros(thickness.shape, np.int16)
    labels[:, -4:] = 1
    labels[10:13, 10:13] = 2
    thickness[:, -4:] = np.nan  # the ring was not scanned
    ring_mm2 = 2.0e6
    zmap = SimpleNamespace(names=["interior", "ring", "sump"], labels=labels,
                           areas_mm2=np.array([2.0 * 80 * 76 * PITCH ** 2, ring_mm2, 9 * PITCH ** 2 + 0.05e6]))
    seen, hidden = _parts(thickness, zmap, 0.02, 6.0)
    h = hidden["ring"]
    assert h.source == "floor" and "no scanned cell" in h.reason
    assert h.area_mm2 == pytest.approx(ring_mm2)
    assert h.depth_p50_mm > hidden["sump"].depth_p50_mm
    assert np.isfinite(h.life_y) and h.life_y < LIFE_HORIZON_Y
    assert "ring" not in seen  # nothing seen: the zone's life is the hidden part's alone


def test_cells_the_older_scan_saw_are_projected_not_hidden():
    thickness, zmap = _floor(seed=4)
    t_new = thickness.copy()
    t_new[:10, :] = np.nan  # the newer scan missed 10 rows; the older one saw them
    t_old = thickness + np.float32(0.5)  # half a millimetre thicker ten years before
    t_old[20, 20] = NOM - 5.0  # one deep pit only the older scan saw
    seen0 = seen_lives(t_new, np.full(t_new.shape, 0.01, np.float32), np.zeros_like(t_new),
                       np.full(t_new.shape, 2.0, np.float32), zmap, nominal=NOM)
    older = (np.where(np.isnan(t_new), t_old, np.nan).astype(np.float32), 10.0)
    t_old_only = older[0].copy()
    t_old_only[20, 20] = np.nan
    t_old_only[5, 5] = NOM - 7.5  # 7.5 mm deep then; at 0.01 mm/y it passes the 8 mm allowance in 50 y
    seen1 = seen_lives(t_new, np.full(t_new.shape, 0.01, np.float32), np.zeros_like(t_new),
                       np.full(t_new.shape, 2.0, np.float32), zmap, nominal=NOM, older=(t_old_only, 10.0))
    # (8 − 7.5 − 0.01·10) / 0.01 = 40 y, shorter than anything the newer scan saw
    assert seen1["interior"] == pytest.approx(40.0, abs=0.01) and seen1["interior"] < seen0["interior"]
