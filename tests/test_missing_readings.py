"""A unit with no reading yet is scored, never a stop (fit, rank, backtest end to end).

The fleet is the invented demo scenario (wearcast.scenario) with one extra,
invented unit: only the plumbing is checked here. How each model treats a
missing value is checked against lifelines / scikit-learn beside the model
(test_cox.py, test_forest.py, test_boosted.py).
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from _fleet import light_fleet
from wearcast.cli.main import main

NEW_UNIT = "QF-900001"


def _add_unit(config, install: str, readings: list[tuple[str, float, float]] = ()) -> None:
    """Append an invented unit to the scenario's register (and optional readings)."""
    folder = config.parent
    register = pd.read_csv(folder / "register.csv", dtype=str, keep_default_na=False)
    row = register.iloc[-1].copy()
    row["unit_id"], row["install_date"], row["decommission_date"] = NEW_UNIT, install, ""
    pd.concat([register, row.to_frame().T]).to_csv(folder / "register.csv", index=False)
    if readings:
        frame = pd.read_csv(folder / "readings.csv", dtype=str)
        extra = pd.DataFrame(readings, columns=["reading_date", "running_hours_per_day", "vibration_mm_s"])
        extra.insert(0, "unit_id", NEW_UNIT)
        pd.concat([frame, extra.astype(str)]).to_csv(folder / "readings.csv", index=False)


@pytest.fixture(scope="module")
def fleet(tmp_path_factory):
    config = light_fleet(tmp_path_factory.mktemp("missing"), n_units=300, seed=3)
    _add_unit(config, "2026-11-02")  # installed last month (export date 2026-11-30), no oil sample yet
    return config


def test_check_fit_and_rank_score_the_unit(fleet):
    out = fleet.parent / "out"
    result = CliRunner().invoke(main, ["rank", str(fleet), "--out", str(out), "--jobs", "1"])
    assert result.exit_code == 0, result.output
    ranked = pd.read_csv(out / "ranked_units.csv", dtype={"unit_id": str}).set_index("unit_id")
    assert NEW_UNIT in ranked.index
    for h in (30, 90, 365):
        assert 0 <= ranked.loc[NEW_UNIT, f"p_fail_{h}d"] <= 1
    said = ("1 unit(s) in service have no value yet for: running_hours_per_day (1), vibration_mm_s (1) "
            f"(for example {NEW_UNIT}")
    assert f"warning: {said}" in result.output
    page = (out / "report.html").read_text(encoding="utf-8")
    assert 'id="read-first"' in page and said in page
    # the Cox baseline is always fitted: rank with it too
    by_cox = CliRunner().invoke(main, ["rank", str(fleet), "--out", str(out / "cox"), "--jobs", "1",
                                       "--model", "cox"])
    assert by_cox.exit_code == 0, by_cox.output
    cox = pd.read_csv(out / "cox" / "ranked_units.csv", dtype={"unit_id": str}).set_index("unit_id")
    assert np.isfinite(cox.loc[NEW_UNIT, "p_fail_365d"]) and 0 < cox.loc[NEW_UNIT, "p_fail_365d"] < 1


def test_backtest_scores_a_unit_without_reading_at_the_origin(tmp_path):
    from wearcast.backtest import run_backtest
    from wearcast.config import load_config
    from wearcast.fitting import make_model

    config_path = light_fleet(tmp_path, n_units=300, seed=3)
    # installed before the origin, first oil sample only after it
    _add_unit(config_path, "2025-08-10", [("2025-10-01", 11.0, 2.1), ("2026-03-01", 11.5, 2.3)])
    config = load_config(config_path)
    origin = dt.date(2025, 8, 31)
    factories = {name: (lambda seed, name=name: make_model(name, config, seed)) for name in ("cox", "boosted_d1")}
    result = run_backtest(config, factories, origin, 90, top_k=20, seed=1)
    mine = result.units[result.units["unit_id"] == NEW_UNIT]
    assert sorted(mine["model"]) == ["boosted_d1", "cox"]
    assert np.isfinite(mine["probability"]).all() and ((mine["probability"] > 0) & (mine["probability"] < 1)).all()
    cli = CliRunner().invoke(main, ["backtest", str(config_path), "--as-of", "2025-08-31", "--horizon", "90d",
                                    "--out", str(tmp_path / "bt")])
    assert cli.exit_code == 0, cli.output


def test_monthly_run_scores_the_unit_and_prints_the_warning(fleet):
    result = CliRunner().invoke(main, ["monthly", str(fleet), "--jobs", "1"])
    assert result.exit_code == 0, result.output
    assert "decision: first run" in result.output
    assert "warning: 1 unit(s) in service have no value yet" in result.output
    run_dir = next((fleet.parent / "wearcast-output" / "runs").iterdir())
    ranked = pd.read_csv(run_dir / "ranked_units.csv", dtype={"unit_id": str}).set_index("unit_id")
    assert 0 <= ranked.loc[NEW_UNIT, "p_fail_365d"] <= 1
