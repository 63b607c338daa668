"""Extreme-value statistics of pit depth (and of local corrosion rate).

A scan never covers a whole floor zone and an MFL scan does not report loss
shallower than its threshold.  The deepest loss to expect over the *whole* zone
is estimated by block maxima: split the zone into blocks of equal area, take the
deepest value in each, fit a Gumbel (type I) or GEV distribution and read the
return level for ``T = zone area / block area``.

Everything here is a pure function over arrays; the functions work on any
"deepest is worst" map (loss depth [mm], corrosion rate [mm/y]).

Conventions
-----------
* GEV shape ``xi`` follows Coles (2001): ``xi < 0`` is a bounded upper tail,
  ``xi > 0`` a heavy tail, ``xi = 0`` the Gumbel.  ``scipy.stats.genextreme``
  uses ``c = -xi``.
* Left-censored blocks (deepest value below the detection threshold, or no
  detected value at all) enter the likelihood as ``F(threshold)``.
* A fit that is degenerate raises :class:`~scananalyse.errors.FitError` with a
  reason; :func:`zone_extremes` turns that into a falsy result with ``reason``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize, stats

from .errors import FitError, InputError

__all__ = ["predictive_max_quantile", "unscanned_law",
    "EULER_GAMMA",
    "MIN_UNCENSORED",
    "BlockMaxima",
    "ProjectedMaxima",
    "projected_block_maxima",
    "GumbelFit",
    "GEVFit",
    "LRTest",
    "Bounds",
    "ProbabilityPlot",
    "ZoneExtremes",
    "gumbel_cdf",
    "gumbel_ppf",
    "gumbel_mean",
    "gev_cdf",
    "gev_ppf",
    "block_maxima",
    "fit_gumbel_mle",
    "fit_gumbel_lmoments",
    "fit_gumbel_moments",
    "fit_gev_mle",
    "lr_test_gumbel_vs_gev",
    "return_level",
    "max_quantile",
    "return_level_bounds",
    "gringorten_positions",
    "probability_plot",
    "anderson_darling",
    "ks_statistic",
    "zone_extremes",
    "GEV_ALPHA",
    "MIN_BLOCK_MM",
    "fit_zone",
    "zone_fits",
    "depth_map",
    "depth_statistics",
    "rate_statistics",
]

#: Euler-Mascheroni constant: the mean of the standard Gumbel distribution.
EULER_GAMMA = 0.5772156649015329

#: Fewest uncensored block maxima a fit accepts; below it a fit raises FitError.
#: [practice: no single source; five points are the least that show a slope on
#: a probability plot]
MIN_UNCENSORED = 5

#: Below this |xi| the GEV formulas switch to their Gumbel limit.
_XI_EPS = 1e-7


# --------------------------------------------------------------------------
# Distribution functions
# --------------------------------------------------------------------------
def gumbel_cdf(x, loc, scale):
    r"""Gumbel (type I, maxima) distribution function.

    Parameters
    ----------
    x : array_like
        Value, e.g. the deepest loss in a block. [mm]
    loc : float
        Location :math:`\mu`. [mm]
    scale : float
        Scale :math:`\sigma > 0`. [mm]

    Returns
    -------
    ndarray
        :math:`F(x)`. [-]

    Notes
    -----
    .. math:: F(x) = \exp\{-\exp[-(x - \mu)/\sigma]\}

    References
    ----------
    .. [1] E. J. Gumbel, *Statistics of Extremes*, Columbia University Press, 1958.
    """
    return np.exp(-np.exp(-(np.asarray(x, dtype=float) - loc) / scale))


def gumbel_ppf(p, loc, scale):
    r"""Gumbel quantile function (inverse of :func:`gumbel_cdf`).

    Parameters
    ----------
    p : array_like
        Non-exceedance probability, 0 < p < 1. [-]
    loc : float
        Location :math:`\mu`. [mm]
    scale : float
        Scale :math:`\sigma`. [mm]

    Returns
    -------
    ndarray
        :math:`x_p`. [mm]

    Notes
    -----
    .. math:: x_p = \mu - \sigma \ln(-\ln p)

    References
    ----------
    .. [1] E. J. Gumbel, *Statistics of Extremes*, Columbia University Press, 1958.
    """
    return loc - scale * np.log(-np.log(np.asarray(p, dtype=float)))


def gumbel_mean(loc, scale):
    r"""Mean of a Gumbel distribution, :math:`\mu + \gamma\sigma`.

    Parameters
    ----------
    loc : float
        Location. [mm]
    scale : float
        Scale. [mm]

    Returns
    -------
    float
        Mean. [mm]

    Notes
    -----
    .. math:: E[X] = \mu + \gamma \sigma,\ \gamma = 0.5772\ldots

    References
    ----------
    .. [1] E. J. Gumbel, *Statistics of Extremes*, Columbia University Press, 1958.
    """
    return loc + EULER_GAMMA * scale


def gev_cdf(x, loc, scale, shape):
    r"""Generalised extreme value distribution function (Coles' sign convention).

    Parameters
    ----------
    x : array_like
        Value. [mm]
    loc : float
        Location :math:`\mu`. [mm]
    scale : float
        Scale :math:`\sigma > 0`. [mm]
    shape : float
        Shape :math:`\xi`; negative for a bounded upper tail. [-]

    Returns
    -------
    ndarray
        :math:`F(x)`. [-]

    Notes
    -----
    .. math:: F(x) = \exp\{-[1 + \xi (x-\mu)/\sigma]_+^{-1/\xi}\}

    with the Gumbel limit at :math:`\xi = 0`.  ``scipy.stats.genextreme`` uses
    :math:`c = -\xi`.

    References
    ----------
    .. [1] S. Coles, *An Introduction to Statistical Modeling of Extreme Values*,
       Springer, 2001, eq. (3.2).
    """
    if abs(shape) < _XI_EPS:
        return gumbel_cdf(x, loc, scale)
    t = 1.0 + shape * (np.asarray(x, dtype=float) - loc) / scale
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        out = np.exp(-np.power(np.maximum(t, 0.0), -1.0 / shape))
    return np.where(t > 0, out, 0.0 if shape > 0 else 1.0)


def gev_ppf(p, loc, scale, shape):
    r"""GEV quantile function (Coles' sign convention).

    Parameters
    ----------
    p : array_like
        Non-exceedance probability, 0 < p < 1. [-]
    loc : float
        Location :math:`\mu`. [mm]
    scale : float
        Scale :math:`\sigma`. [mm]
    shape : float
        Shape :math:`\xi`. [-]

    Returns
    -------
    ndarray
        :math:`x_p`. [mm]

    Notes
    -----
    .. math:: x_p = \mu - \frac{\sigma}{\xi}\left[1 - (-\ln p)^{-\xi}\right]

    References
    ----------
    .. [1] S. Coles, *An Introduction to Statistical Modeling of Extreme Values*,
       Springer, 2001, eq. (3.4).
    """
    if abs(shape) < _XI_EPS:
        return gumbel_ppf(p, loc, scale)
    y = -np.log(np.asarray(p, dtype=float))
    return loc - scale / shape * (1.0 - np.power(y, -shape))


# --------------------------------------------------------------------------
# Block maxima
# --------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class BlockMaxima:
    """Deepest value per counted block.

    Attributes
    ----------
    maxima : deepest finite value per counted block; NaN where the block has no
        finite value (only censored-unknown cells). [value units]
    censored : True where the block is left-censored (below ``threshold`` or no
        detected value).
    coverage : valid fraction of each counted block. [-]
    area_cells : cells per counted block (tiles: ``block_cells**2``; labels:
        the cells carrying the label). [cells]
    block_area_cells : the block area used for return periods (tiles: exact;
        labels: the mean over counted blocks). [cells]
    keys : (n, 2) tile (row, column) indices, or (n,) label values.
    n_candidates : blocks examined before the coverage rule.
    threshold : the censoring threshold used, or None. [value units]
    """

    maxima: np.ndarray
    censored: np.ndarray
    coverage: np.ndarray
    area_cells: np.ndarray
    block_area_cells: float
    keys: np.ndarray
    n_candidates: int
    threshold: float | None

    @property
    def n_blocks(self) -> int:
        """Number of counted blocks."""
        return int(self.maxima.size)

    @property
    def n_censored(self) -> int:
        """Number of left-censored counted blocks."""
        return int(np.count_nonzero(self.censored))


def block_maxima(values, *, valid=None, block_cells=None, labels=None,
                 min_coverage=0.5, threshold=None) -> BlockMaxima:
    r"""Deepest value per block of equal area, with a coverage rule and censoring.

    Parameters
    ----------
    values : (M, N) array_like
        Map of the quantity, deepest is worst; NaN where not scanned or where
        the value is censored-unknown (scanned, nothing reported). [mm or mm/y]
    valid : (M, N) bool array_like, optional
        True where a cell was examined (scanned, in the zone).  Default: the
        finite cells of ``values``.  A valid NaN cell counts towards coverage
        but carries no value. [-]
    block_cells : int, optional
        Side of the square tiles. [cells]  Exactly one of ``block_cells`` and
        ``labels`` is given.  Tiles start at cell [0, 0]; edge tiles are
        counted with the full tile area (their missing part is unscanned).
    labels : (M, N) int array_like, optional
        Block id per cell (e.g. plate ids); negative = no block. [-]
    min_coverage : float
        A block counts only when its valid fraction is at least this. [-]
    threshold : float, optional
        Detection threshold; a block whose deepest value is below it is
        left-censored. [mm or mm/y]

    Returns
    -------
    BlockMaxima

    Notes
    -----
    A block :math:`B` with area :math:`|B|` and valid cells :math:`V_B` is
    counted when :math:`|V_B|/|B| \ge c_{min}`; its maximum is
    :math:`\max_{V_B} v`, censored when below the threshold or undefined.

    References
    ----------
    .. [1] T. Shibata, "Application of extreme value statistics to corrosion",
       J. Res. NIST 99 (1994) 327-336.
    """
    v = np.asarray(values)
    if v.ndim != 2:
        raise InputError(f"values: field 'values' must be a 2-D array, got {v.ndim}-D")
    if (block_cells is None) == (labels is None):
        raise InputError("block_maxima: field 'block_cells'/'labels': give exactly one")
    if not 0.0 <= float(min_coverage) <= 1.0:
        raise InputError(f"block_maxima: field 'min_coverage' must be in [0, 1], got {min_coverage}")
    if valid is not None and np.shape(valid) != v.shape:
        raise InputError("block_maxima: field 'valid' must have the shape of 'values'")
    wdtype = np.float32 if v.dtype == np.float32 else np.float64  # float32 keeps big grids small

    if block_cells is not None:
        b = int(block_cells)
        if b < 1:
            raise InputError(f"block_maxima: field 'block_cells' must be >= 1, got {block_cells}")
        m, n = v.shape
        nbr, nbc = -(-m // b), -(-n // b)
        mx = np.empty((nbr, nbc), dtype=wdtype)
        cnt = np.empty((nbr, nbc), dtype=np.int64)
        val = None if valid is None else np.asarray(valid, dtype=bool)
        # one band of tile rows at a time: the temporaries stay a band in size
        work = np.full((b, nbc * b), -np.inf, dtype=wdtype)
        okb = np.zeros((b, nbc * b), dtype=bool)
        for r in range(nbr):
            rows = slice(r * b, min(m, (r + 1) * b))
            vb = v[rows]
            h = vb.shape[0]
            fin = np.isfinite(vb)
            ok_r = fin if val is None else val[rows]
            work[:h, :n] = np.where(ok_r & fin, vb, -np.inf)
            okb[:h, :n] = ok_r
            if h < b:  # the last band is partial: the missing rows hold nothing
                work[h:] = -np.inf
                okb[h:] = False
            mx[r] = work.reshape(b, nbc, b).max(axis=(0, 2))
            cnt[r] = okb.reshape(b, nbc, b).sum(axis=(0, 2), dtype=np.int64)
        mx = mx.ravel()
        cnt = cnt.ravel()
        area = np.full(mx.shape, b * b, dtype=np.int64)
        rr, cc = np.divmod(np.arange(mx.size), nbc)
        keys = np.stack([rr, cc], axis=1)
    else:
        finite = np.isfinite(v)
        ok = finite if valid is None else np.asarray(valid, dtype=bool)
        # -inf where there is no usable value
        work = np.where(ok & finite, v, -np.inf).astype(wdtype, copy=False)
        lab = np.asarray(labels)
        if lab.shape != v.shape:
            raise InputError("block_maxima: field 'labels' must have the shape of 'values'")
        lab = lab.ravel()
        if not np.issubdtype(lab.dtype, np.integer):
            raise InputError("block_maxima: field 'labels' must be an integer array")
        sel = lab >= 0
        ls = lab[sel]
        if ls.size and int(ls.max()) <= 4 * lab.size:
            present = np.bincount(ls)
            uniq = np.flatnonzero(present)
            remap = np.full(present.size, -1, dtype=np.int64)
            remap[uniq] = np.arange(uniq.size)
            inv = remap[ls]
        else:  # sparse, huge ids: sort instead
            uniq, inv = np.unique(ls, return_inverse=True)
        k = uniq.size
        area = np.bincount(inv, minlength=k).astype(np.int64)
        cnt = np.bincount(inv, weights=ok.ravel()[sel], minlength=k).astype(np.int64)
        mx = np.full(k, -np.inf, dtype=work.dtype)
        np.maximum.at(mx, inv, work.ravel()[sel])
        keys = uniq

    coverage = cnt / np.maximum(area, 1)
    keep = (cnt > 0) & (coverage >= float(min_coverage))
    mx = np.asarray(mx, dtype=float)[keep]
    none = ~np.isfinite(mx)
    censored = none.copy()
    if threshold is not None:
        censored |= mx < float(threshold)
    maxima = np.where(none, np.nan, mx)
    area_k = area[keep]
    if block_cells is not None:
        block_area = float(int(block_cells) ** 2)
    else:
        block_area = float(area_k.mean()) if area_k.size else float("nan")
    return BlockMaxima(maxima=maxima, censored=censored, coverage=coverage[keep],
                       area_cells=area_k, block_area_cells=block_area, keys=keys[keep],
                       n_candidates=int(area.size),
                       threshold=None if threshold is None else float(threshold))


class ProjectedMaxima:
    """Block maxima and the deepest value of ``depth + rate * H`` for any horizon H.

    Made by :func:`projected_block_maxima`.  Calling it with H returns the
    :class:`BlockMaxima` that ``block_maxima(depth + rate * H, ...)`` returns;
    :meth:`deepest` gives the largest projected value over every valid cell.
    """

    def __init__(self, bm0, d_t, r_t, d_rest, r_rest, threshold):
        self._bm0 = bm0
        self._d_t, self._r_t = d_t, r_t
        self._d_rest, self._r_rest = d_rest, r_rest
        self._thr = threshold
        self._last = None

    #: Tiles projected per pass (bounds the temporaries to a few megabytes).
    _TILES_PER_PASS = 256

    def _tile_max(self, horizon: float) -> np.ndarray:
        if self._last is None or self._last[0] != horizon:
            k = self._d_t.shape[0]
            mx = np.empty(k, dtype=float)
            h = np.float32(horizon)
            step = self._TILES_PER_PASS
            for i in range(0, k, step):
                part = self._r_t[i:i + step] * h
                part += self._d_t[i:i + step]
                mx[i:i + step] = part.max(axis=1)
            self._last = (horizon, mx)
        return self._last[1]

    def __call__(self, horizon: float) -> BlockMaxima:
        mx = self._tile_max(horizon)
        none = ~np.isfinite(mx)
        cens = none.copy()
        if self._thr is not None:
            cens |= mx < self._thr
        bm0 = self._bm0
        return BlockMaxima(maxima=np.where(none, np.nan, mx), censored=cens, coverage=bm0.coverage,
                           area_cells=bm0.area_cells, block_area_cells=bm0.block_area_cells,
                           keys=bm0.keys, n_candidates=bm0.n_candidates, threshold=self._thr)

    def deepest(self, horizon: float) -> float:
        """Largest ``depth + rate * H`` over every valid cell (NaN if there is none). [mm]"""
        mx = self._tile_max(horizon)
        best = float(np.max(mx)) if mx.size else -np.inf
        if self._d_rest.size:
            best = max(best, float(np.max(self._d_rest + self._r_rest * np.float32(horizon))))
        return best if np.isfinite(best) else float("nan")


def projected_block_maxima(depth, rate, *, valid, block_cells, min_coverage=0.5, threshold=None
                           ) -> ProjectedMaxima:
    r"""Block maxima of a loss projected linearly in time, for many horizons at one cost.

    ``p(H)`` returns what ``block_maxima(depth + rate * H, valid=valid,
    block_cells=block_cells, min_coverage=min_coverage, threshold=threshold)`` returns,
    and ``p.deepest(H)`` the largest projected value over all valid cells, without
    passing over the whole grid for each horizon: the counted tiles (the coverage rule
    does not depend on H) are gathered once into a tile-major array, the valid cells
    outside them into a short list, and each call is one multiply-add and one
    contiguous maximum per tile.

    Parameters
    ----------
    depth : (M, N) array_like
        Loss now; NaN where not scanned. [mm]
    rate : (M, N) array_like
        Its growth rate; NaN is taken as 0. [mm/y]
    valid : (M, N) bool array_like
        Cells examined (scanned, in the zone). [-]
    block_cells, min_coverage, threshold : as for :func:`block_maxima`. [cells, -, mm]

    Returns
    -------
    ProjectedMaxima
        Callable on a horizon H [y].
    """
    d = np.asarray(depth, dtype=np.float32)
    r = np.asarray(rate, dtype=np.float32)
    ok = np.asarray(valid, dtype=bool)
    if d.shape != ok.shape or r.shape != d.shape:
        raise InputError("projected_block_maxima: fields 'depth', 'rate' and 'valid' must have one shape")
    bm0 = block_maxima(d, valid=ok, block_cells=block_cells, min_coverage=min_coverage,
                       threshold=threshold)
    b = int(block_cells)
    m, n = d.shape
    nbr, nbc = -(-m // b), -(-n // b)
    k = bm0.n_blocks
    t_row = bm0.keys[:, 0] if k else np.zeros(0, dtype=np.int64)
    t_col = bm0.keys[:, 1] if k else np.zeros(0, dtype=np.int64)

    # the counted tiles' cells, one row per tile (unusable cells: depth -inf, rate 0),
    # and the usable cells outside them, gathered one band of tile rows at a time so no
    # full-grid copy is made
    d_t = np.empty((k, b * b), dtype=np.float32)
    r_t = np.empty((k, b * b), dtype=np.float32)
    d_rest, r_rest = [], []
    for tr in range(nbr):
        rows = slice(tr * b, min(m, (tr + 1) * b))
        use = ok[rows] & np.isfinite(d[rows])
        if not use.any():
            continue
        sel = np.flatnonzero(t_row == tr)
        counted = np.zeros(nbc, dtype=bool)
        counted[t_col[sel]] = True
        rest = use & ~np.repeat(counted, b)[None, :n]
        if rest.any():
            d_rest.append(d[rows][rest])
            r_rest.append(np.nan_to_num(r[rows][rest], nan=0.0))
        if not sel.size:
            continue
        for src, dst, fill in ((d, d_t, -np.inf), (r, r_t, 0.0)):
            band = np.full((b, nbc * b), fill, dtype=np.float32)
            band[:use.shape[0], :n] = np.where(use, src[rows], np.float32(fill))
            if fill == 0.0:
                np.nan_to_num(band, copy=False, nan=0.0)  # a NaN rate counts as 0
            dst[sel] = band.reshape(b, nbc, b).transpose(1, 0, 2)[t_col[sel]].reshape(sel.size, b * b)
    cat = (lambda parts: np.concatenate(parts) if parts else np.zeros(0, dtype=np.float32))
    return ProjectedMaxima(bm0, d_t, r_t, cat(d_rest), cat(r_rest), None if threshold is None else float(threshold))


# --------------------------------------------------------------------------
# Fit results
# --------------------------------------------------------------------------
@dataclass(frozen=True)
class GumbelFit:
    """A fitted Gumbel distribution.

    Attributes
    ----------
    loc, scale : location and scale. [value units]
    method : ``"mle"``, ``"censored-mle"``, ``"lmoments"`` or ``"moments"``.
    loglik : log-likelihood of the data at the fitted parameters (censored
        blocks as F(threshold)). [-]
    n : blocks used (censored included). n_censored : censored among them.
    threshold : censoring threshold, or None. [value units]
    """

    loc: float
    scale: float
    method: str
    loglik: float
    n: int
    n_censored: int = 0
    threshold: float | None = None
    distribution: str = field(default="gumbel", init=False)

    @property
    def shape(self) -> float:
        """0: the Gumbel is the GEV with xi = 0."""
        return 0.0

    def cdf(self, x):
        """Distribution function at ``x``. [-]"""
        return gumbel_cdf(x, self.loc, self.scale)

    def ppf(self, p):
        """Quantile at non-exceedance probability ``p``. [value units]"""
        return gumbel_ppf(p, self.loc, self.scale)


@dataclass(frozen=True)
class GEVFit:
    """A fitted GEV distribution (Coles' sign convention for ``shape``).

    Attributes
    ----------
    loc, scale, shape : location, scale [value units] and shape xi [-].
    method : ``"mle"`` or ``"censored-mle"``.
    loglik, n, n_censored, threshold : as for :class:`GumbelFit`.
    """

    loc: float
    scale: float
    shape: float
    method: str
    loglik: float
    n: int
    n_censored: int = 0
    threshold: float | None = None
    distribution: str = field(default="gev", init=False)

    def cdf(self, x):
        """Distribution function at ``x``. [-]"""
        return gev_cdf(x, self.loc, self.scale, self.shape)

    def ppf(self, p):
        """Quantile at non-exceedance probability ``p``. [value units]"""
        return gev_ppf(p, self.loc, self.scale, self.shape)


def _prepare(x, censored, threshold, *, allow_censoring=True, name="fit"):
    """Split data into uncensored values and the censored count."""
    x = np.asarray(x, dtype=float).ravel()
    if censored is None:
        cens = np.zeros(x.shape, dtype=bool)
        if threshold is not None:
            cens = ~(x >= float(threshold))  # NaN counts as censored
    else:
        cens = np.asarray(censored, dtype=bool).ravel()
        if cens.shape != x.shape:
            raise InputError(f"{name}: field 'censored' must have the shape of 'x'")
    if cens.any():
        if not allow_censoring:
            raise InputError(f"{name}: field 'censored': this estimator takes no censored values")
        if threshold is None or not np.isfinite(threshold):
            raise InputError(f"{name}: field 'threshold' is needed with censored values")
    xu = x[~cens]
    if not np.all(np.isfinite(xu)):
        raise InputError(f"{name}: field 'x' has non-finite uncensored values")
    if xu.size < MIN_UNCENSORED:
        raise FitError(f"{name}: {xu.size} uncensored values, need at least {MIN_UNCENSORED}")
    if cens.any() and np.any(xu < float(threshold)):
        raise InputError(f"{name}: field 'x' has uncensored values below the threshold")
    return xu, int(cens.sum()), (None if threshold is None else float(threshold))


def _gumbel_loglik(loc, scale, xu, n_cens=0, u=None):
    z = (xu - loc) / scale
    ll = -xu.size * math.log(scale) - float(np.sum(z)) - float(np.sum(np.exp(-z)))
    if n_cens:
        ll -= n_cens * math.exp(-(u - loc) / scale)
    return ll


def _gev_loglik(loc, scale, shape, xu, n_cens=0, u=None):
    if not scale > 0 or not np.isfinite(shape):
        return -np.inf
    if abs(shape) < _XI_EPS:
        return _gumbel_loglik(loc, scale, xu, n_cens, u)
    t = 1.0 + shape * (xu - loc) / scale
    if np.any(t <= 0):
        return -np.inf
    lt = np.log(t)
    ll = -xu.size * math.log(scale) - (1.0 + 1.0 / shape) * float(lt.sum()) \
        - float(np.exp(-lt / shape).sum())
    if n_cens:
        tu = 1.0 + shape * (u - loc) / scale
        if tu <= 0:
            if shape > 0:        # threshold below the lower end point: F(u) = 0
                return -np.inf
        else:                    # threshold above the upper end point gives F(u) = 1
            ll -= n_cens * tu ** (-1.0 / shape)
    return ll


# --------------------------------------------------------------------------
# Gumbel MLE, vectorised over rows
# --------------------------------------------------------------------------
def _gumbel_mle_batch(x, unc, *, tol=1e-10, max_iter=200):
    """Gumbel (censored) MLE for every row of ``x`` at once.

    ``x`` (B, n): values, censored entries set to the threshold; ``unc`` (B, n)
    True where uncensored.  Returns loc, scale, converged (each (B,)).
    Solves the profile score ``g(s) = s - mean_unc(x) + E_w[x] = 0`` with weights
    ``w ~ exp(-x/s)`` over all entries; ``g' = 1 + Var_w(x)/s**2 > 0`` so the
    root is unique and lies in ``(0, mean_unc - min(x)]``: Newton steps,
    bisection when a step leaves the bracket.
    """
    x = np.atleast_2d(np.asarray(x, dtype=float))
    unc = np.broadcast_to(np.asarray(unc, dtype=bool), x.shape)
    m = unc.sum(axis=1)
    xmin = x.min(axis=1, keepdims=True)
    d = x - xmin
    mean_unc = np.where(m > 0, (d * unc).sum(axis=1) / np.maximum(m, 1), np.nan)
    hi = mean_unc.copy()
    lo = np.zeros_like(hi)
    good = (m > 0) & (hi > 0)
    sd = np.sqrt(np.maximum((d * d * unc).sum(axis=1) / np.maximum(m, 1) - mean_unc ** 2, 0))
    s = np.where(good, np.clip(sd * math.sqrt(6) / math.pi, 1e-3 * hi, 0.999 * hi), 1.0)
    hi = np.where(good, hi, 2.0)
    lo = np.where(good, lo, 0.5)
    done = ~good
    conv = np.zeros(x.shape[0], dtype=bool)
    for _ in range(max_iter):
        w = np.exp(-d / s[:, None])
        wsum = w.sum(axis=1)
        dw = (w * d).sum(axis=1) / wsum
        var = (w * (d - dw[:, None]) ** 2).sum(axis=1) / wsum
        g = s - mean_unc + dw
        dg = 1.0 + var / s ** 2
        lo = np.where(g < 0, s, lo)
        hi = np.where(g > 0, s, hi)
        step = g / dg
        new = s - step
        out = ~((new > lo) & (new < hi))
        new = np.where(out, 0.5 * (lo + hi), new)
        small = np.abs(new - s) <= tol * np.maximum(s, 1e-300)
        conv |= small & ~done
        s = np.where(done, s, new)
        done |= small
        if done.all():
            break
    w = np.exp(-d / s[:, None])
    wsum = w.sum(axis=1)
    loc = xmin[:, 0] + s * (np.log(np.maximum(m, 1)) - np.log(wsum))
    conv &= good & np.isfinite(loc) & (s > 0)
    return loc, s, conv


def fit_gumbel_mle(x, *, censored=None, threshold=None) -> GumbelFit:
    r"""Gumbel fit by maximum likelihood, with left-censored blocks.

    Parameters
    ----------
    x : array_like
        Block maxima. [mm or mm/y]  Values of censored blocks are ignored.
    censored : bool array_like, optional
        True for left-censored blocks.  Default: ``x < threshold`` (NaN
        included) when a threshold is given, else none.
    threshold : float, optional
        Censoring threshold; censored blocks contribute :math:`\ln F(u)`. [mm or mm/y]

    Returns
    -------
    GumbelFit

    Raises
    ------
    FitError
        Fewer than :data:`MIN_UNCENSORED` uncensored values, zero spread, or no
        convergence.

    Notes
    -----
    With :math:`m` uncensored values :math:`x_i`, :math:`k` censored at
    :math:`u` and :math:`z = (x - \mu)/\sigma`:

    .. math:: \ell = \sum_i [-\ln\sigma - z_i - e^{-z_i}] - k\,e^{-z_u}

    For fixed :math:`\sigma` the location is explicit,
    :math:`\mu = \sigma \ln[m / (\sum_i e^{-x_i/\sigma} + k e^{-u/\sigma})]`, and
    :math:`\sigma` solves :math:`\sigma = \bar x_{unc} - \sum_j w_j x_j` with
    :math:`w_j \propto e^{-x_j/\sigma}` over all blocks (censored at :math:`u`).
    The left side minus the right is strictly increasing, so the root is
    unique; it is found by safeguarded Newton iteration.

    References
    ----------
    .. [1] S. Coles, *An Introduction to Statistical Modeling of Extreme Values*,
       Springer, 2001, §3.3.
    .. [2] D. P. Lettenmaier, S. J. Burges, "Gumbel's extreme value I
       distribution: a new look", J. Hydraul. Div. ASCE 108 (1982) 502-514.
    """
    xu, k, u = _prepare(x, censored, threshold, name="fit_gumbel_mle")
    if k == 0 and np.ptp(xu) <= 1e-12 * max(1.0, float(np.abs(xu).max())):
        raise FitError("fit_gumbel_mle: the values have zero spread")
    full = np.concatenate([xu, np.full(k, u if u is not None else 0.0)])
    unc = np.concatenate([np.ones(xu.size, bool), np.zeros(k, bool)])
    loc, scale, conv = _gumbel_mle_batch(full[None, :], unc[None, :])
    if not conv[0]:
        raise FitError("fit_gumbel_mle: the likelihood iteration did not converge")
    loc, scale = float(loc[0]), float(scale[0])
    return GumbelFit(loc=loc, scale=scale, method="censored-mle" if k else "mle",
                     loglik=_gumbel_loglik(loc, scale, xu, k, u), n=xu.size + k,
                     n_censored=k, threshold=u)


def _lmom_batch(x):
    """Sample L-moments l1, l2 of each row (unbiased PWM estimators)."""
    xs = np.sort(x, axis=1)
    n = xs.shape[1]
    b0 = xs.mean(axis=1)
    b1 = (xs * (np.arange(n) / (n - 1))).mean(axis=1)
    return b0, 2.0 * b1 - b0


def fit_gumbel_lmoments(x) -> GumbelFit:
    r"""Gumbel fit by L-moments (probability-weighted moments).

    Parameters
    ----------
    x : array_like
        Block maxima, all uncensored. [mm or mm/y]

    Returns
    -------
    GumbelFit
        ``loglik`` is the Gumbel log-likelihood at the fitted parameters.

    Raises
    ------
    FitError
        Fewer than :data:`MIN_UNCENSORED` values or zero spread.

    Notes
    -----
    With :math:`b_0 = \bar x`, :math:`b_1 = n^{-1}\sum_{i} \frac{i-1}{n-1} x_{(i)}`
    (ascending order), :math:`\lambda_1 = b_0`, :math:`\lambda_2 = 2b_1 - b_0`:

    .. math:: \sigma = \lambda_2 / \ln 2, \qquad \mu = \lambda_1 - \gamma\sigma

    References
    ----------
    .. [1] J. R. M. Hosking, J. R. Wallis, E. F. Wood, "Estimation of the
       generalized extreme-value distribution by the method of
       probability-weighted moments", Technometrics 27 (1985) 251-261.
    """
    xu, _, _ = _prepare(x, None, None, allow_censoring=False, name="fit_gumbel_lmoments")
    l1, l2 = _lmom_batch(xu[None, :])
    scale = float(l2[0]) / math.log(2.0)
    if not scale > 0:
        raise FitError("fit_gumbel_lmoments: the values have zero spread")
    loc = float(l1[0]) - EULER_GAMMA * scale
    return GumbelFit(loc=loc, scale=scale, method="lmoments",
                     loglik=_gumbel_loglik(loc, scale, xu), n=xu.size)


def fit_gumbel_moments(x) -> GumbelFit:
    r"""Gumbel fit by the method of moments.

    Parameters
    ----------
    x : array_like
        Block maxima, all uncensored. [mm or mm/y]

    Returns
    -------
    GumbelFit

    Raises
    ------
    FitError
        Fewer than :data:`MIN_UNCENSORED` values or zero spread.

    Notes
    -----
    With the sample mean :math:`\bar x` and standard deviation :math:`s`
    (divisor n - 1):

    .. math:: \sigma = \sqrt{6}\,s/\pi, \qquad \mu = \bar x - \gamma\sigma

    References
    ----------
    .. [1] E. J. Gumbel, *Statistics of Extremes*, Columbia University Press, 1958.
    """
    xu, _, _ = _prepare(x, None, None, allow_censoring=False, name="fit_gumbel_moments")
    scale = math.sqrt(6.0) * float(np.std(xu, ddof=1)) / math.pi
    if not scale > 0:
        raise FitError("fit_gumbel_moments: the values have zero spread")
    loc = float(np.mean(xu)) - EULER_GAMMA * scale
    return GumbelFit(loc=loc, scale=scale, method="moments",
                     loglik=_gumbel_loglik(loc, scale, xu), n=xu.size)


# --------------------------------------------------------------------------
# GEV MLE
# --------------------------------------------------------------------------
def _gev_optimise(xu, k, u, start, *, restarts=True):
    """Maximise the GEV likelihood from ``start`` (loc, scale, shape); NM restarts."""
    loc0, sc0 = float(start[0]), float(start[1])

    def nll(th):
        return -_gev_loglik(loc0 + sc0 * th[0], sc0 * math.exp(th[1]), th[2], xu, k, u)

    best = None
    # from a nearby solution (no restarts) the parameters are wanted to ~1e-7 of the scale
    tol = {"xatol": 1e-9, "fatol": 1e-12} if restarts else {"xatol": 1e-7, "fatol": 1e-10}
    for xi0 in ((start[2], -0.1, 0.1) if restarts else (start[2],)):
        th = np.array([0.0, 0.0, xi0])
        if not np.isfinite(nll(th)):
            continue
        res = optimize.minimize(nll, th, method="Nelder-Mead", options={**tol, "maxiter": 4000})
        if best is None or res.fun < best.fun:
            best = res
    if best is None:
        return None
    res = best if not restarts else optimize.minimize(
        nll, best.x, method="Nelder-Mead",
        options={"xatol": 1e-10, "fatol": 1e-13, "maxiter": 4000})
    if not (res.success and np.isfinite(res.fun)):
        return None
    th = res.x
    return (float(loc0 + sc0 * th[0]), float(sc0 * math.exp(th[1])), float(th[2]),
            -float(res.fun))


def _gev_grad_batch(th, x, unc, k, u, loc0, sc0):
    """Log-likelihood and its gradient in ``th`` = ((loc - loc0) / sc0, log(scale / sc0),
    shape) of the (B, n) values ``x`` (``unc``: uncensored; ``k`` (B,) censored at ``u``),
    row by row (Coles 2001, eq. 3.7, differentiated by hand).  -inf outside the support."""
    mu = loc0 + sc0 * th[:, 0]
    sig = sc0 * np.exp(th[:, 1])
    xi = th[:, 2]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        z = (x - mu[:, None]) / sig[:, None]
        t = 1.0 + xi[:, None] * z
        inside = t > 0
        L = np.log(np.where(inside, t, 1.0))
        P = np.exp(-L / xi[:, None])  # t ** (-1 / xi)
        q = np.where(unc, ((1.0 + xi[:, None]) - P) / (sig[:, None] * np.where(inside, t, 1.0)), 0.0)
        m = unc.sum(axis=1)
        ll = -m * np.log(sig) - np.sum(np.where(unc, (1.0 + 1.0 / xi[:, None]) * L + P, 0.0), axis=1)
        g_mu = q.sum(axis=1)
        g_sig = -m / sig + (z * q).sum(axis=1)
        g_xi = np.sum(np.where(unc, L / xi[:, None] ** 2 * (1.0 - P) - (1.0 + 1.0 / xi[:, None]) * z / t
                               + P * z / (xi[:, None] * t), 0.0), axis=1)
        bad = np.any(unc & ~inside, axis=1)
        if u is not None and np.any(k):
            zu = (u - mu) / sig
            tu = 1.0 + xi * zu
            inu = tu > 0
            Lu = np.log(np.where(inu, tu, 1.0))
            Pu = np.where(inu, np.exp(-Lu / xi), 0.0) * k
            ll = ll - Pu
            g_mu = g_mu - Pu / (sig * tu)
            g_sig = g_sig - Pu * zu / (sig * tu)
            g_xi = g_xi + Pu * (-Lu / xi ** 2 + zu / (xi * tu))
            bad |= ~inu & (xi > 0) & (k > 0)
    grad = np.stack([g_mu * sc0, g_sig * sig, g_xi], axis=1)
    bad |= ~np.isfinite(ll) | ~np.all(np.isfinite(grad), axis=1) | (np.abs(xi) < 1e-4)
    return np.where(bad, -np.inf, ll), np.where(bad[:, None], 0.0, grad)


def _gev_mle_batch(x, unc, u, start, *, max_iter=50, tol=1e-10):
    """GEV (censored) MLE of every row of ``x`` at once from ``start`` (loc, scale, shape),
    a nearby solution: Newton steps on the analytic gradient (Hessian by forward
    differences of it), halved until the likelihood does not fall.  Returns loc, scale,
    shape, converged (each (B,)); a row that leaves the region where the steps are safe
    (shape near 0, a Hessian not negative definite) is not converged."""
    x = np.atleast_2d(np.asarray(x, dtype=float))
    unc = np.broadcast_to(np.asarray(unc, dtype=bool), x.shape)
    k = (~unc).sum(axis=1)
    loc0, sc0 = float(start[0]), float(start[1])
    B = x.shape[0]
    th = np.tile([0.0, 0.0, float(start[2])], (B, 1))
    conv = np.zeros(B, bool)
    fail = np.zeros(B, bool)
    act = np.arange(B)
    h = 1e-6
    for _ in range(max_iter):
        if act.size == 0:
            break
        xa, ua, ka, ta = x[act], unc[act], k[act], th[act]
        ll, g = _gev_grad_batch(ta, xa, ua, ka, u, loc0, sc0)
        H = np.empty((act.size, 3, 3))
        for j in range(3):
            e = np.zeros(3)
            e[j] = h
            H[:, :, j] = (_gev_grad_batch(ta + e, xa, ua, ka, u, loc0, sc0)[1] - g) / h
        H = 0.5 * (H + np.swapaxes(H, 1, 2))
        ok = np.isfinite(ll) & np.all(np.isfinite(H), axis=(1, 2))
        ok[ok] &= np.all(np.linalg.eigvalsh(H[ok]) < 0, axis=1)
        step = np.zeros_like(ta)
        step[ok] = -np.linalg.solve(H[ok], g[ok][:, :, None])[:, :, 0]
        lam = np.ones(act.size)
        todo = ok.copy()
        new = ta.copy()
        for _ in range(30):
            if not todo.any():
                break
            cand = ta[todo] + lam[todo, None] * step[todo]
            ll_new = _gev_grad_batch(cand, xa[todo], ua[todo], ka[todo], u, loc0, sc0)[0]
            good = np.isfinite(ll_new) & (ll_new >= ll[todo] - 1e-12 * np.abs(ll[todo]))
            idx = np.flatnonzero(todo)
            new[idx[good]] = cand[good]
            todo[idx[good]] = False
            lam[todo] *= 0.5
        ok &= ~todo
        th[act] = new
        done = ok & (np.max(np.abs(lam[:, None] * step), axis=1) < tol)
        conv[act[done]] = True
        fail[act[~ok]] = True
        act = act[ok & ~done]
    return loc0 + sc0 * th[:, 0], sc0 * np.exp(th[:, 1]), th[:, 2], conv & ~fail


def fit_gev_mle(x, *, censored=None, threshold=None, start=None) -> GEVFit:
    r"""GEV fit by maximum likelihood, with left-censored blocks.

    Parameters
    ----------
    x : array_like
        Block maxima. [mm or mm/y]
    censored : bool array_like, optional
        True for left-censored blocks (default: ``x < threshold``).
    threshold : float, optional
        Censoring threshold; censored blocks contribute :math:`\ln F(u)`. [mm or mm/y]
    start : (loc, scale, shape), optional
        A nearby solution (e.g. the fit of slightly different maxima): one optimisation
        from it instead of the restarts; if it does not reach the Gumbel likelihood the
        full restarts run.  [mm or mm/y, -]

    Returns
    -------
    GEVFit
        ``shape`` in Coles' convention (``scipy.stats.genextreme`` c = -shape).

    Raises
    ------
    FitError
        Too few values, zero spread, no convergence, or a shape at or below
        -1 (the likelihood is then unbounded).

    Notes
    -----
    With :math:`t_i = 1 + \xi (x_i - \mu)/\sigma > 0`:

    .. math:: \ell = -m\ln\sigma - (1 + 1/\xi)\sum_i \ln t_i - \sum_i t_i^{-1/\xi}
              - k\,t_u^{-1/\xi}

    maximised numerically (Nelder-Mead, restarts) from the Gumbel fit.  The
    usual asymptotics hold for :math:`\xi > -0.5` (Smith 1985).

    References
    ----------
    .. [1] S. Coles, *An Introduction to Statistical Modeling of Extreme Values*,
       Springer, 2001, §3.3.2, eq. (3.7).
    .. [2] R. L. Smith, "Maximum likelihood estimation in a class of
       nonregular cases", Biometrika 72 (1985) 67-90.
    """
    g = fit_gumbel_mle(x, censored=censored, threshold=threshold)
    xu, k, u = _prepare(x, censored, threshold, name="fit_gev_mle")
    out = None
    if start is not None and np.all(np.isfinite(start)) and start[1] > 0:
        loc0, sc0, xi0 = (float(v) for v in start)
        # widen the start's scale until every value (and the threshold) lies inside its support
        lo = min(float(xu.min()), u) if k and u is not None else float(xu.min())
        if xi0 < 0:
            sc0 = max(sc0, 1.1 * -xi0 * (float(xu.max()) - loc0))
        elif xi0 > 0:
            sc0 = max(sc0, 1.1 * xi0 * (loc0 - lo))
        out = _gev_optimise(xu, k, u, (loc0, sc0, xi0), restarts=False)
        if out is not None and (out[3] < g.loglik - 1e-6 or out[2] <= -1.0):
            out = None
    if out is None:
        out = _gev_optimise(xu, k, u, (g.loc, g.scale, 0.0))
    if out is None:
        raise FitError("fit_gev_mle: the likelihood maximisation did not converge")
    loc, scale, shape, ll = out
    if shape <= -1.0:
        raise FitError(f"fit_gev_mle: shape {shape:.3f} <= -1, the likelihood is unbounded")
    if ll < g.loglik - 1e-6:
        raise FitError("fit_gev_mle: the maximisation stopped below the Gumbel likelihood")
    return GEVFit(loc=loc, scale=scale, shape=shape, method="censored-mle" if k else "mle",
                  loglik=ll, n=xu.size + k, n_censored=k, threshold=u)


@dataclass(frozen=True)
class LRTest:
    """Likelihood-ratio test of the Gumbel (xi = 0) inside the GEV.

    Attributes
    ----------
    deviance : 2 (l_GEV - l_Gumbel). [-]
    p_value : chi-squared(1) upper tail of the deviance. [-]
    gumbel, gev : the two fits.
    alpha : test level. reject_gumbel : p_value < alpha.
    """

    deviance: float
    p_value: float
    gumbel: GumbelFit
    gev: GEVFit
    alpha: float

    @property
    def reject_gumbel(self) -> bool:
        """True when the GEV fits significantly better at level ``alpha``."""
        return self.p_value < self.alpha


def lr_test_gumbel_vs_gev(x, *, censored=None, threshold=None, alpha=0.05) -> LRTest:
    r"""Likelihood-ratio (deviance) test of Gumbel against GEV.

    Parameters
    ----------
    x : array_like
        Block maxima. [mm or mm/y]
    censored, threshold : as for :func:`fit_gumbel_mle`.
    alpha : float
        Test level. [-]

    Returns
    -------
    LRTest

    Raises
    ------
    FitError
        When either fit fails.

    Notes
    -----
    .. math:: D = 2\{\ell_{GEV}(\hat\mu, \hat\sigma, \hat\xi) - \ell_{G}(\hat\mu_0, \hat\sigma_0)\}
              \sim \chi^2_1

    References
    ----------
    .. [1] S. Coles, *An Introduction to Statistical Modeling of Extreme Values*,
       Springer, 2001, §2.6.6 and §3.4.
    .. [2] P. J. Laycock, R. A. Cottis, P. A. Scarf, "Extrapolation of extreme
       pit depths in space and time", J. Electrochem. Soc. 137 (1990) 64-69.
    """
    g = fit_gumbel_mle(x, censored=censored, threshold=threshold)
    e = fit_gev_mle(x, censored=censored, threshold=threshold)
    dev = max(0.0, 2.0 * (e.loglik - g.loglik))
    return LRTest(deviance=dev, p_value=float(stats.chi2.sf(dev, 1)), gumbel=g, gev=e,
                  alpha=float(alpha))


# --------------------------------------------------------------------------
# Return levels
# --------------------------------------------------------------------------
def _check_T(T):
    Ta = np.asarray(T, dtype=float)
    if np.any(~(Ta > 1.0)):
        raise InputError(f"return_level: field 'T' must be > 1, got {T}")
    return Ta


def return_level(fit, T):
    r"""Return level: the value exceeded once in ``T`` blocks on average.

    Parameters
    ----------
    fit : GumbelFit or GEVFit
    T : float or array_like
        Return period, e.g. zone area / block area; must be > 1. [blocks]

    Returns
    -------
    float or ndarray
        :math:`x_T`. [value units]

    Notes
    -----
    Gumbel:

    .. math:: x_T = \mu - \sigma \ln[-\ln(1 - 1/T)]

    GEV: :math:`x_T = \mu - \frac{\sigma}{\xi}\{1 - [-\ln(1 - 1/T)]^{-\xi}\}`.

    References
    ----------
    .. [1] T. Shibata, "Application of extreme value statistics to corrosion",
       J. Res. NIST 99 (1994) 327-336.
    .. [2] S. Coles, *An Introduction to Statistical Modeling of Extreme Values*,
       Springer, 2001, eq. (3.4).
    """
    Ta = _check_T(T)
    y = -np.log1p(-1.0 / Ta)
    xi = fit.shape
    if abs(xi) < _XI_EPS:
        out = fit.loc - fit.scale * np.log(y)
    else:
        out = fit.loc - fit.scale / xi * (1.0 - np.power(y, -xi))
    return float(out) if np.ndim(out) == 0 else out


def max_quantile(fit, T, p):
    r"""Quantile of the deepest value over an area of ``T`` blocks.

    Parameters
    ----------
    fit : GumbelFit or GEVFit
    T : float
        Area in blocks (any T > 0). [blocks]
    p : float
        Probability that the deepest value over the area stays below the result. [-]

    Returns
    -------
    float
        :math:`x` with :math:`F(x)^T = p`. [value units]

    Notes
    -----
    Blocks being independent, the maximum over :math:`T` blocks has
    distribution :math:`F^T`, so :math:`x = F^{-1}(p^{1/T})`.  Note that the
    return level satisfies :math:`F(x_T)^T = (1 - 1/T)^T \to e^{-1}`: the
    deepest value over the area exceeds its return level with probability
    about 0.63.

    References
    ----------
    .. [1] S. Coles, *An Introduction to Statistical Modeling of Extreme Values*,
       Springer, 2001, §3.1.
    """
    if not (T > 0 and 0 < p < 1):
        raise InputError(f"max_quantile: fields 'T' > 0 and 0 < 'p' < 1 needed, got {T}, {p}")
    return float(fit.ppf(p ** (1.0 / T)))


def unscanned_law(fit, maxima, *, censored=None, threshold=None):
    """The law to extrapolate block maxima to metal nobody saw: ``fit``, except that a GEV
    with a bounded upper tail (shape < 0) gives way to the Gumbel of the same ``maxima``
    (``fit`` itself if that fit fails).

    A negative shape fitted to some twenty block maxima puts an end to the loss just past
    the deepest seen; no sample of that size can show that deeper loss does not occur where
    nobody looked (the shape's estimate is irregular below -0.5: Smith, Biometrika 72 (1985)
    67-90; Coles 2001 §3.3.2, both from memory), so the unscanned part is never given an
    upper end the data cannot support.  The Gumbel (shape 0) is the bounded fit's nearest
    law with an unbounded tail; Shibata (1994) and the corrosion literature use it for pit
    depths throughout.
    """
    if fit is None or fit.distribution != "gev" or not fit.shape < 0 or maxima is None:
        return fit
    try:
        return fit_gumbel_mle(maxima, censored=censored, threshold=threshold)
    except FitError:
        return fit


def predictive_max_quantile(fit, n_blocks: int, T: float, p: float, *, threshold=None, n_boot: int = 200,
                            seed: int = 0) -> float:
    r"""Predictive quantile of the deepest value over an area of ``T`` blocks, the fit's own
    parameter uncertainty included.

    Parameters
    ----------
    fit : GumbelFit or GEVFit
        The fit of ``n_blocks`` block maxima.
    n_blocks : int
        Number of block maxima the fit was made from. [-]
    T : float
        Area in blocks. [blocks]
    p : float
        Probability that the deepest value over the area stays below the result. [-]
    threshold : float, optional
        Left-censoring threshold of the fit's block maxima. [value units]
    n_boot : int
        Parametric bootstrap resamples. [-]
    seed : int
        Seed of the bootstrap. [-]

    Returns
    -------
    float
        :math:`x` with :math:`\frac{1}{B}\sum_b F_b(x)^T = p`, the mixture over the
        bootstrap fits :math:`F_b` (a predictive distribution in the sense of Coles [1]_
        §9.1); never below the plug-in :func:`max_quantile` for ``p >= 0.5`` (a bootstrap
        that fails or brackets nothing falls back to the plug-in value).

    References
    ----------
    .. [1] S. Coles, *An Introduction to Statistical Modeling of Extreme Values*,
       Springer, 2001.
    """
    plug = max_quantile(fit, T, p)
    n = int(n_blocks)
    if n < MIN_UNCENSORED or n_boot < 10:
        return plug
    loc, scale, shape, _failed = _bootstrap_params(fit, n, threshold, n_boot=int(n_boot), seed=seed)
    if loc.size < 0.5 * n_boot:
        return plug
    pred = _predictive_upper(fit, loc, scale, shape, T, p)
    if not np.isfinite(pred):
        return plug
    return float(max(pred, plug)) if p >= 0.5 else float(pred)


@dataclass(frozen=True)
class Bounds:
    """Confidence bounds of a return level.

    Attributes
    ----------
    estimate : the return level. lower, upper : the bounds (lower NaN for a
        one-sided upper bound). [value units]
    level : confidence level. one_sided : True for an upper bound only.
    method : ``"bootstrap"``, ``"profile"`` or ``"delta"``.
    n_boot : resamples used (bootstrap); n_failed : resamples whose fit failed.
    """

    estimate: float
    lower: float
    upper: float
    level: float
    one_sided: bool
    method: str
    n_boot: int = 0
    n_failed: int = 0


def _fit_like(fit, x, censored, threshold):
    """Data of ``fit`` as (uncensored values, censored count, threshold)."""
    if fit.method in ("lmoments", "moments"):
        return _prepare(x, None, None, allow_censoring=False, name="return_level_bounds")
    return _prepare(x, censored, threshold, name="return_level_bounds")


def _bootstrap_params(fit, n, n_cens_thr, *, n_boot, seed):
    """Parametric bootstrap: refit ``n_boot`` samples of size ``n`` drawn from ``fit``.

    Returns (loc, scale, shape) arrays of the successful refits and the failure count.
    """
    rng = np.random.default_rng(seed)
    sample = fit.ppf(rng.random((n_boot, n)))
    u = n_cens_thr
    if u is not None:
        unc = sample >= u
        sample = np.where(unc, sample, u)
    else:
        unc = np.ones(sample.shape, dtype=bool)
    nu = unc.sum(axis=1)
    ok_rows = nu >= MIN_UNCENSORED
    if fit.distribution == "gumbel" and fit.method in ("mle", "censored-mle"):
        loc, scale, conv = _gumbel_mle_batch(sample, unc)
        shape = np.zeros_like(loc)
        good = conv & ok_rows
    elif fit.method == "lmoments":
        l1, l2 = _lmom_batch(sample)
        scale = l2 / math.log(2.0)
        loc = l1 - EULER_GAMMA * scale
        shape = np.zeros_like(loc)
        good = scale > 0
    elif fit.method == "moments":
        scale = math.sqrt(6.0) * sample.std(axis=1, ddof=1) / math.pi
        loc = sample.mean(axis=1) - EULER_GAMMA * scale
        shape = np.zeros_like(loc)
        good = scale > 0
    else:  # GEV: Newton steps on all resamples at once from the fit; one by one where they fail
        loc = np.full(n_boot, np.nan)
        scale = np.full(n_boot, np.nan)
        shape = np.full(n_boot, np.nan)
        rows = np.flatnonzero(ok_rows)
        bl, bs, bx, bc = _gev_mle_batch(sample[rows], unc[rows], u, (fit.loc, fit.scale, fit.shape))
        # below xi = -0.5 the likelihood is irregular (Smith 1985) and may rise without bound
        # towards xi = -1: those resamples go to the one-by-one search, as all did before
        take = bc & (bx > -0.5)
        loc[rows[take]], scale[rows[take]], shape[rows[take]] = bl[take], bs[take], bx[take]
        for b in rows[~take]:
            xu = sample[b][unc[b]]
            res = _gev_optimise(xu, int(n - unc[b].sum()), u, (fit.loc, fit.scale, fit.shape),
                                restarts=False)
            if res is not None and res[2] > -1.0:
                loc[b], scale[b], shape[b] = res[0], res[1], res[2]
        good = np.isfinite(loc)
    return loc[good], scale[good], shape[good], int(n_boot - good.sum())


def _rl_arrays(loc, scale, shape, T):
    y = -math.log1p(-1.0 / T)
    small = np.abs(shape) < _XI_EPS
    safe = np.where(small, 1.0, shape)
    gev = loc - scale / safe * (1.0 - np.power(y, -safe))
    return np.where(small, loc - scale * math.log(y), gev)


def _nll_factory(fit, xu, k, u):
    """Negative log-likelihood over the full parameter vector of ``fit``'s family."""
    if fit.distribution == "gumbel":
        return lambda p: -_gumbel_loglik(p[0], p[1], xu, k, u) if p[1] > 0 else np.inf
    return lambda p: -_gev_loglik(p[0], p[1], p[2], xu, k, u)


def _profile_bounds(fit, xu, k, u, T, crit, one_sided):
    """Profile-likelihood bounds of the return level (Coles 2001, §3.3.3)."""
    y = -math.log1p(-1.0 / T)
    nll = _nll_factory(fit, xu, k, u)
    is_gev = fit.distribution == "gev"
    p_hat = (fit.loc, fit.scale, fit.shape) if is_gev else (fit.loc, fit.scale)
    nll_hat = nll(p_hat)
    zhat = return_level(fit, T)

    def full(z, th):
        s = fit.scale * math.exp(th[0])
        if is_gev:
            xi = th[1]
            mu = z + s * math.log(y) if abs(xi) < _XI_EPS else z + s / xi * (1 - y ** (-xi))
            return (mu, s, xi)
        return (z + s * math.log(y), s)

    # The nuisance optimum moves smoothly with z, so each profile evaluation also starts
    # from the optimum of the previous one (``warm``), beside the fit's own parameters; the
    # fit's shape +-0.2 (against a second mode of the GEV profile) are tried at the first.
    warm = []

    def dev(z):
        f = lambda th: nll(full(z, th))  # noqa: E731
        starts = [np.array([0.0, fit.shape])] if is_gev else [np.array([0.0])]
        if warm:
            starts.insert(0, warm[-1])
        elif is_gev:
            starts += [np.array([0.0, fit.shape - 0.2]), np.array([0.0, fit.shape + 0.2])]
        best = np.inf
        best_th = None
        for th0 in starts:
            if not np.isfinite(f(th0)):
                th0 = th0.copy()
                for scl in (0.5, 1.5, 2.0, 0.25, 3.0):
                    th0[0] = math.log(scl)
                    if np.isfinite(f(th0)):
                        break
            if not np.isfinite(f(th0)):
                continue
            # the deviance is wanted to about 1e-6 against a chi-squared quantile of order 1
            r = optimize.minimize(f, th0, method="Nelder-Mead",
                                  options={"xatol": 1e-7, "fatol": 1e-9, "maxiter": 3000})
            if r.fun < best:
                best, best_th = r.fun, np.asarray(r.x, dtype=float)
        if best_th is not None:
            warm.append(best_th)
        return 2.0 * (best - nll_hat) - crit

    def find(sign):
        step = 0.5 * fit.scale
        a = zhat
        b = zhat + sign * step
        for _ in range(60):
            if dev(b) > 0:
                return optimize.brentq(dev, a, b, xtol=1e-6 * fit.scale) if sign > 0 else \
                    optimize.brentq(dev, b, a, xtol=1e-6 * fit.scale)
            a, step = b, step * 2.0
            b = zhat + sign * step
        raise FitError("return_level_bounds: the profile likelihood does not reach the bound")

    upper = find(+1)
    lower = float("nan") if one_sided else find(-1)
    return zhat, lower, upper


def _hessian(f, p, h):
    """Central-difference Hessian of scalar ``f`` at ``p`` with steps ``h``."""
    p = np.asarray(p, dtype=float)
    k = p.size
    H = np.empty((k, k))
    for i in range(k):
        for j in range(i, k):
            ei = np.zeros(k)
            ej = np.zeros(k)
            ei[i] = h[i]
            ej[j] = h[j]
            H[i, j] = H[j, i] = (f(p + ei + ej) - f(p + ei - ej) - f(p - ei + ej)
                                 + f(p - ei - ej)) / (4.0 * h[i] * h[j])
    return H


def _bootstrap_bounds(fit, n, u, T, level, one_sided, n_boot, seed):
    """Percentile bootstrap bounds of x_T and the refitted parameters."""
    n_boot = int(n_boot)
    if n_boot < 10:
        raise InputError(f"return_level_bounds: field 'n_boot' must be >= 10, got {n_boot}")
    loc, scale, shape, n_failed = _bootstrap_params(fit, n, u, n_boot=n_boot, seed=seed)
    if loc.size < 0.5 * n_boot:
        raise FitError(f"return_level_bounds: {n_failed} of {n_boot} bootstrap refits failed")
    rl = _rl_arrays(loc, scale, shape, T)
    if one_sided:
        lo, hi = float("nan"), float(np.quantile(rl, level))
    else:
        lo, hi = (float(q) for q in np.quantile(rl, [(1 - level) / 2, (1 + level) / 2]))
    b = Bounds(return_level(fit, T), lo, hi, float(level), bool(one_sided), "bootstrap",
               n_boot, n_failed)
    return b, (loc, scale, shape)


def return_level_bounds(fit, x, T, *, level=0.9, one_sided=True, method="bootstrap",
                        n_boot=1000, seed=0, censored=None, threshold=None) -> Bounds:
    r"""Confidence bounds of the return level :math:`x_T`.

    Parameters
    ----------
    fit : GumbelFit or GEVFit
        The fit of ``x``.
    x : array_like
        The block maxima the fit came from. [value units]
    T : float
        Return period, > 1. [blocks]
    level : float
        Confidence level, e.g. 0.9. [-]
    one_sided : bool
        True: an upper bound only (``lower`` is NaN); False: a two-sided interval.
    method : {"bootstrap", "profile", "delta"}
        Seeded parametric bootstrap (refit with the fit's own estimator; Gumbel
        fits vectorised over all resamples), profile likelihood (MLE fits), or
        the delta method with the observed information (MLE fits).
    n_boot : int
        Bootstrap resamples. [-]
    seed : int
        Seed of ``numpy.random.default_rng`` for the bootstrap. [-]
    censored, threshold : as given to the fit; resamples are censored at the
        same threshold. [value units]

    Returns
    -------
    Bounds

    Raises
    ------
    FitError
        Most bootstrap refits fail, or the profile does not reach the bound.

    Notes
    -----
    Bootstrap: draw :math:`B` samples of size :math:`n` from the fitted
    distribution, censor them at the threshold, refit, and take the
    percentiles of :math:`x_T^{*}`.  Profile: the bound solves
    :math:`2\{\ell(\hat\theta) - \ell_p(x_T)\} = \chi^2_{1}(q)` with
    :math:`q = 2\,\mathrm{level} - 1` (one-sided) or :math:`q = \mathrm{level}`
    (two-sided), :math:`\ell_p` maximised over the other parameters with
    :math:`\mu` written in terms of :math:`x_T`.  Delta:
    :math:`\mathrm{Var}(x_T) \approx \nabla x_T^\top V \nabla x_T`, :math:`V` the
    inverse observed information.

    References
    ----------
    .. [1] S. Coles, *An Introduction to Statistical Modeling of Extreme Values*,
       Springer, 2001, §3.3.3 (delta method, profile likelihood).
    .. [2] B. Efron, R. J. Tibshirani, *An Introduction to the Bootstrap*,
       Chapman & Hall, 1993 (parametric bootstrap, percentile intervals).
    """
    if not 0.0 < float(level) < 1.0:
        raise InputError(f"return_level_bounds: field 'level' must be in (0, 1), got {level}")
    T = float(_check_T(T))
    xu, k, u = _fit_like(fit, x, censored, threshold)
    est = return_level(fit, T)
    if method == "bootstrap":
        return _bootstrap_bounds(fit, xu.size + k, u if k else None, T, level, one_sided,
                                 n_boot, seed)[0]
    if fit.method not in ("mle", "censored-mle"):
        raise InputError(f"return_level_bounds: field 'method' '{method}' needs an MLE fit")
    if method == "profile":
        crit = float(stats.chi2.ppf(2 * level - 1 if one_sided else level, 1))
        zhat, lo, hi = _profile_bounds(fit, xu, k, u, T, crit, one_sided)
        return Bounds(zhat, lo, hi, float(level), bool(one_sided), method)
    if method == "delta":
        nll = _nll_factory(fit, xu, k, u)
        is_gev = fit.distribution == "gev"
        p = np.array([fit.loc, fit.scale, fit.shape] if is_gev else [fit.loc, fit.scale])
        h = np.array([1e-4 * fit.scale, 1e-4 * fit.scale, 1e-4][: p.size])
        V = np.linalg.inv(_hessian(nll, p, h))
        rl = (lambda q: float(_rl_arrays(np.array(q[0]), np.array(q[1]),
                                         np.array(q[2] if is_gev else 0.0), T)))
        grad = np.array([(rl(p + e) - rl(p - e)) / (2 * e[i])
                         for i, e in enumerate(np.diag(h))])
        var = float(grad @ V @ grad)
        if not var > 0:
            raise FitError("return_level_bounds: the observed information is not positive definite")
        se = math.sqrt(var)
        zq = float(stats.norm.ppf(level if one_sided else (1 + level) / 2))
        lo = float("nan") if one_sided else est - zq * se
        return Bounds(est, lo, est + zq * se, float(level), bool(one_sided), method)
    raise InputError(f"return_level_bounds: field 'method' must be bootstrap, profile or delta, "
                     f"got {method!r}")


# --------------------------------------------------------------------------
# Goodness of fit
# --------------------------------------------------------------------------
def gringorten_positions(n):
    r"""Gringorten plotting positions for ``n`` ordered values.

    Parameters
    ----------
    n : int
        Number of values. [-]

    Returns
    -------
    ndarray
        :math:`p_i` for i = 1..n, ascending. [-]

    Notes
    -----
    .. math:: p_i = \frac{i - 0.44}{n + 0.12}

    References
    ----------
    .. [1] I. I. Gringorten, "A plotting rule for extreme probability paper",
       J. Geophys. Res. 68 (1963) 813-814.
    """
    n = int(n)
    if n < 1:
        raise InputError(f"gringorten_positions: field 'n' must be >= 1, got {n}")
    return (np.arange(1, n + 1) - 0.44) / (n + 0.12)


@dataclass(frozen=True, eq=False)
class ProbabilityPlot:
    """Data of a Gumbel probability plot.

    Attributes
    ----------
    x : sorted uncensored block maxima. [value units]
    p : their Gringorten positions among all blocks (censored ones rank
        lowest). [-]
    reduced : reduced variate :math:`-\\ln(-\\ln p)` of each point. [-]
    line_reduced, line_x : the fitted distribution as a curve (a straight line
        for a Gumbel fit). [-], [value units]
    """

    x: np.ndarray
    p: np.ndarray
    reduced: np.ndarray
    line_reduced: np.ndarray
    line_x: np.ndarray

    def table(self) -> dict:
        """Columns of the points, ready for ``pandas.DataFrame``."""
        return {"x": self.x, "p": self.p, "reduced": self.reduced,
                "fitted": np.interp(self.reduced, self.line_reduced, self.line_x)}


def probability_plot(x, fit, *, censored=None, threshold=None) -> ProbabilityPlot:
    r"""Points and fitted line of a Gumbel probability plot.

    Parameters
    ----------
    x : array_like
        Block maxima. [value units]
    fit : GumbelFit or GEVFit
    censored, threshold : censored blocks rank lowest and are not plotted.

    Returns
    -------
    ProbabilityPlot

    Notes
    -----
    The i-th smallest of n blocks is plotted at reduced variate
    :math:`y_i = -\ln(-\ln p_i)`, :math:`p_i` the Gringorten position; a Gumbel
    fit is the line :math:`x = \mu + \sigma y`.

    References
    ----------
    .. [1] I. I. Gringorten, J. Geophys. Res. 68 (1963) 813-814.
    .. [2] T. Shibata, J. Res. NIST 99 (1994) 327-336.
    """
    xa = np.asarray(x, dtype=float).ravel()
    if censored is None:
        cens = ~(xa >= threshold) if threshold is not None else ~np.isfinite(xa)
    else:
        cens = np.asarray(censored, dtype=bool).ravel()
    n = xa.size
    xs = np.sort(xa[~cens])
    p = gringorten_positions(n)[n - xs.size:]
    red = -np.log(-np.log(p))
    lp = np.linspace(min(0.01, p[0]) if p.size else 0.01, max(0.99, p[-1]) if p.size else 0.99,
                     101)
    return ProbabilityPlot(x=xs, p=p, reduced=red, line_reduced=-np.log(-np.log(lp)),
                           line_x=np.asarray(fit.ppf(lp), dtype=float))


def anderson_darling(x, fit) -> float:
    r"""Anderson-Darling statistic of ``x`` against the fitted distribution.

    Parameters
    ----------
    x : array_like
        Uncensored block maxima. [value units]
    fit : GumbelFit or GEVFit

    Returns
    -------
    float
        :math:`A^2`. [-]

    Notes
    -----
    With :math:`F_i = F(x_{(i)})` in ascending order:

    .. math:: A^2 = -n - \frac{1}{n}\sum_{i=1}^n (2i-1)\,[\ln F_i + \ln(1 - F_{n+1-i})]

    Critical values depend on the distribution and on estimating the
    parameters (Stephens 1977).

    References
    ----------
    .. [1] T. W. Anderson, D. A. Darling, "A test of goodness of fit",
       J. Am. Stat. Assoc. 49 (1954) 765-769.
    .. [2] M. A. Stephens, "Goodness of fit for the extreme value
       distribution", Biometrika 64 (1977) 583-588.
    """
    xs = np.sort(np.asarray(x, dtype=float).ravel())
    n = xs.size
    F = np.clip(fit.cdf(xs), 1e-300, 1 - 1e-16)
    i = np.arange(1, n + 1)
    return float(-n - np.sum((2 * i - 1) * (np.log(F) + np.log1p(-F[::-1]))) / n)


def ks_statistic(x, fit) -> float:
    r"""Kolmogorov-Smirnov statistic of ``x`` against the fitted distribution.

    Parameters
    ----------
    x : array_like
        Uncensored block maxima. [value units]
    fit : GumbelFit or GEVFit

    Returns
    -------
    float
        :math:`D_n`. [-]

    Notes
    -----
    .. math:: D_n = \max_i \max\{i/n - F(x_{(i)}),\ F(x_{(i)}) - (i-1)/n\}

    References
    ----------
    .. [1] N. Smirnov, "Table for estimating the goodness of fit of empirical
       distributions", Ann. Math. Statist. 19 (1948) 279-281.
    """
    xs = np.sort(np.asarray(x, dtype=float).ravel())
    n = xs.size
    F = fit.cdf(xs)
    i = np.arange(1, n + 1)
    return float(max(np.max(i / n - F), np.max(F - (i - 1) / n)))


# --------------------------------------------------------------------------
# Per zone
# --------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class ZoneExtremes:
    """Extreme-value result of one zone; falsy when no fit could be made.

    Attributes
    ----------
    reason : empty when ok, else why there is no estimate.
    depth_eva_mm : return level for T (the deepest value to expect over the
        whole zone area). [value units]
    depth_eva_upper_mm : its upper confidence bound (``level``, one-sided). [value units]
    depth_pred_upper_mm : predictive ``level`` quantile of the deepest value
        over the zone, parameter uncertainty included (bootstrap mixture of
        :math:`F^T`). [value units]
    observed_max : deepest value seen in the counted blocks. [value units]
    T : return period used (zone area / block area, at least 2). [blocks]
    T_raw : zone area / block area before that floor. [blocks]
    block_mm : actual block side (a whole number of cells). [mm]
    block_area_mm2, zone_area_mm2 : [mm²]
    n_blocks, n_censored : counted blocks and censored among them.
    threshold : censoring threshold used. [value units]
    fit, bounds, lr_test, plot : the fit, the bounds, the GEV test (None when
        the GEV fit failed) and the probability-plot data.
    anderson_darling, ks : goodness-of-fit statistics on the uncensored maxima.
    warnings : tuple of short messages.
    blocks : the BlockMaxima.
    """

    reason: str
    depth_eva_mm: float = float("nan")
    depth_eva_upper_mm: float = float("nan")
    depth_pred_upper_mm: float = float("nan")
    observed_max: float = float("nan")
    T: float = float("nan")
    T_raw: float = float("nan")
    block_mm: float = float("nan")
    block_area_mm2: float = float("nan")
    zone_area_mm2: float = float("nan")
    n_blocks: int = 0
    n_censored: int = 0
    threshold: float | None = None
    level: float = 0.9
    fit: GumbelFit | GEVFit | None = None
    bounds: Bounds | None = None
    lr_test: LRTest | None = None
    plot: ProbabilityPlot | None = None
    anderson_darling: float = float("nan")
    ks: float = float("nan")
    warnings: tuple = ()
    blocks: BlockMaxima | None = None

    @property
    def ok(self) -> bool:
        """True when the zone has an estimate."""
        return not self.reason

    def __bool__(self) -> bool:
        return self.ok

    def row(self) -> dict:
        """Scalar columns for a per-zone table."""
        return {
            "depth_eva_mm": self.depth_eva_mm,
            "depth_eva_upper_mm": self.depth_eva_upper_mm,
            "depth_pred_upper_mm": self.depth_pred_upper_mm,
            "eva_T": self.T,
            "eva_block_mm": self.block_mm,
            "eva_n_blocks": self.n_blocks,
            "eva_n_censored": self.n_censored,
            "eva_method": "" if self.fit is None else f"{self.fit.distribution}-{self.fit.method}",
            "eva_gev_p": float("nan") if self.lr_test is None else self.lr_test.p_value,
            "eva_reason": self.reason,
        }


_FITTERS = {
    "mle": lambda x, c, u: fit_gumbel_mle(x, censored=c, threshold=u),
    "gev": lambda x, c, u: fit_gev_mle(x, censored=c, threshold=u),
    "lmoments": lambda x, c, u: fit_gumbel_lmoments(x[~c]),
    "moments": lambda x, c, u: fit_gumbel_moments(x[~c]),
}


def _predictive_upper(fit, loc, scale, shape, T, level):
    """x with mean over the bootstrap fits of F_b(x)^T equal to ``level``."""
    def h(z):
        zz = (z - loc) / scale
        small = np.abs(shape) < _XI_EPS
        safe = np.where(small, 1.0, shape)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            t = np.maximum(1.0 + safe * zz, 0.0)
            lf_gev = -np.power(t, -1.0 / safe)
            lf_gev = np.where(t > 0, lf_gev, np.where(safe > 0, -np.inf, 0.0))
        lf = np.where(small, -np.exp(-zz), lf_gev)
        return float(np.mean(np.exp(T * lf))) - level

    a = max_quantile(fit, T, level)
    lo, hi = a - fit.scale, a + fit.scale
    for _ in range(80):
        if h(lo) < 0:
            break
        lo -= 2 * fit.scale
    for _ in range(80):
        if h(hi) > 0:
            break
        hi += 2 * fit.scale
    if not (h(lo) < 0 < h(hi)):
        return float("nan")
    return float(optimize.brentq(h, lo, hi, xtol=1e-9 * fit.scale))


def zone_extremes(values, zone_mask, *, pitch_mm, zone_area_mm2, block_mm=1000.0,
                  threshold=None, min_coverage=0.5, level=0.9, method="mle", seed=0,
                  valid=None, bound_method="bootstrap", n_boot=1000,
                  gev_test=True, gev_alpha=0.05) -> ZoneExtremes:
    r"""Deepest value to expect over a whole zone, from block maxima.

    Parameters
    ----------
    values : (M, N) array_like
        Loss depth [mm] (or rate [mm/y]) map; NaN where not scanned or
        censored-unknown.
    zone_mask : (M, N) bool array_like
        True inside the zone; cells outside are invalid.
    pitch_mm : float
        Cell size. [mm]
    zone_area_mm2 : float
        Area of the WHOLE zone, unscanned parts included. [mm²]
    block_mm : float
        Side of the square blocks, rounded to whole cells. [mm]
    threshold : float, optional
        Detection threshold: blocks whose deepest value is below it are
        left-censored. [value units]
    min_coverage : float
        Least valid fraction of a block for it to count. [-]
    level : float
        One-sided confidence level of the upper bounds. [-]
    method : {"mle", "gev", "auto", "lmoments", "moments"}
        Estimator: Gumbel MLE (censored when a threshold is given), GEV MLE,
        "auto" (Gumbel MLE unless the likelihood-ratio test rejects it at
        ``gev_alpha`` in favour of the GEV, which is then used with profile bounds:
        Coles 2001 §3.3), Gumbel L-moments or moments (the last two on uncensored
        blocks only).
    seed : int
        Seed of the bootstrap. [-]
    valid : (M, N) bool array_like, optional
        Cells examined (default: finite ``values``); a valid NaN is a cell
        scanned with nothing reported.
    bound_method : {"bootstrap", "profile", "delta"}
        Method of the return-level bound (see :func:`return_level_bounds`).
    n_boot : int
        Bootstrap resamples. [-]
    gev_test : bool
        Run the likelihood-ratio test of Gumbel against GEV (a GEV fit, the
        costliest step after the bootstrap); False leaves ``lr_test`` None, for
        callers that only need the bounds (e.g. a search over a horizon). [-]
    gev_alpha : float
        Level of that test for ``method="auto"``. [-]

    Returns
    -------
    ZoneExtremes
        Falsy with ``reason`` when there are too few blocks or the fit fails.

    Notes
    -----
    :math:`T = S/s`, S the zone area and s the block area;
    :math:`x_T = \mu - \sigma\ln[-\ln(1 - 1/T)]`.  When :math:`T < 2` (the zone
    is smaller than two blocks) the formula is evaluated at T = 2, the median
    block maximum, and a warning says so: the return-level formula falls to
    minus infinity as T approaches 1, which would say nothing useful.

    References
    ----------
    .. [1] T. Shibata, "Application of extreme value statistics to corrosion",
       J. Res. NIST 99 (1994) 327-336.
    .. [2] S. Coles, *An Introduction to Statistical Modeling of Extreme Values*,
       Springer, 2001.
    """
    v = np.asarray(values)
    zm = np.asarray(zone_mask, dtype=bool)
    _check_zone_args(v, zm, pitch_mm=pitch_mm, block_mm=block_mm, zone_area_mm2=zone_area_mm2, method=method)
    ok = zm & (np.isfinite(v) if valid is None else np.asarray(valid, dtype=bool))
    b = max(1, int(round(block_mm / pitch_mm)))
    side = b * pitch_mm
    area = side * side
    T_raw = zone_area_mm2 / area
    common = dict(T_raw=T_raw, block_mm=side, block_area_mm2=area,
                  zone_area_mm2=float(zone_area_mm2), level=float(level), threshold=threshold)
    bm = block_maxima(v, valid=ok, block_cells=b, min_coverage=min_coverage, threshold=threshold)
    warn = []
    x = bm.maxima
    cens = bm.censored
    if threshold is None and cens.any():
        warn.append(f"{int(cens.sum())} blocks with no reported value and no threshold: left out")
        x, cens = x[~cens], cens[~cens]
    n_unc = int((~cens).sum())
    obs = float(np.nanmax(x)) if np.isfinite(x).any() else float("nan")
    if n_unc < MIN_UNCENSORED:
        why = (f"{bm.n_blocks} blocks of {side:g} mm reach {min_coverage:.0%} coverage, "
               f"{n_unc} uncensored; a fit needs {MIN_UNCENSORED}"
               + (" (blocks larger than the zone?)" if bm.n_blocks == 0 else ""))
        return ZoneExtremes(reason=why, observed_max=obs, n_blocks=bm.n_blocks,
                            n_censored=int(cens.sum()), warnings=tuple(warn), blocks=bm, **common)
    if method in ("lmoments", "moments") and cens.any():
        warn.append(f"{method} ignores the {int(cens.sum())} censored blocks (biased high)")
    try:
        fit, lr, lr_done, bound_method = _choose_fit(x, cens, method=method, threshold=threshold,
                                                     gev_alpha=gev_alpha, bound_method=bound_method, warn=warn)
    except FitError as exc:
        return ZoneExtremes(reason=str(exc), observed_max=obs, n_blocks=bm.n_blocks,
                            n_censored=int(cens.sum()), warnings=tuple(warn), blocks=bm, **common)
    if method in ("lmoments", "moments"):
        x, cens = x[~cens], cens[~cens]
    T = T_raw
    if T < 2.0:
        warn.append(f"zone area is {T_raw:.2f} blocks: return level taken at T = 2 "
                    "(the median block maximum)")
        T = 2.0
    if bm.n_blocks < 10:
        warn.append(f"only {bm.n_blocks} blocks: wide bounds")
    u = threshold if cens.any() else None
    try:
        bounds, pred = _zone_bounds(fit, x, cens, u, T, level=level, bound_method=bound_method, n_boot=n_boot,
                                    seed=seed)
    except FitError as exc:
        return ZoneExtremes(reason=str(exc), observed_max=obs, n_blocks=bm.n_blocks,
                            n_censored=int(cens.sum()), fit=fit, warnings=tuple(warn), blocks=bm,
                            **common)
    if not lr_done:
        try:
            lr = lr_test_gumbel_vs_gev(x, censored=cens, threshold=u) if gev_test else None
        except FitError as exc:
            lr = None
            warn.append(f"GEV test not available: {exc}")
    if lr is not None and lr.reject_gumbel and fit.distribution == "gumbel":
        warn.append(f"GEV fits better than Gumbel (p = {lr.p_value:.3f}, "
                    f"xi = {lr.gev.shape:.2f})")
    if np.isfinite(obs) and obs > bounds.upper:
        warn.append("deepest measured value exceeds the upper bound of the return level")
    xu = x[~cens]
    return ZoneExtremes(
        reason="", depth_eva_mm=bounds.estimate, depth_eva_upper_mm=bounds.upper,
        depth_pred_upper_mm=pred, observed_max=obs, T=T, n_blocks=int(x.size),
        n_censored=int(cens.sum()), fit=fit, bounds=bounds, lr_test=lr,
        plot=probability_plot(x, fit, censored=cens), anderson_darling=anderson_darling(xu, fit),
        ks=ks_statistic(xu, fit), warnings=tuple(warn), blocks=bm, **common)


def _check_zone_args(v, zm, *, pitch_mm, block_mm, zone_area_mm2, method) -> None:
    """The one-line errors of :func:`zone_extremes`'s arguments."""
    if zm.shape != v.shape:
        raise InputError("zone_extremes: field 'zone_mask' must have the shape of 'values'")
    if not pitch_mm > 0 or not block_mm > 0:
        raise InputError("zone_extremes: fields 'pitch_mm' and 'block_mm' must be > 0")
    if not zone_area_mm2 > 0:
        raise InputError(f"zone_extremes: field 'zone_area_mm2' must be > 0, got {zone_area_mm2}")
    if method not in _FITTERS and method != "auto":
        raise InputError(f"zone_extremes: field 'method' must be one of {sorted(_FITTERS) + ['auto']}, "
                         f"got {method!r}")


def _choose_fit(x, cens, *, method, threshold, gev_alpha, bound_method, warn):
    """The fit of :func:`zone_extremes`'s block maxima: ``(fit, lr_test or None, test done,
    bound method)``; with ``"auto"`` the Gumbel unless the likelihood-ratio test rejects it
    (Coles 2001 §3.3), one GEV fit serving the test and the estimate.  Raises FitError."""
    lr = None
    lr_done = False
    fit = _FITTERS["mle" if method == "auto" else method](x, cens, threshold)
    if method == "auto":
        lr_done = True
        try:
            lr = lr_test_gumbel_vs_gev(x, censored=cens, threshold=threshold if cens.any() else None,
                                       alpha=gev_alpha)
        except FitError as exc:
            warn.append(f"GEV test not available: {exc}")
        if lr is not None and lr.reject_gumbel:
            fit = lr.gev
            if bound_method == "bootstrap":
                bound_method = "profile"  # the GEV bootstrap refits one by one
    return fit, lr, lr_done, bound_method


def _zone_bounds(fit, x, cens, u, T, *, level, bound_method, n_boot, seed):
    """The return level's one-sided bound and the predictive quantile of the zone's maximum
    (:func:`zone_extremes`): ``(Bounds, predictive upper)``.  Raises FitError."""
    if bound_method == "bootstrap":
        bounds, (loc_b, sc_b, sh_b) = _bootstrap_bounds(fit, x.size, u, T, level, True, n_boot, seed)
        return bounds, _predictive_upper(fit, loc_b, sc_b, sh_b, T, level)
    bounds = return_level_bounds(fit, x, T, level=level, one_sided=True, method=bound_method, censored=cens,
                                 threshold=u)
    return bounds, max_quantile(fit, T, level)


# ---------------------------------------------------------------------------
# per-zone statistics of a floor: the fit the pipeline uses
# ---------------------------------------------------------------------------
#: Significance level of the likelihood-ratio test of Gumbel against GEV (Coles 2001 §3.3). [-]
GEV_ALPHA = 0.05

#: Smallest block side tried when a zone is too small or narrow for the configured blocks. [mm]
MIN_BLOCK_MM = 100.0


def fit_zone(values, mask, *, block_mm, pitch_mm, **kw) -> ZoneExtremes:
    """Block-maxima statistics of one zone: Gumbel unless the GEV is needed, block side
    halved until the zone allows a fit.

    Parameters
    ----------
    values : (M, N) array_like
        Loss depth [mm] or rate [mm/y] map.
    mask : (M, N) bool array_like
        True inside the zone. [-]
    block_mm : float
        Configured block side, tried first. [mm]
    pitch_mm : float
        Cell size. [mm]
    **kw
        Further arguments of :func:`zone_extremes` (``zone_area_mm2``, ``threshold``,
        ``seed``, ``valid``).

    Returns
    -------
    ZoneExtremes
        ``eva_method`` in its row says which distribution, ``eva_block_mm`` the block side
        used; falsy with a reason when even the smallest blocks allow no fit.

    Notes
    -----
    The Gumbel is the standard distribution of pit depths [1]_; the likelihood-ratio test
    against the GEV at :data:`GEV_ALPHA` [2]_ (§3.3) replaces it by the GEV, with profile-
    likelihood bounds, when the data reject it ("auto" in :func:`zone_extremes`: one
    block-maxima pass and one GEV fit serve the test and the estimate).  If the GEV's
    bounds fail the Gumbel is used, as the test's fallback.  Larger blocks are better than
    more blocks [3]_, so the configured side is used first; only when too few blocks reach
    the coverage rule is it halved, down to :data:`MIN_BLOCK_MM` or five cells.

    References
    ----------
    .. [1] P. J. Laycock, R. A. Cottis, P. A. Scarf, "Extrapolation of extreme pit depths in
       space and time", J. Electrochem. Soc. 137 (1990) 64-69.
    .. [2] S. Coles, *An Introduction to Statistical Modeling of Extreme Values*,
       Springer, 2001.
    .. [3] J-STAGE 43(5):258, on the choice of block size for pit-depth block maxima.
    """
    smallest = max(MIN_BLOCK_MM, 5 * pitch_mm)
    b = block_mm
    while True:
        z = zone_extremes(values, mask, method="auto", gev_alpha=GEV_ALPHA, block_mm=b, pitch_mm=pitch_mm, **kw)
        if not z and z.fit is not None and z.fit.distribution == "gev":
            # the GEV's bounds failed: the Gumbel, as the test's fallback
            z = zone_extremes(values, mask, block_mm=b, pitch_mm=pitch_mm, **kw)
        if z or b / 2 < smallest:
            break
        b /= 2
    return z


def zone_fits(values, valid, zmap, *, threshold, pitch, block_mm, seed, need_valid=False) -> dict:
    """:func:`fit_zone` of ``values`` in every zone of a zone map.

    Parameters
    ----------
    values : (M, N) ndarray
        Loss depth [mm] or rate [mm/y] map.
    valid : (M, N) bool ndarray
        Cells examined (a valid NaN or 0 is a cell scanned with nothing reported). [-]
    zmap : :class:`~scananalyse.zones.ZoneMap`
        Zone labels, names and whole-zone areas.
    threshold : float or None
        Left-censoring threshold. [value units]
    pitch : float
        Cell size. [mm]
    block_mm : float
        Configured block side. [mm]
    seed : int
        Seed of the bootstrap bounds. [-]
    need_valid : bool
        Leave out zones with no valid cell. [-]

    Returns
    -------
    dict
        Zone name -> :class:`ZoneExtremes`, for every zone with cells (our own
        :class:`~scananalyse.errors.ScanWarning` of the fits are silenced: the result's
        ``warnings`` hold them).
    """
    import warnings

    from .errors import ScanWarning

    out = {}
    for k, name in enumerate(zmap.names):
        mask = zmap.labels == k
        area = float(zmap.areas_mm2[k])
        if not area > 0 or not mask.any() or (need_valid and not np.logical_and(valid, mask).any()):
            continue
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ScanWarning)
            out[name] = fit_zone(values, mask, pitch_mm=pitch, zone_area_mm2=area, block_mm=block_mm,
                                 threshold=threshold, seed=seed, valid=valid)
    return out


def depth_map(thickness, nominal, censored) -> np.ndarray:
    """Loss depth for the extreme-value fits.

    Parameters
    ----------
    thickness : (M, N) array_like
        Remaining thickness, NaN where not scanned. [mm]
    nominal : float
        Nominal thickness. [mm]
    censored : (M, N) bool ndarray or None
        Cells reported as nominal whose true loss is below the threshold. [-]

    Returns
    -------
    (M, N) float32 ndarray
        nominal − thickness, at least 0; NaN where not scanned; 0 on censored cells (valid,
        nothing reported). [mm]
    """
    depth = np.float32(nominal) - np.asarray(thickness, dtype=np.float32)
    np.maximum(depth, np.float32(0), out=depth)  # NaN (not scanned) stays NaN
    if censored is not None:
        depth[censored & ~np.isnan(depth)] = 0.0
    return depth


def depth_statistics(thickness, zmap, *, nominal, censored, threshold, pitch, block_mm, seed) -> dict:
    """Block-maxima statistics of loss depth per zone (:func:`zone_fits` of :func:`depth_map`).

    Parameters
    ----------
    thickness : (M, N) ndarray
        Remaining thickness, NaN where not scanned. [mm]
    zmap : :class:`~scananalyse.zones.ZoneMap`
    nominal : float
        Nominal thickness. [mm]
    censored : (M, N) bool ndarray or None
        Cells reported as nominal (true loss below the threshold). [-]
    threshold : float or None
        Detection threshold; 0 or None: no censoring. [mm]
    pitch : float
        Cell size. [mm]
    block_mm : float
        Configured block side. [mm]
    seed : int
        Bootstrap seed. [-]

    Returns
    -------
    dict
        Zone name -> :class:`ZoneExtremes`.  Censored cells are valid cells of depth 0, so
        a block with no detected loss enters the fit as left-censored at the threshold.
    """
    scanned = np.isfinite(thickness)
    depth = depth_map(thickness, nominal, censored)
    return zone_fits(depth, scanned, zmap, threshold=threshold or None, pitch=pitch, block_mm=block_mm,
                     seed=seed)


def rate_statistics(rate_top, rate_under, zmap, *, pitch, block_mm, seed) -> dict:
    """Block-maxima statistics of the summed rate (top + underside) per zone.

    Parameters
    ----------
    rate_top, rate_under : (M, N) ndarray
        Governing rates per side. [mm/y]
    zmap : :class:`~scananalyse.zones.ZoneMap`
    pitch : float
        Cell size. [mm]
    block_mm : float
        Configured block side. [mm]
    seed : int
        Bootstrap seed. [-]

    Returns
    -------
    dict
        Zone name -> :class:`ZoneExtremes` over the cells that have both rates; zones
        without any are left out.
    """
    rate_sum = np.add(rate_top, rate_under, dtype=np.float32)
    rate_valid = np.isfinite(rate_sum)
    return zone_fits(rate_sum, rate_valid, zmap, threshold=None, pitch=pitch, block_mm=block_mm, seed=seed,
                     need_valid=True)
