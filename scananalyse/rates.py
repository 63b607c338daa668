"""Loss maps and corrosion-rate maps per side, on the newer scan's grid.

Definitions [domain.md §3]:

* **loss** = nominal − thickness, never below 0; NaN where not scanned.
* **censored**: the reported loss is below the scan's detection threshold (MFL reports
  loss above a threshold, typically about 20 % of wall [memory]); shallower loss reads
  as nominal, so the true loss there is unknown in [0, threshold), not zero.
* **long-term rate** = loss ÷ years in service (from ``meta.installed``, or from the
  repair date in an operator repair record). [memory: API 570 practice]
* **short-term rate** = (old − new thickness) ÷ years between the inspections.
* **noise rule**: a change smaller than k·√(σ_old² + σ_new²) (k = 2) is not growth;
  a cell thicker than before by more than that was repaired, replaced or misaligned
  and is excluded from rates, never turned into negative corrosion. The rate's own
  standard deviation is σ_rate = √(σ_old² + σ_new²) / Δt. [domain.md §3]
* **governing rate**: the greater of short- and long-term by default. [memory: API 570]

Censored cells and rates (our rule, documented in docs/attribution.md):

* a cell censored in the newer scan has point rates 0 (short-term: no measurable
  change; long-term: no measurable loss) and a long-term upper bound
  ``rate_long_bound`` = threshold ÷ age, so per-zone maxima are not inflated by noise
  on nominal cells while the bound stays available;
* a cell censored in the newer scan is not growing (short-term rate 0) and is taken
  as thicker than before (repaired/misaligned) only if the older loss exceeds the
  newer threshold by more than the noise;
* a cell censored in the older scan but reported now (the loss crossed the threshold
  between the inspections, or the resampled older value mixes censored and reported
  cells) has an older loss unknown in [0, threshold); by default its older loss is
  estimated from the connected region of reported loss it belongs to, scaling the
  newer loss by the region's older/newer deepest-loss ratio (a pit deepening in
  proportion); in a region with no reported older loss (a pit below detection or
  absent then) the older loss is taken as half the threshold (error at most
  ±threshold/2; ``RateOptions.crossed="upper"`` takes 0, the conservative bound). Such cells are marked in ``LossRates.crossed``.
"""

from __future__ import annotations

import datetime as _dt
import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from .attribution import (DEFAULT_SIDE, Shape, _num, _parse_date, _parse_geometry, _read_table,
                          _check_inside, resolve_side, shape_mask, split_loss)
from .errors import InputError, ScanWarning, where
from .scan import MM_PER_IN, SIDE_TOP, FloorScan, years_between

__all__ = [
    "DEFAULT_SIGMA_MM",
    "RateOptions",
    "Repair",
    "LossRates",
    "LossLayers",
    "loss_layers",
    "read_repairs",
    "loss_map",
    "censored_map",
    "growth_threshold",
    "rate_sigma",
    "compute_rates",
]

#: Thickness uncertainty (1 σ) used when a scan has no ``sigma``: UT on clean, smooth
#: plate is good to about ±0.1 mm. [memory: domain.md §2]
DEFAULT_SIGMA_MM = 0.1

_REPAIRS_FORMAT = "scananalyse-repairs 1"
_GOVERNING = ("max", "short", "long")
#: Estimate of the older loss in a cell below the older scan's threshold but reported
#: now, as a fraction of that threshold: "upper" growth (older loss 0, conservative),
#: "mid" (half the threshold, error at most ±threshold/2), "lower" (older loss = threshold).
_CROSSED_FRACTION = {"profile": None, "upper": 0.0, "mid": 0.5, "lower": 1.0}


@dataclass(frozen=True)
class RateOptions:
    """Options of :func:`compute_rates`.

    Parameters
    ----------
    k_sigma : multiple of √(σ_old² + σ_new²) a change must exceed to count as growth
        (or, negative, as repair). [memory: domain.md §3, about 2 σ]
    governing : ``"max"`` (the greater of short- and long-term [memory: API 570]),
        ``"short"`` or ``"long"``. [-]
    unknown_side : side given to cells nobody attributed, ``"under"`` (loss not found
        from above is underside [seen/practice]) or ``"top"``. [-]
    default_sigma_mm : σ used when a scan's metadata has none. [mm]
    crossed : how a cell below the older scan's threshold but reported now enters the
        short-term rate. Its older loss is unknown in [0, threshold); it is estimated as
        the larger of the reported (resampled) older loss and: ``"profile"`` (default)
        the newer loss scaled by the ratio older/newer deepest loss of the connected
        region it belongs to (a pit deepening in proportion), or half the threshold if
        the region had no reported older loss (a pit below detection or absent then;
        error at most ±threshold/2), ``"upper"`` 0 (the measured change, the conservative bound),
        ``"mid"`` half the threshold, ``"lower"`` the threshold. [-]
    """

    k_sigma: float = 2.0
    governing: str = "max"
    unknown_side: str = DEFAULT_SIDE
    default_sigma_mm: float = DEFAULT_SIGMA_MM
    crossed: str = "profile"

    def __post_init__(self):
        if not (math.isfinite(self.k_sigma) and self.k_sigma >= 0):
            raise InputError(f"{where(None, None, 'k_sigma')}: must be >= 0, got {self.k_sigma!r}")
        if self.governing not in _GOVERNING:
            raise InputError(f"{where(None, None, 'governing')}: must be one of "
                             f"{', '.join(_GOVERNING)}, got {self.governing!r}")
        if self.unknown_side not in ("under", "top"):
            raise InputError(f"{where(None, None, 'unknown_side')}: must be 'under' or 'top', "
                             f"got {self.unknown_side!r}")
        if self.crossed not in _CROSSED_FRACTION:
            raise InputError(f"{where(None, None, 'crossed')}: must be one of "
                             f"{', '.join(_CROSSED_FRACTION)}, got {self.crossed!r}")
        if not (math.isfinite(self.default_sigma_mm) and self.default_sigma_mm >= 0):
            raise InputError(f"{where(None, None, 'default_sigma_mm')}: must be >= 0")


@dataclass(frozen=True)
class Repair:
    """An operator repair record: an area patched or replaced, with its date.

    Parameters
    ----------
    shape : the repaired area (its ``side`` is unused). [mm]
    date : date of the repair.
    thickness : plate thickness after the repair (patch or insert plate); None = the
        scan's nominal. [mm]
    """

    shape: Shape
    date: _dt.date
    thickness: float | None = None


#: Thickest plate a repair record may give (the scan readers' bound on a nominal floor
#: plate, io.validate.MAX_NOMINAL_MM). [mm]
_MAX_REPAIR_THICKNESS_MM = 100.0


def read_repairs(path, *, scan: FloorScan | None = None) -> list[Repair]:
    """Read an operator repair-record file (format ``scananalyse-repairs 1``).

    Parameters
    ----------
    path : CSV with ``# format``/``# units`` header lines and columns
        ``shape,date,x,y,r,w,h,points[,thickness][,note]``; geometry as in the shapes
        file (docs/attribution.md). [-]
    scan : optional scan whose grid every area must touch. [-]

    Returns
    -------
    list of :class:`Repair` in file order, lengths in mm.
    """
    path, _h, units, rows = _read_table(
        path, _REPAIRS_FORMAT, ("shape", "date"),
        ("x", "y", "r", "w", "h", "points", "thickness", "note"))
    scale = MM_PER_IN if units == "in" else 1.0
    out = []
    for n, row in rows:
        date = _parse_date(row["date"], path, n, "date")
        geo = _parse_geometry(row, path, n, scale)
        thick = None
        if row.get("thickness"):
            thick = _num(row["thickness"], path, n, "thickness", positive=True) * scale
            if thick > _MAX_REPAIR_THICKNESS_MM:  # the scans' own bound on a nominal plate
                raise InputError(f"{where(path, n, 'thickness')}: {thick:g} mm is above the limit of "
                                 f"{_MAX_REPAIR_THICKNESS_MM:g} mm for a floor plate; wrong units or a "
                                 "typing error")
        shape = Shape(side=0, source=path, line=n, **geo)
        if scan is not None:
            _check_inside(shape, scan)
        out.append(Repair(shape=shape, date=date, thickness=thick))
    return out


def loss_map(thickness: np.ndarray, nominal: float) -> np.ndarray:
    """Loss = nominal − thickness, clipped at 0; NaN where not scanned.

    Parameters
    ----------
    thickness : remaining thickness, NaN = not scanned. [mm]
    nominal : nominal plate thickness. [mm]

    Returns
    -------
    float32 loss map. [mm]
    """
    loss = np.float32(nominal) - thickness.astype(np.float32, copy=False)
    np.maximum(loss, np.float32(0), out=loss)  # NaN propagates
    return loss


def censored_map(loss: np.ndarray, threshold: float | None) -> np.ndarray:
    """Cells whose reported loss is below the detection threshold (true loss in [0, thr)).

    Parameters
    ----------
    loss : loss map, NaN = not scanned. [mm]
    threshold : smallest loss depth the method reports; None = no censoring (UT). [mm]

    Returns
    -------
    bool map, False where not scanned.
    """
    if threshold is None or threshold <= 0:
        return np.zeros(loss.shape, dtype=bool)
    with np.errstate(invalid="ignore"):
        return loss < np.float32(threshold)


def growth_threshold(sigma_old: float, sigma_new: float, *, k: float = 2.0) -> float:
    """Smallest change that counts as growth: k·√(σ_old² + σ_new²).

    Parameters
    ----------
    sigma_old, sigma_new : one-standard-deviation thickness uncertainty of each scan. [mm]
    k : coverage factor (about 2 [domain.md §3]). [-]

    Returns
    -------
    float, the growth threshold. [mm]

    Notes
    -----
    The difference of two independent readings has variance σ_old² + σ_new²
    (domain.md §3); a change within k standard deviations is not evidence of growth.
    """
    return float(k * math.hypot(sigma_old, sigma_new))


def rate_sigma(sigma_old: float, sigma_new: float, dt_years: float) -> float:
    """Standard deviation of a two-reading rate: σ_rate = √(σ₁² + σ₂²) / Δt.

    Parameters
    ----------
    sigma_old, sigma_new : thickness uncertainty of each reading. [mm]
    dt_years : years between the readings. [y]

    Returns
    -------
    float. [mm/y]

    References
    ----------
    domain.md §3 (propagation of independent errors).
    """
    if not dt_years > 0:
        raise InputError(f"{where(None, None, 'dt_years')}: must be > 0, got {dt_years!r}")
    return float(math.hypot(sigma_old, sigma_new) / dt_years)


@dataclass(eq=False)
class LossRates:
    """Loss and rate maps on the newer scan's grid (float32 / bool), and scalars.

    Maps: ``loss``, ``loss_top``, ``loss_under`` [mm]; ``censored``; ``growth`` (old −
    new thickness, NaN where either is unscanned) [mm]; ``significant``; ``repaired``
    (thicker beyond the noise, or inside a repair record dated after the older scan);
    ``repair_record``; ``crossed`` (below the older threshold, reported now);
    ``rate_short_top``, ``rate_short_under``, ``rate_long_top``,
    ``rate_long_under``, ``rate_long_bound``, ``rate_top``, ``rate_under`` [mm/y].
    Rates are ≥ 0 or NaN (NaN = not scanned, excluded as repaired/misaligned, or not
    available: short-term without an older scan, long-term without ``installed``).
    """

    loss: np.ndarray
    censored: np.ndarray
    loss_top: np.ndarray
    loss_under: np.ndarray
    growth: np.ndarray
    significant: np.ndarray
    repaired: np.ndarray
    repair_record: np.ndarray
    crossed: np.ndarray
    rate_short_top: np.ndarray
    rate_short_under: np.ndarray
    rate_long_top: np.ndarray
    rate_long_under: np.ndarray
    rate_long_bound: np.ndarray
    rate_top: np.ndarray
    rate_under: np.ndarray
    growth_sigma: float
    rate_sigma: float
    sigma_old: float
    sigma_new: float
    k_sigma: float
    dt_years: float
    age_years: float
    threshold: float | None
    nominal: float
    governing: str
    unknown_side: str
    repaired_or_misaligned: int
    counts: dict = field(default_factory=dict)

    MAP_NAMES = ("loss", "censored", "loss_top", "loss_under", "growth", "significant",
                 "repaired", "repair_record", "crossed", "rate_short_top", "rate_short_under",
                 "rate_long_top", "rate_long_under", "rate_long_bound", "rate_top", "rate_under")

    def maps(self) -> dict:
        """All maps by name (for results.h5)."""
        return {name: getattr(self, name) for name in self.MAP_NAMES}

    def summary(self) -> dict:
        """Scalars and counts, plain Python numbers."""
        out = {
            "growth_sigma_mm": self.growth_sigma, "rate_sigma_mm_y": self.rate_sigma,
            "sigma_old_mm": self.sigma_old, "sigma_new_mm": self.sigma_new,
            "k_sigma": self.k_sigma, "dt_years": self.dt_years, "age_years": self.age_years,
            "threshold_mm": self.threshold, "nominal_mm": self.nominal,
            "governing": self.governing, "unknown_side": self.unknown_side,
            "repaired_or_misaligned": self.repaired_or_misaligned,
        }
        out.update(self.counts)
        return out


def _sigma(scan: FloorScan, default: float, which: str) -> float:
    s = scan.meta.sigma
    if s is None:
        warnings.warn(f"{which} scan has no sigma; using {default} mm (UT on clean plate, "
                      f"from memory)", ScanWarning, stacklevel=3)
        return float(default)
    return float(s)


def _nan_map(shape) -> np.ndarray:
    return np.full(shape, np.nan, dtype=np.float32)


@dataclass(eq=False, frozen=True)
class LossLayers:
    """The loss maps that need the newer scan only (no older scan, no registration):
    ``loss`` and its split ``loss_top`` / ``loss_under`` [mm], and ``censored``."""

    loss: np.ndarray
    censored: np.ndarray
    loss_top: np.ndarray
    loss_under: np.ndarray


def _checked_side(new: FloorScan, side, unknown_side: str) -> np.ndarray:
    if side is None:
        side = np.zeros(new.shape, dtype=np.int8)
    side = np.asarray(side)
    if side.shape != new.shape:
        raise InputError(f"{where(new.source, None, 'side')}: side map shape {side.shape} "
                         f"differs from the grid {new.shape}")
    return resolve_side(side, unknown_side)


def loss_layers(new: FloorScan, side: np.ndarray, *, top_depth=None,
                options: RateOptions = RateOptions()) -> LossLayers:
    """Loss, censoring and the per-side split of the newer scan (the first part of
    :func:`compute_rates`, which takes them through ``layers``, so they can be known
    while the registration still runs).

    Parameters
    ----------
    new : the newer scan. [-]
    side : int8 side map on ``new``'s grid; unknown cells (0) take ``options.unknown_side``. [-]
    top_depth : optional measured top-side depth on ``new``'s grid (see :func:`compute_rates`). [mm]
    options : :class:`RateOptions` (only ``unknown_side`` is used). [-]

    Returns
    -------
    :class:`LossLayers`, float32 / bool maps on ``new``'s grid.
    """
    return _layers(new, _checked_side(new, side, options.unknown_side), top_depth)


def _layers(new: FloorScan, side: np.ndarray, top_depth) -> LossLayers:
    from .attribution import top_depth_map

    loss = loss_map(new.thickness, float(new.meta.nominal))
    censored = censored_map(loss, new.meta.threshold)
    tdm = top_depth_map(top_depth, new) if top_depth is not None else None
    loss_top, loss_under = split_loss(loss, side, top_depth=tdm)
    return LossLayers(loss=loss, censored=censored, loss_top=loss_top, loss_under=loss_under)


def compute_rates(new: FloorScan, old_on_new: FloorScan | None, side: np.ndarray, *,
                  top_depth=None, repairs=None, options: RateOptions = RateOptions(),
                  layers: LossLayers | None = None) -> LossRates:
    """Loss, per-side loss and per-side short-/long-term and governing rate maps.

    Parameters
    ----------
    new : the newer scan (its grid is the result's grid). [-]
    old_on_new : the older scan resampled onto ``new``'s grid
        (``register.resample_onto``), or None for a single inspection (long-term only). [-]
    side : int8 side map on ``new``'s grid (``attribution.side_map``); unknown cells
        (0) take ``options.unknown_side``. [-]
    top_depth : optional measured top-side depth on ``new``'s grid (array or FloorScan,
        NaN = not measured, ``attribution.top_depth_map``). [mm]
    repairs : optional list of :class:`Repair` (``read_repairs``). [-]
    options : :class:`RateOptions`. [-]
    layers : the newer scan's :func:`loss_layers` for the same ``side``, ``top_depth`` and
        ``options``, when already computed (they are used as they are, not copied). [-]

    Returns
    -------
    :class:`LossRates`.

    Notes
    -----
    Growth g = t_old − t_new is significant where g > k·√(σ_old² + σ_new²) and marks
    a repair/replacement/misalignment where g < −k·√(σ_old² + σ_new²) [domain.md §3].
    Short-term rate = g ÷ Δt on significant cells, 0 on other measured cells, NaN on
    repaired cells. Long-term rate = loss ÷ age. The change of a cell is given to the
    cell's side; where a top-side depth was measured it is shared in proportion to the
    top and underside loss now. In a repair record dated after the older scan the
    baseline is the repair: the plate (nominal, or the record's thickness) at the
    repair date, σ = 0, so g = t_plate − t_new over (new − repair date) years, tested
    against k·σ_new; the long-term rate there runs from the repair date too. A record
    dated on or before the older scan only resets the long-term baseline.
    """
    shape = new.shape
    meta = new.meta
    side = _checked_side(new, side, options.unknown_side)
    k = float(options.k_sigma)
    nominal = float(meta.nominal)
    threshold = meta.threshold
    zero = np.float32(0)

    t_new = new.thickness
    if layers is None:
        layers = _layers(new, side, top_depth)
    elif layers.loss.shape != shape:
        raise ValueError(f"layers are for a grid of {layers.loss.shape}, not {shape}")
    loss, censored = layers.loss, layers.censored
    loss_top, loss_under = layers.loss_top, layers.loss_under
    scanned = np.isfinite(t_new)

    # ---- repair records -------------------------------------------------
    record = np.zeros(shape, dtype=bool)
    record_masks = []
    if repairs:
        for rep in repairs:
            if rep.date > meta.inspected:
                raise InputError(f"{rep.shape.where()}: field 'date': repair dated "
                                 f"{rep.date.isoformat()} after the newer inspection "
                                 f"{meta.inspected.isoformat()}")
            m = shape_mask(rep.shape, new) & scanned
            record_masks.append((rep, m))
            record |= m

    # ---- long-term ------------------------------------------------------
    age = meta.age_years
    age_years = float(age) if age is not None else math.nan
    if age is not None and not age > 0:
        raise InputError(f"{where(new.source, None, 'installed')}: installed "
                         f"{meta.installed} is not before the inspection {meta.inspected}")
    if age is not None:
        inv_age = np.float32(1.0 / age)
        rate_long_top = loss_top * inv_age
        rate_long_under = loss_under * inv_age
        rate_long_bound = loss * inv_age
        for rep, m in record_masks:
            r_age = years_between(rep.date, meta.inspected)
            base = rep.thickness if rep.thickness is not None else nominal
            if r_age <= 0:
                lt = np.zeros(int(m.sum()), dtype=np.float32)
            else:
                lt = np.maximum(np.float32(base) - t_new[m], zero) / np.float32(r_age)
            frac_top = _top_fraction(loss_top[m], loss[m], side[m])
            rate_long_top[m] = lt * frac_top
            rate_long_under[m] = lt * (1 - frac_top)
            rate_long_bound[m] = lt
        if threshold is not None and threshold > 0:
            # censored: point rates 0, upper bound threshold / age
            rate_long_top[censored] = 0
            rate_long_under[censored] = 0
            rate_long_bound[censored] = np.float32(threshold) * inv_age
    else:
        rate_long_top = _nan_map(shape)
        rate_long_under = _nan_map(shape)
        rate_long_bound = _nan_map(shape)

    # ---- short-term -----------------------------------------------------
    sigma_new = _sigma(new, options.default_sigma_mm, "newer")
    counts = {
        "cells": int(t_new.size),
        "scanned": int(np.count_nonzero(scanned)),
        "censored": int(np.count_nonzero(censored)),
        "repair_record": int(np.count_nonzero(record)),
    }
    if old_on_new is None:
        dt = math.nan
        sigma_old = math.nan
        g_sig = math.nan
        r_sig = math.nan
        growth = _nan_map(shape)
        significant = np.zeros(shape, dtype=bool)
        crossed = np.zeros(shape, dtype=bool)
        repaired = record.copy()
        rate_short_top = _nan_map(shape)
        rate_short_under = _nan_map(shape)
        n_rep_mis = 0
        counts.update(compared=0, significant=0, crossed=0)
        governing = "long"
    else:
        if not old_on_new.same_grid(new):
            raise InputError(f"{where(old_on_new.source, None, 'grid')}: the older scan is not "
                             f"on the newer scan's grid; resample it first (register.resample_onto)")
        dt = years_between(old_on_new.meta.inspected, meta.inspected)
        if not dt > 0:
            raise InputError(f"{where(old_on_new.source, None, 'inspected')}: the older scan "
                             f"({old_on_new.meta.inspected}) is not before the newer one "
                             f"({meta.inspected})")
        sigma_old = _sigma(old_on_new, options.default_sigma_mm, "older")
        g_sig = growth_threshold(sigma_old, sigma_new, k=k)
        r_sig = rate_sigma(sigma_old, sigma_new, dt)
        t_old = old_on_new.thickness
        growth = t_old - t_new  # NaN where either not scanned
        g32 = np.float32(g_sig)
        old_loss = loss_map(t_old, float(old_on_new.meta.nominal))
        thr_old = old_on_new.meta.threshold
        with np.errstate(invalid="ignore"):
            # crossed: below the older scan's threshold, reported now; the older loss is
            # unknown in [0, thr_old): estimated per options.crossed
            crossed = censored_map(old_loss, thr_old) & ~censored & np.isfinite(growth)
            if crossed.any():
                old_est = _crossed_old_loss(loss, old_loss, crossed, float(thr_old),
                                            options.crossed)
                growth[crossed] = loss[crossed] - old_est
                del old_est
            significant = growth > g32
            thicker = growth < -g32
            if threshold is not None and threshold > 0:
                # censored now: the new loss is only known to be below the threshold, so
                # no measurable growth, and thicker only if even the threshold depth is
                # shallower than the older loss by more than the noise
                significant &= ~censored
                thicker[censored] = (old_loss[censored] - np.float32(threshold)) > g32
        del old_loss
        after = _after(record_masks, old_on_new.meta.inspected, shape)
        repaired = thicker & ~after
        n_rep_mis = int(np.count_nonzero(repaired))
        rate = np.where(significant, growth, zero)
        rate *= np.float32(1.0 / dt)
        rate[~np.isfinite(growth)] = np.nan
        rate[repaired] = np.nan
        # repair records dated after the older scan: baseline = the repair
        for rep, m in record_masks:
            if rep.date <= old_on_new.meta.inspected:
                continue
            base = np.float32(rep.thickness if rep.thickness is not None else nominal)
            r_dt = years_between(rep.date, meta.inspected)
            g = base - t_new[m]
            growth[m] = g
            sig = g > np.float32(k * sigma_new)
            significant[m] = sig & ~censored[m]
            rate[m] = np.where(significant[m], g, zero) / np.float32(r_dt) if r_dt > 0 else 0
        repaired |= after
        frac_top = _top_fraction(loss_top, loss, side)
        rate_short_top = rate * frac_top
        rate_short_under = rate * (1 - frac_top)
        del rate, frac_top
        counts.update(compared=int(np.count_nonzero(np.isfinite(growth))),
                      significant=int(np.count_nonzero(significant)),
                      crossed=int(np.count_nonzero(crossed)))
        governing = options.governing

    # ---- governing ------------------------------------------------------
    if governing == "short":
        rate_top, rate_under = rate_short_top.copy(), rate_short_under.copy()
    elif governing == "long":
        rate_top, rate_under = rate_long_top.copy(), rate_long_under.copy()
    else:
        rate_top = np.fmax(rate_short_top, rate_long_top)
        rate_under = np.fmax(rate_short_under, rate_long_under)
    if old_on_new is not None:
        # excluded cells (repaired/misaligned, not reset by a record) carry no rate at all
        excluded = repaired & ~after
        rate_top[excluded] = np.nan
        rate_under[excluded] = np.nan
    counts["repaired"] = int(np.count_nonzero(repaired))

    return LossRates(
        loss=loss, censored=censored, loss_top=loss_top, loss_under=loss_under,
        growth=growth, significant=significant, repaired=repaired, repair_record=record,
        crossed=crossed,
        rate_short_top=rate_short_top, rate_short_under=rate_short_under,
        rate_long_top=rate_long_top, rate_long_under=rate_long_under,
        rate_long_bound=rate_long_bound, rate_top=rate_top, rate_under=rate_under,
        growth_sigma=g_sig, rate_sigma=r_sig, sigma_old=sigma_old, sigma_new=sigma_new,
        k_sigma=k, dt_years=dt, age_years=age_years,
        threshold=None if threshold is None else float(threshold), nominal=nominal,
        governing=governing, unknown_side=options.unknown_side,
        repaired_or_misaligned=n_rep_mis, counts=counts)


def _crossed_old_loss(loss, old_loss, crossed, thr_old: float, how: str) -> np.ndarray:
    """Estimated older loss on the ``crossed`` cells (see :class:`RateOptions`). [mm]"""
    old_rep = np.nan_to_num(old_loss[crossed], nan=0.0)
    if how != "profile":
        return np.maximum(old_rep, np.float32(_CROSSED_FRACTION[how] * thr_old))
    from skimage.measure import label

    with np.errstate(invalid="ignore"):
        reported = loss >= np.float32(thr_old) if thr_old > 0 else np.isfinite(loss)
    labels = label(reported | crossed, connectivity=2)
    n = int(labels.max())
    sel = np.flatnonzero(labels)
    lab_sel = labels.ravel()[sel]
    d_new = np.zeros(n + 1, dtype=np.float32)
    np.maximum.at(d_new, lab_sel, np.nan_to_num(loss.ravel()[sel], nan=0.0))
    old_sel = np.nan_to_num(old_loss.ravel()[sel], nan=0.0)
    old_sel[old_sel < np.float32(thr_old)] = 0  # censored older cells carry no depth
    d_old = np.zeros(n + 1, dtype=np.float32)
    np.maximum.at(d_old, lab_sel, old_sel)
    d_new, d_old = d_new[1:], d_old[1:]
    del sel, lab_sel, old_sel
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.clip(np.where(d_new > 0, d_old / d_new, 0.0), 0.0, 1.0)
    ratio = np.r_[0.0, ratio].astype(np.float32)
    # regions with no reported older loss: the older loss is anywhere in [0, thr);
    # take half the threshold (error at most thr/2 either way)
    fresh = np.r_[True, d_old <= 0]
    lab = labels[crossed]
    est = np.where(fresh[lab], np.float32(0.5 * thr_old), loss[crossed] * ratio[lab])
    return np.maximum(old_rep, est)


def _after(record_masks, date, shape) -> np.ndarray:
    out = np.zeros(shape, dtype=bool)
    for rep, m in record_masks:
        if rep.date > date:
            out |= m
    return out


def _top_fraction(loss_top, loss, side) -> np.ndarray:
    """Share of a cell's loss (and change) given to the top side, float32 in [0, 1]."""
    f = (side == SIDE_TOP).astype(np.float32)
    with np.errstate(invalid="ignore", divide="ignore"):
        has = np.isfinite(loss) & (loss > 0)
        f[has] = loss_top[has] / loss[has]
    return f


def fill_uncovered_rates(lr: LossRates, new, old_on_new, labels) -> tuple:
    """Short-term rates for indication cells the older scan did not cover.

    Parameters
    ----------
    lr : LossRates
        The rates of the pair (:func:`compute_rates`).
    new : FloorScan
        The newer scan.
    old_on_new : FloorScan
        The older scan resampled onto the newer grid (NaN where it did not reach).
    labels : (M, N) int ndarray
        Indication label map of ``lr.loss``
        (:func:`~scananalyse.indications.label_indications`); 0 outside indications. [-]

    Returns
    -------
    (LossRates, int)
        The updated rates (``counts["short_rate_filled_from_indication"]`` set when any
        cell is filled) and the number of cells filled.

    Notes
    -----
    An indication cell the older scan missed has only a long-term rate, which understates
    a pit that began late.  It takes its own loss times the largest ratio of short-term
    rate to loss measured in the same connected indication (a pit deepening in
    proportion, as its measured part does); the governing rate is then the greater of
    that and the rate it had.  Only the labelled cells are visited.
    """
    import dataclasses

    n = int(labels.max()) if labels.size else 0
    if n == 0:
        return lr, 0
    idx = np.flatnonzero(labels)
    lab = labels.reshape(-1)[idx]
    uncovered = (~np.isfinite(old_on_new.thickness.reshape(-1)[idx]) & np.isfinite(new.thickness.reshape(-1)[idx])
                 & ~lr.repaired.reshape(-1)[idx])
    if not uncovered.any():
        return lr, 0
    changes = {}
    filled_any = np.zeros(idx.size, dtype=bool)
    for side in ("top", "under"):
        short_full = getattr(lr, f"rate_short_{side}")
        short = short_full.reshape(-1)[idx]
        loss_s = getattr(lr, f"loss_{side}").reshape(-1)[idx]
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.where(np.isfinite(short) & (loss_s > 0), short / loss_s, -1.0).astype(np.float32)
        best = np.full(n + 1, -1.0, dtype=np.float32)
        np.maximum.at(best, lab, ratio)
        b = best[lab]
        fill = np.where(uncovered & (b >= 0), b * np.nan_to_num(loss_s), -1.0)
        take = uncovered & (fill >= 0)
        filled_any |= take
        new_short = short_full.copy()
        new_short.reshape(-1)[idx[take]] = fill[take]
        changes[f"rate_short_{side}"] = new_short
        gov = getattr(lr, f"rate_{side}").astype(np.float32, copy=True)
        g = gov.reshape(-1)
        g[idx[take]] = np.fmax(g[idx[take]], fill[take])
        changes[f"rate_{side}"] = gov
    filled = int(np.count_nonzero(filled_any))
    counts = dict(lr.counts)
    counts["short_rate_filled_from_indication"] = filled
    return dataclasses.replace(lr, counts=counts, **changes), filled
