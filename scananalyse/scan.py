"""The scan data model: one inspection's gridded thickness map of a tank floor.

Internally everything is in millimetres and years.  A scan read from a file in
inches is converted on load (1 in = 25.4 mm exactly); the original unit is kept
in :attr:`ScanMeta.units` for display and for writing the file back.

Grid convention (floor-scan formats v1): row ``i`` lies at ``y = y0 + i*pitch``,
column ``j`` at ``x = x0 + j*pitch``; ``(x0, y0)`` is the centre of cell [0, 0].
Floor frame: tank centre at the origin, x and y in mm.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
from dataclasses import dataclass, field

import numpy as np

__all__ = [
    "MM_PER_IN",
    "MM_PER_MIL",
    "MM_Y_PER_MPY",
    "SIDE_UNKNOWN",
    "SIDE_TOP",
    "SIDE_UNDER",
    "SIDE_NAMES",
    "PLATE_NONE",
    "ScanMeta",
    "FloorScan",
    "years_between",
    "to_display",
]

#: 1 in = 25.4 mm exactly (international inch, 1959). [seen: corrosion reference pages]
MM_PER_IN = 25.4
#: 1 mil = 0.001 in = 0.0254 mm. [seen: corrosion reference pages]
MM_PER_MIL = 0.0254
#: 1 mpy (mil per year) = 0.0254 mm/y. [seen: corrosion reference pages]
MM_Y_PER_MPY = 0.0254

SIDE_UNKNOWN = 0
SIDE_TOP = 1
SIDE_UNDER = 2
SIDE_NAMES = {SIDE_UNKNOWN: "unknown", SIDE_TOP: "top", SIDE_UNDER: "under"}
PLATE_NONE = -1

#: Days per year used to turn date differences into years (mean Gregorian year).
DAYS_PER_YEAR = 365.2425


def years_between(start: _dt.date, end: _dt.date) -> float:
    """Years from ``start`` to ``end`` (mean Gregorian year of 365.2425 days). [y]"""
    return (end - start).days / DAYS_PER_YEAR


@dataclass(frozen=True)
class ScanMeta:
    """Metadata of one inspection; lengths in mm whatever the file's unit.

    Parameters
    ----------
    inspected : date the floor was scanned.
    nominal : nominal (as-built) plate thickness. [mm]
    units : the unit of the source file, ``"mm"`` or ``"in"``; used for display and writing.
    tank : tank identifier (free text from the file; escape before putting it in HTML).
    method : ``"MFL"``, ``"UT"`` or free text.
    threshold : smallest loss depth the method reports; shallower loss reads as nominal. [mm]
    sigma : one-standard-deviation thickness uncertainty. [mm]
    installed : date the plates went into service.
    extra : unknown header keys, kept verbatim (values as strings).
    """

    inspected: _dt.date
    nominal: float
    units: str = "mm"
    tank: str = ""
    method: str = ""
    threshold: float | None = None
    sigma: float | None = None
    installed: _dt.date | None = None
    extra: dict = field(default_factory=dict)

    def replace(self, **changes) -> "ScanMeta":
        return dataclasses.replace(self, **changes)

    @property
    def age_years(self) -> float | None:
        """Years in service at the inspection, or None if ``installed`` is unknown. [y]"""
        if self.installed is None:
            return None
        return years_between(self.installed, self.inspected)


@dataclass(eq=False)
class FloorScan:
    """One inspection: thickness grid plus geometry, metadata and optional layers.

    Parameters
    ----------
    thickness : 2-D float32 array (rows, cols) of remaining thickness, NaN where not scanned. [mm]
    x0, y0 : floor coordinates of the centre of cell [0, 0]. [mm]
    pitch : cell size (square cells). [mm]
    meta : :class:`ScanMeta`.
    side : optional int8 layer on the same grid: 0 unknown, 1 top, 2 under.
    plate : optional int32 layer on the same grid: plate id, -1 none.
    source : the path the scan was read from, if any (for messages).
    """

    thickness: np.ndarray
    x0: float
    y0: float
    pitch: float
    meta: ScanMeta
    side: np.ndarray | None = None
    plate: np.ndarray | None = None
    source: str | None = None

    def __post_init__(self):
        t = np.asarray(self.thickness)
        if t.ndim != 2:
            raise ValueError(f"thickness must be 2-D, got shape {t.shape}")
        if t.dtype != np.float32:
            t = t.astype(np.float32)
        self.thickness = t
        if not (np.isfinite(self.pitch) and self.pitch > 0):
            raise ValueError(f"pitch must be positive, got {self.pitch}")
        self.x0 = float(self.x0)
        self.y0 = float(self.y0)
        self.pitch = float(self.pitch)
        if self.side is not None:
            s = np.asarray(self.side)
            if s.shape != t.shape:
                raise ValueError(f"side layer shape {s.shape} differs from thickness {t.shape}")
            self.side = s.astype(np.int8, copy=False)
        if self.plate is not None:
            p = np.asarray(self.plate)
            if p.shape != t.shape:
                raise ValueError(f"plate layer shape {p.shape} differs from thickness {t.shape}")
            self.plate = p.astype(np.int32, copy=False)

    # --- geometry -------------------------------------------------------
    @property
    def shape(self) -> tuple[int, int]:
        return self.thickness.shape

    @property
    def cell_area(self) -> float:
        """Area of one cell. [mm²]"""
        return self.pitch * self.pitch

    @property
    def x(self) -> np.ndarray:
        """Column centre coordinates (1-D). [mm]"""
        return self.x0 + self.pitch * np.arange(self.shape[1], dtype=np.float64)

    @property
    def y(self) -> np.ndarray:
        """Row centre coordinates (1-D). [mm]"""
        return self.y0 + self.pitch * np.arange(self.shape[0], dtype=np.float64)

    @property
    def extent(self) -> tuple[float, float, float, float]:
        """(x_min, x_max, y_min, y_max) of the cell *edges*, for imshow. [mm]"""
        h = self.pitch / 2
        return (self.x0 - h, self.x0 + self.pitch * (self.shape[1] - 1) + h,
                self.y0 - h, self.y0 + self.pitch * (self.shape[0] - 1) + h)

    @property
    def scanned(self) -> np.ndarray:
        """Boolean mask of scanned cells."""
        return np.isfinite(self.thickness)

    @property
    def n_scanned(self) -> int:
        return int(np.count_nonzero(self.scanned))

    def cell_of(self, x, y):
        """Fractional (row, col) of floor point(s) (x, y). [cells]"""
        return ((np.asarray(y, dtype=np.float64) - self.y0) / self.pitch,
                (np.asarray(x, dtype=np.float64) - self.x0) / self.pitch)

    def grid_xy(self, dtype=np.float64):
        """Full 2-D coordinate grids (X, Y) of the cell centres. [mm] (allocates two full grids)"""
        return np.meshgrid(self.x.astype(dtype), self.y.astype(dtype))

    def same_grid(self, other: "FloorScan") -> bool:
        return (self.shape == other.shape and abs(self.x0 - other.x0) < 1e-6 * self.pitch
                and abs(self.y0 - other.y0) < 1e-6 * self.pitch
                and abs(self.pitch - other.pitch) < 1e-9 * self.pitch)

    def with_thickness(self, thickness: np.ndarray, **changes) -> "FloorScan":
        """A copy sharing geometry and metadata with a new thickness grid."""
        return dataclasses.replace(self, thickness=thickness, **changes)

    def summary(self) -> dict:
        """Plain numbers for a short printout."""
        t = self.thickness
        fin = self.scanned
        n = int(np.count_nonzero(fin))
        x0, x1, y0, y1 = self.extent
        return {
            "tank": self.meta.tank,
            "inspected": self.meta.inspected.isoformat(),
            "method": self.meta.method,
            "units": self.meta.units,
            "rows": self.shape[0],
            "cols": self.shape[1],
            "pitch_mm": self.pitch,
            "x_range_mm": (x0, x1),
            "y_range_mm": (y0, y1),
            "scanned_cells": n,
            "scanned_area_m2": n * self.cell_area / 1e6,
            "grid_fill_pct": 100.0 * n / t.size if t.size else 0.0,
            "t_min_mm": float(np.nanmin(t)) if n else float("nan"),
            "t_max_mm": float(np.nanmax(t)) if n else float("nan"),
            "nominal_mm": self.meta.nominal,
        }


def to_display(value_mm, units: str, *, rate: bool = False):
    """Convert a length [mm] (or rate [mm/y] with ``rate=True``) to display units.

    ``units="mm"`` returns mm (mm/y); ``units="in"`` returns inches for lengths and
    mpy (mils per year) for rates.
    """
    v = np.asarray(value_mm, dtype=np.float64)
    if units == "mm":
        out = v
    elif units == "in":
        out = v / (MM_Y_PER_MPY if rate else MM_PER_IN)
    else:
        raise ValueError(f"unknown display units {units!r}")
    return out if out.ndim else float(out)
