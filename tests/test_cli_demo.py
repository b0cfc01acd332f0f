"""``wearcast demo``: runs in-process, writes the invented fleet and the job's outputs."""

from __future__ import annotations

import pandas as pd
import pytest
from click.testing import CliRunner

from wearcast.cli.main import main
from wearcast.config import load_config
from wearcast.pipeline import JOB_STAGES, run_demo


def test_demo_writes_the_fleet_and_the_check_outputs(tmp_path):
    out = tmp_path / "demo"
    result = CliRunner().invoke(main, ["demo", "--out", str(out), "--units", "150", "--seed", "3"])
    assert result.exit_code == 0, result.output
    scenario = out / "scenario"
    for name in ("register.csv", "events.csv", "readings.csv", "truth.csv", "wearcast.toml"):
        assert (scenario / name).is_file(), name
    assert (out / "life_table.csv").is_file() and (out / "quarantine.csv").is_file()
    assert f"outputs are in {out}" in result.output
    assert f"invented fleet written to {scenario}" in result.output
    assert "stage check:" in result.output
    # the life table holds exactly the register's units, read back through the files
    register = pd.read_csv(scenario / "register.csv")
    life_table = pd.read_csv(out / "life_table.csv")
    assert len(register) == 150 and set(life_table["unit_id"]) == set(register["unit_id"])
    assert load_config(scenario / "wearcast.toml").fleet.as_of is not None


def test_run_demo_returns_paths_and_one_summary_per_stage(tmp_path):
    result = run_demo(tmp_path, n_units=120, seed=5)
    assert list(result["stages"]) == [name for name, _ in JOB_STAGES]
    check = result["stages"]["check"]
    assert check["units"] == 120 and check["rows_quarantined"] == 0
    assert check["delayed_entries"] > 0 and check["lives"] >= check["units"]
    assert all(pd.io.common.file_exists(p) for k, p in result["scenario"].items() if k != "folder")
    # the rank stage splits the fleet forecast by failure mode (the demo config sets modes_by = "seal_type")
    modes = pd.read_csv(tmp_path / "mode_forecast.csv")
    forecast = pd.read_csv(tmp_path / "fleet_forecast.csv")
    by_group = modes.groupby(["group_by", "group", "horizon_days"])["expected_failures"].sum()
    for row in forecast.itertuples():
        assert by_group[(row.group_by, row.group, row.horizon_days)] == pytest.approx(row.expected_failures, rel=1e-4)
    assert result["stages"]["rank"]["mode_forecast_path"].endswith("mode_forecast.csv")
    stats = pd.read_csv(tmp_path / "life_statistics.csv")
    assert stats["failures"].iloc[0] == check["failures"]
    # the demo config sets [costs]: units at or past the fleet's best planned replacement age are flagged
    ranked = pd.read_csv(tmp_path / "ranked_units.csv")
    best = pd.read_csv(tmp_path / "replacement_ages.csv")["best_age_days"].iloc[0]
    assert (ranked["past_planned_replacement_age"] == (ranked["age_days"] >= check["fleet_best_replacement_age_days"])).all()
    assert abs(check["fleet_best_replacement_age_days"] - best) <= 0.5


def test_demo_reports_an_unwritable_output_folder(tmp_path):
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    result = CliRunner().invoke(main, ["demo", "--out", str(blocker / "demo"), "--units", "50"])
    assert result.exit_code == 73, result.output  # wearcast.exceptions.OutputError
    assert "error: cannot create output folder" in result.output


def test_demo_help_names_its_options():
    result = CliRunner().invoke(main, ["demo", "--help"])
    assert result.exit_code == 0
    for option in ("--out", "--units", "--seed", "Caution:"):
        assert option in result.output
