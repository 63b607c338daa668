"""Floor-scan HDF5, version 1: read and write (design contract 3.2, docs/formats.md).

Layout: root attributes ``format``, ``version`` and the CSV header keys; dataset
``thickness`` (rows, cols) with attributes ``x0``, ``y0``; optional ``side``
(int8) and ``plate`` (int32) datasets on the same grid.  Soft links, external
links, virtual datasets and datasets with external raw storage are refused:
a scan file must not read data from anywhere else.
"""

from __future__ import annotations

import os

import h5py
import numpy as np

from ..errors import InputError, where
from ..scan import PLATE_NONE, FloorScan
from . import validate as v

__all__ = ["read_h5_scan", "write_h5_scan", "COMPRESSION", "CHUNK"]

#: Compression filter of written datasets (gzip level 4 with byte shuffle).
COMPRESSION = {"compression": "gzip", "compression_opts": 4, "shuffle": True}
#: Largest chunk edge of written datasets. [cells]
CHUNK = 512
#: Rows converted per block when the stored thickness is not float32 mm.
_BLOCK_ROWS = 1024
#: Largest chunk (uncompressed) of a dataset that is read: HDF5 holds a whole chunk in
#: memory to read any part of it.  Written chunks are 512 x 512 x 8 bytes = 2 MiB. [bytes]
MAX_CHUNK_BYTES = 64 << 20
#: Most chunks in one dataset (each is looked at before reading; written files have a
#: few thousand at most).
MAX_CHUNKS = 1_000_000
#: A stored chunk may be larger than its data by at most this fraction plus
#: :data:`_CHUNK_SLACK` bytes: no lossless filter expands data more (deflate adds about
#: 5 bytes per 16 KiB block).  A larger stored chunk would decompress to more than the
#: chunk holds: a compression bomb.
_CHUNK_GROWTH = 0.125
_CHUNK_SLACK = 4096
#: A dataset may declare at most this many bytes of data per byte of the file: deflate
#: cannot compress more than about 1032 to 1 (zlib's technical notes), so more is data
#: that is not stored (a crafted or corrupt file whose reading would only allocate).
MAX_DECLARED_PER_FILE_BYTE = 1100


def _refuse_links(f: h5py.File, path: str) -> None:
    """Refuse soft and external links anywhere in the file."""
    problem = []

    def visit(name, link):
        if isinstance(link, h5py.ExternalLink):
            problem.append(f"{where(path, None, name)}: external link to {link.filename}:{link.path} "
                           "refused (a scan file must be self-contained)")
            return True
        if isinstance(link, h5py.SoftLink):
            problem.append(f"{where(path, None, name)}: soft link to {link.path} refused "
                           "(store the data, not a link)")
            return True
        return None

    f.visititems_links(visit)
    if problem:
        raise InputError(problem[0])


def _dataset(f: h5py.File, name: str, path: str, *, required: bool):
    if name not in f:
        if required:
            raise InputError(f"{where(path, None, name)}: dataset missing")
        return None
    obj = f[name]
    if not isinstance(obj, h5py.Dataset):
        raise InputError(f"{where(path, None, name)}: expected a dataset, found a group")
    if obj.is_virtual:
        raise InputError(f"{where(path, None, name)}: virtual dataset refused (a scan file must be "
                         "self-contained)")
    if obj.external:
        raise InputError(f"{where(path, None, name)}: dataset with external storage refused (a scan "
                         "file must be self-contained)")
    return obj


def _check_storage(ds, path: str, name: str, file_size: int) -> None:
    """Refuse, before anything is read, a dataset whose reading would allocate far more than
    the file holds: too much declared data for the file's size, chunks above
    :data:`MAX_CHUNK_BYTES` or too many of them, or a stored chunk larger than its data
    can be after any lossless filter (a compression bomb)."""
    itemsize = ds.dtype.itemsize
    declared = float(np.prod([float(n) for n in ds.shape])) * itemsize
    if declared > MAX_DECLARED_PER_FILE_BYTE * float(file_size) + (1 << 20):
        raise InputError(f"{where(path, None, name)}: declares {declared:.3g} bytes of data in a file of "
                         f"{file_size} bytes, more than any compression stores; a corrupt or crafted file")
    chunks = ds.chunks
    if chunks is None:
        return
    chunk_bytes = float(np.prod([float(n) for n in chunks])) * itemsize
    if chunk_bytes > MAX_CHUNK_BYTES:
        raise InputError(f"{where(path, None, name)}: chunks of {tuple(chunks)} cells ({chunk_bytes:.3g} bytes) "
                         f"exceed the limit of {MAX_CHUNK_BYTES >> 20} MiB; rewrite with smaller chunks")
    dsid = ds.id
    n = dsid.get_num_chunks()
    if n > MAX_CHUNKS:
        raise InputError(f"{where(path, None, name)}: {n} chunks, above the limit of {MAX_CHUNKS}; "
                         "rewrite with larger chunks")
    most = chunk_bytes * (1 + _CHUNK_GROWTH) + _CHUNK_SLACK
    for k in range(n):
        info = dsid.get_chunk_info(k)
        if info.size > most:
            raise InputError(f"{where(path, None, name)}: chunk at {tuple(info.chunk_offset)} stores "
                             f"{info.size} bytes for {chunk_bytes:.0f} bytes of data; a compression bomb "
                             "or a corrupt file")


def _attr(obj, key, path, field):
    try:
        return obj.attrs[key]
    except KeyError:
        raise InputError(f"{where(path, None, field)}: attribute missing") from None
    except (OSError, TypeError, ValueError) as exc:
        raise InputError(f"{where(path, None, field)}: attribute unreadable ({exc})") from None


def _read(ds, path, name, sel=()):
    try:
        return ds[sel]
    except (OSError, ValueError, TypeError) as exc:
        raise InputError(f"{where(path, None, name)}: cannot read the data (truncated or corrupt "
                         f"file: {' '.join(str(exc).split())})") from None


def _layer(f, name, shape, path, kinds_ok, lo, hi, out_dtype):
    ds = _dataset(f, name, path, required=False)
    if ds is None:
        return None
    if ds.shape != shape:
        raise InputError(f"{where(path, None, name)}: shape {ds.shape} differs from thickness {shape}")
    if ds.dtype.kind not in kinds_ok or ds.dtype.itemsize > 8:
        raise InputError(f"{where(path, None, name)}: dtype {ds.dtype} is not an integer type")
    _check_storage(ds, path, name, os.path.getsize(path))
    data = _read(ds, path, name)
    bad = (data < lo) | (data > hi)
    if bad.any():
        idx = np.unravel_index(int(np.argmax(bad)), shape)
        raise InputError(f"{where(path, None, name)}: invalid code {data[idx].item()!r} at "
                         f"[{idx[0]}, {idx[1]}] (allowed {lo}..{hi})")
    return data.astype(out_dtype, copy=False)


def _read_open(f: h5py.File, path: str):
    """Validate and read an open scan file: (t, x0, y0, pitch_mm, meta, factor, side, plate)."""
    _refuse_links(f, path)
    fmt = v.parse_text(_attr(f, "format", path, "format"), path, None, "format")
    if fmt != v.FORMAT_NAME:
        raise InputError(f"{where(path, None, 'format')}: {fmt!r} is not the floor-scan format "
                         f"'{v.FORMAT_NAME}'")
    version = _attr(f, "version", path, "version")
    try:
        ok = np.ndim(version) == 0 and float(version) == v.FORMAT_VERSION
    except (TypeError, ValueError):
        ok = False
    if not ok or isinstance(version, (str, bytes)):
        shown = version.item() if isinstance(version, np.generic) else version
        raise InputError(f"{where(path, None, 'version')}: unsupported version {shown!r} "
                         f"(this reader knows version {v.FORMAT_VERSION})")
    fields = {}
    for key in f.attrs:
        if key in ("format", "version"):
            continue
        fields[key] = (_attr(f, key, path, key), None)
    fields["format"] = (fmt, None)
    reserved = [k for k in fields if k in v.GRID_KEYS]
    if reserved:
        raise InputError(f"{where(path, None, reserved[0])}: reserved root attribute (the grid "
                         "anchor belongs on the thickness dataset)")
    meta, pitch_mm, factor = v.build_meta(fields, path)

    ds = _dataset(f, "thickness", path, required=True)
    if ds.ndim != 2:
        raise InputError(f"{where(path, None, 'thickness')}: must be 2-D (rows, cols), "
                         f"has shape {ds.shape}")
    if ds.dtype not in (np.dtype("<f4"), np.dtype(">f4"), np.dtype("<f8"), np.dtype(">f8")):
        raise InputError(f"{where(path, None, 'thickness')}: dtype {ds.dtype} is not float32 "
                         "or float64")
    rows, cols = ds.shape
    if rows == 0 or cols == 0:
        raise InputError(f"{where(path, None, 'thickness')}: empty grid {ds.shape}")
    v.check_grid_size(rows, cols, path, None, "thickness")
    _check_storage(ds, path, "thickness", os.path.getsize(path))
    x0 = v.parse_number(_attr(ds, "x0", path, "thickness.x0"), path, None, "thickness.x0",
                        sign="any")
    y0 = v.parse_number(_attr(ds, "y0", path, "thickness.y0"), path, None, "thickness.y0",
                        sign="any")

    if factor == 1.0 and ds.dtype.itemsize == 4:
        t = _read(ds, path, "thickness")
        if t.dtype != np.float32:  # big-endian on disk
            t = t.astype(np.float32)
    else:
        # Convert block by block: no full float64 copy of the grid.
        t = np.empty((rows, cols), dtype=np.float32)
        for r0 in range(0, rows, _BLOCK_ROWS):
            block = _read(ds, path, "thickness", np.s_[r0:r0 + _BLOCK_ROWS]).astype(np.float64)
            if factor != 1.0:
                block *= factor
            t[r0:r0 + block.shape[0]] = block
    bad = v.first_bad_thickness(t, meta.nominal, 1.0, allow_nan=True)
    if bad is not None:
        i, j = np.unravel_index(bad, t.shape)
        problem = v.thickness_problem(float(t[i, j]) / factor, meta.nominal, factor)
        raise InputError(f"{where(path, None, 'thickness')}: at [{i}, {j}]: {problem}")
    if not np.isfinite(t).any():
        raise InputError(f"{where(path, None, 'thickness')}: no scanned cells (all NaN)")
    side = _layer(f, "side", t.shape, path, "iu", 0, 2, np.int8)
    plate = _layer(f, "plate", t.shape, path, "iu", PLATE_NONE, np.iinfo(np.int32).max, np.int32)
    return t, x0, y0, pitch_mm, meta, factor, side, plate


def read_h5_scan(path) -> FloorScan:
    """Read a floor-scan HDF5 v1 file into a :class:`FloorScan` (lengths in mm).

    Parameters
    ----------
    path : the file; opened read-only and never modified.

    Returns
    -------
    FloorScan
        Thickness as stored (NaN = not scanned), layers when present, ``source`` = ``path``.

    Raises
    ------
    InputError
        One line naming the file and the field, for any violation of the layout.
    """
    path = os.fspath(path)
    v.check_regular_file(path, "scan file")
    with open(path, "rb") as fh:
        signature = fh.read(8)
    try:
        f = h5py.File(path, "r")
    except OSError:
        if signature != b"\x89HDF\r\n\x1a\n":
            raise InputError(f"{where(path)}: not an HDF5 file") from None
        raise InputError(f"{where(path)}: HDF5 file is truncated or corrupt") from None
    with f:
        # A damaged file makes h5py fail in many ways (KeyError from a broken object header,
        # RuntimeError from an attribute table, TypeError/ValueError from a datatype message,
        # SystemError from its lock): all of them are bad input, not a program error.
        try:
            t, x0, y0, pitch_mm, meta, factor, side, plate = _read_open(f, path)
        except InputError:
            raise
        except (OSError, RuntimeError, KeyError, ValueError, TypeError, SystemError) as exc:
            raise InputError(f"{where(path)}: HDF5 file is truncated or corrupt "
                             f"({' '.join(str(exc).split())})") from None
    return FloorScan(thickness=t, x0=x0 * factor, y0=y0 * factor, pitch=pitch_mm, meta=meta,
                     side=side, plate=plate, source=path)


def write_h5_scan(scan: FloorScan, path) -> None:
    """Write ``scan`` as a floor-scan HDF5 v1 file in ``scan.meta.units``.

    Thickness is stored as float32 for mm files.  For inch files it is stored
    as float64 inches: a float32 inch value cannot always convert back to the
    identical float32 millimetre value, a float64 one always does.
    Datasets are chunked and gzip-compressed.  The file is written to a
    temporary file in the target folder and renamed into place.

    Parameters
    ----------
    scan : the scan.
    path : output file.
    """
    meta = scan.meta
    factor = v.UNIT_FACTORS[meta.units]
    for key in meta.extra:
        if key in v.KNOWN_KEYS or key in v.RESERVED_KEYS or not key.strip():
            raise ValueError(f"extra metadata key {key!r} cannot be written")
    rows, cols = scan.shape
    chunks = (min(rows, CHUNK), min(cols, CHUNK))
    with v.atomic_output(path) as tmp:
        with h5py.File(tmp, "w") as f:
            a = f.attrs
            a["format"] = v.FORMAT_NAME
            a["version"] = np.int64(v.FORMAT_VERSION)
            if meta.tank:
                a["tank"] = meta.tank
            a["inspected"] = meta.inspected.isoformat()
            if meta.method:
                a["method"] = meta.method
            a["units"] = meta.units
            a["pitch"] = v.unit_scalar(scan.pitch, factor)
            a["nominal"] = v.unit_scalar(meta.nominal, factor)
            if meta.threshold is not None:
                a["threshold"] = v.unit_scalar(meta.threshold, factor)
            if meta.sigma is not None:
                a["sigma"] = v.unit_scalar(meta.sigma, factor)
            if meta.installed is not None:
                a["installed"] = meta.installed.isoformat()
            for key, value in meta.extra.items():
                a[key] = str(value)
            data = scan.thickness if factor == 1.0 else scan.thickness.astype(np.float64) / factor
            ds = f.create_dataset("thickness", data=data, chunks=chunks, **COMPRESSION)
            ds.attrs["x0"] = v.unit_scalar(scan.x0, factor)
            ds.attrs["y0"] = v.unit_scalar(scan.y0, factor)
            if scan.side is not None:
                f.create_dataset("side", data=scan.side.astype(np.int8, copy=False), chunks=chunks,
                                 **COMPRESSION)
            if scan.plate is not None:
                f.create_dataset("plate", data=scan.plate.astype(np.int32, copy=False), chunks=chunks,
                                 **COMPRESSION)
