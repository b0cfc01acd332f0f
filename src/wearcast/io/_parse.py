"""Turn text cells into typed values; every function reports which cells failed.

Pure functions on pandas Series of ``str`` (empty cell = ``""``). Each returns
the parsed values plus a boolean mask of cells that could not be parsed, so the
caller can quarantine exactly those rows.

Every parser works cell by cell, so each runs once per distinct text (the
categories of a categorical column, or ``pandas.factorize``) and the results
are spread back over the rows: exports repeat the same dates, kinds and
readings many times.

Dates without ``input.date_format`` accept ISO ``YYYY-MM-DD`` (or ``YYYY/MM/DD``,
optionally followed by a time) and ``a/b/YYYY`` (``/``, ``.`` or ``-``). The
order of ``a`` and ``b`` is settled once for all date columns of a run by
:func:`day_first_from_values`: a value with ``a > 12`` proves day/month, one
with ``b > 12`` proves month/day; neither (every value reads both ways) or
both (mixed) is an error that asks for ``input.date_format``.
"""

from __future__ import annotations

import calendar
import re
from dataclasses import dataclass

import numpy as np
import pandas as pd

from wearcast.exceptions import DataError

# A time may end in a UTC offset (``Z``, ``+02:00``, ``-0500``): the date is read as written
# (the calendar date where the record was made), the offset is not applied, and the time of
# day is dropped (every date is a calendar date, as in the register).
_OFFSET = r"(?:\s*(?:Z|[+-]\d{2}(?::?\d{2})?))?"
_ISO = re.compile(r"^(\d{4})[-/](\d{1,2})[-/](\d{1,2})(?:[ T](\d{1,2}):(\d{2})(?::(\d{2})(?:\.\d+)?)?"
                  + _OFFSET + r")?$")
_NUMERIC_DATE = re.compile(r"^(\d{1,2})([/.\-])(\d{1,2})\2(\d{4})(?:[ T](\d{1,2}):(\d{2})(?::(\d{2})(?:\.\d+)?)?"
                           + _OFFSET + r")?$")
#: A time (and offset) after a date, for dates read with ``input.date_format``.
_TIME_TAIL = re.compile(r"[ T]\d{1,2}:\d{2}(?::\d{2}(?:\.\d+)?)?" + _OFFSET + r"$")
_SCIENTIFIC = re.compile(r"^[+-]?\d+(?:[.,]\d+)?[eE][+-]?\d+$")
_FLAGS = {"0": False, "1": True, "true": True, "false": False}

#: Multiply a number in this unit by the factor to get days. Months and years
#: use the mean Gregorian lengths (365.25 / 12 and 365.25 days; common practice).
AGE_UNIT_DAYS = {"days": 1.0, "hours": 1.0 / 24.0, "weeks": 7.0, "months": 365.25 / 12.0, "years": 365.25}


def distinct(values: pd.Series) -> tuple[np.ndarray, pd.Series]:
    """``(codes, uniques)`` with ``values[i] == uniques[codes[i]]``; uniques is an object Series."""
    if isinstance(values.dtype, pd.CategoricalDtype):
        codes = values.cat.codes.to_numpy()
        cats = values.cat.categories.to_numpy(dtype=object)
        if (codes < 0).any():  # NaN cells get their own slot
            codes = np.where(codes < 0, len(cats), codes)
            cats = np.append(cats, np.array([np.nan], dtype=object))
        return codes, pd.Series(cats, dtype=object)
    codes, uniques = pd.factorize(values.to_numpy(dtype=object), use_na_sentinel=False)
    return codes, pd.Series(np.asarray(uniques, dtype=object), dtype=object)


def _spread(result: pd.Series, codes: np.ndarray, index) -> pd.Series:
    return pd.Series(result.to_numpy()[codes], index=index, dtype=result.dtype)


def map_text(values: pd.Series, fn) -> pd.Series:
    """Apply ``fn`` (Series of text -> Series of text) once per distinct value;
    the result keeps a categorical column categorical (else object)."""
    codes, uniques = distinct(values)
    mapped = fn(uniques).to_numpy(dtype=object)
    if isinstance(values.dtype, pd.CategoricalDtype) and not pd.isna(mapped).any():
        new_codes, new_uniques = pd.factorize(mapped, use_na_sentinel=False)
        return pd.Series(pd.Categorical.from_codes(new_codes[codes], categories=new_uniques),
                         index=values.index)
    return pd.Series(mapped[codes], index=values.index, dtype=object)


def parse_numbers(values: pd.Series, decimal: str = ".") -> tuple[pd.Series, np.ndarray]:
    """Numbers from text. Empty cells become NaN (not bad); returns (float64, bad mask).

    With ``decimal=","`` a comma is the decimal mark and a value holding both
    ``,`` and ``.`` is rejected (thousands separators are not guessed).
    """
    codes, uniques = distinct(values)
    numbers, bad = _parse_numbers(uniques, decimal)
    return _spread(numbers, codes, values.index), bad[codes]


def _parse_numbers(values: pd.Series, decimal: str) -> tuple[pd.Series, np.ndarray]:
    text = values.astype(str).str.strip()
    if decimal == ",":
        both = text.str.contains(",", regex=False) & text.str.contains(".", regex=False)
        text = text.str.replace(",", ".", regex=False).where(~both, "not-a-number")
    numbers = pd.to_numeric(text.where(text != "", None), errors="coerce").astype(float)
    finite = np.isfinite(numbers.to_numpy())
    bad = (text != "").to_numpy() & ~finite
    numbers = numbers.where(finite, np.nan)
    return numbers, bad


def parse_flags(values: pd.Series) -> tuple[pd.Series, np.ndarray]:
    """Failed flags: exactly 0/1/true/false (any case). Returns (bool, bad mask)."""
    codes, uniques = distinct(values)
    flags, bad = _parse_flags(uniques)
    return _spread(flags, codes, values.index), bad[codes]


def _parse_flags(values: pd.Series) -> tuple[pd.Series, np.ndarray]:
    key = values.astype(str).str.strip().str.lower()
    bad = ~key.isin(list(_FLAGS)).to_numpy()
    return key.map(lambda k: _FLAGS.get(k, False)).astype(bool), bad


def id_problems(values: pd.Series) -> pd.Series:
    """A reason per id cell ("" when fine): empty ids and spreadsheet-mangled ids."""
    codes, uniques = distinct(values)
    return _spread(_id_problems(uniques), codes, values.index)


def _id_problems(values: pd.Series) -> pd.Series:
    text = values.astype(str).str.strip()
    reasons = pd.Series("", index=values.index, dtype=object)
    reasons[text == ""] = "missing unit id"
    reasons[text.str.match(_SCIENTIFIC)] = (
        "unit id in scientific notation (a spreadsheet turned it into a number); "
        "re-export the id column as text"
    )
    return reasons


@dataclass(frozen=True)
class DateSample:
    """One date column of one file, for the day/month decision."""

    source: str
    column: str
    values: pd.Series  # text cells
    lines: pd.Series  # line numbers, aligned with values
    role: str = ""  # the [input] key naming the file (register, events, ...), for per-file advice


def day_first_from_values(samples: list[DateSample]) -> bool | None:
    """Decide day/month order from every ``a/b/YYYY`` value in the run.

    Returns True (day first), False (month first) or None (no such values).
    Raises :class:`DataError` when the values read both ways and none settles
    it, or when some prove day/month and others month/day.
    """
    proof_day, proof_month, undecided = None, None, None
    for s in samples:
        codes, uniques = distinct(s.values)
        # first row of each distinct value: the earliest row of a kind is the
        # first row of the distinct value with the earliest first row
        firsts = pd.Series(codes).drop_duplicates()  # in order of first appearance
        rows = firsts.index.to_numpy()
        texts = uniques.iloc[firsts.to_numpy()].reset_index(drop=True)
        matches = texts.astype(str).str.strip().str.extract(_NUMERIC_DATE)
        if matches.empty:
            continue
        ok = matches[0].notna().to_numpy()
        if not ok.any():
            continue
        a = pd.to_numeric(matches[0], errors="coerce").to_numpy()
        b = pd.to_numeric(matches[2], errors="coerce").to_numpy()
        for mask, kind in (((a > 12) & (b <= 12) & ok, "day"), ((b > 12) & (a <= 12) & ok, "month"),
                           ((a <= 12) & (b <= 12) & ok, "both")):
            if mask.any():
                i = int(rows[int(np.flatnonzero(mask)[0])])
                where = (s.source, int(s.lines.iloc[i]), s.column, str(s.values.iloc[i]).strip(), s.role)
                if kind == "day" and proof_day is None:
                    proof_day = where
                elif kind == "month" and proof_month is None:
                    proof_month = where
                elif kind == "both" and undecided is None:
                    undecided = where
    if proof_day and proof_month:
        d, m = proof_day, proof_month
        if d[0] != m[0] and d[4] and m[4]:  # two files, two orders: each file can be described
            fix = (f"Set the order per file under [input]: date_format_by_file = {{ {d[4]} = \"%d/%m/%Y\", "
                   f"{m[4]} = \"%m/%d/%Y\" }}.")
        else:
            fix = ("Re-export with one date format and set input.date_format "
                   "(for example date_format = \"%d/%m/%Y\").")
        raise DataError(
            f"{d[0]}: line {d[1]}, column {d[2]}: date {d[3]!r} can only be day/month, but "
            f"{m[0]} line {m[1]}, column {m[2]} has {m[3]!r}, which can only be month/day: the export mixes "
            f"date orders. {fix}"
        )
    if proof_day:
        return True
    if proof_month:
        return False
    if undecided:
        u = undecided
        raise DataError(
            f"{u[0]}: line {u[1]}, column {u[2]}: date {u[3]!r} reads both as day/month and as "
            "month/day, and no date in the export settles which. Set input.date_format in the "
            "config, for example date_format = \"%d/%m/%Y\" (day first) or \"%m/%d/%Y\" (month first)."
        )
    return None


def parse_dates(values: pd.Series, *, date_format: str | None = None,
                day_first: bool | None = None) -> tuple[pd.Series, np.ndarray]:
    """Dates from text; empty cells are NaT (not bad). Returns (datetime64[ns], bad mask).

    Every date is a calendar date: a time of day (however the format writes it) is dropped.
    """
    codes, uniques = distinct(values)
    dates, bad = _parse_dates(uniques, date_format, day_first)
    dates = dates.dt.normalize()
    return _spread(dates, codes, values.index), bad[codes]


def _parse_dates(values: pd.Series, date_format: str | None, day_first: bool | None) -> tuple[pd.Series, np.ndarray]:
    text = values.astype(str).str.strip()
    empty = (text == "").to_numpy()
    if date_format is not None:
        parsed = pd.to_datetime(text.where(~empty, None), format=date_format, errors="coerce")
        miss = parsed.isna().to_numpy() & ~empty
        if miss.any():  # the same date followed by a time (and offset), as many exports write it
            bare = text[miss].str.replace(_TIME_TAIL, "", regex=True)
            parsed[miss] = pd.to_datetime(bare, format=date_format, errors="coerce")
            miss = parsed.isna().to_numpy() & ~empty
        if miss.any():  # ISO dates are unambiguous: a file of a mixed export may use them
            parsed[miss] = _parse_free(text[miss], None, iso_only=True)
        return parsed, parsed.isna().to_numpy() & ~empty
    parsed = _parse_free(text, day_first)
    return parsed, parsed.isna().to_numpy() & ~empty


def _parse_free(text: pd.Series, day_first: bool | None, iso_only: bool = False) -> pd.Series:
    """ISO and ``a/b/YYYY`` dates (NaT where neither fits or the date does not exist)."""
    iso = text.str.extract(_ISO)
    num = text.str.extract(_NUMERIC_DATE)
    if iso_only:
        num[:] = np.nan
    year = pd.to_numeric(iso[0], errors="coerce").fillna(pd.to_numeric(num[3], errors="coerce"))
    if day_first is None or day_first:
        day_part, month_part = num[0], num[2]
    else:
        day_part, month_part = num[2], num[0]
    month = pd.to_numeric(iso[1], errors="coerce").fillna(pd.to_numeric(month_part, errors="coerce"))
    day = pd.to_numeric(iso[2], errors="coerce").fillna(pd.to_numeric(day_part, errors="coerce"))
    # A time of day is dropped: registers write dates only, so an event at 23:30 on a unit's
    # decommission date would otherwise read as after it, and ages stay whole days.
    parts = pd.DataFrame({"year": year, "month": month, "day": day})
    ok = parts[["year", "month", "day"]].notna().all(axis=1)
    parsed = pd.Series(pd.NaT, index=text.index, dtype="datetime64[ns]")
    if ok.any():
        parsed[ok] = pd.to_datetime(parts[ok].astype("int64"), errors="coerce")
    return parsed


def _is_date(y: int, m: int, d: int) -> bool:
    return 1 <= m <= 12 and 1 <= d <= calendar.monthrange(y, m)[1]


def not_a_date_reason(text: str, date_format: str | None, day_first: bool | None) -> str:
    """Why a cell written in a date's form is not a date (``""`` when it is not in a date's form).

    ``2023-02-29`` has the form of a date but February 2023 has 28 days; saying
    "use YYYY-MM-DD" would send the user to fix the wrong thing.
    """
    text = str(text).strip()
    if date_format and "%d" in date_format and "%m" in date_format:
        day_first = date_format.index("%d") < date_format.index("%m")
    iso, num = _ISO.match(text), _NUMERIC_DATE.match(text)
    if iso:
        y, m, d = int(iso[1]), int(iso[2]), int(iso[3])
    elif num:
        a, b, y = int(num[1]), int(num[3]), int(num[4])
        d, m = (b, a) if day_first is False else (a, b)
        if not _is_date(y, m, d) and _is_date(y, d, m):
            return ""  # a date in the other order: the format, not the calendar, is the problem
    else:
        return ""
    if not 1 <= m <= 12:
        return f"not a calendar date: there is no month {m}"
    days = calendar.monthrange(y, m)[1]
    if not 1 <= d <= days:
        return f"not a calendar date: {calendar.month_name[m]} {y} has {days} days"
    return ""
