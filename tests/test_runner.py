"""The runner: the whole job writes every output, figures numbered in the report's order."""

from scananalyse import repair
from scananalyse.job import Job
from scananalyse.runner import compare


def test_compare_writes_numbered_figures_and_the_patch_drawing(small_pair_files, tmp_path):
    out = tmp_path / "out"
    res = compare(small_pair_files["old_h5"], small_pair_files["new_h5"], job=Job(diameter=4000.0),
                  out_dir=out, quiet=True)
    names = sorted(p.name for p in (out / "figures").iterdir())
    assert names == sorted(f[len("figures/"):] for f in res.files if f.startswith("figures/"))
    assert [n[:3] for n in names] == [f"{k:02d}_" for k in range(1, len(names) + 1)] and len(names) >= 10
    assert not [p for p in out.rglob(".*") if p.is_file()]  # no temporary file left
    back = repair.read_patches(out / "patches.dxf")
    assert len(back) == len(res.patches) > 0
    for name in ("zones.csv", "zones_repaired.csv", "patches.csv", "indications.csv", "registration.json",
                 "results.h5", "report.html"):
        assert (out / name).is_file() and name in res.files
