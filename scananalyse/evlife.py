r"""Extreme-value life of a floor zone: when the deepest loss of the zone, scanned or not,
reaches the zone's corrosion allowance (nominal − MRT).

A zone has two parts, assessed separately and combined by taking the shorter life:

- the **seen** part: every scanned cell, its loss growing at its own measured rates
  (:func:`seen_lives`); cells the newer scan missed but the older scan saw (an obstruction
  or a sump moved between the outages) are projected forward from the older reading;
- the **hidden** part: the zone area nobody scanned, whose deepest loss is predicted from
  the extreme-value law of the scanned block maxima (:func:`hidden_parts`).

The hidden part is a property of the floor **as found**: repairs change only the cells they
cover, so a repaired floor is assessed with the as-found hidden part and its own seen part
(:func:`zone_lives`).  A zone too small for a fit of its own borrows the whole floor's fit,
extrapolated to its own unscanned area, and says so; a floor with no fit at all takes the
hidden metal to be as deep as the deepest seen and to grow at the fastest measured rate.

Everything here is a pure function of arrays and the zone map; the pipeline
(:func:`scananalyse.pipeline.analyse`) calls :func:`hidden_parts` once, and
:func:`seen_lives` once for the floor as found and once as repaired.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .errors import FitError, ScanWarning
from .extremes import (depth_map, fit_gev_mle, fit_gumbel_mle, fit_zone, predictive_max_quantile, unscanned_law,
                       projected_block_maxima)

__all__ = ["LIFE_LEVEL", "LIFE_HORIZON_Y", "HIDDEN_LEVELS", "EVA_COLUMNS", "HiddenPart", "masked_nanmin",
           "seen_lives", "hidden_parts", "floor_fit", "zone_lives", "merge_extremes", "add_eva_columns"]

#: Probability that the deepest projected loss in the hidden part stays below the value
#: used for the extreme-value life (predictive, parameter uncertainty included). [-]
LIFE_LEVEL = 0.95
#: Levels of the predicted deepest loss in the hidden part reported per zone: the median
#: and the upper bound (``depth_hidden_p50_mm``, ``depth_hidden_p95_mm``). [-]
HIDDEN_LEVELS = (0.5, 0.95)
#: Longest horizon searched for the extreme-value life; beyond it the life is reported
#: as this value (every interval cap is shorter). [y]
LIFE_HORIZON_Y = 60.0
#: Bootstrap resamples of each predictive quantile (Gumbel fits are refitted in one batch;
#: GEV fits one by one, hence fewer). [-]
N_BOOT = {"gumbel": 200, "gev": 60}


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


def _summed_rate(rate_top, rate_under) -> np.ndarray:
    """top + underside rate per cell, negative and NaN counted as 0 (float32)."""
    rate = np.fmax(np.asarray(rate_top, dtype=np.float32), np.float32(0))  # fmax: NaN -> 0 as well
    rate += np.fmax(np.asarray(rate_under, dtype=np.float32), np.float32(0))
    return rate


def _allowance(mrt, mask, nominal) -> float:
    return float(nominal - masked_nanmin(np.asarray(mrt, dtype=np.float32), mask))


def _older_cells(thickness, older, mask):
    """Cells of the zone the newer scan missed and the older scan saw (bool map), or None."""
    if older is None:
        return None
    t_old = np.asarray(older[0])
    extra = mask & ~np.isfinite(thickness) & np.isfinite(t_old)
    return extra if extra.any() else None


def seen_lives(thickness, rate_top, rate_under, mrt, zmap, *, nominal, censored=None, older=None) -> dict:
    r"""Life of the seen part of each zone: the first time the deepest projected loss among
    its scanned cells reaches the zone's allowance.

    Parameters
    ----------
    thickness : (M, N) ndarray
        Remaining thickness, NaN where not scanned. [mm]
    rate_top, rate_under : (M, N) ndarray
        Governing rates (negative and NaN count as 0). [mm/y]
    mrt : (M, N) ndarray
        Minimum remaining thickness per cell. [mm]
    zmap : :class:`~scananalyse.zones.ZoneMap`
    nominal : float
        Nominal plate thickness. [mm]
    censored : (M, N) bool ndarray, optional
        Cells reported as nominal (loss below the threshold): loss 0 here, their part is
        the hidden part's statistics. [-]
    older : (t_old_on_new, dt_years), optional
        The older scan's thickness on the newer grid [mm] and the years between the
        inspections [y]: cells the newer scan missed and the older one saw are projected
        forward at the 95th percentile of the zone's measured summed rates.

    Returns
    -------
    dict
        Zone name -> life [y] (0 when already past the allowance, :data:`LIFE_HORIZON_Y`
        at most); zones with no scanned cell are left out.

    Notes
    -----
    With :math:`d_i` the loss of cell *i* and :math:`r_i` its summed rate, the deepest
    projected loss :math:`\max_i (d_i + r_i H)` reaches the allowance *A* first at
    :math:`H = \min_i (A - d_i)/r_i` (the co-located reading of the two faces' rates,
    domain notes §5 in docs/assessment.md).
    """
    scanned = np.isfinite(thickness)
    depth0 = depth_map(thickness, nominal, censored)
    rate = _summed_rate(rate_top, rate_under)
    out = {}
    for k, name in enumerate(zmap.names):
        mask = zmap.labels == k
        cells = scanned & mask
        if not cells.any():
            continue
        allowance = _allowance(mrt, mask, nominal)
        d, r = depth0[cells].astype(np.float64), rate[cells].astype(np.float64)
        extra = _older_cells(thickness, older, mask)
        if extra is not None:
            t_old, dt = older
            r_z = float(np.quantile(r, 0.95)) if r.size else 0.0
            d_old = np.maximum(nominal - np.asarray(t_old)[extra].astype(np.float64), 0.0) + r_z * float(dt)
            d, r = np.r_[d, d_old], np.r_[r, np.full(d_old.size, r_z)]
        out[name] = _first_crossing(d, r, allowance)
    return out


def _first_crossing(d, r, allowance) -> float:
    """min over cells of (allowance − d)/r, 0 if any d ≥ allowance, capped at the horizon."""
    if d.size == 0:
        return LIFE_HORIZON_Y
    if np.nanmax(d) >= allowance:
        return 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(r > 0, (allowance - d) / r, np.inf)
    return float(min(np.nanmin(t), LIFE_HORIZON_Y))


@dataclass(frozen=True)
class HiddenPart:
    """The part of a zone nobody scanned, as found.

    Attributes
    ----------
    area_mm2 : the zone area neither scan saw. [mm²]
    T : that area in blocks of the fit. [blocks]
    life_y : when the :data:`LIFE_LEVEL` predictive quantile of its deepest projected loss
        reaches the allowance; NaN when nothing could be said. [y]
    depth_p50_mm, depth_p95_mm : predicted deepest loss in it now: median and the
        :data:`HIDDEN_LEVELS` upper bound (predictive). [mm]
    source : ``"zone"`` (the zone's own fit), ``"floor"`` (the whole floor's fit, borrowed),
        ``"worst-seen"`` (no fit anywhere: as deep as the deepest seen, at the fastest
        rate), ``"none"`` (nothing hidden). [-]
    method : the fit (e.g. ``gumbel-censored-mle``). [-]
    reason : why the zone's own fit was not used, if it was not. [-]
    """

    area_mm2: float
    T: float = float("nan")
    life_y: float = float("nan")
    depth_p50_mm: float = float("nan")
    depth_p95_mm: float = float("nan")
    source: str = "none"
    method: str = ""
    reason: str = ""


def hidden_parts(thickness, rate_top, rate_under, mrt, zmap, *, nominal, censored, threshold, pitch, block_mm,
                 seed, methods: dict | None = None, older=None, floor=None) -> dict:
    r"""The hidden part of each zone (:class:`HiddenPart`), from the floor as found.

    Parameters
    ----------
    thickness, rate_top, rate_under, mrt, zmap, nominal, censored :
        As :func:`seen_lives`, of the floor **as found** (never as repaired).
    threshold : float or None
        Detection threshold (left-censoring of the block maxima). [mm]
    pitch : float
        Cell size. [mm]
    block_mm : float
        Configured block side (:func:`~scananalyse.extremes.fit_zone`). [mm]
    seed : int
        Seed of the bootstraps. [-]
    methods : dict, optional
        Zone name -> the zone's depth statistics at H = 0
        (:func:`~scananalyse.extremes.depth_statistics`), reused when given.
    older : (t_old_on_new, dt_years), optional
        As :func:`seen_lives`: cells the older scan saw are not hidden.
    floor : ZoneExtremes, optional
        The whole floor's fit (:func:`floor_fit` of the same floor), when already made;
        otherwise it is made here if a zone needs it.

    Returns
    -------
    dict
        Zone name -> :class:`HiddenPart`, for every zone.  A zone with no scanned cell
        is hidden over its whole area (less what the older scan saw) and judged with the
        whole floor's fit (``source = "floor"``): what nobody saw is never taken as sound.

    Notes
    -----
    The deepest loss over an area of T blocks has the law :math:`F^T` of the block maxima'
    law F (Shibata [1]_; the survivor-function form of HSE RR016); F is the Gumbel or GEV
    fitted to the block maxima, left-censored at the detection threshold, chosen by the
    likelihood-ratio test (Coles [2]_ §3.3).  Its quantiles are predictive: mixed over a
    parametric bootstrap of the fit (Coles [2]_ §9.1), so a fit from few blocks gives a wider
    law, not a plug-in point.  For a horizon H each scanned cell's loss is projected,
    :math:`d_i + r_i H`, the block maxima of the projection refitted, and the life is the H
    at which the :data:`LIFE_LEVEL` quantile reaches the allowance (Brent's method, 0.05 y
    on the short side).  T counts only the area neither scan saw.

    References
    ----------
    .. [1] T. Shibata, "Application of extreme value statistics to corrosion",
       J. Res. NIST 99 (1994) 327-336.
    .. [2] S. Coles, *An Introduction to Statistical Modeling of Extreme Values*,
       Springer, 2001.
    """
    scanned = np.isfinite(thickness)
    depth0 = depth_map(thickness, nominal, censored)
    rate = _summed_rate(rate_top, rate_under)
    thr = threshold or None
    kw = dict(pitch=pitch, block_mm=block_mm, seed=seed, threshold=thr)
    lent = [] if floor is None else [(floor, scanned & (zmap.labels >= 0))]  # made once if a zone borrows it

    def floor_fit():
        if not lent:
            lent.append((_floor_fit(depth0, zmap, scanned, pitch=pitch, block_mm=block_mm, threshold=thr, seed=seed),
                         scanned & (zmap.labels >= 0)))
        return lent[0]

    out = {}
    for k, name in enumerate(zmap.names):
        mask = zmap.labels == k
        cells = scanned & mask
        extra = _older_cells(thickness, older, mask)
        n_seen = np.count_nonzero(cells) + (0 if extra is None else np.count_nonzero(extra))
        hidden_mm2 = max(0.0, float(zmap.areas_mm2[k]) - n_seen * pitch * pitch)
        if hidden_mm2 <= 0:
            out[name] = HiddenPart(area_mm2=0.0, T=0.0, life_y=LIFE_HORIZON_Y, source="none")
            continue
        allowance = _allowance(mrt, mask, nominal)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ScanWarning)
            if cells.any():
                z0 = (methods or {}).get(name)
                if z0 is None:
                    z0 = fit_zone(depth0, mask, pitch_mm=pitch, zone_area_mm2=float(zmap.areas_mm2[k]),
                                  block_mm=block_mm, threshold=thr, seed=seed, valid=scanned)
                source, reason, fit_mask = "zone", "", cells
            else:  # not scanned at all: nothing of its own to fit, and nothing to credit
                z0, reason, fit_mask = None, "zone fit: no scanned cell", cells
            if not z0:
                reason = reason or f"zone fit: {z0.reason}"
                z0, fit_mask = floor_fit()
                source = "floor"
            if z0:
                out[name] = _hidden_from_fit(depth0, rate, fit_mask, z0, hidden_mm2, allowance, source=source,
                                             reason=reason, **kw)
            else:
                worst = cells if cells.any() else fit_mask  # no cell of its own: the floor's worst
                out[name] = _hidden_worst_seen(depth0, rate, worst, hidden_mm2, allowance, thr,
                                               reason=f"{reason}; floor fit: {z0.reason}")
    return out


def _floor_fit(depth0, zmap, scanned, *, pitch, block_mm, threshold, seed):
    return fit_zone(depth0, zmap.labels >= 0, pitch_mm=pitch, zone_area_mm2=float(np.sum(zmap.areas_mm2)),
                    block_mm=block_mm, threshold=threshold, seed=seed, valid=scanned)


def floor_fit(thickness, zmap, *, nominal, censored, threshold, pitch, block_mm, seed):
    """The whole floor's fit of block-maximum loss depth, as a zone too small for a fit of
    its own (or not scanned at all) borrows it (:func:`hidden_parts`).

    Parameters are those of :func:`hidden_parts` (the floor as found).

    Returns
    -------
    :class:`~scananalyse.extremes.ZoneExtremes`
        Falsy when even the floor allows no fit.
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ScanWarning)
        return _floor_fit(depth_map(thickness, nominal, censored), zmap, np.isfinite(thickness), pitch=pitch,
                          block_mm=block_mm, threshold=threshold or None, seed=seed)


def _hidden_worst_seen(depth0, rate, cells, hidden_mm2, allowance, thr, *, reason) -> HiddenPart:
    """No fit anywhere: the hidden metal taken as deep as the deepest seen (at least the
    detection threshold) and growing at the zone's fastest measured summed rate."""
    d = float(np.nanmax(depth0[cells])) if cells.any() else 0.0
    d = max(d, float(thr or 0.0))
    r = float(np.nanmax(rate[cells])) if cells.any() else 0.0
    life = _first_crossing(np.array([d]), np.array([r]), allowance)
    return HiddenPart(area_mm2=hidden_mm2, life_y=life, depth_p50_mm=d, depth_p95_mm=d, source="worst-seen",
                      reason=reason)


def _hidden_from_fit(depth0, rate, fit_mask, z0, hidden_mm2, allowance, *, source, reason, pitch, block_mm,
                     seed, threshold) -> HiddenPart:
    """:class:`HiddenPart` from the fit ``z0`` of the block maxima of ``fit_mask``; a GEV
    with a bounded upper tail is never extrapolated to the hidden metal
    (:func:`~scananalyse.extremes.unscanned_law`: the Gumbel of the same maxima instead,
    at every horizon)."""
    b = z0.blocks
    law0 = unscanned_law(z0.fit, b.maxima, censored=b.censored, threshold=b.threshold) if b is not None else z0.fit
    gev = getattr(law0, "distribution", "") == "gev"
    n_boot = N_BOOT["gev" if gev else "gumbel"]
    b_cells = max(1, int(round((z0.block_mm if np.isfinite(z0.block_mm) else block_mm) / pitch)))
    # the fit is the law of the deepest loss over the scanned part of a counted block (on
    # average ``cov`` of it), not over a whole block: T counts that area (as the life
    # distribution does)
    cov = float(np.mean(b.coverage)) if b is not None and np.size(b.coverage) else 1.0
    T = max(1.0, hidden_mm2 / ((b_cells * pitch) ** 2 * (cov if cov > 0 else 1.0)))
    cens_thr = threshold if z0.n_censored else None
    p50, p95 = (predictive_max_quantile(law0, z0.n_blocks, T, p, threshold=cens_thr, n_boot=n_boot, seed=seed)
                for p in HIDDEN_LEVELS)
    last = [(law0.loc, law0.scale, law0.shape) if gev else None]  # warm start of the next GEV

    def fitter(x, cens):
        thr = threshold if cens is not None else None
        if not gev:
            return fit_gumbel_mle(x, censored=cens, threshold=thr)
        f = fit_gev_mle(x, censored=cens, threshold=thr, start=last[0])
        last[0] = (f.loc, f.scale, f.shape)
        return unscanned_law(f, x, censored=cens, threshold=thr)

    projector = projected_block_maxima(depth0, rate, valid=fit_mask, block_cells=b_cells, min_coverage=0.5,
                                       threshold=threshold)

    def excess(h):
        if h == 0:
            fit, n, thr_h = law0, z0.n_blocks, cens_thr
        else:
            bm = projector(h)
            x, cens = bm.maxima, bm.censored
            if threshold is None or not cens.any():
                x, cens = x[~cens], None
            try:
                fit = fitter(x, cens)
            except FitError:
                return math.inf  # no estimate: the allowance taken as used up (conservative)
            n, thr_h = x.size, (threshold if cens is not None else None)
        q = predictive_max_quantile(fit, n, T, LIFE_LEVEL, threshold=thr_h, n_boot=n_boot, seed=seed)
        return q - allowance

    if excess(0.0) >= 0:
        life = 0.0
    elif excess(LIFE_HORIZON_Y) < 0:
        life = LIFE_HORIZON_Y
    else:
        from scipy.optimize import brentq

        life = max(0.0, brentq(excess, 0.0, LIFE_HORIZON_Y, xtol=0.02) - 0.05)
    method = z0.row().get("eva_method", "")
    if law0 is not z0.fit:
        why = "the zone's GEV fit has a bounded upper tail: the unscanned part takes the Gumbel of the same maxima"
        method, reason = f"gumbel-{law0.method}", "; ".join(x for x in (reason, why) if x)
    return HiddenPart(area_mm2=hidden_mm2, T=T, life_y=life, depth_p50_mm=p50, depth_p95_mm=p95, source=source,
                      method=method, reason=reason)


def zone_lives(seen: dict, hidden: dict) -> dict:
    """Extreme-value life per zone: the shorter of the seen part's and the hidden part's.

    Parameters
    ----------
    seen : dict
        :func:`seen_lives` (of the floor as found, or as repaired).
    hidden : dict
        :func:`hidden_parts` (always of the floor as found).

    Returns
    -------
    dict
        Zone name -> ``{"life_eva_y", "method", "reason", "source"}``; a zone with no
        scanned cell is left out.  The life is NaN only when the hidden part's is.
    """
    out = {}
    for name, life_seen in seen.items():
        h = hidden.get(name)
        if h is None:
            out[name] = {"life_eva_y": life_seen, "method": "", "reason": "", "source": "none"}
            continue
        life = min(life_seen, h.life_y) if not math.isnan(h.life_y) else math.nan
        out[name] = {"life_eva_y": life, "method": h.method, "reason": h.reason, "source": h.source}
    return out


def merge_extremes(ext_depth: dict, ext_rate: dict, ext_life: dict | None = None,
                   hidden: dict | None = None) -> dict:
    """The per-zone extreme-value figures :func:`~scananalyse.assess.assess_zones` takes.

    Parameters
    ----------
    ext_depth, ext_rate : dict
        Zone name -> :class:`~scananalyse.extremes.ZoneExtremes` of loss depth and of the
        summed rate (:func:`~scananalyse.extremes.depth_statistics`,
        :func:`~scananalyse.extremes.rate_statistics`).
    ext_life : dict, optional
        :func:`zone_lives`.
    hidden : dict, optional
        :func:`hidden_parts`.

    Returns
    -------
    dict
        Zone name -> ``depth_pred_upper_mm`` [mm], ``depth_hidden_p50_mm``,
        ``depth_hidden_p95_mm`` [mm], ``hidden_area_m2`` [m²], ``eva_source``,
        ``rate_eva_mm_y`` [mm/y] and ``life_eva_y`` [y], for every zone with a depth fit or
        a life.  The zone's deepest loss (``depth_eva_mm``) is made from these and the
        observed deepest by the assessment, never below the observed.
    """
    out = {}
    names = set(ext_depth) | set(ext_life or {})
    for name in names:
        d = ext_depth.get(name)
        lz = (ext_life or {}).get(name)
        if not d and lz is None:
            continue
        r = ext_rate.get(name)
        h = (hidden or {}).get(name)
        out[name] = {"depth_pred_upper_mm": d.depth_pred_upper_mm if d else None,
                     "depth_hidden_p50_mm": h.depth_p50_mm if h is not None else None,
                     "depth_hidden_p95_mm": h.depth_p95_mm if h is not None else None,
                     "hidden_area_m2": h.area_mm2 / 1e6 if h is not None else None,
                     "eva_source": (lz or {}).get("source", ""),
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
