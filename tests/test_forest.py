"""Survival forest with delayed entry: kernels and the fitted model."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from _curves import assert_valid_probability, assert_valid_survival
from lifelines import KaplanMeierFitter, NelsonAalenFitter
from lifelines.datasets import load_multicenter_aids_cohort_study
from sksurv.datasets import load_gbsg2
from sksurv.ensemble import RandomSurvivalForest
from sksurv.metrics import concordance_index_censored

from wearcast import LifeTable
from wearcast.config import ForestSection, load_config
from wearcast.exceptions import ConfigError, ModelError
from wearcast.io import load_export
from wearcast.models._forest_grow import apply_tree, grow_tree, martingale_residuals
from wearcast.models._forest_leaves import failure_age_grid, leaf_hazards_on_grid
from wearcast.models._forest_oob import bootstrap_draw, harrell_c
from wearcast.models.forest import SurvivalForest
from wearcast.scenario import generate_scenario


def _macs() -> pd.DataFrame:
    """lifelines' Multicenter AIDS Cohort Study sample: W entry, T exit, D event (years)."""
    return load_multicenter_aids_cohort_study()


def _table(frame: pd.DataFrame, covariates, categorical=()) -> LifeTable:
    return LifeTable.from_frame(frame, covariates, categorical)


def _truncated_weibull(n_units: int, seed: int) -> LifeTable:
    """Small left-truncated Weibull sample for fast kernel checks (shape 2, scale 1000 days, log HR 0.5 per sd
    of ``x``; ``z`` is noise); units that failed before their entry age are never seen."""
    rng = np.random.default_rng(seed)
    n = 4 * n_units
    x, z = rng.normal(size=n), rng.normal(size=n)
    life = 1000.0 * (rng.exponential(size=n) / np.exp(0.5 * x)) ** 0.5
    entry = rng.uniform(0, 1200, size=n)
    seen = np.flatnonzero(life > entry)[:n_units]
    censor = entry[seen] + rng.uniform(50, 1000, size=len(seen))
    frame = pd.DataFrame({
        "unit_id": [f"P{i:05d}" for i in range(len(seen))], "entry_age": entry[seen],
        "exit_age": np.minimum(life[seen], censor), "failed": life[seen] <= censor,
        "x": x[seen], "z": z[seen],
    })
    return _table(frame, ["x", "z"])


# -- kernels -------------------------------------------------------------------
def test_martingale_residuals_sum_to_zero_under_the_null_model():
    # Therneau, Grambsch and Fleming (1990, Biometrika 77:147-160): residuals of the
    # Nelson-Aalen null model sum to zero; with delayed entry each row is charged only
    # for its own (entry, exit] interval, which keeps the identity.
    d = _macs()
    res = martingale_residuals(d["W"].to_numpy(), d["T"].to_numpy(), d["D"].to_numpy().astype(bool))
    assert abs(res.sum()) < 1e-9
    assert (res <= 1.0 + 1e-12).all()  # observed minus expected never exceeds one failure


def test_leaf_hazards_match_lifelines_nelson_aalen_per_leaf():
    # Source: lifelines NelsonAalenFitter with entry (reference implementation), on
    # lifelines' MACS data split into two "leaves" by entry age.
    d = _macs()
    entry, exit, event = d["W"].to_numpy(), d["T"].to_numpy(), d["D"].to_numpy().astype(bool)
    leaf = (entry > np.median(entry)).astype(np.int32)
    grid = failure_age_grid(exit, event, 1000)
    hazard = leaf_hazards_on_grid(leaf, 2, entry, exit, event, np.ones(len(d)), grid)
    assert hazard.dtype == np.float32 and hazard.shape == (2, len(grid))
    for k in (0, 1):
        rows = leaf == k
        ref = NelsonAalenFitter(nelson_aalen_smoothing=False).fit(exit[rows], event[rows], entry=entry[rows])
        np.testing.assert_allclose(hazard[k], ref.cumulative_hazard_at_times(grid).to_numpy(), rtol=1e-6, atol=1e-7)


def test_weights_act_as_copies_in_leaf_hazards():
    # A row of weight 2 counts like two identical rows (definition of case weights).
    d = _macs()
    entry, exit, event = d["W"].to_numpy(), d["T"].to_numpy(), d["D"].to_numpy().astype(bool)
    w = np.tile([0, 1, 2], len(d))[: len(d)].astype(float)
    grid = failure_age_grid(exit, event, 1000)
    weighted = leaf_hazards_on_grid(np.zeros(len(d), np.int32), 1, entry, exit, event, w, grid)
    rows = np.repeat(np.arange(len(d)), w.astype(int))
    copied = leaf_hazards_on_grid(np.zeros(len(rows), np.int32), 1, entry[rows], exit[rows], event[rows],
                                  np.ones(len(rows)), grid)
    np.testing.assert_allclose(weighted, copied, rtol=1e-6)


@pytest.mark.parametrize("block_cells", [None, 64])
def test_compiled_leaf_hazards_equal_the_numpy_ones(block_cells, monkeypatch):
    # Many leaves, tied ages, delayed entry, zero and repeated weights, grid ages
    # before the first failure; small blocks exercise the blocked path.
    from wearcast.models import _forest_leaves as fl

    if fl._leaf_hazards_compiled is None:
        pytest.skip("numba is not installed")
    if block_cells is not None:
        monkeypatch.setattr(fl, "MAX_BLOCK_CELLS", block_cells)
    rng = np.random.default_rng(8)
    n = 5000
    entry = rng.integers(0, 300, n).astype(float)
    exit = entry + rng.integers(1, 400, n)
    event = rng.random(n) < 0.4
    grid = np.concatenate([[0.5], np.quantile(exit[event], np.linspace(0, 1, 60))])
    index = fl.risk_index(entry, exit, event, grid)
    leaf = rng.integers(0, 37, n)
    weights = rng.choice([0.0, 1.0, 2.0, 3.0], n)
    compiled = fl.leaf_hazards_indexed(index, leaf, 37, weights)
    reference = fl.leaf_hazards_numpy(index, leaf, 37, weights)
    np.testing.assert_allclose(compiled, reference, rtol=1e-6, atol=0)
    assert (compiled[:, 0] == 0).all()


def test_grid_is_bounded_and_holds_all_failure_ages_when_few():
    rng = np.random.default_rng(1)
    exit = rng.uniform(1, 5000, size=20_000)
    event = rng.random(20_000) < 0.5
    grid = failure_age_grid(exit, event, 200)
    assert len(grid) <= 200 and np.all(np.diff(grid) > 0)
    assert grid[0] == exit[event].min() and grid[-1] == exit[event].max()
    few = failure_age_grid(exit[:50], event[:50], 200)
    np.testing.assert_array_equal(few, np.unique(exit[:50][event[:50]]))


def test_every_leaf_keeps_min_events():
    table = _truncated_weibull(800, seed=3)
    X = table.X.to_numpy(np.float32)
    counts, tree_seed = bootstrap_draw(11, table.n_units)
    w = counts[table.unit_codes()].astype(float)
    tree = grow_tree(X, table.entry, table.exit, table.event, w, max_features=None, max_depth=8,
                     min_events=7, random_state=tree_seed)
    assert tree.n_leaves > 2
    leaf = apply_tree(tree, X)
    per_leaf = np.bincount(leaf, weights=w * table.event, minlength=tree.n_leaves)
    assert per_leaf.min() >= 7


# -- the fitted model ---------------------------------------------------------
def test_single_unsplit_tree_equals_lifelines_nelson_aalen_with_entry():
    # Source: lifelines NelsonAalenFitter(nelson_aalen_smoothing=False) with entry=W on
    # lifelines' load_multicenter_aids_cohort_study (reference implementation).
    d = _macs()
    frame = pd.DataFrame({"unit_id": [f"M{i}" for i in range(len(d))], "entry_age": d["W"], "exit_age": d["T"],
                          "failed": d["D"].astype(bool), "x": np.arange(len(d), dtype=float)})
    model = SurvivalForest("bagging", n_trees=1, max_depth=0, time_grid_points=1000, bootstrap=False)
    model.fit(_table(frame, ["x"]))
    ref = NelsonAalenFitter(nelson_aalen_smoothing=False).fit(d["T"], d["D"], entry=d["W"])
    np.testing.assert_array_equal(model.grid_, np.unique(d["T"][d["D"] == 1]))
    expected = ref.cumulative_hazard_at_times(model.grid_).to_numpy()
    np.testing.assert_allclose(model.leaf_hazards_[0][0], expected, rtol=1e-6)
    # the model follows it up to the tail's anchor (the tenth-oldest failure), then the tail
    upto = model.grid_ <= model.tail_.anchor
    got = model.cumulative_hazard_at(frame[["x"]].iloc[:len(model.grid_)], model.grid_)
    np.testing.assert_allclose(got[upto], expected[upto], rtol=1e-6)
    assert model.tail_.anchor == np.sort(d["T"][d["D"] == 1])[-10]
    np.testing.assert_allclose(got[~upto], expected[upto][-1] + model.tail_.increment(model.grid_[~upto]), rtol=1e-6)


@pytest.fixture(scope="module")
def scenario_table(tmp_path_factory) -> LifeTable:
    """The invented demo fleet (2,000 positions, records start 5 years before the
    export, so most units enter late), read through the real export loader."""
    files = generate_scenario(tmp_path_factory.mktemp("fleet"), n_units=2000, seed=7)
    return load_export(load_config(files.config)).table


def test_average_survival_follows_delayed_entry_kaplan_meier(scenario_table):
    # Source: lifelines KaplanMeierFitter with entry (reference implementation), on the
    # invented scenario (about 35,000 rows, 2,200 lives, 1,370 delayed entries, 207 failures).
    # Measured: averaged over the training rows, the largest gap at the 10..90 % failure-age
    # deciles is 0.012 with entry (splits on episodes; 0.016 on rows); with entry set to 0 it
    # is 0.26 (risk sets padded with units not yet watched, so survival is far too high).
    table = scenario_table
    km = KaplanMeierFitter().fit(table.exit, table.event, entry=table.entry)
    ages = np.quantile(table.exit[table.event], np.linspace(0.1, 0.9, 9))
    reference = km.survival_function_at_times(ages).to_numpy()
    model = SurvivalForest(n_trees=20, seed=3, n_jobs=2).fit(table)
    gap = np.abs(model.survival(table.X, ages).mean(axis=0) - reference).max()
    assert gap < 0.04
    ignored = table.frame.copy()
    ignored["entry_age"] = 0.0  # rows of one life now overlap, so skip re-validation
    naive_table = LifeTable(ignored, table.covariates, table.categorical)
    naive = SurvivalForest(n_trees=20, seed=3, n_jobs=2).fit(naive_table)
    naive_gap = np.abs(naive.survival(table.X, ages).mean(axis=0) - reference).max()
    assert naive_gap > 0.15


def test_curves_and_conditional_probabilities_are_valid():
    # common practice (as scikit-survival's tests check every predicted curve)
    table = _truncated_weibull(600, seed=5)
    model = SurvivalForest("bagging", n_trees=15, seed=2).fit(table)
    ages = np.linspace(0, 2500, 60)
    assert_valid_survival(model.survival(table.X, ages))
    p = model.fail_probability(table.X, table.exit, 365.0)
    assert_valid_probability(p)
    H = model.cumulative_hazard(table.X, ages)
    np.testing.assert_allclose(model.cumulative_hazard_at(table.X, np.full(table.n_rows, 900.0)),
                               model.cumulative_hazard(table.X, [900.0])[:, 0])
    assert np.all(np.diff(H, axis=1) >= 0)


def test_oob_concordance_is_near_half_on_noise_while_in_bag_is_high():
    # Leakage check (common practice): deep trees memorise noise, so C on the training
    # units is high, but a correct OOB C stays near 0.5.
    rng = np.random.default_rng(21)
    n = 600
    frame = pd.DataFrame({"unit_id": [f"N{i}" for i in range(n)], "entry_age": rng.uniform(0, 100, n),
                          "failed": rng.random(n) < 0.7})
    frame["exit_age"] = frame["entry_age"] + rng.exponential(500, n) + 1
    for k in range(5):
        frame[f"noise{k}"] = rng.normal(size=n)
    table = _table(frame, [f"noise{k}" for k in range(5)])
    model = SurvivalForest("bagging", n_trees=40, min_events_per_leaf=1, max_depth=30, seed=4).fit(table)
    in_bag = harrell_c(table.event, table.exit, model.risk_score(table.X))
    assert in_bag > 0.75
    assert 0.44 < model.oob_concordance_ < 0.56
    assert list(model.oob_curve_["trees"])[-1] == 40


def test_oob_risk_ignores_trees_that_saw_the_unit():
    table = _truncated_weibull(400, seed=9)
    model = SurvivalForest(n_trees=12, seed=8).fit(table)
    before = model.oob_risk(table)
    np.testing.assert_allclose(before, model.oob_risk_)
    counts, _ = bootstrap_draw(int(model.tree_seeds_[0]), table.n_units)
    in_bag = counts[table.unit_codes()] > 0  # one row per unit here
    model.leaf_risks_[0] = model.leaf_risks_[0] * 10 + 1
    after = model.oob_risk(table)
    np.testing.assert_array_equal(after[in_bag], before[in_bag])
    assert np.all(after[~in_bag] != before[~in_bag])


def test_same_seed_same_predictions_for_one_and_two_workers(tmp_path):
    table = _truncated_weibull(500, seed=11)
    one = SurvivalForest(n_trees=10, seed=5, n_jobs=1).fit(table)
    two = SurvivalForest(n_trees=10, seed=5, n_jobs=2).fit(table)
    ages = np.linspace(0, 2000, 30)
    np.testing.assert_array_equal(one.cumulative_hazard(table.X, ages), two.cumulative_hazard(table.X, ages))
    np.testing.assert_array_equal(one.oob_risk_, two.oob_risk_)
    other = SurvivalForest(n_trees=10, seed=6).fit(table)
    assert not np.array_equal(one.risk_score(table.X), other.risk_score(table.X))


def test_save_load_round_trip_with_categories(tmp_path):
    table = _truncated_weibull(500, seed=12)
    frame = table.frame.copy()
    frame["seal"] = np.where(frame["x"] > 0.3, "packed", np.where(frame["z"] > 0, "double", "single"))
    frame.loc[::17, "z"] = np.nan  # missing values follow the side chosen while growing
    table = _table(frame, ["x", "z", "seal"], ["seal"])
    model = SurvivalForest(n_trees=8, seed=1).fit(table)
    paths = model.save(tmp_path / "forest")
    assert {p.name for p in paths} == {"forest.json", "forest_arrays.npz"}
    loaded = SurvivalForest.load(tmp_path / "forest")
    ages = np.linspace(0, 2000, 25)
    new = table.X.copy()
    new.loc[new.index[:3], "seal"] = np.nan
    for X in (table.X, new):
        np.testing.assert_array_equal(model.cumulative_hazard(X, ages), loaded.cumulative_hazard(X, ages))
        np.testing.assert_array_equal(model.risk_score(X), loaded.risk_score(X))
    assert loaded.feature_names_ == ["x", "z", "seal=double", "seal=packed", "seal=single"]
    copy = loaded.unfitted_copy(99)
    assert copy.settings() == {**model.settings(), "seed": 99}


def test_settings_from_config_and_errors():
    model = SurvivalForest.from_config(ForestSection(mode="bagging", n_trees=3), seed=7)
    assert (model.mode, model.n_trees, model.seed, model._max_features()) == ("bagging", 3, 7, None)
    assert SurvivalForest()._max_features() == "sqrt"
    assert SurvivalForest(predictors_per_split=0.5)._max_features() == 0.5
    with pytest.raises(ConfigError, match="mode"):
        SurvivalForest(mode="boosting")
    frame = pd.DataFrame({"unit_id": ["a", "b"], "entry_age": [0, 0], "exit_age": [5, 6], "failed": [0, 0], "x": [1, 2]})
    with pytest.raises(ModelError, match="no failures"):
        SurvivalForest(n_trees=2).fit(_table(frame, ["x"]))


def test_held_out_concordance_close_to_scikit_survival_forest_on_gbsg2():
    # Reference library: scikit-survival RandomSurvivalForest (exact log-rank splits) on
    # its bundled German Breast Cancer Study Group 2 data; same split, 100 trees each.
    # Measured on four splits: ours 0.707/0.656/0.680/0.697, peer 0.708/0.653/0.684/0.705.
    X, y = load_gbsg2()
    X = X.copy()
    for col in ("horTh", "menostat", "tgrade"):
        X[col] = X[col].astype(str)
    order = np.random.default_rng(0).permutation(len(X))
    train, test = order[: 2 * len(X) // 3], order[2 * len(X) // 3:]
    frame = X.copy()
    frame["unit_id"] = [f"G{i}" for i in range(len(X))]
    frame["entry_age"], frame["exit_age"], frame["failed"] = 0.0, y["time"], y["cens"]
    table = _table(frame, list(X.columns), ["horTh", "menostat", "tgrade"])
    ours = SurvivalForest(n_trees=100, min_events_per_leaf=6, seed=0, n_jobs=2).fit(table.take_rows(train))
    c_ours = concordance_index_censored(y["cens"][test], y["time"][test], ours.risk_score(table.X.iloc[test]))[0]
    X_num = pd.get_dummies(X, dtype=float)
    peer = RandomSurvivalForest(n_estimators=100, min_samples_leaf=15, max_features="sqrt", random_state=0, n_jobs=2)
    peer.fit(X_num.iloc[train], y[train])
    c_peer = concordance_index_censored(y["cens"][test], y["time"][test], peer.predict(X_num.iloc[test]))[0]
    assert c_ours >= c_peer - 0.02, (c_ours, c_peer)


# -- fast per-fit kernels (episodes, pooled hazard, blocked leaf hazards, compiled routing) ----
def test_pooled_hazard_from_risk_index_matches_lifelines_nelson_aalen_with_entry():
    # Source: lifelines NelsonAalenFitter(nelson_aalen_smoothing=False) with entry=W on
    # lifelines' MACS data (reference implementation).
    from wearcast.models._forest_leaves import pooled_cumulative_hazard, risk_index

    d = _macs()
    entry, exit, event = d["W"].to_numpy(), d["T"].to_numpy(), d["D"].to_numpy().astype(bool)
    ages = np.unique(exit[event])
    pooled = pooled_cumulative_hazard(risk_index(entry, exit, event, ages), np.ones(len(d)))
    ref = NelsonAalenFitter(nelson_aalen_smoothing=False).fit(exit, event, entry=entry)
    np.testing.assert_allclose(pooled[1:], ref.cumulative_hazard_at_times(ages).to_numpy(), rtol=1e-9)
    # and the residuals built from it are the row-by-row martingale residuals
    index = risk_index(entry, exit, event, ages)
    np.testing.assert_allclose(event - (pooled[index.stop] - pooled[index.first]),
                               martingale_residuals(entry, exit, event), atol=1e-12)


def test_leaf_hazards_in_small_blocks_match_lifelines(monkeypatch):
    # Source: lifelines NelsonAalenFitter with entry per leaf on MACS; blocks of leaves
    # (forced tiny here) must not change the values.
    import wearcast.models._forest_leaves as leaves

    d = _macs()
    entry, exit, event = d["W"].to_numpy(), d["T"].to_numpy(), d["D"].to_numpy().astype(bool)
    leaf = (np.arange(len(d)) % 4).astype(np.int32)
    grid = failure_age_grid(exit, event, 1000)
    monkeypatch.setattr(leaves, "MAX_BLOCK_CELLS", 1)  # one leaf per block
    hazard = leaves.leaf_hazards_on_grid(leaf, 4, entry, exit, event, np.ones(len(d)), grid)
    for k in range(4):
        rows = leaf == k
        ref = NelsonAalenFitter(nelson_aalen_smoothing=False).fit(exit[rows], event[rows], entry=entry[rows])
        np.testing.assert_allclose(hazard[k], ref.cumulative_hazard_at_times(grid).to_numpy(), rtol=1e-6, atol=1e-7)


def test_episodes_end_at_failures_and_at_the_end_of_each_life():
    # Definition (common practice for repairable units): an episode runs from the start
    # of a life or the row after a failure, up to the next failure or the life's last row.
    from wearcast.models._forest_grow import episodes

    units = np.array([0, 0, 0, 0, 1, 1, 0])
    life = np.array([1, 1, 1, 1, 1, 1, 2])
    exit = np.array([10.0, 20, 30, 40, 5, 9, 3])
    event = np.array([False, True, False, True, False, False, False])
    episode, last = episodes(units, life, exit, event)
    # unit 0 life 1: rows 0-1 (failure at 20), rows 2-3 (failure at 40); unit 0 life 2: row 6; unit 1: rows 4-5
    assert len(last) == 4 and set(last) == {1, 3, 5, 6}
    assert episode[0] == episode[1] != episode[2] == episode[3]
    assert episode[4] == episode[5] and len({episode[0], episode[2], episode[4], episode[6]}) == 4
    np.testing.assert_array_equal(last[episode[[0, 2, 4, 6]]], [1, 3, 5, 6])


def test_compiled_routing_matches_flat_tree_with_missing_values():
    # The regressor's compiled apply mapped onto the pruned tree must give the leaves the
    # saved flat tree gives at prediction time, missing values included (consistency).
    from wearcast.models._forest_grow import grow_on_points, route

    table = _truncated_weibull(800, seed=4)
    X = table.X.to_numpy(np.float32).copy()
    X[::13, 1] = np.nan
    counts, tree_seed = bootstrap_draw(2, table.n_units)
    w = counts[table.unit_codes()].astype(float)
    rows = np.flatnonzero(w > 0)
    residual = martingale_residuals(table.entry[rows], table.exit[rows], table.event[rows], w[rows])
    tree, regressor, node_to_leaf = grow_on_points(
        np.ascontiguousarray(X[rows]), residual, w[rows], table.event[rows].astype(float),
        max_features=None, max_depth=8, min_events=6, random_state=tree_seed)
    assert tree.n_leaves > 2
    X[::7, 0] = np.nan  # missing where the tree never saw any while growing
    np.testing.assert_array_equal(route(regressor, node_to_leaf, X), apply_tree(tree, X))


def test_every_leaf_keeps_min_events_over_all_rows_when_grown_on_episodes(scenario_table):
    # Splits are chosen on episodes, but all in-bag rows go down the tree: each failure
    # closes its episode, so every leaf still holds min_events weighted failures.
    table = scenario_table
    model = SurvivalForest(n_trees=3, min_events_per_leaf=6, seed=5).fit(table)
    X = model._encode(table.X)
    for seed, tree in zip(model.tree_seeds_, model.trees_):
        counts, _ = bootstrap_draw(int(seed), table.n_units)
        w = counts[table.unit_codes()] * table.event
        per_leaf = np.bincount(apply_tree(tree, X), weights=w, minlength=tree.n_leaves)
        assert tree.n_leaves > 1 and per_leaf.min() >= 6


def test_rows_and_episodes_both_follow_delayed_entry_kaplan_meier(scenario_table):
    # Source: lifelines KaplanMeierFitter with entry (reference implementation) on the
    # invented scenario. Measured: largest gap 0.012 grown on episodes, 0.016 on rows.
    table = scenario_table
    km = KaplanMeierFitter().fit(table.exit, table.event, entry=table.entry)
    ages = np.quantile(table.exit[table.event], np.linspace(0.1, 0.9, 9))
    reference = km.survival_function_at_times(ages).to_numpy()
    model = SurvivalForest(n_trees=20, seed=3, grow_on="rows").fit(table)
    assert np.abs(model.survival(table.X, ages).mean(axis=0) - reference).max() < 0.04


def test_loading_refuses_unknown_versions_and_reads_version_1(tmp_path):
    import json

    from wearcast.exceptions import BundleError

    table = _truncated_weibull(300, seed=13)
    model = SurvivalForest(n_trees=4, seed=1, grow_on="rows").fit(table)
    folder = tmp_path / "forest"
    model.save(folder)
    meta = json.loads((folder / "forest.json").read_text())
    assert meta["format_version"] == 3 and meta["settings"]["grow_on"] == "rows"
    # a version-1 file had no grow_on (its trees were grown on rows), no leaf prior and no tail;
    # it loads with a step between grid ages and predicts flat past the last grid age
    del meta["settings"]["grow_on"], meta["settings"]["leaf_prior_units"], meta["tail"]
    (folder / "forest.json").write_text(json.dumps({**meta, "format_version": 1}))
    old = SurvivalForest.load(folder)
    assert old.grow_on == "rows" and old.interpolation_ == "step" and old.leaf_prior_units == 0.0
    np.testing.assert_array_equal(old.risk_score(table.X), model.risk_score(table.X))
    last = float(old.grid_[-1])
    np.testing.assert_array_equal(old.cumulative_hazard(table.X, [last, last + 1000.0])[:, 0],
                                  old.cumulative_hazard(table.X, [last, last + 1000.0])[:, 1])
    (folder / "forest.json").write_text(json.dumps({**meta, "format_version": 99}))
    with pytest.raises(BundleError, match="format_version 99 is not one this wearcast reads"):
        SurvivalForest.load(folder)
    with pytest.raises(ConfigError, match="grow_on"):
        SurvivalForest(grow_on="lives")


def test_episode_terms_give_the_summed_row_residuals_on_macs_split_into_pieces():
    # Source: lifelines NelsonAalenFitter with entry on MACS (reference) for the pooled
    # hazard; each subject's (W, T] is cut into 3 contiguous rows (one episode), so the
    # episode's expected failures must equal the subject's single-row value.
    from wearcast.models._forest_leaves import group_terms, pooled_hazard_of_groups, risk_index

    d = _macs()
    entry, exit, event = d["W"].to_numpy(), d["T"].to_numpy(), d["D"].to_numpy().astype(bool)
    cuts = entry[:, None] + (exit - entry)[:, None] * np.array([0.0, 0.3, 0.7, 1.0])
    row_entry, row_exit = cuts[:, :-1].ravel(), cuts[:, 1:].ravel()
    row_event = np.zeros((len(d), 3), bool)
    row_event[:, 2] = event
    group = np.repeat(np.arange(len(d)), 3)
    ages = np.unique(exit[event])
    index = risk_index(row_entry, row_exit, row_event.ravel(), ages)
    terms = group_terms(index, group)
    assert len(terms.at) <= 2 * len(d)  # the inner cuts cancel
    w = np.tile([1.0, 2.0], len(d))[: len(d)]
    H, expected = pooled_hazard_of_groups(index, terms, w)
    copies = w.astype(int)
    ref = NelsonAalenFitter(nelson_aalen_smoothing=False).fit(np.repeat(exit, copies), np.repeat(event, copies),
                                                              entry=np.repeat(entry, copies))
    np.testing.assert_allclose(H[1:], ref.cumulative_hazard_at_times(ages).to_numpy(), rtol=1e-9)
    np.testing.assert_allclose(event - expected, martingale_residuals(entry, exit, event, w), atol=1e-9)


def test_episodes_equal_rows_when_every_life_is_one_row():
    # With one row per life each episode is one row, so both growing points must give
    # the same forest (consistency of the two residual paths).
    table = _truncated_weibull(400, seed=14)
    rows = SurvivalForest(n_trees=6, seed=2, grow_on="rows").fit(table)
    lives = SurvivalForest(n_trees=6, seed=2, grow_on="episodes").fit(table)
    np.testing.assert_array_equal(rows.risk_score(table.X), lives.risk_score(table.X))


def test_episode_forest_same_for_one_and_two_workers_on_the_scenario(scenario_table):
    # Repeated lives and time-varying rows: results must not depend on n_jobs.
    table = scenario_table
    one = SurvivalForest(n_trees=6, seed=9, n_jobs=1).fit(table)
    two = SurvivalForest(n_trees=6, seed=9, n_jobs=2).fit(table)
    np.testing.assert_array_equal(one.risk_score(table.X), two.risk_score(table.X))
    np.testing.assert_array_equal(one.oob_risk_, two.oob_risk_)
    assert one.oob_curve_.equals(two.oob_curve_)


def test_grow_on_comes_from_the_config():
    from wearcast.config import config_from_dict
    from wearcast.models.forest import SurvivalForest

    section = config_from_dict({"model": {"forest": {"grow_on": "rows"}}}).model.forest
    assert SurvivalForest.from_config(section, seed=1).grow_on == "rows"
    assert SurvivalForest.from_config(config_from_dict({}).model.forest, seed=1).grow_on == "episodes"


def test_one_routing_pass_scores_like_the_per_horizon_calls():
    # score_units / fail_probabilities route the units once; they must equal the generic
    # SurvivalModel path (cumulative hazard at the age and at age + h, one call each), bit for bit,
    # with some ages before the grid's first age.
    from wearcast.models.base import SurvivalModel

    table = _truncated_weibull(400, seed=8)
    forest = SurvivalForest(n_trees=15, seed=3).fit(table)
    X = table.X.iloc[:150].reset_index(drop=True)
    ages = np.r_[np.zeros(10), table.exit[10:150]]
    horizons = [30, 90, 365]
    log_risk, p = forest.score_units(X, ages, horizons)
    generic = SurvivalModel.fail_probabilities(forest, X, ages, horizons)
    np.testing.assert_array_equal(p, generic)
    np.testing.assert_array_equal(forest.fail_probabilities(X, ages, horizons), generic)
    np.testing.assert_allclose(np.exp(log_risk), forest.risk_score(X), rtol=1e-12)
    hand = sum(risk[apply_tree(tree, forest._encode(X))] for tree, risk in zip(forest.trees_, forest.leaf_risks_))
    np.testing.assert_allclose(forest.risk_score(X), hand / len(forest.trees_), rtol=1e-12)


# -- shrunk leaves, linear steps and the tail past the oldest failure --------------------
def test_shrunk_leaf_hazards_follow_the_beta_process_formula_on_macs():
    # Hjort (1990, Annals of Statistics 18:1259-1294; formula recalled from memory): with a prior
    # centred on the pooled hazard and weight c units, each leaf's jump at failure age s is
    # (d_leaf(s) + c dH_pool(s)) / (Y_leaf(s) + c). Counted here by brute force from the rows
    # (Y: rows with entry < s <= exit), the pooled jumps from lifelines' NelsonAalenFitter with entry.
    d = _macs()
    entry, exit, event = d["W"].to_numpy(), d["T"].to_numpy(), d["D"].to_numpy().astype(bool)
    leaf = (entry > np.median(entry)).astype(np.int32)
    grid = failure_age_grid(exit, event, 1000)
    c = 7.0
    hazard = leaf_hazards_on_grid(leaf, 2, entry, exit, event, np.ones(len(d)), grid, prior_units=c)
    pooled = NelsonAalenFitter(nelson_aalen_smoothing=False).fit(exit, event, entry=entry)
    jumps = np.diff(np.concatenate([[0.0], pooled.cumulative_hazard_at_times(grid).to_numpy()]))
    for k in (0, 1):
        rows = leaf == k
        at_risk = np.array([((entry[rows] < s) & (exit[rows] >= s)).sum() for s in grid])
        deaths = np.array([(event[rows] & (exit[rows] == s)).sum() for s in grid])
        expected = np.cumsum((deaths + c * jumps) / (at_risk + c))
        np.testing.assert_allclose(hazard[k], expected, rtol=1e-5)
    # where a leaf has nobody at risk it takes the pooled jump; with c = 0 it is plain Nelson-Aalen
    plain = leaf_hazards_on_grid(leaf, 2, entry, exit, event, np.ones(len(d)), grid)
    assert not np.allclose(plain, hazard)


def test_compiled_shrunk_leaf_hazards_equal_the_numpy_ones():
    from wearcast.models import _forest_leaves as fl

    if fl._leaf_hazards_compiled is None:
        pytest.skip("numba is not installed")
    rng = np.random.default_rng(9)
    n = 3000
    entry = rng.integers(0, 300, n).astype(float)
    exit = entry + rng.integers(1, 400, n)
    event = rng.random(n) < 0.3
    grid = np.quantile(exit[event], np.linspace(0, 1, 40))
    index = fl.risk_index(entry, exit, event, grid)
    leaf = rng.integers(0, 23, n)
    weights = rng.choice([0.0, 1.0, 2.0], n)
    prior = fl.pooled_increments(index, weights)
    compiled = fl.leaf_hazards_indexed(index, leaf, 23, weights, prior, 5.0)
    reference = fl.leaf_hazards_numpy(index, leaf, 23, weights, prior, 5.0)
    np.testing.assert_allclose(compiled, reference, rtol=1e-6)
    assert (np.diff(compiled, axis=1) > 0).all()  # every leaf rises at every failure age


def test_small_fleet_has_no_exact_zeros_and_a_tail_past_the_oldest_failure():
    # Before shrinkage, linear steps and the tail this fleet (seeds as here) read exactly 0 for 13
    # of its 79 working units at 30 days (a window holding no grid age of the unit's leaves) and
    # for 6 at 365 days (units older than the oldest failure).
    table = _truncated_weibull(150, seed=21)
    model = SurvivalForest(n_trees=30, seed=2).fit(table)
    alive = ~table.event  # each unit has one row: the suspended ones are the units still working
    X_now, age_now = table.X[alive], table.exit[alive]
    for h in (30.0, 365.0):
        p = model.fail_probability(X_now, age_now, h)
        assert_valid_probability(p)
        assert (p > 0).all(), (h, int((p == 0).sum()))
    last = float(model.grid_[-1])
    ages = np.array([last / 2, last, last + 100.0, last + 1000.0])
    curves = model.survival(X_now, ages)
    assert_valid_survival(curves)
    assert (np.diff(model.cumulative_hazard(X_now, ages), axis=1) > 0).all()
    assert model.tail_.anchor in model.grid_ and model.tail_.anchor < last and model.tail_.rate > 0


def test_forest_hazard_is_linear_between_grid_ages():
    table = _truncated_weibull(300, seed=5)
    model = SurvivalForest(n_trees=5, seed=4).fit(table)
    X = table.X.iloc[:7]
    g = model.grid_
    at_grid = model.cumulative_hazard(X, g[:20])
    mids = (g[:19] + g[1:20]) / 2
    np.testing.assert_allclose(model.cumulative_hazard(X, mids), (at_grid[:, :-1] + at_grid[:, 1:]) / 2, rtol=1e-6)
    # from 0 at age 0 to the first grid age
    np.testing.assert_allclose(model.cumulative_hazard(X, [g[0] / 4])[:, 0], at_grid[:, 0] / 4, rtol=1e-6)
    # the per-unit path and the shared-grid path agree
    np.testing.assert_allclose(model.cumulative_hazard_at(X, np.full(7, mids[3])), model.cumulative_hazard(X, mids)[:, 3])
def test_a_value_never_missing_in_training_goes_to_the_larger_side():
    # Rule (docs/models.md), scikit-learn's: a split that saw no missing value while growing
    # sends one to the child with more training rows; the flat tree keeps that side.
    from wearcast.models._forest_grow import grow_on_points

    table = _truncated_weibull(800, seed=5)
    X = np.ascontiguousarray(table.X.to_numpy(np.float32))
    residual = martingale_residuals(table.entry, table.exit, table.event)
    tree, regressor, _ = grow_on_points(X, residual, np.ones(len(X)), table.event.astype(float),
                                        max_features=None, max_depth=1, min_events=5, random_state=0)
    assert tree.n_leaves == 2 and regressor.tree_.node_count == 3
    rows = regressor.tree_.n_node_samples
    assert bool(tree.missing_left[0]) == (rows[1] >= rows[2])
    gap = X[:4].copy()
    gap[:, tree.feature[0]] = np.nan
    larger = tree.leaf[tree.left[0] if rows[1] >= rows[2] else tree.right[0]]
    assert (apply_tree(tree, gap) == larger).all()
    forest = SurvivalForest(n_trees=6, seed=2).fit(table)
    p = forest.fail_probabilities(table.X.iloc[:4].assign(x=np.nan), table.exit[:4], [90, 365])
    assert_valid_probability(p)
