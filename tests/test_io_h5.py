"""Floor-scan HDF5 v1: the written layout, round trips and every layout error.

The layout checked here is the design contract 3.2 (root attributes, dataset
names, dtypes, x0/y0 meaning); bad files are built directly with h5py.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import re

import h5py
import numpy as np
import pytest

from scananalyse.errors import InputError
from scananalyse.io import read_h5_scan, read_scan, write_h5_scan, write_scan
from scananalyse.io import validate as v
from scananalyse.scan import FloorScan, ScanMeta


def sha(path) -> str:
    with open(path, "rb") as fh:
        return hashlib.sha256(fh.read()).hexdigest()


def make_scan(units="mm", layers=True) -> FloorScan:
    rng = np.random.default_rng(11)
    f = 25.4 if units == "in" else 1.0
    t = rng.uniform(3.0, 6.3, (6, 8)).astype(np.float32)
    t[rng.random((6, 8)) < 0.25] = np.nan
    meta = ScanMeta(inspected=dt.date(2024, 5, 14), nominal=0.25 * 25.4 if f != 1 else 6.35, units=units,
                    tank="TK-11", method="UT", threshold=0.04 * f, sigma=0.15, installed=dt.date(2001, 7, 9),
                    extra={"crew": "invented crew C"})
    return FloorScan(t, x0=-0.8 * f if f != 1 else -40.0, y0=0.4 * f if f != 1 else 15.0,
                     pitch=0.4 * f if f != 1 else 10.0, meta=meta,
                     side=rng.integers(0, 3, (6, 8)) if layers else None,
                     plate=rng.integers(-1, 9, (6, 8)) if layers else None)


def good_file(path, **drop):
    """A valid file written with raw h5py; keyword arguments remove or replace parts."""
    t = np.array([[6.1, 5.8, np.nan], [6.0, np.nan, 4.9], [6.3, 6.2, 6.2]], dtype=np.float32)
    with h5py.File(path, "w") as f:
        attrs = {"format": "scananalyse-scan", "version": 1, "inspected": "2024-05-14", "units": "mm",
                 "pitch": 10.0, "nominal": 6.35}
        for k, val in attrs.items():
            if drop.get(k, 0) is None:
                continue
            f.attrs[k] = drop.get(k, val)
        data = drop.get("thickness", t)
        if data is not None:
            ds = f.create_dataset("thickness", data=data)
            for k, val in (("x0", -10.0), ("y0", 0.0)):
                if drop.get(k, 0) is not None:
                    ds.attrs[k] = val
        for name in ("side", "plate"):
            if drop.get(name) is not None:
                f.create_dataset(name, data=drop[name])
    return str(path)


def expect_error(path, pattern):
    path = str(path)
    before = sha(path)
    with pytest.raises(InputError, match=re.escape(path) + pattern) as info:
        read_h5_scan(path)
    assert "\n" not in str(info.value)
    assert sha(path) == before
    return str(info.value)


# ---------------------------------------------------------------- layout and round trips
def test_good_file_reads(tmp_path):
    # Contract 3.2: row i at y = y0 + i*pitch, column j at x = x0 + j*pitch.
    s = read_h5_scan(good_file(tmp_path / "g.h5"))
    assert s.shape == (3, 3) and (s.x0, s.y0, s.pitch) == (-10.0, 0.0, 10.0)
    np.testing.assert_array_equal(s.x, [-10.0, 0.0, 10.0])
    np.testing.assert_array_equal(s.y, [0.0, 10.0, 20.0])
    assert s.thickness[1, 2] == np.float32(4.9) and np.isnan(s.thickness[0, 2])
    assert s.side is None and s.plate is None


def test_writer_layout(tmp_path):
    path = tmp_path / "w.h5"
    write_h5_scan(make_scan("mm"), path)
    with h5py.File(path, "r") as f:
        assert f.attrs["format"] == "scananalyse-scan" and int(f.attrs["version"]) == 1
        assert f.attrs["inspected"] == "2024-05-14" and f.attrs["installed"] == "2001-07-09"
        assert f.attrs["units"] == "mm" and f.attrs["pitch"] == 10.0 and f.attrs["nominal"] == 6.35
        assert f.attrs["tank"] == "TK-11" and f.attrs["method"] == "UT" and f.attrs["crew"] == "invented crew C"
        ds = f["thickness"]
        assert ds.dtype == np.float32 and ds.ndim == 2 and ds.compression == "gzip" and ds.chunks is not None
        assert (ds.attrs["x0"], ds.attrs["y0"]) == (-40.0, 15.0)
        assert f["side"].dtype == np.int8 and f["plate"].dtype == np.int32
        assert f["side"].compression == "gzip"


def test_writer_inch_layout(tmp_path):
    # Written in the file's units: pitch 0.4 in, nominal 0.25 in; thickness float64 inches (see docstring).
    path = tmp_path / "w.h5"
    s = make_scan("in")
    write_h5_scan(s, path)
    with h5py.File(path, "r") as f:
        assert f.attrs["units"] == "in" and f.attrs["pitch"] == 0.4 and f.attrs["nominal"] == 0.25
        assert f["thickness"].attrs["x0"] == -0.8 and f["thickness"].dtype == np.float64
        m = np.isfinite(s.thickness)
        np.testing.assert_allclose(f["thickness"][()][m], s.thickness[m].astype(np.float64) / 25.4, rtol=1e-15)


@pytest.mark.parametrize("units", ["mm", "in"])
@pytest.mark.parametrize("layers", [True, False])
def test_h5_round_trip(tmp_path, units, layers):
    s = make_scan(units, layers)
    write_scan(s, tmp_path / "a.hdf5")
    b = read_scan(tmp_path / "a.hdf5")
    assert b.shape == s.shape and (b.x0, b.y0, b.pitch) == (s.x0, s.y0, s.pitch) and b.meta == s.meta
    np.testing.assert_array_equal(b.thickness.view(np.uint32)[s.scanned], s.thickness.view(np.uint32)[s.scanned])
    assert np.isnan(b.thickness[~s.scanned]).all()
    if layers:  # HDF5 keeps layers on every cell, scanned or not
        np.testing.assert_array_equal(b.side, s.side)
        np.testing.assert_array_equal(b.plate, s.plate)
    else:
        assert b.side is None and b.plate is None


def test_float64_and_big_endian_thickness_accepted(tmp_path):
    t = np.array([[6.1, 5.8], [6.0, 4.9]])
    s64 = read_h5_scan(good_file(tmp_path / "a.h5", thickness=t))
    sbe = read_h5_scan(good_file(tmp_path / "b.h5", thickness=t.astype(">f4")))
    np.testing.assert_array_equal(s64.thickness, t.astype(np.float32))
    np.testing.assert_array_equal(sbe.thickness, t.astype(np.float32))


# ---------------------------------------------------------------- layout errors
def test_not_hdf5(tmp_path):
    p = tmp_path / "text.h5"
    p.write_text("x,y,thickness\n1,2,3\n")
    expect_error(p, r": not an HDF5 file")


def test_truncated(tmp_path):
    p = tmp_path / "full.h5"
    s = make_scan()
    big = s.with_thickness(np.tile(s.thickness, (40, 40)), side=None, plate=None)
    write_h5_scan(big, p)
    data = p.read_bytes()
    q = tmp_path / "cut.h5"
    q.write_bytes(data[: len(data) // 2])
    expect_error(q, r": HDF5 file is truncated or corrupt|: field 'thickness': cannot read the data")


@pytest.mark.parametrize("attr, value, pattern", [
    ("format", None, r": field 'format': attribute missing"),
    ("format", "other-scan", r": field 'format': 'other-scan' is not the floor-scan format"),
    ("version", None, r": field 'version': attribute missing"),
    ("version", 2, r": field 'version': unsupported version"),
    ("version", "1", r": field 'version': unsupported version"),
    ("inspected", None, r": field 'inspected': required header key missing"),
    ("inspected", "14.05.2024", r": field 'inspected': '14.05.2024' is not an ISO date"),
    ("units", "ft", r": field 'units': unknown units 'ft'"),
    ("pitch", None, r": field 'pitch': required header key missing"),
    ("pitch", -1.0, r": field 'pitch': must be positive"),
    ("nominal", np.nan, r": field 'nominal': .* is not finite"),
    ("nominal", "thick", r": field 'nominal': 'thick' is not a number"),
])
def test_bad_root_attributes(tmp_path, attr, value, pattern):
    expect_error(good_file(tmp_path / "a.h5", **{attr: value}), pattern)


def test_reserved_root_attribute(tmp_path):
    p = good_file(tmp_path / "a.h5")
    with h5py.File(p, "a") as f:
        f.attrs["x0"] = 5.0
    expect_error(p, r": field 'x0': reserved root attribute")


def test_missing_thickness(tmp_path):
    expect_error(good_file(tmp_path / "a.h5", thickness=None), r": field 'thickness': dataset missing")


def test_thickness_is_a_group(tmp_path):
    p = good_file(tmp_path / "a.h5", thickness=None)
    with h5py.File(p, "a") as f:
        f.create_group("thickness")
    expect_error(p, r": field 'thickness': expected a dataset")


@pytest.mark.parametrize("shape", [(9,), (2, 2, 2)])
def test_thickness_not_2d(tmp_path, shape):
    expect_error(good_file(tmp_path / "a.h5", thickness=np.full(shape, 6.0, np.float32)), r": field 'thickness': must be 2-D")


@pytest.mark.parametrize("data", [np.array([[b"6.1", b"5.0"]]), np.array([[6, 5]], dtype=np.int16)])
def test_thickness_wrong_dtype(tmp_path, data):
    expect_error(good_file(tmp_path / "a.h5", thickness=data), r": field 'thickness': dtype .* is not float32 or float64")


def test_thickness_empty(tmp_path):
    expect_error(good_file(tmp_path / "a.h5", thickness=np.zeros((0, 3), np.float32)), r": field 'thickness': empty grid")


@pytest.mark.parametrize("value, what", [(np.inf, "not finite"), (-2.0, "not positive"), (0.0, "not positive"),
                                         (30.0, "more than 3 x nominal")])
def test_thickness_bad_values(tmp_path, value, what):
    t = np.full((3, 4), 6.0, np.float32)
    t[1, 2] = value
    expect_error(good_file(tmp_path / "a.h5", thickness=t), rf": field 'thickness': at \[1, 2\]: .*{what}")


def test_thickness_all_unscanned(tmp_path):
    expect_error(good_file(tmp_path / "a.h5", thickness=np.full((2, 2), np.nan, np.float32)), r": field 'thickness': no scanned cells")


def test_grid_too_large(tmp_path):
    # 30000 x 20000 = 6e8 cells > MAX_GRID_CELLS (4e8): refused before reading (the dataset is never filled).
    p = good_file(tmp_path / "a.h5", thickness=None)
    with h5py.File(p, "a") as f:
        ds = f.create_dataset("thickness", shape=(30000, 20000), dtype=np.float32, chunks=(1000, 1000))
        ds.attrs["x0"], ds.attrs["y0"] = 0.0, 0.0
    assert 30000 * 20000 > v.MAX_GRID_CELLS
    expect_error(p, r": field 'thickness': grid of 30000 x 20000 cells exceeds the limit")


@pytest.mark.parametrize("attr", ["x0", "y0"])
def test_missing_anchor(tmp_path, attr):
    expect_error(good_file(tmp_path / "a.h5", **{attr: None}), rf": field 'thickness.{attr}': attribute missing")


@pytest.mark.parametrize("name, data, pattern", [
    ("side", np.zeros((2, 3), np.int8), r"field 'side': shape \(2, 3\) differs from thickness \(3, 3\)"),
    ("side", np.zeros((3, 3), np.float32), r"field 'side': dtype float32 is not an integer type"),
    ("side", np.full((3, 3), 3, np.int8), r"field 'side': invalid code 3 at \[0, 0\]"),
    ("side", np.array([[b"top"] * 3] * 3), r"field 'side': dtype .* is not an integer type"),
    ("plate", np.zeros((3, 4), np.int32), r"field 'plate': shape \(3, 4\) differs"),
    ("plate", np.full((3, 3), -2, np.int32), r"field 'plate': invalid code -2 at \[0, 0\]"),
    ("plate", np.full((3, 3), 1.5), r"field 'plate': dtype float64 is not an integer type"),
])
def test_bad_layers(tmp_path, name, data, pattern):
    expect_error(good_file(tmp_path / "a.h5", **{name: data}), r": " + pattern)


def test_layers_with_other_integer_types_accepted(tmp_path):
    side = np.array([[0, 1, 2]] * 3, dtype=np.int64)
    s = read_h5_scan(good_file(tmp_path / "a.h5", side=side, plate=np.full((3, 3), 7, np.int16)))
    assert s.side.dtype == np.int8 and s.plate.dtype == np.int32
    np.testing.assert_array_equal(s.side, side)


# ---------------------------------------------------------------- links and foreign storage
def test_external_link_refused(tmp_path):
    other = good_file(tmp_path / "other.h5")
    p = good_file(tmp_path / "a.h5", thickness=None)
    with h5py.File(p, "a") as f:
        f["thickness"] = h5py.ExternalLink(other, "/thickness")
    expect_error(p, r": field 'thickness': external link to .*other.h5:/thickness refused")


def test_external_link_elsewhere_refused(tmp_path):
    # Any external link in the file, not only on the datasets read.
    other = good_file(tmp_path / "other.h5")
    p = good_file(tmp_path / "a.h5")
    with h5py.File(p, "a") as f:
        g = f.create_group("notes")
        g["copy"] = h5py.ExternalLink(other, "/thickness")
    expect_error(p, r": field 'notes/copy': external link")


def test_soft_link_refused(tmp_path):
    p = good_file(tmp_path / "a.h5")
    with h5py.File(p, "a") as f:
        f["side"] = h5py.SoftLink("/thickness")
    expect_error(p, r": field 'side': soft link to /thickness refused")


def test_virtual_dataset_refused(tmp_path):
    other = good_file(tmp_path / "other.h5")
    p = good_file(tmp_path / "a.h5", thickness=None)
    layout = h5py.VirtualLayout(shape=(3, 3), dtype=np.float32)
    layout[:] = h5py.VirtualSource(other, "thickness", shape=(3, 3))
    with h5py.File(p, "a") as f:
        ds = f.create_virtual_dataset("thickness", layout, fillvalue=np.nan)
        ds.attrs["x0"], ds.attrs["y0"] = 0.0, 0.0
    expect_error(p, r": field 'thickness': virtual dataset refused")


def test_external_storage_refused(tmp_path):
    raw = tmp_path / "raw.bin"
    raw.write_bytes(np.full((3, 3), 6.0, np.float32).tobytes())
    p = good_file(tmp_path / "a.h5", thickness=None)
    with h5py.File(p, "a") as f:
        ds = f.create_dataset("thickness", shape=(3, 3), dtype=np.float32, external=[(str(raw), 0, 36)])
        ds.attrs["x0"], ds.attrs["y0"] = 0.0, 0.0
    expect_error(p, r": field 'thickness': dataset with external storage refused")


# ---------------------------------------------------------------- damaged files
BAD_DIR = __import__("pathlib").Path(__file__).parent / "data" / "bad"


@pytest.mark.parametrize("name", ["h5_corrupt_attribute_table.h5", "h5_corrupt_datatype.h5",
                                  "h5_corrupt_datatype_time.h5", "h5_corrupt_link_heap.h5",
                                  "h5_corrupt_object_header.h5"])
def test_kept_damaged_files_refused(name):
    # Files damaged by byte corruption (kept in tests/data/bad): h5py raises KeyError,
    # RuntimeError, TypeError, ValueError or SystemError on them; the reader names the file.
    msg = expect_error(BAD_DIR / name, r": HDF5 file is truncated or corrupt \(.+\)")
    assert "Traceback" not in msg


def test_kept_absurd_nominal_refused():
    expect_error(BAD_DIR / "h5_corrupt_nominal_absurd.h5",
                 r": field 'nominal': .* mm is above the limit of 100 mm")


def test_absurd_nominal_attribute(tmp_path):
    # A nominal far beyond float32 range: refused by the 100 mm limit, no overflow warning.
    expect_error(good_file(tmp_path / "a.h5", nominal=np.float64(1.4e69)),
                 r": field 'nominal': 1.4e\+69 mm is above the limit of 100 mm")
    assert read_h5_scan(good_file(tmp_path / "b.h5", nominal=100.0)).meta.nominal == 100.0


def test_version_shown_without_numpy_repr(tmp_path):
    msg = expect_error(good_file(tmp_path / "a.h5", version=np.int64(2)),
                       r": field 'version': unsupported version 2 \(")
    assert "np." not in msg


def test_random_byte_damage_fails_cleanly(tmp_path):
    # Seeded damage: 40 copies of a valid file with 1 to 8 bytes overwritten at random places
    # (synthetic ground truth: each read returns a scan or raises InputError naming the file,
    # nothing else; pytest turns warnings into errors).
    p = tmp_path / "good.h5"
    write_h5_scan(make_scan(), p)
    data = p.read_bytes()
    rng = np.random.default_rng(5)
    outcomes = {"read": 0, "refused": 0}
    for k in range(40):
        buf = bytearray(data)
        for pos in rng.integers(0, len(buf), rng.integers(1, 9)):
            buf[pos] = int(rng.integers(0, 256))
        q = tmp_path / f"damaged{k}.h5"
        q.write_bytes(bytes(buf))
        try:
            scan = read_h5_scan(q)
        except InputError as exc:
            msg = str(exc)
            assert "\n" not in msg and msg.startswith(str(q)), msg
            outcomes["refused"] += 1
            continue
        # What is read must satisfy the format's own limits (docs/formats.md).
        t = scan.thickness[np.isfinite(scan.thickness)]
        assert t.size and t.min() > 0 and t.max() <= 3 * scan.meta.nominal * (1 + 1e-6)
        assert 0 < scan.meta.nominal <= v.MAX_NOMINAL_MM and scan.pitch > 0
        outcomes["read"] += 1
    # Both outcomes occur (damage in raw data may leave a valid file; in metadata it does not).
    assert outcomes["refused"] >= 5 and outcomes["read"] >= 1, outcomes
