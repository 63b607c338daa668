"""Benchmark: registration of a 30 m floor at 10 mm pitch against one skimage phase correlation.

Issue 3 speed target: ``register`` in at most 3x the time of ONE full-grid
``skimage.registration.phase_cross_correlation(upsample_factor=10)`` on the same
grids (NaN filled with nominal), measured in the same run.

Run: ``python bench/bench_register.py [--diameter 30000] [--pitch 10]``.
Prints the timings, the accuracy of both against the synthetic truth and the
peak memory (tracemalloc for numpy allocations, ru_maxrss for the process).
"""

from __future__ import annotations

import argparse
import resource
import time
import tracemalloc
import warnings

import numpy as np


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--diameter", type=float, default=30000.0, help="floor diameter [mm]")
    ap.add_argument("--pitch", type=float, default=10.0, help="pitch of both scans [mm]")
    ap.add_argument("--rotation", type=float, default=2.0, help="true rotation [deg]")
    ap.add_argument("--shift", type=float, nargs=2, default=(180.0, -120.0), help="true shift [mm]")
    ap.add_argument("--seed", type=int, default=3)
    args = ap.parse_args(argv)

    from skimage.registration import phase_cross_correlation

    from scananalyse.register import register
    from scananalyse.synth import make_pair

    t0 = time.perf_counter()
    pair = make_pair(diameter_mm=args.diameter, pitch_new=args.pitch, pitch_old=args.pitch,
                     rotation_deg=args.rotation, shift_mm=tuple(args.shift), seed=args.seed)
    t_gen = time.perf_counter() - t0
    new, old, truth = pair.new, pair.old, pair.truth.transform
    print(f"floor {args.diameter / 1000:g} m at {args.pitch:g} mm: new grid {new.shape} "
          f"({new.thickness.size / 1e6:.1f} M cells, {new.n_scanned / 1e6:.1f} M scanned), "
          f"old grid {old.shape}; generated in {t_gen:.1f} s")
    print(f"truth: rotation {truth.rotation_deg:+.3f} deg, dx {truth.dx_mm:+.2f} mm, dy {truth.dy_mm:+.2f} mm")

    # skimage on the same grids (same shape needed: crop/pad old to new's shape), NaN -> nominal
    a = np.nan_to_num(new.thickness, nan=new.meta.nominal)
    b = np.full(new.shape, old.meta.nominal, dtype=np.float32)
    h = min(new.shape[0], old.shape[0])
    w = min(new.shape[1], old.shape[1])
    b[:h, :w] = np.nan_to_num(old.thickness[:h, :w], nan=old.meta.nominal)
    t0 = time.perf_counter()
    shift_rc, _, _ = phase_cross_correlation(a, b, upsample_factor=10)
    t_sk = time.perf_counter() - t0
    # skimage's shift (rows, cols) registers moving b onto reference a: a(p) ~ b(p - shift)
    sk_dx = float(shift_rc[1]) * new.pitch + (new.x0 - old.x0)
    sk_dy = float(shift_rc[0]) * new.pitch + (new.y0 - old.y0)
    del a, b

    tracemalloc.start()
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("always")
        reg = register(new, old)
    t_reg = time.perf_counter() - t0
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    T = reg.transform
    ex, ey = T.displacement_at(0.0, 0.0)
    tx, ty = truth.displacement_at(0.0, 0.0)
    print(f"skimage phase_cross_correlation (upsample 10): {t_sk:.2f} s; translation-only answer "
          f"dx {sk_dx:+.1f} dy {sk_dy:+.1f} mm (error {np.hypot(sk_dx - truth.dx_mm, sk_dy - truth.dy_mm):.1f} mm, "
          f"rotation not estimated)")
    print(f"register: {t_reg:.2f} s = {t_reg / t_sk:.2f} x skimage (target <= 3x); "
          f"stages {', '.join(f'{k} {v:.2f}' for k, v in reg.timings_s.items())} s")
    print(f"register error: rotation {T.rotation_deg - truth.rotation_deg:+.4f} deg, "
          f"shift {T.dx_mm - truth.dx_mm:+.2f}, {T.dy_mm - truth.dy_mm:+.2f} mm "
          f"(at the centre {np.hypot(ex - tx, ey - ty):.2f} mm); score {reg.score:.3f}, "
          f"overlap {reg.overlap_pct:.1f} %, residual RMS {reg.residual_rms_mm:.3f} mm, reliable {reg.reliable}")
    print(f"peak memory: register numpy allocations {peak / 2**20:.0f} MiB (tracemalloc); "
          f"process max RSS {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MiB")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
