r"""Probability of reaching MRT and of a leak: the distribution of a zone's remaining life.

Our own model (it is not API RP 581's damage-factor tables): the zone's remaining life is
the time until its thinnest point, scanned or not, reaches MRT,

.. math:: L = \min\Bigl(\min_{i \in \mathrm{scanned}} \frac{t_i - \mathrm{MRT}_i}{r_i},\;
          \frac{t_\mathrm{nom} - D - \mathrm{MRT}}{r_D}\Bigr),

and the time to a leak is the same with MRT = 0.  Every quantity on the right is uncertain
and is drawn by a seeded, vectorised Monte Carlo:

* **thickness** of a scanned, measured cell, *given its drawn rate*: with the newer
  reading :math:`y_i` (sd :math:`\sigma_i`, the method's sigma or the prove-up scatter) and,
  where it reads the same metal, the older reading on the newer grid :math:`y^0_i` (sd
  :math:`\sigma_0`), :math:`\Delta t` apart, linear growth gives
  :math:`y_i = t_i + e_i`, :math:`y^0_i = t_i + r_i \Delta t + e^0_i`, so

  .. math:: t_i \mid r_i, y_i, y^0_i \sim N\bigl(w_i y_i + (1 - w_i)(y^0_i - r_i \Delta t),\;
            w_i \sigma_i^2\bigr), \qquad w_i = \sigma_0^2 / (\sigma_0^2 + \sigma_i^2),

  truncated at ±4 sd; without a usable older reading :math:`w_i = 1`:
  :math:`N(y_i, \sigma_i^2)`.  The rate is drawn first from
  :math:`p(r_i \mid y_i, y^0_i)` (below), the thickness from this conditional: together a
  draw of the joint posterior.  Drawing the thickness from :math:`N(y_i, \sigma_i^2)`
  independently of the rate counts the newer reading's noise twice, once in the thickness
  and once, independently, in the rate's interval built from the same reading; where the
  reading is low by its noise the short-term rate is high by the same noise, and the zone's
  thinnest reading is the one chosen for being low.  The older reading was not chosen for
  it; given the rate it is a second measurement of today's thickness.  It is used only
  where both scans report a loss (not censored now, not crossed below the older
  threshold), no repair is seen or recorded and the rate was measured; a patch is new
  metal (:func:`repaired_rates`); the below-threshold (censored) cells as one with
  the threshold taken as its loss (the most it can be), at a similar-depth rate (below);
* **rate** of a scanned cell (both sides together): drawn from its *posterior* under the
  zone's distribution of true rates (empirical Bayes, below), not from its own interval
  alone.  The cell's likelihood is a split normal whose 5 % and 95 % points are the
  cell's 90 % interval (``rate_*_lo``, ``rate_*_hi``: reading noise and the censoring of the
  older scan; the sides' half-widths added in quadrature), truncated at ±4 standard
  deviations and at 0; where the point is the top of its interval (a cell crossed below
  the older threshold: the older loss is unknown below it) it is uniform over the
  interval instead;
* **the zone's rate distribution** :math:`g`: the nonparametric maximum-likelihood
  estimate (Kiefer-Wolfowitz; EM on a grid of 200 rates) from the likelihoods of all the
  zone's measured, uncensored cells, smoothed by a normal kernel of half their median
  rate noise; cell *i*'s rate is then drawn from :math:`g(r) L_i(r)` (normalised).  Why:
  of hundreds of noisy cells, the fastest is mostly fast by noise, and a cell crossed below
  the older threshold has an interval five times wider than its true rate warrants; drawn
  independently from their own intervals, the zone's minimum is set by the top of the
  widest intervals and the life comes out far too short (truth above p95 in 43 % of the
  zones not already below MRT, ``bench/RESULTS.md``).  Under :math:`g` a wide interval
  keeps only the rates that the zone's well-measured cells show to occur.  A zone with
  fewer than :data:`MIN_PRIOR_CELLS` measured cells gets no shrinkage (uniform weights),
  nor does a cell uniform over an interval from 0 (no measured lower bound: without an
  installation date there is no long-term bound, and its evidence does not separate it
  from the zone's slow bulk); ``shrink=False`` gives the independent per-cell draws;
* **rate of a cell whose rate was assumed, not measured** (a new indication: the older
  scan saw no loss there): its measured rate (the greater of short- and long-term, the
  short-term one being its loss over the interval) is a measurement of the least its rate
  can be: the likelihood is flat from that measured point up to the assumed rate and
  normal below it down to the measured lower bound (its 5 % point)
  (:func:`_measured_points`, :func:`_total_rate`).  Its prior is not :math:`g`, the rates
  of the zone's measured cells, which do not include its kind (a pit begun late, faster
  than the grown pits; under :math:`g` every draw sat at the lower bound), but the same
  estimate from the measured cells *and* the new indications' measured rates, each a
  normal measurement with its lower half-width (``_Reference.prior_new``).  The measured
  cells keep :math:`g`.  With no measured lower bound (repaired, not compared) the
  similar-depth rule below;
* **deepest loss of the unscanned part**: parameter sets of the zone's depth fit drawn by
  parametric bootstrap (parameter uncertainty), then :math:`D = F^{-1}(U^{1/T})`,
  :math:`U \sim U(0, 1)`, T = hidden area / (block area × the counted blocks' mean
  coverage): the predictive distribution of the deepest of T block maxima, not a plug-in
  return level.  A block maximum is the deepest loss over the *scanned* part of its block
  (blocks count from half covered), so the fitted F is the law of the deepest loss over
  that mean scanned area, not over a whole block; where the zone's fit is a GEV with a
  bounded upper tail (shape < 0) the Gumbel of the same block maxima is used instead
  (:func:`_unscanned_law`): a bounded fit from some twenty blocks says that no unscanned
  loss is deeper than its upper end, barely above the deepest seen, which nobody measured
  (Smith 1985: for shape < −0.5 the likelihood is not regular);
* **rate there**: the rate of a scanned cell of the zone of similar depth (rule: the
  measured cells are ranked by loss; the one drawn is uniform among the ``w`` cells nearest
  in rank to D, ``w`` = max(5, 2 % of the cells); beyond the deepest measured cell, among
  the ``w`` deepest), drawn from its posterior as above;
* **spot readings** where the scan has no value: points of the zone, each thickness drawn
  around its reading, at the greater of the similar-depth rate and the rate measured at
  the spot (:func:`_spot_lives`);
* **a zone nobody scanned**: its whole area is the unscanned part, from the floor's depth
  fit at the floor's similar-depth rates (:func:`floor_rate_rule`), with its spots.

On a repaired floor the unscanned part and the spots are the floor as found's draws
(``as_found``): a patch changes the cells it covers, never the metal nobody measured.

The thickness is not shrunk by a zone-wide distribution: an estimate of the zone's
thickness distribution (NPMLE, smoothed) made the intervals too narrow and the life too
long on the synthetic floors (diagnostic seeds 200-239, neither the bench's nor the
tests': truth below p05 in 9 of 40 zones, against 4 with the rates alone): a zone's
thinnest cells are single pits, not draws from its bulk.  The older scan resampled onto
the newer grid reads the thinnest cells about 0.07 mm thick on average (bilinear
interpolation across pit bottoms; ``bench/RESULTS.md``), which moves the drawn thickness
up by about half that (:math:`1 - w_i = 1/2` at equal sigmas); it is stated, not
corrected.  Left: the thinnest of several cells at one pit bottom, near-equal in truth and
each drawn with its own noise, still gives a minimum below the truth (the winner's curse
within a pit: no spatial model of the pit bottom here).

Only cells that could be the zone's minimum enter the Monte Carlo: a cell whose shortest
possible life (thickness −4 sd at its fastest rate, the fastest rate of its truncated
range) exceeds the longest possible life (thickness +4 sd at its slowest rate, the slowest
rate) of some other cell cannot be the minimum in any draw, so the pruning changes no
draw's result.  With the zone's rate distribution a cell's rates range over its
posterior's support (grid rates with mass above 1e-9 of its largest, widened by 3 grid
steps; the draws are clipped to it), far narrower than its interval; the support is worked
out from the cell's likelihood rounded to half a grid step, so it is the cell's own,
whichever cells are worked out with it.  Finding those cells costs one cheap pass over all
cells (:func:`_screen`, in chunks): each cell's shortest possible lives at a rate bound
(p + 4·(hi − p)/1.645 per side, at least its fastest rate) and a thickness bound (the
lesser of the newer reading and the older projected at that rate, less 4 sd of the newer
reading), no longer than the exact ones; the exact ranges of a few probe cells give an
upper bound of the least longest possible life; only cells under it are worked out
exactly.  That keeps every candidate (:func:`_screen`; tested against the candidates of
all cells).  The rule's cells and the zone's rate distribution are a systematic sample of
at most :data:`REF_CELLS` cells (:func:`_sample`), and the floor as repaired takes them
as found.  The below-threshold and unscanned parts are drawn first, then the candidates in
bands, most dangerous first; the bands stop once every cell left has a shortest possible
life above the longest of the draws' minima so far (for MRT and for a leak), so none of
them could lower any draw: the same draws as going on.

References
----------
R. L. Smith, "Maximum likelihood estimation in a class of nonregular cases", Biometrika 72
(1985) 67-90 (the GEV's likelihood for shape < −0.5; from memory).
B. Efron and R. J. Tibshirani, *An Introduction to the Bootstrap*, Chapman & Hall, 1993,
ch. 6 (parametric bootstrap).  T. Shibata, "Application of extreme value statistics to
corrosion", J. Res. NIST 99 (1994) 327-336 (the deepest of T blocks).  B. Efron,
*Large-Scale Inference*, Cambridge University Press, 2010, ch. 1 (empirical Bayes,
Tweedie's formula, selection).  S. Coles, *An Introduction to Statistical Modeling of
Extreme Values*, Springer, 2001 (predictive distributions of extremes).  The structure,
probability of failure from thinning as the chance that the rate and thickness
uncertainties use up the wall by a date, is that of risk-based inspection practice (API RP
581, from memory); the distributions are our own.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from .errors import InputError

__all__ = ["repaired_rates", "LifeDistribution", "GridPrior", "fit_rate_prior", "zone_life_distribution", "life_distributions",
           "plot_life_curve", "floor_rate_rule", "TRUNC_SD", "Z90", "MIN_PRIOR_CELLS"]

#: Draws of thickness and rate are truncated at this many standard deviations (makes the
#: pruning of cells exact). [-]
TRUNC_SD = 4.0
#: Fewest cells a zone's rate distribution is estimated from; below it each cell's rate is
#: drawn from its own likelihood alone (no shrinkage). [-]
MIN_PRIOR_CELLS = 50
#: Width of the normal kernel the discrete NPMLE of the rate distribution is smoothed by,
#: as a fraction of the median rate noise (one sd) of the zone's cells. [-]
SMOOTH_FRACTION = 0.5
#: Most cells the similar-depth rule and a zone's rate distribution are built from
#: (:func:`_reference`); above it a systematic sample of them (:func:`_sample`). [-]
REF_CELLS = 150_000
#: Most block maxima the unscanned part's bootstrap resamples in all (parameter sets ×
#: blocks; at least 200 sets): a zone of many blocks has tight parameters and needs fewer
#: sets (a 30 m floor's 700 blocks: 285 sets, not 2 000); a 5 m floor's 20 keep 2 000. [-]
BOOT_MAXIMA = 200_000
#: The note of a zone with no scanned cell.
NOT_SCANNED = ("zone not scanned: its whole area drawn from the floor's depth fit, at the rates of the floor's "
               "measured cells of similar depth")
#: Standard normal quantile of 0.95: a two-sided 90 % interval is ±Z90 standard deviations. [-]
Z90 = 1.6448536269514722


@dataclass(frozen=True)
class LifeDistribution:
    """Monte Carlo draws of one zone's time to MRT and time to a leak.

    Attributes
    ----------
    life_mrt, life_leak : (n_draws,) ndarray
        Draws of the time from the newer inspection until the zone's thinnest point reaches
        MRT, and zero thickness (0 when already there; inf when no point thins). [y]
    n_cells, n_kept : int
        Scanned cells of the zone, and those that could be its minimum (Monte Carlo). [-]
    hidden_T : float
        Unscanned area in blocks (:func:`life_distributions`: in units of the mean scanned
        area of a counted block). [blocks]
    p_hidden_governs : float
        Fraction of draws in which what the scan did not see (the unscanned part, the spot
        readings) reaches MRT first. [-]
    unseen : tuple
        (life to MRT, life to a leak) draws of what the scan did not see, (None, None) when
        nothing: a repaired floor's distribution takes them from the floor as found. [y]
    reference : object
        The zone's rate distribution and the cells of its similar-depth rule (None for a
        zone nobody scanned): a repaired floor's distribution takes them from the floor as
        found.
    reason : str
        Empty when ok; otherwise why there is no estimate (the draws are NaN).
    """

    life_mrt: np.ndarray
    life_leak: np.ndarray
    n_cells: int = 0
    n_kept: int = 0
    hidden_T: float = 0.0
    p_hidden_governs: float = float("nan")
    reason: str = ""
    notes: tuple = field(default=())
    unseen: tuple = field(default=(None, None), repr=False)
    reference: object = field(default=None, repr=False)

    @property
    def ok(self) -> bool:
        return not self.reason

    def quantiles(self, q=(0.05, 0.5, 0.95)) -> np.ndarray:
        """Quantiles of the time to MRT. [y]"""
        if not self.ok:
            return np.full(len(q), np.nan)
        return np.quantile(self.life_mrt, q, method="inverted_cdf")

    def p_mrt(self, horizon) -> np.ndarray | float:
        """P(some point of the zone is below MRT at ``horizon`` years after the newer
        inspection). [-]"""
        return self._p(self.life_mrt, horizon)

    def p_leak(self, horizon) -> np.ndarray | float:
        """P(some point of the zone is through-wall at ``horizon``). [-]"""
        return self._p(self.life_leak, horizon)

    def curve(self, years=None):
        """(years, P(reach MRT by t), P(leak by t)) for a figure."""
        years = np.linspace(0.0, 30.0, 121) if years is None else np.asarray(years, dtype=float)
        return years, np.asarray(self.p_mrt(years)), np.asarray(self.p_leak(years))

    def row(self, horizon=None) -> dict:
        """The zones.csv columns: ``life_p05_y``, ``life_p50_y``, ``life_p95_y``,
        ``p_mrt_at_due``, ``p_leak_at_due`` (the last two NaN without a horizon)."""
        q = self.quantiles()
        h = np.nan if horizon is None or not np.isfinite(horizon) else float(horizon)
        return {"life_p05_y": float(q[0]), "life_p50_y": float(q[1]), "life_p95_y": float(q[2]),
                "p_mrt_at_due": float(self.p_mrt(h)) if np.isfinite(h) else np.nan,
                "p_leak_at_due": float(self.p_leak(h)) if np.isfinite(h) else np.nan}

    def _p(self, draws, horizon):
        if not self.ok:
            return np.full(np.shape(horizon), np.nan) if np.ndim(horizon) else float("nan")
        s = np.sort(draws)
        p = np.searchsorted(s, np.asarray(horizon, dtype=float), side="right") / s.size
        return p if np.ndim(horizon) else float(p)


def _split_normal(rng, point, lo, hi, shape):
    """Draws of a split normal with 5 %/95 % points ``lo``/``hi`` around ``point``,
    truncated at ±TRUNC_SD and at 0."""
    z = np.clip(rng.standard_normal(shape), -TRUNC_SD, TRUNC_SD)
    sd_lo = np.maximum(point - lo, 0.0) / Z90
    sd_hi = np.maximum(hi - point, 0.0) / Z90
    r = point + np.where(z < 0, z * sd_lo, z * sd_hi)
    # a point at the top of its interval is the censoring bound (older loss unknown below
    # the older threshold), not a noisy estimate: uniform over the interval
    cens = (point >= hi - 1e-9) & (lo < point - 1e-9)
    if np.any(cens):
        u = rng.random(shape)
        r = np.where(cens, lo + u * (hi - lo), r)
    return np.maximum(r, 0.0)


def _rate_range(point, lo, hi):
    """Smallest and largest rate a draw of :func:`_split_normal` can give."""
    return (np.maximum(point - TRUNC_SD * np.maximum(point - lo, 0) / Z90, 0.0),
            point + TRUNC_SD * np.maximum(hi - point, 0) / Z90)


def _clean(point, lo, hi):
    """A side's rate and interval as drawn: a NaN or negative point is 0, a NaN bound the
    point, a lower bound at least 0 and at most the point."""
    p = np.where(np.isfinite(point), np.maximum(point, 0.0), 0.0)
    lo = np.where(np.isfinite(lo), np.clip(lo, 0.0, p), p)
    hi = np.where(np.isfinite(hi), np.maximum(hi, p), p)
    return p, lo, hi


def _total_rate(pt, lt, ht, pu, lu, hu, assumed=None):
    """The likelihood of each cell's total rate (both sides) from its per-side points and
    90 % intervals: ``(point, sd_lo, sd_hi, flat, a, b)``.  ``flat``: the point is the top
    of a side's interval (older loss unknown below the older threshold, or a rate assumed
    for an indication): uniform over [a, b] = the sum of the sides' intervals (the point
    is then set to a); but an ``assumed`` cell whose point lies inside (a, b) (its measured
    rate, :func:`_measured_points`) is flat from the point to b and normal below it,
    a its 5 % point (:func:`_lik`); otherwise a split normal around the point (half-widths
    of the sides added in quadrature), truncated to [a, b] = ±TRUNC_SD standard
    deviations, at least 0."""
    def side(p, lo, hi):
        return (np.maximum(p - lo, 0.0) / Z90, np.maximum(hi - p, 0.0) / Z90,
                (p >= hi - 1e-9) & (lo < p - 1e-9))
    sl_t, sh_t, f_t = side(pt, lt, ht)
    sl_u, sh_u, f_u = side(pu, lu, hu)
    point = pt + pu
    sd_lo, sd_hi = np.hypot(sl_t, sl_u), np.hypot(sh_t, sh_u)
    flat = f_t | f_u
    if assumed is not None:  # an assumed rate is no measurement: flat up to it
        flat = flat | assumed
    a = np.where(flat, lt + lu, np.maximum(point - TRUNC_SD * sd_lo, 0.0))
    b = np.where(flat, ht + hu, point + TRUNC_SD * sd_hi)
    # where flat, the point is where the flat part starts: a measured point below an
    # assumed rate (a measurement of the rate's least, normal below it down to a), else a
    step = flat & (point < b - 1e-9) & (point > a + 1e-9)
    if assumed is not None:
        step &= assumed
    else:
        step[:] = False
    point = np.where(flat & ~step, a, point)
    return point, sd_lo, sd_hi, flat, a, b


def _lik(grid, h, point, sd_lo, sd_hi, flat, a, b):
    """(n, K) likelihood of each cell's data at the rates of ``grid`` (spacing ``h``):
    split-normal density or uniform density on [a, b]; zero outside [a, b].  A width below
    the grid spacing is widened to it (the grid's resolution).  A flat cell whose point is
    above a (a measured rate below an assumed one, :func:`_total_rate`) is flat from the
    point to b and normal below it, a being its 5 % point: not normalised (only the ratios
    within a row matter, to the posterior and to :func:`_npmle` alike)."""
    g = grid[None, :]
    step = flat & (point > a)
    sl = np.where(step, np.maximum((point - a) / Z90, h), np.where(flat, np.inf, np.maximum(sd_lo, h)))[:, None]
    sh = np.where(flat, np.inf, np.maximum(sd_hi, h))[:, None]
    p = point[:, None]
    z = np.where(g < p, (g - p) / sl, (g - p) / sh)
    aa = a[:, None] - 0.5 * h
    bb = b[:, None] + 0.5 * h
    scale = np.where(flat[:, None], 1.0 / (bb - aa), 2.0 / (sl + sh))
    dens = np.exp(-0.5 * z * z) * scale
    return np.where((g >= aa) & (g <= bb), dens, 0.0)


@dataclass(frozen=True)
class GridPrior:
    """A zone's distribution of true cell rates on a grid: the prior of the empirical-Bayes
    draws (module notes).

    Attributes
    ----------
    grid : (K,) ndarray
        Support points, 0 ... the largest rate any cell allows. [mm/y]
    weights : (K,) ndarray
        Probability of each support point (sums to 1). [-]
    n_cells, n_groups : int
        Cells it was estimated from, and distinct likelihoods among them (0: too few
        cells, uniform weights: no shrinkage). [-]
    """

    grid: np.ndarray
    weights: np.ndarray
    n_cells: int = 0
    n_groups: int = 0

    @property
    def step(self) -> float:
        return float(self.grid[1] - self.grid[0]) if self.grid.size > 1 else 1.0

    def posterior(self, lik, own=None) -> np.ndarray:
        """(n, K) posterior of the listed cells' rates (rows sum to 1; a row whose
        likelihood is zero on the whole support, or marked in ``own``, is the likelihood
        alone)."""
        post = lik * self.weights[None, :]
        s = post.sum(axis=1, keepdims=True)
        bad = ~(s[:, 0] > 0)
        if own is not None:
            bad |= own
        if bad.any():
            post[bad] = lik[bad]
            s[bad] = post[bad].sum(axis=1, keepdims=True)
        return post / np.where(s > 0, s, 1.0)


def _npmle(lik, counts, n_iter):
    """EM for the weights of a mixing distribution on a grid: ``lik`` (m, K) likelihoods of
    m distinct data, ``counts`` (m,) how often each occurs.  The products of each step are
    sparse (a likelihood is zero off its cell's interval: some 7 % of the grid on a 30 m
    floor): :mod:`scipy.sparse`, which also keeps off the threaded BLAS (on a machine
    another process keeps busy, 300 small threaded products took 0.3-4.8 s, not 0.05 s)."""
    from scipy import sparse

    c = counts.astype(float) / counts.sum()
    L = sparse.csr_matrix(lik)
    LT = L.T.tocsr()
    w = np.full(lik.shape[1], 1.0 / lik.shape[1])
    for _ in range(n_iter):
        f = L @ w
        w = w * (LT @ (c / np.where(f > 0, f, np.inf)))
        w /= w.sum()
    return w


def _groups(key):
    """First index and count of each distinct value of the integer ``key``, and each
    value's group; the groups in ascending order of the key (as :func:`numpy.unique`).  A
    hash table (:func:`pandas.factorize`) groups the cells, then only the few distinct keys
    are sorted: far cheaper than sorting a million keys."""
    import pandas as pd

    codes, uniq = pd.factorize(key)  # codes numbered in order of first appearance
    order = np.argsort(uniq)
    rank = np.empty_like(order)
    rank[order] = np.arange(order.size)
    inverse = rank[codes]
    top = np.maximum.accumulate(codes)
    first = np.concatenate(([0], 1 + np.flatnonzero(top[1:] > top[:-1])))[:order.size]  # code j first at first[j]
    return first[order], np.bincount(inverse, minlength=order.size), inverse


def _lik_key(par, q):
    """One integer per cell, equal for total-rate likelihoods equal to ``q`` (and alike in
    :func:`_own`)."""
    point, sd_lo, sd_hi, flat, a, b = par
    key = np.zeros(point.shape, np.int64)
    for k in (np.rint(np.where(flat, a, point) / q), np.rint(np.where(flat, b, sd_lo) / q),
              np.where(flat, 2 * np.rint(point / q) + 1, 2 * np.rint(sd_hi / q) + 2)):
        key = key * (1 << 21) + np.clip(k.astype(np.int64), 0, (1 << 21) - 1)
    return key


def _lik_groups(par, q):
    """The total-rate likelihoods ``par`` grouped where equal to ``q``: each group's
    likelihood, its parameters rounded to ``q`` (so the same whichever cells are grouped
    with it: within ``q``/2 of each of its cells'), whether its cells are drawn alone
    (:func:`_own`), how many cells share it, and each cell's group."""
    first, counts, inv = _groups(_lik_key(par, q))
    point, sd_lo, sd_hi, flat, a, b = (x[first] for x in par)

    def r(x):
        return np.rint(x / q) * q
    p, lo, hi = r(point), r(sd_lo), r(sd_hi)
    rep = (p, lo, hi, flat, np.where(flat, np.minimum(r(a), p), np.maximum(p - TRUNC_SD * lo, 0.0)),
           np.where(flat, np.maximum(r(b), p), p + TRUNC_SD * hi))
    return rep, _own(par, first), counts, inv


def _post_range(prior, par, eps=1e-9, pad=3):
    """Smallest and largest rate each cell's posterior draws can take: its grid rates with
    posterior mass above ``eps`` × the cell's largest, widened by ``pad`` grid steps (each
    cell's likelihood is taken rounded to half a step, :func:`_lik_groups`), within [a,
    b].  A cell's range does not depend on the other cells given with it.  The draws are
    clipped to this range, so the pruning with it is exact."""
    a, b = par[4], par[5]
    if a.size == 0:
        return a.copy(), b.copy()
    h = prior.step
    rep, own, _, inv = _lik_groups(par, 0.5 * h)
    post = prior.posterior(_lik(prior.grid, h, *rep), own)
    m = post > eps * post.max(axis=1, keepdims=True)
    K = prior.grid.size
    k0 = np.argmax(m, axis=1)
    k1 = K - 1 - np.argmax(m[:, ::-1], axis=1)
    lo = np.maximum(prior.grid[k0][inv] - (pad + 0.5) * h, a)
    hi = np.minimum(prior.grid[k1][inv] + (pad + 0.5) * h, b)
    bad = ~(lo <= hi)
    return np.where(bad, a, lo), np.where(bad, b, hi)


def _rate_grid(b, top=None, n_grid=200):
    """The support of a zone's rate distribution: 0 ... ``top`` (default the largest rate
    any of the cells allows, the ``b`` of :func:`_total_rate`), ``n_grid`` points."""
    top = max(float(np.max(b)) if b.size else 0.0, 1e-3) if top is None else max(float(top), 1e-3)
    return np.linspace(0.0, top, n_grid)


def _fit_prior(par, *, n_grid=200, n_iter=300, min_cells=None, smooth=None, top=None) -> "GridPrior":
    """:func:`fit_rate_prior` on the total-rate likelihoods ``par`` of :func:`_total_rate`
    (grid :func:`_rate_grid`)."""
    point, sd_lo, sd_hi, flat, a, b = par
    n = point.size
    min_cells = MIN_PRIOR_CELLS if min_cells is None else min_cells
    grid = _rate_grid(b, top, n_grid)
    if n < min_cells:  # too few cells to estimate a distribution: the likelihood alone
        return GridPrior(grid, np.full(n_grid, 1.0 / n_grid), int(n), 0)
    h = grid[1] - grid[0]
    q = 0.5 * h
    # identical likelihoods (to half a grid step) are one group with a count
    rep, _, counts, _ = _lik_groups(par, q)
    lik = _lik(grid, h, *rep)
    w = _npmle(lik, counts, n_iter)
    if smooth is None:
        nf = ~flat & (point > h)
        smooth = SMOOTH_FRACTION * float(np.median(0.5 * (sd_lo[nf] + sd_hi[nf]))) if nf.any() else 0.0
    if smooth > 0.5 * h:  # the NPMLE is discrete: spread each atom by a normal kernel
        ker = np.exp(-0.5 * ((grid[:, None] - grid[None, :]) / smooth) ** 2)
        w = (ker / ker.sum(axis=0, keepdims=True)) @ w
    return GridPrior(grid, w / w.sum(), int(n), int(counts.size))


def fit_rate_prior(rate_top, rate_under, rate_top_lo, rate_top_hi, rate_under_lo, rate_under_hi, *,
                   measured=None, n_grid=200, n_iter=300, min_cells=None) -> GridPrior:
    r"""The distribution of true total rates (both sides) among cells measured with known,
    unequal noise: nonparametric maximum likelihood (Kiefer & Wolfowitz [1]_), EM on a fixed
    grid (Laird [2]_; as used for empirical Bayes by Jiang & Zhang [3]_).

    Parameters
    ----------
    rate_top, rate_under, rate_top_lo, rate_top_hi, rate_under_lo, rate_under_hi : (n,) array_like
        Point rates and 90 % intervals per side, as :func:`zone_life_distribution`. [mm/y]
    measured : (n,) bool array_like, optional
        False where a rate was assumed, not measured: that cell's likelihood is uniform
        over its interval. [-]
    n_grid, n_iter : int
        Support points (0 ... the largest rate any cell allows) and EM iterations. [-]
    min_cells : int, optional
        Below this many cells no distribution is estimated (uniform weights: the
        posterior is the likelihood alone); default :data:`MIN_PRIOR_CELLS`. [-]

    Returns
    -------
    GridPrior

    Notes
    -----
    Cell *i*'s data have likelihood :math:`L_i(r)` (:func:`_total_rate`: a split normal
    around the point whose 5 %/95 % points are the interval, or uniform over the interval
    where the point is its top).  The estimate maximises
    :math:`\sum_i \log \sum_k w_k L_i(r_k)` by :math:`w_k \leftarrow rac1n \sum_i
    w_k L_{ik} / \sum_j w_j L_{ij}`.  Cells with the same likelihood (to half a grid step)
    are counted once with a weight: the cost grows with the distinct likelihoods.

    References
    ----------
    .. [1] J. Kiefer and J. Wolfowitz, "Consistency of the maximum likelihood estimator in
       the presence of infinitely many incidental parameters", Ann. Math. Statist. 27
       (1956) 887-906.
    .. [2] N. Laird, "Nonparametric maximum likelihood estimation of a mixing
       distribution", J. Amer. Statist. Assoc. 73 (1978) 805-811.
    .. [3] W. Jiang and C.-H. Zhang, "General maximum likelihood empirical Bayes estimation
       of normal means", Ann. Statist. 37 (2009) 1647-1684.
    """
    arrs = [np.asarray(x, dtype=float).ravel() for x in (rate_top, rate_under, rate_top_lo, rate_top_hi,
                                                         rate_under_lo, rate_under_hi)]
    pt, lt, ht = _clean(arrs[0], arrs[2], arrs[3])
    pu, lu, hu = _clean(arrs[1], arrs[4], arrs[5])
    par = _total_rate(pt, lt, ht, pu, lu, hu, assumed=None if measured is None else ~np.asarray(measured, bool).ravel())
    return _fit_prior(par, n_grid=n_grid, n_iter=n_iter, min_cells=min_cells)


def _own(par, idx=slice(None)):
    """Cells drawn from their own likelihood, not shrunk: uniform ones with no measured
    lower bound (interval from 0).  Their evidence does not separate them from the zone's
    slow bulk (no installation date, so no long-term lower bound), and the prior, mostly
    general thinning, would call them slow."""
    return par[3][idx] & ~(par[4][idx] > 0)


def _draw_posterior(rng, prior: GridPrior, lik, a, b, u, rows=None, own=None):
    """Rates drawn from cells' posteriors by inversion: ``lik`` (m, K) of m cells, ``u``
    uniforms; element j of ``u`` is a draw of cell ``rows[j]`` (default: ``u`` is
    (n, m), column i the draws of cell i).  The posterior mass of a grid rate is spread
    uniformly over its grid step; draws are kept in [a, b] and at least 0."""
    post = prior.posterior(lik, own)
    cdf = np.cumsum(post, axis=1)
    cdf[:, -1] = 1.0
    m, K = cdf.shape
    u = np.minimum(u, 1.0 - 1e-12)
    if rows is None:  # one search per cell: short sorted rows, cache-friendly
        ut = np.ascontiguousarray(u.T)
        k = np.empty(ut.shape, np.int64)
        for i in range(m):
            k[i] = np.searchsorted(cdf[i], ut[i], side="right")
        k = k.T
        rows = np.arange(m)
    else:
        rows = np.asarray(rows)
        flat_cdf = (cdf + 2.0 * np.arange(m)[:, None]).ravel()
        k = np.searchsorted(flat_cdf, u + 2.0 * rows, side="right") - rows * K
    k = np.clip(k, 0, K - 1)
    r = prior.grid[k] + (rng.random(np.shape(u)) - 0.5) * prior.step
    return np.maximum(np.clip(r, a[rows], b[rows]), 0.0)


def zone_life_distribution(thickness, rate_top, rate_under, rate_top_lo, rate_top_hi, rate_under_lo,
                           rate_under_hi, mrt, *, sigma_t, nominal, censored=None, threshold=None,
                           measured=None, hidden_fit=None, hidden_T=0.0, hidden_n=None,
                           hidden_threshold=None, n_draws=2000, seed=0, shrink=True,
                           rate_prior=None, older=None, sigma_old=None, dt_years=None, spots=None,
                           floor_rule=None, unseen=None, reference=None) -> LifeDistribution:
    r"""Distribution of one zone's time to MRT and to a leak (our own model, module notes).

    Parameters
    ----------
    thickness : (n,) array_like
        Measured remaining thickness of the zone's scanned cells (NaN: not scanned). [mm]
    rate_top, rate_under, rate_top_lo, rate_top_hi, rate_under_lo, rate_under_hi : (n,) array_like
        Governing rates per side (NaN and negative count as 0) and their 90 % intervals. [mm/y]
    mrt : float or (n,) array_like
        Minimum remaining thickness (the unscanned part takes its minimum). [mm]
    sigma_t, nominal : float or (n,) array_like, float
        Sigma of the newer reading (method sigma, or prove-up scatter); nominal plate
        thickness. [mm]
    censored, threshold : (n,) bool array_like, float, optional
        Cells reported as nominal (true loss below the threshold); the scan's detection
        threshold (loss). [-], [mm]
    measured : (n,) bool array_like, optional
        Cells whose rates were measured; the others (rates assumed for indications) are
        drawn as the module notes say.  None: all measured. [-]
    hidden_fit, hidden_T : GumbelFit or GEVFit, float
        The zone's fit of block-maximum loss depth (None: the unscanned part is not
        modelled); the unscanned area in blocks. [-], [blocks]
    hidden_n, hidden_threshold : int, float, optional
        Blocks and censoring threshold of the fit's bootstrap (default: the fit's). [-], [mm]
    n_draws, seed : int
        Monte Carlo draws; seed of :func:`numpy.random.default_rng`. [-]
    shrink, rate_prior : bool, GridPrior, optional
        Draw the rates from their posteriors under the zone's rate distribution (False:
        each from its own interval); that distribution (:func:`fit_rate_prior`; None:
        estimated from the zone's measured, uncensored cells). [-]
    older, sigma_old, dt_years : (n,) array_like, float, float, optional
        The older scan's reading on the newer grid where it reads the same metal (NaN
        elsewhere), its sigma, and the years between the inspections: the present
        thickness is then drawn given the drawn rate from both readings. [mm], [mm], [y]
    spots : (t, rate, sigma), optional
        Spot readings (hand UT, prove-up, pit gauge) on cells the scan has no value at:
        thickness (k,) [mm], the rate measured at the spot (k,) (NaN: none) [mm/y], and the
        readings' sigma [mm].  Each spot is a point of the zone (:func:`_spot_lives`).
    floor_rule : callable, optional
        ``floor_rule(rng, d)``: the similar-depth rate rule of the whole floor
        (:func:`floor_rate_rule`), used when the zone has no measured cell of its own: a
        zone nobody scanned is then its unscanned part (its whole area, ``hidden_T``) and
        its spots.
    unseen : tuple, optional
        :attr:`LifeDistribution.unseen` of the same zone as found, taken as it is (the
        unscanned part and the spots are not drawn again): on a repaired floor, so that no
        repair changes metal nobody measured.
    reference : object, optional
        :attr:`LifeDistribution.reference` of the same zone as found, taken as it is (its
        rate distribution and similar-depth cells are not estimated again): on a repaired
        floor, so that a repair changes no other cell's rates.

    Returns
    -------
    LifeDistribution

    Notes
    -----
    Draw *k*: each candidate cell's rate from its posterior, its thickness given that rate
    (module notes), its life :math:`\max(0, (t_{ik} - \mathrm{MRT}_i) / r_{ik})`; the
    unscanned part's from a predictive draw of its deepest loss; the zone's life the least.
    References in the module notes (Efron & Tibshirani 1993; Shibata 1994; Efron 2010;
    Coles 2001).
    """
    if n_draws < 10:
        raise InputError(f"zone_life_distribution: field 'n_draws' must be at least 10, got {n_draws}")
    c = _scanned_cells(thickness, (rate_top, rate_under, rate_top_lo, rate_top_hi, rate_under_lo, rate_under_hi),
                       mrt, sigma_t=sigma_t, nominal=nominal, censored=censored, threshold=threshold,
                       measured=measured, older=older, sigma_old=sigma_old, dt_years=dt_years)
    if c.t.size == 0:  # nothing of its own measured: the floor's rates, or no estimate
        if unseen is not None and unseen[0] is not None:  # as found: a repair changes none of it
            return LifeDistribution(unseen[0], unseen[1], n_cells=c.n, hidden_T=float(hidden_T),
                                    p_hidden_governs=1.0, notes=(NOT_SCANNED,), unseen=unseen)
        return _unscanned_zone(c, mrt, hidden_fit, float(hidden_T), n_draws, seed, hidden_n, hidden_threshold,
                               spots, floor_rule)
    rng = np.random.default_rng(seed)
    bound = _rate_bound(c)
    ref = reference
    if ref is None or (ref.prior is not None) != bool(shrink):
        top = _rate_top(c, bound) if shrink and rate_prior is None and c.unc.any() else None
        ref = _reference(c, shrink=shrink, prior=rate_prior, top=top)

    def rates_of(cells):
        return _shrunk_rates(cells, ref, rng) if shrink else _own_rates(cells, ref, rng)

    # one cheap pass over all cells; the exact ranges only for those that could matter
    seen = _take(c, _screen(c, bound, ref.r_top, lambda cells: _life_bounds(cells, rates_of(cells))))
    rates = rates_of(seen)
    cand = _candidates(seen, rates)
    # the below-threshold and unscanned parts first: their draws bound which scanned cells
    # can still lower a draw's minimum (the seen part stops there, exactly)
    life_mrt = np.full(n_draws, 0.0 if cand.below else np.inf)
    life_leak = np.full(n_draws, np.inf)
    if c.any_cens:
        h_mrt, h_leak = _censored_lives(c, rates, n_draws, c.mrt_min)
        life_mrt, life_leak = np.minimum(life_mrt, h_mrt), np.minimum(life_leak, h_leak)
    T = float(hidden_T)
    if unseen is None:
        h_mrt, h_leak = _unseen_lives(c, rates, spots, hidden_fit, T, n_draws, rng, hidden_n, hidden_threshold,
                                      ref.grown_years())
    else:  # the floor as found's (on a repaired floor: a repair changes no metal nobody saw)
        h_mrt, h_leak = unseen
    seen_mrt, seen_leak, n_drawn = _seen_lives(seen, rates, cand, life_mrt, life_leak, h_mrt=h_mrt,
                                               h_leak=h_leak, rng=rng)
    p_hidden = 0.0 if h_mrt is None else float(np.mean(h_mrt < seen_mrt))
    if h_mrt is not None:
        seen_mrt, seen_leak = np.minimum(seen_mrt, h_mrt), np.minimum(seen_leak, h_leak)
    notes = ("unscanned part not modelled (no extreme-value fit)",) if (T > 0 and hidden_fit is None) else ()
    return LifeDistribution(seen_mrt, seen_leak, n_cells=c.n, n_kept=n_drawn, hidden_T=T,
                            p_hidden_governs=p_hidden, notes=notes, unseen=(h_mrt, h_leak), reference=ref)


def _unseen_lives(c, rates, spots, fit, T, n_draws, rng, n_fit, thr, grown=np.inf):
    """Draws of the lives of what the scan did not see, the least of the spot readings and
    the unscanned part; (None, None) when there is neither."""
    h_mrt, h_leak = _unscanned_lives(c, rates, fit, T, n_draws, rng, n_fit, thr, grown)
    if spots is None or not len(spots[0]):
        return h_mrt, h_leak
    s_mrt, s_leak = _spot_lives(spots, c.nominal, c.mrt_min, rates.rule, n_draws, rng)
    return (s_mrt, s_leak) if h_mrt is None else (np.minimum(h_mrt, s_mrt), np.minimum(h_leak, s_leak))


def _unscanned_zone(c, mrt, fit, T, n_draws, seed, n_fit, thr, spots, floor_rule) -> LifeDistribution:
    """A zone with no measured cell: its whole area drawn from the depth fit lent to it,
    growing at the floor's similar-depth rates, and its spot readings; NaN draws with the
    reason when there is no fit or no floor rule."""
    if fit is None or T <= 0 or floor_rule is None:
        nan = np.full(n_draws, np.nan)
        why = "no extreme-value fit" if fit is None or T <= 0 else "no measured rate for its unscanned part"
        return LifeDistribution(nan, nan, n_cells=c.n, reason=f"zone not scanned: {why}")
    rng = np.random.default_rng(seed)
    mrt_min = float(np.nanmin(mrt)) if np.ndim(mrt) else float(mrt)
    d = _hidden_depth(fit, T, n_draws, rng, n_fit, thr)
    life_mrt, life_leak = _part_lives(c.nominal - d, mrt_min, floor_rule(rng, d))
    if spots is not None and len(spots[0]):
        s_mrt, s_leak = _spot_lives(spots, c.nominal, mrt_min, lambda x: floor_rule(rng, x), n_draws, rng)
        life_mrt, life_leak = np.minimum(life_mrt, s_mrt), np.minimum(life_leak, s_leak)
    return LifeDistribution(life_mrt, life_leak, n_cells=c.n, n_kept=0, hidden_T=T, p_hidden_governs=1.0,
                            notes=(NOT_SCANNED,), unseen=(life_mrt, life_leak))


def _spot_lives(spots, nominal, mrt, rule, n_draws, rng):
    """Lives to MRT and to a leak of a zone's spot readings, the least over the spots per
    draw: each spot's thickness drawn around its reading (normal, the readings' sigma,
    truncated at ±4 sd), its rate the greater of the similar-depth rule at its loss and the
    rate measured at the spot (one reading says nothing of its own rate; a short-term rate
    from two outages' readings at the spot is kept where it is faster)."""
    t, r_meas, sig = np.asarray(spots[0], float), np.asarray(spots[1], float), float(spots[2])
    shape = (n_draws, t.size)
    tk = t + sig * np.clip(rng.standard_normal(shape), -TRUNC_SD, TRUNC_SD)
    d = np.broadcast_to(np.maximum(nominal - t, 0.0), shape).ravel()
    rk = np.fmax(rule(d).reshape(shape), np.nan_to_num(r_meas, nan=0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        return _life(tk - mrt, rk).min(axis=1), _life(tk, rk).min(axis=1)


def _unscanned_lives(c, rates, fit, T, n_draws, rng, n_fit, thr, grown=np.inf):
    """Draws of the unscanned part's lives to MRT (the zone's least) and to a leak: its
    deepest loss D from the predictive law, growing at the similar-depth rate, but at
    least at D / A, A = ``grown``, the median time the zone's w deepest measured cells
    took to grow their loss at their point rates (:meth:`_Reference.grown_years`); (None,
    None) when it is not modelled.

    Beyond the deepest measured cell the similar-depth rule draws among the w deepest
    (2 % of the cells: on a 5 m floor down to 0.6 mm of loss, mostly pit flanks), whose
    median rate (0.04–0.06 mm/y on the bench floors looked at) grows a loss of 4 mm in
    70–100 years, far longer than those floors have stood (25 years); the true deepest
    pits nobody scanned grew theirs in about the time the deepest seen did.  On the
    synthetic leak bench floors the true time to a leak fell below the leak life's p05 in
    12 of 119 zones without the floor, 1 with it (``bench/RESULTS.md``).  Only a floor:
    no draw's life is longer than at the rule's rate alone.  Not capped: in a zone whose
    deepest losses are shallow and young, a deep D grows very fast (the conservative
    side)."""
    if fit is None or T <= 0:
        return None, None
    d = _hidden_depth(fit, T, n_draws, rng, n_fit, thr)
    return _part_lives(c.nominal - d, c.mrt_min, np.maximum(rates.rule(d), d / grown))


@dataclass(frozen=True)
class _Cells:
    """A zone's scanned cells as the Monte Carlo takes them, one by one: thickness ``t``,
    ``mrt``, sigma ``sig`` [mm]; per-side rates and intervals ``side_rates`` = ``(pt, lt,
    ht, pu, lu, hu)`` [mm/y] (as given, in the maps' precision; cleaned, in float64, in a
    :func:`_take`); ``cens`` (below the threshold), ``unc`` (not), ``meas`` (rate measured),
    ``lo_known`` (both sides' lower bounds finite); ``ref``: the cells the similar-depth
    rule may take (:func:`_reference`); ``n``: cells given, scanned or not;
    ``any_cens``: some scanned cell is below the threshold; ``mrt_min``: the least MRT of
    the scanned cells [mm] (:func:`_kept_cells`: which scanned cells are listed); ``old``,
    the older reading (NaN: none), ``s_old2`` its variance (NaN: the older reading is not
    used) [mm], [mm²], ``dt`` the years between the readings; ``w_new``, ``sig_post``, the
    newer reading's weight and the sigma of the two combined (:func:`_thickness_mean`; set
    by a :func:`_take`, None before)."""

    t: np.ndarray
    mrt: np.ndarray
    sig: np.ndarray
    cens: np.ndarray
    unc: np.ndarray
    meas: np.ndarray
    lo_known: np.ndarray
    side_rates: tuple
    ref: np.ndarray
    nominal: float
    threshold: float
    n: int
    old: np.ndarray
    s_old2: float
    w_new: np.ndarray
    sig_post: np.ndarray
    dt: float
    any_cens: bool
    mrt_min: float


def _kept_cells(scanned, cens):
    """The scanned cells listed one by one: a below-threshold cell enters only as the
    below-threshold part (its count and the zone's least MRT), never as a candidate nor a
    cell of the similar-depth rule once some cell is not below the threshold, so those are
    left out before the per-cell work; all scanned cells when every one is below it."""
    unc = scanned & ~cens
    return unc if unc.any() else scanned


def _scanned_cells(thickness, rate_arrays, mrt, *, sigma_t, nominal, censored, threshold, measured, older=None,
                   sigma_old=None, dt_years=None):
    """:class:`_Cells` of the scanned (finite-thickness) cells that can matter one by one
    (:func:`_kept_cells`; none: empty arrays)."""
    t_all = np.asarray(thickness).ravel()
    n = t_all.size
    ok = np.isfinite(t_all)
    thr = float(threshold) if threshold else 0.0
    cens_all = (np.zeros(n, bool) if censored is None or not thr > 0
                else np.broadcast_to(np.asarray(censored, bool).ravel(), (n,)))
    take = _kept_cells(ok, cens_all)
    take = None if take.all() else take  # the usual UT case: no copies
    m = n if take is None else int(np.count_nonzero(take))

    def flat(a, dtype=None):  # dtype None: the array's own (a scalar: a read-only view, no copies)
        if np.ndim(a) == 0:
            return np.broadcast_to(np.asarray(a, dtype=dtype or float), (m,))
        a = np.asarray(a).ravel()
        a = a if take is None else a[take]
        return a if dtype is None else a.astype(dtype, copy=False)
    # in the maps' own precision: every use is arithmetic in float64 or a comparison (exact)
    t = flat(t_all)
    raw = [flat(a) for a in rate_arrays]
    mrt_a, sig = flat(mrt), flat(sigma_t)
    mrt_min = float(np.min(np.asarray(mrt).ravel(), where=ok, initial=np.inf)
                    if np.ndim(mrt) else mrt) if ok.any() else np.nan
    cens = flat(cens_all, bool)
    unc = ~cens
    meas = flat(True, bool) if measured is None else flat(measured, bool)
    # reference cells of the similar-depth rate rule: the measured, uncensored cells
    ref = unc & meas
    ref = ref if ref.any() else (unc if unc.any() else np.ones_like(unc))
    both = older is not None and bool(dt_years) and sigma_old is not None  # else the newer reading alone
    return _Cells(t=t, mrt=mrt_a, sig=sig, cens=cens, unc=unc, meas=meas,
                  lo_known=np.isfinite(raw[2]) & np.isfinite(raw[4]), ref=ref,
                  side_rates=(raw[0], raw[2], raw[3], raw[1], raw[4], raw[5]),  # (pt, lt, ht, pu, lu, hu)
                  nominal=float(nominal), threshold=thr, n=int(n), old=flat(older if both else np.nan),
                  s_old2=float(sigma_old) ** 2 if both else np.nan, w_new=None, sig_post=None,
                  dt=float(dt_years or 0.0) if both else 0.0,
                  any_cens=bool(np.any(cens_all & ok)), mrt_min=mrt_min)


def _take(c: _Cells, idx) -> _Cells:
    """The cells ``idx`` of ``c``, their rates cleaned and in float64: what the per-cell
    work takes (the cleaning only compares and selects, so it is exact in the maps' own
    precision)."""
    raw = [a[idx] for a in c.side_rates]
    side = tuple(x.astype(float, copy=False) for x in (*_clean(*raw[:3]), *_clean(*raw[3:])))
    unc, meas, sig = c.unc[idx], c.meas[idx], c.sig[idx].astype(float)
    old = c.old[idx].astype(float)
    # the older reading counts where it reads the same metal (module notes): its weight
    use = np.isfinite(old) & unc & meas & np.isfinite(c.s_old2)
    w_new = np.where(use, c.s_old2 / np.maximum(c.s_old2 + sig * sig, 1e-30), 1.0)
    return replace(c, t=c.t[idx].astype(float), mrt=c.mrt[idx].astype(float), sig=sig, cens=c.cens[idx], unc=unc,
                   meas=meas, lo_known=c.lo_known[idx], side_rates=side, ref=c.ref[idx],
                   old=np.where(use, old, np.nan), w_new=w_new, sig_post=np.where(use, np.sqrt(w_new) * sig, sig))


@dataclass(frozen=True)
class _Reference:
    """The cells of the similar-depth rate rule (module notes): ``depth``, their loss in
    ascending order [mm]; ``side_rates`` and ``par`` (:func:`_total_rate`) in that order;
    ``prior``, the zone's rate distribution (None: each rate from its own interval);
    ``r_top``, the fastest rate a draw of the rule can take [mm/y]; ``prior_new``, the
    distribution new indications are drawn under (None: the zone has none)."""

    depth: np.ndarray
    side_rates: tuple
    par: tuple
    prior: object
    r_top: float
    prior_new: object = None

    def grown_years(self) -> float:
        """The median time the w deepest cells (the rule's cells beyond the deepest, w as
        :func:`_similar_depth`) took to grow their loss at their point rates (loss /
        rate); a cell with no loss or no rate tells no time (infinite); none: inf. [y]"""
        w = max(5, int(0.02 * self.depth.size))
        d, r = self.depth[-w:], (self.side_rates[0] + self.side_rates[3])[-w:]
        if d.size == 0:
            return np.inf
        with np.errstate(divide="ignore", invalid="ignore"):
            return float(np.median(np.where((r > 0) & (d > 0), d / r, np.inf)))

    def rule(self, rng, d):
        """Rate draws at depths ``d``: a cell of similar depth, its rate drawn from its
        posterior (from its own interval without a prior)."""
        if self.depth.size == 0:
            return np.zeros_like(d)
        pick = _similar_depth(rng, d, self.depth)
        if self.prior is None:
            pt, lt, ht, pu, lu, hu = (x[pick] for x in self.side_rates)
            return _split_normal(rng, pt, lt, ht, d.shape) + _split_normal(rng, pu, lu, hu, d.shape)
        up, inv = np.unique(pick, return_inverse=True)
        sub = tuple(x[up] for x in self.par)
        return _draw_posterior(rng, self.prior, _lik(self.prior.grid, self.prior.step, *sub), sub[4], sub[5],
                               rng.random(np.shape(d)), rows=inv.reshape(np.shape(d)), own=_own(sub))


def _sample(idx):
    """At most :data:`REF_CELLS` of the cells ``idx``: every k-th (from k/2), k the least
    that keeps no more; all when fewer.  A systematic sample over the map: the rule draws a
    cell among the 2 % nearest in depth, and the rate distribution is a distribution, so
    150 000 cells give both, at a tenth of the cost on a 30 m floor."""
    k = -(-idx.size // REF_CELLS)
    return idx if k <= 1 else idx[k // 2::k]


def _reference(c: _Cells, *, shrink, prior=None, top=None) -> _Reference:
    """:class:`_Reference` of the cells ``c.ref`` (a :func:`_sample` of them).  ``prior``:
    the zone's rate distribution when given, else estimated from these cells (``shrink``;
    its grid up to ``top``)."""
    idx = _sample(np.flatnonzero(c.ref))
    r = _take(c, idx)
    depth = c.nominal - r.t
    order = np.argsort(depth, kind="stable")
    side = tuple(x[order] for x in r.side_rates)
    if not shrink:
        r_top = float(np.max(_rate_range(*side[:3])[1] + _rate_range(*side[3:])[1])) if idx.size else 0.0
        return _Reference(depth[order], side, (), None, r_top)
    par = _total_rate(*r.side_rates, assumed=~r.meas)
    if prior is None:
        # new indications (assumed rates with a measured lower bound) are drawn under the
        # rates of the measured cells and of the new indications, each one's measured
        # rate (its loss over the interval) a normal measurement with its lower
        # half-width (the assumed rate above it is no measurement); the measured cells
        # under the measured cells' rates alone, as before
        new = np.flatnonzero(c.unc & ~c.ref & ~c.meas & c.lo_known)
        prior_new = None
        if new.size:
            s = _take(c, new)
            p, sd = _total_rate(*s.side_rates)[:2]
            pn = (p, sd, sd, np.zeros(p.size, bool), np.maximum(p - TRUNC_SD * sd, 0.0), p + TRUNC_SD * sd)
            prior_new = _fit_prior(tuple(np.concatenate((x, y)) for x, y in zip(par, pn)), top=top)
        prior = _fit_prior(par, top=top)
    else:
        prior_new = None
    return _Reference(depth[order], side, tuple(x[order] for x in par), prior,
                      float(np.max(par[5])) if idx.size else 0.0, prior_new)


def _chunks(n, size=1 << 16):
    """Slices of ``size`` cells covering ``n``: a pass over a million cells made chunk by
    chunk keeps its temporaries in the cache (a 30 m floor's full-size temporaries cost
    more in first touches of memory than in arithmetic)."""
    return [slice(i, min(i + size, n)) for i in range(0, n, size)]


def _rate_bound(c: _Cells):
    """A cheap upper bound of the fastest rate each cell's draws can take: per side
    p + TRUNC_SD·(hi − p)/Z90, the top of :func:`_rate_range`; their sum is at least the
    ``b`` of :func:`_total_rate` (hypot ≤ sum, and TRUNC_SD/Z90 > 1 for a uniform side).
    In the maps' precision, with a margin of 1e-5 for its rounding (float32: 6e-8 per
    operation). [mm/y]"""
    pt, _, ht, pu, _, hu = c.side_rates
    k = TRUNC_SD / Z90
    out = np.empty(c.t.size, np.result_type(pt, ht, pu, hu))
    for s in _chunks(out.size):
        total = 0.0
        for p, h in ((pt[s], ht[s]), (pu[s], hu[s])):
            p = np.fmax(p, 0.0)  # NaN: 0, as _clean
            total = total + p + k * (np.fmax(h, p) - p)  # NaN hi: the point, as _clean
        out[s] = total * (1.0 + 1e-5)
    return out


def _rate_top(c: _Cells, bound):
    """The largest rate any uncensored cell's likelihood allows (the ``b`` of
    :func:`_total_rate`), exactly: computed on the cell of the largest ``bound`` first,
    then on the cells whose bound exceeds what it allows (no other cell can)."""
    def exact(ii):
        s = _take(c, ii)
        return float(np.max(_total_rate(*s.side_rates, assumed=~s.meas)[5]))

    masked = np.where(c.unc, bound, -np.inf)
    top = exact([int(np.argmax(masked))])
    more = np.flatnonzero(masked > top)
    return max(top, exact(more)) if more.size else top


def _screen(c: _Cells, bound, bound_ref, exact_bounds):
    """Indices of cells among which :func:`_candidates` finds every cell that could be the
    zone's minimum in some draw: a superset, from one cheap pass over all cells.

    Each cell's shortest possible lives (to MRT and to a leak) are bounded below cheaply:
    at the rate bound (``bound``; ``bound_ref``, the fastest rate the rule draws, for a
    rate the rule draws), the thickness at least the lesser of the newer reading and the
    older projected at that rate (the mean of :func:`_thickness_mean` is between them),
    less TRUNC_SD of the newer reading's sigma (the posterior's is smaller).  The longest
    possible lives of a few probe cells (each chunk's cells of shortest lives at the point
    rates) are worked out exactly (``exact_bounds(cells)`` ->
    :func:`_life_bounds`); a cell is kept when its shortest possible life is not above the
    least of them.  This keeps every candidate: the cell of least longest possible life
    over the whole zone is a candidate, so its shortest possible life is not above that
    least, which is not above the probes' least."""
    chunks = _chunks(c.t.size)

    def lives(s, point=False):  # the bounds of the cells of chunk s (point: their lives at the point rates)
        unc, t = c.unc[s], c.t[s].astype(float)
        r = (np.fmax(c.side_rates[0][s], 0) + np.fmax(c.side_rates[3][s], 0) if point else
             np.where(c.meas[s], bound[s], np.maximum(bound[s], bound_ref)).astype(float))
        if not point:  # no older reading (NaN): the newer
            t = np.fmin(t, c.old[s] - r * c.dt) - TRUNC_SD * c.sig[s]
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(unc, _life(t - c.mrt[s], r), np.inf), np.where(unc, _life(t, r), np.inf)

    # probes: each chunk's most dangerous cells at the point rates
    pool = np.unique([s.start + np.argmin(x) for s in chunks for x in lives(s, point=True)])
    pool = pool[c.unc[pool]]
    if pool.size == 0:
        return pool
    _, opt, _, opt0 = exact_bounds(_take(c, pool))
    # rounding: the cheap bound's arithmetic is not the exact one's
    top, top0 = opt.min() * (1 + 1e-9) + 1e-9, opt0.min() * (1 + 1e-9) + 1e-9
    kept = []
    for s in chunks:
        pess, pess0 = lives(s)
        keep = pess0 <= top0
        if opt.min() > 0:  # else every draw is already below MRT: only the leak's candidates
            keep |= pess <= top
        # a cell whose shortest possible lives are both infinite never lowers a draw
        kept.append(s.start + np.flatnonzero(keep & c.unc[s] & (np.isfinite(pess) | np.isfinite(pess0))))
    return np.concatenate(kept)


@dataclass(frozen=True)
class _Rates:
    """How the Monte Carlo draws rates: ``r_min``, ``r_max`` (each cell's range, for the
    pruning) [mm/y]; ``meas`` (cells drawn by ``draw``; the others by ``rule``); ``draw(ii,
    shape)``: draws of cells ``ii``; ``rule(d)``: the similar-depth rule at depths ``d``."""

    r_min: np.ndarray
    r_max: np.ndarray
    meas: np.ndarray
    draw: object
    rule: object


def _shrunk_rates(c: _Cells, ref: _Reference, rng) -> _Rates:
    """Rates from each cell's posterior under the zone's rate distribution (module notes).
    An assumed rate is no measurement, but a measured rate and lower bound are: such a
    cell's posterior is under ``ref.prior_new``; with no measured lower bound, the
    similar-depth rule."""
    unc = c.unc
    prior = ref.prior
    par = _total_rate(*c.side_rates, assumed=~c.meas)
    meas = c.meas | c.lo_known
    r_lo, r_hi = par[4].copy(), par[5].copy()  # each cell's draws are clipped to these
    new = ~c.meas if ref.prior_new is not None else np.zeros(c.meas.shape, bool)
    for pr, which in ((prior, unc & ~new), (ref.prior_new, unc & new)):
        if which.any():
            r_lo[which], r_hi[which] = _post_range(pr, tuple(x[which] for x in par))

    def drawn(pr, jj, shape):
        sub = tuple(x[jj] for x in par)
        return _draw_posterior(rng, pr, _lik(pr.grid, pr.step, *sub), r_lo[jj], r_hi[jj], rng.random(shape),
                               own=_own(sub))

    def draw(ii, shape):
        is_new = new[ii]
        if not is_new.any():
            return drawn(prior, ii, shape)
        if is_new.all():
            return drawn(ref.prior_new, ii, shape)
        out = np.empty(shape)
        for pr, j in ((prior, np.flatnonzero(~is_new)), (ref.prior_new, np.flatnonzero(is_new))):
            out[:, j] = drawn(pr, ii[j], (shape[0], j.size))
        return out

    return _Rates(r_min=np.where(meas, r_lo, 0.0), r_max=np.where(meas, r_hi, ref.r_top), meas=meas,
                  draw=draw, rule=lambda d: ref.rule(rng, d))


def _own_rates(c: _Cells, ref: _Reference, rng) -> _Rates:
    """Rates drawn independently from each cell's own interval (``shrink=False``); assumed
    rates are replaced by draws of the similar-depth rule."""
    pt, lt, ht, pu, lu, hu = c.side_rates
    rt_min, rt_max = _rate_range(pt, lt, ht)
    ru_min, ru_max = _rate_range(pu, lu, hu)

    def draw(ii, shape):
        return _split_normal(rng, pt[ii], lt[ii], ht[ii], shape) + _split_normal(rng, pu[ii], lu[ii], hu[ii], shape)

    # an assumed rate is drawn by the rule: 0 ... the fastest rule rate
    return _Rates(r_min=np.where(c.meas, rt_min + ru_min, 0.0), r_max=np.where(c.meas, rt_max + ru_max, ref.r_top),
                  meas=c.meas, draw=draw, rule=lambda d: ref.rule(rng, d))


def _life_bounds(c: _Cells, rates: _Rates):
    """Each cell's shortest and longest possible lives to MRT and to a leak over its
    thickness and rate ranges: ``(pess, opt, pess0, opt0)``; inf for a cell below the
    threshold. [y]"""
    unc = c.unc
    t_lo, t_hi = _thickness_range(c, rates.r_min, rates.r_max)
    with np.errstate(divide="ignore", invalid="ignore"):
        return (np.where(unc, _life(t_lo - c.mrt, rates.r_max), np.inf),
                np.where(unc, _life(t_hi - c.mrt, rates.r_min), np.inf),
                np.where(unc, _life(t_lo, rates.r_max), np.inf),
                np.where(unc, _life(t_hi, rates.r_min), np.inf))


def _candidates(c: _Cells, rates: _Rates):
    """The cells that could be the zone's minimum in some draw (module notes), and whether
    some cell is below MRT in every draw (the life to MRT is then 0)."""
    unc = c.unc
    pess, opt, pess0, opt0 = _life_bounds(c, rates)
    # cell i can be the minimum only if its shortest possible life is not above the
    # longest possible life of the cell that is surely shortest
    below = bool(opt.size) and opt.min() <= 0
    keep = unc & (pess <= (opt.min() if opt.size else np.inf)) & (not below)
    keep |= unc & (pess0 <= (opt0.min() if opt0.size else np.inf))  # the leak's candidates too
    idx = np.flatnonzero(keep)
    # most dangerous first: by the shortest possible life to MRT (to a leak when every draw
    # is already below MRT)
    idx = idx[np.argsort(pess0[idx] if below else pess[idx], kind="stable")]
    return _Candidates(idx=idx, pess=pess[idx], pess0=pess0[idx], below=below)


@dataclass(frozen=True)
class _Candidates:
    """Cells that could be the zone's minimum, most dangerous first (``idx``), their
    shortest possible lives to MRT and to a leak (``pess``, ``pess0``) [y], and whether
    some cell is below MRT in every draw (``below``)."""

    idx: np.ndarray
    pess: np.ndarray
    pess0: np.ndarray
    below: bool


def _seen_lives(c: _Cells, rates: _Rates, cand: _Candidates, life_mrt, life_leak, *, h_mrt, h_leak, rng,
                band=256, stop_early=True):
    """Draws of the shortest life to MRT and to a leak over ``life_mrt``, ``life_leak`` (the
    parts drawn before) and the candidate cells, ``band`` cells at a time, most dangerous
    first; and the number of cells drawn.  With ``stop_early`` the bands stop once no cell
    left can lower any draw's minimum, the unscanned part's draws ``h_mrt``, ``h_leak``
    included: its shortest possible life exceeds the longest of the draws' minima (exact:
    the same draws as going on to the last cell, since nothing is drawn after this)."""
    idx = cand.idx
    rest0 = np.minimum.accumulate(cand.pess0[::-1])[::-1]  # least pess0 of the cells from k on
    n_draws = life_mrt.size
    bound_mrt, bound_leak = (life_mrt, life_leak) if h_mrt is None else (np.minimum(life_mrt, h_mrt),
                                                                         np.minimum(life_leak, h_leak))
    c0 = 0
    while c0 < idx.size:
        if stop_early and _cannot_lower(cand, c0, rest0, np.minimum(bound_mrt, life_mrt).max(),
                                        np.minimum(bound_leak, life_leak).max()):
            break
        ii = idx[c0:c0 + band]
        shape = (n_draws, ii.size)
        zk = np.clip(rng.standard_normal(shape), -TRUNC_SD, TRUNC_SD)
        rk = rates.draw(ii, shape)
        a_ii = np.flatnonzero(~rates.meas[ii])
        if a_ii.size:
            d_a = np.broadcast_to(c.nominal - c.t[ii][a_ii], (n_draws, a_ii.size)).ravel()
            rk[:, a_ii] = rates.rule(d_a).reshape(n_draws, a_ii.size)
        tk = _thickness_mean(c, ii, rk) + c.sig_post[ii] * zk
        with np.errstate(divide="ignore", invalid="ignore"):
            life_mrt = np.minimum(life_mrt, _life(tk - c.mrt[ii], rk).min(axis=1))
            life_leak = np.minimum(life_leak, _life(tk, rk).min(axis=1))
        c0 += ii.size
    return life_mrt, life_leak, int(min(c0, idx.size))


def _cannot_lower(cand: _Candidates, k, rest0, top_mrt, top_leak) -> bool:
    """True when none of the candidates from ``k`` on can lower any draw: each one's
    shortest possible life exceeds ``top_mrt`` (the longest of the draws' minima; or every
    draw is below MRT already) and its shortest possible life to a leak ``top_leak``."""
    mrt_done = cand.below or cand.pess[k:].min() > top_mrt
    return bool(mrt_done and rest0[k] > top_leak)


def _thickness_mean(c: _Cells, ii, rate):
    """Mean of a cell's present thickness given its total rate: the newer reading, and
    where the older reading counts, the two combined by their sigmas, the older projected
    forward at the rate (module notes)."""
    t = c.t[ii]
    old = c.old[ii]
    if not np.isfinite(old).any():
        return np.broadcast_to(t, np.shape(rate))
    w = c.w_new[ii]
    return np.where(np.isfinite(old), w * t + (1.0 - w) * (old - rate * c.dt), t)


def _thickness_range(c: _Cells, r_min, r_max):
    """Smallest and largest thickness a draw can give each cell, over its rate range."""
    every = slice(None)
    lo = _thickness_mean(c, every, r_max) - TRUNC_SD * c.sig_post
    hi = _thickness_mean(c, every, r_min) + TRUNC_SD * c.sig_post
    return lo, hi


def _censored_lives(c: _Cells, rates: _Rates, n_draws, mrt):
    """The below-threshold part: its deepest loss is at most the threshold; taken at the
    threshold, growing at the rate of a measured cell of similar depth."""
    return _part_lives(np.full(n_draws, c.nominal - c.threshold), mrt, rates.rule(np.full(n_draws, c.threshold)))


def _part_lives(thickness, mrt, rate):
    """Lives to MRT and to zero thickness of a part of thickness ``thickness`` [mm] at
    ``rate`` [mm/y]."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return _life(thickness - mrt, rate), _life(thickness, rate)


def _life(margin, rate):
    """max(0, margin / rate); inf where the rate is 0 and margin > 0."""
    life = np.where(margin <= 0, 0.0, margin / rate)
    return np.where(np.isnan(life), np.inf, life)


def _hidden_depth(fit, T, n_draws, rng, n_fit=None, thr=None):
    """Predictive draws of the deepest loss over T blocks: bootstrap parameters, then
    :math:`F^{-1}(U^{1/T})`."""
    from .extremes import _bootstrap_params

    n_fit = int(n_fit or fit.n)
    thr = fit.threshold if thr is None else thr
    n_boot = n_draws if fit.distribution == "gumbel" else min(n_draws, 100)  # GEV refits cost more
    n_boot = min(n_boot, max(200, BOOT_MAXIMA // max(n_fit, 1)))
    loc, scale, shape, _ = _bootstrap_params(fit, n_fit, thr, n_boot=n_boot, seed=int(rng.integers(2**31)))
    if loc.size == 0:  # every refit failed: the fit itself (parameter uncertainty not carried)
        loc, scale, shape = np.array([fit.loc]), np.array([fit.scale]), np.array([fit.shape])
    j = rng.integers(0, loc.size, n_draws)
    u = rng.random(n_draws) ** (1.0 / T)
    xi = shape[j]
    small = np.abs(xi) < 1e-9
    # an area of far less than one block (T << 1) underflows u to 0: y = inf, a depth of
    # -inf, clipped to 0 below (the deepest loss over almost no area is almost surely none)
    with np.errstate(divide="ignore", invalid="ignore"):
        y = -np.log(u)  # GEV quantile, vectorised over the parameter sets (Coles 2001, eq. 3.4)
        d = loc[j] + scale[j] * np.where(small, -np.log(y), (y ** -np.where(small, 1.0, xi) - 1.0)
                                         / np.where(small, 1.0, xi))
    return np.maximum(np.asarray(d, dtype=float), 0.0)


def _unscanned_law(ze):
    """The law of the unscanned part's block maxima: the zone's fit, except that a GEV
    with a bounded upper tail (shape < 0) gives way to the Gumbel of the same block maxima
    (module notes)."""
    from .extremes import unscanned_law

    b = getattr(ze, "blocks", None)
    if b is None:
        return ze.fit
    return unscanned_law(ze.fit, b.maxima, censored=b.censored, threshold=b.threshold)


def _similar_depth(rng, d, depth_sorted):
    """Index of a measured cell of similar depth for each depth in ``d``, in the measured
    cells' loss ``depth_sorted``, ascending (module notes)."""
    n = depth_sorted.size
    w = max(5, int(0.02 * n))
    pos = np.clip(np.searchsorted(depth_sorted, d), 0, n - 1)
    start = np.clip(pos - w // 2, 0, max(n - w, 0))
    return np.minimum(start + rng.integers(0, min(w, n), np.shape(d)), n - 1)


def life_distributions(thickness, rates, zmap, mrt_map, extremes_depth, *, nominal, sigma_t, pitch,
                       n_draws=2000, seed=0, shrink=True, both_readings=True, sigma_old_extra=0.0,
                       floor_extremes=None, spots=None, as_found=None) -> dict:
    """:func:`zone_life_distribution` for every zone of a floor.

    Parameters
    ----------
    thickness : (M, N) ndarray
        Newer scan's thickness, NaN where unscanned (``Analysis.new.thickness``). [mm]
    rates : :class:`~scananalyse.rates.LossRates`
        ``Analysis.rates`` (``censored``, ``threshold``, rates and their intervals).
    zmap : :class:`~scananalyse.zones.ZoneMap`
        ``Analysis.zones``.
    mrt_map : (M, N) ndarray
        ``Analysis.mrt_map``. [mm]
    extremes_depth : dict
        ``Analysis.extremes_depth`` (zone -> ZoneExtremes with ``.fit``, ``.block_mm``).
    nominal : float
        Nominal thickness. [mm]
    sigma_t : float or (M, N) ndarray
        Thickness sigma (``rates.sigma_new``; a map may carry prove-up scatter). [mm]
    pitch : float
        Cell size. [mm]
    n_draws, seed : int
        Monte Carlo draws and seed. [-]
    shrink : bool
        Rates from their posteriors under each zone's rate distribution (module notes). [-]
    floor_extremes : ZoneExtremes, optional
        The whole floor's depth statistics (:func:`scananalyse.evlife.floor_fit`), lent to
        a zone whose own fit failed, as its extreme-value life borrows them: without it
        such a zone's unscanned part would be left out of its distribution.  A zone with
        no scanned cell is then drawn over its whole area, at the rates of the floor's
        measured cells of similar depth (:func:`floor_rate_rule`). [-]
    spots : dict, optional
        Zone name -> (thickness (k,), rate (k,), sigma) of the newer spot readings on cells
        the scan has no value at (:func:`scananalyse.readings.zone_spots`; sigma NaN: the
        scan's, ``sigma_t``, its median where a map). [mm], [mm/y], [mm]
    as_found : dict, optional
        This function's result on the floor as found, given for a repaired floor: each
        zone's unscanned part and spots are taken from it, not drawn again (a repair
        changes none of that metal), and so are its rate distribution and similar-depth
        cells (a repair changes no other cell's rates). [-]

    Returns
    -------
    dict
        Zone name -> :class:`LifeDistribution`.
    """
    out = {}
    sig_map = np.ndim(sigma_t) > 0
    old_map = _older_readings(thickness, rates) if both_readings else None
    s_old = float(np.hypot(rates.sigma_old, sigma_old_extra)) if old_map is not None else None
    s_scan = float(np.nanmedian(sigma_t) if sig_map else sigma_t)
    floor_rule = []  # made once, when a zone nobody scanned needs it
    meas_map = _measured(rates)
    r_top, r_under = _measured_points(rates, meas_map)
    scanned = np.isfinite(thickness)
    n_scanned = [np.count_nonzero(scanned & (zmap.labels == k)) for k in range(len(zmap.names))]
    for k in sorted(range(len(zmap.names)), key=lambda j: n_scanned[j] == 0):  # scanned zones first
        name = zmap.names[k]
        mask = zmap.labels == k
        area = float(zmap.areas_mm2[k])
        sel = mask & scanned
        ze = extremes_depth.get(name)
        if not ze and floor_extremes:  # borrowed, as the zone's extreme-value life does
            ze = floor_extremes
        fit = _unscanned_law(ze) if ze else None
        hidden_mm2 = max(0.0, area - np.count_nonzero(sel) * pitch * pitch)
        block = ze.block_mm if (ze and np.isfinite(ze.block_mm)) else np.nan
        # the fit is the law of the deepest loss over the scanned part of a counted block
        # (on average ``coverage`` of it), not over a whole block (module notes)
        cov = float(np.mean(ze.blocks.coverage)) if ze and getattr(ze, "blocks", None) is not None else 1.0
        T = hidden_mm2 / (block ** 2 * cov) if fit is not None and np.isfinite(block) and cov > 0 else 0.0
        cens = rates.censored[sel] if rates.censored is not None else None
        found = as_found.get(name) if as_found else None
        unseen = found.unseen if found is not None else None
        if not sel.any() and fit is not None and not floor_rule and unseen is None:
            only = [j for j in range(len(n_scanned)) if n_scanned[j]]
            if len(only) == 1 and out[zmap.names[only[0]]].reference is not None:
                # every scanned cell is in one zone: its rule is the floor's (the same cells)
                floor_rule.append(out[zmap.names[only[0]]].reference.rule)
            else:
                floor_rule.append(floor_rate_rule(thickness, rates, zmap.labels >= 0, nominal=nominal,
                                                  sigma_t=sigma_t, shrink=shrink, measured=meas_map))
        zs = (spots or {}).get(name)
        # the zone's MRT: a number where it is one over the zone's scanned cells (the usual case)
        m_lo = float(np.min(mrt_map, where=sel, initial=np.inf))
        mrt_z = m_lo if not sel.any() or m_lo == np.max(mrt_map, where=sel, initial=-np.inf) else mrt_map[sel]
        out[name] = zone_life_distribution(
            thickness[sel], r_top[sel], r_under[sel], rates.rate_top_lo[sel],
            rates.rate_top_hi[sel], rates.rate_under_lo[sel], rates.rate_under_hi[sel],
            mrt_z if sel.any() else float(np.min(mrt_map, where=mask, initial=np.inf)),
            sigma_t=(sigma_t[sel] if sig_map else sigma_t), nominal=nominal, censored=cens,
            measured=meas_map[sel],
            threshold=rates.threshold, hidden_fit=fit, hidden_T=T, n_draws=n_draws, seed=seed + k,
            shrink=shrink, older=None if old_map is None else old_map[sel], sigma_old=s_old,
            dt_years=rates.dt_years if old_map is not None else None,
            spots=None if zs is None else (zs[0], zs[1], zs[2] if np.isfinite(zs[2]) else s_scan),
            floor_rule=floor_rule[0] if floor_rule else None, unseen=unseen,
            reference=found.reference if found is not None else None)
    return {name: out[name] for name in zmap.names}


def _measured(rates):
    """The map of cells whose rates were measured: the point is not above both sides'
    measured (short- or long-term) rates (an assumed rate is)."""
    meas = np.ones(np.shape(rates.rate_top), bool)
    for pnt, sh, lg in ((rates.rate_top, rates.rate_short_top, rates.rate_long_top),
                        (rates.rate_under, rates.rate_short_under, rates.rate_long_under)):
        meas &= ~(np.nan_to_num(pnt) > np.nan_to_num(np.fmax(sh, lg)) + 1e-6)
    return meas


def _measured_points(rates, meas):
    """The point rates per side as drawn: on a cell whose rate was assumed (not ``meas``),
    each side's measured rate (the greater of short- and long-term, where below the
    assumed point), so that the cell's data are its measured rate below the assumed one
    (:func:`_total_rate`); elsewhere the points as they are."""
    if meas.all():
        return rates.rate_top, rates.rate_under
    idx = np.flatnonzero(~meas)
    out = []
    for pnt, sh, lg, lo in ((rates.rate_top, rates.rate_short_top, rates.rate_long_top, rates.rate_top_lo),
                            (rates.rate_under, rates.rate_short_under, rates.rate_long_under, rates.rate_under_lo)):
        p = pnt.ravel()[idx]
        m = np.fmax(sh.ravel()[idx], lg.ravel()[idx])
        # only a measured rate within the cell's interval (a patch's cells are at the rate
        # kept under it: their interval is that point)
        x = pnt.copy()
        x.ravel()[idx] = np.where(m >= lo.ravel()[idx], np.fmin(p, m), p)
        out.append(x)
    return tuple(out)


def floor_rate_rule(thickness, rates, mask, *, nominal, sigma_t, shrink=True, measured=None):
    """The similar-depth rate rule over the measured, uncensored cells of ``mask`` (the
    whole floor), as ``rule(rng, d)`` -> rate draws at depths ``d``; None when ``mask``
    holds no scanned cell.  Lent to a zone nobody scanned, as its extreme-value life
    borrows the floor's projection (:func:`scananalyse.evlife.hidden_parts`).  Over more
    than :data:`REF_CELLS` such cells, a :func:`_sample` of them.  ``measured``: the map of
    :func:`_measured`, when made."""
    sel = mask & np.isfinite(thickness)
    if not sel.any():
        return None
    meas = _measured(rates) if measured is None else measured
    # the rule's cells as _scanned_cells takes them: uncensored (all when every one is
    # censored), measured (all when none is)
    if rates.censored is not None and rates.threshold and np.any(sel & ~rates.censored):
        sel = sel & ~rates.censored
    if np.any(sel & meas):
        sel = sel & meas
    idx = _sample(np.flatnonzero(sel))

    def at(a):
        return a if np.ndim(a) == 0 else np.asarray(a).ravel()[idx]
    c = _scanned_cells(at(thickness), tuple(at(a) for a in (rates.rate_top, rates.rate_under, rates.rate_top_lo,
                                                              rates.rate_top_hi, rates.rate_under_lo,
                                                              rates.rate_under_hi)),
                       0.0, sigma_t=at(sigma_t), nominal=nominal,
                       censored=None if rates.censored is None else at(rates.censored), threshold=rates.threshold,
                       measured=at(meas))
    return _reference(c, shrink=shrink).rule


def _older_readings(thickness, rates):
    """The older scan's reading on the newer grid where it is a reading of the same metal:
    both scans report a loss (not censored now, not crossed below the older threshold),
    no repair seen or recorded; NaN elsewhere.  None without an older scan. [mm]"""
    g = getattr(rates, "growth", None)
    if g is None or not np.isfinite(rates.dt_years or np.nan) or not np.isfinite(g).any():
        return None
    ok = np.isfinite(g) & ~np.asarray(rates.crossed, bool) & ~np.asarray(rates.repaired, bool)
    if rates.censored is not None:
        ok &= ~rates.censored
    if rates.repair_record is not None:
        ok &= ~np.asarray(rates.repair_record, bool)
    return np.where(ok, thickness + g, np.nan)


def plot_life_curve(dist: LifeDistribution, *, years=None, due_y=None, ax=None, label=None):
    """P(reach MRT by t) and P(leak by t) of one zone; returns the figure."""
    import matplotlib.pyplot as plt

    if ax is None:
        fig, ax = plt.subplots(figsize=(6, 4))
    else:
        fig = ax.figure
    y, pm, pl = dist.curve(years)
    ax.plot(y, pm, label=f"{label + ': ' if label else ''}reach MRT")
    ax.plot(y, pl, "--", label=f"{label + ': ' if label else ''}leak")
    if due_y is not None and np.isfinite(due_y):
        ax.axvline(due_y, color="grey", lw=0.8)
    ax.set_xlabel("years after the newer inspection")
    ax.set_ylabel("probability")
    ax.set_ylim(0, 1)
    ax.legend()
    return fig


def repaired_rates(lr, repaired_maps: dict):
    """The rates of the floor as repaired, for :func:`life_distributions`.

    Patched cells (``repaired_maps["patched"]``) are new plate at the rates kept under the
    patch (``rate_*_repaired``): their interval is that point, and they are no longer
    below the threshold; every other cell keeps its own rates and intervals.

    Parameters
    ----------
    lr : :class:`~scananalyse.rates.LossRates` as found.
    repaired_maps : ``Analysis.repaired_maps`` (``patched``, ``rate_top_repaired``,
        ``rate_under_repaired``).
    """
    import dataclasses

    cov = np.asarray(repaired_maps["patched"], dtype=bool)
    if not cov.any():
        return lr
    rt, ru = repaired_maps["rate_top_repaired"], repaired_maps["rate_under_repaired"]
    kw = {}
    for side, r in (("top", rt), ("under", ru)):
        kw[f"rate_{side}"] = r
        for b in ("lo", "hi"):
            kw[f"rate_{side}_{b}"] = np.where(cov, r, getattr(lr, f"rate_{side}_{b}"))
    cens = None if lr.censored is None else lr.censored & ~cov
    # a patch is new metal: the older scan's reading there is of the plate it covers
    growth = None if lr.growth is None else np.where(cov, np.nan, lr.growth)
    return dataclasses.replace(lr, censored=cens, growth=growth, **kw)
