"""The whole analysis on synthetic floors with known truth (invented data)."""

import os

import numpy as np
import pandas as pd
import pytest

from scananalyse.job import Job
from scananalyse.pipeline import analyse
from scananalyse.synth import make_pair


def _true_life(pair, mrt_map, exclude=None):
    """Remaining life of the real metal: (true t − MRT) ÷ true growth rate.

    The growth rate is the true mean rate between the two inspections (both faces), the rate
    a pair of inspections can see; in areas repaired between the inspections (thicker now
    than before) it is the true current rate of the restarted corrosion.  A pit that began
    shortly before the newer inspection grows faster than any two-inspection method can
    measure: that limit is stated in the report's assumptions, not tested away here.
    """
    tr = pair.truth
    current = tr.rate_top_true + tr.rate_under_true
    mean = tr.rate_mean_true
    rate = np.where(tr.t_new_true > tr.t_old_true, current, mean)
    with np.errstate(divide="ignore", invalid="ignore"):
        life = np.where(rate > 0, (tr.t_new_true - mrt_map) / rate, np.inf)
    life = np.where(np.isfinite(tr.t_new_true), np.maximum(life, 0), np.nan)
    if exclude is not None:
        life = np.where(exclude, np.nan, life)
    return life


@pytest.mark.parametrize("seed", [3, 4, 5, 6, 7, 8])
def test_recommended_interval_never_exceeds_true_life_after_repair(seed):
    # Issue requirement: after the proposed repairs, the recommended interval does not exceed the
    # true remaining life of the metal left unrepaired by more than 10 %.  True life uses the
    # synthetic truth (thickness and growth rates of both faces at every cell), which the analysis
    # never sees.  Checked on the scanned metal left unrepaired: the unscanned metal is covered
    # only statistically (extreme values), and how often that bound holds is measured over many
    # seeds by bench/bench_eva_coverage.py, not asserted cell by cell here.
    pair = make_pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, seed=seed, rotation_deg=1.2,
                     shift_mm=(50.0, -30.0))
    an = analyse(pair.new, pair.old, job=Job(diameter=5000.0, target_interval=10.0))
    patched = an.repaired_maps["patched"]
    life = _true_life(pair, an.mrt_map, exclude=patched | ~pair.new.scanned)
    zones = an.zones
    checked = 0
    for _, row in an.zones_repaired.iterrows():
        rec = row["interval_recommended_y"]
        if not np.isfinite(rec):
            continue
        true_min = np.nanmin(np.where(zones.labels == zones.index(row["zone"]), life, np.nan))
        assert rec <= 1.10 * true_min + 1e-9, (row["zone"], rec, true_min)
        checked += 1
    assert checked >= 1


def test_code_formula_flagged_where_it_exceeds_co_located_life():
    # A floor whose pits mostly began recently and grow fast: the code formula's age-based
    # UPr (thinnest area over the whole age) is slow, the measured short-term rate is not.
    pair = make_pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, seed=0, new_pit_fraction=0.9,
                     max_pit_rate=0.5, deep_fraction=0.0, n_top_pits=5, n_under_pits=20, repairs=0)
    an = analyse(pair.new, pair.old, job=Job(diameter=5000.0))
    z = an.zone_table.set_index("zone").loc["interior"]
    assert z["interval_code_y"] > z["life_local_y"]
    assert "code-exceeds-local" in z["flags"].split(";")
    # and the recommendation follows the metal, not the formula
    assert z["interval_recommended_y"] <= z["life_local_y"]
    # the age-based underside rate is well below the measured one
    assert z["upr_mm_y"] < 0.7 * z["rate_under_max_mm_y"]
    # and the summary says so in words
    from scananalyse.pipeline import actions

    said = actions(an)
    assert any("zone interior the code formula gives" in a and "overstates" in a for a in said)
    assert any(a.startswith("Zone critical was not scanned") for a in said)


def test_single_inspection_uses_long_term_rates_only():
    pair = make_pair(diameter_mm=4000.0, pitch_new=20.0, pitch_old=25.0, seed=2)
    an = analyse(pair.new, None, job=Job(diameter=4000.0))
    assert an.registration is None and an.old_on_new is None
    assert np.isnan(an.rates.rate_short_top).all() and np.isnan(an.rates.rate_short_under).all()
    tab = an.zone_table.set_index("zone")
    assert "no-short-term-rates" in tab.loc["interior", "flags"]
    # long-term rate = loss ÷ years in service (domain.md §3)
    age = pair.new.meta.age_years
    i = np.nanargmax(an.rates.loss_under)
    assert an.rates.rate_long_under.flat[i] == pytest.approx(an.rates.loss_under.flat[i] / age, rel=1e-4)


def test_inch_files_give_the_same_answer_as_mm_files(tmp_path):
    # The same floor written in inches (1 in = 25.4 mm exactly) and given a diameter in inches
    # must give the same per-zone results as the millimetre files: units are converted on load.
    from scananalyse.io import read_scan, write_scan

    pair = make_pair(diameter_mm=4000.0, pitch_new=20.0, pitch_old=25.0, seed=6)
    paths = {}
    for tag, scan in (("old", pair.old), ("new", pair.new)):
        inch = scan.with_thickness(scan.thickness, meta=scan.meta.replace(units="in"))
        paths[tag] = tmp_path / f"{tag}_in.csv"
        write_scan(inch, paths[tag])
    assert "# units: in" in paths["new"].read_text()[:400]
    old_in, new_in = read_scan(paths["old"]), read_scan(paths["new"])
    a = analyse(pair.new, pair.old, job=Job(diameter=4000.0)).zone_table.set_index("zone")
    b = analyse(new_in, old_in, job=Job(diameter=4000.0 / 25.4)).zone_table.set_index("zone")
    for col in ("area_m2", "coverage_pct", "t_min_mm", "depth_max_mm", "rate_under_max_mm_y", "mrt_mm",
                "interval_code_y", "life_local_y", "interval_recommended_y"):
        np.testing.assert_allclose(b[col].to_numpy(float), a[col].to_numpy(float), rtol=1e-4, atol=1e-4,
                                   err_msg=col)


def test_small_zones_get_extreme_values_with_smaller_blocks():
    # Zones too small for 1 m blocks (a 3 x 4 ring-sector grid on an 8 m floor) get a fit with a
    # halved block side instead of none; zones.csv says which side was used.  The whole
    # interior keeps the configured 1 m blocks (larger blocks are preferred when they fit).
    pair = make_pair(diameter_mm=8000.0, pitch_new=20.0, pitch_old=25.0, seed=8)
    an = analyse(pair.new, pair.old, job=Job(diameter=8000.0, zone_rings=3, zone_sectors=4))
    z = an.zone_table.set_index("zone")
    user = z[z["kind"] == "user"]
    assert len(user) == 12
    smaller = user[user["eva_block_mm"] < 1000.0]
    assert len(smaller) >= 1
    assert np.isfinite(smaller["depth_eva_mm"]).any()
    baseline = analyse(pair.new, pair.old, job=Job(diameter=8000.0)).zone_table.set_index("zone")
    assert baseline.loc["interior", "eva_block_mm"] == pytest.approx(1000.0)


def test_small_pages_only_for_the_run_and_restored():
    # the run switches off numpy's huge-page advice (a measured stall on Linux, see
    # pipeline._small_pages) and gives the caller's setting back, also after an error
    import numpy as np

    from scananalyse import pipeline as P

    core = getattr(np, "_core", None) or np.core
    setter = core.multiarray._set_madvise_hugepage
    original = setter(True)
    try:
        with P._small_pages():
            assert setter(False) is False  # off inside the run
        assert setter(True) is True  # the caller's "on" is back
        with pytest.raises(RuntimeError):
            with P._small_pages():
                raise RuntimeError("boom")
        assert setter(True) is True
    finally:
        setter(original)


def _mmapped_blocks(libc):
    """glibc's count of blocks served by mmap (mallinfo2().hblks)."""
    import ctypes

    class MallInfo2(ctypes.Structure):
        _fields_ = [(n, ctypes.c_size_t) for n in ("arena", "ordblks", "smblks", "hblks", "hblkhd", "usmblks",
                                                     "fsmblks", "uordblks", "fordblks", "keepcost")]

    libc.mallinfo2.restype = MallInfo2
    return libc.mallinfo2().hblks


def test_freed_memory_reused_only_for_the_run(monkeypatch):
    # Inside the run glibc serves a 48 MB block from the heap (no new mmap, so a freed
    # grid's pages serve the next one); afterwards large blocks are mmapped again, also
    # after an error (glibc's mallinfo2, man 3 mallinfo2).
    import threading

    from scananalyse import pipeline as P

    from scananalyse._libc import glibc

    libc = glibc()
    if libc is None or not hasattr(libc, "mallinfo2"):
        pytest.skip("needs glibc 2.33 or later")
    monkeypatch.setattr(threading, "active_count", lambda: 1)  # other tests may leave threads
    n = 12_000_000  # float32: 48 MB, above glibc's largest dynamic mmap threshold (32 MB)
    with P._reuse_freed_memory():
        before = _mmapped_blocks(libc)
        a = np.ones(n, dtype=np.float32)
        assert _mmapped_blocks(libc) == before  # from the heap
        del a
    before = _mmapped_blocks(libc)
    b = np.ones(n, dtype=np.float32)
    assert _mmapped_blocks(libc) == before + 1  # mmapped again after the run
    del b
    with pytest.raises(RuntimeError):
        with P._reuse_freed_memory():
            raise RuntimeError("boom")
    before = _mmapped_blocks(libc)
    c = np.ones(n, dtype=np.float32)
    assert _mmapped_blocks(libc) == before + 1
    del c


def test_return_curve_bound_at_zone_T_is_the_tables_and_others_are_searched():
    # The return-level figure's upper bound: at the zone's T it is the table's own bound
    # (depth_eva_upper_mm, not searched a second time), at the other periods a fresh
    # profile-likelihood search (Coles 2001, §3.3.3) at that period; the bound grows with T.
    from scananalyse.extremes import return_level_bounds
    from scananalyse.pipeline import _return_curve

    pair = make_pair(diameter_mm=8000.0, pitch_new=20.0, pitch_old=25.0, seed=8)
    an = analyse(pair.new, pair.old, job=Job(diameter=8000.0))
    z = an.extremes_depth["interior"]
    assert z.fit is not None and z.bounds.method == "profile"
    T_line, lvl, lower, upper, Ts = _return_curve(z)
    assert lower is None and Ts.size == upper.size >= 4
    at = np.flatnonzero(Ts == z.T)
    assert at.size == 1 and upper[at[0]] == z.depth_eva_upper_mm
    assert np.all(np.diff(upper) > 0)
    cen = np.asarray(z.blocks.censored, dtype=bool)
    for T, up in zip(Ts, upper):
        if T == z.T:
            continue
        b = return_level_bounds(z.fit, np.asarray(z.blocks.maxima, float), T, level=z.level, one_sided=True,
                                method="profile", censored=cen if cen.any() else None,
                                threshold=z.threshold if cen.any() else None)
        assert up == b.upper


def test_draft_figure_names_are_unique_whatever_the_zone_names():
    # Zone names reach the figure slugs; two names that differ only in characters a file
    # name cannot keep ("a b", "a_b") must still give two files.
    from scananalyse.pipeline import _draft_stems

    specs = [("extremes:a b", "probability_a b", "", None), ("extremes:a_b", "probability_a_b", "", None)]
    stems = _draft_stems(specs, 7)
    assert stems == ["d007_probability_a_b", "d008_probability_a_b"] and len(set(stems)) == 2


@pytest.fixture
def forked_starts(monkeypatch):
    """Forked children forced on, and a list of (function name, pid) of each one started.

    Forced: in the whole test session an idle thread of Dask's (test_fleet) makes
    parallel_possible() say no; the figure renderer's tests force their helper the same way.
    """
    from scananalyse import forked

    if not hasattr(os, "fork"):
        pytest.skip("no forked children without fork()")
    monkeypatch.setattr(forked, "parallel_possible", lambda: True)
    started = []
    real_start = forked.ForkedCall._start

    def recording_start(self):
        name = self._fn.__name__
        real_start(self)
        started.append((name, self._pid))

    monkeypatch.setattr(forked.ForkedCall, "_start", recording_start)
    return started


def _pair_4m():
    return make_pair(diameter_mm=4000.0, pitch_new=20.0, pitch_old=25.0, seed=11, rotation_deg=0.8,
                     shift_mm=(40.0, 20.0))


def test_forked_children_give_the_serial_result(forked_starts, monkeypatch):
    # The registration is computed in a forked child where that is safe, while the stages that
    # need only the newer scan run: every table must be the serial run's.
    from scananalyse import forked

    pair = _pair_4m()
    job = Job(diameter=4000.0, target_interval=10.0)
    par = analyse(pair.new, pair.old, job=job)
    assert [name for name, _ in forked_starts] == ["register"]
    monkeypatch.setattr(forked, "parallel_possible", lambda: False)
    ser = analyse(pair.new, pair.old, job=job)
    assert len(forked_starts) == 1  # none in the serial run
    rp, rs = par.registration.to_dict(), ser.registration.to_dict()
    assert rp.pop("timings_s").keys() == rs.pop("timings_s").keys()  # the times differ, nothing else
    assert rp == rs
    for name in ("zone_table", "zones_repaired", "indications", "patches"):
        pd.testing.assert_frame_equal(getattr(par, name), getattr(ser, name), obj=name)
    np.testing.assert_array_equal(par.life_map, ser.life_map)
    assert par.assumptions == ser.assumptions and par.notes == ser.notes


def test_repaired_floor_reuses_the_rate_statistics_only_while_its_rates_are_unchanged(monkeypatch):
    # Patched cells keep their measured rates unless the underside cause is removed; then the
    # repaired floor's rate maps are the as-found arrays themselves and their block-maxima
    # statistics are reused, not computed again.  The reused values must be what computing
    # them again on the repaired maps gives.
    from scananalyse import pipeline

    calls = []
    real = pipeline._rate_extremes

    def counted(*a, **k):
        calls.append(1)
        return real(*a, **k)

    monkeypatch.setattr(pipeline, "_rate_extremes", counted)
    pair = _pair_4m()
    an = analyse(pair.new, pair.old, job=Job(diameter=4000.0, target_interval=10.0))
    assert len(an.patches) > 0 and len(calls) == 1  # the as-found statistics only
    rep = an.repaired_maps
    again = real(rep["rate_top_repaired"], rep["rate_under_repaired"], an.zones, pitch=pair.new.pitch, job=an.job)
    checked = 0
    for _, row in an.zones_repaired.iterrows():
        if row["zone"] in again and np.isfinite(row["rate_eva_mm_y"]):
            assert row["rate_eva_mm_y"] == again[row["zone"]].depth_eva_mm
            checked += 1
    assert checked >= 1
    # the underside cause removed: patched cells lose their underside rate, so it is computed again
    an2 = analyse(pair.new, pair.old, job=Job(diameter=4000.0, target_interval=10.0, under_cause_removed=True))
    assert len(an2.patches) > 0 and len(calls) == 3
    assert an2.repaired_maps["rate_under_repaired"] is not an2.rates.rate_under


def test_registration_child_is_stopped_when_the_analysis_fails(forked_starts, monkeypatch):
    # an error in a stage that runs beside the registration's child: the child is killed
    # and reaped before the error reaches the caller (no process outlives the run)
    from scananalyse import zones

    def broken_zone_map(*a, **k):
        raise RuntimeError("zones failed")

    monkeypatch.setattr(zones, "zone_map", broken_zone_map)
    pair = _pair_4m()
    with pytest.raises(RuntimeError, match="zones failed"):
        analyse(pair.new, pair.old, job=Job(diameter=4000.0))
    assert [name for name, _ in forked_starts] == ["register"]
    with pytest.raises(ChildProcessError):
        os.waitpid(forked_starts[0][1], os.WNOHANG)  # already reaped


def test_cli_run_as_a_user_gets_it_matches_a_serial_run(small_pair_files, tmp_path):
    # In this test session an idle Dask thread keeps every in-process run serial (see
    # forked_starts), so the default paths are run here as a user runs them: the CLI in a
    # process of its own, where the registration's child and the figure helpers are on.  The
    # tables must be those of a SCANANALYSE_SERIAL=1 run; the progress lines show which ran.
    import json
    import subprocess
    import sys

    from scananalyse.forked import _usable_cores

    outs, stages = {}, {}
    for mode in ("default", "serial"):
        env = dict(os.environ, MPLBACKEND="Agg")
        env.pop("SCANANALYSE_SERIAL", None)
        if mode == "serial":
            env["SCANANALYSE_SERIAL"] = "1"
        out = tmp_path / mode
        cmd = [sys.executable, "-m", "scananalyse.cli", "compare", small_pair_files["old_h5"],
               small_pair_files["new_h5"], "--diameter", "4000", "--out", str(out)]
        res = subprocess.run(cmd, capture_output=True, text=True, env=env, stdin=subprocess.DEVNULL, timeout=300)
        assert res.returncode == 0, res.stderr[-2000:]
        stages[mode] = [line.split(":")[1].strip() for line in res.stderr.splitlines()
                        if line.startswith("scananalyse: ") and line.rstrip().endswith(" s")]
        outs[mode] = out
    for name in ("zones.csv", "zones_repaired.csv", "patches.csv", "indications.csv"):
        assert (outs["default"] / name).read_bytes() == (outs["serial"] / name).read_bytes(), name
    reg = [json.loads((outs[m] / "registration.json").read_text()) for m in ("default", "serial")]
    for r in reg:
        r.pop("timings_s")
    assert reg[0] == reg[1]
    assert stages["serial"].index("registration") < stages["serial"].index("attribution")
    if sys.platform.startswith("linux") and _usable_cores() >= 2:  # the child ran beside the first stages
        assert stages["default"].index("attribution") < stages["default"].index("registration")
