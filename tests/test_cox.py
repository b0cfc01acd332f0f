"""Cox baseline model: against published coefficients, lifelines and R values."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pytest
from _curves import assert_valid_probability, assert_valid_survival

from wearcast.exceptions import BundleError, ModelError
from wearcast.lifetable import LifeTable
from wearcast.models.cox import CoxBaseline

ROSSI_COLS = ["fin", "age", "race", "wexp", "mar", "paro", "prio"]
# Fox & Weisberg, "Cox Proportional-Hazards Regression for Survival Data in R"
# (appendix to An R Companion to Applied Regression), Efron ties (recalled from memory).
ROSSI_PUBLISHED = [-0.3794, -0.0574, 0.3139, -0.1498, -0.4337, -0.0849, 0.0915]


@pytest.fixture(scope="module")
def rossi():
    from lifelines.datasets import load_rossi

    data = load_rossi()
    frame = data[ROSSI_COLS].copy()
    frame["unit_id"] = [f"u{i}" for i in range(len(data))]
    frame["entry_age"] = 0.0
    frame["exit_age"] = data["week"].astype(float)
    frame["failed"] = data["arrest"].astype(bool)
    return LifeTable.from_frame(frame, ROSSI_COLS)


@pytest.fixture(scope="module")
def heart():
    from lifelines.datasets import load_stanford_heart_transplants

    data = load_stanford_heart_transplants()
    frame = data.rename(columns={"start": "entry_age", "stop": "exit_age", "event": "failed"})
    frame["unit_id"] = frame.pop("id").astype(str)
    return LifeTable.from_frame(frame, ["age", "year", "surgery", "transplant"]), data


def test_rossi_coefficients_and_concordance(rossi):
    from lifelines.utils import concordance_index

    model = CoxBaseline(penalizer=0.0).fit(rossi)
    np.testing.assert_allclose(model.coefficients, ROSSI_PUBLISHED, atol=1e-3)
    c = concordance_index(rossi.exit, -model.risk_score(rossi.X), rossi.event)
    # R survival::coxph prints "Concordance = 0.64" for this model (Fox & Weisberg,
    # recalled from memory); lifelines' concordance_index is the reference metric.
    assert c == pytest.approx(0.640, abs=0.0015)
    # The default small ridge moves the coefficients only a little.
    ridge = CoxBaseline().fit(rossi)
    np.testing.assert_allclose(ridge.coefficients, ROSSI_PUBLISHED, atol=2e-2)


def test_baseline_matches_lifelines_without_late_entry(rossi):
    # Reference: lifelines CoxPHFitter.baseline_cumulative_hazard_ (Breslow); with no
    # late entry its risk sets are ours, so both baselines agree.
    from lifelines import CoxPHFitter
    from lifelines.datasets import load_rossi

    model = CoxBaseline(penalizer=0.0).fit(rossi)
    cph = CoxPHFitter().fit(load_rossi(), "week", "arrest")
    ref = cph.baseline_cumulative_hazard_
    times = ref.index.to_numpy(float)
    np.testing.assert_allclose(model.baseline.steps_at(times), ref.iloc[:, 0].to_numpy(), rtol=1e-6)
    np.testing.assert_allclose(
        model.risk_score(rossi.X), cph.predict_partial_hazard(load_rossi()).to_numpy(), rtol=1e-6
    )
    # Compare curves at failure ages only: between them lifelines interpolates,
    # while the Breslow estimate is a right-continuous step function; and only up to the
    # tail's anchor (the tenth-oldest failure), past which wearcast's curve is the fitted tail.
    times = times[times <= model.baseline.tail_of().anchor]
    curves = model.survival(rossi.X.iloc[:50], times)
    assert_valid_survival(curves)
    np.testing.assert_allclose(
        curves, cph.predict_survival_function(load_rossi().iloc[:50], times=times).to_numpy().T, rtol=1e-5
    )
    assert_valid_survival(model.survival(rossi.X.iloc[:50], np.linspace(0, 60, 121)))
    assert_valid_probability(model.fail_probability(rossi.X, np.full(rossi.n_rows, 20.0), 26.0))


def test_delayed_entry_coefficients_and_baseline(heart):
    from lifelines import CoxPHFitter, CoxTimeVaryingFitter

    table, raw = heart
    cols = ["age", "year", "surgery", "transplant"]
    model = CoxBaseline(penalizer=0.0).fit(table)
    # R survival::coxph(Surv(start, stop, event) ~ age + year + surgery + transplant,
    # data = heart), Efron ties (recalled from memory).
    np.testing.assert_allclose(model.coefficients, [0.02717, -0.14635, -0.63721, -0.01025], atol=1e-3)
    # lifelines CoxTimeVaryingFitter uses (start, stop] risk sets for the baseline too.
    ctv = CoxTimeVaryingFitter(penalizer=0.0).fit(
        raw, id_col="id", event_col="event", start_col="start", stop_col="stop"
    )
    np.testing.assert_allclose(model.coefficients, ctv.params_[cols].to_numpy(), atol=1e-5)
    ref = ctv.baseline_cumulative_hazard_
    times = ref.index.to_numpy(float)
    np.testing.assert_allclose(model.baseline.steps_at(times), ref.iloc[:, 0].to_numpy(), rtol=1e-4)
    # lifelines CoxPHFitter's own baseline ignores entry_col: it differs from ours.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cph = CoxPHFitter().fit(raw.drop(columns="id"), "stop", "event", entry_col="start")
    theirs = cph.baseline_cumulative_hazard_
    ours = model.baseline.steps_at(theirs.index.to_numpy(float))
    assert np.abs(ours - theirs.iloc[:, 0].to_numpy()).max() > 0.05
    assert_valid_survival(model.survival(table.X.iloc[:20], np.linspace(0, 2000, 50)))


def test_categorical_one_hot_matches_lifelines_dummies():
    # Reference: lifelines CoxPHFitter on pandas get_dummies(drop_first=True), on the
    # GBSG2 breast-cancer data lifelines ships.
    from lifelines import CoxPHFitter
    from lifelines.datasets import load_gbsg2

    data = load_gbsg2()
    cols = ["horTh", "age", "tgrade", "pnodes"]
    frame = data[cols].copy()
    frame["unit_id"] = np.arange(len(data)).astype(str)
    frame["entry_age"] = 0.0
    frame["exit_age"] = data["time"].astype(float)
    frame["failed"] = data["cens"].astype(bool)
    table = LifeTable.from_frame(frame, cols, categorical=["horTh", "tgrade"])
    model = CoxBaseline(penalizer=0.0).fit(table)
    assert model.levels == {"horTh": ["no", "yes"], "tgrade": ["I", "II", "III"]}
    assert model.design_columns == ["horTh=yes", "age", "tgrade=II", "tgrade=III", "pnodes"]
    dummies = pd.get_dummies(data[cols], columns=["horTh", "tgrade"], drop_first=True, dtype=float)
    dummies["time"], dummies["cens"] = data["time"], data["cens"]
    cph = CoxPHFitter().fit(dummies, "time", "cens")
    ref = cph.params_[["horTh_yes", "age", "tgrade_II", "tgrade_III", "pnodes"]].to_numpy()
    np.testing.assert_allclose(model.coefficients, ref, atol=1e-6)
    drivers = model.contributions(table.X)
    assert list(drivers.columns) == cols
    np.testing.assert_allclose(drivers.sum(axis=1), np.log(model.risk_score(table.X)), atol=1e-12)
    # A subset without grade I (a fold or bootstrap sample) keeps pandas' unused
    # category; the model drops it rather than fitting an all-zero column.
    subset = table.frame[table.frame["tgrade"] != "I"]
    sub_model = CoxBaseline().fit(LifeTable.from_frame(subset, cols, categorical=["horTh", "tgrade"]))
    assert sub_model.levels["tgrade"] == ["II", "III"] and not sub_model.constant_columns
    with pytest.warns(UserWarning, match="IV"):
        scored = table.X.iloc[:3].astype({"tgrade": object})
        scored.loc[scored.index[0], "tgrade"] = "IV"
        model.risk_score(scored)


def test_save_load_round_trip(tmp_path, heart):
    table, _ = heart
    model = CoxBaseline(penalizer=0.05).fit(table)
    paths = model.save(tmp_path)
    assert [p.name for p in paths] == ["cox.json"]
    json.loads(paths[0].read_text())  # plain JSON
    again = CoxBaseline.load(tmp_path)
    ages = np.linspace(0, 1800, table.n_rows)
    np.testing.assert_array_equal(again.cumulative_hazard_at(table.X, ages), model.cumulative_hazard_at(table.X, ages))
    np.testing.assert_array_equal(again.risk_score(table.X), model.risk_score(table.X))
    assert again.penalizer == 0.05 and again.max_age == model.max_age
    paths[0].write_text("{not json")
    with pytest.raises(BundleError, match="line 1"):
        CoxBaseline.load(tmp_path)


def test_errors_and_copy(rossi):
    frame = rossi.frame.assign(failed=False)
    with pytest.raises(ModelError, match="no failures"):
        CoxBaseline().fit(LifeTable.from_frame(frame, ROSSI_COLS))
    with pytest.raises(ModelError, match="not fitted"):
        CoxBaseline().risk_score(rossi.X)
    copy = CoxBaseline(0.2, baseline_ties="efron").unfitted_copy(seed=7)
    assert (copy.penalizer, copy.baseline_ties, copy.seed, copy.baseline) == (0.2, "efron", 7, None)


def test_constant_column_is_reported_and_left_at_zero(rossi):
    # A covariate with one value (e.g. one site in a bootstrap sample) must not break
    # the fit; the other coefficients stay the published ones (Fox & Weisberg, as above).
    table = LifeTable.from_frame(rossi.frame.assign(site=3.0), ROSSI_COLS + ["site"])
    with pytest.warns(UserWarning, match="site"):
        model = CoxBaseline(penalizer=0.0).fit(table)
    assert model.constant_columns == ["site"] and model.coefficients[-1] == 0.0
    np.testing.assert_allclose(model.coefficients[:-1], ROSSI_PUBLISHED, atol=1e-3)
    # Exact duplicates cannot be separated without a penalty: a ModelError says what to do.
    dup = LifeTable.from_frame(rossi.frame.assign(prio2=rossi.frame["prio"]), ROSSI_COLS + ["prio2"])
    with pytest.raises(ModelError, match="penalizer"), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        CoxBaseline(penalizer=0.0).fit(dup)


def test_no_covariates_gives_nelson_aalen_with_entry():
    # Reference: lifelines NelsonAalenFitter(nelson_aalen_smoothing=False) with entry=
    # on the MACS data lifelines ships (W entry, T exit, D event).
    from lifelines import NelsonAalenFitter
    from lifelines.datasets import load_multicenter_aids_cohort_study

    data = load_multicenter_aids_cohort_study()
    frame = pd.DataFrame({"unit_id": np.arange(len(data)).astype(str), "entry_age": data["W"].to_numpy(),
                          "exit_age": data["T"].to_numpy(), "failed": data["D"].astype(bool).to_numpy()})
    model = CoxBaseline().fit(LifeTable.from_frame(frame))
    naf = NelsonAalenFitter(nelson_aalen_smoothing=False).fit(data["T"], data["D"], entry=data["W"])
    # The model joins the baseline linearly between failure ages (so short horizons never get
    # probability 0); at the failure ages themselves it equals the step estimate, up to the
    # tail's anchor (the tenth-oldest failure; test_tail.py checks the tail past it).
    times = np.unique(data["T"][data["D"] == 1].to_numpy(float))
    times = times[times <= model.baseline.tail_of().anchor]
    X = pd.DataFrame(index=range(times.size))
    np.testing.assert_allclose(model.cumulative_hazard_at(X, times), naf.cumulative_hazard_.loc[times].iloc[:, 0],
                               rtol=1e-12)
    assert_valid_probability(model.fail_probability(X, times, 1.0))


def test_missing_values_are_scored_at_the_fleet_average(rossi):
    # Rule (docs/models.md): a missing value is filled with the mean of the rows that
    # have one, so it adds 0 to the log relative risk. Reference: lifelines
    # CoxPHFitter on the Rossi data lifelines ships, with the same rows filled by hand.
    from lifelines import CoxPHFitter

    frame = rossi.frame.copy()
    gone = np.arange(0, len(frame), 9)  # every ninth released prisoner has no prio record
    frame.loc[gone, "prio"] = np.nan
    table = LifeTable.from_frame(frame, ROSSI_COLS)
    model = CoxBaseline(penalizer=0.0).fit(table)
    by_hand = frame.assign(prio=frame["prio"].fillna(frame["prio"].mean()))
    reference = CoxPHFitter().fit(by_hand[ROSSI_COLS].assign(week=by_hand["exit_age"], arrest=by_hand["failed"]),
                                  "week", "arrest")
    np.testing.assert_allclose(model.coefficients, reference.params_[ROSSI_COLS].to_numpy(), atol=1e-4)
    # the missing rows' prio term is exactly 0, and they are scored as by hand
    contrib = model.contributions(table.X)
    assert (contrib.loc[gone, "prio"] == 0).all() and (contrib.drop(index=gone)["prio"] != 0).any()
    np.testing.assert_allclose(model.log_risk(table.X), model.log_risk(by_hand[ROSSI_COLS]), atol=1e-12)
    # a unit missing a value only at scoring time is scored at the training mean as well
    full = CoxBaseline(penalizer=0.0).fit(rossi)
    one = rossi.X.iloc[[0]].assign(prio=np.nan)
    at_mean = rossi.X.iloc[[0]].assign(prio=rossi.frame["prio"].mean())
    assert full.log_risk(one)[0] == pytest.approx(full.log_risk(at_mean)[0], abs=1e-12)
    p = full.fail_probabilities(one, np.array([10.0]), [20])
    assert np.isfinite(p).all() and 0 < p[0, 0] < 1


def test_missing_category_gets_the_level_shares(rossi):
    # A missing category: each level column is filled with its share, so the term is 0.
    frame = rossi.frame.assign(wexp_level=np.where(rossi.frame["wexp"] == 1, "yes", "no")).astype({"wexp_level": object})
    frame.loc[[3, 40], "wexp_level"] = None
    cols = [c for c in ROSSI_COLS if c != "wexp"] + ["wexp_level"]
    table = LifeTable.from_frame(frame, cols, ["wexp_level"])
    model = CoxBaseline().fit(table)
    contrib = model.contributions(table.X)
    assert (contrib.loc[[3, 40], "wexp_level"] == 0).all()
    assert np.isfinite(model.risk_score(table.X)).all()


def _rossi_with(extra: pd.Series, name: str = "z") -> LifeTable:
    from lifelines.datasets import load_rossi

    data = load_rossi()
    frame = data[ROSSI_COLS].astype(float).assign(**{name: extra.astype(float)})
    frame["unit_id"] = [f"u{i}" for i in range(len(data))]
    frame["entry_age"], frame["exit_age"], frame["failed"] = 0.0, data["week"].astype(float), data["arrest"].astype(bool)
    return LifeTable.from_frame(frame, ROSSI_COLS + [name])


@pytest.mark.filterwarnings("ignore:Column prio_typed have very low variance")
def test_a_diverged_fit_is_retried_with_a_smaller_step():
    # Rossi (lifelines) with one badly scaled prio value (1e6 prior convictions, a typing
    # slip): lifelines' default Newton steps do not converge. The retry must give
    # lifelines' properly converged fit (the same data, step size 0.2, no warning).
    from lifelines import CoxPHFitter
    from lifelines.exceptions import ConvergenceWarning

    from lifelines.datasets import load_rossi

    data = load_rossi()
    bad_prio = data["prio"].astype(float).copy()
    bad_prio.iloc[0] = 1e6
    table = _rossi_with(bad_prio, "prio_typed")
    cols = ROSSI_COLS + ["prio_typed"]
    frame = data[ROSSI_COLS].astype(float).assign(prio_typed=bad_prio, week=data["week"], arrest=data["arrest"])
    with pytest.warns(ConvergenceWarning, match="failed to converge"):
        diverged = CoxPHFitter(penalizer=0.01).fit(frame, "week", "arrest", fit_options={"precision": 1e-10})
    with warnings.catch_warnings():
        warnings.simplefilter("error", ConvergenceWarning)
        converged = CoxPHFitter(penalizer=0.01).fit(frame, "week", "arrest",
                                                     fit_options={"precision": 1e-10, "step_size": 0.2})
    assert diverged.log_likelihood_ < converged.log_likelihood_ - 500  # the fixture does diverge
    with warnings.catch_warnings():
        warnings.simplefilter("error", ConvergenceWarning)
        model = CoxBaseline().fit(table)
    assert model.log_likelihood == pytest.approx(converged.log_likelihood_, abs=1e-6)
    np.testing.assert_allclose(model.coefficients, converged.params_[cols].to_numpy(), atol=1e-6)


def test_a_fit_that_never_converges_is_refused():
    # Complete separation: an indicator equal to "arrested" (Rossi, lifelines) has no finite
    # maximum without a penalty; lifelines warns at every step size. Its coefficients must
    # not be kept.
    from lifelines.datasets import load_rossi

    from wearcast.exceptions import CoxConvergenceError

    data = load_rossi()
    table = _rossi_with(data["arrest"], "arrested")
    with pytest.raises(CoxConvergenceError, match="did not converge.*0.95.*0.2"):
        CoxBaseline(penalizer=0.0).fit(table)
