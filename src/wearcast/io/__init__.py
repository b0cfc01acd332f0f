"""Exports in, one validated :class:`~wearcast.lifetable.LifeTable` out.

:func:`load_export` reads the files named in the config's ``[input]`` table
(CSV, Excel .xlsx or Parquet; every cell as text first), rejects bad rows into
a quarantine with a reason each, and builds the life table (ages in days).
:func:`check_export` does the same and writes ``quarantine.csv`` and
``life_table.csv`` for a person to look at.

Whole-file problems raise at once: a missing file :class:`InputMissingError`
(exit 66), missing columns or ambiguous date orders :class:`DataError` (65),
bad config values :class:`ConfigError` (78). Row problems are quarantined; when
more than ``fleet.max_bad_share`` of the rows are rejected, :class:`DataError`
names the most common reason and its first example.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from wearcast import _atomic
from wearcast.config import Config
from wearcast.exceptions import DataError
from wearcast.io._quarantine import QUARANTINE_COLUMNS, by_reason
from wearcast.io.export import QUARANTINE_FILE, bad_share_error, load, no_failures_error, write_outputs
from wearcast.lifetable import LifeTable

LIFE_TABLE_FILE = "life_table.csv"


@dataclass(frozen=True)
class ExportResult:
    """The life table plus what happened to every row read.

    ``rows_read == rows_kept + rows_quarantined + rows_after_as_of`` always
    holds (checked when loading). ``quarantine`` has the columns
    source_file, line, column, value, reason, original_row.
    """

    table: LifeTable
    quarantine: pd.DataFrame
    rows_read: int
    rows_kept: int
    rows_quarantined: int
    rows_after_as_of: int
    quarantine_path: Path | None
    files: tuple = ()  # per file: {file, role, rows_read, rows_kept, rows_quarantined, rows_after_as_of}
    warnings: tuple = ()  # plain sentences: empty files, a file cut short, no failures, ...

    def by_reason(self) -> dict[str, int]:
        """Rejected rows per reason, most frequent first."""
        return by_reason(self.quarantine)


def load_export(config: Config, *, as_of: dt.date | None = None,
                quarantine_dir: Path | None = None) -> ExportResult:
    """Read and validate the export named in ``config``; return the life table.

    ``as_of`` (an as-of backtest): use only what had been recorded by that date.
    Events and readings dated later, and units installed later, are counted in
    ``rows_after_as_of`` (not quarantined) and never reach the table; every
    unit still running is suspended at ``as_of``. ``quarantine_dir``: when
    given, ``quarantine.csv`` is written there (atomically), also when the run
    stops for too many bad rows.
    """
    loaded = load(config, as_of)
    frame = loaded.quarantine.frame()
    path = None
    if quarantine_dir is not None:
        path = write_outputs(Path(quarantine_dir), frame)
    error = bad_share_error(loaded, frame, config.fleet.max_bad_share, path)
    if error is not None:
        raise error
    if loaded.table is None:
        raise DataError(
            f"{config.source}: no usable rows left in the export ({loaded.rows_read} read, {len(frame)} rejected, "
            f"{loaded.rows_after_as_of} after as_of). Check input paths, as_of and records_start."
            , quarantine_path=None if path is None else str(path))
    stop = no_failures_error(loaded, config, path)
    if stop is not None:
        if as_of is None:
            raise stop
        loaded.warnings.append(str(stop))  # an as-of origin early in the records: the full export was checked
    return ExportResult(table=loaded.table, quarantine=frame, rows_read=loaded.rows_read,
                        rows_kept=loaded.rows_kept, rows_quarantined=len(frame),
                        rows_after_as_of=loaded.rows_after_as_of, quarantine_path=path,
                        files=tuple(loaded.files), warnings=tuple(loaded.warnings))


def check_export(config: Config, out_dir: Path) -> dict:
    """Load the export, write quarantine.csv and life_table.csv into ``out_dir``.

    Returns a summary: units, lives, rows, failures, suspensions,
    delayed_entries, time_at_risk_days, in_service_units, as_of, rows_read,
    rows_kept, rows_quarantined, rows_after_as_of, files (rows read / kept /
    quarantined / after as_of per file), warnings, quarantined_by_reason,
    quarantine_path, life_table_path.
    """
    out_dir = Path(out_dir)
    return write_check(load_export(config, quarantine_dir=out_dir), out_dir)


def write_check(result: ExportResult, out_dir: Path) -> dict:
    """Write life_table.csv for ``result`` into ``out_dir``; return the check summary
    (see :func:`check_export`). The quarantine file was written by :func:`load_export`."""
    out_dir = Path(out_dir)
    table_path = _atomic.write_csv(out_dir / LIFE_TABLE_FILE, _dates_as_text(result.table.frame))
    summary = dict(result.table.summary())
    summary.update(
        as_of=None if result.table.as_of is None else result.table.as_of.date().isoformat(),
        rows_read=result.rows_read,
        rows_kept=result.rows_kept,
        rows_quarantined=result.rows_quarantined,
        rows_after_as_of=result.rows_after_as_of,
        files=[dict(f) for f in result.files],
        warnings=list(result.warnings),
        quarantined_by_reason=result.by_reason(),
        quarantine_path=str(result.quarantine_path),
        life_table_path=str(table_path),
    )
    return summary


def _dates_as_text(frame: pd.DataFrame) -> pd.DataFrame:
    out = frame.copy()
    for col in out.columns:
        if pd.api.types.is_datetime64_any_dtype(out[col]):
            text = out[col].dt.strftime("%Y-%m-%d %H:%M:%S").str.replace(" 00:00:00", "", regex=False)
            out[col] = text.fillna("")
    return out


__all__ = ["ExportResult", "load_export", "check_export", "write_check", "QUARANTINE_COLUMNS", "QUARANTINE_FILE",
           "LIFE_TABLE_FILE"]
