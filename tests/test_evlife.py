"""The public stage functions moved out of the pipeline: the extreme-value life
(scananalyse.evlife), the zone fit with block halving (extremes.fit_zone) and the
short-term rate fill of indications the older scan missed (rates.fill_uncovered_rates).
Invented data, seeded."""

import datetime as dt
from types import SimpleNamespace

import numpy as np

from scananalyse.evlife import LIFE_HORIZON_Y, masked_nanmin, zone_lives
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


def _life(thickness, zmap, rate, mrt):
    r = np.full(thickness.shape, rate, np.float32)
    out = zone_lives(thickness, r, np.zeros_like(r), np.full(thickness.shape, mrt, np.float32), zmap,
                     nominal=NOM, censored=None, threshold=None, pitch=PITCH, block_mm=100.0, seed=0)
    return out["interior"]["life_eva_y"]


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
    # 0.02 y tolerance and 0.05 y safety step.
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
