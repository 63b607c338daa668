"""Remaining life and the inspection interval per floor zone.

Three estimates per zone, and the recommendation as the least of them and the cap:

1. :func:`code_interval` — the API 653 bottom-minimum formula solved for the
   interval, exactly as the standard reads (age-based rates from the thinnest
   areas, uncapped), so it can be filed.
2. :func:`local_life_map` — the co-located projection: each cell's own life
   (t − MRT)/(r_top + r_under) from the measured rates; the zone takes its shortest.
3. The extreme-value life — the deepest loss expected over the whole zone area
   (return level, upper bound) and the fastest rate (see :func:`eva_life`).

:func:`assess_zones` puts them in one tidy table (the ``zones.csv`` columns) with
the governing bound, the next due date and flags wherever the code formula
promises more than the metal supports.

Everything is mm, mm/y and years.  Results are decision support; the standard
in force, the owner's authorised inspector and local regulations decide.
"""

from __future__ import annotations

import datetime as _dt
import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .errors import InputError
from .scan import DAYS_PER_YEAR, SIDE_TOP, SIDE_UNDER, SIDE_UNKNOWN

__all__ = [
    "CodeResult",
    "AssessOptions",
    "code_interval",
    "repair_to_thickness",
    "local_life_map",
    "eva_life",
    "zone_mrt",
    "critical_zone_minimum",
    "mrt_map",
    "add_years",
    "assess_zones",
    "code_formula",
    "recommend_interval",
    "ZONE_COLUMNS",
    "BOUND_NAMES",
    "PROBABILITY_COLUMNS",
    "add_life_distribution",
]

#: The zones.csv columns of the design contract, in order (more follow them).
ZONE_COLUMNS = [
    "zone", "area_m2", "coverage_pct", "t_min_mm", "depth_max_mm", "depth_eva_mm",
    "depth_eva_upper_mm", "rate_top_max_mm_y", "rate_under_max_mm_y", "mrt_mm",
    "interval_code_y", "life_local_y", "interval_recommended_y", "next_due", "limiting", "flags",
]

#: Names of the bounds the recommendation takes the least of, in tie-break order.
BOUND_NAMES = ("code", "local", "eva", "initial", "cap")

#: The columns of the zone life distribution (:func:`add_life_distribution`), after the others.
PROBABILITY_COLUMNS = ["life_p05_y", "life_p50_y", "life_p95_y", "p_mrt_at_due", "p_leak_at_due"]


def _num(x, field_name, *, positive=False, allow_none=False):
    if x is None and allow_none:
        return None
    if isinstance(x, bool) or not isinstance(x, (int, float, np.floating, np.integer)):
        raise InputError(f"assessment: field '{field_name}': expected a number, got {x!r}")
    x = float(x)
    if not math.isfinite(x) or (positive and x <= 0):
        raise InputError(f"assessment: field '{field_name}': must be "
                         f"{'a positive' if positive else 'a finite'} number, got {x!r}")
    return x


# ---------------------------------------------------------------------------
# 1. The code formula
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class CodeResult:
    """Result of :func:`code_interval`.

    Attributes
    ----------
    stpr : StPr used in Or (0 when the coating credit is taken). [mm/y]
    upr : UPr used in Or (0 with effective CP). [mm/y]
    t_used_upr : thickness UPr was computed from. [mm]
    min_rt : min(RTbc, RTip). [mm]
    interval_y : Or, uncapped; ≤ 0 when already below MRT; inf when StPr + UPr = 0. [y]
    rtbc, rtip, mrt : the inputs. [mm]
    stpr_age : the age-based top-side rate (t0 − RTip)/age before any coating credit. [mm/y]
    coating_credit : True when StPr was set to 0 for the coating.
    notes : short remarks on the choices made.
    """

    stpr: float
    upr: float
    t_used_upr: float
    min_rt: float
    interval_y: float
    rtbc: float
    rtip: float
    mrt: float
    stpr_age: float
    coating_credit: bool
    notes: tuple[str, ...] = ()


def code_interval(*, t0: float, rtbc: float, rtip: float, mrt: float, age_years: float,
                  method: str = "MFL", threshold: float | None = None, coated: bool = False,
                  coating_life_years: float | None = None,
                  cp_effective: bool = False) -> CodeResult:
    """Interval from the API 653 bottom-minimum formula, solved for Or.

    Parameters
    ----------
    t0 : original (nominal) plate thickness. [mm]
    rtbc : minimum remaining thickness from bottom-side corrosion after repairs. [mm]
    rtip : minimum remaining thickness from internal (top-side) corrosion after repairs. [mm]
    mrt : minimum remaining thickness at the end of the interval (Table 4.4). [mm]
    age_years : years in service. [y]
    method : scan method; ``"MFL"`` (any case) applies the MFL-threshold rule to UPr.
    threshold : MFL threshold as a loss depth (the scan reports no loss shallower than
        this); None if unknown. [mm]
    coated : the top side is coated (or lined).
    coating_life_years : expected remaining life of the coating; None = unknown (no
        credit). [y]
    cp_effective : cathodic protection of the underside is effective (UPr = 0).

    Returns
    -------
    CodeResult

    Notes
    -----
    API 653 §4.4.7.1 (§4.4.5 in later editions) [memory; term definitions seen in
    quotations]::

        MRT = min(RTbc, RTip) − Or · (StPr + UPr)
        Or  = (min(RTbc, RTip) − MRT) / (StPr + UPr)

    with the age-based rates StPr = (t0 − RTip)/age and UPr = (t0 − t_used)/age,
    t_used = min(t0 − threshold, RTbc) for MFL scans (the lesser of the thickness the
    MFL threshold corresponds to and the thinnest unrepaired area) and RTbc otherwise.
    Rates are taken as ≥ 0 (a plate thicker than nominal is not negative corrosion).

    Coating circularity: StPr = 0 only for a coating whose life is at least Or, but Or
    depends on StPr.  We take the longest Or that satisfies the inequality
    MRT ≤ min(RTbc, RTip) − Or·(StPr(Or) + UPr) with StPr(Or) = 0 when the coating
    life ≥ Or and the age-based StPr otherwise, i.e.
    Or = max(min(coating life, Or₀), Or₁), Or₀ and Or₁ the intervals with StPr = 0 and
    with the age-based StPr.  When the coating life is shorter than Or₀ the credit
    holds only up to the coating life (a note says so).

    When StPr + UPr = 0 the interval is ``inf`` (written ``inf`` in CSV tables) if the
    floor is at or above MRT, and 0 if it is already below.  Below MRT with non-zero
    rates the interval is negative (years since MRT was crossed at those rates).

    References
    ----------
    API Standard 653, Tank Inspection, Repair, Alteration, and Reconstruction,
    §4.4.7.1 (3rd ed.) / §4.4.5; Table 4.4.
    """
    t0 = _num(t0, "t0", positive=True)
    rtbc = _num(rtbc, "rtbc")
    rtip = _num(rtip, "rtip")
    mrt = _num(mrt, "mrt")
    age = _num(age_years, "age_years", positive=True)
    threshold = _num(threshold, "threshold", allow_none=True)
    notes: list[str] = []

    stpr_age = max(0.0, (t0 - rtip) / age)
    is_mfl = str(method).strip().upper() == "MFL"
    if is_mfl and threshold is not None:
        t_thr = t0 - threshold
        t_used = min(t_thr, rtbc)
        if t_thr < rtbc:
            notes.append("UPr from the MFL threshold")
    else:
        t_used = rtbc
        if is_mfl:
            notes.append("MFL threshold unknown: UPr from RTbc")
    if cp_effective:
        upr = 0.0
        notes.append("UPr 0: effective CP")
    else:
        upr = max(0.0, (t0 - t_used) / age)
    min_rt = min(rtbc, rtip)
    margin = min_rt - mrt

    def solve(stpr):
        s = stpr + upr
        if s > 0:
            return margin / s
        return math.inf if margin >= 0 else 0.0

    stpr = stpr_age
    credit = False
    or1 = solve(stpr_age)
    if coated:
        cl = coating_life_years
        if cl is None:
            notes.append("coating life unknown: no StPr credit")
        else:
            cl = _num(cl, "coating_life_years")
            if margin >= 0 and cl > 0:
                or0 = solve(0.0)
                or_cred = min(cl, or0)
                if or_cred > or1:
                    stpr, credit = 0.0, True
                    interval = or_cred
                    if cl < or0:
                        notes.append(f"Or limited to the coating life {cl:g} y (StPr 0 while it lasts)")
                    else:
                        notes.append("StPr 0: coating life >= Or")
                else:
                    notes.append("coating life < Or: no StPr credit")
    if not credit:
        interval = or1
    if margin < 0:
        notes.append("below MRT")
    return CodeResult(stpr=stpr, upr=upr, t_used_upr=t_used, min_rt=min_rt, interval_y=interval,
                      rtbc=rtbc, rtip=rtip, mrt=mrt, stpr_age=stpr_age, coating_credit=credit,
                      notes=tuple(notes))


def repair_to_thickness(*, mrt: float, t0: float, age_years: float, interval_years: float,
                        n_sides: int, round_up_to: float | None = None) -> float:
    """Repair-to thickness that gives a target interval under the code formula.

    Parameters
    ----------
    mrt : minimum remaining thickness. [mm or in]
    t0 : original plate thickness, same unit as ``mrt``. [mm or in]
    age_years : years in service. [y]
    interval_years : target interval Or. [y]
    n_sides : number of unprotected sides (0, 1 or 2). [1]
    round_up_to : if given, round the result UP to this step, same unit. [mm or in]

    Returns
    -------
    float : RT, in the unit of ``mrt`` and ``t0``.

    Notes
    -----
    Every area thinner than RT is repaired; the thinnest remaining area RT then
    gives each unprotected side an age-based rate (t0 − RT)/age, and the code
    formula MRT = RT − Or·n·(t0 − RT)/age solved for RT is::

        RT = (MRT + k·t0) / (1 + k),   k = n·Or/age

    References
    ----------
    MFL threshold table calculated from API 653 3rd ed. §4.4.7.1, published by a
    tank consultancy (domain notes §4): 0.175 / 0.150 / 0.120 in for t0 = 0.250 in,
    age 20 y, Or 10 y.
    """
    mrt = _num(mrt, "mrt")
    t0 = _num(t0, "t0", positive=True)
    age = _num(age_years, "age_years", positive=True)
    orr = _num(interval_years, "interval_years")
    if orr < 0:
        raise InputError(f"assessment: field 'interval_years': must be >= 0, got {orr!r}")
    if n_sides not in (0, 1, 2) or isinstance(n_sides, bool):
        raise InputError(f"assessment: field 'n_sides': must be 0, 1 or 2, got {n_sides!r}")
    k = n_sides * orr / age
    rt = (mrt + k * t0) / (1.0 + k)
    if round_up_to is not None:
        step = _num(round_up_to, "round_up_to", positive=True)
        rt = math.ceil(rt / step - 1e-9) * step
    return rt


# ---------------------------------------------------------------------------
# 2. Co-located projection and extreme-value life
# ---------------------------------------------------------------------------
def local_life_map(thickness, rate_top, rate_under, mrt) -> np.ndarray:
    """Co-located remaining life of each cell.

    Parameters
    ----------
    thickness : remaining thickness, NaN where not scanned. [mm]
    rate_top : governing top-side rate at each cell (negative values count as 0). [mm/y]
    rate_under : governing underside rate at each cell (negative values count as 0). [mm/y]
    mrt : minimum remaining thickness, scalar or per-cell array. [mm]

    Returns
    -------
    float32 array : life (t − MRT)/(r_top + r_under) [y]; ``inf`` where both rates are
    0 and the cell is at or above MRT; 0 where the cell is already below MRT; NaN where
    the thickness or a rate is NaN.

    Notes
    -----
    Both faces thin the same plate, so at one cell the two losses add; unlike the
    code formula, the rates are those measured at the cell itself (domain notes §5).
    """
    t, rt, ru, m = np.broadcast_arrays(*(np.asarray(a, dtype=np.float32)
                                         for a in (thickness, rate_top, rate_under, mrt)))
    if t.ndim == 0:
        return _local_life(t, rt, ru, m)
    out = np.empty(t.shape, dtype=np.float32)
    # a band of rows at a time: the temporaries are a band's, not the grid's
    for r0 in range(0, t.shape[0], _LIFE_BAND_ROWS):
        b = slice(r0, r0 + _LIFE_BAND_ROWS)
        out[b] = _local_life(t[b], rt[b], ru[b], m[b])
    return out


#: Rows of the grid per pass of :func:`local_life_map`.
_LIFE_BAND_ROWS = 256


def _local_life(t, rt, ru, m) -> np.ndarray:
    s = np.maximum(rt, np.float32(0)) + np.maximum(ru, np.float32(0))
    margin = t - m
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        life = margin / s
    life = np.where(s > 0, life, np.float32(np.inf))
    life = np.where(margin < 0, np.float32(0), life)
    life = np.where(np.isnan(margin) | np.isnan(s), np.float32(np.nan), life)
    return life.astype(np.float32, copy=False)


def eva_life(*, t0: float, depth_upper: float, mrt: float, rate: float) -> float:
    """Extreme-value life of a zone.

    Parameters
    ----------
    t0 : original plate thickness. [mm]
    depth_upper : upper confidence bound of the deepest loss expected over the whole
        zone area (return level). [mm]
    mrt : minimum remaining thickness of the zone. [mm]
    rate : rate applied to that deepest loss. [mm/y]

    Returns
    -------
    float : (t0 − depth_upper − MRT)/rate [y]; 0 if t0 − depth_upper is already below
    MRT; ``inf`` if the rate is 0; NaN if an input is NaN.
    """
    margin = float(t0) - float(depth_upper) - float(mrt)
    rate = max(float(rate), 0.0) if not math.isnan(rate) else math.nan
    if math.isnan(margin) or math.isnan(rate):
        return math.nan
    if margin < 0:
        return 0.0
    if rate == 0:
        return math.inf
    return margin / rate


# ---------------------------------------------------------------------------
# 3. Per-zone assessment
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class AssessOptions:
    """Tank facts and choices of the assessment.

    Parameters
    ----------
    leak_detection : a means of leak detection and containment (MRT case of Table 4.4).
    reinforced_lining : a reinforced lining thicker than the rule set's
        ``lining_min_thickness_mm`` (MRT case; also counts as coated, and as a
        fibreglass-reinforced lining for the initial interval).
    coated : top side coated (thin-film coating for the initial interval).
    coating_life_years : expected remaining coating life; None = unknown. [y]
    cp_effective : effective cathodic protection of the underside.
    release_prevention_barrier : a release-prevention barrier (cap 30 y instead of 20).
    unknown_side : where loss of unattributed cells counts: ``"under"`` (default) or
        ``"top"``.
    target_interval_years : the interval the owner wants; zones recommended less get
        ``target-not-reached``; None for no target. [y]
    shell_tmin_mm : tmin of the lower shell course, for the critical-zone minimum. [mm]
    annular_tmin_mm : minimum thickness of the annular plates (Table 4.5 by the user),
        raises the annular zone's MRT. [mm]
    corrosion_allowance_mm : bottom corrosion allowance, for the initial interval. [mm]
    """

    leak_detection: bool = False
    reinforced_lining: bool = False
    coated: bool = False
    coating_life_years: float | None = None
    cp_effective: bool = False
    release_prevention_barrier: bool = False
    unknown_side: str = "under"
    target_interval_years: float | None = 10.0
    shell_tmin_mm: float | None = None
    annular_tmin_mm: float | None = None
    corrosion_allowance_mm: float | None = None

    def __post_init__(self):
        if self.unknown_side not in ("under", "top"):
            raise InputError(f"assessment: field 'unknown_side': must be 'under' or 'top', "
                             f"got {self.unknown_side!r}")
        for nm in ("coating_life_years", "target_interval_years", "shell_tmin_mm",
                   "annular_tmin_mm", "corrosion_allowance_mm"):
            v = getattr(self, nm)
            if v is not None:
                v = _num(v, nm)
                if v < 0:
                    raise InputError(f"assessment: field '{nm}': must be >= 0, got {v!r}")


def zone_mrt(zones, rules, options: AssessOptions, *, t0: float) -> np.ndarray:
    """MRT of each zone. [mm]

    Table 4.4 MRT everywhere; in the critical zone at least the critical-zone minimum
    (:meth:`RuleSet.critical_zone_min_mm`); in the annular zone at least
    ``options.annular_tmin_mm`` when given.

    Parameters
    ----------
    zones : :class:`~scananalyse.zones.ZoneMap`.
    rules : :class:`~scananalyse.rules.RuleSet`.
    options : :class:`AssessOptions`.
    t0 : original plate thickness. [mm]
    """
    base = rules.mrt_mm(leak_detection=options.leak_detection,
                        reinforced_lining=options.reinforced_lining)
    out = np.full(len(zones.names), base, dtype=np.float64)
    for k, kind in enumerate(zones.kinds):
        if kind == "critical":
            out[k] = max(base, rules.critical_zone_min_mm(t0, options.shell_tmin_mm))
        elif kind == "annular" and options.annular_tmin_mm is not None:
            out[k] = max(base, options.annular_tmin_mm)
    return out


def critical_zone_minimum(rules, t0: float, shell_tmin_mm: float | None = None) -> tuple[float, str]:
    """The critical-zone minimum and a sentence saying how it was set.

    min(``critical_zone_min_t0_fraction`` × t0, ``critical_zone_min_shell_fraction`` ×
    the lower shell course tmin), but not below ``critical_zone_min_floor_mm``
    (API 653 §4.4.7 [memory]; :meth:`RuleSet.critical_zone_min_mm`).

    Parameters
    ----------
    rules : :class:`~scananalyse.rules.RuleSet`.
    t0 : original plate thickness, without corrosion allowance. [mm]
    shell_tmin_mm : tmin of the lower shell course; None = not given (the default). [mm]

    Returns
    -------
    (minimum, note) : the minimum [mm] and the sentence for the critical zone's notes.
        Without ``shell_tmin_mm`` only the half-plate and floor terms apply and the note
        says the shell term was not applied: the minimum is then never below the code's
        (min() over fewer terms), and above it wherever 50 % of the shell tmin would have
        been the smaller term.
    """
    cz = rules.critical_zone_min_mm(t0, shell_tmin_mm)
    f0 = rules.v("critical_zone_min_t0_fraction")
    fs = rules.v("critical_zone_min_shell_fraction")
    floor = rules.v("critical_zone_min_floor_mm")
    head = f"critical-zone minimum {cz:.2f} mm = max(min({f0:g} × t0 {t0:.2f} mm"
    if shell_tmin_mm is None:
        return cz, (f"{head}), {floor:.2f} mm); no tmin of the lower shell course given (--shell-tmin): "
                    f"its {fs * 100:g} % term was not applied, which can only raise the minimum")
    return cz, (f"{head}, {fs * 100:g} % × lower shell course tmin {float(shell_tmin_mm):.2f} mm), "
                f"{floor:.2f} mm)")


def mrt_map(zones, rules, options: AssessOptions, *, t0: float) -> np.ndarray:
    """Per-cell MRT on the zone grid (float32, NaN outside the floor). [mm]"""
    lut = np.append(zone_mrt(zones, rules, options, t0=t0), np.nan).astype(np.float32)
    return lut[zones.labels]  # label -1 picks the trailing NaN


def add_years(date: _dt.date, years: float) -> _dt.date:
    """``date`` plus ``years``: whole years by calendar (29 Feb → 28 Feb), the rest in
    mean Gregorian days (365.2425 per year).

    Parameters
    ----------
    date : start date.
    years : years to add, finite and ≥ 0. [y]
    """
    whole = int(math.floor(years + 1e-9))
    frac = max(years - whole, 0.0)
    y = date.year + whole
    try:
        d = date.replace(year=y)
    except ValueError:  # 29 February into a common year
        d = date.replace(year=y, day=28)
    return d + _dt.timedelta(days=int(round(frac * DAYS_PER_YEAR)))


def _attr(obj, name):
    if obj is None:
        return None
    if isinstance(obj, dict):
        v = obj.get(name)
    else:
        v = getattr(obj, name, None)
    if v is None:
        return None
    try:
        v = float(v)
    except (TypeError, ValueError):
        return None
    return None if math.isnan(v) else v


def recommend_interval(*, code: float, local: float, eva: float, initial: float, cap: float,
                       rules) -> tuple[float, str]:
    """The recommended interval: the least of the bounds, never below 0, rounded down.

    Parameters
    ----------
    code : code-formula interval (:func:`code_interval`), NaN = not known. [y]
    local : co-located life of the zone, NaN = not known. [y]
    eva : extreme-value life of the zone, NaN = not known. [y]
    initial : initial interval when no rates are known, else NaN. [y]
    cap : the interval cap (20 or 30 y). [y]
    rules : :class:`~scananalyse.rules.RuleSet` (``round_interval``). [-]

    Returns
    -------
    (interval, limiting) : the interval [y], rounded DOWN to the rule set's step, and the
    name of the bound that governs (first of :data:`BOUND_NAMES` on a tie).
    """
    bounds = {"code": code, "local": local, "eva": eva, "initial": initial, "cap": cap}
    valid = {b: float(v) for b, v in bounds.items() if not math.isnan(v)}
    best = min(valid.values())
    limiting = next(b for b in BOUND_NAMES if b in valid and valid[b] == best)
    return rules.round_interval(max(best, 0.0)), limiting


def assess_zones(*, thickness, side, rate_top, rate_under, zones, meta, rules,
                 options: AssessOptions | None = None, extremes: dict | None = None,
                 pitch_mm: float | None = None, rate_short_available: bool = True,
                 zone_rates=None) -> pd.DataFrame:
    """Assess every zone: code formula, co-located and extreme-value lives, recommendation.

    Parameters
    ----------
    thickness : remaining thickness on the new scan's grid, NaN = not scanned. [mm]
    side : int8 side layer (0 unknown, 1 top, 2 under) on the grid, or None (all unknown).
    rate_top : governing top-side point rate map, or None when no rates are known. [mm/y]
    rate_under : governing underside point rate map, or None when no rates are known. [mm/y]
    zones : :class:`~scananalyse.zones.ZoneMap` on the same grid.
    meta : :class:`~scananalyse.scan.ScanMeta` of the new scan (nominal, method,
        threshold, installed, inspected).
    rules : :class:`~scananalyse.rules.RuleSet`.
    options : :class:`AssessOptions` (defaults if None).
    extremes : ``{zone name: object}`` with attributes (or keys) ``depth_eva_mm``,
        ``depth_eva_upper_mm`` [mm] and optionally ``rate_eva_mm_y`` [mm/y]; a zone
        missing here gets ``life_eva_y`` NaN and the flag ``no-eva``.
    pitch_mm : grid pitch, checked against the zone map if given. [mm]
    rate_short_available : False for a single inspection (long-term rates only):
        every zone gets ``no-short-term-rates``.
    zone_rates : :class:`~scananalyse.rates.ZoneRateInputs` (``LossRates.zone_inputs()``):
        the per-cell selection-aware estimates, interval ends and noise that give the zone
        maxima with their 90 % interval; None = the plain largest point rate, no interval.

    Returns
    -------
    DataFrame, one row per zone: the :data:`ZONE_COLUMNS` first, then ``kind``,
    ``n_scanned``, ``rtbc_mm``, ``rtip_mm``, ``t_used_upr_mm``, ``stpr_mm_y``,
    ``upr_mm_y``, ``rate_top_max_lo_mm_y``, ``rate_top_max_hi_mm_y``,
    ``rate_under_max_lo_mm_y``, ``rate_under_max_hi_mm_y``, ``rate_top_max_raw_mm_y``,
    ``rate_under_max_raw_mm_y``, ``life_local_short_y``, ``life_local_fit_y``,
    ``rate_eva_mm_y``,
    ``rate_eva_source``, ``life_eva_y``, ``initial_interval_y``, ``cap_y``, ``notes``.

    Notes
    -----
    - RTbc is the thinnest cell attributed to the underside (side 2, and side 0 when
      ``options.unknown_side == "under"``), RTip the thinnest top-side cell; t0 where a
      zone has none.  The code formula (:func:`code_interval`) runs on these reported
      thicknesses with age-based rates, uncapped; NaN with flag ``no-age`` if the scan
      has no ``installed`` date.
    - ``rate_top_max_mm_y`` / ``rate_under_max_mm_y`` are the point estimates of the
      zone's true maximum rate per side (:func:`~scananalyse.rates.zone_max_rate_bounds`
      on ``zone_rates``' selection-aware maps, the winner's curse of the largest of many
      noisy cells taken off), with the 90 % interval in ``rate_*_max_lo_mm_y`` /
      ``rate_*_max_hi_mm_y``; the plain largest point rate is ``rate_*_max_raw_mm_y``.
      Without ``zone_rates`` the point is the plain largest and the interval NaN.
    - ``life_local_y`` is the least of :func:`local_life_map` over the zone from the
      point rates; ``life_local_short_y`` the same from each cell's upper rate (the
      short end of the co-located life) and ``life_local_fit_y`` from the
      selection-aware estimates (``zone_rates``' ``*_fit``); both reported, not used
      by the recommendation (docs/assessment.md §4a).
    - ``depth_eva_mm`` / ``depth_eva_upper_mm``: the zone's deepest loss, never below the
      observed ``depth_max_mm``: the greater of it and the median / predictive upper bound
      of the deepest loss in the part nobody scanned (``depth_hidden_p50_mm``,
      ``depth_hidden_p95_mm``, over ``hidden_area_m2``; :mod:`scananalyse.evlife`).
    - ``life_eva_y`` is the extremes' ``life_eva_y`` when given (the shorter of the seen
      and the hidden part's life, :func:`scananalyse.evlife.zone_lives`); else
      (t0 − d − MRT)/rate_eva (:func:`eva_life`) with d the given depth bound and
      rate_eva the extremes' ``rate_eva_mm_y`` or, when that is missing, the sum of the
      zone's upper ends ``rate_top_max_hi_mm_y + rate_under_max_hi_mm_y`` (flag
      ``eva-rate-assumed``; ``rate_eva_source`` says which).  ``eva_source`` says whose fit
      the hidden part used (``zone``, ``floor``: borrowed, flag ``eva-borrowed``;
      ``worst-seen``: no fit anywhere, flag ``eva-worst-seen``).
    - With no rate maps at all, the initial-interval rules apply
      (:meth:`RuleSet.initial_interval_years`, flag ``initial-interval``).
    - ``interval_recommended_y`` = :func:`recommend_interval` of the code interval,
      life_local, life_eva, the initial interval (when it applies) and the cap.
      ``next_due`` = inspected + recommended (ISO date; empty when NaN).
    - ``inf`` means no measurable loss rate (written ``inf`` in CSV).
    - Flags (``;``-joined): ``no-data``, ``below-mrt``, ``critical-zone-below-min``,
      ``code-exceeds-local``, ``code-exceeds-eva``, ``low-coverage``,
      ``target-not-reached``, ``no-short-term-rates``, ``no-age``, ``no-eva``,
      ``eva-rate-assumed``, ``eva-below-mrt`` (the upper bound of the deepest loss in the
      unscanned part is already past MRT), ``eva-borrowed``, ``eva-worst-seen``,
      ``initial-interval``, ``no-mfl-threshold``.
    """
    options = options if options is not None else AssessOptions()
    t, side, rt, ru = _checked_maps(thickness, side, rate_top, rate_under, zones, pitch_mm)
    t0 = _num(meta.nominal, "nominal", positive=True)
    age = meta.age_years
    if age is not None and not age > 0:
        raise InputError(f"scan metadata: field 'installed': {meta.installed} is not before "
                         f"the inspection date {meta.inspected}")
    z = _zone_reductions(t, side, rt, ru, zones, rules, options, t0=t0,
                         zone_rates=zone_rates, threshold=meta.threshold)
    has_rates = rt is not None
    ctx = _Context(
        t0=t0, age=age, meta=meta, rules=rules, options=options, extremes=extremes or {},
        has_rates=has_rates, rate_short_available=rate_short_available,
        cap=rules.interval_cap_years(options.release_prevention_barrier),
        initial=rules.initial_interval_years(
            frp_lining=options.reinforced_lining,
            thin_film_coating=options.coated and not options.reinforced_lining,
            cp_effective=options.cp_effective,
            release_prevention_barrier=options.release_prevention_barrier,
            corrosion_allowance_mm=options.corrosion_allowance_mm),
        cz=critical_zone_minimum(rules, t0, options.shell_tmin_mm),
        min_cov=rules.v("min_coverage_pct"))
    rows = [_zone_row(k, name, zones.kinds[k], z, ctx) for k, name in enumerate(zones.names)]
    df = pd.DataFrame(rows)
    extra = [c for c in df.columns if c not in ZONE_COLUMNS]
    return df[ZONE_COLUMNS + extra]


def _checked_maps(thickness, side, rate_top, rate_under, zones, pitch_mm):
    """The input maps as arrays of the zone grid's shape (rates None when none given)."""
    t = np.asarray(thickness, dtype=np.float32)
    if t.shape != zones.shape:
        raise ValueError(f"thickness shape {t.shape} differs from the zone grid {zones.shape}")
    if pitch_mm is not None and abs(float(pitch_mm) - zones.pitch) > 1e-6 * zones.pitch:
        raise InputError(f"assessment: field 'pitch_mm': {pitch_mm!r} differs from the zone "
                         f"grid pitch {zones.pitch:g} mm")
    side = np.zeros(t.shape, dtype=np.int8) if side is None else np.asarray(side)
    if side.shape != t.shape:
        raise ValueError(f"side shape {side.shape} differs from the thickness {t.shape}")
    if rate_top is None and rate_under is None:
        return t, side, None, None
    rt = np.zeros(t.shape, np.float32) if rate_top is None else np.asarray(rate_top, np.float32)
    ru = np.zeros(t.shape, np.float32) if rate_under is None else np.asarray(rate_under, np.float32)
    for nm, a in (("rate_top", rt), ("rate_under", ru)):
        if a.shape != t.shape:
            raise ValueError(f"{nm} shape {a.shape} differs from the thickness {t.shape}")
    return t, side, rt, ru


def _zone_reductions(t, side, rt, ru, zones, rules, options, *, t0, zone_rates,
                     threshold=None) -> dict:
    """Per-zone arrays: coverage, thinnest cells per side, co-located lives, rate maxima.

    A cell whose loss is below the scan's detection threshold and whose point rates are 0
    has no measured rate (the rate 0 is the censored reading's, not a measurement): its
    co-located life is not counted, so a zone of such cells only has NaN, never ``inf``
    (:func:`_unmeasured_cells`)."""
    from .rates import zone_max_rate_bounds

    # each map's zoned cells are gathered once (zone after zone) and reduced per zone there
    unk_under = options.unknown_side == "under"
    nanf = np.float32(np.nan)
    n = len(zones.names)
    t_g = zones.gather(t)
    side_g = zones.gather(side)
    under_g = (side_g == SIDE_UNDER) | ((side_g == SIDE_UNKNOWN) & unk_under)
    top_g = (side_g == SIDE_TOP) | ((side_g == SIDE_UNKNOWN) & (not unk_under))
    del side_g
    scanned_g = ~np.isnan(t_g)
    n_scanned = zones.count_gathered(scanned_g)
    out = {"n_scanned": n_scanned, "coverage": zones.coverage_from_counts(n_scanned),
           "t_min": zones.reduce_gathered(t_g, np.min),
           "rtbc": zones.reduce_gathered(np.where(under_g, t_g, nanf), np.min),
           "rtip": zones.reduce_gathered(np.where(top_g, t_g, nanf), np.min),
           "mrt": zone_mrt(zones, rules, options, t0=t0),
           "area_m2": np.asarray(zones.areas_mm2, dtype=np.float64) / 1e6,
           "n_unmeasured": np.zeros(len(zones.names), dtype=np.int64),
           "censored_hi": np.full(len(zones.names), np.nan)}
    del t_g, under_g, top_g
    nan_z = np.full(n, np.nan)
    for key in ("life", "life_short", "life_fit", "top_raw", "under_raw"):
        out[key] = nan_z.copy()
    for s in ("top", "under"):
        out[s] = {"point": nan_z.copy(), "lo": nan_z.copy(), "hi": nan_z.copy()}
    if rt is None:
        return out
    mrt = mrt_map(zones, rules, options, t0=t0)
    life = local_life_map(t, rt, ru, mrt)
    unmeasured = _unmeasured_cells(t, rt, ru, t0=t0, threshold=threshold)
    life[unmeasured] = np.nan
    out["life"] = zones.reduce_gathered(zones.gather(life), np.min)
    out["n_unmeasured"] = zones.count_gathered(zones.gather(unmeasured))
    del life
    if zone_rates is not None and unmeasured.any():
        # a censored cell's total loss is below the threshold, so its rate is below the
        # larger of its two sides' upper ends (not their sum)
        hi = np.fmax(np.asarray(zone_rates.top_hi, np.float32), np.asarray(zone_rates.under_hi, np.float32))
        out["censored_hi"] = zones.reduce_gathered(zones.gather(np.where(unmeasured, hi, nanf)), np.max)
    for s, point_map in (("top", rt), ("under", ru)):
        out[f"{s}_raw"] = zones.reduce_gathered(np.where(scanned_g, zones.gather(point_map), nanf),
                                                np.max)
        if zone_rates is None:
            out[s]["point"] = out[f"{s}_raw"]
            continue
        fit, lo, hi = (np.asarray(getattr(zone_rates, f"{s}_{e}"), np.float32) for e in ("fit", "lo", "hi"))
        for nm, a in (("fit", fit), ("lo", lo), ("hi", hi)):
            if a.shape != t.shape:
                raise ValueError(f"zone_rates.{s}_{nm} shape {a.shape} differs from the thickness {t.shape}")
        b = zone_max_rate_bounds(np.where(np.isnan(t), nanf, fit), lo, hi, zones,
                                 sigma_rate=zone_rates.sigma)
        out[s] = {"point": b["point"], "lo": b["lo"], "hi": b["hi"]}
    if zone_rates is not None:
        for key, a, b in (("life_short", zone_rates.top_hi, zone_rates.under_hi),
                          ("life_fit", zone_rates.top_fit, zone_rates.under_fit)):
            life = local_life_map(t, np.asarray(a, np.float32), np.asarray(b, np.float32), mrt)
            out[key] = zones.reduce_gathered(zones.gather(life), np.min)
    return out


def _unmeasured_cells(t, rt, ru, *, t0: float, threshold) -> np.ndarray:
    """Cells read as below the detection threshold whose point rates are both 0 (or NaN).

    Such a cell's true loss is somewhere in [0, threshold) and its rate is not measured:
    0 is the censored reading's rate, and ``inf`` would be a biased point reported as
    a life. The extreme-value life bounds this metal instead (docs/assessment.md §4).
    """
    if threshold is None or not threshold > 0:
        return np.zeros(t.shape, dtype=bool)
    from .rates import censored_map

    with np.errstate(invalid="ignore"):
        no_rate = ~(rt > 0) & ~(ru > 0)
        return censored_map(np.float32(t0) - t, threshold) & no_rate & ~np.isnan(t)


@dataclass(frozen=True)
class _Context:
    """What every zone row needs besides its own reductions."""

    t0: float
    age: float | None
    meta: object
    rules: object
    options: AssessOptions
    extremes: dict
    has_rates: bool
    rate_short_available: bool
    cap: float
    initial: float
    cz: tuple[float, str]  # critical-zone minimum [mm] and how it was set
    min_cov: float

    @property
    def cz_min(self) -> float:
        return self.cz[0]


_NAN_COLS = ("t_min_mm", "depth_max_mm", "depth_eva_mm", "depth_eva_upper_mm",
             "rate_top_max_mm_y", "rate_under_max_mm_y", "interval_code_y",
             "life_local_y", "interval_recommended_y", "rtbc_mm", "rtip_mm",
             "t_used_upr_mm", "stpr_mm_y", "upr_mm_y", "rate_top_max_lo_mm_y",
             "rate_top_max_hi_mm_y", "rate_under_max_lo_mm_y", "rate_under_max_hi_mm_y",
             "rate_top_max_raw_mm_y", "rate_under_max_raw_mm_y", "life_local_short_y",
             "life_local_fit_y", "depth_hidden_p50_mm", "depth_hidden_p95_mm", "hidden_area_m2",
             "rate_eva_mm_y", "life_eva_y")


def _zone_row(k: int, name: str, kind: str, z: dict, c: _Context) -> dict:
    """One zones.csv row: code formula, lives, recommendation and flags of zone ``k``."""
    mrt = float(z["mrt"][k])
    row = {"zone": name, "kind": kind, "area_m2": float(z["area_m2"][k]),
           "coverage_pct": float(z["coverage"][k]) if z["n_scanned"][k] else 0.0,
           "n_scanned": int(z["n_scanned"][k]), "mrt_mm": mrt, "cap_y": c.cap,
           "initial_interval_y": c.initial if not c.has_rates else math.nan}
    if z["n_scanned"][k] == 0:
        row.update({col: math.nan for col in _NAN_COLS})
        row.update({"next_due": "", "limiting": "", "rate_eva_source": "", "eva_source": "",
                    "flags": "no-data", "notes": "zone not scanned"
                    + (f"; {c.cz[1]}" if kind == "critical" else "")})
        return row
    flags: list[str] = []
    notes: list[str] = []
    t0 = c.t0
    tmin = float(z["t_min"][k])
    rtbc = float(z["rtbc"][k]) if not math.isnan(z["rtbc"][k]) else t0
    rtip = float(z["rtip"][k]) if not math.isnan(z["rtip"][k]) else t0
    row.update({"t_min_mm": tmin, "depth_max_mm": max(t0 - tmin, 0.0), "rtbc_mm": rtbc,
                "rtip_mm": rtip, "life_local_y": float(z["life"][k]),
                "life_local_short_y": float(z["life_short"][k]),
                "life_local_fit_y": float(z["life_fit"][k])})
    for s in ("top", "under"):
        row.update({f"rate_{s}_max_mm_y": float(z[s]["point"][k]),
                    f"rate_{s}_max_lo_mm_y": float(z[s]["lo"][k]),
                    f"rate_{s}_max_hi_mm_y": float(z[s]["hi"][k]),
                    f"rate_{s}_max_raw_mm_y": float(z[f"{s}_raw"][k])})
    if kind == "critical":
        notes.append(c.cz[1])
    if c.has_rates and z["n_unmeasured"][k] == z["n_scanned"][k]:
        notes.append("no scanned cell has loss above the detection threshold: no co-located "
                     "life is measured; the extreme-value life bounds the zone")
    code = _code_part(row, rtbc, rtip, mrt, c, flags, notes)
    life_eva = _eva_part(row, name, mrt, c, flags, censored_hi=float(z["censored_hi"][k]))
    rec, limiting = recommend_interval(code=code, local=row["life_local_y"], eva=life_eva,
                                       initial=c.initial if not c.has_rates else math.nan,
                                       cap=c.cap, rules=c.rules)
    row.update({"interval_recommended_y": rec, "limiting": limiting,
                "next_due": add_years(c.meta.inspected, rec).isoformat()})
    _flags(flags, row, kind, tmin, mrt, code, life_eva, rec, c)
    row["flags"] = ";".join(flags)
    row["notes"] = "; ".join(notes)
    return row


def code_formula(meta, options: AssessOptions):
    """:func:`code_interval` of a floor's zones as ``f(rtbc, rtip, mrt)`` -> CodeResult: the
    scan's nominal, age, method and threshold and the job's coating and CP options; None
    without an installation date.  The zone table and the spot readings of a scanned zone
    (:func:`~scananalyse.readings.add_reading_zones`) both run it."""
    age = meta.age_years
    if age is None:
        return None
    t0 = _num(meta.nominal, "nominal", positive=True)

    def formula(rtbc, rtip, mrt):
        return code_interval(t0=t0, rtbc=rtbc, rtip=rtip, mrt=mrt, age_years=age, method=meta.method or "",
                             threshold=meta.threshold, coated=options.coated or options.reinforced_lining,
                             coating_life_years=options.coating_life_years, cp_effective=options.cp_effective)
    return formula


def _code_part(row, rtbc, rtip, mrt, c: _Context, flags, notes) -> float:
    """The code-formula interval of a zone (exactly as the standard reads)."""
    meta = c.meta
    if c.age is None:
        row.update({"t_used_upr_mm": math.nan, "stpr_mm_y": math.nan, "upr_mm_y": math.nan,
                    "interval_code_y": math.nan})
        flags.append("no-age")
        return math.nan
    method = meta.method or ""
    cr = code_formula(meta, c.options)(rtbc, rtip, mrt)
    row.update({"t_used_upr_mm": cr.t_used_upr, "stpr_mm_y": cr.stpr, "upr_mm_y": cr.upr,
                "interval_code_y": cr.interval_y})
    notes.extend(cr.notes)
    if method.strip().upper() == "MFL" and meta.threshold is None:
        flags.append("no-mfl-threshold")
    return cr.interval_y


#: Standard normal quantile added, times the scan's sigma, to the deepest observed loss
#: in ``depth_eva_upper_mm`` (a one-sided 95 % bound on the reading). [-]
OBSERVED_UPPER_Z = 1.645


def _eva_part(row, name, mrt, c: _Context, flags, censored_hi: float = math.nan) -> float:
    """The extreme-value life of a zone and its depth columns.

    The zone's deepest loss is never below the deepest observed: ``depth_eva_mm`` is the
    greater of the observed deepest and the median predicted deepest in the part nobody
    scanned, ``depth_eva_upper_mm`` the greater of the observed and its predictive upper
    bound (:data:`scananalyse.evlife.HIDDEN_LEVELS`).  The life is the extremes' own when
    they give it (:func:`scananalyse.evlife.zone_lives`: the shorter of the seen and the
    hidden part's); else, from a given depth bound, :func:`eva_life` at the extremes' rate
    or the zone's upper-end rates.  With no statistics at all, a zone holding cells read
    below the detection threshold with no measured rate gets the fallback life of that
    metal: a loss at the threshold growing at ``censored_hi``, the largest upper-end rate
    of those cells (flag ``eva-fallback``).
    """
    ex = c.extremes.get(name)
    obs = row["depth_max_mm"]
    h50 = _attr(ex, "depth_hidden_p50_mm")
    h95 = _attr(ex, "depth_hidden_p95_mm")
    mid = h50 if h50 is not None else _attr(ex, "depth_eva_mm")
    bound = next((v for v in (h95, _attr(ex, "depth_pred_upper_mm"), _attr(ex, "depth_eva_upper_mm"))
                  if v is not None), None)
    # the observed deepest as an upper bound carries the reading's own noise (one-sided 95 %)
    obs_up = obs + OBSERVED_UPPER_Z * float(c.meta.sigma or 0.0)
    d_eva = max(obs, mid) if mid is not None else obs
    d_up = max(obs_up, bound) if bound is not None else obs_up
    direct = _attr(ex, "life_eva_y")
    r_eva = _attr(ex, "rate_eva_mm_y")
    r_src = "extremes" if r_eva is not None else ""
    if ex is not None and direct is not None:
        life_eva = max(float(direct), 0.0)
        r_src = "life-blocks"
    elif ex is not None and bound is not None:
        if r_eva is None:
            r_eva, r_src = _assumed_eva_rate(row, c.has_rates)
            flags.append("eva-rate-assumed")
        life_eva = eva_life(t0=c.t0, depth_upper=d_up, mrt=mrt, rate=r_eva)
    else:
        life_eva = math.nan
        flags.append("no-eva")
        if not math.isnan(censored_hi):
            r_eva, r_src = censored_hi, "censored-hi"
            life_eva = eva_life(t0=c.t0, depth_upper=float(c.meta.threshold), mrt=mrt, rate=r_eva)
            flags.append("eva-fallback")
    if bound is not None and c.t0 - bound < mrt:
        flags.append("eva-below-mrt")
    source = str((ex.get("eva_source") if isinstance(ex, dict) else getattr(ex, "eva_source", "")) or "")
    if source in ("floor", "worst-seen"):
        flags.append("eva-borrowed" if source == "floor" else "eva-worst-seen")
    hidden_m2 = _attr(ex, "hidden_area_m2")
    row.update({"depth_eva_mm": d_eva, "depth_eva_upper_mm": d_up,
                "depth_hidden_p50_mm": h50 if h50 is not None else math.nan,
                "depth_hidden_p95_mm": h95 if h95 is not None else math.nan,
                "hidden_area_m2": hidden_m2 if hidden_m2 is not None else math.nan,
                "rate_eva_mm_y": r_eva if r_eva is not None else math.nan,
                "rate_eva_source": r_src, "eva_source": source, "life_eva_y": life_eva})
    return life_eva


def _assumed_eva_rate(row, has_rates: bool) -> tuple[float, str]:
    """Rate for the extreme-value life when the extremes give none: the sum of the zone's
    upper ends of the maximum rates (conservative), else of the point estimates."""
    if not has_rates:
        return math.nan, "zone-max-sum"
    hi = [row["rate_top_max_hi_mm_y"], row["rate_under_max_hi_mm_y"]]
    if not all(math.isnan(v) for v in hi):
        return float(np.nansum(hi)), "zone-max-hi-sum"
    return float(np.nansum([row["rate_top_max_mm_y"], row["rate_under_max_mm_y"]])), "zone-max-sum"


def _flags(flags, row, kind, tmin, mrt, code, life_eva, rec, c: _Context) -> None:
    if tmin < mrt:
        flags.append("below-mrt")
    if kind == "critical" and tmin < c.cz_min:
        flags.append("critical-zone-below-min")
    local = row["life_local_y"]
    if not math.isnan(code) and not math.isnan(local) and code > local:
        flags.append("code-exceeds-local")
    if not math.isnan(code) and not math.isnan(life_eva) and code > life_eva:
        flags.append("code-exceeds-eva")
    if row["coverage_pct"] < c.min_cov:
        flags.append("low-coverage")
    target = c.options.target_interval_years
    if target is not None and rec < target:
        flags.append("target-not-reached")
    if not c.rate_short_available:
        flags.append("no-short-term-rates")
    if not c.has_rates:
        flags.append("initial-interval")


def add_life_distribution(table: pd.DataFrame, dists: dict, *, inspected: _dt.date, rules,
                          target_probability: float | None = None) -> pd.DataFrame:
    """The zone life distribution's columns, and optionally one more limit on the interval.

    Parameters
    ----------
    table : per-zone table of :func:`assess_zones` (``zone``, ``interval_recommended_y``,
        ``limiting``, ``next_due``).
    dists : zone name -> :class:`~scananalyse.probability.LifeDistribution`.
    inspected : date of the newer inspection (the distributions' time origin).
    rules : rule set (``round_interval``).
    target_probability : None (default, off) or P in (0, 1): the recommendation becomes at
        most the longest interval, rounded down to the rule set's step, with P(some point of
        the zone below MRT) ≤ P; ``limiting`` is then ``probability`` where it governs.

    Returns
    -------
    DataFrame : a copy with :data:`PROBABILITY_COLUMNS` (NaN for a zone without a
    distribution); ``p_mrt_at_due`` and ``p_leak_at_due`` at the (final) recommended
    interval from ``inspected``.
    """
    out = table.copy()
    rows = []
    for i, zone in enumerate(out["zone"]):
        d = dists.get(zone)
        rec = float(out["interval_recommended_y"].iloc[i])
        if d is None or not d.ok:
            rows.append({c: math.nan for c in PROBABILITY_COLUMNS})
            continue
        if target_probability is not None and math.isfinite(rec):
            s = np.sort(d.life_mrt)
            k = min(int(math.floor(target_probability * s.size)), s.size - 1)
            # P(L <= t) <= P for every t below the (k+1)-th smallest draw
            t_p = rules.round_interval(max(float(s[k]) - 1e-9, 0.0)) if math.isfinite(s[k]) else math.inf
            if t_p < rec:
                rec = t_p
                out.iloc[i, out.columns.get_loc("interval_recommended_y")] = rec
                out.iloc[i, out.columns.get_loc("limiting")] = "probability"
                out.iloc[i, out.columns.get_loc("next_due")] = add_years(inspected, rec).isoformat()
        row = d.row(rec)
        if target_probability is not None and math.isfinite(rec) and row["p_mrt_at_due"] > target_probability:
            # even now (interval 0) the chance that some point is already below MRT is above the target
            fl = str(out["flags"].iloc[i] or "")
            out.iloc[i, out.columns.get_loc("flags")] = ";".join(f for f in (fl, "probability-above-target") if f)
        rows.append(row)
    for c in PROBABILITY_COLUMNS:
        out[c] = [r[c] for r in rows]
    return out
