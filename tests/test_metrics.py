"""Checks of wearcast.metrics against scikit-survival, lifelines, scikit-learn and
worked examples."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import roc_auc_score
from sksurv.datasets import load_flchain, load_gbsg2, load_whas500
from sksurv.metrics import concordance_index_censored

from wearcast import LifeTable
from wearcast.metrics import (
    IPCW_ENTRY_NOTE,
    bootstrap_interval,
    choose_tau,
    expected_count_interval,
    harrell_c,
    horizon_calibration,
    integrated_brier,
    paired_difference,
    time_dependent_auc,
    time_dependent_c,
    truncation_aware_c,
    unit_resamples,
    uno_c,
)


def _counts(result):
    return result.concordant, result.discordant, result.tied_risk


# -- Harrell's C --------------------------------------------------------------------
def test_hand_worked_case_from_scikit_survival_suite():
    # Source: scikit-survival's test suite, hand-worked concordance example
    # (recalled from memory; 3 concordant, 10 discordant, C = 0.2308 confirmed by computing).
    time = np.array([1, 5, 6, 11, 34, 45, 46, 50], float)
    event = np.array([0, 1, 1, 0, 0, 1, 0, 0], bool)
    score = np.array([5, 8, 11, 34, 12, 3, 9, 12], float)
    for result in (harrell_c(time, event, score), truncation_aware_c(np.zeros(8), time, event, score)):
        assert _counts(result) == (3, 10, 0)
        assert result.comparable == 13
        assert result.c == pytest.approx(3 / 13)
        assert round(result.c, 4) == 0.2308


def _shipped_datasets():
    # Source: datasets shipped with scikit-survival (WHAS500, GBSG-2, FLCHAIN).
    rng = np.random.default_rng(7)
    X, y = load_whas500()
    yield "whas500", y["lenfol"], y["fstat"], {c: X[c].to_numpy(float) for c in ("age", "bmi", "hr")}, rng
    X, y = load_gbsg2()
    yield "gbsg2", y["time"], y["cens"], {c: X[c].to_numpy(float) for c in ("age", "pnodes", "tsize")}, rng
    X, y = load_flchain()  # creatinine has NaNs; use complete numeric columns only
    yield "flchain", y["futime"], y["death"], {c: X[c].to_numpy(float) for c in ("age", "kappa", "lambda")}, rng


@pytest.mark.parametrize("case", list(_shipped_datasets()), ids=lambda c: c[0])
def test_truncation_aware_c_equals_scikit_survival_without_delayed_entry(case):
    # Reference: sksurv.metrics.concordance_index_censored on its own shipped datasets.
    _, time, event, scores, rng = case
    time = np.asarray(time, float)
    event = np.asarray(event, bool)
    scores = dict(scores, random=rng.normal(size=len(time)), rounded=np.round(rng.normal(size=len(time)), 1))
    # FLCHAIN has three deaths at follow-up 0; entering everyone just before the first
    # time keeps them in the risk set at 0, as scikit-survival does.
    entry = np.full(len(time), min(0.0, time.min()) - 1.0)
    for name, risk in scores.items():
        ref = concordance_index_censored(event, time, risk)
        ours = truncation_aware_c(entry, time, event, risk)
        assert _counts(ours) == tuple(int(v) for v in ref[1:4]), name
        assert ours.c == pytest.approx(ref[0], abs=1e-12), name
        assert _counts(harrell_c(time, event, risk)) == tuple(int(v) for v in ref[1:4]), name


def test_truncation_aware_c_equals_harrell_on_random_data_with_ties():
    # Reference: scikit-survival's Harrell C, with tied times and tied risks.
    rng = np.random.default_rng(3)
    for _ in range(20):
        n = int(rng.integers(5, 200))
        time = rng.integers(1, 20, n).astype(float)
        event = rng.random(n) < 0.6
        event[0] = True
        risk = rng.integers(0, 6, n).astype(float)
        ref = concordance_index_censored(event, time, risk)
        ours = truncation_aware_c(np.zeros(n), time, event, risk)
        assert _counts(ours) == tuple(int(v) for v in ref[1:4])


def _brute_force_truncated(entry, exit, event, risk):
    """O(n²) reference: j is comparable with failure i if at risk at t_i and not failing then."""
    con = dis = tie = 0
    for i in np.flatnonzero(event):
        for j in range(len(exit)):
            if j == i or not (entry[j] < exit[i] <= exit[j]):
                continue
            if event[j] and exit[j] == exit[i]:
                continue
            if risk[i] > risk[j]:
                con += 1
            elif risk[i] == risk[j]:
                tie += 1
            else:
                dis += 1
    return con, dis, tie


def test_truncation_aware_c_matches_brute_force_with_delayed_entry():
    rng = np.random.default_rng(11)
    for _ in range(25):
        n = int(rng.integers(2, 80))
        exit = rng.integers(1, 25, n).astype(float)
        entry = np.where(rng.random(n) < 0.5, 0.0, rng.integers(0, 24, n)).astype(float)
        entry = np.minimum(entry, exit - 1)
        event = rng.random(n) < 0.5
        risk = rng.integers(0, 5, n).astype(float)
        assert _counts(truncation_aware_c(entry, exit, event, risk)) == _brute_force_truncated(entry, exit, event, risk)


def test_late_entrant_is_not_compared_with_an_earlier_failure():
    # Unit 1 entered observation at age 5, after unit 0 failed at age 3: Harrell's C
    # counts the pair, the truncation-aware C must not (definition of the risk set).
    entry, exit = np.array([0.0, 5.0]), np.array([3.0, 10.0])
    event, risk = np.array([True, False]), np.array([1.0, 2.0])
    assert harrell_c(exit, event, risk).comparable == 1
    result = truncation_aware_c(entry, exit, event, risk)
    assert result.comparable == 0 and np.isnan(result.c)


# -- time-dependent C on start/stop rows -----------------------------------------------
def load_stanford_rows():
    from lifelines.datasets import load_stanford_heart_transplants

    return load_stanford_heart_transplants()


def _stanford_rows_and_risk():
    # Source: Stanford heart transplant start/stop data shipped by lifelines (Crowley and Hu
    # 1977, JASA 72:27-36); the risk of every row is lifelines' CoxTimeVaryingFitter
    # partial hazard of that row's covariates (transplant status in force on the row).
    from lifelines import CoxTimeVaryingFitter
    from lifelines.datasets import load_stanford_heart_transplants

    d = load_stanford_heart_transplants()
    ctv = CoxTimeVaryingFitter(penalizer=0.0).fit(d, id_col="id", event_col="event", start_col="start",
                                                  stop_col="stop")
    risk = np.asarray(ctv.predict_partial_hazard(d), float).ravel()
    return d, risk


def _brute_force_time_dependent(d, risk):
    """Each failing patient against every other patient under follow-up at the failure day,
    through that patient's row in force on the day (straight from the definition)."""
    start, stop = d["start"].to_numpy(float), d["stop"].to_numpy(float)
    event, pid = d["event"].to_numpy(bool), d["id"].to_numpy()
    con = dis = tie = 0
    for i in np.flatnonzero(event):
        t = stop[i]
        for other in np.unique(pid):
            if other == pid[i]:
                continue
            rows = np.flatnonzero(pid == other)
            in_force = rows[(start[rows] < t) & (t <= stop[rows])]
            if len(in_force) == 0:
                continue  # not under follow-up at t
            (j,) = in_force
            if event[j] and stop[j] == t:
                continue  # failed the same day: not comparable
            con += risk[i] > risk[j]
            dis += risk[i] < risk[j]
            tie += risk[i] == risk[j]
    return int(con), int(dis), int(tie)


def test_time_dependent_c_matches_a_patient_by_patient_count_on_stanford_heart():
    d, risk = _stanford_rows_and_risk()
    result = time_dependent_c(d["start"], d["stop"], d["event"].astype(bool), risk)
    assert _counts(result) == _brute_force_time_dependent(d, risk)
    # Scoring each patient on the last row instead (transplant status at the end of follow-up)
    # gives a different number: the two indices do not coincide on start/stop data.
    last = d.sort_values(["id", "start"]).groupby("id").tail(1)
    first_entry = d.groupby("id")["start"].min().loc[last["id"]].to_numpy(float)
    last_risk = risk[last.index.to_numpy()]
    last_row = truncation_aware_c(first_entry, last["stop"], last["event"].astype(bool), last_risk)
    assert abs(last_row.c - result.c) > 1e-3


def test_time_dependent_c_on_one_row_per_life_is_harrell_and_truncation_aware_c():
    # Source: Rossi recidivism data shipped by lifelines, one row per person; the reference
    # is scikit-survival's concordance_index_censored (Harrell's C).
    from lifelines.datasets import load_rossi

    data = load_rossi()
    # whole-number scores: scikit-survival ties risks within 1e-8, wearcast only when equal
    risk = (6 * data["prio"] - 8 * data["fin"] - data["age"]).to_numpy(float)
    exit, event = data["week"].to_numpy(float), data["arrest"].to_numpy(bool)
    result = time_dependent_c(np.zeros(len(data)), exit, event, risk)
    reference = concordance_index_censored(event, exit, risk)
    assert result.c == pytest.approx(reference[0], abs=1e-12)
    assert (result.concordant, result.discordant) == (reference[1], reference[2])
    # with delayed entry, one row per life: the truncation-aware C's brute-force pair count
    rng = np.random.default_rng(5)
    entry = np.minimum(rng.integers(0, 30, len(data)).astype(float), exit - 1)
    assert _counts(time_dependent_c(entry, exit, event, risk)) == _brute_force_truncated(entry, exit, event, risk)


def test_cox_on_rossi_gives_published_concordance():
    # Source: Fox & Weisberg's recidivism (Rossi) data shipped by lifelines; R's
    # survival::coxph prints concordance 0.64 for arrest ~ all covariates (recalled from memory).
    from lifelines import CoxPHFitter
    from lifelines.datasets import load_rossi

    data = load_rossi()
    fitted = CoxPHFitter().fit(data, "week", "arrest")
    risk = fitted.predict_partial_hazard(data).to_numpy()
    result = harrell_c(data["week"].to_numpy(float), data["arrest"].to_numpy(bool), risk)
    assert round(result.c, 3) == 0.640
    assert result.c == pytest.approx(fitted.concordance_index_, abs=1e-9)


def test_cox_baseline_model_on_rossi_gives_published_concordance():
    # Same source as above, through wearcast's CoxBaseline (penalizer 0 = plain coxph).
    cox = pytest.importorskip("wearcast.models.cox")
    from lifelines.datasets import load_rossi

    data = load_rossi().rename(columns={"week": "exit_age", "arrest": "failed"})
    data["unit_id"] = np.arange(len(data)).astype(str)
    data["entry_age"] = 0.0
    covariates = ["fin", "age", "race", "wexp", "mar", "paro", "prio"]
    table = LifeTable.from_frame(data, covariates)
    model = cox.CoxBaseline(penalizer=0.0).fit(table)
    result = truncation_aware_c(table.entry, table.exit, table.event, model.risk_score(table.X))
    assert round(result.c, 3) == 0.640


# -- IPCW metrics -------------------------------------------------------------------
def test_uno_c_without_censoring_is_harrell_below_tau():
    # Without censoring the censoring weights are all 1, so Uno's C is Harrell's C over
    # failures before tau (Uno et al. 2011, definition).
    rng = np.random.default_rng(5)
    n = 300
    time = rng.exponential(100.0, n) + 1.0
    event = np.ones(n, bool)
    risk = -time + rng.normal(scale=60.0, size=n)
    tau = float(np.quantile(time, 0.8))
    ours = uno_c(time, event, time, event, risk, tau=tau)
    failures_before = time < tau
    ref = truncation_aware_c(np.zeros(n), time, event & failures_before, risk)
    assert ours.tau_days == tau
    assert ours.c == pytest.approx(ref.c, abs=1e-12)


def test_automatic_tau_stays_below_thin_censoring_tail():
    X, y = load_whas500()  # scikit-survival's WHAS500
    time, event = y["lenfol"].astype(float), y["fstat"].astype(bool)
    tau = choose_tau(time, event, time)
    assert tau <= np.quantile(time, 0.9)
    from sksurv.nonparametric import kaplan_meier_estimator

    t, g = kaplan_meier_estimator(~event, time)
    assert g[np.searchsorted(t, tau, side="right") - 1] > 0.1
    result = uno_c(time, event, time, event, X["age"].to_numpy(float))
    assert result.tau_days == tau and 0.5 < result.c < 1.0


def test_auc_without_censoring_is_mann_whitney():
    # Without censoring, the cumulative/dynamic AUC at t is the ROC AUC separating
    # {T <= t} from {T > t} (Heagerty & Zheng 2005, definition); reference: scikit-learn.
    rng = np.random.default_rng(8)
    n = 400
    time = rng.exponential(200.0, n) + 1.0
    event = np.ones(n, bool)
    risk = -np.log(time) + rng.normal(size=n)
    horizons = [50.0, 150.0, 1e9]
    out = time_dependent_auc(time, event, time, event, risk, horizons)
    for h in horizons[:2]:
        assert out[h] == pytest.approx(roc_auc_score(time <= h, risk), abs=1e-9)
    assert np.isnan(out[1e9])  # beyond follow-up


def test_integrated_brier_without_censoring_is_mean_squared_error():
    # Without censoring, BS(t) = mean((1{T>t} - S(t|x))²) and the integrated score is
    # the trapezoid integral over the grid divided by its length (Graf et al. 1999, definition).
    rng = np.random.default_rng(9)
    n = 300
    scale = np.exp(rng.normal(size=n)) * 100.0
    time = rng.exponential(scale) + 0.5
    event = np.ones(n, bool)
    grid = np.quantile(time, np.linspace(0.1, 0.8, 15))
    survival = np.exp(-grid[None, :] / scale[:, None])
    ours = integrated_brier(time, event, time, event, survival, grid)
    per_time = np.mean(((time[:, None] > grid[None, :]) - survival) ** 2, axis=0)
    ref = np.sum(np.diff(grid) * (per_time[1:] + per_time[:-1]) / 2) / (grid[-1] - grid[0])
    assert ours == pytest.approx(ref, rel=1e-9)
    assert "delayed entry" in IPCW_ENTRY_NOTE


# -- calibration ----------------------------------------------------------------------
def _weibull_sample(n, seed, shape=1.8, scale=900.0, horizon=365.0):
    """Units working at a known age, Weibull lifetimes with a covariate on the scale;
    true P(fail within horizon | working at age) from the Weibull survival function."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    lam = scale * np.exp(-0.6 * x)
    start = rng.uniform(0.0, 1500.0, n)
    cum_start = (start / lam) ** shape
    life = lam * (cum_start - np.log(rng.random(n))) ** (1.0 / shape)  # conditional on start
    censor = start + rng.exponential(800.0, n)
    exit = np.minimum(life, censor)
    event = life <= censor
    true_p = 1.0 - np.exp(cum_start - ((start + horizon) / lam) ** shape)
    return start, exit, event, true_p


def test_calibration_with_true_probabilities():
    # Statistical check on a simulated Weibull sample (known parameters): with the true
    # probabilities, the observed count lies inside the expected-count interval and the
    # calibration line is close to the diagonal.
    start, exit, event, true_p = _weibull_sample(4000, seed=21)
    cal = horizon_calibration(start, exit, event, true_p, 365.0, start, groups=10)
    assert cal.expected_low <= cal.observed <= cal.expected_high
    assert cal.slope == pytest.approx(1.0, abs=0.15)
    assert cal.intercept == pytest.approx(0.0, abs=0.05)
    assert len(cal.groups) == 10 and cal.groups["units"].sum() == 4000
    assert cal.observed_raw <= cal.observed + 1e-9  # censoring only hides failures


def test_calibration_flags_understated_probabilities():
    # Halved probabilities: observed count far above the interval, slope near 2.
    start, exit, event, true_p = _weibull_sample(4000, seed=22)
    cal = horizon_calibration(start, exit, event, true_p / 2.0, 365.0, start)
    assert cal.observed > cal.expected_high
    assert cal.slope == pytest.approx(2.0, abs=0.3)


def test_expected_count_interval_is_poisson_binomial_normal():
    # Poisson-binomial mean Σp and variance Σp(1-p) (common practice).
    p = np.full(100, 0.2)
    expected, low, high = expected_count_interval(p)
    assert expected == pytest.approx(20.0)
    assert (high - expected) == pytest.approx(1.959964 * 4.0, rel=1e-5)
    assert low == pytest.approx(expected - (high - expected))


# -- bootstrap ------------------------------------------------------------------------
def test_unit_resamples_keep_units_whole_and_repeat_by_seed():
    groups = np.repeat(np.arange(30), np.arange(1, 31) % 4 + 1)
    draws = unit_resamples(groups, 5, seed=4)
    again = unit_resamples(groups, 5, seed=4)
    sizes = np.bincount(groups)
    for idx, idx2 in zip(draws, again):
        np.testing.assert_array_equal(idx, idx2)
        counts = np.bincount(groups[idx], minlength=30)
        # a unit drawn k times contributes k × its row count
        assert np.all(counts % sizes == 0)
        assert (counts // sizes).sum() == 30


def test_bootstrap_interval_and_paired_difference():
    X, y = load_gbsg2()  # scikit-survival's GBSG-2
    time, event = y["time"].astype(float), y["cens"].astype(bool)
    groups = np.arange(len(time))

    def c_of(exit, event, risk):
        return harrell_c(exit, event, risk).c

    a = {"exit": time, "event": event, "risk": X["pnodes"].to_numpy(float)}
    b = dict(a, risk=X["age"].to_numpy(float))
    interval = bootstrap_interval(c_of, a, groups, n=50, seed=1)
    assert interval.low < interval.estimate < interval.high and interval.resamples == 50
    same = paired_difference(c_of, a, a, groups, n=20, seed=1)
    assert same.low == same.high == 0.0
    diff = paired_difference(c_of, a, b, groups, n=50, seed=1)
    assert diff.estimate == pytest.approx(c_of(**a) - c_of(**b))
    assert diff.low < diff.estimate < diff.high


# -- probability with the readings in force ------------------------------------------
def test_in_force_probability_on_stanford_matches_lifelines_time_varying_cox():
    # Source: Stanford heart transplant start/stop data shipped by lifelines. Reference: the
    # same probability built from lifelines' CoxTimeVaryingFitter (its Breslow baseline
    # cumulative hazard, a step function, and each row's partial hazard), patient by patient:
    # P(die within 100 days of acceptance) = 1 - exp(-sum over rows of H0 increment x exp(x b)),
    # the last row held to day 100.
    from lifelines import CoxTimeVaryingFitter

    from wearcast._metrics_in_force import in_force_probability, window_ends

    d = load_stanford_rows()
    ctv = CoxTimeVaryingFitter(penalizer=0.0).fit(d, id_col="id", event_col="event", start_col="start",
                                                  stop_col="stop")
    base = ctv.baseline_cumulative_hazard_.iloc[:, 0]
    H0 = lambda t: np.array([base[base.index <= v].iloc[-1] if (base.index <= v).any() else 0.0  # noqa: E731
                             for v in np.atleast_1d(t)])
    partial = np.asarray(ctv.predict_partial_hazard(d), float).ravel()
    _, episode = np.unique(d["id"].to_numpy(), return_inverse=True)
    last = d.groupby("id")["stop"].transform("max").to_numpy() == d["stop"].to_numpy()
    entry = d.groupby("id")["start"].transform("min").to_numpy(float)
    ends, inside = window_ends(d["start"], d["stop"], entry, 100.0, last)
    got = in_force_probability(H0(d["start"]) * partial, H0(ends) * partial, inside, episode, episode.max() + 1)
    expected = []
    for pid, rows in d.groupby("id", sort=True):
        rows = rows.sort_values("start")
        risk = np.asarray(ctv.predict_partial_hazard(rows), float).ravel()
        total = 0.0
        for k, (start, stop) in enumerate(zip(rows["start"], rows["stop"])):
            stop = 100.0 if k == len(rows) - 1 else min(stop, 100.0)
            if start < stop:
                total += (H0(stop)[0] - H0(start)[0]) * risk[k]
        expected.append(1 - np.exp(-total))
    assert np.allclose(got, expected, atol=1e-12)
    assert 0.2 < np.mean(got) < 0.6  # a sizeable share died within 100 days of acceptance


def test_in_force_probability_with_one_row_per_episode_is_the_conditional_probability():
    from wearcast._metrics_in_force import in_force_probability, window_ends

    entry = np.array([0.0, 10.0, 30.0])
    exit = np.array([5.0, 50.0, 35.0])
    H = lambda a: 0.01 * a ** 1.5  # noqa: E731 - any increasing cumulative hazard
    ends, inside = window_ends(entry, exit, entry, 20.0, np.ones(3, bool))
    got = in_force_probability(H(entry), H(ends), inside, np.arange(3), 3)
    assert np.allclose(got, 1 - np.exp(-(H(entry + 20.0) - H(entry))))
