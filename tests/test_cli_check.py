"""``wearcast check`` run in-process on hand-made broken exports (tests/data/broken):
exit code and the exact message, then the files it left behind."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
from click.testing import CliRunner

from wearcast.cli.check import command

DATA = Path(__file__).parent / "data" / "broken"


def run(tmp_path: Path, toml: str, out: Path | None = None):
    config = tmp_path / "fleet.toml"
    config.write_text(toml, encoding="utf-8")
    out = out if out is not None else tmp_path / "out"
    return CliRunner().invoke(command, [str(config), "--out", str(out)])


def inputs(register: str, events: str, extra: str = "") -> str:
    return f'[input]\nregister = "{DATA / register}"\nevents = "{DATA / events}"\n{extra}'


def test_good_export_prints_summary_and_writes_files(tmp_path):
    result = run(tmp_path, inputs("register_ambiguous.csv", "events_ambiguous.csv", 'date_format = "%d/%m/%Y"\n')
                 + "[fleet]\nas_of = 2022-06-01\n")
    assert result.exit_code == 0, result.stderr
    out = tmp_path / "out"
    assert result.stdout.splitlines() == [
        "units                3",
        "lives                4",  # P-101 failed and was renewed (renewal = "replace")
        "life-table rows      4",
        "failures             1",
        "suspensions          3",
        "delayed entries      0",
        "units in service     3",
        # day counts by hand: P-101 2021-04-03 -> 2022-06-01 = 424, P-102 2021-06-05 -> = 361,
        # P-103 2021-12-11 -> = 172
        "time at risk (days)  957.0",
        "as of                2022-06-01",
        "rows in = kept + quarantined: 4 = 4 + 0",
        "  register_ambiguous.csv (register): 3 read = 3 kept + 0 quarantined",
        "  events_ambiguous.csv (events): 1 read = 1 kept + 0 quarantined",
        # MTBF = 957 days / 1 failure; 90 % bounds 2T / chi2(0.95; 4) and 2T / chi2(0.05; 2) with
        # chi2 quantiles 9.4877 and 0.10259 (standard chi-square table values)
        "fleet MTBF: 957 days = 2.6 years (90% bounds 202 to 18,657 days)",
        # the one failure at 274 days with 2 lives at risk (P-103 left at 172): S drops to 0.5, so
        # B10 = B50 = 274; log(-log) band at 274: 0.5 ** exp(+-1.645 * sqrt(1/2) / ln 2) = 0.024 .. 0.878
        "fleet B10 life: 274 days = 0.8 years (90% bounds 274 to 274 days)",
        "fleet B50 life: 274 days = 0.8 years (90% bounds 274 days to beyond the records)",
        f"quarantine: {out / 'quarantine.csv'}",
        f"life table: {out / 'life_table.csv'}",
        f"life statistics (per group): {out / 'life_statistics.csv'}",
    ]
    stats = pd.read_csv(out / "life_statistics.csv")
    assert stats[["group_by", "group", "failures", "time_at_risk_days", "mtbf_days", "b10_days"]].values.tolist() == [
        ["fleet", "all", 1, 957, 957, 274]]
    table = pd.read_csv(out / "life_table.csv", dtype={"unit_id": str})
    assert table.loc[table["failed"], "exit_age"].tolist() == [274.0]
    assert list(pd.read_csv(out / "quarantine.csv").columns) == [
        "source_file", "line", "column", "value", "reason", "original_row"]


def test_missing_column_exits_65_naming_the_columns(tmp_path):
    result = run(tmp_path, inputs("register_no_install.csv", "events_ok.csv"))
    assert result.exit_code == 65
    assert result.stderr == (
        "error: register_no_install.csv: missing required column(s) 'install_date' (columns.install_date); "
        "found 'unit_id', 'installed_on', 'site'. Rename the columns in the export or map them in the "
        "config's [columns] table.\n")


def test_column_mapping_fixes_the_missing_column(tmp_path):
    result = run(tmp_path, inputs("register_no_install.csv", "events_ok.csv")
                 + '[columns]\ninstall_date = "installed_on"\n[fleet]\nas_of = 2022-06-01\n')
    assert result.exit_code == 0, result.stderr


def test_unknown_config_key_exits_78(tmp_path):
    result = run(tmp_path, inputs("register_no_install.csv", "events_ok.csv") + "[fleet]\nmax_bad = 0.1\n")
    assert result.exit_code == 78
    assert result.stderr == (
        f"error: {tmp_path / 'fleet.toml'}: unknown key 'max_bad' in [fleet]; known keys: as_of, categorical, "
        "covariates, decommission_kinds, failure_kinds, group_by, max_bad_share, no_failures_expected, ranges, "
        "records_start, renewal, "
        "replacement_kinds.\n")


def test_missing_input_file_exits_66(tmp_path):
    result = run(tmp_path, inputs("not_there.csv", "events_ok.csv"))
    assert result.exit_code == 66
    assert result.stderr == (
        f"error: input file {DATA / 'not_there.csv'} does not exist. Check the path in the config's [input] "
        "table (relative paths start from the config file's folder).\n")


def test_too_many_bad_rows_exits_65_and_writes_quarantine(tmp_path):
    result = run(tmp_path, inputs("register_mangled.csv", "events_mangled.csv"))
    quarantine = tmp_path / "out" / "quarantine.csv"
    assert result.exit_code == 65
    assert result.stderr == (
        # both files are 2 of 4 rejected (50 %); the share is per file and the first of the worst is named
        "error: register_mangled.csv: 2 of 4 rows (50.0%) were rejected, above fleet.max_bad_share = 5.0% "
        "(taken per file). Most common reason: unit id in scientific notation (a spreadsheet turned it into a "
        "number); re-export the id column as text (2 rows), first at line 2, column unit_id (value '1.23E+05'). "
        "Fix the export "
        f"(or raise fleet.max_bad_share); rejected rows are listed in {quarantine}.\n"
        f"rejected rows and reasons: {quarantine}\n")
    q = pd.read_csv(quarantine, dtype=str)
    assert q[["source_file", "line", "column", "value"]].values.tolist() == [
        ["events_mangled.csv", "4", "unit_id", "1.23E+05"],
        ["events_mangled.csv", "5", "event_kind", "breakdown"],
        ["register_mangled.csv", "2", "unit_id", "1.23E+05"],
        ["register_mangled.csv", "3", "unit_id", "4.56E+05"],
    ]
    assert q["reason"].str.startswith("unknown event kind").sum() == 1
    assert q["original_row"].iloc[1] == "P-104,2022-07-01,breakdown,"


def test_raising_max_bad_share_lets_the_run_through(tmp_path):
    result = run(tmp_path, inputs("register_mangled.csv", "events_mangled.csv")
                 + "[fleet]\nmax_bad_share = 0.6\nas_of = 2023-01-01\n")
    assert result.exit_code == 0, result.stderr
    assert "rows in = kept + quarantined: 8 = 4 + 4" in result.stdout.splitlines()


def test_ambiguous_dates_exit_65_and_suggest_date_format(tmp_path):
    result = run(tmp_path, inputs("register_ambiguous.csv", "events_ambiguous.csv"))
    assert result.exit_code == 65
    assert result.stderr == (
        "error: register_ambiguous.csv: line 2, column install_date: date '03/04/2021' reads both as "
        "day/month and as month/day, and no date in the export settles which. Set input.date_format in the "
        'config, for example date_format = "%d/%m/%Y" (day first) or "%m/%d/%Y" (month first).\n')


def test_unwritable_output_exits_73(tmp_path):
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    result = run(tmp_path, inputs("register_ambiguous.csv", "events_ambiguous.csv", 'date_format = "%d/%m/%Y"\n'),
                 out=blocker / "out")
    assert result.exit_code == 73
    assert result.stderr == (
        f"error: cannot create output folder {blocker / 'out'}: Not a directory. "
        "Choose a folder you can write to.\n")


def test_help_names_the_command_and_the_caution():
    result = CliRunner().invoke(command, ["--help"])
    assert result.exit_code == 0
    assert "quarantine.csv" in result.output and "Caution:" in result.output


def test_costs_need_both_keys_and_too_few_failures_give_no_age(tmp_path):
    base = inputs("register_ambiguous.csv", "events_ambiguous.csv", 'date_format = "%d/%m/%Y"\n') + \
        "[fleet]\nas_of = 2022-06-01\n"
    half = run(tmp_path, base + "[costs]\nfailure = 5.0\n")
    assert half.exit_code == 78
    assert "[costs] needs both planned_replacement and failure" in half.stderr
    both = run(tmp_path, base + "[costs]\nplanned_replacement = 1.0\nfailure = 5.0\n")
    assert both.exit_code == 0, both.stderr
    # one failure on record: no Weibull fit, so no planned age (and the reason is printed)
    assert ("fleet planned replacement: no age given; no Weibull fit (fewer than two failures, or the fit did "
            "not settle)") in both.stdout.splitlines()
    ages = pd.read_csv(tmp_path / "out" / "replacement_ages.csv")
    assert ages["reading"].tolist() == ["no Weibull fit (fewer than two failures, or the fit did not settle)"]
    # a rerun without [costs] into the same folder leaves no stale replacement ages behind,
    # and check alone never writes (or overwrites) a full run's run_summary.json
    again = run(tmp_path, base)
    assert again.exit_code == 0, again.stderr
    assert not (tmp_path / "out" / "replacement_ages.csv").exists()
    assert not (tmp_path / "out" / "run_summary.json").exists()


def test_failed_rerun_leaves_no_earlier_life_table_beside_the_new_quarantine(tmp_path):
    good = run(tmp_path, inputs("register_ambiguous.csv", "events_ambiguous.csv", 'date_format = "%d/%m/%Y"\n')
               + "[fleet]\nas_of = 2022-06-01\n")
    assert good.exit_code == 0, good.stderr
    out = tmp_path / "out"
    assert (out / "life_table.csv").exists() and (out / "check_summary.json").exists()
    bad = run(tmp_path, inputs("register_mangled.csv", "events_mangled.csv"))
    assert bad.exit_code == 65
    assert sorted(p.name for p in out.iterdir()) == ["quarantine.csv"]
    assert set(pd.read_csv(out / "quarantine.csv")["source_file"]) == {"register_mangled.csv", "events_mangled.csv"}
    # a stop before any row is read (missing column) leaves no earlier quarantine either
    again = run(tmp_path, inputs("register_ambiguous.csv", "events_ambiguous.csv", 'date_format = "%d/%m/%Y"\n')
                + "[fleet]\nas_of = 2022-06-01\n")
    assert again.exit_code == 0
    missing = run(tmp_path, inputs("register_no_install.csv", "events_ok.csv"))
    assert missing.exit_code == 65
    assert list(out.iterdir()) == []


def test_warnings_are_printed_and_kept_in_the_summary(tmp_path):
    import json

    (tmp_path / "register.csv").write_text("unit_id,install_date\nP-1,2021-01-04\nP-2,2021-02-01\n")
    (tmp_path / "events.csv").write_text("unit_id,event_date,event_kind\nP-1,2022-03-01,failure\n")
    (tmp_path / "readings.csv").write_text("unit_id,reading_date,vibration_mm_s\n")
    result = run(tmp_path, '[input]\nregister = "register.csv"\nevents = "events.csv"\nreadings = "readings.csv"\n'
                           '[fleet]\nas_of = 2022-06-01\ncovariates = ["vibration_mm_s"]\n')
    assert result.exit_code == 0, result.stderr
    warning = ("readings.csv has a header but no rows: the reading covariates (vibration_mm_s) are empty for every "
               "unit.")
    assert f"warning: {warning}" in result.stdout.splitlines()
    assert "  readings.csv (readings): 0 read = 0 kept + 0 quarantined" in result.stdout.splitlines()
    summary = json.loads((tmp_path / "out" / "check_summary.json").read_text())
    assert summary["warnings"] == [warning]
