"""The whole analysis on synthetic floors with known truth (invented data)."""


import numpy as np
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
    from scananalyse.report.content import actions

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
    # zones whose own fit still fails borrow the floor's, in the extreme-value life and in
    # the life distribution alike: their unscanned part is never left out of either
    borrowed = [n for n in user.index if not an.extremes_depth.get(n) and z.loc[n, "hidden_area_m2"] > 0]
    assert borrowed  # on this floor r1s1, r1s3 and r1s4
    for n in borrowed:
        assert z.loc[n, "eva_source"] == "floor"
        assert an.life_dists[n].hidden_T > 0 and np.isfinite(z.loc[n, "p_mrt_at_due"])
    baseline = analyse(pair.new, pair.old, job=Job(diameter=8000.0)).zone_table.set_index("zone")
    assert baseline.loc["interior", "eva_block_mm"] == pytest.approx(1000.0)


def test_return_curve_bound_at_zone_T_is_the_tables_and_others_are_searched():
    # The return-level figure's upper bound: at the zone's T it is the table's own bound
    # (depth_eva_upper_mm, not searched a second time), at the other periods a fresh
    # profile-likelihood search (Coles 2001, §3.3.3) at that period; the bound grows with T.
    from scananalyse.extremes import return_level_bounds
    from scananalyse.report.figlist import return_curve

    pair = make_pair(diameter_mm=8000.0, pitch_new=20.0, pitch_old=25.0, seed=8)
    an = analyse(pair.new, pair.old, job=Job(diameter=8000.0))
    z = an.extremes_depth["interior"]
    assert z.fit is not None and z.bounds.method == "profile"
    T_line, lvl, lower, upper, Ts = return_curve(z)
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


def test_figure_file_stems_keep_letters_and_digits_only():
    # Zone names reach the figure slugs; the figures are numbered in the report's order, so
    # two names that differ only in characters a file name cannot keep still give two files.
    from scananalyse.report.figlist import file_stem

    assert file_stem("probability_a b/c") == "probability_a_b_c"
    assert len(file_stem("x" * 100)) == 60


def _pair_4m():
    return make_pair(diameter_mm=4000.0, pitch_new=20.0, pitch_old=25.0, seed=11, rotation_deg=0.8,
                     shift_mm=(40.0, 20.0))


def test_repaired_floor_reuses_the_rate_statistics_only_while_its_rates_are_unchanged(monkeypatch):
    # Patched cells keep their measured rates unless the underside cause is removed; then the
    # repaired floor's rate maps are the as-found arrays themselves and their block-maxima
    # statistics are reused, not computed again.  The reused values must be what computing
    # them again on the repaired maps gives.
    from scananalyse import extremes, pipeline

    calls = []
    real = extremes.rate_statistics

    def counted(*a, **k):
        calls.append(1)
        return real(*a, **k)

    monkeypatch.setattr(pipeline, "rate_statistics", counted)  # the as-found statistics
    monkeypatch.setattr(extremes, "rate_statistics", counted)  # the repaired floor's (repair.py)
    pair = _pair_4m()
    an = analyse(pair.new, pair.old, job=Job(diameter=4000.0, target_interval=10.0))
    assert len(an.patches) > 0 and len(calls) == 1  # the as-found statistics only
    rep = an.repaired_maps
    again = real(rep["rate_top_repaired"], rep["rate_under_repaired"], an.zones, pitch=pair.new.pitch,
                 block_mm=an.job.block_mm, seed=an.job.seed)
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


def test_stages_run_in_the_documented_order():
    # pipeline.analyse calls the stages in the order of docs/architecture.md, each timed once
    from scananalyse.progress import Progress

    pair = _pair_4m()
    prog = Progress(quiet=True)
    analyse(pair.new, pair.old, job=Job(diameter=4000.0), progress=prog)
    assert list(prog.timings) == ["registration", "resampling", "attribution", "zones", "extremes", "rates",
                                  "indications", "assessment", "probability", "repairs"]
    prog1 = Progress(quiet=True)
    analyse(pair.new, None, job=Job(diameter=4000.0), progress=prog1)
    assert "registration" not in prog1.timings and list(prog1.timings)[0] == "attribution"


def test_no_process_wide_settings_in_the_package():
    # The package changes no allocator or huge-page setting of the process it runs in
    # (docs/reliability.md P15): the environment is the user's.
    from pathlib import Path

    import scananalyse

    root = Path(scananalyse.__file__).parent
    hits = [f"{f.relative_to(root)}" for f in root.rglob("*.py")
            if any(w in f.read_text(encoding="utf-8") for w in ("mallopt", "malloc_trim", "_set_madvise_hugepage"))]
    assert hits == []


def test_compare_refuses_an_unreliable_registration():
    # Issue: never short-term rates from a failed alignment.  A 3 m floor rotated 2° cannot be
    # registered reliably (the rotation is unobservable at that size, register's own check);
    # analyse refuses with one line naming the older scan and what to do.
    from scananalyse.errors import InputError

    p = make_pair(diameter_mm=3000.0, pitch_new=20.0, pitch_old=25.0, seed=1)
    with pytest.warns(Warning), pytest.raises(InputError, match=r"could not be aligned reliably.*control points"):
        analyse(p.new, p.old, job=Job(diameter=3000.0))


def test_zone_life_distribution_columns_and_target_probability():
    # The zones tables carry the life distribution; p05 <= p50 <= p95 and the probabilities
    # are probabilities of the draws at the recommended interval (LifeDistribution.row).
    from scananalyse.assess import PROBABILITY_COLUMNS

    # a mild floor (slow pits, none hidden) whose interior keeps a positive interval (at
    # 0.15 mm/y its unscanned part's 95 % bound is past the allowance since that part takes
    # no bounded tail and counts blocks by their coverage: 0 y)
    pair = make_pair(diameter_mm=4000.0, pitch_new=20.0, pitch_old=25.0, seed=11, rotation_deg=0.8,
                     shift_mm=(40.0, 20.0), max_pit_rate=0.10, n_hidden_pits=0)
    an = analyse(pair.new, pair.old, job=Job(diameter=4000.0))
    for t in (an.zone_table, an.zones_repaired):
        assert set(PROBABILITY_COLUMNS) <= set(t.columns)
    z = an.zone_table.set_index("zone")
    ok = [n for n, d in an.life_dists.items() if d.ok]
    assert ok
    for n in ok:
        r = z.loc[n]
        assert r.life_p05_y <= r.life_p50_y <= r.life_p95_y
        d = an.life_dists[n]
        if np.isnan(r.interval_recommended_y):  # a zone nobody scanned nor read: no due date, no probability at it
            assert "no-data" in r["flags"] and np.isnan(r.p_mrt_at_due) and np.isnan(r.p_leak_at_due)
            continue
        assert r.p_mrt_at_due == pytest.approx(float(np.mean(d.life_mrt <= r.interval_recommended_y)))
        assert 0.0 <= r.p_leak_at_due <= r.p_mrt_at_due <= 1.0
    # a target probability below what the recommendation carries shortens it, and says so
    n = max((k for k in ok if np.isfinite(z.loc[k, "interval_recommended_y"])),
            key=lambda k: z.loc[k, "interval_recommended_y"])
    rec, p_at = z.loc[n, "interval_recommended_y"], z.loc[n, "p_mrt_at_due"]
    if rec > 0 and p_at > 0.002:
        target = max(p_at / 4.0, 0.001)
        an2 = analyse(pair.new, pair.old, job=Job(diameter=4000.0, target_probability=target))
        r2 = an2.zone_table.set_index("zone").loc[n]
        assert r2.interval_recommended_y < rec and r2.limiting == "probability"
        # the target is met, or the zone is at 0 and flagged (already too likely below MRT)
        assert r2.p_mrt_at_due <= target or (r2.interval_recommended_y == 0.0
                                             and "probability-above-target" in r2["flags"])
    else:
        pytest.fail(f"the test floor no longer gives a zone with a positive interval and risk ({rec}, {p_at})")


def test_repaired_life_distribution_of_untouched_zones_is_as_found():
    # Zones no patch touches have the same life distribution after repair as found: the
    # same draws (their inputs are equal, the seeds per zone fixed).
    from scananalyse.evlife import floor_fit
    from scananalyse.probability import life_distributions, repaired_rates

    pair = make_pair(diameter_mm=4000.0, pitch_new=20.0, pitch_old=25.0, seed=11, rotation_deg=0.8,
                     shift_mm=(40.0, 20.0), max_pit_rate=0.15, n_hidden_pits=0)
    an = analyse(pair.new, pair.old, job=Job(diameter=4000.0, zone_rings=2, zone_sectors=4))
    rm = an.repaired_maps
    assert rm["patched"].any()
    # the floor's fit, lent to zones with none of their own (as the pipeline does)
    floor = floor_fit(an.new.thickness, an.zones, nominal=an.new.meta.nominal, censored=an.rates.censored,
                      threshold=an.new.meta.threshold, pitch=an.new.pitch, block_mm=an.job.block_mm, seed=an.job.seed)
    again = life_distributions(rm["thickness_repaired"], repaired_rates(an.rates, rm), an.zones, an.mrt_map,
                               an.extremes_depth, nominal=an.new.meta.nominal, sigma_t=an.rates.sigma_new,
                               pitch=an.new.pitch, seed=an.job.seed, floor_extremes=floor)
    n_same = 0
    for k, name in enumerate(an.zones.names):
        if an.life_dists[name].ok and not rm["patched"][an.zones.labels == k].any():
            np.testing.assert_array_equal(again[name].life_mrt, an.life_dists[name].life_mrt)
            n_same += 1
    assert n_same >= 1


def test_floor_fit_made_once(monkeypatch):
    # the whole floor's depth fit, lent to a zone with none of its own (here the unscanned
    # critical zone), is made once for the hidden parts and the life distributions
    from scananalyse import evlife

    made = []
    real = evlife._floor_fit

    def counted(*a, **kw):
        made.append(1)
        return real(*a, **kw)

    monkeypatch.setattr(evlife, "_floor_fit", counted)
    pair = make_pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, seed=3, max_pit_rate=0.15, method="UT")
    an = analyse(pair.new, pair.old, job=Job(diameter=5000.0))
    assert an.hidden["critical"].source == "floor" and an.life_dists["interior"].ok
    assert len(made) == 1
