"""Model choice on fleets with a known truth (the invented scenario's two variants).

The rule (one standard error, simplest first) is checked on its own in
test_selection.py; here the whole fit stage runs on simulated fleets whose true
hazard is either linear in the covariates or not.
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd

from _fleet import set_key
from wearcast.config import load_config
from wearcast.fitting import fit_models
from wearcast.io import load_export
from wearcast.scenario import generate_scenario

LIGHT = """
[model]
seed = 5

[model.boosted]
max_trees = 150
learning_rate = 0.1
folds = 3
early_stopping_trees = 20

[model.forest]
n_trees = 30
time_grid_points = 60

[validation]
folds = 3
bootstrap = 5
"""


def _fleet(folder, n_units, effects, seed=5) -> Path:
    path = Path(generate_scenario(folder, n_units=n_units, seed=seed, effects=effects).config)
    path.write_text(path.read_text(encoding="utf-8").split("[model]")[0] + LIGHT, encoding="utf-8")
    return path


def test_small_linear_fleet_gets_cox_or_stumps(tmp_path):
    config_path = _fleet(tmp_path, 500, "linear")
    config = load_config(config_path)
    table = load_export(config).table
    outcome = fit_models(table, config, tmp_path / "out")
    assert table.n_failures < 10 * len(table.covariates)  # a small fleet by the stated rule
    assert outcome.chosen in ("cox", "boosted_d1")
    assert set(outcome.choice.candidates.index) == {"cox", "boosted_d1"}
    assert "fewer than 10 per covariate" in outcome.choice.reason
    metrics = json.loads((tmp_path / "out" / "metrics.json").read_text())
    assert metrics["choice"]["chosen"] == outcome.chosen


def test_large_nonlinear_fleet_gets_a_tree_model(tmp_path):
    config_path = _fleet(tmp_path, 3000, "nonlinear")
    config = load_config(config_path)
    table = load_export(config).table
    outcome = fit_models(table, config, tmp_path / "out")
    assert table.n_failures >= 10 * len(table.covariates)
    assert len(outcome.choice.candidates) == 6
    assert outcome.chosen != "cox"
    cand = outcome.choice.candidates
    # the nonlinear truth: the best tree candidate beats Cox by more than one standard error
    best_tree = cand.drop(index="cox")["c_mean"].max()
    assert best_tree > cand.loc["cox", "c_mean"] + cand.loc["cox", "c_se"]
    for name in ("comparison.csv", "candidates.csv", "calibration.csv", "importance.csv"):
        assert (tmp_path / "out" / name).exists()
    assert (tmp_path / "out" / "models" / outcome.chosen / "manifest.json").exists()


def test_choice_does_not_depend_on_thread_count(tmp_path):
    tables = []
    for threads in (1, 2):
        folder = tmp_path / f"t{threads}"
        config_path = _fleet(folder, 400, "linear", seed=9)
        set_key(config_path, "model.boosted", "threads", str(threads))
        config = load_config(config_path)
        fit_models(load_export(config).table, config, folder / "out")
        tables.append((folder / "out" / "candidates.csv").read_bytes())
    assert tables[0] == tables[1]
    assert len(pd.read_csv(tmp_path / "t1" / "out" / "candidates.csv")) == 2
