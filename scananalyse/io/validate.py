"""Validation shared by the floor-scan CSV and HDF5 readers (formats v1).

Every check raises :class:`scananalyse.errors.InputError` with one line naming
the file and the line (CSV) or the field (both formats).  The limits below are
part of the documented formats (docs/formats.md).
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import math
import os
import re
import secrets
import stat

import numpy as np

from ..errors import InputError, where
from ..scan import MM_PER_IN, SIDE_TOP, SIDE_UNDER, SIDE_UNKNOWN, ScanMeta

__all__ = [
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "UNIT_FACTORS",
    "MAX_GRID_CELLS",
    "MAX_THICKNESS_OVER_NOMINAL",
    "MAX_NOMINAL_MM",
    "OFF_GRID_TOLERANCE",
    "SIDE_LABELS",
    "REQUIRED_KEYS",
    "KNOWN_KEYS",
    "GRID_KEYS",
    "RESERVED_KEYS",
    "parse_date",
    "parse_number",
    "parse_units",
    "parse_text",
    "build_meta",
    "check_grid_size",
    "first_bad_thickness",
    "thickness_problem",
    "unit_scalar",
    "format_scalar",
    "atomic_output",
    "check_regular_file",
]

#: Name of the formats, written as ``format`` (CSV: ``scananalyse-scan 1``).
FORMAT_NAME = "scananalyse-scan"
#: The only version this module reads and writes.
FORMAT_VERSION = 1
#: File units and their size in millimetres (1 in = 25.4 mm exactly, 1959 agreement).
UNIT_FACTORS = {"mm": 1.0, "in": MM_PER_IN}
#: Largest grid (rows x columns) a reader will allocate: 200 million cells is 0.8 GB of
#: float32, a 140 m x 140 m box at 10 mm pitch (a 150 m tank floor, larger than any
#: storage tank built, is 177 million cells of its circle).  Checked before allocating.
MAX_GRID_CELLS = 200_000_000
#: A grid box larger than this many cells must hold at least one scanned cell (row of a
#: CSV table) per :data:`MAX_EMPTY_PER_CELL` cells of the box: a few cells far apart (a
#: typing error in a coordinate) would otherwise make a tiny file allocate gigabytes.  A
#: round floor fills 79 % of its box; a partial scan of strips a few percent.
SPARSE_GRID_CELLS = 4_000_000
#: Most grid cells per scanned cell in a grid box above :data:`SPARSE_GRID_CELLS`.
MAX_EMPTY_PER_CELL = 1000
#: A thickness above this multiple of the nominal thickness is refused as absurd
#: (a unit mix-up or a corrupt value, not a real plate).
MAX_THICKNESS_OVER_NOMINAL = 3.0
#: A nominal plate thickness above this is refused as absurd (tank floors are
#: 5 to 25 mm plate; 100 mm means wrong units or a corrupt value). [mm]
MAX_NOMINAL_MM = 100.0
#: Coordinates must lie within this fraction of the pitch of a grid node.
OFF_GRID_TOLERANCE = 0.01
#: Allowed values of the CSV ``side`` column and their codes (scan.SIDE_*); an
#: empty cell means unknown.
SIDE_LABELS = {"unknown": SIDE_UNKNOWN, "top": SIDE_TOP, "under": SIDE_UNDER, "": SIDE_UNKNOWN}
#: Header keys a file must have.
REQUIRED_KEYS = ("format", "inspected", "units", "pitch", "nominal")
#: Header keys with a meaning; any other key is kept verbatim in ``meta.extra``.
KNOWN_KEYS = REQUIRED_KEYS + ("tank", "method", "threshold", "sigma", "installed")
#: Optional CSV-only keys giving the grid anchor and extent (written by
#: :func:`write_csv_scan` so that unscanned border rows and columns survive).
GRID_KEYS = ("x0", "y0", "rows", "cols")
#: Names that may not be used for extra keys (they clash with the HDF5 layout).
RESERVED_KEYS = ("version",) + GRID_KEYS

_ISO_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}$")


def _as_text(value) -> str:
    """An attribute or header value as text (bytes decoded as UTF-8)."""
    if isinstance(value, (bytes, np.bytes_)):
        return bytes(value).decode("utf-8")
    if isinstance(value, np.ndarray) and value.shape == ():
        return _as_text(value.item())
    return str(value)


def parse_text(value, path, line, key) -> str:
    """A free-text value on one line (whitespace runs collapsed)."""
    try:
        text = _as_text(value)
    except UnicodeDecodeError:
        raise InputError(f"{where(path, line, key)}: value is not UTF-8 text") from None
    return " ".join(text.split())


def parse_date(value, path, line, key) -> _dt.date:
    """An ISO 8601 calendar date ``YYYY-MM-DD``."""
    text = parse_text(value, path, line, key)
    if not _ISO_DATE.match(text):
        raise InputError(f"{where(path, line, key)}: {text!r} is not an ISO date (YYYY-MM-DD)")
    try:
        return _dt.date.fromisoformat(text)
    except ValueError:
        raise InputError(f"{where(path, line, key)}: {text!r} is not a valid calendar date") from None


def parse_number(value, path, line, key, *, sign: str = "positive") -> float:
    """A finite real number; ``sign`` is ``"positive"`` (> 0), ``"nonneg"`` (>= 0) or ``"any"``."""
    if isinstance(value, (bool, np.bool_)):
        shown = value.item() if isinstance(value, np.generic) else value
        raise InputError(f"{where(path, line, key)}: expected a number, got {shown!r}")
    if isinstance(value, (int, float, np.integer, np.floating)):
        number = float(value)
        shown = repr(value.item() if isinstance(value, np.generic) else value)
    elif isinstance(value, np.ndarray) and value.shape == () and value.dtype.kind in "iuf":
        number = float(value)
        shown = repr(number)
    else:
        text = parse_text(value, path, line, key)
        shown = repr(text)
        try:
            number = float(text)
        except ValueError:
            raise InputError(f"{where(path, line, key)}: {shown} is not a number") from None
    if not math.isfinite(number):
        raise InputError(f"{where(path, line, key)}: {shown} is not finite")
    if sign == "positive" and number <= 0:
        raise InputError(f"{where(path, line, key)}: must be positive, got {shown}")
    if sign == "nonneg" and number < 0:
        raise InputError(f"{where(path, line, key)}: must not be negative, got {shown}")
    return number


def parse_units(value, path, line, key="units") -> str:
    """``mm`` or ``in``."""
    text = parse_text(value, path, line, key)
    if text not in UNIT_FACTORS:
        raise InputError(f"{where(path, line, key)}: unknown units {text!r} (allowed: mm, in)")
    return text


def build_meta(fields: dict, path) -> tuple[ScanMeta, float, float]:
    """Validate header keys and build the metadata (lengths converted to mm).

    Parameters
    ----------
    fields : mapping key -> (value, line); ``line`` is the 1-based file line or
        None (HDF5 attributes).  ``format`` is checked by the caller.
    path : the file, for messages.

    Returns
    -------
    (meta, pitch_mm, factor) : the metadata, the cell size [mm] and the file unit
        in mm (1.0 or 25.4).
    """
    for key in REQUIRED_KEYS:
        if key not in fields:
            raise InputError(f"{where(path, None, key)}: required header key missing")

    def required(key):
        value, line = fields[key]
        if isinstance(value, str) and not value.strip():
            raise InputError(f"{where(path, line, key)}: required header key has no value")
        return value, line

    value, line = required("units")
    units = parse_units(value, path, line)
    factor = UNIT_FACTORS[units]
    value, line = required("inspected")
    inspected = parse_date(value, path, line, "inspected")
    value, line = required("pitch")
    pitch = parse_number(value, path, line, "pitch") * factor
    value, line = required("nominal")
    nominal = parse_number(value, path, line, "nominal") * factor
    if nominal > MAX_NOMINAL_MM:
        raise InputError(f"{where(path, line, 'nominal')}: {nominal / factor:g} {units} is above the "
                         f"limit of {MAX_NOMINAL_MM:g} mm for a floor plate; wrong units or a corrupt value")

    def optional_number(key):
        if key not in fields:
            return None
        value, line = fields[key]
        if isinstance(value, str) and not value.strip():
            return None
        return parse_number(value, path, line, key, sign="nonneg") * factor

    installed = None
    if "installed" in fields:
        value, line = fields["installed"]
        if not (isinstance(value, str) and not value.strip()):
            installed = parse_date(value, path, line, "installed")
    tank = parse_text(fields["tank"][0], path, fields["tank"][1], "tank") if "tank" in fields else ""
    method = parse_text(fields["method"][0], path, fields["method"][1], "method") if "method" in fields else ""
    extra = {}
    for key, (value, line) in fields.items():
        if key in KNOWN_KEYS or key in GRID_KEYS:
            continue  # grid keys are geometry, handled by the CSV reader
        extra[key] = parse_text(value, path, line, key)
    meta = ScanMeta(inspected=inspected, nominal=nominal, units=units, tank=tank, method=method,
                    threshold=optional_number("threshold"), sigma=optional_number("sigma"),
                    installed=installed, extra=extra)
    return meta, pitch, factor


def check_grid_size(rows: float, cols: float, path, line=None, field=None, *, scanned: int | None = None) -> None:
    """Refuse a grid above :data:`MAX_GRID_CELLS` before anything is allocated; with
    ``scanned`` (the number of scanned cells given), also a grid box above
    :data:`SPARSE_GRID_CELLS` cells with fewer than one scanned cell per
    :data:`MAX_EMPTY_PER_CELL` cells."""
    cells = float(rows) * float(cols)
    if not cells <= MAX_GRID_CELLS:
        raise InputError(
            f"{where(path, line, field)}: grid of {rows:.0f} x {cols:.0f} cells exceeds the limit of "
            f"{MAX_GRID_CELLS} cells (check the pitch and the coordinates)")
    if scanned is not None and cells > SPARSE_GRID_CELLS and cells > MAX_EMPTY_PER_CELL * float(scanned):
        raise InputError(
            f"{where(path, line, field)}: {scanned} scanned cells spread over a grid of {rows:.0f} x "
            f"{cols:.0f} cells (more than {MAX_EMPTY_PER_CELL} grid cells per scanned cell); "
            "check the pitch and the coordinates")


def check_regular_file(path, what: str = "file") -> None:
    """Refuse a path that is not an existing regular file, saying what it is instead
    (missing, a folder, or a FIFO, device or socket, which would block or never end)."""
    p = os.fspath(path)
    try:
        st = os.stat(p)
    except FileNotFoundError:
        raise InputError(f"{where(p)}: no such file") from None
    except OSError as exc:
        raise InputError(f"{where(p)}: cannot read ({exc.strerror or type(exc).__name__})") from None
    if stat.S_ISDIR(st.st_mode):
        raise InputError(f"{where(p)}: is a folder, not a {what}")
    if not stat.S_ISREG(st.st_mode):
        raise InputError(f"{where(p)}: is not a regular file (a FIFO, device or socket); give a {what}")


def _thickness_limit(nominal_mm: float) -> float:
    """Largest accepted thickness [mm].

    The 1e-6 slack keeps exactly 3 x nominal valid despite rounding: a float32
    at the limit written as its shortest decimal (up to 9 significant digits)
    reads back up to about 6e-8 relative above it.
    """
    return MAX_THICKNESS_OVER_NOMINAL * nominal_mm * (1 + 1e-6)


def thickness_problem(value: float, nominal_mm: float, factor: float) -> str | None:
    """Why one thickness value (in file units) is invalid, or None."""
    if not math.isfinite(value):
        return f"thickness {value!r} is not finite"
    if value <= 0:
        return f"thickness {value!r} is not positive"
    if value * factor > _thickness_limit(nominal_mm):
        return (f"thickness {value!r} is more than {MAX_THICKNESS_OVER_NOMINAL:g} x nominal "
                f"({nominal_mm / factor:g}); wrong units or a corrupt value")
    return None


def first_bad_thickness(t: np.ndarray, nominal_mm: float, factor: float, *, allow_nan: bool):
    """Index (flat) of the first invalid thickness in ``t`` (file units), or None.

    Uses one vectorised pass: finite, positive and not above
    :data:`MAX_THICKNESS_OVER_NOMINAL` x nominal.  NaN is allowed when
    ``allow_nan`` (HDF5: not scanned).
    """
    limit = np.float64(_thickness_limit(nominal_mm) / factor)  # float64: no float32 overflow
    flat = t.reshape(-1)
    if flat.size == 0:
        return None
    if allow_nan:
        lo, hi = np.fmin.reduce(flat), np.fmax.reduce(flat)  # NaN skipped
    else:
        lo, hi = flat.min(), flat.max()  # NaN propagates and fails the test below
    if lo > 0 and np.float64(hi) <= limit:
        return None
    with np.errstate(invalid="ignore"):
        good = (flat > 0) & (flat <= limit)  # a float64 scalar: compared in float64 (NEP 50)
    if allow_nan:
        good |= np.isnan(flat)
    if good.all():
        return None
    return int(np.argmin(good))


def unit_scalar(value_mm: float, factor: float) -> float:
    """``value_mm`` in file units, chosen so that ``result * factor == value_mm`` exactly when possible.

    Division by 25.4 and multiplication back do not always return the same
    float; the neighbours of the quotient are tried so that a written file
    reads back to the identical millimetre value.
    """
    value_mm = float(value_mm)
    if factor == 1.0 or not math.isfinite(value_mm):
        return value_mm
    q = value_mm / factor
    if q * factor == value_mm:
        return q
    lo = hi = q
    for _ in range(4):
        lo = math.nextafter(lo, -math.inf)
        hi = math.nextafter(hi, math.inf)
        for cand in (lo, hi):
            if cand * factor == value_mm:
                return cand
    return q


def format_scalar(value_mm: float, factor: float) -> str:
    """Shortest decimal text of ``value_mm`` in file units that reads back exactly.

    The text ``s`` satisfies ``float(s) * factor == value_mm`` whenever
    :func:`unit_scalar` finds such a value (always for ``factor == 1``).
    """
    target = unit_scalar(value_mm, factor)
    for digits in range(1, 18):
        text = f"{target:.{digits}g}"
        back = float(text)
        if back == target or (factor != 1.0 and back * factor == value_mm):
            if "e" in text and 1e-6 <= abs(back) < 1e15:
                # plain notation for ordinary magnitudes: "10", not "1e+01"
                plain = np.format_float_positional(back, trim="-")
                if float(plain) == back:
                    text = plain
            return text
    return repr(target)


@contextlib.contextmanager
def atomic_output(path):
    """Yield a temporary path beside ``path``; on success it replaces ``path`` atomically.

    The temporary file is created in the target folder (so :func:`os.replace` is
    a rename on the same file system) with the usual permissions (umask
    applied).  On any exception it is removed and ``path`` is left untouched.
    """
    path = os.fspath(path)
    folder, name = os.path.split(os.path.abspath(path))
    tmp = os.path.join(folder, f".{name}.{os.getpid()}.{secrets.token_hex(4)}.tmp")
    fd = os.open(tmp, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o666)
    os.close(fd)
    try:
        yield tmp
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.remove(tmp)
        raise
