"""Malformed-input corpus and security checks (issue 9).

Every file in the corpus below holds exactly one fault against a valid base
file (the base files themselves pass ``check``).  Each fault must give, through
both ``scananalyse check FILE`` and ``scananalyse compare`` (the bad file as the
older or as the newer scan, a valid synthetic scan as the other one):

* exit status 2,
* exactly one stderr line, ``scananalyse: error: FILE[:LINE][: field 'NAME']: ...``,
  naming the file and the line (CSV) or the field (HDF5, header keys),
* no traceback, and no output folder (complete or partial) left behind.

The expected location of each fault comes from how the file was built (the
line the fault was written on, the key or dataset changed): synthetic ground
truth.  Rules for what counts as a fault: design contract 3.1/3.2 and
docs/formats.md (validation).

The security part checks that HDF5 links and foreign storage are refused, that
the package source has no pickle/eval/exec, and that job and manifest paths
cannot escape their folder.
"""

from __future__ import annotations

import codecs
import os
import re
from pathlib import Path

import h5py
import numpy as np
import pytest

from scananalyse.cli import main
from scananalyse.errors import InputError

# --------------------------------------------------------------------------- base files
#: The valid base CSV, one line per list item; data rows start on line 12.
#: A 3 x 4 grid at 10 mm pitch (invented tank).
BASE_HEADER = [
    "# format: scananalyse-scan 1",   # 1
    "# tank: TK-BAD-01",              # 2
    "# inspected: 2027-05-14",        # 3
    "# method: MFL",                  # 4
    "# units: mm",                    # 5
    "# pitch: 10",                    # 6
    "# nominal: 6.35",                # 7
    "# threshold: 1.0",               # 8
    "# sigma: 0.15",                  # 9
    "# installed: 1996-03-01",        # 10
    "x,y,thickness,side,plate",       # 11
]
DATA_LINE0 = len(BASE_HEADER) + 1  # file line of the first data row (12)


def base_rows() -> list[str]:
    rows = []
    k = 0
    for i in range(3):
        for j in range(4):
            t = 6.35 - 0.2 * ((i * 4 + j) % 5)
            side = ("top", "under", "unknown", "")[k % 4]
            rows.append(f"{j * 10},{i * 10},{t:.2f},{side},{k % 3}")
            k += 1
    return rows


def csv_text(header=None, rows=None) -> str:
    header = list(BASE_HEADER if header is None else header)
    rows = base_rows() if rows is None else rows
    return "\n".join(header + rows) + "\n"


def header_without(key: str) -> list[str]:
    return [h for h in BASE_HEADER if not h.startswith(f"# {key}:")]


def header_with(key: str, value: str) -> list[str]:
    return [f"# {key}: {value}" if h.startswith(f"# {key}:") else h for h in BASE_HEADER]


def rows_with(index: int, line: str) -> list[str]:
    r = base_rows()
    r[index] = line
    return r


def write_base_h5(path, *, attrs=None, drop_attrs=(), thickness=None, layers=True, ds_attrs=None,
                  drop_ds_attrs=()):
    """Write a valid floor-scan HDF5 v1 file with h5py directly (not with the package's writer)."""
    a = {"format": "scananalyse-scan", "version": np.int64(1), "tank": "TK-BAD-02",
         "inspected": "2027-05-14", "method": "UT", "units": "mm", "pitch": 10.0, "nominal": 6.35,
         "threshold": 0.5, "sigma": 0.1, "installed": "1996-03-01"}
    a.update(attrs or {})
    t = np.full((5, 6), 6.35, np.float32) if thickness is None else thickness
    if thickness is None:
        t[2, 3] = 4.1
        t[0, 0] = np.nan
    with h5py.File(path, "w") as f:
        for k, val in a.items():
            if k not in drop_attrs:
                f.attrs[k] = val
        ds = f.create_dataset("thickness", data=t)
        da = {"x0": -20.0, "y0": 5.0}
        da.update(ds_attrs or {})
        for k, val in da.items():
            if k not in drop_ds_attrs:
                ds.attrs[k] = val
        if layers and np.ndim(t) == 2:
            f.create_dataset("side", data=np.zeros(t.shape, np.int8))
            f.create_dataset("plate", data=np.zeros(t.shape, np.int32))


# --------------------------------------------------------------------------- the corpus
def _w(text: str, encoding="utf-8"):
    def build(path):
        Path(path).write_bytes(text.encode(encoding))
    return build


def _raw(data: bytes):
    def build(path):
        Path(path).write_bytes(data)
    return build


def _h5(**kw):
    def build(path):
        write_base_h5(path, **kw)
    return build


def _h5_then(fn, **kw):
    def build(path):
        write_base_h5(path, **kw)
        with h5py.File(path, "a") as f:
            fn(f, Path(path))
    return build


def _del_and(name, fn):
    def edit(f, path):
        del f[name]
        fn(f, path)
    return edit


def _external_link(f, path):
    other = path.with_name(path.stem + "_target.h5")
    with h5py.File(other, "w") as g:
        g.create_dataset("t", data=np.full((5, 6), 6.0, np.float32))
    del f["thickness"]
    f["thickness"] = h5py.ExternalLink(other.name, "/t")


def _external_link_elsewhere(f, path):
    other = path.with_name(path.stem + "_target.h5")
    with h5py.File(other, "w") as g:
        g.create_dataset("secret", data=np.arange(3))
    f["extra"] = h5py.ExternalLink(other.name, "/secret")


def _soft_link(f, path):
    data = f["thickness"][()]
    attrs = dict(f["thickness"].attrs)
    del f["thickness"]
    ds = f.create_dataset("store/t", data=data)
    for k, val in attrs.items():
        ds.attrs[k] = val
    f["thickness"] = h5py.SoftLink("/store/t")


def _dangling_soft_link(f, path):
    f["extra"] = h5py.SoftLink("/nowhere/at/all")


def _virtual(f, path):
    other = path.with_name(path.stem + "_source.h5")
    with h5py.File(other, "w") as g:
        g.create_dataset("t", data=np.full((5, 6), 6.0, np.float32))
    attrs = dict(f["thickness"].attrs)
    del f["thickness"]
    layout = h5py.VirtualLayout(shape=(5, 6), dtype=np.float32)
    layout[:] = h5py.VirtualSource(other.name, "t", shape=(5, 6))
    ds = f.create_virtual_dataset("thickness", layout, fillvalue=np.nan)
    for k, val in attrs.items():
        ds.attrs[k] = val


def _external_storage(f, path):
    raw = path.with_name(path.stem + "_raw.bin")
    np.full((5, 6), 6.0, np.float32).tofile(raw)
    attrs = dict(f["thickness"].attrs)
    del f["thickness"]
    ds = f.create_dataset("thickness", shape=(5, 6), dtype=np.float32, external=[(raw.name, 0, 5 * 6 * 4)])
    for k, val in attrs.items():
        ds.attrs[k] = val


def _replace_thickness(data, **kwargs):
    def edit(f, path):
        attrs = dict(f["thickness"].attrs)
        del f["thickness"]
        ds = f.create_dataset("thickness", data=data, **kwargs)
        for k, val in attrs.items():
            ds.attrs[k] = val
    return edit


def _huge_lazy(f, path):
    attrs = dict(f["thickness"].attrs)
    for name in ("thickness", "side", "plate"):
        del f[name]
    # Chunked and never written: the file stays tiny, the grid claims 10^10 cells.
    ds = f.create_dataset("thickness", shape=(100_000, 100_000), dtype=np.float32, chunks=(64, 64),
                          fillvalue=np.nan)
    for k, val in attrs.items():
        ds.attrs[k] = val


def _truncated(fraction):
    def build(path):
        write_base_h5(path, thickness=np.random.default_rng(7).uniform(2, 6, (300, 300)).astype(np.float32))
        data = Path(path).read_bytes()
        Path(path).write_bytes(data[: int(len(data) * fraction)])
    return build


def _big_csv_header_line(path):
    Path(path).write_text(csv_text(header=BASE_HEADER[:2] + ["# note: " + "x" * 70000] + BASE_HEADER[2:]))


def _rng_garbage(path):
    Path(path).write_bytes(np.random.default_rng(42).integers(0, 256, 4096, dtype=np.uint8).tobytes())


def _h5_named_csv(path):
    write_base_h5(path)


def _nul_deep(path):
    # 1200 rows (beyond the reader's first 8 KiB), a NUL byte on the 601st.
    rows = [f"{(k % 40) * 10},{(k // 40) * 10},6.2,top,1" for k in range(1200)]
    rows[600] = rows[600].replace("6.2", "6\x00.2")
    Path(path).write_bytes(csv_text(rows=rows).encode())


def _utf16(path):
    Path(path).write_bytes(codecs.BOM_UTF16_LE + csv_text().encode("utf-16-le"))


L = DATA_LINE0  # first data line


def F(path, line=None, field=None) -> str:
    """Regex of the expected location prefix (errors.where format)."""
    s = re.escape(str(path))
    if line is not None:
        s += f":{line}"
    if field is not None:
        s += re.escape(f": field '{field}'")
    return s + ":"


#: (case id, file suffix, builder(path), (line, field) expected; line/field None = not applicable)
CASES = [
    # --- CSV: whole file and header
    ("csv-empty-file", ".csv", _raw(b""), (None, "format")),
    ("csv-only-blank-lines", ".csv", _raw(b"\n\n  \n"), (None, "format")),
    ("csv-header-only", ".csv", _w("\n".join(BASE_HEADER[:-1]) + "\n"), (None, None)),
    ("csv-column-row-no-data", ".csv", _w(csv_text(rows=[])), (11, None)),
    ("csv-missing-format-line", ".csv", _w(csv_text(header=BASE_HEADER[1:])), (None, "format")),
    ("csv-unknown-format", ".csv", _w(csv_text(header=header_with("format", "floorgrid 1"))), (1, "format")),
    ("csv-unsupported-version", ".csv", _w(csv_text(header=header_with("format", "scananalyse-scan 7"))),
     (1, "format")),
    ("csv-missing-inspected", ".csv", _w(csv_text(header=header_without("inspected"))), (None, "inspected")),
    ("csv-missing-units", ".csv", _w(csv_text(header=header_without("units"))), (None, "units")),
    ("csv-missing-pitch", ".csv", _w(csv_text(header=header_without("pitch"))), (None, "pitch")),
    ("csv-missing-nominal", ".csv", _w(csv_text(header=header_without("nominal"))), (None, "nominal")),
    ("csv-empty-required-value", ".csv", _w(csv_text(header=header_with("nominal", ""))), (7, "nominal")),
    ("csv-repeated-key", ".csv", _w(csv_text(header=BASE_HEADER[:6] + ["# pitch: 12"] + BASE_HEADER[6:])),
     (7, "pitch")),
    ("csv-bad-date", ".csv", _w(csv_text(header=header_with("inspected", "2024-13-40"))), (3, "inspected")),
    ("csv-date-not-iso", ".csv", _w(csv_text(header=header_with("inspected", "14/05/2024"))), (3, "inspected")),
    ("csv-bad-installed-date", ".csv", _w(csv_text(header=header_with("installed", "spring 1996"))),
     (10, "installed")),
    ("csv-bad-units", ".csv", _w(csv_text(header=header_with("units", "cm"))), (5, "units")),
    ("csv-non-numeric-pitch", ".csv", _w(csv_text(header=header_with("pitch", "ten"))), (6, "pitch")),
    ("csv-zero-pitch", ".csv", _w(csv_text(header=header_with("pitch", "0"))), (6, "pitch")),
    ("csv-negative-nominal", ".csv", _w(csv_text(header=header_with("nominal", "-6.35"))), (7, "nominal")),
    ("csv-nan-nominal", ".csv", _w(csv_text(header=header_with("nominal", "nan"))), (7, "nominal")),
    ("csv-negative-threshold", ".csv", _w(csv_text(header=header_with("threshold", "-1"))), (8, "threshold")),
    ("csv-non-numeric-sigma", ".csv", _w(csv_text(header=header_with("sigma", "0,15"))), (9, "sigma")),
    ("csv-header-line-too-long", ".csv", _big_csv_header_line, (3, None)),
    # --- CSV: table
    ("csv-missing-thickness-column", ".csv",
     _w(csv_text(header=BASE_HEADER[:-1] + ["x,y,side,plate"], rows=[",".join(r.split(",")[:2] + r.split(",")[3:])
                                                                    for r in base_rows()])),
     (11, "thickness")),
    ("csv-repeated-column", ".csv", _w(csv_text(header=BASE_HEADER[:-1] + ["x,y,thickness,x"],
                                                rows=[",".join(r.split(",")[:3] + ["0"]) for r in base_rows()])),
     (11, "x")),
    ("csv-non-numeric-thickness", ".csv", _w(csv_text(rows=rows_with(4, "0,10,abc,top,1"))), (L + 4, "thickness")),
    ("csv-non-numeric-x", ".csv", _w(csv_text(rows=rows_with(2, "2O,0,6.1,top,2"))), (L + 2, "x")),
    ("csv-inf-thickness", ".csv", _w(csv_text(rows=rows_with(5, "10,10,inf,top,2"))), (L + 5, "thickness")),
    ("csv-nan-thickness", ".csv", _w(csv_text(rows=rows_with(5, "10,10,nan,top,2"))), (L + 5, "thickness")),
    ("csv-empty-thickness", ".csv", _w(csv_text(rows=rows_with(6, "20,10,,top,0"))), (L + 6, "thickness")),
    ("csv-zero-thickness", ".csv", _w(csv_text(rows=rows_with(7, "30,10,0,top,1"))), (L + 7, "thickness")),
    ("csv-negative-thickness", ".csv", _w(csv_text(rows=rows_with(8, "0,20,-1.5,top,2"))), (L + 8, "thickness")),
    ("csv-absurd-thickness", ".csv", _w(csv_text(rows=rows_with(9, "10,20,63.5,top,0"))), (L + 9, "thickness")),
    ("csv-short-row", ".csv", _w(csv_text(rows=rows_with(3, "30,0,6.3"))), (L + 3, None)),
    ("csv-extra-field", ".csv", _w(csv_text(rows=rows_with(3, "30,0,6.3,top,0,99"))), (L + 3, None)),
    ("csv-duplicate-cell", ".csv", _w(csv_text(rows=rows_with(6, "10,0,6.2,top,0"))), (L + 6, None)),
    ("csv-off-grid-cell", ".csv", _w(csv_text(rows=rows_with(5, "10,13.7,6.1,top,2"))), (L + 5, "y")),
    ("csv-bad-side", ".csv", _w(csv_text(rows=rows_with(1, "10,0,6.15,bottom,1"))), (L + 1, "side")),
    ("csv-bad-plate", ".csv", _w(csv_text(rows=rows_with(1, "10,0,6.15,under,1.5"))), (L + 1, "plate")),
    ("csv-absurd-extent", ".csv", _w(csv_text(rows=rows_with(11, "3000000000,2000000000,6.1,top,1"))), (11, "x, y")),
    ("csv-absurd-grid-keys", ".csv",
     _w(csv_text(header=BASE_HEADER[:-1] + ["# x0: 0", "# y0: 0", "# rows: 1000000", "# cols: 1000000",
                                            BASE_HEADER[-1]])), (13, "rows")),
    ("csv-partial-grid-keys", ".csv", _w(csv_text(header=BASE_HEADER[:-1] + ["# x0: 0", BASE_HEADER[-1]])),
     (11, "y0")),
    ("csv-cell-outside-grid-keys", ".csv",
     _w(csv_text(header=BASE_HEADER[:-1] + ["# x0: 0", "# y0: 0", "# rows: 3", "# cols: 3", BASE_HEADER[-1]])),
     (L + 4 + 3, None)),
    ("csv-binary-garbage", ".csv", _rng_garbage, (1, None)),
    ("csv-nul-in-table", ".csv", _raw(csv_text().replace("6.35,top", "6.3\x005,top").encode()), (L, None)),
    ("csv-nul-deep-in-table", ".csv", _nul_deep, (L + 600, None)),
    ("csv-utf16-export", ".csv", _utf16, (1, None)),
    ("csv-latin1-export", ".csv", _w(csv_text(header=header_with("tank", "Réservoir Süd 4")), "latin-1"),
     (2, None)),
    ("csv-latin1-in-table", ".csv",
     _w(csv_text(rows=rows_with(2, "20,0,6.25,unknown°,2")), "latin-1"), (L + 2, None)),
    ("csv-is-really-hdf5", ".csv", _h5_named_csv, (1, None)),
    ("txt-unknown-extension", ".dat", _w(csv_text()), (None, None)),
    # --- HDF5
    ("h5-text-file", ".h5", _w(csv_text()), (None, None)),
    ("h5-empty-file", ".h5", _raw(b""), (None, None)),
    ("h5-truncated-half", ".h5", _truncated(0.5), (None, None)),
    ("h5-truncated-superblock", ".h5", _truncated(0.002), (None, None)),
    ("h5-missing-format", ".h5", _h5(drop_attrs=("format",)), (None, "format")),
    ("h5-wrong-format", ".h5", _h5(attrs={"format": "floorgrid"}), (None, "format")),
    ("h5-wrong-version", ".h5", _h5(attrs={"version": np.int64(2)}), (None, "version")),
    ("h5-string-version", ".h5", _h5(attrs={"version": "1"}), (None, "version")),
    ("h5-missing-pitch", ".h5", _h5(drop_attrs=("pitch",)), (None, "pitch")),
    ("h5-string-pitch", ".h5", _h5(attrs={"pitch": "ten"}), (None, "pitch")),
    ("h5-bad-units", ".h5", _h5(attrs={"units": "furlong"}), (None, "units")),
    ("h5-bad-date", ".h5", _h5(attrs={"inspected": "2027-02-30"}), (None, "inspected")),
    ("h5-non-utf8-attribute", ".h5", _h5(attrs={"tank": np.bytes_(b"T\xe4nk 9")}), (None, "tank")),
    ("h5-reserved-root-x0", ".h5", _h5(attrs={"x0": 0.0}), (None, "x0")),
    ("h5-missing-thickness", ".h5", _h5_then(lambda f, p: f.__delitem__("thickness")), (None, "thickness")),
    ("h5-thickness-is-group", ".h5", _h5_then(_del_and("thickness", lambda f, p: f.create_group("thickness"))),
     (None, "thickness")),
    ("h5-thickness-1d", ".h5", _h5(thickness=np.full(30, 6.0, np.float32), layers=False), (None, "thickness")),
    ("h5-thickness-3d", ".h5", _h5(thickness=np.full((2, 5, 6), 6.0, np.float32), layers=False),
     (None, "thickness")),
    ("h5-thickness-strings", ".h5", _h5_then(_replace_thickness(np.array([["6.3"] * 6] * 5, dtype="S4"))),
     (None, "thickness")),
    ("h5-thickness-int", ".h5", _h5_then(_replace_thickness(np.full((5, 6), 6, np.int16))), (None, "thickness")),
    ("h5-thickness-empty", ".h5", _h5(thickness=np.zeros((0, 6), np.float32), layers=False), (None, "thickness")),
    ("h5-thickness-all-nan", ".h5", _h5(thickness=np.full((5, 6), np.nan, np.float32)), (None, "thickness")),
    ("h5-thickness-inf", ".h5", _h5(thickness=np.where(np.eye(5, 6) > 0, np.inf, 6.0).astype(np.float32)),
     (None, "thickness")),
    ("h5-thickness-negative", ".h5", _h5(thickness=np.full((5, 6), -2.0, np.float32)), (None, "thickness")),
    ("h5-absurd-grid", ".h5", _h5_then(_huge_lazy), (None, "thickness")),
    ("h5-missing-x0", ".h5", _h5(drop_ds_attrs=("x0",)), (None, "thickness.x0")),
    ("h5-nan-y0", ".h5", _h5(ds_attrs={"y0": np.nan}), (None, "thickness.y0")),
    ("h5-side-wrong-shape", ".h5",
     _h5_then(_del_and("side", lambda f, p: f.create_dataset("side", data=np.zeros((6, 5), np.int8)))),
     (None, "side")),
    ("h5-plate-wrong-shape", ".h5",
     _h5_then(_del_and("plate", lambda f, p: f.create_dataset("plate", data=np.zeros(30, np.int32)))),
     (None, "plate")),
    ("h5-side-bad-code", ".h5",
     _h5_then(_del_and("side", lambda f, p: f.create_dataset("side", data=np.full((5, 6), 5, np.int8)))),
     (None, "side")),
    ("h5-side-float", ".h5",
     _h5_then(_del_and("side", lambda f, p: f.create_dataset("side", data=np.ones((5, 6), np.float32)))),
     (None, "side")),
    ("h5-external-link", ".h5", _h5_then(_external_link), (None, "thickness")),
    ("h5-external-link-elsewhere", ".h5", _h5_then(_external_link_elsewhere), (None, "extra")),
    ("h5-soft-link", ".h5", _h5_then(_soft_link), (None, "thickness")),
    ("h5-dangling-soft-link", ".h5", _h5_then(_dangling_soft_link), (None, "extra")),
    ("h5-virtual-dataset", ".h5", _h5_then(_virtual), (None, "thickness")),
    ("h5-external-storage", ".h5", _h5_then(_external_storage), (None, "thickness")),
]
CASE_IDS = [c[0] for c in CASES]
assert len(set(CASE_IDS)) == len(CASE_IDS)


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    """Build every corpus file in its own folder; returns id -> (path, expected location regex)."""
    root = tmp_path_factory.mktemp("bad")
    out = {}
    for cid, suffix, build, (line, field) in CASES:
        d = root / cid
        d.mkdir()
        path = d / f"{cid}{suffix}"
        build(path)
        out[cid] = (path, F(path, line, field))
    return out


@pytest.fixture(scope="module")
def good_pair(tmp_path_factory):
    """A small valid synthetic pair written with the package's writer (HDF5 and CSV)."""
    from scananalyse.io import write_scan
    from scananalyse.synth import make_pair

    d = tmp_path_factory.mktemp("good")
    pair = make_pair(diameter_mm=4000, pitch_new=20, pitch_old=25, seed=5)
    paths = {}
    for tag, scan in (("old", pair.old), ("new", pair.new)):
        for ext in ("h5", "csv"):
            p = d / f"{tag}.{ext}"
            write_scan(scan, p)
            paths[f"{tag}_{ext}"] = p
    return paths


def run_cli(argv, capsys):
    """Run the CLI in-process; returns (status, stdout, stderr lines)."""
    capsys.readouterr()
    status = main([str(a) for a in argv])
    cap = capsys.readouterr()
    return status, cap.out, [ln for ln in cap.err.splitlines()]


def assert_one_error_line(status, err_lines, location_regex):
    assert status == 2, (status, err_lines)
    assert len(err_lines) == 1, err_lines
    line = err_lines[0]
    assert "Traceback" not in line
    assert line.startswith("scananalyse: error: "), line
    # The file is named and, where the fault has one, the line and/or field.
    assert re.match(location_regex, line[len("scananalyse: error: "):]), (location_regex, line)


def listing(folder: Path) -> set:
    return {p.name for p in folder.iterdir()}


# --------------------------------------------------------------------------- tests
def test_corpus_size():
    # issue 9 asks for at least 30 distinct faults across CSV and HDF5.
    n_csv = sum(1 for c in CASES if c[0].startswith(("csv", "txt")))
    n_h5 = sum(1 for c in CASES if c[0].startswith("h5"))
    assert n_csv >= 15 and n_h5 >= 15 and len(CASES) >= 30


@pytest.mark.parametrize("suffix", [".csv", ".h5"])
def test_base_files_are_valid(tmp_path, capsys, suffix):
    """The corpus differs from valid files by one fault each: the bases pass check."""
    p = tmp_path / f"base{suffix}"
    if suffix == ".csv":
        p.write_text(csv_text())
    else:
        write_base_h5(p)
    status, out, err = run_cli(["check", p], capsys)
    assert status == 0, err
    assert err == []
    assert "valid floor-scan file" in out


@pytest.mark.parametrize("cid", CASE_IDS)
def test_check_refuses(corpus, capsys, cid):
    path, loc = corpus[cid]
    before = listing(path.parent)
    status, out, err = run_cli(["check", path], capsys)
    assert_one_error_line(status, err, loc)
    assert out == ""
    assert listing(path.parent) == before


@pytest.mark.parametrize("position", ["old", "new"])
@pytest.mark.parametrize("cid", CASE_IDS)
def test_compare_refuses(corpus, good_pair, capsys, tmp_path, cid, position):
    path, loc = corpus[cid]
    if position == "old":
        args = [path, good_pair["new_h5"]]
    else:
        args = [good_pair["old_h5"], path]
    out_dir = tmp_path / "result"
    before = listing(path.parent)
    status, out, err = run_cli(["compare", *args, "--diameter", "4000", "--out", out_dir, "--quiet"], capsys)
    assert_one_error_line(status, err, loc)
    assert list(tmp_path.iterdir()) == [], "an output folder (complete or partial) was left behind"
    assert listing(path.parent) == before


# --------------------------------------------------------------------------- job files
JOB_CASES = [
    # (id, job text, expected field)
    ("job-unknown-key", "[floor]\ndiameter = 3000\nradius = 1500\n", "floor.radius"),
    ("job-unknown-section", "[floorplan]\ndiameter = 3000\n", "floorplan.diameter"),
    ("job-wrong-type-number", "[floor]\ndiameter = \"3000\"\n", "floor.diameter"),
    ("job-wrong-type-bool", "[floor]\ndiameter = 3000\n[protection]\ncp_effective = \"yes\"\n",
     "protection.cp_effective"),
    ("job-bool-for-number", "[floor]\ndiameter = true\n", "floor.diameter"),
    ("job-negative-number", "[floor]\ndiameter = 3000\n[repair]\ntarget_interval = -5\n", "repair.target_interval"),
    ("job-nan-number", "[floor]\ndiameter = nan\n", "floor.diameter"),
    ("job-bad-centre", "[floor]\ndiameter = 3000\ncentre = [1, \"a\"]\n", "floor.centre"),
    ("job-bad-side-choice", "[floor]\ndiameter = 3000\n[attribution]\ndefault_side = \"left\"\n",
     "attribution.default_side"),
    ("job-top-level-value", "diameter = 3000\n", "diameter"),
    ("job-path-escapes", "[floor]\ndiameter = 3000\n[attribution]\nshapes = \"../outside.csv\"\n",
     "attribution.shapes"),
    ("job-absolute-path", "[floor]\ndiameter = 3000\n[attribution]\nrepairs = \"/etc/hostname\"\n",
     "attribution.repairs"),
]


@pytest.mark.parametrize("cid,text,field", JOB_CASES, ids=[c[0] for c in JOB_CASES])
def test_job_file_refused(good_pair, capsys, tmp_path, cid, text, field):
    jobdir = tmp_path / "jobs"
    jobdir.mkdir()
    job = jobdir / "job.toml"
    job.write_text(text)
    out_dir = tmp_path / "result"
    status, out, err = run_cli(["compare", good_pair["old_h5"], good_pair["new_h5"], "--job", job,
                                "--out", out_dir, "--quiet"], capsys)
    assert_one_error_line(status, err, F(job, None, field))
    assert listing(tmp_path) == {"jobs"}


@pytest.mark.parametrize("cid,data", [("job-not-toml", b"[floor\ndiameter = 3000\n"),
                                      ("job-not-utf8", "[floor]\n# Réservoir\ndiameter = 3000\n".encode("latin-1")),
                                      ("job-binary", b"\x00\x01\x02\xff" * 64)])
def test_job_file_unreadable(good_pair, capsys, tmp_path, cid, data):
    job = tmp_path / "job.toml"
    job.write_bytes(data)
    out_dir = tmp_path / "result"
    status, out, err = run_cli(["compare", good_pair["old_h5"], good_pair["new_h5"], "--job", job,
                                "--out", out_dir, "--quiet"], capsys)
    assert_one_error_line(status, err, F(job))
    assert listing(tmp_path) == {"job.toml"}


# --------------------------------------------------------------------------- shapes files
SHAPES_HEAD = "# format: scananalyse-shapes 1\n# units: mm\nshape,side,x,y,r,w,h,points\n"
SHAPES_CASES = [
    # (id, body lines after the header row (line 4 on), expected (line, field))
    # 3 m floor: every grid cell lies within about 1.6 m of the centre.
    ("shapes-outside-floor", "circle,top,0,0,100,,,\nrect,under,250000,-480000,,800,400,\n", (5, None)),
    ("shapes-polygon-outside", "polygon,top,,,,,,\"90000 90000; 91000 90000; 90500 91000\"\n", (4, None)),
    ("shapes-bad-side", "circle,sideways,0,0,100,,,\n", (4, "side")),
    ("shapes-unknown-shape", "ellipse,top,0,0,100,,,\n", (4, "shape")),
    ("shapes-negative-radius", "circle,top,0,0,-100,,,\n", (4, "r")),
    ("shapes-zero-area-polygon", "polygon,top,,,,,,\"0 0; 10 10; 20 20\"\n", (4, "points")),
    ("shapes-too-many-fields", "circle,top,0,0,100,,,,9\n", (4, None)),
]


@pytest.mark.parametrize("cid,body,loc", SHAPES_CASES, ids=[c[0] for c in SHAPES_CASES])
def test_shapes_file_refused(good_pair, capsys, tmp_path, cid, body, loc):
    shapes = tmp_path / "inputs" / "sides.csv"
    shapes.parent.mkdir()
    shapes.write_text(SHAPES_HEAD + body)
    out_dir = tmp_path / "result"
    status, out, err = run_cli(["compare", good_pair["old_h5"], good_pair["new_h5"], "--diameter", "4000",
                                "--shapes", shapes, "--out", out_dir, "--quiet"], capsys)
    assert_one_error_line(status, err, F(os.path.abspath(shapes), *loc))
    assert listing(tmp_path) == {"inputs"}, "an output folder (complete or partial) was left behind"


# --------------------------------------------------------------------------- security
PACKAGE = Path(__file__).resolve().parents[1] / "scananalyse"


def test_no_pickle_eval_exec_in_package():
    """Input files are data: nothing in the package deserialises objects or runs strings as code."""
    pattern = re.compile(r"\bimport\s+(pickle|cPickle|dill|marshal|shelve)\b|\bfrom\s+(pickle|dill|marshal|shelve)\b"
                         r"|\bpickle\.|\beval\s*\(|\bexec\s*\(|allow_pickle\s*=\s*True|read_pickle\s*\("
                         r"|yaml\.load\s*\(|shell\s*=\s*True|os\.system\s*\(")
    files = sorted(PACKAGE.rglob("*.py"))
    assert len(files) > 10
    hits = []
    for f in files:
        for n, line in enumerate(f.read_text(encoding="utf-8").splitlines(), start=1):
            if pattern.search(line):
                hits.append(f"{f.relative_to(PACKAGE)}:{n}: {line.strip()}")
    assert hits == []


def test_h5_readers_refuse_links_directly(corpus):
    """The refusal is in io itself, not only in the CLI (a notebook user calls read_scan)."""
    from scananalyse.io import read_scan

    for cid, what in [("h5-external-link", "external link"), ("h5-external-link-elsewhere", "external link"),
                      ("h5-soft-link", "soft link"), ("h5-dangling-soft-link", "soft link"),
                      ("h5-virtual-dataset", "virtual dataset"), ("h5-external-storage", "external storage")]:
        path, _ = corpus[cid]
        with pytest.raises(InputError, match=re.escape(what)):
            read_scan(path)


def _job_with(tmp_path, body: str) -> Path:
    d = tmp_path / "site"
    d.mkdir(exist_ok=True)
    p = d / "job.toml"
    p.write_text("[floor]\ndiameter = 3000\n" + body)
    return p


def test_job_paths_relative_to_job_file(tmp_path, monkeypatch):
    from scananalyse.job import read_job

    job = _job_with(tmp_path, "[attribution]\nshapes = \"data/sides.csv\"\n")
    monkeypatch.chdir(tmp_path)  # the current folder must not matter
    j = read_job(job)
    assert Path(j.shapes) == (tmp_path / "site" / "data" / "sides.csv").resolve()


def test_job_symlink_escape_refused(tmp_path):
    from scananalyse.job import read_job

    outside = tmp_path / "elsewhere"
    outside.mkdir()
    (outside / "sides.csv").write_text(SHAPES_HEAD)
    job = _job_with(tmp_path, "[attribution]\nshapes = \"link/sides.csv\"\n")
    (job.parent / "link").symlink_to(outside, target_is_directory=True)
    with pytest.raises(InputError, match=r"job\.toml: field 'attribution\.shapes': path 'link/sides\.csv' escapes"):
        read_job(job)


def test_job_allow_absolute_option(tmp_path):
    from scananalyse.job import read_job

    target = tmp_path / "elsewhere.csv"
    job = _job_with(tmp_path, f"[attribution]\nshapes = \"{target}\"\n")
    with pytest.raises(InputError, match="absolute path"):
        read_job(job)
    job = _job_with(tmp_path, f"[attribution]\nshapes = \"{target}\"\n[paths]\nallow_absolute = true\n")
    assert read_job(job).shapes == str(target)
    job = _job_with(tmp_path, "[attribution]\nshapes = \"../elsewhere.csv\"\n[paths]\nallow_absolute = true\n")
    assert Path(read_job(job).shapes) == target.resolve()


@pytest.mark.parametrize("entry", ["../outside/old.h5", "sub/../../old.h5"])
def test_manifest_paths_resolve_against_the_manifest(tmp_path, entry):
    # A user's manifest names files the user can read anyway (issue 21): relative paths are
    # taken from the manifest's folder, even when they leave it; absolute paths as they are.
    from scananalyse.fleet import read_manifest

    d = tmp_path / "fleet"
    d.mkdir()
    m = d / "manifest.csv"
    m.write_text(f"tank,old,new,diameter\nTK-1,{entry},{tmp_path / 'new.h5'},4000\n")
    rows = read_manifest(m)
    assert Path(rows[0]["old"]) == (d / entry).resolve()
    assert Path(rows[0]["new"]) == (tmp_path / "new.h5").resolve()


def test_manifest_device_row_refused(tmp_path):
    # Unsafe to open (a device never ends): one line naming the row and field, exit 2.
    from scananalyse.fleet import read_manifest

    m = tmp_path / "manifest.csv"
    m.write_text("tank,old,new,diameter\nTK-1,/dev/zero,new.h5,4000\n")
    with pytest.raises(InputError, match=re.escape("manifest.csv:2: field 'old'")):
        read_manifest(m)


def test_check_never_writes_next_to_input(corpus, capsys):
    """check on a hostile HDF5 file neither follows its links nor creates files beside it."""
    path, _ = corpus["h5-external-link"]
    target = path.with_name(path.stem + "_target.h5")
    before = target.stat().st_mtime_ns, target.read_bytes()
    run_cli(["check", path], capsys)
    assert (target.stat().st_mtime_ns, target.read_bytes()) == before


# --------------------------------------------------------------------------- fuzz finds
#: Files found by fuzz/fuzz_readers.py (mutations of valid files), kept in tests/data/bad/.
FOUND = Path(__file__).resolve().parent / "data" / "bad"
FOUND_FILES = sorted(p.name for p in FOUND.iterdir() if p.suffix in (".csv", ".h5"))


def test_found_files_present():
    assert len(FOUND_FILES) >= 5


@pytest.mark.parametrize("name", FOUND_FILES)
def test_fuzz_found_files_refused(good_pair, capsys, tmp_path, name):
    """Corrupt files (a CR inside a table row; damaged HDF5 object headers, attribute tables,
    link heaps, datatypes) are bad input: exit 2, one line naming the file, through check and compare."""
    src = FOUND / name
    path = tmp_path / name  # a copy, so the test never touches the kept file
    path.write_bytes(src.read_bytes())
    status, out, err = run_cli(["check", path], capsys)
    assert_one_error_line(status, err, F(path))
    out_dir = tmp_path / "result"
    status, out, err = run_cli(["compare", good_pair["old_h5"], path, "--diameter", "4000", "--out", out_dir,
                                "--quiet"], capsys)
    assert_one_error_line(status, err, F(path))
    assert sorted(p.name for p in tmp_path.iterdir()) == [name]
