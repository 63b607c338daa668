"""Spot readings in a whole job: ``compare``/``assess --readings`` and ``[inputs] readings``.

The scans are the shipped demo (sample_scans/, an invented 8 m floor whose critical zone
the crawler never reached); the readings files are written here by hand.
"""

import datetime as dt
import json
import math
import os

import h5py
import pandas as pd
import pytest

from scananalyse.cli import main

HERE = os.path.dirname(__file__)
SAMPLES = os.path.join(HERE, os.pardir, "sample_scans")
OLD = os.path.join(SAMPLES, "FQ-214_2015-09-21.h5")
NEW = os.path.join(SAMPLES, "FQ-214_2025-10-06.h5")
T0 = 6.35  # the demo's nominal [mm]
INSTALLED = dt.date(1999, 4, 12)  # the demo's 'installed' header
DATE_OLD, DATE_NEW = dt.date(2015, 9, 21), dt.date(2025, 10, 6)

# three hand UT readings in the critical zone (R = 4000 mm, critical width 75 mm), and
# the same spots read at the older outage
SPOTS = [(3960.0, 0.0), (-3960.0, 0.0), (0.0, 3960.0)]
UT_NEW = [4.0, 4.6, 5.2]
UT_OLD = [5.5, 5.0, 5.5]


def _readings_file(path, date, rows, *, header_extra=""):
    """rows: (x, y, kind, thickness, depth)."""
    lines = ["# format: scananalyse-readings 1", "# tank: FQ-214", f"# inspected: {date.isoformat()}",
             "# units: mm", "# sigma: 0.1"] + ([header_extra] if header_extra else []) + ["x,y,kind,thickness,depth"]
    for x, y, kind, t, d in rows:
        lines.append(f"{x:.2f},{y:.2f},{kind},{'' if t is None else t},{'' if d is None else d}")
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return str(path)


def _old_frame(x, y):
    """A spot of the newer frame in the older scan's frame: the inverse of the demo's known
    old -> new transform (sample_scans/truth/FQ-214_truth.json)."""
    with open(os.path.join(SAMPLES, "truth", "FQ-214_truth.json"), encoding="utf-8") as fh:
        tr = json.load(fh)["transform_old_to_new"]
    th = math.radians(tr["rotation_deg"])
    u, v = x - tr["dx_mm"], y - tr["dy_mm"]
    return math.cos(th) * u + math.sin(th) * v, -math.sin(th) * u + math.cos(th) * v


def _run(argv, capsys):
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def test_compare_with_readings_fills_the_critical_zone(tmp_path, capsys):
    new_r = _readings_file(tmp_path / "ut_new.csv", DATE_NEW,
                           [(x, y, "ut", t, None) for (x, y), t in zip(SPOTS, UT_NEW)]
                           # a prove-up at the demo's deepest indication (scan: t_min 1.40 mm)
                           + [(2312.5, 2837.5, "prove-up", 1.30, None)])
    old_r = _readings_file(tmp_path / "ut_old.csv", DATE_OLD,
                           [(*_old_frame(x, y), "ut", t, None) for (x, y), t in zip(SPOTS, UT_OLD)])
    out_dir = tmp_path / "out"
    code, out, err = _run(["compare", OLD, NEW, "--diameter", "8000", "--out", str(out_dir), "--quiet",
                           "--readings", old_r, "--readings", new_r], capsys)
    assert code == 0, err
    for name in ("readings_zones.csv", "prove_up.csv", "zones.csv", "report.html"):
        assert (out_dir / name).is_file(), name

    rz = pd.read_csv(out_dir / "readings_zones.csv")
    crit_r = rz.set_index("zone").loc["critical"]
    assert crit_r["n_ut"] == 3 and crit_r["n_spots_both_outages"] == 3  # the older spots matched after the move

    zones = pd.read_csv(out_dir / "zones.csv").set_index("zone")
    crit = zones.loc["critical"]
    flags = crit["flags"].split(";")
    assert "no-data" not in flags and "readings-only" in flags and "points-only" in flags
    assert crit["n_readings"] == 3
    assert crit["t_min_mm"] == pytest.approx(4.0)

    # Independent computation (domain notes §4, §5; API 653 critical zone):
    # MRT of the critical zone: half the original thickness (shell course not given), not
    # below the 2.54 mm of Table 4.4 without leak detection.
    mrt = max(T0 / 2, 2.54)
    age = (DATE_NEW - INSTALLED).days / 365.2425
    dt_y = (DATE_NEW - DATE_OLD).days / 365.2425
    # code formula: UT readings of unknown side count as underside (the default), so
    # RTbc = thinnest reading, RTip = t0, StPr = 0, UPr = (t0 - RTbc)/age (UT: no threshold rule)
    rtbc = min(UT_NEW)
    upr = (T0 - rtbc) / age
    code = (min(rtbc, T0) - mrt) / upr
    # co-located life: per spot (t - MRT)/max(short-term, long-term rate), the least of them
    lives = []
    for t_new, t_old in zip(UT_NEW, UT_OLD):
        rate = max((t_old - t_new) / dt_y, (T0 - t_new) / age)
        lives.append((t_new - mrt) / rate)
    local = min(lives)
    cap = 20.0  # no release-prevention barrier
    assert crit["interval_code_y"] == pytest.approx(code, rel=1e-9)
    assert crit["life_local_y"] == pytest.approx(local, rel=1e-9)
    assert "code-exceeds-local" in flags
    # The floor between the three spots is unseen: it is judged with the whole floor's
    # extreme-value law over the zone's area (1.87 m²), and its 95 % bound of the deepest
    # loss is past the allowance t0 - MRT, so its life is 0 and so is the recommendation.
    # (The demo's truth agrees: the critical zone's true thinnest metal is 1.98 mm, below
    # its MRT of 3.175 mm; sample_scans/regenerate.py.)
    assert crit["eva_source"] == "floor" and {"eva-borrowed", "eva-below-mrt"} <= set(flags)
    assert crit["hidden_area_m2"] == pytest.approx(crit["area_m2"])
    assert crit["depth_hidden_p95_mm"] >= T0 - mrt and crit["life_eva_y"] == 0.0
    expected = math.floor(min(code, local, crit["life_eva_y"], cap) / 0.5 + 1e-9) * 0.5  # rounded down to 0.5 y
    assert crit["interval_recommended_y"] == pytest.approx(expected) == 0.0
    assert crit["limiting"] == "eva"
    # the repaired table carries the same readings-only row (no repair reaches those points)
    rep = pd.read_csv(out_dir / "zones_repaired.csv").set_index("zone")
    assert rep.loc["critical", "interval_recommended_y"] == pytest.approx(expected)
    # its life distribution: the zone's whole area from the floor's law at the floor's
    # rates, and the spots; the truth (already below MRT) is at or above p05, and the
    # repaired floor's figures for it are the same draws (no repair touched that metal)
    assert crit["life_p05_y"] == 0.0 and crit["p_mrt_at_due"] > 0.5
    for col in ("life_p05_y", "life_p50_y", "life_p95_y", "p_mrt_at_due", "p_leak_at_due"):
        assert rep.loc["critical", col] == pytest.approx(crit[col], nan_ok=False), col

    # the prove-up governs at its cell, and its indication is no longer on the prove-up list
    with h5py.File(out_dir / "results.h5", "r") as f:
        assert "readings_proved" in f["maps"] and "thickness_scanned" in f["maps"]
        assert list(f["readings/new/kind"].asstr()[:]) == ["ut"] * 3 + ["prove-up"]
        assert "readings/old" in f
        assert int(f.attrs["sizing_n_pairs"]) == 1
    pu = pd.read_csv(out_dir / "prove_up.csv")
    assert len(pu) and 96 not in set(pu["id"])
    assert {"rank", "reason"} <= set(pu.columns)
    html = (out_dir / "report.html").read_text(encoding="utf-8")
    assert "Field readings" in html


def test_sizing_correction_on_and_off(tmp_path, capsys):
    # three prove-ups at indications, each UT loss 1.2 x the scan's: the scan under-sizes
    rows = [(2312.5, 2837.5, 4.95), (-1312.5, -1387.5, 4.70), (587.5, -2887.5, 4.50)]
    path = _readings_file(tmp_path / "pu.csv", DATE_NEW,
                          [(x, y, "prove-up", round(T0 - 1.2 * m, 3), None) for x, y, m in rows])
    res = {}
    for tag, extra in (("on", []), ("off", ["--no-sizing-correction"])):
        out_dir = tmp_path / tag
        code, out, err = _run(["assess", NEW, "--diameter", "8000", "--out", str(out_dir), "--quiet",
                               "--readings", path, *extra], capsys)
        assert code == 0, err
        with h5py.File(out_dir / "results.h5", "r") as f:
            assert bool(f.attrs["sizing_undersized"])
            assert f.attrs["sizing_k"] == pytest.approx(1.2, rel=1e-3)
            t, t_scan = f["maps/thickness"][:], f["maps/thickness_scanned"][:]
            res[tag] = (int(f.attrs["sizing_corrected"]), t, t_scan)
        res[tag + "_html"] = (out_dir / "report.html").read_text(encoding="utf-8")
    assert res["on"][0] == 1 and res["off"][0] == 0
    import numpy as np
    # corrected: unproved loss deepened (never thinned) and the three prove-ups govern at their cells
    on_t, scan_t = res["on"][1], res["on"][2]
    ok = np.isfinite(scan_t)
    assert np.all(on_t[ok] <= scan_t[ok] + 1e-6) and np.any(on_t[ok] < scan_t[ok] - 0.1)
    assert np.nanmin(on_t) == pytest.approx(T0 - 1.2 * 4.95, abs=1e-3)
    # off: only the prove-up cells differ from the scan
    off_t = res["off"][1]
    assert np.count_nonzero(off_t[ok] != scan_t[ok]) == 3
    assert "NOT corrected" in res["off_html"]
    assert "NOT corrected" not in res["on_html"]


def test_job_file_readings(tmp_path, capsys):
    _readings_file(tmp_path / "ut.csv", DATE_NEW, [(x, y, "ut", t, None) for (x, y), t in zip(SPOTS, UT_NEW)])
    job = tmp_path / "job.toml"
    job.write_text('[floor]\ndiameter = 8000\n[inputs]\nreadings = ["ut.csv"]\n', encoding="utf-8")
    code, out, err = _run(["assess", NEW, "--job", str(job), "--out", str(tmp_path / "o"), "--quiet"], capsys)
    assert code == 0, err
    zones = pd.read_csv(tmp_path / "o" / "zones.csv").set_index("zone")
    assert "readings-only" in zones.loc["critical", "flags"]


def test_job_file_readings_not_a_list_of_names(tmp_path, capsys):
    job = tmp_path / "job.toml"
    job.write_text('[floor]\ndiameter = 8000\n[inputs]\nreadings = [1]\n', encoding="utf-8")
    code, out, err = _run(["assess", NEW, "--job", str(job), "--out", str(tmp_path / "o"), "--quiet"], capsys)
    assert code == 2
    assert err.count("\n") == 1 and "inputs.readings" in err


def test_bad_readings_file_exit_2_one_line(tmp_path, capsys):
    path = _readings_file(tmp_path / "bad.csv", DATE_NEW, [(3960.0, 0.0, "ut", -1.0, None)])
    out_dir = tmp_path / "out"
    code, out, err = _run(["assess", NEW, "--diameter", "8000", "--out", str(out_dir), "--quiet",
                           "--readings", path], capsys)
    assert code == 2
    assert err.count("\n") == 1
    assert "bad.csv:7" in err and "thickness" in err
    assert not out_dir.exists()  # refused before any work


def test_readings_matching_neither_scan(tmp_path, capsys):
    # dated 2020: more than a year from both the 2015 and the 2025 scan
    path = _readings_file(tmp_path / "stray.csv", dt.date(2020, 6, 1), [(3960.0, 0.0, "ut", 5.0, None)])
    out_dir = tmp_path / "out"
    code, out, err = _run(["compare", OLD, NEW, "--diameter", "8000", "--out", str(out_dir), "--quiet",
                           "--readings", path], capsys)
    assert code == 2
    assert err.count("\n") == 1
    assert "stray.csv" in err and "inspected" in err and "no inspection" in err
    assert not out_dir.exists()


def test_sizing_figure_ax_none_and_given():
    # the figure function takes ax=None (a new figure) or an axes, and returns the figure
    from matplotlib.figure import Figure

    from scananalyse.readings import SizingCheck
    from scananalyse.report.figlist import sizing_figure

    pairs = pd.DataFrame({"kind": ["prove-up", "prove-up", "ut"], "scanned": [True, True, True],
                          "t_scan_mm": [4.0, 3.0, 5.0], "thickness_mm": [3.5, 2.4, 5.0]})
    check = SizingCheck(2, -0.55, 0.07, 1.2, 0.05, False)
    fig = sizing_figure(pairs, T0, check)
    assert isinstance(fig, Figure)
    ax = fig.axes[0]
    assert len(ax.collections[0].get_offsets()) == 2  # the two prove-ups, not the UT check
    other = Figure()
    ax2 = other.add_subplot()
    assert sizing_figure(pairs, T0, None, ax=ax2) is other


def test_a_hand_reading_off_the_scan_governs_its_scanned_zone(tmp_path, capsys):
    # The interior is scanned except around obstructions; a hand UT reading on one of those
    # unscanned cells reads 2.0 mm, below the interior's MRT of 2.54 mm (API 653 Table 4.4
    # without leak detection, from memory; the demo's zones.csv states it).  It is measured
    # metal: the zone is below MRT at that spot whatever the scan says, and the patch plan
    # (made from the scan) does not cover it.
    import numpy as np

    from scananalyse.io import read_scan

    scan = read_scan(NEW)
    rows, cols = np.nonzero(~np.isfinite(scan.thickness))
    x, y = scan.x0 + cols * scan.pitch, scan.y0 + rows * scan.pitch
    inner = np.hypot(x, y) < 3000.0  # well inside the shell: the interior zone
    k = int(np.flatnonzero(inner)[0])
    path = _readings_file(tmp_path / "ut.csv", DATE_NEW, [(float(x[k]), float(y[k]), "ut", 2.0, None)])
    out_dir = tmp_path / "out"
    code, out, err = _run(["assess", NEW, "--diameter", "8000", "--out", str(out_dir), "--quiet",
                           "--readings", path], capsys)
    assert code == 0, err
    # as found the scan itself reads 1.40 mm there already; after the proposed repairs the
    # scanned metal is sound (4.2 mm and up) but the spot is not: it governs
    for name in ("zones.csv", "zones_repaired.csv"):
        row = pd.read_csv(out_dir / name).set_index("zone").loc["interior"]
        assert row["interval_recommended_y"] == 0.0 and "below-mrt" in row["flags"].split(";"), name
        assert row["p_mrt_at_due"] == 1.0, name  # below MRT in every draw
    rep = pd.read_csv(out_dir / "zones_repaired.csv").set_index("zone").loc["interior"]
    assert rep["t_min_mm"] == 2.0  # (already 0 y by the unscanned part: readings-govern is not added)
    assert "2.00 mm" in rep["notes"] and "does not cover it" in rep["notes"]
    assert rep["life_p05_y"] == rep["life_p95_y"] == 0.0
    # and the report says what to do about it
    html = (out_dir / "report.html").read_text(encoding="utf-8")
    assert "still below MRT at a spot reading" in html and "does not cover" in html
