"""The power-law tail past the oldest recorded failure (wearcast.models._tail).

References: lifelines' WeibullFitter with entry= on the left-truncated MACS
data lifelines ships (the tail fitted on every failure with no scores is the
two-parameter Weibull fit), scipy's general-purpose optimiser on the full
two-parameter likelihood with scores (the profile step must not lose the
maximum), and the likelihood's invariances.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import minimize

from wearcast.models._tail import NO_TAIL, PowerTail, fit_power_tail, sparse_end, tail_start


def _macs():
    from lifelines.datasets import load_multicenter_aids_cohort_study

    d = load_multicenter_aids_cohort_study()
    return d["W"].to_numpy(float), d["T"].to_numpy(float), d["D"].astype(bool).to_numpy()


def test_whole_record_tail_is_lifelines_weibull_fit_with_entry():
    # Reference: lifelines WeibullFitter().fit(T, D, entry=W) on MACS, S(t) = exp(-(t / lambda_) ** rho_).
    # With every failure in the fitted part and no scores, the tail's H(a) = rate (a / anchor) ** shape
    # is that Weibull: shape = rho_, rate = (anchor / lambda_) ** rho_.
    from lifelines import WeibullFitter

    entry, exit_, event = _macs()
    ref = WeibullFitter().fit(exit_, event, entry=entry)
    tail = fit_power_tail(entry, exit_, event, min_failures=10_000)
    # the curve takes over at the tenth-oldest failure
    assert tail.from_age == 0.0 and tail.anchor == np.sort(exit_[event])[-10]
    assert tail.shape == pytest.approx(ref.rho_, rel=1e-4)
    assert tail.rate == pytest.approx((tail.anchor / ref.lambda_) ** ref.rho_, rel=1e-4)
    assert tail.failures == event.sum()


def test_profile_fit_is_the_two_parameter_maximum_with_scores():
    # Rossi data (lifelines.datasets.load_rossi), scores from a linear predictor: the profile over the
    # shape must give the maximum a general optimiser finds on (log shape, log rate).
    from lifelines.datasets import load_rossi

    r = load_rossi()
    exit_, event = r["week"].to_numpy(float), r["arrest"].astype(bool).to_numpy()
    entry = np.zeros_like(exit_)
    eta = 0.3 * r["prio"].to_numpy(float) - 0.05 * r["age"].to_numpy(float)
    tail = fit_power_tail(entry, exit_, event, eta, min_failures=40, share=0.0)
    assert tail.from_age > 0  # the last 40 failures only
    anchor, start = tail.anchor, tail.from_age
    rows = exit_ > start
    b, a = exit_[rows] / anchor, np.maximum(entry[rows], start) / anchor
    d, e = event[rows], eta[rows]

    def negative_loglik(theta):
        k, rate = np.exp(theta)
        return -(np.sum(d * (np.log(k) + np.log(rate) + (k - 1) * np.log(b) + e))
                 - rate * np.sum(np.exp(e) * (b ** k - a ** k)))

    best = minimize(negative_loglik, x0=[0.0, 0.0], method="Nelder-Mead",
                    options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 5000})
    assert tail.shape == pytest.approx(np.exp(best.x[0]), rel=1e-4)
    assert tail.rate == pytest.approx(np.exp(best.x[1]), rel=1e-4)
    assert negative_loglik(np.log([tail.shape, tail.rate])) <= best.fun + 1e-8


def test_scores_and_weights_enter_as_the_likelihood_says():
    entry, exit_, event = _macs()
    plain = fit_power_tail(entry, exit_, event)
    # a score of c on every row: the same shape, the baseline rate divided by exp(c)
    shifted = fit_power_tail(entry, exit_, event, np.full(exit_.size, 0.7))
    assert shifted.shape == pytest.approx(plain.shape, rel=1e-6)
    assert shifted.rate == pytest.approx(plain.rate * np.exp(-0.7), rel=1e-6)
    # doubling every weight doubles the failures and the time at risk: the same fit
    doubled = fit_power_tail(entry, exit_, event, weights=np.full(exit_.size, 2.0))
    assert doubled.shape == pytest.approx(plain.shape, rel=1e-6) and doubled.rate == pytest.approx(plain.rate)
    # a zero weight removes the row, as leaving it out does
    drop = np.arange(exit_.size) % 7 == 0
    weighted = fit_power_tail(entry, exit_, event, weights=np.where(drop, 0.0, 1.0))
    left_out = fit_power_tail(entry[~drop], exit_[~drop], event[~drop])
    assert weighted == left_out


def test_fitted_part_holds_the_older_failures():
    ages = np.arange(1.0, 101.0)
    # 100 failure ages: the older half (50 >= 20) is fitted, from the 50th age on
    assert tail_start(ages) == 50.0
    assert tail_start(ages[:30]) == 10.0  # 30 ages: at least 20 of them
    assert tail_start(ages[:15]) == 0.0  # fewer than 20: all of them
    # the curve replaces the steps from the tenth-oldest failure (the youngest when fewer)
    assert sparse_end(ages) == 91.0 and sparse_end(ages[:4]) == 1.0


def test_increment_is_zero_before_the_anchor_and_rises_after():
    tail = PowerTail(anchor=1000.0, shape=2.0, rate=0.5, from_age=500.0, failures=30.0)
    ages = np.array([0.0, 999.0, 1000.0, 1500.0, 2000.0])
    np.testing.assert_allclose(tail.increment(ages), [0, 0, 0, 0.5 * (1.5 ** 2 - 1), 0.5 * 3.0])
    assert (NO_TAIL.increment(ages) == 0).all()
    assert PowerTail.from_dict(tail.to_dict()) == tail
    with pytest.raises(ValueError, match="damaged"):
        PowerTail.from_dict({**tail.to_dict(), "shape": -1.0})


def test_few_failures_give_a_constant_hazard_and_none_give_no_tail():
    entry = np.zeros(5)
    exit_ = np.array([10.0, 20.0, 30.0, 40.0, 50.0])
    tail = fit_power_tail(entry, exit_, np.array([False, True, False, True, False]))
    # two failures: shape fixed at 1, anchor at the youngest of them (fewer than ten), rate =
    # failures / time at risk with ages scaled by the anchor (20 days)
    assert tail.shape == 1.0 and tail.anchor == 20.0
    assert tail.rate == pytest.approx(2.0 / (exit_.sum() / 20.0))
    assert fit_power_tail(entry, exit_, np.zeros(5, bool)) == NO_TAIL


def test_a_stratum_without_failures_keeps_its_flat_zero_and_a_loaded_empty_tail_is_inactive():
    from wearcast.models.baseline import BaselineHazard

    entry, exit_ = np.zeros(6), np.array([5.0, 6.0, 7.0, 8.0, 9.0, 10.0])
    event = np.array([True, False, True, False, False, False])
    strata = np.array(["a", "a", "a", "b", "b", "b"])
    base = BaselineHazard.estimate(entry, exit_, event, strata=strata)
    assert base.tails["b"] == NO_TAIL and not base.tails["b"].active and base.tails["a"].active
    np.testing.assert_array_equal(base.at(np.array([3.0, 50.0]), strata="b"), [0.0, 0.0])
    again = BaselineHazard.from_dict(base.to_dict())
    assert not again.tails["b"].active
    np.testing.assert_array_equal(again.at(np.array([3.0, 7.0, 50.0]), strata="a"),
                                  base.at(np.array([3.0, 7.0, 50.0]), strata="a"))
