"""Plausibility checks against unit mistakes (scananalyse.checks); small invented floors."""

import datetime as dt
import math

import numpy as np
import pandas as pd
import pytest

from scananalyse.checks import (check_inside_shell, check_job_against_scans, check_pitch_matches, check_repair_to,
                                check_same_tank, no_patches_text, patches_line, shell_reach_warning)
from scananalyse.errors import InputError
from scananalyse.scan import FloorScan, ScanMeta


def _disc(diameter_mm=8000.0, pitch=100.0, *, tank="TK-07", units="mm", source="new.csv", step=1):
    """A fully scanned round floor of ``diameter_mm`` centred at the origin (cell centres inside)."""
    r = diameter_mm / 2
    n = int(math.ceil(diameter_mm / pitch))
    x0 = -(n - 1) * pitch / 2
    c = x0 + pitch * np.arange(n)
    inside = (c[None, :] ** 2 + c[:, None] ** 2) <= r * r
    t = np.where(inside, 6.0, np.nan).astype(np.float32)
    if step > 1:
        keep = np.zeros_like(inside)
        keep[::step, ::step] = True
        t[~keep] = np.nan
    meta = ScanMeta(inspected=dt.date(2024, 5, 14), nominal=6.35, units=units, tank=tank)
    return FloorScan(thickness=t, x0=x0, y0=x0, pitch=pitch, meta=meta, source=source)


def test_inside_shell_accepts_the_right_diameter():
    check_inside_shell(_disc(), diameter_mm=8000.0)
    # a diameter a little short is within the two-pitch tolerance
    check_inside_shell(_disc(), diameter_mm=8000.0 - 2 * 100.0)


def test_diameter_in_inches_read_as_mm_is_refused_with_the_likely_unit():
    # 315 in = 8001 mm: the case, read as 315 mm on an 8 m floor
    with pytest.raises(InputError, match=r"^--diameter: \d+ of \d+ scanned cells of new\.csv lie outside the "
                       r"shell of diameter 315 mm by more than 2 pitches \(200 mm\), up to 38\d\d mm beyond it; "
                       r"315 looks like inches: 315 in = 8001 mm$"):
        check_inside_shell(_disc(), diameter_mm=315.0, given=(315.0, "mm"))


def test_diameter_in_metres_is_named():
    with pytest.raises(InputError, match=r"8 looks like metres: 8 m = 8000 mm"):
        check_inside_shell(_disc(), diameter_mm=8.0, given=(8.0, "mm"))


def test_diameter_too_small_without_a_unit_gives_the_diameter_needed():
    # 6000 on an 8 m floor: about a metre outside, no other unit fits
    with pytest.raises(InputError, match=r"up to 9\d\d mm beyond it; the scanned cells need a diameter of at "
                       r"least 7\d\d\d mm about the centre \(0, 0\) mm") as info:
        check_inside_shell(_disc(), diameter_mm=6000.0, given=(6000.0, "mm"), what="job.toml: field 'floor.diameter'")
    assert str(info.value).startswith("job.toml: field 'floor.diameter': ")


def test_inches_given_shows_both_units():
    with pytest.raises(InputError, match=r"diameter 100 in = 2540 mm"):
        check_inside_shell(_disc(), diameter_mm=2540.0, given=(100.0, "in"))


def test_wrong_centre_is_refused():
    with pytest.raises(InputError, match=r"outside the shell"):
        check_inside_shell(_disc(), diameter_mm=8000.0, centre_mm=(4000.0, 0.0))


def test_shell_far_beyond_the_scan_warns():
    text = shell_reach_warning(_disc(), diameter_mm=8000 * 25.4, given=(8000.0, "in"))
    assert text.startswith("--diameter: the shell (diameter 203200 mm) lies far beyond every scanned cell")
    assert text.endswith("; 8000 looks like millimetres")
    assert shell_reach_warning(_disc(), diameter_mm=8000.0) is None


@pytest.mark.parametrize("rt, given, match", [
    (0.15, (0.15, "mm"), r"^--repair-to: a repair-to thickness of 0\.15 mm is below the MRT of 2\.54 mm: .*"
                         r"\(0\.15 looks like inches: 0\.15 in = 3\.81 mm\)$"),
    (2.0, None, r"below the MRT of 2\.54 mm: cells between the two would stay below MRT unrepaired; "
                r"give at least the MRT$"),
    (101.6, (4.0, "in"), r"4 in = 102 mm is above the nominal plate thickness of 6\.35 mm: every cell would be "
                         r"repaired \(4 looks like millimetres\)$"),
])
def test_repair_to_outside_mrt_and_nominal_is_refused(rt, given, match):
    with pytest.raises(InputError, match=match):
        check_repair_to(rt, np.array([2.54, 1.27, np.nan]), nominal_mm=6.35, given=given)


def test_repair_to_names_the_governing_zone():
    # the critical zone's minimum (half of 6.35 mm) governs over the interior's 2.54 mm
    with pytest.raises(InputError, match=r"below the MRT of 3\.175 mm \(zone critical\): cells"):
        check_repair_to(3.0, {"critical": 3.175, "interior": 2.54, "empty": float("nan")}, nominal_mm=6.35)


def test_repair_to_accepted():
    check_repair_to(None, 2.54)
    check_repair_to(3.81, 2.54, nominal_mm=6.35)
    check_repair_to(2.54, [2.54], nominal_mm=6.35)


def test_same_tank():
    a, b = _disc(tank="TK-07", source="old.csv"), _disc(tank="tk 07")
    assert check_same_tank(a, b) is None
    assert check_same_tank(a, _disc(tank="")) is None
    text = check_same_tank(a, _disc(tank="TK-08"))
    assert text == ("the two scans name different tanks: 'TK-07' (old.csv) and 'TK-08' (new.csv); "
                    "check that both are inspections of the same floor")


def test_pitch_matching_coordinates_is_accepted():
    check_pitch_matches(_disc(pitch=100.0))


def test_header_pitch_half_the_spacing_is_refused():
    with pytest.raises(InputError, match=r"^new\.csv: field 'pitch': the header gives 100 mm but the scanned cells "
                       r"lie every 200 mm in x and 200 mm in y \(the grid would be at most 25 % filled\)"):
        check_pitch_matches(_disc(pitch=100.0, step=2))


def test_header_pitch_in_inches_is_named_in_inches():
    s = _disc(pitch=25.4, diameter_mm=1000.0, units="in", step=3)
    with pytest.raises(InputError, match=r"gives 1 in but the scanned cells lie every 3 in in x and 3 in in y"):
        check_pitch_matches(s)


def _zones(t_min, mrt, flags=""):
    return pd.DataFrame({"zone": ["interior"], "t_min_mm": [t_min], "mrt_mm": [mrt], "flags": [flags]})


def test_patches_line_never_says_none_needed_below_mrt():
    assert patches_line(0, 0.0, _zones(4.0, 2.54)) == "proposed patch plates: none needed for the target interval"
    line = patches_line(0, 0.0, _zones(1.4, 2.54), _zones(1.4, 2.54))
    assert line == ("proposed patch plates: none, but zones below MRT: interior; repair before return to "
                    "service (see the notes)")
    assert "interior" in patches_line(0, 0.0, _zones(3.0, 2.54, "below-mrt"))
    line = patches_line(2, 0.5, _zones(1.4, 2.54), _zones(1.4, 2.54))
    assert line.endswith("zones still below MRT after them: interior")
    assert patches_line(2, 0.5, _zones(1.4, 2.54), _zones(6.0, 2.54)).endswith("(patches.csv, patches.dxf)")


def test_check_job_against_scans_resolves_and_checks():
    from scananalyse.job import Job

    new, old = _disc(), _disc(tank="TK-08", source="old.csv")
    job, warns = check_job_against_scans(Job(length_units="in").with_lengths(units="in", diameter=315.0), new, old)
    assert job.diameter == pytest.approx(8001.0)
    assert len(warns) == 1 and warns[0].startswith("the two scans name different tanks")
    # 315 mm is not a tank: refused by its range, with the likely unit
    with pytest.raises(InputError, match=r"^--diameter: must be between 1000 and 200000 mm, got 315 "
                       r"\(315 looks like inches: 315 in = 8001 mm\)$"):
        check_job_against_scans(Job().with_lengths(diameter=315.0), new)
    # 6000 mm on an 8 m floor: refused by the shell
    with pytest.raises(InputError, match=r"^--diameter: \d+ of \d+ scanned cells of new\.csv lie outside"):
        check_job_against_scans(Job().with_lengths(diameter=6000.0), new)
    with pytest.raises(InputError, match=r"^old\.csv: field 'pitch'"):
        check_job_against_scans(Job(diameter=8000.0), new, _disc(step=2, source="old.csv"))
    _, warns = check_job_against_scans(Job(diameter=20000.0), new)
    assert len(warns) == 1 and "lies far beyond every scanned cell" in warns[0]


def test_no_patches_text_for_the_report():
    assert no_patches_text(_zones(4.0, 2.54), _zones(4.0, 2.54)) == "no patch plates needed"
    assert no_patches_text(_zones(1.4, 2.54)) == ("no patch plates proposed, but zones below MRT: interior; "
                                                  "repair before return to service")
