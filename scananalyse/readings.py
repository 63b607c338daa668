"""Spot readings: hand UT, prove-up UT and pit-gauge depths (readings CSV, version 1).

A floor scan leaves places the crawler cannot reach (the critical zone within a
few centimetres of the shell, lap welds, plate corners), and its loss depths are
sized with an error of the order of ±10–20 % of wall [memory, domain notes §10].
The engineer answers both with readings taken by hand:

``ut``
    a UT thickness where the scan did not reach, or as a check;
``prove-up``
    a UT thickness at an indication of the scan (the UT value governs at its spot
    [practice]);
``pit-gauge``
    a top-side pit depth measured from above (the loss there is top-side).

This module reads them (:func:`read_readings`), puts them on a scan's grid
(:func:`pair_readings`), checks the scan's loss sizing against the prove-ups
(:func:`sizing_check`, :func:`correct_undersizing`), lets them govern at their
cells (:func:`apply_readings`), assesses the zones from the readings alone
(:func:`reading_zone_summary`) and lists the indications to prove up next
(:func:`prove_up_candidates`).

Readings are points: the metal between them is unseen, and every table here says
how many points (and what length of floor) a result rests on.

Order of use in a job (``compare``/``assess`` with ``--readings``):

1. :func:`read_readings` for each file; files of one outage (told apart by
   ``inspected``, nearest scan date) joined by :func:`merge_readings`; older
   readings given in the older scan's frame moved by the registration
   (:func:`move_readings`).
2. :func:`pair_readings` with each scan of the same outage.
3. :func:`sizing_check` on the newer pairs, :func:`apply_readings`, then
   :func:`correct_undersizing` on the applied thickness with ``proved_mask`` =
   ``applied.proved``: the corrected map goes into the rest of the job;
   ``applied.depth_top`` is a measured top-side depth map for attribution.
4. After the zones: :func:`reading_zone_summary` (zones read by hand: the critical
   zone first of all); after the indication list: :func:`prove_up_candidates`.

Everything is mm, mm/y and years.
"""

from __future__ import annotations

import csv
import datetime as _dt
import math
import os
import stat
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

import dataclasses

from .assess import AssessOptions, add_years, code_interval
from .errors import InputError, where
from .io import validate as v
from .scan import SIDE_TOP, SIDE_UNDER, years_between

if TYPE_CHECKING:  # annotations only
    from .job import Job
    from .scan import FloorScan

__all__ = [
    "split_readings",
    "job_readings",
    "apply_new_readings",
    "apply_old_readings",
    "add_reading_zones",
    "off_scan",
    "zone_spots",
    "readings_result",
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "KINDS",
    "READING_COLUMNS",
    "MAX_FILE_BYTES",
    "MAX_LINE_BYTES",
    "MAX_FIELD_CHARS",
    "Readings",
    "SizingCheck",
    "AppliedReadings",
    "read_readings",
    "merge_readings",
    "move_readings",
    "pair_readings",
    "sizing_check",
    "correct_undersizing",
    "apply_readings",
    "reading_zones",
    "reading_spots",
    "reading_zone_summary",
    "SUMMARY_COLUMNS",
    "prove_up_candidates",
]

#: Format name of the ``# format:`` line (``scananalyse-readings 1``).
FORMAT_NAME = "scananalyse-readings"
#: The only version this module reads.
FORMAT_VERSION = 1
#: Reading kinds and the value column each needs.
KINDS = {"ut": "thickness", "prove-up": "thickness", "pit-gauge": "depth"}
#: Columns of :attr:`Readings.table`, in order.
READING_COLUMNS = ("x_mm", "y_mm", "kind", "thickness_mm", "depth_mm", "side", "id", "note", "line")
#: Largest readings file read (a file of spot readings is kilobytes). [bytes]
MAX_FILE_BYTES = 50 * 1024 * 1024
#: Longest line read. [bytes]
MAX_LINE_BYTES = 10000
#: Longest field (header value or table cell). [characters]
MAX_FIELD_CHARS = 1000

_REQUIRED_KEYS = ("format", "inspected", "units")
_KNOWN_KEYS = _REQUIRED_KEYS + ("tank", "sigma")
_COLUMNS_REQUIRED = ("x", "y", "kind")
_COLUMNS_OPTIONAL = ("thickness", "depth", "side", "id", "note")
_SIDES = {"": "unknown", "unknown": "unknown", "top": "top", "under": "under"}


@dataclass(eq=False)
class Readings:
    """Spot readings of one outage, lengths in mm whatever the file's unit.

    Parameters
    ----------
    inspected : date of the readings.
    units : unit of the source file, ``"mm"`` or ``"in"``.
    table : one reading a row, columns :data:`READING_COLUMNS`: ``x_mm``, ``y_mm``
        [mm, floor frame], ``kind`` (``ut``, ``prove-up``, ``pit-gauge``),
        ``thickness_mm`` [mm] (NaN on pit-gauge rows), ``depth_mm`` [mm] (NaN on
        UT rows), ``side`` (``top``, ``under``, ``unknown``), ``id``, ``note``
        (text, ``""`` when empty) and ``line`` (1-based line of the file).
    sigma_mm : one-standard-deviation uncertainty of a reading, or None. [mm]
    tank : tank identifier (free text).
    extra : unknown header keys, kept verbatim.
    source : the file read, for messages.
    """

    inspected: _dt.date
    units: str
    table: pd.DataFrame
    sigma_mm: float | None = None
    tank: str = ""
    extra: dict = field(default_factory=dict)
    source: str | None = None

    def __len__(self) -> int:
        return len(self.table)


# --------------------------------------------------------------------------- reading
def _decode(raw: bytes, path, lineno: int) -> str:
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError:
        raise InputError(f"{where(path, lineno)}: not UTF-8 text") from None


def _check_field(text: str, path, lineno: int, name: str) -> str:
    if len(text) > MAX_FIELD_CHARS:
        raise InputError(f"{where(path, lineno, name)}: longer than {MAX_FIELD_CHARS} characters")
    return text


def _lines(path: str):
    """The file's lines as (1-based number, text), after the file-level checks."""
    try:
        st = os.stat(path)
    except OSError as exc:
        raise InputError(f"{where(path)}: cannot be read ({exc.strerror})") from None
    if not stat.S_ISREG(st.st_mode):
        raise InputError(f"{where(path)}: not a regular file")
    if st.st_size > MAX_FILE_BYTES:
        raise InputError(f"{where(path)}: {st.st_size} bytes, above the limit of {MAX_FILE_BYTES} "
                         "bytes for a readings file")
    try:
        with open(path, "rb") as fh:
            data = fh.read(MAX_FILE_BYTES + 1)
    except OSError as exc:
        raise InputError(f"{where(path)}: cannot be read ({exc.strerror})") from None
    if len(data) > MAX_FILE_BYTES:
        raise InputError(f"{where(path)}: above the limit of {MAX_FILE_BYTES} bytes for a readings file")
    if data.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise InputError(f"{where(path, 1)}: UTF-16 text; save as UTF-8")
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
    out = []
    for lineno, raw in enumerate(data.split(b"\n"), start=1):
        if len(raw) > MAX_LINE_BYTES:
            raise InputError(f"{where(path, lineno)}: line longer than {MAX_LINE_BYTES} bytes")
        if raw.endswith(b"\r"):
            raw = raw[:-1]
        if b"\r" in raw:
            raise InputError(f"{where(path, lineno)}: carriage return inside a line; save with LF "
                             "or CRLF line endings")
        if b"\x00" in raw:
            raise InputError(f"{where(path, lineno)}: binary data, not a readings CSV text file")
        out.append((lineno, _decode(raw, path, lineno)))
    return out


def _split_row(text: str, path, lineno: int) -> list[str]:
    try:
        return next(csv.reader([text], strict=True), [])
    except csv.Error as exc:
        raise InputError(f"{where(path, lineno)}: row cannot be read ({exc})") from None


def read_readings(path) -> Readings:
    """Read a readings CSV, version 1 (design contract §3.6, docs/formats.md).

    Parameters
    ----------
    path : the file.

    Returns
    -------
    Readings
        Coordinates, thicknesses and depths converted to mm (1 in = 25.4 mm).

    Raises
    ------
    InputError
        One line naming the file and the line (and field) of the first problem: not a
        regular file, above :data:`MAX_FILE_BYTES`, a line above
        :data:`MAX_LINE_BYTES`, a field above :data:`MAX_FIELD_CHARS`, text that is
        not UTF-8, a missing or wrong ``format``, a missing key, a bad date or
        units, a bad ``sigma``, a missing or repeated column, an unknown column, a
        row with another number of fields, a bad coordinate, an unknown kind, a
        missing, non-finite or non-positive thickness, a missing, non-finite or
        negative depth, a value in the column the kind does not use, a bad side, a
        pit-gauge reading on the underside, a repeated id, no readings at all.

    Notes
    -----
    On a ``pit-gauge`` row an empty ``side`` reads as ``top`` (a pit gauge measures
    from above); ``under`` is refused there.
    """
    path = os.fspath(path)
    lines = _lines(path)
    fields, columns, table_line = _header_lines(lines, path)
    units, inspected, sigma, tank, extra = _parse_header(fields, path)
    seen = _check_columns(columns, path, table_line)
    factor = v.UNIT_FACTORS[units]
    rows = {c: [] for c in READING_COLUMNS}
    ids: dict[str, int] = {}
    for lineno, text in lines:
        if lineno <= table_line or not text.strip():
            continue
        row = _parse_row(_split_row(text, path, lineno), columns, seen, factor, path, lineno)
        if row["id"]:
            if row["id"] in ids:
                raise InputError(f"{where(path, lineno, 'id')}: id {row['id']!r} repeated (first on line "
                                 f"{ids[row['id']]})")
            ids[row["id"]] = lineno
        for c in READING_COLUMNS:
            rows[c].append(row[c])
    if not rows["line"]:
        raise InputError(f"{where(path, table_line)}: no readings below the header row")
    table = pd.DataFrame(rows)
    table["line"] = table["line"].astype(np.int64)
    return Readings(inspected=inspected, units=units, table=table, sigma_mm=sigma, tank=tank,
                    extra=extra, source=path)


def _header_lines(lines, path):
    """The ``# key: value`` lines above the table as {key: (value, line)}, the table's
    column names (None if there is no table header row) and the header row's line."""
    fields: dict[str, tuple[str, int]] = {}
    for lineno, text in lines:
        s = text.strip()
        if not s:
            continue
        if not s.startswith("#"):
            names = _split_row(s, path, lineno)
            return fields, [_check_field(c, path, lineno, "columns").strip().lower() for c in names], lineno
        body = s[1:]
        if ":" not in body:
            continue  # a free comment line
        key, value = body.split(":", 1)
        key, value = key.strip().lower(), value.strip()
        if not key:
            raise InputError(f"{where(path, lineno)}: header line has an empty key")
        _check_field(value, path, lineno, key)
        if key in fields:
            raise InputError(f"{where(path, lineno, key)}: key repeated (first on line {fields[key][1]})")
        fields[key] = (value, lineno)
    return fields, None, None


def _check_format(fields, path) -> None:
    """Refuse a header without the ``format`` line of this format and version."""
    if "format" not in fields:
        raise InputError(f"{where(path, None, 'format')}: missing '# format: {FORMAT_NAME} "
                         f"{FORMAT_VERSION}' line; not a readings CSV")
    value, line = fields["format"]
    parts = value.split()
    if not parts or parts[0] != FORMAT_NAME:
        raise InputError(f"{where(path, line, 'format')}: {value!r} is not the readings format "
                         f"'{FORMAT_NAME}'")
    if len(parts) != 2 or parts[1] != str(FORMAT_VERSION):
        raise InputError(f"{where(path, line, 'format')}: unsupported version in {value!r} "
                         f"(this reader knows version {FORMAT_VERSION})")


def _parse_header(fields, path):
    """The header keys checked and parsed: (units, inspected, sigma in mm or None, tank,
    unknown keys)."""
    _check_format(fields, path)
    for key in _REQUIRED_KEYS:
        if key not in fields:
            raise InputError(f"{where(path, None, key)}: required header key missing")
        if not fields[key][0]:
            raise InputError(f"{where(path, fields[key][1], key)}: required header key has no value")
    units = v.parse_units(fields["units"][0], path, fields["units"][1])
    inspected = v.parse_date(fields["inspected"][0], path, fields["inspected"][1], "inspected")
    sigma = None
    if "sigma" in fields and fields["sigma"][0]:
        sigma = v.parse_number(fields["sigma"][0], path, fields["sigma"][1], "sigma",
                               sign="nonneg") * v.UNIT_FACTORS[units]
    tank = v.parse_text(fields["tank"][0], path, fields["tank"][1], "tank") if "tank" in fields else ""
    extra = {key: v.parse_text(val, path, ln, key) for key, (val, ln) in fields.items()
             if key not in _KNOWN_KEYS}
    return units, inspected, sigma, tank, extra


def _check_columns(columns, path, table_line) -> dict[str, int]:
    """The table header row checked: {column: position}."""
    if columns is None:
        raise InputError(f"{where(path, None, 'columns')}: no table header row (x,y,kind,...)")
    seen: dict[str, int] = {}
    for c in columns:
        if c in seen:
            raise InputError(f"{where(path, table_line, c)}: column repeated")
        seen[c] = len(seen)
        if c not in _COLUMNS_REQUIRED + _COLUMNS_OPTIONAL:
            raise InputError(f"{where(path, table_line, c)}: unknown column (allowed: "
                             f"{', '.join(_COLUMNS_REQUIRED + _COLUMNS_OPTIONAL)})")
    for c in _COLUMNS_REQUIRED:
        if c not in seen:
            raise InputError(f"{where(path, table_line, c)}: required column missing")
    if "thickness" not in seen and "depth" not in seen:
        raise InputError(f"{where(path, table_line, 'thickness')}: a 'thickness' or a 'depth' "
                         "column is required")
    return seen


def _parse_row(cells, columns, seen, factor, path, lineno) -> dict:
    """One table row checked and converted to mm: {column of :data:`READING_COLUMNS`: value}."""
    if len(cells) != len(columns):
        raise InputError(f"{where(path, lineno)}: {len(cells)} fields, the header row has "
                         f"{len(columns)} ({', '.join(columns)})")
    for name, cell in zip(columns, cells):
        _check_field(cell, path, lineno, name)
    get = {name: cell.strip() for name, cell in zip(columns, cells)}
    x = v.parse_number(get["x"], path, lineno, "x", sign="any") * factor
    y = v.parse_number(get["y"], path, lineno, "y", sign="any") * factor
    kind = get["kind"].lower()
    if kind not in KINDS:
        raise InputError(f"{where(path, lineno, 'kind')}: {get['kind']!r} is not a reading kind "
                         f"(allowed: {', '.join(KINDS)})")
    need, value = _row_value(get, kind, seen, factor, path, lineno)
    return {"x_mm": x, "y_mm": y, "kind": kind,
            "thickness_mm": value if need == "thickness" else math.nan,
            "depth_mm": value if need == "depth" else math.nan,
            "side": _row_side(get, kind, path, lineno), "id": get.get("id", ""),
            "note": " ".join(get.get("note", "").split()), "line": lineno}


def _row_value(get, kind, seen, factor, path, lineno):
    """The value a row's kind needs: (``"thickness"`` or ``"depth"``, value in mm)."""
    need = KINDS[kind]
    other = "depth" if need == "thickness" else "thickness"
    if need not in seen:
        raise InputError(f"{where(path, lineno, need)}: a {kind} reading needs a '{need}' column")
    if get.get(other, ""):
        raise InputError(f"{where(path, lineno, other)}: a {kind} reading takes '{need}', "
                         f"not '{other}'; leave it empty")
    if not get[need]:
        raise InputError(f"{where(path, lineno, need)}: empty; a {kind} reading needs a {need}")
    return need, v.parse_number(get[need], path, lineno, need,
                                sign="positive" if need == "thickness" else "nonneg") * factor


def _row_side(get, kind, path, lineno) -> str:
    """A row's side (``top`` on a pit-gauge row, where ``under`` is refused)."""
    side_text = get.get("side", "").lower()
    if side_text not in _SIDES:
        raise InputError(f"{where(path, lineno, 'side')}: {get['side']!r} is not a side "
                         "(allowed: top, under, unknown or empty)")
    side = _SIDES[side_text]
    if kind == "pit-gauge":
        if side == "under":
            raise InputError(f"{where(path, lineno, 'side')}: a pit gauge measures from above; "
                             "side must be top, unknown or empty")
        side = "top"
    return side


def merge_readings(readings) -> Readings:
    """One :class:`Readings` from several files of the same outage.

    Parameters
    ----------
    readings : sequence of :class:`Readings`.

    Returns
    -------
    Readings
        Tables concatenated (a ``source`` column names each row's file);
        ``inspected`` the latest date; ``sigma_mm`` the largest given; ``tank`` the
        first non-empty one.  Dates more than 90 days apart are refused (not one
        outage).
    """
    readings = list(readings)
    if not readings:
        raise ValueError("merge_readings needs at least one Readings")
    dates = [r.inspected for r in readings]
    if (max(dates) - min(dates)).days > 90:
        raise InputError(f"{where(readings[0].source, None, 'inspected')}: readings files dated "
                         f"{min(dates)} and {max(dates)} are not one outage")
    tables = []
    for r in readings:
        t = r.table.copy()
        t["source"] = r.source or ""
        tables.append(t)
    sigmas = [r.sigma_mm for r in readings if r.sigma_mm is not None]
    extra = {}
    for r in readings:
        extra.update(r.extra)
    return Readings(inspected=max(dates), units=readings[0].units,
                    table=pd.concat(tables, ignore_index=True), sigma_mm=max(sigmas) if sigmas else None,
                    tank=next((r.tank for r in readings if r.tank), ""), extra=extra,
                    source=readings[0].source if len(readings) == 1 else None)


def move_readings(readings: Readings, *, dx_mm: float, dy_mm: float, rotation_deg: float) -> Readings:
    """Readings moved by a registration (old frame to new frame, design §3.3).

    Parameters
    ----------
    readings : readings in the older scan's frame.
    dx_mm, dy_mm : translation. [mm]
    rotation_deg : rotation about the origin, counter-clockwise positive. [deg]

    Returns
    -------
    Readings with ``x_mm, y_mm`` = R(θ)·[x, y] + [dx, dy].
    """
    th = math.radians(float(rotation_deg))
    c, s = math.cos(th), math.sin(th)
    t = readings.table.copy()
    x, y = t["x_mm"].to_numpy(float), t["y_mm"].to_numpy(float)
    t["x_mm"] = c * x - s * y + float(dx_mm)
    t["y_mm"] = s * x + c * y + float(dy_mm)
    return Readings(inspected=readings.inspected, units=readings.units, table=t,
                    sigma_mm=readings.sigma_mm, tank=readings.tank, extra=dict(readings.extra),
                    source=readings.source)


def _table(readings) -> pd.DataFrame:
    return readings.table if isinstance(readings, Readings) else readings


# --------------------------------------------------------------------------- pairing
def pair_readings(readings, scan, *, indication_labels=None) -> pd.DataFrame:
    """Put each reading on the scan's grid.

    Parameters
    ----------
    readings : :class:`Readings` (or its table), in the scan's floor frame.
    scan : :class:`~scananalyse.scan.FloorScan` (or anything with ``thickness``,
        ``x0``, ``y0``, ``pitch``).
    indication_labels : optional int label map on the scan's grid (0 = none), as from
        :func:`~scananalyse.indications.label_indications`.

    Returns
    -------
    DataFrame : the readings' columns, then ``row``, ``col`` (the cell holding the
    reading, −1 when off the grid), ``in_grid``, ``scanned`` (the scan has a value at
    that cell), ``t_scan_mm`` (the scan's thickness there, NaN when not scanned)
    [mm], ``loss_scan_mm`` (nominal − scan thickness when the scan has a nominal,
    else NaN) [mm] and, when labels are given, ``indication`` (the label there, 0
    for none).
    """
    t = _table(readings)
    out = t.copy()
    thick = np.asarray(scan.thickness)
    nrows, ncols = thick.shape
    pitch = float(scan.pitch)
    x = t["x_mm"].to_numpy(float)
    y = t["y_mm"].to_numpy(float)
    i = np.rint((y - float(scan.y0)) / pitch)
    j = np.rint((x - float(scan.x0)) / pitch)
    inside = (i >= 0) & (i < nrows) & (j >= 0) & (j < ncols)
    ii = np.where(inside, i, -1).astype(np.int64)
    jj = np.where(inside, j, -1).astype(np.int64)
    ts = np.full(len(t), np.nan)
    ts[inside] = thick[ii[inside], jj[inside]]
    out["row"] = ii
    out["col"] = jj
    out["in_grid"] = inside
    out["scanned"] = np.isfinite(ts)
    out["t_scan_mm"] = ts
    meta = getattr(scan, "meta", None)
    nominal = getattr(meta, "nominal", None)
    out["loss_scan_mm"] = (float(nominal) - ts) if nominal is not None else np.nan
    if indication_labels is not None:
        lab = np.asarray(indication_labels)
        if lab.shape != thick.shape:
            raise ValueError(f"indication labels shape {lab.shape} differs from the scan {thick.shape}")
        ind = np.zeros(len(t), dtype=np.int64)
        ind[inside] = lab[ii[inside], jj[inside]]
        out["indication"] = ind
    return out


# --------------------------------------------------------------------------- sizing check
@dataclass(frozen=True)
class SizingCheck:
    """Result of :func:`sizing_check`.

    Attributes
    ----------
    n_pairs : prove-up readings on scanned cells used. [1]
    bias_mm : mean of (MFL loss − UT loss); negative when the scan under-sizes. [mm]
    scatter_mm : standard deviation of (MFL loss − UT loss) (ddof 1). [mm]
    k : UT loss / MFL loss, least squares through the origin. [1]
    k_se : standard error of ``k``. [1]
    undersized : ``k − 1 > z·k_se`` (and at least ``min_pairs`` pairs).
    z : the multiple of the standard error used. [1]
    note : why the check did or did not decide.
    """

    n_pairs: int
    bias_mm: float
    scatter_mm: float
    k: float
    k_se: float
    undersized: bool
    z: float = 2.0
    note: str = ""

    def as_dict(self) -> dict:
        return {"n_pairs": self.n_pairs, "bias_mm": self.bias_mm, "scatter_mm": self.scatter_mm,
                "k": self.k, "k_se": self.k_se, "undersized": self.undersized, "z": self.z,
                "note": self.note}


def sizing_check(pairs: pd.DataFrame, *, nominal_mm: float, z: float = 2.0,
                 min_pairs: int = 3) -> SizingCheck:
    """Check the scan's loss sizing against prove-up UT readings.

    Parameters
    ----------
    pairs : :func:`pair_readings` output (the prove-ups of the scan's own outage).
    nominal_mm : nominal plate thickness. [mm]
    z : the scan under-sizes when the fitted ratio exceeds 1 by more than ``z``
        standard errors. [1]
    min_pairs : fewer usable pairs decide nothing. [1]

    Returns
    -------
    SizingCheck

    Notes
    -----
    For each prove-up on a scanned cell, MFL loss m = t0 − t_scan and UT loss
    u = t0 − t_UT.  The ratio is the least-squares slope through the origin::

        k = Σ m·u / Σ m²,   SE(k) = s / √(Σ m²),   s² = Σ (u − k·m)² / (n − 1)

    (an ordinary regression without intercept: loss sizing error of MFL is of the
    order of ±10–20 % of wall [memory, domain notes §2], a proportional error).
    ``undersized`` = k − 1 > z·SE(k): the scan reports less loss than the UT finds,
    beyond the scatter of the pairs.  UT on rough corroded surfaces reads on average
    0.6–2.2 mm too thick [seen: jjsndi 53(5):294], which makes ``k`` too small: the
    check errs on the side of not correcting.
    """
    t = pairs
    sel = (t["kind"] == "prove-up") & t["scanned"].astype(bool) & np.isfinite(t["thickness_mm"])
    m = float(nominal_mm) - t.loc[sel, "t_scan_mm"].to_numpy(float)
    u = float(nominal_mm) - t.loc[sel, "thickness_mm"].to_numpy(float)
    n = int(m.size)
    nan = math.nan
    if n == 0:
        return SizingCheck(0, nan, nan, nan, nan, False, z, "no prove-up reading on a scanned cell")
    d = m - u
    bias = float(d.mean())
    scatter = float(d.std(ddof=1)) if n > 1 else nan
    smm = float(np.sum(m * m))
    if smm <= 0:
        return SizingCheck(n, bias, scatter, nan, nan, False, z, "the scan shows no loss at the prove-ups")
    k = float(np.sum(m * u) / smm)
    if n < 2:
        return SizingCheck(n, bias, scatter, k, nan, False, z, f"fewer than {min_pairs} pairs: no decision")
    s2 = float(np.sum((u - k * m) ** 2) / (n - 1))
    se = math.sqrt(s2 / smm)
    if n < min_pairs:
        return SizingCheck(n, bias, scatter, k, se, False, z, f"fewer than {min_pairs} pairs: no decision")
    under = (k - 1.0) > z * se
    note = (f"scan under-sizes loss: k = {k:.3f} ± {se:.3f}" if under
            else f"no under-sizing beyond the scatter: k = {k:.3f} ± {se:.3f}")
    return SizingCheck(n, bias, scatter, k, se, bool(under), z, note)


def correct_undersizing(thickness, nominal_mm: float, k, *, proved_mask=None) -> np.ndarray:
    """Scale the scan's loss of unproved cells by the sizing ratio (conservative only).

    Parameters
    ----------
    thickness : scan thickness map, NaN = not scanned. [mm]
    nominal_mm : nominal plate thickness. [mm]
    k : a :class:`SizingCheck` (applied only when ``undersized``) or a ratio [1]
        (applied only when above 1).
    proved_mask : boolean map of cells a reading governs (left as they are); None
        for none.

    Returns
    -------
    float32 map : t0 − k·max(t0 − t, 0) on unproved scanned cells (not below 0),
    the input elsewhere; an unchanged copy when no correction applies.

    Notes
    -----
    Loss is only ever increased: a fitted ratio below 1 (the scan over-sizes) is not
    used to thin the loss, since the scan's figure is then the conservative one.
    """
    t = np.array(thickness, dtype=np.float32, copy=True)
    if isinstance(k, SizingCheck):
        if not k.undersized:
            return t
        k = k.k
    k = float(k)
    if not (math.isfinite(k) and k > 1.0):
        return t
    t0 = np.float32(nominal_mm)
    loss = np.maximum(t0 - t, np.float32(0))  # NaN stays NaN
    new = np.maximum(t0 - np.float32(k) * loss, np.float32(0))
    scale = np.isfinite(t) & (loss > 0)
    if proved_mask is not None:
        pm = np.asarray(proved_mask, dtype=bool)
        if pm.shape != t.shape:
            raise ValueError(f"proved_mask shape {pm.shape} differs from the thickness {t.shape}")
        scale &= ~pm
    t[scale] = new[scale]
    return t


# --------------------------------------------------------------------------- applying
@dataclass(eq=False)
class AppliedReadings:
    """Result of :func:`apply_readings`.

    Attributes
    ----------
    thickness : the scan's thickness with UT and prove-up values at their cells
        (float32). [mm]
    depth_top : pit-gauge depths at their cells, NaN elsewhere (float32): the
        measured top-side depth map for attribution. [mm]
    proved : boolean map of cells a UT or prove-up reading governs.
    side : int8 map of sides the readings state (1 top, 2 under; −1 where no
        reading states one); pit-gauge cells are top.
    n_applied : readings put on the grid. [1]
    n_off_grid : readings off the grid (not applied; they still count in
        :func:`reading_zone_summary`). [1]
    """

    thickness: np.ndarray
    depth_top: np.ndarray
    proved: np.ndarray
    side: np.ndarray
    n_applied: int
    n_off_grid: int


def apply_readings(scan_thickness, pairs: pd.DataFrame) -> AppliedReadings:
    """Let the readings govern at their cells.

    Parameters
    ----------
    scan_thickness : thickness map of the scan the readings were paired with,
        NaN = not scanned. [mm]
    pairs : :func:`pair_readings` output for readings of the same outage.

    Returns
    -------
    AppliedReadings

    Notes
    -----
    The UT value governs at its spot [practice, domain notes §10]: a ``ut`` or
    ``prove-up`` thickness replaces the scan's value at its cell, scanned or not
    (several readings in one cell: the thinnest).  A ``pit-gauge`` depth is top-side
    loss measured from above; it goes to ``depth_top`` (several in one cell: the
    deepest) and does not change the thickness.
    """
    t = np.array(scan_thickness, dtype=np.float32, copy=True)
    depth = np.full(t.shape, np.nan, dtype=np.float32)
    proved = np.zeros(t.shape, dtype=bool)
    side = np.full(t.shape, -1, dtype=np.int8)
    inside = pairs["in_grid"].to_numpy(bool)
    kind = pairs["kind"].to_numpy(object)
    r = pairs["row"].to_numpy(np.int64)
    c = pairs["col"].to_numpy(np.int64)
    th = pairs["thickness_mm"].to_numpy(float)
    dp = pairs["depth_mm"].to_numpy(float)
    sd = pairs["side"].to_numpy(object)
    is_t = inside & np.isin(kind, ["ut", "prove-up"])
    # thinnest reading per cell: write the readings thickest first
    order = np.flatnonzero(is_t)
    order = order[np.argsort(-th[order], kind="stable")]
    t[r[order], c[order]] = th[order]
    proved[r[order], c[order]] = True
    is_p = inside & (kind == "pit-gauge")
    order = np.flatnonzero(is_p)
    order = order[np.argsort(dp[order], kind="stable")]  # deepest last
    depth[r[order], c[order]] = dp[order]
    for idx in np.flatnonzero(is_t):
        if sd[idx] in ("top", "under"):
            side[r[idx], c[idx]] = SIDE_TOP if sd[idx] == "top" else SIDE_UNDER
    side[r[is_p], c[is_p]] = SIDE_TOP
    return AppliedReadings(thickness=t, depth_top=depth, proved=proved, side=side,
                           n_applied=int(np.count_nonzero(is_t | is_p)),
                           n_off_grid=int(np.count_nonzero(~inside)))


# --------------------------------------------------------------------------- zones
def reading_zones(readings, zones, *, critical_width_mm: float = 75.0) -> np.ndarray:
    """The zone name of each reading (``""`` outside the floor).

    Parameters
    ----------
    readings : :class:`Readings` or its table.
    zones : :class:`~scananalyse.zones.ZoneMap`.
    critical_width_mm : width of the critical zone, the rule set's
        ``critical_zone_width_mm``. [mm]

    Returns
    -------
    array of str

    Notes
    -----
    The default zones are decided from the reading's radius r about the floor
    centre, not from the grid (a reading within 75 mm of the shell often lies
    beyond the scan's last cell): ``critical`` for R − w ≤ r ≤ R (1 mm of slack
    outside R for a reading taken against the shell), ``annular`` for
    R − a ≤ r < R − w, else ``interior`` — or the user zone whose grid cell holds
    the reading.
    """
    t = _table(readings)
    geo = zones.geometry
    cx, cy = geo.centre
    x = t["x_mm"].to_numpy(float)
    y = t["y_mm"].to_numpy(float)
    r = np.hypot(x - cx, y - cy)
    R = geo.radius_mm
    w = float(critical_width_mm)
    out = np.full(len(t), "interior", dtype=object)
    a = geo.annular_width_mm
    if a is not None:
        out[(r >= R - a) & (r < R - w)] = "annular"
    out[(r >= R - w) & (r <= R + 1.0)] = "critical"
    out[r > R + 1.0] = ""
    interior = out == "interior"
    if np.any(interior) and "user" in zones.kinds:
        nrows, ncols = zones.shape
        i = np.rint((y - zones.y0) / zones.pitch)
        j = np.rint((x - zones.x0) / zones.pitch)
        ok = interior & (i >= 0) & (i < nrows) & (j >= 0) & (j < ncols)
        labs = np.full(len(t), -1, dtype=np.int64)
        labs[ok] = zones.labels[i[ok].astype(np.int64), j[ok].astype(np.int64)]
        for idx in np.flatnonzero(labs >= 0):
            if zones.kinds[labs[idx]] == "user":
                out[idx] = zones.names[labs[idx]]
    return out


def _thickness_of(t: pd.DataFrame, nominal_mm: float) -> np.ndarray:
    """Thickness of each reading; pit-gauge rows as t0 − depth (no underside loss there)."""
    th = t["thickness_mm"].to_numpy(float).copy()
    pg = (t["kind"] == "pit-gauge").to_numpy()
    th[pg] = float(nominal_mm) - t["depth_mm"].to_numpy(float)[pg]
    return th


def reading_spots(readings_new, readings_old=None, *, nominal_mm: float, installed=None,
                  match_tol_mm: float = 25.0) -> pd.DataFrame:
    """Rates at each reading of the newer outage.

    Parameters
    ----------
    readings_new : :class:`Readings` of the newer outage.
    readings_old : :class:`Readings` of the older outage (same floor frame), or None.
    nominal_mm : nominal plate thickness. [mm]
    installed : date the plates went into service, or None.
    match_tol_mm : an older reading of the same family (thickness: ut/prove-up;
        depth: pit-gauge) within this distance is the same spot. [mm]

    Returns
    -------
    DataFrame : the newer readings' columns, then ``t_mm`` (pit-gauge rows:
    t0 − depth, an upper bound since underside loss there is not measured) [mm],
    ``t_old_mm`` (the matched older reading, NaN if none) [mm], ``match_mm``
    (distance to it) [mm], ``rate_short_mm_y`` = (t_old − t)/Δt, ``rate_long_mm_y``
    = (t0 − t)/age, ``rate_mm_y`` = the greater of the two (the one known when
    only one is) [mm/y].

    Notes
    -----
    Short-term and long-term rates and taking the greater of the two: domain notes
    §3 [memory: API 570 practice].
    """
    new = _table(readings_new)
    t0 = float(nominal_mm)
    out = new.copy()
    t_new = _thickness_of(new, t0)
    out["t_mm"] = t_new
    t_old = np.full(len(new), np.nan)
    dist = np.full(len(new), np.nan)
    dt = math.nan
    if readings_old is not None and len(_table(readings_old)):
        old = _table(readings_old)
        dt = years_between(readings_old.inspected, readings_new.inspected)
        if not dt > 0:
            raise InputError(f"{where(readings_old.source, None, 'inspected')}: older readings dated "
                             f"{readings_old.inspected}, not before {readings_new.inspected}")
        to = _thickness_of(old, t0)
        fam_new = (new["kind"] == "pit-gauge").to_numpy()
        fam_old = (old["kind"] == "pit-gauge").to_numpy()
        xo, yo = old["x_mm"].to_numpy(float), old["y_mm"].to_numpy(float)
        xn, yn = new["x_mm"].to_numpy(float), new["y_mm"].to_numpy(float)
        for idx in range(len(new)):
            cand = np.flatnonzero(fam_old == fam_new[idx])
            if cand.size == 0:
                continue
            d = np.hypot(xo[cand] - xn[idx], yo[cand] - yn[idx])
            best = int(np.argmin(d))
            if d[best] <= match_tol_mm:
                t_old[idx] = to[cand[best]]
                dist[idx] = d[best]
    out["t_old_mm"] = t_old
    out["match_mm"] = dist
    out["rate_short_mm_y"] = (t_old - t_new) / dt if math.isfinite(dt) else np.nan
    if installed is not None:
        age = years_between(installed, readings_new.inspected)
        if not age > 0:
            raise InputError(f"{where(readings_new.source, None, 'inspected')}: readings dated "
                             f"{readings_new.inspected}, not after the installation {installed}")
        out["rate_long_mm_y"] = np.maximum(t0 - t_new, 0.0) / age
    else:
        out["rate_long_mm_y"] = np.nan
    out["rate_mm_y"] = np.fmax(out["rate_short_mm_y"].to_numpy(float),
                               out["rate_long_mm_y"].to_numpy(float))
    return out


#: Columns of :func:`reading_zone_summary`, in order.
SUMMARY_COLUMNS = (
    "zone", "n_readings", "n_ut", "n_prove_up", "n_pit_gauge", "n_spots_both_outages",
    "t_min_mm", "x_t_min_mm", "y_t_min_mm", "rate_short_max_mm_y", "rate_long_max_mm_y",
    "rate_max_mm_y", "mrt_mm", "rtbc_mm", "rtip_mm", "stpr_mm_y", "upr_mm_y",
    "interval_code_y", "life_local_y", "covered_length_mm", "flags", "notes",
)


def off_scan(readings: Readings, scan) -> Readings:
    """The readings on cells ``scan`` has no value at (or off its grid): points, not in the
    thickness grid (:func:`apply_readings` writes only readings on scanned cells)."""
    keep = ~pair_readings(readings, scan)["scanned"].to_numpy(bool)
    return dataclasses.replace(readings, table=readings.table[keep].reset_index(drop=True))


def zone_spots(readings_new, readings_old=None, *, zones, nominal_mm: float, installed=None,
               critical_width_mm: float = 75.0) -> dict:
    """The newer spot readings by zone, as the life distribution takes them.

    Parameters
    ----------
    readings_new, readings_old, zones, nominal_mm, installed, critical_width_mm :
        As :func:`reading_zone_summary` (``readings_new`` usually :func:`off_scan`).

    Returns
    -------
    dict : zone name -> (thickness (k,) [mm], rate (k,) [mm/y], NaN where the spot has
    none, the readings' sigma [mm], NaN when the file gives none), from
    :func:`reading_spots`; zones with no reading are left out.
    """
    if not len(readings_new):
        return {}
    spots = reading_spots(readings_new, readings_old, nominal_mm=nominal_mm, installed=installed)
    zone = reading_zones(spots, zones, critical_width_mm=critical_width_mm)
    t, r = spots["t_mm"].to_numpy(float), spots["rate_mm_y"].to_numpy(float)
    sig = float(readings_new.sigma_mm) if readings_new.sigma_mm is not None else math.nan
    return {name: (t[zone == name], r[zone == name], sig) for name in zones.names if np.any(zone == name)}


def _mrt_of(mrt_mm, zone: str, zones) -> float:
    """MRT of ``zone`` from a number, a ``{zone: MRT}`` mapping or an array by zone label; NaN if absent."""
    if isinstance(mrt_mm, dict):
        return float(mrt_mm.get(zone, math.nan))
    arr = np.asarray(mrt_mm, dtype=float)
    if arr.ndim == 0:
        return float(arr)
    return float(arr[zones.names.index(zone)]) if zone in zones.names else math.nan


def reading_zone_summary(readings_new, readings_old=None, *, zones, nominal_mm: float, installed,
                         mrt_mm, options: AssessOptions | None = None, match_tol_mm: float = 25.0,
                         probe_mm: float = 10.0, critical_width_mm: float = 75.0) -> pd.DataFrame:
    """Zones assessed from spot readings alone, one row per zone that has readings.

    Parameters
    ----------
    readings_new : :class:`Readings` of the newer outage, in the new scan's frame.
    readings_old : :class:`Readings` of the older outage in the same frame (see
        :func:`move_readings`), or None.
    zones : :class:`~scananalyse.zones.ZoneMap`.
    nominal_mm : nominal plate thickness t0. [mm]
    installed : date the plates went into service (None: no long-term rates and no
        code interval).
    mrt_mm : MRT, a number, ``{zone: MRT}`` or an array in ``zones.names`` order
        (:func:`~scananalyse.assess.zone_mrt`). [mm]
    options : :class:`~scananalyse.assess.AssessOptions` (``unknown_side``,
        coating and CP credits), defaults if None.
    match_tol_mm : the same spot at both outages within this distance. [mm]
    probe_mm : length of floor one reading stands for (a UT probe's footprint). [mm]
    critical_width_mm : the rule set's ``critical_zone_width_mm``. [mm]

    Returns
    -------
    DataFrame with :data:`SUMMARY_COLUMNS`: counts by kind; ``n_spots_both_outages``
    (spots with a short-term rate); the thinnest reading and where it is; the
    greatest short-term, long-term and governing rates over the spots [mm/y]; MRT,
    RTbc, RTip, StPr, UPr and ``interval_code_y`` from
    :func:`~scananalyse.assess.code_interval` on the readings; ``life_local_y`` =
    min over spots of (t − MRT)/rate [y]; ``covered_length_mm`` = distinct spots ×
    ``probe_mm`` (the readings are points: the floor between them is unseen);
    ``flags`` (``points-only`` always; ``below-mrt``, ``no-age``, ``no-mrt`` (a zone
    missing from ``mrt_mm``), ``no-short-term-rates``, ``code-exceeds-local``).

    Notes
    -----
    The code formula runs exactly as for the scan (domain notes §4): RTbc the
    thinnest reading attributed to the underside (``under``, and ``unknown`` when
    ``options.unknown_side == "under"``), RTip the thinnest top-side reading
    (pit-gauge readings count as top side, t = t0 − depth), t0 when a zone has none;
    age-based rates; the method is UT, so the MFL-threshold rule does not apply.
    A thickness reading sees the loss of both faces at its spot, so the spot's rate
    is the total rate and the co-located life (domain notes §5) is
    (t − MRT)/rate; a spot whose rate is ≤ 0 has an infinite life, one already
    below MRT a life of 0.
    """
    options = options if options is not None else AssessOptions()
    spots = reading_spots(readings_new, readings_old, nominal_mm=nominal_mm, installed=installed,
                          match_tol_mm=match_tol_mm)
    spots["zone"] = reading_zones(spots, zones, critical_width_mm=critical_width_mm)
    t0 = float(nominal_mm)
    age = years_between(installed, readings_new.inspected) if installed is not None else None
    unk_under = options.unknown_side == "under"
    rows = []
    order = [z for z in zones.names if z in set(spots["zone"])]
    order += sorted(z for z in set(spots["zone"]) if z and z not in order)
    for name in order:
        s = spots[spots["zone"] == name]
        flags = ["points-only"]
        notes: list[str] = []
        mrt = _mrt_of(mrt_mm, name, zones)
        t = s["t_mm"].to_numpy(float)
        k = int(np.argmin(t))
        side = s["side"].to_numpy(object)
        under = (side == "under") | ((side == "unknown") & unk_under)
        top = (side == "top") | ((side == "unknown") & (not unk_under))
        rtbc = float(t[under].min()) if under.any() else t0
        rtip = float(t[top].min()) if top.any() else t0
        rate = s["rate_mm_y"].to_numpy(float)
        with np.errstate(divide="ignore", invalid="ignore"):
            life = np.where(rate > 0, (t - mrt) / rate, np.inf)
        life = np.where(t < mrt, 0.0, life)
        life = np.where(np.isnan(rate), np.nan, life)
        life_local = math.nan if np.all(np.isnan(life)) else float(np.nanmin(life))
        n_short = int(np.count_nonzero(np.isfinite(s["rate_short_mm_y"].to_numpy(float))))
        if age is None or math.isnan(mrt):
            code = stpr = upr = math.nan
            flags.append("no-age" if age is None else "no-mrt")
        else:
            cr = code_interval(t0=t0, rtbc=rtbc, rtip=rtip, mrt=mrt, age_years=age, method="UT",
                               coated=options.coated or options.reinforced_lining,
                               coating_life_years=options.coating_life_years,
                               cp_effective=options.cp_effective)
            code, stpr, upr = cr.interval_y, cr.stpr, cr.upr
            notes.extend(cr.notes)
        if n_short == 0:
            flags.append("no-short-term-rates")
        if float(t.min()) < mrt:
            flags.append("below-mrt")
        if not math.isnan(code) and not math.isnan(life_local) and code > life_local:
            flags.append("code-exceeds-local")
        # distinct spots: readings closer than a probe footprint count once
        xy = s[["x_mm", "y_mm"]].to_numpy(float)
        kept: list[np.ndarray] = []
        for p in xy:
            if all(np.hypot(*(p - q)) >= probe_mm for q in kept):
                kept.append(p)
        notes.append(f"{len(kept)} spot readings: points, the floor between them is unseen")
        kinds = s["kind"]
        rows.append({
            "zone": name, "n_readings": len(s), "n_ut": int((kinds == "ut").sum()),
            "n_prove_up": int((kinds == "prove-up").sum()),
            "n_pit_gauge": int((kinds == "pit-gauge").sum()), "n_spots_both_outages": n_short,
            "t_min_mm": float(t[k]), "x_t_min_mm": float(s["x_mm"].iloc[k]),
            "y_t_min_mm": float(s["y_mm"].iloc[k]),
            "rate_short_max_mm_y": _nanmax(s["rate_short_mm_y"]),
            "rate_long_max_mm_y": _nanmax(s["rate_long_mm_y"]),
            "rate_max_mm_y": _nanmax(s["rate_mm_y"]), "mrt_mm": mrt, "rtbc_mm": rtbc,
            "rtip_mm": rtip, "stpr_mm_y": stpr, "upr_mm_y": upr, "interval_code_y": code,
            "life_local_y": life_local, "covered_length_mm": len(kept) * float(probe_mm),
            "flags": ";".join(flags), "notes": "; ".join(notes),
        })
    if not rows:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in SUMMARY_COLUMNS})
    return pd.DataFrame(rows)[list(SUMMARY_COLUMNS)]


def _nanmax(s) -> float:
    a = np.asarray(s, dtype=float)
    a = a[~np.isnan(a)]
    return float(a.max()) if a.size else math.nan


# --------------------------------------------------------------------------- prove-up list
def prove_up_candidates(indications: pd.DataFrame, pairs: pd.DataFrame | None = None, *, n: int = 10,
                        tol_mm: float = 25.0) -> pd.DataFrame:
    """The indications the engineer should prove up next.

    Parameters
    ----------
    indications : the indication list (``indications.csv`` columns: at least ``id``,
        ``x_mm``, ``y_mm``, ``depth_max_mm``; ``x_min_mm`` … ``y_max_mm``,
        ``t_min_mm`` and ``status`` used when present).
    pairs : :func:`pair_readings` output of the newer outage's readings, or None.
    n : how many of the deepest unproved indications to list. [1]
    tol_mm : a reading within this distance of an indication's box (or of its
        centre, without a box) proves it. [mm]

    Returns
    -------
    DataFrame : the listed indications' columns, then ``rank`` (1 = first) and
    ``reason`` (``;``-joined: ``deepest unproved``, ``partly unscanned``, ``new``),
    ordered by depth, deepest first.

    Notes
    -----
    An indication is proved when a ``ut`` or ``prove-up`` reading lies on it (its
    label, when the pairs carry ``indication``, or within ``tol_mm`` of its
    bounding box).  Listed: the ``n`` deepest unproved indications, and every
    unproved one whose status is ``partly unscanned`` (its depth is a lower bound)
    or ``new`` (no history: its growth is unknown) [practice, domain notes §10].
    """
    ind = indications.reset_index(drop=True)
    proved = np.zeros(len(ind), dtype=bool)
    if pairs is not None and len(pairs) and len(ind):
        p = pairs[pairs["kind"].isin(["ut", "prove-up"])]
        px, py = p["x_mm"].to_numpy(float), p["y_mm"].to_numpy(float)
        has_box = all(c in ind.columns for c in ("x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm"))
        for i in range(len(ind)):
            if has_box:
                dx = np.maximum(np.maximum(ind.at[i, "x_min_mm"] - px, px - ind.at[i, "x_max_mm"]), 0)
                dy = np.maximum(np.maximum(ind.at[i, "y_min_mm"] - py, py - ind.at[i, "y_max_mm"]), 0)
            else:
                dx, dy = ind.at[i, "x_mm"] - px, ind.at[i, "y_mm"] - py
            proved[i] = bool(np.any(np.hypot(dx, dy) <= tol_mm))
        if "indication" in p.columns:
            ids = set(int(a) for a in p["indication"].to_numpy() if int(a) > 0)
            proved |= ind["id"].isin(ids).to_numpy()
    status = (ind["status"].astype(str).str.strip().str.lower() if "status" in ind.columns
              else pd.Series([""] * len(ind)))
    depth = ind["depth_max_mm"].to_numpy(float)
    unproved = np.flatnonzero(~proved)
    deepest = set(unproved[np.argsort(-np.nan_to_num(depth[unproved], nan=-np.inf),
                                      kind="stable")][:max(int(n), 0)].tolist())
    reasons = []
    keep = []
    for i in unproved:
        r = []
        if i in deepest:
            r.append("deepest unproved")
        if "partly unscanned" in status.iloc[i]:
            r.append("partly unscanned")
        if "new" in [w.strip() for w in status.iloc[i].split(";")]:
            r.append("new")
        if r:
            keep.append(i)
            reasons.append(";".join(r))
    out = ind.iloc[keep].copy()
    out["reason"] = reasons
    out = out.sort_values("depth_max_mm", ascending=False, kind="stable", na_position="last")
    out.insert(len(out.columns) - 1, "rank", np.arange(1, len(out) + 1, dtype=np.int64))
    return out.reset_index(drop=True)


# --------------------------------------------------------------------------- in a job
#: A readings file further than this from the nearest scan's date is refused. [days]
READINGS_MAX_DAYS = 365


def split_readings(readings, new: FloorScan, old: FloorScan | None = None):
    """Tell spot readings apart by outage: each file goes to the inspection whose date is
    nearest its ``inspected`` date; the files of one outage are merged.

    Parameters
    ----------
    readings : list of :class:`~scananalyse.readings.Readings`.
    new, old : the newer (or only) and older scans.

    Returns
    -------
    (Readings or None, Readings or None) : the newer outage's and the older outage's.

    Raises
    ------
    InputError
        A file dated more than :data:`READINGS_MAX_DAYS` from every scan (it matches
        neither inspection), naming the file and its ``inspected`` field.
    """
    groups: dict = {"new": [], "old": []}
    for r in readings:
        cands = [("new", new)] + ([("old", old)] if old is not None else [])
        which, scan = min(cands, key=lambda c: abs((r.inspected - c[1].meta.inspected).days))
        gap = abs((r.inspected - scan.meta.inspected).days)
        if gap > READINGS_MAX_DAYS:
            dates = " and ".join(str(c[1].meta.inspected) for c in reversed(cands))
            raise InputError(f"{r.source or 'readings'}: field 'inspected': readings dated {r.inspected} are more "
                             f"than {READINGS_MAX_DAYS} days from the scan{'s' if old is not None else ''} "
                             f"({dates}): they belong to no inspection of this job")
        groups[which].append(r)
    return tuple(merge_readings(g) if g else None for g in (groups["new"], groups["old"]))


def job_readings(readings, new, old):
    """The job's readings files, and (:func:`split_readings`) the newer and older outage's."""
    return {"files": readings, "split": split_readings(readings, new, old) if readings else (None, None),
            "old_known": old is not None}


def _thickness_pairs(pairs):
    """The pairs whose thickness may go into the grid: UT and prove-up readings on scanned
    cells (a point is not an area: a reading where the scan has no value stays a point,
    assessed by :func:`~scananalyse.readings.reading_zone_summary`), and every pit gauge."""
    keep = pairs["scanned"].to_numpy(bool) | (pairs["kind"] == "pit-gauge").to_numpy()
    return pairs[keep]


def apply_new_readings(new: FloorScan, readings, job: Job):
    """The newer scan with its outage's readings applied and its unproved loss corrected."""
    pairs = pair_readings(readings, new)
    check = sizing_check(pairs, nominal_mm=new.meta.nominal)
    applied = apply_readings(new.thickness, _thickness_pairs(pairs))
    t = applied.thickness
    corrected = False
    if job.sizing_correction and check.undersized:
        t = correct_undersizing(t, new.meta.nominal, check, proved_mask=applied.proved)
        corrected = True
    n_t = int(np.count_nonzero(applied.proved))
    out = [f"Spot readings of {readings.inspected} ({len(readings)} readings): UT and prove-up thicknesses govern "
           f"at their {n_t} scanned cells; readings where the scan has no value are points, not area: they assess "
           "zones the scan did not cover (readings-only) and do not count as coverage."]
    if corrected:
        out.append(f"Sizing check on {check.n_pairs} prove-ups: {check.note}; the loss of every unproved scanned "
                   f"cell of the newer scan is multiplied by k = {check.k:.3f} (loss only ever increased).")
    elif check.undersized:
        out.append(f"Sizing check on {check.n_pairs} prove-ups: {check.note}; NOT corrected "
                   "(--no-sizing-correction): the scan's loss depths may be too shallow.")
    else:
        out.append(f"Sizing check on {check.n_pairs} prove-ups: {check.note}; no correction applied.")
    info = {"pairs": pairs, "check": check, "applied": applied, "corrected": corrected,
            "assumptions": out, "prove_up": None}
    return dataclasses.replace(new, thickness=t), info


def apply_old_readings(old: FloorScan, readings, new: FloorScan, job: Job, readings_new=None):
    """The older scan with its outage's readings (in its own frame) applied.

    The sizing correction found on the newer scan is applied to the older one only when
    both were scanned by the same method: the same under-sizing then hides part of the
    growth too.  With another method the older scan's sizing error is unknown, and
    leaving it uncorrected keeps the short-term rates on the high side."""
    pairs = pair_readings(readings, old)
    applied = apply_readings(old.thickness, _thickness_pairs(pairs))
    t = applied.thickness
    m_old, m_new = (str(s.meta.method or "").strip().upper() for s in (old, new))
    same = bool(m_old) and m_old == m_new
    note = (f"Older spot readings of {readings.inspected} ({len(readings)} readings) govern at their scanned cells "
            "of the older scan. ")
    if job.sizing_correction and same:
        check = sizing_check(pair_readings(readings_new, new), nominal_mm=new.meta.nominal) \
            if readings_new is not None else None
        if check is not None and check.undersized:
            t = correct_undersizing(t, old.meta.nominal, check, proved_mask=applied.proved)
        note += ("Both scans are " + m_new + ": if the newer prove-ups show under-sizing, the older scan's "
                 "unproved loss is corrected by the same ratio, since the same method under-sizes the growth too.")
    else:
        note += ("The older scan is not corrected for sizing: " + ("the correction is off." if not job.sizing_correction
                 else f"it was scanned by another method ({m_old or 'unknown'} against {m_new or 'unknown'}), whose "
                 "sizing error is unknown; left as scanned, its loss is if anything too shallow, which keeps the "
                 "short-term rates on the high side."))
    return dataclasses.replace(old, thickness=t), {"pairs": pairs, "applied": applied, "assumptions": [note],
                                                   "same_method": same}


def add_reading_zones(table: pd.DataFrame, summary: pd.DataFrame, *, rules, inspected,
                      hidden: dict | None = None, code_of=None) -> pd.DataFrame:
    """The zone table with the spot readings' zone summary added.

    Parameters
    ----------
    table : zones.csv table (:func:`~scananalyse.assess.assess_zones`).
    summary : :func:`~scananalyse.readings.reading_zone_summary` output.
    rules : :class:`~scananalyse.rules.RuleSet` (interval rounding).
    inspected : date of the newer inspection (``next_due``).
    hidden : zone name -> :class:`~scananalyse.evlife.HiddenPart` of the floor as found
        (:func:`~scananalyse.evlife.hidden_parts`): the floor between the readings.
    code_of : ``code_of(rtbc, rtip, mrt)`` -> :class:`~scananalyse.assess.CodeResult`, the
        code formula of the scanned zones (their method and threshold), or None.

    Returns
    -------
    DataFrame : ``n_readings`` on every row; a zone with no scanned cell but with
    readings takes the readings' thinnest value, code interval and co-located life in
    place of the ``no-data`` NaNs, and the extreme-value life of its unseen floor,
    flagged ``readings-only;points-only`` (``no-data`` stays only where nothing at all
    was read).  In a scanned zone the readings are measured metal too: the thinnest
    reading lowers ``t_min_mm``, RTbc and RTip (the code formula is rerun with
    ``code_of``), the readings' co-located life lowers ``life_local_y``, and where that
    shortens the recommendation the row says so (``readings-govern``).

    Notes
    -----
    The recommended interval of such a zone is min(readings' code interval, co-located
    life of the readings, extreme-value life of the floor between them, cap), never
    below 0 and rounded down; with neither a code interval nor a life it stays NaN.
    The floor between the readings is unseen (``points-only``): spot readings say
    nothing of the deepest pit between them, so that floor is judged with the whole
    floor's extreme-value law over the zone's area (``eva-borrowed``; ``eva-below-mrt``
    where its 95 % bound is already past MRT).  Without ``hidden`` it is left out and
    the row says so (``no-eva``).
    """
    out = table.copy()
    s = summary.set_index("zone") if len(summary) else None
    out["n_readings"] = [int(s.at[z, "n_readings"]) if s is not None and z in s.index else 0 for z in out["zone"]]
    if s is None:
        return out
    for i in out.index:
        z = out.at[i, "zone"]
        flags = str(out.at[i, "flags"]).split(";") if isinstance(out.at[i, "flags"], str) else []
        if z not in s.index:
            continue
        r = s.loc[z]
        if "no-data" not in flags:
            _readings_in_scanned(out, i, r, flags, rules=rules, inspected=inspected, code_of=code_of)
            continue
        for col in ("t_min_mm", "interval_code_y", "life_local_y", "rtbc_mm", "rtip_mm", "stpr_mm_y", "upr_mm_y"):
            if col in out.columns:
                out.at[i, col] = float(r[col])
        cap = float(out.at[i, "cap_y"]) if "cap_y" in out.columns else float("nan")
        eva, eflags = _unseen_floor(out, i, (hidden or {}).get(z))
        bounds = {"code": float(r["interval_code_y"]), "local": float(r["life_local_y"]), "eva": eva, "cap": cap}
        valid = {b: v for b, v in bounds.items() if not np.isnan(v)}
        if "code" in valid or "local" in valid:
            best = min(valid.values())
            rec = rules.round_interval(max(best, 0.0))
            out.at[i, "interval_recommended_y"] = rec
            out.at[i, "limiting"] = next(b for b in ("code", "local", "eva", "cap") if b in valid and valid[b] == best)
            out.at[i, "next_due"] = add_years(inspected, rec).isoformat()
        rflags = [f for f in str(r["flags"]).split(";") if f and f != "points-only"]
        out.at[i, "flags"] = ";".join(["readings-only", "points-only"] + rflags + eflags)
        out.at[i, "notes"] = f"no scanned cell; from {int(r['n_readings'])} spot readings: " + str(r["notes"])
    return out


def _readings_in_scanned(out: pd.DataFrame, i, r, flags, *, rules, inspected, code_of) -> None:
    """Row ``i`` of a scanned zone with the readings' summary ``r`` taken in (see
    :func:`add_reading_zones`): a reading is never ignored because the scan is there."""
    def get(col):
        return float(out.at[i, col]) if col in out.columns else math.nan

    said = []
    if float(r["t_min_mm"]) < get("t_min_mm"):
        out.at[i, "t_min_mm"] = float(r["t_min_mm"])
        said.append(f"thinnest reading {float(r['t_min_mm']):.2f} mm at ({float(r['x_t_min_mm']):.0f}, "
                    f"{float(r['y_t_min_mm']):.0f}) mm")
    code = get("interval_code_y")
    rtbc, rtip = (min(get(c), float(r[c])) for c in ("rtbc_mm", "rtip_mm"))
    if code_of is not None and (rtbc < get("rtbc_mm") or rtip < get("rtip_mm")):
        cr = code_of(rtbc, rtip, get("mrt_mm"))
        for col, value in (("rtbc_mm", rtbc), ("rtip_mm", rtip), ("stpr_mm_y", cr.stpr), ("upr_mm_y", cr.upr),
                           ("t_used_upr_mm", cr.t_used_upr), ("interval_code_y", cr.interval_y)):
            if col in out.columns:
                out.at[i, col] = value
        if not cr.interval_y >= code:
            said.append(f"code interval {cr.interval_y:.1f} y with the readings' RTbc/RTip")
        code = cr.interval_y
    local, r_local = get("life_local_y"), float(r["life_local_y"])
    if r_local < local or (math.isnan(local) and not math.isnan(r_local)):
        out.at[i, "life_local_y"] = local = r_local
        said.append(f"co-located life {r_local:.1f} y at the readings")
    if not said:
        return
    if float(r["t_min_mm"]) < get("mrt_mm") and "below-mrt" not in flags:  # measured metal below MRT
        flags.append("below-mrt")
        said.append("below MRT at that reading: the patch plan, made from the scan, does not cover it")
        out.at[i, "flags"] = ";".join(f for f in flags if f)
    rec = get("interval_recommended_y")
    best = min((v for v in (code, local) if not math.isnan(v)), default=math.nan)
    if best < rec or (math.isnan(rec) and not math.isnan(best)):
        new = rules.round_interval(max(best, 0.0))
        if new < rec or math.isnan(rec):
            out.at[i, "interval_recommended_y"] = new
            out.at[i, "limiting"] = "code" if best == code else "local"
            out.at[i, "next_due"] = add_years(inspected, new).isoformat()
            flags.append("readings-govern")
            out.at[i, "flags"] = ";".join(f for f in flags if f)
    note = "spot readings on this zone: " + "; ".join(said)
    old = out.at[i, "notes"] if "notes" in out.columns else ""
    if "notes" in out.columns:
        out.at[i, "notes"] = "; ".join(x for x in (str(old) if isinstance(old, str) else "", note) if x)


def _unseen_floor(out: pd.DataFrame, i, h) -> tuple[float, list]:
    """Row ``i`` of a readings-only zone gets the extreme-value columns of the floor
    between its readings (``h``, a HiddenPart, or None); returns (life [y], flags)."""
    if h is None or not np.isfinite(h.life_y):
        return float("nan"), ["no-eva"]
    cols = {"life_eva_y": float(h.life_y), "depth_hidden_p50_mm": h.depth_p50_mm,
            "depth_hidden_p95_mm": h.depth_p95_mm, "hidden_area_m2": h.area_mm2 / 1e6, "eva_source": h.source}
    for col, value in cols.items():
        if col not in out.columns:
            continue
        if isinstance(value, str) and out[col].dtype != object:
            out[col] = out[col].astype(object)
        out.at[i, col] = value
    flags = {"floor": ["eva-borrowed"], "worst-seen": ["eva-worst-seen"]}.get(h.source, [])
    if h.life_y == 0:  # the 95 % bound of its deepest loss is already past MRT
        flags.append("eva-below-mrt")
    return float(h.life_y), flags


def readings_result(rinfo, zone_summary, scan_new, readings_new, readings_old) -> dict:
    """What :class:`Analysis` keeps of the readings (empty without readings)."""
    if rinfo is None:
        return {}
    return {"new": readings_new, "old": readings_old, "pairs": rinfo["pairs"], "check": rinfo["check"],
            "corrected": rinfo["corrected"], "zones": zone_summary, "prove_up": rinfo["prove_up"],
            "proved": rinfo["applied"].proved, "depth_top": rinfo["applied"].depth_top,
            "thickness_scanned": scan_new.thickness}
