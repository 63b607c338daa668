"""Rates of new indications in the life distribution: a pit the older scan did not see is
drawn at its measured rate or faster, not at the slow rates of the zone's measured cells
(bench/bench_leak_calibration.py --scanned-only)."""

from types import SimpleNamespace

import numpy as np

from scananalyse.probability import _measured_points, zone_life_distribution


def _zone(seed):
    # 2000 cells of general thinning (0.03 mm/y, interval ±0.02), 30 grown pits (0.15-0.21
    # mm/y, ±0.03), all measured; one new indication: the older scan saw nothing there, its
    # measured rate (loss over the interval) 0.271 mm/y with 5 % point 0.247, and an
    # assumed rate of 1.16 mm/y (a late start) above it.
    rng = np.random.default_rng(seed)
    nominal, n_bulk, n_pit = 6.35, 2000, 30
    t = np.r_[nominal - rng.uniform(0.2, 0.8, n_bulk), np.full(n_pit, 4.5), 3.45]
    r = np.r_[np.full(n_bulk, 0.03), np.linspace(0.15, 0.21, n_pit), 0.271]
    half = np.r_[np.full(n_bulk, 0.02), np.full(n_pit, 0.03)]
    lo = np.r_[r[:-1] - half, 0.247]
    hi = np.r_[r[:-1] + half, 1.16]
    z = np.zeros_like(t)
    measured = np.r_[np.ones(n_bulk + n_pit, bool), False]
    return zone_life_distribution(t, r, z, lo, hi, z, z, 2.54, sigma_t=0.05, nominal=nominal,
                                  measured=measured, n_draws=4000, seed=seed)


def test_new_indication_not_drawn_below_its_measured_rate():
    # The zone's measured cells are all slower than 0.25 mm/y; drawn under their rate
    # distribution with a likelihood uniform from its 5 % point, the new indication was
    # drawn at that point in every draw (leak life 3.45 / 0.247 = 14.0 y); its measured
    # rate says 3.45 / 0.271 = 12.7 y.  The leak life's median must be at most the life at
    # the measured rate (plus the thickness noise), over several seeds; and it must not be
    # the life at rates up to the assumed one (drawn from its own likelihood: median about
    # 5 y), which nothing measured supports.
    for seed in (1, 2, 3):
        d = _zone(seed)
        med = float(np.median(d.life_leak))
        assert med <= (3.45 + 0.05) / 0.271, (seed, med)
        assert med >= 3.45 / 0.4, (seed, med)


def test_assumed_cells_take_their_measured_rate_as_point():
    # a new indication raised to its assumed rate (1.0) with a measured short-term rate 0.3
    # inside its interval [0.25, 1.0]: drawn from 0.3; a patched cell kept at 0.5 whose
    # original metal measured 0.1 (below its interval [0.5, 0.5]) keeps 0.5; a measured
    # cell is left as it is.
    a = np.array
    rates = SimpleNamespace(rate_top=a([1.0, 0.5, 0.2]), rate_under=a([0.0, 0.0, 0.0]),
                            rate_short_top=a([0.3, 0.1, 0.2]), rate_short_under=a([0.0, 0.0, 0.0]),
                            rate_long_top=a([0.05, 0.05, 0.1]), rate_long_under=a([0.0, 0.0, 0.0]),
                            rate_top_lo=a([0.25, 0.5, 0.15]), rate_under_lo=a([0.0, 0.0, 0.0]))
    top, under = _measured_points(rates, a([False, False, True]))
    np.testing.assert_allclose(top, [0.3, 0.5, 0.2])
    np.testing.assert_allclose(under, [0.0, 0.0, 0.0])
