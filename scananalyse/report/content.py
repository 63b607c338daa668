"""The report's words: what each result asks of the inspector, the flags explained, the
assumptions, and the :class:`~scananalyse.report.html.ReportData` of an analysis."""

from __future__ import annotations

import datetime as _dt
import math
import os

import numpy as np
import pandas as pd

from ..evlife import LIFE_LEVEL
from ..extremes import GEV_ALPHA, MIN_BLOCK_MM
from ..indications import reporting_depth
from . import labels
from . import units as U
from .html import ReportData

__all__ = ["FLAGS_EXPLAINED", "actions", "report_data"]

#: One sentence per word of the `flags` column of zones.csv (one list, in report/labels.py).
FLAGS_EXPLAINED = labels.FLAGS_EXPLAINED


def actions(an, units: str = "mm") -> list[str]:
    """Plain sentences on what each zone's result asks of the inspector and the engineer,
    their numbers in the display ``units`` (``"mm"`` or ``"in"``)."""
    def q(value, quantity):
        return U.with_unit(value, quantity, units)

    out = []
    found = an.zone_table.set_index("zone")
    rep = an.zones_repaired.set_index("zone") if an.zones_repaired is not None else None
    for zone, z in found.iterrows():
        flags = set(str(z["flags"]).split(";")) if isinstance(z["flags"], str) else set()
        if "no-data" in flags:
            out.append(f"Zone {zone} was not scanned: scan it (by hand or with an edge scanner) before setting its "
                       "interval; hand UT spots alone leave the floor between them to the whole floor's pit statistics.")
            continue
        if "readings-only" in flags:
            out.append(f"Zone {zone} was not scanned; {int(z.get('n_readings', 0))} spot readings give its metal at "
                       "their spots only: the floor between them is unseen and is judged with the whole floor's pit "
                       "statistics over the zone's area. Scan the zone to replace that prediction with measurements.")
        if "below-mrt" in flags:
            out.append(f"Zone {zone} is below MRT now (thinnest {q(z['t_min_mm'], 'thickness')} against "
                       f"{q(z['mrt_mm'], 'thickness')}): repair before return to service.")
        if "code-exceeds-local" in flags:
            out.append(f"In zone {zone} the code formula gives {z['interval_code_y']:.1f} y but the co-located "
                       f"projection from the measured rates only {z['life_local_y']:.1f} y: the formula overstates what "
                       "the metal supports; the recommendation follows the metal.")
        if rep is not None and zone in rep.index:
            r = rep.loc[zone]
            if "does not cover it" in str(r.get("notes", "")):  # a hand reading below MRT off the scan
                out.append(f"After the proposed repairs zone {zone} is still below MRT at a spot reading where the "
                           f"scan has no value (thinnest {q(r['t_min_mm'], 'thickness')} against "
                           f"{q(r['mrt_mm'], 'thickness')}): the patch plan is made from the scan and does not cover "
                           "that spot; repair it too, and scan around it.")
            if isinstance(r["limiting"], str) and r["limiting"] == "eva" and np.isfinite(r["interval_recommended_y"]):
                hidden = r.get("hidden_area_m2", np.nan)
                if not np.isfinite(hidden):
                    hidden = max(0.0, float(r["area_m2"]) * (1 - float(r["coverage_pct"]) / 100))
                rflags = set(str(r["flags"]).split(";")) if isinstance(r["flags"], str) else set()
                if "eva-below-mrt" in rflags or float(r["interval_recommended_y"]) == 0.0:
                    out.append(f"Zone {zone}: the {q(hidden, 'area')} nobody scanned may already hold metal below "
                               f"MRT (deepest loss expected there up to {q(r['depth_hidden_p95_mm'], 'depth')}, 95 % "
                               "bound): prove up the unscanned area (scan it by hand or with an edge scanner) before "
                               "return to service; repairs of scanned metal do not change this. Spot readings "
                               "(--readings) assess their own spots only: the prediction for the area stands until "
                               "the area is scanned.")
                else:
                    out.append(f"After repair, zone {zone} is limited by the extreme-value life ({r['life_eva_y']:.1f} y): "
                               f"the {q(hidden, 'area')} nobody scanned may hide deeper pits; scanning that area can "
                               "lengthen the interval (spot readings assess their own spots only).")
    return out


def report_data(an, units: str, registration_dict, figs) -> ReportData:
    """Everything the report page shows of an analysis.

    Parameters
    ----------
    an : :class:`~scananalyse.pipeline.Analysis`
    units : display units, ``"mm"`` or ``"in"``.
    registration_dict : dict or None
        ``Registration.to_dict()`` (two inspections).
    figs : list of ``(section, caption, png bytes)``
        The drawn figures in the report's order.

    Returns
    -------
    ReportData
        For :func:`~scananalyse.report.html.write_report`.
    """

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
                       f"{reporting_depth(an.new):.2f} mm (the detection threshold, or 10 % of nominal without one).")
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
    notes = actions(an, units) + [U.text_in_units(n, units) for n in an.notes]
    if att and att.get("cells_with_loss"):
        notes.append(
            f"Attribution: of {att['cells_with_loss']} cells with reported loss, {att['cells_top']} were attributed "
            f"to the top side and {att['cells_under']} to the underside by the operator"
            + (f", {att['cells_top_depth']} have a measured top-side depth" if att.get("cells_top_depth") else "")
            + f"; {att['cells_defaulted']} ({att['defaulted_pct']:.0f} %) were not attributed and count as "
            f"{'underside' if att['default_side'] == 'under' else 'top-side'} loss (the default).")
    if an.patch_note:
        notes.append(U.text_in_units(an.patch_note, units))
    if an.uncovered_cells:
        notes.append(f"{an.uncovered_cells} cells needing repair for the target interval are not covered by any patch.")
    rdg = _readings_data(an, units)
    if rdg:
        assumptions.extend(rdg.pop("assumptions"))
        rdg["sizing_text"] = U.text_in_units(rdg["sizing_text"], units)
        rdg["zones"], rdg["prove_up"] = (_texts_in_units(rdg[k], units) for k in ("zones", "prove_up"))
    diameter = U.diameter_text(an.zones.geometry.diameter_mm, an.job.typed.get("diameter"), units)
    return ReportData(
        readings=rdg or None,
        tank={"name": an.new.meta.tank, "diameter_mm": diameter},
        inspections=inspections, zones=_texts_in_units(an.zone_table, units),
        zones_repaired=_texts_in_units(an.zones_repaired, units),
        patches=_texts_in_units(an.patches, units), indications=_texts_in_units(an.indications, units),
        registration=None if registration_dict is None else _registration_shown(registration_dict, units),
        rules_table=_rules_shown(an.rules.table(), units),
        assumptions=[U.text_in_units(a, units) for a in assumptions],
        figures=fig_dict, extremes={z: _texts_in_units(row, units) for z, row in ext.items()},
        flags_explained=_texts_in_units(FLAGS_EXPLAINED, units), units=units,
        timings=dict(an.timings),
        generated=_dt.datetime.now().replace(microsecond=0), single_inspection=an.single, notes=notes)


#: The registration.json keys the page shows.
_REGISTRATION_SHOWN = ("method", "rotation_deg", "dx_mm", "dy_mm", "score", "overlap_pct", "residual_rms_mm",
                       "reliable", "warnings", "std_rotation_deg", "std_shift_mm", "control_residuals_mm",
                       "control_rms_mm", "convention")


def _registration_shown(reg: dict, units: str) -> dict:
    """The registration keys the page shows, its warnings' numbers in display units."""
    out = {k: reg.get(k) for k in _REGISTRATION_SHOWN}
    if isinstance(out.get("warnings"), (list, tuple)):
        out["warnings"] = [U.text_in_units(w, units) for w in out["warnings"]]
    return out


def _rules_shown(rows: list, units: str) -> list:
    """The rule table's rows with each value and its unit in display units; the notes are
    left as written (they quote the sources, which give their own inch or metric values)."""
    out = []
    for row in rows:
        value, unit = U.rule_value(row.get("value"), row.get("unit", ""), units)
        out.append({**row, "value": value, "unit": unit})
    return out


def _texts_in_units(table, units: str):
    """A copy of a table (DataFrame or mapping) whose sentences (notes, why no fit, …) have
    their SI numbers in display units (:func:`~scananalyse.report.units.text_in_units`);
    numbers stay SI (the page converts them by column), the analysis's own table untouched."""
    if table is None or units == "mm":
        return table
    if isinstance(table, dict):
        return {k: U.text_in_units(v, units) for k, v in table.items()}
    out = table.copy()
    for c in out.columns:
        if out[c].dtype == object or pd.api.types.is_string_dtype(out[c]):
            out[c] = out[c].map(lambda v: U.text_in_units(v, units), na_action="ignore")
    return out


def _readings_data(an, units: str) -> dict:
    """The "Field readings" section's data, empty without readings."""
    r = getattr(an, "readings", None)
    if not r:
        return {}
    c = r["check"]
    if r["corrected"]:
        text = (f"The scan under-sizes loss (k = {c.k:.3f} ± {c.k_se:.3f} from {c.n_pairs} prove-ups): the loss of "
                "every unproved scanned cell was multiplied by k before the assessment.")
    elif c.undersized:
        text = (f"The scan under-sizes loss (k = {c.k:.3f} ± {c.k_se:.3f} from {c.n_pairs} prove-ups), but the "
                "sizing correction is off (--no-sizing-correction): NOT corrected; the scan's loss depths may be too "
                "shallow.")
    else:
        text = f"{c.note[:1].upper() + c.note[1:]}: the scan's loss depths are used as sized."
    sizing = {"n_pairs": c.n_pairs, "bias_mm": c.bias_mm, "scatter_mm": c.scatter_mm, "k": c.k, "k_se": c.k_se,
              "undersized": "yes" if c.undersized else "no", "corrected": "yes" if r["corrected"] else "no"}
    old = r.get("old")
    return {"sizing": sizing, "sizing_text": text, "zones": r["zones"], "prove_up": r["prove_up"],
            "assumptions": [f"Spot readings: {len(r['new'])} of {r['new'].inspected}"
                            + (f" and {len(old)} of {old.inspected}" if old is not None else "")
                            + "; each file goes to the inspection whose date is nearest its 'inspected' date "
                            "(more than a year from every scan is refused)."]}
