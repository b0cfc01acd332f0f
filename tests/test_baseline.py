"""Breslow baseline hazard with delayed entry: against lifelines and a naive loop."""

from __future__ import annotations

import json

import numpy as np
import pytest
from _curves import assert_valid_probability, assert_valid_survival

from wearcast.models.baseline import BaselineHazard


@pytest.fixture(scope="module")
def macs():
    from lifelines.datasets import load_multicenter_aids_cohort_study

    data = load_multicenter_aids_cohort_study()
    return data["W"].to_numpy(float), data["T"].to_numpy(float), data["D"].to_numpy(bool)


def test_zero_eta_equals_lifelines_nelson_aalen_with_entry(macs):
    # Reference: lifelines NelsonAalenFitter(nelson_aalen_smoothing=False) with entry=,
    # on the MACS data lifelines ships (W entry, T exit, D event).
    from lifelines import NelsonAalenFitter

    entry, exit, event = macs
    base = BaselineHazard.estimate(entry, exit, event)
    naf = NelsonAalenFitter(nelson_aalen_smoothing=False).fit(exit, event, entry=entry)
    grid = naf.cumulative_hazard_.index.to_numpy(float)
    # up to the oldest failure; past it lifelines stays flat and wearcast continues with its tail
    np.testing.assert_allclose(base.steps_at(grid), naf.cumulative_hazard_.iloc[:, 0].to_numpy(),
                               rtol=1e-12, atol=1e-14)
    # up to the tail's anchor (the tenth-oldest failure) that is also what the model uses; past it the tail
    tail = base.tail_of()
    upto = grid <= tail.anchor
    np.testing.assert_array_equal(base.at(grid[upto]), base.steps_at(grid[upto]))
    np.testing.assert_allclose(base.at(grid[~upto]), base.steps_at(tail.anchor) + tail.increment(grid[~upto]))
    assert np.sort(exit[event])[-10] == tail.anchor
    # Ignoring entry gives a different (biased) curve, so the check has teeth.
    ignoring = NelsonAalenFitter(nelson_aalen_smoothing=False).fit(exit, event)
    assert not np.allclose(base.steps_at(grid), ignoring.cumulative_hazard_at_times(grid).to_numpy())
    assert base.max_age == pytest.approx(exit[event].max())


def test_step_function_shape(macs):
    entry, exit, event = macs
    base = BaselineHazard.estimate(entry, exit, event)
    first, last = base.ages["all"][0], base.ages["all"][-1]
    assert base.at(first - 1e-9) == 0.0  # 0 before the first failure
    assert base.at(first) > 0.0  # right-continuous: the jump belongs to the failure age
    # the estimate is flat after the last failure; the model's curve carries on with the power-law
    # tail from the tail's anchor (test_tail.py checks its fit)
    assert base.steps_at(last + 1000.0) == base.steps_at(last)
    anchor = base.tail_of().anchor
    assert base.at(last + 1000.0) > base.at(last) > base.at(anchor)
    assert base.at(last + 1000.0) == pytest.approx(base.steps_at(anchor) + base.tail_of().increment(last + 1000.0))
    grid = np.linspace(0, last + 5, 200)
    eta = np.array([-1.0, 0.0, 2.0])[:, None]
    curves = base.survival(eta, grid)
    assert curves.shape == (3, 200)
    assert_valid_survival(curves)
    p = base.fail_probability(eta, grid, 365.0 / 365.25)
    assert_valid_probability(p)
    # A higher risk score never lowers the conditional failure probability.
    assert (np.diff(p, axis=0) >= 0).all()


def test_matches_lifelines_cox_baseline_without_entry():
    # Reference: lifelines CoxPHFitter.baseline_cumulative_hazard_ (Breslow, at the
    # mean covariates) on load_rossi, where no row enters late.
    from lifelines import CoxPHFitter
    from lifelines.datasets import load_rossi

    rossi = load_rossi()
    cph = CoxPHFitter().fit(rossi, "week", "arrest")
    eta = cph.predict_log_partial_hazard(rossi).to_numpy()
    base = BaselineHazard.estimate(np.zeros(len(rossi)), rossi["week"], rossi["arrest"], eta)
    ref = cph.baseline_cumulative_hazard_
    np.testing.assert_allclose(base.steps_at(ref.index.to_numpy(float)), ref.iloc[:, 0].to_numpy(), rtol=1e-10)


def naive_baseline(entry, exit, event, eta, weights, ties):
    """Loops straight from the definitions: Breslow jump W/S; Efron jump
    sum_k (W/d)/(S - k/d E) (R survfit.coxph's tie-corrected form)."""
    out = {}
    total = 0.0
    for t in sorted(set(exit[event])):
        risk = [j for j in range(len(exit)) if entry[j] < t <= exit[j]]
        dead = [j for j in risk if event[j] and exit[j] == t]
        S = sum(weights[j] * np.exp(eta[j]) for j in risk)
        E = sum(weights[j] * np.exp(eta[j]) for j in dead)
        W = sum(weights[j] for j in dead)
        d = len(dead)
        if ties == "breslow":
            total += W / S
        else:
            total += sum((W / d) / (S - k / d * E) for k in range(d))
        out[t] = total
    return out


def tied_rows(seed: int, n: int, weight_choices):
    """Small rows with many tied ages, delayed entry, failures and case weights."""
    rng = np.random.default_rng(seed)
    entry = rng.integers(0, 4, n).astype(float)
    exit = entry + rng.integers(1, 6, n)
    event = rng.random(n) < 0.5
    return entry, exit, event, rng.normal(size=n), rng.choice(weight_choices, n)


@pytest.mark.parametrize("ties", ["breslow", "efron"])
def test_tied_weighted_delayed_entry_matches_naive_loop(ties):
    entry, exit, event, eta, weights = tied_rows(11, 60, [0.5, 1.0, 2.0])
    eta = eta + 300.0  # large scores must not overflow
    base = BaselineHazard.estimate(entry, exit, event, eta, weights=weights, ties=ties)
    ref = naive_baseline(entry, exit, event, eta - 300.0, weights, ties)
    ages = np.array(sorted(ref))
    np.testing.assert_allclose(base.steps_at(ages) * np.exp(300.0), [ref[a] for a in ages], rtol=1e-10)
    # Efron's tie correction only raises the jumps (common practice).
    if ties == "efron":
        breslow = BaselineHazard.estimate(entry, exit, event, eta, weights=weights)
        assert (base.steps_at(ages) >= breslow.steps_at(ages) * (1 - 1e-12)).all()


@pytest.mark.parametrize("ties", ["breslow", "efron"])
def test_from_risk_sets_equals_estimate(ties):
    # The boosted model builds its baseline from the risk sets it fitted on;
    # that must give the same curve as estimating from the rows (which is
    # checked against the naive loop above).
    from wearcast.models._cox_kernels import prepare_risk_sets

    entry, exit, event, eta, weights = tied_rows(12, 80, [1.0, 2.0, 3.0])
    rs = prepare_risk_sets(entry, exit, event, weights=weights, ties=ties)
    quick = BaselineHazard.from_risk_sets(rs, eta, interpolation="linear").fit_tails(
        entry, exit, event, eta, weights=weights)
    slow = BaselineHazard.estimate(entry, exit, event, eta, weights=weights, ties=ties, interpolation="linear")
    grid = np.linspace(0, 10, 41)
    np.testing.assert_allclose(quick.at(grid), slow.at(grid), rtol=1e-12, atol=1e-15)
    assert quick.strata == slow.strata and quick.ties == ties


def test_strata_and_round_trip(macs):
    entry, exit, event = macs
    strata = np.where(np.arange(exit.size) % 2 == 0, "north", "south")
    eta = np.linspace(-0.5, 0.5, exit.size)
    base = BaselineHazard.estimate(entry, exit, event, eta, strata=strata)
    assert base.strata == ["north", "south"]
    for label in ("north", "south"):
        keep = strata == label
        alone = BaselineHazard.estimate(entry[keep], exit[keep], event[keep], eta[keep])
        np.testing.assert_allclose(base.cumhaz[label], alone.cumhaz["all"], rtol=1e-13)
    with pytest.raises(ValueError, match="strata"):
        base.at(np.array([3.0]))
    with pytest.raises(ValueError, match="west"):
        base.at(np.array([3.0]), strata="west")
    ages = np.array([1.0, 4.0, 6.0, 9.0])
    labels = np.array(["north", "south", "south", "north"])
    text = json.dumps(base.to_dict())
    again = BaselineHazard.from_dict(json.loads(text))
    np.testing.assert_array_equal(again.at(ages, labels), base.at(ages, labels))
    for label in base.strata:
        np.testing.assert_array_equal(again.ages[label], base.ages[label])
        np.testing.assert_array_equal(again.cumhaz[label], base.cumhaz[label])
    with pytest.raises(ValueError, match="format"):
        BaselineHazard.from_dict({"format": "something else"})


def test_linear_interpolation_agrees_at_failure_ages_and_fills_gaps():
    # Checked against lifelines NelsonAalenFitter with entry on MACS at the failure ages;
    # between them the linear version must be strictly between neighbouring steps, so a
    # short window with no past failure age still gets a positive probability.
    from lifelines import NelsonAalenFitter
    from lifelines.datasets import load_multicenter_aids_cohort_study

    d = load_multicenter_aids_cohort_study()
    step = BaselineHazard.estimate(d["W"], d["T"], d["D"].astype(bool))
    lin = BaselineHazard.estimate(d["W"], d["T"], d["D"].astype(bool), interpolation="linear")
    fail_ages = np.unique(d["T"][d["D"] == 1])
    naf = NelsonAalenFitter(nelson_aalen_smoothing=False).fit(d["T"], d["D"], entry=d["W"])
    np.testing.assert_allclose(lin.steps_at(fail_ages), naf.cumulative_hazard_.loc[fail_ages].iloc[:, 0], rtol=1e-12)
    mids = (fail_ages[1:] + fail_ages[:-1]) / 2
    assert np.all(lin.steps_at(mids) > step.steps_at(mids)) and np.all(lin.steps_at(mids) < step.steps_at(fail_ages[1:]))
    tiny = (fail_ages[1:] - fail_ages[:-1]) / 4
    assert np.all(lin.fail_probability(0.0, mids, 0.0 + tiny.min()) > 0)
    assert np.all(step.fail_probability(0.0, mids[:3], 1e-9) == 0)
    # past the anchor both carry on with the same tail
    beyond = np.array([fail_ages[-1] + 10])
    anchor = lin.tail_of().anchor
    assert anchor in fail_ages and step.tail_of() == lin.tail_of()
    assert lin.at(beyond)[0] == pytest.approx(lin.steps_at(anchor) + lin.tail_of().increment(beyond)[0])
    assert lin.at(beyond)[0] - lin.at(anchor) == pytest.approx(step.at(beyond)[0] - step.at(anchor))
    assert BaselineHazard.from_dict(lin.to_dict()).interpolation == "linear"
