"""Indications: connected regions of loss at or above a reporting depth, and their
matching across two inspections (status new / grown / stable).

Regions are labelled with :func:`skimage.measure.label` (8-connectivity) and
measured with :func:`skimage.measure.regionprops_table`; per-region maxima, minima
and majorities are computed by sorting the labelled cells once (no per-region loop
over cells). Matching is by label overlap on the newer grid (the older scan
resampled onto it), with a centroid-distance fallback for regions that moved by
less than a region's size (registration residue) but no longer overlap.
"""

from __future__ import annotations

import math
import os
import tempfile

import numpy as np
import pandas as pd

from .errors import InputError, where
from .outputs import publish_file
from .scan import SIDE_NAMES, SIDE_UNKNOWN

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


def write_indications_csv(df: pd.DataFrame, path) -> None:
    """Write ``indications.csv`` (design.md §3.5), atomically (temporary file + rename).

    Parameters
    ----------
    df : table from :func:`find_indications` / :func:`match_indications`. [-]
    path : output file. [-]
    """
    path = os.fspath(path)
    cols = [c for c in INDICATION_COLUMNS if c in df.columns]
    out = df[cols].copy()
    for c in cols:
        if c.endswith("_mm") or c.endswith("_mm_y"):
            out[c] = out[c].astype(float).round(4)
        elif c == "area_m2":
            out[c] = out[c].astype(float).round(6)
    d = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(prefix=".indications-", suffix=".csv", dir=d)
    try:
        with os.fdopen(fd, "w", newline="", encoding="utf-8") as fh:
            out.to_csv(fh, index=False)
        publish_file(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise

