"""Register + event log (+ readings) -> LifeTable: properties and worked examples.

The properties are the bookkeeping rules of a life table (common practice):
each recorded failure is counted once, intervals of one life never overlap,
time at risk is the observed span, row order in the export does not matter,
and every row read is kept, quarantined or (backtests) set aside.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from wearcast.config import config_from_dict
from wearcast.exceptions import DataError
from wearcast.io import load_export

BASE = dt.date(2015, 1, 1)
AS_OF = dt.date(2021, 6, 1)
KINDS = ("failure", "replacement", "decommission")


def write_export(folder: Path, register, events, readings=None, *, fleet=None, inp=None):
    """Write CSVs (header on line 1, so data row i is on line i + 2) and return a Config."""
    folder.mkdir(parents=True, exist_ok=True)
    pd.DataFrame(register, columns=["unit_id", "install_date", "decommission_date", "power_kw"]).to_csv(
        folder / "register.csv", index=False)
    pd.DataFrame(events, columns=["unit_id", "event_date", "event_kind", "failure_mode"]).to_csv(
        folder / "events.csv", index=False)
    input_table = {"register": "register.csv", "events": "events.csv", **(inp or {})}
    covariates = ["power_kw"]
    if readings is not None:
        pd.DataFrame(readings, columns=["unit_id", "reading_date", "vibration"]).to_csv(
            folder / "readings.csv", index=False)
        input_table["readings"] = "readings.csv"
        covariates.append("vibration")
    fleet_table = {"as_of": AS_OF, "covariates": covariates, "max_bad_share": 1.0, **(fleet or {})}
    cfg = config_from_dict({"input": input_table, "fleet": fleet_table})
    return cfg.__class__(**{**cfg.__dict__, "base_dir": folder})


def day(offset: int) -> str:
    return (BASE + dt.timedelta(days=int(offset))).isoformat()


@st.composite
def exports(draw, broken: bool = False):
    n_units = draw(st.integers(1, 5))
    register, events, readings = [], [], []
    for u in range(n_units):
        uid = f"{u:05d}"
        install = draw(st.integers(0, 1500))
        decom = draw(st.one_of(st.none(), st.integers(install + 1, install + 3000)))
        register.append([uid, day(install), "" if decom is None else day(decom), draw(st.sampled_from(["3", "5.5"]))])
        for _ in range(draw(st.integers(0, 4))):
            kind = draw(st.sampled_from(KINDS[:2]))
            events.append([uid, day(install + draw(st.integers(1, 2500))), kind,
                           draw(st.sampled_from(["", "seal", "bearing"])) if kind == "failure" else ""])
        for _ in range(draw(st.integers(0, 3))):
            readings.append([uid, day(install + draw(st.integers(0, 2500))), draw(st.sampled_from(["1.5", "2", ""]))])
    if broken:
        bad = draw(st.lists(st.sampled_from(["bad_date", "unknown_unit", "bad_kind", "sci_id", "dup_unit",
                                             "bad_number", "before_install", "short_row"]), max_size=4))
        for b in bad:
            if b == "bad_date":
                events.append(["00000", "2019-02-30", "failure", ""])
            elif b == "unknown_unit":
                events.append(["99999", day(2000), "failure", ""])
            elif b == "bad_kind":
                events.append(["00000", day(2000), "breakdown", ""])
            elif b == "sci_id":
                register.append(["1.2E+04", day(10), "", "3"])
            elif b == "dup_unit":
                register.append([register[0][0], day(20), "", "3"])
            elif b == "bad_number":
                readings.append(["00000", day(1600), "high"])
            elif b == "before_install":
                events.append(["00000", "2014-06-01", "failure", ""])
            elif b == "short_row":
                readings.append(["00000", "", ""])
    records_start = draw(st.one_of(st.none(), st.just(dt.date(2017, 1, 1))))
    renewal = draw(st.sampled_from(["replace", "repair"]))
    return register, events, readings, records_start, renewal


def _load(tmp_path, export, tag="a"):
    register, events, readings, records_start, renewal = export
    fleet = {"renewal": renewal}
    if records_start is not None:
        fleet["records_start"] = records_start
    cfg = write_export(tmp_path / tag, register, events, readings, fleet=fleet)
    return load_export(cfg), cfg


FAST = settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
PAIRS = settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


@FAST
@given(exports())
def test_each_recorded_failure_appears_exactly_once(tmp_path_factory, export):
    tmp = tmp_path_factory.mktemp("fail")
    try:
        result, _ = _load(tmp, export)
    except DataError:
        return  # nothing usable (e.g. every unit installed after as_of)
    register, events, _, records_start, _ = export
    rejected = set(result.quarantine.loc[result.quarantine["source_file"] == "events.csv", "line"])
    starts = {r[0]: max(pd.Timestamp(r[1]), pd.Timestamp(records_start or r[1])) for r in register}
    expected = sorted(
        (e[0], pd.Timestamp(e[1])) for i, e in enumerate(events)
        if e[2] == "failure" and (i + 2) not in rejected and pd.Timestamp(e[1]) > starts[e[0]]
    )
    f = result.table.frame
    got = sorted(zip(f.loc[f["failed"], "unit_id"], f.loc[f["failed"], "exit_date"]))
    assert got == expected


@FAST
@given(exports())
def test_intervals_of_one_life_never_overlap(tmp_path_factory, export):
    try:
        result, _ = _load(tmp_path_factory.mktemp("overlap"), export)
    except DataError:
        return
    f = result.table.frame.sort_values(["unit_id", "life", "entry_age"])
    for _, life in f.groupby(["unit_id", "life"]):
        assert (life["entry_age"].to_numpy()[1:] >= life["exit_age"].to_numpy()[:-1]).all()
        # calendar dates tile the life too: each piece starts where the previous one ended or later
        assert (life["entry_date"].to_numpy()[1:] >= life["exit_date"].to_numpy()[:-1]).all()


@FAST
@given(exports())
def test_time_at_risk_is_the_observed_span_without_replacements(tmp_path_factory, export):
    register, events, readings, records_start, renewal = export
    events = [e for e in events if e[2] == "failure"]  # no downtime between failure and replacement
    try:
        result, _ = _load(tmp_path_factory.mktemp("span"), (register, events, readings, records_start, renewal))
    except DataError:
        return
    as_of = pd.Timestamp(AS_OF)
    ok_units = set(result.table.frame["unit_id"])
    expected = 0.0
    for uid, install, decom, _ in register:
        if uid not in ok_units:
            continue
        start = max(pd.Timestamp(install), pd.Timestamp(records_start or install))
        end = min(as_of, pd.Timestamp(decom)) if decom else as_of
        expected += max((end - start).days, 0)
    assert result.table.summary()["time_at_risk_days"] == pytest.approx(expected)


@PAIRS
@given(exports(broken=True), st.randoms(use_true_random=False))
def test_row_order_changes_nothing(tmp_path_factory, export, rnd):
    tmp = tmp_path_factory.mktemp("perm")
    register, events, readings, records_start, renewal = export
    shuffled = [list(x) for x in (register, events, readings)]
    for rows in shuffled:
        rnd.shuffle(rows)
    try:
        a, _ = _load(tmp, export, "a")
    except DataError as exc:
        with pytest.raises(DataError):
            _load(tmp, (*shuffled, records_start, renewal), "b")
        return
    b, _ = _load(tmp, (*shuffled, records_start, renewal), "b")
    key = ["unit_id", "life", "entry_age"]
    pd.testing.assert_frame_equal(a.table.frame.sort_values(key).reset_index(drop=True),
                                  b.table.frame.sort_values(key).reset_index(drop=True))
    assert a.by_reason() == b.by_reason()


@FAST
@given(exports(broken=True))
def test_rows_in_equal_kept_plus_quarantined(tmp_path_factory, export):
    register, events, readings, _, _ = export
    try:
        result, _ = _load(tmp_path_factory.mktemp("count"), export)
    except DataError:
        return
    rows_written = len(register) + len(events) + len(readings)
    assert result.rows_read == rows_written
    assert result.rows_read == result.rows_kept + result.rows_quarantined + result.rows_after_as_of
    assert result.rows_after_as_of == 0  # no backtest here: late rows are errors, not set aside
    assert len(result.quarantine) == result.rows_quarantined
    assert not result.quarantine.duplicated(["source_file", "line"]).any()


@PAIRS
@given(exports(), st.integers(200, 2300))
def test_as_of_backtest_equals_export_truncated_by_hand(tmp_path_factory, export, cut):
    """A backtest at D must equal a fresh load of only the records made by D."""
    tmp = tmp_path_factory.mktemp("asof")
    register, events, readings, records_start, renewal = export
    d = pd.Timestamp(day(cut))
    fleet = {"renewal": renewal, **({"records_start": records_start} if records_start else {})}
    cfg = write_export(tmp / "full", register, events, readings, fleet=fleet)
    early_reg = [[u, i, (dc if dc and pd.Timestamp(dc) <= d else ""), p]
                 for u, i, dc, p in register if pd.Timestamp(i) <= d]
    early_ids = {r[0] for r in early_reg}
    early_ev = [e for e in events if e[0] in early_ids and pd.Timestamp(e[1]) <= d]
    early_rd = [r for r in readings if r[0] in early_ids and r[1] and pd.Timestamp(r[1]) <= d]
    cut_cfg = write_export(tmp / "cut", early_reg, early_ev, early_rd, fleet={**fleet, "as_of": d.date()})
    try:
        truncated = load_export(cut_cfg)
    except DataError:
        with pytest.raises(DataError):
            load_export(cfg, as_of=d.date())
        return
    backtest = load_export(cfg, as_of=d.date())
    pd.testing.assert_frame_equal(backtest.table.frame, truncated.table.frame)
    assert backtest.table.frame["exit_date"].max() <= d
    assert backtest.rows_after_as_of == (len(register) + len(events) + len(readings)) - (
        len(early_reg) + len(early_ev) + len(early_rd))


# -- worked examples --------------------------------------------------------------


def test_delayed_entry_at_records_start(tmp_path):
    """A pump installed 2018-01-01 with records from 2020-01-01 enters at 730 days (2018 and 2019 have 365 days)."""
    cfg = write_export(tmp_path, [["P-1", "2018-01-01", "", "4"], ["P-2", "2020-06-01", "", "4"]],
                       [["P-1", "2020-07-20", "failure", "seal"], ["P-1", "2019-05-01", "failure", ""]],
                       fleet={"records_start": dt.date(2020, 1, 1), "as_of": dt.date(2021, 1, 1)})
    f = load_export(cfg).table.frame
    p1 = f[f["unit_id"] == "P-1"].reset_index(drop=True)
    # The 2019-05-01 failure ends a life before records began: not a row, but it
    # resets the age, so life 2 enters late at 2019-05-01 -> 2020-01-01 = 245 days.
    assert p1[["life", "entry_age", "exit_age", "failed"]].values.tolist() == [
        [2, 245.0, 446.0, True], [3, 0.0, 165.0, False]]
    p2 = f[f["unit_id"] == "P-2"]
    assert p2["entry_age"].tolist() == [0.0]  # installed after records began: no delayed entry

    cfg = write_export(tmp_path / "b", [["P-1", "2018-01-01", "", "4"]], [],
                       fleet={"records_start": dt.date(2020, 1, 1), "as_of": dt.date(2021, 1, 1)})
    row = load_export(cfg).table.frame.iloc[0]
    assert (row["entry_age"], row["exit_age"], bool(row["in_service"])) == (730.0, 1096.0, True)


def test_repair_keeps_age_and_writes_counting_process_rows(tmp_path):
    cfg = write_export(tmp_path, [["P-1", "2020-01-01", "2020-12-31", "4"]],
                       [["P-1", "2020-02-01", "failure", "seal"], ["P-1", "2020-04-01", "failure", "seal"]],
                       fleet={"renewal": "repair"})
    f = load_export(cfg).table.frame
    assert f[["life", "entry_age", "exit_age", "failed", "in_service"]].values.tolist() == [
        [1, 0.0, 31.0, True, False], [1, 31.0, 91.0, True, False], [1, 91.0, 365.0, False, False]]


def test_replacement_after_failure_is_downtime_not_risk(tmp_path):
    cfg = write_export(tmp_path, [["P-1", "2020-01-01", "", "4"]],
                       [["P-1", "2020-02-01", "failure", "seal"], ["P-1", "2020-02-11", "replacement", ""],
                        ["P-1", "2020-06-01", "replacement", ""]], fleet={"as_of": dt.date(2020, 7, 1)})
    f = load_export(cfg).table.frame
    assert f[["life", "entry_age", "exit_age", "failed", "in_service"]].values.tolist() == [
        [1, 0.0, 31.0, True, False], [2, 0.0, 111.0, False, False], [3, 0.0, 30.0, False, True]]


def test_readings_split_lives_and_carry_values_forward(tmp_path):
    cfg = write_export(tmp_path, [["P-1", "2020-01-01", "", "4"]], [["P-1", "2020-03-01", "failure", ""]],
                       [["P-1", "2020-02-01", "2.0"], ["P-1", "2020-04-01", "7.5"]],
                       fleet={"as_of": dt.date(2020, 5, 1)})
    f = load_export(cfg).table.frame
    # Before the first reading the first reading's value is used (documented in docs/config.md).
    assert f[["life", "entry_age", "exit_age", "failed", "vibration"]].values.tolist() == [
        [1, 0.0, 31.0, False, 2.0], [1, 31.0, 60.0, True, 2.0], [2, 0.0, 31.0, False, 2.0],
        [2, 31.0, 61.0, False, 7.5]]


def test_same_date_readings_resolve_the_same_way_in_any_row_order(tmp_path):
    register = [["P-1", "2020-01-01", "", "4"]]
    readings = [["P-1", "2020-02-01", "9.0"], ["P-1", "2020-02-01", "2.0"]]
    tables = []
    for tag, rows in (("a", readings), ("b", readings[::-1])):
        result = load_export(write_export(tmp_path / tag, register, [], rows, fleet={"as_of": dt.date(2020, 5, 1)}))
        assert result.by_reason() == {"second reading of the unit on the same date": 1}
        tables.append(result.table.frame)
    pd.testing.assert_frame_equal(*tables)


def test_rejected_register_row_takes_its_log_rows_along(tmp_path):
    cfg = write_export(tmp_path, [["P-1", "2020-13-01", "", "4"], ["P-2", "2020-01-01", "", "4"]],
                       [["P-1", "2020-03-01", "failure", ""], ["P-2", "2020-03-01", "failure", ""]])
    result = load_export(cfg)
    q = result.quarantine.set_index(["source_file", "line"])
    assert q.loc[("register.csv", 2), "reason"].startswith("unparseable date")
    assert q.loc[("events.csv", 2), "reason"] == "unit's register row was rejected"
    assert (result.rows_read, result.rows_kept, result.rows_quarantined) == (4, 2, 2)
