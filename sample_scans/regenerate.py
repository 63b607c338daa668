"""Rebuild the shipped sample scans from the synthetic floor model.

Run from the repository root (or anywhere):

    python sample_scans/regenerate.py

It builds the invented demo pair (tank FQ-214, see README.md beside this file)
with a fixed seed, writes both inspections as floor-scan CSV v1 and HDF5 v1,
the operator repair record, the 2025 hand readings (readings CSV v1), and the
ground truth used to check the demo, then reads every scan back and checks it
against what was written.  ``--readings-only`` rewrites only the readings.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import sys

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(HERE))

from scananalyse import synth  # noqa: E402
from scananalyse.io import read_scan, write_scan  # noqa: E402

#: The invented scenario (README.md tells the story).
SCENARIO = dict(
    tank="FQ-214",
    diameter_mm=8000.0,
    pitch_new=25.0,
    pitch_old=30.0,
    nominal=6.35,
    installed=dt.date(1999, 4, 12),
    inspected_old=dt.date(2015, 9, 21),
    inspected_new=dt.date(2025, 10, 6),
    method="MFL",
    threshold=1.25,
    sigma=0.15,
    rotation_deg=1.6,
    shift_mm=(143.0, -61.5),
    shell_margin_mm=120.0,
    shell_margin_old_mm=150.0,
    repairs=2,
    seed=214,
)


def build():
    return synth.make_pair(**SCENARIO)


#: The hand readings of the 2025 outage (README.md): hand UT round the shell where the
#: crawler stopped 120 mm short, UT prove-ups of the deepest reported pits, and pit-gauge
#: depths of the two deepest top-side pits.  One-sigma of a hand reading. [mm]
READING_SIGMA = 0.10


def readings_rows(pair, *, seed: int = 2025) -> list[str]:
    """CSV rows (x, y, kind, thickness, depth, side, id, note) sampled from the truth."""
    tr, new = pair.truth, pair.new
    rng = np.random.default_rng(seed)

    def t_true(x, y):
        r, c = new.cell_of(x, y)
        return float(tr.t_new_true[int(round(float(r))), int(round(float(c)))])

    rows = []
    radius = tr.diameter_mm / 2 - 60.0  # mid-way across the unscanned 120 mm margin
    for k, ang in enumerate(range(0, 360, 10), start=1):
        x = tr.centre[0] + radius * np.cos(np.radians(ang))
        y = tr.centre[1] + radius * np.sin(np.radians(ang))
        t = t_true(x, y) + rng.normal(0, READING_SIGMA)
        rows.append(f"{x:.1f},{y:.1f},ut,{t:.2f},,,CZ-{k:02d},hand UT at the shell")
    pits = tr.pits[tr.pits.seen_new & (tr.pits.repair < 0)]
    deepest = pits.sort_values("depth_new_mm", ascending=False)
    for k, p in enumerate(deepest[deepest.side == "under"].head(8).itertuples(), start=1):
        t = t_true(p.x_mm, p.y_mm) + rng.normal(0, READING_SIGMA)
        rows.append(f"{p.x_mm:.1f},{p.y_mm:.1f},prove-up,{t:.2f},,under,PU-{k:02d},UT prove-up")
    for k, p in enumerate(deepest[deepest.side == "top"].head(2).itertuples(), start=1):
        d = max(p.depth_new_mm + rng.normal(0, READING_SIGMA), 0.0)
        rows.append(f"{p.x_mm:.1f},{p.y_mm:.1f},pit-gauge,,{d:.2f},top,PG-{k:02d},top-side pit from above")
    return rows


def write_readings(pair, path: str) -> None:
    head = ["# format: scananalyse-readings 1", f"# tank: {SCENARIO['tank']}",
            f"# inspected: {SCENARIO['inspected_new'].isoformat()}", "# units: mm",
            f"# sigma: {READING_SIGMA}", "# invented: synthetic readings for the demo",
            "x,y,kind,thickness,depth,side,id,note"]
    with open(path, "w", encoding="utf-8", newline="\n") as fh:
        fh.write("\n".join(head + readings_rows(pair)) + "\n")


def main() -> int:
    pair = build()
    tank = SCENARIO["tank"]
    readings = os.path.join(HERE, f"{tank}_readings_{SCENARIO['inspected_new'].isoformat()}.csv")
    if "--readings-only" in sys.argv:  # leave the scans as they are; rewrite only the readings
        write_readings(pair, readings)
        print(f"{os.path.relpath(readings, HERE)} written")
        return 0
    written = []
    for scan in (pair.old, pair.new):
        stem = os.path.join(HERE, f"{tank}_{scan.meta.inspected.isoformat()}")
        for ext in (".csv", ".h5"):
            write_scan(scan, stem + ext)
            written.append((scan, stem + ext))
    rec = os.path.join(HERE, f"{tank}_repairs.csv")
    synth.write_repair_record(pair.truth, rec)
    write_readings(pair, readings)

    tdir = os.path.join(HERE, "truth")
    os.makedirs(tdir, exist_ok=True)
    tr = pair.truth
    tr.pits.to_csv(os.path.join(tdir, f"{tank}_pits.csv"), index=False, float_format="%.4f")
    summary = {
        "tank": tank,
        "seed": SCENARIO["seed"],
        "transform_old_to_new": {"rotation_deg": tr.rotation_deg, "dx_mm": tr.dx_mm, "dy_mm": tr.dy_mm},
        "diameter_mm": tr.diameter_mm,
        "centre_mm": list(tr.centre),
        "dt_years": round(tr.dt_years, 4),
        "age_old_years": round(tr.age_old_years, 4),
        "age_new_years": round(tr.age_new_years, 4),
        "general_rate_top_mm_y": tr.general_rate_top,
        "general_rate_under_mm_y": tr.general_rate_under,
        "t_min_true_new_mm": round(float(np.nanmin(tr.t_new_true)), 3),
        "t_min_reported_new_mm": round(float(np.nanmin(pair.new.thickness)), 3),
        "rate_top_max_true_mm_y": round(float(np.nanmax(tr.rate_top_true)), 4),
        "rate_under_max_true_mm_y": round(float(np.nanmax(tr.rate_under_true)), 4),
        "pits": int(len(tr.pits)),
        "pits_new_since_old": int((tr.pits.start_year > tr.age_old_years).sum()),
        "pits_hidden": int((~tr.pits.seen_new).sum()),
        "repairs": int(len(tr.repairs)),
    }
    with open(os.path.join(tdir, f"{tank}_truth.json"), "w", encoding="utf-8") as fh:
        json.dump(summary, fh, indent=2)
        fh.write("\n")

    # read back and check
    for scan, path in written:
        back = read_scan(path)
        assert back.same_grid(scan), path
        a, b = scan.thickness, back.thickness
        assert np.array_equal(np.isnan(a), np.isnan(b)), path
        assert np.allclose(a[~np.isnan(a)], b[~np.isnan(b)], atol=1e-4), path
        for layer in ("side", "plate"):
            la, lb = getattr(scan, layer), getattr(back, layer)
            if la is not None:
                assert lb is not None, (path, layer)
                sel = ~np.isnan(a)
                assert np.array_equal(la[sel], lb[sel]), (path, layer)
        assert back.meta.inspected == scan.meta.inspected and back.meta.tank == tank, path
        print(f"{os.path.relpath(path, HERE):28s} {os.path.getsize(path) / 1e6:6.2f} MB  "
              f"{back.shape[0]}x{back.shape[1]} @ {back.pitch:g} mm, {back.n_scanned} cells, read back OK")
    print(f"{os.path.relpath(rec, HERE):28s} {len(tr.repairs)} repairs")
    print(json.dumps(summary))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
