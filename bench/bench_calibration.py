"""Calibration of the zone life distribution (scananalyse.probability) on synthetic floors.

For each seed and case (MFL / UT, with / without deep pits planted in unscanned ground), a
5 m floor is analysed (scananalyse.pipeline.analyse); each zone with an estimate gets its
life distribution; the truth is the zone's true time to MRT, the minimum over all its
floor cells (scanned or not) of (true t - MRT) / true rate (tests/test_pipeline._true_life).

Reported: coverage of [p05, p95] (overall, zones not already below MRT, per case), and a
reliability table of the predicted P(reach MRT within h) against the observed fraction,
binned, for h in HORIZONS.

    PYTHONPATH=. python bench/bench_calibration.py [n_seeds] [--no-shrink] [--one-reading] [--first N]
                                                   [--cache DIR]
        (default 48 seeds from 100: one case per seed, cycling; --no-shrink: each cell's rate
        drawn from its own interval, no zone rate distribution; --one-reading: each cell's
        present thickness from the newer reading alone, not given its drawn rate from both
        readings, as before; --cache: each floor's analysis (the inputs of
        life_distributions and the zones' true lives) kept in DIR/<seed>.pkl and read back
        when its case matches, so that two versions of the model are compared on the same
        analyses: PYTHONPATH=/path/to/other/version python bench/bench_calibration.py ...)
    ... --unscanned: the zones nobody scanned instead (drawn over their whole area from the
        floor's depth law at the floor's rates; left out otherwise)
"""

from __future__ import annotations

import os
import pickle
import sys
import time
import warnings

import numpy as np

from scananalyse.evlife import floor_fit
from scananalyse.job import Job
from scananalyse.pipeline import analyse
from scananalyse.probability import life_distributions
from scananalyse.synth import make_pair

HORIZONS = (2.0, 5.0, 10.0, 20.0)
CASES = [("MFL", 4), ("MFL", 0), ("UT", 4), ("UT", 0)]


def true_zone_life(pair, mrt_map, mask):
    """Zone's true time to MRT (as tests/test_pipeline.py::_true_life, min over the zone)."""
    tr = pair.truth
    rate = np.where(tr.t_new_true > tr.t_old_true, tr.rate_top_true + tr.rate_under_true, tr.rate_mean_true)
    with np.errstate(divide="ignore", invalid="ignore"):
        life = np.where(rate > 0, (tr.t_new_true - mrt_map) / rate, np.inf)
    life = np.where(np.isfinite(tr.t_new_true), np.maximum(life, 0), np.nan)
    return float(np.nanmin(np.where(mask, life, np.nan)))


def case_pair(seed, method, n_hidden, **pair_kw):
    """The synthetic 5 m floor of a case (the truth with it; cheap next to its analysis)."""
    return make_pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, seed=seed, method=method,
                     threshold=1.0 if method == "MFL" else None, n_hidden_pits=n_hidden, **pair_kw)


def analysed_case(seed, method, n_hidden, cache=None, **pair_kw):
    """What the life distribution of a floor needs, and each zone's true life; read from
    ``cache``/<seed>.pkl when it holds this case, else computed (and kept there)."""
    case = dict(seed=seed, method=method, hidden=n_hidden, **pair_kw)
    path = os.path.join(cache, f"{seed}.pkl") if cache else None
    if path and os.path.exists(path):
        with open(path, "rb") as f:
            a = pickle.load(f)
        if a["case"] == case:
            return a
    pair = case_pair(seed, method, n_hidden, **pair_kw)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        an = analyse(pair.new, pair.old, job=Job(diameter=5000.0))
    # the floor's fit, lent to zones with none of their own, as the pipeline does
    floor = floor_fit(an.new.thickness, an.zones, nominal=an.new.meta.nominal, censored=an.rates.censored,
                      threshold=an.new.meta.threshold, pitch=an.new.pitch, block_mm=an.job.block_mm, seed=an.job.seed)
    a = dict(case=case, thickness=an.new.thickness, rates=an.rates, zones=an.zones, mrt=an.mrt_map,
             ext=an.extremes_depth, floor=floor, nominal=an.new.meta.nominal, pitch=an.new.pitch,
             truths={name: true_zone_life(pair, an.mrt_map, an.zones.labels == k)
                     for k, name in enumerate(an.zones.names)})
    if path:
        os.makedirs(cache, exist_ok=True)
        with open(path + ".tmp", "wb") as f:
            pickle.dump(a, f)
        os.replace(path + ".tmp", path)
    return a


def run_case(seed, method, n_hidden, n_draws=2000, shrink=True, both_readings=True, unscanned=False, cache=None,
             **pair_kw):
    a = analysed_case(seed, method, n_hidden, cache=cache, **pair_kw)
    t0 = time.perf_counter()
    dists = life_distributions(a["thickness"], a["rates"], a["zones"], a["mrt"], a["ext"], nominal=a["nominal"],
                               sigma_t=a["rates"].sigma_new, pitch=a["pitch"], n_draws=n_draws, seed=seed,
                               shrink=shrink, both_readings=both_readings, floor_extremes=a["floor"])
    dt = time.perf_counter() - t0
    rows = []
    for name in a["zones"].names:
        d = dists[name]
        if not d.ok or (d.n_cells == 0) != unscanned:  # zones nobody scanned: only with --unscanned
            continue
        truth = a["truths"][name]
        q = d.quantiles()
        rows.append(dict(seed=seed, method=method, hidden=n_hidden, zone=name, truth=truth, p05=q[0], p50=q[1],
                         p95=q[2], p=[d.p_mrt(h) for h in HORIZONS], p_hidden=d.p_hidden_governs,
                         n_kept=d.n_kept, n_cells=d.n_cells, seconds=dt))
    return rows


def summarise(rows):
    lines = []
    inside = [r["p05"] <= r["truth"] <= r["p95"] for r in rows]
    below = [r["truth"] < r["p05"] for r in rows]
    above = [r["truth"] > r["p95"] for r in rows]
    lines.append(f"zones {len(rows)}: truth inside [p05, p95] {np.mean(inside):.2f}, below p05 {np.mean(below):.2f}, "
                 f"above p95 {np.mean(above):.2f}")
    nz = [r for r in rows if r["truth"] > 0]
    if nz:
        lines.append(f"  zones not already below MRT ({len(nz)}): inside {np.mean([r['p05'] <= r['truth'] <= r['p95'] for r in nz]):.2f}, "
                     f"below p05 {np.mean([r['truth'] < r['p05'] for r in nz]):.2f}, above p95 {np.mean([r['truth'] > r['p95'] for r in nz]):.2f}")
    for key in sorted({(r["method"], r["hidden"]) for r in rows}):
        sub = [r for r in rows if (r["method"], r["hidden"]) == key]
        lines.append(f"  {key[0]} hidden pits {key[1]}: n {len(sub)}, inside {np.mean([r['p05'] <= r['truth'] <= r['p95'] for r in sub]):.2f}, "
                     f"below {np.mean([r['truth'] < r['p05'] for r in sub]):.2f}, "
                     f"above {np.mean([r['truth'] > r['p95'] for r in sub]):.2f}, "
                     f"median p_hidden_governs {np.median([r['p_hidden'] for r in sub]):.2f}")
    # reliability
    p = np.array([x for r in rows for x in r["p"]])
    o = np.array([r["truth"] <= h for r in rows for h in HORIZONS], dtype=float)
    edges = [0, 0.05, 0.25, 0.5, 0.75, 0.95, 1.0001]
    lines.append("reliability (all horizons " + ", ".join(f"{h:g}" for h in HORIZONS) + " y):")
    lines.append("| predicted P(MRT by h) | n | mean predicted | observed fraction |")
    lines.append("|---|---|---|---|")
    for a, b in zip(edges[:-1], edges[1:]):
        s = (p >= a) & (p < b)
        if s.any():
            lines.append(f"| [{a:.2f}, {min(b, 1):.2f}{']' if b > 1 else ')'} | {s.sum()} | {p[s].mean():.3f} | {o[s].mean():.3f} |")
    lines.append(f"Brier score {np.mean((p - o) ** 2):.4f}")
    lines.append(f"Monte Carlo seconds per floor: median {np.median([r['seconds'] for r in rows]):.3f}; "
                 f"kept cells median {np.median([r['n_kept'] for r in rows]):.0f} of {np.median([r['n_cells'] for r in rows]):.0f}")
    return "\n".join(lines)


#: Fastest pit rate of the synthetic floors, alternated over seeds (the default 0.6 mm/y
#: leaves most 5 m floors already below MRT, where every model is trivially right).
PIT_RATES = (0.15, 0.3)


def main(n_seeds=48, first=100, shrink=True, both_readings=True, unscanned=False, cache=None):
    rows = []
    t = time.time()
    for i, seed in enumerate(range(first, first + n_seeds)):
        method, hidden = CASES[i % len(CASES)]
        rows += run_case(seed, method, hidden, shrink=shrink, both_readings=both_readings, unscanned=unscanned,
                         cache=cache,
                         max_pit_rate=PIT_RATES[(i // len(CASES)) % len(PIT_RATES)])
    print(summarise(rows))
    print(f"total {time.time() - t:.0f} s")
    return rows


if __name__ == "__main__":
    argv = sys.argv[1:]
    first = int(argv[argv.index("--first") + 1]) if "--first" in argv else 100
    cache = argv[argv.index("--cache") + 1] if "--cache" in argv else None
    args = [a for i, a in enumerate(argv) if not a.startswith("--") and (i == 0 or argv[i - 1] not in ("--first", "--cache"))]
    main(int(args[0]) if args else 48, first=first, shrink="--no-shrink" not in argv,
         both_readings="--one-reading" not in argv, unscanned="--unscanned" in argv, cache=cache)
