"""Floor-scan CSV, version 1: read and write (design contract 3.1, docs/formats.md).

Reading is vectorised: the ``# key: value`` header lines are parsed here, the
table by pandas' C reader with explicit dtypes that keep its parallel reader
on (``side`` as 8-byte strings, not ``category``), and the rows are checked
and put on the grid in one pass over cache-sized blocks (:func:`_place_fast`).
Only when a check fails, or the table is unusual (side labels in capitals), do
the checks run one by one (:func:`_place_checked`), going back over the file
line by line to name the offending line.  A good large file reads in about
the time of a plain ``pandas.read_csv`` of it (``bench/bench_io.py``).
"""

from __future__ import annotations

import csv
import math
import os
import re
import warnings

import numpy as np
import pandas as pd

from ..errors import InputError, ScanWarning, where
from ..scan import PLATE_NONE, SIDE_NAMES, FloorScan
from . import validate as v

__all__ = ["read_csv_scan", "write_csv_scan", "COLUMNS_REQUIRED", "COLUMNS_OPTIONAL"]

#: Columns every table must have.
COLUMNS_REQUIRED = ("x", "y", "thickness")
#: Optional columns: ``side`` (top, under, unknown or empty) and ``plate`` (integer id, empty = none).
COLUMNS_OPTIONAL = ("side", "plate")

#: Longest header line read before the file is taken as not a scan CSV. [bytes]
_MAX_HEADER_LINE = 65536
#: Most header lines read before the file is taken as not a scan CSV.
_MAX_HEADER_LINES = 10000
#: Longest table line read (a row is some 20 to 60 bytes): a longer line is refused
#: before pandas would hold it whole. [bytes]
_MAX_TABLE_LINE = 65536
_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
_INF = {"inf", "+inf", "-inf", "infinity", "+infinity", "-infinity"}
_NUMERIC_COLUMNS = ("x", "y", "thickness", "plate")
#: Bytes read per block by the table byte check: small enough for the comma mask
#: to stay in the processor cache (4 MiB blocks were a third slower). [bytes]
_SCAN_BLOCK = 1 << 18
#: The ``side`` column is parsed as 8-byte strings (numpy ``S8``, one 64-bit word
#: a cell): the allowed labels are at most 7 bytes, so a longer cell, cut to 8,
#: can never equal one.  A fixed dtype keeps every chunk of pandas' parallel
#: reader on the same dtype; ``category`` (inferred per chunk) made the chunks
#: disagree and pandas read the whole file again serially (3.5 x slower).
_SIDE_WIDTH = 8
#: Each allowed label as the 64-bit word of its ``S8`` cell, with its side code.
_SIDE_WORDS = tuple((int(np.frombuffer(label.encode("ascii").ljust(_SIDE_WIDTH, b"\0"), np.uint64)[0]), code)
                    for label, code in v.SIDE_LABELS.items())
assert max(len(label) for label in v.SIDE_LABELS) < _SIDE_WIDTH
#: Rows handled per block by :func:`_place_fast`: the temporaries of a block stay
#: in the processor cache. [rows]
_BLOCK_ROWS = 1 << 15


class _Header:
    """What the reader learnt from the lines above the table."""

    def __init__(self):
        self.fields: dict[str, tuple[str, int]] = {}
        self.table_line: int | None = None  # 1-based line of the column header row
        self.columns: list[str] = []
        self.table_offset: int = 0  # byte offset just after the column header row


# --------------------------------------------------------------------------- reading
_CR_MESSAGE = "carriage return inside a line (old Mac line endings?); save with LF or CRLF"


def _looks_utf16(head: bytes) -> bool:
    """True for UTF-16 text: a UTF-16 byte-order mark, or ASCII with every other byte NUL."""
    if head.startswith((b"\xff\xfe", b"\xfe\xff")):
        return True
    pairs = head[: len(head) // 2 * 2]
    if len(pairs) < 16:
        return False
    even, odd = pairs[0::2], pairs[1::2]
    # ASCII text as UTF-16: one byte of each pair NUL, the other printable or a line break.
    for nul, text in ((even, odd), (odd, even)):
        if nul.count(0) == len(nul) and all(b >= 32 or b in (9, 10, 13) for b in text):
            return True
    return False


def _nul_line(head: bytes) -> int:
    """1-based line of the first NUL byte in ``head``; 1 when the text before it is not UTF-8."""
    at = head.index(b"\x00")
    start = head.rfind(b"\n", 0, at) + 1
    try:
        head[:start].decode("utf-8")
    except UnicodeDecodeError:
        return 1  # binary from the start, not a text file with one bad byte
    return head[:start].count(b"\n") + 1

def _read_header(path: str) -> _Header:
    """Parse ``# key: value`` lines and the column header row (bytes, strict UTF-8)."""
    hdr = _Header()
    with open(path, "rb") as fh:
        head = fh.read(8192)
        if head.startswith(b"\x89HDF"):
            raise InputError(f"{where(path, 1)}: this is an HDF5 file, not a floor-scan CSV "
                             "(give it a .h5 name)")
        if _looks_utf16(head):
            raise InputError(f"{where(path, 1)}: UTF-16 text; save as UTF-8")
        if b"\x00" in head:
            raise InputError(f"{where(path, _nul_line(head))}: binary data, not a floor-scan CSV "
                             "text file")
        fh.seek(0)
        lineno = 0
        while True:
            raw = fh.readline(_MAX_HEADER_LINE + 1)
            if not raw:
                break
            lineno += 1
            if _has_bare_cr(raw):
                raise InputError(f"{where(path, lineno)}: {_CR_MESSAGE}")
            if len(raw) > _MAX_HEADER_LINE:
                raise InputError(f"{where(path, lineno)}: line longer than {_MAX_HEADER_LINE} bytes "
                                 "above the table; not a floor-scan CSV")
            if lineno > _MAX_HEADER_LINES:
                raise InputError(f"{where(path, lineno)}: no table header row in the first "
                                 f"{_MAX_HEADER_LINES} lines")
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError:
                raise InputError(f"{where(path, lineno)}: not UTF-8 text") from None
            if lineno == 1 and text.startswith("\ufeff"):
                text = text[1:]
            text = text.strip()
            if not text:
                continue
            if not text.startswith("#"):
                hdr.table_line = lineno
                hdr.table_offset = fh.tell()
                try:
                    names = next(csv.reader([text]), [])
                except csv.Error as exc:
                    raise InputError(f"{where(path, lineno)}: column header row cannot be read "
                                     f"({exc})") from None
                hdr.columns = [c.strip().strip('"').strip().lower() for c in names]
                break
            body = text[1:]
            if ":" not in body:
                continue  # a free comment line
            key, value = body.split(":", 1)
            key = key.strip().lower()
            if not key:
                raise InputError(f"{where(path, lineno)}: header line has an empty key")
            if key in hdr.fields:
                raise InputError(f"{where(path, lineno, key)}: key repeated (first on line "
                                 f"{hdr.fields[key][1]})")
            if key == "version":
                raise InputError(f"{where(path, lineno, key)}: reserved key; the version goes in "
                                 "the 'format' line")
            hdr.fields[key] = (value.strip(), lineno)
    return hdr


def _check_format(hdr: _Header, path: str) -> None:
    if "format" not in hdr.fields:
        raise InputError(f"{where(path, None, 'format')}: missing '# format: {v.FORMAT_NAME} "
                         f"{v.FORMAT_VERSION}' line; not a floor-scan CSV")
    value, line = hdr.fields["format"]
    parts = value.split()
    if not parts or parts[0] != v.FORMAT_NAME:
        raise InputError(f"{where(path, line, 'format')}: {value!r} is not the floor-scan format "
                         f"'{v.FORMAT_NAME}'")
    if len(parts) != 2 or parts[1] != str(v.FORMAT_VERSION):
        raise InputError(f"{where(path, line, 'format')}: unsupported version in {value!r} "
                         f"(this reader knows version {v.FORMAT_VERSION})")


def _grid_keys(hdr: _Header, path: str):
    """The optional anchor/extent keys: (x0, y0, rows, cols) in file units, or None."""
    present = [k for k in v.GRID_KEYS if k in hdr.fields]
    if not present:
        return None
    missing = [k for k in v.GRID_KEYS if k not in hdr.fields]
    if missing:
        raise InputError(f"{where(path, hdr.fields[present[0]][1], missing[0])}: the grid keys "
                         "x0, y0, rows, cols must be given together")
    vals = {}
    for key in ("x0", "y0"):
        value, line = hdr.fields[key]
        vals[key] = v.parse_number(value, path, line, key, sign="any")
    for key in ("rows", "cols"):
        value, line = hdr.fields[key]
        n = v.parse_number(value, path, line, key)
        if n != math.floor(n):
            raise InputError(f"{where(path, line, key)}: must be a whole number, got {value!r}")
        vals[key] = int(n)
    v.check_grid_size(vals["rows"], vals["cols"], path, hdr.fields["rows"][1], "rows")
    return vals["x0"], vals["y0"], vals["rows"], vals["cols"]


def _is_number(tok: str) -> bool:
    """True for the numbers pandas' float parser accepts (decimal, exponent, inf). Error path only."""
    try:
        value = float(tok)  # fast C check first; it also accepts 'nan' and '1_0', refused below
    except ValueError:
        return False
    if value == value and "_" not in tok:
        return bool(_NUMBER.match(tok)) if not math.isinf(value) else (
            tok.lower() in _INF or bool(_NUMBER.match(tok)))
    return False


def _split(text: str) -> list[str]:
    """Fields of one table line (the csv module only when the line has quotes). Error path only."""
    text = text.rstrip("\r\n")
    if '"' in text:
        return next(csv.reader([text]), [])
    return text.split(",")


def _data_lines(path: str, table_line: int, rows) -> dict[int, int]:
    """File line numbers (1-based) of table rows (0-based, blank lines skipped). Error path only."""
    wanted = sorted(set(int(r) for r in rows))
    out: dict[int, int] = {}
    if not wanted:
        return out
    k = -1
    pos = 0
    with open(path, "rb") as fh:
        for lineno, raw in enumerate(fh, start=1):
            if lineno <= table_line or not raw.strip():
                continue
            k += 1
            if k == wanted[pos]:
                out[k] = lineno
                pos += 1
                if pos == len(wanted):
                    break
    return out


def _data_line(path: str, hdr: "_Header", row: int) -> int | None:
    """File line number (1-based) of table row ``row``, or None if not found. Error path only."""
    return _data_lines(path, hdr.table_line, [row]).get(row)


def _line_fields(path: str, lineno: int | None) -> list[str]:
    """The comma-separated fields of one file line. Error path only."""
    with open(path, "rb") as fh:
        for n, raw in enumerate(fh, start=1):
            if n == lineno:
                return _split(raw.decode("utf-8", "replace"))
    return []


def _scan_table(path: str, hdr: _Header, parser_message: str) -> InputError:
    """Go over the table line by line and describe the first structural problem. Error path only."""
    ncol = len(hdr.columns)
    numeric = [(i, c) for i, c in enumerate(hdr.columns) if c in _NUMERIC_COLUMNS]
    with open(path, "rb") as fh:
        for lineno, raw in enumerate(fh, start=1):
            if lineno <= hdr.table_line or not raw.strip():
                continue
            if b"\x00" in raw:
                return InputError(f"{where(path, lineno)}: binary data in the table")
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError:
                return InputError(f"{where(path, lineno)}: not UTF-8 text")
            fields = _split(text)
            if len(fields) > ncol:
                return InputError(f"{where(path, lineno)}: {len(fields)} fields, the header row has "
                                  f"{ncol} ({', '.join(hdr.columns)})")
            for i, name in numeric:
                if i >= len(fields):
                    continue  # short rows are reported after parsing
                tok = fields[i].strip()
                if tok and not _is_number(tok):
                    return InputError(f"{where(path, lineno, name)}: {tok!r} is not a number")
    return InputError(f"{where(path)}: table could not be read ({' '.join(parser_message.split())})")


def _locate_non_numeric(path: str, hdr: _Header, parser_message: str) -> InputError:
    """Re-read the table as text and name the first cell that is not a number. Error path only."""
    numeric = [c for c in hdr.columns if c in _NUMERIC_COLUMNS]
    try:
        df = pd.read_csv(path, engine="c", skiprows=hdr.table_line, header=None, names=hdr.columns,
                         usecols=numeric, dtype=str, keep_default_na=False, na_filter=False,
                         encoding="utf-8", skip_blank_lines=True)
    except (ValueError, UnicodeDecodeError, pd.errors.ParserError):
        return _scan_table(path, hdr, parser_message)
    found = []
    for name in numeric:
        text = df[name]
        bad = (pd.to_numeric(text, errors="coerce").isna() & (text != "")).to_numpy()
        for row in np.flatnonzero(bad)[:1000]:
            if text.iloc[row].strip():  # whitespace-only cells read as missing, not as text
                found.append((int(row), hdr.columns.index(name), name))
                break
    if not found:
        return _scan_table(path, hdr, parser_message)
    row, _, name = min(found)
    line = _data_line(path, hdr, row)
    return InputError(f"{where(path, line, name)}: {df[name].iloc[row].strip()!r} is not a number")


def _row_error(path, hdr, row: int, column: str, nominal_mm: float, factor: float) -> InputError:
    """Explain why table row ``row`` has a missing or bad value in ``column``. Error path only."""
    line = _data_line(path, hdr, row)
    if line is None:
        return InputError(f"{where(path, None, column)}: missing or bad value in table row {row + 1}")
    fields = _line_fields(path, line)
    if len(fields) < len(hdr.columns):
        return InputError(f"{where(path, line)}: short row, {len(fields)} fields where the header row "
                          f"has {len(hdr.columns)} ({', '.join(hdr.columns)})")
    tok = fields[hdr.columns.index(column)].strip()
    if not tok:
        return InputError(f"{where(path, line, column)}: empty")
    value = float(tok)
    if column == "thickness":
        problem = v.thickness_problem(value, nominal_mm, factor)
        if problem:
            return InputError(f"{where(path, line, column)}: {problem}")
    return InputError(f"{where(path, line, column)}: {tok!r} is not finite")


def _has_bare_cr(raw: bytes) -> bool:
    """True when a line holds a carriage return that is not its CRLF (or end-of-file CR) ending.

    pandas ends a line at any CR, the line-by-line reading here only at LF: a
    CR elsewhere (old Mac line endings, a stray CR in a cell, ``\\r\\r\\n``)
    would shift every line number after it, so it is refused.
    """
    if raw.endswith(b"\r\n"):
        raw = raw[:-2]
    elif raw.endswith((b"\n", b"\r")):
        raw = raw[:-1]
    return b"\r" in raw


def _check_table_bytes(path, hdr: _Header, *, count_commas: bool) -> int | None:
    """One pass over the table bytes: refuse a carriage return inside a line; count the commas.

    pandas ends a line at a lone CR where the line-by-line error paths do not,
    so such a file is refused before it is parsed (a CR at the very end of the
    file is a line ending for both).  The CR search is a
    ``memchr`` per block (a file without CR costs almost nothing); only blocks
    holding a CR are looked at byte by byte.  The blocks are small
    (:data:`_SCAN_BLOCK`) so that the comma mask stays in the processor cache.

    Returns
    -------
    The number of commas in the table when ``count_commas``, else None.
    """
    commas = 0
    block = bytearray(_SCAN_BLOCK)
    view = np.frombuffer(block, dtype=np.uint8)
    hits = np.empty(view.shape, dtype=bool) if count_commas else None
    pending = False  # the previous block ended with a CR
    bare = False
    line_start = hdr.table_offset  # file offset of the current line's first byte
    base = hdr.table_offset  # file offset of the block's first byte
    with open(path, "rb", buffering=0) as fh:
        fh.seek(hdr.table_offset)
        while True:
            got = fh.readinto(block)
            if not got:
                if base - line_start > _MAX_TABLE_LINE:
                    _long_line(path, hdr, line_start)
                break
            line_start = _advance_lines(block, got, base, line_start, path, hdr)
            base += got
            if pending and block[0] != 10:
                bare = True
                break
            pending = False
            if block.find(b"\r", 0, got) >= 0:
                at = np.flatnonzero(view[:got] == 13)  # 13 = CR
                if at[-1] == got - 1:
                    pending, at = True, at[:-1]
                if np.any(view[at + 1] != 10):  # a CR not followed by LF
                    bare = True
                    break
            if count_commas:
                np.equal(view[:got], 44, out=hits[:got])  # 44 = ord(",")
                commas += int(np.count_nonzero(hits[:got]))
    if bare:
        with open(path, "rb") as fh:
            for lineno, raw in enumerate(fh, start=1):
                if lineno > hdr.table_line and _has_bare_cr(raw):
                    raise InputError(f"{where(path, lineno)}: {_CR_MESSAGE}")
        raise InputError(f"{where(path)}: {_CR_MESSAGE}")  # not reached: the pass found one
    return commas if count_commas else None


def _advance_lines(block, got: int, base: int, line_start: int, path, hdr) -> int:
    """Check that no line of the table is longer than :data:`_MAX_TABLE_LINE` bytes in this
    block; returns the file offset of the line that runs on past the block.

    A few ``memrchr`` calls per block: each window of the limit's length after a line's
    start must hold a line feed, and the search jumps to the last one found.
    """
    while True:
        lo = max(line_start - base, 0)
        hi = line_start + _MAX_TABLE_LINE + 1 - base  # a line feed must lie before this index
        if hi > got:
            at = block.rfind(b"\n", lo, got)
            return base + at + 1 if at >= 0 else line_start
        at = block.rfind(b"\n", lo, hi)
        if at < 0:
            _long_line(path, hdr, line_start)
        line_start = base + at + 1


def _long_line(path, hdr, line_start: int) -> None:
    """Refuse the table line starting at file offset ``line_start``. Error path only."""
    line = hdr.table_line + 1
    with open(path, "rb") as fh:
        fh.seek(hdr.table_offset)
        left = line_start - hdr.table_offset
        while left > 0:
            chunk = fh.read(min(left, 1 << 20))
            if not chunk:
                break
            line += chunk.count(b"\n")
            left -= len(chunk)
    raise InputError(f"{where(path, line)}: line longer than {_MAX_TABLE_LINE} bytes in the table; "
                     "not a floor-scan CSV row")


def _check_field_count(path, hdr: _Header, n_rows: int, commas: int) -> None:
    """Refuse rows with fewer fields than the header row (``commas`` counted in the table)."""
    if commas == n_rows * (len(hdr.columns) - 1):
        return
    # Slow path: find the short row (quoted commas may explain the count instead).
    with open(path, "rb") as fh:
        for lineno, raw in enumerate(fh, start=1):
            if lineno <= hdr.table_line or not raw.strip():
                continue
            fields = _split(raw.decode("utf-8", "replace"))
            if len(fields) < len(hdr.columns):
                raise InputError(f"{where(path, lineno)}: short row, {len(fields)} fields where the "
                                 f"header row has {len(hdr.columns)} ({', '.join(hdr.columns)})")


def _first_nonfinite(a: np.ndarray):
    with np.errstate(over="ignore", invalid="ignore"):
        total = a.sum()  # one fast reduction; the mask only when something is wrong
    if np.isfinite(total):
        return None
    bad = ~np.isfinite(a)
    return int(np.argmax(bad)) if bad.any() else None


def read_csv_scan(path) -> FloorScan:
    """Read a floor-scan CSV v1 file into a :class:`FloorScan` (lengths in mm).

    Parameters
    ----------
    path : the file; opened read-only and never modified.

    Returns
    -------
    FloorScan
        Thickness grid spanning the scanned cells (or the grid given by the
        ``x0, y0, rows, cols`` keys), ``side``/``plate`` layers when the
        columns are present, ``source`` set to ``path``.

    Raises
    ------
    InputError
        One line naming the file and the line or field, for any violation of
        the format (docs/formats.md, "Validation").
    """
    path = os.fspath(path)
    v.check_regular_file(path, "scan file")
    hdr = _read_header(path)
    _check_format(hdr, path)
    meta, pitch_mm, factor = v.build_meta(hdr.fields, path)
    pitch_u = v.parse_number(hdr.fields["pitch"][0], path, hdr.fields["pitch"][1], "pitch")
    grid = _grid_keys(hdr, path)
    if hdr.table_line is None:
        raise InputError(f"{where(path)}: no table header row (x,y,thickness) after the header lines")
    cols = hdr.columns
    for name in COLUMNS_REQUIRED:
        if name not in cols:
            raise InputError(f"{where(path, hdr.table_line, name)}: required column missing "
                             f"(header row: {','.join(cols)})")
    seen = set()
    for name in cols:
        if name in seen:
            raise InputError(f"{where(path, hdr.table_line, name)}: column repeated")
        seen.add(name)
    unknown = [c for c in cols if c not in COLUMNS_REQUIRED + COLUMNS_OPTIONAL]
    if unknown:
        warnings.warn(f"{where(path, hdr.table_line)}: columns ignored: {', '.join(unknown)}",
                      ScanWarning, stacklevel=2)
    commas = _check_table_bytes(path, hdr, count_commas=any(c not in COLUMNS_REQUIRED for c in cols))
    dtype = {c: ("category" if c not in _NUMERIC_COLUMNS else np.float64) for c in cols}
    if "side" in dtype:
        dtype["side"] = np.dtype(f"S{_SIDE_WIDTH}")
    try:
        df = pd.read_csv(path, engine="c", skiprows=hdr.table_line, header=None, names=cols,
                         dtype=dtype, keep_default_na=False,
                         na_values={c: [""] for c in cols if c in _NUMERIC_COLUMNS},
                         encoding="utf-8", skip_blank_lines=True)
    except (UnicodeDecodeError, pd.errors.ParserError) as exc:
        raise _scan_table(path, hdr, str(exc)) from None
    except ValueError as exc:  # a cell that is not a number
        raise _locate_non_numeric(path, hdr, str(exc)) from None
    n = len(df)
    if n == 0:
        raise InputError(f"{where(path, hdr.table_line)}: the table has no data rows")
    if grid is not None:  # the grid keys' box must hold enough scanned cells for its size
        v.check_grid_size(grid[2], grid[3], path, hdr.fields["rows"][1], "rows", scanned=n)
    table = _Table(df)
    del df
    if commas is None or commas == n * (len(cols) - 1):
        scan = _place_fast(table, grid, pitch_u, pitch_mm, meta, factor, path)
        if scan is not None:
            return scan
    # Something is wrong (or unusual, such as side labels in capitals): the checks one
    # by one, in the documented order, each naming the first offending line.
    return _place_checked(table, grid, pitch_u, pitch_mm, meta, factor, path, hdr, commas)


class _Table:
    """The parsed columns as numpy arrays (views of pandas' buffers); ``None`` when absent."""

    def __init__(self, df: pd.DataFrame):
        self.n = len(df)
        self.x = df["x"].to_numpy(np.float64)
        self.y = df["y"].to_numpy(np.float64)
        self.t = df["thickness"].to_numpy(np.float64)
        self.side = df["side"] if "side" in df.columns else None
        self.plate = df["plate"].to_numpy(np.float64) if "plate" in df.columns else None


def _place_fast(table: _Table, grid, pitch_u, pitch_mm, meta, factor, path) -> FloorScan | None:
    """The scan of a good table in one blocked pass, or None when any check fails.

    Every check of :func:`_place_checked` is made, block by block, on cache-sized
    temporaries (finite coordinates on the grid, inside the grid keys, thickness,
    exact side labels, plate ids, no cell twice) and the rows are put on the grid
    as they pass.  It raises nothing: at the first failure it gives up and
    :func:`_place_checked` finds and names the problem.  The parsed arrays are
    not modified.  The arithmetic is the one of :func:`_place_checked`, so both
    give identical grids.
    """
    # inf - inf and overflowing coordinates only make a check fail: no warnings.
    with np.errstate(invalid="ignore", over="ignore"):
        return _place_fast_body(table, grid, pitch_u, pitch_mm, meta, factor, path)


def _place_fast_body(table: _Table, grid, pitch_u, pitch_mm, meta, factor, path) -> FloorScan | None:
    """Body of :func:`_place_fast` (same arguments, same result)."""
    n = table.n
    x, y, t = table.x, table.y, table.t
    words = None
    if table.side is not None:
        words = _side_words(table.side)
        if words is None:
            return None
    if grid is None:
        # rint((c - anchor) / pitch) never decreases as c grows, so the largest
        # index comes from the largest coordinate.
        x0_u, x1_u, y0_u, y1_u = float(x.min()), float(x.max()), float(y.min()), float(y.max())
        ncols_f = float(np.rint((x1_u - x0_u) / pitch_u)) + 1.0
        nrows_f = float(np.rint((y1_u - y0_u) / pitch_u)) + 1.0
        if not nrows_f * ncols_f <= v.MAX_GRID_CELLS:  # also False for NaN and inf
            return None
        if nrows_f * ncols_f > v.SPARSE_GRID_CELLS and nrows_f * ncols_f > v.MAX_EMPTY_PER_CELL * n:
            return None  # too sparse: refused by _place_checked
        nrows, ncols = int(nrows_f), int(ncols_f)
    else:
        x0_u, y0_u, nrows, ncols = grid
    cells = nrows * ncols
    thickness = np.full(cells, np.nan, dtype=np.float32)
    side = np.zeros(cells, dtype=np.int8) if words is not None else None
    plate = np.full(cells, PLATE_NONE, dtype=np.int32) if table.plate is not None else None
    size = min(n, _BLOCK_ROWS)
    bufs = ((x, np.empty(size), np.empty(size)), (y, np.empty(size), np.empty(size)))
    tol = v.OFF_GRID_TOLERANCE
    id_max = np.iinfo(np.int32).max
    for start in range(0, n, _BLOCK_ROWS):
        stop = min(n, start + _BLOCK_ROWS)
        k = stop - start
        tb = t[start:stop]
        if v.first_bad_thickness(tb, meta.nominal, factor, allow_nan=False) is not None:
            return None
        index = []
        for (coord, dist, near), anchor, limit in zip(bufs, (x0_u, y0_u), (ncols, nrows)):
            c = np.subtract(coord[start:stop], anchor, out=dist[:k])
            c /= pitch_u
            r = np.rint(c, out=near[:k])
            c -= r  # distance from the nearest centre [cells]; NaN for a coordinate not finite
            if not (c.max() <= tol and -c.min() <= tol and r.min() >= 0 and r.max() < limit):
                return None
            index.append(r)
        jf, iff = index
        iff *= ncols  # exact: whole numbers far below 2**53
        iff += jf
        flat = iff.astype(np.intp)
        # Cast first: a float32 scatter is faster than one that casts (same rounding).
        thickness[flat] = (tb if factor == 1.0 else tb * factor).astype(np.float32)
        if words is not None:
            codes = _side_block(words[start:stop])
            if codes is None:
                return None
            if codes is not _NO_CODES:
                side[flat] = codes
        if plate is not None:
            pb = table.plate[start:stop]
            lo, hi = pb.min(), pb.max()
            if np.isnan(lo):  # empty cells (NaN propagates through min): none
                pb = np.where(np.isnan(pb), float(PLATE_NONE), pb)
                lo, hi = pb.min(), pb.max()
            if not (lo >= PLATE_NONE and hi <= id_max):
                return None
            ids = pb.astype(np.int32)
            if not (ids == pb).all():  # whole numbers only
                return None
            plate[flat] = ids
    if int(np.count_nonzero(~np.isnan(thickness))) != n:
        return None  # a cell given twice
    if side is not None:
        side = side.reshape(nrows, ncols)
    if plate is not None:
        plate = plate.reshape(nrows, ncols)
    return FloorScan(thickness=thickness.reshape(nrows, ncols), x0=x0_u * factor, y0=y0_u * factor,
                     pitch=pitch_mm, meta=meta, side=side, plate=plate, source=path)


#: Returned by :func:`_side_block` for a block of code 0 only (nothing to write).
_NO_CODES = np.zeros(0, dtype=np.int8)


def _side_block(words: np.ndarray):
    """Side codes of ``S8`` cells seen as 64-bit words; None when one is not an exact label.

    The labels are tried in :data:`_SIDE_WORDS` order (unknown first) and the
    search stops once every cell is matched; :data:`_NO_CODES` when every code
    is 0 (unknown).
    """
    matched = 0
    codes = None
    for word, code in _SIDE_WORDS:
        hit = words == word
        count = int(np.count_nonzero(hit))
        matched += count
        if count and code:
            if codes is None:
                codes = np.zeros(words.size, dtype=np.int8)
            codes[hit] = code
        if matched == words.size:
            return _NO_CODES if codes is None else codes
    return None


def _place_checked(table: _Table, grid, pitch_u, pitch_mm, meta, factor, path, hdr,
                   commas) -> FloorScan:
    """Check the table in the documented order, naming the first problem; else the scan.

    The path for a table that :func:`_place_fast` gave up on: raises the
    :class:`InputError` of the first check that fails, or returns the scan of
    a good but unusual table (side labels in capitals or with spaces).  It
    reuses the parsed x and y buffers in place.
    """
    n = table.n
    side_codes = side_text = None
    if table.side is not None:
        side_codes = _side_codes(table.side)
        if side_codes is None:
            # Not every cell an exact label: read the column as text now, so that text
            # which is not UTF-8 is refused first, as a table that cannot be read.
            try:
                side_text = _side_text(path, hdr)
            except (UnicodeDecodeError, pd.errors.ParserError) as exc:
                raise _scan_table(path, hdr, str(exc)) from None
    x, y, t = table.x, table.y, table.t
    # Missing or bad values: the earliest row wins, then the column order x, y, thickness.
    candidates = [(r, c) for r, c in ((_first_nonfinite(x), "x"), (_first_nonfinite(y), "y"),
                                      (v.first_bad_thickness(t, meta.nominal, factor, allow_nan=False),
                                       "thickness")) if r is not None]
    if candidates:
        row, column = min(candidates, key=lambda rc: (rc[0], COLUMNS_REQUIRED.index(rc[1])))
        raise _row_error(path, hdr, row, column, meta.nominal, factor)

    if commas is not None:
        # Rows short of trailing optional fields parse without a trace; count the commas.
        _check_field_count(path, hdr, n, commas)
    if side_text is not None:
        side_codes = _side_codes_text(side_text, path, hdr)
    plate_ids = _plate_ids(table.plate, path, hdr) if table.plate is not None else None

    # ---- put the rows on the grid (file units) ----------------------------------
    # Fresh large arrays cost page faults, so the parsed x and y buffers are reused
    # in place (they become column and row indices) with one scratch array.
    if grid is None:
        x0_u, y0_u = float(x.min()), float(y.min())
    else:
        x0_u, y0_u, nrows, ncols = grid
    x, y = _writable(x), _writable(y)
    spare = np.empty_like(x)
    index = {}
    for name, coord, anchor in (("x", x, x0_u), ("y", y, y0_u)):
        coord -= anchor
        coord /= pitch_u
        near = np.rint(coord, out=spare)
        dist = np.subtract(coord, near, out=coord)  # distance from the nearest centre [cells]
        if max(float(dist.max()), -float(dist.min())) > v.OFF_GRID_TOLERANCE:
            row = int(np.argmax(np.abs(dist) > v.OFF_GRID_TOLERANCE))
            line = _data_line(path, hdr, row)
            fields = _line_fields(path, line)
            k = hdr.columns.index(name)
            text = fields[k].strip() if k < len(fields) else "?"
            raise InputError(
                f"{where(path, line, name)}: {text} is off the grid ({abs(dist[row]):.3f} "
                f"of a cell from the nearest centre; pitch {pitch_u:g}, anchor {anchor:g})")
        index[name] = near
        spare = dist  # the distances are no longer needed: reuse the buffer
    del spare, dist, near, coord
    jf, iff = index.pop("x"), index.pop("y")
    if grid is None:
        nrows_f, ncols_f = float(iff.max()) + 1.0, float(jf.max()) + 1.0
        v.check_grid_size(nrows_f, ncols_f, path, hdr.table_line, "x, y", scanned=n)
        nrows, ncols = int(nrows_f), int(ncols_f)
    elif (float(jf.min()) < 0 or float(jf.max()) >= ncols or float(iff.min()) < 0
          or float(iff.max()) >= nrows):
        outside = (jf < 0) | (jf >= ncols) | (iff < 0) | (iff >= nrows)
        row = int(np.argmax(outside))
        line = _data_line(path, hdr, row)
        raise InputError(f"{where(path, line)}: cell ({_cell_text(path, hdr, line)}) lies outside the "
                         f"grid given by x0, y0, rows, cols")
    iff *= ncols  # exact: whole numbers far below 2**53
    iff += jf
    flat = iff.astype(np.intp)
    del jf, iff, x, y

    cells = nrows * ncols
    thickness = np.full(cells, np.nan, dtype=np.float32)
    if factor == 1.0:
        thickness[flat] = t
    else:
        thickness[flat] = t * factor
    filled = int(np.count_nonzero(~np.isnan(thickness)))
    if filled != n:
        raise _duplicate_error(path, hdr, flat)
    side = plate = None
    if side_codes is not None:
        side = np.zeros(cells, dtype=np.int8)
        side[flat] = side_codes
        side = side.reshape(nrows, ncols)
    if plate_ids is not None:
        plate = np.full(cells, PLATE_NONE, dtype=np.int32)
        plate[flat] = plate_ids
        plate = plate.reshape(nrows, ncols)
    return FloorScan(thickness=thickness.reshape(nrows, ncols), x0=x0_u * factor, y0=y0_u * factor,
                     pitch=pitch_mm, meta=meta, side=side, plate=plate, source=path)


def _duplicate_error(path, hdr, flat) -> InputError:
    """Name both lines of the first repeated cell (by the later line). Error path only."""
    order = np.argsort(flat, kind="stable")
    sf = flat[order]
    dup = np.nonzero(sf[1:] == sf[:-1])[0]
    second = order[dup + 1]
    k = int(np.argmin(second))
    a, b = int(order[dup[k]]), int(second[k])
    lines = _data_lines(path, hdr.table_line, [a, b])
    if a not in lines or b not in lines:
        return InputError(f"{where(path)}: duplicate cell in table rows {a + 1} and {b + 1}")
    return InputError(f"{where(path, lines[b])}: duplicate cell ({_cell_text(path, hdr, lines[b])}), "
                      f"already given on line {lines[a]}")


def _cell_text(path, hdr, line) -> str:
    """``x, y`` as written on a file line. Error path only."""
    fields = _line_fields(path, line)
    if len(fields) < len(hdr.columns):
        return "?"
    return ", ".join(fields[hdr.columns.index(c)].strip() for c in ("x", "y"))


def _writable(a: np.ndarray) -> np.ndarray:
    """``a`` itself when it may be modified in place (a buffer only this reader holds), else a copy."""
    if not a.flags.writeable:
        try:
            a.flags.writeable = True
        except ValueError:
            return a.copy()
    return a


def _side_codes(col: pd.Series) -> np.ndarray | None:
    """Side codes (int8) of the ``side`` column parsed as ``S8`` cells, or None.

    None when some cell is not an allowed label written exactly (another
    spelling such as `` Top `` or ``UNDER``, or a bad value): then
    :func:`_side_text` and :func:`_side_codes_text` read and check the column.
    """
    words = _side_words(col)
    codes = None if words is None else _side_block(words)
    if codes is _NO_CODES:
        return np.zeros(words.size, dtype=np.int8)
    return codes


def _side_words(col: pd.Series) -> np.ndarray | None:
    """The ``S8`` cells of the parsed ``side`` column as 64-bit words (a view), or None."""
    words = col.to_numpy()
    if words.dtype != np.dtype(f"S{_SIDE_WIDTH}"):
        return None
    return np.ascontiguousarray(words).view(np.uint64)


def _side_text(path, hdr) -> pd.Series:
    """The ``side`` column read again as text (categories as written). Unusual files only."""
    return pd.read_csv(path, engine="c", skiprows=hdr.table_line, header=None, names=hdr.columns,
                       usecols=["side"], dtype={"side": "category"}, keep_default_na=False,
                       encoding="utf-8", skip_blank_lines=True)["side"]


def _side_codes_text(col: pd.Series, path, hdr) -> np.ndarray:
    """Side codes of the ``side`` column as text: labels in any case, with spaces; refuse others."""
    cats = [str(c).strip().lower() for c in col.cat.categories]
    bad = [i for i, c in enumerate(cats) if c not in v.SIDE_LABELS]
    codes = col.cat.codes.to_numpy()
    if bad:
        row = int(np.argmax(np.isin(codes, bad)))
        line = _data_line(path, hdr, row)
        raise InputError(f"{where(path, line, 'side')}: {col.iloc[row]!r} is not a side "
                         "(allowed: top, under, unknown or empty)")
    lut = np.array([v.SIDE_LABELS[c] for c in cats] + [0], dtype=np.int8)
    return lut[codes]  # code -1 (missing) picks the trailing 0 = unknown


def _plate_ids(p: np.ndarray, path, hdr) -> np.ndarray:
    """Plate ids (int32, :data:`PLATE_NONE` for empty cells) of the parsed ``plate`` column (float64)."""
    missing = np.isnan(p)
    with np.errstate(invalid="ignore"):
        bad = ~missing & ((p != np.floor(p)) | (p < PLATE_NONE) | (p > np.iinfo(np.int32).max))
    if bad.any():
        row = int(np.argmax(bad))
        line = _data_line(path, hdr, row)
        raise InputError(f"{where(path, line, 'plate')}: {float(p[row])!r} is not a plate id "
                         "(a whole number >= 0, or empty for none)")
    return np.where(missing, PLATE_NONE, p).astype(np.int32)


# --------------------------------------------------------------------------- writing
def _coordinate_decimals(pitch_u: float) -> int:
    """Decimals that keep coordinates within 1e-6 of a cell of the exact value."""
    return int(min(15, max(0, math.ceil(-math.log10(pitch_u * 1e-6)))))


def _short_values(t32: np.ndarray, factor: float) -> np.ndarray:
    """Thickness in file units as float64 with the fewest significant digits that read back.

    For each value the shortest decimal ``d`` (1 to 9 significant digits) with
    ``float32(d * factor) == t32`` is chosen, so that an inch file converts back
    to the identical float32 millimetre value; ``d`` is returned as the float64
    nearest to it, whose shortest text is ``d``.
    """
    exact = t32.astype(np.float64) / factor
    out = exact.copy()
    todo = np.isfinite(exact) & (exact > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        expo = np.floor(np.log10(np.where(todo, exact, 1.0)))
    for digits in range(1, 10):
        k = digits - 1 - expo  # decimals to keep
        pos = k >= 0
        scale = 10.0 ** np.abs(k)
        q = np.where(pos, np.rint(exact * scale) / scale, np.rint(exact / scale) * scale)
        ok = todo & ((q * factor).astype(np.float32) == t32)
        out[ok] = q[ok]
        todo &= ~ok
        if not todo.any():
            break
    return out


def write_csv_scan(scan: FloorScan, path) -> None:
    """Write ``scan`` as a floor-scan CSV v1 file in ``scan.meta.units``.

    One row per scanned cell, row-major (increasing y, then x).  The grid keys
    ``x0, y0, rows, cols`` are written so that unscanned border rows and
    columns survive a round trip.  The file is written to a temporary file in
    the target folder and renamed into place.

    Parameters
    ----------
    scan : the scan.
    path : output file.
    """
    meta = scan.meta
    factor = v.UNIT_FACTORS[meta.units]
    for key in meta.extra:
        if key in v.KNOWN_KEYS or key in v.RESERVED_KEYS or ":" in key or not key.strip():
            raise ValueError(f"extra metadata key {key!r} cannot be written")
    lines = [f"# format: {v.FORMAT_NAME} {v.FORMAT_VERSION}"]
    if meta.tank:
        lines.append(f"# tank: {meta.tank}")
    lines.append(f"# inspected: {meta.inspected.isoformat()}")
    if meta.method:
        lines.append(f"# method: {meta.method}")
    lines.append(f"# units: {meta.units}")
    lines.append(f"# pitch: {v.format_scalar(scan.pitch, factor)}")
    lines.append(f"# nominal: {v.format_scalar(meta.nominal, factor)}")
    if meta.threshold is not None:
        lines.append(f"# threshold: {v.format_scalar(meta.threshold, factor)}")
    if meta.sigma is not None:
        lines.append(f"# sigma: {v.format_scalar(meta.sigma, factor)}")
    if meta.installed is not None:
        lines.append(f"# installed: {meta.installed.isoformat()}")
    rows, cols = scan.shape
    lines.append(f"# x0: {v.format_scalar(scan.x0, factor)}")
    lines.append(f"# y0: {v.format_scalar(scan.y0, factor)}")
    lines.append(f"# rows: {rows}")
    lines.append(f"# cols: {cols}")
    for key, value in meta.extra.items():
        text = " ".join(str(value).split())
        lines.append(f"# {key}: {text}")

    mask = scan.scanned
    ii, jj = np.nonzero(mask)
    pitch_u = v.unit_scalar(scan.pitch, factor)
    x0_u = v.unit_scalar(scan.x0, factor)
    y0_u = v.unit_scalar(scan.y0, factor)
    dec = _coordinate_decimals(pitch_u)
    data = {"x": np.round(x0_u + jj * pitch_u, dec), "y": np.round(y0_u + ii * pitch_u, dec)}
    t32 = scan.thickness[mask]
    data["thickness"] = t32 if factor == 1.0 else _short_values(t32, factor)
    if scan.side is not None:
        codes = scan.side[mask]
        if codes.size and (codes.min() < 0 or codes.max() > 2):
            raise ValueError("side layer holds codes other than 0, 1, 2")
        data["side"] = pd.Categorical.from_codes(codes.astype(np.int64),
                                                 categories=[SIDE_NAMES[k] for k in range(3)])
    if scan.plate is not None:
        ids = scan.plate[mask]
        data["plate"] = pd.arrays.IntegerArray(ids.astype(np.int32), ids == PLATE_NONE)
    df = pd.DataFrame(data)
    with v.atomic_output(path) as tmp:
        with open(tmp, "w", encoding="utf-8", newline="\n") as fh:
            fh.write("\n".join(lines) + "\n")
            df.to_csv(fh, index=False, lineterminator="\n")
