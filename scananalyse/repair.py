"""Repair planning with lap-welded patch plates, and re-assessment as repaired.

The engineer's question is "what must I repair for the interval I want?"
[domain.md §6].  This module answers it in four steps, each a plain function:

1. :func:`cells_needing_repair` marks the cells that would fall below MRT before the
   target interval at their own measured rates (or, the code's way, every cell
   thinner than a repair-to thickness).
2. :func:`plan_patches` groups the marked cells into rectangular patch plates with
   rounded corners that obey the patch rules of API 653 §9.10.1.1 as quoted in
   domain.md §6 (minimum size, extension beyond the corrosion, clearance of the
   fillet welds from existing bottom welds and from other patches, the critical
   zone).  Every number comes from the :class:`~scananalyse.rules.RuleSet` passed in.
3. :func:`apply_patches` turns the maps into the floor as repaired, for a second run
   of the assessment.
4. :func:`check_patch_rules` and :func:`uncovered_cells` judge an engineer's own
   patch set (read with :func:`read_patches` from the ``patches.csv`` columns or
   from a DXF of closed outlines edited in CAD).

Geometry
--------
A patch is an axis-aligned rectangle ``[x_min, x_max] × [y_min, y_max]`` in the new
scan's floor frame with corner radius ``R`` (0 ≤ R ≤ half the smaller side); its
outline is the fillet weld.  A grid cell is a square of side ``pitch`` about its
centre ``(x0 + j·pitch, y0 + i·pitch)``.  A cell is *covered* by a patch when its
centre lies inside the rounded outline.  Distances between welds are measured on
the sharp rectangles, which is conservative: rounding only moves a weld away.

Seams (existing bottom welds) are straight segments ``(x1, y1, x2, y2)`` [mm],
given directly (for example ``synth`` truth) or derived from a plate-id layer by
:func:`seams_from_plate` (boundaries between cells of different plates, across
unscanned gaps up to ``max_gap_mm``).  A patch *overlaps* a seam when a seam
passes through its interior: crossing a seam is allowed at the larger minimum
size, as the rule reads.  The weld-clearance rule is taken as: no seam may run
alongside a patch edge closer than the clearance.  A seam "runs alongside" an edge
when it is within 45° of the edge's direction; seams crossing an edge at a larger
angle are the overlap case.  Plate-layer seams are staircases of grid steps; only
straight runs at least as long as the clearance take part in the clearance test
(steeply diagonal plate-layer seams are checked for overlap only).
"""

from __future__ import annotations

import math
import os
import tempfile
import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import ndimage
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from skimage.measure import label as _sk_label

from .errors import InputError, ScanWarning, where
from .outputs import publish_file

__all__ = [
    "PATCH_COLUMNS",
    "FLAG_CRITICAL",
    "FLAG_CRITICAL_THICKNESS",
    "FLAG_WELD_CLEARANCE",
    "FLAG_TOO_SMALL",
    "FLAG_TOO_CLOSE",
    "FLAG_OVERLAP_SIZE",
    "FLAG_NOT_BEYOND",
    "FLAG_SHELL_CLEARANCE",
    "RepairPlan",
    "cells_needing_repair",
    "seams_from_plate",
    "rounded_rect_area_mm2",
    "patch_mass_kg",
    "plan_patches",
    "covered_cells",
    "apply_patches",
    "check_patch_rules",
    "shell_distance_mm",
    "repair_and_reassess",
    "uncovered_cells",
    "plan_repairs",
    "repair_to_plan",
    "read_patches",
    "write_patches_csv",
    "write_patches_dxf",
]

#: Columns of ``patches.csv`` (design.md §3.5) plus ``n_cells_covered``.
PATCH_COLUMNS = ["patch", "zone", "x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm",
                 "corner_radius_mm", "thickness_mm", "area_m2", "mass_kg", "flags",
                 "n_cells_covered"]

#: Where a patch is on the floor (``patches.csv``, after the contract's columns; read back and ignored):
#: clock position of its centre from the datum and distance from the shell.
LOCATION_COLUMNS = ["clock", "from_shell_mm"]

FLAG_CRITICAL = "critical-zone-special-repair"
FLAG_CRITICAL_THICKNESS = "critical-zone-thickness"
FLAG_WELD_CLEARANCE = "weld-clearance"
FLAG_TOO_SMALL = "too-small"
FLAG_TOO_CLOSE = "too-close"
FLAG_OVERLAP_SIZE = "overlaps-without-min-size"
FLAG_NOT_BEYOND = "not-beyond-corrosion"
FLAG_SHELL_CLEARANCE = "shell-clearance"

# Geometric tolerance for comparisons of positions. [mm]
_TOL = 1e-6
# Layer names and application id of our DXF files.
_DXF_LAYER = "SCANANALYSE_PATCH"
_DXF_TEXT_LAYER = "SCANANALYSE_PATCH_ID"
_DXF_APPID = "SCANANALYSE"
# DXF $INSUNITS codes we convert exactly (to mm).
_DXF_UNITS_MM = {1: 25.4, 2: 304.8, 4: 1.0, 5: 10.0, 6: 1000.0}
_REQUIRED_CSV = ("patch", "x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm")


# ---------------------------------------------------------------------------
# which cells need repair
# ---------------------------------------------------------------------------
def cells_needing_repair(thickness, rate_top, rate_under, *, mrt_mm, target_years,
                         repair_to_mm=None) -> np.ndarray:
    """Cells that must be repaired for the floor to last the target interval.

    Parameters
    ----------
    thickness : remaining thickness, NaN where not scanned. [mm]
    rate_top : governing top-side (product side) rate at each cell; negative and NaN
        values count as 0. [mm/y]
    rate_under : governing underside (soil side) rate at each cell; negative and NaN
        values count as 0. [mm/y]
    mrt_mm : minimum remaining thickness at the end of the interval, scalar or per
        cell (e.g. the critical-zone minimum there). [mm]
    target_years : the interval the floor must last. [y]
    repair_to_mm : if given, the code's way instead: every cell thinner than this
        repair-to thickness, whatever its rate. [mm]

    Returns
    -------
    bool array : True where the cell needs repair.  NaN (unscanned) cells never do.

    Notes
    -----
    Co-located criterion (domain.md §5–6): a cell needs repair when
    ``t − (r_top + r_under)·target < MRT``, i.e. its own projected life
    ``(t − MRT)/(r_top + r_under)`` is shorter than the target.  A cell already
    below MRT needs repair whatever its rates, hence NaN rates count as 0 here.
    """
    t = np.asarray(thickness, dtype=np.float32)
    if repair_to_mm is not None:
        rt = float(repair_to_mm)
        if not math.isfinite(rt) or rt <= 0:
            raise InputError(f"repair: field 'repair_to_mm': must be a positive number, got {repair_to_mm!r}")
        with np.errstate(invalid="ignore"):
            return np.isfinite(t) & (t < np.float32(rt))
    ty = float(target_years)
    if not math.isfinite(ty) or ty < 0:
        raise InputError(f"repair: field 'target_years': must be a number >= 0, got {target_years!r}")
    # fmax against 0: NaN and negative rates count as 0, +inf stays (one pass each, in place)
    s = np.fmax(np.asarray(rate_top, dtype=np.float32), np.float32(0))
    s += np.fmax(np.asarray(rate_under, dtype=np.float32), np.float32(0))
    mrt = np.asarray(mrt_mm, dtype=np.float32)
    with np.errstate(invalid="ignore"):
        s *= np.float32(ty)
        np.subtract(t, s, out=s)  # t − (r_top + r_under)·target
        out = s < mrt
    return np.isfinite(t) & out


# ---------------------------------------------------------------------------
# seams
# ---------------------------------------------------------------------------
def _runs_to_segments(row, key, vertical, x0, y0, pitch):
    """Merge unit seam elements at (row, key) into straight runs."""
    if row.size == 0:
        return np.zeros((0, 4))
    order = np.lexsort((row, key))
    r, k = row[order], key[order]
    brk = np.ones(r.size, dtype=bool)
    brk[1:] = (k[1:] != k[:-1]) | (r[1:] != r[:-1] + 1)
    starts = np.flatnonzero(brk)
    ends = np.concatenate([starts[1:], [r.size]]) - 1
    pos = k[starts] / 2.0          # key = j + j_next: twice the boundary position in cells
    a = r[starts] - 0.5
    b = r[ends] + 0.5
    if vertical:   # rows are grid rows (y), boundary lies at x = x0 + pos*pitch
        xs = x0 + pos * pitch
        return np.column_stack([xs, y0 + a * pitch, xs, y0 + b * pitch])
    ys = y0 + pos * pitch
    return np.column_stack([x0 + a * pitch, ys, x0 + b * pitch, ys])


def _boundaries_along_rows(ids, kmax):
    """Unit boundaries between different plate ids along axis 1, across ≤ kmax unscanned cells.

    Works on the flat (row-major) indices of the valid cells: each valid cell's next
    valid cell along its row is simply the next flat index when it lies on the same row.
    """
    ny, nx = ids.shape
    empty = np.zeros(0, dtype=np.int64)
    flat_ids = ids.reshape(-1) if ids.flags.c_contiguous else np.ascontiguousarray(ids).reshape(-1)
    flat = np.flatnonzero(flat_ids >= 0)
    if flat.size < 2:
        return empty, empty
    # Cheap test first (consecutive valid cells of different ids, on the int32 ids), then
    # the row and gap tests on the few candidates only: the same pairs, without integer
    # division over every valid cell.
    v = flat_ids[flat]
    k = np.flatnonzero(v[1:] != v[:-1])
    a = flat[k]
    b = flat[k + 1]
    pair = ((a // nx) == (b // nx)) & (b - a - 1 <= kmax)
    a = a[pair]
    b = b[pair]
    return (a // nx).astype(np.int64), (a % nx + b % nx).astype(np.int64)


def seams_from_plate(plate, *, x0, y0, pitch, max_gap_mm=100.0) -> np.ndarray:
    """Seam segments at the boundaries of a plate-id layer.

    Parameters
    ----------
    plate : int array (rows, cols) of plate ids on the grid, −1 for none. [-]
    x0, y0 : floor coordinates of the centre of cell [0, 0]. [mm]
    pitch : cell size. [mm]
    max_gap_mm : two plates separated by at most this many mm of cells with id −1
        (an unscanned seam band) still share a seam, placed mid-gap. [mm]

    Returns
    -------
    float64 array (n, 4) : axis-aligned segments ``(x1, y1, x2, y2)``, one per
    straight run of boundary between two plates. [mm]
    """
    ids = np.asarray(plate)
    if ids.ndim != 2:
        raise InputError(f"repair: field 'plate': expected a 2-D plate-id layer, got shape {ids.shape}")
    ids = ids.astype(np.int32, copy=False)
    kmax = int(math.floor(float(max_gap_mm) / float(pitch) + 1e-9))
    r_v, k_v = _boundaries_along_rows(ids, kmax)      # vertical seams (between columns)
    r_h, k_h = _boundaries_along_rows(ids.T, kmax)    # horizontal seams (between rows)
    sv = _runs_to_segments(r_v, k_v, True, float(x0), float(y0), float(pitch))
    sh = _runs_to_segments(r_h, k_h, False, float(x0), float(y0), float(pitch))
    return np.concatenate([sv, sh], axis=0)


def _seam_set(seams, plate, x0, y0, pitch, clearance, plate_seams=None):
    """(segments (n, 4), used-for-clearance mask (n,)) from the user's seams and/or plate layer
    (``plate_seams``: the plate layer's segments when already derived)."""
    parts, use = [], []
    if seams is not None:
        s = np.asarray(seams, dtype=np.float64)
        if s.size == 0:
            s = s.reshape(0, 4)
        if s.ndim != 2 or s.shape[1] != 4 or not np.all(np.isfinite(s)):
            raise InputError("repair: field 'seams': expected finite segments (x1, y1, x2, y2) in mm")
        parts.append(s)
        use.append(np.ones(len(s), dtype=bool))
    if plate is not None:
        s = plate_seams if plate_seams is not None else seams_from_plate(plate, x0=x0, y0=y0, pitch=pitch)
        length = np.hypot(s[:, 2] - s[:, 0], s[:, 3] - s[:, 1])
        parts.append(s)
        use.append(length >= clearance - _TOL)
    if not parts:
        return np.zeros((0, 4)), np.zeros(0, dtype=bool)
    return np.concatenate(parts, axis=0), np.concatenate(use)


# ---------------------------------------------------------------------------
# elementary geometry (vectorised)
# ---------------------------------------------------------------------------
def rounded_rect_area_mm2(width_mm, height_mm, radius_mm):
    """Area of a rectangle with rounded corners.

    Parameters
    ----------
    width_mm, height_mm : sides of the rectangle. [mm]
    radius_mm : corner radius, at most half the smaller side. [mm]

    Returns
    -------
    Area w·h − (4 − π)·R². [mm²]
    """
    w = np.asarray(width_mm, dtype=np.float64)
    h = np.asarray(height_mm, dtype=np.float64)
    r = np.asarray(radius_mm, dtype=np.float64)
    return w * h - (4.0 - math.pi) * r * r


def patch_mass_kg(area_m2, thickness_mm, *, density_kg_m3):
    """Steel mass of a patch plate: area × thickness × density.

    Parameters
    ----------
    area_m2 : plate area. [m²]
    thickness_mm : plate thickness. [mm]
    density_kg_m3 : steel density (rule ``steel_density_kg_m3``). [kg/m³]

    Returns
    -------
    Mass. [kg]
    """
    return np.asarray(area_m2, dtype=np.float64) * np.asarray(thickness_mm, dtype=np.float64) / 1000.0 \
        * float(density_kg_m3)


def _pt_seg_dist(px, py, ax, ay, bx, by):
    dx, dy = bx - ax, by - ay
    ll = dx * dx + dy * dy
    with np.errstate(invalid="ignore", divide="ignore"):
        t = np.where(ll > 0, ((px - ax) * dx + (py - ay) * dy) / np.where(ll > 0, ll, 1.0), 0.0)
    t = np.clip(t, 0.0, 1.0)
    return np.hypot(px - (ax + t * dx), py - (ay + t * dy))


def _seg_seg_dist(a, b):
    """Distance between segments a[..., 4] and b[..., 4] (broadcast)."""
    ax1, ay1, ax2, ay2 = (a[..., k] for k in range(4))
    bx1, by1, bx2, by2 = (b[..., k] for k in range(4))

    def orient(px, py, qx, qy, rx, ry):
        return np.sign((qx - px) * (ry - py) - (qy - py) * (rx - px))

    o1 = orient(ax1, ay1, ax2, ay2, bx1, by1)
    o2 = orient(ax1, ay1, ax2, ay2, bx2, by2)
    o3 = orient(bx1, by1, bx2, by2, ax1, ay1)
    o4 = orient(bx1, by1, bx2, by2, ax2, ay2)
    cross = (o1 * o2 < 0) & (o3 * o4 < 0)
    d = np.minimum.reduce([
        _pt_seg_dist(ax1, ay1, bx1, by1, bx2, by2), _pt_seg_dist(ax2, ay2, bx1, by1, bx2, by2),
        _pt_seg_dist(bx1, by1, ax1, ay1, ax2, ay2), _pt_seg_dist(bx2, by2, ax1, ay1, ax2, ay2)])
    return np.where(cross, 0.0, d)


def _clip_params(s, xa, ya, xb, yb):
    """Liang–Barsky: parameter interval (t0, t1) of segments s (n, 4) inside the box."""
    x1, y1 = s[:, 0], s[:, 1]
    dx, dy = s[:, 2] - x1, s[:, 3] - y1
    t0 = np.zeros(len(s))
    t1 = np.ones(len(s))
    for p, q in ((-dx, x1 - xa), (dx, xb - x1), (-dy, y1 - ya), (dy, yb - y1)):
        par = np.abs(p) < 1e-15
        with np.errstate(divide="ignore", invalid="ignore"):
            r = q / np.where(par, 1.0, p)
        t0 = np.where(~par & (p < 0), np.maximum(t0, r), t0)
        t1 = np.where(~par & (p > 0), np.minimum(t1, r), t1)
        # parallel and outside: empty
        t1 = np.where(par & (q < 0), -1.0, t1)
    return t0, t1


def _seg_boxes(segs):
    """Bounding boxes (x_min, x_max, y_min, y_max) of segments (n, 4)."""
    return (np.minimum(segs[:, 0], segs[:, 2]), np.maximum(segs[:, 0], segs[:, 2]),
            np.minimum(segs[:, 1], segs[:, 3]), np.maximum(segs[:, 1], segs[:, 3]))


def _seams_through(segs, rect, boxes=None):
    """True if any segment passes through the open interior of rect (xa, ya, xb, yb).

    ``boxes`` (:func:`_seg_boxes` of ``segs``, when the caller tests many rectangles): only
    segments whose bounding box meets the rectangle are clipped.
    """
    if len(segs) == 0:
        return False
    xa, ya, xb, yb = rect
    sx0, sx1, sy0, sy1 = boxes if boxes is not None else _seg_boxes(segs)
    near = (sx1 > xa) & (sx0 < xb) & (sy1 > ya) & (sy0 < yb)
    if not near.any():
        return False
    t0, t1 = _clip_params(segs[near], xa + _TOL, ya + _TOL, xb - _TOL, yb - _TOL)
    return bool(np.any(t1 - t0 > 1e-12))


def _edges(rect):
    xa, ya, xb, yb = rect
    horiz = np.array([[xa, ya, xb, ya], [xa, yb, xb, yb]])
    vert = np.array([[xa, ya, xa, yb], [xb, ya, xb, yb]])
    return horiz, vert


def _near_box(segs, rect, c):
    """Segments whose bounding box meets rect grown by c (cheap prefilter)."""
    xa, ya, xb, yb = rect
    sx0 = np.minimum(segs[:, 0], segs[:, 2])
    sx1 = np.maximum(segs[:, 0], segs[:, 2])
    sy0 = np.minimum(segs[:, 1], segs[:, 3])
    sy1 = np.maximum(segs[:, 1], segs[:, 3])
    return (sx1 > xa - c) & (sx0 < xb + c) & (sy1 > ya - c) & (sy0 < yb + c)


def _clearance_violation(segs, xish, rect, c):
    """Seams running alongside an edge of rect closer than c.

    Returns (violated, grow) with grow = (xa', ya', xb', yb') the rectangle grown so
    that each offending seam is overlapped and lies at least c inside the edge.
    """
    xa, ya, xb, yb = rect
    if len(segs) == 0 or c <= 0:
        return False, rect
    near = _near_box(segs, rect, c)
    if not np.any(near):
        return False, rect
    s, xi = segs[near], xish[near]
    horiz, vert = _edges(rect)
    g = [xa, ya, xb, yb]
    bad = False
    sx = s[xi]
    if len(sx):
        d_bot = _seg_seg_dist(sx, horiz[0][None, :])
        d_top = _seg_seg_dist(sx, horiz[1][None, :])
        hit_b, hit_t = d_bot < c - _TOL, d_top < c - _TOL
        if np.any(hit_b | hit_t):
            bad = True
            t0, t1 = _clip_params(sx, xa - c, -np.inf, xb + c, np.inf)
            y_lo = np.minimum(sx[:, 1] + t0 * (sx[:, 3] - sx[:, 1]), sx[:, 1] + t1 * (sx[:, 3] - sx[:, 1]))
            y_hi = np.maximum(sx[:, 1] + t0 * (sx[:, 3] - sx[:, 1]), sx[:, 1] + t1 * (sx[:, 3] - sx[:, 1]))
            if np.any(hit_b):
                g[1] = min(g[1], float(np.min(y_lo[hit_b])) - c)
            if np.any(hit_t):
                g[3] = max(g[3], float(np.max(y_hi[hit_t])) + c)
    sy = s[~xi]
    if len(sy):
        d_l = _seg_seg_dist(sy, vert[0][None, :])
        d_r = _seg_seg_dist(sy, vert[1][None, :])
        hit_l, hit_r = d_l < c - _TOL, d_r < c - _TOL
        if np.any(hit_l | hit_r):
            bad = True
            t0, t1 = _clip_params(sy, -np.inf, ya - c, np.inf, yb + c)
            x_lo = np.minimum(sy[:, 0] + t0 * (sy[:, 2] - sy[:, 0]), sy[:, 0] + t1 * (sy[:, 2] - sy[:, 0]))
            x_hi = np.maximum(sy[:, 0] + t0 * (sy[:, 2] - sy[:, 0]), sy[:, 0] + t1 * (sy[:, 2] - sy[:, 0]))
            if np.any(hit_l):
                g[0] = min(g[0], float(np.min(x_lo[hit_l])) - c)
            if np.any(hit_r):
                g[2] = max(g[2], float(np.max(x_hi[hit_r])) + c)
    return bad, tuple(g)


def _rect_gaps(R, chunk=1024):
    """Yield (first row, rectangle gaps, (x overlap, y overlap)) for row chunks against all."""
    n = len(R)
    for s in range(0, n, chunk):
        a = R[s:s + chunk]
        dx = np.maximum.reduce([np.zeros((len(a), n)), R[None, :, 0] - a[:, None, 2],
                                a[:, None, 0] - R[None, :, 2]])
        dy = np.maximum.reduce([np.zeros((len(a), n)), R[None, :, 1] - a[:, None, 3],
                                a[:, None, 1] - R[None, :, 3]])
        yield s, np.hypot(dx, dy), (np.minimum(a[:, None, 2], R[None, :, 2]) - np.maximum(a[:, None, 0], R[None, :, 0]),
                                    np.minimum(a[:, None, 3], R[None, :, 3]) - np.maximum(a[:, None, 1], R[None, :, 1]))


def _near_pairs(R, c):
    """Pairs (i < j) of rectangles whose gap may be below ``c``, with gap and overlaps.

    Candidates come from a k-d tree on the rectangle centres (two rectangles closer than c
    have centres within half their diagonals plus c), then the exact gap is computed for
    those pairs only: near-linear in the number of rectangles instead of all pairs.
    Returns (i, j, gap, x overlap, y overlap).
    """
    from scipy.spatial import cKDTree

    n = len(R)
    if n < 2:
        e = np.zeros(0)
        return e.astype(int), e.astype(int), e, e, e
    cx = 0.5 * (R[:, 0] + R[:, 2])
    cy = 0.5 * (R[:, 1] + R[:, 3])
    half = 0.5 * np.hypot(R[:, 2] - R[:, 0], R[:, 3] - R[:, 1])
    reach = max(c, 0.0) + _TOL
    tree = cKDTree(np.column_stack([cx, cy]))
    # One large rectangle (a merged patch, a replaced plate) must not widen the search for
    # all: pairs of ordinary rectangles are searched within twice the largest ordinary
    # half-diagonal, and each large one on its own within its half-diagonal plus the largest.
    big = half > 4.0 * float(np.median(half))
    h_small = float(half[~big].max()) if (~big).any() else 0.0
    found = [tree.query_pairs(2 * h_small + reach, output_type="ndarray")]
    h_max = float(half.max())
    for k in np.flatnonzero(big):
        near = np.asarray(tree.query_ball_point((cx[k], cy[k]), half[k] + h_max + reach), dtype=np.int64)
        near = near[near != k]
        found.append(np.column_stack([np.minimum(near, k), np.maximum(near, k)]))
    pairs = np.concatenate([f.reshape(-1, 2).astype(np.int64) for f in found])
    if len(pairs):
        pairs = np.unique(pairs, axis=0)
    if len(pairs) == 0:
        e = np.zeros(0)
        return e.astype(int), e.astype(int), e, e, e
    i, j = pairs[:, 0], pairs[:, 1]
    a, b = R[i], R[j]
    dx = np.maximum.reduce([np.zeros(len(i)), b[:, 0] - a[:, 2], a[:, 0] - b[:, 2]])
    dy = np.maximum.reduce([np.zeros(len(i)), b[:, 1] - a[:, 3], a[:, 1] - b[:, 3]])
    ox = np.minimum(a[:, 2], b[:, 2]) - np.maximum(a[:, 0], b[:, 0])
    oy = np.minimum(a[:, 3], b[:, 3]) - np.maximum(a[:, 1], b[:, 1])
    return i, j, np.hypot(dx, dy), ox, oy


def _overlaps_other(R):
    """Per rectangle: does it overlap (positive area) any other?"""
    n = len(R)
    out = np.zeros(n, dtype=bool)
    i, j, _gap, ox, oy = _near_pairs(R, 0.0)
    ov = (ox > _TOL) & (oy > _TOL)
    out[i[ov]] = True
    out[j[ov]] = True
    return out


def _merge_close(R, c):
    """Merge rectangles closer than c (or overlapping) into their bounding rectangles."""
    n = len(R)
    if n < 2:
        return R, False
    i, j, gap, _ox, _oy = _near_pairs(R, c)
    close = gap < c - _TOL
    rows, cols = i[close], j[close]
    if rows.size == 0:
        return R, False
    g = coo_matrix((np.ones(rows.size), (rows, cols)), shape=(n, n))
    ncomp, lab = connected_components(g, directed=False)
    out = np.empty((ncomp, 4))
    out[:, 0] = ndimage.minimum(R[:, 0], lab, np.arange(ncomp))
    out[:, 1] = ndimage.minimum(R[:, 1], lab, np.arange(ncomp))
    out[:, 2] = ndimage.maximum(R[:, 2], lab, np.arange(ncomp))
    out[:, 3] = ndimage.maximum(R[:, 3], lab, np.arange(ncomp))
    return out, True


def _grow_to(R, need):
    """Grow each rectangle symmetrically about its centre to at least need × need."""
    w = R[:, 2] - R[:, 0]
    h = R[:, 3] - R[:, 1]
    ex = np.maximum(0.0, need - w) / 2.0
    ey = np.maximum(0.0, need - h) / 2.0
    out = R.copy()
    out[:, 0] -= ex
    out[:, 2] += ex
    out[:, 1] -= ey
    out[:, 3] += ey
    return out


def _window(rect, x0, y0, pitch, shape, pad=0.0):
    """Index slices of the cells whose centres lie in rect grown by pad (clipped to the grid)."""
    xa, ya, xb, yb = rect
    j0 = max(0, int(math.ceil((xa - pad - x0) / pitch - 1e-9)))
    j1 = min(shape[1], int(math.floor((xb + pad - x0) / pitch + 1e-9)) + 1)
    i0 = max(0, int(math.ceil((ya - pad - y0) / pitch - 1e-9)))
    i1 = min(shape[0], int(math.floor((yb + pad - y0) / pitch + 1e-9)) + 1)
    return slice(i0, max(i0, i1)), slice(j0, max(j0, j1))


def _inside_rounded(px, py, rect, radius, tol=_TOL):
    """Points inside (or on) the rounded rectangle."""
    xa, ya, xb, yb = rect
    cx, cy = (xa + xb) / 2.0, (ya + yb) / 2.0
    hx, hy = (xb - xa) / 2.0 - radius, (yb - ya) / 2.0 - radius
    dx = np.maximum(0.0, np.abs(px - cx) - hx)
    dy = np.maximum(0.0, np.abs(py - cy) - hy)
    return (np.abs(px - cx) <= hx + radius + tol) & (np.abs(py - cy) <= hy + radius + tol) \
        & (dx * dx + dy * dy <= (radius + tol) ** 2)


def _cell_centres(sl, x0, y0, pitch):
    ys = y0 + pitch * np.arange(sl[0].start, sl[0].stop, dtype=np.float64)
    xs = x0 + pitch * np.arange(sl[1].start, sl[1].stop, dtype=np.float64)
    return xs[None, :], ys[:, None]


def _rects_of(patches):
    """(R (n, 4), radius (n,), thickness (n,), ids list) from a patch table."""
    df = patches
    R = np.column_stack([df["x_min_mm"].to_numpy(float), df["y_min_mm"].to_numpy(float),
                         df["x_max_mm"].to_numpy(float), df["y_max_mm"].to_numpy(float)]) \
        if len(df) else np.zeros((0, 4))
    rad = df["corner_radius_mm"].to_numpy(float) if "corner_radius_mm" in df and len(df) else np.zeros(len(df))
    rad = np.nan_to_num(rad, nan=0.0)
    rad = np.minimum(rad, np.minimum(R[:, 2] - R[:, 0], R[:, 3] - R[:, 1]) / 2.0) if len(df) else rad
    thk = df["thickness_mm"].to_numpy(float) if "thickness_mm" in df and len(df) else np.full(len(df), np.nan)
    ids = [str(p) for p in df["patch"]] if "patch" in df else [f"P{k + 1:03d}" for k in range(len(df))]
    return R, rad, thk, ids


def _critical_of(critical_mask, zone_labels, zone_names):
    if critical_mask is not None:
        return np.asarray(critical_mask, dtype=bool)
    if zone_labels is not None and zone_names is not None and "critical" in list(zone_names):
        return np.asarray(zone_labels) == list(zone_names).index("critical")
    return None


def _touches(mask, rect, x0, y0, pitch):
    """Any True cell of mask whose square meets the open rectangle."""
    if mask is None:
        return False
    sl = _window(rect, x0, y0, pitch, mask.shape, pad=pitch / 2.0 - _TOL)
    return bool(mask[sl].any())


# ---------------------------------------------------------------------------
# rule checks (shared by the planner and the checker)
# ---------------------------------------------------------------------------
def _not_beyond(needs, rect, radius, margin, x0, y0, pitch):
    """Marked cells closer than margin to the outline (inside or outside)."""
    sl = _window(rect, x0, y0, pitch, needs.shape, pad=margin + pitch)
    sub = needs[sl]
    if not sub.any():
        return False
    X, Y = _cell_centres(sl, x0, y0, pitch)
    ii, jj = np.nonzero(sub)
    px = X[0, jj]
    py = Y[ii, 0]
    xa, ya, xb, yb = rect
    cx, cy = (xa + xb) / 2.0, (ya + yb) / 2.0
    hw, hh = (xb - xa) / 2.0, (yb - ya) / 2.0
    h = pitch / 2.0
    # inside the outline inset by margin: core inset by max(R, m), radius max(R - m, 0)
    ci = max(radius, margin)
    r_in = max(radius - margin, 0.0)
    hx_in, hy_in = hw - ci, hh - ci
    inside = np.ones(px.size, dtype=bool)
    if hx_in < -_TOL or hy_in < -_TOL:
        inside[:] = False
    else:
        for sx in (-h, h):
            for sy in (-h, h):
                dx = np.maximum(0.0, np.abs(px + sx - cx) - hx_in)
                dy = np.maximum(0.0, np.abs(py + sy - cy) - hy_in)
                inside &= dx * dx + dy * dy <= (r_in + _TOL) ** 2
    # distance from the cell square to the core of the outline
    hx, hy = hw - radius, hh - radius
    gx = np.maximum(0.0, np.abs(px - cx) - h - hx)
    gy = np.maximum(0.0, np.abs(py - cy) - h - hy)
    near = np.hypot(gx, gy) < radius + margin - _TOL
    return bool(np.any(~inside & near))


def _pair_flags(R, c):
    """Per patch: too close to another patch (parallel edges within c); overlapping another.

    Candidate pairs come from :func:`_near_pairs` (k-d tree): the distance between two
    parallel edges is never below the gap between the rectangles, so pairs farther apart
    than c can be neither too close nor overlapping.
    """
    n = len(R)
    close = np.zeros(n, dtype=bool)
    ov_any = np.zeros(n, dtype=bool)
    if n < 2:
        return close, ov_any
    i, j, gap, ox, oy = _near_pairs(R, c)
    keep = gap < c - _TOL
    ov = (ox > _TOL) & (oy > _TOL)
    ov_any[i[ov]] = True
    ov_any[j[ov]] = True
    i, j = i[keep], j[keep]
    if i.size == 0:
        return close, ov_any
    a, b = R[i], R[j]
    zero = np.zeros(i.size)
    dmin = np.full(i.size, np.inf)
    # vertical edges: x positions, gap between the y spans
    gap_y = np.maximum.reduce([zero, b[:, 1] - a[:, 3], a[:, 1] - b[:, 3]])
    for ea in (0, 2):
        for eb in (0, 2):
            dmin = np.minimum(dmin, np.hypot(a[:, ea] - b[:, eb], gap_y))
    # horizontal edges: y positions, gap between the x spans
    gap_x = np.maximum.reduce([zero, b[:, 0] - a[:, 2], a[:, 0] - b[:, 2]])
    for ea in (1, 3):
        for eb in (1, 3):
            dmin = np.minimum(dmin, np.hypot(a[:, ea] - b[:, eb], gap_x))
    hit = dmin < c - _TOL
    close[i[hit]] = True
    close[j[hit]] = True
    return close, ov_any


def _rule_flags(R, rad, thk, *, rules, segs, use, critical, needs, x0, y0, pitch, check_min_size=True):
    """List of flag lists, one per patch."""
    c = rules.v("patch_weld_clearance_mm")
    m = rules.v("patch_extend_beyond_mm")
    min_small = rules.v("patch_min_size_mm")
    min_over = rules.v("patch_min_size_overlap_mm")
    tmax_crit = rules.v("patch_critical_max_thickness_mm")
    xish = np.abs(segs[:, 2] - segs[:, 0]) >= np.abs(segs[:, 3] - segs[:, 1]) if len(segs) else np.zeros(0, bool)
    close, ov_patch = _pair_flags(R, c)
    boxes = _seg_boxes(segs) if len(segs) else None
    segs_use, xish_use = segs[use], xish[use]  # the seams that count for the clearance rule
    out = []
    for k in range(len(R)):
        rect = tuple(R[k])
        f = []
        size = min(rect[2] - rect[0], rect[3] - rect[1])
        over = ov_patch[k] or _seams_through(segs, rect, boxes)
        if check_min_size and size < min_small - _TOL:
            f.append(FLAG_TOO_SMALL)
        if check_min_size and over and size < min_over - _TOL:
            f.append(FLAG_OVERLAP_SIZE)
        if close[k]:
            f.append(FLAG_TOO_CLOSE)
        if _clearance_violation(segs_use, xish_use, rect, c)[0]:
            f.append(FLAG_WELD_CLEARANCE)
        if critical is not None and _touches(critical, rect, x0, y0, pitch):
            f.append(FLAG_CRITICAL)
            if np.isfinite(thk[k]) and thk[k] > tmax_crit + _TOL:
                f.append(FLAG_CRITICAL_THICKNESS)
        if needs is not None and _not_beyond(needs, rect, rad[k], m, x0, y0, pitch):
            f.append(FLAG_NOT_BEYOND)
        out.append(f)
    return out


# ---------------------------------------------------------------------------
# planning
# ---------------------------------------------------------------------------
def _zone_of(needs, rect, zone_labels, zone_names, x0, y0, pitch):
    if zone_labels is None:
        return ""
    sl = _window(rect, x0, y0, pitch, needs.shape)
    lab = np.asarray(zone_labels)[sl][needs[sl]]
    lab = lab[lab >= 0]
    if lab.size == 0:
        lab = np.asarray(zone_labels)[sl].ravel()
        lab = lab[lab >= 0]
        if lab.size == 0:
            return ""
    k = int(np.argmax(np.bincount(lab.astype(np.int64))))
    if zone_names is None:
        return str(k)
    return str(list(zone_names)[k])


def _patch_table(R, rad, thk, flags, zones, ncov, density):
    w = R[:, 2] - R[:, 0]
    h = R[:, 3] - R[:, 1]
    area = rounded_rect_area_mm2(w, h, rad) / 1e6
    df = pd.DataFrame({
        "patch": [f"P{k + 1:03d}" for k in range(len(R))],
        "zone": zones,
        "x_min_mm": R[:, 0], "y_min_mm": R[:, 1], "x_max_mm": R[:, 2], "y_max_mm": R[:, 3],
        "corner_radius_mm": rad, "thickness_mm": thk, "area_m2": area,
        "mass_kg": patch_mass_kg(area, thk, density_kg_m3=density),
        "flags": [";".join(f) for f in flags],
        "n_cells_covered": np.asarray(ncov, dtype=np.int64),
    }, columns=PATCH_COLUMNS)
    return df


def plan_patches(needs, *, x0, y0, pitch, rules, seams=None, plate=None, critical_mask=None,
                 zone_labels=None, zone_names=None, patch_thickness_mm=None,
                 allow_small=True, fix_clearance=True, max_iter=100, plate_seams=None) -> pd.DataFrame:
    """Group cells needing repair into patch plates that obey the patch rules.

    Parameters
    ----------
    needs : bool array (rows, cols), True where a cell needs repair. [-]
    x0, y0 : floor coordinates of the centre of cell [0, 0]. [mm]
    pitch : cell size. [mm]
    rules : :class:`~scananalyse.rules.RuleSet`; uses ``patch_extend_beyond_mm``,
        ``patch_min_size_mm``, ``patch_min_size_overlap_mm``,
        ``patch_weld_clearance_mm``, ``patch_corner_radius_mm``,
        ``patch_thickness_mm``, ``patch_critical_max_thickness_mm``,
        ``steel_density_kg_m3``.
    seams : existing bottom welds as segments ``(x1, y1, x2, y2)``. [mm]
    plate : plate-id layer on the grid; its plate boundaries are seams too. [-]
    plate_seams : ``seams_from_plate(plate, ...)`` when the caller already has it. [mm]
    critical_mask : bool array of critical-zone cells; default the zone named
        ``critical`` in ``zone_labels``/``zone_names`` when given. [-]
    zone_labels : int array of zone labels on the grid (−1 none). [-]
    zone_names : zone names indexed by label. [-]
    patch_thickness_mm : thickness of the proposed plates; default the rule value. [mm]
    allow_small : allow patches down to ``patch_min_size_mm`` when they overlap no
        seam and no other patch (the rule as written); False = always the overlap
        minimum. [-]
    fix_clearance : grow a patch across a seam that runs too close along its edge;
        False = only flag it. [-]
    max_iter : cap on the grow/merge iterations. [-]

    Returns
    -------
    DataFrame with :data:`PATCH_COLUMNS`, one patch a row, sorted by (y_min, x_min).

    Notes
    -----
    Algorithm (rules from API 653 §9.10.1.1 and Fig. 9.13 as quoted in domain.md §6):

    1. Label the marked cells in 8-connected groups (:func:`skimage.measure.label`);
       each group's bounding box of cell edges grown by ``patch_extend_beyond_mm``
       (plus ``(R − m)(1 − 1/√2)`` if the corner radius R exceeds the margin m, so
       the rounded corners still clear every marked cell by m).
    2. Repeat until nothing changes: (a) merge patches that overlap or whose
       rectangles come closer than ``patch_weld_clearance_mm`` into their bounding
       rectangle; (b) grow each patch symmetrically to its minimum size:
       ``patch_min_size_overlap_mm`` if a seam passes through it or it overlaps
       another patch, else ``patch_min_size_mm``, and merge again; (c) where a seam
       runs alongside an edge closer than the clearance, grow that edge across the
       seam until it lies the clearance beyond it (the patch then overlaps the seam
       and takes the larger minimum at the next pass).
    3. Corner radius ``min(patch_corner_radius_mm, half the smaller side)``; zone =
       the zone holding most of the covered marked cells; flags from the same
       checks as :func:`check_patch_rules` (``weld-clearance`` left only if the
       iteration cap was hit or ``fix_clearance`` is False;
       ``critical-zone-special-repair`` for any patch touching the critical zone,
       where only special shapes such as a tombstone plate, or an insert plate,
       will do).
    4. Area of the rounded rectangle, mass = area × thickness × steel density.
    """
    nd = np.asarray(needs, dtype=bool)
    if nd.ndim != 2:
        raise InputError(f"repair: field 'needs': expected a 2-D mask, got shape {nd.shape}")
    x0, y0, pitch = float(x0), float(y0), float(pitch)
    m = rules.v("patch_extend_beyond_mm")
    c = rules.v("patch_weld_clearance_mm")
    min_small = rules.v("patch_min_size_mm") if allow_small else rules.v("patch_min_size_overlap_mm")
    min_over = rules.v("patch_min_size_overlap_mm")
    radius = rules.v("patch_corner_radius_mm")
    thk = float(rules.v("patch_thickness_mm") if patch_thickness_mm is None else patch_thickness_mm)
    if not math.isfinite(thk) or thk <= 0:
        raise InputError(f"repair: field 'patch_thickness_mm': must be > 0, got {patch_thickness_mm!r}")
    segs, use = _seam_set(seams, plate, x0, y0, pitch, c, plate_seams)
    xish = np.abs(segs[:, 2] - segs[:, 0]) >= np.abs(segs[:, 3] - segs[:, 1]) if len(segs) else np.zeros(0, bool)
    crit = _critical_of(critical_mask, zone_labels, zone_names)
    density = rules.v("steel_density_kg_m3")

    lab = _sk_label(nd, connectivity=2)
    objs = ndimage.find_objects(lab)
    if not objs:
        return _patch_table(np.zeros((0, 4)), np.zeros(0), np.zeros(0), [], [], [], density)
    bb = np.array([[o[1].start, o[0].start, o[1].stop - 1, o[0].stop - 1] for o in objs if o is not None],
                  dtype=np.float64)
    extra = (radius - m) * (1.0 - 1.0 / math.sqrt(2.0)) if radius > m else 0.0
    grow = m + extra + pitch / 2.0
    R = np.column_stack([x0 + bb[:, 0] * pitch - grow, y0 + bb[:, 1] * pitch - grow,
                         x0 + bb[:, 2] * pitch + grow, y0 + bb[:, 3] * pitch + grow])
    for _ in range(int(max_iter)):
        before = R.copy()
        changed = True
        while changed:
            R, changed = _merge_close(R, c)
        over = _overlaps_other(R)
        if len(segs):
            boxes = _seg_boxes(segs)
            over |= np.array([_seams_through(segs, tuple(r), boxes) for r in R], dtype=bool)
        R = _grow_to(R, np.where(over, min_over, min_small))
        changed = True
        while changed:
            R, changed = _merge_close(R, c)
        if fix_clearance and np.any(use):
            segs_use, xish_use = segs[use], xish[use]
            R = np.array([_clearance_violation(segs_use, xish_use, tuple(r), c)[1] for r in R],
                         dtype=np.float64)
        if R.shape == before.shape and np.allclose(R, before, rtol=0, atol=_TOL):
            break
    else:
        warnings.warn(f"patch planning did not settle in {max_iter} passes; remaining rule "
                      "violations are flagged", ScanWarning, stacklevel=2)
    order = np.lexsort((R[:, 0], R[:, 1]))
    R = R[order]
    rad = np.minimum(radius, np.minimum(R[:, 2] - R[:, 0], R[:, 3] - R[:, 1]) / 2.0)
    thks = np.full(len(R), thk)
    flags = _rule_flags(R, rad, thks, rules=rules, segs=segs, use=use, critical=crit, needs=nd,
                        x0=x0, y0=y0, pitch=pitch)
    zones = [_zone_of(nd, tuple(r), zone_labels, zone_names, x0, y0, pitch) for r in R]
    ncov = []
    for k in range(len(R)):
        sl = _window(tuple(R[k]), x0, y0, pitch, nd.shape)
        X, Y = _cell_centres(sl, x0, y0, pitch)
        ncov.append(int(np.count_nonzero(nd[sl] & _inside_rounded(X, Y, tuple(R[k]), rad[k]))))
    return _patch_table(R, rad, thks, flags, zones, ncov, density)


# ---------------------------------------------------------------------------
# coverage and the floor as repaired
# ---------------------------------------------------------------------------
def _validate_table(patches):
    if not isinstance(patches, pd.DataFrame):
        raise InputError("repair: field 'patches': expected a DataFrame with the patches.csv columns")
    miss = [c for c in _REQUIRED_CSV if c not in patches.columns]
    if miss:
        raise InputError(f"repair: field '{miss[0]}': missing from the patch table")


def _coverage(shape, patches, x0, y0, pitch, thickness_default=np.nan):
    """(covered mask, thinnest patch thickness per cell (NaN off patches))."""
    _validate_table(patches)
    R, rad, thk, _ids = _rects_of(patches)
    thk = np.where(np.isfinite(thk), thk, thickness_default)
    cov = np.zeros(shape, dtype=bool)
    tp = np.full(shape, np.nan, dtype=np.float32)
    for k in range(len(R)):
        sl = _window(tuple(R[k]), x0, y0, pitch, shape)
        X, Y = _cell_centres(sl, x0, y0, pitch)
        ins = _inside_rounded(X, Y, tuple(R[k]), rad[k])
        cov[sl] |= ins
        cur = tp[sl]
        tp[sl] = np.where(ins, np.fmin(cur, np.float32(thk[k])), cur)
    return cov, tp


def covered_cells(patches, *, shape, x0, y0, pitch) -> np.ndarray:
    """Cells whose centre lies inside any patch outline (rounded rectangle).

    Parameters
    ----------
    patches : DataFrame with at least ``x_min_mm, y_min_mm, x_max_mm, y_max_mm``
        (and ``corner_radius_mm``, 0 if absent). [mm]
    shape : grid shape (rows, cols). [-]
    x0, y0 : floor coordinates of the centre of cell [0, 0]. [mm]
    pitch : cell size. [mm]

    Returns
    -------
    bool array on the grid.
    """
    return _coverage(tuple(shape), patches, float(x0), float(y0), float(pitch))[0]


def apply_patches(thickness, rate_top, rate_under, patches, *, x0, y0, pitch,
                  patch_thickness_mm=None, rules=None, under_cause_removed=False):
    """The floor as repaired with the given patch plates.

    Parameters
    ----------
    thickness : remaining thickness, NaN where not scanned. [mm]
    rate_top : governing top-side rate map. [mm/y]
    rate_under : governing underside rate map. [mm/y]
    patches : patch table (:data:`PATCH_COLUMNS`; at least the rectangle columns). [mm]
    x0, y0 : floor coordinates of the centre of cell [0, 0]. [mm]
    pitch : cell size. [mm]
    patch_thickness_mm : thickness for patches whose ``thickness_mm`` is missing;
        default ``rules.patch_thickness_mm``. [mm]
    rules : rule set, for that default. [-]
    under_cause_removed : the user says the cause of the underside corrosion was
        removed (drainage, cathodic protection): the underside rate under the
        patches becomes 0. [-]

    Returns
    -------
    (thickness_rep, rate_top_rep, rate_under_rep, covered) : float32 maps and the
    bool mask of patched cells.  A rate map the patches leave unchanged (the top-side
    rate always, the underside rate unless ``under_cause_removed``) is returned as the
    given array itself when that is already float32, not a copy: no full-grid copy is
    made for a map that does not change (the results file then links the two names).

    Notes
    -----
    Conservative model of a lap-welded patch (see docs/repair.md):

    * a patched, scanned cell takes the patch thickness (the thinnest where
      patches overlap); the old plate left under it is ignored;
    * the top-side rate is kept: the product side goes on corroding the new top
      surface as it did the old one;
    * the measured underside rate is kept unless ``under_cause_removed`` and applied
      to the patch thickness, as if the patch lay on the soil.  Physically the soil
      side must first eat through the old plate before it reaches the patch, so the
      projected life (t_patch − MRT)/(r_top + r_under) is never longer than the
      two-layer life;
    * unscanned cells stay NaN: a patch does not tell what is under it.
    """
    t = np.asarray(thickness, dtype=np.float32)
    rt = np.asarray(rate_top, dtype=np.float32)
    ru = np.asarray(rate_under, dtype=np.float32)
    if rt.shape != t.shape or ru.shape != t.shape:
        raise InputError("repair: field 'rate_top': rate maps must have the thickness grid's shape")
    default = patch_thickness_mm
    if default is None and rules is not None:
        default = rules.v("patch_thickness_mm")
    default = np.nan if default is None else float(default)
    cov, tp = _coverage(t.shape, patches, float(x0), float(y0), float(pitch), default)
    if np.any(cov & np.isnan(tp)):
        raise InputError("repair: field 'thickness_mm': a patch has no thickness and no default was given")
    scanned = np.isfinite(t)
    t_rep = np.where(cov & scanned, tp, t).astype(np.float32)
    ru_rep = ru
    if under_cause_removed:
        ru_rep = np.where(cov & scanned & ~np.isnan(ru), np.float32(0), ru).astype(np.float32)
    return t_rep, rt, ru_rep, cov


def uncovered_cells(needs, patches, *, x0, y0, pitch):
    """Cells needing repair that no patch covers.

    Parameters
    ----------
    needs : bool mask of cells needing repair. [-]
    patches : patch table. [mm]
    x0, y0 : floor coordinates of the centre of cell [0, 0]. [mm]
    pitch : cell size. [mm]

    Returns
    -------
    (count, mask) : number of such cells and their bool mask.
    """
    nd = np.asarray(needs, dtype=bool)
    cov = covered_cells(patches, shape=nd.shape, x0=x0, y0=y0, pitch=pitch)
    out = nd & ~cov
    return int(np.count_nonzero(out)), out


def shell_distance_mm(R, rad, *, centre, radius_mm) -> np.ndarray:
    """Least distance from each patch outline (its fillet weld) to the inside of the shell.

    Parameters
    ----------
    R : (n, 4) rectangles ``x_min, y_min, x_max, y_max``. [mm]
    rad : (n,) corner radii. [mm]
    centre : (x, y) of the shell circle. [mm]
    radius_mm : inside radius of the shell. [mm]

    Returns
    -------
    (n,) ndarray : radius − the farthest point of the rounded outline from the centre [mm];
    negative when the patch reaches beyond the shell.

    Notes
    -----
    A rounded rectangle is its core rectangle (inset by the radius) grown by a disc of
    that radius, so its farthest point from the centre is the farthest core corner plus
    the radius: the distance is exact, not the sharp rectangle's.
    """
    R = np.asarray(R, dtype=float).reshape(-1, 4)
    r = np.asarray(rad, dtype=float).reshape(-1)
    cx, cy = float(centre[0]), float(centre[1])
    dx = np.maximum(np.abs(R[:, 0] + r - cx), np.abs(R[:, 2] - r - cx))
    dy = np.maximum(np.abs(R[:, 1] + r - cy), np.abs(R[:, 3] - r - cy))
    return float(radius_mm) - (np.hypot(dx, dy) + r)


def _shell_geometry(geometry):
    """(centre, radius) of the shell from a FloorGeometry-like object, or None."""
    if geometry is None:
        return None
    radius = float(geometry.radius_mm)
    centre = tuple(float(v) for v in geometry.centre)
    if not (math.isfinite(radius) and radius > 0 and all(math.isfinite(v) for v in centre)):
        raise InputError(f"patch check: field 'geometry': shell radius {radius!r} and centre {centre!r} "
                         "must be finite, the radius positive")
    return centre, radius


def check_patch_rules(patches, *, x0, y0, pitch, rules, plate=None, seams=None, critical_mask=None,
                      needs=None, zone_labels=None, zone_names=None, plate_seams=None,
                      geometry=None) -> pd.DataFrame:
    """Check every patch of a (user's) patch set against the patch rules.

    Parameters
    ----------
    patches : patch table (at least the rectangle columns). [mm]
    x0, y0 : floor coordinates of the centre of cell [0, 0]. [mm]
    pitch : cell size. [mm]
    rules : rule set (the ``patch_*`` values). [-]
    plate : plate-id layer; its boundaries are seams. [-]
    seams : seam segments ``(x1, y1, x2, y2)``. [mm]
    plate_seams : ``seams_from_plate(plate, ...)`` when the caller already has it. [mm]
    critical_mask : critical-zone cells (default: zone ``critical`` of the zone layer). [-]
    needs : cells needing repair, for ``not-beyond-corrosion``. [-]
    zone_labels, zone_names : zone layer, for the critical-zone default. [-]
    geometry : the floor's :class:`~scananalyse.zones.FloorGeometry` (``ZoneMap.geometry``):
        its centre and inside radius are the shell circle for ``shell-clearance``; None
        (the default, as before) leaves that rule unchecked, and the result's
        ``attrs["shell_clearance_checked"]`` is False. [-]

    Returns
    -------
    DataFrame with columns ``patch``, ``flags`` (``;``-separated violations),
    ``ok`` (no violation) and ``shell_distance_mm`` (least distance from the outline
    to the inside of the shell, :func:`shell_distance_mm`; NaN without ``geometry``).

    Flags: ``too-small`` (smaller side below
    ``patch_min_size_mm``), ``overlaps-without-min-size`` (overlaps a seam or
    another patch but below ``patch_min_size_overlap_mm``), ``too-close`` (a
    parallel edge of another patch within ``patch_weld_clearance_mm``),
    ``weld-clearance`` (a seam alongside an edge within the clearance),
    ``critical-zone-special-repair`` (touches the critical zone; plus
    ``critical-zone-thickness`` when thicker than
    ``patch_critical_max_thickness_mm``), ``not-beyond-corrosion`` (a cell
    needing repair closer than ``patch_extend_beyond_mm`` to the outline),
    ``shell-clearance`` (the outline closer than ``shell_lap_joint_clearance_mm`` to
    the inside of the shell: a patch's fillet weld is a lap joint in the bottom, API 650
    §5.5.2).
    """
    _validate_table(patches)
    shell = _shell_geometry(geometry)
    x0, y0, pitch = float(x0), float(y0), float(pitch)
    R, rad, thk, ids = _rects_of(patches)
    segs, use = _seam_set(seams, plate, x0, y0, pitch, rules.v("patch_weld_clearance_mm"), plate_seams)
    crit = _critical_of(critical_mask, zone_labels, zone_names)
    nd = None if needs is None else np.asarray(needs, dtype=bool)
    flags = _rule_flags(R, rad, thk, rules=rules, segs=segs, use=use, critical=crit, needs=nd,
                        x0=x0, y0=y0, pitch=pitch)
    dist = np.full(len(R), np.nan)
    if shell is not None and len(R):
        dist = shell_distance_mm(R, rad, centre=shell[0], radius_mm=shell[1])
        near = dist < rules.v("shell_lap_joint_clearance_mm") - _TOL
        for k in np.flatnonzero(near):
            flags[k].append(FLAG_SHELL_CLEARANCE)
    out = pd.DataFrame({"patch": ids, "flags": [";".join(f) for f in flags],
                        "ok": [not f for f in flags], "shell_distance_mm": dist},
                       columns=["patch", "flags", "ok", "shell_distance_mm"])
    out.attrs["shell_clearance_checked"] = shell is not None
    return out


# ---------------------------------------------------------------------------
# plan + repaired maps in one call
# ---------------------------------------------------------------------------
@dataclass
class RepairPlan:
    """A repair proposal and the floor as repaired.

    Attributes
    ----------
    needs : cells needing repair. [-]
    patches : patch table (:data:`PATCH_COLUMNS`).
    thickness, rate_top, rate_under : maps as repaired (see :func:`apply_patches`). [mm], [mm/y]
    covered : cells under a patch. [-]
    n_uncovered : cells needing repair that no patch covers (0 for a proposal). [-]
    target_years : target interval, if planned for one. [y]
    repair_to_mm : repair-to thickness, if planned the code's way. [mm]
    """

    needs: np.ndarray
    patches: pd.DataFrame
    thickness: np.ndarray
    rate_top: np.ndarray
    rate_under: np.ndarray
    covered: np.ndarray
    n_uncovered: int
    target_years: float | None = None
    repair_to_mm: float | None = None

    @property
    def area_m2(self) -> float:
        """Total patch area. [m²]"""
        return float(self.patches["area_m2"].sum()) if len(self.patches) else 0.0

    @property
    def mass_kg(self) -> float:
        """Total patch steel mass. [kg]"""
        return float(self.patches["mass_kg"].sum()) if len(self.patches) else 0.0


def _plan(thickness, rate_top, rate_under, needs, *, x0, y0, pitch, rules, under_cause_removed,
          target_years, repair_to_mm, **kw):
    patches = plan_patches(needs, x0=x0, y0=y0, pitch=pitch, rules=rules, **kw)
    t_rep, rt_rep, ru_rep, cov = apply_patches(
        thickness, rate_top, rate_under, patches, x0=x0, y0=y0, pitch=pitch, rules=rules,
        under_cause_removed=under_cause_removed)
    n_unc = int(np.count_nonzero(needs & ~cov))
    return RepairPlan(needs, patches, t_rep, rt_rep, ru_rep, cov, n_unc, target_years, repair_to_mm)


def plan_repairs(thickness, rate_top, rate_under, *, mrt_mm, target_years, x0, y0, pitch, rules,
                 under_cause_removed=False, **plan_kw) -> RepairPlan:
    """Patches for a target interval and the floor as repaired.

    Parameters
    ----------
    thickness, rate_top, rate_under : maps on the grid. [mm], [mm/y]
    mrt_mm : MRT, scalar or per cell. [mm]
    target_years : target interval. [y]
    x0, y0, pitch : grid geometry. [mm]
    rules : rule set. [-]
    under_cause_removed : see :func:`apply_patches`. [-]
    **plan_kw : further keywords of :func:`plan_patches` (seams, plate,
        critical_mask, zone_labels, zone_names, patch_thickness_mm, …).

    Returns
    -------
    :class:`RepairPlan`
    """
    needs = cells_needing_repair(thickness, rate_top, rate_under, mrt_mm=mrt_mm, target_years=target_years)
    return _plan(thickness, rate_top, rate_under, needs, x0=x0, y0=y0, pitch=pitch, rules=rules,
                 under_cause_removed=under_cause_removed, target_years=float(target_years),
                 repair_to_mm=None, **plan_kw)


def repair_to_plan(thickness, rate_top, rate_under, *, repair_to_mm, x0, y0, pitch, rules,
                   under_cause_removed=False, **plan_kw) -> RepairPlan:
    """The code's way: patch every cell thinner than a repair-to thickness.

    The repaired maps go back into the assessment, which then gives the interval the
    repair buys under each method (code formula, co-located, extreme value).

    Parameters
    ----------
    thickness, rate_top, rate_under : maps on the grid. [mm], [mm/y]
    repair_to_mm : repair-to thickness, e.g. from ``assess.repair_to_thickness``. [mm]
    x0, y0, pitch : grid geometry. [mm]
    rules : rule set. [-]
    under_cause_removed : see :func:`apply_patches`. [-]
    **plan_kw : further keywords of :func:`plan_patches`.

    Returns
    -------
    :class:`RepairPlan`
    """
    needs = cells_needing_repair(thickness, rate_top, rate_under, mrt_mm=0.0, target_years=0.0,
                                 repair_to_mm=repair_to_mm)
    return _plan(thickness, rate_top, rate_under, needs, x0=x0, y0=y0, pitch=pitch, rules=rules,
                 under_cause_removed=under_cause_removed, target_years=None,
                 repair_to_mm=float(repair_to_mm), **plan_kw)


# ---------------------------------------------------------------------------
# files
# ---------------------------------------------------------------------------
def _atomic_write(path, write):
    path = os.fspath(path)
    d = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(prefix=".tmp-", suffix=os.path.splitext(path)[1], dir=d)
    os.close(fd)
    try:
        write(tmp)
        publish_file(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def write_patches_csv(patches, path, *, inch_columns: bool = False) -> None:
    """Write a patch table as ``patches.csv`` (:data:`PATCH_COLUMNS`, mm, m², kg).

    Parameters
    ----------
    patches : patch table. [-]
    path : output file. [-]
    inch_columns : inch columns beside the SI ones (``--csv-units in``). [-]
    """
    from .io.tables import write_csv

    _validate_table(patches)
    order = PATCH_COLUMNS + LOCATION_COLUMNS  # the contract's columns first, in their order
    cols = [c for c in order if c in patches.columns]
    # text cells (patch ids, zones, flags) neutralised against spreadsheet formulas
    write_csv(patches[cols], path, float_format="%.6g", inch_columns=inch_columns)


def _num_field(text, path, line, name, *, positive=False, nonneg=False, allow_blank=False, **bounds):
    # the side files' shared number parsing (io/tables.py): finite, bounded, short
    from .io.tables import parse_field_number

    return parse_field_number(text, path, line, name, positive=positive, nonneg=nonneg,
                              allow_blank=allow_blank, **bounds)


def _read_patches_csv(path):
    from .io.tables import check_patch_thickness, csv_fields, read_text_lines, shown

    rows = []
    lines = list(enumerate(read_text_lines(path, what="patch file"), start=1))
    body = [(n, ln) for n, ln in lines if ln.strip() and not ln.lstrip().startswith("#")]
    if not body:
        raise InputError(f"{where(path, 1)}: no header row")
    hline, header = body[0]
    cols = [c.strip() for c in csv_fields(header, path, hline)]
    for c in cols:
        if c not in PATCH_COLUMNS and c not in LOCATION_COLUMNS:
            raise InputError(f"{where(path, hline, shown(c, quote=False))}: unknown column "
                             f"(expected {', '.join(PATCH_COLUMNS)})")
    if len(set(cols)) != len(cols):
        dup = next(c for c in cols if cols.count(c) > 1)
        raise InputError(f"{where(path, hline, dup)}: duplicate column")
    for c in _REQUIRED_CSV:
        if c not in cols:
            raise InputError(f"{where(path, hline, c)}: required column missing")
    seen = set()
    for n, ln in body[1:]:
        vals = csv_fields(ln, path, n)
        if len(vals) != len(cols):
            raise InputError(f"{where(path, n)}: expected {len(cols)} fields, got {len(vals)}")
        r = dict(zip(cols, vals))
        pid = r["patch"].strip()
        if not pid:
            raise InputError(f"{where(path, n, 'patch')}: empty patch id")
        if len(pid) > 200:
            raise InputError(f"{where(path, n, 'patch')}: patch id of {len(pid)} characters (at most 200)")
        if pid in seen:
            raise InputError(f"{where(path, n, 'patch')}: duplicate patch id {pid!r}")
        seen.add(pid)
        xa = _num_field(r["x_min_mm"], path, n, "x_min_mm")
        ya = _num_field(r["y_min_mm"], path, n, "y_min_mm")
        xb = _num_field(r["x_max_mm"], path, n, "x_max_mm")
        yb = _num_field(r["y_max_mm"], path, n, "y_max_mm")
        if xb <= xa:
            raise InputError(f"{where(path, n, 'x_max_mm')}: must exceed x_min_mm ({xb:g} <= {xa:g})")
        if yb <= ya:
            raise InputError(f"{where(path, n, 'y_max_mm')}: must exceed y_min_mm ({yb:g} <= {ya:g})")
        rad = _num_field(r.get("corner_radius_mm", ""), path, n, "corner_radius_mm", nonneg=True,
                         allow_blank=True)
        rad = 0.0 if math.isnan(rad) else rad
        if rad > min(xb - xa, yb - ya) / 2.0 + _TOL:
            raise InputError(f"{where(path, n, 'corner_radius_mm')}: exceeds half the smaller side "
                             f"({rad:g} > {min(xb - xa, yb - ya) / 2.0:g})")
        thk = _num_field(r.get("thickness_mm", ""), path, n, "thickness_mm", positive=True, allow_blank=True)
        check_patch_thickness(thk, path, n)
        for opt in ("area_m2", "mass_kg", "n_cells_covered"):
            if opt in r:
                _num_field(r[opt], path, n, opt, nonneg=True, allow_blank=True, limit=None)
        rows.append({"patch": pid, "zone": r.get("zone", "").strip()[:200], "x_min_mm": xa, "y_min_mm": ya,
                     "x_max_mm": xb, "y_max_mm": yb, "corner_radius_mm": rad, "thickness_mm": thk,
                     "flags": r.get("flags", "").strip()[:1000], "note": ""})
    return rows


def _bulge_outline(vb):
    """Bounding box and area of a closed outline of straight and circular pieces, exactly.

    ``vb`` is the (n, 3) array of vertices ``x, y, bulge``; the piece from vertex k to the
    next is an arc of ``4·atan(bulge)`` radians (positive counter-clockwise), or straight
    for bulge 0.  Computed from the arcs' centres and radii, never by flattening, so an
    absurd bulge costs nothing (its extent is then refused by the caller).

    Returns
    -------
    (rect, area, radius) : ``(x_min, y_min, x_max, y_max)``, the enclosed area, and the
    radius of the first arc (0 when there is none). [drawing units]
    """
    n = len(vb)
    xs, ys = list(vb[:, 0]), list(vb[:, 1])
    twice = 0.0  # twice the signed area of the straight polygon (shoelace)
    arcs = 0.0   # signed areas of the circular segments
    first_r = 0.0
    for k in range(n):
        x1, y1, b = vb[k]
        x2, y2 = vb[(k + 1) % n, :2]
        twice += x1 * y2 - x2 * y1
        if b == 0 or not math.isfinite(b):
            if not math.isfinite(b):
                return None
            continue
        c = math.hypot(x2 - x1, y2 - y1)
        if c == 0:
            continue
        theta = 4.0 * math.atan(b)  # signed sweep
        r = c / (2.0 * abs(math.sin(theta / 2.0)))
        if not math.isfinite(r):
            return None
        if first_r == 0.0:
            first_r = r
        # centre: chord midpoint + offset along the left normal (DXF bulge convention)
        mx, my = (x1 + x2) / 2.0, (y1 + y2) / 2.0
        off = (c / 2.0) * (1.0 - b * b) / (2.0 * b)
        nx, ny = -(y2 - y1) / c, (x2 - x1) / c
        cx, cy = mx + off * nx, my + off * ny
        arcs += 0.5 * r * r * (theta - math.sin(theta))
        a1 = math.atan2(y1 - cy, x1 - cx)
        for phi, (px, py) in ((0.0, (cx + r, cy)), (math.pi / 2, (cx, cy + r)), (math.pi, (cx - r, cy)),
                              (1.5 * math.pi, (cx, cy - r))):
            swept = (phi - a1) % (2 * math.pi) if theta > 0 else (a1 - phi) % (2 * math.pi)
            if swept <= abs(theta):
                xs.append(px)
                ys.append(py)
    area = abs(0.5 * twice + arcs)
    return (min(xs), min(ys), max(xs), max(ys)), area, first_r


def _dxf_outline_rect(e, kind):
    """(rect, radius, exact) of one closed outline; exact = it is a rounded rectangle;
    None when a coordinate or a bulge is not finite."""
    if kind == "CIRCLE":
        cx, cy = e.dxf.center.x, e.dxf.center.y
        r = float(e.dxf.radius)
        if not (math.isfinite(cx) and math.isfinite(cy) and math.isfinite(r) and r > 0):
            return None
        return (cx - r, cy - r, cx + r, cy + r), r, True
    if kind == "LWPOLYLINE":
        vb = np.array([(x, y, b) for x, y, b in e.get_points("xyb")], dtype=np.float64)
    else:
        vb = np.array([(v.dxf.location.x, v.dxf.location.y, v.dxf.bulge) for v in e.vertices],
                      dtype=np.float64)
    if vb.ndim != 2 or len(vb) < 2 or not np.isfinite(vb).all():
        return None
    got = _bulge_outline(vb)
    if got is None:
        return None
    rect, area, radius = got
    w, h = rect[2] - rect[0], rect[3] - rect[1]
    if not (math.isfinite(w) and math.isfinite(h)):
        return None
    radius = min(radius, min(w, h) / 2.0)
    expected = float(rounded_rect_area_mm2(w, h, radius))
    exact = abs(area - expected) <= 1e-4 * max(expected, 1.0) + 1e-3 * (w + h)
    if not exact:
        radius = 0.0
    return rect, radius, exact


class _TextGrid:
    """The drawing's texts in square buckets, so that each outline looks only at the texts
    in the buckets its rectangle overlaps (near-linear in the number of outlines and texts
    instead of their product)."""

    def __init__(self, texts, cell):
        self.cell = cell
        self.buckets: dict = {}
        for k, (x, y, txt) in enumerate(texts):
            self.buckets.setdefault((math.floor(x / cell), math.floor(y / cell)), []).append(k)
        self.texts = texts

    def inside(self, rect):
        c = self.cell
        i0, i1 = math.floor(rect[0] / c), math.floor(rect[2] / c)
        j0, j1 = math.floor(rect[1] / c), math.floor(rect[3] / c)
        if (i1 - i0 + 1) * (j1 - j0 + 1) > len(self.buckets):  # a big outline: look at every bucket
            keys = [k for k in self.buckets if i0 <= k[0] <= i1 and j0 <= k[1] <= j1]
        else:
            keys = [(i, j) for i in range(i0, i1 + 1) for j in range(j0, j1 + 1)]
        for key in keys:
            for k in self.buckets.get(key, ()):
                x, y, txt = self.texts[k]
                if rect[0] <= x <= rect[2] and rect[1] <= y <= rect[3]:
                    yield k, x, y, txt


def _read_patches_dxf(path):
    import ezdxf

    from .io.tables import MAX_LENGTH_MM, MAX_SIDE_FILE_BYTES, check_patch_thickness

    if os.path.getsize(path) > MAX_SIDE_FILE_BYTES:
        raise InputError(f"{where(path)}: larger than {MAX_SIDE_FILE_BYTES >> 20} MiB; not a patch drawing")
    try:
        doc = ezdxf.readfile(path)
    except (OSError, ezdxf.DXFError, UnicodeDecodeError, ValueError, TypeError, KeyError, IndexError,
            AttributeError, RecursionError) as exc:
        raise InputError(f"{where(path)}: not a readable DXF file ({type(exc).__name__})") from None
    try:
        code = int(doc.header.get("$INSUNITS", 0) or 0)
    except (TypeError, ValueError):
        raise InputError(f"{where(path, field='$INSUNITS')}: not a unit code") from None
    if code == 0:
        scale = 1.0  # unitless drawings are taken as mm
    elif code in _DXF_UNITS_MM:
        scale = _DXF_UNITS_MM[code]
    else:
        from ezdxf import units as _units
        try:
            scale = float(_units.conversion_factor(code, 4))
        except Exception:
            raise InputError(f"{where(path, field='$INSUNITS')}: unsupported drawing unit code {code}") from None
    from .report.dxf import LAYERS

    # the furniture of our own repair drawing (shell, seams, plate numbers, ...) is no patch
    furniture = set(LAYERS) - {_DXF_LAYER, _DXF_TEXT_LAYER}
    outlines, texts, skipped = [], [], {}
    for e in doc.modelspace():
        kind = e.dxftype()
        if str(e.dxf.get("layer", "0")).upper() in furniture:
            continue
        if kind in ("LWPOLYLINE", "POLYLINE"):
            closed = e.closed if kind == "LWPOLYLINE" else e.is_closed
            if kind == "POLYLINE" and (e.is_3d_polyline or e.is_poly_face_mesh or e.is_polygon_mesh):
                skipped[kind + " (3D/mesh)"] = skipped.get(kind + " (3D/mesh)", 0) + 1
                continue
            if not closed:
                skipped["open " + kind] = skipped.get("open " + kind, 0) + 1
                continue
            outlines.append((e, kind))
        elif kind == "CIRCLE":
            outlines.append((e, kind))
        elif kind in ("TEXT", "MTEXT"):
            pt = e.get_placement()[1] if kind == "TEXT" else e.dxf.insert
            txt = (e.dxf.text if kind == "TEXT" else e.plain_text()).strip()[:200]
            px, py = float(pt[0]) * scale, float(pt[1]) * scale
            if txt and math.isfinite(px) and math.isfinite(py):
                texts.append((px, py, txt))
        else:
            skipped[kind] = skipped.get(kind, 0) + 1
    if skipped:
        what = ", ".join(f"{n} {k}" for k, n in sorted(skipped.items()))
        warnings.warn(f"{where(path)}: ignored entities that are not closed outlines: {what}",
                      ScanWarning, stacklevel=3)
    shapes = []
    for k, (e, kind) in enumerate(outlines):
        field = f"{kind} handle {e.dxf.handle}"
        got = _dxf_outline_rect(e, kind)
        if got is None:
            raise InputError(f"{where(path, field=field)}: a coordinate, radius or bulge is not a finite number")
        rect, radius, exact = got
        rect = tuple(v * scale for v in rect)
        radius *= scale
        if not all(math.isfinite(v) and abs(v) <= MAX_LENGTH_MM for v in rect):
            raise InputError(f"{where(path, field=field)}: outline reaches beyond {MAX_LENGTH_MM:g} mm from "
                             "the origin (a huge bulge, a typing error or wrong units?)")
        if rect[2] - rect[0] <= 0 or rect[3] - rect[1] <= 0:
            raise InputError(f"{where(path, field=field)}: outline has no area")
        shapes.append((e, kind, rect, radius, exact, field))
    # each outline is named by the nearest text inside it that no earlier outline took
    sizes = [max(r[2] - r[0], r[3] - r[1]) for _, _, r, _, _, _ in shapes]
    grid = _TextGrid(texts, max(float(np.median(sizes)) if sizes else 1.0, 1e-3))
    rows, seen = [], set()
    approx = 0
    for k, (e, kind, rect, radius, exact, field) in enumerate(shapes):
        cx, cy = (rect[0] + rect[2]) / 2.0, (rect[1] + rect[3]) / 2.0
        pid = ""
        best = (math.inf, -1)
        for j, px, py, txt in grid.inside(rect):
            d = (math.hypot(px - cx, py - cy), j)  # ties: the earlier text, as in the drawing
            if d < best and txt not in seen:
                pid, best = txt, d
        if not pid:
            pid = f"D{k + 1:03d}"
            while pid in seen:
                pid += "x"
        seen.add(pid)
        thk, zone = math.nan, ""
        if e.has_xdata(_DXF_APPID):
            tags = list(e.get_xdata(_DXF_APPID))
            for a, b in zip(tags, tags[1:]):
                if a.code == 1000 and a.value == "thickness_mm" and b.code == 1040:
                    # stored in mm whatever the drawing's unit (write_patches_dxf): not scaled
                    try:
                        thk = float(b.value)
                    except (TypeError, ValueError):
                        thk = math.inf
                    if not math.isfinite(thk):
                        raise InputError(f"{where(path, field=field)}: thickness_mm is not a finite number")
                    check_patch_thickness(thk, path, None, f"{field} thickness_mm")
                if a.code == 1000 and a.value == "zone" and b.code == 1000:
                    zone = str(b.value)[:200]
        note = "" if exact else f"bounding rectangle of a {kind} outline"
        approx += 0 if exact else 1
        rows.append({"patch": pid, "zone": zone, "x_min_mm": rect[0], "y_min_mm": rect[1],
                     "x_max_mm": rect[2], "y_max_mm": rect[3], "corner_radius_mm": radius,
                     "thickness_mm": thk, "flags": "", "note": note})
    if approx:
        warnings.warn(f"{where(path)}: {approx} outline(s) are not rounded rectangles and were "
                      "replaced by their bounding rectangles (see column 'note')",
                      ScanWarning, stacklevel=3)
    return rows


def read_patches(path, *, rules=None) -> pd.DataFrame:
    """Read an engineer's patch set: ``patches.csv`` columns or a DXF of closed outlines.

    Parameters
    ----------
    path : ``.csv`` (the :data:`PATCH_COLUMNS`; ``patch`` and the four rectangle
        columns required, blanks allowed in ``corner_radius_mm`` (0) and
        ``thickness_mm`` (the default applies later); ``area_m2`` and ``mass_kg``
        are recomputed) or ``.dxf`` (closed LWPOLYLINE / POLYLINE and CIRCLE
        entities, each replaced by its bounding rectangle; a rounded rectangle or a
        circle is kept exactly with its corner radius; a TEXT inside an outline
        names the patch; drawing units from ``$INSUNITS``, unitless = mm). [-]
    rules : rule set whose ``steel_density_kg_m3`` gives the recomputed masses;
        default the ``api653`` rule set. [-]

    Returns
    -------
    DataFrame with :data:`PATCH_COLUMNS` plus ``note``; ``n_cells_covered`` is 0
    until re-assessed.

    Raises
    ------
    InputError
        one line naming the file and the line (CSV) or entity (DXF).
    """
    if rules is None:
        from .rules import get_ruleset
        rules = get_ruleset()
    density_kg_m3 = rules.v("steel_density_kg_m3")
    from .io.validate import check_regular_file

    p = os.fspath(path)
    ext = os.path.splitext(p)[1].lower()
    if ext not in (".csv", ".dxf"):
        raise InputError(f"{where(p)}: patch files must be .csv or .dxf")
    check_regular_file(p, "patch file")
    rows = _read_patches_csv(p) if ext == ".csv" else _read_patches_dxf(p)
    if not rows:  # nothing to re-assess with: refuse rather than report an unrepaired floor
        raise InputError(f"{where(p)}: no usable patch in the file ("
                         + ("no data rows" if ext == ".csv" else "no closed outline") + ")")
    df = pd.DataFrame(rows, columns=["patch", "zone", "x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm",
                                     "corner_radius_mm", "thickness_mm", "flags", "note"])
    for c in ("x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm", "corner_radius_mm", "thickness_mm"):
        df[c] = df[c].astype(float)
    w = df["x_max_mm"] - df["x_min_mm"]
    h = df["y_max_mm"] - df["y_min_mm"]
    df["area_m2"] = rounded_rect_area_mm2(w.to_numpy(), h.to_numpy(), df["corner_radius_mm"].to_numpy()) / 1e6
    df["mass_kg"] = patch_mass_kg(df["area_m2"].to_numpy(), df["thickness_mm"].to_numpy(),
                                  density_kg_m3=density_kg_m3)
    df["n_cells_covered"] = 0
    return df[PATCH_COLUMNS + ["note"]]


def _outline_points(rect, radius):
    """LWPOLYLINE vertices (x, y, bulge), counter-clockwise, of a rounded rectangle."""
    xa, ya, xb, yb = rect
    r = float(radius)
    if r <= 0:
        return [(xa, ya, 0.0), (xb, ya, 0.0), (xb, yb, 0.0), (xa, yb, 0.0)]
    bq = math.tan(math.pi / 8.0)      # bulge of a 90° arc, counter-clockwise
    pts = [(xa + r, ya, 0.0), (xb - r, ya, bq), (xb, ya + r, 0.0), (xb, yb - r, bq),
           (xb - r, yb, 0.0), (xa + r, yb, bq), (xa, yb - r, 0.0), (xa, ya + r, bq)]
    out = []
    n = len(pts)
    for k, p in enumerate(pts):   # drop zero-length straight pieces (a side of exactly 2R)
        q = pts[(k + 1) % n]
        if p[2] == 0.0 and abs(p[0] - q[0]) < 1e-9 and abs(p[1] - q[1]) < 1e-9:
            continue
        out.append(p)
    return out


def repair_and_reassess(new, lr, side, zmap, rules, options, mrt, job, *, have_old, own_patches=None,
                        plate_seams=None, ext_rate=None, ext_depth=None, hidden=None, older=None) -> dict:
    """Patch planning for the target interval (or the engineer's own patches), the rule
    checks, then the floor re-assessed as repaired.

    Parameters
    ----------
    new : FloorScan
        The newer scan.
    lr : :class:`~scananalyse.rates.LossRates`
        Its rates.
    side : (M, N) int8 ndarray
        Resolved side per cell. [-]
    zmap : :class:`~scananalyse.zones.ZoneMap`
    rules : rule set (:func:`~scananalyse.rules.get_ruleset`).
    options : :class:`~scananalyse.assess.AssessOptions`
    mrt : (M, N) ndarray
        Minimum remaining thickness per cell. [mm]
    job : :class:`~scananalyse.job.Job`
        ``target_interval`` [y], ``repair_to_mm`` [mm], ``patch_thickness_mm`` [mm],
        ``under_cause_removed``, ``block_mm`` [mm], ``seed``.
    have_old : bool
        Short-term rates are available (two inspections). [-]
    own_patches : DataFrame, optional
        The engineer's patches (:func:`read_patches`) instead of planned ones.
    plate_seams : optional
        :func:`seams_from_plate` of the newer scan's plate layer, derived here if None.
    ext_rate : dict, optional
        The as-found rate statistics (:func:`~scananalyse.extremes.rate_statistics`),
        reused when the repaired floor keeps the rate maps as they are.
    ext_depth : dict, optional
        The as-found depth statistics (:func:`~scananalyse.extremes.depth_statistics`): the
        fits behind the hidden part, reported with the repaired table as they are; refitted
        on the repaired map only if None.
    hidden : dict, optional
        The hidden part of each zone **as found** (:func:`~scananalyse.evlife.hidden_parts`);
        computed here from the as-found maps if None.  Repairs never change it.
    older : (t_old_on_new, dt_years), optional
        The older scan on the newer grid and the years between the scans
        (:func:`~scananalyse.evlife.seen_lives`).

    Returns
    -------
    dict
        ``needs_repair``, ``patches``, ``patch_note``, ``patch_checks``, ``uncovered_cells``,
        ``zones_repaired`` (the per-zone table after repair) and ``repaired_maps``.

    Notes
    -----
    Patched cells read the patch thickness (no loss so far, so the side attribution no
    longer matters there) and keep their measured rates (the underside one unless its
    cause is removed).  The repaired floor is assessed as the floor as found is
    (:func:`~scananalyse.assess.assess_zones`), with one difference only where the patches
    are: the seen part of each zone is the repaired map's, while the part nobody scanned
    keeps the as-found statistics and rates (``hidden``): patching scanned metal says
    nothing about metal nobody saw (:mod:`scananalyse.evlife`).
    """
    from . import assess
    from .evlife import add_eva_columns, hidden_parts, merge_extremes, seen_lives, zone_lives
    from .extremes import depth_statistics, rate_statistics

    critical = zmap.labels == zmap.index("critical") if "critical" in zmap.names else None
    needs = cells_needing_repair(new.thickness, lr.rate_top, lr.rate_under, mrt_mm=mrt,
                                 target_years=job.target_interval, repair_to_mm=job.repair_to_mm)
    if plate_seams is None and new.plate is not None:
        plate_seams = seams_from_plate(new.plate, x0=new.x0, y0=new.y0, pitch=new.pitch)
    if own_patches is not None:
        patches = own_patches
    else:
        patches = plan_patches(needs, x0=new.x0, y0=new.y0, pitch=new.pitch, rules=rules, plate=new.plate,
                               critical_mask=critical, zone_labels=zmap.labels, zone_names=zmap.names,
                               patch_thickness_mm=job.patch_thickness_mm, plate_seams=plate_seams)
    checks = check_patch_rules(patches, x0=new.x0, y0=new.y0, pitch=new.pitch, rules=rules,
                               plate=new.plate, critical_mask=critical, needs=needs,
                               zone_labels=zmap.labels, zone_names=zmap.names, plate_seams=plate_seams,
                               geometry=zmap.geometry)
    if own_patches is None:
        patches = _with_shell_clearance(patches, checks)
    n_uncovered, _ = uncovered_cells(needs, patches, x0=new.x0, y0=new.y0, pitch=new.pitch)
    t_rep, rt_rep, ru_rep, covered = apply_patches(new.thickness, lr.rate_top, lr.rate_under, patches,
                                                   x0=new.x0, y0=new.y0, pitch=new.pitch,
                                                   patch_thickness_mm=job.patch_thickness_mm, rules=rules,
                                                   under_cause_removed=job.under_cause_removed)
    cens_rep = lr.censored & ~covered
    fit_kw = dict(pitch=new.pitch, block_mm=job.block_mm, seed=job.seed)
    ext_d_rep = ext_depth if ext_depth is not None else depth_statistics(
        t_rep, zmap, nominal=new.meta.nominal, censored=cens_rep, threshold=new.meta.threshold, **fit_kw)
    if ext_rate is not None and rt_rep is lr.rate_top and ru_rep is lr.rate_under:
        ext_r_rep = ext_rate  # the patches keep the measured rates: the same statistics
    else:
        ext_r_rep = rate_statistics(rt_rep, ru_rep, zmap, **fit_kw)
    if hidden is None:
        hidden = hidden_parts(new.thickness, lr.rate_top, lr.rate_under, mrt, zmap, nominal=new.meta.nominal,
                              censored=lr.censored, threshold=new.meta.threshold, older=older, **fit_kw)
    seen_rep = seen_lives(t_rep, rt_rep, ru_rep, mrt, zmap, nominal=new.meta.nominal, censored=cens_rep,
                          older=older)
    ext_l_rep = zone_lives(seen_rep, hidden)
    del cens_rep
    life_rep = assess.local_life_map(t_rep, rt_rep, ru_rep, mrt)
    zones_rep = assess.assess_zones(thickness=t_rep, side=side, rate_top=rt_rep,
                                    rate_under=ru_rep, zones=zmap, meta=new.meta, rules=rules, options=options,
                                    extremes=merge_extremes(ext_d_rep, ext_r_rep, ext_l_rep, hidden), pitch_mm=new.pitch,
                                    rate_short_available=have_old)
    zones_rep = add_eva_columns(zones_rep, ext_d_rep, ext_l_rep)
    patches, patch_note = _own_patch_verdict(patches, checks, own_patches is not None)
    life_text = _patch_life_note(np.where(covered, life_rep, np.nan), covered, job.target_interval)
    if life_text:
        patch_note = f"{patch_note} {life_text}" if patch_note else life_text
    return {"needs_repair": needs, "patches": patches, "patch_note": patch_note, "patch_checks": checks,
            "uncovered_cells": int(n_uncovered), "zones_repaired": zones_rep,
            "repaired_maps": {"thickness_repaired": t_rep, "rate_top_repaired": rt_rep, "life_local_repaired": life_rep,
                              "rate_under_repaired": ru_rep, "patched": covered}}


def _with_shell_clearance(patches, checks):
    """Planned patches keep their planner's flags, plus ``shell-clearance`` where the check
    found the weld too near the shell (the planner does not know the shell circle)."""
    if not len(patches) or "shell_distance_mm" not in checks:
        return patches
    near = dict(zip(checks["patch"], checks["flags"].str.split(";").apply(lambda f: FLAG_SHELL_CLEARANCE in f)))
    out = patches.copy()
    old = out["flags"].fillna("").astype(str) if "flags" in out else pd.Series("", index=out.index)
    out["flags"] = [";".join([f for f in (o, FLAG_SHELL_CLEARANCE if near.get(p) else "") if f])
                    for o, p in zip(old, out["patch"])]
    return out


def _own_patch_verdict(patches, checks, own: bool):
    """The engineer's patches carry the checker's verdict, not whatever the file said; and
    a note when some break a rule."""
    if not own or not len(patches):
        return patches, None
    patches = patches.drop(columns=["flags"], errors="ignore").merge(checks[["patch", "flags"]], on="patch",
                                                                     how="left")
    bad = checks[~checks["ok"].astype(bool)]
    if not len(bad):
        return patches, None
    return patches, (f"{len(bad)} of the {len(patches)} given patch plates break a patch rule "
                     f"({', '.join(bad['patch'].astype(str).head(5))}{' …' if len(bad) > 5 else ''}); "
                     "see the flags column of patches.csv.")


def _patch_life_note(life_on_patches, covered, target_interval):
    """A sentence when the patch plates themselves do not last the target interval."""
    if not (covered.any() and np.isfinite(life_on_patches).any()):
        return None
    life_p = float(np.nanmin(life_on_patches))
    if life_p >= target_interval:
        return None
    return (f"The patch plates themselves last {life_p:.1f} years at the measured rates (the underside "
            "rate is kept under a patch unless its cause is removed), short of the target of "
            f"{target_interval:g} years: consider thicker plates, effective cathodic protection "
            "or removing the cause (--under-cause-removed), or replacing plate.")


from .report.dxf import write_patches_dxf  # noqa: E402,F401  (moved to report/dxf.py; re-exported)
