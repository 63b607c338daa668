"""Job files: TOML only, every key and type checked, paths kept inside the job's folder."""

import pytest

from scananalyse.errors import InputError
from scananalyse.job import Job, read_job


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
