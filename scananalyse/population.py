"""Rates of a tank population: per group and side, a fitted distribution of the tanks'
zone-maximum corrosion rates, its quantiles with bootstrap bounds, outliers, and the
similar-service rate a tank with one inspection borrows from its group.

Pure functions on arrays and tables; the fleet run (:mod:`scananalyse.fleet`) calls
them and writes ``population.csv``.

Model choice: lognormal (location 0), Gumbel (largest values) and generalised extreme
value, each fitted by maximum likelihood (``scipy.stats``), the one with the least AIC
(Akaike information criterion, 2k − 2 ln L) kept.  With fewer than
:data:`MIN_TANKS_FIT` tanks no model is fitted and the quantiles are empirical
(the row says so).  The lognormal is a candidate only when every rate is positive.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd

__all__ = ["MIN_TANKS_FIT", "MIN_TANKS_SIMILAR", "MODELS", "fit_models", "choose_model", "model_quantile",
           "bootstrap_quantiles", "summarise_rates", "population_table", "similar_service_rate",
           "POPULATION_COLUMNS", "plot_population"]

#: Fewest tanks for which a distribution is fitted; fewer give empirical quantiles only. [-]
MIN_TANKS_FIT = 5
#: Fewest two-inspection tanks of a group for a similar-service rate. [-]
MIN_TANKS_SIMILAR = 3
#: Candidate models: name -> (scipy.stats distribution name, fixed keyword arguments, free parameters).
MODELS = {
    "lognormal": ("lognorm", {"floc": 0.0}, 2),
    "gumbel": ("gumbel_r", {}, 2),
    "gev": ("genextreme", {}, 3),
}
POPULATION_COLUMNS = ["group", "value", "side", "n_tanks", "model", "aic", "p50_mm_y", "p50_lo_mm_y",
                      "p50_hi_mm_y", "p90_mm_y", "p90_lo_mm_y", "p90_hi_mm_y", "p99_mm_y", "outliers", "note"]


def _dist(name):
    from scipy import stats

    return getattr(stats, MODELS[name][0])


def fit_models(rates) -> dict:
    """Fit every candidate model to the rates by maximum likelihood.

    Parameters
    ----------
    rates : one rate per tank; NaN dropped. [mm/y]

    Returns
    -------
    dict : model name -> ``{"params": tuple, "aic": float}`` for each model that fitted
        (a fit that fails or gives a non-finite likelihood is left out, never returned).
    """
    x = np.asarray(rates, dtype=float)
    x = x[np.isfinite(x)]
    out = {}
    for name, (_, fixed, k) in MODELS.items():
        if name == "lognormal" and (x <= 0).any():
            continue
        dist = _dist(name)
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # optimiser chatter; the likelihood is checked below
                params = dist.fit(x, **fixed)
                ll = float(np.sum(dist.logpdf(x, *params)))
        except Exception:  # a fit that fails is not a candidate
            continue
        if math.isfinite(ll):
            out[name] = {"params": tuple(float(p) for p in params), "aic": 2 * k - 2 * ll}
    return out


def choose_model(fits: dict) -> str | None:
    """The model with the least AIC, or None when no model fitted."""
    if not fits:
        return None
    return min(fits, key=lambda n: fits[n]["aic"])


def model_quantile(name: str, params, q):
    """Quantile ``q`` (a probability, or an array of them) of a fitted model. [mm/y]"""
    return _dist(name).ppf(q, *params)


def bootstrap_quantiles(rates, qs=(0.5, 0.9), *, model: str | None = None, n_boot: int = 200,
                        level: float = 0.90, seed: int = 0) -> dict:
    """Quantiles of the rates and their seeded percentile-bootstrap bounds.

    Parameters
    ----------
    rates : one rate per tank. [mm/y]
    qs : probabilities. [-]
    model : a :data:`MODELS` name refitted on each resample, or None for empirical
        quantiles (``numpy.quantile``, linear). [-]
    n_boot : resamples. [-]
    level : two-sided level of the bounds. [-]
    seed : seed of ``numpy.random.default_rng``. [-]

    Returns
    -------
    dict : q -> ``(estimate, lower, upper)``. [mm/y]
    """
    x = np.asarray(rates, dtype=float)
    x = x[np.isfinite(x)]
    qs = tuple(qs)

    def estimate(sample):
        if model is None:
            return np.quantile(sample, qs)
        name, fixed, _ = MODELS[model]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            params = _dist(model).fit(sample, **fixed)
        return model_quantile(model, params, np.asarray(qs))

    point = estimate(x)
    rng = np.random.default_rng(seed)
    boots = []
    for _ in range(n_boot):
        s = rng.choice(x, size=len(x), replace=True)
        if model is not None and np.ptp(s) == 0:
            continue  # a resample of one repeated value has no spread to fit
        try:
            b = estimate(s)
        except Exception:
            continue
        if np.all(np.isfinite(b)):
            boots.append(b)
    a = (1 - level) / 2
    if boots:
        lo, hi = np.quantile(np.asarray(boots), [a, 1 - a], axis=0)
    else:
        lo = hi = np.full(len(qs), np.nan)
    return {q: (float(point[i]), float(lo[i]), float(hi[i])) for i, q in enumerate(qs)}


def summarise_rates(rates, names=None, *, n_boot: int = 200, seed: int = 0) -> dict:
    """Everything ``population.csv`` says about one group and side.

    Parameters
    ----------
    rates : one zone-maximum rate per tank. [mm/y]
    names : tank names in the same order (for outliers). [-]
    n_boot, seed : see :func:`bootstrap_quantiles`.

    Returns
    -------
    dict : ``n_tanks``, ``model`` (or ``"empirical"``), ``aic``, ``params``, p50 and p90
        with bounds, ``p99`` (fitted; NaN when empirical), ``outliers`` (tanks above the
        fitted p99), ``note``.
    """
    x = np.asarray(rates, dtype=float)
    names = list(names) if names is not None else [str(i) for i in range(len(x))]
    keep = np.isfinite(x)
    x, names = x[keep], [n for n, k in zip(names, keep) if k]
    n = len(x)
    res = {"n_tanks": n, "model": "empirical", "aic": math.nan, "params": (), "p99": math.nan,
           "outliers": [], "note": ""}
    if n == 0:
        res.update({q: (math.nan, math.nan, math.nan) for q in (0.5, 0.9)}, note="no measured rates")
        return res
    model = None
    if n >= MIN_TANKS_FIT and np.ptp(x) > 0:
        fits = fit_models(x)
        model = choose_model(fits)
        if model is None:
            res["note"] = "no model fitted; empirical quantiles"
    else:
        res["note"] = (f"{n} tank(s), fewer than {MIN_TANKS_FIT}: empirical quantiles only, no model fitted"
                       if n < MIN_TANKS_FIT else "all rates equal: empirical quantiles only")
    if model is not None:
        p = fits[model]["params"]
        p99 = float(model_quantile(model, p, 0.99))
        res.update(model=model, aic=fits[model]["aic"], params=p, p99=p99,
                   outliers=[nm for nm, v in zip(names, x) if v > p99],
                   note="least AIC of " + ", ".join(f"{m} {fits[m]['aic']:.1f}" for m in fits))
    res.update(bootstrap_quantiles(x, (0.5, 0.9), model=model, n_boot=n_boot, seed=seed))
    return res


def similar_service_rate(rates, *, quantile: float = 0.9, min_tanks: int = MIN_TANKS_SIMILAR) -> float:
    """Similar-service rate of a group: the ``quantile`` (empirical, ``numpy.quantile``
    linear) of its two-inspection tanks' zone-maximum rates; NaN with fewer than
    ``min_tanks`` rates. [mm/y]"""
    x = np.asarray(rates, dtype=float)
    x = x[np.isfinite(x)]
    if len(x) < min_tanks:
        return math.nan
    return float(np.quantile(x, quantile))


def _groups(df: pd.DataFrame, group_cols) -> list:
    """(column, value, row mask): the whole fleet, then each value of each group column."""
    out = [("all", "all", pd.Series(True, index=df.index))]
    for c in group_cols:
        vals = df[c].fillna("").astype(str)
        for v in sorted(set(vals) - {""}):
            out.append((c, v, vals == v))
    return out


def population_table(df: pd.DataFrame, group_cols=(), *, n_boot: int = 200, seed: int = 0):
    """``population.csv``: one row per group and side.

    Parameters
    ----------
    df : one row per assessed tank with ``tank``, ``rate_top_max_mm_y``,
        ``rate_under_max_mm_y`` and the group columns. [-]
    group_cols : group columns of the manifest. [-]

    Returns
    -------
    (DataFrame, list) : the table (:data:`POPULATION_COLUMNS`) and, per row, the
        summary dict and rates for the figures.
    """
    rows, details = [], []
    for col, val, mask in _groups(df, group_cols):
        sub = df[mask]
        for side in ("top", "under"):
            rates = pd.to_numeric(sub[f"rate_{side}_max_mm_y"], errors="coerce").to_numpy(float)
            s = summarise_rates(rates, sub["tank"].astype(str).tolist(), n_boot=n_boot, seed=seed)
            rows.append({"group": col, "value": val, "side": side, "n_tanks": s["n_tanks"], "model": s["model"],
                         "aic": s["aic"], "p50_mm_y": s[0.5][0], "p50_lo_mm_y": s[0.5][1],
                         "p50_hi_mm_y": s[0.5][2], "p90_mm_y": s[0.9][0], "p90_lo_mm_y": s[0.9][1],
                         "p90_hi_mm_y": s[0.9][2], "p99_mm_y": s["p99"], "outliers": ";".join(s["outliers"]),
                         "note": s["note"]})
            keep = np.isfinite(rates)
            details.append((col, val, side, s, rates[keep], sub["tank"].astype(str).to_numpy()[keep]))
    return pd.DataFrame(rows, columns=POPULATION_COLUMNS), details


def plot_population(summary: dict, rates, names, *, title: str = "", ax=None, units: str = "mm"):
    """The tanks' rates against the fitted distribution (or the empirical one).

    Each tank at its rate and plotting position (i − 0.5)/n; the fitted CDF; p50 and
    p90 with their bounds; tanks above the fitted p99 named.  Rates [mm/y] are drawn in
    the display ``units`` (mm/y, or mpy for ``"in"``).  Returns the figure.
    """
    from matplotlib.figure import Figure

    from .report.units import convert, decimals, unit_label

    def shown(v):
        return convert(v, "rate", units)

    if ax is None:
        fig = Figure(figsize=(5.0, 3.4), layout="constrained")
        ax = fig.add_subplot(1, 1, 1)
    else:
        fig = ax.figure
    x = np.sort(np.asarray(rates, dtype=float))
    order = np.argsort(np.asarray(rates, dtype=float))
    n = len(x)
    if n:
        pp = (np.arange(1, n + 1) - 0.5) / n
        ax.plot(shown(x), pp, "o", ms=4, color="#1f4e79", label="tanks")
    if summary.get("model", "empirical") != "empirical" and n:
        grid = np.linspace(0, max(x.max(), summary["p99"]) * 1.05, 200)
        ax.plot(shown(grid), _dist(summary["model"]).cdf(grid, *summary["params"]), "-", color="#b5471b",
                label=f"{summary['model']} (least AIC)")
        for nm in summary["outliers"]:
            i = list(np.asarray(names)[order]).index(nm)
            ax.annotate(nm, (shown(x[i]), pp[i]), textcoords="offset points", xytext=(-4, -10), fontsize=7,
                        ha="right")
    for q, ls in ((0.5, "--"), (0.9, ":")):
        est, lo, hi = summary[q]
        if math.isfinite(est):
            ax.axvline(shown(est), ls=ls, color="#555", lw=1,
                       label=f"p{int(q * 100)} {shown(est):.{decimals('rate', units)}f}")
            if math.isfinite(lo) and math.isfinite(hi):
                ax.axvspan(shown(lo), shown(hi), color="#999", alpha=0.15)
    ax.set_xlabel(f"zone-maximum rate [{unit_label('rate', units)}]")
    ax.set_ylabel("fraction of tanks")
    ax.set_ylim(0, 1)
    ax.set_title(title, fontsize=9)
    ax.legend(fontsize=7, loc="lower right")
    return fig
