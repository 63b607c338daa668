"""Zone maximum rates and the co-located life against synthetic truth (issue 23 item 3).

Independent source: the truth maps of ``scananalyse.synth.make_pair`` (the growth rate of
each face's loss at the newer inspection, the true thickness); the true co-located life
of a zone is computed here, min over its scanned cells of
(t_true − MRT)/(r_top_true + r_under_true).  The floor is the one the issue measured on:
7 years in service at the older scan, 14 at the newer one, pits up to 0.15 mm/y, most of
them crossing the 1 mm MFL threshold between the inspections.  The older scan is
resampled with the TRUE transform (registration is not under test).  The full sweep over
40 seeds is ``bench/bench_truth.py``; this is a fast subset with thresholds a little below
the sweep's fractions.
"""

import datetime as dt

import numpy as np
import pytest

from scananalyse import assess, rates, register, synth
from scananalyse.attribution import side_map
from scananalyse.rules import get_ruleset
from scananalyse.zones import FloorGeometry, zone_map

RULES = get_ruleset()
YOUNG = dict(diameter_mm=4000, installed=dt.date(2012, 5, 1), inspected_old=dt.date(2019, 5, 1),
             inspected_new=dt.date(2026, 5, 1), max_pit_rate=0.15, deep_fraction=0.0,
             shell_margin_mm=40, repairs=0)
SEEDS = range(8)
#: zone sides whose true maximum is below this are not measurable from two scans 7 y
#: apart (about 2.5 × the rate noise √(0.1² + 0.1²)/7 = 0.02 mm/y)
MIN_RATE = 0.05


def _case(seed):
    p = synth.make_pair(seed=seed, **YOUNG)
    tr = p.truth
    oon = register.resample_onto(p.old, p.new, register.RigidTransform(tr.rotation_deg, tr.dx_mm, tr.dy_mm))
    lr = rates.compute_rates(p.new, oon, side_map(p.new))
    zm = zone_map(p.new, FloorGeometry(tr.diameter_mm, centre=tr.centre), RULES)
    table = assess.assess_zones(thickness=p.new.thickness, side=p.new.side, rate_top=lr.rate_top,
                                rate_under=lr.rate_under, zones=zm, meta=p.new.meta, rules=RULES,
                                zone_rates=lr.zone_inputs())
    return p, lr, zm, table


@pytest.fixture(scope="module")
def rows():
    out = []
    for seed in SEEDS:
        p, lr, zm, table = _case(seed)
        tr = p.truth
        scanned = np.isfinite(p.new.thickness)
        rate_true = tr.rate_top_true.astype(np.float64) + tr.rate_under_true.astype(np.float64)
        for row in table.itertuples():
            m = zm.mask(row.zone) & scanned
            with np.errstate(divide="ignore"):
                true_life = float(np.min((tr.t_new_true[m].astype(np.float64) - row.mrt_mm) / rate_true[m]))
            for s in ("top", "under"):
                out.append({"seed": seed, "zone": row.zone, "side": s,
                            "true": float(np.max(getattr(tr, f"rate_{s}_true")[m])),
                            "point": getattr(row, f"rate_{s}_max_mm_y"),
                            "lo": getattr(row, f"rate_{s}_max_lo_mm_y"),
                            "hi": getattr(row, f"rate_{s}_max_hi_mm_y"),
                            "raw": getattr(row, f"rate_{s}_max_raw_mm_y"),
                            "life": row.life_local_y, "life_short": row.life_local_short_y,
                            "life_fit": row.life_local_fit_y,
                            "true_life": true_life})
    return out


def test_truth_inside_the_ninety_percent_interval(rows):
    inside = [r["lo"] <= r["true"] <= r["hi"] for r in rows]
    print(f"truth inside [lo, hi]: {np.mean(inside):.2f} of {len(inside)} zone sides")
    assert np.mean(inside) >= 0.90


def test_interior_point_estimate_within_30pct(rows):
    meas = [r for r in rows if r["zone"] == "interior" and r["true"] >= MIN_RATE]
    ratio = np.array([r["point"] / r["true"] for r in meas])
    raw = np.array([r["raw"] / r["true"] for r in meas])
    print("point / true:", np.round(ratio, 2), "raw max / true:", np.round(raw, 2))
    assert len(meas) == 2 * len(SEEDS)
    assert np.mean(np.abs(ratio - 1) <= 0.30) >= 0.85
    assert 0.85 <= np.median(ratio) <= 1.25


def test_colocated_lives_against_the_true_life(rows):
    # life_local_y (point rates, what the recommendation uses) stays on the short side of
    # the truth in the interior; life_local_fit_y (the selection-aware rates) meets the
    # issue's 0.75-1.1 band in most interior zones; the short end (each cell's upper rate)
    # never promises more than the metal supports
    keys = ("life", "life_fit", "life_short")
    lives = {(r["seed"], r["zone"]): [r[k] / r["true_life"] for k in keys]
             for r in rows if r["true_life"] > 0 and np.isfinite(r["true_life"])}
    interior = np.array([v for (_s, z), v in lives.items() if z == "interior"])
    print("interior life / true (point, fit, short):", np.round(interior, 2).tolist())
    assert np.all(interior[:, 0] <= 1.0)
    assert np.all(interior[:, 0] <= interior[:, 1] + 1e-6)  # the point is the faster estimate
    assert np.all(interior[:, 0] >= 0.45)
    assert np.mean((interior[:, 1] >= 0.75) & (interior[:, 1] <= 1.10)) >= 0.6
    assert np.all(interior[:, 1] <= 1.10)
    every = np.array(list(lives.values()))
    assert np.all(every[:, 2] <= 1.0)


def test_point_inside_its_interval_and_columns_present(rows):
    for r in rows:
        if np.isfinite(r["point"]):
            assert r["lo"] <= r["point"] <= r["hi"]
    _p, _lr, _zm, table = _case(0)
    for col in ("rate_top_max_lo_mm_y", "rate_top_max_hi_mm_y", "rate_under_max_lo_mm_y",
                "rate_under_max_hi_mm_y"):
        assert col in table.columns
