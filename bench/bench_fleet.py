"""Fleet benchmark: the same fleet of synthetic tanks with 1 and 2 Dask workers, one run.

Usage: python bench/bench_fleet.py [--tanks 8] [--diameter 6000] [--pitch 10]
Prints the wall time of each run and the speed-up (target: 2 workers >= 1.5x on 2 cores).
"""

import argparse
import os
import shutil
import tempfile
import time
from pathlib import Path

os.environ.setdefault("MPLBACKEND", "Agg")


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--tanks", type=int, default=8)
    ap.add_argument("--diameter", type=float, default=6000.0)
    ap.add_argument("--pitch", type=float, default=10.0)
    args = ap.parse_args()

    from scananalyse.fleet import run_fleet
    from scananalyse.io import write_scan
    from scananalyse.synth import make_pair

    d = Path(tempfile.mkdtemp(prefix="bench_fleet_"))
    try:
        rows = ["tank,old,new,diameter"]
        for i in range(args.tanks):
            tank = f"BT-{i + 1:02d}"
            pair = make_pair(diameter_mm=args.diameter, pitch_new=args.pitch, pitch_old=args.pitch * 1.25,
                             seed=100 + i, tank=tank)
            (d / tank).mkdir()
            write_scan(pair.old, d / tank / "old.h5")
            write_scan(pair.new, d / tank / "new.h5")
            rows.append(f"{tank},{tank}/old.h5,{tank}/new.h5,{args.diameter}")
        (d / "manifest.csv").write_text("\n".join(rows) + "\n")
        cells = pair.new.shape[0] * pair.new.shape[1]
        times = {}
        for workers in (1, 2):
            out = d / f"out{workers}"
            t = time.perf_counter()
            res = run_fleet(d / "manifest.csv", out_dir=out, workers=workers, quiet=True)
            times[workers] = time.perf_counter() - t
            ok = int(res["table"]["status"].astype(str).str.startswith("ok").sum())
            print(f"{workers} worker(s): {times[workers]:.1f} s for {args.tanks} tanks ({ok} ok), "
                  f"{cells / 1e6:.2f} M cells per newer scan")
        print(f"speed-up 2 workers vs 1: {times[1] / times[2]:.2f}x (target >= 1.5x on 2 cores; os.cpu_count()={os.cpu_count()})")
    finally:
        shutil.rmtree(d, ignore_errors=True)


if __name__ == "__main__":
    main()
