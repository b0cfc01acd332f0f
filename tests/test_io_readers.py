"""Readers: CSV (BOM, delimiter, decimal comma, line numbers), Excel and Parquet round trips,
and the value parsers (dates, flags, ids, numbers)."""

from __future__ import annotations

import pandas as pd
import pytest

from wearcast.exceptions import DataError, InputMissingError
from wearcast.io import _parse
from wearcast.io._readers import read_export_file, sniff_delimiter

TABLE = pd.DataFrame({
    "unit_id": ["00042", "00107", "A-9"],
    "install_date": ["2021-03-01", "2020-12-31", "2019-07-15"],
    "power_kw": ["5.5", "7", ""],
})


def _cells(raw):
    return raw.frame[list(raw.columns)].reset_index(drop=True)


def test_csv_with_bom_semicolons_and_decimal_comma(tmp_path):
    path = tmp_path / "register.csv"
    text = "unit_id;install_date;power_kw\r\n00042;2021-03-01;5,5\r\n\r\n00107;2020-12-31;7\r\n"
    path.write_bytes(b"\xef\xbb\xbf" + text.encode("utf-8"))
    raw = read_export_file(path)
    assert raw.columns == ("unit_id", "install_date", "power_kw")  # BOM not glued to the first name
    assert raw.frame["unit_id"].tolist() == ["00042", "00107"]  # leading zeros kept
    assert raw.frame["_line"].tolist() == [2, 4]  # physical lines, header = 1, blank line skipped
    values, bad = _parse.parse_numbers(raw.frame["power_kw"], decimal=",")
    assert values.tolist() == [5.5, 7.0] and not bad.any()


def test_csv_line_numbers_follow_multiline_quoted_cells(tmp_path):
    path = tmp_path / "events.csv"
    path.write_text('unit_id,note\n1,"two\nlines"\n2,x\n3\n', encoding="utf-8")
    raw = read_export_file(path)
    assert raw.frame["_line"].tolist() == [2, 4, 5]
    assert raw.frame["_malformed"].tolist() == ["", "", "row has 1 fields, the header has 2"]


def test_sniffed_delimiters():
    assert sniff_delimiter("a;b;c\n1;2;3\n") == ";"
    assert sniff_delimiter("a\tb\n1\t2\n") == "\t"
    assert sniff_delimiter("a,b\n1,2\n") == ","


def test_excel_round_trip_keeps_text_and_sheet_rows(tmp_path):
    path = tmp_path / "register.xlsx"
    with pd.ExcelWriter(path, engine="openpyxl") as writer:
        pd.DataFrame({"x": ["other"]}).to_excel(writer, sheet_name="notes", index=False)
        TABLE.to_excel(writer, sheet_name="units", index=False)
    raw = read_export_file(path, sheet="units")
    pd.testing.assert_frame_equal(_cells(raw), TABLE)
    assert raw.frame["_line"].tolist() == [2, 3, 4]
    with pytest.raises(DataError, match="input.sheet"):
        read_export_file(path, sheet="missing")


def test_parquet_round_trip(tmp_path):
    path = tmp_path / "register.parquet"
    typed = TABLE.assign(install_date=pd.to_datetime(TABLE["install_date"]))
    typed.to_parquet(path)
    raw = read_export_file(path)
    pd.testing.assert_frame_equal(_cells(raw), TABLE)
    assert raw.frame["_line"].tolist() == [1, 2, 3]


def test_missing_file_and_bad_header(tmp_path):
    with pytest.raises(InputMissingError, match="does not exist"):
        read_export_file(tmp_path / "nope.csv")
    (tmp_path / "dup.csv").write_text("unit_id,unit_id\n1,2\n")
    with pytest.raises(DataError, match="appears twice"):
        read_export_file(tmp_path / "dup.csv")


def test_flags_accept_only_0_1_true_false():
    values, bad = _parse.parse_flags(pd.Series(["1", "0", "TRUE", "false", "yes", "no", "", "1.0"]))
    assert bad.tolist() == [False, False, False, False, True, True, True, True]
    assert values[:4].tolist() == [True, False, True, False]


def test_mangled_and_missing_ids():
    reasons = _parse.id_problems(pd.Series(["1.23E+05", "4,5e3", "00042", " ", "E-101"]))
    assert [r.split(" (")[0] for r in reasons] == ["unit id in scientific notation", "unit id in scientific notation",
                                                    "", "missing unit id", ""]


def _sample(values):
    return _parse.DateSample("register.csv", "install_date", pd.Series(values), pd.Series(range(2, 2 + len(values))))


def test_day_month_order_is_settled_by_values_or_refused():
    assert _parse.day_first_from_values([_sample(["03/04/2021", "25/04/2021"])]) is True
    assert _parse.day_first_from_values([_sample(["03/04/2021", "04/25/2021"])]) is False
    assert _parse.day_first_from_values([_sample(["2021-04-03"])]) is None
    with pytest.raises(DataError, match="no date in the export settles which. Set input.date_format"):
        _parse.day_first_from_values([_sample(["03/04/2021", "05/06/2021"])])
    with pytest.raises(DataError, match="mixes date orders"):
        _parse.day_first_from_values([_sample(["25/04/2021", "04/25/2021"])])


def test_dates_parse_iso_day_first_and_explicit_format():
    parsed, bad = _parse.parse_dates(pd.Series(["2021-02-28", "2021-02-30", "", "28.02.2021 13:30", "soon"]),
                                     day_first=True)
    assert bad.tolist() == [False, True, False, False, True]
    assert parsed[3] == pd.Timestamp("2021-02-28")  # the time of day is dropped: a calendar date
    parsed, _ = _parse.parse_dates(pd.Series(["28/02/2021 13:30"]), date_format="%d/%m/%Y %H:%M")
    assert parsed[0] == pd.Timestamp("2021-02-28")
    parsed, bad = _parse.parse_dates(pd.Series(["02/28/21"]), date_format="%m/%d/%y")
    assert parsed[0] == pd.Timestamp("2021-02-28") and not bad.any()


def test_numbers_reject_text_and_ambiguous_separators():
    values, bad = _parse.parse_numbers(pd.Series(["1.5", "", "high", "inf"]))
    assert bad.tolist() == [False, False, True, True]
    _, bad = _parse.parse_numbers(pd.Series(["1.234,5"]), decimal=",")
    assert bad.tolist() == [True]


def test_excel_register_and_parquet_log_load_end_to_end(tmp_path):
    from wearcast.config import config_from_dict
    from wearcast.io import load_export

    pd.DataFrame({"unit_id": ["00042", "00107"],
                  "install_date": pd.to_datetime(["2021-03-01", "2021-04-01"])}).to_excel(
        tmp_path / "register.xlsx", index=False)  # real Excel date cells
    pd.DataFrame({"unit_id": ["00042"], "event_date": pd.to_datetime(["2021-05-01"]),
                  "event_kind": ["failure"]}).to_parquet(tmp_path / "events.parquet")
    cfg = config_from_dict({"input": {"register": "register.xlsx", "events": "events.parquet"},
                            "fleet": {"as_of": "2021-06-01"}})
    cfg = cfg.__class__(**{**cfg.__dict__, "base_dir": tmp_path})
    f = load_export(cfg).table.frame
    assert f[["unit_id", "life", "entry_age", "exit_age", "failed"]].values.tolist() == [
        ["00042", 1, 0.0, 61.0, True], ["00042", 2, 0.0, 31.0, False], ["00107", 1, 0.0, 61.0, False]]


# -- the C-parser path for quote-free CSV against the csv-module path ------------------

from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from wearcast.io import _readers  # noqa: E402

_CELLS = st.sampled_from(["", " ", "a", "00042", "2021-03-01", "5.5", "x y", "\u00a0", "é", "\t"])


@st.composite
def _csv_texts(draw):
    sep = draw(st.sampled_from([",", ";", "\t", "|"]))
    end = draw(st.sampled_from(["\n", "\r\n"]))
    header = draw(st.sampled_from([["unit_id", "b", "c"], ["unit_id"], ["  unit_id ", "b"]]))
    lines = [""] * draw(st.integers(0, 2)) + [sep.join(header)]
    for _ in range(draw(st.integers(0, 8))):
        lines.append(sep.join(draw(st.lists(_CELLS, min_size=0, max_size=5))))
    return sep, end.join(lines) + draw(st.sampled_from(["", end, end + end]))


def _read_both(path, sep, compact):
    """(fast path result, csv-module result); each a RawTable or the DataError message."""
    def attempt():
        try:
            return read_export_file(path, delimiter=sep, compact=compact)
        except DataError as exc:
            return str(exc)

    fast = attempt()
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(_readers, "_read_csv_fast", lambda *a, **k: None)
        slow = attempt()
    return fast, slow


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(_csv_texts(), st.booleans())
def test_quote_free_csv_reads_the_same_on_both_paths(tmp_path_factory, case, compact):
    """Cells, line numbers, blank-line skipping and field-count problems agree with the
    csv module (Python's reference reader), also with Unicode spaces and CRLF."""
    sep, text = case
    path = tmp_path_factory.mktemp("csv") / "export.csv"
    path.write_bytes(text.encode("utf-8"))
    fast, slow = _read_both(path, sep, compact)
    if isinstance(slow, str):
        assert fast == slow
        return
    assert fast.columns == slow.columns and fast.delimiter == slow.delimiter == sep
    cols = [*fast.columns, "_source", "_line", "_malformed"]
    pd.testing.assert_frame_equal(fast.frame[cols].astype(object), slow.frame[cols].astype(object))


def test_fast_path_is_taken_only_without_quotes(tmp_path):
    plain = b"unit_id,b\n1,2\n"
    assert _readers._read_csv_fast(tmp_path / "x.csv", plain, ",", False) is not None
    assert _readers._read_csv_fast(tmp_path / "x.csv", b'unit_id,b\n1,"2,3"\n', ",", False) is None
    assert _readers._read_csv_fast(tmp_path / "x.csv", b"unit_id,b\r1,2\r", ",", False) is None


def test_original_row_of_a_rejected_quoted_row_is_rebuilt_as_written(tmp_path):
    """Only rejected rows get their text back, joined the way the csv module writes them."""
    from wearcast.config import config_from_dict
    from wearcast.io import load_export

    (tmp_path / "register.csv").write_text('unit_id,install_date,site\nP-1,2020-01-01,"North, upper"\n'
                                           'P-2,2020-13-01,"South ""B"""\n', encoding="utf-8")
    (tmp_path / "events.csv").write_text("unit_id,event_date,event_kind\n", encoding="utf-8")
    cfg = config_from_dict({"input": {"register": "register.csv", "events": "events.csv"},
                            "fleet": {"as_of": "2021-01-01", "max_bad_share": 1.0}})
    cfg = cfg.__class__(**{**cfg.__dict__, "base_dir": tmp_path})
    q = load_export(cfg).quarantine
    assert q[["line", "column", "original_row"]].values.tolist() == [[3, "install_date", 'P-2,2020-13-01,"South ""B"""']]


def test_parsers_give_the_same_cell_by_cell_on_text_and_categorical_columns():
    """Parsers run once per distinct text; the result must equal parsing each cell alone."""
    texts = ["2021-02-28", "", "2021-02-30", "2021-02-28", "28.02.2021 13:30", "x", "1.5", "1,5", "1e3", " 7 "]
    checks = [lambda v: _parse.parse_dates(v, day_first=True), _parse.parse_numbers,
              lambda v: _parse.parse_numbers(v, decimal=","), _parse.parse_flags]
    for parse in checks:
        whole, whole_bad = parse(pd.Series(texts))
        cats, cats_bad = parse(pd.Series(texts, dtype="category"))
        pd.testing.assert_series_equal(whole, cats)
        assert whole_bad.tolist() == cats_bad.tolist()
        for i, text in enumerate(texts):
            one, one_bad = parse(pd.Series([text]))
            assert one_bad[0] == whole_bad[i]
            assert (pd.isna(one[0]) and pd.isna(whole[i])) or one[0] == whole[i]
    reasons = _parse.id_problems(pd.Series(["1.2E+04", "", "A-1", "1.2E+04"], dtype="category"))
    assert [r.split(" (")[0] for r in reasons] == ["unit id in scientific notation", "missing unit id", "",
                                                  "unit id in scientific notation"]
