"""End-to-end through the CLI (``main([...])``): every command, exit codes, no tracebacks."""

import hashlib
import re
import json
import os

import numpy as np
import pandas as pd
import pytest

from scananalyse.cli import main

ZONE_COLUMNS = ["zone", "area_m2", "coverage_pct", "t_min_mm", "depth_max_mm", "depth_eva_mm",
                "depth_eva_upper_mm", "rate_top_max_mm_y", "rate_under_max_mm_y", "mrt_mm",
                "interval_code_y", "life_local_y", "interval_recommended_y", "next_due", "limiting", "flags"]
PATCH_COLUMNS = ["patch", "zone", "x_min_mm", "y_min_mm", "x_max_mm", "y_max_mm", "corner_radius_mm",
                 "thickness_mm", "area_m2", "mass_kg", "flags"]


def _sha(path):
    with open(path, "rb") as f:
        return hashlib.sha256(f.read()).hexdigest()


def test_version_and_help(capsys):
    assert main(["--version"]) == 0
    assert "scananalyse" in capsys.readouterr().out
    for cmd in ("check", "convert", "register", "compare", "assess", "demo", "fleet"):
        assert main([cmd, "--help"]) == 0
        assert "usage" in capsys.readouterr().out


def test_check_prints_summary(small_pair_files, capsys):
    assert main(["check", small_pair_files["new_csv"]]) == 0
    out = capsys.readouterr().out
    assert "valid floor-scan file" in out and "SYN-E2E" in out and "20 mm pitch" in out
    assert "x -2.000 to 2.000 m" in out and " m2 (" in out and "threshold 1.00 mm, sigma 0.10 mm" in out


def test_convert_round_trip_and_refuses_overwrite(small_pair_files, tmp_path, capsys):
    h5 = tmp_path / "a.h5"
    csv = tmp_path / "b.csv"
    assert main(["convert", small_pair_files["new_csv"], str(h5)]) == 0
    assert main(["convert", str(h5), str(csv)]) == 0
    from scananalyse.io import read_scan

    a, b = read_scan(small_pair_files["new_csv"]), read_scan(csv)
    assert a.same_grid(b)
    assert (pd.isna(a.thickness) == pd.isna(b.thickness)).all()
    capsys.readouterr()
    assert main(["convert", small_pair_files["new_csv"], str(h5)]) == 2
    assert "exists" in capsys.readouterr().err


def test_compare_writes_every_output(small_pair_files, tmp_path, capsys):
    out = tmp_path / "cmp"
    before = {k: _sha(v) for k, v in small_pair_files.items() if isinstance(v, str) and os.path.isfile(v)}
    rc = main(["compare", small_pair_files["old_h5"], small_pair_files["new_h5"], "--diameter", "4000",
               "--out", str(out), "--quiet"])
    assert rc == 0
    console = capsys.readouterr().out
    assert "per zone" in console and "report:" in console and "authorised inspector" in console
    assert console.splitlines()[0].endswith("tank SYN-E2E, diameter 4000 mm")
    for f in ("zones.csv", "zones_repaired.csv", "patches.csv", "patches.dxf", "indications.csv",
              "registration.json", "results.h5", "report.html"):
        assert (out / f).is_file(), f
    assert list((out / "figures").glob("*.png"))
    zones = pd.read_csv(out / "zones.csv")
    assert list(zones.columns[: len(ZONE_COLUMNS)]) == ZONE_COLUMNS
    assert set(zones["zone"]) >= {"critical", "interior"}
    assert list(pd.read_csv(out / "patches.csv").columns[: len(PATCH_COLUMNS)]) == PATCH_COLUMNS
    ind = pd.read_csv(out / "indications.csv")
    # status against the older scan (design contract §3.5), plus older regions not found now
    assert set(ind["status"]) <= {"new", "grown", "stable", "not found", "repaired", "partly unscanned"} and (ind["status"] == "new").any()
    gone = ind[ind["status"] == "not found"]
    assert gone["old_id"].notna().all() and gone["depth_max_mm"].isna().all()
    reg = json.loads((out / "registration.json").read_text())
    for k in ("dx_mm", "dy_mm", "rotation_deg", "score", "overlap_pct"):
        assert k in reg
    truth = small_pair_files["pair"].truth
    # registration contract (design §3.3): the known synthetic transform comes back
    assert abs(reg["rotation_deg"] - truth.rotation_deg) < 0.05
    assert abs(reg["dx_mm"] - truth.dx_mm) < 6 and abs(reg["dy_mm"] - truth.dy_mm) < 6
    # inputs never modified
    after = {k: _sha(v) for k, v in small_pair_files.items() if isinstance(v, str) and os.path.isfile(v)}
    assert before == after


def test_compare_bad_input_is_one_line_exit_2_and_no_folder(small_pair_files, tmp_path, capsys):
    bad = tmp_path / "bad.csv"
    with open(small_pair_files["new_csv"]) as f:
        text = f.read()
    text, n = re.subn(r"(?m)^# pitch: .*$", "# pitch: -20", text)
    assert n == 1
    bad.write_text(text)
    out = tmp_path / "cmp"
    rc = main(["compare", small_pair_files["old_csv"], str(bad), "--diameter", "4000", "--out", str(out), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2
    assert err.count("\n") == 1 and "bad.csv" in err and "pitch" in err and "Traceback" not in err
    assert not out.exists() and not [p for p in tmp_path.iterdir() if p.name.startswith(".cmp")]


def test_compare_requires_diameter_and_fresh_folder(small_pair_files, tmp_path, capsys):
    out = tmp_path / "x"
    assert main(["compare", small_pair_files["old_h5"], small_pair_files["new_h5"], "--out", str(out)]) == 2
    assert "--diameter" in capsys.readouterr().err
    out.mkdir()
    assert main(["compare", small_pair_files["old_h5"], small_pair_files["new_h5"], "--diameter", "4000",
                 "--out", str(out), "--quiet"]) == 2
    assert "use --force" in capsys.readouterr().err


def test_older_and_newer_swapped_is_refused(small_pair_files, tmp_path, capsys):
    rc = main(["compare", small_pair_files["new_h5"], small_pair_files["old_h5"], "--diameter", "4000",
               "--out", str(tmp_path / "o"), "--quiet"])
    assert rc == 2 and "must be inspected after" in capsys.readouterr().err


def test_register_command(small_pair_files, tmp_path, capsys):
    out = tmp_path / "reg"
    assert main(["register", small_pair_files["old_csv"], small_pair_files["new_csv"], "--out", str(out),
                 "--quiet"]) == 0
    reg = json.loads((out / "registration.json").read_text())
    assert abs(reg["rotation_deg"] - small_pair_files["pair"].truth.rotation_deg) < 0.05
    printed = capsys.readouterr().out
    m = re.search(r"shift \((\S+), (\S+)\) mm, .* residual RMS (\S+) mm", printed)  # --units mm, the default
    assert [float(v) for v in m.groups()] == pytest.approx([reg["dx_mm"], reg["dy_mm"], reg["residual_rms_mm"]],
                                                           abs=0.051)


def test_assess_single_inspection(small_pair_files, tmp_path, capsys):
    out = tmp_path / "one"
    assert main(["assess", small_pair_files["new_h5"], "--diameter", "4000", "--out", str(out), "--quiet"]) == 0
    assert not (out / "registration.json").exists()
    zones = pd.read_csv(out / "zones.csv")
    scanned = zones[zones["coverage_pct"] > 0]
    assert len(scanned) and scanned["flags"].fillna("").str.contains("no-short-term-rates").all()
    html = (out / "report.html").read_text()
    assert "long-term" in html.lower()
    assert "one inspection" in capsys.readouterr().out


def test_units_in_display(small_pair_files, inch_compare_run, tmp_path):
    # --units states the units of the options too: 157.48 in = 4000 mm (the run is shared with
    # test_inch_display.py)
    out = inch_compare_run["out"]
    assert inch_compare_run["code"] == 0
    assert "thickness in" in inch_compare_run["console"]
    # files keep SI columns whatever the display units
    assert "t_min_mm" in pd.read_csv(out / "zones.csv").columns
    assert "t_min_in" not in pd.read_csv(out / "zones.csv").columns
    # --csv-units in adds inch and mils-per-year columns beside the SI ones (1 in = 25.4 mm exactly,
    # NIST SP 811 B.8); the SI columns keep their order and values
    out2 = tmp_path / "inch_csv"
    assert main(["compare", small_pair_files["old_h5"], small_pair_files["new_h5"], "--diameter", "157.48",
                 "--out", str(out2), "--quiet", "--units", "in", "--csv-units", "in"]) == 0
    for f in ("zones.csv", "indications.csv", "patches.csv"):
        a, b = pd.read_csv(out / f), pd.read_csv(out2 / f)
        si = [c for c in b.columns if not (c.endswith("_in") or c.endswith("_mpy"))]
        assert si == list(a.columns)
        pd.testing.assert_frame_equal(b[si], a, check_dtype=False)
        mm = [c for c in a.columns if c.endswith("_mm") and pd.api.types.is_numeric_dtype(a[c])]
        assert mm, f
        for c in mm:
            np.testing.assert_allclose(b[c[:-3] + "_in"], a[c] / 25.4, atol=6e-5)
            assert list(b.columns).index(c[:-3] + "_in") == list(b.columns).index(c) + 1
    z = pd.read_csv(out2 / "zones.csv")
    np.testing.assert_allclose(z["rate_top_max_mpy"], z["rate_top_max_mm_y"] / 0.0254, atol=6e-3)


def test_internal_fault_is_exit_1_without_traceback(monkeypatch, small_pair_files, capsys):
    import scananalyse.io as sio

    def boom(path):
        raise RuntimeError("simulated fault")

    monkeypatch.setattr(sio, "read_scan", boom)
    assert main(["check", small_pair_files["new_csv"]]) == 1
    err = capsys.readouterr().err
    assert "internal error" in err and "Traceback" not in err


def test_engineers_own_patches_are_checked_and_used(small_pair_files, tmp_path, capsys):
    # Design contract §3.4: --patches re-assesses with exactly the engineer's patch set, checking
    # each against the patch rules (domain.md §6) and counting cells no patch covers.
    first = tmp_path / "first"
    assert main(["compare", small_pair_files["old_h5"], small_pair_files["new_h5"], "--diameter", "4000",
                 "--out", str(first), "--quiet"]) == 0
    proposed = pd.read_csv(first / "patches.csv")
    assert len(proposed) >= 2
    mine = proposed.copy()
    # shrink the first patch to 100 mm square around its centre: below every minimum size
    cx = (mine.loc[0, "x_min_mm"] + mine.loc[0, "x_max_mm"]) / 2
    cy = (mine.loc[0, "y_min_mm"] + mine.loc[0, "y_max_mm"]) / 2
    mine.loc[0, ["x_min_mm", "x_max_mm", "y_min_mm", "y_max_mm"]] = [cx - 50, cx + 50, cy - 50, cy + 50]
    mine.loc[0, "corner_radius_mm"] = 20.0
    mine.loc[0, "area_m2"] = 0.01
    mine = mine.drop(index=len(mine) - 1)  # and leave one area unpatched
    own = tmp_path / "mine.csv"
    mine.to_csv(own, index=False)
    capsys.readouterr()
    second = tmp_path / "second"
    assert main(["compare", small_pair_files["old_h5"], small_pair_files["new_h5"], "--diameter", "4000",
                 "--out", str(second), "--quiet", "--patches", str(own)]) == 0
    out = capsys.readouterr().out
    got = pd.read_csv(second / "patches.csv")
    assert list(got["patch"]) == list(mine["patch"])
    flags0 = str(got.loc[0, "flags"])
    assert "too-small" in flags0 or "not-beyond-corrosion" in flags0
    assert "break a patch rule" in out
    html = (second / "report.html").read_text()
    assert "not covered by any patch" in html


# --- options checked at the start, one line (issues 22 and 23) ------------------------------------
def _one_line_error(capsys):
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err, err
    return err


@pytest.fixture
def dummy_scans(tmp_path):
    """Two placeholder files: the refusals below come before any scan is read."""
    for n in ("old.csv", "new.csv"):
        (tmp_path / n).write_text("x\n")
    return str(tmp_path / "old.csv"), str(tmp_path / "new.csv")


@pytest.mark.parametrize("extra, match", [
    (["--diameter", "-8000"], r"argument --diameter: must be > 0, got -8000"),
    (["--diameter", "nan"], r"argument --diameter: not a finite number, got 'nan'"),
    (["--diameter", "1e308"], r"^scananalyse: error: --diameter: must be between 1000 and 200000 mm "
                              r"\(or 39\.37 to 7874 in\), got 1e\+308$"),
    (["--diameter", "8000", "--units", "in"], r"--diameter: must be between 39\.37 and 7874 in, got 8000 \(8000 looks like millimetres\)$"),
    (["--diameter", "8000", "--repair-to", "300"], r"--repair-to: must be between 0\.1 and 50 mm"),
    (["--diameter", "8000", "--target-interval", "100"], r"--target-interval: must be between 0\.5 and 30 y"),
    (["--diameter", "8000", "--ruleset", "nope"], r"--ruleset: unknown rule set 'nope'"),
    (["--diameter", "8000", "--job", "/dev/zero"], r"argument --job: '/dev/zero' is a character device, not a regular file"),
])
def test_bad_options_are_refused_at_the_start(dummy_scans, tmp_path, capsys, extra, match):
    out = tmp_path / "out"
    assert main(["compare", *dummy_scans, "--out", str(out), "--quiet", *extra]) == 2
    assert re.search(match, _one_line_error(capsys).strip())
    assert not out.exists()


def test_fifo_scan_or_job_is_refused_not_waited_on(dummy_scans, tmp_path, capsys):
    fifo = tmp_path / "pipe.csv"
    os.mkfifo(fifo)
    assert main(["check", str(fifo)]) == 2
    assert re.search(r"argument file: '.*pipe\.csv' is a FIFO \(named pipe\), not a regular file",
                     _one_line_error(capsys))
    assert main(["compare", dummy_scans[0], str(fifo), "--diameter", "8000", "--out", str(tmp_path / "o")]) == 2
    assert "pipe.csv' is a FIFO" in _one_line_error(capsys)
    assert main(["compare", *dummy_scans, "--diameter", "8000", "--out", str(tmp_path / "o"), "--job", str(fifo)]) == 2
    assert "pipe.csv' is a FIFO" in _one_line_error(capsys)
    assert main(["assess", str(tmp_path), "--diameter", "8000", "--out", str(tmp_path / "o")]) == 2
    assert "is a folder, not a regular file" in _one_line_error(capsys)


@pytest.mark.parametrize("extra, match", [
    (["--workers", "-1"], r"argument --workers: must be >= 1, got -1"),
    (["--workers", "two"], r"argument --workers: expected a whole number, got 'two'"),
    (["--timeout", "-1"], r"argument --timeout: must be > 0, got -1"),
])
def test_fleet_options_refused_at_the_start(tmp_path, capsys, extra, match):
    man = tmp_path / "fleet.csv"
    man.write_text("tank,old,new,diameter\n")
    assert main(["fleet", str(man), "--out", str(tmp_path / "o"), *extra]) == 2
    assert re.search(match, _one_line_error(capsys))


def test_nul_in_a_path_is_refused(tmp_path, capsys):
    assert main(["check", "a\0b.csv"]) == 2
    assert "the path contains a NUL character" in _one_line_error(capsys)


def _job(argv):
    from scananalyse.cli import _job_from_args, build_parser
    from scananalyse.job import resolve_units

    args = build_parser().parse_args(argv)
    return _job_from_args(args), resolve_units


def test_every_length_option_is_read_in_units(dummy_scans):
    # issue 23: "--units in --repair-to 0.15" was read as millimetres
    job, resolve = _job(["compare", *dummy_scans, "--out", "o", "--units", "in", "--diameter", "315",
                         "--repair-to", "0.15", "--patch-thickness", "0.25", "--annular-width", "24"])
    assert job.units == "in" and job.repair_to_mm == pytest.approx(3.81)
    r = resolve(job, "mm")
    assert r.diameter == pytest.approx(8001.0) and r.annular_width == pytest.approx(609.6)
    assert r.repair_to_mm == pytest.approx(3.81) and r.patch_thickness_mm == pytest.approx(6.35)


def test_lengths_default_to_the_scans_units(dummy_scans):
    job, resolve = _job(["compare", *dummy_scans, "--out", "o", "--diameter", "315", "--repair-to", "0.15"])
    assert job.units == "mm"  # display default unchanged
    r = resolve(job, "in")
    assert r.diameter == 315.0 and r.repair_to_mm == pytest.approx(3.81)


def test_units_option_applies_to_a_job_file_without_units(dummy_scans, tmp_path):
    jf = tmp_path / "job.toml"
    jf.write_text("[floor]\ndiameter = 315\n[repair]\nrepair_to = 0.15\n")
    job, resolve = _job(["compare", *dummy_scans, "--out", "o", "--job", str(jf), "--units", "in"])
    r = resolve(job, "mm")
    assert r.diameter == pytest.approx(8001.0) and r.repair_to_mm == pytest.approx(3.81)
    # a job file stating its units keeps them whatever --units says for display and the options
    jf.write_text("[report]\nunits = \"in\"\n[floor]\ndiameter = 315\n")
    job, resolve = _job(["compare", *dummy_scans, "--out", "o", "--job", str(jf), "--units", "mm",
                         "--repair-to", "3.81"])
    r = resolve(job, "mm")
    assert job.units == "mm" and r.diameter == pytest.approx(8001.0) and r.repair_to_mm == pytest.approx(3.81)
    assert r.where("diameter").endswith("job.toml: field 'floor.diameter'") and r.where("repair_to") == "--repair-to"


def test_console_code_interval_below_zero_and_pdf_skip_message(monkeypatch, tmp_path):
    # the code formula goes negative once the metal is below MRT: the console says "<0"
    # (zones.csv keeps the formula's value)
    import numpy as np

    from scananalyse.report.pdf import write_pdf
    from scananalyse.runner import _fmt_code

    assert _fmt_code(np.float64(-3.3)) == "<0" and _fmt_code(2.54) == "2.5" and _fmt_code(np.nan) == "-"
    # a PDF skipped on purpose says why, not that no browser exists
    monkeypatch.setenv("SCANANALYSE_BROWSER", "none")
    msg = write_pdf(tmp_path / "r.html", tmp_path / "r.pdf")
    assert "SCANANALYSE_BROWSER='none'" in msg and not (tmp_path / "r.pdf").exists()
