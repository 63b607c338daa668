"""Output folders that appear only when complete, and the results.h5 writer.

A run writes into a hidden temporary folder beside the target
(``.DIR.partial-<pid>``) and renames it into place only when every file is
written.  A run that fails or is interrupted removes its temporary folder, so no
folder that looks complete is ever left behind.  An existing output folder is
replaced only with ``force=True`` (the old one is removed only after the new one
is complete).
"""

from __future__ import annotations

import json
import math
import os
import shutil
import signal
import secrets
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from .errors import InputError

__all__ = ["output_folder", "write_json", "write_results_h5", "interrupts_as_keyboard", "interrupt_count",
           "publish_file"]

#: Name of the marker file written last into every complete output folder.
COMPLETE_MARKER = "COMPLETE"


@contextmanager
def interrupts_as_keyboard():
    """Turn SIGTERM (and SIGINT) into KeyboardInterrupt for the duration, so cleanup runs.

    Every interrupt is also counted (:func:`interrupt_count`): a KeyboardInterrupt raised while
    Python runs a weak-reference callback or a finaliser (matplotlib, h5py) is swallowed as
    "ignored", so :func:`output_folder` checks the record before it declares a folder
    complete, and the CLI before it reports success.
    """
    def _handler(signum, frame):
        _INTERRUPTS.append(signum)
        raise KeyboardInterrupt(f"signal {signum}")

    try:
        old_term = signal.signal(signal.SIGTERM, _handler)
        old_int = signal.signal(signal.SIGINT, _handler)
    except ValueError:  # not the main thread (e.g. a Dask worker thread)
        yield
        return
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, old_term)
        signal.signal(signal.SIGINT, old_int)


#: Signals received by :func:`interrupts_as_keyboard` handlers in this process.
_INTERRUPTS: list = []


def interrupt_count() -> int:
    """How many interrupts :func:`interrupts_as_keyboard` handlers have received in this
    process; callers compare it before and after a piece of work."""
    return len(_INTERRUPTS)


@contextmanager
def output_folder(path, *, force: bool = False):
    """Yield a temporary folder that becomes ``path`` when the block completes.

    Raises :class:`InputError` if ``path`` exists and ``force`` is false, or if
    ``path`` exists and is not a folder.
    """
    target = Path(path)
    if target.exists():
        if not target.is_dir():
            raise InputError(f"{target}: exists and is not a folder")
        if not force:
            raise InputError(f"{target}: output folder exists; use --force to replace it")
    parent = target.resolve().parent
    parent.mkdir(parents=True, exist_ok=True)
    # not mkdtemp: it makes the folder 0700; an output folder gets the ordinary umask mode
    seen = interrupt_count()
    tmp = parent / f".{target.name}.partial-{os.getpid()}-{secrets.token_hex(4)}"
    tmp.mkdir(0o777)
    try:
        with interrupts_as_keyboard():
            yield tmp
            if interrupt_count() > seen:  # an interrupt swallowed somewhere inside (see interrupts_as_keyboard)
                raise KeyboardInterrupt("interrupted while writing")
            (tmp / COMPLETE_MARKER).write_text("complete\n")
            if target.exists():
                old = parent / f".{target.name}.old-{os.getpid()}"
                os.replace(target, old)
                os.replace(tmp, target)
                shutil.rmtree(old, ignore_errors=True)
            else:
                os.replace(tmp, target)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def publish_file(tmp, path) -> None:
    """Give a finished temporary file the mode ``open`` would give under the umask, then
    rename it to ``path``.  (``tempfile.mkstemp``, used for atomic writes, makes it 0600,
    but output files are for sharing.)"""
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, 0o666 & ~umask)
    os.replace(tmp, path)


def _json_default(o):
    if isinstance(o, (np.integer,)):
        return int(o)
    if isinstance(o, (np.floating,)):
        return float(o)
    if isinstance(o, np.ndarray):
        return o.tolist()
    if hasattr(o, "isoformat"):
        return o.isoformat()
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


def _clean(o):
    """Replace NaN/inf by None (JSON has no NaN) recursively."""
    if isinstance(o, float) and not math.isfinite(o):
        return None
    if isinstance(o, dict):
        return {k: _clean(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_clean(v) for v in o]
    return o


def write_json(obj, path):
    """Write ``obj`` as indented JSON (NaN and inf become null)."""
    Path(path).write_text(json.dumps(_clean(obj), indent=2, default=_json_default) + "\n")


#: Chunk side of the result maps [cells] and their deflate level (1: fast, the maps
#: compress well after the byte shuffle anyway).
CHUNK = 256
GZIP_LEVEL = 1


def _deflater():
    """The zlib-format compressor used for the result maps' chunks, and its name.

    ISA-L's deflate (the ``isal`` package) writes the same zlib stream as the ``zlib``
    module, which HDF5's deflate filter reads, about five times faster at level 1 on our
    maps; ``zlib`` is the fallback where ``isal`` is not installed.  Both release the GIL.
    """
    try:
        from isal import isal_zlib
    except ImportError:  # machines without an isal wheel (see pyproject.toml); tested by monkeypatch
        import zlib

        return (lambda data: zlib.compress(data, GZIP_LEVEL)), "zlib"
    return (lambda data: isal_zlib.compress(data, GZIP_LEVEL)), "isal"


def _packed_chunk(a: np.ndarray, r0: int, c0: int, chunks, deflate=None) -> bytes:
    """One chunk as HDF5 stores it with the shuffle and deflate filters.

    The chunk is padded to the full chunk shape (edge chunks), its bytes shuffled (the
    HDF5 shuffle filter: all first bytes of the elements, then all second bytes, ...)
    and compressed in the zlib format of HDF5's deflate filter (``deflate``, default
    :func:`_deflater`'s).  The compressor releases the GIL, so chunks compress in
    parallel threads.
    """
    if deflate is None:
        deflate = _deflater()[0]
    block = a[r0:r0 + chunks[0], c0:c0 + chunks[1]]
    if block.shape != tuple(chunks):
        full = np.zeros(chunks, dtype=a.dtype)
        full[:block.shape[0], :block.shape[1]] = block
        block = full
    raw = np.ascontiguousarray(block).view(np.uint8).reshape(-1, a.dtype.itemsize)
    return deflate(np.ascontiguousarray(raw.T).tobytes())


def _packed_band(a: np.ndarray, r0: int, chunks, deflate) -> list:
    """The packed chunks (:func:`_packed_chunk`'s bytes) of one band of chunk rows of ``a``
    from row ``r0``, left to right.

    The band is padded to whole chunks and shuffled for all its chunks with one transposing
    copy (each chunk's shuffled bytes then lie together), so a chunk costs one compression
    call and no Python-level copy (tested against :func:`_packed_chunk`)."""
    ch_r, ch_c = chunks
    n_c = -(-a.shape[1] // ch_c)
    blk = np.ascontiguousarray(a[r0:r0 + ch_r])
    if blk.shape != (ch_r, n_c * ch_c):
        full = np.zeros((ch_r, n_c * ch_c), dtype=a.dtype)
        full[:blk.shape[0], :blk.shape[1]] = blk
        blk = full
    # (row, chunk, column in chunk, byte) -> (chunk, byte, row, column in chunk)
    isz = a.dtype.itemsize
    shuffled = np.ascontiguousarray(blk.view(np.uint8).reshape(ch_r, n_c, ch_c, isz).transpose(1, 3, 0, 2))
    return [deflate(shuffled[k]) for k in range(n_c)]


def _write_chunks(dsets, deflate=None) -> None:
    """Fill chunked (shuffle + deflate) datasets, ``[(dataset, array, chunks)]``: the bands
    of chunk rows of every array are compressed in threads on all cores (the compressors
    and numpy's copies release the GIL) and written in order with ``write_direct_chunk``."""
    from concurrent.futures import ThreadPoolExecutor

    if deflate is None:
        deflate = _deflater()[0]
    jobs = [(d, a, chunks, r0) for d, a, chunks in dsets for r0 in range(0, a.shape[0], chunks[0])]
    workers = max(1, min(4, os.cpu_count() or 1))
    with ThreadPoolExecutor(max_workers=workers) as pool:
        packed = pool.map(lambda j: _packed_band(j[1], j[3], j[2], deflate), jobs)
        for (d, _, chunks, r0), data in zip(jobs, packed):
            for k, chunk in enumerate(data):
                d.id.write_direct_chunk((r0, k * chunks[1]), chunk)


def write_results_h5(path, maps: dict, *, x0: float, y0: float, pitch: float, attrs: dict | None = None,
                     timings: dict | None = None):
    """Write every map on the new scan's grid into one HDF5 file.

    Parameters
    ----------
    path : output file.
    maps : name -> 2-D array (same shape); bool maps stored as uint8, floats as float32.
        A name given the very array object of an earlier name (e.g. a rate map that a
        repair leaves unchanged) is stored as an HDF5 hard link to the earlier dataset:
        the same data under both names, written once.
    x0, y0 : centre of cell [0, 0]. [mm]
    pitch : cell size. [mm]
    attrs : extra root attributes (strings or numbers).
    timings : stage -> seconds, stored under the group ``timings`` as attributes.
    """
    import h5py

    with h5py.File(path, "w") as f:
        f.attrs["format"] = "scananalyse-results"
        f.attrs["version"] = 1
        f.attrs["units"] = "mm, mm/y, years"
        for k, v in (attrs or {}).items():
            if v is None:
                continue
            f.attrs[k] = v if isinstance(v, (int, float, str, np.number)) else str(v)
        g = f.create_group("maps")
        g.attrs["x0_mm"] = x0
        g.attrs["y0_mm"] = y0
        g.attrs["pitch_mm"] = pitch
        deflate, _ = _deflater()
        written: dict = {}  # id of a map array -> the dataset written from it
        chunked = []  # (dataset, array, chunks), filled at the end, all maps in one pool
        for name, arr in maps.items():
            if arr is None:
                continue
            if id(arr) in written:
                g[name] = written[id(arr)]  # a hard link: one dataset, two names
                continue
            a = np.asarray(arr)
            if a.dtype == bool:
                a = a.view(np.uint8)  # the same bytes (0 or 1), no copy
            elif a.dtype.kind == "f" and a.dtype != np.float32:
                a = a.astype(np.float32)
            if a.ndim == 2 and a.size:
                chunks = (min(CHUNK, a.shape[0]), min(CHUNK, a.shape[1]))
                d = g.create_dataset(name, shape=a.shape, dtype=a.dtype, compression="gzip",
                                     compression_opts=GZIP_LEVEL, shuffle=True, chunks=chunks)
                chunked.append((d, a, chunks))
            else:
                d = g.create_dataset(name, data=a)
            written[id(arr)] = d
        _write_chunks(chunked, deflate)
        if timings:
            t = f.create_group("timings")
            for k, v in timings.items():
                t.attrs[k] = float(v)
