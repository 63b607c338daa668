"""Property-based tests (hypothesis) of the readers and of invariants of the analysis (issue 9).

Properties (each drawn from seeded strategies, ``derandomize=True`` so a CI run
is reproducible; ``deadline=None`` because the first example pays for imports):

1. CSV round trip: any valid small grid written with ``write_csv_scan`` reads back identical.
2. HDF5 round trip: the same for ``write_h5_scan``.
3. Corrupted CSV (byte flips, truncation, line deletion/duplication, inserted bytes)
   either reads into a valid FloorScan or raises InputError with one line naming the
   file; never another exception.
4. Registration of a scan onto itself is the identity (transform and resampled grid).
5. Rates are never negative (every rate map of ``compute_rates``).
6. The recommended interval is never above any of its bounds (code formula, local
   life, extreme-value life, cap, initial interval when it applies) and never below 0.
7. Patch plates cover every cell marked for repair.

Ground truth: the round trips compare against the scan that was written; the
invariants are the design contract (design.md §3.5, docs/assessment.md) and
common sense of the trade (a rate of metal loss is not negative; "common
practice, no source").
"""

from __future__ import annotations

import datetime as dt
import math
import os
import warnings

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from scananalyse.errors import InputError, ScanWarning
from scananalyse.io import read_csv_scan, read_h5_scan, write_csv_scan, write_h5_scan
from scananalyse.io import validate as v
from scananalyse.scan import FloorScan, ScanMeta

COMMON = dict(deadline=None, derandomize=True, suppress_health_check=[HealthCheck.function_scoped_fixture,
                                                                     HealthCheck.too_slow])

# --------------------------------------------------------------------------- strategies
_TEXT = st.text(alphabet=st.characters(blacklist_categories=("Cc", "Cs", "Zl", "Zp")), max_size=24).map(
    lambda s: " ".join(s.split()))
_KEY = st.from_regex(r"[a-z][a-z0-9_]{0,8}", fullmatch=True).filter(
    lambda k: k not in v.KNOWN_KEYS and k not in v.RESERVED_KEYS and k not in v.GRID_KEYS)


@st.composite
def valid_scans(draw):
    """A small FloorScan that the v1 formats can hold (thickness in (0, 3 x nominal], >= 1 scanned cell)."""
    units = draw(st.sampled_from(["mm", "in"]))
    factor = v.UNIT_FACTORS[units]
    rows = draw(st.integers(1, 6))
    cols = draw(st.integers(1, 6))
    # Scalars are drawn in the file's unit and converted as a reader does (x 25.4 for inches):
    # an inch scan holds millimetre values that some inch value maps to.
    nominal = draw(st.floats(2.0, 30.0, allow_nan=False).map(lambda u: u / factor)) * factor
    pitch = draw(st.floats(0.5, 200.0, allow_nan=False).map(lambda u: u / factor)) * factor
    x0 = draw(st.floats(-5e4, 5e4, allow_nan=False).map(lambda u: u / factor)) * factor
    y0 = draw(st.floats(-5e4, 5e4, allow_nan=False).map(lambda u: u / factor)) * factor
    top = np.float32(3 * nominal)
    if float(top) > 3 * nominal:  # float32 rounding must not put a value above the format's limit
        top = np.nextafter(top, np.float32(0))
    t = draw(hnp.arrays(np.float32, (rows, cols),
                        elements=st.floats(float(np.float32(0.01)), float(top), width=32, allow_nan=False)))
    scanned = draw(hnp.arrays(bool, (rows, cols)))
    if not scanned.any():
        scanned[draw(st.integers(0, rows - 1)), draw(st.integers(0, cols - 1))] = True
    t = np.where(scanned, t, np.float32(np.nan)).astype(np.float32)
    side = draw(st.none() | hnp.arrays(np.int8, (rows, cols), elements=st.integers(0, 2)))
    plate = draw(st.none() | hnp.arrays(np.int32, (rows, cols), elements=st.integers(-1, 10 ** 6)))
    inspected = draw(st.dates(dt.date(1960, 1, 1), dt.date(2099, 12, 31)))
    installed = draw(st.none() | st.dates(dt.date(1930, 1, 1), inspected - dt.timedelta(days=1)))
    meta = ScanMeta(
        inspected=inspected, nominal=nominal, units=units, tank=draw(_TEXT),
        method=draw(st.sampled_from(["MFL", "UT", "", "MFL+UT prove-up"])),
        threshold=draw(st.none() | st.floats(0.0, 5.0, allow_nan=False).map(lambda u: u / factor * factor)),
        sigma=draw(st.none() | st.floats(0.0, 1.0, allow_nan=False).map(lambda u: u / factor * factor)),
        installed=installed,
        extra=draw(st.dictionaries(_KEY, _TEXT.filter(bool), max_size=3)))
    return FloorScan(thickness=t, x0=x0, y0=y0, pitch=pitch, meta=meta, side=side, plate=plate)


def assert_same_scan(a: FloorScan, b: FloorScan, *, layers_only_on_scanned: bool):
    assert a.shape == b.shape
    np.testing.assert_array_equal(a.thickness, b.thickness)  # NaN positions equal, values bit-equal
    assert b.thickness.dtype == np.float32
    # Geometry and metadata come back exactly (the writers choose digits that read back).
    assert (b.x0, b.y0, b.pitch) == (a.x0, a.y0, a.pitch)
    for name in ("inspected", "nominal", "units", "tank", "method", "threshold", "sigma", "installed", "extra"):
        assert getattr(b.meta, name) == getattr(a.meta, name), name
    for name, empty in (("side", 0), ("plate", -1)):
        la, lb = getattr(a, name), getattr(b, name)
        if la is None:
            assert lb is None, name
            continue
        assert lb is not None, name
        if layers_only_on_scanned:  # CSV holds layers only on scanned rows
            la = np.where(a.scanned, la, empty)
        np.testing.assert_array_equal(la, lb, err_msg=name)


@pytest.fixture(scope="module")
def work(tmp_path_factory):
    return tmp_path_factory.mktemp("props")


# --------------------------------------------------------------------------- 1, 2 round trips
@settings(max_examples=60, **COMMON)
@given(scan=valid_scans())
def test_csv_round_trip(work, scan):
    p = work / "rt.csv"
    write_csv_scan(scan, p)
    back = read_csv_scan(p)
    assert_same_scan(scan, back, layers_only_on_scanned=True)


@settings(max_examples=60, **COMMON)
@given(scan=valid_scans())
def test_h5_round_trip(work, scan):
    p = work / "rt.h5"
    write_h5_scan(scan, p)
    back = read_h5_scan(p)
    assert_same_scan(scan, back, layers_only_on_scanned=False)


# --------------------------------------------------------------------------- 3 corruptions
def _base_csv_bytes() -> bytes:
    rng = np.random.default_rng(2024)
    t = rng.uniform(2.0, 6.35, (5, 7)).astype(np.float32)
    t[rng.random((5, 7)) < 0.2] = np.nan
    meta = ScanMeta(inspected=dt.date(2027, 3, 1), nominal=6.35, units="mm", tank="TK-PROP", method="MFL",
                    threshold=1.0, sigma=0.1, installed=dt.date(2001, 1, 1), extra={"crew": "invented crew B"})
    scan = FloorScan(t, x0=-30.0, y0=40.0, pitch=10.0, meta=meta, side=rng.integers(0, 3, (5, 7)),
                     plate=rng.integers(-1, 4, (5, 7)))
    import tempfile

    with tempfile.TemporaryDirectory() as d:
        p = os.path.join(d, "base.csv")
        write_csv_scan(scan, p)
        with open(p, "rb") as fh:
            return fh.read()


BASE_CSV = _base_csv_bytes()


@st.composite
def corruptions(draw):
    data = bytearray(BASE_CSV)
    for _ in range(draw(st.integers(1, 4))):
        op = draw(st.sampled_from(["flip", "truncate", "delete_line", "duplicate_line", "insert", "swap_lines"]))
        if not data:
            break
        if op == "flip":
            i = draw(st.integers(0, len(data) - 1))
            data[i] = draw(st.integers(0, 255))
        elif op == "truncate":
            del data[draw(st.integers(0, len(data) - 1)):]
        elif op == "insert":
            i = draw(st.integers(0, len(data)))
            data[i:i] = draw(st.binary(min_size=1, max_size=8) | st.sampled_from(
                [b",", b"\n", b"#", b":", b"nan", b"-", b"1e309", b"\xef\xbb\xbf", b"\r", b'"']))
        else:
            lines = bytes(data).split(b"\n")
            k = draw(st.integers(0, len(lines) - 1))
            if op == "delete_line":
                del lines[k]
            elif op == "duplicate_line":
                lines.insert(k, lines[k])
            else:
                m = draw(st.integers(0, len(lines) - 1))
                lines[k], lines[m] = lines[m], lines[k]
            data = bytearray(b"\n".join(lines))
    return bytes(data)


def check_read_outcome(path):
    """Read ``path``: a valid FloorScan or one-line InputError naming the file; nothing else."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        warnings.simplefilter("ignore", ScanWarning)  # e.g. unknown columns are ignored with a warning
        try:
            scan = read_csv_scan(path)
        except InputError as exc:
            msg = str(exc)
            assert "\n" not in msg and msg.startswith(str(path)), msg
            return None
    t = scan.thickness
    fin = np.isfinite(t)
    assert fin.any()
    assert np.all(t[fin] > 0) and np.all(t[fin] <= 3 * scan.meta.nominal * (1 + 1e-6))
    assert scan.pitch > 0 and math.isfinite(scan.x0) and math.isfinite(scan.y0)
    if scan.side is not None:
        assert scan.side.min() >= 0 and scan.side.max() <= 2
    return scan


@settings(max_examples=150, **COMMON)
@given(data=corruptions())
def test_corrupted_csv_fails_cleanly(work, data):
    p = work / "corrupt.csv"
    p.write_bytes(data)
    check_read_outcome(p)


def test_corruption_base_is_valid(work):
    p = work / "base.csv"
    p.write_bytes(BASE_CSV)
    assert check_read_outcome(p) is not None


# --------------------------------------------------------------------------- 4 registration identity
@settings(max_examples=6, **COMMON)
@given(seed=st.integers(0, 10_000), pitch=st.sampled_from([20.0, 25.0]), diameter=st.sampled_from([3000.0, 4000.0]))
def test_register_onto_itself_is_identity(seed, pitch, diameter):
    from scananalyse.register import register, resample_onto
    from scananalyse.synth import make_scan

    scan, _truth = make_scan(diameter_mm=diameter, pitch=pitch, seed=seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ScanWarning)
        reg = register(scan, scan)
    tr = reg.transform
    # Synthetic ground truth: the true transform is the identity. Tolerance: a hundredth of a
    # cell in shift and a thousandth of a degree in rotation (well below the sub-cell accuracy
    # the registration claims, docs/registration.md).
    assert abs(tr.rotation_deg) < 1e-3
    assert math.hypot(tr.dx_mm, tr.dy_mm) < 0.01 * pitch
    back = resample_onto(scan, scan, tr)
    assert back.same_grid(scan)
    np.testing.assert_array_equal(np.isnan(back.thickness), np.isnan(scan.thickness))
    np.testing.assert_allclose(back.thickness, scan.thickness, atol=1e-3, equal_nan=True)


# --------------------------------------------------------------------------- 5 rates never negative
@st.composite
def rate_inputs(draw):
    rows, cols = draw(st.integers(2, 12)), draw(st.integers(2, 12))
    nominal = draw(st.floats(4.0, 12.0))
    seed = draw(st.integers(0, 2 ** 31))
    rng = np.random.default_rng(seed)
    t_new = rng.uniform(0.05, nominal * 1.05, (rows, cols)).astype(np.float32)
    t_new[rng.random((rows, cols)) < 0.15] = np.nan
    # Older thickness: sometimes thinner than now (repairs, misalignment), often thicker.
    t_old = (t_new + rng.normal(0.3, 0.8, (rows, cols))).astype(np.float32)
    t_old = np.clip(t_old, 0.05, nominal * 1.2).astype(np.float32)
    t_old[rng.random((rows, cols)) < 0.15] = np.nan
    side = rng.integers(0, 3, (rows, cols)).astype(np.int8)
    installed = draw(st.none() | st.dates(dt.date(1970, 1, 1), dt.date(2010, 1, 1)))
    d_old = draw(st.dates(dt.date(2011, 1, 1), dt.date(2020, 1, 1)))
    d_new = d_old + dt.timedelta(days=draw(st.integers(30, 6000)))
    thr = draw(st.none() | st.floats(0.1, 2.0))
    method = "MFL" if thr is not None else "UT"
    sig_new, sig_old = draw(st.floats(0.01, 0.5)), draw(st.floats(0.01, 0.5))
    meta_new = ScanMeta(inspected=d_new, nominal=nominal, method=method, threshold=thr, sigma=sig_new,
                        installed=installed)
    meta_old = meta_new.replace(inspected=d_old, sigma=sig_old)
    new = FloorScan(t_new, x0=0.0, y0=0.0, pitch=20.0, meta=meta_new)
    old = None if draw(st.booleans()) and installed is not None else FloorScan(t_old, 0.0, 0.0, 20.0, meta_old)
    opts = dict(governing=draw(st.sampled_from(["max", "short", "long"])),
                unknown_side=draw(st.sampled_from(["under", "top"])),
                crossed=draw(st.sampled_from(["profile", "upper", "mid", "lower"])),
                k_sigma=draw(st.floats(0.0, 4.0)))
    return new, old, side, opts


@settings(max_examples=60, **COMMON)
@given(inp=rate_inputs())
def test_rates_never_negative(inp):
    from scananalyse.rates import RateOptions, compute_rates

    new, old, side, opts = inp
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ScanWarning)
        try:
            lr = compute_rates(new, old, side, options=RateOptions(**opts))
        except InputError:
            # An option combination the module refuses (e.g. short-term governing without an
            # older scan) must be refused as bad input, never answered with negative rates.
            return
    for name in ("rate_short_top", "rate_short_under", "rate_long_top", "rate_long_under", "rate_long_bound",
                 "rate_top", "rate_under"):
        r = np.asarray(getattr(lr, name), dtype=np.float64)
        assert r.shape == new.shape, name
        fin = np.isfinite(r)
        assert not np.isneginf(r).any(), name
        assert np.all(r[fin] >= 0), (name, float(r[fin].min()))
    # loss maps are depths: never negative either
    for name in ("loss", "loss_top", "loss_under"):
        a = np.asarray(getattr(lr, name), dtype=np.float64)
        assert np.all(a[np.isfinite(a)] >= 0), name


# --------------------------------------------------------------------------- 6 interval bounds
@st.composite
def assess_inputs(draw):
    from scananalyse.rules import get_ruleset
    from scananalyse.zones import FloorGeometry, zone_map

    diameter = draw(st.sampled_from([1500.0, 2500.0, 4000.0]))
    pitch = draw(st.sampled_from([50.0, 100.0]))
    n = int(math.ceil(diameter / pitch)) + 2
    x0 = -pitch * (n - 1) / 2
    seed = draw(st.integers(0, 2 ** 31))
    rng = np.random.default_rng(seed)
    nominal = draw(st.floats(5.0, 12.0))
    t = rng.uniform(draw(st.floats(0.2, 4.0)), nominal, (n, n)).astype(np.float32)
    xs = x0 + pitch * np.arange(n)
    X, Y = np.meshgrid(xs, xs)
    t[np.hypot(X, Y) > diameter / 2] = np.nan
    t[rng.random((n, n)) < draw(st.floats(0.0, 0.9))] = np.nan
    rt = rng.exponential(draw(st.floats(0.0, 0.3)), (n, n)).astype(np.float32)
    ru = rng.exponential(draw(st.floats(0.0, 0.3)), (n, n)).astype(np.float32)
    rt[rng.random((n, n)) < 0.1] = 0.0
    ru[rng.random((n, n)) < 0.05] = np.nan
    side = rng.integers(0, 3, (n, n)).astype(np.int8)
    annular = draw(st.none() | st.sampled_from([300.0, 500.0]))
    rules = get_ruleset("api653")
    geom = FloorGeometry(diameter_mm=diameter, annular_width_mm=annular)
    grid = FloorScan(t, x0=x0, y0=x0, pitch=pitch, meta=ScanMeta(inspected=dt.date(2027, 1, 1), nominal=nominal))
    zmap = zone_map(grid, geom, rules)
    extremes = {}
    for name in zmap.names:
        if draw(st.booleans()):
            d = draw(st.floats(0.0, nominal))
            extremes[name] = {"depth_eva_mm": d, "depth_eva_upper_mm": d + draw(st.floats(0.0, 2.0)),
                              "rate_eva_mm_y": draw(st.none() | st.floats(0.0, 0.5))}
    installed = draw(st.none() | st.dates(dt.date(1960, 1, 1), dt.date(2020, 1, 1)))
    thr = draw(st.none() | st.floats(0.2, 1.5))
    meta = ScanMeta(inspected=dt.date(2027, 1, 1), nominal=nominal, method="MFL" if thr else "UT", threshold=thr,
                    sigma=0.1, installed=installed)
    no_rates = draw(st.integers(0, 5)) == 0
    opts = dict(leak_detection=draw(st.booleans()), release_prevention_barrier=draw(st.booleans()),
                coated=draw(st.booleans()), cp_effective=draw(st.booleans()),
                unknown_side=draw(st.sampled_from(["under", "top"])),
                target_interval_years=draw(st.sampled_from([None, 5.0, 10.0, 20.0])))
    return dict(thickness=t, side=side, rate_top=None if no_rates else rt, rate_under=None if no_rates else ru,
                zones=zmap, meta=meta, rules=rules, extremes=extremes, pitch_mm=pitch,
                rate_short_available=draw(st.booleans())), opts


@settings(max_examples=50, **COMMON)
@given(inp=assess_inputs())
def test_recommended_interval_within_bounds(inp):
    from scananalyse.assess import AssessOptions, assess_zones

    kw, opts = inp
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ScanWarning)
        table = assess_zones(options=AssessOptions(**opts), **kw)
    assert len(table) == len(kw["zones"].names)
    for _, z in table.iterrows():
        rec = float(z["interval_recommended_y"])
        if math.isnan(rec):
            continue
        # design.md §3.5: never more than interval_code_y, life_local_y, the extreme-value life or
        # the cap, and never below 0 (so a negative bound, a zone already below MRT, gives 0).
        assert rec >= 0.0, z.to_dict()
        bounds = ["interval_code_y", "life_local_y", "life_eva_y", "cap_y"]
        if "initial-interval" in str(z["flags"] or ""):
            bounds.append("initial_interval_y")
        for b in bounds:
            val = float(z[b])
            if math.isnan(val):
                continue
            assert rec <= max(val, 0.0) + 1e-9, (b, val, rec, z.to_dict())


# --------------------------------------------------------------------------- 7 patches cover repairs
@st.composite
def repair_masks(draw):
    rows, cols = draw(st.integers(5, 45)), draw(st.integers(5, 45))
    pitch = draw(st.sampled_from([10.0, 20.0, 25.0, 50.0]))
    rng = np.random.default_rng(draw(st.integers(0, 2 ** 31)))
    needs = np.zeros((rows, cols), bool)
    ii, jj = np.mgrid[0:rows, 0:cols]
    for _ in range(draw(st.integers(0, 5))):  # pit-like discs
        ci, cj, r = rng.uniform(0, rows), rng.uniform(0, cols), rng.uniform(0.5, 5)
        needs |= (ii - ci) ** 2 + (jj - cj) ** 2 <= r * r
    needs |= rng.random((rows, cols)) < draw(st.sampled_from([0.0, 0.005, 0.03]))  # scattered cells
    plate = None
    if draw(st.booleans()):  # plates in strips: their boundaries are seams to keep clear of
        w = draw(st.integers(3, 20))
        plate = (jj // w).astype(np.int32)
    return needs, dict(x0=draw(st.floats(-3000, 3000)), y0=draw(st.floats(-3000, 3000)), pitch=pitch), plate


@settings(max_examples=25, **COMMON)
@given(inp=repair_masks())
def test_patches_cover_every_cell_needing_repair(inp):
    from scananalyse.repair import plan_patches, uncovered_cells
    from scananalyse.rules import get_ruleset

    needs, geo, plate = inp
    rules = get_ruleset("api653")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ScanWarning)
        patches = plan_patches(needs, rules=rules, plate=plate, **geo)
    n, mask = uncovered_cells(needs, patches, **geo)
    assert n == 0, (n, np.argwhere(mask)[:5].tolist(), len(patches))
    if not needs.any():
        assert len(patches) == 0


# --------------------------------------------------------------------------- regressions
# Inputs found by the properties above with more examples (fuzz/fuzz_readers.py and
# max_examples in the thousands); kept as fixed cases so every run checks them.
def test_regression_carriage_return_in_column_header_row(work):
    """A lone CR inside the first non-comment line (found by the corruption property)."""
    p = work / "cr.csv"
    p.write_bytes(b"\x01\rformat: scananalyse-scan 1\n# inspected: 2027-03-01\n# units: mm\n# pitch: 10\n"
                  b"# nominal: 6.35\nx,y,thickness\n0,0,5\n")
    assert check_read_outcome(p) is None


def test_regression_thickness_at_three_times_nominal_round_trips(work):
    """A float32 thickness at the 3 x nominal limit is valid in memory and in HDF5; its CSV
    text (shortest decimal of the float32) must read back too (found by the CSV round trip)."""
    nominal = 14.580445612795899
    t = np.float32(3 * nominal)
    if float(t) > 3 * nominal:
        t = np.nextafter(t, np.float32(0))
    scan = FloorScan(np.array([[t]], np.float32), x0=0.0, y0=0.0, pitch=1.0,
                     meta=ScanMeta(inspected=dt.date(2000, 1, 1), nominal=nominal))
    write_h5_scan(scan, work / "limit.h5")
    assert_same_scan(scan, read_h5_scan(work / "limit.h5"), layers_only_on_scanned=False)
    write_csv_scan(scan, work / "limit.csv")
    assert_same_scan(scan, read_csv_scan(work / "limit.csv"), layers_only_on_scanned=True)


def test_regression_tiny_rates_give_long_life_without_warning():
    """Subnormal rates (1e-39 mm/y) mean a practically unlimited life, not a RuntimeWarning
    (found by the interval-bounds property; pytest turns warnings into errors)."""
    from scananalyse.assess import local_life_map

    t = np.full((2, 3), 5.0, np.float32)
    tiny = np.full((2, 3), 1e-39, np.float32)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        life = local_life_map(t, np.zeros_like(t), tiny, 2.54)
    # (5 - 2.54) / 1e-39 overflows float32: the life is beyond any interval (inf).
    assert np.all(life > 1e30)
