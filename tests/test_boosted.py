"""Boosted survival trees (wearcast.models.boosted and _boost_objective).

External references: lifelines' bundled datasets ``load_rossi`` (Rossi, Berk &
Lenihan 1980 recidivism data) and ``load_stanford_heart_transplants`` (Crowley
& Hu 1977, start/stop rows), lifelines' ``CoxPHFitter`` and
``concordance_index``, and the Cox kernel of this project (itself tested
against lifelines and R's published coefficients in test_cox_kernels.py).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from lifelines import CoxPHFitter
from lifelines.datasets import load_rossi, load_stanford_heart_transplants
from lifelines.utils import concordance_index

from _curves import assert_valid_probability, assert_valid_survival
from wearcast import LifeTable
from wearcast.config import BoostedSection
from wearcast.models._boost_objective import (
    HESSIAN_FLOOR,
    cox_objective,
    encode_covariates,
    grouped_folds,
    heldout_loss_per_event,
)
from wearcast.models._cox_kernels import cox_gradient_hessian, cox_loss, prepare_risk_sets
from wearcast.models.boosted import BoostedSurvivalTrees, BoostSettings

ROSSI_COVARIATES = ["fin", "age", "race", "wexp", "mar", "paro", "prio"]


@pytest.fixture(scope="module")
def rossi():
    frame = load_rossi()
    table_frame = frame.assign(
        unit_id=np.arange(len(frame)), entry_age=0.0, exit_age=frame["week"].astype(float), failed=frame["arrest"]
    )
    return frame, LifeTable.from_frame(table_frame, ROSSI_COVARIATES)


@pytest.fixture(scope="module")
def stanford():
    frame = load_stanford_heart_transplants()
    renamed = frame.rename(columns={"id": "unit_id", "start": "entry_age", "stop": "exit_age", "event": "failed"})
    return LifeTable.from_frame(renamed, ["age", "year", "surgery", "transplant"])


def _fixed(**overrides) -> BoostSettings:
    base = dict(n_trees=40, learning_rate=0.05, tree_depth=2, subsample=1.0, min_events_per_leaf=5)
    base.update(overrides)
    return BoostSettings(**base)


# -- the objective handed to LightGBM ----------------------------------------------
def test_objective_returns_the_kernel_gradient_and_hessian(stanford):
    rs = prepare_risk_sets(stanford.entry, stanford.exit, stanford.event, ties="efron")
    eta = np.random.default_rng(0).normal(scale=0.3, size=stanford.n_rows)
    grad, hess = cox_objective(rs)(eta, None)
    want_grad, want_hess = cox_gradient_hessian(rs, eta)
    # float32 (what LightGBM would round them to anyway)
    assert grad.dtype == hess.dtype == np.float32
    np.testing.assert_array_equal(grad, want_grad.astype(grad.dtype))
    np.testing.assert_array_equal(hess, np.maximum(want_hess, HESSIAN_FLOOR).astype(hess.dtype))


def test_subsampling_keeps_or_drops_whole_units(stanford):
    # Stanford rows are start/stop pieces of a patient's history: a tree's
    # subsample must keep or drop all of a patient's rows together.
    rs = prepare_risk_sets(stanford.entry, stanford.exit, stanford.event)
    codes = stanford.unit_codes()
    eta = np.zeros(rs.n)
    full_grad, full_hess = cox_objective(rs)(eta, None)
    draws = []
    objective = cox_objective(rs, subsample=0.5, unit_codes=codes, seed=3)
    for _ in range(40):
        grad, hess = objective(eta, None)
        kept = hess > 0
        np.testing.assert_array_equal(grad[kept], full_grad[kept])
        np.testing.assert_array_equal(hess[kept], full_hess[kept])
        assert (grad[~kept] == 0).all()
        per_unit = pd.Series(kept).groupby(codes).agg(["min", "max"])
        assert (per_unit["min"] == per_unit["max"]).all()
        draws.append(per_unit["min"].to_numpy())
    share = np.mean(draws)
    assert 0.45 < share < 0.55  # 40 draws of 103 units at p = 0.5: sd about 0.008
    again = cox_objective(rs, subsample=0.5, unit_codes=codes, seed=3)(eta, None)
    np.testing.assert_array_equal(again[1] > 0, pd.Series(draws[0])[codes].to_numpy())


def test_first_tree_leaves_are_newton_steps_on_the_kernel_values(rossi):
    # Wiring: with lambda_l2 = 0 and no bagging, LightGBM sets each leaf to
    # -lr * sum(grad) / sum(hess) over its rows (Newton step; LightGBM docs,
    # "custom objective"). Recomputing that from the kernel's values at eta = 0
    # shows the booster was fed exactly the kernel's gradient and Hessian.
    _, table = rossi
    model = BoostedSurvivalTrees(_fixed(n_trees=1, tree_depth=2, learning_rate=0.1), seed=1).fit(table)
    M = encode_covariates(table.X, model.covariates_, model.category_levels_)
    leaf = model.booster_.predict(M, pred_leaf=True).ravel()
    rs = prepare_risk_sets(table.entry, table.exit, table.event, ties="efron")
    grad, hess = cox_gradient_hessian(rs, np.zeros(table.n_rows))
    raw = model.log_risk(table.X)
    assert len(np.unique(leaf)) > 1, "the first tree should split"
    for k in np.unique(leaf):
        rows = leaf == k
        expected = -0.1 * grad[rows].sum() / hess[rows].sum()
        np.testing.assert_allclose(raw[rows], expected, rtol=1e-5)


def test_training_loss_never_rises_with_small_learning_rate(rossi):
    # Common practice: with small shrinkage each Newton-step tree lowers the
    # training loss it was fitted to.
    _, table = rossi
    model = BoostedSurvivalTrees(_fixed(n_trees=60, learning_rate=0.01), seed=2).fit(table)
    M = encode_covariates(table.X, model.covariates_, model.category_levels_)
    rs = prepare_risk_sets(table.entry, table.exit, table.event, ties="efron")
    losses = [cox_loss(rs, np.zeros(table.n_rows))]
    for b in range(1, 61):
        losses.append(cox_loss(rs, model.booster_.predict(M, raw_score=True, num_iteration=b)))
    steps = np.diff(losses)
    assert (steps <= 1e-9).all(), f"training loss rose by {steps.max()}"
    assert losses[-1] < losses[0] - 1.0


# -- against lifelines on published data ----------------------------------------------
def test_rossi_stumps_approach_the_linear_cox_concordance(rossi):
    frame, table = rossi
    cph = CoxPHFitter().fit(frame, "week", "arrest")
    # Rossi data: Harrell C of the linear Cox model is 0.640 (R survival::coxph,
    # as in Fox & Weisberg's appendix on Cox regression; recalled from memory).
    assert cph.concordance_index_ == pytest.approx(0.640, abs=0.002)
    # Additive stumps, small shrinkage, many trees: an additive model close to
    # the linear fit; its training C lies within 0.02 of lifelines' C.
    model = BoostedSurvivalTrees(
        _fixed(n_trees=300, tree_depth=1, learning_rate=0.01, min_events_per_leaf=20), seed=3
    ).fit(table)
    c_boosted = concordance_index(frame["week"], -model.risk_score(table.X), frame["arrest"])
    assert abs(c_boosted - cph.concordance_index_) <= 0.02, (c_boosted, cph.concordance_index_)


def test_rossi_cross_validation_picks_a_number_of_trees(rossi):
    _, table = rossi
    model = BoostedSurvivalTrees(
        seed=4, max_trees=300, learning_rate=0.1, tree_depth=1, folds=4, early_stopping_trees=20,
        min_events_per_leaf=10,
    ).fit(table)
    curve = model.cv_curve_
    assert model.n_trees_ == int(np.nanargmin(curve)) + 1
    assert model.cv_fold_curves_.shape == (4, len(curve))
    # Early stopping: the curve ran exactly `patience` trees past its minimum.
    assert len(curve) == model.n_trees_ + 20 or len(curve) == 300
    # The chosen B predicts held-out units better than no model at all (every
    # log risk 0) on the same unit-grouped folds; Rossi's covariates carry real
    # signal (lifelines / R coxph likelihood-ratio test p < 0.001, recalled
    # from memory).
    rng = np.random.default_rng(4)
    fold_seed, _ = rng.integers(0, 2**31 - 1, size=2)
    folds = grouped_folds(table.unit_codes(), 4, np.random.default_rng(int(fold_seed)))
    null = []
    for k in range(4):
        held = folds == k
        rs = prepare_risk_sets(table.entry[held], table.exit[held], table.event[held], ties="efron")
        null.append(heldout_loss_per_event(rs, np.zeros(held.sum())))
    assert curve[model.n_trees_ - 1] < np.mean(null) - 0.01, (curve[model.n_trees_ - 1], np.mean(null))


def test_stanford_start_stop_rows_give_valid_curves(stanford):
    model = BoostedSurvivalTrees(_fixed(n_trees=30), seed=5).fit(stanford)
    X = stanford.X
    times = np.linspace(0, 1800, 40)
    assert_valid_survival(model.survival(X, times))
    p = model.fail_probability(X, stanford.exit, 365.0)
    assert_valid_probability(p)
    assert np.isfinite(model.cumulative_hazard_at(X, stanford.exit)).all()
    # Drivers add up to the log risk.
    contrib = model.contributions(X)
    np.testing.assert_allclose(contrib.sum(axis=1) + contrib.attrs["bias"], model.log_risk(X), atol=1e-9)


# -- folds, determinism, settings --------------------------------------------------------
def test_grouped_folds_never_split_a_unit(stanford):
    codes = stanford.unit_codes()
    assert len(codes) > stanford.n_units  # several rows for some units
    folds = grouped_folds(codes, 5, np.random.default_rng(0))
    per_unit = pd.Series(folds).groupby(codes).nunique()
    assert (per_unit == 1).all()
    units_per_fold = pd.Series(codes).groupby(folds).nunique()
    assert units_per_fold.max() - units_per_fold.min() <= 1
    again = grouped_folds(codes, 5, np.random.default_rng(0))
    np.testing.assert_array_equal(folds, again)


def test_same_seed_same_predictions_on_one_and_two_threads(stanford):
    settings = dict(max_trees=60, folds=3, early_stopping_trees=10, subsample=0.7, predictors_per_split=0.75,
                    min_events_per_leaf=5)
    one = BoostedSurvivalTrees(seed=11, threads=1, **settings).fit(stanford)
    two = BoostedSurvivalTrees(seed=11, threads=2, **settings).fit(stanford)
    assert one.n_trees_ == two.n_trees_
    np.testing.assert_array_equal(one.log_risk(stanford.X), two.log_risk(stanford.X))
    other = BoostedSurvivalTrees(_fixed(n_trees=one.n_trees_, subsample=0.7), seed=12).fit(stanford)
    same = BoostedSurvivalTrees(_fixed(n_trees=one.n_trees_, subsample=0.7), seed=11).fit(stanford)
    assert not np.array_equal(other.log_risk(stanford.X), same.log_risk(stanford.X))


def test_row_wise_one_thread_equals_column_wise_two_threads():
    # One thread builds row-wise histograms, several threads column-wise ones; the
    # sums are the same numbers added in the same order, so the trees must be
    # identical. Random data with many distinct values (full 255-bin histograms);
    # a determinism property, not a reference check.
    rng = np.random.default_rng(3)
    n = 6000
    X = rng.normal(size=(n, 4))
    exit_ = rng.weibull(2.0, n) * 1000 * np.exp(-0.5 * X[:, 0] + 0.3 * X[:, 1] ** 2)
    entry = np.where(rng.random(n) < 0.3, exit_ * rng.random(n) * 0.9, 0.0)
    frame = pd.DataFrame(X, columns=["a", "b", "c", "d"]).assign(
        unit_id=np.arange(n), entry_age=entry, exit_age=exit_, failed=rng.random(n) < 0.7)
    table = LifeTable.from_frame(frame, ["a", "b", "c", "d"])
    settings = _fixed(n_trees=30, tree_depth=3, subsample=0.8, predictors_per_split=0.75)
    one = BoostedSurvivalTrees(replace(settings, threads=1), seed=2).fit(table)
    two = BoostedSurvivalTrees(replace(settings, threads=2), seed=2).fit(table)
    assert one._lgb_params(0, ("a",), {})["force_row_wise"] and two._lgb_params(0, ("a",), {})["force_col_wise"]
    np.testing.assert_array_equal(one.log_risk(table.X), two.log_risk(table.X))


def test_from_config_maps_every_knob():
    section = BoostedSection(learning_rate=0.1, max_trees=77, tree_depth=2, max_leaves=3, subsample=0.5,
                             predictors_per_split=0.5, min_events_per_leaf=4, folds=3, early_stopping_trees=7,
                             ties="breslow", monotone={"prio": 1}, threads=2)
    model = BoostedSurvivalTrees.from_config(section, seed=9)
    params = model._lgb_params(1, ("age", "prio"), {})
    assert (params["learning_rate"], params["max_depth"], params["num_leaves"]) == (0.1, 2, 3)
    assert params["feature_fraction_bynode"] == 0.5
    # subsampling is by units inside the objective, never LightGBM's row bagging
    assert model.settings.subsample == 0.5 and "bagging_fraction" not in params
    assert params["monotone_constraints"] == [0, 1]
    assert params["min_data_in_leaf"] == 4 and params["min_sum_hessian_in_leaf"] == pytest.approx(2.0)
    assert params["num_threads"] == 2 and model.settings.ties == "breslow" and model.seed == 9


def test_monotone_constraint_holds(rossi):
    _, table = rossi
    model = BoostedSurvivalTrees(_fixed(n_trees=50, monotone={"prio": 1}), seed=6).fit(table)
    grid = table.X.iloc[np.repeat(np.arange(20), 15)].reset_index(drop=True)
    grid["prio"] = np.tile(np.arange(15, dtype=float), 20)
    eta = model.log_risk(grid).reshape(20, 15)
    assert (np.diff(eta, axis=1) >= -1e-12).all()


def test_categorical_levels_survive_save_and_unseen_levels(tmp_path, rossi):
    frame, _ = rossi
    make = np.array(["Brannick", "Corvale", "Ostrel"])[np.arange(len(frame)) % 3]
    table = LifeTable.from_frame(
        frame.assign(unit_id=np.arange(len(frame)), entry_age=0.0, exit_age=frame["week"].astype(float),
                     failed=frame["arrest"], make=make),
        ["prio", "age", "make"], categorical=["make"],
    )
    model = BoostedSurvivalTrees(_fixed(n_trees=20), seed=7).fit(table)
    paths = model.save(tmp_path)
    assert {p.name for p in paths} == {"boosted_trees.txt", "boosted_baseline.json", "boosted_settings.json"}
    loaded = BoostedSurvivalTrees.load(tmp_path)
    X = table.X
    np.testing.assert_array_equal(loaded.log_risk(X), model.log_risk(X))
    # Text instead of category dtype, and a level never seen: same codes, NaN branch.
    as_text = X.assign(make=X["make"].astype(str))
    np.testing.assert_array_equal(loaded.log_risk(as_text), model.log_risk(X))
    unseen = X.assign(make="Quillmark")
    assert np.isfinite(loaded.log_risk(unseen)).all()
    ages = np.full(len(X), 20.0)
    np.testing.assert_array_equal(loaded.fail_probability(X, ages, 30), model.fail_probability(X, ages, 30))


def test_unfitted_copy_fixes_the_number_of_trees(rossi):
    _, table = rossi
    model = BoostedSurvivalTrees(seed=8, max_trees=80, folds=3, early_stopping_trees=10, tree_depth=1).fit(table)
    copy = model.unfitted_copy(seed=99)
    assert copy.booster_ is None and copy.settings.n_trees == model.n_trees_ and copy.seed == 99
    refit = copy.fit(table)
    assert refit.n_trees_ == model.n_trees_ and refit.cv_curve_ is None


def test_weighted_bootstrap_fit_follows_the_copied_units_fit(rossi):
    # A refit takes the unit draw as case weights. With Breslow ties the loss and
    # gradient equal the copied table's exactly (test_lifetable.py); the diagonal
    # Hessian differs by the cross terms between a unit's copies (a weight-w row
    # is one coordinate, w copies are w), so leaf values move slightly. Same
    # trees otherwise: Rossi's binary covariates keep LightGBM's bins identical,
    # no row subsampling, leaf limits rows cannot tell apart.
    _, table = rossi
    small = LifeTable.from_frame(table.frame, ["fin", "race", "wexp", "mar", "paro"])
    settings = _fixed(ties="breslow", min_events_per_leaf=1, n_trees=15)
    weighted = BoostedSurvivalTrees(settings, seed=4).fit_resampled(small, np.random.default_rng(21))
    copied = BoostedSurvivalTrees(settings, seed=4).fit(small.bootstrap_units(np.random.default_rng(21)))
    rows_once, _ = small.bootstrap_weights(np.random.default_rng(21))
    unweighted = BoostedSurvivalTrees(settings, seed=4).fit(rows_once)
    eta_w, eta_c = weighted.log_risk(small.X), copied.log_risk(small.X)
    # measured: 0.002 apart, while dropping the weights moves eta by 0.79
    assert np.abs(eta_w - eta_c).max() < 0.01
    assert np.abs(unweighted.log_risk(small.X) - eta_c).max() > 0.1
    ages = np.full(small.n_rows, 20.0)
    np.testing.assert_allclose(weighted.fail_probabilities(small.X, ages, [4, 26]),
                               copied.fail_probabilities(small.X, ages, [4, 26]), rtol=0.02)
    # a cache kept across refits changes nothing
    cache: dict = {}
    for _ in range(2):
        cached = BoostedSurvivalTrees(settings, seed=4).fit_resampled(small, np.random.default_rng(21), cache=cache)
        np.testing.assert_array_equal(cached.log_risk(small.X), eta_w)
    assert len(cache) == 1
    eta_again, p_again = weighted.score_units(small.X, ages, [4, 26])
    np.testing.assert_array_equal(eta_again, eta_w)
    np.testing.assert_array_equal(p_again, weighted.fail_probabilities(small.X, ages, [4, 26]))
    # the one-pass horizons equal the per-horizon method
    np.testing.assert_array_equal(weighted.fail_probabilities(small.X, ages, [4, 26])[:, 1],
                                  weighted.fail_probability(small.X, ages, 26))


# -- the core claim: delayed entry matters -------------------------------------------------
@pytest.mark.slow
def test_delayed_entry_brings_one_year_probability_to_the_truth(tmp_path_factory):
    # Invented scenario with a known true hazard (wearcast.scenario: Weibull
    # wear-out, records start 5 years before the export, so most units enter
    # late). The oracle is the scenario's true one-year conditional failure
    # probability of each in-service unit. Ignoring left truncation (first row
    # of every life starting at age 0) puts survivors into risk sets at ages
    # when nobody watched them, which dilutes the hazard and understates the
    # probability (common practice; Klein & Moeschberger, "Survival Analysis",
    # section on left-truncated data — recalled from memory).
    from wearcast.config import load_config
    from wearcast.io import load_export
    from wearcast.scenario import generate_scenario, read_truth, true_fail_probability

    files = generate_scenario(tmp_path_factory.mktemp("fleet"), n_units=3000, seed=5)
    table = load_export(load_config(files.config)).table
    truth = read_truth(files.truth).set_index("unit_id")
    in_service = table.in_service()
    oracle = true_fail_probability(truth.loc[in_service.frame["unit_id"]].reset_index())
    known = np.isfinite(oracle)
    assert known.mean() > 0.95

    frame = table.frame.copy()
    first_row = frame.groupby(["unit_id", "life"])["entry_age"].transform("min") == frame["entry_age"]
    assert (frame.loc[first_row, "entry_age"] > 0).mean() > 0.5  # most lives enter late
    frame.loc[first_row, "entry_age"] = 0.0
    ignoring = LifeTable(frame, table.covariates, table.categorical, table.as_of)

    settings = BoostSettings(n_trees=100, learning_rate=0.05, tree_depth=2)
    mean_p = {}
    for label, data in (("delayed_entry", table), ("entry_zero", ignoring)):
        model = BoostedSurvivalTrees(settings, seed=1).fit(data)
        p = model.fail_probability(in_service.X, in_service.exit, 365.0)
        assert_valid_probability(p)
        mean_p[label] = p[known].mean()
    truth_mean = oracle[known].mean()
    error = {k: abs(v / truth_mean - 1) for k, v in mean_p.items()}
    # Measured with these seeds: truth 0.0292, delayed entry 0.0337, entry 0: 0.0290. Ignoring
    # entry lowers the probability by 15 %. This fleet's records hold more failures at old ages
    # than its truth expects (a Breslow curve with the true scores is 5-10 % above the true
    # baseline past 3,000 days), so the delayed-entry fit is high and the biased one lands near
    # the truth by chance; on 10,000-unit fleets (bench/README.md) delayed entry is within 6 %.
    # Before the tail past the oldest failure existed, the oldest units' zeros hid this
    # (0.0303 against 0.0253).
    assert mean_p["entry_zero"] < 0.90 * mean_p["delayed_entry"], (truth_mean, mean_p)
    assert error["delayed_entry"] <= 0.20, (truth_mean, mean_p)


def test_category_codes_match_the_text_path():
    # The fast path for pandas categoricals must give the codes the text path gives,
    # including missing values and a level the model never saw (both NaN).
    import numpy as np
    import pandas as pd

    from wearcast.models._boost_objective import encode_covariates

    levels = {"maker": ["Brannick", "Corvale", "Ostrel"]}
    text = pd.Series(["Ostrel", None, "Corvale", "Unseen", "Brannick", "Ostrel"], dtype=object)
    as_text = pd.DataFrame({"maker": text, "x": np.arange(6.0)})
    as_category = pd.DataFrame({"maker": text.astype("category"), "x": np.arange(6.0)})
    a = encode_covariates(as_text, ("maker", "x"), levels)
    b = encode_covariates(as_category, ("maker", "x"), levels)
    np.testing.assert_array_equal(a, b)
    assert np.isnan(a[1, 0]) and np.isnan(a[3, 0]) and a[0, 0] == 2.0


def test_missing_values_take_lightgbm_branch_or_the_training_median(tmp_path, rossi):
    # Reference: LightGBM itself. Without a missing value in training, LightGBM reads a NaN
    # at scoring as 0 (checked here on its raw booster), which would score a unit with no
    # reading as one with no prior convictions; wearcast fills it with the training median.
    # With missing values in training, NaN takes LightGBM's learned branch unchanged.
    frame, table = rossi
    model = BoostedSurvivalTrees(_fixed(n_trees=30), seed=3).fit(table)
    assert model.fill_values_ == {c: float(np.median(frame[c])) for c in ROSSI_COVARIATES}
    X = table.X.iloc[:5]
    gap = X.assign(prio=np.nan)
    raw = encode_covariates(gap, tuple(ROSSI_COVARIATES), {})
    as_zero = encode_covariates(X.assign(prio=0.0), tuple(ROSSI_COVARIATES), {})
    np.testing.assert_array_equal(model.booster_.predict(raw, raw_score=True),
                                  model.booster_.predict(as_zero, raw_score=True))
    np.testing.assert_array_equal(model.log_risk(gap), model.log_risk(X.assign(prio=float(np.median(frame["prio"])))))
    model.save(tmp_path)
    loaded = BoostedSurvivalTrees.load(tmp_path)
    np.testing.assert_array_equal(loaded.log_risk(gap), model.log_risk(gap))

    holes = frame.assign(unit_id=np.arange(len(frame)), entry_age=0.0, exit_age=frame["week"].astype(float),
                         failed=frame["arrest"], prio=frame["prio"].astype(float).where(np.arange(len(frame)) % 5 > 0))
    with_gaps = BoostedSurvivalTrees(_fixed(n_trees=30), seed=3).fit(LifeTable.from_frame(holes, ROSSI_COVARIATES))
    assert "prio" not in with_gaps.fill_values_
    M = encode_covariates(gap, tuple(ROSSI_COVARIATES), {})
    np.testing.assert_array_equal(with_gaps.log_risk(gap), with_gaps.booster_.predict(M, raw_score=True))
