"""The shallow readable tree that summarises a model's ranking."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sksurv.datasets import load_gbsg2
from sksurv.metrics import concordance_index_censored

from wearcast import LifeTable
from wearcast.exceptions import ConfigError
from wearcast.models.base import SurvivalModel
from wearcast.models.forest import SurvivalForest
from wearcast.models.readable import explain_with_shallow_tree, ranking_agreement


class _KnownRisk(SurvivalModel):
    """A model whose log risk is a fixed function of the covariates."""

    name = "known"

    def __init__(self, log_risk):
        self.log_risk = log_risk

    def fit(self, table):
        return self

    def risk_score(self, X):
        return np.exp(self.log_risk(X))

    def cumulative_hazard_at(self, X, ages):
        return self.risk_score(X) * np.asarray(ages, float) / 1000.0


def _table(n: int = 400, seed: int = 0) -> LifeTable:
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({
        "unit_id": [f"U{i}" for i in range(n)], "entry_age": 0.0, "exit_age": rng.uniform(10, 900, n),
        "failed": rng.random(n) < 0.5, "hours": rng.integers(0, 10, n).astype(float),
        "seal": rng.choice(["packed", "single", "double"], n, p=[0.3, 0.4, 0.3]),
    })
    return LifeTable.from_frame(frame, ["hours", "seal"], ["seal"])


def test_rules_recover_a_known_step_and_a_category():
    table = _table()
    model = _KnownRisk(lambda X: 1.2 * (X["hours"] >= 5).to_numpy() + 0.8 * (X["seal"] == "packed").to_numpy())
    view = explain_with_shallow_tree(model, table, depth=2)
    assert view.agreement == pytest.approx(1.0)  # the tree reproduces the score exactly
    top = view.rules[0]
    assert top.conditions == ("hours > 4.5", "seal = packed")
    assert top.level == "high risk"
    assert top.relative_risk == pytest.approx(np.exp(2.0) / np.exp(np.median(model.log_risk(table.X))))
    assert sum(r.share for r in view.rules) == pytest.approx(1.0)
    bottom = view.rules[-1]
    assert bottom.conditions == ("hours <= 4.5", "seal != packed") and bottom.level == "low risk"
    shown = view.text()
    assert "summary, not the model" in shown and "hours > 4.5 and seal = packed -> high risk" in shown
    assert "share of fleet" in shown
    np.testing.assert_array_equal(np.bincount(view.row_rule), [r.n_rows for r in view.rules])


def test_agreement_equals_scikit_survival_harrell_c_with_the_model_as_outcome():
    # Reference library: scikit-survival concordance_index_censored with every pair
    # "failed" and time = -(model score), so a higher score means an earlier outcome.
    rng = np.random.default_rng(3)
    reference = np.round(rng.normal(size=700), 2)  # rounded, so some references tie
    summary = np.digitize(reference + rng.normal(scale=0.7, size=700), [-1, 0, 1]).astype(float)
    expected = concordance_index_censored(np.ones(700, bool), -reference, summary)[0]
    assert ranking_agreement(reference, summary) == pytest.approx(expected, abs=1e-12)


def test_summary_of_a_forest_on_gbsg2_is_partial_and_says_so():
    # scikit-survival's German Breast Cancer Study Group 2 data (no entry ages).
    X, y = load_gbsg2()
    frame = X.copy()
    for col in ("horTh", "menostat", "tgrade"):
        frame[col] = frame[col].astype(str)
    frame["unit_id"] = [f"G{i}" for i in range(len(X))]
    frame["entry_age"], frame["exit_age"], frame["failed"] = 0.0, y["time"], y["cens"]
    table = LifeTable.from_frame(frame, list(X.columns), ["horTh", "menostat", "tgrade"])
    forest = SurvivalForest(n_trees=30, seed=1).fit(table)
    view = explain_with_shallow_tree(forest, table, depth=3)
    assert 2 <= len(view.rules) <= 8
    assert all(len(r.conditions) <= 3 for r in view.rules)
    assert 0.6 < view.agreement < 1.0  # a depth-3 tree cannot copy a forest exactly
    assert min(r.share for r in view.rules) >= 0.02 - 1e-9
    assert "forest model" in view.text()


def test_depth_is_limited_to_three():
    with pytest.raises(ConfigError, match="depth"):
        explain_with_shallow_tree(_KnownRisk(lambda X: X["hours"].to_numpy()), _table(), depth=4)
