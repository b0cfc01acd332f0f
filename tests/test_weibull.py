"""Weibull fit with delayed entry against lifelines' WeibullFitter, and its derivatives."""

from __future__ import annotations

import numpy as np
import pytest

from wearcast._weibull import fit_weibull, weibull_loglik, weibull_score_hessian


def _macs():
    # lifelines ships the left-truncated Multicenter AIDS Cohort Study data (W entry, T exit, D event)
    from lifelines.datasets import load_multicenter_aids_cohort_study

    d = load_multicenter_aids_cohort_study()
    return d["W"].to_numpy(float), d["T"].to_numpy(float), d["D"].astype(bool).to_numpy()


@pytest.mark.parametrize("data", ["macs", "waltons"])
def test_matches_lifelines_weibull_fitter(data):
    # Reference: lifelines WeibullFitter (S(t) = exp(-(t / lambda_) ** rho_)), with entry= for the
    # delayed-entry macs data; the Waltons data (lifelines.datasets.load_waltons) has no entry.
    from lifelines import WeibullFitter
    from lifelines.datasets import load_waltons

    if data == "macs":
        entry, exit_, event = _macs()
        ref = WeibullFitter().fit(exit_, event, entry=entry)
    else:
        w = load_waltons()
        entry, exit_, event = np.zeros(len(w)), w["T"].to_numpy(float), w["E"].astype(bool).to_numpy()
        ref = WeibullFitter().fit(exit_, event)
    ours = fit_weibull(entry, exit_, event)
    assert ours["converged"]
    # lifelines stops its optimiser at about 1e-5 relative; ours at 1e-10
    assert ours["scale"] == pytest.approx(ref.lambda_, rel=2e-5)
    assert ours["shape"] == pytest.approx(ref.rho_, rel=2e-5)
    se = ref.summary["se(coef)"]
    assert ours["se_scale"] == pytest.approx(se["lambda_"], rel=1e-3)
    assert ours["se_shape"] == pytest.approx(se["rho_"], rel=1e-3)
    assert ours["shape_low"] < ours["shape"] < ours["shape_high"]
    assert ours["scale_low"] < ours["scale"] < ours["scale_high"]


def test_gradient_and_hessian_match_finite_differences():
    entry, exit_, event = _macs()
    u, v, eps = 1.4, 0.2, 1e-5
    grad, hess = weibull_score_hessian(entry, exit_, event, u, v)
    f = lambda a, b: weibull_loglik(entry, exit_, event, a, b)  # noqa: E731
    fd_grad = [(f(u + eps, v) - f(u - eps, v)) / (2 * eps), (f(u, v + eps) - f(u, v - eps)) / (2 * eps)]
    np.testing.assert_allclose(grad, fd_grad, rtol=1e-6)
    g = lambda a, b: weibull_score_hessian(entry, exit_, event, a, b)[0]  # noqa: E731
    fd_hess = np.column_stack([(g(u + eps, v) - g(u - eps, v)) / (2 * eps), (g(u, v + eps) - g(u, v - eps)) / (2 * eps)])
    np.testing.assert_allclose(hess, fd_hess, rtol=1e-5)


def test_a_life_split_into_rows_gives_the_same_fit():
    entry, exit_, event = _macs()
    middle = (entry + exit_) / 2
    split = fit_weibull(np.concatenate([entry, middle]), np.concatenate([middle, exit_]),
                        np.concatenate([np.zeros(len(event), bool), event]))
    whole = fit_weibull(entry, exit_, event)
    for key in ("shape", "scale", "se_shape", "se_scale"):
        assert split[key] == pytest.approx(whole[key], rel=1e-8), key


def test_too_few_failures_give_no_fit():
    out = fit_weibull([0.0, 0.0, 0.0], [10.0, 20.0, 30.0], [True, False, False])
    assert not out["converged"] and np.isnan(out["shape"]) and np.isnan(out["scale_high"])


def test_probability_plot_puts_a_weibull_curve_on_its_fitted_line():
    from wearcast._weibull import probability_plot

    shape, scale = 2.3, 900.0
    ages = np.array([0.0, 100.0, 450.0, 900.0, 2000.0, 5000.0])
    survival = np.exp(-(ages / scale) ** shape)
    x, y = probability_plot(ages, survival)
    # age 0 (S = 1) is left out: it has no place on a log axis
    assert len(x) == 5
    np.testing.assert_allclose(y, shape * (x - np.log(scale)), rtol=1e-10, atol=1e-10)
    assert y[list(np.exp(x)).index(pytest.approx(900.0))] == pytest.approx(0.0)  # 63.2 % failed at the scale
