"""Output folders that appear only when complete, and the results.h5 writer.

A run writes into a hidden temporary folder beside the target
(``.DIR.partial-<pid>-<hex>``) and publishes it at the end with one atomic rename that
never replaces anything (``renameat2(RENAME_NOREPLACE)`` where the system has it, else
``mkdir`` of the target as a claim and a rename onto that empty folder).  So a folder
that appears at the target while the run works is never replaced, and of two runs to
the same folder the second fails naming it.  A run that fails or is interrupted removes
its temporary folder, so no folder that looks complete is ever left behind.

Every complete folder carries a marker file, :data:`COMPLETE_MARKER`, written last: a
tool signature and the list of every file and folder the run wrote.  ``force=True``
replaces an existing folder only when it is such a complete earlier output and holds
nothing else; any other folder (a user's folder, the folder of the input scans, the
current folder) is refused with the reason.  The previous folder is moved aside to
``.DIR.old-<pid>-<hex>`` and removed only after the new one is in place.

Folders left behind by a run that was killed (``.partial-`` and ``.old-`` folders whose
process is gone) are cleaned on the next run to the same target: an ``.old-`` folder
whose target is missing (a kill between the two renames of a forced replacement) is
renamed back, and the next run says so on stderr.
"""

from __future__ import annotations

import ctypes
import datetime as _dt
import errno
import json
import math
import os
import re
import shutil
import signal
import secrets
import sys
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from .errors import InputError

__all__ = ["output_folder", "write_json", "write_results_h5", "interrupts_as_keyboard", "interrupt_count",
           "publish_file", "is_complete_output", "recover_interrupted", "rename_noreplace",
           "COMPLETE_MARKER", "MARKER_SIGNATURE"]

#: Name of the marker file written last into every complete output folder.
COMPLETE_MARKER = "COMPLETE"
#: First line of :data:`COMPLETE_MARKER`: the tool's signature.  Only a folder whose
#: marker starts with it is ever replaced (``force``) or recovered.
MARKER_SIGNATURE = "scananalyse output folder, complete"
#: Marker file inside a temporary folder while it is written (removed before publishing):
#: only a ``.partial-`` folder holding it is removed by a later run.
PARTIAL_MARKER = ".scananalyse-partial"
#: errno values of a write that failed for a reason of the output location (disk full,
#: quota, read-only file system, no permission, file too large): reported as bad input
#: (exit 2) naming the path, not as an internal fault.
_WRITE_ERRNOS = frozenset(getattr(errno, n) for n in ("ENOSPC", "EDQUOT", "EROFS", "EACCES", "EPERM",
                                                      "EFBIG", "ENAMETOOLONG") if hasattr(errno, n))
#: Temporary and previous folders of runs in progress in this process (absolute paths):
#: never cleaned as stale, although their process is alive.
_ACTIVE: set = set()


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


def _note(message: str) -> None:
    """Tell the user about something done to their folders (one stderr line)."""
    sys.stderr.write(f"scananalyse: note: {' '.join(message.split())}\n")


def _why(exc: OSError) -> str:
    return exc.strerror or type(exc).__name__


# ------------------------------------------------------------------ no-replace rename
_RENAME_NOREPLACE = 1
_AT_FDCWD = -100
_RENAMEAT2: list = []


def _renameat2():
    """glibc's ``renameat2`` (Linux 3.15+, glibc 2.28+), or None."""
    if not _RENAMEAT2:
        fn = None
        if sys.platform.startswith("linux"):
            try:
                import ctypes.util

                libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
                fn = libc.renameat2
                fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
                fn.restype = ctypes.c_int
            except (OSError, AttributeError):
                fn = None
        _RENAMEAT2.append(fn)
    return _RENAMEAT2[0]


def rename_noreplace(src, dst) -> None:
    """Rename ``src`` to ``dst`` atomically, failing if ``dst`` exists (anything at all).

    ``renameat2(RENAME_NOREPLACE)`` where the C library and the file system have it; else
    ``os.mkdir(dst)`` claims the name (it fails if anything is there) and ``os.rename``
    moves ``src`` onto that empty folder (it fails if the folder is no longer empty).

    Raises
    ------
    FileExistsError
        ``dst`` exists (or the claimed folder was filled meanwhile).
    OSError
        Any other failure of the rename.
    """
    src, dst = os.fspath(src), os.fspath(dst)
    fn = _renameat2()
    if fn is not None:
        if fn(_AT_FDCWD, os.fsencode(src), _AT_FDCWD, os.fsencode(dst), _RENAME_NOREPLACE) == 0:
            return
        err = ctypes.get_errno()
        if err not in (errno.EINVAL, errno.ENOSYS, errno.ENOTSUP, errno.EOPNOTSUPP):
            if err in (errno.EEXIST, errno.ENOTEMPTY):
                raise FileExistsError(err, os.strerror(err), dst)
            raise OSError(err, os.strerror(err), dst)
    os.mkdir(dst)  # FileExistsError when anything is there
    try:
        os.rename(src, dst)
    except OSError as exc:
        try:
            os.rmdir(dst)
        except OSError:
            pass
        if exc.errno in (errno.EEXIST, errno.ENOTEMPTY):
            raise FileExistsError(exc.errno, exc.strerror, dst) from None
        raise


# ------------------------------------------------------------------ markers
def _listing(folder: Path) -> list:
    """Every file and folder below ``folder`` (relative POSIX paths, sorted; links not followed)."""
    out = []
    for root, dirs, files in os.walk(folder, followlinks=False):
        rel = os.path.relpath(root, folder)
        for name in dirs + files:
            out.append(name if rel == "." else f"{Path(rel).as_posix()}/{name}")
    return sorted(out)


def _marker_text(folder: Path) -> str:
    from . import __version__

    files = [f for f in _listing(folder) if f not in (COMPLETE_MARKER, PARTIAL_MARKER)]
    when = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    return "\n".join([MARKER_SIGNATURE, f"written {when} by scananalyse {__version__}", "files:"]
                     + files) + "\n"


def _marker_files(folder: Path):
    """The file list of ``folder``'s marker, or None when it has no marker of this tool."""
    marker = folder / COMPLETE_MARKER
    try:
        if not marker.is_file() or marker.is_symlink() or marker.stat().st_size > (1 << 24):
            return None
        lines = marker.read_text(encoding="utf-8").splitlines()
    except (OSError, UnicodeDecodeError):
        return None
    if not lines or lines[0] != MARKER_SIGNATURE or "files:" not in lines:
        return None
    return set(lines[lines.index("files:") + 1:])


def _foreign_entry(folder: Path):
    """Why ``folder`` is not a complete output of this tool that holds only what it wrote
    (a short reason), or None when it is one."""
    listed = _marker_files(folder)
    if listed is None:
        return f"it has no {COMPLETE_MARKER} marker of a complete scananalyse output"
    for rel in _listing(folder):
        if rel != COMPLETE_MARKER and rel not in listed:
            return f"it holds {rel!r}, which scananalyse did not write there"
    return None


def is_complete_output(path) -> bool:
    """True when ``path`` is a folder (not a link) with this tool's complete marker that
    holds nothing the tool did not write."""
    p = Path(path)
    return p.is_dir() and not p.is_symlink() and _foreign_entry(p) is None


# ------------------------------------------------------------------ stale folders
def _pid_alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError, ValueError):
        return True
    return True


def recover_interrupted(path) -> list:
    """Clean what killed runs left beside the output folder ``path``; returns the notes.

    Only hidden folders named by this tool for ``path`` (``.NAME.partial-PID-…``,
    ``.NAME.old-PID[-…]``) whose process is gone (or, for this process's id, that no run
    in progress owns) are touched:

    - a ``.partial-`` folder holding the temporary marker is removed (an unfinished run);
    - an ``.old-`` folder that is a complete earlier output is renamed back to ``path`` when
      ``path`` is missing (a replacement killed between its two renames), and removed when
      ``path`` is a complete output again (a replacement killed after publishing).

    Each action is said on stderr (``scananalyse: note: …``).  Errors are ignored: the
    folders are then left as they are.
    """
    target = Path(os.path.abspath(os.fspath(path)))
    parent, name = target.parent, target.name
    if not name:
        return []
    pattern = re.compile(rf"^\.{re.escape(name)}\.(partial|old)-(\d+)(?:-[0-9a-f]+)?$")
    notes = []
    try:
        entries = sorted(os.scandir(parent), key=lambda e: e.name)
    except OSError:
        return notes
    for entry in entries:
        m = pattern.match(entry.name)
        if m is None or not entry.is_dir(follow_symlinks=False):
            continue
        p = parent / entry.name
        pid = int(m.group(2))
        if str(p) in _ACTIVE or (pid != os.getpid() and _pid_alive(pid)):
            continue
        try:
            if m.group(1) == "partial":
                if (p / PARTIAL_MARKER).is_file() or _marker_files(p) is not None:
                    shutil.rmtree(p)
                    notes.append(f"removed {p}, the unfinished output of an interrupted run "
                                 f"(process {pid})")
            elif _foreign_entry(p) is None:
                if not os.path.lexists(target):
                    rename_noreplace(p, target)
                    notes.append(f"recovered {target} from {p.name}: a replacement by process {pid} "
                                 "was interrupted between its two renames")
                elif is_complete_output(target):
                    shutil.rmtree(p)
                    notes.append(f"removed {p}, the previous output left by an interrupted "
                                 f"replacement (process {pid}); {target} is complete")
        except OSError:
            continue
    for n in notes:
        _note(n)
    return notes


# ------------------------------------------------------------------ the output folder
def _check_target(target: Path, shown: str, force: bool) -> bool:
    """Refuse an unusable target; True when it exists (and may be replaced)."""
    if os.path.islink(target):
        raise InputError(f"{shown}: is a symbolic link; give the output folder itself")
    if not os.path.lexists(target):
        return False
    if not target.is_dir():
        raise InputError(f"{shown}: exists and is not a folder")
    cwd = Path(os.path.abspath(os.getcwd()))
    if target == cwd or target in cwd.parents:
        raise InputError(f"{shown}: is the current folder or holds it; give a new folder for the output")
    if not force:
        raise InputError(f"{shown}: output folder exists; use --force to replace it")
    why = _foreign_entry(target)
    if why is not None:
        raise InputError(f"{shown}: not replaced: --force replaces only a complete earlier output of "
                         f"scananalyse, and {why}; choose a new folder")
    return True


def _as_input_error(exc: OSError, default) -> InputError | None:
    """An :class:`InputError` naming the path for a write that failed because of the output
    location (disk full, read-only, no permission), else None."""
    if exc.errno in _WRITE_ERRNOS:
        where = exc.filename or default
        return InputError(f"{where}: cannot write the output ({_why(exc)}); no output folder was made")
    return None


@contextmanager
def output_folder(path, *, force: bool = False):
    """Yield a temporary folder that becomes ``path`` when the block completes.

    Parameters
    ----------
    path : the output folder; it must not exist, or (``force``) be a complete earlier
        output of this tool holding only what the tool wrote.
    force : replace such an earlier output.

    Raises
    ------
    InputError
        ``path`` is a file, a link, the current folder (or holds it), exists without
        ``force``, is not an output of this tool (with ``force``), appeared during the run
        (another run or a user made it), or cannot be written (disk full, read-only; the
        message names the path).
    """
    shown = os.fspath(path)
    target = Path(os.path.abspath(shown))
    if not target.name:
        raise InputError(f"{shown}: not usable as an output folder")
    recover_interrupted(target)
    _check_target(target, shown, force)
    parent = target.parent
    try:
        parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"{parent}: cannot create the folder for the output ({_why(exc)})") from None
    # not mkdtemp: it makes the folder 0700; an output folder gets the ordinary umask mode
    seen = interrupt_count()
    tmp = parent / f".{target.name}.partial-{os.getpid()}-{secrets.token_hex(4)}"
    try:
        tmp.mkdir(0o777)
        (tmp / PARTIAL_MARKER).write_text(f"{os.getpid()}\n")
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        raise InputError(f"{parent}: cannot write the output folder there ({_why(exc)})") from None
    _ACTIVE.add(str(tmp))
    try:
        with interrupts_as_keyboard():
            try:
                yield tmp
            except OSError as exc:
                err = _as_input_error(exc, shown)
                if err is None:
                    raise
                raise err from None
            if interrupt_count() > seen:  # an interrupt swallowed somewhere inside (see interrupts_as_keyboard)
                raise KeyboardInterrupt("interrupted while writing")
            try:
                (tmp / COMPLETE_MARKER).write_text(_marker_text(tmp), encoding="utf-8")
                (tmp / PARTIAL_MARKER).unlink()
            except OSError as exc:
                raise _as_input_error(exc, tmp) or exc from None
            _publish(tmp, target, shown, force)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    finally:
        _ACTIVE.discard(str(tmp))


def _publish(tmp: Path, target: Path, shown: str, force: bool) -> None:
    """Rename the finished ``tmp`` to ``target``: with no replacement, or (``force``) moving
    the earlier output aside first and removing it once the new one is in place."""
    def appeared():
        return InputError(f"{shown}: the output folder appeared while this run worked (another run, or "
                          "made by hand); it was not replaced and this run's output was discarded")

    if not (force and os.path.lexists(target)):
        try:
            rename_noreplace(tmp, target)
        except FileExistsError:
            raise appeared() from None
        except OSError as exc:
            raise _as_input_error(exc, shown) or exc from None
        return
    old = target.parent / f".{target.name}.old-{os.getpid()}-{secrets.token_hex(4)}"
    _ACTIVE.add(str(old))
    try:
        try:
            os.rename(target, old)
        except OSError as exc:
            raise _as_input_error(exc, shown) or exc from None
        try:
            why = _foreign_entry(old)
            if why is not None:  # changed since the check at the start
                raise InputError(f"{shown}: not replaced: it changed during the run and {why}")
            try:
                rename_noreplace(tmp, target)
            except FileExistsError:
                raise appeared() from None
        except BaseException:
            try:  # put the previous output back where it was
                if not os.path.lexists(target):
                    os.rename(old, target)
            except OSError:
                pass  # left as .old-: the next run to this folder recovers it
            raise
        shutil.rmtree(old, ignore_errors=True)
    finally:
        _ACTIVE.discard(str(old))


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
