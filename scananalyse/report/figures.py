"""Figures of the report, drawn with matplotlib's object API (no pyplot state).

Every function takes ``ax=None`` and returns the :class:`matplotlib.figure.Figure`
it drew on; with ``ax=None`` a new figure is created with
:class:`matplotlib.figure.Figure` (never registered with pyplot, so nothing leaks
and nothing needs closing).  Inputs are plain arrays and tables in internal units
(mm, mm/y, years); the ``units`` argument only changes what is shown.

Floor maps show floor coordinates in metres (feet, or inches on small floors, with
``units="in"``: :func:`~scananalyse.report.units.length_axis_unit`), the shell circle, a scale bar and a
datum arrow, with continuous perceptually uniform colour maps from matplotlib's
viridis family (viridis, magma, plasma, cividis) and a light grey for cells that
were not scanned.  Big grids are block-reduced to at most ``max_pixels`` pixels
*conservatively*: the thinnest cell of a block for thickness and remaining life,
the deepest for loss and the fastest for rates, so no bad spot disappears from
the picture (:func:`decimate`).
"""

from __future__ import annotations

import io
import math
import os
import tempfile

import numpy as np
from matplotlib.figure import Figure
from matplotlib.colors import ListedColormap, BoundaryNorm
from matplotlib.ticker import FuncFormatter, MultipleLocator
from matplotlib.lines import Line2D
from matplotlib.collections import PatchCollection
from matplotlib.patches import Circle, FancyBboxPatch, Patch, Polygon, Rectangle
import matplotlib as mpl
from matplotlib import patheffects

from ..outputs import publish_file
from . import units as U

__all__ = [
    "NOT_SCANNED_COLOUR",
    "CMAPS",
    "decimate",
    "reduce_feature_masks",
    "decimation_caption",
    "floor_map",
    "floor_map_pair",
    "indication_status_map",
    "repair_record_map",
    "STATUS_STYLE",
    "registration_overlay",
    "probability_plot",
    "return_level_plot",
    "method_comparison",
    "save_png",
    "png_bytes",
]

#: Colour of cells that were not scanned (neutral light grey).
NOT_SCANNED_COLOUR = "#d4d4d4"

#: Colour map per map kind: continuous, perceptually uniform (matplotlib's viridis family).
#: Low thickness / short life are dark; deep loss / fast rate are dark.
CMAPS = {
    "thickness": "viridis",
    "loss": "magma_r",
    "rate": "plasma_r",
    "life": "cividis",
    # change between the inspections: diverging, centred at 0 (red = metal lost,
    # blue = thicker now), still continuous
    "growth": "RdBu_r",
}

#: Block reduction per kind: the conservative choice for display.
_REDUCE = {"thickness": "min", "loss": "max", "rate": "max", "life": "min", "side": "max", "growth": "max"}

#: Map kind -> quantity for unit conversion.
_QUANTITY = {"thickness": "thickness", "loss": "depth", "rate": "rate", "life": "years", "growth": "depth"}

# side codes (scan.py): 0 unknown, 1 top, 2 under
_SIDE_COLOURS = ["#f2efe6", "#d9822b", "#2f6f9f"]
_SIDE_NAMES = ["unknown", "top (product side)", "under (soil side)"]

_FIGSIZE_MAP = (7.2, 7.0)
_SEAM_COLOUR = "#3b3b3b"


def _new_axes(ax, figsize):
    if ax is None:
        fig = Figure(figsize=figsize, layout="constrained")
        ax = fig.add_subplot()
    else:
        fig = ax.get_figure()
    return fig, ax


# ---------------------------------------------------------------------------
# decimation
# ---------------------------------------------------------------------------
def _factor(shape, max_pixels: int) -> int:
    """Smallest block side f that brings a grid of ``shape`` under ``max_pixels`` blocks."""
    n = shape[0] * shape[1]
    f = 1
    if n > max_pixels:
        f = int(math.ceil(math.sqrt(n / max_pixels)))
        while math.ceil(shape[0] / f) * math.ceil(shape[1] / f) > max_pixels:
            f += 1
    return f


def _decimate_any(mask, f: int) -> np.ndarray:
    """Blocks of ``f × f`` cells of a boolean grid: True where any cell is (edge blocks partial)."""
    m = np.asarray(mask, dtype=bool)
    if f == 1:
        return m
    return _block_reduce(m, f, np.logical_or, dtype=bool)


def _block_reduce(a: np.ndarray, f: int, op, dtype=np.float32) -> np.ndarray:
    """``op`` (``np.fmin``, ``np.fmax`` or ``np.logical_or``) over the ``f × f`` blocks of
    ``a``, as ``dtype``:
    first over every f-th row (f − 1 whole-row passes), then over every f-th column of
    that (edge blocks partial).  Equal to ``op.reduceat`` along both axes, ten times faster
    (reduceat's inner loop runs once per block; these passes run once per row offset)."""
    rows = a[0::f].astype(dtype, copy=True)
    for k in range(1, f):
        part = a[k::f]
        op(rows[:part.shape[0]], part, out=rows[:part.shape[0]])
    out = np.array(rows[:, 0::f])
    for k in range(1, f):
        part = rows[:, k::f]
        op(out[:, :part.shape[1]], part, out=out[:, :part.shape[1]])
    return out


def decimate(values, *, how: str = "min", max_pixels: int = 1_500_000):
    """Block-reduce a grid to at most ``max_pixels`` cells, ignoring NaN.

    Blocks are ``f × f`` cells with the smallest integer ``f`` that brings the grid
    under ``max_pixels``; the last row/column of blocks may be partial.  A block
    with no finite cell is NaN.  Uses ``numpy.fmin/fmax`` over strided views (no
    per-cell loops, no full-size copy).

    Parameters
    ----------
    values : 2-D grid. [any]
    how : ``"min"`` or ``"max"``: which value of a block to keep.
    max_pixels : largest number of output cells.

    Returns
    -------
    (reduced, f) : the reduced grid (float32) and the block size. [same unit, cells]
    """
    a = np.asarray(values)
    if a.ndim != 2:
        raise ValueError(f"decimate needs a 2-D grid, got shape {a.shape}")
    if how not in ("min", "max"):
        raise ValueError(f"how must be 'min' or 'max', got {how!r}")
    f = _factor(a.shape, max_pixels)
    if f == 1:
        return a.astype(np.float32, copy=False), 1
    return _block_reduce(a, f, np.fmin if how == "min" else np.fmax), f


def decimation_caption(kind: str, factor: int) -> str:
    """Sentence for a figure caption saying how a map was reduced for display."""
    if factor <= 1:
        return "Shown at full resolution (one pixel per scan cell)."
    which = {"min": "thinnest", "max": "deepest"}[_REDUCE.get(kind, "min")]
    what = {
        "thickness": "the thinnest cell",
        "loss": "the deepest loss",
        "rate": "the fastest rate",
        "life": "the shortest remaining life",
        "growth": "the most metal lost between the inspections",
        "side": "the underside where any cell is underside",
    }.get(kind, f"the {which} cell")
    return (f"Reduced for display: each pixel covers {factor} × {factor} scan cells and shows "
            f"{what} among them (conservative); the tables use every cell.")


# ---------------------------------------------------------------------------
# map furniture: scale bar, datum arrow
# ---------------------------------------------------------------------------
def _nice_length(span_m: float) -> float:
    target = span_m / 5.0
    if not np.isfinite(target) or target <= 0:
        return 1.0
    exp = math.floor(math.log10(target))
    for m in (5, 2, 1):
        if m * 10 ** exp <= target:
            return m * 10 ** exp
    return 10 ** exp


def _tick_text(value: float) -> str:
    """A tick label: the display value without float noise, with a proper minus sign."""
    v = round(float(value), 6)
    return f"{v + 0.0:g}".replace("-", "−")


def _length_axes(ax, xlim, units, *, y_label=True):
    """Label a map's axes in floor coordinates of the display units (m, or ft / in), ticks
    at round display values; the data stay in metres.  Returns ``(unit label, metres per
    unit)`` for the scale bar."""
    name, per = U.length_axis_unit(xlim[1] - xlim[0], units)
    ax.set_xlabel(f"x [{name}]")
    ax.set_ylabel(f"y [{name}]" if y_label else "")
    if per != 1.0:
        step = _nice_length((xlim[1] - xlim[0]) / per) * per
        fmt = FuncFormatter(lambda v, _pos: _tick_text(v / per))
        for axis in (ax.xaxis, ax.yaxis):
            axis.set_major_locator(MultipleLocator(step))
            axis.set_major_formatter(fmt)
    return name, per


def _scale_bar(ax, xlim, ylim, unit=("m", 1.0)):
    """A scale bar of a round length in ``unit`` = ``(label, metres per unit)``."""
    name, per = unit
    span = xlim[1] - xlim[0]
    L = _nice_length(span / per) * per
    h = 0.012 * (ylim[1] - ylim[0])
    x0 = xlim[0] + 0.04 * span
    y0 = ylim[0] + 0.035 * (ylim[1] - ylim[0])
    # four alternating segments, our own design: dark/light with a dark frame
    for k in range(4):
        ax.add_patch(Rectangle((x0 + k * L / 4, y0), L / 4, h,
                               facecolor="#222222" if k % 2 == 0 else "white",
                               edgecolor="#222222", linewidth=0.6, zorder=6))
    label = f"{_tick_text(L / per)} {name}"
    ax.text(x0 + L / 2, y0 + 1.6 * h, label, ha="center", va="bottom", fontsize=7.5,
            zorder=6, bbox=dict(boxstyle="square,pad=0.15", facecolor="white",
                                edgecolor="none", alpha=0.75))


def _datum_arrow(ax):
    # a slim needle: left half filled, right half open, pointing to +y of the floor frame
    cx, cy, hgt, wid = 0.93, 0.86, 0.09, 0.025
    tip = (cx, cy + hgt / 2)
    base = cy - hgt / 2
    ax.add_patch(Polygon([tip, (cx - wid, base), (cx, base + hgt * 0.25)], closed=True,
                         transform=ax.transAxes, facecolor="#222222", edgecolor="#222222",
                         linewidth=0.6, zorder=7))
    ax.add_patch(Polygon([tip, (cx + wid, base), (cx, base + hgt * 0.25)], closed=True,
                         transform=ax.transAxes, facecolor="white", edgecolor="#222222",
                         linewidth=0.6, zorder=7))
    ax.text(cx, base - 0.012, "+y\ndatum", transform=ax.transAxes, ha="center", va="top",
            fontsize=7, zorder=7, linespacing=0.9)


def _find_col(df, names):
    for n in names:
        if n in df.columns:
            return n
    return None


# ---------------------------------------------------------------------------
# floor map
# ---------------------------------------------------------------------------
def floor_map(values, *, extent, title, label, units="mm", kind="thickness", diameter_mm=None,
              centre=(0.0, 0.0), plate=None, contours=None, patches=None, indications=None,
              zones=None, plate_numbers=True, max_pixels=400_000, vmin=None, vmax=None, ax=None,
              noise_band=None, colorbar=True, overlay=None):
    """Map of one quantity over the floor.

    Parameters
    ----------
    values : 2-D grid on the scan's grid, row 0 at the smallest y; NaN = not scanned.
        For ``kind="side"`` the side codes (0 unknown, 1 top, 2 under). [mm, mm/y or y, by kind]
    extent : (x_min, x_max, y_min, y_max) of the cell edges (``FloorScan.extent``). [mm]
    title : figure title (plain text).
    label : colour-bar label without the unit, e.g. ``"remaining thickness"``.
    units : display units, ``"mm"`` (mm, mm/y) or ``"in"`` (in for thickness, mils
        for loss, mpy for rates).
    kind : ``"thickness"``, ``"loss"``, ``"rate"``, ``"life"``, ``"growth"`` (change of
        thickness between two inspections, older minus newer: positive = metal lost; a
        diverging colour map centred at 0, symmetric range by default) or ``"side"``.
    diameter_mm : inside diameter of the shell, drawn as a circle. [mm]
    centre : tank centre in the floor frame. [mm]
    plate : optional plate-id layer on the same grid (−1 none); seams are drawn where
        the plate id changes.
    contours : list of ``(level, label, style)``; ``level`` in internal units [mm,
        mm/y, y]; ``style`` a matplotlib line style string (``"-"``, ``"--"``, …) or
        a dict of ``contour`` keyword arguments.
    patches : DataFrame with ``x_min_mm, y_min_mm, x_max_mm, y_max_mm`` and
        optionally ``corner_radius_mm``: patch outlines (rounded rectangles). [mm]
    indications : DataFrame with ``x_mm, y_mm`` (and optionally ``id`` and a depth
        column): the positions are ringed, the ten deepest labelled. [mm]
    zones : optional :class:`~scananalyse.zones.ZoneMap` (``labels`` on the same grid,
        ``names``, ``kinds``): each zone outlined and named; the critical zone's inner
        edge is drawn as the critical-zone ring.
    plate_numbers : write each plate's number (from ``plate``) at its middle.
    max_pixels : the grid is block-reduced (:func:`decimate`) to at most this many
        pixels: min for thickness and life, max for loss and rate.  The default keeps
        the image no wider than the floor is drawn at 130 dpi (about 640 px), so the
        renderer never drops a reduced pixel and the conservative reduction shows.
    vmin, vmax : colour range in internal units (default: data range; life is
        clipped to [0, 50] y).
    ax : axes to draw on (default: a new figure).
    noise_band : ``kind="growth"`` only: the growth threshold g [mm]; the band ±g (a
        change that is not growth, the noise rule) is marked on the colour bar and in the
        legend, and the default colour range is at least ±2g so the band shows.
    colorbar : draw the colour bar (off when several maps share one, e.g.
        :func:`floor_map_pair`).
    overlay : optional ``overlay(ax, handles)`` drawing more on the map (in metres of
        the floor frame) and appending its legend entries to ``handles``, before the
        legend is made (e.g. :func:`repair_record_map`).

    Returns
    -------
    Figure : with attribute ``scananalyse_caption`` (the decimation sentence) and
        ``scananalyse_factor`` (block size).
    """
    if kind not in _REDUCE:
        raise ValueError(f"kind must be one of {tuple(_REDUCE)}, got {kind!r}")
    U._check(units)
    own = ax is None
    if own:
        # laid out by _place_map (a layout computed from the floor's shape, not a layout
        # engine: a report draws a dozen of these and the engine's text measuring costs
        # about 0.2 s a map)
        fig = Figure(figsize=_FIGSIZE_MAP)
        ax = fig.add_subplot()
    else:
        fig = ax.get_figure()
    v, f = decimate(values, how=_REDUCE[kind], max_pixels=max_pixels)
    nr_full, nc_full = np.shape(values)
    p_sub = None if plate is None else np.asarray(plate)[::f, ::f]
    x_min, x_max, y_min, y_max = (float(e) / 1000.0 for e in extent)
    px = (x_max - x_min) / nc_full
    py = (y_max - y_min) / nr_full
    ext_m = (x_min, x_min + v.shape[1] * f * px, y_min, y_min + v.shape[0] * f * py)

    disp, handles, cax = _draw_values(fig, ax, v, kind=kind, units=units, label=label, vmin=vmin, vmax=vmax,
                                      ext_m=ext_m, own=own, band=noise_band, colorbar=colorbar)
    handles.append(Patch(facecolor=NOT_SCANNED_COLOUR, edgecolor="#888888", linewidth=0.5,
                         label="not scanned"))

    _draw_seams(ax, p_sub, handles, origin=(x_min, y_min), step=(f, px, py))
    if plate_numbers and p_sub is not None:
        _draw_plate_numbers(ax, p_sub, origin=(x_min, y_min), step=(f, px, py))
    if zones is not None:
        _draw_zones(ax, zones, handles, f=f, origin=(x_min, y_min), step=(px, py))
    if contours and disp is not None:
        _draw_contours(ax, disp, contours, handles, kind=kind, units=units, ext_m=ext_m, step=(f, px, py))
    _draw_patches(ax, patches, handles)
    _draw_indications(ax, indications, handles)
    if overlay is not None:
        overlay(ax, handles)
    xl, yl, legend, ncol = _frame_floor(ax, ext_m, handles, centre=centre, diameter_mm=diameter_mm, title=title,
                                        units=units)
    if own:
        _place_map(fig, ax, cax, legend, rows=-(-len(handles) // ncol), aspect=(yl[1] - yl[0]) / (xl[1] - xl[0]))
    fig.scananalyse_factor = f
    fig.scananalyse_caption = decimation_caption(kind, f)
    return fig




def _draw_values(fig, ax, v, *, kind, units, label, vmin, vmax, ext_m, own, band=None, colorbar=True):
    """The grid itself: side codes in their colours, or a quantity on its colour scale
    with a colour bar (growth: the noise band ``band`` [mm] marked on it); returns
    ``(displayed grid or None, legend handles, colour-bar axes)``."""
    cax = None
    if kind == "side":
        codes = np.where(np.isfinite(v), v, -1).astype(np.int16)
        data = np.ma.masked_less(codes, 0)
        cmap = ListedColormap(_SIDE_COLOURS).with_extremes(bad=NOT_SCANNED_COLOUR)
        norm = BoundaryNorm([-0.5, 0.5, 1.5, 2.5], 3)
        ax.imshow(data, origin="lower", extent=ext_m, cmap=cmap, norm=norm,
                  interpolation="nearest", zorder=1)
        handles = [Patch(facecolor=c, edgecolor="#555555", linewidth=0.5, label=n)
                   for c, n in zip(_SIDE_COLOURS, _SIDE_NAMES)]
        disp = None
    else:
        q = _QUANTITY[kind]
        disp = U.convert(v, q, units).astype(np.float32)
        lo = vmin if vmin is None else U.convert(vmin, q, units)
        hi = vmax if vmax is None else U.convert(vmax, q, units)
        finite = np.isfinite(disp)
        extend = "neither"
        if kind == "life":
            lo = 0.0 if lo is None else lo
            if hi is None:
                fin_max = float(np.max(disp[finite])) if finite.any() else 50.0
                hi = min(50.0, max(fin_max, 1.0))
            disp = np.where(np.isposinf(disp), hi, disp)
            neg = bool(np.any(disp[np.isfinite(disp)] < lo))
            pos = bool(np.any(disp[np.isfinite(disp)] > hi)) or bool(np.any(np.isposinf(v)))
            extend = {(False, False): "neither", (True, False): "min", (False, True): "max",
                      (True, True): "both"}[(neg, pos)]
        band_d = None
        if kind == "growth":
            # symmetric about 0, so white is "no change"; at least twice the noise band
            band_d = None if band is None or not np.isfinite(band) else abs(float(U.convert(band, q, units)))
            big = float(np.max(np.abs(disp[finite]))) if finite.any() else 1.0
            half = max(big, 2.0 * band_d if band_d else 0.0) or 1.0
            lo = -half if lo is None else lo
            hi = half if hi is None else hi
            over = bool(np.any(disp[finite] > hi)) if finite.any() else False
            under = bool(np.any(disp[finite] < lo)) if finite.any() else False
            extend = {(False, False): "neither", (True, False): "min", (False, True): "max",
                      (True, True): "both"}[(under, over)]
        if lo is None:
            lo = float(np.min(disp[finite])) if finite.any() else 0.0
        if hi is None:
            hi = float(np.max(disp[finite])) if finite.any() else 1.0
        if not hi > lo:
            hi = lo + (abs(lo) * 0.01 if lo else 1.0)
        cmap = mpl.colormaps[CMAPS[kind]].with_extremes(bad=NOT_SCANNED_COLOUR)
        im = ax.imshow(np.ma.masked_invalid(disp), origin="lower", extent=ext_m, cmap=cmap,
                       vmin=lo, vmax=hi, interpolation="nearest", zorder=1)
        handles = []
        if not colorbar:
            return disp, handles, cax
        if own:
            cax = fig.add_axes((0.9, 0.1, 0.03, 0.8))  # placed by _place_map
            cb = fig.colorbar(im, cax=cax, extend=extend)
        else:
            cb = fig.colorbar(im, ax=ax, shrink=0.82, pad=0.02, extend=extend)
        cb.set_label(f"{label} [{U.unit_label(q, units)}]")
        if band_d:
            handles.append(_mark_noise_band(cb, band_d, q, units))
    return disp, handles, cax


_BAND_EDGE = "#111111"


def _mark_noise_band(cb, band, quantity, units):
    """The noise band ±``band`` (display units) on a growth colour bar: hatched, framed,
    its limits ticked; returns its legend handle."""
    lo, hi = cb.mappable.get_clim()
    b0, b1 = max(-band, lo), min(band, hi)
    cb.ax.axhspan(b0, b1, facecolor="none", edgecolor=_BAND_EDGE, hatch="////", linewidth=1.0, zorder=3)
    for y in (b0, b1):
        cb.ax.axhline(y, color=_BAND_EDGE, lw=1.2, zorder=4)
    nd = U.decimals(quantity, units)
    # the band's limits as ticks; the usual ticks inside the band or next to its limits
    # dropped, so no two labels touch
    span = hi - lo
    ticks = [t for t in cb.get_ticks() if lo <= t <= hi and abs(t) > band and abs(abs(t) - band) > 0.07 * span]
    cb.set_ticks(sorted(ticks + [t for t in (-band, band) if lo <= t <= hi]))
    cb.ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:.{nd}f}".replace("-", "\u2212")
                                                  if abs(abs(v) - band) < 1e-9 else f"{v:g}".replace("-", "\u2212")))
    return Patch(facecolor="white", edgecolor=_BAND_EDGE, hatch="////", linewidth=0.8,
                 label=f"noise band ±{band:.{nd}f} {U.unit_label(quantity, units)} (not growth)")


def _draw_seams(ax, p_sub, handles, *, origin, step):
    """Plate seams, where the plate id changes between neighbouring (sub-sampled) cells
    (``origin`` the lower-left corner [m], ``step`` the sub-sampling factor and a cell's size [m])."""
    x_min, y_min = origin
    f, px, py = step
    if p_sub is not None:
        p = p_sub
        seam = np.zeros(p.shape, dtype=bool)
        dr = (p[1:, :] != p[:-1, :]) & (p[1:, :] >= 0) & (p[:-1, :] >= 0)
        dc = (p[:, 1:] != p[:, :-1]) & (p[:, 1:] >= 0) & (p[:, :-1] >= 0)
        seam[1:, :] |= dr
        seam[:, 1:] |= dc
        if seam.any():
            ext_p = (x_min, x_min + p.shape[1] * f * px, y_min, y_min + p.shape[0] * f * py)
            ax.imshow(np.ma.masked_where(~seam, seam.astype(np.float32)), origin="lower",
                      extent=ext_p, cmap=ListedColormap([_SEAM_COLOUR]), vmin=0, vmax=1,
                      interpolation="nearest", alpha=0.75, zorder=2)
            handles.append(Line2D([], [], color=_SEAM_COLOUR, lw=1.2, alpha=0.75,
                                  label="plate seam"))



def _inner_point(mask):
    """(row, col) of the cell of ``mask`` farthest from its edge (a label stays inside
    a ring-shaped zone, unlike its centroid)."""
    from scipy import ndimage

    d = ndimage.distance_transform_edt(np.pad(mask, 1))[1:-1, 1:-1]
    k = int(np.argmax(d))
    return divmod(k, mask.shape[1])


def _sub_for_labels(a, f, limit=250_000):
    """``a`` sub-sampled (every g-th cell) to at most ``limit`` cells, and the total step."""
    g = max(1, _factor(a.shape, limit))
    return a[::g, ::g], f * g


def _draw_plate_numbers(ax, p_sub, *, origin, step):
    """Each plate's number at the cell farthest from its seams."""
    from scipy import ndimage

    f, px, py = step
    p, g = _sub_for_labels(np.asarray(p_sub), 1)
    ids = np.unique(p[p >= 0])
    if ids.size == 0 or ids.size > 400:
        return
    lab = np.where(p >= 0, p, -1)
    for sl_, pid in zip(ndimage.find_objects(lab + 1), range(int(lab.max()) + 1)):
        if sl_ is None or pid not in ids:
            continue
        r, c = _inner_point(lab[sl_] == pid)
        r += sl_[0].start
        c += sl_[1].start
        ax.text(origin[0] + (c + 0.5) * g * f * px, origin[1] + (r + 0.5) * g * f * py, f"plate {pid}",
                fontsize=6, color="#3b3b3b", ha="center", va="center", zorder=4, alpha=0.9, style="italic",
                bbox=dict(boxstyle="round,pad=0.12", facecolor="white", edgecolor="none", alpha=0.55))


_ZONE_COLOUR = "#1a1a1a"
_CRITICAL_COLOUR = "#ff4fa3"


def _draw_zones(ax, zmap, handles, *, f, origin, step):
    """Zone boundaries (where the zone changes between neighbouring cells, the critical
    zone excepted) and names; the critical zone's inner edge drawn as a circle, the
    critical-zone ring, with its name on the ring."""
    px, py = step
    lab, g = _sub_for_labels(np.asarray(zmap.labels)[::f, ::f], f)
    kinds = list(getattr(zmap, "kinds", [""] * len(zmap.names)))
    crit = [k for k, kd in enumerate(kinds) if kd == "critical"]
    geo = getattr(zmap, "geometry", None)
    cx, cy = (geo.centre if geo is not None else (0.0, 0.0))
    cx, cy = cx / 1000.0, cy / 1000.0
    xx = origin[0] + (np.arange(lab.shape[1]) + 0.5) * g * px
    yy = origin[1] + (np.arange(lab.shape[0]) + 0.5) * g * py
    # boundaries between zones other than the critical ring
    ok = (lab >= 0) & ~np.isin(lab, crit)
    edge = np.zeros(lab.shape, dtype=bool)
    dr = (lab[1:, :] != lab[:-1, :]) & ok[1:, :] & ok[:-1, :]
    dc = (lab[:, 1:] != lab[:, :-1]) & ok[:, 1:] & ok[:, :-1]
    edge[1:, :] |= dr
    edge[:, 1:] |= dc
    if edge.any():
        ext = (origin[0], origin[0] + lab.shape[1] * g * px, origin[1], origin[1] + lab.shape[0] * g * py)
        ax.imshow(np.ma.masked_where(~edge, edge.astype(np.float32)), origin="lower", extent=ext,
                  cmap=ListedColormap([_ZONE_COLOUR]), vmin=0, vmax=1, interpolation="nearest", zorder=4)
        handles.append(Line2D([], [], color=_ZONE_COLOUR, lw=1.2, label="zone boundary"))
    ring_r = None
    for k in crit:
        m = lab == k
        if m.any():
            rr, cc = np.nonzero(m)
            r_in = float(np.min(np.hypot(xx[cc] - cx, yy[rr] - cy))) - 0.5 * g * max(px, py)
            r_out = float(np.max(np.hypot(xx[cc] - cx, yy[rr] - cy)))
            if r_in > 0:
                ring_r = r_in
                ax.add_patch(Circle((cx, cy), r_in, facecolor="none", edgecolor=_CRITICAL_COLOUR, lw=1.3,
                                    ls="--", zorder=5,
                                    path_effects=[patheffects.withStroke(linewidth=2.8, foreground="#111111")]))
                a = math.radians(135.0)
                rm = r_in - 0.04 * r_out  # just inside the ring, so the name stays legible
                ax.text(cx + rm * math.cos(a), cy + rm * math.sin(a), zmap.names[k], fontsize=7.5, ha="center",
                        va="center", rotation=45.0, zorder=6, color=_CRITICAL_COLOUR, fontweight="bold",
                        path_effects=[patheffects.withStroke(linewidth=2.2, foreground="#111111")])
    if ring_r is not None:
        handles.append(Line2D([], [], color=_CRITICAL_COLOUR, lw=1.3, ls="--", label="critical-zone ring",
                              path_effects=[patheffects.withStroke(linewidth=2.8, foreground="#111111")]))
    for k, name in enumerate(zmap.names):
        m = lab == k
        if k in crit or not m.any():
            continue
        r, c = _inner_point(m)
        ax.text(xx[c], yy[r], name, fontsize=7.5, ha="center", va="center", zorder=6, color=_ZONE_COLOUR,
                fontweight="bold", path_effects=[patheffects.withStroke(linewidth=2.2, foreground="white")])


def _draw_contours(ax, disp, contours, handles, *, kind, units, ext_m, step):
    """Contour lines (e.g. MRT, repair threshold) on the displayed grid, each with a legend entry
    (``step``: the display reduction factor and a cell's size [m])."""
    f, px, py = step
    q = _QUANTITY[kind]
    yy = ext_m[2] + (np.arange(disp.shape[0]) + 0.5) * f * py
    xx = ext_m[0] + (np.arange(disp.shape[1]) + 0.5) * f * px
    finite = np.isfinite(disp)
    dmin = float(np.min(disp[finite])) if finite.any() else np.nan
    dmax = float(np.max(disp[finite])) if finite.any() else np.nan
    # light lines with a dark halo: visible over the dark and the light end of every map
    defaults = ["#ffffff", "#34e0ff", "#ff9f1c"]
    halo = [patheffects.withStroke(linewidth=3.2, foreground="#111111")]
    for k, item in enumerate(contours):
        level, clabel, style = (tuple(item) + (None, None))[:3]
        lvl = U.convert(level, q, units)
        kw = {"colors": defaults[k % len(defaults)], "linewidths": 1.4}
        if isinstance(style, dict):
            kw.update(style)
        elif style:
            kw["linestyles"] = style
        ls = kw.get("linestyles", "solid")
        if np.isfinite(lvl) and dmin < lvl < dmax:
            cs = ax.contour(xx, yy, np.ma.masked_invalid(disp), levels=[lvl], zorder=4, **kw)
            cs.set_path_effects(halo)
        unit = U.unit_label(q, units)
        nd = U.decimals(q, units)
        col = kw["colors"] if isinstance(kw["colors"], str) else kw["colors"][0]
        handles.append(Line2D([], [], color=col, lw=kw["linewidths"], path_effects=halo,
                              linestyle=ls if isinstance(ls, str) else "solid",
                              label=f"{clabel or 'contour'} ({lvl:.{nd}f} {unit})"
                              + ("" if np.isfinite(lvl) and dmin < lvl < dmax
                                 else " – not reached")))



def _draw_patches(ax, patches, handles):
    """Patch plates as rounded rectangles (one collection)."""
    if patches is not None and len(patches):
        rcol = _find_col(patches, ["corner_radius_mm"])
        x0s = patches["x_min_mm"].to_numpy(float) / 1000.0
        y0s = patches["y_min_mm"].to_numpy(float) / 1000.0
        ws = patches["x_max_mm"].to_numpy(float) / 1000.0 - x0s
        hs = patches["y_max_mm"].to_numpy(float) / 1000.0 - y0s
        rs = (np.nan_to_num(patches[rcol].to_numpy(float), nan=0.0) / 1000.0 if rcol is not None
              else np.zeros(len(patches)))
        rs = np.clip(rs, 0.0, np.minimum(ws, hs) / 2)
        # one collection (adding hundreds of single patches is slow); the floor's limits
        # are set below, so the collection does not update them
        outlines = [FancyBboxPatch((x0, y0), w, h, boxstyle=f"round,pad=0,rounding_size={r}")
                    for x0, y0, w, h, r in zip(x0s, y0s, ws, hs, rs)]
        ax.add_collection(PatchCollection(outlines, facecolor="none", edgecolor="#00a36c",
                                          linewidth=1.4, zorder=5), autolim=False)
        idc = _find_col(patches, ["patch", "id"])
        if idc is not None and len(patches) <= 300:
            for pid, x1, y1 in zip(patches[idc], x0s + ws, y0s + hs):
                ax.annotate(str(pid), (x1, y1), xytext=(1, 1), textcoords="offset points", fontsize=6.5,
                            color="#00683f", zorder=6, fontweight="bold",
                            path_effects=[patheffects.withStroke(linewidth=2.0, foreground="white")])
        handles.append(Patch(facecolor="none", edgecolor="#00a36c", linewidth=1.4,
                             label="patch plate"))



def _draw_indications(ax, indications, handles):
    """Indications ringed, the ten deepest labelled."""
    if indications is not None and len(indications):
        xc = _find_col(indications, ["x_mm", "x_centroid_mm", "x"])
        yc = _find_col(indications, ["y_mm", "y_centroid_mm", "y"])
        if xc is not None and yc is not None:
            ax.scatter(indications[xc] / 1000.0, indications[yc] / 1000.0, s=22,
                       facecolors="none", edgecolors="#e41a1c", linewidths=0.8, zorder=5)
            dc_ = _find_col(indications, ["depth_max_mm", "depth_mm", "loss_max_mm"])
            idc = _find_col(indications, ["id", "indication"])
            top = indications.nlargest(10, dc_) if dc_ is not None else indications.head(10)
            if idc is not None:
                for _, row in top.iterrows():
                    ax.annotate(str(row[idc]), (row[xc] / 1000.0, row[yc] / 1000.0),
                                xytext=(3, 3), textcoords="offset points", fontsize=6.5,
                                color="#7a0000", zorder=6,
                                path_effects=[patheffects.withStroke(linewidth=2.0, foreground="white")])
            handles.append(Line2D([], [], marker="o", linestyle="none", markerfacecolor="none",
                                  markeredgecolor="#e41a1c", label="indication"))



def _frame_floor(ax, ext_m, handles, *, centre, diameter_mm, title, units="mm"):
    """The shell circle, limits, labels (floor coordinates in the display ``units``), scale
    bar, datum arrow and the legend under the map; returns ``(x limits, y limits, legend,
    legend columns)``."""
    cx, cy = centre[0] / 1000.0, centre[1] / 1000.0
    xl = [ext_m[0], ext_m[1]]
    yl = [ext_m[2], ext_m[3]]
    if diameter_mm:
        R = diameter_mm / 2000.0
        ax.add_patch(Circle((cx, cy), R, facecolor="none", edgecolor="#333333", linewidth=1.2,
                            zorder=5))
        handles.append(Line2D([], [], color="#333333", lw=1.2, label="shell (inside)"))
        xl = [min(xl[0], cx - R), max(xl[1], cx + R)]
        yl = [min(yl[0], cy - R), max(yl[1], cy + R)]
    mx = 0.06 * max(xl[1] - xl[0], yl[1] - yl[0])
    xl = (xl[0] - mx, xl[1] + mx)
    yl = (yl[0] - mx, yl[1] + mx)
    ax.set_xlim(*xl)
    ax.set_ylim(*yl)
    ax.set_aspect("equal")
    unit = _length_axes(ax, xl, units)
    ax.set_title(title, fontsize=11, loc="left")
    ax.tick_params(labelsize=8)
    _scale_bar(ax, xl, yl, unit)
    _datum_arrow(ax)
    # legend under the map, so nothing covers the floor
    ncol = min(4, len(handles))
    legend = ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, -0.09), fontsize=7.5,
                       ncol=ncol, frameon=False, handlelength=1.8, columnspacing=1.2)
    return xl, yl, legend, ncol


#: Fixed margins of a floor map on its own figure [in]: left (y tick labels and label),
#: top (title), bottom (x tick labels and label, above the legend), the colour bar's gap,
#: width and the room for its tick labels and label, and the height of a legend row.
_MAP_LEFT, _MAP_TOP, _MAP_BOTTOM = 0.62, 0.36, 0.52
_CBAR_GAP, _CBAR_WIDTH, _CBAR_ROOM, _MAP_RIGHT = 0.14, 0.17, 0.78, 0.22
_LEGEND_ROW, _LEGEND_PAD = 0.19, 0.12


def _place_map(fig, ax, cax, legend, *, rows: int, aspect: float) -> None:
    """Lay out a floor map on its own figure: the map as large as the margins allow at its
    true shape (``aspect`` = height / width of its limits), the colour bar beside it at 82 %
    of its height, the legend (``rows`` rows) under the x label.

    The positions follow from the figure size and the fixed margins alone, so no text is
    measured; the margins hold the labels a floor map has (tick labels of a few digits).
    """
    fw, fh = fig.get_size_inches()
    right = _CBAR_GAP + _CBAR_WIDTH + _CBAR_ROOM if cax is not None else _MAP_RIGHT
    legend_h = rows * _LEGEND_ROW + _LEGEND_PAD
    avail_w = fw - _MAP_LEFT - right
    avail_h = fh - _MAP_TOP - _MAP_BOTTOM - legend_h
    w = min(avail_w, avail_h / aspect) if aspect > 0 else avail_w
    h = w * aspect if aspect > 0 else avail_h
    x0 = _MAP_LEFT + (avail_w - w) / 2
    y0 = _MAP_BOTTOM + legend_h + (avail_h - h) / 2
    ax.set_position((x0 / fw, y0 / fh, w / fw, h / fh))
    if cax is not None:
        ch = 0.82 * h
        cax.set_position(((x0 + w + _CBAR_GAP) / fw, (y0 + (h - ch) / 2) / fh, _CBAR_WIDTH / fw, ch / fh))
    # the legend's top just under the x label, in the map's axes fraction
    legend.set_bbox_to_anchor((0.5, -(_MAP_BOTTOM - 0.04) / h))


# ---------------------------------------------------------------------------
# comparison of two inspections
# ---------------------------------------------------------------------------
def floor_map_pair(left, right, *, titles, label, extent, kind="thickness", units="mm", vmin=None, vmax=None,
                   suptitle=None, max_pixels=250_000, **common):
    """Two floor maps side by side on one grid and one colour scale (e.g. the older scan
    resampled onto the newer grid and the newer scan).

    Parameters
    ----------
    left, right : 2-D grids of the same shape, NaN = not scanned. [by kind]
    titles : ``(left title, right title)``.
    label : colour-bar label without the unit.
    extent : cell edges of the grid. [mm]
    kind : a :func:`floor_map` kind (not ``"side"``).
    units : display units.
    vmin, vmax : the shared colour range in internal units; default the range of the
        finite cells of both grids.
    suptitle : optional title over both panels.
    max_pixels : each panel's display reduction (:func:`decimate`).
    **common : further :func:`floor_map` arguments (``diameter_mm``, ``centre``,
        ``plate``, ``zones``, ``contours``, …).

    Returns
    -------
    Figure : two panels, one colour bar and one legend under both.
    """
    a, b = np.asarray(left), np.asarray(right)
    if a.shape != b.shape:
        raise ValueError(f"floor_map_pair needs two grids of one shape, got {a.shape} and {b.shape}")
    if kind == "side":
        raise ValueError("floor_map_pair draws quantities, not side codes")
    fin = [g[np.isfinite(g)] for g in (a, b)]
    vals = np.concatenate([f.ravel() for f in fin]) if any(f.size for f in fin) else np.zeros(1)
    lo = float(vals.min()) if vmin is None else float(vmin)
    hi = float(vals.max()) if vmax is None else float(vmax)
    fig = Figure(figsize=(12.0, 6.4), layout="constrained")
    axes = fig.subplots(1, 2, sharex=True, sharey=True)
    common.setdefault("plate_numbers", False)  # two panels: the numbers would crowd them
    for ax, grid, title in zip(axes, (a, b), titles):
        floor_map(grid, extent=extent, title=title, label=label, units=units, kind=kind, vmin=lo, vmax=hi,
                  max_pixels=max_pixels, ax=ax, colorbar=False, **common)
    handles = axes[1].get_legend().legend_handles
    labels = [t.get_text() for t in axes[1].get_legend().get_texts()]
    for ax in axes:
        ax.get_legend().remove()
    axes[1].set_ylabel("")
    q = _QUANTITY[kind]
    cb = fig.colorbar(axes[0].images[0], ax=list(axes), shrink=0.8, pad=0.015, aspect=30)
    cb.set_label(f"{label} [{U.unit_label(q, units)}]")
    fig.legend(handles, labels, loc="outside lower center", ncols=min(5, len(handles)), fontsize=13, frameon=False)  # prints at >= 7 pt (12 in wide figure)
    if suptitle:
        fig.suptitle(suptitle, fontsize=12, x=0.02, ha="left")
    f = fig.scananalyse_factor
    fig.scananalyse_caption = decimation_caption(kind, f)
    return fig


#: Marker, colour and legend name of each indication status (distinct in shape and in
#: colour, so the map reads in grey print too); any other status is drawn as a small dot.
STATUS_STYLE = {
    "new": ("^", "#d62728", "new"),
    "grown": ("D", "#ff7f0e", "grown"),
    "stable": ("o", "#2ca02c", "stable"),
    "repaired": ("s", "#1f77b4", "repaired"),
    "partly unscanned": ("X", "#9467bd", "partly unscanned"),
    "not found": ("v", "#6b6b6b", "not found (older only)"),
}
_STATUS_ALWAYS = ("new", "grown", "stable", "repaired", "partly unscanned")
_SCANNED_COLOUR = "#fbfaf6"


def indication_status_map(indications, *, scanned, extent, units="mm", diameter_mm=None, centre=(0.0, 0.0),
                          plate=None, zones=None, title="Indications by status", max_pixels=400_000,
                          label_limit=60):
    """Each indication on the floor outline, drawn by its status (new, grown, stable,
    repaired, partly unscanned, …): its outline box and a marker at its centre, one shape
    and colour per status; the legend gives each status with its count.

    Parameters
    ----------
    indications : table with ``x_mm, y_mm, status`` and optionally ``x_min_mm, y_min_mm,
        x_max_mm, y_max_mm`` (the box) and ``id``. [mm]
    scanned : boolean grid of the scanned cells (or a thickness grid: finite = scanned).
    extent : cell edges of the grid. [mm]
    units : display units (floor coordinates in m, or ft / in).
    diameter_mm, centre, plate, zones : as :func:`floor_map`.
    title : figure title.
    max_pixels : display reduction of the scanned mask.
    label_limit : the ids are written when there are at most this many indications.

    Returns
    -------
    Figure : with ``scananalyse_caption`` and ``scananalyse_status_counts`` (status →
        number drawn).
    """
    U._check(units)
    sc = np.asarray(scanned)
    sc = np.isfinite(sc) if sc.dtype != bool else sc
    fig = Figure(figsize=_FIGSIZE_MAP)
    ax = fig.add_subplot()
    f = _factor(sc.shape, max_pixels)
    shown = _decimate_any(sc, f)
    nr, nc = sc.shape
    x_min, x_max, y_min, y_max = (float(e) / 1000.0 for e in extent)
    px, py = (x_max - x_min) / nc, (y_max - y_min) / nr
    ext_m = (x_min, x_min + shown.shape[1] * f * px, y_min, y_min + shown.shape[0] * f * py)
    ax.imshow(np.where(shown, 1.0, 0.0), origin="lower", extent=ext_m, interpolation="nearest", zorder=1,
              cmap=ListedColormap([NOT_SCANNED_COLOUR, _SCANNED_COLOUR]), vmin=0, vmax=1)
    handles = [Patch(facecolor=_SCANNED_COLOUR, edgecolor="#888888", linewidth=0.5, label="scanned"),
               Patch(facecolor=NOT_SCANNED_COLOUR, edgecolor="#888888", linewidth=0.5, label="not scanned")]
    p_sub = None if plate is None else np.asarray(plate)[::f, ::f]
    _draw_seams(ax, p_sub, handles, origin=(x_min, y_min), step=(f, px, py))
    if zones is not None:
        _draw_zones(ax, zones, handles, f=f, origin=(x_min, y_min), step=(px, py))
    df = indications if indications is not None else None
    status = (df["status"].fillna("").astype(str).to_numpy() if df is not None and len(df) and "status" in df
              else np.array([], dtype=str))
    counts = {}
    order = list(_STATUS_ALWAYS) + [s for s in dict.fromkeys(status) if s not in _STATUS_ALWAYS]
    has_box = df is not None and all(c in df.columns for c in ("x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm"))
    for st in order:
        sel = status == st
        n = int(sel.sum())
        counts[st] = n
        marker, colour, name = STATUS_STYLE.get(st, (".", "#333333", st or "no status"))
        if n:
            sub = df[sel]
            if has_box:
                x0 = sub["x_min_mm"].to_numpy(float) / 1000.0
                y0 = sub["y_min_mm"].to_numpy(float) / 1000.0
                w = sub["x_max_mm"].to_numpy(float) / 1000.0 - x0
                h = sub["y_max_mm"].to_numpy(float) / 1000.0 - y0
                ok = np.isfinite(x0 + y0 + w + h)
                boxes = [Rectangle((a, b), c, d) for a, b, c, d in zip(x0[ok], y0[ok], w[ok], h[ok])]
                ax.add_collection(PatchCollection(boxes, facecolor="none", edgecolor=colour, linewidth=0.9,
                                                  zorder=4), autolim=False)
            ax.scatter(sub["x_mm"].to_numpy(float) / 1000.0, sub["y_mm"].to_numpy(float) / 1000.0, s=46,
                       marker=marker, facecolors=colour, edgecolors="#111111", linewidths=0.6, zorder=6)
        handles.append(Line2D([], [], marker=marker, linestyle="none", markerfacecolor=colour,
                              markeredgecolor="#111111", markersize=7, label=f"{name} ({n})"))
    if df is not None and 0 < len(df) <= label_limit and "id" in df.columns:
        for _, row in df.iterrows():
            text = _indication_label(row)
            if text and np.isfinite(row["x_mm"]) and np.isfinite(row["y_mm"]):
                ax.annotate(text, (row["x_mm"] / 1000.0, row["y_mm"] / 1000.0), xytext=(4, 3),
                            textcoords="offset points", fontsize=6.5, color="#222222", zorder=7,
                            path_effects=[patheffects.withStroke(linewidth=2.0, foreground="white")])
    xl, yl, legend, ncol = _frame_floor(ax, ext_m, handles, centre=centre, diameter_mm=diameter_mm, title=title,
                                        units=units)
    _place_map(fig, ax, None, legend, rows=-(-len(handles) // ncol), aspect=(yl[1] - yl[0]) / (xl[1] - xl[0]))
    fig.scananalyse_factor = f
    fig.scananalyse_status_counts = counts
    fig.scananalyse_caption = ("" if f == 1 else f"The scanned area is reduced {f} × {f} for display (a pixel "
                               "is scanned if any cell in it is).")
    return fig


def _indication_label(row) -> str:
    """The id written beside an indication; an older one found in no newer (no id of its
    own) is written with its older id, e.g. "old 3"."""
    import pandas as pd

    if not pd.isna(row.get("id")):
        return str(row["id"])
    old = row.get("old_id")
    return "" if old is None or pd.isna(old) else f"old {old}"


_REPAIR_COLOUR = "#00a36c"


def _repair_outline(shape):
    """A matplotlib patch of a repair record's area (metres of the floor frame)."""
    if shape.kind == "circle":
        return Circle((shape.x / 1000.0, shape.y / 1000.0), shape.r / 1000.0)
    if shape.kind == "rect":
        return Rectangle(((shape.x - shape.w / 2) / 1000.0, (shape.y - shape.h / 2) / 1000.0),
                         shape.w / 1000.0, shape.h / 1000.0)
    return Polygon(np.asarray(shape.points, dtype=float) / 1000.0, closed=True)


def repair_record_map(values, repairs, *, older_date=None, title="Repair record", label="remaining thickness",
                      kind="thickness", **kw):
    """The operator's repair record on a floor map: each repaired area outlined and
    labelled with its number and date (and the plate thickness fitted, when the record
    gives it); repairs made between the inspections drawn solid, earlier ones dashed.

    Parameters
    ----------
    values : the map underneath (e.g. the newer thickness). [by kind]
    repairs : list of :class:`~scananalyse.rates.Repair` (``shape``, ``date``,
        ``thickness``). [mm]
    older_date : date of the older inspection, or None (all drawn solid).
    title, label, kind : as :func:`floor_map`.
    **kw : further :func:`floor_map` arguments (``extent``, ``units``, ``diameter_mm``, …).

    Returns
    -------
    Figure : with ``scananalyse_repair_labels`` (the label written at each area, in
        record order).
    """
    units = kw.get("units", "mm")
    cx = float(kw.get("centre", (0.0, 0.0))[0])
    labels = []

    def draw(ax, handles):
        styles = set()
        for k, r in enumerate(repairs, start=1):
            between = older_date is None or r.date > older_date
            styles.add(between)
            ls = "-" if between else "--"
            outline = _repair_outline(r.shape)
            outline.set(facecolor="none", edgecolor=_REPAIR_COLOUR, linewidth=1.8, linestyle=ls, zorder=6,
                        path_effects=[patheffects.withStroke(linewidth=3.4, foreground="white")])
            ax.add_patch(outline)
            text = f"R{k} {r.date.isoformat()}"
            if r.thickness is not None:
                text += (f"\n{U.convert(r.thickness, 'thickness', units):.{U.decimals('thickness', units)}f} "
                         f"{U.unit_label('thickness', units)} plate")
            labels.append(text)
            x0, x1, y0, y1 = r.shape.bounds
            right = (x0 + x1) / 2 > cx  # the label towards the tank centre, so it stays on the map
            ax.annotate(text, ((x0 if right else x1) / 1000.0, y1 / 1000.0), xytext=(-3 if right else 3, 3),
                        textcoords="offset points", fontsize=7, ha="right" if right else "left",
                        color="#00502f", fontweight="bold", zorder=7, va="bottom",
                        bbox=dict(boxstyle="round,pad=0.2", facecolor="white", edgecolor=_REPAIR_COLOUR,
                                  linewidth=0.6, alpha=0.88))
        if True in styles:
            handles.append(Patch(facecolor="none", edgecolor=_REPAIR_COLOUR, linewidth=1.8,
                                 label="repaired" + (" between the inspections" if older_date else "")))
        if False in styles:
            handles.append(Patch(facecolor="none", edgecolor=_REPAIR_COLOUR, linewidth=1.8, linestyle="--",
                                 label="repaired before the older inspection"))

    kw.setdefault("plate_numbers", False)  # the dates are the labels that matter here
    fig = floor_map(values, title=title, label=label, kind=kind, overlay=draw, **kw)
    fig.scananalyse_repair_labels = labels
    return fig


# ---------------------------------------------------------------------------
# registration overlay
# ---------------------------------------------------------------------------
def _composite(new, old):
    """RGB image: white background, new only orange, old only blue, both near-black."""
    n = np.asarray(new, dtype=bool)
    o = np.asarray(old, dtype=bool)
    img = np.ones(n.shape + (3,), dtype=np.float32)
    img[n & ~o] = (0.90, 0.45, 0.05)
    img[o & ~n] = (0.15, 0.45, 0.80)
    img[n & o] = (0.10, 0.10, 0.10)
    return img


def reduce_feature_masks(new_features, old_features_before, old_features_after, *, max_pixels=300_000):
    """The three masks of :func:`registration_overlay` block-reduced for display ("any": a
    pixel is set if any cell in it is), as ``(masks, factor, full_shape)``."""
    masks = [np.asarray(m, dtype=bool) for m in (new_features, old_features_before, old_features_after)]
    shp = masks[0].shape
    for m in masks[1:]:
        if m.shape != shp:
            raise ValueError(f"feature masks differ in shape: {shp} vs {m.shape}")
    f = _factor(shp, max_pixels)
    return tuple(_decimate_any(m, f) for m in masks), f, shp


def registration_overlay(new_features, old_features_before, old_features_after, *, extent,
                         max_pixels=300_000, ax=None, units="mm"):
    """Two-colour composite of the scans' feature masks before and after alignment.

    Parameters
    ----------
    new_features : boolean mask on the new grid (e.g. unscanned seams, pits) of the new scan.
    old_features_before : the older scan's feature mask on the new grid *without*
        the registration transform (raw coordinates).
    old_features_after : the older scan's feature mask resampled onto the new grid
        *with* the transform.
    extent : (x_min, x_max, y_min, y_max) of the new grid's cell edges. [mm]
    max_pixels : masks are block-reduced with "any" to at most this many pixels.
    ax : None, or a pair of axes (before, after).
    units : display units: floor coordinates in m (``"mm"``), or ft / in (``"in"``).

    Returns
    -------
    Figure : two panels; dark where the features coincide, orange new only, blue old only.
    """
    if ax is None:
        fig = Figure(figsize=(10.0, 5.2), layout="constrained")
        axes = fig.subplots(1, 2, sharex=True, sharey=True)
    else:
        axes = list(ax)
        if len(axes) != 2:
            raise ValueError("registration_overlay needs ax=None or a pair of axes")
        fig = axes[0].get_figure()
    x_min, x_max, y_min, y_max = (float(e) / 1000.0 for e in extent)
    (nb, ob, oa), f, shp = reduce_feature_masks(new_features, old_features_before, old_features_after,
                                                max_pixels=max_pixels)
    px, py = (x_max - x_min) / shp[1], (y_max - y_min) / shp[0]
    ext = (x_min, x_min + nb.shape[1] * f * px, y_min, y_min + nb.shape[0] * f * py)
    for a, old, ttl in ((axes[0], ob, "before alignment"), (axes[1], oa, "after alignment")):
        a.imshow(_composite(nb, old), origin="lower", extent=ext, interpolation="nearest")
        both = np.count_nonzero(nb & old)
        union = np.count_nonzero(nb | old)
        jac = both / union if union else float("nan")
        a.set_title(f"{ttl}: shared features {100 * jac:.0f} %", fontsize=10, loc="left")
        _length_axes(a, (ext[0], ext[1]), units, y_label=a is axes[0])
        a.set_aspect("equal")
        a.tick_params(labelsize=8)
    handles = [Patch(facecolor=(0.90, 0.45, 0.05), label="newer scan only"),
               Patch(facecolor=(0.15, 0.45, 0.80), label="older scan only"),
               Patch(facecolor=(0.10, 0.10, 0.10), label="both (aligned)")]
    axes[1].legend(handles=handles, loc="upper right", fontsize=10, framealpha=0.9)
    fig.scananalyse_factor = f
    fig.scananalyse_caption = ("Feature masks (unscanned seams and deep loss) of the two scans; "
                               "shared-feature score = cells in both / cells in either."
                               + ("" if f == 1 else f" Masks reduced {f} × {f} for display "
                                  "(a pixel is marked if any cell in it is)."))
    return fig


# ---------------------------------------------------------------------------
# extreme values
# ---------------------------------------------------------------------------
def _get(d, *names, default=None):
    for n in names:
        if isinstance(d, dict):
            if n in d and d[n] is not None:
                return d[n]
        elif getattr(d, n, None) is not None:
            return getattr(d, n)
    return default


def _gringorten(n: int) -> np.ndarray:
    """Gringorten plotting positions (i − 0.44)/(n + 0.12), i = 1..n [seen: Gringorten 1963]."""
    i = np.arange(1, n + 1, dtype=np.float64)
    return (i - 0.44) / (n + 0.12)


def probability_plot(plot_data, *, title, units="mm", ax=None):
    """Gumbel probability plot: sorted block maxima against the reduced variate.

    Parameters
    ----------
    plot_data : mapping (or object with attributes) with
        ``maxima`` or ``x`` (block maxima, any order; NaN for a censored block) [mm];
        optionally ``reduced_variate`` or ``reduced`` (same length as the sorted
        uncensored maxima, else
        Gringorten positions are used: y = −ln(−ln p), p = (i − 0.44)/(n + 0.12));
        ``censored`` (bool mask or count of blocks below ``threshold``);
        ``n_censored``; ``threshold`` [mm]; the fitted curve as ``line_reduced``
        and ``line_x`` [mm] (as in :class:`scananalyse.extremes.ProbabilityPlot`), or
        ``loc``/``mu`` and ``scale``/``sigma`` of the fitted
        Gumbel [mm]; optionally ``shape``/``xi`` for a GEV fit (drawn as a curve);
        ``method`` (fit name for the legend).
    title : plain-text title.
    units : display units (``"in"`` shows mils).
    ax : axes to draw on.

    Returns
    -------
    Figure
    """
    fig, ax = _new_axes(ax, (6.0, 4.6))
    x = np.asarray(_get(plot_data, "maxima", "x", "values", default=[]), dtype=np.float64)
    cens = _get(plot_data, "censored", default=None)
    thr = _get(plot_data, "threshold", default=None)
    n_cens = int(_get(plot_data, "n_censored", default=0))
    if cens is not None and np.ndim(cens) == 1 and len(cens) == len(x):
        cmask = np.asarray(cens, dtype=bool)
        n_cens += int(cmask.sum())
        obs = np.sort(x[~cmask & np.isfinite(x)])
    else:
        if cens is not None and np.ndim(cens) == 0:
            n_cens += int(cens)
        n_cens += int(np.count_nonzero(~np.isfinite(x)))
        obs = np.sort(x[np.isfinite(x)])
    n = n_cens + obs.size
    yv = _get(plot_data, "reduced_variate", "reduced", default=None)
    if yv is not None and len(yv) == obs.size:
        y = np.asarray(yv, dtype=np.float64)
    else:
        p = _gringorten(n)[n_cens:] if n else np.array([])
        y = -np.log(-np.log(p))
    xd = U.convert(obs, "depth", units)
    unit = U.unit_label("depth", units)
    ax.plot(y, xd, "o", ms=4, mfc="#2f6f9f", mec="#1b3f5c", mew=0.5,
            label=f"block maxima (n = {obs.size})")
    if n_cens:
        ax.annotate(f"{n_cens} block(s) below the threshold (censored)", xy=(0.02, 0.97),
                    xycoords="axes fraction", va="top", fontsize=8)
    if thr is not None and np.isfinite(thr):
        ax.axhline(U.convert(thr, "depth", units), color="#888888", lw=0.8, ls=":",
                   label="detection threshold")
    method = _get(plot_data, "method", default=None)
    line_r = _get(plot_data, "line_reduced", default=None)
    line_x = _get(plot_data, "line_x", default=None)
    loc = _get(plot_data, "loc", "mu")
    scale = _get(plot_data, "scale", "sigma")
    shape = float(_get(plot_data, "shape", "xi", default=0.0))
    if line_r is not None and line_x is not None:
        ax.plot(np.asarray(line_r, float), U.convert(np.asarray(line_x, float), "depth", units),
                "-", color="#c0392b", lw=1.3,
                label=f"fitted line ({method})" if method else "fitted line")
    elif loc is not None and scale is not None and y.size:
        yy = np.linspace(min(y.min(), -1.5) - 0.2, max(y.max(), 3.0) + 0.5, 200)
        if abs(shape) < 1e-9:
            q = loc + scale * yy
            lab = (f"Gumbel{' ' + method if method else ''}: μ = {U.convert(loc, 'depth', units):.2f}, "
                   f"σ = {U.convert(scale, 'depth', units):.2f} {unit}")
        else:
            # GEV quantile, ξ convention of Coles (2001): x = μ + σ/ξ ((−ln p)^(−ξ) − 1)
            pp = np.exp(-np.exp(-yy))
            q = loc + scale / shape * ((-np.log(pp)) ** (-shape) - 1.0)
            lab = f"GEV{' ' + method if method else ''}: ξ = {shape:.3f}"
        ax.plot(yy, U.convert(q, "depth", units), "-", color="#c0392b", lw=1.3, label=lab)
    # secondary axis: non-exceedance probability
    ax.set_xlabel("Gumbel reduced variate  −ln(−ln p)")
    ax.set_ylabel(f"deepest loss in block [{unit}]")
    ax.set_title(title, fontsize=10.5, loc="left")
    ax.grid(True, color="#e3e3e3", lw=0.6)
    ax.legend(fontsize=7.5, loc="lower right")
    ax.tick_params(labelsize=8)
    top = ax.secondary_xaxis("top", functions=(lambda v: v, lambda v: v))
    ticks_p = np.array([0.1, 0.5, 0.9, 0.99])
    top.set_ticks(-np.log(-np.log(ticks_p)))
    top.set_xticklabels([f"{t:g}" for t in ticks_p], fontsize=7)
    top.set_xlabel("p", fontsize=8)
    return fig


def return_level_plot(curve_T, level, lower, upper, *, zone_T, units="mm", title=None,
                      ax=None, bound_T=None, bound_label="confidence bounds"):
    """Return level against return period, with confidence bounds and the zone's T.

    Parameters
    ----------
    curve_T : return periods (blocks), ascending. [1]
    level : return level at each T. [mm]
    lower, upper : confidence bounds at each of ``bound_T`` (None to omit); with ``upper``
        alone, the upper bound is drawn as a dashed line through its points. [mm]
    zone_T : the zone's return period T = zone area / block area. [1]
    bound_T : return periods of the bounds (default ``curve_T``). [1]
    bound_label : legend text of the bounds.
    units : display units.
    title : plain-text title (default "Return level").
    ax : axes to draw on.

    Returns
    -------
    Figure
    """
    fig, ax = _new_axes(ax, (6.0, 4.6))
    T = np.asarray(curve_T, dtype=np.float64)
    lv = U.convert(np.asarray(level, dtype=np.float64), "depth", units)
    unit = U.unit_label("depth", units)
    TB = T if bound_T is None else np.asarray(bound_T, dtype=np.float64)
    if lower is not None and upper is not None:
        lo = U.convert(np.asarray(lower, dtype=np.float64), "depth", units)
        hi = U.convert(np.asarray(upper, dtype=np.float64), "depth", units)
        ok = np.isfinite(lo) & np.isfinite(hi)
        ax.fill_between(TB[ok], lo[ok], hi[ok], color="#9ecae1", alpha=0.6, lw=0,
                        label=bound_label)
    elif upper is not None:
        hi = U.convert(np.asarray(upper, dtype=np.float64), "depth", units)
        ok = np.isfinite(hi) & (TB > 0)
        okc = np.isfinite(lv) & (T > 0)
        if ok.sum() >= 2 and okc.sum() >= 2:
            # the bound is computed at a few periods (the dots); between them its margin over
            # the return level is interpolated in log T, so the line follows the curve's
            # shape instead of cutting under it with straight segments
            tb, hb = TB[ok], hi[ok]
            margin = hb - np.interp(np.log(tb), np.log(T[okc]), lv[okc])
            sel = okc & (T >= tb.min()) & (T <= tb.max())
            line_T = np.unique(np.r_[T[sel], tb])
            line_lv = np.interp(np.log(line_T), np.log(T[okc]), lv[okc])
            line_hi = line_lv + np.interp(np.log(line_T), np.log(tb), margin)
            ax.plot(line_T, line_hi, "--", color="#4292c6", lw=1.2, label=bound_label)
            ax.plot(tb, hb, "o", color="#4292c6", ms=3.5, label="_bound computed here")
        elif ok.any():
            ax.plot(TB[ok], hi[ok], "o", color="#4292c6", ms=3.5, label=bound_label)
    ax.plot(T, lv, "-", color="#08519c", lw=1.5, label="return level")
    if zone_T is not None and np.isfinite(zone_T) and zone_T > 0:
        ok = np.isfinite(lv) & (T > 0)
        if ok.sum() >= 2:
            lvT = float(np.interp(np.log(zone_T), np.log(T[ok]), lv[ok]))
            ax.axvline(zone_T, color="#c0392b", lw=1.0, ls="--")
            ax.plot([zone_T], [lvT], "o", color="#c0392b", ms=6,
                    label=f"zone T = {zone_T:.0f}: {lvT:.{U.decimals('depth', units)}f} {unit}")
    ax.set_xscale("log")
    # plain numbers on the period axis (10, 100, ...; 2 and 5 as well over two decades or
    # less), not powers of ten typeset as mathematics
    pos = T[T > 0]
    few = pos.size > 0 and pos.max() <= 100.0 * pos.min()
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: _period_label(v, (1,))))
    ax.xaxis.set_minor_formatter(FuncFormatter(lambda v, _pos: _period_label(v, (2, 5) if few else ())))
    ax.set_xlabel("return period T [blocks]")
    ax.set_ylabel(f"deepest loss expected [{unit}]")
    ax.set_title(title or "Return level", fontsize=10.5, loc="left")
    ax.grid(True, which="both", color="#e3e3e3", lw=0.6)
    ax.legend(fontsize=7.5, loc="upper left")
    ax.tick_params(which="both", labelsize=8)  # the minor labels (2, 5, 20, ...) as the major
    return fig


def _period_label(v, leading) -> str:
    """Tick label of a return period: the plain number when its leading digit is one of
    ``leading`` and the rest are zeros (1, 10, 100 for ``(1,)``), else nothing."""
    if not (np.isfinite(v) and v > 0):
        return ""
    e = math.floor(math.log10(v) + 1e-9)
    m = v / 10.0 ** e
    d = round(m)
    return f"{v:g}" if d in leading and abs(m - d) < 1e-6 else ""


# ---------------------------------------------------------------------------
# method comparison
# ---------------------------------------------------------------------------
_METHOD_COLS = [
    (("interval_code_y",), "code formula", "s", "#6a3d9a"),
    (("life_local_y",), "co-located projection", "D", "#1f78b4"),
    (("life_eva_y", "interval_eva_y", "life_extreme_y"), "extreme-value life", "^", "#e66101"),
    (("interval_cap_y", "cap_y", "cap"), "cap", "|", "#333333"),
]


def method_comparison(zones_df, *, x_max=None, ax=None):
    """Per zone: code-formula interval, co-located life, extreme-value life, cap and
    the recommended interval (bar), with the zone's flags written beside it.

    Infinite values (no measurable corrosion) are drawn as an arrow at the right
    edge; negative values (a code interval of a zone already below MRT) at 0, labelled
    "below MRT".  The methods sit on separate lines within a zone's row, so equal values
    do not hide one another.

    Parameters
    ----------
    zones_df : DataFrame with ``zone``, ``interval_recommended_y`` and any of
        ``interval_code_y``, ``life_local_y``, ``life_eva_y``, ``interval_cap_y``
        (or ``cap_y``), ``flags``. [y]
    x_max : right end of the axis [y] (default: a little beyond the largest finite value).
    ax : axes to draw on.

    Returns
    -------
    Figure
    """
    n = len(zones_df)
    fig, ax = _new_axes(ax, (7.5, 1.2 + 0.75 * max(n, 1)))
    zones = [str(z) for z in zones_df["zone"]] if "zone" in zones_df else \
        [str(i) for i in range(n)]
    ypos = np.arange(n)[::-1].astype(float)
    cols = [(next((c for c in names if c in zones_df.columns), None), lab, mk, colr)
            for names, lab, mk, colr in _METHOD_COLS]
    rec = zones_df["interval_recommended_y"].to_numpy(dtype=float) \
        if "interval_recommended_y" in zones_df else np.full(n, np.nan)
    allv = [rec] + [zones_df[c].to_numpy(dtype=float) for c, *_ in cols if c]
    allv = np.concatenate(allv) if allv else np.array([])
    fin = allv[np.isfinite(allv)]
    hi = x_max if x_max is not None else (max(float(fin.max()), 1.0) * 1.12 if fin.size else 10)
    # a negative interval (a code result for a zone already below MRT) is shown at 0 and
    # labelled, not as a negative number of years
    lo = 0.0
    ax.barh(ypos, np.where(np.isfinite(rec), np.clip(rec, 0, hi), 0), height=0.5,
            color="#cfe3d4", edgecolor="#2e7d4f", lw=0.8, label="recommended", zorder=1)
    for yk, r in zip(ypos, rec):
        txt = "below MRT" if np.isfinite(r) and r < 0 else f"{U.fmt_number(r, 1)} y"
        ax.text(max(r, 0) if np.isfinite(r) else 0, yk - 0.33, " " + txt,
                fontsize=7.5, va="center", color="#1e5635")
    # each method on its own line within the zone's row, so equal values do not hide
    # each other (the cap, a vertical bar, on the row's centre)
    offsets = {"code formula": 0.2, "co-located projection": 0.02, "extreme-value life": -0.16, "cap": 0.02}
    for c, lab, mk, colr in cols:
        if c is None:
            continue
        dy = offsets.get(lab, 0.0)
        vals = zones_df[c].to_numpy(dtype=float)
        shown = np.clip(vals, lo, hi)
        ok = np.isfinite(vals)
        ax.scatter(shown[ok], ypos[ok] + dy, marker=mk, s=46 if mk != "|" else 220,
                   color=colr, zorder=3, label=lab, linewidths=1.5 if mk == "|" else 0.5,
                   edgecolors="white" if mk != "|" else None, clip_on=False)
        for yk in ypos[ok & (vals < 0)]:
            ax.text(0, yk + dy, "  below MRT", color=colr, fontsize=7, va="center", ha="left",
                    zorder=3)
        inf = np.isposinf(vals)
        for yk in ypos[inf]:
            ax.annotate("", xy=(hi, yk + dy), xytext=(hi * 0.93, yk + dy),
                        arrowprops=dict(arrowstyle="->", color=colr, lw=1.2), zorder=3)
            ax.text(hi * 0.93, yk + dy + 0.1, "∞", color=colr, fontsize=8, ha="center")
    if "flags" in zones_df:
        for yk, fl in zip(ypos, zones_df["flags"]):
            if isinstance(fl, str) and fl.strip():
                ax.text(hi, yk + 0.36, fl.replace(";", "; ") + " ", fontsize=6.8, ha="right",
                        va="center", color="#a50f15", style="italic")
    ax.axvline(0, color="#777777", lw=0.8)
    ax.set_yticks(ypos)
    ax.set_yticklabels(zones)
    ax.set_ylim(-0.7, n - 0.3)
    ax.set_xlim(-0.01 * hi, hi)
    ax.set_xlabel("years")
    ax.set_title("Interval and remaining life by method", fontsize=10.5, loc="left")
    ax.grid(True, axis="x", color="#e3e3e3", lw=0.6)
    ax.legend(fontsize=7.5, loc="upper center", bbox_to_anchor=(0.5, -0.18 if n > 1 else -0.35),
              ncol=5, frameon=False)
    ax.tick_params(labelsize=8)
    return fig


# ---------------------------------------------------------------------------
# output
# ---------------------------------------------------------------------------
_PNG_META = {"Software": None}


def _fix_layout(fig, dpi) -> None:
    """Run a figure's constrained layout once at ``dpi``, then keep the positions it found.

    Saved with a layout engine, matplotlib draws the figure twice (a first draw only to run
    the layout, which runs it again at the real draw); the positions found here are the same,
    and the figure is then drawn once.  The figure's ``layout`` is left as None.
    """
    from matplotlib.layout_engine import ConstrainedLayoutEngine

    engine = fig.get_layout_engine()
    if not isinstance(engine, ConstrainedLayoutEngine):
        return
    fig.set_dpi(dpi)
    engine.execute(fig)
    fig.set_layout_engine(None)


def _render_png(fig, dpi) -> bytes:
    """PNG bytes of ``fig`` at ``dpi``, rendered once while the figure is unchanged.

    The bytes are kept on the figure with the dpi; the figure is then marked not
    stale, and any later change to it or its artists marks it stale again
    (matplotlib propagates ``stale`` from every artist up to the figure), which
    forces a fresh render.  So ``save_png`` followed by ``png_bytes`` (the report
    does both) draws the figure once instead of twice.
    """
    cached = getattr(fig, "_scananalyse_png", None)
    if cached is not None and cached[0] == dpi and not fig.stale:
        return cached[1]
    _fix_layout(fig, dpi)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, metadata=_PNG_META)
    data = buf.getvalue()
    fig._scananalyse_png = (dpi, data)
    fig.stale = False
    return data


def save_png(fig, path, dpi=130):
    """Write ``fig`` as PNG to ``path`` (temporary file, then rename); return the path."""
    path = os.fspath(path)
    d = os.path.dirname(os.path.abspath(path))
    data = _render_png(fig, dpi)
    fd, tmp = tempfile.mkstemp(prefix=".fig-", suffix=".png", dir=d)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        publish_file(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path


def png_bytes(fig, dpi=130) -> bytes:
    """The figure as PNG bytes (no software URL in the metadata)."""
    return _render_png(fig, dpi)
