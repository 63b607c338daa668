"""A zone read wholly below the detection threshold: its co-located life is not measured.

The MFL scan reads shallower loss than its threshold as nominal, so a cell below the
threshold has a point rate of 0 that is the censored reading's, not a measurement
(domain notes §1: "below it the plate reads as nominal, so the scan is censored at the
threshold").  Such a zone must not get an infinite co-located life, and without
extreme-value statistics its below-threshold metal gets a bounded life.
"""

import datetime as dt
import math
import sys
from pathlib import Path

import numpy as np
import pytest

from scananalyse.assess import assess_zones
from scananalyse.rates import ZoneRateInputs
from scananalyse.rules import get_ruleset
from scananalyse.scan import ScanMeta
from scananalyse.zones import FloorGeometry, GridSpec, zone_map

RULES = get_ruleset()
PITCH, N, DIAM = 50.0, 62, 3000.0
GRID = GridSpec((N, N), -(N - 1) * PITCH / 2, -(N - 1) * PITCH / 2, PITCH)


def _meta(threshold):
    return ScanMeta(inspected=dt.date(2026, 5, 1), nominal=6.35, method="MFL", threshold=threshold,
                    installed=dt.date(2012, 5, 1))


def _floor(hi: float):
    zm = zone_map(GRID, FloorGeometry(DIAM), RULES)
    inside = zm.labels >= 0
    t = np.where(inside, np.float32(6.35), np.float32(np.nan))  # every cell reads nominal
    zeros = np.zeros(GRID.shape, np.float32)
    his = np.full(GRID.shape, hi, np.float32)
    zr = ZoneRateInputs(top_fit=zeros, top_lo=zeros, top_hi=his, under_fit=zeros, under_lo=zeros,
                        under_hi=his, sigma=0.02)
    return zm, t, zeros, zr


def _row(df, zone):
    return df.set_index("zone").loc[zone]


def test_censored_zone_has_no_infinite_colocated_life_and_a_bounded_fallback():
    zm, t, zeros, zr = _floor(hi=0.176)
    df = assess_zones(thickness=t, side=None, rate_top=zeros, rate_under=zeros, zones=zm,
                      meta=_meta(1.0), rules=RULES, zone_rates=zr)
    for zone in ("interior", "critical"):
        r = _row(df, zone)
        assert math.isnan(r["life_local_y"]), zone  # not measured, not inf
        assert "no co-located life is measured" in r["notes"]
        assert "eva-fallback" in r["flags"].split(";")
        assert r["rate_eva_source"] == "censored-hi"
        # loss at the threshold growing at the larger side's upper end (not the sum):
        # (6.35 - 1.0 - MRT) / 0.176, hand arithmetic on the zone's own MRT
        mrt = r["mrt_mm"]
        assert r["life_eva_y"] == pytest.approx((6.35 - 1.0 - mrt) / 0.176, rel=1e-5)
        assert r["interval_recommended_y"] <= r["life_eva_y"]
        assert r["interval_recommended_y"] < r["cap_y"]


def test_ut_scan_is_not_censored_and_keeps_infinite_life():
    # A UT scan has no threshold: a cell measured unchanged has a measured rate of 0.
    zm, t, zeros, zr = _floor(hi=0.05)
    df = assess_zones(thickness=t, side=None, rate_top=zeros, rate_under=zeros, zones=zm,
                      meta=_meta(None), rules=RULES, zone_rates=zr)
    r = _row(df, "interior")
    assert r["life_local_y"] == math.inf
    assert "eva-fallback" not in r["flags"].split(";")


def test_one_measured_cell_keeps_its_colocated_life():
    zm, t, zeros, zr = _floor(hi=0.176)
    ru = zeros.copy()
    i = N // 2
    t[i, i] = 4.35                       # reported loss 2.0 mm > threshold 1.0 mm
    ru[i, i] = 0.2
    df = assess_zones(thickness=t, side=None, rate_top=zeros, rate_under=ru, zones=zm,
                      meta=_meta(1.0), rules=RULES, zone_rates=zr)
    r = _row(df, "interior")
    assert r["life_local_y"] == pytest.approx((4.35 - r["mrt_mm"]) / 0.2, rel=1e-5)
    assert "no co-located life is measured" not in r["notes"]


def test_rates_only_critical_zone_not_beyond_its_true_life():
    # Synthetic truth (scananalyse.synth), the seeds where a wholly censored critical zone
    # had an infinite co-located life and was recommended the 20-year cap against a true
    # life of 15.1-17.9 y (bench/RESULTS.md, rates truth sweep).
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))
    import bench_truth
    for seed in (13, 16, 31):
        rows = [r for r in bench_truth.evaluate(seed) if r["zone"] == "critical" and r["side"] == "top"]
        assert rows, seed
        r = rows[0]
        assert not math.isinf(r["life"]), seed
        assert r["recommended"] <= 1.1 * r["true_life"], (seed, r["recommended"], r["true_life"])
