"""The quarantine: every rejected export row, once, with the first reason found.

A row is identified by ``(source_file, line)``. :class:`Quarantine` refuses to
record a row twice, so row accounting (rows read = kept + quarantined + after
as_of) can be checked exactly.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from wearcast import _atomic

#: Columns of the quarantine frame and file, in order.
QUARANTINE_COLUMNS = ("source_file", "line", "column", "value", "reason", "original_row")


class Quarantine:
    """Collects rejected rows; ``reject`` returns the rows it newly recorded."""

    def __init__(self) -> None:
        self._records: list[dict] = []
        self._keys: set[tuple[str, int]] = set()

    def __len__(self) -> int:
        return len(self._records)

    def keys(self) -> set[tuple[str, int]]:
        return set(self._keys)

    def has(self, source: str, line: int) -> bool:
        return (source, int(line)) in self._keys

    def reject(self, rows: pd.DataFrame, mask, column: str | pd.Series, reason: str | pd.Series,
               values: pd.Series | None = None) -> np.ndarray:
        """Quarantine ``rows[mask]``; returns a boolean mask (aligned with rows) of rejected rows.

        ``column``/``reason`` may be one string or a Series aligned with ``rows``;
        ``values`` defaults to the cell ``rows[column]`` (or "" when absent).
        Rows already in the quarantine keep their first reason.
        """
        mask = np.asarray(mask, dtype=bool)
        picked = np.flatnonzero(mask)
        if not len(picked):
            return mask
        sources = rows["_source"].to_numpy()[picked]
        lines = rows["_line"].to_numpy()[picked]
        raws = rows["_raw"].to_numpy()[picked]
        cols = [column] * len(picked) if isinstance(column, str) else [str(c) for c in column.to_numpy()[picked]]
        whys = [reason] * len(picked) if isinstance(reason, str) else [str(r) for r in reason.to_numpy()[picked]]
        if values is not None:
            cells = [str(v) for v in values.to_numpy()[picked]]
        elif isinstance(column, str) and column in rows:
            cells = [str(v) for v in rows[column].to_numpy()[picked]]
        else:
            cells = [str(rows[c].iloc[i]) if c in rows else "" for c, i in zip(cols, picked)]
        for source, line, raw, col, why, value in zip(sources, lines, raws, cols, whys, cells):
            self.add(str(source), int(line), col, value, why, str(raw))
        return mask

    def add(self, source: str, line: int, column: str, value: str, reason: str, original_row: str) -> bool:
        """Record one row; False when it was already recorded (it keeps its first reason)."""
        key = (source, int(line))
        if key in self._keys:
            return False
        self._keys.add(key)
        self._records.append({"source_file": source, "line": key[1], "column": column, "value": value,
                              "reason": reason, "original_row": original_row})
        return True

    def frame(self) -> pd.DataFrame:
        """The rejected rows sorted by file and line (columns QUARANTINE_COLUMNS)."""
        if not self._records:
            return pd.DataFrame({c: pd.Series(dtype="int64" if c == "line" else object)
                                 for c in QUARANTINE_COLUMNS})
        out = pd.DataFrame(self._records, columns=list(QUARANTINE_COLUMNS))
        return out.sort_values(["source_file", "line"], kind="mergesort").reset_index(drop=True)


def by_reason(quarantine: pd.DataFrame) -> dict[str, int]:
    """Counts per reason, most frequent first (ties by reason text)."""
    counts = quarantine["reason"].value_counts()
    pairs = sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))
    return {str(k): int(v) for k, v in pairs}


def write_quarantine(path: Path, quarantine: pd.DataFrame) -> Path:
    """Write the quarantine CSV atomically; returns its path."""
    return _atomic.write_csv(path, quarantine.loc[:, list(QUARANTINE_COLUMNS)])
