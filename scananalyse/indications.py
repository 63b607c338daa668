"""Indications: connected regions of loss at or above a reporting depth, their matching
across two inspections (status new / grown / stable), the statuses the matching alone
cannot see (repaired, partly unscanned: :func:`flag_indications`) and the rate each is
assessed at (:func:`new_indication_rates`, measured or a documented conservative
assumption; :func:`apply_indication_rates` carries it into the rate maps).

Regions are labelled with :func:`skimage.measure.label` (8-connectivity) and
measured with :func:`skimage.measure.regionprops_table`; per-region maxima, minima
and majorities are computed by sorting the labelled cells once (no per-region loop
over cells). Matching is by label overlap on the newer grid (the older scan
resampled onto it), with a centroid-distance fallback for regions that moved by
less than a region's size (registration residue) but no longer overlap.
"""

from __future__ import annotations

import datetime as _dt
import math
import os

import numpy as np
import pandas as pd

from .errors import InputError, where
from .scan import SIDE_NAMES, SIDE_UNKNOWN, years_between

__all__ = [
    "INDICATION_COLUMNS",
    "label_indications",
    "find_indications",
    "measure_indications",
    "old_indications",
    "match_indications",
    "flag_indications",
    "new_indication_rates",
    "apply_indication_rates",
    "assumed_rate_note",
    "gone_indications",
    "write_indications_csv",
]

#: Columns of indications.csv (design.md §3.5), in order.
INDICATION_COLUMNS = (
    "id", "x_mm", "y_mm", "x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm",
    "x_deep_mm", "y_deep_mm", "depth_max_mm", "t_min_mm", "area_m2", "n_cells",
    "side", "plate", "zone", "rate_max_mm_y", "status", "old_id", "depth_old_mm",
    "growth_mm", "growth_rate_mm_y", "repair_date", "regrowth_mm", "regrowth_rate_mm_y",
    "rate_assumed_mm_y", "rate_basis",
)


def label_indications(loss: np.ndarray, *, reporting_depth_mm: float, min_cells: int = 1
                      ) -> np.ndarray:
    """Label connected regions (8-connectivity) of loss at or above the reporting depth.

    Parameters
    ----------
    loss : loss map, NaN = not scanned. [mm]
    reporting_depth_mm : smallest loss depth reported as an indication. [mm]
    min_cells : regions with fewer cells are dropped. [cells]

    Returns
    -------
    int32 label map, 0 = background, regions numbered 1..n in raster order of their
    first cell.
    """
    from skimage.measure import label

    if not (math.isfinite(reporting_depth_mm) and reporting_depth_mm > 0):
        raise InputError(f"{where(None, None, 'reporting_depth_mm')}: must be > 0, "
                         f"got {reporting_depth_mm!r}")
    with np.errstate(invalid="ignore"):
        mask = loss >= np.float32(reporting_depth_mm)
    labels = label(mask, connectivity=2).astype(np.int32, copy=False)
    if min_cells > 1 and labels.max() > 0:
        sizes = np.bincount(labels.ravel())
        keep = sizes >= min_cells
        keep[0] = False
        new_id = np.zeros(sizes.size, dtype=np.int32)
        new_id[keep] = np.arange(1, int(keep.sum()) + 1, dtype=np.int32)
        labels = new_id[labels]
    return labels


class _Cells:
    """The labelled cells sorted by label, for vectorised per-region reductions."""

    def __init__(self, labels: np.ndarray, n: int):
        flat = labels.ravel()
        self.idx = np.flatnonzero(flat)
        lab = flat[self.idx]
        order = np.argsort(lab, kind="stable")
        self.idx = self.idx[order]
        self.lab = lab[order]
        self.starts = np.searchsorted(self.lab, np.arange(1, n + 1))
        self.n = n

    def values(self, arr: np.ndarray) -> np.ndarray:
        return arr.ravel()[self.idx]

    def reduce(self, ufunc, arr: np.ndarray) -> np.ndarray:
        if self.n == 0:
            return np.zeros(0, dtype=np.float64)
        return ufunc.reduceat(self.values(arr).astype(np.float64), self.starts)

    def deepest(self, arr: np.ndarray):
        """Per-region maximum of ``arr`` and the flat index of the first cell reaching it."""
        v = self.values(arr).astype(np.float64)
        depth = np.fmax.reduceat(v, self.starts)
        hit = np.flatnonzero(v >= depth[self.lab - 1])
        first = np.zeros(self.n, dtype=np.int64)
        # within a region cells are in raster order, so the first hit is the first cell
        uniq, pos = np.unique(self.lab[hit] - 1, return_index=True)
        first[uniq] = self.idx[hit[pos]]
        return depth, first

    def majority(self, arr: np.ndarray) -> np.ndarray:
        """Most frequent value of ``arr`` in each region (ties: the smallest value)."""
        if self.n == 0:
            return np.zeros(0, dtype=np.int64)
        v = self.values(arr).astype(np.int64)
        pairs, counts = np.unique(np.stack([self.lab.astype(np.int64), v]), axis=1,
                                  return_counts=True)
        # order by label, then by count descending, then value ascending
        order = np.lexsort((pairs[1], -counts, pairs[0]))
        first = np.r_[True, pairs[0, order][1:] != pairs[0, order][:-1]]
        return pairs[1, order][first]


def region_max(labels: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Largest value of ``values`` (NaN skipped) in each region of a label map (regions
    1..n, as :func:`find_indications` numbers them): its ``rate_max_mm_y`` column when the
    rates come after the list. [same unit]"""
    labels = np.asarray(labels)
    n = int(labels.max()) if labels.size else 0
    return _Cells(labels, n).reduce(np.fmax, np.asarray(values))


def find_indications(loss: np.ndarray, *, pitch_mm: float, x0: float, y0: float,
                     reporting_depth_mm: float, side=None, plate=None, zone_labels=None,
                     zone_names=None, rate=None, thickness=None, min_cells: int = 1,
                     return_labels: bool = False):
    """Indication list: connected regions of loss at or above a reporting depth.

    :func:`label_indications` then :func:`measure_indications`.

    Parameters
    ----------
    loss : loss map on the grid, NaN = not scanned. [mm]
    pitch_mm : cell size. [mm]
    x0, y0 : floor coordinates of the centre of cell [0, 0]. [mm]
    reporting_depth_mm : smallest loss depth reported. [mm]
    side, plate, zone_labels, zone_names, rate, thickness : optional maps measured per
        region, as in :func:`measure_indications`.
    min_cells : smallest region kept. [cells]
    return_labels : also return the label map. [-]

    Returns
    -------
    DataFrame (see :func:`measure_indications`), or ``(DataFrame, labels)``.
    """
    labels = label_indications(np.asarray(loss), reporting_depth_mm=reporting_depth_mm,
                               min_cells=min_cells)
    df = measure_indications(labels, loss, pitch_mm=pitch_mm, x0=x0, y0=y0, side=side,
                             plate=plate, zone_labels=zone_labels, zone_names=zone_names,
                             rate=rate, thickness=thickness)
    return (df, labels) if return_labels else df


def measure_indications(labels: np.ndarray, loss: np.ndarray, *, pitch_mm: float, x0: float,
                        y0: float, side=None, plate=None, zone_labels=None, zone_names=None,
                        rate=None, thickness=None) -> pd.DataFrame:
    """Measure the regions of a label map: the indication list of given regions.

    Parameters
    ----------
    labels : int label map from :func:`label_indications` (0 = background, regions 1..n):
        the regions measured; given once where several stages share it (the pipeline's
        rate fill, rate column, matching and :func:`apply_indication_rates`). [-]
    loss : loss map on the same grid, NaN = not scanned. [mm]
    pitch_mm : cell size. [mm]
    x0, y0 : floor coordinates of the centre of cell [0, 0]. [mm]
    side : optional int8 side map (0 unknown, 1 top, 2 under); a region takes the
        majority side of its cells. [-]
    plate : optional int32 plate map (−1 none); majority plate id. [-]
    zone_labels : optional integer zone map; majority zone. [-]
    zone_names : optional mapping (or sequence) from zone code to name. [-]
    rate : optional rate map (e.g. the governing rate, max of both sides); the region's
        maximum. [mm/y]
    thickness : optional thickness map; the region's minimum. [mm]

    Returns
    -------
    DataFrame with :data:`INDICATION_COLUMNS` (``id`` = label), one row per region in
    label order; ``status``, ``repair_date`` and ``rate_basis`` are ``""`` and the matching,
    regrowth and assumed-rate columns NaN until :func:`match_indications`,
    :func:`flag_indications` and :func:`new_indication_rates`.

    Notes
    -----
    Centroids are the mean of the cell centres; the bounding box is given by cell
    edges; ``x_deep_mm``/``y_deep_mm`` locate the deepest cell. Area = cells × pitch².
    """
    from skimage.measure import regionprops_table

    loss = np.asarray(loss)
    labels = np.asarray(labels)
    if labels.shape != loss.shape:
        raise InputError(f"{where(None, None, 'labels')}: label map {labels.shape} and loss map "
                         f"{loss.shape} on different grids")
    n = int(labels.max()) if labels.size else 0
    p = float(pitch_mm)
    if n == 0:
        return pd.DataFrame({c: pd.Series(dtype=_dtype(c)) for c in INDICATION_COLUMNS})

    props = regionprops_table(labels, properties=("label", "area", "bbox", "centroid"))
    cells = _Cells(labels, n)
    depth, first_max = cells.deepest(loss)
    deep_r, deep_c = np.unravel_index(first_max, labels.shape)

    df = pd.DataFrame({
        "id": props["label"].astype(np.int64),
        "x_mm": x0 + p * props["centroid-1"],
        "y_mm": y0 + p * props["centroid-0"],
        "x_min_mm": x0 + p * (props["bbox-1"] - 0.5),
        "y_min_mm": y0 + p * (props["bbox-0"] - 0.5),
        "x_max_mm": x0 + p * (props["bbox-3"] - 0.5),
        "y_max_mm": y0 + p * (props["bbox-2"] - 0.5),
        "x_deep_mm": x0 + p * deep_c,
        "y_deep_mm": y0 + p * deep_r,
        "depth_max_mm": depth,
    })
    df["t_min_mm"] = (cells.reduce(np.fmin, thickness) if thickness is not None
                      else np.full(n, np.nan))
    df["n_cells"] = props["area"].astype(np.int64)
    df["area_m2"] = df["n_cells"] * (p * p / 1e6)
    if side is not None:
        codes = cells.majority(np.asarray(side))
        df["side"] = [SIDE_NAMES.get(int(c), "unknown") for c in codes]
    else:
        df["side"] = SIDE_NAMES[SIDE_UNKNOWN]
    df["plate"] = cells.majority(np.asarray(plate)) if plate is not None else -1
    if zone_labels is not None:
        zc = cells.majority(np.asarray(zone_labels))
        if zone_names is None:
            df["zone"] = [str(int(z)) for z in zc]
        else:
            names = dict(zone_names) if isinstance(zone_names, dict) else dict(enumerate(zone_names))
            df["zone"] = [str(names.get(int(z), int(z))) for z in zc]
    else:
        df["zone"] = ""
    df["rate_max_mm_y"] = cells.reduce(np.fmax, rate) if rate is not None else np.nan
    df["status"] = ""
    df["old_id"] = pd.array([pd.NA] * n, dtype="Int64")
    for c in ("depth_old_mm", "growth_mm", "growth_rate_mm_y", "regrowth_mm",
              "regrowth_rate_mm_y", "rate_assumed_mm_y"):
        df[c] = np.nan
    df["repair_date"] = ""
    df["rate_basis"] = ""
    return df[list(INDICATION_COLUMNS)]


def old_indications(old, new, transform, *, reporting_depth_mm: float, min_cells: int = 1,
                    **kwargs):
    """The older scan's indications, labelled on its own grid, carried onto the newer grid.

    Parameters
    ----------
    old : the older scan in its own frame and grid (:class:`~scananalyse.scan.FloorScan`). [-]
    new : the newer scan (gives the grid). [-]
    transform : old → new transform (``register.RigidTransform``). [-]
    reporting_depth_mm : the reporting depth used for the newer scan. [mm]
    min_cells : smallest region kept, counted on the older grid. [cells]
    **kwargs : passed to :func:`measure_indications` (side, plate, zone_labels, ...).

    Returns
    -------
    (DataFrame, labels): the table on the newer grid (centroids, boxes and areas from the
    carried labels, ``depth_max_mm`` the deepest loss the older scan itself reported)
    and the label map on the newer grid.

    Notes
    -----
    Labelling the older scan after bilinear resampling would lose shallow indications:
    a reported cell mixed with its censored (nominal) neighbours drops below the
    reporting depth. So the regions are labelled on the older grid and carried by
    nearest cell (``register.resample_layer``); their depth is the older scan's own
    reading, not a smoothed one.
    """
    from .register import resample_layer
    from .rates import loss_map

    old_loss = loss_map(old.thickness, float(old.meta.nominal))
    lab_old = label_indications(old_loss, reporting_depth_mm=reporting_depth_mm,
                                min_cells=min_cells)
    n = int(lab_old.max())
    lab_new = resample_layer(lab_old.astype(np.int32, copy=False), old, new, transform, fill=0)
    present = np.zeros(n + 1, dtype=bool)
    present |= np.bincount(lab_new.ravel(), minlength=n + 1)[:n + 1] > 0  # linear, not a sort
    present[0] = False
    # renumber the carried regions 1..m (a region may fall outside the newer grid)
    remap = np.zeros(n + 1, dtype=np.int32)
    remap[present] = np.arange(1, int(present.sum()) + 1, dtype=np.int32)
    lab_new = remap[lab_new]
    loss_on_new = np.where(lab_new > 0, np.float32(0), np.float32(np.nan))
    df = measure_indications(lab_new, loss_on_new, pitch_mm=new.pitch, x0=new.x0, y0=new.y0,
                             **kwargs)
    if n:
        cells = _Cells(lab_old, n)
        depth, first = cells.deepest(old_loss)
        df["depth_max_mm"] = depth[present[1:]]
        df["t_min_mm"] = float(old.meta.nominal) - df["depth_max_mm"]
        # the deepest cell's position, from the older grid through the transform
        r, c = np.unravel_index(first[present[1:]], lab_old.shape)
        xd, yd = transform.apply(old.x0 + old.pitch * c, old.y0 + old.pitch * r)
        df["x_deep_mm"] = np.asarray(xd, dtype=np.float64)
        df["y_deep_mm"] = np.asarray(yd, dtype=np.float64)
    return df, lab_new


def _dtype(col: str):
    if col in ("id", "n_cells", "plate"):
        return "int64"
    if col == "old_id":
        return "Int64"
    if col in ("side", "zone", "status", "repair_date", "rate_basis"):
        return "object"
    return "float64"


def match_indications(new_ind: pd.DataFrame, old_ind: pd.DataFrame, new_labels: np.ndarray,
                      old_labels: np.ndarray, *, growth_sigma_mm: float, dt_years: float,
                      max_distance_mm: float | None = None) -> pd.DataFrame:
    """Match the newer scan's indications to the older scan's (on the newer grid).

    Parameters
    ----------
    new_ind, old_ind : tables from :func:`find_indications` on the newer loss map and on
        the older-scan-on-new-grid loss map. [-]
    new_labels, old_labels : their label maps (same grid). [-]
    growth_sigma_mm : the noise rule's growth threshold k·√(σ_old² + σ_new²)
        (``LossRates.growth_sigma``). [mm]
    dt_years : years between the inspections. [y]
    max_distance_mm : centroid distance accepted by the fallback for regions that
        overlap no older region; None = the larger of 50 mm and the new region's
        equivalent diameter. [mm]

    Returns
    -------
    a copy of ``new_ind`` with ``old_id``, ``depth_old_mm``, ``growth_mm``
    (depth_max − depth_old), ``growth_rate_mm_y`` and ``status``: ``"new"`` (no older
    region), ``"grown"`` (growth > growth_sigma_mm, domain.md §3 noise rule) or
    ``"stable"``. ``growth_rate_mm_y`` is growth ÷ Δt for grown regions, 0 for stable
    ones (a change within the noise is not growth), NaN for new ones.

    Notes
    -----
    Each new region takes the older region it overlaps most (cell count); several new
    regions may share one older region (a pit that split) and one new region may cover
    several older ones (pits that merged: the most-overlapping one is the match, the
    deepest older depth among all overlapped ones is used).
    """
    if not (dt_years > 0):
        raise InputError(f"{where(None, None, 'dt_years')}: must be > 0, got {dt_years!r}")
    if new_labels.shape != old_labels.shape:
        raise InputError(f"{where(None, None, 'old_labels')}: label maps on different grids")
    out = new_ind.copy()
    n_new = len(new_ind)
    old_id = np.full(n_new, -1, dtype=np.int64)
    depth_old = np.full(n_new, np.nan)
    if n_new and len(old_ind):
        old_depth_by_id = pd.Series(old_ind["depth_max_mm"].to_numpy(),
                                    index=old_ind["id"].to_numpy())
        both = (new_labels > 0) & (old_labels > 0)
        nl = new_labels[both].astype(np.int64)
        ol = old_labels[both].astype(np.int64)
        if nl.size:
            pairs, counts = np.unique(np.stack([nl, ol]), axis=1, return_counts=True)
            od = old_depth_by_id.reindex(pairs[1]).to_numpy()
            order = np.lexsort((pairs[1], -counts, pairs[0]))
            first = np.r_[True, pairs[0, order][1:] != pairs[0, order][:-1]]
            best_new = pairs[0, order][first]
            best_old = pairs[1, order][first]
            deepest = pd.Series(od).groupby(pairs[0]).max()
            row_of = pd.Series(np.arange(n_new), index=new_ind["id"].to_numpy())
            rows = row_of.reindex(best_new).to_numpy()
            ok = ~np.isnan(rows)
            rows = rows[ok].astype(np.int64)
            old_id[rows] = best_old[ok]
            depth_old[rows] = deepest.reindex(best_new[ok]).to_numpy()
        # fallback: nearest older centroid for regions that overlap nothing
        todo = np.flatnonzero(old_id < 0)
        if todo.size:
            from scipy.spatial import cKDTree

            tree = cKDTree(old_ind[["x_mm", "y_mm"]].to_numpy())
            pts = new_ind[["x_mm", "y_mm"]].to_numpy()[todo]
            dist, j = tree.query(pts, k=1)
            if max_distance_mm is None:
                eq_d = 2 * np.sqrt(new_ind["area_m2"].to_numpy()[todo] * 1e6 / np.pi)
                lim = np.maximum(50.0, eq_d)
            else:
                lim = np.full(todo.size, float(max_distance_mm))
            take = dist <= lim
            old_id[todo[take]] = old_ind["id"].to_numpy()[j[take]]
            depth_old[todo[take]] = old_ind["depth_max_mm"].to_numpy()[j[take]]
    growth = out["depth_max_mm"].to_numpy(dtype=np.float64) - depth_old
    matched = old_id >= 0
    grown = matched & (growth > growth_sigma_mm)
    status = np.where(~matched, "new", np.where(grown, "grown", "stable"))
    rate = np.where(grown, growth / dt_years, np.where(matched, 0.0, np.nan))
    out["old_id"] = pd.array(np.where(matched, old_id, 0), dtype="Int64")
    out.loc[~matched, "old_id"] = pd.NA
    out["depth_old_mm"] = depth_old
    out["growth_mm"] = growth
    out["growth_rate_mm_y"] = rate
    out["status"] = status
    return out


def _region_fraction(cells: _Cells, mask: np.ndarray) -> np.ndarray:
    """Share of each region's cells where ``mask`` is True. [-]"""
    inside = cells.reduce(np.add, np.asarray(mask, dtype=np.float64))
    size = np.diff(np.r_[cells.starts, cells.lab.size])
    return inside / np.maximum(size, 1)


def _touches(labels: np.ndarray, cells: _Cells, gap: np.ndarray, floor_edge: np.ndarray
             ) -> np.ndarray:
    """Per region: does a cell of it, or one of its 8 neighbours, lie in ``gap``?  Cells
    beyond the grid count as ``gap`` where the border cell next to them is ``floor_edge``."""
    rows, cols = labels.shape
    pad = np.pad(gap, 1, mode="constant", constant_values=False)
    # beyond the grid: the scan ends there while the floor goes on
    pad[0, 1:-1] |= floor_edge[0]
    pad[-1, 1:-1] |= floor_edge[-1]
    pad[1:-1, 0] |= floor_edge[:, 0]
    pad[1:-1, -1] |= floor_edge[:, -1]
    pad[0, 0] |= floor_edge[0, 0]
    pad[0, -1] |= floor_edge[0, -1]
    pad[-1, 0] |= floor_edge[-1, 0]
    pad[-1, -1] |= floor_edge[-1, -1]
    r, c = np.divmod(cells.idx, cols)
    hit = np.zeros(cells.idx.size, dtype=bool)
    for dr in (0, 1, 2):
        for dc in (0, 1, 2):
            hit |= pad[r + dr, c + dc]
    return np.logical_or.reduceat(hit, cells.starts) if cells.n else np.zeros(0, dtype=bool)


def _repair_dates(cells: _Cells, shape, repaired, repair_dates):
    """Per region: the latest repair date among the dated areas it lies in (None if none)
    and the map of every repaired cell (``repaired`` or a dated area)."""
    n = cells.n
    latest = [None] * n
    if repair_dates is None:
        return latest, repaired
    if isinstance(repair_dates, _dt.date):
        records = [(repaired, repair_dates)]
    else:
        records = list(repair_dates)
    every = repaired.copy()
    for mask, date in records:
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != shape:
            raise InputError(f"{where(None, None, 'repair_dates')}: a repair area is on a grid of "
                             f"{mask.shape}, not {shape}")
        every |= mask
        hit = np.flatnonzero(_region_fraction(cells, mask) > 0)
        for k in hit:
            if latest[k] is None or date > latest[k]:
                latest[k] = date
    return latest, every


def flag_indications(matched: pd.DataFrame, labels: np.ndarray, *, covered_new: np.ndarray,
                     covered_old: np.ndarray, dt_years: float, floor: np.ndarray | None = None,
                     repaired: np.ndarray | None = None, repair_dates=None,
                     inspected: _dt.date | None = None, min_repaired_fraction: float = 0.5
                     ) -> pd.DataFrame:
    """Statuses the matching alone cannot see: ``repaired`` and ``partly unscanned``.

    Parameters
    ----------
    matched : the result of :func:`match_indications` (rows with ``id`` = label). [-]
    labels : the newer scan's indication label map. [-]
    covered_new : the newer scan's coverage (``np.isfinite(new.thickness)``). [-]
    covered_old : the older scan's coverage on the newer grid
        (``np.isfinite(old_on_new.thickness)``, the older scan resampled onto the newer
        grid, NaN = not covered). [-]
    dt_years : years between the inspections. [y]
    floor : cells inside the floor (``zone_map.labels >= 0``); None = every cell of the
        grid. [-]
    repaired : cells repaired since the older scan (``LossRates.repaired``: thicker than
        before beyond the noise, or inside a repair record dated after the older scan);
        None = none. [-]
    repair_dates : None, one date (of every ``repaired`` cell), or a sequence of
        ``(mask, date)`` pairs, one per repair area of the job's repairs file dated after
        the older inspection (their masks count as repaired too). [-]
    inspected : the newer inspection's date; needed with ``repair_dates``. [-]
    min_repaired_fraction : smallest share of an indication's cells in a repaired area for
        the indication to be ``repaired``. [-]

    Returns
    -------
    a copy of ``matched`` in which

    * ``status = "repaired"`` where at least ``min_repaired_fraction`` of the cells lie in a
      repaired area: ``repair_date`` (ISO, the latest dated area it lies in; ``""`` when
      unknown), ``regrowth_mm`` = its loss now (``depth_max_mm``: the repair restored full
      thickness), ``regrowth_rate_mm_y`` = regrowth ÷ years since the repair, or ÷
      ``dt_years`` when the date is unknown (then a lower bound: the repair came after the
      older scan), and ``growth_rate_mm_y`` NaN (the difference between the scans,
      ``growth_mm``, spans the repair and is no growth);
    * else ``status = "partly unscanned"`` (to prove up) where a cell of the indication, or
      one of its 8 neighbours, inside the floor was not covered by either scan, or the
      indication reaches the edge of the newer grid inside the floor: its depth, its older
      depth and so its growth may lie in the unscanned part. ``old_id``, ``depth_old_mm``
      and ``growth_mm`` are kept as matched.

    Rows without a label (``id`` NA) are left as they are.

    Notes
    -----
    domain.md §3: a cell thicker than before beyond the noise was repaired, replaced or
    misaligned, not negatively corroded; misalignment makes thin rims at the edges of
    pits, which the ``min_repaired_fraction`` rule keeps from marking a pit repaired.
    """
    if not (dt_years > 0):
        raise InputError(f"{where(None, None, 'dt_years')}: must be > 0, got {dt_years!r}")
    labels = np.asarray(labels)
    for name, m in (("covered_new", covered_new), ("covered_old", covered_old), ("floor", floor),
                    ("repaired", repaired)):
        if m is not None and np.shape(m) != labels.shape:
            raise InputError(f"{where(None, None, name)}: map of {np.shape(m)} on a grid of "
                             f"{labels.shape}")
    if repair_dates is not None and inspected is None:
        raise InputError(f"{where(None, None, 'inspected')}: the newer inspection's date is "
                         "needed with repair_dates")
    out = matched.copy()
    n = int(labels.max()) if labels.size else 0
    if n == 0 or not len(out):
        return out
    cells = _Cells(labels, n)
    floor = np.ones(labels.shape, dtype=bool) if floor is None else np.asarray(floor, dtype=bool)
    gap = floor & ~(np.asarray(covered_new, dtype=bool) & np.asarray(covered_old, dtype=bool))
    cut = _touches(labels, cells, gap, floor)
    rep0 = (np.zeros(labels.shape, dtype=bool) if repaired is None
            else np.asarray(repaired, dtype=bool))
    dates, rep_all = _repair_dates(cells, labels.shape, rep0, repair_dates)
    is_rep = _region_fraction(cells, rep_all) >= min_repaired_fraction

    ids = pd.to_numeric(out["id"], errors="coerce").to_numpy(dtype=np.float64)
    has = np.isfinite(ids) & (ids >= 1) & (ids <= n)
    k = np.where(has, ids, 1).astype(np.int64) - 1
    rep_row = has & is_rep[k]
    cut_row = has & ~rep_row & cut[k]
    status = out["status"].to_numpy(dtype=object).copy()
    status[rep_row] = "repaired"
    status[cut_row] = "partly unscanned"
    out["status"] = status
    depth = out["depth_max_mm"].to_numpy(dtype=np.float64)
    years = np.full(len(out), float(dt_years))
    rdate = np.array([""] * len(out), dtype=object)
    for row in np.flatnonzero(rep_row):
        d = dates[k[row]]
        if d is not None:
            rdate[row] = d.isoformat()
            years[row] = years_between(d, inspected)
    with np.errstate(divide="ignore", invalid="ignore"):
        rate = np.where(years > 0, depth / years, np.nan)
    out["repair_date"] = np.where(rep_row, rdate, out["repair_date"].to_numpy(dtype=object))
    out["regrowth_mm"] = np.where(rep_row, depth, out["regrowth_mm"].to_numpy(dtype=np.float64))
    out["regrowth_rate_mm_y"] = np.where(rep_row, rate,
                                         out["regrowth_rate_mm_y"].to_numpy(dtype=np.float64))
    out.loc[rep_row, "growth_rate_mm_y"] = np.nan
    return out


#: Statuses whose rate is measured between the two scans (:func:`new_indication_rates`).
MEASURED_STATUSES = ("grown", "stable")


def _population_rates(ind: pd.DataFrame, *, quantile: float, min_grown: int):
    """The population term of :func:`new_indication_rates`, per row: (rate, basis)."""
    status = ind["status"].to_numpy(dtype=object)
    rate = ind["rate_max_mm_y"].to_numpy(dtype=np.float64)
    rate = np.where(np.isfinite(rate), rate, ind["growth_rate_mm_y"].to_numpy(dtype=np.float64))
    side = ind["side"].astype(str).to_numpy()
    zone = ind["zone"].astype(str).to_numpy()
    grown = (status == "grown") & np.isfinite(rate)
    measured = np.isin(status, MEASURED_STATUSES) & np.isfinite(rate)
    p = f"p{100 * quantile:g}"
    cache: dict = {}
    out_rate = np.full(len(ind), np.nan)
    out_basis = np.array([""] * len(ind), dtype=object)
    for i in range(len(ind)):
        key = (zone[i], side[i])
        if key not in cache:
            same_side = side == side[i]
            g_zone = rate[grown & same_side & (zone == zone[i])]
            g_floor = rate[grown & same_side]
            m_side = rate[measured & same_side]
            if g_zone.size >= min_grown:
                val = (float(np.quantile(g_zone, quantile)),
                       f"{p} of grown ({zone[i]}, {side[i]}, n={g_zone.size})")
            elif g_floor.size >= min_grown:
                val = (float(np.quantile(g_floor, quantile)),
                       f"{p} of grown (floor fallback, {side[i]}, n={g_floor.size})")
            elif m_side.size:
                val = (float(m_side.max()),
                       f"greatest measured rate (floor fallback, {side[i]}, n={m_side.size})")
            else:
                val = (np.nan, "")
            cache[key] = val
        out_rate[i], out_basis[i] = cache[key]
    return out_rate, out_basis


def new_indication_rates(ind: pd.DataFrame, *, dt_years: float, quantile: float = 0.9,
                         min_grown: int = 5, late_start_fraction: float = 0.25) -> pd.DataFrame:
    """The rate each indication is assessed at, and where it comes from.

    An indication absent from the older scan has no measured rate: its loss over the whole
    interval is only a lower bound (the pit may have begun at any time since). Such
    indications are given a documented conservative rate.

    Parameters
    ----------
    ind : the indication list after :func:`match_indications` (and
        :func:`flag_indications`), with ``rate_max_mm_y`` filled (the region's greatest
        governing rate). [-]
    dt_years : years between the inspections. [y]
    quantile : upper quantile of the grown indications' measured rates. [-]
    min_grown : fewest grown indications a quantile is taken of. [-]
    late_start_fraction : the part of the interval a new pit is assumed to have grown in. [-]

    Returns
    -------
    DataFrame on ``ind``'s index with ``rate_assumed_mm_y`` [mm/y] and ``rate_basis`` (text).

    Notes
    -----
    The rule (a working assumption, no published source; domain.md §3: a pit that began
    late grows faster than its long-term rate says):

    * ``grown`` / ``stable``: the measured rate, ``rate_max_mm_y`` (basis ``measured``).
    * ``new`` (no older region): the greatest of

      1. its own bound, ``rate_max_mm_y`` (the loss over the whole interval);
      2. the population term: the ``quantile`` of the measured rates (``rate_max_mm_y``)
         of the ``grown`` indications on the same side of the same zone when there are at
         least ``min_grown`` of them; else of the same side's grown indications on the whole
         floor (at least ``min_grown``); else the greatest measured rate (grown or stable)
         on that side; else none;
      3. the late-start term: ``depth_max_mm / (late_start_fraction · dt_years)``, the pit
         taken to have begun in the last ``late_start_fraction`` of the interval.

      The basis names the term that governs, e.g. ``new: late start (depth ÷ 2.5 y)`` or
      ``new: p90 of grown (interior, under, n=7)``.
    * ``repaired`` with a repair date: the greater of ``rate_max_mm_y`` and
      ``regrowth_rate_mm_y`` (basis ``repaired <date>: regrowth since the repair``); without
      a date, as ``new`` with ``regrowth_rate_mm_y`` (÷ the whole interval) as its own bound.
    * ``partly unscanned``: as ``new`` when unmatched; when matched to an older region (so
      not late-begun) the greater of its own rate and the population term.
    * anything else (``""``, ``not found``): NaN, basis ``""``.

    Only the late-start term bounds a pit that began well after the older scan: the grown
    indications began before it and grew over a longer time, so their rates are lower.
    """
    if not (dt_years > 0):
        raise InputError(f"{where(None, None, 'dt_years')}: must be > 0, got {dt_years!r}")
    if not (0 < quantile <= 1):
        raise InputError(f"{where(None, None, 'quantile')}: must be in (0, 1], got {quantile!r}")
    if not (0 < late_start_fraction <= 1):
        raise InputError(f"{where(None, None, 'late_start_fraction')}: must be in (0, 1], "
                         f"got {late_start_fraction!r}")
    n = len(ind)
    status = ind["status"].to_numpy(dtype=object)
    own = ind["rate_max_mm_y"].to_numpy(dtype=np.float64)
    regrowth = (ind["regrowth_rate_mm_y"].to_numpy(dtype=np.float64)
                if "regrowth_rate_mm_y" in ind else np.full(n, np.nan))
    rdate = (ind["repair_date"].fillna("").astype(str).to_numpy()
             if "repair_date" in ind else np.array([""] * n))
    old_id = ind["old_id"] if "old_id" in ind else pd.Series([pd.NA] * n)
    matched = old_id.notna().to_numpy()
    pop, pop_basis = _population_rates(ind, quantile=quantile, min_grown=min_grown)
    late_years = late_start_fraction * dt_years
    late = ind["depth_max_mm"].to_numpy(dtype=np.float64) / late_years
    rate = np.full(n, np.nan)
    basis = np.array([""] * n, dtype=object)
    for i in range(n):
        s = status[i]
        if s in MEASURED_STATUSES:
            rate[i], basis[i] = own[i], "measured"
            continue
        if s == "repaired" and rdate[i]:
            terms = [(own[i], "measured"), (regrowth[i], "regrowth since the repair")]
            prefix = f"repaired {rdate[i]}"
        elif s == "repaired":
            terms = [(np.fmax(own[i], regrowth[i]), "own bound (regrowth over the interval)"),
                     (pop[i], pop_basis[i]), (late[i], f"late start (depth ÷ {late_years:.3g} y)")]
            prefix = "repaired, date unknown"
        elif s == "new" or (s == "partly unscanned" and not matched[i]):
            terms = [(own[i], "own bound (loss over the interval)"), (pop[i], pop_basis[i]),
                     (late[i], f"late start (depth ÷ {late_years:.3g} y)")]
            prefix = s
        elif s == "partly unscanned":
            terms = [(own[i], "measured on the scanned part"), (pop[i], pop_basis[i])]
            prefix = s
        else:
            continue
        vals = np.array([v if np.isfinite(v) else -np.inf for v, _ in terms])
        j = int(np.argmax(vals))
        if np.isfinite(vals[j]):
            rate[i], basis[i] = vals[j], f"{prefix}: {terms[j][1]}"
    return pd.DataFrame({"rate_assumed_mm_y": rate, "rate_basis": basis}, index=ind.index)


def apply_indication_rates(rate_top: np.ndarray, rate_under: np.ndarray, labels: np.ndarray,
                           ind: pd.DataFrame, *, unknown_side: str = "under"):
    """Raise the rate maps to the assumed rate on the cells of indications whose rate is not
    measured, so that the co-located life uses it.

    Parameters
    ----------
    rate_top, rate_under : governing rate maps of each side (``LossRates.rate_top``,
        ``rate_under``), NaN = no rate. [mm/y]
    labels : the newer scan's indication label map (``ind.id`` = label). [-]
    ind : the indication list with ``rate_assumed_mm_y`` and ``rate_basis``
        (:func:`new_indication_rates`). [-]
    unknown_side : the side whose map takes indications of ``side = "unknown"`` (the
        job's default side). [-]

    Returns
    -------
    (rate_top, rate_under): new arrays, each cell the greater of its rate (NaN counts as
    none) and the assumed rate of the indication it belongs to on that side; rates are
    only raised, never lowered. Indications with basis ``measured`` (or ``""``) are left
    as they are (their cells keep their own measured rates). [mm/y]
    """
    if unknown_side not in ("top", "under"):
        raise InputError(f"{where(None, None, 'unknown_side')}: must be 'top' or 'under', "
                         f"got {unknown_side!r}")
    labels = np.asarray(labels)
    if not (np.shape(rate_top) == np.shape(rate_under) == labels.shape):
        raise InputError(f"{where(None, None, 'labels')}: rate maps and label map on different "
                         "grids")
    top = np.array(rate_top, copy=True)
    under = np.array(rate_under, copy=True)
    n = int(labels.max()) if labels.size else 0
    if n == 0 or not len(ind):
        return top, under
    ids = pd.to_numeric(ind["id"], errors="coerce").to_numpy(dtype=np.float64)
    rate = ind["rate_assumed_mm_y"].to_numpy(dtype=np.float64)
    basis = ind["rate_basis"].fillna("").astype(str).to_numpy()
    side = ind["side"].astype(str).to_numpy()
    side = np.where(side == "unknown", unknown_side, side)
    use = (np.isfinite(ids) & (ids >= 1) & (ids <= n) & np.isfinite(rate)
           & (basis != "measured") & (basis != ""))
    cells = _Cells(labels, n)
    for name, arr in (("top", top), ("under", under)):
        by_label = np.full(n + 1, np.nan, dtype=np.float64)
        pick = use & (side == name)
        by_label[ids[pick].astype(np.int64)] = rate[pick]
        want = by_label[cells.lab]
        ok = np.isfinite(want)
        flat = arr.reshape(-1)
        cur = flat[cells.idx[ok]]
        flat[cells.idx[ok]] = np.fmax(cur, want[ok].astype(arr.dtype))
    return top, under


def assumed_rate_note(ind: pd.DataFrame) -> str | None:
    """One sentence for the report's assumptions: how many indications are assessed at an
    assumed, not measured, rate (None when there are none).

    Parameters
    ----------
    ind : the indication list with ``rate_basis`` (:func:`new_indication_rates`). [-]
    """
    if "rate_basis" not in ind or not len(ind):
        return None
    basis = ind["rate_basis"].fillna("").astype(str)
    # measured: "measured", and a dated repair's "repaired <date>: ..." (its regrowth since
    # the repair); assumed: the rest ("new: ...", "partly unscanned: ...", "repaired, date
    # unknown: ...")
    assumed = (basis != "") & (basis != "measured") & ~basis.str.startswith("repaired ")
    if not assumed.any():
        return None
    counts = ind.loc[assumed, "status"].value_counts()
    parts = ", ".join(f"{int(v)} {k}" for k, v in counts.items())
    return (f"{int(assumed.sum())} indications ({parts}) have no measured rate (absent from, or "
            "cut by the coverage of, the older scan, or repaired at an unknown date): the "
            "rate of their loss over the interval is only a lower bound, and each is assessed "
            "at an assumed conservative rate (the greatest of that bound, an upper quantile "
            "of the grown indications' measured rates on the same side, and for a pit absent "
            "from the older scan its depth over the last part of the interval), given with its basis in indications.csv "
            "(rate_assumed_mm_y, rate_basis).")


def gone_indications(old_ind: pd.DataFrame, matched: pd.DataFrame) -> pd.DataFrame:
    """Older indications matched by no newer one (repaired, replaced, or mis-sized).

    Parameters
    ----------
    old_ind : the older scan's table (on the newer grid). [-]
    matched : the result of :func:`match_indications`. [-]

    Returns
    -------
    the unmatched rows of ``old_ind`` with ``status = "not found"``.
    """
    used = set(matched["old_id"].dropna().astype(int).tolist())
    out = old_ind[~old_ind["id"].isin(used)].copy()
    out["status"] = "not found"
    return out


def write_indications_csv(df: pd.DataFrame, path, *, radius_mm=None, centre=(0.0, 0.0), pitch_mm=None,
                          inch_columns: bool = False) -> None:
    """Write ``indications.csv`` (design.md §3.5), atomically (temporary file + rename).

    Coordinates are rounded to :func:`~scananalyse.locate.coordinate_step` of the pitch
    (1 mm without one), depths and thicknesses to 0.01 mm, rates to 0.001 mm/y, areas
    to 0.0001 m²; no plate is an empty cell.  Given the shell radius, ``clock`` (clock
    position from the datum) and ``from_shell_mm`` follow ``y_mm``
    (:func:`~scananalyse.locate.add_location_columns`).

    Parameters
    ----------
    df : table from :func:`find_indications` / :func:`match_indications`. [-]
    path : output file. [-]
    radius_mm : inside radius of the shell; None leaves out the location columns. [mm]
    centre : tank centre in the floor frame. [mm]
    pitch_mm : scan pitch, for the rounding step of coordinates. [mm]
    inch_columns : inch and mils-per-year columns beside the SI ones (``--csv-units in``). [-]
    """
    from .locate import add_location_columns, coordinate_step

    path = os.fspath(path)
    cols = [c for c in INDICATION_COLUMNS if c in df.columns]
    out = df[cols].copy()
    step = coordinate_step(pitch_mm)
    for c in cols:
        if c.startswith(("x_", "y_")) and c.endswith("_mm"):
            out[c] = np.round(out[c].astype(float) / step) * step
        elif c.endswith("_mm_y"):
            out[c] = out[c].astype(float).round(3)
        elif c.endswith("_mm"):
            out[c] = out[c].astype(float).round(2)
        elif c == "area_m2":
            out[c] = out[c].astype(float).round(4)
    if "plate" in out.columns:
        pl = pd.to_numeric(out["plate"], errors="coerce")
        out["plate"] = [str(int(v)) if np.isfinite(v) and v >= 0 else "" for v in pl]
    if radius_mm is not None and "x_mm" in out.columns and "y_mm" in out.columns:
        out = add_location_columns(out, radius_mm=radius_mm, centre=centre, pitch_mm=pitch_mm)
    from .io.tables import write_csv

    write_csv(out, path, inch_columns=inch_columns)  # atomic; text cells neutralised against formulas



def reporting_depth(scan) -> float:
    """Smallest loss an indication is made of.

    Parameters
    ----------
    scan : FloorScan
        The scan whose indications are listed.

    Returns
    -------
    float
        The scan's detection threshold, or 10 % of nominal when it has none (common
        practice; no published source). [mm]
    """
    thr = scan.meta.threshold
    return float(thr) if thr else 0.1 * scan.meta.nominal
