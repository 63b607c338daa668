"""Tests of scananalyse.register over the whole circle and of its reliability checks.

Ground truth throughout is synth.make_pair's known old->new transform (synthetic ground
truth), or a transform applied here to a hand-built floor.  Tolerances are those of issue 23
item 6: rotation within 0.1 deg and shift within one pitch of the newer scan, or the
ambiguity reported with ``reliable=False``.  Larger sweeps over seeds and floors:
``python bench/bench_register.py --circle``.
"""

from __future__ import annotations

import datetime as dt
import functools
import json
import math
from pathlib import Path

import numpy as np
import pytest

from scananalyse.errors import RegistrationWarning
from scananalyse.register import (
    RigidTransform,
    coarse_search,
    loss_match,
    register,
    registration_quality,
)
from scananalyse.scan import FloorScan, ScanMeta
from scananalyse.synth import make_pair

ROT_TOL_DEG = 0.1           # issue 23 item 6
SHIFT_TOL_CELLS = 1.0       # issue 23 item 6, in cells of the newer scan


@functools.lru_cache(maxsize=None)
def pair(**kw):
    return make_pair(**kw)


def errors(reg, truth) -> tuple[float, float]:
    """(rotation error on the circle [deg], shift error [mm])."""
    t = reg.transform
    return (abs((t.rotation_deg - truth.rotation_deg + 180.0) % 360.0 - 180.0),
            math.hypot(t.dx_mm - truth.dx_mm, t.dy_mm - truth.dy_mm))


def _moved(scan: FloorScan, dx_mm: float) -> FloorScan:
    """The same scan with its grid moved by ``dx_mm`` along x (a frame 100 m away)."""
    return FloorScan(thickness=scan.thickness, x0=scan.x0 + dx_mm, y0=scan.y0, pitch=scan.pitch, meta=scan.meta,
                     side=scan.side, plate=scan.plate, source=scan.source)


# --------------------------------------------------------------------------------------
# whole circle
# --------------------------------------------------------------------------------------
CIRCLE = [
    (0.0, (150.0, -90.0), 0),
    (3.0, (-220.0, 140.0), 1),
    (-3.0, (260.0, 60.0), 2),
    (15.0, (200.0, -100.0), 3),
    (90.0, (100.0, 250.0), 4),
    (150.0, (-150.0, 250.0), 5),
    (180.0, (50.0, -300.0), 6),
    (-120.0, (300.0, 0.0), 7),
]


@pytest.mark.parametrize("rot,shift,seed", CIRCLE)
def test_whole_circle(rot, shift, seed):
    # A datum re-marked between outages: any rotation, shifts of a few hundred mm.
    p = pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, rotation_deg=rot, shift_mm=shift, seed=seed)
    reg = register(p.new, p.old)
    er, es = errors(reg, p.truth)
    assert reg.reliable and reg.method == "auto", reg.warnings
    assert er <= ROT_TOL_DEG, f"rotation error {er:.4f} deg"
    assert es <= SHIFT_TOL_CELLS * 20.0, f"shift error {es:.1f} mm"
    assert not reg.ambiguous and reg.loss_match > 0.3
    d = reg.to_dict()
    assert d["reliable"] is True and d["ambiguous"] is False and -180.0 < d["rotation_deg"] <= 180.0


@pytest.mark.parametrize("rot", [15.0, 150.0])
def test_whole_circle_ut_pair(rot):
    # UT: no detection threshold, general loss everywhere (the loss pattern is taken above the
    # floor's median, so the general thinning does not mask the pits).
    p = pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, rotation_deg=rot, shift_mm=(-180.0, 120.0),
             seed=21, method="UT", threshold=None)
    reg = register(p.new, p.old)
    er, es = errors(reg, p.truth)
    assert reg.reliable and reg.method == "auto", reg.warnings
    assert er <= ROT_TOL_DEG and es <= SHIFT_TOL_CELLS * 20.0, (er, es)


def test_coarse_search_whole_circle_candidates():
    # The coarse stage alone places the true rotation among its candidates, to about a coarse cell.
    p = pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, rotation_deg=-120.0, shift_mm=(300.0, 0.0),
             seed=7)
    cs = coarse_search(p.new, p.old)
    assert cs.candidates and len(cs.candidates) == len(cs.ncc) == len(cs.strength)
    best = cs.candidates[0]
    assert abs((best.rotation_deg + 120.0 + 180.0) % 360.0 - 180.0) <= 0.5
    assert math.hypot(best.dx_mm - 300.0, best.dy_mm) <= 2 * cs.coarse_pitch_mm
    assert cs.rotation_contrast > 3.0 * cs.contrast_noise


# --------------------------------------------------------------------------------------
# symmetric floors: the loss pattern decides, or the ambiguity is reported
# --------------------------------------------------------------------------------------
def _symmetric_floor(transform: RigidTransform, seed: int, pits: int) -> FloorScan:
    """A 5 m disc at 20 mm whose seams (lines of unscanned cells every 1800 mm along y, at
    x = 0 and +-2400 mm) are symmetric under a 180 deg rotation about the centre; ``pits`` pits
    (fixed positions on the floor, 60 mm radius, 1.5 mm deep) break the symmetry.
    ``transform`` maps this scan's coordinates to the floor's (new) frame."""
    rng = np.random.default_rng(seed)
    r, pitch = 2500.0, 20.0
    n = int(math.ceil(r / pitch)) + 1
    xs = pitch * np.arange(-n, n + 1, dtype=np.float64)
    X, Y = np.meshgrid(xs, xs)
    PX, PY = transform.apply(X, Y)
    t = (6.35 + rng.normal(0, 0.05, X.shape)).astype(np.float32)
    if pits:
        prng = np.random.default_rng(99)                  # the same pits in both outages
        for px, py in prng.uniform(-1800.0, 1800.0, size=(pits, 2)):
            t -= (1.5 * np.exp(-((PX - px) ** 2 + (PY - py) ** 2) / (2 * 60.0 ** 2))).astype(np.float32)
    seam = ((np.abs(((PY + 900.0) % 1800.0) - 900.0) >= 880.0) | (np.abs(PX) < 20.0)
            | (np.abs(np.abs(PX) - 2400.0) < 20.0))
    t[seam] = np.nan
    t[np.hypot(PX, PY) > r - 60.0] = np.nan
    return FloorScan(t, xs[0], xs[0], pitch, ScanMeta(inspected=dt.date(2020, 1, 1), nominal=6.35))


PITS = 6


def test_symmetric_floor_resolved_by_loss_pattern():
    # Geometry: the seams fit at about 0 and 180 deg alike; the pits only at the true 179.4 deg
    # (not exactly 180: with the two grids exactly aligned the binary seam bands fix the rotation
    # only to about half a cell at the rim, docs/registration.md "Limits").
    truth = RigidTransform(179.4, 40.0, -60.0)
    new = _symmetric_floor(RigidTransform(), 1, pits=PITS)
    old = _symmetric_floor(truth, 2, pits=PITS)
    reg = register(new, old)
    er, es = errors(reg, truth)
    assert reg.reliable and not reg.ambiguous, reg.warnings
    assert er <= ROT_TOL_DEG and es <= 20.0, (er, es)
    assert reg.candidates is not None and len(reg.candidates) >= 2
    chosen = [c for c in reg.candidates if c.get("chosen")]
    others = [c for c in reg.candidates if not c.get("chosen")]
    assert len(chosen) == 1 and all(c["loss_match"] < chosen[0]["loss_match"] - 0.1 for c in others)


def test_symmetric_floor_without_loss_is_ambiguous():
    # Geometry: without pits nothing tells 0 from 180 deg; the result must say so, not guess.
    truth = RigidTransform(179.4, 40.0, -60.0)
    new = _symmetric_floor(RigidTransform(), 1, pits=0)
    old = _symmetric_floor(truth, 2, pits=0)
    with pytest.warns(RegistrationWarning, match="ambiguous rotation"):
        reg = register(new, old)
    assert not reg.reliable and reg.ambiguous and reg.method == "auto-ambiguous"
    angles = sorted(abs(c["rotation_deg"]) for c in reg.candidates)
    assert angles[0] <= 1.0 and angles[-1] >= 179.0
    d = json.loads(json.dumps(reg.to_dict(), allow_nan=False))     # no NaN in registration.json
    assert d["ambiguous"] is True and d["method"] == "auto-ambiguous" and len(d["candidates"]) >= 2


# --------------------------------------------------------------------------------------
# reliability
# --------------------------------------------------------------------------------------
def test_unrelated_floors_not_reliable():
    # Two floors of one layout (same diameter, plates, outline) but other pits (other seeds).
    a = pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, seed=1)
    b = pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, seed=2)
    with pytest.warns(RegistrationWarning, match="unreliable"):
        reg = register(a.new, b.old)
    assert not reg.reliable
    assert any("loss patterns do not match" in w or "low match score" in w for w in reg.warnings)
    # the true pair's loss patterns do match
    assert loss_match(a.new, a.old, a.truth.transform) > 0.4
    assert loss_match(a.new, b.old, a.truth.transform) < 0.2


def test_old_scan_100_m_away_not_reliable():
    p = pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, seed=1)
    far = _moved(p.old, 100_000.0)
    with pytest.warns(RegistrationWarning, match="small overlap"):
        reg = register(p.new, far)
    assert not reg.reliable and reg.method == "identity"
    assert any("do not overlap" in w for w in reg.warnings)


@pytest.mark.parametrize("auto", [False, True])
def test_control_points_moving_floor_away_not_reliable(auto):
    # Control points whose fit moves the floor 100 m away: 0 % overlap must not be reliable
    # (with auto=True the search around the fit finds nothing and falls back to it).
    p = pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, seed=1)
    pts = np.array([[-1500.0, 0.0], [1500.0, 300.0], [0.0, -1500.0]])
    nx, ny = p.truth.transform.apply(pts[:, 0], pts[:, 1])
    with pytest.warns(RegistrationWarning, match="small overlap"):
        reg = register(p.new, p.old, control_points=(pts, np.column_stack([nx + 100_000.0, ny])), auto=auto)
    assert reg.method == "control-points" and not reg.reliable
    assert reg.overlap_pct < 1.0


def test_control_points_below_overlap_rule_not_reliable():
    # A fit shifted by 3 m on a 5 m floor leaves well under half of it overlapping.
    p = pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, seed=1)
    pts = np.array([[-1500.0, 0.0], [1500.0, 300.0], [0.0, -1500.0]])
    nx, ny = p.truth.transform.apply(pts[:, 0], pts[:, 1])
    with pytest.warns(RegistrationWarning, match="small overlap"):
        reg = register(p.new, p.old, control_points=(pts, np.column_stack([nx + 3000.0, ny])), auto=False)
    assert not reg.reliable and reg.overlap_pct < 50.0


def test_control_points_large_residual_not_reliable():
    # One point 200 mm (10 pitches) off: residuals above a few pitches.
    p = pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, seed=1)
    pts = np.array([[-1500.0, 0.0], [1500.0, 300.0], [0.0, -1500.0], [300.0, 1400.0]])
    nx, ny = p.truth.transform.apply(pts[:, 0], pts[:, 1])
    nx = nx.copy()
    nx[3] += 200.0
    with pytest.warns(RegistrationWarning, match="control point"):
        reg = register(p.new, p.old, control_points=(pts, np.column_stack([nx, ny])), auto=False)
    assert not reg.reliable
    assert any("exceeds" in w for w in reg.warnings)


def test_registration_quality_reasons():
    p = pair(diameter_mm=5000.0, pitch_new=20.0, pitch_old=25.0, seed=1)
    good = registration_quality(p.new, p.old, p.truth.transform)
    assert good.reliable and good.overlap_pct > 80.0 and good.score > 0.5 and good.loss_match > 0.4
    away = registration_quality(p.new, p.old, RigidTransform(0.0, 100_000.0, 0.0))
    assert not away.reliable and away.overlap_pct == 0.0
    assert "small overlap" in away.reasons[0]


# --------------------------------------------------------------------------------------
# the shipped demo pair
# --------------------------------------------------------------------------------------
def test_demo_pair_unchanged():
    # The numbers the demo pair registered to before the whole-circle search (issue 23 item 6).
    from scananalyse.io import read_scan

    root = Path(__file__).resolve().parents[1] / "sample_scans"
    new = read_scan(root / "FQ-214_2025-10-06.h5")
    old = read_scan(root / "FQ-214_2015-09-21.h5")
    reg = register(new, old)
    t = reg.transform
    assert reg.reliable and reg.method == "auto"
    assert t.rotation_deg == pytest.approx(1.609, abs=0.005)
    assert (t.dx_mm, t.dy_mm) == pytest.approx((143.0, -60.6), abs=0.5)
    assert reg.score == pytest.approx(0.76, abs=0.01)
    assert reg.overlap_pct == pytest.approx(96.8, abs=0.2)
