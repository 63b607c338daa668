"""The report's figures: what is drawn, with which caption, in which order.

Each figure is a spec ``(section, slug, caption, build)``: ``build()`` draws the matplotlib
Figure from the analysis's arrays (:mod:`scananalyse.report.figures`).  The runner
(:func:`scananalyse.runner.write_outputs`) draws them one after the other, in the
report's order (:func:`figure_specs`), and saves each as ``figures/NN_<file_stem(slug)>.png``.
"""

from __future__ import annotations

from functools import partial

import numpy as np

from ..indications import reporting_depth
from . import figures as F

__all__ = ["figure_specs", "shared_range", "summed_rate", "map_specs", "scan_map_specs", "rate_map_specs",
           "comparison_specs", "growth_map_data", "as_found_specs", "repair_specs",
           "patches_spec", "registration_figure", "return_level_figure", "return_curve", "file_stem"]


def file_stem(slug: str) -> str:
    """The file-name form of a figure's slug: letters and digits kept, the rest ``_``."""
    return "".join(c if c.isalnum() else "_" for c in slug)[:60]


def figure_specs(an, units: str) -> list:
    """Every report figure of an analysis, in the report's order.

    Parameters
    ----------
    an : :class:`~scananalyse.pipeline.Analysis`
    units : display units, ``"mm"`` or ``"in"``.

    Returns
    -------
    list of ``(section, slug, caption, build)``
        ``build()`` draws the Figure.  The groups (:func:`map_specs`,
        :func:`as_found_specs`, :func:`repair_specs`) are put in the report's order.
    """
    specs = (map_specs(an.new, an.rates, an.zones, an.rules, an.options, an.job, units, single=an.single,
                        life=an.life_map, old=an.old, old_on_new=an.old_on_new,
                        indications=getattr(an, "indications", None))
             + comparison_specs(an, units)
             + as_found_specs(an.zone_table, an.extremes_depth, units)
             + repair_specs(an, units))
    if getattr(an, "life_dists", None) and any(d.ok for d in an.life_dists.values()):
        specs.append(("methods", "life_probability", "Probability that some point of each zone is below MRT "
                      "(solid) or holed through (dashed) against years after the newer inspection, with each "
                      "zone's next due date marked: decision support beside the code formula, not a "
                      "replacement (model and calibration: docs/assessment.md). The leak probability is "
                      "benched on small synthetic floors only, where the unscanned metal governs it; in a "
                      "zone the scan covers almost wholly it can be low (the scanned part alone had its "
                      "true leak time below the 5 % point in 23 of 119 bench zones).",
                      partial(life_probability_figure, an.life_dists, an.zone_table)))
    if getattr(an, "readings", None):  # the spot readings as markers on the thickness map
        table = an.readings["new"].table
        specs = [(sec, slug, cap + " Spot readings marked by kind (circle UT, square prove-up, triangle pit gauge).",
                  partial(readings_markers, build, table)) if slug == "thickness" else (sec, slug, cap, build)
                 for sec, slug, cap, build in specs]
    if getattr(an, "readings", None) and an.readings["check"].n_pairs:  # the sizing check against the prove-ups
        rdg = an.readings
        specs.append(("readings", "sizing_check", "Loss sized by the scan against the loss the prove-up UT found "
                      "at the same cells, with the 1:1 line (points above it: the scan under-sizes).",
                      partial(sizing_figure, rdg["pairs"], an.new.meta.nominal, rdg["check"], units=units)))
    return _in_report_order(specs)


#: The report's order of the figures, by slug (prefix); figures of one rank keep their order.
_REPORT_RANK = (("life_local", 1), ("patches", 2), ("registration", 3), ("methods_as_found", 4),
                ("life_probability", 4),
                ("methods_repaired", 5), ("probability_", 6), ("return_level_", 6))


def _in_report_order(specs) -> list:
    def rank(spec):
        return next((r for prefix, r in _REPORT_RANK if spec[1].startswith(prefix)), 0)
    return sorted(specs, key=rank)  # stable: the maps, and each zone's pair, keep their order


def map_common(new, zmap, units) -> dict:
    """The :func:`~scananalyse.report.figures.floor_map` arguments every floor map shares."""
    return dict(extent=new.extent, units=units, diameter_mm=zmap.geometry.diameter_mm,
                centre=zmap.geometry.centre, plate=new.plate, zones=zmap)


def shared_range(*grids):
    """One colour range ``(0, largest finite value)`` for maps that are to be compared
    (top-side and underside loss): (0, None) when no grid has a finite value. [mm]"""
    hi = None
    for g in grids:
        a = np.asarray(g)
        fin = np.isfinite(a)
        if fin.any():
            m = float(a[fin].max())
            hi = m if hi is None else max(hi, m)
    return 0.0, (hi if hi is not None and hi > 0 else None)


def summed_rate(rate_top, rate_under, thickness):
    """Top-side plus underside rate per cell (negative rates as 0) for the one-inspection
    rate map: NaN where the cell was not scanned (thickness NaN, outside the tank
    included) or neither side has a rate, so those cells show as not scanned. [mm/y]"""
    top = np.asarray(rate_top, dtype=np.float32)
    under = np.asarray(rate_under, dtype=np.float32)
    with np.errstate(invalid="ignore"):
        s = np.fmax(top, 0) + np.fmax(under, 0)
    s[np.isnan(top) & np.isnan(under)] = np.nan
    s[~np.isfinite(np.asarray(thickness))] = np.nan
    return s


def map_specs(new, lr, zmap, rules, options, job, units, *, single, life, old=None, old_on_new=None,
              indications=None) -> list:
    """The floor maps, the co-located life and (two inspections) the registration overlay
    (see figure_specs): :func:`scan_map_specs` and :func:`rate_map_specs`."""
    return (scan_map_specs(new, lr, zmap, rules, options, job, units, indications=indications)
            + rate_map_specs(new, lr, zmap, job, units, single=single, life=life, old=old, old_on_new=old_on_new))


def scan_map_specs(new, layers, zmap, rules, options, job, units, *, indications=None) -> list:
    """The maps that need the newer scan only, known once the zones are: thickness with
    the MRT contour (and, given the indication table, the deepest indications ringed and
    numbered), top-side and underside loss (``layers``: ``rates.LossLayers`` or
    ``LossRates``)."""
    from .. import assess
    
    out = []
    mrt_z = assess.zone_mrt(zmap, rules, options, t0=new.meta.nominal)
    areas = np.asarray(zmap.areas_mm2, dtype=float)
    k_main = zmap.names.index("interior") if "interior" in zmap.names else int(np.argmax(areas))
    main_zone = zmap.names[k_main]
    mrt_c = [(float(mrt_z[k_main]), f"MRT ({main_zone})", "--")]
    if job.repair_to_mm:
        mrt_c.append((job.repair_to_mm, "repair-to thickness", ":"))
    common = map_common(new, zmap, units)
    loss_lo, loss_hi = shared_range(layers.loss_top, layers.loss_under)
    out.append(("maps", "thickness", "Remaining thickness at the newer inspection, with the MRT contour.",
                partial(F.floor_map, new.thickness, title="Remaining thickness now", label="remaining thickness",
                        kind="thickness", contours=mrt_c,
                        indications=indications if indications is not None and len(indications) else None,
                        **common)))
    out.append(("maps", "loss_top", "Top-side (product-side) loss, on the same colour scale as the underside "
                "loss so the two can be compared.",
                partial(F.floor_map, layers.loss_top, title="Top-side loss", label="top-side loss", kind="loss",
                        vmin=loss_lo, vmax=loss_hi, **common)))
    out.append(("maps", "loss_under", "Underside (soil-side) loss, unattributed loss included by default; same "
                "colour scale as the top-side loss.",
                partial(F.floor_map, layers.loss_under, title="Underside loss", label="underside loss", kind="loss",
                        vmin=loss_lo, vmax=loss_hi, **common)))
    return out


def rate_map_specs(new, lr, zmap, job, units, *, single, life, old=None, old_on_new=None) -> list:
    """The maps known once the rates are: short-term rates (or the long-term one), the
    co-located life and (two inspections) the registration overlay."""
    out = []
    common = map_common(new, zmap, units)
    if not single:
        out.append(("maps", "rate_short_top", "Short-term top-side rate (change between the inspections ÷ years between them).",
                    partial(F.floor_map, lr.rate_short_top, title="Short-term top-side rate", label="top-side rate",
                            kind="rate", **common)))
        out.append(("maps", "rate_short_under", "Short-term underside rate.",
                    partial(F.floor_map, lr.rate_short_under, title="Short-term underside rate", label="underside rate",
                            kind="rate", **common)))
    else:
        out.append(("maps", "rate_long", "Long-term governing rate (both sides summed), one inspection only.",
                    partial(F.floor_map, summed_rate(lr.rate_top, lr.rate_under, new.thickness), title="Long-term rate",
                            label="rate, both sides", kind="rate", **common)))
    out.append(("maps", "life_local", "Co-located remaining life: (t − MRT) ÷ (top rate + underside rate) per cell; "
                "contour at the target interval.",
                partial(F.floor_map, life, title="Remaining life per cell", label="remaining life", kind="life",
                        contours=[(job.target_interval, "target interval", "--")],
                        **common)))
    if old is not None and old_on_new is not None:
        out.append(("registration", "registration", "Features of the two scans (unscanned seams and margins, loss above the "
                    "reporting depth): newer scan against the older one before (left) and after (right) alignment.",
                    partial(registration_figure, new, old, old_on_new, units=units)))
    return out


def growth_map_data(old_on_new_thickness, new_thickness) -> np.ndarray:
    """Change of thickness between the inspections on the newer grid: the older scan
    resampled onto the newer grid minus the newer scan (positive = metal lost), NaN
    where either inspection did not scan the cell. [mm]"""
    with np.errstate(invalid="ignore"):
        return (np.asarray(old_on_new_thickness, dtype=np.float32)
                - np.asarray(new_thickness, dtype=np.float32))


def comparison_specs(an, units: str) -> list:
    """The figures an inspector compares two outages with (two inspections only; none for
    one): the growth map with its noise band, the two scans side by side on the newer grid
    and one colour scale, the repair record with its dates (when the job has one) in the
    maps section, and the indications by status in the indications section."""
    if getattr(an, "old", None) is None or getattr(an, "old_on_new", None) is None:
        return []
    from ..rates import growth_threshold
    from . import units as U

    new, old, lr = an.new, an.old, an.rates
    common = map_common(new, an.zones, units)
    d_new, d_old = new.meta.inspected, old.meta.inspected
    out = []
    k = float(getattr(lr, "k_sigma", 2.0))
    s_old, s_new = float(lr.sigma_old), float(lr.sigma_new)
    g = growth_threshold(s_old, s_new, k=k)
    unit = U.unit_label("depth", units)
    nd = U.decimals("depth", units)
    g_txt = f"{U.convert(g, 'depth', units):.{nd}f} {unit}"
    sig_txt = "; ".join(f"σ {w} {U.convert(s, 'depth', units):.{nd + 1}f} {unit}"
                        for w, s in (("older", s_old), ("newer", s_new)))
    growth = growth_map_data(an.old_on_new.thickness, new.thickness)
    out.append(("maps", "growth", f"Change of thickness between the inspections ({d_old} to {d_new}) on the newer "
                "grid: the older scan resampled onto the newer grid minus the newer scan, so red is metal lost and "
                "blue is thicker now (a repair, or sizing). The hatched band on the colour bar is the noise level, "
                f"±{g_txt} = k·√(σ_old² + σ_new²) with k = {k:g} ({sig_txt}): a change inside it is not growth. "
                "Grey cells were not scanned in one of the inspections.",
                partial(F.floor_map, growth, title="Change of thickness between the inspections",
                        label="older − newer thickness (+ = metal lost)", kind="growth", noise_band=g, **common)))
    out.append(("maps", "scans_side_by_side", f"The older scan ({d_old}) resampled onto the newer grid (left) and "
                f"the newer scan ({d_new}) (right), on one colour scale; grey cells were not scanned in that "
                "inspection.",
                partial(F.floor_map_pair, an.old_on_new.thickness, new.thickness,
                        titles=(f"Older scan ({d_old}) on the newer grid", f"Newer scan ({d_new})"),
                        label="remaining thickness", kind="thickness", **common)))
    repairs = list(getattr(an, "repairs", None) or [])
    if repairs:
        out.append(("maps", "repair_record", f"The operator's repair record ({len(repairs)} "
                    f"area{'s' if len(repairs) != 1 else ''}) on the newer thickness map, each area numbered and "
                    "dated; solid: repaired between the inspections, dashed: before the older one.",
                    partial(F.repair_record_map, new.thickness, repairs, older_date=d_old,
                            title="Repair record on the thickness map now", **common)))
    ind = getattr(an, "indications", None)
    if ind is not None and "status" in getattr(ind, "columns", ()):
        out.append(("maps", "indication_status", "Indications by status on the floor: new (no older "
                    "indication there), grown (growth above the noise level), stable, repaired (mostly inside an "
                    "area repaired since the older inspection), partly unscanned (to prove up: part may lie in "
                    "unscanned ground) and not found (an older indication with no newer one, at its older place); "
                    "box: the indication's extent, marker at its centre, with its id when there are at most 60.",
                    partial(F.indication_status_map, ind, scanned=np.isfinite(new.thickness),
                            extent=new.extent, units=units, diameter_mm=an.zones.geometry.diameter_mm,
                            centre=an.zones.geometry.centre, plate=new.plate, zones=an.zones,
                            title="Indications by status")))
    return out


def as_found_specs(zone_table, extremes_depth, units) -> list:
    """The figures of the as-found results: the methods per zone, and each zone's
    extreme-value probability and return-level plots (see figure_specs)."""
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
                        partial(return_level_figure, z, name, units)))
    return out


def repair_specs(an, units: str) -> list:
    """The figures of the proposed repairs: the patch plates and the methods per zone after
    them (see figure_specs)."""
    return [patches_spec(an.new, an.patches, an.zones, units),
            ("methods", "methods_repaired", "After the proposed repairs: the same per zone.",
             partial(F.method_comparison, an.zones_repaired))]


def patches_spec(new, patches, zmap, units):
    """The patch-plate map (known as soon as the patches are, before the re-assessment)."""
    return ("maps", "patches", "The proposed patch plates on the thickness map (cells that would fall below "
            "MRT before the target interval at their own rates lie inside them).",
            partial(F.floor_map, new.thickness, title="Repairs: patch plates on the thickness map",
                    label="remaining thickness", kind="thickness",
                    patches=patches if len(patches) else None, indications=None,
                    **map_common(new, zmap, units)))


def registration_figure(new, old, old_on_new, *, units="mm"):
    """The registration overlay: the scans' features (unscanned cells, loss at or above the
    reporting depth) of the newer scan against the older one before and after alignment
    (:func:`~scananalyse.report.figures.registration_overlay`)."""
    from ..register import RigidTransform, resample_layer

    depth = reporting_depth(new)

    def features(t, nominal):
        # unscanned, or loss (nominal - t) at or above the reporting depth: boolean
        # comparisons only (NaN compares False), no float copies of the grid
        with np.errstate(invalid="ignore"):
            return ~np.isfinite(t) | (t <= np.float32(nominal - depth))

    feat_new = features(new.thickness, new.meta.nominal)
    # before alignment: the older scan's features on its own grid, placed by its raw
    # coordinates (nearest cell; a display aid, so no interpolation is needed)
    feat_before = resample_layer(features(old.thickness, old.meta.nominal), old, new, RigidTransform(), fill=True)
    feat_after = features(old_on_new.thickness, new.meta.nominal)
    return F.registration_overlay(feat_new, feat_before, feat_after, extent=new.extent, units=units)


#: Marker of each reading kind on the maps.
READING_MARKERS = {"ut": ("o", "UT"), "prove-up": ("s", "prove-up"), "pit-gauge": ("^", "pit gauge")}


def readings_markers(build, table):
    """A floor map (``build()``) with the spot readings of ``table`` (readings table,
    x_mm, y_mm, kind) drawn on its first axes as markers, one shape per kind."""
    fig = build()
    ax = fig.axes[0]
    for kind, (marker, name) in READING_MARKERS.items():
        sel = (table["kind"] == kind).to_numpy()
        if sel.any():
            ax.scatter(table["x_mm"].to_numpy(float)[sel] / 1000.0, table["y_mm"].to_numpy(float)[sel] / 1000.0,
                       marker=marker, s=26, facecolors="white", edgecolors="black", linewidths=0.9, zorder=6,
                       label=f"{name} ({int(sel.sum())})")
    ax.legend(loc="upper left", fontsize=7, framealpha=0.85, title="readings", title_fontsize=7)
    return fig


def sizing_figure(pairs, nominal_mm: float, check=None, *, ax=None, units: str = "mm"):
    """Scan loss against prove-up UT loss at the same cells, with the 1:1 line.

    Parameters
    ----------
    pairs : :func:`~scananalyse.readings.pair_readings` output (its prove-ups on scanned
        cells are drawn).
    nominal_mm : nominal plate thickness t0. [mm]
    check : :class:`~scananalyse.readings.SizingCheck`, or None; its ratio k is drawn
        as a line through the origin.
    ax : matplotlib Axes to draw on, or None for a new figure.
    units : display units, ``"mm"`` or ``"in"``.

    Returns
    -------
    matplotlib Figure
    """
    from . import units as U

    # 4.4 in tall: printed under the report's 115 mm cap for figures, so never shrunk
    fig, ax = F._new_axes(ax, (5.2, 4.4))
    sel = (pairs["kind"] == "prove-up") & pairs["scanned"].astype(bool)
    m = U.convert(float(nominal_mm) - pairs.loc[sel, "t_scan_mm"].to_numpy(float), "depth", units)
    u = U.convert(float(nominal_mm) - pairs.loc[sel, "thickness_mm"].to_numpy(float), "depth", units)
    top = max(float(np.nanmax(np.r_[m, u, 0.0])) * 1.1, U.convert(1.0, "depth", units))
    ax.plot([0, top], [0, top], "k--", lw=1, label="1:1 (sized right)")
    if check is not None and np.isfinite(check.k):
        ax.plot([0, top], [0, check.k * top], color="#b03a2e", lw=1.2, label=f"fitted ratio k = {check.k:.2f}")
    ax.scatter(m, u, s=28, color="#2f6f9f", zorder=3, label=f"prove-ups ({int(sel.sum())})")
    unit = U.unit_label("depth", units)  # loss: mm, or mils
    ax.set_xlabel(f"loss sized by the scan [{unit}]")
    ax.set_ylabel(f"loss found by prove-up UT [{unit}]")
    ax.set_xlim(0, top)
    ax.set_ylim(0, top)
    ax.set_aspect("equal")
    ax.set_title("Sizing check")
    ax.legend(loc="upper left", fontsize=8)
    return fig


def return_level_figure(z, name, units):
    """The return-level plot of one zone's depth statistics ``z``."""
    T_line, lvl, lower, upper, T_bound = return_curve(z)
    return F.return_level_plot(T_line, lvl, lower, upper, bound_T=T_bound, zone_T=z.T, units=units,
                               bound_label=f"{100 * z.level:.0f} % upper bound", title=f"Return level, zone {name}")


def return_curve(z):
    """The return-level curve of one zone's depth statistics, for the plot.

    Parameters
    ----------
    z : :class:`~scananalyse.extremes.ZoneExtremes`

    Returns
    -------
    tuple or None
        ``(T_line, level, None, upper, T_bound)``: the return level
        (:func:`~scananalyse.extremes.return_level`) on 60 periods [blocks] and its
        one-sided profile-likelihood upper bound at a few periods and the zone's T
        (Coles 2001 §3.3); None without a fit. [mm]
    """
    from ..errors import FitError
    from ..extremes import return_level, return_level_bounds

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


def life_probability_figure(dists: dict, zone_table, *, ax=None):
    """Each zone's P(below MRT by t) and P(leak by t), its next due date marked (years and
    probabilities only: the same in every display unit)."""
    fig, ax = F._new_axes(ax, (6.0, 3.6))  # prints full width: legend >= 7 pt
    due = dict(zip(zone_table["zone"], zone_table["interval_recommended_y"]))
    years = np.linspace(0.0, 30.0, 241)
    marked = []  # due dates labelled so far: labels at the same date go side by side
    for k, (name, d) in enumerate(dists.items()):
        if not d.ok:
            continue
        colour = f"C{k % 10}"
        y, pm, pl = d.curve(years)
        ax.plot(y, pm, color=colour, label=f"{name}: below MRT")
        ax.plot(y, pl, color=colour, ls="--", label=f"{name}: leak")
        t = due.get(name)
        if t is not None and np.isfinite(t):
            ax.axvline(t, color=colour, lw=0.8, ls=":")
            near = sum(abs(t - m) < 0.5 for m in marked)
            marked.append(t)
            ax.annotate(f"{name} due", (t, 1.0), xytext=(2 + 9 * near, -10), textcoords="offset points",
                        fontsize=7, color=colour, rotation=90, va="top")
    ax.set_xlabel("years after the newer inspection")
    ax.set_ylabel("probability")
    ax.set_ylim(0, 1.02)
    ax.set_xlim(0, 30)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7.5, ncols=2, loc="lower right")
    ax.set_title("Probability of reaching MRT and of a leak, per zone")
    return fig
