"""Rigid registration of two inspections of one floor, control points, resampling.

Two outages' scans never share a grid: the datum is re-marked, the scanner runs
other paths, the pitch and the coverage differ.  This module estimates the rigid
transform that maps the *older* scan's floor coordinates onto the *newer* one's
(design contract §3.3)::

    [x', y'] = R(theta) . [x, y] + [dx, dy]      theta counter-clockwise, about the origin

and resamples the older scan onto the newer grid for the later stages.

Method (documented in ``docs/registration.md``):

1. *Feature image* of each scan on its own grid: 1 where a cell was not scanned
   in a narrow line (weld seams, plate edges), 0 in large unscanned areas (outside
   the floor, margin, obstructions: their outline changes between outages),
   ``clip(loss / (0.25 nominal), 0, 1)`` where scanned (pits and patches).
   A pyramid of 2x2 block means of it.
2. :func:`coarse_search`: a masked NCC over all shifts, computed with FFTs (Padfield 2012),
   for each rotation of a sweep.  Over the whole circle (the default) in two stages: every
   angle on a level of about 48+ cells across, floor interior only (seams, plate edges,
   pits), keeping the few best local maxima; then each of them on the finer coarse level
   (128+ cells, at most 160 mm, coverage outline added back at weight 0.5).
3. Candidates of other rotations (plate seams repeat under 180 and 90 degrees) are told
   apart by :func:`loss_match`, the correlation of the corrosion patterns; when it cannot
   decide the result says so (``ambiguous``, not reliable).
4. :func:`refine`, coarse to fine down to the newer scan's pitch: Gauss-Newton
   (Lucas-Kanade, forward additive) over (theta, dx, dy) plus a gain and offset,
   Huber-weighted, Levenberg-Marquardt damped with a parabolic line search; then the
   sub-cell translation from the matched pit centroids.
5. :func:`registration_quality`: score, overlap, thickness residual, loss-pattern match,
   with the reasons the estimate is not reliable; with control points
   (:func:`fit_control_points`) also their residuals and the overlap they leave.
   An unreliable result is flagged with :class:`~scananalyse.errors.RegistrationWarning`.

References
----------
Padfield, D. (2012). Masked object registration in the Fourier domain.
IEEE Transactions on Image Processing 21(5), 2706-2718.
Lucas, B. D., Kanade, T. (1981). An iterative image registration technique with
an application to stereo vision. Proc. IJCAI, 674-679.
Umeyama, S. (1991). Least-squares estimation of transformation parameters between
two point patterns. IEEE Trans. PAMI 13(4), 376-380.
"""

from __future__ import annotations

import json
import math
import os
import tempfile
import time
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import fft as _fft
from scipy import ndimage as _ndi
from scipy.spatial import cKDTree

from .errors import InputError, RegistrationWarning, where
from .scan import PLATE_NONE, SIDE_UNKNOWN, FloorScan, MM_PER_IN

__all__ = [
    "RigidTransform",
    "Registration",
    "register",
    "fit_control_points",
    "read_control_points",
    "resample_layer",
    "resample_onto",
    "sample_thickness",
    "feature_image",
    "write_registration",
    "read_control_points_named",
    "coarse_search",
    "CoarseSearch",
    "refine",
    "registration_quality",
    "Quality",
    "loss_match",
]

#: Unscanned cells count 1 in the feature image; loss counts up to 1 at this fraction of nominal.
LOSS_SCALE_FRACTION = 0.25
#: The coarse search runs on the finest pyramid level whose long side is at most this many cells
#: more than needed (the coarsest level with at least this many cells on its long side).
COARSE_CELLS = 128
#: ... but no coarser than this: a 40 mm seam band keeps a quarter of a coarse cell, so the seams
#: still show in the sweep on large floors (at 640 mm, the old choice for 100 m, they vanish). [mm]
COARSE_MAX_PITCH_MM = 160.0
#: The rotation contrast must also exceed this many times the NCC noise level of two unrelated
#: floors of the same interior size (a featureless floor's sweep is the maximum of noise).
ROT_CONTRAST_NOISE = 5.0
#: ... this many times on the whole-range stage's coarser level: its noise level is higher (a
#: quarter of the cells), and its sweep's median is taken over the whole circle.
ROT_CONTRAST_NOISE_CIRCLE = 3.0
#: An entirely unscanned block of this size marks a large unscanned area (weld seams are narrower). [mm]
LARGE_AREA_MM = 80.0
#: Feature value of narrow unscanned cells (weld seams, plate edges); loss counts up to 1.
SEAM_VALUE = 1.0
#: Weight of the large unscanned areas (coverage outline) in the coarse search only.
BOUNDARY_WEIGHT = 0.5
#: Cells of the newer feature image used per Gauss-Newton level (strongest gradients).
N_SAMPLES = 100000
#: The finer refinement levels are skipped when a level with the full sample count moved the
#: estimate by at most this many cells of the newer scan anywhere on the floor.
SKIP_MOVE_CELLS = 0.05
#: Largest number of cells used for the score and quality figures (strided subsample above).
QUALITY_CELLS = 500_000
#: A pit (for the sub-cell stage) is a group of cells whose loss exceeds the floor's median loss
#: by more than this fraction of nominal ...
PIT_THRESHOLD_FRACTION = 0.12
#: ... of at least this many cells.
PIT_MIN_CELLS = 3
#: Fewest matched pits for the sub-cell translation from pit centroids.
PIT_MIN_MATCHES = 4
#: Largest standard error of the pit translation accepted, in cells of the newer scan.
PIT_MAX_SE_CELLS = 0.1
#: A rotation range wider than this is searched in two stages (whole range coarse, then candidates). [deg]
WIDE_SWEEP_DEG = 10.0
#: The whole-range stage runs on the coarsest level with at least this many cells on its long side ...
CIRCLE_CELLS = 48
#: ... at an angle step moving the grid's corner by this many of its cells ...
CIRCLE_STEP_CELLS = 2.0
#: ... but no larger than this. [deg]
CIRCLE_MAX_STEP_DEG = 3.0
#: Most candidates kept from the whole-range stage (local maxima of its seam-only sweep) ...
N_CANDIDATES = 4
#: ... whose height above the sweep's median is at least this fraction of the best one's.
CANDIDATE_FRACTION = 0.6
#: Candidates closer in rotation than this are one candidate. [deg]
DISTINCT_DEG = 2.0
#: Two candidates whose loss-pattern correlations differ by less than this are ambiguous.
AMBIGUITY_MARGIN = 0.1
#: A loss pattern is seen when at least LOSS_PATTERN_CELLS compared cells show a smoothed loss
#: feature above LOSS_PATTERN_MIN (0.1 = 2.5 % of nominal over a blob of a few cells; reading
#: noise of 0.1 mm smoothed by one cell stays near 0.02).
LOSS_PATTERN_MIN = 0.1
LOSS_PATTERN_CELLS = 10
#: The loss-match rule of the reliability check applies only when both scans show at least this
#: many compared cells with loss: a sparse pattern (a few pits, the deepest ones repaired between
#: the outages) can fail to correlate on one floor (3 m synthetic floors: 42-175 such cells,
#: one at 0.04; unrelated 5 m floors: 439-547 cells, -0.01 to 0.01).
LOSS_RULE_CELLS = 200
#: Smallest loss-pattern correlation of a reliable registration (floors with loss).
MIN_LOSS_MATCH = 0.2
#: Control points disagree when their RMS residual exceeds this many pitches of the newer scan ...
CP_MAX_RMS_CELLS = 2.0
#: ... or one residual exceeds this many.
CP_MAX_RESIDUAL_CELLS = 3.0
#: Factor applied to Gauss-Newton standard errors for the correlation of neighbouring samples
#: (Gaussian smoothing of one cell plus bilinear interpolation; common practice, no source).
STD_INFLATION = 3.0


# --------------------------------------------------------------------------------------
# transform
# --------------------------------------------------------------------------------------
@dataclass(frozen=True)
class RigidTransform:
    """A rigid transform of the floor plane mapping OLD coordinates to NEW.

    ``[x', y'] = R(theta) . [x, y] + [dx, dy]``, theta counter-clockwise positive,
    rotation about the floor origin (design contract §3.3).

    Parameters
    ----------
    rotation_deg : rotation angle theta, counter-clockwise positive. [deg]
    dx_mm, dy_mm : translation applied after the rotation. [mm]
    """

    rotation_deg: float = 0.0
    dx_mm: float = 0.0
    dy_mm: float = 0.0

    @classmethod
    def identity(cls) -> "RigidTransform":
        return cls(0.0, 0.0, 0.0)

    @classmethod
    def from_matrix(cls, m) -> "RigidTransform":
        """From a 3x3 homogeneous matrix (the rotation part is taken as is)."""
        m = np.asarray(m, dtype=np.float64)
        return cls(math.degrees(math.atan2(m[1, 0], m[0, 0])), float(m[0, 2]), float(m[1, 2]))

    @property
    def theta(self) -> float:
        """Rotation angle. [rad]"""
        return math.radians(self.rotation_deg)

    @property
    def matrix(self) -> np.ndarray:
        """3x3 homogeneous matrix mapping ``[x, y, 1]`` (old) to ``[x', y', 1]`` (new)."""
        c, s = math.cos(self.theta), math.sin(self.theta)
        return np.array([[c, -s, self.dx_mm], [s, c, self.dy_mm], [0.0, 0.0, 1.0]])

    def apply(self, x, y) -> tuple[np.ndarray, np.ndarray]:
        """Map old floor coordinates to new ones.

        Parameters
        ----------
        x, y : old coordinates (scalars or arrays of one shape). [mm]

        Returns
        -------
        (x', y') : new coordinates, float64. [mm]
        """
        x = np.asarray(x, dtype=np.float64)
        y = np.asarray(y, dtype=np.float64)
        c, s = math.cos(self.theta), math.sin(self.theta)
        return c * x - s * y + self.dx_mm, s * x + c * y + self.dy_mm

    def inverse(self) -> "RigidTransform":
        """The transform mapping new coordinates back to old."""
        c, s = math.cos(self.theta), math.sin(self.theta)
        # x = R(-theta) (x' - d) = R(-theta) x' - R(-theta) d
        return RigidTransform(-self.rotation_deg,
                              -(c * self.dx_mm + s * self.dy_mm),
                              -(-s * self.dx_mm + c * self.dy_mm))

    def compose(self, other: "RigidTransform") -> "RigidTransform":
        """The transform applying ``self`` first, then ``other`` (matrix ``other @ self``)."""
        return RigidTransform.from_matrix(other.matrix @ self.matrix)

    def displacement_at(self, x: float, y: float) -> tuple[float, float]:
        """How far the point (x, y) moves under the transform. [mm]"""
        xn, yn = self.apply(x, y)
        return float(xn - x), float(yn - y)

    def to_dict(self) -> dict:
        return {"rotation_deg": float(self.rotation_deg), "dx_mm": float(self.dx_mm),
                "dy_mm": float(self.dy_mm)}


# --------------------------------------------------------------------------------------
# result
# --------------------------------------------------------------------------------------
@dataclass
class Registration:
    """The result of :func:`register`.

    Parameters
    ----------
    transform : the old-to-new :class:`RigidTransform` to use downstream.
    score : masked normalised cross-correlation of the aligned feature images, clipped to 0-1.
    overlap_pct : share of the newer scan's scanned cells that the older scan covers after alignment. [%]
    residual_rms_mm : RMS thickness difference (new minus resampled old) in the overlap. [mm]
    method : ``"auto"``, ``"control-points"``, ``"auto+control-points"``, ``"auto-coarse"``
        (the refinement failed; the coarse estimate, not reliable), ``"auto-ambiguous"`` (symmetric
        candidates the loss pattern cannot tell apart; not reliable) or ``"identity"``.
    reliable : False when the estimate should not be trusted (featureless floor, low score,
        small overlap, control points that disagree).
    warnings : plain-language reasons behind ``reliable`` and any fallback.
    control_residuals_mm : distance between each transformed old control point and its new
        point under ``transform``, or None without control points. [mm]
    control_names : names of the control points, if given.
    auto_transform : the automatic estimate, also when it was not used (None if not run).
    rotation_contrast : NCC of the seams, plate edges and pits (floor interior, no coverage outline)
        at the chosen angle of the rotation sweep minus its median over the sweep (the whole
        circle by default; low = rotation unobservable).
    std_rotation_deg, std_shift_mm : approximate one-sigma errors from the Gauss-Newton fit. [deg], [mm]
    timings_s : wall time per stage. [s]
    details : other figures (levels, pitches, iterations) for the record.
    candidates : the rotations that fitted the seams and plate edges almost alike (one record
        each: rotation, shift, coarse NCC, loss-pattern match, ``chosen``), or None.
    ambiguous : True when the loss pattern could not decide between such candidates
        (method ``auto-ambiguous``, not reliable).
    loss_match : correlation of the two loss patterns under ``transform`` (see :func:`loss_match`). [-]
    """

    transform: RigidTransform
    score: float
    overlap_pct: float
    residual_rms_mm: float
    method: str
    reliable: bool
    warnings: list[str] = field(default_factory=list)
    control_residuals_mm: list[float] | None = None
    control_names: list[str] | None = None
    auto_transform: RigidTransform | None = None
    rotation_contrast: float | None = None
    std_rotation_deg: float | None = None
    std_shift_mm: float | None = None
    timings_s: dict = field(default_factory=dict)
    details: dict = field(default_factory=dict)
    candidates: list[dict] | None = None
    ambiguous: bool = False
    loss_match: float | None = None

    def to_dict(self) -> dict:
        """Plain JSON-ready content of ``registration.json``."""

        def num(v):
            if v is None:
                return None
            v = float(v)
            return v if math.isfinite(v) else None

        out = {
            "format": "scananalyse-registration 1",
            "convention": "old to new: [x', y'] = R(theta)[x, y] + [dx, dy], theta counter-clockwise, about the origin",
            "dx_mm": float(self.transform.dx_mm),
            "dy_mm": float(self.transform.dy_mm),
            "rotation_deg": float(self.transform.rotation_deg),
            "score": num(self.score),
            "overlap_pct": num(self.overlap_pct),
            "residual_rms_mm": num(self.residual_rms_mm),
            "method": self.method,
            "reliable": bool(self.reliable),
            "warnings": list(self.warnings),
            "control_residuals_mm": (None if self.control_residuals_mm is None
                                     else [float(r) for r in self.control_residuals_mm]),
            "control_rms_mm": (None if not self.control_residuals_mm
                               else float(np.sqrt(np.mean(np.square(self.control_residuals_mm))))),
            "control_names": self.control_names,
            "auto_estimate": None if self.auto_transform is None else self.auto_transform.to_dict(),
            "rotation_contrast": num(self.rotation_contrast),
            "std_rotation_deg": num(self.std_rotation_deg),
            "std_shift_mm": num(self.std_shift_mm),
            "matrix": self.transform.matrix.tolist(),
            "ambiguous": bool(self.ambiguous),
            "candidates": (None if self.candidates is None else
                           [{k: (num(v) if isinstance(v, float) else v) for k, v in c.items()}
                            for c in self.candidates]),
            "loss_match": num(self.loss_match),
            "timings_s": {k: float(v) for k, v in self.timings_s.items()},
            "details": self.details,
        }
        return out


def write_registration(reg: Registration, path) -> None:
    """Write ``registration.json`` (temporary file renamed into place).

    Parameters
    ----------
    reg : the :class:`Registration` to write.
    path : destination file.
    """
    path = os.fspath(path)
    d = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(dir=d, prefix=".registration.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            json.dump(reg.to_dict(), fh, indent=2)
            fh.write("\n")
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


# --------------------------------------------------------------------------------------
# control points
# --------------------------------------------------------------------------------------
def fit_control_points(old_xy, new_xy) -> tuple[RigidTransform, np.ndarray]:
    """Least-squares rigid transform (no scale) from matching points.

    Parameters
    ----------
    old_xy : (n, 2) points in the older scan's frame, n >= 2. [mm]
    new_xy : (n, 2) the same physical points in the newer scan's frame. [mm]

    Returns
    -------
    transform : the old-to-new :class:`RigidTransform` minimising the sum of squared
        distances between ``transform(old_xy)`` and ``new_xy``.
    residuals : (n,) distance of each transformed old point from its new point. [mm]

    Notes
    -----
    Umeyama (1991) without scale (the Kabsch solution): centre both point sets,
    take the SVD ``U S V^T`` of the cross-covariance ``sum (new - mean_new)(old - mean_old)^T``,
    ``R = U diag(1, det(U V^T)) V^T``, ``t = mean_new - R mean_old``.

    References
    ----------
    Umeyama, S. (1991). IEEE Trans. PAMI 13(4), 376-380.
    """
    a = np.asarray(old_xy, dtype=np.float64)
    b = np.asarray(new_xy, dtype=np.float64)
    if a.ndim != 2 or a.shape[1] != 2 or b.shape != a.shape:
        raise InputError(f"control points: old and new must both be (n, 2) arrays, got {a.shape} and {b.shape}")
    if a.shape[0] < 2:
        raise InputError(f"control points: at least 2 matching points are needed, got {a.shape[0]}")
    if not (np.isfinite(a).all() and np.isfinite(b).all()):
        raise InputError("control points: coordinates must be finite numbers")
    ma, mb = a.mean(axis=0), b.mean(axis=0)
    ac, bc = a - ma, b - mb
    if np.max(np.hypot(ac[:, 0], ac[:, 1])) < 1e-9:
        raise InputError("control points: the old points all coincide; the rotation is undetermined")
    cov = bc.T @ ac
    u, _, vt = np.linalg.svd(cov)
    dsign = np.sign(np.linalg.det(u @ vt)) or 1.0
    rot = u @ np.diag([1.0, dsign]) @ vt
    t = mb - rot @ ma
    tr = RigidTransform(math.degrees(math.atan2(rot[1, 0], rot[0, 0])), float(t[0]), float(t[1]))
    xn, yn = tr.apply(a[:, 0], a[:, 1])
    res = np.hypot(xn - b[:, 0], yn - b[:, 1])
    return tr, res


_CP_COLUMNS = ("old_x", "old_y", "new_x", "new_y")


def read_control_points(path) -> tuple[np.ndarray, np.ndarray]:
    """Read a control-point file (format in ``docs/registration.md``).

    A small CSV: optional ``# key: value`` lines (only ``units: mm|in`` is used),
    then a header row with the columns ``old_x, old_y, new_x, new_y`` (any order)
    and optionally ``name``, then one matching point a row.  Blank lines are skipped.

    Parameters
    ----------
    path : the file.

    Returns
    -------
    (old_xy, new_xy) : two (n, 2) float64 arrays; :func:`read_control_points_named`
        also returns the point names. [mm]

    Raises
    ------
    InputError : one line naming the file and the line of the problem.
    """
    old, new, _ = read_control_points_named(path)
    return old, new


def read_control_points_named(path) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """As :func:`read_control_points`, also returning the point names (``P1``, ... if none)."""
    p = os.fspath(path)
    try:
        with open(p, encoding="utf-8") as fh:
            lines = fh.read().splitlines()
    except OSError as exc:
        raise InputError(f"{where(p)}: cannot read control-point file ({exc.strerror or exc})") from None
    except UnicodeDecodeError:
        raise InputError(f"{where(p)}: control-point file is not UTF-8 text") from None
    scale = 1.0
    header = None
    hline = None
    rows: list[tuple[int, list[str]]] = []
    for ln, raw in enumerate(lines, start=1):
        s = raw.strip()
        if not s:
            continue
        if s.startswith("#"):
            body = s[1:].strip()
            if ":" in body:
                key, val = (v.strip() for v in body.split(":", 1))
                if key.lower() == "units":
                    if val.lower() == "mm":
                        scale = 1.0
                    elif val.lower() == "in":
                        scale = MM_PER_IN
                    else:
                        raise InputError(f"{where(p, ln, 'units')}: expected 'mm' or 'in', got {val!r}")
            continue
        cells = [c.strip() for c in s.split(",")]
        if header is None:
            header = [c.lower() for c in cells]
            hline = ln
            missing = [c for c in _CP_COLUMNS if c not in header]
            if missing:
                raise InputError(f"{where(p, ln)}: header lacks column(s) {', '.join(missing)} "
                                 f"(need old_x, old_y, new_x, new_y, optional name)")
            if len(set(header)) != len(header):
                raise InputError(f"{where(p, ln)}: duplicate column names in header")
            continue
        rows.append((ln, cells))
    if header is None:
        raise InputError(f"{where(p)}: control-point file has no header row (old_x, old_y, new_x, new_y)")
    idx = {c: header.index(c) for c in _CP_COLUMNS}
    iname = header.index("name") if "name" in header else None
    old, new, names = [], [], []
    for ln, cells in rows:
        if len(cells) != len(header):
            raise InputError(f"{where(p, ln)}: expected {len(header)} values, got {len(cells)}")
        vals = {}
        for c in _CP_COLUMNS:
            txt = cells[idx[c]]
            try:
                v = float(txt)
            except ValueError:
                raise InputError(f"{where(p, ln, c)}: not a number: {txt!r}") from None
            if not math.isfinite(v):
                raise InputError(f"{where(p, ln, c)}: not a finite number: {txt!r}")
            vals[c] = v * scale
        old.append((vals["old_x"], vals["old_y"]))
        new.append((vals["new_x"], vals["new_y"]))
        names.append(cells[iname] if iname is not None and cells[iname] else f"P{len(names) + 1}")
    if len(old) < 2:
        raise InputError(f"{where(p, hline)}: at least 2 control points are needed, found {len(old)}")
    return (np.array(old, dtype=np.float64), np.array(new, dtype=np.float64), names)


# --------------------------------------------------------------------------------------
# sampling and resampling
# --------------------------------------------------------------------------------------
def _packed(img: np.ndarray) -> np.ndarray:
    """``img`` as complex64 with a one-cell border: real = value (0 where NaN), imag = 1
    where the value is finite.  One gather then fetches a neighbour's value and weight."""
    h, w = img.shape
    p = np.zeros((h + 2, w + 2), dtype=np.complex64)
    fin = np.isfinite(img)
    p.real[1:-1, 1:-1] = np.where(fin, img, np.float32(0))
    p.imag[1:-1, 1:-1] = fin
    return p


def _bilinear_packed(p: np.ndarray, ri: np.ndarray, ci: np.ndarray) -> np.ndarray:
    """NaN-aware bilinear sample at fractional (row, col) indices of the grid packed by
    :func:`_packed` (see :func:`_bilinear_nan`)."""
    h, w = p.shape[0] - 2, p.shape[1] - 2
    flat = p.reshape(-1)
    W = w + 2
    rn = np.rint(ri)
    cn = np.rint(ci)
    ok = (rn >= 0) & (rn <= h - 1) & (cn >= 0) & (cn <= w - 1)
    r0f = np.floor(ri)
    c0f = np.floor(ci)
    fr = (ri - r0f).astype(np.float32)
    fc = (ci - c0f).astype(np.float32)
    near_r = rn > r0f  # the nearest cell is the upper / right neighbour
    near_c = cn > c0f
    # points whose nearest cell is in the grid have r0 in [-1, h-1]: the border makes
    # every neighbour an index of the padded grid (others are clipped, then masked by ok)
    base = (np.clip(r0f, -1, h - 1).astype(np.intp) + 1) * W + (np.clip(c0f, -1, w - 1).astype(np.intp) + 1)
    del rn, cn, r0f, c0f
    one = np.float32(1)
    gr = one - fr
    gc = one - fc
    z00 = flat.take(base)
    z01 = flat.take(base + 1)
    z10 = flat.take(base + W)
    z11 = flat.take(base + W + 1)
    del base
    s = z00 * (gr * gc) + z01 * (gr * fc) + z10 * (fr * gc) + z11 * (fr * fc)
    near = np.where(near_r, np.where(near_c, z11.imag, z10.imag), np.where(near_c, z01.imag, z00.imag))
    good = ok & (near > 0) & (s.imag > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(good, s.real / s.imag, np.float32(np.nan)).astype(np.float32, copy=False)


def _bilinear_nan(img: np.ndarray, ri: np.ndarray, ci: np.ndarray) -> np.ndarray:
    """NaN-aware bilinear sample of ``img`` at fractional (row, col) indices.

    The result is NaN where the nearest cell is outside the grid or NaN; elsewhere
    it is the bilinear weighted mean over the valid ones of the four neighbours
    (out-of-grid and NaN neighbours given weight 0), float32 throughout.  The grid is
    packed once (:func:`_packed`: value and validity in one complex64 with a border),
    so each neighbour is one flat ``numpy.take`` with no bounds arithmetic.
    """
    img = np.asarray(img, dtype=np.float32)
    ri = np.asarray(ri)
    ci = np.asarray(ci)
    if ri.size * 4 < img.size:
        return _bilinear_few(img, ri, ci)  # packing the whole grid would cost more than the points
    return _bilinear_packed(_packed(img), ri, ci)


def _bilinear_few(img: np.ndarray, ri: np.ndarray, ci: np.ndarray) -> np.ndarray:
    """:func:`_bilinear_nan` for a few points: the four neighbours read from ``img`` itself."""
    h, w = img.shape
    flat = img.reshape(-1) if img.flags.c_contiguous else np.ascontiguousarray(img).reshape(-1)
    rn = np.rint(ri)
    cn = np.rint(ci)
    ok = (rn >= 0) & (rn <= h - 1) & (cn >= 0) & (cn <= w - 1)
    near = np.where(ok, flat.take(np.clip(rn, 0, h - 1).astype(np.intp) * w
                                  + np.clip(cn, 0, w - 1).astype(np.intp)), np.float32(np.nan))
    r0 = np.floor(ri)
    c0 = np.floor(ci)
    fr = (ri - r0).astype(np.float32)
    fc = (ci - c0).astype(np.float32)
    acc = np.zeros(ri.shape, dtype=np.float32)
    wsum = np.zeros(ri.shape, dtype=np.float32)
    for dr, dc in ((0, 0), (0, 1), (1, 0), (1, 1)):
        wt = (fr if dr else np.float32(1) - fr) * (fc if dc else np.float32(1) - fc)
        rr = r0 + dr
        cc = c0 + dc
        inb = (rr >= 0) & (rr <= h - 1) & (cc >= 0) & (cc <= w - 1)
        v = flat.take(np.clip(rr, 0, h - 1).astype(np.intp) * w + np.clip(cc, 0, w - 1).astype(np.intp))
        good = inb & np.isfinite(v)
        acc += np.where(good, wt * v, np.float32(0))
        wsum += np.where(good, wt, np.float32(0))
    fin = ok & np.isfinite(near) & (wsum > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(fin, acc / wsum, np.float32(np.nan)).astype(np.float32, copy=False)


def _nearest(layer: np.ndarray, ri: np.ndarray, ci: np.ndarray, fill) -> np.ndarray:
    h, w = layer.shape
    rn = np.rint(ri)
    cn = np.rint(ci)
    ok = (rn >= 0) & (rn <= h - 1) & (cn >= 0) & (cn <= w - 1)
    flat = layer.reshape(-1) if layer.flags.c_contiguous else np.ascontiguousarray(layer).reshape(-1)
    idx = np.clip(rn, 0, h - 1).astype(np.intp) * w + np.clip(cn, 0, w - 1).astype(np.intp)
    return np.where(ok, flat.take(idx), np.asarray(fill, dtype=layer.dtype)).astype(layer.dtype, copy=False)


def sample_thickness(scan: FloorScan, x, y) -> np.ndarray:
    """Thickness of ``scan`` at floor points, NaN-aware bilinear (see :func:`resample_onto`).

    Parameters
    ----------
    scan : the scan to sample.
    x, y : floor coordinates in the scan's own frame. [mm]

    Returns
    -------
    float32 array of the shape of ``x``; NaN where the scan did not cover. [mm]
    """
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    ri, ci = scan.cell_of(x, y)
    return _bilinear_nan(scan.thickness, ri, ci)


def _chunk_rows(shape, max_cells=1 << 20) -> int:
    return max(1, int(max_cells // max(1, shape[1])))


def _chunks(old: FloorScan, new: FloorScan, transform: RigidTransform):
    """Fractional (row, col) indices into ``old`` of ``new``'s cell centres, in row chunks.

    Yields ``(r0, r1, indices)`` for new rows ``r0:r1``; ``indices()`` computes that chunk's
    ``(ri, ci)`` (float64: the indices are affine in the new cell indices, so no full-grid
    arrays are made).
    """
    inv = transform.inverse()
    c, s = math.cos(inv.theta), math.sin(inv.theta)
    h, w = new.shape
    xs = new.x
    ys = new.y
    # chunks of about 2.6e5 cells: the temporaries (about 100 bytes a cell) stay in the
    # processor's cache better than with 1e6 (0.76 -> 0.45 s at 30 m, measured)
    step = _chunk_rows((h, w), max_cells=1 << 18)

    def make(r0, r1):
        def indices():
            yy = ys[r0:r1, None]
            xo = c * xs[None, :] - s * yy + inv.dx_mm
            yo = s * xs[None, :] + c * yy + inv.dy_mm
            return (yo - old.y0) / old.pitch, (xo - old.x0) / old.pitch
        return indices

    for r0 in range(0, h, step):
        r1 = min(h, r0 + step)
        yield r0, r1, make(r0, r1)


def resample_layer(layer: np.ndarray, old: FloorScan, new: FloorScan, transform: RigidTransform, *,
                   fill) -> np.ndarray:
    """A layer on the older scan's grid (labels, ids, codes) carried onto the newer grid by
    nearest cell.

    Parameters
    ----------
    layer : array of ``old``'s grid shape (any dtype). [-]
    old, new : the two scans (their grids are used). [-]
    transform : old-to-new transform (from :func:`register`). [-]
    fill : value where the nearest older cell is outside the older grid. [-]

    Returns
    -------
    Array of ``new``'s grid shape and ``layer``'s dtype. [-]
    """
    layer = np.asarray(layer)
    if layer.shape != old.shape:
        raise ValueError(f"layer shape {layer.shape} is not the older grid's {old.shape}")
    out = np.empty(new.shape, dtype=layer.dtype)

    def one(chunk):
        r0, r1, indices = chunk
        out[r0:r1] = _nearest(layer, *indices(), fill)

    _each_chunk(one, list(_chunks(old, new, transform)))
    return out


def _each_chunk(fn, chunks) -> None:
    """``fn`` on every chunk, one after the other.

    (Threads would halve the time, numpy releasing the GIL, but glibc's per-thread
    arenas then keep the threads' freed temporaries: +8 bytes per cell of peak memory on
    a 30 m floor, measured; so the chunks run in the calling thread.)
    """
    for ch in chunks:
        fn(ch)


def resample_onto(old: FloorScan, new: FloorScan, transform: RigidTransform) -> FloorScan:
    """The older scan's values on the newer scan's grid.

    For each cell centre ``p`` of ``new`` the older scan is sampled at
    ``transform.inverse()(p)``.

    Parameters
    ----------
    old : the older scan (its own frame and grid).
    new : the newer scan (only its grid is used).
    transform : old-to-new transform (from :func:`register`).

    Returns
    -------
    FloorScan on ``new``'s grid with ``old``'s metadata: ``thickness`` float32 [mm],
    NaN where the older scan did not cover; ``side``/``plate`` layers (if ``old`` has them)
    by nearest cell, unknown (0) / none (-1) outside the older grid.

    Notes
    -----
    Thickness is a NaN-aware bilinear interpolation: a point is covered when the
    *nearest* older cell was scanned; the value is then the bilinear mean over the
    scanned ones among its four neighbours (weights renormalised).  So covered
    area is kept right up to seams and edges, and no value mixes in an unscanned cell.
    Work is done in row chunks (about 10^6 cells) so no full-grid float64 arrays are made.
    """
    h, w = new.shape
    thick = np.empty((h, w), dtype=np.float32)
    side = None if old.side is None else np.empty((h, w), dtype=np.int8)
    plate = None if old.plate is None else np.empty((h, w), dtype=np.int32)
    packed = _packed(np.asarray(old.thickness, dtype=np.float32))

    def one(chunk):
        r0, r1, indices = chunk
        ri, ci = indices()
        thick[r0:r1] = _bilinear_packed(packed, ri, ci)
        if side is not None:
            side[r0:r1] = _nearest(old.side, ri, ci, SIDE_UNKNOWN)
        if plate is not None:
            plate[r0:r1] = _nearest(old.plate, ri, ci, PLATE_NONE)

    _each_chunk(one, list(_chunks(old, new, transform)))
    return FloorScan(thickness=thick, x0=new.x0, y0=new.y0, pitch=new.pitch, meta=old.meta,
                     side=side, plate=plate, source=old.source)


# --------------------------------------------------------------------------------------
# feature images and pyramids
# --------------------------------------------------------------------------------------
def _large_unscanned(unscanned: np.ndarray, pitch: float, block_mm: float) -> np.ndarray:
    """Unscanned cells belonging to large unscanned areas (outside the floor, obstructions).

    A morphological opening of the unscanned mask by a square of about ``block_mm``
    (separable running minimum and maximum filters, so the cost does not grow with the
    size) keeps the areas such a square fits into and drops the narrow unscanned lines of
    weld seams; the result is then grown by the same square so the ends of seams that run
    into a large area are left out in both outages alike.  Outside the grid counts as
    unscanned.  On fine grids the opening runs on blocks of 2x2 (or more) cells, a block
    counting as unscanned when all its cells are, to save time.
    """
    # Blocks of f x f cells that are entirely unscanned (odd last row/column dropped).
    full_blocks = unscanned
    f = 1
    while pitch * f * 8 <= block_mm and min(full_blocks.shape) >= 64:
        h2, w2 = full_blocks.shape[0] // 2, full_blocks.shape[1] // 2
        full_blocks = (full_blocks[0:2 * h2:2, 0:2 * w2:2] & full_blocks[1:2 * h2:2, 0:2 * w2:2]
                       & full_blocks[0:2 * h2:2, 1:2 * w2:2] & full_blocks[1:2 * h2:2, 1:2 * w2:2])
        f *= 2
    k = max(3, int(math.ceil(block_mm / (pitch * f))) | 1)
    # Opening by a k x k square: erosion (every block of the square unscanned), then dilation.
    core = _ndi.minimum_filter(full_blocks, size=k, mode="constant", cval=True)
    del full_blocks
    opened = _ndi.maximum_filter(core, size=2 * k - 1, mode="constant", cval=False)
    del core
    if f == 1:
        opened &= unscanned
        return opened
    h, w = unscanned.shape
    hb, wb = opened.shape
    out = np.zeros((h, w), dtype=bool)
    out[:hb * f, :wb * f] = unscanned[:hb * f, :wb * f]
    view = out[:hb * f, :wb * f].reshape(hb, f, wb, f)
    view &= opened[:, None, :, None]
    return out


def _features(scan: FloorScan, *, loss_scale_mm: float | None = None,
              block_mm: float = LARGE_AREA_MM) -> tuple[np.ndarray, np.ndarray]:
    scale = float(loss_scale_mm) if loss_scale_mm else LOSS_SCALE_FRACTION * scan.meta.nominal
    t = scan.thickness
    f = np.float32(scan.meta.nominal) - t
    f *= np.float32(1.0 / scale)
    np.clip(f, 0.0, 1.0, out=f)
    unscanned = np.isnan(t)
    big = _large_unscanned(unscanned, scan.pitch, block_mm)
    np.copyto(f, np.float32(SEAM_VALUE), where=unscanned)
    np.copyto(f, np.float32(0.0), where=big)
    return f, big


def feature_image(scan: FloorScan, *, loss_scale_mm: float | None = None,
                  block_mm: float = None) -> np.ndarray:
    """The registration feature image of a scan, on its own grid.

    Parameters
    ----------
    scan : the scan.
    loss_scale_mm : loss at which the feature saturates at 1; default a quarter of nominal. [mm]
    block_mm : size of a block that, entirely unscanned, marks a large unscanned area;
        default :data:`LARGE_AREA_MM`. [mm]

    Returns
    -------
    float32 array: 1 where a cell was not scanned in a narrow line or small area
    (weld seams, plate edges), 0 in large unscanned areas (outside the floor, the shell
    margin, obstructions: their outline changes from one outage to the next),
    ``clip((nominal - thickness) / loss_scale_mm, 0, 1)`` where it was scanned.
    """
    return _features(scan, loss_scale_mm=loss_scale_mm,
                     block_mm=LARGE_AREA_MM if block_mm is None else block_mm)[0]


@dataclass
class _Level:
    img: np.ndarray
    big: np.ndarray
    x0: float
    y0: float
    pitch: float
    _smooth: np.ndarray | None = None
    _grad: tuple | None = None
    _interior: np.ndarray | None = None
    _smooth_big: np.ndarray | None = None

    @property
    def smooth(self) -> np.ndarray:
        if self._smooth is None:
            self._smooth = _ndi.gaussian_filter(self.img, 1.0, mode="nearest", truncate=3.0)
        return self._smooth

    @property
    def smooth_big(self) -> np.ndarray:
        """The large-area mask smoothed like the image (float32); 0 exactly in the interior."""
        if self._smooth_big is None:
            self._smooth_big = _ndi.gaussian_filter(np.asarray(self.big, dtype=np.float32), 1.0,
                                                    mode="nearest", truncate=3.0)
        return self._smooth_big

    def coarse(self, boundary_weight: float) -> np.ndarray:
        """Smoothed feature image with the large unscanned areas added at ``boundary_weight``."""
        if boundary_weight == 0:
            return self.smooth
        return self.smooth + np.float32(boundary_weight) * self.smooth_big

    @property
    def interior(self) -> np.ndarray:
        """Cells 3 or more cells away from any large unscanned area (bool): the floor interior.

        The margin keeps the smoothing (sigma 1 cell, 3 cells wide) of the outline out.
        """
        if self._interior is None:
            self._interior = ~_ndi.maximum_filter(np.asarray(self.big) > 0, size=7, mode="nearest")
        return self._interior

    @property
    def grad(self) -> tuple[np.ndarray, np.ndarray]:
        """(d/dx, d/dy) of the smoothed image. [1/mm]"""
        if self._grad is None:
            self._grad = _gradient(self.smooth, self.pitch)
        return self._grad


def _half(a: np.ndarray) -> np.ndarray:
    """2x2 block means (odd last row/column dropped), float32."""
    h2, w2 = a.shape[0] // 2, a.shape[1] // 2
    out = a[0:2 * h2:2, 0:2 * w2:2].astype(np.float32)
    out += a[1:2 * h2:2, 0:2 * w2:2]
    out += a[0:2 * h2:2, 1:2 * w2:2]
    out += a[1:2 * h2:2, 1:2 * w2:2]
    out *= np.float32(0.25)
    return out


def _gradient(a: np.ndarray, pitch: float) -> tuple[np.ndarray, np.ndarray]:
    """Central differences (one-sided at the edges) along x (columns) and y (rows). [1/mm]"""
    k = np.float32(0.5 / pitch)
    gx = np.empty_like(a)
    gy = np.empty_like(a)
    np.subtract(a[:, 2:], a[:, :-2], out=gx[:, 1:-1])
    gx[:, 1:-1] *= k
    gx[:, 0] = (a[:, 1] - a[:, 0]) * (2 * k)
    gx[:, -1] = (a[:, -1] - a[:, -2]) * (2 * k)
    np.subtract(a[2:], a[:-2], out=gy[1:-1])
    gy[1:-1] *= k
    gy[0] = (a[1] - a[0]) * (2 * k)
    gy[-1] = (a[-1] - a[-2]) * (2 * k)
    return gx, gy


def _pyramid(scan: FloorScan, min_cells: int = 16) -> list[_Level]:
    img, big = _features(scan)
    # the finest level keeps the large-area mask as bool (_half and coarse() take it as 0/1)
    levels = [_Level(img, big, scan.x0, scan.y0, scan.pitch)]
    while min(levels[-1].img.shape) // 2 >= min_cells:
        lv = levels[-1]
        levels.append(_Level(_half(lv.img), _half(lv.big), lv.x0 + lv.pitch / 2,
                             lv.y0 + lv.pitch / 2, lv.pitch * 2))
    return levels


def _closest_level(levels: list[_Level], pitch: float) -> _Level:
    return min(levels, key=lambda lv: abs(math.log(lv.pitch / pitch)))


def _sample_level(lv: _Level, arr: np.ndarray, qx, qy):
    """Bilinear sample of ``arr`` (on lv's grid) at floor points; returns values and inside-mask."""
    ri = (qy - lv.y0) / lv.pitch
    ci = (qx - lv.x0) / lv.pitch
    h, w = arr.shape
    inside = (ri >= 0) & (ri <= h - 1) & (ci >= 0) & (ci <= w - 1)
    vals = _ndi.map_coordinates(arr, [ri.ravel(), ci.ravel()], order=1, mode="nearest",
                                prefilter=False).reshape(np.shape(ri))
    return vals, inside


# --------------------------------------------------------------------------------------
# coarse search: masked NCC over all shifts (Padfield 2012) for a sweep of angles
# --------------------------------------------------------------------------------------
@dataclass
class _SweepSetup:
    """The newer level's transforms and the grids shared by every angle of a sweep."""

    shape: tuple[int, int]
    s: int
    pre: list
    X: np.ndarray
    Y: np.ndarray
    win_r: np.ndarray
    win_c: np.ndarray
    in_window: np.ndarray


def _sweep_setup(new_lv: _Level, max_shift_mm: float, boundary_weight: float, seams: bool) -> _SweepSetup:
    """Pad the newer level's channels (with outline; interior only if ``seams``) and
    transform them once for :func:`_ncc_at_angle`."""
    h, w = new_lv.img.shape
    pc = new_lv.pitch
    s = int(math.ceil(max_shift_mm / pc)) + 1
    eh, ew = h + 2 * s, w + 2 * s
    shape = (_fft.next_fast_len(eh + s + 1, real=True), _fft.next_fast_len(ew + s + 1, real=True))

    def padded(img):
        out = np.zeros((eh, ew), dtype=np.float32)
        out[s:s + h, s:s + w] = img
        return out

    # Per channel the new image and mask.  The Gaussian smoothing is linear, so the outline
    # channel is smooth(img) + w * smooth(big): the older level is sampled in these two parts,
    # and smooth(big) == 0 is also the interior (the smoothing reaches 3 cells).
    chans = [(new_lv.coarse(boundary_weight), np.ones((h, w), dtype=np.float32))]
    if seams:
        m_new = new_lv.interior.astype(np.float32)
        chans.append((new_lv.smooth * m_new, m_new))
    pre = []
    for f_new, m_new in chans:
        a = padded(f_new)
        m1 = padded(m_new)
        pre.append((_fft.rfft2(a, s=shape, workers=-1), _fft.rfft2(a * a, s=shape, workers=-1),
                    _fft.rfft2(m1, s=shape, workers=-1), float(m1.sum())))
    ex = new_lv.x0 - s * pc + pc * np.arange(ew)
    ey = new_lv.y0 - s * pc + pc * np.arange(eh)
    X, Y = np.meshgrid(ex, ey)
    tau = np.arange(-s, s + 1) * pc
    TX, TY = np.meshgrid(tau, tau)
    return _SweepSetup(shape, s, pre, X, Y, np.arange(-s, s + 1) % shape[0], np.arange(-s, s + 1) % shape[1],
                       np.hypot(TX, TY) <= max_shift_mm + 1e-9)


def _ncc_peak(st: _SweepSetup, ic: int, g: np.ndarray, m2: np.ndarray, pitch: float,
              min_overlap_frac: float) -> tuple[float, float, float]:
    """Best (ncc, tau_x [mm], tau_y [mm]) of channel ``ic`` against the older image ``g``
    (already resampled onto the padded newer grid) with mask ``m2``; Padfield (2012) eq. (5)-(8)."""
    # one batched forward (3 images) and one batched inverse (6 products) transform: small
    # levels are dominated by the per-call overhead, large ones use both workers on the batch
    kw = dict(s=st.shape, axes=(-2, -1), workers=-1 if st.shape[0] * st.shape[1] >= 1 << 16 else 1)
    fa, fa2, fm1, n1 = st.pre[ic]
    g = g.astype(np.float32) * m2
    fm2, fb, fb2 = _fft.rfft2(np.stack([m2, g, g * g]), **kw)
    prods = np.stack([fm1 * np.conj(fm2), fa * np.conj(fb), fa * np.conj(fm2), fm1 * np.conj(fb),
                      fa2 * np.conj(fm2), fm1 * np.conj(fb2)])
    full = _fft.irfft2(prods, **kw)
    del prods
    c_mm, c_ab, c_am, c_mb, c_a2m, c_mb2 = full[:, st.win_r][:, :, st.win_c].astype(np.float64)
    cm = np.maximum(c_mm, 1e-9)
    with np.errstate(divide="ignore", invalid="ignore"):
        num = c_ab - c_am * c_mb / cm
        va = c_a2m - c_am ** 2 / cm
        vb = c_mb2 - c_mb ** 2 / cm
        ncc = num / np.sqrt(np.maximum(va, 0) * np.maximum(vb, 0))
    # variances below 1e-4 per cell (feature std 0.01) are no features, and also the
    # level of the single-precision round-off of these sums
    ok = st.in_window & (c_mm >= min_overlap_frac * n1) & (va > 1e-4 * cm) & (vb > 1e-4 * cm)
    ncc = np.where(ok & np.isfinite(ncc), ncc, -1.0)
    k = int(np.argmax(ncc))
    i, j = divmod(k, ncc.shape[1])
    di = _parabolic(ncc[i - 1, j], ncc[i, j], ncc[i + 1, j]) if 0 < i < ncc.shape[0] - 1 else 0.0
    dj = _parabolic(ncc[i, j - 1], ncc[i, j], ncc[i, j + 1]) if 0 < j < ncc.shape[1] - 1 else 0.0
    return float(ncc[i, j]), (j - st.s + dj) * pitch, (i - st.s + di) * pitch


def _masked_ncc_sweep(new_lv: _Level, old_lv: _Level, angles_deg: np.ndarray,
                      centre: tuple[float, float], max_shift_mm: float,
                      min_overlap_frac: float = 0.25, boundary_weight: float = BOUNDARY_WEIGHT,
                      seams: bool = False, only_seams: bool = False):
    """Best (ncc, tau_x, tau_y) per angle; tau in mm, the shift to add to ``centre``.

    ``only_seams`` computes the second list alone (half the work) and returns it.

    With ``seams`` a second list is returned, of the same sweep over the floor interior
    only (:attr:`_Level.interior` of both levels as the masks, the large unscanned areas
    and a margin of 3 cells along them left out): seams, plate edges and pits without the
    coverage outline.  It shares the resampling of the older level with the first.

    Notes
    -----
    Padfield (2012), eq. (5)-(8): with masks m1, m2 and images f1, f2 and the
    cross-correlation C(a, b)(t) = sum_p a(p) b(p - t),
    NCC(t) = [C(f1, f2) - C(f1, m2) C(m1, f2) / C(m1, m2)] /
             sqrt([C(f1^2, m2) - C(f1, m2)^2 / C(m1, m2)] [C(m1, f2^2) - C(m1, f2)^2 / C(m1, m2)]),
    f1 and f2 already multiplied by their masks.  Single-precision transforms: half the time
    of double on large floors; against double the NCC differs by < 1e-6 and the peak shift
    by < 0.2 mm on 30-100 m floors (measured).
    """
    st = _sweep_setup(new_lv, max_shift_mm, boundary_weight, seams or only_seams)
    X, Y = st.X - centre[0], st.Y - centre[1]
    bw32 = np.float32(boundary_weight)
    best = [[] for _ in st.pre]
    for ang in angles_deg:
        th = math.radians(ang)
        c, sn = math.cos(th), math.sin(th)
        qx = c * X + sn * Y
        qy = -sn * X + c * Y
        g_img, inside = _sample_level(old_lv, old_lv.smooth, qx, qy)
        g_big = _sample_level(old_lv, old_lv.smooth_big, qx, qy)[0]
        if not only_seams:
            best[0].append(_ncc_peak(st, 0, g_img + bw32 * g_big, inside.astype(np.float32),
                                     new_lv.pitch, min_overlap_frac))
        if seams or only_seams:
            best[1].append(_ncc_peak(st, 1, g_img, (inside & (g_big <= 0)).astype(np.float32),
                                     new_lv.pitch, min_overlap_frac))
    if only_seams:
        return best[1]
    return (best[0], best[1]) if seams else best[0]


def _parabolic(ym, y0, yp) -> float:
    """Vertex offset of the parabola through (-1, ym), (0, y0), (1, yp), within ±0.5."""
    if min(ym, yp) <= -1.0:
        return 0.0
    d = ym - 2 * y0 + yp
    if d >= 0:
        return 0.0
    return float(np.clip(0.5 * (ym - yp) / d, -0.5, 0.5))


# --------------------------------------------------------------------------------------
# refinement: Gauss-Newton (Lucas-Kanade) on the strongest-gradient cells
# --------------------------------------------------------------------------------------
def _gradient_samples(new_lv: _Level, n_samples: int) -> np.ndarray:
    """Flat indices of the refinement's sample cells of ``new_lv``: cells with a clear
    gradient (above 5 % of the 99.9th percentile, two cells from the grid edge), a seeded
    random subset of ``n_samples`` of them if more: spreads the samples over all features
    instead of the few strongest edges."""
    gxn, gyn = new_lv.grad
    mag = gxn * gxn + gyn * gyn
    b = 2
    mag[:b] = 0
    mag[-b:] = 0
    mag[:, :b] = 0
    mag[:, -b:] = 0
    flat = mag.ravel()
    hi = float(np.quantile(flat[:: max(1, flat.size // 200000)], 0.999))
    idx = np.flatnonzero(flat > 0.05 * hi) if hi > 0 else np.empty(0, dtype=np.intp)
    if idx.size > n_samples:
        idx = np.sort(np.random.default_rng(12345).choice(idx, n_samples, replace=False))
    return idx


@dataclass(eq=False)
class _Samples:
    """The refinement's sample cells of the newer level (positions ``px``, ``py`` [mm], smoothed
    values ``fv``), matched in the older level ``old_lv``; ``rchar`` scales the rotation to a
    length (RMS distance of the samples from the origin). [mm]"""

    old_lv: _Level
    px: np.ndarray
    py: np.ndarray
    fv: np.ndarray
    rchar: float

    @classmethod
    def of(cls, new_lv: _Level, old_lv: _Level, idx: np.ndarray) -> "_Samples":
        fn = new_lv.smooth
        rr, cc = np.divmod(idx, fn.shape[1])
        px = new_lv.x0 + cc * new_lv.pitch
        py = new_lv.y0 + rr * new_lv.pitch
        rchar = float(np.sqrt(np.mean(px * px + py * py))) or 1.0
        return cls(old_lv, px, py, fn.ravel()[idx].astype(np.float64), rchar)

    def warp(self, params):
        """The older level's smoothed values at the samples carried by ``params`` (theta, dx,
        dy, gain, offset): ``(values, inside, qx, qy, cos theta, sin theta)``."""
        th_, dx_, dy_ = params[:3]
        c, s = math.cos(th_), math.sin(th_)
        vx = self.px - dx_
        vy = self.py - dy_
        qx = c * vx + s * vy
        qy = -s * vx + c * vy
        g, inside = _sample_level(self.old_lv, self.old_lv.smooth, qx, qy)
        return g, inside, qx, qy, c, s

    def try_step(self, params, step, k):
        """``(cost, warp, params)`` after ``step`` (theta scaled by ``rchar``), None if fewer than
        50 samples stay inside the older level."""
        trial = params + step * np.array([1.0 / self.rchar, 1, 1, 1, 1])
        state = self.warp(trial)
        g_t, in_t = state[0], state[1]
        if np.count_nonzero(in_t) < 50:
            return None
        return _huber_cost(trial[3] * g_t[in_t] + trial[4] - self.fv[in_t], k), state, trial


def _huber_cost(r, k):
    """Mean Huber loss of the residuals ``r`` with threshold ``k``."""
    a = np.abs(r)
    return float(np.mean(np.where(a <= k, 0.5 * r * r, k * (a - 0.5 * k))))


def _photometric_start(sm: _Samples, params, state):
    """Gain and offset by least squares before the geometric steps (kept only for a positive
    gain), and the Huber threshold from the residuals' MAD, fixed for the level:
    ``(params, k, cost)``."""
    g, inside = state[0], state[1]
    A = np.column_stack([g[inside], np.ones(np.count_nonzero(inside))])
    sol, *_ = np.linalg.lstsq(A, sm.fv[inside], rcond=None)
    if sol[0] > 1e-6:
        params[3], params[4] = sol
    r_all = params[3] * g[inside] + params[4] - sm.fv[inside]
    mad = np.median(np.abs(r_all - np.median(r_all))) * 1.4826
    k = 2.0 * max(mad, 1e-6)
    return params, k, _huber_cost(r_all, k)


def _normal_equations(sm: _Samples, params, state, k):
    """The Huber-weighted Gauss-Newton normal equations at ``params``: ``(H, grad, s2, n)``,
    s2 the weighted residual variance and n the residuals' count."""
    g, inside, qx, qy, c, s = state
    gxo, gyo = sm.old_lv.grad
    gx, _ = _sample_level(sm.old_lv, gxo, qx, qy)
    gy, _ = _sample_level(sm.old_lv, gyo, qx, qy)
    gi = g[inside].astype(np.float64)
    gx = gx[inside].astype(np.float64)
    gy = gy[inside].astype(np.float64)
    qxi, qyi = qx[inside], qy[inside]
    gain = params[3]
    r = gain * gi + params[4] - sm.fv[inside]
    J = np.column_stack([
        gain * (gx * qyi - gy * qxi) / sm.rchar,         # d r / d(theta * rchar)
        gain * (-gx * c + gy * s),                       # d r / d dx
        gain * (-gx * s - gy * c),                       # d r / d dy
        gi,                                              # d r / d gain
        np.ones_like(gi),                                # d r / d offset
    ])
    wts = np.minimum(1.0, k / np.maximum(np.abs(r), 1e-12))
    JW = J * wts[:, None]
    return JW.T @ J, JW.T @ r, float(np.sum(wts * r * r) / max(1, r.size - 5)), r.size


def _damped_step(sm: _Samples, params, cost, H, grad, n_res, lam, k, pitch):
    """One Levenberg-Marquardt step: ``(tried, lam)``, ``tried`` = ``(cost, warp, params)`` of
    the step kept, or None when no damping up to 10^11 times ``lam`` lowers the robust cost
    (or the system is singular).

    A step is at most one cell (``pitch``) of displacement.  Parabolic line search along it
    (cost at 0 and 1, slope at 0): the Gauss-Newton model neglects the residual curvature
    term, and near seams whose two pictures differ the true curvature can be twice the
    model's, so full steps overshoot and the iterates zig-zag across the minimum (the cause
    of non-convergence on some floors).
    """
    for _ in range(12):
        Hd = H + lam * np.diag(np.diag(H))
        try:
            step = -np.linalg.solve(Hd, grad)
        except np.linalg.LinAlgError:
            break
        geo = math.hypot(step[0], math.hypot(step[1], step[2]))
        if geo > pitch:
            step *= pitch / geo
        tried = sm.try_step(params, step, k)
        if tried is None:
            lam *= 10
            continue
        slope = float(grad @ step) / max(1, n_res)
        a2 = (tried[0] - cost) - slope
        if slope < 0 and a2 > 0:
            t_star = -slope / (2.0 * a2)
            if 0.05 <= t_star <= 0.85:
                short = sm.try_step(params, step * t_star, k)
                if short is not None and short[0] < tried[0]:
                    tried = short
        if tried[0] <= cost:
            return tried, max(lam / 10, 1e-7)
        lam *= 10
    return None, lam


def _refine_level(new_lv: _Level, old_lv: _Level, tr: RigidTransform, *, n_samples: int,
                  max_iter: int = 20, tol_cells: float = 0.005, lam0: float = 1e-3):
    """Gauss-Newton / Levenberg-Marquardt fit of (theta, dx, dy, gain, offset) on one level.

    ``lam0`` is the starting damping (large for a restart after a failed run).
    """
    idx = _gradient_samples(new_lv, n_samples)
    n = int(idx.size)
    if n < 50:
        return tr, {"converged": False, "n": n, "iterations": 0, "cov": None}
    sm = _Samples.of(new_lv, old_lv, idx)
    pitch = new_lv.pitch
    params = np.array([tr.theta, tr.dx_mm, tr.dy_mm, 1.0, 0.0], dtype=np.float64)
    state = sm.warp(params)
    if np.count_nonzero(state[1]) < 50:
        return tr, {"converged": False, "n": n, "iterations": 0, "cov": None}
    params, k, cost = _photometric_start(sm, params, state)
    lam = lam0
    converged = False
    H = s2 = cov = None
    it = 0
    for it in range(1, max_iter + 1):
        H, grad, s2, n_res = _normal_equations(sm, params, state, k)
        tried, lam = _damped_step(sm, params, cost, H, grad, n_res, lam, k, pitch)
        if tried is None:
            converged = lam > 1e3     # no further descent possible: at the minimum
            break
        cost, state = tried[0], tried[1]
        taken = tried[2] - params
        params = tried[2]
        if abs(taken[0]) * sm.rchar < tol_cells * pitch and math.hypot(taken[1], taken[2]) < tol_cells * pitch:
            converged = True
            break
    th, dx, dy, gain, off = (float(v) for v in params)
    if converged and H is not None:
        try:
            cov = np.linalg.inv(H) * s2
            cov[0, :] /= sm.rchar
            cov[:, 0] /= sm.rchar
        except np.linalg.LinAlgError:
            cov = None
    out = RigidTransform(math.degrees(th), float(dx), float(dy))
    return out, {"converged": converged, "n": int(n), "iterations": it, "cov": cov,
                 "gain": gain, "offset": off, "pitch": new_lv.pitch, "old_pitch": old_lv.pitch}


def _ncc_aligned(new_lv: _Level, old_lv: _Level, tr: RigidTransform) -> float:
    """Masked NCC of the smoothed feature images after alignment, over new's level grid."""
    fn = new_lv.smooth
    stride = max(1, int(math.ceil(math.sqrt(fn.size / QUALITY_CELLS))))
    fs = fn[::stride, ::stride].astype(np.float64)
    xs = new_lv.x0 + new_lv.pitch * stride * np.arange(fs.shape[1])
    ys = new_lv.y0 + new_lv.pitch * stride * np.arange(fs.shape[0])
    X, Y = np.meshgrid(xs, ys)
    inv = tr.inverse()
    qx, qy = inv.apply(X, Y)
    g, inside = _sample_level(old_lv, old_lv.smooth, qx, qy)
    if np.count_nonzero(inside) < 10:
        return float("nan")
    a = fs[inside]
    b = g[inside].astype(np.float64)
    a = a - a.mean()
    b = b - b.mean()
    den = math.sqrt(float(np.dot(a, a)) * float(np.dot(b, b)))
    return float(np.dot(a, b) / den) if den > 0 else float("nan")


def _thickness_quality(new: FloorScan, old: FloorScan, tr: RigidTransform) -> tuple[float, float]:
    """(overlap_pct, residual_rms_mm) on a strided subsample of new's grid."""
    t = new.thickness
    stride = max(1, int(math.ceil(math.sqrt(t.size / QUALITY_CELLS))))
    ts = t[::stride, ::stride]
    fin = np.isfinite(ts)
    if not fin.any():
        return 0.0, float("nan")
    rows, cols = np.nonzero(fin)
    xn = new.x0 + new.pitch * stride * cols
    yn = new.y0 + new.pitch * stride * rows
    xo, yo = tr.inverse().apply(xn, yn)
    to = sample_thickness(old, xo, yo)
    both = np.isfinite(to)
    overlap = 100.0 * np.count_nonzero(both) / rows.size
    if not both.any():
        return overlap, float("nan")
    d = ts[rows[both], cols[both]].astype(np.float64) - to[both]
    return overlap, float(np.sqrt(np.mean(d * d)))


def _pit_centroids(scan: FloorScan) -> tuple[np.ndarray, np.ndarray]:
    """Loss-weighted centroids of the isolated pits of a scan, at sub-cell precision.

    A pit is a connected group (4-neighbours) of at least :data:`PIT_MIN_CELLS` scanned
    cells whose loss exceeds the floor's median loss by more than
    :data:`PIT_THRESHOLD_FRACTION` of nominal; its centroid is weighted by
    ``clip(excess loss / (LOSS_SCALE_FRACTION nominal), 0, 1)``.  Groups within two cells
    of an unscanned cell are left out: part of such a pit is hidden, differently in each
    outage.  A pit's profile is smooth and crosses the cells at every phase, so its
    centroid carries the sub-cell position that the unscanned seam bands lose.

    Returns
    -------
    (xy, area) : (n, 2) centroids in the scan's own frame [mm] and areas [mm²].
    """
    t = scan.thickness
    h, w = t.shape
    nom = float(scan.meta.nominal)
    fin = t.ravel()[::max(1, t.size // 200000)]
    fin = fin[np.isfinite(fin)]
    if fin.size == 0:
        return np.zeros((0, 2)), np.zeros(0)
    level = float(np.median(fin))                      # thickness of the general (unpitted) floor
    with np.errstate(invalid="ignore"):
        mask = t < np.float32(level - PIT_THRESHOLD_FRACTION * nom)      # NaN compares False
    lab, n = _ndi.label(mask)
    if n == 0:
        return np.zeros((0, 2)), np.zeros(0)
    cells = np.flatnonzero(mask)
    del mask
    li = lab.ravel()[cells]
    del lab
    tv = t.ravel()[cells].astype(np.float64)
    wv = np.clip((level - tv) / (LOSS_SCALE_FRACTION * nom), 0.0, 1.0)
    rows, cols = np.divmod(cells, w)
    # within two cells of an unscanned cell or of the grid edge (gathers on the pit cells only)
    near = np.zeros(cells.size, dtype=bool)
    tflat = t.reshape(-1) if t.flags.c_contiguous else np.ascontiguousarray(t).reshape(-1)
    for dr in range(-2, 3):
        rr = rows + dr
        for dc in range(-2, 3):
            cc = cols + dc
            inb = (rr >= 0) & (rr < h) & (cc >= 0) & (cc < w)
            v = tflat.take(np.clip(rr, 0, h - 1) * w + np.clip(cc, 0, w - 1))
            near |= ~inb | np.isnan(v)
    touch = np.bincount(li, near, minlength=n + 1)
    area = np.bincount(li, minlength=n + 1)
    m = np.bincount(li, wv, minlength=n + 1)
    sx = np.bincount(li, wv * cols, minlength=n + 1)
    sy = np.bincount(li, wv * rows, minlength=n + 1)
    ok = (area >= PIT_MIN_CELLS) & (touch == 0) & (m > 0)
    ok[0] = False
    xy = np.column_stack([scan.x0 + scan.pitch * sx[ok] / m[ok], scan.y0 + scan.pitch * sy[ok] / m[ok]])
    return xy, area[ok] * scan.pitch ** 2


def _pit_shift(new: FloorScan, old: FloorScan, tr: RigidTransform):
    """Sub-cell translation correction of ``tr`` from matched pit centroids.

    The pits of each scan (:func:`_pit_centroids`) are matched as mutual nearest neighbours
    after ``tr`` (within twice the coarser pitch, areas within a factor of 3: pits grow
    between outages); the correction is the mean displacement of the matches after an
    iterated 3-MAD rejection (pits that merged, grew unevenly or were repaired).  The
    rotation of ``tr`` is kept.

    Returns
    -------
    (fit, info) : ``fit`` is ``(correction_xy [mm], standard_error_xy [mm], n_used)`` or None
        with fewer than 2 usable matches; ``info`` the pit counts for the record.
    """
    cn, an = _pit_centroids(new)
    co, ao = _pit_centroids(old)
    if len(cn) < 2 or len(co) < 2:
        return None, {"pits_new": int(len(cn)), "pits_old": int(len(co)), "matched": 0}
    ox, oy = tr.apply(co[:, 0], co[:, 1])
    om = np.column_stack([ox, oy])
    radius = 2.0 * max(new.pitch, old.pitch)
    d_no, j = cKDTree(om).query(cn, distance_upper_bound=radius)
    _, i_back = cKDTree(cn).query(om)
    idx = np.flatnonzero(np.isfinite(d_no))
    idx = idx[i_back[j[idx]] == idx]                          # mutual nearest neighbours
    ratio = an[idx] / ao[j[idx]]
    idx = idx[(ratio > 1.0 / 3.0) & (ratio < 3.0)]
    info = {"pits_new": int(len(cn)), "pits_old": int(len(co)), "matched": int(idx.size)}
    if idx.size < 2:
        return None, info
    d = cn[idx] - om[j[idx]]
    keep = np.ones(len(d), dtype=bool)
    for _ in range(5):
        med = np.median(d[keep], axis=0)
        rr = np.hypot(d[:, 0] - med[0], d[:, 1] - med[1])
        lim = 3.0 * (1.4826 * float(np.median(rr[keep])) + 0.05 * new.pitch)
        nk = rr <= lim
        if nk.sum() < 2 or np.array_equal(nk, keep):
            keep = nk if nk.sum() >= 2 else keep
            break
        keep = nk
    n_used = int(keep.sum())
    info["used"] = n_used
    if n_used < 2:
        return None, info
    corr = d[keep].mean(axis=0)
    se = d[keep].std(axis=0, ddof=1) / math.sqrt(n_used)
    return (corr, se, n_used), info


def _as_control_points(cp):
    """(old_xy, new_xy, names) from a path or a pair of arrays."""
    if isinstance(cp, (str, os.PathLike)):
        return read_control_points_named(cp)
    try:
        old_xy, new_xy = cp
    except (TypeError, ValueError):
        raise InputError("control points: expected a file path or a pair (old_xy, new_xy)") from None
    old_xy = np.asarray(old_xy, dtype=np.float64)
    return old_xy, np.asarray(new_xy, dtype=np.float64), [f"P{i + 1}" for i in range(len(old_xy))]


# --------------------------------------------------------------------------------------
# loss pattern
# --------------------------------------------------------------------------------------
@dataclass
class _LossLevel:
    img: np.ndarray      # loss feature, 0 where unscanned (block mean) [-]
    cov: np.ndarray      # scanned fraction of the block [-]
    x0: float
    y0: float
    pitch: float


def _loss_pyramid(scan: FloorScan, min_cells: int = 16) -> list[_LossLevel]:
    """Pyramid of the scan's *loss pattern*: ``clip((level - t) / (0.25 nominal), 0, 1)`` with
    ``level`` the median scanned thickness (the general floor), so general thinning (a UT scan's
    loss everywhere) is left out and only pits, patches and local loss remain.

    The finest level is the scan itself on grids of up to 4 x :data:`QUALITY_CELLS` cells; on
    larger grids every 2nd (4th, ...) cell, keeping at least that many (pits span 4-12 cells,
    and the comparison runs at most at 2 x :data:`QUALITY_CELLS` cells)."""
    t = scan.thickness
    sample = t.ravel()[::max(1, t.size // 200000)]
    sample = sample[np.isfinite(sample)]
    level = float(np.median(sample)) if sample.size else float(scan.meta.nominal)
    k = 1
    while t.size / (4 * k * k) >= 4 * QUALITY_CELLS:
        k *= 2
    tk = t[::k, ::k]
    img = np.float32(level) - tk
    img *= np.float32(1.0 / (LOSS_SCALE_FRACTION * scan.meta.nominal))
    np.clip(img, 0.0, 1.0, out=img)
    cov = np.isfinite(tk)
    np.copyto(img, np.float32(0.0), where=~cov)
    levels = [_LossLevel(img, cov, scan.x0, scan.y0, scan.pitch * k)]
    while min(levels[-1].img.shape) // 2 >= min_cells:
        lv = levels[-1]
        levels.append(_LossLevel(_half(lv.img), _half(lv.cov), lv.x0 + lv.pitch / 2,
                                 lv.y0 + lv.pitch / 2, lv.pitch * 2))
    return levels


def loss_match(new: FloorScan, old: FloorScan, transform: RigidTransform, *, pitch_mm: float | None = None,
               pyramids=None) -> float:
    """Correlation of the two scans' loss patterns (pits, patches) after ``transform``.

    Parameters
    ----------
    new, old : the two scans.
    transform : old-to-new transform.
    pitch_mm : cell size the patterns are compared at (block means of 2^k cells, smoothed by
        one cell); default the finest level of at most 2 x :data:`QUALITY_CELLS`
        cells. [mm]
    pyramids : ``(new, old)`` loss pyramids from an earlier call (internal reuse), or None.

    Returns
    -------
    Pearson correlation (-1 to 1) of the loss over the cells scanned in both; NaN when fewer
    than 100 such cells, or fewer than :data:`LOSS_PATTERN_CELLS` of them show loss above
    :data:`LOSS_PATTERN_MIN` in either scan (no pattern, only reading noise). [-]

    Notes
    -----
    Seams, plate edges and the coverage outline repeat with the plate layout (a rotation of
    90° or 180° can match them again); the corrosion pattern does not.  The pattern is the
    loss above the floor's median thickness, so the general thinning of an uncensored (UT)
    scan and MFL's censoring both leave it unchanged; pits grow, so the correlation of one
    floor's two outages is well above that of two floors (measured on synthetic pairs,
    ``tests/test_register_circle.py``).
    """
    return _loss_match(new, old, transform, pitch_mm=pitch_mm, pyramids=pyramids)[0]


def _loss_match(new: FloorScan, old: FloorScan, transform: RigidTransform, *, pitch_mm: float | None = None,
                pyramids=None) -> tuple[float, int]:
    """:func:`loss_match` and the smaller of the two scans' counts of compared cells with loss."""
    ln, lo = pyramids if pyramids is not None else (_loss_pyramid(new), _loss_pyramid(old))
    if pitch_mm is None:
        a = next((lv for lv in ln if lv.img.size <= 2 * QUALITY_CELLS), ln[-1])
    else:
        a = min(ln, key=lambda lv: abs(math.log(lv.pitch / pitch_mm)))
    b = min(lo, key=lambda lv: abs(math.log(lv.pitch / a.pitch)))
    sm = dict(sigma=1.0, mode="constant", truncate=2.0)
    f32 = np.float32
    ai, ac = _ndi.gaussian_filter(a.img, **sm), _ndi.gaussian_filter(a.cov.astype(f32, copy=False), **sm)
    bi, bc = _ndi.gaussian_filter(b.img, **sm), _ndi.gaussian_filter(b.cov.astype(f32, copy=False), **sm)
    stride = max(1, int(math.ceil(math.sqrt(ai.size / QUALITY_CELLS))))
    rows = np.arange(0, ai.shape[0], stride)
    cols = np.arange(0, ai.shape[1], stride)
    X, Y = np.meshgrid(a.x0 + a.pitch * cols, a.y0 + a.pitch * rows)
    qx, qy = transform.inverse().apply(X, Y)
    coords = [((qy - b.y0) / b.pitch).ravel(), ((qx - b.x0) / b.pitch).ravel()]
    gv = _ndi.map_coordinates(bi, coords, order=1, mode="constant", cval=0.0, prefilter=False)
    gc = _ndi.map_coordinates(bc, coords, order=1, mode="constant", cval=0.0, prefilter=False)
    fv = ai[np.ix_(rows, cols)].ravel()
    fc = ac[np.ix_(rows, cols)].ravel()
    m = (fc > 0.75) & (gc > 0.75)
    if np.count_nonzero(m) < 100:
        return float("nan"), 0
    x = fv[m].astype(np.float64) / fc[m]
    y = gv[m].astype(np.float64) / gc[m]
    # reading noise alone is no pattern: some loss must stand out in both
    n_loss = min(np.count_nonzero(x > LOSS_PATTERN_MIN), np.count_nonzero(y > LOSS_PATTERN_MIN))
    if n_loss < LOSS_PATTERN_CELLS:
        return float("nan"), int(n_loss)
    x -= x.mean()
    y -= y.mean()
    den = math.sqrt(float(x @ x) * float(y @ y))
    return (float(x @ y / den) if den > 1e-12 * m.sum() else float("nan")), int(n_loss)


# --------------------------------------------------------------------------------------
# search over the circle
# --------------------------------------------------------------------------------------
@dataclass
class CoarseSearch:
    """The result of :func:`coarse_search`.

    Parameters
    ----------
    candidates : old-to-new transforms at the coarse level's precision, best NCC first.
    ncc : the masked NCC (with the coverage outline) of each candidate at the coarse level. [-]
    strength : height of each candidate's peak above the median of the whole-range seam-only
        sweep (1 for the peak of a narrow sweep; None for a next-best peak of a narrow sweep,
        kept only to restart the refinement from). [-]
    rotation_contrast : seam-only NCC at the best angle minus its median over the sweep (None
        for a narrow window of less than 2°). [-]
    contrast_noise : NCC noise level of two unrelated floors of the interior's size. [-]
    coarse_pitch_mm : cell size of the level the candidates were placed on. [mm]
    details : sweep figures for the record.
    """

    candidates: list[RigidTransform]
    ncc: list[float]
    strength: list[float | None]
    rotation_contrast: float | None
    contrast_noise: float
    coarse_pitch_mm: float
    details: dict = field(default_factory=dict)


def _coarse_level_index(pn: list[_Level]) -> int:
    """Coarsest level with at least COARSE_CELLS on the long side and a pitch of at most
    COARSE_MAX_PITCH_MM (on large floors the seam bands would vanish)."""
    kc = 0
    for k, lv in enumerate(pn):
        if max(lv.img.shape) >= COARSE_CELLS and lv.pitch <= COARSE_MAX_PITCH_MM * (1 + 1e-9):
            kc = k
    return kc


def _rim_radius(scan: FloorScan) -> float:
    """Distance of the grid's farthest corner from the origin. [mm]"""
    return max(1.0, max(math.hypot(x, y) for x in (scan.x[0], scan.x[-1]) for y in (scan.y[0], scan.y[-1])))


def _contrast(peaks: np.ndarray, peaks_seam: np.ndarray, lv: _Level, circular: bool) -> tuple[float, float]:
    """(rotation contrast, NCC noise level) of a sweep; see :class:`CoarseSearch`."""
    ib = int(np.argmax(peaks))
    n = len(peaks)
    # an angle without features in the overlap (NCC undefined, -1) counts as no correlation
    pk = np.maximum(peaks_seam, 0.0)
    near = [(ib + d) % n for d in (-1, 0, 1)] if circular else list(range(max(0, ib - 1), min(n, ib + 2)))
    contrast = float(np.max(pk[near]) - np.median(pk))
    # NCC noise of unrelated floors: 1/sqrt(N_eff), N_eff = interior cells / (4 pi sigma^2)
    # for white noise smoothed by a Gaussian of sigma = 1 cell (from memory)
    n_eff = float(np.count_nonzero(lv.interior)) / (4.0 * math.pi)
    return contrast, 1.0 / math.sqrt(max(n_eff, 1.0))


def _local_maxima(peaks: np.ndarray, circular: bool, fraction: float, n_max: int) -> list[int]:
    """Indices of the local maxima of a sweep within ``fraction`` of the best, best first."""
    n = len(peaks)
    out = []
    for j in np.argsort(-peaks):
        j = int(j)
        if peaks[j] < fraction * peaks[int(np.argmax(peaks))] or len(out) >= n_max:
            break
        lo = peaks[(j - 1) % n] if (circular or j > 0) else -np.inf
        hi = peaks[(j + 1) % n] if (circular or j < n - 1) else -np.inf
        if peaks[j] >= lo and peaks[j] >= hi:
            out.append(j)
    return out


def _window_best(res: list, angles: np.ndarray, step: float, centre: RigidTransform) -> tuple[RigidTransform, float]:
    """The best (angle, shift) of a sweep window, parabolic sub-step in angle."""
    peaks = np.array([r[0] for r in res])
    ib = int(np.argmax(peaks))
    da = _parabolic(peaks[ib - 1], peaks[ib], peaks[ib + 1]) if 0 < ib < len(peaks) - 1 else 0.0
    tr = RigidTransform(_wrap_deg(float(angles[ib] + da * step)), centre.dx_mm + res[ib][1],
                        centre.dy_mm + res[ib][2])
    return tr, float(peaks[ib])


def _wrap_deg(a: float) -> float:
    """Angle in (-180, 180]. [deg]"""
    a = math.fmod(a, 360.0)
    if a > 180.0:
        a -= 360.0
    elif a <= -180.0:
        a += 360.0
    return a


def _angle_diff(a: float, b: float) -> float:
    """Absolute difference of two angles on the circle. [deg]"""
    return abs(_wrap_deg(a - b))


def _climb(new_c: _Level, old_c: _Level, angles: np.ndarray, res: list, step: float, shift, max_shift_mm: float,
           max_ext: int = 4) -> tuple[np.ndarray, list]:
    """Extend a candidate's window by whole windows while its best angle lies on an edge."""
    for _ in range(max_ext):
        ib = int(np.argmax([r[0] for r in res]))
        if 0 < ib < len(res) - 1:
            break
        n = len(angles)
        more = angles[0] - step * np.arange(n, 0, -1) if ib == 0 else angles[-1] + step * np.arange(1, n + 1)
        got = _masked_ncc_sweep(new_c, old_c, more, shift, max_shift_mm)
        angles, res = (np.concatenate([more, angles]), got + res) if ib == 0 else \
            (np.concatenate([angles, more]), res + got)
    return angles, res


def coarse_search(new: FloorScan, old: FloorScan, *, centre: RigidTransform | None = None,
                  half_range_deg: float = 180.0, max_shift_mm: float = 400.0,
                  n_candidates: int = N_CANDIDATES, pyramids=None) -> CoarseSearch:
    """Rotation sweep with a masked NCC over all shifts: the best few (angle, shift) candidates.

    Parameters
    ----------
    new, old : the two scans.
    centre : the transform the search is centred on (default the identity). [-]
    half_range_deg : half-range of the rotation sweep around ``centre``; 180 searches the
        whole circle. [deg]
    max_shift_mm : search radius of the translation around ``centre``'s (for every angle,
        the rotation is about the origin). [mm]
    n_candidates : most candidates returned (local maxima of the sweep). [-]
    pyramids : ``(new, old)`` feature pyramids from an earlier call (internal reuse), or None.

    Returns
    -------
    CoarseSearch

    Notes
    -----
    Feature images (seams and plate edges 1, loss up to 1, large unscanned areas 0, coverage
    outline added at :data:`BOUNDARY_WEIGHT`), smoothed by one cell.  For each angle the older
    level is resampled onto the newer level's grid and the masked NCC over all shifts within
    ``max_shift_mm`` is computed with FFTs (Padfield 2012).  Over more than
    :data:`WIDE_SWEEP_DEG` the sweep runs in two stages: the whole range on a level of about
    :data:`CIRCLE_CELLS` cells across at a step of :data:`CIRCLE_STEP_CELLS` of its cells at the
    rim, keeping the local maxima within :data:`CANDIDATE_FRACTION` of the best; then each of
    them again, ±0.5 steps around the vertex of its peak (extended while the best angle is
    on the window's edge), on the finer coarse level (:data:`COARSE_CELLS`) at a step of one
    of its cells at the rim.

    References
    ----------
    Padfield, D. (2012). IEEE Transactions on Image Processing 21(5), 2706-2718.
    """
    pn, po = pyramids if pyramids is not None else (_pyramid(new), _pyramid(old))
    centre = centre or RigidTransform()
    kc = _coarse_level_index(pn)
    new_c = pn[kc]
    old_c = _closest_level(po, new_c.pitch)
    rmax = _rim_radius(new)
    fstep = min(0.5, max(0.02, math.degrees(new_c.pitch / rmax)))
    shift = (centre.dx_mm, centre.dy_mm)
    details: dict = {"coarse_pitch_mm": new_c.pitch, "angle_step_deg": fstep}
    contrast = None
    noise = 0.0
    if half_range_deg > WIDE_SWEEP_DEG:
        kw = kc
        for k in range(kc, len(pn)):
            if max(pn[k].img.shape) >= CIRCLE_CELLS:
                kw = k
        new_w = pn[kw]
        old_w = _closest_level(po, new_w.pitch)
        wstep = min(CIRCLE_MAX_STEP_DEG, max(fstep, math.degrees(CIRCLE_STEP_CELLS * new_w.pitch / rmax)))
        circular = half_range_deg >= 180.0
        if circular:
            nw = int(math.ceil(360.0 / wstep))
            wstep = 360.0 / nw
            angles_w = centre.rotation_deg + wstep * np.arange(nw)
        else:
            nw = int(math.ceil(half_range_deg / wstep))
            angles_w = centre.rotation_deg + wstep * np.arange(-nw, nw + 1)
        # seams, plate edges and pits only: the round coverage outline fits at every angle
        t0 = time.perf_counter()
        res_ws = _masked_ncc_sweep(new_w, old_w, angles_w, shift, max_shift_mm + new_w.pitch, only_seams=True)
        details["circle_time_s"] = time.perf_counter() - t0
        peaks_w = np.maximum(np.array([r[0] for r in res_ws]), 0.0)
        contrast, noise = _contrast(peaks_w, peaks_w, new_w, circular)
        details["rotation_contrast_factor"] = ROT_CONTRAST_NOISE_CIRCLE
        above = peaks_w - np.median(peaks_w)
        picks = _local_maxima(above, circular, CANDIDATE_FRACTION, n_candidates)
        # a parabolic vertex per pick, then a window of +-0.5 steps around it at the fine step
        m = max(1, int(math.ceil(0.5 * wstep / fstep)))
        windows, strength = [], []
        for j in picks:
            n = len(peaks_w)
            nb = [peaks_w[(j - 1) % n], peaks_w[j], peaks_w[(j + 1) % n]] if circular or 0 < j < n - 1 else None
            a0 = float(angles_w[j]) + (wstep * _parabolic(*nb) if nb else 0.0)
            windows.append(a0 + fstep * np.arange(-m, m + 1))
            strength.append(float(above[j]))
        details.update(circle_pitch_mm=new_w.pitch, circle_step_deg=wstep, n_angles_circle=int(nw),
                       circle_peaks=[{"rotation_deg": _wrap_deg(float(angles_w[j])), "ncc_seams": float(peaks_w[j])}
                                     for j in picks])
    else:
        n = max(1, int(math.ceil(half_range_deg / fstep)))
        windows = [centre.rotation_deg + fstep * np.arange(-n, n + 1)]
        strength = [1.0]
    cands: list[tuple[RigidTransform, float, float | None]] = []
    for angles, stren in zip(windows, strength):
        narrow = len(windows) == 1 and half_range_deg <= WIDE_SWEEP_DEG
        out = _masked_ncc_sweep(new_c, old_c, angles, shift, max_shift_mm + new_c.pitch, seams=narrow)
        res = out[0] if narrow else out
        if not narrow:
            angles, res = _climb(new_c, old_c, angles, res, fstep, shift, max_shift_mm + new_c.pitch)
        cands.append(_window_best(res, angles, fstep, centre) + (stren,))
        if narrow:
            peaks = np.array([r[0] for r in res])
            if half_range_deg >= 2.0 and len(peaks) >= 5:
                contrast, noise = _contrast(peaks, np.array([r[0] for r in out[1]]), new_c, False)
                details["rotation_contrast_with_outline"] = float(peaks.max() - np.median(peaks))
            # next-best local maxima of the narrow sweep (refinement restarts)
            for j in _local_maxima(peaks, False, 0.8, 3)[1:]:
                cands.append((RigidTransform(float(angles[j]), centre.dx_mm + res[j][1],
                                             centre.dy_mm + res[j][2]), float(peaks[j]), None))
    cands.sort(key=lambda c: -c[1])
    details.update(n_angles=int(sum(len(w) for w in windows)), coarse_peak_ncc=cands[0][1],
                   coarse_estimate=cands[0][0].to_dict())
    if contrast is not None:
        details["rotation_contrast_noise"] = noise
    return CoarseSearch([c[0] for c in cands], [c[1] for c in cands], [c[2] for c in cands], contrast, noise,
                        new_c.pitch, details)


def _resolve_candidates(new: FloorScan, old: FloorScan, search: CoarseSearch, loss_pyr) -> tuple[int, list, str | None]:
    """Choose among the search's candidates of other rotations by the loss pattern.

    Returns (index of the chosen candidate, one record per contender, ambiguity message or None).
    The contenders are the candidates within :data:`CANDIDATE_FRACTION` of the strongest whose
    rotation differs by more than :data:`DISTINCT_DEG`; the one whose loss pattern matches best
    wins, unless another comes within :data:`AMBIGUITY_MARGIN` of it (or no loss is seen and
    their NCCs are within :data:`AMBIGUITY_MARGIN`).
    """
    best = search.ncc[0]
    idx = [0]
    top_strength = max((v for v in search.strength if v is not None), default=0.0)
    for i in range(1, len(search.candidates)):
        si = search.strength[i]
        if si is not None and si >= CANDIDATE_FRACTION * top_strength and all(
                _angle_diff(search.candidates[i].rotation_deg, search.candidates[j].rotation_deg) > DISTINCT_DEG
                for j in idx):
            idx.append(i)
    recs = [{"rotation_deg": search.candidates[i].rotation_deg, "dx_mm": search.candidates[i].dx_mm,
             "dy_mm": search.candidates[i].dy_mm, "ncc": search.ncc[i]} for i in idx]
    if len(idx) == 1:
        return 0, recs, None
    for r, i in zip(recs, idx):
        r["loss_match"] = loss_match(new, old, search.candidates[i], pitch_mm=search.coarse_pitch_mm,
                                     pyramids=loss_pyr)
    lm = np.array([r["loss_match"] for r in recs], dtype=np.float64)
    if np.isfinite(lm).any():
        order = np.argsort(-np.nan_to_num(lm, nan=-2.0))
        top, second = int(order[0]), int(order[1])
        close = np.isfinite(lm[second]) and lm[second] >= lm[top] - AMBIGUITY_MARGIN
        what = f"loss-pattern match {lm[top]:.2f} and {lm[second]:.2f}"
    else:
        top, second = 0, 1
        close = search.ncc[idx[1]] >= best - AMBIGUITY_MARGIN
        what = f"no loss pattern to decide; NCC {best:.2f} and {search.ncc[idx[1]]:.2f}"
    msg = None
    if close:
        msg = (f"ambiguous rotation: {recs[top]['rotation_deg']:.1f}° and {recs[second]['rotation_deg']:.1f}° "
               f"fit the seams and plate edges alike ({what}); give control points to decide")
    return idx[top], recs, msg


# --------------------------------------------------------------------------------------
# refinement over the pyramid
# --------------------------------------------------------------------------------------
def refine(new: FloorScan, old: FloorScan, start: RigidTransform, *, start_pitch_mm: float,
           alternatives=(), n_samples: int = N_SAMPLES, pyramids=None) -> tuple[RigidTransform, dict]:
    """Sub-cell, sub-degree refinement of a coarse estimate, coarse to fine.

    Parameters
    ----------
    new, old : the two scans.
    start : the coarse estimate (old to new).
    start_pitch_mm : pitch of the level it was found on; refinement starts one level finer. [mm]
    alternatives : other coarse candidates to restart from if the first level does not converge.
    n_samples : cells of the newer feature image per level. [-]
    pyramids : ``(new, old)`` feature pyramids from an earlier call (internal reuse), or None.

    Returns
    -------
    (transform, info) : the refined transform; ``info`` holds ``converged`` (the finest level
        run converged), ``levels`` (per-level record), ``std_rotation_deg`` [deg] and
        ``std_shift_mm`` [mm] (Gauss-Newton, inflated by :data:`STD_INFLATION`; None if
        unknown) and ``pit_stage``.  Without convergence the transform is the finest
        converged level's, or ``start``.

    Notes
    -----
    Per level Gauss-Newton (Lucas and Kanade 1981, forward additive) over (theta, dx, dy) and
    a gain and offset on the strongest-gradient cells, Huber-weighted, Levenberg-Marquardt
    damped with a parabolic line search; the finer levels are skipped once a level with the
    full sample count moved the estimate by at most :data:`SKIP_MOVE_CELLS`.  Then the
    translation is corrected by the matched pit centroids (seams fix it only to within a cell).
    """
    pn, po = pyramids if pyramids is not None else (_pyramid(new), _pyramid(old))
    rmax = _rim_radius(new)
    kc = max([k for k, lv in enumerate(pn) if lv.pitch < start_pitch_mm * (1 - 1e-9)] or [0])
    tr = start
    info = None
    levels_done: list[dict] = []
    last_good = None
    out: dict = {}
    for k in range(kc, -1, -1):
        lv_n = pn[k]
        lv_o = _closest_level(po, lv_n.pitch)
        lvl_start = tr
        tr, info = _refine_level(lv_n, lv_o, lvl_start, n_samples=n_samples)
        entry = {"pitch_mm": lv_n.pitch, "old_pitch_mm": lv_o.pitch, "iterations": info["iterations"],
                 "converged": info["converged"], "samples": info["n"]}
        if not info["converged"] and info["n"] >= 50:
            # restarts: from the same start with heavy damping, then (first level only) from the
            # other coarse candidates
            for st_tr in [lvl_start] + (list(alternatives) if not levels_done else []):
                tr2, info2 = _refine_level(lv_n, lv_o, st_tr, n_samples=n_samples, max_iter=40, lam0=1.0)
                entry.setdefault("restarts", []).append(
                    {"start": st_tr.to_dict(), "iterations": info2["iterations"], "converged": info2["converged"]})
                if info2["converged"]:
                    tr, info = tr2, info2
                    entry["converged"] = True
                    break
        levels_done.append(entry)
        if not info["converged"]:
            if last_good is not None:
                tr, info = last_good                 # the finest level that converged
                out["refine_stopped_at_pitch_mm"] = lv_n.pitch
            else:
                tr = start                           # not the wandering iterate
            break
        last_good = (tr, info)
        # (almost) no move with many samples: a finer level would not move either
        move = (math.hypot(tr.dx_mm - lvl_start.dx_mm, tr.dy_mm - lvl_start.dy_mm)
                + abs(tr.theta - lvl_start.theta) * rmax)
        entry["move_mm"] = float(move)
        if (k > 0 and info["n"] >= n_samples and info.get("cov") is not None
                and (info["iterations"] == 1 or move <= SKIP_MOVE_CELLS * new.pitch)):
            out["refine_skipped_below_pitch_mm"] = lv_n.pitch
            break
    converged = info is not None and info["converged"]
    std_rot = std_shift = None
    if info is not None and info.get("cov") is not None:
        cov = info["cov"]
        std_rot = math.degrees(math.sqrt(max(cov[0, 0], 0.0))) * STD_INFLATION
        std_shift = math.sqrt(max(cov[1, 1] + cov[2, 2], 0.0)) * STD_INFLATION
    if converged:
        tr, std_shift, out["pit_stage"] = _apply_pit_stage(new, old, tr, std_shift)
    out.update(converged=converged, levels=levels_done, std_rotation_deg=std_rot, std_shift_mm=std_shift)
    return RigidTransform(_wrap_deg(tr.rotation_deg), tr.dx_mm, tr.dy_mm), out


def _apply_pit_stage(new: FloorScan, old: FloorScan, tr: RigidTransform, std_shift):
    """Sub-cell translation from the matched pit centroids, inverse-variance weighted against
    the seam estimate's quantisation error; returns (transform, std_shift_mm, record)."""
    pit, pinfo = _pit_shift(new, old, tr)
    pinfo["applied"] = False
    if pit is None:
        return tr, std_shift, pinfo
    corr, se, n_used = pit
    pinfo.update(correction_mm=[float(corr[0]), float(corr[1])], standard_error_mm=float(math.hypot(se[0], se[1])))
    bound = 1.5 * max(new.pitch, old.pitch)
    if not (n_used >= PIT_MIN_MATCHES and math.hypot(se[0], se[1]) <= PIT_MAX_SE_CELLS * new.pitch
            and math.hypot(corr[0], corr[1]) <= bound):
        return tr, std_shift, pinfo
    # The seam estimate's error is a quantisation error, uniform over a cell of the newer grid,
    # and of the older one too when its grid is not rotated enough for its phase to vary along
    # the seams.
    var_seam = new.pitch ** 2 / 12.0
    if abs(math.radians(_wrap_deg(tr.rotation_deg))) * _rim_radius(new) < old.pitch:
        var_seam += old.pitch ** 2 / 12.0
    wgt = var_seam / (var_seam + se * se)            # per axis, weight of the pits
    pinfo.update(applied=True, pit_weight=[float(wgt[0]), float(wgt[1])], seam_estimate=tr.to_dict())
    tr = RigidTransform(tr.rotation_deg, tr.dx_mm + float(wgt[0] * corr[0]), tr.dy_mm + float(wgt[1] * corr[1]))
    return tr, float(math.sqrt(np.sum(var_seam * se * se / (var_seam + se * se)))), pinfo


# --------------------------------------------------------------------------------------
# quality
# --------------------------------------------------------------------------------------
@dataclass
class Quality:
    """The result of :func:`registration_quality`.

    Parameters
    ----------
    score : masked NCC of the aligned feature images, clipped to 0-1 (0 if undefined). [-]
    overlap_pct : share of the newer scan's scanned cells the older scan covers. [%]
    residual_rms_mm : RMS thickness difference in the overlap. [mm]
    loss_match : correlation of the loss patterns (:func:`loss_match`). [-]
    reasons : why the transform is not reliable (empty when it is).
    """

    score: float
    overlap_pct: float
    residual_rms_mm: float
    loss_match: float
    reasons: list[str] = field(default_factory=list)

    @property
    def reliable(self) -> bool:
        return not self.reasons


def registration_quality(new: FloorScan, old: FloorScan, transform: RigidTransform, *,
                         min_score: float = 0.3, min_overlap_pct: float = 50.0,
                         min_loss_match: float = MIN_LOSS_MATCH, check_score: bool = True,
                         pyramids=None, loss_pyramids=None) -> Quality:
    """How well ``transform`` aligns the two scans, and whether to trust it.

    Parameters
    ----------
    new, old : the two scans.
    transform : old-to-new transform to judge.
    min_score : smallest feature-image NCC of a reliable alignment. [-]
    min_overlap_pct : smallest overlap of a reliable alignment. [%]
    min_loss_match : smallest loss-pattern correlation of a reliable alignment; judged only
        where both scans show at least :data:`LOSS_RULE_CELLS` compared cells with loss (a
        floor without loss, or with a sparse pattern, is not judged by it). [-]
    check_score : judge by ``min_score`` (False for a control-point fit, whose points
        the engineer chose). [-]
    pyramids, loss_pyramids : feature and loss pyramids from an earlier call (internal reuse).

    Returns
    -------
    Quality

    Notes
    -----
    Unrelated floors (another tank, another seed) share the plate layout and the round
    outline, so their feature NCC can be fair; their loss patterns do not correlate.  A
    transform that moves the floor away from the other scan leaves no overlap.
    """
    pn, po = pyramids if pyramids is not None else (_pyramid(new), _pyramid(old))
    score_lv = pn[min(1, len(pn) - 1)] if pn[0].img.size > 4 * QUALITY_CELLS else pn[0]
    score = _ncc_aligned(score_lv, _closest_level(po, score_lv.pitch), transform)
    overlap, rms = _thickness_quality(new, old, transform)
    lm, n_loss = _loss_match(new, old, transform, pyramids=loss_pyramids) if overlap > 0 else (float("nan"), 0)
    reasons = []
    if overlap < min_overlap_pct:
        hint = (": the scans do not overlap (are both in the tank-centred floor frame?)"
                if overlap < 1.0 else "")
        reasons.append(f"small overlap {overlap:.1f} % (< {min_overlap_pct:g} %){hint}")
    if check_score and not (score >= min_score):
        reasons.append(f"low match score {score:.2f} (< {min_score:g})")
    if overlap >= min_overlap_pct and math.isfinite(lm) and lm < min_loss_match and n_loss >= LOSS_RULE_CELLS:
        reasons.append(f"the loss patterns do not match (correlation {lm:.2f} < {min_loss_match:g}): "
                       "another floor, or another part of it")
    return Quality(float(np.clip(score, 0.0, 1.0)) if math.isfinite(score) else 0.0, float(overlap),
                   float(rms), lm, reasons)


def _control_point_reasons(res: np.ndarray, pitch: float) -> list[str]:
    """Residual checks of a control-point fit (three or more points: two fit exactly)."""
    out = []
    if res.size >= 3:
        rms = float(np.sqrt(np.mean(res ** 2)))
        if rms > CP_MAX_RMS_CELLS * pitch:
            out.append(f"control points disagree: RMS residual {rms:.1f} mm exceeds {CP_MAX_RMS_CELLS:g} x the "
                       f"pitch ({CP_MAX_RMS_CELLS * pitch:g} mm); check the point pairs")
        if float(res.max()) > CP_MAX_RESIDUAL_CELLS * pitch:
            out.append(f"control point residual {float(res.max()):.1f} mm exceeds {CP_MAX_RESIDUAL_CELLS:g} x the "
                       f"pitch ({CP_MAX_RESIDUAL_CELLS * pitch:g} mm); check the point pairs")
    return out


# --------------------------------------------------------------------------------------
# register
# --------------------------------------------------------------------------------------
def register(new: FloorScan, old: FloorScan, *, control_points=None, auto: bool = True,
             seed: RigidTransform | None = None, max_rotation_deg: float = 180.0,
             max_shift_mm: float = 400.0, cp_window_deg: float = 1.0, cp_window_mm: float = 100.0,
             min_score: float = 0.3, min_overlap_pct: float = 50.0,
             min_rotation_contrast: float = 0.02, max_std_rotation_deg: float = 0.25,
             max_std_shift_cells: float = 2.0, n_samples: int = N_SAMPLES) -> Registration:
    """Estimate the rigid transform mapping the older scan onto the newer one.

    Parameters
    ----------
    new : the newer inspection (the reference frame of all later stages).
    old : the older inspection.
    control_points : optional matching points: a control-point file path (see
        :func:`read_control_points`) or a pair ``(old_xy, new_xy)`` of (n, 2) arrays, n >= 2. [mm]
    auto : with control points, also run the automatic estimate in a small window around
        their fit (method ``auto+control-points``); ``False`` uses the fit alone
        (``control-points``).  Without control points the automatic estimate always runs.
    seed : optional initial transform; the search is centred on it (default identity).
    max_rotation_deg : search half-range of the rotation around the seed; 180 (default)
        searches the whole circle (a datum re-marked between outages). [deg]
    max_shift_mm : search radius of the translation around the seed. [mm]
    cp_window_deg, cp_window_mm : search half-range around a control-point fit. [deg], [mm]
    min_score : smallest score for a reliable automatic estimate. [-]
    min_overlap_pct : smallest overlap for a reliable estimate, automatic or from control
        points. [%]
    min_rotation_contrast : smallest rotation contrast (seam-only NCC at the chosen angle minus
        its median over the sweep); below it, or below :data:`ROT_CONTRAST_NOISE` times the NCC
        noise level of the floor's size, the rotation is unobservable (a featureless floor).
    max_std_rotation_deg, max_std_shift_cells : largest Gauss-Newton standard errors of a
        reliable estimate. [deg], [cells of the newer scan]
    n_samples : cells of the newer feature image per refinement level. [-]

    Returns
    -------
    Registration : ``reliable`` False (with the reasons in ``warnings``) when the transform must
        not be used for rates: ambiguous or unobservable rotation, low score, overlap below
        ``min_overlap_pct``, loss patterns that do not match, control points that disagree.

    Warns
    -----
    RegistrationWarning : the result is not reliable, or it is the control-point fit alone.

    Notes
    -----
    :func:`coarse_search` (whole circle), candidates of other rotations resolved by
    :func:`loss_match`, :func:`refine`, :func:`registration_quality`; with control points
    :func:`fit_control_points` and a search in a small window around it.
    """
    t_start = time.perf_counter()
    timings: dict[str, float] = {}
    notes: list[str] = []
    details: dict = {"new_pitch_mm": new.pitch, "old_pitch_mm": old.pitch}
    cp_tr = cp_names = old_xy = new_xy = None
    cp_reasons: list[str] = []
    if control_points is not None:
        old_xy, new_xy, cp_names = _as_control_points(control_points)
        cp_tr, cp_res = fit_control_points(old_xy, new_xy)
        details["control_point_fit"] = cp_tr.to_dict()
        cp_reasons = _control_point_reasons(cp_res, new.pitch)
        notes.extend(cp_reasons)
        timings["control_points"] = time.perf_counter() - t_start

    auto_run = None
    if cp_tr is None or auto:
        auto_run = _auto(new, old, cp_tr=cp_tr, seed=seed, half_rot=cp_window_deg if cp_tr else max_rotation_deg,
                         shift_r=cp_window_mm if cp_tr else max_shift_mm, n_samples=n_samples,
                         thresholds=dict(min_score=min_score, min_overlap_pct=min_overlap_pct,
                                         min_rotation_contrast=min_rotation_contrast,
                                         max_std_rotation_deg=max_std_rotation_deg,
                                         max_std_shift_mm=max_std_shift_cells * new.pitch),
                         timings=timings, details=details)
        if auto_run["reasons"]:
            notes.append("automatic registration unreliable: " + "; ".join(auto_run["reasons"]))
    final, method, reliable = _choose(auto_run, cp_tr, cp_reasons, auto, details, notes)

    t0 = time.perf_counter()
    if auto_run is not None and final is auto_run["transform"]:
        q = auto_run["quality"]
    else:
        q = registration_quality(new, old, final, min_overlap_pct=min_overlap_pct, check_score=False,
                                 pyramids=auto_run["pyramids"] if auto_run else None,
                                 loss_pyramids=auto_run["loss_pyramids"] if auto_run else None)
        if method != "identity" and q.reasons:
            reliable = False
            notes.append(f"{method} transform unreliable: " + "; ".join(q.reasons))
    timings["quality"] = time.perf_counter() - t0
    if notes and (not reliable or method == "control-points"):
        warnings.warn("registration: " + "; ".join(notes), RegistrationWarning, stacklevel=2)
    cres = None
    if old_xy is not None:
        xn, yn = final.apply(old_xy[:, 0], old_xy[:, 1])
        cres = np.hypot(xn - new_xy[:, 0], yn - new_xy[:, 1]).tolist()
    timings["total"] = time.perf_counter() - t_start
    return Registration(
        transform=final, score=q.score, overlap_pct=q.overlap_pct, residual_rms_mm=q.residual_rms_mm,
        method=method, reliable=bool(reliable), warnings=notes,
        control_residuals_mm=cres, control_names=cp_names,
        auto_transform=None if auto_run is None else auto_run["transform"],
        rotation_contrast=None if auto_run is None else auto_run["contrast"],
        std_rotation_deg=None if auto_run is None else auto_run["std_rotation_deg"],
        std_shift_mm=None if auto_run is None else auto_run["std_shift_mm"],
        timings_s=timings, details=details,
        candidates=None if auto_run is None else auto_run["candidates"],
        ambiguous=bool(auto_run is not None and auto_run["ambiguous"]), loss_match=q.loss_match)


def _auto(new: FloorScan, old: FloorScan, *, cp_tr, seed, half_rot, shift_r, n_samples, thresholds,
          timings, details) -> dict:
    """The automatic estimate: search, resolve, refine, judge (see :func:`register`)."""
    t0 = time.perf_counter()
    pyr = (_pyramid(new), _pyramid(old))
    timings["features"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    centre = cp_tr if cp_tr is not None else (seed or RigidTransform())
    search = coarse_search(new, old, centre=centre, half_range_deg=half_rot, max_shift_mm=shift_r, pyramids=pyr)
    if "circle_time_s" in search.details:          # a timing: kept out of the (reproducible) details
        timings["circle_search"] = search.details.pop("circle_time_s")
    details.update(search.details)
    timings["coarse_search"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    loss_pyr = (_loss_pyramid(new), _loss_pyramid(old))
    ib, cands, ambiguity = _resolve_candidates(new, old, search, loss_pyr)
    timings["candidates"] = time.perf_counter() - t0
    start = search.candidates[ib]
    t0 = time.perf_counter()
    tr, rinfo = refine(new, old, start, start_pitch_mm=search.coarse_pitch_mm, n_samples=n_samples,
                       alternatives=[c for i, c in enumerate(search.candidates) if i != ib], pyramids=pyr)
    timings["refine"] = time.perf_counter() - t0
    details["refine_levels"] = rinfo["levels"]
    for k in ("refine_stopped_at_pitch_mm", "refine_skipped_below_pitch_mm", "pit_stage"):
        if k in rinfo:
            details[k] = rinfo[k]
    t0 = time.perf_counter()
    th = thresholds
    q = registration_quality(new, old, tr, min_score=th["min_score"], min_overlap_pct=th["min_overlap_pct"],
                             pyramids=pyr, loss_pyramids=loss_pyr)
    timings["score"] = time.perf_counter() - t0
    reasons = []
    noise = search.contrast_noise
    factor = search.details.get("rotation_contrast_factor", ROT_CONTRAST_NOISE)
    need = max(th["min_rotation_contrast"], factor * noise)
    if search.rotation_contrast is not None and search.rotation_contrast < need:
        reasons.append(f"flat rotation sweep (contrast {search.rotation_contrast:.3f} < {need:.3g}, the larger of "
                       f"{th['min_rotation_contrast']:g} and {factor:g} x the noise level {noise:.3f}): "
                       "the floor shows too few features (seams, plate edges, pits) to fix the rotation")
    if reasons or q.overlap_pct < 1.0 or any(r.startswith("the loss patterns do not match") for r in q.reasons):
        ambiguity = None            # candidates of a flat sweep, no overlap or another floor are noise
    if ambiguity:
        reasons.insert(0, ambiguity)
    if not rinfo["converged"]:
        reasons.append("the refinement did not converge")
    else:
        if rinfo["std_rotation_deg"] is not None and rinfo["std_rotation_deg"] > th["max_std_rotation_deg"]:
            reasons.append(f"rotation poorly determined (about ±{rinfo['std_rotation_deg']:.3f}°)")
        if rinfo["std_shift_mm"] is not None and rinfo["std_shift_mm"] > th["max_std_shift_mm"]:
            reasons.append(f"shift poorly determined (about ±{rinfo['std_shift_mm']:.1f} mm)")
    reasons.extend(q.reasons)
    if len(cands) > 1:
        cands[[c["rotation_deg"] for c in cands].index(start.rotation_deg)]["chosen"] = True
    return {"transform": tr, "reasons": reasons, "quality": q, "contrast": search.rotation_contrast,
            "std_rotation_deg": rinfo["std_rotation_deg"], "std_shift_mm": rinfo["std_shift_mm"],
            "coarse_only": not rinfo["converged"], "candidates": cands, "ambiguous": ambiguity is not None,
            "coarse_pitch_mm": search.coarse_pitch_mm, "pyramids": pyr, "loss_pyramids": loss_pyr}


def _choose(auto_run, cp_tr, cp_reasons, auto, details, notes) -> tuple[RigidTransform, str, bool]:
    """(transform, method, reliable) from the automatic run and the control-point fit."""
    auto_ok = auto_run is not None and not auto_run["reasons"]
    if cp_tr is not None and (not auto or not auto_ok):
        if auto and not auto_ok:
            notes.append("fell back to the control-point fit")
        return cp_tr, "control-points", not cp_reasons
    if auto_ok:
        if cp_tr is not None:
            # the automatic answer must stay near the control points (it was searched there)
            ddx, ddy = np.subtract(auto_run["transform"].apply(0.0, 0.0), cp_tr.apply(0.0, 0.0))
            details["auto_minus_control_at_origin_mm"] = [float(ddx), float(ddy)]
        return auto_run["transform"], ("auto+control-points" if cp_tr is not None else "auto"), not cp_reasons
    if auto_run["ambiguous"] and len(auto_run["reasons"]) == 1:
        notes.append("the best-matching candidate is returned (method auto-ambiguous); do not use it for rates")
        return auto_run["transform"], "auto-ambiguous", False
    if auto_run["coarse_only"] and len(auto_run["reasons"]) == 1:
        # a good coarse peak whose refinement failed is still far better than the identity
        notes.append(f"the coarse estimate is used (good to about a coarse cell, "
                     f"{auto_run['coarse_pitch_mm']:g} mm); give control points to confirm it")
        return auto_run["transform"], "auto-coarse", False
    notes.append("fell back to the identity transform; give control points to register this floor")
    return RigidTransform(), "identity", False
