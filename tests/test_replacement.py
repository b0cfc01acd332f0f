"""Planned replacement age under a Weibull life: cost rate, optimum and the per-group table."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.integrate import quad
from scipy.special import erf, gamma

from wearcast._age_replacement import (best_replacement_age, cost_rate, mean_life_to, run_to_failure_rate,
                                       weibull_survival)
from wearcast.exceptions import ConfigError
from wearcast.replacement import check_costs, replacement_ages


def test_mean_life_to_age_matches_quadrature_and_the_shape_2_closed_form():
    # Reference: scipy.integrate.quad of R(t); for shape 2, integral_0^T exp(-(t/s)^2) dt = s sqrt(pi)/2 erf(T/s).
    for shape, scale, t in ((2.0, 6000.0, 3000.0), (3.3, 400.0, 900.0), (0.7, 50.0, 10.0)):
        ref = quad(lambda u: float(weibull_survival(u, shape, scale)), 0, t, limit=200)[0]
        assert float(mean_life_to(t, shape, scale)) == pytest.approx(ref, rel=1e-9)
    assert float(mean_life_to(3000.0, 2.0, 6000.0)) == pytest.approx(6000 * np.sqrt(np.pi) / 2 * erf(0.5), rel=1e-12)
    # long ages: the mean life scale * Gamma(1 + 1/shape)
    assert float(mean_life_to(1e9, 2.5, 100.0)) == pytest.approx(100.0 * gamma(1.4), rel=1e-12)


@pytest.mark.parametrize("shape,cp,cf", [(2.0, 1.0, 5.0), (3.5, 2.0, 9.0), (1.3, 1.0, 20.0)])
def test_best_age_meets_the_first_order_condition(shape, cp, cf):
    # Barlow and Proschan (1965, ch. 4): at the best age T*, h(T*) integral_0^T* R - F(T*) = c_p / (c_f - c_p).
    scale = 1000.0
    best = best_replacement_age(shape, scale, cp, cf)
    t = best["age"]
    hazard = shape / scale * (t / scale) ** (shape - 1)
    lhs = hazard * float(mean_life_to(t, shape, scale)) - (1 - float(weibull_survival(t, shape, scale)))
    assert lhs == pytest.approx(cp / (cf - cp), rel=1e-6)
    # brute force over a fine grid finds nothing cheaper
    grid = np.linspace(1.0, 20 * scale, 200_000)
    assert best["cost_rate"] <= cost_rate(grid, shape, scale, cp, cf).min() * (1 + 1e-9)
    assert best["run_to_failure_rate"] == pytest.approx(cf / (scale * gamma(1 + 1 / shape)))
    assert 0 < best["saving"] < 1
    # the 5 % range holds the best age and costs at most 5 % more at its ends
    assert best["age_low"] <= t <= best["age_high"]
    for edge in (best["age_low"], best["age_high"]):
        assert float(cost_rate(edge, shape, scale, cp, cf)) <= best["cost_rate"] * 1.05 + 1e-15


def test_no_planned_age_without_wear_out_or_without_a_costlier_failure():
    # (1.2, 1, 1.5) and (1.2, 1, 2): a rate rising slowly and a failure costing little more than a plan;
    # the cost per day flattens out and its minimum lies beyond 20 scale lengths, where it saves next to nothing
    for shape, cp, cf in ((1.0, 1.0, 5.0), (0.8, 1.0, 5.0), (2.5, 5.0, 5.0), (2.5, 6.0, 5.0), (1.2, 1.0, 1.5),
                          (1.2, 1.0, 2.0)):
        best = best_replacement_age(shape, 100.0, cp, cf)
        assert np.isnan(best["age"]) and best["saving"] == 0.0
        assert best["cost_rate"] == pytest.approx(run_to_failure_rate(shape, 100.0, cf))
    with pytest.raises(ValueError):
        best_replacement_age(2.0, 100.0, 0.0, 5.0)


def test_group_table_and_cost_checks():
    stats = pd.DataFrame({"group_by": ["fleet", "site", "site", "site"], "group": ["all", "A", "B", "C"],
                          "weibull_shape": [2.0, 0.9, np.nan, 1.4], "weibull_shape_low": [1.7, 0.7, np.nan, 0.95],
                          "weibull_scale_days": [2000.0, 1500.0, np.nan, 1800.0]})
    ages = replacement_ages(stats, 1.0, 4.0)
    fleet, a, b, c = ages.iloc[0], ages.iloc[1], ages.iloc[2], ages.iloc[3]
    assert fleet["reading"] == "a planned replacement at this age pays"
    assert np.isfinite(c["best_age_days"]) and "bounds include 1" in c["reading"]
    assert fleet["best_age_days"] == pytest.approx(best_replacement_age(2.0, 2000.0, 1.0, 4.0)["age"])
    assert fleet["cost_per_year_run_to_failure"] == pytest.approx(4.0 / (2000 * gamma(1.5)) * 365.25)
    assert np.isnan(a["best_age_days"]) and "does not pay" in a["reading"]
    assert b["reading"].startswith("no Weibull fit") and not b["wear_out_clear"]
    assert fleet["wear_out_clear"] and not c["wear_out_clear"]
    # renewal = "repair": a repair does not start a new life, so no age at all
    repaired = replacement_ages(stats, 1.0, 4.0, renewal="repair")
    assert repaired["best_age_days"].isna().all() and repaired["reading"].str.contains("does not apply").all()
    assert check_costs(None, None) is False and check_costs(1.0, 3.0) is True
    with pytest.raises(ConfigError, match="needs both"):
        check_costs(1.0, None)
    with pytest.raises(ConfigError, match="must be positive"):
        check_costs(-1.0, 3.0)
