"""Benchmark: loss/rate maps and indications on a ~7-million-cell synthetic pair.

Run ``python bench/bench_rates.py [--diameter MM] [--repeat N]``. Prints the time of
``rates.compute_rates``, ``indications.find_indications``, ``indications.old_indications``
and ``indications.match_indications``, each as a ratio to one numpy pass over the grid
(``t_old - t_new`` on float32), and the peak memory traced during each stage.
"""

from __future__ import annotations

import argparse
import time
import tracemalloc

import numpy as np

from scananalyse import indications, rates
from scananalyse.attribution import side_map
from scananalyse.register import RigidTransform, resample_onto
from scananalyse.synth import make_pair


def _timed(fn, repeat):
    best = float("inf")
    out = None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    tracemalloc.start()
    fn()
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return out, best, peak


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--diameter", type=float, default=26500.0, help="floor diameter [mm]")
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args(argv)

    t0 = time.perf_counter()
    p = make_pair(diameter_mm=args.diameter, seed=1)
    tr = p.truth
    T = RigidTransform(tr.rotation_deg, tr.dx_mm, tr.dy_mm)
    oon = resample_onto(p.old, p.new, T)
    new = p.new
    print(f"grid {new.shape[0]} x {new.shape[1]} = {new.thickness.size / 1e6:.2f} M cells "
          f"({new.n_scanned / 1e6:.2f} M scanned); setup {time.perf_counter() - t0:.1f} s")

    _, base, base_peak = _timed(lambda: oon.thickness - new.thickness, args.repeat)
    side = side_map(new)
    r, t_rates, m_rates = _timed(lambda: rates.compute_rates(new, oon, side), args.repeat)
    rd = new.meta.threshold or 1.0
    rate = np.fmax(r.rate_top, r.rate_under)
    (ni, nl), t_find, m_find = _timed(lambda: indications.find_indications(
        r.loss, pitch_mm=new.pitch, x0=new.x0, y0=new.y0, reporting_depth_mm=rd, side=side,
        plate=new.plate, rate=rate, thickness=new.thickness, return_labels=True), args.repeat)
    (oi, ol), t_old, m_old = _timed(lambda: indications.old_indications(
        p.old, new, T, reporting_depth_mm=rd), args.repeat)
    m, t_match, m_match = _timed(lambda: indications.match_indications(
        ni, oi, nl, ol, growth_sigma_mm=r.growth_sigma, dt_years=r.dt_years), args.repeat)

    grid_mb = new.thickness.nbytes / 1e6
    print(f"one numpy pass (t_old - t_new): {base * 1e3:.1f} ms, one float32 grid = {grid_mb:.0f} MB")
    for name, t, mem in (("compute_rates", t_rates, m_rates), ("find_indications", t_find, m_find),
                         ("old_indications", t_old, m_old), ("match_indications", t_match, m_match)):
        print(f"{name:18s} {t:7.3f} s  = {t / base:6.1f} x one pass   peak {mem / 1e6:7.0f} MB "
              f"({mem / 1e6 / grid_mb:.1f} grids)")
    total = t_rates + t_find + t_old + t_match
    print(f"total {total:.2f} s; {len(ni)} new / {len(oi)} old indications; "
          f"statuses {m.status.value_counts().to_dict()}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
