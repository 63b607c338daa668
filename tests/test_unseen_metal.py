"""What the scan did not see, in the zone's life distribution and the zone table: a zone
nobody scanned, spot readings on unscanned metal, and a repaired floor (which changes none
of that metal).  Hand arithmetic and scipy.stats as the references."""

import datetime as dt

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from scananalyse.assess import code_interval
from scananalyse.extremes import GumbelFit
from scananalyse.probability import zone_life_distribution
from scananalyse.readings import add_reading_zones
from scananalyse.rules import get_ruleset

T0, MRT = 6.35, 2.54


def _zone(t, r, half=0.01, **kw):
    t = np.atleast_1d(np.asarray(t, float))
    r = np.broadcast_to(np.asarray(r, float), t.shape)
    z = np.zeros_like(t)
    return zone_life_distribution(t, r, z, r - half, r + half, z, z, kw.pop("mrt", MRT), sigma_t=0.1,
                                  nominal=T0, **kw)


def _constant_rule(rate):
    return lambda rng, d: np.full(np.shape(d), rate)


def test_zone_nobody_scanned_is_its_whole_area_at_the_floors_rates():
    # No scanned cell, a Gumbel law of the deepest block loss lent by the floor, T blocks,
    # and a floor rate of 0.1 mm/y: life = (t0 - D - MRT)/0.1 with D the deepest of T
    # block maxima.  Its median is near the plug-in one: F(x)^T = 1/2 gives
    # x = loc - scale*ln(-ln(0.5**(1/T))) (scipy.stats.gumbel_r.ppf), the bootstrap of
    # the parameters widening it a little, not shifting the median far.
    fit = GumbelFit(loc=1.5, scale=0.25, method="mle", loglik=0.0, n=60)
    T = 40.0
    d = zone_life_distribution(np.array([]), *([np.array([])] * 6), MRT, sigma_t=0.1, nominal=T0,
                               hidden_fit=fit, hidden_T=T, floor_rule=_constant_rule(0.1), n_draws=4000, seed=3)
    assert d.ok and d.p_hidden_governs == 1.0 and d.notes
    x50 = stats.gumbel_r.ppf(0.5 ** (1.0 / T), loc=1.5, scale=0.25)  # scipy.stats reference
    assert d.quantiles()[1] == pytest.approx((T0 - x50 - MRT) / 0.1, rel=0.08)
    # the leak: zero thickness instead of MRT, at the same draws
    assert np.all(d.life_leak >= d.life_mrt)
    # no floor rule (no measured cell anywhere) or no fit: no estimate, said why
    for kw in (dict(hidden_fit=fit, hidden_T=T), dict(floor_rule=_constant_rule(0.1))):
        nd = zone_life_distribution(np.array([]), *([np.array([])] * 6), MRT, sigma_t=0.1, nominal=T0, **kw)
        assert not nd.ok and "not scanned" in nd.reason


def test_a_spot_reading_below_mrt_governs_the_zone():
    # sound scanned metal (6 mm at 0.05 mm/y: 69 y to MRT) and one hand UT spot where the
    # scan has no value reading 2.2 mm, below the MRT of 2.54 mm: the zone is below MRT now
    base = _zone(np.full(300, 6.0), 0.05, seed=1)
    assert base.quantiles()[0] > 50.0
    spot = _zone(np.full(300, 6.0), 0.05, seed=1, spots=(np.array([2.2]), np.array([np.nan]), 0.1))
    assert spot.p_mrt(0.0) > 0.99 and spot.p_hidden_governs > 0.99
    # a spot above MRT with a measured short-term rate faster than the zone's: it governs at
    # its own rate, (3.54 - 2.54)/0.5 = 2 y (thickness noise 0.1 mm -> +-0.2 y, 1 sd)
    fast = _zone(np.full(300, 6.0), 0.05, seed=2, spots=(np.array([3.54]), np.array([0.5]), 0.1))
    assert fast.quantiles()[1] == pytest.approx(2.0, abs=0.05)
    assert fast.quantiles()[0] == pytest.approx(2.0 - 1.6449 * 0.2, abs=0.1)  # normal 5 % point


def test_repaired_floor_takes_the_unseen_part_as_found():
    # As found: deep unscanned part governs.  Repaired: every scanned cell new plate at a
    # slow rate, the unseen part given as found: the repaired life can be no longer than
    # the unseen part's, draw for draw (without it, the unscanned part's rates would come
    # from the repaired cells).
    fit = GumbelFit(loc=2.0, scale=0.3, method="mle", loglik=0.0, n=30)
    t = np.concatenate([np.full(150, 6.0), np.full(50, 3.2)])
    r = np.concatenate([np.full(150, 0.02), np.full(50, 0.3)])
    found = _zone(t, r, hidden_fit=fit, hidden_T=50.0, seed=5)
    h_mrt, h_leak = found.unseen
    assert h_mrt is not None and np.all(found.life_mrt <= h_mrt)
    rep = _zone(np.full(200, T0), 0.02, hidden_fit=fit, hidden_T=50.0, seed=5, unseen=found.unseen)
    assert np.array_equal(rep.life_mrt, np.minimum(rep.life_mrt, h_mrt))
    assert np.quantile(rep.life_mrt, 0.5) <= np.quantile(h_mrt, 0.5)
    # drawn afresh from the slow new plate, the unseen part would have been given longer lives
    fresh = _zone(np.full(200, T0), 0.02, hidden_fit=fit, hidden_T=50.0, seed=5)
    assert np.quantile(fresh.life_mrt, 0.5) > 2 * np.quantile(rep.life_mrt, 0.5)


def test_repaired_floor_keeps_the_rates_of_metal_it_did_not_repair():
    # MFL zone: 100 cells below the 1.0 mm threshold (the below-threshold part, taken at
    # the threshold, growing at the rate of measured cells of similar depth), 100 cells
    # 1.0 mm deep at 0.1 mm/y and 100 cells 0.2 mm deep at 0.005 mm/y.  As found the
    # below-threshold part governs: (6.35 - 1.0 - 2.54) / 0.1 = 28.1 y (hand arithmetic).
    # The 1.0 mm cells are patched (new plate at 0.005 mm/y).  The repaired floor takes
    # the rates as found: the unrepaired below-threshold metal still reaches MRT at about
    # 28 y; rates estimated afresh from the repaired cells would have given it 562 y.
    n = 100
    t = np.concatenate([np.full(n, T0), np.full(n, T0 - 1.0), np.full(n, T0 - 0.2)])
    r = np.concatenate([np.zeros(n), np.full(n, 0.1), np.full(n, 0.005)])
    cens = np.arange(3 * n) < n
    kw = dict(censored=cens, threshold=1.0, seed=3, n_draws=2000)
    found = _zone(t, r, half=0.005, **kw)
    assert np.median(found.life_mrt) == pytest.approx(28.1, rel=0.1)
    t_rep, r_rep = t.copy(), r.copy()
    t_rep[n:2 * n], r_rep[n:2 * n] = T0, 0.005
    rep = _zone(t_rep, r_rep, half=0.0, reference=found.reference, **kw)
    assert np.median(rep.life_mrt) == pytest.approx(28.1, rel=0.1)
    fresh = _zone(t_rep, r_rep, half=0.0, **kw)
    assert np.median(fresh.life_mrt) > 100.0


def _scanned_row(**kw):
    row = {"zone": "interior", "flags": "", "notes": "", "cap_y": 20.0, "t_min_mm": 4.5, "mrt_mm": MRT,
           "rtbc_mm": 4.5, "rtip_mm": 6.0, "stpr_mm_y": 0.0, "upr_mm_y": 0.0, "t_used_upr_mm": 4.5,
           "interval_code_y": 0.0, "life_local_y": 12.0, "interval_recommended_y": 0.0, "limiting": "local",
           "next_due": ""}
    row.update(kw)
    return pd.DataFrame([row])


def test_spot_readings_on_a_scanned_zone_lower_its_bounds():
    # A scanned zone: thinnest scanned 4.5 mm underside, 6.0 mm top; code formula and a
    # co-located life of 12 y.  A hand UT spot off the scan reads 3.2 mm (underside) with a
    # co-located life of 3.7 y.  The code formula is rerun with RTbc = 3.2 (API 653
    # bottom-minimum formula, as assess.code_interval; hand arithmetic below), the life
    # becomes 3.7 y and the recommendation 3.5 y (rounded down to 0.5 y), said so.
    inspected, installed = dt.date(2026, 5, 1), dt.date(1996, 5, 1)
    age = (inspected - installed).days / 365.2425
    def code_of(rtbc, rtip, mrt):
        return code_interval(t0=T0, rtbc=rtbc, rtip=rtip, mrt=mrt, age_years=age, method="UT")

    before = code_of(4.5, 6.0, MRT).interval_y
    table = _scanned_row(interval_code_y=before, interval_recommended_y=12.0)
    summary = pd.DataFrame({"zone": ["interior"], "n_readings": [1], "t_min_mm": [3.2], "x_t_min_mm": [10.0],
                            "y_t_min_mm": [20.0], "interval_code_y": [9.0], "life_local_y": [3.7],
                            "rtbc_mm": [3.2], "rtip_mm": [T0], "flags": ["points-only"], "notes": ["p"]})
    got = add_reading_zones(table, summary, rules=get_ruleset(), inspected=inspected, code_of=code_of).iloc[0]
    stpr, upr = (T0 - 6.0) / age, (T0 - 3.2) / age
    assert got["interval_code_y"] == pytest.approx((3.2 - MRT) / (stpr + upr), rel=1e-9)
    assert got["rtbc_mm"] == 3.2 and got["rtip_mm"] == 6.0 and got["t_min_mm"] == 3.2
    assert got["life_local_y"] == 3.7
    assert got["interval_recommended_y"] == 3.5 and got["next_due"] == "2029-10-31"  # 3 calendar years + 182.6 d
    assert "readings-govern" in got["flags"].split(";") and "3.20 mm" in got["notes"]
    assert "below-mrt" not in got["flags"].split(";")
    # a reading below MRT: measured metal below MRT, said so, recommendation 0
    low = summary.assign(t_min_mm=2.3, rtbc_mm=2.3, life_local_y=0.0)
    bad = add_reading_zones(table, low, rules=get_ruleset(), inspected=inspected, code_of=code_of).iloc[0]
    assert bad["interval_recommended_y"] == 0.0 and {"below-mrt", "readings-govern"} <= set(bad["flags"].split(";"))
    assert "does not cover it" in bad["notes"]
    # readings no thinner and no shorter-lived than the scan change nothing
    calm = summary.assign(t_min_mm=5.0, rtbc_mm=5.0, life_local_y=30.0)
    same = add_reading_zones(table, calm, rules=get_ruleset(), inspected=inspected, code_of=code_of).iloc[0]
    assert same["interval_recommended_y"] == 12.0 and same["interval_code_y"] == pytest.approx(before)
    assert "readings-govern" not in str(same["flags"])


def test_floor_rule_on_a_systematic_sample_draws_the_floors_rates(monkeypatch):
    # A floor of 400 000 measured cells whose rate grows with depth, r = 0.02 + 0.05 d
    # (interval +-0.01): the similar-depth rule built on a systematic sample of 150 000
    # cells draws the same rates at each depth as the rule built on every cell, and both
    # recover the law (hand arithmetic).
    from types import SimpleNamespace

    import scananalyse.probability as P

    rng = np.random.default_rng(7)
    n = 400_000
    depth = rng.gamma(2.0, 0.4, n)
    t = (T0 - depth).reshape(800, 500)
    r = (0.02 + 0.05 * depth).reshape(t.shape)
    z = np.zeros_like(r)
    lr = SimpleNamespace(rate_top=z, rate_under=r, rate_top_lo=z, rate_top_hi=z, rate_under_lo=r - 0.01,
                         rate_under_hi=r + 0.01, rate_short_top=z, rate_long_top=z, rate_short_under=r,
                         rate_long_under=r, censored=None, threshold=None)
    mask = np.ones(t.shape, bool)
    sampled = P.floor_rate_rule(t, lr, mask, nominal=T0, sigma_t=0.1)
    monkeypatch.setattr(P, "REF_CELLS", 10 * n)
    full = P.floor_rate_rule(t, lr, mask, nominal=T0, sigma_t=0.1)
    for d in (0.3, 1.0, 2.5, float(np.quantile(depth, 0.999))):
        ds = np.full(20_000, d)
        a = sampled(np.random.default_rng(1), ds).mean()
        b = full(np.random.default_rng(1), ds).mean()
        assert a == pytest.approx(b, rel=0.03), d
        if d < 3.0:  # in the deepest 2 % the rule draws among the deepest 2 % of the cells
            assert a == pytest.approx(0.02 + 0.05 * d, rel=0.1), d
