"""Floor geometry and zone maps on a scan grid.

A floor is a circle of the tank's inside diameter about a centre in the floor
frame.  Default zones, by radius r from the centre (R the inside radius):

``critical``
    R − w ≤ r ≤ R, with w the rule set's ``critical_zone_width_mm`` (the part of the
    bottom within 75 mm of the inside of the shell, radially inward).
``annular``
    only when an annular ring width a is given: R − a ≤ r < R − w (the rest of the
    annular ring).
``interior``
    r < R − a (or R − w without an annular ring), less any user zones.

User zones carve cells out of ``interior`` only (the critical zone and annular ring
keep their own rules); the first listed zone wins where user zones overlap.  They are
polygons in the floor frame, ``(name, [(x, y), ...])`` in mm, or a ring × sector
grid (:func:`ring_sector_zones`) over the interior disc.

A cell belongs to the zone that holds its centre; cells whose centre lies outside
the floor circle get label −1.

Areas (:attr:`ZoneMap.areas_mm2`) are the WHOLE zone areas from the geometry, not
the scanned or gridded part: analytic for the rings and ring sectors
(π(R² − r²), ½·Δθ·(r₂² − r₁²)); for polygons the count of grid cells inside the
polygon and the interior, times the cell area (the part of a polygon beyond the
grid is not counted); ``interior`` is its analytic disc less the user zones.
These areas are what the extreme-value statistics extrapolate to.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from matplotlib.path import Path as _MplPath

from .errors import InputError

__all__ = [
    "FloorGeometry",
    "GridSpec",
    "RingSectorGrid",
    "ZoneMap",
    "ring_sector_zones",
    "zone_map",
    "zone_table",
]


@dataclass(frozen=True)
class FloorGeometry:
    """Plan geometry of a tank floor in the floor frame.

    Parameters
    ----------
    diameter_mm : inside diameter of the shell. [mm]
    centre : floor-frame coordinates of the tank centre. [mm]
    annular_width_mm : radial width of the annular plate ring measured inward from the
        inside of the shell, or None for a floor without annular plates. [mm]
    """

    diameter_mm: float
    centre: tuple[float, float] = (0.0, 0.0)
    annular_width_mm: float | None = None

    def __post_init__(self):
        d = self.diameter_mm
        if not (isinstance(d, (int, float)) and not isinstance(d, bool)
                and math.isfinite(d) and d > 0):
            raise InputError(f"floor: field 'diameter': must be a positive number, got {d!r}")
        object.__setattr__(self, "diameter_mm", float(d))
        try:
            cx, cy = (float(c) for c in self.centre)
        except (TypeError, ValueError):
            raise InputError(f"floor: field 'centre': expected two numbers, got {self.centre!r}") from None
        if not (math.isfinite(cx) and math.isfinite(cy)):
            raise InputError(f"floor: field 'centre': must be finite, got {self.centre!r}")
        object.__setattr__(self, "centre", (cx, cy))
        a = self.annular_width_mm
        if a is not None:
            if not (isinstance(a, (int, float)) and not isinstance(a, bool)
                    and math.isfinite(a) and 0 < a < d / 2):
                raise InputError(f"floor: field 'annular_width': must be > 0 and less than the "
                                 f"radius {d / 2:g} mm, got {a!r}")
            object.__setattr__(self, "annular_width_mm", float(a))

    @property
    def radius_mm(self) -> float:
        """Inside radius of the shell. [mm]"""
        return self.diameter_mm / 2.0

    @property
    def area_mm2(self) -> float:
        """Plan area of the whole floor, πR². [mm²]"""
        return math.pi * self.radius_mm ** 2


@dataclass(frozen=True)
class GridSpec:
    """A bare cell grid (the geometry part of a FloorScan).

    Parameters
    ----------
    shape : (rows, cols).
    x0, y0 : floor coordinates of the centre of cell [0, 0]. [mm]
    pitch : cell size. [mm]
    """

    shape: tuple[int, int]
    x0: float
    y0: float
    pitch: float


@dataclass(frozen=True)
class RingSectorGrid:
    """A ring × sector grid of user zones over the interior disc.

    Parameters
    ----------
    n_rings : number of rings, of equal radial width from the centre out. [1]
    n_sectors : number of equal sectors, counted counter-clockwise from ``start_deg``. [1]
    start_deg : angle of the first sector's start, from the +x axis, counter-clockwise. [deg]
    outer_radius_mm : outer radius of the grid; default the interior disc's radius
        (the inner edge of the annular ring or of the critical zone). [mm]
    prefix : zone names are ``f"{prefix}{ring}s{sector}"``, 1-based (``r1s1`` …).
    """

    n_rings: int
    n_sectors: int
    start_deg: float = 0.0
    outer_radius_mm: float | None = None
    prefix: str = "r"

    def __post_init__(self):
        for nm in ("n_rings", "n_sectors"):
            v = getattr(self, nm)
            if not (isinstance(v, (int, np.integer)) and not isinstance(v, bool) and v >= 1):
                raise InputError(f"zones: field '{nm}': must be an integer >= 1, got {v!r}")
        if self.n_rings * self.n_sectors > 30000:
            raise InputError("zones: field 'n_rings': too many ring-sector zones (> 30000)")

    def name(self, ring: int, sector: int) -> str:
        """Name of ring ``ring`` and sector ``sector`` (0-based arguments)."""
        return f"{self.prefix}{ring + 1}s{sector + 1}"


def ring_sector_zones(n_rings: int, n_sectors: int, *, start_deg: float = 0.0,
                      outer_radius_mm: float | None = None) -> RingSectorGrid:
    """A ring × sector grid of user zones to pass as ``zone_map(..., user_zones=...)``.

    Parameters
    ----------
    n_rings : rings of equal radial width. [1]
    n_sectors : equal sectors. [1]
    start_deg : start angle of sector 1, counter-clockwise from +x. [deg]
    outer_radius_mm : outer radius, default the interior disc's radius. [mm]

    Returns
    -------
    RingSectorGrid
    """
    return RingSectorGrid(int(n_rings), int(n_sectors), float(start_deg), outer_radius_mm)


#: Up to this many zones, :meth:`ZoneMap.groups` makes one pass per zone instead of a sort.
_FEW_ZONES = 8


@dataclass(eq=False)
class ZoneMap:
    """Zone labels on a scan grid and the whole area of each zone.

    Attributes
    ----------
    labels : int16 array (rows, cols), index into ``names``; −1 outside the floor.
    names : zone names, in label order.
    kinds : per zone ``"critical"``, ``"annular"``, ``"interior"`` or ``"user"``.
    areas_mm2 : whole zone area from the geometry, per zone (see module notes). [mm²]
    x0, y0, pitch : grid geometry. [mm]
    geometry : the :class:`FloorGeometry` used.
    """

    labels: np.ndarray
    names: list[str]
    kinds: list[str]
    areas_mm2: np.ndarray
    x0: float
    y0: float
    pitch: float
    geometry: FloorGeometry
    _groups: list | None = field(default=None, repr=False)
    _zoned: np.ndarray | None = field(default=None, repr=False)

    @property
    def shape(self) -> tuple[int, int]:
        return self.labels.shape

    @property
    def cell_area(self) -> float:
        """Area of one grid cell. [mm²]"""
        return self.pitch * self.pitch

    def index(self, name: str) -> int:
        """Label of zone ``name``; InputError naming the field if unknown."""
        try:
            return self.names.index(name)
        except ValueError:
            raise InputError(f"zones: field 'zone': unknown zone {name!r} "
                             f"(known: {', '.join(self.names)})") from None

    def mask(self, name: str) -> np.ndarray:
        """Boolean mask of the cells of zone ``name``."""
        return self.labels == self.index(name)

    @property
    def floor_mask(self) -> np.ndarray:
        """Boolean mask of the cells inside the floor circle."""
        return self.labels >= 0

    def area_m2(self, name: str) -> float:
        """Whole area of zone ``name``. [m²]"""
        return float(self.areas_mm2[self.index(name)]) / 1e6

    def groups(self) -> list[np.ndarray]:
        """Flat cell indices of each zone, ascending (computed once).

        One pass per zone where there are few zones (linear in the grid), else one stable
        sort; both give the same indices.
        """
        if self._groups is None:
            flat = self.labels.ravel()
            small = flat.size < 2 ** 31
            counts = np.bincount(flat[flat >= 0].astype(np.int64), minlength=len(self.names))
            bounds = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
            if len(self.names) <= _FEW_ZONES:
                zoned = np.empty(int(bounds[-1]), dtype=np.int32 if small else np.int64)
                for k in range(len(self.names)):  # one zone at a time: one zone's int64 indices at most
                    zoned[bounds[k]:bounds[k + 1]] = np.flatnonzero(flat == k)
            else:
                order = np.argsort(flat, kind="stable")
                if small:
                    order = order.astype(np.int32)  # half the memory of the default int64
                zoned = order[int(np.count_nonzero(flat < 0)):]
            self._groups = [zoned[bounds[k]:bounds[k + 1]] for k in range(len(self.names))]
            self._zoned = zoned  # every zoned cell, zone after zone (the groups joined)
        return self._groups

    def n_cells(self) -> np.ndarray:
        """Grid cells per zone (inside the grid). [1]"""
        return np.array([g.size for g in self.groups()], dtype=np.int64)

    def reduce(self, values: np.ndarray, func=np.min) -> np.ndarray:
        """Per-zone reduction of ``values`` over its non-NaN cells (NaN for none).

        Parameters
        ----------
        values : array on the grid; NaN cells are skipped (±inf are kept).
        func : reduction of a 1-D array, e.g. ``np.min``, ``np.max``.

        Returns
        -------
        float64 array, one value per zone.
        """
        v = np.asarray(values)
        if v.shape != self.shape:
            raise ValueError(f"values shape {v.shape} differs from the zone grid {self.shape}")
        flat = v.ravel()
        out = np.full(len(self.names), np.nan)
        groups = self.groups()
        if func in _FAST_REDUCE and v.dtype.kind in "fiu" and groups:
            # one gather of all zoned cells (zone after zone) and one NaN-skipping reduction
            # per zone: fmin/fmax ignore NaN, and give NaN only when every value is NaN
            return self.reduce_gathered(flat[self._zoned], func)
        for k, g in enumerate(groups):
            vals = flat[g]
            if vals.dtype.kind == "f":
                vals = vals[~np.isnan(vals)]
            if vals.size:
                out[k] = float(func(vals))
        return out

    def gather(self, values: np.ndarray) -> np.ndarray:
        """The values of every zoned cell as one 1-D array, zone after zone (the cells of
        :meth:`groups` joined), so that several per-zone reductions share one gather
        (:meth:`reduce_gathered`, :meth:`count_gathered`); arithmetic on gathered arrays
        costs the zoned cells only, not the whole grid."""
        v = np.asarray(values)
        if v.shape != self.shape:
            raise ValueError(f"values shape {v.shape} differs from the zone grid {self.shape}")
        self.groups()
        return v.ravel()[self._zoned]

    def _starts(self):
        sizes = np.array([g.size for g in self.groups()], dtype=np.int64)
        return np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(np.int64), sizes > 0

    def reduce_gathered(self, vals: np.ndarray, func=np.min) -> np.ndarray:
        """:meth:`reduce` (``np.min`` or ``np.max``, NaN skipped) of values gathered by
        :meth:`gather`; float64, one value per zone, NaN for none."""
        fast = _FAST_REDUCE.get(func)
        if fast is None:
            raise ValueError("reduce_gathered: func must be np.min, np.max, np.nanmin or np.nanmax")
        out = np.full(len(self.names), np.nan)
        starts, has = self._starts()
        if has.any():
            out[has] = fast.reduceat(vals, starts[has]).astype(np.float64)
        return out

    def count_gathered(self, mask_gathered: np.ndarray) -> np.ndarray:
        """:meth:`count` of a boolean mask gathered by :meth:`gather`. [1]"""
        m = np.asarray(mask_gathered, dtype=bool)
        starts, _ = self._starts()
        # one count per zone over its slice (add.reduceat with an int64 result would first
        # make an int64 copy of the whole mask: 8 bytes per zoned cell)
        return np.array([np.count_nonzero(m[s:s + g.size]) for s, g in zip(starts, self.groups())], dtype=np.int64)

    def count(self, mask: np.ndarray) -> np.ndarray:
        """Number of True cells of ``mask`` per zone. [1]"""
        m = np.asarray(mask, dtype=bool)
        if m.shape != self.shape:
            raise ValueError(f"mask shape {m.shape} differs from the zone grid {self.shape}")
        lab = self.labels[m]
        lab = lab[lab >= 0].astype(np.int64)
        return np.bincount(lab, minlength=len(self.names))

    def coverage_pct(self, scanned: np.ndarray) -> np.ndarray:
        """Scanned share of each zone's whole area, per zone. [%]

        Scanned cells × cell area ÷ whole zone area × 100, capped at 100 (a zone
        resolved by few cells can count slightly more cells than its area).  NaN
        for a zone of zero area.

        Parameters
        ----------
        scanned : boolean mask of scanned cells on the grid.
        """
        return self.coverage_from_counts(self.count(scanned))

    def coverage_from_counts(self, n_scanned) -> np.ndarray:
        """:meth:`coverage_pct` from the scanned cells per zone. [%]"""
        n = np.asarray(n_scanned, dtype=np.float64)
        with np.errstate(invalid="ignore", divide="ignore"):
            pct = np.where(self.areas_mm2 > 0, 100.0 * n * self.cell_area / self.areas_mm2, np.nan)
        return np.minimum(pct, 100.0)


#: NaN-skipping per-zone reductions (fmin/fmax ignore NaN, NaN only when all are NaN).
_FAST_REDUCE = {np.min: np.fmin, np.max: np.fmax, np.nanmin: np.fmin, np.nanmax: np.fmax}


def _grid_of(obj):
    try:
        shape = tuple(int(s) for s in obj.shape)
        x0, y0, pitch = float(obj.x0), float(obj.y0), float(obj.pitch)
    except AttributeError:
        raise TypeError("zone_map needs a FloorScan or a GridSpec (shape, x0, y0, pitch)") from None
    if len(shape) != 2 or not (pitch > 0):
        raise ValueError(f"bad grid: shape {shape}, pitch {pitch}")
    return shape, x0, y0, pitch


def _check_polygon(name, verts):
    if not isinstance(name, str) or not name:
        raise InputError(f"zones: field 'name': zone name must be a non-empty string, got {name!r}")
    try:
        v = np.asarray(verts, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError(f"zones: field '{name}': vertices must be (x, y) numbers") from None
    if v.ndim != 2 or v.shape[1] != 2 or v.shape[0] < 3 or not np.all(np.isfinite(v)):
        raise InputError(f"zones: field '{name}': a polygon needs at least 3 finite (x, y) vertices")
    return v


def zone_map(scan_or_grid, geometry: FloorGeometry, rules, *, user_zones=None) -> ZoneMap:
    """Label each grid cell with its floor zone.

    Parameters
    ----------
    scan_or_grid : a FloorScan or :class:`GridSpec` (anything with ``shape``, ``x0``,
        ``y0``, ``pitch``).
    geometry : :class:`FloorGeometry`.
    rules : :class:`~scananalyse.rules.RuleSet` (``critical_zone_width_mm``).
    user_zones : None, a :class:`RingSectorGrid`, or a list whose items are
        ``(name, vertices)`` polygons [mm, floor frame] or :class:`RingSectorGrid`.

    Returns
    -------
    ZoneMap
        Zones in order ``critical``, ``annular`` (if any), ``interior`` (omitted when
        user zones cover it completely), then the user zones.

    Raises
    ------
    InputError
        Annular ring not wider than the critical zone, duplicate or reserved zone
        names, bad polygons, a ring-sector grid reaching into the annular ring.
    """
    shape, x0, y0, pitch = _grid_of(scan_or_grid)
    zs = _standard_zones(shape, x0, y0, pitch, geometry, float(rules.v("critical_zone_width_mm")))
    items = []
    if user_zones is not None:
        items = [user_zones] if isinstance(user_zones, RingSectorGrid) else list(user_zones)
    for item in items:
        if isinstance(item, RingSectorGrid):
            _add_ring_sectors(zs, item)
        else:
            _add_polygon(zs, item)
        if len(zs.names) > np.iinfo(np.int16).max:
            raise InputError("zones: field 'user_zones': too many zones")
    return _finish_zones(zs, geometry)


@dataclass(eq=False)
class _Zoning:
    """A zone map being built: the zones so far (``names``, ``kinds``, ``areas`` [mm²]), the
    cell ``labels``, and the interior cells no user zone has taken yet (``free``).

    ``xs``, ``ys`` are the cell centres' coordinates from the tank centre and ``r`` their
    distance from it (float32) [mm]; ``r_int`` is the interior disc's radius [mm] and
    ``k_int`` the interior zone's index.
    """

    x0: float
    y0: float
    pitch: float
    xs: np.ndarray
    ys: np.ndarray
    r: np.ndarray
    r_int: float
    k_int: int
    names: list
    kinds: list
    areas: list
    labels: np.ndarray
    free: np.ndarray


def _standard_zones(shape, x0, y0, pitch, geometry: FloorGeometry, w: float) -> _Zoning:
    """The critical zone (width ``w`` [mm] inside the shell), the annular ring if any and the
    interior disc inside them, on the grid."""
    R = geometry.radius_mm
    if w >= R:
        raise InputError(f"rules: field 'critical_zone_width_mm': {w:g} mm is not less than the "
                         f"floor radius {R:g} mm")
    a = geometry.annular_width_mm
    if a is not None and a <= w:
        raise InputError(f"floor: field 'annular_width': {a:g} mm must exceed the critical-zone "
                         f"width {w:g} mm")
    r_int = R - (a if a is not None else w)  # interior disc radius

    cx, cy = geometry.centre
    xs = (x0 - cx + pitch * np.arange(shape[1])).astype(np.float32)
    ys = (y0 - cy + pitch * np.arange(shape[0])).astype(np.float32)
    r = np.hypot(xs[None, :], ys[:, None])  # float32 (rows, cols)

    names: list[str] = ["critical"]
    kinds: list[str] = ["critical"]
    areas: list[float] = [math.pi * (R ** 2 - (R - w) ** 2)]
    labels = np.full(shape, -1, dtype=np.int16)
    labels[r <= R] = 0
    if a is not None:
        names.append("annular")
        kinds.append("annular")
        areas.append(math.pi * ((R - w) ** 2 - r_int ** 2))
        labels[r < R - w] = 1
    k_int = len(names)
    names.append("interior")
    kinds.append("interior")
    areas.append(math.pi * r_int ** 2)
    interior = r < r_int
    labels[interior] = k_int
    return _Zoning(x0=x0, y0=y0, pitch=pitch, xs=xs, ys=ys, r=r, r_int=r_int, k_int=k_int, names=names,
                   kinds=kinds, areas=areas, labels=labels, free=interior.copy())


def _add_ring_sectors(zs: _Zoning, item: RingSectorGrid) -> None:
    """Add a ring × sector grid of user zones over the free interior cells (in place)."""
    ro = zs.r_int if item.outer_radius_mm is None else float(item.outer_radius_mm)
    if not (0 < ro <= zs.r_int * (1 + 1e-9)):
        raise InputError(f"zones: field 'outer_radius_mm': ring-sector grid radius {ro:g} mm "
                         f"must be > 0 and not beyond the interior radius {zs.r_int:g} mm")
    dr = ro / item.n_rings
    dth = 2 * math.pi / item.n_sectors
    ring = np.minimum(np.floor(zs.r / np.float32(dr)).astype(np.int32), item.n_rings - 1)
    th = np.mod(np.arctan2(zs.ys[:, None], zs.xs[None, :]) - np.float32(math.radians(item.start_deg)),
                np.float32(2 * math.pi))
    sec = np.minimum(np.floor(th / np.float32(dth)).astype(np.int32), item.n_sectors - 1)
    inside = zs.free & (zs.r < ro)
    base = len(zs.names)
    for i in range(item.n_rings):
        for j in range(item.n_sectors):
            nm = item.name(i, j)
            if nm in zs.names:
                raise InputError(f"zones: field '{nm}': duplicate zone name")
            zs.names.append(nm)
            zs.kinds.append("user")
            r1, r2 = i * dr, (i + 1) * dr
            zs.areas.append(0.5 * dth * (r2 ** 2 - r1 ** 2))
    code = base + ring * item.n_sectors + sec
    zs.labels[inside] = code[inside].astype(np.int16)
    zs.free &= ~inside
    zs.areas[zs.k_int] -= math.pi * ro ** 2


def _add_polygon(zs: _Zoning, item) -> None:
    """Add a ``(name, vertices)`` polygon user zone: the free interior cells whose centre lies
    in it (in place); its area is those cells'."""
    try:
        nm, verts = item
    except (TypeError, ValueError):
        raise InputError("zones: field 'user_zones': each item must be (name, vertices) "
                         "or a ring-sector grid") from None
    v = _check_polygon(nm, verts)
    if nm in zs.names:
        raise InputError(f"zones: field '{nm}': duplicate or reserved zone name")
    x0, y0, pitch = zs.x0, zs.y0, zs.pitch
    rows, cols = zs.labels.shape
    # cells whose centre may lie in the polygon: its bounding box on the grid
    j0 = max(int(math.floor((v[:, 0].min() - x0) / pitch)), 0)
    j1 = min(int(math.ceil((v[:, 0].max() - x0) / pitch)) + 1, cols)
    i0 = max(int(math.floor((v[:, 1].min() - y0) / pitch)), 0)
    i1 = min(int(math.ceil((v[:, 1].max() - y0) / pitch)) + 1, rows)
    k = len(zs.names)
    zs.names.append(nm)
    zs.kinds.append("user")
    n_in = 0
    if i1 > i0 and j1 > j0:
        gx, gy = np.meshgrid(x0 + pitch * np.arange(j0, j1), y0 + pitch * np.arange(i0, i1))
        pts = np.column_stack([gx.ravel(), gy.ravel()])
        inside = _MplPath(v).contains_points(pts).reshape(gx.shape)
        inside &= zs.free[i0:i1, j0:j1]
        n_in = int(np.count_nonzero(inside))
        sub = zs.labels[i0:i1, j0:j1]
        sub[inside] = k
        zs.free[i0:i1, j0:j1] &= ~inside
    zs.areas.append(n_in * pitch * pitch)
    zs.areas[zs.k_int] -= n_in * pitch * pitch


def _finish_zones(zs: _Zoning, geometry: FloorGeometry) -> ZoneMap:
    """The :class:`ZoneMap`; an interior that the user zones take completely is dropped and
    the zones renumbered; areas below 0 (round-off) become 0."""
    labels, names, kinds, k_int = zs.labels, zs.names, zs.kinds, zs.k_int
    areas_arr = np.array(zs.areas, dtype=np.float64)
    if areas_arr[k_int] <= 1e-9 * math.pi * zs.r_int ** 2 and not np.any(labels == k_int):
        keep = [k for k in range(len(names)) if k != k_int]
        remap = np.full(len(names) + 1, -1, dtype=np.int16)
        remap[np.array(keep)] = np.arange(len(keep), dtype=np.int16)
        labels = remap[labels]  # label -1 maps through remap[-1] == -1
        names = [names[k] for k in keep]
        kinds = [kinds[k] for k in keep]
        areas_arr = areas_arr[keep]
    areas_arr = np.maximum(areas_arr, 0.0)
    return ZoneMap(labels=labels, names=names, kinds=kinds, areas_mm2=areas_arr,
                   x0=zs.x0, y0=zs.y0, pitch=zs.pitch, geometry=geometry)


def zone_table(zones: ZoneMap, scanned: np.ndarray) -> pd.DataFrame:
    """Per-zone area and coverage, a tidy table.

    Parameters
    ----------
    zones : :class:`ZoneMap`.
    scanned : boolean mask of scanned cells on the zone grid.

    Returns
    -------
    DataFrame with columns ``zone``, ``kind``, ``area_m2`` [m²], ``n_cells``,
    ``n_scanned``, ``coverage_pct`` [%].
    """
    return pd.DataFrame({
        "zone": zones.names,
        "kind": zones.kinds,
        "area_m2": zones.areas_mm2 / 1e6,
        "n_cells": zones.n_cells(),
        "n_scanned": zones.count(scanned),
        "coverage_pct": zones.coverage_pct(scanned),
    })
