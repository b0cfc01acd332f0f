"""Read CSV / Excel / Parquet exports as text, keeping where each row came from.

Every cell is read as text (``str``; an empty cell is ``""``) so ids keep their
leading zeros and nothing is guessed before validation. Each returned frame has
three bookkeeping columns besides the export's own:

* ``_source``: the file name (no folder), for messages and the quarantine file;
* ``_line``: CSV physical line number of the row's first line (header = line 1),
  Excel sheet row number, or Parquet 1-based row number (no header line);
* ``_raw``: the row's cells joined by the file's delimiter (the quarantine's
  ``original_row``).

Rows whose field count differs from the header's carry a reason in
``_malformed`` (``""`` otherwise) so validation can quarantine them.
"""

from __future__ import annotations

import csv
import io
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from wearcast.exceptions import DataError, InputMissingError

BOOKKEEPING = ("_source", "_line", "_raw", "_malformed")
_DELIMITERS = ",;\t|"


@dataclass(frozen=True)
class RawTable:
    """One export file read as text. ``frame`` holds the columns plus BOOKKEEPING."""

    path: Path
    frame: pd.DataFrame
    columns: tuple[str, ...]  # the export's own column names, in file order

    @property
    def name(self) -> str:
        return self.path.name


def read_export_file(
    path: Path,
    *,
    delimiter: str | None = None,
    encoding: str = "utf-8",
    sheet: str | None = None,
) -> RawTable:
    """Read one export file by its suffix (.csv/.txt, .xlsx/.xlsm, .parquet).

    Raises :class:`InputMissingError` when the file is missing or unreadable and
    :class:`DataError` when its header is unusable (empty, duplicate names).
    """
    path = Path(path)
    if not path.is_file():
        raise InputMissingError(
            f"input file {path} does not exist. Check the path in the config's [input] table "
            "(relative paths start from the config file's folder)."
        )
    suffix = path.suffix.lower()
    if suffix in (".xlsx", ".xlsm"):
        return _read_excel(path, sheet)
    if suffix in (".parquet", ".pq"):
        return _read_parquet(path)
    return _read_csv(path, delimiter, encoding)


def _read_csv(path: Path, delimiter: str | None, encoding: str) -> RawTable:
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise InputMissingError(f"cannot open {path}: {exc.strerror}.") from exc
    codec = "utf-8-sig" if encoding.lower().replace("_", "-") in ("utf-8", "utf8") else encoding
    try:
        text = data.decode(codec)
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise DataError(
            f"{path.name}: line {line}: bytes are not valid {encoding}. Save the export as UTF-8 "
            "or set input.encoding (for example encoding = \"cp1252\")."
        ) from exc
    text = text.lstrip("\ufeff")  # a BOM left by a non-UTF-8 codec
    sep = delimiter or sniff_delimiter(text)
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=sep)
    header: list[str] | None = None
    records, lines, raws, malformed = [], [], [], []
    previous_end = 0
    for fields in reader:
        start = previous_end + 1
        previous_end = reader.line_num
        if not fields or all(f.strip() == "" for f in fields):
            continue  # blank lines are not rows
        if header is None:
            header = [f.strip() for f in fields]
            header_line = start
            continue
        problem = ""
        if len(fields) != len(header):
            problem = f"row has {len(fields)} fields, the header has {len(header)}"
            fields = (fields + [""] * len(header))[: len(header)]
        records.append(fields)
        lines.append(start)
        raws.append(_join(fields, sep))
        malformed.append(problem)
    if header is None:
        raise DataError(f"{path.name}: the file is empty; expected a header line with column names.")
    _check_header(path, header, header_line)
    frame = pd.DataFrame(records, columns=header, dtype=object)
    return _finish(path, frame, header, lines, raws, malformed)


def sniff_delimiter(text: str) -> str:
    """Pick the delimiter among , ; tab | from the first lines (default ``,``)."""
    sample = "\n".join(text.splitlines()[:20])
    try:
        return csv.Sniffer().sniff(sample, delimiters=_DELIMITERS).delimiter
    except csv.Error:
        first = sample.splitlines()[0] if sample else ""
        counts = {d: first.count(d) for d in _DELIMITERS}
        best = max(counts, key=counts.get)
        return best if counts[best] else ","


def _read_excel(path: Path, sheet: str | None) -> RawTable:
    try:
        grid = pd.read_excel(path, sheet_name=sheet if sheet is not None else 0, header=None,
                             dtype=str, engine="openpyxl", keep_default_na=False)
    except ValueError as exc:  # unknown sheet name
        raise DataError(f"{path.name}: {exc}. Set input.sheet to one of the workbook's sheet names.") from exc
    except OSError as exc:
        raise InputMissingError(f"cannot open {path}: {exc}.") from exc
    grid = grid.fillna("").astype(str)
    blank = (grid.apply(lambda col: col.str.strip()) == "").all(axis=1).to_numpy()
    rows = [i for i in range(len(grid)) if not blank[i]]
    if not rows:
        raise DataError(f"{path.name}: the sheet is empty; expected a header row with column names.")
    header = [str(v).strip() for v in grid.iloc[rows[0]].tolist()]
    while header and header[-1] == "":
        header.pop()
    _check_header(path, header, rows[0] + 1)
    body = grid.iloc[rows[1:], : len(header)]
    frame = pd.DataFrame(body.to_numpy(), columns=header, dtype=object)
    lines = [i + 1 for i in rows[1:]]  # sheet rows are 1-based
    raws = [_join(r, ",") for r in frame.itertuples(index=False)]
    return _finish(path, frame, header, lines, raws, [""] * len(frame))


def _read_parquet(path: Path) -> RawTable:
    try:
        table = pd.read_parquet(path)
    except OSError as exc:
        raise InputMissingError(f"cannot open {path}: {exc}.") from exc
    header = [str(c) for c in table.columns]
    _check_header(path, header, 0)
    cols = {}
    for name, col in zip(header, table.columns):
        values = table[col]
        if pd.api.types.is_datetime64_any_dtype(values):
            text = values.dt.strftime("%Y-%m-%d %H:%M:%S").str.replace(" 00:00:00", "", regex=False)
        else:
            text = values.astype(object).map(lambda v: "" if v is None or (isinstance(v, float) and v != v) else str(v))
        cols[name] = text.fillna("").astype(str).to_numpy()
    frame = pd.DataFrame(cols, columns=header, dtype=object)
    raws = [_join(r, ",") for r in frame.itertuples(index=False)]
    return _finish(path, frame, header, list(range(1, len(frame) + 1)), raws, [""] * len(frame))


def _check_header(path: Path, header: list[str], line: int) -> None:
    where = f"line {line}" if line else "header"
    empty = [i + 1 for i, h in enumerate(header) if h == ""]
    if empty:
        raise DataError(f"{path.name}: {where}: column {empty[0]} has no name. Give every column a header.")
    seen: set[str] = set()
    for h in header:
        if h in seen:
            raise DataError(f"{path.name}: {where}: column name {h!r} appears twice. Rename one of them.")
        if h in BOOKKEEPING:
            raise DataError(f"{path.name}: {where}: column name {h!r} is reserved. Rename it.")
        seen.add(h)


def _finish(path, frame, header, lines, raws, malformed) -> RawTable:
    frame = frame.fillna("").astype(str) if len(frame) else frame.astype(object)
    frame["_source"] = path.name
    frame["_line"] = pd.Series(lines, dtype="int64", index=frame.index)
    frame["_raw"] = pd.Series(raws, dtype=object, index=frame.index)
    frame["_malformed"] = pd.Series(malformed, dtype=object, index=frame.index)
    return RawTable(path=path, frame=frame.reset_index(drop=True), columns=tuple(header))


def _join(fields, sep: str) -> str:
    out = io.StringIO()
    csv.writer(out, delimiter=sep, lineterminator="").writerow(list(fields))
    return out.getvalue()
