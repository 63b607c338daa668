"""Benchmark of the floor-scan readers against the libraries underneath them.

Builds an invented floor: a 30 m diameter circle at 10 mm pitch (about 7.07
million scanned cells) with a side column, writes it as floor-scan CSV v1 and
HDF5 v1 in a temporary folder, and times, in the same run, best of 3:

- ``read_csv_scan`` against a plain ``pandas.read_csv(path, skiprows=k)`` (all
  defaults; ``k`` the number of ``#`` header lines), with the target ratio
  :data:`CSV_TARGET_RATIO`;
- ``read_h5_scan`` against a raw ``h5py`` read of the thickness dataset.

``--csv FILE`` times an existing floor-scan CSV instead of the invented one
(CSV part only).

Run: ``python bench/bench_io.py [--diameter-m 30] [--pitch-mm 10] [--repeat 3] [--csv FILE]``.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import sys
import tempfile
import time

import h5py
import numpy as np
import pandas as pd

from scananalyse.io import read_csv_scan, read_h5_scan, write_csv_scan, write_h5_scan
from scananalyse.scan import FloorScan, ScanMeta

#: read_csv_scan may take at most this multiple of the plain pandas read of the same file.
CSV_TARGET_RATIO = 1.3


def make_floor(diameter_m: float, pitch_mm: float, seed: int = 7) -> FloorScan:
    """An invented circular floor: 6.35 mm nominal, mild general loss and noise. [mm]"""
    rng = np.random.default_rng(seed)
    r = diameter_m * 1000.0 / 2
    n = int(np.ceil(2 * r / pitch_mm))
    c = (np.arange(n) - (n - 1) / 2) * pitch_mm
    inside = (c[None, :] ** 2 + c[:, None] ** 2) <= r * r
    t = (6.35 - rng.gamma(2.0, 0.15, size=(n, n))).astype(np.float32)
    t = np.round(t, 2)  # an instrument reporting to 0.01 mm
    t[~inside] = np.nan
    side = rng.choice(np.array([0, 1, 2], dtype=np.int8), size=(n, n), p=[0.2, 0.3, 0.5])
    meta = ScanMeta(inspected=dt.date(2024, 5, 14), nominal=6.35, units="mm", tank="TK-BENCH",
                    method="MFL", threshold=1.0, sigma=0.15, installed=dt.date(1996, 3, 1))
    return FloorScan(thickness=t, x0=float(c[0]), y0=float(c[0]), pitch=pitch_mm, meta=meta, side=side)


def best_of(fns, repeat: int) -> list[float]:
    """Best wall time of each function, the runs interleaved so that load from
    other processes hits both alike. [s]"""
    best = [float("inf")] * len(fns)
    for _ in range(repeat):
        for k, fn in enumerate(fns):
            t0 = time.perf_counter()
            fn()
            best[k] = min(best[k], time.perf_counter() - t0)
    return best


def header_lines(path: str) -> int:
    """Number of ``#`` lines at the top of ``path`` (skipped by the pandas baseline)."""
    with open(path, "rb") as fh:
        k = 0
        for raw in fh:
            if not raw.startswith(b"#"):
                return k
            k += 1
    return k


def time_csv(path: str, repeat: int) -> float:
    """Time read_csv_scan against the plain pandas read, interleaved; print and return the ratio."""
    skip = header_lines(path)
    t_pd, t_ours = best_of([lambda: pd.read_csv(path, skiprows=skip),
                            lambda: read_csv_scan(path)], repeat)
    ratio = t_ours / t_pd
    verdict = "met" if ratio <= CSV_TARGET_RATIO else "NOT met"
    print(f"CSV read (best of {repeat}, interleaved): read_csv_scan {t_ours:.3f} s, "
          f"pandas.read_csv(path, skiprows={skip}) {t_pd:.3f} s, ratio {ratio:.2f} "
          f"(target {CSV_TARGET_RATIO:.1f}: {verdict})")
    return ratio


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--diameter-m", type=float, default=30.0)
    ap.add_argument("--pitch-mm", type=float, default=10.0)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--csv", help="time this floor-scan CSV file instead of the invented floor")
    args = ap.parse_args(argv)
    if args.csv:
        size_mb = os.path.getsize(args.csv) / 1e6
        scan = read_csv_scan(args.csv)  # warm the page cache
        print(f"{args.csv}: grid {scan.shape[0]} x {scan.shape[1]}, {scan.n_scanned} rows, "
              f"CSV {size_mb:.0f} MB")
        del scan
        time_csv(args.csv, args.repeat)
        return 0

    scan = make_floor(args.diameter_m, args.pitch_mm)
    with tempfile.TemporaryDirectory() as tmp:
        csv_path = os.path.join(tmp, "floor.csv")
        h5_path = os.path.join(tmp, "floor.h5")
        t0 = time.perf_counter()
        write_csv_scan(scan, csv_path)
        t_write_csv = time.perf_counter() - t0
        t0 = time.perf_counter()
        write_h5_scan(scan, h5_path)
        t_write_h5 = time.perf_counter() - t0
        size_mb = os.path.getsize(csv_path) / 1e6
        print(f"floor {args.diameter_m:g} m at {args.pitch_mm:g} mm: grid {scan.shape[0]} x "
              f"{scan.shape[1]}, {scan.n_scanned} rows, CSV {size_mb:.0f} MB, "
              f"HDF5 {os.path.getsize(h5_path) / 1e6:.0f} MB")
        print(f"write: CSV {t_write_csv:.2f} s, HDF5 {t_write_h5:.2f} s")

        back = read_csv_scan(csv_path)  # warm the page cache and check the result once
        assert np.array_equal(back.thickness, scan.thickness, equal_nan=True)
        assert np.array_equal(back.side[scan.scanned], scan.side[scan.scanned])
        del back
        time_csv(csv_path, args.repeat)

        def raw_h5():
            with h5py.File(h5_path, "r") as f:
                f["thickness"][()]
                f["side"][()]

        read_h5_scan(h5_path)
        t_raw, t_h5 = best_of([raw_h5, lambda: read_h5_scan(h5_path)], args.repeat)
        print(f"HDF5 read: read_h5_scan {t_h5:.2f} s, raw h5py (thickness + side) {t_raw:.2f} s, "
              f"ratio {t_h5 / t_raw:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
