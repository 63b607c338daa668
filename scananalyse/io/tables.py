"""Tables written for people, and the side files people write.

Writing: one CSV writer for every table the tool writes.

Every CSV goes through :func:`write_csv`:

- it is written to a temporary file beside the target and renamed into place
  (:func:`scananalyse.io.validate.atomic_output`), so a reader never sees half a table;
- text cells that a spreadsheet would run as a formula (a leading ``=``, ``+``, ``-``,
  ``@``, tab or carriage return) get a leading apostrophe, the usual neutralisation
  recommended for CSV files opened in spreadsheets [OWASP, "CSV Injection"; common
  practice].  Numbers are never changed: only text cells (object or string columns)
  are looked at, so a negative number stays a number.

Reading: the parsing shared by the side-file readers (the shapes file of
:func:`scananalyse.attribution.read_shapes`, the repair records of
:func:`scananalyse.rates.read_repairs`, the engineer's patch set of
:func:`scananalyse.repair.read_patches`).  Every problem is an
:class:`~scananalyse.errors.InputError` naming the file and the line or field, and
every reader is bounded by what it will hold: a regular file only (a folder or a FIFO
is refused by name), at most :data:`MAX_SIDE_FILE_BYTES`, lines of at most
:data:`MAX_LINE_CHARS` characters, numbers of at most :data:`MAX_NUMBER_CHARS`
characters and lengths of at most :data:`MAX_LENGTH_MM`.
"""

from __future__ import annotations

import csv
import math
import os
import re

import pandas as pd

from ..errors import InputError, where
from .validate import atomic_output, check_regular_file

__all__ = ["neutralise_text", "neutralise_frame", "write_csv", "FORMULA_LEADS", "read_text_lines",
           "csv_fields", "parse_field_number", "check_length_mm", "MAX_SIDE_FILE_BYTES", "MAX_LINE_CHARS",
           "MAX_NUMBER_CHARS", "MAX_LENGTH_MM", "PATCH_THICKNESS_RANGE_MM", "check_patch_thickness", "shown"]

#: Largest side file (shapes, repairs, patches, DXF drawing) read: a floor's side files
#: are a few kilobytes to a few megabytes. [bytes]
MAX_SIDE_FILE_BYTES = 64 << 20
#: Longest line of a side file (below the csv module's 128 KiB field limit). [characters]
MAX_LINE_CHARS = 65536
#: Longest text read as one number. [characters]
MAX_NUMBER_CHARS = 64
#: Largest coordinate or length accepted in a side file: 10 km, far beyond any tank
#: floor; larger values are typing errors and would overflow the grid arithmetic. [mm]
MAX_LENGTH_MM = 1e7
#: Patch-plate thicknesses accepted from a patch file: lap-welded floor patches are 6 to
#: 12 mm plate [common practice]; 3 to 25 mm is accepted, anything else is a unit
#: mix-up or a typing error and is refused. [mm]
PATCH_THICKNESS_RANGE_MM = (3.0, 25.0)

_LINE_BREAK = re.compile(r"\r\n|\n|\r")

#: Leading characters a spreadsheet reads as the start of a formula.
FORMULA_LEADS = ("=", "+", "-", "@", "\t", "\r")


def neutralise_text(value):
    """``value`` with a leading apostrophe if it is text a spreadsheet would run as a formula;
    anything else unchanged."""
    if isinstance(value, str) and value.startswith(FORMULA_LEADS):
        return "'" + value
    return value


def neutralise_frame(df: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``df`` whose text cells (and column names) are :func:`neutralise_text`-ed."""
    out = df.copy()
    for c in out.columns:
        if out[c].dtype == object or pd.api.types.is_string_dtype(out[c].dtype):
            out[c] = out[c].map(neutralise_text)
    out.columns = [neutralise_text(c) for c in out.columns]
    return out


def with_inch_columns(df: pd.DataFrame) -> pd.DataFrame:
    """``df`` with an inch column after every numeric length column and a mils-per-year
    column after every rate column (the SI columns stay as they are).

    ``<name>_mm`` gets ``<name>_in`` (÷ 25.4, 4 decimals); ``<name>_mm_y`` gets
    ``<name>_mpy`` (÷ 0.0254, 2 decimals).  1 in = 25.4 mm exactly (NIST SP 811, B.8).
    """
    out = df.copy()
    cols = []
    for c in df.columns:
        cols.append(c)
        name = str(c)
        num = pd.api.types.is_numeric_dtype(df[c])
        if num and name.endswith("_mm_y"):
            new = name[:-5] + "_mpy"
            out[new] = (pd.to_numeric(df[c], errors="coerce") / 0.0254).round(2)
            cols.append(new)
        elif num and name.endswith("_mm"):
            new = name[:-3] + "_in"
            out[new] = (pd.to_numeric(df[c], errors="coerce") / 25.4).round(4)
            cols.append(new)
    return out[[c for c in dict.fromkeys(cols)]]


def write_csv(df: pd.DataFrame, path, *, float_format: str | None = None, inch_columns: bool = False) -> None:
    """Write ``df`` as a CSV (no index, UTF-8, ``\\n`` line ends) atomically, text cells
    neutralised against spreadsheet formulas (:func:`neutralise_text`).

    Parameters
    ----------
    df : the table. [-]
    path : the file to write. [-]
    float_format : printf-style format of floating-point cells (pandas' ``float_format``);
        None writes the shortest text that reads back to the same value. [-]
    inch_columns : add inch and mils-per-year columns beside the SI ones
        (:func:`with_inch_columns`; ``--csv-units in``). [-]
    """
    safe = neutralise_frame(with_inch_columns(df) if inch_columns else df)
    with atomic_output(path) as tmp:
        with open(tmp, "w", newline="", encoding="utf-8") as fh:
            safe.to_csv(fh, index=False, float_format=float_format, lineterminator="\n")


# --------------------------------------------------------------------------- reading
def read_text_lines(path, *, what: str = "file") -> list[str]:
    """The lines of a UTF-8 side file (a leading byte-order mark dropped).

    Parameters
    ----------
    path : the file. [-]
    what : what the file is, for messages (e.g. ``"shapes file"``). [-]

    Raises
    ------
    InputError
        The file is missing, not a regular file, larger than :data:`MAX_SIDE_FILE_BYTES`,
        holds a NUL byte or a byte that is not UTF-8 (naming the line), or a line longer
        than :data:`MAX_LINE_CHARS` (naming the line).
    """
    p = os.fspath(path)
    try:
        check_regular_file(p, what)
    except InputError as exc:
        raise InputError(str(exc).replace(f"{p}: ", f"{p}: cannot read: ", 1)) from None
    try:
        with open(p, "rb") as fh:
            data = fh.read(MAX_SIDE_FILE_BYTES + 1)
    except OSError as exc:
        raise InputError(f"{where(p)}: cannot read: {exc.strerror or type(exc).__name__}") from None
    if len(data) > MAX_SIDE_FILE_BYTES:
        raise InputError(f"{where(p)}: larger than {MAX_SIDE_FILE_BYTES >> 20} MiB; not a {what}")
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
    nul = data.find(b"\x00")
    if nul >= 0:
        raise InputError(f"{where(p, _line_at(data, nul))}: binary data (a NUL byte); not a {what}")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        bad = data[exc.start]
        raise InputError(f"{where(p, _line_at(data, exc.start))}: byte 0x{bad:02x} is not UTF-8 text "
                         "(a Latin-1 or Windows export?); save the file as UTF-8") from None
    lines = _LINE_BREAK.split(text)
    if lines and lines[-1] == "":
        lines.pop()
    for n, line in enumerate(lines, start=1):
        if len(line) > MAX_LINE_CHARS:
            raise InputError(f"{where(p, n)}: line of {len(line)} characters, longer than the limit of "
                             f"{MAX_LINE_CHARS}; not a {what}")
    return lines


def _line_at(data: bytes, offset: int) -> int:
    """1-based line of byte ``offset`` (any of LF, CRLF, CR ends a line, as in
    :func:`read_text_lines`)."""
    head = data[:offset]
    return len(_LINE_BREAK.findall(head.decode("latin-1"))) + 1


def shown(text, limit: int = 40, *, quote: bool = True) -> str:
    """``text`` for a message: ``repr`` (or as is), cut to about ``limit`` characters."""
    t = str(text)
    cut = t if len(t) <= limit else t[:limit] + f"... ({len(t)} characters)"
    return repr(cut) if quote else cut


def csv_fields(line: str, path, n: int) -> list[str]:
    """The fields of one CSV line (quotes allowed); :class:`InputError` naming the line when
    the csv module cannot read it."""
    try:
        return next(csv.reader([line]), [])
    except csv.Error as exc:
        raise InputError(f"{where(path, n)}: cannot read as CSV ({exc})") from None


def parse_field_number(text, path, line, field, *, positive: bool = False, nonneg: bool = False,
                       allow_blank: bool = False, limit: float | None = MAX_LENGTH_MM,
                       scale: float = 1.0) -> float:
    """One number of a side file, checked, times ``scale``.

    Parameters
    ----------
    text : the field as written. [-]
    path, line, field : where it is, for messages. [-]
    positive, nonneg : require > 0, or >= 0. [-]
    allow_blank : an empty field gives NaN instead of an error. [-]
    limit : largest magnitude accepted after scaling (None: any finite number). [the unit of the result]
    scale : factor to the result's unit (e.g. 25.4 for inches to mm). [-]

    Raises
    ------
    InputError
        Empty (unless ``allow_blank``), not a number, longer than :data:`MAX_NUMBER_CHARS`,
        not finite (NaN, inf, or overflowing such as ``1e400``), above ``limit``, or of the
        wrong sign; the message names the file, the line and the field.
    """
    s = str(text).strip()
    loc = where(path, line, field)
    if s == "":
        if allow_blank:
            return math.nan
        raise InputError(f"{loc}: value missing")
    if len(s) > MAX_NUMBER_CHARS:
        raise InputError(f"{loc}: not a number (a field of {len(s)} characters)")
    try:
        v = float(s)
    except ValueError:
        raise InputError(f"{loc}: not a number: {s!r}") from None
    if not math.isfinite(v):
        raise InputError(f"{loc}: not a finite number: {s!r}")
    v = v * scale
    if not math.isfinite(v) or (limit is not None and abs(v) > limit):
        raise InputError(f"{loc}: {s} is beyond the limit of {limit:g} (a typing error or wrong units?)")
    if positive and v <= 0:
        raise InputError(f"{loc}: must be positive (> 0), got {s}")
    if nonneg and v < 0:
        raise InputError(f"{loc}: must not be negative (>= 0), got {s}")
    return v


def check_length_mm(value: float, path, line, field) -> float:
    """``value`` [mm] when finite and within :data:`MAX_LENGTH_MM`; else :class:`InputError`."""
    if not (math.isfinite(value) and abs(value) <= MAX_LENGTH_MM):
        raise InputError(f"{where(path, line, field)}: {value:g} mm is beyond the limit of "
                         f"{MAX_LENGTH_MM:g} mm (a typing error or wrong units?)")
    return value


def check_patch_thickness(value: float, path, line, field="thickness_mm") -> float:
    """``value`` [mm] when NaN (not given) or within :data:`PATCH_THICKNESS_RANGE_MM`;
    else :class:`InputError` naming the place."""
    lo, hi = PATCH_THICKNESS_RANGE_MM
    if math.isnan(value):
        return value
    if not lo <= value <= hi:
        raise InputError(f"{where(path, line, field)}: patch plate of {value:g} mm is outside {lo:g} to "
                         f"{hi:g} mm (floor patches are 6 to 12 mm plate, common practice); wrong units "
                         "or a typing error")
    return value
