"""Checks of wearcast.validation: unit-grouped folds, episodes, cross-validated
metrics against an independent lifelines + scikit-survival pipeline."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from lifelines import CoxPHFitter
from lifelines.datasets import load_rossi
from sksurv.metrics import concordance_index_censored, concordance_index_ipcw
from sksurv.util import Surv

from wearcast import LifeTable
from wearcast.exceptions import ConfigError
from wearcast.validation import (
    compare_models,
    constant_score_models,
    cross_validate,
    format_table,
    choice_concordance,
    grouped_folds,
    has_start_stop,
    score_episodes,
    write_comparison,
)

COVARIATES = ["fin", "age", "race", "wexp", "mar", "paro", "prio"]


def _rossi_table() -> LifeTable:
    # Source: Rossi recidivism data shipped by lifelines (weeks converted to days).
    data = load_rossi().rename(columns={"arrest": "failed"})
    data["unit_id"] = [f"R{i:03d}" for i in range(len(data))]
    data["entry_age"] = 0.0
    data["exit_age"] = data.pop("week") * 7.0
    return LifeTable.from_frame(data, COVARIATES)


def _split_table(n_units=40, seed=0) -> LifeTable:
    """Several rows per unit (time-varying covariate pieces) for fold checks."""
    rng = np.random.default_rng(seed)
    rows = []
    for u in range(n_units):
        cut = 0.0
        for piece in range(int(rng.integers(1, 4))):
            rows.append({"unit_id": f"U{u}", "entry_age": cut, "exit_age": cut + 10.0,
                         "failed": False, "x": float(piece)})
            cut += 10.0
    return LifeTable.from_frame(pd.DataFrame(rows), ["x"])


def test_grouped_folds_keep_units_whole_and_repeat_by_seed():
    table = _split_table()
    units = table.unit_ids
    folds = grouped_folds(table, 4, seed=3)
    seen = np.concatenate([test for _, test in folds])
    assert np.array_equal(np.sort(seen), np.arange(table.n_rows))  # every row held out once
    for train, test in folds:
        assert not set(units[train]) & set(units[test])  # no unit on both sides
        assert len(train) + len(test) == table.n_rows
    test_units = [set(units[test]) for _, test in folds]
    assert sum(len(s) for s in test_units) == table.n_units  # no unit in two folds
    assert max(map(len, test_units)) - min(map(len, test_units)) <= 1
    again = grouped_folds(table, 4, seed=3)
    assert all(np.array_equal(a[1], b[1]) for a, b in zip(folds, again))
    other = grouped_folds(table, 4, seed=4)
    assert not all(np.array_equal(a[1], b[1]) for a, b in zip(folds, other))
    with pytest.raises(ConfigError, match="folds"):
        grouped_folds(table, 41, seed=0)


def test_episodes_end_at_failures_and_life_ends():
    # Counting-process rows of a repaired unit: an episode runs from the previous
    # failure (or the life's first entry) to the next failure (common practice).
    frame = pd.DataFrame({
        "unit_id": ["A", "A", "A", "A", "B", "B"],
        "life": [1, 1, 1, 1, 1, 2],
        "entry_age": [0.0, 10.0, 25.0, 40.0, 5.0, 0.0],
        "exit_age": [10.0, 25.0, 40.0, 50.0, 30.0, 12.0],
        "failed": [True, False, True, False, True, False],
    })
    ep = score_episodes(LifeTable.from_frame(frame))
    got = sorted(zip(ep.unit_id, ep.life, ep.entry, ep.exit, ep.event))
    assert got == [("A", 1, 0.0, 10.0, True), ("A", 1, 10.0, 40.0, True), ("A", 1, 40.0, 50.0, False),
                   ("B", 1, 5.0, 30.0, True), ("B", 2, 0.0, 12.0, False)]


def test_cross_validated_concordance_matches_lifelines_and_scikit_survival():
    # Independent pipeline per fold: lifelines CoxPHFitter on the training rows, then
    # scikit-survival's concordance_index_censored / concordance_index_ipcw on the held-out rows.
    cox = pytest.importorskip("wearcast.models.cox")
    table = _rossi_table()
    result = cross_validate({"cox": cox.CoxBaseline(penalizer=0.0)}, table, k=3, seed=5, horizons_days=[90, 180])
    assert len(result.per_fold) == 3
    frame = table.frame
    for fold, (train, test) in enumerate(result.folds, start=1):
        fitted = CoxPHFitter().fit(frame.iloc[train][COVARIATES + ["exit_age", "failed"]], "exit_age", "failed")
        held = frame.iloc[test]
        risk = fitted.predict_partial_hazard(held[COVARIATES]).to_numpy()
        ref = concordance_index_censored(held["failed"].to_numpy(bool), held["exit_age"].to_numpy(float), risk)[0]
        row = result.per_fold[result.per_fold["fold"] == fold].iloc[0]
        assert row["c_harrell"] == pytest.approx(ref, abs=1e-6)
        assert row["c_truncation"] == pytest.approx(ref, abs=1e-6)  # no delayed entry
        y_train = Surv.from_arrays(frame.iloc[train]["failed"].to_numpy(bool), frame.iloc[train]["exit_age"].to_numpy(float))
        y_test = Surv.from_arrays(held["failed"].to_numpy(bool), held["exit_age"].to_numpy(float))
        uno = concordance_index_ipcw(y_train, y_test, risk, tau=result.tau_days)[0]
        assert row[f"c_uno_tau_{int(result.tau_days)}d"] == pytest.approx(uno, abs=1e-6)
    summary = result.summary.iloc[0]
    assert summary["c_harrell"] == pytest.approx(result.per_fold["c_harrell"].mean())
    assert summary["c_harrell_se"] == pytest.approx(result.per_fold["c_harrell"].std(ddof=1) / np.sqrt(3))
    # Expected and observed counts within 180 days are summed over folds.
    assert summary["expected_failures_180d"] == pytest.approx(result.per_fold["expected_failures_180d"].sum())
    assert any("delayed entry" in note for note in result.notes)


def _stanford_table() -> LifeTable:
    # Source: Stanford heart transplant start/stop data shipped by lifelines (Crowley and Hu 1977).
    from lifelines.datasets import load_stanford_heart_transplants

    d = load_stanford_heart_transplants()
    frame = d[["age", "year", "surgery", "transplant"]].astype(float).assign(
        unit_id=d["id"].astype(str), entry_age=d["start"].astype(float), exit_age=d["stop"].astype(float),
        failed=d["event"].astype(bool))
    return LifeTable.from_frame(frame, ["age", "year", "surgery", "transplant"])


def test_time_dependent_c_per_fold_matches_lifelines_time_varying_cox():
    # Independent pipeline per fold: lifelines CoxTimeVaryingFitter on the training rows, every
    # held-out row scored with its own covariates, then a patient-by-patient count of the pairs
    # (each failure against the patients under follow-up that day, through their row in force).
    from lifelines import CoxTimeVaryingFitter

    cox = pytest.importorskip("wearcast.models.cox")
    table = _stanford_table()
    assert has_start_stop(table) and not has_start_stop(_rossi_table())
    assert choice_concordance(True)[0] == "c_time_dependent" and choice_concordance(False)[0] == "c_truncation"
    result = cross_validate({"cox": cox.CoxBaseline(penalizer=0.0)}, table, k=3, seed=2, horizons_days=[90])
    assert result.time_dependent and "c_time_dependent" in result.summary.columns
    frame = table.frame.assign(pid=table.frame["unit_id"])
    cov = ["age", "year", "surgery", "transplant"]
    for fold, (train, test) in enumerate(result.folds, start=1):
        ctv = CoxTimeVaryingFitter(penalizer=0.0).fit(
            frame.iloc[train][cov + ["pid", "entry_age", "exit_age", "failed"]], id_col="pid", event_col="failed",
            start_col="entry_age", stop_col="exit_age")
        held = frame.iloc[test]
        risk = np.asarray(ctv.predict_partial_hazard(held[cov]), float).ravel()
        start, stop = held["entry_age"].to_numpy(float), held["exit_age"].to_numpy(float)
        event, pid = held["failed"].to_numpy(bool), held["pid"].to_numpy()
        con = comparable = 0.0
        for i in np.flatnonzero(event):
            for j in np.flatnonzero((pid != pid[i]) & (start < stop[i]) & (stop[i] <= stop)):
                if event[j] and stop[j] == stop[i]:
                    continue
                comparable += 1
                con += 1.0 if risk[i] > risk[j] else 0.5 if risk[i] == risk[j] else 0.0
        row = result.per_fold[result.per_fold["fold"] == fold].iloc[0]
        # same coefficients to optimiser precision, so the pair order agrees exactly here
        assert row["c_time_dependent"] == pytest.approx(con / comparable, abs=1e-6)
    comparison = compare_models(result, bootstrap=20, seed=1, resampled_columns=["c_harrell", "c_time_dependent"])
    row = comparison.iloc[0]
    assert row["c_time_dependent_low"] < row["c_time_dependent"] < row["c_time_dependent_high"]
    assert comparison.attrs["interval_method"]["c_time_dependent"] == "bootstrap of held-out units"


def test_one_row_per_life_has_no_time_dependent_column():
    cox = pytest.importorskip("wearcast.models.cox")
    result = cross_validate({"cox": cox.CoxBaseline()}, _rossi_table(), k=3, seed=5, horizons_days=[90])
    assert not result.time_dependent and "c_time_dependent" not in result.per_fold.columns


def test_comparison_table_intervals_and_paired_differences(tmp_path):
    cox = pytest.importorskip("wearcast.models.cox")
    table = _rossi_table()
    models = {"cox": cox.CoxBaseline(penalizer=0.0), "ridge": cox.CoxBaseline(penalizer=5.0)}
    result = cross_validate(models, table, k=3, seed=2, horizons_days=[90, 180])
    comparison = compare_models(result, bootstrap=15, seed=9)
    tau = f"c_uno_tau_{int(result.tau_days)}d"
    for col in ["c_harrell", "c_truncation", tau, "auc_180d", "brier_integrated",
                "expected_failures_180d", "observed_failures_180d"]:
        for suffix in ("", "_low", "_high", "_vs_cox", "_vs_cox_low", "_vs_cox_high"):
            assert col + suffix in comparison.columns
    base = comparison.set_index("model").loc["cox"]
    assert base["c_harrell_vs_cox"] == 0.0 and base["c_harrell_vs_cox_low"] == 0.0
    ridge = comparison.set_index("model").loc["ridge"]
    assert ridge["c_harrell_low"] <= ridge["c_harrell"] <= ridge["c_harrell_high"]
    assert ridge["c_harrell_vs_cox"] == pytest.approx(ridge["c_harrell"] - base["c_harrell"])
    assert ridge["expected_failures_180d_pb_low"] < ridge["expected_failures_180d"] < ridge["expected_failures_180d_pb_high"]
    again = compare_models(result, bootstrap=15, seed=9)
    pd.testing.assert_frame_equal(comparison, again)

    written = write_comparison(result, tmp_path, comparison)
    assert sorted(p.name for p in written) == ["comparison.csv", "metrics.json"]
    payload = json.loads((tmp_path / "metrics.json").read_text())
    assert payload["tau_days"] == result.tau_days and len(payload["per_fold"]) == 6
    assert list(pd.read_csv(tmp_path / "comparison.csv")["model"]) == ["cox", "ridge"]
    assert not list(tmp_path.glob("*.wearcast-tmp"))

    text = format_table(comparison, ["model", "c_harrell", "c_harrell_low", "c_harrell_high"])
    lines = text.splitlines()
    assert len(lines) == 4 and lines[0].startswith("model")
    assert len({len(line) for line in lines}) == 1  # aligned columns


def test_concordance_only_bootstrap_matches_full_bootstrap_and_spreads_the_rest():
    cox = pytest.importorskip("wearcast.models.cox")
    table = _rossi_table()
    models = {"cox": cox.CoxBaseline(penalizer=0.0), "ridge": cox.CoxBaseline(penalizer=5.0)}
    result = cross_validate(models, table, k=3, seed=2, horizons_days=[90, 180])
    full = compare_models(result, bootstrap=10, seed=4)
    quick = compare_models(result, bootstrap=10, seed=4, resampled_columns=("c_harrell", "c_truncation"))
    assert list(full.columns) == list(quick.columns)
    for col in ("c_harrell", "c_truncation"):
        for suffix in ("", "_low", "_high", "_vs_cox_low", "_vs_cox_high"):
            np.testing.assert_allclose(quick[col + suffix], full[col + suffix])
    ridge = quick.set_index("model").loc["ridge"]
    per_fold = result.per_fold[result.per_fold["model"] == "ridge"]["auc_180d"].to_numpy(float)
    se = per_fold.std(ddof=1) / np.sqrt(len(per_fold))
    assert ridge["auc_180d_high"] - ridge["auc_180d"] == pytest.approx(1.959963984540054 * se)
    assert quick.attrs["interval_method"]["auc_180d"].startswith("normal interval")


def test_parallel_folds_give_the_same_results():
    # Seeds are drawn up front, so the number of worker processes changes nothing.
    cox = pytest.importorskip("wearcast.models.cox")
    table = _rossi_table()
    models = {"cox": cox.CoxBaseline(penalizer=0.0), "ridge": cox.CoxBaseline(penalizer=5.0)}
    serial = cross_validate(models, table, k=3, seed=2, horizons_days=[90, 180], jobs=1)
    parallel = cross_validate(models, table, k=3, seed=2, horizons_days=[90, 180], jobs=2)
    pd.testing.assert_frame_equal(serial.per_fold, parallel.per_fold)
    pd.testing.assert_frame_equal(compare_models(serial, bootstrap=8, seed=3, jobs=1),
                                  compare_models(serial, bootstrap=8, seed=3, jobs=2))


def test_booster_that_keeps_no_split_is_flagged_constant():
    # A leaf must hold more failures than Rossi has (114), so every tree is a single leaf and
    # the held-out score is one value: C exactly 0.5 (Harrell's tie rule, common practice).
    cox = pytest.importorskip("wearcast.models.cox")
    from wearcast.models.boosted import BoostedSurvivalTrees, BoostSettings

    flat = BoostedSurvivalTrees(BoostSettings(min_events_per_leaf=1000, max_trees=5, folds=2, early_stopping_trees=2))
    result = cross_validate({"cox": cox.CoxBaseline(), "boosted_d1": flat}, _rossi_table(), k=3, seed=1,
                            horizons_days=[90])
    assert constant_score_models(result) == {"cox": False, "boosted_d1": True}
    summary = result.summary.set_index("model")
    assert summary.loc["boosted_d1", "c_truncation"] == 0.5 and summary.loc["boosted_d1", "c_truncation_se"] == 0.0
