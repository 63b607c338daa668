"""The stages of one floor's analysis, called in order on plain data: :func:`analyse`.

The order is the documented flow (docs/architecture.md): registration and resampling (two
inspections), side attribution and loss layers, zones, extreme values of depth, rates,
indications (with the rate assumed where none was measured), assessment (rate extremes, extreme-value
life, per-zone intervals), repairs.
Each stage is a public function of its own module; nothing here reads or writes a file
except :func:`read_job_inputs`.  Files, the output folder and the report are
:mod:`scananalyse.runner`'s.  A notebook user calls :func:`analyse` and looks at the
:class:`Analysis` it returns.
"""

from __future__ import annotations

import dataclasses
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from . import assess, attribution, rates, readings as rd, repair, zones
from .checks import check_job_against_scans, check_repair_to
from .errors import InputError, ScanWarning
from .evlife import add_eva_columns, floor_fit, hidden_parts, merge_extremes, seen_lives, zone_lives
from .extremes import depth_statistics, rate_statistics
from .indications import (apply_indication_rates, assumed_rate_note, flag_indications, gone_indications,
                          label_indications, match_indications, measure_indications, new_indication_rates,
                          old_indications, region_max, reporting_depth)
from .job import Job
from .probability import life_distributions, repaired_rates
from .progress import Progress
from .register import register, resample_onto
from .rules import get_ruleset
from .scan import MM_PER_IN, FloorScan

__all__ = ["Analysis", "analyse", "read_job_inputs"]


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
    hidden: dict
    life_dists: dict
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
    # spot readings (readings CSV v1), when the job gives any
    readings: dict = field(default_factory=dict)
    # the operator's repair records (rates.read_repairs), for the report's repair-record map
    repairs: list = field(default_factory=list)

    @property
    def single(self) -> bool:
        return self.old is None


def _to_mm(value, scan: FloorScan):
    return None if value is None else float(value) * (MM_PER_IN if scan.meta.units == "in" else 1.0)


def read_job_inputs(job: Job, new: FloorScan, rules=None, *, old: FloorScan | None = None) -> dict:
    """Read every file the job names besides the scans (shapes, top-side depth, repair
    records, the engineer's patches, spot readings), so bad files are refused before any
    work is done.  With ``old`` given, the readings are also told apart by outage
    (:func:`~scananalyse.readings.split_readings`)."""
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
        "readings": rd.job_readings([rd.read_readings(p) for p in job.readings], new, old),
    }


def analyse(new: FloorScan, old: FloorScan | None = None, *, job: Job, progress: Progress | None = None,
            registration=None, inputs: dict | None = None) -> Analysis:
    """Run every computing stage on one floor (no files written).

    Parameters
    ----------
    new : the newer (or only) inspection.
    old : the older inspection, or None for a single-inspection assessment.
    job : settings (diameter etc. in the scans' units).
    progress : optional :class:`Progress`; each stage is timed under its name.
    registration : optional precomputed :class:`~scananalyse.register.Registration`.
    inputs : the job's other files already read (:func:`read_job_inputs`); read here if None.
    """
    prog = progress or Progress(quiet=True)
    assumptions: list[str] = []
    job, notes = _checked_job(job, new, old)
    rules = get_ruleset(job.ruleset, job.rule_overrides or None)
    if inputs is None:
        inputs = read_job_inputs(job, new, rules)
    fit_kw = dict(pitch=new.pitch, block_mm=job.block_mm, seed=job.seed)
    readings_new, readings_old = _outage_readings(inputs, new, old)
    scan_new = new  # as scanned, before the readings
    repairs = inputs["repairs"]

    reg, old_on_new = registration, None
    if old is not None:
        old, reg, old_on_new = _older_on_newer_grid(new, old, job, prog, reg, readings_new, readings_old,
                                                    notes=notes, assumptions=assumptions)

    new, rinfo = _newer_readings_applied(new, readings_new, job, prog, assumptions=assumptions)
    with prog.stage("attribution"):
        side_raw, side, top_depth = _sides(new, job, inputs, rinfo)
        ropt = rates.RateOptions(k_sigma=float(rules.noise_k.value), unknown_side=job.default_side)
        # the newer scan's loss by side, and its indication regions (labelled once: the
        # rate fill and the indication list use them)
        layers = rates.loss_layers(new, side, top_depth=top_depth, options=ropt)
        ind_labels = label_indications(layers.loss, reporting_depth_mm=reporting_depth(new))

    with prog.stage("zones"):
        zmap = _zone_map(new, job, rules)
        options = _assess_options(job)
        mrt, zone_mrt = _mrt(zmap, rules, options, job, nominal_mm=new.meta.nominal)
        reading_zone_table, off_scan_table, spots = _reading_zone_table(readings_new, readings_old, reg, zmap,
                                                                        zone_mrt, new, rules, options)
        ind_new = _newer_indications(ind_labels, layers.loss, new, side, zmap)

    with prog.stage("extremes"):
        ext_depth = depth_statistics(new.thickness, zmap, nominal=new.meta.nominal, censored=layers.censored,
                                     threshold=new.meta.threshold, **fit_kw)
        del layers

    with prog.stage("rates"):
        lr, n_filled = _rates(new, old_on_new, side, top_depth, repairs, ropt, ind_labels)

    with prog.stage("indications"):
        # before the life map: new, repaired and partly unscanned indications have no measured
        # rate of their own, and raise the rate maps to the rate assumed for them
        ind, gone = _indications(ind_new, new, old, reg, lr, zmap, ind_labels, old_on_new=old_on_new,
                                 repairs=repairs)
        if old is not None and len(ind):
            lr, note = _with_assumed_rates(lr, ind, ind_labels, unknown_side=job.default_side)
            assumptions += [note] if note else []
        if rinfo is not None:
            rinfo["prove_up"] = _prove_up(readings_new, new, ind, ind_labels)
        del ind_labels, ind_new

    att = attribution.attribution_summary(side_raw, lr.loss, top_depth=top_depth, default=job.default_side)
    assumptions += _assumptions(job, new, lr, ropt, single=old is None, n_filled=n_filled)

    with prog.stage("assessment"):
        life = assess.local_life_map(new.thickness, lr.rate_top, lr.rate_under, mrt)
        ext_rate = rate_statistics(lr.rate_top, lr.rate_under, zmap, **fit_kw)
        older = (old_on_new.thickness, lr.dt_years) if old_on_new is not None else None
        floor = _floor_extremes(new, lr, zmap, ext_depth, fit_kw)  # lent to zones with no fit of their own
        hidden, table = _zone_table(new, side, lr, zmap, mrt, rules, options, ext_depth, ext_rate, older,
                                    have_old=old is not None, fit_kw=fit_kw, floor=floor)

    with prog.stage("probability"):
        life_dists = _life_distributions(new.thickness, lr, zmap, mrt, ext_depth, new=new, job=job, floor=floor,
                                         spots=spots)
        table = _with_probabilities(table, life_dists, off_scan_table, hidden, new, rules, job, options)

    with prog.stage("repairs"):
        rep = repair.repair_and_reassess(new, lr, side, zmap, rules, options, mrt, job, have_old=old is not None,
                                         own_patches=inputs["patches"], ext_rate=ext_rate,
                                         ext_depth=ext_depth, hidden=hidden, older=older)
        # the repaired floor's distribution: patched cells new plate at their kept rates; the
        # hidden part as found
        maps = rep["repaired_maps"]
        dists_rep = _life_distributions(maps["thickness_repaired"], repaired_rates(lr, maps), zmap, mrt, ext_depth,
                                        new=new, job=job, floor=floor, spots=spots, as_found=life_dists)
        rep["zones_repaired"] = _with_probabilities(rep["zones_repaired"], dists_rep, off_scan_table, hidden,
                                                    new, rules, job, options)

    return Analysis(job=job, new=new, old=old, registration=reg, old_on_new=old_on_new, side_raw=side_raw,
                    side=side, rates=lr, zones=zmap, options=options, extremes_depth=ext_depth,
                    rules=_rules_applied(rules, job, rep), extremes_rate=ext_rate, hidden=hidden,
                    life_dists=life_dists, zone_table=table, life_map=life, mrt_map=mrt, indications=ind,
                    gone=gone, attribution=att, assumptions=assumptions, notes=notes, timings=prog.timings,
                    readings=rd.readings_result(rinfo, reading_zone_table, scan_new, readings_new, readings_old),
                    repairs=list(repairs or []), **rep)


# --------------------------------------------------------------------------- the stages' parts
def _checked_job(job, new, old):
    """The job checked against the scans (units of every length, scanned cells inside the
    stated shell, the two scans of one tank), and the notes its warnings give."""
    if job.diameter is None:
        raise InputError("--diameter: the tank's inside diameter is required")
    job, warns = check_job_against_scans(job, new, old)
    for w in warns:
        warnings.warn(w, ScanWarning, stacklevel=3)  # at the caller of analyse
    return job, list(warns)


def _outage_readings(inputs, new, old):
    """The job's spot readings of the newer and of the older outage (None where there are none)."""
    rdg = inputs.get("readings") or {"files": []}
    if not rdg["files"]:
        return None, None
    if not rdg.get("old_known") and old is not None:
        rdg = rd.job_readings(rdg["files"], new, old)  # read without the older scan: tell them apart now
    return rdg["split"]


def _older_on_newer_grid(new, old, job, prog, reg, readings_new, readings_old, *, notes, assumptions):
    """The older scan checked against the newer one (inspected before it; a note where the
    nominal thicknesses differ), registered (unless ``reg`` is given; refused if not
    reliable), its readings applied, and its thickness resampled onto the newer grid:
    (old, registration, old_on_new).  Appends to ``notes`` and ``assumptions``."""
    if abs(old.meta.nominal - new.meta.nominal) > 1e-6:
        notes.append(f"the scans give different nominal thicknesses ({old.meta.nominal:.2f} and "
                     f"{new.meta.nominal:.2f} mm); the newer one is used")
    if old.meta.inspected >= new.meta.inspected:
        raise InputError(f"{new.source or 'new scan'}: field 'inspected': the newer scan ({new.meta.inspected}) "
                         f"must be inspected after the older one ({old.meta.inspected})")
    if reg is None:
        with prog.stage("registration"):
            reg = register(new, old, control_points=job.control_points)
    if not reg.reliable:
        # never short-term rates from a failed alignment
        why = "; ".join(reg.warnings) or f"method {reg.method}"
        raise InputError(f"{old.source or 'old scan'}: the two inspections could not be aligned reliably "
                         f"({why}); give control points (--control-points), or run 'assess' on the newer scan")
    if readings_old is not None:
        with prog.stage("readings"):
            old, rinfo_old = rd.apply_old_readings(old, readings_old, new, job, readings_new)
            assumptions.extend(rinfo_old["assumptions"])
    with prog.stage("resampling"):
        # only the thickness is used on the newer grid (the layers are not carried)
        old_on_new = resample_onto(dataclasses.replace(old, side=None, plate=None), new, reg.transform)
    return old, reg, old_on_new


def _newer_readings_applied(new, readings_new, job, prog, *, assumptions):
    """The newer scan with its readings governing at their cells and unproved loss corrected
    for under-sizing (the corrected floor goes into every later stage), and what the
    readings gave (None without readings).  Appends to ``assumptions``."""
    if readings_new is None:
        return new, None
    with prog.stage("readings"):
        new, rinfo = rd.apply_new_readings(new, readings_new, job)
        assumptions.extend(rinfo["assumptions"])
    return new, rinfo


def _sides(new, job, inputs, rinfo):
    """The raw and resolved side maps and the top-side depth map (the job's shapes and
    top-side depth, and the side and pit-gauge depth the readings state at their cells)."""
    top_depth = inputs["top_depth"]
    if rinfo is not None and np.isfinite(rinfo["applied"].depth_top).any():
        pg = rinfo["applied"].depth_top  # pit-gauge depths: measured top-side depth
        top_depth = pg if top_depth is None else np.fmax(top_depth, pg)
    side_raw = attribution.raw_side_map(new, shapes=inputs["shapes"])
    if rinfo is not None:
        stated = rinfo["applied"].side >= 0  # the side a reading states governs at its cell
        side_raw = np.where(stated, rinfo["applied"].side, side_raw).astype(side_raw.dtype)
    return side_raw, attribution.resolve_side(side_raw, job.default_side), top_depth


def _assess_options(job) -> assess.AssessOptions:
    """The assessment options the job sets."""
    return assess.AssessOptions(
        leak_detection=job.leak_detection, reinforced_lining=job.reinforced_lining, coated=job.coated,
        coating_life_years=job.coating_life_years if job.coated else None, cp_effective=job.cp_effective,
        release_prevention_barrier=job.release_prevention_barrier, unknown_side=job.default_side,
        target_interval_years=job.target_interval, shell_tmin_mm=job.shell_tmin_mm)


def _mrt(zmap, rules, options, job, *, nominal_mm):
    """The MRT map and each zone's MRT, with the job's repair-to thickness checked against them."""
    mrt = assess.mrt_map(zmap, rules, options, t0=nominal_mm)
    zone_mrt = dict(zip(zmap.names, assess.zone_mrt(zmap, rules, options, t0=nominal_mm)))
    check_repair_to(job.repair_to_mm, zone_mrt, nominal_mm=nominal_mm, given=job.typed.get("repair_to"),
                    what=job.where("repair_to"))
    return mrt, zone_mrt


def _reading_zone_table(readings_new, readings_old, reg, zmap, zone_mrt, new, rules, options):
    """The zones assessed from the spot readings alone (older readings moved onto the newer
    frame by the registration): all of them (the report's table), those on cells the scan
    has no value at (the zone table's), and these as spots by zone;
    (None, None, None) without newer readings."""
    if readings_new is None:
        return None, None, None
    moved_old = None
    if readings_old is not None and reg is not None:
        tr = reg.transform
        moved_old = rd.move_readings(readings_old, dx_mm=tr.dx_mm, dy_mm=tr.dy_mm, rotation_deg=tr.rotation_deg)
    kw = dict(zones=zmap, nominal_mm=new.meta.nominal, installed=new.meta.installed,
              critical_width_mm=float(rules.critical_zone_width_mm.value))
    off = rd.off_scan(readings_new, new)  # the others are in the scan's grid already
    return (rd.reading_zone_summary(readings_new, moved_old, mrt_mm=zone_mrt, options=options, **kw),
            rd.reading_zone_summary(off, moved_old, mrt_mm=zone_mrt, options=options, **kw) if len(off) else None,
            rd.zone_spots(off, moved_old, **kw))


def _newer_indications(labels, loss, new, side, zmap):
    """The newer scan's indication regions measured (no rate yet)."""
    return measure_indications(labels, loss, pitch_mm=new.pitch, x0=new.x0, y0=new.y0, side=side, plate=new.plate,
                               zone_labels=zmap.labels, zone_names=zmap.names, rate=None, thickness=new.thickness)


def _rates(new, old_on_new, side, top_depth, repairs, ropt, labels):
    """The loss and rate maps, with the short-term rate filled on indication cells the older
    scan did not cover: (rates, number of cells filled)."""
    lr = rates.compute_rates(new, old_on_new, side, top_depth=top_depth, repairs=repairs, options=ropt)
    if old_on_new is None:
        return lr, 0
    return rates.fill_uncovered_rates(lr, new, old_on_new, labels)


def _with_assumed_rates(lr, ind, labels, *, unknown_side):
    """The rate maps raised to the rate assumed for indications with no measured rate, and
    the sentence saying so (None if none was assumed)."""
    top, under = apply_indication_rates(lr.rate_top, lr.rate_under, labels, ind, unknown_side=unknown_side)
    # an assumed rate is no measurement: it widens the cell's interval upwards
    lr = dataclasses.replace(lr, rate_top=top, rate_under=under, rate_top_hi=np.fmax(lr.rate_top_hi, top),
                             rate_under_hi=np.fmax(lr.rate_under_hi, under))
    return lr, assumed_rate_note(ind)


def _prove_up(readings_new, new, ind, labels):
    """The listed indications to prove up next, given the readings already taken on them."""
    pairs_lab = rd.pair_readings(readings_new, new, indication_labels=labels)
    listed = ind[np.isfinite(pd.to_numeric(ind["depth_max_mm"], errors="coerce"))] if len(ind) else ind
    return rd.prove_up_candidates(listed, pairs_lab)


def _zone_table(new, side, lr, zmap, mrt, rules, options, ext_depth, ext_rate, older, *, have_old, fit_kw,
                floor=None):
    """The per-zone assessment table with its extreme-value columns, and the part of each
    zone nobody scanned as found (``hidden``: kept as it is after any repair); ``floor``:
    the whole floor's fit, made once for this and the life distributions."""
    hidden = hidden_parts(new.thickness, lr.rate_top, lr.rate_under, mrt, zmap, nominal=new.meta.nominal,
                          censored=lr.censored, threshold=new.meta.threshold, methods=ext_depth, older=older,
                          floor=floor, **fit_kw)
    seen = seen_lives(new.thickness, lr.rate_top, lr.rate_under, mrt, zmap, nominal=new.meta.nominal,
                      censored=lr.censored, older=older)
    ext_life = zone_lives(seen, hidden)
    table = assess.assess_zones(thickness=new.thickness, side=side, rate_top=lr.rate_top, rate_under=lr.rate_under,
                                zones=zmap, meta=new.meta, rules=rules, options=options,
                                extremes=merge_extremes(ext_depth, ext_rate, ext_life, hidden), pitch_mm=new.pitch,
                                rate_short_available=have_old, zone_rates=lr.zone_inputs())
    return hidden, add_eva_columns(table, ext_depth, ext_life)


def _life_distributions(thickness, lr, zmap, mrt, ext_depth, *, new, job, floor=None, spots=None, as_found=None):
    """Each zone's life as a distribution (thickness noise, rate intervals, the hidden part,
    the spot readings where the scan has no value)."""
    return life_distributions(thickness, lr, zmap, mrt, ext_depth, nominal=new.meta.nominal, sigma_t=lr.sigma_new,
                              pitch=new.pitch, seed=job.seed, floor_extremes=floor, spots=spots, as_found=as_found)


def _floor_extremes(new, lr, zmap, ext_depth, fit_kw):
    """The whole floor's depth fit when some zone has none of its own (as found), else None."""
    if all(ext_depth.get(name) for name in zmap.names):
        return None
    return floor_fit(new.thickness, zmap, nominal=new.meta.nominal, censored=lr.censored,
                     threshold=new.meta.threshold, **fit_kw)


def _with_probabilities(table, life_dists, reading_zone_table, hidden, new, rules, job, options):
    """The zone table with the readings' zone columns (with the part of each zone nobody
    scanned) when there are readings, then the life quantiles and the probabilities at the
    due date (the readings may have set or shortened it)."""
    if reading_zone_table is not None:
        table = rd.add_reading_zones(table, reading_zone_table, rules=rules, inspected=new.meta.inspected,
                                     hidden=hidden, code_of=assess.code_formula(new.meta, options))
    return assess.add_life_distribution(table, life_dists, inspected=new.meta.inspected, rules=rules,
                                        target_probability=job.target_probability)



def _rules_applied(rules, job, rep):
    """The rule table for the report: which rules applied to this job."""
    checked = getattr(rep.get("patch_checks"), "attrs", {}).get("shell_clearance_checked", False)
    return rules.for_inputs(shell_tmin_mm=job.shell_tmin_mm, shell_clearance_checked=checked)


def _zone_map(new, job, rules):
    """The zone map of the job's floor geometry and user zones (in the scans' units)."""
    geom = zones.FloorGeometry(diameter_mm=_to_mm(job.diameter, new),
                               centre=(_to_mm(job.centre[0], new), _to_mm(job.centre[1], new)),
                               annular_width_mm=_to_mm(job.annular_width, new))
    # polygons first: the first listed user zone wins where zones overlap
    user = [(zname, [(_to_mm(x, new), _to_mm(y, new)) for x, y in pts]) for zname, pts in job.zone_polygons or []]
    if job.zone_rings:
        user.append(zones.ring_sector_zones(job.zone_rings, job.zone_sectors))
    zmap = zones.zone_map(new, geom, rules, user_zones=user or None)
    zmap.groups()  # the zones' cell indices, for every per-zone statistic
    return zmap


def _assumptions(job, new, lr, ropt, *, single, n_filled) -> list:
    """The sentences the report lists under assumptions for the loss and rate stages."""
    out = [f"Unattributed loss is counted as {job.default_side}side loss" if job.default_side == "under"
           else "Unattributed loss is counted as top-side loss"]
    if n_filled:
        out.append(f"{n_filled} cells of indications lay outside the older scan's coverage: they take the "
                   "short-term rate scaled from the same indication's measured cells (a pit deepens as fast as "
                   "its fastest measured part, in proportion to depth), not only the long-term rate.")
    if not single:
        out.append(f"Noise rule: a change smaller than k·sqrt(sigma_old² + sigma_new²) = {ropt.k_sigma:g} × "
                   f"sqrt({lr.sigma_old:.3f}² + {lr.sigma_new:.3f}²) = {lr.growth_sigma:.3f} mm is not growth; "
                   "thicker-than-before cells beyond it are reported as repaired or misaligned and excluded from "
                   "rates.")
    out.append("One inspection: long-term rates only (loss ÷ years in service)." if single else
               "Governing rate per cell and side: the greater of the short-term and long-term rates "
               "(from memory: API 570 practice).")
    if new.meta.threshold:
        out.append(f"Loss shallower than the detection threshold ({new.meta.threshold:.2f} mm) reads as nominal: "
                   "it is treated as unknown (censored), not zero; the extreme-value fits take such blocks as "
                   "left-censored.")
    return out


def _indications(found, new, old, reg, lr, zmap, labels, *, old_on_new=None, repairs=None):
    """The indication list: the newer scan's regions (``found``) with the governing rate's
    maximum per region, matched with the older scan's indications; and the older regions
    no newer one matches (``gone``, also listed, so the inspector sees what went away)."""
    ind = found.copy()
    if len(ind):
        ind["rate_max_mm_y"] = region_max(labels, np.fmax(lr.rate_top, lr.rate_under))
    if old is None:
        return ind, None
    old_ind, old_labels = old_indications(old, new, reg.transform, reporting_depth_mm=reporting_depth(new),
                                          zone_labels=zmap.labels, zone_names=zmap.names)
    ind = match_indications(ind, old_ind, labels, old_labels, growth_sigma_mm=lr.growth_sigma, dt_years=lr.dt_years)
    # repaired since the older scan (with the date of a dated repair record) and partly
    # unscanned (to prove up); then the rate assumed where none was measured
    dated = [(attribution.shape_mask(r.shape, new), r.date) for r in (repairs or []) if r.date > old.meta.inspected]
    ind = flag_indications(ind, labels, covered_new=np.isfinite(new.thickness),
                           covered_old=np.isfinite(old_on_new.thickness), dt_years=lr.dt_years,
                           floor=zmap.labels >= 0, repaired=lr.repaired, repair_dates=dated or None,
                           inspected=new.meta.inspected)
    ind[["rate_assumed_mm_y", "rate_basis"]] = new_indication_rates(ind, dt_years=lr.dt_years)
    gone = gone_indications(old_ind, ind)
    if len(gone):
        g = gone.copy()
        g["old_id"] = g["id"]
        g["depth_old_mm"] = g["depth_max_mm"]
        g["id"] = pd.NA
        for c in ("depth_max_mm", "t_min_mm", "rate_max_mm_y", "growth_mm", "growth_rate_mm_y"):
            g[c] = np.nan
        g = g[[c for c in ind.columns if c in g.columns]]
        ind = pd.concat([ind, g], ignore_index=True)
    return ind, gone
