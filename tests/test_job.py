"""Job files: TOML only, every key and type checked, paths kept inside the job's folder."""

import os

import pytest

from scananalyse.errors import InputError
from scananalyse.job import Job, read_job, resolve_units


def _write(tmp_path, text, name="job.toml"):
    p = tmp_path / name
    p.write_text(text)
    return p


def test_full_job_reads(tmp_path):
    (tmp_path / "sides.csv").write_text("x")
    p = _write(tmp_path, """
[floor]
diameter = 315
annular_width = 24
centre = [10, -5]
[protection]
leak_detection = true
cp_effective = false
coating_life_years = 7
[attribution]
shapes = "sides.csv"
default_side = "top"
[repair]
target_interval = 15
repair_to = 0
[rules]
name = "api653"
[rules.overrides]
interval_cap_y = 15
[report]
units = "in"
""")
    job = read_job(p)
    # report.units states the units of the file's lengths too
    assert job.diameter == 315.0 and job.annular_width == 24.0 and job.centre == (10.0, -5.0)
    assert job.length_units == "in"
    assert job.leak_detection is True and job.coating_life_years == 7.0
    assert job.shapes == str((tmp_path / "sides.csv").resolve())
    assert job.default_side == "top" and job.target_interval == 15.0
    assert job.repair_to_mm is None  # 0 means "plan from rates"
    assert job.rule_overrides == {"interval_cap_y": 15}
    assert job.units == "in" and job.source == str(p)


@pytest.mark.parametrize("text, match", [
    ("[floor]\ndiameterr = 5\n", r"job\.toml: field 'floor\.diameterr': unknown key"),
    ("[floor]\ndiameter = \"big\"\n", r"field 'floor\.diameter': expected int/float, got str"),
    ("[protection]\ncp_effective = 1\n", r"field 'protection\.cp_effective': expected bool"),
    ("[floor]\ndiameter = true\n", r"field 'floor\.diameter': expected a number"),
    ("[floor]\ndiameter = -3\n", r"field 'floor\.diameter': must be positive"),
    ("[floor]\ncentre = [1]\n", r"field 'floor\.centre': expected two numbers"),
    ("[attribution]\ndefault_side = \"left\"\n", r"field 'attribution\.default_side'"),
    ("[report]\nunits = \"cm\"\n", r"field 'report\.units'"),
    ("floor = 3\n", r"field 'floor': expected a \[floor\] table"),
    ("[floor\n", r"job\.toml: not valid TOML"),
    ("[attribution]\nshapes = \"../outside.csv\"\n", r"field 'attribution\.shapes': path '\.\./outside\.csv' escapes"),
    ("[attribution]\nshapes = \"/etc/passwd\"\n", r"field 'attribution\.shapes': absolute path"),
])
def test_bad_jobs_name_file_and_field(tmp_path, text, match):
    p = _write(tmp_path, text)
    with pytest.raises(InputError, match=match) as info:
        read_job(p)
    assert "\n" not in str(info.value)


def test_absolute_paths_allowed_by_option(tmp_path):
    other = tmp_path / "elsewhere.csv"
    other.write_text("x")
    sub = tmp_path / "jobs"
    sub.mkdir()
    p = _write(sub, f"[paths]\nallow_absolute = true\n[attribution]\nshapes = \"{other}\"\n")
    assert read_job(p).shapes == str(other)


def test_non_utf8_job(tmp_path):
    p = tmp_path / "job.toml"
    p.write_bytes(b"[floor]\ndiameter = 5 # \xff\xfe\n")
    with pytest.raises(InputError, match=r"job\.toml: not UTF-8"):
        read_job(p)


def test_missing_job_file(tmp_path):
    with pytest.raises(InputError, match=r"nope\.toml: cannot read job file"):
        read_job(tmp_path / "nope.toml")


def test_job_defaults_are_the_documented_ones():
    job = Job()
    # Defaults stated in docs and domain notes: unattributed loss is underside (domain.md §2),
    # target interval 10 years (design contract §3.4).
    assert job.default_side == "under" and job.target_interval == 10.0 and job.units == "mm"


def test_user_zones_reach_the_zone_table(tmp_path):
    # A ring x sector grid and a polygon from the job file become zones of their own.
    from scananalyse.pipeline import analyse
    from scananalyse.synth import make_pair

    p = _write(tmp_path, """
[floor]
diameter = 4000
[zones]
rings = 2
sectors = 2
polygons = [{name = "draw-off", points = [[-1500, -400], [-800, -400], [-800, 300], [-1500, 300]]}]
""")
    job = read_job(p)
    assert job.zone_rings == 2 and job.zone_polygons[0][0] == "draw-off"
    pair = make_pair(diameter_mm=4000.0, pitch_new=20.0, pitch_old=25.0, seed=4)
    an = analyse(pair.new, None, job=job)
    names = list(an.zone_table["zone"])
    assert {"critical", "draw-off", "r1s1", "r1s2", "r2s1", "r2s2"} <= set(names)
    poly = an.zone_table.set_index("zone").loc["draw-off", "area_m2"]
    assert poly == pytest.approx(0.7 * 0.7, rel=0.05)  # 700 mm x 700 mm square, cell-counted


@pytest.mark.parametrize("text, match", [
    ("[zones]\nrings = 2\n", r"give both zones\.rings and zones\.sectors"),
    ("[zones]\nrings = 0\nsectors = 2\n", r"field 'zones\.rings': must be between 1 and 100"),
    ("[zones]\npolygons = [{name = \"a\", points = [[0, 0], [1, 1]]}]\n", r"zones\.polygons\[1\]'.*at least 3"),
    ("[zones]\npolygons = [{name = \"a\", points = [[0, 0], [1, \"x\"], [2, 2]]}]\n", r"zones\.polygons\[1\]'.*numbers"),
])
def test_bad_user_zones(tmp_path, text, match):
    with pytest.raises(InputError, match=match):
        read_job(_write(tmp_path, text))


# --- values checked when the job is read (issue 22) ------------------------------------------
@pytest.mark.parametrize("text, match", [
    ("[statistics]\nseed = -1\n", r"job\.toml: field 'statistics\.seed': must be between 0 and 4294967295, got -1$"),
    ("[statistics]\nseed = 4294967296\n", r"field 'statistics\.seed': must be between"),
    ("[floor]\ndiameter = 1e308\n", r"job\.toml: field 'floor\.diameter': must be between 1000 and 200000 mm "
                                    r"\(or 39\.37 to 7874 in\), got 1e\+308$"),
    ("[report]\nunits = \"mm\"\n[floor]\ndiameter = 315\n", r"field 'floor\.diameter': must be between 1000 and "
                                                          r"200000 mm, got 315 \(315 looks like inches: 315 in = 8001 mm\)$"),
    ("[statistics]\nblock_mm = 1e-6\n", r"field 'statistics\.block_mm': must be between 100 and 10000 mm, got 1e-06$"),
    ("[repair]\ntarget_interval = 100\n", r"field 'repair\.target_interval': must be between 0\.5 and 30 y"),
    ("[repair]\ntarget_interval = 0\n", r"field 'repair\.target_interval': must be positive"),
    ("[repair]\nrepair_to = 900\n", r"field 'repair\.repair_to': must be between"),
    ("[floor]\ncentre = [1e9, 0]\n", r"field 'floor\.centre': must be between"),
    ("[zones]\npolygons = [{name = \"a\", points = [[0, 0], [1e12, 0], [0, 1]]}]\n",
     r"field 'zones\.polygons': must be between"),
    ("[rules]\nname = \"nope\"\n", r"job\.toml: field 'rules\.name': unknown rule set 'nope'"),
    ("[rules.overrides]\ninterval_cap_y = -3\n", r"job\.toml: field 'rules\.overrides\.interval_cap_y': must be"),
    ("[attribution]\nshapes = \"a\\u0000b.csv\"\n", r"field 'attribution\.shapes': contains a NUL character"),
    ("a = " + "[" * 100_000 + "\n", r"job\.toml: not valid TOML \(arrays or tables nested too deeply\)$"),
])
def test_job_values_checked_when_read(tmp_path, text, match):
    with pytest.raises(InputError, match=match) as info:
        read_job(_write(tmp_path, text))
    assert "\n" not in str(info.value)


def test_job_file_must_be_a_small_regular_file(tmp_path):
    big = _write(tmp_path, "# " + "x" * 1_000_001 + "\n", name="big.toml")
    with pytest.raises(InputError, match=r"big\.toml: job file of 1000004 bytes is larger than the 1000000 allowed"):
        read_job(big)
    with pytest.raises(InputError, match=r"/dev/zero: the job file is a character device, not a regular file"):
        read_job("/dev/zero")
    with pytest.raises(InputError, match=r": the job file is a folder, not a regular file"):
        read_job(tmp_path)


def test_fifo_job_file_is_refused_not_waited_on(tmp_path):
    fifo = tmp_path / "job.toml"
    os.mkfifo(fifo)
    with pytest.raises(InputError, match=r"job\.toml: the job file is a FIFO \(named pipe\), not a regular file"):
        read_job(fifo)


def test_paths_in_a_job_must_be_regular_files(tmp_path):
    os.mkfifo(tmp_path / "pipe.csv")
    (tmp_path / "dir.csv").mkdir()
    with pytest.raises(InputError, match=r"job\.toml: field 'attribution\.shapes': '.*pipe\.csv' is a FIFO "
                       r"\(named pipe\), not a regular file$"):
        read_job(_write(tmp_path, "[attribution]\nshapes = \"pipe.csv\"\n"))
    with pytest.raises(InputError, match=r"field 'repair\.patches': '.*dir\.csv' is a folder, not a regular file$"):
        read_job(_write(tmp_path, "[repair]\npatches = \"dir.csv\"\n"))


# --- length units --------------------------------------------------------------------------------
def test_lengths_without_units_follow_the_scans():
    job = Job(diameter=315.0).with_lengths(repair_to=0.15)
    assert resolve_units(job, "in").diameter == 315.0
    r = resolve_units(job, "in")
    assert r.repair_to_mm == pytest.approx(3.81) and r.typed["repair_to"] == (0.15, "in")
    m = resolve_units(Job(diameter=8000.0).with_lengths(repair_to=3.0), "mm")
    assert m.diameter == 8000.0 and m.repair_to_mm == 3.0


def test_lengths_in_inches_on_millimetre_scans():
    job = Job(length_units="in").with_lengths(diameter=315.0, annular_width=24.0, repair_to=0.15,
                                              patch_thickness=0.25)
    assert job.repair_to_mm == pytest.approx(3.81)  # provisional value already right when units are stated
    r = resolve_units(job, "mm")
    assert r.diameter == pytest.approx(8001.0) and r.annular_width == pytest.approx(609.6)
    assert r.repair_to_mm == pytest.approx(3.81) and r.patch_thickness_mm == pytest.approx(6.35)
    assert r.typed["diameter"] == (315.0, "in") and r.length_units == "mm"
    again = resolve_units(r, "mm")  # idempotent
    assert again.diameter == r.diameter and again.repair_to_mm == r.repair_to_mm and again.typed == r.typed


def test_polygons_and_centre_are_converted(tmp_path):
    job = read_job(_write(tmp_path, "[report]\nunits = \"in\"\n[floor]\ndiameter = 315\ncentre = [10, 0]\n"
                                    "[zones]\npolygons = [{name = \"a\", points = [[0, 0], [10, 0], [0, 10]]}]\n"))
    r = resolve_units(job, "mm")
    assert r.centre == pytest.approx((254.0, 0.0))
    assert r.zone_polygons[0][1][1] == pytest.approx((254.0, 0.0))


def test_resolved_lengths_are_range_checked_naming_the_origin(tmp_path):
    job = read_job(_write(tmp_path, "[floor]\ndiameter = 100\n"))  # fine as inches, not as mm
    assert resolve_units(job, "in").diameter == 100.0
    with pytest.raises(InputError, match=r"job\.toml: field 'floor\.diameter': must be between 1000 and 200000 mm, "
                       r"got 100 \(100 looks like inches: 100 in = 2540 mm\)$"):
        resolve_units(job, "mm")
    with pytest.raises(InputError, match=r"^--annular-width: an annular ring width of 5000 mm is not less than the "
                       r"tank's radius \(4000 mm\)$"):
        resolve_units(Job(diameter=8000.0).with_lengths(annular_width=5000.0), "mm")


def test_with_lengths_checks_ranges():
    with pytest.raises(InputError, match=r"^--diameter: must be between 39\.37 and 7874 in, got 10000 \(10000 looks like millimetres\)$"):
        Job().with_lengths(units="in", diameter=10000.0)
    with pytest.raises(InputError, match=r"^--repair-to: must be between 0\.1 and 50 mm \(or 0\.003937 to 1\.969 "
                       r"in\), got 1000$"):
        Job().with_lengths(repair_to=1000.0)


def test_a_value_in_the_scans_units_whatever_the_job_says(tmp_path):
    # a fleet manifest's diameter is in the scans' units even when the job file gives report.units
    from scananalyse.job import SCAN_UNITS

    job = read_job(_write(tmp_path, "[report]\nunits = \"in\"\n[repair]\nrepair_to = 0.15\n"))
    job = job.with_lengths(units=SCAN_UNITS, diameter=8000.0, where={"diameter": "fleet.csv:2: field 'diameter'"})
    r = resolve_units(job, "mm")
    assert r.diameter == 8000.0 and r.repair_to_mm == pytest.approx(3.81)
    assert r.where("diameter") == "fleet.csv:2: field 'diameter'"
