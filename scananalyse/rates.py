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
  cells) has an older loss unknown in [0, c], c = min(threshold, loss_new·age_old/age_new)
  (linear growth from a start at or after installation); by default
  (``RateOptions.crossed="linear"``) in a connected region of reported loss that the
  older scan reported too, it is estimated by scaling the newer loss by the region's
  older/newer deepest-loss ratio (a pit deepening in proportion); in a region with no
  reported older loss it is taken at c where the threshold binds, else at c/2, times the
  floor's share of indications the older scan did not report (docs/assessment.md §4a).
  ``"profile"`` takes half the threshold there, ``"upper"`` 0 (the conservative bound).
  Such cells are marked in ``LossRates.crossed``.

Intervals: every governing rate comes with a per-cell 90 % interval
(``rate_top_lo``/``rate_top_hi``, ``rate_under_lo``/``rate_under_hi``,
:func:`rate_bounds`); :func:`zone_max_rate_bounds` gives a zone's maximum rate per side
with the winner's curse of the largest of many noisy cells taken off, and its interval.
"""

from __future__ import annotations

import datetime as _dt
import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from .attribution import (DEFAULT_SIDE, Shape, check_inside, parse_date, parse_geometry, parse_number,
                          read_table, resolve_side, shape_mask, split_loss, top_depth_map)
from .errors import InputError, ScanWarning, where
from .scan import MM_PER_IN, SIDE_TOP, FloorScan, years_between

__all__ = [
    "DEFAULT_SIGMA_MM",
    "RateOptions",
    "Repair",
    "LossRates",
    "LossLayers",
    "ZoneRateInputs",
    "loss_layers",
    "read_repairs",
    "loss_map",
    "censored_map",
    "growth_threshold",
    "rate_sigma",
    "compute_rates",
    "rate_bounds",
    "zone_max_rate_bounds",
    "expected_max_normal",
    "Z90",
]

#: Thickness uncertainty (1 σ) used when a scan has no ``sigma``: UT on clean, smooth
#: plate is good to about ±0.1 mm. [memory: domain.md §2]
DEFAULT_SIGMA_MM = 0.1

_REPAIRS_FORMAT = "scananalyse-repairs 1"
_GOVERNING = ("max", "short", "long")
#: Estimate of the older loss in a cell below the older scan's threshold but reported
#: now, as a fraction of that threshold: "upper" growth (older loss 0, conservative),
#: "mid" (half the threshold, error at most ±threshold/2), "lower" (older loss = threshold).
_CROSSED_FRACTION = {"linear": None, "profile": None, "upper": 0.0, "mid": 0.5, "lower": 1.0}
#: One-sided standard-normal quantile for a two-sided 90 % interval, Φ⁻¹(0.95).
Z90 = 1.6448536269514722


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
        the larger of the reported (resampled) older loss and: ``"linear"``
        the newer loss scaled by the ratio older/newer deepest loss of the connected
        region it belongs to (a pit deepening in proportion), or, if the region had no
        reported older loss, the largest older loss consistent with the censoring and
        with linear growth since installation, min(threshold, loss_new·age_old/age_new)
        (see docs/assessment.md: a zone's maximum is picked among such cells, whose
        older loss sat near that bound; this estimate always gives
        ``LossRates.rate_*_fit``, the zone-maximum input); ``"profile"`` (default) the same
        with half the threshold in regions with no reported older loss (error at most
        ±threshold/2), the point rate then being the faster of this and the ``"linear"``
        one, so the rates the co-located life uses are the conservative side of the two;
        ``"upper"`` 0 (the measured change, the conservative bound), ``"mid"`` half the
        threshold, ``"lower"`` the threshold. [-]
    interval_k : multiple of the rate's noise σ on each side of a cell's rate interval
        (``rate_*_lo``/``rate_*_hi``); 1.645 gives each side 5 %, a 90 % interval. [-]
    """

    k_sigma: float = 2.0
    governing: str = "max"
    unknown_side: str = DEFAULT_SIDE
    default_sigma_mm: float = DEFAULT_SIGMA_MM
    crossed: str = "profile"
    interval_k: float = Z90

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
        if not (math.isfinite(self.interval_k) and self.interval_k >= 0):
            raise InputError(f"{where(None, None, 'interval_k')}: must be >= 0, got {self.interval_k!r}")
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
    path, _h, units, rows = read_table(
        path, _REPAIRS_FORMAT, ("shape", "date"),
        ("x", "y", "r", "w", "h", "points", "thickness", "note"))
    scale = MM_PER_IN if units == "in" else 1.0
    out = []
    for n, row in rows:
        date = parse_date(row["date"], path, n, "date")
        geo = parse_geometry(row, path, n, scale)
        thick = None
        if row.get("thickness"):
            thick = parse_number(row["thickness"], path, n, "thickness", positive=True) * scale
            if thick > _MAX_REPAIR_THICKNESS_MM:  # the scans' own bound on a nominal plate
                raise InputError(f"{where(path, n, 'thickness')}: {thick:g} mm is above the limit of "
                                 f"{_MAX_REPAIR_THICKNESS_MM:g} mm for a floor plate; wrong units or a "
                                 "typing error")
        shape = Shape(side=0, source=path, line=n, **geo)
        if scan is not None:
            check_inside(shape, scan)
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


@dataclass(eq=False, frozen=True)
class ZoneRateInputs:
    """Per-cell maps for the zone maximum rates (:meth:`LossRates.zone_inputs`): the
    selection-aware estimate ``*_fit``, the interval ends ``*_lo``/``*_hi`` per side
    [mm/y], and the rate noise ``sigma`` (map or scalar) [mm/y]."""

    top_fit: np.ndarray
    top_lo: np.ndarray
    top_hi: np.ndarray
    under_fit: np.ndarray
    under_lo: np.ndarray
    under_hi: np.ndarray
    sigma: object


@dataclass(eq=False)
class LossRates:
    """Loss and rate maps on the newer scan's grid (float32 / bool), and scalars.

    Maps: ``loss``, ``loss_top``, ``loss_under`` [mm]; ``censored``; ``growth`` (old −
    new thickness, NaN where either is unscanned) [mm]; ``significant``; ``repaired``
    (thicker beyond the noise, or inside a repair record dated after the older scan);
    ``repair_record``; ``crossed`` (below the older threshold, reported now);
    ``rate_short_top``, ``rate_short_under``, ``rate_long_top``,
    ``rate_long_under``, ``rate_long_bound``, ``rate_top``, ``rate_under`` [mm/y], and
    the interval of each governing rate, ``rate_top_lo`` ≤ ``rate_top`` ≤
    ``rate_top_hi``, ``rate_under_lo`` ≤ ``rate_under`` ≤ ``rate_under_hi`` [mm/y]
    (:func:`rate_bounds`; NaN where the point is NaN), and ``rate_top_fit``,
    ``rate_under_fit`` [mm/y]: the governing rates with the older loss of crossed cells
    estimated for a zone maximum (``RateOptions.crossed="linear"``; the same arrays as
    the point maps when the options already say so), inside the intervals too.
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
    rate_top_fit: np.ndarray
    rate_under_fit: np.ndarray
    rate_top_lo: np.ndarray
    rate_top_hi: np.ndarray
    rate_under_lo: np.ndarray
    rate_under_hi: np.ndarray
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
    interval_k: float = Z90
    counts: dict = field(default_factory=dict)

    MAP_NAMES = ("loss", "censored", "loss_top", "loss_under", "growth", "significant",
                 "repaired", "repair_record", "crossed", "rate_short_top", "rate_short_under",
                 "rate_long_top", "rate_long_under", "rate_long_bound", "rate_top", "rate_under",
                 "rate_top_fit", "rate_under_fit", "rate_top_lo", "rate_top_hi", "rate_under_lo",
                 "rate_under_hi")

    def maps(self) -> dict:
        """All maps by name (for results.h5)."""
        return {name: getattr(self, name) for name in self.MAP_NAMES}

    def zone_inputs(self) -> "ZoneRateInputs":
        """The maps :func:`zone_max_rate_bounds` (and ``assess.assess_zones``) need."""
        return ZoneRateInputs(top_fit=self.rate_top_fit, top_lo=self.rate_top_lo,
                              top_hi=self.rate_top_hi, under_fit=self.rate_under_fit,
                              under_lo=self.rate_under_lo, under_hi=self.rate_under_hi,
                              sigma=self.rate_sigma_map())

    def rate_sigma_map(self) -> np.ndarray:
        """One-σ noise of each cell's governing rate, float32 [mm/y]: √(σ_old² + σ_new²)/Δt
        where the short-term rate compares two readings, σ_new/Δt on crossed cells (the
        older loss there is a bound, not a reading), σ_new/age where only the long-term
        rate is known; NaN where the rate is."""
        if math.isfinite(self.dt_years):
            out = np.full(self.loss.shape, np.float32(self.rate_sigma), dtype=np.float32)
            out[self.crossed] = np.float32(self.sigma_new / self.dt_years)
        else:
            out = np.full(self.loss.shape, np.float32(self.sigma_new / self.age_years)
                          if math.isfinite(self.age_years) else np.nan, dtype=np.float32)
        out[np.isnan(self.rate_top) & np.isnan(self.rate_under)] = np.nan
        return out

    def summary(self) -> dict:
        """Scalars and counts, plain Python numbers."""
        out = {
            "growth_sigma_mm": self.growth_sigma, "rate_sigma_mm_y": self.rate_sigma,
            "sigma_old_mm": self.sigma_old, "sigma_new_mm": self.sigma_new,
            "k_sigma": self.k_sigma, "dt_years": self.dt_years, "age_years": self.age_years,
            "threshold_mm": self.threshold, "nominal_mm": self.nominal,
            "governing": self.governing, "unknown_side": self.unknown_side,
            "repaired_or_misaligned": self.repaired_or_misaligned,
            "interval_k": self.interval_k,
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
    """Loss, censoring and the per-side split of the newer scan (no older scan needed,
    so they can be known while the registration still runs; :func:`compute_rates`
    makes the same maps itself).

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
    loss = loss_map(new.thickness, float(new.meta.nominal))
    censored = censored_map(loss, new.meta.threshold)
    tdm = top_depth_map(top_depth, new) if top_depth is not None else None
    loss_top, loss_under = split_loss(loss, side, top_depth=tdm)
    return LossLayers(loss=loss, censored=censored, loss_top=loss_top, loss_under=loss_under)


def compute_rates(new: FloorScan, old_on_new: FloorScan | None, side: np.ndarray, *,
                  top_depth=None, repairs=None, options: RateOptions = RateOptions()) -> LossRates:
    """Loss, per-side loss and per-side short-/long-term and governing rate maps, each
    governing rate with a per-cell interval.

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

    The interval of each cell's rate (``rate_top_lo`` … ``rate_under_hi``) is
    :func:`rate_bounds`.
    """
    side = _checked_side(new, side, options.unknown_side)
    layers = _layers(new, side, top_depth)
    record_masks = _repair_masks(new, repairs)
    record = np.zeros(new.shape, dtype=bool)
    for _rep, m in record_masks:
        record |= m
    long = _long_term(new, layers, side, record_masks)
    sigma_new = _sigma(new, options.default_sigma_mm, "newer")
    if old_on_new is None:
        short = _ShortTerm.none(new.shape, record)
        governing = "long"
    else:
        short = _short_term(new, old_on_new, layers, side, record_masks, options, sigma_new)
        governing = options.governing
    rate_top, rate_under = _governing(governing, short.rate_top, short.rate_under,
                                      long.rate_top, long.rate_under)
    if short.fit_top is short.rate_top:
        fit_top, fit_under = rate_top, rate_under
    else:
        fit_top, fit_under = _governing(governing, short.fit_top, short.fit_under,
                                        long.rate_top, long.rate_under)
    if old_on_new is not None:
        # excluded cells (repaired/misaligned, not reset by a record) carry no rate at all
        excluded = short.repaired & ~short.after
        for m in {id(a): a for a in (rate_top, rate_under, fit_top, fit_under)}.values():
            m[excluded] = np.nan
    bounds = rate_bounds(new, old_on_new, layers, side, short=short, rate_top=rate_top,
                         rate_under=rate_under, governing=governing, sigma_new=sigma_new,
                         k=options.interval_k, fit_top=fit_top, fit_under=fit_under)
    counts = {
        "cells": int(new.thickness.size),
        "scanned": int(np.count_nonzero(np.isfinite(new.thickness))),
        "censored": int(np.count_nonzero(layers.censored)),
        "repair_record": int(np.count_nonzero(record)),
        "compared": short.n_compared,
        "significant": int(np.count_nonzero(short.significant)),
        "crossed": int(np.count_nonzero(short.crossed)),
        "repaired": int(np.count_nonzero(short.repaired)),
    }
    threshold = new.meta.threshold
    return LossRates(
        loss=layers.loss, censored=layers.censored, loss_top=layers.loss_top,
        loss_under=layers.loss_under, growth=short.growth, significant=short.significant,
        repaired=short.repaired, repair_record=record, crossed=short.crossed,
        rate_short_top=short.rate_top, rate_short_under=short.rate_under,
        rate_long_top=long.rate_top, rate_long_under=long.rate_under,
        rate_long_bound=long.bound, rate_top=rate_top, rate_under=rate_under,
        rate_top_fit=fit_top, rate_under_fit=fit_under, rate_top_lo=bounds[0], rate_top_hi=bounds[1], rate_under_lo=bounds[2],
        rate_under_hi=bounds[3],
        growth_sigma=short.g_sig, rate_sigma=short.r_sig, sigma_old=short.sigma_old,
        sigma_new=sigma_new, k_sigma=float(options.k_sigma), dt_years=short.dt,
        age_years=long.age, threshold=None if threshold is None else float(threshold),
        nominal=float(new.meta.nominal), governing=governing, unknown_side=options.unknown_side,
        repaired_or_misaligned=short.n_rep_mis, interval_k=float(options.interval_k),
        counts=counts)


def _repair_masks(new: FloorScan, repairs) -> list:
    """(repair, scanned cells inside it) per record; records after the newer scan rejected."""
    out = []
    scanned = np.isfinite(new.thickness)
    for rep in repairs or ():
        if rep.date > new.meta.inspected:
            raise InputError(f"{rep.shape.where()}: field 'date': repair dated "
                             f"{rep.date.isoformat()} after the newer inspection "
                             f"{new.meta.inspected.isoformat()}")
        out.append((rep, shape_mask(rep.shape, new) & scanned))
    return out


@dataclass(eq=False)
class _LongTerm:
    rate_top: np.ndarray
    rate_under: np.ndarray
    bound: np.ndarray
    age: float


def _long_term(new: FloorScan, layers: LossLayers, side, record_masks) -> _LongTerm:
    """Long-term rates (loss ÷ years in service, from a repair date inside a record)."""
    meta, shape = new.meta, new.shape
    age = meta.age_years
    if age is None:
        return _LongTerm(_nan_map(shape), _nan_map(shape), _nan_map(shape), math.nan)
    if not age > 0:
        raise InputError(f"{where(new.source, None, 'installed')}: installed "
                         f"{meta.installed} is not before the inspection {meta.inspected}")
    loss, zero = layers.loss, np.float32(0)
    inv_age = np.float32(1.0 / age)
    top = layers.loss_top * inv_age
    under = layers.loss_under * inv_age
    bound = loss * inv_age
    for rep, m in record_masks:
        r_age = years_between(rep.date, meta.inspected)
        base = rep.thickness if rep.thickness is not None else float(meta.nominal)
        if r_age <= 0:
            lt = np.zeros(int(m.sum()), dtype=np.float32)
        else:
            lt = np.maximum(np.float32(base) - new.thickness[m], zero) / np.float32(r_age)
        frac_top = _top_fraction(layers.loss_top[m], loss[m], side[m])
        top[m] = lt * frac_top
        under[m] = lt * (1 - frac_top)
        bound[m] = lt
    threshold = meta.threshold
    if threshold is not None and threshold > 0:
        # censored: point rates 0, upper bound threshold / age
        top[layers.censored] = 0
        under[layers.censored] = 0
        bound[layers.censored] = np.float32(threshold) * inv_age
    return _LongTerm(top, under, bound, float(age))


@dataclass(eq=False)
class _ShortTerm:
    growth: np.ndarray
    significant: np.ndarray
    crossed: np.ndarray
    repaired: np.ndarray
    after: np.ndarray
    rate_top: np.ndarray
    rate_under: np.ndarray
    fit_top: np.ndarray  # the same with the "linear" crossed estimate
    fit_under: np.ndarray
    old_lo: np.ndarray | None  # older loss interval on the compared cells [mm]
    old_hi: np.ndarray | None
    dt: float
    sigma_old: float
    g_sig: float
    r_sig: float
    n_rep_mis: int
    n_compared: int

    @classmethod
    def none(cls, shape, record):
        """No older scan: no short-term rates."""
        nothing = np.zeros(shape, dtype=bool)
        rt, ru = _nan_map(shape), _nan_map(shape)
        return cls(growth=_nan_map(shape), significant=nothing, crossed=nothing.copy(),
                   repaired=record.copy(), after=nothing.copy(), rate_top=rt,
                   rate_under=ru, fit_top=rt, fit_under=ru, old_lo=None, old_hi=None, dt=math.nan,
                   sigma_old=math.nan, g_sig=math.nan, r_sig=math.nan, n_rep_mis=0, n_compared=0)


def _short_term(new: FloorScan, old_on_new: FloorScan, layers: LossLayers, side, record_masks,
                options: RateOptions, sigma_new: float) -> _ShortTerm:
    """Short-term rates: growth between the scans, the noise rule, crossed cells, records."""
    meta, shape = new.meta, new.shape
    if not old_on_new.same_grid(new):
        raise InputError(f"{where(old_on_new.source, None, 'grid')}: the older scan is not "
                         f"on the newer scan's grid; resample it first (register.resample_onto)")
    dt = years_between(old_on_new.meta.inspected, meta.inspected)
    if not dt > 0:
        raise InputError(f"{where(old_on_new.source, None, 'inspected')}: the older scan "
                         f"({old_on_new.meta.inspected}) is not before the newer one "
                         f"({meta.inspected})")
    k = float(options.k_sigma)
    sigma_old = _sigma(old_on_new, options.default_sigma_mm, "older")
    g_sig = growth_threshold(sigma_old, sigma_new, k=k)
    r_sig = rate_sigma(sigma_old, sigma_new, dt)
    loss, censored, zero = layers.loss, layers.censored, np.float32(0)
    threshold = meta.threshold
    t_new = new.thickness
    growth = old_on_new.thickness - t_new  # NaN where either not scanned
    g32 = np.float32(g_sig)
    old_loss = loss_map(old_on_new.thickness, float(old_on_new.meta.nominal))
    old_lo, old_hi = old_loss.copy(), old_loss.copy()
    thr_old = old_on_new.meta.threshold
    age_ratio = _age_ratio(old_on_new.meta, meta)
    with np.errstate(invalid="ignore"):
        # crossed: below the older scan's threshold, reported now; the older loss is
        # unknown in [0, thr_old): estimated per options.crossed
        crossed = censored_map(old_loss, thr_old) & ~censored & np.isfinite(growth)
        if crossed.any():
            old_est = _crossed_old_loss(loss, old_loss, crossed, float(thr_old),
                                        options.crossed, age_ratio)
            growth[crossed] = loss[crossed] - old_est
            if options.crossed != "linear":
                old_est = _crossed_old_loss(loss, old_loss, crossed, float(thr_old), "linear",
                                            age_ratio)
            fit_change = loss[crossed] - old_est
            old_lo[crossed] = 0
            old_hi[crossed] = _older_loss_cap(loss[crossed], float(thr_old), age_ratio)
            del old_est
        # censored in the older scan and now: the older loss is in [0, thr_old) too
        both_cens = censored_map(old_loss, thr_old) & ~crossed
        old_lo[both_cens] = 0
        old_hi[both_cens] = np.float32(thr_old) if thr_old else 0
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
        base = np.float32(rep.thickness if rep.thickness is not None else meta.nominal)
        r_dt = years_between(rep.date, meta.inspected)
        g = base - t_new[m]
        growth[m] = g
        significant[m] = (g > np.float32(k * sigma_new)) & ~censored[m]
        rate[m] = np.where(significant[m], g, zero) / np.float32(r_dt) if r_dt > 0 else 0
    fit = rate
    if crossed.any():
        fit = rate.copy()
        keep = ~(after | repaired)[crossed]
        vals = np.where(fit_change > g32, fit_change, zero) * np.float32(1.0 / dt)
        idx = np.flatnonzero(crossed)[keep]
        fit.reshape(-1)[idx] = vals[keep]
        if options.crossed == "profile":
            # the point takes the faster of the two estimates (the shorter life)
            rate.reshape(-1)[idx] = np.fmax(rate.reshape(-1)[idx], vals[keep])
        del fit_change, vals, idx, keep
    repaired |= after
    frac_top = _top_fraction(layers.loss_top, loss, side)
    return _ShortTerm(growth=growth, significant=significant, crossed=crossed, repaired=repaired,
                      after=after, rate_top=rate * frac_top, rate_under=rate * (1 - frac_top),
                      fit_top=fit * frac_top, fit_under=fit * (1 - frac_top),
                      old_lo=old_lo, old_hi=old_hi, dt=dt, sigma_old=sigma_old, g_sig=g_sig,
                      r_sig=r_sig, n_rep_mis=n_rep_mis,
                      n_compared=int(np.count_nonzero(np.isfinite(growth))))


def _governing(governing: str, short_top, short_under, long_top, long_under):
    """Governing rate maps (new arrays): short, long, or the greater of the two."""
    if governing == "short":
        return short_top.copy(), short_under.copy()
    if governing == "long":
        return long_top.copy(), long_under.copy()
    return np.fmax(short_top, long_top), np.fmax(short_under, long_under)


def _age_ratio(old_meta, new_meta) -> float | None:
    """Years in service at the older scan ÷ at the newer one; None without ``installed``."""
    if new_meta.installed is None or not new_meta.age_years or new_meta.age_years <= 0:
        return None
    a_old = years_between(new_meta.installed, old_meta.inspected)
    return min(max(a_old / new_meta.age_years, 0.0), 1.0)


def _older_loss_cap(loss_new, thr_old: float, age_ratio: float | None) -> np.ndarray:
    """Largest older loss a censored older cell can have had: below the older threshold
    and, with linear growth started at or after installation, at most
    loss_new · age_old/age_new. [mm]"""
    cap = np.full(np.shape(loss_new), np.float32(thr_old), dtype=np.float32)
    if age_ratio is not None:
        np.minimum(cap, np.nan_to_num(loss_new, nan=0.0) * np.float32(age_ratio), out=cap)
    return cap


def rate_bounds(new: FloorScan, old_on_new: FloorScan | None, layers: LossLayers, side, *,
                short, rate_top, rate_under, governing: str, sigma_new: float, k: float,
                fit_top=None, fit_under=None):
    """Per-cell interval of the governing rate of each side.

    Parameters
    ----------
    new, old_on_new : the scans on one grid (``old_on_new`` None: long-term only). [-]
    layers : the newer scan's :class:`LossLayers`. [-]
    side : resolved int8 side map. [-]
    short : the short-term part computed by :func:`compute_rates` (older-loss bounds). [-]
    rate_top, rate_under : governing point rates (NaN cells stay NaN). [mm/y]
    fit_top, fit_under : other estimates that must lie inside the interval too. [mm/y]
    governing : ``"max"``, ``"short"`` or ``"long"``. [-]
    sigma_new : thickness σ of the newer scan. [mm]
    k : coverage factor of the noise term (1.645: each side of a 90 % interval). [-]

    Returns
    -------
    (top_lo, top_hi, under_lo, under_hi), float32 maps. [mm/y]

    Notes
    -----
    The older loss of a cell censored in the older scan lies in [0, c], c = the older
    threshold or, with linear growth since installation, loss_new·age_old/age_new if
    smaller (our bound). The short-term interval is
    [(loss_new − old_max − k·σ_g)/Δt, (loss_new − old_min + k·σ_g)/Δt] clipped at 0,
    σ_g = √(σ_old² + σ_new²) [domain.md §3]; a cell censored now has loss_new in
    [0, threshold). The long-term interval is (loss_new ∓ k·σ_new)/age (censored:
    [0, threshold/age]). Under linear growth from a start at or after installation the
    true rate is at least the long-term one, so the governing interval (``"max"``) is
    the elementwise greater of the two intervals. Each side takes its share of the
    cell's loss, except that a censored cell's upper end goes to both sides (its
    unseen loss may be on either face). The point rate lies inside the interval.
    """
    meta, shape = new.meta, new.shape
    zero = np.float32(0)
    loss = layers.loss
    thr = float(meta.threshold) if meta.threshold else 0.0
    cens = layers.censored
    lo_s = hi_s = lo_l = hi_l = None
    if old_on_new is not None:
        g_sig = math.hypot(short.sigma_old, sigma_new)
        new_lo = np.where(cens, zero, loss)
        new_hi = np.where(cens, np.float32(thr), loss)
        noise = np.float32(k * g_sig)
        lo_s = np.maximum(new_lo - short.old_hi - noise, zero) / np.float32(short.dt)
        hi_s = np.maximum(new_hi - short.old_lo + noise, zero) / np.float32(short.dt)
        del new_lo, new_hi
        if short.after.any():  # records after the older scan: the point rate ± noise of t_new
            lo_s[short.after] = np.nan  # filled from the point below
            hi_s[short.after] = np.nan
    age = meta.age_years
    if age is not None and age > 0:
        inv = np.float32(1.0 / age)
        lo_l = np.maximum(loss - np.float32(k * sigma_new), zero) * inv
        hi_l = (loss + np.float32(k * sigma_new)) * inv
        lo_l[cens] = 0
        hi_l[cens] = np.float32(thr) * inv
    if governing == "short" or (governing == "max" and lo_l is None):
        lo, hi = lo_s, hi_s
    elif governing == "long" or lo_s is None:
        lo, hi = lo_l, hi_l
    else:
        lo, hi = np.fmax(lo_s, lo_l), np.fmax(hi_s, hi_l)
    if lo is None:
        return tuple(_nan_map(shape) for _ in range(4))
    frac_top = _top_fraction(layers.loss_top, loss, side)
    out = []
    for point, fit, frac in ((rate_top, fit_top, frac_top), (rate_under, fit_under, 1 - frac_top)):
        side_lo = lo * frac
        # loss below the threshold may be on either face: a censored cell's upper end
        # is the whole cell's on both sides
        side_hi = np.where(cens, hi, hi * frac)
        # the point always lies inside its interval (records, the crossed-cell estimate)
        for est in (point, fit):
            if est is not None:
                np.fmin(side_lo, est, out=side_lo)
                np.fmax(side_hi, est, out=side_hi)
        nan = np.isnan(point)
        side_lo[nan] = np.nan
        side_hi[nan] = np.nan
        out += [side_lo.astype(np.float32, copy=False), side_hi.astype(np.float32, copy=False)]
    return tuple(out)


def expected_max_normal(m) -> np.ndarray:
    """Expected maximum of ``m`` independent standard normal values (Blom's approximation).

    Parameters
    ----------
    m : number of values, ≥ 1 (array-like). [-]

    Returns
    -------
    float64 array, E[max] ≈ Φ⁻¹((m − 0.375)/(m + 0.25)); 0 for m = 1. [-]

    References
    ----------
    G. Blom, Statistical Estimates and Transformed Beta-Variables, Wiley 1958
    (plotting position (i − 3/8)/(n + 1/4) for normal order statistics).
    """
    from scipy.special import ndtri

    m = np.maximum(np.asarray(m, dtype=np.float64), 1.0)
    return ndtri((m - 0.375) / (m + 0.25))


def zone_max_rate_bounds(rate, rate_lo, rate_hi, zones, *, sigma_rate, k: float = Z90,
                         iterations: int = 8) -> dict:
    """Per zone: a point estimate of the zone's true maximum rate that the selection of
    the largest of many noisy cells does not bias, and a 90 % interval for it.

    Parameters
    ----------
    rate : per-cell point rate of one side (``LossRates.rate_top`` or ``rate_under``),
        NaN = none. [mm/y]
    rate_lo, rate_hi : the ends of each cell's interval (``rate_top_lo``,
        ``rate_top_hi`` …). [mm/y]
    zones : :class:`~scananalyse.zones.ZoneMap` on the same grid. [-]
    sigma_rate : one-σ noise of a cell's rate, a scalar or a map
        (:meth:`LossRates.rate_sigma_map`). [mm/y]
    k : multiple of σ below the point for the lower end (1.645: 5 % below). [-]
    iterations : fixed-point iterations of the point estimate. [-]

    Returns
    -------
    dict of float64 arrays, one value per zone (NaN where the zone has no rate):
    ``point``, ``lo``, ``hi`` [mm/y]; ``n_candidates`` [-].

    Notes
    -----
    The largest of m cells that share one true rate μ with independent noise σ is on
    average μ + σ·E[max of m standard normals] (:func:`expected_max_normal`). The point
    estimate solves μ = max − σ·E[max of m(μ)], m(μ) the cells whose rate is at least
    μ − σ (the cells that can compete for the maximum), by fixed-point iteration from
    μ = max; σ is the noise of the cell that holds the maximum (our rule, the winner's
    curse taken off). ``lo`` = the lesser of point − k·σ and the largest per-cell lower
    end less σ·E[max of m] (the lower ends take a crossed cell's older loss at its
    largest), at least 0. ``hi`` = the largest per-cell
    upper end: the cell whose true rate is the zone's maximum has its true rate below
    its own upper end but in 5 % of cases, so the largest upper end is above the true
    maximum at least as often. Censoring enters through the cells' point rates and
    intervals (:func:`rate_bounds`, docs/assessment.md).
    """
    g = zones.gather(np.asarray(rate, dtype=np.float32))
    sig_map = np.ndim(sigma_rate) > 0
    sg = zones.gather(np.asarray(sigma_rate, dtype=np.float32)) if sig_map else None
    mx = zones.reduce_gathered(g, np.max)
    hi = zones.reduce_gathered(zones.gather(np.asarray(rate_hi, dtype=np.float32)), np.max)
    sizes = zones.n_cells()
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(np.int64)
    n = len(zones.names)
    sigma = np.zeros(n)
    for z in range(n):
        if np.isnan(mx[z]):
            continue
        if sig_map:
            seg = g[starts[z]:starts[z] + sizes[z]]
            s = float(sg[starts[z] + int(np.nanargmax(seg))])
        else:
            s = float(sigma_rate)
        sigma[z] = s if math.isfinite(s) else 0.0
    point = mx.copy()
    m = np.ones(n, dtype=np.int64)
    for _ in range(iterations):
        floor = np.repeat(np.nan_to_num(point, nan=np.inf) - sigma, sizes).astype(np.float32)
        with np.errstate(invalid="ignore"):
            m = np.maximum(zones.count_gathered(g >= floor), 1)
        point = np.maximum(mx - sigma * expected_max_normal(m), 0.0)
    point = np.where(np.isnan(mx), np.nan, point)
    lo_max = zones.reduce_gathered(zones.gather(np.asarray(rate_lo, dtype=np.float32)), np.max)
    lo = np.fmin(point - k * sigma, lo_max - sigma * expected_max_normal(m))
    lo = np.maximum(lo, 0.0)
    hi = np.fmax(hi, point)
    return {"point": point, "lo": np.where(np.isnan(mx), np.nan, lo), "hi": hi, "n_candidates": m}


def _crossed_old_loss(loss, old_loss, crossed, thr_old: float, how: str,
                      age_ratio: float | None = None) -> np.ndarray:
    """Estimated older loss on the ``crossed`` cells (see :class:`RateOptions`). [mm]"""
    old_rep = np.nan_to_num(old_loss[crossed], nan=0.0)
    if how not in ("profile", "linear"):
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
    # regions with no reported older loss: the older loss is anywhere in [0, thr)
    fresh = np.r_[True, d_old <= 0]
    lab = labels[crossed]
    if how == "linear":
        # where the threshold binds (a pit growing linearly since installation would have
        # been reported) the threshold, else the middle of [0, loss_new·age_old/age_new];
        # times the share of this floor's indications the older scan did not report
        # (docs/assessment.md)
        n_fresh = int(np.count_nonzero(fresh[1:]))
        share = n_fresh / n if n else 1.0
        cap = _older_loss_cap(loss[crossed], thr_old, age_ratio)
        binds = cap >= np.float32(thr_old) * np.float32(0.999)
        fresh_est = np.where(binds, cap, cap * np.float32(0.5)) * np.float32(share)
        del cap, binds
    else:
        fresh_est = np.float32(0.5 * thr_old)  # error at most thr/2 either way
    est = np.where(fresh[lab], fresh_est, loss[crossed] * ratio[lab])
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
        # on the filled cells only, the interval (and the per-cell fit behind the zone
        # maximum) takes in the filled rate, so the point stays inside its interval
        cells = idx[take]
        for end, op in (("hi", np.fmax), ("lo", np.fmin), ("fit", np.fmax)):
            m = getattr(lr, f"rate_{side}_{end}").astype(np.float32, copy=True)
            flat = m.reshape(-1)
            flat[cells] = op(flat[cells], g[cells])
            changes[f"rate_{side}_{end}"] = m
    filled = int(np.count_nonzero(filled_any))
    counts = dict(lr.counts)
    counts["short_rate_filled_from_indication"] = filled
    return dataclasses.replace(lr, counts=counts, **changes), filled
