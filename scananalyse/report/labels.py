"""Plain words for the names the tool writes: column labels, flags, limiting bounds.

The CSV files and ``results.h5`` keep the column names (``interval_recommended_y``,
``rtbc_mm``, ``eva_T`` …); the page shows people a plain label with its display unit.
``docs/glossary.md`` lists the same mapping for readers of the files.

* :data:`LABELS` — column name → plain label (without the unit: the unit comes from
  the name's SI suffix, :func:`scananalyse.report.units.display_column`, so it follows
  the display units).
* :data:`FLAGS_EXPLAINED` — every flag word the tool can write (zones, spot readings and
  patch plates) → one sentence.
* :data:`LIMITING_WORDS` — the ``limiting`` column's words → what they mean;
  :data:`LIMITING_SHORT` — the same, short, for table cells.
* :data:`FLEET_FLAGS_EXPLAINED`, :data:`FLEET_LIMITING_WORDS`, :data:`FLEET_LIMITING_SHORT` —
  the flags and the limit word only a fleet run writes (``fleet.csv``), for the fleet page
  beside the ones above.
"""

from __future__ import annotations

from . import units as U

__all__ = ["LABELS", "FLAGS_EXPLAINED", "LIMITING_WORDS", "LIMITING_SHORT", "FLEET_FLAGS_EXPLAINED",
           "FLEET_LIMITING_WORDS", "FLEET_LIMITING_SHORT", "label", "label_with_unit"]

#: Column (or key) name → plain label, no unit.
LABELS = {
    # zones.csv / zones_repaired.csv
    "zone": "Zone",
    "kind": "Kind of zone",
    "area_m2": "Area",
    "coverage_pct": "Scanned share",
    "n_scanned": "Cells scanned",
    "t_min_mm": "Thinnest reading",
    "depth_max_mm": "Deepest loss measured",
    "depth_eva_mm": "Deepest loss of the zone (the greater of the deepest observed and the median predicted where nobody scanned)",
    "depth_eva_upper_mm": "Upper bound of the zone's deepest loss (the greater of the observed and the 95 % predictive bound)",
    "depth_hidden_p50_mm": "Deepest loss predicted where nobody scanned: median",
    "depth_hidden_p95_mm": "Deepest loss predicted where nobody scanned: 95 % upper bound",
    "hidden_area_m2": "Area of the zone neither scan saw",
    "eva_source": "Whose extreme-value fit the unscanned part uses",
    "depth_pred_upper_mm": "Predictive upper bound of the deepest loss",
    "depth_eva_life_mm": "Deepest loss used for the extreme-value life",
    "rate_top_max_mm_y": "Fastest top-side rate",
    "rate_under_max_mm_y": "Fastest underside rate",
    "mrt_mm": "Minimum remaining thickness (MRT)",
    "interval_code_y": "Interval by the code formula",
    "life_local_y": "Life from each spot's own rates",
    "life_eva_y": "Extreme-value life",
    "life_eva_depth_rate_y": "Extreme-value life from deepest pit and fastest rate",
    "interval_recommended_y": "Recommended interval",
    "life_p05_y": "Life to MRT, 5th percentile",
    "life_p50_y": "Life to MRT, median",
    "life_p95_y": "Life to MRT, 95th percentile",
    "p_mrt_at_due": "Probability some point is below MRT at the due date",
    "p_leak_at_due": "Probability of a through-wall pit at the due date",
    "interval_after_repair_y": "Interval after the proposed repairs",
    "interval_cap_y": "Longest interval allowed (cap)",
    "cap_y": "Longest interval allowed (cap)",
    "initial_interval_y": "Initial interval (no rates known)",
    "next_due": "Next inspection due",
    "limiting": "Limited by",
    "flags": "Flags",
    "notes": "Notes",
    "rtbc_mm": "Thinnest underside reading (RTbc)",
    "rtip_mm": "Thinnest top-side reading (RTip)",
    "t_used_upr_mm": "Thickness used for the underside rate (UPr)",
    "stpr_mm_y": "Top-side rate of the code formula (StPr)",
    "upr_mm_y": "Underside rate of the code formula (UPr)",
    "rate_eva_mm_y": "Rate used for the extreme-value life",
    "rate_eva_upper_mm_y": "Upper bound of the extreme rate",
    "rate_eva_source": "Where that rate comes from",
    "eva_method": "Extreme-value fit",
    "eva_T": "Return period T (zone area ÷ block area)",
    "eva_block_mm": "Block side for the extreme values",
    "eva_n_blocks": "Blocks fitted",
    "eva_n_censored": "Blocks below the detection threshold",
    "eva_gev_p": "p-value of the Gumbel-against-GEV test",
    "eva_reason": "Why no fit",
    "life_eva_method": "Extreme-value life method",
    "life_eva_reason": "Why no extreme-value life",
    "gumbel_loc_mm": "Gumbel location",
    "gumbel_scale_mm": "Gumbel scale",
    # patches.csv
    "patch": "Patch",
    "x_min_mm": "x from",
    "y_min_mm": "y from",
    "x_max_mm": "x to",
    "y_max_mm": "y to",
    "corner_radius_mm": "Corner radius",
    "thickness_mm": "Plate thickness",
    "mass_kg": "Mass",
    "n_cells_covered": "Cells covered",
    "note": "Note",
    # indications.csv
    "id": "No.",
    "x_mm": "x",
    "y_mm": "y",
    "x_deep_mm": "x of deepest point",
    "y_deep_mm": "y of deepest point",
    "n_cells": "Cells",
    "side": "Side",
    "plate": "Plate",
    "rate_max_mm_y": "Fastest rate",
    "status": "Status",
    "old_id": "No. in older scan",
    "depth_old_mm": "Depth in older scan",
    "growth_mm": "Growth",
    "growth_rate_mm_y": "Growth rate",
    # registration.json
    "method": "Method",
    "dx_mm": "Shift in x",
    "dy_mm": "Shift in y",
    "rotation_deg": "Rotation (counter-clockwise)",
    "score": "Match score (0 to 1)",
    "overlap_pct": "Overlap of the two scans",
    "residual_rms_mm": "Misfit after alignment (RMS)",
    "reliable": "Reliable",
    "warnings": "Warnings",
    "n_control_points": "Control points",
    "std_rotation_deg": "Uncertainty of the rotation (1 σ)",
    "std_shift_mm": "Uncertainty of the shift (1 σ)",
    "control_rms_mm": "Misfit at the control points (RMS)",
    "convention": "Convention",
    "point": "Point",
    "residual_mm": "Misfit",
    # sizing check of the scan against the prove-ups (report, Field readings)
    "n_pairs": "Prove-ups paired with a scanned cell",
    "bias_mm": "Mean difference of loss, scan − prove-up",
    "scatter_mm": "Scatter of that difference (1 σ)",
    "k": "Ratio of prove-up loss to scan loss (k)",
    "k_se": "Standard error of k",
    "undersized": "Scan under-sizes beyond the scatter",
    "corrected": "Unproved loss corrected",
    # inspections and tank
    "label": "Inspection",
    "date": "Date",
    "file": "File",
    "pitch_mm": "Cell size",
    "threshold_mm": "Detection threshold",
    "sigma_mm": "Reading noise (1 σ)",
    "name": "Tank",
    "tank": "Tank",
    "diameter_mm": "Diameter",
    "nominal_mm": "Nominal plate thickness",
    "installed": "Installed",
}

#: Every flag the tool can write (zones.csv and patches.csv) → one sentence.
FLAGS_EXPLAINED = {
    # zones
    "no-data": "No cell of the zone was scanned: nothing can be said from the scan; "
               "prove it up by hand UT.",
    "below-mrt": "The zone's thinnest reported cell is already below its MRT: repair before "
                 "return to service.",
    "critical-zone-below-min": "The critical zone (within the rule set's width of the shell) "
                               "is below its minimum.",
    "code-exceeds-local": "The code-formula interval is longer than the projection from the "
                          "measured rates at the same cells: the formula overstates what the "
                          "metal supports here.",
    "code-exceeds-eva": "The code-formula interval is longer than the extreme-value life, which "
                        "allows for the deepest pit expected in the unscanned and "
                        "below-threshold parts of the zone.",
    "low-coverage": "Less of the zone was scanned than the rule set's minimum coverage; the "
                    "extreme-value estimate carries more weight and more uncertainty.",
    "target-not-reached": "The recommended interval is shorter than the target interval.",
    "no-short-term-rates": "Only one inspection: rates are long-term (loss ÷ years in "
                           "service); a pit that began late grows faster than that.",
    "no-age": "The scan gives no installation date: age-based rates and the code formula "
              "cannot be computed.",
    "no-eva": "No extreme-value estimate could be made for the zone (too few blocks).",
    "eva-fallback": "Without extreme-value statistics, metal read below the detection threshold is "
                    "taken to be as deep as the threshold, growing at the largest upper-end rate "
                    "of those cells.",
    "eva-borrowed": "The zone is too small for an extreme-value fit of its own: its unscanned part is "
                    "judged with the whole floor's fit, extrapolated to the zone's own unscanned area.",
    "eva-worst-seen": "No extreme-value fit could be made anywhere on the floor: the unscanned metal is taken "
                      "to be as deep as the deepest loss seen and to grow at the fastest measured rate.",
    "eva-rate-assumed": "The extreme-value life uses the zone's fastest measured rates, not a "
                        "fitted rate extreme.",
    "eva-below-mrt": "The extreme-value estimate says the unscanned or below-threshold part of "
                     "the zone may already be below MRT, even where no scanned cell is: "
                     "prove up the unscanned areas by hand UT.",
    "initial-interval": "No corrosion rates are known: the initial-interval rules apply.",
    "no-mfl-threshold": "The MFL scan gives no detection threshold: the code formula's "
                        "underside rate cannot use the threshold rule.",
    # spot readings
    "readings-only": "No cell of the zone was scanned; its thinnest value, code interval and co-located life come "
                     "from spot readings (hand UT, pit gauge) alone.",
    "points-only": "The readings are points: the floor between them is unseen and is judged with the whole floor's "
                   "extreme-value law over the zone's area; the recommended interval is the least of the readings' "
                   "code interval, their co-located life, that extreme-value life and the cap.",
    "readings-govern": "Spot readings where the scan has no value are thinner, or their metal shorter-lived, than "
                       "anything the scan read in the zone: they lowered its thinnest value, code interval or "
                       "co-located life, and so its recommended interval.",
    # patch plates
    "critical-zone-special-repair": "A patch touches the critical zone: only special shapes or "
                                    "plate replacement are allowed there.",
    "critical-zone-thickness": "A patch in the critical zone is thicker than the rule set "
                               "allows there.",
    "weld-clearance": "The patch's edge runs closer to a plate seam than the rule set's weld "
                      "clearance.",
    "too-small": "The patch is smaller than the rule set's minimum patch size.",
    "too-close": "An edge of the patch runs parallel to, and closer than the weld clearance "
                 "to, an edge of another patch.",
    "overlaps-without-min-size": "The patch overlaps another patch or a plate seam but is "
                                 "smaller than the rule set's minimum size for that.",
    "not-beyond-corrosion": "The patch does not extend far enough beyond the corroded area.",
    "probability-above-target": "Even at once (interval 0) the probability that some point of the zone is "
                                "already below MRT is above the target probability: prove up by hand UT or "
                                "repair before return to service.",
    "shell-clearance": "The patch's weld lies closer to the inside of the shell than the rule set's "
                       "lap-joint clearance (600 mm, API 650 §5.5.2): replace or insert plate there instead.",
}

#: The ``limiting`` column's words → the bound they name, in plain words.
LIMITING_WORDS = {
    "code": "the code formula",
    "local": "the projection from each spot's own measured rates",
    "eva": "the extreme-value life (the deepest pit expected where nobody scanned)",
    "initial": "the initial-interval rule (no rates known)",
    "cap": "the longest interval the rules allow",
    "probability": "the target probability of falling below MRT (--target-probability)",
    "": "nothing (no interval could be set)",
    "none": "nothing (no interval could be set)",
}

#: The ``limiting`` column's words → a short form for table cells.
LIMITING_SHORT = {
    "code": "code formula",
    "local": "local rates",
    "eva": "extreme values",
    "initial": "initial rule",
    "cap": "cap",
    "probability": "target probability",
    "none": "–",
}

#: Limits and flags only a fleet run writes (the similar-service step, the scan-name
#: check) → words, for the fleet page beside the ones above.
FLEET_LIMITING_WORDS = {
    "similar-service": "the similar-service rate: an upper quantile of the measured rates of the "
                       "group's two-inspection tanks, lent to a tank with one inspection",
}
FLEET_LIMITING_SHORT = {"similar-service": "similar service"}
FLEET_FLAGS_EXPLAINED = {
    "similar-service": "The tank has one inspection; the similar-service rate of its group shortened "
                       "its interval below the one from its own long-term rates.",
    "scan-names-other-tank": "A scan file of this tank states another tank's name: the manifest row "
                             "may point at the wrong files; check them before using the results.",
}


def label(name: str) -> str:
    """Plain label of a column name (without unit); unknown names lose their unit
    suffix and underscores (``foo_bar_mm`` → ``foo bar``)."""
    name = str(name)
    if name in LABELS:
        return LABELS[name]
    if name.endswith("_s"):  # run timings: stage_s
        return name[:-2].replace("_", " ")
    base = U.display_column(name, "mm")[0]
    return base.replace("_", " ")


def label_with_unit(name: str, units: str = "mm") -> tuple[str, str]:
    """(plain label, display unit text or "") of a column name."""
    return label(name), U.display_column(str(name), units)[1]
