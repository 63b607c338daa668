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
    # API 653 §6.4.2 (training slides, seen): base 10 y; +5 FRP lining, +2 thin film,
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
