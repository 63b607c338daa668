"""Every validation error of the floor-scan CSV v1 reader (docs/formats.md, "Validation").

Each bad file is the small valid file below with one change; the test checks the
error is an InputError whose single-line message names the file and the line
(and the field where there is one).  The rules are the project's own format
contract (design 3.1), so the expected locations are derived from the file
text, not from the implementation.
"""

from __future__ import annotations

import hashlib
import os
import re

import numpy as np
import pytest

from scananalyse.errors import InputError, ScanWarning
from scananalyse.io import read_csv_scan, read_scan
from scananalyse.io import validate as v

BASE = [
    "# format: scananalyse-scan 1",  # 1
    "# tank: TK-07",  # 2
    "# inspected: 2024-05-14",  # 3
    "# method: MFL",  # 4
    "# units: mm",  # 5
    "# pitch: 10",  # 6
    "# nominal: 6.35",  # 7
    "# threshold: 1.0",  # 8
    "# sigma: 0.15",  # 9
    "# installed: 1996-03-01",  # 10
    "x,y,thickness,side,plate",  # 11
    "0,0,6.2,top,1",  # 12
    "10,0,6.1,under,1",  # 13
    "0,10,5.9,,2",  # 14
    "10,10,6.0,unknown,",  # 15
]


def write(tmp_path, lines, name="scan.csv") -> str:
    path = tmp_path / name
    data = lines if isinstance(lines, bytes) else ("\n".join(lines) + "\n").encode("utf-8")
    path.write_bytes(data)
    return str(path)


def changed(**edits) -> list[str]:
    """BASE with lines replaced (``l12="..."``) or removed (``l12=None``)."""
    out = []
    for k, line in enumerate(BASE, start=1):
        key = f"l{k}"
        if key in edits:
            if edits[key] is not None:
                out.append(edits[key])
        else:
            out.append(line)
    return out


def sha(path) -> str:
    with open(path, "rb") as fh:
        return hashlib.sha256(fh.read()).hexdigest()


def expect_error(path, pattern: str):
    """Read ``path``, expect an InputError naming the file first and matching ``pattern``."""
    before = sha(path)
    with pytest.raises(InputError, match=re.escape(path) + pattern) as info:
        read_csv_scan(path)
    msg = str(info.value)
    assert "\n" not in msg and msg.startswith(path)
    assert sha(path) == before  # inputs are never modified, not even on failure
    return msg


def test_base_file_is_valid(tmp_path):
    # Ground truth from the file text: 2 x 2 cells at 10 mm, the values as written.
    path = write(tmp_path, BASE)
    scan = read_csv_scan(path)
    assert scan.shape == (2, 2) and scan.pitch == 10.0 and (scan.x0, scan.y0) == (0.0, 0.0)
    np.testing.assert_array_equal(scan.thickness, np.array([[6.2, 6.1], [5.9, 6.0]], np.float32))
    np.testing.assert_array_equal(scan.side, [[1, 2], [0, 0]])  # top, under, empty, unknown
    np.testing.assert_array_equal(scan.plate, [[1, 1], [2, -1]])
    assert scan.meta.tank == "TK-07" and scan.meta.threshold == 1.0 and scan.meta.sigma == 0.15


# ---------------------------------------------------------------- header keys
def test_missing_format_line(tmp_path):
    expect_error(write(tmp_path, changed(l1=None)), r": field 'format': missing")


@pytest.mark.parametrize("value, what", [("other-scan 1", "not the floor-scan format"),
                                         ("scananalyse-scan 2", "unsupported version"),
                                         ("scananalyse-scan", "unsupported version")])
def test_wrong_format_or_version(tmp_path, value, what):
    expect_error(write(tmp_path, changed(l1=f"# format: {value}")), rf":1: field 'format': .*{what}")


@pytest.mark.parametrize("line, key", [(3, "inspected"), (5, "units"), (6, "pitch"), (7, "nominal")])
def test_missing_required_key(tmp_path, line, key):
    expect_error(write(tmp_path, changed(**{f"l{line}": None})), rf": field '{key}': required header key missing")


def test_required_key_without_value(tmp_path):
    expect_error(write(tmp_path, changed(l6="# pitch:")), r":6: field 'pitch': required header key has no value")


@pytest.mark.parametrize("line, key, value", [(3, "inspected", "14/05/2024"), (3, "inspected", "2024-02-30"),
                                              (3, "inspected", "20240514"), (10, "installed", "March 1996")])
def test_bad_iso_date(tmp_path, line, key, value):
    # ISO 8601 calendar dates YYYY-MM-DD (design 3.1); 30 February does not exist.
    expect_error(write(tmp_path, changed(**{f"l{line}": f"# {key}: {value}"})), rf":{line}: field '{key}': ")


def test_unknown_units(tmp_path):
    expect_error(write(tmp_path, changed(l5="# units: cm")), r":5: field 'units': unknown units 'cm'")


@pytest.mark.parametrize("line, key", [(6, "pitch"), (7, "nominal")])
@pytest.mark.parametrize("value, what", [("ten", "not a number"), ("0", "must be positive"),
                                         ("-10", "must be positive"), ("inf", "not finite"),
                                         ("nan", "not finite")])
def test_bad_pitch_or_nominal(tmp_path, line, key, value, what):
    expect_error(write(tmp_path, changed(**{f"l{line}": f"# {key}: {value}"})), rf":{line}: field '{key}': .*{what}")


@pytest.mark.parametrize("line, key", [(8, "threshold"), (9, "sigma")])
def test_negative_threshold_or_sigma(tmp_path, line, key):
    expect_error(write(tmp_path, changed(**{f"l{line}": f"# {key}: -0.1"})), rf":{line}: field '{key}': must not be negative")


def test_repeated_key(tmp_path):
    lines = changed()
    lines.insert(3, "# tank: TK-08")  # becomes line 4
    expect_error(write(tmp_path, lines), r":4: field 'tank': key repeated \(first on line 2\)")


def test_reserved_version_key(tmp_path):
    lines = changed()
    lines.insert(1, "# version: 1")
    expect_error(write(tmp_path, lines), r":2: field 'version': reserved key")


def test_incomplete_grid_keys(tmp_path):
    lines = changed()
    lines.insert(10, "# x0: 0")  # line 11
    expect_error(write(tmp_path, lines), r":11: field 'y0': the grid keys")


def test_free_comment_and_unknown_keys_kept(tmp_path):
    lines = changed()
    lines.insert(1, "# exported by an invented logger")
    lines.insert(2, "# Operator:  J. Doe ")
    scan = read_csv_scan(write(tmp_path, lines))
    assert scan.meta.extra == {"operator": "J. Doe"}  # keys lower-cased, value stripped


# ---------------------------------------------------------------- table
@pytest.mark.parametrize("column", ["x", "y", "thickness"])
def test_missing_column(tmp_path, column):
    header = ",".join(c for c in ["x", "y", "thickness", "side", "plate"] if c != column)
    expect_error(write(tmp_path, changed(l11=header, l12=None, l13=None, l14=None, l15=None)),
                 rf":11: field '{column}': required column missing")


def test_repeated_column(tmp_path):
    expect_error(write(tmp_path, changed(l11="x,y,thickness,side,x")), r":11: field 'x': column repeated")


def test_no_table_header(tmp_path):
    expect_error(write(tmp_path, BASE[:10]), r": no table header row")


def test_empty_table(tmp_path):
    expect_error(write(tmp_path, BASE[:11]), r":11: the table has no data rows")


@pytest.mark.parametrize("row", ["10,0", "10,0,6.1", "10,0,6.1,under"])
def test_short_row(tmp_path, row):
    # Missing required fields and missing trailing optional fields are both refused.
    expect_error(write(tmp_path, changed(l13=row)), r":13: short row, \d fields where the header row has 5")


def test_extra_field(tmp_path):
    expect_error(write(tmp_path, changed(l13="10,0,6.1,under,1,9")), r":13: 6 fields, the header row has 5")


@pytest.mark.parametrize("row, column, what", [
    ("10,0,abc,under,1", "thickness", "'abc' is not a number"),
    ("1o,0,6.1,under,1", "x", "'1o' is not a number"),
    ("10,zero,6.1,under,1", "y", "'zero' is not a number"),
    ("10,0,nan,under,1", "thickness", "'nan' is not a number"),
    ("10,0,NA,under,1", "thickness", "'NA' is not a number"),
    ("10,0,6.1,under,P1", "plate", "'P1' is not a number"),
])
def test_non_numeric(tmp_path, row, column, what):
    expect_error(write(tmp_path, changed(l13=row)), rf":13: field '{column}': {what}")


@pytest.mark.parametrize("row, column, what", [
    ("10,0,inf,under,1", "thickness", "not finite"),
    ("10,0,-inf,under,1", "thickness", "not finite"),
    ("10,0,1e999,under,1", "thickness", "not finite"),
    ("10,0,,under,1", "thickness", "empty"),
    ("inf,0,6.1,under,1", "x", "not finite"),
    (",0,6.1,under,1", "x", "empty"),
    ("10,,6.1,under,1", "y", "empty"),
    ("10,0,0,under,1", "thickness", "not positive"),
    ("10,0,-1.5,under,1", "thickness", "not positive"),
])
def test_non_finite_or_non_positive(tmp_path, row, column, what):
    expect_error(write(tmp_path, changed(l13=row)), rf":13: field '{column}': .*{what}")


def test_thickness_absurdly_above_nominal(tmp_path):
    # Limit: MAX_THICKNESS_OVER_NOMINAL x nominal = 3 x 6.35 = 19.05 mm.
    assert v.MAX_THICKNESS_OVER_NOMINAL == 3.0
    ok = read_csv_scan(write(tmp_path, changed(l13="10,0,19.05,under,1"), "ok.csv"))
    assert ok.thickness[0, 1] == np.float32(19.05)
    expect_error(write(tmp_path, changed(l13="10,0,19.1,under,1")), r":13: field 'thickness': .*more than 3 x nominal")


def test_error_reports_first_bad_line(tmp_path):
    # Two problems: the earlier line is named.
    expect_error(write(tmp_path, changed(l13="10,0,0,under,1", l15="10,10,inf,top,1")), r":13: field 'thickness'")


def test_unknown_side(tmp_path):
    expect_error(write(tmp_path, changed(l14="0,10,5.9,left,2")), r":14: field 'side': 'left' is not a side")


def test_side_labels_case_and_spaces(tmp_path):
    scan = read_csv_scan(write(tmp_path, changed(l12="0,0,6.2, Top ,1", l13="10,0,6.1,UNDER,1")))
    np.testing.assert_array_equal(scan.side, [[1, 2], [0, 0]])


@pytest.mark.parametrize("value", ["1.5", "-2"])
def test_bad_plate(tmp_path, value):
    expect_error(write(tmp_path, changed(l14=f"0,10,5.9,top,{value}")), r":14: field 'plate': .* is not a plate id")


def test_duplicate_cell_names_both_lines(tmp_path):
    expect_error(write(tmp_path, changed(l15="0,0,6.0,top,1")), r":15: duplicate cell \(0, 0\), already given on line 12")


def test_duplicate_cell_within_tolerance(tmp_path):
    # 0.05 mm is 0.5 % of the 10 mm pitch: the same cell as (10, 0).
    expect_error(write(tmp_path, changed(l15="10.05,0,6.0,top,1")), r":15: duplicate cell .*line 13")


def test_off_grid(tmp_path):
    # Tolerance 1 % of the pitch (design 3.1): 0.05 mm passes, 0.5 mm (5 %) does not.
    assert v.OFF_GRID_TOLERANCE == 0.01
    ok = read_csv_scan(write(tmp_path, changed(l13="10.05,0,6.1,under,1"), "ok.csv"))
    assert ok.shape == (2, 2)
    expect_error(write(tmp_path, changed(l13="10.5,0,6.1,under,1")), r":13: field 'x': 10.5 is off the grid")
    expect_error(write(tmp_path, changed(l14="0,9.8,5.9,,2")), r":14: field 'y': 9.8 is off the grid")


def test_grid_too_large_from_coordinates(tmp_path):
    # 1e10 mm at 10 mm pitch: 1e9 columns x 2 rows > MAX_GRID_CELLS; refused before allocating.
    assert v.MAX_GRID_CELLS == 200_000_000  # issue 22: 0.8 GB of float32 at most
    expect_error(write(tmp_path, changed(l15="1e10,10,6.0,top,1")), r":11: field 'x, y': grid of 2 x 1000000001 cells exceeds")


def test_grid_too_large_from_header(tmp_path):
    lines = changed()
    lines[10:10] = ["# x0: 0", "# y0: 0", "# rows: 100000", "# cols: 100000"]  # lines 11-14
    expect_error(write(tmp_path, lines), r":13: field 'rows': grid of 100000 x 100000 cells exceeds")


def test_cell_outside_declared_grid(tmp_path):
    lines = changed()
    lines[10:10] = ["# x0: 0", "# y0: 0", "# rows: 2", "# cols: 1"]  # table header now line 15
    expect_error(write(tmp_path, lines), r":17: cell \(10, 0\) lies outside the grid")


def test_unknown_column_warns(tmp_path):
    lines = changed(l11="x,y,thickness,side,plate,probe", l12="0,0,6.2,top,1,a", l13="10,0,6.1,under,1,b",
                    l14="0,10,5.9,,2,c", l15="10,10,6.0,unknown,,d")
    with pytest.warns(ScanWarning, match="columns ignored: probe"):
        scan = read_csv_scan(write(tmp_path, lines))
    assert scan.n_scanned == 4


def test_blank_lines_do_not_shift_line_numbers(tmp_path):
    lines = changed(l14="0,10,5.9,left,2")
    lines.insert(12, "")  # blank line 13; the bad row moves to line 15
    lines.insert(12, "   ")
    expect_error(write(tmp_path, lines), r":16: field 'side'")


# ---------------------------------------------------------------- encodings and garbage
def test_non_utf8_in_header(tmp_path):
    data = ("\n".join(BASE) + "\n").encode("utf-8").replace(b"TK-07", b"TK-\xff7")
    expect_error(write(tmp_path, data), r":2: not UTF-8 text")


def test_non_utf8_in_table(tmp_path):
    data = ("\n".join(BASE) + "\n").encode("utf-8").replace(b"10,0,6.1,under", b"10,0,6.1,und\xe9r")
    expect_error(write(tmp_path, data), r":13: not UTF-8 text")


def test_binary_garbage(tmp_path):
    rng = np.random.default_rng(3)
    data = rng.integers(0, 256, 5000, dtype=np.uint8).tobytes() + b"\x00"
    expect_error(write(tmp_path, data), r":1: binary data")


def test_text_garbage_without_format(tmp_path):
    expect_error(write(tmp_path, ["hello,world", "1,2"]), r": field 'format': missing")


def test_hdf5_named_csv(tmp_path):
    expect_error(write(tmp_path, b"\x89HDF\r\n\x1a\n" + b"\x00" * 100), r":1: this is an HDF5 file")


def test_utf8_bom_and_crlf_accepted(tmp_path):
    data = ("\ufeff" + "\r\n".join(BASE) + "\r\n").encode("utf-8")
    scan = read_csv_scan(write(tmp_path, data))
    assert scan.meta.tank == "TK-07" and scan.shape == (2, 2)


def test_unknown_extension_and_missing_file(tmp_path):
    path = write(tmp_path, BASE, name="scan.dat")
    with pytest.raises(InputError, match=re.escape(path) + r": unknown file type '.dat'"):
        read_scan(path)
    missing = os.path.join(str(tmp_path), "nope.csv")
    with pytest.raises(InputError, match=re.escape(missing) + r": no such file"):
        read_scan(missing)


# ---------------------------------------------------------------- line endings, encodings, limits
CR_MSG = r"carriage return inside a line \(old Mac line endings\?\); save with LF or CRLF"


def test_cr_only_line_endings_refused(tmp_path):
    # A classic Mac export: CR alone ends each line, so the whole file is one LF line (line 1).
    data = ("\r".join(BASE) + "\r").encode("utf-8")
    expect_error(write(tmp_path, data), ":1: " + CR_MSG)


def test_cr_inside_header_line(tmp_path):
    expect_error(write(tmp_path, changed(l2="# tank: TK\r-07")), ":2: " + CR_MSG)


def test_cr_inside_column_header_row(tmp_path):
    expect_error(write(tmp_path, changed(l11="x,y,thick\rness,side,plate")), ":11: " + CR_MSG)


@pytest.mark.parametrize("row", [
    "10,0,6.1,und\rer,1",  # the row splits into two bad rows for a CR-aware parser
    "10,0,6.1,under,1\r10,20,5.5,top,1",  # two valid rows joined by a CR: still refused
])
def test_cr_inside_table_row(tmp_path, row):
    # A lone CR must be refused where the line-by-line error paths see it (file line 13),
    # not be taken as a line break by the table parser.
    expect_error(write(tmp_path, changed(l13=row)), ":13: " + CR_MSG)


def test_double_cr_before_lf_refused(tmp_path):
    # "\r\r\n" is an empty line more for a CR-aware parser, not for a line-by-line reader:
    # the line numbers would disagree, so the first such line is refused.
    data = ("\n".join(BASE[:12]) + "\r\r\n" + "\n".join(BASE[12:]) + "\n").encode("utf-8")
    expect_error(write(tmp_path, data), ":12: " + CR_MSG)
    data = ("\r\r\n".join(BASE) + "\r\r\n").encode("utf-8")
    expect_error(write(tmp_path, data, "all.csv"), ":1: " + CR_MSG)


def test_cr_at_end_of_file_accepted(tmp_path):
    # A last line ended by a lone CR (no LF after it): a line ending for every reader.
    data = ("\n".join(BASE) + "\r").encode("utf-8")
    scan = read_csv_scan(write(tmp_path, data))
    np.testing.assert_array_equal(scan.thickness, np.float32([[6.2, 6.1], [5.9, 6.0]]))


def _table_with_cr_at(offset_in_table: int, header: list[str]) -> tuple[bytes, int, int]:
    """CRLF file whose table (after the column header row) has a CR at ``offset_in_table``.

    Returns (file bytes, 1-based file line of that row, number of rows).  The row
    before the target is padded with trailing zeros in its thickness so that its
    CR lands exactly there (ground truth by construction).
    """
    head = ("\r\n".join(header) + "\r\n").encode()
    rows, pos, k = [], 0, 0
    while pos <= offset_in_table + 64:
        rows.append(f"{(k % 700) * 10},{(k // 700) * 10},5.5")
        pos += len(rows[-1]) + 2
        k += 1
    pos = 0
    for i, r in enumerate(rows):
        cr = pos + len(r)
        if cr >= offset_in_table:
            prev = rows[i - 1]
            prev_cr = pos - 2
            pad = offset_in_table - prev_cr
            rows[i - 1] = prev + "0" * pad
            target = i - 1
            break
        pos = cr + 2
    body = "\r\n".join(rows) + "\r\n"
    data = head + body.encode()
    at = len(head) + offset_in_table
    assert data[at:at + 2] == b"\r\n"
    return data, len(header) + 1 + target, len(rows)


def test_cr_at_block_boundary(tmp_path):
    # The reader scans the table in 4 MiB blocks: a CRLF split across two blocks is a line
    # ending; a lone CR there (the next block starting with row content) is refused.
    header = BASE[:10] + ["x,y,thickness"]
    block = 1 << 22
    data, line, n = _table_with_cr_at(block - 1, header)
    scan = read_csv_scan(write(tmp_path, data, "ok.csv"))
    assert scan.n_scanned == n
    at = len(data) - len(data.split(b"\r\n", len(header))[-1]) + block - 1
    bad = data[:at + 1] + data[at + 2:]  # drop the LF after that CR
    expect_error(write(tmp_path, bad, "bad.csv"), f":{line}: " + CR_MSG)


def test_nul_in_table_names_its_line(tmp_path):
    data = ("\n".join(BASE) + "\n").encode().replace(b"10,0,6.1,under", b"10,0,6.\x001,under")
    expect_error(write(tmp_path, data), r":13: binary data")


@pytest.mark.parametrize("encoding", ["utf-16", "utf-16-le", "utf-16-be"])
def test_utf16_export_named(tmp_path, encoding):
    # "utf-16" writes a byte-order mark; the -le/-be exports have none.
    data = ("\n".join(BASE) + "\n").encode(encoding)
    expect_error(write(tmp_path, data), r":1: UTF-16 text; save as UTF-8")


def test_absurd_nominal_refused(tmp_path):
    # Limit 100 mm (docs/formats.md): tank floor plate is 5 to 25 mm (common practice, no source).
    assert v.MAX_NOMINAL_MM == 100.0
    ok = read_csv_scan(write(tmp_path, changed(l7="# nominal: 100"), "ok.csv"))
    assert ok.meta.nominal == 100.0
    expect_error(write(tmp_path, changed(l7="# nominal: 100.5")),
                 r":7: field 'nominal': 100.5 mm is above the limit of 100 mm")
    # 4 in = 101.6 mm (1 in = 25.4 mm exactly).
    expect_error(write(tmp_path, changed(l5="# units: in", l7="# nominal: 4")),
                 r":7: field 'nominal': 4 in is above the limit of 100 mm")
    expect_error(write(tmp_path, changed(l7="# nominal: 1.4e69")), r":7: field 'nominal': .*above the limit")


def test_first_bad_thickness_huge_limit_no_overflow():
    # A float32 grid checked against a limit beyond float32 range: compared in float64, no
    # RuntimeWarning (pytest turns warnings into errors).
    t = np.float32([[5.0, 6.0], [np.nan, 7.0]])
    assert v.first_bad_thickness(t, 1e69, 1.0, allow_nan=True) is None
    assert v.first_bad_thickness(np.float32([1.0, -1.0]), 1e69, 1.0, allow_nan=False) == 1


def test_float32_at_three_times_nominal_round_trips(tmp_path):
    # For random nominals, the largest float32 not above 3 x nominal is valid in memory;
    # written as its shortest decimal it must read back to the same float32 (synthetic truth).
    from scananalyse.io import write_csv_scan
    from scananalyse.scan import FloorScan, ScanMeta
    import datetime as dt

    rng = np.random.default_rng(20)
    for k, nominal in enumerate(rng.uniform(3.0, 30.0, 40)):
        t = np.float32(3 * nominal)
        if float(t) > 3 * nominal:
            t = np.nextafter(t, np.float32(0))
        assert v.first_bad_thickness(np.float32([t]), nominal, 1.0, allow_nan=False) is None
        scan = FloorScan(np.array([[t, nominal]], np.float32), x0=0.0, y0=0.0, pitch=1.0,
                         meta=ScanMeta(inspected=dt.date(2000, 1, 1), nominal=float(nominal)))
        path = tmp_path / f"limit{k}.csv"
        write_csv_scan(scan, path)
        back = read_csv_scan(path)
        assert back.thickness[0, 0] == t


def test_numpy_scalars_shown_plainly():
    # Messages show the value as the user wrote it, not a numpy repr such as np.float64(nan).
    with pytest.raises(InputError) as info:
        v.parse_number(np.float64("nan"), "f.h5", None, "nominal")
    assert "np." not in str(info.value) and "nan is not finite" in str(info.value)
    with pytest.raises(InputError) as info:
        v.parse_number(np.bool_(True), "f.h5", None, "pitch")
    assert "np." not in str(info.value) and "got True" in str(info.value)
    with pytest.raises(InputError) as info:
        v.parse_number(np.int64(-2), "f.h5", None, "pitch")
    assert str(info.value) == "f.h5: field 'pitch': must be positive, got -2"
