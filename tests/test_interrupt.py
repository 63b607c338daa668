"""No lost or misleading output (issue 9): interrupts, --force, read-only inputs, HTML escaping.

* A compare interrupted by SIGINT or SIGTERM (sent to a real subprocess while it
  is writing its outputs) exits 130, says so on stderr, and leaves no folder
  that looks complete, nor any temporary folder.
* An interrupted ``--force`` run leaves the previous complete folder as it was.
* An existing output folder is never replaced without ``--force``.
* Input files are opened read-only and are bit-identical afterwards (sha256).
* A tank name with markup in a scan header appears in report.html only escaped.

Design contract 3.4/3.5 and scananalyse/outputs.py (temporary folder renamed
into place when complete).
"""

from __future__ import annotations

import contextlib
import hashlib
import html
import io
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import pytest

from scananalyse.cli import main

#: A tank name a hostile or careless export could carry (invented).
TANK = "<script>alert('x')</script> & \"TK\" <img src=x onerror=alert(1)>"


def sha256(path) -> str:
    with open(path, "rb") as fh:
        return hashlib.sha256(fh.read()).hexdigest()


def tree_digest(folder: Path) -> dict:
    return {str(p.relative_to(folder)): sha256(p) for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def pair_files(tmp_path_factory):
    from scananalyse.io import write_scan
    from scananalyse.synth import make_pair

    d = tmp_path_factory.mktemp("inputs")
    pair = make_pair(diameter_mm=4000, pitch_new=20, pitch_old=25, seed=9, tank=TANK)
    paths = {"old": d / "old.csv", "new": d / "new.h5"}
    write_scan(pair.old, paths["old"])
    write_scan(pair.new, paths["new"])
    return paths


@pytest.fixture(scope="module")
def complete_run(pair_files, tmp_path_factory):
    """One full compare in-process, recording every open of the input files."""
    out = tmp_path_factory.mktemp("runs") / "result"
    inputs = {os.path.realpath(p) for p in pair_files.values()}
    before = {p: (sha256(p), os.stat(p).st_mtime_ns) for p in inputs}
    opens = []

    real_open, real_os_open, real_h5 = open, os.open, h5py.File

    def spy_open(file, mode="r", *a, **k):
        if isinstance(file, (str, os.PathLike)) and os.path.realpath(file) in inputs:
            opens.append(("open", mode))
        return real_open(file, mode, *a, **k)

    def spy_os_open(path, flags, *a, **k):
        if isinstance(path, (str, os.PathLike)) and os.path.realpath(path) in inputs:
            opens.append(("os.open", flags))
        return real_os_open(path, flags, *a, **k)

    class SpyFile(real_h5):
        def __init__(self, name, mode="r", *a, **k):
            if isinstance(name, (str, os.PathLike)) and os.path.realpath(name) in inputs:
                opens.append(("h5py.File", mode))
            super().__init__(name, mode, *a, **k)

    mp = pytest.MonkeyPatch()
    mp.setattr("builtins.open", spy_open)
    mp.setattr(os, "open", spy_os_open)
    mp.setattr(h5py, "File", SpyFile)
    err = io.StringIO()
    try:
        with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
            status = main(["compare", str(pair_files["old"]), str(pair_files["new"]), "--diameter", "4000",
                           "--out", str(out), "--quiet"])
    finally:
        mp.undo()
    after = {p: (sha256(p), os.stat(p).st_mtime_ns) for p in inputs}
    return {"out": out, "status": status, "stderr": err.getvalue(), "opens": opens, "before": before,
            "after": after}


def test_complete_run_succeeds(complete_run):
    assert complete_run["status"] == 0, complete_run["stderr"]
    out = complete_run["out"]
    for name in ("zones.csv", "zones_repaired.csv", "patches.csv", "indications.csv", "registration.json",
                 "results.h5", "report.html", "COMPLETE"):
        assert (out / name).is_file(), name
    # nothing but the result beside it: no temporary or backup folder
    assert sorted(p.name for p in out.parent.iterdir()) == ["result"]


def test_output_folder_has_ordinary_permissions(complete_run):
    """The results are meant to be shared: the folder gets the permissions of a folder made by
    mkdir under the user's umask, not the owner-only mode of a private temporary folder."""
    umask = os.umask(0)
    os.umask(umask)
    probe = complete_run["out"].parent / "probe"
    probe.mkdir()
    try:
        assert (complete_run["out"].stat().st_mode & 0o777) == (probe.stat().st_mode & 0o777) == (0o777 & ~umask)
    finally:
        probe.rmdir()
    # and every file in it the mode of a file made by open() under the same umask (the
    # atomic writers' temporary files are created owner-only), and no temporary file left
    files = [p for p in complete_run["out"].rglob("*") if p.is_file()]
    assert len(files) > 10 and not [p for p in files if p.name.startswith(".")]
    for p in files:
        assert (p.stat().st_mode & 0o777) == (0o666 & ~umask), p.name


def test_inputs_read_only_and_unchanged(complete_run):
    assert complete_run["after"] == complete_run["before"]
    opens = complete_run["opens"]
    assert opens, "the spy saw no open of the inputs: the test would prove nothing"
    for how, mode in opens:
        if how == "open":
            assert set(str(mode)) <= set("rbt"), (how, mode)
        elif how == "os.open":
            assert mode & (os.O_WRONLY | os.O_RDWR | os.O_APPEND | os.O_TRUNC | os.O_CREAT) == 0, (how, mode)
        else:
            assert mode == "r", (how, mode)


def test_tank_name_escaped_in_report(complete_run):
    page = (complete_run["out"] / "report.html").read_text(encoding="utf-8")
    # The raw markup never reaches the page: no element can be injected.
    for raw in ("<script", "<img src=x", "onerror=alert(1)>", "</script>"):
        assert raw not in page, raw
    # and the name is there, escaped (html.escape with quotes, Python standard library)
    assert html.escape(TANK, quote=True) in page


def test_existing_folder_not_overwritten_without_force(complete_run, pair_files, capsys):
    out = complete_run["out"]
    digest = tree_digest(out)
    capsys.readouterr()
    status = main(["compare", str(pair_files["old"]), str(pair_files["new"]), "--diameter", "4000",
                   "--out", str(out), "--quiet"])
    err = capsys.readouterr().err.splitlines()
    assert status == 2
    assert len(err) == 1 and err[0].startswith("scananalyse: error: ") and str(out) in err[0], err
    assert "--force" in err[0]
    assert tree_digest(out) == digest
    assert sorted(p.name for p in out.parent.iterdir()) == ["result"]


def test_output_path_that_is_a_file_refused(pair_files, capsys, tmp_path):
    target = tmp_path / "result"
    target.write_text("precious notes\n")
    capsys.readouterr()
    for extra in ([], ["--force"]):
        status = main(["compare", str(pair_files["old"]), str(pair_files["new"]), "--diameter", "4000",
                       "--out", str(target), "--quiet", *extra])
        err = capsys.readouterr().err.splitlines()
        assert status == 2 and len(err) == 1 and str(target) in err[0], err
        assert target.read_text() == "precious notes\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["result"]


def test_convert_refuses_to_overwrite_its_input(pair_files, capsys):
    p = pair_files["new"]
    digest = sha256(p)
    capsys.readouterr()
    status = main(["convert", str(p), str(p), "--force"])
    err = capsys.readouterr().err.splitlines()
    assert status == 2 and len(err) == 1 and str(p) in err[0], err
    assert sha256(p) == digest


# --------------------------------------------------------------------------- real signals
def _start(pair_files, out: Path, *extra):
    env = dict(os.environ, MPLBACKEND="Agg", PYTHONUNBUFFERED="1")
    cmd = [sys.executable, "-m", "scananalyse.cli", "compare", str(pair_files["old"]), str(pair_files["new"]),
           "--diameter", "4000", "--out", str(out), "--quiet", *extra]
    return subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env,
                            cwd=str(out.parent), stdin=subprocess.DEVNULL)


def _wait_for_partial(proc, parent: Path, name: str, phase: str, timeout=120.0):
    """Wait until the run is mid-way: its hidden temporary folder exists (``analysis``), or
    it has begun writing files into it (``writing``: the figures folder exists)."""
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        tmp = [p for p in parent.iterdir() if p.name.startswith(f".{name}.partial-")]
        if tmp and (phase == "analysis" or (tmp[0] / "figures").exists()):
            return True
        if proc.poll() is not None:
            return False
        time.sleep(0.01)
    return False


def _interrupt(pair_files, out: Path, sig, *extra, phase="analysis"):
    proc = _start(pair_files, out, *extra)
    try:
        started = _wait_for_partial(proc, out.parent, out.name, phase)
        assert started, "the run ended before it began writing outputs: " + proc.communicate()[1].decode()
        time.sleep(0.2 if phase == "analysis" else 0.5)
        assert proc.poll() is None, "the run finished before the signal; make the floor larger"
        proc.send_signal(sig)
        stdout, stderr = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    return proc.returncode, stdout.decode(), stderr.decode()


@pytest.mark.parametrize("phase", ["analysis", "writing"])
@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_interrupted_run_leaves_nothing(pair_files, tmp_path, sig, phase):
    out = tmp_path / "result"
    inputs_before = {k: sha256(p) for k, p in pair_files.items()}
    status, stdout, stderr = _interrupt(pair_files, out, sig, phase=phase)
    assert status == 130, (status, stderr)
    assert "Traceback" not in stderr
    lines = stderr.splitlines()
    assert lines and lines[-1] == "scananalyse: interrupted; no complete output was written", stderr
    assert list(tmp_path.iterdir()) == [], sorted(p.name for p in tmp_path.iterdir())
    assert {k: sha256(p) for k, p in pair_files.items()} == inputs_before


def test_interrupted_forced_run_keeps_previous_folder(complete_run, pair_files):
    out = complete_run["out"]
    digest = tree_digest(out)
    status, stdout, stderr = _interrupt(pair_files, out, signal.SIGTERM, "--force", phase="writing")
    assert status == 130, (status, stderr)
    assert "interrupted" in stderr.splitlines()[-1]
    assert tree_digest(out) == digest  # the previous complete results, bit for bit
    assert sorted(p.name for p in out.parent.iterdir()) == ["result"]
