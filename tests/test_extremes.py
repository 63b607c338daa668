"""Tests of scananalyse.extremes against published values, reference libraries
and synthetic ground truth.  The source of every check is named beside it."""

from __future__ import annotations

import math
import pathlib
import time

import numpy as np
import pandas as pd
import pytest
from scipy import optimize, stats

from scananalyse import extremes as ex
from scananalyse.errors import FitError, InputError

DATA = pathlib.Path(__file__).parent / "data"


@pytest.fixture(scope="module")
def portpirie():
    # Coles (2001) Port Pirie annual maximum sea levels, 65 values (tests/data/SOURCES.md)
    x = pd.read_csv(DATA / "portpirie.csv")["SeaLevel"].to_numpy(float)
    assert x.size == 65
    return x


# --------------------------------------------------------------------------
# Published check values: Port Pirie (Coles 2001, pp. 59-60) and a textbook Gumbel
# --------------------------------------------------------------------------
def test_portpirie_gev_mle_coles(portpirie):
    fit = ex.fit_gev_mle(portpirie)
    # Coles (2001) p. 59: (mu, sigma, xi) = (3.87, 0.198, -0.050), quoted to that precision
    assert round(fit.loc, 2) == 3.87
    assert round(fit.scale, 3) == 0.198
    assert round(fit.shape, 3) == -0.050
    # scipy.stats.genextreme (c = -xi); same data, independent optimiser
    c, loc, scale = stats.genextreme.fit(portpirie)
    assert fit.shape == pytest.approx(-c, abs=2e-4)
    assert fit.loc == pytest.approx(loc, abs=1e-4)
    assert fit.scale == pytest.approx(scale, abs=1e-4)
    # our likelihood is at least scipy's at scipy's optimum (we are at the maximum)
    assert fit.loglik >= np.sum(stats.genextreme.logpdf(portpirie, c, loc, scale)) - 1e-9


def test_portpirie_return_levels_coles(portpirie):
    fit = ex.fit_gev_mle(portpirie)
    z10, z100 = ex.return_level(fit, [10.0, 100.0])
    # Coles (2001) p. 60: 10-year 4.30, 100-year 4.69
    assert round(z10, 2) == 4.30
    assert round(z100, 2) == 4.69
    # Coles (2001) p. 60: 95 % delta-method intervals [4.19, 4.41] and [4.38, 5.00];
    # tolerance 0.01: Coles rounds from 3-figure parameters
    b10 = ex.return_level_bounds(fit, portpirie, 10.0, level=0.95, one_sided=False,
                                 method="delta")
    b100 = ex.return_level_bounds(fit, portpirie, 100.0, level=0.95, one_sided=False,
                                  method="delta")
    print("delta 95%:", b10, b100)
    assert b10.lower == pytest.approx(4.19, abs=0.01) and b10.upper == pytest.approx(4.41, abs=0.01)
    assert b100.lower == pytest.approx(4.38, abs=0.01)
    assert b100.upper == pytest.approx(5.00, abs=0.01)
    # Coles (2001) §3.3.3 (from memory): the profile interval of a long return level is
    # skewed upwards against the delta one; it must contain the estimate
    p100 = ex.return_level_bounds(fit, portpirie, 100.0, level=0.95, one_sided=False,
                                  method="profile")
    print("profile 95%:", p100)
    assert p100.lower < z100 < p100.upper
    assert p100.upper - z100 > z100 - p100.lower
    assert p100.upper > b100.upper


def test_portpirie_gumbel_mle(portpirie):
    fit = ex.fit_gumbel_mle(portpirie)
    # domain.md §7: Gumbel MLE 3.8694 / 0.1949 [reproduced with scipy]
    assert round(fit.loc, 4) == 3.8694
    assert round(fit.scale, 4) == 0.1949
    # scipy.stats.gumbel_r.fit (independent MLE)
    loc, scale = stats.gumbel_r.fit(portpirie)
    assert fit.loc == pytest.approx(loc, rel=1e-7)
    assert fit.scale == pytest.approx(scale, rel=1e-6)
    assert fit.loglik == pytest.approx(np.sum(stats.gumbel_r.logpdf(portpirie, loc, scale)),
                                       abs=1e-8)


def test_portpirie_gumbel_lmoments(portpirie):
    fit = ex.fit_gumbel_lmoments(portpirie)
    # domain.md §7: L-moments 3.8685 / 0.1943 [reproduced with lmoments3]
    assert round(fit.loc, 4) == 3.8685
    assert round(fit.scale, 4) == 0.1943
    # lmoments3 package (Hosking's L-moment estimators)
    from lmoments3 import distr
    ref = distr.gum.lmom_fit(portpirie)
    assert fit.loc == pytest.approx(ref["loc"], rel=1e-9)
    assert fit.scale == pytest.approx(ref["scale"], rel=1e-9)


def test_textbook_gumbel_150_90():
    # domain.md §7: Gumbel mu=150, sigma=90 [derived; a textbook exercise]
    assert round(float(ex.gumbel_cdf(150.0, 150.0, 90.0)), 3) == 0.368
    assert round(float(ex.gumbel_cdf(300.0, 150.0, 90.0)), 3) == 0.828
    assert round(float(ex.gumbel_ppf(0.9, 150.0, 90.0)), 1) == 352.5
    assert round(ex.gumbel_mean(150.0, 90.0), 1) == 201.9
    # scipy.stats.gumbel_r for the same functions
    assert float(ex.gumbel_cdf(300.0, 150, 90)) == pytest.approx(stats.gumbel_r.cdf(300, 150, 90))
    assert float(ex.gumbel_ppf(0.9, 150, 90)) == pytest.approx(stats.gumbel_r.ppf(0.9, 150, 90))
    assert ex.gumbel_mean(150, 90) == pytest.approx(stats.gumbel_r.mean(150, 90))


def test_gev_functions_against_scipy():
    # scipy.stats.genextreme with c = -xi (Coles' convention differs in sign)
    x = np.linspace(-1.0, 4.0, 41)
    for xi in (-0.3, -0.05, 0.0, 0.2):
        assert np.allclose(ex.gev_cdf(x, 1.0, 0.7, xi), stats.genextreme.cdf(x, -xi, 1.0, 0.7))
        p = np.linspace(0.01, 0.99, 21)
        assert np.allclose(ex.gev_ppf(p, 1.0, 0.7, xi), stats.genextreme.ppf(p, -xi, 1.0, 0.7))


def test_pyextremes_return_levels(portpirie):
    # pyextremes (test-only reference library): block maxima of one year, MLE fits
    from pyextremes import EVA
    idx = pd.to_datetime([f"{1923 + i}-06-30" for i in range(portpirie.size)])
    series = pd.Series(portpirie, index=idx, name="sea_level")
    eva = EVA(series)
    eva.set_extremes(series, method="BM", extremes_type="high", block_size="365.2425D",
                     errors="ignore")
    for dist, ours in (("genextreme", ex.fit_gev_mle(portpirie)),
                       ("gumbel_r", ex.fit_gumbel_mle(portpirie))):
        eva.fit_model(model="MLE", distribution=dist)
        ref, _, _ = eva.get_return_value(return_period=[10, 100],
                                         return_period_size="365.2425D", alpha=None)
        mine = ex.return_level(ours, [10.0, 100.0])
        print(dist, "pyextremes", ref, "ours", mine)
        assert np.allclose(mine, ref, rtol=2e-4)


# --------------------------------------------------------------------------
# Censoring
# --------------------------------------------------------------------------
def test_censored_mle_is_the_censored_likelihood_maximum():
    # scipy.stats.gumbel_r logpdf / logcdf maximised by scipy.optimize: the censored
    # likelihood of Coles (2001) written independently of our closed form
    rng = np.random.default_rng(11)
    x = stats.gumbel_r.rvs(1.5, 0.4, size=80, random_state=rng)
    u = float(np.quantile(x, 0.3))
    c = x < u
    fit = ex.fit_gumbel_mle(x, censored=c, threshold=u)

    def nll(p):
        if p[1] <= 0:
            return np.inf
        return -(stats.gumbel_r.logpdf(x[~c], p[0], p[1]).sum()
                 + c.sum() * stats.gumbel_r.logcdf(u, p[0], p[1]))

    ref = optimize.minimize(nll, [1.0, 1.0], method="Nelder-Mead",
                            options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 5000}).x
    assert fit.loc == pytest.approx(ref[0], abs=1e-6)
    assert fit.scale == pytest.approx(ref[1], abs=1e-6)
    assert fit.loglik == pytest.approx(-nll(ref), abs=1e-8)
    assert fit.n_censored == int(c.sum()) and fit.method == "censored-mle"

    gev = ex.fit_gev_mle(x, censored=c, threshold=u)

    def nll3(p):
        if p[1] <= 0:
            return np.inf
        v = -(stats.genextreme.logpdf(x[~c], -p[2], p[0], p[1]).sum()
              + c.sum() * stats.genextreme.logcdf(u, -p[2], p[0], p[1]))
        return v if np.isfinite(v) else np.inf

    r3 = optimize.minimize(nll3, [fit.loc, fit.scale, 0.0], method="Nelder-Mead",
                           options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 8000})
    assert gev.loglik == pytest.approx(-r3.fun, abs=1e-6)
    assert gev.shape == pytest.approx(r3.x[2], abs=1e-3)


def test_censored_fit_unbiased_naive_biased():
    # synthetic truth: scipy.stats.gumbel_r draws, left-censored at the 40th percentile
    mu, sigma, n = 2.0, 0.5, 100
    u = float(stats.gumbel_r.ppf(0.4, mu, sigma))
    cen, rep, drop = [], [], []
    for seed in range(200):
        x = stats.gumbel_r.rvs(mu, sigma, size=n, random_state=np.random.default_rng(seed))
        c = x < u
        f = ex.fit_gumbel_mle(x, censored=c, threshold=u)
        cen.append((f.loc, f.scale))
        f = ex.fit_gumbel_mle(np.where(c, u, x))      # naive: censored read as the threshold
        rep.append((f.loc, f.scale))
        f = ex.fit_gumbel_mle(x[~c])                  # naive: censored blocks dropped
        drop.append((f.loc, f.scale))
    bias = {k: (np.mean(v, axis=0) - [mu, sigma]) / sigma
            for k, v in (("censored", cen), ("replaced", rep), ("dropped", drop))}
    print("mean bias / sigma (loc, scale):", bias)
    # common practice, no source: 3 % of the scale is well inside the sampling noise
    assert np.all(np.abs(bias["censored"]) < 0.03)
    assert np.abs(bias["replaced"]).max() > 0.2
    assert np.abs(bias["dropped"]).max() > 0.2


# --------------------------------------------------------------------------
# Parameter recovery, moments, degenerate inputs
# --------------------------------------------------------------------------
def test_parameter_recovery_gumbel_and_gev():
    rng = np.random.default_rng(5)
    # scipy.stats.gumbel_r draws; Gumbel MLE asymptotic sd: sigma*1.053/sqrt(n) for loc,
    # sigma*0.780/sqrt(n) for scale (Coles 2001 §3.3, information matrix; from memory)
    n = 4000
    x = stats.gumbel_r.rvs(3.0, 0.8, size=n, random_state=rng)
    for f in (ex.fit_gumbel_mle(x), ex.fit_gumbel_lmoments(x), ex.fit_gumbel_moments(x)):
        assert abs(f.loc - 3.0) < 4 * 0.8 * 1.053 / math.sqrt(n) * 1.3, f
        assert abs(f.scale - 0.8) < 4 * 0.8 * 0.780 / math.sqrt(n) * 1.5, f
    # scipy.stats.genextreme draws with c = 0.2, i.e. xi = -0.2 (bounded tail)
    y = stats.genextreme.rvs(0.2, loc=1.0, scale=0.5, size=3000, random_state=rng)
    g = ex.fit_gev_mle(y)
    assert g.shape == pytest.approx(-0.2, abs=0.05)
    assert g.loc == pytest.approx(1.0, abs=0.04)
    assert g.scale == pytest.approx(0.5, abs=0.03)
    lr = ex.lr_test_gumbel_vs_gev(y)
    assert lr.reject_gumbel and lr.p_value < 1e-6


def test_lr_test_against_scipy(portpirie):
    # deviance from scipy.stats fits and log-densities (Coles 2001 §3.4: D = 2(l1 - l0))
    lr = ex.lr_test_gumbel_vs_gev(portpirie)
    c, loc, scale = stats.genextreme.fit(portpirie)
    l1 = stats.genextreme.logpdf(portpirie, c, loc, scale).sum()
    l0 = stats.gumbel_r.logpdf(portpirie, *stats.gumbel_r.fit(portpirie)).sum()
    assert lr.deviance == pytest.approx(2 * (l1 - l0), abs=1e-4)
    assert lr.p_value == pytest.approx(stats.chi2.sf(2 * (l1 - l0), 1), abs=1e-4)
    # Coles (2001) p. 60 (from memory): Port Pirie gives no evidence against the Gumbel
    assert not lr.reject_gumbel


@pytest.mark.parametrize("fitter", [ex.fit_gumbel_mle, ex.fit_gumbel_lmoments,
                                    ex.fit_gumbel_moments, ex.fit_gev_mle])
def test_degenerate_inputs_raise(fitter):
    # common practice, no source: no fit from 4 points or from constant data
    with pytest.raises(FitError, match="uncensored values, need at least 5"):
        fitter([1.0, 2.0, 3.0, 4.0])
    with pytest.raises(FitError, match="zero spread"):
        fitter(np.full(20, 2.5))


def test_censoring_input_errors():
    x = np.array([0.0, 0.0, 0.0, 1.2, 1.5, 1.7, 2.0, 2.2, 2.9])
    c = x < 1.0
    with pytest.raises(InputError, match="threshold"):
        ex.fit_gumbel_mle(x, censored=c)
    with pytest.raises(FitError, match="4 uncensored"):
        ex.fit_gumbel_mle(x[:7], threshold=1.0)
    with pytest.raises(InputError, match="non-finite"):
        ex.fit_gumbel_lmoments(np.r_[x, np.nan])
    with pytest.raises(InputError, match="below the threshold"):
        ex.fit_gumbel_mle(x, censored=x < 0.5, threshold=1.3)
    with pytest.raises(InputError, match="'T' must be > 1"):
        ex.return_level(ex.fit_gumbel_mle(x, threshold=1.0), 1.0)


# --------------------------------------------------------------------------
# Bounds
# --------------------------------------------------------------------------
def test_bootstrap_speed_and_reproducibility():
    x = stats.gumbel_r.rvs(2.0, 0.5, size=300, random_state=np.random.default_rng(3))
    fit = ex.fit_gumbel_mle(x)
    ex.return_level_bounds(fit, x, 100.0, n_boot=50)  # warm-up
    t0 = time.perf_counter()
    b = ex.return_level_bounds(fit, x, 100.0, n_boot=1000, seed=7)
    dt = time.perf_counter() - t0
    print(f"bootstrap 1000 x 300 blocks: {dt * 1e3:.1f} ms")
    assert dt < 1.0  # issue 5: a thousand resamples well under a second
    assert b.n_failed == 0 and b.upper > b.estimate
    again = ex.return_level_bounds(fit, x, 100.0, n_boot=1000, seed=7)
    assert again.upper == b.upper and math.isnan(again.lower)  # seeded, one-sided
    # censored bootstrap also vectorised
    u = float(np.quantile(x, 0.4))
    fc = ex.fit_gumbel_mle(x, threshold=u)
    t0 = time.perf_counter()
    bc = ex.return_level_bounds(fc, x, 100.0, threshold=u)
    assert time.perf_counter() - t0 < 1.0 and bc.upper > bc.estimate


def _resamples(fit, n_boot, seed):
    """Samples of ``fit`` as the parametric bootstrap draws them (censored at its threshold)."""
    sample = fit.ppf(np.random.default_rng(seed).random((n_boot, fit.n)))
    u = fit.threshold
    unc = sample >= u if u is not None else np.ones(sample.shape, bool)
    return np.where(unc, sample, u if u is not None else 0.0), unc, u


def test_batched_gev_refits_match_the_one_by_one_search():
    # the Newton steps on all resamples at once reach the optimum the Nelder-Mead search
    # from the same start reaches (to its tolerance), on GEV fits of either shape sign,
    # censored or not, and most of them converge (else the one-by-one search does the work)
    worst, n_cmp, n_conv = 0.0, 0, 0
    for xi in (-0.35, -0.1, 0.1, 0.25):
        for n, u in ((40, None), (200, None), (200, 0.9)):
            fit = ex.GEVFit(loc=1.0, scale=0.3, shape=xi, method="censored-mle" if u else "mle", loglik=0.0,
                            n=n, n_censored=0, threshold=u)
            x, unc, u = _resamples(fit, 40, seed=int(100 * xi) + n)
            loc, scale, shape, conv = ex._gev_mle_batch(x, unc, u, (fit.loc, fit.scale, fit.shape))
            n_conv += int(conv.sum())
            for b in np.flatnonzero(conv & (shape > -0.5)):
                xu, k = x[b][unc[b]], int((~unc[b]).sum())
                nm = ex._gev_optimise(xu, k, u, (fit.loc, fit.scale, fit.shape), restarts=False)
                assert nm is not None
                ll = ex._gev_loglik(loc[b], scale[b], shape[b], xu, k, u)
                assert ll >= nm[3] - 1e-8  # never a worse likelihood than the search's
                worst = max(worst, abs(loc[b] - nm[0]) / 0.3, abs(scale[b] - nm[1]) / 0.3, abs(shape[b] - nm[2]))
                n_cmp += 1
    print(f"{n_cmp} refits compared, worst parameter difference {worst:.1e}")
    assert n_conv >= 0.9 * 12 * 40 and worst < 1e-5


def test_batched_gev_refits_against_scipy_genextreme_fit():
    # external check: scipy.stats.genextreme.fit (its shape c = -xi) on a few uncensored
    # samples; ours reaches at least its likelihood, and the same parameters to its precision
    fit = ex.GEVFit(loc=2.0, scale=0.8, shape=-0.2, method="mle", loglik=0.0, n=150)
    x, unc, u = _resamples(fit, 4, seed=5)
    loc, scale, shape, conv = ex._gev_mle_batch(x, unc, u, (fit.loc, fit.scale, fit.shape))
    assert conv.all()
    for b in range(4):
        c, sl, ss = stats.genextreme.fit(x[b], -fit.shape, loc=fit.loc, scale=fit.scale)
        ll_sp = float(np.sum(stats.genextreme.logpdf(x[b], c, sl, ss)))
        ll = float(np.sum(stats.genextreme.logpdf(x[b], -shape[b], loc[b], scale[b])))
        assert ll >= ll_sp - 1e-6
        assert shape[b] == pytest.approx(-c, abs=2e-3) and loc[b] == pytest.approx(sl, abs=2e-3)
        assert scale[b] == pytest.approx(ss, abs=2e-3)


def test_bootstrap_coverage_roughly_nominal():
    # synthetic truth: the true 100-block return level of Gumbel(2, 0.5)
    true = float(stats.gumbel_r.ppf(1 - 1 / 100, 2.0, 0.5))
    hits = []
    for seed in range(120):
        x = stats.gumbel_r.rvs(2.0, 0.5, size=60, random_state=np.random.default_rng(1000 + seed))
        fit = ex.fit_gumbel_mle(x)
        b = ex.return_level_bounds(fit, x, 100.0, level=0.9, n_boot=400, seed=seed)
        hits.append(true <= b.upper)
    cov = float(np.mean(hits))
    print("bootstrap 90 % one-sided coverage:", cov)
    # loose: 120 seeds, binomial sd ~ 0.03; the percentile bootstrap under-covers a little
    # at 60 blocks (measured 0.81 over 300 seeds; profile 0.86, delta 0.82)
    assert 0.75 <= cov <= 0.97


def test_gumbel_profile_bound_against_scipy_profile():
    # the deviance at our profile bound, recomputed with scipy.stats.gumbel_r.logpdf and
    # a scalar maximisation, equals chi2_1(0.8) (one-sided 90 %, Coles 2001 §3.3.3)
    x = stats.gumbel_r.rvs(2.0, 0.5, size=40, random_state=np.random.default_rng(9))
    fit = ex.fit_gumbel_mle(x)
    T = 50.0
    b = ex.return_level_bounds(fit, x, T, level=0.9, method="profile")
    y = -math.log1p(-1 / T)
    lhat = stats.gumbel_r.logpdf(x, fit.loc, fit.scale).sum()

    def lp(z):
        r = optimize.minimize_scalar(
            lambda s: -stats.gumbel_r.logpdf(x, z + s * math.log(y), s).sum(),
            bounds=(0.05, 3.0), method="bounded", options={"xatol": 1e-10})
        return -r.fun

    assert 2 * (lhat - lp(b.upper)) == pytest.approx(stats.chi2.ppf(0.8, 1), abs=1e-4)
    d = ex.return_level_bounds(fit, x, T, level=0.9, method="delta")
    assert b.upper == pytest.approx(d.upper, rel=0.05)  # asymptotically equal


# --------------------------------------------------------------------------
# Goodness of fit
# --------------------------------------------------------------------------
def test_goodness_of_fit_against_scipy(portpirie):
    fit = ex.fit_gumbel_mle(portpirie)
    # scipy.stats.anderson fits gumbel_r by MLE itself and returns A^2
    ref = stats.anderson(portpirie, "gumbel_r", method="interpolate").statistic
    assert ex.anderson_darling(portpirie, fit) == pytest.approx(ref, rel=1e-6)
    # scipy.stats.kstest with the same parameters
    ks = stats.kstest(portpirie, "gumbel_r", args=(fit.loc, fit.scale)).statistic
    assert ex.ks_statistic(portpirie, fit) == pytest.approx(ks, rel=1e-12)


def test_gringorten_and_probability_plot(portpirie):
    # Gringorten (1963): (i - 0.44)/(n + 0.12); n = 1 gives 0.5, positions symmetric
    assert ex.gringorten_positions(1)[0] == pytest.approx(0.5)
    p = ex.gringorten_positions(65)
    assert p[0] == pytest.approx(0.56 / 65.12) and np.allclose(p + p[::-1], 1.0)
    fit = ex.fit_gumbel_mle(portpirie)
    pp = ex.probability_plot(portpirie, fit)
    assert np.array_equal(pp.x, np.sort(portpirie))
    assert np.allclose(pp.reduced, -np.log(-np.log(p)))
    # Gumbel probability paper: the fit is the line x = mu + sigma*y (Shibata 1994)
    assert np.allclose(pp.line_x, fit.loc + fit.scale * pp.line_reduced)
    # censored blocks take the lowest ranks and are not plotted
    c = portpirie < 3.8
    pc = ex.probability_plot(portpirie, fit, censored=c)
    assert pc.x.size == (~c).sum() and np.allclose(pc.p, p[c.sum():])
    assert set(pd.DataFrame(pc.table()).columns) == {"x", "p", "reduced", "fitted"}


# --------------------------------------------------------------------------
# Block maxima
# --------------------------------------------------------------------------
def _brute_tiles(v, valid, b, cmin, thr):
    m, n = v.shape
    out = []
    for bi in range(-(-m // b)):
        for bj in range(-(-n // b)):
            sl = (slice(bi * b, (bi + 1) * b), slice(bj * b, (bj + 1) * b))
            ok = valid[sl]
            cov = ok.sum() / (b * b)
            if ok.sum() == 0 or cov < cmin:
                continue
            vals = v[sl][ok & np.isfinite(v[sl])]
            mx = vals.max() if vals.size else np.nan
            cen = (not vals.size) or (thr is not None and mx < thr)
            out.append((bi, bj, mx, cen, cov))
    return out


def test_block_maxima_against_brute_force():
    # synthetic truth: a plain double loop over tiles
    rng = np.random.default_rng(2)
    v = rng.gumbel(1.0, 0.4, (37, 53))
    valid = rng.random(v.shape) > 0.35
    v[rng.random(v.shape) < 0.1] = np.nan      # valid NaN = censored-unknown cells
    v[:8, :8] = np.nan                         # a whole tile censored-unknown
    valid[:8, :8] = True
    for b, thr in ((8, 1.2), (5, None), (1, 1.0)):
        bm = ex.block_maxima(v, valid=valid, block_cells=b, min_coverage=0.5, threshold=thr)
        ref = _brute_tiles(v, valid, b, 0.5, thr)
        assert bm.n_blocks == len(ref)
        assert np.array_equal(bm.keys, np.array([(r[0], r[1]) for r in ref]))
        assert np.allclose(bm.maxima, [r[2] for r in ref], equal_nan=True)
        assert np.array_equal(bm.censored, [r[3] for r in ref])
        assert np.allclose(bm.coverage, [r[4] for r in ref])
        assert bm.block_area_cells == b * b
    bm = ex.block_maxima(v, valid=valid, block_cells=8, threshold=1.2)
    assert bm.censored[0] and np.isnan(bm.maxima[0])   # the censored-unknown tile
    # float32 input keeps working (big grids are float32)
    b32 = ex.block_maxima(v.astype(np.float32), valid=valid, block_cells=8, threshold=1.2)
    assert np.allclose(b32.maxima, bm.maxima, equal_nan=True, rtol=1e-6)


def test_block_maxima_labels_against_brute_force():
    rng = np.random.default_rng(4)
    v = rng.gumbel(1.0, 0.4, (30, 40))
    lab = (np.arange(30)[:, None] // 7) * 10 + (np.arange(40)[None, :] // 9)
    lab[:, :3] = -1                            # no plate
    v[rng.random(v.shape) < 0.45] = np.nan
    bm = ex.block_maxima(v, labels=lab, min_coverage=0.5, threshold=1.0)
    ref = []
    for k in np.unique(lab[lab >= 0]):
        sel = lab == k
        ok = np.isfinite(v) & sel
        if ok.sum() / sel.sum() >= 0.5:
            mx = v[ok].max()
            ref.append((k, mx, mx < 1.0, sel.sum()))
    assert np.array_equal(bm.keys, [r[0] for r in ref])
    assert np.allclose(bm.maxima, [r[1] for r in ref])
    assert np.array_equal(bm.censored, [r[2] for r in ref])
    assert np.array_equal(bm.area_cells, [r[3] for r in ref])
    assert bm.block_area_cells == pytest.approx(np.mean([r[3] for r in ref]))


def test_block_maxima_coverage_rule():
    # common practice, no source: a block counts at exactly min_coverage, not below
    v = np.ones((4, 8))
    valid = np.zeros((4, 8), bool)
    valid[:, :4].flat[:8] = True               # tile 0: 8 of 16 cells = 50 %
    valid[:, 4:].flat[:7] = True               # tile 1: 7 of 16 cells < 50 %
    bm = ex.block_maxima(v, valid=valid, block_cells=4, min_coverage=0.5)
    assert bm.n_blocks == 1 and bm.coverage[0] == 0.5 and bm.n_candidates == 2
    assert ex.block_maxima(v, valid=valid, block_cells=4, min_coverage=0.4).n_blocks == 2
    with pytest.raises(InputError, match="give exactly one"):
        ex.block_maxima(v)


# --------------------------------------------------------------------------
# Zones
# --------------------------------------------------------------------------
def _gumbel_pit_field(seed, n=400, p=0.002, beta=0.5):
    """Sparse pits (probability p per cell) with exponential depths (mean beta).

    The deepest pit in a block of N cells is then Gumbel(beta ln(N p), beta) above 0
    (Poisson count of exponential marks; Coles 2001 §3.1 / Shibata 1994), so the
    whole-zone maximum has a known law.
    """
    rng = np.random.default_rng(seed)
    pit = rng.random((n, n)) < p
    return np.where(pit, rng.exponential(beta, (n, n)), 0.0).astype(np.float32)


def _hide_and_censor(truth, thr):
    obs = truth.copy()
    obs[:, 150:170] = np.nan                   # a seam band
    obs[300:360, 300:360] = np.nan             # an obstruction
    obs[np.isfinite(obs) & (obs < thr)] = 0.0  # MFL reads nominal below the threshold
    return obs


def test_zone_extremes_gumbel_field_coverage():
    # synthetic truth: block maxima are Gumbel; 16 m^2 zone, 0.5 m blocks, T = 64
    n_seeds, rl_hits, up_hits, pred_hits = 30, 0, 0, 0
    for seed in range(n_seeds):
        truth = _gumbel_pit_field(seed)
        obs = _hide_and_censor(truth, 1.0)
        z = ex.zone_extremes(obs, np.ones(obs.shape, bool), pitch_mm=10.0,
                             zone_area_mm2=4000.0 ** 2, block_mm=500.0, threshold=1.0,
                             n_boot=500, seed=seed)
        assert z and z.T == pytest.approx(64.0) and z.n_censored > 10
        tm = float(truth.max())
        rl_hits += tm <= z.depth_eva_mm
        up_hits += tm <= z.depth_eva_upper_mm
        pred_hits += tm <= z.depth_pred_upper_mm
    print(f"whole-zone max covered: return level {rl_hits}/{n_seeds}, its 90 % bound "
          f"{up_hits}/{n_seeds}, predictive 90 % bound {pred_hits}/{n_seeds}")
    # Coles 2001 §3.1 (derived): P(max over T blocks <= x_T) = (1 - 1/T)^T ~ e^-1 = 0.37
    assert 0.1 <= rl_hits / n_seeds <= 0.65
    assert up_hits >= rl_hits
    # the predictive 90 % bound on the deepest value covers it in most seeds
    assert pred_hits / n_seeds >= 0.8


def test_zone_extremes_on_synth_floors():
    # synthetic truth from scananalyse.synth: shell margin, sump, column base and seam
    # bands unscanned, hidden pits, MFL threshold 1 mm
    from scananalyse import synth
    hits = 0
    seeds = range(4)
    for seed in seeds:
        pair = synth.make_pair(seed=seed)
        new, tr = pair.new, pair.truth
        loss = (new.meta.nominal - new.thickness).astype(np.float32)
        yy, xx = new.grid_xy()
        r = tr.diameter_mm / 2
        zone = (xx - tr.centre[0]) ** 2 + (yy - tr.centre[1]) ** 2 <= r * r
        z = ex.zone_extremes(loss, zone, pitch_mm=new.pitch, zone_area_mm2=math.pi * r * r,
                             block_mm=1000.0, threshold=new.meta.threshold, n_boot=500)
        true_max = float(np.max((tr.loss_top_true + tr.loss_under_true)[zone]))
        print(seed, z.n_blocks, z.n_censored, round(z.depth_eva_mm, 2),
              round(z.depth_eva_upper_mm, 2), "true", round(true_max, 2), z.warnings)
        assert z and z.n_blocks > 20
        hits += true_max <= z.depth_eva_upper_mm
    assert hits >= len(seeds) - 1


def test_zone_extremes_too_few_blocks_and_small_zone():
    truth = _gumbel_pit_field(1, n=120)
    zone = np.zeros(truth.shape, bool)
    zone[:10, :] = True                        # a 100 mm strip: 1 m blocks never reach 50 %
    z = ex.zone_extremes(truth, zone, pitch_mm=10.0, zone_area_mm2=100.0 * 1200.0,
                         block_mm=1000.0, threshold=1.0)
    assert not z and "blocks larger than the zone" in z.reason
    assert math.isnan(z.depth_eva_mm) and math.isnan(z.depth_eva_upper_mm)
    # all unscanned zone: no blocks, NaN (rasterstats-style all-nodata case)
    z0 = ex.zone_extremes(np.full((50, 50), np.nan), np.ones((50, 50), bool), pitch_mm=10.0,
                          zone_area_mm2=2.5e5, block_mm=100.0)
    assert not z0 and z0.n_blocks == 0 and math.isnan(z0.observed_max)
    # zone smaller than two blocks: T floored at 2 = the median block maximum (documented)
    v = np.random.default_rng(0).gumbel(1.0, 0.3, (100, 100))
    z2 = ex.zone_extremes(v, np.ones(v.shape, bool), pitch_mm=10.0, zone_area_mm2=1.5e4,
                          block_mm=100.0)
    assert z2 and z2.T == 2.0 and z2.T_raw == pytest.approx(1.5)
    assert any("T = 2" in w for w in z2.warnings)
    assert z2.depth_eva_mm == pytest.approx(float(z2.fit.ppf(0.5)))


def test_zone_extremes_rates_and_methods():
    # the same machinery on a rate map [mm/y]: Gumbel block maxima by construction
    rng = np.random.default_rng(8)
    rate = rng.gumbel(0.05, 0.01, (300, 300)).astype(np.float32)
    zone = np.ones(rate.shape, bool)
    res = {m: ex.zone_extremes(rate, zone, pitch_mm=10.0, zone_area_mm2=9e6, block_mm=100.0,
                               method=m, n_boot=200) for m in ("mle", "lmoments", "moments")}
    # max of 100 Gumbel(0.05, 0.01) cells is Gumbel(0.05 + 0.01 ln 100, 0.01) (Coles §3.1)
    for m, z in res.items():
        assert z and z.fit.loc == pytest.approx(0.05 + 0.01 * math.log(100), abs=0.003), m
        assert z.depth_eva_upper_mm > z.depth_eva_mm
    row = res["mle"].row()
    assert set(row) >= {"depth_eva_mm", "depth_eva_upper_mm", "eva_reason"}
    zp = ex.zone_extremes(rate, zone, pitch_mm=10.0, zone_area_mm2=9e6, block_mm=100.0,
                          bound_method="profile")
    assert zp.bounds.method == "profile" and zp.depth_eva_upper_mm > zp.depth_eva_mm
    with pytest.raises(InputError, match="field 'method'"):
        ex.zone_extremes(rate, zone, pitch_mm=10.0, zone_area_mm2=9e6, method="bayes")


def test_projected_block_maxima_equal_the_direct_computation():
    # Ground truth: block_maxima of the projected map itself, at several horizons, on a
    # grid that is not a multiple of the tile side, with unscanned cells, cells outside
    # the zone, NaN rates and a censoring threshold.
    rng = np.random.default_rng(11)
    shape = (157, 203)
    depth = rng.gamma(2.0, 0.3, shape).astype(np.float32)
    depth[rng.random(shape) < 0.15] = np.nan
    rate = rng.gamma(1.5, 0.05, shape).astype(np.float32)
    rate[rng.random(shape) < 0.05] = np.nan
    valid = np.isfinite(depth) & (np.add.outer(np.arange(shape[0]), np.arange(shape[1])) > 60)
    at = ex.projected_block_maxima(depth, rate, valid=valid, block_cells=20, min_coverage=0.5, threshold=1.0)
    for h in (0.0, 3.7, 25.0, 60.0):
        want = ex.block_maxima(depth + np.nan_to_num(rate) * np.float32(h), valid=valid, block_cells=20,
                               min_coverage=0.5, threshold=1.0)
        got = at(h)
        assert got.n_blocks == want.n_blocks > 10
        np.testing.assert_array_equal(got.keys, want.keys)
        np.testing.assert_allclose(got.maxima, want.maxima, rtol=1e-6)
        np.testing.assert_array_equal(got.censored, want.censored)
        # the deepest projected value over every valid cell, tiles counted or not
        proj = depth + np.nan_to_num(rate) * np.float32(h)
        assert at.deepest(h) == pytest.approx(float(np.max(proj[valid])), rel=1e-6)


def test_tile_block_maxima_equal_a_loop_over_the_tiles():
    # the definition, tile by tile: coverage = valid cells / b², kept at >= 50 %, maximum of
    # the finite valid values, censored below the threshold or when there is none
    rng = np.random.default_rng(21)
    shape, b = (83, 61), 9
    v = rng.gamma(2.0, 0.4, shape).astype(np.float32)
    v[rng.random(shape) < 0.2] = np.nan
    valid = rng.random(shape) < 0.8
    got = ex.block_maxima(v, valid=valid, block_cells=b, min_coverage=0.5, threshold=0.8)
    want = []
    for r in range(0, shape[0], b):
        for c in range(0, shape[1], b):
            ok = valid[r:r + b, c:c + b]
            if ok.sum() == 0 or ok.sum() / b ** 2 < 0.5:
                continue
            vals = v[r:r + b, c:c + b][ok]
            vals = vals[np.isfinite(vals)]
            want.append((r // b, c // b, vals.max() if vals.size else np.nan))
    assert got.n_blocks == len(want) > 20
    np.testing.assert_array_equal(got.keys, [(r, c) for r, c, _ in want])
    np.testing.assert_array_equal(got.maxima, [m for _, _, m in want])
    np.testing.assert_array_equal(got.censored, [not (m >= 0.8) for _, _, m in want])
