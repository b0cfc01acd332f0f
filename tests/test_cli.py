"""Every command: help with an example and the caution; exit codes and messages.

Commands run in-process (click's CliRunner); results are checked through the
files they write.
"""

from __future__ import annotations

import json

import pandas as pd
import pytest
from click.testing import CliRunner

from _fleet import light_fleet
from wearcast import CAUTION
from wearcast.cli.main import main


def _run(*args):
    return CliRunner().invoke(main, list(args))


@pytest.mark.parametrize("name", sorted(main.commands))
def test_every_command_has_help_with_example_and_caution(name):
    result = _run(name, "--help")
    assert result.exit_code == 0
    assert "Example:" in result.output and f"wearcast {name}" in result.output
    assert " ".join(CAUTION.split()[:6]) in " ".join(result.output.split())


def test_top_level_help_carries_the_caution():
    result = _run("--help")
    assert "never replace" in " ".join(result.output.split())


@pytest.fixture(scope="module")
def ranked_run(tmp_path_factory):
    config = light_fleet(tmp_path_factory.mktemp("rank"), n_units=400)
    out = config.parent / "out"
    return config, out, _run("rank", str(config), "--out", str(out), "--jobs", "1")


def test_rank_writes_the_list_forecast_and_report(ranked_run):
    config, out, result = ranked_run
    assert result.exit_code == 0, result.output
    assert "highest risk units" in result.output and f"outputs are in {out}" in result.output
    ranked = pd.read_csv(out / "ranked_units.csv", dtype={"unit_id": str})
    summary = json.loads((out / "summary.json").read_text())
    assert len(ranked) == summary["units_in_service"] if "units_in_service" in summary else len(ranked) > 0
    assert ranked["rank"].tolist() == sorted(ranked["rank"])
    for h in (30, 90, 365):
        assert ((ranked[f"p_fail_{h}d"] >= 0) & (ranked[f"p_fail_{h}d"] <= 1)).all()
    assert (out / "fleet_forecast.csv").exists() and (out / "report.html").exists()
    assert (out / "models" / "boosted_d3" / "manifest.json").exists()


def test_report_rebuilds_from_a_run_folder(ranked_run):
    _, out, _ = ranked_run
    (out / "report.html").unlink()
    result = _run("report", str(out))
    assert result.exit_code == 0
    assert (out / "report.html").exists()


def test_rank_with_a_model_not_fitted_is_a_config_error(ranked_run):
    config, out, _ = ranked_run
    result = _run("rank", str(config), "--out", str(out / "again"), "--model", "forest_bagging")
    assert result.exit_code == 78
    assert "model 'forest_bagging' was not fitted in this run" in result.output
    assert "add it to [model] fit" in result.output


def test_fit_prints_candidates_and_choice(tmp_path):
    config = light_fleet(tmp_path, n_units=300)
    result = _run("fit", str(config), "--out", str(tmp_path / "fit"))
    assert result.exit_code == 0, result.output
    assert "choice: boosted_d3 is pinned in the config" in result.output
    # the scenario has monthly readings (start/stop rows): the terminal names the C used
    assert "c_mean = time-dependent truncation-aware C" in result.output
    assert (tmp_path / "fit" / "metrics.json").exists()


def test_backtest_past_the_export_date_is_refused(tmp_path):
    config = light_fleet(tmp_path, n_units=200)
    result = _run("backtest", str(config), "--as-of", "2026-10-31", "--horizon", "90d")
    assert result.exit_code == 78
    assert "backtest origin 2026-10-31 plus 90 days ends 2027-01-29, after the export date 2026-11-30" in result.output


def test_backtest_writes_tables(tmp_path):
    config = light_fleet(tmp_path, n_units=400)
    result = _run("backtest", str(config), "--as-of", "2026-05-31", "--horizon", "3m",
                  "--every", "3m", "--origins", "2", "--out", str(tmp_path / "bt"))
    assert result.exit_code == 0, result.output
    assert "precision_top20_91d" in result.output
    origins = pd.read_csv(tmp_path / "bt" / "backtest" / "backtest_origins.csv")
    assert sorted(origins["origin"].unique()) == ["2026-02-28", "2026-05-31"]
    # the pinned model (boosted_d3) is backtested as 'chosen' beside the fixed [model] fit models
    chosen = origins[origins["model"] == "chosen"]
    assert len(chosen) == 2 and set(chosen["candidate"]) == {"boosted_d3"}
    assert "c_time_dependent_91d" in origins.columns


def test_report_on_a_missing_folder_exits_66(tmp_path):
    result = _run("report", str(tmp_path / "nowhere"))
    assert result.exit_code == 66
    assert "does not exist" in result.output


def test_bad_duration_is_a_usage_error(tmp_path):
    config = light_fleet(tmp_path, n_units=100)
    result = _run("backtest", str(config), "--as-of", "2026-05-31", "--horizon", "ninety")
    assert result.exit_code != 0
    assert "is not a duration" in result.output
