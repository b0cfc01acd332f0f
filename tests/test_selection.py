"""Model choice: calibration guard and the one-standard-error rule.

The rule itself is from Breiman, Friedman, Olshen and Stone (1984) and Hastie,
Tibshirani and Friedman, The Elements of Statistical Learning §7.10: among
models within one standard error of the best, take the simplest.
"""

import pandas as pd
import pytest

from wearcast.selection import as_dict, candidate_names, choose


def _summary(rows):
    return pd.DataFrame(rows, columns=["name", "c_mean", "c_se", "expected_failures", "observed_failures"]).set_index("name")


def test_simplest_within_one_standard_error_wins():
    s = _summary([
        ("cox", 0.700, 0.010, 100, 100),
        ("boosted_d1", 0.705, 0.010, 100, 100),
        ("boosted_d3", 0.712, 0.008, 100, 100),
        ("forest_sqrt", 0.709, 0.010, 100, 100),
    ])
    # best 0.712 - se 0.008 = 0.704: boosted_d1 (0.705) is the simplest at or above it
    choice = choose(s)
    assert choice.name == "boosted_d1"
    assert "boosted_d3" in choice.reason and "one standard error" in choice.reason


def test_clear_winner_is_chosen():
    s = _summary([("cox", 0.60, 0.01, 50, 50), ("boosted_d2", 0.70, 0.01, 52, 50)])
    assert choose(s).name == "boosted_d2"


def test_badly_calibrated_model_is_not_eligible():
    s = _summary([("cox", 0.60, 0.01, 50, 50), ("boosted_d2", 0.70, 0.01, 90, 50)])
    choice = choose(s, calibration_share=0.25)
    assert choice.name == "cox"
    assert not choice.candidates.loc["boosted_d2", "eligible"]


def test_nothing_calibrated_falls_back_with_warning():
    s = _summary([("cox", 0.60, 0.01, 20, 50), ("boosted_d2", 0.70, 0.01, 90, 50)])
    choice = choose(s)
    assert choice.name == "cox"  # |20/50 - 1| = 0.6 beats |90/50 - 1| = 0.8
    assert "extra caution" in choice.reason


@pytest.mark.parametrize("failures,expected", [(30, ("cox", "boosted_d1")), (500, None)])
def test_small_fleets_restrict_candidates(failures, expected):
    names, why = candidate_names(failures, n_covariates=5)
    if expected is None:
        assert len(names) == 6 and why is None
    else:
        assert names == expected
        assert "fewer than 10 per covariate" in why


def test_constant_score_candidate_is_not_eligible():
    # A booster that kept no tree scores every unit alike: C exactly 0.5 with no spread over
    # folds. Without the guard it beats honest candidates scored below 0.5 (issue #14).
    s = _summary([("cox", 0.47, 0.02, 50, 50), ("boosted_d1", 0.50, 0.0, 50, 50), ("forest_sqrt", 0.46, 0.02, 49, 50)])
    s["constant_score"] = [False, True, False]
    choice = choose(s)
    assert choice.name == "cox"
    assert not choice.candidates.loc["boosted_d1", "eligible"]
    assert "boosted_d1 gave every held-out unit the same score" in choice.reason
    # and it is not the fallback when nothing is calibrated either
    s["expected_failures"] = [90, 50, 95]
    assert choose(s).name == "cox"


def test_choice_names_the_concordance_it_used():
    s = _summary([("cox", 0.60, 0.01, 50, 50), ("boosted_d2", 0.70, 0.01, 52, 50)])
    words = "time-dependent truncation-aware C (readings in force at each failure)"
    choice = choose(s, concordance=("c_time_dependent", words))
    assert choice.concordance == "c_time_dependent" and words in choice.reason
    record = as_dict(choice)
    assert record["concordance"] == "c_time_dependent" and record["concordance_words"] == words
    assert as_dict(choose(s))["concordance"] == "c_truncation"
