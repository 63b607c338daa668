"""Truth sweep of the zone maximum rates and the co-located life on synthetic floors.

Run ``python bench/bench_truth.py [--seeds N] [--first S] [--floor young|default]``.

Each seed makes a synthetic inspection pair (``scananalyse.synth.make_pair``), resamples
the older scan with the TRUE transform (the registration is not under test), computes
the rates (``rates.compute_rates``) and the zone table (``assess.assess_zones``), and
compares per zone and side:

* the point estimate ``rate_*_max_mm_y`` and its 90 % interval
  ``[rate_*_max_lo_mm_y, rate_*_max_hi_mm_y]`` with the true maximum rate over the
  zone's scanned cells (``truth.rate_top_true`` / ``rate_under_true``);
* ``life_local_y`` with the true co-located life, min over the zone's scanned cells of
  (t_true − MRT)/(r_top_true + r_under_true), computed here from the truth maps.

The ``young`` floor is the one issue 23 measured on: 7 years in service at the older
scan, 14 at the newer one, pits up to 0.15 mm/y, so that most pits crossed the 1 mm MFL
threshold between the inspections. ``default`` is ``make_pair``'s own floor (25 years,
pits up to 0.6 mm/y, repairs between the inspections); a pit that started a year before
the newer inspection grows there at up to 0.6 mm/y but has only deepened by 0.6 mm, which no
pair of scans can tell from a slower pit: compare it with ``--truth mean`` (the mean rate
between the inspections, (t_old − t_new)/Δt where that face's loss dominates).

Zone sides whose true maximum is below ``--min-rate`` (default 0.05 mm/y, about 2.5 × the
rate noise) are listed but left out of the point-estimate fraction: a rate that small
is not measurable from two scans 7 years apart.
"""

from __future__ import annotations

import argparse
import datetime as dt
import math

import numpy as np

from scananalyse import assess, rates, register, synth
from scananalyse.attribution import Shape, side_map
from scananalyse.rules import get_ruleset
from scananalyse.scan import SIDE_TOP, SIDE_UNDER
from scananalyse.zones import FloorGeometry, zone_map

FLOORS = {
    "young": dict(diameter_mm=4000, installed=dt.date(2012, 5, 1), inspected_old=dt.date(2019, 5, 1),
                  inspected_new=dt.date(2026, 5, 1), max_pit_rate=0.15, deep_fraction=0.0,
                  shell_margin_mm=40, repairs=0),
    "default": dict(),
}


def _filled(lr, new, oon):
    """The pipeline's step after ``compute_rates``: indication cells the older scan did not
    cover take the short-term rate of their indication's measured cells
    (``rates.fill_uncovered_rates``). Each filled point stays inside its interval."""
    import dataclasses

    from scananalyse.indications import label_indications, reporting_depth

    before = lr
    labels = label_indications(lr.loss, reporting_depth_mm=reporting_depth(new))  # as pipeline.analyse
    lr, _n = rates.fill_uncovered_rates(lr, new, oon, labels)
    changes = {}
    for side in ("top", "under"):
        point = getattr(lr, f"rate_{side}")
        filled = ~(point == getattr(before, f"rate_{side}")) & np.isfinite(point)
        for end, op in (("hi", np.fmax), ("lo", np.fmin), ("fit", np.fmax)):
            m = getattr(lr, f"rate_{side}_{end}").copy()
            m[filled] = op(m[filled], point[filled])
            changes[f"rate_{side}_{end}"] = m
    return dataclasses.replace(lr, **changes)


def evaluate(seed: int, floor: str = "young", *, fill: bool = True, truth: str = "rate") -> list[dict]:
    """One row per zone and side: true max rate, point, lo, hi; and life / true life."""
    rules = get_ruleset()
    p = synth.make_pair(seed=seed, **FLOORS[floor])
    tr = p.truth
    oon = register.resample_onto(p.old, p.new, register.RigidTransform(tr.rotation_deg, tr.dx_mm, tr.dy_mm))
    reps = [rates.Repair(Shape("rect", 0, x=(q.x_min_mm + q.x_max_mm) / 2, y=(q.y_min_mm + q.y_max_mm) / 2,
                               w=q.x_max_mm - q.x_min_mm, h=q.y_max_mm - q.y_min_mm), q.date)
            for q in tr.repairs.itertuples()]
    lr = rates.compute_rates(p.new, oon, side_map(p.new), repairs=reps)
    if fill:
        lr = _filled(lr, p.new, oon)
    zm = zone_map(p.new, FloorGeometry(tr.diameter_mm, centre=tr.centre), rules)
    table = assess.assess_zones(thickness=p.new.thickness, side=p.new.side, rate_top=lr.rate_top,
                                rate_under=lr.rate_under, zones=zm, meta=p.new.meta, rules=rules,
                                zone_rates=lr.zone_inputs())
    scanned = np.isfinite(p.new.thickness) & ~lr.repair_record
    rate_true = tr.rate_top_true.astype(np.float64) + tr.rate_under_true.astype(np.float64)
    out = []
    for row in table.itertuples():
        m = zm.mask(row.zone) & scanned
        if not m.any():
            continue
        with np.errstate(divide="ignore"):
            life = (tr.t_new_true[m].astype(np.float64) - row.mrt_mm) / rate_true[m]
        true_life = max(float(np.min(life)), 0.0)
        for s in ("top", "under"):
            if truth == "mean":  # (t_old − t_new)/Δt where that face's loss dominates
                code = SIDE_TOP if s == "top" else SIDE_UNDER
                sel = m & (tr.side_true == code)
                true_max = float(np.nanmax(tr.rate_mean_true[sel])) if sel.any() else 0.0
            else:
                true_max = float(np.max(getattr(tr, f"rate_{s}_true")[m]))
            out.append({"seed": seed, "zone": row.zone, "side": s, "true_max": true_max,
                        "point": getattr(row, f"rate_{s}_max_mm_y"),
                        "lo": getattr(row, f"rate_{s}_max_lo_mm_y"),
                        "hi": getattr(row, f"rate_{s}_max_hi_mm_y"),
                        "raw": getattr(row, f"rate_{s}_max_raw_mm_y"),
                        "life": row.life_local_y, "life_short": row.life_local_short_y,
                        "life_fit": row.life_local_fit_y,
                        "recommended": row.interval_recommended_y, "limiting": row.limiting,
                        "true_life": true_life})
    return out


def summary(rows: list[dict], *, min_rate: float = 0.05) -> dict:
    """Fractions over the rows, per zone name and overall."""
    out = {}
    for zone in sorted({r["zone"] for r in rows}) + ["all"]:
        sel = [r for r in rows if zone in ("all", r["zone"])]
        meas = [r for r in sel if r["true_max"] >= min_rate]
        within = [abs(r["point"] / r["true_max"] - 1) <= 0.30 for r in meas]
        raw_ratio = [r["raw"] / r["true_max"] for r in meas]
        inside = [r["lo"] <= r["true_max"] <= r["hi"] for r in sel]
        lives = {(r["seed"], r["zone"]): r["life"] / r["true_life"] for r in sel
                 if r["true_life"] > 0 and math.isfinite(r["true_life"])}
        lv = np.array([v for v in lives.values() if math.isfinite(v)])
        short = {(r["seed"], r["zone"]): r["life_short"] / r["true_life"] for r in sel
                 if r["true_life"] > 0 and math.isfinite(r["true_life"])}
        sv = np.array([v for v in short.values() if math.isfinite(v)])
        fit = {(r["seed"], r["zone"]): r["life_fit"] / r["true_life"] for r in sel
               if r["true_life"] > 0 and math.isfinite(r["true_life"])}
        fv = np.array([v for v in fit.values() if math.isfinite(v)])
        out[zone] = {
            "n_sides": len(meas), "point_within_30pct": float(np.mean(within)) if within else math.nan,
            "point_ratio_median": float(np.median([r["point"] / r["true_max"] for r in meas])) if meas else math.nan,
            "raw_ratio_median": float(np.median(raw_ratio)) if raw_ratio else math.nan,
            "truth_inside": float(np.mean(inside)) if inside else math.nan,
            "n_lives": int(lv.size),
            "life_in_0.75_1.1": float(np.mean((lv >= 0.75) & (lv <= 1.10))) if lv.size else math.nan,
            "life_over_1.1": float(np.mean(lv > 1.10)) if lv.size else math.nan,
            "life_ratio_median": float(np.median(lv)) if lv.size else math.nan,
            "life_short_ratio_median": float(np.median(sv)) if sv.size else math.nan,
            "life_fit_in_0.75_1.1": float(np.mean((fv >= 0.75) & (fv <= 1.10))) if fv.size else math.nan,
            "life_fit_over_1.1": float(np.mean(fv > 1.10)) if fv.size else math.nan,
            "life_fit_ratio_median": float(np.median(fv)) if fv.size else math.nan,
            "life_short_over_1": float(np.mean(sv > 1.0)) if sv.size else math.nan,
            "recommended_over_true_life": float(np.mean([r["recommended"] > r["true_life"] + 1e-9
                                                         for r in sel if r["side"] == "top"])),
            "recommended_over_1.1_true_life": float(np.mean([r["recommended"] > 1.1 * r["true_life"] + 1e-9
                                                             for r in sel if r["side"] == "top"])),
        }
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=40)
    ap.add_argument("--first", type=int, default=0)
    ap.add_argument("--floor", choices=sorted(FLOORS), default="young")
    ap.add_argument("--min-rate", type=float, default=0.05, help="[mm/y]")
    ap.add_argument("--truth", choices=("rate", "mean"), default="rate",
                    help="true maximum: the growth rate at the newer inspection (rate_*_true) or "
                         "the mean rate between the inspections (rate_mean_true)")
    ap.add_argument("--no-fill", action="store_true",
                    help="leave out the pipeline's fill of cells the older scan did not cover")
    args = ap.parse_args(argv)
    rows = []
    print(f"{'seed':>4} {'zone':<9} {'side':<5} {'true':>6} {'point':>6} {'lo':>6} {'hi':>6} "
          f"{'raw':>6} {'pt/tr':>6} {'in':>3} {'life/true':>9}")
    for seed in range(args.first, args.first + args.seeds):
        got = evaluate(seed, args.floor, fill=not args.no_fill, truth=args.truth)
        rows += got
        for r in got:
            inside = "yes" if r["lo"] <= r["true_max"] <= r["hi"] else "NO"
            lr = r["life"] / r["true_life"] if r["true_life"] > 0 else math.nan
            print(f"{r['seed']:>4} {r['zone']:<9} {r['side']:<5} {r['true_max']:6.3f} {r['point']:6.3f} "
                  f"{r['lo']:6.3f} {r['hi']:6.3f} {r['raw']:6.3f} {r['point'] / r['true_max']:6.2f} "
                  f"{inside:>3} {lr:9.2f}")
    print()
    for zone, s in summary(rows, min_rate=args.min_rate).items():
        print(f"{zone:<9} " + "  ".join(f"{k} {v:.2f}" if isinstance(v, float) else f"{k} {v}"
                                          for k, v in s.items()))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
