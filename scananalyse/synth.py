"""Synthetic tank floors with known truth, for tests and the demo.

An invented, flat-bottomed storage tank floor is built from a small set of
random choices (one seeded :func:`numpy.random.default_rng`), and one or two
inspections of it are simulated.  Everything the analysis should recover is
returned beside the scans: the transform between the two scans' frames, the
true thickness, loss and growth rate of each face at every cell, the pit list,
the seam lines and the repairs made between the inspections.

Model
-----
Geometry (floor frame = the NEW scan's frame, tank centre at ``centre``):

* The floor is a circle of diameter ``diameter_mm``.
* Rectangular plates ``plate_mm = (length, width)`` are laid in rows parallel
  to x; each row is shifted along x by ``plate_stagger_mm`` against the one
  below (joints staggered as on real bottoms).  Plates are clipped to the
  circle (the clipped ones stand for sketch plates).  Plate ids are given in
  row-major order over the plates that touch the circle (``plate_true``,
  ``FloorScan.plate``; -1 outside).
* Lap-weld seams run along every plate edge inside the circle
  (``truth.seams``, segments ``(x1, y1, x2, y2)``).  The scanner cannot ride
  over them: a band ``seam_gap_mm`` wide centred on each seam is unscanned.

Loss, per face (top = product side, under = soil side), with ``t`` the time
since installation [y]:

* General thinning: ``loss = r_g * t`` with a small uniform rate per face
  (``general_rate_top``, ``general_rate_under``).
* Pits: a cosine cap ``d(t) * (1 + cos(pi*rho/a)) / 2`` for ``rho < a``
  (radius ``a`` drawn in ``pit_radius_cells`` times the coarser pitch, so both
  scans resolve it), with ``d(t) = rate * max(0, t - start)``.  Start dates
  are staggered between installation and the old inspection; a fraction
  ``new_pit_fraction`` starts after the old inspection (NEW pits, absent from
  the old scan).  The depth reached by the new inspection is drawn first and
  the rate follows as depth / time since start, capped at ``max_pit_rate``:
  pits that start late therefore grow faster.  Top-side pits cluster (a
  fraction ``top_cluster_fraction``) round a low spot near the draw-off,
  where water collects; the rest, and all underside pits, are scattered.
  Pits of one face never overlap (separation ``a_i + a_j`` + one coarse
  pitch; a pit that finds no free place in 60 draws is dropped, so the counts
  are upper bounds on crowded floors); a top and an underside pit may lie at
  one spot and then add.
  ``n_hidden_pits`` further underside pits lie wholly in unscanned ground
  (the shell margin and under the column base) so extreme-value estimates
  have something unseen to find.
* The two faces' losses add; remaining thickness never falls below
  ``t_floor_mm`` (both faces' losses are scaled down together where it would).
* Repairs (``repairs``): the deepest old pits get a rectangular insert plate
  at a date between the inspections.  Inside the rectangle the metal is new at
  that date: general thinning restarts from 0, pits inside either restart from
  0 at their own rate (``restart=True``, soil side still corrosive) or stop
  (``restart=False``, e.g. a coated insert).  ``truth.repairs`` lists them as
  an operator's repair record would.

Rates in the truth (``rate_top_true``, ``rate_under_true``) are the growth
rates of loss at the new inspection, d(loss)/dt = ``r_g + sum(rate * cap)``
[mm/y]: at an active pit's centre this is exactly the pit's rate plus the
general rate of its face.  For pits that started between the inspections
(and in repaired areas) the mean rate over the interval,
``(t_old_true - t_new_true) / dt_years``, is smaller; both are available.

Inspections:

* Each scan samples the truth at its own cell centres at its own date.  The
  new scan's grid is axis-aligned in the floor frame.  The old scan's grid is
  axis-aligned in the old frame; an old cell centre ``p`` lies at the floor
  point ``R(theta) p + d`` (``rotation_deg``, ``shift_mm``), which is the
  registration contract (old -> new).  Each grid covers the floor circle's
  bounding box in its own frame; cells outside the circle are NaN.
* Unscanned (NaN): outside the circle, a shell margin ring (``shell_margin_mm``
  new, ``shell_margin_old_mm`` old), a sump (circle near, not at, the centre),
  a column base (both scans), a temporary obstruction in the old scan only,
  and the seam bands.
* Measurement: reading = true thickness + N(0, sigma), rounded to
  ``resolution_mm``.  MFL: where the reading's loss (nominal - reading) is
  below ``threshold`` the scan reports nominal (left-censored), so no
  reported loss is shallower than the threshold.  UT: no threshold.
* Side layer (new scan, ``side_layer=True``): cells of detected top-side pits
  (centre reading shows the pit) whose top-pit loss is at least half the
  detection level are 1 (found with a pit gauge from above); all other cells
  0 (unknown, counted as underside downstream).  The old scan has none unless
  ``side_layer_old=True``.

:func:`write_repair_record` writes ``truth.repairs`` as an operator repair
record (``scananalyse-repairs 1``) for the rates stage.

Everything is vectorised over cells; pits are rendered in small windows, so a
million-cell floor takes well under a second.
"""

from __future__ import annotations

import datetime as _dt
import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .scan import SIDE_TOP, SIDE_UNDER, PLATE_NONE, FloorScan, ScanMeta, years_between

__all__ = [
    "SynthTruth",
    "SynthPair",
    "SynthScanTruth",
    "make_pair",
    "make_scan",
    "write_repair_record",
    "DEFAULT_TANK",
]

#: Invented tank id used by default.
DEFAULT_TANK = "SYN-T01"

_SIDE_CODE = {"top": SIDE_TOP, "under": SIDE_UNDER}


# ----------------------------------------------------------------------------
# Transform (minimal stand-in; the registration module has the full one)
# ----------------------------------------------------------------------------
@dataclass(frozen=True)
class _Transform:
    """Old -> new rigid transform ``[x', y'] = R(theta)[x, y] + [dx, dy]``."""

    rotation_deg: float
    dx_mm: float
    dy_mm: float

    @property
    def matrix(self) -> np.ndarray:
        c, s = math.cos(math.radians(self.rotation_deg)), math.sin(math.radians(self.rotation_deg))
        return np.array([[c, -s, self.dx_mm], [s, c, self.dy_mm], [0.0, 0.0, 1.0]])

    def apply(self, x, y):
        c, s = math.cos(math.radians(self.rotation_deg)), math.sin(math.radians(self.rotation_deg))
        x = np.asarray(x, dtype=np.float64)
        y = np.asarray(y, dtype=np.float64)
        return c * x - s * y + self.dx_mm, s * x + c * y + self.dy_mm

    def inverse(self) -> "_Transform":
        c, s = math.cos(math.radians(self.rotation_deg)), math.sin(math.radians(self.rotation_deg))
        # p = R^T (p' - d)
        return _Transform(-self.rotation_deg, -(c * self.dx_mm + s * self.dy_mm),
                          -(-s * self.dx_mm + c * self.dy_mm))


def _make_transform(rotation_deg: float, dx_mm: float, dy_mm: float):
    """The registration module's RigidTransform when it exists, else the stand-in."""
    try:
        from .register import RigidTransform  # noqa: PLC0415
    except Exception:  # noqa: BLE001 - the module may not exist yet or be mid-edit
        return _Transform(rotation_deg, dx_mm, dy_mm)
    try:
        return RigidTransform(rotation_deg=rotation_deg, dx_mm=dx_mm, dy_mm=dy_mm)
    except TypeError:
        return _Transform(rotation_deg, dx_mm, dy_mm)


# ----------------------------------------------------------------------------
# Results
# ----------------------------------------------------------------------------
@dataclass(eq=False)
class SynthTruth:
    """Ground truth of a synthetic inspection pair; maps on the NEW scan's grid.

    Parameters
    ----------
    rotation_deg : rotation of the old frame into the new, counter-clockwise. [deg]
    dx_mm, dy_mm : translation of the old frame into the new. [mm]
    diameter_mm : floor diameter. [mm]
    centre : tank centre in the floor (new) frame. [mm]
    dt_years : time between the inspections. [y]
    age_new_years, age_old_years : time in service at each inspection. [y]
    t_new_true, t_old_true : true thickness at the new / old inspection at the new
        grid's cell centres, NaN outside the floor (float32). [mm]
    loss_top_true, loss_under_true : true loss of each face at the new inspection. [mm]
    rate_top_true, rate_under_true : growth rate of each face's loss at the new
        inspection (general rate + active pits). [mm/y]
    side_true : int8, 1 where the local (pit) loss is mostly top-side, 2 underside,
        0 none (general thinning only, or outside).
    plate_true : int32 plate id, -1 outside.
    pits : one row per pit (see :func:`make_pair`).
    seams : lap-weld seam segments ``(x1, y1, x2, y2)`` in the floor frame. [mm]
    repairs : repairs made between the inspections (rectangles in the floor frame).
    nominal : nominal plate thickness. [mm]
    general_rate_top, general_rate_under : uniform thinning rates. [mm/y]
    coverage_new, coverage_old : boolean masks of scanned cells, each on its own scan's grid.
    """

    rotation_deg: float
    dx_mm: float
    dy_mm: float
    diameter_mm: float
    centre: tuple[float, float]
    dt_years: float
    age_new_years: float
    age_old_years: float
    t_new_true: np.ndarray
    t_old_true: np.ndarray
    loss_top_true: np.ndarray
    loss_under_true: np.ndarray
    rate_top_true: np.ndarray
    rate_under_true: np.ndarray
    side_true: np.ndarray
    plate_true: np.ndarray
    pits: pd.DataFrame
    seams: list
    repairs: pd.DataFrame
    nominal: float = 6.35
    general_rate_top: float = 0.0
    general_rate_under: float = 0.0
    coverage_new: np.ndarray | None = None
    coverage_old: np.ndarray | None = None

    @property
    def transform(self):
        """The old -> new transform (``register.RigidTransform`` when available)."""
        return _make_transform(self.rotation_deg, self.dx_mm, self.dy_mm)

    @property
    def rate_mean_true(self) -> np.ndarray:
        """Mean total thinning rate between the inspections, (t_old - t_new)/dt. [mm/y]"""
        return ((self.t_old_true - self.t_new_true) / np.float32(self.dt_years)).astype(np.float32)


@dataclass(eq=False)
class SynthPair:
    """Two synthetic inspections of one floor and the truth."""

    old: FloorScan
    new: FloorScan
    truth: SynthTruth


@dataclass(eq=False)
class SynthScanTruth:
    """Ground truth of one synthetic inspection; maps on the scan's grid.

    Parameters
    ----------
    diameter_mm : floor diameter. [mm]
    centre : tank centre. [mm]
    age_years : time in service at the inspection. [y]
    t_true : true thickness, NaN outside the floor (float32). [mm]
    loss_top_true, loss_under_true : true loss per face. [mm]
    rate_top_true, rate_under_true : growth rate of each face's loss at the inspection. [mm/y]
    side_true : int8, 1 top, 2 under, 0 none.
    plate_true : int32 plate id, -1 outside.
    pits : one row per pit (``depth_mm`` at the inspection, ``seen``).
    seams : seam segments ``(x1, y1, x2, y2)``. [mm]
    nominal : nominal plate thickness. [mm]
    coverage : boolean mask of scanned cells.
    """

    diameter_mm: float
    centre: tuple[float, float]
    age_years: float
    t_true: np.ndarray
    loss_top_true: np.ndarray
    loss_under_true: np.ndarray
    rate_top_true: np.ndarray
    rate_under_true: np.ndarray
    side_true: np.ndarray
    plate_true: np.ndarray
    pits: pd.DataFrame
    seams: list
    nominal: float = 6.35
    general_rate_top: float = 0.0
    general_rate_under: float = 0.0
    coverage: np.ndarray | None = None


# ----------------------------------------------------------------------------
# Internal model
# ----------------------------------------------------------------------------
@dataclass(frozen=True)
class _Grid:
    """A regular grid in its own frame; ``frame`` maps own coordinates to the floor frame."""

    x0: float
    y0: float
    pitch: float
    shape: tuple[int, int]
    frame: _Transform = _Transform(0.0, 0.0, 0.0)

    def floor_xy(self):
        """Floor coordinates (X, Y) of every cell centre (float64 grids). [mm]"""
        xs = self.x0 + self.pitch * np.arange(self.shape[1], dtype=np.float64)
        ys = self.y0 + self.pitch * np.arange(self.shape[0], dtype=np.float64)
        if self.frame.rotation_deg == 0.0:
            X = np.broadcast_to(xs[None, :] + self.frame.dx_mm, self.shape)
            Y = np.broadcast_to(ys[:, None] + self.frame.dy_mm, self.shape)
            return X, Y
        c = math.cos(math.radians(self.frame.rotation_deg))
        s = math.sin(math.radians(self.frame.rotation_deg))
        X = (c * xs)[None, :] - (s * ys)[:, None] + self.frame.dx_mm
        Y = (s * xs)[None, :] + (c * ys)[:, None] + self.frame.dy_mm
        return X, Y

    def to_own(self, x, y):
        """Floor points into this grid's own frame. [mm]"""
        return self.frame.inverse().apply(x, y)

    def nearest_cell(self, x, y):
        """Integer (row, col) of the cell nearest to floor point(s) (x, y), or -1 off grid."""
        u, v = self.to_own(x, y)
        j = np.rint((u - self.x0) / self.pitch).astype(np.int64)
        i = np.rint((v - self.y0) / self.pitch).astype(np.int64)
        off = (i < 0) | (j < 0) | (i >= self.shape[0]) | (j >= self.shape[1])
        return np.where(off, -1, i), np.where(off, -1, j)


def _grid_covering(radius: float, centre_own: tuple[float, float], pitch: float,
                   frame: _Transform) -> _Grid:
    """Grid of ``pitch`` covering the bounding box of the floor circle in its own frame.

    Cell edges lie on multiples of the pitch (cell centres at ``(k + 1/2) * pitch``),
    as a scanner's grid laid from its own datum would.
    """
    lo_x = math.floor((centre_own[0] - radius) / pitch + 1e-9)
    hi_x = math.ceil((centre_own[0] + radius) / pitch - 1e-9)
    lo_y = math.floor((centre_own[1] - radius) / pitch + 1e-9)
    hi_y = math.ceil((centre_own[1] + radius) / pitch - 1e-9)
    return _Grid((lo_x + 0.5) * pitch, (lo_y + 0.5) * pitch, float(pitch),
                 (hi_y - lo_y, hi_x - lo_x), frame)


@dataclass
class _Floor:
    radius: float
    cx: float
    cy: float
    nominal: float
    plate_len: float
    plate_wid: float
    stagger: float
    xo: float
    yo: float
    kmin: int
    mmin: int
    plate_table: np.ndarray     # (rows, cols) of plate ids, -1 where the plate misses the circle
    seam_gap: float
    general_top: float
    general_under: float
    t_floor: float
    pit_x: np.ndarray
    pit_y: np.ndarray
    pit_r: np.ndarray
    pit_side: np.ndarray        # 1 top, 2 under
    pit_start: np.ndarray       # years since installation
    pit_rate: np.ndarray        # mm/y once started
    repairs: list = field(default_factory=list)   # dicts: x_min.. y_max, t, restart

    # --- geometry ------------------------------------------------------------
    def inside(self, X, Y):
        return (X - self.cx) ** 2 + (Y - self.cy) ** 2 <= self.radius ** 2

    def row_of(self, Y):
        return np.floor((Y - self.yo) / self.plate_wid).astype(np.int64)

    def row_shift(self, k):
        return self.xo + np.mod(k * self.stagger, self.plate_len)

    def plate_id(self, X, Y):
        k = self.row_of(Y)
        m = np.floor((X - self.row_shift(k)) / self.plate_len).astype(np.int64)
        a = k - self.kmin
        b = m - self.mmin
        ok = (a >= 0) & (b >= 0) & (a < self.plate_table.shape[0]) & (b < self.plate_table.shape[1])
        ok &= self.inside(X, Y)
        out = np.full(np.shape(X), PLATE_NONE, dtype=np.int32)
        out[ok] = self.plate_table[a[ok], b[ok]]
        return out

    def seam_band(self, X, Y):
        """True within ``seam_gap/2`` of a seam line."""
        if self.seam_gap <= 0:
            return np.zeros(np.shape(X), dtype=bool)
        h = self.seam_gap / 2.0
        w, L = self.plate_wid, self.plate_len
        dh = np.abs(np.mod(Y - self.yo + w / 2.0, w) - w / 2.0)
        k = self.row_of(Y)
        dv = np.abs(np.mod(X - self.row_shift(k) + L / 2.0, L) - L / 2.0)
        return (dh < h) | (dv < h)

    def seams(self) -> list:
        """Seam segments clipped to the circle. [mm]"""
        R, cx, cy = self.radius, self.cx, self.cy
        out = []
        w, L = self.plate_wid, self.plate_len
        kmax = self.kmin + self.plate_table.shape[0]
        for k in range(self.kmin, kmax + 1):          # horizontal seams (row edges)
            y = self.yo + k * w
            if abs(y - cy) < R:
                hw = math.sqrt(R * R - (y - cy) ** 2)
                out.append((cx - hw, y, cx + hw, y))
        for k in range(self.kmin, kmax):              # vertical seams within each row
            ya, yb = self.yo + k * w, self.yo + (k + 1) * w
            xs = float(self.row_shift(k))
            m0 = int(math.floor((cx - R - xs) / L))
            m1 = int(math.ceil((cx + R - xs) / L))
            for m in range(m0, m1 + 1):
                x = xs + m * L
                if abs(x - cx) >= R:
                    continue
                hh = math.sqrt(R * R - (x - cx) ** 2)
                lo, hi = max(ya, cy - hh), min(yb, cy + hh)
                if hi > lo:
                    out.append((x, lo, x, hi))
        return out

    # --- loss ---------------------------------------------------------------
    def render(self, grid: _Grid, t: float, X=None, Y=None, *, owner_side: int | None = None):
        """Loss and rate maps at time ``t`` [y since installation] on ``grid``.

        Returns dict of float32 arrays ``pit_top``, ``pit_under``, ``loss_top``,
        ``loss_under``, ``rate_top``, ``rate_under``, bool ``inside`` and, with
        ``owner_side``, int32 ``owner`` (index of the pit of that side covering the cell, -1 none).
        """
        if X is None:
            X, Y = grid.floor_xy()
        shape = grid.shape
        inside = self.inside(X, Y)
        rep = [(r, (X >= r["x_min_mm"]) & (X <= r["x_max_mm"]) & (Y >= r["y_min_mm"]) & (Y <= r["y_max_mm"]))
               for r in self.repairs if t > r["t"]]
        tg = np.full(shape, t, dtype=np.float32)
        for r, m in rep:
            tg[m] = np.float32(t - r["t"])
        pit = {SIDE_TOP: np.zeros(shape, np.float32), SIDE_UNDER: np.zeros(shape, np.float32)}
        prate = {SIDE_TOP: np.zeros(shape, np.float32), SIDE_UNDER: np.zeros(shape, np.float32)}
        owner = np.full(shape, -1, dtype=np.int32) if owner_side is not None else None
        if len(self.pit_x):
            u, v = grid.to_own(self.pit_x, self.pit_y)
            p = grid.pitch
            for n in range(len(self.pit_x)):
                a = float(self.pit_r[n])
                j0 = max(int(math.floor((u[n] - a - grid.x0) / p)), 0)
                j1 = min(int(math.ceil((u[n] + a - grid.x0) / p)) + 1, shape[1])
                i0 = max(int(math.floor((v[n] - a - grid.y0) / p)), 0)
                i1 = min(int(math.ceil((v[n] + a - grid.y0) / p)) + 1, shape[0])
                if j0 >= j1 or i0 >= i1:
                    continue
                du = grid.x0 + p * np.arange(j0, j1) - u[n]
                dv = grid.y0 + p * np.arange(i0, i1) - v[n]
                rho = np.hypot(dv[:, None], du[None, :])
                cap = np.where(rho < a, 0.5 * (1.0 + np.cos(np.pi * rho / a)), 0.0)
                start = np.full(cap.shape, self.pit_start[n])
                for r, m in rep:
                    mw = m[i0:i1, j0:j1]
                    if mw.any():
                        start[mw] = max(self.pit_start[n], r["t"]) if r["restart"] else np.inf
                dur = np.clip(t - start, 0.0, None)
                s = int(self.pit_side[n])
                win = (slice(i0, i1), slice(j0, j1))
                pit[s][win] += (cap * self.pit_rate[n] * dur).astype(np.float32)
                prate[s][win] += (cap * self.pit_rate[n] * (dur > 0)).astype(np.float32)
                if owner is not None and s == owner_side:
                    ow = owner[win]
                    ow[rho < a] = n
        loss_top = pit[SIDE_TOP] + np.float32(self.general_top) * tg
        loss_under = pit[SIDE_UNDER] + np.float32(self.general_under) * tg
        total = loss_top + loss_under
        cap_loss = np.float32(self.nominal - self.t_floor)
        over = total > cap_loss
        if over.any():
            f = np.ones(shape, np.float32)
            f[over] = cap_loss / total[over]
            loss_top *= f
            loss_under *= f
            pit[SIDE_TOP] *= f
            pit[SIDE_UNDER] *= f
        rate_top = prate[SIDE_TOP] + np.float32(self.general_top)
        rate_under = prate[SIDE_UNDER] + np.float32(self.general_under)
        out = {"inside": inside, "pit_top": pit[SIDE_TOP], "pit_under": pit[SIDE_UNDER],
               "loss_top": loss_top, "loss_under": loss_under,
               "rate_top": rate_top, "rate_under": rate_under, "owner": owner}
        for key in ("pit_top", "pit_under", "loss_top", "loss_under", "rate_top", "rate_under"):
            out[key][~inside] = np.nan
        return out

    def pit_depth_at(self, t: float) -> np.ndarray:
        """Each pit's own depth at its centre at time ``t`` (repairs included). [mm]"""
        start = self.pit_start.astype(np.float64).copy()
        for r in self.repairs:
            if t <= r["t"]:
                continue
            m = ((self.pit_x >= r["x_min_mm"]) & (self.pit_x <= r["x_max_mm"])
                 & (self.pit_y >= r["y_min_mm"]) & (self.pit_y <= r["y_max_mm"]))
            start[m] = np.maximum(start[m], r["t"]) if r["restart"] else np.inf
        return self.pit_rate * np.clip(t - start, 0.0, None)


@dataclass(frozen=True)
class _Coverage:
    margin: float
    sump: tuple | None          # (x, y, radius)
    rects: tuple                # ((x_min, y_min, x_max, y_max), ...)

    def mask(self, floor: _Floor, X, Y):
        rr2 = (X - floor.cx) ** 2 + (Y - floor.cy) ** 2
        cov = rr2 <= max(floor.radius - self.margin, 0.0) ** 2
        cov &= ~floor.seam_band(X, Y)
        if self.sump is not None:
            sx, sy, sr = self.sump
            cov &= (X - sx) ** 2 + (Y - sy) ** 2 > sr * sr
        for (x_min, y_min, x_max, y_max) in self.rects:
            cov &= ~((X >= x_min) & (X <= x_max) & (Y >= y_min) & (Y <= y_max))
        return cov

    def covers_point(self, floor: _Floor, x, y):
        return self.mask(floor, np.atleast_1d(np.asarray(x, float)), np.atleast_1d(np.asarray(y, float)))


# ----------------------------------------------------------------------------
# Building the floor
# ----------------------------------------------------------------------------
def _plate_table(radius, cx, cy, L, w, stagger, xo, yo):
    """Plate ids of the plates touching the circle, row-major; plus the table offsets."""
    kmin = int(math.floor((cy - radius - yo) / w))
    kmax = int(math.floor((cy + radius - yo) / w))
    shifts = [xo + ((k * stagger) % L) for k in range(kmin, kmax + 1)]
    mmin = min(int(math.floor((cx - radius - s) / L)) for s in shifts)
    mmax = max(int(math.floor((cx + radius - s) / L)) for s in shifts)
    table = np.full((kmax - kmin + 1, mmax - mmin + 1), PLATE_NONE, dtype=np.int32)
    nid = 0
    for a, k in enumerate(range(kmin, kmax + 1)):
        ya, yb = yo + k * w, yo + (k + 1) * w
        for b, m in enumerate(range(mmin, mmax + 1)):
            xa = shifts[a] + m * L
            xb = xa + L
            # nearest point of the rectangle to the centre
            qx = min(max(cx, xa), xb)
            qy = min(max(cy, ya), yb)
            if (qx - cx) ** 2 + (qy - cy) ** 2 < radius ** 2:
                table[a, b] = nid
                nid += 1
    return kmin, mmin, table


def _place(rng, n, sampler, radii, accepted_xy, accepted_r, gap, max_tries=60):
    """Greedy non-overlapping placement of ``n`` pits of the given radii."""
    xs, ys, rs = list(accepted_xy[0]), list(accepted_xy[1]), list(accepted_r)
    out_x, out_y, out_r = [], [], []
    for i in range(n):
        a = radii[i]
        for _ in range(max_tries):
            x, y = sampler(a)
            if xs:
                d = np.hypot(np.asarray(xs) - x, np.asarray(ys) - y)
                if np.any(d < np.asarray(rs) + a + gap):
                    continue
            xs.append(x); ys.append(y); rs.append(a)
            out_x.append(x); out_y.append(y); out_r.append(a)
            break
    return np.asarray(out_x, float), np.asarray(out_y, float), np.asarray(out_r, float)


def _histories(rng, n, *, age_old, age_new, nominal, new_fraction, max_rate, deep_fraction):
    """Start years and rates: depth at ``age_new`` drawn first, rate = depth / duration."""
    late = rng.random(n) < new_fraction
    t_late0 = min(age_old + 0.25, age_new - 0.5)
    start = np.where(late,
                     rng.uniform(t_late0, max(age_new - 0.75, t_late0), n),
                     rng.uniform(0.0, max(age_old - 0.5, 0.0), n))
    frac = np.where(rng.random(n) < deep_fraction, rng.uniform(0.50, 0.72, n), rng.uniform(0.08, 0.50, n))
    depth_new = frac * nominal
    dur = np.maximum(age_new - start, 1e-3)
    rate = np.minimum(depth_new / dur, max_rate)
    return start, rate


def _build_floor(*, rng, diameter_mm, centre, nominal, coarse_pitch, age_old, age_new,
                 n_top_pits, n_under_pits, n_hidden_pits, general_rate_top, general_rate_under,
                 plate_mm, plate_stagger_mm, seam_gap_mm, pit_radius_cells, top_cluster_fraction,
                 low_spot, new_pit_fraction, max_pit_rate, deep_fraction, t_floor_mm,
                 cov_new: _Coverage, hidden_spots):
    R = diameter_mm / 2.0
    cx, cy = centre
    L, w = plate_mm
    stagger = L / 3.0 if plate_stagger_mm is None else float(plate_stagger_mm)
    xo = cx - L / 2.0 + 0.37 * L        # joints off the centre line
    yo = cy - w / 2.0 + 0.21 * w
    kmin, mmin, table = _plate_table(R, cx, cy, L, w, stagger, xo, yo)

    area_m2 = math.pi * R * R / 1e6
    n_top = int(round(0.8 * area_m2)) if n_top_pits is None else int(n_top_pits)
    n_under = int(round(1.5 * area_m2)) if n_under_pits is None else int(n_under_pits)
    rmin, rmax = pit_radius_cells
    rmax_mm = min(rmax * coarse_pitch, 0.05 * diameter_mm)
    rmin_mm = min(rmin * coarse_pitch, rmax_mm)
    gap = coarse_pitch

    def uniform_disc(a):
        rr = (R - a) * math.sqrt(rng.random())
        th = 2 * math.pi * rng.random()
        return cx + rr * math.cos(th), cy + rr * math.sin(th)

    lx, ly, ls = low_spot

    def cluster(a):
        for _ in range(50):
            x, y = lx + ls * rng.standard_normal(), ly + ls * rng.standard_normal()
            if (x - cx) ** 2 + (y - cy) ** 2 < (R - a) ** 2:
                return x, y
        return uniform_disc(a)

    # top-side pits
    r_top = rng.uniform(rmin_mm, rmax_mm, n_top)
    n_cl = int(round(top_cluster_fraction * n_top))
    tx1, ty1, tr1 = _place(rng, n_cl, cluster, r_top[:n_cl], ([], []), [], gap)
    tx2, ty2, tr2 = _place(rng, n_top - n_cl, uniform_disc, r_top[n_cl:],
                           (list(tx1), list(ty1)), list(tr1), gap)
    tx, ty, tr = np.r_[tx1, tx2], np.r_[ty1, ty2], np.r_[tr1, tr2]
    tkind = np.array(["cluster"] * len(tx1) + ["scatter"] * len(tx2), dtype=object)

    # hidden underside pits (shell margin, column base) first, then scattered ones
    hx, hy, hr, hkind = [], [], [], []
    for i in range(n_hidden_pits):
        kind, fn = hidden_spots[i % len(hidden_spots)]
        got = fn(rng)
        if got is None:
            continue
        x, y, a = got
        if hx and np.any(np.hypot(np.asarray(hx) - x, np.asarray(hy) - y) < np.asarray(hr) + a + gap):
            continue
        hx.append(x); hy.append(y); hr.append(a); hkind.append(kind)
    r_un = rng.uniform(rmin_mm, rmax_mm, n_under)
    ux, uy, ur = _place(rng, n_under, uniform_disc, r_un, (list(hx), list(hy)), list(hr), gap)
    ux, uy, ur = np.r_[np.asarray(hx, float), ux], np.r_[np.asarray(hy, float), uy], np.r_[np.asarray(hr, float), ur]
    ukind = np.array(hkind + ["scatter"] * (len(ux) - len(hkind)), dtype=object)

    n_t, n_u = len(tx), len(ux)
    start_t, rate_t = _histories(rng, n_t, age_old=age_old, age_new=age_new, nominal=nominal,
                                 new_fraction=new_pit_fraction, max_rate=max_pit_rate,
                                 deep_fraction=deep_fraction)
    start_u, rate_u = _histories(rng, n_u, age_old=age_old, age_new=age_new, nominal=nominal,
                                 new_fraction=new_pit_fraction, max_rate=max_pit_rate,
                                 deep_fraction=deep_fraction)
    hidden = ukind != "scatter"
    if hidden.any():   # hidden pits are old and among the deeper ones
        k = int(hidden.sum())
        start_u[hidden] = rng.uniform(0.0, max(age_old * 0.6, 0.0), k)
        depth = rng.uniform(0.45, 0.65, k) * nominal
        rate_u[hidden] = np.minimum(depth / np.maximum(age_new - start_u[hidden], 1e-3), max_pit_rate)

    floor = _Floor(radius=R, cx=cx, cy=cy, nominal=nominal, plate_len=L, plate_wid=w, stagger=stagger,
                   xo=xo, yo=yo, kmin=kmin, mmin=mmin, plate_table=table, seam_gap=float(seam_gap_mm),
                   general_top=float(general_rate_top), general_under=float(general_rate_under),
                   t_floor=float(t_floor_mm),
                   pit_x=np.r_[tx, ux], pit_y=np.r_[ty, uy], pit_r=np.r_[tr, ur],
                   pit_side=np.r_[np.full(n_t, SIDE_TOP), np.full(n_u, SIDE_UNDER)].astype(np.int8),
                   pit_start=np.r_[start_t, start_u], pit_rate=np.r_[rate_t, rate_u])
    kinds = np.r_[tkind, ukind]
    return floor, kinds


def _measure(t_true, cov, *, nominal, method, threshold, sigma, resolution, rng):
    """Simulated readings: noise, rounding, MFL censoring, NaN where unscanned."""
    noise = rng.standard_normal(t_true.shape, dtype=np.float32) * np.float32(sigma)
    read = t_true + noise
    if resolution and resolution > 0:
        read = np.round(read / np.float32(resolution)) * np.float32(resolution)
    read = np.maximum(read, np.float32(0.05))
    if method.upper() == "MFL" and threshold is not None and threshold > 0:
        read = np.where(np.float32(nominal) - read < np.float32(threshold), np.float32(nominal), read)
    read = np.where(cov, read, np.float32(np.nan)).astype(np.float32)
    return read


def _detect_level(method, threshold, sigma):
    if method.upper() == "MFL" and threshold is not None and threshold > 0:
        return float(threshold)
    return max(3.0 * float(sigma), 0.2)


def _side_layer(read, owner, pit_top, floor: _Floor, grid: _Grid, *, nominal, level):
    """1 on cells of detected top-side pits (pit gauge from above), 0 elsewhere."""
    side = np.zeros(read.shape, dtype=np.int8)
    top_idx = np.flatnonzero(floor.pit_side == SIDE_TOP)
    if top_idx.size == 0:
        return side
    i, j = grid.nearest_cell(floor.pit_x[top_idx], floor.pit_y[top_idx])
    ok = i >= 0
    detected = np.zeros(len(floor.pit_x), dtype=bool)
    vals = np.full(top_idx.size, np.nan, np.float32)
    vals[ok] = read[i[ok], j[ok]]
    with np.errstate(invalid="ignore"):
        detected[top_idx] = np.isfinite(vals) & (np.float32(nominal) - vals >= np.float32(level))
    own_ok = owner >= 0
    det_cell = np.zeros(read.shape, dtype=bool)
    det_cell[own_ok] = detected[owner[own_ok]]
    with np.errstate(invalid="ignore"):
        mark = det_cell & np.isfinite(read) & (pit_top >= np.float32(0.5 * level))
    side[mark] = SIDE_TOP
    return side


def _side_truth(pit_top, pit_under, min_mm=0.1):
    s = np.zeros(pit_top.shape, dtype=np.int8)
    with np.errstate(invalid="ignore"):
        some = np.fmax(pit_top, pit_under) >= np.float32(min_mm)
        s[some & (pit_top >= pit_under)] = SIDE_TOP
        s[some & (pit_top < pit_under)] = SIDE_UNDER
    return s


def _as_date(d) -> _dt.date:
    if isinstance(d, _dt.datetime):
        return d.date()
    if isinstance(d, _dt.date):
        return d
    return _dt.date.fromisoformat(str(d))


def _date_plus_years(d: _dt.date, years: float) -> _dt.date:
    return d + _dt.timedelta(days=int(round(years * 365.2425)))


def _check_positive(name, value):
    if not (np.isfinite(value) and value > 0):
        raise ValueError(f"{name} must be positive, got {value}")


def _checked_inputs(dates: dict, **positive) -> list:
    """``dates`` (name -> ``datetime.date`` or ISO string) as dates, once each of ``positive``
    (name -> value) is checked to be positive and the dates to be in the order given."""
    out = [_as_date(d) for d in dates.values()]
    for name, v in positive.items():
        _check_positive(name, v)
    if not all(a < b for a, b in zip(out, out[1:])):
        raise ValueError("dates must satisfy " + " < ".join(dates))
    return out


def _defaults_coverage(R, cx, cy, *, margin, sump, obstruction, sump_xy, sump_radius_mm,
                       column_xy, column_mm, temp_obstruction):
    sump_t = None
    if sump:
        sx, sy = (cx + 0.22 * R, cy + 0.12 * R) if sump_xy is None else sump_xy
        sump_t = (float(sx), float(sy), float(sump_radius_mm))
    rects = []
    if obstruction:
        ox, oy = (cx - 0.35 * R, cy + 0.30 * R) if column_xy is None else column_xy
        h = column_mm / 2.0
        rects.append((ox - h, oy - h, ox + h, oy + h))
        if temp_obstruction:
            rects.append((cx + 0.05 * R, cy - 0.62 * R, cx + 0.45 * R, cy - 0.50 * R))
    return sump_t, rects


def _low_spot(R, cx, cy, low_spot):
    """The top-side cluster's (x, y, spread): as given, else near the shell towards the
    draw-off (south-west)."""
    if low_spot is not None:
        return low_spot
    ang = math.radians(225.0)
    return (cx + 0.62 * R * math.cos(ang), cy + 0.62 * R * math.sin(ang), 0.12 * R)


def _pair_coverage(R, cx, cy, *, margin, margin_old, sump, obstruction, sump_xy, sump_radius_mm,
                   column_xy, column_mm):
    """What the newer and the older scan cover: the same sump and column base, a wider shell
    margin and a temporary obstruction in the older one. Returns ``(cov_new, cov_old)``."""
    sump_t, rects = _defaults_coverage(R, cx, cy, margin=margin, sump=sump, obstruction=obstruction,
                                       sump_xy=sump_xy, sump_radius_mm=sump_radius_mm, column_xy=column_xy,
                                       column_mm=column_mm, temp_obstruction=True)
    return _Coverage(margin, sump_t, tuple(rects[:1])), _Coverage(margin_old, sump_t, tuple(rects))


def _pair_grids(R, cx, cy, pitch_new, pitch_old, rotation_deg, shift_mm):
    """The newer scan's grid in the floor frame and the older one's in its own frame
    (old -> floor = the rotation and shift). Returns ``(g_new, g_old)``."""
    tr = _Transform(float(rotation_deg), float(shift_mm[0]), float(shift_mm[1]))
    g_new = _grid_covering(R, (cx, cy), pitch_new, _Transform(0.0, 0.0, 0.0))
    c_old = tr.inverse().apply(cx, cy)
    return g_new, _grid_covering(R, (float(c_old[0]), float(c_old[1])), pitch_old, tr)


def _true_thickness(maps: dict, nominal) -> np.ndarray:
    """Nominal less both faces' loss of :meth:`_Floor.render`'s maps (float32). [mm]"""
    return (np.float32(nominal) - maps["loss_top"] - maps["loss_under"]).astype(np.float32)


@dataclass(eq=False)
class _Seen:
    """One simulated inspection on its grid: the truth maps (:meth:`_Floor.render`), the true
    thickness, the scanned mask, the readings, the side layer (or None) and the plate ids."""

    grid: _Grid
    X: np.ndarray
    Y: np.ndarray
    maps: dict
    t_true: np.ndarray
    covered: np.ndarray
    read: np.ndarray
    side: np.ndarray | None
    plate: np.ndarray

    def scan(self, meta: ScanMeta) -> FloorScan:
        g = self.grid
        return FloorScan(self.read, g.x0, g.y0, g.pitch, meta, side=self.side, plate=self.plate)


def _inspect(floor: _Floor, grid: _Grid, cov: _Coverage, age: float, *, side_layer: bool, nominal, method,
             threshold, sigma, resolution, rng) -> _Seen:
    """Inspect ``floor`` at ``age`` [y since installation] on ``grid``: readings with noise
    drawn from ``rng``, a side layer of the detected top-side pits if ``side_layer``."""
    X, Y = grid.floor_xy()
    maps = floor.render(grid, age, X, Y, owner_side=SIDE_TOP if side_layer else None)
    t_true = _true_thickness(maps, nominal)
    covered = cov.mask(floor, X, Y)
    read = _measure(t_true, covered, nominal=nominal, method=method, threshold=threshold, sigma=sigma,
                    resolution=resolution, rng=rng)
    side = (_side_layer(read, maps["owner"], maps["pit_top"], floor, grid, nominal=nominal,
                        level=_detect_level(method, threshold, sigma)) if side_layer else None)
    return _Seen(grid=grid, X=X, Y=Y, maps=maps, t_true=t_true, covered=covered, read=read, side=side,
                 plate=floor.plate_id(X, Y))


def _truth_on_new(floor: _Floor, seen_new: _Seen, age_old: float, nominal) -> dict:
    """:class:`SynthTruth`'s maps on the newer grid: the true thickness at both inspections,
    each face's loss and rate and the side of the local loss at the newer one."""
    m = seen_new.maps
    old_on_new = floor.render(seen_new.grid, age_old, seen_new.X, seen_new.Y)
    return dict(t_new_true=seen_new.t_true, t_old_true=_true_thickness(old_on_new, nominal),
                loss_top_true=m["loss_top"], loss_under_true=m["loss_under"], rate_top_true=m["rate_top"],
                rate_under_true=m["rate_under"], side_true=_side_truth(m["pit_top"], m["pit_under"]))


def _synth_meta(inspected, *, installed, nominal, tank, method, threshold, sigma, seed) -> ScanMeta:
    """The metadata of a synthetic scan (the threshold only for MFL)."""
    thr = float(threshold) if (method.upper() == "MFL" and threshold is not None) else None
    return ScanMeta(inspected=inspected, nominal=float(nominal), units="mm", tank=tank, method=method,
                    threshold=thr, sigma=float(sigma), installed=installed,
                    extra={"synthetic": f"scananalyse.synth seed={seed}"})


# ----------------------------------------------------------------------------
# Public API
# ----------------------------------------------------------------------------
def make_pair(*, diameter_mm: float = 8000.0, pitch_new: float = 10.0, pitch_old: float = 12.5,
              nominal: float = 6.35, rotation_deg: float = 2.0, shift_mm=(120.0, -80.0),
              installed=_dt.date(2001, 5, 1), inspected_old=_dt.date(2016, 5, 1),
              inspected_new=_dt.date(2026, 5, 1), method: str = "MFL", threshold: float | None = 1.0,
              sigma: float = 0.1, n_top_pits: int | None = None, n_under_pits: int | None = None,
              n_hidden_pits: int = 4, general_rate_top: float = 0.004, general_rate_under: float = 0.008,
              shell_margin_mm: float = 100.0, shell_margin_old_mm: float | None = None,
              sump: bool = True, obstruction: bool = True, seam_gap_mm: float = 40.0,
              repairs: int = 2, side_layer: bool = True, side_layer_old: bool = False,
              seed: int = 0, tank: str = DEFAULT_TANK, centre=(0.0, 0.0),
              plate_mm=(6000.0, 1800.0), plate_stagger_mm: float | None = None,
              pit_radius_cells=(2.0, 6.0), top_cluster_fraction: float = 0.7,
              low_spot=None, new_pit_fraction: float = 0.2, max_pit_rate: float = 0.6,
              deep_fraction: float = 0.1, t_floor_mm: float = 0.3, resolution_mm: float = 0.01,
              sump_xy=None, sump_radius_mm: float = 400.0, column_xy=None, column_mm: float = 500.0,
              ) -> SynthPair:
    """Two synthetic inspections of one invented floor, with the truth.

    Parameters
    ----------
    diameter_mm : floor (inside) diameter. [mm]
    pitch_new, pitch_old : cell size of the new / old scan. [mm]
    nominal : nominal plate thickness. [mm]
    rotation_deg : rotation mapping old coordinates to new, counter-clockwise. [deg]
    shift_mm : translation (dx, dy) mapping old coordinates to new. [mm]
    installed, inspected_old, inspected_new : dates (``datetime.date`` or ISO strings).
    method : ``"MFL"`` (censored at ``threshold``) or ``"UT"`` (no threshold).
    threshold : smallest loss the MFL scan reports. [mm]
    sigma : one-standard-deviation reading noise. [mm]
    n_top_pits, n_under_pits : pit counts; None scales with floor area (0.8 and
        1.5 per m²). [-]
    n_hidden_pits : extra underside pits placed wholly in unscanned ground (shell
        margin, column base). [-]
    general_rate_top, general_rate_under : uniform thinning rates. [mm/y]
    shell_margin_mm : unscanned ring at the shell in the new scan. [mm]
    shell_margin_old_mm : the same in the old scan; None = 1.3 × ``shell_margin_mm``. [mm]
    sump : leave a sump unscanned (circle of ``sump_radius_mm`` at ``sump_xy``). [-]
    obstruction : leave a column base (square of ``column_mm`` at ``column_xy``)
        unscanned in both scans and a temporary obstruction in the old scan. [-]
    seam_gap_mm : width of the unscanned band along each lap-weld seam. [mm]
    repairs : number of old pits (deepest seen in the old scan, one per face
        first) repaired with an insert plate between the inspections; 0 for none. [-]
    side_layer, side_layer_old : give the new / old scan a side layer of detected
        top-side pits. [-]
    seed : seed of ``numpy.random.default_rng``. [-]
    tank : tank id written to the metadata. [-]
    centre : tank centre in the floor (new) frame. [mm]
    plate_mm : plate (length along x, width along y). [mm]
    plate_stagger_mm : x shift of each plate row against the one below; None = length/3. [mm]
    pit_radius_cells : pit radius range in cells of the coarser scan. [-]
    top_cluster_fraction : share of top-side pits clustered at the low spot. [-]
    low_spot : (x, y, spread) of the top-side cluster; None = near the shell
        towards the draw-off (south-west). [mm]
    new_pit_fraction : share of pits that start after the old inspection. [-]
    max_pit_rate : upper bound on a pit's growth rate. [mm/y]
    deep_fraction : share of pits drawn 50–72 % of nominal deep (the rest 8–50 %). [-]
    t_floor_mm : smallest true remaining thickness. [mm]
    resolution_mm : reading resolution (rounding). [mm]
    sump_xy, sump_radius_mm, column_xy, column_mm : positions / sizes of the sump
        and column base; None positions are chosen from the diameter. [mm]

    Returns
    -------
    SynthPair
        ``old`` and ``new`` :class:`~scananalyse.scan.FloorScan` and ``truth``
        (:class:`SynthTruth`).  ``truth.pits`` columns: ``id``, ``x_mm``, ``y_mm``
        (floor frame), ``radius_mm``, ``side`` (``top``/``under``), ``kind``
        (``cluster``, ``scatter``, ``shell_margin``, ``column_base``),
        ``start_year`` (years since installation), ``start_date``, ``rate_mm_y``,
        ``depth_old_mm``, ``depth_new_mm`` (the pit's own depth, repairs included),
        ``seen_new``, ``seen_old`` (centre cell scanned), ``repair`` (repair id or -1).
        ``truth.repairs`` columns: ``id``, ``shape`` (``rect``), ``x_min_mm``,
        ``y_min_mm``, ``x_max_mm``, ``y_max_mm`` (floor frame), ``date``, ``year``,
        ``kind`` (``insert plate``), ``pit_id``, ``side``, ``restart``.
    """
    installed, inspected_old, inspected_new = _checked_inputs(
        {"installed": installed, "inspected_old": inspected_old, "inspected_new": inspected_new},
        diameter_mm=diameter_mm, pitch_new=pitch_new, pitch_old=pitch_old, nominal=nominal)
    if sigma < 0:
        raise ValueError(f"sigma must be >= 0, got {sigma}")
    rng = np.random.default_rng(seed)
    age_old = years_between(installed, inspected_old)
    age_new = years_between(installed, inspected_new)
    R = diameter_mm / 2.0
    cx, cy = float(centre[0]), float(centre[1])
    cov_new, cov_old = _pair_coverage(
        R, cx, cy, margin=float(shell_margin_mm),
        margin_old=1.3 * shell_margin_mm if shell_margin_old_mm is None else float(shell_margin_old_mm),
        sump=sump, obstruction=obstruction, sump_xy=sump_xy, sump_radius_mm=sump_radius_mm,
        column_xy=column_xy, column_mm=column_mm)
    coarse = max(pitch_new, pitch_old)
    floor, kinds = _build_floor(
        rng=rng, diameter_mm=diameter_mm, centre=(cx, cy), nominal=nominal, coarse_pitch=coarse,
        age_old=age_old, age_new=age_new, n_top_pits=n_top_pits, n_under_pits=n_under_pits,
        n_hidden_pits=n_hidden_pits, general_rate_top=general_rate_top,
        general_rate_under=general_rate_under, plate_mm=plate_mm, plate_stagger_mm=plate_stagger_mm,
        seam_gap_mm=seam_gap_mm, pit_radius_cells=pit_radius_cells,
        top_cluster_fraction=top_cluster_fraction, low_spot=_low_spot(R, cx, cy, low_spot),
        new_pit_fraction=new_pit_fraction, max_pit_rate=max_pit_rate, deep_fraction=deep_fraction,
        t_floor_mm=t_floor_mm, cov_new=cov_new,
        hidden_spots=_hidden_spots(R, cx, cy, shell_margin_mm, list(cov_new.rects), coarse))
    g_new, g_old = _pair_grids(R, cx, cy, pitch_new, pitch_old, rotation_deg, shift_mm)

    # repairs between the inspections, chosen among the deepest old pits seen in both scans
    rep_df = _choose_repairs(floor, kinds, repairs, age_old=age_old, age_new=age_new, installed=installed,
                             cov_old=cov_old, cov_new=cov_new, threshold=_detect_level(method, threshold, sigma),
                             coarse=coarse, rng=rng)

    # the two inspections: the older one read first (the order of the noise draws)
    look = dict(nominal=nominal, method=method, threshold=threshold, sigma=sigma, resolution=resolution_mm,
                rng=np.random.default_rng([seed, 1]))
    seen_old = _inspect(floor, g_old, cov_old, age_old, side_layer=side_layer_old, **look)
    seen_new = _inspect(floor, g_new, cov_new, age_new, side_layer=side_layer, **look)
    new = seen_new.scan(_synth_meta(inspected_new, installed=installed, nominal=nominal, tank=tank, method=method,
                                    threshold=threshold, sigma=sigma, seed=seed))
    old = seen_old.scan(new.meta.replace(inspected=inspected_old, extra=dict(new.meta.extra)))

    pits = _pit_table(floor, kinds, installed, {"old": age_old, "new": age_new},
                      {"new": g_new, "old": g_old}, {"new": seen_new.read, "old": seen_old.read}, rep_df)
    truth = SynthTruth(
        rotation_deg=float(rotation_deg), dx_mm=float(shift_mm[0]), dy_mm=float(shift_mm[1]),
        diameter_mm=float(diameter_mm), centre=(cx, cy), dt_years=age_new - age_old,
        age_new_years=age_new, age_old_years=age_old, **_truth_on_new(floor, seen_new, age_old, nominal),
        plate_true=new.plate.copy(), pits=pits, seams=floor.seams(), repairs=rep_df, nominal=float(nominal),
        general_rate_top=float(general_rate_top), general_rate_under=float(general_rate_under),
        coverage_new=seen_new.covered, coverage_old=seen_old.covered)
    return SynthPair(old=old, new=new, truth=truth)


def make_scan(*, diameter_mm: float = 8000.0, pitch: float = 10.0, nominal: float = 6.35,
              installed=_dt.date(2001, 5, 1), inspected=_dt.date(2026, 5, 1), method: str = "MFL",
              threshold: float | None = 1.0, sigma: float = 0.1, n_top_pits: int | None = None,
              n_under_pits: int | None = None, n_hidden_pits: int = 4,
              general_rate_top: float = 0.004, general_rate_under: float = 0.008,
              shell_margin_mm: float = 100.0, sump: bool = True, obstruction: bool = True,
              seam_gap_mm: float = 40.0, side_layer: bool = True, seed: int = 0,
              tank: str = DEFAULT_TANK, centre=(0.0, 0.0), plate_mm=(6000.0, 1800.0),
              plate_stagger_mm: float | None = None, pit_radius_cells=(2.0, 6.0),
              top_cluster_fraction: float = 0.7, low_spot=None, max_pit_rate: float = 0.6,
              deep_fraction: float = 0.1, t_floor_mm: float = 0.3, resolution_mm: float = 0.01,
              sump_xy=None, sump_radius_mm: float = 400.0, column_xy=None, column_mm: float = 500.0,
              ) -> tuple[FloorScan, SynthScanTruth]:
    """One synthetic inspection of an invented floor, with the truth.

    The floor model is the one of :func:`make_pair` (see the module docstring);
    the scan's grid is axis-aligned in the floor frame.  Pit start dates are
    staggered over the whole service life, a fifth of them in its last 40 %.

    Parameters
    ----------
    pitch : cell size. [mm]
    inspected : inspection date.
    Others : as in :func:`make_pair`.

    Returns
    -------
    (FloorScan, SynthScanTruth)
        ``truth.pits`` has ``depth_mm`` (at the inspection) and ``seen`` instead
        of the old/new pairs.
    """
    installed, inspected = _checked_inputs({"installed": installed, "inspected": inspected},
                                           diameter_mm=diameter_mm, pitch=pitch, nominal=nominal)
    rng = np.random.default_rng(seed)
    age = years_between(installed, inspected)
    R = diameter_mm / 2.0
    cx, cy = float(centre[0]), float(centre[1])
    sump_t, rects = _defaults_coverage(R, cx, cy, margin=shell_margin_mm, sump=sump,
                                       obstruction=obstruction, sump_xy=sump_xy,
                                       sump_radius_mm=sump_radius_mm, column_xy=column_xy,
                                       column_mm=column_mm, temp_obstruction=False)
    cov = _Coverage(float(shell_margin_mm), sump_t, tuple(rects))
    floor, kinds = _build_floor(
        rng=rng, diameter_mm=diameter_mm, centre=(cx, cy), nominal=nominal, coarse_pitch=pitch,
        age_old=0.6 * age, age_new=age, n_top_pits=n_top_pits, n_under_pits=n_under_pits,
        n_hidden_pits=n_hidden_pits, general_rate_top=general_rate_top,
        general_rate_under=general_rate_under, plate_mm=plate_mm, plate_stagger_mm=plate_stagger_mm,
        seam_gap_mm=seam_gap_mm, pit_radius_cells=pit_radius_cells,
        top_cluster_fraction=top_cluster_fraction, low_spot=_low_spot(R, cx, cy, low_spot), new_pit_fraction=0.2,
        max_pit_rate=max_pit_rate, deep_fraction=deep_fraction, t_floor_mm=t_floor_mm, cov_new=cov,
        hidden_spots=_hidden_spots(R, cx, cy, shell_margin_mm, rects, pitch))
    g = _grid_covering(R, (cx, cy), pitch, _Transform(0.0, 0.0, 0.0))
    seen = _inspect(floor, g, cov, age, side_layer=side_layer, nominal=nominal, method=method, threshold=threshold,
                    sigma=sigma, resolution=resolution_mm, rng=np.random.default_rng([seed, 1]))
    scan = seen.scan(_synth_meta(inspected, installed=installed, nominal=nominal, tank=tank, method=method,
                                 threshold=threshold, sigma=sigma, seed=seed))
    pits = _pit_table(floor, kinds, installed, {"new": age}, {"new": g}, {"new": seen.read}, None)
    pits = pits.rename(columns={"depth_new_mm": "depth_mm", "seen_new": "seen"})
    m = seen.maps
    truth = SynthScanTruth(
        diameter_mm=float(diameter_mm), centre=(cx, cy), age_years=age, t_true=seen.t_true,
        loss_top_true=m["loss_top"], loss_under_true=m["loss_under"], rate_top_true=m["rate_top"],
        rate_under_true=m["rate_under"], side_true=_side_truth(m["pit_top"], m["pit_under"]),
        plate_true=scan.plate.copy(), pits=pits, seams=floor.seams(), nominal=float(nominal),
        general_rate_top=float(general_rate_top), general_rate_under=float(general_rate_under),
        coverage=seen.covered)
    return scan, truth


def write_repair_record(truth: SynthTruth, path, *, thickness_mm: float | None = None) -> None:
    """Write ``truth.repairs`` as an operator repair record (``scananalyse-repairs 1``).

    One ``rect`` row per repair (centre ``x, y``, width ``w`` along x, height ``h``
    along y, in the new scan's frame), with its date and the plate thickness fitted
    (the nominal unless ``thickness_mm`` is given); the layout
    :func:`scananalyse.rates.read_repairs` reads.

    Parameters
    ----------
    truth : the truth of :func:`make_pair`.
    path : output CSV file.
    thickness_mm : thickness of the insert plates; None = ``truth.nominal``. [mm]
    """
    t = truth.nominal if thickness_mm is None else float(thickness_mm)
    lines = ["# format: scananalyse-repairs 1", "# units: mm",
             "shape,date,x,y,r,w,h,points,thickness,note"]
    for r in truth.repairs.itertuples():
        lines.append(
            f"rect,{r.date.isoformat()},{(r.x_min_mm + r.x_max_mm) / 2:.1f},"
            f"{(r.y_min_mm + r.y_max_mm) / 2:.1f},,{r.x_max_mm - r.x_min_mm:.1f},"
            f"{r.y_max_mm - r.y_min_mm:.1f},,{t:g},{r.kind} over {'top-side' if r.side == 'top' else 'underside'} pit {r.pit_id}")
    with open(path, "w", encoding="utf-8", newline="\n") as fh:
        fh.write("\n".join(lines) + "\n")


# ----------------------------------------------------------------------------
# helpers for the public functions
# ----------------------------------------------------------------------------
def _hidden_spots(R, cx, cy, margin, rects, coarse):
    """Samplers for pits wholly inside unscanned ground: (kind, fn(rng) -> (x, y, a) | None)."""
    spots = []
    if margin >= 2 * coarse:
        def shell(rng):
            a = max(min(margin / 2.0 - 2.0, 3.0 * coarse), coarse)
            rr = R - margin / 2.0
            th = 2 * math.pi * rng.random()
            return cx + rr * math.cos(th), cy + rr * math.sin(th), a
        spots.append(("shell_margin", shell))
    if rects:
        x_min, y_min, x_max, y_max = rects[0]
        half = min(x_max - x_min, y_max - y_min) / 2.0

        def column(rng):
            a = min(0.6 * half, 4.0 * coarse)
            if a < coarse:
                return None
            return (x_min + x_max) / 2.0, (y_min + y_max) / 2.0, a
        spots.append(("column_base", column))
        # order: shell, column, shell, shell ...
    if len(spots) == 2:
        spots = [spots[0], spots[1], spots[0], spots[0]]
    return spots or [("shell_margin", lambda rng: None)]


def _choose_repairs(floor: _Floor, kinds, n_repairs, *, age_old, age_new, installed, cov_old, cov_new,
                    threshold, coarse, rng):
    cols = ["id", "shape", "x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm", "date", "year", "kind",
            "pit_id", "side", "restart"]
    n_repairs = int(n_repairs or 0)
    if n_repairs <= 0 or len(floor.pit_x) == 0:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in cols})
    depth_old = floor.pit_depth_at(age_old)
    seen = (cov_old.covers_point(floor, floor.pit_x, floor.pit_y)
            & cov_new.covers_point(floor, floor.pit_x, floor.pit_y))
    cand = seen & (depth_old >= threshold) & np.isin(kinds, ["scatter", "cluster"])
    rows = []
    chosen: list[int] = []
    order_sides = [SIDE_TOP, SIDE_UNDER]
    for k in range(n_repairs):
        pref = order_sides[k % 2] if k < 2 else None
        ok = cand.copy()
        ok[chosen] = False
        if pref is not None and np.any(ok & (floor.pit_side == pref)):
            ok &= floor.pit_side == pref
        if not ok.any():
            break
        n = int(np.flatnonzero(ok)[np.argmax(depth_old[ok])])
        chosen.append(n)
        h = floor.pit_r[n] + max(50.0, coarse)
        t_r = age_old + min(0.5 + 0.5 * rng.random(), 0.5 * (age_new - age_old))
        restart = bool(floor.pit_side[n] == SIDE_UNDER)
        rows.append({"id": len(rows), "shape": "rect",
                     "x_min_mm": float(floor.pit_x[n] - h), "y_min_mm": float(floor.pit_y[n] - h),
                     "x_max_mm": float(floor.pit_x[n] + h), "y_max_mm": float(floor.pit_y[n] + h),
                     "date": _date_plus_years(installed, t_r), "year": float(t_r), "kind": "insert plate",
                     "pit_id": n, "side": "top" if floor.pit_side[n] == SIDE_TOP else "under",
                     "restart": restart})
        floor.repairs.append({"x_min_mm": rows[-1]["x_min_mm"], "y_min_mm": rows[-1]["y_min_mm"],
                              "x_max_mm": rows[-1]["x_max_mm"], "y_max_mm": rows[-1]["y_max_mm"],
                              "t": float(t_r), "restart": restart})
    return pd.DataFrame(rows, columns=cols)


def _pit_table(floor: _Floor, kinds, installed, ages: dict, grids: dict, reads: dict, rep_df):
    n = len(floor.pit_x)
    df = pd.DataFrame({
        "id": np.arange(n, dtype=np.int64),
        "x_mm": floor.pit_x, "y_mm": floor.pit_y, "radius_mm": floor.pit_r,
        "side": np.where(floor.pit_side == SIDE_TOP, "top", "under"),
        "kind": np.asarray(kinds, dtype=object),
        "start_year": floor.pit_start,
        "start_date": [_date_plus_years(installed, float(s)) for s in floor.pit_start],
        "rate_mm_y": floor.pit_rate,
    })
    for key in ("old", "new"):
        if key not in ages:
            continue
        df[f"depth_{key}_mm"] = floor.pit_depth_at(ages[key])
    for key in ("new", "old"):
        if key not in grids:
            continue
        i, j = grids[key].nearest_cell(floor.pit_x, floor.pit_y)
        ok = i >= 0
        seen = np.zeros(n, dtype=bool)
        seen[ok] = np.isfinite(reads[key][i[ok], j[ok]])
        df[f"seen_{key}"] = seen
    rep = np.full(n, -1, dtype=np.int64)
    if rep_df is not None and len(rep_df):
        for r in rep_df.itertuples():
            m = ((floor.pit_x >= r.x_min_mm) & (floor.pit_x <= r.x_max_mm)
                 & (floor.pit_y >= r.y_min_mm) & (floor.pit_y <= r.y_max_mm))
            rep[m & (rep < 0)] = r.id
    df["repair"] = rep
    return df

