"""Rule sets: every value the assessment and repair planning use, with its source.

A rule set is named, documented, module-level data (:data:`RULESETS`).  Each value
is a :class:`RuleValue` carrying its unit, a tag saying how sure we are of it and
where it comes from; the report prints the whole table
(:meth:`RuleSet.table`) so the reader sees which values were used.

Tags
----
``seen``
    read in a published source (named in ``source``).
``memory``
    recalled, to be treated as a default the user checks against the edition in force.
``practice``
    common practice with no single source.
``derived``
    arithmetic on other values.
``user``
    replaced by the user (job file ``[rules.overrides]``); ``source`` keeps the
    value it replaced.

Applied or listed
-----------------
Each value says whether the assessment applies it (:attr:`RuleValue.applied`) and where,
or why it is only listed (:attr:`RuleValue.use`); :meth:`RuleSet.table` carries both and
:meth:`RuleSet.for_inputs` marks the values that depend on a tank's inputs.

All lengths are mm, rates mm/y, intervals years, whatever the scan's units.
The standard in force, the owner's authorised inspector and local regulations
decide; these values are defaults to be checked.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

from .errors import InputError, where

__all__ = ["RuleValue", "RuleSet", "RULESETS", "TAGS", "get_ruleset"]

#: Accepted tags of a :class:`RuleValue`.
TAGS = ("seen", "memory", "practice", "derived", "user")


@dataclass(frozen=True)
class RuleValue:
    """One rule value with its unit and provenance.

    Parameters
    ----------
    value : the number. [unit]
    unit : unit text, e.g. ``"mm"``, ``"y"``, ``"mm/y"``, ``"kg/m3"``, ``"1"``.
    tag : one of :data:`TAGS`.
    source : where the value comes from (publication, clause), or what it replaced.
    note : optional remark (conversion, caveat).
    applied : True when the tool applies the value in an assessment from a scan;
        False when it is only listed (no input feeds it, or it is used only where a
        scan assessment never goes).
    use : where the value is applied (and on what condition), or why it is not.
    """

    value: float
    unit: str
    tag: str
    source: str
    note: str = ""
    applied: bool = True
    use: str = ""

    def __post_init__(self):
        if self.tag not in TAGS:
            raise ValueError(f"rule tag must be one of {TAGS}, got {self.tag!r}")


def _rv(value, unit, tag, source, note="", *, use, applied=True):
    return RuleValue(float(value), unit, tag, source, note, applied, use)


# Fields that must be strictly positive (used as divisors or widths).
_POSITIVE = {
    "critical_zone_width_mm", "interval_step_y", "repair_to_step_mm", "ca_credit_rate_mm_y",
    "steel_density_kg_m3", "patch_thickness_mm",
}
# Fields that are fractions in [0, 1].
_FRACTION = {"critical_zone_min_t0_fraction", "critical_zone_min_shell_fraction"}


@dataclass(frozen=True)
class RuleSet:
    """The rule values of one named rule set (all :class:`RuleValue`).

    Attributes
    ----------
    name : rule-set name (``"api653"``).
    mrt_no_leak_detection_mm : MRT with no means of leak detection and containment
        (API 653 Table 4.4). [mm]
    mrt_leak_detection_mm : MRT with leak detection and containment. [mm]
    mrt_reinforced_lining_mm : MRT with a reinforced lining thicker than
        ``lining_min_thickness_mm``. [mm]
    lining_min_thickness_mm : lining thickness above which the reinforced-lining MRT
        applies. [mm]
    critical_zone_width_mm : width of the critical zone, radially inward from the
        inside of the shell. [mm]
    critical_zone_min_t0_fraction : critical-zone minimum as a fraction of the
        original plate thickness. [1]
    critical_zone_min_shell_fraction : critical-zone minimum as a fraction of the
        lower shell course tmin. [1]
    critical_zone_min_floor_mm : the critical-zone minimum is never below this. [mm]
    interval_cap_y : interval cap without a release-prevention barrier. [y]
    interval_cap_rpb_y : interval cap with a release-prevention barrier. [y]
    initial_interval_y : base initial internal interval when no rates are known. [y]
    credit_frp_lining_y, credit_thin_film_y, credit_cp_y, credit_rpb_y : additions to
        the initial interval for a fibreglass-reinforced lining, a thin-film coating,
        cathodic protection and a release-prevention barrier. [y]
    ca_credit_above_mm : corrosion allowance above which the initial interval is
        lengthened. [mm]
    ca_credit_rate_mm_y : rate dividing the excess corrosion allowance into extra
        years. [mm/y]
    patch_min_size_overlap_mm : smallest patch dimension when it overlaps a seam or
        another patch. [mm]
    patch_min_size_mm : smallest patch dimension when it overlaps neither. [mm]
    patch_extend_beyond_mm : a small patch extends at least this beyond the
        corrosion. [mm]
    patch_weld_clearance_mm : patch fillet welds at least this far from existing
        bottom welds. [mm]
    patch_critical_max_thickness_mm : greatest patch thickness in the critical zone
        (special shapes only there). [mm]
    patch_corner_radius_mm : corner radius of proposed rectangular patches. [mm]
    patch_thickness_mm : default patch-plate thickness. [mm]
    shell_lap_joint_clearance_mm : least distance from the inside of the shell to a
        lap joint in the bottom (API 650). [mm]
    steel_density_kg_m3 : density of carbon steel for patch masses. [kg/m³]
    interval_step_y : recommended intervals are rounded down to this step. [y]
    repair_to_step_mm : repair-to thicknesses are rounded up to this step. [mm]
    noise_k : a change counts as growth when above ``noise_k`` times its standard
        deviation. [1]
    min_coverage_pct : zones scanned less than this are flagged ``low-coverage``. [%]
    similar_service_quantile : upper quantile of a group's two-inspection zone-maximum rates
        lent to its one-inspection tanks (fleet runs). [1]
    """

    name: str
    mrt_no_leak_detection_mm: RuleValue
    mrt_leak_detection_mm: RuleValue
    mrt_reinforced_lining_mm: RuleValue
    lining_min_thickness_mm: RuleValue
    critical_zone_width_mm: RuleValue
    critical_zone_min_t0_fraction: RuleValue
    critical_zone_min_shell_fraction: RuleValue
    critical_zone_min_floor_mm: RuleValue
    interval_cap_y: RuleValue
    interval_cap_rpb_y: RuleValue
    initial_interval_y: RuleValue
    credit_frp_lining_y: RuleValue
    credit_thin_film_y: RuleValue
    credit_cp_y: RuleValue
    credit_rpb_y: RuleValue
    ca_credit_above_mm: RuleValue
    ca_credit_rate_mm_y: RuleValue
    patch_min_size_overlap_mm: RuleValue
    patch_min_size_mm: RuleValue
    patch_extend_beyond_mm: RuleValue
    patch_weld_clearance_mm: RuleValue
    patch_critical_max_thickness_mm: RuleValue
    patch_corner_radius_mm: RuleValue
    patch_thickness_mm: RuleValue
    shell_lap_joint_clearance_mm: RuleValue
    steel_density_kg_m3: RuleValue
    interval_step_y: RuleValue
    repair_to_step_mm: RuleValue
    noise_k: RuleValue
    min_coverage_pct: RuleValue
    #: Upper quantile of a group's two-inspection zone-maximum rates lent to its one-inspection tanks. [1]
    similar_service_quantile: RuleValue = _rv(
        0.9, "1", "memory", "API 653 Annex H / §4.4 similar service [memory; check the edition in force]",
        "p90 of the group's measured rates (scananalyse choice); at least 3 tanks",
        use="fleet: the rate lent to a group's one-inspection tanks (population.similar_service_rate)")

    # --- access ---------------------------------------------------------
    @classmethod
    def value_names(cls) -> tuple[str, ...]:
        """Names of the rule values (every field but ``name``), in table order."""
        return tuple(f.name for f in dataclasses.fields(cls) if f.name != "name")

    def v(self, name: str) -> float:
        """The number of rule value ``name``. [its unit]"""
        return getattr(self, name).value

    def table(self) -> list[dict]:
        """Rows ``{name, value, unit, tag, source, note, applied, use}`` for the report, in
        field order.

        ``applied`` is True for a value the assessment applies, False for one that is only
        listed; ``use`` says where it is applied or why not.  The ``note`` of a value not
        applied starts with "not applied: " and the reason, so a table showing only the
        note still says it.
        """
        rows = []
        for n in self.value_names():
            rv = getattr(self, n)
            note = rv.note if rv.applied else "; ".join(x for x in (f"not applied: {rv.use}", rv.note) if x)
            rows.append({"name": n, "value": rv.value, "unit": rv.unit, "tag": rv.tag,
                         "source": rv.source, "note": note, "applied": rv.applied, "use": rv.use})
        return rows

    def not_applied(self) -> tuple[str, ...]:
        """Names of the values listed but not applied, in table order."""
        return tuple(n for n in self.value_names() if not getattr(self, n).applied)

    def for_inputs(self, *, shell_tmin_mm: float | None = None,
                   shell_clearance_checked: bool = True) -> "RuleSet":
        """The rule set marked for one tank's inputs, for its report's rule table.

        Without the lower shell course's tmin, ``critical_zone_min_shell_fraction`` is
        marked not applied (the critical-zone minimum is then the larger of half the
        original plate thickness and ``critical_zone_min_floor_mm``); with it, the
        value is applied.  ``shell_lap_joint_clearance_mm`` is marked not applied when
        the patch check ran without the floor geometry.  No value changes.

        Parameters
        ----------
        shell_tmin_mm : tmin of the lower shell course, None if not given. [mm]
        shell_clearance_checked : the patch check had the shell circle
            (``check_patch_rules(...).attrs["shell_clearance_checked"]``).

        Returns
        -------
        RuleSet
        """
        rv = self.critical_zone_min_shell_fraction
        if shell_tmin_mm is None:
            rv = dataclasses.replace(rv, applied=False, use=(
                "no tmin of the lower shell course was given (--shell-tmin, job file "
                "[floor] shell_course_tmin); the critical-zone minimum is the larger of half "
                "the original plate thickness and critical_zone_min_floor_mm, which is higher "
                "than the code's minimum whenever 50 % of the shell tmin is the smaller term"))
        else:
            rv = dataclasses.replace(rv, applied=True, use=(
                f"critical-zone minimum, with the lower shell course tmin {float(shell_tmin_mm):.3g} mm "
                "given (assess.zone_mrt)"))
        changes = {"critical_zone_min_shell_fraction": rv}
        if not shell_clearance_checked:
            changes["shell_lap_joint_clearance_mm"] = dataclasses.replace(
                self.shell_lap_joint_clearance_mm, applied=False,
                use="the patch check was not given the floor geometry (shell circle): patches near the "
                    "shell were not checked against it")
        return dataclasses.replace(self, **changes)

    # --- rules as functions --------------------------------------------
    def mrt_mm(self, *, leak_detection: bool = False, reinforced_lining: bool = False) -> float:
        """Minimum remaining thickness of the bottom, API 653 Table 4.4 case.

        Parameters
        ----------
        leak_detection : the tank has a means of leak detection and containment.
        reinforced_lining : the bottom has a reinforced lining thicker than
            ``lining_min_thickness_mm``.

        Returns
        -------
        float : MRT. [mm]
        """
        if leak_detection:
            return self.v("mrt_leak_detection_mm")
        if reinforced_lining:
            return self.v("mrt_reinforced_lining_mm")
        return self.v("mrt_no_leak_detection_mm")

    def critical_zone_min_mm(self, t0_mm: float, shell_tmin_mm: float | None = None) -> float:
        """Minimum thickness in the critical zone.

        The smaller of ``critical_zone_min_t0_fraction`` × the original plate
        thickness and ``critical_zone_min_shell_fraction`` × the lower shell course
        tmin (when known), but not below ``critical_zone_min_floor_mm``.

        Parameters
        ----------
        t0_mm : original plate thickness, without corrosion allowance. [mm]
        shell_tmin_mm : tmin of the lower shell course, if known. [mm]

        Returns
        -------
        float : critical-zone minimum. [mm]
        """
        cands = [self.v("critical_zone_min_t0_fraction") * float(t0_mm)]
        if shell_tmin_mm is not None:
            cands.append(self.v("critical_zone_min_shell_fraction") * float(shell_tmin_mm))
        return max(min(cands), self.v("critical_zone_min_floor_mm"))

    def interval_cap_years(self, release_prevention_barrier: bool = False) -> float:
        """Interval cap: ``interval_cap_rpb_y`` with a release-prevention barrier, else ``interval_cap_y``. [y]"""
        return self.v("interval_cap_rpb_y" if release_prevention_barrier else "interval_cap_y")

    def initial_interval_years(self, *, frp_lining: bool = False, thin_film_coating: bool = False,
                               cp_effective: bool = False, release_prevention_barrier: bool = False,
                               corrosion_allowance_mm: float | None = None) -> float:
        """Initial internal interval when no corrosion rates are known (API 653 §6.4.2).

        ``initial_interval_y`` plus each safeguard's credit, plus
        (CA − ``ca_credit_above_mm``)/``ca_credit_rate_mm_y`` years when the corrosion
        allowance exceeds ``ca_credit_above_mm``, capped at :meth:`interval_cap_years`.

        Parameters
        ----------
        frp_lining : fibreglass-reinforced lining.
        thin_film_coating : thin-film coating (ignored when ``frp_lining``).
        cp_effective : effective cathodic protection.
        release_prevention_barrier : release-prevention barrier under the bottom.
        corrosion_allowance_mm : corrosion allowance of the bottom, if known. [mm]

        Returns
        -------
        float : initial interval. [y]
        """
        y = self.v("initial_interval_y")
        if frp_lining:
            y += self.v("credit_frp_lining_y")
        elif thin_film_coating:
            y += self.v("credit_thin_film_y")
        if cp_effective:
            y += self.v("credit_cp_y")
        if release_prevention_barrier:
            y += self.v("credit_rpb_y")
        if corrosion_allowance_mm is not None and corrosion_allowance_mm > self.v("ca_credit_above_mm"):
            y += (corrosion_allowance_mm - self.v("ca_credit_above_mm")) / self.v("ca_credit_rate_mm_y")
        return min(y, self.interval_cap_years(release_prevention_barrier))

    def round_interval(self, years: float) -> float:
        """Round an interval DOWN to ``interval_step_y`` (NaN and inf pass through). [y]"""
        if not math.isfinite(years):
            return years
        step = self.v("interval_step_y")
        return math.floor(years / step + 1e-9) * step

    def round_repair_to(self, thickness_mm: float) -> float:
        """Round a repair-to thickness UP to ``repair_to_step_mm``. [mm]"""
        step = self.v("repair_to_step_mm")
        return math.ceil(thickness_mm / step - 1e-9) * step


_IN = 25.4  # mm per inch, exact

_ASSESS = "assess.assess_zones"
_PLAN = "repair.plan_patches and repair.check_patch_rules"
_NO_RATES = ("used only when no corrosion rates are known (RuleSet.initial_interval_years); an "
             "assessment from a scan always has rates (long-term ones at least)")
_API653 = RuleSet(
    name="api653",
    mrt_no_leak_detection_mm=_rv(
        2.54, "mm", "seen", "API 653 Table 4.4 (quoted in 14 CCR §1773.4(e) and by Carucci)",
        "0.10 in; no means of leak detection and containment",
        use="MRT of every zone (assess.zone_mrt), no leak detection given"),
    mrt_leak_detection_mm=_rv(
        1.27, "mm", "seen", "API 653 Table 4.4 (quoted in 14 CCR §1773.4(e) and by Carucci)",
        "0.05 in; with leak detection and containment",
        use="MRT of every zone (assess.zone_mrt) with --leak-detection"),
    mrt_reinforced_lining_mm=_rv(
        1.27, "mm", "seen", "API 653 Table 4.4 (quoted in 14 CCR §1773.4(e) and by Carucci)",
        "0.05 in; reinforced lining > 0.05 in thick per API RP 652 [memory]",
        use="MRT of every zone (assess.zone_mrt) with --reinforced-lining"),
    lining_min_thickness_mm=_rv(
        1.27, "mm", "seen", "API 653 Table 4.4", "0.05 in", applied=False,
        use="the lining's thickness is not an input: the job states only whether the bottom has a "
            "reinforced lining thicker than this (--reinforced-lining)"),
    critical_zone_width_mm=_rv(
        75.0, "mm", "seen", "API 653 definition of the critical zone (Section 3 [memory]; quoted in a Q&A set)",
        "3 in, radially inward from the inside edge of the shell",
        use="the critical zone of the zone map (zones.zone_map)"),
    critical_zone_min_t0_fraction=_rv(
        0.5, "1", "memory", "API 653 §4.4.7 critical-zone rule [memory: clause recalled]",
        "half the original plate thickness (without corrosion allowance)",
        use="critical-zone minimum (assess.zone_mrt)"),
    critical_zone_min_shell_fraction=_rv(
        0.5, "1", "memory", "API 653 §4.4.7 critical-zone rule [memory: clause recalled]",
        "50 % of the lower shell course tmin",
        use="critical-zone minimum (assess.zone_mrt), only when the lower shell course tmin is given "
            "(--shell-tmin, job file [floor] shell_course_tmin)"),
    critical_zone_min_floor_mm=_rv(
        2.54, "mm", "memory", "API 653 §4.4.7 critical-zone rule [memory: clause recalled]",
        "never below 0.1 in", use="critical-zone minimum (assess.zone_mrt)"),
    interval_cap_y=_rv(
        20.0, "y", "seen", "API 653 §6.4.2 (as quoted in a secondary source)",
        "without a release-prevention barrier", use=f"interval cap ({_ASSESS})"),
    interval_cap_rpb_y=_rv(
        30.0, "y", "seen", "API 653 §6.4.2 (as quoted in a secondary source)",
        "with a release-prevention barrier",
        use=f"interval cap with --release-prevention-barrier ({_ASSESS})"),
    initial_interval_y=_rv(
        10.0, "y", "seen", "API 653 §6.4.2 (as quoted in a secondary source)",
        "base when corrosion rates are unknown", applied=False, use=_NO_RATES),
    credit_frp_lining_y=_rv(5.0, "y", "seen", "API 653 §6.4.2 (as quoted in a secondary source)",
                            "fibreglass-reinforced lining", applied=False, use=_NO_RATES),
    credit_thin_film_y=_rv(2.0, "y", "seen", "API 653 §6.4.2 (as quoted in a secondary source)",
                           "thin-film coating", applied=False, use=_NO_RATES),
    credit_cp_y=_rv(5.0, "y", "seen", "API 653 §6.4.2 (as quoted in a secondary source)",
                    "cathodic protection", applied=False, use=_NO_RATES),
    credit_rpb_y=_rv(10.0, "y", "seen", "API 653 §6.4.2 (as quoted in a secondary source)",
                     "release-prevention barrier", applied=False, use=_NO_RATES),
    ca_credit_above_mm=_rv(0.150 * _IN, "mm", "seen", "API 653 §6.4.2 (as quoted in a secondary source)",
                           "0.150 in", applied=False,
                           use="the corrosion allowance is not an input, and " + _NO_RATES),
    ca_credit_rate_mm_y=_rv(15 * 0.0254, "mm/y", "seen", "API 653 §6.4.2 (as quoted in a secondary source)",
                            "15 mpy", applied=False,
                            use="the corrosion allowance is not an input, and " + _NO_RATES),
    patch_min_size_overlap_mm=_rv(
        300.0, "mm", "seen", "API 653 §9.10.1.1 (quoted in repair procedures)",
        "12 in, as the metric 300 mm quoted; overlapping a seam or another patch",
        use=f"patch size ({_PLAN}, flag overlaps-without-min-size)"),
    patch_min_size_mm=_rv(
        150.0, "mm", "seen", "API 653 §9.10.1.1 (quoted in repair procedures)",
        "6 in; only if overlapping neither a seam nor a patch", use=f"patch size ({_PLAN}, flag too-small)"),
    patch_extend_beyond_mm=_rv(
        50.0, "mm", "seen", "API 653 §9.10.1.1 (quoted in repair procedures)",
        "2 in beyond the corrosion, for patches smaller than 300 mm",
        use=f"patch extent ({_PLAN}, flag not-beyond-corrosion)"),
    patch_weld_clearance_mm=_rv(
        50.0, "mm", "seen", "API 653 §9.10.1.1 and Fig. 9.13 (as quoted in a secondary source)",
        "2 in from existing bottom welds", use=f"weld spacing ({_PLAN}, flags weld-clearance, too-close)"),
    patch_critical_max_thickness_mm=_rv(
        6.35, "mm", "memory", "API 653 §9.10.1 critical-zone patches [memory: clause recalled]",
        "1/4 in; special shapes (tombstone) only in the critical zone",
        use=f"patches touching the critical zone ({_PLAN}, flag critical-zone-thickness)"),
    patch_corner_radius_mm=_rv(
        50.0, "mm", "practice", "common practice, no source",
        "rounded corners are required [seen: API 653 §9.10.1.1]; this radius is a common choice",
        use="corner radius of planned patches (repair.plan_patches)"),
    patch_thickness_mm=_rv(6.35, "mm", "practice", "common practice, no source",
                           "1/4 in, the API 650 minimum bottom plate [seen: Carucci]",
                           use="thickness of planned patches unless --patch-thickness (repair.plan_patches)"),
    shell_lap_joint_clearance_mm=_rv(
        600.0, "mm", "seen", "API 650 §5.5.2 (as quoted in a secondary source)",
        "24 in from the inside of the shell to any lap joint; a patch's fillet weld is a lap joint",
        use="patch welds near the shell (repair.check_patch_rules with the floor geometry, "
            "flag shell-clearance)"),
    steel_density_kg_m3=_rv(7850.0, "kg/m3", "practice", "engineering handbooks, carbon steel",
                            use="patch masses (repair.patch_mass_kg)"),
    interval_step_y=_rv(0.5, "y", "practice", "common practice, no source",
                        "recommended intervals are rounded down to this",
                        use="recommended interval (assess.recommend_interval)"),
    repair_to_step_mm=_rv(0.005 * _IN, "mm", "seen",
                          "MFL threshold table from API 653 3rd ed. §4.4.7.1 (tank consultancy)",
                          "0.005 in; repair-to thicknesses rounded up", applied=False,
                          use="the repair-to thickness is the user's (--repair-to) or planned from "
                              "rates; RuleSet.round_repair_to is not called by the assessment"),
    noise_k=_rv(2.0, "1", "practice", "common practice, no source",
                "a change below about 2 sigma is not evidence of growth",
                use="noise rule of the short-term rates (rates.RateOptions)"),
    min_coverage_pct=_rv(90.0, "%", "practice", "common practice, no source",
                         "typically at least 95 % of a floor is scanned [seen: NDT service page]",
                         use=f"flag low-coverage ({_ASSESS})"),
)

#: Registry of named rule sets.
RULESETS: dict[str, RuleSet] = {"api653": _API653}


def _is_number(x) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool)


def get_ruleset(name: str = "api653", overrides: dict | None = None, *,
                source: str | None = None) -> RuleSet:
    """A named rule set, optionally with some values replaced.

    Parameters
    ----------
    name : key of :data:`RULESETS`.
    overrides : ``{field name: number or RuleValue}``.  A number keeps the field's
        unit and gets tag ``user``, its source recording the value it replaced.
    source : file the overrides came from, for error messages (default ``"rules"``).

    Returns
    -------
    RuleSet

    Raises
    ------
    InputError
        Unknown rule-set name, unknown field, or a value of the wrong type or range;
        one line naming the field.
    """
    src = source if source is not None else "rules"
    if not isinstance(name, str) or name not in RULESETS:
        raise InputError(f"{where(src, field='name')}: unknown rule set {name!r} "
                         f"(known: {', '.join(sorted(RULESETS))})")
    base = RULESETS[name]
    if not overrides:
        return base
    if not isinstance(overrides, dict):
        raise InputError(f"{where(src, field='overrides')}: expected a table of rule values")
    names = set(RuleSet.value_names())
    changes = {}
    for key, val in overrides.items():
        if key not in names:
            raise InputError(f"{where(src, field=str(key))}: unknown rule value "
                             f"(see RuleSet.table() for the names)")
        old = getattr(base, key)
        if isinstance(val, RuleValue):
            new = val
        elif _is_number(val):
            new = dataclasses.replace(old, value=float(val), tag="user",
                                      source=f"override (was {old.value:g} {old.unit}, {old.tag}: {old.source})")
        else:
            raise InputError(f"{where(src, field=key)}: expected a number [{old.unit}], "
                             f"got {type(val).__name__}")
        v = new.value
        if not _is_number(v) or not math.isfinite(v) or v < 0:
            raise InputError(f"{where(src, field=key)}: must be a finite number >= 0, got {v!r}")
        if key in _POSITIVE and v <= 0:
            raise InputError(f"{where(src, field=key)}: must be > 0, got {v!r}")
        if key in _FRACTION and v > 1:
            raise InputError(f"{where(src, field=key)}: must be a fraction in [0, 1], got {v!r}")
        changes[key] = new
    return dataclasses.replace(base, **changes)
