"""Population statistics of a fleet's corrosion rates, checked against scipy.stats directly."""

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from scananalyse.population import (MIN_TANKS_FIT, bootstrap_quantiles, choose_model, fit_models, model_quantile,
                                    population_table, similar_service_rate, summarise_rates)


def test_fits_are_scipy_maximum_likelihood_and_aic():
    # Source: scipy.stats.<dist>.fit (maximum likelihood) and AIC = 2k - 2 ln L (Akaike 1974);
    # the same calls on the same data must give the same numbers (tolerance: optimiser round-off).
    rng = np.random.default_rng(7)
    x = stats.lognorm.rvs(0.5, scale=0.2, size=300, random_state=rng)
    fits = fit_models(x)
    assert set(fits) == {"lognormal", "gumbel", "gev"}
    ref = {"lognormal": (stats.lognorm, stats.lognorm.fit(x, floc=0), 2),
           "gumbel": (stats.gumbel_r, stats.gumbel_r.fit(x), 2),
           "gev": (stats.genextreme, stats.genextreme.fit(x), 3)}
    for name, (dist, params, k) in ref.items():
        assert fits[name]["params"] == pytest.approx(params, rel=1e-6, abs=1e-9)
        aic = 2 * k - 2 * np.sum(dist.logpdf(x, *params))
        assert fits[name]["aic"] == pytest.approx(aic, rel=1e-9)
    assert choose_model(fits) == min(fits, key=lambda n: fits[n]["aic"])
    # the lognormal's quantile is scipy's ppf with the fitted parameters
    assert model_quantile("lognormal", fits["lognormal"]["params"], 0.9) == pytest.approx(
        stats.lognorm.ppf(0.9, *ref["lognormal"][1]), rel=1e-6)


def test_gumbel_parameters_come_back():
    # Draw from scipy.stats.gumbel_r with known parameters (seeded) and recover them:
    # with 2000 draws the standard errors are about 2 % of the scale, so 10 % is loose.
    x = stats.gumbel_r.rvs(loc=0.3, scale=0.05, size=2000, random_state=np.random.default_rng(3))
    loc, scale = fit_models(x)["gumbel"]["params"]
    assert loc == pytest.approx(0.3, rel=0.05) and scale == pytest.approx(0.05, rel=0.1)


def test_lognormal_needs_positive_rates():
    x = np.array([0.0, 0.1, 0.2, 0.15, 0.3, 0.12])
    assert "lognormal" not in fit_models(x)


def test_bootstrap_empirical_quantiles_seeded():
    x = np.random.default_rng(1).gamma(2.0, 0.05, size=40)
    a = bootstrap_quantiles(x, (0.5, 0.9), model=None, n_boot=100, seed=5)
    b = bootstrap_quantiles(x, (0.5, 0.9), model=None, n_boot=100, seed=5)
    assert a == b  # seeded: the same bounds every run
    for q in (0.5, 0.9):
        est, lo, hi = a[q]
        assert est == pytest.approx(np.quantile(x, q))
        assert lo <= est <= hi


def test_few_tanks_empirical_only_and_says_so():
    s = summarise_rates([0.1, 0.2, 0.3], ["A", "B", "C"], n_boot=50)
    assert s["model"] == "empirical" and f"fewer than {MIN_TANKS_FIT}" in s["note"]
    assert s[0.5][0] == pytest.approx(0.2) and math.isnan(s["p99"]) and s["outliers"] == []


def test_outlier_beyond_fitted_p99_is_named():
    rng = np.random.default_rng(11)
    x = list(stats.lognorm.rvs(0.3, scale=0.1, size=30, random_state=rng)) + [5.0]
    names = [f"T{i}" for i in range(30)] + ["HOT"]
    s = summarise_rates(x, names, n_boot=50)
    assert s["model"] != "empirical" and "HOT" in s["outliers"]
    assert all(v > s["p99"] for v, n in zip(x, names) if n in s["outliers"])


def test_similar_service_rate():
    assert math.isnan(similar_service_rate([0.1, 0.2]))  # fewer than 3 tanks
    r = [0.1, 0.4, 0.2, float("nan"), 0.3]
    assert similar_service_rate(r) == pytest.approx(np.quantile([0.1, 0.4, 0.2, 0.3], 0.9))


def test_population_table_groups_and_sides():
    df = pd.DataFrame({"tank": list("ABCDEF"), "service": ["crude"] * 3 + ["water"] * 3,
                       "rate_top_max_mm_y": [0.1, 0.2, 0.3, 0.05, 0.06, np.nan],
                       "rate_under_max_mm_y": [0.2, 0.1, 0.4, 0.3, 0.2, 0.1]})
    pop, details = population_table(df, ["service"], n_boot=30)
    assert list(pop["group"]) == ["all", "all", "service", "service", "service", "service"]
    top = pop[(pop["value"] == "water") & (pop["side"] == "top")].iloc[0]
    assert top["n_tanks"] == 2 and top["model"] == "empirical"
    assert pop[(pop["group"] == "all") & (pop["side"] == "under")].iloc[0]["n_tanks"] == 6


@pytest.mark.parametrize("units,unit,per", [("mm", "mm/y", 1.0), ("in", "mpy", 0.0254)])
def test_population_figure_in_display_units(units, unit, per):
    # 1 mpy = 0.0254 mm/y exactly (1 in = 25.4 mm, NIST SP 811, 2008, appendix B.8)
    from scananalyse.population import plot_population

    rates = stats.lognorm.rvs(0.4, scale=0.2, size=12, random_state=np.random.default_rng(5))
    s = summarise_rates(rates)
    assert s["model"] != "empirical"
    ax = plot_population(s, rates, [f"T{i}" for i in range(12)], units=units).axes[0]
    assert ax.get_xlabel() == f"zone-maximum rate [{unit}]"
    tanks, cdf = ax.lines[:2]
    np.testing.assert_allclose(tanks.get_xdata(), np.sort(rates) / per, rtol=1e-12)
    # the fitted CDF keeps its shape: at the drawn median line it is 0.5
    p50 = next(ln for ln in ax.lines[2:] if ln.get_label().startswith("p50"))
    x50 = p50.get_xdata()[0]
    assert x50 == pytest.approx(s[0.5][0] / per, rel=1e-12)
    assert np.interp(x50, cdf.get_xdata(), cdf.get_ydata()) == pytest.approx(0.5, abs=0.01)
