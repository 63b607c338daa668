"""Design rules that keep big floors within memory: float32 grids, no needless copies.

A 100 m floor at 10 mm pitch is about 80 million cells; a float64 copy of one map is
640 MB.  These tests pin the rules of docs/architecture.md and the design notes
("float32 for big grids", "no needless full-grid copies") on small grids, and check
that the speed-ups made for issue 8 give the same answers as the plain definitions.
"""

from __future__ import annotations

import datetime as dt
import warnings

import numpy as np
import pytest

from scananalyse import assess, rates
from scananalyse.attribution import side_map
from scananalyse.extremes import zone_extremes
from scananalyse.io import read_h5_scan, write_h5_scan
from scananalyse.register import RigidTransform, _bilinear_nan, resample_onto
from scananalyse.repair import _boundaries_along_rows, seams_from_plate
from scananalyse.report import figures as F
from scananalyse.scan import FloorScan, ScanMeta
from scananalyse.synth import make_pair


@pytest.fixture(scope="module")
def pair():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return make_pair(diameter_mm=3000.0, seed=2)


def _meta():
    return ScanMeta(inspected=dt.date(2024, 5, 1), nominal=6.35, threshold=1.0, sigma=0.1,
                    installed=dt.date(2000, 1, 1))


def test_floorscan_keeps_a_float32_grid_without_copying():
    # Design rule (architecture: float32 for big grids): a float32 grid is taken as is.
    t = np.full((40, 50), 6.0, dtype=np.float32)
    s = FloorScan(thickness=t, x0=0.0, y0=0.0, pitch=10.0, meta=_meta())
    assert s.thickness.dtype == np.float32
    assert np.shares_memory(s.thickness, t)
    # A float64 grid is stored as float32 (half the memory).
    s64 = FloorScan(thickness=t.astype(np.float64), x0=0.0, y0=0.0, pitch=10.0, meta=_meta())
    assert s64.thickness.dtype == np.float32


def test_h5_read_gives_float32(tmp_path, pair):
    p = tmp_path / "s.h5"
    write_h5_scan(pair.new, p)
    back = read_h5_scan(p)
    assert back.thickness.dtype == np.float32
    np.testing.assert_array_equal(back.thickness, pair.new.thickness)


def test_resample_and_rate_maps_are_float32_and_leave_inputs_alone(pair):
    before = pair.old.thickness.copy()
    on_new = resample_onto(pair.old, pair.new, RigidTransform())
    assert on_new.thickness.dtype == np.float32
    assert not np.shares_memory(on_new.thickness, pair.old.thickness)
    np.testing.assert_array_equal(pair.old.thickness, before)  # input untouched
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lr = rates.compute_rates(pair.new, on_new, side_map(pair.new))
    for name, arr in lr.maps().items():
        assert arr.dtype in (np.float32, np.bool_), name
    mrt = np.full(pair.new.shape, 2.54, dtype=np.float32)
    assert assess.local_life_map(pair.new.thickness, lr.rate_top, lr.rate_under, mrt).dtype == np.float32


def test_bilinear_is_exact_on_a_plane_and_float32():
    # Bilinear interpolation reproduces an affine function exactly (definition of
    # bilinear interpolation; common practice, no source).
    r, c = np.mgrid[0:30, 0:40].astype(np.float64)
    img = (2.0 + 0.05 * r - 0.03 * c).astype(np.float32)
    rng = np.random.default_rng(4)
    ri = rng.uniform(0, 29, (50, 60))
    ci = rng.uniform(0, 39, (50, 60))
    out = _bilinear_nan(img, ri, ci)
    assert out.dtype == np.float32 and out.shape == ri.shape
    np.testing.assert_allclose(out, 2.0 + 0.05 * ri - 0.03 * ci, atol=2e-6)


def test_bilinear_renormalises_over_scanned_neighbours_and_masks_outside():
    img = np.array([[1.0, np.nan], [3.0, 5.0]], dtype=np.float32)
    # At (0.4, 0.4) the nearest cell [0, 0] is scanned; weights over the three scanned
    # neighbours: 0.36·1 + 0.24·3 + 0.16·5 over 0.76 (hand computation).
    got = _bilinear_nan(img, np.array([0.4, 0.4, -0.6]), np.array([0.4, 0.6, 0.0]))
    assert got[0] == pytest.approx((0.36 * 1 + 0.24 * 3 + 0.16 * 5) / 0.76, rel=1e-6)
    assert np.isnan(got[1])  # nearest cell [0, 1] not scanned
    assert np.isnan(got[2])  # nearest cell outside the grid


def _boundaries_by_loop(ids, kmax):
    """The definition, cell by cell (tiny grids only): each valid cell and the next
    valid cell along its row within kmax unscanned cells, when their ids differ."""
    rows, keys = [], []
    for i in range(ids.shape[0]):
        valid = [j for j in range(ids.shape[1]) if ids[i, j] >= 0]
        for a, b in zip(valid[:-1], valid[1:]):
            if b - a - 1 <= kmax and ids[i, a] != ids[i, b]:
                rows.append(i)
                keys.append(a + b)
    return np.array(rows, dtype=np.int64), np.array(keys, dtype=np.int64)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_plate_boundaries_match_the_definition(seed):
    rng = np.random.default_rng(seed)
    ids = rng.integers(-1, 4, size=(23, 31)).astype(np.int32)
    for grid in (ids, ids.T):
        for kmax in (0, 2):
            got = _boundaries_along_rows(grid, kmax)
            want = _boundaries_by_loop(grid, kmax)
            np.testing.assert_array_equal(got[0], want[0])
            np.testing.assert_array_equal(got[1], want[1])


def test_seams_of_two_plates_lie_on_their_boundary():
    # Two plates meeting at column 20 (between cells 19 and 20): one vertical seam at
    # x = x0 + 19.5·pitch spanning every row (synthetic ground truth).
    plate = np.zeros((10, 40), dtype=np.int32)
    plate[:, 20:] = 1
    segs = seams_from_plate(plate, x0=0.0, y0=0.0, pitch=10.0)
    assert segs.shape[1] == 4 and len(segs) >= 1
    assert np.allclose(segs[:, 0], 195.0) and np.allclose(segs[:, 2], 195.0)
    assert segs[:, [1, 3]].min() <= 0.0 and segs[:, [1, 3]].max() >= 90.0


def test_figure_rendered_once_but_changes_are_drawn(tmp_path):
    v = np.linspace(3.0, 6.0, 400 * 300, dtype=np.float32).reshape(400, 300)
    fig = F.floor_map(v, extent=(0.0, 3000.0, 0.0, 4000.0), title="t", label="remaining thickness")
    F.save_png(fig, tmp_path / "a.png")
    cached = F.png_bytes(fig)
    assert (tmp_path / "a.png").read_bytes() == cached
    fresh = F.png_bytes(F.floor_map(v, extent=(0.0, 3000.0, 0.0, 4000.0), title="t",
                                    label="remaining thickness"))
    assert fresh[:8] == b"\x89PNG\r\n\x1a\n" and len(fresh) > 1000
    fig.axes[0].set_title("changed")
    assert F.png_bytes(fig) != cached  # a change to the figure forces a fresh render
    assert F.png_bytes(fig, dpi=60) != F.png_bytes(fig)  # and so does another dpi


def test_decimate_is_float32_and_does_not_copy_small_float32_grids():
    a = np.arange(20, dtype=np.float32).reshape(4, 5)
    r, f = F.decimate(a, how="min", max_pixels=100)
    assert f == 1 and np.shares_memory(r, a)
    big = np.random.default_rng(1).random((300, 200)).astype(np.float32)
    r, f = F.decimate(big, how="max", max_pixels=1000)
    assert r.dtype == np.float32 and f > 1
    assert float(np.nanmax(r)) == float(big.max())  # the worst value is never hidden


def test_zone_extremes_without_gev_test_gives_the_same_bounds():
    # Gumbel block maxima by construction: cells whose per-block maximum is Gumbel
    # (max of many iid exponentials is asymptotically Gumbel; Coles 2001 §3.1.5).
    rng = np.random.default_rng(11)
    depth = rng.exponential(0.3, size=(200, 200)).astype(np.float32)
    mask = np.ones(depth.shape, dtype=bool)
    kw = dict(pitch_mm=10.0, zone_area_mm2=4.0e6 * 3, block_mm=100.0, seed=3, n_boot=200)
    full = zone_extremes(depth, mask, **kw)
    quick = zone_extremes(depth, mask, gev_test=False, **kw)
    assert full and quick and quick.lr_test is None and full.lr_test is not None
    assert quick.depth_eva_mm == full.depth_eva_mm
    assert quick.depth_eva_upper_mm == full.depth_eva_upper_mm
    assert quick.depth_pred_upper_mm == full.depth_pred_upper_mm
