"""Tests of scananalyse.register: accuracy on synthetic pairs with known truth,
agreement with scikit-image's phase correlation, control points, featureless
floors, resampling.

Accuracy targets are those of issue 3: rotation error <= 0.05 deg, shift error
<= 0.3 x the newer pitch (measured as the dx/dy error in the contract's old->new
convention, which equals the displacement error at the tank centre because the
synthetic tanks are centred on the origin).
"""

from __future__ import annotations

import datetime as dt
import functools
import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from skimage.registration import phase_cross_correlation

from scananalyse.errors import InputError, RegistrationWarning
from scananalyse.register import (
    Registration,
    RigidTransform,
    fit_control_points,
    read_control_points,
    register,
    resample_onto,
    write_registration,
)
from scananalyse.scan import FloorScan, ScanMeta
from scananalyse.synth import make_pair

ROT_TOL_DEG = 0.05          # issue 3 target
SHIFT_TOL_CELLS = 0.3       # issue 3 target, in cells of the newer scan


@functools.lru_cache(maxsize=None)
def _pair(**kw):
    return make_pair(**kw)


def pair(**kw):
    return _pair(**kw)


def errors(reg: Registration, truth) -> tuple[float, float]:
    """(rotation error [deg], shift error [mm]) against the synthetic truth."""
    t = reg.transform
    return (abs(t.rotation_deg - truth.rotation_deg),
            math.hypot(t.dx_mm - truth.dx_mm, t.dy_mm - truth.dy_mm))


# --------------------------------------------------------------------------------------
# RigidTransform
# --------------------------------------------------------------------------------------
def test_transform_inverse_compose_matrix():
    # Ground truth: rotation matrix algebra (R(a)R(b) = R(a+b), R^-1 = R(-a)); common practice, no source.
    a = RigidTransform(3.0, 120.0, -40.0)
    b = RigidTransform(-1.2, -15.0, 60.0)
    rng = np.random.default_rng(1)
    x, y = rng.uniform(-5000, 5000, (2, 50))
    xa, ya = a.apply(x, y)
    xi, yi = a.inverse().apply(xa, ya)
    np.testing.assert_allclose(xi, x, atol=1e-9)
    np.testing.assert_allclose(yi, y, atol=1e-9)
    ab = a.compose(b)                       # a first, then b
    xb, yb = b.apply(xa, ya)
    xc, yc = ab.apply(x, y)
    np.testing.assert_allclose(xc, xb, atol=1e-9)
    np.testing.assert_allclose(yc, yb, atol=1e-9)
    assert ab.rotation_deg == pytest.approx(1.8)
    h = a.matrix @ np.vstack([x, y, np.ones_like(x)])
    np.testing.assert_allclose(h[0], xa, atol=1e-9)
    # counter-clockwise positive: (1, 0) rotated by +90 deg goes to (0, 1)
    xq, yq = RigidTransform(90.0).apply(1.0, 0.0)
    assert (float(xq), float(yq)) == pytest.approx((0.0, 1.0), abs=1e-12)


# --------------------------------------------------------------------------------------
# accuracy on synthetic pairs (synth.make_pair truth)
# --------------------------------------------------------------------------------------
CASES = [
    # rotation, shift, new pitch, old pitch, diameter, coverage options
    (0.0, (0.0, 0.0), 10.0, 10.0, 3000.0, {}),
    (2.0, (50.0, -30.0), 10.0, 12.5, 3000.0, {}),
    (-4.5, (280.0, 150.0), 20.0, 15.0, 4000.0, {}),
    (5.0, (-300.0, 200.0), 10.0, 10.0, 3000.0, {"sump": False}),
    (-3.0, (-100.0, -290.0), 20.0, 20.0, 4000.0, {"obstruction": False}),
    (1.3, (123.0, 45.0), 10.0, 12.5, 3500.0, {"shell_margin_mm": 250.0, "shell_margin_old_mm": 80.0}),
    (-5.0, (210.0, -210.0), 10.0, 12.5, 3000.0, {"seam_gap_mm": 60.0}),
    (4.2, (-250.0, -120.0), 12.5, 10.0, 3000.0, {"method": "UT", "threshold": None}),
]


@pytest.mark.parametrize("rot,shift,pn,po,diam,cov", CASES)
def test_accuracy_synthetic(rot, shift, pn, po, diam, cov):
    # Ground truth: synth.make_pair's known old->new transform (synthetic ground truth).
    p = pair(diameter_mm=diam, pitch_new=pn, pitch_old=po, rotation_deg=rot, shift_mm=shift,
             seed=7, **cov)
    reg = register(p.new, p.old)
    er, es = errors(reg, p.truth)
    assert reg.reliable and reg.method == "auto"
    assert er <= ROT_TOL_DEG, f"rotation error {er:.4f} deg"
    assert es <= SHIFT_TOL_CELLS * pn, f"shift error {es:.2f} mm at pitch {pn}"
    assert 0.5 < reg.score <= 1.0
    assert reg.overlap_pct > 80.0
    # the thickness residual after alignment is the corrosion between the outages plus noise,
    # far below the one a misalignment of pits would give
    assert reg.residual_rms_mm < 0.6


# Seeds 1003 and 1019 once made the refinement zig-zag across the minimum without converging
# (full Gauss-Newton steps overshoot when the two pictures of the seams differ), and the result
# fell back to the identity; the others are the seeds with the largest errors of a 30-seed
# sweep (bench/bench_register.py --sweep runs all 30).
HARD_SEEDS = [1003, 1019, 1004, 1008, 1014, 1024]


@pytest.mark.parametrize("seed", HARD_SEEDS)
def test_hard_seeds_converge(seed):
    # Ground truth: synth.make_pair's known transform, 2.0 deg, (120, -80) mm (synthetic ground truth).
    p = pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, seed=seed)
    reg = register(p.new, p.old)
    er, es = errors(reg, p.truth)
    assert reg.method == "auto" and reg.reliable, reg.warnings
    assert all(lv["converged"] for lv in reg.details["refine_levels"])
    assert er <= ROT_TOL_DEG, f"rotation error {er:.4f} deg"
    assert es <= SHIFT_TOL_CELLS * 20.0, f"shift error {es:.2f} mm"


# Large floors: the rotation contrast was once measured on the coarse search's image, in which
# the round coverage outline (a fit at every angle) dominates once the coarse cell is several
# seam widths; the coarse level grew with the floor (320 mm on a 42-60 m floor), the seams faded,
# the sweep's peak stood 0.006-0.019 above its median and well-registered floors fell back to the
# identity (30, 60 and 100 m floors at 10/12.5 mm; this 42 m floor at 40/50 mm is the same case
# at a size that generates in a few seconds: contrast 0.013, coarse pitch 320 mm).
def test_large_floor_not_flagged_flat():
    # Ground truth: synth.make_pair's known transform, 2.0 deg, (120, -80) mm (synthetic ground truth).
    p = pair(diameter_mm=42000.0, pitch_new=40.0, pitch_old=50.0, seed=1)
    reg = register(p.new, p.old)
    er, es = errors(reg, p.truth)
    assert reg.method == "auto" and reg.reliable, reg.warnings
    assert er <= ROT_TOL_DEG, f"rotation error {er:.4f} deg"
    assert es <= SHIFT_TOL_CELLS * 40.0, f"shift error {es:.2f} mm"
    # a floor full of seams must show a clear rotation peak, far above the threshold (0.02)
    assert reg.rotation_contrast >= 0.2
    assert reg.rotation_contrast >= 5.0 * reg.details["rotation_contrast_noise"]


def test_refinement_failure_keeps_coarse_estimate(monkeypatch):
    # Ground truth: synth.make_pair's transform; the coarse search alone finds it to about a
    # coarse cell (its grid step), so a refinement that never converges must not give the identity.
    import scananalyse.register as regmod

    def never_converges(new_lv, old_lv, tr, **kw):
        # moves far off and reports no convergence, like a refinement that zig-zags
        return regmod.RigidTransform(tr.rotation_deg + 3.0, tr.dx_mm + 500.0, tr.dy_mm), {
            "converged": False, "n": 1000, "iterations": 20, "cov": None}

    monkeypatch.setattr(regmod, "_refine_level", never_converges)
    p = pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, seed=1003)
    with pytest.warns(RegistrationWarning, match="did not converge"):
        reg = register(p.new, p.old)
    assert reg.method == "auto-coarse" and not reg.reliable
    er, es = errors(reg, p.truth)
    coarse = reg.details["coarse_pitch_mm"]
    assert er <= 0.25 and es <= coarse, (er, es)
    assert reg.score > 0.5
    assert len(reg.details["refine_levels"][0]["restarts"]) >= 1


@pytest.mark.parametrize("pitch_old", [10.0, 12.5])
def test_subcell_shift_axis_aligned(pitch_old):
    # Ground truth: synth.make_pair's transform, a pure fractional-cell shift with both grids
    # axis-aligned (synthetic ground truth).  The seam bands alone fix the shift only to within
    # a cell here (about 5 mm error at pitch_old 10 without the pit stage); the pits seen in both
    # scans bring it within the 0.3-cell target.
    p = pair(diameter_mm=8000.0, pitch_new=10.0, pitch_old=pitch_old, rotation_deg=0.0,
             shift_mm=(137.0, -84.0), seed=11)
    reg = register(p.new, p.old)
    er, es = errors(reg, p.truth)
    assert reg.reliable and reg.method == "auto"
    assert reg.details["pit_stage"]["applied"]
    assert er <= ROT_TOL_DEG and es <= SHIFT_TOL_CELLS * 10.0, f"shift error {es:.2f} mm"
    # the reported standard error covers the error (about 3 sigma)
    assert es <= 3.0 * reg.std_shift_mm + 0.5


# --------------------------------------------------------------------------------------
# against scikit-image (reference library)
# --------------------------------------------------------------------------------------
def _skimage_shift(new: FloorScan, old: FloorScan) -> tuple[float, float]:
    """Translation from skimage.registration.phase_cross_correlation on the full grids.

    skimage returns the shift registering the moving image on the reference:
    reference[i, j] ~ moving[i - s_r, j - s_c].  With new = reference and old = moving
    on grids of one pitch, new.x0 + j p = old.x0 + (j - s_c) p + dx, so
    dx = s_c p + (new.x0 - old.x0) (and the same for y).
    """
    assert new.pitch == old.pitch
    h = min(new.shape[0], old.shape[0])
    w = min(new.shape[1], old.shape[1])
    a = np.nan_to_num(new.thickness[:h, :w], nan=new.meta.nominal)
    b = np.nan_to_num(old.thickness[:h, :w], nan=old.meta.nominal)
    s, _, _ = phase_cross_correlation(a, b, upsample_factor=10)
    return (float(s[1]) * new.pitch + (new.x0 - old.x0), float(s[0]) * new.pitch + (new.y0 - old.y0))


def test_pure_translation_agrees_with_skimage():
    # Reference: scikit-image phase_cross_correlation (Guizar-Sicairos et al. 2008 upsampled DFT).
    # A shift of whole cells: with both grids axis-aligned and a fractional-cell shift the
    # unscanned seam bands are quantised with different phases on the two grids, which biases
    # the seam positions by up to a cell (docs/registration.md, "Limits").
    p = pair(diameter_mm=3000.0, pitch_new=10.0, pitch_old=10.0, rotation_deg=0.0,
             shift_mm=(140.0, -80.0), seed=11)
    sdx, sdy = _skimage_shift(p.new, p.old)
    # skimage recovers the pure translation (to its 0.1-cell upsampling and the data)
    assert math.hypot(sdx - p.truth.dx_mm, sdy - p.truth.dy_mm) <= SHIFT_TOL_CELLS * 10.0
    reg = register(p.new, p.old)
    assert math.hypot(reg.transform.dx_mm - sdx, reg.transform.dy_mm - sdy) <= 2 * SHIFT_TOL_CELLS * 10.0
    er, es = errors(reg, p.truth)
    assert er <= ROT_TOL_DEG and es <= SHIFT_TOL_CELLS * 10.0


def test_rotation_skimage_fails_ours_succeeds():
    # Reference: a translation-only estimator cannot represent a 3 deg rotation; at the rim
    # (r = 1.5 m) 3 deg is r * 0.052 = 78 mm of displacement (geometry, no source needed).
    p = pair(diameter_mm=3000.0, pitch_new=10.0, pitch_old=10.0, rotation_deg=3.0,
             shift_mm=(90.0, 60.0), seed=12)
    sdx, sdy = _skimage_shift(p.new, p.old)
    sk = RigidTransform(0.0, sdx, sdy)
    tr = p.truth.transform
    ang = np.linspace(0, 2 * np.pi, 36, endpoint=False)
    rx, ry = 1400.0 * np.cos(ang), 1400.0 * np.sin(ang)
    ex = np.hypot(*(np.subtract(sk.apply(rx, ry), tr.apply(rx, ry))))
    assert ex.max() > 5 * 10.0                     # skimage is off by several cells on the floor
    reg = register(p.new, p.old)
    er, es = errors(reg, p.truth)
    assert er <= ROT_TOL_DEG and es <= SHIFT_TOL_CELLS * 10.0
    ours = np.hypot(*(np.subtract(reg.transform.apply(rx, ry), tr.apply(rx, ry))))
    assert ours.max() < 0.1 * ex.max()


# --------------------------------------------------------------------------------------
# control points
# --------------------------------------------------------------------------------------
def test_fit_control_points_exact():
    # Ground truth: points moved by a known rigid transform (synthetic ground truth).
    truth = RigidTransform(-2.7, 315.0, -140.0)
    rng = np.random.default_rng(3)
    old = rng.uniform(-8000, 8000, (5, 2))
    nx, ny = truth.apply(old[:, 0], old[:, 1])
    tr, res = fit_control_points(old, np.column_stack([nx, ny]))
    assert tr.rotation_deg == pytest.approx(truth.rotation_deg, abs=1e-9)
    assert tr.dx_mm == pytest.approx(truth.dx_mm, abs=1e-6)
    assert tr.dy_mm == pytest.approx(truth.dy_mm, abs=1e-6)
    assert res.shape == (5,) and np.all(res < 1e-6)
    # two points suffice
    tr2, _ = fit_control_points(old[:2], np.column_stack([nx, ny])[:2])
    assert tr2.rotation_deg == pytest.approx(truth.rotation_deg, abs=1e-9)


def test_fit_control_points_residuals_with_noise():
    # Ground truth: the residual of each point is its distance to the transformed old point;
    # with one point moved 30 mm off, its residual is the largest (least squares, Umeyama 1991).
    truth = RigidTransform(1.0, 50.0, 20.0)
    old = np.array([[-9000.0, 0.0], [9000.0, 0.0], [0.0, 9000.0], [0.0, -9000.0]])
    nx, ny = truth.apply(old[:, 0], old[:, 1])
    new = np.column_stack([nx, ny])
    new[2, 0] += 30.0
    tr, res = fit_control_points(old, new)
    xn, yn = tr.apply(old[:, 0], old[:, 1])
    np.testing.assert_allclose(res, np.hypot(xn - new[:, 0], yn - new[:, 1]), atol=1e-9)
    assert int(np.argmax(res)) == 2
    # the mean offset of the 4 points is 7.5 mm in x: the translation absorbs it
    assert tr.dx_mm == pytest.approx(truth.dx_mm + 7.5, abs=0.5)


def test_fit_control_points_too_few():
    with pytest.raises(InputError, match="at least 2"):
        fit_control_points([[0.0, 0.0]], [[1.0, 1.0]])


def test_read_control_points(tmp_path):
    f = tmp_path / "cp.csv"
    f.write_text("# units: in\nname,old_x,old_y,new_x,new_y\n"
                 "shell mark,10,0,10.5,0\nsump,0,-20,0.5,-20\n", encoding="utf-8")
    old, new = read_control_points(f)
    np.testing.assert_allclose(old, [[254.0, 0.0], [0.0, -508.0]])      # 1 in = 25.4 mm exactly
    np.testing.assert_allclose(new - old, [[12.7, 0.0], [12.7, 0.0]])


@pytest.mark.parametrize("text,line,match", [
    ("old_x,old_y,new_x,new_y\n1,2,3,4\n5,6,7\n", 3, "expected 4 values"),
    ("old_x,old_y,new_x,new_y\n1,2,3,4\n5,six,7,8\n", 3, "old_y"),
    ("old_x,old_y,new_x\n1,2,3\n", 1, "new_y"),
    ("old_x,old_y,new_x,new_y\n1,2,3,4\n", 1, "at least 2"),
    ("# units: ft\nold_x,old_y,new_x,new_y\n", 1, "units"),
])
def test_read_control_points_bad(tmp_path, text, line, match):
    f = tmp_path / "bad_cp.csv"
    f.write_text(text, encoding="utf-8")
    with pytest.raises(InputError, match=match) as ei:
        read_control_points(f)
    msg = str(ei.value)
    assert f"bad_cp.csv:{line}" in msg and "\n" not in msg


def test_register_with_control_points():
    # Ground truth: synth.make_pair transform; control points = true positions plus 2 mm noise.
    p = pair(diameter_mm=3000.0, pitch_new=10.0, pitch_old=12.5, rotation_deg=-2.5,
             shift_mm=(-160.0, 75.0), seed=5)
    tr = p.truth.transform
    rng = np.random.default_rng(9)
    old = np.array([[-1200.0, -300.0], [1100.0, 500.0], [200.0, 1250.0]])
    nx, ny = tr.apply(old[:, 0], old[:, 1])
    new = np.column_stack([nx, ny]) + rng.normal(0, 2.0, (3, 2))
    only = register(p.new, p.old, control_points=(old, new), auto=False)
    assert only.method == "control-points" and only.reliable
    assert len(only.control_residuals_mm) == 3 and max(only.control_residuals_mm) < 10.0
    both = register(p.new, p.old, control_points=(old, new))
    assert both.method == "auto+control-points" and both.reliable
    er, es = errors(both, p.truth)
    assert er <= ROT_TOL_DEG and es <= SHIFT_TOL_CELLS * 10.0
    d = both.to_dict()
    assert d["method"] == "auto+control-points" and len(d["control_residuals_mm"]) == 3


# --------------------------------------------------------------------------------------
# featureless floors and identity
# --------------------------------------------------------------------------------------
def _plain_floor(diameter_mm, pitch, seed, transform=RigidTransform()):
    """A uniform plate with reading noise, unscanned outside the circle: no seams, no pits."""
    rng = np.random.default_rng(seed)
    r = diameter_mm / 2
    n = int(math.ceil(r / pitch)) + 1
    xs = pitch * np.arange(-n, n + 1, dtype=np.float64)
    X, Y = np.meshgrid(xs, xs)
    PX, PY = transform.apply(X, Y)                 # physical (new-frame) position of each cell
    t = (6.35 + rng.normal(0, 0.1, X.shape)).astype(np.float32)
    t[np.hypot(PX, PY) > r - 50.0] = np.nan
    return FloorScan(t, xs[0], xs[0], pitch, ScanMeta(inspected=dt.date(2020, 1, 1), nominal=6.35))


def test_featureless_floor_warns_and_falls_back():
    # Ground truth: a uniform disc has no rotational features; any rotation fits (geometry).
    truth = RigidTransform(2.0, 0.0, 0.0)
    new = _plain_floor(3000.0, 20.0, 1)
    old = _plain_floor(3000.0, 20.0, 2, truth)
    with pytest.warns(RegistrationWarning, match="unreliable"):
        reg = register(new, old)
    assert not reg.reliable and reg.method == "identity"
    assert reg.transform == RigidTransform()
    assert reg.warnings and reg.to_dict()["reliable"] is False
    # with control points the fallback is their fit
    pts = np.array([[-1000.0, 0.0], [1000.0, 200.0]])
    nx, ny = truth.apply(pts[:, 0], pts[:, 1])
    with pytest.warns(RegistrationWarning, match="control-point fit"):
        reg2 = register(new, old, control_points=(pts, np.column_stack([nx, ny])))
    assert reg2.method == "control-points"
    assert reg2.transform.rotation_deg == pytest.approx(2.0, abs=1e-9)


@pytest.mark.parametrize("diam,pitch", [(26000.0, 40.0), (5000.0, 20.0), (2000.0, 10.0)])
def test_featureless_floor_flat_sweep(diam, pitch):
    # Ground truth: a uniform disc with reading noise has no rotational features (geometry), so
    # the rotation contrast must stay below its threshold at every size: the contrast without the
    # outline is the maximum of noise correlations there (0.035-0.07 on the two small floors).
    new = _plain_floor(diam, pitch, 1)
    old = _plain_floor(diam, pitch, 2, RigidTransform(2.0, 0.0, 0.0))
    with pytest.warns(RegistrationWarning, match="flat rotation sweep"):
        reg = register(new, old)
    assert not reg.reliable and reg.method == "identity"


@settings(max_examples=4, deadline=None)
@given(seed=st.integers(0, 50), pitch=st.sampled_from([10.0, 20.0]))
def test_register_scan_onto_itself_is_identity(seed, pitch):
    # Property: a scan registered onto itself gives the identity (exact ground truth).
    p = pair(diameter_mm=3000.0, pitch_new=pitch, pitch_old=pitch, rotation_deg=0.0,
             shift_mm=(0.0, 0.0), seed=seed)
    reg = register(p.new, p.new)
    t = reg.transform
    assert abs(t.rotation_deg) <= 0.01 and math.hypot(t.dx_mm, t.dy_mm) <= 0.05 * pitch
    assert reg.score > 0.99 and reg.overlap_pct == pytest.approx(100.0)
    assert reg.residual_rms_mm == pytest.approx(0.0, abs=1e-4)  # 0.1 µm: float rounding of the grid


# --------------------------------------------------------------------------------------
# resampling
# --------------------------------------------------------------------------------------
def test_resample_onto_matches_truth():
    # Ground truth: synth's t_old_true (true old thickness at the new grid's cell centres),
    # its old coverage mask and plate layer; UT without censoring, reading noise sigma 0.1 mm.
    p = pair(diameter_mm=3000.0, pitch_new=10.0, pitch_old=12.5, rotation_deg=3.0,
             shift_mm=(100.0, -50.0), seed=2, method="UT", threshold=None, side_layer_old=True)
    r = resample_onto(p.old, p.new, p.truth.transform)
    assert r.thickness.dtype == np.float32 and r.same_grid(p.new)
    assert r.meta is p.old.meta
    d = r.thickness - p.truth.t_old_true
    m = np.isfinite(d)
    # the old scan misses its shell margin, seams, sump and obstructions: about 2/3 covered here
    assert m.sum() > 0.6 * np.isfinite(p.truth.t_old_true).sum()
    # bilinear weights average the noise, so the RMS stays below one sigma
    assert float(np.sqrt(np.mean(d[m] ** 2))) < 0.1
    # NaN exactly where the nearest old cell was not scanned (synth's old coverage mask)
    inv = p.truth.transform.inverse()
    X, Y = p.new.grid_xy()
    xo, yo = inv.apply(X, Y)
    ri, ci = p.old.cell_of(xo, yo)
    ri, ci = np.rint(ri).astype(int), np.rint(ci).astype(int)
    inside = (ri >= 0) & (ri < p.old.shape[0]) & (ci >= 0) & (ci < p.old.shape[1])
    covered = np.zeros(p.new.shape, dtype=bool)
    covered[inside] = p.truth.coverage_old[ri[inside], ci[inside]]
    np.testing.assert_array_equal(np.isfinite(r.thickness), covered)
    # layers by nearest cell: the plate ids agree with the true plates except within a cell of a seam
    pt = p.truth.plate_true
    both = (pt >= 0) & (r.plate >= 0)
    assert (pt[both] == r.plate[both]).mean() > 0.99
    assert r.side is not None and r.side.dtype == np.int8


def test_registration_json(tmp_path):
    p = pair(diameter_mm=3000.0, pitch_new=10.0, pitch_old=12.5, rotation_deg=2.0,
             shift_mm=(50.0, -30.0), seed=7)
    reg = register(p.new, p.old)
    out = tmp_path / "registration.json"
    write_registration(reg, out)
    d = json.loads(out.read_text(encoding="utf-8"))
    for key in ("dx_mm", "dy_mm", "rotation_deg", "score", "overlap_pct", "residual_rms_mm",
                "method", "reliable", "warnings", "control_residuals_mm"):
        assert key in d
    assert d["dx_mm"] == pytest.approx(reg.transform.dx_mm)
    assert 0.0 <= d["score"] <= 1.0


def test_bilinear_paths_for_few_and_many_points_agree():
    # the packed-grid path (many points) and the direct path (few points) are two codings of
    # one definition: the same values and the same NaN cells, borders and NaN cells included
    from scananalyse import register as R

    rng = np.random.default_rng(8)
    img = rng.normal(6.0, 0.3, (40, 50)).astype(np.float32)
    img[rng.random(img.shape) < 0.2] = np.nan
    ri = rng.uniform(-1.5, 41.5, 30000)
    ci = rng.uniform(-1.5, 51.5, 30000)
    ri[:50] = np.round(ri[:50]) + 0.5  # exact halves: the nearest-cell tie rule
    many = R._bilinear_packed(R._packed(img), ri, ci)
    few = R._bilinear_few(img, ri, ci)
    np.testing.assert_array_equal(np.isnan(many), np.isnan(few))
    np.testing.assert_allclose(many, few, rtol=1e-6, equal_nan=True)
    assert 0.2 < np.isnan(many).mean() < 0.6  # NaN cells and points outside the grid both occur
