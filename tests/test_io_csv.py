"""Floor-scan CSV v1: round trips, unit conversion, layers, metadata, safe writing.

Ground truth is synthetic: scans built here with known values, written and read
back; the unit definitions are checked against the published ones.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import os
import tempfile

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from scananalyse import scan as scanmod
from scananalyse.io import read_csv_scan, read_h5_scan, read_scan, write_csv_scan, write_h5_scan, write_scan
from scananalyse.scan import FloorScan, ScanMeta


def sha(path) -> str:
    with open(path, "rb") as fh:
        return hashlib.sha256(fh.read()).hexdigest()


def make_scan(units="mm", *, layers=True, seed=0, rows=5, cols=7, extra=None) -> FloorScan:
    """A small invented scan with unscanned cells, including a whole unscanned border row and column."""
    rng = np.random.default_rng(seed)
    if units == "mm":
        pitch, x0, y0, nominal, thr, sig = 10.0, -30.0, 20.0, 6.35, 1.0, 0.15
    else:  # values as a reader of an inch file produces them: inches x 25.4
        pitch, x0, y0 = 0.4 * 25.4, -1.2 * 25.4, 0.8 * 25.4
        nominal, thr, sig = 0.25 * 25.4, 0.04 * 25.4, 0.006 * 25.4
    t = rng.uniform(2.0, nominal, (rows, cols)).astype(np.float32)
    t[rng.random((rows, cols)) < 0.2] = np.nan
    t[0, :] = np.nan
    t[:, -1] = np.nan
    t[2, 2] = 4.2
    meta = ScanMeta(inspected=dt.date(2024, 5, 14), nominal=nominal, units=units, tank="TK-07",
                    method="MFL", threshold=thr, sigma=sig, installed=dt.date(1996, 3, 1),
                    extra=dict(extra or {"operator": "invented crew B", "probe": "P-3"}))
    side = rng.integers(0, 3, (rows, cols)).astype(np.int8) if layers else None
    plate = rng.integers(-1, 12, (rows, cols)).astype(np.int32) if layers else None
    return FloorScan(t, x0=x0, y0=y0, pitch=pitch, meta=meta, side=side, plate=plate)


def assert_same_scan(a: FloorScan, b: FloorScan, *, layers_on_scanned_only=True):
    """Identical grid (float32 bits), geometry, metadata and layers on scanned cells."""
    assert a.shape == b.shape
    assert (a.x0, a.y0, a.pitch) == (b.x0, b.y0, b.pitch)
    assert a.meta == b.meta
    np.testing.assert_array_equal(np.isnan(a.thickness), np.isnan(b.thickness))
    m = a.scanned
    np.testing.assert_array_equal(a.thickness[m].view(np.uint32), b.thickness[m].view(np.uint32))
    for name in ("side", "plate"):
        la, lb = getattr(a, name), getattr(b, name)
        assert (la is None) == (lb is None)
        if la is not None:
            np.testing.assert_array_equal(la[m], lb[m])


@pytest.mark.parametrize("units", ["mm", "in"])
@pytest.mark.parametrize("layers", [True, False])
def test_csv_h5_csv_round_trip_identical(tmp_path, units, layers):
    # CSV -> HDF5 -> CSV: same scan bit for bit, and the two CSV files byte-identical.
    original = make_scan(units, layers=layers)
    c1, h, c2 = tmp_path / "a.csv", tmp_path / "b.h5", tmp_path / "c.csv"
    write_scan(original, c1)
    s1 = read_scan(c1)
    assert_same_scan(original, s1)
    write_scan(s1, h)
    s2 = read_scan(h)
    assert_same_scan(s1, s2)
    write_scan(s2, c2)
    assert c1.read_bytes() == c2.read_bytes()
    assert_same_scan(s1, read_scan(c2))


def test_unscanned_border_survives(tmp_path):
    # Row 0 and the last column are all NaN; the grid keys keep them.
    s = make_scan()
    write_csv_scan(s, tmp_path / "a.csv")
    back = read_csv_scan(tmp_path / "a.csv")
    assert back.shape == s.shape and np.isnan(back.thickness[0]).all() and np.isnan(back.thickness[:, -1]).all()


def test_layers_off_scanned_cells_become_defaults(tmp_path):
    # A cell with no row has no side or plate: unknown (0) and none (-1) after reading.
    s = make_scan()
    write_csv_scan(s, tmp_path / "a.csv")
    back = read_csv_scan(tmp_path / "a.csv")
    assert (back.side[~s.scanned] == scanmod.SIDE_UNKNOWN).all()
    assert (back.plate[~s.scanned] == scanmod.PLATE_NONE).all()


def test_extra_keys_kept(tmp_path):
    s = make_scan(extra={"operator": "invented crew B", "weather": "dry, 18 C"})
    write_scan(s, tmp_path / "a.csv")
    text = (tmp_path / "a.csv").read_text()
    assert "# weather: dry, 18 C\n" in text
    assert read_scan(tmp_path / "a.csv").meta.extra == {"operator": "invented crew B", "weather": "dry, 18 C"}


def test_unit_constants_match_published_definitions():
    # 1 in = 25.4 mm exactly: international yard and pound agreement, 1959 (NIST SP 811, from memory).
    assert scanmod.MM_PER_IN == 25.4
    # 1 mil = 0.001 in = 0.0254 mm; 1 mpy = 1 mil per year = 0.0254 mm/y
    # (corrosion reference pages; NIST SP 811 conversion tables, from memory).
    assert scanmod.MM_PER_MIL == pytest.approx(0.001 * 25.4, rel=1e-15) and scanmod.MM_PER_MIL == 0.0254
    assert scanmod.MM_Y_PER_MPY == 0.0254
    # 10 mpy over 20 years is 200 mil = 5.08 mm (domain.md rule of thumb, derived: 200/20).
    assert scanmod.to_display(5.08, "in") * 1000 == pytest.approx(200.0, rel=1e-12)
    assert scanmod.to_display(10 * 0.0254, "in", rate=True) == pytest.approx(10.0, rel=1e-12)


def test_inch_file_converted_on_load(tmp_path):
    # Hand-written inch file; expected mm values from 1 in = 25.4 mm exactly (1959 agreement).
    path = tmp_path / "inch.csv"
    path.write_text("\n".join([
        "# format: scananalyse-scan 1", "# inspected: 2023-09-01", "# units: in", "# pitch: 0.5",
        "# nominal: 0.25", "# threshold: 0.04", "# sigma: 0.005", "x,y,thickness",
        "-1.0,2.0,0.25", "-0.5,2.0,0.2", "-1.0,2.5,0.175", "-0.5,2.5,0.1",
    ]) + "\n")
    s = read_scan(path)
    assert s.meta.units == "in"
    assert s.pitch == pytest.approx(12.7, rel=1e-15) and s.meta.nominal == pytest.approx(6.35, rel=1e-15)
    assert s.meta.threshold == pytest.approx(1.016, rel=1e-15) and s.meta.sigma == pytest.approx(0.127, rel=1e-15)
    assert (s.x0, s.y0) == (pytest.approx(-25.4, rel=1e-15), pytest.approx(50.8, rel=1e-15))
    expected = np.array([[0.25, 0.2], [0.175, 0.1]]) * 25.4
    np.testing.assert_array_equal(s.thickness, expected.astype(np.float32))
    # Written back in inches with the same short values.
    write_scan(s, tmp_path / "back.csv")
    text = (tmp_path / "back.csv").read_text()
    assert "# pitch: 0.5\n" in text and "# nominal: 0.25\n" in text and "# threshold: 0.04\n" in text
    assert "-1.0,2.5,0.175\n" in text and "-0.5,2.5,0.1\n" in text


def test_mm_file_values_as_written(tmp_path):
    path = tmp_path / "mm.csv"
    path.write_text("# format: scananalyse-scan 1\n# inspected: 2023-09-01\n# units: mm\n# pitch: 12.5\n"
                    "# nominal: 8\nx,y,thickness\n100,-50,7.91\n125,-50,6.02\n100,-25,8\n")
    s = read_csv_scan(path)
    # x 100, 125 -> columns 0, 2; y -50, -25 -> rows 0, 2 (pitch 12.5): a 3 x 3 grid.
    assert (s.x0, s.y0, s.pitch, s.shape) == (100.0, -50.0, 12.5, (3, 3))
    nan = np.nan
    np.testing.assert_array_equal(s.thickness, np.array([[7.91, nan, 6.02], [nan, nan, nan], [8, nan, nan]],
                                                        np.float32))
    assert s.side is None and s.plate is None and s.source == str(path)
    assert s.meta.threshold is None and s.meta.installed is None and s.meta.tank == ""


def test_rows_in_any_order(tmp_path):
    a = make_scan(seed=4)
    write_csv_scan(a, tmp_path / "a.csv")
    text = (tmp_path / "a.csv").read_text().splitlines()
    head = [i for i, ln in enumerate(text) if ln.startswith("x,")][0]
    body = text[head + 1:]
    np.random.default_rng(1).shuffle(body)
    (tmp_path / "b.csv").write_text("\n".join(text[:head + 1] + body) + "\n")
    assert_same_scan(a, read_csv_scan(tmp_path / "b.csv"))


def test_reading_leaves_input_unchanged(tmp_path):
    s = make_scan()
    for name in ("a.csv", "a.h5"):
        write_scan(s, tmp_path / name)
        before = sha(tmp_path / name), os.stat(tmp_path / name).st_mtime_ns
        read_scan(tmp_path / name)
        assert (sha(tmp_path / name), os.stat(tmp_path / name).st_mtime_ns) == before


def test_write_is_atomic(tmp_path, monkeypatch):
    # A failure while writing leaves the old file intact and no temporary file behind.
    target = tmp_path / "scan.csv"
    target.write_text("old content\n")

    def boom(*args, **kwargs):
        raise RuntimeError("disk full (simulated)")

    monkeypatch.setattr(pd.DataFrame, "to_csv", boom)
    with pytest.raises(RuntimeError, match="simulated"):
        write_csv_scan(make_scan(), target)
    assert target.read_text() == "old content\n"
    assert sorted(os.listdir(tmp_path)) == ["scan.csv"]
    monkeypatch.undo()
    write_csv_scan(make_scan(), target)
    assert sorted(os.listdir(tmp_path)) == ["scan.csv"] and target.read_text().startswith("# format:")


# ---------------------------------------------------------------- property test
@st.composite
def small_scans(draw):
    rows = draw(st.integers(1, 6))
    cols = draw(st.integers(1, 6))
    units = draw(st.sampled_from(["mm", "in"]))
    factor = 25.4 if units == "in" else 1.0
    # Geometry in file units, converted the way a reader converts it.
    pitch = draw(st.floats(0.05, 50.0, allow_nan=False)) * factor
    x0 = draw(st.floats(-1e4, 1e4, allow_nan=False)) * factor
    y0 = draw(st.floats(-1e4, 1e4, allow_nan=False)) * factor
    nominal = 6.35
    vals = draw(st.lists(st.floats(0.0625, 19.0, width=32), min_size=rows * cols, max_size=rows * cols))
    t = np.array(vals, dtype=np.float32).reshape(rows, cols)
    mask = np.array(draw(st.lists(st.booleans(), min_size=rows * cols, max_size=rows * cols))).reshape(rows, cols)
    mask.flat[draw(st.integers(0, rows * cols - 1))] = True
    t[~mask] = np.nan
    layers = draw(st.booleans())
    side = np.array(draw(st.lists(st.integers(0, 2), min_size=rows * cols, max_size=rows * cols)),
                    dtype=np.int8).reshape(rows, cols) if layers else None
    plate = np.array(draw(st.lists(st.integers(-1, 10**6), min_size=rows * cols, max_size=rows * cols)),
                     dtype=np.int32).reshape(rows, cols) if layers else None
    meta = ScanMeta(inspected=dt.date(2020, 1, 31), nominal=nominal, units=units,
                    tank=draw(st.sampled_from(["", "TK-1", "Tank 9 / east"])),
                    threshold=draw(st.none() | st.floats(0, 3)) , sigma=None,
                    # header values: runs of spaces are written as one (docs/formats.md), so none are drawn
                    extra=draw(st.dictionaries(st.sampled_from(["crew", "probe_id", "note"]),
                                               st.from_regex(r"[A-Za-z0-9]+([ ,.;-][A-Za-z0-9]+){0,5}",
                                                             fullmatch=True), max_size=2)))
    if meta.threshold is not None:
        meta = meta.replace(threshold=meta.threshold * factor)
    return FloorScan(t, x0=x0, y0=y0, pitch=pitch, meta=meta, side=side, plate=plate)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(small_scans())
def test_property_random_grids_round_trip(scan):
    # Synthetic ground truth: whatever valid grid goes in comes back out of both formats.
    with tempfile.TemporaryDirectory() as tmp:
        c, h = os.path.join(tmp, "s.csv"), os.path.join(tmp, "s.h5")
        write_csv_scan(scan, c)
        from_csv = read_csv_scan(c)
        assert_same_scan(scan, from_csv)
        write_h5_scan(from_csv, h)
        assert_same_scan(scan, read_h5_scan(h))
        write_h5_scan(scan, h)
        assert_same_scan(scan, read_h5_scan(h))


def test_docs_examples_read_to_the_same_scan(tmp_path):
    # docs/formats.md shows one 3 x 3 floor in both formats; both must read to the same scan.
    import pathlib
    import re

    doc = (pathlib.Path(__file__).resolve().parents[1] / "docs" / "formats.md").read_text()
    csv_text = re.findall(r"```\n(# format.*?)```", doc, re.S)[0]
    h5_code = re.findall(r"```python\n(import h5py.*?)```", doc, re.S)[0]
    (tmp_path / "doc.csv").write_text(csv_text)
    cwd = os.getcwd()
    try:
        os.chdir(tmp_path)
        exec(compile(h5_code, "formats.md", "exec"), {})
    finally:
        os.chdir(cwd)
    a, b = read_scan(tmp_path / "doc.csv"), read_scan(tmp_path / "TK-07_2024.h5")
    assert a.shape == (3, 3) and (a.x0, a.y0, a.pitch) == (-10.0, -10.0, 10.0)
    assert np.isnan(a.thickness[1, 1]) and a.n_scanned == 8  # the centre cell has no row
    assert_same_scan(a, b)
    np.testing.assert_array_equal(a.side, b.side)
    np.testing.assert_array_equal(a.plate, b.plate)


# ------------------------------------------- fast placement and the checked path
# The reader puts a good table on the grid in one blocked pass (csvscan._place_fast)
# and only goes through the checks one by one (csvscan._place_checked) when a block
# fails; both must give the same scan, and errors in any block must name their line.
from scananalyse.errors import InputError  # noqa: E402
from scananalyse.io import csvscan  # noqa: E402


def big_table(tmp_path, units="mm", *, layers=True, name="big.csv", grid_keys=True):
    """A scan spanning several blocks of the fast pass (written, so the file is valid), and its lines."""
    s = make_scan(units, layers=layers, seed=11, rows=330, cols=260)
    assert s.n_scanned > 2 * csvscan._BLOCK_ROWS + 1000  # two blocks and part of a third
    path = tmp_path / name
    write_csv_scan(s, path)
    lines = path.read_text().splitlines()
    if not grid_keys:
        lines = [ln for ln in lines if not ln.startswith(("# x0:", "# y0:", "# rows:", "# cols:"))]
        path.write_text("\n".join(lines) + "\n")
    return s, path, lines


def count_checked(monkeypatch) -> list:
    """Record each use of the checked path; the list grows by one per use."""
    calls = []
    checked = csvscan._place_checked

    def spy(*args, **kwargs):
        calls.append(1)
        return checked(*args, **kwargs)

    monkeypatch.setattr(csvscan, "_place_checked", spy)
    return calls


def read_checked(path, monkeypatch):
    """Read with the blocked pass switched off: every table goes through the checks one by one."""
    with monkeypatch.context() as m:
        m.setattr(csvscan, "_place_fast", lambda *args, **kwargs: None)
        return read_csv_scan(path)


@pytest.mark.parametrize("units", ["mm", "in"])
@pytest.mark.parametrize("layers", [True, False])
def test_fast_and_checked_placement_agree(tmp_path, monkeypatch, units, layers):
    # Synthetic ground truth: the scan written is the scan read, by either path, bit for bit.
    s, path, _ = big_table(tmp_path, units, layers=layers)
    calls = count_checked(monkeypatch)
    fast = read_csv_scan(path)
    assert calls == []  # a good table: the blocked pass alone
    checked = read_checked(path, monkeypatch)
    assert calls == [1]
    assert_same_scan(s, fast)
    assert_same_scan(s, checked)
    np.testing.assert_array_equal(fast.thickness.view(np.uint32), checked.thickness.view(np.uint32))
    for name in ("side", "plate"):
        a, b = getattr(fast, name), getattr(checked, name)
        assert (a is None) == (b is None) == (not layers)
        if a is not None:
            assert a.dtype == b.dtype and np.array_equal(a, b)


@pytest.mark.parametrize("units", ["mm", "in"])
def test_fast_and_checked_placement_agree_without_grid_keys(tmp_path, monkeypatch, units):
    # Without x0, y0, rows, cols the grid spans the scanned cells: the written scan less its
    # unscanned first row and last column (make_scan leaves those empty; synthetic ground truth).
    s, path, _ = big_table(tmp_path, units, grid_keys=False)
    fast, checked = read_csv_scan(path), read_checked(path, monkeypatch)
    assert fast.shape == checked.shape == (s.shape[0] - 1, s.shape[1] - 1)
    assert (fast.x0, fast.y0, fast.pitch) == (checked.x0, checked.y0, checked.pitch)
    assert fast.y0 == pytest.approx(s.y0 + s.pitch, rel=1e-12) and fast.x0 == pytest.approx(s.x0, rel=1e-12)
    np.testing.assert_array_equal(fast.thickness.view(np.uint32), s.thickness[1:, :-1].view(np.uint32))
    np.testing.assert_array_equal(fast.thickness.view(np.uint32), checked.thickness.view(np.uint32))
    m = s.scanned[1:, :-1]
    np.testing.assert_array_equal(fast.side[m], s.side[1:, :-1][m])
    np.testing.assert_array_equal(fast.plate, checked.plate)


def data_line_after_block(lines, header_row, block=1):
    """0-based index in ``lines`` of a data row inside the given block of the fast pass."""
    return header_row + 1 + block * csvscan._BLOCK_ROWS + 123


def test_side_spelling_in_a_later_block(tmp_path, monkeypatch):
    # " Top " and "UNDER" are accepted labels (formats.md); written in the second block they
    # make the fast pass give up, and the result must still be the scan with those cells set.
    s, path, lines = big_table(tmp_path)
    head = lines.index("x,y,thickness,side,plate")
    k = data_line_after_block(lines, head)
    expect_side = s.side.copy()
    for offset, label, code in ((0, " Top ", scanmod.SIDE_TOP), (1, "UNDER", scanmod.SIDE_UNDER)):
        fields = lines[k + offset].split(",")
        fields[3] = label
        lines[k + offset] = ",".join(fields)
        x, y = float(fields[0]), float(fields[1])
        expect_side[int(round((y - s.y0) / s.pitch)), int(round((x - s.x0) / s.pitch))] = code
    path.write_text("\n".join(lines) + "\n")
    calls = count_checked(monkeypatch)
    back = read_csv_scan(path)
    assert calls == [1]
    np.testing.assert_array_equal(back.side[s.scanned], expect_side[s.scanned])
    np.testing.assert_array_equal(back.thickness.view(np.uint32), s.thickness.view(np.uint32))


@pytest.mark.parametrize("column,value,message", [
    (2, "0", r"field 'thickness': thickness 0\.0 is not positive"),
    (2, "inf", r"field 'thickness': thickness inf is not finite"),
    (0, "inf", r"field 'x': 'inf' is not finite"),
    (1, "1e400", r"field 'y': '1e400' is not finite"),
    (0, "3.5", r"field 'x': 3\.5 is off the grid"),
    (3, "sideways", r"field 'side': 'sideways' is not a side"),
    (4, "2.5", r"field 'plate': 2\.5 is not a plate id"),
    (4, "-3", r"field 'plate': -3\.0 is not a plate id"),
])
def test_error_in_a_later_block_names_its_line(tmp_path, column, value, message):
    # One bad cell in the third block: the one-line error names that file line (1-based).
    s, path, lines = big_table(tmp_path)
    head = lines.index("x,y,thickness,side,plate")
    k = data_line_after_block(lines, head, block=2)
    fields = lines[k].split(",")
    fields[column] = value
    lines[k] = ",".join(fields)
    path.write_text("\n".join(lines) + "\n")
    with pytest.raises(InputError, match=rf"big\.csv:{k + 1}: {message}"):
        read_csv_scan(path)


def test_duplicate_cell_across_blocks(tmp_path):
    # The first row repeated at the end: the later line is named, with the first one.
    s, path, lines = big_table(tmp_path)
    head = lines.index("x,y,thickness,side,plate")
    lines.append(lines[head + 1])
    path.write_text("\n".join(lines) + "\n")
    x, y = lines[head + 1].split(",")[:2]
    with pytest.raises(InputError, match=rf"big\.csv:{len(lines)}: duplicate cell \({x}, {y}\), "
                                         rf"already given on line {head + 2}"):
        read_csv_scan(path)


def test_text_not_utf8_in_side_named_before_later_errors(tmp_path):
    # A side cell that is not UTF-8 makes the table unreadable: it is named first, even
    # though a later line also has a bad thickness (the earliest problem wins).
    path = tmp_path / "u8.csv"
    path.write_bytes(b"# format: scananalyse-scan 1\n# inspected: 2024-01-01\n# units: mm\n# pitch: 10\n"
                     b"# nominal: 6\nx,y,thickness,side,plate\n0,0,5,top,1\n10,0,5,t\xffp,1\n"
                     b"0,10,-5,top,1\n")
    with pytest.raises(InputError, match=r"u8\.csv:8: not UTF-8 text"):
        read_csv_scan(path)


def test_infinite_coordinates_raise_no_numpy_warning(tmp_path):
    # inf - inf inside the fast pass must not surface as a RuntimeWarning (only the InputError).
    import warnings

    path = tmp_path / "inf.csv"
    path.write_text("# format: scananalyse-scan 1\n# inspected: 2024-01-01\n# units: mm\n# pitch: 10\n"
                    "# nominal: 6\nx,y,thickness\n0,0,5\ninf,0,5\n0,-inf,5\n")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with pytest.raises(InputError, match=r"inf\.csv:8: field 'x': 'inf' is not finite"):
            read_csv_scan(path)
