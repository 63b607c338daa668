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
diameter = 8000
annular_width = 600
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
    assert job.diameter == 8000.0 and job.annular_width == 600.0 and job.centre == (10.0, -5.0)
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
