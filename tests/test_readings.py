"""Spot readings (readings CSV v1): reader, pairing, sizing check, applying, zone summary,
prove-up list.  All data here are invented (synthetic truth or hand-written files)."""

import datetime as dt
import math
import os

import numpy as np
import pandas as pd
import pytest

from scananalyse.errors import InputError
from scananalyse.readings import (
    MAX_FILE_BYTES, READING_COLUMNS, SUMMARY_COLUMNS, Readings, SizingCheck, apply_readings,
    correct_undersizing, merge_readings, move_readings, pair_readings, prove_up_candidates,
    read_readings, reading_spots, reading_zone_summary, reading_zones, sizing_check)
from scananalyse.rules import get_ruleset
from scananalyse.scan import FloorScan, ScanMeta
from scananalyse.zones import FloorGeometry, GridSpec, zone_map

DATA = os.path.join(os.path.dirname(__file__), "data")

HEAD = """# format: scananalyse-readings 1
# tank: TK-07
# inspected: 2024-05-14
# units: mm
# sigma: 0.1
"""


def _write(tmp_path, text, name="r.csv", mode="w"):
    p = tmp_path / name
    if mode == "w":
        p.write_text(text, encoding="utf-8")
    else:
        p.write_bytes(text)
    return str(p)


def _readings(rows, inspected=dt.date(2024, 5, 14)):
    """A Readings built in memory: rows (x, y, kind, thickness, depth, side)."""
    t = pd.DataFrame(rows, columns=["x_mm", "y_mm", "kind", "thickness_mm", "depth_mm", "side"])
    t["id"] = ""
    t["note"] = ""
    t["line"] = np.arange(len(t), dtype=np.int64) + 7
    return Readings(inspected=inspected, units="mm", table=t[list(READING_COLUMNS)])


# --------------------------------------------------------------------------- reader
def test_read_good_file_mm(tmp_path):
    # hand-written file; expected values read off the text
    path = _write(tmp_path, HEAD + "# crew: A. N. Other\n# a free comment line\n"
                  "x,y,kind,thickness,depth,side,id,note\n"
                  "3960.0,0.0,ut,5.41,,,R1,\n"
                  "-1250.0,830.0,prove-up,3.87,,under,R2,\"at indication 12, plate 4\"\n"
                  "\n"
                  "10,20,pit-gauge,,1.2,,R3,\n"
                  "11,21,Pit-Gauge,,0,Top,,\n")
    r = read_readings(path)
    assert r.inspected == dt.date(2024, 5, 14)
    assert r.units == "mm" and r.tank == "TK-07" and r.sigma_mm == pytest.approx(0.1)
    assert r.extra == {"crew": "A. N. Other"}
    t = r.table
    assert list(t.columns) == list(READING_COLUMNS)
    assert t["kind"].tolist() == ["ut", "prove-up", "pit-gauge", "pit-gauge"]
    assert t["thickness_mm"].iloc[:2].tolist() == [5.41, 3.87]
    assert np.isnan(t["thickness_mm"].iloc[2]) and np.isnan(t["depth_mm"].iloc[0])
    assert t["depth_mm"].iloc[2:].tolist() == [1.2, 0.0]
    assert t["side"].tolist() == ["unknown", "under", "top", "top"]  # pit gauge: top side
    assert t["id"].tolist() == ["R1", "R2", "R3", ""]
    assert t["note"].iloc[1] == "at indication 12, plate 4"
    assert t["line"].tolist() == [9, 10, 12, 13]
    assert len(r) == 4


def test_read_inches_converted(tmp_path):
    # 1 in = 25.4 mm exactly (international inch)
    path = _write(tmp_path, "# format: scananalyse-readings 1\n# inspected: 2024-05-14\n"
                  "# units: in\n# sigma: 0.004\nx,y,kind,thickness,depth\n"
                  "100,-10,ut,0.2,\n1,1,pit-gauge,,0.05\n")
    t = read_readings(path).table
    assert t["x_mm"].tolist() == pytest.approx([2540.0, 25.4])
    assert t["y_mm"].tolist() == pytest.approx([-254.0, 25.4])
    assert t["thickness_mm"].iloc[0] == pytest.approx(5.08)
    assert t["depth_mm"].iloc[1] == pytest.approx(1.27)
    assert read_readings(path).sigma_mm == pytest.approx(0.1016)


def test_example_data_file_reads():
    # the shipped example (invented readings) must stay valid
    r = read_readings(os.path.join(DATA, "readings_example.csv"))
    assert set(r.table["kind"]) == {"ut", "prove-up", "pit-gauge"}


BAD = [
    # (file text, regex the one-line message must match)
    ("# format: scananalyse-readings 1\n# units: mm\nx,y,kind,thickness\n1,1,ut,5\n",
     r"r\.csv: field 'inspected': required header key missing"),
    ("# format: scananalyse-readings 1\n# inspected: 2024-05-14\nx,y,kind,thickness\n1,1,ut,5\n",
     r"r\.csv: field 'units': required header key missing"),
    ("# inspected: 2024-05-14\n# units: mm\nx,y,kind,thickness\n1,1,ut,5\n",
     r"r\.csv: field 'format': missing"),
    ("# format: scananalyse-scan 1\n# inspected: 2024-05-14\n# units: mm\nx,y,kind,thickness\n",
     r"r\.csv:1: field 'format': .* is not the readings format"),
    ("# format: scananalyse-readings 2\n# inspected: 2024-05-14\n# units: mm\nx,y,kind,thickness\n",
     r"r\.csv:1: field 'format': unsupported version"),
    (HEAD.replace("2024-05-14", "2024-13-01") + "x,y,kind,thickness\n1,1,ut,5\n",
     r"r\.csv:3: field 'inspected': '2024-13-01' is not a valid calendar date"),
    (HEAD.replace("2024-05-14", "14/05/2024") + "x,y,kind,thickness\n1,1,ut,5\n",
     r"r\.csv:3: field 'inspected': .* is not an ISO date"),
    (HEAD.replace("units: mm", "units: cm") + "x,y,kind,thickness\n1,1,ut,5\n",
     r"r\.csv:4: field 'units': unknown units 'cm'"),
    (HEAD.replace("sigma: 0.1", "sigma: -0.1") + "x,y,kind,thickness\n1,1,ut,5\n",
     r"r\.csv:5: field 'sigma': must not be negative"),
    (HEAD + "# units: in\nx,y,kind,thickness\n", r"r\.csv:6: field 'units': key repeated"),
    (HEAD + "# : x\nx,y,kind,thickness\n", r"r\.csv:6: header line has an empty key"),
    (HEAD.replace("units: mm", "units:") + "x,y,kind,thickness\n1,1,ut,5\n",
     r"r\.csv:4: field 'units': required header key has no value"),
    (HEAD, r"r\.csv: field 'columns': no table header row"),
    (HEAD + "x,y,kind,thickness\n", r"r\.csv:6: no readings below the header row"),
    (HEAD + "x,y,thickness\n1,1,5\n", r"r\.csv:6: field 'kind': required column missing"),
    (HEAD + "x,y,kind,side\n1,1,ut,top\n", r"r\.csv:6: field 'thickness': a 'thickness' or a 'depth'"),
    (HEAD + "x,y,kind,thickness,colour\n", r"r\.csv:6: field 'colour': unknown column"),
    (HEAD + "x,y,kind,thickness,x\n", r"r\.csv:6: field 'x': column repeated"),
    (HEAD + "x,y,kind,thickness\n1,1,ut,5\n1,1,ut\n", r"r\.csv:8: 3 fields, the header row has 4"),
    (HEAD + "x,y,kind,thickness\n1,1,ut,5,9\n", r"r\.csv:7: 5 fields, the header row has 4"),
    (HEAD + "x,y,kind,thickness\nabc,1,ut,5\n", r"r\.csv:7: field 'x': 'abc' is not a number"),
    (HEAD + "x,y,kind,thickness\n1,inf,ut,5\n", r"r\.csv:7: field 'y': 'inf' is not finite"),
    (HEAD + "x,y,kind,thickness\n1,1,ut,5\n1,1,laser,5\n",
     r"r\.csv:8: field 'kind': 'laser' is not a reading kind"),
    (HEAD + "x,y,kind,thickness\n1,1,ut,\n", r"r\.csv:7: field 'thickness': empty"),
    (HEAD + "x,y,kind,thickness\n1,1,prove-up,nan\n", r"r\.csv:7: field 'thickness': 'nan' is not finite"),
    (HEAD + "x,y,kind,thickness\n1,1,ut,inf\n", r"r\.csv:7: field 'thickness': 'inf' is not finite"),
    (HEAD + "x,y,kind,thickness\n1,1,ut,0\n", r"r\.csv:7: field 'thickness': must be positive"),
    (HEAD + "x,y,kind,thickness\n1,1,ut,-2.5\n", r"r\.csv:7: field 'thickness': must be positive"),
    (HEAD + "x,y,kind,thickness\n1,1,pit-gauge,5\n",
     r"r\.csv:7: field 'depth': a pit-gauge reading needs a 'depth' column"),
    (HEAD + "x,y,kind,depth\n1,1,ut,1\n", r"r\.csv:7: field 'thickness': a ut reading needs"),
    (HEAD + "x,y,kind,thickness,depth\n1,1,pit-gauge,,-0.3\n",
     r"r\.csv:7: field 'depth': must not be negative"),
    (HEAD + "x,y,kind,thickness,depth\n1,1,pit-gauge,,\n", r"r\.csv:7: field 'depth': empty"),
    (HEAD + "x,y,kind,thickness,depth\n1,1,ut,5,1\n",
     r"r\.csv:7: field 'depth': a ut reading takes 'thickness', not 'depth'"),
    (HEAD + "x,y,kind,thickness,side\n1,1,ut,5,inside\n",
     r"r\.csv:7: field 'side': 'inside' is not a side"),
    (HEAD + "x,y,kind,thickness,depth,side\n1,1,pit-gauge,,1,under\n",
     r"r\.csv:7: field 'side': a pit gauge measures from above"),
    (HEAD + "x,y,kind,thickness,id\n1,1,ut,5,A\n2,2,ut,5,B\n3,3,ut,5,A\n",
     r"r\.csv:9: field 'id': id 'A' repeated \(first on line 7\)"),
    (HEAD + "x,y,kind,thickness,note\n1,1,ut,5," + "n" * 1001 + "\n",
     r"r\.csv:7: field 'note': longer than 1000 characters"),
    (HEAD.replace("TK-07", "T" * 1001) + "x,y,kind,thickness\n1,1,ut,5\n",
     r"r\.csv:2: field 'tank': longer than 1000 characters"),
    (HEAD + "x,y,kind,thickness,note\n1,1,ut,5,\"" + "a," * 5001 + "\"\n",
     r"r\.csv:7: line longer than 10000 bytes"),
    (HEAD + "x,y,kind,thickness\n1,1,ut,5\r1,2,ut,5\n", r"r\.csv:7: carriage return inside a line"),
]


@pytest.mark.parametrize("text, message", BAD, ids=[f"bad{i}" for i in range(len(BAD))])
def test_bad_file_one_line_error(tmp_path, text, message):
    # the contract (design §3.6, docs/formats.md): every violation is one line naming file and line
    path = _write(tmp_path, text)
    with pytest.raises(InputError, match=message) as exc:
        read_readings(path)
    assert "\n" not in str(exc.value)


def test_crlf_line_endings_accepted(tmp_path):
    path = _write(tmp_path, (HEAD + "x,y,kind,thickness\n1,1,ut,5\n").replace("\n", "\r\n").encode(),
                  mode="b")
    assert read_readings(path).table["thickness_mm"].tolist() == [5.0]


def test_not_utf8_names_the_line(tmp_path):
    path = _write(tmp_path, (HEAD + "x,y,kind,thickness,note\n1,1,ut,5,ok\n1,2,ut,5,caf").encode()
                  + b"\xe9\n", mode="b")
    with pytest.raises(InputError, match=r"r\.csv:8: not UTF-8 text"):
        read_readings(path)


def test_utf16_and_binary_refused(tmp_path):
    p16 = _write(tmp_path, (HEAD + "x,y,kind,thickness\n1,1,ut,5\n").encode("utf-16"), "u16.csv", "b")
    with pytest.raises(InputError, match=r"u16\.csv:1: UTF-16 text"):
        read_readings(p16)
    pb = _write(tmp_path, HEAD.encode() + b"x,y,kind,thickness\n1,1,ut,5\x00\n", "bin.csv", "b")
    with pytest.raises(InputError, match=r"bin\.csv:7: binary data"):
        read_readings(pb)


def test_not_a_regular_file(tmp_path):
    d = tmp_path / "folder.csv"
    d.mkdir()
    with pytest.raises(InputError, match=r"folder\.csv: not a regular file"):
        read_readings(d)
    with pytest.raises(InputError, match=r"missing\.csv: cannot be read"):
        read_readings(tmp_path / "missing.csv")


def test_file_over_size_limit(tmp_path):
    # a sparse file one byte over the limit: refused before it is read
    p = tmp_path / "big.csv"
    with open(p, "wb") as fh:
        fh.write(HEAD.encode())
        fh.truncate(MAX_FILE_BYTES + 1)
    with pytest.raises(InputError, match=r"big\.csv: \d+ bytes, above the limit of 52428800"):
        read_readings(p)


def test_merge_and_move():
    a = _readings([(0.0, 0.0, "ut", 5.0, np.nan, "unknown")], dt.date(2024, 5, 14))
    b = _readings([(1.0, 0.0, "ut", 4.0, np.nan, "top")], dt.date(2024, 5, 20))
    m = merge_readings([a, b])
    assert m.inspected == dt.date(2024, 5, 20) and len(m) == 2
    with pytest.raises(InputError, match="not one outage"):
        merge_readings([a, _readings([(0.0, 0.0, "ut", 5.0, np.nan, "top")], dt.date(2020, 1, 1))])
    # hand computation: (1, 0) rotated 90° counter-clockwise is (0, 1), then shifted by (10, -5)
    mv = move_readings(b, dx_mm=10.0, dy_mm=-5.0, rotation_deg=90.0)
    assert mv.table["x_mm"].iloc[0] == pytest.approx(10.0)
    assert mv.table["y_mm"].iloc[0] == pytest.approx(-4.0)


# --------------------------------------------------------------------------- pairing, applying
def _small_scan():
    """A 4 x 5 grid, pitch 10 mm, anchor (100, 200); cell (1, 2) unscanned."""
    t = np.full((4, 5), 6.0, dtype=np.float32)
    t[2, 3] = 4.0
    t[1, 2] = np.nan
    return FloorScan(thickness=t, x0=100.0, y0=200.0, pitch=10.0,
                     meta=ScanMeta(inspected=dt.date(2024, 5, 14), nominal=6.35))


def test_pair_readings_cells():
    # hand computation: x = 100 + 10·col, y = 200 + 10·row; nearest centre wins
    scan = _small_scan()
    r = _readings([(131.0, 219.0, "prove-up", 3.5, np.nan, "under"),   # row 2, col 3 (scan 4.0)
                   (120.0, 210.0, "ut", 5.0, np.nan, "unknown"),       # row 1, col 2 (unscanned)
                   (500.0, 200.0, "ut", 5.0, np.nan, "unknown"),       # off the grid
                   (100.0, 200.0, "pit-gauge", np.nan, 0.8, "top")])   # row 0, col 0
    labels = np.zeros((4, 5), dtype=np.int32)
    labels[2, 3] = 7
    p = pair_readings(r, scan, indication_labels=labels)
    assert p["row"].tolist() == [2, 1, -1, 0]
    assert p["col"].tolist() == [3, 2, -1, 0]
    assert p["in_grid"].tolist() == [True, True, False, True]
    assert p["scanned"].tolist() == [True, False, False, True]
    assert p["t_scan_mm"].iloc[0] == pytest.approx(4.0)
    assert p["loss_scan_mm"].iloc[0] == pytest.approx(2.35)
    assert p["indication"].tolist() == [7, 0, 0, 0]
    assert "indication" not in pair_readings(r, scan).columns


def test_apply_readings_governs_at_its_cell():
    scan = _small_scan()
    r = _readings([(130.0, 220.0, "prove-up", 3.5, np.nan, "under"),
                   (130.0, 221.0, "ut", 3.9, np.nan, "unknown"),     # same cell, thicker
                   (120.0, 210.0, "ut", 5.2, np.nan, "top"),         # fills an unscanned cell
                   (500.0, 200.0, "ut", 5.0, np.nan, "unknown"),     # off the grid
                   (100.0, 200.0, "pit-gauge", np.nan, 0.8, "top"),
                   (101.0, 201.0, "pit-gauge", np.nan, 1.1, "top")])
    a = apply_readings(scan.thickness, pair_readings(r, scan))
    assert a.thickness[2, 3] == pytest.approx(3.5)   # the thinner of the two readings
    assert a.thickness[1, 2] == pytest.approx(5.2)
    assert a.thickness[0, 0] == pytest.approx(6.0)   # pit gauge leaves the thickness alone
    assert a.depth_top[0, 0] == pytest.approx(1.1)   # the deeper of two pit-gauge depths
    assert np.count_nonzero(np.isfinite(a.depth_top)) == 1
    assert a.proved.sum() == 2 and a.proved[2, 3] and a.proved[1, 2]
    assert a.side[2, 3] == 2 and a.side[1, 2] == 1 and a.side[0, 0] == 1 and a.side[3, 4] == -1
    assert a.n_applied == 5 and a.n_off_grid == 1
    assert np.isnan(scan.thickness[1, 2])  # the input is not modified


# --------------------------------------------------------------------------- sizing check
def test_sizing_check_hand_numbers():
    # hand computation: m = (1, 2, 3), u = 1.5 m exactly -> k = Σmu/Σm² = 21/14 = 1.5, SE 0;
    # bias = mean(m − u) = mean(−0.5, −1, −1.5) = −1.0; scatter = SD(−0.5, −1, −1.5) = 0.5
    t0 = 6.0
    pairs = pd.DataFrame({"kind": ["prove-up"] * 3 + ["ut"], "scanned": [True] * 4,
                          "t_scan_mm": [5.0, 4.0, 3.0, 5.0], "thickness_mm": [4.5, 3.0, 1.5, 1.0]})
    c = sizing_check(pairs, nominal_mm=t0)
    assert c.n_pairs == 3
    assert c.k == pytest.approx(1.5) and c.k_se == pytest.approx(0.0, abs=1e-12)
    assert c.bias_mm == pytest.approx(-1.0) and c.scatter_mm == pytest.approx(0.5)
    assert c.undersized
    few = sizing_check(pairs.iloc[:2], nominal_mm=t0)
    assert not few.undersized and "fewer than 3" in few.note
    none = sizing_check(pairs.iloc[3:], nominal_mm=t0)
    assert none.n_pairs == 0 and not none.undersized


def _sized_floor(factor, seed, *, n_pits=40, n_proved=15, noise=0.08):
    """Synthetic truth: a 2 m x 2 m floor with conical pits, scanned with loss × factor + noise.

    Returns (true thickness, scan thickness, scan, prove-up readings at the deepest cell of
    ``n_proved`` pits, the deepest pit left unproved).
    """
    rng = np.random.default_rng(seed)
    t0, pitch, n = 6.35, 10.0, 200
    yy, xx = np.mgrid[0:n, 0:n].astype(float)
    loss = np.zeros((n, n))
    centres = []
    while len(centres) < n_pits:
        c = rng.uniform(10, n - 10, 2)
        if all(np.hypot(*(c - q)) > 16 for q in centres):
            centres.append(c)
    depths = rng.uniform(1.5, 4.5, n_pits)
    for (cy, cx), d in zip(centres, depths):
        r = np.hypot(yy - round(cy), xx - round(cx))
        loss = np.maximum(loss, d * np.clip(1 - r / 5.0, 0, None))
    t_true = t0 - loss
    scan_loss = factor * loss + rng.normal(0, noise, loss.shape) * (loss > 0)
    t_scan = (t0 - np.maximum(scan_loss, 0)).astype(np.float32)
    scan = FloorScan(thickness=t_scan, x0=0.0, y0=0.0, pitch=pitch,
                     meta=ScanMeta(inspected=dt.date(2024, 5, 14), nominal=t0, method="MFL"))
    order = np.argsort(-depths)
    proved = order[1:n_proved + 1]  # the deepest pit is not proved up
    rows = []
    for k in proved:
        cy, cx = (round(v) for v in centres[k])
        ut = t_true[cy, cx] + rng.normal(0, 0.1)  # UT good to about ±0.1 mm (domain notes §2)
        rows.append((cx * pitch, cy * pitch, "prove-up", ut, np.nan, "unknown"))
    return t_true, t_scan, scan, _readings(rows)


def test_sizing_check_recovers_undersizing_factor():
    # synthetic truth: the scan reports 0.75 of the true loss, so UT/MFL loss = 1/0.75 = 1.333
    t_true, t_scan, scan, r = _sized_floor(0.75, seed=3)
    pairs = pair_readings(r, scan)
    c = sizing_check(pairs, nominal_mm=6.35)
    assert c.n_pairs == 15
    assert abs(c.k - 1 / 0.75) < 2 * c.k_se + 0.02   # within the fit's scatter
    assert c.k_se < 0.05
    assert c.undersized and c.bias_mm < -0.5
    applied = apply_readings(t_scan, pairs)
    corrected = correct_undersizing(applied.thickness, 6.35, c, proved_mask=applied.proved)
    # the thinnest true cell is the unproved deepest pit; the scan alone misses it by > 0.8 mm
    assert float(np.nanmin(t_scan)) - t_true.min() > 0.8
    assert abs(float(np.nanmin(corrected)) - t_true.min()) < 0.3
    # proved cells keep their readings; cells with no loss stay nominal
    assert np.array_equal(corrected[applied.proved], applied.thickness[applied.proved])
    assert corrected[0, 0] == pytest.approx(6.35)


def test_sizing_check_no_correction_when_sized_right_or_over():
    # synthetic truth: factor 1 (sized right) and 1.2 (over-sized): never thinned further
    for factor in (1.0, 1.2):
        _, t_scan, scan, r = _sized_floor(factor, seed=5)
        c = sizing_check(pair_readings(r, scan), nominal_mm=6.35)
        assert not c.undersized, factor
        out = correct_undersizing(t_scan, 6.35, c)
        assert np.array_equal(out, t_scan, equal_nan=True)
    # a bare ratio below 1 is ignored as well (loss is only ever increased)
    assert np.array_equal(correct_undersizing(t_scan, 6.35, 0.8), t_scan, equal_nan=True)


def test_correct_undersizing_by_hand():
    # hand computation: t0 = 6, k = 1.5: t = 4 (loss 2) -> 6 − 3 = 3; t = 1 (loss 5) -> 0 (clipped);
    # NaN stays NaN; a proved cell is left alone; nominal stays nominal
    t = np.array([[4.0, 1.0], [np.nan, 6.0]], dtype=np.float32)
    proved = np.array([[False, False], [False, True]])
    out = correct_undersizing(t, 6.0, 1.5, proved_mask=proved)
    assert out[0, 0] == pytest.approx(3.0) and out[0, 1] == 0.0
    assert np.isnan(out[1, 0]) and out[1, 1] == 6.0
    out2 = correct_undersizing(np.array([[4.0, 5.0]]), 6.0, 1.5, proved_mask=np.array([[True, False]]))
    assert out2.tolist() == [[4.0, 4.5]]
    assert isinstance(sizing_check(pd.DataFrame({"kind": [], "scanned": [], "t_scan_mm": [],
                                                 "thickness_mm": []}), nominal_mm=6.0), SizingCheck)


# --------------------------------------------------------------------------- zones from readings
def _zones(annular=None):
    geo = FloorGeometry(diameter_mm=8000.0, annular_width_mm=annular)
    return zone_map(GridSpec((81, 81), -4000.0, -4000.0, 100.0), geo, get_ruleset())


def test_reading_zones_by_radius():
    # radius about the centre: R = 4000 mm, critical within 75 mm of the shell (domain notes §1)
    r = _readings([(3990.0, 0.0, "ut", 5, np.nan, "unknown"),   # 10 mm from the shell
                   (0.0, -3930.0, "ut", 5, np.nan, "unknown"),  # 70 mm
                   (3900.0, 0.0, "ut", 5, np.nan, "unknown"),   # 100 mm
                   (0.0, 0.0, "ut", 5, np.nan, "unknown"),
                   (4100.0, 0.0, "ut", 5, np.nan, "unknown")])  # outside the floor
    assert reading_zones(r, _zones()).tolist() == ["critical", "critical", "interior", "interior", ""]
    assert reading_zones(r, _zones(annular=500.0)).tolist() == [
        "critical", "critical", "annular", "interior", ""]


def test_chime_zone_from_hand_ut_matches_hand_computation():
    # Synthetic truth: a critical zone corroded at the chime, read by hand UT at 12 spots
    # (r = 3960 mm, 40 mm from the shell) at two outages ten years apart.
    t0, mrt = 6.35, 3.175   # critical-zone minimum: half of t0 (domain notes §1), above 2.54
    installed, old_d, new_d = dt.date(2001, 5, 1), dt.date(2016, 5, 1), dt.date(2026, 5, 1)
    ang = np.radians(np.arange(12) * 30.0)
    x, y = 3960.0 * np.cos(ang), 3960.0 * np.sin(ang)
    t_new = np.array([5.9, 5.6, 4.8, 4.1, 5.2, 6.0, 5.8, 5.5, 4.6, 5.9, 6.1, 5.0])
    t_old = np.array([6.0, 5.9, 5.6, 5.5, 5.6, 6.1, 6.0, 5.8, 5.0, 6.0, 6.2, 5.3])
    sides = ["unknown"] * 12
    sides[8] = sides[11] = "top"
    new = _readings([(x[i], y[i], "ut", t_new[i], np.nan, sides[i]) for i in range(12)], new_d)
    # the older crew marked the spots a few mm away from the newer crew's
    old = _readings([(x[i] + 6.0, y[i] - 8.0, "ut", t_old[i], np.nan, sides[i]) for i in range(12)], old_d)
    out = reading_zone_summary(new, old, zones=_zones(), nominal_mm=t0, installed=installed,
                               mrt_mm={"critical": mrt, "interior": 2.54})
    assert list(out.columns) == list(SUMMARY_COLUMNS)
    assert out["zone"].tolist() == ["critical"]
    row = out.iloc[0]

    # Independent computation, written out:
    age = (new_d - installed).days / 365.2425          # 25.0007 y
    dt_y = (new_d - old_d).days / 365.2425             # 10.0014 y
    rtbc = 4.1                                         # thinnest unknown-side spot (counts as under)
    rtip = 4.6                                         # thinnest top-side spot
    stpr = (t0 - rtip) / age                           # 0.0700 mm/y
    upr = (t0 - rtbc) / age                            # 0.0900 mm/y
    or_code = (min(rtbc, rtip) - mrt) / (stpr + upr)   # API 653 formula solved for Or: 5.78 y
    short = (t_old - t_new) / dt_y
    long_ = (t0 - t_new) / age
    rate = np.maximum(short, long_)
    life = np.min((t_new - mrt) / rate)                # spot 3: (4.1 − 3.175)/0.14 = 6.61 y

    assert row["n_readings"] == 12 and row["n_ut"] == 12 and row["n_spots_both_outages"] == 12
    assert row["t_min_mm"] == pytest.approx(4.1)
    assert row["x_t_min_mm"] == pytest.approx(x[3])
    assert row["rtbc_mm"] == pytest.approx(rtbc) and row["rtip_mm"] == pytest.approx(rtip)
    assert row["stpr_mm_y"] == pytest.approx(stpr) and row["upr_mm_y"] == pytest.approx(upr)
    assert row["interval_code_y"] == pytest.approx(or_code, rel=1e-9)
    assert row["interval_code_y"] == pytest.approx(5.78, abs=0.01)
    assert row["rate_short_max_mm_y"] == pytest.approx(short.max())
    assert row["rate_max_mm_y"] == pytest.approx(rate.max())
    assert row["life_local_y"] == pytest.approx(life, rel=1e-9)
    assert row["life_local_y"] == pytest.approx(6.61, abs=0.01)
    assert row["covered_length_mm"] == pytest.approx(120.0)  # 12 spots × 10 mm probe: points only
    assert row["flags"].split(";") == ["points-only"]

    # one outage only: long-term rates, flagged
    one = reading_zone_summary(new, None, zones=_zones(), nominal_mm=t0, installed=installed,
                               mrt_mm=mrt).iloc[0]
    assert "no-short-term-rates" in one["flags"].split(";")
    assert one["life_local_y"] == pytest.approx(np.min((t_new - mrt) / long_))
    assert one["interval_code_y"] == pytest.approx(or_code, rel=1e-9)


def test_readings_only_zone_is_held_by_the_unseen_floor_between_the_spots():
    # A zone with no scanned cell and spot readings: the readings give the code interval
    # (9.0 y) and the co-located life (7.2 y); the floor between the spots is judged with
    # the whole floor's extreme-value law (a HiddenPart, here a life of 3.4 y), and the
    # least of the three, rounded down to 0.5 y, is recommended (hand arithmetic).
    from scananalyse.evlife import HiddenPart
    from scananalyse.readings import add_reading_zones
    from scananalyse.rules import get_ruleset

    table = pd.DataFrame({"zone": ["critical"], "flags": ["no-data"], "notes": ["zone not scanned"],
                          "cap_y": [20.0], "t_min_mm": [np.nan], "interval_code_y": [np.nan],
                          "life_local_y": [np.nan], "interval_recommended_y": [np.nan], "limiting": [""],
                          "next_due": [""], "life_eva_y": [np.nan], "depth_hidden_p50_mm": [np.nan],
                          "depth_hidden_p95_mm": [np.nan], "hidden_area_m2": [np.nan], "eva_source": [np.nan]})
    summary = pd.DataFrame({"zone": ["critical"], "n_readings": [12], "t_min_mm": [4.1],
                            "interval_code_y": [9.0], "life_local_y": [7.2], "rtbc_mm": [4.1], "rtip_mm": [6.35],
                            "stpr_mm_y": [0.0], "upr_mm_y": [0.09], "flags": ["points-only"], "notes": ["points"]})
    kw = dict(rules=get_ruleset(), inspected=dt.date(2026, 5, 1))
    h = HiddenPart(area_mm2=1.8e6, T=30.0, life_y=3.4, depth_p50_mm=1.9, depth_p95_mm=2.6, source="floor")
    got = add_reading_zones(table, summary, hidden={"critical": h}, **kw).iloc[0]
    assert got["interval_recommended_y"] == 3.0 and got["limiting"] == "eva"
    assert got["next_due"] == "2029-05-01"
    assert got["life_eva_y"] == 3.4 and got["hidden_area_m2"] == pytest.approx(1.8)
    assert got["eva_source"] == "floor"
    assert got["flags"].split(";") == ["readings-only", "points-only", "eva-borrowed"]
    # the unseen floor already past MRT: 0 and said so
    h0 = HiddenPart(area_mm2=1.8e6, T=30.0, life_y=0.0, depth_p50_mm=3.0, depth_p95_mm=4.5, source="floor")
    got0 = add_reading_zones(table, summary, hidden={"critical": h0}, **kw).iloc[0]
    assert got0["interval_recommended_y"] == 0.0 and "eva-below-mrt" in got0["flags"].split(";")
    # without the floor's law the row says it has no extreme-value life
    bare = add_reading_zones(table, summary, **kw).iloc[0]
    assert bare["interval_recommended_y"] == 7.0 and bare["limiting"] == "local"
    assert "no-eva" in bare["flags"].split(";")


def test_reading_spots_pit_gauge_and_tolerance():
    # hand computation: pit gauge depth 1.35 -> t = 6.35 − 1.35 = 5.0; the older depth 0.85 at the
    # same spot gives (5.5 − 5.0)/Δt; a UT reading 30 mm from the older one is not the same spot
    new = _readings([(0.0, 0.0, "pit-gauge", np.nan, 1.35, "top"),
                     (500.0, 0.0, "ut", 5.0, np.nan, "unknown")], dt.date(2026, 5, 1))
    old = _readings([(3.0, 4.0, "pit-gauge", np.nan, 0.85, "top"),
                     (530.0, 0.0, "ut", 5.5, np.nan, "unknown")], dt.date(2021, 5, 1))
    s = reading_spots(new, old, nominal_mm=6.35, installed=None)
    dt_y = (dt.date(2026, 5, 1) - dt.date(2021, 5, 1)).days / 365.2425
    assert s["t_mm"].tolist() == pytest.approx([5.0, 5.0])
    assert s["match_mm"].iloc[0] == pytest.approx(5.0)
    assert s["rate_short_mm_y"].iloc[0] == pytest.approx(0.5 / dt_y)
    assert np.isnan(s["rate_short_mm_y"].iloc[1]) and np.isnan(s["rate_long_mm_y"]).all()
    with pytest.raises(InputError, match="not before"):
        reading_spots(old, new, nominal_mm=6.35)


# --------------------------------------------------------------------------- prove-up list
def test_prove_up_candidates():
    # hand-made indication list; A is proved by a reading inside its box
    ind = pd.DataFrame({
        "id": [1, 2, 3, 4, 5, 6],
        "x_mm": [0.0, 100.0, 200.0, 300.0, 400.0, 500.0], "y_mm": [0.0] * 6,
        "x_min_mm": [-10.0, 90.0, 190.0, 290.0, 390.0, 490.0],
        "x_max_mm": [10.0, 110.0, 210.0, 310.0, 410.0, 510.0],
        "y_min_mm": [-10.0] * 6, "y_max_mm": [10.0] * 6,
        "depth_max_mm": [4.0, 3.5, 1.2, 3.0, 1.5, 1.0],
        "t_min_mm": [2.35, 2.85, 5.15, 3.35, 4.85, 5.35],
        "status": ["grown", "stable", "new", "stable", "partly unscanned", "stable"],
    })
    pairs = pd.DataFrame({"x_mm": [5.0, 300.0], "y_mm": [3.0, 40.0], "kind": ["prove-up", "pit-gauge"]})
    out = prove_up_candidates(ind, pairs, n=2)
    # unproved: 2..6; the two deepest are 2 and 4; 3 (new) and 5 (partly unscanned) join; 6 does not
    assert out["id"].tolist() == [2, 4, 5, 3]
    assert out["rank"].tolist() == [1, 2, 3, 4]
    assert out["reason"].tolist() == ["deepest unproved", "deepest unproved", "partly unscanned", "new"]
    # without readings the deepest is listed first
    assert prove_up_candidates(ind, None, n=1)["id"].tolist()[0] == 1
    # proved by label when the pairs carry one
    lab = pd.DataFrame({"x_mm": [9999.0], "y_mm": [0.0], "kind": ["prove-up"], "indication": [2]})
    assert 2 not in prove_up_candidates(ind, lab, n=6)["id"].tolist()


def test_zone_summary_without_age_or_mrt():
    # one reading in the interior: no installed date -> no code interval; a zone missing from the
    # MRT mapping -> no code interval either, each flagged
    r = _readings([(0.0, 0.0, "ut", 5.0, np.nan, "unknown")], dt.date(2026, 5, 1))
    a = reading_zone_summary(r, None, zones=_zones(), nominal_mm=6.35, installed=None,
                             mrt_mm=2.54).iloc[0]
    assert a["zone"] == "interior" and math.isnan(a["interval_code_y"]) and "no-age" in a["flags"]
    assert math.isnan(a["life_local_y"])
    b = reading_zone_summary(r, None, zones=_zones(), nominal_mm=6.35, installed=dt.date(2001, 5, 1),
                             mrt_mm={"critical": 3.175}).iloc[0]
    assert math.isnan(b["interval_code_y"]) and "no-mrt" in b["flags"]
    # hand computation: long-term rate (6.35 − 5.0)/25.0007 y = 0.054 mm/y
    assert b["rate_long_max_mm_y"] == pytest.approx(1.35 / ((dt.date(2026, 5, 1) - dt.date(2001, 5, 1)).days
                                                           / 365.2425))
