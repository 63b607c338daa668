"""Truth sweep of what the tool says about metal nobody scanned, on synthetic floors.

Run ``python bench/bench_truth_hidden.py [--seeds N] [--first S] [--hidden K ...]``.

For each seed a synthetic pair (``scananalyse.synth.make_pair``: 5 m floor, 20/25 mm pitch,
``K`` deep underside pits planted wholly in unscanned ground: the shell margin and the
column base) is analysed by ``pipeline.analyse`` as a user runs it (registration
included), and compared with the truth, zone ``interior``:

* depth: is the deepest true loss of the zone (scanned or not) at most
  ``depth_eva_upper_mm``?  Is ``depth_eva_mm`` at least the deepest observed loss?
* life after the proposed repairs: is ``interval_recommended_y`` of ``zones_repaired.csv``
  at most 1.1 x the true remaining life of ALL metal left unrepaired, scanned or not
  (the truth: (t_true − MRT) / true rate per cell, as tests/test_pipeline.py computes it)?
  And as found, against all the metal?

Prints one line per seed and the fractions.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

os.environ.setdefault("MPLBACKEND", "Agg")
sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "tests"))


def evaluate(seed: int, hidden: int) -> dict:
    from test_pipeline import _true_life

    from scananalyse.job import Job
    from scananalyse.pipeline import analyse
    from scananalyse.synth import make_pair

    pair = make_pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, seed=1000 + seed, n_hidden_pits=hidden)
    an = analyse(pair.new, pair.old, job=Job(diameter=5000.0))
    m = an.zones.labels == an.zones.index("interior")
    z = an.zone_table.set_index("zone").loc["interior"]
    r = an.zones_repaired.set_index("zone").loc["interior"]
    true_depth = float(np.nanmax(np.where(m, pair.truth.nominal - pair.truth.t_new_true, np.nan)))
    patched = an.repaired_maps["patched"]
    life_all_rep = float(np.nanmin(np.where(m, _true_life(pair, an.mrt_map, exclude=patched), np.nan)))
    life_all = float(np.nanmin(np.where(m, _true_life(pair, an.mrt_map), np.nan)))
    return {"seed": seed, "hidden": hidden, "true_depth": true_depth, "obs": z["depth_max_mm"],
            "eva": z["depth_eva_mm"], "eva_up": z["depth_eva_upper_mm"],
            "rec": z["interval_recommended_y"], "life_all": life_all,
            "rec_rep": r["interval_recommended_y"], "life_all_rep": life_all_rep,
            "limiting_rep": r["limiting"]}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=40)
    ap.add_argument("--first", type=int, default=0)
    ap.add_argument("--hidden", type=int, nargs="+", default=[0, 4], help="pits planted in unscanned ground")
    args = ap.parse_args(argv)
    for k in args.hidden:
        t0 = time.perf_counter()
        rows = [evaluate(s, k) for s in range(args.first, args.first + args.seeds)]
        dt = time.perf_counter() - t0
        print(f"\n{len(rows)} seeds, {k} pits planted in unscanned ground ({dt:.0f} s)")
        print(" seed  true_d   obs_d   eva_d  eva_up |   rec  life_all | rec_rep life_all_rep limiting")
        for q in rows:
            print(f"{q['seed']:5d} {q['true_depth']:7.2f} {q['obs']:7.2f} {q['eva']:7.2f} {q['eva_up']:7.2f} |"
                  f" {q['rec']:5.1f} {q['life_all']:8.1f} | {q['rec_rep']:7.1f} {q['life_all_rep']:12.1f} "
                  f"{q['limiting_rep']}")
        n = len(rows)
        ok_obs = sum(q["eva"] >= q["obs"] - 1e-9 for q in rows)
        ok_up = sum(q["true_depth"] <= q["eva_up"] + 1e-9 for q in rows)
        ok_rec = sum(q["rec"] <= 1.1 * q["life_all"] + 1e-9 for q in rows)
        ok_rep = sum(q["rec_rep"] <= 1.1 * q["life_all_rep"] + 1e-9 for q in rows)
        print(f"depth_eva_mm >= observed deepest            : {ok_obs}/{n}")
        print(f"true deepest <= depth_eva_upper_mm          : {ok_up}/{n}")
        print(f"as found: recommended <= 1.1 x true life    : {ok_rec}/{n}")
        print(f"repaired: recommended <= 1.1 x true life of all unrepaired metal : {ok_rep}/{n}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
