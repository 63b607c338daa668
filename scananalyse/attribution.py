"""Operator attribution of loss to the top (product) side or the underside (soil side).

MFL floor scanners respond to lost metal volume and cannot tell which face the
loss is on [seen: NDT service pages]. Indications are proved up by UT and top-side
pits are found and measured with a pit gauge from above, so whatever is not found
from above is taken as underside [seen/practice]. The operator's attribution is an
input to scananalyse, in any of three forms, all on the newer scan's grid:

* a side layer of the newer scan (``FloorScan.side``: 0 unknown, 1 top, 2 under);
* a shapes file (circles, rectangles, polygons in floor coordinates, each with a
  side; format in ``docs/attribution.md``), painted over the side layer, later
  shapes winning;
* a measured top-side depth map (pit gauge or laser; NaN = not measured): there the
  top loss is the measured depth and the underside loss the rest of the total.

Cells still unknown after that take the default side, ``"under"`` unless the user
chooses ``"top"``. :func:`raw_side_map` keeps the unknowns so a report can say how
much loss was attributed by default; :func:`side_map` returns the resolved map.
"""

from __future__ import annotations

import csv
import datetime as _dt
import math
import os
from dataclasses import dataclass

import numpy as np

from .errors import InputError, where
from .scan import MM_PER_IN, SIDE_TOP, SIDE_UNDER, SIDE_UNKNOWN, FloorScan

__all__ = [
    "Shape",
    "DEFAULT_SIDE",
    "SIDE_CODES",
    "read_shapes",
    "shape_mask",
    "paint_shapes",
    "raw_side_map",
    "resolve_side",
    "side_map",
    "top_depth_map",
    "split_loss",
    "attribution_summary",
    "parse_number",
    "parse_date",
    "parse_geometry",
    "read_table",
    "check_inside",
]

#: Side given to loss no one attributed: the underside, because top-side pits are
#: seen from above and whatever is not found from above is taken as underside.
#: [seen/practice: domain.md §2]
DEFAULT_SIDE = "under"

#: Side names accepted in files and options, and their codes (scan.SIDE_*).
SIDE_CODES = {"unknown": SIDE_UNKNOWN, "top": SIDE_TOP, "under": SIDE_UNDER}

_SHAPE_KINDS = ("circle", "rect", "polygon")
_SHAPES_FORMAT = "scananalyse-shapes 1"


@dataclass(frozen=True)
class Shape:
    """One operator shape in floor coordinates (mm), with the side it attributes.

    Parameters
    ----------
    kind : ``"circle"``, ``"rect"`` or ``"polygon"``.
    side : side code, :data:`scan.SIDE_TOP` or :data:`scan.SIDE_UNDER` (or unknown,
        which erases an attribution). [-]
    x, y : centre of a circle or of a rectangle. [mm]
    r : radius of a circle. [mm]
    w, h : width (along x) and height (along y) of a rectangle. [mm]
    points : polygon vertices ``((x, y), ...)``, at least 3. [mm]
    source : file the shape was read from, for messages.
    line : line number in that file, for messages.
    """

    kind: str
    side: int
    x: float = math.nan
    y: float = math.nan
    r: float = math.nan
    w: float = math.nan
    h: float = math.nan
    points: tuple = ()
    source: str | None = None
    line: int | None = None

    @property
    def bounds(self) -> tuple[float, float, float, float]:
        """(x_min, x_max, y_min, y_max) of the shape. [mm]"""
        if self.kind == "circle":
            return (self.x - self.r, self.x + self.r, self.y - self.r, self.y + self.r)
        if self.kind == "rect":
            return (self.x - self.w / 2, self.x + self.w / 2,
                    self.y - self.h / 2, self.y + self.h / 2)
        p = np.asarray(self.points, dtype=np.float64)
        return (float(p[:, 0].min()), float(p[:, 0].max()),
                float(p[:, 1].min()), float(p[:, 1].max()))

    def where(self) -> str:
        return where(self.source, self.line)


# --------------------------------------------------------------------------
# shapes file
# --------------------------------------------------------------------------

def parse_number(text: str, path, line: int, field: str, *, positive: bool = False) -> float:
    """A side file's number: finite, bounded and short (the shared parsing of io/tables.py)."""
    from .io.tables import parse_field_number

    return parse_field_number(text, path, line, field, positive=positive)


def _points(text: str, path, line: int, scale: float) -> tuple:
    pts = []
    for k, item in enumerate(p for p in text.split(";") if p.strip()):
        parts = item.split()
        if len(parts) != 2:
            raise InputError(f"{where(path, line, 'points')}: vertex {k + 1} must be 'x y', "
                             f"got {_shown(item.strip())}")
        pts.append((_num(parts[0], path, line, "points") * scale,
                    _num(parts[1], path, line, "points") * scale))
    if len(pts) < 3:
        raise InputError(f"{where(path, line, 'points')}: a polygon needs at least 3 vertices, "
                         f"got {len(pts)}")
    p = np.asarray(pts)
    # shoelace area: a degenerate (collinear) polygon covers nothing
    area = 0.5 * abs(np.dot(p[:, 0], np.roll(p[:, 1], -1)) - np.dot(p[:, 1], np.roll(p[:, 0], -1)))
    if area <= 0:
        raise InputError(f"{where(path, line, 'points')}: the polygon has zero area")
    return tuple(pts)


def read_table(path, fmt: str, required: tuple[str, ...], optional: tuple[str, ...]):
    """Read a ``# key: value`` header plus a CSV table; yield (line, row dict), header."""
    from .io.tables import read_text_lines, shown

    path = os.fspath(path)
    what = "shapes file" if "shapes" in fmt else "repairs file" if "repairs" in fmt else "side file"
    lines = read_text_lines(path, what=what)
    header: dict[str, str] = {}
    rows = []
    body_start = None
    for n, text in enumerate(lines, start=1):
        s = text.strip()
        if not s:
            continue
        if s.startswith("#"):
            if ":" in s:
                key, _, value = s[1:].partition(":")
                header[key.strip().lower()] = value.strip()
            continue
        body_start = n
        break
    if header.get("format", fmt) != fmt:
        raise InputError(f"{where(path, None, 'format')}: expected {fmt!r}, "
                         f"got {shown(header['format'])}")
    units = header.get("units", "mm")
    if units not in ("mm", "in"):
        raise InputError(f"{where(path, None, 'units')}: must be 'mm' or 'in', got {shown(units)}")
    if body_start is None:
        raise InputError(f"{where(path)}: no table (a header row is required)")
    reader = csv.reader(lines[body_start - 1:])
    try:
        columns = [c.strip().lower() for c in next(reader)]
        for c in required:
            if c not in columns:
                raise InputError(f"{where(path, body_start, c)}: required column missing")
        for c in columns:
            if c not in required and c not in optional:
                raise InputError(f"{where(path, body_start, shown(c, quote=False))}: unknown column")
        for values in reader:
            n = body_start + reader.line_num - 1
            if not values or all(not v.strip() for v in values) or values[0].lstrip().startswith("#"):
                continue
            if len(values) > len(columns):
                raise InputError(f"{where(path, n)}: {len(values)} fields, header has {len(columns)}")
            row = {c: (values[k].strip() if k < len(values) else "") for k, c in enumerate(columns)}
            rows.append((n, row))
    except csv.Error as exc:
        raise InputError(f"{where(path, body_start + reader.line_num - 1)}: cannot read as CSV ({exc})") from None
    return path, header, units, rows


def parse_geometry(row: dict, path, n: int, scale: float) -> dict:
    kind = row["shape"].lower()
    if kind not in _SHAPE_KINDS:
        raise InputError(f"{where(path, n, 'shape')}: unknown shape {_shown(row['shape'])} "
                         f"(circle, rect or polygon)")
    geo: dict = {"kind": kind}

    def need(name, positive=False):
        if not row.get(name):
            raise InputError(f"{where(path, n, name)}: required for a {kind}")
        return _num(row[name], path, n, name, positive=positive) * scale

    if kind == "circle":
        geo.update(x=need("x"), y=need("y"), r=need("r", positive=True))
    elif kind == "rect":
        geo.update(x=need("x"), y=need("y"), w=need("w", positive=True), h=need("h", positive=True))
    else:
        if not row.get("points"):
            raise InputError(f"{where(path, n, 'points')}: required for a polygon")
        geo.update(points=_points(row["points"], path, n, scale))
    return geo


def read_shapes(path, *, scan: FloorScan | None = None) -> list[Shape]:
    """Read an operator shapes file (format ``scananalyse-shapes 1``, docs/attribution.md).

    Parameters
    ----------
    path : the CSV file: ``# key: value`` header lines (``format``, ``units``), then a
        table with columns ``shape,side,x,y,r,w,h,points``. [-]
    scan : optional scan whose grid extent every shape must touch; shapes are checked
        again against the grid in :func:`paint_shapes`. [-]

    Returns
    -------
    list of :class:`Shape`, in file order (later shapes win when painted), in mm.

    Raises
    ------
    InputError
        One line naming the file and line: unknown shape, bad side, bad or missing
        number, polygon with fewer than 3 vertices or zero area, shape outside the
        floor's grid extent.
    """
    path, _header, units, rows = _read_table(
        path, _SHAPES_FORMAT, ("shape", "side"), ("x", "y", "r", "w", "h", "points"))
    scale = MM_PER_IN if units == "in" else 1.0
    shapes = []
    for n, row in rows:
        side_name = row["side"].lower()
        if side_name not in SIDE_CODES:
            raise InputError(f"{where(path, n, 'side')}: bad side {_shown(row['side'])} "
                             f"(top, under or unknown)")
        geo = _parse_geometry(row, path, n, scale)
        shape = Shape(side=SIDE_CODES[side_name], source=path, line=n, **geo)
        if scan is not None:
            _check_inside(shape, scan)
        shapes.append(shape)
    return shapes


def check_inside(shape: Shape, scan: FloorScan) -> None:
    gx0, gx1, gy0, gy1 = scan.extent
    sx0, sx1, sy0, sy1 = shape.bounds
    if sx1 < gx0 or sx0 > gx1 or sy1 < gy0 or sy0 > gy1:
        raise InputError(
            f"{shape.where()}: {shape.kind} lies entirely outside the floor's grid "
            f"(x {gx0:.0f}..{gx1:.0f} mm, y {gy0:.0f}..{gy1:.0f} mm)")


# --------------------------------------------------------------------------
# rasterising
# --------------------------------------------------------------------------

def _window(shape: Shape, scan: FloorScan):
    """Row/column slices of the cells whose centres may lie in the shape."""
    x0, x1, y0, y1 = shape.bounds
    rows, cols = scan.shape
    c0 = max(int(math.floor((x0 - scan.x0) / scan.pitch)), 0)
    c1 = min(int(math.ceil((x1 - scan.x0) / scan.pitch)) + 1, cols)
    r0 = max(int(math.floor((y0 - scan.y0) / scan.pitch)), 0)
    r1 = min(int(math.ceil((y1 - scan.y0) / scan.pitch)) + 1, rows)
    return slice(r0, max(r0, r1)), slice(c0, max(c0, c1))


def _window_mask(shape: Shape, scan: FloorScan, rs: slice, cs: slice) -> np.ndarray:
    xs = scan.x0 + scan.pitch * np.arange(cs.start, cs.stop, dtype=np.float64)
    ys = scan.y0 + scan.pitch * np.arange(rs.start, rs.stop, dtype=np.float64)
    if shape.kind == "circle":
        return ((xs[None, :] - shape.x) ** 2 + (ys[:, None] - shape.y) ** 2) <= shape.r ** 2
    if shape.kind == "rect":
        inx = np.abs(xs - shape.x) <= shape.w / 2
        iny = np.abs(ys - shape.y) <= shape.h / 2
        return iny[:, None] & inx[None, :]
    from skimage.draw import polygon2mask
    p = np.asarray(shape.points, dtype=np.float64)
    # polygon2mask takes (row, col) vertices; cell (i, j) is inside if its centre is.
    rc = np.column_stack(((p[:, 1] - ys[0]) / scan.pitch, (p[:, 0] - xs[0]) / scan.pitch))
    return polygon2mask((len(ys), len(xs)), rc)


def shape_mask(shape: Shape, scan: FloorScan) -> np.ndarray:
    """Boolean mask of the cells of ``scan`` whose centres lie inside ``shape``.

    Parameters
    ----------
    shape : the shape, in floor coordinates. [mm]
    scan : the scan giving the grid. [-]

    Returns
    -------
    bool array of ``scan.shape``; only the shape's bounding window is computed.
    """
    mask = np.zeros(scan.shape, dtype=bool)
    rs, cs = _window(shape, scan)
    if rs.stop > rs.start and cs.stop > cs.start:
        mask[rs, cs] = _window_mask(shape, scan, rs, cs)
    return mask


def paint_shapes(side: np.ndarray, shapes, scan: FloorScan) -> np.ndarray:
    """Paint shapes over a side map in place, later shapes winning; return it.

    Parameters
    ----------
    side : int8 side map on ``scan``'s grid (modified in place). [-]
    shapes : iterable of :class:`Shape`. [-]
    scan : the scan giving the grid. [-]

    Raises
    ------
    InputError
        A shape entirely outside the grid extent (file and line of the shape).
    """
    for shape in shapes:
        _check_inside(shape, scan)
        rs, cs = _window(shape, scan)
        if rs.stop > rs.start and cs.stop > cs.start:
            win = side[rs, cs]
            win[_window_mask(shape, scan, rs, cs)] = shape.side
    return side


def raw_side_map(new: FloorScan, *, shapes=None) -> np.ndarray:
    """Side map before defaults: the scan's side layer with the shapes painted over it.

    Parameters
    ----------
    new : the newer scan (its ``side`` layer is used if present). [-]
    shapes : optional list of :class:`Shape` (from :func:`read_shapes`) or a path to a
        shapes file. [-]

    Returns
    -------
    int8 array on ``new``'s grid: 0 unknown, 1 top, 2 under.
    """
    if new.side is not None:
        side = np.array(new.side, dtype=np.int8, copy=True)
        bad = (side != SIDE_UNKNOWN) & (side != SIDE_TOP) & (side != SIDE_UNDER)
        if bad.any():
            raise InputError(f"{where(new.source, None, 'side')}: side codes must be 0, 1 or 2")
    else:
        side = np.zeros(new.shape, dtype=np.int8)
    if shapes is not None:
        if isinstance(shapes, (str, os.PathLike)):
            shapes = read_shapes(shapes, scan=new)
        paint_shapes(side, shapes, new)
    return side


def resolve_side(side: np.ndarray, default: str = DEFAULT_SIDE) -> np.ndarray:
    """Give unknown cells the default side (a copy; the input keeps its unknowns).

    Parameters
    ----------
    side : int8 side map with 0 = unknown. [-]
    default : ``"under"`` (default: loss not found from above is underside
        [seen/practice: domain.md §2]) or ``"top"``. [-]

    Returns
    -------
    int8 side map with no unknown cells.
    """
    if default not in ("under", "top"):
        raise InputError(f"{where(None, None, 'unknown_side')}: must be 'under' or 'top', "
                         f"got {default!r}")
    out = np.array(side, dtype=np.int8, copy=True)
    out[out == SIDE_UNKNOWN] = SIDE_CODES[default]
    return out


def side_map(new: FloorScan, *, shapes=None, default: str = DEFAULT_SIDE) -> np.ndarray:
    """Resolved side map on the newer scan's grid: side layer, shapes, then the default.

    Parameters
    ----------
    new : the newer scan. [-]
    shapes : optional list of :class:`Shape` or a shapes-file path; later shapes win. [-]
    default : side for cells nobody attributed, ``"under"`` or ``"top"``. [-]

    Returns
    -------
    int8 array (1 top, 2 under) on ``new``'s grid. Use :func:`raw_side_map` to keep
    the unknown cells for reporting.
    """
    return resolve_side(raw_side_map(new, shapes=shapes), default)


def top_depth_map(depth, new: FloorScan) -> np.ndarray:
    """Measured top-side depth on the newer scan's grid (pit gauge or laser).

    Parameters
    ----------
    depth : 2-D array on ``new``'s grid, or a :class:`FloorScan` on the same grid whose
        ``thickness`` array holds the measured top-side depth; NaN = not measured. [mm]
    new : the newer scan. [-]

    Returns
    -------
    float32 array of top-side depth, NaN where not measured. [mm]
    """
    name = "top_depth"
    if isinstance(depth, FloorScan):
        if not depth.same_grid(new):
            raise InputError(f"{where(depth.source, None, name)}: the top-side depth map is "
                             f"not on the newer scan's grid")
        name_src = depth.source
        arr = depth.thickness
    else:
        name_src = None
        arr = np.asarray(depth)
        if arr.shape != new.shape:
            raise InputError(f"{where(name_src, None, name)}: shape {arr.shape} differs from "
                             f"the newer scan's grid {new.shape}")
    arr = arr.astype(np.float32, copy=False)
    with np.errstate(invalid="ignore"):
        if np.any(arr < 0) or np.any(np.isinf(arr)):
            raise InputError(f"{where(name_src, None, name)}: depths must be finite and >= 0 "
                             f"(NaN = not measured)")
    return arr


def split_loss(loss: np.ndarray, side: np.ndarray, *, top_depth=None):
    """Split total loss into top-side and underside loss.

    Where a top-side depth was measured the top loss is that depth (at most the total
    loss) and the underside loss is the rest, ``max(total − top, 0)``; elsewhere the
    whole loss goes to the cell's side (resolved map: 1 top, 2 under).

    Parameters
    ----------
    loss : total loss, float32, NaN where not scanned. [mm]
    side : resolved int8 side map on the same grid. [-]
    top_depth : optional measured top-side depth, NaN = not measured. [mm]

    Returns
    -------
    (loss_top, loss_under) : float32 arrays, NaN where ``loss`` is NaN. [mm]
    """
    is_top = side == SIDE_TOP
    zero = np.float32(0)
    loss_top = np.where(is_top, loss, zero)
    loss_under = np.where(is_top, zero, loss)
    if top_depth is not None:
        measured = np.isfinite(top_depth) & np.isfinite(loss)
        t = np.minimum(top_depth[measured], loss[measured])
        loss_top[measured] = t
        loss_under[measured] = np.maximum(loss[measured] - t, zero)
    nan = ~np.isfinite(loss)
    loss_top[nan] = np.nan
    loss_under[nan] = np.nan
    return loss_top.astype(np.float32, copy=False), loss_under.astype(np.float32, copy=False)


def attribution_summary(raw_side: np.ndarray, loss: np.ndarray, *, reporting_depth_mm: float = 0.0,
                        top_depth=None, default: str = DEFAULT_SIDE) -> dict:
    """How the loss was attributed: counts by source, for the report.

    Parameters
    ----------
    raw_side : side map before defaults (0 unknown). [-]
    loss : total loss, NaN where not scanned. [mm]
    reporting_depth_mm : only cells with loss at least this deep are counted. [mm]
    top_depth : optional measured top-side depth map. [mm]
    default : the side given to unknown cells. [-]

    Returns
    -------
    dict with ``cells_with_loss``, ``cells_top``, ``cells_under``, ``cells_defaulted``,
    ``cells_top_depth`` and ``defaulted_pct`` (share of loss cells that took the default).
    """
    with np.errstate(invalid="ignore"):
        lossy = np.isfinite(loss) & (loss >= reporting_depth_mm) & (loss > 0)
    measured = np.zeros_like(lossy) if top_depth is None else (np.isfinite(top_depth) & lossy)
    rest = lossy & ~measured
    n = int(np.count_nonzero(lossy))
    n_def = int(np.count_nonzero(rest & (raw_side == SIDE_UNKNOWN)))
    return {
        "default_side": default,
        "cells_with_loss": n,
        "cells_top": int(np.count_nonzero(rest & (raw_side == SIDE_TOP))),
        "cells_under": int(np.count_nonzero(rest & (raw_side == SIDE_UNDER))),
        "cells_defaulted": n_def,
        "cells_top_depth": int(np.count_nonzero(measured)),
        "defaulted_pct": 100.0 * n_def / n if n else 0.0,
    }


# --------------------------------------------------------------------------
# shared with rates.read_repairs
# --------------------------------------------------------------------------

def parse_date(text: str, path, n: int, field: str) -> _dt.date:
    try:
        return _dt.date.fromisoformat(text)
    except ValueError:
        raise InputError(f"{where(path, n, field)}: not an ISO date (YYYY-MM-DD): {_shown(text)}") from None


def _shown(text) -> str:
    from .io.tables import shown

    return shown(text)


# the shapes reader's own names for the shared helpers above
_num = parse_number
_read_table = read_table
_parse_geometry = parse_geometry
_check_inside = check_inside
_parse_date = parse_date
