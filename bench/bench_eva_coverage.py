"""How often the statistical statements about the unscanned floor hold, over many synthetic floors.

For each seed a synthetic pair (5 m floor, 20/25 mm pitch, hidden pits in the shell margin and
under the column base) is analysed and compared with the truth:
- depth: is the zone's deepest true loss (scanned or not) at most depth_pred_upper_mm
  (and at most depth_eva_upper_mm)?
- life: after the proposed repairs, is the recommended interval at most 1.1 x the true
  remaining life of all metal left unrepaired (scanned or not), and of the scanned metal alone?

Usage: python bench/bench_eva_coverage.py [--seeds 40] [--hidden 4]
"""

import argparse
import os
import sys
import time

import numpy as np

os.environ.setdefault("MPLBACKEND", "Agg")
sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "tests"))


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--seeds", type=int, default=40)
    ap.add_argument("--hidden", type=int, default=4, help="pits planted wholly in unscanned ground")
    args = ap.parse_args()
    from test_pipeline import _true_life

    from scananalyse.job import Job
    from scananalyse.pipeline import analyse
    from scananalyse.synth import make_pair

    hits = {"depth_pred": 0, "depth_upper": 0, "life_all": 0, "life_scanned": 0}
    n_depth = n_life = 0
    t0 = time.perf_counter()
    for seed in range(args.seeds):
        pair = make_pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, seed=1000 + seed,
                         n_hidden_pits=args.hidden)
        an = analyse(pair.new, pair.old, job=Job(diameter=5000.0))
        z = an.zone_table.set_index("zone").loc["interior"]
        m = an.zones.labels == an.zones.index("interior")
        true_depth = float(np.nanmax(np.where(m, pair.truth.nominal - pair.truth.t_new_true, np.nan)))
        if np.isfinite(z["depth_pred_upper_mm"]):
            n_depth += 1
            hits["depth_pred"] += true_depth <= z["depth_pred_upper_mm"]
            hits["depth_upper"] += true_depth <= z["depth_eva_upper_mm"]
        r = an.zones_repaired.set_index("zone").loc["interior"]
        rec = r["interval_recommended_y"]
        if np.isfinite(rec):
            n_life += 1
            patched = an.repaired_maps["patched"]
            life_all = np.nanmin(np.where(m, _true_life(pair, an.mrt_map, exclude=patched), np.nan))
            life_sc = np.nanmin(np.where(m, _true_life(pair, an.mrt_map, exclude=patched | ~pair.new.scanned), np.nan))
            hits["life_all"] += rec <= 1.1 * life_all + 1e-9
            hits["life_scanned"] += rec <= 1.1 * life_sc + 1e-9
    dt = time.perf_counter() - t0
    print(f"{args.seeds} seeds, {args.hidden} hidden pits each, {dt:.0f} s")
    print(f"deepest true loss <= depth_pred_upper_mm : {hits['depth_pred']}/{n_depth}")
    print(f"deepest true loss <= depth_eva_upper_mm  : {hits['depth_upper']}/{n_depth}")
    print(f"recommended <= 1.1 x true life, all unrepaired metal     : {hits['life_all']}/{n_life}")
    print(f"recommended <= 1.1 x true life, scanned unrepaired metal : {hits['life_scanned']}/{n_life}")


if __name__ == "__main__":
    main()
