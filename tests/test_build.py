"""Register + event log (+ readings) -> LifeTable: properties and worked examples.

The properties are the bookkeeping rules of a life table (common practice):
each recorded failure is counted once, intervals of one life never overlap,
time at risk is the observed span, row order in the export does not matter,
and every row read is kept, quarantined or (backtests) set aside.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from wearcast.config import config_from_dict
from wearcast.exceptions import DataError
from wearcast.io import _build, load_export

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
    except DataError:
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
    assert q.loc[("register.csv", 2), "reason"] == "not a calendar date: there is no month 13"
    assert q.loc[("events.csv", 2), "reason"] == "unit's register row was rejected"
    assert (result.rows_read, result.rows_kept, result.rows_quarantined) == (4, 2, 2)


# -- the column-wise builder against the row-by-row reference ----------------------


@st.composite
def busy_exports(draw):
    """``exports(broken=True)`` plus decommission events (some on the install date)
    and same-date events of different kinds, the builder's trickiest paths."""
    register, events, readings, records_start, renewal = draw(exports(broken=True))
    for uid, install, *_ in register:
        start = (pd.Timestamp(install) - pd.Timestamp(BASE)).days
        for _ in range(draw(st.integers(0, 2))):
            events.append([uid, day(start + draw(st.integers(0, 2500))), "decommission", ""])
        if draw(st.booleans()):
            events.append([uid, install, draw(st.sampled_from(KINDS[:2])), ""])  # on the install date
    if events:
        twin = list(events[draw(st.integers(0, len(events) - 1))])
        twin[2] = draw(st.sampled_from(KINDS))
        events.append(twin)
    return register, events, readings, records_start, renewal


def _plain(frame):
    if frame is None:
        return None
    cats = {c: frame[c].astype(object) for c in frame.columns if isinstance(frame[c].dtype, pd.CategoricalDtype)}
    return frame.assign(**cats)


def _outcome_sets(outcome, inputs):
    """The fast builder's rejected/kept/after-as-of rows as (source, line, ...) sets."""
    lines = {}
    for f in inputs:
        if f is not None and len(f):
            lines[str(f["_source"].iloc[0])] = dict(zip(f.index.tolist(), f["_line"].tolist()))
    rejected = []
    for source, index, column, values, reason in outcome.rejected:
        n = len(index)
        cols = [column] * n if isinstance(column, str) else list(column)
        whys = [reason] * n if isinstance(reason, str) else list(reason)
        rejected += [(source, lines[source][i], c, str(v), r) for i, c, v, r in zip(index.tolist(), cols, values, whys)]
    kept = [(s, lines[s][i]) for s, index in outcome.kept for i in index.tolist()]
    after = [(s, lines[s][i]) for s, index in outcome.after_as_of for i in index.tolist()]
    return rejected, kept, after


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(busy_exports(), st.one_of(st.none(), st.integers(200, 2300)))
def test_column_builder_matches_row_by_row_reference(tmp_path_factory, export, cut):
    """Same rows, same order, same dtypes, and every input row placed the same way."""
    from wearcast.io import export as export_module

    compared = []
    real = export_module.build_register_log

    def both(register, events, readings, build_settings):
        fast = real(register, events, readings, build_settings)
        ref = reference_build_register_log(_plain(register), _plain(events), _plain(readings), build_settings)
        rejected, kept, after = _outcome_sets(fast, (register, events, readings))
        assert sorted(rejected) == sorted(ref.rejected)
        assert len(kept) == len(set(kept)) and set(kept) == ref.kept
        assert len(after) == len(set(after)) and set(after) == ref.after_as_of
        key = ["unit_id", "life", "entry_age"]
        want = ref.frame.sort_values(key, kind="mergesort").reset_index(drop=True)
        got = fast.frame if fast.ordered else fast.frame.sort_values(key, kind="mergesort")
        pd.testing.assert_frame_equal(got.reset_index(drop=True), want)
        compared.append(len(want))
        return fast

    tmp = tmp_path_factory.mktemp("ref")
    register, events, readings, records_start, renewal = export
    fleet = {"renewal": renewal, **({"records_start": records_start} if records_start else {})}
    cfg = write_export(tmp, register, events, readings, fleet=fleet)
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(export_module, "build_register_log", both)
        try:
            load_export(cfg, as_of=None if cut is None else (BASE + dt.timedelta(days=cut)))
        except DataError:
            pass  # too few usable rows: the builder still ran and was compared
    assert compared  # the builder ran once per load


# -- reference builder -------------------------------------------------------------
# The row-by-row builder that wearcast used before the builder worked on whole
# columns, kept verbatim (names prefixed) as the reference the fast one must match.


@dataclass
class _RefOutcome:
    """Rows of the life table plus where every input row went."""

    frame: pd.DataFrame
    rejected: list[tuple[str, int, str, str, str]] = field(default_factory=list)  # source, line, column, value, reason
    after_as_of: set[tuple[str, int]] = field(default_factory=set)
    kept: set[tuple[str, int]] = field(default_factory=set)

    def reject(self, row, column: str, value, reason: str) -> None:
        self.rejected.append((str(row["_source"]), int(row["_line"]), column, str(value), reason))


def _ref_key(row) -> tuple[str, int]:
    return (str(row["_source"]), int(row["_line"]))


def _ref_day(ts) -> str:
    return "" if pd.isna(ts) else pd.Timestamp(ts).strftime("%Y-%m-%d")


def reference_build_register_log(register: pd.DataFrame, events: pd.DataFrame, readings: pd.DataFrame | None,
                       settings: _build.BuildSettings) -> _RefOutcome:
    """Turn typed register/events/readings frames into life-table rows.

    ``register``: unit_id, install_date, decommission_date (NaT when none) and
    ``settings.register_columns``. ``events``: unit_id, event_date, event_kind,
    failure_mode. ``readings``: unit_id, reading_date and
    ``settings.reading_columns`` (float). Each unit id appears once in the
    register and every event/reading unit is in it (the caller checks both).
    Returns a :class:`_RefOutcome` whose ``frame`` has the life-table columns
    (ages in days) plus install_date, entry_date, exit_date and register columns.
    """
    out = _RefOutcome(frame=pd.DataFrame())
    as_of = settings.as_of
    units: dict[str, dict] = {}
    install_of = dict(zip(register["unit_id"], register["install_date"]))
    for row in register.sort_values(["unit_id"], kind="mergesort").to_dict("records"):
        install, decom = row["install_date"], row["decommission_date"]
        if install > as_of:
            if settings.backtest:
                out.after_as_of.add(_ref_key(row))
            else:
                out.reject(row, "install_date", _ref_day(install), "installed after as_of")
            continue
        if settings.backtest and pd.notna(decom) and decom > as_of:
            decom = pd.NaT  # not yet recorded on the as_of date
        if pd.notna(decom) and decom <= install:
            out.reject(row, "decommission_date", _ref_day(decom), "decommission not after install (zero or negative duration)")
            continue
        out.kept.add(_ref_key(row))
        units[row["unit_id"]] = {"row": row, "install": install, "end": decom, "events": [], "readings": []}
    dropped_units = set(register["unit_id"]) - set(units)

    def _sort_in(frame, date_col, target):
        if frame is None or frame.empty:
            return
        order = frame.assign(_rank=frame.get("event_kind", pd.Series("", index=frame.index)).map(_build.KIND_ORDER).fillna(0))
        # Same-date rows are ordered by their contents, never by file position, so the
        # row that wins (and the one quarantined as a repeat) does not depend on row order.
        sort_cols = ["unit_id", date_col, "_rank"] + (["failure_mode"] if "failure_mode" in frame else []) \
            + [c for c in settings.reading_columns if c in frame]
        for row in order.sort_values(sort_cols + ["_source", "_line"], kind="mergesort").to_dict("records"):
            uid, when = row["unit_id"], row[date_col]
            if uid in dropped_units:
                # The unit's register row was rejected or lies after as_of: follow it.
                if settings.backtest and install_of[uid] > as_of:
                    out.after_as_of.add(_ref_key(row))
                else:
                    out.reject(row, "unit_id", uid, "unit's register row was rejected")
                continue
            if when > as_of:
                if settings.backtest:
                    out.after_as_of.add(_ref_key(row))
                else:
                    out.reject(row, date_col, _ref_day(when), "dated after as_of")
                continue
            if when < units[uid]["install"]:
                out.reject(row, date_col, _ref_day(when), "dated before install")
                continue
            units[uid][target].append(row)

    _sort_in(events, "event_date", "events")
    _sort_in(readings, "reading_date", "readings")

    pieces = []
    for uid in sorted(units):
        pieces.extend(_ref_unit_rows(units[uid], settings, out))
    columns = ["unit_id", "life", "entry_age", "exit_age", "failed", "mode", "in_service",
               "install_date", "entry_date", "exit_date", *settings.register_columns, *settings.reading_columns]
    frame = pd.DataFrame(pieces, columns=columns)
    frame["failed"] = frame["failed"].astype(bool)
    frame["in_service"] = frame["in_service"].astype(bool)
    out.frame = frame
    return out


def _ref_unit_rows(unit: dict, s: _build.BuildSettings, out: _RefOutcome) -> list[list]:
    install = unit["install"]
    # The first decommission (register column or log event) ends observation.
    decom_events = []
    for r in unit["events"]:
        if r["event_kind"] == "decommission" and r["event_date"] <= install:
            out.reject(r, "event_date", _ref_day(r["event_date"]), "event on the install date (zero duration)")
        elif r["event_kind"] == "decommission":
            decom_events.append(r)
    unit["events"] = [r for r in unit["events"] if r["event_kind"] != "decommission" or r["event_date"] > install]
    end_decom = unit["end"]
    if decom_events:
        first = decom_events[0]["event_date"]
        end_decom = first if pd.isna(end_decom) else min(end_decom, first)
    end = s.as_of if pd.isna(end_decom) else min(end_decom, s.as_of)
    decommissioned = pd.notna(end_decom) and end_decom <= s.as_of

    segments = []  # life, life_start, start, stop, failed, mode
    life, life_start, row_start, prev = 1, install, install, install
    awaiting = False
    seen_decommission = False
    for r in unit["events"]:
        d, kind = r["event_date"], r["event_kind"]
        if d > end:
            out.reject(r, "event_date", _ref_day(d), "dated after decommission")
            continue
        if kind == "decommission":
            if seen_decommission:
                out.reject(r, "event_kind", kind, "second decommission of the unit")
            else:
                seen_decommission = True
                out.kept.add(_ref_key(r))
            continue
        repair_of_failure = kind == "replacement" and awaiting and d == prev
        if d <= prev and not repair_of_failure:
            reason = "event on the install date (zero duration)" if d == install and prev == install \
                else "event before or on the previous event's date (zero or negative duration)"
            out.reject(r, "event_date", _ref_day(d), reason)
            continue
        if kind == "failure":
            segments.append((life, life_start, row_start, d, True, str(r.get("failure_mode", ""))))
            if s.renewal == "replace":
                life, life_start = life + 1, d
            row_start, awaiting = d, True
        elif awaiting:  # replacement right after a failure: downtime is not at risk
            if s.renewal == "repair":
                life += 1
            life_start, row_start, awaiting = d, d, False
        else:  # planned renewal: the life ends as a suspension
            segments.append((life, life_start, row_start, d, False, ""))
            life, life_start, row_start = life + 1, d, d
        prev = d
        out.kept.add(_ref_key(r))
    open_segment = row_start < end
    if open_segment:
        segments.append((life, life_start, row_start, end, False, ""))

    readings = []
    for r in unit["readings"]:
        if r["reading_date"] > end:
            out.reject(r, "reading_date", _ref_day(r["reading_date"]), "dated after decommission")
        elif readings and r["reading_date"] == readings[-1]["reading_date"]:
            out.reject(r, "reading_date", _ref_day(r["reading_date"]), "second reading of the unit on the same date")
        else:
            readings.append(r)
            out.kept.add(_ref_key(r))
    reading_dates = np.array([r["reading_date"] for r in readings], dtype="datetime64[ns]")
    if s.reading_columns:
        values = _ref_carry_forward(np.array([[r[c] for c in s.reading_columns] for r in readings],
                                         dtype=float).reshape(len(readings), len(s.reading_columns)))
    static = [unit["row"][c] for c in s.register_columns]
    obs_start = install if s.records_start is None else max(install, s.records_start)
    uid = unit["row"]["unit_id"]
    rows = []
    for k, (lf, ls, a, b, failed, mode) in enumerate(segments):
        a = max(a, obs_start)
        if b <= a:
            continue  # ended before records began: not observed
        lo = int(np.searchsorted(reading_dates, np.datetime64(a), side="right"))
        hi = int(np.searchsorted(reading_dates, np.datetime64(b), side="left"))
        cuts = [a] + [pd.Timestamp(t) for t in reading_dates[lo:hi]] + [b]
        last_seg = open_segment and k == len(segments) - 1
        for j in range(len(cuts) - 1):
            p, q = cuts[j], cuts[j + 1]
            final = j == len(cuts) - 2
            row = [uid, lf, (p - ls) / _build.DAY, (q - ls) / _build.DAY, failed and final, mode if final else "",
                   bool(last_seg and final and not decommissioned), install, p, q, *static]
            if s.reading_columns:
                if len(reading_dates):
                    idx = max(int(np.searchsorted(reading_dates, np.datetime64(p), side="right")) - 1, 0)
                    row.extend(values[idx].tolist())
                else:
                    row.extend([np.nan] * len(s.reading_columns))
            rows.append(row)
    return rows


def _ref_carry_forward(values: np.ndarray) -> np.ndarray:
    """Fill NaN down each column (last value carried forward), then up (first value backward).

    ``values``: shape (n_readings, n_columns), readings in date order.
    """
    if not np.isnan(values).any():
        return values
    return pd.DataFrame(values).ffill().bfill().to_numpy()


