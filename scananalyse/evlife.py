r"""Extreme-value life of a floor zone: when the deepest loss expected over the whole zone,
scanned or not, reaches the zone's corrosion allowance.

Each cell's loss grows at its own measured rates (top + underside); the deepest projected
loss over the zone is the greater of the deepest among the scanned cells and a high
quantile of the largest of T block maxima of the distribution fitted to the projected
block maxima (the part nobody scanned).  The fits are those of :mod:`scananalyse.extremes`
(Gumbel or GEV by the likelihood-ratio test, left-censored at the detection threshold).

Everything here is a pure function of arrays and the zone map; the pipeline
(:func:`scananalyse.pipeline.analyse`) calls :func:`zone_lives` once for the floor as
found and once as repaired.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd

from .errors import FitError, ScanWarning
from .extremes import (depth_map, fit_gev_mle, fit_gumbel_mle, fit_zone, max_quantile,
                       projected_block_maxima)

__all__ = ["LIFE_LEVEL", "LIFE_HORIZON_Y", "EVA_COLUMNS", "masked_nanmin", "zone_lives", "merge_extremes",
           "add_eva_columns"]

#: Probability that the deepest projected loss in the unscanned part stays below the value
#: used for the extreme-value life. [-]
LIFE_LEVEL = 0.95
#: Longest horizon searched for the extreme-value life; beyond it the life is reported
#: as this value (every interval cap is shorter). [y]
LIFE_HORIZON_Y = 60.0


def masked_nanmin(values, mask, rows: int = 256):
    """``np.nanmin(values[mask])`` computed a band of rows at a time (no zone-sized copy).

    Parameters
    ----------
    values : (M, N) array_like
        Any map. [any]
    mask : (M, N) bool ndarray
        Cells to look at. [-]
    rows : int
        Rows per band. [-]

    Returns
    -------
    scalar
        The smallest non-NaN value under the mask, of the values' dtype; NaN if no cell of
        the mask has a value.
    """
    v = np.asarray(values)
    best = None
    for r0 in range(0, v.shape[0], rows):
        sel = v[r0:r0 + rows][mask[r0:r0 + rows]]
        sel = sel[~np.isnan(sel)]
        if sel.size:
            m = sel.min()
            best = m if best is None or m < best else best
    return v.dtype.type(np.nan) if best is None else best


def zone_lives(thickness, rate_top, rate_under, mrt, zmap, *, nominal, censored, threshold, pitch,
               block_mm, seed, methods: dict | None = None) -> dict:
    r"""Extreme-value life per zone: when the deepest loss expected over the whole zone
    reaches the zone's allowance (nominal − MRT), each cell's loss growing at its own rates.

    Parameters
    ----------
    thickness : (M, N) ndarray
        Remaining thickness, NaN where not scanned. [mm]
    rate_top, rate_under : (M, N) ndarray
        Governing top-side and underside rates (negative and NaN count as 0). [mm/y]
    mrt : (M, N) ndarray
        Minimum remaining thickness per cell. [mm]
    zmap : :class:`~scananalyse.zones.ZoneMap`
        Zone labels, names and whole-zone areas.
    nominal : float
        Nominal plate thickness. [mm]
    censored : (M, N) bool ndarray or None
        Cells reported as nominal whose true loss is below the threshold. [-]
    threshold : float or None
        Detection threshold (left-censoring of the block maxima). [mm]
    pitch : float
        Cell size. [mm]
    block_mm : float
        Configured block side (see :func:`~scananalyse.extremes.fit_zone`). [mm]
    seed : int
        Seed of the bootstrap bounds. [-]
    methods : dict, optional
        Zone name -> the zone's depth statistics at H = 0
        (:func:`~scananalyse.extremes.depth_statistics`), reused when given.

    Returns
    -------
    dict
        Zone name -> ``{"life_eva_y": float or None, "method": str, "reason": str}``;
        zones with no scanned cell are left out.

    Notes
    -----
    For a horizon H the projected loss of a cell is

    .. math:: d(H) = d_0 + (r_\mathrm{top} + r_\mathrm{under})\,H

    (rates stay co-located, unlike combining the deepest pit with the fastest rate found
    anywhere).  The deepest projected loss over the zone is
    :math:`D(H) = \max(\max_\mathrm{scanned} d(H),\; x_p(H))`, where :math:`x_p` is the
    :data:`LIFE_LEVEL` quantile *p* of the largest of T block maxima, :math:`F_H(x_p)^T = p`, with F_H fitted to the projected block maxima (censored at the
    threshold) and T = unscanned zone area / block area (at least 1), the return-period
    reading of block maxima of Shibata [1]_.  The quantile is from the fitted parameters;
    their own uncertainty is in ``depth_eva_upper_mm`` and ``depth_pred_upper_mm``.
    The life is the root of :math:`D(H) = t_\mathrm{nom} - \mathrm{MRT}` (Brent's method,
    within 0.05 y on the short side), 0 if the allowance is already used up at H = 0, and
    :data:`LIFE_HORIZON_Y` if it is not reached within it.  The distribution (Gumbel or
    GEV, chosen by the likelihood-ratio test of Coles [2]_ §3.3) is chosen once at H = 0;
    a fit that fails counts the allowance as used up (conservative).

    References
    ----------
    .. [1] T. Shibata, "Application of extreme value statistics to corrosion",
       J. Res. NIST 99 (1994) 327-336.
    .. [2] S. Coles, *An Introduction to Statistical Modeling of Extreme Values*,
       Springer, 2001.
    """
    scanned = np.isfinite(thickness)
    depth0 = depth_map(thickness, nominal, censored)
    rate = np.fmax(np.asarray(rate_top, dtype=np.float32), np.float32(0))  # fmax: NaN -> 0 as well
    rate += np.fmax(np.asarray(rate_under, dtype=np.float32), np.float32(0))
    out = {}
    for k, name in enumerate(zmap.names):
        mask = zmap.labels == k
        if not (scanned & mask).any() or not float(zmap.areas_mm2[k]) > 0:
            continue
        allowance = float(nominal - masked_nanmin(np.asarray(mrt, dtype=np.float32), mask))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ScanWarning)
            out[name] = _zone_life(depth0, rate, scanned, mask, float(zmap.areas_mm2[k]), allowance,
                                   z0=(methods or {}).get(name), threshold=threshold, pitch=pitch,
                                   block_mm=block_mm, seed=seed)
    del depth0, rate
    return out


def _zone_life(depth0, rate, scanned, mask, area_mm2, allowance, *, z0, threshold, pitch, block_mm,
               seed) -> dict:
    """One zone of :func:`zone_lives`."""
    in_zone = scanned & mask
    hidden_mm2 = max(0.0, area_mm2 - np.count_nonzero(in_zone) * pitch * pitch)
    if z0 is None:  # the depth fit at H = 0 is the zone's depth statistics
        z0 = fit_zone(depth0, mask, pitch_mm=pitch, zone_area_mm2=max(hidden_mm2, 1.0), block_mm=block_mm,
                      threshold=threshold or None, seed=seed, valid=scanned)
    if not z0:
        return {"life_eva_y": None, "method": "", "reason": z0.reason}
    method = "gev" if z0.fit is not None and getattr(z0.fit, "distribution", "") == "gev" else "mle"
    b_cells = max(1, int(round((z0.block_mm if np.isfinite(z0.block_mm) else block_mm) / pitch)))
    T_hidden = max(1.0, hidden_mm2 / (b_cells * pitch) ** 2)
    thr = threshold or None
    # the previous horizon's GEV (first: the depth fit at H = 0): a warm start for the next
    last = [(z0.fit.loc, z0.fit.scale, z0.fit.shape) if method == "gev" else None]

    def fitter(x, censored, threshold):
        if method != "gev":
            return fit_gumbel_mle(x, censored=censored, threshold=threshold)
        f = fit_gev_mle(x, censored=censored, threshold=threshold, start=last[0])
        last[0] = (f.loc, f.scale, f.shape)
        return f

    projector = []  # built on the first call: the zone's cells, tile by tile

    def excess(h):
        if not projector:
            projector.append(projected_block_maxima(depth0, rate, valid=in_zone, block_cells=b_cells,
                                                    min_coverage=0.5, threshold=thr))
        seen = projector[0].deepest(h)  # the deepest projected loss among the scanned cells
        if hidden_mm2 <= 0:
            return seen - allowance
        if h == 0:
            fit = z0.fit  # the zone's depth fit is the fit of these very block maxima
        else:
            bm = projector[0](h)
            x, cens = bm.maxima, bm.censored
            if thr is None:
                x, cens = x[~cens], None
            try:
                fit = fitter(x, censored=cens, threshold=thr)
            except FitError:
                fit = None
        # no estimate: take the allowance as used up (conservative)
        hidden = np.inf if fit is None else float(max_quantile(fit, T_hidden, LIFE_LEVEL))
        return max(seen, hidden) - allowance

    if excess(0.0) >= 0:
        life = 0.0
    elif excess(LIFE_HORIZON_Y) < 0:
        life = LIFE_HORIZON_Y
    else:
        from scipy.optimize import brentq

        # the excess grows with H (every projected loss does); the root is taken 0.05 y
        # on the short side
        life = max(0.0, brentq(excess, 0.0, LIFE_HORIZON_Y, xtol=0.02) - 0.05)
    # the closures above are kept alive by reference cycles until a garbage collection:
    # let go of the zone's grids now
    projector.clear()
    return {"life_eva_y": life, "method": z0.row().get("eva_method", ""), "reason": ""}


def merge_extremes(ext_depth: dict, ext_rate: dict, ext_life: dict | None = None) -> dict:
    """The per-zone extreme-value figures :func:`~scananalyse.assess.assess_zones` takes.

    Parameters
    ----------
    ext_depth, ext_rate : dict
        Zone name -> :class:`~scananalyse.extremes.ZoneExtremes` of loss depth and of the
        summed rate (:func:`~scananalyse.extremes.depth_statistics`,
        :func:`~scananalyse.extremes.rate_statistics`).
    ext_life : dict, optional
        :func:`zone_lives`.

    Returns
    -------
    dict
        Zone name -> ``depth_eva_mm``, ``depth_eva_upper_mm``, ``depth_pred_upper_mm`` [mm],
        ``rate_eva_mm_y`` [mm/y] and ``life_eva_y`` [y], for the zones with a depth fit.
    """
    out = {}
    for name, d in ext_depth.items():
        if not d:
            continue
        r = ext_rate.get(name)
        lz = (ext_life or {}).get(name)
        out[name] = {"depth_eva_mm": d.depth_eva_mm, "depth_eva_upper_mm": d.depth_eva_upper_mm,
                     "depth_pred_upper_mm": d.depth_pred_upper_mm,
                     "rate_eva_mm_y": (r.depth_eva_mm if r else None),
                     "life_eva_y": (lz["life_eva_y"] if lz else None)}
    return out


#: The extreme-value columns :func:`add_eva_columns` appends from the depth statistics.
EVA_COLUMNS = ["depth_pred_upper_mm", "eva_method", "eva_T", "eva_block_mm", "eva_n_blocks", "eva_n_censored",
               "eva_gev_p", "eva_reason"]


def add_eva_columns(table: pd.DataFrame, ext_depth: dict, ext_life: dict) -> pd.DataFrame:
    """Append the extreme-value fits' particulars per zone to a zone table.

    Parameters
    ----------
    table : DataFrame
        Per-zone table with a ``zone`` column (:func:`~scananalyse.assess.assess_zones`).
    ext_depth : dict
        Zone name -> depth statistics (:func:`~scananalyse.extremes.depth_statistics`).
    ext_life : dict
        :func:`zone_lives`.

    Returns
    -------
    DataFrame
        ``table`` with :data:`EVA_COLUMNS`, ``life_eva_method`` and ``life_eva_reason``.
    """
    rows = []
    for z in table["zone"]:
        row = {c: ext_depth[z].row().get(c) if z in ext_depth else None for c in EVA_COLUMNS}
        lz = ext_life.get(z)
        row["life_eva_method"] = lz["method"] if lz else ""
        row["life_eva_reason"] = lz["reason"] if lz else "zone not scanned"
        rows.append(row)
    extra = pd.DataFrame(rows, columns=EVA_COLUMNS + ["life_eva_method", "life_eva_reason"])
    return pd.concat([table.reset_index(drop=True), extra], axis=1)
