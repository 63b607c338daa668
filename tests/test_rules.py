"""Tests of the rule sets (scananalyse.rules).

Expected values come from /work/shared/domain.md, which names the published
source of each (tags seen / memory / practice); conversions are exact
(1 in = 25.4 mm, 1 mpy = 0.0254 mm/y).
"""

import dataclasses
import math

import pytest

from scananalyse.errors import InputError
from scananalyse.rules import RULESETS, TAGS, RuleSet, RuleValue, get_ruleset


@pytest.fixture
def rs():
    return get_ruleset()


def test_registry_and_default_name(rs):
    assert "api653" in RULESETS
    assert rs is RULESETS["api653"]
    assert rs.name == "api653"


def test_mrt_table_4_4(rs):
    # API 653 Table 4.4 as quoted in 14 CCR §1773.4(e) and by Carucci: 0.10 in without
    # leak detection and containment, 0.05 in with it, 0.05 in with a reinforced lining.
    assert rs.mrt_mm() == pytest.approx(0.10 * 25.4)
    assert rs.mrt_mm(leak_detection=True) == pytest.approx(0.05 * 25.4)
    assert rs.mrt_mm(reinforced_lining=True) == pytest.approx(0.05 * 25.4)
    assert rs.mrt_mm(leak_detection=True, reinforced_lining=True) == pytest.approx(1.27)


def test_critical_zone_width_and_minimum(rs):
    # API 653 definition (seen): 3 in = 75 mm radially inward from the shell.
    assert rs.v("critical_zone_width_mm") == 75.0
    # critical-zone minimum (memory): smaller of t0/2 and 50 % of the shell course tmin,
    # not below 0.1 in.  t0 = 1/4 in -> 1/8 in = 3.175 mm.
    assert rs.critical_zone_min_mm(6.35) == pytest.approx(3.175)
    # shell tmin 6.0 mm -> 3.0 mm is the smaller one
    assert rs.critical_zone_min_mm(6.35, 6.0) == pytest.approx(3.0)
    # both below 0.1 in -> 2.54 mm
    assert rs.critical_zone_min_mm(4.0, 4.0) == pytest.approx(2.54)


def test_caps_and_initial_interval(rs):
    # API 653 §6.4.2 (seen, as quoted): base 10 y; +5 FRP lining, +2 thin film,
    # +5 CP, +10 RPB; cap 20 y without RPB, 30 y with.
    assert rs.interval_cap_years(False) == 20.0
    assert rs.interval_cap_years(True) == 30.0
    assert rs.initial_interval_years() == 10.0
    assert rs.initial_interval_years(thin_film_coating=True) == 12.0
    assert rs.initial_interval_years(frp_lining=True, thin_film_coating=True) == 15.0
    assert rs.initial_interval_years(frp_lining=True, cp_effective=True) == 20.0
    assert rs.initial_interval_years(thin_film_coating=True, cp_effective=True) == 17.0
    # 10 + 5 + 5 + 10 = 30 with all safeguards but no barrier -> capped at 20
    assert rs.initial_interval_years(frp_lining=True, cp_effective=True,
                                     corrosion_allowance_mm=0.3 * 25.4) == 20.0
    assert rs.initial_interval_years(frp_lining=True, cp_effective=True,
                                     release_prevention_barrier=True) == 30.0
    # corrosion allowance 0.250 in: (250 - 150) mils / 15 mpy = 6.667 y extra (derived)
    ca = 0.250 * 25.4
    assert rs.initial_interval_years(corrosion_allowance_mm=ca) == pytest.approx(10 + 100 / 15)
    # at or below 0.150 in: no credit
    assert rs.initial_interval_years(corrosion_allowance_mm=0.150 * 25.4) == 10.0


def test_patch_rules_and_practice_values(rs):
    # API 653 §9.10.1.1 (seen): 12 in (300 mm) when overlapping, 6 in (150 mm) otherwise,
    # 2 in beyond the corrosion and from existing welds; critical zone max 1/4 in (memory).
    assert rs.v("patch_min_size_overlap_mm") == 300.0
    assert rs.v("patch_min_size_mm") == 150.0
    assert rs.v("patch_extend_beyond_mm") == 50.0
    assert rs.v("patch_weld_clearance_mm") == 50.0
    assert rs.v("patch_critical_max_thickness_mm") == pytest.approx(6.35)
    assert rs.patch_critical_max_thickness_mm.tag == "memory"
    # practice values (common practice, no source)
    assert rs.v("steel_density_kg_m3") == 7850.0
    assert rs.v("interval_step_y") == 0.5
    assert rs.v("noise_k") == 2.0
    assert rs.patch_thickness_mm.tag == "practice"
    # 0.005 in rounding of the repair-to table (seen)
    assert rs.v("repair_to_step_mm") == pytest.approx(0.127)


def test_every_value_documented(rs):
    names = RuleSet.value_names()
    assert len(names) == len(dataclasses.fields(RuleSet)) - 1
    rows = rs.table()
    assert [r["name"] for r in rows] == list(names)
    for r in rows:
        assert r["tag"] in TAGS and r["tag"] != "user"
        assert r["source"].strip()
        assert r["unit"].strip()
        assert math.isfinite(r["value"])
        # every field is mentioned in the class docstring
        assert r["name"] in RuleSet.__doc__


def test_frozen(rs):
    with pytest.raises(dataclasses.FrozenInstanceError):
        rs.interval_cap_y = RuleValue(15.0, "y", "user", "x")
    with pytest.raises(ValueError, match="tag"):
        RuleValue(1.0, "mm", "guess", "x")


def test_rounding(rs):
    assert rs.round_interval(9.99) == 9.5
    assert rs.round_interval(0.1 + 0.2 + 9.7) == 10.0  # float noise does not lose a step
    assert rs.round_interval(0.49) == 0.0
    assert rs.round_interval(math.inf) == math.inf
    assert math.isnan(rs.round_interval(math.nan))
    # 0.1167 in rounds UP to 0.120 in (the consultancy table's 0.120 value)
    assert rs.round_repair_to(0.11667 * 25.4) == pytest.approx(0.120 * 25.4)
    assert rs.round_repair_to(0.175 * 25.4) == pytest.approx(0.175 * 25.4)


def test_overrides(rs):
    r2 = get_ruleset("api653", {"interval_cap_y": 15, "interval_step_y": 0.25})
    assert r2.interval_cap_years(False) == 15.0
    assert r2.interval_cap_y.tag == "user"
    assert "was 20" in r2.interval_cap_y.source
    assert r2.interval_cap_y.unit == "y"
    assert r2.round_interval(9.9) == 9.75
    # the registry is untouched
    assert rs.interval_cap_years(False) == 20.0
    rv = RuleValue(1.5, "mm", "seen", "site rule book")
    r3 = get_ruleset(overrides={"mrt_leak_detection_mm": rv})
    assert r3.mrt_leak_detection_mm is rv
    assert get_ruleset(overrides={}) is rs


@pytest.mark.parametrize("over, match", [
    ({"interval_cap": 15}, r"field 'interval_cap': unknown rule value"),
    ({"interval_cap_y": "15"}, r"field 'interval_cap_y': expected a number"),
    ({"interval_cap_y": True}, r"field 'interval_cap_y': expected a number"),
    ({"interval_cap_y": -1.0}, r"field 'interval_cap_y': must be a finite number >= 0"),
    ({"interval_cap_y": float("nan")}, r"field 'interval_cap_y': must be a finite"),
    ({"interval_step_y": 0}, r"field 'interval_step_y': must be > 0"),
    ({"critical_zone_min_t0_fraction": 2.0}, r"field 'critical_zone_min_t0_fraction': must be a fraction"),
])
def test_override_errors(over, match):
    with pytest.raises(InputError, match=match):
        get_ruleset("api653", over)


def test_override_error_names_source_file():
    with pytest.raises(InputError, match=r"^job\.toml: field 'nope'"):
        get_ruleset("api653", {"nope": 1}, source="job.toml")


def test_unknown_ruleset():
    with pytest.raises(InputError, match=r"field 'name': unknown rule set 'api999' \(known: api653\)"):
        get_ruleset("api999")


# ---------------------------------------------------------------------------
# every rule in the table is applied (and a test exercises it) or marked not applied
# ---------------------------------------------------------------------------
def _zone_mrt(rs, *, t0=6.35, **opts):
    from scananalyse.assess import AssessOptions, zone_mrt
    from scananalyse.zones import FloorGeometry, GridSpec, zone_map

    grid = GridSpec((62, 62), -1525.0, -1525.0, 50.0)
    zm = zone_map(grid, FloorGeometry(3000.0), rs)
    return tuple(zone_mrt(zm, rs, AssessOptions(**opts), t0=t0))


def _critical_cells(rs):
    from scananalyse.zones import FloorGeometry, GridSpec, zone_map

    return int(zone_map(GridSpec((62, 62), -1525.0, -1525.0, 50.0), FloorGeometry(3000.0), rs)
               .mask("critical").sum())


def _assessed(rs, *, scanned_fraction=1.0, **opts):
    """(recommended interval, flags) of a healthy floor's zones, slow rates: the cap governs."""
    import datetime as dt

    import numpy as np

    from scananalyse.assess import AssessOptions, assess_zones
    from scananalyse.scan import ScanMeta
    from scananalyse.zones import FloorGeometry, GridSpec, zone_map

    grid = GridSpec((62, 62), -1525.0, -1525.0, 50.0)
    zm = zone_map(grid, FloorGeometry(3000.0), rs)
    t = np.where(zm.labels >= 0, np.float32(6.3), np.float32(np.nan)).astype(np.float32)
    if scanned_fraction < 1:
        t[: int(62 * (1 - scanned_fraction))] = np.nan
    rate = np.full(grid.shape, 0.001, np.float32)
    meta = ScanMeta(inspected=dt.date(2026, 5, 1), nominal=6.35, method="UT", threshold=None,
                    installed=dt.date(2006, 5, 1))
    df = assess_zones(thickness=t, side=None, rate_top=rate, rate_under=rate, zones=zm, meta=meta, rules=rs,
                      options=AssessOptions(target_interval_years=None, **opts))
    return tuple(df["interval_recommended_y"]), tuple(df["flags"])


def _patch_flags(rs):
    """check_patch_rules on one patch set that sits at the edge of every patch rule."""
    import numpy as np
    import pandas as pd

    from scananalyse import repair

    class Geom:
        centre, radius_mm = (0.0, 0.0), 2000.0

    nd = np.zeros((100, 100), dtype=bool)
    nd[20, 20] = True                 # corrosion at (200, 200), 40 mm inside A's edge
    crit = np.zeros((100, 100), dtype=bool)
    crit[:, 95:] = True               # x >= 950 mm
    rows = [("A", 160.0, 160.0, 260.0, 260.0, 6.35),    # 100 mm square
            ("D", 100.0, 600.0, 300.0, 800.0, 6.35),    # 200 mm across the seam y = 700
            ("E", 400.0, 430.0, 700.0, 670.0, 6.35),    # top edge 30 mm from the seam
            ("F", 880.0, 400.0, 1100.0, 620.0, 8.0),    # in the critical strip, 8 mm thick
            ("S", 1000.0, -150.0, 1300.0, 150.0, 6.35)]  # 0.69 m from the shell (r = 2 m)
    df = pd.DataFrame(rows, columns=["patch", "x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm", "thickness_mm"])
    df["corner_radius_mm"] = 0.0
    ck = repair.check_patch_rules(df, x0=0.0, y0=0.0, pitch=10.0, rules=rs, seams=[(0.0, 700.0, 1000.0, 700.0)],
                                  critical_mask=crit, needs=nd, geometry=Geom())
    return tuple(ck["flags"])


def _planned(rs):
    import numpy as np

    from scananalyse import repair

    nd = np.zeros((60, 60), dtype=bool)
    nd[25:30, 25:32] = True
    p = repair.plan_patches(nd, x0=0.0, y0=0.0, pitch=10.0, rules=rs)
    return tuple(p[["corner_radius_mm", "thickness_mm", "mass_kg"]].round(6).itertuples(index=False))


def _noise(rs):
    from scananalyse.rates import growth_threshold

    # the pipeline builds rates.RateOptions(k_sigma=rules.noise_k.value)
    return growth_threshold(0.1, 0.1, k=rs.noise_k.value)


#: name -> (function of a rule set whose output the value changes, the override to try)
EXERCISED = {
    "mrt_no_leak_detection_mm": (lambda rs: _zone_mrt(rs), 2.0),
    "mrt_leak_detection_mm": (lambda rs: _zone_mrt(rs, leak_detection=True), 1.5),
    "mrt_reinforced_lining_mm": (lambda rs: _zone_mrt(rs, reinforced_lining=True), 1.5),
    "critical_zone_width_mm": (_critical_cells, 150.0),
    "critical_zone_min_t0_fraction": (lambda rs: _zone_mrt(rs), 0.45),
    "critical_zone_min_shell_fraction": (lambda rs: _zone_mrt(rs, shell_tmin_mm=6.0), 0.45),
    "critical_zone_min_floor_mm": (lambda rs: _zone_mrt(rs, t0=4.0), 3.0),
    "interval_cap_y": (lambda rs: _assessed(rs), 15.0),
    "interval_cap_rpb_y": (lambda rs: _assessed(rs, release_prevention_barrier=True), 25.0),
    "interval_step_y": (lambda rs: _assessed(rs), 3.0),
    "min_coverage_pct": (lambda rs: _assessed(rs, scanned_fraction=0.5), 10.0),
    "patch_min_size_overlap_mm": (_patch_flags, 150.0),
    "patch_min_size_mm": (_patch_flags, 90.0),
    "patch_extend_beyond_mm": (_patch_flags, 30.0),
    "patch_weld_clearance_mm": (_patch_flags, 20.0),
    "patch_critical_max_thickness_mm": (_patch_flags, 10.0),
    "shell_lap_joint_clearance_mm": (_patch_flags, 700.0),
    "patch_corner_radius_mm": (_planned, 30.0),
    "patch_thickness_mm": (_planned, 8.0),
    "steel_density_kg_m3": (_planned, 7800.0),
    "noise_k": (_noise, 3.0),
    "similar_service_quantile": (lambda rs: _similar_service(rs), 0.5),
}


def _similar_service(rs):
    # the fleet's rate lent to a one-inspection tank of a group of three measured tanks
    from scananalyse import fleet

    rows = [{"status": "ok", "service": "crude", "inspections": 2, "rate_top_max_mm_y": r, "rate_under_max_mm_y": r}
            for r in (0.1, 0.2, 0.6)] + [{"status": "ok", "service": "crude", "inspections": 1, "rate_top_max_mm_y": None,
                                          "rate_under_max_mm_y": None}]
    fleet.similar_service(rows, ["service"], quantile=rs.v("similar_service_quantile"))
    return rows[-1].get("similar_service_top_mm_y")


@pytest.mark.parametrize("name", RuleSet.value_names())
def test_every_rule_is_applied_or_marked_not_applied(rs, name):
    rv = getattr(rs, name)
    row = next(r for r in rs.table() if r["name"] == name)
    assert row["applied"] is rv.applied and row["use"] == rv.use and rv.use
    if not rv.applied:
        assert name not in EXERCISED
        assert row["note"].startswith("not applied: ")
        return
    # applied: changing the value changes what the tool computes
    f, other = EXERCISED[name]
    assert other != rv.value
    assert f(get_ruleset(overrides={name: other})) != f(rs)


def test_not_applied_rules_are_the_ones_no_input_reaches(rs):
    assert set(rs.not_applied()) == {
        "lining_min_thickness_mm", "initial_interval_y", "credit_frp_lining_y", "credit_thin_film_y",
        "credit_cp_y", "credit_rpb_y", "ca_credit_above_mm", "ca_credit_rate_mm_y", "repair_to_step_mm"}


def test_for_inputs_marks_the_shell_term_and_the_shell_clearance(rs):
    run = rs.for_inputs()
    assert not run.critical_zone_min_shell_fraction.applied
    assert "no tmin of the lower shell course" in run.critical_zone_min_shell_fraction.use
    assert run.shell_lap_joint_clearance_mm.applied
    given = rs.for_inputs(shell_tmin_mm=6.0, shell_clearance_checked=False)
    assert given.critical_zone_min_shell_fraction.applied
    assert not given.shell_lap_joint_clearance_mm.applied
    assert "shell_lap_joint_clearance_mm" in given.not_applied()
    # marking changes no value
    assert [r["value"] for r in given.table()] == [r["value"] for r in rs.table()]


def test_sources_cite_clauses_not_secondary_nicknames(rs):
    for row in rs.table():
        text = (row["source"] + " " + row["note"]).lower()
        assert "slides" not in text and "flashcard" not in text, row["name"]
        if row["tag"] in ("seen", "memory") and "api" in text:
            assert "§" in row["source"] or "table" in row["source"].lower() \
                or "definition" in row["source"], row["name"]
        if row["tag"] == "memory":
            assert "[memory" in row["source"], row["name"]


def test_override_keeps_applied_and_use(rs):
    o = get_ruleset(overrides={"repair_to_step_mm": 0.2, "noise_k": 3.0})
    assert not o.repair_to_step_mm.applied and o.repair_to_step_mm.use == rs.repair_to_step_mm.use
    assert o.noise_k.applied and o.noise_k.tag == "user" and rs.noise_k.source in o.noise_k.source
