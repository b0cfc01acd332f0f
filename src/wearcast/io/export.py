"""Read an export, validate it row by row, quarantine bad rows, build the LifeTable.

The order is fixed: read every file as text -> check whole-file problems
(missing columns: :class:`DataError`) -> parse and check each row (a bad cell
quarantines its row with the first reason found) -> let the builder place every
remaining row -> prove rows read = kept + quarantined + after as_of, per file ->
stop when the rejected share of any one file is above ``fleet.max_bad_share``.

The share is taken per file: a small event log with many bad rows is not
diluted by a large, clean readings file (the event log holds every failure).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from wearcast.config import Config
from wearcast.exceptions import ConfigError, DataError
from wearcast.io import _parse, _ranges
from wearcast.io._build import BuildOutcome, BuildSettings, build_from_intervals, build_register_log
from wearcast.io._quarantine import Quarantine, by_reason, write_quarantine
from wearcast.io._readers import RawTable, read_export_file
from wearcast.lifetable import LifeTable

QUARANTINE_FILE = "quarantine.csv"
_CONTROL_BYTES = r"[\x00-\x08\x0b\x0c\x0e-\x1f\x7f]"


@dataclass
class Loaded:
    """What :func:`load` hands to the public API (before the bad-share check)."""

    table: LifeTable | None
    quarantine: Quarantine
    rows_read: int
    rows_kept: int
    rows_after_as_of: int
    as_of: pd.Timestamp
    files: list = field(default_factory=list)  # one dict per file read, see _account
    warnings: list = field(default_factory=list)  # plain sentences for the person running the check


# -- reading -----------------------------------------------------------------

#: The [input] keys that name a file; also the keys of date_format_by_file / encoding_by_file.
FILE_KEYS = ("register", "events", "readings", "life_table")


def _check_by_file(config: Config) -> None:
    for key in ("date_format_by_file", "encoding_by_file"):
        for role in getattr(config.input, key):
            if role not in FILE_KEYS:
                raise ConfigError(f"{config.source}: input.{key} has a key {role!r}; use the [input] key that "
                                  f"names the file: {', '.join(FILE_KEYS)}.")


def _date_format(config: Config, role: str) -> str | None:
    return config.input.date_format_by_file.get(role, config.input.date_format)


def _read(config: Config, key: str, required: bool = True) -> RawTable | None:
    inp = config.input
    rel = getattr(inp, key)
    if rel is None:
        if required:
            raise ConfigError(f"{config.source}: input.{key} is not set; shape {inp.shape!r} needs it. "
                              f"Add {key} = \"path/to/file.csv\" under [input].")
        return None
    return read_export_file(config.path(rel), delimiter=inp.delimiter, sheet=inp.sheet, compact=True,
                            encoding=inp.encoding_by_file.get(key, inp.encoding), role=key)


def _require(table: RawTable, wanted: dict[str, str] | list[tuple[str, str]]) -> None:
    """``wanted``: pairs of config key (e.g. ``columns.unit_id``) and the export's column name."""
    pairs = list(wanted.items()) if isinstance(wanted, dict) else list(wanted)
    missing = [(k, v) for k, v in pairs if v not in table.columns]
    if missing:
        names = ", ".join(f"{v!r} ({k})" for k, v in missing)
        raise DataError(
            f"{table.name}: missing required column(s) {names}; found {', '.join(map(repr, table.columns))}. "
            "Rename the columns in the export or map them in the config's [columns] table."
        )


def _require_rows(table: RawTable, what: str, expected: str) -> None:
    """A file with a header and no rows cannot make a life table: say so by its name."""
    if not len(table.frame):
        raise DataError(f"{table.name} has a header but no rows: {what}. Export the file again with its rows "
                        f"({expected}); check the export's filter or date range.")


def _file_warnings(*tables: RawTable | None) -> list[str]:
    return [t.truncated for t in tables if t is not None and t.truncated]


def _cut_last_rows(q: Quarantine, *tables: RawTable | None) -> list[str]:
    """A file with no line break after its last row whose last row was rejected: a transfer
    cut inside the last cell leaves a row with every field but a broken value."""
    out = []
    for t in tables:
        if t is None or not t.ends_open or t.truncated or not len(t.frame) or not q.taken(t.name)[-1]:
            continue
        line = int(t.frame["_line"].iloc[-1])
        out.append(f"{t.name} ends without a line break and its last row (line {line}) was rejected: the file may "
                   "be truncated (a cut transfer). Export or copy it again.")
    return out


def _rename(table: RawTable, mapping: dict[str, str], q: Quarantine) -> pd.DataFrame:
    """Export columns -> wearcast names (only those present); ``q`` learns the export's names."""
    ren = {theirs: ours for ours, theirs in mapping.items() if theirs in table.columns and theirs != ours}
    q.name_columns(table.name, {ours: theirs for theirs, ours in ren.items()})
    return table.frame.rename(columns=ren)


# -- row checks ----------------------------------------------------------------

def _check_common(frame: pd.DataFrame, q: Quarantine, header: tuple[str, ...]) -> np.ndarray:
    """Malformed rows, repeated header rows and bad ids; returns the mask of rows still good.

    ``header``: the export's own column names (``frame`` holds them renamed, in the same order).
    """
    q.reject(frame, frame["_malformed"] != "", "", frame["_malformed"], values=pd.Series("", index=frame.index))
    repeated = np.ones(len(frame), dtype=bool)
    for i, name in enumerate(header):  # files pasted together keep each part's header line
        if not repeated.any():
            break
        repeated &= (_parse.map_text(frame.iloc[:, i], lambda t: t.astype(str).str.strip()) == name).to_numpy()
    q.reject(frame, repeated, "", "repeated header row (files pasted together); it is not data",
             values=pd.Series("", index=frame.index))
    for i, name in enumerate(header):  # NUL and other control bytes: a transfer or a disk damaged the row
        damaged = _parse.map_text(frame.iloc[:, i], lambda t: t.astype(str).str.contains(_CONTROL_BYTES, regex=True)
                                  .map({True: "y", False: ""})) == "y"
        q.reject(frame, damaged.to_numpy(), str(frame.columns[i]),
                 "control byte (such as NUL) in the cell: the file was damaged in transfer; export it again")
    reasons = _parse.id_problems(frame["unit_id"])
    q.reject(frame, (reasons != "").to_numpy(), "unit_id", reasons)
    frame["unit_id"] = _parse.map_text(frame["unit_id"], lambda t: t.astype(str).str.strip())
    return ~_rejected(frame, q)


def _rejected(frame: pd.DataFrame, q: Quarantine) -> np.ndarray:
    return q.rejected(frame)


def _dates(frame: pd.DataFrame, col: str, q: Quarantine, config: Config, day_first, *, required: bool,
           role: str) -> None:
    if col not in frame:
        frame[col] = pd.NaT
        return
    fmt = _date_format(config, role)
    parsed, bad = _parse.parse_dates(frame[col], date_format=fmt, day_first=day_first)
    hint = (f"not in the format {fmt!r} set for this file; use YYYY-MM-DD, or give {role} its own format "
            f"under [input]: date_format_by_file = {{ {role} = \"...\" }}") if fmt \
        else f"use YYYY-MM-DD or set input.date_format (or date_format_by_file = {{ {role} = \"...\" }})"
    if bad.any():
        reasons = pd.Series(f"unparseable date ({hint})", index=frame.index, dtype=object)
        cells = frame[col][bad].astype(str)
        reasons[bad] = [_parse.not_a_date_reason(c, fmt, day_first) or reasons.iloc[0] for c in cells]
        q.reject(frame, bad, col, reasons)
    if required:
        q.reject(frame, parsed.isna().to_numpy() & ~bad, col, "missing date")
    frame[col] = parsed


def _numbers(frame: pd.DataFrame, cols, q: Quarantine, config: Config, reason: str, *,
             plausible: bool = False) -> None:
    """Parse ``cols`` as numbers; with ``plausible``, also quarantine values outside each
    column's plausible range (:mod:`wearcast.io._ranges`)."""
    for col in cols:
        values, bad = _parse.parse_numbers(frame[col], config.input.decimal)
        if bad.any():  # inf / NaN written as a value is a number, but not one a reading can be
            words = _parse.map_text(frame[col], lambda t: t.astype(str).str.strip().str.lower()
                                    .str.lstrip("+-").isin(("inf", "infinity", "nan")).map({True: "y", False: ""}))
            endless = bad & (words == "y").to_numpy()
            q.reject(frame, endless, col, "not a finite number (infinity or NaN written as a value)")
        q.reject(frame, bad, col, reason)
        if plausible:
            span = _ranges.plausible_range(col, config.fleet.ranges)
            far = _ranges.outside(values, span) & ~bad
            declare = "widen" if col in config.fleet.ranges else "declare"
            q.reject(frame, far, col, f"outside the plausible range of {col}: {span.describe()}; fix the value, "
                                      f"or {declare} the range under [fleet.ranges] as {_ranges.toml_key(col)} = [low, high]")
        frame[col] = values


def _kept_rows(frame: pd.DataFrame | None, q: Quarantine) -> pd.DataFrame | None:
    """The rows not quarantined (the frame itself when none were: no copy)."""
    if frame is None:
        return None
    rejected = _rejected(frame, q)
    return frame[~rejected] if rejected.any() else frame


def _day_first(config: Config, frames: list[tuple[pd.DataFrame, str, str]]) -> bool | None:
    """The day/month order of the files without a date format of their own
    (``frames``: frame, date column, [input] key of the file)."""
    samples = [_parse.DateSample(str(f["_source"].iloc[0]), getattr(config.columns, c, c), f[c], f["_line"], role)
               for f, c, role in frames if c in f and len(f) and not _date_format(config, role)]
    return _parse.day_first_from_values(samples)


def _latest_date(*series: pd.Series) -> pd.Timestamp:
    dates = [s.max() for s in series if s is not None and len(s) and pd.notna(s.max())]
    if not dates:
        raise DataError("the export holds no usable dates, so as_of cannot be found. Set fleet.as_of.")
    return max(dates)


def _merge(outcome: BuildOutcome, q: Quarantine) -> None:
    for source, index, column, values, reason in outcome.rejected:
        q.reject_index(source, index, column, values, reason)


def _track(q: Quarantine, *tables: RawTable | None) -> None:
    for t in tables:
        if t is not None:
            q.track(t)


# -- register + log ---------------------------------------------------------------

def _load_register_log(config: Config, as_of_override) -> Loaded:
    cols, fleet = config.columns, config.fleet
    register = _read(config, "register")
    events = _read(config, "events")
    readings = _read(config, "readings", required=False)
    _require(register, {"columns.unit_id": cols.unit_id, "columns.install_date": cols.install_date})
    _require(events, {"columns.unit_id": cols.unit_id, "columns.event_date": cols.event_date,
                      "columns.event_kind": cols.event_kind})
    if readings is not None:
        _require(readings, {"columns.unit_id": cols.unit_id, "columns.reading_date": cols.reading_date})
    reading_cols = tuple(c for c in fleet.covariates if readings is not None and c in readings.columns)
    static_cols = tuple(c for c in fleet.covariates if c not in reading_cols)
    # Every covariate must be in the register or the readings; group columns in the register.
    _require(register, [("fleet.covariates", c) for c in static_cols] + [("fleet.group_by", c) for c in fleet.group_by])
    register_cols = tuple(dict.fromkeys((*static_cols, *fleet.group_by)))
    _require_rows(register, "the register lists no units", "one row per unit with its install date")
    warnings = _file_warnings(register, events, readings)
    if not len(events.frame):
        warnings.append(f"{events.name} has a header but no rows: no failure, replacement or decommission is on "
                        "record, so every unit is read as running since install.")
    if readings is not None and not len(readings.frame):
        empty = ", ".join(reading_cols) if reading_cols else "none of fleet.covariates"
        warnings.append(f"{readings.name} has a header but no rows: the reading covariates ({empty}) are empty "
                        "for every unit.")

    q = Quarantine()
    _track(q, register, events, readings)
    reg = _rename(register, {"unit_id": cols.unit_id, "install_date": cols.install_date,
                             "decommission_date": cols.decommission_date}, q)
    ev = _rename(events, {"unit_id": cols.unit_id, "event_date": cols.event_date,
                          "event_kind": cols.event_kind, "failure_mode": cols.failure_mode}, q)
    rd = None if readings is None else _rename(readings, {"unit_id": cols.unit_id, "reading_date": cols.reading_date},
                                               q)
    if "failure_mode" not in ev:
        ev["failure_mode"] = ""
    for f, t in ((reg, register), (ev, events), (rd, readings)):
        if f is not None:
            _check_common(f, q, t.columns)
    day_first = _day_first(config, [(reg, "install_date", "register"), (reg, "decommission_date", "register"),
                                    (ev, "event_date", "events")]
                           + ([(rd, "reading_date", "readings")] if rd is not None else []))
    _dates(reg, "install_date", q, config, day_first, required=True, role="register")
    _dates(reg, "decommission_date", q, config, day_first, required=False, role="register")
    _dates(ev, "event_date", q, config, day_first, required=True, role="events")
    numeric_static = [c for c in static_cols if c not in fleet.categorical]
    _numbers(reg, numeric_static, q, config, "non-numeric covariate", plausible=True)
    if rd is not None:
        _dates(rd, "reading_date", q, config, day_first, required=True, role="readings")
        _numbers(rd, reading_cols, q, config, "non-numeric covariate", plausible=True)
    vocab = {k.strip().lower(): "failure" for k in fleet.failure_kinds}
    vocab |= {k.strip().lower(): "replacement" for k in fleet.replacement_kinds}
    vocab |= {k.strip().lower(): "decommission" for k in fleet.decommission_kinds}
    kinds = _parse.map_text(ev["event_kind"], lambda t: t.astype(str).str.strip().str.lower().map(vocab))
    kinds = kinds.astype(object).where(kinds.notna(), np.nan)
    q.reject(ev, kinds.isna().to_numpy(), "event_kind",
             "unknown event kind (add it to fleet.failure_kinds, replacement_kinds or decommission_kinds)")
    ev["event_kind"] = kinds.fillna("")
    ev["failure_mode"] = ev["failure_mode"].astype(str).str.strip()

    # Duplicate register ids: no row is chosen silently, all of them are rejected.
    dup = reg["unit_id"].duplicated(keep=False).to_numpy() & (reg["unit_id"] != "").to_numpy()
    q.reject(reg, dup, "unit_id", "unit id appears more than once in the register")
    reg_ok = ~_rejected(reg, q)
    good_ids = set(reg.loc[reg_ok, "unit_id"])
    known_ids = set(reg["unit_id"])
    for f in (ev, rd):
        if f is None:
            continue
        unknown = ~f["unit_id"].isin(known_ids).to_numpy()
        q.reject(f, unknown, "unit_id", "unit not in the register")
        cascade = ~f["unit_id"].isin(good_ids).to_numpy()
        q.reject(f, cascade, "unit_id", "unit's register row was rejected")

    reg_ok, ev_ok, rd_ok = _kept_rows(reg, q), _kept_rows(ev, q), _kept_rows(rd, q)
    reg = ev = rd = None  # the working copies are done with; the raw tables stay for the quarantine
    backtest = as_of_override is not None
    if backtest:
        as_of = pd.Timestamp(as_of_override)
    elif fleet.as_of is not None:
        as_of = pd.Timestamp(fleet.as_of)
    else:
        as_of = _latest_date(reg_ok["install_date"], reg_ok["decommission_date"], ev_ok["event_date"],
                             None if rd_ok is None else rd_ok["reading_date"])
    settings = BuildSettings(
        renewal=fleet.renewal, as_of=as_of, backtest=backtest,
        records_start=None if fleet.records_start is None else pd.Timestamp(fleet.records_start),
        reading_columns=reading_cols, register_columns=register_cols)
    outcome = build_register_log(reg_ok, ev_ok, rd_ok, settings)
    _merge(outcome, q)
    rows_read = sum(len(t.frame) for t in (register, events, readings) if t is not None)
    files = _account([(r, t) for r, t in (("register", register), ("events", events), ("readings", readings))
                      if t is not None], outcome, q)
    warnings += _cut_last_rows(q, register, events, readings)
    q.seal()
    del register, events, readings, reg_ok, ev_ok, rd_ok  # only the life table is left to make
    return _finish(config, outcome, q, rows_read, as_of, reading_cols + static_cols, files, warnings)


# -- life table -------------------------------------------------------------------

def _load_life_table(config: Config, as_of_override) -> Loaded:
    cols, fleet, inp = config.columns, config.fleet, config.input
    table = _read(config, "life_table")
    _require(table, {"columns.unit_id": cols.unit_id, "columns.exit": cols.exit, "columns.failed": cols.failed})
    _require(table, [("fleet.covariates", c) for c in fleet.covariates] + [("fleet.group_by", c) for c in fleet.group_by])
    if inp.age_unit not in _parse.AGE_UNIT_DAYS:
        raise ConfigError(f"{config.source}: input.age_unit {inp.age_unit!r} is not one of "
                          f"{', '.join(_parse.AGE_UNIT_DAYS)}.")
    _require_rows(table, "the life table holds no lives", "one row per life or interval")
    warnings = _file_warnings(table)
    q = Quarantine()
    _track(q, table)
    f = _rename(table, {"unit_id": cols.unit_id, "entry": cols.entry, "exit": cols.exit, "failed": cols.failed,
                        "mode": cols.failure_mode, "install_date": cols.install_date, "life": cols.life,
                        "retired": cols.retired}, q)
    _check_common(f, q, table.columns)
    for c in f.columns:  # life tables are walked row by row below: plain text columns
        if isinstance(f[c].dtype, pd.CategoricalDtype):
            f[c] = f[c].astype(object)
    dated = "install_date" in f and _looks_dated(f["exit"], inp.decimal)
    if "entry" not in f:  # no entry column: every life is observed from age 0
        f["entry"] = f["install_date"] if dated else "0"
    if dated:
        day_first = _day_first(config, [(f, "install_date", "life_table"), (f, "entry", "life_table"),
                                        (f, "exit", "life_table")])
        for c in ("install_date", "entry", "exit"):
            _dates(f, c, q, config, day_first, required=True, role="life_table")
        f["entry_date"], f["exit_date"] = f["entry"], f["exit"]
        f["entry_age"] = (f["entry"] - f["install_date"]) / pd.Timedelta(days=1)
        f["exit_age"] = (f["exit"] - f["install_date"]) / pd.Timedelta(days=1)
    else:
        if as_of_override is not None:
            raise ConfigError(f"{config.source}: an as-of backtest needs calendar dates, but "
                              f"{table.name} gives ages. Export entry/exit as dates with an install_date column.")
        _numbers(f, ["entry", "exit"], q, config, "non-numeric age")
        q.reject(f, f["exit"].isna().to_numpy(), "exit", "missing exit age")
        factor = _parse.AGE_UNIT_DAYS[inp.age_unit]
        f["entry_age"] = f["entry"].fillna(0.0) * factor
        f["exit_age"] = f["exit"] * factor
    failed, bad = _parse.parse_flags(f["failed"])
    q.reject(f, bad, "failed", "failed flag is not 0/1/true/false")
    f["failed"] = failed
    marked = "retired" in f
    if marked:  # blank = still in the fleet; 1/true = retired or decommissioned
        text = f["retired"].astype(str).str.strip()
        retired, bad = _parse.parse_flags(text.where(text != "", "0"))
        q.reject(f, bad, "retired", "retired flag is not 0/1/true/false (blank: not retired)")
        f["retired"] = retired
    else:
        f["retired"] = False
    f["mode"] = f["mode"].astype(str).str.strip() if "mode" in f else ""
    if "life" in f:
        life, bad = _parse.parse_numbers(f["life"])
        bad |= life.notna().to_numpy() & ((life % 1 != 0) | (life < 1)).to_numpy()
        q.reject(f, bad, "life", "life number is not a whole number >= 1")
        f["life"] = life.fillna(1)
    elif dated:
        f["life"] = f.groupby("unit_id")["install_date"].rank(method="dense").fillna(1)
    else:
        f["life"] = 1
    _numbers(f, [c for c in fleet.covariates if c not in fleet.categorical], q, config, "non-numeric covariate",
             plausible=True)
    ok = f[~_rejected(f, q)].copy()
    ok["life"] = ok["life"].astype(np.int64)
    if as_of_override is not None:
        as_of = pd.Timestamp(as_of_override)
    elif fleet.as_of is not None:
        as_of = pd.Timestamp(fleet.as_of)
    elif dated:
        as_of = _latest_date(ok["exit_date"])
    else:
        as_of = None
    settings = BuildSettings(renewal=fleet.renewal, as_of=as_of, backtest=as_of_override is not None)
    keep = ["unit_id", "life", "entry_age", "exit_age", "failed", "mode", "retired", "_source", "_line",
            *dict.fromkeys((*fleet.covariates, *fleet.group_by))]
    if dated:
        keep += ["install_date", "entry_date", "exit_date"]
    outcome = build_from_intervals(ok[keep], settings, dated=dated)
    _merge(outcome, q)
    if not dated and not marked:
        warnings += _all_in_service(outcome.frame, table.name, config)
    files = _account([("life_table", table)], outcome, q)
    warnings += _cut_last_rows(q, table)
    q.seal()
    rows_read = len(table.frame)
    del table, f, ok
    return _finish(config, outcome, q, rows_read, as_of, tuple(fleet.covariates), files, warnings)


#: A life table in ages with at least this many units and no retired unit among those
#: not ended by a failure is worth a word: retirements are common in a fleet that size.
LARGE_TABLE_UNITS = 200


def _all_in_service(frame: pd.DataFrame, name: str, config: Config) -> list[str]:
    """A warning when every unit of a large life table in ages that did not end in a failure
    reads as in service (nothing in the file can say a unit was retired)."""
    if not len(frame):
        return []
    last_failed = frame.groupby("unit_id", sort=False)["failed"].last() if "failed" in frame else None
    units = int(frame["unit_id"].nunique())
    running = int(frame.loc[frame["in_service"], "unit_id"].nunique())
    not_failed = units - int(last_failed.sum()) if last_failed is not None else units
    if units < LARGE_TABLE_UNITS or running < not_failed:
        return []
    return [f"every one of the {running:,} units of {name} whose last life did not end in a failure reads as in "
            f"service: ages alone cannot say a unit was retired. If some were retired or decommissioned, add a "
            f"column {config.columns.retired!r} (1 for those units; set columns.retired to use another name) so "
            "they are left out of the ranking and the fleet forecast."]


def _looks_dated(values: pd.Series, decimal: str) -> bool:
    text = values.astype(str).str.strip()
    text = text[text != ""]
    if text.empty:
        return False
    _, not_number = _parse.parse_numbers(text, decimal)
    return bool(not_number.mean() > 0.5)


# -- shared ending -------------------------------------------------------------------

def _account(tables: list[tuple[str, RawTable]], outcome: BuildOutcome, q: Quarantine) -> list[dict]:
    """Every row read is exactly one of kept, quarantined, after as_of; returns per file
    ``{file, role, rows_read, rows_kept, rows_quarantined, rows_after_as_of}`` (role: the
    ``[input]`` key that names the file)."""
    problems, files = [], []
    for role, t in tables:
        n = len(t.frame)
        taken = q.taken(t.name)
        count = taken.astype(np.int64)
        counted = {}
        for what, pairs in (("kept", outcome.kept), ("after", outcome.after_as_of)):
            hits = np.zeros(n, dtype=np.int64)
            for source, index in pairs:
                if source == t.name:
                    hits += np.bincount(index, minlength=n)[:n]
            count += hits
            counted[what] = int(hits.sum())
        files.append({"file": t.name, "role": role, "rows_read": n, "rows_kept": counted["kept"],
                      "rows_quarantined": int(taken.sum()), "rows_after_as_of": counted["after"]})
        lines = t.frame["_line"].to_numpy()
        problems += [(t.name, int(line), int(c)) for line, c in zip(lines[count != 1][:3], count[count != 1][:3])]
    if problems:
        rows_read = sum(len(t.frame) for _, t in tables)
        raise RuntimeError(  # a bug in wearcast, not in the export
            f"row accounting failed: read {rows_read}, kept {outcome.n_kept}, quarantined {len(q)}, "
            f"after as_of {outcome.n_after_as_of}, (file, line, times counted) {problems[:3]}. Please report this."
        )
    return files


def _finish(config: Config, outcome: BuildOutcome, q: Quarantine, rows_read: int, as_of,
            covariates, files: list[dict], warnings: list[str]) -> Loaded:
    fleet = config.fleet
    order = list(dict.fromkeys(covariates))
    cov = [c for c in fleet.covariates if c in order]
    rows_kept, rows_after_as_of = outcome.n_kept, outcome.n_after_as_of
    outcome.kept.clear(), outcome.after_as_of.clear(), outcome.rejected.clear()
    frame, outcome.frame = outcome.frame, None
    table = None
    if len(frame):
        sort = ["unit_id", "life", "entry_age"]
        # When the builder already emitted the rows in this order, the stable sort would keep them in place.
        if not (outcome.ordered and isinstance(frame.index, pd.RangeIndex) and frame.index.start == 0):
            frame = frame.sort_values(sort, kind="mergesort").reset_index(drop=True)
        table = LifeTable.from_frame(frame, cov, fleet.categorical, as_of=as_of, source=config.source,
                                     meta={"renewal": fleet.renewal, "group_by": list(fleet.group_by)})
        for c in cov:  # a covariate with no value anywhere (an empty readings file is named already)
            if table.frame[c].isna().all() and not any(f"({c}" in w or f" {c}," in w or f" {c})" in w
                                                       for w in warnings):
                warnings.append(f"covariate {c} is empty for every unit: no kept row of the export holds a value "
                                "for it. Check that column in the export, or remove it from fleet.covariates.")
    return Loaded(table=table, quarantine=q, rows_read=rows_read, rows_kept=rows_kept,
                  rows_after_as_of=rows_after_as_of, as_of=as_of, files=files, warnings=warnings)


def load(config: Config, as_of: dt.date | None = None) -> Loaded:
    """Read, check and build; raises only for whole-file problems (see module doc)."""
    shape = config.input.shape
    _check_by_file(config)
    _ranges.check_ranges(config.fleet.ranges, [c for c in config.fleet.covariates if c not in config.fleet.categorical],
                         config.source)
    if shape == "register_log":
        return _load_register_log(config, as_of)
    if shape == "life_table":
        return _load_life_table(config, as_of)
    raise ConfigError(f"{config.source}: input.shape {shape!r} is not 'register_log' or 'life_table'.")


def bad_share_error(loaded: Loaded, frame: pd.DataFrame, max_share: float, path: Path | None) -> DataError | None:
    """The DataError to raise when too many rows of one file were rejected (None when
    every file is within bounds). The share is per file; the worst file is named."""
    worst = None
    for f in loaded.files:
        considered = f["rows_read"] - f["rows_after_as_of"]
        share = f["rows_quarantined"] / considered if considered else 0.0
        if f["rows_quarantined"] and share > max_share and (worst is None or share > worst[1]):
            worst = (f, share, considered)
    if worst is None:
        return None
    f, share, considered = worst
    mine = frame[frame["source_file"] == f["file"]]
    reasons = by_reason(mine)
    top = next(iter(reasons))
    first = mine[mine["reason"] == top].iloc[0]
    where = f"rejected rows are listed in {path}" if path else "pass quarantine_dir to get the list of rejected rows"
    return DataError(
        f"{f['file']}: {f['rows_quarantined']} of {considered} rows ({share:.1%}) were rejected, above "
        f"fleet.max_bad_share = {max_share:.1%} (taken per file). Most common reason: {top} ({reasons[top]} rows), "
        f"first at line {first['line']}, column {first['column']} (value {first['value']!r}). Fix the export "
        f"(or raise fleet.max_bad_share); {where}.",
        quarantine_path=None if path is None else str(path),
    )


#: A fleet with this much time at risk and not one failure is taken as a broken export
#: (failure codes not matched, an empty or filtered event log) unless the config says
#: it is expected. 100 unit-years: at an MTBF of 10 years about 10 failures would be
#: expected, and the chance of none is about e**-10 (Poisson; common practice).
NO_FAILURE_UNIT_YEARS = 100.0


def no_failures_error(loaded: Loaded, config: Config, path: Path | None) -> DataError | None:
    """A DataError when the life table has no failure in many unit-years (None otherwise)."""
    table = loaded.table
    if table is None or table.n_failures or config.fleet.no_failures_expected:
        return None
    unit_years = float((table.exit - table.entry).sum()) / 365.25
    if unit_years < NO_FAILURE_UNIT_YEARS:
        return None
    log = next((f for f in loaded.files if f["role"] in ("events", "life_table")), None)
    name = log["file"] if log else config.source
    kept = ("the file has a header but no rows" if not log["rows_read"]
            else f"{log['rows_kept']} of its {log['rows_read']} rows kept") if log else "no event log"
    kinds = ", ".join(repr(k) for k in config.fleet.failure_kinds)
    hint = (f"check that fleet.failure_kinds ([{kinds}]) names the export's failure codes and that the event "
            "log is the full export" if config.input.shape == "register_log"
            else "check the failed column and that the file is the full export")
    return DataError(
        f"{name}: no failure in {unit_years:,.0f} unit-years at risk over {table.n_units:,} units ({kept}); "
        f"a life table without failures cannot be modelled. {hint[0].upper() + hint[1:]}, or set "
        "fleet.no_failures_expected = true when the fleet truly has not failed.",
        quarantine_path=None if path is None else str(path))


def write_outputs(out_dir: Path, quarantine: pd.DataFrame) -> Path:
    return write_quarantine(Path(out_dir) / QUARANTINE_FILE, quarantine)
