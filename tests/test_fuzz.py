"""Short grammar-based fuzzing of the text parsers, run in every CI pass (a few seconds).

The generator writes files that look like floor-scan CSV v1 (header lines with
known and unknown keys, a column header row, table rows) built from a pool of
awkward tokens: numbers in odd notations, NaN/inf spellings, quotes, stray
separators, Unicode digits and spaces, huge and tiny values, mixed line
endings, BOMs.  Whatever the input, the reader must either return a valid
FloorScan or raise InputError with one line naming the file; no other
exception and no warning other than ScanWarning.

The same holds for the other text inputs a user hands over: TOML job files,
attribution shapes files and fleet manifests.  The longer, open-ended run is
``fuzz/fuzz_readers.py`` (docs/reliability.md).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from scananalyse.errors import InputError, ScanWarning
from scananalyse.io import read_csv_scan

SETTINGS = dict(deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])

NUMBERS = ["0", "10", "-10", "6.35", "+6.35", ".5", "5.", "1e1", "1E-3", "1e309", "-1e309", "4.9e-324", "nan",
           "NaN", "-nan", "inf", "-inf", "Infinity", "1_0", "0x10", "١٢", "6,35", " 6.35 ", "6.35\t", "", " ",
           "\"6.35\"", "\"", "'6'", "1/2", "10mm", "−5", "٫5", "1e", "e1", "--1", "0.0000001", "99999999999999999999"]
WORDS = ["top", "under", "unknown", "TOP", "", "bottom", "ûnder", "\"top\"", "a,b", "#", ":", "\\", "\u00a0"]
KEYS = ["format", "inspected", "units", "pitch", "nominal", "threshold", "sigma", "installed", "tank", "method",
        "x0", "y0", "rows", "cols", "version", "Format", " pitch ", "", "crew", "notes:extra"]
VALUES = (["scananalyse-scan 1", "scananalyse-scan 2", "scananalyse-scan", "2024-05-14", "2024-02-30", "14/05/2024",
           "mm", "in", "cm", "MM", "10", "0", "-1", "nan", "inf", "6.35", "1e400", "", " ", "TK-<b>7</b>", "é",
           "3", "100000", "1.5"] + NUMBERS[:12])
COLUMNS = ["x", "y", "thickness", "side", "plate", "X", " y ", "\"thickness\"", "extra", "", "x"]
EOLS = ["\n", "\r\n", "\r", "\n\n"]

VALID_HEADER = ["# format: scananalyse-scan 1", "# inspected: 2027-05-14", "# units: mm", "# pitch: 10",
                "# nominal: 6.35"]


@st.composite
def header_lines(draw):
    lines = []
    if draw(st.booleans()):
        lines += [ln for ln in VALID_HEADER if draw(st.integers(0, 9)) > 0]  # mostly the valid keys
    for _ in range(draw(st.integers(0, 6))):
        kind = draw(st.integers(0, 4))
        if kind == 0:
            lines.append(f"# {draw(st.sampled_from(KEYS))}: {draw(st.sampled_from(VALUES))}")
        elif kind == 1:
            lines.append("#" + draw(st.text(max_size=20)))
        elif kind == 2:
            lines.append(f"#{draw(st.sampled_from(KEYS))}:{draw(st.text(max_size=12))}")
        elif kind == 3:
            lines.append("")
        else:
            lines.insert(draw(st.integers(0, len(lines))), draw(st.sampled_from(VALID_HEADER)))
    return lines


@st.composite
def table(draw):
    if draw(st.integers(0, 4)) == 0:
        cols = draw(st.lists(st.sampled_from(COLUMNS), min_size=0, max_size=7))
    else:
        cols = ["x", "y", "thickness"] + draw(st.lists(st.sampled_from(["side", "plate"]), max_size=2, unique=True))
    lines = [",".join(cols)]
    n = draw(st.integers(0, 12))
    for k in range(n):
        fields = []
        for c in cols:
            if draw(st.integers(0, 5)) > 0:  # mostly sensible values, so deeper checks are reached
                if c in ("x", "X", " y "):
                    fields.append(str(10 * (k % 4)))
                elif c == "y":
                    fields.append(str(10 * (k // 4)))
                elif c in ("thickness", "\"thickness\""):
                    fields.append(f"{draw(st.floats(0.0, 25.0)):.3g}")
                elif c == "side":
                    fields.append(draw(st.sampled_from(WORDS)))
                else:
                    fields.append(str(draw(st.integers(-2, 5))))
            else:
                fields.append(draw(st.sampled_from(NUMBERS + WORDS)))
        extra = draw(st.integers(-1, 1))
        if extra < 0 and fields:
            fields.pop()
        elif extra > 0:
            fields.append(draw(st.sampled_from(NUMBERS)))
        lines.append(",".join(fields))
    return lines


@st.composite
def csv_files(draw):
    lines = draw(header_lines()) + draw(table())
    eol = draw(st.sampled_from(EOLS))
    text = eol.join(lines) + (eol if draw(st.booleans()) else "")
    prefix = draw(st.sampled_from(["", "\ufeff", "\ufeff\ufeff", " "]))
    enc = draw(st.sampled_from(["utf-8", "utf-8", "utf-8", "latin-1", "utf-16"]))
    try:
        return (prefix + text).encode(enc)
    except UnicodeEncodeError:
        return (prefix + text).encode("utf-8", "replace")


def assert_clean(call, path):
    """``call()`` returns or raises InputError(one line starting with the file name); nothing else."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        warnings.simplefilter("ignore", ScanWarning)
        try:
            return call()
        except InputError as exc:
            msg = str(exc)
            assert "\n" not in msg and "\r" not in msg, msg
            assert msg.startswith(str(path)), msg
            return None


@settings(max_examples=400, **SETTINGS)
@given(data=csv_files())
def test_fuzz_csv_parser(tmp_path_factory, data):
    p = tmp_path_factory.getbasetemp() / "fuzz.csv"
    p.write_bytes(data)
    scan = assert_clean(lambda: read_csv_scan(p), p)
    if scan is not None:
        fin = np.isfinite(scan.thickness)
        assert fin.any()
        assert np.all(scan.thickness[fin] > 0)
        assert math.isfinite(scan.pitch) and scan.pitch > 0
        assert scan.meta.units in ("mm", "in")


def test_fuzz_generator_reaches_valid_files(tmp_path):
    """The grammar is not only noise: it produces files the reader accepts (else the fuzz
    would only ever test the first refusal). Checked on fixed draws."""
    ok = 0
    # Files from the grammar's valid branch: the valid header keys and sensible rows.
    rng = np.random.default_rng(3)
    for k in range(40):
        rows = [f"{10 * (j % 4)},{10 * (j // 4)},{rng.uniform(1, 6.35):.3g}" for j in range(int(rng.integers(1, 12)))]
        text = "\n".join(VALID_HEADER + ["x,y,thickness"] + rows) + "\n"
        p = tmp_path / f"g{k}.csv"
        p.write_text(text)
        ok += assert_clean(lambda: read_csv_scan(p), p) is not None
    assert ok == 40


# --------------------------------------------------------------------------- other text inputs
TOML_PIECES = ["[floor]", "[protection]", "[attribution]", "[repair]", "[rules]", "[rules.overrides]", "[paths]",
               "[report]", "[statistics]", "diameter = 3000", "diameter = \"3000\"", "diameter = -1", "diameter = nan",
               "diameter = inf", "centre = [0, 0]", "centre = [0]", "centre = \"0,0\"", "cp_effective = true",
               "coated = 1", "shapes = \"../x.csv\"", "shapes = \"/abs.csv\"", "shapes = \"ok.csv\"",
               "allow_absolute = true", "target_interval = 0", "seed = 1.5", "units = \"in\"", "units = \"cm\"",
               "name = \"api653\"", "interval_cap_y = 15", "unknown = 1", "a.b.c = 1", "[floor", "= 3", "x = ",
               "diameter = 3000\ndiameter = 3001", "[[floor]]", "default_side = \"left\"", "block_mm = 0"]


@settings(max_examples=200, **SETTINGS)
@given(lines=st.lists(st.sampled_from(TOML_PIECES) | st.text(max_size=15), max_size=10))
def test_fuzz_job_reader(tmp_path_factory, lines):
    from scananalyse.job import read_job

    d = tmp_path_factory.getbasetemp() / "jobfuzz"
    d.mkdir(exist_ok=True)
    p = d / "job.toml"
    p.write_bytes("\n".join(lines).encode("utf-8", "replace"))
    job = assert_clean(lambda: read_job(p), p)
    if job is not None:
        for f in ("shapes", "repairs", "control_points", "patches", "top_depth"):
            val = getattr(job, f)
            if val is not None and not job.allow_absolute_paths:
                # a path that survives the checks stays inside the job file's folder
                assert str(val).startswith(str(d.resolve())), val


SHAPE_ROWS = ["circle,top,0,0,100,,,", "rect,under,0,0,,50,50,", "polygon,top,,,,,,\"0 0; 10 0; 0 10\"",
              "circle,top,0,0,0,,,", "circle,top,nan,0,1,,,", "rect,under,0,0,,-5,5,", "polygon,top,,,,,,\"0 0\"",
              "ellipse,top,0,0,1,,,", "circle,,0,0,1,,,", "circle,top,1e400,0,1,,,", "circle,top,0,0,1,,,,,",
              "polygon,under,,,,,,\"a b; c d; e f\"", "\"circle\",\"top\",0,0,5,,,", "", "# comment", ","]


@settings(max_examples=150, **SETTINGS)
@given(head=st.lists(st.sampled_from(["# format: scananalyse-shapes 1", "# format: other 1", "# units: mm",
                                      "# units: in", "# units: ft", "#", "# note: x"]), max_size=3),
       columns=st.sampled_from(["shape,side,x,y,r,w,h,points", "shape,side,x,y,r", "side,x,y", "shape,side,q",
                                "shape,side,x,y,r,w,h,points,extra"]),
       rows=st.lists(st.sampled_from(SHAPE_ROWS) | st.text(max_size=12), max_size=6))
def test_fuzz_shapes_reader(tmp_path_factory, head, columns, rows):
    from scananalyse.attribution import read_shapes

    p = tmp_path_factory.getbasetemp() / "shapes.csv"
    p.write_bytes("\n".join(head + [columns] + rows).encode("utf-8", "replace"))
    assert_clean(lambda: read_shapes(p), p)


@settings(max_examples=100, **SETTINGS)
@given(rows=st.lists(st.sampled_from(["TK-1,old.h5,new.h5,3000", "TK-1,a.h5,b.h5,3000", "TK-2,../a.h5,b.h5,1",
                                      "TK-3,/etc/passwd,b.h5,1", ",a.h5,b.h5,1", "TK-4,a.h5,b.h5,-1",
                                      "TK-5,a.h5,b.h5,nan", "TK-6,a.h5,b.h5", "TK-7,a.h5,b.h5,1,extra", "",
                                      "TK-8,a.h5,b.h5,1e999"]) | st.text(max_size=10), max_size=5),
       header=st.sampled_from(["tank,old,new,diameter", "tank,old,new", "TANK,OLD,NEW,DIAMETER,job", ""]))
def test_fuzz_manifest_reader(tmp_path_factory, rows, header):
    from scananalyse.fleet import read_manifest

    d = tmp_path_factory.getbasetemp() / "manifestfuzz"
    d.mkdir(exist_ok=True)
    p = d / "manifest.csv"
    p.write_bytes("\n".join([header] + rows).encode("utf-8", "replace"))
    entries = assert_clean(lambda: read_manifest(p), p)
    for e in entries or []:
        for col in ("old", "new"):
            assert str(e[col]).startswith(str(d.resolve())), e


# --------------------------------------------------------------------------- regressions
def test_regression_cr_only_line_endings(tmp_path):
    """A spreadsheet saved with CR-only line endings (classic Mac CSV): read or refused in one
    line, never a csv module traceback (found by test_fuzz_csv_parser)."""
    p = tmp_path / "mac.csv"
    p.write_bytes("\r".join(VALID_HEADER + ["x,y,thickness", "0,0,5.1", "10,0,5.2"]).encode() + b"\r")
    assert_clean(lambda: read_csv_scan(p), p)
    p.write_bytes(b"x,y,thickness\r0,0,0")
    assert_clean(lambda: read_csv_scan(p), p)


def test_regression_double_bom(tmp_path):
    """Two byte-order marks then a CR inside the first line (found by test_fuzz_csv_parser)."""
    p = tmp_path / "bom.csv"
    p.write_bytes(b"\xef\xbb\xbf\xef\xbb\xbf#\r0\n# format: scananalyse-scan 1\n#\n")
    assert_clean(lambda: read_csv_scan(p), p)
