"""Timings of scananalyse.extremes, and coverage of the whole-zone bounds.

Run:  python bench/bench_extremes.py [--coverage N]

Timings are printed beside a plain numpy pass (``np.nanmax`` over the same grid)
measured in the same run, so the ratios travel between machines.  With
``--coverage N`` the script also measures, over N seeds, how often the deepest
true loss over a whole zone (unscanned parts included) lies below
``depth_eva_mm``, ``depth_eva_upper_mm`` and ``depth_pred_upper_mm``, on
(a) a sparse-pit field whose block maxima are Gumbel by construction and
(b) ``scananalyse.synth`` floors.
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np

from scananalyse import extremes as ex


def best_of(fn, repeat=3):
    """Shortest wall time of ``repeat`` calls of ``fn``. [s]"""
    out = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        out.append(time.perf_counter() - t0)
    return min(out)


def timings():
    rng = np.random.default_rng(0)
    n = 2646                                          # 7.0 million cells
    loss = np.where(rng.random((n, n), dtype=np.float32) < 0.002,
                    rng.exponential(0.5, (n, n)).astype(np.float32), np.float32(0.0))
    loss[rng.random((n, n)) < 0.05] = np.nan          # 5 % unscanned
    plates = (np.arange(n)[:, None] // 180) * 100 + (np.arange(n)[None, :] // 600)
    print(f"grid {n} x {n} = {n * n / 1e6:.1f} M cells, float32")
    t_np = best_of(lambda: np.nanmax(loss))
    print(f"  np.nanmax over the grid            {t_np * 1e3:8.1f} ms   (1.0)")
    for b in (50, 100, 200):
        t = best_of(lambda: ex.block_maxima(loss, block_cells=b, threshold=1.0))
        print(f"  block_maxima tiles {b:3d} cells       {t * 1e3:8.1f} ms   ({t / t_np:.1f} x)")
    t = best_of(lambda: ex.block_maxima(loss, labels=plates, threshold=1.0))
    print(f"  block_maxima per plate label       {t * 1e3:8.1f} ms   ({t / t_np:.1f} x)")
    zone = np.ones(loss.shape, bool)
    t = best_of(lambda: ex.zone_extremes(loss, zone, pitch_mm=10.0, zone_area_mm2=(n * 10.0) ** 2,
                                         block_mm=1000.0, threshold=1.0), repeat=2)
    print(f"  zone_extremes (1 m blocks, all)    {t * 1e3:8.1f} ms   ({t / t_np:.1f} x)")

    x = rng.gumbel(2.0, 0.5, 300)
    fit = ex.fit_gumbel_mle(x)
    t = best_of(lambda: ex.return_level_bounds(fit, x, 100.0, n_boot=1000))
    t_np2 = best_of(lambda: np.nanmax(rng.random((1000, 300)), axis=1))
    print(f"bootstrap Gumbel MLE 1000 x 300       {t * 1e3:8.1f} ms   "
          f"({t / t_np2:.0f} x a nanmax pass over the (1000, 300) array)")
    u = float(np.quantile(x, 0.4))
    fc = ex.fit_gumbel_mle(x, threshold=u)
    t = best_of(lambda: ex.return_level_bounds(fc, x, 100.0, n_boot=1000, threshold=u))
    print(f"bootstrap censored Gumbel 1000 x 300  {t * 1e3:8.1f} ms")
    t = best_of(lambda: ex.return_level_bounds(fit, x, 100.0, method="profile"))
    print(f"profile bound Gumbel, 300 blocks      {t * 1e3:8.1f} ms")
    g = ex.fit_gev_mle(x)
    t = best_of(lambda: ex.return_level_bounds(g, x, 100.0, n_boot=50), repeat=1)
    print(f"bootstrap GEV (loop) 50 x 300         {t * 1e3:8.1f} ms   "
          f"(~{t * 20:.0f} s per 1000: not vectorised)")
    t = best_of(lambda: ex.return_level_bounds(g, x, 100.0, method="profile"), repeat=1)
    print(f"profile bound GEV, 300 blocks         {t * 1e3:8.1f} ms")


def _rate(hits, n):
    return f"{hits}/{n} = {hits / n:.0%}"


def coverage_gumbel_field(n_seeds):
    """Sparse pits, exponential depths: block maxima exactly Gumbel above 0."""
    h = np.zeros(3, int)
    for seed in range(n_seeds):
        rng = np.random.default_rng(seed)
        truth = np.where(rng.random((400, 400)) < 0.002, rng.exponential(0.5, (400, 400)), 0.0)
        obs = truth.copy()
        obs[:, 150:170] = np.nan
        obs[300:360, 300:360] = np.nan
        obs[np.isfinite(obs) & (obs < 1.0)] = 0.0
        z = ex.zone_extremes(obs, np.ones(obs.shape, bool), pitch_mm=10.0,
                             zone_area_mm2=4000.0 ** 2, block_mm=500.0, threshold=1.0, seed=seed)
        tm = truth.max()
        h += [tm <= z.depth_eva_mm, tm <= z.depth_eva_upper_mm, tm <= z.depth_pred_upper_mm]
    print(f"Gumbel pit field, 16 m2, 0.5 m blocks (T=64), 7 % hidden, threshold 1 mm, "
          f"{n_seeds} seeds:")
    print(f"  true max <= return level            {_rate(h[0], n_seeds)}  "
          f"(theory (1-1/T)^T = {(1 - 1 / 64) ** 64:.0%})")
    print(f"  true max <= 90 % bound of it        {_rate(h[1], n_seeds)}")
    print(f"  true max <= 90 % predictive bound   {_rate(h[2], n_seeds)}")


def coverage_synth(n_seeds, block_mm):
    from scananalyse import synth
    h = np.zeros(3, int)
    gev_rej = 0
    t0 = time.perf_counter()
    for seed in range(n_seeds):
        pair = synth.make_pair(seed=seed)
        new, tr = pair.new, pair.truth
        loss = (new.meta.nominal - new.thickness).astype(np.float32)
        yy, xx = new.grid_xy()
        r = tr.diameter_mm / 2
        zone = (xx - tr.centre[0]) ** 2 + (yy - tr.centre[1]) ** 2 <= r * r
        z = ex.zone_extremes(loss, zone, pitch_mm=new.pitch, zone_area_mm2=math.pi * r * r,
                             block_mm=block_mm, threshold=new.meta.threshold, seed=seed)
        tm = float(np.max((tr.loss_top_true + tr.loss_under_true)[zone]))
        h += [tm <= z.depth_eva_mm, tm <= z.depth_eva_upper_mm, tm <= z.depth_pred_upper_mm]
        gev_rej += bool(z.lr_test is not None and z.lr_test.reject_gumbel)
    print(f"synth.make_pair floors (8 m, MFL 1 mm), {block_mm:g} mm blocks, {n_seeds} seeds "
          f"({(time.perf_counter() - t0) / n_seeds:.2f} s each):")
    print(f"  true max <= return level            {_rate(h[0], n_seeds)}")
    print(f"  true max <= 90 % bound of it        {_rate(h[1], n_seeds)}")
    print(f"  true max <= 90 % predictive bound   {_rate(h[2], n_seeds)}")
    print(f"  GEV preferred by the LR test (5 %)  {_rate(gev_rej, n_seeds)}")


if __name__ == "__main__":
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--coverage", type=int, default=0, metavar="N",
                    help="also measure coverage over N seeds")
    args = ap.parse_args()
    timings()
    if args.coverage:
        coverage_gumbel_field(args.coverage)
        for b in (500.0, 1000.0):
            coverage_synth(args.coverage, b)
