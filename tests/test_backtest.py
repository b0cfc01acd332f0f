"""Checks of wearcast.backtest: no look-ahead, outcomes read from the export,
list scores computed as defined."""

from __future__ import annotations

import datetime as dt
import json
import shutil

import numpy as np
import pandas as pd
import pytest

import wearcast.backtest as backtest
from _fleet import light_fleet
from wearcast import LifeTable
from wearcast._seeds import name_seed
from wearcast.config import load_config
from wearcast.scenario import generate_scenario

ORIGIN = dt.date(2025, 11, 30)
HORIZON = 180


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    # The invented demo fleet (integration data only; the checks below are definitions).
    folder = tmp_path_factory.mktemp("fleet")
    return generate_scenario(folder, n_units=250, seed=11)


def _cox_factories(log=None):
    cox = pytest.importorskip("wearcast.models.cox")

    def make(penalizer):
        def factory(seed):
            model = cox.CoxBaseline(penalizer, seed=seed)
            if log is not None:
                fit = model.fit

                def spying_fit(table):
                    log.append((table.as_of, pd.to_datetime(table.frame["exit_date"]).max()))
                    return fit(table)

                model.fit = spying_fit
            return model
        return factory

    return {"cox": make(0.01), "cox_ridge": make(2.0)}


def _truncated_copy(files, dest, last_day: dt.date):
    """Copy the scenario export without anything dated after ``last_day``."""
    dest.mkdir()
    cut = pd.Timestamp(last_day)
    register = pd.read_csv(files.register, parse_dates=["install_date", "decommission_date"])
    register = register[register["install_date"] <= cut]
    register.loc[register["decommission_date"] > cut, "decommission_date"] = pd.NaT
    events = pd.read_csv(files.events, parse_dates=["event_date"], keep_default_na=False, na_values=[])
    events = events[events["event_date"] <= cut]
    readings = pd.read_csv(files.readings, parse_dates=["reading_date"])
    readings = readings[readings["reading_date"] <= cut]
    for frame, name in ((register, "register.csv"), (events, "events.csv"), (readings, "readings.csv")):
        frame.to_csv(dest / name, index=False, date_format="%Y-%m-%d")
    shutil.copy(files.config, dest / files.config.name)
    return load_config(dest / files.config.name)


def test_backtest_never_looks_past_the_window(scenario, tmp_path, monkeypatch):
    config = load_config(scenario.config)
    calls = []
    real_loader = backtest.load_export

    def spying_loader(cfg, *, as_of=None, quarantine_dir=None):
        calls.append(as_of)
        return real_loader(cfg, as_of=as_of, quarantine_dir=quarantine_dir)

    monkeypatch.setattr(backtest, "load_export", spying_loader)
    fits = []
    full = backtest.run_backtest(config, _cox_factories(fits), ORIGIN, HORIZON, every_months=6, origins=2,
                                 top_k=15, seed=3)
    origins = full.origins
    assert origins == [dt.date(2025, 5, 30), ORIGIN]
    # the loader is only asked for the data as it stood at an origin or at origin + horizon
    allowed = set(origins) | {d + dt.timedelta(days=HORIZON) for d in origins}
    assert calls and set(calls) <= allowed and None not in calls
    # every fit saw a table cut at its origin, holding nothing dated later
    assert len(fits) == 4
    for (as_of, latest), origin in zip(fits, np.repeat(origins, 2)):
        assert as_of.date() == origin and latest.date() <= origin

    # Same results when the export holds nothing after the last window's end.
    last_end = ORIGIN + dt.timedelta(days=HORIZON)
    cut_config = _truncated_copy(scenario, tmp_path / "cut", last_end)
    cut = backtest.run_backtest(cut_config, _cox_factories(), ORIGIN, HORIZON, every_months=6, origins=2,
                                top_k=15, seed=3)
    pd.testing.assert_frame_equal(full.per_origin, cut.per_origin)
    pd.testing.assert_frame_equal(full.units, cut.units)


def test_outcomes_match_the_failure_log(scenario):
    # Outcome definition: a unit in service at the origin failed when the event log holds
    # a failure of it dated within (origin, origin + horizon].
    config = load_config(scenario.config)
    result = backtest.run_backtest(config, _cox_factories(), ORIGIN, 365, top_k=20, seed=1)
    units = result.units[result.units["model"] == "cox"]
    events = pd.read_csv(scenario.events, parse_dates=["event_date"])
    window = events[(events["event_kind"] == "failure") & (events["event_date"] > pd.Timestamp(ORIGIN))
                    & (events["event_date"] <= pd.Timestamp(ORIGIN + dt.timedelta(days=365)))]
    expected = set(window["unit_id"]) & set(units["unit_id"])
    assert set(units.loc[units["failed"], "unit_id"]) == expected
    row = result.per_origin[result.per_origin["model"] == "cox"].iloc[0]
    assert row["observed_failures_365d"] == len(expected)
    assert row["expected_failures_365d"] == pytest.approx(units["probability"].sum())
    # list scores by their definitions
    top = units.sort_values("probability", ascending=False, kind="mergesort").head(20)
    oldest = units.sort_values("age_days", ascending=False, kind="mergesort").head(20)
    share = units["failed"].mean()
    assert row["precision_top20_365d"] == pytest.approx(top["failed"].mean())
    assert row["precision_top20_365d_oldest"] == pytest.approx(oldest["failed"].mean())
    if share > 0:
        assert row["lift_top20_365d_vs_random"] == pytest.approx(top["failed"].mean() / share)
    assert row["lift_top20_365d_vs_cox"] == pytest.approx(1.0) or np.isnan(row["lift_top20_365d_vs_cox"])
    assert row["expected_failures_365d_low"] <= row["expected_failures_365d"] <= row["expected_failures_365d_high"]
    inside = row["expected_failures_365d_low"] <= row["observed_failures_365d"] <= row["expected_failures_365d_high"]
    assert row["observed_inside_interval_365d"] == inside
    summary = result.summary.set_index("model").loc["cox"]
    assert summary["origins_observed_inside_interval_365d"] == int(inside)
    # by failure mode: observed counts are the log's failure modes in the window, and the
    # forecast splits the expected count (the scenario config sets modes_by = "seal_type")
    modes = result.per_mode[result.per_mode["model"] == "cox"].set_index("mode")
    first = window.sort_values("event_date").drop_duplicates("unit_id")
    logged = first[first["unit_id"].isin(expected)]["failure_mode"].value_counts()
    assert modes["observed_failures"].to_dict() == {m: int(logged.get(m, 0)) for m in modes.index}
    assert modes["expected_failures"].sum() == pytest.approx(row["expected_failures_365d"])
    assert summary["mode_cells"] == len(modes)
    assert summary["mode_cells_inside_chance"] == int(modes["inside_chance"].sum())
    assert (units.loc[units["failed"], "mode"] != "").all() and (units.loc[~units["failed"], "mode"] == "").all()


def test_window_outcomes_by_hand():
    # Unit A fails 40 days after the origin; B is decommissioned after 30 days; C runs on;
    # D fails 400 days after (outside a 365-day window).
    at_origin = LifeTable.from_frame(pd.DataFrame({
        "unit_id": ["A", "B", "C", "D"], "entry_age": [0.0] * 4, "exit_age": [100.0, 200.0, 300.0, 50.0],
        "failed": [False] * 4, "in_service": [True] * 4}))
    later = LifeTable.from_frame(pd.DataFrame({
        "unit_id": ["A", "A", "B", "C", "D", "D"], "life": [1, 2, 1, 1, 1, 1],
        "entry_age": [0.0, 0.0, 0.0, 0.0, 0.0, 50.0], "exit_age": [140.0, 320.0, 230.0, 665.0, 50.0, 415.0],
        "failed": [True, False, False, False, False, False], "mode": ["seal", "", "", "", "", ""]}))
    out = backtest.window_outcomes(at_origin, later, 365)
    assert out["failed"].tolist() == [True, False, False, False]
    assert out["days_observed"].tolist() == [40.0, 30.0, 365.0, 365.0]
    assert out["mode"].tolist() == ["seal", "", "", ""]


def test_origins_and_written_files(tmp_path):
    assert backtest.origin_dates(dt.date(2026, 3, 31), 1, 3) == [
        dt.date(2026, 1, 31), dt.date(2026, 2, 28), dt.date(2026, 3, 31)]
    per_origin = pd.DataFrame({"origin": [dt.date(2026, 1, 31)], "model": ["cox"], "precision_top5_90d": [0.4]})
    result = backtest.BacktestResult(90, 5, [dt.date(2026, 1, 31)], per_origin,
                                     pd.DataFrame({"model": ["cox"], "precision_top5_90d": [0.4]}),
                                     pd.DataFrame())
    paths = backtest.write_backtest(result, tmp_path)
    assert sorted(p.name for p in paths) == ["backtest.json", "backtest_origins.csv", "backtest_summary.csv"]
    assert json.loads((tmp_path / "backtest.json").read_text())["per_origin"][0]["origin"] == "2026-01-31"
    assert pd.read_csv(tmp_path / "backtest_origins.csv")["precision_top5_90d"].tolist() == [0.4]


def test_window_past_the_export_date_is_refused(scenario):
    from wearcast.exceptions import ConfigError

    config = load_config(scenario.config)  # the scenario's export date is 2026-11-30
    with pytest.raises(ConfigError, match="after the export date"):
        backtest.run_backtest(config, _cox_factories(), dt.date(2026, 10, 1), 90, top_k=5)


def test_forecast_interval_from_refits_is_the_ranked_list_interval(scenario):
    # With refits the backtest checks the fleet forecast's own 90 % interval: the
    # count law averaged over bootstrap refits fitted on the data as of the origin,
    # exactly what `wearcast rank` would have printed then.
    from wearcast._poisson_binomial import pmf_quantile
    from wearcast.io import load_export
    from wearcast.resample import INTERVAL, bootstrap_refits

    config = load_config(scenario.config)
    factories = {"cox": _cox_factories()["cox"]}
    result = backtest.run_backtest(config, factories, ORIGIN, HORIZON, every_months=6, origins=2, top_k=5,
                                   seed=4, refits=4, refit_jobs=1)
    rows = result.per_origin
    low, high = rows[f"forecast_{HORIZON}d_low"], rows[f"forecast_{HORIZON}d_high"]
    observed = rows[f"observed_failures_{HORIZON}d"]
    assert (low <= high).all()
    assert rows[f"observed_inside_forecast_{HORIZON}d"].tolist() == ((low <= observed) & (observed <= high)).tolist()
    assert int(result.summary[f"origins_observed_inside_forecast_{HORIZON}d"].iloc[0]) == int(
        rows[f"observed_inside_forecast_{HORIZON}d"].sum())
    # recompute the later origin's interval by hand from the same seeds (model name and origin date)
    table = load_export(config, as_of=ORIGIN).table
    model = factories["cox"](name_seed(4, "cox", ORIGIN.toordinal(), 0)).fit(table)
    refits = bootstrap_refits(table, model, 4, name_seed(4, "cox", ORIGIN.toordinal(), 1), [HORIZON], jobs=1,
                              progress=False)
    assert list(pmf_quantile(refits.count_pmf[0][0], list(INTERVAL))) == [low.iloc[1], high.iloc[1]]
    plain = backtest.run_backtest(config, factories, ORIGIN, HORIZON, top_k=5, seed=4)
    assert f"forecast_{HORIZON}d_low" not in plain.per_origin.columns


@pytest.fixture(scope="module")
def auto_fleet(tmp_path_factory):
    # The invented demo fleet with light settings and the automatic choice (plumbing data only).
    return load_config(light_fleet(tmp_path_factory.mktemp("auto"), n_units=300, seed=11, choose="auto"))


def test_the_chosen_model_is_what_fit_would_have_shipped(auto_fleet, tmp_path):
    from wearcast.fitting import backtest_models, fit_models
    from wearcast.io import load_export

    factories = backtest_models(auto_fleet)
    assert list(factories) == ["chosen", "boosted_d3", "cox"]  # the choice, then [model] fit, then Cox
    result = backtest.run_backtest(auto_fleet, factories, ORIGIN, HORIZON, top_k=10, seed=3)
    chosen = result.per_origin.set_index("model").loc["chosen"]
    # fit as `wearcast fit` would have run on the export as it stood at the origin, same seed
    table = load_export(auto_fleet, as_of=ORIGIN).table
    outcome = fit_models(table, auto_fleet, tmp_path, seed=name_seed(3, "chosen", ORIGIN.toordinal(), 0))
    assert chosen["candidate"] == outcome.chosen
    open_rows = table.in_service()
    shipped = outcome.main_model.fail_probability(open_rows.X, open_rows.exit, HORIZON)
    backtested = result.units[result.units["model"] == "chosen"]["probability"].to_numpy()
    assert np.array_equal(backtested, shipped)
    assert result.summary.set_index("model").loc["chosen", "candidates"] == outcome.chosen


def test_removing_a_model_changes_no_other_model(auto_fleet):
    from wearcast.fitting import make_model

    def factories(names):
        return {n: (lambda seed, n=n: make_model(n, auto_fleet, seed)) for n in names}

    def boosted(names, seed=3):
        result = backtest.run_backtest(auto_fleet, factories(names), ORIGIN, HORIZON, top_k=10, seed=seed)
        return result.units[result.units["model"] == "boosted_d2"]["probability"].to_numpy()

    alone = boosted(["boosted_d2"])
    assert np.array_equal(boosted(["cox", "boosted_d1", "boosted_d2"]), alone)
    assert np.array_equal(boosted(["boosted_d2", "cox"]), alone)
    # the boosted fit does depend on its seed (unit subsampling), so the check above can fail
    assert not np.array_equal(boosted(["boosted_d2"], seed=4), alone)


def test_window_rows_carry_the_readings_in_force():
    # Unit A (in service at age 100) has two later rows in the window, with a new reading
    # from age 130, and fails at 150; B's record ends at 200, past a 60-day window.
    at_origin = LifeTable.from_frame(pd.DataFrame({
        "unit_id": ["A", "B"], "entry_age": [0.0, 0.0], "exit_age": [100.0, 120.0], "failed": [False, False],
        "x": [1.0, 2.0], "in_service": [True, True]}), ["x"])
    later = LifeTable.from_frame(pd.DataFrame({
        "unit_id": ["A", "A", "A", "B", "B"], "entry_age": [0.0, 100.0, 130.0, 0.0, 120.0],
        "exit_age": [100.0, 130.0, 150.0, 120.0, 200.0], "failed": [False, False, True, False, False],
        "x": [1.0, 1.0, 5.0, 2.0, 3.0]}), ["x"])
    X, entry, exit_, event = backtest.window_rows(at_origin, later, 60)
    assert X["x"].tolist() == [1.0, 5.0, 3.0]
    assert entry.tolist() == [100.0, 130.0, 120.0] and exit_.tolist() == [130.0, 150.0, 180.0]
    assert event.tolist() == [False, True, False]
    # at A's failure (age 150) B is at risk with reading 3: A's reading then (5) is higher
    from wearcast.metrics import time_dependent_c

    assert time_dependent_c(entry, exit_, event, X["x"].to_numpy()).c == 1.0
    per_origin = pd.DataFrame({"c_harrell_60d": [0.6], "c_time_dependent_60d": [0.7]})
    assert backtest.gate_concordance(per_origin, 60)[0] == "c_time_dependent_60d"
    assert backtest.gate_concordance(per_origin.drop(columns="c_time_dependent_60d"), 60)[0] == "c_harrell_60d"
