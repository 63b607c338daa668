"""Shared fixtures: small synthetic floor pairs written to files (invented data)."""

import os

import pytest

# Plotting must never need a screen.
os.environ.setdefault("MPLBACKEND", "Agg")


@pytest.fixture(scope="session")
def small_pair_files(tmp_path_factory):
    """A small synthetic pair (4 m floor, 20/25 mm pitch) as CSV and HDF5 files, with its truth."""
    from scananalyse.io import write_scan
    from scananalyse.synth import make_pair

    d = tmp_path_factory.mktemp("pair")
    pair = make_pair(diameter_mm=4000.0, pitch_new=20.0, pitch_old=25.0, rotation_deg=1.5,
                     shift_mm=(60.0, -40.0), seed=11, tank="SYN-E2E")
    paths = {}
    for tag, scan in (("old", pair.old), ("new", pair.new)):
        for ext in ("csv", "h5"):
            p = d / f"{tag}.{ext}"
            write_scan(scan, p)
            paths[f"{tag}_{ext}"] = str(p)
    paths["pair"] = pair
    paths["dir"] = d
    return paths


@pytest.fixture(scope="session")
def inch_compare_run(small_pair_files, tmp_path_factory):
    """One ``compare --units in`` of the small pair, the diameter typed in inches
    (157.48 in = 4000 mm): its output folder and what it printed (no PDF)."""
    import contextlib
    import io

    from scananalyse.cli import main

    out = tmp_path_factory.mktemp("inch") / "out"
    printed = io.StringIO()
    with pytest.MonkeyPatch.context() as mp, contextlib.redirect_stdout(printed):
        mp.setenv("SCANANALYSE_BROWSER", "none")
        code = main(["compare", small_pair_files["old_h5"], small_pair_files["new_h5"], "--diameter", "157.48",
                     "--out", str(out), "--quiet", "--units", "in"])
    return {"code": code, "out": out, "console": printed.getvalue()}
