"""Model choice on fleets with a known truth (the invented scenario's two variants).

The rule (one standard error, simplest first) is checked on its own in
test_selection.py; here the whole fit stage runs on simulated fleets whose true
hazard is either linear in the covariates or not.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from _fleet import set_key
from wearcast import LifeTable
from wearcast.config import config_from_dict, load_config
from wearcast.fitting import describe_fit, fit_models
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

LIGHT_MODEL = {"boosted": {"max_trees": 150, "learning_rate": 0.1, "folds": 3, "early_stopping_trees": 20},
               "forest": {"n_trees": 30, "time_grid_points": 60}}


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


def rising_reading_table(n_units: int = 300, seed: int = 1) -> LifeTable:
    """Invented gearbox fleet, one row per month: an oil-iron reading that rises with running
    age (each unit at its own wear rate) and a fixed load factor. True hazard per day:
    exp(0.08 (iron - 20) + 0.5 load) / 2500, with the reading taken at the row's start held
    for the month. About a third of the units enter the records late; follow-up ends early
    at random (suspensions)."""
    rng = np.random.default_rng(seed)
    rows = []
    for u in range(n_units):
        rate = rng.lognormal(np.log(20.0), 0.35)  # iron ppm gained per year of running
        load = rng.normal()
        age = float(rng.choice([0.0, rng.uniform(0, 3 * 365)]))
        end = age + rng.uniform(0.3, 1.0) * 48 * 30.0
        while age < end:
            stop = min(age + 30.0, end)
            iron = rate * age / 365.0 + rng.normal(0, 2.0)
            hazard = np.exp(0.08 * (iron - 20.0) + 0.5 * load) / 2500.0
            t_fail = rng.exponential(1 / hazard)
            rows.append((f"G{u:04d}", age, min(age + t_fail, stop), age + t_fail <= stop, iron, load))
            if age + t_fail <= stop:
                break
            age = stop
    frame = pd.DataFrame(rows, columns=["unit_id", "entry_age", "exit_age", "failed", "iron_ppm", "load"])
    return LifeTable.from_frame(frame, ["iron_ppm", "load"])


def test_rising_reading_is_chosen_on_the_readings_in_force(tmp_path):
    from lifelines import CoxTimeVaryingFitter

    from wearcast.models.cox import CoxBaseline

    table = rising_reading_table()
    # The Cox fit is right: same coefficients as lifelines' CoxTimeVaryingFitter on the rows.
    frame = table.frame
    ctv = CoxTimeVaryingFitter(penalizer=0.0).fit(
        frame[["unit_id", "entry_age", "exit_age", "failed", "iron_ppm", "load"]], id_col="unit_id",
        event_col="failed", start_col="entry_age", stop_col="exit_age")
    cox = CoxBaseline(penalizer=0.0).fit(table)
    assert np.allclose(cox.coefficients, ctv.params_[["iron_ppm", "load"]].to_numpy(), atol=1e-4)
    assert abs(cox.coefficients[0] - 0.08) < 0.02 and abs(cox.coefficients[1] - 0.5) < 0.15  # the invented truth
    config = config_from_dict({"model": {"seed": 5, "fit": [], **LIGHT_MODEL},
                               "validation": {"folds": 3, "bootstrap": 5, "horizons_days": [90, 365]}},
                              source="rising reading test")
    outcome = fit_models(table, config, tmp_path)
    cand = outcome.choice.candidates
    assert outcome.choice.concordance == "c_time_dependent"
    assert "time-dependent" in outcome.choice.reason
    assert len(cand) == 6 and cand["eligible"].any()
    # Scored on each unit's last row, even the Cox model reads below chance ...
    last_row = outcome.comparison.set_index("model")["c_truncation"]
    assert last_row["cox"] < 0.5
    # ... on the readings in force at each failure every candidate ranks well; with the
    # probabilities also taken on the readings in force, the log-linear truth's own form
    # (Cox, or additive stumps) is calibrated and chosen.
    assert cand["c_mean"].min() > 0.65
    assert cand.loc["cox", "eligible"] and abs(cand.loc["cox", "calibration_ratio"] - 1) < 0.15
    assert outcome.chosen in ("cox", "boosted_d1")
    metrics = json.loads((tmp_path / "metrics.json").read_text())
    assert metrics["choice"]["concordance"] == "c_time_dependent"
    assert any("time-dependent" in line for line in describe_fit(outcome)[:1])
