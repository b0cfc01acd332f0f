"""Damaged exports that used to pass with exit 0: per-file limits, plausible ranges,
empty files, real-world dates and encodings, and what the outputs look like on disk.

Fixtures are invented (an invented pump fleet at invented sites); each test writes the
damage the way a maintenance system or a spreadsheet writes it.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pandas as pd
import pytest

from wearcast.config import config_from_dict
from wearcast.exceptions import DataError
from wearcast.io import load_export

START = dt.date(2016, 1, 4)


def _day(offset: int) -> str:
    return (START + dt.timedelta(days=offset)).isoformat()


def fleet(folder: Path, n_units: int = 60, *, failures_every: int = 3, readings_per_unit: int = 4,
          bad_events: int = 0, inp: dict | None = None, fleet_keys: dict | None = None,
          events_text: str | None = None, readings_text: str | None = None, register_text: str | None = None):
    """Write register.csv, events.csv, readings.csv of an invented fleet; return its Config.

    Every ``failures_every``-th unit failed once; each unit has ``readings_per_unit``
    readings of running_hours_per_day and vibration_mm_s. ``bad_events`` extra
    event rows have an unparseable date. ``*_text`` replaces a file's whole text.
    """
    folder.mkdir(parents=True, exist_ok=True)
    reg = ["unit_id,install_date,rated_kw,site"]
    ev = ["unit_id,event_date,event_kind,failure_mode"]
    rd = ["unit_id,reading_date,running_hours_per_day,vibration_mm_s"]
    for i in range(n_units):
        uid = f"PU-{i:04d}"
        reg.append(f"{uid},{_day(i)},{5 + i % 4}.5,{'Northpier' if i % 2 else 'Eastmarsh'}")
        if i % failures_every == 0:
            ev.append(f"{uid},{_day(i + 400 + i % 50)},failure,bearing")
        for k in range(readings_per_unit):
            rd.append(f"{uid},{_day(i + 30 + 60 * k)},{12 + k},{1.5 + 0.4 * k:.1f}")
    for j in range(bad_events):
        ev.append(f"PU-{j:04d},31.31.2019,failure,seal")
    texts = {"register.csv": register_text if register_text is not None else "\n".join(reg) + "\n",
             "events.csv": events_text if events_text is not None else "\n".join(ev) + "\n",
             "readings.csv": readings_text if readings_text is not None else "\n".join(rd) + "\n"}
    for name, text in texts.items():
        (folder / name).write_text(text, encoding="utf-8")
    cfg = config_from_dict({
        "input": {"register": "register.csv", "events": "events.csv", "readings": "readings.csv", **(inp or {})},
        "fleet": {"as_of": dt.date(2019, 6, 1), "covariates": ["rated_kw", "running_hours_per_day",
                                                                 "vibration_mm_s"],
                  "group_by": ["site"], **(fleet_keys or {})}})
    return cfg.__class__(**{**cfg.__dict__, "base_dir": folder})


def _accounted(result):
    for f in result.files:
        assert f["rows_read"] == f["rows_kept"] + f["rows_quarantined"] + f["rows_after_as_of"], f
    assert result.rows_read == sum(f["rows_read"] for f in result.files)


# -- 1. the bad-row limit is per input file ---------------------------------------------

def test_bad_event_rows_are_not_diluted_by_clean_readings(tmp_path):
    # 20 failures + 3 bad rows = 13 % of the event log, but 3 of 23 + 60 + 600 = 0.4 % of all rows
    cfg = fleet(tmp_path, 60, readings_per_unit=10, bad_events=3)
    with pytest.raises(DataError) as err:
        load_export(cfg, quarantine_dir=tmp_path / "out")
    message = str(err.value)
    assert message.startswith("events.csv: 3 of 23 rows (13.0%) were rejected, above fleet.max_bad_share = 5.0% "
                              "(taken per file).")
    assert "first at line 22, column event_date (value '31.31.2019')" in message
    assert err.value.exit_code == 65


def test_event_log_with_every_date_blank_stops(tmp_path):
    events = "unit_id,event_date,event_kind,failure_mode\n" + "".join(
        f"PU-{i:04d},,failure,bearing\n" for i in range(0, 60, 3))
    cfg = fleet(tmp_path, 60, readings_per_unit=20, events_text=events)
    with pytest.raises(DataError, match=r"^events.csv: 20 of 20 rows \(100.0%\) were rejected.*missing date"):
        load_export(cfg)


def test_counts_per_file_add_up(tmp_path):
    cfg = fleet(tmp_path, 60, bad_events=1, fleet_keys={"max_bad_share": 0.10})
    result = load_export(cfg)
    assert [(f["file"], f["role"], f["rows_read"], f["rows_kept"], f["rows_quarantined"]) for f in result.files] == [
        ("register.csv", "register", 60, 60, 0), ("events.csv", "events", 21, 20, 1),
        ("readings.csv", "readings", 240, 240, 0)]
    _accounted(result)


# -- 3. empty and header-only files are named ---------------------------------------------

def test_header_only_register_says_it_lists_no_units(tmp_path):
    cfg = fleet(tmp_path, 30, register_text="unit_id,install_date,rated_kw,site\n")
    with pytest.raises(DataError) as err:
        load_export(cfg)
    assert str(err.value) == (
        "register.csv has a header but no rows: the register lists no units. Export the file again with its rows "
        "(one row per unit with its install date); check the export's filter or date range.")


def test_header_only_event_log_stops_when_a_large_fleet_shows_no_failure(tmp_path):
    # 200 units running about 3 years each: some 600 unit-years and not one failure
    cfg = fleet(tmp_path, 200, readings_per_unit=1, events_text="unit_id,event_date,event_kind,failure_mode\n")
    with pytest.raises(DataError) as err:
        load_export(cfg)
    message = str(err.value)
    assert message.startswith("events.csv: no failure in ")
    assert "unit-years at risk over 200 units (the file has a header but no rows)" in message
    assert message.endswith("or set fleet.no_failures_expected = true when the fleet truly has not failed.")
    # the suggested fix works when applied, and the empty log is still named
    fixed = fleet(tmp_path, 200, readings_per_unit=1, events_text="unit_id,event_date,event_kind,failure_mode\n",
                  fleet_keys={"no_failures_expected": True})
    result = load_export(fixed)
    assert result.table.n_failures == 0
    assert result.warnings == ("events.csv has a header but no rows: no failure, replacement or decommission is "
                               "on record, so every unit is read as running since install.",)


def test_failure_codes_not_matched_stop_with_the_kinds_named(tmp_path):
    events = "unit_id,event_date,event_kind,failure_mode\n" + "".join(
        f"PU-{i:04d},{_day(i + 500)},replacement,\n" for i in range(0, 200, 50))
    cfg = fleet(tmp_path, 200, readings_per_unit=1, events_text=events)
    with pytest.raises(DataError, match=r"Check that fleet.failure_kinds \(\['failure'\]\) names the export's "
                                        r"failure codes"):
        load_export(cfg)


def test_small_fleet_without_failures_is_not_stopped(tmp_path):
    # 10 units, about 30 unit-years: too little time to call a missing failure suspicious
    cfg = fleet(tmp_path, 10, readings_per_unit=1, events_text="unit_id,event_date,event_kind,failure_mode\n")
    assert load_export(cfg).table.n_failures == 0


def test_header_only_readings_warn_that_reading_covariates_are_empty(tmp_path):
    cfg = fleet(tmp_path, 30, readings_text="unit_id,reading_date,running_hours_per_day,vibration_mm_s\n")
    result = load_export(cfg)
    assert result.warnings == ("readings.csv has a header but no rows: the reading covariates "
                               "(running_hours_per_day, vibration_mm_s) are empty for every unit.",)
    assert result.table.frame["vibration_mm_s"].isna().all()


def test_file_cut_mid_row_is_called_truncated(tmp_path):
    full = fleet(tmp_path, 30)
    text = (tmp_path / "readings.csv").read_text()
    cut = text[: text.rindex(",", 0, len(text) - 1) - 3]  # stops inside the last row's date
    cfg = fleet(tmp_path, 30, readings_text=cut)
    result = load_export(cfg)
    lines = cut.count("\n") + 1
    assert result.warnings == (f"readings.csv ends in the middle of line {lines} (row has 2 fields, the header has "
                               "4, no line break after it): the file may be truncated (a cut transfer). Export or "
                               "copy it again.",)
    assert result.files[2]["rows_quarantined"] == 1
    _accounted(result)
    # a complete last row without a final line break is common and no reason to warn
    (tmp_path / "readings.csv").write_text(text.rstrip("\n"))
    assert load_export(full).warnings == ()


# -- 4. dates and encodings as exports write them ------------------------------------------

def _register_events(folder: Path, register_rows: list[str], event_rows: list[str], *, encoding="utf-8",
                     inp: dict | None = None, fleet_keys: dict | None = None, register_header=None):
    folder.mkdir(parents=True, exist_ok=True)
    header = register_header or "unit_id,install_date,rated_kw"
    (folder / "register.csv").write_bytes(("\n".join([header, *register_rows]) + "\n").encode(encoding))
    (folder / "events.csv").write_text("\n".join(["unit_id,event_date,event_kind", *event_rows]) + "\n",
                                       encoding="utf-8")
    cfg = config_from_dict({"input": {"register": "register.csv", "events": "events.csv", **(inp or {})},
                            "fleet": {"as_of": dt.date(2024, 12, 1), "max_bad_share": 1.0, **(fleet_keys or {})}})
    return cfg.__class__(**{**cfg.__dict__, "base_dir": folder})


def test_timestamps_with_utc_offsets_read_as_their_calendar_date(tmp_path):
    cfg = _register_events(tmp_path, ["PU-1,2022-01-10,5", "PU-2,2022-03-01,5", "PU-3,2022-04-01,5"],
                           ["PU-1,2024-05-04T10:00:00+02:00,failure", "PU-2,2024-05-04T23:30:00Z,failure",
                            "PU-3,2024-05-04 08:15-0500,failure"])
    result = load_export(cfg)
    assert result.rows_quarantined == 0
    exits = result.table.frame.loc[result.table.frame["failed"], "exit_date"]
    assert sorted(exits.dt.strftime("%Y-%m-%d")) == ["2024-05-04"] * 3
    # the time of day is dropped: ages are whole days, as for dates written without a time
    assert (exits == exits.dt.normalize()).all()
    ages = result.table.frame["exit_age"]
    assert (ages == ages.round()).all()


def test_an_event_late_on_the_decommission_date_is_not_after_it(tmp_path):
    # Found trying a re-exported work-order log: a decommission logged at 23:30 on the day the
    # register gives as the unit's decommission date was quarantined as "dated after decommission".
    cfg = _register_events(tmp_path, ["PU-1,2022-01-10,2024-05-04", "PU-2,2022-03-01,"],
                           ["PU-1,2024-05-04T23:30:00Z,decommission", "PU-2,2024-06-01 14:05,failure"],
                           register_header="unit_id,install_date,decommission_date")
    result = load_export(cfg)
    assert result.rows_quarantined == 0, result.quarantine.to_dict("records")


def test_not_a_calendar_date_is_called_so(tmp_path):
    cfg = _register_events(tmp_path, ["PU-1,2022-01-10,5", "PU-2,2022-03-01,5"],
                           ["PU-1,2023-02-29,failure", "PU-2,2023-03-01,failure"])
    q = load_export(cfg).quarantine
    # 2023 is not a leap year (Gregorian calendar rule: divisible by 4, not by 100 unless by 400)
    assert q[["line", "column", "value", "reason"]].values.tolist() == [
        [2, "event_date", "2023-02-29", "not a calendar date: February 2023 has 28 days"]]


def test_repeated_header_row_is_named(tmp_path):
    cfg = _register_events(tmp_path, ["PU-1,2022-01-10,5", "unit_id,install_date,rated_kw", "PU-2,2022-03-01,5"],
                           ["PU-1,2023-02-28,failure"])
    result = load_export(cfg)
    assert result.quarantine[["source_file", "line", "reason"]].values.tolist() == [
        ["register.csv", 3, "repeated header row (files pasted together); it is not data"]]
    _accounted(result)


def test_nul_byte_never_reaches_the_quarantine_file(tmp_path):
    cfg = _register_events(tmp_path, ["PU-1,2022-01-10,5", "PU-2\x00,2022-03-01,5"], ["PU-1,2023-02-28,failure"])
    result = load_export(cfg, quarantine_dir=tmp_path / "out")
    data = (tmp_path / "out" / "quarantine.csv").read_bytes()
    assert b"\x00" not in data
    assert "PU-2\\x00,2022-03-01,5" in data.decode("utf-8")
    assert result.quarantine[["line", "column", "reason"]].values.tolist() == [
        [3, "unit_id", "control byte (such as NUL) in the cell: the file was damaged in transfer; export it again"]]
    assert result.quarantine["value"].tolist() == ["PU-2\\x00"]  # shown, not written raw


def test_utf16_export_hint_works_when_applied(tmp_path):
    rows = ["PU-1,2022-01-10,5", "PU-2,2022-03-01,5"]
    events = ["PU-1,2023-02-28,failure"]
    # UTF-16 without a byte-order mark (as some systems write it): the hint must name utf-16, not cp1252
    raw = _register_events(tmp_path, rows, events, encoding="utf-16-le")
    with pytest.raises(DataError) as err:
        load_export(raw)
    assert str(err.value).endswith('Save the export as UTF-8, or set encoding_by_file = { register = "utf-16" } '
                                   'under [input] (or encoding = "utf-16" for every file).')
    # utf-16 without a BOM decodes as little-endian (Python codecs documentation)
    fixed = _register_events(tmp_path, rows, events, encoding="utf-16-le",
                             inp={"encoding_by_file": {"register": "utf-16"}})
    assert load_export(fixed).table.n_units == 2
    # with a byte-order mark the file is read as UTF-16 without any setting
    (tmp_path / "register.csv").write_bytes(("unit_id,install_date,rated_kw\n" + "\n".join(rows) + "\n")
                                            .encode("utf-16"))
    assert load_export(raw).table.n_units == 2


def test_cp1252_hint_works_when_applied(tmp_path):
    rows = ["PU-1,2022-01-10,5", "PU-2,2022-03-01,5"]
    header = "unit_id,install_date,rated_kw,Standort\u2013Süd"
    rows = [r + ",Nordkai" for r in rows]
    raw = _register_events(tmp_path, rows, ["PU-1,2023-02-28,failure"], encoding="cp1252", register_header=header)
    with pytest.raises(DataError, match=r'encoding_by_file = \{ register = "cp1252" \}') as err:
        load_export(raw)
    assert "line 1" in str(err.value)
    fixed = _register_events(tmp_path, rows, ["PU-1,2023-02-28,failure"], encoding="cp1252",
                             register_header=header, inp={"encoding_by_file": {"register": "cp1252"}})
    assert load_export(fixed).table.n_units == 2


def test_date_format_per_file_describes_a_mixed_export(tmp_path):
    # register day/month, event log month/day: one setting cannot describe both
    rows = ["PU-1,13/01/2022,5", "PU-2,01/03/2022,5"]
    events = ["PU-1,02/27/2023,failure", "PU-2,03/01/2023,failure"]
    mixed = _register_events(tmp_path, rows, events)
    with pytest.raises(DataError) as err:
        load_export(mixed)
    assert str(err.value).endswith('Set the order per file under [input]: date_format_by_file = '
                                   '{ register = "%d/%m/%Y", events = "%m/%d/%Y" }.')
    fixed = _register_events(tmp_path, rows, events, inp={"date_format_by_file": {"register": "%d/%m/%Y",
                                                                                  "events": "%m/%d/%Y"}})
    result = load_export(fixed)
    assert result.rows_quarantined == 0
    assert sorted(result.table.frame.loc[result.table.frame["failed"], "exit_date"].dt.strftime("%Y-%m-%d")) == [
        "2023-02-27", "2023-03-01"]


def test_suggested_date_format_reads_the_other_files_of_a_mixed_export(tmp_path):
    # register ambiguous day/month; the event log writes ISO timestamps: the suggested
    # date_format must not reject the event log's rows
    rows = ["PU-1,03/04/2022,5", "PU-2,05/06/2022,5"]
    events = ["PU-1,2023-02-27T08:00:00Z,failure", "PU-2,2023-03-01 14:10,failure"]
    with pytest.raises(DataError, match='for example date_format = "%d/%m/%Y"'):
        load_export(_register_events(tmp_path, rows, events))
    result = load_export(_register_events(tmp_path, rows, events, inp={"date_format": "%d/%m/%Y"}))
    assert result.rows_quarantined == 0 and result.table.n_failures == 2


def test_unknown_file_key_in_by_file_settings_is_a_config_error(tmp_path):
    from wearcast.exceptions import ConfigError

    cfg = _register_events(tmp_path, ["PU-1,2022-01-10,5"], [], inp={"date_format_by_file": {"event": "%d/%m/%Y"}})
    with pytest.raises(ConfigError, match="input.date_format_by_file has a key 'event'; use the"):
        load_export(cfg)


# -- 2. plausible ranges for readings and covariates -----------------------------------------

def test_implausible_readings_and_register_values_are_quarantined_with_the_range(tmp_path):
    rows = ["unit_id,reading_date,running_hours_per_day,vibration_mm_s",
            "PU-0001,2016-03-01,37.5,2.1",      # more hours than a day has
            "PU-0002,2016-03-01,12,-4.2",       # a vibration level cannot be negative
            "PU-0003,2016-03-01,1e308,2.0",     # an overflowed cell
            "PU-0004,2016-03-01,24,0"]          # the edges are plausible
    register = ["unit_id,install_date,rated_kw,site"] + [
        f"PU-{i:04d},{_day(i)},{'-7.5' if i == 5 else '5.5'},Northpier" for i in range(8)]
    cfg = fleet(tmp_path, 8, readings_text="\n".join(rows) + "\n", register_text="\n".join(register) + "\n",
                fleet_keys={"max_bad_share": 1.0})
    result = load_export(cfg)
    q = result.quarantine
    hint = "fix the value, or declare the range under [fleet.ranges] as {c} = [low, high]"
    assert q[["source_file", "line", "column", "reason"]].values.tolist() == [
        ["readings.csv", 2, "running_hours_per_day", "outside the plausible range of running_hours_per_day: "
         "0 to 24 (hours in a day); " + hint.format(c="running_hours_per_day")],
        ["readings.csv", 3, "vibration_mm_s", "outside the plausible range of vibration_mm_s: 0 to 1e12 "
         "(cannot be negative); " + hint.format(c="vibration_mm_s")],
        ["readings.csv", 4, "running_hours_per_day", "outside the plausible range of running_hours_per_day: "
         "0 to 24 (hours in a day); " + hint.format(c="running_hours_per_day")],
        ["register.csv", 7, "rated_kw", "outside the plausible range of rated_kw: 0 to 1e12 (cannot be negative); "
         + hint.format(c="rated_kw")],
    ]
    assert q["value"].tolist() == ["37.5", "-4.2", "1e308", "-7.5"]
    table = result.table.frame
    assert table["running_hours_per_day"].max() <= 24 and table["vibration_mm_s"].min() >= 0
    _accounted(result)


def test_declared_range_overrides_the_default_and_the_fix_works(tmp_path):
    rows = ["unit_id,reading_date,running_hours_per_day,vibration_mm_s",
            "PU-0001,2016-03-01,12,-4.2", "PU-0002,2016-03-01,12,60"]
    cfg = fleet(tmp_path, 4, readings_text="\n".join(rows) + "\n",
                fleet_keys={"max_bad_share": 1.0, "ranges": {"vibration_mm_s": [float("-inf"), 45]}})
    q = load_export(cfg).quarantine
    assert q[["line", "reason"]].values.tolist() == [
        [3, "outside the plausible range of vibration_mm_s: -inf to 45 (fleet.ranges.vibration_mm_s); fix the "
            "value, or widen the range under [fleet.ranges] as vibration_mm_s = [low, high]"]]


def test_range_for_an_unknown_column_is_a_config_error(tmp_path):
    from wearcast.exceptions import ConfigError

    cfg = fleet(tmp_path, 4, fleet_keys={"ranges": {"vibraton_mm_s": [0, 45]}})
    with pytest.raises(ConfigError, match="fleet.ranges names 'vibraton_mm_s', which is not a numeric covariate"):
        load_export(cfg)
    cfg = fleet(tmp_path, 4, fleet_keys={"ranges": {"vibration_mm_s": [45, 0]}})
    with pytest.raises(ConfigError, match=r"must be \[low, high\] with low <= high"):
        load_export(cfg)


def test_range_rules_from_column_names():
    from wearcast.io._ranges import MAGNITUDE, plausible_range

    # hours in a day and signs of physical quantities: common practice
    assert (plausible_range("running_hours_per_day", {}).low, plausible_range("hrs_day", {}).high) == (0, 24)
    assert plausible_range("rated_kw", {}).low == 0 and plausible_range("motor_current_a", {}).low == 0
    assert plausible_range("bearing_temp_c", {}).low == -MAGNITUDE  # temperatures may be below zero
    assert plausible_range("suction_bar", {}).low == -MAGNITUDE  # gauge pressure may be below zero
    assert plausible_range("Fe ppm", {}).low == 0 and plausible_range("chloride_mg_l", {}).low == 0  # concentrations


def test_range_hint_is_a_key_toml_reads():
    import tomllib

    from wearcast.io._ranges import toml_key

    for column in ("vibration_mm_s", "Fe ppm", 'odd "name"'):
        assert tomllib.loads(f"{toml_key(column)} = [0, 5]") == {column: [0, 5]}


# -- 5. outputs are what the user expects on disk ------------------------------------------

def test_quarantine_shows_the_exports_own_column_names_and_cells(tmp_path):
    (tmp_path / "assets.csv").write_text(
        "asset_no;commissioned;rated_kw\nPU-1;14/02/2019;5,5\nPU-2;15/03/2019;-7,5\n", encoding="utf-8")
    (tmp_path / "work_orders.csv").write_text(
        "asset_no;wo_date;wo_type\nPU-1;01/01/2019;BREAKDOWN\nPU-1;20/06/2020;BREAKDOWN\n", encoding="utf-8")
    cfg = config_from_dict({
        "input": {"register": "assets.csv", "events": "work_orders.csv", "decimal": ","},
        "columns": {"unit_id": "asset_no", "install_date": "commissioned", "event_date": "wo_date",
                    "event_kind": "wo_type"},
        "fleet": {"as_of": dt.date(2021, 1, 1), "covariates": ["rated_kw"], "failure_kinds": ["BREAKDOWN"],
                  "max_bad_share": 1.0}})
    cfg = cfg.__class__(**{**cfg.__dict__, "base_dir": tmp_path})
    q = load_export(cfg).quarantine
    assert q[["source_file", "line", "column", "value"]].values.tolist() == [
        ["assets.csv", 3, "rated_kw", "-7,5"],          # as written, decimal comma and all
        ["work_orders.csv", 2, "wo_date", "01/01/2019"],  # dated before install: the cell, not 2019-01-01
    ]
    assert q["reason"].tolist()[1] == "dated before install"
    assert q["original_row"].tolist() == ["PU-2;15/03/2019;-7,5", "PU-1;01/01/2019;BREAKDOWN"]


def test_event_log_that_cannot_be_read_stops_beside_many_readings(tmp_path):
    # written with commas under a semicolon header: every row is one field short of four
    events = "unit_id;event_date;event_kind;failure_mode\n" + "".join(
        f"PU-{i:04d},{_day(i + 400)},failure,bearing\n" for i in range(0, 60, 3))
    cfg = fleet(tmp_path, 60, readings_per_unit=30, events_text=events)
    with pytest.raises(DataError, match=r"^events.csv: 20 of 20 rows \(100.0%\) were rejected.*row has 1 fields, "
                                        r"the header has 4"):
        load_export(cfg)


def test_infinity_written_as_a_value_is_called_not_finite(tmp_path):
    rows = ["unit_id,reading_date,running_hours_per_day,vibration_mm_s",
            "PU-0001,2016-03-01,12,inf", "PU-0002,2016-03-01,NaN,2.0", "PU-0003,2016-03-01,12,n/a"]
    cfg = fleet(tmp_path, 4, readings_text="\n".join(rows) + "\n", fleet_keys={"max_bad_share": 1.0})
    q = load_export(cfg).quarantine
    assert q[["line", "value", "reason"]].values.tolist() == [
        [2, "inf", "not a finite number (infinity or NaN written as a value)"],
        [3, "NaN", "not a finite number (infinity or NaN written as a value)"],
        [4, "n/a", "non-numeric covariate"]]


def test_cut_inside_the_last_cell_is_called_truncated(tmp_path):
    # the event date is the last column here: a cut inside it leaves every field but a broken date
    text = "unit_id,event_kind,failure_mode,event_date\n" + "".join(
        f"PU-{i:04d},failure,bearing,{_day(i + 400)}\n" for i in range(0, 30, 3)).rstrip("\n")
    cfg = fleet(tmp_path, 30, events_text=text[:-3], fleet_keys={"max_bad_share": 1.0})  # '2017-03-' is left
    result = load_export(cfg)
    assert result.quarantine["value"].tolist() == [text[-10:-3]]
    assert result.warnings == (
        "events.csv ends without a line break and its last row (line 11) was rejected: the file may be "
        "truncated (a cut transfer). Export or copy it again.",)
    # the same bad date on a row that ends with a line break is an ordinary bad row
    again = fleet(tmp_path, 30, events_text=text[:-3] + "\n", fleet_keys={"max_bad_share": 1.0})
    assert load_export(again).warnings == ()


def test_covariate_with_no_value_anywhere_is_named(tmp_path):
    rows = ["unit_id,reading_date,running_hours_per_day,vibration_mm_s"] + [
        f"PU-{i:04d},2016-06-01,12," for i in range(6)]
    result = load_export(fleet(tmp_path, 6, readings_text="\n".join(rows) + "\n"))
    assert result.warnings == ("covariate vibration_mm_s is empty for every unit: no kept row of the export holds "
                               "a value for it. Check that column in the export, or remove it from fleet.covariates.",)


def test_date_in_another_format_names_the_per_file_setting_and_it_works(tmp_path):
    rows = ["PU-1,13/01/2022,5", "PU-2,01/03/2022,5"]
    events = ["PU-1,02/27/2023,failure", "PU-2,03/02/2023,failure"]
    one = _register_events(tmp_path, rows, events, inp={"date_format": "%d/%m/%Y"})
    q = load_export(one).quarantine
    assert q[["source_file", "line", "value", "reason"]].values.tolist()[0] == [
        "events.csv", 2, "02/27/2023", "unparseable date (not in the format '%d/%m/%Y' set for this file; use "
        'YYYY-MM-DD, or give events its own format under [input]: date_format_by_file = { events = "..." })']
    both = _register_events(tmp_path, rows, events, inp={"date_format": "%d/%m/%Y",
                                                         "date_format_by_file": {"events": "%m/%d/%Y"}})
    result = load_export(both)
    assert result.rows_quarantined == 0
    assert sorted(result.table.frame.loc[result.table.frame["failed"], "exit_date"].dt.strftime("%Y-%m-%d")) == [
        "2023-02-27", "2023-03-02"]
