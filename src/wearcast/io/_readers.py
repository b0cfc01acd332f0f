"""Read CSV / Excel / Parquet exports as text, keeping where each row came from.

Every cell is read as text (``str``; an empty cell is ``""``) so ids keep their
leading zeros and nothing is guessed before validation. Each returned frame has
three bookkeeping columns besides the export's own:

* ``_source``: the file name (no folder), for messages and the quarantine file;
* ``_line``: CSV physical line number of the row's first line (header = line 1),
  Excel sheet row number, or Parquet 1-based row number (no header line);
The quarantine's ``original_row`` is rebuilt from the cells of rejected rows
only (:func:`join_fields` with ``RawTable.delimiter``), so no text is kept per row.
``_raw`` stays a reserved column name.

With ``compact=True`` the export's columns are pandas categoricals of ``str``
(one code per cell), which keeps a million-unit export within memory; CSV files
without quote characters are then split by pandas' C parser, with line numbers,
blank lines and field counts worked out on the raw bytes with numpy.

Rows whose field count differs from the header's carry a reason in
``_malformed`` (``""`` otherwise) so validation can quarantine them.
"""

from __future__ import annotations

import csv
import dataclasses
import io
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from wearcast.exceptions import ConfigError, DataError, InputMissingError

BOOKKEEPING = ("_source", "_line", "_raw", "_malformed")
_DELIMITERS = ",;\t|"


@dataclass(frozen=True)
class RawTable:
    """One export file read as text. ``frame`` holds the columns plus BOOKKEEPING."""

    path: Path
    frame: pd.DataFrame
    columns: tuple[str, ...]  # the export's own column names, in file order
    delimiter: str = ","  # joins a row's cells into the quarantine's original_row
    truncated: str = ""  # a sentence when the file ends in the middle of a row (a cut transfer)
    ends_open: bool = False  # no line break after the last row (CSV)

    @property
    def name(self) -> str:
        return self.path.name


def read_export_file(
    path: Path,
    *,
    delimiter: str | None = None,
    encoding: str = "utf-8",
    sheet: str | None = None,
    compact: bool = False,
    role: str | None = None,
) -> RawTable:
    """Read one export file by its suffix (.csv/.txt, .xlsx/.xlsm, .parquet).

    Raises :class:`InputMissingError` when the file is missing or unreadable and
    :class:`DataError` when its header is unusable (empty, duplicate names).
    ``compact``: export columns as categoricals of ``str`` (same cells, less memory).
    ``role``: the config's [input] key naming the file, so an encoding hint can name
    the per-file setting.
    """
    path = Path(path)
    if not path.is_file():
        raise InputMissingError(
            f"input file {path} does not exist. Check the path in the config's [input] table "
            "(relative paths start from the config file's folder)."
        )
    suffix = path.suffix.lower()
    if suffix in (".xlsx", ".xlsm"):
        raw = _read_excel(path, sheet)
    elif suffix in (".parquet", ".pq"):
        raw = _read_parquet(path)
    else:
        raw = _read_csv(path, delimiter, encoding, compact, role)
    return _compacted(raw) if compact else raw


def _compacted(raw: RawTable) -> RawTable:
    frame = raw.frame
    for c in (*raw.columns, "_source", "_malformed"):
        if not isinstance(frame[c].dtype, pd.CategoricalDtype):
            frame[c] = frame[c].astype("category")
    return raw


_UTF16_BOMS = (b"\xff\xfe", b"\xfe\xff")


def _read_csv(path: Path, delimiter: str | None, encoding: str, compact: bool = False,
              role: str | None = None) -> RawTable:
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise InputMissingError(f"cannot open {path}: {exc.strerror}.") from exc
    utf8 = encoding.lower().replace("_", "-") in ("utf-8", "utf8")
    codec = "utf-8-sig" if utf8 else encoding
    if utf8 and data.startswith(_UTF16_BOMS):
        codec = "utf-16"  # the byte-order mark says so; "Unicode text" as spreadsheets save it
    try:
        text = data.decode(codec)
    except LookupError as exc:
        raise ConfigError(f"{path.name}: encoding {encoding!r} is not known; use a name such as \"utf-8\", "
                          "\"utf-16\" or \"cp1252\".") from exc
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise DataError(
            f"{path.name}: line {line}: bytes are not valid {encoding}. {_encoding_advice(data, role)}"
        ) from exc
    head = data[:4096]
    if codec == "utf-8-sig" and head.count(b"\0") > len(head) // 4:  # ASCII in UTF-16 is "valid" UTF-8
        raise DataError(f"{path.name}: every other byte is NUL: the file is UTF-16 text, not {encoding}. "
                        f"{_encoding_advice(data, role)}")
    text = text.lstrip("\ufeff")  # a BOM left by a non-UTF-8 codec
    sep = delimiter or sniff_delimiter(text)
    if codec == "utf-8-sig":  # the file's own bytes, less leading BOMs, are the text in UTF-8
        skip = 0
        while data.startswith(b"\xef\xbb\xbf", skip):
            skip += 3
        body = data[skip:] if skip else data
    else:
        body = text.encode("utf-8")
    del data, text  # one copy of the file in memory at a time
    ends_open = bool(body.strip(b" \t")) and not body.endswith((b"\n", b"\r"))
    fast = _read_csv_fast(path, body, sep, compact)
    if fast is not None:
        return _cut_short(fast, ends_open)
    text = body.decode("utf-8")
    del body
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=sep)
    header: list[str] | None = None
    records, lines, malformed = [], [], []
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
        malformed.append(problem)
    if header is None:
        raise DataError(f"{path.name}: the file is empty; expected a header line with column names.")
    _check_header(path, header, header_line)
    frame = pd.DataFrame(records, columns=header, dtype=object)
    return _cut_short(_finish(path, frame, header, lines, malformed, sep), ends_open)


def _cut_short(raw: RawTable, ends_open: bool) -> RawTable:
    """Mark a file whose last row has too few fields and no line break after it: a
    transfer cut in the middle of a row (a complete last row without a final line
    break is common and fine)."""
    frame = raw.frame
    if not ends_open or not len(frame) or str(frame["_malformed"].iloc[-1]) == "":
        return dataclasses.replace(raw, ends_open=ends_open)
    line = int(frame["_line"].iloc[-1])
    note = (f"{raw.name} ends in the middle of line {line} ({frame['_malformed'].iloc[-1]}, no line break "
            "after it): the file may be truncated (a cut transfer). Export or copy it again.")
    return dataclasses.replace(raw, truncated=note, ends_open=True)


def _encoding_advice(data: bytes, role: str | None) -> str:
    """Name an encoding that reads every byte of ``data`` (tried in turn), as a setting that works."""
    sample = data[:4096]
    candidates = ["utf-16"] if sample.count(b"\0") > len(sample) // 4 else []
    candidates += ["cp1252", "latin-1"]
    for name in candidates:
        try:
            text = data.decode(name)
        except UnicodeDecodeError:
            continue
        if "\0" in text:
            continue
        setting = (f"encoding_by_file = {{ {role} = \"{name}\" }} under [input] (or encoding = \"{name}\" for "
                   "every file)") if role else f"input.encoding = \"{name}\""
        return f"Save the export as UTF-8, or set {setting}."
    return "Save the export as UTF-8 and set no encoding."


def sniff_delimiter(text: str) -> str:
    """Pick the delimiter among , ; tab | from the first lines (default ``,``)."""
    sample = "\n".join(_first_lines(text, 20))
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
    return _finish(path, frame, header, lines, [""] * len(frame), ",")


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
    return _finish(path, frame, header, list(range(1, len(frame) + 1)), [""] * len(frame), ",")


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


def _finish(path, frame, header, lines, malformed, sep: str) -> RawTable:
    if not any(isinstance(t, pd.CategoricalDtype) for t in frame.dtypes):
        frame = frame.fillna("").astype(str) if len(frame) else frame.astype(object)
    n = len(frame)
    if any(isinstance(t, pd.CategoricalDtype) for t in frame.dtypes):  # compact: one code per row
        codes, problems = pd.factorize(np.asarray(malformed, dtype=object))
        source = pd.Categorical.from_codes(np.zeros(n, dtype=np.int8), categories=[path.name])
        problem = pd.Categorical.from_codes(codes, categories=problems) if len(problems) \
            else pd.Categorical([], categories=[""])
    else:
        source, problem = path.name, pd.Series(np.asarray(malformed, dtype=object), index=frame.index)
    frame["_source"] = source
    frame["_line"] = pd.Series(np.asarray(lines, dtype="int64"), index=frame.index)
    frame["_malformed"] = problem
    return RawTable(path=path, frame=frame.reset_index(drop=True), columns=tuple(header), delimiter=sep)


def _first_lines(text: str, n: int) -> list[str]:
    """``text.splitlines()[:n]`` without splitting the whole text."""
    size = 1 << 16
    while True:
        lines = text[:size].splitlines()
        if len(lines) > n + 1 or size >= len(text):
            return lines[:n]
        size *= 4


# Bytes that str.strip() removes in ASCII; bytes >= 0x80 may start Unicode whitespace.
_ASCII_SPACE = b" \t\n\r\x0b\x0c\x1c\x1d\x1e\x1f"


def _read_csv_fast(path: Path, body: bytes, sep: str, compact: bool) -> RawTable | None:
    """Split a CSV without quote characters with pandas' C parser; None when the
    file needs the csv module (quotes, NUL, lone carriage returns, odd delimiter).

    Gives the same cells, line numbers, blank-line skipping and field-count
    problems as the csv-module path: without quotes every physical line is one
    record and its fields are the pieces between delimiters.
    """
    if len(sep) != 1 or ord(sep) >= 128 or sep in "\r\n\"" or b'"' in body or b"\0" in body:
        return None
    buf = np.frombuffer(body, dtype=np.uint8)
    if not len(buf):
        return None
    if b"\r" in body:
        cr = np.flatnonzero(buf == 13)
        if (cr + 1 >= len(buf)).any() or (buf[np.minimum(cr + 1, len(buf) - 1)] != 10).any():
            return None  # lone \r line ends: leave them to the csv module
    newlines = np.flatnonzero(buf == 10)
    starts = np.concatenate(([0], newlines + 1))
    if starts[-1] >= len(buf):
        starts = starts[:-1]  # the text ends with a line break
    n_lines = len(starts)
    soft = np.zeros(256, dtype=bool)
    soft[list(_ASCII_SPACE)] = True
    soft[ord(sep)] = True
    soft[128:] = True
    lengths = np.diff(np.append(starts, len(buf)))  # line break included
    has_solid = _per_line(buf, starts, lambda b: soft[b]) < lengths
    has_high = _per_line(buf, starts, lambda b: b >= 128) > 0
    n_fields = _per_line(buf, starts, lambda b: b == ord(sep)) + 1
    blank = ~has_solid & ~has_high
    for i in np.flatnonzero(~has_solid & has_high):  # only Unicode spaces? decide as the csv path does
        end = newlines[i] if i < len(newlines) else len(buf)
        line = body[starts[i]:end].decode("utf-8").rstrip("\r\n")
        blank[i] = all(f.strip() == "" for f in line.split(sep))
    filled = np.flatnonzero(~blank)
    if not len(filled):
        return None  # empty file: the csv path raises the message
    head = int(filled[0])
    end = newlines[head] if head < len(newlines) else len(buf)
    header = [f.strip() for f in body[starts[head]:end].decode("utf-8").rstrip("\r\n").split(sep)]
    _check_header(path, header, head + 1)
    width = len(header)
    grid = pd.read_csv(io.BytesIO(body), sep=sep, header=None, names=list(range(int(n_fields.max()))),
                       dtype="category" if compact else object, quoting=csv.QUOTE_NONE, na_filter=False,
                       skip_blank_lines=False, encoding="utf-8", engine="c", index_col=False)
    del body, buf
    if len(grid) != n_lines:
        return None
    rows = filled[1:]
    counts = n_fields[rows]
    if len(rows) and rows[-1] - rows[0] == len(rows) - 1:  # no blank line inside: a slice, not a take
        pick = slice(int(rows[0]), int(rows[-1]) + 1)
    else:
        pick = rows
    frame = pd.DataFrame({name: grid[i].iloc[pick].reset_index(drop=True) for i, name in enumerate(header)})
    del grid
    if compact:
        for name in header:
            col = frame[name]
            if col.isna().any():  # cannot happen with na_filter=False; kept for safety
                frame[name] = col.cat.add_categories([""]).fillna("") if "" not in col.cat.categories \
                    else col.fillna("")
            frame[name] = frame[name].cat.remove_unused_categories()
    malformed = np.full(len(rows), "", dtype=object)
    odd = np.flatnonzero(counts != width)
    malformed[odd] = [f"row has {int(c)} fields, the header has {width}" for c in counts[odd]]
    return _finish(path, frame, header, rows + 1, malformed, sep)


def _per_line(buf: np.ndarray, starts: np.ndarray, test, chunk: int = 1 << 25) -> np.ndarray:
    """How many bytes of each line pass ``test`` (bytes -> bool array); ``starts``: line
    start offsets (increasing, first 0). Works in chunks of whole lines to bound memory."""
    counts = np.zeros(len(starts), dtype=np.int64)
    first = 0
    while first < len(starts):
        last = int(np.searchsorted(starts, starts[first] + chunk, side="right"))
        last = max(last, first + 1)
        lo = int(starts[first])
        hi = int(starts[last]) if last < len(starts) else len(buf)
        hits = np.flatnonzero(test(buf[lo:hi]))
        edges = np.append(starts[first:last] - lo, hi - lo)
        counts[first:last] = np.diff(np.searchsorted(hits, edges, side="left"))
        first = last
    return counts


def join_fields(fields, sep: str) -> str:
    """A row's cells as the csv module writes them with delimiter ``sep`` (no line end)."""
    out = io.StringIO()
    csv.writer(out, delimiter=sep, lineterminator="").writerow(list(fields))
    return out.getvalue()
