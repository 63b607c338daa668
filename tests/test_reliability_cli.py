"""The commands never delete a user's folder (issue 22, items 2 and 4, and --out .)."""


import pytest

from scananalyse.cli import main


@pytest.fixture()
def user_folder(tmp_path):
    d = tmp_path / "mine"
    d.mkdir()
    (d / "scan.csv").write_text("precious\n")
    return d


def _err(capsys):
    return capsys.readouterr().err.strip().splitlines()


def test_demo_refuses_an_existing_folder(user_folder, capsys):
    assert main(["demo", "--out", str(user_folder), "--quiet"]) == 2
    err = _err(capsys)
    assert len(err) == 1 and "output folder exists; use --force" in err[0]
    assert main(["demo", "--out", str(user_folder), "--quiet", "--force"]) == 2
    err = _err(capsys)
    assert len(err) == 1 and "not replaced" in err[0] and "no COMPLETE marker" in err[0]
    assert sorted(p.name for p in user_folder.iterdir()) == ["scan.csv"]
    assert (user_folder / "scan.csv").read_text() == "precious\n"


def test_out_dot_with_force_refused(user_folder, capsys, monkeypatch):
    from scananalyse.io import write_scan
    from scananalyse.synth import make_pair

    pair = make_pair(diameter_mm=1500.0, pitch_new=25.0, pitch_old=25.0, seed=3)
    write_scan(pair.old, user_folder / "old.h5")
    write_scan(pair.new, user_folder / "new.h5")
    monkeypatch.chdir(user_folder)
    status = main(["compare", "old.h5", "new.h5", "--diameter", "1500", "--out", ".", "--force", "--quiet"])
    err = _err(capsys)
    assert status == 2 and len(err) == 1 and "is the current folder" in err[0], err
    assert sorted(p.name for p in user_folder.iterdir()) == ["new.h5", "old.h5", "scan.csv"]
