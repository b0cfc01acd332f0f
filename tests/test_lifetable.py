"""The ``life_table`` export shape, checked against a published left-truncated data set.

External check: lifelines ships the Multicenter AIDS Cohort Study subset
(``load_multicenter_aids_cohort_study``; W = entry, T = exit, D = event, in
years) used by Cole & Hudgens (2010), "Survival analysis in infectious disease
research: describing events in time", AIDS 24(16). As reproduced in lifelines'
documentation (recalled from memory): the risk set grows from 42 to 44 through
delayed entries before the event at t = 0.791 years, and the Kaplan–Meier
estimate with delayed entry is S(0.791) = 0.954.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest

from wearcast.config import config_from_dict
from wearcast.exceptions import ConfigError
from wearcast.io import load_export
from wearcast.io._parse import AGE_UNIT_DAYS

YEAR = AGE_UNIT_DAYS["years"]


def _config(folder, fleet=None, inp=None):
    cfg = config_from_dict({"input": {"shape": "life_table", "life_table": "lives.csv", **(inp or {})},
                            "fleet": {"max_bad_share": 1.0, **(fleet or {})}})
    return cfg.__class__(**{**cfg.__dict__, "base_dir": folder})


@pytest.fixture(scope="module")
def macs(tmp_path_factory):
    from lifelines.datasets import load_multicenter_aids_cohort_study

    raw = load_multicenter_aids_cohort_study()
    folder = tmp_path_factory.mktemp("macs")
    export = pd.DataFrame({"unit_id": [f"M{i:03d}" for i in raw.index], "entry": raw["W"],
                           "exit": raw["T"], "failed": raw["D"].astype(int)})
    export.to_csv(folder / "lives.csv", index=False)
    result = load_export(_config(folder, inp={"age_unit": "years"}))
    return raw, result


def _at_risk(entry, exit_, t):
    return int(((entry < t) & (t <= exit_)).sum())


def test_macs_risk_set_grows_from_42_to_44_before_t_0791(macs):
    raw, result = macs
    table = result.table
    assert result.rows_read == len(raw) == table.n_rows and result.rows_quarantined == 0
    # Cole & Hudgens (2010) via lifelines docs (recalled from memory): 42 at risk after
    # the entry at 0.747 years, 44 at the event at 0.791 years.
    assert _at_risk(table.entry, table.exit, 0.75 * YEAR) == 42
    assert _at_risk(table.entry, table.exit, 0.791 * YEAR) == 44


def test_years_to_days_does_not_move_any_risk_set_boundary(macs):
    """Multiplying by 365.25 is monotone and maps equal values to equal values, so the
    count of ``entry < t <= exit`` at every observed time is the same in years and in days
    (t converted with the same factor). Checked at every entry and exit time, where a
    rounding shift would show."""
    raw, result = macs
    table = result.table
    w, t = raw["W"].to_numpy(), raw["T"].to_numpy()
    times = np.unique(np.concatenate([w, t]))
    in_years = [_at_risk(w, t, s) for s in times]
    in_days = [_at_risk(table.entry, table.exit, s * YEAR) for s in times]
    assert in_years == in_days


def test_macs_kaplan_meier_with_entry(macs):
    from lifelines import KaplanMeierFitter

    _, result = macs
    table = result.table
    km = KaplanMeierFitter().fit(table.exit, table.event, entry=table.entry)
    # S(0.791) = 0.954, Cole & Hudgens (2010) as reproduced by lifelines docs (recalled from memory).
    assert km.predict(0.791 * YEAR) == pytest.approx(0.954, abs=5e-4)
    assert table.summary()["delayed_entries"] == int((table.entry > 0).sum()) > 0


def test_dated_life_table_ages_from_install_and_in_service(tmp_path):
    pd.DataFrame({
        "unit_id": ["A", "A", "B", "C"],
        "install_date": ["2020-01-01", "2021-01-01", "2020-01-01", "2020-01-01"],
        "entry": ["2020-01-01", "2021-01-01", "2020-03-01", "2020-01-01"],
        "exit": ["2021-01-01", "2021-03-01", "2021-03-01", "2020-06-01"],
        "failed": ["1", "false", "0", "TRUE"],
    }).to_csv(tmp_path / "lives.csv", index=False)
    f = load_export(_config(tmp_path)).table.frame
    assert f[["unit_id", "life", "entry_age", "exit_age", "failed", "in_service"]].values.tolist() == [
        ["A", 1, 0.0, 366.0, True, False], ["A", 2, 0.0, 59.0, False, True],
        ["B", 1, 60.0, 425.0, False, True], ["C", 1, 0.0, 152.0, True, False]]
    back = load_export(_config(tmp_path), as_of=dt.date(2020, 12, 1))
    assert back.rows_after_as_of == 1  # A's second life starts after the as_of date
    assert back.table.frame["exit_date"].max() == pd.Timestamp("2020-12-01")
    assert not back.table.frame.loc[back.table.frame["unit_id"] == "A", "failed"].any()


def test_life_table_row_checks(tmp_path):
    pd.DataFrame({
        "unit_id": ["A", "A", "B", "C", "D", "E"],
        "entry": ["0", "10", "5", "3", "0", "0"],
        "exit": ["20", "30", "5", "9", "abc", "12"],
        "failed": ["0", "1", "1", "yes", "0", "1"],
    }).to_csv(tmp_path / "lives.csv", index=False)
    result = load_export(_config(tmp_path))
    assert result.by_reason() == {
        "exit not after entry (zero or negative duration)": 1,
        "failed flag is not 0/1/true/false": 1,  # "yes" is not accepted
        "interval overlaps another interval of the same life": 1,
        "non-numeric age": 1,
    }
    assert result.table.frame["unit_id"].tolist() == ["A", "E"]


def test_backtest_needs_dates(tmp_path):
    pd.DataFrame({"unit_id": ["A"], "entry": ["0"], "exit": ["5"], "failed": ["1"]}).to_csv(
        tmp_path / "lives.csv", index=False)
    with pytest.raises(ConfigError, match="needs calendar dates"):
        load_export(_config(tmp_path), as_of=dt.date(2020, 1, 1))


def test_bootstrap_units_matches_a_plain_loop_over_draws():
    # Reference: the definition written as a loop (draw units with replacement, copy
    # each drawn unit's rows in order, label the j-th copy "<id>#<j>").
    import numpy as np
    import pandas as pd

    from wearcast.lifetable import LifeTable

    rng = np.random.default_rng(4)
    n_rows = rng.integers(1, 5, size=30)
    ids = np.repeat([f"U{i:03d}" for i in range(30)], n_rows)
    starts = np.concatenate([np.arange(k) * 10.0 for k in n_rows])
    frame = pd.DataFrame({"unit_id": ids, "entry_age": starts, "exit_age": starts + 10.0, "failed": False,
                          "x": np.arange(len(ids), dtype=float)})
    table = LifeTable.from_frame(frame.sample(frac=1.0, random_state=1), ["x"])
    got = table.bootstrap_units(np.random.default_rng(11)).frame

    codes = table.unit_codes()
    draws = np.sort(np.random.default_rng(11).integers(0, codes.max() + 1, size=codes.max() + 1))
    pieces, seen = [], {}
    for u in draws:
        rows = table.frame.iloc[np.flatnonzero(codes == u)].copy()
        j = seen.get(u, 0)
        seen[u] = j + 1
        rows["unit_id"] = rows["unit_id"] + f"#{j}"
        pieces.append(rows)
    expected = pd.concat(pieces, ignore_index=True)
    pd.testing.assert_frame_equal(got.reset_index(drop=True), expected)


def test_bootstrap_weights_are_the_same_draw_as_copied_units():
    # The weighted form keeps each drawn unit's rows once with weight = times drawn;
    # checked against the copied form from the same seed, and on the Breslow partial
    # likelihood (weights and copies give the same value by definition of case weights).
    import numpy as np
    import pandas as pd

    from wearcast.lifetable import LifeTable
    from wearcast.models._cox_kernels import cox_loss, prepare_risk_sets

    rng = np.random.default_rng(5)
    n_rows = rng.integers(1, 4, size=40)
    ids = np.repeat([f"U{i:03d}" for i in range(40)], n_rows)
    starts = np.concatenate([np.arange(k) * 10.0 + float(rng.integers(0, 5)) for k in n_rows])
    frame = pd.DataFrame({"unit_id": ids, "entry_age": starts, "exit_age": starts + 10.0,
                          "failed": rng.random(len(ids)) < 0.3, "x": rng.normal(size=len(ids))})
    table = LifeTable.from_frame(frame, ["x"])
    copied = table.bootstrap_units(np.random.default_rng(3)).frame
    weighted, weights = table.bootstrap_weights(np.random.default_rng(3))

    copies = pd.Series(copied["unit_id"].unique())
    times_drawn = copies.str.split("#").str[0].value_counts()
    expected = weighted.frame["unit_id"].map(times_drawn).to_numpy(float)
    np.testing.assert_array_equal(weights, expected)
    assert weights.sum() == len(copied)
    assert set(weighted.frame["unit_id"]) == set(times_drawn.index)

    eta_w = weighted.frame["x"].to_numpy()
    eta_c = copied["x"].to_numpy()
    rs_w = prepare_risk_sets(weighted.entry, weighted.exit, weighted.event, weights=weights, ties="breslow")
    rs_c = prepare_risk_sets(copied["entry_age"], copied["exit_age"], copied["failed"], ties="breslow")
    assert cox_loss(rs_w, eta_w) == pytest.approx(cox_loss(rs_c, eta_c), rel=1e-12)


# -- retired units in a life table of ages ------------------------------------------------

def _ages_export(folder, n_units: int, retired: dict[int, str] | None = None, failed_every: int = 4):
    """An invented fleet of pump lives in days: every ``failed_every``-th unit failed; ``retired``
    gives the retired cell of some units (no column at all when None)."""
    rows = []
    for i in range(n_units):
        row = {"unit_id": f"PU-{i:04d}", "entry": "0", "exit": str(300 + 7 * i),
               "failed": "1" if i % failed_every == 0 else "0"}
        if retired is not None:
            row["retired"] = retired.get(i, "")
        rows.append(row)
    pd.DataFrame(rows).to_csv(folder / "lives.csv", index=False)


def test_retired_units_are_not_in_service(tmp_path):
    _ages_export(tmp_path, 12, retired={1: "1", 2: "true", 5: "0"})
    result = load_export(_config(tmp_path))
    table = result.table
    running = set(table.in_service().frame["unit_id"])
    # not in service: the failed units (0, 4, 8) and the two marked retired (1, 2); blank and 0 run on
    assert running == {f"PU-{i:04d}" for i in (3, 5, 6, 7, 9, 10, 11)}
    assert table.summary()["in_service_units"] == 7
    # the ranking's in-service set (wearcast.resample.current_units) is read from the same column
    from wearcast.resample import current_units

    assert set(current_units(table)[1]) == running
    assert result.warnings == ()


def test_bad_retired_flag_is_quarantined(tmp_path):
    _ages_export(tmp_path, 6, retired={3: "yes"})
    result = load_export(_config(tmp_path))
    assert result.quarantine[["line", "column", "value", "reason"]].values.tolist() == [
        [5, "retired", "yes", "retired flag is not 0/1/true/false (blank: not retired)"]]


def test_retired_column_can_be_mapped(tmp_path):
    _ages_export(tmp_path, 6, retired={3: "1"})
    (tmp_path / "lives.csv").write_text((tmp_path / "lives.csv").read_text().replace("retired", "scrapped", 1))
    cfg = _config(tmp_path)
    assert "PU-0003" in set(load_export(cfg).table.in_service().frame["unit_id"])  # the column is not found
    mapped = config_from_dict({"input": {"shape": "life_table", "life_table": "lives.csv"},
                               "columns": {"retired": "scrapped"}, "fleet": {"max_bad_share": 1.0}})
    mapped = mapped.__class__(**{**mapped.__dict__, "base_dir": tmp_path})
    assert "PU-0003" not in set(load_export(mapped).table.in_service().frame["unit_id"])


def test_large_all_in_service_table_warns(tmp_path):
    _ages_export(tmp_path, 250)
    result = load_export(_config(tmp_path))
    # 250 units, every 4th failed (63 units): the other 187 all read as in service
    assert result.table.summary()["in_service_units"] == 187
    assert result.warnings == (
        "every one of the 187 units of lives.csv whose last life did not end in a failure reads as in service: "
        "ages alone cannot say a unit was retired. If some were retired or decommissioned, add a column "
        "'retired' (1 for those units; set columns.retired to use another name) so they are left out of the "
        "ranking and the fleet forecast.",)
    # a small table, or one that marks its retired units, gets no such warning
    _ages_export(tmp_path, 150)
    assert load_export(_config(tmp_path)).warnings == ()
    _ages_export(tmp_path, 250, retired={7: "1"})
    assert load_export(_config(tmp_path)).warnings == ()


def test_messages_name_the_unit_and_print_values_plainly():
    # A library user's frame with a bad cell: the message names the row and its unit and prints the
    # value as a person writes it (no Python repr such as np.float64(nan)).
    import re

    from wearcast.exceptions import DataError
    from wearcast.lifetable import LifeTable

    bad_age = pd.DataFrame({"unit_id": ["GB-01", "GB-02"], "entry_age": [0.0, 5.0], "exit_age": [3.0, np.nan],
                            "failed": [0, 1]})
    with pytest.raises(DataError, match=re.escape("row 1 (unit GB-02): column exit_age is not a finite number (empty)")):
        LifeTable.from_frame(bad_age)
    bad_cov = bad_age.assign(exit_age=[3.0, 9.5], oil_fe_ppm=[12.5, "n/a"])
    with pytest.raises(DataError, match=re.escape("row 1 (unit GB-02): covariate oil_fe_ppm is not numeric (n/a)")):
        LifeTable.from_frame(bad_cov, ["oil_fe_ppm"])
    backwards = bad_age.assign(exit_age=[3.0, np.float64(4.5)])
    with pytest.raises(DataError, match=re.escape("exit_age 4.5 is not after entry_age 5;")):
        LifeTable.from_frame(backwards)
