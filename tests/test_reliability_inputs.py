"""Bad and hostile inputs are refused with one line, within bounded memory (issue 22).

Each case is as small as it can be: side files (shapes, repairs, patches CSV and DXF),
scan files whose reading would allocate far more than they hold, paths that are not
regular files, and the CSV writers' neutralisation of formulas.
"""

import os
import time

import ezdxf
import h5py
import numpy as np
import pandas as pd
import pytest

from scananalyse import repair
from scananalyse.attribution import read_shapes
from scananalyse.cli import main
from scananalyse.errors import InputError, ScanWarning
from scananalyse.io import check_analysable, read_scan
from scananalyse.rates import read_repairs

SCAN_HEAD = "# format: scananalyse-scan 1\n# inspected: 2024-01-01\n# units: mm\n# pitch: 10\n# nominal: 6\n"
SHAPES_HEAD = "# format: scananalyse-shapes 1\n# units: mm\nshape,side,x,y,r,w,h,points\n"
REPAIRS_HEAD = "# format: scananalyse-repairs 1\n# units: mm\nshape,date,x,y,r,w,h,points,thickness\n"
PATCH_HEAD = "patch,x_min_mm,y_min_mm,x_max_mm,y_max_mm,thickness_mm\n"


def _one_line(capsys, status, *parts):
    err = capsys.readouterr().err.strip().splitlines()
    assert status == 2 and len(err) == 1, err
    assert "internal error" not in err[0] and "Traceback" not in err[0]
    for p in parts:
        assert p in err[0], err[0]
    return err[0]


# --------------------------------------------------------------------------- side files
@pytest.mark.parametrize("reader, head, row, match", [
    (read_shapes, SHAPES_HEAD, b"circle,top,0,0,caf\xe9,,,\n", r"s\.csv:4: byte 0xe9 is not UTF-8"),
    (read_shapes, SHAPES_HEAD, b"circle,top,0,0," + b"1" * 200_000 + b",,,\n", r"s\.csv:4: line of 200"),
    (read_shapes, SHAPES_HEAD, b"circle,top,1e400,0,5,,,\n", r"s\.csv:4: field 'x': not a finite number"),
    (read_shapes, SHAPES_HEAD, b"circle,top,1e300,0,5,,,\n", r"s\.csv:4: field 'x': 1e300 is beyond the limit"),
    (read_shapes, SHAPES_HEAD, b"circle,top,0,0,nan,,,\n", r"s\.csv:4: field 'r': not a finite number"),
    (read_shapes, SHAPES_HEAD, b'polygon,top,,,,,,"0 0; 1e308 0; 0 1e308"\n', r"s\.csv:4: field 'points'"),
    (read_repairs, REPAIRS_HEAD, b"circle,2020-01-01,0,0,5,,,,\xff\n", r"s\.csv:4: byte 0xff"),
    (read_repairs, REPAIRS_HEAD, b"circle,2020-01-01,0,0,5,,,,1000\n", r"s\.csv:4: field 'thickness'.*above the limit"),
    (read_repairs, REPAIRS_HEAD, b"circle,2020-01-01,0,0,5,,,,-1e999\n", r"s\.csv:4: field 'thickness': not a finite"),
    (repair.read_patches, PATCH_HEAD.encode(), b"P1,0,0,100,100,30\n", r"s\.csv:2: field 'thickness_mm'.*outside 3 to 25 mm"),
    (repair.read_patches, PATCH_HEAD.encode(), b"P1,0,0,100,100,1e9\n", r"s\.csv:2: field 'thickness_mm'.*beyond"),
    (repair.read_patches, PATCH_HEAD.encode(), b"P1,0,0,100,1e400,\n", r"s\.csv:2: field 'y_max_mm': not a finite"),
    (repair.read_patches, PATCH_HEAD.encode(), b"P\xe91,0,0,100,100,\n", r"s\.csv:2: byte 0xe9"),
    (repair.read_patches, PATCH_HEAD.encode(), b"P1,0,0,100," + b"9" * 70_000 + b",\n", r"s\.csv:2: line of"),
    (repair.read_patches, PATCH_HEAD.encode(), b"", r"s\.csv: no usable patch"),
    (repair.read_patches, PATCH_HEAD.encode(), b"P1,0,0,100,100,\x00\n", r"s\.csv:2: binary data"),
])
def test_side_files_refused(tmp_path, reader, head, row, match):
    p = tmp_path / "s.csv"
    p.write_bytes((head if isinstance(head, bytes) else head.encode()) + row)
    with pytest.raises(InputError, match=match) as info:
        reader(p)
    assert "\n" not in str(info.value) and len(str(info.value)) < 400


@pytest.mark.parametrize("what", ["folder", "fifo"])
def test_side_file_that_is_not_a_file(tmp_path, what):
    p = tmp_path / "s.csv"
    if what == "folder":
        p.mkdir()
    else:
        os.mkfifo(p)
    for reader in (read_shapes, read_repairs, repair.read_patches):
        with pytest.raises(InputError, match="folder" if what == "folder" else "not a regular file"):
            reader(p)


def _dxf(tmp_path, build, units=ezdxf.units.MM, name="p.dxf"):
    doc = ezdxf.new("R2010")
    doc.units = units
    doc.appids.add("SCANANALYSE")
    build(doc.modelspace())
    path = tmp_path / name
    doc.saveas(path)
    return path


def _square(msp, thk=None, x=0.0, bulge=0.0):
    pl = msp.add_lwpolyline([(x, 0, bulge), (x + 10, 0, 0), (x + 10, 10, 0), (x, 10, 0)], format="xyb",
                            close=True)
    if thk is not None:
        pl.set_xdata("SCANANALYSE", [(1000, "thickness_mm"), (1040, thk)])
    return pl


def test_dxf_patch_thickness_is_mm_whatever_the_drawing_units(tmp_path):
    # an inch drawing: the outline is scaled to mm, the thickness (stored in mm) is not
    path = _dxf(tmp_path, lambda m: _square(m, 6.35), units=ezdxf.units.IN)
    back = repair.read_patches(path)
    assert back.thickness_mm[0] == 6.35 and back.x_max_mm[0] == pytest.approx(254.0)


@pytest.mark.parametrize("thk, match", [(-5.0, "outside 3 to 25 mm"), (1e9, "outside 3 to 25 mm")])
def test_dxf_patch_thickness_range(tmp_path, thk, match):
    with pytest.raises(InputError, match=rf"p\.dxf: field 'LWPOLYLINE handle \w+ thickness_mm'.*{match}"):
        repair.read_patches(_dxf(tmp_path, lambda m: _square(m, thk)))


def test_dxf_refusals(tmp_path):
    # a circle of radius NaN, a huge bulge, and a drawing with no closed outline
    def nan_circle(m):
        m.add_circle((0, 0), 5.0).dxf.radius = float("nan")

    with pytest.raises(InputError, match=r"p\.dxf: field 'CIRCLE handle \w+': .*not a finite"):
        repair.read_patches(_dxf(tmp_path, nan_circle))
    t0 = time.perf_counter()
    with pytest.raises(InputError, match=r"beyond 1e\+07 mm"):
        repair.read_patches(_dxf(tmp_path, lambda m: [_square(m, bulge=1e12) for _ in range(50)], name="b.dxf"))
    assert time.perf_counter() - t0 < 10
    with pytest.warns(ScanWarning), pytest.raises(InputError, match=r"e\.dxf: no usable patch"):
        repair.read_patches(_dxf(tmp_path, lambda m: m.add_line((0, 0), (1, 1)), name="e.dxf"))


def test_dxf_bulged_outline_exact(tmp_path):
    # a semicircle on the bottom edge (bulge 1 clockwise-outward): box and area exact
    path = _dxf(tmp_path, lambda m: m.add_lwpolyline([(0, 0, 1.0), (10, 0, 0), (10, 10, 0), (0, 10, 0)],
                                                     format="xyb", close=True))
    with pytest.warns(ScanWarning, match="bounding rectangles"):
        back = repair.read_patches(path)
    assert (back.x_min_mm[0], back.y_min_mm[0], back.x_max_mm[0], back.y_max_mm[0]) == pytest.approx((0, -5, 10, 10))


def test_dxf_many_outlines_near_linear(tmp_path):
    def build(m):
        for k in range(3000):
            x, y = (k % 60) * 500.0, (k // 60) * 500.0
            m.add_lwpolyline([(x, y), (x + 300, y), (x + 300, y + 300), (x, y + 300)], close=True)
            m.add_text(f"P{k}", dxfattribs={"insert": (x + 150, y + 150)})

    path = _dxf(tmp_path, build)
    t0 = time.perf_counter()
    back = repair.read_patches(path)
    assert list(back.patch[:3]) == ["P0", "P1", "P2"] and back.patch.iloc[-1] == "P2999"
    assert time.perf_counter() - t0 < 15


# --------------------------------------------------------------------------- scans
def test_sparse_csv_refused_before_allocating(tmp_path, capsys):
    p = tmp_path / "far.csv"
    p.write_text(SCAN_HEAD + "x,y,thickness\n0,0,6\n200000,200000,6\n")  # 133 bytes, 200 m apart
    _one_line(capsys, main(["check", str(p)]), "far.csv:6", "exceeds the limit")
    p.write_text(SCAN_HEAD + "x,y,thickness\n0,0,6\n30000,30000,6\n")  # 9 million cells for 2
    _one_line(capsys, main(["check", str(p)]), "far.csv:6", "2 scanned cells spread over a grid")
    p.write_text(SCAN_HEAD + "# x0: 0\n# y0: 0\n# rows: 5000\n# cols: 5000\nx,y,thickness\n0,0,6\n")
    _one_line(capsys, main(["check", str(p)]), "far.csv:8: field 'rows'", "1 scanned cells")


def test_long_csv_line_refused(tmp_path, capsys):
    p = tmp_path / "long.csv"
    p.write_text(SCAN_HEAD + "x,y,thickness\n0,0,6\n10,0," + "6" * 100_000 + "\n")
    _one_line(capsys, main(["check", str(p)]), "long.csv:8: line longer than 65536 bytes")


def _h5(path, *, shape=(4, 4), chunks=(4, 4), bomb=0, fill_only=False):
    import zlib

    with h5py.File(path, "w") as f:
        for k, v in {"format": "scananalyse-scan", "version": 1, "inspected": "2024-01-01", "units": "mm",
                     "pitch": 10.0, "nominal": 6.0}.items():
            f.attrs[k] = v
        ds = f.create_dataset("thickness", shape=shape, dtype="f4", chunks=chunks, compression="gzip",
                              fillvalue=6.0, maxshape=(None, None))
        ds.attrs["x0"] = 0.0
        ds.attrs["y0"] = 0.0
        if not fill_only:
            raw = np.full(int(np.prod(chunks)), 6.0, np.float32).tobytes() + b"\0" * bomb
            ds.id.write_direct_chunk((0, 0), zlib.compress(raw, 9))


@pytest.mark.parametrize("case, kw, match", [
    ("bomb", {"bomb": 50_000_000}, "a compression bomb"),
    ("chunk", {"shape": (4, 4), "chunks": (8192, 8192), "fill_only": True}, "exceed the limit of 64 MiB"),
    ("declared", {"shape": (10000, 10000), "chunks": (512, 512), "fill_only": True}, "more than any compression"),
])
def test_h5_allocation_refused_before_reading(tmp_path, capsys, case, kw, match):
    p = tmp_path / f"{case}.h5"
    _h5(p, **kw)
    _one_line(capsys, main(["check", str(p)]), f"{case}.h5: field 'thickness'", match)


@pytest.mark.parametrize("what", ["folder", "fifo"])
def test_scan_path_that_is_not_a_file(tmp_path, capsys, what):
    p = tmp_path / "scan.csv"
    if what == "folder":
        p.mkdir()
    else:
        os.mkfifo(p)
    line = _one_line(capsys, main(["check", str(p)]), "scan.csv")
    assert ("is a folder" if what == "folder" else "not a regular file") in line


def test_one_cell_scans_not_analysable(tmp_path):
    p = tmp_path / "one.csv"
    p.write_text(SCAN_HEAD + "x,y,thickness\n0,0,6\n")
    scan = read_scan(p)  # a valid file (check, convert) ...
    with pytest.raises(InputError, match=r"one\.csv: grid of 1 x 1 cells; a floor to analyse needs"):
        check_analysable(scan, p)  # ... but not a floor to analyse


# --------------------------------------------------------------------------- convert
def test_convert_onto_a_folder_and_through_a_symlinked_folder(tmp_path, capsys):
    real = tmp_path / "real"
    real.mkdir()
    src = real / "a.csv"
    src.write_text(SCAN_HEAD + "x,y,thickness\n0,0,6\n10,0,5\n")
    before = src.read_bytes()
    (tmp_path / "out.h5").mkdir()
    _one_line(capsys, main(["convert", str(src), str(tmp_path / "out.h5"), "--force"]), "out.h5: is a folder")
    (tmp_path / "link").symlink_to(real)
    _one_line(capsys, main(["convert", str(src), str(tmp_path / "link" / "a.csv"), "--force"]),
              "output is the input file")
    os.link(src, tmp_path / "hard.csv")
    _one_line(capsys, main(["convert", str(src), str(tmp_path / "hard.csv"), "--force"]), "output is the input")
    assert src.read_bytes() == before


# --------------------------------------------------------------------------- CSV writers
FORMULAS = ["=1+1", "+SUM(A1)", "-2+3", "@cmd", "=HYPERLINK(\"http://x\")"]


def test_patches_csv_neutralised(tmp_path):
    df = pd.DataFrame({"patch": FORMULAS, "zone": FORMULAS[::-1], "x_min_mm": [0.0] * 5, "y_min_mm": 0.0,
                       "x_max_mm": 100.0, "y_max_mm": 100.0, "corner_radius_mm": 0.0, "thickness_mm": 6.0,
                       "area_m2": 0.01, "mass_kg": -1.5, "flags": "@x", "n_cells_covered": 1})
    repair.write_patches_csv(df, tmp_path / "patches.csv")
    back = pd.read_csv(tmp_path / "patches.csv", dtype=str, keep_default_na=False)
    for col in ("patch", "zone", "flags"):
        assert all(v.startswith("'") for v in back[col]), back[col].tolist()
    assert back["mass_kg"].tolist() == ["-1.5"] * 5  # numbers stay numbers


def test_indications_csv_neutralised(tmp_path):
    from scananalyse.indications import INDICATION_COLUMNS, write_indications_csv

    df = pd.DataFrame({c: [1.0] * 5 for c in INDICATION_COLUMNS})
    text_cols = [c for c in ("zone", "side", "status") if c in INDICATION_COLUMNS]
    for c in text_cols:
        df[c] = FORMULAS
    write_indications_csv(df, tmp_path / "indications.csv")
    back = pd.read_csv(tmp_path / "indications.csv", dtype=str, keep_default_na=False)
    assert text_cols
    for c in text_cols:
        assert all(v.startswith("'") for v in back[c])
