"""The quarantine: every rejected export row, once, with the first reason found.

A row is identified by its file name (``_source``) and its position in that
file's :class:`~wearcast.io._readers.RawTable` (the frame's index label). The
quarantine keeps one boolean mask per file plus, for rejected rows only, the
column, value and reason; the rejected rows' original text is rebuilt from the
raw table when :meth:`Quarantine.frame` is called, so nothing is held per kept
row. A row rejected twice keeps its first reason, so row accounting (rows read
= kept + quarantined + after as_of) can be checked exactly.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd

from wearcast import _atomic

#: Columns of the quarantine frame and file, in order.
QUARANTINE_COLUMNS = ("source_file", "line", "column", "value", "reason", "original_row")


class Quarantine:
    """Collects rejected rows; ``reject`` returns the rows it was asked to reject.

    Call :meth:`track` once per file read before rejecting its rows.
    """

    def __init__(self) -> None:
        self._tables: dict[str, object] = {}  # source -> RawTable
        self._taken: dict[str, np.ndarray] = {}  # source -> bool per raw row
        self._chunks: list[tuple[str, np.ndarray, np.ndarray, np.ndarray, np.ndarray]] = []
        self._parts: list[pd.DataFrame] = []  # sealed chunks
        self._names: dict[str, dict[str, str]] = {}  # source -> {wearcast's column name: the export's}

    def track(self, table) -> None:
        """Register a :class:`~wearcast.io._readers.RawTable` (rows are its frame positions)."""
        self._tables[table.name] = table
        self._taken[table.name] = np.zeros(len(table.frame), dtype=bool)

    def name_columns(self, source: str, names: dict[str, str]) -> None:
        """How ``source``'s columns are called in the export (wearcast's name -> the export's),
        so the quarantine file shows the export's own names and cells."""
        self._names[source] = dict(names)

    def __len__(self) -> int:
        return int(sum(int(t.sum()) for t in self._taken.values()))

    def taken(self, source: str) -> np.ndarray:
        """Boolean mask over the raw rows of ``source``: True where rejected."""
        return self._taken[source]

    def rejected(self, rows: pd.DataFrame) -> np.ndarray:
        """Mask aligned with ``rows`` (a frame of one tracked file): True where already rejected."""
        if not len(rows):
            return np.zeros(0, dtype=bool)
        return self._taken[_source_of(rows)][rows.index.to_numpy()]

    def reject(self, rows: pd.DataFrame, mask, column: str | pd.Series, reason: str | pd.Series,
               values: pd.Series | None = None) -> np.ndarray:
        """Quarantine ``rows[mask]``; returns ``mask`` as a boolean array (aligned with rows).

        ``column``/``reason`` may be one string or a Series aligned with ``rows``;
        ``values`` defaults to the cell ``rows[column]`` (or "" when absent).
        Rows already in the quarantine keep their first reason.
        """
        mask = np.asarray(mask, dtype=bool)
        picked = np.flatnonzero(mask)
        if not len(picked):
            return mask
        if isinstance(column, str):
            cols = column
        else:
            cols = np.array([str(c) for c in column.to_numpy()[picked]], dtype=object)
        whys = reason if isinstance(reason, str) else np.array([str(r) for r in reason.to_numpy()[picked]],
                                                               dtype=object)
        if values is not None:
            cells = values.to_numpy()[picked]
        elif isinstance(column, str) and column in rows:
            cells = rows[column].to_numpy()[picked]
        else:
            cells = np.array([rows[c].iloc[i] if c in rows else "" for c, i in zip(cols, picked)], dtype=object)
        self.reject_index(_source_of(rows), rows.index.to_numpy()[picked], cols, cells, whys)
        return mask

    def reject_index(self, source: str, index: np.ndarray, column, values, reason) -> None:
        """Quarantine raw rows ``index`` (positions) of ``source``; ``column``, ``values``
        and ``reason`` are one value or arrays aligned with ``index``."""
        index = np.asarray(index, dtype=np.int64)
        n = len(index)
        if not n:
            return
        taken = self._taken[source]
        # First reason wins, also among repeats inside this call.
        new = ~taken[index]
        _, first = np.unique(index, return_index=True)
        once = np.zeros(n, dtype=bool)
        once[first] = True
        new &= once
        if not new.any():
            return
        taken[index[new]] = True

        def pick(v):
            arr = np.full(n, v, dtype=object) if isinstance(v, str) else np.asarray(v, dtype=object)
            return arr[new]

        cells = np.array([str(v) for v in np.asarray(values, dtype=object)[new]], dtype=object)
        self._chunks.append((source, index[new], pick(column), cells, pick(reason)))

    def seal(self) -> None:
        """Copy the rejected rows' lines and text out of the raw tables and let the tables go
        (frees the export's memory once every row is placed). No rejections after this."""
        for source, index, cols, cells, whys in self._chunks:
            table = self._tables[source]
            cols, cells = _as_read(table, self._names.get(source, {}), index, cols, cells)
            lines = table.frame["_line"].to_numpy()[index]
            self._parts.append(pd.DataFrame({
                "source_file": np.full(len(index), source, dtype=object),
                "line": lines.astype(np.int64),
                "column": cols, "value": _visible(cells), "reason": whys,
                "original_row": _visible(original_rows(table, index)),
            }))
        self._chunks = []
        self._tables = {}

    def frame(self) -> pd.DataFrame:
        """The rejected rows sorted by file and line (columns QUARANTINE_COLUMNS)."""
        self.seal()
        if not self._parts:
            return pd.DataFrame({c: pd.Series(dtype="int64" if c == "line" else object)
                                 for c in QUARANTINE_COLUMNS})
        out = pd.concat(self._parts, ignore_index=True)
        return out.sort_values(["source_file", "line"], kind="mergesort").reset_index(drop=True)


def original_rows(table, index: np.ndarray) -> np.ndarray:
    """The text of raw rows ``index`` as the file's delimiter joins them (object array)."""
    from wearcast.io._readers import join_fields

    cells = [table.frame[c].to_numpy()[index] for c in table.columns]
    sep = getattr(table, "delimiter", ",")
    return np.array([join_fields(row, sep) for row in zip(*cells)], dtype=object)


def _as_read(table, names: dict[str, str], index: np.ndarray, cols, cells: np.ndarray):
    """Column names as the export calls them and, for the export's own columns, the
    cell text as read (not the parsed or converted value)."""
    cols = np.full(len(index), cols, dtype=object) if isinstance(cols, str) else np.asarray(cols, dtype=object)
    theirs = np.array([names.get(c, c) for c in cols], dtype=object)
    cells = np.asarray(cells, dtype=object).copy()
    for name in set(theirs.tolist()):
        if name and name in table.columns:
            hit = theirs == name
            cells[hit] = [str(v) for v in table.frame[name].to_numpy()[index[hit]]]
    return theirs, cells


_CONTROL = re.compile(r"[\x00-\x08\x0b\x0c\x0e-\x1f\x7f]")


def _visible(texts: np.ndarray) -> np.ndarray:
    """Control bytes (NUL from a damaged transfer, ...) written as ``\\x00`` so the
    quarantine file stays text that spreadsheets and editors open."""
    return np.array([_CONTROL.sub(lambda m: f"\\x{ord(m.group()):02x}", str(t)) for t in texts], dtype=object)


def _source_of(rows: pd.DataFrame) -> str:
    sources = rows["_source"]
    first = str(sources.iloc[0])
    return first


def by_reason(quarantine: pd.DataFrame) -> dict[str, int]:
    """Counts per reason, most frequent first (ties by reason text)."""
    counts = quarantine["reason"].value_counts()
    pairs = sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))
    return {str(k): int(v) for k, v in pairs}


def write_quarantine(path: Path, quarantine: pd.DataFrame) -> Path:
    """Write the quarantine CSV atomically; returns its path."""
    return _atomic.write_csv(path, quarantine.loc[:, list(QUARANTINE_COLUMNS)])
