"""Fleet runs on a real Dask LocalCluster (two worker processes on loopback)."""


import numpy as np
import pandas as pd
import pytest

from scananalyse.errors import InputError
from scananalyse.fleet import rank_fleet, read_manifest, run_fleet


@pytest.fixture(scope="module")
def fleet_dir(tmp_path_factory):
    from scananalyse.io import write_scan
    from scananalyse.synth import make_pair

    d = tmp_path_factory.mktemp("fleet")
    rows = ["tank,old,new,diameter"]
    for i, (tank, seed) in enumerate([("TK-A", 1), ("TK-B", 2)]):
        pair = make_pair(diameter_mm=4000.0, pitch_new=20.0, pitch_old=25.0, seed=seed, tank=tank,
                         rotation_deg=1.0, shift_mm=(30.0, 20.0))
        (d / tank).mkdir()
        write_scan(pair.old, d / tank / "old.h5")
        write_scan(pair.new, d / tank / "new.h5")
        rows.append(f"{tank},{tank}/old.h5,{tank}/new.h5,4000")
    (d / "TK-BAD").mkdir()
    (d / "TK-BAD" / "new.csv").write_text("# format: scananalyse-scan 1\n# inspected: 2024-13-45\n# units: mm\n"
                                          "# pitch: 20\n# nominal: 6.35\nx,y,thickness\n0,0,6.3\n")
    rows.append("TK-BAD,TK-A/old.h5,TK-BAD/new.csv,4000")
    (d / "manifest.csv").write_text("\n".join(rows) + "\n")
    return d


def test_fleet_on_local_cluster_ranks_and_survives_a_bad_tank(fleet_dir, tmp_path):
    out = tmp_path / "fleet"
    res = run_fleet(fleet_dir / "manifest.csv", out_dir=out, workers=2, quiet=True, raise_on_failure=False)
    df = pd.read_csv(out / "fleet.csv")
    assert len(df) == 3 and list(df["rank"]) == [1, 2, 3]
    bad = df[df["tank"] == "TK-BAD"].iloc[0]
    # a tank that fails is one row with its error, listed first (needs attention)
    assert bad["status"] == "error" and "new.csv" in bad["error"] and "inspected" in bad["error"]
    assert df.iloc[0]["tank"] == "TK-BAD"
    good = df[df["status"] == "ok"]
    assert set(good["tank"]) == {"TK-A", "TK-B"}
    # most urgent first: recommended interval ascending among the assessed tanks
    assert list(good["interval_recommended_y"]) == sorted(good["interval_recommended_y"])
    for r in good.itertuples():
        assert (out / r.report).is_file()
        z = pd.read_csv(out / r.tank / "zones.csv")
        assert r.interval_recommended_y == pytest.approx(z["interval_recommended_y"].min())
    html = (out / "fleet.html").read_text()
    assert 'href="TK-A/report.html"' in html and "authorised inspector" in html
    assert "most urgent" in res["summary"]

    assert "display units mm, mm/y, m²" in html

    # a rerun keeps complete results; through the command line, the page in inches (exit 2: TK-BAD failed)
    from scananalyse.cli import main

    assert main(["fleet", str(fleet_dir / "manifest.csv"), "--out", str(out), "--workers", "2", "--quiet",
                 "--units", "in"]) == 2
    again = pd.read_csv(out / "fleet.csv")
    st = dict(zip(again["tank"], again["status"]))
    assert st["TK-A"] == "ok (kept)" and st["TK-B"] == "ok (kept)" and st["TK-BAD"] == "error"
    assert list(again.columns) == list(df.columns)  # the CSV keeps SI columns
    html = (out / "fleet.html").read_text()
    assert "display units in, mils, mpy, ft²" in html and "display units mm" not in html


def _manifest_refused(path, text, message):
    """The manifest ``text``, written to ``path``, is refused with ``message`` (a regular expression)."""
    path.write_text(text)
    with pytest.raises(InputError, match=message):
        read_manifest(path)


@pytest.mark.parametrize("text, message", [
    ("tank,old,diameter\nA,a.h5,3\n", r"m\.csv:1: field 'new': missing column"),
    ("tank,old,new,diameter\nA,a.h5,b.h5,wide\n", r"m\.csv:2: field 'diameter': not a number"),
    ("tank,old,new,diameter\nA,a.h5,b.h5,3\nA,c.h5,d.h5,3\n", r"m\.csv:3: field 'tank': 'A' repeats line 2"),
    ("tank,old,new,diameter\n", r"lists no tanks"),
])
def test_manifest_errors(tmp_path, text, message):
    _manifest_refused(tmp_path / "m.csv", text, message)


def test_ranking_order():
    rows = [
        {"tank": "slow", "status": "ok", "interval_recommended_y": 12.0, "below_mrt": False, "code_exceeds_local": False},
        {"tank": "fast", "status": "ok", "interval_recommended_y": 3.0, "below_mrt": False, "code_exceeds_local": True},
        {"tank": "tie-flagged", "status": "ok", "interval_recommended_y": 12.0, "below_mrt": True,
         "code_exceeds_local": False},
        {"tank": "broken", "status": "error", "error": "x"},
    ]
    df = rank_fleet(rows)
    assert list(df["tank"]) == ["broken", "fast", "tie-flagged", "slow"]


def test_fleet_time_limit_gives_rows_not_a_hang(fleet_dir, tmp_path):
    # A tank with no result within the limit becomes a row with status 'timeout'.
    res = run_fleet(fleet_dir / "manifest.csv", out_dir=tmp_path / "f", workers=1, quiet=True, timeout_s=0.01,
                    raise_on_failure=False)
    df = res["table"]
    assert len(df) == 3 and (df["status"] == "timeout").any()
    assert df[df["status"] == "timeout"]["error"].str.contains("no result within").all()
    assert (tmp_path / "f" / "fleet.csv").is_file()


# --------------------------------------------------------------------------- issue 22
def test_fleet_refuses_the_folder_of_the_scans(fleet_dir):
    # the folder holding the scans is not the fleet's: refused, even with --force, nothing touched
    from scananalyse.cli import main

    before = sorted(str(p.relative_to(fleet_dir)) for p in fleet_dir.rglob("*"))
    for extra in ([], ["--force"]):
        status = main(["fleet", str(fleet_dir / "manifest.csv"), "--out", str(fleet_dir), "--quiet"] + extra)
        assert status == 2
    assert sorted(str(p.relative_to(fleet_dir)) for p in fleet_dir.rglob("*")) == before


def test_fleet_folder_claim_and_lock(tmp_path):
    from scananalyse.fleet import FLEET_MARKER, claim_fleet_folder

    out, lock = claim_fleet_folder(tmp_path / "f")
    assert (out / FLEET_MARKER).is_file()
    with pytest.raises(InputError, match="another fleet run is writing this folder"):
        claim_fleet_folder(tmp_path / "f")
    lock.close()
    out2, lock2 = claim_fleet_folder(tmp_path / "f", force=True)  # its own earlier output
    lock2.close()
    (tmp_path / "user").mkdir()
    with pytest.raises(InputError, match="user: exists and is not a fleet output folder"):
        claim_fleet_folder(tmp_path / "user", force=True)
    assert list((tmp_path / "user").iterdir()) == []


def test_tank_folders_unique_and_not_the_fleet_files():
    from scananalyse.fleet import tank_folders

    names = tank_folders([{"tank": t} for t in ("TK 1", "TK_1", "tk_1", "fleet.csv", "..", "A")])
    assert names == ["TK_1", "TK_1-2", "tk_1-3", "fleet.csv-2", "tank", "A"]


def test_fleet_csv_neutralises_formulas(tmp_path):
    # a tank name that a spreadsheet would run as a formula reaches fleet.csv inert
    (tmp_path / "m.csv").write_text('tank,old,new,diameter\n"=HYPERLINK(""x"")",a.h5,b.h5,3000\n')
    run_fleet(tmp_path / "m.csv", out_dir=tmp_path / "out", workers=1, quiet=True, raise_on_failure=False)
    text = (tmp_path / "out" / "fleet.csv").read_text()
    assert "'=HYPERLINK" in text and ",=" not in text and "\n=" not in text


# --------------------------------------------------------------------------- issue 21
def test_manifest_absolute_and_sibling_paths_accepted(tmp_path):
    (tmp_path / "scans").mkdir()
    (tmp_path / "lists").mkdir()
    for f in ("a.h5", "b.h5"):
        (tmp_path / "scans" / f).write_bytes(b"x")
    m = tmp_path / "lists" / "m.csv"
    m.write_text(f"tank,old,new,diameter,service,cp\nA,../scans/a.h5,{tmp_path / 'scans' / 'b.h5'},3000,crude,Yes\n"
                 "B,,../scans/b.h5,3000,water,no\n")
    a, b = read_manifest(m)
    assert a["old"] == str(tmp_path / "scans" / "a.h5") and a["new"] == str(tmp_path / "scans" / "b.h5")
    assert a["groups"] == {"service": "crude", "cp": "yes"}
    assert b["old"] is None and b["groups"]["service"] == "water"
    _manifest_refused(m, "tank,old,new,diameter,cp\nA,,../scans/b.h5,3000,sometimes\n",
                      r"m\.csv:2: field 'cp': expected yes or no")
    _manifest_refused(m, "tank,old,new,diameter,status\nA,,../scans/b.h5,3000,x\n",
                      r"m\.csv:1: field 'status': a fleet\.csv column")


def test_manifest_fifo_row_refused(tmp_path):
    import os

    os.mkfifo(tmp_path / "pipe.h5")
    (tmp_path / "m.csv").write_text("tank,old,new,diameter\nA,,a.h5,3000\nB,,pipe.h5,3000\n")
    with pytest.raises(InputError, match=r"m\.csv:3: field 'new': .*pipe\.h5.* not a regular file"):
        read_manifest(tmp_path / "m.csv")
    from scananalyse.cli import main

    assert main(["fleet", str(tmp_path / "m.csv"), "--out", str(tmp_path / "o"), "--quiet"]) == 2


def test_missing_file_and_folder_are_error_rows_and_the_run_fails(fleet_dir, tmp_path, capsys):
    from scananalyse.cli import main

    d = fleet_dir
    m = tmp_path / "m.csv"
    m.write_text(f"tank,old,new,diameter,service\nTK-A,{d}/TK-A/old.h5,{d}/TK-A/new.h5,4000,crude\n"
                 f"GONE,,{d}/nothing.h5,4000,crude\nDIR,,{d}/TK-A,4000,crude\n"
                 f"ONE,,{d}/TK-B/new.h5,4000,crude\n")
    status = main(["fleet", str(m), "--out", str(tmp_path / "o"), "--workers", "1", "--quiet"])
    assert status == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "m.csv:3" in err and "2 of 4 tanks failed" in err
    df = pd.read_csv(tmp_path / "o" / "fleet.csv")
    rows = {r.tank: r for r in df.itertuples()}
    assert rows["GONE"].status == "error" and "no such file" in rows["GONE"].error
    assert rows["DIR"].status == "error" and "is a folder" in rows["DIR"].error
    assert rows["ONE"].status == "ok" and rows["ONE"].inspections == 1 and rows["TK-A"].inspections == 2
    assert (df["service"] == "crude").all()
    # TK-B's scan names TK-B, not ONE: flagged
    assert "scan-names-other-tank" in rows["ONE"].flags
    pop = pd.read_csv(tmp_path / "o" / "population.csv")
    assert set(pop["group"]) == {"all", "service"} and set(pop["side"]) == {"top", "under"}
    html = (tmp_path / "o" / "fleet.html").read_text()
    assert "Population of corrosion rates" in html and "data:image/png;base64," in html
    assert "Order: Failed tanks first" in html


def test_similar_service_rule_on_a_tiny_fleet():
    from scananalyse.fleet import similar_service

    donors = [{"tank": f"D{i}", "status": "ok", "inspections": 2, "service": "crude",
               "rate_top_max_mm_y": rt, "rate_under_max_mm_y": ru}
              for i, (rt, ru) in enumerate([(0.1, 0.2), (0.2, 0.3), (0.3, 0.4)])]
    zones = {"zone": ["critical", "interior"], "t_min_mm": [5.0, 4.0], "mrt_mm": [2.54, 2.54],
             "interval_recommended_y": [20.0, 20.0], "rate_top_max_mm_y": [0.01, 0.01],
             "rate_under_max_mm_y": [0.01, 0.01]}
    single = {"tank": "S", "status": "ok", "inspections": 1, "service": "crude", "interval_recommended_y": 20.0,
              "worst_zone": "critical", "next_due": "2045-05-01", "flags": "", "_zones": zones,
              "_inspected": "2025-05-01"}
    other = dict(single, tank="W", service="water")
    rows = donors + [single, other]
    similar_service(rows, ["service"])
    top, under = np.quantile([0.1, 0.2, 0.3], 0.9), np.quantile([0.2, 0.3, 0.4], 0.9)
    assert single["similar_service_top_mm_y"] == pytest.approx(top)
    from scananalyse.rules import RULESETS

    # the thinner interior zone: (t_min - MRT) / summed similar-service rate, rounded down to the step
    expect = RULESETS["api653"].round_interval((4.0 - 2.54) / (top + under))
    assert single["interval_recommended_y"] == pytest.approx(expect) and expect < (4.0 - 2.54) / (top + under) + 1e-9
    assert single["worst_zone"] == "interior" and single["limiting"] == "similar-service"
    assert "3 two-inspection tanks in group service=crude" in single["similar_service"]
    assert single["next_due"] < "2045-05-01" and "similar-service" in single["flags"]
    # a group with no two-inspection tanks: nothing borrowed, and it says why
    assert other["interval_recommended_y"] == 20.0 and other["similar_service"].startswith("none: 0")


def test_ranking_by_due_date_then_leak_probability():
    rows = [{"tank": "late", "status": "ok", "next_due": "2040-01-01", "interval_recommended_y": 5.0},
            {"tank": "soon-low", "status": "ok", "next_due": "2030-01-01", "interval_recommended_y": 9.0,
             "p_leak_at_due": 0.01},
            {"tank": "soon-high", "status": "ok", "next_due": "2030-01-01", "interval_recommended_y": 9.0,
             "p_leak_at_due": 0.2}]
    assert list(rank_fleet(rows)["tank"]) == ["soon-high", "soon-low", "late"]
    # without the p_leak_at_due column at all
    for r in rows:
        r.pop("p_leak_at_due", None)
    assert list(rank_fleet(rows)["tank"])[-1] == "late"
