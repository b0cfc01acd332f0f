"""Life statistics (MTBF, B-lives) against lifelines and the exact Poisson interval."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import brentq
from scipy.stats import poisson

from wearcast.exceptions import ConfigError
from wearcast.lifestats import b_life, first_failure_rows, life_statistics, mtbf_bounds
from wearcast.lifetable import LifeTable


def _macs() -> pd.DataFrame:
    # lifelines ships the left-truncated Multicenter AIDS Cohort Study data
    # (load_multicenter_aids_cohort_study: W entry, T exit, D event; years).
    from lifelines.datasets import load_multicenter_aids_cohort_study

    return load_multicenter_aids_cohort_study()


def _macs_table() -> LifeTable:
    df = _macs()
    frame = pd.DataFrame({"unit_id": [f"p{i}" for i in range(len(df))], "entry_age": df["W"].to_numpy(float),
                          "exit_age": df["T"].to_numpy(float), "failed": df["D"].astype(bool).to_numpy(),
                          "era": np.where(df["AIDSY"] < 1995, "early", "late")})
    return LifeTable.from_frame(frame)


# -- MTBF -----------------------------------------------------------------------------------------

def test_mtbf_estimate_is_lifelines_exponential_mle_with_delayed_entry():
    # Reference: lifelines ExponentialFitter(entry=...) on the macs data; its lambda_ is the
    # exponential mean (S(t) = exp(-t / lambda_)), whose MLE under delayed entry is sum(T - W) / r.
    from lifelines import ExponentialFitter

    df = _macs()
    fitted = ExponentialFitter().fit(df["T"], df["D"], entry=df["W"])
    stats = life_statistics(_macs_table())
    fleet = stats.iloc[0]
    assert (fleet["group_by"], fleet["group"]) == ("fleet", "all")
    assert fleet["mtbf_days"] == pytest.approx(fitted.lambda_, rel=1e-5)
    assert fleet["time_at_risk_days"] == pytest.approx(float((df["T"] - df["W"]).sum()), rel=1e-12)
    assert fleet["failures"] == int(df["D"].sum())


@pytest.mark.parametrize("failures", [1, 3, 27, 400])
def test_mtbf_bounds_are_exact_poisson_bounds(failures):
    # Reference: Garwood (1936, Biometrika 28:437-442) exact two-sided interval for a Poisson mean,
    # solved here from its definition with scipy.stats.poisson (no chi-square identity used):
    # lower mean L has P(X >= r | L) = a/2, upper mean U has P(X <= r | U) = a/2.
    # MTBF bounds are time / U and time / L.
    time_at_risk, level = 12_345.0, 0.90
    a = 1 - level
    lower_mean = brentq(lambda m: poisson.sf(failures - 1, m) - a / 2, 1e-9, 10 * failures + 10)
    upper_mean = brentq(lambda m: poisson.cdf(failures, m) - a / 2, 1e-9, 10 * failures + 50)
    estimate, low, high = mtbf_bounds(time_at_risk, failures, level)
    assert estimate == pytest.approx(time_at_risk / failures)
    assert low == pytest.approx(time_at_risk / upper_mean, rel=1e-8)
    assert high == pytest.approx(time_at_risk / lower_mean, rel=1e-8)
    assert low < estimate < high


def test_mtbf_without_failures_gives_only_a_lower_bound():
    # With r = 0 there is no upper bound, so the lower one is one-sided at the level: the Poisson
    # mean U with P(X = 0 | U) = exp(-U) = 1 - level, giving T / ln(1 / (1 - level)) = T / ln 10 at 90 %.
    estimate, low, high = mtbf_bounds(1_000.0, 0, 0.90)
    assert np.isnan(estimate) and np.isnan(high)
    assert low == pytest.approx(1_000.0 / np.log(10.0), rel=1e-10)
    assert all(np.isnan(mtbf_bounds(0.0, 0)))
    with pytest.raises(ValueError, match="level"):
        mtbf_bounds(10.0, 1, level=1.5)


# -- B-lives --------------------------------------------------------------------------------------

@pytest.mark.parametrize("percent", [10, 25, 50])
def test_b_life_matches_lifelines_product_limit_with_entry(percent):
    # Reference: lifelines KaplanMeierFitter(entry=W, alpha=0.10) on the macs data:
    # qth_survival_time on survival_function_ and qth_survival_times on confidence_interval_.
    from lifelines import KaplanMeierFitter
    from lifelines.utils import qth_survival_time, qth_survival_times

    df = _macs()
    km = KaplanMeierFitter(alpha=0.10).fit(df["T"], df["D"], entry=df["W"])
    q = 1 - percent / 100
    expected = qth_survival_time(q, km.survival_function_)
    bounds = qth_survival_times(q, km.confidence_interval_)  # columns: lower band, upper band
    estimate, low, high = b_life(df["W"], df["T"], df["D"].astype(bool), percent, level=0.90)
    assert estimate == pytest.approx(expected)
    for ours, theirs in ((low, bounds.iloc[0, 0]), (high, bounds.iloc[0, 1])):
        if np.isfinite(theirs):
            assert ours == pytest.approx(theirs)
        else:
            assert np.isnan(ours)
    assert low <= estimate


def test_b50_is_lifelines_median_with_entry():
    # Reference: lifelines KaplanMeierFitter(entry=...).median_survival_time_ on the macs data.
    from lifelines import KaplanMeierFitter

    df = _macs()
    km = KaplanMeierFitter().fit(df["T"], df["D"], entry=df["W"])
    fleet = life_statistics(_macs_table()).iloc[0]
    assert fleet["b50_days"] == pytest.approx(km.median_survival_time_)
    assert fleet["observed_from_age_days"] == pytest.approx(df["W"].min())
    # the fewest units at risk at a death up to B50, from lifelines' event table
    table = km.event_table
    deaths = table[(table["observed"] > 0) & (table.index <= km.median_survival_time_)]
    assert fleet["b50_fewest_at_risk"] == int(deaths["at_risk"].min())


def test_b_life_not_reached_is_empty():
    # Two failures among 100 units: the curve never falls to 0.5.
    entry = np.zeros(100)
    exit_ = np.full(100, 50.0)
    event = np.zeros(100, bool)
    exit_[:2], event[:2] = [10.0, 20.0], True
    estimate, low, high = b_life(entry, exit_, event, 50)
    assert np.isnan(estimate) and np.isnan(high)
    with pytest.raises(ValueError, match="between 0 and 100"):
        b_life(entry, exit_, event, 100)


def test_repaired_lives_count_to_their_first_failure():
    # A life with repairs keeps its age; B-lives use the age at first failure, MTBF every failure.
    frame = pd.DataFrame({
        "unit_id": ["a", "a", "a", "b", "b", "c"],
        "life": [1, 1, 1, 1, 1, 1],
        "entry_age": [0.0, 100.0, 250.0, 0.0, 300.0, 50.0],
        "exit_age": [100.0, 250.0, 400.0, 300.0, 500.0, 450.0],
        "failed": [True, True, False, False, True, False],
    })
    kept = first_failure_rows(frame)
    assert kept.tolist() == [0, 3, 4, 5]  # unit a stops at its first failure; b's rows are all before it
    table = LifeTable.from_frame(frame)
    fleet = life_statistics(table, b_lives=(10, 50)).iloc[0]
    assert fleet["failures"] == 3
    assert fleet["mtbf_days"] == pytest.approx((400 + 500 + 400) / 3)
    # first failures: a at 100 (3 at risk: a, b, c), b at 500 (alone) -> S drops to 2/3 at 100, 0 at 500
    assert fleet["b10_days"] == pytest.approx(100.0)
    # B50 tells first failures from all failures: a's repeat failure at 250 would give S = 4/9 there
    assert fleet["b50_days"] == pytest.approx(500.0)


# -- groups ---------------------------------------------------------------------------------------

def test_groups_add_up_to_the_fleet():
    stats = life_statistics(_macs_table(), ["era"])
    fleet, groups = stats.iloc[0], stats.iloc[1:]
    assert groups["group_by"].tolist() == ["era", "era"] and groups["group"].tolist() == ["early", "late"]
    for col in ("units", "lives", "failures", "suspensions"):
        assert groups[col].sum() == fleet[col]
    assert groups["time_at_risk_days"].sum() == pytest.approx(fleet["time_at_risk_days"])
    with pytest.raises(ConfigError, match="group_by names 'site'"):
        life_statistics(_macs_table(), ["site"])


def test_weibull_columns_are_lifelines_fit_with_entry_and_read_in_words():
    # Reference: lifelines WeibullFitter(entry=...) on the macs data (scale lambda_, shape rho_).
    from lifelines import WeibullFitter

    from wearcast.lifestats import fleet_headline, shape_reading

    df = _macs()
    ref = WeibullFitter().fit(df["T"], df["D"], entry=df["W"])
    stats = life_statistics(_macs_table())
    fleet = stats.iloc[0]
    assert fleet["weibull_shape"] == pytest.approx(ref.rho_, rel=2e-5)
    assert fleet["weibull_scale_days"] == pytest.approx(ref.lambda_, rel=2e-5)
    assert fleet["weibull_shape_low"] < 1.0 < fleet["weibull_shape_high"]  # 0.80 .. 1.45 on these data
    headline = fleet_headline(stats)
    assert headline["fleet_weibull_reading"] == "no clear trend with age (a constant, random failure rate fits)"
    assert shape_reading(2.0, 1.6, 2.4) == "failure rate rising with age (wear-out)"
    assert shape_reading(0.6, 0.4, 0.8) == "failure rate falling with age (early-life failures)"
    assert shape_reading(float("nan"), float("nan"), float("nan")).startswith("no Weibull fit")


def test_check_prints_the_weibull_line():
    from wearcast.cli.check import format_summary

    summary = {"rows_read": 5, "rows_kept": 5, "rows_quarantined": 0, "quarantined_by_reason": {},
               "quarantine_path": "q.csv", "life_table_path": "l.csv", "life_statistics_level": 0.9,
               "fleet_mtbf_days": 1000.0, "fleet_mtbf_low_days": 800.0, "fleet_mtbf_high_days": 1300.0,
               "fleet_weibull_shape": 1.93, "fleet_weibull_shape_low": 1.71, "fleet_weibull_shape_high": 2.18,
               "fleet_weibull_reading": "failure rate rising with age (wear-out)"}
    lines = format_summary(summary)
    assert "fleet MTBF: 1,000 days = 2.7 years (90% bounds 800 to 1,300 days)" in lines
    assert "fleet Weibull shape: 1.93 (90% bounds 1.71 to 2.18): failure rate rising with age (wear-out)" in lines


def test_counts_per_group_equal_the_life_table_summary(tmp_path):
    # lives split by readings and renewed after failures (the invented demo fleet, 300 positions)
    from wearcast.config import load_config
    from wearcast.io import load_export
    from wearcast.scenario import generate_scenario

    files = generate_scenario(tmp_path / "s", n_units=300, seed=4)
    table = load_export(load_config(files.config)).table
    stats = life_statistics(table, ["site"]).set_index(["group_by", "group"])
    keys = ("units", "lives", "failures", "suspensions", "time_at_risk_days")
    fleet = table.summary()
    assert [stats.loc[("fleet", "all"), k] for k in keys] == pytest.approx([fleet[k] for k in keys])
    for site in table.frame["site"].unique():
        part = table.take_rows(np.flatnonzero((table.frame["site"] == site).to_numpy())).summary()
        assert [stats.loc[("site", site), k] for k in keys] == pytest.approx([part[k] for k in keys]), site


def test_split_lives_give_the_same_statistics_and_gaps_stay_gaps():
    from wearcast.lifestats import _merge_contiguous

    df = _macs()
    whole = life_statistics(_macs_table()).iloc[0]
    mid = (df["W"] + df["T"]) / 2
    ids = [f"p{i}" for i in range(len(df))]
    split = LifeTable.from_frame(pd.DataFrame({
        "unit_id": ids + ids, "entry_age": np.r_[df["W"], mid], "exit_age": np.r_[mid, df["T"]],
        "failed": np.r_[np.zeros(len(df), bool), df["D"].astype(bool)]}))
    halves = life_statistics(split).iloc[0]
    for col in ("failures", "lives", "time_at_risk_days", "b10_days", "b50_days", "b50_low_days",
                "weibull_shape", "weibull_scale_days", "weibull_shape_high"):
        assert halves[col] == pytest.approx(whole[col], rel=1e-9), col
    # (0, 100] then (150, 200] of one life: the unobserved (100, 150] is not joined in
    key = np.array([1, 1, 1, 2])
    entry, exit_, failed = _merge_contiguous(key, np.array([0.0, 100.0, 150.0, 0.0]),
                                             np.array([100.0, 120.0, 200.0, 50.0]),
                                             np.array([False, False, True, False]))
    assert entry.tolist() == [0.0, 150.0, 0.0] and exit_.tolist() == [120.0, 200.0, 50.0]
    assert failed.tolist() == [False, True, False]
