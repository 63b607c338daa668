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
