"""Calibration of the zone's leak probability (``LifeDistribution.life_leak``) on synthetic floors.

The floors and their analyses are those of ``bench_calibration.py`` (5 m, MFL / UT, with and
without deep pits planted in unscanned ground), at faster pit rates so that leaks happen
within the horizons on some floors.  For each zone with scanned cells, the truth is the
zone's true time to zero thickness: the minimum over all its floor cells (scanned or not)
of true t_new / true rate (``bench_calibration.true_zone_life`` with MRT = 0, the same rate
rule).  The time to MRT on the same floors is reported beside it for comparison.

Reported, for the leak and for MRT: coverage of [p05, p95] (overall and per case), a
reliability table of the predicted P(within h) against the observed fraction, binned, h in
HORIZONS, the Brier score, and per horizon the mean predicted probability against the
observed fraction.

    PYTHONPATH=. python bench/bench_leak_calibration.py [n_seeds] [--first N] [--cache DIR] [--misses]
                                                        [--scanned-only]
        (default 48 seeds from 500: one case per seed, cycling through CASES × PIT_RATES;
        --cache: as bench_calibration.py (the case key holds the pit rate); --misses: list
        the zones whose true leak life is below the leak life's p05; --scanned-only: the
        scanned part alone, no depth fit given, against the truth over the scanned cells)

The truth's rate rule is ``true_zone_life``'s: where the metal was not renewed, the mean
rate between the inspections, which for a pit that started between them is below its own
rate at the newer inspection; the coverage at the latter is printed beside it.
"""

from __future__ import annotations

import sys
import time

import numpy as np

import bench_calibration as bc
from scananalyse.errors import InputError
from scananalyse.probability import life_distributions

HORIZONS = (2.0, 5.0, 10.0, 20.0, 30.0)
#: Fastest pit rate of the floors, cycled after the cases.  At 0.15–0.3 mm/y (the MRT
#: bench's) few zones reach zero thickness within 30 y; at 0.3–0.6 mm/y the late-starting
#: pits grow at the cap, the deepest ones are through in a few years, and the slowest
#: floors' zones leak only after 10–30 y: every horizon has leaks on some floors and not on
#: others.
PIT_RATES = (0.3, 0.45, 0.6)
EDGES = (0.0, 0.01, 0.05, 0.25, 0.5, 0.75, 0.95, 1.0001)


def case_of(i):
    """(method, planted pits, fastest pit rate) of the i-th seed of a run."""
    method, hidden = bc.CASES[i % len(bc.CASES)]
    return method, hidden, PIT_RATES[(i // len(bc.CASES)) % len(PIT_RATES)]


def _instant_leak_life(pair, mask):
    """The zone's true time to zero thickness at each cell's rate at the newer inspection
    (the pits' own rates, not the mean over the interval). [y]"""
    tr = pair.truth
    rate = tr.rate_top_true + tr.rate_under_true
    with np.errstate(divide="ignore", invalid="ignore"):
        life = np.where(rate > 0, tr.t_new_true / rate, np.inf)
    return float(np.nanmin(np.where(mask & np.isfinite(tr.t_new_true), life, np.nan)))


def leak_rows(seed, method, n_hidden, max_pit_rate, n_draws=2000, cache=None, scanned_only=False):
    """One row per zone with scanned cells: true lives to MRT and to a leak, and the
    distribution's quantiles and probabilities at HORIZONS.  ``scanned_only``: the scanned
    part alone (no depth fit given: the unscanned part not modelled; the truths over the
    scanned cells)."""
    a = bc.analysed_case(seed, method, n_hidden, cache=cache, max_pit_rate=max_pit_rate)
    pair = bc.case_pair(seed, method, n_hidden, max_pit_rate=max_pit_rate)
    dists = life_distributions(a["thickness"], a["rates"], a["zones"], a["mrt"], {} if scanned_only else a["ext"],
                               nominal=a["nominal"], sigma_t=a["rates"].sigma_new, pitch=a["pitch"],
                               n_draws=n_draws, seed=seed, floor_extremes=None if scanned_only else a["floor"])
    zero = np.zeros_like(a["mrt"])
    rows = []
    for k, name in enumerate(a["zones"].names):
        d = dists[name]
        if not d.ok or d.n_cells == 0:
            continue
        mask = (a["zones"].labels == k) & (np.isfinite(a["thickness"]) if scanned_only else True)
        q = lambda x: np.quantile(x, (0.05, 0.5, 0.95), method="inverted_cdf")  # noqa: E731
        rows.append(dict(seed=seed, method=method, hidden=n_hidden, pit_rate=max_pit_rate, zone=name,
                         truth_instant=_instant_leak_life(pair, mask),
                         leak=dict(truth=bc.true_zone_life(pair, zero, mask), q=q(d.life_leak),
                                   p=np.asarray(d.p_leak(HORIZONS)), draws=d.life_leak, hidden=d.unseen[1]),
                         mrt=dict(truth=a["truths"][name] if not scanned_only else bc.true_zone_life(pair, a["mrt"], mask),
                                  q=q(d.life_mrt), p=np.asarray(d.p_mrt(HORIZONS)),
                                  draws=d.life_mrt, hidden=d.unseen[0])))
    return rows


def _cover(sub, key):
    t = np.array([r[key]["truth"] for r in sub])
    lo = np.array([r[key]["q"][0] for r in sub])
    hi = np.array([r[key]["q"][2] for r in sub])
    return (f"n {len(sub)}, inside {np.mean((lo <= t) & (t <= hi)):.2f}, below p05 {np.mean(t < lo):.2f} "
            f"({int(np.sum(t < lo))}), above p95 {np.mean(t > hi):.2f} ({int(np.sum(t > hi))})")


def summarise(rows, key):
    """Coverage, reliability table, Brier score and per-horizon means of ``key`` ('leak' or
    'mrt')."""
    what = "leak" if key == "leak" else "MRT"
    lines = [f"### {what}: truth against [p05, p95]", f"all zones: {_cover(rows, key)}"]
    if key == "leak":  # the same with the truth at the pits' own rates (a late pit's exceeds its mean)
        inst = [dict(r, leak=dict(r["leak"], truth=r["truth_instant"])) for r in rows]
        lines.append(f"  truth at the rates at the newer inspection: {_cover(inst, key)}")
    for case in sorted({(r["method"], r["hidden"], r["pit_rate"]) for r in rows}):
        sub = [r for r in rows if (r["method"], r["hidden"], r["pit_rate"]) == case]
        lines.append(f"  {case[0]}, {case[1]} planted pits, pit rate {case[2]:g}: {_cover(sub, key)}")
    p = np.array([r[key]["p"] for r in rows])
    o = np.array([[r[key]["truth"] <= h for h in HORIZONS] for r in rows], dtype=float)
    lines += ["", f"predicted P({what} within h) against the observed fraction, h = "
              + ", ".join(f"{h:g}" for h in HORIZONS) + " y pooled:", "",
              "| predicted P | n | mean predicted | observed fraction |", "|---|---|---|---|"]
    pf, of = p.ravel(), o.ravel()
    for lo, hi in zip(EDGES[:-1], EDGES[1:]):
        s = (pf >= lo) & (pf < hi)
        if s.any():
            lines.append(f"| [{lo:.2f}, {min(hi, 1):.2f}{']' if hi > 1 else ')'} | {s.sum()} | {pf[s].mean():.3f} | "
                         f"{of[s].mean():.3f} |")
    lines += ["", f"Brier score {np.mean((pf - of) ** 2):.4f}", "",
              "| h [y] | mean predicted | observed fraction | Brier |", "|---|---|---|---|"]
    for j, h in enumerate(HORIZONS):
        lines.append(f"| {h:g} | {p[:, j].mean():.3f} | {o[:, j].mean():.3f} | {np.mean((p[:, j] - o[:, j]) ** 2):.4f} |")
    return "\n".join(lines)


def misses(rows, key="leak"):
    """Zones whose truth is below p05 (unconservative), with the share of draws in which the
    unseen part governs."""
    out = []
    for r in rows:
        x = r[key]
        if x["truth"] < x["q"][0]:
            gov = np.nan if x["hidden"] is None else float(np.mean(x["hidden"] <= x["draws"]))
            out.append(f"  seed {r['seed']} {r['method']} hidden {r['hidden']} rate {r['pit_rate']:g} {r['zone']}: "
                       f"truth {x['truth']:.2f} y, p05 {x['q'][0]:.2f}, p50 {x['q'][1]:.2f}, p95 {x['q'][2]:.2f}; "
                       f"unseen part governs {gov:.2f}")
    return out


def main(n_seeds=48, first=500, cache=None, show_misses=False, scanned_only=False):
    rows, skipped = [], []
    t = time.time()
    for i, seed in enumerate(range(first, first + n_seeds)):
        try:
            rows += leak_rows(seed, *case_of(i), cache=cache, scanned_only=scanned_only)
        except InputError:  # the two scans could not be registered: no analysis to bench
            skipped.append(seed)
    print(f"seeds {first}-{first + n_seeds - 1}, {len(rows)} zones with scanned cells; "
          f"not registered (skipped): {skipped or 'none'}")
    for key in ("leak", "mrt"):
        print(summarise(rows, key))
        if show_misses:
            print("\n".join(misses(rows, key)))
        print()
    print(f"total {time.time() - t:.0f} s")
    return rows


if __name__ == "__main__":
    argv = sys.argv[1:]
    first = int(argv[argv.index("--first") + 1]) if "--first" in argv else 500
    cache = argv[argv.index("--cache") + 1] if "--cache" in argv else None
    args = [a for i, a in enumerate(argv) if not a.startswith("--") and (i == 0 or argv[i - 1] not in ("--first", "--cache"))]
    main(int(args[0]) if args else 48, first=first, cache=cache, show_misses="--misses" in argv,
         scanned_only="--scanned-only" in argv)
