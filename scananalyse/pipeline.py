"""The stages strung together: ``compare`` (two inspections) and ``assess_single`` (one).

Each stage is a pure function of another module; this module only calls them in
order (:func:`analyse`), then writes the outputs (:func:`write_outputs`) into a
folder that appears only when complete.  A notebook user can call
:func:`analyse` alone and look at the :class:`Analysis` it returns.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as _dt
import math
import os
import warnings
from contextlib import contextmanager
from dataclasses import dataclass, field
from functools import partial
from pathlib import Path

import numpy as np
import pandas as pd

from . import CAUTION, __version__
from .errors import InputError, ScanWarning
from .job import Job
from .progress import Progress
from .scan import MM_PER_IN, FloorScan, to_display

__all__ = ["Analysis", "CompareResult", "analyse", "actions", "write_outputs", "compare", "assess_single",
           "register_files", "run_demo", "sample_dir"]

STAGES_PAIR = ["load", "attribution", "zones", "extremes", "registration", "resampling", "rates", "assessment",
               "indications", "repairs", "outputs", "report"]
STAGES_SINGLE = [s for s in STAGES_PAIR if s not in ("registration", "resampling")]


@dataclass
class Analysis:
    """Everything computed for one floor, in memory (maps on the newer scan's grid)."""

    job: Job
    new: FloorScan
    old: FloorScan | None
    registration: object | None
    old_on_new: FloorScan | None
    side_raw: np.ndarray
    side: np.ndarray
    rates: object
    zones: object
    rules: object
    options: object
    extremes_depth: dict
    extremes_rate: dict
    zone_table: pd.DataFrame
    life_map: np.ndarray
    mrt_map: np.ndarray
    indications: pd.DataFrame
    gone: pd.DataFrame | None
    needs_repair: np.ndarray
    patches: pd.DataFrame
    patch_checks: pd.DataFrame | None
    uncovered_cells: int
    zones_repaired: pd.DataFrame
    repaired_maps: dict
    patch_note: str | None
    attribution: dict
    assumptions: list
    notes: list = field(default_factory=list)
    timings: dict = field(default_factory=dict)

    @property
    def single(self) -> bool:
        return self.old is None


@dataclass
class CompareResult:
    """What ``compare``/``assess`` wrote, for the console and for callers."""

    out_dir: str
    zones: pd.DataFrame
    zones_repaired: pd.DataFrame
    patches: pd.DataFrame
    indications: pd.DataFrame
    registration: dict | None
    report_path: str
    units: str
    tank: str
    single: bool
    files: list
    notes: list = field(default_factory=list)

    def console_summary(self) -> str:
        u = self.units
        lu = "in" if u == "in" else "mm"
        lines = [f"scananalyse {__version__}: tank {self.tank or '-'}"
                 + (" (one inspection: long-term rates only)" if self.single else "")]
        if self.registration:
            r = self.registration
            lines.append(f"registration: rotation {r['rotation_deg']:.3f} deg, shift "
                         f"({r['dx_mm']:.1f}, {r['dy_mm']:.1f}) mm, score {r['score'] or 0:.2f}, "
                         f"overlap {r['overlap_pct'] or 0:.1f} %" + ("" if r["reliable"] else "  ** UNRELIABLE **"))
        nd = 3 if u == "in" else 1
        hdr = f"  {'zone':<12}{'t_min':>8}{'code':>8}{'local':>8}{'eva':>8}{'recomm.':>9}  {'next due':<11}{'limiting':<10}flags"
        for title, table in (("as found", self.zones), ("after the proposed repairs", self.zones_repaired)):
            if table is None:
                continue
            lines.append(f"per zone, {title} (thickness {lu}; code formula, co-located, extreme-value and "
                         f"recommended intervals in years):")
            lines.append(hdr)
            for _, z in table.iterrows():
                due = z["next_due"] if isinstance(z["next_due"], str) and z["next_due"] else "-"
                flags = z["flags"] if isinstance(z["flags"], str) else ""
                lines.append(
                    f"  {str(z['zone']):<12}{_fmt(to_display(z['t_min_mm'], u), nd):>8}{_fmt(z['interval_code_y']):>8}"
                    f"{_fmt(z['life_local_y']):>8}{_fmt(z.get('life_eva_y', float('nan'))):>8}"
                    f"{_fmt(z['interval_recommended_y']):>9}  {due:<11}{str(z['limiting'] or '-') if isinstance(z['limiting'], str) else '-':<10}"
                    f"{flags}")
        if len(self.patches):
            area = float(self.patches["area_m2"].sum())
            lines.append(f"proposed patch plates: {len(self.patches)}, {area:.2f} m2 in all (patches.csv, patches.dxf)")
        else:
            lines.append("proposed patch plates: none needed for the target interval")
        st = self.indications["status"].value_counts() if "status" in self.indications else {}
        parts = [f"{int(st[k])} {k}" for k in ("new", "grown", "stable", "not found") if k in st]
        lines.append(f"indications: {len(self.indications)} (indications.csv)" + (f": {', '.join(parts)}" if parts else ""))
        for n in self.notes:
            lines.append("note: " + n)
        lines.append(f"report: {self.report_path}")
        lines.append("CAUTION: " + CAUTION)
        return "\n".join(lines)


def _fmt(v, nd=1) -> str:
    try:
        v = float(v)
    except (TypeError, ValueError):
        return "-"
    if math.isnan(v):
        return "-"
    if math.isinf(v):
        return "inf"
    return f"{v:.{nd}f}"


def _to_mm(value, scan: FloorScan):
    if value is None:
        return None
    return float(value) * (MM_PER_IN if scan.meta.units == "in" else 1.0)


# ------------------------------------------------------------------------------------
# analysis
# ------------------------------------------------------------------------------------
def read_job_inputs(job: Job, new: FloorScan, rules=None) -> dict:
    """Read every file the job names besides the scans (shapes, top-side depth, repair
    records, the engineer's patches), so bad files are refused before any work is done."""
    from . import attribution, rates, repair
    from .rules import get_ruleset

    rules = rules or get_ruleset(job.ruleset, job.rule_overrides or None)
    top_depth = None
    if job.top_depth:
        from .io import read_scan

        top_depth = attribution.top_depth_map(read_scan(job.top_depth), new)
    return {
        "shapes": attribution.read_shapes(job.shapes, scan=new) if job.shapes else None,
        "top_depth": top_depth,
        "repairs": rates.read_repairs(job.repairs, scan=new) if job.repairs else None,
        "patches": repair.read_patches(job.patches, rules=rules) if job.patches else None,
    }


def analyse(new: FloorScan, old: FloorScan | None = None, *, job: Job, progress: Progress | None = None,
            registration=None, inputs: dict | None = None, on_figures=None, on_patches=None) -> Analysis:
    """Run every computing stage on one floor (no files written).

    Parameters
    ----------
    new : the newer (or only) inspection.
    old : the older inspection, or None for a single-inspection assessment.
    job : settings (diameter etc. in the scans' units).
    progress : optional :class:`Progress`.
    registration : optional precomputed :class:`~scananalyse.register.Registration`.
    inputs : the job's other files already read (:func:`read_job_inputs`); read here if None.
    on_figures : optional callable, given report figures' specs (see :func:`_figure_specs`)
        as soon as their data are known, so a caller can start drawing them while the
        analysis goes on (``_run`` does): the newer scan's thickness and loss maps once
        the zones are known (:func:`_scan_map_specs`), the rate maps, the co-located life
        and the registration overlay once the rates are (:func:`_rate_map_specs`), then the
        as-found results after the assessment (:func:`_as_found_specs`), and the patch-plate
        map once the patches are known (:func:`_patches_spec`).  The one figure left (the
        methods after the repairs, see :func:`_repair_specs`) is drawn with the outputs.
    on_patches : optional callable, given the proposed patch plates (DataFrame) as soon as
        they are planned, just before ``on_figures`` gets their map (``_run`` queues the
        writing of ``patches.dxf`` from them).  Not called for the engineer's own
        patches, whose checked table is known only at the end.

    With two inspections and no ``registration`` given, the registration is computed in a
    forked child process where that is safe (:class:`~scananalyse.forked.ForkedCall`), while
    the attribution, zones and depth statistics, which need the newer scan only, run here.
    """
    with contextlib.ExitStack() as children:  # forked children are stopped on any error or interrupt
        return _analyse(new, old, job=job, progress=progress, registration=registration, inputs=inputs,
                        on_figures=on_figures, on_patches=on_patches, children=children)


def _analyse(new, old, *, job, progress, registration, inputs, on_figures, on_patches, children) -> Analysis:
    from . import assess, attribution, rates, zones
    from .indications import label_indications
    from .rules import get_ruleset

    prog = progress or Progress(quiet=True)
    assumptions: list[str] = []
    notes: list[str] = []
    if job.diameter is None:
        raise InputError("--diameter: the tank's inside diameter is required")
    rules = get_ruleset(job.ruleset, job.rule_overrides or None)
    if inputs is None:
        inputs = read_job_inputs(job, new, rules)

    # --- registration, started ------------------------------------------------------
    # It needs only the two scans and gives a small result, so it is computed in a
    # forked child (forked.py) while the stages that need only the newer scan run here
    # (attribution, zones, depth statistics); without a child it is computed now.
    reg = registration
    old_on_new = None
    pending = None
    if old is not None:
        from .register import register, resample_onto

        if abs(old.meta.nominal - new.meta.nominal) > 1e-6:
            notes.append(f"the scans give different nominal thicknesses ({old.meta.nominal:.2f} and "
                         f"{new.meta.nominal:.2f} mm); the newer one is used")
        if old.meta.inspected >= new.meta.inspected:
            src = new.source or "new scan"
            raise InputError(f"{src}: field 'inspected': the newer scan ({new.meta.inspected}) must be "
                             f"inspected after the older one ({old.meta.inspected})")
        if reg is None:
            pending = _in_child(children, prog, "registration", register, new, old,
                                control_points=job.control_points)

    # --- attribution -----------------------------------------------------------
    with prog.stage("attribution"):
        shapes, top_depth, repairs = inputs["shapes"], inputs["top_depth"], inputs["repairs"]
        side_raw = attribution.raw_side_map(new, shapes=shapes)
        side = attribution.resolve_side(side_raw, job.default_side)
        ropt = rates.RateOptions(k_sigma=float(rules.noise_k.value), unknown_side=job.default_side)
        # the newer scan's loss and its split by side, and the indication regions
        # (labelled once: the rate fill and the indication list use them)
        layers = rates.loss_layers(new, side, top_depth=top_depth, options=ropt)
        ind_labels = label_indications(layers.loss, reporting_depth_mm=_reporting_depth(new))
    assumptions.append(f"Unattributed loss is counted as {job.default_side}side loss"
                       if job.default_side == "under" else "Unattributed loss is counted as top-side loss")

    # --- zones -----------------------------------------------------------------
    with prog.stage("zones"):
        geom = zones.FloorGeometry(diameter_mm=_to_mm(job.diameter, new),
                                   centre=(_to_mm(job.centre[0], new), _to_mm(job.centre[1], new)),
                                   annular_width_mm=_to_mm(job.annular_width, new))
        # polygons first: the first listed user zone wins where zones overlap
        user = [(zname, [(_to_mm(x, new), _to_mm(y, new)) for x, y in pts])
                for zname, pts in job.zone_polygons or []]
        if job.zone_rings:
            user.append(zones.ring_sector_zones(job.zone_rings, job.zone_sectors))
        zmap = zones.zone_map(new, geom, rules, user_zones=user or None)
        options = assess.AssessOptions(
            leak_detection=job.leak_detection, reinforced_lining=job.reinforced_lining, coated=job.coated,
            coating_life_years=job.coating_life_years if job.coated else None, cp_effective=job.cp_effective,
            release_prevention_barrier=job.release_prevention_barrier, unknown_side=job.default_side,
            target_interval_years=job.target_interval)
        mrt = assess.mrt_map(zmap, rules, options, t0=new.meta.nominal)
        # geometry of the newer scan the repairs need, and the zones' cell indices (for
        # every per-zone statistic): derived while the registration runs
        plate_seams = _plate_seams(new) if new.plate is not None else None
        zmap.groups()
        # the newer scan's indication list (its rate column comes with the rates)
        ind_new = _new_indications(new, layers, side, zmap, ind_labels)
    if on_figures is not None:
        # the newer scan's own maps are drawn while the registration and rates run
        on_figures(_scan_map_specs(new, layers, zmap, rules, options, job, job.units))

    # --- extremes of depth -------------------------------------------------------
    with prog.stage("extremes"):
        ext_depth = _depth_extremes(new.thickness, zmap, nominal=new.meta.nominal, censored=layers.censored,
                                    threshold=new.meta.threshold, pitch=new.pitch, job=job)

    # --- registration, finished ------------------------------------------------------
    if old is not None:
        if reg is None:
            reg = _result(prog, "registration", pending)
        with prog.stage("resampling"):
            # only the thickness is used on the newer grid (the layers are not carried)
            old_on_new = resample_onto(dataclasses.replace(old, side=None, plate=None), new, reg.transform)
        if not reg.reliable:
            notes.append("registration is UNRELIABLE: " + "; ".join(reg.warnings))

    # --- rates ---------------------------------------------------------------------
    with prog.stage("rates"):
        lr = rates.compute_rates(new, old_on_new, side, top_depth=top_depth, repairs=repairs, options=ropt,
                                 layers=layers)
        del layers
        if old_on_new is not None:
            lr, n_filled = _fill_uncovered_rates(lr, new, old_on_new, ind_labels)
            if n_filled:
                assumptions.append(
                    f"{n_filled} cells of indications lay outside the older scan's coverage: they take the "
                    "short-term rate scaled from the same indication's measured cells (a pit deepens as fast as "
                    "its fastest measured part, in proportion to depth), not only the long-term rate.")
        # the co-located life map comes with the rates, so that its figure can be drawn
        # while the rest of the assessment runs
        life = assess.local_life_map(new.thickness, lr.rate_top, lr.rate_under, mrt)
    att = attribution.attribution_summary(side_raw, lr.loss, top_depth=top_depth, default=job.default_side)
    if old is not None:
        assumptions.append(
            f"Noise rule: a change smaller than k·sqrt(sigma_old² + sigma_new²) = {ropt.k_sigma:g} × "
            f"sqrt({lr.sigma_old:.3f}² + {lr.sigma_new:.3f}²) = {lr.growth_sigma:.3f} mm is not growth; "
            "thicker-than-before cells beyond it are reported as repaired or misaligned and excluded from rates.")
    assumptions.append("Governing rate per cell and side: the greater of the short-term and long-term rates "
                       "(from memory: API 570 practice)." if old is not None else
                       "One inspection: long-term rates only (loss ÷ years in service).")
    if old is not None:
        assumptions.append(
            "Rates are linear: a pit that appeared since the older inspection is taken to have grown over the whole "
            "interval; if it began later it grows faster than measured (such indications have status 'new').")
    if new.meta.threshold:
        assumptions.append(
            f"Loss shallower than the detection threshold ({new.meta.threshold:.2f} mm) reads as nominal: it is "
            "treated as unknown (censored), not zero; the extreme-value fits take such blocks as left-censored.")
    if on_figures is not None:
        on_figures(_rate_map_specs(new, lr, zmap, job, job.units, single=old is None, life=life,
                                   old=old, old_on_new=old_on_new))

    # --- assessment ----------------------------------------------------------------
    with prog.stage("assessment"):
        ext_rate = _rate_extremes(lr.rate_top, lr.rate_under, zmap, pitch=new.pitch, job=job)
        ext_life = _life_extremes(new.thickness, lr.rate_top, lr.rate_under, mrt, zmap, nominal=new.meta.nominal,
                                  censored=lr.censored, threshold=new.meta.threshold, pitch=new.pitch, job=job,
                                  methods=ext_depth)
        ext_for_assess = _merge_extremes(ext_depth, ext_rate, ext_life)
        table = assess.assess_zones(thickness=new.thickness, side=side, rate_top=lr.rate_top,
                                    rate_under=lr.rate_under, zones=zmap, meta=new.meta, rules=rules,
                                    options=options, extremes=ext_for_assess, pitch_mm=new.pitch,
                                    rate_short_available=old is not None, life_map=life)
        table = _add_eva_columns(table, ext_depth, ext_life)
    if on_figures is not None:
        on_figures(_as_found_specs(table, ext_depth, job.units))

    # --- indications ---------------------------------------------------------------------
    # (a forked child for them was tried: no faster at 30 m, and 20 bytes per cell more for
    # the whole job, the child holding the main process's memory of the moment)
    with prog.stage("indications"):
        ind, gone = _indications(new, old, reg.transform if reg is not None else None, lr, side, zmap, job,
                                 labels=ind_labels, found=ind_new)
        del ind_labels, ind_new

    # --- repairs -----------------------------------------------------------------------
    with prog.stage("repairs"):
        rep = _repairs(new, lr, side, zmap, rules, options, mrt, job, old is not None,
                       inputs["patches"], on_figures=on_figures, on_patches=on_patches, plate_seams=plate_seams,
                       ext_rate=ext_rate)

    return Analysis(job=job, new=new, old=old, registration=reg, old_on_new=old_on_new, side_raw=side_raw,
                    side=side, rates=lr, zones=zmap, rules=rules, options=options, extremes_depth=ext_depth,
                    extremes_rate=ext_rate, zone_table=table, life_map=life, mrt_map=mrt, indications=ind,
                    gone=gone, attribution=att, assumptions=assumptions, notes=notes, timings=prog.timings,
                    **rep)


def _in_child(children, prog, stage, fn, *args, **kwargs):
    """``fn(*args, **kwargs)`` in a forked child (:class:`~scananalyse.forked.ForkedCall`,
    stopped with ``children``) where that is safe; else computed now, timed as ``stage``.
    Take the value with :func:`_result`."""
    from .forked import ForkedCall, parallel_possible

    if parallel_possible():
        return children.enter_context(ForkedCall(fn, *args, parallel=True, **kwargs))
    with prog.stage(stage):
        return ForkedCall(fn, *args, parallel=False, **kwargs)


def _result(prog, stage, call):
    """The value of a :func:`_in_child` call; the wait for a child is timed as ``stage``."""
    if not call.forked:
        return call.result()
    with prog.stage(stage):
        return call.result()


def _fill_uncovered_rates(lr, new, old_on_new, labels=None):
    """Short-term rates for indication cells the older scan did not cover.

    Such a cell has only a long-term rate, which understates a pit that began late.  It takes
    its own loss times the largest ratio of short-term rate to loss measured in the same
    connected indication (a pit deepening in proportion, as its measured part does); the
    governing rate is then recomputed as the greater of short- and long-term.
    ``labels`` is the indication label map of ``lr.loss`` (computed here if None).  Only the
    labelled cells are visited.
    Returns the updated :class:`~scananalyse.rates.LossRates` and the number of cells filled.
    """
    from .indications import label_indications

    if labels is None:
        labels = label_indications(lr.loss, reporting_depth_mm=_reporting_depth(new))
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


def _depth_map(thickness, nominal, censored) -> np.ndarray:
    """Loss depth for the extreme-value fits: nominal − thickness, at least 0, NaN where not
    scanned, 0 on censored cells (valid, nothing reported); float32, no full-grid temporaries."""
    depth = np.float32(nominal) - np.asarray(thickness, dtype=np.float32)
    np.maximum(depth, np.float32(0), out=depth)  # NaN (not scanned) stays NaN
    if censored is not None:
        depth[censored & ~np.isnan(depth)] = 0.0
    return depth


def _depth_extremes(thickness, zmap, *, nominal, censored, threshold, pitch, job) -> dict:
    """Block-maxima statistics of loss depth per zone.

    Loss is nominal − thickness; censored cells (reported as nominal, true loss below the
    threshold) are valid cells with value 0, so a block with no detected loss enters the
    fit as left-censored at the threshold.
    """
    scanned = np.isfinite(thickness)
    depth = _depth_map(thickness, nominal, censored)
    return _zone_fits(depth, scanned, zmap, threshold=threshold or None, pitch=pitch, job=job)


def _rate_extremes(rate_top, rate_under, zmap, *, pitch, job) -> dict:
    """Block-maxima statistics of the summed rate (top + underside) per zone, over the
    cells that have both rates (zones without any are left out)."""
    rate_sum = np.add(rate_top, rate_under, dtype=np.float32)
    rate_valid = np.isfinite(rate_sum)  # once for all zones
    return _zone_fits(rate_sum, rate_valid, zmap, threshold=None, pitch=pitch, job=job, need_valid=True)


def _zone_fits(values, valid, zmap, *, threshold, pitch, job, need_valid=False) -> dict:
    """:func:`_gumbel_or_gev` of ``values`` in each zone with cells (and, with
    ``need_valid``, with a valid cell), zone name -> result."""
    out = {}
    for k, name in enumerate(zmap.names):
        mask = zmap.labels == k
        area = float(zmap.areas_mm2[k])
        if not area > 0 or not mask.any() or (need_valid and not np.logical_and(valid, mask).any()):
            continue
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ScanWarning)
            out[name] = _gumbel_or_gev(values, mask, pitch_mm=pitch, zone_area_mm2=area,
                                       block_mm=job.block_mm, threshold=threshold, seed=job.seed, valid=valid)
    return out


#: Significance level of the likelihood-ratio test of Gumbel against GEV (Coles 2001 §3.3).
GEV_ALPHA = 0.05


#: Smallest block side tried when a zone is too small or narrow for the configured blocks. [mm]
MIN_BLOCK_MM = 100.0


def _gumbel_or_gev(values, mask, *, block_mm, pitch_mm, **kw):
    """Gumbel (the standard method for pit depths) unless the likelihood-ratio test rejects
    it at :data:`GEV_ALPHA` in favour of a GEV, which is then used with profile-likelihood
    bounds [Coles 2001, §3.3; Laycock 1990].  ``eva_method`` in zones.csv says which.

    Larger blocks are better than more blocks [J-STAGE 43(5):258], so the configured block
    side is used first; only when a zone is too small or too narrow for a fit with it (too
    few blocks reach the coverage rule) is the side halved, down to :data:`MIN_BLOCK_MM` or
    five cells.  ``eva_block_mm`` in zones.csv gives the side used.
    """
    from .extremes import zone_extremes

    smallest = max(MIN_BLOCK_MM, 5 * pitch_mm)
    b = block_mm
    while True:
        # "auto": one block-maxima pass and one GEV fit serve the test and the estimate
        z = zone_extremes(values, mask, method="auto", gev_alpha=GEV_ALPHA, block_mm=b, pitch_mm=pitch_mm, **kw)
        if not z and z.fit is not None and z.fit.distribution == "gev":
            # the GEV's bounds failed: the Gumbel, as the test's fallback
            z = zone_extremes(values, mask, block_mm=b, pitch_mm=pitch_mm, **kw)
        if z or b / 2 < smallest:
            break
        b /= 2
    return z


def _add_eva_columns(table: pd.DataFrame, ext_depth: dict, ext_life: dict) -> pd.DataFrame:
    """Append the extreme-value fits' particulars (method, T, blocks, GEV test) per zone."""
    cols = ["depth_pred_upper_mm", "eva_method", "eva_T", "eva_block_mm", "eva_n_blocks", "eva_n_censored",
            "eva_gev_p", "eva_reason"]
    rows = []
    for z in table["zone"]:
        row = {c: ext_depth[z].row().get(c) if z in ext_depth else None for c in cols}
        lz = ext_life.get(z)
        row["life_eva_method"] = lz["method"] if lz else ""
        row["life_eva_reason"] = lz["reason"] if lz else "zone not scanned"
        rows.append(row)
    extra = pd.DataFrame(rows, columns=cols + ["life_eva_method", "life_eva_reason"])
    return pd.concat([table.reset_index(drop=True), extra], axis=1)


#: Probability that the deepest projected loss in the unscanned part stays below the value
#: used for the extreme-value life.
LIFE_LEVEL = 0.95
#: Longest horizon searched for the extreme-value life; beyond it the life is reported
#: as this value (every interval cap is shorter). [y]
LIFE_HORIZON_Y = 60.0


def _masked_nanmin(values, mask, rows: int = 256):
    """``np.nanmin(values[mask])`` a band of rows at a time (no zone-sized copy), as a
    scalar of the values' dtype; NaN if no cell of the mask has a value."""
    v = np.asarray(values)
    best = None
    for r0 in range(0, v.shape[0], rows):
        sel = v[r0:r0 + rows][mask[r0:r0 + rows]]
        sel = sel[~np.isnan(sel)]
        if sel.size:
            m = sel.min()
            best = m if best is None or m < best else best
    return v.dtype.type(np.nan) if best is None else best


def _life_extremes(thickness, rate_top, rate_under, mrt, zmap, *, nominal, censored, threshold, pitch, job,
                   methods: dict | None = None) -> dict:
    """Extreme-value life per zone: when the deepest loss expected over the whole zone reaches
    the zone's allowance (nominal − MRT), each cell's loss growing at its own measured rates.

    For a horizon H the projected loss is ``loss + (r_top + r_under)·H`` cell by cell (rates
    stay co-located, unlike combining the deepest pit with the fastest rate found anywhere).
    The deepest projected loss over the zone is the greater of the deepest seen in the
    scanned cells and the deepest expected in the part nobody scanned: the
    :data:`LIFE_LEVEL` quantile of the largest of T block maxima of the fitted distribution
    (censored at the threshold), T = unscanned zone area / block area (at least 1).  It is
    compared with the allowance.  (The quantile is from the fitted parameters; their own
    uncertainty is in the table's ``depth_eva_upper_mm`` and ``depth_pred_upper_mm``.)
    The life is the H where they meet (Brent's method, within 0.05 y on the short side),
    0 if the allowance is already used up at H = 0, and :data:`LIFE_HORIZON_Y` if never
    reached within it.  The distribution (Gumbel or GEV) is chosen once at H = 0.
    Returns zone -> ``{"life_eva_y", "method", "reason"}``.
    """
    from .errors import FitError
    from .extremes import fit_gev_mle, fit_gumbel_mle, max_quantile, projected_block_maxima

    scanned = np.isfinite(thickness)
    depth0 = _depth_map(thickness, nominal, censored)
    rate = np.fmax(np.asarray(rate_top, dtype=np.float32), np.float32(0))  # fmax: NaN -> 0 as well
    rate += np.fmax(np.asarray(rate_under, dtype=np.float32), np.float32(0))
    out = {}
    for k, name in enumerate(zmap.names):
        mask = zmap.labels == k
        if not (scanned & mask).any() or not float(zmap.areas_mm2[k]) > 0:
            continue
        allowance = float(nominal - _masked_nanmin(np.asarray(mrt, dtype=np.float32), mask))
        in_zone = scanned & mask
        hidden_mm2 = max(0.0, float(zmap.areas_mm2[k]) - np.count_nonzero(in_zone) * pitch * pitch)
        kw = dict(pitch_mm=pitch, zone_area_mm2=max(hidden_mm2, 1.0), block_mm=job.block_mm,
                  threshold=threshold or None, seed=job.seed, valid=scanned)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ScanWarning)
            # the depth fit at H = 0 is the zone's depth statistics: reuse it when given
            z0 = (methods or {}).get(name)
            if z0 is None:
                z0 = _gumbel_or_gev(depth0, mask, **kw)
            if not z0:
                out[name] = {"life_eva_y": None, "method": "", "reason": z0.reason}
                continue
            method = "gev" if z0.fit is not None and getattr(z0.fit, "distribution", "") == "gev" else "mle"

            b_cells = max(1, int(round((z0.block_mm if np.isfinite(z0.block_mm) else job.block_mm) / pitch)))
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

                # the excess grows with H (every projected loss does); Brent's method needs
                # far fewer fits than bisection; the root is taken 0.05 y on the short side
                life = max(0.0, brentq(excess, 0.0, LIFE_HORIZON_Y, xtol=0.02) - 0.05)
            # the closures above are kept alive by reference cycles until a garbage
            # collection: let go of the zone's grids now (tens of bytes per cell)
            projector.clear()
        out[name] = {"life_eva_y": life, "method": z0.row().get("eva_method", ""), "reason": ""}
    del depth0, rate
    return out


def _merge_extremes(ext_depth, ext_rate, ext_life=None) -> dict:
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


def _reporting_depth(new: FloorScan) -> float:
    """Indications are regions of loss at or above the detection threshold, or 10 % of
    nominal when the scan has no threshold (common practice, no source)."""
    thr = new.meta.threshold
    return float(thr) if thr else 0.1 * new.meta.nominal


def _new_indications(new, layers, side, zmap, labels):
    """The newer scan's indication list without its rate column (all it needs is known
    before the rates: it is made while the registration runs); see :func:`_indications`."""
    from . import indications as ind_mod

    return ind_mod.find_indications(layers.loss, pitch_mm=new.pitch, x0=new.x0, y0=new.y0,
                                    reporting_depth_mm=_reporting_depth(new), side=side, plate=new.plate,
                                    zone_labels=zmap.labels, zone_names=zmap.names, rate=None,
                                    thickness=new.thickness, labels=labels)


def _indications(new, old, transform, lr, side, zmap, job, labels=None, found=None):
    """The indication list: ``found`` (:func:`_new_indications`, made here if None) with the
    governing rate's maximum per region, matched with the older scan's indications."""
    from . import indications as ind_mod

    depth = _reporting_depth(new)
    if labels is None:
        labels = ind_mod.label_indications(lr.loss, reporting_depth_mm=depth)
    ind = _new_indications(new, lr, side, zmap, labels) if found is None else found.copy()
    if len(ind):
        ind["rate_max_mm_y"] = ind_mod.region_max(labels, np.fmax(lr.rate_top, lr.rate_under))
    gone = None
    if old is not None:
        old_ind, old_labels = ind_mod.old_indications(old, new, transform, reporting_depth_mm=depth,
                                                      zone_labels=zmap.labels, zone_names=zmap.names)
        ind = ind_mod.match_indications(ind, old_ind, labels, old_labels, growth_sigma_mm=lr.growth_sigma,
                                        dt_years=lr.dt_years)
        gone = ind_mod.gone_indications(old_ind, ind)
        if len(gone):
            # older regions no newer one matches (repaired, replaced or below the reporting depth
            # now): listed too, so the inspector sees what went away
            g = gone.copy()
            g["old_id"] = g["id"]
            g["depth_old_mm"] = g["depth_max_mm"]
            g["id"] = pd.NA
            for c in ("depth_max_mm", "t_min_mm", "rate_max_mm_y", "growth_mm", "growth_rate_mm_y"):
                g[c] = np.nan
            g = g[[c for c in ind.columns if c in g.columns]]
            ind = pd.concat([ind, g], ignore_index=True)
    return ind, gone


def _plate_seams(new):
    """The plate layer's seams, derived once for the patch planner and the rule checker."""
    from . import repair

    return repair.seams_from_plate(new.plate, x0=new.x0, y0=new.y0, pitch=new.pitch)


def _repairs(new, lr, side, zmap, rules, options, mrt, job, have_old, own_patches=None, on_figures=None,
             on_patches=None, plate_seams=None, ext_rate=None) -> dict:
    """Patch planning for the target interval, or the engineer's patches, then re-assessment
    (``on_figures`` is given the patch-plate map once the patches are known; ``plate_seams``
    are :func:`_plate_seams`, derived here if not given; ``ext_rate`` the as-found rate
    statistics, reused where the repaired floor keeps the rate maps as they are)."""
    from . import assess, repair

    critical = zmap.labels == zmap.index("critical") if "critical" in zmap.names else None
    needs = repair.cells_needing_repair(new.thickness, lr.rate_top, lr.rate_under, mrt_mm=mrt,
                                        target_years=job.target_interval, repair_to_mm=job.repair_to_mm)
    checks = None
    if plate_seams is None and new.plate is not None:
        plate_seams = _plate_seams(new)
    if own_patches is not None:
        patches = own_patches
    else:
        patches = repair.plan_patches(needs, x0=new.x0, y0=new.y0, pitch=new.pitch, rules=rules, plate=new.plate,
                                      critical_mask=critical, zone_labels=zmap.labels, zone_names=zmap.names,
                                      patch_thickness_mm=job.patch_thickness_mm, plate_seams=plate_seams)
    checks = repair.check_patch_rules(patches, x0=new.x0, y0=new.y0, pitch=new.pitch, rules=rules,
                                      plate=new.plate, critical_mask=critical, needs=needs,
                                      zone_labels=zmap.labels, zone_names=zmap.names, plate_seams=plate_seams)
    if on_patches is not None and own_patches is None:
        on_patches(patches)
    if on_figures is not None:
        on_figures([_patches_spec(new, patches, zmap, job.units)])
    n_uncovered, _ = repair.uncovered_cells(needs, patches, x0=new.x0, y0=new.y0, pitch=new.pitch)
    t_rep, rt_rep, ru_rep, covered = repair.apply_patches(new.thickness, lr.rate_top, lr.rate_under, patches,
                                                          x0=new.x0, y0=new.y0, pitch=new.pitch,
                                                          patch_thickness_mm=job.patch_thickness_mm, rules=rules,
                                                          under_cause_removed=job.under_cause_removed)
    # Patched cells: the patch is the new top surface; its loss so far is nil, so the side
    # attribution no longer matters there (rates carry the side).
    # The floor as repaired gets its own extreme-value statistics: patched cells read the
    # patch thickness (no loss), the rest as found.
    cens_rep = lr.censored & ~covered
    ext_d_rep = _depth_extremes(t_rep, zmap, nominal=new.meta.nominal, censored=cens_rep,
                                threshold=new.meta.threshold, pitch=new.pitch, job=job)
    if ext_rate is not None and rt_rep is lr.rate_top and ru_rep is lr.rate_under:
        ext_r_rep = ext_rate  # the patches keep the measured rates: the same statistics
    else:
        ext_r_rep = _rate_extremes(rt_rep, ru_rep, zmap, pitch=new.pitch, job=job)
    ext_l_rep = _life_extremes(t_rep, rt_rep, ru_rep, mrt, zmap, nominal=new.meta.nominal,
                               censored=cens_rep, threshold=new.meta.threshold, pitch=new.pitch, job=job,
                               methods=ext_d_rep)
    del cens_rep
    # after the life search, whose grids it would otherwise sit beside at the peak
    life_rep = assess.local_life_map(t_rep, rt_rep, ru_rep, mrt)
    zones_rep = assess.assess_zones(thickness=t_rep, side=side, rate_top=rt_rep,
                                    rate_under=ru_rep, zones=zmap, meta=new.meta, rules=rules, options=options,
                                    extremes=_merge_extremes(ext_d_rep, ext_r_rep, ext_l_rep), pitch_mm=new.pitch,
                                    rate_short_available=have_old, life_map=life_rep)
    zones_rep = _add_eva_columns(zones_rep, ext_d_rep, ext_l_rep)
    patch_note = None
    if own_patches is not None and len(patches):
        # the engineer's patches carry the checker's verdict, not whatever the file said
        patches = patches.drop(columns=["flags"], errors="ignore").merge(checks[["patch", "flags"]], on="patch",
                                                                         how="left")
        bad = checks[~checks["ok"].astype(bool)]
        if len(bad):
            patch_note = (f"{len(bad)} of the {len(patches)} given patch plates break a patch rule "
                          f"({', '.join(bad['patch'].astype(str).head(5))}{' …' if len(bad) > 5 else ''}); "
                          "see the flags column of patches.csv.")
    life_on_patches = np.where(covered, life_rep, np.nan)
    if covered.any() and np.isfinite(life_on_patches).any():
        life_p = float(np.nanmin(life_on_patches))
        if life_p < job.target_interval:
            life_text = (f"The patch plates themselves last {life_p:.1f} years at the measured rates (the underside "
                         "rate is kept under a patch unless its cause is removed), short of the target of "
                         f"{job.target_interval:g} years: consider thicker plates, effective cathodic protection "
                         "or removing the cause (--under-cause-removed), or replacing plate.")
            patch_note = f"{patch_note} {life_text}" if patch_note else life_text
    return {"needs_repair": needs, "patches": patches, "patch_note": patch_note, "patch_checks": checks,
            "uncovered_cells": int(n_uncovered), "zones_repaired": zones_rep,
            "repaired_maps": {"thickness_repaired": t_rep, "rate_top_repaired": rt_rep, "life_local_repaired": life_rep,
                              "rate_under_repaired": ru_rep, "patched": covered}}


# ------------------------------------------------------------------------------------
# outputs
# ------------------------------------------------------------------------------------
FLAGS_EXPLAINED = {
    "below-mrt": "The zone's thinnest reported cell is already below its MRT: repair before return to service.",
    "critical-zone-below-min": "The critical zone (within the rule set's width of the shell) is below its minimum.",
    "code-exceeds-local": "The code-formula interval is longer than the co-located projection from the measured "
                          "rates at the same cells: the formula overstates what the metal supports here.",
    "code-exceeds-eva": "The code-formula interval is longer than the extreme-value life, which allows for the "
                        "deepest pit expected in the unscanned and below-threshold parts of the zone.",
    "low-coverage": "Less of the zone was scanned than the rule set's minimum coverage; the extreme-value "
                    "estimate carries more weight and more uncertainty.",
    "target-not-reached": "The recommended interval is shorter than the target interval.",
    "no-short-term-rates": "Only one inspection: rates are long-term (loss ÷ years in service); a pit that began "
                           "late grows faster than that.",
    "no-data": "No cell of the zone was scanned: nothing can be said from the scan.",
    "no-eva": "No extreme-value estimate could be made for the zone (too few blocks).",
    "eva-rate-assumed": "The extreme-value life uses the zone's fastest measured rates, not a fitted rate extreme.",
    "initial-interval": "No corrosion rates are known: the initial-interval rules apply.",
    "no-age": "The scan gives no installation date: age-based rates and the code formula cannot be computed.",
    "critical-zone-special-repair": "A patch touches the critical zone: only special shapes or plate replacement "
                                    "are allowed there.",
}


#: Rough drawing cost of the report's figures (relative; measured on a 30 m floor: the
#: return-level curve's profile bounds and the registration overlay's feature masks are the
#: heaviest), used to hand out the costliest first.
_DRAW_COST = {"return_level": 8, "registration": 7, "patches": 4, "life_local": 4, "thickness": 4,
              "loss": 3, "rate": 3, "probability": 2, "methods": 1}


def _draft_stems(specs, first: int) -> list:
    """File names of figures drawn before the report's order is known: ``dNNN_slug``
    numbered in the order they were handed out from ``first`` (unique whatever the zone
    names); they are renamed ``NN_slug`` in the report's order at the end."""
    from .report.render import file_stem

    return [f"d{first + k:03d}_{file_stem(sp[1])}" for k, sp in enumerate(specs)]


def _costliest_first(specs) -> list:
    """Indices of ``specs`` ordered by :data:`_DRAW_COST` of their slugs, costliest first."""
    def cost(i):
        slug = specs[i][1]
        return max((c for prefix, c in _DRAW_COST.items() if slug.startswith(prefix)), default=2)
    return sorted(range(len(specs)), key=lambda i: (-cost(i), i))


def _figure_specs(an: Analysis, units: str) -> list:
    """Every report figure as ``(section, slug, caption, build)`` in the report's order;
    ``build()`` draws the Figure.

    The figures are built lazily, so the report's renderer can draw them in any process.
    They come in three groups, each known at a stage of the analysis (see
    :func:`analyse`'s ``on_figures``): :func:`_map_specs`, :func:`_as_found_specs` and
    :func:`_repair_specs`; this function puts them in the report's order.
    """
    specs = (_map_specs(an.new, an.rates, an.zones, an.rules, an.options, an.job, units, single=an.single,
                        life=an.life_map, old=an.old, old_on_new=an.old_on_new)
             + _as_found_specs(an.zone_table, an.extremes_depth, units)
             + _repair_specs(an, units))
    return _in_report_order(specs)


#: The report's order of the figures, by slug (prefix); figures of one rank keep their order.
_REPORT_RANK = (("life_local", 1), ("patches", 2), ("registration", 3), ("methods_as_found", 4),
                ("methods_repaired", 5), ("probability_", 6), ("return_level_", 6))


def _in_report_order(specs) -> list:
    def rank(spec):
        return next((r for prefix, r in _REPORT_RANK if spec[1].startswith(prefix)), 0)
    return sorted(specs, key=rank)  # stable: the maps, and each zone's pair, keep their order


def _map_common(new, zmap, units) -> dict:
    return dict(extent=new.extent, units=units, diameter_mm=zmap.geometry.diameter_mm,
                centre=zmap.geometry.centre, plate=new.plate)


def _map_specs(new, lr, zmap, rules, options, job, units, *, single, life, old=None, old_on_new=None) -> list:
    """The floor maps, the co-located life and (two inspections) the registration overlay
    (see _figure_specs): :func:`_scan_map_specs` and :func:`_rate_map_specs`."""
    return (_scan_map_specs(new, lr, zmap, rules, options, job, units)
            + _rate_map_specs(new, lr, zmap, job, units, single=single, life=life, old=old, old_on_new=old_on_new))


def _scan_map_specs(new, layers, zmap, rules, options, job, units) -> list:
    """The maps that need the newer scan only, known once the zones are: thickness with
    the MRT contour, top-side and underside loss (``layers``: ``rates.LossLayers`` or
    ``LossRates``)."""
    from . import assess
    from .report import figures as F

    out = []
    mrt_z = assess.zone_mrt(zmap, rules, options, t0=new.meta.nominal)
    areas = np.asarray(zmap.areas_mm2, dtype=float)
    k_main = zmap.names.index("interior") if "interior" in zmap.names else int(np.argmax(areas))
    main_zone = zmap.names[k_main]
    mrt_c = [(float(mrt_z[k_main]), f"MRT ({main_zone})", "--")]
    if job.repair_to_mm:
        mrt_c.append((job.repair_to_mm, "repair-to thickness", ":"))
    common = _map_common(new, zmap, units)
    out.append(("maps", "thickness", "Remaining thickness at the newer inspection, with the MRT contour.",
                F.FloorMapJob(new.thickness, title="Remaining thickness now", label="remaining thickness",
                        kind="thickness", contours=mrt_c, **common)))
    out.append(("maps", "loss_top", "Top-side (product-side) loss.",
                F.FloorMapJob(layers.loss_top, title="Top-side loss", label="top-side loss", kind="loss",
                        **common)))
    out.append(("maps", "loss_under", "Underside (soil-side) loss, unattributed loss included by default.",
                F.FloorMapJob(layers.loss_under, title="Underside loss", label="underside loss", kind="loss",
                        **common)))
    return out


def _rate_map_specs(new, lr, zmap, job, units, *, single, life, old=None, old_on_new=None) -> list:
    """The maps known once the rates are: short-term rates (or the long-term one), the
    co-located life and (two inspections) the registration overlay."""
    from .report import figures as F

    out = []
    common = _map_common(new, zmap, units)
    if not single:
        out.append(("maps", "rate_short_top", "Short-term top-side rate (change between the inspections ÷ years between them).",
                    F.FloorMapJob(lr.rate_short_top, title="Short-term top-side rate", label="top-side rate",
                            kind="rate", **common)))
        out.append(("maps", "rate_short_under", "Short-term underside rate.",
                    F.FloorMapJob(lr.rate_short_under, title="Short-term underside rate", label="underside rate",
                            kind="rate", **common)))
    else:
        out.append(("maps", "rate_long", "Long-term governing rate (both sides summed), one inspection only.",
                    F.FloorMapJob(np.fmax(lr.rate_top, 0) + np.fmax(lr.rate_under, 0), title="Long-term rate",
                            label="rate, both sides", kind="rate", **common)))
    out.append(("maps", "life_local", "Co-located remaining life: (t − MRT) ÷ (top rate + underside rate) per cell; "
                "contour at the target interval.",
                F.FloorMapJob(life, title="Remaining life per cell", label="remaining life", kind="life",
                        contours=[(job.target_interval, "target interval", "--")],
                        **common)))
    if old is not None and old_on_new is not None:
        out.append(("registration", "registration", "Features of the two scans (unscanned seams and margins, loss above the "
                    "reporting depth): newer scan against the older one before (left) and after (right) alignment.",
                    _RegistrationFigure(new, old, old_on_new)))
    return out


def _as_found_specs(zone_table, extremes_depth, units) -> list:
    """The figures of the as-found results: the methods per zone, and each zone's
    extreme-value probability and return-level plots (see _figure_specs)."""
    from .report import figures as F

    out = [("methods", "methods_as_found", "As found: per zone, the code-formula interval, the co-located "
            "projection, the extreme-value life, the cap and the recommendation.",
            partial(F.method_comparison, zone_table))]
    for name, z in extremes_depth.items():
        if not z or z.plot is None:
            continue
        out.append((f"extremes:{name}", f"probability_{name}", f"Probability plot of block-maximum loss, zone {name} "
                    f"({z.row().get('eva_method', '')}).",
                    partial(F.probability_plot, z.plot, title=f"Block maxima, zone {name}", units=units)))
        if z.fit is not None and z.blocks is not None:
            out.append((f"extremes:{name}", f"return_level_{name}", f"Return level with {100 * z.level:.0f} % upper bound "
                        "(profile likelihood at the dots; between them its margin over the return level is "
                        f"interpolated); the zone's T = {z.T:.0f} blocks is marked.",
                        partial(_return_level_figure, z, name, units)))
    return out


def _repair_specs(an: Analysis, units: str) -> list:
    """The figures of the proposed repairs: the patch plates and the methods per zone after
    them (see _figure_specs)."""
    from .report import figures as F

    return [_patches_spec(an.new, an.patches, an.zones, units),
            ("methods", "methods_repaired", "After the proposed repairs: the same per zone.",
             partial(F.method_comparison, an.zones_repaired))]


def _patches_spec(new, patches, zmap, units):
    """The patch-plate map (known as soon as the patches are, before the re-assessment)."""
    from .report import figures as F

    return ("maps", "patches", "The proposed patch plates on the thickness map (cells that would fall below "
            "MRT before the target interval at their own rates lie inside them).",
            F.FloorMapJob(new.thickness, title="Repairs: patch plates on the thickness map",
                    label="remaining thickness", kind="thickness",
                    patches=patches if len(patches) else None, indications=None,
                    **_map_common(new, zmap, units)))


class _RegistrationFigure:
    """The registration overlay (the scans' features before and after alignment), drawn
    from the full grids by a call, or by the figure helper from its reduced masks
    (:meth:`for_helper`, computed here)."""

    def __init__(self, new, old, old_on_new):
        self.new, self.old, self.old_on_new = new, old, old_on_new

    def _masks(self):
        from .register import RigidTransform, resample_layer

        new, old = self.new, self.old
        depth = _reporting_depth(new)

        def features(t, nominal):
            # unscanned, or loss (nominal - t) at or above the reporting depth: boolean
            # comparisons only (NaN compares False), no float copies of the grid
            with np.errstate(invalid="ignore"):
                return ~np.isfinite(t) | (t <= np.float32(nominal - depth))

        feat_new = features(new.thickness, new.meta.nominal)
        # before alignment: the older scan's features on its own grid, placed by its raw
        # coordinates (nearest cell; a display aid, so no interpolation is needed)
        feat_before = resample_layer(features(old.thickness, old.meta.nominal), old, new, RigidTransform(), fill=True)
        feat_after = features(self.old_on_new.thickness, new.meta.nominal)
        return feat_new, feat_before, feat_after

    def __call__(self):
        from .report import figures as F

        return F.registration_overlay(*self._masks(), extent=self.new.extent)

    def for_helper(self):
        from .report import figures as F

        masks, f, shape = F.reduce_feature_masks(*self._masks())
        return partial(F.registration_overlay, *masks, extent=self.new.extent, reduced=(f, shape))


def _return_level_figure(z, name, units):
    """The return-level plot of one zone's depth statistics ``z``."""
    from .report import figures as F

    T_line, lvl, lower, upper, T_bound = _return_curve(z)
    return F.return_level_plot(T_line, lvl, lower, upper, bound_T=T_bound, zone_T=z.T, units=units,
                               bound_label=f"{100 * z.level:.0f} % upper bound", title=f"Return level, zone {name}")


def _return_curve(z):
    from .errors import FitError
    from .extremes import return_level, return_level_bounds

    if z.fit is None or z.blocks is None:
        return None
    T_max = max(10.0, 3 * z.T)
    T_line = np.geomspace(2.0, T_max, 60)  # the return level is a formula: a smooth line
    lvl = np.array([float(return_level(z.fit, T)) for T in T_line])
    # the bound is a profile-likelihood search per period: at five periods and the zone's T
    grid = np.geomspace(2.0, T_max, 5)
    grid = grid[np.abs(np.log(grid / z.T)) > np.log(1.25)] if z.T > 0 else grid  # none next to the zone's T
    Ts = np.unique(np.r_[grid.round(2), z.T])
    ups = []
    mx = np.asarray(z.blocks.maxima, dtype=float)
    cen = np.asarray(z.blocks.censored, dtype=bool)
    b_zone = getattr(z, "bounds", None)
    for T in Ts:
        if T == z.T and b_zone is not None and b_zone.method == "profile" and b_zone.one_sided \
                and b_zone.level == z.level:
            ups.append(b_zone.upper)  # the table's own bound at the zone's T: not searched twice
            continue
        try:
            b = return_level_bounds(z.fit, mx, T, level=z.level, one_sided=True, method="profile",
                                    censored=cen if cen.any() else None, threshold=z.threshold if cen.any() else None)
            ups.append(b.upper)
        except (FitError, ValueError, ArithmeticError):
            ups.append(np.nan)  # a display aid only: the table's bound comes from zone_extremes
    return T_line, lvl, None, np.array(ups), Ts


def actions(an: Analysis) -> list[str]:
    """Plain sentences on what each zone's result asks of the inspector and the engineer."""
    out = []
    found = an.zone_table.set_index("zone")
    rep = an.zones_repaired.set_index("zone") if an.zones_repaired is not None else None
    for zone, z in found.iterrows():
        flags = set(str(z["flags"]).split(";")) if isinstance(z["flags"], str) else set()
        if "no-data" in flags:
            out.append(f"Zone {zone} was not scanned: assess it by hand UT before setting its interval.")
            continue
        if "below-mrt" in flags:
            out.append(f"Zone {zone} is below MRT now (thinnest {z['t_min_mm']:.2f} mm against {z['mrt_mm']:.2f} mm): "
                       "repair before return to service.")
        if "code-exceeds-local" in flags:
            out.append(f"In zone {zone} the code formula gives {z['interval_code_y']:.1f} y but the co-located "
                       f"projection from the measured rates only {z['life_local_y']:.1f} y: the formula overstates what "
                       "the metal supports; the recommendation follows the metal.")
        if rep is not None and zone in rep.index:
            r = rep.loc[zone]
            if isinstance(r["limiting"], str) and r["limiting"] == "eva" and np.isfinite(r["interval_recommended_y"]):
                hidden = max(0.0, float(r["area_m2"]) * (1 - float(r["coverage_pct"]) / 100))
                out.append(f"After repair, zone {zone} is limited by the extreme-value life ({r['life_eva_y']:.1f} y): "
                           f"the {hidden:.1f} m² nobody scanned may hide deeper pits; proving them up by hand UT (adding the "
                           "readings to the newer scan file) and re-running can lengthen the interval.")
    return out


def _report_data(an: Analysis, units: str, registration_dict, figs) -> object:
    from .report.html import ReportData

    floor_mm2 = math.pi * (an.zones.geometry.diameter_mm / 2) ** 2

    def insp(label, s):
        return {"label": label, "date": s.meta.inspected.isoformat(), "method": s.meta.method or "-",
                "file": os.path.basename(s.source or "-"), "pitch_mm": s.pitch,
                "coverage_pct": min(100.0, 100.0 * s.n_scanned * s.cell_area / floor_mm2),
                "threshold_mm": s.meta.threshold, "sigma_mm": s.meta.sigma}

    inspections = ([insp("older", an.old)] if an.old is not None else []) + [insp("newer" if an.old else "only", an.new)]
    fig_dict: dict = {}
    for sec, cap, png in figs:
        fig_dict.setdefault(sec, []).append((cap, png))
    ext = {}
    for name, z in an.extremes_depth.items():
        row = z.row()
        r = an.extremes_rate.get(name)
        if r:
            row["rate_eva_mm_y"] = r.depth_eva_mm
            row["rate_eva_upper_mm_y"] = r.depth_eva_upper_mm
        ext[name] = row
    att = an.attribution
    assumptions = list(an.assumptions)
    assumptions.append(f"Indications: connected regions (8-connected) of loss at or above "
                       f"{_reporting_depth(an.new):.2f} mm (the detection threshold, or 10 % of nominal without one).")
    assumptions.append(f"Extreme values: blocks of {an.job.block_mm:g} mm square (halved, down to "
                       f"{MIN_BLOCK_MM:g} mm, in zones too small or narrow for a fit; eva_block_mm gives the side "
                       "used), counted when at least half scanned; Gumbel maximum likelihood with left-censoring at the detection threshold "
                       f"(GEV instead when the likelihood-ratio test rejects Gumbel at {GEV_ALPHA:g}); return "
                       "period T = whole zone area ÷ block area; 90 % one-sided upper bound by seeded parametric "
                       "bootstrap (profile likelihood for GEV); depth_pred_upper_mm is the predictive 90 % bound.")
    assumptions.append(
        "Extreme-value life: each cell's loss projected forward at its own measured top + underside rates; the "
        "life is when the deepest projected loss over the zone reaches nominal − MRT, the deepest being the "
        f"greater of the deepest scanned value and the {LIFE_LEVEL:.0%} quantile of the largest of T block maxima, "
        "T = unscanned zone area ÷ block area. On 30 synthetic floors whose pits fall where they may, scanned or "
        "not, this life was at most 1.1 × the true life of all the metal in 23; with deep pits deliberately hidden "
        "under unscanned ground, in 6. A hidden pit deeper than anything scanned cannot be ruled out by "
        "statistics: prove up unscanned areas (hand UT) where the zone's life is short.")
    assumptions.append("Repair planning: cells that would fall below MRT before the target interval at their own "
                       "rates are grouped into patch plates; patched cells take the patch thickness and keep their "
                       "measured top-side rate and "
                       + ("no underside rate (the user says the cause of the underside corrosion was removed)."
                          if an.job.under_cause_removed else
                          "their measured underside rate (the cause of the underside corrosion is not assumed removed)."))
    assumptions.append("Maps are drawn from decimated grids on big floors (minimum thickness / maximum loss and "
                       "rate per displayed pixel), so the worst value is never hidden; the tables use every cell.")
    notes = actions(an) + list(an.notes)
    if att and att.get("cells_with_loss"):
        notes.append(
            f"Attribution: of {att['cells_with_loss']} cells with reported loss, {att['cells_top']} were attributed "
            f"to the top side and {att['cells_under']} to the underside by the operator"
            + (f", {att['cells_top_depth']} have a measured top-side depth" if att.get("cells_top_depth") else "")
            + f"; {att['cells_defaulted']} ({att['defaulted_pct']:.0f} %) were not attributed and count as "
            f"{'underside' if att['default_side'] == 'under' else 'top-side'} loss (the default).")
    if an.patch_note:
        notes.append(an.patch_note)
    if an.uncovered_cells:
        notes.append(f"{an.uncovered_cells} cells needing repair for the target interval are not covered by any patch.")
    return ReportData(
        tank={"name": an.new.meta.tank, "diameter_mm": an.zones.geometry.diameter_mm},
        inspections=inspections, zones=an.zone_table, zones_repaired=an.zones_repaired,
        patches=an.patches, indications=an.indications,
        registration=None if registration_dict is None else {
            k: registration_dict.get(k) for k in ("method", "rotation_deg", "dx_mm", "dy_mm", "score",
                                                  "overlap_pct", "residual_rms_mm", "reliable", "warnings",
                                                  "std_rotation_deg", "std_shift_mm", "control_residuals_mm",
                                                  "control_rms_mm", "convention")},
        rules_table=an.rules.table(), assumptions=assumptions, figures=fig_dict, extremes=ext,
        flags_explained=FLAGS_EXPLAINED, units=units, timings=dict(an.timings),
        generated=_dt.datetime.now().replace(microsecond=0), single_inspection=an.single, notes=notes)


def _dxf_task(patches, folder):
    """Writing ``patches.dxf`` into ``folder``, as a renderer task (marked with its file)."""
    from . import repair

    task = partial(repair.write_patches_dxf, patches, Path(folder) / "patches.dxf")
    task.scananalyse_file = "patches.dxf"
    return task


def write_outputs(an: Analysis, folder, *, progress: Progress | None = None, queue=None, early=None) -> list:
    """Write every output file of an analysis into ``folder`` (which must exist).

    ``queue`` is the :class:`~scananalyse.report.render.FigureQueue` that draws the figures
    (default: one made here, its helper forked now where that is safe); ``early`` maps the
    slugs of the figures already handed to it (``analyse``'s ``on_figures``) to their job
    numbers, each file named by :func:`_draft_stems`.  The other figures are added here, the
    data files written while the helper draws, and all figures then numbered in the
    report's order.
    """
    from contextlib import ExitStack
    from . import repair
    from .indications import write_indications_csv
    from .outputs import write_json, write_results_h5
    from .report.html import write_report
    from .report.render import FigureQueue, file_stem

    prog = progress or Progress(quiet=True)
    folder = Path(folder)
    units = an.job.units
    files = []
    figdir = folder / "figures"
    figdir.mkdir(exist_ok=True)
    specs = _figure_specs(an, units)
    early = dict(early or {})
    with ExitStack() as stack:
        if queue is None:
            queue = stack.enter_context(FigureQueue())
        jobs = dict(early)  # slug -> job number
        rest = [sp for sp in specs if sp[1] not in jobs]
        rest = [rest[i] for i in _costliest_first(rest)]
        for sp, stem in zip(rest, _draft_stems(rest, len(queue.jobs))):
            jobs[sp[1]] = queue.add(figdir / f"{stem}.png", sp[3])
        # the patch drawing (DXF) is written like a figure, by the helper where there is
        # one (unless it was queued already: analyse's on_patches)
        if not any(getattr(fn, "scananalyse_file", None) == "patches.dxf" for kind, _, fn in queue.jobs
                   if kind == "task"):
            queue.add_task(_dxf_task(an.patches, folder))
        with prog.stage("outputs"):
            an.zone_table.to_csv(folder / "zones.csv", index=False)
            an.zones_repaired.to_csv(folder / "zones_repaired.csv", index=False)
            repair.write_patches_csv(an.patches, folder / "patches.csv")
            write_indications_csv(an.indications, folder / "indications.csv")
            files += ["zones.csv", "zones_repaired.csv", "patches.csv", "patches.dxf", "indications.csv"]
            reg_dict = None
            if an.registration is not None:
                reg_dict = an.registration.to_dict()
                write_json(reg_dict, folder / "registration.json")
                files.append("registration.json")
            maps = dict(an.rates.maps())
            maps.update({"thickness": an.new.thickness, "side_raw": an.side_raw, "side": an.side,
                         "zone": an.zones.labels, "life_local": an.life_map, "mrt": an.mrt_map,
                         "needs_repair": an.needs_repair})
            if an.old_on_new is not None:
                maps["thickness_old_on_new"] = an.old_on_new.thickness
            maps.update(an.repaired_maps)
            attrs = {"tank": an.new.meta.tank, "inspected_new": an.new.meta.inspected.isoformat(),
                     "inspected_old": an.old.meta.inspected.isoformat() if an.old else "",
                     "zone_names": ";".join(an.zones.names), "scananalyse_version": __version__,
                     "caution": CAUTION}
            write_results_h5(folder / "results.h5", maps, x0=an.new.x0, y0=an.new.y0, pitch=an.new.pitch,
                             attrs=attrs, timings=an.timings)
            files.append("results.h5")
        with prog.stage("report"):
            captions = queue.finish()
            figs = []
            for n, (sec, slug, cap, _) in enumerate(specs, start=1):
                job = jobs[slug]
                path = queue.jobs[job][1]
                final = figdir / f"{n:02d}_{file_stem(slug)}.png"
                os.replace(path, final)  # numbered in the report's order
                figs.append((sec, f"{cap} {captions[job]}".strip(), final.read_bytes()))
                files.append(f"figures/{final.name}")
            data = _report_data(an, units, reg_dict, figs)
            write_report(data, folder / "report.html")
            files.append("report.html")
    # a helper killed while writing leaves its temporary file (the file itself was then
    # written again here): none belongs in the output folder
    for stale in list(figdir.glob(".fig-*")) + list(folder.glob(".tmp-*")):
        stale.unlink(missing_ok=True)
    return files


# ------------------------------------------------------------------------------------
# entry points
# ------------------------------------------------------------------------------------
def _load(path):
    from .io import read_scan

    return read_scan(path)


def _import_stages():
    """Import every stage up front: an interrupt must never land inside a lazy import."""
    from . import assess, attribution, extremes, indications, rates, register, repair, zones  # noqa: F401
    from .report import figures, html, render  # noqa: F401


def _check_out_dir(out_dir, force):
    p = Path(out_dir)
    if p.exists() and not p.is_dir():
        raise InputError(f"{p}: exists and is not a folder")
    if p.exists() and not force:
        raise InputError(f"{p}: output folder exists; use --force to replace it")


@contextmanager
def _small_pages():
    """Run without numpy's transparent-huge-page advice on its large arrays, then restore it.

    On Linux with the usual ``defrag = madvise`` setting, every fresh large array numpy
    advises for huge pages can stall while the kernel compacts memory to find them; a run
    makes dozens of fresh full-grid arrays.  Measured on the 30 m bench floor: 13.9 s with
    the advice, 12.1 s without (each of two runs).  Only the advice is switched, only for the
    run; nothing else changes.
    """
    core = getattr(np, "_core", None) or getattr(np, "core", None)
    setter = getattr(getattr(core, "multiarray", None), "_set_madvise_hugepage", None)
    if setter is None:
        yield
        return
    previous = setter(False)
    try:
        yield
    finally:
        setter(previous)


from ._libc import _DEFAULT_MMAP_MAX, _DEFAULT_TRIM_THRESHOLD, _M_MMAP_MAX, _M_TRIM_THRESHOLD  # noqa: E402
#: Free memory the heap may keep at its top during a run before giving it back. [bytes]
_RUN_TRIM_THRESHOLD = 1 << 30


@contextmanager
def _reuse_freed_memory():
    """Run with glibc keeping freed large blocks for reuse, then give the memory back.

    glibc serves every block of more than 32 MB (every full grid of a 30 m floor) with a
    fresh ``mmap`` and unmaps it when freed, so each new grid is paged in again (zeroed
    page by page: about 22 ms for a 36 MB grid on the bench machine, against 5 ms for the
    arithmetic on it), and a run makes a few hundred of them.  For the run, large blocks
    come from the heap instead (``M_MMAP_MAX`` 0) and the heap keeps up to 1 GiB free at
    its top (``M_TRIM_THRESHOLD``), so a freed grid's pages serve the next one.  Measured:
    30 m 13.0 -> 11.7 s, 60 m 52.7 -> 47.2 s; peak memory +5 bytes per cell.  Afterwards
    the defaults are set again and ``malloc_trim`` returns the free memory.  Only glibc,
    and only when no other thread runs (the settings are the whole process's).
    """
    import threading

    from ._libc import glibc

    libc = glibc()
    if libc is None or threading.active_count() != 1:
        yield
        return
    libc.mallopt(_M_MMAP_MAX, 0)
    libc.mallopt(_M_TRIM_THRESHOLD, _RUN_TRIM_THRESHOLD)
    try:
        yield
    finally:
        libc.mallopt(_M_MMAP_MAX, _DEFAULT_MMAP_MAX)
        libc.mallopt(_M_TRIM_THRESHOLD, _DEFAULT_TRIM_THRESHOLD)
        libc.malloc_trim(0)


def _run(old_path, new_path, *, job, out_dir, force, quiet, single) -> CompareResult:
    with _small_pages(), _reuse_freed_memory():
        return _run_job(old_path, new_path, job=job, out_dir=out_dir, force=force, quiet=quiet, single=single)


def _run_job(old_path, new_path, *, job, out_dir, force, quiet, single) -> CompareResult:
    from ._libc import trim_free_memory
    from .outputs import output_folder
    from .report.render import FigureQueue

    _import_stages()
    _check_out_dir(out_dir, force)
    prog = Progress(STAGES_SINGLE if single else STAGES_PAIR, quiet=quiet)
    # the figure helper is forked now, while this process holds only the libraries
    # (report/render.py): figures are handed to it as their data become known
    with FigureQueue() as queue:
        with prog.stage("load"):
            new = _load(new_path)
            old = None if single else _load(old_path)
            inputs = read_job_inputs(job, new)
        with output_folder(out_dir, force=force) as tmp:
            (tmp / "figures").mkdir()
            early = {}  # slug -> job number

            def draw_early(specs):
                # figures whose data are known go to the queue (costliest first) while the
                # analysis goes on
                specs = [specs[i] for i in _costliest_first(specs)]
                for sp, stem in zip(specs, _draft_stems(specs, len(queue.jobs))):
                    early[sp[1]] = queue.add(tmp / "figures" / f"{stem}.png", sp[3])

            def patches_known(patches):
                queue.add_task(_dxf_task(patches, tmp))

            try:
                an = analyse(new, old, job=job, progress=prog, inputs=inputs, on_figures=draw_early,
                             on_patches=patches_known)
                # the analysis's temporaries are gone: their memory (kept for reuse during
                # the analysis, _reuse_freed_memory) goes back to the system before the
                # outputs, while the figure helper still draws
                trim_free_memory()
                files = write_outputs(an, tmp, progress=prog, queue=queue, early=early)
            except BaseException:
                queue.close()  # the helper stops before the unfinished folder is removed
                raise
    prog.finish()
    reg = an.registration.to_dict() if an.registration is not None else None
    return CompareResult(out_dir=str(out_dir), zones=an.zone_table, zones_repaired=an.zones_repaired,
                         patches=an.patches, indications=an.indications, registration=reg,
                         report_path=str(Path(out_dir) / "report.html"), units=job.units,
                         tank=an.new.meta.tank, single=single, files=files,
                         notes=actions(an) + list(an.notes) + ([an.patch_note] if an.patch_note else []))


def compare(old_path, new_path, *, job: Job, out_dir, force: bool = False, quiet: bool = False) -> CompareResult:
    """The whole job on two inspections of one floor; writes the outputs into ``out_dir``."""
    return _run(old_path, new_path, job=job, out_dir=out_dir, force=force, quiet=quiet, single=False)


def assess_single(scan_path, *, job: Job, out_dir, force: bool = False, quiet: bool = False) -> CompareResult:
    """The same assessment from one inspection (long-term rates from ``installed``)."""
    return _run(None, scan_path, job=job, out_dir=out_dir, force=force, quiet=quiet, single=True)


def register_files(old_path, new_path, *, out_dir, control_points=None, force=False, quiet=False) -> dict:
    """Register two scan files and write ``out_dir/registration.json``."""
    from .outputs import output_folder, write_json
    from .register import register

    _import_stages()
    _check_out_dir(out_dir, force)
    prog = Progress(["load", "registration"], quiet=quiet)
    with prog.stage("load"):
        old = _load(old_path)
        new = _load(new_path)
    with output_folder(out_dir, force=force) as tmp:
        with prog.stage("registration"):
            reg = register(new, old, control_points=control_points)
        d = reg.to_dict()
        write_json(d, Path(tmp) / "registration.json")
    prog.finish()
    summary = (f"rotation {d['rotation_deg']:.3f} deg, shift ({d['dx_mm']:.1f}, {d['dy_mm']:.1f}) mm, "
               f"score {d['score'] or 0:.2f}, overlap {d['overlap_pct'] or 0:.1f} %, "
               f"residual RMS {d['residual_rms_mm'] or float('nan'):.3f} mm, method {d['method']}"
               + ("" if d["reliable"] else " -- UNRELIABLE: " + "; ".join(d["warnings"]))
               + f"\nwrote {Path(out_dir) / 'registration.json'}")
    return {"registration": d, "summary": summary}


def sample_dir() -> Path:
    """Folder of the shipped sample scans (beside the package in a source checkout)."""
    here = Path(__file__).resolve().parent
    for cand in (here.parent / "sample_scans", here / "sample_scans"):
        if cand.is_dir():
            return cand
    raise InputError("sample_scans: the sample scan folder was not found beside the package")


DEMO = {"old": "FQ-214_2015-09-21.h5", "new": "FQ-214_2025-10-06.h5", "repairs": "FQ-214_repairs.csv",
        "diameter": 8000.0}


def run_demo(out_dir="demo_out", *, units=None, quiet=False) -> CompareResult:
    """The whole job on the shipped sample scans (an invented tank, see sample_scans/README.md)."""
    d = sample_dir()
    job = Job(diameter=DEMO["diameter"], repairs=str(d / DEMO["repairs"]), units=units or "mm")
    return compare(d / DEMO["old"], d / DEMO["new"], job=job, out_dir=out_dir, force=True, quiet=quiet)
