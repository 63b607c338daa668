"""Output folders never lose a user's files (issue 22, items 3, 4 and 6).

Publication is an atomic rename that never replaces anything; ``--force`` replaces only a
complete earlier output; what a killed run leaves is recovered or cleaned by the next run.
"""

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from scananalyse import outputs
from scananalyse.errors import InputError
from scananalyse.outputs import COMPLETE_MARKER, is_complete_output, output_folder

ROOT = Path(__file__).resolve().parents[1]


def _make(target, text="1"):
    with output_folder(target, force=os.path.exists(target)) as tmp:
        (tmp / "a.txt").write_text(text)


def test_folder_made_during_the_run_is_not_replaced(tmp_path):
    target = tmp_path / "out"
    with pytest.raises(InputError, match=r"out: the output folder appeared while this run worked"):
        with output_folder(target) as tmp:
            (tmp / "a.txt").write_text("mine")
            target.mkdir()  # a user (or another run) makes the folder meanwhile: even empty
            (target / "user.txt").write_text("user")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]
    assert (target / "user.txt").read_text() == "user"




def test_two_runs_same_folder(tmp_path, monkeypatch):
    for fallback in (False, True):
        if fallback:
            monkeypatch.setattr(outputs, "_renameat2", lambda: None)
        target = tmp_path / f"out{fallback}"
        with pytest.raises(InputError, match="appeared while this run worked"):
            with output_folder(target) as first:
                (first / "a.txt").write_text("first")
                with output_folder(target) as second:
                    (second / "b.txt").write_text("second")
        assert sorted(p.name for p in target.iterdir()) == [COMPLETE_MARKER, "b.txt"]
        assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


def test_force_refuses_current_folder(tmp_path, monkeypatch):
    target = tmp_path / "out"
    _make(target)
    monkeypatch.chdir(target)
    with pytest.raises(InputError, match=r"^\.: is the current folder"):
        with output_folder(".", force=True):
            pass
    assert is_complete_output(target)


def test_symlink_and_file_refused(tmp_path):
    real = tmp_path / "real"
    _make(real)
    link = tmp_path / "link"
    link.symlink_to(real)
    with pytest.raises(InputError, match="symbolic link"):
        with output_folder(link, force=True):
            pass
    (tmp_path / "f").write_text("x")
    with pytest.raises(InputError, match="exists and is not a folder"):
        with output_folder(tmp_path / "f", force=True):
            pass


def test_read_only_location_is_bad_input(tmp_path):
    if os.geteuid() == 0:
        pytest.skip("root writes anywhere")
    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o555)
    try:
        with pytest.raises(InputError, match=r"ro: cannot write the output folder there"):
            with output_folder(ro / "out"):
                pass
    finally:
        ro.chmod(0o755)


def test_disk_full_inside_the_block_names_the_file(tmp_path):
    import errno

    target = tmp_path / "out"
    with pytest.raises(InputError, match=r"zones.csv: cannot write the output \(No space left on device\)"):
        with output_folder(target) as tmp:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(tmp / "zones.csv"))
    assert list(tmp_path.iterdir()) == []


def test_rename_fault_between_the_two_steps_then_recovered(tmp_path, monkeypatch, capsys):
    target = tmp_path / "out"
    _make(target, "previous")
    real_rename = os.rename
    calls = []

    def failing_rename(src, dst):
        calls.append((src, dst))
        if len(calls) == 1:
            return real_rename(src, dst)  # step 1: the previous output moved aside
        raise OSError(5, "Input/output error")  # the restore fails too

    def failing_publish(src, dst):
        raise OSError(5, "Input/output error", str(dst))  # step 2 fails

    monkeypatch.setattr(os, "rename", failing_rename)
    monkeypatch.setattr(outputs, "rename_noreplace", failing_publish)
    with pytest.raises(OSError):
        _make(target, "new")
    monkeypatch.undo()
    # the previous result is only in the hidden .old- folder now
    assert not target.exists()
    hidden = [p.name for p in tmp_path.iterdir()]
    assert len(hidden) == 1 and hidden[0].startswith(".out.old-")
    # the next run recovers it (and, without --force, does not replace it)
    capsys.readouterr()
    with pytest.raises(InputError, match="output folder exists; use --force"):
        _make_no_force(target)
    err = capsys.readouterr().err
    assert "scananalyse: note: recovered" in err and "interrupted between its two renames" in err
    assert (target / "a.txt").read_text() == "previous"
    assert [p.name for p in tmp_path.iterdir()] == ["out"]


def _make_no_force(target):
    with output_folder(target) as tmp:
        (tmp / "a.txt").write_text("x")


def test_restore_after_failed_publish(tmp_path, monkeypatch):
    target = tmp_path / "out"
    _make(target, "previous")

    def failing_publish(src, dst):
        raise OSError(5, "Input/output error", str(dst))

    monkeypatch.setattr(outputs, "rename_noreplace", failing_publish)
    with pytest.raises(OSError):
        _make(target, "new")
    assert (target / "a.txt").read_text() == "previous"
    assert [p.name for p in tmp_path.iterdir()] == ["out"]


_KILLED = textwrap.dedent("""
    import os, signal, sys
    from scananalyse import outputs
    target = sys.argv[1]
    def killed(src, dst):
        os.kill(os.getpid(), signal.SIGKILL)
    if sys.argv[2] == "between":
        outputs.rename_noreplace = killed
    with outputs.output_folder(target, force=os.path.exists(target)) as tmp:
        (tmp / "a.txt").write_text("new")
        if sys.argv[2] == "writing":
            os.kill(os.getpid(), signal.SIGKILL)
""")


@pytest.mark.parametrize("when", ["between", "writing"])
def test_killed_run_recovered_by_next_run(tmp_path, capsys, when):
    target = tmp_path / "out"
    _make(target, "previous")
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.run([sys.executable, "-c", _KILLED, str(target), when], env=env, timeout=120)
    assert proc.returncode == -9
    left = sorted(p.name for p in tmp_path.iterdir())
    if when == "between":
        # the previous output only in the hidden .old- folder, beside the finished temporary one
        assert len(left) == 2 and left[0].startswith(".out.old-") and left[1].startswith(".out.partial-")
    else:
        assert left[0] == ".out.partial-" + left[0].split("partial-")[1] and left[1] == "out"
    capsys.readouterr()
    with output_folder(target, force=True) as tmp:  # recovers first, then replaces it
        (tmp / "a.txt").write_text("next")
    err = capsys.readouterr().err
    assert ("recovered" if when == "between" else "unfinished output of an interrupted run") in err
    assert (target / "a.txt").read_text() == "next"
    assert [p.name for p in tmp_path.iterdir()] == ["out"]


def test_foreign_hidden_folders_left_alone(tmp_path):
    # a folder with the tool's name pattern but not its marker, or of a live process, stays
    target = tmp_path / "out"
    dead = 2 ** 22 + 12345  # above the usual pid_max: no such process
    odd = tmp_path / f".out.partial-{dead}-abcd"
    odd.mkdir()
    (odd / "user.txt").write_text("x")
    live = tmp_path / f".out.old-{os.getppid()}-abcd"
    live.mkdir()
    _make(target)
    assert odd.exists() and live.exists()


def test_read_only_file_system_names_the_path(tmp_path, monkeypatch):
    # as any user (root too): the temporary folder cannot be made
    import errno
    from pathlib import Path

    real_mkdir = Path.mkdir

    def read_only(self, *a, **k):
        if ".partial-" in self.name:
            raise OSError(errno.EROFS, os.strerror(errno.EROFS), str(self))
        return real_mkdir(self, *a, **k)

    monkeypatch.setattr(Path, "mkdir", read_only)
    with pytest.raises(InputError, match=r"cannot write the output folder there \(Read-only file system\)"):
        with output_folder(tmp_path / "out"):
            pass
    assert list(tmp_path.iterdir()) == []
